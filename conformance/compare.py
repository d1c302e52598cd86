"""Compare one kernel output with the oracle under its bound: metrics first, verdict second.

Strict by design: the actual array must have exactly the expected shape and the
declared dtype (no broadcasting, no casting). NaN positions must match; +-Inf
positions and signs must match; elements that are NaN (or the same infinity) in
both are left out of the error metrics. An element is mismatched when its
classes differ or |actual - expected| > bound. Relative error is |a - e| / |e|
over e != 0. The failure message follows numpy.testing's wording.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from . import blockwise, dtypes
from .evidence import uninformative
from .tolerances.bound import Accept, Bound, json_number

__all__ = ["OutputResult", "compare_output", "unread_output", "ulp_histogram"]


@dataclass
class OutputResult:
    """The comparison of one output: metrics, the worst element, the bound's summary and the verdict.

    budget_used is max over elements of |err| / bound (inf where err > 0 and the bound is 0):
    below 1 means every element is within its bound.
    """

    name: str
    dtype: str
    shape: tuple[int, ...]
    n: int
    mismatched: int
    max_abs: float
    max_rel: float
    max_ulp: int
    budget_used: float
    worst_index: tuple[int, ...]
    worst_actual: float
    worst_expected: float
    worst_bound: float
    nan_mismatch: int
    inf_mismatch: int
    ulp_hist: dict[str, int] = field(default_factory=dict)
    bound: dict[str, Any] = field(default_factory=dict)
    passed: bool = False
    message: str = ""
    accepted: dict[str, int] = field(default_factory=dict)
    inconclusive: str = ""
    class_only: str = ""
    invariant: str = ""
    accepted_inconclusive: bool = False
    #: a quantized output (conformance.quantized): elements on another level than the oracle's, and by how many
    levels: dict[str, Any] = field(default_factory=dict)
    #: against the correctly rounded oracle value (conformance.rounding_bias.element_statistics); {} for float64
    rounding: dict[str, Any] = field(default_factory=dict)
    #: the error fitted to the bound's model (conformance.effective_precision.case_statistics)
    effective: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready: tuples as lists, non-finite floats as "inf"/"-inf"/"nan"."""
        d = {k: _copied(getattr(self, k)) for k in self.__dataclass_fields__}  # asdict's deep copy, without its cost
        d["shape"] = list(self.shape)
        d["worst_index"] = list(self.worst_index)
        for k in ("max_abs", "max_rel", "budget_used", "worst_actual", "worst_expected", "worst_bound"):
            d[k] = json_number(d[k])
        return d

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "OutputResult":
        kw = {k: d[k] for k in cls.__dataclass_fields__ if k in d}
        kw["shape"] = tuple(kw.get("shape", ()))
        kw["worst_index"] = tuple(kw.get("worst_index", ()))
        for k in ("max_abs", "max_rel", "budget_used", "worst_actual", "worst_expected", "worst_bound"):
            if k in kw:
                kw[k] = float(kw[k])
        return cls(**kw)


def _copied(v: Any) -> Any:
    """A copy of the containers (dicts, lists, tuples) of a field's value; leaves are shared."""
    if isinstance(v, dict):
        return {k: _copied(x) for k, x in v.items()}
    if isinstance(v, list):
        return [_copied(x) for x in v]
    if isinstance(v, tuple):
        return tuple(_copied(x) for x in v)
    return v


