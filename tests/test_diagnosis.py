"""The diagnosis names each seeded bug's own cause first, and gives correct kernels none.

Every numeric seeded bug of tests/seeded_bugs.py and tests/fused_kernels.py runs in-process on one or two
small catalog cases where it fails (conformance.run.execute.execute_case: the worker's own code path);
on the outputs the bug corrupts, the diagnosis's first-named cause must be the hypothesis that models
that bug, and its budget under that hypothesis must be within the bound. What each hypothesis models
comes from outside the code under test: the library conventions of docs/conventions.md (each checked
there against torch, Keras or ONNX Runtime), the papers and standards named beside each entry below, or
common practice. The bugs' docstrings (tests/seeded_bugs.py) say the same in the bug's own words.

Not covered here, and why: the crash, hang and in-place bugs have no wrong output to explain (their
status says it); the quantized-output bugs (tests/quant_bugs.py: y_q and scale) and the multi-replica
bugs (tests/replica_kernels.py, judged in conformance/run/replicas.py) are outside the diagnosis's scope
so far. A diagnosis is evidence on the hypotheses tried, not a proof of the cause.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import fused_kernels as fk
import seeded_bugs as sb
from conformance.cases import catalog
from conformance.diagnosis import HYPOTHESES
from conformance.diagnosis.hypotheses import _toward_zero, address_order
from conformance.diagnosis.locate import rank_correlation
from conformance.results import as_float
from conformance.run import RunOptions, run_check
from conformance.run.execute import execute_case

LN, BN, GN, IN, RMS = "layer_norm", "batch_norm", "group_norm", "instance_norm", "rms_norm"
T = "train/contiguous"

#: bug key -> (hypothesis key named first, outputs it must be named on, case ids). Sources of what each
#: hypothesis models are beside each entry.
SEEDED = {
    # docs/conventions.md, running-variance estimator: torch unbiased M2/(n-1), Keras biased M2/n.
    "biased_running_var": ("running_var_estimator", ("running_var",),
                           (f"{BN}/float32/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/train/momentum=0.01/"
                            "contiguous",)),
    # docs/conventions.md, momentum: torch weights the new value, Keras the old.
    "flipped_momentum": ("momentum_convention", ("running_mean", "running_var"),
                         (f"{IN}/float32/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/train/momentum=0.01/"
                          "contiguous",)),
    # Ioffe & Szegedy 2015, Alg. 1; Ba, Kiros & Hinton 2016, eq. 4 (from memory): eps inside the root.
    "eps_outside_sqrt": ("eps_placement", ("y", "rstd"),
                         (f"{LN}/float32/trailing/2x5x6/norm_ndim=2/normal/w=random/b=random/eps=1e-05/{T}",)),
    # Chan, Golub & LeVeque 1983, §1 (from memory): the one-pass formula cancels for |mean| >> std.
    "one_pass_variance": ("one_pass_variance", ("rstd", "y"),
                          (f"{LN}/float32/trailing/12x96/norm_ndim=1/cancellation/w=random/b=random/eps=1e-05/{T}",)),
    # Higham 2002, §4.2: sums in a format of unit roundoff u err by ~ n u (bfloat16: u = 2^-8).
    "bf16_param_grads": ("storage_sums", ("dweight", "dbias"),
                         (f"{BN}/bfloat16/channels_first/5x6x1x1/normal/w=random/b=random/eps=1e-05/{T}",)),
    # Wu & He 2018, §3 (from memory); docs/conventions.md: torch and Keras group consecutive channels.
    "interleaved_groups": ("interleaved_groups", ("y", "mean", "rstd", "dx"),
                           (f"{GN}/float32/channels_first/5x6x1x1/groups=2/normal/w=random/b=random/eps=1e-05/{T}",
                            f"{GN}/float32/channels_last/5x1x1x6/groups=2/normal/w=random/b=random/eps=1e-05/{T}")),
    # Ioffe & Szegedy 2015, §3 (from memory): dx has terms through the batch mean and variance.
    "constant_stats_backward": ("constant_statistics_backward", ("dx",),
                                (f"{GN}/float32/channels_first/4x8x6x5/groups=4/normal/w=random/b=random/eps=1e-05/{T}",)),
    # Ioffe & Szegedy 2015, Alg. 1 (from memory): dweight sums over every axis but the channel.
    "dweight_first_spatial_axis": ("partial_parameter_reduction", ("dweight",),
                                   (f"{BN}/float32/channels_first/1x6x7x7/normal/w=random/b=random/eps=1e-05/{T}",)),
    # NumPy ndarray.strides: only a C-contiguous array holds its logical order in memory.
    "strides_ignored": ("strides_ignored", ("y", "mean", "rstd", "dx"),
                        (f"{BN}/float32/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/train/"
                         "channels_last_memory",)),
    # Common practice: a vector loop without its remainder loop drops length % width elements.
    "dropped_tail": ("dropped_tail", ("y", "rstd", "dx"),
                     (f"{RMS}/float32/trailing/7x13/norm_ndim=1/normal/w=random/b=none/eps=1e-05/{T}",)),
    # docs/conventions.md, eval mode: torch and Keras normalize with the running statistics.
    "eval_batch_stats": ("eval_batch_statistics", ("y",),
                         (f"{BN}/float32/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/eval/contiguous",)),
    # IEEE 754-2019 binary16 (largest 65504) and Higham 2002, §4.2: float16 sums of the parameter gradients.
    "half_param_sums": ("storage_sums", ("dbias",),
                        (f"{LN}/float16/trailing/2x5x6/norm_ndim=2/normal/w=random/b=random/eps=1e-05/{T}",)),
    # IEEE 754-2019 binary16: eps = 1e-12 is below the smallest subnormal 2^-24 and rounds to 0.
    "eps_in_storage_format": ("eps_in_storage", ("rstd",),
                              (f"{LN}/float16/trailing/12x96/norm_ndim=1/constant/w=random/b=random/eps=1e-12/{T}",)),
    # docs/conventions.md, how y is formed: folded x scale + shift (torch CPU, Keras) against centred.
    "folded_eval": ("y_form", ("y",),
                    (f"{BN}/float32/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/eval/running=at_mean/"
                     "contiguous",)),
    # IEEE 754-2019 §7.4: running statistics beyond float16's range become Inf when converted.
    "running_stats_in_storage": ("running_in_storage", ("y",),
                                 (f"{BN}/float16/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/eval/"
                                  "contiguous",)),
    # OCP 8-bit floating point specification v1.0 (from memory): saturating vs non-saturating conversion.
    "saturating_cast": ("saturating_overflow", ("dx",),
                        (f"{LN}/float8_e4m3fn/trailing/12x96/norm_ndim=1/constant/w=random/b=random/eps=1e-05/{T}",)),
    # docs/library-precision.md: ATen's bfloat16 batch-norm statistics are rounded to bfloat16.
    "stats_rounded_to_storage": ("statistics_in_storage", ("y", "mean", "rstd"),
                                 (f"{LN}/bfloat16/trailing/2x5x6/norm_ndim=2/normal/w=random/b=random/eps=1e-05/{T}",)),
    # IEEE 754-2019 §7.4 and §7.2: squares of |x| ~ 3e19 overflow binary32, Inf - Inf is NaN.
    "merge_squares_overflow": ("squares_overflow", ("rstd", "y"),
                               (f"{LN}/float32/trailing/12x96/norm_ndim=1/large/w=random/b=random/eps=1e-05/{T}",)),
    # IEEE 754-2019 §7.2: 0/0 is NaN (an empty lane's count in the merge).
    "empty_merge_nan": ("nan_inside_reduction", ("mean",),
                        (f"{LN}/float32/trailing/2x5x6/norm_ndim=2/normal/w=random/b=random/eps=1e-05/{T}",)),
    # IEEE 754-2019 §3.3: subnormals below 2^-126 in binary32, flushed by FTZ/DAZ.
    "flush_undeclared": ("subnormals_flushed", ("mean", "dweight"),
                         (f"{LN}/float32/trailing/12x96/norm_ndim=1/subnormal/w=random/b=random/eps=1e-05/{T}",)),
}

#: fused-kernel bug -> (kernel arguments of fused_kernels.fused, hypothesis key, outputs). Sources:
#: docs/conventions.md, "Fused residual add + norm" (h rounded to storage before it is normalized; dx =
#: dresidual = dh + the norm's gradient) and "RMS norm's weight offset" (Gemma-family 1 + w, from memory).
FUSED = {
    "unrounded_h": (("add_rms_norm", "bfloat16", None, 0.0, fk.UnroundedH), "h_format", ("y",)),
    "unrounded_h_layer": (("add_layer_norm", "float16", "float32", 0.0, fk.UnroundedH), "h_format", ("y", "mean")),
    "dh_dropped": (("add_layer_norm", "float32", None, 0.0, fk.DhDropped), "dh_dropped", ("dx",)),
    "offset_twice": (("add_rms_norm", "bfloat16", None, 1.0, fk.OffsetTwice), "weight_offset", ("y", "dx")),
}


def _cases(op: str, dtype: str, ids: tuple[str, ...]):
    by_id = {c.id: c for c in catalog([op], [dtype], "standard")}
    missing = [i for i in ids if i not in by_id]
    assert not missing, f"case ids not in the standard catalog: {missing}"
    return [by_id[i] for i in ids]


def _first_cause(res, name: str) -> dict:
    out = next(o for o in res.outputs if o["name"] == name)
    assert not out["passed"], f"{res.id}: {name} passed, nothing to diagnose"
    return out["diagnosis"]


def test_every_numeric_seeded_bug_is_listed():
    # The crash, hang and in-place bugs have no wrong output (their status is the finding).
    assert set(SEEDED) | {"null_weight_crash", "single_row_hang", "inplace_input"} == set(sb.BUGS)
    keys = {h.key for h in HYPOTHESES}
    assert {k for k, _, _ in SEEDED.values()} <= keys and {k for _, k, _ in FUSED.values()} <= keys


@pytest.mark.parametrize("key", sorted(SEEDED))
def test_seeded_bug_gets_its_own_cause_first(key):
    bug = sb.BUGS[key]
    want, names, ids = SEEDED[key]
    for case in _cases(bug.op, bug.storage, ids):
        res = execute_case(bug.kernel, case, 0)
        assert res.status == "failed", f"{case.id}: {res.status}"
        for name in names:
            d = _first_cause(res, name)
            assert d.get("cause_key") == want, f"{key} {case.id} {name}: {d.get('text') or d}"
            best = d["hypotheses"][0]
            assert best["explained"] and as_float(best["budget"]) <= 1.0 < as_float(d["budget_before"]), best
            assert f"diagnosis: likely cause of {name}: " in res.message
        # the same code without the bug, declared alike, passes and so gets no diagnosis
        ok = execute_case(bug.correct, case, 0)
        assert ok.status == "passed", ok.message[:300]
        assert not any(o.get("diagnosis") for o in ok.outputs) and "diagnosis:" not in ok.message


@pytest.mark.parametrize("key", sorted(FUSED))
def test_fused_bug_gets_its_own_cause_first(key):
    (op, storage, params, offset, cls), want, names = FUSED[key]
    kernel = fk.fused(op, storage, params, offset, cls)
    correct = fk.fused(op, storage, params, offset, fk.NumpyAddNorm)
    case = next(c for c in catalog([op], [storage], "standard")
                if c.values == "normal" and c.mode == "train" and c.strides == "contiguous" and c.shape == (12, 96)
                and c.weight == "random")
    res = execute_case(kernel, case, 0)
    assert res.status == "failed", res.message[:300]
    for name in names:
        d = _first_cause(res, name)
        assert d.get("cause_key") == want, f"{key} {name}: {d.get('text') or d}"
    ok = execute_case(correct, case, 0)
    assert ok.status == "passed" and not any(o.get("diagnosis") for o in ok.outputs)


def test_torch_cpu_gets_no_diagnosis_where_it_passes():
    """torch's CPU kernels (a general-purpose reference library) pass these cases: no diagnosis."""
    pytest.importorskip("torch")
    from conformance.adapters import torch_cpu

    for op, factory in ((LN, torch_cpu.layer_norm), (BN, torch_cpu.batch_norm)):
        k = factory()
        cases = [c for c in catalog([op], ["float32"], "smoke") if c.values == "normal"][:3]
        assert cases
        for c in cases:
            r = execute_case(k, c, 0)
            assert r.status == "passed", r.message[:300]
            assert not any(o.get("diagnosis") for o in r.outputs) and "diagnosis:" not in r.message


