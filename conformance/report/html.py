"""The report as one self-contained HTML file: inline styles, plots as data: URIs, no network loads.

Order is what a reviewer needs first: the verdict banner, the worst output in one
line, the table per op, dtype and output, the libraries side by side, the failing
cases with their rerun commands, the plots, the declaration and environment, and
the caution with what the run did not cover.
"""

from __future__ import annotations

import json
import math
from html import escape
from typing import Any, Iterable

from ..results import as_float
from ..run.shards import shard_label
from ..text import visible
from . import content as C
from .peers import compare, headline, own_counts, ratio_text
from .plots import Plot

__all__ = ["render_html", "MAX_FAILURES_SHOWN"]

MAX_FAILURES_SHOWN = 100

_CSS = """
:root { --good:#1a7f37; --bad:#c0262d; --warn:#a15c00; --ink:#1d2127; --mute:#5b6470; --line:#d8dde3; --soft:#f4f6f8; }
* { box-sizing: border-box; }
body { margin:0; color:var(--ink); background:#fff;
  font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif; }
main { max-width: 1220px; margin: 0 auto; padding: 0 24px 48px; }
code, pre, .mono { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, "DejaVu Sans Mono", monospace; font-size: 13px; }
.banner { color:#fff; padding: 22px 24px 18px; }
.banner .inner { max-width: 1220px; margin: 0 auto; }
.banner.good { background: var(--good); } .banner.bad { background: var(--bad); } .banner.warn { background: var(--warn); }
.verdict { font-size: 56px; font-weight: 800; letter-spacing: .02em; line-height: 1.05; text-transform: uppercase; }
.banner .who { font-size: 19px; margin-top: 6px; opacity: .95; }
.banner .counts { font-size: 16px; margin-top: 4px; opacity: .95; }
.worst { font-size: 21px; font-weight: 650; margin: 18px 0 6px; padding: 12px 16px; border-left: 6px solid var(--mute); background: var(--soft); }
.worst.bad { border-left-color: var(--bad); } .worst.good { border-left-color: var(--good); } .worst.warn { border-left-color: var(--warn); }
.worst .where { display: block; font-size: 14px; font-weight: 400; margin-top: 3px; color: var(--mute); }
.worst code { font-size: 13.5px; word-break: break-all; color: var(--ink); }
.crashline { font-size: 17px; font-weight: 650; color: var(--bad); margin: 6px 0; }
.note { color: var(--mute); margin: 4px 0 10px; }
nav { margin: 8px 0 4px; color: var(--mute); font-size: 14px; }
nav a { color: inherit; margin-right: 14px; }
h2 { font-size: 22px; margin: 34px 0 10px; padding-bottom: 4px; border-bottom: 2px solid var(--line); }
h3 { font-size: 17px; margin: 20px 0 8px; }
table { border-collapse: collapse; width: 100%; font-size: 14px; }
th, td { padding: 5px 8px; border-bottom: 1px solid var(--line); text-align: left; vertical-align: top; }
th { background: var(--soft); font-weight: 650; white-space: nowrap; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.main.badrow td:first-child { box-shadow: inset 4px 0 0 var(--bad); }
tr.detail td { border-bottom: 1px solid var(--line); color: var(--mute); font-size: 12.5px; padding-top: 0; }
tr.main td { border-bottom: none; }
tr.detail code { font-size: 12px; word-break: break-word; color: var(--ink); }
tr.detail .terms { font-size: 11.5px; }
tr.detail details summary { font-size: 11.5px; }
h3 .note { font-weight: 400; font-size: 14px; }
.fail { color: var(--bad); font-weight: 700; } .zero { color: #9aa3ad; }
.bar { display:inline-block; width: 70px; height: 9px; background: #e6e9ed; border-radius: 2px; margin-right: 6px; vertical-align: middle; position: relative; }
.bar > span { position:absolute; left:0; top:0; bottom:0; border-radius: 2px; }
.bar.good > span { background: var(--good); } .bar.warn > span { background: #d18a00; } .bar.bad > span { background: var(--bad); }
.failure { border: 1px solid var(--line); border-left: 5px solid var(--bad); padding: 8px 12px; margin: 10px 0; }
.failure .id { font-weight: 600; word-break: break-all; }
.failure pre { margin: 6px 0 0; white-space: pre-wrap; word-break: break-word; }
pre.cmd { background: #1d2127; color: #e9edf1; padding: 7px 10px; border-radius: 4px; white-space: pre-wrap; word-break: break-all; }
pre.msg { background: var(--soft); padding: 6px 10px; }
figure { margin: 18px 0 26px; }
figure img { width: 100%; max-width: 1100px; border: 1px solid var(--line); }
figcaption { margin-top: 4px; font-size: 14px; } figcaption b { margin-right: 4px; }
dl.facts { display: grid; grid-template-columns: 200px 1fr; gap: 3px 16px; margin: 0; }
dl.facts dt { color: var(--mute); } dl.facts dd { margin: 0; word-break: break-word; }
.caution { font-size: 16px; border: 2px solid var(--warn); background: #fff8ec; padding: 12px 16px; }
ul.gaps li { margin: 3px 0; }
details summary { cursor: pointer; }
details ul { font-size: 13px; }
.unavail { color: var(--warn); }
footer { color: var(--mute); font-size: 13px; margin-top: 36px; border-top: 1px solid var(--line); padding-top: 8px; }
"""


