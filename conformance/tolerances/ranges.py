"""Ranges: the data a correct kernel must handle, and results outside an output format's range.

**Must handle.** A correct kernel of accumulation format a (largest finite value M_a) forms, for
each statistic of n elements, the sums of a two-pass (or updating) reduction:

    S_1 = sum |x_i|                 the first pass (a partial sum never exceeds it)
    S_2 = sum (x_i - mu)^2          the second pass, centred ops (Welford's M2 is the same sum)
    S_2 = sum x_i^2                 RMS norm, whose statistic is that sum

and must handle the data where max(S_1, S_2) <= M_a: no intermediate of such a kernel overflows
there (Higham 2002, §2.1: the model fl(a op b) = (a op b)(1 + delta) holds while results stay in
range; IEEE 754-2019 §7.4: beyond it they overflow to +-Inf). ``range_used`` is
max(S_1, S_2) / M_a per statistic; data beyond 1 is outside what the declared precision
promises (a kernel that scales its sums may still handle it, but is not required to), and
``beyond_range`` says so, for the harness to skip the case rather than fail a correct kernel.
The catalog's data stays inside for every format's default accumulation (docs/tolerances.md,
"Ranges").

**Out of the output format's range.** A result whose exact value lies beyond an output format's
range is rounded to the overflow value of the kernel's convention (Precision.overflow):
+-Inf in formats with infinities and NaN in float8_e4m3fn, which has none ("nonsaturating":
IEEE 754-2019 §7.4; OCP 8-bit floating point specification v1.0, 2023, non-saturating
conversion: from memory), or +-the largest finite value ("saturate", the OCP specification's
saturating conversion). ``overflow_accepts`` gives the elements where that value is the right
answer (the oracle's value minus its bound still overflows) or an accepted one (the oracle's
value plus its bound may overflow).
"""

from __future__ import annotations

import numpy as np

from typing import TYPE_CHECKING

from .. import dtypes, ops
from .bound import Accept
from .grouping import Grouping, grouping

if TYPE_CHECKING:
    from ..cases.model import Case
    from ..kernel import Precision

__all__ = ["statistic_sums", "range_used", "beyond_range", "case_beyond_range", "overflow_accepts",
           "sum_overflow_accepts"]


def statistic_sums(xv: np.ndarray, grp: Grouping, center: bool) -> tuple[np.ndarray, np.ndarray]:
    """(S_1, S_2) per statistic (keepdims arrays of the view), from the float64 data; NaN for groups
    holding a non-finite value (their sums are not a matter of range)."""
    with np.errstate(invalid="ignore", over="ignore"):
        s1 = grp.gsum(np.abs(xv))
        if center:
            m0 = grp.gmean(xv)
            mu = m0 + grp.gmean(xv - m0)
            s2 = grp.gsum(np.square(xv - mu))
        else:
            s2 = grp.gsum(np.square(xv))
        fin = np.isfinite(grp.gsum(xv * 0.0))
    return np.where(fin, s1, np.nan), np.where(fin, s2, np.nan)


def range_used(xv: np.ndarray, grp: Grouping, center: bool, fmt: str) -> np.ndarray:
    """max(S_1, S_2) / M_fmt per statistic: above 1, a correct kernel accumulating in fmt may overflow."""
    s1, s2 = statistic_sums(xv, grp, center)
    big = float(dtypes.finfo(fmt).max)
    with np.errstate(invalid="ignore", over="ignore"):
        return np.fmax(s1, s2) / big


def beyond_range(xv: np.ndarray, grp: Grouping, center: bool, fmt: str) -> str | None:
    """Why the data is beyond what a correct kernel accumulating in ``fmt`` must handle, or None."""
    used = range_used(xv, grp, center, fmt)
    if not np.any(used > 1.0):
        return None
    i = int(np.nanargmax(used))
    s1, s2 = (float(np.ravel(a)[i]) for a in statistic_sums(xv, grp, center))
    what = "sum of squared deviations" if center else "sum of squares"
    return (f"beyond the range a kernel accumulating in {fmt} must handle: statistic {i} has a {what} of "
            f"{s2:.3g} and a sum of |x| of {s1:.3g}, above {fmt}'s largest finite value "
            f"{float(dtypes.finfo(fmt).max):.3g}; a correct two-pass kernel overflows there "
            "(docs/tolerances.md, Ranges)")


