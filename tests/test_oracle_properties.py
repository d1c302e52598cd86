"""Properties of the oracle that follow from the mathematics, checked on generated cases.

* Backward against central finite differences of the forward.
* Gradient identities per normalization group (from shift and scale invariance).
* Invariances: a per-channel constant before train-mode batch norm; positive scaling.
* Moments of the normalized output (exact, via refnorm.exact).
* Equivalences: layer norm = group norm with one group, instance norm = group
  norm with C groups, channels-last = channels-first after moveaxis.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction

import numpy as np
from hypothesis import assume, given
from hypothesis import strategies as st

import refnorm
from refnorm import exact
from strategies import (
    U,
    channel_cases,
    check_agreement,
    feature_cases,
    gamma,
    layouts,
    oracle_settings,
    record,
    scales,
    seeds,
    shapes,
)

# --------------------------------------------------------------------------- the ops, uniformly


@dataclass(frozen=True)
class Op:
    """One operation on channels-first x (N, C, *S) or, for layer/RMS norm, over the trailing k axes."""

    name: str
    groups: int = 1
    k: int = 1
    training: bool = True

    @property
    def center(self) -> bool:
        return self.name != "rms"

    def _kw(self, eps, placement):
        return {"eps": eps, "eps_placement": placement}

    def forward(self, x, w, b, eps, placement="inside", axis=1, stats=None):
        kw = self._kw(eps, placement)
        if self.name == "batch":
            if not self.training:
                kw.update(training=False, running_mean=stats[0], running_var=stats[1])
            return refnorm.batch_norm_forward(x, w, b, axis=axis, **kw)
        if self.name == "group":
            return refnorm.group_norm_forward(x, self.groups, w, b, axis=axis, **kw)
        if self.name == "instance":
            return refnorm.instance_norm_forward(x, w, b, axis=axis, **kw)
        ns = x.shape[x.ndim - self.k:]
        if self.name == "layer":
            return refnorm.layer_norm_forward(x, ns, w, b, **kw)
        return refnorm.rms_norm_forward(x, ns, w, b, **kw)

    def backward(self, dy, x, w, eps, placement="inside", axis=1, stats=None):
        kw = self._kw(eps, placement)
        if self.name == "batch":
            if not self.training:
                kw.update(training=False, running_mean=stats[0], running_var=stats[1])
            return refnorm.batch_norm_backward(dy, x, w, axis=axis, **kw)
        if self.name == "group":
            return refnorm.group_norm_backward(dy, x, self.groups, w, axis=axis, **kw)
        if self.name == "instance":
            return refnorm.instance_norm_backward(dy, x, w, axis=axis, **kw)
        ns = x.shape[x.ndim - self.k:]
        if self.name == "layer":
            return refnorm.layer_norm_backward(dy, x, ns, w, **kw)
        return refnorm.rms_norm_backward(dy, x, ns, w, **kw)

    def rows(self, a):
        """(statistics, elements per statistic): row j holds the elements normalized together."""
        if self.name == "batch":
            return np.moveaxis(a, 1, 0).reshape(a.shape[1], -1)
        if self.name == "instance":
            return a.reshape(a.shape[0] * a.shape[1], -1)
        if self.name == "group":
            return a.reshape(a.shape[0] * self.groups, -1)
        return a.reshape(-1, math.prod(a.shape[a.ndim - self.k:]))

    def param_full(self, p, shape):
        """A (C,) or normalized-shape parameter broadcast to x's shape (ones for None)."""
        if p is None:
            return np.ones(shape)
        if self.name in ("layer", "rms"):
            return np.broadcast_to(p, shape)
        return np.broadcast_to(p.reshape((1, -1) + (1,) * (len(shape) - 2)), shape)

    def stat_rows(self, s):
        return np.asarray(s).reshape(-1, 1)

    def scales(self, x, dy, w, b, eps):
        """strategies.scales in a view where the statistic reduces over whole axes."""
        xv, dyv = self.rows(x), self.rows(dy)
        wv = None if w is None else self.rows(self.param_full(w, x.shape))
        bv = None if b is None else self.rows(self.param_full(b, x.shape))
        return scales(xv, dyv, (1,), wv, bv, eps=eps, param_axes=(0, 1), center=self.center)

    def n_of(self, x) -> int:
        """Elements per statistic."""
        return self.rows(x).shape[1]


