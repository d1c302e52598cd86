"""Derived tolerances: the summation models against published bounds, and the per-output bounds
against emulated kernels.

The emulated kernels below are NumPy programs that round every operation to a
chosen format (float32, bfloat16 via ml_dtypes), with the reduction orders real
kernels use: sequential, a balanced tree, and blocked (256 strided lanes summed
sequentially, then a tree: the shape of a GPU block reduction, common practice).
Correct kernels (two-pass or Welford variance, the textbook gradient) must pass
with budget well below 1; kernels with a known numerical defect (one-pass
variance, eps outside the root, parameter gradients accumulated in bfloat16)
must fail by at least 10x. torch's CPU kernels serve as independent correct
kernels. Data sets are seeded draws made up for these tests.
"""

from __future__ import annotations

import math
import sys

import numpy as np
import pytest

from conformance import dtypes, ops
from conformance.cases.model import Case
from conformance.compare import compare_output
from conformance.kernel import Conventions, Precision
from conformance.tolerances import Bound, derive_bounds, gamma, output_dtype, override_bound, probability
from conformance.tolerances.summation import lam_for, worst_gamma

U32 = 2.0**-24  # IEEE 754-2019 binary32: p = 24
U16 = 2.0**-11  # IEEE 754-2019 binary16: p = 11
UBF = 2.0**-8   # bfloat16: 8 significand bits (Google's bfloat16 definition; Intel BF16 whitepaper 2018)

#: (mean, spread) of the cancellation data per storage format (kappa = sqrt(1 + mean^2/spread^2),
#: Chan, Golub & LeVeque 1983): chosen for these tests, with the spread still many ULPs of the mean.
CANCEL = {"float32": (1e4, 1e-1), "float16": (2000.0, 8.0), "bfloat16": (1000.0, 16.0)}


# =============================================================================== emulated kernels
def _dt(name: str) -> np.dtype:
    return dtypes.dtype_of(name)


def _tree(a: np.ndarray, A) -> np.ndarray:
    """Balanced pairwise summation along the last axis, every addition rounded to A."""
    while a.shape[-1] > 1:
        if a.shape[-1] % 2:
            a = np.concatenate([a, np.zeros(a.shape[:-1] + (1,), A)], axis=-1)
        a = (a[..., 0::2] + a[..., 1::2]).astype(A)
    return a[..., 0]


def vsum(a: np.ndarray, acc: str, how: str, axis: int = -1) -> np.ndarray:
    """Sum along ``axis`` with every addition rounded to ``acc``: seq | tree | blocked."""
    A = _dt(acc)
    a = np.moveaxis(np.asarray(a).astype(A), axis, -1)
    n = a.shape[-1]
    if how == "seq":  # np.add.accumulate is strictly sequential
        return np.cumsum(a, axis=-1, dtype=A)[..., -1]
    if how == "tree":
        return _tree(a, A)
    if how == "blocked":
        lanes = 256
        if n <= lanes:
            return np.cumsum(a, axis=-1, dtype=A)[..., -1]
        pad = (-n) % lanes
        a = np.concatenate([a, np.zeros(a.shape[:-1] + (pad,), A)], axis=-1)
        part = np.cumsum(a.reshape(a.shape[:-1] + (-1, lanes)), axis=-2, dtype=A)[..., -1, :]
        return _tree(part, A)
    raise ValueError(how)


def welford(X: np.ndarray, acc: str, lanes: int = 256) -> tuple[np.ndarray, np.ndarray]:
    """Welford's update per lane over strided elements, then Chan, Golub & LeVeque's pairwise combine.

    Rows of X are groups; returns (mean, biased var) rounded to ``acc`` at every operation.
    """
    A = _dt(acc)
    X = X.astype(A)
    G, n = X.shape
    lanes = min(lanes, n)
    pad = (-n) % lanes
    steps = (n + pad) // lanes
    Xp = np.concatenate([X, np.zeros((G, pad), A)], axis=1).reshape(G, steps, lanes)
    valid = np.arange(n + pad).reshape(steps, lanes) < n
    mean = np.zeros((G, lanes), A)
    m2 = np.zeros((G, lanes), A)
    cnt = np.zeros(lanes, np.int64)
    for k in range(steps):
        v = valid[k]
        cnt = cnt + v
        xk = Xp[:, k, :]
        d = (xk - mean).astype(A)
        c = np.where(cnt > 0, cnt, 1).astype(A)
        new = np.where(v, (mean + (d / c).astype(A)).astype(A), mean)
        m2 = np.where(v, (m2 + (d * (xk - new).astype(A)).astype(A)).astype(A), m2)
        mean = new
    cnt = np.broadcast_to(cnt.astype(A), (G, lanes)).copy()
    while mean.shape[1] > 1:
        if mean.shape[1] % 2:
            z = np.zeros((G, 1), A)
            mean, m2, cnt = (np.concatenate([q, z], 1) for q in (mean, m2, cnt))
        na, nb = cnt[:, 0::2], cnt[:, 1::2]
        nn = (na + nb).astype(A)
        safe = np.where(nn > 0, nn, 1).astype(A)
        delta = (mean[:, 1::2] - mean[:, 0::2]).astype(A)
        mean = (mean[:, 0::2] + (delta * (nb / safe).astype(A)).astype(A)).astype(A)
        m2 = (m2[:, 0::2] + m2[:, 1::2] + (delta * delta * (na * nb / safe).astype(A)).astype(A)).astype(A)
        cnt = nn
    return mean[:, 0], (m2[:, 0] / A.type(n)).astype(A)


def group_rows(case: Case, a: np.ndarray) -> np.ndarray:
    """(statistics, n) matrix of an elementwise array: one row per normalization group."""
    if case.op in ("layer_norm", "rms_norm"):
        return a.reshape(-1, case.group_length)
    if case.op == "batch_norm":
        return np.moveaxis(a, case.channel_axis, 0).reshape(case.channels, -1)
    cf = np.moveaxis(a, case.channel_axis, 1)
    g = case.channels if case.op == "instance_norm" else case.groups
    return cf.reshape(case.shape[0] * g, -1)


def ungroup(case: Case, M: np.ndarray) -> np.ndarray:
    if case.op in ("layer_norm", "rms_norm"):
        return M.reshape(case.shape)
    ca = case.channel_axis
    cf_shape = (case.shape[0], case.channels) + tuple(s for i, s in enumerate(case.shape) if i not in (0, ca))
    if case.op == "batch_norm":
        moved = (case.channels,) + tuple(s for i, s in enumerate(case.shape) if i != ca)
        return np.moveaxis(M.reshape(moved), 0, ca)
    return np.moveaxis(M.reshape(cf_shape), 1, ca)


def param_rows(case: Case, a: np.ndarray) -> np.ndarray:
    """(parameters, m) matrix: the terms of each dweight/dbias sum."""
    if case.op in ("layer_norm", "rms_norm"):
        return a.reshape(-1, math.prod(case.normalized_shape)).T
    return np.moveaxis(a, case.channel_axis, 0).reshape(case.channels, -1)


def param_full(case: Case, p: np.ndarray) -> np.ndarray:
    """A parameter broadcast to x's shape."""
    if case.op in ("layer_norm", "rms_norm"):
        return np.broadcast_to(p, case.shape)
    sh = [1] * len(case.shape)
    sh[case.channel_axis] = case.channels
    return np.broadcast_to(p.reshape(sh), case.shape)


