"""The oracle at 1e-12 on two paths that used to miss it: saved statistics passed back, and dy with a large offset.

Data: float64 groups of 10^5 elements, x = 1e8 + 1e-2 N(0, 1) (mean 10^10 spreads from zero, where a
single float64 mean loses the bits the normalization needs: Chan, Golub & LeVeque 1983; Higham 2002,
§1.9), dy = N(0, 1) or 1e6 + N(0, 1). Bar: 1e-12 relative to the largest magnitude of each output
(strategies.TARGET).

Reference for every check: refnorm.exact.normalize_large, the op's definition evaluated in exact
rational arithmetic (Python integers and fractions: every float64 is an integer times a power of two,
IEEE 754-2019 §3.4, so sums and products of float64 values are exact), each output rounded to float64
within 3-4 units of roundoff (bound in its docstring). Definitions: batch norm, Ioffe & Szegedy 2015,
Alg. 1 and the gradient of §3; layer norm, Ba, Kiros & Hinton 2016, eq. 4; group norm, Wu & He 2018,
eq. 1-3; instance norm, Ulyanov, Vedaldi & Lempitsky 2016, eq. 2; RMS norm, Zhang & Sennrich 2019, eq. 4.

Measured on this data before the change (largest dx error relative to max |dx|): the forward's own
mean and rstd passed back 1.6e-11 (every op; 1.2e-10 on another draw, up to 2.7e-10 with dy offset);
dy = 1e6 + N(0, 1) 1.5e-11 to 2.8e-11 (batch, instance and group norm with or without a weight, layer
norm with a constant or nearly constant weight), up to 3.8e-11 with saved statistics; batch and
instance norm dweight under that dy 8.2e-10. After: at most 5.9e-16 for dx, 2.5e-15 for dweight.

Not covered: RMS norm with both x and dy offset. Its backward does not centre g; there
dx = r (g - xhat mean(g xhat)) cancels because g is nearly parallel to xhat, a cause of its own
(measured 8e-11 on this data); with dy offset alone RMS norm is at 2e-16.
"""

from __future__ import annotations

import functools
from fractions import Fraction

import numpy as np
import pytest

import refnorm
from refnorm import _core, _twoproduct, exact
from strategies import TARGET, U, assert_close

N = 10**5  # elements per group
G = 2  # groups
CG, S = 4, N // 4  # group norm: 4 channels of 25 000 elements per group
EPS = 1e-5
OFFSET = 1e6


@functools.lru_cache(maxsize=None)
def _data(dy_offset: float) -> tuple[np.ndarray, np.ndarray]:
    """(x, dy) as rows, one row per group; each group has its own mean near 1e8."""
    rng = np.random.default_rng(2027)
    x = 1e8 + 1e-2 * rng.standard_normal((G, N)) + 3.0 * np.arange(G)[:, None]
    dy = dy_offset + rng.standard_normal((G, N))
    return x, dy


def _channel_weights(kind: str | None) -> np.ndarray | None:
    """Weights of the CG channels of one group (the same for every group), or None."""
    if kind is None:
        return None
    if kind == "constant":
        return np.full(CG, 0.3)  # not a power of two: dy * 0.3 rounds
    rng = np.random.default_rng(11)
    if kind == "near":  # varies, but by far less than dy's offset against its spread
        return 0.3 * (1.0 + 1e-9 * rng.standard_normal(CG))
    return rng.normal(1.0, 0.5, CG)  # "varied": the usual trained weight


def _feature_weight(kind: str | None) -> np.ndarray | None:
    """The per-element weight of one row (length N): channel c's weight on its S elements."""
    wc = _channel_weights(kind)
    return None if wc is None else np.repeat(wc, S)


@functools.lru_cache(maxsize=None)
def _exact(dy_offset: float, kind: str | None, center: bool = True) -> exact.LargeNorm:
    """The exact evaluation (refnorm.exact.normalize_large) with g = dy * weight formed exactly."""
    x, dy = _data(dy_offset)
    w = _feature_weight(kind)
    return exact.normalize_large(x, 1, dy, eps=EPS, center=center, weight=None if w is None else w[None, :])


# --------------------------------------------------------------------------- the oracle's ops, as rows


