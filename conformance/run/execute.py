"""One case, end to end: make inputs, call the kernel, call the oracle, derive bounds, compare.

Runs inside a worker process, so that a kernel that crashes or hangs costs its case only.
Every call of a kernel entry point goes through conformance.run.isolation.call_kernel
(floating-point state restored, forked copies of the worker caught).
"""

from __future__ import annotations

import time
import traceback
from dataclasses import replace
from typing import Any, Mapping

import numpy as np

from .. import dtypes, ops, quantized
from ..arrays import as_numpy
from ..cases.generators import make_inputs
from ..cases.model import Case
from ..compare import compare_output
from ..evidence import invariant_violations, reference_scales, zero_variance
from ..kernel import Kernel, call_with
from ..results import CaseResult, cap_text
from ..tolerances import derive_bounds, output_dtype, override_bound
from .isolation import ForkedCopy, call_kernel
from ..tolerances.ranges import case_beyond_range

__all__ = ["execute_case", "skip_reason", "KernelCallError", "describe_exception", "declared_outputs",
           "oracle_expected", "case_bounds", "judged", "given_saved"]


#: The per-case timeout of the worker process running the case (set by conformance.run.pool; None in
#: process): a failed case's diagnosis stops starting hypotheses at 80% of it.
CASE_TIMEOUT_S: float | None = None


class KernelCallError(Exception):
    """The kernel raised, or returned something that does not match its declaration."""


def skip_reason(kernel: Kernel, case: Case) -> str | None:
    """Why the kernel's declaration excludes this case, or None when it applies."""
    if case.op != kernel.op:
        return f"op {case.op} is not the kernel's op {kernel.op}"
    why = quantized.skip_reason(kernel, case)
    if why:
        return why
    if case.dtype not in kernel.dtypes:
        return f"dtype {case.dtype} not declared (kernel declares {', '.join(kernel.dtypes)})"
    if case.layout in ("channels_first", "channels_last") and case.layout not in kernel.layouts:
        return f"layout {case.layout} not declared"
    if case.strides != "contiguous" and not kernel.strided:
        return "non-contiguous input; the kernel declares strided=False"
    if (case.weight == "none" or case.bias == "none") and not kernel.optional_params:
        return "weight or bias absent; the kernel declares optional_params=False"
    if case.running and case.momentum is None and not kernel.momentum_none:
        return "cumulative average (momentum=None); the kernel declares momentum_none=False"
    if case.mode == "train" and case.group_length < kernel.min_reduction:
        return f"reduction of {case.group_length} element(s); the kernel declares min_reduction={kernel.min_reduction}"
    fwd = "forward" if case.mode == "train" else "forward_eval"
    bwd = "backward" if case.mode == "train" else "backward_eval"
    if getattr(kernel, fwd) is None and getattr(kernel, bwd) is None:
        return f"{case.mode} mode: the kernel has neither {fwd} nor {bwd}"
    return None


def _named(result: Any, names: tuple[str, ...], entry: str) -> dict[str, Any]:
    """Map a kernel's return value (array, tuple in declared order, or dict) to names."""
    if isinstance(result, Mapping):
        missing = [n for n in names if n not in result]
        if missing:
            raise KernelCallError(f"{entry} returned a dict without {missing} (declared {list(names)})")
        return {n: result[n] for n in names}
    if isinstance(result, list) and (len(names) == 1 or entry == "forward_eval"):
        # One declared output: a list is neither an array (it has no dtype) nor a sequence of outputs.
        raise KernelCallError(f"{entry} returned a list for its one declared output {names[0]}: return an array "
                              "in the kernel's dtype (a tuple or dict is read as several outputs)")
    if isinstance(result, (tuple, list)):
        if len(result) != len(names):
            raise KernelCallError(f"{entry} returned {len(result)} values, declared {len(names)}: {list(names)}")
        return dict(zip(names, result))
    if len(names) == 1 or entry == "forward_eval":
        return {names[0]: result}
    raise KernelCallError(f"{entry} returned one {type(result).__name__}, declared {len(names)} outputs: {list(names)}")


#: Characters of a kernel's exception text kept in a case's message (the rest is cut, and the cut said).
EXCEPTION_TEXT_LIMIT = 2000


def describe_exception(e: BaseException, frames: int = 4) -> str:
    """``Type: text`` (text capped at EXCEPTION_TEXT_LIMIT) and the innermost ``frames`` stack frames,
    the text written once."""
    tb = "".join(traceback.format_tb(e.__traceback__, limit=-frames)) if e.__traceback__ else ""
    return (f"{type(e).__name__}: {cap_text(str(e), EXCEPTION_TEXT_LIMIT)}"
            + (f"\nTraceback (innermost {frames} frames):\n{tb.rstrip()}" if tb else ""))


