"""Power-of-two scaling for the groups whose range the fast evaluation cannot hold.

The fused core (:mod:`refnorm._core`) squares deviations and multiplies
gradients by deviations in plain float64. For finite data whose magnitudes are
far from 1 that overflows or underflows: x = (1e200, -1e200, 3e200, 0.5e200)
has squares beyond float64's range (y would be NaN), data of size 1e-170 has
squares below it (with eps = 0, y would be +-inf). Every formula of a
normalization is homogeneous in x, dy and the weight, so each group can be
computed on copies scaled by powers of two and the results scaled back.
Multiplying by 2^k is exact in binary floating point unless the result leaves
the format's range (Higham 2002, Accuracy and Stability of Numerical
Algorithms, §2.1; IEEE 754-2019 §5.3.3, scaleB), so no accuracy is lost: the
scaled evaluation is the fast one's arithmetic on numbers near 1.

Per group (keepdims arrays, exponents as int64):

* x' = x 2^k with k from the group's largest |x| (|x'| < 1); the mean and
  variance of x' are those of x times 2^k and 4^k.
* The inverse standard deviation r' of x' is kept as R 2^-J, R near 1:
  inside the root, var' + eps 4^k = 4^J (var' 4^-J + eps 4^(k-J)) with J
  from the larger term, so eps 4^k never overflows (it may be 2^2000) and a
  term that underflows is below 2^-1000 of the other; eps outside the root
  likewise with sqrt(var') + eps 2^k. Then rstd = R 2^(k-J), xhat = (x' - mean') R 2^-J.
* dy' = dy 2^t1 per group, weight' = weight 2^q (one q for the array),
  g' = dy' weight' 2^t2 per group: dx is linear in g, so it is computed from
  g' and multiplied by 2^(k - J - t1 - q - t2) once at the end.

An output whose exact value is beyond float64's range rounds to +-inf or to a
subnormal or zero, as IEEE 754 rounding does (a variance of data of size
1e200 is 1e400: it is returned as inf; y and rstd are always in range).
Elements of a group below 2^-1074 times its largest element vanish in x'
(underflow); their effect on every output of the group is below 2^-1000
relative. The one limit: a weight whose nonzero elements span more than
2^1000 in magnitude loses its smallest elements the same way.

Which groups need this (:func:`x_suspect`, :func:`given_suspect`,
:func:`sums_suspect`, then :func:`need_scaling`) is decided from statistics the
fast path computes anyway, so that data in the ordinary range pays nothing;
only groups flagged there have their largest |x|, |dy| and |dy weight| taken,
and only groups whose data really lies outside [2^-400, 2^400] are
recomputed here. A group's result depends only on its own data (and the
weight), never on its neighbours.
"""

from __future__ import annotations

import numpy as np

from ._moments import Moments, group_size, mean_square, moments, sum_keep
from ._twoproduct import OFFSET, centered_product

#: Data whose largest magnitude in a group lies in [2^LO, 2^HI] (or is 0) is evaluated by the
#: fast path: no square, product or sum there can overflow, and what underflows is below
#: 2^-100 of the group's own scale (the margins are worked out in _core's comments).
LO, HI = 2.0**-400, 2.0**400
#: The fast path's statistics that need no second look: a variance (or mean square) in
#: [VAR_LO, VAR_HI] is accurate however it was reached (what underflowed is below 2^-110 of it).
VAR_LO, VAR_HI = 2.0**-960, 2.0**960
#: Per-group sums of g (or dy) below this, relative to the group length, mean that every
#: |g| may be tiny enough for products to underflow; r times a sum above SUM_HI may overflow.
SUM_LO, SUM_HI = 2.0**-880, 2.0**900
#: Below 2^-440 a nonzero mean leaves room for deviations whose squares underflow.
_CONST_MEAN = 2.0**-440
_NONE = np.iinfo(np.int64).min // 4


