"""Instance normalization: group normalization with one channel per group, optionally with running statistics."""

from __future__ import annotations

from typing import Any

import numpy as np

from . import _core
from ._validate import (
    MOMENTUM_CONVENTIONS,
    VAR_ESTIMATORS,
    as_float64,
    check_bool,
    check_choice,
    check_momentum,
    check_nonnegative,
    check_positive,
    check_reduction_length,
    check_same_shape,
    param,
)
from .errors import RefnormError
from .group_norm import _setup
from .results import NormBackward, NormForward
from .running import _update

__all__ = ["instance_norm_forward", "instance_norm_backward"]


def instance_norm_forward(
    x: Any,
    weight: Any = None,
    bias: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    training: bool = True,
    running_mean: Any = None,
    running_var: Any = None,
    momentum: float | None = 0.1,
    momentum_convention: str = "new",
    running_var_estimator: str = "unbiased",
    batches_seen: int | None = None,
    eps_placement: str = "inside",
) -> NormForward:
    """Instance normalization forward, in float64 (Ulyanov, Vedaldi & Lempitsky 2016, eq. 2).

    For each sample n and channel c, mean and biased var over the spatial axes;
    y = (x - mean) / sqrt(var + eps) * weight_c + bias_c. Equal to
    :func:`refnorm.group_norm_forward` with num_groups = C.

    Running statistics (torch's InstanceNorm with track_running_stats, from memory):
    in training mode each channel's running value is updated with the batch
    average over n of the per-instance mean and of the per-instance variance
    (estimator per ``running_var_estimator``); with ``training=False`` every
    instance is normalized with the running statistics.

    Returns NormForward with mean, var, rstd of shape (N, C).
    """
    xf, plan, eps = _setup(x, None, axis, eps, eps_placement)
    c = plan.c
    training = check_bool("training", training)
    check_choice("momentum_convention", momentum_convention, MOMENTUM_CONVENTIONS)
    check_choice("running_var_estimator", running_var_estimator, VAR_ESTIMATORS)
    what = f"one value per channel along axis {plan.axis} of x"
    w = param("weight", weight, (c,), what)
    b = param("bias", bias, (c,), what)
    rm = param("running_mean", running_mean, (c,), what)
    rv = param("running_var", running_var, (c,), what)
    if (rm is None) != (rv is None):
        raise RefnormError("running_mean and running_var must be given together (or neither)")
    check_nonnegative("running_var", rv, "a variance")
    mom, seen = check_momentum(momentum, batches_seen, needed=training and rm is not None)
    xv = plan.view(xf)
    pv = plan.param_view
    ss = (plan.shape[0], c)
    if not training:
        if rm is None:
            raise RefnormError(f"running_mean and running_var are None, expected arrays of shape ({c},) "
                               "in eval mode (training=False)")
        fixed = _core.fixed_stats(rm.reshape(pv), rv.reshape(pv), eps, eps_placement)
    else:
        fixed = None
    y, st = _core.fused_forward(xv, plan.red, None if w is None else w.reshape(pv),
                                None if b is None else b.reshape(pv),
                                eps=eps, placement=eps_placement, center=True, stats=fixed)
    mean = np.broadcast_to(st.mean, np.broadcast_shapes(st.mean.shape, plan.stat_view)).reshape(ss)
    var = np.broadcast_to(st.var, np.broadcast_shapes(st.var.shape, plan.stat_view)).reshape(ss)
    rstd = np.broadcast_to(st.rstd, np.broadcast_shapes(st.rstd.shape, plan.stat_view)).reshape(ss)
    new_rm, new_rv = rm, rv
    if training and rm is not None:
        check_reduction_length(st.moments.n, running_var_estimator, "instance_norm_forward")
        ddof = 1 if running_var_estimator == "unbiased" else 0
        inst_var = st.moments.var(ddof).reshape(ss)
        new_rm = _update(rm, mean.mean(axis=0), mom, momentum_convention, seen)
        new_rv = _update(rv, inst_var.mean(axis=0), mom, momentum_convention, seen)
    return NormForward(y=plan.unview(y), mean=mean.copy(), var=var.copy(), rstd=rstd.copy(),
                       running_mean=new_rm, running_var=new_rv)


def instance_norm_backward(
    dy: Any,
    x: Any,
    weight: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    training: bool = True,
    mean: Any = None,
    rstd: Any = None,
    running_mean: Any = None,
    running_var: Any = None,
    eps_placement: str = "inside",
) -> NormBackward:
    """Instance normalization backward, in float64.

    Training: the group-norm gradient with one channel per group. Eval with
    running statistics: dx = dy * weight_c * r_c. dweight, dbias of shape (C,).
    Saved ``mean``/``rstd`` have shape (N, C).
    A saved ``mean`` within one unit in the last place of the mean of x, as the
    forward's own is, stands for the exact mean (its low word is restored from x:
    passing the forward's statistics back is as accurate as recomputing them);
    any other mean, and ``rstd`` always, is used as given (docs/conventions.md).
    """
    xf, plan, eps = _setup(x, None, axis, eps, eps_placement)
    c = plan.c
    training = check_bool("training", training)
    dyf = as_float64("dy", dy)
    check_same_shape("dy", dyf, "x", xf)
    what = f"one value per channel along axis {plan.axis} of x"
    w = param("weight", weight, (c,), what)
    pv = plan.param_view
    ss = (plan.shape[0], c)
    xv = plan.view(xf)
    # Every statistic given is checked, also the ones this mode does not read.
    rm = param("running_mean", running_mean, (c,), what)
    rv = param("running_var", running_var, (c,), what)
    check_nonnegative("running_var", rv, "a variance")
    sm = param("mean", mean, ss, "one value per sample and channel")
    sr = param("rstd", rstd, ss, "one value per sample and channel")
    check_positive("rstd", sr, "an inverse standard deviation 1/sqrt(var + eps)")
    if not training:
        if rm is None or rv is None:
            raise RefnormError(f"running_mean and running_var are None, expected arrays of shape ({c},) in eval mode")
        st = _core.fixed_stats(rm.reshape(pv), rv.reshape(pv), eps, eps_placement)
    else:
        if (sm is None) != (sr is None):
            raise RefnormError("mean and rstd must be given together (the saved statistics), or neither")
        st = None if sr is None else _core.stats_for_backward(
            xv, plan.red, sm.reshape(plan.stat_view), sr.reshape(plan.stat_view),
            eps=eps, placement=eps_placement, center=True)
    dx, dw, db = _core.fused_backward(plan.view(dyf), xv, plan.red, None if w is None else w.reshape(pv),
                                      plan.param_red, eps=eps, placement=eps_placement, center=True,
                                      training=training, stats=st)
    return NormBackward(dx=plan.unview(dx), dweight=dw.reshape(c), dbias=db.reshape(c))
