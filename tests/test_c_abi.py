"""The C ABI adapter and the hand-written C example kernel (examples/c_kernel), against the oracle.

The example accumulates in double and rounds every output once to float32, so
each output must be within one rounding of the float64 oracle plus the double
sums' error: |got - exact| <= u32 |exact| + gamma_n(u64) S + eta32, with
u32 = 2^-24, u64 = 2^-53 (IEEE 754-2019 binary32/binary64), gamma_n = n u / (1 - n u)
for recursive summation (Higham 2002, Accuracy and Stability of Numerical
Algorithms, §4.2) and S the magnitude of the terms (the same S as in
tests/test_adapters.py, taken there from Ioffe & Szegedy 2015, Alg. 1 and §3).
Non-contiguous inputs (transposed, negative strides, every other element)
cross the ABI as pointer, shape and element strides, without copies.
"""

from __future__ import annotations

import math
import shutil
import subprocess
from pathlib import Path

import numpy as np

from conformance.cases.generators import laid_out
import pytest

import refnorm
from conformance.adapters.c_abi import CKernelError, c_kernel
from conformance.kernel import KernelError, Precision, call_with, load_kernel

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "examples" / "c_kernel"
U32 = 2.0**-24
U64 = 2.0**-53
ETA32 = float(np.finfo(np.float32).smallest_subnormal) / 2


@pytest.fixture(scope="module")
def libpath(tmp_path_factory) -> Path:
    """The example built into a private directory (no race with a parallel build in build/)."""
    cc = shutil.which("cc")
    if cc is None or shutil.which("make") is None:
        pytest.skip("no C compiler (cc) or make on this machine: the C example cannot be built")
    out = tmp_path_factory.mktemp("c_kernel")
    proc = subprocess.run(["make", "-C", str(EXAMPLE), f"BUILD={out}"], capture_output=True, text=True)
    assert proc.returncode == 0, f"building the C example failed:\n{proc.stdout}\n{proc.stderr}"
    lib = out / "libnormkernel.so"
    assert lib.is_file(), proc.stdout
    return lib


@pytest.fixture(scope="module")
def kernels(libpath, monkeypatch_module):
    monkeypatch_module.setenv("REFNORM_C_KERNEL_LIB", str(libpath))
    return {op: load_kernel(f"{EXAMPLE / 'kernel.py'}:{op}") for op in ("layer_norm", "batch_norm")}


@pytest.fixture(scope="module")
def monkeypatch_module():
    mp = pytest.MonkeyPatch()
    yield mp
    mp.undo()


def close(name, got, exact, scale, n):
    """The bound of the module docstring, componentwise."""
    g = np.asarray(got, dtype=np.float64)
    assert g.shape == exact.shape, name
    gam = n * U64 / (1 - n * U64)
    tol = U32 * np.abs(exact) + (gam + 8 * U64) * scale + ETA32
    ratio = np.abs(g - exact) / tol
    assert ratio.max() <= 1.0, f"{name}: |error| / bound = {ratio.max():.3g}"


def correctly_rounded_fraction(got, exact) -> float:
    return float(np.mean(np.asarray(got) == exact.astype(np.float32)))


def strided(a: np.ndarray, kind: str) -> np.ndarray:
    """The same values in another memory layout: the catalog's own stride kinds."""
    return laid_out(a, kind)


STRIDES = ("contiguous", "transposed", "reversed", "sliced")


@pytest.mark.parametrize("kind", STRIDES)
def test_layer_norm_against_oracle(kernels, kind):
    k = kernels["layer_norm"]
    rng = np.random.default_rng(0)
    shape, ns = (5, 4, 6, 7), (6, 7)
    # Invented data: a large mean (cancellation for a one-pass variance) and unit spread.
    x = strided((rng.standard_normal(shape) + 300.0).astype(np.float32), kind)
    dy = strided(rng.standard_normal(shape).astype(np.float32), kind)
    w = rng.uniform(0.5, 1.5, ns).astype(np.float32)
    b = rng.standard_normal(ns).astype(np.float32)
    if kind != "contiguous":
        assert not x.flags.c_contiguous
    out = k.forward(x=x, weight=w, bias=b, eps=1e-5, normalized_shape=ns)
    xd, dyd, wd, bd = (a.astype(np.float64) for a in (x, dy, w, b))
    fwd = refnorm.layer_norm_forward(xd, ns, wd, bd, eps=1e-5)
    n = math.prod(ns)
    xhat = (xd - fwd.mean[..., None, None]) * fwd.rstd[..., None, None]
    mabs = np.abs(xd).mean(axis=(-2, -1), keepdims=True)
    r = fwd.rstd[..., None, None]
    close("y", out["y"], fwd.y, np.abs(wd) * (np.abs(xhat) + r * mabs), n)
    close("mean", out["mean"], fwd.mean, mabs[..., 0, 0], n)
    close("rstd", out["rstd"], fwd.rstd, fwd.rstd * (1 + (r * mabs)[..., 0, 0] ** 2), n)
    assert correctly_rounded_fraction(out["y"], fwd.y) > 0.999
    dx, dw, db = call_with(k.backward, dict(dy=dy, x=x, weight=w, eps=1e-5, normalized_shape=ns,
                                            mean=out["mean"], rstd=out["rstd"]))
    bwd = refnorm.layer_norm_backward(dyd, xd, ns, wd, eps=1e-5)
    g = np.abs(dyd * wd)
    s_dx = 2 * r * (g + g.mean(axis=(-2, -1), keepdims=True)
                    + (np.abs(xhat) + r * mabs) * (g * np.abs(xhat)).mean(axis=(-2, -1), keepdims=True))
    close("dx", dx, bwd.dx, s_dx, n)
    close("dweight", dw, bwd.dweight, (np.abs(dyd) * (np.abs(xhat) + r * mabs)).sum(axis=(0, 1)), 20)
    close("dbias", db, bwd.dbias, np.abs(dyd).sum(axis=(0, 1)), 20)
    # The input arrays are untouched.
    assert np.array_equal(x.astype(np.float64), xd)


