"""The ONNX Runtime adapter (conformance.adapters.onnxruntime_ep) against the float64 oracle.

What is checked, and against what:
- agreement within the bound of the adapter's declared precision (tests/test_adapters.py's
  componentwise bound: Higham 2002 §3.1 and §4.2, Higham & Mary 2019), for every op and every dtype
  the CPU provider runs, on cases whose eps and momentum are exact in float32 (2^-17 and 0.25), so
  that float64 is comparable at all;
- each finding of docs/library-precision.md, reproduced from its own model: the float32 attributes
  (IEEE 754-2019 binary32 rounding of 1e-5, and d/dv (v + eps)^(-1/2) to first order), the one-pass
  variance of GroupNormalization-21's function body (onnx.defs; Chan, Golub & LeVeque 1983), the
  eight-lane float32 recursive sum (Higham 2002 §4.1), BatchNormalization-15's momentum and
  variance conventions (the ONNX operator specification), eps inside the square root
  (LayerNormalization-17's specification);
- the command line: the smoke tier of every op and the standard tier of one through
  `refnorm check`, ONNX Runtime beside a kernel in a report, and hostile specs and options.

Measured with onnx 1.23.0 and onnxruntime 1.32.0 (CPUExecutionProvider) on x86-64.
"""

from __future__ import annotations

import dataclasses
import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("onnx", reason="the ONNX Runtime adapter needs onnx (pip install 'refnorm[onnx]')")
pytest.importorskip("onnxruntime", reason="the ONNX Runtime adapter needs onnxruntime (pip install 'refnorm[onnx]')")

import refnorm  # noqa: E402
from conformance import cli  # noqa: E402
from conformance.adapters import onnxruntime_ep as ort_ep  # noqa: E402
from conformance.cases.model import Case  # noqa: E402
from conformance.kernel import KernelError, load_kernel  # noqa: E402
from conformance.run import RunOptions, run_check  # noqa: E402

import test_adapters as ta  # noqa: E402  (the declared-precision bound and its call driver)

OPS = ("layer_norm", "group_norm", "batch_norm", "instance_norm", "rms_norm")
SPEC = "conformance.adapters.onnxruntime_ep"
#: exactly representable in float32, so the model's attribute is the case's value
EPS32 = 2.0 ** -17
TESTS = Path(__file__).resolve().parent


@pytest.fixture(scope="module")
def kernels():
    ks = {op: getattr(ort_ep, op)() for op in OPS}
    ks["batch_norm_mixed"] = ort_ep.batch_norm_mixed()
    return ks


def _ort():
    import onnxruntime

    return onnxruntime


# =========================================================================== agreement

# What the CPU provider of onnxruntime 1.32 loads, measured by building sessions (the adapter probes
# the same way; this table is the measurement it must reproduce): bfloat16 only for
# LayerNormalization (NOT_IMPLEMENTED for the others' nodes), no float64 InstanceNormalization.
RUNS = {"layer_norm": ("float64", "float32", "float16", "bfloat16"),
        "group_norm": ("float64", "float32", "float16"),
        "batch_norm": ("float64", "float32", "float16"),
        "instance_norm": ("float32", "float16"),
        "rms_norm": ("float64", "float32", "float16"),
        "batch_norm_mixed": ("float16",)}


@pytest.mark.parametrize("op", sorted(RUNS))
def test_declared_dtypes_are_the_ones_the_provider_runs(kernels, op):
    k = kernels[op]
    assert k.dtypes == RUNS[op]
    refused = [d for d in ("float64", "float32", "float16", "bfloat16") if d not in k.dtypes]
    if op == "batch_norm_mixed":
        refused = ["bfloat16"]
    for d in refused:
        assert f"{d}:" in k.notes, f"{op}: the notes do not say why {d} is not declared: {k.notes}"
    assert k.device == "CPUExecutionProvider" and k.entry_points[0] == "forward"
    assert not any(e.startswith("backward") for e in k.entry_points)  # no gradient operators in ONNX Runtime


