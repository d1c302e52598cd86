"""The tolerance report, built from real runs of the Kestrel demo drafts (examples/kestrel_drafts.py).

Checked against things outside the report code: the results document it renders
(conformance.results, written by the runner), Python's html.parser (HTML Living
Standard tokenisation), the PNG signature (ISO/IEC 15948:2004 §5.2 / RFC 2083
§3.1), torch CPU through its adapter as an independent implementation, and the
command line that must rerun each failing case alone.
"""

from __future__ import annotations

import base64
import importlib.util
import json
import math
import re
import shlex
from html import unescape
from html.parser import HTMLParser
from pathlib import Path

import pytest

from conformance import cli
from conformance.results import BAD, as_float, load
from conformance.run import RunOptions, run_check

ROOT = Path(__file__).resolve().parents[1]
DRAFTS = ROOT / "examples" / "kestrel_drafts.py"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # ISO/IEC 15948:2004 §5.2

# Cases of the smoke tier for layer norm in float16: one of them (cancellation: mean far from the
# spread) breaks draft 1's one-pass variance E[x^2] - E[x]^2 (Chan, Golub & LeVeque 1983, "Algorithms
# for computing the sample variance", The American Statistician 37(3); cited from memory).
LN_CANCEL = "layer_norm/float16/trailing/12x96/norm_ndim=1/cancellation/w=random/b=random/eps=1e-05/train/contiguous"


def _drafts():
    spec = importlib.util.spec_from_file_location("kestrel_drafts_for_report_tests", DRAFTS)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    return mod


class _Page(HTMLParser):
    """Collects what the checks need: tag balance, URLs, images, table cells, text by element id."""

    VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.urls: list[tuple[str, str, str]] = []  # (tag, attribute, value)
        self.tags: list[tuple[str, dict]] = []
        self.styles: list[str] = []
        self.text: list[str] = []
        self.cells: list[dict] = []  # summary table cells with data-key
        self.cmds: dict[str, str] = {}
        self._in_style = False
        self._cell: dict | None = None
        self._row: dict | None = None
        self._cmd: str | None = None
        self._ids: dict[str, list[str]] = {}
        self._open_ids: list[tuple[str, int]] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append((tag, a))
        if tag not in self.VOID:
            self.stack.append(tag)
        for k in ("src", "href", "action", "poster", "srcset"):
            if k in a:
                self.urls.append((tag, k, a[k] or ""))
        if "style" in a:
            self.styles.append(a["style"] or "")
        if tag == "style":
            self._in_style = True
        if tag == "tr":
            self._row = a if ("data-peer" in a or "main" in (a.get("class") or "")) else None
        if tag == "td" and "data-key" in a and self._row is not None:
            self._cell = {"tr": self._row, "key": a["data-key"], "value": a["data-value"], "text": ""}
        if tag == "pre" and "data-case" in a:
            self._cmd = a["data-case"]
            self.cmds[self._cmd] = ""
        if "id" in a and tag not in self.VOID:
            self._ids[a["id"]] = []
            self._open_ids.append((a["id"], len(self.stack)))

    def handle_endtag(self, tag):
        if tag in self.VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")
        else:
            self.stack.pop()
        while self._open_ids and self._open_ids[-1][1] > len(self.stack):
            self._open_ids.pop()
        if tag == "style":
            self._in_style = False
        if tag == "td" and self._cell is not None:
            self.cells.append(self._cell)
            self._cell = None
        if tag == "tr":
            self._row = None
        if tag == "pre":
            self._cmd = None

    def handle_data(self, data):
        if self._in_style:
            self.styles.append(data)
            return
        self.text.append(data)
        if self._cell is not None:
            self._cell["text"] += data
        if self._cmd is not None:
            self.cmds[self._cmd] += data
        for i, _ in self._open_ids:
            self._ids[i].append(data)

    def by_id(self, element_id: str) -> str:
        return " ".join("".join(self._ids.get(element_id, [])).split())

    @property
    def all_text(self) -> str:
        return " ".join("".join(self.text).split())


def _parse(html: str) -> _Page:
    p = _Page()
    p.feed(html)
    p.close()
    return p


def _close(text: str, value, digits: int = 3) -> bool:
    """The displayed text is the JSON value to its displayed precision (3 significant digits)."""
    v = as_float(value)
    t = text.strip()
    if math.isnan(v):
        return t == "nan"
    if math.isinf(v):
        return t == ("inf" if v > 0 else "-inf")
    got = float(t)
    if v == 0:
        return got == 0
    return abs(got - v) <= 0.5 * 10 ** (math.floor(math.log10(abs(v))) - digits + 1) * 1.0001


