"""The float64 oracle against Keras 3 layers (TensorFlow backend) and TensorFlow ops.

Reference: keras 3.15 layers built with dtype="float64" (BatchNormalization in
train and inference mode with its own conventions: momentum 0.99 on the old
value, biased moving variance, eps 1e-3; LayerNormalization;
GroupNormalization; RMSNormalization) and tf.GradientTape for the gradients;
tf.compat.v1.nn.fused_batch_norm (TF 2.21) for the batch variance it returns.
Agreement within strategies.check_agreement (unit roundoff, reduction length
and each output's error scale; below 1e-12 relative for well-conditioned
outputs). Keras takes the channel axis as an argument, so both layouts run
natively.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import refnorm
from strategies import assert_close, channel_cases, check_agreement, feature_cases, oracle_settings, scales

positive_eps = st.sampled_from([1e-3, 1e-5, 0.1])


def _chan(a, ndim):
    return None if a is None else np.asarray(a).reshape((1, -1) + (1,) * (ndim - 2))


def _run_layer(tfk, layer, x, dy, training=None):
    """Call ``layer`` on x under a tape: y and d(sum(y * dy)) for x and the layer's trainable weights."""
    tf = tfk.tf
    xt = tf.constant(x, dtype=tf.float64)
    weights = list(layer.trainable_weights)
    with tf.GradientTape() as tape:
        tape.watch(xt)
        y = layer(xt, training=training) if training is not None else layer(xt)
    grads = tape.gradient(y, [xt] + weights, output_gradients=tf.constant(dy, dtype=tf.float64))
    return y.numpy(), [g.numpy() for g in grads]


class _Check:
    """check_agreement with one case's error scales (n: statistic length, m: parameter-sum length)."""

    def __init__(self, sc, n, m):
        self.sc, self.n = sc, n
        self.len = {"dweight": max(n, m), "dbias": m}

    def __call__(self, key, got, ref, what):
        check_agreement(got, ref, self.len.get(key, self.n), self.sc[key], what)


# --------------------------------------------------------------------------- BatchNormalization


@oracle_settings(20)
@given(case=channel_cases(per_stat="batch", eps=positive_eps, max_loc=1.0))
def test_batch_normalization_training_matches_keras(tfk, case):
    """Train mode: y, one moving-statistic step (0.99 on the old value, biased variance) and gradients."""
    keras = tfk.keras
    nd, c = case.x.ndim, case.x.shape[1]
    n = case.x.size // c
    affine = case.weight is not None
    rng = np.random.default_rng(c)
    mm, mv = rng.normal(0, 1, c), rng.uniform(0.5, 2, c)
    layer = keras.layers.BatchNormalization(axis=case.axis, epsilon=case.eps, center=affine, scale=affine,
                                            dtype="float64")
    layer.build(case.view(case.x).shape)
    if affine:
        layer.gamma.assign(case.weight)
        layer.beta.assign(case.bias)
    layer.moving_mean.assign(mm)
    layer.moving_variance.assign(mv)
    assert layer.momentum == 0.99
    y_k, grads = _run_layer(tfk, layer, case.view(case.x), case.view(case.dy), training=True)

    axes = (0,) + tuple(range(2, nd))
    chk = _Check(scales(case.x, case.dy, axes, _chan(case.weight, nd), _chan(case.bias, nd), eps=case.eps), n, n)
    fw = refnorm.batch_norm_forward(case.view(case.x), case.weight, case.bias, axis=case.axis, eps=case.eps,
                                    training=True, running_mean=mm, running_var=mv, momentum=0.99,
                                    momentum_convention="old", running_var_estimator="biased")
    chk("y", fw.y, y_k, "keras BatchNormalization y")
    sc = chk.sc
    check_agreement(fw.running_mean, layer.moving_mean.numpy(), n,
                    float(np.max(0.99 * np.abs(mm) + 0.01 * sc["mean"])), "keras BatchNormalization moving_mean")
    check_agreement(fw.running_var, layer.moving_variance.numpy(), n, float(np.max(0.99 * mv + 0.01 * sc["var"])),
                    "keras BatchNormalization moving_variance")
    bw = refnorm.batch_norm_backward(case.view(case.dy), case.view(case.x), case.weight, axis=case.axis,
                                     eps=case.eps)
    chk("dx", bw.dx, grads[0], "keras BatchNormalization dx")
    if affine:  # trainable weights: gamma, beta
        chk("dweight", bw.dweight, grads[1], "keras BatchNormalization dgamma")
        chk("dbias", bw.dbias, grads[2], "keras BatchNormalization dbeta")


