"""The harness catches every seeded bug of tests/seeded_bugs.py, on the output the bug corrupts.

For each bug the `standard` tier of its op and dtype runs twice on the same
cases: once with the buggy kernel, once with the same code without the bug
(declared alike). The checks:

* the verdict is "not conformant", and the outputs the bug corrupts are
  among the failing ones, by at least 10x their derived bound on some case
  (budget_used >= 10); the outputs the bug cannot touch never fail;
* where the bug is confined to some cases (rank > 3, non-contiguous strides,
  lengths not a multiple of 8, eval mode), only those cases fail;
* the bug-free kernel passes every case the buggy one failed (and, in
  test_correct_kernels_pass, the whole tier), so the bug and not the harness
  makes the difference.

The crash and hang kernels run on a few case ids only, with a 5 s per-case
timeout. Passing these checks is evidence that the harness sees these bugs on
these cases, not a proof that it sees every bug.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from typing import Callable

import pytest

from conformance.cases import catalog
from conformance.run import RunOptions, run_check

import seeded_bugs as sb
from seeded_bugs import BUGS, SeededBug, correct_kernel

MARGIN = 10.0  # the bug must exceed its derived bound at least this many times on some case
WORKERS = 2


def _budget(o: dict) -> float:
    b = o.get("budget_used", 0.0)
    return float(b)  # "inf" and "nan" are written as strings in the document


@dataclass(frozen=True)
class Expect:
    """What a bug must do to the results: ``fails`` corrupted outputs, ``clean`` untouched ones,
    ``where`` the cases it is confined to (None: no confinement claimed)."""

    fails: tuple[str, ...]
    clean: tuple[str, ...]
    where: Callable[[dict], bool] | None = None
    status: str = "failed"


def _rank_above_3(case: dict) -> bool:
    return len(case["shape"]) > 3


def _strided(case: dict) -> bool:
    return case["strides"] != "contiguous"


def _tail(case: dict) -> bool:
    k = math.prod(case["shape"][len(case["shape"]) - case["norm_ndim"]:])
    return k % 8 != 0


def _eval(case: dict) -> bool:
    return case["mode"] == "eval"


def _values(*kinds: str) -> Callable[[dict], bool]:
    return lambda case: case["values"] in kinds


EXPECT: dict[str, Expect] = {
    # Bessel's correction M2/(n-1); torch.nn.BatchNorm2d docs: the moving average of the variance
    # uses the unbiased estimator. Only running_var depends on the estimator.
    "biased_running_var": Expect(("running_var",), ("y", "mean", "rstd", "running_mean", "dx", "dweight", "dbias")),
    # torch.nn.BatchNorm2d/InstanceNorm2d docs: new = (1 - momentum) old + momentum observed.
    "flipped_momentum": Expect(("running_mean", "running_var"), ("y", "mean", "rstd", "dx", "dweight", "dbias")),
    # Ba, Kiros & Hinton 2016, eq. 4 / Ioffe & Szegedy 2015, Alg. 1 (numbers from memory): eps inside
    # the square root; the mean and dbias = sum(dy) do not involve eps.
    "eps_outside_sqrt": Expect(("y", "rstd", "dx"), ("mean", "dbias")),
    # Chan, Golub & LeVeque 1983, §1 (from memory): E[x^2] - E[x]^2 loses ~kappa^2 u relative accuracy.
    # dbias = sum(dy) does not involve the variance. (The saved mean is not claimed clean: the
    # one-pass kernel's plain sum/n mean is +-Inf where the oracle's is NaN, see the report.)
    "one_pass_variance": Expect(("rstd", "y"), ("dbias",)),
    # Higham 2002, §4.2: recursive summation in a format of unit roundoff u errs by up to
    # (n-1) u sum|x_i|; bfloat16 u = 2^-8 against the declared float32 2^-24.
    "bf16_param_grads": Expect(("dweight", "dbias"), ("y", "mean", "rstd", "running_mean", "running_var", "dx")),
    # Wu & He 2018, §3 (from memory): groups are contiguous channel ranges; dbias = sum(dy) is per channel.
    "interleaved_groups": Expect(("y", "mean", "rstd", "dx"), ("dbias",)),
    # Ioffe & Szegedy 2015, §3 (from memory): dL/dx has terms through dL/dmu_B and dL/dsigma_B^2.
    "constant_stats_backward": Expect(("dx",), ("y", "mean", "rstd", "dweight", "dbias")),
    # Ioffe & Szegedy 2015, Alg. 1 and §3 (from memory): dweight_c sums over every axis but the channel.
    "dweight_first_spatial_axis": Expect(("dweight",), ("y", "mean", "rstd", "running_mean", "running_var",
                                                        "dx", "dbias"), where=_rank_above_3),
    # NumPy ndarray.strides: only a C-contiguous array has its logical order in memory.
    "strides_ignored": Expect(("y", "mean", "rstd", "dx"), ("running_mean", "running_var"), where=_strided),
    # Common practice: a vector loop over 8 lanes needs a remainder loop; lengths that are
    # multiples of 8 are unaffected. dbias = sum over rows (axis 0), not over the 8-wide axis.
    "dropped_tail": Expect(("y", "rstd", "dx"), ("dbias",), where=_tail),
    # Ioffe & Szegedy 2015, Alg. 2 (from memory): inference uses the population (running) statistics.
    "eval_batch_stats": Expect(("y",), ("mean", "rstd", "running_mean", "running_var", "dx", "dweight", "dbias"),
                               where=_eval),
    # --- range and declaration bugs (docs/tolerances.md, "Ranges" and "Declarations").
    # IEEE 754-2019 binary16: largest 65504, so a float16 tree sum of 2^17 ones overflows (§7.4); and its
    # u = 2^-11 against the declared float32 accumulation everywhere else (Higham 2002, §4.2).
    "half_param_sums": Expect(("dbias", "dweight"), ("y", "mean", "rstd", "dx")),
    # binary16's smallest subnormal is 2^-24, so eps = 1e-12 is 0 there; eps never enters the mean or dbias.
    "eps_in_storage_format": Expect(("y", "rstd", "dx"), ("mean", "dbias")),
    # Higham 2002, §2.1: shift = b - mean scale rounds by u |mean scale|; the backward is not folded.
    "folded_eval": Expect(("y",), ("mean", "rstd", "running_mean", "running_var", "dx", "dweight", "dbias"),
                          where=_eval),
    # float16's range ends at 65504: running statistics beyond it become Inf; only eval's y uses them.
    "running_stats_in_storage": Expect(("y",), ("mean", "rstd", "running_mean", "running_var", "dx", "dweight",
                                                "dbias"), where=_eval),
    # OCP 8-bit FP v1.0 (from memory): E4M3's non-saturating conversion of an out-of-range value is NaN;
    # dx of zero-variance groups (r = 1/sqrt(eps)) is the output beyond 448; float32 outputs never saturate.
    "saturating_cast": Expect(("dx",), ("mean", "rstd", "dweight", "dbias")),
    # bfloat16's u = 2^-8 on the mean and rstd used by y and saved; dbias = sum(dy) does not use them.
    "stats_rounded_to_storage": Expect(("y", "mean", "rstd"), ("dbias",)),
    # binary32's largest value is ~3.4e38 = (1.8e19)^2: only the large data's |mean| ~ 3e19 reaches it.
    "merge_squares_overflow": Expect(("rstd", "y"), ("mean", "dbias"), where=_values("large")),
    # IEEE 754-2019 §7.2: 0/0 is NaN; the mean of every group shorter than 255 elements goes through it.
    "empty_merge_nan": Expect(("mean",), ("dbias",)),
    # IEEE 754-2019 §3.3: subnormals are the values below 2^-126 in binary32, which only the subnormal
    # kind holds; flushing them loses the mean and dweight = sum(dy xhat) there.
    "flush_undeclared": Expect(("mean", "dweight"), ("dbias",), where=_values("subnormal")),
}

# The crash and hang kernels, on a few cases each: (case ids, predicate of the cases that must
# end with ``status``). Common practice: a null weight means "no affine weight", never a pointer.
_GN = "group_norm/float32/channels_first"
_RMS = "rms_norm/float32/trailing"
FAULTS = {
    "null_weight_crash": (
        (f"{_GN}/4x8x6x5/groups=4/normal/w=none/b=none/eps=1e-05/train/contiguous",
         f"{_GN}/4x8x6x5/groups=4/normal/w=random/b=none/eps=1e-05/train/contiguous",
         f"{_GN}/8x32x14x14/groups=8/normal/w=random/b=random/eps=1e-05/train/contiguous"),
        lambda c: c["weight"] == "none", "crashed"),
    "single_row_hang": (
        (f"{_RMS}/1x257/norm_ndim=1/normal/w=random/b=none/eps=1e-05/train/contiguous",
         f"{_RMS}/7x13/norm_ndim=1/normal/w=random/b=none/eps=1e-05/train/contiguous",
         f"{_RMS}/6x1/norm_ndim=1/normal/w=random/b=none/eps=1e-05/train/contiguous"),
        lambda c: math.prod(c["shape"][:-1]) == 1, "timed_out"),
}


@lru_cache(maxsize=None)
def _bug_doc(key: str, case_ids: tuple[str, ...] = (), timeout: float = 60.0) -> dict:
    b = BUGS[key]
    return run_check(b.kernel, RunOptions(tier="standard", dtypes=(b.storage,), case_ids=case_ids,
                                          workers=WORKERS, timeout=timeout), quiet=True)


def _correct_doc(op: str, storage: str, params: str | None, case_ids: tuple[str, ...] = (),
                 timeout: float = 60.0, base: type = sb.NumpyNorm) -> dict:
    return _correct_run(op, storage, params, case_ids, timeout, base)


@lru_cache(maxsize=None)
def _correct_run(op: str, storage: str, params: str | None, case_ids: tuple[str, ...], timeout: float,
                 base: type) -> dict:
    k = base(op, storage, params).kernel(f"correct {op} ({storage}, {base.__name__})")
    return run_check(k, RunOptions(tier="standard", dtypes=(storage,), case_ids=case_ids, workers=WORKERS,
                                   timeout=timeout), quiet=True)


def _declared_doc(impl, precision: dict | None = None, conventions: dict | None = None,
                  case_ids: tuple[str, ...] = ()) -> dict:
    k = impl.kernel(f"{type(impl).__name__} declared {precision or ''}{conventions or ''}", precision=precision,
                    conventions=conventions)
    return run_check(k, RunOptions(tier="standard", dtypes=(impl.storage,), case_ids=case_ids, workers=WORKERS),
                     quiet=True)


def _failing(doc: dict) -> dict[str, list[tuple[float, str]]]:
    """output -> [(budget_used, case id)] over the failed comparisons."""
    out: dict[str, list[tuple[float, str]]] = {}
    for c in doc["cases"]:
        for o in c["outputs"]:
            if not o["passed"]:
                out.setdefault(o["name"], []).append((_budget(o), c["id"]))
    return out


def _describe(doc: dict) -> str:
    return "; ".join(f"{c['id']}: {c['status']}" for c in doc["cases"] if c["status"] not in ("passed", "skipped"))


NUMERIC = sorted(EXPECT)


def test_every_bug_has_an_expectation():
    assert set(EXPECT) | set(FAULTS) | {"inplace_input"} == set(BUGS)
    for key, b in BUGS.items():
        assert b.doc, f"{key}: the bug's class has no docstring saying what it breaks"


@pytest.mark.parametrize("key", NUMERIC)
def test_bug_is_caught_on_its_output(key: str):
    bug: SeededBug = BUGS[key]
    exp = EXPECT[key]
    doc = _bug_doc(key)
    assert doc["verdict"] == "not conformant", f"{key}: verdict {doc['verdict']}"
    assert doc["counts"]["failed"] > 0
    fails = _failing(doc)
    for name in exp.fails:
        assert name in fails, f"{key}: {name} never failed; failing outputs: {sorted(fails)}"
        worst, cid = max(fails[name])
        assert worst >= MARGIN, f"{key}: {name} exceeds its bound only {worst:.3g}x (on {cid}), expected >= {MARGIN}"
    for name in exp.clean:
        assert name not in fails, f"{key}: {name} failed on {fails.get(name)} but the bug cannot touch it"
    ran = [c for c in doc["cases"] if c["status"] != "skipped"]
    if exp.where is not None:
        bad = [c["id"] for c in ran if c["status"] != "passed" and not exp.where(c["case"])]
        assert not bad, f"{key}: cases outside the bug's reach failed: {bad}"
        assert any(c["status"] == "passed" for c in ran if not exp.where(c["case"]))
        assert any(c["status"] == "failed" for c in ran if exp.where(c["case"]))
    # The same code without the bug passes every case the bug failed, under the same declaration.
    failed_ids = tuple(c["id"] for c in ran if c["status"] != "passed")
    ok = _correct_doc(bug.op, bug.storage, bug.params, failed_ids, base=bug.base)
    assert ok["verdict"] == "conformant", f"{key}: the bug-free kernel fails too: {_describe(ok)}"
    assert ok["counts"]["passed"] == len(failed_ids)


CORRECT = sorted({(b.op, b.storage, b.params, b.base) for b in BUGS.values()}, key=str)


@pytest.mark.parametrize("op,storage,params,base", CORRECT)
def test_correct_kernels_pass(op: str, storage: str, params: str | None, base: type):
    doc = _correct_doc(op, storage, params, base=base)
    assert doc["verdict"] == "conformant", f"correct {op} {storage}: {_describe(doc)}"
    n_cases = len(catalog([op], [storage], "standard"))
    assert doc["counts"]["passed"] == n_cases, doc["counts"]  # the declaration skips nothing
    worst = max(_budget(o) for c in doc["cases"] for o in c["outputs"])
    assert 0.0 < worst < 1.0


def test_inplace_modification_is_reported():
    # Common practice: a kernel must not write its inputs; the harness compares the input
    # bytes before and after each call (conformance/run/execute.py).
    doc = _bug_doc("inplace_input")
    assert doc["verdict"] == "not conformant"
    flagged = [c for c in doc["cases"] if "modified its input" in c["message"]]
    assert flagged, _describe(doc)
    assert all(c["status"] == "failed" and "x" in c["modified_inputs"] for c in flagged)
    # Forward outputs are computed before x is overwritten: y is never the failing output.
    assert "y" not in _failing(doc)
    ok = _correct_doc("layer_norm", "float32", None)
    assert not any(c["modified_inputs"] for c in ok["cases"])


@pytest.mark.parametrize("key", sorted(FAULTS))
def test_crash_and_hang_cost_one_case(key: str):
    ids, hit, status = FAULTS[key]
    doc = _bug_doc(key, ids, timeout=5.0)
    assert doc["verdict"] == "not conformant"
    by_id = {c["id"]: c for c in doc["cases"]}
    assert set(by_id) == set(ids), "every selected case has a result"
    for cid, c in by_id.items():
        want = status if hit(c["case"]) else "passed"
        assert c["status"] == want, f"{key}: {cid} is {c['status']} ({c['message'][:200]}), expected {want}"
    assert any(hit(c["case"]) for c in by_id.values())
    b = BUGS[key]
    ok = _correct_doc(b.op, b.storage, b.params, ids, timeout=5.0)
    assert ok["verdict"] == "conformant", _describe(ok)


# ------------------------------------------------------------------ range and declaration bugs, in detail
def _case(doc: dict, pred: Callable[[dict], bool]) -> dict:
    hits = [c for c in doc["cases"] if pred(c["case"])]
    assert len(hits) == 1, [c["id"] for c in hits]
    return hits[0]


def _output(case: dict, name: str) -> dict:
    return next(o for o in case["outputs"] if o["name"] == name)


def _ids(doc: dict, pred: Callable[[dict], bool]) -> tuple[str, ...]:
    return tuple(c["id"] for c in doc["cases"] if pred(c["case"]))


def test_float16_parameter_sums_overflow_on_a_constant_gradient():
    """dy = 1 over 2^17 terms: dbias = 131072 fits float32 but a float16 tree's partial sums pass 65504
    (IEEE 754-2019 binary16's largest value) and overflow to +Inf (§7.4): an Inf mismatch, not a near miss."""
    c = _case(_bug_doc("half_param_sums"), lambda k: k["dy"] == "ones")
    db = _output(c, "dbias")
    assert not db["passed"] and db["inf_mismatch"] > 0, db["message"]


def test_eps_lost_in_float16_is_nan_on_zero_variance_groups():
    """eps = 1e-12 rounds to 0 in float16 (smallest subnormal 2^-24): rstd = 1/sqrt(0) = Inf and y = 0 * Inf
    = NaN (IEEE 754-2019 §7.2) where the answer is the bias; the correct kernel adds eps in float32."""
    doc = _bug_doc("eps_in_storage_format")
    for v in ("constant", "zeros"):
        c = _case(doc, lambda k, v=v: k["values"] == v and k["eps"] == 1e-12)
        assert _output(c, "y")["nan_mismatch"] > 0, c["id"]


def test_running_statistics_outside_the_storage_range():
    """Running statistics of |mean| ~ 2.6e5 (beyond float16's 65504) converted to float16 are Inf: y is not
    finite where the oracle's is (of order 4)."""
    c = _case(_bug_doc("running_stats_in_storage"), lambda k: k["running_values"] == "wide")
    y = _output(c, "y")
    assert y["nan_mismatch"] + y["inf_mismatch"] > 0, y["message"]


def test_squares_overflow_only_on_large_data():
    """The merge's delta^2 overflows float32 at |mean| ~ 3e19 (binary32's largest value ~3.4e38, IEEE 754-2019
    §3.3): NaN where the two-pass statistics are finite; no other case of the tier reaches it."""
    c = _case(_bug_doc("merge_squares_overflow"), lambda k: k["values"] == "large")
    assert _output(c, "rstd")["nan_mismatch"] > 0


def test_nan_mean_of_an_inf_group_is_accepted_and_a_nan_mean_elsewhere_fails():
    """A Welford/Chan kernel's mean of a group holding +-Inf is NaN (Inf - Inf, IEEE 754-2019 §7.2) where two
    passes give +-Inf; every y of the group is NaN either way, so it is reported as an accepted difference.
    A NaN mean where the oracle's is finite (an unguarded 0/0 in the merge) still fails."""
    ok = _correct_doc("layer_norm", "float32", None, base=sb.WelfordNorm)
    c = _case(ok, lambda k: k["values"] == "nonfinite")
    mean = _output(c, "mean")
    assert mean["passed"] and sum(mean["accepted"].values()) > 0, mean
    assert any("holding +-Inf" in why for why in mean["accepted"])
    bad = _bug_doc("empty_merge_nan")
    c = _case(bad, lambda k: k["values"] == "normal" and k["shape"] == [12, 96] and k["weight"] == "random"
              and k["bias"] == "random" and k["eps"] == 1e-5 and k["strides"] == "contiguous" and k["dy"] == "normal")
    mean = _output(c, "mean")
    assert not mean["passed"] and mean["nan_mismatch"] > 0 and not mean["accepted"], mean


def test_folded_eval_declared_folded_passes_and_reports_its_excess():
    """Declared Conventions(y_form='folded'), the folded kernel gets the folded form's bound (Higham 2002, §2.1:
    the roundings of |x| scale and |mean| scale) and passes; the bound's terms say how many times more than a
    centred kernel it may err on the case: about |mean| / spread on x equal to the running mean."""
    bug = _bug_doc("folded_eval")
    ids = _ids(bug, lambda k: k["mode"] == "eval")
    doc = _declared_doc(sb.FoldedEval("batch_norm"), conventions={"y_form": "folded"}, case_ids=ids)
    assert doc["verdict"] == "conformant", _describe(doc)
    c = _case(doc, lambda k: k["running_values"] == "at_mean")
    ratio = float(_output(c, "y")["bound"]["terms"]["folded_over_centred"])
    assert ratio > 1e4, ratio   # |mean| = 1.5 2^21 against a spread of 1 (conformance/cases/generators.py)


def test_overflow_convention_is_declared():
    """float8_e4m3fn has no infinity: out of range, the non-saturating conversion gives NaN and the saturating
    one 448 (OCP 8-bit floating point specification v1.0, from memory; ml_dtypes' cast is the former). Each
    kernel passes under its own convention and fails under the other."""
    bug = _bug_doc("saturating_cast")
    ids = tuple(c["id"] for c in bug["cases"] if c["status"] == "failed")
    assert ids
    sat = _declared_doc(sb.SaturatingCast("layer_norm", "float8_e4m3fn", "float32"), precision={"overflow": "saturate"},
                        case_ids=ids)
    assert sat["verdict"] == "conformant", _describe(sat)
    cast = _declared_doc(sb.NumpyNorm("layer_norm", "float8_e4m3fn", "float32"), precision={"overflow": "saturate"},
                         case_ids=ids)
    assert cast["counts"]["failed"] == len(ids), _describe(cast)
    ok = _correct_doc("layer_norm", "float8_e4m3fn", "float32")
    reasons = {why for c in ok["cases"] for o in c["outputs"] for why in o.get("accepted", {})}
    assert any("overflows to NaN" in why for why in reasons), reasons


def test_statistics_rounded_before_use_declared_passes():
    """Declared Precision(statistics='bfloat16'), the kernel that rounds its mean and rstd to bfloat16 before
    use gets that rounding's u_bf16 = 2^-8 (docs/tolerances.md) in B_mu and dr, and passes where it failed."""
    ids = tuple(c["id"] for c in _bug_doc("stats_rounded_to_storage")["cases"] if c["status"] == "failed")
    doc = _declared_doc(sb.StatsRoundedToStorage("layer_norm", "bfloat16", "float32"),
                        precision={"statistics": "bfloat16"}, case_ids=ids)
    assert doc["verdict"] == "conformant" and doc["counts"]["passed"] == len(ids), _describe(doc)


def test_flush_to_zero_declared_passes():
    """Declared Precision(subnormals='flush'), the flushing kernel's subnormal inputs read as zero and results
    flushed are within the bound (rounding floors become the smallest normal value, IEEE 754-2019 §3.3), on
    the subnormal case and on the rest of the tier."""
    doc = _declared_doc(sb.FlushSubnormals("layer_norm"), precision={"subnormals": "flush"})
    # On the subnormal case itself the flush's floors (the smallest normal value) exceed the outputs'
    # own magnitude: a pass there is not evidence, and the verdict says so (conformance.evidence).
    bad = [c["id"] for c in doc["cases"] if c["status"] not in ("passed", "skipped")]
    assert doc["verdict"] == "inconclusive" and bad and all("/subnormal/" in i for i in bad), _describe(doc)
    assert all(c["status"] == "inconclusive" for c in doc["cases"] if c["id"] in bad), _describe(doc)


def test_saved_statistics_in_a_wider_format():
    """A float16 kernel with float16 parameters that returns float32 mean and rstd declares
    Precision(saved='float32'); then even rstd = 1/sqrt(1e-12) = 1e6 of a constant group, beyond float16's
    65504, is saved and the backward is right. Undeclared, its float32 outputs are a dtype mismatch."""
    impl = sb.NumpyNorm("layer_norm", "float16", "float16", saved_format="float32")
    std = catalog(["layer_norm"], ["float16"], "standard")
    ids = tuple(c.id for c in std if c.eps == 1e-12 or (c.values == "normal" and c.shape == (12, 96)))
    doc = _declared_doc(impl, case_ids=ids)
    assert doc["verdict"] == "conformant", _describe(doc)
    assert doc["kernel"]["precision"]["float16"]["saved"] == "float32"
    undeclared = impl.kernel("float32 statistics declared float16", precision={"saved": "float16"})
    bad = run_check(undeclared, RunOptions(tier="standard", dtypes=("float16",), case_ids=ids[:1], workers=1),
                    quiet=True)
    msgs = {o["name"]: o["message"] for c in bad["cases"] for o in c["outputs"] if not o["passed"]}
    assert set(msgs) == {"mean", "rstd"} and all("dtype mismatch" in m for m in msgs.values()), msgs


FLOAT8 = ("float8_e4m3fn", "float8_e5m2")


@pytest.mark.parametrize("storage", FLOAT8)
@pytest.mark.parametrize("op", ["batch_norm", "group_norm", "instance_norm", "rms_norm"])
def test_float8_storage_passes_where_its_range_ends(op, storage):
    """The correct NumPy kernel in float8 storage (float32 parameters and arithmetic) on the cases where the
    format's range ends: zero-variance groups whose dx = r (g - mean g), r = 1/sqrt(eps), is beyond 448
    (float8_e4m3fn: NaN, no infinity) or 57344 (float8_e5m2: Inf) (OCP 8-bit FP specification v1.0, from
    memory), data near the largest value, large data, and eps = 1e-12. (layer norm in float8_e4m3fn runs
    its whole standard tier in test_correct_kernels_pass.) In-process, for speed."""
    from conformance.results import build_document
    from conformance.run.execute import execute_case

    k = correct_kernel(op, storage, "float32")
    cases = [c for c in catalog([op], [storage], "standard")
             if c.values in ("constant", "zeros", "near_overflow", "large", "subnormal") and c.strides == "contiguous"
             and c.weight == "random" and c.mode == "train" and not c.running]
    assert len(cases) >= 6
    results = [execute_case(k, c, 0) for c in cases]
    bad = [f"{r.id}: {r.message[:300]}" for r in results if r.status != "passed"]
    assert not bad, "\n".join(bad)
    doc = build_document(k.declaration(), {}, results, True, env={})
    reasons = {why for c in doc["cases"] for o in c["outputs"] for why in o.get("accepted", {})}
    assert any(f"outside {storage}'s range" in why for why in reasons), reasons
