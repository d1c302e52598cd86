"""`make demo`: the Kestrel NPU team checks its layer-norm and batch-norm drafts.

Scenario (invented for the demo): an accelerator team ports layer norm and batch
norm with float16 storage and float32 accumulation. Draft 1 computes the
variance in one pass; refnorm fails it on the cancellation cases and says which
output, which case and by how much. Draft 2 computes it in two passes and passes.

Part two (examples/kestrel_fused.py): the team fuses the residual add, RMS norm and a per-token
float8_e4m3fn cast of y for the next matrix multiply. Draft 1 normalizes the float32 sum while it
stores (and declares) the bfloat16 h; refnorm fails it on the saved rstd, which the backward
reuses, although the float8 levels of y hide most of the difference. Draft 2 normalizes the stored
h and passes.

Where a C compiler built examples/c_kernel, the demo also checks that hand-written
C layer norm through the C ABI adapter; otherwise it says so and goes on.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from conformance.kernel import load_kernel  # noqa: E402
from conformance.results import CAUTION, as_float, write_json_atomic  # noqa: E402
from conformance.run import RunOptions, run_check  # noqa: E402
from conformance.summary import summary_table  # noqa: E402
from conformance.diagnosis import diagnosis_lines  # noqa: E402

DRAFTS = HERE / "kestrel_drafts.py"
FUSED = HERE / "kestrel_fused.py"


def _rel(p: Path) -> str:
    try:
        return str(p.resolve().relative_to(Path.cwd().resolve()))
    except ValueError:
        return str(p)


def _diagnosis(doc: dict) -> list[str]:
    """One line per failing output: the worst case, its error and how far over the bound."""
    worst: dict[str, tuple[float, dict, dict]] = {}
    for c in doc["cases"]:
        for o in c["outputs"]:
            if o["passed"]:
                continue
            b = as_float(o["budget_used"])
            if o["name"] not in worst or b > worst[o["name"]][0]:
                worst[o["name"]] = (b, c, o)
    lines = []
    for name, (b, c, o) in sorted(worst.items(), key=lambda kv: -kv[1][0]):
        n_fail = sum(1 for cc in doc["cases"] for oo in cc["outputs"] if oo["name"] == name and not oo["passed"])
        lines.append(f"  {name}: fails {n_fail} case(s); worst {c['id']}\n"
                     f"      max abs error {as_float(o['max_abs']):.3g} is {b:.3g}x its bound "
                     f"({as_float(o['worst_bound']):.3g} at that element)")
    return lines


def _peer_names(peers: dict | None) -> str:
    if not peers:
        return ""
    return ", ".join(lib["name"] for lib in peers.get("libraries", []) if lib.get("status") == "ran")


def _check(spec: str, out: Path, workers: int, tier: str, report: bool, peers_enabled: bool) -> dict:
    kernel = load_kernel(spec)
    print(f"\n=== {kernel.name}  ({kernel.notes})")
    doc = run_check(kernel, RunOptions(tier=tier, workers=workers, command=f"refnorm check {spec} --tier {tier}"),
                    spec=spec)
    stem = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in kernel.name).strip("_")
    path = write_json_atomic(out / f"{stem}.json", doc)
    print(summary_table(doc))
    print(f"verdict: {doc['verdict'].upper()}   results: {_rel(path)}")
    if doc["verdict"] != "conformant":
        print("diagnosis:")
        print("\n".join(_diagnosis(doc)))
        print("\n".join(diagnosis_lines(doc)))  # the likely cause per failing output (conformance.diagnosis)
    if report:
        try:
            rep = importlib.import_module("conformance.report")
        except ModuleNotFoundError:
            rep = None
        if rep is not None and hasattr(rep, "write_report"):
            rdir = out / f"{stem}-report"
            peers, note = rep.gather_peers(doc, peers_enabled, quiet=True)
            rep.write_report(doc, rdir, peers=peers, peers_note=note)
            print(f"report: {_rel(rdir)}/report.html (with {_peer_names(peers) or 'no reference libraries'})")
    return doc


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default="demo-out", help="folder for the results and reports")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--tier", default="standard")
    ap.add_argument("--no-report", action="store_true")
    ap.add_argument("--no-peers", action="store_true", help="do not run torch/Keras on the same cases for the reports")
    args = ap.parse_args(argv)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    print("The Kestrel NPU team ports layer norm and batch norm: float16 storage, float32 accumulation,")
    print("float32 weights and statistics; then a fused residual add + RMS norm whose output goes to")
    print("float8_e4m3fn with one scale per token. refnorm checks each draft against its float64 oracle.")
    specs = [f"{DRAFTS}:{name}" for name in
             ("layer_norm_draft1", "batch_norm_draft1", "layer_norm_draft2", "batch_norm_draft2")]
    specs += [f"{FUSED}:{name}" for name in ("add_rms_norm_fp8_draft1", "add_rms_norm_fp8_draft2")]
    c_kernel = HERE / "c_kernel" / "kernel.py"
    verdicts = {}
    for spec in specs:
        doc = _check(spec, out, args.workers, args.tier, not args.no_report, not args.no_peers)
        verdicts[doc["kernel"]["name"]] = doc["verdict"]
    if c_kernel.exists():
        try:
            doc = _check(f"{c_kernel}:layer_norm", out, args.workers, args.tier, not args.no_report, False)
            verdicts[doc["kernel"]["name"]] = doc["verdict"]
        except Exception as e:  # no compiler, or the library was not built
            print(f"\n(the C example kernel was not checked: {e})")
    else:
        print("\n(no C example kernel: the demo used the NumPy drafts only)")
    print("\n=== verdicts")
    for name, v in verdicts.items():
        print(f"  {name:36s} {v.upper()}")
    print(f"\nresults and reports: {_rel(out)}/")
    print("note: " + CAUTION)
    expected = {"kestrel layer_norm draft 1": "not conformant", "kestrel batch_norm draft 1": "not conformant",
                "kestrel layer_norm draft 2": "conformant", "kestrel batch_norm draft 2": "conformant",
                "kestrel add_rms_norm fp8 draft 1": "not conformant", "kestrel add_rms_norm fp8 draft 2": "conformant"}
    surprises = [n for n, v in expected.items() if verdicts.get(n) != v]
    if surprises:
        print(f"demo: unexpected verdicts for {', '.join(surprises)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