def _bn_scales(xd, dyd, wd, axis, fwd):
    c = xd.shape[axis]
    bs = [1] * xd.ndim
    bs[axis] = c
    red = tuple(i for i in range(xd.ndim) if i != axis)
    r = fwd.rstd.reshape(bs)
    mabs = np.abs(xd).mean(axis=red, keepdims=True)
    xhat = (xd - fwd.mean.reshape(bs)) * r
    spread = np.abs(xhat) + r * mabs
    g = np.abs(dyd * wd.reshape(bs))
    s_dx = 2 * r * (g + g.mean(axis=red, keepdims=True) + spread * (g * np.abs(xhat)).mean(axis=red, keepdims=True))
    return {"y": np.abs(wd.reshape(bs)) * spread, "mean": mabs.reshape(c),
            "rstd": fwd.rstd * (1 + (r * mabs).reshape(c) ** 2), "dx": s_dx,
            "dweight": (np.abs(dyd) * spread).sum(axis=red), "dbias": np.abs(dyd).sum(axis=red)}


@pytest.mark.parametrize("kind,axis", [("contiguous", 1), ("transposed", 1), ("reversed", -1), ("sliced", -1)])
def test_batch_norm_train_against_oracle(kernels, kind, axis):
    k = kernels["batch_norm"]
    rng = np.random.default_rng(1)
    shape = (6, 5, 4, 3) if axis == 1 else (6, 4, 3, 5)
    x = strided((rng.standard_normal(shape) * 2 - 50.0).astype(np.float32), kind)
    dy = strided(rng.standard_normal(shape).astype(np.float32), kind)
    c = 5
    w = rng.uniform(0.5, 1.5, c).astype(np.float32)
    b = rng.standard_normal(c).astype(np.float32)
    rm0 = rng.standard_normal(c).astype(np.float32)
    rv0 = rng.uniform(0.5, 2, c).astype(np.float32)
    rm, rv = rm0.copy(), rv0.copy()
    momentum = None if kind == "sliced" else 0.1
    out = k.forward(x=x, weight=w, bias=b, eps=1e-5, axis=axis, running_mean=rm, running_var=rv,
                    momentum=momentum, batches_seen=4)
    xd, dyd, wd, bd = (a.astype(np.float64) for a in (x, dy, w, b))
    fwd = refnorm.batch_norm_forward(xd, wd, bd, axis=axis, eps=1e-5, running_mean=rm0.astype(np.float64),
                                     running_var=rv0.astype(np.float64), momentum=momentum, batches_seen=4)
    n = x.size // c
    s = _bn_scales(xd, dyd, wd, axis % x.ndim, fwd)
    for name in ("y", "mean", "rstd"):
        close(name, out[name], getattr(fwd, name), s[name], n)
    assert correctly_rounded_fraction(out["y"], fwd.y) > 0.999
    # Running statistics updated in place ("new" momentum, unbiased variance; cumulative for None).
    close("running_mean", rm, fwd.running_mean, np.abs(rm0) + s["mean"], n)
    close("running_var", rv, fwd.running_var, rv0 + fwd.var * n / (n - 1) + s["mean"] ** 2, n)
    dx, dw, db = k.backward(dy=dy, x=x, weight=w, eps=1e-5, axis=axis, mean=out["mean"], rstd=out["rstd"])
    bwd = refnorm.batch_norm_backward(dyd, xd, wd, axis=axis, eps=1e-5)
    close("dx", dx, bwd.dx, s["dx"], n)
    close("dweight", dw, bwd.dweight, s["dweight"], n)
    close("dbias", db, bwd.dbias, s["dbias"], n)


