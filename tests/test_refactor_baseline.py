"""The harness does bit for bit what it did before the op descriptions moved into conformance/ops/.

The stored record under tests/data/refactor_baseline/ was first produced by commit add45d7 (the main
branch before that refactor, issue 12) with tests/data/make_refactor_baseline.py, and regenerated
once since, on purpose, for the range and declaration work (issue 8, sections 2 and 3): new
standard-tier cases appended after the old ones (values=large, eps=1e-12 on constant and zeros,
dy=ones over 2^17-term parameter sums, eval running=far/wide/at_mean), two new Case fields (dy,
running_values) in every Case dict, new Precision and Conventions fields in the kernel's
declaration, and new bounds: the centred eval-mode y, the second-order mean term of dx, the
conversion of running statistics and of x to a narrower accumulation format (underflow
included), and out-of-range outputs accepted under the overflow convention. Before regenerating,
the old cases were checked against a fresh record of the code before that work: the same ids in
the same order, the same inputs, calls and oracle values; only bounds, their summaries and the
verdicts they imply moved, and every verdict that moved went from failed to passed (float8 dx
overflowing to NaN, float64 data computed in float32: subnormal means, eval dweight). (That
earlier record no longer matched the code before the work either: the oracle's exact
power-of-two scaling, 5c7b5fa, had changed float64 values after add45d7.) Regenerated a second time
for the oracle's exact paths (issue 8, section 4: the saved mean recognised in the backward, dy
centred about its offset, exact products): over the 1,365 standard-tier cases no status and no
output's verdict moved; float64 metrics moved by the oracle's last bits (relative 1e-6 at most,
outside outputs that are zero in exact arithmetic, where rounding noise of 1e-28 moved). A third time
for the inconclusive verdict (issue 8, section 1): 23 float64 cases of the fixed kernel, which computes
float64 data in float32 under a float64 declaration of storage (cancellation and subnormal data: bounds
far above the outputs' size), went from passed to inconclusive, and the float64 verdicts of the five ops
from conformant to inconclusive; no other status moved, and outputs gained the fields inconclusive,
class_only, invariant and accepted_inconclusive. A fourth time when the oracle's inner sums moved
from BLAS dots (np.vecdot) to NumPy pairwise sums: the record made on one machine failed on another
(an AMD EPYC with AVX-512, where OpenBLAS picks other dot kernels, so other addition orders), every
op and dtype, in the oracle's last bits only. Before regenerating, a fresh capture was compared with
the stored one field by field: no status, verdict, count, input, call or id moved; the oracle's and
the bounds' digests, the metrics and the messages that print them moved, budgets by 2e-7 relative at
most. A fifth time, for batch norm and instance norm only, when the running statistics the
generators draw (cases/generators.py, _running) moved from NumPy's mean and var to correctly rounded
sums (math.fsum): on a machine without AVX-512 NumPy's float64 reductions add in another order, and
the record's float64 running_var inputs differed in their last bit (12 batch norm and 11 instance
norm float64 cases, before any change of this work). A fresh capture compared field by field moved
only those 23 cases' running-statistic inputs and what follows from them (digests, bounds and metrics
in the last bits); no status, verdict, count, call or id moved, and no other op or dtype. What the record holds is
described in tests/refactor_capture.py: per standard-tier case of every op and dtype, the Case,
digests of the generated inputs and of what each kernel entry point received, digests of the
oracle's outputs and of the elementwise bounds, and every metric, bound summary and verdict of
the results document, for a fixed NumPy kernel and seed; and the case ids of every tier.
versions.json names the NumPy and ml_dtypes that made it: their random streams and float32 sums
are part of what is recorded, and a failure says when they differ.

A fresh record must equal the stored one. A field that appears only in the fresh record (a
metric added to the results document later) is not a change of what existed and is allowed;
every stored field must be present with the same value. The reference is the project's own
earlier output: this test guards against unintended change (common practice for refactors:
a characterisation test), it does not check correctness, which the other tests do against
outside sources. A change that is meant to alter cases, inputs, bounds or verdicts regenerates
the record and says so in its commit.
"""

