"""The search's summary: the JSON document under --out (docs/search-schema.json) and the terminal lines."""

from __future__ import annotations

import math
from typing import Any, Sequence

import refnorm

from ..kernel import Kernel
from ..results import CAUTION, _jsonable, now_iso
from .driver import SearchOutcome

__all__ = ["SCHEMA_NAME", "SCHEMA_VERSION", "SUMMARY", "summary_document", "summary_lines", "SEARCH_CAUTION"]

SCHEMA_NAME = "refnorm.search"
SCHEMA_VERSION = 1
SUMMARY = "search.json"
SEARCH_CAUTION = ("A search that finds no failure is evidence on the cases it drew, not a proof: it samples a space "
                  "far larger than its evaluations, and its worst budgets are lower bounds on the kernel's worst. "
                  + CAUTION)


def summary_document(kernel: Kernel, outcome: SearchOutcome, *, op: str, dtype: str, seed: int, evaluations: int,
                     shrink_evaluations: int, focus: Sequence[str], spec: str | None, command: str,
                     reproducer: str | None) -> dict[str, Any]:
    worst = [{"output": w.output, "budget_used": w.budget_used, "passed": w.passed, "evaluation": w.evaluation,
              "case_id": w.case.id, "case": w.case.as_dict()} for w in outcome.worst.values()]
    failure = None
    if outcome.minimal is not None:
        f, m = outcome.first, outcome.minimal
        failure = {"first": {"case_id": f.case.id, "evaluation": f.evaluation, "outputs": list(f.outputs),
                             "status": f.result.status},
                   "minimal": {"case_id": m.case.id, "case": m.case.as_dict(), "evaluation": m.evaluation,
                               "outputs": list(m.outputs), "status": m.result.status, "message": m.result.message,
                               "reproducer": reproducer}}
    return _jsonable({
        "schema": SCHEMA_NAME, "schema_version": SCHEMA_VERSION, "refnorm": refnorm.__version__, "created": now_iso(),
        "command": command, "spec": spec, "kernel": kernel.declaration(), "op": op, "dtype": dtype, "seed": int(seed),
        "focus": list(focus), "complete": outcome.interrupted is None, "interrupted": outcome.interrupted,
        "limits": {"evaluations": int(evaluations), "shrink_evaluations": int(shrink_evaluations)},
        "evaluations": {"total": outcome.evaluations, "search": outcome.search_evaluations,
                        "shrink": outcome.shrink_evaluations, "skipped": outcome.skipped},
        "duration_s": round(outcome.duration_s, 3), "worst": worst, "failure": failure, "caution": SEARCH_CAUTION})


def _budget(b: float) -> str:
    return "inf" if math.isinf(b) else f"{b:.4g}"


def summary_lines(doc: dict[str, Any]) -> list[str]:
    """What the terminal shows: the evaluations, per output the worst budget and its case, the failure."""
    ev = doc["evaluations"]
    lines = [f"refnorm search: {doc['kernel']['name']} ({doc['op']}, {doc['dtype']}), seed {doc['seed']}: "
             f"{ev['total']} evaluations ({ev['search']} searching, {ev['shrink']} shrinking, {ev['skipped']} beyond "
             f"the declared range), {doc['duration_s']:.1f} s"]
    if doc["worst"]:
        lines.append("worst budget used per output (1 = the whole bound):")
        width = max(len(w["output"]) for w in doc["worst"])
        for w in doc["worst"]:
            lines.append(f"  {w['output']:<{width}}  {_budget(float(w['budget_used'])):>9}  "
                         f"{'ok' if w['passed'] else 'FAILED':<6}  {w['case_id']}")
    f = doc["failure"]
    if f is None:
        n = doc["limits"]["evaluations"]
        lines.append(f"no failure in {ev['search']} evaluations" + ("" if ev["search"] >= n else f" (of {n} allowed)")
                     + (" on " + ", ".join(doc["focus"]) if doc["focus"] else ""))
    else:
        m = f["minimal"]
        lines.append(f"FAILURE on {', '.join(m['outputs'])} ({m['status']}): first at evaluation "
                     f"{f['first']['evaluation']}, shrunk in {ev['shrink']} evaluations to")
        lines.append(f"  {m['case_id']}")
        lines += ["  " + ln for ln in m["message"].splitlines()[:12]]
        if m["reproducer"]:
            lines.append(f"reproducer: {m['reproducer']}")
    if not doc["complete"]:
        lines.append(f"interrupted by {doc['interrupted']}: the search stopped early; what it found so far is above")
    lines.append("note: " + doc["caution"])
    return lines
