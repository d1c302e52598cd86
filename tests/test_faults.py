"""Fault injection: each way a kernel or the operating system can break the worker protocol.

Each test asserts the case's status, the command's exit code, the results file's completeness and
that no process of the run survives it. The kernels are in tests/fault_kernels.py. The facts used
are of POSIX and Linux: fork() gives the child a new process id and a copy of every open file
descriptor, close-on-exec descriptors are closed by execve (POSIX.1-2017, fork(), exec());
SIGKILL cannot be caught; a process group is killed with killpg() (POSIX.1-2017, kill());
PR_SET_PDEATHSIG delivers a signal to a child when its parent dies (Linux prctl(2)). Exit
statuses of a Python command killed by a signal are 128 + signal number in a shell (common
practice); refnorm documents 3 for an interrupted run (conformance/cli.py).
"""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from conformance.cases import catalog
from conformance.cli import main
from conformance.gate.worker import KeptWorker
from conformance.results import MESSAGE_LIMIT
from conformance.run import RunOptions, run_check

import fault_kernels as fk

ROOT = Path(__file__).resolve().parents[1]
TESTS = Path(__file__).resolve().parent
KERNELS = TESTS / "fault_kernels.py"
SMOKE = [c for c in catalog(["layer_norm"], ["float32"], "smoke")]
IDS = [c.id for c in SMOKE]
NAN_CASE = next(c for c in SMOKE if c.shape[-1] == 96)  # where fork_return also returns a NaN

pytestmark = pytest.mark.skipif(not hasattr(os, "fork") or not sys.platform.startswith("linux"),
                                reason="these faults and checks are of POSIX processes on Linux (/proc)")


def spec(name: str) -> str:
    return f"{KERNELS}:{name}"


@pytest.fixture
def marks(tmp_path, monkeypatch) -> Path:
    """The folder where the fault kernels record their processes (inherited by workers)."""
    d = tmp_path / "marks"
    d.mkdir()
    monkeypatch.setenv("REFNORM_FAULT_DIR", str(d))
    return d


