"""The diagnosis as text: a line per failing output name in the terminal summary, and per case for reports."""

from __future__ import annotations

from collections import OrderedDict
from typing import Any

from ..text import visible
from .locate import correlation_text

__all__ = ["diagnosis_lines", "output_diagnoses"]


def output_diagnoses(case: dict[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    """(output name, diagnosis record) for the outputs of a case (results document form) that have one."""
    return [(o["name"], o["diagnosis"]) for o in case.get("outputs", []) if o.get("diagnosis")]


def diagnosis_lines(doc: dict[str, Any], shown: int = 3) -> list[str]:
    """One line per failing output name: the causes named over its failing cases (most frequent first,
    with counts and an example), or that none explains it; then how its budget follows kappa and n."""
    by: "OrderedDict[str, list[tuple[str, dict]]]" = OrderedDict()
    for c in doc.get("cases", []):
        for name, d in output_diagnoses(c):
            by.setdefault(name, []).append((c["id"], d))
    out = []
    for name, items in by.items():
        causes: "OrderedDict[str, list[str]]" = OrderedDict()
        for cid, d in items:
            causes.setdefault(d.get("cause") or "", []).append(cid)
        ranked = sorted(causes.items(), key=lambda kv: -len(kv[1]))
        parts = []
        for cause, ids in ranked[:shown]:
            what = visible(cause) if cause else "no tried explanation fits"
            parts.append(f"{what} ({len(ids)} case{'s' if len(ids) > 1 else ''})")
        line = f"diagnosis of {visible(name)} ({len(items)} failing): " + "; ".join(parts)
        if len(ranked) > shown:
            line += f"; {len(ranked) - shown} other"
        corr = correlation_text([d for _, d in items])
        out.append(line)
        top = ranked[0][0]
        first_id, first = next((cid, d) for cid, d in items if (d.get("cause") or "") == top)
        out.append(f"  e.g. {visible(first_id)}: {visible(first.get('text', ''))}")
        if corr:
            out.append(f"  {corr}")
    return out
