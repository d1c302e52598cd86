"""High-precision reference path: exact statistics and 40-digit elementwise values.

Used by the tests to validate the float64 oracle; independent of its code
(it shares only the exception type). Two evaluators:

* the *mpmath path* (:func:`normalize`, :func:`batch_norm`, :func:`layer_norm`,
  :func:`group_norm`, :func:`instance_norm`, :func:`rms_norm`) for small tensors:
  exact statistics, then every elementwise value in ``dps`` (default 40)
  significant digits with mpmath, rounded once to float64;
* the *integer path* (:func:`normalize_large`) for long groups (10^6 elements
  in about a second): exact statistics and elementwise values from exact
  integer numerators, each output within a few units of roundoff of the
  exact value (bound in its docstring).

Exactness rests on one fact: every finite float64 is ``M * 2**E`` with
integers ``|M| < 2**53`` and ``E`` (IEEE 754-2019 §3.4), so with one common
exponent a group of values is a vector of Python integers, and sums and sums of
products are exact integer arithmetic.

Inputs must be finite; NaN/Inf are refused with :class:`refnorm.RefnormError`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction
from typing import Any, Sequence

import mpmath
import numpy as np

from .errors import RefnormError

__all__ = [
    "ExactNorm",
    "LargeNorm",
    "exact_sum",
    "exact_dot",
    "exact_mean",
    "exact_var",
    "exact_group_stats",
    "to_float64",
    "normalize",
    "normalize_large",
    "batch_norm",
    "layer_norm",
    "group_norm",
    "instance_norm",
    "rms_norm",
]

DPS = 40


# --------------------------------------------------------------------------
# Exact integer representation and exact reductions
# --------------------------------------------------------------------------


def _finite64(name: str, a: Any) -> np.ndarray:
    arr = np.asarray(a)
    if arr.dtype.kind != "f":
        raise RefnormError(f"{name} has dtype {arr.dtype}, expected a floating-point array")
    arr = arr.astype(np.float64, copy=False)
    if not np.all(np.isfinite(arr)):
        raise RefnormError(f"{name} contains NaN or Inf, expected finite values (the exact path is defined for finite inputs)")
    return arr


def _scaled_ints(a: np.ndarray) -> tuple[np.ndarray, int]:
    """(X, e) with a.ravel()[i] == X[i] * 2**e exactly; X an object array of Python ints.

    frexp gives a = m * 2**k with 0.5 <= |m| < 1, so m * 2**53 is an integer
    (exact in float64) and a = (m * 2**53) * 2**(k - 53). Shifting every
    mantissa to the smallest exponent gives one common scale.
    """
    flat = np.ascontiguousarray(a, dtype=np.float64).ravel()
    m, k = np.frexp(flat)
    mant = np.ldexp(m, 53).astype(np.int64)
    k = k.astype(np.int64) - 53
    nz = mant != 0
    if not nz.any():
        return np.zeros(flat.shape, dtype=object), 0
    k = np.where(nz, k, k[nz].max())  # zeros must not lower the common exponent
    e = int(k.min())
    ints = mant.astype(object)
    shift = k - e
    for s in np.unique(shift):
        if s:
            sel = shift == s
            ints[sel] = ints[sel] * (1 << int(s))
    return ints, e


def _fraction(num: int, e: int, den: int = 1) -> Fraction:
    """num * 2**e / den as a Fraction."""
    if e >= 0:
        return Fraction(num << e, den)
    return Fraction(num, den << -e)


def exact_sum(a: Any) -> Fraction:
    """The exact sum of the float64 values in ``a`` (any shape), as a Fraction.

    float(exact_sum(a)) is the correctly rounded sum, the value that math.fsum returns.

    Parameters
    ----------
    a : array_like of finite floats (upcast exactly to float64)

    Returns
    -------
    Fraction
    """
    x = _finite64("a", a)
    if x.size == 0:
        return Fraction(0)
    ints, e = _scaled_ints(x)
    return _fraction(sum(ints.tolist()), e)


def exact_dot(a: Any, b: Any) -> Fraction:
    """The exact sum of products sum_i a_i * b_i of two float64 arrays of one shape.

    Parameters
    ----------
    a, b : array_like of finite floats, same shape

    Returns
    -------
    Fraction
    """
    xa = _finite64("a", a)
    xb = _finite64("b", b)
    if xa.shape != xb.shape:
        raise RefnormError(f"b has shape {xb.shape}, expected {xa.shape} (the shape of a)")
    if xa.size == 0:
        return Fraction(0)
    ia, ea = _scaled_ints(xa)
    ib, eb = _scaled_ints(xb)
    return _fraction(sum(p * q for p, q in zip(ia.tolist(), ib.tolist())), ea + eb)


def exact_mean(a: Any) -> Fraction:
    """mean(a) = sum(a) / n, exact."""
    x = _finite64("a", a)
    if x.size == 0:
        raise RefnormError("a has no elements, expected a non-empty array")
    return exact_sum(x) / x.size


def exact_var(a: Any, ddof: int = 0) -> Fraction:
    """M2 / (n - ddof) with M2 = sum (a_i - mean)^2 = sum a_i^2 - (sum a_i)^2 / n, exact.

    ddof=0 is the biased (population) variance, ddof=1 the unbiased (Bessel) one.
    The one-pass identity is safe here because every operation is exact.

    Parameters
    ----------
    a : array_like of finite floats (flattened)
    ddof : int, 0 or 1 (any value below the element count)

    Returns
    -------
    Fraction
    """
    x = _finite64("a", a)
    n = x.size
    if n - ddof <= 0:
        raise RefnormError(f"ddof is {ddof}, expected < {n} (the number of elements)")
    ints, e = _scaled_ints(x)
    vals = ints.tolist()
    s1 = sum(vals)
    s2 = sum(v * v for v in vals)
    return _fraction(n * s2 - s1 * s1, 2 * e, n * (n - ddof))


def _to_float(v: Any) -> float:
    """float(v), correctly rounded (Fraction.__float__ divides integers with one rounding), and
    +-inf beyond float64's range as IEEE 754 round-to-nearest gives, where Fraction raises OverflowError."""
    try:
        return float(v)
    except OverflowError:
        return math.inf if v > 0 else -math.inf


