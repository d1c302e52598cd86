"""Accuracy of the oracle against the exact path, and of the exact path itself.

1. refnorm.exact on worked examples (values stated exactly, evaluated with
   Python's fractions and decimal modules as independent references) and
   against fractions/statistics/math.fsum on generated float64 data.
2. The oracle against refnorm.exact on generated cases: within the one-sided
   bound gamma_{n+8} * scale (strategies.scales).
3. Cancellation-prone inputs (mean 1e8, spread 1e-2, lengths up to 1e6): mean,
   variance, y and dx within 1e-12 of the exact evaluation, relative to the
   largest magnitude of each output; a naive single-float64 mean and one-pass
   variance shown to fail by far, as a documented contrast.
"""

from __future__ import annotations

import functools
import math
import statistics
from decimal import Decimal, localcontext
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import refnorm
from refnorm import exact
from strategies import (
    TARGET,
    U,
    assert_close,
    channel_cases,
    feature_cases,
    gamma,
    oracle_settings,
    record,
    rel_err,
    scales,
)

# --------------------------------------------------------------------------- worked examples


def _dec_sqrt(v) -> Decimal:
    with localcontext() as ctx:
        ctx.prec = 50
        return Decimal(v).sqrt()


def _dec(num, den=1) -> Decimal:
    with localcontext() as ctx:
        ctx.prec = 50
        return Decimal(num) / Decimal(den)


def _as_float(d: Decimal) -> float:
    return float(d)  # Decimal -> float is correctly rounded (Python decimal module docs)


def test_exact_statistics_worked_example():
    """x = (1, 2, 3, 4): sum 10, mean 5/2, sum of squared deviations 5, so the biased variance is
    5/4 and the unbiased 5/3 (hand computation)."""
    x = np.array([1.0, 2.0, 3.0, 4.0])
    assert exact.exact_sum(x) == 10
    assert exact.exact_mean(x) == Fraction(5, 2)
    assert exact.exact_var(x) == Fraction(5, 4)
    assert exact.exact_var(x, ddof=1) == Fraction(5, 3)
    means, vars_ = exact.exact_group_stats(x.reshape(2, 1, 2), (0, 2))
    assert means[0] == Fraction(5, 2) and vars_[0] == Fraction(5, 4)
    # 0.1 + 0.2 + 0.3 in binary64: the exact sum of the three stored values, not 0.6.
    tenths = np.array([0.1, 0.2, 0.3])
    assert exact.exact_sum(tenths) == Fraction(0.1) + Fraction(0.2) + Fraction(0.3)
    assert exact.exact_sum(tenths) != Fraction(6, 10)


def test_exact_layer_norm_worked_example():
    """x = (1, 2, 3, 4), eps = 0: x_hat = (-3, -1, 1, 3)/sqrt(5). With dy = (1, 0, 0, 0):
    g - mean(g) = (3, -1, -1, -1)/4, mean(g x_hat) = -3/(4 sqrt 5), and
    dx = r (g - mean g - x_hat mean(g x_hat)) = (3, -4, -1, 2) / (5 sqrt 5) (hand computation,
    Ioffe & Szegedy 2015, §3 gradient)."""
    x = np.array([[1.0, 2.0, 3.0, 4.0]])
    res = exact.layer_norm(x, 4, eps=0.0, dy=np.array([[1.0, 0.0, 0.0, 0.0]]))
    s5 = _dec_sqrt(5)
    np.testing.assert_array_equal(res.y[0], [_as_float(_dec(k) / s5) for k in (-3, -1, 1, 3)])
    np.testing.assert_array_equal(res.dx[0], [_as_float(_dec(k) / (5 * s5)) for k in (3, -4, -1, 2)])
    np.testing.assert_array_equal(res.rstd, [_as_float(2 / s5)])
    np.testing.assert_array_equal(res.dbias, [1.0, 0.0, 0.0, 0.0])
    np.testing.assert_array_equal(res.dweight, [_as_float(-3 / s5), 0.0, 0.0, 0.0])
    # The oracle on the same example: within a few units of roundoff of the exact values.
    fw = refnorm.layer_norm_forward(x, 4, eps=0.0)
    bw = refnorm.layer_norm_backward(np.array([[1.0, 0.0, 0.0, 0.0]]), x, 4, eps=0.0)
    assert_close(fw.y, res.y, 8 * U, "worked example: oracle layer norm y")
    assert_close(bw.dx, res.dx, 16 * U, "worked example: oracle layer norm dx")


