"""The explanations a diagnosis tries: each predicts a failing output from the case's float64 inputs.

A hypothesis is a convention other than the declared one (docs/conventions.md), a precision other
than the declared one (docs/tolerances.md), or a model of a common bug class. Each gives, for the
outputs it can explain, the values a kernel that followed it would return and the bound a correct
kernel of that kind keeps to; rank.py measures the failing kernel's error against them.

Three ways of predicting, one helper each:

* ``rejudge``: the oracle and the derived bounds under changed conventions, precision, case or
  inputs (the harness's own pipeline, conformance.run.execute's oracle_expected and case_bounds);
* ``modelled``: conformance.diagnosis.model with one step changed, under the declared bound (a bug
  model in float64), widened by the model's own spread where it emulates a rounded format;
* ``transformed``: the oracle's value with an output-side change (a dropped term, a rounding, an
  unwritten row), under the declared bound.

Every hypothesis names its source: the library behaviour of docs/conventions.md, a paper or
standard, or "common practice".
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from functools import cached_property
from typing import Any, Callable

import numpy as np

from .. import dtypes, ops
from ..tolerances.bound import Bound
from .model import Steps, model_outputs

__all__ = ["Evidence", "Prediction", "Hypothesis", "HYPOTHESES", "address_order"]

STORAGE_OUTPUTS = ("y", "dx")
GRAD_OUTPUTS = ("dx", "dweight", "dbias")
STAT_OUTPUTS = ("mean", "rstd", "var", "var_unbiased", "std")
RSTD_DEPENDENT = ("y", "rstd", "std", "dx", "dweight")
X_DEPENDENT = ("y", "mean", "rstd", "var", "var_unbiased", "std", "dx", "dweight")
#: The vector widths whose remainder a kernel may drop (common practice: 4, 8, 16 lanes of SIMD
#: units and 32-wide warps).
TAIL_WIDTHS = (4, 8, 16, 32)


@dataclass
class Evidence:
    """What a diagnosis works from: the case, the declaration, the kernel's inputs and outputs, the
    oracle's float64 view of the inputs, the expected values and the bounds the case was judged by."""

    kernel: Any
    case: Any
    prec: Any
    conv: Any
    inp: dict[str, Any]          # the arrays the kernel was given (its dtypes, its strides)
    inp64: dict[str, Any]        # the oracle's view (conformance.ops.oracle_view), float64
    raw: dict[str, np.ndarray]   # the kernel's outputs, read as arrays
    expected: dict[str, np.ndarray]
    bounds: dict[str, Bound]
    overrides: Any = None

    @property
    def spec(self):
        return ops.get(self.case.op)

    @cached_property
    def base64(self) -> dict[str, Any]:
        """The kernel's inputs upcast to float64, before the oracle's view of them."""
        return {k: (None if v is None else np.asarray(v).astype(np.float64)) for k, v in self.inp.items()}


@dataclass
class Prediction:
    """One reading of a hypothesis: its label (the setting in words), and per output the values it
    predicts with the bound a correct kernel of that kind keeps to."""

    label: str
    values: dict[str, tuple[np.ndarray, Bound]]


@dataclass(frozen=True)
class Hypothesis:
    """key : stable name (results and tests); kind : "convention", "precision" or "bug";
    explanation : what the kernel would be doing; source : where the behaviour is documented;
    outputs : the outputs it can explain; predict(ev, names) -> [Prediction] ([] where it does not apply)."""

    key: str
    kind: str
    explanation: str
    source: str
    outputs: tuple[str, ...]
    predict: Callable[[Evidence, tuple[str, ...]], list[Prediction]]