def ulp_histogram(ulps: np.ndarray, top: int | None = None) -> dict[str, int]:
    """Counts of ULP distances in bins "0", "1", "2-3", "4-7", "8-15", ... (powers of two); negative
    distances (NaN positions) are left out. ``top``: the caller knows every distance is in [0, top]."""
    u = np.asarray(ulps, dtype=np.int64).ravel()
    if u.size == 0:
        return {}
    if top is not None and 0 <= top < 2**53:
        # Every distance is exactly a float64, whose biased exponent field is 1023 + floor(log2 u) for
        # u >= 1 and 0 for u = 0 (IEEE 754-2019 §3.4, binary64: 11 exponent bits, bias 1023): one count
        # per binade from the bits.
        f = u.astype(np.float64)
        counts = np.bincount(np.right_shift(f.view(np.int64), 52, out=f.view(np.int64)))
        return _binned(int(counts[0]), counts[1023:])
    u = u[u >= 0]
    z = int(np.count_nonzero(u == 0))
    pos = u[u > 0]
    counts = np.zeros(0, dtype=np.int64)
    if pos.size:
        # floor(log2(pos)) from the binary exponent: pos = m 2^e with m in [0.5, 1) (numpy.frexp).
        k = np.frexp(pos.astype(np.float64))[1].astype(np.int64) - 1
        # float64 rounding of an int64 near 2^k may carry it up one binade: correct it exactly.
        k = np.where((np.int64(1) << k) > pos, k - 1, k)
        counts = np.bincount(k)
    return _binned(z, counts)


def _binned(zeros: int, counts: np.ndarray) -> dict[str, int]:
    """{"0": zeros, "1": counts[0], "2-3": counts[1], ...} without the empty bins."""
    hist: dict[str, int] = {}
    if zeros:
        hist["0"] = zeros
    for b in np.flatnonzero(counts):
        lo, hi = 1 << int(b), (1 << (int(b) + 1)) - 1
        hist[str(lo) if lo == hi else f"{lo}-{hi}"] = int(counts[b])
    return hist


def _fmt(v: float) -> str:
    return f"{v:.6g}"


def _accept(a: np.ndarray, exp: np.ndarray, b: np.ndarray, accepts: tuple[Accept, ...]):
    """Apply a bound's accepted alternatives (tolerances.bound.Accept) before the comparison.

    Where the kernel's value is an accepted alternative it stands in for the oracle's (no error);
    where an alternative is the only right value (``must``) it replaces the oracle's with a zero
    bound. Returns (expected, bound, {reason: elements whose accepted value differs from the oracle's}).
    """
    counts: dict[str, int] = {}
    done = np.zeros(exp.shape, dtype=bool)  # accepted by an earlier alternative: settled
    for acc in accepts:
        m = np.broadcast_to(np.asarray(acc.mask, dtype=bool), exp.shape) & ~done
        if not m.any():
            continue
        if acc.value is None:
            v = None
            hit = m & ~np.isfinite(a)
        else:
            v = np.broadcast_to(np.asarray(acc.value, dtype=np.float64), exp.shape)
            with np.errstate(invalid="ignore"):
                hit = m & ((a == v) | (np.isnan(a) & np.isnan(v)))
        with np.errstate(invalid="ignore"):
            differs = hit & ~((a == exp) | (np.isnan(a) & np.isnan(exp)))
        if hit.any():
            exp = np.where(hit, a, exp)
            done |= hit
        if acc.must and v is not None:
            rest = m & ~hit
            if rest.any():
                exp = np.where(rest, v, exp)
                b = np.where(rest, 0.0, b)
        k = int(np.count_nonzero(differs))
        if k:
            counts[acc.reason] = counts.get(acc.reason, 0) + k
    return exp, b, counts


def _failed(name: str, dtype: str, expected: np.ndarray, bound: Bound, message: str,
            shape: tuple[int, ...]) -> OutputResult:
    n = int(expected.size)
    return OutputResult(name=name, dtype=dtype, shape=tuple(shape), n=n, mismatched=n, max_abs=float("nan"),
                        max_rel=float("nan"), max_ulp=-1, budget_used=float("inf"), worst_index=(),
                        worst_actual=float("nan"), worst_expected=float("nan"), worst_bound=float("nan"),
                        nan_mismatch=0, inf_mismatch=0, ulp_hist={}, bound=bound.summary(), passed=False,
                        message=message)


def unread_output(name: str, expected: np.ndarray, bound: Bound, *, dtype: str, message: str) -> OutputResult:
    """A failed comparison of an output that could not be read (a missing or refused file): every
    element counts as mismatched, the budget used is infinite, and ``message`` says why."""
    exp = np.asarray(expected, dtype=np.float64)
    return _failed(name, dtype, exp, bound, message, exp.shape)