def test_exact_rms_and_eps_outside_worked_examples():
    """RMS norm of x = (3, 4), eps = 0: mean square 25/2, y = x sqrt(2)/5; with dy = (1, 0):
    dx = r (g - x r^2 mean(g x)) = sqrt(2) (16, -12) / 125 (hand computation).
    eps added to the std: x = (1, 2, 3, 4), eps = 1/2, r = 1/(sqrt(5)/2 + 1/2) = (sqrt 5 - 1)/2."""
    x = np.array([[3.0, 4.0]])
    res = exact.rms_norm(x, 2, eps=0.0, dy=np.array([[1.0, 0.0]]))
    s2 = _dec_sqrt(2)
    np.testing.assert_array_equal(res.y[0], [_as_float(3 * s2 / 5), _as_float(4 * s2 / 5)])
    np.testing.assert_array_equal(res.dx[0], [_as_float(16 * s2 / 125), _as_float(-12 * s2 / 125)])
    out = exact.layer_norm(np.array([[1.0, 2.0, 3.0, 4.0]]), 4, eps=0.5, eps_placement="outside")
    phi = (_dec_sqrt(5) - 1) / 2
    np.testing.assert_array_equal(out.rstd, [_as_float(phi)])
    np.testing.assert_array_equal(out.y[0], [_as_float(_dec(k, 2) * phi) for k in (-3, -1, 1, 3)])


def test_exact_group_norm_worked_example():
    """Channels (1, 3 | 10, 14) in two contiguous groups (Wu & He 2018, §3.1, from memory): group means 2 and 12,
    variances 1 and 4, so with eps = 0 both groups normalize to (-1, 1); weight/bias per channel."""
    x = np.array([1.0, 3.0, 10.0, 14.0]).reshape(1, 4, 1)
    w = np.array([1.0, 2.0, 3.0, 4.0])
    b = np.array([0.0, 1.0, 0.0, 1.0])
    res = exact.group_norm(x, 2, w, b, eps=0.0)
    np.testing.assert_array_equal(res.y.ravel(), [-1.0, 3.0, -3.0, 5.0])
    np.testing.assert_array_equal(res.mean, [[2.0, 12.0]])
    np.testing.assert_array_equal(res.var, [[1.0, 4.0]])
    np.testing.assert_array_equal(refnorm.group_norm_forward(x, 2, w, b, eps=0.0).y.ravel(), [-1.0, 3.0, -3.0, 5.0])
    last = exact.group_norm(np.moveaxis(x, 1, -1), 2, w, b, axis=-1, eps=0.0)
    np.testing.assert_array_equal(last.y.ravel(), [-1.0, 3.0, -3.0, 5.0])


# --------------------------------------------------------------------------- exact path vs independent references

wide_floats = st.floats(min_value=-1e30, max_value=1e30, allow_nan=False, allow_infinity=False, allow_subnormal=True)


@oracle_settings(60)
@given(st.lists(wide_floats, min_size=1, max_size=40), st.lists(wide_floats, min_size=40, max_size=40))
def test_exact_sums_match_fractions_and_fsum(vals, others):
    """exact_sum/exact_dot/exact_var equal Fraction arithmetic (Python fractions, exact by
    construction) and statistics.pvariance/variance on Fractions; float(exact_sum) equals math.fsum,
    which is correctly rounded (Shewchuk 1997, "Adaptive precision floating-point arithmetic";
    Python math.fsum docs)."""
    a = np.array(vals)
    b = np.array(others[: len(vals)])
    fr = [Fraction(v) for v in vals]
    assert exact.exact_sum(a) == sum(fr)
    assert float(exact.exact_sum(a)) == math.fsum(vals)
    assert exact.exact_dot(a, b) == sum(p * Fraction(q) for p, q in zip(fr, b.tolist()))
    assert exact.exact_mean(a) == sum(fr) / len(fr)
    assert exact.exact_var(a) == statistics.pvariance(fr)
    if len(fr) > 1:
        assert exact.exact_var(a, ddof=1) == statistics.variance(fr)