# ------------------------------------------------------------------ the three ways of predicting
def rejudge(ev: Evidence, names: tuple[str, ...], label: str, *, conv=None, prec=None, case=None,
            view: dict[str, Any] | None = None) -> list[Prediction]:
    """The harness's oracle and bounds under another convention, precision, case or input view."""
    from ..run.execute import case_bounds, oracle_expected

    conv2, prec2, case2 = conv or ev.conv, prec or ev.prec, case or ev.case
    if conv is None and case is None and view is None:  # another precision only: the same oracle values
        view, exp = ev.inp64, {n: ev.expected[n] for n in names if n in ev.expected}
    else:
        if view is None:
            view = ops.oracle_view(case2, conv2, ev.base64) if conv is not None else ev.inp64
        fwd = ops.oracle_forward(case2, conv2, view)
        k2 = replace(ev.kernel, conventions=conv2) if conv is not None else ev.kernel
        exp = oracle_expected(k2, case2, view, fwd, names)
    if not exp:
        return []
    bounds = case_bounds(case2, prec2.resolved(), conv2, view, exp, ev.overrides)
    return [Prediction(label, {n: (exp[n], bounds[n]) for n in names if n in exp})]


def modelled(ev: Evidence, names: tuple[str, ...], label: str, steps: Steps, *, view=None,
             spread: bool = False) -> list[Prediction]:
    """conformance.diagnosis.model with ``steps``, under the declared bounds; ``spread``: the model emulates
    a rounded format, and its value is pinned down only up to the summation order, so each bound adds
    4 times the largest difference between two orders (pairwise and reversed)."""
    names = tuple(n for n in names if n in ev.bounds)
    if not names:
        return []
    v = ev.inp64 if view is None else view
    kw = dict(eps=ev.case.eps, placement=ev.conv.eps_placement, center=ev.spec.centered, names=names,
              running=(ev.conv.momentum_convention, ev.conv.running_var_estimator, ev.spec.running_from_samples))
    grp = ev.spec.axes.view(ev.case)
    got = model_outputs(ev.case, grp, v, steps=steps, **kw)
    other = model_outputs(ev.case, grp, v, steps=replace(steps, order="reversed"), **kw) if spread else None
    out = {}
    for n, e in got.items():
        b = _grown(ev, n, e, ev.bounds[n])
        if other is not None:
            with np.errstate(invalid="ignore"):
                d = np.abs(e - other[n])
            d = d[np.isfinite(d)]
            extra = 4.0 * float(d.max()) if d.size else 0.0
            b = replace(b, values=np.asarray(b.values, np.float64) + extra)
        out[n] = (e, b)
    return [Prediction(label, out)] if out else []


def transformed(ev: Evidence, names: tuple[str, ...], label: str,
                fn: Callable[[str, np.ndarray], np.ndarray | None]) -> list[Prediction]:
    """The oracle's expected values changed by fn(name, expected) (None: not for that output)."""
    out = {}
    for n in names:
        if n in ev.expected:
            e = fn(n, np.asarray(ev.expected[n], np.float64))
            if e is not None:
                out[n] = (e, _grown(ev, n, e, ev.bounds[n]))
    return [Prediction(label, out)] if out else []


def _grown(ev: Evidence, name: str, pred: np.ndarray, b: Bound) -> Bound:
    """The declared bound plus the rounding of what a prediction adds to the oracle's magnitude: the
    declared bound is sized for |oracle|, so where a model makes an output larger, its final rounding and a
    few operations in the accumulation format, (u_out + 4 u_acc) (|pred| - |oracle|), are allowed on top
    (Higham 2002, §2.2: fl(x op y) = (x op y)(1 + d), |d| <= u)."""
    from ..tolerances import output_dtype

    p = ev.prec.resolved()
    u = dtypes.unit_roundoff(output_dtype(name, p)) + 4 * dtypes.unit_roundoff(p.accumulate)
    with np.errstate(all="ignore"):
        excess = np.abs(pred) - np.abs(np.asarray(ev.expected[name], np.float64))
        extra = np.where(np.isfinite(excess) & (excess > 0), u * excess, 0.0)
    if not extra.any():
        return b
    return replace(b, values=np.broadcast_to(np.asarray(b.values, np.float64), extra.shape) + extra)


