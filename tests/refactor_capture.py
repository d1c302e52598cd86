"""A compact, complete record of what the harness does on the standard tier, for before/after checks.

For every op and every dtype of the catalog, a fixed NumPy kernel (seeded_bugs.NumpyNorm: float32
arithmetic, NumPy's own sums, no threads, so its results depend on nothing but its inputs) runs
over the standard tier in-process through conformance.run.execute.execute_case (no worker pool),
with a fixed seed. Per case the record holds:

- the id and the full Case dict;
- a digest (dtype, shape, strides, sha256 of the values) of every generated input array;
- the keyword arguments each entry point of the kernel received (arrays as digests);
- a sha256 of the oracle's value of every checked output and of its elementwise bound;
- the status, message, modified inputs, and per output every metric and the bound's summary
  exactly as the results document holds them (only timings are dropped);

and, per (op, dtype), the document's verdict, counts and summary rows. The catalog ids of every
tier for every op and dtype are recorded beside them. tests/data/make_refactor_baseline.py writes
the record; tests/test_refactor_baseline.py compares a fresh one with it.
"""

from __future__ import annotations

import functools
import gzip
import hashlib
import json
from dataclasses import replace
from pathlib import Path
from typing import Any, Callable

import numpy as np

import conformance.run.execute as execute
from conformance import dtypes
from conformance.cases import TIERS, catalog
from conformance.kernel import Kernel
from conformance.results import build_document
from seeded_bugs import NumpyNorm

SEED = 20240607
OPS = ("batch_norm", "layer_norm", "group_norm", "instance_norm", "rms_norm")
DTYPES = dtypes.FORMATS
DATA = Path(__file__).parent / "data" / "refactor_baseline"
TIMINGS = ("duration_s", "kernel_s", "oracle_s")


def digest(a: Any) -> Any:
    """A JSON-ready fingerprint: arrays by dtype, shape, strides and the sha256 of their values."""
    if a is None or isinstance(a, (bool, int, str)):
        return a
    if isinstance(a, float):
        return repr(a)
    if isinstance(a, (tuple, list)):
        return [digest(v) for v in a]
    if isinstance(a, np.ndarray):
        h = hashlib.sha256(np.ascontiguousarray(a).tobytes()).hexdigest()
        return {"dtype": a.dtype.str if a.dtype.kind != "V" else str(a.dtype), "dtype_name": str(a.dtype),
                "shape": list(a.shape), "strides": list(a.strides), "sha256": h}
    if isinstance(a, np.generic):
        return digest(a.item())
    raise TypeError(f"no digest for {type(a).__name__}")


def kernel_for(op: str, dtype: str) -> Kernel:
    """The fixed kernel: NumpyNorm with float32 params for formats narrower than float32."""
    params = dtype if dtype in ("float64", "float32") else "float32"
    return NumpyNorm(op, dtype, params).kernel(f"fixed numpy {op} ({dtype})")


class _Recorder:
    """Wraps a kernel's entry points and the harness's input and bound steps to record what they see."""

    def __init__(self) -> None:
        self.calls: list[dict[str, Any]] = []
        self.inputs: dict[str, Any] = {}
        self.bounds: dict[str, Any] = {}

    def reset(self) -> None:
        self.calls, self.inputs, self.bounds = [], {}, {}

    def entry(self, name: str, fn: Callable) -> Callable:
        @functools.wraps(fn)
        def wrapped(*args, **kwargs):
            self.calls.append({"entry": name, "args": len(args),
                               "kwargs": {k: digest(kwargs[k]) for k in sorted(kwargs)}})
            return fn(*args, **kwargs)

        return wrapped

    def make_inputs(self, fn: Callable) -> Callable:
        def wrapped(case, precision, seed):
            inp = fn(case, precision, seed)
            self.inputs = {k: digest(v) for k, v in sorted(inp.items())}
            return inp

        return wrapped

    def derive_bounds(self, fn: Callable) -> Callable:
        def wrapped(case, precision, conventions, inputs64, expected):
            out = fn(case, precision, conventions, inputs64, expected)
            self.bounds = {k: {"expected": digest(np.asarray(expected[k], dtype=np.float64)),
                               "bound": digest(np.asarray(b.values, dtype=np.float64))}
                           for k, b in sorted(out.items())}
            return out

        return wrapped


def capture(op: str, dtype: str) -> dict[str, Any]:
    """The record of the standard tier for one op and dtype (see the module docstring)."""
    rec = _Recorder()
    k = kernel_for(op, dtype)
    k = replace(k, **{e: rec.entry(e, getattr(k, e)) for e in k.entry_points})
    orig_inputs, orig_bounds = execute.make_inputs, execute.derive_bounds
    execute.make_inputs = rec.make_inputs(orig_inputs)
    execute.derive_bounds = rec.derive_bounds(orig_bounds)
    cases = []
    results = []
    try:
        for c in catalog([op], [dtype], "standard"):
            rec.reset()
            r = execute.execute_case(k, c, SEED)
            results.append(r)
            d = {key: v for key, v in r.to_dict().items() if key not in TIMINGS}
            d["inputs"] = rec.inputs
            d["calls"] = rec.calls
            d["arrays"] = rec.bounds
            cases.append(d)
    finally:
        execute.make_inputs, execute.derive_bounds = orig_inputs, orig_bounds
    doc = build_document(k.declaration(), {}, results, True, env={})
    return {"op": op, "dtype": dtype, "seed": SEED, "verdict": doc["verdict"], "counts": doc["counts"],
            "summary": doc["summary"], "kernel": doc["kernel"], "cases": cases}


def catalogs() -> dict[str, Any]:
    """tier -> op -> dtype -> the case ids, and a sha256 of the full Case dicts in catalog order."""
    out: dict[str, Any] = {}
    for t in TIERS:
        for op in OPS:
            for dt in DTYPES:
                cs = catalog([op], [dt], t)
                blob = json.dumps([c.as_dict() for c in cs], sort_keys=True).encode()
                out.setdefault(t, {}).setdefault(op, {})[dt] = {
                    "ids": [c.id for c in cs], "cases_sha256": hashlib.sha256(blob).hexdigest()}
    return out


def versions() -> dict[str, str]:
    """The libraries whose arithmetic and random streams the record depends on."""
    import ml_dtypes

    return {"numpy": np.__version__, "ml_dtypes": ml_dtypes.__version__}


def path_for(op: str) -> Path:
    return DATA / f"{op}.json.gz"


def write(path: Path, obj: Any) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    raw = json.dumps(obj, sort_keys=True, separators=(",", ":"), allow_nan=False).encode()
    path.write_bytes(gzip.compress(raw, compresslevel=9, mtime=0))


def read(path: Path) -> Any:
    return json.loads(gzip.decompress(path.read_bytes()))
