"""What a report says, independent of its format: the facts the HTML and Markdown renderers lay out.

Everything here is read from a results document (conformance.results.build_document);
nothing is recomputed from arrays. Numbers keep their JSON values; ``fmt`` gives the
shared display form (3 significant digits), so every renderer shows the same text.
"""

from __future__ import annotations

import math
import shlex
from collections import OrderedDict
from dataclasses import dataclass, field
from typing import Any

from .. import dtypes as _dtypes
from .. import ops as _ops
from ..cases.model import STRIDE_KINDS, VALUE_KINDS, Case
from ..diagnosis.lines import diagnosis_lines, output_diagnoses
from ..kernel import LAYOUTS
from ..results import BAD, CAUTION, as_float

__all__ = [
    "fmt",
    "fmt_budget",
    "Row",
    "table_rows",
    "worst_line",
    "worst_tone",
    "Failure",
    "failures",
    "rerun_command",
    "Gaps",
    "coverage_gaps",
    "kernel_facts",
    "device_text",
    "environment_facts",
    "caution_text",
    "counts_line",
    "scope_line",
    "gate_line",
    "VERDICT_TONE",
]

#: Banner tone per verdict: colour names the renderers map to their palettes.
VERDICT_TONE = {"conformant": "good", "not conformant": "bad", "incomplete": "warn", "no cases run": "warn"}

#: Outputs whose reduction is over the parameter axis (Case.param_length), not the group.
PARAM_OUTPUTS = ("dweight", "dbias")


def fmt(v: Any, digits: int = 3) -> str:
    """A number for display: 3 significant digits, exponent form outside [1e-3, 1e4); ints as ints."""
    if v is None:
        return "—"
    if isinstance(v, bool):
        return str(v).lower()
    if isinstance(v, int):
        return str(v)
    x = as_float(v)
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if x == 0:
        return "0"
    if 1e-3 <= abs(x) < 1e4:
        return f"{x:.{digits}g}"
    return f"{x:.{digits - 1}e}"


def fmt_budget(v: Any) -> str:
    """The fraction of the bound used: two decimals below 10 (0.42, 1.37), else 3 significant digits."""
    x = as_float(v)
    if math.isfinite(x) and 0 <= x < 10:
        return f"{x:.2f}"
    return fmt(x)


def _case_index(doc: dict[str, Any]) -> dict[str, dict[str, Any]]:
    return {c["id"]: c for c in doc.get("cases", [])}


def _output_of(case: dict[str, Any] | None, name: str) -> dict[str, Any] | None:
    if not case:
        return None
    for o in case.get("outputs", []):
        if o.get("name") == name:
            return o
    return None


def bound_parts(bound: dict[str, Any] | None) -> tuple[str, str, str]:
    """(formula, numbers, definitions) of a Bound.summary() dict.

    The formula is its first clause (the output's own bound); the definitions are the clauses
    after the first "; " (the shared statistics' error terms); the numbers are the terms and the
    bound's largest value, or "" where absent.
    """
    if not bound:
        return "", "", ""
    formula = str(bound.get("formula", "")).strip()
    head, _, defs = formula.partition("; ")
    terms = dict(bound.get("terms") or {})
    nums = ", ".join(f"{k} = {fmt(v)}" for k, v in terms.items())
    if bound.get("max") is not None:
        nums += (", " if nums else "") + f"largest bound = {fmt(bound['max'])}"
    if bound.get("kind") == "override":
        head = f"override: {head}"
    return head, nums, defs


def bound_text(bound: dict[str, Any] | None) -> str:
    """'formula, where n = 96, u = 4.88e-04' from a Bound.summary() dict ('' when absent)."""
    if not bound:
        return ""
    formula = str(bound.get("formula", "")).strip()
    terms = bound.get("terms") or {}
    nums = ", ".join(f"{k} = {fmt(v)}" for k, v in terms.items())
    kind = bound.get("kind")
    text = formula
    if nums:
        text = f"{formula}, where {nums}" if formula else nums
    if kind == "override":
        text = f"override: {text}"
    return text


@dataclass
class Row:
    """One line of the summary table: doc["summary"]'s row plus the worst case's bound."""

    op: str
    dtype: str
    output: str
    cases: int
    passed: int
    failed: int
    crashed: int
    max_abs: Any
    max_rel: Any
    max_ulp: Any
    worst_budget: Any
    worst_case: str | None
    bound: dict[str, Any] | None = None
    raw: dict[str, Any] = field(default_factory=dict)

    @property
    def bound_text(self) -> str:
        return bound_text(self.bound)

    @property
    def bound_parts(self) -> tuple[str, str, str]:
        return bound_parts(self.bound)

    @property
    def bad(self) -> bool:
        return bool(self.failed or self.crashed) or as_float(self.worst_budget) > 1.0


