"""`refnorm merge`: N shards put back together equal the unsharded run, case for case; anything that is
not the shards of one run is refused with the file, the field and both values, never a traceback.

The reference is the unsharded run of the same command (`refnorm check` without --shard) on the
kernels of tests/gate_kernels.py, smoke tier, seed 0: a seeded bug that fails most cases
(eps_outside), a kernel that aborts its process on one case (crash) and one whose declaration skips a
case (fp32_strict). The merged document must equal it in every field but the timing ones (each case's
duration_s, kernel_s, oracle_s; the run's started, finished, duration_s, command, pid), the environment
and run.merged; and report, diff, baselines and JUnit must work on it as on the unsharded document.
"""

from __future__ import annotations

import copy
import json
from datetime import date
from pathlib import Path

import pytest

from conformance import documents
from conformance.cli import main
from conformance.gate.decide import apply_gate, remove_gate
from conformance.gate.profile import Waiver
from conformance.run.merge import merge_documents
from conformance.run.shards import selection_digest

KERNELS = Path(__file__).with_name("gate_kernels.py")
TIMING = ("duration_s", "kernel_s", "oracle_s")
RUN_TIMING = ("started", "finished", "duration_s", "command", "pid", "merged")
#: kernel -> shard count: every shard count leaves some shard with a mix of statuses or with none
PLAN = {"eps_outside": 3, "crash": 2, "fp32_strict": 4}


def spec(name: str) -> str:
    return f"{KERNELS}:{name}"


def comparable(doc: dict) -> dict:
    """The document without what may differ between a sharded and an unsharded run of the same cases."""
    d = copy.deepcopy(doc)
    d.pop("environment")
    for k in RUN_TIMING:
        d["run"].pop(k, None)
    for c in d["cases"]:
        for k in TIMING:
            c.pop(k, None)
    return d


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """For each kernel: the unsharded document, the shards' files and exit codes, and the unsharded exit code."""
    out = {}
    for name, n in PLAN.items():
        d = tmp_path_factory.mktemp(name)
        full_rc = main(["check", spec(name), "--tier", "smoke", "--quiet", "--json", str(d / "full.json")])
        shards, codes = [], []
        for k in range(1, n + 1):
            p = d / f"shard-{k}.json"
            codes.append(main(["check", spec(name), "--tier", "smoke", "--quiet", "--shard", f"{k}/{n}", "--json",
                               str(p)]))
            shards.append(p)
        out[name] = {"dir": d, "full": json.loads((d / "full.json").read_text()), "full_rc": full_rc,
                     "shards": shards, "codes": codes, "n": n}
    return out


def load(p: Path) -> dict:
    return json.loads(Path(p).read_text())


@pytest.mark.parametrize("name", list(PLAN))
def test_merged_shards_equal_the_unsharded_run_case_for_case(name, runs, capsys):
    r = runs[name]
    merged = r["dir"] / "merged.json"
    rc = main(["merge", *map(str, reversed(r["shards"])), "--json", str(merged)])  # any order
    capsys.readouterr()
    doc = documents.read(merged)  # the one reader: schema and rules
    full = r["full"]
    assert rc == r["full_rc"]
    assert [c["id"] for c in doc["cases"]] == [c["id"] for c in full["cases"]]
    assert comparable(doc) == comparable(full)
    assert doc["verdict"] == full["verdict"] and doc["counts"] == full["counts"] and doc["summary"] == full["summary"]
    assert "shard" not in doc["run"] and doc["run"]["merged"]["count"] == r["n"]


def test_the_kernels_cover_every_status_that_matters(runs):
    statuses = {c["status"] for r in runs.values() for c in r["full"]["cases"]}
    assert {"passed", "failed", "crashed", "skipped"} <= statuses
    assert [r["full_rc"] for r in runs.values()] == [1, 1, 0]


def test_each_shard_exits_by_its_own_cases_and_covers_them(runs):
    for name, r in runs.items():
        for k, (p, rc) in enumerate(zip(r["shards"], r["codes"]), 1):
            doc = load(p)
            bad = any(c["status"] in ("failed", "crashed", "timed_out", "error") for c in doc["cases"])
            assert rc == (1 if bad else 0), (name, k)
            assert doc["complete"] and doc["coverage"]["selected"] == len(doc["cases"])
            assert doc["run"]["shard"]["selection"] == [c["id"] for c in r["full"]["cases"]]


