"""How evenly `--shard K/N` cuts a selection, and how stable the cut is as the catalog changes.

For the standard tier of each op (float32 alone, and float16 + bfloat16 + float32), at N = 2, 3, 4, 8:

- max/mean: the largest shard's expected cost over the mean (conformance.run.shards.COST_MODEL);
  best: what no cut can beat, max(mean, largest case) / mean;
- moved: the fraction of the other cases that change shard when one case leaves the selection
  (averaged over every third case), the measure of stability;

for refnorm's rule (bounded-load rendezvous hashing) beside the two textbook rules it sits between:
longest-processing-time greedy (LPT: best balance, poor stability) and plain rendezvous hashing
(perfect stability, no balance by cost).

With ``--results DOC.json`` (an unsharded run's results document) it also sums each shard's measured
case durations (duration_s), so the cost model can be judged against real times:

    python benchmarks/shard_balance.py [--results results.json] [--json PATH]

Asserts nothing: a benchmark, never a timed test.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from conformance import ops  # noqa: E402
from conformance.cases import catalog  # noqa: E402
from conformance.cases.model import Case  # noqa: E402
from conformance.run.shards import assign, case_cost  # noqa: E402

NS = (2, 3, 4, 8)
DTYPE_SETS = (("float32",), ("float16", "bfloat16", "float32"))


def lpt(ids, costs, n):
    loads, out = [0] * n, [0] * len(ids)
    for i in sorted(range(len(ids)), key=lambda i: (-costs[i], ids[i])):
        k = min(range(n), key=lambda j: (loads[j], j))
        loads[k] += costs[i]
        out[i] = k + 1
    return out


def rendezvous(ids, costs, n):
    def w(cid, k):
        return hashlib.sha256(f"{k}\x00{cid}".encode()).digest()

    return [max(range(n), key=lambda k: (w(cid, k), -k)) + 1 for cid in ids]


RULES = {"refnorm": assign, "lpt": lpt, "rendezvous": rendezvous}


def figures(cases: list[Case], n: int, rule) -> dict:
    ids, costs = [c.id for c in cases], [case_cost(c) for c in cases]
    where = rule(ids, costs, n)
    loads = [0] * n
    for k, c in zip(where, costs):
        loads[k - 1] += c
    mean = sum(costs) / n
    before = dict(zip(ids, where))
    moved = kept = 0
    for j in range(0, len(ids), 3):
        rest_ids, rest_costs = ids[:j] + ids[j + 1:], costs[:j] + costs[j + 1:]
        after = rule(rest_ids, rest_costs, n)
        moved += sum(before[i] != k for i, k in zip(rest_ids, after))
        kept += len(rest_ids)
    return {"max_over_mean": max(loads) / mean, "best_over_mean": max(max(costs), mean) / mean,
            "moved": moved / kept if kept else 0.0}


def measured(doc: dict) -> list[dict]:
    """Per N: the sum of measured case durations of each shard of refnorm's cut, max over mean."""
    from conformance.cases import find_case

    cases = [Case.from_dict(c["case"]) if "case" in c else find_case(c["id"]) for c in doc["cases"]]
    secs = [float(c.get("duration_s") or 0.0) for c in doc["cases"]]
    out = []
    for n in NS:
        where = assign([c.id for c in cases], [case_cost(c) for c in cases], n)
        loads = [0.0] * n
        for k, s in zip(where, secs):
            loads[k - 1] += s
        mean = sum(loads) / n
        out.append({"n": n, "shard_seconds": [round(x, 3) for x in loads],
                    "max_over_mean": max(loads) / mean if mean else 1.0,
                    "best_over_mean": max(max(secs), mean) / mean if mean else 1.0})
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--results", metavar="DOC.json", help="an unsharded run's results: also its measured balance")
    ap.add_argument("--json", metavar="PATH", help="write the figures here")
    args = ap.parse_args()
    rows = []
    print(f"{'op':14s} {'dtypes':9s} {'cases':>5s}  " + "  ".join(
        f"N={n}: max/mean (best) moved [lpt moved, rdv max/mean]" if n == NS[0] else f"N={n}" for n in NS))
    for op in ops.OPS:
        for dts in DTYPE_SETS:
            cases = catalog([op], dts, "standard")
            cells = []
            for n in NS:
                f = {name: figures(cases, n, rule) for name, rule in RULES.items()}
                rows.append({"op": op, "dtypes": list(dts), "cases": len(cases), "n": n, **{
                    f"{name}_{k}": v for name, d in f.items() for k, v in d.items()}})
                r = f["refnorm"]
                cells.append(f"{r['max_over_mean']:.3f} ({r['best_over_mean']:.3f}) {r['moved']:5.1%} "
                             f"[{f['lpt']['moved']:5.1%}, {f['rendezvous']['max_over_mean']:.2f}]")
            print(f"{op:14s} {'1 dtype' if len(dts) == 1 else '3 dtypes':9s} {len(cases):5d}  " + "  ".join(cells))
    out = {"cost_model": "conformance.run.shards.COST_MODEL", "rows": rows}
    if args.results:
        doc = json.loads(Path(args.results).read_text())
        out["measured"] = measured(doc)
        print(f"\nmeasured on {args.results} ({doc['kernel']['name']}, {len(doc['cases'])} cases): "
              "seconds per shard of refnorm's cut")
        for m in out["measured"]:
            print(f"  N={m['n']}: max/mean {m['max_over_mean']:.2f} (best {m['best_over_mean']:.2f}) "
                  f"{m['shard_seconds']}")
    if args.json:
        Path(args.json).write_text(json.dumps(out, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
