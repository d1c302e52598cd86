"""The report as Markdown fit for a pull-request comment: verdict, worst output, table, peers, failures, caution."""

from __future__ import annotations

from typing import Any

from . import content as C
from .peers import compare, headline, own_counts, ratio_text

__all__ = ["render_markdown", "MAX_FAILURES_LISTED"]

MAX_FAILURES_LISTED = 25


def _cell(v: Any) -> str:
    return str(v).replace("|", "\\|").replace("*", "\\*").replace("\n", " ")


def _code(v: Any) -> str:
    return f"`{_cell(v)}`" if v else ""


def _summary(doc: dict[str, Any]) -> list[str]:
    rows = C.table_rows(doc)
    if not rows:
        return ["No case ran, so there is nothing to tabulate."]
    out = ["| op | dtype | output | cases | passed | failed | crashed | max abs | max rel | max ULP "
           "| worst fraction of bound | worst case |",
           "|---|---|---|--:|--:|--:|--:|--:|--:|--:|--:|---|"]
    for r in rows:
        name = "* (crashed / errors)" if r.output == "*" else r.output
        nums = ["—"] * 4 if r.output == "*" else [C.fmt(r.max_abs), C.fmt(r.max_rel), C.fmt(r.max_ulp),
                                                  C.fmt_budget(r.worst_budget)]
        if r.output != "*" and r.bad:
            nums[3] = f"**{nums[3]}**"
        out.append("| " + " | ".join([_cell(r.op), _cell(r.dtype), f"**{_cell(name)}**", str(r.cases),
                                      str(r.passed), str(r.failed), str(r.crashed), *nums,
                                      _code(r.worst_case)]) + " |")
    bounds = [(r, r.bound_text) for r in rows if r.bound_text]
    if bounds:
        out += ["", "<details><summary>Bounds of the worst cases (formula and numbers)</summary>", ""]
        out += [f"- {_cell(r.dtype)} {_cell(r.output)}: `{b}`" for r, b in bounds]
        out += ["", "</details>"]
    return out


def _peers(doc: dict[str, Any], peers: dict[str, Any] | None, note: str) -> list[str]:
    out = ["", "### Established libraries on the same inputs", ""]
    if peers is None:
        return out + [f"Not compared: {note or 'peers were not run'}."]
    for lib in peers.get("libraries", []):
        if lib.get("status") not in ("ran", "incomplete"):
            what = "not available" if lib.get("status") == "unavailable" else "not compared"
            out.append(f"- {lib['name']}: {what} — {lib.get('reason', '')}.")
        else:
            for dt, why in (lib.get("not_declared") or {}).items():
                out.append(f"- {lib['name']}: not compared for {dt} ({why}).")
            for dt, why in (lib.get("params_note") or {}).items():
                out.append(f"- {lib['name']}, {dt}: {why}, so those inputs differ by their rounding.")
            if own_counts(lib):
                out.append(f"- {lib['name']} itself on these cases, under the same bounds: {own_counts(lib)}.")
    rows = compare(doc, peers)
    for line in headline(rows):
        out.append(f"- **{line[0].upper() + line[1:]}.**")
    libs = [lib["name"] for lib in peers.get("libraries", []) if lib.get("runs")]
    if rows and libs:
        head = "| dtype | output |"
        rule = "|---|---|"
        for lib in libs:
            head += f" this kernel / {lib} max abs | ratio |"
            rule += "--:|--:|"
        out += ["", head, rule]
        for r in rows:
            cells = [_cell(r.dtype), f"**{_cell(r.output)}**"]
            for lib in libs:
                p = r.peers.get(lib)
                cells += [f"{C.fmt(p['kernel_abs'])} / {C.fmt(p['abs'])}", ratio_text(p["ratio"])] if p else ["—", "—"]
            out.append("| " + " | ".join(cells) + " |")
        out += ["", "Ratios are on the cases both checked; x and dy are identical, parameters are rounded to each "
                "kernel's own params dtype."]
    return out


def _failures(doc: dict[str, Any]) -> list[str]:
    fails = C.failures(doc)
    if not fails:
        return ["", "No case failed, crashed, timed out or errored."]
    out = ["", f"### Failing cases ({len(fails)})", "", "<details><summary>Case ids and the command that reruns "
           "each alone</summary>", ""]
    for f in fails[:MAX_FAILURES_LISTED]:
        first = f.message.splitlines()[0] if f.message else ""
        out.append(f"- `{f.id}` — {f.status.replace('_', ' ')}" + (f": {first}" if first else "")
                   + (f" (waived by the gate: {f.waived})" if f.waived else ""))
        if f.command:
            out += ["", "  ```sh", f"  {f.command}", "  ```"]
    if not doc.get("run", {}).get("spec"):
        seed = doc.get("run", {}).get("seed", 0)
        out += ["", f"No kernel spec was recorded, so there are no command lines: rerun a case with "
                f"`run_check(kernel, RunOptions(case_ids=(ID,), seed={seed}))`."]
    if len(fails) > MAX_FAILURES_LISTED:
        out.append(f"- …and {len(fails) - MAX_FAILURES_LISTED} more (see report.html or results.json).")
    out += ["", "</details>"]
    return out


def _caution(doc: dict[str, Any]) -> list[str]:
    g = C.coverage_gaps(doc)
    out = ["", "### Caution", "", f"> {C.caution_text(doc)}", ""]
    out += [f"- {s}" for s in C.gap_sentences(g)]
    if g.skipped:
        n = sum(len(v) for v in g.skipped.values())
        out.append(f"- Skipped ({n}): " + "; ".join(f"{reason} ({len(ids)})" for reason, ids in g.skipped.items()))
    return out


def render_markdown(doc: dict[str, Any], peers: dict[str, Any] | None = None, peers_note: str = "") -> str:
    """The Markdown summary as one string."""
    k = doc.get("kernel", {})
    run = doc.get("run", {})
    lines = [f"## refnorm: **{doc['verdict'].upper()}** — {k.get('name', '')}", "",
             f"{k.get('op', '')} · {', '.join(run.get('dtypes', k.get('dtypes', [])))} · "
             + (f"{C.device_text(doc)} · " if C.device_text(doc) else "") + f"tier {run.get('tier', '')} · "
             f"seed {run.get('seed', '')} · {C.counts_line(doc)}", "",
             f"**{C.worst_line(doc)}**", ""]
    if C.gate_line(doc):
        lines[3:3] = ["", C.gate_line(doc)]
    lines += _summary(doc)
    lines += _peers(doc, peers, peers_note)
    lines += _failures(doc)
    lines += _caution(doc)
    env = doc.get("environment", {})
    vers = ", ".join(f"{n} {env[m]}" for m, n in (("refnorm", "refnorm"), ("python", "Python"), ("numpy", "NumPy"),
                                                   ("torch", "PyTorch"), ("tensorflow", "TensorFlow")) if m in env)
    lines += ["", f"<sub>{vers} · {env.get('processor', '')} · {env.get('platform', '')} · finished "
              f"{run.get('finished', '')}. Full report: report.html (self-contained); results: results.json.</sub>", ""]
    return "\n".join(lines)