@pytest.fixture(scope="module")
def ln_run(tmp_path_factory):
    """Draft 1 of the layer norm over the smoke tier, with torch CPU beside it when installed."""
    from conformance.report import write_report
    from conformance.report.peers import LIBRARIES, Library, run_peers

    mod = _drafts()
    spec = f"{DRAFTS}:layer_norm_draft1"
    doc = run_check(mod.layer_norm_draft1, RunOptions(tier="smoke", seed=3), spec=spec, quiet=True)
    torch_lib = [lib for lib in LIBRARIES if lib.name == "torch CPU"]
    # A library that is not installed: the report must say so and why.
    absent = Library("absent lib", "conformance.adapters.absent_lib", ("refnorm_absent_module_for_tests",))
    peers = run_peers(doc, torch_lib + [absent])
    out = tmp_path_factory.mktemp("report")
    paths = write_report(doc, out, peers=peers)
    return {"doc": doc, "peers": peers, "paths": paths, "out": out, "spec": spec,
            "html": paths["html"].read_text(encoding="utf-8"), "md": paths["markdown"].read_text(encoding="utf-8")}


def test_the_run_is_the_one_the_report_is_about(ln_run):
    doc = ln_run["doc"]
    # One-pass variance on data with mean/spread ~ 250 (generators.CANCELLATION float16): the draft must
    # fail that case (Chan, Golub & LeVeque 1983), so the report has a failure to show.
    assert doc["verdict"] == "not conformant"
    assert {c["id"]: c["status"] for c in doc["cases"]}[LN_CANCEL] == "failed"
    assert load(ln_run["paths"]["results"]) == json.loads(json.dumps(doc))


def test_html_parses_names_the_verdict_and_the_worst_output(ln_run):
    page = _parse(ln_run["html"])
    doc = ln_run["doc"]
    assert not page.errors, page.errors[:5]
    assert page.stack == [], f"unclosed elements: {page.stack}"
    banner = [a for t, a in page.tags if a.get("data-verdict")]
    assert banner and banner[0]["data-verdict"] == doc["verdict"]
    assert doc["verdict"] in page.by_id("verdict").lower()
    # The worst output, found here from the cases themselves: the largest budget_used of all outputs.
    worst = max(((as_float(o["budget_used"]), c["id"], o["name"], c["case"]["dtype"])
                 for c in doc["cases"] for o in c["outputs"]), key=lambda t: t[0])
    line = page.by_id("worst")
    assert line.startswith(f"worst: {worst[3]} {worst[2]} used"), line
    assert worst[1] in line


def test_html_embeds_its_plots_and_loads_nothing_from_a_network(ln_run):
    html = ln_run["html"]
    page = _parse(html)
    imgs = [a["src"] for t, a in page.tags if t == "img"]
    assert len(imgs) >= 3  # budget, ULP distribution, error against reduction length
    for src in imgs:
        assert src.startswith("data:image/png;base64,")
        assert base64.b64decode(src.split(",", 1)[1])[:8] == PNG_SIGNATURE
    for tag, attr, url in page.urls:
        assert not re.match(r"^\s*(https?:|//|ftp:|file:)", url, re.I), (tag, attr, url[:80])
        assert url.startswith(("data:", "#")), (tag, attr, url[:80])
    assert not [t for t, a in page.tags if t in ("script", "link", "iframe", "object", "embed")]
    styles = " ".join(page.styles)
    assert "@import" not in styles
    assert not re.search(r"url\(\s*['\"]?(?!data:)", styles)
    assert "http://" not in html and "https://" not in html


def test_table_numbers_are_the_documents(ln_run):
    doc, page = ln_run["doc"], _parse(ln_run["html"])
    summary = doc["summary"]
    seen = set()
    for cell in (c for c in page.cells if "data-row" in c["tr"]):
        row = summary[int(cell["tr"]["data-row"])]
        key = cell["key"]
        assert json.loads(cell["value"]) == row[key], (cell, row)
        v = as_float(row[key])
        if key == "worst_budget" and 0 <= v < 10:  # shown with two decimals: 0.42, 1.37
            assert abs(float(cell["text"]) - v) <= 0.005 * 1.0001, (cell, v)
        else:
            assert _close(cell["text"], row[key]), (cell, row[key])
        seen.add((int(cell["tr"]["data-row"]), key))
    for i, r in enumerate(summary):
        keys = ("cases", "passed", "failed", "crashed") + (() if r["output"] == "*" else
                                                           ("max_abs", "max_rel", "max_ulp", "worst_budget"))
        assert all((i, k) in seen for k in keys), (i, r["output"])
        assert r["worst_case"] in ln_run["html"]


