"""What changed between two results documents, case by case.

Worse (exit 1 from `refnorm diff`):
  - a case whose status got more severe (passed < skipped < failed < timed_out, error < crashed),
    including a passed case that is now skipped (it is no longer checked);
  - an output, passed in both, whose budget used grew by more than the factor
    (conformance.gate.baseline.growth_of, with the same floor);
  - a case of OLD missing from NEW (coverage lost; compare runs of the same tier).
Reported but not worse: improved statuses, outputs whose budget shrank by more than
the factor, cases added.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping

from ..results import as_float
from ..text import visible
from .baseline import baseline_index, baseline_notes, growth_of
from .profile import DEFAULT_GROWTH, DEFAULT_GROWTH_FLOOR

__all__ = ["SEVERITY", "Diff", "diff_docs"]

SEVERITY = {"passed": 0, "skipped": 1, "failed": 2, "timed_out": 3, "error": 3, "crashed": 4}


@dataclass
class Diff:
    """The changes; ``worse`` lists the lines that make the comparison fail."""

    status: list[tuple[str, str, str]] = field(default_factory=list)     # (case, old, new)
    grew: list[tuple[str, str, float, float, float]] = field(default_factory=list)    # (case, out, old, new, g)
    shrank: list[tuple[str, str, float, float, float]] = field(default_factory=list)
    added: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    compared: int = 0

    @property
    def worse(self) -> bool:
        return bool(self.grew or self.removed or any(SEVERITY.get(n, 9) > SEVERITY.get(o, 9)
                                                     for _, o, n in self.status))

    def lines(self) -> list[str]:
        """The report for a terminal or CI log; case ids, statuses and output names come from the files,
        so their control characters are shown as escapes (conformance.text.visible)."""
        out = []
        for cid, o, n in self.status:
            tag = "WORSE" if SEVERITY.get(n, 9) > SEVERITY.get(o, 9) else ("better" if SEVERITY.get(n, 9) <
                                                                          SEVERITY.get(o, 9) else "changed")
            out.append(f"{tag:7s} {cid}: {o} -> {n}")
        for cid, name, bo, bn, g in self.grew:
            out.append(f"{'WORSE':7s} {cid} {name}: budget used {bo:.3g} -> {bn:.3g} ({g:.3g}x)")
        for cid, name, bo, bn, g in self.shrank:
            out.append(f"{'better':7s} {cid} {name}: budget used {bo:.3g} -> {bn:.3g} ({g:.3g}x)")
        out += [f"{'WORSE':7s} {cid}: removed (in OLD, not in NEW)" for cid in self.removed]
        out += [f"{'added':7s} {cid}" for cid in self.added]
        out += [f"note: {n}" for n in self.notes]
        out = [visible(line) for line in out]
        out.append(f"diff: {self.compared} case(s) in both, {len(self.status)} status change(s), "
                   f"{len(self.grew)} output(s) grew, {len(self.shrank)} shrank, {len(self.added)} added, "
                   f"{len(self.removed)} removed: {'WORSE' if self.worse else 'not worse'}")
        return out


def diff_docs(old: Mapping[str, Any], new: Mapping[str, Any], factor: float = DEFAULT_GROWTH,
              floor: float = DEFAULT_GROWTH_FLOOR) -> Diff:
    """Compare NEW with OLD case by case (same case id) and output by output (same name)."""
    a, b = baseline_index(old), baseline_index(new)
    d = Diff(notes=baseline_notes(new, old))
    d.added = [cid for cid in b if cid not in a]
    d.removed = [cid for cid in a if cid not in b]
    for cid, nc in b.items():
        oc = a.get(cid)
        if oc is None:
            continue
        d.compared += 1
        # A regression recorded by a gate turns a passed case into failed; diff the kernel's own status.
        o_status = "passed" if _regressed_only(oc) else oc["status"]
        n_status = "passed" if _regressed_only(nc) else nc["status"]
        if o_status != n_status:
            d.status.append((cid, o_status, n_status))
            continue
        if n_status != "passed":
            continue
        o_out = {o["name"]: o for o in oc.get("outputs", [])}
        for o in nc.get("outputs", []):
            prev = o_out.get(o["name"])
            if prev is None:
                continue
            bo, bn = as_float(prev.get("budget_used")), as_float(o.get("budget_used"))
            g = growth_of(bn, bo, floor)
            if g > factor:
                d.grew.append((cid, o["name"], bo, bn, g))
            else:
                back = growth_of(bo, bn, floor)
                if back > factor:
                    d.shrank.append((cid, o["name"], bo, bn, 1.0 / back))
    return d


def _regressed_only(c: Mapping[str, Any]) -> bool:
    """A case failed only because a baseline comparison said so (every failed output is within its bound)."""
    if c.get("status") != "failed":
        return False
    bad = [o for o in c.get("outputs", []) if not o.get("passed", False)]
    return bool(bad) and all(o.get("within_bound") for o in bad) and not c.get("modified_inputs")
