"""The declaration of a kernel under test: what it computes, in which precision, with which conventions.

A kernel is a set of plain callables on arrays in the kernel's own dtype. The
harness calls each with keyword arguments only (see docs/kernel-interface.md);
arguments a callable does not name are not passed unless it takes ``**kwargs``.
"""

from __future__ import annotations

import importlib
import importlib.util
import inspect
import math
import sys
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any, Callable, Mapping

from . import dtypes
from . import ops as _ops
from .ops import GRADS, OPS, RUNNING_OUTPUTS, SAVED_FORMS, STATISTICS
from .ops.spec import H_FORMATS, RESIDUAL_OUTPUTS
from .quantization import Quantization, check_declaration as _check_quantization, quant_outputs
from refnorm.replicas import PARAM_GRAD_MODES

__all__ = [
    "OPS",
    "ENTRY_POINTS",
    "SUMMATION_MODELS",
    "SUBNORMAL_MODES",
    "OVERFLOW_MODES",
    "Y_FORMS",
    "SAVED_FORMS",
    "Precision",
    "Conventions",
    "Kernel",
    "KernelError",
    "load_kernel",
    "unchecked_outputs",
    "split_spec",
    "with_spec_params",
]

ENTRY_POINTS = ("forward", "forward_eval", "backward", "backward_eval")
SUMMATION_MODELS = ("probabilistic", "pairwise", "worst")
LAYOUTS = ("channels_first", "channels_last")
RUNNING_STYLES = ("return", "inplace")
#: What happens to values in the subnormal range: "keep" (gradual underflow, IEEE 754-2019 §3.3,
#: §7.5) or "flush" (inputs read as zero and results written as zero: FTZ/DAZ, common practice on
#: accelerators and with fast-math compiler flags).
SUBNORMAL_MODES = ("keep", "flush")
#: What an out-of-range result becomes when rounded to an output's format: "nonsaturating" (+-Inf
#: in formats with infinities, IEEE 754-2019 §7.4; NaN in float8_e4m3fn, which has none, OCP 8-bit
#: floating point specification v1.0, 2023, non-saturating conversion: from memory) or "saturate"
#: (+-the format's largest finite value, the OCP specification's saturating conversion).
OVERFLOW_MODES = ("nonsaturating", "saturate")
#: How y is formed from the statistics: "centred" ((x - mean) * (weight * rstd) + bias, or any
#: order that subtracts the mean from x first) or "folded" (x * scale + shift with scale =
#: weight * rstd, shift = bias - mean * scale, common practice for inference kernels).
Y_FORMS = ("centred", "folded")


class KernelError(ValueError):
    """A kernel declaration or spec that cannot be used; the message says what is wrong."""