def group_amax(a: np.ndarray, red: tuple[int, ...]) -> np.ndarray:
    """max |a| over ``red`` (keepdims); NaN where the group holds a NaN."""
    hi = np.max(a, axis=red, keepdims=True)
    lo = np.min(a, axis=red, keepdims=True)
    return np.maximum(hi, -lo)


def out_of_window(amax: np.ndarray) -> np.ndarray:
    """Finite, nonzero and outside [LO, HI]."""
    return np.isfinite(amax) & (amax > 0) & ((amax < LO) | (amax > HI))


def weight_extreme(w: np.ndarray | None) -> bool:
    """Whether a finite nonzero weight element lies outside [LO, HI] (r w could then over/underflow)."""
    if w is None:
        return False
    a = np.abs(w[np.isfinite(w) & (w != 0)])
    return bool(a.size and (a.min() < LO or a.max() > HI))


def x_suspect(var: np.ndarray, m0: np.ndarray | None) -> np.ndarray:
    """Groups whose fast statistics may have over- or underflowed (keepdims bool).

    A variance outside [VAR_LO, VAR_HI], inf or NaN (an overflow of a sum or square of finite
    data shows as inf or NaN here). With centering, var == 0 and |m0| >= 2^-440 is a constant
    group (a nonzero deviation there is at least ulp(2^-440)/2 = 2^-493, whose square 2^-986
    does not underflow), which is exact and needs nothing. Runs per chunk: kept to a few
    operations when nothing is flagged.
    """
    bad = ~((var >= VAR_LO) & (var <= VAR_HI))
    if m0 is not None and bad.any():
        bad &= ~((var == 0) & (np.abs(m0) >= _CONST_MEAN) & np.isfinite(m0))
    return bad


def given_suspect(rstd: np.ndarray, mean: np.ndarray | None) -> np.ndarray:
    """Groups whose given statistics (saved or running) are outside the fast path's window."""
    bad = np.isfinite(rstd) & (rstd > 0) & ((rstd < LO) | (rstd > HI))
    if mean is not None:
        bad = bad | (np.isfinite(mean) & (np.abs(mean) > HI))
    return bad


def _to_group(a: np.ndarray, red: tuple[int, ...], how) -> np.ndarray:
    """An array keepdims over some of ``red`` reduced with ``how`` (np.any, np.max) over the rest."""
    axes = tuple(ax for ax in red if a.shape[ax] != 1)
    return how(a, axis=axes, keepdims=True) if axes else a


def sums_suspect(red: tuple[int, ...], r: np.ndarray, g_means: list, dy_sums: list, finite: list) -> np.ndarray:
    """Groups whose gradient sums say that dy or g may be outside the fast path's range.

    g_means: per-group means in units of g (sum(g)/n, mean(gc xhat)); their largest magnitude
    M is a lower bound of the group's max |g| up to a factor sqrt(n): below SUM_LO every |g|
    may be small enough for products to underflow, and r M above SUM_HI may overflow r g (a NaN
    or inf there fails both tests). dy_sums: (sum of dy over part of the group, its length),
    the same test for dweight's products dy (x - mean). finite: other sums that are finite for
    finite data in range. Runs per chunk (under the caller's np.errstate).
    """
    bad = None

    def add(flag):
        nonlocal bad
        bad = flag if bad is None else (bad | flag)

    if g_means:
        m = np.abs(g_means[0])
        for a in g_means[1:]:
            m = np.maximum(m, np.abs(a))
        add(~((m >= SUM_LO) & (r * m <= SUM_HI)))
    for s, count in dy_sums:
        a = _to_group(np.abs(s), red, np.max) / count
        add(~((a >= SUM_LO) & (a < np.inf)))
    for s in finite:
        add(_to_group(~np.isfinite(s), red, np.any))
    return bad if bad is not None else np.zeros(np.shape(r), dtype=bool)


