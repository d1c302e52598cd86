"""Shards of a run: a deterministic 1/N of the selected cases, balanced by expected cost.

A port's whole gate (every op, dtype and tier of several kernels) can outgrow one CI runner.
`refnorm check ... --shard K/N` runs shard K of N; `refnorm merge` (conformance.run.merge) puts
the N results documents back together into the document the unsharded run would have written.

Expected cost of a case, in element passes (COST_MODEL)::

    cost = passes(mode) * (numel(x) + OVERHEAD) + replicas * REPLICA_START,
           passes = 2 in train mode (forward and backward), 1 in eval mode,
           replicas = the processes of a multi-replica case (0 for the others)

OVERHEAD = 2**15 element passes stands for what a case costs whatever its size: a round trip to
the worker process, input generation, the oracle's and the bounds' fixed costs. Measured on a
2-core CPU machine: a case of the NumPy float32 layer norm of tests/harness_kernels.py costs
about 0.01 s plus 1.4 us per element, one of the torch CPU batch norm adapter about 0.08 s plus
0.8 us per element, so the fixed part is 7,000 to 100,000 elements' worth; eval-mode cases took
about half the time of train-mode cases of the same shape. The model ignores the dtype and the
kernel (a case the kernel's declaration skips costs almost nothing): a shard's cost is an
estimate, and the assignment depends on the cases alone. Where an earlier run of the kernel
exists, ``durations`` (measured_costs) balances by its measured case times instead.

Assignment (RULE): cases are taken in order of decreasing cost (ties by id). Each case ranks
the shards by a hash of (shard, case id) (rendezvous hashing, Thaler & Ravishankar 1998, from
memory) and goes to the first shard in its ranking whose load stays within the capacity

    capacity = max(ceil(total * (1 + SLACK) / N), largest case cost),   SLACK = 1/50

or, when none has room, to the least loaded shard (lowest index on a tie). The result:

- deterministic: integer costs, sha256 hashes and sorted orders; no dict order, hash
  randomization, clock or machine enters it, so every CI job computes the same cut;
- balanced: no shard exceeds the capacity unless no shard had room, so the largest shard's
  cost is at most 1.02 times max(mean, largest case) in practice;
- stable: a case stays on its preferred shard unless that shard is full, so removing (or
  adding) one case moves few others: 3% of the cases on average, at most 11%, over the
  standard tier of each op with 1 and 3 dtypes at N = 2, 3, 4, 8 (benchmarks/shard_balance.py).
  Longest-processing-time greedy assignment (Graham 1969, from memory) balances slightly
  better (within 1% of the best) but moves 35% of the cases on average and up to 48%, since
  every later case sees other loads; pure rendezvous hashing moves none but ignores cost
  (max/mean up to 3.3, two long-reduction cases on one shard). The trade-off chosen: balance
  within 2% of the best possible, stability close to hashing's.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from typing import Any, Mapping, Sequence

from ..cases.model import Case

__all__ = ["RULE", "COST_MODEL", "OVERHEAD", "REPLICA_START", "SLACK", "case_cost", "assign", "Shard", "cut", "selection_digest",
           "durations_of", "measured_costs", "read_durations", "shard_of", "shard_label", "shard_lines", "balance"]

#: Name and version of the assignment rule and cost model; a merge refuses shards cut by another.
RULE = "refnorm.shards/1"
#: Fixed cost of any case, in element passes (see the module docstring for the measurements).
OVERHEAD = 2 ** 15
#: Capacity of a shard above the mean load, as a fraction (numerator, denominator): exact integers.
SLACK = (1, 50)
#: Fixed cost of each replica process of a multi-replica case (start-up, imports, joining the process
#: group): measured here at 1 to 2 s per replica on the 2-core machine, about 2**20 element passes.
REPLICA_START = 2 ** 20
COST_MODEL = (f"passes(mode) * (numel + {OVERHEAD}) + replicas * {REPLICA_START}; passes: train 2, eval 1; "
              "replicas: 0 for a single-process case")


def case_cost(case: Case) -> int:
    """Expected cost of running ``case``, in element passes (COST_MODEL)."""
    passes = 2 if case.mode == "train" else 1
    return passes * (case.numel + OVERHEAD) + len(case.shards) * REPLICA_START


def _rank(case_id: str, count: int) -> list[int]:
    """The shards (0-based) in the order this case prefers them: by sha256 of (shard, id), highest first."""
    def weight(k: int) -> bytes:
        return hashlib.sha256(f"{k}\x00{case_id}".encode("utf-8", "surrogatepass")).digest()

    return sorted(range(count), key=lambda k: (weight(k), -k), reverse=True)


def assign(ids: Sequence[str], costs: Sequence[int], count: int) -> list[int]:
    """The shard (1-based) of each case, in the order given; see the module docstring (RULE)."""
    if len(ids) != len(costs):
        raise ValueError(f"{len(ids)} ids but {len(costs)} costs")
    if count < 1:
        raise ValueError(f"count is {count}, expected at least 1")
    if count == 1:
        return [1] * len(ids)
    total = sum(costs)
    num, den = SLACK
    capacity = max(-(-total * (den + num) // (den * count)), max(costs, default=0))
    loads = [0] * count
    out = [0] * len(ids)
    for i in sorted(range(len(ids)), key=lambda i: (-costs[i], ids[i])):
        for k in _rank(ids[i], count):
            if loads[k] + costs[i] <= capacity:
                break
        else:
            k = min(range(count), key=lambda j: (loads[j], j))
        loads[k] += costs[i]
        out[i] = k + 1
    return out


def durations_of(doc: Mapping[str, Any]) -> dict[str, float]:
    """Measured seconds per case id (``duration_s``) from a results document (an earlier run of the same
    kernel: a baseline, say): finite values >= 0 only."""
    out: dict[str, float] = {}
    for c in doc.get("cases", []):
        d = c.get("duration_s")
        if isinstance(d, (int, float)) and not isinstance(d, bool) and 0 <= d < float("inf"):
            out[c["id"]] = float(d)
    return out


def measured_costs(cases: Sequence[Case], durations: Mapping[str, float], source: str) -> tuple[list[int], str]:
    """Costs in microseconds from measured durations (durations_of), and the description of that cost model.

    A case the durations do not hold costs what the model (case_cost) says, scaled to seconds by the ratio
    of the measured to the modelled cost of the cases they do hold. Without any usable duration, the model.
    """
    model = [case_cost(c) for c in cases]
    known = [(durations[c.id], m) for c, m in zip(cases, model) if c.id in durations]
    seconds, units = sum(d for d, _ in known), sum(m for _, m in known)
    if not known or seconds <= 0 or units <= 0:
        return model, COST_MODEL
    per_unit = seconds / units
    costs = [round((durations[c.id] if c.id in durations else m * per_unit) * 1e6) for c, m in zip(cases, model)]
    unseen = len(cases) - len(known)
    return costs, (f"measured: duration_s in microseconds from {source}; {unseen} case(s) not in it by "
                   f"{COST_MODEL} at {per_unit:.3g} s per unit")


def selection_digest(ids: Sequence[str]) -> str:
    """sha256 of the selected case ids, one per line, in order: the identity of a run's selection."""
    h = hashlib.sha256()
    for cid in ids:
        h.update(cid.encode("utf-8", "surrogatepass") + b"\n")
    return h.hexdigest()