def test_bound_formula_and_numbers_of_the_worst_case(ln_run):
    doc, text = ln_run["doc"], unescape(ln_run["html"])
    by_id = {c["id"]: c for c in doc["cases"]}
    for r in doc["summary"]:
        if r["output"] == "*":
            continue
        out = next(o for o in by_id[r["worst_case"]]["outputs"] if o["name"] == r["output"])
        head = out["bound"]["formula"].split("; ")[0]
        assert head in text
        for k in out["bound"]["terms"]:
            assert f"{k} = " in text


def test_failing_cases_have_rerun_commands_that_rerun_them_alone(ln_run, tmp_path):
    doc, page = ln_run["doc"], _parse(ln_run["html"])
    bad = [c for c in doc["cases"] if c["status"] in BAD]
    assert bad and set(page.cmds) == {c["id"] for c in bad}
    case = bad[0]
    argv = shlex.split(page.cmds[case["id"]])
    assert argv[:3] == ["refnorm", "check", ln_run["spec"]]
    assert ln_run["md"].count(page.cmds[case["id"]].strip()) == 1
    out = tmp_path / "rerun.json"
    rc = cli.main(argv[1:] + ["--quiet", "--json", str(out)])
    again = load(out)
    assert rc == cli.EXIT_FAIL
    assert [c["id"] for c in again["cases"]] == [case["id"]]
    assert again["run"]["seed"] == doc["run"]["seed"] == 3
    # Same id and seed give the same inputs, so a deterministic kernel gives the same errors.
    assert again["cases"][0]["status"] == case["status"]
    assert [o["max_abs"] for o in again["cases"][0]["outputs"]] == [o["max_abs"] for o in case["outputs"]]


class _Cells(HTMLParser):
    """The table rows of report.md as a CommonMark renderer shows them (markdown-it-py, GFM tables)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.rows: list[list[str]] = []
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        if tag == "tr":
            self.rows.append([])
        if tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th") and self._cell is not None:
            self.rows[-1].append("".join(self._cell).strip())
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _md_shown(md: str) -> tuple[str, list[list[str]]]:
    """report.md's text and table rows as a pull request shows them (rendered, then tokenised)."""
    from writer_checks import parse_html, render_markdown_html

    html = render_markdown_html(md)
    cells = _Cells()
    cells.feed(html)
    return " ".join("".join(parse_html(html).text).split()), cells.rows


def test_markdown_has_the_verdict_the_table_and_the_caution(ln_run):
    md, doc = ln_run["md"], ln_run["doc"]
    assert doc["verdict"].upper() in md.splitlines()[0]
    text, table = _md_shown(md)
    rows = [r for r in table if r and r[0] == doc["kernel"]["op"]]
    assert len(rows) == len(doc["summary"])
    for cells, r in zip(rows, doc["summary"]):
        assert cells[:3] == [r["op"], r["dtype"], r["output"]]
        assert [int(c) for c in cells[3:7]] == [r["cases"], r["passed"], r["failed"], r["crashed"]]
        assert _close(cells[7], r["max_abs"]) and _close(cells[8], r["max_rel"]) and int(cells[9]) == r["max_ulp"]
        assert cells[11] == r["worst_case"]
    assert doc["caution"] in text
    assert doc["caution"] in unescape(ln_run["html"])
    assert "not a proof" in md and "reviewer" in md


