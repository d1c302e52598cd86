"""Batch normalization: statistics per channel over the batch and every spatial axis."""

from __future__ import annotations

from typing import Any

import numpy as np

from . import _core
from ._validate import (
    EPS_PLACEMENTS,
    MOMENTUM_CONVENTIONS,
    VAR_ESTIMATORS,
    as_float64,
    canonical_axis,
    check_bool,
    check_choice,
    check_eps,
    check_momentum,
    check_nonempty,
    check_nonnegative,
    check_positive,
    check_rank,
    check_reduction_length,
    check_same_shape,
    param,
)
from ._views import channel_view
from .errors import RefnormError
from .results import NormBackward, NormForward
from .running import _update

__all__ = ["batch_norm_forward", "batch_norm_backward"]

_RED = (0, 2)


def batch_norm_forward(
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
    """Batch normalization forward, in float64.

    y = (x - mean_c) / sqrt(var_c + eps) * weight_c + bias_c, where for channel c
    (x's ``axis``) mean_c and the biased var_c reduce over every other axis
    (Ioffe & Szegedy 2015, Alg. 1). x has shape (N, C, *spatial) for axis=1 or
    (N, *spatial, C) for axis=-1; weight, bias, running_mean, running_var have shape (C,).

    Parameters
    ----------
    training : True normalizes with the batch statistics and, if running
        statistics are given, updates them; False normalizes with
        running_mean/running_var (both required) and leaves them unchanged.
    momentum, momentum_convention, batches_seen : see :func:`refnorm.running_update`.
        torch: momentum 0.1 on the new value; Keras: 0.99 on the old value
        (checked on this machine: torch 2.13, Keras 3.15).
    running_var_estimator : "unbiased" updates running_var with M2/(n-1)
        (torch, checked here; also what TF's fused_batch_norm returns as the
        batch variance), "biased" with M2/n (Keras BatchNormalization, checked here;
        Flax BatchNorm, from memory). The batch itself is always normalized with
        the biased variance, as in every library refnorm models.
    eps_placement : "inside" (1/sqrt(var + eps), every mainstream library) or
        "outside" (1/(sqrt(var) + eps), seen in some hand-written kernels).

    Returns
    -------
    NormForward with mean, var, rstd of shape (C,): the batch statistics in
    training mode, the running ones in eval mode.

    Raises
    ------
    RefnormError for a bad argument (shape, dtype, range) or, with
    running_var_estimator="unbiased", a channel of one element.

    NaN and Inf in x propagate by IEEE arithmetic: a NaN in a channel makes
    its mean NaN; Infs of one sign make it that Inf (sum(x)/n); either way the
    channel's variance and whole output are NaN (Inf - Inf). Finite x of any
    magnitude is normalized accurately (channels far from magnitude 1 are
    computed on copies scaled by a power of two, which is exact); a
    statistic whose value is beyond float64's range (the variance of data
    of size 1e200) rounds to inf, as IEEE 754 rounding does.
    """
    xf = as_float64("x", x)
    check_rank("x", xf, 2)
    check_nonempty("x", xf)
    ax = canonical_axis(axis, xf.ndim)
    training = check_bool("training", training)
    eps = check_eps(eps)
    check_choice("eps_placement", eps_placement, EPS_PLACEMENTS)
    check_choice("momentum_convention", momentum_convention, MOMENTUM_CONVENTIONS)
    check_choice("running_var_estimator", running_var_estimator, VAR_ESTIMATORS)
    c = xf.shape[ax]
    what = f"one value per channel along axis {ax} of x"
    w = param("weight", weight, (c,), what)
    b = param("bias", bias, (c,), what)
    rm = param("running_mean", running_mean, (c,), what)
    rv = param("running_var", running_var, (c,), what)
    if (rm is None) != (rv is None):
        raise RefnormError("running_mean and running_var must be given together (or neither)")
    check_nonnegative("running_var", rv, "a variance")
    mom, seen = check_momentum(momentum, batches_seen, needed=training and rm is not None)
    xv = channel_view(xf, ax)
    bshape = (1, c, 1)
    wv = None if w is None else w.reshape(bshape)
    bv = None if b is None else b.reshape(bshape)

    if not training:
        if rm is None:
            raise RefnormError("running_mean and running_var are None, expected arrays of shape "
                               f"({c},) in eval mode (training=False)")
        st = _core.fixed_stats(rm.reshape(bshape), rv.reshape(bshape), eps, eps_placement)
        y, _ = _core.fused_forward(xv, _RED, wv, bv, eps=eps, placement=eps_placement, center=True, stats=st)
        return NormForward(y=y.reshape(xf.shape), mean=rm.copy(), var=rv.copy(),
                           rstd=st.rstd.reshape(c), running_mean=rm.copy(), running_var=rv.copy())

    n = xv.shape[0] * xv.shape[2]
    new_rm = new_rv = None
    if rm is not None:
        check_reduction_length(n, running_var_estimator, "batch_norm_forward")
    y, st = _core.fused_forward(xv, _RED, wv, bv, eps=eps, placement=eps_placement, center=True)
    if rm is not None:
        ddof = 1 if running_var_estimator == "unbiased" else 0
        new_rm = _update(rm, st.mean.reshape(c), mom, momentum_convention, seen)
        new_rv = _update(rv, st.moments.var(ddof).reshape(c), mom, momentum_convention, seen)
    return NormForward(y=y.reshape(xf.shape), mean=st.mean.reshape(c), var=st.var.reshape(c),
                       rstd=st.rstd.reshape(c), running_mean=new_rm, running_var=new_rv)


def batch_norm_backward(
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
    """Batch normalization backward, in float64.

    Training (statistics depend on x), per channel c over its n elements:
        dx = r (g - mean(g)) - beta xhat mean((g - mean(g)) xhat),  g = dy * weight_c,
    with beta = r for eps inside the square root (Ioffe & Szegedy 2015, §3).
    Eval (running statistics are constants): dx = dy * weight_c * r.
    Both modes: dweight_c = sum(dy * xhat), dbias_c = sum(dy), shape (C,).

    Statistics: in training mode from x in float64, unless the saved
    ``mean`` and ``rstd`` (shape (C,)) are given; in eval mode running_mean and
    running_var are required. dy has the shape of x.
    A saved ``mean`` within one unit in the last place of the mean of x, as the
    forward's own is, stands for the exact mean (its low word is restored from x:
    passing the forward's statistics back is as accurate as recomputing them);
    any other mean, and ``rstd`` always, is used as given (docs/conventions.md).
    """
    xf = as_float64("x", x)
    dyf = as_float64("dy", dy)
    check_rank("x", xf, 2)
    check_nonempty("x", xf)
    check_same_shape("dy", dyf, "x", xf)
    ax = canonical_axis(axis, xf.ndim)
    training = check_bool("training", training)
    eps = check_eps(eps)
    check_choice("eps_placement", eps_placement, EPS_PLACEMENTS)
    c = xf.shape[ax]
    what = f"one value per channel along axis {ax} of x"
    w = param("weight", weight, (c,), what)
    bshape = (1, c, 1)
    xv = channel_view(xf, ax)
    dyv = channel_view(dyf, ax)
    wv = None if w is None else w.reshape(bshape)
    st = _stats_for_backward(xv, training, mean, rstd, running_mean, running_var, c, eps, eps_placement, what)
    dx, dw, db = _core.fused_backward(dyv, xv, _RED, wv, _RED, eps=eps, placement=eps_placement,
                                      center=True, training=training, stats=st)
    return NormBackward(dx=dx.reshape(xf.shape), dweight=dw.reshape(c), dbias=db.reshape(c))


def _stats_for_backward(xv, training, mean, rstd, running_mean, running_var, c, eps, placement, what):
    bshape = (1, c, 1)
    # Every statistic given is checked, also the ones this mode does not read.
    rm = param("running_mean", running_mean, (c,), what)
    rv = param("running_var", running_var, (c,), what)
    check_nonnegative("running_var", rv, "a variance")
    sm = param("mean", mean, (c,), what)
    sr = param("rstd", rstd, (c,), what)
    check_positive("rstd", sr, "an inverse standard deviation 1/sqrt(var + eps)")
    if not training:
        if rm is None or rv is None:
            raise RefnormError(f"running_mean and running_var are None, expected arrays of shape ({c},) in eval mode")
        return _core.fixed_stats(rm.reshape(bshape), rv.reshape(bshape), eps, placement)
    if (sm is None) != (sr is None):
        raise RefnormError("mean and rstd must be given together (the saved statistics), or neither")
    if sr is None:
        return None  # batch statistics of x, recomputed inside the fused backward
    return _core.stats_for_backward(
        xv, _RED, None if sm is None else sm.reshape(bshape), None if sr is None else sr.reshape(bshape),
        eps=eps, placement=placement, center=True)
