"""Thread pools of the worker processes: sized to the CPUs divided by the workers, never the user's choice.

A process pool whose workers each start thread pools sized to the whole machine runs W times as many
threads as there are cores; sizing each worker's pools to cores // workers is common practice for
process pools of numerical code (the OpenMP, OpenBLAS and MKL documentation each describe their
thread-count variable; the division rule itself has no single source: common practice). These tests
check what a worker actually saw, from inside the kernel.
"""

from __future__ import annotations

import json
import os

import pytest

from conformance.cases import catalog
from conformance.run import RunOptions, run_check
from conformance.run.pool import THREAD_VARIABLES, worker_threads

import harness_kernels as hk

IDS = tuple(c.id for c in catalog(["layer_norm"], ["float32"], "smoke"))[:2]


def _cpus() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def _reporting_kernel(path):
    """The correct float32 layer norm that appends, per call, the thread variables and torch's thread
    count its process saw to the file ``path`` (one JSON line a call)."""
    def forward(x, weight, bias, *, eps, normalized_shape):
        import sys

        torch = sys.modules.get("torch")
        seen = {v: os.environ.get(v) for v in THREAD_VARIABLES}
        seen["torch"] = torch.get_num_threads() if torch is not None else None
        seen["pid"] = os.getpid()
        with open(path, "a") as f:
            f.write(json.dumps(seen) + "\n")
        return hk.ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)

    return hk._decl("layer norm that reports its threads", forward)


def _seen(path) -> list[dict]:
    return [json.loads(line) for line in path.read_text().splitlines()]


def test_one_worker_keeps_the_libraries_defaults():
    assert worker_threads(1, environ={}) == {}


