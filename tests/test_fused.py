"""Fused residual add + norm (add_layer_norm, add_rms_norm) and RMS norm's weight offset.

Against outside references: torch float64 compositions (x + residual, F.layer_norm / F.rms_norm,
autograd) for the oracle; exact rational arithmetic (fractions) for the rounding of h (IEEE
754-2019 §4.3.1, roundTiesToEven); Figueroa 1995 for double rounding. Against the harness: the
seeded bugs of tests/fused_kernels.py are caught on their own outputs and their correct twins pass
(the method of tests/test_detection.py); hostile declarations and returns cost one case or are
refused at load.
"""

from __future__ import annotations

from fractions import Fraction
from functools import lru_cache

import ml_dtypes
import numpy as np
import pytest

import refnorm
from conformance import Conventions, Kernel, KernelError
from conformance.cases import catalog
from conformance.run import RunOptions, run_check
from conformance.tolerances.residual import h_rounds_once

import fused_kernels as fk

MARGIN = 10.0  # as tests/test_detection.py: a bug exceeds its bound at least this many times somewhere
U64 = np.finfo(np.float64).eps / 2


# ---------------------------------------------------------------- the oracle against torch
@pytest.mark.parametrize("op,offset", [("add_layer_norm", 0.0), ("add_rms_norm", 0.0), ("add_rms_norm", 1.0)])
@pytest.mark.parametrize("with_bias", [False, True])
def test_oracle_matches_torch_float64(op, with_bias, offset):
    """torch float64: h = x + residual (+ residual_bias), y = F.layer_norm/F.rms_norm(h) (scale offset +
    weight for RMS norm), gradients by autograd of sum(y dy) + sum(h dh): dx = dresidual includes dh."""
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(7)
    shape, ns = (3, 5, 24), (24,)
    x, r, dy, dh = (rng.standard_normal(shape) for _ in range(4))
    w, b, rb = (rng.standard_normal(ns) for _ in range(3))
    rb = rb if with_bias else None
    kw = {"weight_offset": offset} if op == "add_rms_norm" else {}
    fwd = getattr(refnorm, f"{op}_forward")(x, r, ns, w, b, residual_bias=rb, eps=1e-5, **kw)
    bwd = getattr(refnorm, f"{op}_backward")(dy, x, r, ns, w, dh=dh, residual_bias=rb, eps=1e-5, **kw)
    t = {k: torch.tensor(v, dtype=torch.float64, requires_grad=True) for k, v in
         dict(x=x, r=r, w=w, b=b, **({"rb": rb} if with_bias else {})).items()}
    h = t["x"] + t["r"] + (t["rb"] if with_bias else 0.0)
    F = torch.nn.functional
    y = F.layer_norm(h, ns, t["w"], t["b"], 1e-5) if op == "add_layer_norm" else \
        F.rms_norm(h, ns, offset + t["w"], 1e-5) + t["b"]
    ((y * torch.tensor(dy)).sum() + (h * torch.tensor(dh)).sum()).backward()
    tol = 64 * U64  # float64 against float64: a few roundings of O(1) values (common practice)
    np.testing.assert_allclose(fwd.y, y.detach().numpy(), rtol=0, atol=tol * 10)
    if with_bias:  # three terms: torch rounds twice, the oracle's h is the exact sum rounded once
        np.testing.assert_allclose(fwd.h, h.detach().numpy(), rtol=4 * U64, atol=4 * U64)
    else:  # two float64 terms: both are fl(x + residual), IEEE 754-2019 §4.3.1
        np.testing.assert_array_equal(fwd.h, h.detach().numpy())
    for mine, theirs in ((bwd.dx, t["x"].grad), (bwd.dresidual, t["r"].grad), (bwd.dweight, t["w"].grad),
                         (bwd.dbias, t["b"].grad)):
        np.testing.assert_allclose(mine, theirs.numpy(), rtol=0, atol=tol * 100)
    if with_bias:
        np.testing.assert_allclose(bwd.dresidual_bias, t["rb"].grad.numpy(), rtol=0, atol=tol * 100)


def test_weight_offset_is_a_shifted_weight():
    """Gemma-style RMS norm (from memory): y = x r (1 + w) equals rms_norm with weight 1 + w, computed
    independently in torch float64 (F.rms_norm)."""
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(3)
    x, w = rng.standard_normal((6, 40)), 0.1 * rng.standard_normal(40)
    mine = refnorm.rms_norm_forward(x, (40,), w, weight_offset=1.0).y
    theirs = torch.nn.functional.rms_norm(torch.tensor(x), (40,), torch.tensor(1.0 + w), 1e-6).numpy()
    np.testing.assert_allclose(mine, theirs, rtol=0, atol=64 * U64)
    with pytest.raises(refnorm.RefnormError, match="weight_offset"):
        refnorm.rms_norm_forward(x, (40,), w, weight_offset=float("nan"))
    with pytest.raises(refnorm.RefnormError, match="weight_offset"):
        refnorm.rms_norm_forward(x, (40,), w, weight_offset="1")