@dataclass(frozen=True)
class Precision:
    """How a kernel stores and accumulates, for one storage dtype.

    storage : dtype of x, y, dy and dx (the case's dtype).
    params : dtype of weight, bias, running and saved statistics, dweight and dbias
        (mixed precision: e.g. float16 storage with float32 params). None: the storage dtype.
    accumulate : dtype of sums and of the arithmetic on statistics. None: float32 for
        formats narrower than float32 (common practice), else the storage dtype.
    summation : error model of the kernel's sums: "probabilistic" (Higham & Mary 2019,
        error ~ lambda sqrt(n) u; the default), "pairwise" (ceil(log2 n) u, Higham 2002
        §4.2) or "worst" (n u / (1 - n u), Higham 2002 §4.2, recursive summation).
    lam : the probabilistic model's lambda (safety factor), see docs/tolerances.md.
    output_accumulate : per-output accumulation dtype where a kernel differs, e.g.
        {"dweight": "bfloat16", "dbias": "bfloat16"} for a kernel whose parameter
        gradients are summed in bfloat16.
    statistics : the format the mean, variance and rstd are rounded to before they are used
        (y, dx and the saved values are computed from the rounded ones), while the sums stay
        in ``accumulate``. None: kept in the accumulation format.
    saved : the format of the saved statistics forward returns (and backward receives).
        None: the params format.
    subnormals : "keep" (gradual underflow) or "flush" (subnormal inputs read as zero and
        subnormal results written as zero: FTZ/DAZ).
    output_summation : per-output summation model where an output's own sums differ from
        ``summation``, e.g. {"dweight": "worst", "dbias": "worst"} for sequential atomics.
    overflow : what an out-of-range result becomes in its output format: "nonsaturating"
        (+-Inf, or NaN in float8_e4m3fn, which has no infinity) or "saturate" (+-largest finite).
    """

    storage: str = "float32"
    params: str | None = None
    accumulate: str | None = None
    summation: str = "probabilistic"
    lam: float = 8.0
    output_accumulate: Mapping[str, str] = field(default_factory=dict)
    statistics: str | None = None
    saved: str | None = None
    subnormals: str = "keep"
    output_summation: Mapping[str, str] = field(default_factory=dict)
    overflow: str = "nonsaturating"

    def resolved(self) -> "Precision":
        """A copy with params, accumulate, statistics and saved filled in."""
        p = self.params or self.storage
        if self.accumulate:
            a = self.accumulate
        elif dtypes.unit_roundoff(self.storage) > dtypes.unit_roundoff("float32"):
            a = "float32"
        else:
            a = self.storage
        return replace(self, params=p, accumulate=a, statistics=self.statistics or a, saved=self.saved or p,
                       output_accumulate=dict(self.output_accumulate),
                       output_summation=dict(self.output_summation))

    def accumulate_for(self, output: str) -> str:
        return self.output_accumulate.get(output, self.accumulate or self.resolved().accumulate)

    def summation_for(self, output: str) -> str:
        """The summation model of an output's own sums (output_summation, else summation)."""
        return self.output_summation.get(output, self.summation)

    def as_dict(self) -> dict[str, Any]:
        r = self.resolved()
        return {f.name: (dict(getattr(r, f.name)) if f.name in _MAPPINGS else getattr(r, f.name))
                for f in fields(r)}


_MAPPINGS = ("output_accumulate", "output_summation")


@dataclass(frozen=True)
class Conventions:
    """The conventions a kernel follows where libraries disagree (see docs/conventions.md).

    momentum_convention : "new" (momentum weights the batch value: torch) or "old" (Keras).
    running_var_estimator : "unbiased" (torch) or "biased" (Keras) for the running variance.
    eps_placement : "inside" (1/sqrt(var + eps)) or "outside" (1/(sqrt(var) + eps)).
    saved : names of the saved statistics that forward returns, from ("mean",) + SAVED_FORMS;
        empty when it returns none. RMS norm has no mean.
    running : "return" (forward returns running_mean, running_var) or "inplace"
        (forward updates the running_mean and running_var arrays it is given).
    y_form : "centred" (y = (x - mean) * scale + bias: the mean is subtracted from x first) or
        "folded" (y = x * scale + shift, shift = bias - mean * scale: a rounding of |mean| scale
        that cancels where |mean| is large against the spread; docs/tolerances.md).
    h_format : fused residual-add ops: "storage" (h = x + residual is rounded to the storage format,
        which h is stored in, before it is normalized: the usual choice) or "accumulate" (the sum is
        normalized as the accumulation format holds it; backward recomputes it from x and residual).
    weight_offset : RMS norm and residual add + RMS norm: the scale is weight_offset + weight, with
        the weight stored centred at zero (1: y = x r (1 + weight)); 0 for the usual weight.
    param_grads : multi-replica ops: "reduced" (each replica returns dweight, dbias summed over
        every replica: what an all-reduce of the gradients gives, torch DDP's usual result, from
        memory) or "local" (its own shard's sums, left to the framework to reduce).
    """

    momentum_convention: str = "new"
    running_var_estimator: str = "unbiased"
    eps_placement: str = "inside"
    saved: tuple[str, ...] = ()
    running: str = "return"
    y_form: str = "centred"
    h_format: str = "storage"
    weight_offset: float = 0.0
    param_grads: str = "reduced"

    def as_dict(self) -> dict[str, Any]:
        return {f.name: (list(getattr(self, f.name)) if f.name == "saved" else getattr(self, f.name))
                for f in fields(self)}


