"""The report's run-level numerics (issue 11): the rounding-bias test and the effective precision per
output, as plain tables (title, note, header, rows of text) that the Markdown and HTML writers render."""

from __future__ import annotations

from typing import Any

from ..rounding_bias import ALPHA

__all__ = ["numerics_tables"]


def _p(v: Any) -> str:
    return f"{float(v):.3g}"


def _bias(doc: dict[str, Any]) -> tuple[str, str, tuple[str, ...], list[tuple[str, ...]]] | None:
    rows = doc.get("rounding_bias") or []
    if not rows:
        return None
    head = ("dtype", "output", "finding", "determined elements", "off the correctly rounded value",
            "toward zero / away", "up / down", "mean signed ULP", "smallest p-value", "level")
    body = []
    for r in rows:
        finding = {"flagged": f"directed rounding suspected ({r['direction']})"
                   + (": FAILS, round to nearest declared" if r["failure"] else ""),
                   "no evidence": "no evidence", "not tested": "not tested (nothing determined)"}[r["verdict"]]
        pmin = min(r["p_values"].values()) if r["p_values"] else 1.0
        body.append((r["dtype"], r["output"], finding, str(r["determined"]), str(r["deviations"]),
                     f"{r['toward_zero']} / {r['away']}", f"{r['up']} / {r['down']}", f"{r['mean_ulp']:+.3g}",
                     _p(pmin), _p(r["level"])))
    note = (f"Sign test of the deviations from the correctly rounded value on the elements where the bound "
            f"determines it (docs/tolerances.md, Rounding bias): a kernel that rounds to nearest is flagged in at "
            f"most one run in {1 / ALPHA:.0e} (alpha {ALPHA:g}, Bonferroni over the run's tests). Outputs with "
            "nothing determined (float32 results of float32 arithmetic, mostly) are not tested: there a "
            "directed rounding stays within the bound and this test cannot see it.")
    return "Rounding bias", note, head, body


def _precision(doc: dict[str, Any]) -> tuple[str, str, tuple[str, ...], list[tuple[str, ...]]] | None:
    rows = doc.get("effective_precision") or []
    if not rows:
        return None
    head = ("dtype", "output", "declared bits", "effective bits", "correctly rounded", "worst case")
    body = [(r["dtype"], r["output"], f"{r['declared_bits']:.3g}",
             "not resolved" if r["effective_bits"] is None else f"{r['effective_bits']:.3g}",
             "—" if r["correctly_rounded"] is None else f"{100 * r['correctly_rounded']:.4g}%", r.get("case") or "")
            for r in rows]
    note = ("The significand an arithmetic would need to err as the kernel does, its worst error fitted to the "
            "bound's model at the model's one-sigma scale (docs/tolerances.md, Effective precision): an estimate "
            "that reads as the target's real numerics (within about 2 bits on sums of known precision), never "
            "part of the verdict. \"Not resolved\": no element errs beyond its final rounding.")
    return "Effective precision", note, head, body


def numerics_tables(doc: dict[str, Any]) -> list[tuple[str, str, tuple[str, ...], list[tuple[str, ...]]]]:
    """[(title, note, header, rows)] for the rounding-bias test and the effective precision (those present)."""
    return [t for t in (_bias(doc), _precision(doc)) if t]
