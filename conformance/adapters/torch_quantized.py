"""torch compositions with a quantized y on the CPU: a torch normalization, then a scale and a cast.

Spec form: ``conformance.adapters.torch_quantized:quantized?op=layer_norm,format=float8_e4m3fn,scale=row``
(op: any registered op; format: float8_e4m3fn, float8_e5m2, int8; scale: static, tensor, row). The
normalization is conformance.adapters.torch_cpu's kernel for the op (declared as there); its y, in the
storage format, then goes through what user code writes in torch:

    amax = y.float().abs().amax()            (per row: .amax(dim=-1))
    scale = amax.clamp(min=1e-12) / q_max    (float32; static: the given y_scale)
    y_q = (y.float() / scale).to(torch.float8_e4m3fn)     int8: .round().clamp(-127, 127).to(torch.int8)

What torch 2.13's CPU casts do, checked in tests/test_quantize.py against ml_dtypes: in range, both
float8 casts round to nearest even, as ml_dtypes does; out of range, torch.float8_e4m3fn saturates
(1000.0 -> 448), where ml_dtypes gives NaN, and torch.float8_e5m2 gives +-Inf (non-saturating).
The declaration says so: overflow="saturate" for float8_e4m3fn and int8, "nonsaturating" for float8_e5m2.
torch.round rounds half to even (torch.round documentation).
"""

from __future__ import annotations

from typing import Any

from ..kernel import Kernel, KernelError, call_with
from ..quantization import Quantization
from . import torch_cpu

__all__ = ["quantized", "TORCH_OVERFLOW"]

#: What torch's CPU casts do out of range (measured: tests/test_quantize.py).
TORCH_OVERFLOW = {"float8_e4m3fn": "saturate", "float8_e5m2": "nonsaturating", "int8": "saturate"}


def quantized(op: str = "layer_norm", format: str = "float8_e4m3fn", scale: str = "tensor",
              params: str = "storage") -> Kernel:
    """The torch CPU kernel of ``op`` with its y quantized to ``format`` under ``scale`` (module docstring)."""
    factory = getattr(torch_cpu, op, None) if op in torch_cpu.__all__ else None
    if factory is None:
        raise KernelError(f"op is {op!r}, expected one of {', '.join(n for n in torch_cpu.__all__ if '_mixed' not in n)}")
    q = Quantization(format=format, scale=scale, overflow=TORCH_OVERFLOW.get(format, "saturate"))
    base = factory(params=params)
    import torch

    from ..arrays import as_numpy
    from refnorm.quantize import qformat

    f = qformat(q.format)
    names = base.outputs

    def forward(y_scale=None, **kw: Any):
        out = call_with(base.forward, kw)
        got = dict(out) if isinstance(out, dict) else dict(zip(names, out if isinstance(out, tuple) else (out,)))
        y = torch.from_numpy(as_numpy(got.pop("y")).astype("float32"))
        if q.scale == "static":
            s = torch.from_numpy(as_numpy(y_scale).astype("float32"))
        else:
            amax = y.abs().amax() if q.scale == "tensor" else y.abs().amax(dim=-1)
            s = amax.clamp(min=q.amax_floor) / f.q_max
        sb = s.unsqueeze(-1) if q.scale == "row" else s
        t = y / sb
        yq = t.round().clamp(-127, 127).to(torch.int8) if f.integer else t.to(getattr(torch, q.format))
        res = {"y_q": as_numpy(yq), **({"scale": s.numpy()} if q.dynamic else {}), **got}
        return res

    q_out = ("y_q", "scale") if q.dynamic else ("y_q",)
    return Kernel(name=f"{base.name} + torch {q.format} cast (scale={q.scale})", op=base.op, forward=forward,
                  outputs=q_out + tuple(names[1:]), dtypes=base.dtypes, layouts=base.layouts,
                  strided=base.strided, optional_params=base.optional_params, momentum_none=base.momentum_none,
                  updates_running=base.updates_running, min_reduction=base.min_reduction,
                  conventions=base.conventions, precision=base.precision, device=base.device,
                  quantization=q,
                  notes=base.notes + f"; y then scaled and cast by torch ({q.format}, overflow {q.overflow} as "
                        "torch's CPU cast does)")