def _call(kernel: Kernel, entry: str, kwargs: dict[str, Any]) -> Any:
    fn = getattr(kernel, entry)
    try:
        return call_kernel(lambda: call_with(fn, kwargs))
    except ForkedCopy:
        raise
    except Exception as e:  # the kernel's own failure, not the harness's
        raise KernelCallError(f"{entry} raised {describe_exception(e)}") from e


def _snapshot(inp: dict[str, Any]) -> dict[str, np.ndarray]:
    return {k: np.array(v, order="C") for k, v in inp.items() if isinstance(v, np.ndarray)}


def _changed(before: np.ndarray, after: np.ndarray) -> bool:
    """Whether the bits differ (NaN payloads and signed zeros included): compare as integers."""
    if before.shape != after.shape or before.dtype != after.dtype:
        return True
    view = {1: np.uint8, 2: np.uint16, 4: np.uint32, 8: np.uint64}[before.dtype.itemsize]
    return not np.array_equal(np.ascontiguousarray(before).view(view), np.ascontiguousarray(after).view(view))


def given_saved(kernel: Kernel, case: Case, oracle_fwd, view: dict[str, Any] | None = None) -> dict[str, np.ndarray]:
    """The saved statistics a training backward is given when the kernel has no forward to take them
    from: the oracle's, rounded to the params dtype, and a fused residual-add op's stored h (from the
    oracle ``view``); empty when it has a forward or saves nothing."""
    if case.mode != "train" or kernel.forward is not None:
        return {}
    from ..dtypes import round_to

    prec = kernel.precision_for(case.dtype)
    out = {s: round_to(ops.saved_form(s, oracle_fwd, case), output_dtype(s, prec)) for s in kernel.conventions.saved}
    if view is not None and ops.get(case.op).residual:
        out["h"] = ops.stored_h(case, view)
    return out


def _kernel_outputs(kernel: Kernel, case: Case, inp: dict[str, Any], oracle_fwd,
                    view: dict[str, Any] | None = None) -> tuple[dict[str, Any], list[str]]:
    """Call the kernel's entry points for the case; return its outputs by name and the inputs it modified."""
    conv = kernel.conventions
    train = case.mode == "train"
    out: dict[str, Any] = {}
    modified: list[str] = []
    fwd = "forward" if train else "forward_eval"
    saved: dict[str, Any] = {}
    if getattr(kernel, fwd) is not None:
        run_inp = dict(inp)
        inplace = train and case.running and conv.running == "inplace"
        if inplace:  # the kernel is meant to write these: give it its own copies
            run_inp["running_mean"] = inp["running_mean"].copy()
            run_inp["running_var"] = inp["running_var"].copy()
        before = _snapshot({k: v for k, v in run_inp.items() if not (inplace and k.startswith("running_"))})
        kw = ops.kernel_kwargs(case, fwd, run_inp)
        if train:
            kw.update(quantized.forward_kwargs(kernel, case, oracle_fwd))  # a static scale (quantized y)
        res = _call(kernel, fwd, kw)
        names = kernel.outputs if train else ("y",)
        got = _named(res, names, fwd)
        if train and (not case.running or not kernel.updates_running):
            got.pop("running_mean", None)
            got.pop("running_var", None)
        if inplace and kernel.updates_running:
            got["running_mean"] = run_inp["running_mean"]
            got["running_var"] = run_inp["running_var"]
        modified += [k for k in before if _changed(before[k], run_inp[k])]
        out.update(got)
        saved = {s: got[s] for s in (*conv.saved, *ops.get(case.op).residual_outputs) if s in got} if train else {}
    bwd = "backward" if train else "backward_eval"
    if getattr(kernel, bwd) is not None:
        if train and not saved:
            saved = given_saved(kernel, case, oracle_fwd, view)
        if train and ops.get(case.op).residual and "h" not in saved and view is not None:
            saved = {**saved, "h": ops.stored_h(case, view)}  # a forward that does not return h
        before = _snapshot(inp)
        res = _call(kernel, bwd, ops.kernel_kwargs(case, bwd, inp, saved=saved))
        out.update(_named(res, kernel.grads, bwd))
        modified += [k for k in before if k not in modified and _changed(before[k], inp[k])]
    return out, modified


def execute_case(kernel: Kernel, case: Case, seed: int,
                 overrides: Mapping[str, tuple[float, float]] | None = None) -> CaseResult:
    """Run one case; never raises for a kernel's failure (that becomes the case's status).

    Floating-point warnings are silenced: NaN and Inf cases produce them by design, and
    the comparison, not a warning on stderr, reports what the kernel did with them.
    """
    import warnings

    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        return _execute(kernel, case, seed, overrides)


