"""Where a failing output's error lives: which elements, positions, rows or channels; and, over a run,
how the budget used follows the data's condition number and the reduction length.

Per output: the mismatched elements grouped by statistic (rows of layer/RMS norm, channels of batch
norm, (sample, group) pairs of group norm), whether they sit in the last positions of the reduction's
last axis (a dropped remainder) and where the worst one is. Per case: the condition number
kappa = max over statistics of sqrt(mean^2 + var) / sqrt(var) (the relative condition of the
variance, Chan, Golub & LeVeque 1983, §2: from memory) and the reduction length n, so that a report
can correlate budgets with them across cases.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..ops.axes import statistic_index

__all__ = ["where_text", "condition_number", "rank_correlation", "correlation_text"]


def _mismatch(act: np.ndarray, exp: np.ndarray, bound: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore"):
        a, e = act.astype(np.float64), exp.astype(np.float64)
        cls = np.isnan(a) != np.isnan(e)
        cls |= ~cls & (np.isinf(a) | np.isinf(e)) & (a != e)
        both = np.isfinite(a) & np.isfinite(e)
        return cls | (both & (np.abs(a - e) > np.broadcast_to(bound, e.shape)))


def _indices(ix: np.ndarray, shown: int = 4) -> str:
    ix = [int(i) for i in ix]
    return ", ".join(map(str, ix[:shown])) + (f", ... ({len(ix)} in all)" if len(ix) > shown else "")


def where_text(case: Any, spec: Any, name: str, act: np.ndarray, exp: np.ndarray, bound: np.ndarray) -> str:
    """One sentence: how many elements fail, in which statistic groups, and at which reduction positions."""
    bad = _mismatch(np.asarray(act), np.asarray(exp), np.asarray(bound, np.float64))
    k, n = int(bad.sum()), bad.size
    if not k:
        return f"{name}: no element outside its bound"
    parts = [f"{k} of {n} elements of {name} outside their bounds"]
    act64 = np.asarray(act).astype(np.float64)
    nan = int(np.count_nonzero(bad & np.isnan(act64)))
    if nan:
        parts.append(f"{nan} of them NaN where the oracle's value is not")
    grp = spec.axes.view(case)
    kind = "rows" if spec.axes.layouts == ("trailing",) else ("channels" if grp.red == (0, 2) else "(sample, group) pairs")
    if bad.shape == tuple(case.shape):
        idx = statistic_index(grp, case.shape)
        groups = np.unique(idx[bad])
        total = int(idx.max()) + 1
        parts.append(f"in {len(groups)} of {total} {kind}" + ("" if len(groups) == total
                                                             else f" ({_indices(groups)})"))
        v = bad.reshape(grp.view_shape)
        last = v.ndim - 1
        if last in grp.red and v.shape[last] > 1:
            pos = np.nonzero(np.any(v, axis=tuple(i for i in range(v.ndim) if i != last)))[0]
            L = v.shape[last]
            if pos.size and pos.min() > 0 and pos.max() == L - 1 and pos.size == L - pos.min():
                parts.append(f"confined to the last {L - int(pos.min())} of {L} positions of the reduction's "
                             "last axis (a dropped remainder?)")
            elif pos.size < L:
                parts.append(f"at {pos.size} of {L} positions along the reduction's last axis")
            else:
                parts.append("spread over every position of the reduction")
    else:
        flat = np.flatnonzero(bad.ravel())
        parts.append(f"at flat indices {_indices(flat)}")
    return "; ".join(parts)


def condition_number(case: Any, spec: Any, x64: np.ndarray) -> float:
    """max over statistics of sqrt(mean^2 + var) / sqrt(var) (1 for RMS norm; inf for a zero variance)."""
    grp = spec.axes.view(case)
    xv = np.asarray(x64, np.float64).reshape(grp.view_shape)
    with np.errstate(all="ignore"):
        fin = np.where(np.isfinite(xv), xv, np.nan)
        m = np.nanmean(fin, axis=grp.red)
        v = np.nanvar(fin, axis=grp.red)
        if not spec.centered:
            return 1.0
        k = np.sqrt(m * m + v) / np.sqrt(v)
    k = k[~np.isnan(k)]
    return float(k.max()) if k.size else float("nan")


def rank_correlation(a: list[float], b: list[float]) -> float:
    """Spearman's rank correlation (ties ranked by order; NaN for fewer than 3 pairs or a constant side)."""
    pairs = [(x, y) for x, y in zip(a, b) if math.isfinite(x) and math.isfinite(y)]
    if len(pairs) < 3:
        return float("nan")
    ra = np.argsort(np.argsort([p[0] for p in pairs])).astype(float)
    rb = np.argsort(np.argsort([p[1] for p in pairs])).astype(float)
    if ra.std() == 0 or rb.std() == 0 or len({p[0] for p in pairs}) < 2 or len({p[1] for p in pairs}) < 2:
        return float("nan")
    return float(np.corrcoef(ra, rb)[0, 1])


def correlation_text(items: list[dict[str, Any]]) -> str:
    """How the budgets of one output's failures follow kappa and n: items are diagnosis records."""
    bud = [float(d.get("budget_before", "nan")) for d in items]
    parts = []
    for key, what in (("condition", "the condition number"), ("length", "the reduction length")):
        r = rank_correlation(bud, [float(d.get(key, "nan")) for d in items])
        if math.isfinite(r):
            parts.append(f"rank correlation of the budget with {what} {r:+.2f}")
    return f"over {len(items)} failing cases: " + "; ".join(parts) if parts else ""