def to_float64(a: Any) -> np.ndarray:
    """Round an array of Fractions (or ints, mpf) to float64, each once (+-inf beyond the range)."""
    arr = np.asarray(a, dtype=object)
    return np.array([_to_float(v) for v in arr.ravel().tolist()], dtype=np.float64).reshape(arr.shape)


# --------------------------------------------------------------------------
# Grouping: reduction axes moved last, one row per normalized group
# --------------------------------------------------------------------------


def _axes(axes: Sequence[int] | int, ndim: int) -> tuple[int, ...]:
    items = [axes] if isinstance(axes, (int, np.integer)) else list(axes)
    out = sorted({int(a) % ndim for a in items if -ndim <= int(a) < ndim})
    if len(out) != len(items) or not out:
        raise RefnormError(f"axes is {tuple(items)}, expected distinct axes in [-{ndim}, {ndim})")
    return tuple(out)


@dataclass(frozen=True)
class _Grouping:
    shape: tuple[int, ...]
    perm: tuple[int, ...]
    stat_shape: tuple[int, ...]
    n: int

    def rows(self, a: np.ndarray) -> np.ndarray:
        """(groups, n) array: row j is the j-th group's elements."""
        return np.broadcast_to(a, self.shape).transpose(self.perm).reshape(-1, self.n)

    def unrows(self, r: np.ndarray) -> np.ndarray:
        moved = tuple(self.shape[p] for p in self.perm)
        return r.reshape(moved).transpose(np.argsort(self.perm))


def _grouping(shape: tuple[int, ...], axes: tuple[int, ...]) -> _Grouping:
    rest = tuple(a for a in range(len(shape)) if a not in axes)
    return _Grouping(shape, rest + axes, tuple(shape[a] for a in rest), math.prod(shape[a] for a in axes))


