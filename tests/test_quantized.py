"""Quantized y for every op: the declaration, the cases, the comparison, the seeded bugs and hostile kernels.

The reference for y_q is the oracle's y, correctly rounded (IEEE 754-2019 §4.3.1, ties to even) to the
format's levels after division by the kernel's scale (refnorm.quantize, itself checked against the OCP
8-bit floating point specification's encodings and ml_dtypes in tests/test_quantize.py); the reference
for a dynamic scale is amax / q_max of the oracle's y (common practice in 8-bit recipes, from memory).
"""

from __future__ import annotations

import json
from dataclasses import replace

import numpy as np
import pytest

from conformance import Kernel
from conformance.cases import catalog, find_case
from conformance.cases.model import Case
from conformance.documents import check as check_document
from conformance.kernel import KernelError
from conformance.levels import level_lines
from conformance.quantization import Quantization
from conformance.quantized import level_histogram
from conformance.run import RunOptions, run_check
from conformance.run.execute import execute_case
from refnorm import quantize as rq

from quant_bugs import QUANT_BUGS, QuantNorm

OPS = ("batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm")
FORMATS = tuple(rq.QFORMATS)


def _run(kernel: Kernel, spec: str | None = None, **kw) -> dict:
    """The run; with ``spec`` its workers are spawned from it (torch's CPU kernels can deadlock in a worker
    forked after the test process ran torch ops: conformance/report/peers.py)."""
    return run_check(kernel, RunOptions(tier=kw.pop("tier", "standard"), workers=2, **kw), spec=spec, quiet=True)


def _failing(doc: dict) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for c in doc["cases"]:
        for o in c["outputs"]:
            if not o["passed"]:
                out.setdefault(o["name"], []).append(c["id"])
    return out


# ---------------------------------------------------------------- the declaration
def _qk(q, outputs=("y_q", "scale", "mean", "rstd")):
    return QuantNorm("layer_norm", Quantization("float8_e4m3fn")).kernel("q").__class__(
        name="q", op="layer_norm", forward=lambda **kw: None, outputs=outputs, quantization=q)


@pytest.mark.parametrize("q, outputs, match", [
    (Quantization("float4_e2m1"), ("y_q", "scale"), "quantization.format"),
    (Quantization("int8", scale="per_channel"), ("y_q", "scale"), "quantization.scale"),
    (Quantization("int8", overflow="nonsaturating"), ("y_q", "scale"), "int8 has no NaN"),
    (Quantization("int8", overflow="clip"), ("y_q", "scale"), "quantization.overflow"),
    (Quantization("float8_e5m2", rounding="stochastic"), ("y_q", "scale"), "stochastic"),
    (Quantization("float8_e5m2", rounding="up"), ("y_q", "scale"), "quantization.rounding"),
    (Quantization("float8_e5m2", scale_format="int32"), ("y_q", "scale"), "scale_format"),
    (Quantization("float8_e5m2", scale_from="somewhere"), ("y_q", "scale"), "scale_from"),
    (Quantization("float8_e5m2", amax_floor=0.0), ("y_q", "scale"), "amax_floor"),
    (Quantization("float8_e5m2", amax_floor=float("nan")), ("y_q", "scale"), "amax_floor"),
    (Quantization("float8_e5m2", amax_floor=True), ("y_q", "scale"), "amax_floor"),
    (Quantization("float8_e5m2", scale="static", scale_from="before_weight"), ("y_q",), "scale_from"),
    (Quantization("float8_e5m2"), ("y_q",), "does not list \\['scale'\\]"),
    (Quantization("float8_e5m2"), ("y", "mean"), "does not list \\['y_q', 'scale'\\]"),
    (Quantization("float8_e5m2", scale="static"), ("y_q", "scale"), "scale is static"),
    (Quantization("float8_e5m2"), ("scale", "y_q"), "begin with"),
    (Quantization("float8_e5m2"), ("mean", "y_q", "scale"), "begin with"),
    ("float8_e5m2", ("y_q", "scale"), "expected a conformance.Quantization"),
    (None, ("y_q", "scale"), "declares no quantization"),
])
def test_hostile_declarations_fail_at_construction(q, outputs, match):
    # A bad declaration fails when the Kernel is built, naming the field (docs/kernel-interface.md).
    with pytest.raises(KernelError, match=match):
        Kernel(name="q", op="layer_norm", forward=lambda **kw: None, outputs=outputs, quantization=q)


