"""Multi-replica batch norm as a registered op: the catalog's shard plans through `refnorm check`,
`--case`, the results document, the gate's waivers, the pytest plugin and in-process runs.

The kernels are tests/replica_kernels.py's (an invented sensor-array team's executable
specifications) declared as conformance.Kernel objects (``as_kernel``). The reference for every
verdict is the oracle of refnorm.replicas (the two-pass batch norm of the concatenated batch; Chan,
Golub & LeVeque 1983, eq. 2.1 for the merges the kernels do), as in tests/test_replicas.py.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from conformance import documents, ops
from conformance.cases import catalog, find_case
from conformance.cli import main
from conformance.kernel import Conventions, Kernel
from conformance.results import output_of
from conformance.run.execute import execute_case

sys.path.insert(0, str(Path(__file__).parent))
import replica_kernels  # noqa: E402
from test_pytest_plugin import junit_outcomes, run_pytest  # noqa: E402
from test_replicas import _descendants  # noqa: E402

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="process checks read /proc")

KERNELS = Path(__file__).with_name("replica_kernels.py")
OP = next(n for n in ops.OPS if ops.get(n).replicas)
SMOKE = catalog([OP], ["float32"], "smoke")


def spec(bug: str = "ReplicaNorm") -> str:
    return f"{KERNELS}:as_kernel" + ("" if bug == "ReplicaNorm" else f"?bug={bug}")


def test_ids_read_as_the_plan_and_round_trip():
    # what the issue asks ids to say: the op, then replicas=R,shards=n0+n1+... after the shape (common practice)
    for c in catalog([OP], ["float32"], "standard"):
        assert f"/replicas={len(c.shards)},shards={'+'.join(map(str, c.shards))}/" in c.id
        assert find_case(c.id) == c and type(c).from_dict(c.as_dict()) == c
        assert sum(c.shards) == c.shape[0]
    # single-process cases are written as before: no shards field in their dicts
    assert "shards" not in catalog(["batch_norm"], ["float32"], "smoke")[0].as_dict()


def test_check_runs_the_plans_and_writes_a_valid_document(tmp_path):
    out = tmp_path / "r.json"
    picked = SMOKE[:2]  # one plan without and one with running statistics
    rc = main(["check", spec(), *[a for c in picked for a in ("--case", c.id)], "--workers", "2", "--quiet",
               "--json", str(out)])
    doc = documents.read(out)  # the one reader: the results schema and its rules
    assert rc == 0 and doc["verdict"] == "conformant", [c["message"] for c in doc["cases"]]
    assert [c["id"] for c in doc["cases"]] == [c.id for c in picked]
    # each replica is compared on its share; the summary counts a case once per output
    rows = {r["output"]: r for r in doc["summary"]}
    assert set(rows) == {"y", "mean", "rstd", "running_mean", "running_var", "dx", "dweight", "dbias"}
    assert rows["y"]["cases"] == 2 and rows["running_var"]["cases"] == 1
    assert sum(o["name"].endswith(": y") for c in doc["cases"] for o in c["outputs"]) == sum(
        len(c.shards) for c in picked)
    assert not _descendants()


def test_a_seeded_bug_fails_its_output_by_case_id(tmp_path):
    # averaging the replicas' variances drops the between-shard term n_a n_b delta^2 / n (Chan et al. 1983,
    # eq. 2.1): the global rstd and the running variance are wrong
    case = next(c for c in SMOKE if c.running)
    out = tmp_path / "r.json"
    rc = main(["check", spec("AveragedVariances"), "--case", case.id, "--quiet", "--json", str(out)])
    doc = json.loads(out.read_text())
    assert rc == 1 and doc["cases"][0]["status"] == "failed"
    bad = {output_of(o["name"]) for o in doc["cases"][0]["outputs"] if not o["passed"]}
    assert {"rstd", "running_var"} <= bad, bad
    # a waiver of those outputs covers the case (docs/ci.md, "Waivers"): names are the outputs, not the replicas
    prof = tmp_path / "refnorm.toml"
    prof.write_text(f"kernels = ['{spec('AveragedVariances')}']\n"
                    + "".join(f"[[waivers]]\ncase = '{case.id}'\noutput = '{o}'\nreason = 'known'\n"
                              f"expires = 2999-12-31\n" for o in sorted(bad)))
    gated = tmp_path / "g.json"
    main(["check", spec("AveragedVariances"), "--case", case.id, "--profile", str(prof), "--quiet",
          "--json", str(gated)])  # exit 1 all the same: with its only case waived, nothing passed (docs/ci.md)
    assert json.loads(gated.read_text())["cases"][0]["waiver"]["waived"] is True


def test_the_plugin_fails_the_cases_the_cli_fails(tmp_path):
    # one plan of unequal shards (weighting shards equally is wrong only when their sizes differ: Chan et
    # al. 1983, eq. 2.1)
    picked = [SMOKE[0].id]
    cli = tmp_path / "cli.json"
    main(["check", spec("EqualWeights"), *[a for c in picked for a in ("--case", c)], "--quiet", "--json", str(cli)])
    want = {c["id"]: c["status"] for c in json.loads(cli.read_text())["cases"]}
    assert list(want.values()) == ["failed"] and set(want) == set(picked)
    r = run_pytest(tmp_path / "p", "--refnorm-kernel", spec("EqualWeights"),
                   *[a for c in picked for a in ("--refnorm-case", c)], f"--junitxml={tmp_path / 'j.xml'}")
    got = junit_outcomes(tmp_path / "j.xml")
    assert r.returncode == 1, r.stdout[-2000:]
    assert {k: ("failed" if v == "failure" else v) for k, v in got.items()} == want


def test_in_process_runs_pickle_a_kernel_without_a_source():
    # execute_case with the Kernel object (no spec to load it from): the replicas receive it pickled
    k = replica_kernels.as_kernel()
    assert k.source is None
    res = execute_case(k, SMOKE[0], 0)
    assert res.status == "passed", res.message
    assert not _descendants()


def test_a_kernel_that_cannot_reach_a_new_process_costs_its_case():
    def fwd(x, weight, bias, **kw):  # a local function: no new process can load or unpickle it
        return {}

    k = Kernel(name="local", op=OP, forward=fwd, backward=fwd, dtypes=("float32",), updates_running=False,
               outputs=("y", "mean", "rstd"), conventions=Conventions(saved=("mean", "rstd")))
    res = execute_case(k, SMOKE[0], 0)
    assert res.status == "error" and "could not be started" in res.message and "module:attr" in res.message
    assert not _descendants()


def test_declarations_the_replicas_cannot_honour_are_refused():
    def f(**kw):
        return None

    base = dict(name="k", op=OP, forward=f, backward=f, outputs=("y", "mean", "rstd"), updates_running=False)
    with pytest.raises(ValueError, match="running_var_estimator='unbiased' only"):
        Kernel(**base, conventions=Conventions(saved=("mean", "rstd"), running_var_estimator="biased"))
    with pytest.raises(ValueError, match="no eval entry points"):
        Kernel(**base, forward_eval=f, conventions=Conventions(saved=("mean", "rstd")))
    with pytest.raises(ValueError, match="param_grads is 'both'"):
        Kernel(**base, conventions=Conventions(saved=("mean", "rstd"), param_grads="both"))
    with pytest.raises(ValueError, match="bug is 'Nope'"):
        replica_kernels.as_kernel("Nope")
