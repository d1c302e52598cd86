"""A test for directed rounding: the signs of a kernel's deviations from the correctly rounded value.

A kernel that truncates (rounds toward zero, up or down) instead of rounding to nearest is off by at
most one ULP, which a bound of one unit roundoff u |y| (half an ULP to one ULP) catches on some elements
only. This test looks at the elements whose correctly rounded value is *determined*: the oracle's value
e lies farther from the nearest rounding midpoint of the output format than the bound's allowance
before the final rounding (the bound less its final term u_f |e|: tolerances/bounds.py, _final). There
a kernel that rounds its (model-conforming) result to nearest returns c = RN(e) exactly; a kernel that
rounds in a fixed direction returns c's neighbour in that direction whenever e lies on the far side of
its ULP interval.

Per case and output the worker records counts (``element_statistics``); a run adds them per (op, dtype,
output) and applies, to the deviations d != 0 on determined elements, four one-sided sign tests
(toward zero, away from zero, up, down) under the null hypothesis that each deviation's direction is
toward or away (up or down) with probability 1/2, independently: the exact binomial tail for up to
EXACT_LIMIT deviations, Hoeffding's bound exp(-2 n (k/n - 1/2)^2) above (Hoeffding 1963, Theorem 1),
which is never smaller than the exact tail. A direction is flagged when its p-value is at most
ALPHA / m, m the number of tests in the run (Bonferroni: the probability that a correct kernel is
flagged in a run is at most ALPHA by the union bound). docs/tolerances.md ("Rounding bias") derives it.
"""

from __future__ import annotations

import math
import sys
from typing import Any, Iterable

import numpy as np

from . import dtypes
from .results import output_of

__all__ = ["ALPHA", "DIRECTIONS", "element_statistics", "binomial_tail", "run_outputs", "run_bias", "flagged",
           "describe", "bias_lines"]

#: The false-alarm probability of a run: a kernel that rounds to nearest is flagged in at most one run in 10^6.
ALPHA = 1e-6
#: (name, counter): the directed roundings tested, each against its opposite.
DIRECTIONS = (("toward zero", "toward_zero", "away"), ("away from zero", "away", "toward_zero"),
              ("up", "up", "down"), ("down", "down", "up"))
#: The exact binomial tail up to this many deviations; Hoeffding's bound above.
EXACT_LIMIT = 20000
#: Relative error allowed to the float64 oracle itself when locating a midpoint (a few float64 ulps).
ORACLE_MARGIN = 8 * 2.0 ** -53
#: Elements of one output examined per case: every element up to 2 SAMPLE, else every k-th (k = n // SAMPLE),
#: so that a large output costs a bounded time; the counts are of the elements examined.
SAMPLE = 1 << 16
_COUNTS = ("elements", "correctly_rounded", "off_toward_zero", "off_away", "determined", "deviations", "toward_zero",
           "away", "up", "down")