@pytest.mark.parametrize("op", OPS)
def test_within_declared_precision(kernels, op):
    k = kernels[op]
    for dt in k.dtypes:
        for case, strides in ta.configs(op, dt, eval_mode=op == "batch_norm", updates_running=k.updates_running,
                                        cumulative=False):
            case = dataclasses.replace(case, eps=EPS32, momentum=None if case.momentum is None else 0.25)
            # Eval-mode y is x a + (b - m a) (test_batch_norm_eval_form): the rounding of b - m a is
            # u |b|, a term test_adapters' bound has no place for, so eval runs without a bias here.
            with_bias = op != "rms_norm" and case.mode == "train"
            for weight, bias in ((True, with_bias), (False, with_bias)):
                budgets = ta.run_and_check(k, case, strides=strides, weight=weight, bias=bias)
                assert budgets, f"{op} {dt}: nothing was checked"


def test_mixed_batch_norm_within_declared_precision(kernels):
    k = kernels["batch_norm_mixed"]
    for case, strides in ta.configs("batch_norm", "float16", eval_mode=True, cumulative=False):
        case = dataclasses.replace(case, eps=EPS32, momentum=None if case.momentum is None else 0.25)
        assert ta.run_and_check(k, case, strides=strides, bias=case.mode == "train")


@pytest.mark.parametrize("dtype", ["float32", "float64"])
def test_batch_norm_eval_form(kernels, dtype):
    """Eval-mode BatchNormalization computes y = x a + (b - m a), a = w (1 / sqrt(v + eps)), bit for
    bit (NumPy evaluates the same expression in the same format, IEEE 754 rounding per operation),
    rather than (x - m) a + b: its rounding error scales with |x| a and |b|, not with |y| (the form
    tf.nn.batch_normalization also uses)."""
    dt = np.dtype(dtype).type
    rng = np.random.default_rng(0)
    x = rng.standard_normal((4, 6, 5)).astype(dt)
    w, b = rng.uniform(-1.5, 1.5, 6).astype(dt), rng.standard_normal(6).astype(dt)
    m, v = rng.standard_normal(6).astype(dt), rng.uniform(0.5, 2.0, 6).astype(dt)
    y = kernels["batch_norm"].forward_eval(x=x, weight=w, bias=b, eps=EPS32, running_mean=m, running_var=v)
    a = w * (dt(1) / np.sqrt(v + dt(EPS32)))
    model = x * a[None, :, None] + (b - m * a)[None, :, None]
    assert np.array_equal(y, model)
    plain = (x - m[None, :, None]) * a[None, :, None] + b[None, :, None]
    assert not np.array_equal(y, plain)


# =========================================================================== findings

def test_float32_epsilon_attribute_shifts_float64_rstd(kernels):
    """ONNX attributes are binary32: eps = 1e-5 runs as float32(1e-5). In float64, y then agrees with
    the oracle given float32(eps) to a few float64 ulps, and differs from the oracle given 1e-5 by
    the first-order shift |xhat| * (eps - float32(eps)) / (2 (v + eps))."""
    rng = np.random.default_rng(11)
    x = rng.standard_normal((6, 256)) * 1e-3  # v = 1e-6, comparable to eps: the shift is large
    out = kernels["layer_norm"].forward(x=x, weight=None, bias=None, eps=1e-5, normalized_shape=(256,))
    e32 = float(np.float32(1e-5))
    assert e32 != 1e-5
    at32 = refnorm.layer_norm_forward(x, (256,), eps=e32)
    at64 = refnorm.layer_norm_forward(x, (256,), eps=1e-5)
    u = 2.0 ** -53
    # a two-pass float64 layer norm of 256 values: within 2 gamma_{n+8} |y| (Higham 2002 Lemma 3.1, §4.2)
    gam = (256 + 8) * u / (1 - (256 + 8) * u)
    assert np.max(np.abs(out["y"] - at32.y) / (np.abs(at32.y) + 1e-300)) < 2 * gam
    shift = np.abs(at64.y) * (1e-5 - e32) / (2 * (at64.var[:, None] + 1e-5))
    got = np.abs(out["y"] - at64.y)
    big = shift > 100 * gam * np.abs(at64.y)
    assert big.mean() > 0.9
    ratio = got[big] / shift[big]
    assert 0.9 < ratio.min() and ratio.max() < 1.1, (ratio.min(), ratio.max())