def compare_output(name: str, actual: Any, expected: np.ndarray, bound: Bound, *, dtype: str,
                   ulps: bool = True) -> OutputResult:
    """Compare ``actual`` (the kernel's output) with ``expected`` (the oracle's, float64) under ``bound``.

    Parameters
    ----------
    name : the output's name.
    actual : array of exactly ``expected``'s shape and of the format ``dtype``.
    expected : the oracle's values.
    bound : elementwise allowed |actual - expected| (broadcastable to the shape).
    dtype : the declared format of the output (tolerances.output_dtype), in which ULPs are counted.
    ulps : count ULP distances (max_ulp, ulp_hist) and write the message; False (conformance.diagnosis,
        which compares one output with many predictions) leaves them at 0, {} and "".

    Returns
    -------
    OutputResult; ``passed`` is True when no element is mismatched.
    """
    exp = np.asarray(expected, dtype=np.float64)
    want = dtypes.dtype_of(dtype)
    if not isinstance(actual, np.ndarray) and not np.isscalar(actual):
        try:
            actual = np.asarray(actual)
        except Exception as e:  # a foreign object the harness could not read
            return _failed(name, dtype, exp, bound, f"output {name}: cannot read {type(actual).__name__} "
                           f"as an array: {e}", exp.shape)
    act = np.asarray(actual)
    if act.shape != exp.shape:
        return _failed(name, dtype, exp, bound,
                       f"shape mismatch: actual {act.shape}, expected {exp.shape} (no broadcasting)", act.shape)
    if act.dtype != want:
        return _failed(name, dtype, exp, bound,
                       f"dtype mismatch: actual {act.dtype}, declared {dtype} (no casting)", act.shape)

    b = np.broadcast_to(np.asarray(bound.values, dtype=np.float64), exp.shape)
    n = int(exp.size)
    want_ulps = ulps
    accepted: dict[str, int] = {}
    fast = None if bound.accept or not n else _finite_pass(act, exp, b, dtype, want_ulps)
    if fast is not None:  # the common case: every error finite, no accepted alternative, no class masks
        a, err, ratio, ulps, max_rel, k, max_abs, max_ulp = fast
        finite, any_both = True, True
        nan_mis = inf_mis = mism = np.zeros((), dtype=bool)
        both = np.ones((), dtype=bool)
        n_nan = n_inf = 0
    else:
        a = np.asarray(act.astype(np.float64))
        if bound.accept:
            exp, b, accepted = _accept(a, exp, b, bound.accept)
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            err = np.asarray(np.subtract(a, exp))
            np.abs(err, out=err)
        # err is finite only where both are: Inf - x and NaN - x are not (an overflowing difference of two
        # finite values also lands in the general branch, which handles every element)
        finite = bool(np.isfinite(err).all())
        if finite:  # accepted alternatives, all finite: no class masks
            nan_mis = inf_mis = np.zeros((), dtype=bool)
            both = np.ones((), dtype=bool)
            n_nan = n_inf = 0
        else:
            a_nan, e_nan = np.isnan(a), np.isnan(exp)
            a_inf, e_inf = np.isinf(a), np.isinf(exp)
            nan_mis = a_nan != e_nan
            inf_mis = ~nan_mis & ~a_nan & ((a_inf != e_inf) | (a_inf & e_inf & (np.sign(a) != np.sign(exp))))
            both = np.isfinite(a) & np.isfinite(exp)
            n_nan, n_inf = int(np.count_nonzero(nan_mis)), int(np.count_nonzero(inf_mis))
        any_both = n > 0 and bool(both.any())

        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            if not finite:
                err[~both] = 0.0
            ratio = np.empty(exp.shape)
            max_rel = _relative_and_budget(err, exp, b, ratio)
        over = ratio > 1.0
        mism = over if finite else over | nan_mis | inf_mis
        k = int(np.count_nonzero(mism))

        if not want_ulps:
            ulps = np.zeros((), dtype=np.int64)
        elif finite:
            ulps = dtypes.ulp_distance(act, exp, dtype, finite=True)
        else:
            ulps = dtypes.ulp_distance(np.where(both, a, 0.0), np.where(both, exp, 0.0), dtype)
            ulps = np.where(both, ulps, -1)
        max_ulp = int(ulps.max()) if any_both else 0
        max_abs = float(err.max()) if n else 0.0
    top = int(np.argmax(ratio)) if any_both else 0  # argmax finds a NaN first, as max returns it
    budget = float(ratio.reshape(-1)[top]) if any_both else 0.0
    if n_nan or n_inf:
        budget = float("inf")

    if any_both and budget > 0:
        wi = np.unravel_index(top, exp.shape)
    elif k:
        wi = np.unravel_index(int(np.argmax(np.broadcast_to(mism, exp.shape))), exp.shape)
    elif n:
        wi = np.unravel_index(0, exp.shape)
    else:
        wi = ()
    if n_nan or n_inf:
        wi = np.unravel_index(int(np.argmax(nan_mis | inf_mis)), exp.shape)
    wi = tuple(int(i) for i in wi)
    w_act = float(a[wi]) if n else float("nan")
    w_exp = float(exp[wi]) if n else float("nan")
    w_b = float(b[wi]) if n else float("nan")

    res = OutputResult(name=name, dtype=dtype, shape=tuple(exp.shape), n=n, mismatched=k, max_abs=max_abs,
                       max_rel=max_rel, max_ulp=max_ulp, budget_used=budget, worst_index=wi, worst_actual=w_act,
                       worst_expected=w_exp, worst_bound=w_b, nan_mismatch=n_nan,
                       inf_mismatch=n_inf, ulp_hist=ulp_histogram(ulps, max_ulp if finite else None) if want_ulps else {},
                       bound=bound.summary(), passed=k == 0, message="", accepted=accepted)
    if res.passed and bound.kind == "derived":
        res.inconclusive = uninformative(exp, b, float(bound.terms.get("reference_scale", 0.0)),
                                         int(bound.terms.get("nonfinite_bound_elements", 0)),
                                         max(float(dtypes.finfo(dtype).tiny), float(np.finfo(np.float32).tiny)))
    if bound.kind == "derived" and want_ulps:  # numerics of the run (rounding bias, effective precision): issue 11
        _numerics(res, a, exp, b, err, bound, dtype, both)
    res.message = _message(res, bound) if want_ulps else ""
    return res