def _batch(x, dy, kind, saved, last=False):
    """Batch norm with channel c = group c: (1, G, N) channels-first, or (N, G) channels-last."""
    w = None if kind is None else np.full(G, _channel_weights(kind)[0])
    if last:
        xv, dyv, axis, rows = np.ascontiguousarray(x.T), np.ascontiguousarray(dy.T), -1, lambda a: a.T
    else:
        xv, dyv, axis, rows = x.reshape(1, G, N), dy.reshape(1, G, N), 1, lambda a: a.reshape(G, N)
    fw = refnorm.batch_norm_forward(xv, w, axis=axis, eps=EPS)
    st = dict(mean=fw.mean, rstd=fw.rstd) if saved else {}
    bw = refnorm.batch_norm_backward(dyv, xv, w, axis=axis, eps=EPS, **st)
    return rows(bw.dx), bw.dweight, bw.dbias


def _instance(x, dy, kind, saved):
    """Instance norm with one sample and channel c = group c."""
    w = None if kind is None else np.full(G, _channel_weights(kind)[0])
    xv, dyv = x.reshape(1, G, N), dy.reshape(1, G, N)
    fw = refnorm.instance_norm_forward(xv, w, eps=EPS)
    st = dict(mean=fw.mean, rstd=fw.rstd) if saved else {}
    bw = refnorm.instance_norm_backward(dyv, xv, w, eps=EPS, **st)
    return bw.dx.reshape(G, N), bw.dweight, bw.dbias


def _group(x, dy, kind, saved):
    """Group norm with G groups of CG channels of S elements: (1, G * CG, S)."""
    wc = _channel_weights(kind)
    w = None if wc is None else np.tile(wc, G)
    xv, dyv = x.reshape(1, G * CG, S), dy.reshape(1, G * CG, S)
    fw = refnorm.group_norm_forward(xv, G, w, eps=EPS)
    st = dict(mean=fw.mean, rstd=fw.rstd) if saved else {}
    bw = refnorm.group_norm_backward(dyv, xv, G, w, eps=EPS, **st)
    return bw.dx.reshape(G, N), None, None


def _layer(x, dy, kind, saved):
    """Layer norm over rows of N features."""
    w = _feature_weight(kind)
    fw = refnorm.layer_norm_forward(x, N, w, eps=EPS)
    st = dict(mean=fw.mean, rstd=fw.rstd) if saved else {}
    bw = refnorm.layer_norm_backward(dy, x, N, w, eps=EPS, **st)
    return bw.dx, None, None


OPS = {"batch": _batch, "batch channels-last": functools.partial(_batch, last=True),
       "instance": _instance, "group": _group, "layer": _layer}
# Weights whose g = dy * weight is not exact: per channel for batch/instance norm, per channel of a
# group for group norm, per feature for layer norm.
KINDS = {"batch": [None, "constant"], "batch channels-last": [None, "constant"], "instance": [None, "constant"],
         "group": [None, "constant", "near", "varied"], "layer": [None, "constant", "near", "varied"]}


def _check(op, got, ref, what):
    dx, dw, db = got
    # The exact gradient of the op's definition (references in the module docstring), via
    # refnorm.exact.normalize_large; the project's 1e-12 bar relative to max |dx|.
    assert_close(dx, ref.dx, TARGET, f"exact paths: {op} dx {what}")
    if dw is not None:  # batch and instance norm: one channel per group, so dweight and dbias are per group
        assert_close(dw, ref.dweight.ravel(), TARGET, f"exact paths: {op} dweight {what}")
        assert_close(db, ref.dbias.ravel(), TARGET, f"exact paths: {op} dbias {what}")


@pytest.mark.parametrize("wshape", [(3, 1), (1, 64)], ids=["per group", "per element"])
def test_integer_path_with_a_weight_agrees_with_mpmath(wshape):
    """The reference itself: refnorm.exact.normalize_large with a weight (g = dy * weight as exact
    integers) against the independent 40-digit mpmath evaluator refnorm.exact.normalize, within the
    integer path's stated bounds (4.01 u for y, 3.01 u for dx per element; each rounded once in the
    mpmath path), on offset data."""
    rng = np.random.default_rng(17)
    x = 1e8 + 1e-2 * rng.standard_normal((3, 64))
    dy = OFFSET + rng.standard_normal((3, 64))
    w = 0.3 * (1.0 + 1e-9 * rng.standard_normal(wshape))
    it = exact.normalize_large(x, 1, dy, eps=EPS, weight=w)
    mp = exact.normalize(x, 1, w, eps=EPS, dy=dy)
    np.testing.assert_allclose(it.y, mp.y, rtol=5.1 * U, atol=0)
    np.testing.assert_allclose(it.dx, mp.dx, rtol=4.1 * U, atol=0)
    if wshape == (3, 1):  # the mpmath path sums dweight/dbias over the axes where the weight has length 1
        np.testing.assert_allclose(it.dweight, mp.dweight.ravel(), rtol=2 * U, atol=0)
        np.testing.assert_allclose(it.dbias, mp.dbias.ravel(), rtol=U, atol=0)


