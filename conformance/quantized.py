"""The harness side of a quantized y, for every op: cases, the static scales, bounds and level counts.

A kernel declaring ``Quantization`` (conformance.quantization) returns y_q (and, for a dynamic scale,
its scale s_k) where others return y. For one case, with y and B_y the oracle's y and the derived
bound of a correct kernel's unquantized y (tolerances.derive_bounds, docs/tolerances.md), and u_a
the accumulation format's unit roundoff:

scale  s = max(amax, floor) / q_max (refnorm.quantize.dynamic_scale) of y, or of the normalized
       xhat for scale_from="before_weight", per tensor or per row; a correct kernel's amax is within
       A = max B over the amax's elements of the exact one (|max|a_i| - max|b_i|| <= max|a_i - b_i|),
       and its s is one or two roundings (u_a) of amax / q_max, then one into the scale format (u_f):
           |s_k - s| <= max(s_hi - s, s - s_lo) + (2u_a + u_f)(s_hi) + eta_f,
           s_hi, s_lo = max(amax +- A, floor) / q_max.
y_q    compared in units of the kernel's scale, t = y / s_k (the oracle's y, the kernel's s): a
       correct kernel rounds t^ = y^ / s_k (a division, or a reciprocal and a product: <= 3u_a) to
       its level, so
           |y_q - t| <= B_t + step(|t| + B_t) / 2,   B_t = B_y / s_k + 3u_a (|t| + B_y / s_k),
       with step(v) the format's spacing at v (refnorm.quantize.step_at). Where |t| + B_t reaches
       the overflow threshold, the declared overflow value (+-q_max, or NaN / +-Inf) is accepted,
       and where |t| - B_t passes it, only that value is.
levels The kernel's level against Q(t), the oracle's correctly rounded level under the kernel's
       scale: how many elements differ, and by how many levels (a signed histogram), recorded in
       the output's result as ``levels``.

A static scale is the harness's: 2^ceil(log2(1.01 amax / q_max)) (every value fits), or a quarter of
it ("static_overflow": the largest values overflow, so that saturation and NaN are told apart).
"""

from __future__ import annotations

import math
from dataclasses import replace
from typing import Any

import numpy as np

from refnorm import quantize as rq

from . import dtypes, ops
from .arrays import as_numpy
from .cases.model import Case
from .compare import OutputResult, compare_output, ulp_histogram, unread_output
from .kernel import Kernel, Precision
from .quantization import QUANT_OUTPUTS, Quantization
from .tolerances import derive_bounds
from .tolerances.bound import Bound, json_number

__all__ = ["CASE_SCALES", "VALUE_KINDS", "quantized_cases", "skip_reason", "forward_kwargs", "check_outputs",
           "static_scale", "level_histogram", "case_scale_mode", "declared_cases", "peer_specs"]

#: The scale modes of the cases: the declaration's three, the static one twice.
CASE_SCALES = ("tensor", "row", "static", "static_overflow")
#: Value kinds of the quantized cases: ordinary data, a heavy tail (an amax far above the typical
#: value, so most values sit in the lowest binades), large magnitudes, and constant groups (y = bias).
VALUE_KINDS = ("normal", "heavy_tail", "large", "constant")
#: How much smaller than the fitting scale the overflowing static scale is.
OVERFLOW_FACTOR = 4.0


def case_scale_mode(case: Case) -> str:
    """The declaration's scale mode a case needs ("static" for both static kinds)."""
    return "static" if case.scale.startswith("static") else case.scale


def quantized_cases(spec: Any, dtype: str, tier: str, mid: Case, long: Case) -> list[Case]:
    """The quantized cases of one op and dtype, after the unquantized ones: for each format and
    scale mode, the value kinds on the op's workhorse shape, and (standard and above) transposed
    strides, no weight or bias, and the op's long reduction."""
    out: list[Case] = []
    for fmt in rq.QFORMATS:
        for sc in CASE_SCALES:
            q = dict(out=fmt, scale=sc, tier=tier)
            kinds = ("normal",) if tier == "smoke" else VALUE_KINDS
            out += [replace(mid, values=k, **q) for k in kinds]
            if tier != "smoke":
                out.append(replace(mid, strides="transposed", **q))
                out.append(replace(mid, weight="none", bias="none", **q))
                out.append(replace(long, **q))
    return out


