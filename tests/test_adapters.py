"""The built-in adapters (torch CPU, Keras CPU) and array conversion, against the float64 oracle.

Each adapter kernel is called with the harness's own keyword arguments
(conformance.ops.kernel_kwargs) on inputs rounded to the declared formats, and
every output is compared with refnorm's float64 result on exactly those inputs,
componentwise, under the bound the kernel's declared Precision implies:

    |got_i - exact_i| <= u_f |exact_i| + (gamma(n, u_o) + 4 u_o + u_stat) S_i + eta_f

- u_f |exact_i| + eta_f: the final rounding to the output's format f (IEEE 754-2019 §4.3.1,
  round to nearest: |fl(v) - v| <= u |v| for normal results; eta_f, half the smallest
  subnormal, for results in the subnormal range).
- gamma(n, u_o) S_i: the sums of n terms in the declared accumulation format u_o of that
  output, |error| <= gamma_n * sum of |terms| (Higham 2002, Accuracy and Stability of Numerical
  Algorithms, §4.2, worst case n u / (1 - n u)), or lambda sqrt(n) u for the probabilistic model
  (Higham & Mary 2019, SIAM J. Sci. Comput. 41(5), from memory), the smaller of the two.
  S_i is the magnitude of what feeds element i (first-order propagation through the
  formulas of Ioffe & Szegedy 2015, Alg. 1 and §3): for y |w| (|xhat| + r mean|x|),
  for dx r (|g| + mean|g| + (|xhat| + r mean|x|) mean|g xhat|), for dweight
  sum |dy| (|xhat| + r mean|x|), for dbias sum |dy|.
- 4 u_o S_i: the few elementwise operations after the sums (Higham 2002 §3.1, gamma_k for k ops).
- u_stat S_i: statistics kept in a coarser parameter format than u_o (declared params), or rounded
  to a coarser format before use (declared statistics: the variance twice and rstd once, 3 u_st).

A negative control shows that the bound is not vacuous: torch's bfloat16 layer-norm dbias
breaks it when the declaration claims float32 accumulation.
"""

from __future__ import annotations

import math
import sys
import warnings

import numpy as np

from conformance.cases.generators import laid_out
import pytest

import refnorm
from conformance import ops
from conformance.arrays import ArrayConversionError, as_numpy, to_torch, write_back
from conformance.cases.model import Case
from conformance.dtypes import dtype_of, finfo, round_to, unit_roundoff
from conformance.kernel import Kernel, KernelError, Precision, call_with, load_kernel

LAM = 8.0
CHANNEL_OPS = ("batch_norm", "group_norm", "instance_norm")
RUNNING_OPS = ("batch_norm", "instance_norm")


# =========================================================================== the bound

def gamma(n: int, u: float, model: str, lam: float = LAM) -> float:
    """Error constant of a sum of n terms (Higham 2002 §4.2; Higham & Mary 2019, from memory)."""
    if n <= 1:
        return 0.0
    worst = n * u / (1 - n * u) if n * u < 1 else math.inf
    if model == "worst":
        return worst
    if model == "pairwise":
        k = math.ceil(math.log2(n))
        return min(worst, k * u / (1 - k * u))
    return min(worst, math.expm1(lam * math.sqrt(n) * u + n * u * u / (1 - u)))


class Layout:
    """Views of one op's arrays as (groups, n) rows: one row per normalization statistic."""

    def __init__(self, op: str, shape: tuple[int, ...], axis: int | None, groups: int, norm_ndim: int):
        self.op, self.shape, self.groups, self.norm_ndim = op, shape, groups, norm_ndim
        self.ax = None if axis is None else axis % len(shape)

    def rows(self, a: np.ndarray) -> np.ndarray:
        if self.op in ("layer_norm", "rms_norm"):
            k = math.prod(self.shape[len(self.shape) - self.norm_ndim:])
            return a.reshape(-1, k)
        if self.op == "batch_norm":
            return np.moveaxis(a, self.ax, 0).reshape(self.shape[self.ax], -1)
        m = np.moveaxis(a, self.ax, 1)
        n, c = m.shape[0], m.shape[1]
        g = c if self.op == "instance_norm" else self.groups
        return m.reshape(n * g, -1)

    def unrows(self, r: np.ndarray) -> np.ndarray:
        if self.op in ("layer_norm", "rms_norm"):
            return r.reshape(self.shape)
        moved_shape = list(self.shape)
        if self.op == "batch_norm":
            moved_shape.insert(0, moved_shape.pop(self.ax))
            return np.moveaxis(r.reshape(moved_shape), 0, self.ax)
        moved_shape.insert(1, moved_shape.pop(self.ax))
        return np.moveaxis(r.reshape(moved_shape), 1, self.ax)

    def full_param(self, w: np.ndarray | None) -> np.ndarray:
        if w is None:
            return np.ones(self.shape)
        w = np.asarray(w, dtype=np.float64)
        if self.op in ("layer_norm", "rms_norm"):
            return np.broadcast_to(w, self.shape)
        bs = [1] * len(self.shape)
        bs[self.ax] = self.shape[self.ax]
        return np.broadcast_to(w.reshape(bs), self.shape)

    def param_sum(self, a: np.ndarray) -> np.ndarray:
        if self.op in ("layer_norm", "rms_norm"):
            return a.sum(axis=tuple(range(len(self.shape) - self.norm_ndim)))
        return a.sum(axis=tuple(i for i in range(len(self.shape)) if i != self.ax))

    def stat_shape(self) -> tuple[int, ...]:
        if self.op in ("layer_norm", "rms_norm"):
            return self.shape[: len(self.shape) - self.norm_ndim]
        if self.op == "batch_norm":
            return (self.shape[self.ax],)
        n, c = self.shape[0], self.shape[self.ax]
        return (n, c) if self.op == "instance_norm" else (n, self.groups)


