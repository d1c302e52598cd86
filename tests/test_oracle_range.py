"""The oracle on finite data far from magnitude 1, against exact arithmetic.

Squares of 1e200 overflow float64 and squares of 1e-170 underflow it (IEEE 754-2019 binary64:
largest finite 1.8e308, smallest subnormal 4.9e-324), so a plain float64 evaluation of a
normalization gives NaN, 0 or +-inf there. The oracle computes such groups on copies scaled by
powers of two, which is exact (Higham 2002, Accuracy and Stability of Numerical Algorithms,
§2.1: multiplying by a power of the base is exact barring over- and underflow; IEEE 754-2019
§5.3.3, scaleB). The references here are refnorm.exact (exact rational statistics, then mpmath at
40 digits, rounded once: independent of the oracle's code) and hand computation.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

import refnorm
from refnorm import _scaled, exact
from strategies import U, gamma, oracle_settings, record, scales

# x = (1e200, -1e200, 3e200, 0.5e200): mean 0.875e200, deviations (0.125, -1.875, 2.125, -0.375)e200,
# biased variance 8.1875e400 / 4 = 2.046875e400, so y = deviations / 1.430690e200
# = (0.0874, -1.3106, 1.4853, -0.2621) (hand computation; the values the issue quotes).
BIG = np.array([[1e200, -1e200, 3e200, 0.5e200]])
HAND_Y = np.array([[0.0874, -1.3106, 1.4853, -0.2621]])


def _ulps(got, ref) -> float:
    """max |got - ref| in units of the float64 spacing at max |ref| (numpy.spacing): the error relative
    to the output's magnitude, as the oracle's bound states it (an element much smaller than the
    largest one, from cancellation in x - mean, carries the largest one's absolute error)."""
    got, ref = np.asarray(got, float), np.asarray(ref, float)
    return float(np.max(np.abs(got - ref)) / np.spacing(max(float(np.max(np.abs(ref))), np.finfo(float).tiny)))


def test_issue_example_huge_values():
    """Layer, batch and RMS norm of BIG: NaN, NaN and 0 before the scaled evaluation; now within a
    few ulps of the exact values (refnorm.exact) and equal to the hand values to 4 digits."""
    ref_ln = exact.layer_norm(BIG, 4, eps=1e-5)
    ref_rms = exact.rms_norm(BIG, 4, eps=1e-6)
    ln = refnorm.layer_norm_forward(BIG, 4)
    bn = refnorm.batch_norm_forward(BIG.T)
    rms = refnorm.rms_norm_forward(BIG, 4)
    np.testing.assert_allclose(ln.y, HAND_Y, atol=1e-4)
    for what, got, ref in (("layer", ln.y, ref_ln.y), ("batch", bn.y.T, ref_ln.y), ("rms", rms.y, ref_rms.y),
                           ("layer rstd", ln.rstd, ref_ln.rstd), ("layer mean", ln.mean, ref_ln.mean)):
        e = _ulps(got, ref)
        record(f"range: issue example {what} | ulps", e)
        assert e <= 4, f"{what}: {e} ulps"
    # The variance itself, 2.05e400, is beyond float64's range: it rounds to inf (IEEE 754-2019
    # §4.3.1, round to nearest), as the exact path's rounding does.
    assert np.isposinf(ln.var[0]) and np.isposinf(ref_ln.var[0])


def test_issue_example_tiny_values_with_zero_eps():
    """(1, 2, 3, 4) * 1e-170 with eps = 0 gave +-inf (the variance underflowed to 0); the normalized
    values are those of (1, 2, 3, 4): (-3, -1, 1, 3) / sqrt(5) (hand computation)."""
    x = np.array([[1.0, 2.0, 3.0, 4.0]]) * 1e-170
    ref = exact.layer_norm(x, 4, eps=0.0, dy=np.array([[1.0, 0.0, 0.0, 0.0]]))
    hand = np.array([[-3.0, -1.0, 1.0, 3.0]]) / np.sqrt(5.0)
    fw = refnorm.layer_norm_forward(x, 4, eps=0.0)
    bw = refnorm.layer_norm_backward(np.array([[1.0, 0.0, 0.0, 0.0]]), x, 4, eps=0.0)
    np.testing.assert_allclose(fw.y, hand, rtol=4 * U)
    assert _ulps(fw.y, ref.y) <= 4
    assert _ulps(fw.rstd, ref.rstd) <= 4  # about 8.9e169: in range
    # dx scales by 1/s: (3, -4, -1, 2) / (5 sqrt 5) * 1e170 (see test_oracle_accuracy's worked example)
    assert _ulps(bw.dx, ref.dx) <= 16
    for fn in (lambda a: refnorm.batch_norm_forward(a.T, eps=0.0).y.T, lambda a: refnorm.rms_norm_forward(a, 4, eps=0.0).y):
        assert np.all(np.isfinite(fn(x)))


def test_no_floating_point_exception_escapes():
    """Under np.errstate(all="raise") the fast path's intermediate overflow used to raise
    FloatingPointError; the core computes with exceptions off and reports IEEE values instead."""
    with np.errstate(all="raise"):
        y = refnorm.layer_norm_forward(BIG, 4).y
        refnorm.layer_norm_backward(np.ones_like(BIG), BIG, 4)
        refnorm.batch_norm_backward(np.ones_like(BIG.T), BIG.T)
    np.testing.assert_allclose(y, HAND_Y, atol=1e-4)


def test_a_group_does_not_depend_on_its_neighbours():
    """One extreme channel does not change the other channels' bits (each group is scaled, or not,
    on its own data)."""
    rng = np.random.default_rng(3)
    x = rng.standard_normal((4, 3, 5))
    dy = rng.standard_normal(x.shape)
    wild = x.copy()
    wild[:, 1] *= 1e250
    for a, b in ((refnorm.batch_norm_forward(x).y, refnorm.batch_norm_forward(wild).y),
                 (refnorm.batch_norm_backward(dy, x).dx, refnorm.batch_norm_backward(dy, wild).dx)):
        np.testing.assert_array_equal(a[:, [0, 2]], b[:, [0, 2]])
        assert np.all(np.isfinite(b))
    ln, lw = refnorm.layer_norm_forward(x, 5), refnorm.layer_norm_forward(wild, 5)
    np.testing.assert_array_equal(ln.y[:, [0, 2]], lw.y[:, [0, 2]])


@pytest.mark.parametrize("values", ["normal", "constant", "zeros", "offset"])
def test_ordinary_data_never_takes_the_scaled_path(values, monkeypatch):
    """The scaled evaluation costs several times the fast one; data in the ordinary range, constant
    groups and all-zero groups included, must not reach it (benchmarks/bench_oracle.py measures the rest)."""
    def refuse(*a, **k):
        raise AssertionError("scaled path taken")

    monkeypatch.setattr(_scaled, "scaled_forward", refuse)
    monkeypatch.setattr(_scaled, "scaled_backward", refuse)
    rng = np.random.default_rng(5)
    x = {"normal": rng.standard_normal((6, 4, 7)), "constant": np.full((6, 4, 7), 2.5),
         "zeros": np.zeros((6, 4, 7)), "offset": 1e8 + 1e-2 * rng.standard_normal((6, 4, 7))}[values]
    dy = rng.standard_normal(x.shape)
    w = rng.normal(1.0, 0.5, 4)
    rm, rv = np.zeros(4), np.ones(4)
    refnorm.batch_norm_forward(x, w, w, running_mean=rm, running_var=rv)
    refnorm.batch_norm_forward(x, w, w, training=False, running_mean=rm, running_var=rv)
    refnorm.batch_norm_backward(dy, x, w)
    refnorm.batch_norm_backward(dy, x, w, training=False, running_mean=rm, running_var=rv)
    refnorm.group_norm_backward(dy, x, 2, w)
    refnorm.layer_norm_backward(dy, x, 7, rng.normal(1, 0.5, 7))
    refnorm.rms_norm_backward(dy, x, 7, rng.normal(1, 0.5, 7))
    refnorm.instance_norm_backward(dy, x, w)


def _scaled_scales(x, dy, red, w, *, eps, placement, center=True, training=True, mean=None, var=None):
    """strategies.scales (the error scale of each output) for data of any magnitude.

    scales() evaluates in plain float64, so it is applied to x and dy scaled by powers of two to
    magnitude 1 per group (exact, Higham 2002 §2.1), with eps scaled alike (4^k inside the root,
    2^k outside), and its results are scaled back: y is scale-invariant, dx scales by 2^(kx - kdy),
    dweight and dbias by 2^-kdy. Returns None when an error scale is beyond float64's range (then
    no float64 evaluation can be judged there).
    """
    kx = -np.frexp(np.max(np.abs(x), axis=red, keepdims=True))[1]
    if mean is not None:
        kx = np.minimum(kx, -np.frexp(np.maximum(np.abs(mean), np.finfo(float).tiny))[1])
    kd = -np.frexp(np.max(np.abs(dy), axis=red, keepdims=True))[1]
    if not (np.all(kx == kx.flat[0]) and np.all(kd == kd.flat[0])):
        raise ValueError("one scale per call: give a single group")
    kx, kd = int(kx.flat[0]), int(kd.flat[0])
    with np.errstate(all="ignore"):
        es = float(np.ldexp(eps, 2 * kx if placement == "inside" else kx))
        ms = None if mean is None else np.ldexp(mean, kx)
        vs = None if var is None else np.ldexp(var, 2 * kx)
        s = scales(np.ldexp(x, kx), np.ldexp(dy, kd), red, w, None, eps=min(es, 1e300), center=center,
                   param_axes=red, training=training, mean=ms, var=vs, placement=placement)
        out = {"y": s["y"], "dx": float(np.ldexp(s["dx"], kx - kd)),
               "dweight": float(np.ldexp(s["dweight"], -kd)), "dbias": float(np.ldexp(s["dbias"], -kd))}
    return out if all(np.isfinite(v) for v in out.values()) else None


exponents = st.integers(-1060, 1015)
eps_choices = st.sampled_from([0.0, 1e-5, 1e-300, 1e300])


@oracle_settings(40)
@given(ex=exponents, ed=st.integers(-900, 900), n=st.integers(2, 9), eps=eps_choices,
       placement=st.sampled_from(["inside", "outside"]), op=st.sampled_from(["layer", "rms", "batch"]),
       mode=st.sampled_from(["train", "eval", "saved"]), seed=st.integers(0, 2**32 - 1))
def test_extreme_range_against_exact_arithmetic(ex, ed, n, eps, placement, op, mode, seed):
    """One group of n values N(0, 1) * 2^ex (x from subnormal to near the largest float64), dy of
    size 2^ed, any eps: y, dx, dweight, dbias within the oracle's ordinary float64 bound
    gamma_{n+8} * scale (Higham 2002, §4.2; strategies.scales) of the exact values, plus a few
    units of the smallest subnormal, below which nothing is representable."""
    if placement == "outside" and eps == 0.0:
        eps = 1e-5
    if op != "batch" and mode == "eval":
        mode = "train"
    rng = np.random.default_rng(seed)
    x = np.clip(rng.standard_normal((1, n)) * 2.0**ex, -1.7e308, 1.7e308)
    dy = rng.standard_normal((1, n)) * 2.0**ed
    w = rng.normal(1.0, 0.5, n)
    center = op != "rms"
    if op == "batch":  # one channel: x of shape (n, 1)
        xb, dyb = x.T, dy.T
        kw = dict(eps=eps, eps_placement=placement)
        if mode == "eval":
            rm = rng.standard_normal(1) * 2.0**ex
            rv = np.clip(np.ldexp(rng.uniform(0.5, 2.0, 1), min(2 * ex, 1020)), 1e-300, 1e308)
            ref = exact.batch_norm(xb, w[:1], eps=eps, dy=dyb, training=False, running_mean=rm, running_var=rv,
                                   eps_placement=placement)
            fw = refnorm.batch_norm_forward(xb, w[:1], training=False, running_mean=rm, running_var=rv, **kw)
            bw = refnorm.batch_norm_backward(dyb, xb, w[:1], training=False, running_mean=rm, running_var=rv, **kw)
            sc = _scaled_scales(xb, dyb, (0,), w[None, :1], eps=eps, placement=placement, training=False,
                                mean=rm[None], var=rv[None])
            length = 1
        else:
            ref = exact.batch_norm(xb, w[:1], eps=eps, dy=dyb, eps_placement=placement)
            fw = refnorm.batch_norm_forward(xb, w[:1], **kw)
            saved = dict(mean=ref.mean, rstd=ref.rstd) if mode == "saved" else {}
            if saved and not (np.isfinite(ref.rstd).all() and (ref.rstd > 0).all()):
                return  # the exact rstd is itself beyond float64's range: nothing to save
            bw = refnorm.batch_norm_backward(dyb, xb, w[:1], **kw, **saved)
            sc = _scaled_scales(xb, dyb, (0,), w[None, :1], eps=eps, placement=placement)
            length = n
        got = {"y": fw.y, "dx": bw.dx, "dweight": bw.dweight, "dbias": bw.dbias}
    else:
        ex_fn = exact.layer_norm if center else exact.rms_norm
        ref = ex_fn(x, n, w, eps=eps, dy=dy, eps_placement=placement)
        fwd = refnorm.layer_norm_forward if center else refnorm.rms_norm_forward
        bwd = refnorm.layer_norm_backward if center else refnorm.rms_norm_backward
        saved = {}
        if mode == "saved":
            if not (np.isfinite(ref.rstd).all() and (ref.rstd > 0).all()):
                return
            saved = dict(mean=ref.mean, rstd=ref.rstd) if center else dict(rstd=ref.rstd)
        fw = fwd(x, n, w, eps=eps, eps_placement=placement)
        bw = bwd(dy, x, n, w, eps=eps, eps_placement=placement, **saved)
        sc = _scaled_scales(x, dy, (1,), w[None], eps=eps, placement=placement, center=center)
        got = {"y": fw.y, "dx": bw.dx, "dweight": bw.dweight, "dbias": bw.dbias}
        length = n
    if sc is None:
        return
    # saved statistics are themselves rounded once: they add a few roundings to dx (factor 4)
    slack = 4.0 if mode == "saved" else 1.0
    for name, g in got.items():
        r = getattr(ref, name)
        m = length if name in ("y", "dx") else n
        bound = slack * gamma(m + 8) * sc[name] + 4 * 2.0**-1074
        assert np.all(np.isfinite(g)) or np.array_equal(g, r), f"{op} {mode} {name}: {g} vs exact {r}"
        with np.errstate(invalid="ignore", over="ignore"):
            diff = np.abs(np.asarray(g) - np.asarray(r))
            used = float(np.max(diff / bound)) if np.all(np.isfinite(diff)) else 0.0
        record(f"range: {op} {name} | bound used", used)
        assert used <= 1.0, f"{op} {mode} {name}: |oracle - exact| = {diff.max():.3e} > bound {bound:.3e}"


def test_mixed_magnitude_channels_against_exact():
    """Three channels of magnitudes 1e-300, 1 and 1e300 in one call, train and eval: each channel
    within a few ulps of the exact y, and dx within the bound (refnorm.exact)."""
    rng = np.random.default_rng(11)
    x = rng.standard_normal((5, 3, 4)) * np.array([1e-300, 1.0, 1e300])[None, :, None]
    dy = rng.standard_normal(x.shape)
    ref = exact.batch_norm(x, eps=1e-5, dy=dy)
    fw, bw = refnorm.batch_norm_forward(x, eps=1e-5), refnorm.batch_norm_backward(dy, x, eps=1e-5)
    for c in range(3):
        assert _ulps(fw.y[:, c], ref.y[:, c]) <= 8, c
        sc = _scaled_scales(x[:, c:c + 1], dy[:, c:c + 1], (0, 2), None, eps=1e-5, placement="inside")
        assert np.max(np.abs(bw.dx[:, c] - ref.dx[:, c])) <= gamma(28) * sc["dx"] + 4 * 2.0**-1074, c


def test_running_variance_of_wide_data():
    """1000 values of size 2^508: the unbiased variance (about 2^1016) is in range although M2 = n var
    is not; the running update used to get inf. Reference: exact rational variance (refnorm.exact)."""
    rng = np.random.default_rng(2)
    x = rng.standard_normal((1000, 1)) * 2.0**508
    out = refnorm.batch_norm_forward(x, running_mean=np.zeros(1), running_var=np.zeros(1), momentum=1.0)
    want = float(exact.exact_var(x[:, 0], ddof=1))
    assert np.isfinite(want)
    assert _ulps(out.running_var, [want]) <= 8
    assert _ulps(out.var, [float(exact.exact_var(x[:, 0]))]) <= 8