def skip_reason(kernel: Kernel, case: Case) -> str | None:
    """Why a case's quantization does not match the kernel's declaration, or None when it does."""
    q: Quantization | None = kernel.quantization
    if not case.out:
        if q is not None:
            return (f"the kernel declares a quantized y ({q.format}, scale={q.scale}): only the quantized cases "
                    "(ids ending out=...) apply to it")
        return None
    if q is None:
        return f"a quantized case (out={case.out}): the kernel declares no quantization"
    if case.out != q.format:
        return f"output format {case.out}: the kernel declares {q.format}"
    if case_scale_mode(case) != q.scale:
        return f"scale={case.scale}: the kernel declares scale={q.scale}"
    if case.mode != "train":
        return "quantized y is checked in training mode only"
    return None


def static_scale(y: np.ndarray, fmt: rq.QFormat, kind: str) -> float:
    """The harness's static scale for a case: a power of two (exact in every scale format), with
    amax / s in (q_max / 2.02, q_max / 1.01] ("static"), or a quarter of that ("static_overflow")."""
    fin = np.abs(y[np.isfinite(y)])
    amax = float(fin.max()) if fin.size else 0.0
    s = 2.0 ** math.ceil(math.log2(1.01 * amax / fmt.q_max)) if amax > 0 else 1.0
    return s / OVERFLOW_FACTOR if kind == "static_overflow" else s


def forward_kwargs(kernel: Kernel, case: Case, fwd: Any) -> dict[str, Any]:
    """What forward is given beside the op's arguments: y_scale (shape (), in the scale format) for a
    static scale; nothing otherwise."""
    q = kernel.quantization
    if q is None or not case.out or q.dynamic:
        return {}
    s = static_scale(np.asarray(fwd.y, dtype=np.float64), rq.qformat(q.format), case.scale)
    return {"y_scale": np.asarray(s).astype(dtypes.dtype_of(q.scale_format))}


def level_histogram(diff: np.ndarray) -> dict[str, int]:
    """Signed level differences in bins: "0", "+1", "-1", "+2-3", "-4-7", ... (powers of two, as
    compare.ulp_histogram's bins, with the sign of kernel minus oracle)."""
    d = np.asarray(diff, dtype=np.int64).ravel()
    out: dict[str, int] = {}
    z = int(np.count_nonzero(d == 0))
    if z:
        out["0"] = z
    for sign, part in (("+", d[d > 0]), ("-", -d[d < 0])):
        for k, v in ulp_histogram(part).items():
            out[sign + k] = v
    return out


def _bad_scale(name: str, s: np.ndarray) -> str:
    bad = ~(np.isfinite(s) & (s > 0))
    if not bad.any():
        return ""
    i = int(np.argmax(bad.ravel()))
    return (f"{name}: {int(np.count_nonzero(bad))} of {s.size} scale value(s) are not finite and positive "
            f"(first: {float(s.ravel()[i])!r}); a dequantization scale must be > 0 and finite")


def _read(kernel_out: Any, name: str, shape: tuple[int, ...], dtype: np.dtype) -> tuple[np.ndarray | None, str]:
    """The kernel's array, or why it cannot be used (strict: shape and dtype as declared)."""
    if kernel_out is None:
        return None, f"output {name}: the kernel returned None for a declared output"
    try:
        a = np.asarray(as_numpy(kernel_out))
    except Exception as e:
        return None, f"output {name}: cannot read the returned {type(kernel_out).__name__} as an array: {e}"
    if a.shape != tuple(shape):
        return None, f"output {name}: shape {a.shape}, expected {tuple(shape)} (no broadcasting)"
    if a.dtype != dtype:
        return None, f"output {name}: dtype {a.dtype}, declared {dtype} (no casting)"
    return a, ""


