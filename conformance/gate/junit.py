"""JUnit XML from results documents, for CI systems that read test reports but do not run pytest.

Layout (the common JUnit XML form that CI systems read):

    <testsuites name="refnorm" tests= failures= errors= skipped= time=>
      <testsuite name=KERNEL tests= failures= errors= skipped= time= timestamp=>
        <properties> spec, op, tier, seed, verdict, gate verdict, shard (K/N), caution </properties>
        <testcase classname="OP.DTYPE" name=CASE_ID time=SECONDS>
          <failure message=FIRST_LINE type=STATUS>full message</failure>   a failed case
          <error message= type=crashed|timed_out|error>...</error>          a crash, timeout or exception
          <failure message= type=inconclusive>...</failure>                a pass under a bound that is not informative
          <skipped message= type=skipped|waived/>                           skipped or waived
        </testcase>

Gate outcomes (conformance.gate.waivers.gate_outcome) decide the child element, so
a waived failure is a skip and an expired waiver is a failure, as in the pytest route.
"""

from __future__ import annotations

import os
import re
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any, Iterable, Mapping

from ..results import as_float
from ..text import visible
from .waivers import gate_outcome

__all__ = ["junit_tree", "write_junit"]


#: Characters XML 1.0 allows (W3C XML 1.0, 5th ed., section 2.2 "Characters").
_NOT_XML = re.compile("[^\u0009\u000a\u000d\u0020-\ud7ff\ue000-\ufffd\U00010000-\U0010ffff]")


def _clean(text: object) -> str:
    """Any value of a document as XML text or attribute: what XML 1.0 does not allow (NUL, terminal
    colour codes, lone surrogates) and the other hidden controls shown as \\xNN (conformance.text.visible).
    Every name, attribute and text of the tree goes through here; ElementTree escapes &, < and quotes."""
    t = visible(text)
    return _NOT_XML.sub(lambda m: f"\\x{ord(m.group()):02x}", t) if _NOT_XML.search(t) else t


def _first_line(msg: str, status: str) -> str:
    first = msg.strip().splitlines()[0] if msg.strip() else status
    first = _clean(first)
    return first if len(first) <= 500 else first[:497] + "..."


def _shard(run: Mapping[str, Any]) -> str | None:
    """'K/N (verdict of this shard only)' for a shard's document (conformance.run.shards), else None."""
    s = run.get("shard")
    return f"{s['index']}/{s['count']} (the verdict is this shard's only)" if isinstance(s, Mapping) else None


def _suite(doc: Mapping[str, Any]) -> ET.Element:
    kernel = doc.get("kernel", {})
    run = doc.get("run", {})
    suite = ET.Element("testsuite", name=_clean(kernel.get("name", "kernel")))
    props = ET.SubElement(suite, "properties")
    gate = doc.get("gate") or {}
    for k, v in (("spec", run.get("spec")), ("op", kernel.get("op")), ("tier", run.get("tier")),
                 ("seed", run.get("seed")), ("verdict", doc.get("verdict")), ("gate", gate.get("verdict")),
                 ("shard", _shard(run)), ("caution", doc.get("caution"))):
        if v is not None:
            ET.SubElement(props, "property", name=k, value=_clean(v))
    n = {"tests": 0, "failures": 0, "errors": 0, "skipped": 0}
    total = 0.0
    for c in doc.get("cases", []):
        case = c.get("case", {})
        t = as_float(c.get("duration_s", 0.0))
        t = t if t == t else 0.0
        total += t
        classname = _clean(f"{case.get('op', kernel.get('op'))}.{case.get('dtype')}")
        tc = ET.SubElement(suite, "testcase", classname=classname, name=_clean(c["id"]), time=f"{t:.3f}")
        outcome, msg = gate_outcome(c)
        n["tests"] += 1
        if outcome in ("failed", "inconclusive"):  # an inconclusive pass is not evidence: never green
            n["failures"] += 1
            el = ET.SubElement(tc, "failure", message=_first_line(msg, c["status"]), type=_clean(c["status"]))
            el.text = _clean(msg)
        elif outcome == "error":
            n["errors"] += 1
            el = ET.SubElement(tc, "error", message=_first_line(msg, c["status"]), type=_clean(c["status"]))
            el.text = _clean(msg)
        elif outcome in ("skipped", "waived"):
            n["skipped"] += 1
            ET.SubElement(tc, "skipped", message=_first_line(msg, outcome), type=outcome)
    for r in doc.get("rounding_bias") or []:  # run-level failures (issue 11): one testcase per flagged output
        if r.get("failure"):
            from ..rounding_bias import describe

            tc = ET.SubElement(suite, "testcase", classname=_clean(f"{r.get('op')}.{r.get('dtype')}"),
                               name=_clean(f"run level: rounding bias of {r.get('output')}"), time="0.000")
            n["tests"] += 1
            n["failures"] += 1
            text = describe(r)
            el = ET.SubElement(tc, "failure", message=_first_line(text, "failed"), type="rounding_bias")
            el.text = _clean(text)
    suite.set("tests", str(n["tests"]))
    suite.set("failures", str(n["failures"]))
    suite.set("errors", str(n["errors"]))
    suite.set("skipped", str(n["skipped"]))
    suite.set("time", f"{total:.3f}")
    if run.get("started"):
        suite.set("timestamp", _clean(run["started"]))
    return suite


def junit_tree(docs: Iterable[Mapping[str, Any]]) -> ET.ElementTree:
    """A <testsuites> tree with one <testsuite> per results document (one per kernel)."""
    root = ET.Element("testsuites", name="refnorm")
    tot = {"tests": 0, "failures": 0, "errors": 0, "skipped": 0}
    time = 0.0
    for d in docs:
        s = _suite(d)
        root.append(s)
        for k in tot:
            tot[k] += int(s.get(k))
        time += float(s.get("time"))
    for k, v in tot.items():
        root.set(k, str(v))
    root.set("time", f"{time:.3f}")
    tree = ET.ElementTree(root)
    ET.indent(tree)
    return tree


def write_junit(path: str | os.PathLike, docs: Iterable[Mapping[str, Any]]) -> Path:
    """Write the JUnit XML of ``docs`` to ``path`` (via a temporary file beside it, renamed into place;
    conformance.destinations.file_target checks the path before a run)."""
    from ..destinations import write_atomic

    tree = junit_tree(docs)
    return write_atomic(path, lambda f: tree.write(f, encoding="utf-8", xml_declaration=True), binary=True)