@dataclass(frozen=True)
class Kernel:
    """A kernel under test and its declaration.

    forward(x, weight, bias, *, eps, ...) -> y | tuple in ``outputs`` order | dict
    forward_eval(x, weight, bias, *, eps, running_mean, running_var, ...) -> y
    backward(dy, x, weight, *, eps, <saved statistics>, ...) -> tuple in ``grads`` order | dict
    backward_eval(dy, x, weight, *, eps, running_mean, running_var, ...) -> likewise

    ``min_reduction`` is the shortest training-mode reduction the kernel accepts
    (torch refuses one value per channel in batch norm: 2); shorter cases are skipped.
    ``strided=False`` skips cases with non-contiguous inputs; ``optional_params=False``
    skips cases without weight or bias; ``momentum_none=False`` skips cumulative-average
    cases; ``updates_running=False`` leaves running statistics unchecked.

    ``outputs`` names what forward returns, in order, and so what is checked: "y" first,
    then any statistics of the op (every name in ``conventions.saved``, which backward
    receives, and others that are only checked), then "running_mean", "running_var" when
    ``conventions.running == "return"``. ``grads`` is a subset of (dx, dweight, dbias).
    ``precision`` maps each supported storage dtype to its Precision (a single
    Precision applies to every dtype in ``dtypes``).
    ``device`` is where the kernel runs, as its library names it (torch's "cpu" or "cuda:0",
    an ONNX Runtime execution provider); None when not declared (a host-side kernel).
    ``source`` is the spec load_kernel loaded it from; a multi-replica kernel's replicas (one new
    process each) load it from there, or receive it pickled when it has none.

    A multi-replica op (replica_batch_norm: conformance.run.replicas) is called per replica as
    forward(x, weight, bias, *, rank, world_size, comm, axis, eps, running_mean, running_var,
    momentum) -> {"y", "mean", "rstd"[, "running_mean", "running_var"]} and backward(dy, x, weight,
    *, rank, world_size, comm, mean, rstd, axis, eps) -> {"dx", "dweight", "dbias"}, with x and dy
    the replica's shard.
    """

    name: str
    op: str
    forward: Callable | None = None
    forward_eval: Callable | None = None
    backward: Callable | None = None
    backward_eval: Callable | None = None
    outputs: tuple[str, ...] = ("y",)
    grads: tuple[str, ...] = ("dx", "dweight", "dbias")
    dtypes: tuple[str, ...] = ("float32",)
    layouts: tuple[str, ...] = LAYOUTS
    strided: bool = True
    optional_params: bool = True
    momentum_none: bool = True
    updates_running: bool = True
    min_reduction: int = 1
    conventions: Conventions = field(default_factory=Conventions)
    precision: Any = None
    notes: str = ""
    device: str | None = None
    quantization: Quantization | None = None  # a quantized y (conformance.quantization); None: y as is
    source: str | None = None  # the spec it was loaded from (load_kernel): how a new process loads it again

    def __post_init__(self) -> None:
        _validate(self)

    @property
    def entry_points(self) -> tuple[str, ...]:
        return tuple(e for e in ENTRY_POINTS if getattr(self, e) is not None)

    def precision_for(self, dtype: str) -> Precision:
        """The resolved Precision for storage ``dtype``."""
        p = self.precision
        if p is None:
            return Precision(storage=dtype).resolved()
        if isinstance(p, Precision):
            return replace(p, storage=dtype).resolved()
        if dtype not in p:
            raise KernelError(f"kernel {self.name!r} declares no precision for dtype {dtype!r}")
        return replace(p[dtype], storage=dtype).resolved()

    def declaration(self) -> dict[str, Any]:
        """Everything a report must record about the kernel (JSON-ready)."""
        return {
            "name": self.name,
            "op": self.op,
            "entry_points": list(self.entry_points),
            "outputs": list(self.outputs),
            "grads": list(self.grads),
            "dtypes": list(self.dtypes),
            "layouts": list(self.layouts),
            "strided": self.strided,
            "optional_params": self.optional_params,
            "momentum_none": self.momentum_none,
            "updates_running": self.updates_running,
            "min_reduction": self.min_reduction,
            "conventions": self.conventions.as_dict(),
            "precision": {d: self.precision_for(d).as_dict() for d in self.dtypes},
            "notes": self.notes,
            "unchecked": unchecked_outputs(self),
            "device": self.device,
            "quantization": None if self.quantization is None else self.quantization.as_dict(),
        }