# ------------------------------------------------------------------ conventions
def _other(value: str, choices: tuple[str, str]) -> str:
    return choices[1] if value == choices[0] else choices[0]


def _convention(field: str, choices: tuple[str, str], when: Callable[[Evidence], bool]):
    def predict(ev: Evidence, names):
        if not when(ev):
            return []
        alt = _other(getattr(ev.conv, field), choices)
        return rejudge(ev, names, f"{field}={alt}", conv=replace(ev.conv, **{field: alt}))
    return predict


def _running(ev: Evidence) -> bool:
    return ev.spec.has_eval and ev.case.mode == "train" and ev.case.running


def _momentum(ev: Evidence) -> bool:
    return _running(ev) and ev.case.momentum is not None  # the cumulative average is the same in both


def _weight_offset(ev: Evidence, names):
    if not ev.spec.weight_offsets or ev.case.weight == "none":
        return []
    out = []
    for d in (1.0, -1.0):
        wo = ev.conv.weight_offset + d
        if wo < 0:
            continue
        out += rejudge(ev, names, f"weight_offset={wo:g}", conv=replace(ev.conv, weight_offset=wo))
    return out


# ------------------------------------------------------------------ precision
def _narrower(a: str | None, b: str | None) -> bool:
    return a is not None and b is not None and dtypes.unit_roundoff(a) > dtypes.unit_roundoff(b)


def _storage_sums(ev: Evidence, names):
    p, s = ev.prec.resolved(), ev.case.dtype
    out = []
    params = tuple(n for n in names if n in ("dweight", "dbias"))
    if params and _narrower(s, p.accumulate_for(params[0])):
        acc = {**p.output_accumulate, **{n: s for n in params}}
        out += rejudge(ev, params, f"dweight/dbias summed in {s}", prec=replace(p, output_accumulate=acc))
    rest = tuple(n for n in names if n not in params)
    if rest and _narrower(s, p.accumulate):
        out += rejudge(ev, rest, f"sums in {s}", prec=replace(p, accumulate=s, statistics=s))
    return out


def _stats_storage(ev: Evidence, names):
    p, s = ev.prec.resolved(), ev.case.dtype
    if not _narrower(s, p.statistics):
        return []
    return rejudge(ev, names, f"statistics rounded to {s}", prec=replace(p, statistics=s))


def _has_subnormals(ev: Evidence) -> bool:
    tiny = float(np.finfo(np.float32).tiny)
    for k in ("x", "dy", "weight", "bias"):
        a = ev.base64.get(k)
        if a is not None and bool(np.any((a != 0) & (np.abs(a) < tiny))):
            return True
    return False


def _flush(ev: Evidence, names):
    p = ev.prec.resolved()
    if p.subnormals == "flush" or not _has_subnormals(ev):
        return []
    return rejudge(ev, names, "subnormals flushed to zero", prec=replace(p, subnormals="flush"))


def _saturate(ev: Evidence, names):
    from ..tolerances import output_dtype

    p = ev.prec.resolved()
    if p.overflow == "saturate":
        return []
    beyond = [n for n in names if n in ev.expected and bool(np.any(
        np.abs(np.nan_to_num(ev.expected[n], nan=0.0, posinf=0.0, neginf=0.0))
        > float(dtypes.finfo(output_dtype(n, p)).max)))]
    if not beyond:
        return []
    return rejudge(ev, tuple(beyond), "out-of-range results saturated", prec=replace(p, overflow="saturate"))


# ------------------------------------------------------------------ inputs and cases
def _eval_batch(ev: Evidence, names):
    if not ev.spec.has_eval or ev.case.mode != "eval":
        return []
    ys = tuple(n for n in names if n == "y")
    return rejudge(ev, ys, "eval mode with the batch's statistics",
                   case=replace(ev.case, mode="train", running=False)) if ys else []


