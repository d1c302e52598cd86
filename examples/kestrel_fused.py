"""Demo scenario (invented), part two: the Kestrel NPU team fuses the residual add, RMS norm and the
float8 cast of a transformer block.

The kernel reads x (the attention output) and the residual stream in bfloat16, adds them in float32,
stores the new residual stream h in bfloat16, normalizes, scales by the weight and writes y straight
into float8_e4m3fn for the next matrix multiply, with one scale per token (row): s = amax(y) / 448,
y_q = saturate(round(y / s)). The backward takes dy and the gradient along the residual stream, dh.

Draft 1 keeps the float32 sum in registers and normalizes that, while the h it stores (and the
declaration) is the bfloat16 one: y is then not the normalization of the h passed on. Draft 2
normalizes the stored h and passes.
"""

from __future__ import annotations

import numpy as np
import ml_dtypes

from conformance import Conventions, Kernel, Precision, Quantization

F32 = np.float32
BF16 = np.dtype(ml_dtypes.bfloat16)
FP8 = np.dtype(ml_dtypes.float8_e4m3fn)
FP8_MAX = F32(448.0)


def _rows(a: np.ndarray, ns) -> np.ndarray:
    k = int(np.prod(ns))
    return np.asarray(a).reshape(-1, k)


def _fused_forward(x, residual, weight, eps, normalized_shape, keep_fp32_sum: bool):
    ns = tuple(normalized_shape)
    h32 = _rows(x, ns).astype(F32) + _rows(residual, ns).astype(F32)
    h = h32.astype(BF16)                                   # the residual stream, stored in bfloat16
    src = h32 if keep_fp32_sum else h.astype(F32)          # draft 1's bug: the unrounded sum
    ms = np.sum(src * src, axis=1, keepdims=True, dtype=F32) / F32(src.shape[1])
    rstd = F32(1.0) / np.sqrt(ms + F32(eps))
    y = src * rstd
    if weight is not None:
        y = y * np.asarray(weight).astype(F32).reshape(1, -1)
    shape = np.shape(x)
    y = y.reshape(shape)
    amax = np.max(np.abs(y), axis=-1, keepdims=True)        # one scale per token (the last axis)
    scale = np.maximum(amax, F32(1e-12)) / FP8_MAX
    y_q = np.clip(y / scale, -FP8_MAX, FP8_MAX).astype(FP8)
    lead = shape[: len(shape) - len(ns)]
    return y_q, scale.reshape(shape[:-1]), h.reshape(shape), rstd.reshape(lead)


def _fused_backward(dy, x, weight, *, eps, normalized_shape, h, dh, rstd=None):
    ns = tuple(normalized_shape)
    hv = _rows(h, ns).astype(F32)
    g = _rows(dy, ns).astype(F32)
    r = (F32(1.0) / np.sqrt(np.sum(hv * hv, axis=1, keepdims=True, dtype=F32) / F32(hv.shape[1]) + F32(eps))
         if rstd is None else np.asarray(rstd).astype(F32).reshape(-1, 1))
    xhat = hv * r
    w = None if weight is None else np.asarray(weight).astype(F32).reshape(1, -1)
    gw = g if w is None else g * w
    m2 = np.sum(gw * xhat, axis=1, keepdims=True, dtype=F32) / F32(hv.shape[1])
    dx = r * gw - r * xhat * m2 + _rows(dh, ns).astype(F32)
    dw = np.sum(g * xhat, axis=0, dtype=F32)
    db = np.sum(g, axis=0, dtype=F32)
    ps = np.shape(weight) if weight is not None else (hv.shape[1],)
    return dx.astype(BF16).reshape(np.shape(x)), dw.reshape(ps), db.reshape(ps)


def _kernel(name: str, keep_fp32_sum: bool) -> Kernel:
    def forward(x, residual, weight=None, bias=None, *, eps, normalized_shape, residual_bias=None):
        if bias is not None or residual_bias is not None:
            raise ValueError("this kernel has no bias and no residual bias")
        return _fused_forward(x, residual, weight, eps, normalized_shape, keep_fp32_sum)

    return Kernel(
        name=name, op="add_rms_norm", forward=forward, backward=_fused_backward,
        outputs=("y_q", "scale", "h", "rstd"), dtypes=("bfloat16",), optional_params=True,
        conventions=Conventions(saved=("rstd",), h_format="storage"),
        precision=Precision(params="float32", accumulate="float32"),
        quantization=Quantization(format="float8_e4m3fn", scale="row", overflow="saturate"),
        notes="fused residual add + RMS norm -> float8_e4m3fn per token: bfloat16 in, float32 arithmetic, "
              "h stored in bfloat16",
    )


def add_rms_norm_fp8_draft1() -> Kernel:
    """Normalizes the float32 sum while it stores the bfloat16 h (declared: h rounded before the norm)."""
    return _kernel("kestrel add_rms_norm fp8 draft 1", keep_fp32_sum=True)


def add_rms_norm_fp8_draft2() -> Kernel:
    """Normalizes the stored bfloat16 h."""
    return _kernel("kestrel add_rms_norm fp8 draft 2", keep_fp32_sum=False)
