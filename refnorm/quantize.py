"""Exact quantization of a float64 tensor to an 8-bit format: levels, scales and the format's steps.

A quantized output is y_q = Q(y / s) with s the dequantization scale (y ~ y_q s) and Q the
rounding to the format's levels, to nearest with ties to even (IEEE 754-2019 §4.3.1,
roundTiesToEven). The dynamic scales map the largest magnitude onto the format's largest level:

    s = max(amax, floor) / q_max,   amax = max |y| over the tensor ("tensor") or over the last
    axis of y ("row", one scale per row: the per-token scale of row-major activations),

with q_max 448 (float8_e4m3fn), 57344 (float8_e5m2), 127 (int8, symmetric), common practice in
8-bit recipes (from memory). The floor keeps an all-zero row from a zero scale (common practice:
amax clamped from below, 1e-12 in several recipes, from memory).

The float8 levels are ml_dtypes' (their casts round to nearest even: ml_dtypes README, "float8
types"); int8 levels are the integers -127..127 (symmetric, -128 unused, common practice).
Overflow is "saturate" (+-q_max) or "nonsaturating" (NaN in float8_e4m3fn, which has no
infinity; +-Inf in float8_e5m2: OCP 8-bit floating point specification v1.0, 2023, §5, from
memory; ml_dtypes' casts do so, tests/test_quantize.py). int8 has only saturation.

Pure functions on float64 arrays; nothing here knows about kernels or cases.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from .errors import RefnormError

__all__ = ["QFormat", "QFORMATS", "qformat", "quantize", "dynamic_scale", "levels", "step_at",
           "overflow_threshold", "SCALE_MODES", "OVERFLOW_MODES"]

SCALE_MODES = ("static", "tensor", "row")
OVERFLOW_MODES = ("saturate", "nonsaturating")


@dataclass(frozen=True)
class QFormat:
    """One 8-bit output format.

    name : the dtype's name (ml_dtypes' for float8, NumPy's int8).
    q_max : the largest finite level, onto which a dynamic scale maps amax.
    mant : explicit significand bits (float8; 0 for int8).
    emin : exponent of the smallest normal value (float8; 0 for int8).
    integer : levels are the integers -q_max..q_max.
    has_inf : a non-saturating overflow gives +-Inf (else NaN).
    """

    name: str
    q_max: float
    mant: int
    emin: int
    integer: bool
    has_inf: bool

    @property
    def dtype(self) -> np.dtype:
        if self.integer:
            return np.dtype(np.int8)
        import ml_dtypes

        return np.dtype(getattr(ml_dtypes, self.name))


# OCP 8-bit floating point specification v1.0 (2023), Table 1 (from memory): E4M3 max 448 = 1.75 2^8,
# min normal 2^-6, no infinity; E5M2 max 57344 = 1.75 2^15, min normal 2^-14, with infinities.
# ml_dtypes.finfo gives the same numbers (tests/test_quantize.py checks them against it).
QFORMATS: dict[str, QFormat] = {
    "float8_e4m3fn": QFormat("float8_e4m3fn", 448.0, 3, -6, False, False),
    "float8_e5m2": QFormat("float8_e5m2", 57344.0, 2, -14, False, True),
    "int8": QFormat("int8", 127.0, 0, 0, True, False),
}


def qformat(name: str) -> QFormat:
    """The format called ``name``; a RefnormError lists the known ones."""
    if not isinstance(name, str) or name not in QFORMATS:
        raise RefnormError(f"quantized format is {name!r}, expected one of {', '.join(QFORMATS)}")
    return QFORMATS[name]


def overflow_threshold(fmt: QFormat) -> float:
    """The magnitude from which rounding to nearest leaves the format's range: q_max + step/2
    (a tie there goes to q_max in float8_e4m3fn, whose 448 = 1.110b 2^8 is even, and beyond
    it in float8_e5m2; int8 rounds 127.5 to 128, out of range)."""
    return fmt.q_max + 0.5 * step_at(np.asarray(fmt.q_max), fmt).item()


def step_at(v: Any, fmt: QFormat) -> np.ndarray:
    """The spacing of the format's levels at magnitude |v|: 1 for int8; for float8
    2^(max(e, emin) - mant) with e = floor(log2 |v|) (capped at q_max's binade), the gap between
    consecutive values of that binade (IEEE 754-2019 §3.3's model of a binary format)."""
    a = np.abs(np.asarray(v, dtype=np.float64))
    if fmt.integer:
        return np.ones_like(a)
    e_max = math.floor(math.log2(fmt.q_max))
    with np.errstate(divide="ignore", invalid="ignore"):
        e = np.floor(np.log2(np.where(a > 0, a, 1.0)))
    e = np.clip(np.where(np.isfinite(e), e, e_max), fmt.emin, e_max)
    return np.ldexp(1.0, (e - fmt.mant).astype(np.int64))


def quantize(t: Any, fmt: QFormat | str, *, overflow: str = "saturate") -> np.ndarray:
    """Q(t): the float64 value of t's correctly rounded level (ties to even), shape of t.

    overflow : "saturate" (beyond the range: +-q_max) or "nonsaturating" (NaN, or +-Inf where the
        format has infinities; refused for int8). NaN stays NaN (int8: NaN has no level; it is
        returned as NaN so that a caller sees it).
    """
    f = qformat(fmt) if isinstance(fmt, str) else fmt
    if overflow not in OVERFLOW_MODES:
        raise RefnormError(f"overflow is {overflow!r}, expected one of {', '.join(OVERFLOW_MODES)}")
    if f.integer and overflow != "saturate":
        raise RefnormError("overflow is 'nonsaturating', but int8 has no NaN or infinity: use 'saturate'")
    t = np.asarray(t, dtype=np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        if f.integer:
            return np.clip(np.rint(t), -f.q_max, f.q_max)  # numpy.rint rounds half to even
        if overflow == "saturate":
            t = np.where(np.isnan(t), t, np.clip(t, -f.q_max, f.q_max))
        return t.astype(f.dtype).astype(np.float64)


def levels(q: Any, fmt: QFormat | str) -> np.ndarray:
    """An integer per element such that adjacent levels differ by 1 (+0 and -0 both 0): the int8
    value itself, or the float8 bit pattern in sign-magnitude order (IEEE 754-2019 §3.4: the
    encodings of one sign are ordered as the values). NaN has no level: -2^62 marks it."""
    f = qformat(fmt) if isinstance(fmt, str) else fmt
    a = np.asarray(q, dtype=np.float64)
    nan = np.isnan(a)
    if f.integer:
        lv = np.where(nan, 0.0, a).astype(np.int64)
    else:
        bits = np.where(nan, 0.0, a).astype(f.dtype).view(np.uint8).astype(np.int64)
        mag = bits & 0x7F
        lv = np.where(bits & 0x80, -mag, mag)
    return np.where(nan, np.int64(-(1 << 62)), lv)


def dynamic_scale(y: Any, fmt: QFormat | str, mode: str, *, floor: float = 1e-12) -> np.ndarray:
    """The exact dequantization scale max(amax, floor) / q_max in float64: shape () for "tensor",
    y.shape[:-1] for "row" (amax over the last axis). NaN in y gives a NaN scale (max propagates
    NaN, as numpy.max and torch.amax do)."""
    f = qformat(fmt) if isinstance(fmt, str) else fmt
    y = np.asarray(y, dtype=np.float64)
    if mode == "tensor":
        amax = np.max(np.abs(y)) if y.size else np.float64(0.0)
    elif mode == "row":
        if y.ndim < 1:
            raise RefnormError("a per-row scale needs y with at least one axis")
        amax = np.max(np.abs(y), axis=-1) if y.shape[-1] else np.zeros(y.shape[:-1])
    else:
        raise RefnormError(f"scale mode is {mode!r}, expected 'tensor' or 'row' (a static scale is given)")
    return np.asarray(np.where(np.isnan(amax), amax, np.maximum(amax, floor)) / f.q_max, dtype=np.float64)
