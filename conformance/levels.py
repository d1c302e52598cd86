"""Quantization levels over a results document: per dtype and quantized output, how many elements
landed on another level than the oracle's correctly rounded one, and by how many levels.

Reads only the document (the ``levels`` record of each quantized output, conformance.quantized), so
the terminal summary and the report say the same thing.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from .text import visible

__all__ = ["LevelRow", "level_rows", "level_lines", "hist_text"]


@dataclass
class LevelRow:
    dtype: str
    output: str
    format: str
    scale: str
    cases: int = 0
    compared: int = 0
    off_level: int = 0
    max_levels: int = 0
    hist: dict[str, int] = field(default_factory=dict)
    worst_case: str = ""


def _key(b: str) -> tuple[int, int]:
    """Bins in order -big .. -1, 0, +1 .. +big."""
    if b == "0":
        return (0, 0)
    lo = int(b[1:].split("-")[0])
    return (-1, -lo) if b[0] == "-" else (1, lo)


def hist_text(hist: dict[str, int]) -> str:
    """'+1: 2, -1: 3' (the bins off the oracle's level, in order); 'none' when every level matches."""
    off = sorted((b for b in hist if b != "0"), key=_key)
    return ", ".join(f"{b}: {hist[b]}" for b in off) or "none"


def level_rows(doc: dict[str, Any]) -> list[LevelRow]:
    """One row per (dtype, output) with a ``levels`` record, in the document's order."""
    rows: dict[tuple[str, str], LevelRow] = {}
    for c in doc.get("cases", []):
        for o in c.get("outputs", []):
            lv = o.get("levels")
            if not lv:
                continue
            dt = str((c.get("case") or {}).get("dtype", ""))
            r = rows.setdefault((dt, o["name"]), LevelRow(dt, o["name"], str(lv.get("format", "")),
                                                          str(lv.get("scale", ""))))
            r.cases += 1
            r.compared += int(lv.get("compared", 0))
            r.off_level += int(lv.get("off_level", 0))
            m = int(lv.get("max_levels", 0))
            if not r.worst_case or m > r.max_levels:
                r.max_levels, r.worst_case = m, c["id"]
            for b, k in (lv.get("hist") or {}).items():
                r.hist[b] = r.hist.get(b, 0) + int(k)
    return list(rows.values())


def level_lines(doc: dict[str, Any]) -> list[str]:
    """Terminal lines: 'levels: float32 y_q (float8_e4m3fn, scale=row): 5 of 2106368 element(s) on another
    level than the oracle's correctly rounded one (-1: 3, +1: 2), at most 1 level, over 7 case(s)'."""
    # names come from the kernel or a file: control characters are shown, not sent to the terminal
    return [f"levels: {visible(r.dtype)} {visible(r.output)} ({visible(r.format)}, scale={visible(r.scale)}): "
            f"{r.off_level} of {r.compared} element(s) on another level than the oracle's correctly rounded one "
            f"({visible(hist_text(r.hist))}), at most "
            f"{r.max_levels} level(s), over {r.cases} case(s)" for r in level_rows(doc)]