def test_batch_norm_eval_against_oracle(kernels):
    k = kernels["batch_norm"]
    rng = np.random.default_rng(2)
    x = strided(rng.standard_normal((4, 3, 7)).astype(np.float32), "reversed")
    dy = rng.standard_normal((4, 3, 7)).astype(np.float32)
    w = rng.uniform(0.5, 1.5, 3).astype(np.float32)
    rm = rng.standard_normal(3).astype(np.float32)
    rv = rng.uniform(0.5, 2, 3).astype(np.float32)
    y = k.forward_eval(x=x, weight=w, bias=None, eps=1e-3, axis=1, running_mean=rm, running_var=rv)
    xd, dyd, wd, rmd, rvd = (a.astype(np.float64) for a in (x, dy, w, rm, rv))
    fwd = refnorm.batch_norm_forward(xd, wd, None, eps=1e-3, training=False, running_mean=rmd, running_var=rvd)
    r = (1 / np.sqrt(rvd + 1e-3))[None, :, None]
    close("y", y, fwd.y, np.abs(wd)[None, :, None] * r * (np.abs(xd) + np.abs(rmd)[None, :, None]), 1)
    dx, dw, db = k.backward_eval(dy=dy, x=x, weight=w, eps=1e-3, axis=1, running_mean=rm, running_var=rv)
    bwd = refnorm.batch_norm_backward(dyd, xd, wd, eps=1e-3, training=False, running_mean=rmd, running_var=rvd)
    close("dx", dx, bwd.dx, np.abs(dyd * wd[None, :, None]) * r, 1)
    s_dw = (np.abs(dyd) * r * (np.abs(xd) + np.abs(rmd)[None, :, None])).sum(axis=(0, 2))
    close("dweight", dw, bwd.dweight, s_dw, 28)
    close("dbias", db, bwd.dbias, np.abs(dyd).sum(axis=(0, 2)), 28)


def test_running_statistics_copied_back_when_not_shareable(kernels):
    """A float64 running_mean is refused (no silent conversion); a strided float32 view is copied,
    updated by the C code and written back, so the in-place update still reaches the caller."""
    k = kernels["batch_norm"]
    x = np.random.default_rng(3).standard_normal((8, 2)).astype(np.float32)
    rm, rv = np.zeros(2), np.ones(2)
    with pytest.raises(TypeError, match="running_mean has dtype float64"):
        k.forward(x=x, eps=1e-5, running_mean=rm, running_var=rv, momentum=0.5)
    rm32 = np.zeros(4, np.float32)[::2]  # a strided view: copied, updated, written back
    rv32 = np.ones(4, np.float32)[::2]
    k.forward(x=x, eps=1e-5, running_mean=rm32, running_var=rv32, momentum=0.5)
    np.testing.assert_allclose(rm32, 0.5 * x.astype(np.float64).mean(axis=0), rtol=4 * U32)


def test_errors_are_reported(kernels, libpath):
    k = kernels["batch_norm"]
    x = np.ones((1, 3), np.float32)  # one element per channel: no unbiased running variance
    with pytest.raises(CKernelError, match=r"returned 4 \(the unbiased running variance"):
        k.forward(x=x, eps=1e-5, running_mean=np.zeros(3, np.float32), running_var=np.ones(3, np.float32))
    with pytest.raises(CKernelError, match=r"returned 1 \(invalid argument"):
        k.forward(x=np.ones((2, 3), np.float32), eps=1e-5, running_mean=np.zeros(3, np.float32),
                  running_var=np.ones(3, np.float32), momentum=1.5)
    with pytest.raises(TypeError, match="x has dtype float64"):
        k.forward(x=np.ones((2, 3)), eps=1e-5)
    with pytest.raises(KernelError, match="does not exist"):
        c_kernel(libpath.parent / "missing.so", "layer_norm")
    with pytest.raises(KernelError, match="defines layer_norm, batch_norm"):
        c_kernel(libpath, "group_norm")
    with pytest.raises(KernelError, match="exports none"):
        c_kernel(libpath, "layer_norm", prefix="other")


def test_declaration(kernels, libpath):
    k = kernels["batch_norm"]
    d = k.declaration()
    assert d["entry_points"] == ["forward", "forward_eval", "backward", "backward_eval"]
    assert d["conventions"]["running"] == "inplace" and d["conventions"]["saved"] == ["mean", "rstd"]
    assert d["precision"]["float32"]["accumulate"] == "float64"
    plain = c_kernel(libpath, "layer_norm", precision=Precision(storage="float32"))
    assert plain.entry_points == ("forward", "backward") and plain.dtypes == ("float32",)


def test_example_factories_explain_a_missing_build(monkeypatch, tmp_path):
    monkeypatch.setenv("REFNORM_C_KERNEL_LIB", str(tmp_path / "absent.so"))
    with pytest.raises(KernelError, match="make -C examples/c_kernel"):
        load_kernel(f"{EXAMPLE / 'kernel.py'}:layer_norm")
