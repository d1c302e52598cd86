"""What each op means for the harness at call time: the oracle call and the kernel's keyword arguments.

Inputs are a dict of arrays: x, dy, weight, bias, running_mean, running_var
(None where a case has none), and residual, residual_bias, dh for a fused residual-add op (the
oracle calls get its oracle view, conformance.ops.residual: x is the h normalized). The oracle sees them upcast to float64 after
they were rounded to the kernel's dtypes, so a comparison measures the
kernel's own error, not the rounding of its inputs. Everything op-specific
comes from the op's description (conformance.ops.get(case.op)).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

import refnorm

from .registry import get
from .spec import STATISTICS

if TYPE_CHECKING:
    from ..cases.model import Case
    from ..kernel import Conventions

__all__ = ["forward_outputs", "oracle_forward", "oracle_backward", "kernel_kwargs", "saved_form"]


def _f64(a):
    return None if a is None else np.asarray(a).astype(np.float64)


def oracle_forward(case: Case, conv: Conventions, inp: dict[str, Any]) -> refnorm.NormForward:
    """The float64 oracle's forward pass for the case, under the kernel's conventions."""
    spec = get(case.op)
    x, w, b = _f64(inp["x"]), _f64(inp.get("weight")), _f64(inp.get("bias"))
    kw = dict(eps=case.eps, eps_placement=conv.eps_placement, **spec.kwargs(case))
    if spec.has_eval:
        kw.update(training=case.mode == "train",
                  momentum_convention=conv.momentum_convention,
                  running_var_estimator=conv.running_var_estimator)
        if case.mode == "eval" or case.running:
            kw.update(running_mean=_f64(inp["running_mean"]), running_var=_f64(inp["running_var"]),
                      momentum=case.momentum, batches_seen=case.batches_seen)
    return spec.forward(x, weight=w, bias=b, **kw)


def oracle_backward(case: Case, conv: Conventions, inp: dict[str, Any]) -> refnorm.NormBackward:
    """The oracle's backward pass (statistics recomputed from x in float64, or the running ones in eval)."""
    spec = get(case.op)
    x, dy, w = _f64(inp["x"]), _f64(inp["dy"]), _f64(inp.get("weight"))
    kw = dict(eps=case.eps, eps_placement=conv.eps_placement, **spec.kwargs(case))
    if spec.has_eval:
        kw["training"] = case.mode == "train"
        if case.mode == "eval":
            kw.update(running_mean=_f64(inp["running_mean"]), running_var=_f64(inp["running_var"]))
    return spec.backward(dy, x, weight=w, **kw)


def saved_form(name: str, fwd: refnorm.NormForward, case: Case) -> np.ndarray:
    """The oracle's value of a saved statistic in the form a kernel declares."""
    if name == "mean":
        return fwd.mean
    if name == "rstd":
        return fwd.rstd
    if name == "var":
        return fwd.var
    if name == "std":
        return 1.0 / fwd.rstd
    if name == "var_unbiased":
        n = case.group_length
        return fwd.var * (n / (n - 1)) if n > 1 else np.full_like(fwd.var, np.nan)
    raise KeyError(name)


def forward_outputs(case: Case, conv: Conventions, fwd: refnorm.NormForward, declared: tuple[str, ...],
                    updates_running: bool) -> dict[str, np.ndarray]:
    """The oracle's values of the forward outputs the kernel is checked on for this case: y, and in
    training every statistic ``declared`` names (the kernel's outputs decide what is checked, whether or
    not backward receives them) and the running statistics."""
    out = {"y": fwd.y}
    if case.mode == "train":
        for s in declared:
            if s in STATISTICS:
                out[s] = saved_form(s, fwd, case)
        if case.running and updates_running and get(case.op).has_eval:
            out["running_mean"] = fwd.running_mean
            out["running_var"] = fwd.running_var
    return out


def kernel_kwargs(case: Case, entry: str, inp: dict[str, Any], saved: dict[str, Any] | None = None) -> dict[str, Any]:
    """Keyword arguments for a kernel entry point (see docs/kernel-interface.md)."""
    spec = get(case.op)
    kw: dict[str, Any] = {"x": inp["x"], "weight": inp.get("weight"), "eps": case.eps, **spec.kwargs(case)}
    if entry in ("forward", "forward_eval"):
        kw["bias"] = inp.get("bias")
    if entry in ("backward", "backward_eval"):
        kw["dy"] = inp["dy"]
    if spec.residual:  # backward also gets h, the forward's stored residual stream, with the saved statistics
        kw.update(residual=inp["residual"], residual_bias=inp.get("residual_bias"))
        if entry == "backward":
            kw["dh"] = inp["dh"]
    if spec.has_eval:
        kw["training"] = entry in ("forward", "backward")
        if entry in ("forward_eval", "backward_eval") or (entry == "forward" and case.running):
            kw["running_mean"] = inp.get("running_mean")
            kw["running_var"] = inp.get("running_var")
        else:
            kw["running_mean"] = kw["running_var"] = None
        if entry == "forward":
            kw["momentum"] = case.momentum
            kw["batches_seen"] = case.batches_seen
    if entry == "backward" and saved:
        kw.update(saved)
    return kw