def element_statistics(actual: np.ndarray, expected: np.ndarray, bound: np.ndarray, dtype: str) -> dict[str, Any]:
    """Counts of the kernel's values against the correctly rounded oracle values c = RN(e) in ``dtype``.

    actual, expected, bound : float64 arrays of one shape (the kernel's values, the oracle's, the bound).
    Returns {} for float64 outputs (the oracle is not a correctly rounded reference there); else, over
    the elements examined (all of them, or evenly spaced ones of a large output: SAMPLE), elements
    (finite, nonzero e and c), correctly_rounded (actual == c), determined (distance of e to the
    nearest midpoint > bound - u_f |e| + the oracle's margin, and |actual - e| within the bound),
    off_toward_zero / off_away (elements that are not correctly rounded, by direction: reported, not
    tested, since a correct kernel's errors before its final rounding are correlated across elements),
    and on determined elements: deviations
    (actual != c), toward_zero / away (|actual| < / > |c|), up / down (actual > / < c), sum_ulp (signed
    ULP distance, positive away from zero) and sum_sq_ulp.
    """
    if dtype == "float64":
        return {}
    fi = dtypes.finfo(dtype)
    p = int(fi.nmant) + 1
    emin = int(fi.minexp)
    step = max(1, int(np.size(expected)) // SAMPLE)  # evenly spaced elements, at most about 2 SAMPLE
    e = np.asarray(expected, dtype=np.float64).ravel()[::step]
    a = np.asarray(actual, dtype=np.float64).ravel()[::step]
    b = np.broadcast_to(np.asarray(bound, dtype=np.float64), np.shape(expected)).ravel()[::step]
    with np.errstate(all="ignore"):
        c = dtypes.round_to(e, dtype).astype(np.float64)
        ok = np.isfinite(a) & np.isfinite(e) & np.isfinite(b) & np.isfinite(c) & (e != 0) & (c != 0)
        if not ok.all():
            e, a, b, c = e[ok], a[ok], b[ok], c[ok]
        ae, ac = np.abs(e), np.abs(c)
        m, ex = np.frexp(ac)  # |c| = m 2^ex, m in [0.5, 1): floor(log2 |c|) = ex - 1
        k = np.maximum(ex - 1, emin)  # below the normal range the spacing stays that of the smallest binade
        up = np.ldexp(1.0, k - (p - 1))
        down = np.where((m == 0.5) & (ex - 1 > emin), up / 2, up)  # at a power of two the spacing below halves
        dist = np.minimum(ae - (ac - down / 2), (ac + up / 2) - ae)
        pre = np.maximum(b - dtypes.unit_roundoff(dtype) * ae, 0.0) + ORACLE_MARGIN * ae
        # an element beyond its bound is the comparison's finding, and its sign tells of that error, not of the
        # rounding: the test counts the elements the bound passes
        det = (dist > pre) & (np.abs(a - e) <= b)
    ad, cd = a[det], c[det]
    dev = ad != cd
    away = np.abs(ad) > np.abs(cd)
    tz = dev & ~away
    signed = dtypes.ulp_distance(ad[dev], cd[dev], dtype).astype(np.float64) * np.where(away[dev], 1.0, -1.0)
    off = a != c
    return {"elements": int(e.size), "correctly_rounded": int(np.count_nonzero(~off)),
            "off_toward_zero": int(np.count_nonzero(off & (np.abs(a) < ac))),
            "off_away": int(np.count_nonzero(off & (np.abs(a) > ac))),
            "determined": int(ad.size), "deviations": int(np.count_nonzero(dev)),
            "toward_zero": int(np.count_nonzero(tz)), "away": int(np.count_nonzero(dev & away)),
            "up": int(np.count_nonzero(dev & (ad > cd))), "down": int(np.count_nonzero(dev & (ad < cd))),
            "sum_ulp": float(signed.sum()), "sum_sq_ulp": float((signed * signed).sum())}


def binomial_tail(k: int, n: int) -> float:
    """P(X >= k) for X ~ Binomial(n, 1/2): exact (a sum in log space) for n <= EXACT_LIMIT, else
    Hoeffding's bound exp(-2 n (k/n - 1/2)^2) for k > n/2 (Hoeffding 1963, Theorem 1) and 1 otherwise."""
    if k <= 0:
        return 1.0
    if k > n:
        return 0.0
    if n > EXACT_LIMIT:
        t = k / n - 0.5
        return 1.0 if t <= 0 else math.exp(-2.0 * n * t * t)
    ln2 = n * math.log(2.0)
    logs = [math.lgamma(n + 1) - math.lgamma(j + 1) - math.lgamma(n - j + 1) - ln2 for j in range(k, n + 1)]
    top = max(logs)
    return min(1.0, math.exp(top) * math.fsum(math.exp(v - top) for v in logs))


def run_outputs(cases: Iterable[dict[str, Any]], field: str):
    """(key, case, output, statistics) for every compared output of a run holding per-case statistics
    ``field`` ("rounding", "effective"); key = (op, dtype, output name)."""
    for c in cases:
        if c.get("status") in ("skipped", "crashed", "timed_out", "error"):
            continue
        for o in c.get("outputs", []):
            st = o.get(field) or {}
            if st:
                yield (c["case"]["op"], c["case"]["dtype"], output_of(o["name"])), c, o, st


def _rows(cases: Iterable[dict[str, Any]]) -> dict[tuple[str, str, str], dict[str, Any]]:
    rows: dict[tuple[str, str, str], dict[str, Any]] = {}
    for key, c, o, st in run_outputs(cases, "rounding"):
        r = rows.setdefault(key, {**{k: 0 for k in _COUNTS}, "sum_ulp": 0.0, "sum_sq_ulp": 0.0, "cases": 0,
                                  "format": o.get("dtype", "")})
        r["cases"] += 1
        for k in (*_COUNTS, "sum_ulp", "sum_sq_ulp"):
            r[k] += st.get(k, 0)
    return rows


def _finite(x: float) -> float:
    """x, or float64's largest magnitude of its sign where a document's sums overflowed (JSON has no inf)."""
    x = float(x)
    return x if math.isfinite(x) else (0.0 if math.isnan(x) else math.copysign(sys.float_info.max, x))


def run_bias(cases: Iterable[dict[str, Any]], alpha: float = ALPHA) -> list[dict[str, Any]]:
    """Per (op, dtype, output) of a run (cases as results-document dicts): the summed counts, the mean
    signed ULP error on determined elements (positive away from zero), each direction's p-value, the
    per-test level alpha / m (m = 4 x the outputs with determined elements) and the verdict:
    ``flagged`` (a direction's p-value <= the level: directed rounding suspected), ``no evidence`` or
    ``not tested`` (no determined element)."""
    rows = _rows(cases)
    m = 4 * sum(1 for r in rows.values() if r["determined"])
    level = alpha / m if m else alpha
    out = []
    for (op, dt, name), r in sorted(rows.items()):
        d = r["deviations"]
        pv = {label: binomial_tail(r[k], d) for label, k, _ in DIRECTIONS}
        worst = min(pv, key=pv.get)
        if not r["determined"]:
            verdict = "not tested"
        elif pv[worst] <= level:
            verdict = "flagged"
        else:
            verdict = "no evidence"
        out.append({"op": op, "dtype": dt, "output": name, "format": r["format"], "cases": r["cases"],
                    **{k: r[k] for k in _COUNTS},
                    "mean_ulp": _finite(r["sum_ulp"] / r["determined"]) if r["determined"] else 0.0,
                    "p_values": pv, "direction": worst if verdict == "flagged" else "", "level": level,
                    "alpha": alpha, "tests": m, "verdict": verdict,
                    # no rounding declaration exists (kernel.Precision): every kernel declares round to nearest
                    "failure": verdict == "flagged"})
    return out


def flagged(doc_or_rows: Any) -> list[dict[str, Any]]:
    """The rows of a run whose bias test is a failure (from a results document or run_bias's rows)."""
    rows = doc_or_rows.get("rounding_bias", []) if isinstance(doc_or_rows, dict) else doc_or_rows
    return [r for r in rows if r.get("failure")]


def describe(r: dict[str, Any]) -> str:
    """One line: 'layer_norm bfloat16 y: directed rounding suspected (toward zero), p <= 1e-300 ...'."""
    head = f"{r['op']} {r['dtype']} {r['output']}"
    dev = (f"{r['deviations']} of {r['determined']} determined elements off the correctly rounded value "
           f"({r['toward_zero']} toward zero, {r['away']} away; {r['up']} up, {r['down']} down), mean "
           f"{r['mean_ulp']:+.3g} ULP")
    if r["verdict"] == "flagged":
        p = r["p_values"].get(r["direction"], 1.0)
        return (f"{head}: directed rounding suspected ({r['direction']}), p = {p:.3g} <= {r['level']:.3g} "
                f"(alpha {r['alpha']:g} over {r['tests']} tests, Bonferroni); {dev}; round to nearest is declared")
    off = r["off_toward_zero"] + r["off_away"]
    note = (f"; of all {r['elements']} elements {off} are not correctly rounded, {r['off_toward_zero']} of them "
            "toward zero (not a test: a correct kernel's errors are correlated)") if off else ""
    if r["verdict"] == "not tested":
        return (f"{head}: rounding bias not tested: no element's correctly rounded value is determined by the "
                f"bound{note}")
    return f"{head}: no evidence of directed rounding; {dev}{note}"


def bias_lines(doc: dict[str, Any]) -> list[str]:
    """Terminal and CI lines: every flagged output, then a count of those with no evidence."""
    rows = doc.get("rounding_bias") or []
    out = [describe(r) for r in rows if r["verdict"] == "flagged"]
    blind = [r for r in rows if r["verdict"] == "not tested"]
    if blind:
        out.append(f"rounding bias not tested on {len(blind)} output(s) ({', '.join(r['output'] for r in blind[:6])}"
                   f"{', ...' if len(blind) > 6 else ''}): no value's correct rounding is determined by the bound "
                   "(the declared arithmetic errs by more than half an ULP before the final rounding)")
    calm = [r for r in rows if r["verdict"] == "no evidence"]
    if calm:
        out.append(f"rounding bias: no evidence of directed rounding in {len(calm)} output(s) "
                   f"(sign test on {sum(r['determined'] for r in calm)} determined elements; alpha {ALPHA:g} per run)")
    return out
