"""`refnorm check` / `refnorm cases`: exit codes, messages, the results file and its schema.

The results document is validated against docs/results-schema.json with the jsonschema package
(JSON Schema draft 2020-12).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conformance.cli import main
from conformance.cases import catalog

ROOT = Path(__file__).resolve().parents[1]
KERNELS = Path(__file__).resolve().parent / "harness_kernels.py"
IDS = [c.id for c in catalog(["layer_norm"], ["float32"], "smoke")]


def _check(*args: str) -> int:
    return main(["check", *args])


def test_conformant_kernel_exits_0_and_writes_valid_json(tmp_path, capsys):
    jsonschema = pytest.importorskip("jsonschema")
    out = tmp_path / "r.json"
    rc = _check(f"{KERNELS}:good_layer_norm", "--tier", "smoke", "--json", str(out), "--quiet")
    text = capsys.readouterr().out
    assert rc == 0
    assert "verdict: CONFORMANT" in text and "not a proof of correctness" in text
    doc = json.loads(out.read_text())
    schema = json.loads((ROOT / "docs" / "results-schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(doc)
    assert doc["verdict"] == "conformant" and doc["run"]["spec"].endswith(":good_layer_norm")
    assert not list(tmp_path.glob(".r.json.*"))  # the temporary file of the atomic write is gone


def test_failing_kernel_exits_1(capsys):
    rc = _check(f"{KERNELS}:segfault_layer_norm", "--case", IDS[0], "--quiet")
    assert rc == 1
    assert "NOT CONFORMANT" in capsys.readouterr().out


@pytest.mark.parametrize("args, words", [
    (["nonexistent_module_xyz:k"], "importing module 'nonexistent_module_xyz' failed"),
    ([f"{KERNELS}:no_such_attr"], "has no attribute 'no_such_attr'"),
    (["no_colon_here"], "expected module:attr or path/to/file.py:attr"),
    ([f"{KERNELS}:good_layer_norm", "--op", "batch_norm"], "declares op layer_norm"),
    ([f"{KERNELS}:good_layer_norm", "--dtype", "bfloat16"], "declares only float32"),
    ([f"{KERNELS}:good_layer_norm", "--case", "layer_norm/float32/nope"], "no case with id"),
    ([f"{KERNELS}:good_layer_norm", "--workers", "0"], "argument --workers: expected worker processes"),
])
def test_bad_usage_exits_2_with_a_message_naming_the_problem(args, words, capsys):
    assert _check(*args) == 2
    assert words in capsys.readouterr().err


def test_argparse_errors_exit_2(capsys):
    assert _check("--tier", "nope") == 2


def test_cases_lists_ids(capsys):
    assert main(["cases", "--op", "layer_norm", "--tier", "smoke"]) == 0
    assert capsys.readouterr().out.split() == IDS


def test_interrupt_exits_3_and_writes_a_partial_file(tmp_path):
    out = tmp_path / "partial.json"
    import tempfile

    flag = Path(tempfile.gettempdir()) / "refnorm-hang-started"
    flag.unlink(missing_ok=True)
    env = dict(os.environ, PYTHONPATH=f"{ROOT}{os.pathsep}{KERNELS.parent}")
    # The first case passes, the second hangs: interrupting then leaves one finished case.
    p = subprocess.Popen([sys.executable, "-m", "conformance", "check", f"{KERNELS}:hang_after_first",
                          "--tier", "smoke", "--json", str(out), "--timeout", "600"],
                         cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and not flag.exists():
        time.sleep(0.2)
    time.sleep(0.5)
    p.send_signal(signal.SIGINT)
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 3, stderr
    doc = json.loads(out.read_text())
    assert doc["complete"] is False and doc["verdict"] == "incomplete"
    assert [c["status"] for c in doc["cases"]] == ["passed"]


# ---------------------------------------------------------------- hostile options and destinations
# A destination that cannot be written, or a number outside its limits, is a usage error (exit 2)
# that names the option and the path, before the kernel loads and before the first case: nothing
# is printed on stdout (no summary: no case ran). The limits are those of docs/ci.md.
def _no_run(capsys) -> str:
    out, err = capsys.readouterr()
    assert out == "", out  # no summary table: the run did not start
    assert "Traceback" not in err
    return err


#: what -> (options, given the folder with plain.txt (a file) and a_dir/ (a folder); words of the message)
_DESTINATIONS = {
    "a missing folder under a file": (lambda t: ["--json", str(t / "plain.txt" / "sub" / "r.json")],
                                      ["--json", "not a folder"]),
    "a folder given for a file": (lambda t: ["--json", str(t / "a_dir")], ["--json", "is a folder"]),
    "a folder given for --junit": (lambda t: ["--junit", str(t / "a_dir")], ["--junit", "is a folder"]),
    "an existing file given for --report": (lambda t: ["--report", str(t / "plain.txt")], ["--report", "is a file"]),
    "a folder under a file for --report": (lambda t: ["--report", str(t / "plain.txt" / "rep")],
                                           ["--report", "not a folder"]),
    # NAME_MAX, 255 bytes per name on Linux's common file systems
    "a name over 255 bytes": (lambda t: ["--json", str(t / ("r" * 300 + ".json"))],
                              ["--json", "over the limit of 255"]),
    "an empty --json": (lambda t: ["--json", ""], ["--json", "empty"]),
    # a FIFO of our own stands for a device (never a real one: a regression would replace it)
    "a pipe given for a file": (lambda t: ["--json", str(t / "a_fifo")], ["--json", "device, pipe or socket"]),
}


@pytest.mark.parametrize("what", list(_DESTINATIONS))
def test_unwritable_destinations_exit_2_before_the_run(what, tmp_path, capsys):
    (tmp_path / "plain.txt").write_text("x")
    (tmp_path / "a_dir").mkdir()
    if not hasattr(os, "mkfifo") and "pipe" in what:
        pytest.skip("no FIFOs on this platform")
    if hasattr(os, "mkfifo"):
        os.mkfifo(tmp_path / "a_fifo")
    make, words = _DESTINATIONS[what]
    assert _check(f"{KERNELS}:good_layer_norm", "--tier", "smoke", "--quiet", *make(tmp_path)) == 2
    err = _no_run(capsys)
    for w in words:
        assert w in err, err


@pytest.mark.skipif(not Path("/proc/self").is_dir(), reason="needs Linux's /proc (refuses new files, even to root)")
@pytest.mark.parametrize("target, words", [("/proc", "is a folder"),
                                           ("/proc/refnorm-junit.xml", "cannot create files")])
def test_junit_into_proc_is_refused_and_leaves_no_temporary_file(target, words, capsys):
    # The old writer put its temporary file beside the target's name: '--junit /proc' left '/.proc.tmp'.
    before = set(os.listdir("/"))
    assert _check(f"{KERNELS}:good_layer_norm", "--tier", "smoke", "--quiet", "--junit", target) == 2
    err = _no_run(capsys)
    assert "--junit" in err and words in err
    assert set(os.listdir("/")) == before


def test_destinations_are_checked_before_the_kernel_loads(capsys):
    # A spec that cannot be imported and a bad destination: the destination is reported (prepare hooks
    # run before check loads the kernel).
    assert _check("nonexistent_module_xyz:k", "--json", "") == 2
    err = _no_run(capsys)
    assert "--json" in err and "nonexistent_module_xyz" not in err


def test_missing_folders_of_a_destination_are_created(tmp_path, capsys):
    out = tmp_path / "a" / "b" / "r.json"
    j = tmp_path / "c" / "j.xml"
    assert _check(f"{KERNELS}:good_layer_norm", "--case", IDS[0], "--quiet", "--json", str(out),
                  "--junit", str(j)) == 0
    assert json.loads(out.read_text())["complete"] is True
    import xml.etree.ElementTree as ET

    assert ET.parse(j).getroot().get("tests") == "1"
    assert not [p for p in tmp_path.rglob(".*") if p.is_file()]  # no temporary or probe file left


@pytest.mark.parametrize("option, value", [
    ("--timeout", "nan"), ("--timeout", "inf"), ("--timeout", "-inf"), ("--timeout", "0"), ("--timeout", "-1"),
    ("--timeout", "1e7"), ("--timeout", "1e400"), ("--timeout", "86400.5"),
    ("--seed", "-1"), ("--seed", str(2 ** 63)), ("--seed", "1.5"), ("--seed", "9" * 5000),
    ("--workers", "0"), ("--workers", "257"), ("--workers", "2.5"),
    ("--growth", "1"), ("--growth", "nan"), ("--growth", "inf"), ("--growth", "1e7"),
    ("--growth-floor", "-0.1"), ("--growth-floor", "1"), ("--growth-floor", "nan"),
    ("--tolerance", "y=inf,0"), ("--tolerance", "y=nan,0"), ("--tolerance", "y=0,inf"), ("--tolerance", "y=-1,0"),
    ("--tolerance", "bogus=1,1"), ("--tolerance", "y=1"), ("--tolerance", "y=1,2,3"), ("--tolerance", "y=1e101,0"),
])
def test_numbers_outside_their_limits_are_usage_errors(option, value, capsys):
    # Before: --timeout nan disabled timeouts, --timeout inf and 1e7 raised OverflowError in the worker pool,
    # --tolerance y=inf,0 made every case a harness error, bogus=1,1 was ignored, --seed -1 was accepted.
    assert _check(f"{KERNELS}:good_layer_norm", "--tier", "smoke", "--quiet", option, value) == 2
    err = _no_run(capsys)
    assert f"argument {option}" in err and "expected" in err, err


@pytest.mark.parametrize("option, value", [("--timeout", "nan"), ("--timeout", "1e7"), ("--seed", "-1"),
                                           ("--workers", "0"), ("--growth", "inf"), ("--growth-floor", "2")])
def test_gate_applies_the_same_limits(option, value, capsys):
    assert main(["gate", "--kernel", f"{KERNELS}:good_layer_norm", "--quiet", option, value]) == 2
    err = _no_run(capsys)
    assert f"argument {option}" in err and "expected" in err, err


def test_the_limits_are_in_the_message(capsys):
    _check(f"{KERNELS}:good_layer_norm", "--timeout", "1e7")
    assert "86400" in capsys.readouterr().err
    _check(f"{KERNELS}:good_layer_norm", "--seed", "-1")
    assert "2**63" in capsys.readouterr().err


def test_the_largest_accepted_values_run(tmp_path, capsys):
    # The upper limits themselves are accepted and run (one day, 2**63 - 1): the limit is not off by one.
    out = tmp_path / "r.json"
    assert _check(f"{KERNELS}:good_layer_norm", "--case", IDS[0], "--quiet", "--timeout", "86400",
                  "--seed", str(2 ** 63 - 1), "--json", str(out)) == 0
    doc = json.loads(out.read_text())
    assert doc["run"]["seed"] == 2 ** 63 - 1 and doc["run"]["timeout_s"] == 86400.0


def test_a_case_named_twice_runs_once(tmp_path, capsys):
    out = tmp_path / "r.json"
    assert _check(f"{KERNELS}:good_layer_norm", "--case", IDS[0], "--case", IDS[0], "--dtype", "float32",
                  "float32", "--quiet", "--json", str(out)) == 0
    doc = json.loads(out.read_text())
    assert [c["id"] for c in doc["cases"]] == [IDS[0]] and doc["counts"]["passed"] == 1


def test_report_without_matplotlib_is_a_usage_error_before_the_run(tmp_path, monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # None in sys.modules makes the import fail
    assert _check(f"{KERNELS}:good_layer_norm", "--tier", "smoke", "--quiet", "--report", str(tmp_path / "rep")) == 2
    err = _no_run(capsys)
    assert "matplotlib" in err and "refnorm[report]" in err


# ---------------------------------------------------------------- artefacts before the summary
class _ClosedPipe:
    """A stdout whose reader has gone: every write raises BrokenPipeError, as a closed pipe does."""

    def write(self, text):
        raise BrokenPipeError(32, "Broken pipe")

    def flush(self):
        raise BrokenPipeError(32, "Broken pipe")


@pytest.mark.parametrize("kernel, code", [("good_layer_norm", 0), ("segfault_layer_norm", 1)])
def test_a_closed_stdout_changes_neither_the_exit_code_nor_the_files(kernel, code, tmp_path, monkeypatch):
    monkeypatch.setattr(sys, "stdout", _ClosedPipe())
    out, j = tmp_path / "r.json", tmp_path / "j.xml"
    assert _check(f"{KERNELS}:{kernel}", "--case", IDS[0], "--quiet", "--json", str(out), "--junit", str(j)) == code
    doc = json.loads(out.read_text())
    assert doc["complete"] is True and len(doc["cases"]) == 1
    assert j.stat().st_size > 0


def test_a_closed_pipe_in_a_real_process_keeps_exit_code_and_files(tmp_path):
    # `refnorm check ... --json r.json | head -1`: the reader is gone before the summary is printed.
    # Before: BrokenPipeError, exit 1 and no r.json (the summary was printed before the file was written).
    out, j = tmp_path / "r.json", tmp_path / "j.xml"
    r, w = os.pipe()
    os.close(r)
    env = dict(os.environ, PYTHONPATH=f"{ROOT}{os.pathsep}{KERNELS.parent}")
    try:
        p = subprocess.run([sys.executable, "-m", "conformance", "check", f"{KERNELS}:good_layer_norm", "--tier",
                            "smoke", "--quiet", "--json", str(out), "--junit", str(j)],
                           cwd=ROOT, env=env, stdout=w, stderr=subprocess.PIPE, text=True, timeout=120)
    finally:
        os.close(w)
    assert p.returncode == 0, p.stderr
    assert "Traceback" not in p.stderr and "BrokenPipe" not in p.stderr and "Exception ignored" not in p.stderr
    doc = json.loads(out.read_text())
    assert doc["complete"] is True and doc["counts"]["passed"] == len(IDS)
    assert j.stat().st_size > 0


def test_an_artefact_that_fails_after_the_run_is_exit_2_and_the_others_are_written(tmp_path, monkeypatch, capsys):
    # The destination was writable before the run and is not after it (a full disk, say): the other
    # artefacts are still written, the summary still printed, and the exit code says so.
    import conformance.results as results

    def full(path, doc):
        raise OSError(28, "No space left on device", str(path))

    monkeypatch.setattr(results, "write_json_atomic", full)
    j = tmp_path / "j.xml"
    assert _check(f"{KERNELS}:good_layer_norm", "--case", IDS[0], "--quiet", "--json", str(tmp_path / "r.json"),
                  "--junit", str(j)) == 2
    out, err = capsys.readouterr()
    assert "verdict: CONFORMANT" in out and "junit:" in out
    assert "could not write --json" in err and "No space left" in err
    assert j.stat().st_size > 0