def _relative_and_budget(err: np.ndarray, exp: np.ndarray, b: np.ndarray, out: np.ndarray) -> float:
    """The largest |err / exp| over exp != 0 (0 for none), with err / b, the budget used per element,
    left in ``out`` (exp's shape)."""
    # max relative error over expected != 0 (err / 0 gives inf or NaN there: masked out)
    np.divide(err, exp, out=out)
    np.abs(out, out=out)
    max_rel = float(np.max(out, where=exp != 0, initial=0.0))
    np.divide(err, b, out=out)
    if not (b > 0).all():
        # A bound that is 0, negative or NaN lets no error through; 0 / 0 is no error.
        np.copyto(out, np.where(err > 0, np.inf, 0.0), where=~(b > 0))
    return max_rel


def _finite_pass(act: np.ndarray, exp: np.ndarray, b: np.ndarray, dtype: str, ulps: bool):
    """The comparison's elementwise passes block by block, in cache (conformance.blockwise), for an
    output whose errors are all finite: (a, err, ratio, ulps, max_rel, mismatched, max_abs, max_ulp)
    with the values of the whole-array passes, or None when some error is not finite (the general
    path then judges the classes). The maxima and counts of blocks are exact."""
    shape = exp.shape
    a, err, ratio = np.empty(shape), np.empty(shape), np.empty(shape)
    u = np.empty(shape, dtype=np.int64) if ulps else np.zeros((), dtype=np.int64)
    max_rel, k, max_abs, max_ulp = 0.0, 0, 0.0, 0
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        for idx in blockwise.block_slices(shape):
            sl = idx if idx else ...
            ab, er, t, eb = a[sl], err[sl], ratio[sl], exp[sl]
            bb = b[sl]
            np.copyto(ab, act[sl], casting="unsafe")  # exact: every format widens into float64
            np.subtract(ab, eb, out=er)
            np.abs(er, out=er)
            if not np.isfinite(er).all():
                return None
            max_rel = max(max_rel, _relative_and_budget(er, eb, bb, t))
            k += int(np.count_nonzero(t > 1.0))
            max_abs = max(max_abs, float(er.max()))
            if ulps:
                ub = u[sl]
                dtypes.ulp_distance_into(ub, act[sl], eb, dtype, finite=True)
                max_ulp = max(max_ulp, int(ub.max()))
    return a, err, ratio, u, max_rel, k, max_abs, max_ulp


