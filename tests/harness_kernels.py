"""Small NumPy kernels the harness tests run: one correct float32 layer norm, and misbehaving ones.

The correct kernel follows Ba, Kiros & Hinton 2016, eq. 4 with a two-pass variance in float32.
The misbehaving ones crash, hang, raise or break their declaration on purpose, to test isolation.
"""

from __future__ import annotations

import ctypes
import os
import time

import numpy as np

from conformance import Conventions, Kernel

F32 = np.float32


def _axes(x, normalized_shape):
    return tuple(range(x.ndim - len(normalized_shape), x.ndim))


def ln_forward(x, weight, bias, *, eps, normalized_shape):
    axes = _axes(x, normalized_shape)
    x = x.astype(F32)
    mean = x.mean(axis=axes, keepdims=True, dtype=F32)
    d = x - mean
    var = (d * d).mean(axis=axes, keepdims=True, dtype=F32)
    rstd = F32(1) / np.sqrt(var + F32(eps))
    y = d * rstd
    if weight is not None:
        y = y * weight
    if bias is not None:
        y = y + bias
    lead = x.shape[: x.ndim - len(axes)]
    return y.astype(F32), mean.reshape(lead), rstd.reshape(lead)


def ln_backward(dy, x, weight, *, eps, normalized_shape, mean, rstd):
    axes = _axes(x, normalized_shape)
    kd = mean.shape + (1,) * len(axes)
    x, dy = x.astype(F32), dy.astype(F32)
    r = rstd.reshape(kd)
    xhat = (x - mean.reshape(kd)) * r
    g = dy if weight is None else dy * weight
    gm = g.mean(axis=axes, keepdims=True, dtype=F32)
    gx = (g * xhat).mean(axis=axes, keepdims=True, dtype=F32)
    dx = r * (g - gm - xhat * gx)
    lead = tuple(range(x.ndim - len(axes)))
    return dx, (dy * xhat).sum(axis=lead, dtype=F32), dy.sum(axis=lead, dtype=F32)


def _decl(name, forward, backward=ln_backward, **kw):
    return Kernel(name=name, op="layer_norm", forward=forward, backward=backward, outputs=("y", "mean", "rstd"),
                  dtypes=("float32",), conventions=Conventions(saved=("mean", "rstd")), **kw)


good_layer_norm = _decl("numpy layer norm (float32, two-pass)", ln_forward)


def _first(x) -> float:
    return float(np.asarray(x, dtype=np.float64).reshape(-1)[0])


def _segfault_forward(x, weight, bias, *, eps, normalized_shape):
    ctypes.string_at(0)  # reads address 0: SIGSEGV


def _abort_forward(x, weight, bias, *, eps, normalized_shape):
    os.abort()


def _hang_forward(x, weight, bias, *, eps, normalized_shape):
    time.sleep(3600)


def _raise_forward(x, weight, bias, *, eps, normalized_shape):
    raise RuntimeError("device queue full")


def _inplace_forward(x, weight, bias, *, eps, normalized_shape):
    out = ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)
    x[...] = 0  # writes into its input
    return out


def _wrong_count_forward(x, weight, bias, *, eps, normalized_shape):
    return ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)[:2]


segfault_layer_norm = _decl("segfaults", _segfault_forward)
abort_layer_norm = _decl("aborts", _abort_forward)
hang_layer_norm = _decl("hangs", _hang_forward)
raise_layer_norm = _decl("raises", _raise_forward)
inplace_layer_norm = _decl("writes its input", _inplace_forward)
wrong_count_layer_norm = _decl("returns two values for three declared", _wrong_count_forward)


def crash_on_some(x, weight, bias, *, eps, normalized_shape):
    """Segfaults when the row length is 96, answers correctly otherwise."""
    if x.shape[-1] == 96:
        ctypes.string_at(0)
    return ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)


crash_some_layer_norm = _decl("segfaults on rows of 96", crash_on_some)


def _hang_after_first(x, weight, bias, *, eps, normalized_shape):
    """Answers the first call of the process correctly, then signals that it hangs and hangs."""
    import tempfile
    from pathlib import Path

    if getattr(_hang_after_first, "called", False):
        (Path(tempfile.gettempdir()) / "refnorm-hang-started").touch()
        time.sleep(3600)
    _hang_after_first.called = True
    return ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)


hang_after_first = Kernel(name="hangs after its first case", op="layer_norm", forward=_hang_after_first,
                          outputs=("y", "mean", "rstd"), dtypes=("float32",),
                          conventions=Conventions(saved=("mean", "rstd")))