def _interleaved(ev: Evidence, names):
    c = ev.case
    if not ev.spec.axes.takes_groups or not (1 < c.groups < c.channels):
        return []
    g, cg, ax = c.groups, c.channels // c.groups, c.channel_axis
    perm = np.array([k * g + j for j in range(g) for k in range(cg)])
    inv = np.argsort(perm)
    view = dict(ev.inp64)
    for k in ("x", "dy"):
        if view.get(k) is not None:
            view[k] = np.take(view[k], perm, axis=ax)
    for k in ("weight", "bias"):
        if view.get(k) is not None:
            view[k] = np.asarray(view[k])[perm]
    got = rejudge(ev, names, "channel groups interleaved (channel c in group c % G)", view=view)
    for p in got:
        for n, (e, b) in list(p.values.items()):
            if n in ("y", "dx"):
                p.values[n] = (np.take(e, inv, axis=ax), _unpermuted(b, e.shape, inv, ax))
            elif n in ("dweight", "dbias"):
                p.values[n] = (e[inv], _unpermuted(b, e.shape, inv, 0))
    return got


def _unpermuted(b: Bound, shape: tuple[int, ...], inv: np.ndarray, ax: int) -> Bound:
    """A bound of permuted channels (and its accepted alternatives) back in the channels' own order."""
    def back(a):
        return None if a is None else np.take(np.broadcast_to(np.asarray(a), shape), inv, axis=ax)

    acc = tuple(replace(a, mask=back(a.mask), value=back(a.value)) for a in b.accept)
    return replace(b, values=back(np.asarray(b.values, np.float64)), accept=acc)


def address_order(a: Any) -> np.ndarray | None:
    """The elements of a strided array as a kernel that ignores strides reads them: a.size elements from
    the lowest address of its memory, in address order, shaped as a (None for a C-contiguous array, or
    where that memory is not inside the array's own buffer)."""
    from numpy.lib.array_utils import byte_bounds

    a = np.asarray(a)
    if a.flags.c_contiguous or a.size == 0:
        return None
    owner = a
    while isinstance(owner.base, np.ndarray):
        owner = owner.base
    if not owner.flags.c_contiguous:
        return None
    lo, _ = byte_bounds(a)
    olo, ohi = byte_bounds(owner)
    need = a.size * a.itemsize
    if lo < olo or lo + need > ohi:
        return None
    flat = owner.reshape(-1).view(np.uint8)[lo - olo: lo - olo + need]
    return flat.view(a.dtype).reshape(a.shape).astype(np.float64)


def _memory_order(ev: Evidence, names):
    if ev.spec.residual or ev.case.strides == "contiguous":
        return []
    view = dict(ev.inp64)
    changed = False
    for k in ("x", "dy"):
        if ev.inp.get(k) is not None:
            m = address_order(ev.inp[k])
            if m is not None:
                view[k], changed = m, True
    if not changed:
        return []
    return rejudge(ev, names, f"x and dy read in memory order, strides ignored ({ev.case.strides})", view=view)