def stat_shape(case: Case) -> tuple[int, ...]:
    if case.op in ("layer_norm", "rms_norm"):
        return case.shape[: len(case.shape) - case.norm_ndim]
    if case.op == "batch_norm":
        return (case.channels,)
    return (case.shape[0], case.channels if case.op == "instance_norm" else case.groups)


def emulate(case: Case, prec: Precision, conv: Conventions, inp: dict, *, var="two_pass", how="blocked",
            eps_form=None, dweight_acc=None, saved_backward=False, fused_eval=False,
            accumulate_override=None) -> dict[str, np.ndarray]:
    """A kernel computing in the accumulation format of ``prec`` with the given algorithms.

    var : "two_pass" | "welford" | "one_pass" (E[x^2] - E[x]^2); how : summation order;
    eps_form : where the kernel actually puts eps (default: where ``conv`` declares it);
    dweight_acc : the format dweight and dbias are actually summed in (default: declared);
    saved_backward : the backward uses the forward's saved mean/rstd as rounded to params;
    fused_eval : eval-mode y = x * scale + shift with scale = w r, shift = b - mean scale.
    """
    p = prec.resolved()
    acc = accumulate_override or p.accumulate
    A, S, P = _dt(acc), _dt(p.storage), _dt(p.params)
    center = case.op != "rms_norm"
    eps_form = eps_form or conv.eps_placement
    eps = A.type(case.eps)
    train = case.mode == "train"
    x = inp["x"]
    X = group_rows(case, x.astype(A))
    n = X.shape[1]
    W = group_rows(case, param_full(case, inp["weight"]).astype(A)) if inp["weight"] is not None else None
    Bb = group_rows(case, param_full(case, inp["bias"]).astype(A)) if inp["bias"] is not None else None
    if train:
        if not center:
            mean = np.zeros(X.shape[0], A)
            var_ = (vsum((X * X).astype(A), acc, how) / A.type(n)).astype(A)
        elif var == "welford":
            mean, var_ = welford(X, acc)
        else:
            mean = (vsum(X, acc, how) / A.type(n)).astype(A)
            if var == "two_pass":
                d = (X - mean[:, None]).astype(A)
                var_ = (vsum((d * d).astype(A), acc, how) / A.type(n)).astype(A)
            else:
                ex2 = (vsum((X * X).astype(A), acc, how) / A.type(n)).astype(A)
                var_ = np.maximum((ex2 - (mean * mean).astype(A)).astype(A), A.type(0))
    else:
        mean = group_rows(case, param_full(case, inp["running_mean"]).astype(A))[:, 0]
        var_ = group_rows(case, param_full(case, inp["running_var"]).astype(A))[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        if eps_form == "inside":
            r = (A.type(1) / np.sqrt((var_ + eps).astype(A)).astype(A)).astype(A)
        else:
            r = (A.type(1) / (np.sqrt(var_).astype(A) + eps).astype(A)).astype(A)
    out: dict[str, np.ndarray] = {}
    ss = stat_shape(case)
    if train:
        if center:
            out["mean"] = mean.reshape(ss).astype(P)
        out["rstd"] = r.reshape(ss).astype(P)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # a variance may overflow P
            out["var"] = var_.reshape(ss).astype(P)
            out["var_unbiased"] = (var_ * (A.type(n) / A.type(n - 1))).astype(A).reshape(ss).astype(P)
            if eps_form == "inside":
                out["std"] = np.sqrt((var_ + eps).astype(A)).astype(A).reshape(ss).astype(P)
            else:
                out["std"] = (np.sqrt(var_).astype(A) + eps).astype(A).reshape(ss).astype(P)
    with np.errstate(invalid="ignore", over="ignore"):
        if fused_eval:
            scale = r[:, None] if W is None else (W * r[:, None]).astype(A)
            shift = (-(mean[:, None] * scale).astype(A)).astype(A) if Bb is None else \
                (Bb - (mean[:, None] * scale).astype(A)).astype(A)
            Y = ((X * scale).astype(A) + shift).astype(A)
            xh = ((X - mean[:, None]).astype(A) * r[:, None]).astype(A)
        else:
            xh = ((X - mean[:, None]).astype(A) * r[:, None]).astype(A)
            Y = xh if W is None else (xh * W).astype(A)
            Y = Y if Bb is None else (Y + Bb).astype(A)
    out["y"] = ungroup(case, Y).astype(S)
    if train and case.running and case.op in ("batch_norm", "instance_norm"):
        c = case.channels
        per_c = lambda v: v.reshape(-1, c).mean(axis=0, dtype=A) if case.op == "instance_norm" else v  # noqa: E731
        nf = A.type(n)
        vb = (var_ * (nf / A.type(n - 1))).astype(A) if conv.running_var_estimator == "unbiased" else var_
        s_m, s_v = per_c(mean).astype(A), per_c(vb).astype(A)
        rm, rv = inp["running_mean"].astype(A), inp["running_var"].astype(A)
        if case.momentum is None:
            k = A.type(case.batches_seen + 1)
            new_m = (rm + ((s_m - rm).astype(A) / k).astype(A)).astype(A)
            new_v = (rv + ((s_v - rv).astype(A) / k).astype(A)).astype(A)
        else:
            mo = A.type(case.momentum)
            a_, b_ = ((A.type(1) - mo).astype(A), mo) if conv.momentum_convention == "new" else \
                (mo, (A.type(1) - mo).astype(A))
            new_m = ((a_ * rm).astype(A) + (b_ * s_m).astype(A)).astype(A)
            new_v = ((a_ * rv).astype(A) + (b_ * s_v).astype(A)).astype(A)
        out["running_mean"] = new_m.astype(P)
        out["running_var"] = new_v.astype(P)
    if inp.get("dy") is None:
        return out
    # ---- backward
    DY = group_rows(case, inp["dy"].astype(A))
    if saved_backward and train:
        mean = out["mean"].reshape(-1).astype(A) if center else mean
        r = out["rstd"].reshape(-1).astype(A)
        with np.errstate(divide="ignore"):
            var_ = ((A.type(1) / r).astype(A) - eps).astype(A) ** 2 if eps_form == "outside" else var_
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        xh = ((X - mean[:, None]).astype(A) * r[:, None]).astype(A)
        G = DY if W is None else (DY * W).astype(A)
        if train:
            m1 = (vsum(G, acc, how) / A.type(n)).astype(A) if center else np.zeros_like(r)
            m2 = (vsum((G * xh).astype(A), acc, how) / A.type(n)).astype(A)
            beta = r if eps_form == "inside" else (A.type(1) / np.sqrt(var_).astype(A)).astype(A)
            DX = ((r[:, None] * (G - m1[:, None]).astype(A)).astype(A)
                  - ((beta * m2).astype(A)[:, None] * xh).astype(A)).astype(A)
        else:
            DX = (G * r[:, None]).astype(A)
    out["dx"] = ungroup(case, DX).astype(S)
    dwa = dweight_acc or p.accumulate_for("dweight")
    dba = dweight_acc or p.accumulate_for("dbias")
    prod = ungroup(case, (DY * xh).astype(A))
    pshape = case.normalized_shape if case.op in ("layer_norm", "rms_norm") else (case.channels,)
    out["dweight"] = vsum(param_rows(case, prod), dwa, how).reshape(pshape).astype(P)
    out["dbias"] = vsum(param_rows(case, inp["dy"].astype(A)), dba, how).reshape(pshape).astype(P)
    return out


# =============================================================================== data and driver
def make_inputs(case: Case, prec: Precision, seed: int = 0, dy: str = "normal") -> dict:
    """Seeded test data in the kernel's formats: x per case.values, dy standard normal (or dy = y)."""
    p = prec.resolved()
    rng = np.random.default_rng(seed)
    if case.values == "normal":
        x = rng.standard_normal(case.shape)
    elif case.values == "cancellation":
        m, s = CANCEL[case.dtype]
        x = m + s * rng.standard_normal(case.shape)
    elif case.values == "near_overflow":  # magnitudes near the storage format's largest finite value
        big = float(dtypes.finfo(case.dtype).max)
        x = rng.choice([-1.0, 1.0], size=case.shape) * rng.uniform(0.5, 0.95, size=case.shape) * big
    elif case.values == "constant":
        x = np.broadcast_to(rng.uniform(-3, 3, size=stat_shape(case) + (1,)),
                            stat_shape(case) + (case.group_length,)).reshape(-1)
        x = ungroup(case, x.reshape(-1, case.group_length))
    else:
        raise ValueError(case.values)
    ps = case.normalized_shape if case.op in ("layer_norm", "rms_norm") else (case.channels,)
    w = 1.0 + 0.5 * rng.standard_normal(ps)
    b = 0.5 * rng.standard_normal(ps)
    S, P = _dt(p.storage), _dt(p.params)
    inp = {"x": x.astype(S), "weight": w.astype(P), "bias": b.astype(P), "running_mean": None, "running_var": None}
    if case.op in ("batch_norm", "instance_norm") and (case.mode == "eval" or case.running):
        xm = param_rows(case, x.astype(S).astype(np.float64))
        inp["running_mean"] = (xm.mean(axis=1) + 0.1 * xm.std(axis=1) * rng.standard_normal(case.channels)).astype(P)
        inp["running_var"] = (xm.var(axis=1) * rng.uniform(0.8, 1.25, case.channels) + 0.01).astype(P)
    if dy == "normal":
        inp["dy"] = rng.standard_normal(case.shape).astype(S)
    else:  # dy = y (+ 1) of a plain normalization: the gradient of 0.5 ||y (+ 1)||^2
        x64 = x.astype(S).astype(np.float64)
        X = group_rows(case, x64)
        yy = (X - X.mean(axis=1, keepdims=True)) / X.std(axis=1, keepdims=True)
        inp["dy"] = (ungroup(case, yy) + (1.0 if dy == "y+1" else 0.0)).astype(S)
    return inp


def expected_of(case: Case, conv: Conventions, inp: dict, outputs) -> tuple[dict, dict]:
    inp64 = {k: None if v is None else np.asarray(v).astype(np.float64) for k, v in inp.items()}
    fwd = ops.oracle_forward(case, conv, inp64)
    exp = {}
    for o in outputs:
        if o == "y":
            exp[o] = fwd.y
        elif o in ("mean", "rstd", "var", "var_unbiased", "std"):
            exp[o] = ops.saved_form(o, fwd, case)
        elif o in ("running_mean", "running_var"):
            exp[o] = getattr(fwd, o)
    if any(o in outputs for o in ("dx", "dweight", "dbias")):
        bwd = ops.oracle_backward(case, conv, inp64)
        exp.update({o: getattr(bwd, o) for o in ("dx", "dweight", "dbias") if o in outputs})
    return exp, inp64


def check(case: Case, prec: Precision, conv: Conventions = Conventions(), *, outputs=None, seed=0, dy="normal",
          **kernel) -> tuple[dict, dict]:
    """Run an emulated kernel on the case; return ({output: OutputResult}, {output: Bound})."""
    inp = make_inputs(case, prec, seed, dy)
    act = emulate(case, prec, conv, inp, **kernel)
    outputs = outputs or [k for k in act if not (case.op == "rms_norm" and k == "mean")]
    exp, inp64 = expected_of(case, conv, inp, outputs)
    bounds = derive_bounds(case, prec, conv, inp64, exp)
    res = {k: compare_output(k, act[k], exp[k], bounds[k], dtype=output_dtype(k, prec)) for k in exp}
    return res, bounds


def ln(dtype: str, shape, values="normal", **kw) -> Case:
    return Case(op="layer_norm", dtype=dtype, shape=tuple(shape), layout="trailing", norm_ndim=1, values=values, **kw)


def budgets(res: dict) -> dict[str, float]:
    return {k: r.budget_used for k, r in res.items()}


FWD_BWD = ["y", "mean", "rstd", "var", "dx", "dweight", "dbias"]


# =============================================================================== summation models
def test_gamma_matches_the_published_constants():
    # Higham 2002, Lemma 3.1: gamma_n = n u / (1 - n u); §4.2: pairwise gamma_{ceil(log2 n)};
    # Higham & Mary 2019: gamma~_n(lam) = exp(lam sqrt(n) u + n u^2 / (1 - u)) - 1.
    n, u = 1000, U32
    assert gamma(n, u, "worst") == pytest.approx(n * u / (1 - n * u), rel=1e-15)
    assert gamma(n, u, "pairwise") == pytest.approx(10 * u / (1 - 10 * u), rel=1e-15)
    assert gamma(n, u, "probabilistic", 8.0) == pytest.approx(math.exp(8 * math.sqrt(n) * u + n * u * u / (1 - u)) - 1,
                                                              rel=1e-12)
    # The model never claims more than the deterministic worst case (tiny n: lam sqrt(n) > n).
    assert gamma(4, u, "probabilistic", 8.0) == pytest.approx(gamma(4, u, "worst"))
    # Once n u >= 1 the worst case says nothing (bfloat16, 2^16 terms) but the models stay finite.
    assert math.isinf(gamma(1 << 16, UBF, "worst"))
    assert gamma(1 << 16, UBF, "probabilistic") == pytest.approx(math.expm1(8 * 256 * UBF + (1 << 16) * UBF**2 / (1 - UBF)))
    assert gamma(1, u, "worst") == 0.0
    with pytest.raises(ValueError, match="summation model"):
        gamma(10, u, "kahan")


def test_lambda_8_holds_with_high_probability_up_to_2_to_24():
    # Higham & Mary 2019: the bound holds with probability >= Q(lam, n) = 1 - 2 n exp(-lam^2 (1-u)^2 / 2)
    # (from memory). lam = 8 gives 1 - Q < 5e-7 for every n <= 2^24 in binary32.
    assert 1 - probability(8.0, 1 << 24, U32) < 5e-7
    assert 1 - probability(8.0, 1 << 24, U32) == pytest.approx(2 * 2**24 * math.exp(-32 * (1 - U32) ** 2), rel=1e-9)
    # lam_for inverts it: the smallest lam for failure 5e-7 at 2^24 is just below 8.
    lam = lam_for(5e-7, 1 << 24, U32)
    assert 7.9 < lam < 8.0
    assert 1 - probability(lam, 1 << 24, U32) == pytest.approx(5e-7, rel=1e-9)


@pytest.mark.parametrize("n", [10, 1000, 1 << 14])
@pytest.mark.parametrize("kind", ["normal", "positive", "near_constant"])
def test_recursive_float32_summation_within_gamma_n(n, kind):
    # Higham 2002, §4.2: |fl(sum) - sum| <= gamma_{n-1} sum |x_i| for recursive summation,
    # the exact sum from math.fsum (Shewchuk's exact summation, Python docs).
    rng = np.random.default_rng(n)
    x = {"normal": rng.standard_normal(n), "positive": rng.uniform(0, 1, n),
         "near_constant": 0.1 + 1e-6 * rng.standard_normal(n)}[kind].astype(np.float32)
    exact = math.fsum(x.astype(np.float64))
    got = float(vsum(x, "float32", "seq"))
    s_abs = float(np.sum(np.abs(x.astype(np.float64))))
    assert abs(got - exact) <= worst_gamma(n - 1, U32) * s_abs
    # Pairwise (a balanced tree): Higham 2002 §4.2, gamma_{ceil(log2 n)}.
    tree = float(vsum(x, "float32", "tree"))
    assert abs(tree - exact) <= gamma(n, U32, "pairwise") * s_abs


def test_probabilistic_model_holds_on_random_data_and_is_not_vacuous():
    # Higham & Mary 2019: for independent rounding errors the error of recursive summation is
    # within gamma~_n(lam) sum|x| with lam = 8 on every trial. The bound is also tight enough to
    # matter: the same trials exceed a bound with lam = 0.05.
    rng = np.random.default_rng(7)
    n = 4096
    worst_ratio = 0.0
    for _ in range(40):
        x = rng.uniform(0, 1, n).astype(np.float32)
        err = abs(float(vsum(x, "float32", "seq")) - math.fsum(x.astype(np.float64)))
        ratio = err / (gamma(n, U32, "probabilistic", 8.0) * float(np.sum(x, dtype=np.float64)))
        worst_ratio = max(worst_ratio, ratio)
    assert worst_ratio <= 1.0
    assert worst_ratio * 8.0 / 0.05 > 1.0


def test_probabilistic_model_breaks_on_long_sequential_runs_of_nearly_equal_terms():
    # A limitation stated in docs/tolerances.md (our measurement, not a published result): summing
    # 2^16 terms ~1e4 sequentially in float32, every addend is nearly the same multiple of the
    # partial sum's ULP, so the rounding errors are not independent and the error grows like n u,
    # past the lam sqrt(n) u bound; the worst-case gamma_n still holds (Higham 2002 §4.2).
    rng = np.random.default_rng(3)
    n = 1 << 16
    x = (1e4 + 0.1 * rng.standard_normal(n)).astype(np.float32)
    err = abs(float(vsum(x, "float32", "seq")) - math.fsum(x.astype(np.float64)))
    s_abs = float(np.sum(x, dtype=np.float64))
    assert err > gamma(n, U32, "probabilistic") * s_abs
    assert err <= gamma(n, U32, "worst") * s_abs
    # A blocked (GPU-style) reduction of the same data stays far inside the probabilistic bound.
    err_b = abs(float(vsum(x, "float32", "blocked")) - math.fsum(x.astype(np.float64)))
    assert err_b < 0.01 * gamma(n, U32, "probabilistic") * s_abs


# =============================================================================== correct kernels pass
CORRECT = [  # (storage, params, var algorithm, summation order)
    ("float32", None, "two_pass", "blocked"),
    ("float32", None, "welford", "blocked"),
    ("float32", None, "two_pass", "tree"),
    ("float16", "float32", "two_pass", "blocked"),
    ("float16", None, "welford", "blocked"),
    ("bfloat16", "float32", "two_pass", "blocked"),
    ("bfloat16", None, "two_pass", "tree"),
]


@pytest.mark.parametrize("storage,params,var,how", CORRECT)
@pytest.mark.parametrize("values", ["normal", "cancellation"])
def test_correct_layer_norm_kernels_pass(storage, params, var, how, values):
    prec = Precision(storage=storage, params=params)
    res, bounds = check(ln(storage, (4, 2048), values), prec, outputs=FWD_BWD, var=var, how=how)
    failed = {k: r.message for k, r in res.items() if not r.passed}
    assert not failed, failed
    for k, r in res.items():
        f = output_dtype(k, prec)
        # Outputs rounded to float32 keep a wide margin; a narrow output's final rounding alone may use
        # up to its whole half-ULP allowance u_f |value| (IEEE 754-2019 §4.3.1 round to nearest).
        limit = 0.5 if f == "float32" else 1.0
        assert r.budget_used < limit, (k, r.budget_used)


@pytest.mark.parametrize("n", [1 << 16, 1 << 20])
@pytest.mark.parametrize("var", ["two_pass", "welford"])
@pytest.mark.parametrize("values", ["normal", "cancellation"])
def test_correct_kernels_pass_long_reductions(n, var, values):
    prec = Precision(storage="float32")
    res, _ = check(ln("float32", (1, n), values), prec, outputs=["y", "mean", "rstd", "var", "dx"], var=var)
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    assert max(r.budget_used for r in res.values()) < 0.3


@pytest.mark.parametrize("storage", ["float16", "bfloat16"])
def test_mixed_precision_long_reduction_passes(storage):
    # float16/bfloat16 storage, float32 accumulation and params (the common mixed-precision setup).
    prec = Precision(storage=storage, params="float32")
    res, _ = check(ln(storage, (1, 1 << 16), "cancellation"), prec, outputs=["y", "mean", "rstd", "dx", "dbias"])
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    for k in ("mean", "rstd", "dbias"):  # float32 outputs: the pre-rounding error model has margin
        assert res[k].budget_used < 0.1, (k, res[k].budget_used)


def test_batch_norm_long_parameter_reduction_passes():
    # dweight/dbias of batch norm sum m = N * H * W = 2^16 terms per channel.
    case = Case(op="batch_norm", dtype="float32", shape=(16, 2, 64, 64), layout="channels_first")
    res, bounds = check(case, Precision(), outputs=FWD_BWD)
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    assert bounds["dweight"].terms["m"] == 1 << 16
    assert max(r.budget_used for r in res.values()) < 0.5


@pytest.mark.parametrize("case", [
    Case(op="group_norm", dtype="float32", shape=(3, 12, 5, 7), layout="channels_first", groups=4),
    Case(op="group_norm", dtype="float32", shape=(3, 5, 7, 12), layout="channels_last", groups=3),
    Case(op="instance_norm", dtype="float32", shape=(2, 5, 33), layout="channels_last"),
    Case(op="batch_norm", dtype="float32", shape=(6, 9, 4), layout="channels_last"),
    Case(op="rms_norm", dtype="float32", shape=(3, 4, 64), layout="trailing", norm_ndim=2),
    Case(op="rms_norm", dtype="bfloat16", shape=(8, 512), layout="trailing", norm_ndim=1),
], ids=lambda c: c.id)
@pytest.mark.parametrize("values", ["normal", "cancellation"])
def test_correct_kernels_pass_every_op_and_layout(case, values):
    from dataclasses import replace

    case = replace(case, values=values)
    prec = Precision(storage=case.dtype, params="float32")
    outs = ["y", "rstd", "dx", "dweight", "dbias"] + ([] if case.op == "rms_norm" else ["mean", "var"])
    res, _ = check(case, prec, outputs=outs)
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}


