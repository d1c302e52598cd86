"""Results of a run: per-case records, the summary table, the verdict and the versioned JSON form.

The JSON layout is described by docs/results-schema.json (JSON Schema); its
version is SCHEMA_VERSION and changes whenever a field changes meaning.
"""

from __future__ import annotations

import json
import math
import os
import platform
import sys
from dataclasses import asdict, dataclass, field, is_dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable

SCHEMA = "refnorm.results"
SCHEMA_VERSION = 1
STATUSES = ("passed", "inconclusive", "failed", "crashed", "timed_out", "error", "skipped")
BAD = ("failed", "crashed", "timed_out", "error")
#: The longest case message kept, in characters; a longer one keeps its start and its end and says how
#: much was cut between them (a kernel's exception text can be megabytes).
MESSAGE_LIMIT = 8000

CAUTION = (
    "Passing is evidence on the cases run, not a proof of correctness: a kernel can be wrong on "
    "shapes, values, dtypes or conventions that no case exercised. The bounds are derived from a stated "
    "rounding-error model (docs/tolerances.md); a kernel that uses another algorithm may need another "
    "model. Sign-off of the kernel's numerics on the target hardware remains the reviewer's responsibility."
)


@dataclass
class CaseResult:
    """One case: its status and, per checked output, the comparison metrics (compare.OutputResult.to_dict())."""

    id: str
    case: dict[str, Any]
    status: str
    message: str = ""
    outputs: list[dict[str, Any]] = field(default_factory=list)
    duration_s: float = 0.0
    kernel_s: float = 0.0
    oracle_s: float = 0.0
    modified_inputs: list[str] = field(default_factory=list)

    def __post_init__(self) -> None:
        if isinstance(self.message, str) and len(self.message) > MESSAGE_LIMIT:
            self.message = cap_text(self.message)

    @property
    def worst_budget(self) -> float:
        vals = [o.get("budget_used", 0.0) for o in self.outputs]
        return max(vals) if vals else 0.0

    def to_dict(self) -> dict[str, Any]:
        # _jsonable copies every container, so the fields need no deep copy first (dataclasses.asdict's
        # deep copy cost more than the comparison of a small case)
        return _jsonable(self)

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> "CaseResult":
        return cls(**{k: d[k] for k in cls.__dataclass_fields__ if k in d})


def cap_text(text: str, limit: int = MESSAGE_LIMIT) -> str:
    """``text`` if it has at most ``limit`` characters; else its start and end around a note of how
    many characters were cut (the result has at most ``limit`` characters)."""
    if len(text) <= limit:
        return text
    keep = max(0, limit - 64)  # room for the note
    head = keep * 3 // 4
    tail = keep - head
    note = f"\n[... {len(text) - keep:,} characters cut ...]\n"
    return text[:head] + note + (text[len(text) - tail:] if tail else "")