def test_good_declarations_and_the_record():
    k = Kernel(name="q", op="rms_norm", forward=lambda **kw: None, outputs=("y", "y_q", "scale", "rstd"),
               quantization=Quantization("int8", scale="row"))
    assert k.declaration()["quantization"]["format"] == "int8"
    k2 = Kernel(name="q", op="layer_norm", forward=lambda **kw: None, outputs=("y_q", "mean"),
                quantization=Quantization("float8_e4m3fn", scale="static", overflow="nonsaturating"))
    assert k2.declaration()["quantization"]["scale"] == "static"
    with pytest.raises(KernelError, match="needs a forward"):
        Kernel(name="q", op="layer_norm", backward=lambda **kw: None, outputs=("y_q", "scale"),
               quantization=Quantization("int8"))


# ---------------------------------------------------------------- cases and ids
def test_unquantized_catalog_is_unchanged_and_quantized_cases_come_after():
    for op in OPS:
        plain = catalog([op], ["float32"], "standard")
        both = catalog([op], ["float32"], "standard", quantized=True)
        assert [c.id for c in both[:len(plain)]] == [c.id for c in plain]
        extra = both[len(plain):]
        assert extra and all(c.out in FORMATS for c in extra)
        assert all("out" not in c.as_dict() and "scale" not in c.as_dict() for c in plain)
        for c in extra:
            assert c.id.endswith(f"/out={c.out},scale={c.scale}")
            assert Case.from_dict(c.as_dict()) == c
        for fmt in FORMATS:
            for sc in ("tensor", "row", "static", "static_overflow"):
                assert any(c.out == fmt and c.scale == sc for c in extra)


def test_find_case_reads_a_quantized_id():
    c = catalog(["group_norm"], ["bfloat16"], "standard", quantized=True)[-1]
    assert find_case(c.id) == c
    with pytest.raises(KeyError):
        find_case(c.id.rsplit("scale=", 1)[0] + "scale=diagonal")


def test_cases_skip_with_a_reason_where_the_declaration_differs():
    q = QuantNorm("layer_norm", Quantization("float8_e4m3fn", scale="row")).kernel("q")
    plain = catalog(["layer_norm"], ["float32"], "smoke")[0]
    quant = [c for c in catalog(["layer_norm"], ["float32"], "smoke", quantized=True) if c.out]
    assert "only the quantized cases" in execute_case(q, plain, 0).message
    other = next(c for c in quant if c.out == "int8")
    assert "output format int8" in execute_case(q, other, 0).message
    other = next(c for c in quant if c.out == "float8_e4m3fn" and c.scale == "tensor")
    assert "scale=tensor" in execute_case(q, other, 0).message
    from seeded_bugs import NumpyNorm

    unq = NumpyNorm("layer_norm").kernel("plain")
    r = execute_case(unq, quant[0], 0)
    assert r.status == "skipped" and "declares no quantization" in r.message


# ---------------------------------------------------------------- correct kernels pass
@pytest.mark.parametrize("op", OPS)
def test_correct_kernel_passes_every_op(op):
    # The correct kernel (one rounding from float32 to the format) is within the bound on every quantized case.
    for q in (Quantization("float8_e4m3fn", scale="row"), Quantization("int8", scale="static")):
        doc = _run(QuantNorm(op, q).kernel("q"))
        assert doc["verdict"] in ("conformant", "inconclusive"), _failing(doc)
        assert doc["counts"]["passed"] > 0 and not doc["counts"]["failed"]
        check_document(json.loads(json.dumps(doc)))  # the document follows docs/results-schema.json