class _Noisy(sb.NumpyNorm):
    """Row 3 of y gets an error no hypothesis models: 1e-3 relative, on every element of that row."""

    def forward(self, x, weight=None, bias=None, **kw):
        out = super().forward(x, weight, bias, **kw)
        y = out[0].copy()
        y[3] = (y[3].astype(np.float64) * (1 + 1e-3)).astype(y.dtype)
        return (y, *out[1:])


def test_an_unexplained_failure_says_so_and_where_it_lives():
    k = _Noisy(LN).kernel("noisy row")
    case = _cases(LN, "float32", (f"{LN}/float32/trailing/12x96/norm_ndim=1/normal/w=random/b=random/eps=1e-05/{T}",))[0]
    res = execute_case(k, case, 0)
    d = _first_cause(res, "y")
    assert d["cause"] is None and not d["explained"]
    assert d["text"].startswith("no tried explanation brings y within its bound")
    assert "in 1 of 12 rows (3)" in d["where"], d["where"]
    assert d["length"] == 96 and d["condition"] >= 1.0


def test_the_dropped_tail_is_located_in_the_last_positions():
    """DroppedTail drops 13 % 8 = 5 elements of each 13 (common practice: a remainder loop is needed)."""
    bug = sb.BUGS["dropped_tail"]
    res = execute_case(bug.kernel, _cases(bug.op, bug.storage, SEEDED["dropped_tail"][2])[0], 0)
    d = _first_cause(res, "y")
    assert "the last 5 of every 13 elements dropped" in d["cause"]


