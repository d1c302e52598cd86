"""The report as Markdown fit for a pull-request comment: verdict, worst output, table, peers, failures, caution.

Every value that comes from a kernel or a file (names, ids, messages, notes, reasons,
dtypes, versions) goes through ``md``: a pull-request comment is rendered as GitHub
Flavored Markdown with raw HTML, so unescaped text could add a script tag, an event
attribute, a ``javascript:`` link, an image fetched from another server by everyone who
opens the pull request, or a ``</details>`` that ends the report's folding early. The
markup around the values (bold, tables, ``<details>``, ``<code>``) is this module's own.
"""

from __future__ import annotations

import re
from typing import Any

from ..levels import hist_text, level_rows
from ..run.shards import shard_label
from ..text import visible
from . import content as C
from .peers import compare, headline, own_counts, ratio_text

__all__ = ["render_markdown", "md", "md_block", "MAX_FAILURES_LISTED", "MAX_TEXT"]

MAX_FAILURES_LISTED = 25
#: Longest piece of text from a kernel or a file shown in the summary (report.html has all of it).
MAX_TEXT = 500

# Escaped wherever they are: the characters that open inline constructs (CommonMark 0.31 §6: code spans,
# emphasis, links and images, raw HTML, entities, hard breaks; GFM: table cells §4.10, strikethrough §6.5,
# GitHub's math) as backslash escapes (§2.4) or, for the HTML-significant ones, character references
# (§2.5). With "[" and "]" escaped no link, image, footnote or task box can form, so "(" and ")" need not be.
_MD = {ord(c): "\\" + c for c in "\\`*_[]|~$"}
_MD.update({ord("&"): "&amp;", ord("<"): "&lt;", ord(">"): "&gt;"})
# A value can start a line's content (a list item's text), where "#", "-", "+", "=" and "1." or "1)"
# open a heading, a list or a setext underline (§4.2-4.3, §5.2-5.3): escaped there too.
_LEAD = re.compile(r"^(\s*)([#+=-]|\d{1,9}[.)])")
# Line breaks would end a table row or a list item, and a line that starts with "</details>" or
# "<script" is an HTML block (CommonMark §4.6) whatever the escaping inside lines: values are one line.
_FLAT = {ord("\n"): " ", ord("\r"): " ", ord("\t"): " "}


def _one_line(v: Any, limit: int | None) -> str:
    text = visible(v).translate(_FLAT)
    if limit is not None and len(text) > limit:
        text = text[:limit - 1] + "…"
    return text


def md(v: Any, limit: int | None = MAX_TEXT) -> str:
    """A value from a kernel or a file as inline Markdown that renders as exactly its text: control
    characters made visible (conformance.text.visible), one line, at most ``limit`` characters, and
    no character left that could open markup."""
    text = _one_line(v, limit).translate(_MD)
    return _LEAD.sub(lambda m: m.group(1) + m.group(2)[:-1] + "\\" + m.group(2)[-1], text, count=1)


def md_block(v: Any, limit: int | None = None) -> str:
    """A value as one line of a fenced code block (a rerun command: it must stay copyable as it is).
    Inside a fence nothing is markup (CommonMark §4.5), and one line cannot close the fence."""
    return _one_line(v, limit)


def _code(v: Any) -> str:
    return f"<code>{md(v)}</code>" if v else ""


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
        out.append("| " + " | ".join([md(r.op), md(r.dtype), f"**{md(name)}**", str(r.cases),
                                      str(r.passed), str(r.failed), str(r.crashed), *nums,
                                      _code(r.worst_case)]) + " |")
    bounds = [(r, r.bound_text) for r in rows if r.bound_text]
    if bounds:
        out += ["", "<details><summary>Bounds of the worst cases (formula and numbers)</summary>", ""]
        out += [f"- {md(r.dtype)} {md(r.output)}: <code>{md(b, None)}</code>" for r, b in bounds]
        out += ["", "</details>"]
    out += _levels(doc)
    out += _numerics(doc)
    return out


def _numerics(doc: dict[str, Any]) -> list[str]:
    """The run-level rounding-bias test and effective precision (conformance.report.numerics)."""
    from .numerics import numerics_tables

    out = []
    for title, note, head, rows in numerics_tables(doc):
        out += ["", f"**{md(title)}.** {md(note, None)}", "", "| " + " | ".join(md(h) for h in head) + " |",
                "|" + "---|" * len(head)]
        out += ["| " + " | ".join(md(v) for v in r) + " |" for r in rows]
    return out


def _levels(doc: dict[str, Any]) -> list[str]:
    """Quantized outputs: elements on another level than the oracle's correctly rounded one (conformance.levels)."""
    rows = level_rows(doc)
    if not rows:
        return []
    out = ["", "| dtype | output | format, scale | cases | elements | on another level | levels off (kernel − oracle) "
           "| at most | worst case |", "|---|---|---|--:|--:|--:|---|--:|---|"]
    out += ["| " + " | ".join([md(r.dtype), f"**{md(r.output)}**", md(f"{r.format}, scale={r.scale}"), str(r.cases),
                               str(r.compared), str(r.off_level), md(hist_text(r.hist)), str(r.max_levels),
                               _code(r.worst_case)]) + " |" for r in rows]
    return out


