"""Fused residual add + norm as torch user code composes it, on the CPU: h = x + residual (+ residual_bias)
with torch's own adds, then the torch layer or RMS norm kernel of conformance.adapters.torch_device on h.

Spec form: ``conformance.adapters.torch_fused:add_layer_norm`` (also add_rms_norm, and the factories
take ``params="float32"`` for add_layer_norm like torch_device's). torch has no fused residual add +
norm entry point on the CPU, so this is the composition a port is compared with, not a torch kernel.

What it computes: the add of two storage-format tensors is rounded once (torch's CPU add of
float16/bfloat16 tensors computes in float32 and rounds, as the h check measures: it passes with the
half-ulp bound of a correctly rounded sum); with a residual bias the second add rounds again, in the
storage format (output_accumulate h = storage, declared). h is what the norm receives (h_format =
"storage"). The backward is the norm's backward at h, then dx = g_x + dh, a torch add in the storage
format (the norm's dx is rounded before dh is added: the bound of docs/tolerances.md, "Residual add",
covers both orders).
"""

from __future__ import annotations

from dataclasses import replace
from typing import Mapping

from ..kernel import Kernel, Precision, call_with
from ..arrays import as_numpy, to_torch
from . import torch_device as _dev

__all__ = ["add_layer_norm", "add_rms_norm"]


def _compose(base: Kernel, op: str) -> Kernel:
    torch = _dev._torch()

    def add(a, b, c=None):
        ta = to_torch(as_numpy(a))
        out = ta + to_torch(as_numpy(b))
        if c is not None:
            tc = to_torch(as_numpy(c))
            out = (out.to(torch.promote_types(out.dtype, tc.dtype)) + tc).to(ta.dtype)
        return as_numpy(out)

    def forward(x, residual, weight=None, bias=None, *, eps, normalized_shape, residual_bias=None):
        h = add(x, residual, residual_bias)
        out = call_with(base.forward, dict(x=h, weight=weight, bias=bias, eps=eps, normalized_shape=normalized_shape))
        if isinstance(out, Mapping):
            return {**out, "h": h}
        out = out if isinstance(out, tuple) else (out,)
        return (out[0], h, *out[1:])

    def backward(dy, x, weight=None, *, eps, normalized_shape, h, dh, **saved):
        kw = dict(dy=dy, x=h, weight=weight, eps=eps, normalized_shape=normalized_shape, **saved)
        g = call_with(base.backward, kw)
        return (add(g[0], dh), *g[1:])

    prec = {d: replace(p, output_accumulate={**dict(p.output_accumulate), "h": d}) for d, p in base.precision.items()}
    outputs = (base.outputs[0], "h", *base.outputs[1:])
    return replace(base, name=base.name.replace(base.op, op), op=op, forward=forward, backward=backward,
                   outputs=outputs, precision=prec,
                   notes=f"torch composition: h = x + residual (+ residual_bias) with torch adds, then {base.name}; "
                         + base.notes)


def add_layer_norm(params: str = "storage") -> Kernel:
    """x + residual (+ residual_bias) in torch, then torch's layer norm (conformance.adapters.torch_device)."""
    return _compose(_dev.layer_norm(params=params, device="cpu"), "add_layer_norm")


def add_rms_norm(params: str = "storage") -> Kernel:
    """x + residual (+ residual_bias) in torch, then F.rms_norm."""
    return _compose(_dev.rms_norm(params=params, device="cpu"), "add_rms_norm")