@pytest.mark.parametrize("placement", ["inside", "outside"])
@pytest.mark.parametrize("eps", [1e-5, 1e-1])
def test_saved_forms_and_eps_placement(placement, eps):
    conv = Conventions(eps_placement=placement, saved=("mean", "rstd"))
    case = ln("float32", (6, 300), eps=eps)
    outs = ["y", "mean", "rstd", "var", "var_unbiased", "std", "dx", "dweight", "dbias"]
    res, _ = check(case, Precision(), conv, outputs=outs, saved_backward=True)
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    # A biased variance reported as var_unbiased is off by v/(n-1): far outside its bound at n = 300.
    inp = make_inputs(case, Precision())
    act = emulate(case, Precision(), conv, inp)
    exp, inp64 = expected_of(case, conv, inp, ["var_unbiased"])
    b = derive_bounds(case, Precision(), conv, inp64, exp)["var_unbiased"]
    r = compare_output("var_unbiased", act["var"], exp["var_unbiased"], b, dtype="float32")
    assert not r.passed and r.budget_used > 10


def test_saved_statistics_in_bfloat16_widen_the_backward_bound():
    # A backward that uses its forward's statistics saved in bfloat16 params is correct when it
    # declares them: the bound adds their rounding u_p.
    prec = Precision(storage="bfloat16")
    case = ln("bfloat16", (8, 1024), "cancellation")
    saved = Conventions(saved=("mean", "rstd"))
    res, _ = check(case, prec, saved, outputs=["dx", "dweight"], saved_backward=True)
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    res_undeclared, _ = check(case, prec, Conventions(), outputs=["dweight"], saved_backward=True)
    assert not res_undeclared["dweight"].passed


