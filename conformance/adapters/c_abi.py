"""Kernels in a C shared library, called through ctypes with the refnorm C ABI.

The ABI (docs/kernel-interface.md, "C ABI"; a complete header in
examples/c_kernel/norm_kernel.h) covers layer norm and batch norm. For a
library built with symbol prefix P and an op OP it looks up

    P_OP_forward, P_OP_forward_eval, P_OP_backward, P_OP_backward_eval

and makes a Kernel entry point of each one present (forward_eval and
backward_eval exist for batch_norm only). Optional: P_abi_version() (checked
when present) and P_strerror(code) (used in error messages).

Arrays cross without copies: x and dy as the pointer to their element
(0, ..., 0), their shape and their strides in elements (negative allowed),
exactly as NumPy holds them. Outputs are allocated here, C-contiguous.
Parameters and statistics (weight, bias, mean, rstd, running statistics) are
passed C-contiguous; they are copied only when they are not already (the
running statistics are then written back, so the in-place update still
reaches the caller's arrays). One storage dtype per library symbol set; a
library with both float32 and float64 variants exposes them under two prefixes.
"""

from __future__ import annotations

import ctypes
import math
from pathlib import Path
from typing import Any

import numpy as np

from ..kernel import Conventions, Kernel, KernelError, Precision

__all__ = ["CKernelError", "c_kernel", "load_library", "ABI_VERSION", "C_OPS"]

ABI_VERSION = 1
C_OPS = ("layer_norm", "batch_norm")

_P = ctypes.c_void_p
_I64P = ctypes.POINTER(ctypes.c_int64)
_I32 = ctypes.c_int32
_I64 = ctypes.c_int64
_D = ctypes.c_double

# Argument types per entry point, in the order of docs/kernel-interface.md.
_SIGNATURES = {
    ("layer_norm", "forward"): [_P, _I64P, _I64P, _I32, _I32, _P, _P, _D, _P, _P, _P],
    ("layer_norm", "backward"): [_P, _I64P, _P, _I64P, _I64P, _I32, _I32, _P, _P, _P, _D, _P, _P, _P],
    ("batch_norm", "forward"): [_P, _I64P, _I64P, _I32, _I32, _P, _P, _D, _P, _P, _D, _I64, _P, _P, _P],
    ("batch_norm", "forward_eval"): [_P, _I64P, _I64P, _I32, _I32, _P, _P, _P, _P, _D, _P],
    ("batch_norm", "backward"): [_P, _I64P, _P, _I64P, _I64P, _I32, _I32, _P, _P, _P, _D, _P, _P, _P],
    ("batch_norm", "backward_eval"): [_P, _I64P, _P, _I64P, _I64P, _I32, _I32, _P, _P, _P, _D, _P, _P, _P],
}


class CKernelError(RuntimeError):
    """A C entry point returned a nonzero code (the message names the function, the code and its meaning)."""


def load_library(path: str | Path) -> ctypes.CDLL:
    """ctypes.CDLL of a shared library, or a KernelError saying why it cannot be loaded."""
    p = Path(path)
    if not p.is_file():
        raise KernelError(f"shared library {p} does not exist (build it first, e.g. make -C examples/c_kernel)")
    try:
        return ctypes.CDLL(str(p.resolve()))
    except OSError as e:
        raise KernelError(f"cannot load shared library {p}: {e}") from e