def test_float64_layer_norm_statistics_pass_through_float32(kernels):
    """Mean and InvStdDev are float32 tensors for float64 X (the standard's U): the adapter widens
    them exactly, so each is a float32 value, and a subnormal float64 mean underflows to 0."""
    x = np.random.default_rng(2).standard_normal((4, 32))
    out = kernels["layer_norm"].forward(x=x, weight=None, bias=None, eps=1e-5, normalized_shape=(32,))
    assert out["mean"].dtype == np.float64
    assert np.array_equal(out["mean"], out["mean"].astype(np.float32).astype(np.float64))
    assert np.array_equal(out["rstd"], out["rstd"].astype(np.float32).astype(np.float64))
    tiny = np.full((1, 8), 1e-310)  # float64 subnormal, below float32's smallest subnormal 1.4e-45
    assert kernels["layer_norm"].forward(x=tiny, eps=1e-5, normalized_shape=(8,))["mean"][0] == 0.0


def test_float64_layer_norm_mean_of_an_infinite_row_is_nan(kernels):
    """IEEE 754-2019 §6.1: a sum holding +Inf (and no -Inf or NaN) is +Inf, so the mean is +Inf; ORT's
    float64 LayerNormalization saves NaN, its float32 one +Inf."""
    x = np.random.default_rng(5).standard_normal((2, 16))
    x[0, 3] = np.inf
    got64 = kernels["layer_norm"].forward(x=x, eps=1e-5, normalized_shape=(16,))["mean"]
    got32 = kernels["layer_norm"].forward(x=x.astype(np.float32), eps=1e-5, normalized_shape=(16,))["mean"]
    assert np.isnan(got64[0]) and got32[0] == np.inf
    assert np.isfinite(got64[1]) and np.isfinite(got32[1])


def _eight_lane_sum(v: np.ndarray) -> np.ndarray:
    """Along the last axis (a multiple of 8 long): 8 interleaved float32 running sums (recursive
    summation in the lanes of an 8-wide SIMD register), then the lanes added as a tree
    (0..3 + 4..7, then pairs, then the last two)."""
    lanes = np.cumsum(v.reshape(v.shape[:-1] + (-1, 8)), axis=-2, dtype=np.float32)[..., -1, :]
    while lanes.shape[-1] > 1:
        h = lanes.shape[-1] // 2
        lanes = (lanes[..., :h] + lanes[..., h:]).astype(np.float32)
    return lanes[..., 0]


def test_group_norm_variance_is_the_one_pass_formula(kernels):
    """GroupNormalization-21's function body (onnx.defs, inlined by ONNX Runtime) computes
    Var = ReduceMean(X^2) - Mean^2 in float32: on data far from zero it loses about
    log10(kappa^2) digits (Chan, Golub & LeVeque 1983), where a two-pass float32 variance keeps
    all but a few ulps. The model's variance reproduces ONNX Runtime's y; the oracle's does not."""
    rng = np.random.default_rng(7)
    x = (300.0 + rng.standard_normal((2, 4, 8, 8))).astype(np.float32)   # kappa = 300
    y = kernels["group_norm"].forward(x=x, eps=1e-5, num_groups=2).astype(np.float64)
    g = x.reshape(2, 2, -1)
    n = np.float32(g.shape[-1])
    # ReduceMean's sums are the eight-lane float32 sums (test_batch_norm_mean_is_an_eight_lane_float32_sum)
    m = (_eight_lane_sum(g) / n)[..., None]
    var_one_pass = (_eight_lane_sum(g * g) / n)[..., None] - m * m
    var_exact = g.astype(np.float64).var(-1, keepdims=True)
    e = float(np.float32(1e-5))
    model = ((g - m) / np.sqrt(var_one_pass + np.float32(e))).reshape(x.shape).astype(np.float64)
    exact = refnorm.group_norm_forward(x.astype(np.float64), 2, eps=e).y
    assert np.max(np.abs(var_one_pass / var_exact - 1)) > 1e-3  # the one-pass loss itself
    assert np.max(np.abs(y - model)) < 1e-5                     # ORT follows the one-pass model ...
    assert np.max(np.abs(y - exact)) > 30 * np.max(np.abs(y - model))  # ... and not the variance




