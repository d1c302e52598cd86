"""Fixed dtype-default tolerances against the derived bounds: the comparison table.

Every row runs the `standard` tier of one kernel and one dtype three times on
the same cases, changing only the bound (RunOptions.overrides for the fixed
ones, |actual - expected| <= atol + rtol |expected| on every output):

    derived   the harness's derived bounds (conformance.tolerances)
    torch     torch.testing.assert_close's per-dtype defaults (torch/testing/_comparison.py,
              _DTYPE_PRECISIONS: float32 rtol 1.3e-6 atol 1e-5, float16 1e-3/1e-5,
              bfloat16 1.6e-2/1e-5), chosen by the format of each output
    guessed   atol = rtol = 1e-3 on every output (common practice)

Rows: the correct library kernels of conformance.adapters.torch_cpu (a case
failing a fixed rule but passing the derived bound is a false alarm) and the
seeded-bug kernels of tests/seeded_bugs.py (a case failing the derived bound
but passing a fixed rule is a miss). Prints one line per row:

    kernel  dtype  cases  failed: derived / torch / guessed  false alarms: torch / guessed  misses: torch / guessed

This is a benchmark script, not a test: it asserts nothing and takes minutes.

    python benchmarks/fixed_vs_derived.py [--ops layer_norm,batch_norm] [--bugs all|none|KEY,...] [--json PATH]
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from conformance.kernel import load_kernel  # noqa: E402
from conformance.run import RunOptions, run_check  # noqa: E402
from conformance.tolerances import output_dtype  # noqa: E402

OUTPUTS = ("y", "mean", "rstd", "running_mean", "running_var", "dx", "dweight", "dbias")
TORCH_DEFAULTS = {"float64": (1e-7, 1e-7), "float32": (1e-5, 1.3e-6), "float16": (1e-5, 1e-3),
                  "bfloat16": (1e-5, 1.6e-2)}
GUESSED = (1e-3, 1e-3)
DTYPES = ("float32", "float16", "bfloat16")


def _status(doc: dict) -> dict[str, str]:
    return {c["id"]: c["status"] for c in doc["cases"] if c["status"] != "skipped"}


def compare(kernel, dtype: str, spec: str | None, workers: int) -> dict:
    """Run the tier under the three rules; count failures, false alarms and misses."""
    prec = kernel.precision_for(dtype)
    rules = {
        "derived": {},
        "torch": {o: TORCH_DEFAULTS[output_dtype(o, prec)] for o in OUTPUTS},
        "guessed": {o: GUESSED for o in OUTPUTS},
    }
    st = {name: _status(run_check(kernel, RunOptions(tier="standard", dtypes=(dtype,), workers=workers,
                                                     overrides=ov), spec=spec, quiet=True))
          for name, ov in rules.items()}
    d = st["derived"]
    row = {"kernel": kernel.name, "dtype": dtype, "cases": len(d)}
    for name in rules:
        row[f"failed_{name}"] = sum(s != "passed" for s in st[name].values())
    for name in ("torch", "guessed"):
        row[f"false_alarms_{name}"] = sum(d[c] == "passed" and s != "passed" for c, s in st[name].items())
        row[f"misses_{name}"] = sum(d[c] != "passed" and s == "passed" for c, s in st[name].items())
    return row


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ops", default="batch_norm,layer_norm,group_norm,instance_norm,rms_norm",
                    help="torch_cpu ops to compare (comma-separated; empty for none)")
    ap.add_argument("--bugs", default="all", help="seeded bugs: all, none or comma-separated keys")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--json", metavar="PATH", help="also write the rows as JSON")
    a = ap.parse_args(argv)
    rows = []
    head = (f"{'kernel':44s} {'dtype':8s} {'cases':>5s}  failed d/t/g      false alarms t/g   misses t/g")
    print(head)
    print("-" * len(head))

    def show(r: dict) -> None:
        print(f"{r['kernel'][:44]:44s} {r['dtype']:8s} {r['cases']:5d}  "
              f"{r['failed_derived']:3d}/{r['failed_torch']:3d}/{r['failed_guessed']:3d}       "
              f"{r['false_alarms_torch']:3d}/{r['false_alarms_guessed']:3d}          "
              f"{r['misses_torch']:3d}/{r['misses_guessed']:3d}", flush=True)

    for op in [o for o in a.ops.split(",") if o]:
        spec = f"conformance.adapters.torch_cpu:{op}"
        k = load_kernel(spec)
        for dt in DTYPES:
            if dt in k.dtypes:
                rows.append(compare(k, dt, spec, a.workers))
                show(rows[-1])
    if a.bugs != "none":
        from seeded_bugs import BUGS

        keys = sorted(BUGS) if a.bugs == "all" else a.bugs.split(",")
        for key in keys:
            if key in ("null_weight_crash", "single_row_hang"):
                continue  # crashes and hangs fail under any bound
            b = BUGS[key]
            rows.append(compare(b.kernel, b.storage, None, a.workers))
            rows[-1]["kernel"] = f"seeded bug {key} ({b.op})"
            show(rows[-1])
    print("\nfalse alarm: fails the fixed rule, passes the derived bound (for a correct kernel);"
          "\nmiss: fails the derived bound, passes the fixed rule (for a buggy kernel)."
          "\nEvidence on these cases only, not a proof; sign-off on hardware remains the reviewer's.")
    if a.json:
        Path(a.json).write_text(json.dumps(rows, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
