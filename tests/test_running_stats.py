"""Running-statistic updates over several steps, against torch and Keras layers stepped alike.

References: torch 2.13 nn.BatchNorm1d/2d/3d and nn.InstanceNorm2d with
track_running_stats=True (momentum on the new value, unbiased running
variance, momentum=None a cumulative average over num_batches_tracked);
keras 3.15 BatchNormalization (momentum on the old value, biased moving
variance). Each library layer and the oracle see the same STEPS batches; the
oracle's running statistics are threaded from one call to the next, as a
kernel under test would thread them.
"""

from __future__ import annotations

import numpy as np
import pytest

import refnorm
from strategies import U, assert_close, check_agreement, scales

STEPS = 5


def _batches(shape, seed, loc=0.5, scale=2.0):
    rng = np.random.default_rng(seed)
    # Every batch its own location and spread, so that a wrong weighting shows.
    return [rng.normal(loc * (1 + k), scale / (1 + k), shape) for k in range(STEPS)]


def _tol_scale(batches, *arrays):
    """Largest magnitude in the recursion: the statistics' inputs and every running value."""
    return max([float(np.max(np.abs(b))) ** 2 + float(np.max(np.abs(b))) for b in batches]
               + [float(np.max(np.abs(a))) for a in arrays])


# --------------------------------------------------------------------------- torch


@pytest.mark.parametrize("momentum", [0.1, 0.3, None])
@pytest.mark.parametrize("shape", [(6, 3), (4, 3, 5), (2, 3, 4, 3), (2, 3, 2, 2, 3)])
def test_batch_norm_running_stats_match_torch(torch, shape, momentum):
    """nn.BatchNorm{1,2,3}d over STEPS train steps, then eval mode with the accumulated statistics."""
    c = shape[1]
    module = {2: torch.nn.BatchNorm1d, 3: torch.nn.BatchNorm1d, 4: torch.nn.BatchNorm2d, 5: torch.nn.BatchNorm3d}[
        len(shape)](c, momentum=momentum, dtype=torch.float64)
    module.train()
    rm, rv = np.zeros(c), np.ones(c)  # torch's initial running statistics
    np.testing.assert_array_equal(module.running_mean.numpy(), rm)
    np.testing.assert_array_equal(module.running_var.numpy(), rv)
    batches = _batches(shape, seed=len(shape))
    n = batches[0].size // c
    for k, xb in enumerate(batches):
        assert int(module.num_batches_tracked) == k
        module(torch.tensor(xb))
        fw = refnorm.batch_norm_forward(xb, eps=module.eps, training=True, running_mean=rm, running_var=rv,
                                        momentum=momentum, batches_seen=k if momentum is None else None)
        rm, rv = fw.running_mean, fw.running_var
        scale = _tol_scale(batches[: k + 1], rm, rv)
        check_agreement(rm, module.running_mean.numpy(), n + 8 * (k + 1), scale, "torch BatchNorm running_mean")
        check_agreement(rv, module.running_var.numpy(), n + 8 * (k + 1), scale, "torch BatchNorm running_var")
    module.eval()
    x = batches[0]
    y_t = module(torch.tensor(x)).detach().numpy()
    y = refnorm.batch_norm_forward(x, eps=module.eps, training=False, running_mean=rm, running_var=rv).y
    check_agreement(y, y_t, n + 8 * STEPS, float(np.max(np.abs(x - rm.reshape((1, c) + (1,) * (len(shape) - 2))))
                    / np.sqrt(np.min(rv) + module.eps)) * 4, "torch BatchNorm eval y after steps")