def test_batch_norm_mean_is_an_eight_lane_float32_sum(kernels):
    """With momentum 0 the running mean BatchNormalization returns is the batch mean: bit for bit the
    eight-lane float32 recursive sum divided by n, which on same-sign data is less accurate than
    NumPy's pairwise sum (Higham 2002 §4.1 and §4.2)."""
    n = 1 << 18
    x = (1e4 + np.random.default_rng(3).standard_normal(n)).astype(np.float32).reshape(1, 1, n)
    out = kernels["batch_norm"].forward(x=x, eps=1e-5, running_mean=np.zeros(1, np.float32),
                                        running_var=np.ones(1, np.float32), momentum=0.0)
    model = np.float32(_eight_lane_sum(x.ravel()) / np.float32(n))
    assert model != np.float32(np.sum(x, dtype=np.float32) / np.float32(n))  # the data tells the sums apart
    assert out["running_mean"][0] == model
    exact = x.astype(np.float64).mean()
    assert abs(float(model) - exact) > 10 * abs(float(np.sum(x, dtype=np.float32)) / n - exact)


def test_batch_norm_training_conventions(kernels):
    """BatchNormalization-15 (ONNX operator specification): running = running * momentum + batch *
    (1 - momentum), the batch variance biased (M2 / n), y normalized with the batch statistics."""
    rng = np.random.default_rng(4)
    x = rng.standard_normal((6, 3, 5))  # float64: every value here is exact in the check below
    rm, rv = np.array([0.5, -1.0, 2.0]), np.array([1.5, 0.5, 3.0])
    out = kernels["batch_norm"].forward(x=x, eps=EPS32, running_mean=rm, running_var=rv, momentum=0.25)
    mean = x.mean(axis=(0, 2))
    biased, unbiased = x.var(axis=(0, 2)), x.var(axis=(0, 2), ddof=1)
    tol = 64 * 2.0 ** -53 * 4
    assert np.allclose(out["running_mean"], 0.25 * rm + 0.75 * mean, rtol=tol, atol=0)
    assert np.allclose(out["running_var"], 0.25 * rv + 0.75 * biased, rtol=tol, atol=0)
    assert not np.allclose(out["running_var"], 0.25 * rv + 0.75 * unbiased, rtol=1e-6, atol=0)
    y = refnorm.batch_norm_forward(x, axis=1, eps=EPS32).y
    assert np.allclose(out["y"], y, rtol=0, atol=1e-13)


def test_layer_norm_eps_is_inside_the_square_root(kernels):
    """LayerNormalization-17: InvStdDev = 1 / sqrt(Var + epsilon). A constant row has Var = 0, so its
    InvStdDev is 1/sqrt(eps) (in float32), not 1/eps."""
    out = kernels["layer_norm"].forward(x=np.full((2, 16), 3.0, np.float32), eps=EPS32, normalized_shape=(16,))
    assert np.all(out["rstd"] == np.float32(1 / math.sqrt(EPS32)))
    assert np.all(out["y"] == 0)


def test_instance_norm_of_rank_two(kernels):
    """(N, C) has one element per instance: x - mean = 0, so y is the bias (definition of instance
    normalization, Ulyanov et al. 2016, eq. 2); ONNX Runtime's kernel refuses rank 2, the adapter
    runs it as (N, C, 1)."""
    x = np.random.default_rng(1).standard_normal((3, 4)).astype(np.float32)
    b = np.array([0.5, -1.0, 2.0, 0.25], np.float32)
    y = kernels["instance_norm"].forward(x=x, weight=np.ones(4, np.float32), bias=b, eps=1e-5, axis=1)
    assert y.shape == (3, 4) and np.array_equal(y, np.broadcast_to(b, (3, 4)))


def test_channels_last_is_a_transpose_of_channels_first(kernels):
    """The channels-last model wraps the channels-first operator in Transpose nodes: the same values
    bit for bit (a transpose moves values exactly)."""
    x = np.random.default_rng(9).standard_normal((2, 6, 5, 4)).astype(np.float32)
    w = np.linspace(0.5, 1.5, 6).astype(np.float32)
    for op, kw in (("group_norm", {"num_groups": 3}), ("instance_norm", {}), ("batch_norm", {})):
        k = kernels[op]
        yf = k.forward(x=x, weight=w, bias=None, eps=1e-5, axis=1, **kw)
        yl = k.forward(x=np.moveaxis(x, 1, -1).copy(), weight=w, bias=None, eps=1e-5, axis=-1, **kw)
        yf, yl = (v["y"] if isinstance(v, dict) else v for v in (yf, yl))
        assert np.array_equal(np.moveaxis(yl, -1, 1), yf), op


# =========================================================================== the command line