def test_report_diff_baseline_and_junit_work_on_the_merged_document(runs, tmp_path, capsys):
    r = runs["eps_outside"]
    merged = tmp_path / "m.json"
    rc = main(["merge", *map(str, r["shards"]), "--json", str(merged), "--junit", str(tmp_path / "m.xml"),
               "--report", str(tmp_path / "rep"), "--no-peers"])
    assert rc == 1
    capsys.readouterr()
    assert main(["diff", str(r["dir"] / "full.json"), str(merged)]) == 0
    out = capsys.readouterr().out
    assert "0 status change(s)" in out and "0 added, 0 removed" in out
    assert main(["report", str(merged), "--out", str(tmp_path / "rep2"), "--no-peers"]) == 0
    md = (tmp_path / "rep" / "report.md").read_text()
    assert "Merged from 3 of 3 shards" in md and "NOT CONFORMANT" in md
    import xml.etree.ElementTree as ET

    names = [tc.get("name") for tc in ET.parse(tmp_path / "m.xml").getroot().iter("testcase")]
    assert names == [c["id"] for c in r["full"]["cases"]]


def test_the_merged_document_is_a_baseline_and_takes_one(runs, tmp_path, capsys):
    r = runs["fp32_strict"]
    # as a baseline of a later run: no growth against itself
    rc = main(["merge", *map(str, r["shards"]), "--baseline", str(r["dir"] / "full.json"), "--json",
               str(tmp_path / "g.json")])
    capsys.readouterr()
    g = load(tmp_path / "g.json")["gate"]
    assert rc == 0 and g["verdict"] == "pass" and g["baseline"]["compared"] == r["full"]["counts"]["passed"]
    rc = main(["check", spec("fp32_strict"), "--tier", "smoke", "--quiet", "--baseline", str(tmp_path / "g.json")])
    assert rc == 0


def shrunk(doc: dict, factor: float = 10.0) -> dict:
    """A baseline in which every passed output used ``factor`` times less of its bound (so growth = factor)."""
    b = copy.deepcopy(doc)
    for c in b["cases"]:
        for o in c.get("outputs", []):
            if isinstance(o.get("budget_used"), float):
                o["budget_used"] /= factor
    return b


def test_gated_shards_merge_to_the_gate_of_the_unsharded_run(runs):
    """Shards judged by a gate (waivers, baseline) carry decisions for their own cases only; the merge
    sets them aside and the gate judges the whole run: the result equals the gate on the unsharded run."""
    r = runs["eps_outside"]
    full = r["full"]
    failed = [c["id"] for c in full["cases"] if c["status"] == "failed"]
    far = date(2999, 12, 31)
    waivers = (Waiver(index=0, case=failed[0], reason="known", expires=far),
               Waiver(index=1, case="layer_norm/float32/nothing/*", reason="typo", expires=far))
    base = shrunk(full)
    kw = dict(waivers=waivers, baseline=base, baseline_path="b.json", profile="p.toml")
    want, _ = apply_gate(copy.deepcopy(full), **kw)
    assert want["gate"]["baseline"]["regressions"]  # the baseline makes the passing case regress
    gated = []
    for p in r["shards"]:
        d, _ = apply_gate(load(p), **kw)
        gated.append((str(p), documents.check(json.loads(json.dumps(d)), str(p))))
    merged = merge_documents(gated)
    assert len(merged["run"]["merged"]["gated"]) == len(gated)
    plain = copy.deepcopy(want)
    remove_gate(plain)
    assert comparable(merged) == comparable(plain)  # the decisions were set aside exactly
    again, _ = apply_gate(merged, **kw)
    assert comparable(again) == comparable(want)


def test_remove_gate_gives_back_the_run_as_it_was(runs):
    full = runs["eps_outside"]["full"]
    failed = [c["id"] for c in full["cases"] if c["status"] == "failed"]
    w = (Waiver(index=0, case=failed[-1], reason="known", expires=date(2999, 12, 31)),)
    d, _ = apply_gate(copy.deepcopy(full), waivers=w, baseline=shrunk(full, 100.0))
    assert d != full
    assert remove_gate(d) and d == full


# ---------------------------------------------------------------- refused inputs
def write(tmp_path: Path, name: str, doc) -> Path:
    p = tmp_path / name
    p.write_text(doc if isinstance(doc, str) else json.dumps(doc, indent=1))
    return p


def refused(capsys, *args: str) -> str:
    rc = main(["merge", *map(str, args)])
    err = capsys.readouterr().err
    assert rc == 2 and "Traceback" not in err, (rc, err)
    return err