# ---------------------------------------------------------------- the rounding of h
def _round_exact(value: Fraction, dt) -> float:
    """The number of format dt nearest the rational value, ties to the even significand (IEEE 754-2019
    §4.3.1), by exact comparison with its two neighbours."""
    a = np.array(float(value), np.float64).astype(dt)
    bits = a.view(np.uint16)
    cands = [a]
    for step in (-1, 1):
        n = (bits.astype(np.int32) + (step if float(a) >= 0 else -step)).astype(np.uint16).view(dt)
        if np.isfinite(float(n)):
            cands.append(n)
    best = min(cands, key=lambda c: (abs(Fraction(float(c)) - value), int(c.view(np.uint16)) & 1))
    return float(best)


@pytest.mark.parametrize("fmt", ["bfloat16", "float16"])
def test_h_is_the_exact_sum_rounded_once(fmt):
    """residual_stream's h rounded to the storage format equals the exactly computed rational sum rounded
    once (fractions), on three-term sums built to sit on and next to midpoints."""
    dt = np.dtype(getattr(ml_dtypes, fmt)) if fmt == "bfloat16" else np.dtype(np.float16)
    rng = np.random.default_rng(11)
    x = rng.standard_normal(4000).astype(dt)
    r = (rng.standard_normal(4000) * 2.0 ** rng.integers(-20, 4, 4000)).astype(dt)
    rb = (rng.standard_normal(4000) * 2.0 ** -30).astype(np.float32)  # breaks ties x + r would leave
    # x + r on a midpoint: r = half an ulp of x
    ulp = np.spacing(x.astype(np.float32)).astype(np.float64) * (2.0 ** (23 - (7 if fmt == "bfloat16" else 10)))
    r[:500] = (0.5 * ulp[:500]).astype(dt)
    _, hn = refnorm.residual_stream(x, r, rb, h_format=fmt)
    for i in range(0, 4000, 7):
        exact = Fraction(float(x[i])) + Fraction(float(r[i])) + Fraction(float(rb[i]))
        assert hn[i] == _round_exact(exact, dt), (i, float(x[i]), float(r[i]), float(rb[i]))


@pytest.mark.parametrize("fmt,wide", [("bfloat16", "float32"), ("float16", "float32"), ("float32", "float64")])
def test_double_rounding_of_two_terms_is_innocuous(fmt, wide):
    """Figueroa 1995, Theorem 1: with p' >= 2p + 2, fl_p(fl_p'(a + b)) = fl_p(a + b) for p-bit a, b; what
    the h bound assumes (conformance/tolerances/residual.py), checked on exponent gaps up to 40."""
    assert h_rounds_once(fmt, wide)
    assert not h_rounds_once("float32", "bfloat16") and h_rounds_once("bfloat16", "bfloat16")
    dt = np.dtype(getattr(ml_dtypes, fmt)) if fmt == "bfloat16" else np.dtype(fmt)
    rng = np.random.default_rng(5)
    a = rng.standard_normal(20000).astype(dt)
    b = (rng.standard_normal(20000) * 2.0 ** rng.integers(-40, 2, 20000)).astype(dt)
    twice = (a.astype(wide) + b.astype(wide)).astype(dt)
    _, once = refnorm.residual_stream(a, b, h_format=fmt)
    np.testing.assert_array_equal(twice.astype(np.float64), once)


# ---------------------------------------------------------------- the harness
def _run(kernel: Kernel, storage: str, ids: tuple[str, ...] = (), spec: str | None = None) -> dict:
    return run_check(kernel, RunOptions(tier="standard", dtypes=(storage,), workers=2, case_ids=ids), quiet=True,
                     spec=spec)


@lru_cache(maxsize=None)
def _doc(key: str) -> dict:
    spec = BUGS[key]
    return _run(fk.fused(spec[0], spec[1], spec[2], spec[3], spec[4], **spec[5]), spec[1])


def _failing(doc: dict) -> dict[str, float]:
    out: dict[str, float] = {}
    for c in doc["cases"]:
        for o in c["outputs"]:
            if not o["passed"]:
                b = o["budget_used"]
                out[o["name"]] = max(out.get(o["name"], 0.0), float("inf") if isinstance(b, str) else b)
    return out


