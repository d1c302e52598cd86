"""Baselines (`refnorm check --baseline`, `refnorm gate --baseline-dir`) and `refnorm diff`.

The scenario: ``exact`` (tests/gate_kernels.py) computes layer norm in float64 and rounds each output
once, so its y is within half a float32 ULP of the oracle (IEEE 754-2019 round to nearest);
``drift`` is the same kernel with every y moved 2 ULPs up (numpy.nextafter, IEEE 754-2019 nextUp),
still inside the derived bounds but several times the budget: a port that got worse.
The growth rule under test is the documented one (docs/ci.md, "Baselines"):
an output regresses when budget_new > growth * max(budget_old, floor), floor 0.01, growth 2.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from conformance.cli import main
from conformance.results import as_float

KERNELS = Path(__file__).with_name("gate_kernels.py")


def spec(name: str) -> str:
    return f"{KERNELS}:{name}"


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Plain smoke-tier runs of the three kernels, written as results files."""
    d = tmp_path_factory.mktemp("base")
    out = {}
    for k in ("exact", "drift", "eps_outside"):
        p = d / f"{k}.json"
        assert main(["check", spec(k), "--tier", "smoke", "--quiet", "--json", str(p)]) in (0, 1)
        out[k] = p
    return out


def load(p) -> dict:
    return json.loads(Path(p).read_text())


def budgets(doc) -> dict[tuple[str, str], float]:
    return {(c["id"], o["name"]): as_float(o["budget_used"]) for c in doc["cases"] for o in c["outputs"]}


def test_the_drift_stays_within_the_bounds(runs):
    old, new = load(runs["exact"]), load(runs["drift"])
    assert old["verdict"] == new["verdict"] == "conformant"  # no bound is crossed: only a baseline can see it
    for c in new["cases"]:
        y = next(o for o in c["outputs"] if o["name"] == "y")
        assert y["max_ulp"] in (2, 3)  # 2 ULPs of drift on top of at most half an ULP


def test_growth_over_the_baseline_fails_exactly_the_grown_outputs(runs, tmp_path, capsys):
    old, new0 = load(runs["exact"]), load(runs["drift"])
    b_old, b_new = budgets(old), budgets(new0)
    expect = {k for k in b_new if b_new[k] > 2.0 * max(b_old[k], 0.01)}
    assert expect and {o for _, o in expect} == {"y"}  # only y drifted
    out = tmp_path / "new.json"
    rc = main(["check", spec("drift"), "--tier", "smoke", "--quiet", "--json", str(out),
               "--baseline", str(runs["exact"])])
    doc = load(out)
    assert rc == 1 and doc["verdict"] == "not conformant" and doc["gate"]["verdict"] == "fail"
    got = {(r["case"], r["output"]) for r in doc["gate"]["baseline"]["regressions"]}
    assert got == expect
    for c in doc["cases"]:
        grown = [o for o in c["outputs"] if "regression" in o]
        assert (c["status"] == "failed") == bool(grown)
        for o in grown:
            assert o["within_bound"] and not o["passed"]
            assert "grew" in c["message"] and "baseline" in c["message"]
    log = capsys.readouterr().out
    assert "regression" in log


def test_a_larger_factor_and_an_unchanged_port_pass(runs, tmp_path):
    old, new = budgets(load(runs["exact"])), budgets(load(runs["drift"]))
    worst = max(new[k] / max(old[k], 0.01) for k in new)
    assert 2.0 < worst < 10.0  # measured here: about 6
    assert main(["check", spec("drift"), "--tier", "smoke", "--quiet", "--baseline", str(runs["exact"]),
                 "--growth", "10"]) == 0
    # the same kernel against its own earlier run: same seed, same data, same budgets (growth exactly 1)
    assert main(["check", spec("exact"), "--tier", "smoke", "--quiet", "--baseline", str(runs["exact"])]) == 0


def test_growth_is_not_checked_on_cases_that_fail_anyway(runs, tmp_path):
    out = tmp_path / "b.json"
    rc = main(["check", spec("eps_outside"), "--tier", "smoke", "--quiet", "--json", str(out),
               "--baseline", str(runs["exact"])])
    doc = load(out)
    assert rc == 1
    failed_plain = {c["id"] for c in load(runs["eps_outside"])["cases"] if c["status"] == "failed"}
    for r in doc["gate"]["baseline"]["regressions"]:
        assert r["case"] not in failed_plain


def test_a_missing_baseline_is_a_usage_error_before_the_run(tmp_path, capsys):
    rc = main(["check", spec("exact"), "--tier", "smoke", "--quiet", "--baseline", str(tmp_path / "none.json")])
    assert rc == 2
    assert "none.json" in capsys.readouterr().err


def test_gate_reads_baselines_by_kernel_name(runs, tmp_path, capsys):
    base = tmp_path / "base"
    base.mkdir()
    shutil.copy(runs["exact"], base / "gate-drift.json")  # results files are named after the kernel
    rc = main(["gate", "--kernel", spec("drift"), "--tier", "smoke", "--quiet", "--baseline-dir", str(base),
               "--json-dir", str(tmp_path / "out")])
    assert rc == 1
    doc = load(tmp_path / "out" / "gate-drift.json")
    assert doc["gate"]["baseline"]["regressions"]
    rc = main(["gate", "--kernel", spec("exact"), "--tier", "smoke", "--quiet", "--baseline-dir", str(base)])
    assert rc == 0 and "no baseline" in capsys.readouterr().out  # no gate-exact.json: a warning only


# ---------------------------------------------------------------- refnorm diff
def test_diff_reports_growth_and_exits_1(runs, capsys):
    assert main(["diff", str(runs["exact"]), str(runs["drift"])]) == 1
    out = capsys.readouterr().out
    grew = [line for line in out.splitlines() if line.startswith("WORSE") and " y: budget used" in line]
    old, new = budgets(load(runs["exact"])), budgets(load(runs["drift"]))
    assert len(grew) == sum(1 for k in new if k[1] == "y" and new[k] > 2 * max(old[k], 0.01))
    # the other way round the same outputs shrank: better, not worse
    assert main(["diff", str(runs["drift"]), str(runs["exact"])]) == 0
    out = capsys.readouterr().out
    assert sum(line.startswith("better") for line in out.splitlines()) == len(grew)


def test_diff_reports_status_changes_and_removed_cases(runs, tmp_path, capsys):
    assert main(["diff", str(runs["exact"]), str(runs["eps_outside"])]) == 1
    out = capsys.readouterr().out
    n_failed = sum(c["status"] == "failed" for c in load(runs["eps_outside"])["cases"])
    assert sum("passed -> failed" in line for line in out.splitlines()) == n_failed
    one = load(runs["exact"])["cases"][0]["id"]
    part = tmp_path / "part.json"
    main(["check", spec("exact"), "--case", one, "--quiet", "--json", str(part)])
    assert main(["diff", str(runs["exact"]), str(part)]) == 1  # coverage lost
    assert "removed" in capsys.readouterr().out
    assert main(["diff", str(part), str(runs["exact"])]) == 0  # coverage gained
    assert "added" in capsys.readouterr().out


def test_diff_of_unreadable_files_is_a_usage_error(tmp_path, capsys):
    bad = tmp_path / "x.json"
    bad.write_text('{"schema": "something else"}')
    assert main(["diff", str(bad), str(bad)]) == 2
    assert "not a refnorm results file" in capsys.readouterr().err
