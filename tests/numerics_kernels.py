"""Kernels of known rounding for the rounding-bias and effective-precision tests.

- ``SequentialParamSums``: the correct NumPy kernel (seeded_bugs.NumpyNorm: float32 arithmetic) whose
  dweight and dbias are recursive sums rounded to a given format after every addition (the addition
  itself in float32: one rounding of a sum of two values of that format, as torch CPU's layer norm does
  in bfloat16 and float16: docs/library-precision.md). Its true precision is that format's significand.
- ``directed_oracle``: the oracle's values rounded in a fixed direction (toward zero, up or down)
  instead of to nearest: the rounding of IEEE 754-2019 §4.3.2 (roundTowardZero, roundTowardPositive,
  roundTowardNegative), on top of the correctly rounded value.
"""

from __future__ import annotations

import numpy as np

from conformance import dtypes
from seeded_bugs import F32, NumpyNorm

from described_kernels import rounded_oracle

__all__ = ["SequentialParamSums", "directed_round", "directed_oracle"]

_UINT = {1: np.uint8, 2: np.uint16, 4: np.uint32, 8: np.uint64}


class SequentialParamSums(NumpyNorm):
    """dweight, dbias = s_k = fl_acc(s_{k-1} + t_k) over the parameter's broadcast axes (Higham 2002, §4.1,
    recursive summation), every partial sum rounded to ``acc``."""

    def __init__(self, op: str, storage: str, acc: str):
        super().__init__(op, storage)
        self.acc = dtypes.dtype_of(acc)

    def _param_sum(self, t, axes, geo, which):
        t = np.moveaxis(np.asarray(t, dtype=F32), axes, tuple(range(len(axes))))
        lead = t.shape[:len(axes)]
        t = t.reshape((-1,) + t.shape[len(axes):])
        s = np.zeros(t.shape[1:], dtype=self.acc)
        for row in t:
            s = (s.astype(F32) + row).astype(self.acc)
        out = s.astype(F32)
        return np.expand_dims(out, tuple(range(len(lead)))) if lead else out


def directed_round(a: np.ndarray, fmt: str, direction: str) -> np.ndarray:
    """float64 values rounded to ``fmt`` toward zero ("toward_zero"), +inf ("up") or -inf ("down"): the
    correctly rounded value, moved one step of the format where it lies on the wrong side of a."""
    a = np.asarray(a, dtype=np.float64)
    c = dtypes.round_to(a, fmt)
    cf = c.astype(np.float64)
    with np.errstate(invalid="ignore"):
        if direction == "toward_zero":
            wrong = np.abs(cf) > np.abs(a)
            step = np.where(wrong, -1, 0)  # one step down in magnitude
        elif direction in ("up", "down"):
            wrong = cf < a if direction == "up" else cf > a
            # a step up in value is up in magnitude for positive values and down for negative ones
            toward_mag = (cf > 0) == (direction == "up")
            step = np.where(wrong, np.where(toward_mag, 1, -1), 0)
        else:
            raise ValueError(f"direction is {direction!r}, expected toward_zero, up or down")
    step = np.where(np.isfinite(cf) & (cf != 0), step, 0)
    bits = c.view(_UINT[c.dtype.itemsize])
    return (bits + step.astype(bits.dtype)).view(c.dtype) if step.any() else c


def directed_oracle(spec, dtype: str, direction: str, precision=None):
    """rounded_oracle(spec, dtype) with every output rounded ``direction`` instead of to nearest."""
    return rounded_oracle(spec, dtype, rnd=lambda a: directed_round(a, dtype, direction), precision=precision)