#: key -> (op, storage, params, offset, class, declared conventions), the outputs it must fail, those it
#: cannot touch.
BUGS = {
    "unrounded_h": ("add_rms_norm", "bfloat16", None, 0.0, fk.UnroundedH, {}),
    "unrounded_h_layer": ("add_layer_norm", "float16", "float32", 0.0, fk.UnroundedH, {}),
    "dh_dropped": ("add_layer_norm", "float32", None, 0.0, fk.DhDropped, {}),
    "offset_twice": ("add_rms_norm", "bfloat16", None, 1.0, fk.OffsetTwice, {}),
}
EXPECT = {
    "unrounded_h": (("y",), ("h", "dbias")),
    "unrounded_h_layer": (("y", "mean", "rstd"), ("h", "dbias")),
    "dh_dropped": (("dx",), ("y", "h", "mean", "rstd", "dweight", "dbias")),
    "offset_twice": (("y", "dx"), ("h", "rstd", "dweight", "dbias")),
}


@pytest.mark.parametrize("key", sorted(BUGS))
def test_fused_bug_is_caught_on_its_output(key):
    doc = _doc(key)
    fails = _failing(doc)
    must, clean = EXPECT[key]
    assert doc["verdict"] == "not conformant"
    for name in must:
        assert fails.get(name, 0.0) >= MARGIN, f"{key}: {name} fails only {fails.get(name)}x; failing: {fails}"
    for name in clean:
        assert name not in fails, f"{key}: {name} failed ({fails[name]}x) but the bug cannot touch it"
    op, st, params, offset, _, declared = BUGS[key]
    failed = tuple(c["id"] for c in doc["cases"] if c["status"] == "failed")
    ok = _run(fk.fused(op, st, params, offset, fk.NumpyAddNorm, **declared), st, failed)
    assert ok["verdict"] == "conformant" and ok["counts"]["passed"] == len(failed), ok["counts"]


@pytest.mark.parametrize("op,storage,params,offset,declared", [
    ("add_rms_norm", "bfloat16", None, 1.0, {}),
    ("add_rms_norm", "float32", None, 0.0, {}),
    ("add_layer_norm", "float16", "float32", 0.0, {}),
    ("add_layer_norm", "bfloat16", None, 0.0, {}),
])
def test_correct_fused_kernels_pass(op, storage, params, offset, declared):
    doc = _run(fk.fused(op, storage, params, offset, **declared), storage)
    assert doc["verdict"] == "conformant", [(c["id"], c["message"][:200]) for c in doc["cases"]
                                            if c["status"] != "passed"]
    assert doc["counts"]["passed"] == len(catalog([op], [storage], "standard"))
    ids = [c["id"] for c in doc["cases"]]
    assert any("/rbias/" in i for i in ids)  # the three-term sums ran
    checked = {o["name"] for c in doc["cases"] for o in c["outputs"]}
    assert {"y", "h", "dx", "dweight"} <= checked


def test_normalizing_the_unrounded_sum_declared_so_passes():
    """The same code as the unrounded_h bug, declared h_format="accumulate", is a correct kernel."""
    doc = _run(fk.fused("add_rms_norm", "bfloat16", cls=fk.UnroundedH, h_format="accumulate"), "bfloat16")
    assert doc["verdict"] == "conformant", doc["counts"]


def test_offset_rms_norm_kernel_passes_and_the_undeclared_offset_fails():
    impl = fk.NumpyOffsetRMS("rms_norm", "bfloat16")
    assert _run(impl.kernel("offset rms"), "bfloat16")["verdict"] == "conformant"
    undeclared = impl.kernel("offset rms, not declared", conventions={"weight_offset": 0.0})
    fails = _failing(_run(undeclared, "bfloat16"))
    assert fails.get("y", 0.0) >= MARGIN and "dweight" not in fails


def test_kernel_h_is_what_y_is_checked_against():
    """A kernel whose h is rounded twice in the storage format on the three-term cases, declared so
    (output_accumulate h = storage): h passes under its two-rounding bound and y, the normalization of
    that h, passes too (y is checked against the norm of the h it passed on)."""
    class TwiceRounded(fk.NumpyAddNorm):
        def _sum_h(self, x, residual, residual_bias):
            st = np.asarray(x).dtype
            h = (np.asarray(x).astype(np.float32) + np.asarray(residual).astype(np.float32)).astype(st)
            if residual_bias is not None:
                h = (h.astype(np.float32) + np.asarray(residual_bias).astype(np.float32)).astype(st)
            return h.astype(np.float32)

    k = TwiceRounded("add_layer_norm", "bfloat16").kernel("twice", precision={"output_accumulate": {"h": "bfloat16"}})
    doc = _run(k, "bfloat16", tuple(c.id for c in catalog(["add_layer_norm"], ["bfloat16"]) if c.residual_bias))
    assert doc["verdict"] == "conformant", [(c["id"], c["message"][:300]) for c in doc["cases"]]