def _jsonable(o: Any) -> Any:
    """Make floats JSON-safe: inf/nan become the strings "inf", "-inf", "nan"."""
    if o is None or isinstance(o, (str, bool, int)):
        return o
    if isinstance(o, float):
        if math.isnan(o):
            return "nan"
        if math.isinf(o):
            return "inf" if o > 0 else "-inf"
        return o
    if isinstance(o, dict):
        return {k: _jsonable(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_jsonable(v) for v in o]
    if hasattr(o, "item") and callable(o.item):  # NumPy scalars
        return _jsonable(o.item())
    if is_dataclass(o) and not isinstance(o, type):
        return _jsonable({k: getattr(o, k) for k in o.__dataclass_fields__})
    return o


def as_float(v: Any) -> float:
    """Read back a float written by _jsonable."""
    if isinstance(v, str):
        return float(v)
    return float(v) if v is not None else float("nan")


def output_of(name: str) -> str:
    """The output an output record's name reports: "replica 2: dx" (a multi-replica case compares each
    replica's share, conformance.run.replicas) reports dx; other names are the output itself."""
    head, sep, rest = name.partition(": ")
    return rest if sep and head.startswith("replica ") and head[8:].isdigit() else name


def summarize(cases: Iterable[CaseResult]) -> list[dict[str, Any]]:
    """Rows per (op, dtype, output): cases run, passed, failed, crashed (incl. timeouts and errors),
    the worst fraction of the bound used and its case id. Crashed cases count once per op and dtype
    under output "*". A multi-replica case's records of one output (one per replica) count as one:
    failed when one replica's is, its worst budget the replicas' largest."""
    rows: dict[tuple[str, str, str], dict[str, Any]] = {}

    def row(op: str, dt: str, out: str) -> dict[str, Any]:
        key = (op, dt, out)
        if key not in rows:
            rows[key] = {"op": op, "dtype": dt, "output": out, "cases": 0, "passed": 0, "inconclusive": 0, "failed": 0,
                         "crashed": 0, "worst_budget": 0.0, "worst_case": None,
                         "max_abs": 0.0, "max_rel": 0.0, "max_ulp": 0}
        return rows[key]

    for c in cases:
        op, dt = c.case["op"], c.case["dtype"]
        if c.status == "skipped":
            continue
        if c.status in ("crashed", "timed_out", "error"):
            r = row(op, dt, "*")
            r["cases"] += 1
            r["crashed"] += 1
            r["worst_case"] = r["worst_case"] or c.id
            continue
        per_output: dict[str, list[dict[str, Any]]] = {}
        for o in c.outputs:
            per_output.setdefault(output_of(o["name"]), []).append(o)
        for name, records in per_output.items():
            r = row(op, dt, name)
            r["cases"] += 1
            if not all(o["passed"] for o in records):
                r["failed"] += 1
            elif any(o.get("inconclusive") and not o.get("accepted_inconclusive") for o in records):
                r["inconclusive"] += 1
            else:
                r["passed"] += 1
            for o in records:
                b = as_float(o.get("budget_used", 0.0))
                if b > r["worst_budget"] or r["worst_case"] is None:
                    r["worst_budget"], r["worst_case"] = b, c.id
                r["max_abs"] = max(r["max_abs"], as_float(o.get("max_abs", 0.0)))
                r["max_rel"] = max(r["max_rel"], as_float(o.get("max_rel", 0.0)))
                r["max_ulp"] = max(r["max_ulp"], int(o.get("max_ulp", 0) or 0))
    order = {"y": 0, "h": 0.5, "mean": 1, "rstd": 2, "var": 2, "var_unbiased": 2, "std": 2, "running_mean": 3,
             "running_var": 4, "dx": 5, "dweight": 6, "dbias": 7, "*": 9}
    return [_jsonable(rows[k]) for k in sorted(rows, key=lambda k: (k[0], k[1], order.get(k[2], 8), k[2]))]


def counts(cases: Iterable[CaseResult]) -> dict[str, int]:
    out = {s: 0 for s in STATUSES}
    for c in cases:
        out[c.status] = out.get(c.status, 0) + 1
    return out


def verdict(cases: list[CaseResult], complete: bool) -> str:
    """incomplete, not conformant (a failed case, or a run-level rounding-bias failure:
    conformance.rounding_bias), inconclusive (a pass that is not evidence, not accepted:
    conformance.evidence), no cases run, or conformant."""
    if not complete:
        return "incomplete"
    if any(c.status in BAD for c in cases):
        return "not conformant"
    if numerics_failures(cases):  # a run-level finding: directed rounding where round to nearest is declared
        return "not conformant"
    if any(c.status == "inconclusive" for c in cases):
        return "inconclusive"
    if not any(c.status == "passed" for c in cases):
        return "no cases run"
    return "conformant"


# --- run-level numerics (issue 11: rounding bias, effective precision) ---------------------------------
def _case_dicts(cases: Iterable[CaseResult]) -> list[dict[str, Any]]:
    return [{"id": c.id, "case": c.case, "status": c.status, "outputs": c.outputs} for c in cases]


def numerics(cases: Iterable[CaseResult]) -> dict[str, list[dict[str, Any]]]:
    """The document's run-level sections: rounding_bias (rounding_bias.run_bias) and effective_precision
    (effective_precision.run_precision), per (op, dtype, output)."""
    from .effective_precision import run_precision
    from .rounding_bias import run_bias

    ds = _case_dicts(cases)
    return {"rounding_bias": run_bias(ds), "effective_precision": run_precision(ds)}


def numerics_failures(cases: Iterable[CaseResult]) -> list[dict[str, Any]]:
    """The rounding-bias rows of a run that fail it (directed rounding suspected beyond the stated alpha)."""
    from .rounding_bias import flagged, run_bias

    return flagged(run_bias(_case_dicts(cases)))
# --- end of run-level numerics ---------------------------------------------------------------------------


def accept_inconclusive(cases: list[CaseResult], names: Iterable[str]) -> list[CaseResult]:
    """The cases with the inconclusive outputs named in ``names`` accepted by the user (recorded per
    output as accepted_inconclusive): a case whose every inconclusive output is accepted is passed."""
    names = set(names)
    if not names:
        return cases
    out = []
    for c in cases:
        if c.status == "inconclusive":
            outs = [dict(o) for o in c.outputs]
            for o in outs:
                if o.get("inconclusive") and output_of(o["name"]) in names:
                    o["accepted_inconclusive"] = True
            if all(o.get("accepted_inconclusive") for o in outs if o.get("inconclusive")):
                c = CaseResult(**{**asdict(c), "outputs": outs, "status": "passed"})
            else:
                c = CaseResult(**{**asdict(c), "outputs": outs})
        out.append(c)
    return out


def environment() -> dict[str, Any]:
    """Versions and machine facts a report must record."""
    import numpy

    import refnorm

    env: dict[str, Any] = {
        "refnorm": refnorm.__version__,
        "python": sys.version.split()[0],
        "numpy": numpy.__version__,
        "platform": platform.platform(),
        "machine": platform.machine(),
        "processor": _cpu_name(),
        "cpu_count": os.cpu_count(),
    }
    for mod in ("ml_dtypes", "torch", "tensorflow", "keras", "onnx", "onnxruntime"):
        m = sys.modules.get(mod)
        if m is not None:
            env[mod] = getattr(m, "__version__", "unknown")
    return env


def _cpu_name() -> str:
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def now_iso() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def coverage(cases: list[CaseResult], selected: list[str]) -> dict[str, Any]:
    """How the results cover the selected case ids: the ids with no result, with more than one,
    and results for ids not selected. Exact coverage has all three lists empty."""
    seen: dict[str, int] = {}
    for c in cases:
        seen[c.id] = seen.get(c.id, 0) + 1
    chosen = set(selected)
    return {"selected": len(selected), "missing": [i for i in selected if i not in seen],
            "duplicated": [i for i, n in seen.items() if n > 1], "unexpected": [i for i in seen if i not in chosen]}


def build_document(kernel_decl: dict[str, Any], run: dict[str, Any], cases: list[CaseResult],
                   complete: bool, env: dict[str, Any] | None = None,
                   selected: list[str] | None = None) -> dict[str, Any]:
    """The results document (see docs/results-schema.json).

    With ``selected`` (the case ids the run chose), the document records its ``coverage``, and
    results that do not cover each selected case exactly once make it incomplete: never conformant.
    """
    cases = accept_inconclusive(cases, (run or {}).get("accept_inconclusive") or ())
    cov = coverage(cases, selected) if selected is not None else None
    if cov and (cov["missing"] or cov["duplicated"] or cov["unexpected"]):
        complete = False
    return _jsonable({
        "schema": SCHEMA,
        "schema_version": SCHEMA_VERSION,
        "complete": complete,
        "verdict": verdict(cases, complete),
        **({"coverage": cov} if cov is not None else {}),
        "kernel": kernel_decl,
        "environment": env or environment(),
        "run": run,
        "counts": counts(cases),
        "summary": summarize(cases),
        "cases": [c.to_dict() for c in cases],
        **numerics(cases),
        "caution": CAUTION,
    })


def write_json_atomic(path: str | os.PathLike, doc: dict[str, Any]) -> Path:
    """Write JSON to a temporary file beside ``path`` and rename it into place (atomic on POSIX)."""
    from .destinations import write_atomic

    def dump(f) -> None:
        json.dump(doc, f, indent=1, allow_nan=False)
        f.write("\n")

    return write_atomic(path, dump)


def load(path: str | os.PathLike) -> dict[str, Any]:
    """Read a results document and check it (conformance.documents: JSON, schema, version, rules).

    Raises conformance.documents.DocumentError (a ValueError) naming the file and the field."""
    from .documents import read

    return read(path)


def case_results(doc: dict[str, Any]) -> list[CaseResult]:
    return [CaseResult.from_dict(c) for c in doc["cases"]]
