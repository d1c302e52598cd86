"""Small NumPy float32 layer-norm kernels for the tests of the CI gate (tests/test_pytest_plugin.py etc.).

Layer norm (Ba, Kiros & Hinton 2016, eq. 3-4): over the trailing axes,
y = (x - mean) / sqrt(var + eps) * weight + bias with var the biased variance;
its gradient (the same paper's layer, differentiated; e.g. Ioffe & Szegedy 2015, §3
for the batch form): dx = rstd * (g - mean(g) - xhat * mean(g * xhat)) with g = dy * weight,
dweight = sum(dy * xhat), dbias = sum(dy) over the leading axes.

- ``fp32``        correct: float32 storage and arithmetic, two-pass variance.
- ``exact``       correct and more accurate: float64 arithmetic, each output rounded once to float32.
- ``eps_outside`` a seeded bug, declared correct: 1 / (sqrt(var) + eps) instead of 1 / sqrt(var + eps).
                  The relative error of rstd is eps / sqrt(var) - eps / (2 var) to first order, about 5e-6
                  (some 40 float32 ULPs, IEEE 754-2019 binary32: u = 2^-24) at var = 1, eps = 1e-5.
                  Measured here: on the smoke tier it fails the three normal-data cases and passes the
                  cancellation case, whose bound is dominated by the unavoidable cancellation error.
- ``drift``       ``exact`` with every y moved 2 ULPs up (numpy.nextafter twice): still within the
                  derived bounds of the smoke tier (measured), but several times the budget of ``exact``:
                  the "port that got worse" of the baseline tests.
- ``crash``       like fp32, but aborts its process on the 2x3x16 smoke shape (a crash must cost one case).
- ``fp32_strict`` fp32 declared with optional_params=False: cases without weight or bias are skipped.
- ``hang``        like fp32, but sleeps for ten minutes on the 2x3x16 smoke shape (so must a hang).
"""

from __future__ import annotations

import os
import time

from dataclasses import replace

import numpy as np

from conformance import Kernel

F32 = np.float32


def _axes(x: np.ndarray, normalized_shape) -> tuple[int, ...]:
    return tuple(range(x.ndim - len(normalized_shape), x.ndim))


def _stats(x: np.ndarray, axes, eps: float, dt, eps_outside: bool = False):
    n = dt(np.prod([x.shape[a] for a in axes]))
    mean = np.sum(x, axis=axes, keepdims=True, dtype=dt) / n
    d = x - mean
    var = np.sum(d * d, axis=axes, keepdims=True, dtype=dt) / n
    if eps_outside:
        rstd = dt(1) / (np.sqrt(var) + dt(eps))
    else:
        rstd = dt(1) / np.sqrt(var + dt(eps))
    return mean, rstd


def _forward(dt, eps_outside: bool = False, crash_shape=None, drift_ulps: int = 0, hang_shape=None):
    def forward(x, weight, bias, *, eps, normalized_shape):
        if crash_shape is not None and tuple(x.shape) == crash_shape:
            os.abort()
        if hang_shape is not None and tuple(x.shape) == hang_shape:
            time.sleep(600)
        axes = _axes(x, normalized_shape)
        xc = np.asarray(x, dtype=dt)
        mean, rstd = _stats(xc, axes, eps, dt, eps_outside)
        y = (xc - mean) * rstd
        if weight is not None:
            y = y * np.asarray(weight, dtype=dt)
        if bias is not None:
            y = y + np.asarray(bias, dtype=dt)
        y = y.astype(F32)
        for _ in range(drift_ulps):
            y = np.nextafter(y, F32(np.inf))
        return y

    return forward


def _backward(dt, eps_outside: bool = False):
    def backward(dy, x, weight, *, eps, normalized_shape):
        axes = _axes(x, normalized_shape)
        lead = tuple(range(x.ndim - len(axes)))
        xc, dyc = np.asarray(x, dtype=dt), np.asarray(dy, dtype=dt)
        mean, rstd = _stats(xc, axes, eps, dt, eps_outside)
        xhat = (xc - mean) * rstd
        g = dyc if weight is None else dyc * np.asarray(weight, dtype=dt)
        n = dt(np.prod([x.shape[a] for a in axes]))
        gm = np.sum(g, axis=axes, keepdims=True, dtype=dt) / n
        gx = np.sum(g * xhat, axis=axes, keepdims=True, dtype=dt) / n
        dx = rstd * (g - gm - xhat * gx)
        dweight = None if weight is None else np.sum(dyc * xhat, axis=lead, dtype=dt).astype(F32)
        dbias = np.sum(dyc, axis=lead, dtype=dt).astype(F32)
        return dx.astype(F32), dweight, dbias

    return backward


def _kernel(name: str, dt, eps_outside: bool = False, crash_shape=None, drift_ulps: int = 0, hang_shape=None,
            notes: str = "") -> Kernel:
    return Kernel(name=name, op="layer_norm", forward=_forward(dt, eps_outside, crash_shape, drift_ulps, hang_shape),
                  backward=_backward(dt, eps_outside), outputs=("y",), grads=("dx", "dweight", "dbias"),
                  dtypes=("float32",), notes=notes)


fp32 = _kernel("gate-fp32", F32, notes="float32 two-pass layer norm (test kernel)")
exact = _kernel("gate-exact", np.float64, notes="float64 arithmetic rounded once to float32 (test kernel)")
eps_outside = _kernel("gate-eps-outside", F32, eps_outside=True,
                      notes="seeded bug: eps added outside the square root, declared inside (test kernel)")
drift = _kernel("gate-drift", np.float64, drift_ulps=2, notes="exact, y moved 2 ULPs up (test kernel)")
crash = _kernel("gate-crash", F32, crash_shape=(2, 3, 16), notes="aborts on shape 2x3x16 (test kernel)")
hang = _kernel("gate-hang", F32, hang_shape=(2, 3, 16), notes="hangs on shape 2x3x16 (test kernel)")
fp32_strict = replace(fp32, name="gate-fp32-strict", optional_params=False)