def _alive(pid: int) -> bool:
    """Whether the process exists and is not a zombie (Linux /proc/PID/stat, field 3)."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat.rsplit(")", 1)[1].split()[0] not in ("Z", "X")


def recorded(d: Path) -> list[int]:
    return [int(p.name.split(".", 1)[1]) for p in d.iterdir() if p.name.startswith(("worker.", "child."))]


def assert_gone(pids, within: float = 3.0) -> None:
    pids = list(pids)
    assert pids, "the kernel recorded no process: the check would be empty"
    deadline = time.monotonic() + within
    while time.monotonic() < deadline and any(_alive(p) for p in pids):
        time.sleep(0.05)
    assert not [p for p in pids if _alive(p)], f"processes of the run survived it: {[p for p in pids if _alive(p)]}"


def check(tmp_path, name: str, *args: str) -> tuple[int, dict]:
    out = tmp_path / "r.json"
    rc = main(["check", spec(name), *args, "--quiet", "--json", str(out)])
    return rc, json.loads(out.read_text())


def exact_coverage(doc: dict) -> bool:
    cov = doc["coverage"]
    return cov["selected"] == len(doc["cases"]) and not (cov["missing"] or cov["duplicated"] or cov["unexpected"])


def env(d: Path) -> dict:
    return dict(os.environ, REFNORM_FAULT_DIR=str(d),
                PYTHONPATH=os.pathsep.join([str(ROOT), str(TESTS)] + [p for p in [os.environ.get("PYTHONPATH")] if p]))


def start_cli(d: Path, *args: str, pre: tuple[str, ...] = ()) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, *pre, "-m", "conformance", *args], cwd=ROOT, env=env(d),
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def wait_for(path: Path, p: subprocess.Popen, within: float = 60.0) -> None:
    deadline = time.monotonic() + within
    while not path.exists():
        assert p.poll() is None, f"the command ended early: {p.communicate()}"
        assert time.monotonic() < deadline, f"{path.name} did not appear"
        time.sleep(0.05)


def own_lines(stderr: str) -> list[str]:
    return [ln for ln in stderr.splitlines() if ln.strip() and not ln.startswith("import time:")]


# ---------------------------------------------------------------- forks
def test_fork_and_return_crashes_the_case_and_is_never_conformant(tmp_path, marks):
    rc, doc = check(tmp_path, "fork_return", "--case", NAN_CASE.id, "--case", IDS[0])
    assert rc == 1 and doc["verdict"] == "not conformant"
    assert doc["complete"] is True and exact_coverage(doc)
    assert [c["status"] for c in doc["cases"]] == ["crashed", "crashed"]
    msg = doc["cases"][0]["message"]
    assert msg.startswith("protocol error: the kernel forked the worker process")
    copies = [int(p) for p in re.findall(r"pid (\d+)", " ".join(c["message"] for c in doc["cases"]))]
    assert_gone(recorded(marks) + copies)


def test_fork_reproducer_is_caught_20_of_20_in_process_and_through_the_kept_worker():
    # The runner's route: the whole smoke tier 20 times (workers forked from this process: cheap).
    verdicts = [run_check(fk.fork_return, RunOptions(case_ids=tuple(IDS)), quiet=True) for _ in range(20)]
    assert [d["verdict"] for d in verdicts] == ["not conformant"] * 20
    assert all(c["status"] == "crashed" for d in verdicts for c in d["cases"])
    assert all(d["complete"] and exact_coverage(d) for d in verdicts)
    # The pytest plugin's route: one kept worker, the NaN case 20 times.
    kw = KeptWorker(fk.fork_return, seed=0)
    try:
        got = [kw.run_one(NAN_CASE) for _ in range(20)]
    finally:
        kw.close()
    assert [r.status for r in got] == ["crashed"] * 20
    assert all(r.id == NAN_CASE.id and r.message.startswith("protocol error") for r in got)


def test_fork_reproducer_through_the_pytest_plugin(tmp_path, marks):
    from test_pytest_plugin import junit_outcomes, run_pytest

    j = tmp_path / "p.xml"
    r = run_pytest(tmp_path / "run", "--refnorm-kernel", spec("fork_return"), "--refnorm-case", NAN_CASE.id,
                   "--refnorm-case", IDS[0], "--junitxml", str(j))
    assert r.returncode == 1, r.stdout + r.stderr
    assert set(junit_outcomes(j).values()) == {"failure"} and len(junit_outcomes(j)) == 2
    assert "crashed: " in r.stdout and "protocol error" in r.stdout
    assert "Traceback" not in r.stdout + r.stderr and "UnpicklingError" not in r.stdout + r.stderr
    assert_gone(recorded(marks))


@pytest.mark.parametrize("name", ["fork_sleep", "spawn_sleep"])
def test_a_kernels_child_processes_do_not_outlive_the_run(tmp_path, marks, name):
    # Through a real pipeline: a child that holds the command's stdout would keep communicate() waiting.
    out = tmp_path / "r.json"
    p = start_cli(marks, "check", spec(name), "--case", IDS[0], "--quiet", "--json", str(out))
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 0, stderr
    doc = json.loads(out.read_text())
    assert doc["verdict"] == "conformant" and doc["complete"] and exact_coverage(doc)
    assert [f for f in marks.iterdir() if f.name.startswith("child.")]
    assert_gone(recorded(marks))


def test_a_child_that_exits_is_no_fault(tmp_path, marks):
    rc, doc = check(tmp_path, "fork_exit", "--case", IDS[0])
    assert rc == 0 and doc["cases"][0]["status"] == "passed" and exact_coverage(doc)
    assert_gone(recorded(marks))


# ---------------------------------------------------------------- forged replies
@pytest.mark.parametrize("name, words", [
    ("second_reply", "a second reply to this case"),
    ("wrong_id", "not for the case sent"),
    ("wrong_token", "which was never sent"),
    ("garbage_reply", "an unreadable reply (UnpicklingError"),
])
def test_a_reply_that_breaks_the_protocol_crashes_its_case(tmp_path, marks, name, words):
    rc, doc = check(tmp_path, name, "--case", IDS[0], "--case", IDS[1])
    assert rc == 1 and doc["verdict"] == "not conformant"
    assert doc["complete"] is True and exact_coverage(doc)
    assert [c["status"] for c in doc["cases"]] == ["crashed", "crashed"]  # each on a fresh worker
    for c in doc["cases"]:
        assert c["message"].startswith("protocol error: ") and words in c["message"], c["message"]
    assert len(list(marks.glob("worker.*"))) == 2  # the second case ran on a fresh worker
    assert_gone(recorded(marks))


def test_results_that_do_not_cover_the_selection_are_never_conformant():
    from conformance.gate.decide import refresh
    from conformance.results import CaseResult, build_document
    from conformance.summary import verdict_lines

    def res(cid):
        return CaseResult(id=cid, case={"op": "layer_norm", "dtype": "float32"}, status="passed",
                          outputs=[{"name": "y", "passed": True, "budget_used": 0.1, "max_abs": 0.0,
                                    "max_rel": 0.0, "max_ulp": 0}])

    doc = build_document({"name": "k", "op": "layer_norm"}, {"tier": "smoke", "seed": 0},
                         [res("a"), res("a"), res("z")], True, env={}, selected=["a", "b"])
    assert doc["complete"] is False and doc["verdict"] == "incomplete"
    assert doc["coverage"] == {"selected": 2, "missing": ["b"], "duplicated": ["a"], "unexpected": ["z"]}
    text = "\n".join(verdict_lines(doc))
    assert "no result for 1 selected case(s): b" in text and "more than one result for a" in text
    assert refresh(doc)["verdict"] == "incomplete"  # the gate's recomputation keeps it
    whole = build_document({"name": "k", "op": "layer_norm"}, {}, [res("a"), res("b")], True, env={},
                           selected=["a", "b"])
    assert whole["verdict"] == "conformant" and whole["complete"] is True


# ---------------------------------------------------------------- signals
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP, signal.SIGINT])
def test_a_signal_mid_run_exits_3_with_partial_results_and_no_process_left(tmp_path, marks, sig):
    out = tmp_path / "partial.json"
    p = start_cli(marks, "check", spec("hang_second"), "--tier", "smoke", "--json", str(out), "--timeout", "600")
    wait_for(marks / "hanging", p)
    p.send_signal(sig)
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 3, stderr
    assert "Traceback" not in stderr
    doc = json.loads(out.read_text())
    assert doc["complete"] is False and doc["verdict"] == "incomplete"
    assert doc["run"]["interrupted"] == sig.name
    assert [c["status"] for c in doc["cases"]] == ["passed"]
    assert doc["coverage"]["missing"] == IDS[1:]
    assert f"interrupted by {sig.name}" in stdout
    assert_gone(recorded(marks))


def test_sigterm_stops_the_whole_gate(tmp_path, marks):
    jd, junit = tmp_path / "json", tmp_path / "gate.xml"
    p = start_cli(marks, "gate", "--kernel", spec("hang_second"), "--kernel", f"{TESTS / 'harness_kernels.py'}:"
                  "good_layer_norm", "--tier", "smoke", "--timeout", "600", "--json-dir", str(jd),
                  "--junit", str(junit))
    wait_for(marks / "hanging", p)
    p.send_signal(signal.SIGTERM)
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 3, stdout + stderr
    files = sorted(jd.glob("*.json"))
    assert len(files) == 1  # the second kernel never ran
    doc = json.loads(files[0].read_text())
    assert doc["complete"] is False and doc["run"]["interrupted"] == "SIGTERM"
    assert doc["gate"]["verdict"] == "fail"
    assert junit.exists() and "(interrupted by SIGTERM; 1 kernel(s) not run)" in stdout
    assert_gone(recorded(marks))


def test_sigint_during_imports_exits_3_with_one_line(tmp_path, marks):
    # -X importtime reports each module as it finishes: a numpy submodule done means numpy itself is
    # still importing, before any of the command's own code has run.
    p = start_cli(marks, "check", f"{TESTS / 'harness_kernels.py'}:good_layer_norm", "--tier", "smoke",
                  pre=("-X", "importtime"))
    for line in p.stderr:
        if "numpy." in line:
            break
    p.send_signal(signal.SIGINT)
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 3, stderr
    assert own_lines(stderr) == ["refnorm: interrupted by SIGINT"]


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_a_signal_while_the_kernel_loads_exits_3_with_one_line(tmp_path, marks, sig):
    p = start_cli(marks, "check", spec("slow_loading"), "--tier", "smoke")
    wait_for(marks / "loading", p)
    p.send_signal(sig)
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 3, stderr
    assert own_lines(stderr) == [f"refnorm: interrupted by {sig.name}"]


def test_kill_9_of_the_run_takes_its_workers_and_their_children(tmp_path, marks):
    p = start_cli(marks, "check", spec("hang_second"), "--tier", "smoke", "--timeout", "600")
    wait_for(marks / "hanging", p)
    pids = recorded(marks)
    assert len(pids) >= 2 and all(_alive(x) for x in pids)
    p.kill()  # SIGKILL: the run can do nothing about it
    p.communicate(timeout=60)
    assert_gone(pids, within=2.0)


def test_ctrl_c_while_the_libraries_run_stops_the_report_with_exit_3(tmp_path, marks):
    # Two stand-in reference libraries: the first hangs on its case, the second must then not run.
    code = ("import sys; import conformance.report.peers as P; "
            "P.LIBRARIES = (P.Library('first', 'fault_kernels', (), spawn=True), "
            "P.Library('second', 'fault_kernels', (), spawn=True)); "
            "from conformance.__main__ import entry; sys.argv[0] = 'refnorm'; sys.exit(entry())")
    rep = tmp_path / "rep"
    p = subprocess.Popen([sys.executable, "-c", code, "check", f"{TESTS / 'harness_kernels.py'}:good_layer_norm",
                          "--case", IDS[0], "--report", str(rep), "--timeout", "600"], cwd=ROOT, env=env(marks),
                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    wait_for(marks / "hanging", p)
    p.send_signal(signal.SIGINT)
    stdout, stderr = p.communicate(timeout=60)
    assert p.returncode == 3, stdout + stderr
    peers = json.loads((rep / "peers.json").read_text())
    assert peers["interrupted"] is True
    assert [lib["status"] for lib in peers["libraries"]] == ["incomplete", "skipped"]
    assert "interrupted" in peers["libraries"][1]["reason"]
    assert "interrupted" in (rep / "report.md").read_text()
    assert json.loads((rep / "results.json").read_text())["verdict"] == "conformant"  # the kernel's own run
    assert_gone(recorded(marks))


def test_the_library_installs_no_signal_handler_and_the_command_restores_them(tmp_path):
    import conformance.run  # noqa: F401

    before = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)}
    assert main(["check", f"{TESTS / 'harness_kernels.py'}:good_layer_norm", "--case", IDS[0], "--quiet"]) == 0
    assert {s: signal.getsignal(s) for s in before} == before


# ---------------------------------------------------------------- what a kernel leaves behind
def test_np_seterr_and_rounding_left_behind_do_not_reach_the_harness(tmp_path, marks):
    # One worker runs the four cases: each call finds the state the harness had, not the one the last left.
    rc, doc = check(tmp_path, "seterr_left", "--tier", "smoke", "--workers", "1")
    assert rc == 0, [c["message"] for c in doc["cases"]]
    assert [c["status"] for c in doc["cases"]] == ["passed"] * len(IDS)
    assert doc["complete"] and exact_coverage(doc)
    assert_gone(recorded(marks))


def test_a_huge_exception_message_is_stored_once_and_capped(tmp_path, capsys):
    out = tmp_path / "r.json"
    rc = main(["check", spec("huge_message"), "--case", IDS[0], "--json", str(out)])
    printed = capsys.readouterr()
    assert rc == 1
    (c,) = json.loads(out.read_text())["cases"]
    assert c["status"] == "error" and len(c["message"]) <= MESSAGE_LIMIT
    assert re.search(r"\[\.\.\. [\d,]+ characters cut \.\.\.\]", c["message"])
    assert c["message"].count("device log follows: x") == 1  # the text once (the traceback shows the source line)
    assert len(printed.out) + len(printed.err) < 20_000


def test_a_nested_list_for_one_declared_output_is_named(tmp_path):
    rc, doc = check(tmp_path, "nested_list", "--case", IDS[0])
    (c,) = doc["cases"]
    assert rc == 1 and c["status"] == "error"
    assert "returned a list for its one declared output y" in c["message"]
