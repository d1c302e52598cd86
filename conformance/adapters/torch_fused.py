"""Fused residual add + norm as torch user code composes it, on the CPU (conformance.adapters.residual):
torch's adds, then the torch layer or RMS norm kernel of conformance.adapters.torch_device on h.

Spec form: ``conformance.adapters.torch_fused:add_layer_norm`` (also add_rms_norm; add_layer_norm takes
``params="float32"`` like torch_device's layer_norm); conformance.adapters.torch_cpu has the same
factories, so torch is a peer of the fused ops in reports.
"""

from __future__ import annotations

from ..arrays import as_numpy, to_torch
from ..kernel import Kernel
from . import torch_device as _dev
from .residual import compose

__all__ = ["add_layer_norm", "add_rms_norm"]


def _add():
    torch = _dev._torch()

    def add(a, b, c=None):
        ta = to_torch(as_numpy(a))
        out = ta + to_torch(as_numpy(b))
        if c is not None:  # a float32 residual bias promotes: add in float32, round once to storage
            tc = to_torch(as_numpy(c))
            out = (out.to(torch.promote_types(out.dtype, tc.dtype)) + tc).to(ta.dtype)
        return as_numpy(out)

    return add


def add_layer_norm(params: str = "storage") -> Kernel:
    """x + residual (+ residual_bias) in torch, then torch's layer norm (conformance.adapters.torch_device)."""
    return compose(_dev.layer_norm(params=params, device="cpu"), "add_layer_norm", _add(), "torch")


def add_rms_norm(params: str = "storage") -> Kernel:
    """x + residual (+ residual_bias) in torch, then F.rms_norm."""
    return compose(_dev.rms_norm(params=params, device="cpu"), "add_rms_norm", _add(), "torch")