def test_a_diagnosis_never_changes_the_verdict(monkeypatch):
    """With every hypothesis failing, and with the diagnosis removed, statuses and metrics are the same."""
    import conformance.diagnosis as D
    from conformance.diagnosis import rank

    bug = sb.BUGS["eps_outside_sqrt"]
    case = _cases(bug.op, bug.storage, SEEDED["eps_outside_sqrt"][2])[0]
    with_diag = execute_case(bug.kernel, case, 0)

    def broken(ev, names):
        raise RuntimeError("hostile hypothesis")

    monkeypatch.setattr(rank, "HYPOTHESES", tuple(type(h)(h.key, h.kind, h.explanation, h.source, h.outputs, broken)
                                                 for h in rank.HYPOTHESES))
    hostile = execute_case(bug.kernel, case, 0)
    d = _first_cause(hostile, "y")
    assert d["cause"] is None and any("hostile hypothesis" in e for e in d["errors"])
    monkeypatch.setattr(D, "attach", lambda *a, **k: (_ for _ in ()).throw(MemoryError("diagnosis crashed")))
    without = execute_case(bug.kernel, case, 0)
    for r in (hostile, without):
        assert r.status == with_diag.status == "failed"
        for a, b in zip(r.outputs, with_diag.outputs):
            assert (a["passed"], a["budget_used"], a["mismatched"]) == (b["passed"], b["budget_used"], b["mismatched"])
    assert "diagnosis" not in without.message


