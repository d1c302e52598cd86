"""Whether a passed comparison is evidence: informative bounds and declaration-free invariants.

Informative bound. A pass says something only where the bound is smaller than what the output is
made of. An output's bound is *not informative* when it overflowed anywhere (a non-finite element
where the oracle's value is finite), or when its largest element is at or above the output's
reference scale S:

    y, rstd, var, var_unbiased, std, running_mean, running_var   S = max |expected|
    mean     S = max(max |expected|, max over groups of mean |x|)
    dx       S = max(max |expected|, max over elements of r |dy w|)   (r = 1/sqrt(v + eps) per group)
    dweight  S = max(max |expected|, max over parameters of sum |dy| max(1, |xhat|))
    dbias    S = max(max |expected|, max over parameters of sum |dy|)

An output that is exactly 0 with everything it is made of (S = 0: a zero weight's y and dx) is
informative while its bound is at most 16 times the smallest normal number of its format (float32's
at least, where a kernel computes a float64 output in float32): only underflow-level values pass.

The sums' scale is that of their terms, so that a sum that cancels to a small value under a bound
far below its terms stays evidence, while a bound that admits any value the terms could add up to
(a worst-case summation model with n u >= 1, every format bfloat16) is reported. Such an output is
``inconclusive``; on a degenerate group (value kinds "constant" and "zeros": every normalized value
is 0 in exact arithmetic, so y = b, dweight = 0 and the outputs have no scale of their own; also a
group of one element) it is
judged on its NaN/Inf classes only ("class only"), which is what those cases are for
(docs/tolerances.md, "Evidence").

Invariants (training mode, y; independent of the declaration). With the kernel's own mean m' of a
group of n values x and any variance estimate v' at least a quarter of the mean squared deviation
about m', |x_i - m'| / sqrt(v' + eps) <= 2 sqrt(n) (Cauchy-Schwarz on the deviations about m':
max_i (x_i - m')^2 <= n mean((x - m')^2), Samuelson 1968 for the centred case; the factor 2 is the
quarter), so |y - b| <= 2 |w| sqrt(n) up to y's own rounding; RMS norm alike with the mean square.
On a constant group every deviation about m' is the same, so |xhat| < 1 and |y - b| <= 2 |w|.
In eval mode, a kernel of the centred form (Conventions.y_form) gives y = b rounded to y's format
exactly where x equals the running mean (x - mean is an exact 0, Sterbenz 1974).
"""

from __future__ import annotations

import math
from typing import Any, Mapping

import numpy as np

from . import dtypes, ops

__all__ = ["reference_scales", "uninformative", "zero_variance", "invariant_violations", "DEGENERATE_VALUES"]

#: Value kinds whose groups have zero variance: outputs there are judged on their classes when the
#: bound is not informative.
DEGENERATE_VALUES = ("constant", "zeros")
#: Outputs whose reference scale is the sum of their terms' magnitudes, not only their own.
_SUMS = ("mean", "dx", "dweight", "dbias")


def _finite_max(a: np.ndarray) -> float:
    """max |a| over the finite elements (0 when there are none)."""
    a = np.asarray(a, dtype=np.float64)
    if a.size:
        m = max(float(a.max()), -float(a.min()))  # two reductions, no |a| array
        if math.isfinite(m):  # no NaN and no infinity: every element counted
            return m
    a = np.abs(a)
    f = a[np.isfinite(a)]
    return float(f.max()) if f.size else 0.0


def reference_scales(case: Any, inputs64: Mapping[str, Any], names) -> dict[str, float]:
    """The terms' scale S of each sum-like output in ``names`` (module docstring), from the inputs."""
    names = [n for n in names if n in _SUMS]
    if not names:
        return {}
    spec = ops.get(case.op)
    view = spec.axes.view(case)
    x = np.asarray(inputs64["x"], dtype=np.float64).reshape(view.view_shape)
    xf = x if np.isfinite(x).all() else np.where(np.isfinite(x), x, 0.0)
    out: dict[str, float] = {}
    with np.errstate(all="ignore"):
        if "mean" in names:
            out["mean"] = _finite_max(np.mean(np.abs(xf), axis=view.red))
        if not any(n in names for n in ("dx", "dweight", "dbias")) or inputs64.get("dy") is None:
            return out
        dy = np.asarray(inputs64["dy"], dtype=np.float64).reshape(view.view_shape)
        dy = dy if np.isfinite(dy).all() else np.where(np.isfinite(dy), dy, 0.0)
        w = inputs64.get("weight")
        w = np.ones(view.param_kd) if w is None else np.asarray(w, dtype=np.float64).reshape(view.param_kd)
        if spec.centered:
            mu = np.mean(xf, axis=view.red, keepdims=True)
            d = xf - mu
            v = np.mean(d * d, axis=view.red, keepdims=True)
        else:
            d = xf
            v = np.mean(xf * xf, axis=view.red, keepdims=True)
        r = 1.0 / np.sqrt(v + float(case.eps))
        if "dx" in names:
            out["dx"] = _finite_max(r * dy * w)
            if inputs64.get("dh") is not None:  # a fused residual add: dx = dh + the norm's gradient
                out["dx"] = max(out["dx"], _finite_max(inputs64["dh"]))
        if "dweight" in names:
            out["dweight"] = _finite_max(np.sum(np.abs(dy) * np.maximum(1.0, np.abs(d * r)), axis=view.param_red))
        if "dbias" in names:
            out["dbias"] = _finite_max(np.sum(np.abs(dy), axis=view.param_red))
    return out


