"""Error model of a kernel's statistics: mean, variance and inverse standard deviation per group.

The model is a correct kernel working in the accumulation format (unit roundoff
u): a two-pass or updating (Welford) reduction, any summation order covered by
the declared model's gamma_n (summation.py). For a group of n elements with
float64 mean mu, biased variance v (the mean square for RMS norm) and
A = mean|x|, D = mean|x - mu|:

    mean       |mu^ - mu| <= B_mu = (gamma_n + u_cv) A + 2 u |mu| (+ eta when u_cv > 0)
               (sum of n terms, Higham 2002 §4.2; the division by n or product with fl(1/n);
               u_cv = u when the accumulation format is narrower than the storage format, whose
               conversion of x may also underflow: eta absolute, IEEE 754-2019 §7.5)
    variance   v^ in [v - B_v-, v + B_v+],
               B_v- = (gamma_n + 4 u) v + W + 2 eta
               B_v+ = (gamma_n + 4 u)(v + B_mu^2) + B_mu^2 + W + 2 eta
               The exact second pass with the computed mean gives mean((x - mu^)^2) = v + (mu^ - mu)^2
               >= v, so the mean's error enters squared and upward only (Chan, Golub & LeVeque 1983:
               two-pass error ~ n u + (n u kappa)^2); squaring, the sum and the division add
               gamma_n + 3u relative. W is the first-order feedback of an updating kernel's running
               mean into M2: deterministically 2 gamma_n |mu| D (the updating bound ~ n kappa u of
               Chan, Golub & LeVeque), and under the probabilistic model lam u |mu| sqrt(v)
               (docs/tolerances.md derives it: about 0.82 lam u |mu| sqrt(v) for data in no
               particular order). Two-pass kernels have W = 0; the bound covers both.
    RMS        v^ = mean(x^2) within (gamma_n + 3u) v + 2 eta (non-negative terms, no cancellation).
    rstd       r^ in [r_lo, r_hi] from v^'s interval through r = 1/sqrt(v + eps) ("inside") or
               1/(sqrt(v) + eps) ("outside"), with (1 +- u) on the addition of eps and
               (1 +- E u) on each square root, reciprocal square root or reciprocal, E = ELEM.
    rounded    statistics rounded to a format of unit roundoff u_st before use (Precision.statistics):
               B_mu + u_st |mu| + eta_st; the variance rounded twice (the sum of squares and the
               quotient), 2 u_st relative + 2 eta_st; r^ once more, (1 +- u_st) +- eta_st.
    flushed    subnormal inputs read as zero (Precision.subnormals = "flush"): x_i becomes x_i - d_i with
               d_i = x_i where |x_i| is below the smallest normal value, so B_mu + mean|d| and the
               variance moves by at most 2 mean(|x - mu| |d|) + mean(d^2) (mean(d^2) for RMS).

A one-pass E[x^2] - E[x]^2 kernel has error ~ gamma_n mean(x^2) = gamma_n kappa^2 v with
kappa^2 = 1 + mu^2/v: kappa times the W term and 1/(gamma_n) times the B_mu^2 term, which is what
makes it fail on cancellation data.

Arrays are keepdims arrays of the grouping's view (grouping.py).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np

from .. import dtypes
from .grouping import Grouping
from .summation import capped, gamma, worst_gamma

__all__ = ["ELEM", "StatModel", "batch_stats", "fixed_stats", "r_interval", "beta_interval"]

#: Allowance for sqrt, rsqrt and reciprocal in units of u: 2 ULP = 4 u, the documented
#: maximum error of fast single-precision rsqrt/sqrt on common accelerators (from memory:
#: CUDA C Programming Guide, table of single-precision function errors, rsqrtf 2 ulp);
#: IEEE 754-2019 §5.4.1 requires sqrt and division correctly rounded (u), so 4 u covers both.
ELEM = 4.0


@dataclass(frozen=True)
class StatModel:
    """A group's statistics (float64) and the kernel's error interval around them (keepdims)."""

    center: bool
    n: int
    u: float
    gamma: float
    mu: np.ndarray
    v: np.ndarray
    r: np.ndarray
    A: np.ndarray
    b_mu: np.ndarray
    v_dn: np.ndarray
    v_up: np.ndarray
    w_term: np.ndarray
    r_lo: np.ndarray
    r_hi: np.ndarray
    beta: np.ndarray
    beta_lo: np.ndarray
    beta_hi: np.ndarray
    vacuous: np.ndarray
    eps: float
    placement: str

    @property
    def dr(self) -> np.ndarray:
        """Bound on |r^ - r|."""
        return np.maximum(self.r_hi - self.r, self.r - self.r_lo)

    @property
    def dbeta(self) -> np.ndarray:
        return np.maximum(self.beta_hi - self.beta, self.beta - self.beta_lo)

    @property
    def b_var(self) -> np.ndarray:
        """Symmetric bound on |v^ - v|."""
        return np.maximum(self.v_dn, self.v_up)

    @property
    def kappa(self) -> np.ndarray:
        """Condition number of the variance, sqrt(1 + mu^2/v) (Chan, Golub & LeVeque 1983); 1 for RMS."""
        if not self.center:
            return np.ones_like(self.v)
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.sqrt(1.0 + np.square(self.mu) / self.v)

    def rounded(self, u_st: float, eta_st: float) -> "StatModel":
        """The statistics as a kernel uses them after rounding them to a format of unit roundoff u_st
        (Precision.statistics): the mean once, the variance twice (sum of squares and quotient), rstd
        once more; eta_st is that format's absolute rounding floor (stats.eta, or its smallest normal
        value when subnormals are flushed)."""
        with np.errstate(invalid="ignore", over="ignore"):
            b_mu = self.b_mu + u_st * np.abs(self.mu) + eta_st if self.center else self.b_mu
            inf_v = np.isinf(self.v)
            v_dn = np.where(inf_v, 0.0, self.v_dn + 2.0 * u_st * self.v + 2.0 * eta_st)
            v_up = np.where(inf_v, 0.0, self.v_up + 2.0 * u_st * (self.v + self.v_up) + 2.0 * eta_st)
        vfloor = _tiny(self.u)
        r_lo, r_hi, vac = r_interval(self.v - v_dn, self.v + v_up, self.eps, self.placement, self.u, vfloor)
        r_lo, r_hi = np.maximum(r_lo * (1.0 - u_st) - eta_st, 0.0), r_hi * (1.0 + u_st) + eta_st
        if self.placement == "outside":
            _, b_lo, b_hi = beta_interval(self.v, self.v - v_dn, self.v + v_up, self.u, vfloor)
            b_lo, b_hi = np.maximum(b_lo * (1.0 - u_st) - eta_st, 0.0), b_hi * (1.0 + u_st) + eta_st
        else:
            b_lo, b_hi = r_lo, r_hi
        return _replace(self, b_mu=b_mu, v_dn=v_dn, v_up=v_up, r_lo=r_lo, r_hi=r_hi, beta_lo=b_lo, beta_hi=b_hi,
                        vacuous=vac)

    def widened(self, u_p: float, eta_p: float, mean: bool, disp: bool) -> "StatModel":
        """The statistics as a backward pass receives them saved in the params format: one more
        rounding, u_p relative plus eta_p absolute (a saved rstd of large data can be subnormal)."""
        b_mu = self.b_mu + u_p * np.abs(self.mu) + eta_p if mean else self.b_mu
        if not disp:
            return _replace(self, b_mu=b_mu)
        f = u_p + self.u
        r_lo, r_hi = np.maximum(self.r_lo * (1.0 - f) - eta_p, 0.0), self.r_hi * (1.0 + f) + eta_p
        beta_lo, beta_hi = self.beta_lo, self.beta_hi
        if self.placement == "outside":
            # beta = 1/sqrt(v) recovered from a saved rstd: 1/(1/r - eps).
            tiny = _tiny(self.u)
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                d_lo = 1.0 / r_hi - self.eps
                d_hi = 1.0 / r_lo - self.eps
                b_hi2 = np.where(d_lo > 0, 1.0 / np.maximum(d_lo, tiny), 1.0 / math.sqrt(tiny))
                b_lo2 = np.where(d_hi > 0, 1.0 / d_hi, 0.0)
            beta_lo = np.minimum(beta_lo, b_lo2 * (1 - f))
            beta_hi = np.maximum(beta_hi, b_hi2 * (1 + f))
        else:
            beta_lo, beta_hi = r_lo, r_hi
        return _replace(self, b_mu=b_mu, r_lo=r_lo, r_hi=r_hi, beta_lo=beta_lo, beta_hi=beta_hi)


def _replace(s: StatModel, **kw) -> StatModel:
    return replace(s, **kw)


def _tiny(u: float) -> float:
    """Smallest positive subnormal of the format with unit roundoff u (the floor of a computed variance)."""
    for name in dtypes.FORMATS:
        if dtypes.unit_roundoff(name) == u:
            return float(dtypes.finfo(name).smallest_subnormal)
    return 2.0**-1074


def eta(name: str) -> float:
    """Half the smallest subnormal spacing: the absolute error of rounding in the subnormal range."""
    return float(dtypes.finfo(name).smallest_subnormal) / 2.0


def r_interval(v_lo, v_hi, eps: float, placement: str, u: float, vfloor: float):
    """[r_lo, r_hi] of the computed 1/sqrt(v + eps) or 1/(sqrt(v) + eps) for v^ in [v_lo, v_hi].

    Returns (r_lo, r_hi, vacuous): ``vacuous`` marks groups whose lower variance limit
    leaves nothing to bound r by (v_lo + eps <= 0); there r_hi is the value at the
    format's smallest subnormal, finite but meaningless.
    """
    e = ELEM * u
    v_lo = np.maximum(v_lo, 0.0)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if placement == "inside":
            t_lo = (v_lo + eps) * (1.0 - u)
            t_hi = (v_hi + eps) * (1.0 + u)
            vac = ~(t_lo > 0)
            r_hi = (1.0 + e) / np.sqrt(np.where(vac, vfloor, t_lo))
            r_lo = (1.0 - e) / np.sqrt(t_hi)
        else:
            d_lo = (np.sqrt(v_lo) * (1.0 - e) + eps) * (1.0 - u)
            d_hi = (np.sqrt(v_hi) * (1.0 + e) + eps) * (1.0 + u)
            vac = ~(d_lo > 0)
            r_hi = (1.0 + e) / np.where(vac, math.sqrt(vfloor), d_lo)
            r_lo = (1.0 - e) / d_hi
    return r_lo, r_hi, vac


def beta_interval(v, v_lo, v_hi, u: float, vfloor: float):
    """beta = 1/sqrt(v) (the backward's factor with eps outside the root): (beta, lo, hi)."""
    e = ELEM * u
    v_lo = np.maximum(v_lo, 0.0)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        beta = 1.0 / np.sqrt(v)
        lo = (1.0 - e) / np.sqrt(v_hi * (1.0 + u))
        hi = (1.0 + e) / np.sqrt(np.where(v_lo > 0, v_lo * (1.0 - u), vfloor))
    return beta, lo, hi


def _oracle_r(v, eps: float, placement: str):
    with np.errstate(divide="ignore", invalid="ignore"):
        if placement == "inside":
            return 1.0 / np.sqrt(v + eps)
        return 1.0 / (np.sqrt(v) + eps)


def _finish(center, n, u, gam, mu, v, A, b_mu, v_dn, v_up, w, eps, placement) -> StatModel:
    vfloor = _tiny(u)
    r = _oracle_r(v, eps, placement)
    r_lo, r_hi, vac = r_interval(v - v_dn, v + v_up, eps, placement, u, vfloor)
    if placement == "outside":
        beta, b_lo, b_hi = beta_interval(v, v - v_dn, v + v_up, u, vfloor)
    else:
        beta, b_lo, b_hi = r, r_lo, r_hi
    return StatModel(center=center, n=n, u=u, gamma=gam, mu=mu, v=v, r=r, A=A, b_mu=b_mu, v_dn=v_dn,
                     v_up=v_up, w_term=w, r_lo=r_lo, r_hi=r_hi, beta=beta, beta_lo=b_lo, beta_hi=b_hi,
                     vacuous=vac, eps=eps, placement=placement)


def batch_stats(xv: np.ndarray, grp: Grouping, *, center: bool, eps: float, placement: str, u: float,
                model: str, lam: float, u_cv: float, eta_a: float, flushed: np.ndarray | None = None) -> StatModel:
    """Statistics of the data itself (training mode) and the kernel's error model for them.

    ``flushed``: |x_i| where a kernel that flushes subnormals reads x_i as zero, else 0 (None: none).
    """
    n = grp.n
    gam_raw = gamma(n, u, model, lam)
    gam = capped(gam_raw)
    with np.errstate(invalid="ignore", over="ignore"):
        A = grp.gmean(np.abs(xv))
        if center:
            m0 = grp.gmean(xv)
            mu = m0 + grp.gmean(xv - m0)
            dev = xv - mu
            v = np.maximum(grp.gmean(np.square(dev)), 0.0)
            dbar = grp.gmean(np.abs(dev))
            b_mu = (gam + u_cv) * A + 2.0 * u * np.abs(mu)
            if u_cv:  # converting x to a narrower accumulation format may underflow: eta_a absolute
                b_mu = b_mu + eta_a
            w_det = 2.0 * capped(worst_gamma(n, u)) * np.abs(mu) * dbar
            if model == "probabilistic":
                w = np.minimum(w_det, lam * u * np.abs(mu) * np.sqrt(v))
            else:
                w = 2.0 * gam * np.abs(mu) * dbar
            rel = gam + 4.0 * u
            fl_v = 0.0
            if flushed is not None:
                b_mu = b_mu + grp.gmean(flushed)
                fl_v = 2.0 * grp.gmean(np.abs(dev) * flushed) + grp.gmean(np.square(flushed))
            v_dn = rel * v + w + 2.0 * eta_a + fl_v
            b2 = np.square(b_mu)
            v_up = rel * (v + b2) + b2 + w + 2.0 * eta_a + fl_v
        else:
            mu = np.zeros_like(A)
            v = grp.gmean(np.square(xv))
            b_mu = np.zeros_like(A)
            w = np.zeros_like(A)
            fl_v = 0.0 if flushed is None else grp.gmean(np.square(flushed))
            v_dn = v_up = (gam + 3.0 * u + 2.0 * u_cv) * v + 2.0 * eta_a + fl_v
    # An infinite variance (a row holding +-Inf) is computed as +Inf by any IEEE kernel: r = 0 exactly.
    inf_v = np.isinf(v)
    if inf_v.any():
        v_dn, v_up = np.where(inf_v, 0.0, v_dn), np.where(inf_v, 0.0, v_up)
    return _finish(center, n, u, gam_raw, mu, v, A, b_mu, v_dn, v_up, w, eps, placement)


def fixed_stats(mean: np.ndarray, var: np.ndarray, *, eps: float, placement: str, u: float,
                u_cv: float = 0.0) -> StatModel:
    """Given statistics (running statistics in eval mode): exact inputs, only rstd's own rounding, and
    u_cv relative where they are converted to an accumulation format narrower than theirs."""
    mu = np.asarray(mean, dtype=np.float64)
    v = np.asarray(var, dtype=np.float64)
    z = np.zeros_like(v)
    with np.errstate(invalid="ignore", over="ignore"):
        b_mu, dv = u_cv * np.abs(mu), u_cv * np.abs(v)
    return _finish(True, 1, u, 0.0, mu, v, np.abs(mu), b_mu, dv, dv, z, eps, placement)