def _validate(k: Kernel) -> None:
    """Check a declaration strictly, at construction (so a bad one fails at load, exit 2).

    Types are exact: a flag is a bool (the string "no" is not False), a count is an int
    (not a bool or "2"), a list of names is a tuple or list of distinct strings (lists are
    stored as tuples). What forward returns must match what the conventions say it returns.
    """
    def bad(what: str) -> None:
        raise KernelError(f"kernel {k.name!r}: {what}")

    if not isinstance(k.name, str) or not k.name:
        raise KernelError(f"kernel name is {k.name!r}, expected a non-empty string")
    spec = _ops.find(k.op) if isinstance(k.op, str) else None
    if spec is None:
        bad(f"op is {k.op!r}, expected one of {', '.join(OPS)}")
    if not k.entry_points:
        bad("no entry point: give at least one of forward, forward_eval, backward, backward_eval")
    for e in k.entry_points:
        if not callable(getattr(k, e)):
            bad(f"{e} is {type(getattr(k, e)).__name__}, expected a callable")
    if not spec.has_eval and (k.forward_eval or k.backward_eval):
        bad(f"{k.op} has no eval mode; forward_eval/backward_eval are for {' and '.join(_ops.with_eval())}")
    for f in ("outputs", "grads", "dtypes", "layouts"):
        _names(k, f, getattr(k, f), bad)
    for f in ("strided", "optional_params", "momentum_none", "updates_running"):
        v = getattr(k, f)
        if not isinstance(v, bool):
            bad(f"{f} is {type(v).__name__} {v!r}, expected True or False")
    mr = k.min_reduction
    if isinstance(mr, bool) or not isinstance(mr, int) or mr < 1:
        bad(f"min_reduction is {type(mr).__name__} {mr!r}, expected an integer >= 1 (the shortest training-mode "
            "reduction the kernel accepts)")
    if not isinstance(k.notes, str):
        bad(f"notes is {type(k.notes).__name__}, expected a string")
    if not k.dtypes:
        bad("dtypes is empty, expected at least one storage dtype")
    if k.device is not None and not (isinstance(k.device, str) and k.device.strip()):
        bad(f"device is {k.device!r}, expected a non-empty string (e.g. 'cpu', 'cuda:0') or None")
    for d in k.dtypes:
        if d not in dtypes.FORMATS:
            bad(f"dtype {d!r} is not one of {', '.join(dtypes.FORMATS)}")
    if not k.layouts:
        bad(f"layouts is empty, expected one or both of {', '.join(LAYOUTS)}")
    for lay in k.layouts:
        if lay not in LAYOUTS:
            bad(f"layout {lay!r} is not one of {', '.join(LAYOUTS)}")
    c = k.conventions
    if not isinstance(c, Conventions):
        bad(f"conventions is {type(c).__name__}, expected a conformance.Conventions")
    for f, choices in (("momentum_convention", ("new", "old")), ("running_var_estimator", ("unbiased", "biased")),
                       ("eps_placement", ("inside", "outside")), ("running", RUNNING_STYLES), ("y_form", Y_FORMS)):
        v = getattr(c, f)
        if not isinstance(v, str) or v not in choices:
            bad(f"conventions.{f} is {v!r}, expected {' or '.join(map(repr, choices))}")
    if not isinstance(c.h_format, str) or c.h_format not in H_FORMATS:
        bad(f"conventions.h_format is {c.h_format!r}, expected {' or '.join(map(repr, H_FORMATS))}")
    if c.h_format != "storage" and not spec.residual:
        bad(f"conventions.h_format is {c.h_format!r}, but {k.op} adds no residual (h_format is for "
            f"{', '.join(n for n, s in _ops.SPECS.items() if s.residual)})")
    wo = c.weight_offset
    if isinstance(wo, bool) or not isinstance(wo, (int, float)) or not math.isfinite(wo):
        bad(f"conventions.weight_offset is {wo!r}, expected a finite number (0: scale by weight; 1: by 1 + weight)")
    if wo != 0 and not spec.weight_offsets:
        bad(f"conventions.weight_offset is {wo!r}, but {k.op} has no weight-offset convention (it is for "
            f"{', '.join(n for n, s in _ops.SPECS.items() if s.weight_offsets)})")
    _names(c, "saved", c.saved, lambda what: bad(f"conventions.{what}"))
    allowed_saved = _ops.STATISTICS
    for s in c.saved:
        if s not in allowed_saved:
            bad(f"conventions.saved has {s!r}, expected names from {', '.join(allowed_saved)}")
    if "mean" in c.saved and "mean" not in spec.saved:
        bad(f"{k.op} has no mean to save; remove 'mean' from conventions.saved")
    pg = c.param_grads
    if not isinstance(pg, str) or pg not in PARAM_GRAD_MODES:
        bad(f"conventions.param_grads is {pg!r}, expected {' or '.join(map(repr, PARAM_GRAD_MODES))}")
    if pg != "reduced" and not spec.replicas:
        bad(f"conventions.param_grads is {pg!r}, but {k.op} runs in one process (param_grads is for "
            f"{', '.join(n for n, s in _ops.SPECS.items() if s.replicas)})")
    if k.source is not None and not (isinstance(k.source, str) and ":" in k.source):
        bad(f"source is {k.source!r}, expected the 'module:attr' spec it is loaded from, or None")
    if spec.replicas:
        _check_replicas(k, bad)
    _check_outputs(k, bad)
    if (k.backward or k.backward_eval) and not k.grads:
        bad("grads is empty, but the kernel has a backward entry point: name what it returns, from "
            + ", ".join(GRADS))
    for g in k.grads:
        if g not in GRADS:
            bad(f"grads has {g!r}, expected names from {', '.join(GRADS)}")
    _check_precision(k, bad)