@oracle_settings(15)
@given(case=channel_cases(per_stat="batch", min_per_stat=1, eps=positive_eps, max_loc=1.0))
def test_batch_normalization_inference_matches_keras(tfk, case):
    """Inference mode: normalize with the moving statistics, constants for the gradient; no update."""
    keras = tfk.keras
    nd, c = case.x.ndim, case.x.shape[1]
    n = case.x.size // c
    affine = case.weight is not None
    rng = np.random.default_rng(c + 3)
    spread = float(np.max(np.abs(case.x)))
    mm, mv = rng.normal(0, 1, c) * spread, rng.uniform(0.5, 2, c) * spread**2
    layer = keras.layers.BatchNormalization(axis=case.axis, epsilon=case.eps, center=affine, scale=affine,
                                            dtype="float64")
    layer.build(case.view(case.x).shape)
    if affine:
        layer.gamma.assign(case.weight)
        layer.beta.assign(case.bias)
    layer.moving_mean.assign(mm)
    layer.moving_variance.assign(mv)
    y_k, grads = _run_layer(tfk, layer, case.view(case.x), case.view(case.dy), training=False)
    np.testing.assert_array_equal(layer.moving_mean.numpy(), mm)  # inference mode leaves them unchanged

    axes = (0,) + tuple(range(2, nd))
    chk = _Check(scales(case.x, case.dy, axes, _chan(case.weight, nd), _chan(case.bias, nd), eps=case.eps,
                        training=False, mean=_chan(mm, nd), var=_chan(mv, nd)), 1, n)
    fw = refnorm.batch_norm_forward(case.view(case.x), case.weight, case.bias, axis=case.axis, eps=case.eps,
                                    training=False, running_mean=mm, running_var=mv)
    chk("y", fw.y, y_k, "keras BatchNormalization inference y")
    bw = refnorm.batch_norm_backward(case.view(case.dy), case.view(case.x), case.weight, axis=case.axis,
                                     eps=case.eps, training=False, running_mean=mm, running_var=mv)
    chk("dx", bw.dx, grads[0], "keras BatchNormalization inference dx")
    if affine:
        chk("dweight", bw.dweight, grads[1], "keras BatchNormalization inference dgamma")
        chk("dbias", bw.dbias, grads[2], "keras BatchNormalization inference dbeta")


# --------------------------------------------------------------------------- LayerNormalization