@pytest.mark.parametrize("bad", [np.ones(64), np.ones((2, 64)), np.full((3, 1), np.nan), np.ones((3, 64), int)],
                         ids=["rank 1", "not broadcastable", "NaN", "integer"])
def test_integer_path_refuses_a_bad_weight(bad):
    """A weight the exact path cannot use raises RefnormError naming it (the project's rule: validate
    at the boundary, name the argument)."""
    x = np.ones((3, 64)) + np.arange(64)
    with pytest.raises(refnorm.RefnormError, match="weight"):
        exact.normalize_large(x, 1, x, eps=EPS, weight=bad)


# --------------------------------------------------------------------------- 1. saved statistics


@pytest.mark.parametrize("op", list(OPS))
def test_forward_statistics_passed_back_are_exact(op):
    """The documented saved-statistics path: the forward's own mean and rstd given to the backward.
    Before, the float64 mean had lost the low word of the forward's double-float mean: dx off by
    1.6e-11 here (batch and instance dweight 6.5e-8). The backward now recognises the rounded mean
    and restores the low word from x."""
    x, dy = _data(0.0)
    _check(op, OPS[op](x, dy, None, saved=True), _exact(0.0, None), "saved statistics")
    # The recomputing path on the same data, for comparison (refnorm.exact.normalize_large again).
    _check(op, OPS[op](x, dy, None, saved=False), _exact(0.0, None), "recomputed statistics")


def test_rms_norm_saved_rstd_is_exact():
    """RMS norm saves only rstd (no mean): the forward's rstd passed back gives the exact gradient
    (refnorm.exact.normalize_large with center=False: Zhang & Sennrich 2019, eq. 4)."""
    x, dy = _data(0.0)
    ref = _exact(0.0, None, center=False)
    fw = refnorm.rms_norm_forward(x, N, eps=EPS)
    assert_close(fw.rstd, ref.rstd, TARGET, "exact paths: rms rstd")
    for st in ({}, {"rstd": fw.rstd}):
        bw = refnorm.rms_norm_backward(dy, x, N, eps=EPS, **st)
        assert_close(bw.dx, ref.dx, TARGET, f"exact paths: rms dx {'saved' if st else 'recomputed'}")


# --------------------------------------------------------------------------- 2. dy with a large offset


@pytest.mark.parametrize("saved", [False, True], ids=["recomputed", "saved"])
@pytest.mark.parametrize("op, kind", [(op, k) for op in OPS for k in KINDS[op]])
def test_dy_offset_is_exact(op, kind, saved):
    """dy = 1e6 + N(0, 1): g = dy * weight rounded before centring left an error of u |g| = 1e-10 in
    every g - mean(g), about 2e-11 of dx. Now dy is centred first where the weight is constant over
    the group, and g is centred from the exact product (Dekker 1971) where it is offset far beyond
    its spread; with recomputed and with saved statistics."""
    x, dy = _data(OFFSET)
    _check(op, OPS[op](x, dy, kind, saved), _exact(OFFSET, kind), f"dy offset, weight {kind}, "
                                                                   f"{'saved' if saved else 'recomputed'}")


@pytest.mark.parametrize("saved", [False, True], ids=["recomputed", "saved"])
def test_extreme_range_keeps_both_paths_exact(saved):
    """Data of size 1e200 (squares beyond float64: the power-of-two scaled path, refnorm._scaled)
    with the same mean/spread ratio 1e10 and dy = 1e190 (1e6 + N(0, 1)) (so that dx is near 1), a
    nearly constant weight:
    the scaled path also restores a saved mean's low word and centres g from the exact product
    (reference: refnorm.exact.normalize_large, exact rational arithmetic; Ba et al. 2016, eq. 4).
    Before: 2.3e-11 recomputed, 1.2e-9 saved."""
    rng = np.random.default_rng(23)
    n = 2000
    x = 1e200 * (1.0 + 1e-10 * rng.standard_normal((G, n)))
    dy = 1e190 * (OFFSET + rng.standard_normal((G, n)))
    w = 0.3 * (1.0 + 1e-9 * rng.standard_normal(n))
    ref = exact.normalize_large(x, 1, dy, eps=EPS, weight=w[None, :])
    assert 0.1 < np.max(np.abs(ref.dx)) < 1e3  # in range: the relative check below means something
    fw = refnorm.layer_norm_forward(x, n, w, eps=EPS)
    st = dict(mean=fw.mean, rstd=fw.rstd) if saved else {}
    bw = refnorm.layer_norm_backward(dy, x, n, w, eps=EPS, **st)
    assert_close(bw.dx, ref.dx, TARGET, f"exact paths: scaled layer dx {'saved' if saved else 'recomputed'}")