def _check_replicas(k: Kernel, bad: Callable[[str], None]) -> None:
    """A multi-replica kernel: the fixed calls of conformance.run.replicas (torch's conventions,
    the mean and rstd saved, a forward and a backward per replica, training mode)."""
    c = k.conventions
    if k.forward is None or k.backward is None or k.forward_eval or k.backward_eval:
        bad(f"{k.op} kernels have a forward and a backward (each replica runs both) and no eval entry points "
            f"(eval mode is {k.op}'s single-process op's: declare a kernel of that op for it)")
    fixed = {"momentum_convention": "new", "running_var_estimator": "unbiased", "eps_placement": "inside",
             "running": "return", "y_form": "centred"}
    for f, v in fixed.items():
        if getattr(c, f) != v:
            bad(f"conventions.{f} is {getattr(c, f)!r}; {k.op} replicas are checked with {f}={v!r} only")
    if tuple(c.saved) != ("mean", "rstd"):
        bad(f"conventions.saved is {tuple(c.saved)}, expected ('mean', 'rstd'): each replica's forward returns "
            "them and its backward receives them")
    want = ("y", "mean", "rstd") + (RUNNING_OUTPUTS if k.updates_running else ())
    if tuple(k.outputs) != want or tuple(k.grads) != GRADS:
        bad(f"outputs {tuple(k.outputs)} and grads {tuple(k.grads)}: a {k.op} kernel returns outputs={want} "
            f"(running statistics with updates_running=True) and grads={GRADS}")
    if k.quantization is not None:
        bad(f"{k.op} has no quantized output (quantization is for the single-process ops)")


def _names(obj: Any, field_name: str, value: Any, bad: Callable[[str], None]) -> None:
    """A tuple or list of distinct strings; a list is stored as a tuple."""
    if isinstance(value, str) or not isinstance(value, (tuple, list)):
        bad(f"{field_name} is {type(value).__name__} {value!r}, expected a tuple of names")
    for v in value:
        if not isinstance(v, str):
            bad(f"{field_name} has {type(v).__name__} {v!r}, expected names (strings)")
    dup = sorted({v for v in value if list(value).count(v) > 1})
    if dup:
        bad(f"{field_name} names {', '.join(map(repr, dup))} more than once")
    if isinstance(value, list):
        object.__setattr__(obj, field_name, tuple(value))