def _channel_op(name, case):
    return Op(name, groups=case.groups if name == "group" else 1)


eps_any = st.sampled_from([1e-5, 1e-3, 0.1, 0.0])
eps_positive = st.sampled_from([1e-5, 1e-3, 0.1])
placements = st.sampled_from(["inside", "outside"])

# --------------------------------------------------------------------------- finite differences


@dataclass(frozen=True)
class SmoothCase:
    x: np.ndarray
    dy: np.ndarray
    w: np.ndarray
    b: np.ndarray
    scale: float
    seed: int


@st.composite
def smooth_cases(draw, min_rank=2, min_per_stat=3):
    """Small, well-scaled cases for finite differences: one spread ``scale`` for every element."""
    shape = draw(shapes(min_rank, 4, max_size=60, min_side=1))
    if min_rank >= 3 and math.prod(shape[2:]) < min_per_stat:
        shape = shape[:-1] + (min_per_stat,)
    if shape[0] * math.prod(shape[2:]) < min_per_stat:
        shape = (min_per_stat,) + shape[1:]
    seed = draw(seeds)
    rng = np.random.default_rng(seed)
    scale = 10.0 ** draw(st.integers(-2, 2))
    loc = draw(st.sampled_from([0.0, 1.0, -2.0])) * scale
    x = rng.normal(loc, scale, shape)
    c = shape[1]
    return SmoothCase(x, rng.normal(0, 1, shape), rng.normal(1, 0.5, c), rng.normal(0, 1, c), scale, seed)


# Central differences: error <= h^2/6 max|L'''| (truncation) + eps_L / h (rounding of L)
# (Nocedal & Wright 2006, Numerical Optimization, 2nd ed., §8.1).
# With the step a fixed multiple of the data's spread s, h = u^(1/3) s balances the two:
# both terms are then O(u^(2/3)) times the natural size S of the directional derivative
# (S = sum|dy| * r, each output's derivative along a unit-size direction being O(r)),
# since each derivative of x_hat in x brings a factor 1/s ~ r. The constant K = 2000
# covers the third-derivative and rounding constants (measured here: up to about 75).
FD_K = 2000.0
FD_H = U ** (1.0 / 3.0)


def _fd_check(loss, x0, v, analytic, s, scale_S, what):
    h = FD_H * s
    fd = (loss(x0 + h * v) - loss(x0 - h * v)) / (2 * h)
    err = abs(fd - analytic)
    bound = FD_K * U ** (2.0 / 3.0) * scale_S
    record("finite differences: |fd - analytic| / (u^(2/3) S)", err / (U ** (2.0 / 3.0) * scale_S))
    assert err <= bound, f"{what}: |fd - analytic| = {err:.3e} > {bound:.3e} (fd {fd:.6e}, analytic {analytic:.6e})"
    return err / scale_S


@oracle_settings(25)
@given(op_name=st.sampled_from(["batch", "batch_eval", "group", "instance"]),
       eps=eps_positive, placement=placements, affine=st.booleans(), data=st.data())
