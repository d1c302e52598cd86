"""Every document refnorm reads (results files, baselines, peers files) goes through conformance.documents.

The rule under test (docs/ci.md, exit codes): an unreadable, malformed or hostile document gives exit
status 2 with a message that names the file and the field, never a traceback, and never exit 1 from
`refnorm diff` (which means "something got worse"). What the reader accepts, every writer renders.

References outside the project: RFC 8259 (JSON: §4 object names, §6 numbers, §8.1 UTF-8, §8.2 lone
surrogates), JSON Schema 2020-12 through the jsonschema package (the schema file is checked against
the meta-schema, and every real run's document against the schema), Python's html.parser,
markdown-it-py (CommonMark) and xml.etree for what the writers produce (tests/writer_checks.py).

The generated documents (tests/documents_gen.py, seeded: hypothesis derandomize=True, so the same
documents on every machine) are counted; the times are CPU seconds measured on the 2-core development
machine, most of it hypothesis building the documents (reading one and running every writer on it
takes a few milliseconds):

  ===================================================  =====  ===========
  test                                                 count  CPU time
  ===================================================  =====  ===========
  test_generated_valid_documents_render                  300  ~56 s
  test_generated_hostile_documents_are_refused_or_shown  500  ~62 s
  test_generated_peers_files                             200  ~46 s
  test_generated_documents_on_the_command_line            60  ~5 s
  test_generated_documents_plots (test_hostile_writers)   16  ~6 s
  ===================================================  =====  ===========

1,076 generated documents in all, zero tracebacks. The counts were 500, 500 and 200 until the schema
grew the diagnosis and run-level numerics sections (issue 11): every writer then renders more per
document, and those three tests took 94, 62 and 46 s of wall time in `make test`; the first was
cut to keep `make test` within its 20 minutes (the others keep theirs: with 300 hostile documents one
mutation kind was sometimes never drawn, and the peers test asserts each outcome's share). Times above: scaled from those measurements, not re-measured.
"""

from __future__ import annotations

import copy
import json
import os
import re
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

import documents_gen as G
from documents_gen import generated
import writer_checks as W
from conformance import cli
from conformance import documents as D
from conformance.results import STATUSES
from conformance.run import RunOptions, run_check

KERNELS = Path(__file__).with_name("gate_kernels.py")
jsonschema = pytest.importorskip("jsonschema")

#: Counts of generated documents per test (the module docstring's table).
N_VALID, N_HOSTILE, N_PEERS, N_CLI = 300, 500, 200, 60
MAX_CLI_REPORTS = 4


