"""Shards of a run (conformance.run.shards): the cut is a partition, deterministic, balanced and stable.

What is checked against what:
- a partition: every selected case is in exactly one shard (the definition of a shard, common practice
  in CI test splitting);
- determinism: the same cut whatever the order the cases come in and under another PYTHONHASHSEED
  (Python's hash randomization, docs.python.org, "PYTHONHASHSEED", must not enter it), in a fresh
  interpreter;
- balance: the largest shard's expected cost is within 2% of the best any cut can do, max(mean,
  largest case) (Graham 1969, the lower bound of multiprocessor scheduling; from memory), on the
  standard tier of every op;
- stability: removing one case moves few others (rendezvous hashing keeps each key's choice when others
  come and go: Thaler & Ravishankar 1998, from memory);
- the command line: --shard K/N out of its limits is exit 2 naming the option; the pytest plugin's
  --refnorm-shard collects the cases of `refnorm check --shard` (the command line is the reference).
"""

from __future__ import annotations

import json
import os
import random
import subprocess
import sys
from pathlib import Path

import pytest

from conformance import ops
from conformance.cases import catalog
from conformance.cli import main
from conformance.run.shards import OVERHEAD, SLACK, assign, balance, case_cost, cut, selection_digest

REPO = Path(__file__).resolve().parents[1]
KERNELS = Path(__file__).with_name("gate_kernels.py")
FORMATS = ("float16", "bfloat16", "float32")


def standard(op: str, dtypes=FORMATS):
    return catalog([op], dtypes, "standard")


def shard_sets(cases, n):
    """The ids of each shard: shard 1's cases from cut(), the others from its record's assignment (one cut
    computes every shard's; test_a_shards_cases_are_those_its_record_assigns checks they agree)."""
    where = cut(cases, 1, n).record["assignment"]
    return [{c.id for c, k in zip(cases, where) if k == j} for j in range(1, n + 1)]


def test_a_shards_cases_are_those_its_record_assigns():
    cases = standard("instance_norm")
    for n in (2, 5):
        where = cut(cases, 1, n).record["assignment"]
        for k in range(1, n + 1):
            assert [c.id for c in cut(cases, k, n).cases] == [c.id for c, j in zip(cases, where) if j == k]


@pytest.mark.parametrize("op", ops.OPS)
def test_each_case_is_in_exactly_one_shard(op):
    cases = standard(op)
    ids = {c.id for c in cases}
    for n in (1, 2, 3, 5, 8, 256):
        sets = shard_sets(cases, n)
        assert sum(len(s) for s in sets) == len(cases), n
        assert set().union(*sets) == ids, n
        rec = cut(cases, 1, n).record
        assert rec["selection"] == [c.id for c in cases] and len(rec["assignment"]) == len(cases)


def test_the_cut_does_not_depend_on_the_order_of_the_cases():
    cases = standard("batch_norm")
    mixed = list(cases)
    random.Random(7).shuffle(mixed)
    for n in (2, 3, 7):
        a = dict(zip([c.id for c in cases], assign([c.id for c in cases], [case_cost(c) for c in cases], n)))
        b = dict(zip([c.id for c in mixed], assign([c.id for c in mixed], [case_cost(c) for c in mixed], n)))
        assert a == b


def test_the_cut_is_the_same_in_a_fresh_interpreter_with_another_hash_seed():
    cases = standard("layer_norm", ("float32",)) + standard("group_norm", ("float16",))
    here = [cut(cases, 1, 5).record["assignment"], cut(cases, 1, 5).record["selection_sha256"]]
    code = ("import json; from conformance.cases import catalog; from conformance.run.shards import cut; "
            "c = catalog(['layer_norm'], ['float32'], 'standard') + catalog(['group_norm'], ['float16'], 'standard'); "
            "r = cut(c, 1, 5).record; print(json.dumps([r['assignment'], r['selection_sha256']]))")
    env = dict(os.environ, PYTHONHASHSEED="12345", PYTHONPATH=str(REPO))
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120, check=True)
    assert json.loads(out.stdout) == here


# A multi-replica op's tier is a few cases, each costing whole processes: max(mean, largest case) is
# no reachable target for so few items (three equal long cases on two shards), so it is left out here.
@pytest.mark.parametrize("op", [n for n in ops.OPS if not ops.get(n).replicas])
def test_the_largest_shard_is_within_two_percent_of_the_best_cut(op):
    for dts in (("float32",), FORMATS):
        cases = standard(op, dts)
        for n in (2, 3, 4, 8):
            b = balance(cases, n)
            # No cut beats max(mean, largest case); the rule's capacity is 1 + SLACK times that.
            limit = b["best_over_mean"] * (1 + SLACK[0] / SLACK[1]) + 1e-9
            assert b["best_over_mean"] <= b["max_over_mean"] <= limit, (op, dts, n, b)