@oracle_settings(15)
@given(case=channel_cases(per_stat="batch", max_size=120), center=st.booleans())
def test_mpmath_and_integer_paths_agree(case, center):
    """The two exact evaluators (mpmath at 40 digits; integer numerators) agree within their stated
    error bounds (refnorm.exact.normalize_large: <= 3.01 u per element; mpmath: rounded once)."""
    eps = max(case.eps, 1e-5)  # the integer path puts eps inside the root
    axes = (0,) + tuple(range(2, case.x.ndim))
    mp = exact.normalize(case.x, axes, np.ones((1, case.x.shape[1]) + (1,) * (case.x.ndim - 2)), eps=eps,
                         dy=case.dy, center=center)
    it = exact.normalize_large(case.x, axes, case.dy, eps=eps, center=center)
    for name in ("y", "dx"):
        got, ref = getattr(it, name), getattr(mp, name)
        np.testing.assert_allclose(got, ref, rtol=4.1 * U, atol=0, err_msg=name)
    np.testing.assert_allclose(it.rstd, mp.rstd, rtol=U, atol=0)
    np.testing.assert_allclose(it.dbias, mp.dbias.ravel(), rtol=U, atol=0)
    np.testing.assert_allclose(it.dweight, mp.dweight.ravel(), rtol=2 * U, atol=0)


# --------------------------------------------------------------------------- the oracle vs the exact path


def _check_exact(got, ref, n, scale, what):
    """One-sided: |oracle - exact| <= gamma_{n+8} * scale (Higham 2002, §4.2; strategies.scales)."""
    diff = float(np.max(np.abs(np.asarray(got) - np.asarray(ref))))
    bound = gamma(n + 8) * scale
    if scale <= 8 * float(np.max(np.abs(ref))):  # well-conditioned: the relative error is meaningful
        record(what + " | rel", rel_err(got, ref))
    record(what + " | bound used", diff / bound if bound else 0.0)
    assert diff <= bound, f"{what}: {diff:.3e} > {bound:.3e} (relative {rel_err(got, ref):.3e})"


@oracle_settings(20)
@given(op=st.sampled_from(["batch", "batch_eval", "group"]), placement=st.sampled_from(["inside", "outside"]),
       data=st.data())