def test_saved_subnormal_rstd_is_covered():
    # Data near float16's largest value (65504) has rstd ~3e-5, a binary16 subnormal (below 2^-14,
    # IEEE 754-2019 §3.3) with ~1e-3 relative spacing: the saved statistic's rounding is absolute there.
    prec = Precision(storage="float16")
    case = ln("float16", (12, 96), "near_overflow")
    res, bounds = check(case, prec, Conventions(saved=("mean", "rstd")), outputs=["rstd", "dx", "dweight"],
                        saved_backward=True)
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    assert bounds["rstd"].terms["rstd"] < float(dtypes.finfo("float16").smallest_normal)


@pytest.mark.parametrize("convention,momentum", [("new", 0.1), ("old", 0.99), ("new", None)])
@pytest.mark.parametrize("op", ["batch_norm", "instance_norm"])
def test_running_statistics(op, convention, momentum):
    conv = Conventions(momentum_convention=convention)
    case = Case(op=op, dtype="float32", shape=(4, 3, 5, 5), layout="channels_first", running=True,
                momentum=momentum, batches_seen=3, values="cancellation")
    res, _ = check(case, Precision(), conv, outputs=["y", "running_mean", "running_var"])
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    # The biased estimator where the unbiased one is declared is off by var/(n-1): 1% at n = 100, far
    # outside the bound on well-conditioned data (on the kappa = 1e5 data float32 cannot tell).
    wrong = Conventions(momentum_convention=convention, running_var_estimator="biased")
    from dataclasses import replace

    case = replace(case, values="normal")
    inp = make_inputs(case, Precision())
    act = emulate(case, Precision(), wrong, inp)
    exp, inp64 = expected_of(case, conv, inp, ["running_var"])
    b = derive_bounds(case, Precision(), conv, inp64, exp)["running_var"]
    assert compare_output("running_var", act["running_var"], exp["running_var"], b, dtype="float32").budget_used > 10


