"""`refnorm export`: write the inputs, the oracle's expected outputs and their bounds, case by case.

Every number comes from the pieces `refnorm check` runs (conformance.run.execute): the same
inputs (cases.make_inputs, rounded once to the declared formats), the oracle on those inputs
upcast to float64, the same selection of checked outputs and the same derived bounds. A
folder scored with `refnorm score` therefore gives the results `refnorm check` gives for a
kernel that returns the same bits. The format is docs/vectors.md.
"""

from __future__ import annotations

import hashlib
import json
import os
import sys
import time
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence, TextIO

import numpy as np

import refnorm

from .. import ops
from ..cases.generators import make_inputs
from ..cases.model import Case
from ..kernel import Conventions, Kernel, Precision
from ..results import CAUTION, now_iso
from ..tolerances.ranges import case_beyond_range
from ..run.execute import (case_bounds, declared_outputs, given_saved, oracle_expected, skip_reason)
from ..tolerances import output_dtype
from ..tolerances.bound import json_number
from .manifest import DIGEST, EXPORTABLE_OPS, INDEX, MANIFEST, SCHEMA_NAME, SCHEMA_VERSION, VectorsError, digest_line
from .npy import encode, stored_dtype, write_npy

__all__ = ["target_kernel", "export_vectors", "memory_layout", "EXPORT_CAUTION"]

EXPORT_CAUTION = ("These vectors are evidence on the cases they hold: scoring a target's outputs against them "
                  "says how that target did on these inputs, not that it is correct elsewhere. " + CAUTION)

#: Inputs in the storage format (the others are in the params format, saved statistics in the saved one).
STORAGE_INPUTS = ("x", "dy", "residual", "dh", "h")
_INPUT_ORDER = ("x", "dy", "weight", "bias", "running_mean", "running_var", "residual", "residual_bias", "dh")


def _runs_elsewhere(entry: str) -> Callable[..., Any]:
    def call(**_: Any) -> Any:
        raise RuntimeError(f"{entry} runs on the target: export its vectors (refnorm export) and score the "
                           "target's outputs (refnorm score)")
    call.__name__ = entry
    return call


def target_kernel(op: str, dtypes: Sequence[str], *, precision: Precision | Mapping[str, Precision] | None = None,
                  conventions: Conventions | None = None, entry_points: Sequence[str] | None = None,
                  name: str | None = None) -> Kernel:
    """The declaration of a kernel that runs on a target Python cannot call: its entry points are
    placeholders that say so when called. Outputs follow the conventions: y, the saved statistics,
    and the running statistics when the kernel returns them. Raises KernelError (a bad declaration)."""
    spec = ops.get(op)
    conv = conventions or Conventions()
    entries = tuple(entry_points) if entry_points else spec.entry_points
    outputs: tuple[str, ...] = ("y",)
    if "forward" in entries:  # without a forward, the saved statistics come from the oracle (conformance.kernel)
        outputs += tuple(conv.saved)
        if conv.running == "return":
            outputs += spec.running_outputs
    return Kernel(name=name or f"target {op} kernel (exported vectors)", op=op, outputs=outputs,
                  dtypes=tuple(dtypes), conventions=conv, precision=precision,
                  notes="runs on a target outside Python: checked through refnorm export and refnorm score",
                  **{e: _runs_elsewhere(e) for e in entries})