@dataclass(frozen=True)
class Shard:
    """Shard ``index`` of ``count`` of a selection: its cases, and the record a results document keeps."""

    index: int
    count: int
    cases: tuple[Case, ...]
    record: dict[str, Any]


def cut(cases: Sequence[Case], index: int, count: int, *, durations: Mapping[str, float] | None = None,
        durations_source: str = "") -> Shard:
    """Shard ``index`` (1-based) of ``count`` of the selected ``cases`` (in selection order).

    With ``durations`` (seconds per case id of an earlier run, durations_of) the cases are balanced by
    measured time (measured_costs) instead of the model. The record (a results document's ``run.shard``,
    docs/results-schema.json) names the whole selection and the cost model, so that a merge can check
    that N documents are the shards of one run and name the cases a missing shard would have held.
    """
    if not 1 <= index <= count:
        raise ValueError(f"shard {index}/{count}: expected 1 <= K <= N")
    ids = [c.id for c in cases]
    if durations is not None:
        costs, model = measured_costs(cases, durations, durations_source or "an earlier run")
    else:
        costs, model = [case_cost(c) for c in cases], COST_MODEL
    where = assign(ids, costs, count)
    loads = [0] * count
    for k, c in zip(where, costs):
        loads[k - 1] += c
    mine = tuple(c for c, k in zip(cases, where) if k == index)
    record = {
        "index": index,
        "count": count,
        "rule": RULE,
        "cost_model": model,
        "selected": len(ids),
        "selection_sha256": selection_digest(ids),
        "selection": ids,
        "assignment": where,
        "costs": loads,
    }
    return Shard(index=index, count=count, cases=mine, record=record)


def read_durations(path: str) -> tuple[dict[str, float], str]:
    """The measured durations of a results file (read by conformance.documents: exit 2 on a bad one) and a
    name for it that every CI job computes alike: its sha256, not its path."""
    import os

    from ..documents import read

    doc = read(path)
    with open(os.fspath(path), "rb") as f:
        digest = hashlib.sha256(f.read()).hexdigest()
    return durations_of(doc), f"a results file of sha256 {digest[:16]}"


def shard_of(doc: Mapping[str, Any]) -> Mapping[str, Any] | None:
    """The ``run.shard`` record of a results document, or None for a whole run."""
    run = doc.get("run") or {}
    shard = run.get("shard")
    return shard if isinstance(shard, Mapping) else None


def shard_label(doc: Mapping[str, Any]) -> str:
    """'shard 2/3' for a shard's document, '' for a whole run."""
    s = shard_of(doc)
    return f"shard {s['index']}/{s['count']}" if s else ""


def shard_lines(doc: Mapping[str, Any]) -> list[str]:
    """For a shard's document: what it covers, and that its verdict is not the whole run's."""
    s = shard_of(doc)
    if not s:
        return []
    mine = sum(1 for k in s.get("assignment", []) if k == s["index"])
    return [f"{shard_label(doc)} only: {mine} of the {s['selected']} selected case(s). This verdict is the "
            f"shard's, not the run's: the run's verdict is that of `refnorm merge` over all {s['count']} shards' "
            "results."]


def balance(cases: Sequence[Case], count: int) -> dict[str, float]:
    """How even the cut is: the largest shard's cost over the mean, and the best any cut can do
    (the largest case, or the mean, over the mean)."""
    costs = [case_cost(c) for c in cases]
    where = assign([c.id for c in cases], costs, count)
    loads = [0] * count
    for k, c in zip(where, costs):
        loads[k - 1] += c
    mean = sum(costs) / count
    return {"max_over_mean": max(loads) / mean if mean else 1.0,
            "best_over_mean": max(max(costs, default=0), mean) / mean if mean else 1.0}