def test_oracle_matches_exact_channel_ops(op, placement, data):
    """Batch (train and eval) and group norm, both layouts, both eps placements: y, dx, dweight,
    dbias and the statistics within the oracle's own float64 error bound of the exact values.
    (Groups of >= 2 elements: see test_eps_outside_zero_variance_gradient for the one-element case.)"""
    case = data.draw(channel_cases(per_stat="group" if op == "group" else "batch", with_groups=op == "group",
                                   max_size=120))
    x, dy, w, b, eps = case.x, case.dy, case.weight, case.bias, case.eps
    nd, c = x.ndim, x.shape[1]
    ch = lambda a: None if a is None else a.reshape((1, c) + (1,) * (nd - 2))  # noqa: E731
    if placement == "outside" and eps == 0.0:
        eps = 1e-3
    if op == "group":
        g = case.groups
        ref = exact.group_norm(x, g, w, b, eps=eps, dy=dy, eps_placement=placement)
        fw = refnorm.group_norm_forward(case.view(x), g, w, b, axis=case.axis, eps=eps, eps_placement=placement)
        bw = refnorm.group_norm_backward(case.view(dy), case.view(x), g, w, axis=case.axis, eps=eps,
                                         eps_placement=placement)
        split = lambda a: a.reshape(x.shape[0], g, c // g, -1)  # noqa: E731
        pv = lambda a: None if a is None else a.reshape(1, g, c // g, 1)  # noqa: E731
        sc = scales(split(x), split(dy), (2, 3), pv(w), pv(b), eps=eps, param_axes=(0, 3), placement=placement)
        n, m = (c // g) * (x.size // (x.shape[0] * c)), x.size // c
    else:
        training = op == "batch"
        rng = np.random.default_rng(c)
        spread = float(np.max(np.abs(x)))
        rm, rv = (None, None) if training else (rng.normal(0, 1, c) * spread, rng.uniform(0.5, 2, c) * spread**2)
        ref = exact.batch_norm(x, w, b, eps=eps, dy=dy, training=training, running_mean=rm, running_var=rv,
                               eps_placement=placement)
        kw = dict(axis=case.axis, eps=eps, eps_placement=placement, training=training)
        fw = refnorm.batch_norm_forward(case.view(x), w, b, running_mean=rm, running_var=rv, **kw)
        bw = refnorm.batch_norm_backward(case.view(dy), case.view(x), w, running_mean=rm, running_var=rv, **kw)
        axes = (0,) + tuple(range(2, nd))
        sc = scales(x, dy, axes, ch(w), ch(b), eps=eps, training=training, mean=None if training else ch(rm),
                    var=None if training else ch(rv), placement=placement)
        n = m = x.size // c
        if not training:
            n = 1
    _check_exact(case.unview(fw.y), ref.y, n, sc["y"], f"exact {op} y")
    _check_exact(case.unview(bw.dx), ref.dx, n, sc["dx"], f"exact {op} dx")
    _check_exact(bw.dweight, ref.dweight, max(n, m), sc["dweight"], f"exact {op} dweight")
    _check_exact(bw.dbias, ref.dbias, m, sc["dbias"], f"exact {op} dbias")
    _check_exact(fw.rstd, ref.rstd, n, sc["rstd"], f"exact {op} rstd")
    if op != "batch_eval":
        _check_exact(fw.mean, ref.mean, n, sc["mean"], f"exact {op} mean")
        _check_exact(fw.var, ref.var, n, sc["var"], f"exact {op} var")


@oracle_settings(20)
@given(case=feature_cases(max_size=120), op=st.sampled_from(["layer", "rms"]),
       placement=st.sampled_from(["inside", "outside"]))
def test_oracle_matches_exact_feature_ops(case, op, placement):
    """Layer and RMS norm over the trailing axes, both eps placements, against the exact path."""
    x, dy, eps = case.x, case.dy, case.eps
    if placement == "outside" and eps == 0.0:
        eps = 1e-3
    ns = case.normalized_shape
    ex = exact.layer_norm if op == "layer" else exact.rms_norm
    fwd = refnorm.layer_norm_forward if op == "layer" else refnorm.rms_norm_forward
    bwd = refnorm.layer_norm_backward if op == "layer" else refnorm.rms_norm_backward
    ref = ex(x, ns, case.weight, case.bias, eps=eps, dy=dy, eps_placement=placement)
    fw = fwd(x, ns, case.weight, case.bias, eps=eps, eps_placement=placement)
    bw = bwd(dy, x, ns, case.weight, eps=eps, eps_placement=placement)
    keep = (1,) * (x.ndim - case.k) + ns
    pv = lambda a: None if a is None else a.reshape(keep)  # noqa: E731
    sc = scales(x, dy, case.axes, pv(case.weight), pv(case.bias), eps=eps, center=op == "layer",
                param_axes=tuple(range(x.ndim - case.k)), placement=placement)
    n, m = math.prod(ns), x.size // math.prod(ns)
    _check_exact(fw.y, ref.y, n, sc["y"], f"exact {op} y")
    _check_exact(bw.dx, ref.dx, n, sc["dx"], f"exact {op} dx")
    _check_exact(bw.dweight, ref.dweight, max(n, m), sc["dweight"], f"exact {op} dweight")
    _check_exact(bw.dbias, ref.dbias, m, sc["dbias"], f"exact {op} dbias")
    _check_exact(fw.rstd, ref.rstd, n, sc["rstd"], f"exact {op} rstd")


@pytest.mark.filterwarnings("ignore::RuntimeWarning")
@pytest.mark.parametrize("x", [np.array([[0.5], [0.5], [0.5]]), np.array([[2.0, -1.0]])])
def test_eps_outside_zero_variance_gradient(x):
    """A group whose variance is 0 (constant, or one element): with r = 1/(sqrt(v) + eps), y(x + t d)
    = t (d - mean d) / (t rms(d - mean d) + eps), so dy/dt at t = 0 is (d - mean d) / eps and
    dx = r (g - mean g) is finite (the sqrt(v) kink multiplies x - mean = 0). Checked against the
    exact path and the hand formula."""
    dy = np.arange(1.0, 1.0 + x.size).reshape(x.shape)
    eps = 1e-3
    ref = exact.batch_norm(x, eps=eps, dy=dy, eps_placement="outside")
    g = dy - dy.mean(axis=0, keepdims=True)
    np.testing.assert_allclose(ref.dx, g / eps, rtol=4 * U)
    bw = refnorm.batch_norm_backward(dy, x, eps=eps, eps_placement="outside")
    np.testing.assert_allclose(bw.dx, ref.dx, rtol=16 * U, atol=0)


# --------------------------------------------------------------------------- cancellation


def _offset_data(n_per_group, groups, seed):
    """Values 1e8 + 1e-2 * N(0, 1): the mean is 10^10 spreads away from zero, the regime where a
    single float64 mean loses the bits the normalization needs (Chan, Golub & LeVeque 1983, section from
    memory; Higham 2002, §1.9)."""
    rng = np.random.default_rng(seed)
    return 1e8 + 1e-2 * rng.standard_normal((groups, n_per_group)), rng.standard_normal((groups, n_per_group))


def _assert_target(got, ref, what):
    """The project's 1e-12 relative to the largest magnitude of the output. The oracle's mean is the
    pair m0 + c (refnorm._moments): its error is that of the correction sum, at most about
    log2(n) u sum|x - m0| with pairwise summation (Higham 2002, §4.2; from memory), i.e. a few times
    1e-15 of the spread here."""
    return assert_close(got, ref, TARGET, what)


def _compare_group_rows(fw, bw, ref, rows_of, what):
    _assert_target(fw.mean.ravel(), ref.mean.ravel(), f"cancellation {what} mean")
    _assert_target(fw.var.ravel(), ref.var.ravel(), f"cancellation {what} var")
    _assert_target(fw.rstd.ravel(), ref.rstd.ravel(), f"cancellation {what} rstd")
    _assert_target(rows_of(fw.y), ref.y, f"cancellation {what} y")
    _assert_target(rows_of(bw.dx), ref.dx, f"cancellation {what} dx")


@functools.lru_cache(maxsize=1)
def _million():
    """The 10^6-element case and its exact evaluation (about two seconds), shared by two tests."""
    xr, dyr = _offset_data(10**6, 1, seed=2024)
    return xr, dyr, exact.normalize_large(xr, 1, dyr, eps=1e-5)


def test_cancellation_one_million_elements():
    """n = 10^6 in one group: batch norm (one channel), layer norm (one row) and group norm (one
    group) see the same group; mean, both variances, y, dx, dweight and dbias against
    refnorm.exact.normalize_large."""
    xr, dyr, ref = _million()
    eps = 1e-5
    # batch norm: (N, C, L) = (1000, 1, 1000), channel 0 holds all 10^6 values
    xb, dyb = xr.reshape(1000, 1, 1000), dyr.reshape(1000, 1, 1000)
    fw = refnorm.batch_norm_forward(xb, eps=eps, running_mean=np.zeros(1), running_var=np.zeros(1), momentum=1.0)
    bw = refnorm.batch_norm_backward(dyb, xb, eps=eps)
    _compare_group_rows(fw, bw, ref, lambda a: a.reshape(1, -1), "1e6 batch_norm")
    _assert_target(fw.running_var, ref.var_unbiased.ravel(), "cancellation 1e6 batch_norm unbiased var")
    _assert_target(bw.dweight, ref.dweight.ravel(), "cancellation 1e6 batch_norm dweight")
    _assert_target(bw.dbias, ref.dbias.ravel(), "cancellation 1e6 batch_norm dbias")
    fl = refnorm.layer_norm_forward(xr, 10**6, eps=eps)
    bl = refnorm.layer_norm_backward(dyr, xr, 10**6, eps=eps)
    _compare_group_rows(fl, bl, ref, lambda a: a, "1e6 layer_norm")
    xg, dyg = xr.reshape(1, 4, 250000), dyr.reshape(1, 4, 250000)
    fg = refnorm.group_norm_forward(xg, 1, eps=eps)
    bg = refnorm.group_norm_backward(dyg, xg, 1, eps=eps)
    _compare_group_rows(fg, bg, ref, lambda a: a.reshape(1, -1), "1e6 group_norm")


@functools.lru_cache(maxsize=4)
def _smaller(n, groups):
    xr, dyr = _offset_data(n, groups, seed=n)
    xr = xr + np.arange(groups)[:, None] * 3.0  # a distinct mean per group
    return xr, dyr, exact.normalize_large(xr, 1, dyr, eps=1e-5)


SMALLER = [(10**3, 4), (10**4, 3), (10**5, 2)]


@pytest.mark.parametrize("n,groups", SMALLER)
def test_cancellation_smaller_lengths(n, groups):
    """Several groups per call, each 1e8 + 1e-2 N(0,1) with its own offset: batch norm
    (channels-first, C = groups), layer norm (one row per group), instance norm against the exact path."""
    xr, dyr, ref = _smaller(n, groups)
    eps = 1e-5
    xb, dyb = xr.reshape(1, groups, n), dyr.reshape(1, groups, n)
    fb = refnorm.batch_norm_forward(xb, eps=eps)
    bb = refnorm.batch_norm_backward(dyb, xb, eps=eps)
    _compare_group_rows(fb, bb, ref, lambda a: a.reshape(groups, n), f"n={n} batch_norm")
    fl = refnorm.layer_norm_forward(xr, n, eps=eps)
    bl = refnorm.layer_norm_backward(dyr, xr, n, eps=eps)
    _compare_group_rows(fl, bl, ref, lambda a: a, f"n={n} layer_norm")
    fi = refnorm.instance_norm_forward(xb, eps=eps)
    bi = refnorm.instance_norm_backward(dyb, xb, eps=eps)
    _compare_group_rows(fi, bi, ref, lambda a: a.reshape(groups, n), f"n={n} instance_norm")


# Before refnorm._moments.sum_keep, this case failed: NumPy adds slices of a strided axis one at a
# time (numpy.sum Notes: pairwise summation only along the fast axis), and at n = 1e5 the
# variance erred by 1.05e-12 relative; blocked summation brings it to the float64 level.


@pytest.mark.parametrize("n,groups", [SMALLER[0], SMALLER[1],
                                      SMALLER[2]])
def test_cancellation_batch_norm_channels_last(n, groups):
    """Channels-last batch norm on a contiguous (n, C) array, the layout a channels-last framework
    stores: every channel's reduction runs down a strided axis."""
    xr, dyr, ref = _smaller(n, groups)
    eps = 1e-5
    xb, dyb = np.ascontiguousarray(xr.T), np.ascontiguousarray(dyr.T)
    fb = refnorm.batch_norm_forward(xb, axis=-1, eps=eps)
    bb = refnorm.batch_norm_backward(dyb, xb, axis=-1, eps=eps)
    _compare_group_rows(fb, bb, ref, lambda a: a.T, f"n={n} batch_norm channels-last")


def test_naive_float64_statistics_fail_on_cancellation():
    """Documented contrast, asserted: on the same 10^6 values, a plain float64 mean (sum/n, then
    x - mean) and the one-pass variance E[x^2] - E[x]^2 miss the 1e-12 target by far.

    Why: float64 values near 1e8 are spaced ulp(1e8) = 2^-26 ~ 1.5e-8 apart (IEEE 754-2019
    binary64), so any single float64 mean is off by up to 7.5e-9 ~ 7.5e-7 spreads, and every
    x - mean inherits that error; E[x^2] ~ 1e16 carries an absolute rounding error of order
    u * 1e16 ~ 1, against a variance of 1e-4 (Chan, Golub & LeVeque 1983; Higham 2002, §1.9).
    The mean itself is fine relative to its own magnitude: the failure is in what is computed from it.
    """
    xr, dyr, ref = _million()
    x = xr[0]
    eps = 1e-5
    n = x.size
    mean_naive = np.sum(x) / n
    var_two_pass = np.sum((x - mean_naive) ** 2) / n
    y_naive = (x - mean_naive) / np.sqrt(var_two_pass + eps)
    var_one_pass = np.sum(x * x) / n - mean_naive**2
    err_mean = rel_err(np.array([mean_naive]), ref.mean.ravel())
    err_y = rel_err(y_naive, ref.y[0])
    err_var1 = rel_err(np.array([var_one_pass]), ref.var.ravel())
    record("naive contrast: mean rel err", err_mean)
    record("naive contrast: y rel err (plain mean)", err_y)
    record("naive contrast: one-pass var rel err", err_var1)
    assert err_mean <= TARGET  # well-conditioned on its own ...
    assert err_y > 1e3 * TARGET  # ... but x - mean loses ~7 digits of y
    assert err_var1 > 1e9 * TARGET  # the one-pass variance has no correct digit
    # The oracle on the same data meets the target (see test_cancellation_one_million_elements).
    assert rel_err(refnorm.layer_norm_forward(xr, n, eps=eps).y, ref.y) <= TARGET