def memory_layout(a: np.ndarray) -> tuple[list[int], int, int]:
    """How ``a`` lies in memory: its strides in elements, the position of element (0, ..., 0) in the
    smallest buffer holding every element, and that buffer's length in elements."""
    item = a.itemsize
    if a.size == 0:
        return [0] * a.ndim, 0, 0
    if any(s % item for s in a.strides):
        raise ValueError(f"strides {a.strides} are not whole elements of {item} bytes")
    lo, hi = np.lib.array_utils.byte_bounds(a)
    return [s // item for s in a.strides], (a.ctypes.data - lo) // item, (hi - lo) // item


def _counts(a: np.ndarray) -> dict[str, int]:
    v = np.asarray(a, dtype=np.float64)
    return {"nan": int(np.count_nonzero(np.isnan(v))), "posinf": int(np.count_nonzero(v == np.inf)),
            "neginf": int(np.count_nonzero(v == -np.inf))}


class _Writer:
    """Files of one export, each recorded with its sha256."""

    def __init__(self, folder: Path):
        self.folder = folder

    def npy(self, rel: str, array: np.ndarray) -> dict[str, str]:
        p = self.folder / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        data = write_npy(p, array)
        return {"file": rel, "sha256": hashlib.sha256(data).hexdigest()}

    def text(self, rel: str, text: str) -> dict[str, str]:
        data = text.encode("utf-8")
        (self.folder / rel).write_bytes(data)
        return {"file": rel, "sha256": hashlib.sha256(data).hexdigest()}


def _kwargs(case: Case) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for k, v in ops.get(case.op).kwargs(case).items():
        out[k] = [int(i) for i in v] if isinstance(v, (tuple, list)) else int(v)
    return out


def _case_entry(w: _Writer, kernel: Kernel, case: Case, seed: int, dirname: str,
                overrides: Mapping[str, tuple[float, float]]) -> dict[str, Any]:
    entry: dict[str, Any] = {"id": case.id, "dir": dirname, "case": case.as_dict(), "skipped": skip_reason(kernel, case)}
    if entry["skipped"] is not None:
        return entry
    conv = kernel.conventions
    prec = kernel.precision_for(case.dtype)
    inp = make_inputs(case, prec, seed)
    inp64 = ops.oracle_view(case, conv, {k: (None if v is None else np.asarray(v).astype(np.float64))
                                         for k, v in inp.items()})
    beyond = case_beyond_range(case, prec, ops.base_inputs(inp64))
    if beyond:  # as check: the declared precision does not promise this range, so no vectors for it
        entry["skipped"] = beyond
        return entry
    fwd = ops.oracle_forward(case, conv, inp64)
    names = declared_outputs(kernel, case)
    expected = oracle_expected(kernel, case, inp64, fwd, names)
    bounds = case_bounds(case, prec, conv, inp64, expected, overrides)
    arrays = {k: inp[k] for k in _INPUT_ORDER if inp.get(k) is not None}
    arrays.update(given_saved(kernel, case, fwd, inp64) if any(n in ops.GRADS for n in names) else {})
    train = case.mode == "train"
    base = f"cases/{dirname}"
    inputs = []
    for name, a in arrays.items():
        fmt = prec.storage if name in STORAGE_INPUTS else prec.params
        strides, offset, span = memory_layout(np.asarray(a))
        ref = w.npy(f"{base}/inputs/{name}.npy", encode(a, fmt))
        inputs.append({"name": name, "format": fmt, "npy_dtype": stored_dtype(fmt).str, "shape": list(a.shape),
                       "strides": strides, "offset": offset, "buffer_elements": span, "nonfinite": _counts(a),
                       **ref})
    outputs = []
    for name, exp in expected.items():
        fmt = output_dtype(name, prec)
        b = bounds[name]
        e_ref = w.npy(f"{base}/expected/{name}.npy", np.asarray(exp, dtype=np.float64))
        b_ref = w.npy(f"{base}/bounds/{name}.npy",
                      np.broadcast_to(np.asarray(b.values, dtype=np.float64), np.shape(exp)))
        grad = name in ops.GRADS
        entry_point = ("backward" if grad else "forward") + ("" if train else "_eval")
        outputs.append({"name": name, "entry_point": entry_point, "format": fmt, "npy_dtype": stored_dtype(fmt).str,
                        "shape": list(np.shape(exp)), "file": f"{name}.npy",
                        "expected": {**e_ref, "nonfinite": _counts(exp)},
                        "bound": {**b_ref, "kind": b.kind, "formula": b.formula,
                                  "terms": {k: json_number(v) for k, v in b.terms.items()}}})
    entry_points = [e for e in kernel.entry_points if (e.endswith("_eval")) != train]
    entry.update({
        "entry_points": entry_points,
        "params": {"eps": float(case.eps), "mode": case.mode, "training": train, "running": bool(case.running),
                   "momentum": None if case.momentum is None else float(case.momentum),
                   "batches_seen": int(case.batches_seen), "running_style": conv.running, "kwargs": _kwargs(case)},
        "precision": prec.as_dict(), "conventions": conv.as_dict(), "inputs": inputs, "outputs": outputs})
    return entry


def _num(v: float) -> str:
    return repr(float(v))


def index_text(cases: list[dict[str, Any]], op: str) -> str:
    """index.txt: the cases to run, one field per line (docs/vectors.md, "The index")."""
    lines = [f"refnorm-vectors {SCHEMA_VERSION}", f"op {op}"]
    for c in cases:
        if c["skipped"] is not None:
            continue
        p = c["params"]
        lines += [f"case {c['dir']} {c['id']}", f"dtype {c['case']['dtype']}", f"mode {p['mode']}",
                  f"running {int(p['running'])}", f"eps {_num(p['eps'])}",
                  f"momentum {'none' if p['momentum'] is None else _num(p['momentum'])}",
                  f"batches_seen {p['batches_seen']}"]
        for k, v in p["kwargs"].items():
            vals = v if isinstance(v, list) else [v]
            lines.append(" ".join(["kwarg", k, str(len(vals))] + [str(i) for i in vals]))
        for k, v in c["conventions"].items():
            val = "+".join(v) if isinstance(v, list) else str(v)
            lines.append(f"convention {k} {val or '-'}")
        lines += [f"entry {e}" for e in c["entry_points"]]
        for i in c["inputs"]:
            lines.append(" ".join(["input", i["name"], i["format"], i["npy_dtype"], i["file"], str(len(i["shape"]))]
                                  + [str(n) for n in i["shape"]] + [str(s) for s in i["strides"]]
                                  + [str(i["offset"]), str(i["buffer_elements"])]))
        for o in c["outputs"]:
            lines.append(" ".join(["output", o["name"], o["format"], o["npy_dtype"], o["entry_point"],
                                   str(len(o["shape"]))] + [str(n) for n in o["shape"]]))
        lines.append("end")
    return "\n".join(lines) + "\n"


def export_vectors(kernel: Kernel, cases: Sequence[Case], folder: str | os.PathLike, *, seed: int, tier: str,
                   declaration: str | None = None, overrides: Mapping[str, tuple[float, float]] | None = None,
                   command: str = "", stream: TextIO | None = None, quiet: bool = False) -> dict[str, Any]:
    """Write one folder of vectors for ``cases`` under ``kernel``'s declaration; return the manifest.

    The manifest and its sha256 are written last, so an interrupted export leaves a folder that
    `refnorm score` refuses.
    """
    import warnings

    if kernel.op not in EXPORTABLE_OPS:
        raise VectorsError(f"kernel {kernel.name!r} is of op {kernel.op}, whose kernels run as replicas over a "
                           f"process group: vectors hold one process's calls (ops: {', '.join(EXPORTABLE_OPS)})")
    d = Path(folder)
    w = _Writer(d)
    out = stream or sys.stderr
    entries = []
    t0, step = time.monotonic(), max(1, len(cases) // 10)
    width = max(4, len(str(max(len(cases) - 1, 0))))
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)  # NaN and Inf cases warn by design
        for i, case in enumerate(cases):
            entries.append(_case_entry(w, kernel, case, seed, f"{i:0{width}d}", overrides or {}))
            if not quiet and ((i + 1) % step == 0 or i + 1 == len(cases)):
                out.write(f"[{i + 1}/{len(cases)}] exported, {time.monotonic() - t0:.1f} s\n")
                out.flush()
    dts = list(dict.fromkeys(c.dtype for c in cases)) or list(kernel.dtypes)
    index = w.text(INDEX, index_text(entries, kernel.op))
    formats = sorted({f for e in entries if e["skipped"] is None
                      for f in [i["format"] for i in e["inputs"]] + [o["format"] for o in e["outputs"]]})
    manifest = {
        "schema": SCHEMA_NAME, "schema_version": SCHEMA_VERSION, "refnorm": refnorm.__version__,
        "created": now_iso(), "command": command, "seed": int(seed), "tier": tier, "op": kernel.op, "dtypes": dts,
        "declaration": declaration, "kernel": kernel.declaration(),
        "stored_formats": {f: stored_dtype(f).str for f in formats},
        "overrides": {k: [float(a), float(r)] for k, (a, r) in (overrides or {}).items()},
        "index": index, "cases": entries, "caution": EXPORT_CAUTION,
    }
    raw = (json.dumps(manifest, indent=1, allow_nan=False) + "\n").encode("utf-8")
    (d / MANIFEST).write_bytes(raw)
    (d / DIGEST).write_text(digest_line(hashlib.sha256(raw).hexdigest()), encoding="utf-8")
    return manifest
