"""Quantized-y kernels: seeded_bugs.NumpyNorm followed by a scale and a cast, and one bug each.

:class:`QuantNorm` is correct: it computes y in float32 as NumpyNorm does, takes amax in float32
(of y, or of the normalized values for scale_from="before_weight"), s = max(amax, floor) / q_max
in float32, and writes y_q = Q(y / s) with one rounding from float32 to the format (ml_dtypes'
float8 casts round to nearest even; int8 by numpy.rint, half to even, clipped to +-127). Each
subclass changes exactly one step; :data:`QUANT_BUGS` names the output the bug corrupts.

The scenario is invented: the same team porting normalization kernels to a device of their own
adds fused 8-bit outputs for the layers that feed their 8-bit matrix units.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from conformance import Kernel
from conformance.quantization import Quantization
from refnorm import quantize as rq

from conformance import dtypes as fmt
from seeded_bugs import NumpyNorm

F32 = np.float32


class QuantNorm(NumpyNorm):
    """A correct quantized kernel (module docstring) of one op, storage format and Quantization."""

    def __init__(self, op: str, q: Quantization, storage: str = "float32", params: str | None = None):
        super().__init__(op, storage, params or ("float32" if storage not in ("float32", "float64") else storage))
        self.q = q
        self.fmt = rq.qformat(q.format)
        self._y32: np.ndarray | None = None

    def _out(self, a, kind):
        if kind == "storage":  # keep y in float32 for the quantization (a fused kernel never stores y)
            self._y32 = np.asarray(a, dtype=F32)
        return super()._out(a, kind)

    def _y(self, x, weight, bias, eps, kw) -> tuple[np.ndarray, tuple]:
        outs = super().forward(x, weight, bias, eps=eps, **kw)
        return self._y32, outs

    # ---- the steps a bug may replace -------------------------------------------------
    def _amax(self, v: np.ndarray) -> np.ndarray:
        a = np.abs(v)
        return np.max(a).astype(F32) if self.q.scale == "tensor" else np.max(a, axis=-1).astype(F32)

    def _scale_source(self, y32, x, eps, kw) -> np.ndarray:
        if self.q.scale_from == "before_weight":
            return self._y(x, None, None, eps, kw)[0]
        return y32

    def _round(self, t: np.ndarray) -> np.ndarray:
        """Q(t) from float32, one rounding, with the declared overflow."""
        f = self.fmt
        if f.integer:
            return np.rint(np.clip(t, -f.q_max, f.q_max)).astype(np.int8)
        if self.q.overflow == "saturate":
            t = np.where(np.isnan(t), t, np.clip(t, F32(-f.q_max), F32(f.q_max)))
        return t.astype(f.dtype)

    def _scales(self, y32, x, eps, kw, y_scale):
        if self.q.scale == "static":
            return np.asarray(y_scale).astype(F32), None
        amax = self._amax(self._scale_source(y32, x, eps, kw))
        s = (np.maximum(amax, F32(self.q.amax_floor)) / F32(self.fmt.q_max)).astype(F32)
        s = s.astype(fmt.dtype_of(self.q.scale_format)).astype(F32)
        return s, s  # y_q is divided by the scale it returns, rounded to its format

    # ---- entry point ---------------------------------------------------------------
    def forward(self, x, weight=None, bias=None, *, eps, y_scale=None, **kw):
        y32, outs = self._y(x, weight, bias, eps, kw)
        s, ret = self._scales(y32, x, eps, kw, y_scale)
        sb = s[..., None] if self.q.scale == "row" else s
        with np.errstate(all="ignore"):
            yq = self._round((y32 / sb).astype(F32))
        head = (yq,) if ret is None else (yq, np.asarray(ret).astype(fmt.dtype_of(self.q.scale_format)))
        return head + tuple(outs[1:])  # y_q[, scale], then the statistics as NumpyNorm returns them

    def kernel(self, name: str, notes: str = "", precision: dict | None = None,
               conventions: dict | None = None) -> Kernel:
        k = super().kernel(name, notes, precision, conventions)
        from dataclasses import replace

        q_out = ("y_q", "scale") if self.q.dynamic else ("y_q",)
        return replace(k, outputs=q_out + tuple(k.outputs[1:]), quantization=self.q,
                       forward_eval=None, backward_eval=None,
                       notes=notes or f"NumPy port with a quantized y ({self.q.format}, scale={self.q.scale})")


class TruncatingQuant(QuantNorm):
    """Q rounds toward zero (truncation), not to nearest: about half the elements one level low in
    magnitude. Corrupts y_q (the scale is right)."""

    def _round(self, t):
        q = super()._round(t)
        if self.fmt.integer:
            return np.trunc(np.clip(t, -self.fmt.q_max, self.fmt.q_max)).astype(np.int8)
        qf = q.astype(np.float64)
        up = np.isfinite(qf) & (np.abs(qf) > np.abs(t.astype(np.float64))) & (qf != 0)
        bits = q.view(np.uint8).copy()
        bits[up] -= 1  # one level toward zero in sign-magnitude order
        return bits.view(self.fmt.dtype)


class PreWeightScale(QuantNorm):
    """The amax is taken of the normalized values before the weight and bias, where after is declared.
    Corrupts scale (y_q is consistent with the kernel's own scale)."""

    def _scale_source(self, y32, x, eps, kw):
        return self._y(x, None, None, eps, kw)[0]


class SaturatesWhereNaN(QuantNorm):
    """Out-of-range values saturate to +-q_max where nonsaturating (NaN in float8_e4m3fn) is declared.
    Corrupts y_q where a static scale makes values overflow."""

    def _round(self, t):
        f = self.fmt
        return np.where(np.isnan(t), t, np.clip(t, F32(-f.q_max), F32(f.q_max))).astype(f.dtype)


class TensorScaleForRows(QuantNorm):
    """One scale for the whole tensor, repeated per row, where per-row scales are declared.
    Corrupts scale (y_q is consistent with the kernel's own scale)."""

    def _amax(self, v):
        a = np.abs(v)
        return np.full(v.shape[:-1], np.max(a), dtype=F32)


@dataclass(frozen=True)
class QuantBug:
    name: str
    cls: type
    q: Quantization
    fails: str                  # the output the bug corrupts
    clean: str                  # the output it leaves alone
    where: Any = None           # the case scale kinds it is confined to (None: every quantized case)


QUANT_BUGS = (
    # IEEE 754-2019 §4.3.1: conversion rounds to nearest, ties to even; truncation is roundTowardZero (§4.3.2).
    QuantBug("truncation", TruncatingQuant, Quantization("float8_e4m3fn", scale="row"), "y_q", "scale"),
    QuantBug("truncation_int8", TruncatingQuant, Quantization("int8", scale="tensor"), "y_q", "scale"),
    # Common practice: the amax of the quantized tensor itself (after the weight) sets the scale.
    QuantBug("pre_weight_scale", PreWeightScale, Quantization("float8_e5m2", scale="tensor"), "scale", "y_q"),
    # OCP 8-bit FP v1.0 (from memory): E4M3's non-saturating conversion of an out-of-range value is NaN.
    QuantBug("saturates_where_nan", SaturatesWhereNaN,
             Quantization("float8_e4m3fn", scale="static", overflow="nonsaturating"), "y_q", "scale",
             where=("static_overflow",)),
    # Common practice (per-token scaling): one amax per row.
    QuantBug("tensor_scale_for_rows", TensorScaleForRows, Quantization("float8_e4m3fn", scale="row"), "scale",
             "y_q"),
)