def table_rows(doc: dict[str, Any]) -> list[Row]:
    """doc["summary"] in its own order, each with the bound summary of its worst case's output."""
    idx = _case_index(doc)
    rows = []
    for r in doc.get("summary", []):
        out = _output_of(idx.get(r.get("worst_case") or ""), r["output"]) if r["output"] != "*" else None
        rows.append(Row(op=r["op"], dtype=r["dtype"], output=r["output"], cases=r["cases"], passed=r["passed"],
                        failed=r["failed"], crashed=r["crashed"], max_abs=r.get("max_abs"),
                        max_rel=r.get("max_rel"), max_ulp=r.get("max_ulp"), worst_budget=r.get("worst_budget"),
                        worst_case=r.get("worst_case"), bound=(out or {}).get("bound"), raw=r))
    return rows


def _worst_row(doc: dict[str, Any]) -> Row | None:
    rows = [r for r in table_rows(doc) if r.output != "*"]
    if not rows:
        return None

    def key(r: Row) -> float:
        b = as_float(r.worst_budget)
        return math.inf if math.isnan(b) else b

    return max(rows, key=key)


def worst_tone(doc: dict[str, Any]) -> str:
    """'bad' past the bound or with cases that gave no result, 'warn' above 0.8 of it, else 'good'."""
    w = _worst_row(doc)
    if any(c["status"] in ("crashed", "timed_out", "error") for c in doc.get("cases", [])):
        return "bad"
    if w is None:
        return "warn"
    b = as_float(w.worst_budget)
    return "bad" if not b <= 1.0 else ("warn" if b > 0.8 else "good")


def worst_line(doc: dict[str, Any]) -> str:
    """One line naming the output nearest to (or furthest past) its bound, and any crashes."""
    parts = []
    w = _worst_row(doc)
    single_op = len({r["op"] for r in doc.get("summary", [])}) <= 1
    if w is not None:
        b = as_float(w.worst_budget)
        what = f"{w.dtype} {w.output}" if single_op else f"{w.op} {w.dtype} {w.output}"
        if math.isfinite(b) and b <= 1.0:
            used = f"used {fmt_budget(b)} of its bound"
        elif math.isnan(b):
            used = "has an undefined (NaN) error against its bound"
        else:
            used = f"used {fmt_budget(b)}× its bound (over)"
        parts.append(f"worst: {what} {used} on case {w.worst_case}")
    else:
        parts.append("worst: no output was compared")
    crashed = [c for c in doc.get("cases", []) if c["status"] in ("crashed", "timed_out", "error")]
    if crashed:
        by = {s: sum(1 for c in crashed if c["status"] == s) for s in ("crashed", "timed_out", "error")}
        what = ", ".join(f"{n} {label}" for (s, n), label in zip(by.items(), ("crashed", "timed out", "raised an error"))
                         if n)
        parts.append(f"{len(crashed)} case(s) gave no result ({what}; first: {crashed[0]['id']})")
    return "; ".join(parts)


def gate_line(doc: dict[str, Any]) -> str:
    """The gate's decision when a profile or baseline was applied (conformance.gate), else ''."""
    g = doc.get("gate")
    if not g:
        return ""
    o = g.get("outcomes", {})
    text = f"gate: {str(g.get('verdict', '')).upper()} ({o.get('waived', 0)} waived"
    if g.get("baseline"):
        text += f", {len(g['baseline'].get('regressions', []))} regression(s) against the baseline"
    text += ")"
    if g.get("reasons"):
        text += ": " + "; ".join(g["reasons"])
    return text


def scope_line(doc: dict[str, Any]) -> str:
    """For a shard's document, what it covers and that its verdict is not the run's (conformance.run.shards);
    for a merged one, the shards it was made from; else ''."""
    from ..run.shards import shard_lines

    lines = shard_lines(doc)
    if lines:
        return lines[0]
    m = (doc.get("run") or {}).get("merged")
    if m:
        missing = m.get("missing_shards") or []
        return (f"Merged from {len(m.get('shards', []))} of {m.get('count')} shards (refnorm merge)"
                + (f"; missing: {', '.join(f'shard {k}' for k in missing)}" if missing else "") + ".")
    return ""