def _unreadable(name: str, expected: np.ndarray, fmt_name: str, message: str) -> OutputResult:
    b = Bound(output=name, values=np.zeros(()), formula="not compared: " + message)
    return unread_output(name, expected, b, dtype=fmt_name, message=message)


def _scale_bound(q: Quantization, fmt: rq.QFormat, src: np.ndarray, b_src: np.ndarray, s_o: np.ndarray,
                 u_a: float) -> Bound:
    """The bound of a correct kernel's scale (module docstring)."""
    ab = np.broadcast_to(np.asarray(b_src, dtype=np.float64), src.shape)
    if q.scale == "tensor":
        amax, a_err = np.max(np.abs(src)), np.max(ab)
    else:
        amax, a_err = np.max(np.abs(src), axis=-1), np.max(ab, axis=-1)
    s_hi = np.maximum(amax + a_err, q.amax_floor) / fmt.q_max
    s_lo = np.maximum(amax - a_err, q.amax_floor) / fmt.q_max
    u_f = dtypes.unit_roundoff(q.scale_format)
    eta_f = float(dtypes.finfo(q.scale_format).smallest_subnormal) / 2.0
    vals = np.maximum(s_hi - s_o, s_o - s_lo) + (2 * u_a + u_f) * s_hi + eta_f
    return Bound(output="scale", values=np.asarray(vals, dtype=np.float64),
                 formula="max(s_hi - s, s - s_lo) + (2u_a + u_f) s_hi + eta_f, s_hi/lo = max(amax +- A, floor)/q_max, "
                         "A = max B_y over the amax's elements",
                 terms={"q_max": fmt.q_max, "u_a": u_a, "u_f": u_f, "A": json_number(float(np.max(a_err))),
                        "reference_scale": json_number(float(np.max(s_o)))})