def test_channel_backward_matches_finite_differences(op_name, eps, placement, affine, data):
    """dx, dweight, dbias of batch (train/eval), group and instance norm along random directions."""
    case = data.draw(smooth_cases(min_rank=3 if op_name == "instance" else 2))
    c = case.x.shape[1]
    groups = data.draw(st.sampled_from([g for g in range(1, c + 1) if c % g == 0])) if op_name == "group" else 1
    op = Op("batch" if op_name.startswith("batch") else op_name, groups=groups, training=op_name != "batch_eval")
    rng = np.random.default_rng(case.seed + 2)
    stats = None
    if not op.training:
        stats = (rng.normal(0, case.scale, c), rng.uniform(0.5, 2, c) * case.scale**2)
    w = case.w if affine else None
    b = case.b if affine else None
    x, dy = case.x, case.dy
    bw = op.backward(dy, x, w, eps, placement, stats=stats)
    fw = op.forward(x, w, b, eps, placement, stats=stats)
    r = float(np.max(fw.rstd))
    S = float(np.sum(np.abs(dy))) * r * (1.0 if w is None else float(np.max(np.abs(w))))
    for j in range(2):
        v = rng.normal(0, 1, x.shape)
        _fd_check(lambda xx: float(np.dot(dy.ravel(), op.forward(xx, w, b, eps, placement, stats=stats).y.ravel())),
                  x, v, float(np.dot(bw.dx.ravel(), v.ravel())), case.scale, S, f"{op_name} dx (direction {j})")
    # y is affine in weight and bias: the central difference is exact up to rounding, any step works.
    vw = rng.normal(0, 1, c)
    w0 = case.w if affine else np.ones(c)
    b0 = case.b if affine else np.zeros(c)
    xhat = op.forward(x, None, None, eps, placement, stats=stats).y
    Sw = float(np.sum(np.abs(dy * xhat)))
    _fd_check(lambda ww: float(np.dot(dy.ravel(), op.forward(x, ww, b0, eps, placement, stats=stats).y.ravel())),
              w0, vw, float(np.dot(bw.dweight, vw)), 1.0, Sw, f"{op_name} dweight")
    _fd_check(lambda bb: float(np.dot(dy.ravel(), op.forward(x, w0, bb, eps, placement, stats=stats).y.ravel())),
              b0, vw, float(np.dot(bw.dbias, vw)), 1.0, float(np.sum(np.abs(dy))), f"{op_name} dbias")


@oracle_settings(25)
@given(case=smooth_cases(), op_name=st.sampled_from(["layer", "rms"]), eps=eps_positive, placement=placements,
       affine=st.booleans(), data=st.data())
def test_feature_backward_matches_finite_differences(case, op_name, eps, placement, affine, data):
    """dx, dweight, dbias of layer and RMS norm over the trailing k axes along random directions."""
    ks = [k for k in range(1, case.x.ndim) if math.prod(case.x.shape[case.x.ndim - k:]) >= 2]
    assume(ks)
    k = data.draw(st.sampled_from(ks))
    op = Op(op_name, k=k)
    ns = case.x.shape[case.x.ndim - k:]
    rng = np.random.default_rng(case.seed + 3)
    w = rng.normal(1, 0.5, ns) if affine else None
    b = rng.normal(0, 1, ns) if affine else None
    x, dy = case.x, case.dy
    fw = op.forward(x, w, b, eps, placement)
    bw = op.backward(dy, x, w, eps, placement)
    r = float(np.max(fw.rstd))
    S = float(np.sum(np.abs(dy))) * r * (1.0 if w is None else float(np.max(np.abs(w))))
    for j in range(2):
        v = rng.normal(0, 1, x.shape)
        _fd_check(lambda xx: float(np.dot(dy.ravel(), op.forward(xx, w, b, eps, placement).y.ravel())),
                  x, v, float(np.dot(bw.dx.ravel(), v.ravel())), case.scale, S, f"{op_name} dx (direction {j})")
    vw = rng.normal(0, 1, ns)
    w0 = np.ones(ns) if w is None else w
    b0 = np.zeros(ns) if b is None else b
    xhat = op.forward(x, None, None, eps, placement).y
    Sw = float(np.sum(np.abs(dy * xhat)))
    _fd_check(lambda ww: float(np.dot(dy.ravel(), op.forward(x, ww, b0, eps, placement).y.ravel())),
              w0, vw, float(np.sum(bw.dweight * vw)), 1.0, Sw, f"{op_name} dweight")
    _fd_check(lambda bb: float(np.dot(dy.ravel(), op.forward(x, w0, bb, eps, placement).y.ravel())),
              b0, vw, float(np.sum(bw.dbias * vw)), 1.0, float(np.sum(np.abs(dy))), f"{op_name} dbias")