def _check_outputs(k: Kernel, bad: Callable[[str], None]) -> None:
    """outputs is exactly what forward returns, and decides what is checked: y, statistics of the op
    (those in conventions.saved are also given to backward), the returned running statistics."""
    c = k.conventions
    spec = _ops.get(k.op)
    returns_running = bool(spec.running_outputs) and c.running == "return"
    _check_quantization(k.quantization, k.outputs, k.forward is not None, bad)
    q_out = quant_outputs(k.quantization)
    if k.outputs[:1] != ("y",) and not (q_out and k.outputs[:1] == q_out[:1]):
        bad(f"outputs is {k.outputs}, expected 'y' first")
    allowed = {"y", *spec.residual_outputs, *spec.saved, *q_out} | (set(RUNNING_OUTPUTS) if returns_running
                                                                    else set())
    unknown = [o for o in k.outputs if o not in allowed]
    if unknown:
        bad(f"outputs names {unknown}, which the declaration does not produce "
            f"(y, {''.join(o + ', ' for o in spec.residual_outputs)}statistics from {', '.join(spec.saved)}, "
            f"running={c.running!r}"
            + ("" if bool(spec.running_outputs) else f"; {k.op} has no running statistics") + ")")
    if k.forward is None:
        if k.outputs != ("y",):
            bad(f"outputs is {k.outputs}, but there is no forward to return them: without a forward, outputs "
                "must be ('y',) (the saved statistics backward needs then come from the oracle)")
        return
    missing = [s for s in c.saved if s not in k.outputs]
    if missing:
        bad(f"conventions.saved names {missing}, which forward returns, but outputs {k.outputs} does not list "
            f"them: give outputs={('y', *c.saved) + (RUNNING_OUTPUTS if returns_running else ())} "
            "(or remove them from conventions.saved if forward does not return them)")
    if returns_running and k.updates_running:
        missing = [r for r in RUNNING_OUTPUTS if r not in k.outputs]
        if missing:
            bad(f"updates_running=True with conventions.running='return' means forward returns {list(RUNNING_OUTPUTS)}, "
                f"but outputs {k.outputs} does not list {missing}: they would go unchecked. Add them to outputs, "
                "or declare running='inplace' (forward updates the arrays it is given) or updates_running=False "
                "(running statistics are then reported as not checked)")


def _check_precision(k: Kernel, bad: Callable[[str], None]) -> None:
    ps = k.precision
    if ps is not None and not isinstance(ps, (Precision, Mapping)):
        bad(f"precision is {type(ps).__name__}, expected a Precision or a mapping dtype -> Precision")
    plist = [] if ps is None else ([ps] if isinstance(ps, Precision) else list(ps.values()))
    if isinstance(ps, Mapping):
        missing = [d for d in k.dtypes if d not in ps]
        if missing:
            bad(f"precision has no entry for dtypes {missing}")
        for key in ps:
            if key not in dtypes.FORMATS:
                bad(f"precision has an entry for {key!r}, expected dtype names from {', '.join(dtypes.FORMATS)}")
    known_outputs = {"y", *RESIDUAL_OUTPUTS, *STATISTICS, *RUNNING_OUTPUTS, *GRADS}
    for p in plist:
        if not isinstance(p, Precision):
            bad(f"precision entries must be Precision, received {type(p).__name__}")
        for f in ("storage", "params", "accumulate", "statistics", "saved"):
            v = getattr(p, f)
            if v is None and f != "storage":
                continue
            if not isinstance(v, str) or v not in dtypes.FORMATS:
                bad(f"precision.{f} is {v!r}, expected one of {', '.join(dtypes.FORMATS)}")
        for f, choices in (("output_accumulate", dtypes.FORMATS), ("output_summation", SUMMATION_MODELS)):
            m = getattr(p, f)
            what = "dtype" if f == "output_accumulate" else "summation model"
            if not isinstance(m, Mapping):
                bad(f"precision.{f} is {type(m).__name__}, expected a mapping output -> {what}")
            for o, name in m.items():
                if o not in known_outputs:
                    bad(f"precision.{f} names output {o!r}, expected names from {', '.join(sorted(known_outputs))}")
                if not isinstance(name, str) or name not in choices:
                    bad(f"precision.{f}[{o!r}] is {name!r}, expected one of {', '.join(choices)}")
        if not isinstance(p.summation, str) or p.summation not in SUMMATION_MODELS:
            bad(f"precision.summation is {p.summation!r}, expected one of {', '.join(SUMMATION_MODELS)}")
        for f, choices in (("subnormals", SUBNORMAL_MODES), ("overflow", OVERFLOW_MODES)):
            v = getattr(p, f)
            if not isinstance(v, str) or v not in choices:
                bad(f"precision.{f} is {v!r}, expected one of {', '.join(map(repr, choices))}")
        lam = p.lam
        if isinstance(lam, bool) or not isinstance(lam, (int, float)) or not math.isfinite(lam) or not lam > 0:
            bad(f"precision.lam is {lam!r}, expected a finite positive number")