def _yq_result(q: Quantization, fmt: rq.QFormat, a_q: np.ndarray, t: np.ndarray, b_t: np.ndarray) -> OutputResult:
    """Compare y_q with t = y / s_k under |y_q - t| <= B_t + step/2 and the overflow rule; count levels."""
    a = a_q.astype(np.float64)
    with np.errstate(invalid="ignore", over="ignore"):
        half = 0.5 * rq.step_at(np.abs(t) + b_t, fmt)
        bq = b_t + half
        thr = rq.overflow_threshold(fmt)
        maybe = np.abs(t) + b_t >= thr
        sure = np.abs(t) - b_t > thr
        t_nan = np.isnan(t)
        if q.overflow == "saturate":
            ov = np.sign(t) * fmt.q_max
            is_ov = a == ov
        elif fmt.has_inf:
            ov = np.sign(t) * np.inf
            is_ov = a == ov
        else:
            ov = np.full(t.shape, np.nan)
            is_ov = np.isnan(a)
        err = np.where(np.isfinite(a) & np.isfinite(t), np.abs(a - t), np.inf)
        ok_val = err <= bq
        ok = np.where(sure, is_ov, ok_val | (maybe & is_ov))
        ok = np.where(t_nan, np.isnan(a), ok)
        accepted = ok & ~ok_val  # the declared overflow value (or NaN for NaN): no error, as compare's accepts
        n_ov = int(np.count_nonzero(accepted & ~t_nan & maybe))
        err = np.where(accepted, 0.0, err)
    mism = ~ok
    ref = rq.quantize(t, fmt, overflow=q.overflow)
    both = ~np.isnan(a) & ~np.isnan(ref)
    diff = (rq.levels(a, fmt) - rq.levels(ref, fmt))[both]
    hist = level_histogram(diff)
    off = int(np.count_nonzero(diff))
    n = int(t.size)
    a_nan, r_nan = np.isnan(a), np.isnan(ref)
    nan_mis = int(np.count_nonzero(a_nan != r_nan))
    a_inf, r_inf = np.isinf(a), np.isinf(ref)
    inf_mis = int(np.count_nonzero(~a_nan & ~r_nan & ((a_inf != r_inf) | (a_inf & r_inf & (np.sign(a) != np.sign(ref))))))
    fin = np.isfinite(err)
    ratio = np.where(fin, err / np.where(bq > 0, bq, np.inf), 0.0)
    k = int(np.count_nonzero(mism))
    if k:
        wi = np.unravel_index(int(np.argmax(np.where(mism, np.where(fin, ratio, np.inf), -1.0))), t.shape)
    else:
        wi = np.unravel_index(int(np.argmax(ratio)), t.shape) if n else ()
    wi = tuple(int(i) for i in wi)
    slack = float(np.median(b_t / (2.0 * half))) if n else 0.0
    rel = np.where(fin & (t != 0), err / np.where(t != 0, np.abs(t), 1.0), 0.0)
    bound = Bound(output="y_q", values=bq,
                  formula="|y_q - y/s_k| <= B_t + step(|t| + B_t)/2, B_t = B_y/s_k + 3u_a (|t| + B_y/s_k); "
                          f"overflow beyond {thr:g}: {q.overflow}",
                  terms={"q_max": fmt.q_max, "overflow_threshold": thr, "median_slack_levels": slack})
    res = OutputResult(
        name="y_q", dtype=q.format, shape=tuple(t.shape), n=n, mismatched=k,
        max_abs=float(err[fin].max()) if fin.any() else 0.0, max_rel=float(rel.max()) if n else 0.0,
        max_ulp=int(np.abs(diff).max()) if diff.size else 0,
        budget_used=float("inf") if (nan_mis or inf_mis or (k and not fin[mism].all())) else
        (float(ratio.max()) if n else 0.0),
        worst_index=wi, worst_actual=float(a[wi]) if n else float("nan"),
        worst_expected=float(t[wi]) if n else float("nan"), worst_bound=float(bq[wi]) if n else float("nan"),
        nan_mismatch=nan_mis, inf_mismatch=inf_mis, ulp_hist=ulp_histogram(np.abs(diff)),
        bound=bound.summary(), passed=k == 0,
        levels={"format": q.format, "scale": q.scale, "overflow": q.overflow, "compared": int(diff.size),
                "off_level": off, "hist": hist, "max_levels": int(np.abs(diff).max()) if diff.size else 0},
    )
    if n_ov:
        res.accepted = {f"beyond the format's range: the declared overflow value ({q.overflow})": n_ov}
    if res.passed and slack > 2.0:
        res.inconclusive = (f"the propagated error of y spans {slack:.3g} levels of {q.format} (median): "
                            "a level off is not visible under it, so a pass is weak evidence")
    head = f"y_q ({q.format}, shape {res.shape}, in units of the kernel's scale)"
    lv = f"{off} of {diff.size} element(s) on another level than the oracle's correctly rounded one"
    if res.passed:
        res.message = f"{head}: all {n} elements within the derived bound; budget used {res.budget_used:.6g}; {lv}"
        if res.inconclusive:
            res.message += f"; inconclusive: {res.inconclusive}"
    else:
        res.message = "\n".join([
            f"Not within the derived bound: {head}",
            f"Mismatched elements: {k} / {n} ({100.0 * k / n if n else 0:.3g}%)",
            f"Levels: {lv}; histogram (kernel - oracle) {hist}",
            f"NaN position mismatches: {nan_mis}; Inf position/sign mismatches: {inf_mis}",
            f"Worst element {wi}: actual {res.worst_actual:.6g}, expected y/s_k {res.worst_expected:.6g}, "
            f"bound {res.worst_bound:.6g}",
            f"Bound: {bound.formula}"])
    return res