def magnitudes(lay: Layout, x, dy, w, eps, *, train: bool, running_mean=None, running_var=None,
               momentum=None, convention="new", estimator="unbiased", batches_seen=0) -> dict[str, np.ndarray]:
    """S_i of every output (see the module docstring), from the float64 inputs."""
    xr = lay.rows(np.asarray(x, np.float64))
    center = lay.op != "rms_norm"
    if train:
        mu = xr.mean(axis=1, keepdims=True) if center else np.zeros((xr.shape[0], 1))
        v = ((xr - mu) ** 2).mean(axis=1, keepdims=True)
        a = np.abs(xr).mean(axis=1, keepdims=True)
    else:
        rowsof = lay.rows(np.broadcast_to(lay.full_param(running_mean), lay.shape))
        mu = rowsof[:, :1]
        v = lay.rows(np.broadcast_to(lay.full_param(running_var), lay.shape))[:, :1]
        a = np.abs(mu)
    r = 1.0 / np.sqrt(v + eps)
    xhat = (xr - mu) * r
    wr = lay.rows(np.asarray(lay.full_param(w), np.float64))
    spread = np.abs(xhat) + r * a if train else r * (np.abs(xr) + np.abs(mu))
    out = {"y": lay.unrows(np.abs(wr) * spread)}
    if dy is not None:
        dyr = lay.rows(np.asarray(dy, np.float64))
        g = np.abs(dyr * wr)
        if train:
            mg = g.mean(axis=1, keepdims=True)
            mgx = (g * np.abs(xhat)).mean(axis=1, keepdims=True)
            out["dx"] = lay.unrows(2.0 * r * (g + mg + spread * mgx))
        else:
            out["dx"] = lay.unrows(r * g)
        out["dweight"] = lay.param_sum(lay.unrows(np.abs(dyr) * spread))
        out["dbias"] = lay.param_sum(np.abs(np.asarray(dy, np.float64)))
    ss = lay.stat_shape()
    out["mean"] = a.reshape(ss)
    out["rstd"] = (r * (1.0 + (r * a) ** 2)).reshape(ss)
    if running_mean is not None and train:
        if momentum is None:
            f = 1.0 / (batches_seen + 1)
        else:
            f = momentum if convention == "new" else 1.0 - momentum
        c = lay.shape[lay.ax]
        n = xr.shape[1]
        per_c = lambda q: q.reshape(-1, c).mean(axis=0) if lay.op == "instance_norm" else q.reshape(c)  # noqa: E731
        out["running_mean"] = (1 - f) * np.abs(running_mean) + f * per_c(a)
        corr = n / (n - 1) if estimator == "unbiased" and n > 1 else 1.0
        out["running_var"] = (1 - f) * np.abs(running_var) + f * corr * per_c(v + a * a)
    return out


def check(name: str, got, exact: np.ndarray, scale: np.ndarray, *, out_fmt: str, u_o: float, n: int,
          model: str, u_stat: float = 0.0) -> float:
    """Assert the componentwise bound; return the largest |error| / bound (the budget used)."""
    g = np.asarray(as_numpy(got, name)).astype(np.float64)
    assert g.shape == exact.shape, f"{name}: shape {g.shape}, expected {exact.shape}"
    u_f = unit_roundoff(out_fmt)
    eta = float(finfo(out_fmt).smallest_subnormal) / 2
    tol = u_f * np.abs(exact) + (gamma(n, u_o, model) + 4 * u_o + u_stat) * scale + eta
    ratio = np.abs(g - exact) / tol
    worst = float(np.max(ratio))
    i = np.unravel_index(int(np.argmax(ratio)), ratio.shape)
    assert worst <= 1.0, (f"{name}: |error| / bound = {worst:.3g} at {i}: got {g[i]!r}, exact {exact[i]!r}, "
                          f"bound {tol[i]:.3g} (format {out_fmt}, u_o {u_o:.3g}, n {n})")
    return worst


