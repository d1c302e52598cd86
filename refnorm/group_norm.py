"""Group normalization: statistics per sample and per contiguous group of channels."""

from __future__ import annotations

from typing import Any

import numpy as np

from . import _core
from ._validate import (
    EPS_PLACEMENTS,
    as_float64,
    canonical_axis,
    check_choice,
    check_eps,
    check_nonempty,
    check_positive,
    check_rank,
    check_same_shape,
    describe,
    param,
)
from ._views import group_view, group_view_axes
from .errors import RefnormError
from .results import NormBackward, NormForward

__all__ = ["group_norm_forward", "group_norm_backward"]


class _GroupPlan:
    """Views for channels at ``axis`` of x split into ``groups`` contiguous groups."""

    def __init__(self, shape: tuple[int, ...], axis: int, groups: int):
        self.shape = shape
        self.axis = axis
        self.groups = groups
        self.c = shape[axis]
        self.red, self.param_red = group_view_axes(1 if axis == 1 else -1)
        cg = self.c // groups
        self.param_view = (1, groups, cg, 1) if axis == 1 else (1, 1, groups, cg)
        self.stat_view = (shape[0], groups, 1, 1) if axis == 1 else (shape[0], 1, groups, 1)

    def view(self, a: np.ndarray) -> np.ndarray:
        return group_view(a, self.axis, self.groups)

    def unview(self, v: np.ndarray) -> np.ndarray:
        if self.axis == 1 or self.axis == len(self.shape) - 1:
            return v.reshape(self.shape)
        moved = tuple(d for i, d in enumerate(self.shape) if i != self.axis) + (self.c,)
        return np.moveaxis(v.reshape(moved), -1, self.axis)


def _setup(x: Any, num_groups: Any, axis: int, eps: float, placement: str) -> tuple[np.ndarray, _GroupPlan, float]:
    """x in float64 and its plan, after every check; num_groups=None: one group per channel."""
    xf = as_float64("x", x)
    check_rank("x", xf, 2)
    check_nonempty("x", xf)
    ax = canonical_axis(axis, xf.ndim)
    if ax == 0:
        raise RefnormError("axis is 0, expected the channel axis (1 for channels-first, -1 for channels-last); "
                           "axis 0 is the batch")
    c = xf.shape[ax]
    if num_groups is None:
        num_groups = c
    if isinstance(num_groups, bool) or not isinstance(num_groups, (int, np.integer)) or num_groups < 1:
        raise RefnormError(f"num_groups is {describe(num_groups)}, expected a positive integer dividing C={c}")
    if c % num_groups:
        shown = int(num_groups) if num_groups < 10**30 else f"an integer of {len(str(int(num_groups)))} digits"
        raise RefnormError(
            f"num_groups is {shown}, expected a divisor of the {c} channels along axis {ax} of x"
        )
    eps = check_eps(eps)
    check_choice("eps_placement", placement, EPS_PLACEMENTS)
    return xf, _GroupPlan(xf.shape, ax, int(num_groups)), eps


def group_norm_forward(
    x: Any,
    num_groups: int,
    weight: Any = None,
    bias: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    eps_placement: str = "inside",
) -> NormForward:
    """Group normalization forward, in float64 (Wu & He 2018, eq. 1-3).

    The C channels along ``axis`` split into ``num_groups`` contiguous groups:
    channel c is in group c // (C / num_groups). For each sample and group,
    mean and biased var reduce over the group's channels and every spatial axis;
    y = (x - mean) / sqrt(var + eps) * weight_c + bias_c with per-channel weight, bias of shape (C,).
    x is (N, C, *spatial) for axis=1 (torch) or (N, *spatial, C) for axis=-1
    (Keras GroupNormalization, default eps 1e-3; torch default 1e-5: checked here).

    Returns NormForward with mean, var, rstd of shape (N, num_groups).
    """
    xf, plan, eps = _setup(x, num_groups, axis, eps, eps_placement)
    what = f"one value per channel along axis {plan.axis} of x"
    w = param("weight", weight, (plan.c,), what)
    b = param("bias", bias, (plan.c,), what)
    xv = plan.view(xf)
    y, st = _core.fused_forward(xv, plan.red, None if w is None else w.reshape(plan.param_view),
                                None if b is None else b.reshape(plan.param_view),
                                eps=eps, placement=eps_placement, center=True)
    ss = (plan.shape[0], plan.groups)
    return NormForward(y=plan.unview(y), mean=st.mean.reshape(ss), var=st.var.reshape(ss),
                       rstd=st.rstd.reshape(ss))


def group_norm_backward(
    dy: Any,
    x: Any,
    num_groups: int,
    weight: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    mean: Any = None,
    rstd: Any = None,
    eps_placement: str = "inside",
) -> NormBackward:
    """Group normalization backward, in float64.

    Per sample and group, with g = dy * weight_c:
        dx = r (g - mean(g)) - r xhat mean((g - mean(g)) xhat)
    dweight_c = sum over samples and spatial axes of dy * xhat, dbias_c = sum of dy; shape (C,).
    Statistics from x in float64 unless the saved ``mean`` and ``rstd`` (N, num_groups) are given.
    A saved ``mean`` within one unit in the last place of the mean of x, as the
    forward's own is, stands for the exact mean (its low word is restored from x:
    passing the forward's statistics back is as accurate as recomputing them);
    any other mean, and ``rstd`` always, is used as given (docs/conventions.md).
    """
    xf, plan, eps = _setup(x, num_groups, axis, eps, eps_placement)
    dyf = as_float64("dy", dy)
    check_same_shape("dy", dyf, "x", xf)
    what = f"one value per channel along axis {plan.axis} of x"
    w = param("weight", weight, (plan.c,), what)
    ss = (plan.shape[0], plan.groups)
    sm = param("mean", mean, ss, "one value per sample and group")
    sr = param("rstd", rstd, ss, "one value per sample and group")
    if (sm is None) != (sr is None):
        raise RefnormError("mean and rstd must be given together (the saved statistics), or neither")
    check_positive("rstd", sr, "an inverse standard deviation 1/sqrt(var + eps)")
    xv = plan.view(xf)
    st = None if sr is None else _core.stats_for_backward(
        xv, plan.red, sm.reshape(plan.stat_view), sr.reshape(plan.stat_view),
        eps=eps, placement=eps_placement, center=True)
    dx, dw, db = _core.fused_backward(plan.view(dyf), xv, plan.red,
                                      None if w is None else w.reshape(plan.param_view), plan.param_red,
                                      eps=eps, placement=eps_placement, center=True, training=True, stats=st)
    return NormBackward(dx=plan.unview(dx), dweight=dw.reshape(plan.c), dbias=db.reshape(plan.c))