def _layout_misread(ev: Evidence, names):
    """The kernel takes the buffer of x (and dy) in the other channel layout: a channels-last buffer read as
    channels first, or the reverse; what it writes is read back in the case's own layout."""
    c = ev.case
    if ev.spec.axes.layouts == ("trailing",) or c.strides != "contiguous" or len(c.shape) < 3:
        return []
    n, ch = c.shape[0], c.channels
    spatial = tuple(d for i, d in enumerate(c.shape) if i not in (0, c.channel_axis))
    other = "channels_last" if c.layout == "channels_first" else "channels_first"
    shape2 = (n, *spatial, ch) if other == "channels_last" else (n, ch, *spatial)
    if shape2 == tuple(c.shape):
        return []
    case2 = replace(c, layout=other, shape=shape2)
    view = dict(ev.inp64)
    for k in ("x", "dy", "residual", "dh"):
        if view.get(k) is not None and np.shape(view[k]) == tuple(c.shape):
            view[k] = np.asarray(view[k]).reshape(shape2)
    got = rejudge(ev, names, f"the buffer read as {other}", case=case2, view=view)
    for p in got:
        for name, (e, b) in list(p.values.items()):
            if np.shape(e) == shape2:
                vals = np.broadcast_to(np.asarray(b.values, np.float64), shape2).reshape(c.shape)
                acc = tuple(replace(a, mask=np.broadcast_to(np.asarray(a.mask), shape2).reshape(c.shape),
                                    value=None if a.value is None else
                                    np.broadcast_to(np.asarray(a.value), shape2).reshape(c.shape)) for a in b.accept)
                p.values[name] = (e.reshape(c.shape), replace(b, values=vals, accept=acc))
    return got


def _missing(param: str):
    def predict(ev: Evidence, names):
        if getattr(ev.case, param) in ("none", "zero" if param == "bias" else "ones"):
            return []
        view = dict(ev.inp64, **{param: None})
        if ev.conv.weight_offset and param == "weight":
            view["weight"] = np.full_like(ev.inp64["weight"], float(ev.conv.weight_offset))
        return rejudge(ev, names, f"no {param} term", view=view, case=replace(ev.case, **{param: "none"}))
    return predict


def _eps_storage(ev: Evidence, names):
    e = float(dtypes.round_to(np.float64(ev.case.eps), ev.case.dtype))
    if e == ev.case.eps or not _narrower(ev.case.dtype, ev.prec.resolved().accumulate):
        return []
    return rejudge(ev, names, f"eps rounded to {ev.case.dtype} ({e:.3g})", case=replace(ev.case, eps=e))


def _running_storage(ev: Evidence, names):
    p = ev.prec.resolved()
    if not ev.spec.has_eval or ev.case.mode != "eval" or not _narrower(ev.case.dtype, p.params):
        return []
    with np.errstate(over="ignore"):
        view = dict(ev.inp64, **{k: dtypes.round_to(ev.inp64[k], ev.case.dtype).astype(np.float64)
                                 for k in ("running_mean", "running_var")})
    return rejudge(ev, names, f"running statistics read in {ev.case.dtype}", view=view)


# ------------------------------------------------------------------ bug models
def _unbiased_norm(ev: Evidence, names):
    if ev.case.mode != "train" or not ev.spec.centered or ev.case.group_length < 2:
        return []
    return modelled(ev, names, "normalized with M2/(n - 1)", Steps(unbiased_norm=True))


def _one_pass(ev: Evidence, names):
    if ev.case.mode != "train" or not ev.spec.centered:
        return []
    f = ev.prec.resolved().accumulate
    return modelled(ev, names, f"one-pass variance in {f}", Steps(one_pass=True, fmt=f), spread=True)


def _squares_overflow(ev: Evidence, names):
    if ev.case.mode != "train" or not ev.spec.centered:
        return []
    f = ev.prec.resolved().accumulate
    x = np.abs(ev.inp64["x"])
    if not bool(np.any(np.isfinite(x) & (x > math.sqrt(float(dtypes.finfo(f).max))))):
        return []
    return modelled(ev, names, f"squares overflow {f}", Steps(squares_overflow=True, fmt=f))


def _tail(ev: Evidence, names):
    grp = ev.spec.axes.view(ev.case)
    last = len(grp.view_shape) - 1
    if last not in grp.red:
        return []
    L = grp.view_shape[last]
    out, seen = [], set()
    for w in TAIL_WIDTHS:
        if L % w and L % w not in seen:
            seen.add(L % w)
            out += modelled(ev, names, f"the last {L % w} of every {L} elements dropped ({w}-wide loop)",
                            Steps(tail=w))
    return out