def _peers(doc: dict[str, Any], peers: dict[str, Any] | None, note: str) -> list[str]:
    out = ["", "### Established libraries on the same inputs", ""]
    if peers is None:
        return out + [f"Not compared: {md(note or 'peers were not run')}."]
    for lib in peers.get("libraries", []):
        name = md(lib["name"])
        if lib.get("status") not in ("ran", "incomplete"):
            what = "not available" if lib.get("status") == "unavailable" else "not compared"
            out.append(f"- {name}: {what} — {md(lib.get('reason', ''))}.")
        else:
            for dt, why in (lib.get("not_declared") or {}).items():
                out.append(f"- {name}: not compared for {md(dt)} ({md(why)}).")
            for dt, why in (lib.get("params_note") or {}).items():
                out.append(f"- {name}, {md(dt)}: {md(why)}, so those inputs differ by their rounding.")
            if own_counts(lib):
                out.append(f"- {name} itself on these cases, under the same bounds: {md(own_counts(lib))}.")
    rows = compare(doc, peers)
    for line in headline(rows):
        out.append(f"- **{md(line[0].upper() + line[1:])}.**")
    libs = [lib["name"] for lib in peers.get("libraries", []) if lib.get("runs")]
    if rows and libs:
        head = "| dtype | output |"
        rule = "|---|---|"
        for lib in libs:
            head += f" this kernel / {md(lib)} max abs | ratio |"
            rule += "--:|--:|"
        out += ["", head, rule]
        for r in rows:
            cells = [md(r.dtype), f"**{md(r.output)}**"]
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
        first = f.message.splitlines()[0] if f.message.strip() else ""
        out.append(f"- {_code(f.id)} — {md(f.status.replace('_', ' '))}" + (f": {md(first)}" if first else "")
                   + (f" (waived by the gate: {md(f.waived)})" if f.waived else ""))
        out += [f"  - diagnosis: {md(d)}" for d in f.diagnosis]  # conformance.diagnosis
        if f.command:
            out += ["", "  ```sh", f"  {md_block(f.command)}", "  ```"]
    if not doc.get("run", {}).get("spec"):
        seed = doc.get("run", {}).get("seed", 0)
        out += ["", f"No kernel spec was recorded, so there are no command lines: rerun a case with "
                f"<code>run\\_check(kernel, RunOptions(case\\_ids=(ID,), seed={md(seed)}))</code>."]
    if len(fails) > MAX_FAILURES_LISTED:
        out.append(f"- …and {len(fails) - MAX_FAILURES_LISTED} more (see report.html or results.json).")
    out += ["", "</details>"]
    return out


def _diagnosis(doc: dict[str, Any]) -> list[str]:
    """The likely causes per failing output (conformance.diagnosis); nothing when no output has one."""
    lines = C.diagnosis_lines(doc)
    if not lines:
        return []
    return ["", "### Diagnosis", "", "What each failing output's error is consistent with: another convention or "
            "precision, or a model of a common bug (information only; the verdict does not depend on it).", "",
            *[("  " if ln.startswith("  ") else "") + f"- {md(ln.strip())}" for ln in lines]]


def _caution(doc: dict[str, Any]) -> list[str]:
    g = C.coverage_gaps(doc)
    out = ["", "### Caution", "", f"> {md(C.caution_text(doc), None)}", ""]
    out += [f"- {md(s, None)}" for s in C.gap_sentences(g)]
    if g.skipped:
        n = sum(len(v) for v in g.skipped.values())
        out.append(f"- Skipped ({n}): " + "; ".join(f"{md(reason)} ({len(ids)})" for reason, ids in g.skipped.items()))
    return out


def render_markdown(doc: dict[str, Any], peers: dict[str, Any] | None = None, peers_note: str = "") -> str:
    """The Markdown summary as one string."""
    k = doc.get("kernel", {})
    run = doc.get("run", {})
    dtypes = ", ".join(run.get("dtypes", k.get("dtypes", [])))
    device = C.device_text(doc)
    shard = f" ({shard_label(doc)})" if shard_label(doc) else ""
    lines = [f"## refnorm: **{md(doc['verdict'].upper() + shard)}** — {md(k.get('name', ''))}", "",
             f"{md(k.get('op', ''))} · {md(dtypes)} · " + (f"{md(device)} · " if device else "")
             + f"tier {md(run.get('tier', ''))} · seed {md(run.get('seed', ''))} · {md(C.counts_line(doc))}", "",
             f"**{md(C.worst_line(doc), None)}**", ""]
    if C.gate_line(doc):
        lines[3:3] = ["", md(C.gate_line(doc), None)]
    if C.scope_line(doc):
        lines[3:3] = ["", md(C.scope_line(doc), None)]
    lines += _summary(doc)
    lines += _peers(doc, peers, peers_note)
    lines += _failures(doc)
    lines += _diagnosis(doc)
    lines += _caution(doc)
    env = doc.get("environment", {})
    vers = ", ".join(f"{n} {env[m]}" for m, n in (("refnorm", "refnorm"), ("python", "Python"), ("numpy", "NumPy"),
                                                   ("torch", "PyTorch"), ("tensorflow", "TensorFlow")) if m in env)
    lines += ["", f"<sub>{md(vers)} · {md(env.get('processor', ''))} · {md(env.get('platform', ''))} · finished "
              f"{md(run.get('finished', ''))}. Full report: report.html (self-contained); results: results.json.</sub>",
              ""]
    return "\n".join(lines)