def counts_line(doc: dict[str, Any]) -> str:
    c = doc.get("counts", {})
    items = [("passed", "passed"), ("inconclusive", "inconclusive"), ("failed", "failed"), ("crashed", "crashed"), ("timed_out", "timed out"),
             ("error", "errors"), ("skipped", "skipped")]
    return ", ".join(f"{c.get(k, 0)} {label}" for k, label in items)


@dataclass
class Failure:
    """A case that did not pass, with the command that reruns it alone (None without a spec)."""

    id: str
    status: str
    message: str
    command: str | None
    outputs: list[str]
    worst_budget: Any
    waived: str | None = None  # the gate's waiver reason, when one covers the case
    diagnosis: list[str] = field(default_factory=list)  # conformance.diagnosis: one sentence per failing output


def rerun_command(doc: dict[str, Any], case_id: str) -> str | None:
    """`refnorm check SPEC --case ID --seed SEED` (plus the run's --tolerance overrides), shell-quoted.

    None when the run recorded no kernel spec (a Kernel object passed to run_check directly).
    """
    run = doc.get("run", {})
    spec = run.get("spec")
    if not spec:
        return None
    argv = ["refnorm", "check", spec, "--case", case_id, "--seed", str(run.get("seed", 0))]
    for name, (atol, rtol) in (run.get("overrides") or {}).items():
        argv += ["--tolerance", f"{name}={atol!r},{rtol!r}"]
    return shlex.join(argv)


def failures(doc: dict[str, Any]) -> list[Failure]:
    """Cases with status failed, crashed, timed out or error, in run order."""
    out = []
    for c in doc.get("cases", []):
        if c["status"] not in BAD and c["status"] != "inconclusive":
            continue
        bad_outs = [o["name"] for o in c.get("outputs", []) if not o.get("passed", True)
                    or (o.get("inconclusive") and not o.get("accepted_inconclusive"))]
        wb = max((as_float(o.get("budget_used", 0.0)) for o in c.get("outputs", [])), default=None)
        w = c.get("waiver") or {}
        waived = None
        if w.get("waived"):
            waived = "; ".join(str(b.get("reason", "")) for b in w.get("by", []) if b.get("reason")) or "waived"
        out.append(Failure(id=c["id"], status=c["status"], message=c.get("message", "") or "",
                           command=rerun_command(doc, c["id"]), outputs=bad_outs, worst_budget=wb, waived=waived,
                           diagnosis=[str(d.get("text", "")) for _, d in output_diagnoses(c)]))
    return out


@dataclass
class Gaps:
    """What the run did not cover (for the caution section)."""

    skipped: "OrderedDict[str, list[str]]"  # reason -> case ids
    dtypes_undeclared: list[str]
    dtypes_not_run: list[str]
    layouts_undeclared: list[str]
    values_absent: list[str]
    strides_absent: list[str]
    modes_absent: list[str]
    declaration_limits: list[str]
    longest_reduction: int | None
    outputs_unchecked: list[str]
    tier: str


def _run_cases(doc: dict[str, Any]) -> list[Case]:
    return [Case.from_dict(c["case"]) for c in doc.get("cases", []) if c["status"] != "skipped"]


