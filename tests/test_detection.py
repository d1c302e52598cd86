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


@lru_cache(maxsize=None)
def _correct_doc(op: str, storage: str, params: str | None, case_ids: tuple[str, ...] = (),
                 timeout: float = 60.0) -> dict:
    k = correct_kernel(op, storage, params)
    return run_check(k, RunOptions(tier="standard", dtypes=(storage,), case_ids=case_ids, workers=WORKERS,
                                   timeout=timeout), quiet=True)


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
    ok = _correct_doc(bug.op, bug.storage, bug.params, failed_ids)
    assert ok["verdict"] == "conformant", f"{key}: the bug-free kernel fails too: {_describe(ok)}"
    assert ok["counts"]["passed"] == len(failed_ids)


CORRECT = sorted({(b.op, b.storage, b.params) for b in BUGS.values()}, key=str)


@pytest.mark.parametrize("op,storage,params", CORRECT)
def test_correct_kernels_pass(op: str, storage: str, params: str | None):
    doc = _correct_doc(op, storage, params)
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