def check_outputs(kernel: Kernel, case: Case, prec: Precision, conv: Any, inp64: dict[str, Any], fwd: Any,
                  raw: dict[str, Any]) -> list[OutputResult]:
    """The results of y_q and (dynamic scales) scale; ``raw`` holds what the kernel returned by name."""
    q: Quantization = kernel.quantization
    fmt = rq.qformat(q.format)
    y = np.asarray(fwd.y, dtype=np.float64)
    u_a = dtypes.unit_roundoff(prec.resolved().accumulate)
    b_y = np.broadcast_to(np.asarray(derive_bounds(case, prec, conv, inp64, {"y": y})["y"].values,
                                     dtype=np.float64), y.shape)
    results: list[OutputResult] = []
    scale_shape = () if q.scale != "row" else y.shape[:-1]
    if q.dynamic:
        if q.scale_from == "before_weight":
            bare = replace(case, weight="none", bias="none")
            inp_bare = {**inp64, "weight": None, "bias": None}
            src = np.asarray(ops.oracle_forward(bare, conv, inp_bare).y, dtype=np.float64)
            b_src = derive_bounds(bare, prec, conv, inp_bare, {"y": src})["y"].values
        else:
            src, b_src = y, b_y
        s_o = rq.dynamic_scale(src, fmt, q.scale, floor=q.amax_floor)
        s_k, why = _read(raw.get("scale"), "scale", scale_shape, dtypes.dtype_of(q.scale_format))
        why = why or (_bad_scale("scale", s_k) if s_k is not None else "")
        if why:
            results.append(_unreadable("scale", s_o, q.scale_format, why))
            results.append(_unreadable("y_q", y, q.format, "not compared: the kernel's scale is unusable"))
            return results
        sb = _scale_bound(q, fmt, src, b_src, s_o, u_a)
        results.append(compare_output("scale", s_k, s_o, sb, dtype=q.scale_format))
        s = s_k.astype(np.float64)
    else:
        s = np.asarray(forward_kwargs(kernel, case, fwd)["y_scale"], dtype=np.float64)
    a_q, why = _read(raw.get("y_q"), "y_q", y.shape, fmt.dtype)
    if why:
        results.append(_unreadable("y_q", y, q.format, why))
        return results
    s_b = s[..., None] if q.scale == "row" else s
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        t = y / s_b
        by_t = b_y / s_b
        b_t = by_t + 3.0 * u_a * (np.abs(t) + by_t) + 2.0 ** -50 * np.abs(t)
    results.append(_yq_result(q, fmt, a_q, t, np.where(np.isfinite(b_t), b_t, np.inf)))
    return results


#: Names a quantized kernel's outputs carry that the unquantized comparison leaves to this module.
HANDLED = QUANT_OUTPUTS


def declared_cases(kernel: Kernel, cases: list[Case]) -> list[Case]:
    """The quantized cases whose format and scale mode are the kernel's declaration."""
    q = kernel.quantization
    return [c for c in cases if c.out == q.format and case_scale_mode(c) == q.scale]


#: Libraries with a composition that quantizes y: adapter module -> the composition's factory.
PEER_COMPOSITIONS = {"conformance.adapters.torch_cpu": "conformance.adapters.torch_quantized:quantized"}


def peer_specs(adapter: str, op: str, q: dict[str, Any], run_spec: str = "") -> list[str]:
    """The specs of a library's quantized composition for a report's peers: the same op, format and scale
    mode (its own overflow and precision, declared); none where the library has none, or where the
    kernel under test is that composition."""
    base = PEER_COMPOSITIONS.get(adapter)
    if base is None or run_spec.startswith(base.split(":")[0] + ":"):
        return []
    from refnorm.quantize import QFORMATS, SCALE_MODES

    fmt, sc = q.get("format"), q.get("scale")
    if fmt not in QFORMATS or sc not in SCALE_MODES:  # a document from elsewhere: nothing to run
        return []
    return [f"{base}?op={op},format={fmt},scale={sc}"]