def _e(v: Any) -> str:
    """Every value of the page, ours or from a kernel or a file: control characters and lone surrogates
    shown as escapes (conformance.text.visible), then &, <, >, " and ' as character references, so a
    value is text in an element and a whole attribute value in double quotes (HTML Living Standard §13.1)."""
    return escape(visible(v), quote=True)


def _json(v: Any) -> str:
    """The value as the results document writes it (non-finite floats as "inf", "-inf", "nan")."""
    if isinstance(v, float) and not math.isfinite(v):
        v = "nan" if math.isnan(v) else ("inf" if v > 0 else "-inf")
    return json.dumps(v)


def _num_td(v: Any, key: str, *, budget: bool = False, cls: str = "") -> str:
    """A numeric cell; data-key/data-value carry the JSON value as written in the document."""
    text = C.fmt_budget(v) if budget else C.fmt(v)
    extra = f" {cls}" if cls else ""
    if text == "0":
        extra += " zero"
    return f'<td class="num{extra}" data-key="{key}" data-value="{_e(_json(v))}">{_e(text)}</td>'


def _budget_td(v: Any) -> str:
    b = as_float(v)
    tone = "bad" if not (b <= 1.0) else ("warn" if b > 0.8 else "good")
    width = 100 if not (b <= 1.0) else max(0.0, b) * 100
    text = C.fmt_budget(v)
    cls = " fail" if tone == "bad" else ""
    return (f'<td class="num{cls}" data-key="worst_budget" data-value="{_e(_json(v))}">'
            f'<span class="bar {tone}"><span style="width:{width:.0f}%"></span></span>{_e(text)}</td>')


