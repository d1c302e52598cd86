"""The float64 oracle against PyTorch's float64 CPU implementations.

Reference: torch 2.13 float64 forward (torch.nn.functional.batch_norm,
layer_norm, group_norm, instance_norm, rms_norm; torch.native_* for the saved
statistics) and torch.autograd for the gradients. Agreement within
strategies.check_agreement: 2 gamma_{n+8} times each output's error scale
(strategies.scales), from the unit roundoff and the reduction length; for
well-conditioned outputs that is below 1e-12 relative to the largest magnitude
of the output. torch has
channels-first kernels only: a channels-last case runs the oracle on
moveaxis(x, 1, -1) with axis=-1 and compares after moving back.
"""

from __future__ import annotations

import inspect
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import refnorm
from strategies import agreement_tol, assert_close, channel_cases, check_agreement, feature_cases, oracle_settings, scales

# torch refuses eps=0 for train-mode batch norm (ValueError, checked in test_torch_conventions).
positive_eps = st.sampled_from([1e-5, 1e-3, 0.1])


def _t(torch, a, grad=False):
    return torch.tensor(np.ascontiguousarray(a), dtype=torch.float64, requires_grad=grad)


def _grads(torch, y, inputs, dy):
    """Autograd vector-Jacobian product: d(sum(y * dy)) / d(inputs)."""
    return [g.detach().numpy() for g in torch.autograd.grad(y, inputs, grad_outputs=_t(torch, dy))]


def _chan(a, ndim):
    """(C,) -> (1, C, 1, ...), broadcastable against a channels-first array of rank ndim."""
    return None if a is None else np.asarray(a).reshape((1, -1) + (1,) * (ndim - 2))


def _ones(a, shape):
    return np.ones(shape) if a is None else a


def _zeros(a, shape):
    return np.zeros(shape) if a is None else a


class _Check:
    """check_agreement with the error scales of one case: statistics over n elements,
    parameter gradients summed over m (dweight also carries x_hat's error from the n-reduction)."""

    def __init__(self, sc, n, m):
        self.sc, self.n = sc, n
        self.len = {"dweight": max(n, m), "dbias": m}

    def __call__(self, key, got, ref, what):
        check_agreement(got, ref, self.len.get(key, self.n), self.sc[key], what)


# --------------------------------------------------------------------------- batch norm


