"""Layer normalization: statistics per sample over the feature axes."""

from __future__ import annotations

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
    check_same_shape,
)
from .errors import RefnormError
from .results import NormBackward, NormForward

__all__ = ["layer_norm_forward", "layer_norm_backward"]


def layer_norm_forward(
    x: Any,
    normalized_shape: Any = None,
    weight: Any = None,
    bias: Any = None,
    *,
    axes: Any = None,
    eps: float = 1e-5,
    eps_placement: str = "inside",
) -> NormForward:
    """Layer normalization forward, in float64 (Ba, Kiros & Hinton 2016, eq. 4).

    y = (x - mean) / sqrt(var + eps) * weight + bias, mean and biased var over the
    normalized axes: the trailing ``normalized_shape`` of x (torch's form), or
    explicit ``axes`` (Keras LayerNormalization's ``axis``). weight and bias are
    elementwise, of the normalized axes' shape. eps: torch default 1e-5, Keras
    default 1e-3 (checked here: torch 2.13, Keras 3.15).

    Returns NormForward with mean, var, rstd of the shape of the remaining axes.
    NaN/Inf in a row make that row's variance and output NaN (IEEE arithmetic); its mean is
    NaN for a NaN and the Inf itself for Infs of one sign (sum(x)/n).
    """
    xf = as_float64("x", x)
    check_nonempty("x", xf)
    eps = check_eps(eps)
    check_choice("eps_placement", eps_placement, EPS_PLACEMENTS)
    plan = feature_plan(xf.shape, normalized_shape, axes)
    w = check_param("weight", None if weight is None else as_float64("weight", weight), plan)
    b = check_param("bias", None if bias is None else as_float64("bias", bias), plan)
    xv = xf.reshape(plan.view)
    y, st = _core.fused_forward(xv, plan.red, w, b, eps=eps, placement=eps_placement, center=True)
    ss = plan.stat_shape
    return NormForward(y=y.reshape(xf.shape), mean=st.mean.reshape(ss), var=st.var.reshape(ss),
                       rstd=st.rstd.reshape(ss))


def layer_norm_backward(
    dy: Any,
    x: Any,
    normalized_shape: Any = None,
    weight: Any = None,
    *,
    axes: Any = None,
    eps: float = 1e-5,
    mean: Any = None,
    rstd: Any = None,
    eps_placement: str = "inside",
) -> NormBackward:
    """Layer normalization backward, in float64.

    Per row over its n normalized elements, g = dy * weight:
        dx = r (g - mean(g)) - r xhat mean((g - mean(g)) xhat)
    dweight = sum over rows of dy * xhat, dbias = sum over rows of dy (weight's shape).
    Statistics from x in float64 unless the saved ``mean`` and ``rstd`` are given.
    A saved ``mean`` within one unit in the last place of the mean of x, as the
    forward's own is, stands for the exact mean (its low word is restored from x:
    passing the forward's statistics back is as accurate as recomputing them);
    any other mean, and ``rstd`` always, is used as given (docs/conventions.md).
    """
    xf = as_float64("x", x)
    dyf = as_float64("dy", dy)
    check_nonempty("x", xf)
    check_same_shape("dy", dyf, "x", xf)
    eps = check_eps(eps)
    check_choice("eps_placement", eps_placement, EPS_PLACEMENTS)
    plan = feature_plan(xf.shape, normalized_shape, axes)
    w = check_param("weight", None if weight is None else as_float64("weight", weight), plan)
    sm = check_stat("mean", None if mean is None else as_float64("mean", mean), plan)
    sr = check_stat("rstd", None if rstd is None else as_float64("rstd", rstd), plan)
    check_positive("rstd", sr, "an inverse standard deviation 1/sqrt(var + eps)")
    if (sm is None) != (sr is None):
        raise RefnormError("mean and rstd must be given together (the saved statistics), or neither")
    xv = xf.reshape(plan.view)
    st = None if sr is None else _core.stats_for_backward(xv, plan.red, sm, sr, eps=eps, placement=eps_placement,
                                                          center=True)
    dx, dw, db = _core.fused_backward(dyf.reshape(plan.view), xv, plan.red, w, plan.param_red,
                                      eps=eps, placement=eps_placement, center=True, training=True, stats=st)
    return NormBackward(dx=dx.reshape(xf.shape), dweight=dw.reshape(plan.param_shape),
                        dbias=db.reshape(plan.param_shape))
