"""The declaration of a quantized y: format, scale mode, overflow, where the scale comes from, its format.

A kernel with ``Kernel(quantization=Quantization(...))`` writes y_q = Q(y / s) in an 8-bit
format (refnorm.quantize), beside or in place of y, and for a dynamic scale also returns s:

    outputs = ("y_q", "scale", <statistics>...)   or   ("y", "y_q", "scale", ...)

A static scale is given to ``forward`` as the keyword argument ``y_scale`` (an array of shape ()
in ``scale_format``); the harness chooses it per case (conformance.quantized). Checked strictly
at construction, like the rest of the declaration (conformance.kernel).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any, Callable

from refnorm.quantize import OVERFLOW_MODES, QFORMATS, SCALE_MODES

__all__ = ["Quantization", "QUANT_OUTPUTS", "SCALE_SOURCES", "SCALE_FORMATS", "ROUNDINGS", "quant_outputs",
           "check_declaration"]

#: Names of the quantized outputs in Kernel.outputs.
QUANT_OUTPUTS = ("y_q", "scale")
#: Where a dynamic scale's amax is taken: "after_weight" (of y = xhat w + b, the tensor quantized: common
#: practice) or "before_weight" (of the normalized xhat, before the weight and bias: a fused kernel's
#: cheaper amax; y_q is still y / s).
SCALE_SOURCES = ("after_weight", "before_weight")
#: Formats a scale may be returned (and a static scale given) in.
SCALE_FORMATS = ("float32", "float64", "bfloat16", "float16")
#: Rounding to the levels: to nearest, ties to even (IEEE 754-2019 §4.3.1). Stochastic rounding is not
#: supported: one draw cannot be told from a biased rounding without a statistical test of its own.
ROUNDINGS = ("nearest_even",)


@dataclass(frozen=True)
class Quantization:
    """How a kernel quantizes y.

    format : "float8_e4m3fn", "float8_e5m2" (ml_dtypes) or "int8" (symmetric, levels -127..127).
    scale : "static" (given as ``y_scale``), "tensor" (one dynamic scale from the tensor's amax) or
        "row" (one per row: amax over the last axis of y, the per-token scale).
    overflow : "saturate" (+-q_max) or "nonsaturating" (NaN in float8_e4m3fn, +-Inf in float8_e5m2;
        not for int8). Only a static scale can overflow: a dynamic one maps amax onto q_max.
    scale_from : "after_weight" or "before_weight" (see SCALE_SOURCES).
    scale_format : the format of the returned (or given) scale.
    amax_floor : amax is clamped from below to this before the division (an all-zero row).
    rounding : "nearest_even" (the only one supported).
    """

    format: str
    scale: str = "tensor"
    overflow: str = "saturate"
    scale_from: str = "after_weight"
    scale_format: str = "float32"
    amax_floor: float = 1e-12
    rounding: str = "nearest_even"

    @property
    def dynamic(self) -> bool:
        return self.scale != "static"

    def as_dict(self) -> dict[str, Any]:
        return {f.name: getattr(self, f.name) for f in fields(self)}


def quant_outputs(q: "Quantization | None") -> tuple[str, ...]:
    """What a kernel with this declaration returns for y: () without one, ("y_q",) for a static
    scale, ("y_q", "scale") for a dynamic one."""
    if q is None:
        return ()
    return ("y_q", "scale") if q.dynamic else ("y_q",)


def _choice(bad: Callable[[str], None], name: str, v: Any, choices: tuple[str, ...]) -> None:
    if not isinstance(v, str) or v not in choices:
        bad(f"quantization.{name} is {v!r}, expected one of {', '.join(map(repr, choices))}")


def check_declaration(q: Any, outputs: tuple[str, ...], has_forward: bool, bad: Callable[[str], None]) -> None:
    """Check a Kernel's quantization field and what its outputs say about it; ``bad`` raises."""
    if q is None:
        stray = [o for o in outputs if o in QUANT_OUTPUTS]
        if stray:
            bad(f"outputs names {stray}, but the kernel declares no quantization: give "
                "quantization=Quantization(format=..., scale=...)")
        return
    if not isinstance(q, Quantization):
        bad(f"quantization is {type(q).__name__}, expected a conformance.Quantization or None")
    _choice(bad, "format", q.format, tuple(QFORMATS))
    _choice(bad, "scale", q.scale, SCALE_MODES)
    _choice(bad, "overflow", q.overflow, OVERFLOW_MODES)
    _choice(bad, "scale_from", q.scale_from, SCALE_SOURCES)
    _choice(bad, "scale_format", q.scale_format, SCALE_FORMATS)
    if q.rounding == "stochastic":
        bad("quantization.rounding is 'stochastic', which is not supported (no sound test of one draw): "
            "declare 'nearest_even'")
    _choice(bad, "rounding", q.rounding, ROUNDINGS)
    if q.format == "int8" and q.overflow != "saturate":
        bad("quantization.overflow is 'nonsaturating', but int8 has no NaN or infinity: declare 'saturate'")
    fl = q.amax_floor
    if isinstance(fl, bool) or not isinstance(fl, (int, float)) or not math.isfinite(fl) or not fl > 0:
        bad(f"quantization.amax_floor is {fl!r}, expected a finite number > 0")
    if q.scale == "static" and q.scale_from != "after_weight":
        bad("quantization.scale_from applies to a dynamic scale; a static scale is given: leave it 'after_weight'")
    if not has_forward:
        bad("quantization needs a forward entry point that returns y_q")
    want = quant_outputs(q)
    missing = [o for o in want if o not in outputs]
    if missing:
        bad(f"quantization {q.scale!r} means forward returns {list(want)}, but outputs {tuple(outputs)} does "
            f"not list {missing}")
    if not q.dynamic and "scale" in outputs:
        bad("outputs names 'scale', but the scale is static (given as y_scale, not returned)")
    head = ("y", *want) if outputs[:1] == ("y",) else want
    if tuple(outputs[:len(head)]) != head:
        bad(f"outputs is {tuple(outputs)}, expected it to begin with {head} (or with ('y',) + {want})")
