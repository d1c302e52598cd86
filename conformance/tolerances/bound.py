"""The Bound record: an elementwise allowed error with the formula and numbers behind it."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["Bound", "Accept", "override_bound", "json_number"]


def json_number(v: Any) -> Any:
    """A float for JSON: finite values as they are, inf/-inf/nan as the strings "inf", "-inf", "nan"."""
    if isinstance(v, (bool, str)) or v is None:
        return v
    f = float(v)
    if math.isfinite(f):
        return f
    return "nan" if math.isnan(f) else ("inf" if f > 0 else "-inf")


MEDIAN_SAMPLE = 1 << 16


def _sample(a: np.ndarray) -> np.ndarray:
    step = max(1, a.size // MEDIAN_SAMPLE)
    return a.ravel()[::step]


@dataclass(frozen=True)
class Accept:
    """Elements where a correct kernel's value may differ from the oracle's by more than the bound.

    mask : bool, broadcastable to the output's shape: where the alternative applies.
    value : float64, broadcastable: the accepted value there (NaN accepts a NaN, +-inf that
        infinity); None accepts any non-finite value.
    must : the oracle's own value cannot be the answer there (it lies outside the output format's
        range): only ``value`` is right, and any other value is a mismatch.
    reason : what makes the alternative correct, in words (counted per reason in the results).
    """

    mask: np.ndarray
    value: np.ndarray | None
    reason: str
    must: bool = False


@dataclass(frozen=True)
class Bound:
    """Allowed |kernel - oracle| for one output, elementwise.

    output : the output's name (y, mean, rstd, ..., dx, dweight, dbias).
    values : float64 >= 0, broadcastable to the output's shape.
    formula : the bound in symbols (docs/tolerances.md defines them).
    terms : the numbers in the formula at the worst-conditioned statistic.
    kind : "derived" (from the rounding-error model) or "override" (a fixed atol + rtol |expected|).
    accept : elements where another value than the oracle's is a correct kernel's (Accept), judged
        by the comparison before the bound (docs/tolerances.md, "Accepted differences").
    """

    output: str
    values: np.ndarray
    formula: str
    terms: dict[str, float] = field(default_factory=dict)
    kind: str = "derived"
    accept: tuple[Accept, ...] = ()

    def summary(self) -> dict[str, Any]:
        """JSON-ready description: output, kind, formula, terms, max and median of the values.

        The median is that of at most MEDIAN_SAMPLE evenly spaced values (all of them when fewer):
        a description for reports, not a quantity any verdict uses.
        """
        vals = np.asarray(self.values, dtype=np.float64)
        fin = vals[np.isfinite(vals)]
        return {
            "output": self.output,
            "kind": self.kind,
            "formula": self.formula,
            "terms": {k: json_number(v) for k, v in self.terms.items()},
            "max": json_number(fin.max()) if fin.size else None,
            "median": json_number(np.median(_sample(fin))) if fin.size else None,
        }


def override_bound(output: str, expected: np.ndarray, atol: float, rtol: float) -> Bound:
    """The familiar fixed form atol + rtol |expected| (numpy.testing.assert_allclose's), kind="override".

    It replaces the derived bound where a reviewer decides to; reports mark it as such.
    """
    for name, val in (("atol", atol), ("rtol", rtol)):
        if isinstance(val, bool) or not isinstance(val, (int, float, np.floating, np.integer)) \
                or not math.isfinite(float(val)) or float(val) < 0:
            raise ValueError(f"{name} is {val!r}, expected a finite number >= 0")
    e = np.abs(np.asarray(expected, dtype=np.float64))
    with np.errstate(invalid="ignore"):
        vals = float(atol) + float(rtol) * np.where(np.isfinite(e), e, 0.0)
    return Bound(output=output, values=vals, formula="atol + rtol |expected|",
                 terms={"atol": float(atol), "rtol": float(rtol)}, kind="override")