# --------------------------------------------------------------------------- gradient identities


def _identity_check(op, x, dy, w, eps, fw, bw):
    """Per group, with g = dy * w and x_hat the normalized input (Derivation, common calculus):

    shift invariance y(x + t 1) = y(x) gives sum dx = 0 (centered ops only);
    y(a x; eps) = y(x; eps / a^2) gives sum dx * x = -2 eps dL/deps, which works out to
        sum dx * x_hat = r * eps / (v + eps) * sum g * x_hat
    (v: variance, or mean square for RMS norm), = 0 at eps = 0: the scale invariance of
    Ioffe & Szegedy 2015, §3.3 (back-propagation through batch norm is unaffected by the scale of its input)
    and of Zhang & Sennrich 2019, §3 (RMSNorm's re-scaling invariance; section from memory).
    """
    n = op.n_of(x)
    xr, dxr, gr = op.rows(x), op.rows(bw.dx), op.rows(dy * op.param_full(w, x.shape))
    mean = np.zeros((xr.shape[0], 1)) if not op.center else op.stat_rows(fw.mean)
    r = op.stat_rows(fw.rstd)
    v = op.stat_rows(fw.var)
    xh = (xr - mean) * r
    sc = op.scales(x, dy, w, None, eps)
    # Each dx_i is within gamma_{n+8} sc["dx"] of exact, each x_hat_i within gamma_{n+8} sc["y"];
    # n of them are summed (Higham 2002, §4.2): bounds per group.
    g_ = gamma(n + 8)
    if op.center:
        s1 = np.sum(dxr, axis=1)
        bound1 = 2 * n * g_ * sc["dx"]
        assert np.all(np.abs(s1) <= bound1), f"{op.name}: sum dx = {np.max(np.abs(s1)):.3e} > {bound1:.3e}"
    lhs = np.sum(dxr * xh, axis=1)
    rhs = (r * eps / (v + eps)).ravel() * np.sum(gr * xh, axis=1)
    mag_xh = float(np.max((np.abs(xr) + np.abs(mean)) * r))
    bound2 = 4 * n * g_ * (sc["dx"] * mag_xh + float(np.max(np.abs(dxr))) * sc["y"]
                          + float(np.max(r)) * float(np.max(np.abs(gr))) * mag_xh)
    record(f"identity {op.name}: bound used", float(np.max(np.abs(lhs - rhs) / bound2)))
    assert np.all(np.abs(lhs - rhs) <= bound2), (
        f"{op.name}: sum dx*x_hat - r eps/(v+eps) sum g*x_hat = {np.max(np.abs(lhs - rhs)):.3e} > {bound2:.3e}")
    return np.max(np.abs(lhs - rhs)) / bound2


def _cases_for(op_name, **kw):
    """channel_cases with at least two elements per statistic of ``op_name``."""
    per_stat = {"batch": "batch", "group": "group", "instance": "instance"}[op_name]
    return channel_cases(min_rank=3 if op_name == "instance" else kw.pop("min_rank", 2), per_stat=per_stat,
                         with_groups=op_name == "group", **kw)


@oracle_settings(30)
@given(op_name=st.sampled_from(["batch", "group", "instance"]), data=st.data())
def test_gradient_identities_channel_ops(op_name, data):
    """sum dx = 0 and sum dx * x_hat = r eps/(v+eps) sum g x_hat per group (train mode)."""
    case = data.draw(_cases_for(op_name, eps=eps_any))
    op = _channel_op(op_name, case)
    x, dy = case.x, case.dy
    fw = op.forward(x, case.weight, None, case.eps)
    bw = op.backward(dy, x, case.weight, case.eps)
    _identity_check(op, x, dy, case.weight, case.eps, fw, bw)


