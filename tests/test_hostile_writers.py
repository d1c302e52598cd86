"""Hostile text from a kernel or a file, through every writer: HTML, Markdown, JUnit XML, the terminal,
plots and file names; and the report folder written as one unit.

Each writer's output is read back by a parser from outside refnorm (tests/writer_checks.py: Python's
html.parser, markdown-it-py as a CommonMark renderer, xml.etree), and must both contain no markup,
link, image or control character that came from the value and still show the value itself
(conformance.text.visible: control characters as \\xNN escapes).
"""

from __future__ import annotations

import copy
import json
import re
import threading
import warnings
from html import unescape
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

import documents_gen as G
import writer_checks as W
from conformance import documents as D
from conformance.gate.cli import MAX_NAME, result_name
from conformance.gate.decide import apply_gate, gate_lines
from conformance.gate.diff import diff_docs
from conformance.gate.junit import junit_tree
from conformance.report import FILES, write_report
from conformance.report.html import render_html
from conformance.report.markdown import MAX_TEXT, render_markdown
from conformance.report.plots import all_plots
from conformance.summary import summary_table, verdict_lines
from conformance.text import visible
from documents_gen import generated

KERNELS = Path(__file__).with_name("gate_kernels.py")

N_PLOTS = 16
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # ISO/IEC 15948:2004 §5.2


@pytest.fixture(scope="module")
def base_doc():
    import importlib.util

    from conformance.run import RunOptions, run_check

    spec = importlib.util.spec_from_file_location("gate_kernels_for_writers", KERNELS)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    doc = run_check(mod.eps_outside, RunOptions(tier="smoke"), spec=f"{KERNELS}:eps_outside", quiet=True)
    return json.loads(json.dumps(doc))


def hostile_doc(base: dict, h: str) -> dict:
    """``base`` with every free text field that a writer shows set to (or around) ``h``."""
    doc = copy.deepcopy(base)
    doc["kernel"]["name"] = h
    doc["kernel"]["notes"] = h
    doc["run"]["spec"] = f"{h}.py:kernel"
    doc["run"]["command"] = f"refnorm check {h}"
    doc["run"]["tier"] = h
    doc["environment"]["processor"] = h
    doc["caution"] = f"caution {h}"
    renamed = {}
    for i, c in enumerate(doc["cases"]):
        new = f"{c['id']}/{h}/{i}"
        renamed[c["id"]] = new
        c["id"] = new
        c["message"] = f"{h}\nsecond line {h}"
        if c["outputs"]:
            c["outputs"][0]["name"] = f"y{h}"
            c["outputs"][0]["bound"]["formula"] = f"formula {h}"
    for r in doc["summary"]:
        r["worst_case"] = renamed.get(r["worst_case"], r["worst_case"])
    doc["cases"][0]["status"] = "skipped"
    doc["cases"][0]["message"] = f"skipped because {h}"
    doc["counts"] = {s: sum(c["status"] == s for c in doc["cases"]) for s in doc["counts"]}
    failed = next(c for c in doc["cases"] if c["status"] == "failed")
    failed["waiver"] = {"waived": True, "expired": [], "by": [
        {"index": 0, "case": "*", "output": None, "kernel": None, "reason": f"reason {h}", "expires": "2999-01-01"}]}
    doc["gate"] = {"verdict": "fail", "reasons": [f"gate reason {h}"], "outcomes": {"waived": 1}}
    return doc


def hostile_peers(doc: dict, h: str) -> dict:
    return {"schema": "refnorm.peers", "schema_version": 1, "op": doc["kernel"]["op"], "seed": doc["run"]["seed"],
            "case_ids": [c["id"] for c in doc["cases"] if c["status"] != "skipped"],
            "libraries": [{"name": f"lib {h}", "status": "unavailable", "reason": f"why {h}",
                           "versions": {"lib": h}},
                          {"name": f"ran {h}", "status": "ran", "not_declared": {h: h}, "params_note": {h: h},
                           "runs": [{"spec": h, "kernel": h, "dtypes": [h], "doc": copy.deepcopy(doc)}]}]}