def _levels_table(doc: dict[str, Any]) -> str:
    """Quantized outputs: elements on another level than the oracle's correctly rounded one (conformance.levels)."""
    from ..levels import hist_text, level_rows

    rows = level_rows(doc)
    if not rows:
        return ""
    head = ("dtype", "output", "format, scale", "cases", "elements", "on another level", "levels off (kernel − oracle)",
            "at most", "worst case")
    out = ['<h3 id="levels">Quantization levels</h3><table class="summary" id="levels-table"><thead><tr>']
    out += [f"<th>{_e(h)}</th>" for h in head]
    out.append("</tr></thead><tbody>")
    for r in rows:
        cells = (r.dtype, r.output, f"{r.format}, scale={r.scale}", r.cases, r.compared, r.off_level,
                 hist_text(r.hist), r.max_levels, r.worst_case)
        out.append("<tr>" + "".join(f"<td>{_e(str(v))}</td>" for v in cells) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _numerics_tables(doc: dict[str, Any]) -> str:
    """The run-level rounding-bias test and effective precision (conformance.report.numerics)."""
    from .numerics import numerics_tables

    out = []
    for title, note, head, rows in numerics_tables(doc):
        slug = title.lower().replace(" ", "-")
        out.append(f'<h3 id="{slug}">{_e(title)}</h3><p class="note">{_e(note)}</p>'
                   f'<table class="summary" id="{slug}-table"><thead><tr>')
        out += [f"<th>{_e(h)}</th>" for h in head]
        out.append("</tr></thead><tbody>")
        out += ["<tr>" + "".join(f"<td>{_e(str(v))}</td>" for v in r) + "</tr>" for r in rows]
        out.append("</tbody></table>")
    return "".join(out)


def _summary_table(doc: dict[str, Any]) -> str:
    rows = C.table_rows(doc)
    if not rows:
        return '<p class="note">No case ran, so there is nothing to tabulate.</p>'
    head = ("op", "dtype", "output", "cases", "passed", "failed", "crashed", "max abs error", "max rel error",
            "max ULP", "worst fraction of bound")
    numeric = {"cases", "passed", "failed", "crashed", "max abs error", "max rel error", "max ULP",
               "worst fraction of bound"}
    out = ['<table class="summary" id="summary-table"><thead><tr>']
    out += [f'<th class="{"num" if h in numeric else ""}">{_e(h)}</th>' for h in head]
    out.append("</tr></thead><tbody>")
    for i, r in enumerate(rows):
        bad = " badrow" if r.bad else ""
        out.append(f'<tr class="main{bad}" data-row="{i}" data-op="{_e(r.op)}" data-dtype="{_e(r.dtype)}" '
                   f'data-output="{_e(r.output)}">')
        label = "* (crashed / errors)" if r.output == "*" else r.output
        out.append(f"<td>{_e(r.op)}</td><td>{_e(r.dtype)}</td><td><b>{_e(label)}</b></td>")
        out.append(_num_td(r.cases, "cases"))
        out.append(_num_td(r.passed, "passed"))
        out.append(_num_td(r.failed, "failed", cls="fail" if r.failed else ""))
        out.append(_num_td(r.crashed, "crashed", cls="fail" if r.crashed else ""))
        if r.output == "*":
            out.append('<td class="num" colspan="4">—</td>')
        else:
            out.append(_num_td(r.max_abs, "max_abs"))
            out.append(_num_td(r.max_rel, "max_rel"))
            out.append(_num_td(r.max_ulp, "max_ulp"))
            out.append(_budget_td(r.worst_budget))
        out.append("</tr>")
        detail = []
        if r.worst_case:
            what = "first case" if r.output == "*" else "worst case"
            detail.append(f'{what} <code data-key="worst_case">{_e(r.worst_case)}</code>')
        head, nums, defs = r.bound_parts
        text = " · ".join(detail)
        if head:
            text += f'<div class="bound">bound <code data-key="bound">{_e(head)}</code></div>'
        if nums:
            text += f'<div class="terms">{_e(nums)}</div>'
        if defs:
            text += f'<details><summary>definitions of the terms</summary><code>{_e(defs)}</code></details>'
        out.append(f'<tr class="detail" data-row="{i}"><td></td><td colspan="10">{text}</td></tr>')
    out.append("</tbody></table>")
    return "".join(out)


def _peer_table(name: str, rows: list) -> str:
    out = [f'<table class="peers" data-library="{_e(name)}"><thead><tr><th>op</th><th>dtype</th>'
           f'<th>output</th><th class="num">cases</th><th class="num">this kernel max abs</th>'
           f'<th class="num">{_e(name)} max abs</th><th class="num">ratio</th>'
           f'<th class="num">this kernel max ULP</th><th class="num">{_e(name)} max ULP</th></tr></thead><tbody>']
    for r in rows:
        p = r.peers[name]
        tone = "fail" if p["ratio"] > 2 else ""
        out.append(f'<tr data-peer="{_e(name)}" data-dtype="{_e(r.dtype)}" data-output="{_e(r.output)}">'
                   f'<td>{_e(r.op)}</td><td>{_e(r.dtype)}</td><td><b>{_e(r.output)}</b></td>'
                   f'{_num_td(p["cases"], "cases")}{_num_td(p["kernel_abs"], "kernel_abs")}'
                   f'{_num_td(p["abs"], "peer_abs")}<td class="num {tone}" data-key="ratio" '
                   f'data-value="{_e(_json(p["ratio"]))}">{_e(ratio_text(p["ratio"]))}</td>'
                   f'{_num_td(p["kernel_ulp"], "kernel_ulp")}{_num_td(p["ulp"], "peer_ulp")}</tr>')
    out.append("</tbody></table>")
    return "".join(out)


def _peers_section(doc: dict[str, Any], peers: dict[str, Any] | None, note: str) -> str:
    out = ['<section id="peers"><h2>Established libraries on the same inputs</h2>']
    if peers is None:
        out.append(f'<p class="note">Not compared: {_e(note or "peers were not run")}.</p></section>')
        return "".join(out)
    out.append(f'<p class="note">The same {len(peers.get("case_ids", []))} case(s) and seed {_e(peers.get("seed"))} '
               "through each library's CPU adapter, each compared with the same float64 oracle under its own "
               "declared conventions. x and dy are identical; weight, bias and running statistics are rounded to "
               "each kernel's own params dtype, so where those differ the inputs differ too. The ratio is this "
               "kernel's largest absolute error over the library's, on the cases both checked.</p>")
    rows = compare(doc, peers)
    for lib in peers.get("libraries", []):
        name = lib["name"]
        if lib.get("status") not in ("ran", "incomplete"):
            what = "not available" if lib.get("status") == "unavailable" else "not compared"
            out.append(f'<h3>{_e(name)}</h3><p class="unavail">{_e(name)}: {what} — {_e(lib.get("reason", ""))}.</p>')
            continue
        vers = ", ".join(f"{m} {v}" for m, v in (lib.get("versions") or {}).items() if v)
        kern = ", ".join(f'{r["kernel"]} ({r["spec"]}) for {"/".join(r["dtypes"])}' for r in lib.get("runs", []))
        out.append(f'<h3>{_e(name)} <span class="note">({_e(kern)}{"; " + _e(vers) if vers else ""}'
                   f'{"; incomplete run" if lib.get("status") == "incomplete" else ""})</span></h3>')
        for dt, why in (lib.get("not_declared") or {}).items():
            out.append(f'<p class="unavail">Not compared for {_e(dt)}: {_e(why)}.</p>')
        for dt, why in (lib.get("params_note") or {}).items():
            out.append(f'<p class="unavail">{_e(dt)}: {_e(why)}, so those inputs differ by their rounding.</p>')
        own = own_counts(lib)
        if own:
            out.append(f'<p class="note">{_e(name)} itself on these cases, under the same bounds: {_e(own)}.</p>')
        mine = [r for r in rows if name in r.peers]
        if not mine:
            out.append('<p class="note">No output in common with this kernel.</p>')
            continue
        for line in headline(mine, only=name):
            out.append(f"<p><b>{_e(line[0].upper() + line[1:])}.</b></p>")
        out.append(_peer_table(name, mine))
    out.append("</section>")
    return "".join(out)


def _failures_section(doc: dict[str, Any]) -> str:
    fails = C.failures(doc)
    out = ['<section id="failing"><h2>Failing cases</h2>']
    if not fails:
        out.append('<p class="note">No case failed, crashed, timed out or errored.</p></section>')
        return "".join(out)
    where = ""
    spec = str(doc.get("run", {}).get("spec") or "")
    target = spec.rpartition(":")[0]
    if target.endswith(".py") and not target.startswith("/"):
        where = " The spec is a relative path: run them from the folder the check ran in."
    out.append(f"<p>{len(fails)} case(s) did not pass. Each command reruns its case alone, with the same seed."
               f"{_e(where)}</p>")
    for f in fails[:MAX_FAILURES_SHOWN]:
        msg = "\n".join(f.message.splitlines()[:6])
        head = f'<span class="fail">{_e(f.status.replace("_", " ").upper())}</span> '
        if f.outputs:
            head += f'outputs {_e(", ".join(f.outputs))}'
        if f.worst_budget is not None and f.status == "failed":
            head += f' · worst fraction of bound {_e(C.fmt_budget(f.worst_budget))}'
        if f.waived:
            head += f' · <b>waived by the gate</b>: {_e(f.waived)}'
        cmd = (f'<pre class="cmd" data-case="{_e(f.id)}">{_e(f.command)}</pre>' if f.command else
               '<p class="note">No kernel spec was recorded for this run, so there is no command line; rerun with '
               f'run_check(kernel, RunOptions(case_ids=("{_e(f.id)}",), seed={_e(doc["run"].get("seed", 0))})).</p>')
        diag = "".join(f'<p class="diag">diagnosis: {_e(d)}</p>' for d in f.diagnosis)  # conformance.diagnosis
        out.append(f'<div class="failure"><div class="id"><code>{_e(f.id)}</code></div><div>{head}</div>'
                   f'{cmd}{"<pre class=msg>" + _e(msg) + "</pre>" if msg else ""}{diag}</div>')
    if len(fails) > MAX_FAILURES_SHOWN:
        out.append(f'<p class="note">…and {len(fails) - MAX_FAILURES_SHOWN} more; every case is in results.json.</p>')
    out.append("</section>")
    return "".join(out)


def _diagnosis_section(doc: dict[str, Any]) -> str:
    """The likely causes per failing output (conformance.diagnosis); empty when no output has one."""
    lines = C.diagnosis_lines(doc)
    if not lines:
        return ""
    items = "".join(f"<li>{_e(ln.strip())}</li>" for ln in lines)
    return ('<section id="diagnosis"><h2>Diagnosis</h2><p class="note">What each failing output\'s error is '
            "consistent with: another convention or precision, or a model of a common bug (information only; "
            f"the verdict does not depend on it).</p><ul>{items}</ul></section>")


def _plots_section(plots: Iterable[Plot]) -> str:
    out = ['<section id="plots"><h2>Plots</h2>']
    plots = list(plots)
    if not plots:
        out.append('<p class="note">No output was compared, so there is nothing to plot.</p>')
    for p in plots:
        out.append(f'<figure data-plot="{_e(p.key)}"><img alt="{_e(p.alt)}" src="{p.data_uri}">'
                   f"<figcaption><b>{_e(p.title)}.</b>{_e(p.caption)}</figcaption></figure>")
    out.append("</section>")
    return "".join(out)


def _facts(pairs: list[tuple[str, str]]) -> str:
    return '<dl class="facts">' + "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in pairs) + "</dl>"


def _caution_section(doc: dict[str, Any]) -> str:
    g = C.coverage_gaps(doc)
    out = ['<section id="caution"><h2>Caution: what this does and does not show</h2>',
           f'<p class="caution">{_e(C.caution_text(doc))}</p>', "<h3>What this run did not cover</h3>",
           '<ul class="gaps">']
    out += [f"<li>{_e(s)}</li>" for s in C.gap_sentences(g)]
    out.append("</ul>")
    if g.skipped:
        n = sum(len(v) for v in g.skipped.values())
        out.append(f"<h3>Skipped cases ({n})</h3><ul class='gaps'>")
        for reason, ids in g.skipped.items():
            items = "".join(f"<li><code>{_e(i)}</code></li>" for i in ids)
            out.append(f"<li><details><summary>{_e(reason)} — {len(ids)} case(s)</summary><ul>{items}</ul>"
                       "</details></li>")
        out.append("</ul>")
    else:
        out.append('<p class="note">No case of the selection was skipped.</p>')
    out.append("</section>")
    return "".join(out)


def render_html(doc: dict[str, Any], plots: Iterable[Plot], peers: dict[str, Any] | None = None,
                peers_note: str = "") -> str:
    """The whole report page as one string."""
    tone = C.VERDICT_TONE.get(doc["verdict"], "warn")
    k = doc.get("kernel", {})
    run = doc.get("run", {})
    who = (f'{_e(k.get("name", ""))} · {_e(k.get("op", ""))} · {_e(", ".join(run.get("dtypes", k.get("dtypes", []))))}'
           + (f' · {_e(C.device_text(doc))}' if C.device_text(doc) else "")
           + f' · tier {_e(run.get("tier", ""))} · seed {_e(run.get("seed", ""))}')
    env = doc.get("environment", {})
    title = f'refnorm report: {k.get("name", "")} — {doc["verdict"]}' + (
        f' ({shard_label(doc)})' if shard_label(doc) else "")
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title><style>{_CSS}</style></head><body>",
        f'<header class="banner {tone}" id="verdict"><div class="inner">'
        f'<div class="verdict" data-verdict="{_e(doc["verdict"])}">{_e(doc["verdict"])}</div>'
        + (f'<div class="who">{_e(shard_label(doc))} only: not the verdict of the whole run</div>'
           if shard_label(doc) else "") +
        f'<div class="who">{who}</div><div class="counts">{_e(C.counts_line(doc))}</div>'
        + (f'<div class="counts">{_e(C.gate_line(doc))}</div>' if C.gate_line(doc) else "")
        + (f'<div class="counts" id="scope">{_e(C.scope_line(doc))}</div>' if C.scope_line(doc) else "")
        + '</div></header>',
        "<main>",
        f'<p class="worst {C.worst_tone(doc)}" id="worst">{_worst_html(doc)}</p>',
        _crash_html(doc),
        f'<p class="note">{_e(_short_caution())} <a href="#caution">What the run did not cover.</a></p>',
        '<nav><a href="#summary">Results</a><a href="#peers">Libraries</a><a href="#failing">Failing cases</a>'
        '<a href="#plots">Plots</a><a href="#kernel">Kernel</a><a href="#environment">Environment</a>'
        '<a href="#caution">Caution</a></nav>',
        '<section id="summary"><h2>Results per op, dtype and output</h2>',
        '<p class="note">Max errors are over every element of every case of the row; the fraction of the bound '
        "is max over elements of |kernel − oracle| / bound (passing needs ≤ 1), with the case where it was "
        "largest and that case's bound below each row.</p>",
        _summary_table(doc), _levels_table(doc), _numerics_tables(doc), "</section>",
        _peers_section(doc, peers, peers_note),
        _failures_section(doc),
        _diagnosis_section(doc),
        _plots_section(plots),
        '<section id="kernel"><h2>Kernel and its declaration</h2>', _facts(C.kernel_facts(doc)), "</section>",
        '<section id="environment"><h2>Environment and run</h2>', _facts(C.environment_facts(doc, peers)),
        "</section>",
        _caution_section(doc),
        f'<footer>refnorm {_e(env.get("refnorm", ""))} · results schema {_e(doc.get("schema_version", ""))} · '
        f'run finished {_e(run.get("finished", ""))}. This page loads nothing from a network.</footer>',
        "</main></body></html>",
    ]
    return "\n".join(parts)


def _short_caution() -> str:
    return ("Passing is evidence on the cases run, not a proof of correctness; sign-off of the numerics on the "
            "target hardware remains the reviewer's responsibility.")


def _worst_html(doc: dict[str, Any]) -> str:
    """The worst line: the output and its fraction in large type, the case id below it."""
    line = C.worst_line(doc).split("; ")[0]
    head, sep, cid = line.partition(" on case ")
    if not sep:
        return _e(head)
    return f'{_e(head)} <span class="where">on case <code>{_e(cid)}</code></span>'


def _crash_html(doc: dict[str, Any]) -> str:
    parts = C.worst_line(doc).split("; ")[1:]
    return "".join(f'<p class="crashline">{_e(p)}</p>' for p in parts)