def test_shards_of_different_kernels_seeds_versions_or_catalogs_are_refused(runs, tmp_path, capsys):
    r = runs["eps_outside"]
    s1, s2, s3 = r["shards"]
    out = tmp_path / "never.json"
    for path, value, field, said in [
            (("kernel", "name"), "another kernel", "kernel.name", ['"another kernel"']),
            (("kernel", "precision", "float32", "accumulate"), "float64", "kernel.precision.float32.accumulate",
             ['"float64"', '"float32"']),
            (("run", "seed"), 7, "run.seed", ["is 7", "has 0"]),
            (("run", "tier"), "standard", "run.tier", ['"standard"', '"smoke"']),
            (("run", "overrides"), {"y": [1e-3, 0.0]}, "run.overrides.y", ["[0.001, 0.0]", "absent in"]),
            (("environment", "refnorm"), "0.0.1", "environment.refnorm", ['"0.0.1"'])]:
        d = load(s2)
        node = d
        for p in path[:-1]:
            node = node[p]
        old = node[path[-1]]
        node[path[-1]] = value
        f = write(tmp_path, "bad.json", d)
        err = refused(capsys, s1, f, s3, "--json", out)
        assert f"bad.json: {field} is " in err and str(s1) in err, err
        assert all(w in err for w in said), err
        if not isinstance(old, dict):
            assert json.dumps(old) in err, err
    # another catalog: the same count of cases under other ids (a consistent record, another selection)
    d = load(s2)
    sel = [i.replace("smoke", "x") + "/other" for i in d["run"]["shard"]["selection"]]
    d["run"]["shard"]["selection"] = sel
    d["run"]["shard"]["selection_sha256"] = selection_digest(sel)
    err = refused(capsys, s1, write(tmp_path, "cat.json", d))
    assert "run.shard" in err, err
    assert not out.exists()


def test_shards_of_runs_cut_into_different_counts_are_refused(runs, tmp_path, capsys):
    half = tmp_path / "half.json"
    assert main(["check", spec("eps_outside"), "--tier", "smoke", "--quiet", "--shard", "1/2", "--json",
                 str(half)]) in (0, 1)
    s1, s2, s3 = runs["eps_outside"]["shards"]
    err = refused(capsys, half, s2, s3)
    assert "run.shard.count is 3, but" in err and "half.json has 2" in err, err
    err = refused(capsys, s1, runs["crash"]["shards"][1])
    assert "kernel.name" in err  # another kernel differs first in its name


def test_the_same_shard_twice_is_refused_and_says_whether_the_results_agree(runs, tmp_path, capsys):
    s1, s2, s3 = runs["eps_outside"]["shards"]
    err = refused(capsys, s1, s2, s1, s3)
    assert "both shard 1/3" in err and "same results" in err, err
    d = load(s1)
    d["cases"][0]["outputs"][0]["max_abs"] = 123.0
    err = refused(capsys, s1, write(tmp_path, "again.json", d))
    assert "both shard 1/3" in err and "different results" in err, err


def test_a_missing_shard_gives_an_incomplete_document_naming_its_cases(runs, tmp_path, capsys):
    s1, s2, s3 = runs["eps_outside"]["shards"]
    out = tmp_path / "m.json"
    rc = main(["merge", str(s1), str(s3), "--json", str(out)])
    text = capsys.readouterr().out
    doc = documents.read(out)
    assert rc == 3
    assert doc["complete"] is False and doc["verdict"] == "incomplete"
    assert doc["coverage"]["missing"] == [c["id"] for c in load(s2)["cases"]]
    assert "shard 2/3 is missing" in text
    assert doc["run"]["merged"]["missing_shards"] == [2]


def test_an_interrupted_shard_leaves_the_merge_incomplete(runs, tmp_path, capsys):
    from conformance.gate.decide import refresh

    s1, s2, s3 = runs["eps_outside"]["shards"]
    d = load(s3)
    assert len(d["cases"]) >= 1
    lost = d["cases"].pop()
    d["complete"] = False
    d["run"]["interrupted"] = "SIGTERM"
    d["coverage"]["missing"] = [lost["id"]]
    refresh(d)
    out = tmp_path / "m.json"
    rc = main(["merge", str(s1), str(s2), str(write(tmp_path, "cut.json", d)), "--json", str(out)])
    text = capsys.readouterr().out
    doc = documents.read(out)
    assert rc == 3 and doc["verdict"] == "incomplete" and doc["coverage"]["missing"] == [lost["id"]]
    assert doc["run"]["interrupted"] == "SIGTERM" and "interrupted by SIGTERM" in text