def _const_stats(ev: Evidence, names):
    if ev.case.mode != "train" or "dx" not in names:
        return []
    return modelled(ev, ("dx",), "mean and variance constants in the backward", Steps(const_stats=True))


def _param_part(ev: Evidence, names):
    want = tuple(n for n in names if n in ("dweight", "dbias"))
    if not want:
        return []
    out = []
    if ev.spec.axes.layouts != ("trailing",) and len(ev.case.shape) > 3:
        out += modelled(ev, want, "dweight/dbias over the first spatial axis only", Steps(param_part="first_spatial"))
    if ev.case.shape[0] > 1:
        out += modelled(ev, want, "dweight/dbias over the first sample only", Steps(param_part="first_sample"))
    return out


def _toward_zero(fmt: str, e: np.ndarray) -> np.ndarray:
    """e rounded toward zero into fmt (as float64): the round-to-nearest value, one step toward zero
    where that rounded away from zero (IEEE 754-2019 §4.3.2, roundTowardZero)."""
    fi = dtypes.finfo(fmt)
    nm = int(fi.nmant)
    with np.errstate(all="ignore"):
        r = dtypes.round_to(e, fmt).astype(np.float64)
        a = np.abs(r)
        k = np.floor(np.log2(np.where(a > 0, a, 1.0)))
        step = np.where(a > np.exp2(k), np.exp2(k - nm), np.exp2(k - 1 - nm))
        step = np.maximum(step, float(fi.smallest_subnormal) if hasattr(fi, "smallest_subnormal")
                          else 2.0 ** (int(fi.minexp) - nm))
        away = np.isfinite(r) & (np.abs(r) > np.abs(e))
        return np.where(away, r - np.sign(r) * step, r)


def _directed(ev: Evidence, names):
    from ..tolerances import output_dtype

    p = ev.prec.resolved()
    return transformed(ev, tuple(n for n in names if n in STORAGE_OUTPUTS), "outputs rounded toward zero",
                       lambda n, e: _toward_zero(output_dtype(n, p), e))


def _dh_dropped(ev: Evidence, names):
    if not ev.spec.residual or ev.inp64.get("dh") is None or "dx" not in names:
        return []
    dh = np.asarray(ev.inp64["dh"], np.float64)
    return transformed(ev, ("dx",), "dh left out of dx", lambda n, e: e - dh)


def _unwritten(ev: Evidence, names):
    """Whole statistic groups (rows, channels) of an output that are exactly zero where the oracle's are not."""
    from ..ops.axes import statistic_index

    grp = ev.spec.axes.view(ev.case)
    labels = []

    def fn(n, e):
        a = ev.raw.get(n)
        if a is None or np.shape(a) != e.shape:
            return None
        a = np.asarray(a).astype(np.float64)
        idx = statistic_index(grp, ev.case.shape).ravel() if e.shape == tuple(ev.case.shape) \
            else np.arange(e.size)
        zero_k = np.bincount(idx, weights=(a.ravel() == 0), minlength=idx.max() + 1)
        zero_e = np.bincount(idx, weights=(e.ravel() == 0), minlength=idx.max() + 1)
        size = np.bincount(idx, minlength=idx.max() + 1)
        skipped = (zero_k == size) & (zero_e < size)
        if not skipped.any() or skipped.all():
            return None
        labels.append(f"{n}: {int(skipped.sum())} of {skipped.size}")
        return np.where(skipped[idx].reshape(e.shape), 0.0, e)

    got = transformed(ev, names, "", fn)
    for p in got:
        p.label = "rows or channels left unwritten (zero): " + "; ".join(labels)
    return got


def _nan_inside(ev: Evidence, names):
    """Every element NaN: a 0/0 inside the reduction (an empty partial count) spreads to every result."""
    for k in ("x", "dy", "weight", "bias"):
        a = ev.base64.get(k)
        if a is not None and not bool(np.all(np.isfinite(a))):
            return []

    def fn(n, e):
        a = ev.raw.get(n)
        if a is None or np.shape(a) != e.shape:
            return None
        a = np.asarray(a).astype(np.float64)
        return np.full_like(e, np.nan) if bool(np.isnan(a).any() and np.isfinite(e).any()) else None

    return transformed(ev, names, "NaN made inside the reduction", fn)