# ---------------------------------------------------------------- hostile declarations and returns
@pytest.mark.parametrize("op,conv,match", [
    ("layer_norm", {"h_format": "accumulate"}, "adds no residual"),
    ("add_rms_norm", {"h_format": "bogus"}, "h_format"),
    ("add_rms_norm", {"h_format": None}, "h_format"),
    ("layer_norm", {"weight_offset": 1.0}, "no weight-offset convention"),
    ("add_rms_norm", {"weight_offset": "1"}, "weight_offset"),
    ("add_rms_norm", {"weight_offset": True}, "weight_offset"),
    ("rms_norm", {"weight_offset": float("inf")}, "weight_offset"),
])
def test_bad_conventions_are_refused_at_load(op, conv, match):
    with pytest.raises(KernelError, match=match):
        Kernel(name="k", op=op, forward=lambda **kw: None, conventions=Conventions(**conv))


def test_h_is_an_output_of_the_fused_ops_only():
    with pytest.raises(KernelError, match="which the declaration does not produce"):
        Kernel(name="k", op="layer_norm", forward=lambda **kw: None, outputs=("y", "h"))
    k = Kernel(name="k", op="add_layer_norm", forward=lambda **kw: None, outputs=("y",))
    assert any(u["output"] == "h" for u in k.declaration()["unchecked"])


def test_a_wrong_h_costs_its_case_with_a_clear_message():
    """h of the wrong shape or dtype: the case fails on h (y still checked against the oracle's h), and the
    other cases of the run are untouched."""
    class BadH(fk.NumpyAddNorm):
        def forward(self, x, residual, weight=None, bias=None, **kw):
            y, h, *rest = super().forward(x, residual, weight, bias, **kw)
            return (y, h[:1] if h.shape[0] > 4 else h.astype(np.float64), *rest)

    doc = _run(BadH("add_rms_norm", "float32").kernel("bad h"), "float32")
    assert doc["verdict"] == "not conformant"
    by = {c["id"]: c for c in doc["cases"]}
    assert all(c["status"] in ("failed", "error") for c in by.values())
    msgs = " ".join(c["message"] for c in by.values())
    assert "h" in msgs and ("shape" in msgs or "dtype" in msgs)
    assert doc["counts"]["failed"] + doc["counts"]["error"] == len(by)


def test_torch_composition_passes_but_for_its_known_layer_norm_findings():
    """conformance.adapters.torch_fused on the standard tier: what fails is what fails for torch's own
    layer norm (tests/test_no_false_alarms.py, KNOWN: float32/bfloat16 "large" rows where x^2 overflows
    float32; float16 saved rstd of inf at eps = 1e-12), nothing else."""
    pytest.importorskip("torch")
    from conformance.kernel import load_kernel

    for op in ("add_rms_norm", "add_layer_norm"):
        spec = f"conformance.adapters.torch_fused:{op}"  # spawned workers: torch's threads do not survive fork
        k = load_kernel(spec)
        for st in ("float32", "bfloat16", "float16"):
            doc = _run(k, st, spec=spec)
            bad = [c["id"] for c in doc["cases"] if c["status"] == "failed"]
            known = [i for i in bad if op == "add_layer_norm" and ("/large/" in i or
                     (st == "float16" and "eps=1e-12" in i))]
            assert bad == known, (op, st, bad)


@pytest.mark.parametrize("op,storage", [("add_layer_norm", "float32"), ("add_rms_norm", "bfloat16")])
def test_keras_composition_has_no_failure(op, storage):
    """conformance.adapters.keras_cpu's composition (TensorFlow adds, then the Keras layer): no case fails;
    what is inconclusive is so for the reason the results give (TensorFlow's declared recursive sums on
    2^20-element rows, subnormals flushed on the subnormal data)."""
    pytest.importorskip("tensorflow")
    pytest.importorskip("keras")
    import os

    os.environ.setdefault("KERAS_BACKEND", "tensorflow")
    from conformance.kernel import load_kernel

    spec = f"conformance.adapters.keras_cpu:{op}"
    doc = _run(load_kernel(spec), storage, spec=spec)
    assert doc["counts"]["failed"] == 0 and doc["counts"]["error"] == 0, [
        (c["id"], c["message"][:200]) for c in doc["cases"] if c["status"] in ("failed", "error")]
    for c in doc["cases"]:
        if c["status"] == "inconclusive":
            assert "not evidence" in c["message"] and ("/subnormal/" in c["id"] or "1048576" in c["id"]), c["id"]
    assert doc["counts"]["passed"] >= len(catalog([op], [storage], "standard")) - 2