@oracle_settings(30)
@given(case=channel_cases(per_stat="batch", eps=positive_eps))
def test_batch_norm_training_matches_torch(torch, case):
    """y, one running-statistic step, saved statistics and gradients of train-mode batch norm."""
    F = torch.nn.functional
    nd, c = case.x.ndim, case.x.shape[1]
    n = case.x.size // c
    rng = np.random.default_rng(c)
    rm, rv = rng.normal(0, 1, c), rng.uniform(0.5, 2, c)
    w, b = _ones(case.weight, c), _zeros(case.bias, c)
    xt, wt, bt = _t(torch, case.x, True), _t(torch, w, True), _t(torch, b, True)
    rmt, rvt = _t(torch, rm), _t(torch, rv)
    yt = F.batch_norm(xt, rmt, rvt, wt, bt, training=True, momentum=0.1, eps=case.eps)
    dx_t, dw_t, db_t = _grads(torch, yt, [xt, wt, bt], case.dy)
    _, save_mean, save_invstd = torch.native_batch_norm(
        _t(torch, case.x), _t(torch, w), _t(torch, b), None, None, True, 0.1, case.eps)

    axes = (0,) + tuple(range(2, nd))
    chk = _Check(scales(case.x, case.dy, axes, _chan(case.weight, nd), _chan(case.bias, nd), eps=case.eps), n, n)
    fw = refnorm.batch_norm_forward(case.view(case.x), case.weight, case.bias, axis=case.axis, eps=case.eps,
                                    training=True, running_mean=rm, running_var=rv, momentum=0.1)
    chk("y", case.unview(fw.y), yt.detach().numpy(), "torch batch_norm y")
    # torch: momentum weights the new value; running_var takes the unbiased batch variance.
    sc = chk.sc
    check_agreement(fw.running_mean, rmt.numpy(), n, float(np.max(0.9 * np.abs(rm) + 0.1 * sc["mean"])),
                    "torch batch_norm running_mean")
    check_agreement(fw.running_var, rvt.numpy(), n, float(np.max(0.9 * rv + 0.1 * sc["var"] * n / (n - 1))),
                    "torch batch_norm running_var")
    # torch CPU saves the batch mean and the inverse std 1/sqrt(var + eps).
    chk("mean", fw.mean, save_mean.numpy(), "torch batch_norm save_mean")
    chk("rstd", fw.rstd, save_invstd.numpy(), "torch batch_norm save_invstd")

    bw = refnorm.batch_norm_backward(case.view(case.dy), case.view(case.x), case.weight, axis=case.axis,
                                     eps=case.eps)
    chk("dx", case.unview(bw.dx), dx_t, "torch batch_norm dx")
    chk("dweight", bw.dweight, dw_t, "torch batch_norm dweight")
    chk("dbias", bw.dbias, db_t, "torch batch_norm dbias")
    # The oracle's backward from torch's saved statistics gives torch's gradient too.
    bw_saved = refnorm.batch_norm_backward(case.view(case.dy), case.view(case.x), case.weight, axis=case.axis,
                                           eps=case.eps, mean=save_mean.numpy(), rstd=save_invstd.numpy())
    chk("dx", case.unview(bw_saved.dx), dx_t, "torch batch_norm dx (saved stats)")


@oracle_settings(20)
@given(case=channel_cases(per_stat="batch", min_per_stat=1))
def test_batch_norm_eval_matches_torch(torch, case):
    """Eval mode: normalize with the running statistics, which are constants for the gradient."""
    F = torch.nn.functional
    nd, c = case.x.ndim, case.x.shape[1]
    n = case.x.size // c
    rng = np.random.default_rng(c + 7)
    spread = float(np.max(np.abs(case.x)))
    rm = rng.normal(0, 1, c) * spread
    rv = rng.uniform(0.5, 2, c) * spread**2
    w, b = _ones(case.weight, c), _zeros(case.bias, c)
    xt, wt, bt = _t(torch, case.x, True), _t(torch, w, True), _t(torch, b, True)
    yt = F.batch_norm(xt, _t(torch, rm), _t(torch, rv), wt, bt, training=False, eps=case.eps)
    dx_t, dw_t, db_t = _grads(torch, yt, [xt, wt, bt], case.dy)

    axes = (0,) + tuple(range(2, nd))
    chk = _Check(scales(case.x, case.dy, axes, _chan(case.weight, nd), _chan(case.bias, nd), eps=case.eps,
                      training=False, mean=_chan(rm, nd), var=_chan(rv, nd)), 1, n)
    fw = refnorm.batch_norm_forward(case.view(case.x), case.weight, case.bias, axis=case.axis, eps=case.eps,
                                    training=False, running_mean=rm, running_var=rv)
    chk("y", case.unview(fw.y), yt.detach().numpy(), "torch batch_norm eval y")
    bw = refnorm.batch_norm_backward(case.view(case.dy), case.view(case.x), case.weight, axis=case.axis,
                                     eps=case.eps, training=False, running_mean=rm, running_var=rv)
    chk("dx", case.unview(bw.dx), dx_t, "torch batch_norm eval dx")
    chk("dweight", bw.dweight, dw_t, "torch batch_norm eval dweight")
    chk("dbias", bw.dbias, db_t, "torch batch_norm eval dbias")


# --------------------------------------------------------------------------- layer norm