CONV = "docs/conventions.md"
HYPOTHESES: tuple[Hypothesis, ...] = (
    Hypothesis("running_var_estimator", "convention",
               "the running variance takes the other estimator (biased M2/n or unbiased M2/(n - 1))",
               f"{CONV}, Running statistics: torch unbiased, Keras and ONNX biased", ("running_var",),
               _convention("running_var_estimator", ("unbiased", "biased"), _running)),
    Hypothesis("momentum_convention", "convention",
               "momentum weights the other value (the old running value instead of the new batch value, or back)",
               f"{CONV}, Running statistics: torch weights the new value, Keras and ONNX the old",
               ("running_mean", "running_var"), _convention("momentum_convention", ("new", "old"), _momentum)),
    Hypothesis("eps_placement", "convention", "eps on the other side of the square root",
               f"{CONV}, Conventions.eps_placement; Ioffe & Szegedy 2015, Alg. 1 (eps inside, from memory)",
               RSTD_DEPENDENT, _convention("eps_placement", ("inside", "outside"), lambda ev: True)),
    Hypothesis("y_form", "convention", "y formed the other way (x scale + shift, or (x - mean) scale + bias)",
               f"{CONV}, How y is formed: torch CPU and Keras fold", ("y",),
               _convention("y_form", ("centred", "folded"), lambda ev: True)),
    Hypothesis("h_format", "convention",
               "the residual sum normalized in the other format (rounded to storage, or as accumulated)",
               f"{CONV}, Fused residual add + norm", X_DEPENDENT + ("h",),
               _convention("h_format", ("storage", "accumulate"), lambda ev: ev.spec.residual)),
    Hypothesis("weight_offset", "convention", "the weight offset off by one (scale by 2 + w, or by w alone)",
               f"{CONV}, RMS norm's weight offset: torch and Keras 0, Gemma-family models 1 (from memory)",
               ("y", "dx"), _weight_offset),
    Hypothesis("eval_batch_statistics", "bug", "eval mode normalizes with the batch's own statistics",
               f"{CONV}, Eval / inference mode: torch and Keras normalize with the running statistics", ("y",),
               _eval_batch),
    Hypothesis("interleaved_groups", "bug", "channel c is put in group c % G instead of c // (C/G)",
               f"Wu & He 2018, §3 (from memory); {CONV}, Group norm channel grouping: torch and Keras contiguous",
               X_DEPENDENT + ("dbias",), _interleaved),
    Hypothesis("strides_ignored", "bug",
               "x and dy read as raw memory in address order (strides ignored; channels-last memory misread)",
               "NumPy ndarray.strides: only a C-contiguous array holds its logical order in memory",
               X_DEPENDENT + ("dbias",), _memory_order),
    Hypothesis("channel_axis", "bug", "the channels taken from the wrong axis: the buffer read in the other layout",
               f"{CONV}, Group norm channel grouping and layouts: channels-first and channels-last are both in use",
               X_DEPENDENT + ("dbias",), _layout_misread),
    Hypothesis("missing_weight", "bug", "the weight is not applied", "common practice", ("y", "dx"),
               _missing("weight")),
    Hypothesis("missing_bias", "bug", "the bias is not added", "common practice", ("y",), _missing("bias")),
    Hypothesis("unbiased_normalization", "bug", "x normalized with the unbiased variance M2/(n - 1)",
               f"{CONV}: every library normalizes with the biased variance (TF's fused op returns the unbiased "
               "one but normalizes with the biased)", RSTD_DEPENDENT + ("var",), _unbiased_norm),
    Hypothesis("constant_statistics_backward", "bug",
               "the training backward treats mean and variance as constants (dx = rstd dy w)",
               "Ioffe & Szegedy 2015, §3 (the chain rule through the batch statistics; from memory)", ("dx",),
               _const_stats),
    Hypothesis("squares_overflow", "bug", "squares of x overflow the accumulation format (Inf - Inf = NaN)",
               "IEEE 754-2019 §7.4 (overflow), §7.2 (Inf - Inf)", RSTD_DEPENDENT + ("var",), _squares_overflow),
    Hypothesis("one_pass_variance", "bug", "var = E[x^2] - E[x]^2 in the accumulation format",
               "Chan, Golub & LeVeque 1983, §1 (from memory): cancellation of order kappa^2 u",
               RSTD_DEPENDENT + ("mean", "var", "running_var"), _one_pass),
    Hypothesis("storage_sums", "precision", "sums accumulated in the storage format",
               "Higham 2002, §4.2, and Higham & Mary 2019 (the declared summation model with the storage u)",
               X_DEPENDENT + ("dbias", "running_mean", "running_var"), _storage_sums),
    Hypothesis("statistics_in_storage", "precision", "mean and rstd rounded to the storage format before use",
               "docs/library-precision.md (ATen's bfloat16 batch-norm statistics); docs/tolerances.md",
               X_DEPENDENT, _stats_storage),
    Hypothesis("eps_in_storage", "bug", "eps converted to the storage format before it is added",
               "IEEE 754-2019 binary16/bfloat16 ranges: a small eps rounds to 0 or changes", RSTD_DEPENDENT,
               _eps_storage),
    Hypothesis("running_in_storage", "bug", "eval mode reads the running statistics in the storage format",
               "IEEE 754-2019 §7.4: values beyond the format's range become Inf", ("y", "dx"), _running_storage),
    Hypothesis("subnormals_flushed", "precision", "subnormal inputs and results flushed to zero (FTZ/DAZ)",
               "IEEE 754-2019 §3.3; common practice on accelerators and with fast-math flags", X_DEPENDENT + ("dbias",),
               _flush),
    Hypothesis("saturating_overflow", "precision", "out-of-range results saturate to the largest finite value",
               "OCP 8-bit floating point specification v1.0, saturating conversion (from memory)",
               X_DEPENDENT + ("dbias",), _saturate),
    Hypothesis("dropped_tail", "bug",
               "the reductions drop the remainder of a vector loop (length not a multiple of the width)",
               "common practice: a vector loop needs a remainder loop", RSTD_DEPENDENT + ("mean", "var"), _tail),
    Hypothesis("partial_parameter_reduction", "bug", "dweight and dbias reduced over only part of their axes",
               "Ioffe & Szegedy 2015, Alg. 1 and §3 (from memory): they sum over every axis but the parameter's",
               ("dweight", "dbias"), _param_part),
    Hypothesis("dh_dropped", "bug", "the gradient along the residual stream (dh) is not added to dx",
               f"{CONV}, Fused residual add + norm: dx = dresidual = dh + the norm's gradient", ("dx",), _dh_dropped),
    Hypothesis("directed_rounding", "bug", "outputs rounded toward zero (truncated) instead of to nearest",
               "IEEE 754-2019 §4.3 (rounding-direction attributes)", STORAGE_OUTPUTS, _directed),
    Hypothesis("unwritten_rows", "bug", "whole rows or channels of the output never written (left zero)",
               "common practice: a launch grid or loop bound that misses the last blocks",
               X_DEPENDENT + ("dbias", "running_mean", "running_var", "h"), _unwritten),
    Hypothesis("nan_inside_reduction", "bug",
               "a NaN made inside the reduction (0/0 of an empty partial count) reaches every result",
               "IEEE 754-2019 §7.2 (0/0 is NaN)", X_DEPENDENT + ("dbias", "running_mean", "running_var"), _nan_inside),
)