def declared_outputs(kernel: Kernel, case: Case) -> tuple[str, ...]:
    """The outputs the kernel's entry points give for the case, as the harness names them.

    Training: ``kernel.outputs`` (running_mean/running_var only when the case updates running
    statistics and the kernel declares updates_running; read back from the arrays it was given
    when ``conventions.running == "inplace"``), then ``kernel.grads`` when it has a backward.
    Eval: y from forward_eval, then the grads from backward_eval.
    """
    train = case.mode == "train"
    names: list[str] = []
    if getattr(kernel, "forward" if train else "forward_eval") is not None:
        if not train:
            names.append("y")
        else:
            running = case.running and kernel.updates_running
            names += [n for n in kernel.outputs if running or n not in ops.RUNNING_OUTPUTS]
            if running and kernel.conventions.running == "inplace":
                names += [n for n in ops.RUNNING_OUTPUTS if n not in names]
    if getattr(kernel, "backward" if train else "backward_eval") is not None:
        names += list(kernel.grads)
    return tuple(names)


def oracle_expected(kernel: Kernel, case: Case, inp64: dict[str, Any], fwd, names: tuple[str, ...]) -> dict[str, np.ndarray]:
    """The oracle's values (float64) of the outputs ``names`` that the case checks, in the order the
    harness checks them: the forward outputs, then dx, dweight (with a weight), dbias (with a bias)."""
    conv = kernel.conventions
    expected = ops.forward_outputs(case, conv, fwd, kernel.outputs, kernel.updates_running)
    if "h" in names:
        expected["h"] = inp64["h"]
    if any(k in names for k in ops.GRADS):
        bwd = ops.oracle_backward(case, conv, inp64)
        expected["dx"] = bwd.dx if inp64.get("dh") is None else bwd.dx + inp64["dh"]
        if case.weight != "none":
            expected["dweight"] = bwd.dweight
        if case.bias != "none":
            expected["dbias"] = bwd.dbias
    return {k: v for k, v in expected.items() if k in names}


def case_bounds(case: Case, prec, conv, inp64: dict[str, Any], expected: dict[str, np.ndarray],
                overrides: Mapping[str, tuple[float, float]] | None = None) -> dict[str, Any]:
    """The derived bound of every expected output, or the fixed atol + rtol |expected| of an override."""
    bounds = derive_bounds(case, prec, conv, inp64, expected)
    for name, scale in reference_scales(case, inp64, tuple(expected)).items():
        bounds[name].terms["reference_scale"] = scale  # what a sum's bound is measured against (evidence.py)
    for name, (atol, rtol) in (overrides or {}).items():
        if name in expected:  # a fixed tolerance replaces the bound, not what a correct result may be
            bounds[name] = replace(override_bound(name, expected[name], atol, rtol), accept=bounds[name].accept)
    return bounds


def judged(case: Case, results: list, modified: list[str] = (), **timing: float) -> CaseResult:
    """The case's result from its output comparisons: failed when one output is not within its bound
    (or the kernel modified an input), else passed."""
    for r in results:
        if r.passed and r.inconclusive and zero_variance(case):
            # zero-variance groups: the outputs have no scale of their own; these cases are there for the
            # NaN/Inf classes (a lost eps), which the comparison judged
            r.class_only, r.inconclusive = r.inconclusive, ""
            r.message += "; judged on its NaN/Inf classes only (a zero-variance group)"
    failed = [r for r in results if not r.passed]
    status = "failed" if failed or modified else ("inconclusive" if any(r.inconclusive for r in results)
                                                  else "passed")
    msgs = []
    if modified:
        msgs.append(f"the kernel modified its input(s) in place: {', '.join(modified)}")
    msgs += [f"{r.name}: {r.message}" for r in failed]
    if not failed and not modified:
        msgs += [f"{r.name}: inconclusive: {r.inconclusive}" for r in results if r.inconclusive]
    return CaseResult(id=case.id, case=case.as_dict(), status=status, message="\n".join(msgs),
                      outputs=[r.to_dict() for r in results], modified_inputs=list(modified), **timing)


def _normalized_h(kernel: Kernel, case: Case, view: dict[str, Any], fwd, raw: dict[str, Any]):
    """(view, fwd) with the kernel's own stored h as what was normalized, when it is declared to normalize
    h rounded to the storage format and returned an h of the case's shape that differs from the oracle's
    rounding (a double rounding through the accumulation format, or a wrong h, which h's own check
    reports): y and the statistics are then checked as the normalization of the h the kernel passed on."""
    if not ops.get(case.op).residual or kernel.conventions.h_format != "storage" or raw.get("h") is None:
        return view, fwd
    try:
        hk = as_numpy(raw["h"])
    except Exception:  # unreadable: the comparison of h reports it
        return view, fwd
    if hk.shape != tuple(case.shape) or hk.dtype != dtypes.dtype_of(case.dtype):
        return view, fwd
    hk = hk.astype(np.float64)
    if np.array_equal(hk, view["x"], equal_nan=True):
        return view, fwd
    new = dict(view, x=hk)
    return new, ops.oracle_forward(case, kernel.conventions, new)