# --------------------------------------------------------------------------- semantics of a saved mean


def _exact_train_dx(x, dy, mean, r):
    """dx = r (g - mean(g)) - r xhat mean((g - mean(g)) xhat), xhat = (x - mean) r (Ioffe & Szegedy 2015,
    §3, eps inside the root), for one group in exact rational arithmetic (Python fractions) with the
    statistics mean and r taken as given."""
    xs = [Fraction(float(v)) for v in x]
    gs = [Fraction(float(v)) for v in dy]
    n = len(xs)
    gbar = sum(gs) / n
    xh = [(v - mean) * r for v in xs]
    k = sum((gi - gbar) * hi for gi, hi in zip(gs, xh)) / n
    return np.array([float(r * (gi - gbar) - r * hi * k) for gi, hi in zip(gs, xh)])


@pytest.mark.parametrize("op", ["batch", "layer"])
def test_a_saved_mean_is_used_as_given_unless_it_is_the_rounded_mean(op):
    """A kernel's saved mean two units in the last place off is used exactly as given (it is the
    kernel's statistic, not the oracle's); the rounded exact mean stands for the exact mean. Both
    against exact rational arithmetic of the train-mode gradient with the stated statistics."""
    rng = np.random.default_rng(5)
    n = 400
    x = 1e8 + 1e-2 * rng.standard_normal(n)
    dy = rng.standard_normal(n)
    mu = exact.exact_mean(x)
    m = float(mu)  # the exact mean rounded once (Fraction.__float__ is correctly rounded)
    r = float(exact.normalize_large(x[None, :], 1, eps=EPS).rstd[0])
    off = np.nextafter(np.nextafter(m, np.inf), np.inf)  # two units in the last place above

    def oracle(mean):
        if op == "batch":
            return refnorm.batch_norm_backward(dy[:, None], x[:, None], eps=EPS, mean=np.array([mean]),
                                               rstd=np.array([r])).dx[:, 0]
        return refnorm.layer_norm_backward(dy[None, :], x[None, :], n, eps=EPS, mean=np.array([mean]),
                                           rstd=np.array([r])).dx[0]

    want_own = _exact_train_dx(x, dy, mu, Fraction(r))
    want_off = _exact_train_dx(x, dy, Fraction(off), Fraction(r))
    # The two meanings differ by far more than the bar, so the checks below tell them apart.
    assert np.max(np.abs(want_own - want_off)) > 100 * TARGET * np.max(np.abs(want_own))
    assert_close(oracle(m), want_own, TARGET, f"exact paths: {op} dx, rounded mean stands for the exact one")
    assert_close(oracle(off), want_off, TARGET, f"exact paths: {op} dx, another mean used as given")


def test_the_backward_depends_on_values_only():
    """Pure function (the project's rule: no hidden state): the backward given the forward's mean, a
    copy of it built from a Python list, or the exact mean rounded by refnorm.exact (equal values,
    no shared object) returns the same bits, before the forward on this x has run and after it and
    a forward on other data."""
    x, dy = _data(0.0)
    xb, dyb = x.reshape(1, G, N), dy.reshape(1, G, N)
    rounded = exact.to_float64(exact.exact_group_stats(xb, (0, 2))[0])
    before = refnorm.batch_norm_backward(dyb, xb, eps=EPS, mean=rounded, rstd=np.full(G, 100.0)).dx
    fw = refnorm.batch_norm_forward(xb, eps=EPS)
    refnorm.batch_norm_forward(xb + 1.0, eps=EPS)
    np.testing.assert_array_equal(rounded, fw.mean)  # the forward's mean is the exact mean rounded here
    for mean in (fw.mean, np.array(fw.mean.tolist()), rounded):
        np.testing.assert_array_equal(
            refnorm.batch_norm_backward(dyb, xb, eps=EPS, mean=mean, rstd=np.full(G, 100.0)).dx, before)


# --------------------------------------------------------------------------- the exact product


