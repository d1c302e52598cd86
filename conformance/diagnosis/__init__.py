"""Diagnosis: for each failing output, the explanation under which the kernel's error falls back within
its bound (or comes closest), with the evidence, and where the error lives.

    hypotheses.py   what is tried: other conventions and precisions, models of common bug classes
    model.py        a normalization on the op's view with the steps a bug may change as arguments
    rank.py         the budget used under each hypothesis; the best named first only if it explains
    locate.py       which elements, rows, channels, positions; condition number and length
    lines.py        the diagnosis in the terminal summary, the report and case messages

conformance.run.execute calls :func:`attach` once a case has failed, inside a guard: a diagnosis
never changes a status or a budget; it adds a ``diagnosis`` record to each failing output and a
line to the case's message (which the pytest plugin and the JUnit file show).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from .hypotheses import HYPOTHESES, Evidence, Hypothesis
from .lines import diagnosis_lines, output_diagnoses
from .locate import condition_number
from .rank import TIME_LIMIT_S, diagnose

__all__ = ["attach", "diagnose", "diagnosis_lines", "output_diagnoses", "HYPOTHESES", "Hypothesis", "Evidence"]


_QUANTIZED_OUTPUTS = ("y_q", "scale")
_QUANTIZED = ("quantized outputs are judged level by level and not re-evaluated under the alternative "
              "conventions and bug models (not implemented for them); the level counts show where they differ")


def attach(res: Any, *, kernel, case, prec, conv, inp, inp64, raw, expected, bounds, results, overrides=None,
           time_left_s: float | None = None) -> None:
    """Add a diagnosis to every failed output of ``res`` (a CaseResult) that was compared element by element.

    ``time_left_s``: what the case may still take (its timeout's share); the diagnosis takes at most that
    and rank.TIME_LIMIT_S. Never raises: a diagnosis that fails records why, in ``diagnosis.error``."""
    from ..arrays import as_numpy
    from ..results import cap_text
    from ..tolerances import output_dtype

    failed = {r.name: r for r in results if not r.passed and r.name in expected and r.max_ulp >= 0}
    for o in res.outputs:  # failed, but outside what the hypotheses model: said, not left blank
        if not o["passed"] and o["name"] not in failed:
            o["diagnosis"] = {"text": f"no diagnosis of {o['name']}: " + (
                _QUANTIZED if o["name"] in _QUANTIZED_OUTPUTS else "not compared element by element")}
    # Under a fixed tolerance (--tolerance, a profile's tolerances) a failure may be the tolerance's, not
    # the kernel's: the explanations are ranked by budgets of derived bounds, so those outputs are left
    # undiagnosed, and say so.
    fixed = {n for n in failed if getattr(bounds.get(n), "kind", "derived") != "derived"}
    failed = {n: r for n, r in failed.items() if n not in fixed}
    if fixed:
        for o in res.outputs:
            if o["name"] in fixed:
                o["diagnosis"] = {"text": f"no diagnosis of {o['name']}: judged under a fixed tolerance, not a "
                                          "derived bound (the explanations are ranked by derived bounds)"}
    if not failed:
        return
    try:
        arrays = {n: as_numpy(raw[n]) for n in failed}
        ev = Evidence(kernel=kernel, case=case, prec=prec, conv=conv, inp=inp, inp64=inp64, raw=arrays,
                      expected=expected, bounds=bounds, overrides=overrides)
        spec = ev.spec
        kappa = condition_number(case, spec, inp64["x"])
        limit = TIME_LIMIT_S if time_left_s is None else max(0.0, min(TIME_LIMIT_S, time_left_s))
        found = diagnose(ev, failed, lambda n: output_dtype(n, prec), limit_s=limit)
        for d in found.values():
            d["condition"] = kappa if math.isfinite(kappa) else ("inf" if kappa > 0 else "nan")
            d["length"] = int(case.group_length)
    except Exception as e:  # the verdict stands; the diagnosis says why it is missing
        found = {n: {"error": f"{type(e).__name__}: {e}", "text": f"no diagnosis of {n}: {type(e).__name__}: {e}"}
                 for n in failed}
    for o in res.outputs:
        if o["name"] in found:
            o["diagnosis"] = _jsonable(found[o["name"]])
    lines = [f"diagnosis: {d['text']}" for d in found.values()]
    res.message = cap_text((res.message + "\n" if res.message else "") + "\n".join(lines))


def _jsonable(d: Any) -> Any:
    from ..results import _jsonable as j

    return j(d)
