"""Boundary checks: run once on entry to a public function, never inside the core."""

from __future__ import annotations

import math
from typing import Any, Iterable, Sequence

import numpy as np

from .errors import RefnormError

MOMENTUM_CONVENTIONS = ("new", "old")
VAR_ESTIMATORS = ("unbiased", "biased")
EPS_PLACEMENTS = ("inside", "outside")


def describe(a: Any) -> str:
    """A short description of an argument for error messages."""
    if isinstance(a, np.ndarray):
        return f"an array of shape {a.shape} and dtype {a.dtype}"
    return f"{type(a).__name__} {a!r}"


def as_float64(name: str, a: Any) -> np.ndarray:
    """Upcast a floating array to float64 exactly (every IEEE/ml_dtypes float embeds in binary64).

    Integer, boolean and complex inputs are refused: a normalization of them is
    not defined by any of the libraries refnorm models.
    """
    if a is None:
        raise RefnormError(f"{name} is None, expected a floating-point array")
    arr = np.asarray(a)
    dt = arr.dtype
    if dt.kind == "f":
        pass
    elif _is_ml_float(dt):
        pass
    else:
        raise RefnormError(
            f"{name} has dtype {dt}, expected a floating-point dtype "
            "(float16/32/64, or bfloat16/float8 from ml_dtypes); cast integer data to float first"
        )
    return arr.astype(np.float64, copy=False)


def _is_ml_float(dt: np.dtype) -> bool:
    # ml_dtypes registers its formats as NumPy user dtypes (kind 'V'); they all
    # upcast exactly to float64.
    try:
        import ml_dtypes  # noqa: F401  (optional)
    except ImportError:  # pragma: no cover - ml_dtypes is optional for the oracle
        return False
    try:
        np.finfo(dt)
    except Exception:
        return False
    return dt.kind == "V"


def check_eps(eps: Any) -> float:
    if isinstance(eps, bool) or not isinstance(eps, (int, float, np.floating, np.integer)):
        raise RefnormError(f"eps is {describe(eps)}, expected a real number >= 0")
    e = float(eps)
    if not (e >= 0.0) or math.isinf(e):
        raise RefnormError(f"eps is {e!r}, expected a finite real number >= 0")
    return e


def check_choice(name: str, value: Any, choices: Sequence[str]) -> str:
    if value not in choices:
        raise RefnormError(f"{name} is {value!r}, expected one of {', '.join(map(repr, choices))}")
    return value


def check_momentum(momentum: Any, batches_seen: Any) -> tuple[float, int | None]:
    """Return (factor source, batches_seen); momentum=None needs batches_seen >= 0."""
    if momentum is None:
        if batches_seen is None or isinstance(batches_seen, bool) or not isinstance(
            batches_seen, (int, np.integer)
        ):
            raise RefnormError(
                f"batches_seen is {describe(batches_seen)}, expected an integer >= 0 when momentum=None "
                "(a cumulative moving average needs the number of batches seen before this one)"
            )
        if batches_seen < 0:
            raise RefnormError(f"batches_seen is {batches_seen}, expected an integer >= 0")
        return float("nan"), int(batches_seen)
    if isinstance(momentum, bool) or not isinstance(momentum, (int, float, np.floating, np.integer)):
        raise RefnormError(f"momentum is {describe(momentum)}, expected a number in [0, 1] or None")
    m = float(momentum)
    if not (0.0 <= m <= 1.0):
        raise RefnormError(f"momentum is {m!r}, expected a number in [0, 1] (or None for a cumulative average)")
    return m, None


def canonical_axis(axis: Any, ndim: int, name: str = "axis") -> int:
    if isinstance(axis, bool) or not isinstance(axis, (int, np.integer)):
        raise RefnormError(f"{name} is {describe(axis)}, expected an integer in [-{ndim}, {ndim})")
    if not -ndim <= axis < ndim:
        raise RefnormError(f"{name} is {axis}, expected an integer in [-{ndim}, {ndim}) for an input of rank {ndim}")
    return int(axis) % ndim


def canonical_axes(axes: Iterable[Any], ndim: int, name: str = "axes") -> tuple[int, ...]:
    """Bounds-checked, duplicate-free, sorted tuple of non-negative axes."""
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


def check_reduction_length(n: int, estimator: str, where: str) -> None:
    if n < 2 and estimator == "unbiased":
        raise RefnormError(
            f"{where} reduces over {n} element per statistic: the unbiased variance estimate "
            "(division by n - 1) is undefined there; running_var_estimator='biased' is defined"
        )