def need_scaling(suspect: np.ndarray, red: tuple[int, ...], x: np.ndarray, dy: np.ndarray | None = None,
                 w: np.ndarray | None = None, given: tuple | None = None) -> np.ndarray:
    """The suspect groups whose data really lies outside the window (keepdims bool).

    A group holding NaN or Inf is never scaled: it propagates by IEEE arithmetic in the fast
    path. ``given`` = (rstd, mean) for given statistics, whose own range also counts.
    """
    if not suspect.any() and not weight_extreme(w):
        return np.zeros_like(suspect)
    ax = group_amax(x, red)
    ok = np.isfinite(ax)
    out = out_of_window(ax)
    if dy is not None:
        ad = group_amax(dy, red)
        ag = ad if w is None else group_amax(dy * w, red)
        ok &= np.isfinite(ad)
        out |= out_of_window(ad) | out_of_window(ag)
    if given is not None:
        rstd, mean = given
        ok &= np.isfinite(rstd) & (rstd > 0)
        if mean is not None:
            ok &= np.isfinite(mean)
        out |= given_suspect(rstd, mean)
    if weight_extreme(w):
        return ok
    return suspect & ok & out


def _shift(amax: np.ndarray) -> np.ndarray:
    """k with amax 2^k in [1/2, 1); 0 where amax is 0 or not finite."""
    ok = np.isfinite(amax) & (amax > 0)
    _, e = np.frexp(np.where(ok, amax, 1.0))
    return np.where(ok, -e.astype(np.int64), 0)


def _exponent(v: np.ndarray, where: np.ndarray) -> np.ndarray:
    """e with v in [2^(e-1), 2^e) where ``where``, else _NONE."""
    _, e = np.frexp(np.where(where, v, 1.0))
    return np.where(where, e.astype(np.int64), _NONE)