# =========================================================================== inputs and calls

def _strided(a: np.ndarray, kind: str) -> np.ndarray:
    """The same values in another memory layout: the catalog's own stride kinds."""
    return laid_out(a, kind)


def make_inputs(case: Case, prec: Precision, seed: int, strides: str = "contiguous", weight: bool = True,
                bias: bool = True) -> dict:
    """Invented test data: standard normal x and dy, weights in +-[0.5, 1.5], rounded to the formats."""
    rng = np.random.default_rng(seed)
    sd, pd = prec.storage, prec.params
    x = _strided(round_to(rng.standard_normal(case.shape), sd), strides)
    dy = _strided(round_to(rng.standard_normal(case.shape), sd), strides)
    ps = case.normalized_shape if case.op in ("layer_norm", "rms_norm") else (case.channels,)
    w = round_to(rng.uniform(0.5, 1.5, ps) * rng.choice([-1.0, 1.0], ps), pd) if weight else None
    b = round_to(rng.standard_normal(ps), pd) if bias else None
    rm = round_to(0.5 * rng.standard_normal(ps), pd)
    rv = round_to(rng.uniform(0.5, 2.0, ps), pd)
    return {"x": x, "dy": dy, "weight": w, "bias": b, "running_mean": rm, "running_var": rv}


def named(result, names: tuple[str, ...]) -> dict:
    if isinstance(result, dict):
        return {k: result[k] for k in names}
    if isinstance(result, (tuple, list)):
        assert len(result) == len(names), f"returned {len(result)} values, declared {names}"
        return dict(zip(names, result))
    return {names[0]: result}


def f64(a):
    return None if a is None else np.asarray(a).astype(np.float64)


def oracle(case: Case, kernel: Kernel, inp: dict, train: bool):
    """refnorm's float64 forward and backward results on the rounded inputs."""
    c = kernel.conventions
    x, dy, w, b = f64(inp["x"]), f64(inp["dy"]), f64(inp["weight"]), f64(inp["bias"])
    eps = case.eps
    if case.op in RUNNING_OPS:
        fwd_fn = refnorm.batch_norm_forward if case.op == "batch_norm" else refnorm.instance_norm_forward
        bwd_fn = refnorm.batch_norm_backward if case.op == "batch_norm" else refnorm.instance_norm_backward
        kw = dict(axis=case.channel_axis, eps=eps, training=train)
        run = {}
        if not train or case.running:
            run = dict(running_mean=f64(inp["running_mean"]), running_var=f64(inp["running_var"]))
        fwd = fwd_fn(x, w, b, momentum=case.momentum, momentum_convention=c.momentum_convention,
                     running_var_estimator=c.running_var_estimator, batches_seen=case.batches_seen, **kw, **run)
        bwd = bwd_fn(dy, x, w, **kw, **({} if train else run))
    elif case.op == "group_norm":
        fwd = refnorm.group_norm_forward(x, case.groups, w, b, axis=case.channel_axis, eps=eps)
        bwd = refnorm.group_norm_backward(dy, x, case.groups, w, axis=case.channel_axis, eps=eps)
    else:
        fn_f = refnorm.layer_norm_forward if case.op == "layer_norm" else refnorm.rms_norm_forward
        fn_b = refnorm.layer_norm_backward if case.op == "layer_norm" else refnorm.rms_norm_backward
        fwd = fn_f(x, case.normalized_shape, w, b, eps=eps)
        bwd = fn_b(dy, x, case.normalized_shape, w, eps=eps)
    return fwd, bwd


