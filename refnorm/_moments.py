"""Accurate per-group mean and variance: corrected two-pass reduction.

For a group x_1..x_n the first pass gives m0 = fl(sum(x) / n). The second pass
forms d_i = x_i - m0 (exact by Sterbenz's lemma when x_i is within a factor 2
of m0, i.e. whenever cancellation is a risk) and the correction
c = sum(d) / n. The mean is carried as the unevaluated pair (m0, c), so that
x_i - mean = d_i - c keeps the bits that a single float64 mean would lose
when |mean| >> spread. The variance uses the corrected two-pass formula

    M2 = sum(d_i^2) - (sum d_i)^2 / n,    var = M2 / (n - ddof)

(Chan, Golub & LeVeque 1983, "Algorithms for computing the sample variance",
eq. 1.7, from memory; Higham 2002, Accuracy and Stability of Numerical
Algorithms, §1.9). No one-pass E[x^2] - E[x]^2 anywhere.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Moments:
    """Per-group statistics with keepdims shapes.

    The mean is the unevaluated pair ``m0 + c`` (about twice float64
    precision); ``dev = x - m0`` is kept by :func:`moments` because every later
    pass needs it, and is None from the fused chunked core (``_core.fused_*``),
    which never holds it for the whole array; ``m2`` is the corrected sum of
    squared deviations; ``n`` the group length. ``shift`` (keepdims int64, or None
    for 0) is set by the scaled evaluation (:mod:`refnorm._scaled`): m2 is then the sum for
    x 2^shift, so that a variance in range is not lost to an M2 beyond it.
    """

    m0: np.ndarray
    c: np.ndarray
    dev: np.ndarray | None
    m2: np.ndarray
    n: int
    shift: np.ndarray | None = None

    @property
    def mean(self) -> np.ndarray:
        """The mean rounded once to float64."""
        return self.m0 + self.c

    def var(self, ddof: int = 0) -> np.ndarray:
        """M2 / (n - ddof): biased for ddof=0, unbiased (Bessel) for ddof=1."""
        v = self.m2 / (self.n - ddof)
        if self.shift is not None:
            with np.errstate(over="ignore", under="ignore"):
                v = np.ldexp(v, -2 * self.shift)  # exact unless the variance itself leaves the range
        return v

    def centered(self) -> np.ndarray:
        """x - mean evaluated as (x - m0) - c, keeping the low part of the mean."""
        if self.dev is None:
            raise ValueError("these moments were computed chunk by chunk and keep no deviations; "
                             "use moments(x, axes) for x - m0")
        return self.dev - self.c


#: Slices summed one after another before their sums are combined, for reductions down a
#: strided axis (see :func:`sum_keep`).
OUTER_BLOCK = 128


def sum_keep(t: np.ndarray, axes: tuple[int, ...]) -> np.ndarray:
    """sum(t) over ``axes``, keepdims, with a short accumulation along every reduced axis.

    NumPy sums pairwise only along the innermost axis; down any other axis it adds one slice
    at a time, whose error grows like n u (Higham 2002, Accuracy and Stability of Numerical
    Algorithms, §4.2). Such axes are summed in blocks of OUTER_BLOCK slices, and the block
    sums again in blocks, so no accumulation is longer than OUTER_BLOCK terms:
    error <= (OUTER_BLOCK ceil(log_OUTER_BLOCK n) + log2 n) u instead of n u.
    The order of the additions depends only on the shape, never on the data.
    """
    last = t.ndim - 1
    if last in axes:
        t = np.sum(t, axis=last, keepdims=True)
    for a in sorted((a for a in axes if a != last), reverse=True):
        t = _sum_blocked(t, a)
    return t


def _sum_blocked(t: np.ndarray, a: int) -> np.ndarray:
    n = t.shape[a]
    if n <= OUTER_BLOCK:
        return np.sum(t, axis=a, keepdims=True)
    m = n - n % OUTER_BLOCK
    pre = (slice(None),) * a
    head = t[pre + (slice(0, m),)]
    blocks = np.sum(head.reshape(t.shape[:a] + (m // OUTER_BLOCK, OUTER_BLOCK) + t.shape[a + 1:]), axis=a + 1)
    s = _sum_blocked(blocks, a)
    if m < n:
        s = s + np.sum(t[pre + (slice(m, n),)], axis=a, keepdims=True)
    return s


def group_size(shape: tuple[int, ...], axes: tuple[int, ...]) -> int:
    n = 1
    for a in axes:
        n *= shape[a]
    return n


def moments(x: np.ndarray, axes: tuple[int, ...]) -> Moments:
    """Corrected two-pass moments of float64 ``x`` over canonical ``axes`` (keepdims)."""
    n = group_size(x.shape, axes)
    m0 = sum_keep(x, axes)
    m0 /= n
    dev = x - m0
    s1 = sum_keep(dev, axes)
    c = np.where(np.isfinite(m0), s1 / n, 0.0)  # mean = m0 when m0 is +-Inf (IEEE 754), see _core._correction
    s2 = sum_keep(np.square(dev), axes)
    # s1 * c is tiny next to s2 unless m0 was poor; it is never clamped.
    m2 = s2 - s1 * c
    return Moments(m0=m0, c=c, dev=dev, m2=m2, n=n)


def mean_square(x: np.ndarray, axes: tuple[int, ...]) -> np.ndarray:
    """mean(x^2) over ``axes`` (keepdims); a sum of non-negative terms needs no correction."""
    n = group_size(x.shape, axes)
    s = sum_keep(np.square(x), axes)
    s /= n
    return s
