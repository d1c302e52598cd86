"""Rank the hypotheses for each failing output by the budget the kernel's error uses under each.

For an output that failed with budget B (max |kernel - oracle| / bound), each applicable hypothesis
gives predicted values and a bound; the kernel's budget under it is max |kernel - predicted| / bound
(conformance.compare, the same comparison). A hypothesis *explains* the failure when that budget is
at most 1. Among those come first: one that predicts other values than the oracle's (by more than the
declared bound) or another convention, before one that only widens the bound, as the more specific
claim confirmed; then the one that explains the most of the case's failing outputs (one cause for all
of them); then the one that brings the kernel's values nearest in units of the declared bound; then the one whose bound
is tightest. When none explains it, the closest is named with how far it still is, and locate.py
says where the error lives. A diagnosis adds information only: the verdict was made before it and stays.
"""

from __future__ import annotations

import math
import time
from typing import Any

import numpy as np

from ..compare import compare_output
from .hypotheses import HYPOTHESES, Evidence
from .locate import where_text

__all__ = ["diagnose", "TIME_LIMIT_S", "SHOWN"]

#: Seconds a case's diagnosis may take; hypotheses not reached by then are listed as not tried.
TIME_LIMIT_S = 1.5
#: Hypotheses kept per output in the results (the best first).
SHOWN = 5


def _looseness(b_alt: Any, b_decl: Any, shape: tuple[int, ...]) -> float:
    """The median over elements of bound_under_hypothesis / declared bound (finite, positive ones)."""
    step = max(1, math.prod(shape) // 4096)  # a median of at most ~4096 evenly spaced elements
    a = np.broadcast_to(np.asarray(b_alt, np.float64), shape).ravel()[::step]
    d = np.broadcast_to(np.asarray(b_decl, np.float64), shape).ravel()[::step]
    ok = np.isfinite(a) & np.isfinite(d) & (d > 0) & (a > 0)
    if not ok.any():
        return 1.0
    return float(np.median(a[ok] / d[ok]))


def _bucket(looseness: float) -> int:
    """Powers of two of the widening (hypotheses within a factor 2 of each other rank alike)."""
    return round(math.log2(min(max(looseness, 1.0), 2.0 ** 1000)))


def _moves(pred: np.ndarray, oracle: np.ndarray, bound: Any) -> bool:
    """Whether a hypothesis predicts other values than the oracle's (by more than the declared bound, or
    another NaN/Inf class somewhere) rather than only a wider bound."""
    p, o = np.asarray(pred, np.float64), np.asarray(oracle, np.float64)
    b = np.broadcast_to(np.asarray(bound, np.float64), o.shape)
    with np.errstate(all="ignore"):
        if bool(np.any(np.isnan(p) != np.isnan(o)) or np.any(np.isinf(p) & (p != o))):
            return True
        fin = np.isfinite(p) & np.isfinite(o)
        return bool(np.any(fin & (np.abs(p - o) > b)))


def _finite(v: float) -> float:
    return v if math.isfinite(v) else math.inf


def _budget(r) -> float:
    return float(r.budget_used)


def _fmt(b: float) -> str:
    return "inf" if math.isinf(b) else ("nan" if math.isnan(b) else f"{b:.3g}")


def diagnose(ev: Evidence, failed: dict[str, Any], dtype_of_output, limit_s: float = TIME_LIMIT_S) -> dict[str, dict]:
    """{output name: diagnosis record} for the failed OutputResults ``failed`` (by name)."""
    t0 = time.perf_counter()
    names = tuple(failed)
    tried: dict[str, list[dict]] = {n: [] for n in names}
    skipped: list[str] = []
    errors: list[str] = []
    for h in HYPOTHESES:
        want = tuple(n for n in names if n in h.outputs)
        if not want:
            continue
        if time.perf_counter() - t0 >= limit_s:
            skipped.append(h.key)
            continue
        try:
            preds = h.predict(ev, want)
        except Exception as e:  # a hypothesis that cannot be evaluated on this case is left out, said so
            errors.append(f"{h.key}: {type(e).__name__}: {e}")
            continue
        for p in preds:
            for n, (exp, bound) in p.values.items():
                act = ev.raw[n]
                with np.errstate(all="ignore"):
                    r = compare_output(n, act, exp, bound, dtype=dtype_of_output(n), ulps=False)
                    near = compare_output(n, act, exp, ev.bounds[n], dtype=dtype_of_output(n), ulps=False)
                tried[n].append({
                    "key": h.key, "kind": h.kind, "label": p.label, "explanation": h.explanation,
                    "source": h.source, "budget": _budget(r), "residual": _budget(near),
                    "looseness": _looseness(bound.values, ev.bounds[n].values, np.shape(exp)),
                    "explained": bool(r.passed), "informative": not r.inconclusive,
                    "mismatched": int(r.mismatched),
                    "moves": h.kind == "convention" or _moves(exp, ev.expected[n], ev.bounds[n].values)})
    for n, fr in failed.items():
        for d in tried[n]:
            d["explained"] = d["explained"] and not (d["budget"] >= float(fr.budget_used))
    # how many of the case's failing outputs each hypothesis explains: one cause for all is preferred
    cover: dict[str, int] = {}
    for n in names:
        for key in {d["key"] for d in tried[n] if d["explained"]}:
            cover[key] = cover.get(key, 0) + 1
    out = {}
    for n, fr in failed.items():
        before = float(fr.budget_used)
        hyps = tried[n]
        for d in hyps:
            d["explains_outputs"] = cover.get(d["key"], 0)
        hyps.sort(key=lambda d: (not d["explained"], not d["informative"],
                                 not d["moves"] if d["explained"] else 0,
                                 -d["explains_outputs"] if d["explained"] else 0,
                                 _finite(d["residual"]) if d["explained"] else _finite(d["budget"]),
                                 _bucket(d["looseness"]),
                                 _finite(d["budget"]), d["mismatched"]))
        best = hyps[0] if hyps else None
        cause = best["label"] if best and best["explained"] else None
        where = where_text(ev.case, ev.spec, n, np.asarray(ev.raw[n]), ev.expected[n], ev.bounds[n].values)
        out[n] = {
            "cause": cause,
            "cause_key": best["key"] if cause else None,
            "explained": cause is not None,
            "informative": bool(cause and best["informative"]),
            "budget_before": before,
            "hypotheses": hyps[:SHOWN],
            "tried": len(hyps),
            "not_tried": skipped,
            "errors": errors,
            "where": where,
            "text": _text(n, before, best, hyps[1:], where) + (
                f" ({len(skipped)} hypotheses not tried: the diagnosis's time limit)" if skipped else ""),
        }
    return out


def _text(name: str, before: float, best: dict | None, others: list[dict], where: str) -> str:
    if best and best["explained"]:
        also = [d["label"] for d in others if d["explained"] and d["label"] != best["label"]]
        weak = "" if best["informative"] else (" (but that bound is not informative: it exceeds the output's own "
                                               "magnitude, so this is consistency, not evidence)")
        return (f"likely cause of {name}: {best['label']}: {best['explanation']}. Under it the error drops from "
                f"{_fmt(before)}x to {_fmt(best['budget'])}x of the bound{weak} [{best['source']}]"
                + (f"; also consistent: {', '.join(also[:3])}" if also else ""))
    close = (f"; closest: {best['label']}, still {_fmt(best['budget'])}x (from {_fmt(before)}x)" if best
             and best["budget"] < before else "")
    return f"no tried explanation brings {name} within its bound{close}. Where it lives: {where}"