@pytest.mark.parametrize("fmt", FORMATS)
def test_correct_kernel_every_mode(fmt):
    modes = [Quantization(fmt, scale=s) for s in ("tensor", "row")]
    modes += [Quantization(fmt, scale="static", overflow=o) for o in ("saturate", "nonsaturating") if
              not (fmt == "int8" and o == "nonsaturating")]
    modes.append(Quantization(fmt, scale="tensor", scale_from="before_weight", scale_format="bfloat16"))
    for q in modes:
        doc = _run(QuantNorm("rms_norm", q).kernel("q"))
        assert not doc["counts"]["failed"] and not doc["counts"]["error"], (q, _failing(doc))
        assert any(o.get("levels") for c in doc["cases"] for o in c["outputs"])


def test_levels_are_counted_against_the_correctly_rounded_level():
    # A kernel one level up on the first element of every row: exactly one element per row off, by +1
    # (IEEE 754-2019 §3.4: the next encoding in sign-magnitude order is the next level). The bound of a
    # correct kernel is half a level plus the propagated error, so the kernel fails where that error is small.
    class OneUp(QuantNorm):
        def _round(self, t):
            q = super()._round(t).copy()
            b = q.view(np.uint8)
            first = b[..., 0]
            ok = (first & 0x7F) < 0x7E
            first[ok] = np.where(first[ok] & 0x80, first[ok] - 1, first[ok] + 1)  # away from zero... then toward +
            return q

    q = Quantization("float8_e4m3fn", scale="row")
    k = OneUp("layer_norm", q).kernel("one up")
    case = next(c for c in catalog(["layer_norm"], ["float32"], "standard", quantized=True)
                if c.out == q.format and c.scale == "row" and c.values == "normal" and c.strides == "contiguous"
                and c.weight == "random")
    r = execute_case(k, case, 0)
    yq = next(o for o in r.outputs if o["name"] == "y_q")
    rows = int(np.prod(case.shape[:-1]))
    lv = yq["levels"]
    assert lv["off_level"] <= rows and lv["off_level"] >= rows - 2  # a row whose first level is the top is left
    assert set(lv["hist"]) <= {"0", "+1", "-1"} and lv["max_levels"] == 1
    assert lv["compared"] == case.numel
    assert not yq["passed"]


def test_level_histogram_bins():
    assert level_histogram(np.array([0, 0, 1, -1, 2, 3, -5])) == {"0": 2, "+1": 1, "+2-3": 2, "-1": 1, "-4-7": 1}


# ---------------------------------------------------------------- seeded bugs
@pytest.mark.parametrize("op", ("layer_norm", "group_norm"))
@pytest.mark.parametrize("bug", QUANT_BUGS, ids=lambda b: b.name)
def test_seeded_bug_is_caught_on_its_output(bug, op):
    buggy = _run(bug.cls(op, bug.q).kernel(bug.name))
    fails = _failing(buggy)
    assert buggy["verdict"] == "not conformant"
    assert bug.fails in fails, fails
    assert bug.clean not in fails, fails
    assert set(fails) <= {"y_q", "scale"}, fails  # the statistics are untouched
    # the hypotheses do not model quantized outputs: each failed one says so rather than staying silent
    # (docs/diagnosis.md, "What it does not do")
    texts = {o["diagnosis"]["text"].split(":")[0] for c in buggy["cases"] for o in c["outputs"] if not o["passed"]}
    assert texts == {f"no diagnosis of {n}" for n in fails}, texts
    if bug.where:
        assert all(cid.endswith(tuple(f"scale={w}" for w in bug.where)) for cid in fails[bug.fails])
    # the same code without the bug passes every case the buggy one failed
    twin = _run(QuantNorm(op, bug.q).kernel("twin"))
    assert not twin["counts"]["failed"], _failing(twin)
    failed_ids = {c["id"] for c in buggy["cases"] if c["status"] == "failed"}
    assert {c["id"] for c in twin["cases"] if c["status"] in ("passed", "inconclusive")} >= failed_ids


