"""Every registered op is handled by every consumer of the op descriptions (conformance.ops).

The tests enumerate the registry, so an op added to it that a consumer cannot serve (no cases
in a tier, inputs that do not match its shapes, an output without a bound, a report that does
not render, a declaration the kernel checks refuse) fails here, in `make test`, not for a user.
A source scan checks that no module of conformance/ outside the descriptions and the adapters
tests an op's name: what an op is lives in its description only (docs/adding-an-operation.md).
"""

from __future__ import annotations

import ast
import math
from dataclasses import replace
from pathlib import Path

import numpy as np

from described_kernels import rounded_oracle
import pytest

from conformance import dtypes, ops
from conformance.cases import TIERS, catalog, find_case, make_inputs
from conformance.cases.generators import group_index
from conformance.cases.model import DY_KINDS, RUNNING_VALUE_KINDS, STRIDE_KINDS, VALUE_KINDS
from conformance.kernel import ENTRY_POINTS, LAYOUTS, Conventions, Kernel, KernelError, Precision, call_with
from conformance.report.content import coverage_gaps
from conformance.report.html import render_html
from conformance.report.markdown import md as md_escape, render_markdown
from conformance.results import build_document
from conformance.run.execute import execute_case
from conformance.tolerances import OUTPUTS, derive_bounds

NAMES = ops.OPS
ROOT = Path(__file__).resolve().parents[1] / "conformance"
PARAM_KINDS = {"none", "random", "ones", "zero", "negative"}


def _plain(spec, dtype="float32"):
    """The smoke tier's first case: normal values, training mode, contiguous, the op's first layout."""
    c = catalog([spec.name], [dtype], "smoke")[0]
    assert (c.values, c.mode, c.running, c.strides, c.layout) == ("normal", "train", False, "contiguous",
                                                                 spec.axes.layouts[0])
    return c


# ------------------------------------------------------------------ the descriptions
def test_registry_lists_every_op_once_in_order():
    assert ops.OPS == tuple(ops.SPECS) and len(set(ops.OPS)) == len(ops.OPS)
    assert all(ops.get(n).name == n for n in ops.OPS)
    with pytest.raises(ValueError, match="expected one of batch_norm"):
        ops.get("batch_normalization")
    assert ops.find("batch_normalization") is None


@pytest.mark.parametrize("name", NAMES)
def test_description_uses_the_harness_vocabulary(name):
    spec = ops.get(name)
    assert set(spec.axes.layouts) <= set(LAYOUTS) | {"trailing"}
    assert set(spec.axes.strides) <= set(STRIDE_KINDS) and "contiguous" in spec.axes.strides
    assert set(spec.value_kinds) <= set(VALUE_KINDS) and set(spec.range_value_kinds) <= set(VALUE_KINDS)
    assert set(spec.dy_kinds) <= set(DY_KINDS) and set(spec.running_value_kinds) <= set(RUNNING_VALUE_KINDS)
    assert all(w in PARAM_KINDS and b in PARAM_KINDS for w, b in spec.param_kinds)
    assert spec.default_bias in PARAM_KINDS
    assert set(spec.outputs) <= set(OUTPUTS)
    assert set(spec.entry_points) <= set(ENTRY_POINTS)
    assert bool(spec.modes) == spec.has_eval and bool(spec.running_outputs) == spec.has_eval
    assert ("mean" in spec.saved) == spec.centered
    assert callable(spec.forward) and callable(spec.backward)


# ------------------------------------------------------------------ the catalog
@pytest.mark.parametrize("name", NAMES)
def test_catalog_serves_every_tier_and_dtype(name):
    spec = ops.get(name)
    for tier in TIERS:
        for dt in dtypes.FORMATS:
            cases = catalog([name], [dt], tier)
            assert cases, f"{tier}/{name}/{dt}: no cases"
            assert all(c.op == name and c.dtype == dt for c in cases)
            assert len({c.id for c in cases}) == len(cases)
    std = catalog([name], ["float32"], "standard")
    # What the report lists as absent must be what the catalog can run (report/content.py: coverage_gaps).
    assert {c.layout for c in std} == set(spec.axes.layouts)
    assert {c.strides for c in std} == set(spec.axes.strides)
    assert set(spec.value_kinds) | set(spec.range_value_kinds) <= {c.values for c in std}
    assert set(spec.dy_kinds) <= {c.dy for c in std}
    # More dy = 1 terms per parameter sum than float16's largest value (IEEE 754-2019 binary16: 65504).
    assert all(c.param_length > 65504 for c in std if c.dy == "ones")
    if spec.has_eval:
        assert set(spec.running_value_kinds) <= {c.running_values for c in std if c.mode == "eval"}
    assert {(m, r) for m, r, _ in spec.modes} <= {(c.mode, c.running) for c in std}
    assert any(c.group_length == 1 << 20 for c in std), "no long reduction (2^20 elements per statistic)"
    for c in (std[0], std[-1]):
        assert find_case(c.id) == c


