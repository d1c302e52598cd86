"""Boundary checks: run once on entry to a public function, never inside the core.

Every check raises :class:`refnorm.RefnormError` (and nothing else) with a
message that names the argument, what was expected and what was received.
Types are checked strictly: a bool is not an integer or a number here, a
string is not a sequence of sizes, and a Python integer too large for a
float64 is an error, not an OverflowError.
"""

from __future__ import annotations

import math
import operator
from typing import Any, Iterable, Sequence

import numpy as np

from .errors import RefnormError

MOMENTUM_CONVENTIONS = ("new", "old")
VAR_ESTIMATORS = ("unbiased", "biased")
EPS_PLACEMENTS = ("inside", "outside")

#: batches_seen is a count of batches: torch keeps it in an int64 (num_batches_tracked).
MAX_BATCHES_SEEN = 2**63 - 1
#: The binary64 format's limits that an input format must fit in to be upcast exactly
#: (IEEE 754-2019 §3.6, Table 3.5: p = 53, emax = 1023, emin = -1022).
_F64 = np.finfo(np.float64)


def describe(a: Any) -> str:
    """A short description of an argument for error messages."""
    if isinstance(a, np.ndarray):
        return f"an array of shape {a.shape} and dtype {a.dtype}"
    text = repr(a)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"{type(a).__name__} {text}"


def as_float64(name: str, a: Any) -> np.ndarray:
    """Upcast a floating array to float64 exactly.

    Accepted: IEEE binary16/32/64 and the ml_dtypes formats (bfloat16, float8,
    ...), every one of which embeds exactly in binary64. Refused: integer,
    boolean, complex and object data (no library refnorm models normalizes
    them), formats wider than binary64 (np.longdouble: the upcast would
    round), and anything NumPy cannot read as one rectangular array (a ragged
    nested list).
    """
    if a is None:
        raise RefnormError(f"{name} is None, expected a floating-point array")
    try:
        arr = np.asarray(a)
    except Exception as e:  # ragged nested lists, objects whose __array__ fails
        raise RefnormError(f"{name} is {describe(a)}, which NumPy cannot read as one rectangular array "
                           f"({type(e).__name__}: {e}); expected a floating-point array") from None
    dt = arr.dtype
    if not (dt.kind == "f" or _is_ml_float(dt)):
        hint = "; cast integer data to float first" if dt.kind in "iub" else ""
        raise RefnormError(
            f"{name} has dtype {dt}, expected a floating-point dtype "
            f"(float16/32/64, or bfloat16/float8 from ml_dtypes; real, not complex){hint}"
        )
    fi = _finfo(dt)
    if fi.nmant > _F64.nmant or fi.maxexp > _F64.maxexp or fi.minexp - fi.nmant < _F64.minexp - _F64.nmant:
        raise RefnormError(
            f"{name} has dtype {dt} ({fi.nmant + 1}-bit significand, exponents to {fi.maxexp}), wider than "
            "float64: refnorm computes in float64 and would round it; convert it yourself "
            "(x.astype(np.float64)) if that rounding is acceptable"
        )
    return arr.astype(np.float64, copy=False)


def _finfo(dt: np.dtype):
    if dt.kind == "f":
        return np.finfo(dt)
    import ml_dtypes

    return ml_dtypes.finfo(dt)


def _is_ml_float(dt: np.dtype) -> bool:
    # ml_dtypes registers its formats as NumPy user dtypes (kind 'V'); its real floating
    # formats all upcast exactly to float64. Its complex formats (bcomplex32) also answer
    # finfo, so they are told apart by name: a cast to float64 would drop the imaginary part.
    if dt.kind != "V" or "complex" in dt.name:
        return False
    try:
        import ml_dtypes
    except ImportError:  # pragma: no cover - ml_dtypes is optional for the oracle
        return False
    try:
        ml_dtypes.finfo(dt)
    except Exception:
        return False
    return True


def check_bool(name: str, value: Any) -> bool:
    """A Python bool or a NumPy bool, nothing else (the string "False" is truthy)."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    raise RefnormError(f"{name} is {describe(value)}, expected True or False")


def check_int(name: str, value: Any, lo: int, hi: int, expected: str) -> int:
    """A Python int or NumPy integer (not a bool) in [lo, hi]; ``expected`` says so in words."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise RefnormError(f"{name} is {describe(value)}, expected {expected}")
    v = int(value)
    if not lo <= v <= hi:
        shown = v if abs(v) < 10**30 else f"an integer of {len(str(abs(v)))} digits"
        raise RefnormError(f"{name} is {shown}, expected {expected}")
    return v


def check_real(name: str, value: Any, lo: float, hi: float, expected: str) -> float:
    """A finite real number (Python int/float, NumPy integer/floating; not a bool) in [lo, hi], as a float."""
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.floating, np.integer)):
        raise RefnormError(f"{name} is {describe(value)}, expected {expected}")
    try:
        v = float(value)
    except OverflowError:  # a Python int beyond float64's range
        raise RefnormError(f"{name} is an integer of {len(str(abs(int(value))))} digits, beyond float64's "
                           f"range; expected {expected}") from None
    if isinstance(value, np.floating) and value.dtype.itemsize > 8 and not np.isnan(value) and v != value:
        raise RefnormError(f"{name} is {value!r} of dtype {value.dtype}, which float64 cannot hold exactly; "
                           f"expected {expected}")
    if not (lo <= v <= hi) or math.isinf(v):
        raise RefnormError(f"{name} is {v!r}, expected {expected}")
    return v


def check_eps(eps: Any) -> float:
    return check_real("eps", eps, 0.0, math.inf, "a finite real number >= 0")