def test_diagnosis_reaches_the_summary_results_report_and_ci_message():
    from conformance.gate.waivers import gate_outcome
    from conformance.report.html import render_html
    from conformance.report.markdown import render_markdown
    from conformance.summary import verdict_lines
    import json

    from conformance.documents import check

    bug = sb.BUGS["biased_running_var"]
    doc = run_check(bug.kernel, RunOptions(tier="standard", dtypes=(bug.storage,), workers=1,
                                           case_ids=SEEDED["biased_running_var"][2]), quiet=True)  # in a worker
    doc = check(json.loads(json.dumps(doc, allow_nan=False)))  # docs/results-schema.json, with the diagnosis object
    lines = verdict_lines(doc)
    assert any(ln.startswith("diagnosis of running_var (1 failing): running_var_estimator=biased") for ln in lines)
    md = render_markdown(doc)
    assert "### Diagnosis" in md and r"running\_var\_estimator=biased" in md
    assert 'id="diagnosis"' in render_html(doc, [])
    outcome, msg = gate_outcome(doc["cases"][0])  # what the pytest plugin and JUnit XML show
    assert outcome == "failed" and "diagnosis: likely cause of running_var: running_var_estimator=biased" in msg


def test_address_order_is_the_buffer_order():
    """NumPy ndarray.strides: a transposed view of a C-contiguous buffer holds the buffer in address order."""
    base = np.arange(24, dtype=np.float32).reshape(2, 3, 4)
    t = np.transpose(base, (0, 2, 1))
    np.testing.assert_array_equal(address_order(t), base.reshape(t.shape))
    rev = base[::-1, ::-1, ::-1]
    np.testing.assert_array_equal(address_order(rev), base.reshape(rev.shape))
    assert address_order(base) is None