from __future__ import annotations

import functools
import json
from typing import Any

import pytest

import refactor_capture as rc


@functools.lru_cache(maxsize=None)
def _stored(op: str) -> dict[str, Any]:
    return rc.read(rc.path_for(op))


def _versions_note() -> str:
    """Where the libraries differ from those that made the record: a likely cause of a difference."""
    old = json.loads((rc.DATA / "versions.json").read_text())
    now = rc.versions()
    moved = [f"{k} {old[k]} -> {now.get(k)}" for k in old if old[k] != now.get(k)]
    return ("\nnote: the record was made with " + ", ".join(moved) + "; a library that changed its random "
            "streams or its sums changes the record without any change here") if moved else ""


def _differences(old: Any, new: Any, path: str, out: list[str], limit: int = 12) -> None:
    if len(out) >= limit:
        return
    if isinstance(old, dict):
        if not isinstance(new, dict):
            out.append(f"{path}: was a dict, now {type(new).__name__}")
            return
        for k in old:
            if k not in new:
                out.append(f"{path}.{k}: missing (was {old[k]!r:.120})")
            else:
                _differences(old[k], new[k], f"{path}.{k}", out, limit)
    elif isinstance(old, list):
        if not isinstance(new, list) or len(new) != len(old):
            out.append(f"{path}: was a list of {len(old)}, now {new!r:.200}")
            return
        for i, (a, b) in enumerate(zip(old, new)):
            _differences(a, b, f"{path}[{i}]", out, limit)
    elif type(old) is not type(new) or old != new:
        out.append(f"{path}: was {old!r:.200}, now {new!r:.200}")


@pytest.mark.parametrize("dtype", rc.DTYPES)
@pytest.mark.parametrize("op", rc.OPS)
def test_standard_tier_unchanged(op, dtype):
    old = _stored(op)[dtype]
    new = rc.capture(op, dtype)
    assert [c["id"] for c in new["cases"]] == [c["id"] for c in old["cases"]], \
        f"{op}/{dtype}: the standard tier's case ids or their order changed"
    diffs: list[str] = []
    _differences(old, new, f"{op}/{dtype}", diffs)
    assert not diffs, "the harness's results changed:\n" + "\n".join(diffs) + _versions_note()


@functools.lru_cache(maxsize=None)
def _catalogs() -> tuple[dict[str, Any], dict[str, Any]]:
    return rc.read(rc.DATA / "catalogs.json.gz"), rc.catalogs()


@pytest.mark.parametrize("op", rc.OPS)
def test_every_tier_lists_the_same_cases(op):
    old, new = _catalogs()
    for tier in old:
        for dt in rc.DTYPES:
            o, n = old[tier][op][dt], new[tier][op][dt]
            assert n["ids"] == o["ids"], f"{tier}/{op}/{dt}: case ids or their order changed"
            assert n["cases_sha256"] == o["cases_sha256"], f"{tier}/{op}/{dt}: a Case dict changed"


def test_the_record_can_fail():
    """The comparison sees a changed metric, a missing field and a reordered list (it is not vacuous)."""
    old = {"a": [1, 2.5], "b": {"c": "x", "d": 0.1}}
    for new in ({"a": [1, 2.5000000000000004], "b": {"c": "x", "d": 0.1}},
                {"a": [1, 2.5], "b": {"c": "x"}},
                {"a": [2.5, 1], "b": {"c": "x", "d": 0.1}},
                {"a": [1, 2.5], "b": {"c": "x", "d": 1}}):
        diffs: list[str] = []
        _differences(old, new, "r", diffs)
        assert diffs, new
    same: list[str] = []
    _differences(old, {**old, "extra": 1}, "r", same)
    assert not same