@pytest.mark.parametrize("fused", [False, True])
@pytest.mark.parametrize("op", ["batch_norm", "instance_norm"])
def test_eval_mode_centred_and_folded_forms(op, fused):
    # Eval y = x * (w r) + (b - mean w r) is common practice for inference kernels; its rounding
    # (u |x| w r and u |mean| w r, Higham 2002 §2.1's model applied to each operation) is the
    # folded form's u_o (|x| + |mu|) term, which a kernel declares with y_form="folded". The
    # centred form (x - mean) w r + b (the default) rounds only u |x - mean| w r.
    case = Case(op=op, dtype="float32", shape=(4, 3, 6, 6), layout="channels_first", mode="eval", values="cancellation")
    conv = Conventions(y_form="folded" if fused else "centred")
    res, bounds = check(case, Precision(), conv, outputs=["y", "dx", "dweight", "dbias"], fused_eval=fused)
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    # The report's number: how much more the folded form may err on this data (|mean| / spread ~ 1e3).
    assert bounds["y"].terms["folded_over_centred"] > 100
    if fused:
        # The same folded kernel declared centred fails: its cancellation is not a centred kernel's error.
        res, _ = check(case, Precision(), Conventions(), outputs=["y"], fused_eval=True)
        assert res["y"].budget_used > 10, res["y"].message


def test_sequential_summation_needs_the_worst_case_model_on_long_cancellation_data():
    # See test_probabilistic_model_breaks_on_long_sequential_runs_of_nearly_equal_terms: a kernel
    # that sums 2^16 nearly equal float32 terms sequentially is correct, but only the worst-case
    # model describes it; declared "worst" it passes, declared "probabilistic" it fails.
    case = ln("float32", (1, 1 << 16), "cancellation")
    res_p, _ = check(case, Precision(summation="probabilistic"), outputs=["mean", "rstd"], how="seq")
    res_w, _ = check(case, Precision(summation="worst"), outputs=["mean", "rstd"], how="seq")
    assert not res_p["mean"].passed
    assert all(r.passed for r in res_w.values())


# =============================================================================== defects fail
@pytest.mark.parametrize("how,summation,n", [("blocked", "probabilistic", 2048), ("tree", "pairwise", 1 << 16)])
def test_one_pass_variance_fails_cancellation_data_by_10x(how, summation, n):
    # Chan, Golub & LeVeque 1983: E[x^2] - E[x]^2 loses ~kappa^2 u, against (n u kappa)^2 for two passes.
    prec = Precision(summation=summation)
    case = ln("float32", (4, n), "cancellation")
    res, _ = check(case, prec, outputs=["y", "rstd", "var"], var="one_pass", how=how)
    for k in ("y", "rstd"):
        assert res[k].budget_used >= 10, (k, res[k].budget_used)
    # The same kernel on well-conditioned data is fine: the bounds do not fail everything.
    res_ok, _ = check(ln("float32", (4, n)), prec, outputs=["y", "rstd", "var"], var="one_pass", how=how)
    assert all(r.passed for r in res_ok.values())
    # And a correct two-pass kernel passes the cancellation case.
    res_tp, _ = check(case, prec, outputs=["y", "rstd", "var"], how=how)
    assert all(r.passed for r in res_tp.values())