@oracle_settings(30)
@given(case=feature_cases(eps=eps_any), op_name=st.sampled_from(["layer", "rms"]))
def test_gradient_identities_feature_ops(case, op_name):
    """Layer norm: both identities; RMS norm: the scale identity only (no centering, no shift invariance)."""
    op = Op(op_name, k=case.k)
    fw = op.forward(case.x, case.weight, None, case.eps)
    bw = op.backward(case.dy, case.x, case.weight, case.eps)
    _identity_check(op, case.x, case.dy, case.weight, case.eps, fw, bw)


# --------------------------------------------------------------------------- invariances


@oracle_settings(30)
@given(case=channel_cases(per_stat="batch", eps=eps_any), shift_seed=seeds)
def test_channel_constant_before_train_batch_norm_changes_nothing(case, shift_seed):
    """x + t_c per channel leaves train-mode batch norm's y and dx unchanged: the mean absorbs it
    (Ioffe & Szegedy 2015, §3.2: a preceding layer's bias is cancelled by the mean subtraction)."""
    c = case.x.shape[1]
    spread = np.std(np.moveaxis(case.x, 1, 0).reshape(c, -1), axis=1)
    t = np.random.default_rng(shift_seed).uniform(-10, 10, c) * np.where(spread > 0, spread, 1.0)
    xs = case.x + t.reshape((1, c) + (1,) * (case.x.ndim - 2))
    n = case.x.size // c
    y0 = refnorm.batch_norm_forward(case.view(case.x), case.weight, case.bias, axis=case.axis, eps=case.eps).y
    y1 = refnorm.batch_norm_forward(case.view(xs), case.weight, case.bias, axis=case.axis, eps=case.eps).y
    d0 = refnorm.batch_norm_backward(case.view(case.dy), case.view(case.x), case.weight, axis=case.axis, eps=case.eps).dx
    d1 = refnorm.batch_norm_backward(case.view(case.dy), case.view(xs), case.weight, axis=case.axis, eps=case.eps).dx
    axes = (0,) + tuple(range(2, case.x.ndim))
    ch = lambda a: None if a is None else a.reshape((1, c) + (1,) * (case.x.ndim - 2))  # noqa: E731
    # Rounding x + t moves each element by <= u|x + t|; the shifted input's error scales cover it.
    sc = scales(xs, case.dy, axes, ch(case.weight), ch(case.bias), eps=case.eps)
    check_agreement(y1, y0, n, sc["y"], "shift invariance y")
    check_agreement(d1, d0, n, sc["dx"], "shift invariance dx")


def _scale_ops():
    return st.sampled_from(["batch", "group", "instance", "layer", "rms"])


@oracle_settings(30)
@given(op_name=_scale_ops(), k=st.integers(-6, 6), placement=placements, data=st.data())
def test_power_of_two_scaling_is_exact(op_name, k, placement, data):
    """y(2^k x; eps) == y(x; eps') and dx(2^k x; eps) == dx(x; eps') / 2^k bit for bit, with
    eps' = eps / 4^k (eps inside the root: (a x - a m) / sqrt(a^2 v + eps) = (x - m) / sqrt(v + eps/a^2))
    or eps / 2^k (eps added to the standard deviation). Scaling by a power of two commutes with every
    IEEE 754 operation absent over/underflow (IEEE 754-2019 §4.3: results are the rounded exact values,
    and rounding commutes with scaling by 2^k)."""
    case = data.draw(_cases_for(op_name if op_name in ("batch", "group", "instance") else "batch", eps=eps_any))
    a = 2.0**k
    eps2 = case.eps / a**2 if placement == "inside" else case.eps / a
    op = Op(op_name, groups=case.groups, k=case.x.ndim - 1) if op_name != "instance" else Op("instance")
    x, dy = case.x, case.dy
    if op_name in ("layer", "rms"):  # the per-channel parameters, as elementwise ones over (C, *S)
        w = None if case.weight is None else Op("batch").param_full(case.weight, x.shape)[0]
        b = None if case.bias is None else Op("batch").param_full(case.bias, x.shape)[0]
    else:
        w, b = case.weight, case.bias
    fa = op.forward(a * x, w, b, case.eps, placement)
    f1 = op.forward(x, w, b, eps2, placement)
    np.testing.assert_array_equal(fa.y, f1.y)
    ba = op.backward(dy, a * x, w, case.eps, placement)
    b1 = op.backward(dy, x, w, eps2, placement)
    np.testing.assert_array_equal(ba.dx, b1.dx / a)
    np.testing.assert_array_equal(ba.dweight, b1.dweight)
    np.testing.assert_array_equal(ba.dbias, b1.dbias)