def run_and_check(kernel: Kernel, case: Case, *, strides: str = "contiguous", weight: bool = True,
                  bias: bool = True, seed: int = 1) -> dict[str, float]:
    """Call the kernel's entry points for the case and check every output; return the budgets used."""
    prec = kernel.precision_for(case.dtype)
    inp = make_inputs(case, prec, seed, strides, weight, bias)
    train = case.mode == "train"
    fwd_e, bwd_e = ("forward", "backward") if train else ("forward_eval", "backward_eval")
    fwd, bwd = oracle(case, kernel, inp, train)
    conv = kernel.conventions
    lay = Layout(case.op, case.shape, case.channel_axis if case.op in CHANNEL_OPS else None, case.groups,
                 case.norm_ndim)
    mags = magnitudes(lay, f64(inp["x"]), f64(inp["dy"]), f64(inp["weight"]), case.eps, train=train,
                      running_mean=f64(inp["running_mean"]) if (case.running or not train) else None,
                      running_var=f64(inp["running_var"]) if (case.running or not train) else None,
                      momentum=case.momentum, convention=conv.momentum_convention,
                      estimator=conv.running_var_estimator, batches_seen=case.batches_seen)
    u_p, u_a = unit_roundoff(prec.params), unit_roundoff(prec.accumulate)
    u_stat = u_p if u_p > u_a else 0.0
    # Statistics rounded before use (Precision.statistics): the variance twice, then rstd, each u_st.
    u_st = unit_roundoff(prec.statistics)
    u_st = 3.0 * u_st if u_st > u_a else 0.0
    n_stat = case.group_length
    budgets: dict[str, float] = {}

    def chk(name, got, exact, n, stat_dependent=True):
        fmt = prec.storage if name in ("y", "dx") else prec.params
        budgets[name] = check(name, got, exact, mags[name], out_fmt=fmt,
                              u_o=unit_roundoff(prec.accumulate_for(name)), n=n, model=prec.summation,
                              u_stat=(u_stat if stat_dependent else 0.0) + (0.0 if name == "dbias" else u_st))

    saved = {}
    if getattr(kernel, fwd_e) is not None:
        run_inp = dict(inp)
        inplace = train and case.running and conv.running == "inplace"
        if inplace:
            run_inp["running_mean"] = inp["running_mean"].copy()
            run_inp["running_var"] = inp["running_var"].copy()
        res = call_with(getattr(kernel, fwd_e), ops.kernel_kwargs(case, fwd_e, run_inp))
        got = named(res, kernel.outputs if train else ("y",))
        chk("y", got["y"], fwd.y, n_stat if train else 1)
        if train:
            for s in conv.saved:
                exact = ops.saved_form(s, fwd, case)
                chk(s, got[s], exact, n_stat, stat_dependent=False)
                saved[s] = got[s]
            if case.running and kernel.updates_running:
                src = run_inp if inplace else got
                chk("running_mean", src["running_mean"], fwd.running_mean, n_stat, False)
                chk("running_var", src["running_var"], fwd.running_var, n_stat, False)
    if getattr(kernel, bwd_e) is not None:
        res = call_with(getattr(kernel, bwd_e), ops.kernel_kwargs(case, bwd_e, inp, saved=saved))
        got = named(res, kernel.grads)
        m = case.param_length
        chk("dx", got["dx"], bwd.dx, n_stat if train else 1)
        chk("dweight", got["dweight"], bwd.dweight, max(m, n_stat))
        chk("dbias", got["dbias"], bwd.dbias, m, stat_dependent=False)
    return budgets


def configs(op: str, dtype: str, eval_mode: bool, *, updates_running: bool = True, cumulative: bool = True):
    """(case, strides) pairs: one contiguous channels-first, one channels-last strided, and eval."""
    if op in ("layer_norm", "rms_norm"):
        yield Case(op=op, dtype=dtype, shape=(4, 3, 40), layout="trailing", norm_ndim=1), "contiguous"
        yield Case(op=op, dtype=dtype, shape=(5, 6, 10), layout="trailing", norm_ndim=2), "transposed"
        return
    groups = 3 if op == "group_norm" else 0
    running = op in RUNNING_OPS and updates_running
    yield (Case(op=op, dtype=dtype, shape=(6, 6, 4, 3), layout="channels_first", groups=groups, running=running,
                momentum=0.1), "contiguous")
    yield (Case(op=op, dtype=dtype, shape=(5, 4, 3, 6), layout="channels_last", groups=groups, running=running,
                momentum=None if cumulative else 0.25, batches_seen=3), "transposed")
    if eval_mode:
        yield Case(op=op, dtype=dtype, shape=(4, 6, 5), layout="channels_first", mode="eval"), "reversed"


# =========================================================================== torch

TORCH_OPS = ("batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm")


@pytest.fixture(scope="module")
def torch_kernels(torch):
    from conformance.adapters import torch_cpu

    ks = {op: getattr(torch_cpu, op)() for op in TORCH_OPS}
    ks.update({f"{op}_mixed": getattr(torch_cpu, f"{op}_mixed")() for op in TORCH_OPS if op != "rms_norm"})
    return ks


