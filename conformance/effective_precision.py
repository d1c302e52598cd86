"""The precision a kernel behaves like: its errors fitted to the error model of docs/tolerances.md.

Every derived bound ends with the output's final rounding (tolerances/bounds.py, _final):
B = pre (1 + u_f) + u_f |e| + eta_f, where ``pre`` bounds the error of the value before that rounding and
is, to first order, proportional to the unit roundoff u_a of the output's arithmetic
(Precision.accumulate_for: the sums' gamma_n, the statistics' roundings). Per element the part of the
error beyond the final rounding, err - u_f |e| (clipped at 0), against B - u_f |e| is the fraction r
of the arithmetic's allowance used: a kernel whose arithmetic had unit roundoff u_a r would just meet
the model's bound there. The probabilistic summation model's bound is lam times its one-sigma scale
(Higham & Mary 2019, Thm 2.4, theorem number from memory: the error is lam sqrt(n) u sum|t| with probability Q(lam, n)), so an
arithmetic of unit roundoff u_a r lam errs at that scale. Per case the worker keeps r's maximum and the
scale (lam for the probabilistic model, 1 for the deterministic ones); a run takes the maximum over
cases of u_eff = u_a r scale and reports p_eff = -log2(u_eff) bits beside the declared p = -log2(u_a).

Reading it: p_eff estimates the significand of an arithmetic whose worst error on the run's data
is that of the kernel, at the model's one-sigma scale; it is an estimate, not a bound: a correct
kernel may show p_eff below its true p by up to log2(lam) = 3 bits (errors reaching the full bound),
and above it where the data's partial sums cancel (zero-mean terms). Measured on recursive sums of
known precision (tests/test_effective_precision.py): within 2 bits. Where no element errs beyond its
final rounding, p_eff is not resolved (None). The fraction of elements equal to the correctly rounded oracle value
(rounding_bias.element_statistics) is reported beside it: 100% for a correctly rounded output.
"""

from __future__ import annotations

import math
from typing import Any, Iterable

import numpy as np

from . import blockwise, dtypes
from .rounding_bias import run_outputs

__all__ = ["case_statistics", "run_precision", "precision_lines", "describe"]


def case_statistics(err: np.ndarray, expected: np.ndarray, bound: np.ndarray, dtype: str,
                    u_acc: float | None, scale: float = 1.0) -> dict[str, Any]:
    """{u_acc, ratio (max r over elements), scale, beyond (elements with err > u_f |e|)} for one output,
    or {} without u_acc. err = |actual - expected|, all float64 of one shape; non-finite elements are
    left out. ``scale``: the bound's multiple of its model's one-sigma error (lam, or 1)."""
    if not u_acc or not (u_acc > 0):
        return {}
    e = np.asarray(expected, dtype=np.float64)
    u_f = dtypes.unit_roundoff(dtype)

    def formula(out, e, b, er):
        ue = np.asarray(u_f * np.abs(e))  # an array (0-d for a per-tensor scale): written into below
        room = b - ue
        over = np.subtract(er, ue, out=ue)
        if np.isfinite(room).all() and np.isfinite(over).all():  # e, b and err finite: no masks to build
            beyond = over > 0
            use = beyond & (room > 0)
            r = np.divide(over, room, out=np.zeros_like(over), where=use)
        else:
            fin = np.isfinite(e) & np.isfinite(b) & np.isfinite(er)
            beyond = fin & (over > 0)
            use = fin & (room > 0)
            r = np.where(use & (over > 0), over / np.where(use, room, 1.0), 0.0)
        return None, (float(r.max()) if r.size else 0.0, int(np.count_nonzero(beyond)))

    # Elementwise, then a maximum and a count: the same numbers whatever the blocks (blockwise.py).
    with np.errstate(all="ignore"):
        _, parts = blockwise.evaluate(e.shape, formula, e=e, b=np.asarray(bound, dtype=np.float64),
                                      er=np.asarray(err, dtype=np.float64))
    return {"u_acc": float(u_acc), "ratio": max((q for q, _ in parts), default=0.0),
            "scale": float(scale), "beyond": sum(k for _, k in parts)}


def _bits(u: float) -> float:
    return -math.log2(u)


def run_precision(cases: Iterable[dict[str, Any]]) -> list[dict[str, Any]]:
    """Per (op, dtype, output) of a run: the declared arithmetic's significand bits, the effective ones
    (None when no error is resolved beyond the final rounding) and the case that sets them, and the
    fraction of elements correctly rounded (None for float64 outputs)."""
    rows: dict[tuple[str, str, str], dict[str, Any]] = {}
    for key, c, o, st in run_outputs(cases, "effective"):
        r = rows.setdefault(key, {"cases": 0, "u_acc": 0.0, "bits": None, "case_id": None, "beyond": 0,
                                  "elements": 0, "correctly_rounded": 0, "rounded": False,
                                  "format": o.get("dtype", "")})
        r["cases"] += 1
        ua, ratio, scale = (float(st.get(k, d)) for k, d in (("u_acc", 0.0), ("ratio", 0.0), ("scale", 1.0)))
        r["u_acc"] = max(r["u_acc"], ua)
        if ua > 0 and ratio > 0 and scale > 0:
            # in log2: the factors of a document read from a file may overflow as a product
            be = -(math.log2(ua) + math.log2(ratio) + math.log2(scale))
            if r["bits"] is None or be < r["bits"]:
                r["bits"], r["case_id"] = be, c["id"]
        r["beyond"] += int(st.get("beyond", 0))
        rs = o.get("rounding") or {}
        if rs:
            r["rounded"] = True
            r["elements"] += rs.get("elements", 0)
            r["correctly_rounded"] += rs.get("correctly_rounded", 0)
    out = []
    for (op, dt, name), r in sorted(rows.items()):
        if not r["u_acc"] > 0:
            continue
        eff = r["bits"]
        out.append({"op": op, "dtype": dt, "output": name, "format": r["format"], "cases": r["cases"],
                    "declared_bits": _bits(r["u_acc"]), "effective_bits": eff, "case": r["case_id"],
                    "beyond_rounding": r["beyond"],
                    "correctly_rounded": (r["correctly_rounded"] / r["elements"]) if r["rounded"] and r["elements"]
                    else None})
    return out


def describe(r: dict[str, Any], case: bool = True) -> str:
    """'layer_norm bfloat16 dbias: behaves like arithmetic with 7.3-bit significands ... (declared 24 ...)'
    (with the case that sets it when ``case``)."""
    head = f"{r['op']} {r['dtype']} {r['output']}"
    if r["effective_bits"] is None:
        txt = (f"{head}: no error beyond the final rounding to {r['format']}: the arithmetic's precision is not "
               f"resolved (declared {r['declared_bits']:.3g} bits)")
    else:
        txt = (f"{head}: behaves like arithmetic with {r['effective_bits']:.3g}-bit significands under the "
               f"model (declared {r['declared_bits']:.3g}" + (f"; worst case {r['case']})" if case else ")"))
    if r["correctly_rounded"] is not None:
        txt += f"; correctly rounded in {100 * r['correctly_rounded']:.4g}% of elements"
    return txt


def precision_lines(doc: dict[str, Any], below_only: bool = False) -> list[str]:
    """Lines for the terminal and CI: every output (or only those whose effective precision is below the
    declared one, ``below_only``)."""
    rows = doc.get("effective_precision") or []
    if below_only:
        rows = [r for r in rows if r["effective_bits"] is not None and r["effective_bits"] < r["declared_bits"]]
    return [describe(r, case=False) for r in rows]