@pytest.fixture(scope="module")
def real_doc():
    """A real run: the eps-outside layer norm of tests/gate_kernels.py on the smoke tier (three
    failed cases, one passed), so that every section of the writers has something to show."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("gate_kernels_for_documents", KERNELS)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    doc = run_check(mod.eps_outside, RunOptions(tier="smoke"), spec=f"{KERNELS}:eps_outside", quiet=True)
    return json.loads(json.dumps(doc))


@pytest.fixture(scope="module")
def real_file(real_doc, tmp_path_factory):
    p = tmp_path_factory.mktemp("real") / "good.json"
    p.write_text(json.dumps(real_doc))
    return p


# ------------------------------------------------------------------------------- the schema itself
def test_the_schema_is_valid_json_schema_and_accepts_real_runs(real_doc):
    schema = json.loads(D.SCHEMA_PATH.read_text())
    jsonschema.Draft202012Validator.check_schema(schema)  # the 2020-12 meta-schema
    jsonschema.Draft202012Validator(schema).validate(real_doc)
    assert D.check(copy.deepcopy(real_doc), "real") == real_doc


def test_the_inlined_validator_agrees_with_the_schema_file(real_doc):
    """The reader validates an inlined copy of the schema (faster); it must decide as the file does."""
    plain = jsonschema.Draft202012Validator(json.loads(D.SCHEMA_PATH.read_text()))
    fast = D._validator(D.RESULTS)
    bad = copy.deepcopy(real_doc)
    bad["cases"][0]["outputs"][0]["budget_used"] = "0.5"
    bad["cases"][1]["case"]["shape"] = [0, 3]
    for d in (real_doc, bad):
        assert plain.is_valid(d) == fast.is_valid(d)
    assert [list(e.absolute_path) for e in plain.iter_errors(bad)] == \
        [list(e.absolute_path) for e in fast.iter_errors(bad)]


# ------------------------------------------------------------------------ malformed documents, one by one
def _set(path, value):
    def f(d):
        node = d
        for p in path[:-1]:
            node = node[p]
        node[path[-1]] = value
        return d
    return f


def _del(path):
    def f(d):
        node = d
        for p in path[:-1]:
            node = node[p]
        del node[path[-1]]
        return d
    return f


def _text(fn):
    return lambda d: fn(json.dumps(d))


#: (name, change of a good document -> a document or its text, the field the error must name).
#: Issue 7's list of 26 malformed or hostile files and issue 13's crash points, each one.
MALFORMED = [
    ("top-level list", _text(lambda t: "[" + t + "]"), ""),
    ("top-level null", _text(lambda t: "null"), ""),
    ("top-level string", _text(lambda t: '"results"'), ""),
    ("missing verdict", _del(("verdict",)), "verdict"),
    ("cases a string", _set(("cases",), "12 cases"), "cases"),
    ("case without status", _del(("cases", 0, "status")), "cases[0].status"),
    ("string budget", _set(("cases", 0, "outputs", 0, "budget_used"), "0.5"), "cases[0].outputs[0].budget_used"),
    ("NaN literal", _text(lambda t: t.replace('"max_rel": ', '"max_rel": NaN, "x": ', 1)), "summary[0].max_rel"),
    ("Infinity literal", _text(lambda t: t.replace('"seed": 0', '"seed": Infinity', 1)), "run.seed"),
    ("float overflow 1e999", _text(lambda t: t.replace('"eps": 1e-05', '"eps": 1e999', 1)), "cases[0].case.eps"),
    ("arrays nested 10^5 deep", _text(lambda t: t[:-1] + ', "deep": ' + "[" * 100_000 + "]" * 100_000 + "}"), ""),
    ("objects nested 70 deep", _set(("run", "extra"), json.loads('{"a":' * 70 + "1" + "}" * 70)),
     "run.extra" + ".a" * (D.MAX_DEPTH - 2)),
    ("null kernel", _set(("kernel",), None), "kernel"),
    ("null run", _set(("run",), None), "run"),
    ("null summary", _set(("summary",), None), "summary"),
    ("null outputs", _set(("cases", 0, "outputs"), None), "cases[0].outputs"),
    ("integer verdict", _set(("verdict",), 1), "verdict"),
    ("overrides not a pair", _set(("run", "overrides"), {"dx": [1e-3]}), 'run.overrides.dx'),
    ("overrides strings", _set(("run", "overrides"), {"dx": "1e-3,1e-2"}), "run.overrides.dx"),
    ("shape a string", _set(("cases", 0, "case", "shape"), "12x96"), "cases[0].case.shape"),
    ("zero extent", _set(("cases", 0, "case", "shape"), [4, 0]), "cases[0].case.shape[1]"),
    ("norm_ndim a string", _set(("cases", 0, "case", "norm_ndim"), "1"), "cases[0].case.norm_ndim"),
    ("group norm without groups", lambda d: _set(("cases", 0, "case"), {**d["cases"][0]["case"],
                                                                        "op": "group_norm", "groups": 0})(d),
     "cases[0].case.groups"),
    ("batch norm of one axis", lambda d: _set(("cases", 0, "case"), {**d["cases"][0]["case"], "op": "batch_norm",
                                                                     "shape": [8]})(d), "cases[0].case.shape"),
    ("case without op", _del(("cases", 0, "case", "op")), "cases[0].case.op"),  # not the op-dependent rules
    ("unknown status", _set(("cases", 0, "status"), "flaky"), "cases[0].status"),
    ("max_ulp a float", _set(("cases", 0, "outputs", 0, "max_ulp"), 1.5), "cases[0].outputs[0].max_ulp"),
    ("negative budget", _set(("cases", 0, "outputs", 0, "budget_used"), -0.5), "cases[0].outputs[0].budget_used"),
    ("ulp_hist key with mathtext", _set(("cases", 0, "outputs", 0, "ulp_hist"), {"$\\frac$": 3}),
     "cases[0].outputs[0].ulp_hist"),
    ("counts disagree", lambda d: _set(("counts", "passed"), d["counts"]["passed"] + 1)(d), "counts.passed"),
    ("counts missing a status", _del(("counts", "timed_out")), "counts.timed_out"),
    ("duplicate case id", lambda d: _set(("cases", 1, "id"), d["cases"][0]["id"])(d), "cases[1].id"),
    ("conformant but failed", _set(("verdict",), "conformant"), "verdict"),
    ("waiver record without reason", _set(("cases", 0, "waiver"), {"waived": True, "expired": [], "by": [
        {"index": 0, "case": "*", "expires": "2030-01-01"}]}), "cases[0].waiver.by[0].reason"),
    ("conventions value an object", _set(("kernel", "conventions", "saved"), {"mean": 1}),
     "kernel.conventions.saved"),
    ("duplicate key", _text(lambda t: t[:-1] + ', "verdict": "conformant"}'), "verdict"),
    ("another schema", _set(("schema",), "refnorm.peers"), "schema"),
    ("another version", _set(("schema_version",), 2), "schema_version"),
    ("truncated", _text(lambda t: t[: len(t) // 2]), ""),
    ("empty file", _text(lambda t: ""), ""),
    ("not UTF-8", lambda d: json.dumps(d).encode("utf-8").replace(b'"gate-eps-outside"', b'"gate-\xff"', 1), ""),
    ("integer of 5000 digits", _text(lambda t: t.replace('"seed": 0', '"seed": ' + "9" * 5000, 1)), "run.seed"),
]


def _bytes(change, good) -> bytes:
    out = change(copy.deepcopy(good))
    if isinstance(out, bytes):
        return out
    return (out if isinstance(out, str) else json.dumps(out)).encode("utf-8")


@pytest.mark.parametrize("name,change,field", MALFORMED, ids=[m[0] for m in MALFORMED])
def test_a_malformed_document_names_its_file_and_field(real_doc, tmp_path, name, change, field):
    path = tmp_path / "bad.json"
    path.write_bytes(_bytes(change, real_doc))
    with pytest.raises(D.DocumentError) as e:
        D.read(path)
    assert e.value.source == str(path)
    assert e.value.field == field, str(e.value)
    assert str(e.value).startswith(f"{path}: " + (f"{field}: " if field else ""))
    W.check_terminal(str(e.value))


@pytest.mark.parametrize("name,change,field", MALFORMED, ids=[m[0] for m in MALFORMED])
def test_every_command_that_reads_it_exits_2(real_doc, real_file, tmp_path, capsys, name, change, field):
    """`refnorm report`, `refnorm diff` (as OLD and as NEW) and `check --baseline`: exit 2, the file and
    the field named, no traceback (an exception here would fail the test, as it would end the command)."""
    bad = tmp_path / "bad.json"
    bad.write_bytes(_bytes(change, real_doc))
    commands = [["report", str(bad), "--out", str(tmp_path / "out"), "--no-peers", "--quiet"],
                ["diff", str(bad), str(real_file)], ["diff", str(real_file), str(bad)],
                ["check", f"{KERNELS}:exact", "--tier", "smoke", "--quiet", "--baseline", str(bad)]]
    for argv in commands:
        assert cli.main(argv) == cli.EXIT_USAGE, argv
        err = capsys.readouterr().err
        assert str(bad) in err and (f": {field}: " in err if field else True), (argv, err)
        assert "Traceback" not in err
    assert not (tmp_path / "out").exists()  # nothing written for a document that was refused


def test_the_reader_refuses_what_is_not_a_file(tmp_path, capsys, real_file):
    """A directory, an over-long name, a device, a missing file: exit 2 from report and diff alike
    (issue 13: report used to crash where diff gave exit 2)."""
    long_name = tmp_path / ("r" * 300 + ".json")  # NAME_MAX is 255 bytes on Linux file systems
    for what, path in (("is a directory", tmp_path), ("too long", long_name), ("not a regular file", "/dev/null"),
                       ("does not exist", tmp_path / "missing.json")):
        for argv in (["report", str(path), "--out", str(tmp_path / "o"), "--no-peers"],
                     ["diff", str(path), str(real_file)]):
            assert cli.main(argv) == cli.EXIT_USAGE, argv
            err = capsys.readouterr().err
            assert what in err and "Traceback" not in err, err


def test_a_document_over_the_size_limit_is_refused_before_it_is_read(tmp_path, monkeypatch, real_doc):
    p = tmp_path / "big.json"
    p.write_text(json.dumps(real_doc))
    monkeypatch.setattr(D, "MAX_BYTES", 1000)
    with pytest.raises(D.DocumentError, match="bytes"):
        D.read(p)


def test_lone_surrogates_are_replaced_where_documents_are_read(real_doc, tmp_path):
    """RFC 8259 §8.2: "\\ud800" is valid JSON, but no UTF-8 writer can encode it (issue 13: report
    crashed writing the HTML, leaving .report.html.tmp behind, or inside matplotlib)."""
    doc = copy.deepcopy(real_doc)
    doc["kernel"]["name"] = "k\ud800"
    doc["cases"][0]["message"] = "m\udfff"
    doc["cases"][0]["outputs"][0]["name"] = "y\ud83d"  # drawn in a plot's legend
    doc["summary"][0]["output"] = "y\ud83d"
    src = tmp_path / "s.json"
    src.write_text(json.dumps(doc))  # ensure_ascii: the escapes are in the text
    assert "\\ud800" in src.read_text()
    read = D.read(src)
    assert read["kernel"]["name"] == "k\ufffd" and read["cases"][0]["message"] == "m\ufffd"
    out = tmp_path / "rep"
    assert cli.main(["report", str(src), "--out", str(out), "--no-peers", "--quiet"]) == cli.EXIT_OK
    assert sorted(p.name for p in out.iterdir()) == ["report.html", "report.md", "results.json"]  # no .tmp
    assert "k\ufffd" in (out / "report.html").read_text(encoding="utf-8")


def test_messages_do_not_carry_the_files_control_characters(real_doc, tmp_path):
    doc = copy.deepcopy(real_doc)
    doc["cases"][0]["status"] = "\x1b[2J\x1b[31mpassed"
    p = tmp_path / "c.json"
    p.write_text(json.dumps(doc))
    with pytest.raises(D.DocumentError) as e:
        D.read(p)
    W.check_terminal(str(e.value))
    assert "\\u001b[2J" in str(e.value)  # shown, JSON-escaped, not sent to the terminal


# ------------------------------------------------------------------------------------ baselines
def test_a_baseline_of_another_kernel_tier_or_dtype_set_is_noted(real_doc):
    """Issue 7: such a baseline was compared without a note."""
    from conformance.gate.baseline import baseline_notes

    other = copy.deepcopy(real_doc)
    other["kernel"]["name"] = "another-kernel"
    other["run"]["tier"] = "standard"
    other["run"]["dtypes"] = ["float32", "float16"]
    notes = baseline_notes(real_doc, other)
    assert any("kernel 'another-kernel'" in n for n in notes)
    assert any("tier 'standard'" in n for n in notes)
    assert any("only in the baseline: float16" in n for n in notes)
    assert baseline_notes(real_doc, copy.deepcopy(real_doc)) == []


def test_check_with_a_foreign_baseline_warns_and_stays_json(real_file, tmp_path, capsys, real_doc):
    """A baseline whose max_abs is "nan" (valid) used to put a NaN float into the regression record,
    which the results writer then refused (json allow_nan=False)."""
    base = copy.deepcopy(real_doc)
    base["kernel"]["name"] = "elsewhere"
    for c in base["cases"]:
        for o in c["outputs"]:
            o["budget_used"], o["max_abs"] = 0.0, "nan"
        c["status"] = "passed"
        for o in c["outputs"]:
            o["passed"] = True
    base["counts"] = {s: sum(c["status"] == s for c in base["cases"]) for s in STATUSES}
    base["verdict"] = "conformant"
    p = tmp_path / "base.json"
    p.write_text(json.dumps(base))
    out = tmp_path / "new.json"
    rc = cli.main(["check", f"{KERNELS}:exact", "--tier", "smoke", "--quiet", "--baseline", str(p),
                   "--json", str(out)])
    log = capsys.readouterr().out
    assert rc == cli.EXIT_FAIL  # exact grows over a zero-budget baseline
    assert "warning: baseline: the baseline is of kernel 'elsewhere'" in log
    doc = D.read(out)
    regs = doc["gate"]["baseline"]["regressions"]
    assert regs and all(r["baseline_max_abs"] == "nan" for r in regs)


# ------------------------------------------------------------------------------------ peers files
def test_a_truncated_or_foreign_peers_file_is_a_note(real_doc, tmp_path):
    """Issue 7: a truncated peers.json crashed `refnorm report`; now it is skipped with a note, as a
    mismatched one was."""
    from conformance.report.peers import load_peers

    good = {"schema": "refnorm.peers", "schema_version": 1, "op": real_doc["kernel"]["op"],
            "seed": real_doc["run"]["seed"], "case_ids": [c["id"] for c in real_doc["cases"]],
            "libraries": [{"name": "lib", "status": "unavailable", "reason": "not installed"}]}
    p = tmp_path / "peers.json"
    p.write_text(json.dumps(good))
    assert load_peers(p, real_doc) == (good, "")
    for text, why in ((json.dumps(good)[:40], "is not JSON"), ('{"schema": "refnorm.results"}', "not a refnorm peers"),
                      (json.dumps({**good, "libraries": [{"name": 3, "status": "ran"}]}), "libraries[0].name"),
                      (json.dumps({**good, "seed": 99}), "another seed")):
        p.write_text(text)
        found, note = load_peers(p, real_doc)
        assert found is None and why in note and "Traceback" not in note, note


def test_report_with_a_truncated_peers_file_renders(real_file, tmp_path, capsys, monkeypatch):
    import conformance.report.peers as P

    out = tmp_path / "rep"
    out.mkdir()
    (out / "peers.json").write_text('{"schema": "refnorm.peers", "schema_version": 1, "op"')
    ran = []
    monkeypatch.setattr(P, "run_peers", lambda doc, **kw: ran.append(1) or None)  # not the libraries here
    assert cli.main(["report", str(real_file), "--out", str(out), "--quiet"]) == cli.EXIT_OK
    html = (out / "report.html").read_text()
    assert ran and "peers.json: is not JSON" in html
    assert not (out / "peers.json").exists()  # not left beside results it does not belong to


# ------------------------------------------------------------------------------ generated documents
def _render_all(doc, peers, real):
    """Every writer on one document: HTML (plots aside), Markdown, JUnit XML, the terminal table and
    verdict, diff against itself and a real run both ways, a gate with it as the baseline."""
    from conformance.gate.decide import apply_gate, gate_lines
    from conformance.gate.diff import diff_docs
    from conformance.gate.junit import junit_tree
    from conformance.report.html import render_html
    from conformance.report.markdown import render_markdown
    from conformance.summary import summary_table, verdict_lines

    W.check_html(render_html(doc, [], peers, "a note <b>"))
    W.check_markdown(render_markdown(doc, peers, "a note <b>"))
    W.check_junit(junit_tree([doc]))
    W.check_terminal([summary_table(doc), *verdict_lines(doc)])
    for old, new in ((doc, doc), (real, doc), (doc, real)):
        d = diff_docs(old, new)
        W.check_terminal(d.lines())
        assert d.compared == len(set(c["id"] for c in old["cases"]) & set(c["id"] for c in new["cases"]))
    gated, _ = apply_gate(copy.deepcopy(real), baseline=doc, baseline_path="gen.json")
    W.check_terminal(gate_lines(gated))
    json.dumps(gated, allow_nan=False)  # the gated document can still be written


def test_generated_valid_documents_render(real_doc):
    """N_VALID documents the schema accepts, a quarter with a peers file made for them, read from their
    JSON text (surrogate escapes and all) and put through every writer but the plots.
    Measured: 500 documents in about 37 s of CPU."""
    validator = D._validator(D.RESULTS)  # the schema file's decisions (test_the_inlined_validator_agrees)
    seen = []

    @generated(N_VALID)
    @given(st.data())
    def run(data):
        doc = data.draw(G.results_documents())
        assert validator.is_valid(doc)  # the generator makes what the schema accepts
        peers = data.draw(G.peers_documents(doc)) if data.draw(st.integers(0, 3)) == 0 else None
        read = D.loads(json.dumps(doc).encode("utf-8"), "gen.json")
        p = D.loads(json.dumps(peers).encode("utf-8"), "peers.json", D.PEERS) if peers else None
        _render_all(read, p, real_doc)
        seen.append(peers is not None)

    run()
    assert len(seen) == N_VALID and sum(seen) > N_VALID // 8


_RULE_FIELDS = re.compile(r"(counts\.\w+|verdict|cases\[\d+\]\.id)")


def _related(field: str, path: tuple) -> bool:
    """The error names the changed field, one inside it or the object holding it (never no field at
    all), or, for a change the schema allows, a field of the rules below it: counts, verdict, case ids.
    Keys are compared as the reader sees them (lone surrogates replaced)."""
    from conformance.text import clean

    p = D.json_path(clean(k) if isinstance(k, str) else k for k in path)
    if not p:
        return True
    inside = field == p or field.startswith((p + ".", p + "["))
    holder = bool(field) and (p.startswith((field + ".", field + "[")))
    return inside or holder or bool(_RULE_FIELDS.fullmatch(field))


def test_generated_hostile_documents_are_refused_or_shown(real_doc):
    """N_HOSTILE mutations of generated documents (a field deleted or given another type, a string
    made hostile, counts or ids or verdict made inconsistent, the text truncated, NaN/Infinity/1e999,
    5000-digit integers, nesting 65 to 10^5 deep, duplicate keys, bytes that are not UTF-8, a BOM,
    another top level, an empty file, a lone surrogate), the same number of each kind: each is refused
    with the file and the changed field named, or it is valid and every writer renders it. Measured: 510
    (34 of each of 15 kinds) in about 47 s, alone on this 2-core machine."""
    # one generated run per kind: a kind drawn from the data leans on the first kinds (hypothesis draws
    # sampled_from towards its first element), so a rare kind could go untested on some draws
    per_kind = -(-N_HOSTILE // len(G.ALL_KINDS))
    kinds: dict[str, int] = {}
    for kind in G.ALL_KINDS:
        @generated(per_kind)
        @given(st.data())
        def run(data):  # called within its iteration: the closure sees this kind
            doc = data.draw(G.results_documents())
            m = data.draw(G.hostile(doc, kind))
            kinds[m.kind] = kinds.get(m.kind, 0) + 1
            try:
                read = D.loads(m.data, "hostile.json")
            except D.DocumentError as e:
                assert e.source == "hostile.json" and e.problem
                if m.path is not None:
                    assert _related(e.field, m.path), (m.kind, D.json_path(m.path), str(e))
                W.check_terminal(str(e))
                return
            _render_all(read, None, real_doc)

        run()
    assert kinds == {k: per_kind for k in G.ALL_KINDS}, kinds


def test_generated_peers_files(real_doc, tmp_path):
    """N_PEERS peers files, half valid and made for the document, half mutated, read by the report's
    peers lookup: each is used (and the comparison renders) or skipped with a note naming the file.
    Measured: 200 in about 18 s."""
    from conformance.report.markdown import render_markdown
    from conformance.report.peers import load_peers

    outcomes = {"used": 0, "note": 0}
    path = tmp_path / "peers.json"

    @generated(N_PEERS)
    @given(st.data())
    def run(data):
        doc = data.draw(G.results_documents())
        peers = data.draw(G.peers_documents(doc))
        data_bytes = json.dumps(peers).encode("utf-8")
        if data.draw(st.booleans()):
            data_bytes = data.draw(G.hostile(peers)).data
        path.write_bytes(data_bytes)
        found, note = load_peers(path, doc)
        if found is None:
            assert str(path) in note or "other cases" in note, note
            W.check_markdown(render_markdown(doc, None, note))
            outcomes["note"] += 1
        else:
            _render_all(doc, found, real_doc)
            outcomes["used"] += 1

    run()
    assert sum(outcomes.values()) == N_PEERS and min(outcomes.values()) > N_PEERS // 10, outcomes


def test_generated_documents_on_the_command_line(real_file, tmp_path, capsys):
    """N_CLI generated documents, mostly hostile, through the commands themselves: `report`, `diff` both
    ways and `check --baseline`. Exit 2 naming the file for a refused document; for a valid one `diff`
    exits 0 or 1 and, for the first MAX_CLI_REPORTS of them (a report with its plots costs a second),
    `report` writes the folder. Never a traceback. Measured: 60 in about 5 s."""
    results = {"refused": 0, "rendered": 0, "compared": 0}
    bad = tmp_path / "gen.json"

    @generated(N_CLI)
    @given(st.data())
    def run(data):
        doc = data.draw(G.results_documents())
        m = data.draw(G.hostile(doc)) if data.draw(st.integers(0, 9)) else G.Mutation("none", None,
                                                                                         json.dumps(doc).encode())
        bad.write_bytes(m.data)
        try:
            D.read(bad)
            valid = True
        except D.DocumentError:
            valid = False
        if valid:
            if results["rendered"] < MAX_CLI_REPORTS:
                out = tmp_path / f"rep{results['rendered']}"
                assert cli.main(["report", str(bad), "--out", str(out), "--no-peers", "--quiet"]) == cli.EXIT_OK
                W.check_html((out / "report.html").read_text(encoding="utf-8"))
                W.check_markdown((out / "report.md").read_text(encoding="utf-8"))
                results["rendered"] += 1
            else:
                results["compared"] += 1
            for argv in (["diff", str(bad), str(real_file)], ["diff", str(real_file), str(bad)]):
                assert cli.main(argv) in (cli.EXIT_OK, cli.EXIT_FAIL)
                W.check_terminal(capsys.readouterr().out)
        else:
            for argv in (["report", str(bad), "--out", str(tmp_path / "never"), "--no-peers"],
                         ["diff", str(bad), str(real_file)], ["diff", str(real_file), str(bad)],
                         ["check", f"{KERNELS}:exact", "--baseline", str(bad), "--quiet"]):
                assert cli.main(argv) == cli.EXIT_USAGE, argv
                err = capsys.readouterr().err
                assert str(bad) in err and "Traceback" not in err, err
            assert not (tmp_path / "never").exists()
            results["refused"] += 1
        capsys.readouterr()

    run()
    assert sum(results.values()) == N_CLI and results["rendered"] >= 1 and results["refused"] >= N_CLI // 3, results


def test_a_subprocess_run_shows_no_traceback(tmp_path, real_file):
    """The installed entry point behaves as cli.main: exit 2 and one line, for a file of NaN literals."""
    import subprocess
    import sys

    bad = tmp_path / "nan.json"
    bad.write_text(real_file.read_text().replace('"max_rel": ', '"max_rel": NaN, "x": ', 1))
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(Path(__file__).resolve().parents[1])]
                                                       + [p for p in [os.environ.get("PYTHONPATH")] if p]))
    r = subprocess.run([sys.executable, "-m", "conformance", "diff", str(bad), str(real_file)], env=env,
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and "Traceback" not in r.stderr
    assert r.stderr.startswith(f"refnorm: error: OLD: {bad}: summary[0].max_rel: NaN is not a JSON number")