@pytest.mark.parametrize("storage,eps", [("float32", 1e-3), ("float32", 1e-1), ("bfloat16", 1e-1)])
def test_eps_outside_the_root_fails_when_eps_matters(storage, eps):
    # Ba, Kiros & Hinton 2016, eq. 4; Ioffe & Szegedy 2015, Alg. 1: eps inside the square root.
    # 1/(sqrt(v) + eps) differs from 1/sqrt(v + eps) by about eps/sqrt(v) - eps/(2v) relative.
    case = ln(storage, (8, 1024), eps=eps)
    res, _ = check(case, Precision(storage=storage), outputs=["y", "rstd", "dx"], eps_form="outside")
    assert res["rstd"].budget_used >= 10
    assert res["y"].budget_used >= 10
    # Declared as it is computed, the same kernel passes.
    res_ok, _ = check(case, Precision(storage=storage), Conventions(eps_placement="outside"),
                      outputs=["y", "rstd", "dx"], eps_form="outside")
    assert all(r.passed for r in res_ok.values()), {k: r.message for k, r in res_ok.items() if not r.passed}


@pytest.mark.parametrize("storage,params,how", [("bfloat16", None, "seq"), ("bfloat16", "float32", "seq"),
                                                ("bfloat16", "float32", "blocked")])
def test_bfloat16_parameter_gradient_accumulation_fails_long_reductions(storage, params, how):
    # Higham 2002 §4.2: a sum of m terms in a format of unit roundoff u errs by up to (m-1) u sum|x_i|;
    # with bfloat16's u = 2^-8 and m = 2^16 same-sign terms (dy = y) the partial sums stagnate.
    prec = Precision(storage=storage, params=params)
    case = Case(op="batch_norm", dtype=storage, shape=(16, 2, 64, 64), layout="channels_first")
    res, _ = check(case, prec, outputs=["dweight", "dbias", "dx"], dy="y", dweight_acc="bfloat16", how=how)
    assert res["dweight"].budget_used >= 10
    assert res["dx"].passed  # dx does not involve the parameter sums
    # Declared as it is done, the bound follows, and says that it is vacuous (bound >= |dweight|).
    honest = Precision(storage=storage, params=params, output_accumulate={"dweight": "bfloat16", "dbias": "bfloat16"})
    res_h, bounds_h = check(case, honest, outputs=["dweight"], dy="y", dweight_acc="bfloat16", how=how)
    assert res_h["dweight"].passed
    assert bounds_h["dweight"].terms["bound_over_scale"] > 1.0


# =============================================================================== bounds are not vacuous
@pytest.mark.parametrize("case", [
    ln("float32", (8, 1024)),
    Case(op="batch_norm", dtype="float32", shape=(8, 4, 16, 16), layout="channels_first"),
    Case(op="group_norm", dtype="float32", shape=(4, 8, 16, 16), layout="channels_last", groups=2),
    Case(op="rms_norm", dtype="float32", shape=(8, 1024), layout="trailing", norm_ndim=1),
], ids=lambda c: c.op)
def test_bounds_on_well_conditioned_float32_are_tight(case):
    # dx is well-conditioned for a generic dy; dweight and dbias for dy = y + 1 (the gradient of
    # 0.5 ||y + 1||^2: same-sign sums). Any dy affine in xhat makes dx ~ 0, so one dy cannot do both.
    outs = ["y", "rstd", "dx"] + ([] if case.op == "rms_norm" else ["mean", "var"])
    inp = make_inputs(case, Precision())
    exp, inp64 = expected_of(case, Conventions(), inp, outs)
    bounds = derive_bounds(case, Precision(), Conventions(), inp64, exp)
    inp = make_inputs(case, Precision(), dy="y+1")
    exp_p, inp64 = expected_of(case, Conventions(), inp, ["dweight", "dbias"])
    bounds.update(derive_bounds(case, Precision(), Conventions(), inp64, exp_p))
    exp.update(exp_p)
    for k, b in bounds.items():
        scale = np.max(np.abs(exp[k]))
        assert b.terms["bound_over_scale"] == pytest.approx(np.max(b.values) / scale)
        if k == "mean":  # a mean near 0 is measured against the spread it is subtracted from
            scale = max(scale, float(np.sqrt(np.min(exp["var"]))))
        # Vacuity threshold, not a tolerance: 1e-4 is ~1700 u of binary32; an atol-style bound of
        # 0.5 or 1e-2 would fail here.
        assert np.max(b.values) < 1e-4 * scale, (k, np.max(b.values) / scale)


def test_bounds_scale_with_unit_roundoff_and_conditioning():
    case = ln("float32", (4, 1024))
    inp = make_inputs(case, Precision())
    exp, inp64 = expected_of(case, Conventions(), inp, ["y", "rstd"])
    b32 = derive_bounds(case, Precision(storage="float32"), Conventions(), inp64, exp)
    b16 = derive_bounds(case, Precision(storage="float32", accumulate="float16", params="float16"),
                        Conventions(), inp64, exp)
    ratio = np.median(b16["rstd"].values) / np.median(b32["rstd"].values)
    assert 0.5 * U16 / U32 < ratio < 2 * U16 / U32  # linear in u (Higham 2002, §3.1)
    # kappa: the same spread around a mean 100 spreads away (Chan, Golub & LeVeque 1983).
    x = inp64["x"]
    shifted = dict(inp64, x=(x + 100.0).astype(np.float32).astype(np.float64))
    case_c = ln("float32", (4, 1024), "cancellation")
    exp_c, _ = expected_of(case_c, Conventions(), shifted, ["y", "var"])
    bc = derive_bounds(case_c, Precision(), Conventions(), shifted, exp_c)
    assert bc["var"].terms["kappa"] > 50 * b32["rstd"].terms["kappa"]
    assert np.median(bc["y"].values) > 20 * np.median(b32["y"].values)


# =============================================================================== degenerate data
def test_eps_zero_and_zero_variance_give_finite_bounds():
    for eps, values in ((0.0, "normal"), (1e-5, "constant"), (0.0, "constant")):
        case = ln("float32", (4, 256), values, eps=eps)
        outs = ["y", "mean", "rstd", "var", "var_unbiased", "std", "dx", "dweight", "dbias"]
        inp = make_inputs(case, Precision())
        with np.errstate(all="ignore"):  # the oracle's own 0/0 on zero variance with eps = 0 is IEEE's NaN
            exp, inp64 = expected_of(case, Conventions(), inp, outs)
        with np.errstate(all="raise"):  # the bound itself does no 0/0 or overflow
            bounds = derive_bounds(case, Precision(), Conventions(), inp64, exp)
        for k, b in bounds.items():
            fin = np.isfinite(exp[k])
            assert np.all(np.isfinite(b.values[fin])) and np.all(b.values >= 0), k
            assert np.all(b.values[~fin] == 0), k
            assert b.terms["nonfinite_bound_elements"] == 0
    # No worst-case bound at all (bfloat16 sums of 4096 terms: n u = 16 >= 1) must not turn into NaN:
    # a group of equal values, and exact zeros, still get finite (if huge) bounds where the oracle is finite.
    case = ln("float32", (2, 4096), "constant")
    prec = Precision(accumulate="bfloat16", summation="worst")
    inp = make_inputs(case, prec)
    inp["dy"][0] = 0.0
    exp, inp64 = expected_of(case, Conventions(), inp, ["y", "mean", "rstd", "dx", "dweight", "dbias"])
    bounds = derive_bounds(case, prec, Conventions(), inp64, exp)
    for k, b in bounds.items():
        assert np.all(np.isfinite(b.values)) and b.terms["nonfinite_bound_elements"] == 0, k
    assert math.isinf(bounds["mean"].terms["gamma_n"])
    # RMS norm of a row holding +Inf: mean(x^2) = Inf, r = 0, y = b on the row's finite elements
    # (IEEE 754-2019 §6.1 arithmetic on infinity); the bound there must stay a rounding of b.
    case = Case(op="rms_norm", dtype="float32", shape=(3, 64), layout="trailing", norm_ndim=1)
    inp = make_inputs(case, Precision())
    inp["x"][1, 5] = np.inf
    with np.errstate(all="ignore"):
        exp, inp64 = expected_of(case, Conventions(), inp, ["y", "rstd"])
    b = derive_bounds(case, Precision(), Conventions(), inp64, exp)
    row = np.isfinite(exp["y"][1])
    assert row.sum() == 63 and exp["rstd"][1] == 0.0
    assert np.all(b["y"].values[1, row] <= 5 * U32 * np.abs(exp["y"][1, row]) + 1e-44)  # u (|b| + 3|y|) + u_s|y|
    # A correct kernel passes the zero-variance case with eps > 0 (y = b, dx = 0 exactly in theory).
    res, _ = check(ln("float32", (4, 256), "constant"), Precision(), outputs=["y", "mean", "rstd", "dx", "dbias"])
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}