@pytest.mark.parametrize("op", OPS + ("batch_norm_mixed",))
def test_refnorm_check_smoke_tier(op, tmp_path, capsys):
    out = tmp_path / "r.json"
    dts = [d for d in RUNS[op] if d != "float64"]  # float64 fails on the float32 eps (documented)
    code = cli.main(["check", f"{SPEC}:{op}", "--tier", "smoke", "--dtype", *dts, "--json", str(out), "--quiet"])
    doc = json.loads(out.read_text())
    ran = [c for c in doc["cases"] if c["status"] != "skipped"]
    assert ran and {c["case"]["dtype"] for c in ran} == set(dts)
    assert doc["kernel"]["device"] == "CPUExecutionProvider"
    assert all(o["name"] not in ("dx", "dweight", "dbias") for c in ran for o in c["outputs"])
    bad = sorted(c["id"] for c in ran if c["status"] != "passed")
    if op == "group_norm":
        # the one-pass variance of GroupNormalization-21 (test_group_norm_variance_is_the_one_pass_formula)
        # loses the cancellation cases: exactly those fail, on y
        assert code == 1 and bad == [f"group_norm/{dt}/channels_first/4x8x6x5/groups=4/cancellation/w=random/"
                                     "b=random/eps=1e-05/train/contiguous" for dt in sorted(dts)], bad
        return
    assert code == 0 and not bad, capsys.readouterr().out[-2000:]


def test_refnorm_check_standard_tier_layer_norm(tmp_path, capsys):
    out = tmp_path / "r.json"
    code = cli.main(["check", f"{SPEC}:layer_norm", "--dtype", "float32", "--workers", "2", "--json", str(out),
                     "--quiet"])
    doc = json.loads(out.read_text())
    assert doc["run"]["tier"] == "standard" and doc["counts"]["passed"] > 20
    assert code == 0, capsys.readouterr().out[-2000:]


def test_provider_option_reaches_the_spec(tmp_path):
    out = tmp_path / "r.json"
    case = "layer_norm/float32/trailing/4x64/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous"
    code = cli.main(["check", f"{SPEC}:layer_norm", "--provider", "CPUExecutionProvider", "--case", case,
                     "--json", str(out), "--quiet"])
    assert code == 0
    doc = json.loads(out.read_text())
    assert doc["run"]["spec"] == f"{SPEC}:layer_norm?provider=CPUExecutionProvider"


@pytest.mark.parametrize("argv, words", [
    (["--provider", "NoSuchExecutionProvider"], ["NoSuchExecutionProvider", "is not an ONNX Runtime execution provider",
                                                 "CPUExecutionProvider"]),
    (["--provider", "TensorrtExecutionProvider"], ["not available in this onnxruntime build", "available here"]),
    (["--provider", "CPU,EP"], ["--provider", "expected a name"]),
    (["--provider", ""], ["--provider", "expected a name"]),
])
def test_bad_provider_is_a_usage_error(argv, words, capsys):
    if "TensorrtExecutionProvider" in argv and "TensorrtExecutionProvider" in _ort().get_available_providers():
        pytest.skip("this onnxruntime build has TensorRT")
    assert cli.main(["check", f"{SPEC}:layer_norm", *argv, "--quiet"]) == 2
    err = capsys.readouterr().err
    assert all(w in err for w in words), err