def test_two_product_is_exact():
    """p + e = a * b exactly, p = fl(a * b) (Dekker 1971, mul12; Ogita, Rump & Oishi 2005, Alg. 3.3,
    from memory), checked in exact rational arithmetic (Python fractions) over 150 binary orders of
    magnitude each way and on values with full 53-bit significands."""
    rng = np.random.default_rng(0)
    a = rng.standard_normal(3000) * np.exp2(rng.integers(-150, 150, 3000))
    b = rng.standard_normal(3000) * np.exp2(rng.integers(-150, 150, 3000))
    a[:4] = [1.0 + 2**-52, -(2**53 - 1.0), 0.3, 0.0]
    b[:4] = [1.0 - 2**-53, 2**53 - 1.0, 0.1, 5.0]
    p, e = _twoproduct.two_product(a, b)
    np.testing.assert_array_equal(p, a * b)
    for ai, bi, pi, ei in zip(a.tolist(), b.tolist(), p.tolist(), e.tolist()):
        assert Fraction(ai) * Fraction(bi) == Fraction(pi) + Fraction(ei), (ai, bi)


def test_centered_product_against_fractions():
    """a * b - mean(a * b) for a with a large offset: within a few units of roundoff of the largest
    centred value, against exact rational arithmetic (Python fractions); the plain float64 evaluation
    fl(a * b) - mean, shown as the contrast, is off by about 1e6 u of it."""
    rng = np.random.default_rng(3)
    a = OFFSET + rng.standard_normal((1, 500))
    b = np.full((1, 500), 0.3)
    got = _twoproduct.centered_product(a, b, (1,))
    prods = [Fraction(ai) * Fraction(bi) for ai, bi in zip(a.ravel().tolist(), b.ravel().tolist())]
    mean = sum(prods) / len(prods)
    want = np.array([float(p - mean) for p in prods])
    scale = np.max(np.abs(want))
    assert np.max(np.abs(got.ravel() - want)) <= 8 * U * scale
    plain = a * b - np.mean(a * b)
    assert np.max(np.abs(plain.ravel() - want)) > 1e4 * U * scale


def test_a_recentred_group_does_not_change_its_neighbours():
    """Each group's choice of evaluation depends on its own data: one layer-norm row with dy offset
    (centred from the exact product) leaves the other rows' dx bit for bit as they are without it
    (common practice: a row's result must not depend on the rows next to it)."""
    rng = np.random.default_rng(31)
    x = 1e8 + 1e-2 * rng.standard_normal((5, 300))
    dy = rng.standard_normal(x.shape)
    w = 0.3 * (1.0 + 1e-9 * rng.standard_normal(300))
    wild = dy.copy()
    wild[2] += OFFSET
    plain = refnorm.layer_norm_backward(dy, x, 300, w).dx
    mixed = refnorm.layer_norm_backward(wild, x, 300, w).dx
    np.testing.assert_array_equal(np.delete(mixed, 2, axis=0), np.delete(plain, 2, axis=0))
    ref = exact.normalize_large(x[2:3], 1, wild[2:3], eps=EPS, weight=w[None, :])
    assert_close(mixed[2:3], ref.dx, TARGET, "exact paths: re-centred row dx")  # exact rational arithmetic


def test_ordinary_gradients_are_never_recentred(monkeypatch):
    """Centring from the exact product costs a dozen passes; dy without a large offset (normal data,
    varied weights, dy of ones, data near 1e8) must not reach it (benchmarks/bench_oracle.py measures
    the rest of the cost)."""
    def refuse(*a, **k):
        raise AssertionError("re-centred from the exact product")

    monkeypatch.setattr(_core, "centered_product", refuse)
    rng = np.random.default_rng(9)
    for x in (rng.standard_normal((6, 8, 50)), 1e8 + 1e-2 * rng.standard_normal((6, 8, 50))):
        for dy in (rng.standard_normal(x.shape), np.ones(x.shape), 3.0 + rng.standard_normal(x.shape)):
            wc, wf = rng.normal(1.0, 0.5, 8), rng.normal(1.0, 0.5, 50)
            refnorm.group_norm_backward(dy, x, 2, wc)
            refnorm.layer_norm_backward(dy, x, 50, wf)
            fw = refnorm.layer_norm_forward(x, 50, wf)
            refnorm.layer_norm_backward(dy, x, 50, wf, mean=fw.mean, rstd=fw.rstd)
            refnorm.batch_norm_backward(dy, x, wc)
            refnorm.instance_norm_backward(dy, x, wc)
