"""JUnit XML from both routes: `refnorm check/gate --junit` (xml.etree) and `pytest --junitxml` (the plugin).

JUnit XML has no formal standard; the structure checked here is the one CI systems read, as written by
Apache Ant's junit task and by pytest (from memory): a <testsuites> root (or a single <testsuite>),
<testsuite> elements with tests/failures/errors/skipped counts, <testcase> elements with name,
classname and time, and at most one <failure>, <error> or <skipped> child each, <failure> and <error>
carrying a message attribute.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import pytest

from conformance.cli import main
from conformance.gate.junit import junit_tree

KERNELS = Path(__file__).with_name("gate_kernels.py")
REPO = Path(__file__).resolve().parents[1]


def spec(name: str) -> str:
    return f"{KERNELS}:{name}"


def validate_junit(root: ET.Element) -> dict[str, int]:
    """Check the usual JUnit structure; return the totals (tests, failures, errors, skipped)."""
    assert root.tag in ("testsuites", "testsuite")
    suites = [root] if root.tag == "testsuite" else root.findall("testsuite")
    assert suites
    tot = {"tests": 0, "failures": 0, "errors": 0, "skipped": 0}
    for s in suites:
        cases = s.findall("testcase")
        n = {"tests": len(cases), "failures": 0, "errors": 0, "skipped": 0}
        for tc in cases:
            assert tc.get("name") and tc.get("classname")
            assert float(tc.get("time")) >= 0.0
            kids = [k for k in tc if k.tag in ("failure", "error", "skipped")]
            assert len(kids) <= 1
            for k in kids:
                if k.tag in ("failure", "error"):
                    assert k.get("message")
                n[{"failure": "failures", "error": "errors", "skipped": "skipped"}[k.tag]] += 1
        for key, v in n.items():
            assert int(s.get(key)) == v, (key, s.get(key), v)
            tot[key] += v
        assert float(s.get("time")) >= 0.0
    if root.tag == "testsuites":
        for key, v in tot.items():
            if root.get(key) is not None:
                assert int(root.get(key)) == v
    return tot


def outcomes(root: ET.Element) -> dict[str, str]:
    """name -> passed | failure | error | skipped."""
    out = {}
    for tc in root.iter("testcase"):
        kids = [k.tag for k in tc if k.tag in ("failure", "error", "skipped")]
        out[tc.get("name")] = kids[0] if kids else "passed"
    return out


def test_refnorm_check_junit_is_valid_and_matches_the_results(tmp_path):
    for kernel in ("eps_outside", "crash"):
        j, js = tmp_path / f"{kernel}.xml", tmp_path / f"{kernel}.json"
        main(["check", spec(kernel), "--tier", "smoke", "--quiet", "--json", str(js), "--junit", str(j)])
        doc = json.loads(js.read_text())
        root = ET.parse(j).getroot()
        tot = validate_junit(root)
        c = doc["counts"]
        assert tot == {"tests": len(doc["cases"]), "failures": c["failed"],
                       "errors": c["crashed"] + c["timed_out"] + c["error"], "skipped": c["skipped"]}
        (suite,) = root.findall("testsuite")
        assert suite.get("name") == doc["kernel"]["name"]
        for tc, case in zip(suite.findall("testcase"), doc["cases"]):
            assert tc.get("name") == case["id"] and tc.get("classname") == "layer_norm.float32"
            if case["status"] == "failed":
                f = tc.find("failure")
                bad = [o["name"] for o in case["outputs"] if not o["passed"]]
                assert f.get("type") == "failed" and f.get("message").startswith(bad[0] + ":")
                assert "Budget used" in f.text  # the comparison's own message: error, bound, budget
            if case["status"] == "crashed":
                e = tc.find("error")
                assert e.get("type") == "crashed" and "SIGABRT" in e.get("message")  # POSIX abort() raises SIGABRT


def run_pytest(tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    (tmp_path / "pytest.ini").write_text("[pytest]\n")
    env = dict(os.environ, PYTEST_DISABLE_PLUGIN_AUTOLOAD="1",
               PYTHONPATH=os.pathsep.join([str(REPO)] + [p for p in [os.environ.get("PYTHONPATH")] if p]))
    return subprocess.run([sys.executable, "-m", "pytest", "-p", "no:cacheprovider", "-p", "conformance.pytest_plugin",
                           *args], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300)


def test_both_routes_write_valid_junit_with_the_same_outcomes(tmp_path):
    j_cli, j_py = tmp_path / "cli.xml", tmp_path / "py.xml"
    main(["check", spec("eps_outside"), "--tier", "smoke", "--quiet", "--junit", str(j_cli)])
    r = run_pytest(tmp_path, "--refnorm-kernel", spec("eps_outside"), "--refnorm-tier", "smoke",
                   "--junitxml", str(j_py), "-q")
    assert r.returncode == 1, r.stdout + r.stderr
    cli, py = ET.parse(j_cli).getroot(), ET.parse(j_py).getroot()
    t_cli, t_py = validate_junit(cli), validate_junit(py)
    assert t_cli == t_py and t_cli["failures"] > 0
    assert outcomes(cli) == outcomes(py)
    # pytest's classname is the node path: KERNEL.OP.DTYPE (docs/ci.md)
    assert {tc.get("classname") for tc in py.iter("testcase")} == {"gate-eps-outside.layer_norm.float32"}
    for tc in py.iter("testcase"):
        f = tc.find("failure")
        if f is not None:
            assert "Budget used" in f.get("message") and "bound" in f.get("message")


def test_gate_junit_has_a_suite_per_kernel_and_waivers_as_skips(tmp_path):
    doc_path = tmp_path / "bug.json"
    main(["check", spec("eps_outside"), "--tier", "smoke", "--quiet", "--json", str(doc_path)])
    failed = [c["id"] for c in json.loads(doc_path.read_text())["cases"] if c["status"] == "failed"]
    prof = tmp_path / "refnorm.toml"
    prof.write_text(f"kernels = ['{spec('eps_outside')}', '{spec('fp32')}']\ntier = 'smoke'\n"
                    f"[[waivers]]\ncase = '{failed[0]}'\nreason = 'tracked'\nexpires = 2999-12-31\n")
    j = tmp_path / "gate.xml"
    assert main(["gate", "--profile", str(prof), "--quiet", "--junit", str(j)]) == 1
    root = ET.parse(j).getroot()
    tot = validate_junit(root)
    assert [s.get("name") for s in root.findall("testsuite")] == ["gate-eps-outside", "gate-fp32"]
    assert tot["skipped"] == 1 and tot["failures"] == len(failed) - 1
    sk = next(tc for tc in root.iter("testcase") if tc.find("skipped") is not None)
    assert sk.get("name") == failed[0] and sk.find("skipped").get("type") == "waived"


def test_control_characters_in_messages_stay_valid_xml(tmp_path):
    p = tmp_path / "d.json"
    main(["check", spec("fp32"), "--tier", "smoke", "--quiet", "--json", str(p)])
    doc = json.loads(p.read_text())
    # A kernel's exception text may carry terminal colours or NUL bytes, which XML 1.0 forbids
    # (W3C XML 1.0, 5th ed., §2.2 Characters).
    doc["cases"][0].update(status="error", message="raised RuntimeError: \x1b[31mbad\x1b[0m\x00 end")
    out = tmp_path / "x.xml"
    junit_tree([doc]).write(out, encoding="utf-8", xml_declaration=True)
    root = ET.parse(out).getroot()
    validate_junit(root)
    e = next(root.iter("error"))
    assert "\\x1b[31mbad" in e.get("message") and "\\x00" in e.text


@pytest.mark.parametrize("bad", ["no-suites", "count"])
def test_the_validator_rejects_broken_reports(bad):
    # The validator must be able to fail, or the checks above prove nothing.
    root = ET.fromstring('<testsuites><testsuite name="s" tests="1" failures="0" errors="0" skipped="0" time="0">'
                         '<testcase name="a" classname="c" time="0"><failure message="m"/></testcase>'
                         '</testsuite></testsuites>')
    if bad == "no-suites":
        root = ET.fromstring("<testsuites/>")
    with pytest.raises(AssertionError):
        validate_junit(root)