def test_several_workers_share_the_cpus_and_the_users_settings_stay():
    n = str(max(1, _cpus() // 2))
    assert worker_threads(2, environ={}) == {v: n for v in THREAD_VARIABLES}
    got = worker_threads(2, environ={"OMP_NUM_THREADS": "7", "MKL_NUM_THREADS": "  "})
    assert "OMP_NUM_THREADS" not in got  # set by the user: theirs
    assert got["MKL_NUM_THREADS"] == n  # blank is not a setting
    # more workers than CPUs: one thread each, never zero
    assert set(worker_threads(4 * _cpus(), environ={}).values()) == {"1"}


def test_workers_see_their_share_and_the_run_records_it(tmp_path, monkeypatch):
    torch = pytest.importorskip("torch")  # imported here, so that forked workers inherit a sized pool
    for v in THREAD_VARIABLES:
        monkeypatch.delenv(v, raising=False)
    before = dict(os.environ)
    threads_before = torch.get_num_threads()
    log = tmp_path / "seen.jsonl"
    doc = run_check(_reporting_kernel(log), RunOptions(case_ids=IDS, workers=2), quiet=True)
    assert doc["verdict"] == "conformant", [c["message"] for c in doc["cases"]]
    n = str(max(1, _cpus() // 2))
    seen = _seen(log)
    assert len(seen) == len(IDS) and all(s["pid"] != os.getpid() for s in seen)
    for s in seen:
        assert all(s[v] == n for v in THREAD_VARIABLES), s
        assert s["torch"] == int(n), s  # a forked worker's torch was told the count too
    assert doc["run"]["worker_threads"] == {v: n for v in THREAD_VARIABLES}
    # the run process itself is left as it was
    assert dict(os.environ) == before and torch.get_num_threads() == threads_before


def test_a_users_thread_setting_reaches_the_workers_unchanged(tmp_path, monkeypatch):
    for v in THREAD_VARIABLES:
        monkeypatch.delenv(v, raising=False)
    monkeypatch.setenv("OMP_NUM_THREADS", "3")
    log = tmp_path / "seen.jsonl"
    doc = run_check(_reporting_kernel(log), RunOptions(case_ids=IDS, workers=2), quiet=True)
    assert doc["verdict"] == "conformant"
    assert {s["OMP_NUM_THREADS"] for s in _seen(log)} == {"3"}
    assert doc["run"]["worker_threads"]["OMP_NUM_THREADS"] == "3"
    assert os.environ["OMP_NUM_THREADS"] == "3"


@pytest.mark.parametrize("value", ["many", "0", "-2", "4,2", "1e3"])
def test_a_malformed_user_setting_is_left_alone_and_costs_nothing(tmp_path, monkeypatch, value):
    # Hostile input: thread variables that are not one positive integer (the OpenMP API specification's
    # OMP_NUM_THREADS takes a positive integer or a comma-separated list of them, one per nesting level;
    # from memory, section not cited). It is the user's: passed on
    # unchanged, never handed to torch.set_num_threads, and every case still runs.
    torch = pytest.importorskip("torch")
    for v in THREAD_VARIABLES:
        monkeypatch.delenv(v, raising=False)
    monkeypatch.setenv("OMP_NUM_THREADS", value)
    assert "OMP_NUM_THREADS" not in worker_threads(2)
    log = tmp_path / "seen.jsonl"
    doc = run_check(_reporting_kernel(log), RunOptions(case_ids=IDS, workers=2), quiet=True)
    assert doc["verdict"] == "conformant", [c["message"] for c in doc["cases"]]
    seen = _seen(log)
    assert len(seen) == len(IDS) and {s["OMP_NUM_THREADS"] for s in seen} == {value}
    assert all(isinstance(s["torch"], int) and s["torch"] >= 1 for s in seen)
    assert doc["run"]["worker_threads"]["OMP_NUM_THREADS"] == value
    assert os.environ["OMP_NUM_THREADS"] == value and torch.get_num_threads() >= 1


def test_one_worker_sets_nothing(tmp_path, monkeypatch):
    for v in THREAD_VARIABLES:
        monkeypatch.delenv(v, raising=False)
    log = tmp_path / "seen.jsonl"
    doc = run_check(_reporting_kernel(log), RunOptions(case_ids=IDS, workers=1), quiet=True)
    assert doc["verdict"] == "conformant"
    assert all(s[v] is None for s in _seen(log) for v in THREAD_VARIABLES)
    assert doc["run"]["worker_threads"] == {}


SPAWNED = '''
import json, os
import harness_kernels as hk
from conformance.run.pool import THREAD_VARIABLES

def forward(x, weight, bias, *, eps, normalized_shape):
    with open(os.environ["THREADS_SEEN_LOG"], "a") as f:
        f.write(json.dumps({v: os.environ.get(v) for v in THREAD_VARIABLES}) + "\\n")
    return hk.ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)

kernel = hk._decl("spawned layer norm that reports its threads", forward)
'''


def test_spawned_workers_get_the_variables_before_they_start(tmp_path, monkeypatch):
    # A spec-loaded kernel runs in spawned workers: the variables must be in their environment from the
    # start, since OpenBLAS sizes its pool when NumPy is first imported (OpenBLAS documentation, from memory).
    for v in THREAD_VARIABLES:
        monkeypatch.delenv(v, raising=False)
    src = tmp_path / "reporting_kernel.py"
    src.write_text(SPAWNED)
    log = tmp_path / "seen.jsonl"
    monkeypatch.setenv("THREADS_SEEN_LOG", str(log))
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join(filter(None, [os.path.dirname(hk.__file__),
                                                                   os.environ.get("PYTHONPATH", "")])))
    from conformance.kernel import load_kernel

    spec = f"{src}:kernel"
    doc = run_check(load_kernel(spec), RunOptions(case_ids=IDS, workers=2), spec=spec, quiet=True)
    assert doc["verdict"] == "conformant", [c["message"] for c in doc["cases"]]
    n = str(max(1, _cpus() // 2))
    assert [s for s in _seen(log) if any(s[v] != n for v in THREAD_VARIABLES)] == []
    assert len(_seen(log)) == len(IDS)
