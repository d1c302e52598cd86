"""The multi-replica harness: R processes over torch.distributed (gloo), per-replica comparison,
seeded bugs with their correct twins, and hostile replicas that each cost one case.

Expected values come from the oracle refnorm.replicas.replica_batch_norm_* (itself checked against batch
norm of the concatenation and torch in tests/test_oracle_replicas.py); the bugs' effects follow
from the definition of the merge (Chan, Golub & LeVeque 1983, eq. 2.1) and of the running
variance (Bessel's correction on the global count: torch SyncBatchNorm, from memory).
"""

from __future__ import annotations

import importlib.util
import os
import re
import sys

import numpy as np
import pytest

if importlib.util.find_spec("torch") is None:  # the replicas need torch.distributed; the parent never imports it
    pytest.skip("torch is not installed", allow_module_level=True)

from conformance.cases.model import Case  # noqa: E402
from conformance.run.replicas import (ReplicaCase, ReplicaKernel, merge_bound, replica_cases,  # noqa: E402
                                      run_replica_case)
from conformance.tolerances.bound import Bound  # noqa: E402

HERE = os.path.dirname(os.path.abspath(__file__))
CASES = replica_cases("float32")


@pytest.fixture(autouse=True)
def _importable_kernels(monkeypatch):
    # the replicas are spawned: they import the kernels' module by name, so tests/ must be on their path
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join([HERE, os.environ.get("PYTHONPATH", "")]))
    monkeypatch.syspath_prepend(HERE)


def _is_resource_tracker(pid: str) -> bool:
    # multiprocessing's one helper per parent for "spawn" (it lives as long as the test process,
    # by design, and is no replica)
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as f:
            return b"resource_tracker" in f.read()
    except OSError:
        return False


def _descendants() -> set[int]:
    """Live (non-zombie) processes below this one, from /proc (Linux)."""
    parent = {}
    for d in os.listdir("/proc"):
        if d.isdigit():
            try:
                with open(f"/proc/{d}/stat") as f:
                    st = f.read().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if st[0] != "Z" and not _is_resource_tracker(d):
                parent[int(d)] = int(st[1])
    out, frontier = set(), {os.getpid()}
    while frontier:
        frontier = {p for p, pp in parent.items() if pp in frontier and p not in out}
        out |= frontier
    return out


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat") as f:
            return f.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


def _run(name, case, **kw):
    before = _descendants()
    res = run_replica_case(ReplicaKernel(name=name, spec=f"replica_kernels:{name}", **kw), case)
    assert _descendants() - before == set(), "a replica process outlived its case"
    return res


def _failing(res) -> set[str]:
    return {o["name"].split(": ", 1)[1] for o in res.outputs if not o["passed"]}


pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="process checks read /proc")


def test_standard_plans_cover_the_requirements():
    # R in 2..4, unequal shards, a one-sample shard, both layouts, running statistics, the standard
    # tier's long reduction (2^20 per channel) and cancellation values (common practice: the cases the issue names)
    assert {c.replicas for c in CASES} == {2, 3, 4}
    assert any(len(set(c.shards)) > 1 for c in CASES) and any(1 in c.shards for c in CASES)
    assert {c.base.layout for c in CASES} == {"channels_first", "channels_last"}
    assert {c.base.values for c in CASES} >= {"normal", "cancellation"}
    assert any(c.base.running for c in CASES)
    assert max(c.base.group_length for c in CASES) >= 1 << 20
    assert CASES[2].id.startswith("replica_batch_norm/float32/channels_last/6x4x4x3/replicas=3,shards=1+4+1/")
    assert len({c.id for c in CASES}) == len(CASES)


def test_declarations_and_plans_are_validated():
    base = Case(op="batch_norm", dtype="float32", shape=(5, 3, 4), layout="channels_first")
    with pytest.raises(ValueError, match="sum to 4"):
        ReplicaCase(base, (1, 3))
    with pytest.raises(ValueError, match="2..8"):
        ReplicaCase(base, (5,))
    with pytest.raises(ValueError, match="expected a contiguous batch_norm"):
        ReplicaCase(Case(op="layer_norm", dtype="float32", shape=(5, 3), layout="trailing", norm_ndim=1), (2, 3))
    with pytest.raises(ValueError, match="param_grads"):
        ReplicaKernel(name="k", spec="m:a", param_grads="both")
    with pytest.raises(ValueError, match="module:attribute"):
        ReplicaKernel(name="k", spec="no_colon")