def check_choice(name: str, value: Any, choices: Sequence[str]) -> str:
    if not isinstance(value, str) or value not in choices:
        raise RefnormError(f"{name} is {value!r}, expected one of {', '.join(map(repr, choices))}")
    return value


def check_momentum(momentum: Any, batches_seen: Any, needed: bool = True) -> tuple[float, int | None]:
    """Return (momentum, None), or (nan, batches_seen) for momentum=None (a cumulative average).

    Both are type-checked whenever given; ``needed`` (running statistics are updated) makes
    batches_seen required with momentum=None.
    """
    seen_expected = ("an integer >= 0 (at most 2**63 - 1) when momentum=None: the number of batches "
                     "seen before this one")
    seen = None if batches_seen is None else check_int("batches_seen", batches_seen, 0, MAX_BATCHES_SEEN,
                                                       seen_expected)
    if momentum is None:
        if seen is None and needed:
            raise RefnormError(
                f"batches_seen is {describe(batches_seen)}, expected an integer >= 0 when momentum=None "
                "(a cumulative moving average needs the number of batches seen before this one)"
            )
        return float("nan"), seen
    m = check_real("momentum", momentum, 0.0, 1.0,
                   "a number in [0, 1] (or None for a cumulative average)")
    return m, None


def canonical_axis(axis: Any, ndim: int, name: str = "axis") -> int:
    if isinstance(axis, (bool, np.bool_)) or not isinstance(axis, (int, np.integer)):
        raise RefnormError(f"{name} is {describe(axis)}, expected an integer in [-{ndim}, {ndim})")
    if not -ndim <= axis < ndim:
        shown = int(axis) if abs(int(axis)) < 10**30 else f"an integer of {len(str(abs(int(axis))))} digits"
        raise RefnormError(f"{name} is {shown}, expected an integer in [-{ndim}, {ndim}) for an input of rank {ndim}")
    return int(axis) % ndim


def canonical_axes(axes: Iterable[Any], ndim: int, name: str = "axes") -> tuple[int, ...]:
    """Bounds-checked, duplicate-free, sorted tuple of non-negative axes (an int is one axis)."""
    if isinstance(axes, (str, bytes)):
        raise RefnormError(f"{name} is {describe(axes)}, expected an integer or a sequence of integers")
    if isinstance(axes, (int, np.integer)) and not isinstance(axes, (bool, np.bool_)):
        items = [axes]
    else:
        try:
            items = list(axes)
        except TypeError:
            items = [axes]
    out = [canonical_axis(a, ndim, name) for a in items]
    if len(set(out)) != len(out):
        raise RefnormError(f"{name} is {tuple(items)}, expected distinct axes")
    if not out:
        raise RefnormError(f"{name} is empty, expected at least one axis to normalize over")
    return tuple(sorted(out))


def check_sizes(name: str, value: Any) -> tuple[int, ...]:
    """A size or a sequence of sizes (ints >= 0, not bools or strings), as a tuple."""
    if isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_)):
        items = [value]
    elif isinstance(value, (str, bytes)) or not isinstance(value, (Sequence, np.ndarray)):
        raise RefnormError(f"{name} is {describe(value)}, expected an integer or a sequence of integers")
    else:
        items = list(value)
    out = []
    for d in items:
        if isinstance(d, (bool, np.bool_)) or not isinstance(d, (int, np.integer)) or d < 0:
            raise RefnormError(f"{name} is {describe(value)}, expected integers >= 0 (received {describe(d)} in it)")
        out.append(operator.index(d))
    return tuple(out)


def check_rank(name: str, x: np.ndarray, minimum: int) -> None:
    if x.ndim < minimum:
        raise RefnormError(f"{name} has rank {x.ndim} (shape {x.shape}), expected rank >= {minimum}")


def check_nonempty(name: str, x: np.ndarray) -> None:
    if x.size == 0:
        raise RefnormError(f"{name} has shape {x.shape} with no elements, expected a non-empty array")


def check_same_shape(name: str, a: np.ndarray, ref_name: str, ref: np.ndarray) -> None:
    if a.shape != ref.shape:
        raise RefnormError(f"{name} has shape {a.shape}, expected {ref.shape} (the shape of {ref_name})")


def param(name: str, a: Any, shape: tuple[int, ...], what: str) -> np.ndarray | None:
    """A per-channel (or per-feature) parameter or statistic: None or float64 of exactly `shape`."""
    if a is None:
        return None
    arr = as_float64(name, a)
    if arr.shape != shape:
        raise RefnormError(f"{name} has shape {arr.shape}, expected {shape}: {what}")
    return arr


def check_nonnegative(name: str, a: np.ndarray | None, what: str) -> None:
    """No element < 0 (NaN is let through: it propagates by IEEE arithmetic)."""
    if a is not None and np.any(a < 0):
        i = int(np.flatnonzero(a < 0)[0])
        raise RefnormError(f"{name} has {float(a.ravel()[i])!r} at flat index {i}, expected values >= 0: {what}")


def check_positive(name: str, a: np.ndarray | None, what: str) -> None:
    """No element <= 0 (NaN is let through: it propagates by IEEE arithmetic)."""
    if a is not None and np.any(a <= 0):
        i = int(np.flatnonzero(a <= 0)[0])
        raise RefnormError(f"{name} has {float(a.ravel()[i])!r} at flat index {i}, expected values > 0: {what}")


def check_reduction_length(n: int, estimator: str, where: str) -> None:
    if n < 2 and estimator == "unbiased":
        raise RefnormError(
            f"{where} reduces over {n} element per statistic: the unbiased variance estimate "
            "(division by n - 1) is undefined there; running_var_estimator='biased' is defined"
        )
