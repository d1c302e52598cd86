"""The gate's decision on a results document: baseline growth, then waivers, then the verdict.

The document keeps its schema: statuses stay those of conformance.results; a
regression turns a passed case into "failed" (its output gets ``regression``);
waivers are recorded as ``case["waiver"]``; the decision is ``doc["gate"]``:

    verdict            "pass" | "fail"
    reasons            why it failed (empty on pass)
    outcomes           counts of the gate outcomes (passed, failed, error, skipped, waived)
    waived             ids of the waived cases
    expired_waivers    waivers past their date that match cases of this run (fail the gate)
    stale_waivers      active waivers that match cases but no failure (a warning)
    unmatched_waivers  waivers that match no case of this run (a warning)
    baseline           {path, growth, floor, compared, regressions, notes} or None
    profile, date, caution
"""

from __future__ import annotations

from datetime import date
from typing import Any, Mapping, Sequence

from ..results import as_float, case_results, counts, numerics, numerics_failures, summarize, verdict
from ..text import visible
from .baseline import baseline_index, baseline_notes, regress_case, unregress_case
from .profile import DEFAULT_GROWTH, DEFAULT_GROWTH_FLOOR, Waiver
from .waivers import OUTCOMES, WaiverUse, gate_outcome, judge_case, today_utc, waiver_summary

__all__ = ["apply_gate", "remove_gate", "refresh", "gate_lines", "GATE_CAUTION"]

GATE_CAUTION = ("A passing gate is evidence on the cases run, under the waivers and baseline stated here, "
                "not a proof of correctness; sign-off on hardware remains the reviewer's responsibility.")


def refresh(doc: dict[str, Any]) -> dict[str, Any]:
    """Recompute counts, summary and verdict after statuses changed."""
    cases = case_results(doc)
    doc["counts"] = counts(cases)
    doc["summary"] = summarize(cases)
    doc["verdict"] = verdict(cases, bool(doc.get("complete", True)))
    doc.update(numerics(cases))  # run-level rounding bias and effective precision
    return doc


def apply_gate(doc: dict[str, Any], *, waivers: Sequence[Waiver] = (), today: date | None = None,
               baseline: Mapping[str, Any] | None = None, baseline_path: str | None = None,
               growth: float | None = None, growth_floor: float | None = None,
               profile: str | None = None) -> tuple[dict[str, Any], list[WaiverUse]]:
    """Apply the baseline and the waivers to ``doc`` (in place); return it and the waivers' uses."""
    today = today or today_utc()
    growth = DEFAULT_GROWTH if growth is None else growth
    floor = DEFAULT_GROWTH_FLOOR if growth_floor is None else growth_floor
    kernel_name = doc.get("kernel", {}).get("name", "")
    base_info = None
    if baseline is not None:
        old = baseline_index(baseline)
        regs = []
        compared = 0
        for c in doc["cases"]:
            prev = old.get(c["id"])
            if prev is not None and c["status"] == "passed" and prev.get("status") == "passed":
                compared += 1
            for r in regress_case(c, prev, growth, floor):
                regs.append({"case": c["id"], **r})
        refresh(doc)
        base_info = {"path": baseline_path, "growth": growth, "floor": floor, "compared": compared,
                     "regressions": regs, "notes": baseline_notes(doc, baseline)}
    uses = [judge_case(c, kernel_name, waivers, today) for c in doc["cases"]]
    outcomes = {o: 0 for o in OUTCOMES}
    waived = []
    for c in doc["cases"]:
        out, _ = gate_outcome(c)
        outcomes[out] += 1
        if out == "waived":
            waived.append(c["id"])
    ws = waiver_summary(waivers, uses)
    reasons = []
    if not doc.get("complete", True):
        why = (doc.get("run") or {}).get("interrupted")
        reasons.append(f"the run is incomplete (interrupted by {why})" if why else
                       "the run is incomplete (interrupted, or its results do not cover the selected cases "
                       "exactly once)")
    if outcomes["failed"] or outcomes["error"]:
        reasons.append(f"{outcomes['failed']} case(s) failed and {outcomes['error']} crashed, timed out or "
                       "raised, not waived")
    biased = numerics_failures(case_results(doc))
    if biased:  # a run-level failure no waiver of a case covers (conformance.rounding_bias)
        reasons.append("directed rounding suspected where round to nearest is declared: "
                       + ", ".join(f"{r['op']} {r['dtype']} {r['output']} ({r['direction']})" for r in biased))
    inconclusive = (f"{outcomes['inconclusive']} case(s) passed only under bounds that are not informative "
                    "(inconclusive) and their outputs are not accepted (--accept-inconclusive, profile key "
                    "accept_inconclusive)") if outcomes["inconclusive"] else None
    if inconclusive:
        reasons.append(inconclusive)
    if ws["expired"]:
        reasons.append(f"{len(ws['expired'])} expired waiver(s) match cases of this run")
    if not outcomes["passed"] and not outcomes["inconclusive"] and not (doc.get("run") or {}).get("shard"):  # a shard may hold only skipped cases
        reasons.append("no case passed: nothing was checked")
    doc["gate"] = {
        "verdict": "pass" if not reasons else ("inconclusive" if reasons == [inconclusive] else "fail"),
        "reasons": reasons,
        "outcomes": outcomes,
        "waived": waived,
        "expired_waivers": ws["expired"],
        "stale_waivers": ws["stale"],
        "unmatched_waivers": ws["unmatched"],
        "baseline": base_info,
        "profile": profile,
        "date": today.isoformat(),
        "caution": GATE_CAUTION,
    }
    return doc, uses