def exact_group_stats(x: Any, axes: Sequence[int] | int, ddof: int = 0, center: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Exact per-group (mean, variance) over ``axes`` as object arrays of Fractions.

    Shapes are those of the remaining axes. With center=False the mean is 0 and
    the "variance" is the mean square sum(x^2)/n (RMS norm); ddof must then be 0.
    """
    xf = _finite64("x", x)
    grp = _grouping(xf.shape, _axes(axes, xf.ndim))
    rows = grp.rows(xf)
    means = np.empty(rows.shape[0], dtype=object)
    vars_ = np.empty(rows.shape[0], dtype=object)
    for j, row in enumerate(rows):
        s = _RowSums(row)
        means[j] = s.mean if center else Fraction(0)
        vars_[j] = s.m2(center) / (s.n - ddof)
    return means.reshape(grp.stat_shape), vars_.reshape(grp.stat_shape)


class _RowSums:
    """Exact integer sums of one group: x_i = X_i 2^e, S1 = sum X_i, S2 = sum X_i^2."""

    def __init__(self, row: np.ndarray):
        self.ints, self.e = _scaled_ints(row)
        self.vals = self.ints.tolist()
        self.n = len(self.vals)
        self.s1 = sum(self.vals)
        self.s2 = sum(v * v for v in self.vals)

    def sum_fraction(self) -> Fraction:
        return _fraction(self.s1, self.e)

    @property
    def mean(self) -> Fraction:
        return _fraction(self.s1, self.e, self.n)

    def m2(self, center: bool) -> Fraction:
        """sum (x - mean)^2 (center) or sum x^2 (no centering), exact."""
        if center:
            return _fraction(self.n * self.s2 - self.s1 * self.s1, 2 * self.e, self.n)
        return _fraction(self.s2, 2 * self.e)


# --------------------------------------------------------------------------
# mpmath path: any reduction axes, small tensors
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class ExactNorm:
    """Reference results, each rounded once to float64.

    y : shape of x.  mean, var, rstd : per-group statistics (shape of the
    remaining axes; for fixed statistics the given ones broadcast to that shape).
    dx : shape of x; dweight, dbias : summed over the axes along which the
    weight broadcasts (the weight's keepdims shape). None unless dy was given.
    """

    y: np.ndarray
    mean: np.ndarray
    var: np.ndarray
    rstd: np.ndarray
    dx: np.ndarray | None = None
    dweight: np.ndarray | None = None
    dbias: np.ndarray | None = None


def _broadcasts_to(shape: tuple[int, ...], target: tuple[int, ...]) -> bool:
    """Whether an array of ``shape`` (same rank) broadcasts to ``target`` without growing it."""
    return len(shape) == len(target) and all(a in (1, b) for a, b in zip(shape, target))


def _mpf(v: Any) -> mpmath.mpf:
    if isinstance(v, Fraction):
        return mpmath.mpf(v.numerator) / v.denominator
    return mpmath.mpf(v)


def normalize(
    x: Any,
    axes: Sequence[int] | int,
    weight: Any = None,
    bias: Any = None,
    *,
    eps: float,
    dy: Any = None,
    center: bool = True,
    eps_placement: str = "inside",
    fixed_mean: Any = None,
    fixed_var: Any = None,
    dps: int = DPS,
) -> ExactNorm:
    """Normalize x over ``axes`` in ``dps``-digit arithmetic from exact statistics.

    Per group of n elements, with d_i = x_i - mean (d_i = x_i without centering)
    and v the biased variance sum d_i^2 / n (the mean square without centering):

        r = 1/sqrt(v + eps) (eps_placement "inside") or 1/(sqrt(v) + eps) ("outside")
        y_i = d_i r w_i + b_i

    and, when ``dy`` is given, with g = dy * w, gbar = mean(g) (0 without
    centering), C = mean(g d):

        dx_i = r (g_i - gbar) + 2 (dr/dv) d_i C,
        dr/dv = -r^3/2 (inside), -r^2 / (2 sqrt(v)) (outside),

    the chain rule through d and v (dv/dx_i = 2 d_i / n, sum_i d_i = 0).
    With ``fixed_mean``/``fixed_var`` (shape of the remaining axes, e.g. running
    statistics) the statistics are constants: d_i = x_i - fixed_mean, v =
    fixed_var, dx_i = r g_i. dweight = sum dy * d * r and dbias = sum dy over the
    axes where ``weight`` (keepdims-broadcastable to x) has length 1.

    Parameters
    ----------
    x : array_like of finite floats
    axes : the reduction axes (one group per index of the remaining axes)
    weight, bias : None or arrays of x's rank, broadcastable to x
    eps : float >= 0
    dy : None or array of x's shape; when given, dx, dweight, dbias are computed
    center : False for RMS norm (no mean subtraction)
    eps_placement : "inside" or "outside"
    fixed_mean, fixed_var : statistics to use instead of the batch's (eval mode)
    dps : significant decimal digits of the elementwise evaluation

    Returns
    -------
    ExactNorm, every array rounded once to float64.

    Cost: a few mpmath operations per element; meant for up to ~10^4 elements.
    """
    xf = _finite64("x", x)
    ax = _axes(axes, xf.ndim)
    grp = _grouping(xf.shape, ax)
    if eps_placement not in ("inside", "outside"):
        raise RefnormError(f"eps_placement is {eps_placement!r}, expected 'inside' or 'outside'")
    eps_f = Fraction(float(eps))
    w = None if weight is None else _finite64("weight", weight)
    b = None if bias is None else _finite64("bias", bias)
    for name, p in (("weight", w), ("bias", b)):
        if p is not None and not _broadcasts_to(p.shape, xf.shape):
            raise RefnormError(f"{name} has shape {p.shape}, expected a shape of rank {xf.ndim} broadcastable to {xf.shape}")
    fixed = fixed_mean is not None or fixed_var is not None
    if fixed and (fixed_var is None or (center and fixed_mean is None)):
        raise RefnormError("fixed_mean and fixed_var must be given together (fixed_var alone without centering)")
    dyf = None if dy is None else _finite64("dy", dy)
    if dyf is not None and dyf.shape != xf.shape:
        raise RefnormError(f"dy has shape {dyf.shape}, expected {xf.shape} (the shape of x)")

    xr = grp.rows(xf)
    wr = None if w is None else grp.rows(w)
    br = None if b is None else grp.rows(b)
    dyr = None if dyf is None else grp.rows(dyf)
    if fixed:
        fm = np.broadcast_to(np.zeros(1) if fixed_mean is None else _finite64("fixed_mean", fixed_mean),
                             grp.stat_shape).ravel()
        fv = np.broadcast_to(_finite64("fixed_var", fixed_var), grp.stat_shape).ravel()

    G, n = xr.shape
    y = np.empty((G, n))
    dx = np.empty((G, n)) if dyr is not None else None
    xhat_mp = [None] * G
    means = np.empty(G)
    vars_ = np.empty(G)
    rstds = np.empty(G)
    with mpmath.workdps(dps):
        eps_mp = _mpf(eps_f)
        for j in range(G):
            if fixed:
                mean_q = Fraction(float(fm[j])) if center else Fraction(0)
                var_q = Fraction(float(fv[j]))
            else:
                sums = _RowSums(xr[j])
                mean_q = sums.mean if center else Fraction(0)
                var_q = sums.m2(center) / n
            v = _mpf(var_q)
            if eps_placement == "inside":
                r = 1 / mpmath.sqrt(v + eps_mp)
                drdv = -(r ** 3) / 2
            else:
                s = mpmath.sqrt(v)
                r = 1 / (s + eps_mp)
                drdv = -(r ** 2) / (2 * s) if s != 0 else mpmath.mpf(0)
            mu = _mpf(mean_q)
            d = [mpmath.mpf(float(t)) - mu for t in xr[j]]
            wj = [mpmath.mpf(1)] * n if wr is None else [mpmath.mpf(float(t)) for t in wr[j]]
            bj = [mpmath.mpf(0)] * n if br is None else [mpmath.mpf(float(t)) for t in br[j]]
            y[j] = [float(di * r * wi + bi) for di, wi, bi in zip(d, wj, bj)]
            xhat_mp[j] = [di * r for di in d]
            means[j] = _to_float(mean_q)
            vars_[j] = _to_float(var_q)
            rstds[j] = float(r)
            if dyr is not None:
                g = [mpmath.mpf(float(t)) * wi for t, wi in zip(dyr[j], wj)]
                if fixed:
                    dx[j] = [float(r * gi) for gi in g]
                    continue
                gbar = mpmath.fsum(g) / n if center else mpmath.mpf(0)
                c = mpmath.fdot(g, d) / n
                dx[j] = [float(r * (gi - gbar) + 2 * drdv * di * c) for gi, di in zip(g, d)]
        dweight = dbias = None
        if dyr is not None:
            wshape = (1,) * xf.ndim if w is None else w.shape
            prod = np.empty((G, n), dtype=object)
            for j in range(G):
                prod[j] = [mpmath.mpf(float(t)) * h for t, h in zip(dyr[j], xhat_mp[j])]
            prod = grp.unrows(prod)
            red = tuple(a for a in range(xf.ndim) if wshape[a] == 1)
            dweight = _mp_reduce(prod, red)
            dbias = to_float64(_fraction_reduce(dyf, red))
    return ExactNorm(
        y=grp.unrows(y), mean=means.reshape(grp.stat_shape), var=vars_.reshape(grp.stat_shape),
        rstd=rstds.reshape(grp.stat_shape), dx=None if dx is None else grp.unrows(dx),
        dweight=dweight, dbias=dbias)


def _mp_reduce(a: np.ndarray, red: tuple[int, ...]) -> np.ndarray:
    """fsum of an object array of mpf over ``red`` (keepdims), rounded once to float64."""
    if not red:
        return to_float64(a)
    grp = _grouping(a.shape, red)
    rows = np.asarray(a).transpose(grp.perm).reshape(-1, grp.n)
    out = np.array([float(mpmath.fsum(row.tolist())) for row in rows])
    keep = tuple(1 if i in red else d for i, d in enumerate(a.shape))
    return out.reshape(keep)


def _fraction_reduce(a: np.ndarray, red: tuple[int, ...]) -> np.ndarray:
    """Exact sums (Fractions) of float64 ``a`` over ``red``, keepdims."""
    if not red:
        return np.array([Fraction(float(t)) for t in a.ravel()], dtype=object).reshape(a.shape)
    grp = _grouping(a.shape, red)
    rows = grp.rows(a)
    out = np.array([exact_sum(row) for row in rows], dtype=object)
    keep = tuple(1 if i in red else d for i, d in enumerate(a.shape))
    return out.reshape(keep)


# --------------------------------------------------------------------------
# The public operations, in the oracle's parameter shapes
# --------------------------------------------------------------------------


def _channel_param(p: Any, ndim: int, axis: int) -> np.ndarray | None:
    if p is None:
        return None
    arr = np.asarray(p)
    shape = [1] * ndim
    shape[axis] = arr.size
    return arr.reshape(shape)


def _squeeze_param(res: ExactNorm, shape: tuple[int, ...]) -> ExactNorm:
    if res.dx is None:
        return res
    return ExactNorm(res.y, res.mean, res.var, res.rstd, res.dx,
                     res.dweight.reshape(shape), res.dbias.reshape(shape))


def batch_norm(
    x: Any,
    weight: Any = None,
    bias: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    dy: Any = None,
    training: bool = True,
    running_mean: Any = None,
    running_var: Any = None,
    eps_placement: str = "inside",
    dps: int = DPS,
) -> ExactNorm:
    """Batch norm: per channel (``axis``) over every other axis; eval mode uses running_mean/var.

    weight, bias, running statistics have shape (C,); statistics come back with shape (C,).
    """
    xf = _finite64("x", x)
    ax = int(axis) % xf.ndim
    red = tuple(a for a in range(xf.ndim) if a != ax)
    c = xf.shape[ax]
    fixed = {}
    if not training:
        fixed = {"fixed_mean": running_mean, "fixed_var": running_var}
    if dy is not None and weight is None:
        weight = np.ones(c)  # so that dweight/dbias come back per channel
    res = normalize(xf, red, _channel_param(weight, xf.ndim, ax), _channel_param(bias, xf.ndim, ax),
                    eps=eps, dy=dy, eps_placement=eps_placement, dps=dps, **fixed)
    return _squeeze_param(res, (c,))


def _feature_axes(ndim: int, normalized_shape: Any, axes: Any) -> tuple[int, ...]:
    if (normalized_shape is None) == (axes is None):
        raise RefnormError("give exactly one of normalized_shape and axes")
    if normalized_shape is not None:
        k = 1 if isinstance(normalized_shape, (int, np.integer)) else len(tuple(normalized_shape))
        return tuple(range(ndim - k, ndim))
    return _axes(axes, ndim)


def _feature(x, normalized_shape, weight, bias, axes, eps, dy, center, eps_placement, dps):
    xf = _finite64("x", x)
    ax = _feature_axes(xf.ndim, normalized_shape, axes)
    pshape = tuple(xf.shape[a] for a in ax)
    keep = tuple(xf.shape[a] if a in ax else 1 for a in range(xf.ndim))
    w = None if weight is None else np.asarray(weight).reshape(keep)
    b = None if bias is None else np.asarray(bias).reshape(keep)
    if dy is not None and w is None:
        w = np.ones(keep)  # so that dweight/dbias come back per element of the normalized axes
    res = normalize(xf, ax, w, b, eps=eps, dy=dy, center=center, eps_placement=eps_placement, dps=dps)
    return _squeeze_param(res, pshape)


def layer_norm(
    x: Any,
    normalized_shape: Any = None,
    weight: Any = None,
    bias: Any = None,
    *,
    axes: Any = None,
    eps: float = 1e-5,
    dy: Any = None,
    eps_placement: str = "inside",
    dps: int = DPS,
) -> ExactNorm:
    """Layer norm over the trailing ``normalized_shape`` or explicit ``axes``; weight/bias elementwise there."""
    return _feature(x, normalized_shape, weight, bias, axes, eps, dy, True, eps_placement, dps)


def rms_norm(
    x: Any,
    normalized_shape: Any = None,
    weight: Any = None,
    bias: Any = None,
    *,
    axes: Any = None,
    eps: float = 1e-6,
    dy: Any = None,
    eps_placement: str = "inside",
    dps: int = DPS,
) -> ExactNorm:
    """RMS norm: y = x / sqrt(mean(x^2) + eps) * weight (+ bias); mean is reported as 0."""
    return _feature(x, normalized_shape, weight, bias, axes, eps, dy, False, eps_placement, dps)


def group_norm(
    x: Any,
    num_groups: int,
    weight: Any = None,
    bias: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    dy: Any = None,
    eps_placement: str = "inside",
    dps: int = DPS,
) -> ExactNorm:
    """Group norm: channel c (``axis`` 1 or last) in group c // (C / num_groups); statistics (N, num_groups)."""
    xf = _finite64("x", x)
    ax = int(axis) % xf.ndim
    if ax not in (1, xf.ndim - 1):
        raise RefnormError(f"axis is {axis}, expected 1 (channels first) or -1 (channels last)")
    c = xf.shape[ax]
    if c % num_groups:
        raise RefnormError(f"num_groups is {num_groups}, expected a divisor of C={c}")
    split = xf.shape[:ax] + (num_groups, c // num_groups) + xf.shape[ax + 1:]
    xs = xf.reshape(split)
    gax = ax  # the group index axis in the split view
    red = tuple(a for a in range(1, xs.ndim) if a != gax)
    pshape = [1] * xs.ndim
    pshape[gax], pshape[gax + 1] = num_groups, c // num_groups
    w = None if weight is None else np.asarray(weight).reshape(pshape)
    b = None if bias is None else np.asarray(bias).reshape(pshape)
    if dy is not None and w is None:
        w = np.ones(pshape)
    dys = None if dy is None else _finite64("dy", dy).reshape(split)
    res = normalize(xs, red, w, b, eps=eps, dy=dys, eps_placement=eps_placement, dps=dps)
    return ExactNorm(
        y=res.y.reshape(xf.shape), mean=res.mean, var=res.var, rstd=res.rstd,
        dx=None if res.dx is None else res.dx.reshape(xf.shape),
        dweight=None if res.dweight is None else res.dweight.reshape(c),
        dbias=None if res.dbias is None else res.dbias.reshape(c))


def instance_norm(
    x: Any,
    weight: Any = None,
    bias: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    dy: Any = None,
    eps_placement: str = "inside",
    dps: int = DPS,
) -> ExactNorm:
    """Instance norm: per sample and channel over the spatial axes (group norm with C groups)."""
    xf = _finite64("x", x)
    return group_norm(xf, xf.shape[int(axis) % xf.ndim], weight, bias, axis=axis, eps=eps, dy=dy,
                      eps_placement=eps_placement, dps=dps)


# --------------------------------------------------------------------------
# Integer path: long groups (cancellation tests at 10^6 elements)
# --------------------------------------------------------------------------


@dataclass(frozen=True)
class LargeNorm:
    """Results of :func:`normalize_large` (no bias), float64.

    mean, var (biased), var_unbiased, rstd : per group (shape of the remaining axes).
    y : x_hat * weight (x_hat for no weight), shape of x. dx, dweight (= sum dy x_hat),
    dbias (= sum dy) per group: None unless dy given.
    """

    mean: np.ndarray
    var: np.ndarray
    var_unbiased: np.ndarray
    rstd: np.ndarray
    y: np.ndarray
    dx: np.ndarray | None = None
    dweight: np.ndarray | None = None
    dbias: np.ndarray | None = None


def _ratio_to_float(nums: np.ndarray, den: int, e: int) -> np.ndarray:
    """float64 of nums_i / den * 2**e: int/int true division is correctly rounded, ldexp exact."""
    q = np.array([v / den for v in nums.tolist()], dtype=np.float64)
    return np.ldexp(q, e)


def normalize_large(x: Any, axes: Sequence[int] | int, dy: Any = None, *, eps: float, center: bool = True,
                    weight: Any = None) -> LargeNorm:
    """Exact statistics and near-exact elementwise values for long groups (eps inside the root).

    Per group, with x_i = X_i 2^e and g_i = dy_i w_i = G_i 2^f (integers X_i, G_i: the product of
    two float64 values is an exact integer times a power of two; w = 1 without a weight),
    S = sum X_i, and everything below exact rationals:

        mean = S 2^e / n,  v = (n sum X_i^2 - S^2) 2^(2e) / n^2  (mean square without centering)
        d_i = (n X_i - S) 2^e / n                                  (x_i without centering)
        y_i = d_i r w_i,  r = (v + eps)^(-1/2)
        dx_i = r [ (g_i - gbar) - d_i q ],  q = mean(g d) / (v + eps)   (rational)

    (the train-mode gradient; Ioffe & Szegedy 2015, §3, rewritten with d_i).
    Evaluation error: d_i is one correctly rounded int/int quotient (relative
    error <= u = 2^-53) times an exact power of two; r is rounded once from 40
    digits (<= u); y_i = fl(d_i * r) adds one rounding: |y_i - exact| <= 3.01 u |y_i|
    (4.01 u with a weight: one more product).
    For dx the bracket is one integer numerator over one integer denominator,
    so no cancellation happens in floating point: one division (u), one
    product with r (u) and r itself (u): |dx_i - exact| <= 3.01 u |dx_i|.
    Both are below 10^-15 relative per element, so far below 10^-12
    relative to the largest magnitude of the output.

    Parameters
    ----------
    x : array_like of finite floats
    axes : the reduction axes
    dy : None or array of x's shape
    eps : float >= 0, added inside the square root
    center : False for RMS norm (mean square, no mean subtraction)
    weight : None (unit weight: g = dy) or an array of x's rank broadcastable to x (g = dy * weight)

    Returns
    -------
    LargeNorm

    Cost: Python-integer arithmetic, about 2 s for 10^6 elements with dy (more with a weight).
    """
    xf = _finite64("x", x)
    grp = _grouping(xf.shape, _axes(axes, xf.ndim))
    xr = grp.rows(xf)
    dyr = None if dy is None else grp.rows(_finite64("dy", dy))
    wr = None
    if weight is not None:
        wf = _finite64("weight", weight)
        if not _broadcasts_to(wf.shape, xf.shape):
            raise RefnormError(f"weight has shape {wf.shape}, expected a shape of rank {xf.ndim} broadcastable "
                               f"to {xf.shape}")
        wr = grp.rows(wf)
    eps_q = Fraction(float(eps))
    G, n = xr.shape
    means, vb, vu, rs = (np.empty(G) for _ in range(4))
    y = np.empty((G, n))
    dx = np.empty((G, n)) if dyr is not None else None
    dw = np.empty(G) if dyr is not None else None
    db = np.empty(G) if dyr is not None else None
    for j in range(G):
        sx = _RowSums(xr[j])
        m2 = sx.m2(center)
        means[j] = _to_float(sx.mean) if center else 0.0
        vb[j] = _to_float(m2 / n)
        vu[j] = _to_float(m2 / (n - 1)) if n > 1 else math.nan
        denom_q = m2 / n + eps_q
        with mpmath.workdps(DPS):
            r_mp = 1 / mpmath.sqrt(_mpf(denom_q))
            r = float(r_mp)
        rs[j] = r
        X = sx.ints
        # d_i = Dn_i * 2^e / n with Dn_i = n X_i - S (or X_i * n / n without centering)
        Dn = X * n - sx.s1 if center else X * n
        y[j] = _ratio_to_float(Dn, n, sx.e) * r
        if wr is not None:
            y[j] = y[j] * wr[j]
        if dyr is None:
            continue
        sd = _RowSums(dyr[j])
        if wr is None:
            Gi, f, sg1 = sd.ints, sd.e, sd.s1
        else:
            wi, we = _scaled_ints(wr[j])
            Gi, f = sd.ints * wi, sd.e + we  # g_i = dy_i w_i exactly
            sg1 = sum(Gi.tolist())
        sgx = sum(p * q for p, q in zip(Gi.tolist(), sx.vals))
        # sum g d = sum g x - (sum g)(sum x)/n  (exact), C = that / n
        gd = _fraction(n * sgx - sg1 * sx.s1, e=f + sx.e, den=n) if center else _fraction(sgx, f + sx.e)
        q = (gd / n) / denom_q
        P, Q = q.numerator, q.denominator
        An = Gi * n - sg1 if center else Gi * n          # (g_i - gbar) = An_i 2^f / n
        lo = min(f, sx.e)
        A = An * (1 << (f - lo)) if f > lo else An
        B = Dn * (1 << (sx.e - lo)) if sx.e > lo else Dn
        num = A * Q - B * P                                  # bracket = num_i 2^lo / (n Q)
        dx[j] = _ratio_to_float(num, n * Q, lo) * r
        db[j] = _to_float(sd.sum_fraction())
        if wr is not None:  # dweight needs sum dy d, not sum g d
            sdx = sum(p * q for p, q in zip(sd.vals, sx.vals))
            gd = (_fraction(n * sdx - sd.s1 * sx.s1, e=sd.e + sx.e, den=n) if center
                  else _fraction(sdx, sd.e + sx.e))
        with mpmath.workdps(DPS):
            dw[j] = float(_mpf(gd) * r_mp)                  # sum dy x_hat = r sum dy d
    return LargeNorm(
        mean=means.reshape(grp.stat_shape), var=vb.reshape(grp.stat_shape),
        var_unbiased=vu.reshape(grp.stat_shape), rstd=rs.reshape(grp.stat_shape), y=grp.unrows(y),
        dx=None if dx is None else grp.unrows(dx),
        dweight=None if dw is None else dw.reshape(grp.stat_shape),
        dbias=None if db is None else db.reshape(grp.stat_shape))
