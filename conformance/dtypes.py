"""Number formats by name: NumPy dtypes (ml_dtypes for bfloat16 and float8), unit roundoff, ULP distance."""

from __future__ import annotations

import functools
import math

import numpy as np

from . import blockwise

__all__ = ["FORMATS", "dtype_of", "name_of", "unit_roundoff", "round_to", "ulp_distance", "finfo", "has_infinity",
           "overflow_threshold"]

FORMATS = ("float64", "float32", "float16", "bfloat16", "float8_e4m3fn", "float8_e5m2")


def _ml():
    try:
        import ml_dtypes
    except ImportError as e:  # pragma: no cover - ml_dtypes is a harness dependency
        raise ImportError("bfloat16/float8 need the ml_dtypes package: pip install ml_dtypes") from e
    return ml_dtypes


def dtype_of(name: str) -> np.dtype:
    """The NumPy dtype of a format name (e.g. "bfloat16" -> ml_dtypes.bfloat16)."""
    if name in ("float64", "float32", "float16"):
        return np.dtype(name)
    if name in FORMATS:
        return np.dtype(getattr(_ml(), name))
    raise ValueError(f"unknown number format {name!r}, expected one of {', '.join(FORMATS)}")


def name_of(dtype) -> str:
    """The format name of a NumPy dtype."""
    dt = np.dtype(dtype)
    for n in FORMATS:
        if dtype_of(n) == dt:
            return n
    raise ValueError(f"dtype {dt} is not a floating format refnorm knows ({', '.join(FORMATS)})")


def finfo(name: str):
    """np.finfo for NumPy's formats, ml_dtypes.finfo for the others."""
    if name in ("float64", "float32", "float16"):
        return np.finfo(name)
    return _ml().finfo(dtype_of(name))


def unit_roundoff(name: str) -> float:
    """u = 2^-p for a format with p significand bits (implicit bit included), round to nearest.

    float64 2^-53, float32 2^-24 (IEEE 754-2019 binary64/binary32), float16 2^-11
    (IEEE 754-2019 binary16), bfloat16 2^-8 (8 significand bits: Google's bfloat16
    definition; Intel BF16 whitepaper 2018), float8_e4m3fn 2^-4, float8_e5m2 2^-3
    (Micikevicius et al. 2022, "FP8 formats for deep learning").
    """
    return float(finfo(name).eps) / 2.0


@functools.lru_cache(maxsize=None)
def has_infinity(name: str) -> bool:
    """Whether the format has infinities: the IEEE 754 formats, bfloat16 and float8_e5m2 do;
    float8_e4m3fn does not (its out-of-range conversions give NaN: OCP 8-bit floating point
    specification v1.0, 2023, E4M3 encodings; from memory, and ml_dtypes' casts do so)."""
    with np.errstate(all="ignore"):
        return bool(np.isinf(np.asarray(np.inf).astype(dtype_of(name))))


@functools.lru_cache(maxsize=None)
def overflow_threshold(name: str) -> tuple[float, bool]:
    """(t, inclusive): a value of magnitude above t (or equal to t when ``inclusive``) overflows when
    rounded to nearest into the format.

    t = max + ulp(max)/2, the midpoint between the largest finite value and the next power-of-two
    step (IEEE 754-2019 §4.3.1 and §7.4: round to nearest overflows at that midpoint). At t itself the
    tie goes to the even neighbour: beyond max in IEEE formats (max has an odd last significand bit),
    to max in float8_e4m3fn (448 = 1.110b 2^8 is even). The conversion itself decides ``inclusive``.
    """
    fi = finfo(name)
    big = float(fi.max)
    t = big + 2.0 ** (math.floor(math.log2(big)) - int(fi.nmant) - 1)
    with np.errstate(all="ignore"):
        inclusive = not bool(np.isfinite(np.asarray(t).astype(dtype_of(name))))
    return t, inclusive


def round_to(a: np.ndarray, name: str) -> np.ndarray:
    """Round to nearest (ties to even) into the format: NumPy's/ml_dtypes' astype."""
    return np.asarray(a).astype(dtype_of(name))


_INT = {1: np.int8, 2: np.int16, 4: np.int32, 8: np.int64}


def _ordinal(a: np.ndarray) -> np.ndarray:
    """Map floats to integers so that adjacent representable values differ by 1 (+0 and -0 both map to 0).

    Sign-magnitude bit patterns, read as two's-complement integers i, are in order for i >= 0;
    for i < 0 the order reverses, and MIN - i puts them just below zero.
    """
    size = a.dtype.itemsize
    t = _INT[size]
    i = a.view(t)
    # MIN - i for i < 0 without np.where (3x the cost): s = i >> (bits - 1) is -1 for i < 0, else 0;
    # i ^ (s & MAX) flips the 31 (63, 15, 7) magnitude bits of a negative i, giving -1 - m for i = MIN + m,
    # and subtracting s adds the 1: -m = MIN - i. In the format's own integer width: nothing overflows.
    sign = np.right_shift(i, 8 * size - 1)
    return (i ^ (sign & t(np.iinfo(t).max))) - sign


def ulp_distance(a: np.ndarray, b: np.ndarray, name: str, *, finite: bool = False) -> np.ndarray:
    """Number of representable values of format ``name`` between a and b, both first rounded to it.

    0 means equal after rounding; NaN positions give -1 (no distance is defined).
    The distance counts steps along the format's ordered values (IEEE 754-2019 §2.1's
    ULP as the gap between consecutive values), across zero too. ``finite``: the caller knows
    a and b hold no NaN (rounding cannot make one), so the NaN masks are skipped.
    """
    a, b = np.asarray(a), np.asarray(b)
    # Elementwise: block by block in cache, the same integers whatever the blocks (blockwise.py).
    return blockwise.evaluate(np.broadcast_shapes(a.shape, b.shape), ulp_distance_into, dtype=np.int64,
                              a=a, b=b, name=name, finite=finite)[0]


def ulp_distance_into(out: np.ndarray, a: np.ndarray, b: np.ndarray, name: str, *, finite: bool = False) -> None:
    """:func:`ulp_distance` of a and b written into the int64 array ``out`` (their broadcast shape)."""
    dt = dtype_of(name)
    ra = np.asarray(a).astype(dt, copy=False)
    rb = np.asarray(b).astype(dt, copy=False)
    ia = _ordinal(ra if ra.flags.c_contiguous else np.ascontiguousarray(ra))  # .view needs contiguity
    ib = _ordinal(rb if rb.flags.c_contiguous else np.ascontiguousarray(rb))
    np.subtract(ia, ib, out=out, dtype=np.int64)
    np.abs(out, out=out)
    if not finite:
        out[np.isnan(ra) | np.isnan(rb)] = -1