@pytest.mark.parametrize("op", TORCH_OPS)
def test_torch_adapter_within_declared_precision(torch_kernels, op):
    k = torch_kernels[op]
    assert set(k.dtypes) == {"float64", "float32", "float16", "bfloat16"}
    for dt in k.dtypes:
        for case, strides in configs(op, dt, k.forward_eval is not None, cumulative=k.momentum_none):
            run_and_check(k, case, strides=strides)
    # Absent weight and bias take torch's None path.
    case = next(configs(op, "float32", False))[0]
    run_and_check(k, case, weight=False, bias=False)


@pytest.mark.parametrize("op", [o for o in TORCH_OPS if o != "rms_norm"])
def test_torch_mixed_variant_within_declared_precision(torch_kernels, op):
    k = torch_kernels[f"{op}_mixed"]
    assert set(k.dtypes) == {"float16", "bfloat16"}
    for dt in k.dtypes:
        assert k.precision_for(dt).params == "float32"
        for case, strides in configs(op, dt, k.forward_eval is not None, cumulative=k.momentum_none):
            run_and_check(k, case, strides=strides)
        run_and_check(k, next(configs(op, dt, False))[0], weight=False, bias=False)


def test_torch_rms_norm_has_no_mixed_variant(torch):
    from conformance.adapters import torch_cpu

    with pytest.raises(KernelError, match="float32 y"):
        torch_cpu.rms_norm(params="float32")
    with pytest.raises(KernelError, match="params"):
        torch_cpu.layer_norm(params="half")


def _ln_dbias_block_model(dy: np.ndarray, fmt, threads: int) -> np.ndarray:
    """torch's CPU layer-norm dbias as measured: rows in blocks of ceil(M/T), each block summed row by row
    with a rounding to ``fmt`` after every addition, the block sums added in float32, rounded once."""
    rows = dy.shape[0]
    chunk = math.ceil(rows / threads)
    total = np.zeros(dy.shape[1], np.float32)
    for start in range(0, rows, chunk):
        s = dy[start].astype(fmt)
        for i in range(start + 1, min(rows, start + chunk)):
            s = (s.astype(np.float32) + dy[i].astype(np.float32)).astype(fmt)
        total = total + s.astype(np.float32)
    return total.astype(fmt).astype(np.float64)


@pytest.mark.parametrize("dtype", ["bfloat16", "float16"])
def test_torch_layer_norm_dbias_is_summed_in_the_storage_format(torch, dtype):
    """Evidence for the declaration output_accumulate dbias = storage (docs/library-precision.md)."""
    fmt = dtype_of(dtype)
    tdt = getattr(torch, dtype)
    rng = np.random.default_rng(7)
    threads0 = torch.get_num_threads()
    try:
        for threads in sorted({1, threads0}):
            torch.set_num_threads(threads)
            for rows, cols in ((6, 4096), (64, 256)):
                x = torch.from_numpy(rng.standard_normal((rows, cols))).to(tdt).requires_grad_()
                w = torch.ones(cols, dtype=tdt, requires_grad=True)
                b = torch.zeros(cols, dtype=tdt, requires_grad=True)
                dy = torch.from_numpy(rng.standard_normal((rows, cols))).to(tdt)
                y = torch.nn.functional.layer_norm(x, (cols,), w, b, 1e-5)
                _, _, db = torch.autograd.grad(y, (x, w, b), dy)
                dyn = as_numpy(dy).astype(np.float64)
                got = as_numpy(db).astype(np.float64)
                model = _ln_dbias_block_model(dyn, fmt, threads)
                # The model reproduces every value (bit for bit), while correct rounding of the
                # exact sum does not (a float32 accumulation would be correctly rounded here:
                # <= 64 terms of 8-/11-bit significands fit in float32's 24 bits).
                assert np.array_equal(got, model), f"{rows}x{cols}, T={threads}"
                correctly_rounded = np.mean(got == round_to(dyn.sum(axis=0), dtype).astype(np.float64))
                assert correctly_rounded < 0.8, correctly_rounded
    finally:
        torch.set_num_threads(threads0)


def test_torch_layer_norm_bf16_declaration_is_needed(torch_kernels):
    """Negative control: the same check with a float32-accumulation claim fails for torch's dbias."""
    k = torch_kernels["layer_norm"]
    case = Case(op="layer_norm", dtype="bfloat16", shape=(6, 4096), layout="trailing", norm_ndim=1)
    budgets = run_and_check(k, case, seed=3)
    assert budgets["dbias"] <= 1.0
    claimed = Kernel(name="claims float32 dbias", op="layer_norm", backward=k.backward, dtypes=("bfloat16",),
                     precision=Precision(storage="bfloat16", accumulate="float32"))
    with pytest.raises(AssertionError, match="dbias"):
        run_and_check(claimed, case, seed=3)


