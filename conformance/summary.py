"""The plain-text summary table printed at the end of a run."""

from __future__ import annotations

from typing import Any

from .results import CAUTION, as_float
from .text import visible


def _fmt_budget(b: Any) -> str:
    v = as_float(b)
    if v == float("inf"):
        return "inf"
    return f"{v:.3g}"


def summary_table(doc: dict[str, Any]) -> str:
    """Rows per op, dtype and output: cases passed / failed / crashed, worst budget used and its case."""
    rows = doc["summary"]
    head = ("op", "dtype", "output", "cases", "passed", "failed", "crashed", "worst budget", "worst case")
    # Names and ids come from the kernel or a file: control characters are shown, not sent to the terminal.
    body = [(visible(r["op"]), visible(r["dtype"]), visible(r["output"]), str(r["cases"]), str(r["passed"]),
             str(r["failed"]), str(r["crashed"]), _fmt_budget(r["worst_budget"]), visible(r["worst_case"] or ""))
            for r in rows]
    widths = [max(len(h), *(len(b[i]) for b in body)) if body else len(h) for i, h in enumerate(head)]
    widths[-1] = len(head[-1])  # the case id is last and may run long
    line = "  ".join(h.ljust(w) for h, w in zip(head, widths))
    out = [line, "  ".join("-" * w for w in widths)]
    out += ["  ".join(c.ljust(w) for c, w in zip(b, widths)) for b in body]
    return "\n".join(out)


def verdict_lines(doc: dict[str, Any]) -> list[str]:
    c = doc["counts"]
    v = doc["verdict"].upper()
    lines = [f"verdict: {v}  ({c['passed']} passed, {c['failed']} failed, {c['crashed']} crashed, "
             f"{c['timed_out']} timed out, {c['error']} errors, {c['skipped']} skipped)"]
    lines.append("note: " + CAUTION)
    return lines
