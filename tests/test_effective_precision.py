"""Effective precision (conformance.effective_precision): kernels of known precision read as that
precision, declared or not; the correctly rounded fraction; torch CPU's bfloat16 sums.

Significand widths (implicit bit included): binary32 24, binary16 11 (IEEE 754-2019 §3.3);
bfloat16 8 (from memory: the 16 upper bits of binary32, 7 stored fraction bits; ml_dtypes.finfo says so,
nmant = 7). Tolerance: 2 bits. Why: the fit reads the worst error at the probabilistic model's one-sigma
scale (Higham & Mary 2019, Thm 2.4, theorem number from memory: lam sqrt(n) u sum|t| with lam = 8 = 2^3 the bound's margin), so
a worst error at the bound itself reads 3 bits low and one at a third of a sigma about 1.6 bits high;
the worst of a few hundred near-Gaussian errors lies at 2-3 sigma (common practice), 1-1.6 bits below
the full bound: 2 bits covers it. Measured: within 0.9 bit for every dbias (below).
"""

from __future__ import annotations

import pytest

from conformance import dtypes, ops
from conformance.cases import catalog
from conformance.results import build_document
from conformance.run.execute import execute_case
from conformance.summary import verdict_lines

from described_kernels import rounded_oracle
from numerics_kernels import SequentialParamSums

TOL = 2.0
BITS = {"bfloat16": 8, "float16": 11, "float32": 24}


def _doc(kernel, op, dtype):
    res = [execute_case(kernel, c, 0) for c in catalog([op], [dtype], "smoke")]
    return build_document(kernel.declaration(), {}, res, True, env={})


def _rows(doc):
    return {r["output"]: r for r in doc["effective_precision"]}


@pytest.mark.parametrize("op", ["layer_norm", "batch_norm"])
@pytest.mark.parametrize("acc", ["bfloat16", "float16", "float32"])
def test_sums_of_known_precision(op, acc):
    """dweight and dbias summed recursively in ``acc`` (every partial sum rounded: Higham 2002, §4.1),
    everything else in float32: dbias (a plain sum) reads as acc's significand within TOL, declared
    (output_accumulate) or not, and both readings agree; a declared dweight (a sum of products of
    float32 terms) too where its sums are narrower than float32 (in float32 its allowance is mostly that
    of the terms dy xhat and the statistics, which the model counts at their worst: it reads 26.6 bits).
    The significand is that of ml_dtypes.finfo / np.finfo (nmant + 1)."""
    p = int(dtypes.finfo(acc).nmant) + 1
    assert p == BITS[acc]  # IEEE 754-2019 §3.3; bfloat16 from memory, as above
    declared = SequentialParamSums(op, "float32", acc).kernel(
        f"sums in {acc}", precision={"output_accumulate": {"dweight": acc, "dbias": acc}})
    undeclared = SequentialParamSums(op, "float32", acc).kernel(f"sums in {acc}, undeclared")
    d, u = _rows(_doc(declared, op, "float32")), _rows(_doc(undeclared, op, "float32"))
    assert d["dbias"]["declared_bits"] == p and u["dbias"]["declared_bits"] == 24
    for rows in (d, u):
        assert abs(rows["dbias"]["effective_bits"] - p) <= TOL, rows["dbias"]
    if acc != "float32":  # there dweight's allowance is mostly that of its float32 terms dy xhat, not of the sum
        assert abs(d["dweight"]["effective_bits"] - p) <= TOL, d["dweight"]
    assert abs(d["dbias"]["effective_bits"] - u["dbias"]["effective_bits"]) <= 0.5


def test_undeclared_bfloat16_sums_are_read_below_the_declaration():
    """A float32 claim for bfloat16 sums: dbias behaves like 8 bits, 16 below the declared 24, and the
    terminal says "behaves like" for it (the reviewer's reading of the target's real numerics)."""
    k = SequentialParamSums("layer_norm", "float32", "bfloat16").kernel("bf16 sums claimed float32")
    doc = _doc(k, "layer_norm", "float32")
    r = _rows(doc)["dbias"]
    assert r["declared_bits"] - r["effective_bits"] >= 16 - TOL
    assert any("dbias: behaves like arithmetic with" in line for line in verdict_lines(doc))


@pytest.mark.parametrize("dtype", ["bfloat16", "float16"])
def test_correctly_rounded_outputs(dtype):
    """The oracle rounded once (Higham 2002, §2.2): 100% correctly rounded, and no error beyond the
    final rounding, so the arithmetic's precision is not resolved (None), never guessed."""
    rows = _rows(_doc(rounded_oracle(ops.get("layer_norm"), dtype), "layer_norm", dtype))
    assert set(rows) == {"y", "dx", "dweight", "dbias"}
    for r in rows.values():
        assert r["correctly_rounded"] == 1.0 and r["effective_bits"] is None


def test_float64_outputs_have_no_correctly_rounded_fraction():
    """The float64 oracle is not a correctly rounded reference for float64 outputs: the fraction is None."""
    rows = _rows(_doc(rounded_oracle(ops.get("layer_norm"), "float64"), "layer_norm", "float64"))
    assert rows and all(r["correctly_rounded"] is None for r in rows.values())


def test_torch_cpu_bfloat16_layer_norm_dbias_reads_as_bfloat16_sums():
    """torch CPU's bfloat16 layer norm sums dweight and dbias in bfloat16 per thread block
    (docs/library-precision.md, "Layer norm, dweight and dbias": torch's dbias bit for bit) and rounds y
    once from float32 arithmetic (cr 100% there, on other shapes): dbias reads as 8 bits within TOL, and
    y is correctly rounded in at least 99% of elements."""
    pytest.importorskip("torch")
    from conformance.adapters import torch_cpu

    doc = _doc(torch_cpu.layer_norm(), "layer_norm", "bfloat16")
    rows = _rows(doc)
    assert abs(rows["dbias"]["effective_bits"] - 8) <= TOL, rows["dbias"]
    assert rows["y"]["correctly_rounded"] >= 0.99


def test_report_and_terminal_show_both_sections(tmp_path):
    """The Markdown and HTML reports carry the rounding-bias and effective-precision tables; the terminal
    the effective precision of each output."""
    from conformance.report.html import render_html
    from conformance.report.markdown import render_markdown

    k = SequentialParamSums("layer_norm", "float32", "bfloat16").kernel("bf16 sums claimed float32")
    doc = _doc(k, "layer_norm", "float32")
    md = render_markdown(doc)
    assert "**Rounding bias.**" in md and "**Effective precision.**" in md
    html = render_html(doc, [])
    assert 'id="effective-precision-table"' in html and 'id="rounding-bias-table"' in html
    lines = verdict_lines(doc)
    shown = [x for x in lines if "behaves like arithmetic" in x or "not resolved" in x]
    assert len(shown) == len(doc["effective_precision"]) == 6  # y, mean, rstd, dx, dweight, dbias