def test_torch_bf16_batch_norm_statistics_model(torch):
    """ATen's batch-norm statistics pass in bfloat16 (param_t = BFloat16), reproduced bit for bit:
    mean, sum of squared deviations and variance rounded to bfloat16, rstd from the rounded variance,
    momentum rounded to bfloat16, y computed from the rounded mean and rstd and rounded once."""
    from conformance.adapters import torch_cpu

    k = torch_cpu.batch_norm()
    bf = "bfloat16"
    r = lambda a: round_to(np.asarray(a, np.float64), bf).astype(np.float64)  # noqa: E731
    rng = np.random.default_rng(11)
    c = 512
    x = round_to(rng.standard_normal((4, c, 6)) * rng.uniform(0.2, 2.0, (1, c, 1)) + rng.standard_normal((1, c, 1)),
                 bf)
    rm0 = round_to(0.1 * rng.standard_normal(c), bf)
    rv0 = round_to(rng.uniform(0.5, 1.5, c), bf)
    rm, rv = rm0.copy(), rv0.copy()
    out = k.forward(x=x, weight=None, bias=None, eps=1e-5, axis=1, running_mean=rm, running_var=rv, momentum=0.1)
    xf = x.astype(np.float64)
    n = xf.size // c
    mean = xf.mean(axis=(0, 2))
    m2_b = r(((xf - mean[None, :, None]) ** 2).sum(axis=(0, 2)))
    rstd = r(1.0 / np.sqrt(r(m2_b / n) + 1e-5))
    mom, om = r(0.1), r(1 - r(0.1))
    y = r((xf - r(mean)[None, :, None]) * rstd[None, :, None])
    assert np.array_equal(out["mean"].astype(np.float64), r(mean))
    assert np.array_equal(out["rstd"].astype(np.float64), rstd)
    assert np.array_equal(rm.astype(np.float64), r(r(mom * r(mean)) + r(om * rm0.astype(np.float64))))
    unb = r(m2_b / (n - 1))
    fl = lambda a: np.asarray(a, np.float64).astype(np.float32).astype(np.float64)  # noqa: E731
    assert np.array_equal(rv.astype(np.float64), r(fl(mom * unb) + r(om * rv0.astype(np.float64))))
    assert np.mean(out["y"].astype(np.float64) == y) > 0.999
    exact_y = refnorm.batch_norm_forward(xf).y
    assert np.mean(out["y"].astype(np.float64) == r(exact_y)) < 0.9  # not the correctly rounded y


def test_torch_forward_matches_functional_api(torch):
    """The adapter's native_* calls are the kernels torch.nn.functional reaches: identical bits."""
    from conformance.adapters import torch_cpu

    F = torch.nn.functional
    rng = np.random.default_rng(5)
    for dt in ("float32", "bfloat16"):
        x = round_to(rng.standard_normal((4, 6, 5, 3)), dt)
        w = round_to(rng.uniform(0.5, 1.5, 6), dt)
        b = round_to(rng.standard_normal(6), dt)
        xt, wt, bt = to_torch(x), to_torch(w), to_torch(b)
        y = torch_cpu.batch_norm().forward(x=x, weight=w, bias=b, eps=1e-5)["y"]
        assert np.array_equal(y, as_numpy(F.batch_norm(xt, None, None, wt, bt, training=True, eps=1e-5)))
        y = torch_cpu.group_norm().forward(x=x, weight=w, bias=b, eps=1e-5, num_groups=3)["y"]
        assert np.array_equal(y, as_numpy(F.group_norm(xt, 3, wt, bt, 1e-5)))
        y = torch_cpu.layer_norm().forward(x=x, weight=None, bias=None, eps=1e-5, normalized_shape=(5, 3))["y"]
        assert np.array_equal(y, as_numpy(F.layer_norm(xt, (5, 3), None, None, 1e-5)))
        # Channels-last memory reaches torch's channels-last kernels, as F.group_norm would.
        xcl = np.moveaxis(x, 1, -1).copy()
        y = torch_cpu.group_norm().forward(x=xcl, weight=w, bias=b, eps=1e-5, num_groups=3, axis=-1)["y"]
        ref = F.group_norm(to_torch(xcl).movedim(-1, 1).contiguous(memory_format=torch.channels_last), 3, wt, bt,
                           1e-5)
        assert np.array_equal(y, as_numpy(ref.movedim(1, -1)))