@pytest.mark.parametrize("h", G.HOSTILE, ids=[f"{i}:{visible(h)[:20]}" for i, h in enumerate(G.HOSTILE)])
def test_a_hostile_string_through_every_writer(base_doc, h, tmp_path):
    doc = hostile_doc(base_doc, h)
    peers = hostile_peers(doc, h)
    # Read back as a file would be (the reader cleans surrogates), and also given directly, as a run
    # in this process hands its document to the writers: both must be safe.
    read = D.loads(json.dumps(doc).encode(), "h.json")
    read_peers = D.loads(json.dumps(peers).encode(), "p.json", D.PEERS)
    for d, p in ((read, read_peers), (doc, peers)):
        flat = visible(d["kernel"]["name"]).replace("\n", " ").replace("\t", " ")
        page = render_html(d, [], p, f"note {h}")
        tags = W.check_html(page)
        text = "".join(tags.text)
        waived = next(c for c in d["cases"] if c.get("waiver"))
        assert visible(d["kernel"]["name"]) in text and visible(d["kernel"]["notes"]) in text
        assert visible(waived["waiver"]["by"][0]["reason"]) in text and visible(waived["id"]) in text
        md = render_markdown(d, p, f"note {h}")
        rendered = W.check_markdown(md)
        shown = " ".join("".join(rendered.text).split())
        want = " ".join(flat.split())
        if len(flat) < MAX_TEXT - 40:
            assert f"— {want}".strip() in shown, (want[:80], shown[:300])  # the heading's kernel name
            assert f"lib {want}".strip() in shown
        root = W.check_junit(junit_tree([d]))
        suite = root.find("testsuite")
        assert suite.get("name") == visible(d["kernel"]["name"])  # issue 7: the suite name was not cleaned
        assert [tc.get("name") for tc in suite.iter("testcase")] == [visible(c["id"]) for c in d["cases"]]
        W.check_terminal([summary_table(d), *verdict_lines(d)])
        W.check_terminal(diff_docs(base_doc, d).lines())
        gated, _ = apply_gate(copy.deepcopy(base_doc), baseline=d, baseline_path=h)
        lines = gate_lines(gated)
        W.check_terminal(lines)
        assert any(visible(d["kernel"]["name"]) in line for line in lines)  # the baseline note names it
    name = result_name(h, set())
    assert re.fullmatch(r"[A-Za-z0-9._-]+", name) and len((name + ".json").encode()) <= 255
    (tmp_path / f"{name}.json").write_text("{}")  # a file system takes it


def test_long_names_stay_distinct_and_bounded():
    taken: set[str] = set()
    a, b = result_name("k" * 300 + "a", taken), result_name("k" * 300 + "b", taken)
    assert a != b and max(len(a), len(b)) <= MAX_NAME
    assert result_name("k" * 300 + "a", taken) == a + "-2"  # the same name twice: numbered
    assert result_name("gate-exact", set()) == "gate-exact"  # short names as before (docs/ci.md)


def test_markdown_escapes_the_issue_examples(base_doc):
    """Issue 7: kernel names, notes, exception texts went into report.md raw."""
    doc = copy.deepcopy(base_doc)
    doc["kernel"]["name"] = '<script>alert(1)</script><img src=x onerror="alert(1)">'
    doc["kernel"]["notes"] = "[docs](javascript:alert(1)) ![](https://tracker.invalid/pixel.png)"
    failed = [c for c in doc["cases"] if c["status"] == "failed"]
    failed[0]["message"] = "</details><b>out of the fold</b> `code` | pipe\n</details>"
    md = render_markdown(doc)
    assert "<script" not in md and "<img" not in md and "](" not in md.replace("\\](", "")
    assert md.count("<details>") == md.count("</details>") == 2
    W.check_markdown(md)
    shown = "".join(W.check_markdown(md).text)
    assert '<script>alert(1)</script><img src=x onerror="alert(1)">' in shown
    assert "</details><b>out of the fold</b> `code` | pipe" in shown


def test_html_shows_control_characters_as_escapes(base_doc):
    doc = copy.deepcopy(base_doc)
    doc["kernel"]["name"] = "k\x00\x1b[2J\u202e"
    page = render_html(doc, [])
    W.check_html(page)
    assert "k\\x00\\x1b[2J\\u202e" in unescape(page)


# ----------------------------------------------------------------------------------------- plots
def _check_plots(doc):
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a report run's output has no matplotlib noise
        plots = all_plots(doc)
    for p in plots:
        assert p.png[:8] == PNG_SIGNATURE
    return plots


def test_plots_of_hostile_names(base_doc):
    """Names go into titles, legends and tick labels: "$...$" would be parsed as mathtext, a lone
    surrogate could not be drawn, a name starting with "_" would leave the legend (issue 13)."""
    doc = copy.deepcopy(base_doc)
    for c, name in zip(doc["cases"], ("$\\frac{1}{0}$", "y\ud800", "_hidden", "\x1b[31m" + "k" * 300)):
        c["case"]["dtype"] = name
        for o in c["outputs"]:
            o["name"] = name
    doc["cases"][0]["outputs"][0]["budget_used"] = 1.7976931348623157e308  # no room above on a log axis
    doc["cases"][1]["outputs"][0]["max_abs"] = 5e-324  # nor below
    plots = _check_plots(doc)
    assert len(plots) >= 3