# ------------------------------------------------------------------ inputs and views
@pytest.mark.parametrize("name", NAMES)
def test_inputs_match_the_description_shapes(name):
    spec = ops.get(name)
    cases = catalog([name], ["float16"], "smoke")
    for c in cases:
        inp = make_inputs(c, Precision(storage="float16", params="float32"), 3)
        view = spec.axes.view(c)
        assert inp["x"].shape == inp["dy"].shape == c.shape and inp["x"].dtype == np.float16
        for p in ("weight", "bias"):
            assert inp[p] is None or (inp[p].shape == spec.axes.param_shape(c) == view.param_shape)
        has_running = spec.has_eval and (c.mode == "eval" or c.running)
        for r in ("running_mean", "running_var"):
            assert (inp[r] is not None) == has_running
            assert inp[r] is None or inp[r].shape == view.param_shape
        # Every statistic groups group_length elements; the parameters' sums have param_length terms.
        counts = np.bincount(group_index(c).ravel())
        assert counts.size == math.prod(view.stat_shape) and np.all(counts == c.group_length)
        assert view.n == c.group_length and view.m == c.param_length
        assert math.prod(view.param_shape) * c.param_length == c.numel


@pytest.mark.parametrize("name", NAMES)
def test_description_shapes_are_the_oracle_shapes(name):
    # The oracle (refnorm) computes its statistics independently of the description: its shapes
    # must be the ones the description states.
    spec = ops.get(name)
    for c in catalog([name], ["float64"], "smoke")[:4]:
        inp = make_inputs(c, Precision(storage="float64"), 1)
        fwd = ops.oracle_forward(c, Conventions(), inp)
        bwd = ops.oracle_backward(c, Conventions(), inp)
        view = spec.axes.view(c)
        assert fwd.y.shape == bwd.dx.shape == c.shape
        assert fwd.rstd.shape == view.stat_shape and (fwd.mean is None) == (not spec.centered)
        assert bwd.dbias.shape == view.param_shape


# ------------------------------------------------------------------ kernel declarations and calls
@pytest.mark.parametrize("name", NAMES)
def test_kernel_checks_accept_a_minimal_and_a_full_declaration(name):
    spec = ops.get(name)

    def f(**kw):
        return kw["x"]

    if spec.replicas:
        # each replica runs a forward and a backward with fixed outputs (conformance.run.replicas)
        with pytest.raises(KernelError, match="have a forward and a backward"):
            Kernel(name="minimal", op=name, forward=f)
        with pytest.raises(KernelError, match="expected \\('mean', 'rstd'\\)"):
            Kernel(name="unsaved", op=name, forward=f, backward=f, updates_running=False)
        full = Kernel(name="full", op=name, outputs=("y", "mean", "rstd") + spec.running_outputs, forward=f,
                      backward=f, conventions=Conventions(saved=("mean", "rstd"), param_grads="local"))
        assert full.entry_points == spec.entry_points == ("forward", "backward")
        return
    with pytest.raises(KernelError, match="param_grads is 'local', but"):
        Kernel(name="local", op=name, forward=f, updates_running=False, conventions=Conventions(param_grads="local"))
    if spec.running_outputs:
        # A forward that returns running statistics must list them (conformance.kernel: never unchecked in silence).
        with pytest.raises(KernelError, match="they would go unchecked"):
            Kernel(name="minimal", op=name, forward=f)
        Kernel(name="minimal", op=name, forward=f, updates_running=False)
    else:
        Kernel(name="minimal", op=name, forward=f)
    full = Kernel(name="full", op=name, outputs=("y",) + spec.saved + spec.running_outputs,
                  conventions=Conventions(saved=spec.saved), **{e: f for e in spec.entry_points})
    assert full.entry_points == spec.entry_points
    if not spec.has_eval:
        with pytest.raises(KernelError, match=f"{name} has no eval mode"):
            Kernel(name="eval", op=name, forward=f, forward_eval=f)
    if not spec.centered:
        with pytest.raises(KernelError, match=f"{name} has no mean to save"):
            Kernel(name="mean", op=name, forward=f, conventions=Conventions(saved=("mean",)))


@pytest.mark.parametrize("name", NAMES)
def test_kernel_kwargs_carry_the_structural_arguments(name):
    spec = ops.get(name)
    c = _plain(spec)
    inp = make_inputs(c, Precision(), 0)
    for e in spec.entry_points:
        kw = ops.kernel_kwargs(c, e, inp)
        assert spec.kwargs(c).items() <= kw.items() and kw["x"] is inp["x"]
        assert ("training" in kw) == spec.has_eval