def remove_gate(doc: dict[str, Any]) -> bool:
    """Set a gate's decision aside (in place): drop ``doc["gate"]`` and the waiver records, undo baseline
    regressions, recompute counts, summary and verdict. The document is then the run's own results, as
    before apply_gate. Returns whether there was anything to remove."""
    found = doc.pop("gate", None) is not None
    for c in doc["cases"]:
        found = (c.pop("waiver", None) is not None) | unregress_case(c) | found
    if found:
        refresh(doc)
    return found


def gate_lines(doc: Mapping[str, Any], stale: bool = True) -> list[str]:
    """Plain lines for a CI log: the gate's verdict, why, and warnings about waivers and baselines
    (``stale=False`` leaves out the stale waivers, for a caller that sums them over several runs)."""
    g = doc.get("gate")
    if not g:
        return []
    o = g["outcomes"]
    name = doc.get("kernel", {}).get("name", "?")
    lines = [f"gate: {g['verdict'].upper()}  {name}  ({o['passed']} passed, {o['failed']} failed, {o['error']} "
             f"errors, {o['waived']} waived, {o['skipped']} skipped)"]
    shard = (doc.get("run") or {}).get("shard")
    if shard:  # waivers that are stale or match nothing here may be used by another shard
        stale = False
        lines.append(f"gate: shard {shard['index']}/{shard['count']} only: the gate of the whole run is "
                     "`refnorm merge` over every shard's results (stale waivers are judged there)")
    lines += [f"gate: fail: {r}" for r in g["reasons"]]
    for w in g["expired_waivers"]:
        lines.append(f"gate: expired waiver #{w['index']} (case {w['case']!r}, expired {w['expires']}: "
                     f"{w['reason']}) matches {w['cases']} case(s): renew or remove it")
    for w in g["stale_waivers"] if stale else ():
        lines.append(f"warning: stale waiver #{w['index']} (case {w['case']!r}"
                     f"{' output ' + w['output'] if w.get('output') else ''}) matches {w['cases']} case(s) but no "
                     "failure: remove it")
    b = g.get("baseline")
    if b:
        lines.append(f"gate: baseline {b['path'] or '(given)'}: {b['compared']} passed case(s) compared, "
                     f"{len(b['regressions'])} output(s) grew more than {b['growth']:g}x")
        for r in b["regressions"]:
            lines.append(f"gate: regression {r['case']} {r['output']}: budget used "
                         f"{as_float(r['baseline_budget_used']):.3g} -> {as_float(r['budget_used']):.3g} "
                         f"({as_float(r['growth']):.3g}x)")
        lines += [f"warning: baseline: {n}" for n in b["notes"]]
    lines.append("note: " + g["caution"])
    # Kernel names, case ids, waiver reasons and baseline notes come from kernels and files.
    return [visible(line) for line in lines]