def test_peers_beside_the_kernel_with_ratios(ln_run):
    pytest.importorskip("torch")
    doc, peers, page = ln_run["doc"], ln_run["peers"], _parse(ln_run["html"])
    torch_entry = next(lib for lib in peers["libraries"] if lib["name"] == "torch CPU")
    assert torch_entry["status"] == "ran", torch_entry.get("reason")
    tdoc = torch_entry["runs"][0]["doc"]
    assert tdoc["run"]["seed"] == doc["run"]["seed"]
    assert sorted(c["id"] for c in tdoc["cases"]) == sorted(c["id"] for c in doc["cases"] if c["status"] != "skipped")
    # The ratio for rstd, from the two documents directly.
    def max_abs(d, name):
        return max(as_float(o["max_abs"]) for c in d["cases"] for o in c["outputs"] if o["name"] == name)

    ratio = max_abs(doc, "rstd") / max_abs(tdoc, "rstd")
    # torch accumulates the statistics in float32 without the one-pass shortcut (a Welford-style update
    # on the CPU, from memory); the draft's one-pass variance loses about log10(kappa^2) digits on the
    # cancellation case (Chan, Golub & LeVeque 1983): its rstd error must be far above torch's.
    assert ratio > 10
    cells = {c["key"]: c for c in page.cells if c["tr"].get("data-peer") == "torch CPU"
             and c["tr"].get("data-output") == "rstd"}
    assert as_float(json.loads(cells["ratio"]["value"])) == pytest.approx(ratio, rel=1e-12)
    assert cells["ratio"]["text"] == f"{ratio:.0f}×"
    assert _close(cells["peer_abs"]["text"], max_abs(tdoc, "rstd"))
    text = page.all_text
    # The library that is not installed is named with the reason.
    assert "absent lib: not available — refnorm_absent_module_for_tests not installed" in text
    assert "absent lib: not available" in ln_run["md"]


def test_caution_lists_what_was_not_covered(tmp_path):
    """Batch norm draft 2 on chosen cases, two of which its declaration excludes (skipped)."""
    from conformance.report import write_report

    mod = _drafts()
    ids = ("batch_norm/float16/channels_first/1x5/normal/w=random/b=random/eps=1e-05/train/contiguous",
           "batch_norm/float16/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/train/momentum=cumulative,seen=3/contiguous",
           "batch_norm/float16/channels_first/4x8x6x5/normal/w=random/b=random/eps=1e-05/train/contiguous")
    doc = run_check(mod.batch_norm_draft2, RunOptions(case_ids=ids), quiet=True)
    skipped = {c["id"]: c["message"] for c in doc["cases"] if c["status"] == "skipped"}
    assert set(skipped) == set(ids[:2])  # min_reduction=2 and momentum_none=False (the draft's declaration)
    paths = write_report(doc, tmp_path, peers=None, peers_note="disabled for this test")
    html, md = unescape(paths["html"].read_text()), _md_shown(paths["markdown"].read_text())[0]
    for cid, why in skipped.items():
        assert cid in html and why in html
        assert why in md
    for dt in ("float32", "bfloat16"):  # declared float16 only
        assert dt in _parse(paths["html"].read_text()).by_id("caution")
    assert "Not compared: disabled for this test" in html


def test_report_command_rerenders_with_stored_peers(ln_run, tmp_path):
    src = ln_run["out"]
    out = tmp_path / "again"
    rc = cli.main(["report", str(src / "results.json"), "--out", str(out), "--quiet"])
    assert rc == cli.EXIT_OK
    # The stored peers were reused, not rerun (a rerun would carry new start times).
    assert json.loads((out / "peers.json").read_text()) == json.loads((src / "peers.json").read_text())
    assert (out / "report.html").read_text() .count("data:image/png;base64,") >= 3
    assert load(out / "results.json") == load(src / "results.json")


def test_report_command_rejects_what_is_not_a_results_file(tmp_path, capsys):
    bad = tmp_path / "x.json"
    bad.write_text(json.dumps({"schema": "something else"}))
    assert cli.main(["report", str(bad), "--out", str(tmp_path / "o")]) == cli.EXIT_USAGE
    assert "not a refnorm results file" in capsys.readouterr().err
    assert cli.main(["report", str(tmp_path / "missing.json"), "--out", str(tmp_path / "o")]) == cli.EXIT_USAGE


def test_check_with_report_and_no_peers(tmp_path, capsys):
    out = tmp_path / "rep"
    rc = cli.main(["check", f"{DRAFTS}:layer_norm_draft2", "--case", LN_CANCEL, "--quiet", "--report", str(out),
                   "--no-peers"])
    assert rc == cli.EXIT_OK  # the two-pass draft passes the case draft 1 fails
    doc = load(out / "results.json")
    assert [c["id"] for c in doc["cases"]] == [LN_CANCEL] and doc["verdict"] == "conformant"
    html = (out / "report.html").read_text()
    assert 'data-verdict="conformant"' in html and "disabled (--no-peers)" in html
    assert not (out / "peers.json").exists()
    assert "CONFORMANT" in (out / "report.md").read_text().splitlines()[0]
    assert str(out / "report.html") in capsys.readouterr().out