def test_toward_zero_matches_nextafter():
    """IEEE 754-2019 §4.3.2 roundTowardZero: the nearest value, or its neighbour toward zero when nearest
    rounded away (checked against NumPy's float32 nextafter, a separate implementation)."""
    rng = np.random.default_rng(5)
    e = np.concatenate([rng.standard_normal(2000) * 10.0 ** rng.integers(-40, 38, 2000), [1.0, -2.0, 0.0, 1e-45]])
    near = e.astype(np.float32)
    want = np.where(np.abs(near.astype(np.float64)) > np.abs(e), np.nextafter(near, np.float32(0)), near)
    np.testing.assert_array_equal(_toward_zero("float32", e), want.astype(np.float64))


def test_rank_correlation_is_spearmans():
    """Spearman 1904: the Pearson correlation of the ranks; a monotone relation gives +-1."""
    assert rank_correlation([1, 2, 3, 4], [10, 20, 35, 1000]) == pytest.approx(1.0)
    assert rank_correlation([1, 2, 3, 4], [4, 3, 2, 1]) == pytest.approx(-1.0)
    assert math.isnan(rank_correlation([1, 2], [3, 4]))
    # scipy-free check against the textbook formula 1 - 6 sum d^2 / (n (n^2 - 1)) for distinct ranks
    a, b = [3.0, 1.0, 4.0, 1.5, 5.0], [2.0, 7.0, 1.0, 8.0, 2.5]
    ra, rb = np.argsort(np.argsort(a)), np.argsort(np.argsort(b))
    n = len(a)
    assert rank_correlation(a, b) == pytest.approx(1 - 6 * np.sum((ra - rb) ** 2) / (n * (n * n - 1)))


@pytest.mark.parametrize("op", [BN, GN, IN, LN, RMS])
def test_the_model_with_no_step_changed_is_the_oracle(op):
    """conformance.diagnosis.model with the default Steps computes the oracle's formulas (an equivalence of
    two codings of Ioffe & Szegedy 2015, Alg. 1 and §3, the oracle being checked against torch and Keras in
    test_oracle_torch.py and test_oracle_keras.py): agreement to a few float64 roundings, 2 gamma_{n+8} of the
    outputs' scale times 64 (the two sum in other orders, the oracle with a corrected mean: each within a few
    gamma_n of exact, Higham 2002, §3.1 and §4.2), on every output the model gives, running statistics included."""
    from conformance import ops
    from conformance.cases.generators import make_inputs
    from conformance.diagnosis.model import Steps, model_outputs
    from conformance.kernel import Conventions, Precision

    case = next(c for c in catalog([op], ["float64"], "standard") if c.values == "normal" and c.mode == "train"
                and (c.running or not ops.get(op).has_eval) and c.weight == "random")
    conv = Conventions()
    inp = {k: (None if v is None else np.asarray(v, np.float64))
           for k, v in make_inputs(case, Precision("float64").resolved(), 0).items()}
    fwd = ops.oracle_forward(case, conv, inp)
    bwd = ops.oracle_backward(case, conv, inp)
    spec = ops.get(op)
    names = ("y", "rstd", "var", "dx", "dweight", "dbias") + (("mean",) if spec.centered else ()) \
        + (("running_mean", "running_var") if spec.has_eval else ())
    got = model_outputs(case, spec.axes.view(case), inp, eps=case.eps, placement="inside", center=spec.centered,
                        steps=Steps(), names=names, running=("new", "unbiased", spec.running_from_samples))
    want = {"y": fwd.y, "rstd": fwd.rstd, "var": fwd.var, "mean": fwd.mean, "dx": bwd.dx, "dweight": bwd.dweight,
            "dbias": bwd.dbias, "running_mean": fwd.running_mean, "running_var": fwd.running_var}
    n = case.group_length
    g = 2 * (n + 8) * 2.0 ** -53 / (1 - (n + 8) * 2.0 ** -53)
    for name in names:
        scale = max(1.0, float(np.max(np.abs(want[name]))))
        np.testing.assert_allclose(got[name], want[name], rtol=0, atol=64 * g * scale, err_msg=name)