def case_beyond_range(case: "Case", precision: "Precision", inputs64: dict) -> str | None:
    """Why a case's data is beyond what a correct kernel of ``precision`` must handle, or None: in
    training, its statistics' sums overflow the accumulation format; in eval mode (no sums), the
    running statistics it is given are outside the accumulation format's range."""
    spec = ops.get(case.op)
    fmt = precision.resolved().accumulate
    big = float(dtypes.finfo(fmt).max)
    if spec.has_eval and case.mode != "train":
        for name in ("running_mean", "running_var"):
            a = inputs64.get(name)
            if a is not None and np.any(np.abs(np.asarray(a, dtype=np.float64)) > big):
                return (f"beyond the range a kernel computing in {fmt} must handle: {name} reaches "
                        f"{float(np.max(np.abs(a))):.3g}, above {fmt}'s largest finite value {big:.3g} "
                        "(docs/tolerances.md, Ranges)")
        return None
    grp = grouping(case)
    x = np.asarray(inputs64["x"], dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        fin = np.abs(x[np.isfinite(x)])
        a = float(fin.max()) if fin.size else 0.0
        if grp.n * a <= big and grp.n * (2.0 * a) ** 2 <= big:  # |x - mu| <= 2 max|x|: inside, one pass
            return None
    return beyond_range(grp.view(x), grp, spec.centered, fmt)


def _overflow_value(expected: np.ndarray, fmt: str, mode: str) -> tuple[np.ndarray, str]:
    big = float(dtypes.finfo(fmt).max)
    if mode == "saturate":
        return np.copysign(big, expected), f"outside {fmt}'s range: saturates to +-{big:g}"
    if dtypes.has_infinity(fmt):
        return np.copysign(np.inf, expected), f"outside {fmt}'s range: overflows to +-Inf"
    return np.full(expected.shape, np.nan), f"outside {fmt}'s range: overflows to NaN ({fmt} has no infinity)"


def overflow_accepts(expected: np.ndarray, bound: np.ndarray, fmt: str, mode: str) -> tuple[Accept, ...]:
    """The overflow value of ``mode`` where the oracle's value, within its bound, may round out of
    ``fmt``'s range (accepted) or must (required); () where no element comes near the range's end."""
    t, inclusive = dtypes.overflow_threshold(fmt)
    if not np.isfinite(t):
        return ()
    e = np.asarray(expected, dtype=np.float64)
    b = np.broadcast_to(np.asarray(bound, dtype=np.float64), e.shape)
    with np.errstate(invalid="ignore", over="ignore"):
        ae = np.abs(e)
        fin = np.isfinite(e)
        may = fin & ((ae + b >= t) if inclusive else (ae + b > t))
        if not may.any():
            return ()
        must = fin & ((ae - b >= t) if inclusive else (ae - b > t))
    value, reason = _overflow_value(e, fmt, mode)
    return (Accept(must, value, reason, must=True), Accept(may & ~must, value, reason))


def sum_overflow_accepts(sum_abs: np.ndarray, fmt: str) -> tuple[Accept, ...]:
    """Any non-finite value where a sum's absolute terms reach beyond ``fmt``, the format the kernel
    declares it accumulates that sum in: a correct kernel summing there may overflow (IEEE 754-2019
    §7.4), whatever the output format can hold."""
    t, _ = dtypes.overflow_threshold(fmt)
    with np.errstate(invalid="ignore"):
        m = np.isfinite(sum_abs) & (sum_abs >= t)
    if not np.isfinite(t) or not m.any():
        return ()
    return (Accept(m, None, f"the sum's terms reach beyond {fmt}'s range, where the kernel declares it "
                            "accumulates it: it may overflow"),)
