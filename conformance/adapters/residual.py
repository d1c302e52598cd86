"""A fused residual add + norm as user code of a library composes it: h = x + residual (+ residual_bias)
with the library's own adds, then the library's norm kernel (an adapter's Kernel) on h.

No general-purpose library here has a fused residual add + norm entry point on the CPU, so these
compositions are what a port is compared with (peers), not library kernels. The add of two
storage-format tensors rounds once (torch's and TensorFlow's CPU adds of float16/bfloat16 tensors
compute in float32 and round: the h check passes under the half-ulp bound of a correctly rounded
sum, tests/test_fused.py); a residual bias rounds again, in the storage format (declared:
output_accumulate h = storage). h is what the norm receives (h_format = "storage"). The backward is
the norm's at h, then dx = g_x + dh with the library's add in the storage format (g_x rounded first:
docs/tolerances.md, "Residual add", covers both orders).
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any, Callable, Mapping

from ..kernel import Kernel, call_with

__all__ = ["compose"]

Add = Callable[[Any, Any, Any], Any]  # add(a, b, c=None) -> a + b (+ c) in a's format, as a NumPy array


def compose(base: Kernel, op: str, add: Add, library: str) -> Kernel:
    """The fused op ``op`` from ``base`` (a layer or RMS norm kernel) and the library's ``add``."""

    def forward(x, residual, weight=None, bias=None, *, eps, normalized_shape, residual_bias=None):
        h = add(x, residual, residual_bias)
        out = call_with(base.forward, dict(x=h, weight=weight, bias=bias, eps=eps, normalized_shape=normalized_shape))
        if isinstance(out, Mapping):
            return {**out, "h": h}
        out = out if isinstance(out, tuple) else (out,)
        return (out[0], h, *out[1:])

    def backward(dy, x, weight=None, *, eps, normalized_shape, h, dh, **saved):
        g = call_with(base.backward, dict(dy=dy, x=h, weight=weight, eps=eps, normalized_shape=normalized_shape,
                                          **saved))
        return (add(g[0], dh, None), *g[1:])

    prec = {d: replace(p, output_accumulate={**dict(p.output_accumulate), "h": d}) for d, p in base.precision.items()}
    return replace(base, name=base.name.replace(base.op, op), op=op, forward=forward, backward=backward,
                   outputs=(base.outputs[0], "h", *base.outputs[1:]), precision=prec,
                   notes=f"{library} composition: h = x + residual (+ residual_bias) with {library}'s adds, then "
                         f"{base.name}; " + base.notes)