def test_generated_documents_plots():
    """N_PLOTS documents the schema accepts through the plots (the costly part of a report: the bulk of the
    generated documents is rendered without them, tests/test_documents.py), warnings as errors.
    Measured: 16 in about 6 s of CPU."""
    seen = []

    @generated(N_PLOTS)
    @given(st.data())
    def run(data):
        doc = D.loads(json.dumps(data.draw(G.results_documents())).encode(), "gen.json")
        _check_plots(doc)
        seen.append(1)

    run()
    assert len(seen) == N_PLOTS


# ------------------------------------------------------------------------------ the report folder
def _no_plots(monkeypatch):
    import conformance.report.plots as P

    monkeypatch.setattr(P, "all_plots", lambda doc: [])


def _named(base: dict, name: str) -> dict:
    d = copy.deepcopy(base)
    d["kernel"]["name"] = name
    return d


def _folder_names(out: Path) -> tuple[str, str, str]:
    results = json.loads((out / FILES["results"]).read_text())["kernel"]["name"]
    html = re.search(r"<title>refnorm report: (.*?) — ", (out / FILES["html"]).read_text()).group(1)
    md = re.search(r"^## refnorm: \*\*.*?\*\* — (.*)$", (out / FILES["markdown"]).read_text(), re.M).group(1)
    return results, html, md


def test_a_second_run_waits_for_the_first_to_install_its_files(base_doc, tmp_path, monkeypatch):
    """Issue 7: two `refnorm report` runs into one folder could leave one run's report.html beside the
    other's results.json. Run A is held after installing its first file; run B, started then, must not
    install anything until A is done, and the folder ends with B's files only."""
    import conformance.report as R

    _no_plots(monkeypatch)
    out = tmp_path / "rep"
    real_replace = R.os.replace
    a_installed_one, release_a = threading.Event(), threading.Event()
    replaced: list[tuple[str, str]] = []

    def replace(src, dst):
        who = threading.current_thread().name
        real_replace(src, dst)
        if Path(dst).parent == out:
            replaced.append((who, Path(dst).name))
            if who == "A" and not a_installed_one.is_set():
                a_installed_one.set()
                assert release_a.wait(30)

    monkeypatch.setattr(R.os, "replace", replace)
    a = threading.Thread(target=write_report, args=(_named(base_doc, "run-a"), out), name="A")
    b = threading.Thread(target=write_report, args=(_named(base_doc, "run-b"), out), name="B")
    a.start()
    assert a_installed_one.wait(30)
    b.start()
    b.join(0.5)
    assert b.is_alive() and [w for w, _ in replaced] == ["A"]  # B waits for the folder's lock
    release_a.set()
    a.join(30)
    b.join(30)
    assert [w for w, _ in replaced] == ["A"] * 3 + ["B"] * 3
    assert _folder_names(out) == ("run-b", "run-b", "run-b")
    assert sorted(p.name for p in out.iterdir()) == sorted(["report.html", "report.md", "results.json"])


def test_concurrent_runs_leave_the_files_of_one_run(base_doc, tmp_path, monkeypatch):
    _no_plots(monkeypatch)
    out = tmp_path / "rep"
    for round_ in range(5):
        threads = [threading.Thread(target=write_report, args=(_named(base_doc, f"run-{round_}-{i}"), out))
                   for i in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(60)
        names = _folder_names(out)
        assert len(set(names)) == 1, names
    assert not [p for p in out.iterdir() if p.name.startswith(".")]  # no temporary folder or file left


def test_a_failed_write_leaves_the_folder_as_it_was(base_doc, tmp_path, monkeypatch):
    _no_plots(monkeypatch)
    out = tmp_path / "rep"
    write_report(_named(base_doc, "good"), out)
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    bad = _named(base_doc, "bad")
    bad["run"]["duration_s"] = float("nan")  # the results writer refuses NaN (json allow_nan=False)
    with pytest.raises(ValueError):
        write_report(bad, out)
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_a_peers_file_stays_only_beside_results_it_was_made_for(base_doc, tmp_path, monkeypatch):
    _no_plots(monkeypatch)
    out = tmp_path / "rep"
    peers = {"schema": "refnorm.peers", "schema_version": 1, "op": base_doc["kernel"]["op"],
             "seed": base_doc["run"]["seed"], "case_ids": [c["id"] for c in base_doc["cases"]],
             "libraries": [{"name": "lib", "status": "unavailable", "reason": "absent"}]}
    write_report(base_doc, out, peers=peers)
    write_report(base_doc, out)  # no peers this time, but the stored file is for these very cases
    assert (out / FILES["peers"]).exists()
    other = copy.deepcopy(base_doc)
    other["run"]["seed"] = 7
    write_report(other, out)
    assert not (out / FILES["peers"]).exists()