@oracle_settings(25)
@given(case=feature_cases(eps=eps_any), a=st.floats(0.01, 100.0))
def test_positive_scaling_equals_rescaled_eps(case, a):
    """Any a > 0: layer norm y(a x; eps) = y(x; eps / a^2) up to the rounding of a x and eps / a^2."""
    op = Op("layer", k=case.k)
    ya = op.forward(a * case.x, case.weight, case.bias, case.eps).y
    y1 = op.forward(case.x, case.weight, case.bias, case.eps / a**2).y
    n = math.prod(case.normalized_shape)
    sc = op.scales(case.x, case.dy, case.weight, case.bias, case.eps / a**2)
    check_agreement(ya, y1, n + 2, sc["y"], "positive scaling y")  # +2: the roundings of a x and eps / a^2


@oracle_settings(25)
@given(case=channel_cases(per_stat="group", with_groups=True, eps=eps_any, min_rank=2),
       op_name=st.sampled_from(["batch", "group", "layer"]))
def test_normalized_output_moments(case, op_name):
    """Without affine parameters the output of each group has mean 0 and biased variance
    v / (v + eps) exactly (Ioffe & Szegedy 2015, Alg. 1: the normalize step; v the group's biased
    variance). Moments of the oracle's float64 y are taken exactly (refnorm.exact)."""
    op = Op(op_name, groups=case.groups, k=case.x.ndim - 1)
    x = case.x
    assume(op.n_of(x) >= 2)
    y = op.forward(x, None, None, case.eps).y
    yr, xr = op.rows(y), op.rows(x)
    n = xr.shape[1]
    sc = op.scales(x, case.dy, None, None, case.eps)
    g_ = gamma(n + 8)
    for j in range(xr.shape[0]):
        v = exact.exact_var(xr[j])
        target = v / (v + Fraction(case.eps)) if v + Fraction(case.eps) > 0 else Fraction(0)
        my = exact.exact_mean(yr[j])
        vy = exact.exact_var(yr[j])
        # Each y_i is within gamma_{n+8} sc["y"] of exact: so is their mean; the variance moves by
        # at most 2 max|y| times that (plus its square).
        assert abs(float(my)) <= g_ * sc["y"], f"group {j}: mean(y) = {float(my):.3e}"
        e = g_ * sc["y"]
        assert abs(float(vy - target)) <= 2 * float(np.max(np.abs(yr[j]))) * e + e * e, (
            f"group {j}: var(y) - v/(v+eps) = {float(vy - target):.3e}")


# --------------------------------------------------------------------------- equivalences


@oracle_settings(30)
@given(case=channel_cases(per_stat="group", eps=eps_any))
def test_layer_norm_over_all_axes_is_group_norm_with_one_group(case):
    """Layer norm over (C, *S) with the per-channel weight broadcast = group norm with G = 1
    (Wu & He 2018, §3.1, section from memory: with G = 1 group norm is layer norm)."""
    x, dy = case.x, case.dy
    nd, c = x.ndim, x.shape[1]
    ns = x.shape[1:]
    full = lambda p: None if p is None else np.broadcast_to(p.reshape((c,) + (1,) * (nd - 2)), ns).copy()  # noqa
    ln = refnorm.layer_norm_forward(x, ns, full(case.weight), full(case.bias), eps=case.eps)
    gn = refnorm.group_norm_forward(x, 1, case.weight, case.bias, eps=case.eps)
    n = x.size // x.shape[0]
    sc = Op("group", 1).scales(x, dy, case.weight, case.bias, case.eps)
    check_agreement(ln.y, gn.y, n, sc["y"], "LN = GN(1) y")
    check_agreement(ln.mean, gn.mean.reshape(-1), n, sc["mean"], "LN = GN(1) mean")
    lb = refnorm.layer_norm_backward(dy, x, ns, full(case.weight), eps=case.eps)
    gb = refnorm.group_norm_backward(dy, x, 1, case.weight, eps=case.eps)
    check_agreement(lb.dx, gb.dx, n, sc["dx"], "LN = GN(1) dx")
    spatial_axes = tuple(range(1, nd - 1))
    check_agreement(np.sum(lb.dweight, axis=spatial_axes), gb.dweight, x.size, sc["dweight"], "LN = GN(1) dweight")