def unchecked_outputs(k: Kernel) -> list[dict[str, Any]]:
    """What the declaration leaves unchecked: [{"output", "modes", "reason"}], one entry per output and reason.

    An output is unchecked when no entry point returns it in a mode (no forward, no backward,
    no eval entry point), when grads leaves it out, or for running statistics when
    updates_running=False or no forward returns them. Cases the declaration skips (dtypes,
    layouts, strides, min_reduction) are coverage, reported elsewhere; this is about outputs.
    """
    out: list[dict[str, Any]] = []
    running_op = bool(_ops.get(k.op).running_outputs)

    def add(name: str, modes: tuple[str, ...], reason: str) -> None:
        out.append({"output": name, "modes": list(modes), "reason": reason})

    modes = ("train", "eval") if running_op and not _ops.get(k.op).replicas else ("train",)
    fwd = {"train": k.forward, "eval": k.forward_eval}
    bwd = {"train": k.backward, "eval": k.backward_eval}
    entry = {"train": ("forward", "backward"), "eval": ("forward_eval", "backward_eval")}
    no_y = tuple(m for m in modes if fwd[m] is None)
    if no_y:
        add("y", no_y, " and ".join(f"no {entry[m][0]} entry point" for m in no_y))
    for h in _ops.get(k.op).residual_outputs:
        if k.forward is None:
            add(h, ("train",), "no forward entry point: backward is given the oracle's h (rounded to the storage "
                "format), the kernel's own is never computed")
        elif h not in k.outputs:
            add(h, ("train",), f"not in outputs {tuple(k.outputs)}: the residual stream passed on is not checked")
    if k.forward is None:
        for s in k.conventions.saved:
            add(s, ("train",), "no forward entry point: backward is given the oracle's saved statistics "
                "(rounded to the params dtype), the kernel's own are never computed")
    if running_op:
        if not k.updates_running:
            why = "updates_running=False: the running-statistic update is not checked"
        elif k.forward is None:
            why = "no forward entry point: the running-statistic update is not checked"
        else:
            why = None
        if why:
            for r in RUNNING_OUTPUTS:
                add(r, ("train",), why)
    have = tuple(m for m in modes if bwd[m] is not None)
    missing = tuple(m for m in modes if bwd[m] is None)
    for g in GRADS:
        if g not in k.grads and have:
            add(g, have, f"not in grads {tuple(k.grads)}")
        if missing:
            add(g, missing, " and ".join(f"no {entry[m][1]} entry point" for m in missing))
    return out


def call_with(fn: Callable, kwargs: dict[str, Any]) -> Any:
    """Call fn with the keyword arguments it accepts (all of them if it takes **kwargs)."""
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError):
        return fn(**kwargs)
    params = sig.parameters.values()
    if any(p.kind is inspect.Parameter.VAR_KEYWORD for p in params):
        return fn(**kwargs)
    names = {p.name for p in params if p.kind in (inspect.Parameter.POSITIONAL_OR_KEYWORD,
                                                   inspect.Parameter.KEYWORD_ONLY)}
    return fn(**{k: v for k, v in kwargs.items() if k in names})


def split_spec(spec: str) -> tuple[str, str, dict[str, str]]:
    """``target:attr?key=value,key=value`` -> (target, attr, {key: value}).

    The parameters (after the first ``?``) are split off before the target, so a value may hold
    a colon (``device=cuda:0``). Raises KernelError for a malformed spec, naming the part.
    """
    base, q, query = spec.partition("?")
    if ":" not in base:
        raise KernelError(f"kernel spec {spec!r} has no ':'; expected module:attr or path/to/file.py:attr")
    target, _, attr = base.rpartition(":")
    if not target or not attr:
        raise KernelError(f"kernel spec {spec!r} is incomplete; expected module:attr or path/to/file.py:attr")
    params: dict[str, str] = {}
    if q and not query.strip():
        raise KernelError(f"kernel spec {spec!r}: nothing after '?'; expected key=value pairs")
    if q:
        for item in query.split(","):
            key, eq, value = item.partition("=")
            key, value = key.strip(), value.strip()
            if not eq or not key.isidentifier() or not value or "?" in value or "=" in value:
                raise KernelError(f"kernel spec {spec!r}: parameter {item!r} is not key=value (expected "
                                  "module:factory?key=value,key=value, e.g. ?device=cuda:0)")
            if key in params:
                raise KernelError(f"kernel spec {spec!r}: parameter {key!r} is given twice")
            params[key] = value
    return target, attr, params


