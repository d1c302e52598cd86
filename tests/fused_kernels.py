"""NumPy kernels of the fused residual add + norm and of RMS norm's weight offset, correct and with one
seeded bug each (the style of tests/seeded_bugs.py: each bug overrides one step of the correct kernel).

:class:`NumpyAddNorm` is a correct kernel of ``add_layer_norm`` and ``add_rms_norm``: it adds
x + residual (+ residual_bias) in float32, rounds h to the storage format (Conventions.h_format =
"storage"), normalizes that h with :class:`seeded_bugs.NumpyNorm`'s float32 arithmetic, and returns
y, h and the saved statistics; its backward adds dh to the norm's dx in float32 before the one
rounding to storage. ``offset`` > 0 declares and applies a weight offset (scale by offset + weight).

The scenario is invented: the same device team as seeded_bugs.py, porting a transformer block.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from conformance import Conventions, Kernel, Precision
from conformance import dtypes as fmt

import seeded_bugs as sb

F32 = np.float32


class NumpyAddNorm(sb.NumpyNorm):
    """h = fl_s(x + residual (+ residual_bias)) in float32; y = norm(h); dx = fl_s(dh + g_x)."""

    def __init__(self, op: str, storage: str = "float32", params: str | None = None, offset: float = 0.0):
        self.fused_op = op
        base = op.removeprefix("add_")
        super().__init__(base, storage, params)
        self.offset = offset
        self._dh = None

    # ---- the steps a bug may replace ------------------------------------------------
    def _sum_h(self, x, residual, residual_bias) -> np.ndarray:
        """x + residual (+ residual_bias) in float32 (exact or nearly: Figueroa 1995 for two terms)."""
        h = np.asarray(x).astype(F32) + np.asarray(residual).astype(F32)
        if residual_bias is not None:
            h = h + np.asarray(residual_bias).astype(F32)
        return h

    def _normalized(self, h32: np.ndarray, h_stored: np.ndarray) -> np.ndarray:
        """What is normalized: the stored h (h_format = "storage")."""
        return h_stored

    def _weight(self, w: Any, geo) -> np.ndarray | None:
        v = super()._weight(w, geo)
        return v if (v is None or not self.offset) else F32(self.offset) + v

    def _with_dh(self, dx: np.ndarray, dh_view: np.ndarray) -> np.ndarray:
        return dx + dh_view

    # ---- entry points -------------------------------------------------------------
    def forward(self, x, residual, weight=None, bias=None, *, eps, residual_bias=None, **kw):
        h32 = self._sum_h(x, residual, residual_bias)
        h = h32.astype(fmt.dtype_of(self.storage))
        outs = super().forward(self._normalized(h32, h), weight, bias, eps=eps, **kw)
        outs = outs if isinstance(outs, tuple) else (outs,)
        return (outs[0], h, *outs[1:])

    def backward(self, dy, x, weight=None, *, eps, residual, h, dh, residual_bias=None, **kw):
        geo = self._geometry(np.asarray(h), kw)
        self._dh = self._view(np.asarray(dh), geo).astype(F32)
        h_used = self._normalized(self._sum_h(x, residual, residual_bias), np.asarray(h))
        try:
            return super().backward(dy, h_used, weight, eps=eps, **kw)
        finally:
            self._dh = None

    def _grads(self, dx, dyv, xhat, geo):
        if self._dh is not None:
            dx = self._with_dh(dx, self._dh)
        return super()._grads(dx, dyv, xhat, geo)

    def kernel(self, name: str, notes: str = "", precision: dict | None = None,
               conventions: dict | None = None) -> Kernel:
        extra = {"params": self.params, "accumulate": "float32", **(precision or {})}
        conv = {"saved": self.saved, "weight_offset": self.offset, **(conventions or {})}
        return Kernel(name=name, op=self.fused_op, forward=self.forward, backward=self.backward,
                      outputs=("y", "h", *self.saved), dtypes=(self.storage,),
                      conventions=Conventions(**conv), precision={self.storage: Precision(**extra)},
                      notes=notes or f"NumPy port of {self.fused_op}: {self.storage} storage, float32 arithmetic")


class NumpyOffsetRMS(sb.NumpyNorm):
    """A correct RMS norm kernel whose weight is stored centred at zero: scale by 1 + weight."""

    def __init__(self, op: str = "rms_norm", storage: str = "float32", params: str | None = None):
        super().__init__(op, storage, params)

    def _weight(self, w: Any, geo) -> np.ndarray | None:
        v = super()._weight(w, geo)
        return None if v is None else F32(1.0) + v

    def kernel(self, name: str, notes: str = "", precision: dict | None = None,
               conventions: dict | None = None) -> Kernel:
        return super().kernel(name, notes, precision, {"weight_offset": 1.0, **(conventions or {})})


# ---------------------------------------------------------------- the seeded bugs
class UnroundedH(NumpyAddNorm):
    """Normalizes the float32 sum while it stores (and declares it normalizes) h rounded to the storage
    format: y and the saved statistics differ from the normalization of the h passed on (bfloat16 and
    float16 storage; float32 storage rounds nothing)."""

    def _normalized(self, h32, h_stored):
        return h32


class DhDropped(NumpyAddNorm):
    """The backward forgets the gradient arriving along the residual stream: dx = g_x, not dh + g_x."""

    def _with_dh(self, dx, dh_view):
        return dx


class OffsetTwice(NumpyAddNorm):
    """The weight offset applied twice (the loader already added 1 to the weight, and the kernel adds
    it again): y scaled by 2 + weight; dx with it."""

    def _weight(self, w, geo):
        v = super()._weight(w, geo)
        return v if v is None else F32(self.offset) + v


def fused(op: str, storage: str = "float32", params: str | None = None, offset: float = 0.0,
          cls: type = NumpyAddNorm, **declared: Any) -> Kernel:
    """A kernel of ``cls`` declared as the correct kernel (``declared``: Conventions fields)."""
    impl = cls(op, storage, params, offset)
    return impl.kernel(f"{cls.__name__} {op} ({storage})", notes=" ".join((cls.__doc__ or "").split()),
                       conventions=declared or None)