def test_torch_running_statistics_update_the_given_arrays(torch):
    from conformance.adapters import torch_cpu

    rng = np.random.default_rng(2)
    x = rng.standard_normal((8, 3, 5)).astype(np.float32)
    rm = np.zeros(3, np.float32)
    rv = np.ones(3, np.float32)
    torch_cpu.batch_norm().forward(x=x, weight=None, bias=None, eps=1e-5, running_mean=rm, running_var=rv,
                                   momentum=None, batches_seen=4)
    exact = refnorm.batch_norm_forward(x.astype(np.float64), running_mean=np.zeros(3), running_var=np.ones(3),
                                       momentum=None, batches_seen=4)
    # torch.nn.BatchNorm with momentum=None: factor 1 / num_batches_tracked (torch/nn/modules/batchnorm.py).
    np.testing.assert_allclose(rm, exact.running_mean, rtol=8 * unit_roundoff("float32"), atol=1e-7)
    np.testing.assert_allclose(rv, exact.running_var, rtol=8 * unit_roundoff("float32"))
    # A running array torch cannot share (float64 for float32 parameters) is written back.
    rm64 = np.zeros(3)
    torch_cpu.instance_norm().forward(x=x, weight=None, bias=None, eps=1e-5, running_mean=rm64,
                                      running_var=np.ones(3), momentum=0.5)
    assert np.all(rm64 != 0.0)
    with pytest.raises(ValueError, match="momentum is None"):
        torch_cpu.instance_norm().forward(x=x, eps=1e-5, running_mean=rm, running_var=rv, momentum=None)


# =========================================================================== Keras

KERAS_OPS = ("batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm")


@pytest.fixture(scope="module")
def keras_kernels(tfk):
    from conformance.adapters import keras_cpu

    return {op: getattr(keras_cpu, op)() for op in KERAS_OPS}


@pytest.mark.parametrize("op", KERAS_OPS)
def test_keras_adapter_within_declared_precision(keras_kernels, op):
    k = keras_kernels[op]
    assert set(k.dtypes) == {"float64", "float32", "float16", "bfloat16"}
    if op == "batch_norm":
        assert k.conventions.momentum_convention == "old" and k.conventions.running_var_estimator == "biased"
    for dt in k.dtypes:
        for case, strides in configs(op, dt, k.forward_eval is not None, updates_running=k.updates_running,
                                     cumulative=k.momentum_none):
            run_and_check(k, case, strides=strides)
    run_and_check(k, next(configs(op, "float32", False, updates_running=k.updates_running))[0],
                  weight=False, bias=False)


def test_keras_low_precision_outputs_are_rounded_once(keras_kernels):
    """Keras casts float16/bfloat16 to float32 and back once: nearly every output correctly rounded
    (measured 99.9-100%); a storage-format computation would round several times."""
    k = keras_kernels["layer_norm"]
    case = Case(op="layer_norm", dtype="bfloat16", shape=(64, 256), layout="trailing", norm_ndim=1)
    inp = make_inputs(case, k.precision_for("bfloat16"), 4)
    fwd, bwd = oracle(case, k, inp, True)
    y = call_with(k.forward, ops.kernel_kwargs(case, "forward", inp))
    dx, dw, db = call_with(k.backward, ops.kernel_kwargs(case, "backward", inp))
    for name, got, exact in (("y", y, fwd.y), ("dx", dx, bwd.dx), ("dweight", dw, bwd.dweight),
                             ("dbias", db, bwd.dbias)):
        frac = np.mean(as_numpy(got).astype(np.float64) == round_to(exact, "bfloat16").astype(np.float64))
        assert frac >= 0.99, f"{name}: {frac:.4f} correctly rounded"


def test_keras_momentum_is_the_layers_own(keras_kernels):
    """momentum under the declared 'old' convention: moving = momentum * moving + (1 - momentum) * batch."""
    k = keras_kernels["batch_norm"]
    x = np.random.default_rng(9).standard_normal((16, 3)).astype(np.float32)
    out = k.forward(x=x, eps=1e-3, axis=1, running_mean=np.full(3, 2.0, np.float32),
                    running_var=np.full(3, 4.0, np.float32), momentum=0.9)
    xd = x.astype(np.float64)
    # Keras BatchNormalization docstring formula (keras/src/layers/normalization/batch_normalization.py).
    np.testing.assert_allclose(out["running_mean"], 0.9 * 2.0 + 0.1 * xd.mean(0), rtol=1e-6)
    np.testing.assert_allclose(out["running_var"], 0.9 * 4.0 + 0.1 * xd.var(0), rtol=1e-6)
    with pytest.raises(ValueError, match="cumulative"):
        k.forward(x=x, eps=1e-3, axis=1, running_mean=np.zeros(3, np.float32), running_var=np.ones(3, np.float32),
                  momentum=None)


# =========================================================================== specs and missing libraries

@pytest.mark.parametrize("spec", ["conformance.adapters.torch_cpu:layer_norm",
                                  "conformance.adapters.torch_cpu:batch_norm_mixed"])