def coverage_gaps(doc: dict[str, Any]) -> Gaps:
    """Skipped cases by reason, and the dtypes, layouts, value kinds, strides and modes no case ran."""
    k = doc.get("kernel", {})
    run = doc.get("run", {})
    skipped: OrderedDict[str, list[str]] = OrderedDict()
    for c in doc.get("cases", []):
        if c["status"] == "skipped":
            skipped.setdefault(c.get("message") or "no reason recorded", []).append(c["id"])
    ran = _run_cases(doc)
    declared = list(k.get("dtypes", []))
    # None for an op this version does not know: its layouts, modes and lengths are not judged.
    spec = _ops.find(k.get("op", ""))
    op_layouts = spec.axes.layouts if spec else ()
    layouts = [lay for lay in LAYOUTS if lay in op_layouts and lay not in k.get("layouts", LAYOUTS)]
    values = [v for v in VALUE_KINDS if v not in {c.values for c in ran}]
    op_strides = spec.axes.strides if spec else STRIDE_KINDS
    strides = [s for s in STRIDE_KINDS if s not in {c.strides for c in ran} and s in op_strides]
    seen = {(c.mode, c.running) for c in ran}
    modes = [label for mode, running, label in (spec.modes if spec else ()) if (mode, running) not in seen]
    has_running = bool(spec and spec.has_eval)
    limits = []
    if not k.get("strided", True):
        limits.append("strided=False: non-contiguous inputs are not checked")
    if not k.get("optional_params", True):
        limits.append("optional_params=False: cases without weight or bias are not checked")
    if has_running and not k.get("momentum_none", True):
        limits.append("momentum_none=False: the cumulative moving average (momentum=None) is not checked")
    if k.get("min_reduction", 1) > 1:
        limits.append(f"min_reduction={k['min_reduction']}: shorter training reductions are not checked")
    if not k.get("updates_running", True) and has_running:
        limits.append("updates_running=False: running statistics are not checked")
    if "unchecked" in k:  # the declaration's own list (conformance.kernel.unchecked_outputs)
        unchecked = [f"{u['output']} ({'/'.join(u.get('modes', []))}): {u['reason']}" for u in k["unchecked"]]
    else:  # documents written before the list was recorded
        entry = k.get("entry_points", [])
        unchecked = []
        if not any(e.startswith("backward") for e in entry):
            unchecked.append("gradients (no backward entry point)")
        else:
            unchecked += [g for g in ("dx", "dweight", "dbias") if g not in k.get("grads", [])]
    longest = max((c.group_length for c in ran), default=None) if spec else None
    return Gaps(skipped=skipped,
                dtypes_undeclared=[d for d in _dtypes.FORMATS if d not in declared],
                dtypes_not_run=[d for d in declared if d not in run.get("dtypes", declared)],
                layouts_undeclared=layouts, values_absent=values, strides_absent=strides, modes_absent=modes,
                declaration_limits=limits, longest_reduction=longest, outputs_unchecked=unchecked,
                tier=str(run.get("tier", "")))


def device_text(doc: dict[str, Any]) -> str:
    """'device cuda:0' where the kernel declares where it runs, else '' (for the report's header)."""
    dev = doc.get("kernel", {}).get("device")
    return f"device {dev}" if dev else ""


def kernel_facts(doc: dict[str, Any]) -> list[tuple[str, str]]:
    """(label, text) pairs: the kernel's declaration, precision per dtype and conventions."""
    k = doc.get("kernel", {})
    facts = [("kernel", str(k.get("name", ""))), ("op", str(k.get("op", ""))),
             ("device", str(k.get("device") or "not declared")),
             ("entry points", ", ".join(k.get("entry_points", []))),
             ("outputs", ", ".join(k.get("outputs", []))), ("gradients", ", ".join(k.get("grads", [])) or "none"),
             ("dtypes", ", ".join(k.get("dtypes", []))), ("layouts", ", ".join(k.get("layouts", [])))]
    for dt, p in (k.get("precision") or {}).items():
        extra = ""
        if p.get("output_accumulate"):
            extra = "; per output: " + ", ".join(f"{o} in {a}" for o, a in p["output_accumulate"].items())
        extra += _precision_extras(p)
        facts.append((f"precision {dt}", f"storage {p.get('storage')}, params {p.get('params')}, "
                      f"accumulate {p.get('accumulate')}, summation model {p.get('summation')} "
                      f"(lambda {fmt(p.get('lam'))}){extra}"))
    conv = k.get("conventions") or {}
    if conv:
        facts.append(("conventions", ", ".join(
            f"{key}={'/'.join(v) if isinstance(v, list) else v}" for key, v in conv.items()
            if not (isinstance(v, list) and not v)) or "defaults"))
    flags = [f"{f}={k[f]}" for f in ("strided", "optional_params", "momentum_none", "updates_running",
                                     "min_reduction") if f in k]
    if flags:
        facts.append(("declared support", ", ".join(flags)))
    if k.get("quantization"):
        q = k["quantization"]
        facts.append(("quantization", ", ".join(f"{key}={v}" for key, v in q.items())))
    if k.get("notes"):
        facts.append(("notes", str(k["notes"])))
    return facts


def _precision_extras(p: dict[str, Any]) -> str:
    """The declaration's fields beyond formats and summation, where they are not the defaults."""
    parts = []
    if p.get("statistics") and p.get("statistics") != p.get("accumulate"):
        parts.append(f"statistics rounded to {p['statistics']} before use")
    if p.get("saved") and p.get("saved") != p.get("params"):
        parts.append(f"saved statistics in {p['saved']}")
    if p.get("subnormals") == "flush":
        parts.append("subnormals flushed to zero")
    if p.get("overflow") == "saturate":
        parts.append("out-of-range results saturate")
    if p.get("output_summation"):
        parts.append("summation per output: " + ", ".join(f"{o} {m}" for o, m in p["output_summation"].items()))
    return "".join("; " + x for x in parts)


