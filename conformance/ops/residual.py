"""What a fused residual add and a weight offset mean for the harness: the inputs the normalization's
oracle sees.

A fused op's kernel receives x, residual (and residual_bias), and its normalization works on
h = x + residual (+ residual_bias). The harness checks the normalization part with the op's own
oracle and bounds applied to the h that was normalized (``oracle_view``): h rounded once to the
storage format under Conventions.h_format = "storage" (or the kernel's own stored h, when it returns
one: y is checked as the normalization of the h the kernel passed on, and h itself against the
exact sum), the exact sum under "accumulate" (the add's rounding in the accumulation format is an
input error of the bounds: conformance/tolerances/residual.py). A weight offset c (scale by c +
weight) is the weight c + weight for the oracle, its rounding an input error likewise.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

import refnorm

from .registry import get

if TYPE_CHECKING:
    from ..cases.model import Case
    from ..kernel import Conventions

__all__ = ["oracle_view", "base_inputs", "stored_h", "VIEW_EXTRAS"]

#: Keys of the oracle's view besides the normalization's own inputs: the kernel's x, its residual and
#: residual bias, the exact h, dh, and the weight as stored (before the offset).
VIEW_EXTRAS = ("x_in", "residual", "residual_bias", "h", "dh", "weight_in")


def oracle_view(case: Case, conv: Conventions, inp64: dict[str, Any],
                h_normalized: np.ndarray | None = None) -> dict[str, Any]:
    """The float64 inputs as the normalization's oracle and bounds see them: x is the h normalized
    (``h_normalized`` when given, the kernel's own stored h), weight is offset + weight; the kernel's
    inputs stay under VIEW_EXTRAS' names. The identity for ops without a residual or an offset."""
    spec = get(case.op)
    if not spec.residual and not conv.weight_offset:
        return inp64
    out = dict(inp64)
    if spec.residual:
        h, hn = refnorm.residual_stream(inp64["x"], inp64["residual"], inp64.get("residual_bias"),
                                        h_format=case.dtype if conv.h_format == "storage" else None)
        out.update(x_in=inp64["x"], h=h, x=hn if h_normalized is None else h_normalized)
    if conv.weight_offset and inp64.get("weight") is not None:
        out.update(weight_in=inp64["weight"], weight=conv.weight_offset + np.asarray(inp64["weight"], np.float64))
    return out


def base_inputs(view: dict[str, Any]) -> dict[str, Any]:
    """The normalization's own inputs of an oracle view (x, dy, weight, bias, running statistics)."""
    return {k: v for k, v in view.items() if k not in VIEW_EXTRAS}


def stored_h(case: Case, view: dict[str, Any]) -> np.ndarray:
    """The h a correct forward stores: the exact sum rounded once to the storage format (what a backward
    without a forward of its own is given)."""
    from ..dtypes import round_to

    return round_to(view["h"], case.dtype)
