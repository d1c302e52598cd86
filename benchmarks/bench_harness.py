"""Harness speed: the standard tier for one op and one dtype, overhead, small cases, cost against size.

Targets: the standard tier for one op and one dtype on a fast kernel under 60 s with 2 workers on a
2-core machine (harness issue); harness overhead (everything but the kernel's and the oracle's own
compute: inputs, bounds, comparison, diagnosis, transport) under 25% of case time on that tier, and
small cases (12x96 layer norm) at least 100 per second with 2 workers (issue 11); cost linear in the
elements checked. Measured side by side in one run; this is a benchmark, never a timed test.

    python benchmarks/bench_harness.py [--kernel SPEC] [--dtype float32] [--workers 2] [--small N] [--json PATH]
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
from conformance.run import execute as _execute  # noqa: E402
from conformance.run.execute import execute_case  # noqa: E402
from conformance.run.pool import WorkerPool  # noqa: E402
from conformance.run.runner import select_cases  # noqa: E402

#: The steps of a case timed by the in-process breakdown (conformance/run/execute.py names them).
STEPS = ("make_inputs", "case_beyond_range", "_kernel_outputs", "oracle_expected", "case_bounds", "compare_output",
         "invariant_violations", "judged")


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


def breakdown(spec: str, dtype: str) -> dict:
    """The standard tier in this process, one case after another: seconds per step of a case (the
    functions of STEPS wrapped with a timer), the kernel's and the oracle's time as the results record
    them, and the rest."""
    kernel = load_kernel(spec)
    cases = select_cases(kernel, RunOptions(tier="standard", dtypes=(dtype,)))
    spent = dict.fromkeys(STEPS, 0.0)
    saved = {name: getattr(_execute, name) for name in STEPS}

    def timed(name, f):
        def g(*a, **kw):
            t0 = time.perf_counter()
            try:
                return f(*a, **kw)
            finally:
                spent[name] += time.perf_counter() - t0
        return g

    for c in cases[:2]:  # the kernel's and the libraries' first calls are not what is measured
        execute_case(kernel, c, seed=0)
    for name, f in saved.items():
        setattr(_execute, name, timed(name, f))
    try:
        kernel_s = oracle_s = case_s = 0.0
        for c in cases:
            r = execute_case(kernel, c, seed=0)
            kernel_s, oracle_s, case_s = kernel_s + r.kernel_s, oracle_s + r.oracle_s, case_s + r.duration_s
    finally:
        for name, f in saved.items():
            setattr(_execute, name, f)
    spent = {k: round(v, 3) for k, v in spent.items()}
    return {"cases": len(cases), "case_s": round(case_s, 3), "kernel_s": round(kernel_s, 3),
            "oracle_s": round(oracle_s, 3), "steps_s": spent,
            "overhead_fraction_of_cases": round(1 - (kernel_s + oracle_s) / case_s, 3)}


def small_cases(spec: str, workers: int, n: int) -> dict:
    """``n`` distinct 12x96 float32 layer-norm cases (eps varied to keep their ids apart) over a pool of
    ``workers``: cases per second from the first result to the last, and over the whole run with the
    workers' start."""
    kernel = load_kernel(spec)
    cases = [Case("layer_norm", "float32", (12, 96), "trailing", norm_ndim=1, eps=1e-5 * (1 + i / 4096))
             for i in range(n)]
    stamps: list[float] = []
    statuses: dict[str, int] = {}

    def done(r) -> None:
        stamps.append(time.perf_counter())
        statuses[r.status] = statuses.get(r.status, 0) + 1

    t0 = time.perf_counter()
    WorkerPool(kernel, seed=0, workers=workers, spec=spec).run(cases, done)
    wall = time.perf_counter() - t0
    steady = (len(stamps) - 1) / (stamps[-1] - stamps[0]) if len(stamps) > 1 else 0.0
    return {"cases": n, "workers": workers, "statuses": statuses, "wall_s": round(wall, 2),
            "start_s": round(stamps[0] - t0, 2) if stamps else None,
            "steady_per_s": round(steady, 1), "overall_per_s": round(n / wall, 1)}


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
    ap.add_argument("--small", type=int, default=400, help="small cases for the throughput figure (default 400)")
    ap.add_argument("--json", help="write the figures here")
    args = ap.parse_args(argv)
    t = tier_run(args.kernel, args.dtype, args.workers)
    print(f"standard tier, {t['kernel']} {t['dtype']}: {t['cases']} cases in {t['wall_s']} s with "
          f"{t['workers']} workers (target < 60 s); verdict {t['verdict']}")
    print(f"  per-case time {t['sum_case_s']} s = kernel {t['kernel_s']} s + oracle {t['oracle_s']} s + harness; "
          f"harness overhead {100 * t['overhead_fraction_of_cases']:.1f}% of case time, "
          f"{100 * t['overhead_fraction_of_busy_time']:.1f}% of worker busy time (target < 25% of case time)")
    b = breakdown(args.kernel, args.dtype)
    print(f"  in this process, one case after another: case time {b['case_s']} s = kernel {b['kernel_s']} s + "
          f"oracle {b['oracle_s']} s + harness; overhead {100 * b['overhead_fraction_of_cases']:.1f}%")
    print("    steps (s): " + ", ".join(f"{k} {v}" for k, v in b["steps_s"].items()))
    sm = small_cases("conformance.adapters.torch_cpu:layer_norm", args.workers, args.small)
    if args.kernel != "conformance.adapters.torch_cpu:layer_norm":
        print("  (small cases always run torch-cpu layer_norm: the figure is of the harness)")
    print(f"  small cases (12x96 layer norm float32, {sm['workers']} workers): {sm['steady_per_s']} per second "
          f"from the first result on, {sm['overall_per_s']} per second with the {sm['start_s']} s start "
          f"(target >= 100 per second); statuses {sm['statuses']}")
    rows = scaling(args.kernel, args.dtype)
    print("  cost against size (one case, in-process, best of 3):")
    for r in rows:
        print(f"    {r['elements']:>9d} elements  {r['seconds']:.4f} s  {r['ns_per_element']:.1f} ns/element")
    big = rows[-3:]
    slope = math.log(big[-1]["seconds"] / big[0]["seconds"]) / math.log(big[-1]["elements"] / big[0]["elements"])
    print(f"  log-log slope over the three largest sizes: {slope:.2f} (1.0 is linear)")
    if args.json:
        Path(args.json).write_text(json.dumps({"tier": t, "breakdown": b, "small": sm, "scaling": rows, "slope": slope}, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
