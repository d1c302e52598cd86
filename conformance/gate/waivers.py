"""Waivers: known failures a port team accepts for a while, and the gate outcome of each case.

A case's status (conformance.results.STATUSES) is never changed by a waiver; the
waiver is recorded beside it as ``case["waiver"]`` and the gate reads the outcome
from both. Rules (docs/ci.md, "Waivers"):

- A waiver without ``output`` covers its cases whatever went wrong (failed,
  crashed, timed out, error). A waiver with ``output`` covers a failed case only
  when every failed output of the case is covered by such waivers and the kernel
  did not modify its inputs.
- An expired waiver (today, UTC, is after ``expires``) waives nothing, and every
  case it matches fails the gate until the waiver is renewed or removed.
- An active waiver that matches cases but no failure is *stale*; one that matches
  no case of the run is *unmatched*. Both are warnings, not failures.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timezone
from typing import Any, Iterable, Sequence

from ..results import BAD, output_of
from .profile import Waiver

__all__ = ["today_utc", "judge_case", "gate_outcome", "waiver_summary", "WaiverUse", "OUTCOMES"]

#: Gate outcomes of a case, as CI systems know them (JUnit: passed, failure, error, skipped).
OUTCOMES = ("passed", "inconclusive", "failed", "error", "skipped", "waived")


def today_utc() -> date:
    """The date the gate compares expiry dates with (UTC, so that every CI runner agrees)."""
    return datetime.now(timezone.utc).date()


@dataclass
class WaiverUse:
    """What the waivers did on one case: indices of those that matched, covered a failure, expired."""

    matched: tuple[int, ...] = ()
    hit: tuple[int, ...] = ()
    expired: tuple[int, ...] = ()
    waived: bool = False


def judge_case(case: dict[str, Any], kernel_name: str, waivers: Sequence[Waiver],
               today: date | None = None) -> WaiverUse:
    """Match the waivers against one case dict (results document form) and annotate it.

    Sets ``case["waiver"]`` when any waiver matches: ``{"waived": bool, "by": [waivers that
    cover it], "expired": [expired waivers that match it]}``. Returns what each waiver did.
    """
    today = today or today_utc()
    matching = [w for w in waivers if w.matches(case["id"], kernel_name)]
    case.pop("waiver", None)
    if not matching:
        return WaiverUse()
    expired = [w for w in matching if w.expired(today)]
    active = [w for w in matching if not w.expired(today)]
    status = case["status"]
    hit: list[Waiver] = []
    covering: list[Waiver] = []
    if status in BAD:
        whole = [w for w in active if w.output is None]
        hit += whole
        covering += whole
        if status == "failed":
            failed_outputs = [o["name"] for o in case.get("outputs", []) if not o.get("passed", False)]
            per_output = {n: [w for w in active if w.output == output_of(n)] for n in failed_outputs}
            for ws in per_output.values():
                hit += [w for w in ws if w not in hit]
            if not whole and failed_outputs and not case.get("modified_inputs") and all(per_output.values()):
                covering += [w for ws in per_output.values() for w in ws if w not in covering]
    waived = bool(covering)
    case["waiver"] = {"waived": waived, "by": [w.as_dict() for w in covering],
                      "expired": [w.as_dict() for w in expired]}
    return WaiverUse(matched=tuple(w.index for w in matching), hit=tuple(w.index for w in hit),
                     expired=tuple(w.index for w in expired), waived=waived)


def gate_outcome(case: dict[str, Any]) -> tuple[str, str]:
    """The gate's outcome of an (annotated) case and the message that explains it.

    outcome is one of OUTCOMES: "failed" for a failed case or any case an expired waiver
    matches; "error" for crashed, timed out and error; "waived" for a covered failure.
    """
    status, msg = case["status"], case.get("message", "") or ""
    w = case.get("waiver") or {}
    if w.get("expired"):
        lines = [f"waiver #{e['index']} (case {e['case']!r}{' output ' + e['output'] if e.get('output') else ''})"
                 f" expired on {e['expires']} ({e['reason']}): renew it with a new date and reason, or remove it"
                 for e in w["expired"]]
        if status != "passed":
            lines.append(f"case status: {status}" + (f": {msg}" if msg else ""))
        return "failed", "\n".join(lines)
    if status == "passed":
        return "passed", ""
    if status == "skipped":
        return "skipped", msg
    if status == "inconclusive":  # not a failure a waiver covers: accepted by output, or not at all
        return "inconclusive", msg
    if w.get("waived"):
        by = "; ".join(f"#{b['index']} until {b['expires']}: {b['reason']}" for b in w["by"])
        return "waived", f"{status}, waived ({by})" + (f"\n{msg}" if msg else "")
    return ("failed" if status == "failed" else "error"), msg


def waiver_summary(waivers: Iterable[Waiver], uses: Iterable[WaiverUse]) -> dict[str, list[dict[str, Any]]]:
    """Expired, stale and unmatched waivers over many cases (of one run or of several)."""
    matched: dict[int, int] = {}
    hit: set[int] = set()
    expired_cases: dict[int, int] = {}
    for u in uses:
        for i in u.matched:
            matched[i] = matched.get(i, 0) + 1
        hit.update(u.hit)
        for i in u.expired:
            expired_cases[i] = expired_cases.get(i, 0) + 1
    out: dict[str, list[dict[str, Any]]] = {"expired": [], "stale": [], "unmatched": []}
    for w in waivers:
        d = w.as_dict()
        if w.index in expired_cases:
            out["expired"].append({**d, "cases": expired_cases[w.index]})
        elif w.index not in matched:
            out["unmatched"].append(d)
        elif w.index not in hit:
            out["stale"].append({**d, "cases": matched[w.index]})
    return out
