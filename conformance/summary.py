"""The plain-text summary table printed at the end of a run."""

from __future__ import annotations

from typing import Any

from .results import CAUTION, as_float
from .run.shards import shard_label, shard_lines
from .levels import level_lines
from .diagnosis.lines import diagnosis_lines
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


def unchecked_names(doc: dict[str, Any]) -> list[str]:
    """The outputs the kernel's declaration leaves unchecked (doc["kernel"]["unchecked"]), each once, in order."""
    names: list[str] = []
    for u in doc.get("kernel", {}).get("unchecked", []):
        if u["output"] not in names:
            names.append(visible(u["output"]))
    return names


def unchecked_lines(doc: dict[str, Any]) -> list[str]:
    """One line per unchecked output and reason: 'not checked: running_var (train): updates_running=False: ...'."""
    return [f"not checked: {visible(u['output'])} ({'/'.join(u.get('modes', [])) or 'any mode'}): {visible(u['reason'])}"
            for u in doc.get("kernel", {}).get("unchecked", [])]


def verdict_lines(doc: dict[str, Any]) -> list[str]:
    """The verdict and its counts; the outputs the declaration leaves unchecked, named on the verdict line
    itself (so that a one-line view keeps them) and then one per line with the reason; the caution."""
    c = doc["counts"]
    v = doc["verdict"].upper() + (f" ({shard_label(doc)})" if shard_label(doc) else "")
    first = (f"verdict: {v}  ({c['passed']} passed, {c.get('inconclusive', 0)} inconclusive, {c['failed']} failed, "
             f"{c['crashed']} crashed, "
             f"{c['timed_out']} timed out, {c['error']} errors, {c['skipped']} skipped)")
    names = unchecked_names(doc)
    if names:
        first += f"; outputs not checked by declaration: {', '.join(names)}"
    lines = [first, *shard_lines(doc), *unchecked_lines(doc), *incomplete_lines(doc), *evidence_lines(doc),
             *level_lines(doc), *numerics_lines(doc), *diagnosis_lines(doc)]
    lines.append("note: " + CAUTION)
    return lines


def evidence_lines(doc: dict[str, Any], shown: int = 5) -> list[str]:
    """The outputs that passed under bounds that are not informative (conformance.evidence): inconclusive
    ones (and how to accept them), accepted ones, and those judged on their NaN/Inf classes only."""
    inc: dict[str, int] = {}
    acc: dict[str, int] = {}
    cls = 0
    first: dict[str, str] = {}
    for c in doc.get("cases", []):
        for o in c.get("outputs", []):
            if o.get("class_only"):
                cls += 1
            if o.get("inconclusive"):
                d = acc if o.get("accepted_inconclusive") else inc
                d[o["name"]] = d.get(o["name"], 0) + 1
                first.setdefault(o["name"], f"{c['id']}: {o['inconclusive']}")
    out = []
    if inc:
        names = ", ".join(f"{visible(k)} ({n})" for k, n in inc.items())
        out.append(f"inconclusive: {names} passed only under bounds that are not informative: not evidence. "
                   "Tighten the declaration, or accept them explicitly with --accept-inconclusive OUTPUT "
                   "(profile key accept_inconclusive)")
        out += [f"  e.g. {visible(first[k])}" for k in list(inc)[:shown]]
    if acc:
        out.append("accepted as inconclusive by the user: " + ", ".join(f"{visible(k)} ({n})" for k, n in acc.items()))
    if cls:
        out.append(f"judged on NaN/Inf classes only: {cls} output(s) of zero-variance groups whose bounds are not "
                   "informative (docs/tolerances.md, Evidence)")
    return out


def incomplete_lines(doc: dict[str, Any], shown: int = 5) -> list[str]:
    """Why a document is incomplete: the signal that stopped it, and results that do not cover the
    selected cases exactly once (up to ``shown`` ids of each kind)."""
    def ids(xs: list[str]) -> str:
        more = f" and {len(xs) - shown} more" if len(xs) > shown else ""
        return ", ".join(visible(x) for x in xs[:shown]) + more

    out = []
    why = (doc.get("run") or {}).get("interrupted")
    cov = doc.get("coverage") or {}
    missing = cov.get("missing") or []
    if why:
        out.append(f"interrupted by {visible(why)}: {len(missing)} of {cov.get('selected', '?')} selected case(s) have no "
                   "result")
    elif missing:
        out.append(f"incomplete: no result for {len(missing)} selected case(s): {ids(missing)}")
    if cov.get("duplicated"):
        out.append(f"incomplete: more than one result for {ids(cov['duplicated'])}")
    if cov.get("unexpected"):
        out.append(f"incomplete: results for cases that were not selected: {ids(cov['unexpected'])}")
    return out


def numerics_lines(doc: dict[str, Any]) -> list[str]:
    """The run-level numerics (issue 11): the rounding-bias test's findings, then the effective precision
    of each output (conformance.rounding_bias, conformance.effective_precision)."""
    from .effective_precision import precision_lines
    from .rounding_bias import bias_lines

    eff = precision_lines(doc)
    return [visible(x) for x in bias_lines(doc)] + (["effective precision (docs/tolerances.md, Effective "
                                                      "precision): an estimate, not part of the verdict"]
                                                     + [f"  {visible(x)}" for x in eff] if eff else [])