@oracle_settings(20)
@given(case=feature_cases(eps=positive_eps, max_loc=1.0), moved=st.booleans())
def test_layer_normalization_matches_keras(tfk, case, moved):
    """LayerNormalization over an axis list: the trailing axes, or (moved) the same axes with the
    batch axis moved last, so that they are not trailing."""
    keras = tfk.keras
    x, dy, axes = case.x, case.dy, case.axes
    if moved:
        x, dy = np.moveaxis(x, 0, -1), np.moveaxis(dy, 0, -1)
        axes = tuple(a - 1 for a in axes)
    n = math.prod(x.shape[a] for a in axes)
    affine = case.weight is not None
    layer = keras.layers.LayerNormalization(axis=list(axes), epsilon=case.eps, center=affine, scale=affine,
                                            dtype="float64")
    layer.build(x.shape)
    if affine:
        layer.gamma.assign(case.weight)
        layer.beta.assign(case.bias)
    y_k, grads = _run_layer(tfk, layer, x, dy)

    keep = tuple(x.shape[a] if a in axes else 1 for a in range(x.ndim))
    rest = tuple(a for a in range(x.ndim) if a not in axes)
    chk = _Check(scales(x, dy, axes, None if not affine else case.weight.reshape(keep),
                        None if not affine else case.bias.reshape(keep), eps=case.eps, param_axes=rest),
                 n, x.size // n)
    fw = refnorm.layer_norm_forward(x, weight=case.weight, bias=case.bias, axes=axes, eps=case.eps)
    chk("y", fw.y, y_k, "keras LayerNormalization y")
    bw = refnorm.layer_norm_backward(dy, x, weight=case.weight, axes=axes, eps=case.eps)
    chk("dx", bw.dx, grads[0], "keras LayerNormalization dx")
    if affine:
        chk("dweight", bw.dweight, grads[1], "keras LayerNormalization dgamma")
        chk("dbias", bw.dbias, grads[2], "keras LayerNormalization dbeta")


# --------------------------------------------------------------------------- GroupNormalization


@oracle_settings(20)
@given(case=channel_cases(per_stat="group", with_groups=True, eps=positive_eps, max_loc=1.0))
def test_group_normalization_matches_keras(tfk, case):
    """GroupNormalization (contiguous channel groups, as in torch) in both layouts, and gradients."""
    keras = tfk.keras
    N, c = case.x.shape[:2]
    spatial = case.x.size // (N * c)
    n = (c // case.groups) * spatial
    affine = case.weight is not None
    layer = keras.layers.GroupNormalization(groups=case.groups, axis=case.axis, epsilon=case.eps, center=affine,
                                            scale=affine, dtype="float64")
    layer.build(case.view(case.x).shape)
    if affine:
        layer.gamma.assign(case.weight)
        layer.beta.assign(case.bias)
    y_k, grads = _run_layer(tfk, layer, case.view(case.x), case.view(case.dy))

    pv = (1, case.groups, c // case.groups, 1)
    split = lambda a: a.reshape(N, case.groups, c // case.groups, -1)  # noqa: E731
    chk = _Check(scales(split(case.x), split(case.dy), (2, 3), None if not affine else case.weight.reshape(pv),
                        None if not affine else case.bias.reshape(pv), eps=case.eps, param_axes=(0, 3)),
                 n, N * spatial)
    fw = refnorm.group_norm_forward(case.view(case.x), case.groups, case.weight, case.bias, axis=case.axis,
                                    eps=case.eps)
    chk("y", fw.y, y_k, "keras GroupNormalization y")
    bw = refnorm.group_norm_backward(case.view(case.dy), case.view(case.x), case.groups, case.weight,
                                     axis=case.axis, eps=case.eps)
    chk("dx", bw.dx, grads[0], "keras GroupNormalization dx")
    if affine:
        chk("dweight", bw.dweight, grads[1], "keras GroupNormalization dgamma")
        chk("dbias", bw.dbias, grads[2], "keras GroupNormalization dbeta")


# --------------------------------------------------------------------------- RMSNormalization


@oracle_settings(15)
@given(case=feature_cases(eps=positive_eps))
def test_rms_normalization_matches_keras(tfk, case):
    """RMSNormalization over the trailing axes with its scale weight (no bias)."""
    keras = tfk.keras
    n = math.prod(case.normalized_shape)
    w = np.ones(case.normalized_shape) if case.weight is None else case.weight
    layer = keras.layers.RMSNormalization(axis=list(case.axes), epsilon=case.eps, dtype="float64")
    layer.build(case.x.shape)
    layer.scale.assign(w)
    y_k, grads = _run_layer(tfk, layer, case.x, case.dy)

    keep = (1,) * (case.x.ndim - case.k) + case.normalized_shape
    chk = _Check(scales(case.x, case.dy, case.axes, w.reshape(keep), eps=case.eps, center=False,
                        param_axes=tuple(range(case.x.ndim - case.k))), n, case.x.size // n)
    fw = refnorm.rms_norm_forward(case.x, case.normalized_shape, w, eps=case.eps)
    chk("y", fw.y, y_k, "keras RMSNormalization y")
    bw = refnorm.rms_norm_backward(case.dy, case.x, case.normalized_shape, w, eps=case.eps)
    chk("dx", bw.dx, grads[0], "keras RMSNormalization dx")
    chk("dweight", bw.dweight, grads[1], "keras RMSNormalization dscale")


# --------------------------------------------------------------------------- TF fused batch norm


def test_fused_batch_norm_returns_unbiased_batch_variance(tfk):
    """tf.compat.v1.nn.fused_batch_norm (training) returns the unbiased (Bessel) batch variance while
    it normalizes with the biased one; it takes float32 (not float64) for x, scale and offset."""
    tf = tfk.tf
    x64 = np.random.default_rng(11).normal(0.5, 2.0, (2, 3, 2, 4)).astype(np.float32).astype(np.float64)
    n = 2 * 3 * 2  # elements per channel (NHWC): n/(n-1) = 12/11, far outside float32 rounding
    x32 = tf.constant(x64, dtype=tf.float32)
    y, batch_mean, batch_var = tf.compat.v1.nn.fused_batch_norm(
        x32, tf.ones(4, tf.float32), tf.zeros(4, tf.float32), epsilon=1e-3, data_format="NHWC", is_training=True)
    # momentum=1 with the "new" convention makes the running variance the batch estimate itself.
    unbiased = refnorm.batch_norm_forward(x64, axis=-1, eps=1e-3, running_mean=np.zeros(4), running_var=np.zeros(4),
                                          momentum=1.0, running_var_estimator="unbiased")
    biased = refnorm.batch_norm_forward(x64, axis=-1, eps=1e-3)
    u32 = 2.0**-24  # IEEE 754-2019 binary32 unit roundoff
    tol = 2 * (n + 8) * u32 * 8  # float32 reductions of length n, cond <= 8 for this data
    assert_close(batch_var.numpy(), unbiased.running_var, tol, "tf fused_batch_norm batch_variance (float32)")
    assert_close(batch_mean.numpy(), unbiased.mean, tol, "tf fused_batch_norm batch_mean (float32)")
    assert_close(y.numpy(), biased.y, tol, "tf fused_batch_norm y (float32)")
    # The check can fail: the biased variance is a factor (n-1)/n away.
    assert np.min(np.abs(batch_var.numpy() / biased.var - 1)) > 100 * tol
    with pytest.raises(Exception, match="double"):
        tf.compat.v1.nn.fused_batch_norm(tf.constant(x64), tf.ones(4, tf.float64), tf.zeros(4, tf.float64),
                                         is_training=True)


# --------------------------------------------------------------------------- defaults


def test_keras_defaults(tfk):
    """Keras 3 layer defaults that differ from torch's (and from refnorm's torch-style defaults)."""
    keras = tfk.keras
    bn = keras.layers.BatchNormalization(dtype="float64")
    bn.build((2, 3))
    assert bn.momentum == 0.99 and bn.epsilon == 1e-3 and bn.axis == -1
    np.testing.assert_array_equal(bn.moving_mean.numpy(), np.zeros(3))
    np.testing.assert_array_equal(bn.moving_variance.numpy(), np.ones(3))
    assert keras.layers.LayerNormalization().epsilon == 1e-3
    gn = keras.layers.GroupNormalization()
    assert gn.groups == 32 and gn.epsilon == 1e-3 and gn.axis == -1
    assert keras.layers.RMSNormalization().epsilon == 1e-6