# =============================================================================== torch as an outside kernel
@pytest.mark.parametrize("values", ["normal", "cancellation"])
def test_torch_float32_kernels_pass(torch, values):
    # torch 2.13 CPU kernels, an independent implementation, must pass as correct float32 kernels.
    cases = [ln("float32", (8, 1024), values),
             Case(op="batch_norm", dtype="float32", shape=(8, 4, 16, 16), layout="channels_first", values=values),
             Case(op="group_norm", dtype="float32", shape=(4, 8, 16, 16), layout="channels_first", groups=2,
                  values=values)]
    F = torch.nn.functional
    for case in cases:
        inp = make_inputs(case, Precision())
        t = {k: torch.from_numpy(np.ascontiguousarray(v)).requires_grad_() for k, v in inp.items()
             if v is not None and k in ("x", "weight", "bias")}
        if case.op == "layer_norm":
            y = F.layer_norm(t["x"], case.normalized_shape, t["weight"], t["bias"], case.eps)
        elif case.op == "batch_norm":
            y = F.batch_norm(t["x"], None, None, t["weight"], t["bias"], training=True, eps=case.eps)
        else:
            y = F.group_norm(t["x"], case.groups, t["weight"], t["bias"], case.eps)
        y.backward(torch.from_numpy(inp["dy"]))
        act = {"y": y.detach().numpy(), "dx": t["x"].grad.numpy(), "dweight": t["weight"].grad.numpy(),
               "dbias": t["bias"].grad.numpy()}
        exp, inp64 = expected_of(case, Conventions(), inp, list(act))
        bounds = derive_bounds(case, Precision(), Conventions(), inp64, exp)
        for k in act:
            r = compare_output(k, act[k], exp[k], bounds[k], dtype="float32")
            assert r.passed and r.budget_used < 0.5, (case.id, k, r.message)


def test_torch_bfloat16_layer_norm_needs_its_true_declaration(torch):
    # torch 2.13 CPU native_layer_norm in bfloat16 returns mean and rstd in bfloat16 and uses them
    # in its backward, and its weight/bias gradients are not accumulated in float32 (measured here).
    # Declared that way it passes; declared as float32-accumulating it fails on dbias.
    case = ln("bfloat16", (8, 1024), "cancellation")
    prec_true = Precision(storage="bfloat16", output_accumulate={"dweight": "bfloat16", "dbias": "bfloat16"})
    conv = Conventions(saved=("mean", "rstd"))
    inp = make_inputs(case, prec_true)
    tb = lambda a: torch.from_numpy(a.astype(np.float32)).to(torch.bfloat16)  # noqa: E731  exact widening
    x, w, b = (tb(inp[k]).requires_grad_() for k in ("x", "weight", "bias"))
    y, mean, rstd = torch.native_layer_norm(x, case.normalized_shape, w, b, case.eps)
    y.backward(tb(inp["dy"]))
    bf = dtypes.dtype_of("bfloat16")
    npy = lambda t: t.detach().float().numpy().astype(bf)  # noqa: E731  bfloat16 -> float32 -> bfloat16 is exact
    act = {"y": npy(y), "mean": npy(mean).reshape(-1), "rstd": npy(rstd).reshape(-1), "dx": npy(x.grad),
           "dweight": npy(w.grad), "dbias": npy(b.grad)}
    exp, inp64 = expected_of(case, conv, inp, list(act))
    bounds = derive_bounds(case, prec_true, conv, inp64, exp)
    res = {k: compare_output(k, act[k], exp[k], bounds[k], dtype="bfloat16") for k in act}
    assert all(r.passed for r in res.values()), {k: r.message for k, r in res.items() if not r.passed}
    b32 = derive_bounds(case, Precision(storage="bfloat16"), conv, inp64, exp)
    assert compare_output("dbias", act["dbias"], exp["dbias"], b32["dbias"], dtype="bfloat16").budget_used > 10