def test_two_long_reductions_never_share_a_shard_when_together_they_exceed_the_mean():
    # The standard tier's two 2**21-element cases of layer norm hold most of its cost (common practice:
    # long cases are what makes a naive split uneven).
    cases = standard("layer_norm", ("float32",))
    big = sorted(cases, key=case_cost)[-2:]
    total = sum(case_cost(c) for c in cases)
    for n in (2, 3, 4, 8):
        assert case_cost(big[0]) + case_cost(big[1]) > total / n * (1 + SLACK[0] / SLACK[1])
        sets = shard_sets(cases, n)
        assert [sum(c.id in s for c in big) for s in sets].count(2) == 0, n


@pytest.mark.parametrize("op", ("batch_norm", "rms_norm"))
def test_removing_one_case_moves_few_others(op):
    cases = standard(op)
    n = 4
    before = {c.id: k for c, k in zip(cases, cut(cases, 1, n).record["assignment"])}
    moved, kept = 0, 0
    for j in range(0, len(cases), 9):
        rest = cases[:j] + cases[j + 1:]
        after = dict(zip([c.id for c in rest], cut(rest, 1, n).record["assignment"]))
        moved += sum(after[i] != before[i] for i in after)
        kept += len(after)
    # Measured 6-9% here; longest-processing-time assignment moves about 45% of the cases on these
    # selections (benchmarks/shard_balance.py). The limit leaves room for the catalog to grow.
    assert moved / kept < 0.15, moved / kept


def test_the_cost_model_counts_elements_and_passes():
    # cost = passes * (numel + OVERHEAD), train 2 passes (forward and backward), eval 1 (conformance.run.shards)
    c = next(c for c in standard("batch_norm", ("float32",)) if c.mode == "eval")
    t = next(c for c in standard("batch_norm", ("float32",)) if c.mode == "train")
    assert case_cost(c) == c.numel + OVERHEAD
    assert case_cost(t) == 2 * (t.numel + OVERHEAD)


def test_the_selection_digest_is_sha256_of_the_ids_one_per_line():
    import hashlib

    ids = ["layer_norm/a", "layer_norm/b"]
    assert selection_digest(ids) == hashlib.sha256(b"layer_norm/a\nlayer_norm/b\n").hexdigest()  # FIPS 180-4


def test_more_shards_than_cases_leaves_shards_empty_not_broken():
    cases = catalog(["layer_norm"], ["float32"], "smoke")
    sets = shard_sets(cases, 16)
    assert sum(map(len, sets)) == len(cases) and sum(1 for s in sets if not s) >= 16 - len(cases)


# ---------------------------------------------------------------- the command line
BAD_SHARDS = ["0/3", "4/3", "1/0", "-1/2", "a/b", "1/1" + "0" * 400, "1/257", "3", "", "1/2/3", "1.0/2", "2/-4"]


@pytest.mark.parametrize("value", BAD_SHARDS)
def test_check_refuses_a_bad_shard_naming_the_option(value, capsys):
    rc = main(["check", f"{KERNELS}:fp32", "--tier", "smoke", "--shard", value])
    err = capsys.readouterr().err
    assert rc == 2 and "--shard" in err and "Traceback" not in err, err


@pytest.mark.parametrize("value", ["0/2", "1/1" + "0" * 400, "x/2"])
def test_gate_refuses_a_bad_shard_naming_the_option(value, capsys):
    rc = main(["gate", "--kernel", f"{KERNELS}:fp32", "--shard", value])
    err = capsys.readouterr().err
    assert rc == 2 and "--shard" in err and "Traceback" not in err, err


def test_a_shard_says_it_is_one_in_its_verdict_line_and_document(tmp_path, capsys):
    out = tmp_path / "s.json"
    rc = main(["check", f"{KERNELS}:fp32", "--tier", "smoke", "--shard", "2/2", "--quiet", "--json", str(out),
               "--junit", str(tmp_path / "s.xml")])
    text = capsys.readouterr().out
    doc = json.loads(out.read_text())
    mine = [c.id for c in cut(catalog(["layer_norm"], ["float32"], "smoke"), 2, 2).cases]
    assert rc == 0
    assert [c["id"] for c in doc["cases"]] == mine
    assert doc["run"]["shard"]["index"] == 2 and doc["run"]["cases_selected"] == len(mine)
    assert doc["coverage"]["selected"] == len(mine)
    assert "verdict: CONFORMANT (shard 2/2)" in text and "not the run's" in text
    import xml.etree.ElementTree as ET

    props = {p.get("name"): p.get("value") for p in ET.parse(tmp_path / "s.xml").getroot().iter("property")}
    assert props["shard"].startswith("2/2")


def test_a_shard_of_only_skipped_cases_passes_its_job_and_says_why(tmp_path, capsys):
    # fp32_strict skips the smoke case without weight and bias; with one case selected and 2 shards, one
    # shard holds it and the other nothing: neither is "not conformant" (the merged run decides).
    cid = next(c.id for c in catalog(["layer_norm"], ["float32"], "smoke") if c.weight == "none")
    codes = []
    for k in (1, 2):
        codes.append(main(["check", f"{KERNELS}:fp32_strict", "--case", cid, "--shard", f"{k}/2", "--quiet",
                           "--profile", str(_profile(tmp_path))]))
    text = capsys.readouterr().out
    assert codes == [0, 0], text
    assert "no case passed" not in text and "shard 1/2 only" in text