# ---------------------------------------------------------------- hostile kernels
class _Hostile(QuantNorm):
    """Correct except on the long case (more than 10^5 elements), where ``how`` breaks its return."""

    def __init__(self, op, q, how):
        super().__init__(op, q)
        self.how = how

    def forward(self, x, weight=None, bias=None, **kw):
        out = list(super().forward(x, weight, bias, **kw))
        if np.asarray(x).size <= 100_000:
            return tuple(out)
        if self.how == "yq_dtype":
            out[0] = out[0].astype(np.float32)
        elif self.how == "yq_shape":
            out[0] = out[0].reshape(-1)
        elif self.how == "scale_shape":
            out[1] = np.asarray(out[1]).reshape(1, -1)
        elif self.how == "scale_list":
            out[1] = [1.0, 2.0]
        elif self.how in ("nan", "zero", "negative"):
            s = np.array(out[1], copy=True)
            s.ravel()[0] = {"nan": np.nan, "zero": 0.0, "negative": -1.0}[self.how]
            out[1] = s
        elif self.how == "scale_none":
            out[1] = None
        return tuple(out)


@pytest.mark.parametrize("how, output, match", [
    ("yq_dtype", "y_q", "dtype float32, declared float8_e4m3fn"),
    ("yq_shape", "y_q", "shape"),
    ("scale_shape", "scale", "shape"),
    ("scale_list", "scale", "cannot read the returned list"),
    ("nan", "scale", "not finite and positive"),
    ("zero", "scale", "not finite and positive"),
    ("negative", "scale", "not finite and positive"),
    ("scale_none", "scale", "returned None"),
])
def test_hostile_returns_cost_one_case(how, output, match):
    q = Quantization("float8_e4m3fn", scale="row")
    doc = _run(_Hostile("rms_norm", q, how).kernel(how))
    bad = [c for c in doc["cases"] if c["status"] != "passed"]
    assert len(bad) == 1 and bad[0]["status"] == "failed", [(c["id"], c["status"]) for c in bad]
    assert match in bad[0]["message"] and output in bad[0]["message"]
    assert doc["counts"]["passed"] == len(doc["cases"]) - 1


# ---------------------------------------------------------------- the command line, report and torch
def test_cli_check_case_and_report(tmp_path, capsys):
    from conformance.cli import main

    spec = "conformance.adapters.torch_quantized:quantized?op=rms_norm,format=int8,scale=row"
    pytest.importorskip("torch")
    cid = next(c.id for c in catalog(["rms_norm"], ["float32"], "standard", quantized=True)
               if c.out == "int8" and c.scale == "row" and c.values == "heavy_tail")
    rc = main(["check", spec, "--dtype", "float32", "--case", cid, "--json", str(tmp_path / "r.json"),
               "--report", str(tmp_path / "rep")])
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "levels: float32 y_q (int8, scale=row)" in out
    doc = json.loads((tmp_path / "r.json").read_text())
    assert [c["id"] for c in doc["cases"]] == [cid]
    assert level_lines(doc)
    md = next((tmp_path / "rep").glob("*.md")).read_text()
    assert "on another level" in md and "quantization" in (tmp_path / "rep" / "report.html").read_text()


@pytest.mark.parametrize("op", ("layer_norm", "rms_norm", "batch_norm"))
def test_torch_compositions_pass(op):
    # torch's normalization, a scale and torch's cast, declared as torch_cpu declares the normalization and
    # with torch's measured overflow behaviour (tests/test_quantize.py::test_torch_cpu_float8_casts).
    pytest.importorskip("torch")
    from conformance.adapters.torch_quantized import quantized

    for fmt, sc in (("float8_e4m3fn", "static"), ("float8_e5m2", "tensor"), ("int8", "row")):
        spec = f"conformance.adapters.torch_quantized:quantized?op={op},format={fmt},scale={sc}"
        doc = _run(quantized(op=op, format=fmt, scale=sc), spec=spec, dtypes=("float32",))
        fails = _failing(doc)
        # torch's own finding on layer norm's large data (docs/library-precision.md: squares overflow float32)
        known = {cid for cids in fails.values() for cid in cids if op == "layer_norm" and "/large/" in cid}
        left = {n: [c for c in cids if c not in known] for n, cids in fails.items()}
        assert not any(left.values()), left
        assert not doc["counts"]["error"] and not doc["counts"]["crashed"]