def environment_facts(doc: dict[str, Any], peers: dict[str, Any] | None = None) -> list[tuple[str, str]]:
    """(label, text) pairs: versions, machine, and the run's seed, tier, dates and command."""
    env = doc.get("environment", {})
    run = doc.get("run", {})
    facts = [(name, str(env[key])) for key, name in
             (("refnorm", "refnorm"), ("python", "Python"), ("numpy", "NumPy"), ("ml_dtypes", "ml_dtypes"),
              ("torch", "PyTorch"), ("tensorflow", "TensorFlow"), ("keras", "Keras"), ("onnx", "ONNX"),
              ("onnxruntime", "ONNX Runtime")) if key in env]
    if peers:
        have = {n for n, _ in facts}
        for lib in peers.get("libraries", []):
            for mod, ver in (lib.get("versions") or {}).items():
                name = {"torch": "PyTorch", "tensorflow": "TensorFlow", "keras": "Keras", "onnx": "ONNX",
                        "onnxruntime": "ONNX Runtime"}.get(mod, mod)
                if name not in have and ver:
                    facts.append((name, f"{ver} (peer run)"))
                    have.add(name)
    cpu = str(env.get("processor", ""))
    if env.get("cpu_count"):
        cpu += f" ({env['cpu_count']} logical CPUs)"
    facts += [("CPU", cpu), ("OS", str(env.get("platform", ""))), ("machine", str(env.get("machine", "")))]
    facts += [("tier", str(run.get("tier", ""))), ("seed", str(run.get("seed", ""))),
              ("started", str(run.get("started", ""))), ("finished", str(run.get("finished", ""))),
              ("duration", f"{fmt(run.get('duration_s'))} s" if run.get("duration_s") is not None else "")]
    if run.get("spec"):
        facts.append(("spec", str(run["spec"])))
    if run.get("command"):
        facts.append(("command", str(run["command"])))
    if isinstance(run.get("shard"), dict):
        sh = run["shard"]
        facts.append(("shard", f"{sh['index']} of {sh['count']} ({sh.get('rule', '')}) of {sh.get('selected')} selected "
                               f"cases; selection sha256 {str(sh.get('selection_sha256', ''))[:12]}"))
    if isinstance(run.get("merged"), dict):
        m = run["merged"]
        facts.append(("merged", f"{len(m.get('shards', []))} of {m.get('count')} shards; each shard's timing, command "
                                "and environment are in results.json, run.merged.shards"))
    if run.get("accept_inconclusive"):
        facts.append(("accepted as inconclusive", ", ".join(str(k) for k in run["accept_inconclusive"])
                      + " (passes under bounds that are not informative, accepted by the user)"))
    if run.get("overrides"):
        facts.append(("tolerance overrides", ", ".join(f"{k}: atol {fmt(a)}, rtol {fmt(r)}"
                                                        for k, (a, r) in run["overrides"].items())))
    return [(k, v) for k, v in facts if v]


def caution_text(doc: dict[str, Any]) -> str:
    return str(doc.get("caution") or CAUTION)


def gap_sentences(g: Gaps) -> list[str]:
    """The coverage gaps as short sentences (shared by both renderers)."""
    s = []
    if g.dtypes_undeclared:
        s.append("Dtypes not declared, so not checked: " + ", ".join(g.dtypes_undeclared) + ".")
    if g.dtypes_not_run:
        s.append("Declared but not selected in this run: " + ", ".join(g.dtypes_not_run) + ".")
    if g.layouts_undeclared:
        s.append("Layouts not declared: " + ", ".join(g.layouts_undeclared) + ".")
    if g.values_absent:
        s.append("Value kinds no case ran: " + ", ".join(g.values_absent) + ".")
    if g.strides_absent:
        s.append("Memory layouts (strides) no case ran: " + ", ".join(g.strides_absent) + ".")
    if g.modes_absent:
        s.append("Modes no case ran: " + ", ".join(g.modes_absent) + ".")
    s += [lim[0].upper() + lim[1:] + "." for lim in g.declaration_limits]
    if g.outputs_unchecked:
        s.append("Outputs the declaration leaves unchecked: " + "; ".join(g.outputs_unchecked) + ".")
    if g.longest_reduction is not None:
        s.append(f"Longest reduction run: {g.longest_reduction:,} elements per statistic (tier {g.tier}); "
                 "longer reductions on the target are extrapolation.")
    return s
