"""Harness speed on quantized outputs: the quantized standard tier per op, dtype and declaration.

Target (issue "the kernels people write now"): the standard tier for quantized cases under 60 s per
op and dtype with 2 workers. The kernel is torch's normalization followed by torch's cast
(conformance.adapters.torch_quantized); a benchmark, never a timed test.

    python benchmarks/bench_quantized.py [--dtypes float32,bfloat16] [--workers 2] [--json PATH]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from conformance.kernel import load_kernel  # noqa: E402
from conformance.ops import OPS  # noqa: E402
from conformance.run import RunOptions, run_check  # noqa: E402

DECLARATIONS = (("float8_e4m3fn", "row"), ("float8_e5m2", "tensor"), ("int8", "static"))


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--dtypes", default="float32,bfloat16")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--json", default=None)
    a = ap.parse_args(argv)
    rows = []
    print(f"{'op':<14} {'dtype':<9} {'format':<14} {'scale':<7} {'cases':>5} {'wall s':>7}")
    for op in OPS:
        for dt in a.dtypes.split(","):
            for fmt, sc in DECLARATIONS:
                spec = f"conformance.adapters.torch_quantized:quantized?op={op},format={fmt},scale={sc}"
                k = load_kernel(spec)
                t0 = time.perf_counter()
                doc = run_check(k, RunOptions(tier="standard", dtypes=(dt,), workers=a.workers), spec=spec, quiet=True)
                wall = time.perf_counter() - t0
                n = sum(1 for c in doc["cases"] if c["status"] != "skipped")
                rows.append({"op": op, "dtype": dt, "format": fmt, "scale": sc, "cases": n, "wall_s": wall,
                             "verdict": doc["verdict"]})
                print(f"{op:<14} {dt:<9} {fmt:<14} {sc:<7} {n:>5} {wall:>7.1f}")
    if a.json:
        Path(a.json).write_text(json.dumps(rows, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