def with_spec_params(spec: str, **params: str) -> str:
    """The spec with parameters added; a parameter the spec already sets to another value is an error."""
    _, _, have = split_spec(spec)
    for k, v in params.items():
        if k in have and have[k] != v:
            raise KernelError(f"kernel spec {spec!r} sets {k}={have[k]}, and {k}={v} was asked for as well")
    merged = {**have, **params}
    base = spec.partition("?")[0]
    return base + ("?" + ",".join(f"{k}={v}" for k, v in merged.items()) if merged else "")


def _call_factory(spec: str, attr: str, factory: Callable, params: dict[str, str]) -> Any:
    """factory(**params), after checking that it takes each parameter (values stay strings: the factory
    converts and validates them)."""
    if params:
        try:
            sig = inspect.signature(factory)
        except (TypeError, ValueError):
            sig = None
        if sig is not None and not any(p.kind is inspect.Parameter.VAR_KEYWORD for p in sig.parameters.values()):
            names = [n for n, p in sig.parameters.items()
                     if p.kind in (inspect.Parameter.POSITIONAL_OR_KEYWORD, inspect.Parameter.KEYWORD_ONLY)]
            unknown = [k for k in params if k not in names]
            if unknown:
                raise KernelError(f"kernel spec {spec!r}: {attr}() takes no parameter {', '.join(unknown)} "
                                  f"(it takes: {', '.join(names) or 'none'})")
    try:
        return factory(**params)
    except KernelError:
        raise
    except Exception as e:
        shown = ", ".join(f"{k}={v!r}" for k, v in params.items())
        raise KernelError(f"kernel spec {spec!r}: calling {attr}({shown}) failed: {type(e).__name__}: {e}") from e


def load_kernel(spec: str) -> Kernel:
    """Load a Kernel from ``module:attr`` or ``path/to/file.py:attr``, optionally ``...:attr?key=value,...``.

    ``attr`` may name a Kernel or a callable returning one (a factory, so that a
    heavy import happens only when the kernel is used). Parameters after ``?`` are passed to the
    factory as keyword arguments with string values (``conformance.adapters.torch_device:layer_norm?device=cuda``).
    """
    target, attr, params = split_spec(spec)
    if target.endswith(".py") or "/" in target or "\\" in target:
        path = Path(target)
        if not path.is_file():
            raise KernelError(f"kernel spec {spec!r}: file {target} does not exist")
        mod_name = f"refnorm_kernel_{abs(hash(str(path.resolve())))}"
        sp = importlib.util.spec_from_file_location(mod_name, path)
        if sp is None or sp.loader is None:
            raise KernelError(f"kernel spec {spec!r}: cannot import {target}")
        module = importlib.util.module_from_spec(sp)
        sys.modules[mod_name] = module
        try:
            sp.loader.exec_module(module)
        except Exception as e:
            raise KernelError(f"kernel spec {spec!r}: importing {target} failed: {type(e).__name__}: {e}") from e
    else:
        try:
            module = importlib.import_module(target)
        except Exception as e:
            raise KernelError(f"kernel spec {spec!r}: importing module {target!r} failed: "
                              f"{type(e).__name__}: {e}") from e
    obj = module
    for part in attr.split("."):
        if not hasattr(obj, part):
            raise KernelError(f"kernel spec {spec!r}: {target} has no attribute {attr!r}")
        obj = getattr(obj, part)
    if params and (isinstance(obj, Kernel) or not callable(obj)):
        raise KernelError(f"kernel spec {spec!r}: {attr} is not a factory, so it takes no parameters "
                          f"({', '.join(params)})")
    if not isinstance(obj, Kernel) and callable(obj):
        obj = _call_factory(spec, attr, obj, params)
    if isinstance(obj, (list, tuple)) and obj and all(isinstance(o, Kernel) for o in obj):
        raise KernelError(f"kernel spec {spec!r} names {len(obj)} kernels; name one (e.g. {attr}[0] is not "
                          "supported: give each its own attribute)")
    if not isinstance(obj, Kernel):
        raise KernelError(f"kernel spec {spec!r}: {attr} is {type(obj).__name__}, expected a "
                          "conformance.Kernel or a function returning one")
    return obj if obj.source is not None else replace(obj, source=spec)