class _ChannelsLastReadFirst(sb.NumpyNorm):
    """A channel-axis bug: the contiguous channels-last buffer (N, *spatial, C) is read as channels first
    (N, C, *spatial), and the outputs written back into the case's shape (common practice: a kernel that
    assumes NCHW and is handed NHWC memory)."""

    def _misread(self, a):
        a = np.ascontiguousarray(a)
        return a.reshape(a.shape[0], a.shape[-1], *a.shape[1:-1])

    def forward(self, x, weight=None, bias=None, *, axis=1, **kw):
        shape = np.shape(x)
        out = super().forward(self._misread(x), weight, bias, axis=1, **kw)
        return (out[0].reshape(shape), *out[1:])

    def backward(self, dy, x, weight=None, *, axis=1, **kw):
        shape = np.shape(x)
        dx, dw, db = super().backward(self._misread(dy), self._misread(x), weight, axis=1, **kw)
        return dx.reshape(shape), dw, db


@pytest.mark.parametrize("op", [BN, GN])
def test_channels_taken_from_the_wrong_axis(op):
    """docs/conventions.md (layouts): channels-last data read as channels-first is named as the channel axis."""
    k = _ChannelsLastReadFirst(op).kernel("channels-last read as channels-first")
    case = next(c for c in catalog([op], ["float32"], "standard") if c.layout == "channels_last"
                and c.strides == "contiguous" and c.values == "normal" and c.mode == "train" and len(c.shape) == 4
                and c.shape[1] != c.shape[-1])
    res = execute_case(k, case, 0)
    assert res.status == "failed"
    for name in ("y", "mean", "rstd", "dx", "dweight"):
        assert _first_cause(res, name).get("cause_key") == "channel_axis", (name, _first_cause(res, name)["text"])


def test_summary_lines_show_hostile_text_and_refused_fields():
    """A results file is input: control characters in a diagnosis are shown, not sent to the terminal
    (conformance.text.visible), and a diagnosis of the wrong type is refused by the schema."""
    import json

    from conformance.diagnosis import diagnosis_lines
    from conformance.documents import DocumentError, check

    bug = sb.BUGS["biased_running_var"]
    doc = run_check(bug.kernel, RunOptions(tier="standard", dtypes=(bug.storage,), workers=1,
                                           case_ids=SEEDED["biased_running_var"][2]), quiet=True)
    doc = json.loads(json.dumps(doc))
    out = next(o for o in doc["cases"][0]["outputs"] if o.get("diagnosis"))
    out["diagnosis"]["text"] = "evil \x1b[2J text"
    out["diagnosis"]["cause"] = "cause\x07"
    lines = "\n".join(diagnosis_lines(check(doc)))
    assert "\x1b" not in lines and "\x07" not in lines and "evil" in lines
    out["diagnosis"]["hypotheses"] = "not a list"
    with pytest.raises(DocumentError, match="diagnosis"):
        check(doc)


def test_a_diagnosis_keeps_within_the_cases_time(monkeypatch):
    """With no time left of the case's timeout, nothing is tried and the diagnosis says so; the verdict stands."""
    from conformance.run import execute

    bug = sb.BUGS["biased_running_var"]
    case = _cases(bug.op, bug.storage, SEEDED["biased_running_var"][2])[0]
    monkeypatch.setattr(execute, "CASE_TIMEOUT_S", 1e-9)
    res = execute_case(bug.kernel, case, 0)
    d = _first_cause(res, "running_var")
    assert res.status == "failed" and d["cause"] is None and d["tried"] == 0 and d["not_tried"]
    assert "not tried: the diagnosis's time limit" in d["text"]


def test_a_failure_under_a_fixed_tolerance_is_not_diagnosed_and_says_why():
    # A fixed atol + rtol |expected| (numpy.testing.assert_allclose's form) can fail a correct result: the
    # explanations are ranked by derived bounds, so such an output gets a stated absence, not a cause.
    bug = sb.BUGS["eps_outside_sqrt"]
    case = _cases(bug.op, bug.storage, SEEDED["eps_outside_sqrt"][2])[0]
    res = execute_case(bug.correct, case, 0, overrides={"y": (0.0, 0.0)})
    y = next(o for o in res.outputs if o["name"] == "y")
    assert res.status == "failed" and not y["passed"]
    assert y["diagnosis"]["text"].startswith("no diagnosis of y: judged under a fixed tolerance")
    assert "cause" not in y["diagnosis"]