class _Lib:
    """The bound symbols of one library and prefix, with the call conventions of the ABI."""

    def __init__(self, lib: ctypes.CDLL, prefix: str, op: str, dtype: np.dtype, path: str):
        self.lib, self.prefix, self.op, self.dtype, self.path = lib, prefix, op, dtype, path
        self.fns: dict[str, Any] = {}
        for entry in ("forward", "forward_eval", "backward", "backward_eval"):
            sig = _SIGNATURES.get((op, entry))
            name = f"{prefix}_{op}_{entry}"
            if sig is None or not hasattr(lib, name):
                continue
            fn = getattr(lib, name)
            fn.argtypes = sig
            fn.restype = _I32
            self.fns[entry] = fn
        self.strerror = None
        if hasattr(lib, f"{prefix}_strerror"):
            self.strerror = getattr(lib, f"{prefix}_strerror")
            self.strerror.argtypes = [_I32]
            self.strerror.restype = ctypes.c_char_p

    def call(self, entry: str, *args) -> None:
        rc = self.fns[entry](*args)
        if rc != 0:
            what = ""
            if self.strerror is not None:
                msg = self.strerror(rc)
                what = f" ({msg.decode(errors='replace')})" if msg else ""
            raise CKernelError(f"{self.prefix}_{self.op}_{entry} in {self.path} returned {rc}{what}")

    # ------------------------------------------------------------------ marshalling
    def strided(self, a: Any, name: str) -> tuple[np.ndarray, Any, Any]:
        """(array, shape, element strides) of an input passed with its own strides."""
        arr = np.asarray(a)
        self._check_dtype(arr, name)
        if any(s % arr.itemsize for s in arr.strides):
            arr = arr.copy()  # strides that are not whole elements cannot be expressed in the ABI
        return arr, _i64(arr.shape), _i64(s // arr.itemsize for s in arr.strides)

    def contiguous(self, a: Any, name: str, shape: tuple[int, ...]) -> np.ndarray | None:
        if a is None:
            return None
        arr = np.asarray(a)
        self._check_dtype(arr, name)
        if arr.shape != shape:
            raise ValueError(f"{name} has shape {arr.shape}, expected {shape}")
        return np.ascontiguousarray(arr)

    def _check_dtype(self, arr: np.ndarray, name: str) -> None:
        if arr.dtype != self.dtype:
            raise TypeError(f"{name} has dtype {arr.dtype}, expected {self.dtype} (the storage format of "
                            f"{self.prefix}_{self.op}_* in {self.path})")

    def empty(self, shape: tuple[int, ...]) -> np.ndarray:
        return np.empty(shape, dtype=self.dtype)


def _i64(values) -> Any:
    vals = [int(v) for v in values]
    return (ctypes.c_int64 * max(len(vals), 1))(*vals)


def _ptr(a: np.ndarray | None):
    return None if a is None else a.ctypes.data


def _inplace(lib: _Lib, a: Any, name: str, shape: tuple[int, ...]) -> tuple[np.ndarray | None, np.ndarray | None]:
    """(buffer the C code writes, caller's array to copy it back into, or None when it is the same)."""
    if a is None:
        return None, None
    orig = np.asarray(a)
    lib._check_dtype(orig, name)
    if orig.flags.c_contiguous and orig.flags.writeable and orig.shape == shape:
        return orig, None
    buf = lib.contiguous(orig, name, shape).copy()
    return buf, orig


def _layer_norm_entries(lib: _Lib) -> dict[str, Any]:
    out: dict[str, Any] = {}

    def split(x, normalized_shape):
        ns = tuple(int(d) for d in normalized_shape)
        if x.ndim < len(ns) or tuple(x.shape[x.ndim - len(ns):]) != ns:
            raise ValueError(f"normalized_shape is {ns}, expected the trailing dims of x (shape {x.shape})")
        return ns, tuple(x.shape[: x.ndim - len(ns)])

    if "forward" in lib.fns:
        def forward(x, weight=None, bias=None, *, eps, normalized_shape):
            xa, shp, st = lib.strided(x, "x")
            ns, lead = split(xa, normalized_shape)
            w = lib.contiguous(weight, "weight", ns)
            b = lib.contiguous(bias, "bias", ns)
            y, mean, rstd = lib.empty(xa.shape), lib.empty(lead), lib.empty(lead)
            lib.call("forward", _ptr(xa), shp, st, xa.ndim, len(ns), _ptr(w), _ptr(b), float(eps),
                     _ptr(y), _ptr(mean), _ptr(rstd))
            return {"y": y, "mean": mean, "rstd": rstd}
        out["forward"] = forward

    if "backward" in lib.fns:
        def backward(dy, x, weight=None, *, eps, normalized_shape, mean=None, rstd=None):
            xa, shp, st = lib.strided(x, "x")
            ga, _, gst = lib.strided(dy, "dy")
            if ga.shape != xa.shape:
                raise ValueError(f"dy has shape {ga.shape}, expected {xa.shape} (the shape of x)")
            ns, lead = split(xa, normalized_shape)
            w = lib.contiguous(weight, "weight", ns)
            m = lib.contiguous(mean, "mean", lead)
            r = lib.contiguous(rstd, "rstd", lead)
            dx, dw, db = lib.empty(xa.shape), lib.empty(ns), lib.empty(ns)
            lib.call("backward", _ptr(ga), gst, _ptr(xa), shp, st, xa.ndim, len(ns), _ptr(w), _ptr(m), _ptr(r),
                     float(eps), _ptr(dx), _ptr(dw), _ptr(db))
            return dx, dw, db
        out["backward"] = backward
    return out


def _batch_norm_entries(lib: _Lib) -> dict[str, Any]:
    out: dict[str, Any] = {}

    def channel(xa, axis):
        if xa.ndim < 2:
            raise ValueError(f"x has rank {xa.ndim}, expected rank >= 2 (N, C, ...)")
        ax = int(axis) % xa.ndim
        return ax, (xa.shape[ax],)

    if "forward" in lib.fns:
        def forward(x, weight=None, bias=None, *, eps, axis=1, training=True, running_mean=None,
                    running_var=None, momentum=0.1, batches_seen=None):
            if not training and "forward_eval" in out:
                return out["forward_eval"](x, weight, bias, eps=eps, axis=axis, running_mean=running_mean,
                                           running_var=running_var)
            xa, shp, st = lib.strided(x, "x")
            ax, cs = channel(xa, axis)
            w = lib.contiguous(weight, "weight", cs)
            b = lib.contiguous(bias, "bias", cs)
            rm, rm_back = _inplace(lib, running_mean, "running_mean", cs)
            rv, rv_back = _inplace(lib, running_var, "running_var", cs)
            mom = math.nan if momentum is None else float(momentum)
            seen = 0 if batches_seen is None else int(batches_seen)
            y, mean, rstd = lib.empty(xa.shape), lib.empty(cs), lib.empty(cs)
            lib.call("forward", _ptr(xa), shp, st, xa.ndim, ax, _ptr(w), _ptr(b), float(eps), _ptr(rm), _ptr(rv),
                     mom, seen, _ptr(y), _ptr(mean), _ptr(rstd))
            for buf, back in ((rm, rm_back), (rv, rv_back)):
                if back is not None:
                    np.copyto(back, buf)
            return {"y": y, "mean": mean, "rstd": rstd}
        out["forward"] = forward

    if "forward_eval" in lib.fns:
        def forward_eval(x, weight=None, bias=None, *, eps, axis=1, running_mean, running_var):
            xa, shp, st = lib.strided(x, "x")
            ax, cs = channel(xa, axis)
            args = [lib.contiguous(a, n, cs) for a, n in ((weight, "weight"), (bias, "bias"),
                                                          (running_mean, "running_mean"),
                                                          (running_var, "running_var"))]
            y = lib.empty(xa.shape)
            lib.call("forward_eval", _ptr(xa), shp, st, xa.ndim, ax, *(_ptr(a) for a in args), float(eps), _ptr(y))
            return y
        out["forward_eval"] = forward_eval

    def _backward(entry, dy, x, weight, eps, axis, s1, s2):
        xa, shp, st = lib.strided(x, "x")
        ga, _, gst = lib.strided(dy, "dy")
        if ga.shape != xa.shape:
            raise ValueError(f"dy has shape {ga.shape}, expected {xa.shape} (the shape of x)")
        ax, cs = channel(xa, axis)
        w = lib.contiguous(weight, "weight", cs)
        a1 = lib.contiguous(s1, "statistic", cs)
        a2 = lib.contiguous(s2, "statistic", cs)
        dx, dw, db = lib.empty(xa.shape), lib.empty(cs), lib.empty(cs)
        lib.call(entry, _ptr(ga), gst, _ptr(xa), shp, st, xa.ndim, ax, _ptr(w), _ptr(a1), _ptr(a2), float(eps),
                 _ptr(dx), _ptr(dw), _ptr(db))
        return dx, dw, db

    if "backward" in lib.fns:
        def backward(dy, x, weight=None, *, eps, axis=1, mean=None, rstd=None):
            return _backward("backward", dy, x, weight, eps, axis, mean, rstd)
        out["backward"] = backward

    if "backward_eval" in lib.fns:
        def backward_eval(dy, x, weight=None, *, eps, axis=1, running_mean, running_var):
            return _backward("backward_eval", dy, x, weight, eps, axis, running_mean, running_var)
        out["backward_eval"] = backward_eval
    return out


def c_kernel(library: str | Path, op: str, *, prefix: str = "refnorm", dtype: str = "float32",
             name: str | None = None, precision: Precision | None = None, strided: bool = True,
             notes: str = "") -> Kernel:
    """A Kernel calling the C functions ``{prefix}_{op}_*`` of a shared library.

    Parameters
    ----------
    library : path of the shared library (.so / .dylib / .dll).
    op : "layer_norm" or "batch_norm" (the ops of ABI version 1).
    prefix : symbol prefix of the library's functions.
    dtype : the storage format of the C functions ("float32": float*, "float64": double*).
    precision : the declared Precision (default: float32 arithmetic on float32 storage); state what
        the C code really does, e.g. Precision(storage="float32", accumulate="float64").
    strided : False if the C code ignores the strides (the harness then skips non-contiguous cases).

    The declaration: forward returns y, mean, rstd (conventions.saved = mean, rstd); batch norm
    updates running statistics in place, momentum weighting the batch value, unbiased running
    variance, momentum=None as a cumulative average (NaN momentum and batches_seen in the ABI).
    """
    if op not in C_OPS:
        raise KernelError(f"op is {op!r}; the C ABI (version {ABI_VERSION}) defines {', '.join(C_OPS)}")
    if dtype not in ("float32", "float64"):
        raise KernelError(f"dtype is {dtype!r}, expected 'float32' or 'float64' (float*/double* in C)")
    lib = load_library(library)
    ver = getattr(lib, f"{prefix}_abi_version", None)
    if ver is not None:
        ver.restype = _I32
        got = int(ver())
        if got != ABI_VERSION:
            raise KernelError(f"{library}: {prefix}_abi_version() is {got}, this adapter speaks version {ABI_VERSION}")
    bound = _Lib(lib, prefix, op, np.dtype(dtype), str(library))
    if not bound.fns:
        raise KernelError(f"{library} exports none of {prefix}_{op}_forward/_forward_eval/_backward/_backward_eval")
    entries = _layer_norm_entries(bound) if op == "layer_norm" else _batch_norm_entries(bound)
    conv = (Conventions(momentum_convention="new", running_var_estimator="unbiased", saved=("mean", "rstd"),
                        running="inplace")
            if op == "batch_norm" else Conventions(saved=("mean", "rstd")))
    return Kernel(
        name=name or f"C {prefix}_{op} ({Path(library).name})", op=op,
        outputs=("y", "mean", "rstd") if "forward" in entries else ("y",),  # without forward the oracle's are given
        dtypes=(dtype,), precision=precision or Precision(storage=dtype), conventions=conv, strided=strided,
        notes=notes or f"C ABI v{ABI_VERSION} through ctypes: {Path(library).name}", **entries)
