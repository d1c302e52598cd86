"""Harness speed: the standard tier for one op and one dtype, overhead, and cost against size.

Targets (issue "conformance harness"): the standard tier for one op and one dtype on a fast
kernel under 60 s with 2 workers on a 2-core machine; harness overhead (everything but the
kernel's and the oracle's own compute) under 50% of the total; cost linear in the elements
checked. Measured side by side in one run; this is a benchmark, never a timed test.

    python benchmarks/bench_harness.py [--kernel SPEC] [--dtype float32] [--workers 2] [--json PATH]
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from conformance.cases import Case  # noqa: E402
from conformance.kernel import load_kernel  # noqa: E402
from conformance.run import RunOptions, run_check  # noqa: E402
from conformance.run.execute import execute_case  # noqa: E402


def tier_run(spec: str, dtype: str, workers: int) -> dict:
    kernel = load_kernel(spec)
    t0 = time.perf_counter()
    doc = run_check(kernel, RunOptions(tier="standard", dtypes=(dtype,), workers=workers), spec=spec, quiet=True)
    wall = time.perf_counter() - t0
    ran = [c for c in doc["cases"] if c["status"] != "skipped"]
    case_s = sum(c["duration_s"] for c in ran)
    kernel_s = sum(c["kernel_s"] for c in ran)
    oracle_s = sum(c["oracle_s"] for c in ran)
    # Busy time of the workers is wall * workers; what is neither kernel nor oracle is overhead
    # (inputs, bounds, comparison, process start, transport, scheduling).
    busy = wall * workers
    return {
        "kernel": kernel.name, "op": kernel.op, "dtype": dtype, "workers": workers, "cases": len(ran),
        "verdict": doc["verdict"], "wall_s": round(wall, 2), "sum_case_s": round(case_s, 2),
        "kernel_s": round(kernel_s, 2), "oracle_s": round(oracle_s, 2),
        "overhead_fraction_of_cases": round(1 - (kernel_s + oracle_s) / case_s, 3),
        "overhead_fraction_of_busy_time": round(1 - (kernel_s + oracle_s) / busy, 3),
    }


def scaling(spec: str, dtype: str, reps: int = 3) -> list[dict]:
    """Time one case per size in-process; cost per element should stay flat (linear cost)."""
    kernel = load_kernel(spec)
    rows = []
    for k in (12, 14, 16, 18, 20, 22):
        n = 2**k
        case = Case(kernel.op, dtype, (4, n // 4), "trailing", norm_ndim=1) if kernel.op in ("layer_norm", "rms_norm") \
            else Case(kernel.op, dtype, (4, 8, n // 32), "channels_first", groups=4 if kernel.op == "group_norm" else 0)
        best = math.inf
        for _ in range(reps):
            t0 = time.perf_counter()
            r = execute_case(kernel, case, seed=0)
            best = min(best, time.perf_counter() - t0)
        assert r.status == "passed", r.message
        rows.append({"elements": n, "seconds": round(best, 5), "ns_per_element": round(best / n * 1e9, 1)})
    return rows


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--kernel", default="conformance.adapters.torch_cpu:layer_norm")
    ap.add_argument("--dtype", default="float32")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--json", help="write the figures here")
    args = ap.parse_args(argv)
    t = tier_run(args.kernel, args.dtype, args.workers)
    print(f"standard tier, {t['kernel']} {t['dtype']}: {t['cases']} cases in {t['wall_s']} s with "
          f"{t['workers']} workers (target < 60 s); verdict {t['verdict']}")
    print(f"  per-case time {t['sum_case_s']} s = kernel {t['kernel_s']} s + oracle {t['oracle_s']} s + harness; "
          f"harness overhead {100 * t['overhead_fraction_of_cases']:.1f}% of case time, "
          f"{100 * t['overhead_fraction_of_busy_time']:.1f}% of worker busy time (target < 50%)")
    rows = scaling(args.kernel, args.dtype)
    print("  cost against size (one case, in-process, best of 3):")
    for r in rows:
        print(f"    {r['elements']:>9d} elements  {r['seconds']:.4f} s  {r['ns_per_element']:.1f} ns/element")
    big = rows[-3:]
    slope = math.log(big[-1]["seconds"] / big[0]["seconds"]) / math.log(big[-1]["elements"] / big[0]["elements"])
    print(f"  log-log slope over the three largest sizes: {slope:.2f} (1.0 is linear)")
    if args.json:
        Path(args.json).write_text(json.dumps({"tier": t, "scaling": rows, "slope": slope}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
