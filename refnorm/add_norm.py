"""Fused residual add + normalization: h = x + residual (+ residual_bias), y = norm(h) weight + bias.

A transformer block's kernel adds the residual branch to the residual stream and normalizes
the sum in one pass; it returns y for the next layer and h, the new residual stream. In the
backward, the gradient arriving along the stream (dh) adds to the normalization's:
dx = dresidual = dh + dnorm(h)/dh^T dy.

Whether h is rounded to its storage format before it is normalized (the usual choice, because
h is stored anyway) or normalized as the kernel's accumulation format holds it is the
``h_format`` argument: the format name h is rounded to first, or None to normalize the exact
sum. The sum itself is exact here: x + residual as a pair of float64 numbers (Knuth's TwoSum,
Knuth 1998 TAOCP vol. 2 §4.2.2, Theorem B), the residual bias added as a double-double
(Dekker 1971, add2), and the pair rounded once to ``h_format`` (ties to even, IEEE 754-2019 §4.3.1).
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Any

import numpy as np

from ._features import feature_plan
from ._validate import as_float64, check_nonempty, check_same_shape, describe
from .errors import RefnormError
from .layer_norm import layer_norm_backward, layer_norm_forward
from .rms_norm import rms_norm_backward, rms_norm_forward

__all__ = ["AddNormForward", "AddNormBackward", "residual_stream", "add_layer_norm_forward",
           "add_layer_norm_backward", "add_rms_norm_forward", "add_rms_norm_backward"]


@dataclass(frozen=True)
class AddNormForward:
    """Forward result of a fused residual add + norm, all float64.

    y : shape of x.  h : the exact residual stream x + residual (+ residual_bias) (what a kernel
    stores, before its rounding to the storage format).  h_normalized : what was normalized (h,
    or h rounded to ``h_format``).  mean (None for RMS norm), var, rstd : the statistics of
    h_normalized, of the leading (batch) shape.
    """

    y: np.ndarray
    h: np.ndarray
    h_normalized: np.ndarray
    mean: np.ndarray | None
    var: np.ndarray
    rstd: np.ndarray

    def as_dict(self) -> dict[str, np.ndarray]:
        return {f.name: getattr(self, f.name) for f in fields(self) if getattr(self, f.name) is not None}


@dataclass(frozen=True)
class AddNormBackward:
    """Backward result, all float64.

    dx : dh + the normalization's gradient; equal to dresidual (h is linear in both).
    dresidual : dx.  dresidual_bias : the sum of dx over the batch axes (weight's shape).
    dweight, dbias : as for the normalization alone, at h.
    """

    dx: np.ndarray
    dresidual: np.ndarray
    dresidual_bias: np.ndarray
    dweight: np.ndarray
    dbias: np.ndarray

    def as_dict(self) -> dict[str, np.ndarray]:
        return {f.name: getattr(self, f.name) for f in fields(self)}


def _two_sum(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """s + e == a + b exactly, s = fl(a + b) (Knuth's TwoSum; no branch on magnitudes)."""
    s = a + b
    bb = s - a
    e = (a - (s - bb)) + (b - bb)
    return s, e


#: The formats h may be rounded to (IEEE binary16/32/64; bfloat16 and the OCP float8 formats of ml_dtypes).
H_FORMATS = ("float16", "float32", "float64", "bfloat16", "float8_e4m3fn", "float8_e5m2")


def _format_dtype(fmt: Any) -> np.dtype:
    if not isinstance(fmt, str) or fmt not in H_FORMATS:
        raise RefnormError(f"h_format is {describe(fmt)}, expected None (normalize the exact sum) or one of "
                           f"{', '.join(H_FORMATS)}")
    if fmt in ("float16", "float32", "float64"):
        return np.dtype(fmt)
    import ml_dtypes

    return np.dtype(getattr(ml_dtypes, fmt))


def _round_pair(hi: np.ndarray, lo: np.ndarray, fmt: str) -> np.ndarray:
    """hi + lo (|lo| <= half an ulp of hi) rounded once to ``fmt``, ties to even.

    Rounding hi alone is right unless hi is exactly halfway between two numbers of the format
    and lo breaks the tie: then the neighbour on lo's side is the correctly rounded result.
    """
    dt = _format_dtype(fmt)
    if dt == np.float64:
        return hi.copy()
    with np.errstate(over="ignore", invalid="ignore"):
        q = hi.astype(dt).astype(np.float64)
        other = 2.0 * hi - q  # the other neighbour when hi is a midpoint (exact: both are near hi)
        tie = (q != hi) & np.isfinite(hi) & (other.astype(dt).astype(np.float64) == other) & (lo != 0)
    if tie.any():
        up = lo > 0
        q = np.where(tie, np.where(up, np.maximum(q, other), np.minimum(q, other)), q)
    return q


def residual_stream(x: Any, residual: Any, residual_bias: Any = None, *,
                    h_format: str | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(h, h rounded to ``h_format``) with h = x + residual (+ residual_bias) exact.

    x, residual : the same shape. residual_bias : of x's trailing shape, broadcast over the leading
    axes. h is returned as the float64 nearest the exact sum (exact for two terms); the rounded h is
    the exact sum rounded once (h_format None: h itself).
    """
    return _stream(x, residual, residual_bias, h_format, None)


def _stream(x: Any, residual: Any, residual_bias: Any, h_format: str | None,
            param_shape: tuple[int, ...] | None) -> tuple[np.ndarray, np.ndarray]:
    """residual_stream, with residual_bias required to have ``param_shape`` (the normalized shape)."""
    if h_format is not None:
        _format_dtype(h_format)
    xf = as_float64("x", x)
    rf = as_float64("residual", residual)
    check_same_shape("residual", rf, "x", xf)
    hi, lo = _two_sum(xf, rf)
    if residual_bias is not None:
        bf = as_float64("residual_bias", residual_bias)
        if param_shape is not None and bf.shape != tuple(param_shape):
            raise RefnormError(f"residual_bias has shape {bf.shape}, expected {tuple(param_shape)} "
                               "(the normalized shape, as weight)")
        if bf.ndim == 0 or bf.ndim > xf.ndim or xf.shape[xf.ndim - bf.ndim:] != bf.shape:
            raise RefnormError(f"residual_bias has shape {bf.shape}, expected the trailing shape of x "
                               f"{xf.shape[xf.ndim - bf.ndim:] if bf.ndim <= xf.ndim else xf.shape}")
        s, e = _two_sum(hi, np.broadcast_to(bf, xf.shape))
        with np.errstate(invalid="ignore"):
            e = e + lo
            hi = s + e  # Fast2Sum (|s| >= |e|): the double-double's normalization
            lo = e - (hi - s)
    with np.errstate(invalid="ignore"):
        lo = np.where(np.isfinite(hi), lo, 0.0)
    h = hi
    hn = h if h_format is None else _round_pair(hi, lo, h_format)
    return h, hn


def _forward(norm, x, residual, normalized_shape, weight, bias, residual_bias, axes, eps, eps_placement,
             h_format, extra) -> AddNormForward:
    xf = as_float64("x", x)
    check_nonempty("x", xf)
    plan = feature_plan(xf.shape, normalized_shape, axes)
    if residual_bias is not None and axes is not None:
        raise RefnormError("residual_bias is defined with normalized_shape (trailing axes), not with axes")
    h, hn = _stream(xf, residual, residual_bias, h_format, plan.param_shape)
    f = norm(hn, normalized_shape, weight, bias, axes=axes, eps=eps, eps_placement=eps_placement, **extra)
    return AddNormForward(y=f.y, h=h, h_normalized=hn, mean=f.mean, var=f.var, rstd=f.rstd)


def _backward(norm, dy, x, residual, normalized_shape, weight, dh, residual_bias, axes, eps, eps_placement,
              h_format, extra) -> AddNormBackward:
    xf = as_float64("x", x)
    check_nonempty("x", xf)
    plan = feature_plan(xf.shape, normalized_shape, axes)
    _, hn = _stream(xf, residual, residual_bias, h_format, plan.param_shape)
    g = norm(dy, hn, normalized_shape, weight, axes=axes, eps=eps, eps_placement=eps_placement, **extra)
    dx = g.dx
    if dh is not None:
        dhf = as_float64("dh", dh)
        check_same_shape("dh", dhf, "x", xf)
        dx = dx + dhf
    db = np.sum(dx.reshape(plan.view), axis=plan.param_red).reshape(plan.param_shape)
    return AddNormBackward(dx=dx, dresidual=dx, dresidual_bias=db, dweight=g.dweight, dbias=g.dbias)


def add_layer_norm_forward(x: Any, residual: Any, normalized_shape: Any = None, weight: Any = None,
                           bias: Any = None, *, residual_bias: Any = None, axes: Any = None, eps: float = 1e-5,
                           eps_placement: str = "inside", h_format: str | None = None) -> AddNormForward:
    """Residual add + layer norm forward: h = x + residual (+ residual_bias); y = layer_norm(h).

    h_format : the format h is rounded to before it is normalized (the storage format, as most
        fused kernels do because they store h: common practice), or None (normalize the exact sum).
    """
    return _forward(layer_norm_forward, x, residual, normalized_shape, weight, bias, residual_bias, axes, eps,
                    eps_placement, h_format, {})


def add_layer_norm_backward(dy: Any, x: Any, residual: Any, normalized_shape: Any = None, weight: Any = None, *,
                            dh: Any = None, residual_bias: Any = None, axes: Any = None, eps: float = 1e-5,
                            eps_placement: str = "inside", h_format: str | None = None) -> AddNormBackward:
    """Residual add + layer norm backward: dx = dresidual = dh + layer_norm_backward(dy, h).dx, at the h
    the forward normalized (statistics recomputed from it in float64)."""
    return _backward(layer_norm_backward, dy, x, residual, normalized_shape, weight, dh, residual_bias, axes, eps,
                     eps_placement, h_format, {})


def add_rms_norm_forward(x: Any, residual: Any, normalized_shape: Any = None, weight: Any = None,
                         bias: Any = None, *, residual_bias: Any = None, axes: Any = None, eps: float = 1e-6,
                         eps_placement: str = "inside", weight_offset: float = 0.0,
                         h_format: str | None = None) -> AddNormForward:
    """Residual add + RMS norm forward: h = x + residual (+ residual_bias); y = rms_norm(h).

    weight_offset : y = h r (weight_offset + weight) (+ bias), see rms_norm_forward.
    h_format : as add_layer_norm_forward.
    """
    return _forward(rms_norm_forward, x, residual, normalized_shape, weight, bias, residual_bias, axes, eps,
                    eps_placement, h_format, {"weight_offset": weight_offset})


def add_rms_norm_backward(dy: Any, x: Any, residual: Any, normalized_shape: Any = None, weight: Any = None, *,
                          dh: Any = None, residual_bias: Any = None, axes: Any = None, eps: float = 1e-6,
                          eps_placement: str = "inside", weight_offset: float = 0.0,
                          h_format: str | None = None) -> AddNormBackward:
    """Residual add + RMS norm backward: dx = dresidual = dh + rms_norm_backward(dy, h).dx."""
    return _backward(rms_norm_backward, dy, x, residual, normalized_shape, weight, dh, residual_bias, axes, eps,
                     eps_placement, h_format, {"weight_offset": weight_offset})