# =============================================================================== grouping
@pytest.mark.parametrize("case", [
    Case(op="batch_norm", dtype="float32", shape=(3, 4, 5, 2), layout="channels_first"),
    Case(op="batch_norm", dtype="float32", shape=(3, 5, 2, 4), layout="channels_last"),
    Case(op="group_norm", dtype="float32", shape=(2, 6, 5, 3), layout="channels_first", groups=3),
    Case(op="group_norm", dtype="float32", shape=(2, 5, 3, 6), layout="channels_last", groups=2),
    Case(op="instance_norm", dtype="float32", shape=(2, 3, 7), layout="channels_first"),
    Case(op="instance_norm", dtype="float32", shape=(2, 7, 3), layout="channels_last"),
    Case(op="layer_norm", dtype="float32", shape=(2, 3, 4, 5), layout="trailing", norm_ndim=2),
], ids=lambda c: c.id)
def test_grouping_matches_the_oracle_statistics(case):
    # The bounds' view of the data must group elements exactly as the oracle does: the per-group
    # mean of x and the per-parameter sum of dy equal the oracle's mean and dbias.
    from conformance.tolerances.grouping import grouping

    inp = make_inputs(case, Precision())
    exp, inp64 = expected_of(case, Conventions(), inp, ["mean", "dbias"])
    g = grouping(case)
    np.testing.assert_allclose(g.stat_out(g.gmean(g.view(inp64["x"]))), exp["mean"], rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(g.param_out(g.psum(g.view(inp64["dy"]))), exp["dbias"], rtol=1e-12, atol=1e-12)
    assert g.n == case.group_length and g.m == case.param_length


# =============================================================================== API
def test_override_bound_is_the_fixed_form():
    e = np.array([1.0, -2.0, np.nan, 0.0])
    b = override_bound("y", e, atol=1e-3, rtol=1e-2)
    assert b.kind == "override"
    # numpy.testing.assert_allclose's criterion: |actual - desired| <= atol + rtol |desired|.
    np.testing.assert_array_equal(b.values[[0, 1, 3]], [1e-3 + 1e-2, 1e-3 + 2e-2, 1e-3])
    s = b.summary()
    assert s["kind"] == "override" and s["terms"] == {"atol": 1e-3, "rtol": 1e-2}
    with pytest.raises(ValueError, match="rtol"):
        override_bound("y", e, atol=0.0, rtol=-1.0)


def test_output_dtype_and_summary():
    p = Precision(storage="bfloat16", params="float32")
    assert output_dtype("y", p) == "bfloat16" and output_dtype("dx", p) == "bfloat16"
    assert all(output_dtype(k, p) == "float32" for k in ("mean", "rstd", "var", "running_mean", "dweight", "dbias"))
    with pytest.raises(ValueError, match="expected one of"):
        output_dtype("z", p)
    case = ln("float32", (2, 64))
    inp = make_inputs(case, Precision())
    exp, inp64 = expected_of(case, Conventions(), inp, ["y", "rstd"])
    b = derive_bounds(case, Precision(), Conventions(), inp64, exp)
    assert isinstance(b["y"], Bound) and b["y"].values.shape == exp["y"].shape
    s = b["rstd"].summary()
    import json

    json.dumps(s, allow_nan=False)
    assert s["max"] == pytest.approx(float(np.max(b["rstd"].values)))
    for key in ("u_s", "u_a", "u_p", "n", "gamma_n", "kappa", "lam"):
        assert key in s["terms"], key
    assert s["terms"]["gamma_n"] == pytest.approx(gamma(64, U32, "probabilistic"))


def test_derive_bounds_validates_its_arguments():
    case = ln("float32", (2, 64))
    inp = make_inputs(case, Precision())
    exp, inp64 = expected_of(case, Conventions(), inp, ["y", "dx"])
    with pytest.raises(ValueError, match="expected names from"):
        derive_bounds(case, Precision(), Conventions(), inp64, {"z": exp["y"]})
    with pytest.raises(ValueError, match=r"inputs64\['dy'\] is None"):
        derive_bounds(case, Precision(), Conventions(), dict(inp64, dy=None), exp)
    with pytest.raises(ValueError, match=r"inputs64\['x'\] has shape"):
        derive_bounds(case, Precision(), Conventions(), dict(inp64, x=inp64["x"].T), exp)


def budget_table() -> list[str]:
    """The measured-budget table of docs/tolerances.md: correct kernels, by storage, params and output format."""
    from collections import defaultdict

    rows: dict[tuple[str, str, str], list[float]] = defaultdict(list)
    setups = [("float32", None), ("float16", "float32"), ("bfloat16", "float32"), ("float16", None),
              ("bfloat16", None)]
    for storage, params in setups:
        prec = Precision(storage=storage, params=params)
        for values in ("normal", "cancellation"):
            for shape in ((8, 1024), (4, 4096), (1, 1 << 16), (1, 1 << 20)):
                if shape[1] == 1 << 20 and storage != "float32":
                    continue
                for var, how in (("two_pass", "blocked"), ("welford", "blocked"), ("two_pass", "tree")):
                    res, _ = check(ln(storage, shape, values), prec, outputs=FWD_BWD, var=var, how=how)
                    for k, r in res.items():
                        assert r.passed, r.message
                        rows[(storage, params or storage, output_dtype(k, prec))].append(r.budget_used)
    out = ["| storage | params | output format | comparisons | median | 90% | max |", "|---|---|---|---|---|---|---|"]
    for (s_, p_, f_), v in rows.items():
        a = np.array(v)
        out.append(f"| {s_} | {p_} | {f_} | {a.size} | {np.median(a):.2g} | {np.percentile(a, 90):.2g} | {a.max():.3g} |")
    return out


if __name__ == "__main__":  # pragma: no cover - prints the table of docs/tolerances.md (about a minute)
    print("\n".join(budget_table()))
    sys.exit(0)


# =============================================================================== declarations and ranges
def test_summation_model_per_output():
    """A kernel that reduces its forward by a tree (Precision.summation = "pairwise": Higham 2002, §4.2) and
    accumulates dbias by sequential atomics of nearly equal terms needs the worst-case model for dbias only
    (Higham 2002, Lemma 3.1; the probabilistic and tree models do not describe long sequential runs of nearly
    equal terms, docs/tolerances.md "Limits"): Precision.output_summation = {"dbias": "worst"}."""
    case = Case(op="layer_norm", dtype="float32", shape=(1 << 16, 4), layout="trailing", norm_ndim=1)
    rng = np.random.default_rng(3)
    x = rng.standard_normal(case.shape).astype(np.float32)
    dy = (1e4 + rng.standard_normal(case.shape)).astype(np.float32)
    inp64 = {"x": x.astype(np.float64), "dy": dy.astype(np.float64), "weight": None, "bias": np.zeros(4)}
    exp = {"dbias": dy.astype(np.float64).sum(axis=0), "mean": x.astype(np.float64).mean(axis=1)}
    seq = np.cumsum(dy, axis=0, dtype=np.float32)[-1]   # strictly sequential float32 additions
    tree = vsum(x, "float32", "tree", axis=1) / np.float32(4)
    tree_prec = Precision(summation="pairwise")
    b = derive_bounds(case, tree_prec, Conventions(), inp64, exp)
    assert compare_output("dbias", seq, exp["dbias"], b["dbias"], dtype="float32").budget_used > 10
    mixed = Precision(summation="pairwise", output_summation={"dbias": "worst"})
    b2 = derive_bounds(case, mixed, Conventions(), inp64, exp)
    assert compare_output("dbias", seq, exp["dbias"], b2["dbias"], dtype="float32").passed
    # The forward keeps its tree model: the mean's bound is the same under both declarations.
    assert np.array_equal(b["mean"].values, b2["mean"].values)
    assert compare_output("mean", tree.astype(np.float32), exp["mean"], b2["mean"], dtype="float32").passed


@pytest.mark.parametrize("values", ["large", "near_overflow", "cancellation"])
def test_data_beyond_what_a_precision_must_handle_is_skipped(values):
    """A float16-accumulating kernel cannot form sum |x| or sum (x - mu)^2 beyond 65504 (IEEE 754-2019 binary16,
    §7.4): such a case is outside what its declared precision must handle (conformance/tolerances/ranges.py)
    and is skipped with the reason, never failed; the default float32 accumulation runs it."""
    from conformance.run.execute import execute_case
    import seeded_bugs as sb

    case = Case(op="layer_norm", dtype="float16", shape=(12, 96), layout="trailing", norm_ndim=1, values=values)
    low = sb.NumpyNorm("layer_norm", "float16", "float32").kernel("float16 sums", precision={"accumulate": "float16"})
    r = execute_case(low, case, 0)
    assert r.status == "skipped" and "beyond the range a kernel accumulating in float16 must handle" in r.message
    ok = execute_case(sb.correct_kernel("layer_norm", "float16", "float32"), case, 0)
    assert ok.status == "passed", ok.message
    range_used = max(float(o["bound"]["terms"]["range_used"]) for o in ok.to_dict()["outputs"] if o["name"] == "y")
    assert 0.0 < range_used <= 1.0
