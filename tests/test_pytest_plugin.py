"""The pytest plugin, run in subprocesses on the kernels of tests/gate_kernels.py.

The reference for every verdict is the command line (`refnorm check`) on the same kernel, tier and
seed: the plugin must fail exactly the cases the command fails, serially and under pytest-xdist.
The seeded bug (eps outside the square root, where layer norm has 1/sqrt(var + eps): Ba, Kiros &
Hinton 2016, eq. 4) must fail cases and the correct float32 kernel none.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET
from importlib import metadata
from pathlib import Path

import pytest

from conformance.cases import catalog
from conformance.cli import main

KERNELS = Path(__file__).with_name("gate_kernels.py")
REPO = Path(__file__).resolve().parents[1]


def spec(name: str) -> str:
    return f"{KERNELS}:{name}"


def run_pytest(cwd: Path, *args: str, autoload: bool = False) -> subprocess.CompletedProcess:
    """pytest in a fresh folder (its own pytest.ini: no project configuration, no test files)."""
    cwd.mkdir(parents=True, exist_ok=True)
    (cwd / "pytest.ini").write_text("[pytest]\n")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO)] + [p for p in [os.environ.get("PYTHONPATH")] if p]))
    env.pop("PYTEST_XDIST_WORKER", None)
    pre = ["-p", "no:cacheprovider"]
    if not autoload:
        env["PYTEST_DISABLE_PLUGIN_AUTOLOAD"] = "1"
        pre += ["-p", "conformance.pytest_plugin"]
    return subprocess.run([sys.executable, "-m", "pytest", *pre, *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)


def junit_outcomes(path: Path) -> dict[str, str]:
    """case id -> passed | failure | error | skipped, from a JUnit XML file."""
    out = {}
    for tc in ET.parse(path).getroot().iter("testcase"):
        kids = [k.tag for k in tc if k.tag in ("failure", "error", "skipped")]
        out[tc.get("name")] = kids[0] if kids else "passed"
    return out


@pytest.fixture(scope="module")
def cli_bug(tmp_path_factory):
    """The command line's verdicts on the seeded bug (smoke tier, seed 0)."""
    p = tmp_path_factory.mktemp("cli") / "bug.json"
    rc = main(["check", spec("eps_outside"), "--tier", "smoke", "--quiet", "--json", str(p)])
    doc = json.loads(p.read_text())
    assert rc == 1
    return {c["id"]: c["status"] for c in doc["cases"]}


@pytest.fixture(scope="module")
def waiver_profile(tmp_path_factory, cli_bug):
    """A profile with an active, an expired and a stale waiver on the seeded bug's cases."""
    failed = sorted(cid for cid, s in cli_bug.items() if s == "failed")
    passed = sorted(cid for cid, s in cli_bug.items() if s == "passed")
    assert len(failed) >= 2 and passed
    d = tmp_path_factory.mktemp("prof")
    p = d / "refnorm.toml"
    p.write_text(
        f"kernels = ['{spec('eps_outside')}']\ntier = 'smoke'\n"
        f"[[waivers]]\ncase = '{failed[0]}'\nreason = 'known, fix under review'\nexpires = 2999-12-31\n"
        f"[[waivers]]\ncase = '{failed[1]}'\nreason = 'lapsed'\nexpires = 2000-01-01\n"
        f"[[waivers]]\ncase = '{passed[0]}'\nreason = 'fixed since'\nexpires = 2999-12-31\n")
    return p, failed, passed


def test_items_are_the_catalog_cases_in_order_with_readable_ids(tmp_path):
    r = run_pytest(tmp_path, "--refnorm-kernel", spec("eps_outside"), "--refnorm-tier", "smoke", "--co", "-q")
    assert r.returncode == 0, r.stdout + r.stderr
    ids = [line for line in r.stdout.splitlines() if line.startswith("gate-eps-outside::")]
    want = [f"gate-eps-outside::layer_norm.float32::{c.id}" for c in catalog(["layer_norm"], ["float32"], "smoke")]
    assert ids == want


def test_the_plugin_fails_exactly_the_cases_the_cli_fails(tmp_path, cli_bug):
    j = tmp_path / "serial.xml"
    r = run_pytest(tmp_path, "--refnorm-kernel", spec("eps_outside"), "--refnorm-tier", "smoke",
                   "--junitxml", str(j))
    assert r.returncode == 1, r.stdout + r.stderr
    got = junit_outcomes(j)
    assert {k for k, v in got.items() if v == "failure"} == {k for k, v in cli_bug.items() if v == "failed"}
    assert {k for k, v in got.items() if v == "passed"} == {k for k, v in cli_bug.items() if v == "passed"}
    out = r.stdout
    for cid, status in cli_bug.items():
        if status == "failed":
            assert f"FAILED gate-eps-outside::layer_norm.float32::{cid}" in out
    # The report is the comparison's message (output, error, bound, budget) and a line to reproduce it,
    # with no traceback of the harness.
    assert "Budget used" in out and "Max absolute difference" in out and "reproduce: refnorm check" in out
    assert "Traceback" not in out and "run_one" not in out and "pytest_plugin.py" not in out


def test_the_correct_kernel_passes_every_item(tmp_path):
    r = run_pytest(tmp_path, "--refnorm-kernel", spec("fp32"), "--refnorm-tier", "smoke")
    n = len(catalog(["layer_norm"], ["float32"], "smoke"))
    assert r.returncode == 0 and f"{n} passed" in r.stdout, r.stdout + r.stderr