@oracle_settings(30)
@given(case=feature_cases())
def test_layer_norm_matches_torch(torch, case):
    """Layer norm over the trailing axes: y, saved mean/rstd (torch.native_layer_norm) and gradients."""
    F = torch.nn.functional
    ns = case.normalized_shape
    n = math.prod(ns)
    w, b = _ones(case.weight, ns), _zeros(case.bias, ns)
    xt, wt, bt = _t(torch, case.x, True), _t(torch, w, True), _t(torch, b, True)
    yt = F.layer_norm(xt, ns, wt, bt, eps=case.eps)
    dx_t, dw_t, db_t = _grads(torch, yt, [xt, wt, bt], case.dy)
    _, mean_t, rstd_t = torch.native_layer_norm(_t(torch, case.x), list(ns), None, None, case.eps)

    chk = _Check(scales(case.x, case.dy, case.axes, case.weight, case.bias, eps=case.eps,
                      param_axes=tuple(range(case.x.ndim - case.k))), n, case.x.size // n)
    fw = refnorm.layer_norm_forward(case.x, ns, case.weight, case.bias, eps=case.eps)
    chk("y", fw.y, yt.detach().numpy(), "torch layer_norm y")
    # torch keeps mean and rstd with unit dims for the normalized axes.
    chk("mean", fw.mean, mean_t.numpy().reshape(fw.mean.shape), "torch layer_norm mean")
    chk("rstd", fw.rstd, rstd_t.numpy().reshape(fw.rstd.shape), "torch layer_norm rstd")
    bw = refnorm.layer_norm_backward(case.dy, case.x, ns, case.weight, eps=case.eps)
    chk("dx", bw.dx, dx_t, "torch layer_norm dx")
    chk("dweight", bw.dweight, dw_t, "torch layer_norm dweight")
    chk("dbias", bw.dbias, db_t, "torch layer_norm dbias")

    # The explicit-axes form (a Keras-style axis list) on a permuted x: the batch axis moved last.
    xp = np.moveaxis(case.x, 0, -1)
    axes = tuple(range(case.x.ndim - 1 - case.k, case.x.ndim - 1))
    fwp = refnorm.layer_norm_forward(xp, weight=case.weight, bias=case.bias, axes=axes, eps=case.eps)
    chk("y", np.moveaxis(fwp.y, -1, 0), yt.detach().numpy(), "torch layer_norm y (axes form)")
    bwp = refnorm.layer_norm_backward(np.moveaxis(case.dy, 0, -1), xp, weight=case.weight, axes=axes, eps=case.eps)
    chk("dx", np.moveaxis(bwp.dx, -1, 0), dx_t, "torch layer_norm dx (axes form)")
    chk("dweight", bwp.dweight, dw_t, "torch layer_norm dweight (axes form)")


# --------------------------------------------------------------------------- group / instance norm


def _split(a, groups):
    """(N, C, *S) -> (N, G, C/G, S): group g holds channels g*C/G .. (g+1)*C/G - 1 (Wu & He 2018, §3.1)."""
    n, c = a.shape[:2]
    return a.reshape(n, groups, c // groups, -1)


@oracle_settings(30)
@given(case=channel_cases(per_stat="group", with_groups=True))
def test_group_norm_matches_torch(torch, case):
    """Group norm (contiguous channel groups): y, saved mean/rstd (N, G), gradients; both layouts."""
    F = torch.nn.functional
    N, c = case.x.shape[:2]
    spatial = case.x.size // (N * c)
    n = (c // case.groups) * spatial
    w, b = _ones(case.weight, c), _zeros(case.bias, c)
    xt, wt, bt = _t(torch, case.x, True), _t(torch, w, True), _t(torch, b, True)
    yt = F.group_norm(xt, case.groups, wt, bt, eps=case.eps)
    dx_t, dw_t, db_t = _grads(torch, yt, [xt, wt, bt], case.dy)
    _, mean_t, rstd_t = torch.native_group_norm(_t(torch, case.x), None, None, N, c, spatial, case.groups,
                                                case.eps)

    pv = (1, case.groups, c // case.groups, 1)
    chk = _Check(scales(_split(case.x, case.groups), _split(case.dy, case.groups), (2, 3),
                      None if case.weight is None else case.weight.reshape(pv),
                      None if case.bias is None else case.bias.reshape(pv), eps=case.eps, param_axes=(0, 3)),
                n, N * spatial)
    fw = refnorm.group_norm_forward(case.view(case.x), case.groups, case.weight, case.bias, axis=case.axis,
                                    eps=case.eps)
    chk("y", case.unview(fw.y), yt.detach().numpy(), "torch group_norm y")
    chk("mean", fw.mean, mean_t.numpy(), "torch group_norm mean")
    chk("rstd", fw.rstd, rstd_t.numpy(), "torch group_norm rstd")
    bw = refnorm.group_norm_backward(case.view(case.dy), case.view(case.x), case.groups, case.weight,
                                     axis=case.axis, eps=case.eps)
    chk("dx", case.unview(bw.dx), dx_t, "torch group_norm dx")
    chk("dweight", bw.dweight, dw_t, "torch group_norm dweight")
    chk("dbias", bw.dbias, db_t, "torch group_norm dbias")


@oracle_settings(25)
@given(case=channel_cases(min_rank=3, per_stat="instance"))
def test_instance_norm_matches_torch(torch, case):
    """Instance norm with input statistics (torch.nn.functional.instance_norm, use_input_stats=True)."""
    F = torch.nn.functional
    nd, (N, c) = case.x.ndim, case.x.shape[:2]
    n = case.x.size // (N * c)
    w, b = _ones(case.weight, c), _zeros(case.bias, c)
    xt, wt, bt = _t(torch, case.x, True), _t(torch, w, True), _t(torch, b, True)
    yt = F.instance_norm(xt, None, None, wt, bt, use_input_stats=True, eps=case.eps)
    dx_t, dw_t, db_t = _grads(torch, yt, [xt, wt, bt], case.dy)

    chk = _Check(scales(case.x, case.dy, tuple(range(2, nd)), _chan(case.weight, nd), _chan(case.bias, nd),
                      eps=case.eps, param_axes=(0,) + tuple(range(2, nd))), n, N * n)
    fw = refnorm.instance_norm_forward(case.view(case.x), case.weight, case.bias, axis=case.axis, eps=case.eps)
    chk("y", case.unview(fw.y), yt.detach().numpy(), "torch instance_norm y")
    bw = refnorm.instance_norm_backward(case.view(case.dy), case.view(case.x), case.weight, axis=case.axis,
                                        eps=case.eps)
    chk("dx", case.unview(bw.dx), dx_t, "torch instance_norm dx")
    chk("dweight", bw.dweight, dw_t, "torch instance_norm dweight")
    chk("dbias", bw.dbias, db_t, "torch instance_norm dbias")


# --------------------------------------------------------------------------- RMS norm


@oracle_settings(30)
@given(case=feature_cases())
def test_rms_norm_matches_torch(torch, case):
    """RMS norm over the trailing axes (torch.nn.functional.rms_norm has no bias)."""
    F = torch.nn.functional
    ns = case.normalized_shape
    n = math.prod(ns)
    w = _ones(case.weight, ns)
    xt, wt = _t(torch, case.x, True), _t(torch, w, True)
    yt = F.rms_norm(xt, ns, wt, eps=case.eps)
    dx_t, dw_t = _grads(torch, yt, [xt, wt], case.dy)

    chk = _Check(scales(case.x, case.dy, case.axes, case.weight, eps=case.eps, center=False,
                      param_axes=tuple(range(case.x.ndim - case.k))), n, case.x.size // n)
    fw = refnorm.rms_norm_forward(case.x, ns, case.weight, eps=case.eps)
    chk("y", fw.y, yt.detach().numpy(), "torch rms_norm y")
    bw = refnorm.rms_norm_backward(case.dy, case.x, ns, case.weight, eps=case.eps)
    chk("dx", bw.dx, dx_t, "torch rms_norm dx")
    chk("dweight", bw.dweight, dw_t, "torch rms_norm dweight")


# --------------------------------------------------------------------------- conventions


def test_rms_norm_eps_none_is_float64_machine_epsilon(torch):
    """torch's rms_norm with eps=None uses torch.finfo(float64).eps = 2^-52 (visible where mean(x^2) ~ 2^-52)."""
    F = torch.nn.functional
    x = np.random.default_rng(5).normal(0, 1.5e-8, (4, 16))  # mean square ~ 2e-16, comparable to 2^-52
    yt = F.rms_norm(_t(torch, x), (16,), None, eps=None).numpy()
    machine_eps = float(np.finfo(np.float64).eps)
    assert_close(refnorm.rms_norm_forward(x, 16, eps=machine_eps).y, yt, agreement_tol(16), "torch rms_norm eps=None")
    # The check can fail: without eps the result differs far beyond the tolerance.
    assert np.max(np.abs(refnorm.rms_norm_forward(x, 16, eps=0.0).y - yt)) / np.max(np.abs(yt)) > 1e-3


def test_torch_conventions(torch):
    """refnorm's defaults are torch's (nn module defaults, torch 2.13), and torch's own rules."""
    nn = torch.nn
    sig = {f: inspect.signature(getattr(refnorm, f)).parameters for f in (
        "batch_norm_forward", "layer_norm_forward", "group_norm_forward", "instance_norm_forward")}
    bn, inn = nn.BatchNorm2d(3), nn.InstanceNorm2d(3)
    assert sig["batch_norm_forward"]["eps"].default == bn.eps == 1e-5
    assert sig["batch_norm_forward"]["momentum"].default == bn.momentum == 0.1
    assert sig["batch_norm_forward"]["momentum_convention"].default == "new"
    assert sig["batch_norm_forward"]["running_var_estimator"].default == "unbiased"
    assert sig["layer_norm_forward"]["eps"].default == nn.LayerNorm(3).eps == 1e-5
    assert sig["group_norm_forward"]["eps"].default == nn.GroupNorm(1, 3).eps == 1e-5
    assert sig["instance_norm_forward"]["eps"].default == inn.eps == 1e-5
    assert sig["instance_norm_forward"]["momentum"].default == inn.momentum == 0.1
    # torch's InstanceNorm keeps no running statistics and no affine parameters unless asked.
    assert inn.track_running_stats is False and inn.affine is False
    # torch's RMSNorm eps defaults to None (then finfo(dtype).eps, see the test above).
    assert nn.RMSNorm(3).eps is None
    # torch refuses eps=0 for train-mode batch norm, where refnorm allows it.
    x = torch.randn(4, 3, dtype=torch.float64)
    with pytest.raises((ValueError, RuntimeError), match="eps"):
        nn.functional.batch_norm(x, None, None, training=True, eps=0.0)
    # torch refuses one element per statistic in training mode (batch and instance norm).
    with pytest.raises(ValueError, match="Expected more than 1 value per channel"):
        nn.functional.batch_norm(torch.randn(1, 3, dtype=torch.float64), None, None, training=True)
    with pytest.raises(ValueError, match="Expected more than 1 spatial element"):
        nn.functional.instance_norm(torch.randn(2, 3, 1, dtype=torch.float64))
    # In eval mode torch.native_batch_norm saves no statistics (empty tensors).
    _, sm, si = torch.native_batch_norm(x, None, None, torch.zeros(3, dtype=torch.float64),
                                        torch.ones(3, dtype=torch.float64), False, 0.1, 1e-5)
    assert sm.numel() == 0 and si.numel() == 0