def test_documents_that_are_not_shards_or_not_documents_are_refused(runs, tmp_path, capsys):
    r = runs["eps_outside"]
    s1 = r["shards"][0]
    err = refused(capsys, s1, r["dir"] / "full.json")
    assert "run.shard" in err and "not a shard" in err, err
    text = Path(s1).read_text()
    err = refused(capsys, s1, write(tmp_path, "cut.json", text[: len(text) // 2]))
    assert "cut.json" in err and "not JSON" in err, err
    err = refused(capsys, s1, tmp_path / "absent.json")
    assert "does not exist" in err
    err = refused(capsys, s1, tmp_path)
    assert "directory" in err


def test_a_tampered_shard_record_is_refused(runs, tmp_path, capsys):
    s1, s2, s3 = runs["eps_outside"]["shards"]
    d = load(s1)
    d["run"]["shard"]["selection"][0] += "x"  # digest no longer matches
    err = refused(capsys, write(tmp_path, "a.json", d), s2, s3)
    assert "selection_sha256" in err, err
    d = load(s1)
    d["run"]["shard"]["extra"] = 1  # the schema describes the record exactly
    err = refused(capsys, write(tmp_path, "b.json", d), s2, s3)
    assert "run.shard.extra" in err, err
    d = load(s1)
    d["run"]["shard"]["index"] = 0
    err = refused(capsys, write(tmp_path, "c.json", d), s2, s3)
    assert "run.shard.index" in err, err
    d = load(s1)
    d["run"]["shard"]["index"] = 9
    err = refused(capsys, write(tmp_path, "d.json", d), s2, s3)
    assert "run.shard.index" in err and "more than the count" in err, err
    # a case of shard 2 carried by shard 1's document
    d1, d2 = load(s1), load(s2)
    from conformance.gate.decide import refresh

    d1["cases"].append(d2["cases"][0])
    refresh(d1)
    err = refused(capsys, write(tmp_path, "e.json", d1), s3)
    assert "belongs to shard 2/3" in err, err


def test_shards_cut_by_measured_durations_merge_and_must_share_the_file(runs, tmp_path, capsys):
    r = runs["crash"]
    full = r["dir"] / "full.json"
    paths = []
    for k in (1, 2):
        p = tmp_path / f"d{k}.json"
        main(["check", spec("crash"), "--tier", "smoke", "--quiet", "--shard", f"{k}/2", "--shard-durations",
              str(full), "--json", str(p)])
        paths.append(p)
    out = tmp_path / "m.json"
    assert main(["merge", *map(str, paths), "--json", str(out)]) == r["full_rc"]
    assert comparable(load(out)) == comparable(r["full"])
    assert load(paths[0])["run"]["shard"]["cost_model"].startswith("measured")
    capsys.readouterr()
    err = refused(capsys, paths[0], r["shards"][1])  # one shard cut by durations, the other by the model
    assert "run.shard.cost_model" in err, err


def test_gate_shards_merged_with_the_profile_equal_the_unsharded_gate(runs, tmp_path, capsys):
    full = runs["eps_outside"]["full"]
    failed = [c["id"] for c in full["cases"] if c["status"] == "failed"]
    prof = tmp_path / "refnorm.toml"
    prof.write_text(f"kernels = ['{spec('eps_outside')}']\ntier = 'smoke'\n"
                    f"[[waivers]]\ncase = '{failed[0]}'\nreason = 'known'\nexpires = 2999-12-31\n"
                    f"[[waivers]]\ncase = 'layer_norm/float32/nothing/*'\nreason = 'typo'\nexpires = 2999-12-31\n")
    rc_full = main(["gate", "--profile", str(prof), "--quiet", "--json-dir", str(tmp_path / "full")])
    whole = capsys.readouterr().out
    codes = [main(["gate", "--profile", str(prof), "--quiet", "--shard", f"{k}/2", "--json-dir",
                   str(tmp_path / f"s{k}")]) for k in (1, 2)]
    shard_text = capsys.readouterr().out
    (name,) = [p.name for p in (tmp_path / "full").iterdir()]
    out = tmp_path / "m.json"
    rc = main(["merge", str(tmp_path / "s1" / name), str(tmp_path / "s2" / name), "--profile", str(prof),
               "--json", str(out)])
    merged_text = capsys.readouterr().out
    want = load(tmp_path / "full" / name)
    got = load(out)
    assert rc == rc_full == 1 and 1 in codes
    assert comparable(got) == comparable(want)  # cases with their waiver records, counts, verdict, gate
    assert got["gate"]["waived"] == [failed[0]]
    # the waiver that matches nothing is reported by the whole run and by the merge, never by a shard
    assert "matches no case" in whole and "matches no case" not in shard_text
    assert "shard 1/2 of each kernel only" in shard_text and "2 of 2 shard(s)" in merged_text


def test_a_shard_compared_with_a_whole_run_says_it_is_a_shard(runs, capsys):
    r = runs["eps_outside"]
    rc = main(["diff", str(r["dir"] / "full.json"), str(r["shards"][0])])
    out = capsys.readouterr().out
    # the other shards' cases are missing from NEW: worse, as diff's rules say, and the note says why
    assert rc == 1 and "this run is shard 1/3 only" in out, out
