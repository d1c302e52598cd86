"""Baselines: fail a port whose error grew over an earlier run, even while still within the bound.

The measure is an output's budget used (largest error / bound over its elements,
conformance.compare). Growth of output o of case c is

    g = budget_new / max(budget_old, floor)

against the same case id and output in the baseline document. An output regresses
when both runs passed the case and g > growth (default 2, docs/ci.md). The floor
(default 0.01, 1% of the bound) keeps the rounding noise of a near-exact baseline
from counting as growth: below it, differences are far inside the tolerance.

A case id fixes the case's data for a given seed only (Case.seed_for), so a
baseline from another seed compares other data; that is reported as a note, and so
is a baseline of another kernel, op, tier or set of dtypes.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

from ..results import as_float
from ..tolerances.bound import json_number

__all__ = ["baseline_index", "regress_case", "unregress_case", "regression_line", "growth_of", "baseline_notes"]


def baseline_index(old: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """The baseline's cases by id."""
    return {c["id"]: c for c in old.get("cases", [])}


def growth_of(new_budget: Any, old_budget: Any, floor: float) -> float:
    """budget_new / max(budget_old, floor); NaN when either is not finite."""
    b_new, b_old = as_float(new_budget), as_float(old_budget)
    if not (math.isfinite(b_new) and math.isfinite(b_old)):
        return float("nan")
    denom = max(b_old, floor)
    if denom <= 0.0:
        return 1.0 if b_new <= 0.0 else float("inf")
    return b_new / denom


def regress_case(case: dict[str, Any], old_case: Mapping[str, Any] | None, growth: float,
                 floor: float) -> list[dict[str, Any]]:
    """Mark a passed case failed when an output's budget used grew by more than ``growth``.

    Changes ``case`` in place: the output gets ``passed=False``, ``within_bound=True`` and a
    ``regression`` record; the case gets status "failed" and a message per regressed output.
    Returns the regression records (empty when nothing regressed or nothing is comparable).
    """
    if old_case is None or case.get("status") != "passed" or old_case.get("status") != "passed":
        return []
    old_out = {o["name"]: o for o in old_case.get("outputs", [])}
    found = []
    msgs = []
    for o in case.get("outputs", []):
        prev = old_out.get(o["name"])
        if prev is None:
            continue
        g = growth_of(o.get("budget_used"), prev.get("budget_used"), floor)
        if not (g > growth):  # NaN never regresses: a non-finite budget is the bound's business
            continue
        rec = {
            "output": o["name"],
            "growth": g,
            "limit": growth,
            "floor": floor,
            "budget_used": as_float(o.get("budget_used")),
            "baseline_budget_used": as_float(prev.get("budget_used")),
            "max_abs": as_float(o.get("max_abs")),
            "baseline_max_abs": as_float(prev.get("max_abs")),
        }
        rec = {k: json_number(v) for k, v in rec.items()}  # a baseline's max_abs may be "nan": the document stays JSON
        msgs.append(regression_line(o["name"], rec))
        o["passed"] = False
        o["within_bound"] = True
        o["regression"] = rec
        found.append(rec)
    if found:
        case["status"] = "failed"
        case["message"] = "\n".join(([case["message"]] if case.get("message") else []) + msgs)
    return found


def regression_line(output: str, rec: Mapping[str, Any]) -> str:
    """The line a regression adds to its case's message (from its ``regression`` record)."""
    f = {k: as_float(rec.get(k)) for k in ("growth", "limit", "budget_used", "baseline_budget_used", "max_abs",
                                           "baseline_max_abs")}
    return (f"{output}: within its bound, but the budget used grew {f['growth']:.3g}x over the baseline "
            f"({f['baseline_budget_used']:.3g} -> {f['budget_used']:.3g} of the bound; max abs error "
            f"{f['baseline_max_abs']:.3g} -> {f['max_abs']:.3g}); the gate allows {f['limit']:g}x")


def unregress_case(case: dict[str, Any]) -> bool:
    """Undo regress_case in place: the case's outputs and status as the run gave them, before any baseline
    (a merge sets the shards' gate decisions aside and judges the whole run once). Returns whether it
    changed anything."""
    hit = [o for o in case.get("outputs", []) if "regression" in o]
    if not hit:
        return False
    lines = [regression_line(o["name"], o["regression"]) for o in hit]
    for o in hit:
        o.pop("regression")
        o.pop("within_bound", None)
        o["passed"] = True
    if all(o.get("passed") for o in case.get("outputs", [])) and case.get("status") == "failed":
        case["status"] = "passed"
    msg = case.get("message") or ""
    tail = "\n".join(lines)
    if msg == tail:
        case["message"] = ""
    elif msg.endswith("\n" + tail):
        case["message"] = msg[: -len(tail) - 1]
    return True


def baseline_notes(new: Mapping[str, Any], old: Mapping[str, Any]) -> list[str]:
    """Why a comparison with this baseline may mean less than it seems."""
    notes = []
    ks_new, ks_old = new.get("kernel", {}), old.get("kernel", {})
    r_new, r_old = new.get("run", {}), old.get("run", {})
    if ks_new.get("name") != ks_old.get("name"):
        notes.append(f"the baseline is of kernel '{ks_old.get('name')}', this run of '{ks_new.get('name')}': "
                     "growth compares two kernels, not one kernel over time")
    if ks_new.get("op") != ks_old.get("op"):
        notes.append(f"the baseline checked op {ks_old.get('op')}, this run {ks_new.get('op')}: no case in common")
    if r_new.get("tier") != r_old.get("tier"):
        notes.append(f"the baseline ran tier '{r_old.get('tier')}', this run '{r_new.get('tier')}': cases of one "
                     "and not the other are not compared")
    d_new = r_new.get("dtypes", ks_new.get("dtypes"))
    d_old = r_old.get("dtypes", ks_old.get("dtypes"))
    if d_new is not None and d_old is not None and sorted(d_new) != sorted(d_old):
        only_new = [d for d in d_new if d not in d_old]
        only_old = [d for d in d_old if d not in d_new]
        what = "; ".join(p for p in (f"only in this run: {', '.join(only_new)}" if only_new else "",
                                     f"only in the baseline: {', '.join(only_old)}" if only_old else "") if p)
        notes.append(f"the baseline checked other dtypes ({what}): their cases are not compared")
    s_new, s_old = r_new.get("seed"), r_old.get("seed")
    if s_new != s_old:
        notes.append(f"the baseline ran with seed {s_old}, this run with seed {s_new}: the same case ids hold "
                     "other data, so growth compares different samples")
    for doc, which in ((old, "the baseline"), (new, "this run")):
        shard = (doc.get("run") or {}).get("shard")
        if isinstance(shard, Mapping):
            notes.append(f"{which} is shard {shard.get('index')}/{shard.get('count')} only: the other shards' cases "
                         "are not in it (to compare whole runs, put the shards together with refnorm merge first)")
    common = set(baseline_index(new)) & set(baseline_index(old))
    if not common and ks_new.get("op") == ks_old.get("op"):
        notes.append("the baseline has no case id in common with this run")
    return notes
