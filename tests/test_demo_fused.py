"""The demo's fused drafts (examples/kestrel_fused.py, an invented scenario) get the verdicts the demo
tells: draft 1, which normalizes the float32 sum while it stores the bfloat16 h, fails on the saved
rstd (and what follows from it), never on h (the rounding it skips moves rstd by about 2^-9 relative, the bfloat16 unit roundoff: IEEE
754-2019 §4.3.1 with p = 8), and draft 2 passes every quantized case it ran."""

from __future__ import annotations

from pathlib import Path

from conformance.kernel import load_kernel
from conformance.run import RunOptions, run_check

FUSED = Path(__file__).resolve().parents[1] / "examples" / "kestrel_fused.py"


def _doc(name: str) -> dict:
    spec = f"{FUSED}:{name}"
    return run_check(load_kernel(spec), RunOptions(tier="standard", workers=2), quiet=True, spec=spec)


def test_fused_draft1_fails_on_the_saved_rstd():
    doc = _doc("add_rms_norm_fp8_draft1")
    assert doc["verdict"] == "not conformant"
    failing = {o["name"] for c in doc["cases"] for o in c["outputs"] if not o["passed"]}
    # rstd, and what is computed from it (the per-token scale, the gradients), not h, which it stores right
    assert "rstd" in failing and "h" not in failing, failing
    assert all("/out=float8_e4m3fn,scale=row" in c["id"] for c in doc["cases"])


def test_fused_draft2_passes():
    doc = _doc("add_rms_norm_fp8_draft2")
    assert doc["verdict"] == "conformant", [(c["id"], c["message"][:200]) for c in doc["cases"]]
    checked = {o["name"] for c in doc["cases"] for o in c["outputs"]}
    assert {"y_q", "scale", "h", "rstd", "dx", "dweight"} <= checked, checked