def _execute(kernel: Kernel, case: Case, seed: int,
             overrides: Mapping[str, tuple[float, float]] | None) -> CaseResult:
    t0 = time.perf_counter()
    reason = skip_reason(kernel, case)
    if reason:
        return CaseResult(id=case.id, case=case.as_dict(), status="skipped", message=reason)
    if ops.get(case.op).replicas:  # R processes over a process group, each given its shard
        from .replicas import run_replica_case

        return run_replica_case(kernel, case, seed, dict(overrides or {}))
    conv = kernel.conventions
    prec = kernel.precision_for(case.dtype)
    inp = make_inputs(case, prec, seed)
    inp64 = ops.oracle_view(case, conv, {k: (None if v is None else np.asarray(v).astype(np.float64))
                                         for k, v in inp.items()})
    beyond = case_beyond_range(case, prec, ops.base_inputs(inp64))
    if beyond:  # not a correct kernel's failure: the declared precision does not promise this range
        return CaseResult(id=case.id, case=case.as_dict(), status="skipped", message=beyond,
                          duration_s=time.perf_counter() - t0)

    t_or = time.perf_counter()
    fwd = ops.oracle_forward(case, conv, inp64)
    oracle_s = time.perf_counter() - t_or

    t_k = time.perf_counter()
    try:
        raw, modified = _kernel_outputs(kernel, case, inp, fwd, inp64)
    except KernelCallError as e:
        return CaseResult(id=case.id, case=case.as_dict(), status="error", message=str(e),
                          duration_s=time.perf_counter() - t0)
    except ForkedCopy as e:  # a protocol error of the kernel's making: the worker is replaced after it
        return CaseResult(id=case.id, case=case.as_dict(), status="crashed", message=f"protocol error: {e}",
                          duration_s=time.perf_counter() - t0)
    kernel_s = time.perf_counter() - t_k

    t_or = time.perf_counter()
    inp64, fwd = _normalized_h(kernel, case, inp64, fwd, raw)
    expected = oracle_expected(kernel, case, inp64, fwd, tuple(raw))
    oracle_s += time.perf_counter() - t_or
    bounds = case_bounds(case, prec, conv, inp64, expected, overrides) if expected else {}  # {}: only y_q

    results = []
    for name, exp in expected.items():
        act = raw[name]
        if act is None:
            return CaseResult(id=case.id, case=case.as_dict(), status="failed",
                              message=f"output {name}: the kernel returned None for a declared output",
                              duration_s=time.perf_counter() - t0)
        try:
            act = as_numpy(act)
        except Exception as e:
            return CaseResult(id=case.id, case=case.as_dict(), status="error",
                              message=f"output {name}: cannot read the returned {type(act).__name__} as an array: {e}",
                              duration_s=time.perf_counter() - t0)
        r = compare_output(name, act, exp, bounds[name], dtype=output_dtype(name, prec))
        if name == "y" and r.passed:
            rp = prec.resolved()
            u = max(dtypes.unit_roundoff(f) for f in (rp.storage, rp.params, rp.accumulate, rp.statistics))
            broken = invariant_violations(case, conv, inp64, act, output_dtype(name, prec), u)
            if broken:  # a wrong answer that the declared bound is too loose to see
                r.passed, r.invariant, r.inconclusive = False, broken, ""
                r.message = f"{broken}\n{r.message}"
        results.append(r)
    if kernel.quantization is not None and case.out:
        results += quantized.check_outputs(kernel, case, prec, conv, inp64, fwd, raw)
    res = judged(case, results, modified, duration_s=time.perf_counter() - t0, kernel_s=kernel_s,
                 oracle_s=oracle_s)
    # --- diagnosis (conformance.diagnosis): only adds information to a failed case, never changes it
    if res.status == "failed":
        try:
            from ..diagnosis import attach

            left = None if CASE_TIMEOUT_S is None else 0.8 * CASE_TIMEOUT_S - (time.perf_counter() - t0)
            attach(res, kernel=kernel, case=case, prec=prec, conv=conv, inp=inp, inp64=inp64, raw=raw,
                   expected=expected, bounds=bounds, results=results, overrides=overrides, time_left_s=left)
        except Exception:
            pass  # attach records its own errors; this guards its import
    # --- end diagnosis
    return res