# ------------------------------------------------------------------ bounds
@pytest.mark.parametrize("name", NAMES)
def test_bounds_exist_for_every_output(name):
    spec = ops.get(name)
    conv = Conventions(saved=spec.saved)
    prec = Precision(storage="bfloat16", params="float32")
    m = _plain(spec, "bfloat16")
    cases = [(replace(m, running=spec.has_eval), spec.outputs)]
    if spec.has_eval:
        cases.append((replace(m, mode="eval"), ("y",) + spec.grads))
    for c, outputs in cases:
        inp = make_inputs(c, prec, 0)
        inp64 = ops.oracle_view(c, conv, {k: None if v is None else np.asarray(v).astype(np.float64)
                                          for k, v in inp.items()})
        fwd = ops.oracle_forward(c, conv, inp64)
        exp = ops.forward_outputs(c, conv, fwd, ("y",) + spec.saved, True)
        bwd = ops.oracle_backward(c, conv, inp64)
        exp.update(dx=bwd.dx, dweight=bwd.dweight, dbias=bwd.dbias)
        if spec.residual:  # the fused op's own outputs: h, and dh in dx (ops/residual.py)
            exp.update(h=inp64["h"], dx=bwd.dx + inp64["dh"])
        assert set(exp) == set(outputs), c.id
        bounds = derive_bounds(c, prec, conv, inp64, exp)
        assert set(bounds) == set(outputs)
        for k, b in bounds.items():
            assert b.values.shape == np.shape(exp[k]) and np.all(np.isfinite(b.values)) and np.all(b.values > 0), k


# ------------------------------------------------------------------ a run and its report
def _oracle_kernel(spec, dtype):
    """The rounded oracle of the description (tests/described_kernels.py)."""
    return rounded_oracle(spec, dtype)


@pytest.mark.parametrize("name", NAMES)
def test_a_run_reports(name):
    spec = ops.get(name)
    k = _oracle_kernel(spec, "float32")
    cases = catalog([name], ["float32"], "smoke")
    results = [execute_case(k, c, 0) for c in cases]
    assert [r.status for r in results] == ["passed"] * len(cases), [(r.id, r.message) for r in results]
    doc = build_document(k.declaration(), {"tier": "smoke", "dtypes": ["float32"]}, results, True)
    assert doc["verdict"] == "conformant"
    gaps = coverage_gaps(doc)
    assert gaps.longest_reduction == max(c.group_length for c in cases)
    md = render_markdown(doc)
    html = render_html(doc, ())
    assert md_escape(k.name) in md and f'data-op="{name}"' in html


# ------------------------------------------------------------------ no op names outside the descriptions
def _op_name_literals(source: str, names: tuple[str, ...]) -> list[tuple[int, str]]:
    """(line, code) of every string constant equal to an op name: comparisons, tuples, dict keys, calls."""
    hits = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Constant) and isinstance(node.value, str) and node.value in names:
            hits.append((node.lineno, node.value))
    return hits


def test_the_scan_sees_op_name_tests():
    names = ("batch_norm", "rms_norm")
    src = ('if op == "batch_norm": pass\n'
           'x = op in ("rms_norm", "other")\n'
           'd = {"batch_norm": 1}.get(op)\n'
           's = f"{op} is not batch_norm"  # a message is not a test\n')
    assert [line for line, _ in _op_name_literals(src, names)] == [1, 2, 3]


def test_no_module_outside_the_descriptions_names_an_op():
    found = []
    for path in sorted(ROOT.rglob("*.py")):
        rel = path.relative_to(ROOT)
        if rel.parts[0] in ("ops", "adapters"):
            continue
        found += [f"conformance/{rel}:{line}: {value!r}"
                  for line, value in _op_name_literals(path.read_text(encoding="utf-8"), ops.OPS)]
    assert not found, ("op names outside conformance/ops/ and conformance/adapters/ (add a field to the op's "
                       "description instead; docs/adding-an-operation.md):\n" + "\n".join(found))


def test_report_of_an_op_this_version_does_not_know():
    # A results document from a newer harness may name an op this one has no description of: the report
    # still renders, and judges none of that op's layouts, modes or reduction lengths (it cannot).
    spec = ops.get("batch_norm")
    k = _oracle_kernel(spec, "float32")
    results = [execute_case(k, c, 0) for c in catalog(["batch_norm"], ["float32"], "smoke")[:2]]
    doc = build_document(k.declaration(), {"tier": "smoke", "dtypes": ["float32"]}, results, True)
    doc["kernel"]["op"] = "future_norm"
    gaps = coverage_gaps(doc)
    assert gaps.layouts_undeclared == [] and gaps.modes_absent == [] and gaps.longest_reduction is None
    assert md_escape("future_norm") in render_markdown(doc)  # Markdown shows text escaped