@oracle_settings(30)
@given(case=channel_cases(min_rank=3, per_stat="instance", eps=eps_any))
def test_instance_norm_is_group_norm_with_c_groups(case):
    """Instance norm = group norm with G = C (Wu & He 2018, §3.1, section from memory: with G = C it is instance norm)."""
    c = case.x.shape[1]
    x, dy = case.view(case.x), case.view(case.dy)
    inn = refnorm.instance_norm_forward(x, case.weight, case.bias, axis=case.axis, eps=case.eps)
    gn = refnorm.group_norm_forward(x, c, case.weight, case.bias, axis=case.axis, eps=case.eps)
    n = case.x.size // (case.x.shape[0] * c)
    sc = Op("instance").scales(case.x, case.dy, case.weight, case.bias, case.eps)
    check_agreement(inn.y, gn.y, n, sc["y"], "IN = GN(C) y")
    check_agreement(inn.rstd, gn.rstd, n, sc["rstd"], "IN = GN(C) rstd")
    ib = refnorm.instance_norm_backward(dy, x, case.weight, axis=case.axis, eps=case.eps)
    gb = refnorm.group_norm_backward(dy, x, c, case.weight, axis=case.axis, eps=case.eps)
    check_agreement(ib.dx, gb.dx, n, sc["dx"], "IN = GN(C) dx")
    check_agreement(ib.dweight, gb.dweight, case.x.size, sc["dweight"], "IN = GN(C) dweight")


@oracle_settings(30)
@given(op_name=st.sampled_from(["batch", "group", "instance"]), last_axis=layouts, data=st.data())
def test_channels_last_equals_channels_first(op_name, last_axis, data):
    """The same op on moveaxis(x, 1, -1) with axis=-1 (or, for "first", on a channel axis moved to
    position 1 from the middle) equals channels-first after moving back: layout is storage only
    (common practice)."""
    case = data.draw(_cases_for(op_name, eps=eps_any))
    x, dy = case.x, case.dy
    op = _channel_op(op_name, case)
    if last_axis == "last" or x.ndim < 4 or op_name == "group":
        to = lambda a: np.moveaxis(a, 1, -1)  # noqa: E731
        back = lambda a: np.moveaxis(a, -1, 1)  # noqa: E731
        ax = -1
    else:  # batch and instance norm take any channel axis: try the middle one
        to = lambda a: np.moveaxis(a, 1, 2)  # noqa: E731
        back = lambda a: np.moveaxis(a, 2, 1)  # noqa: E731
        ax = 2
    f_first = op.forward(x, case.weight, case.bias, case.eps)
    f_last = op.forward(to(x), case.weight, case.bias, case.eps, axis=ax)
    sc = op.scales(x, dy, case.weight, case.bias, case.eps)
    n = op.n_of(x)
    check_agreement(back(f_last.y), f_first.y, n, sc["y"], "layout y")
    check_agreement(f_last.rstd, f_first.rstd, n, sc["rstd"], "layout rstd")
    b_first = op.backward(dy, x, case.weight, case.eps)
    b_last = op.backward(to(dy), to(x), case.weight, case.eps, axis=ax)
    check_agreement(back(b_last.dx), b_first.dx, n, sc["dx"], "layout dx")
    check_agreement(b_last.dweight, b_first.dweight, x.size, sc["dweight"], "layout dweight")
    check_agreement(b_last.dbias, b_first.dbias, x.size, sc["dbias"], "layout dbias")