@pytest.mark.parametrize("momentum,oracle_momentum", [(0.1, 0.1), (0.5, 0.5), (None, 0.0)])
def test_instance_norm_running_stats_match_torch(torch, momentum, oracle_momentum):
    """nn.InstanceNorm2d(track_running_stats=True): the batch average of the per-instance mean and
    unbiased variance enters the update; eval mode normalizes every instance with the running values.

    Unlike BatchNorm, torch's InstanceNorm passes momentum=None on as 0.0 (its _apply_instance_norm):
    the running statistics stay at their initial values. The oracle's momentum=None is the
    cumulative average, so the torch module with None is compared with the oracle's momentum=0.
    """
    shape = (3, 4, 3, 5)
    c, n = shape[1], shape[2] * shape[3]
    module = torch.nn.InstanceNorm2d(c, momentum=momentum, track_running_stats=True, dtype=torch.float64)
    module.train()
    rm, rv = np.zeros(c), np.ones(c)
    batches = _batches(shape, seed=9)
    for k, xb in enumerate(batches):
        y_t = module(torch.tensor(xb)).detach().numpy()
        fw = refnorm.instance_norm_forward(xb, eps=module.eps, training=True, running_mean=rm, running_var=rv,
                                           momentum=oracle_momentum)
        sc = scales(xb, np.zeros(shape), (2, 3), eps=module.eps)
        check_agreement(fw.y, y_t, n, sc["y"], "torch InstanceNorm train y")
        rm, rv = fw.running_mean, fw.running_var
        scale = _tol_scale(batches[: k + 1], rm, rv)
        check_agreement(rm, module.running_mean.numpy(), n + 8 * (k + 1), scale, "torch InstanceNorm running_mean")
        check_agreement(rv, module.running_var.numpy(), n + 8 * (k + 1), scale, "torch InstanceNorm running_var")
    if momentum is None:
        np.testing.assert_array_equal(module.running_mean.numpy(), np.zeros(c))
    module.eval()
    x = batches[-1]
    y_t = module(torch.tensor(x)).detach().numpy()
    y = refnorm.instance_norm_forward(x, eps=module.eps, training=False, running_mean=rm, running_var=rv).y
    check_agreement(y, y_t, 8, float(np.max(np.abs(x) + np.max(np.abs(rm))) / np.sqrt(np.min(rv) + module.eps)),
                    "torch InstanceNorm eval y after steps")


# --------------------------------------------------------------------------- Keras


@pytest.mark.parametrize("momentum", [0.99, 0.9])
@pytest.mark.parametrize("shape,axis", [((6, 3), -1), ((2, 4, 3, 3), -1), ((2, 3, 4, 2), 1)])
def test_batch_normalization_moving_stats_match_keras(tfk, shape, axis, momentum):
    """keras BatchNormalization over STEPS train calls, then inference with the moving statistics."""
    keras, tf = tfk.keras, tfk.tf
    c = shape[axis]
    layer = keras.layers.BatchNormalization(axis=axis, momentum=momentum, dtype="float64")
    layer.build(shape)
    rm, rv = np.zeros(c), np.ones(c)  # Keras's initial moving statistics
    batches = _batches(shape, seed=3, loc=0.2, scale=1.5)
    n = batches[0].size // c
    for k, xb in enumerate(batches):
        layer(tf.constant(xb), training=True)
        fw = refnorm.batch_norm_forward(xb, axis=axis, eps=layer.epsilon, training=True, running_mean=rm,
                                        running_var=rv, momentum=momentum, momentum_convention="old",
                                        running_var_estimator="biased")
        rm, rv = fw.running_mean, fw.running_var
        scale = _tol_scale(batches[: k + 1], rm, rv)
        check_agreement(rm, layer.moving_mean.numpy(), n + 8 * (k + 1), scale, "keras BatchNormalization moving_mean")
        check_agreement(rv, layer.moving_variance.numpy(), n + 8 * (k + 1), scale,
                        "keras BatchNormalization moving_variance")
    x = batches[0]
    y_k = layer(tf.constant(x), training=False).numpy()
    y = refnorm.batch_norm_forward(x, axis=axis, eps=layer.epsilon, training=False, running_mean=rm,
                                   running_var=rv).y
    check_agreement(y, y_k, 8, float(np.max(np.abs(x)) + np.max(np.abs(rm))) / np.sqrt(np.min(rv) + layer.epsilon),
                    "keras BatchNormalization inference y after steps")


# --------------------------------------------------------------------------- the conventions' relations