def test_another_provider_runs_alone_and_is_declared_unverified(capsys):
    """A provider other than the CPU's: the CPU fallback is disabled, so a provider that cannot run
    the operator fails to load (exit 2, one line, no ONNX Runtime log lines), and its declaration is
    the CPU's with worst-case summation, marked NOT VERIFIED. onnxruntime's CPU wheel also ships the
    Azure provider, which runs no normalization operator: the path needs no accelerator."""
    if "AzureExecutionProvider" not in _ort().get_available_providers():
        pytest.skip("this onnxruntime build has no second provider to try")
    rt = ort_ep._Runtime("rms_norm", "AzureExecutionProvider", 0)
    assert not rt.verified
    p, cpu = rt.precision("float16"), ort_ep._cpu_precision("rms_norm", "float16", None)
    assert p.summation == "worst" and p.accumulate == cpu.accumulate
    assert "NOT VERIFIED for AzureExecutionProvider" in rt.notes("x", {})
    assert cli.main(["check", f"{SPEC}:layer_norm", "--provider", "AzureExecutionProvider", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("refnorm: error: AzureExecutionProvider runs LayerNormalization "
                                                    "in none of"), err
    assert "fallback to CPU EP has been explicitly disabled" in err


@pytest.mark.parametrize("spec, words", [
    (f"{SPEC}:layer_norm?threads=-1", ["threads", "whole number"]),
    (f"{SPEC}:layer_norm?threads=many", ["threads", "whole number"]),
    (f"{SPEC}:layer_norm?device=cuda", ["takes no parameter device", "provider, threads"]),
    (f"{SPEC}:layer_norm?provider=CPUExecutionProvider,provider=CPUExecutionProvider", ["given twice"]),
    (f"{SPEC}:batch_norm?params=half", ["params", "'storage' or 'float32'"]),
])
def test_bad_spec_parameters(spec, words, capsys):
    assert cli.main(["check", spec, "--quiet"]) == 2
    err = capsys.readouterr().err
    assert all(w in err for w in words), err


def test_missing_package_names_the_extra(monkeypatch):
    monkeypatch.setitem(sys.modules, "onnxruntime", None)  # import onnxruntime now raises ImportError
    with pytest.raises(KernelError, match=r"refnorm\[onnx\]"):
        ort_ep.layer_norm()


def test_no_operator_version_is_a_clear_error(monkeypatch):
    import onnx

    monkeypatch.setitem(ort_ep.OPERATORS, "rms_norm", ort_ep.Operator("RMSNormalization", 99, "a test's demand"))
    with pytest.raises(KernelError, match=rf"onnx {onnx.__version__} has RMSNormalization-\d+; .* version 99"):
        ort_ep.rms_norm()


# =========================================================================== peers and report

def test_onnxruntime_runs_beside_a_kernel_in_the_report(tmp_path):
    from conformance.report import write_report
    from conformance.report.peers import LIBRARIES, compare, run_peers

    spec = f"{TESTS / 'harness_kernels.py'}:good_layer_norm"
    doc = run_check(load_kernel(spec), RunOptions(tier="smoke", seed=2), spec=spec, quiet=True)
    lib = [x for x in LIBRARIES if x.adapter == SPEC]
    assert lib, "ONNX Runtime is not among the report's peers"
    peers = run_peers(doc, lib)
    entry = peers["libraries"][0]
    assert entry["status"] == "ran", entry["reason"]
    assert entry["versions"]["onnxruntime"] == _ort().__version__
    pdoc = entry["runs"][0]["doc"]
    assert pdoc["kernel"]["device"] == "CPUExecutionProvider"
    rows = compare(doc, peers)
    outs = {r.output for r in rows if "ONNX Runtime CPU" in r.peers}
    assert outs == {"y", "mean", "rstd"}  # forward outputs only: no gradients from ONNX Runtime
    paths = write_report(doc, tmp_path, peers=peers)
    md = paths["markdown"].read_text(encoding="utf-8")
    assert "ONNX Runtime CPU" in md


def test_report_header_names_the_device(tmp_path):
    from conformance.report import write_report

    spec = f"{SPEC}:rms_norm"
    doc = run_check(load_kernel(spec), RunOptions(tier="smoke", dtypes=("float32",)), spec=spec, quiet=True)
    paths = write_report(doc, tmp_path, peers=None)
    md = paths["markdown"].read_text(encoding="utf-8")
    html = paths["html"].read_text(encoding="utf-8")
    assert "device CPUExecutionProvider" in md.splitlines()[2]
    assert "device CPUExecutionProvider" in html.split('<div class="who">', 1)[1].split("</div>", 1)[0]
    # No gradients from ONNX Runtime: the report names each as left unchecked (conformance.kernel.unchecked_outputs).
    assert "Outputs the declaration leaves unchecked" in html and "dx (train): no backward entry point" in html


def test_threads_parameter_sets_the_session():
    """threads=1 runs a single intra-op thread (recorded in the notes); LayerNormalization's rows are
    independent sums, so the bits equal the default's (common practice: per-row work split over threads)."""
    one = load_kernel(f"{SPEC}:layer_norm?threads=1")
    assert "intra-op threads 1" in one.notes
    x = np.random.default_rng(8).standard_normal((64, 300)).astype(np.float32)
    a = one.forward(x=x, eps=1e-5, normalized_shape=(300,))
    b = ort_ep.layer_norm().forward(x=x, eps=1e-5, normalized_shape=(300,))
    assert all(np.array_equal(a[k], b[k]) for k in ("y", "mean", "rstd"))
