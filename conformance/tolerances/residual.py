"""Bounds of a fused residual add + norm (h, and dx = dh + the norm's gradient) and of a weight offset.

The normalization's outputs are bounded by the op's own rules (bounds.py) applied to the oracle's
view of the inputs (conformance.ops.residual): x is the h that was normalized, the weight is
offset + weight. What the fusion adds (docs/tolerances.md, "Residual add"):

    h      two terms: h^ = fl_s(fl_h(x + residual)) is the correctly rounded sum when the add's format
           (Precision.accumulate_for("h")) is the storage format or has p_h >= 2 p_s + 2 significand
           bits (double rounding is innocuous then: Figueroa 1995, Theorem 1; float32 for float16,
           bfloat16 and float8 storage, float64 for float32), so the bound is half an ulp,
           u_s |h| + eta_s, with 2 u_64 |h| for the oracle's own float64 sum; otherwise u_h |h| more.
           With a residual bias, (x + residual) + residual_bias rounds twice in the add's format:
           u_h (|h| + (1 + u_h) |x + residual|) before the final rounding (Higham 2002, §4.2); an add
           format narrower than storage first rounds each input into it: + u_h (|x| + |residual| (+ |rb|)).
    dx     the norm's bound on its gradient g_x (computed at dx_norm = dx - dh), then the add of dh:
           + u_dx |dx| (the add in dx's own format) + u_s |dx| + eta_s (its rounding to storage;
           + u_dx |dh| where dh is converted to a format narrower than storage; the
           norm's bound already carries the rounding of g_x, which a kernel that adds before it
           rounds never makes).
    input errors  h_format = "accumulate": the h normalized is fl_h of the sum, |h^ - h| <= u_h |h|
           (+ u_h (1 + u_h) |x + residual| with a residual bias), an error of x for every bound;
           a weight offset c: c + weight rounds once in the accumulation format, u_a |c + weight|, an
           error of the weight. Both propagate as a flushed input's does (bounds.py).
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any, Callable

import numpy as np

from .. import dtypes, ops
from ..cases.model import Case
from ..kernel import Conventions, Precision
from .bound import Bound
from .bounds import finish_bound
from .stats import eta

__all__ = ["derive_fused_bounds", "h_rounds_once"]

_U64 = dtypes.unit_roundoff("float64")


def h_rounds_once(storage: str, add_format: str) -> bool:
    """Whether fl_s(fl_add(a + b)) is the correctly rounded sum of two storage-format numbers: the add's
    format is the storage format, or has at least 2 p + 2 bits for the storage format's p (Figueroa 1995)."""
    if add_format == storage:
        return True
    p_s = int(dtypes.finfo(storage).nmant) + 1
    p_a = int(dtypes.finfo(add_format).nmant) + 1
    return p_a >= 2 * p_s + 2


def _floor(p: Precision, fmt: str) -> float:
    """One rounding's absolute error near zero in ``fmt``: eta (stats.py), or the smallest normal value
    where subnormals are flushed (as bounds._Context.floor)."""
    return float(dtypes.finfo(fmt).smallest_normal) if p.subnormals == "flush" else eta(fmt)


def _h_errors(p: Precision, view: dict[str, Any]) -> tuple[np.ndarray, str]:
    """|fl_h(sum) - sum| bound before the rounding to storage, and its formula."""
    u_h = dtypes.unit_roundoff(p.accumulate_for("h"))
    h = np.abs(view["h"])
    x, r = np.asarray(view["x_in"], np.float64), np.asarray(view["residual"], np.float64)
    rb = view.get("residual_bias")
    with np.errstate(invalid="ignore", over="ignore"):
        if u_h > dtypes.unit_roundoff(p.storage):
            # the add's format is narrower than storage: each input is rounded into it first (u_cv)
            # (and an input below the add format's range becomes 0 or a subnormal of it: 4 eta_h)
            eta_h = _floor(p, p.accumulate_for("h"))
            cv = u_h * (np.abs(x) + np.abs(r) + (0.0 if rb is None else np.abs(np.asarray(rb, np.float64)))) \
                + 4.0 * eta_h
            cv_t = (" + u_h (|x| + |residual|" + ("" if rb is None else " + |residual_bias|")
                    + ") + 4 eta_h (inputs converted)")
        else:
            cv, cv_t = 0.0, ""
        if rb is None:
            if not cv_t and h_rounds_once(p.storage, p.accumulate_for("h")):
                return 2.0 * _U64 * h, ("2 u_64 |h| (correctly rounded: one rounding, or a double rounding that "
                                        "is innocuous)")
            return u_h * h + cv, "u_h |h|" + cv_t
        s1 = np.abs(x + r)
        return u_h * (h + (1.0 + u_h) * s1) + cv, "u_h (|h| + (1 + u_h) |x + residual|)" + cv_t


def derive_fused_bounds(case: Case, precision: Precision, conventions: Conventions, view: dict[str, Any],
                        expected: dict[str, np.ndarray], derive: Callable) -> dict[str, Bound]:
    """Bounds of every output in ``expected`` for a fused residual-add op or a weight offset (module
    docstring); ``derive`` is bounds._derive, the normalization's own rules."""
    spec = ops.get(case.op)
    p = precision.resolved()
    errs: dict[str, np.ndarray] = {}
    if conventions.weight_offset and view.get("weight_in") is not None:
        errs["weight"] = dtypes.unit_roundoff(p.accumulate) * np.abs(np.asarray(view["weight"], np.float64))
    h_pre = h_text = None
    if spec.residual:
        h_pre, h_text = _h_errors(p, view)
        if conventions.h_format == "accumulate":
            errs["x"] = h_pre
    dh = view.get("dh") if spec.residual else None
    norm_expected = {k: v for k, v in expected.items() if k != "h"}
    if dh is not None and "dx" in norm_expected:
        norm_expected["dx"] = np.asarray(expected["dx"], np.float64) - dh
    out = derive(case, precision, conventions, ops.base_inputs(view), norm_expected, errs or None) \
        if norm_expected else {}
    u_s, eta_s = dtypes.unit_roundoff(p.storage), _floor(p, p.storage)
    if "h" in expected:
        e = np.asarray(expected["h"], np.float64)
        with np.errstate(invalid="ignore", over="ignore"):
            vals = h_pre * (1.0 + u_s) + u_s * np.abs(e) + eta_s
        out["h"] = finish_bound("h", e, vals, f"{h_text} + final u_s |h| + eta_s",
                                {"u_s": u_s, "u_h": dtypes.unit_roundoff(p.accumulate_for("h")),
                                 "residual_bias": float(view.get("residual_bias") is not None)}, (), p)
    if dh is not None and "dx" in out:
        b = out["dx"]
        e = np.asarray(expected["dx"], np.float64)
        u_o = dtypes.unit_roundoff(p.accumulate_for("dx"))
        u_cv = u_o if u_o > u_s else 0.0  # dh converted to an arithmetic format narrower than storage
        with np.errstate(invalid="ignore", over="ignore"):
            vals = b.values + (u_o + u_s) * np.abs(e) + u_cv * np.abs(dh) + eta_s
        terms = {k: v for k, v in b.terms.items() if k not in ("nonfinite_bound_elements", "bound_over_scale",
                                                                  "accept_elements")}
        out["dx"] = replace(finish_bound("dx", e, vals, b.formula + "; dx = dh + g_x: + u_o |dx| + u_s |dx| "
                                         "+ u_cv |dh| + eta_s for the add of dh", terms, (), p))
    return {k: out[k] for k in expected}