def test_cases_command_lists_quantized_ids(capsys):
    from conformance.cli import main

    assert main(["cases", "--op", "rms_norm", "--tier", "smoke"]) == 0
    plain = capsys.readouterr().out.split()
    assert main(["cases", "--op", "rms_norm", "--tier", "smoke", "--quantized"]) == 0
    both = capsys.readouterr().out.split()
    assert both[:len(plain)] == plain and all("/out=" in i for i in both[len(plain):]) and len(both) > len(plain)


def test_pytest_plugin_runs_the_declared_quantized_cases(tmp_path):
    # The plugin takes its cases from the same selection as `refnorm check` (conformance.run.select_cases).
    pytest.importorskip("torch")
    from test_pytest_plugin import run_pytest

    spec = "conformance.adapters.torch_quantized:quantized?op=rms_norm,format=float8_e5m2,scale=static"
    r = run_pytest(tmp_path / "p", "--refnorm-kernel", spec, "--refnorm-tier", "smoke", "--collect-only", "-q")
    ids = [ln for ln in r.stdout.splitlines() if "::" in ln]
    assert ids and all(i.endswith(("out=float8_e5m2,scale=static", "out=float8_e5m2,scale=static_overflow"))
                       for i in ids), r.stdout[-2000:]


def test_y_beside_y_q_is_checked_too():
    # outputs ("y", "y_q", "scale", ...): y is compared as for any kernel, y_q and scale as quantized outputs.
    class WithY(QuantNorm):
        def forward(self, x, weight=None, bias=None, **kw):
            out = super().forward(x, weight, bias, **kw)
            return (self._y32.astype(np.float32),) + tuple(out)

    q = Quantization("float8_e4m3fn", scale="tensor")
    base = QuantNorm("layer_norm", q).kernel("q")
    k = replace(base, forward=WithY("layer_norm", q).forward, outputs=("y",) + base.outputs)
    doc = _run(k, tier="smoke")
    names = {o["name"] for c in doc["cases"] for o in c["outputs"]}
    assert {"y", "y_q", "scale", "mean", "rstd"} <= names
    assert not doc["counts"]["failed"], _failing(doc)


def test_peer_specs_pick_the_matching_composition():
    from conformance.quantized import peer_specs

    q = {"format": "int8", "scale": "row"}
    assert peer_specs("conformance.adapters.torch_cpu", "group_norm", q) == [
        "conformance.adapters.torch_quantized:quantized?op=group_norm,format=int8,scale=row"]
    assert peer_specs("conformance.adapters.keras_cpu", "group_norm", q) == []
    # the kernel under test is the composition itself, or the document names an unknown format: nothing to run
    assert peer_specs("conformance.adapters.torch_cpu", "group_norm", q,
                      "conformance.adapters.torch_quantized:quantized?op=group_norm") == []
    assert peer_specs("conformance.adapters.torch_cpu", "group_norm", {"format": "<x>", "scale": "row"}) == []


@pytest.mark.parametrize("fmt, overflow", [("float8_e4m3fn", "saturate"), ("float8_e4m3fn", "nonsaturating"),
                                           ("float8_e5m2", "nonsaturating"), ("int8", "saturate")])
def test_overflow_values_are_accepted_not_counted_as_error(fmt, overflow):
    # OCP 8-bit FP v1.0 (from memory) and IEEE 754-2019 §7.4: beyond the range a saturating conversion gives
    # +-q_max, a non-saturating one NaN (E4M3) or +-Inf (E5M2). A correct kernel's overflowed elements are
    # accepted under its declaration, with no error: the budget of a pass stays <= 1.
    q = Quantization(fmt, scale="static", overflow=overflow)
    doc = _run(QuantNorm("layer_norm", q).kernel("q"))
    over = [o for c in doc["cases"] if c["id"].endswith("static_overflow") for o in c["outputs"] if o["name"] == "y_q"]
    assert over and all(o["passed"] and float(o["budget_used"]) <= 1.0 for o in over)
    assert sum(sum(o["accepted"].values()) for o in over) > 0