def _profile(tmp_path: Path) -> Path:
    p = tmp_path / "refnorm.toml"
    p.write_text("tier = 'smoke'\n[[waivers]]\ncase = 'layer_norm/float32/nothing/*'\nreason = 'x'\n"
                 "expires = 2999-12-31\n")
    return p


# ---------------------------------------------------------------- the pytest plugin
def _pytest(cwd: Path, *args: str) -> subprocess.CompletedProcess:
    cwd.mkdir(parents=True, exist_ok=True)
    (cwd / "pytest.ini").write_text("[pytest]\n")
    env = dict(os.environ, PYTHONPATH=str(REPO), PYTEST_DISABLE_PLUGIN_AUTOLOAD="1")
    env.pop("PYTEST_XDIST_WORKER", None)
    return subprocess.run([sys.executable, "-m", "pytest", "-p", "no:cacheprovider", "-p", "conformance.pytest_plugin",
                           *args], cwd=cwd, env=env, capture_output=True, text=True, timeout=300)


def test_the_plugin_collects_the_cases_of_check_shard(tmp_path):
    ref = tmp_path / "ref.json"
    assert main(["check", f"{KERNELS}:fp32", "--tier", "smoke", "--shard", "1/2", "--quiet", "--json", str(ref)]) == 0
    want = {c["id"] for c in json.loads(ref.read_text())["cases"]}
    r = _pytest(tmp_path / "p", "--refnorm-kernel", f"{KERNELS}:fp32", "--refnorm-tier", "smoke", "--refnorm-shard",
                "1/2", "--junitxml", str(tmp_path / "j.xml"))
    assert r.returncode == 0, r.stdout + r.stderr
    import xml.etree.ElementTree as ET

    got = {tc.get("name") for tc in ET.parse(tmp_path / "j.xml").getroot().iter("testcase")}
    assert got == want and "shard 1/2" in r.stdout


def test_the_plugin_refuses_a_bad_shard(tmp_path):
    r = _pytest(tmp_path, "--refnorm-kernel", f"{KERNELS}:fp32", "--refnorm-shard", "3/2")
    assert r.returncode == 4 and "--refnorm-shard" in r.stderr and "Traceback" not in r.stderr, r.stderr


# ---------------------------------------------------------------- balancing by measured durations
def test_measured_durations_balance_the_measured_time():
    # Durations that the model gets badly wrong (every small case as slow as the long ones, as a kernel
    # with a large fixed cost per call would make them): the measured cut balances them, the model's not.
    from conformance.run.shards import measured_costs

    cases = standard("layer_norm", ("float32",))
    secs = {c.id: 1.0 for c in cases}
    for n in (2, 3, 4):
        costs, model = measured_costs(cases, secs, "test")
        assert model.startswith("measured") and costs == [1_000_000] * len(cases)
        sizes = sorted(len(s) for s in shard_sets_measured(cases, n, secs))
        assert sizes[-1] - sizes[0] <= 1, (n, sizes)  # equal durations: equal counts (within one case)


def shard_sets_measured(cases, n, secs):
    where = cut(cases, 1, n, durations=secs, durations_source="test").record["assignment"]
    return [{c.id for c, k in zip(cases, where) if k == j} for j in range(1, n + 1)]


def test_cases_missing_from_the_durations_get_the_scaled_model():
    from conformance.run.shards import measured_costs

    cases = standard("rms_norm", ("float32",))
    known = {c.id: case_cost(c) * 2e-6 for c in cases[::2]}  # 2 us per unit, exactly the model's proportions
    costs, _ = measured_costs(cases, known, "test")
    assert costs == [round(case_cost(c) * 2e-6 * 1e6) for c in cases]


@pytest.mark.parametrize("extra, words", [
    (["--shard-durations", "/nonexistent/results.json"], ["--shard-durations", "give --shard too"]),
    (["--shard", "1/2", "--shard-durations", "/nonexistent/results.json"], ["--shard-durations", "does not exist"]),
    (["--shard", "1/2", "--shard-durations", str(REPO)], ["--shard-durations", "directory"])])
def test_a_bad_durations_file_is_refused_before_the_run(extra, words, capsys):
    rc = main(["check", f"{KERNELS}:fp32", "--tier", "smoke", "--quiet", *extra])
    err = capsys.readouterr().err
    assert rc == 2 and "Traceback" not in err, err
    assert all(w in err for w in words), err


def test_a_multi_replica_case_costs_its_processes():
    # cost = passes (numel + OVERHEAD) + replicas REPLICA_START (conformance/run/shards.py, COST_MODEL)
    from conformance.run.shards import OVERHEAD, REPLICA_START

    for c in [c for n in ops.OPS if ops.get(n).replicas for c in standard(n, ("float32",))]:
        assert case_cost(c) == 2 * (c.numel + OVERHEAD) + len(c.shards) * REPLICA_START, c.id