def test_specs_load(torch, spec):
    k = load_kernel(spec)
    assert isinstance(k, Kernel) and k.op in spec
    k.declaration()  # JSON-ready, every dtype resolved


def test_missing_torch_is_a_clear_error(monkeypatch):
    from conformance.adapters import torch_cpu

    monkeypatch.setitem(sys.modules, "torch", None)  # import torch now raises ImportError
    with pytest.raises(KernelError, match=r"PyTorch.*pip install 'refnorm\[torch\]'"):
        torch_cpu.batch_norm()
    with pytest.raises(KernelError, match="pip install"):
        load_kernel("conformance.adapters.torch_cpu:rms_norm")


def test_missing_tensorflow_is_a_clear_error(monkeypatch):
    from conformance.adapters import keras_cpu

    monkeypatch.setitem(sys.modules, "tensorflow", None)
    with pytest.raises(KernelError, match=r"TensorFlow.*pip install 'refnorm\[tensorflow\]'"):
        keras_cpu.layer_norm()


# =========================================================================== arrays

class _OnlyArray:
    def __init__(self, a):
        self.a = a

    def __array__(self, dtype=None, copy=None):
        return self.a


class _OnlyDLPack:
    def __init__(self, a):
        self.a = a

    def __dlpack__(self, **kw):
        return self.a.__dlpack__(**kw)

    def __dlpack_device__(self):
        return self.a.__dlpack_device__()


def test_as_numpy_forms():
    a = np.arange(6.0).reshape(2, 3)
    assert as_numpy(None) is None
    assert as_numpy(a) is a
    v = as_numpy(_OnlyDLPack(a))
    assert np.shares_memory(v, a) and np.array_equal(v, a)  # DLPack: no copy
    assert np.array_equal(as_numpy(_OnlyArray(a)), a)
    with pytest.raises(ArrayConversionError, match="output y is builtins.str"):
        as_numpy("not an array", "output y")


def test_torch_round_trip_shares_memory(torch):
    a = round_to(np.linspace(-2, 2, 12).reshape(3, 4), "bfloat16")
    t = to_torch(a)
    assert t.dtype == torch.bfloat16
    t[0, 0] = 7.0  # the tensor is a view of the array
    assert float(a[0, 0]) == 7.0
    back = as_numpy(t)
    assert back.dtype == dtype_of("bfloat16") and np.shares_memory(back, a)
    g = torch.ones(3, requires_grad=True) * 2  # requires grad: detached, not an error
    assert np.array_equal(as_numpy(g), np.full(3, 2.0, np.float32))
    s = np.arange(24.0, dtype=np.float32).reshape(4, 6).T  # strided: still shared
    assert np.shares_memory(as_numpy(to_torch(s)), s)
    r = np.arange(5.0)[::-1]  # negative strides: torch cannot view them, so a copy
    rt = to_torch(r)
    assert np.array_equal(as_numpy(rt), r) and not np.shares_memory(as_numpy(rt), r)
    ro = np.arange(3.0)
    ro.setflags(write=False)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no "not writable" warning escapes
        to_torch(ro)
    dst = np.zeros(5)
    write_back(dst, rt * 2)
    assert np.array_equal(dst, 2 * r)


def test_keras_flushes_subnormals_and_declares_it(keras_kernels, tfk):
    """TensorFlow flushes float32 subnormals to zero on the CPU (1e-39 is a binary32 subnormal, below 2^-126:
    IEEE 754-2019 §3.3; gradual underflow would give 1e-36), so every Keras kernel declares
    Precision(subnormals="flush"), and the harness's subnormal case passes under it. The same kernel declared
    as keeping subnormals fails that case: the declaration is needed, not decorative."""
    from dataclasses import replace

    from conformance.cases import find_case
    from conformance.run.execute import execute_case

    tf = tfk.tf
    assert float((tf.constant(1e-39, tf.float32) * tf.constant(1000.0, tf.float32)).numpy()) == 0.0
    k = keras_kernels["layer_norm"]
    assert all(k.precision_for(dt).subnormals == "flush" for dt in k.dtypes)
    case = find_case("layer_norm/float32/trailing/12x96/norm_ndim=1/subnormal/w=random/b=random/eps=1e-05/train/"
                     "contiguous")
    assert execute_case(k, case, 0).status == "passed"
    keep = replace(k, precision={dt: replace(k.precision_for(dt), subnormals="keep") for dt in k.dtypes})
    r = execute_case(keep, case, 0)
    assert r.status == "failed" and "dweight" in {o["name"] for o in r.outputs if not o["passed"]}, r.message
