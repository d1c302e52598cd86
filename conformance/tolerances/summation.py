"""Error constants of floating-point sums: gamma_n under the three summation models.

For a sum s = x_1 + ... + x_n evaluated in a format with unit roundoff u,

    |fl(s) - s| <= gamma * sum |x_i|

with gamma from the model the kernel declares:

    worst          gamma_n = n u / (1 - n u)              any order (recursive summation),
                   Higham 2002, Accuracy and Stability of Numerical Algorithms, Lemma 3.1, §4.2
    pairwise       gamma_k, k = ceil(log2 n)              a balanced binary tree, Higham 2002 §4.2
    probabilistic  exp(lam sqrt(n) u + n u^2/(1-u)) - 1   ~ lam sqrt(n) u, rounding errors modelled as
                   independent, mean zero, |delta| <= u; Higham & Mary 2019, SIAM J. Sci. Comput.
                   41(5), Thm 2.4 and its summation/inner-product corollary (theorem numbers from
                   memory), holding with probability at least Q(lam, n) = 1 - 2 n exp(-lam^2 (1-u)^2 / 2)

and the value used is min(worst, model): no model may claim more than the
deterministic worst case. n counts the terms (Higham's gamma_{n-1} rounded up
to gamma_n: one more rounding for the division by n or a conversion).
"""

from __future__ import annotations

import math

__all__ = ["MODELS", "GAMMA_CAP", "gamma", "capped", "worst_gamma", "probability", "lam_for"]

MODELS = ("probabilistic", "pairwise", "worst")

#: Stand-in for an infinite gamma inside bound arithmetic, so that "no bound" times an exact
#: zero stays 0 (a sum of zeros is exact) instead of inf * 0 = NaN.
GAMMA_CAP = 1e300


def capped(g: float) -> float:
    """gamma with +inf replaced by GAMMA_CAP (see there)."""
    return min(g, GAMMA_CAP)


def worst_gamma(k: float, u: float) -> float:
    """gamma_k = k u / (1 - k u) (Higham 2002, Lemma 3.1); +inf once k u >= 1 (no bound)."""
    ku = k * u
    if ku <= 0.0:
        return 0.0
    return ku / (1.0 - ku) if ku < 1.0 else math.inf


def gamma(n: int, u: float, model: str = "probabilistic", lam: float = 8.0) -> float:
    """The error constant of a sum of ``n`` terms in a format of unit roundoff ``u``.

    Parameters
    ----------
    n : number of terms (n <= 1: no addition, 0).
    u : unit roundoff of the format the sum is accumulated in.
    model : "probabilistic", "pairwise" or "worst" (see the module docstring).
    lam : the probabilistic model's lambda.

    Returns
    -------
    float gamma with |fl(sum x) - sum x| <= gamma * sum |x_i|; finite for the
    probabilistic and pairwise models, +inf for the worst case once n u >= 1.
    """
    if model not in MODELS:
        raise ValueError(f"summation model is {model!r}, expected one of {', '.join(MODELS)}")
    if n <= 1:
        return 0.0
    worst = worst_gamma(n, u)
    if model == "worst":
        return worst
    if model == "pairwise":
        k = math.ceil(math.log2(n))
        tree = worst_gamma(k, u)
        return min(worst, tree)
    # Higham & Mary 2019: gamma~_n(lam) = exp(lam sqrt(n) u + n u^2 / (1 - u)) - 1.
    prob = math.expm1(lam * math.sqrt(n) * u + n * u * u / (1.0 - u))
    return min(worst, prob)


def probability(lam: float, n: int, u: float) -> float:
    """Q(lam, n) = 1 - 2 n exp(-lam^2 (1-u)^2 / 2): the probability with which the
    probabilistic bound of one sum of n terms holds (Higham & Mary 2019; from memory)."""
    return 1.0 - 2.0 * n * math.exp(-(lam * lam) * (1.0 - u) ** 2 / 2.0)


def lam_for(failure: float, n: int, u: float) -> float:
    """The smallest lambda with 1 - Q(lam, n) <= ``failure`` (inverse of :func:`probability`)."""
    if not 0.0 < failure < 1.0:
        raise ValueError(f"failure is {failure!r}, expected a probability in (0, 1)")
    return math.sqrt(2.0 * math.log(2.0 * n / failure)) / (1.0 - u)