def test_cases_the_declaration_excludes_are_skipped_as_the_cli_skips_them(tmp_path):
    p, j = tmp_path / "cli.json", tmp_path / "py.xml"
    assert main(["check", spec("fp32_strict"), "--tier", "smoke", "--quiet", "--json", str(p)]) == 0
    skipped = {c["id"] for c in json.loads(p.read_text())["cases"] if c["status"] == "skipped"}
    assert skipped and all("/w=none/" in cid or "/b=none/" in cid for cid in skipped)
    r = run_pytest(tmp_path / "run", "--refnorm-kernel", spec("fp32_strict"), "--refnorm-tier", "smoke",
                   "--junitxml", str(j))
    assert r.returncode == 0, r.stdout + r.stderr
    assert {k for k, v in junit_outcomes(j).items() if v == "skipped"} == skipped


def test_xdist_gives_the_same_verdicts_as_a_serial_run_and_as_the_gate(tmp_path, waiver_profile):
    prof, failed, passed = waiver_profile
    serial, par, gate = tmp_path / "s.xml", tmp_path / "p.xml", tmp_path / "g.xml"
    r1 = run_pytest(tmp_path / "a", "--refnorm-profile", str(prof), "--junitxml", str(serial))
    r2 = run_pytest(tmp_path / "b", "-p", "xdist", "-n", "2", "--refnorm-profile", str(prof), "--junitxml", str(par))
    assert r2.returncode == r1.returncode == 1, r2.stdout + r2.stderr
    assert "2 workers" in r2.stdout or "gw1" in r2.stdout  # it really ran under xdist
    assert junit_outcomes(serial) == junit_outcomes(par)
    assert main(["gate", "--profile", str(prof), "--quiet", "--junit", str(gate)]) == 1
    assert junit_outcomes(serial) == junit_outcomes(gate)
    got = junit_outcomes(par)
    assert got[failed[0]] == "skipped"  # waived: an expected failure (xfail)
    assert got[failed[1]] == "failure"  # its waiver expired
    assert all(got[cid] == "failure" for cid in failed[2:])
    for r in (r1, r2):
        assert "stale waiver #2" in r.stdout and "expired waiver #1" in r.stdout
    assert "expired on 2000-01-01" in r2.stdout


def test_a_crash_costs_one_item(tmp_path):
    r = run_pytest(tmp_path, "--refnorm-kernel", spec("crash"), "--refnorm-tier", "smoke")
    n = len(catalog(["layer_norm"], ["float32"], "smoke"))
    assert r.returncode == 1
    assert f"1 failed, {n - 1} passed" in r.stdout, r.stdout + r.stderr
    assert "crashed: layer_norm/float32/trailing/2x3x16/" in r.stdout
    assert "SIGABRT" in r.stdout  # POSIX.1-2017 abort(): the process ends with SIGABRT


def test_a_hang_costs_one_item(tmp_path):
    # The hanging case is the second of the smoke tier, so the worker's start-up (charged to the first
    # case sent to it) is not what times out; 8 s is far more than the other cases take.
    r = run_pytest(tmp_path, "--refnorm-kernel", spec("hang"), "--refnorm-tier", "smoke", "--refnorm-timeout", "8")
    n = len(catalog(["layer_norm"], ["float32"], "smoke"))
    assert r.returncode == 1
    assert f"1 failed, {n - 1} passed" in r.stdout, r.stdout + r.stderr
    assert "timed_out: layer_norm/float32/trailing/2x3x16/" in r.stdout and "timeout of 8 s" in r.stdout


def test_the_entry_point_loads_the_plugin(tmp_path):
    eps = [e for e in metadata.entry_points(group="pytest11") if e.name == "refnorm"]
    if not eps:
        pytest.skip("refnorm is not installed with its entry points (pip install -e .)")
    assert eps[0].value == "conformance.pytest_plugin"
    one = catalog(["layer_norm"], ["float32"], "smoke")[0].id
    r = run_pytest(tmp_path, "--refnorm-kernel", spec("fp32"), "--refnorm-case", one, "-m", "refnorm",
                   autoload=True)
    assert r.returncode == 0 and "1 passed" in r.stdout, r.stdout + r.stderr


def test_without_options_the_plugin_does_nothing(tmp_path):
    (tmp_path / "test_port.py").write_text("def test_port_math():\n    assert 1 + 1 == 2\n")
    r = run_pytest(tmp_path, "-q")
    assert r.returncode == 0 and "1 passed" in r.stdout and "refnorm" not in r.stdout, r.stdout + r.stderr


def test_a_bad_kernel_spec_is_a_usage_error(tmp_path):
    r = run_pytest(tmp_path, "--refnorm-kernel", f"{KERNELS}:no_such_kernel")
    assert r.returncode == 4  # pytest's ExitCode.USAGE_ERROR
    assert "no_such_kernel" in r.stderr


def test_numbers_outside_their_limits_are_usage_errors(tmp_path):
    # The plugin shares the limits of `refnorm check` and the profile (conformance.options): before,
    # --refnorm-timeout nan was accepted and disabled the timeout of every item.
    r = run_pytest(tmp_path, "--refnorm-kernel", spec("fp32"), "--refnorm-timeout", "nan")
    assert r.returncode == 4  # pytest's ExitCode.USAGE_ERROR
    assert "--refnorm-timeout" in r.stderr and "86400" in r.stderr, r.stderr