def zero_variance(case: Any) -> bool:
    """Every group of the case has zero variance: a degenerate value kind, or one element per group."""
    return case.values in DEGENERATE_VALUES or ops.get(case.op).axes.group_length(case) == 1


def uninformative(expected: np.ndarray, bound: np.ndarray, scale: float = 0.0,
                  nonfinite: int = 0, tiny: float = 0.0) -> str:
    """Why a bound is not informative ("" when it is): ``bound`` elementwise over ``expected``;
    ``scale`` the terms' scale of a sum-like output (0 for the others); ``nonfinite`` the bound's
    overflowed elements (Bound.terms["nonfinite_bound_elements"]); ``tiny`` the underflow level
    below which a bound on an exact 0 is informative."""
    if nonfinite:
        return f"the bound overflowed float64 on {nonfinite} element(s): any value passes there"
    e = np.asarray(expected, dtype=np.float64)
    fin = np.isfinite(e)
    if not fin.any():
        return ""
    b = np.broadcast_to(np.asarray(bound, dtype=np.float64), e.shape)
    if not fin.all():
        b = b[fin]
    bmax = float(b.max()) if b.size else 0.0
    if bmax == 0.0:
        return ""
    e_max = _finite_max(e)
    s = max(e_max, float(scale))
    if s == 0.0:
        if bmax <= 16.0 * tiny:
            return ""
        return (f"the output and its terms are exactly 0 but the bound allows {bmax:.3g}: any value that small "
                "passes, so a pass is not evidence")
    if bmax >= s:
        of = "the largest |expected|" if s == e_max else "the largest magnitude of its terms"
        return (f"largest bound {bmax:.3g} >= {of} {s:.3g}: a value of the output's own size, or 0, passes, "
                "so a pass is not evidence")
    return ""


def invariant_violations(case: Any, conventions: Any, inputs64: Mapping[str, Any], y: Any,
                         y_dtype: str, u: float | None = None) -> str:
    """A description of the elements of the kernel's ``y`` that break an invariant ("" when none).

    ``u`` is the largest unit roundoff among the formats the kernel computes in (its declared
    storage, parameter, statistics and accumulation formats; y's format when not given): the
    invariants' form does not depend on the declaration, only the slack for rounding b and y does.
    """
    spec = ops.get(case.op)
    view = spec.axes.view(case)
    try:
        ya = np.asarray(y).astype(np.float64).reshape(view.view_shape)
    except (TypeError, ValueError):
        return ""  # shape and format are the comparison's to report
    u = max(dtypes.unit_roundoff(y_dtype), float(u or 0.0))
    sub = float(dtypes.finfo(y_dtype).smallest_subnormal)  # y's rounding where it is subnormal is absolute
    w = inputs64.get("weight")
    b = inputs64.get("bias")
    w = np.ones(view.param_kd) if w is None else np.asarray(w, dtype=np.float64).reshape(view.param_kd)
    b = np.zeros(view.param_kd) if b is None else np.asarray(b, dtype=np.float64).reshape(view.param_kd)
    x = np.asarray(inputs64["x"], dtype=np.float64).reshape(view.view_shape)
    with np.errstate(all="ignore"):
        if case.mode == "train":
            finite_group = np.all(np.isfinite(x), axis=view.red, keepdims=True)
            first = x[tuple(slice(0, 1) if i in view.red else slice(None) for i in range(x.ndim))]
            const = np.all(x == first, axis=view.red, keepdims=True)
            reach = np.where(const, 1.0, np.sqrt(float(view.n)))
            limit = 2.0 * np.abs(w) * reach * (1.0 + 4.0 * u) + 4.0 * u * np.abs(b) + sub
            dev = np.abs(ya - b)
            bad = finite_group & np.isfinite(ya) & np.isfinite(w) & np.isfinite(b) & (dev > limit)
            k = int(np.count_nonzero(bad))
            if not k:
                return ""
            i = np.unravel_index(int(np.argmax(np.where(bad, dev - limit, -np.inf))), bad.shape)
            lim = np.broadcast_to(limit, bad.shape)[i]
            return (f"invariant broken on {k} element(s): |y - b| <= 2 |w| sqrt(n) (|w| on a constant group), "
                    f"n = {view.n}, which every normalization satisfies whatever its precision; worst "
                    f"|y - b| = {float(dev[i]):.6g} against {float(lim):.6g}")
        if case.mode != "eval" or getattr(conventions, "y_form", "centred") != "centred":
            return ""
        rm = inputs64.get("running_mean")
        rv = inputs64.get("running_var")
        if rm is None or rv is None:
            return ""
        rm = np.asarray(rm, dtype=np.float64).reshape(view.param_kd)
        rv = np.asarray(rv, dtype=np.float64).reshape(view.param_kd)
        want = np.broadcast_to(b, x.shape)
        at = (x == rm) & np.isfinite(x) & np.isfinite(w) & np.isfinite(rv) & (rv + float(case.eps) > 0)
        bad = at & np.isfinite(ya) & (np.abs(ya - want) > 2.0 * u * np.abs(want) + sub)
        k = int(np.count_nonzero(bad))
        if not k:
            return ""
        i = np.unravel_index(int(np.argmax(bad)), bad.shape)
        return (f"invariant broken on {k} of {int(np.count_nonzero(at))} element(s) where x equals the running "
                f"mean: the centred form gives y = b there, up to b's rounding (x - mean is an exact 0); e.g. y = "
                f"{float(ya[i]):.9g}, b = {float(want[i]):.9g}. A kernel that computes x * scale + shift declares "
                "y_form='folded'")
