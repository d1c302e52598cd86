"""RMS normalization: scale by the root mean square over the feature axes, no centering."""

from __future__ import annotations

import math
from typing import Any

from . import _core
from ._features import check_param, check_stat, feature_plan
from ._validate import (
    EPS_PLACEMENTS,
    as_float64,
    check_choice,
    check_eps,
    check_nonempty,
    check_positive,
    check_real,
    check_same_shape,
)
from .results import NormBackward, NormForward

__all__ = ["rms_norm_forward", "rms_norm_backward"]


def _offset(w, weight_offset: Any):
    """weight_offset + w (exact in float64 for the offsets 0 and 1 and any weight of a narrower format)."""
    c = check_real("weight_offset", weight_offset, -math.inf, math.inf, "a finite number (0: scale by weight; "
                   "1: scale by 1 + weight)")
    return w if (w is None or c == 0.0) else c + w


def rms_norm_forward(
    x: Any,
    normalized_shape: Any = None,
    weight: Any = None,
    bias: Any = None,
    *,
    axes: Any = None,
    eps: float = 1e-6,
    eps_placement: str = "inside",
    weight_offset: float = 0.0,
) -> NormForward:
    """RMS normalization forward, in float64 (Zhang & Sennrich 2019, eq. 4).

    y = x / sqrt(mean(x^2) + eps) * weight (+ bias, rarely used), the mean square
    over the normalized axes (trailing ``normalized_shape`` or explicit ``axes``).
    eps: 1e-6 is common practice (T5, LLaMA: from memory); torch's RMSNorm with
    eps=None uses finfo(dtype).eps (from memory).
    weight_offset: the scale is weight_offset + weight, for a weight stored centred at zero:
    0 in torch's RMSNorm and Keras' RMSNormalization (checked here: torch 2.13, Keras 3.15),
    1 in Gemma's RMS norm, y = x r (1 + weight) (from memory). Without a weight, no scale.

    Returns NormForward with mean=None, var = mean(x^2), rstd = 1/sqrt(var + eps).
    """
    xf = as_float64("x", x)
    check_nonempty("x", xf)
    eps = check_eps(eps)
    check_choice("eps_placement", eps_placement, EPS_PLACEMENTS)
    plan = feature_plan(xf.shape, normalized_shape, axes)
    w = check_param("weight", None if weight is None else as_float64("weight", weight), plan)
    b = check_param("bias", None if bias is None else as_float64("bias", bias), plan)
    w = _offset(w, weight_offset)
    xv = xf.reshape(plan.view)
    y, st = _core.fused_forward(xv, plan.red, w, b, eps=eps, placement=eps_placement, center=False)
    ss = plan.stat_shape
    return NormForward(y=y.reshape(xf.shape), mean=None, var=st.var.reshape(ss), rstd=st.rstd.reshape(ss))


def rms_norm_backward(
    dy: Any,
    x: Any,
    normalized_shape: Any = None,
    weight: Any = None,
    *,
    axes: Any = None,
    eps: float = 1e-6,
    rstd: Any = None,
    eps_placement: str = "inside",
    weight_offset: float = 0.0,
) -> NormBackward:
    """RMS normalization backward, in float64.

    Per row, with xhat = x r and g = dy * weight:  dx = r g - r xhat mean(g xhat);
    dweight = sum over rows of dy * xhat, dbias = sum over rows of dy.
    weight_offset: g = dy * (weight_offset + weight); dweight is unchanged (d(c + w)/dw = 1).
    """
    xf = as_float64("x", x)
    dyf = as_float64("dy", dy)
    check_nonempty("x", xf)
    check_same_shape("dy", dyf, "x", xf)
    eps = check_eps(eps)
    check_choice("eps_placement", eps_placement, EPS_PLACEMENTS)
    plan = feature_plan(xf.shape, normalized_shape, axes)
    w = check_param("weight", None if weight is None else as_float64("weight", weight), plan)
    w = _offset(w, weight_offset)
    sr = check_stat("rstd", None if rstd is None else as_float64("rstd", rstd), plan)
    check_positive("rstd", sr, "an inverse standard deviation 1/sqrt(var + eps)")
    xv = xf.reshape(plan.view)
    st = None if sr is None else _core.stats_for_backward(xv, plan.red, None, sr, eps=eps, placement=eps_placement,
                                                          center=False)
    dx, dw, db = _core.fused_backward(dyf.reshape(plan.view), xv, plan.red, w, plan.param_red,
                                      eps=eps, placement=eps_placement, center=False, training=True, stats=st)
    return NormBackward(dx=dx.reshape(xf.shape), dweight=dw.reshape(plan.param_shape),
                        dbias=db.reshape(plan.param_shape))