def test_merge_bound_adds_to_the_single_process_bound():
    # B_R = B_1 (1 + rho) + rho |e| with rho = gamma_3R(u) (docs/tolerances.md; Higham 2002, §3.1)
    b = Bound(output="mean", values=np.array([1e-6, 2e-6]), formula="B")
    e = np.array([3.0, -4.0])
    u = 2.0 ** -24
    got = merge_bound(b, e, 4, u).values
    rho = 12 * u / (1 - 12 * u)
    np.testing.assert_allclose(got, b.values * (1 + rho) + rho * np.abs(e), rtol=1e-15)
    assert (got > b.values).all()


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.id)
def test_correct_kernel_passes_every_plan(case):
    res = _run("ReplicaNorm", case)
    assert res.status == "passed", res.message
    names = {o["name"] for o in res.outputs}
    # every replica is compared on its shares and on the global outputs
    for r in range(case.replicas):
        assert {f"replica {r}: {n}" for n in ("y", "dx", "mean", "rstd", "dweight", "dbias")} <= names
        assert (f"replica {r}: running_var" in names) == case.base.running


# (bug, its correct twin, declared param_grads, the outputs it must corrupt, case index)
BUGS = [
    ("AveragedVariances", "ReplicaNorm", "reduced", {"rstd", "running_var"}, 1),
    ("EqualWeights", "ReplicaNorm", "reduced", {"mean", "running_mean"}, 1),
    ("LocalCountRunningVar", "ReplicaNorm", "reduced", {"running_var"}, 1),
    ("SkipsReduceDyXhat", "LocalGrads", "local", {"dx"}, 1),
]


@pytest.mark.parametrize("bug,twin,grads,corrupted,k", BUGS, ids=[b[0] for b in BUGS])
def test_seeded_bug_is_caught_on_its_output(bug, twin, grads, corrupted, k):
    res = _run(bug, CASES[k], param_grads=grads)
    assert res.status == "failed", res.message
    bad = _failing(res)
    assert corrupted <= bad, bad
    if bug in ("LocalCountRunningVar", "SkipsReduceDyXhat"):  # one step: nothing else moves
        assert bad == corrupted, bad
    assert _run(twin, CASES[k], param_grads=grads).status == "passed"
    # no diagnosis runs for these cases, and each failed output says so rather than staying silent
    # (a verdict is never silently incomplete: common practice of this project, docs/diagnosis.md)
    for o in res.outputs:
        if not o["passed"]:
            assert o["diagnosis"]["text"].startswith(f"no diagnosis of {o['name']}: multi-replica"), o
        else:
            assert "diagnosis" not in o


def test_local_gradients_declared_reduced_fail_on_dweight():
    # a replica's own sums are not the all-reduced ones (definition): declaring the wrong mode is caught
    res = _run("LocalGrads", CASES[0], param_grads="reduced")
    assert res.status == "failed" and _failing(res) == {"dweight", "dbias"}


def test_wrong_shard_shape_costs_the_case():
    res = _run("WrongShardShape", CASES[1])
    assert res.status == "failed"
    assert "replica 1: y: shape mismatch: actual (4, 3, 4, 4), expected (3, 3, 4, 4)" in res.message


def test_replica_that_exits_is_a_crash_named_by_replica():
    res = _run("ExitsInForward", CASES[0])
    assert res.status == "crashed"
    assert "replica 1 exited with status 3" in res.message


def test_mismatched_collective_is_an_error_with_both_shapes():
    res = _run("MismatchedCollective", CASES[0])
    assert res.status == "error"
    assert "replica 0: float32(1,), replica 1: float32(2,)" in res.message


def test_hang_in_a_collective_times_out_and_stops_every_replica():
    res = _run("HangsInCollective", CASES[0], timeout_s=15)
    assert res.status == "timed_out"
    assert "did not finish within 15 s" in res.message


def test_a_kernel_child_does_not_outlive_the_case():
    res = _run("StartsAChild", CASES[0])
    assert res.status == "error" and "replica 0 failed in forward" in res.message
    pid = int(re.search(r"child pid (\d+)", res.message).group(1))
    assert not _alive(pid)


def test_a_return_that_is_not_a_dict_is_an_error_naming_the_entry():
    res = _run("ReturnsAList", CASES[0])
    assert res.status == "error"
    assert "failed in backward: TypeError: backward returned list, expected a dict with dx, dweight, dbias" in res.message


def test_unloadable_kernel_is_an_error_not_an_exception():
    res = run_replica_case(ReplicaKernel(name="missing", spec="replica_kernels:NoSuchKernel"), CASES[0])
    assert res.status == "error" and "loading the kernel" in res.message and "NoSuchKernel" in res.message


def test_torch_composition_peer_passes_and_torch_refuses_cpu_sync():
    # torch as a peer (conformance/adapters/torch_replicas.py): its CPU ops composed as SyncBatchNorm
    # does, on the plan with four replicas and the cancellation values
    torch = pytest.importorskip("torch")
    res = run_replica_case(ReplicaKernel(name="torch", spec="conformance.adapters.torch_replicas:composition"),
                           CASES[3])
    assert res.status == "passed", res.message
    # the primitive SyncBatchNorm uses has no CPU kernel in this torch (what the adapter's docstring says)
    with pytest.raises((NotImplementedError, RuntimeError)):
        torch.batch_norm_stats(torch.randn(4, 3, 5), 1e-5)