class _Scaled:
    """A group's scaled normalization: x' = x 2^k, xh2 = (x' - mean') R with xhat = xh2 2^-J,
    rstd = R 2^(k-J), and the outside-placement gradient factor ``b2`` (see backward)."""

    def __init__(self, x, red, *, eps, placement, center, mean=None, rstd=None, mean_lo=None):
        self.red, self.n, self.center, self.placement = red, group_size(x.shape, red), center, placement
        given = rstd is not None
        amax = group_amax(x, red)
        if given and mean is not None:
            amax = np.maximum(amax, np.abs(mean))
        k = _shift(amax)
        xs = np.ldexp(x, k)
        self.k = k
        self.moments = None
        if given:
            cen = xs if mean is None else xs - np.ldexp(mean, k)
            if mean_lo is not None:  # the low word of a saved mean (see _core._saved_mean_low)
                cen -= np.ldexp(mean_lo, k)
            frac, e = np.frexp(rstd)
            R, J = frac, k - e.astype(np.int64)
            if placement == "inside":
                b2, jb = R, 2 * J
            else:  # 1/|sd''| with sd = 2^(J-k) sd'', sd'' = 1/R - eps 2^(k-J); 0 where sd = 0
                sd2 = 1.0 / R - np.ldexp(eps, k - J)
                b2, jb = np.where(sd2 == 0, 0.0, 1.0 / np.abs(np.where(sd2 == 0, 1.0, sd2))), 2 * J
            self.var = None
        else:
            if center:
                mom = moments(xs, red)
                var_s = mom.var(0)
                cen = mom.centered()
                self.moments = Moments(m0=np.ldexp(mom.m0, -k), c=np.ldexp(mom.c, -k), dev=None, m2=mom.m2,
                                       n=mom.n, shift=k)
            else:
                var_s = mean_square(xs, red)
                cen = xs
            if placement == "inside":
                e = np.maximum(_exponent(var_s, var_s > 0), _exponent(np.full_like(var_s, eps), eps > 0) + 2 * k)
                J = np.where(e == _NONE, 0, -((-e) // 2))  # ceil(e / 2): both terms below 1 after 4^-J
                R = 1.0 / np.sqrt(np.ldexp(var_s, -2 * J) + np.ldexp(eps, 2 * k - 2 * J))
                b2, jb = R, 2 * J
            else:
                sd = np.sqrt(var_s)
                e = np.maximum(_exponent(sd, sd > 0), _exponent(np.full_like(sd, eps), eps > 0) + k)
                J = np.where(e == _NONE, 0, e)
                R = 1.0 / (np.ldexp(sd, -J) + np.ldexp(eps, k - J))
                b2, jb = np.where(sd > 0, 1.0 / np.where(sd > 0, sd, 1.0), 0.0), J
            self.var = np.ldexp(var_s, -2 * k)
        self.R, self.J, self.b2, self.jb = R, J, b2, jb
        self.xh2 = cen * R
        self.rstd = np.ldexp(R, k - J)

    def xhat(self) -> np.ndarray:
        return np.ldexp(self.xh2, -self.J)


def _weight_shift(w: np.ndarray | None) -> tuple[np.ndarray | None, int]:
    """(w 2^q, q) with max |w 2^q| in [1/2, 1): one exact scaling for the whole weight."""
    if w is None:
        return None, 0
    a = np.abs(w[np.isfinite(w)])
    if not a.size or a.max() == 0:
        return w, 0
    q = int(_shift(np.array(a.max())))
    return np.ldexp(w, q), q


def scaled_forward(x, red, w, b, *, eps, placement, center, mean=None, rstd=None):
    """(y, sc): y = xhat w + b evaluated on scaled copies; sc carries the unscaled statistics."""
    with np.errstate(all="ignore"):
        sc = _Scaled(x, red, eps=eps, placement=placement, center=center, mean=mean, rstd=rstd)
        ws, q = _weight_shift(w)
        y = sc.xhat() if ws is None else np.ldexp(sc.xh2 * ws, -sc.J - q)
        if b is not None:
            y += b
    return y, sc


def scaled_backward(dy, x, red, w, param_red, *, eps, placement, center, training, mean=None, rstd=None,
                    mean_lo=None):
    """(dx, dweight, dbias) evaluated on scaled copies (see the module docstring).

    ``mean_lo``: the low word of a given mean (keepdims, unscaled), or None. With centering, a
    group whose mean(g) exceeds OFFSET times its spread has g - mean(g) formed from the exact
    product dy' weight' (refnorm._twoproduct), so an offset in dy is not rounded into g.
    """
    with np.errstate(all="ignore"):
        sc = _Scaled(x, red, eps=eps, placement=placement, center=center, mean=mean, rstd=rstd,
                     mean_lo=mean_lo)
        xhat = sc.xhat()
        dweight = sum_keep(dy * xhat, param_red)
        dbias = sum_keep(dy, param_red)
        t1 = _shift(group_amax(dy, red))
        ws, q = _weight_shift(w)
        d1 = np.ldexp(dy, t1)
        g = d1 if ws is None else d1 * ws
        t2 = _shift(group_amax(g, red))
        out_shift = sc.k - sc.J - (t1 + q + t2)
        n = sc.n
        if center and training:
            gm = sum_keep(g, red) / n
            g -= gm  # g is a fresh array (d1 is not used again without a weight)
            g -= sum_keep(g, red) / n  # the correction pass, as in _core
            if ws is not None:
                # Where dy's offset dwarfs g's spread, from the exact product instead (_twoproduct).
                flag = np.abs(gm) > OFFSET * np.sqrt(sum_keep(g * g, red) / n)
                if flag.any():
                    g = np.where(flag, centered_product(d1, ws, red), g)
        g = np.ldexp(g, t2)
        if not training:
            return np.ldexp(g * sc.R, out_shift), dweight, dbias
        k2 = sum_keep(g * sc.xh2, red) / n
        bracket = sc.R * g - np.ldexp(sc.b2 * k2 * sc.xh2, -sc.jb)
        return np.ldexp(bracket, out_shift), dweight, dbias