def _numerics(res: OutputResult, a: np.ndarray, exp: np.ndarray, b: np.ndarray, err: np.ndarray, bound: Bound,
              dtype: str, both: np.ndarray) -> None:
    """The per-case statistics that the run-level rounding-bias test and effective precision add up."""
    from .effective_precision import case_statistics
    from .rounding_bias import element_statistics

    if np.ndim(both) == 0:  # every element finite in both: no copies
        a_k, e_k, err_k = a, exp, err
    else:  # NaN marks the elements whose class the comparison judged: left out below
        keep = np.broadcast_to(both, exp.shape)
        a_k, e_k, err_k = np.where(keep, a, np.nan), np.where(keep, exp, np.nan), np.where(keep, err, np.nan)
    res.rounding = element_statistics(a_k, e_k, b, dtype)
    u_acc = bound.terms.get("u_o", bound.terms.get("u_a"))
    # the probabilistic model's bound is lam times its one-sigma error (docs/tolerances.md, Summation models)
    scale = float(bound.terms.get("lam", 1.0)) if "probabilistic" in bound.formula else 1.0
    res.effective = case_statistics(err_k, e_k, b, dtype, u_acc, scale)


def _message(r: OutputResult, bound: Bound) -> str:
    head = f"{r.name} ({r.dtype}, shape {r.shape})"
    acc = "".join(f"; {k} element(s) differ from the oracle's value, accepted: {why}" for why, k in r.accepted.items())
    if r.passed:
        return (f"{head}: all {r.n} elements within the {bound.kind} bound; budget used {_fmt(r.budget_used)}, "
                f"max ULP {r.max_ulp}{acc}" + (f"; inconclusive: {r.inconclusive}" if r.inconclusive else ""))
    pct = 100.0 * r.mismatched / r.n if r.n else 0.0
    lines = [
        f"Not within the {bound.kind} bound: {head}",
        f"Mismatched elements: {r.mismatched} / {r.n} ({pct:.3g}%)",
        f"Max absolute difference: {_fmt(r.max_abs)}",
        f"Max relative difference: {_fmt(r.max_rel)}",
        f"Max ULP distance ({r.dtype}): {r.max_ulp}",
    ]
    if r.nan_mismatch or r.inf_mismatch:
        lines.append(f"NaN position mismatches: {r.nan_mismatch}; Inf position/sign mismatches: {r.inf_mismatch}")
    idx = r.worst_index
    lines.append(f"Worst element {idx}: actual {_fmt(r.worst_actual)}, expected {_fmt(r.worst_expected)}, "
                 f"bound {_fmt(r.worst_bound)}")
    lines.append(f"Budget used: {_fmt(r.budget_used)} (max |actual - expected| / bound)")
    lines.append(f"Bound: {bound.formula}")
    if acc:
        lines.append("Accepted:" + acc[1:])
    rs = r.rounding
    if rs.get("elements"):  # against the correctly rounded value (conformance.rounding_bias)
        lines.append(f"Correctly rounded ({r.dtype}): {rs['correctly_rounded']} / {rs['elements']}; off it: "
                     f"{rs['off_toward_zero']} toward zero, {rs['off_away']} away from zero")
    return "\n".join(lines)