def test_momentum_conventions_are_mirror_images():
    """momentum m on the old value is momentum 1 - m on the new value (the two forms of one
    exponential moving average; torch and Keras docs state one each)."""
    rng = np.random.default_rng(1)
    r, s = rng.normal(size=7), rng.normal(size=7)
    for m in (0.0, 0.1, 0.5, 0.9, 0.99, 1.0):
        old = refnorm.running_update(r, s, momentum=m, momentum_convention="old")
        new = refnorm.running_update(r, s, momentum=1.0 - m, momentum_convention="new")
        # 1 - (1 - m) differs from m by at most u (Sterbenz 1974 for 1 - m with m in [0.5, 1]; one rounding else).
        assert_close(old, new, 8 * U * (np.max(np.abs(r)) + np.max(np.abs(s))) / np.max(np.abs(old)),
                     "running_update old/new mirror")
        np.testing.assert_allclose(old, m * r + (1 - m) * s, rtol=0, atol=4 * U * np.max(np.abs(r) + np.abs(s)))


def test_unbiased_and_biased_estimators_differ_by_bessel_factor():
    """unbiased = biased * n / (n - 1) (Bessel's correction); with momentum 1 on the new value the
    running variance is the batch estimate itself."""
    x = np.random.default_rng(2).normal(1.0, 3.0, (5, 2, 3))
    n = 5 * 3
    zeros = np.zeros(2)
    est = {e: refnorm.batch_norm_forward(x, running_mean=zeros, running_var=zeros, momentum=1.0,
                                         running_var_estimator=e).running_var for e in ("unbiased", "biased")}
    assert_close(est["unbiased"], est["biased"] * n / (n - 1), 8 * U, "Bessel factor")
    assert_close(est["biased"], np.var(x, axis=(0, 2)), 2 * (n + 8) * U, "biased = numpy var ddof=0")
    assert_close(est["unbiased"], np.var(x, axis=(0, 2), ddof=1), 2 * (n + 8) * U, "unbiased = numpy var ddof=1")


def test_cumulative_average_is_the_mean_of_all_batches():
    """momentum=None: after k steps from any start the running value is the plain mean of the k batch
    statistics (the cumulative moving average; torch's momentum=None)."""
    rng = np.random.default_rng(4)
    stats = rng.normal(size=(STEPS, 3))
    r0 = rng.normal(size=3) * 100  # the start is forgotten at the first step (factor 1/(0 + 1) = 1)
    r = r0
    for k in range(STEPS):
        r = refnorm.running_update(r, stats[k], momentum=None, batches_seen=k)
        # Each step r + (s - r)/(k + 1) rounds three times on magnitudes up to max(|r0|, |s|).
        mag = max(np.max(np.abs(stats)), np.max(np.abs(r0)))
        assert_close(r, np.mean(stats[: k + 1], axis=0), 4 * (k + 2) * U * mag / np.max(np.abs(r)),
                     "cumulative average")


def test_cumulative_average_is_each_conventions_momentum():
    """The cumulative average r' = r + (s - r)/(k + 1) (k = batches_seen before the step; torch's
    momentum=None with factor 1/num_batches_tracked, docs/conventions.md) is, under each momentum
    convention, an exponential average with a step-dependent momentum: 1/(k + 1) on the new value
    ("new"), k/(k + 1) on the old value ("old"). The oracle's cumulative update does not depend on the
    convention; what a kernel that implements it by passing a momentum must pass is that factor."""
    rng = np.random.default_rng(5)
    r, s = rng.normal(size=6), rng.normal(size=6)
    for k in (0, 1, 3, 99):
        cum = {c: refnorm.running_update(r, s, momentum=None, batches_seen=k, momentum_convention=c)
               for c in ("new", "old")}
        assert np.array_equal(cum["new"], cum["old"])
        new = refnorm.running_update(r, s, momentum=1.0 / (k + 1), momentum_convention="new")
        old = refnorm.running_update(r, s, momentum=k / (k + 1), momentum_convention="old")
        # Three roundings on magnitudes up to max|r| + max|s| (Higham 2002, §2.1, one u each).
        tol = 8 * U * (np.max(np.abs(r)) + np.max(np.abs(s))) / np.max(np.abs(cum["new"]))
        assert_close(new, cum["new"], tol, f"cumulative = new convention with momentum 1/({k}+1)")
        assert_close(old, cum["new"], tol, f"cumulative = old convention with momentum {k}/({k}+1)")
