"""Established libraries side by side: the same cases and seed through torch CPU, TF/Keras CPU and
ONNX Runtime's CPU execution provider (forward outputs only: it has no gradients).

For a results document of a kernel, each library's adapter for the same op
(conformance.adapters.<module>:<op>, a factory returning a Kernel) runs the
cases the kernel ran, with the same seed, through conformance.run.run_check.
Inputs come from the case id and the seed, so x and dy are identical; weight,
bias and running statistics are rounded to each kernel's own params dtype.

The peers document (``peers.json`` beside the report) records, per library,
whether it ran, why not when it did not, its versions, and its full results
document, so that a report can be re-rendered without running it again. Ctrl-C (or
SIGTERM) during a library's run stops the peers there: the document says
``interrupted``, the libraries not reached are "skipped" with that reason, the report
shows it, and `refnorm check --report` exits 3; an interrupted peers file is never reused.
"""

from __future__ import annotations

import importlib
import importlib.metadata
import importlib.util
import math
import multiprocessing
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, TextIO

from ..results import as_float, write_json_atomic

__all__ = ["Library", "LIBRARIES", "run_peers", "load_peers", "write_peers", "compare", "Comparison",
           "PEERS_SCHEMA", "PEERS_VERSION", "ratio_text", "headline", "own_counts"]

PEERS_SCHEMA = "refnorm.peers"
PEERS_VERSION = 1


@dataclass(frozen=True)
class Library:
    """A reference library: display name, adapter module, the modules it needs, and how its workers start.

    spawn=True starts each worker fresh from the adapter's spec (seconds of import per worker, but
    nothing inherited); spawn=False forks from this process, where the adapter is already loaded.
    Every library spawns: TensorFlow is not safe to fork once its runtime has started, and torch's
    CPU kernels can deadlock in a child forked after its intra-op thread pool has run (seen here:
    peer cases forked from a process that had run torch ops hung until their timeout); ONNX Runtime
    keeps thread pools too (spawned for the same reason, not seen to hang).
    """

    name: str
    adapter: str
    requires: tuple[str, ...]
    spawn: bool = False


LIBRARIES = (
    Library("torch CPU", "conformance.adapters.torch_cpu", ("torch",), spawn=True),
    Library("TF/Keras CPU", "conformance.adapters.keras_cpu", ("tensorflow", "keras"), spawn=True),
    Library("ONNX Runtime CPU", "conformance.adapters.onnxruntime_ep", ("onnx", "onnxruntime"), spawn=True),
)


_DISTRIBUTIONS = {"tensorflow": ("tensorflow", "tensorflow-cpu"), "onnxruntime": ("onnxruntime", "onnxruntime-gpu")}


def _versions(mods: Iterable[str]) -> dict[str, str]:
    """Installed versions from package metadata (no import: TensorFlow takes seconds to import)."""
    out = {}
    for m in mods:
        out[m] = ""
        for dist in _DISTRIBUTIONS.get(m, (m,)):
            try:
                out[m] = importlib.metadata.version(dist)
                break
            except importlib.metadata.PackageNotFoundError:
                continue
    return out


def _cases_run(doc: dict[str, Any]) -> list[dict[str, Any]]:
    """The cases the kernel actually ran (not skipped), in run order."""
    return [c for c in doc.get("cases", []) if c["status"] != "skipped"]


def _entry(lib: Library, status: str, reason: str = "", **kw: Any) -> dict[str, Any]:
    return {"name": lib.name, "adapter": lib.adapter, "status": status, "reason": reason,
            "versions": kw.pop("versions", {}), **kw}


def _choose(module: Any, lib: Library, op: str, doc: dict[str, Any]):
    """Per dtype the kernel ran: the adapter factory whose declared params dtype matches the kernel's
    (torch's ``<op>_mixed`` keeps float32 parameters for float16/bfloat16 x), else the plain one.

    Returns ({spec: (kernel, [dtypes])}, {dtype: why not compared}, {dtype: params note}).
    """
    from ..kernel import KernelError, load_kernel

    kinds = {}
    specs = [f"{lib.adapter}:{name}" for name in (op, f"{op}_mixed") if hasattr(module, name)]
    q = doc["kernel"].get("quantization")
    if isinstance(q, dict):  # a quantized y: the library's composition with the same format and scale, if any
        from ..quantized import peer_specs

        specs = peer_specs(lib.adapter, op, q, str((doc.get("run") or {}).get("spec") or ""))
        if not specs:
            raise KernelError(f"{lib.adapter} has no composition with a quantized y ({q.get('format')}, "
                              f"scale={q.get('scale')})")
    for spec in specs:
        try:
            kinds[spec] = load_kernel(spec)
        except KernelError as e:
            kinds[spec] = e
    errors = [v for v in kinds.values() if isinstance(v, KernelError)]
    usable = {s: k for s, k in kinds.items() if not isinstance(k, KernelError)}
    if not usable:
        raise errors[0] if errors else KernelError(f"{lib.adapter} has no adapter for {op}")
    plan: dict[str, tuple[Any, list[str]]] = {}
    missing: dict[str, str] = {}
    params_note: dict[str, str] = {}
    decl = doc["kernel"].get("precision") or {}
    for dt in _ran_dtypes(doc):
        want = (decl.get(dt) or {}).get("params", dt)
        fits = [(s, k) for s, k in usable.items() if dt in k.dtypes]
        if not fits:
            declared = sorted({d for k in usable.values() for d in k.dtypes})
            missing[dt] = f"its adapter declares {', '.join(declared)}"
            continue
        same = [(s, k) for s, k in fits if k.precision_for(dt).params == want]
        spec, kernel = (same or fits)[0]
        if not same:
            params_note[dt] = (f"weight/bias/statistics in {kernel.precision_for(dt).params} where this kernel "
                               f"has {want}")
        plan.setdefault(spec, (kernel, []))[1].append(dt)
    return plan, missing, params_note


def _ran_dtypes(doc: dict[str, Any]) -> list[str]:
    out: list[str] = []
    for c in _cases_run(doc):
        if c["case"]["dtype"] not in out:
            out.append(c["case"]["dtype"])
    return out


def _run_one(lib: Library, doc: dict[str, Any], quiet: bool, stream: TextIO | None) -> dict[str, Any]:
    from ..kernel import KernelError
    from ..run import RunOptions, run_check

    op = doc["kernel"]["op"]
    run = doc.get("run", {})
    missing = [m for m in lib.requires if importlib.util.find_spec(m) is None]
    if missing:
        return _entry(lib, "unavailable", f"{', '.join(missing)} not installed")
    versions = _versions(lib.requires)
    spec = run.get("spec") or ""
    if spec.startswith(lib.adapter + ":"):
        return _entry(lib, "skipped", "this library's adapter is the kernel under test", versions=versions)
    try:
        module = importlib.import_module(lib.adapter)
    except ModuleNotFoundError as e:
        if e.name and lib.adapter.startswith(e.name):
            return _entry(lib, "unavailable", f"no adapter module {lib.adapter} in this refnorm", versions=versions)
        return _entry(lib, "unavailable", f"importing {lib.adapter} failed: {e}", versions=versions)
    except Exception as e:  # a library that is installed but broken must not cost the report
        return _entry(lib, "unavailable", f"importing {lib.adapter} failed: {type(e).__name__}: {e}",
                      versions=versions)
    try:
        plan, not_declared, params_note = _choose(module, lib, op, doc)
    except KernelError as e:
        return _entry(lib, "unavailable", str(e), versions=versions)
    extra = {"not_declared": not_declared, "params_note": params_note, "versions": versions}
    if not plan:
        return _entry(lib, "skipped", "; ".join(f"{dt}: {why}" for dt, why in not_declared.items()), **extra)
    runs = []
    for pspec, (kernel, dts) in plan.items():
        ids = [c["id"] for c in _cases_run(doc) if c["case"]["dtype"] in dts]
        if stream is not None and not quiet:
            stream.write(f"peers: {lib.name} ({pspec}): {len(ids)} case(s), seed {run.get('seed', 0)}\n")
            stream.flush()
        spawn = lib.spawn or "fork" not in multiprocessing.get_all_start_methods()
        # One spawned worker: each would import the library again, which costs more than the cases.
        workers = 1 if spawn else int(run.get("workers", 1) or 1)
        opts = RunOptions(case_ids=tuple(ids), seed=int(run.get("seed", 0)), workers=workers,
                          timeout=float(run.get("timeout_s", 120.0) or 120.0),
                          overrides={k: tuple(v) for k, v in (run.get("overrides") or {}).items()})
        try:
            pdoc = run_check(kernel, opts, spec=pspec if spawn else None, quiet=True)
        except KeyboardInterrupt:
            raise
        except Exception as e:
            return _entry(lib, "error", f"the run of {pspec} failed: {type(e).__name__}: {e}", runs=runs, **extra)
        runs.append({"spec": pspec, "kernel": kernel.name, "dtypes": dts, "doc": pdoc})
    complete = all(r["doc"].get("complete", True) for r in runs)
    return _entry(lib, "ran" if complete else "incomplete", "" if complete else "the peer run was interrupted",
                  runs=runs, **extra)


def run_peers(doc: dict[str, Any], libraries: Iterable[Library] | None = None, *, quiet: bool = True,
              stream: TextIO | None = None) -> dict[str, Any]:
    """Run each library's adapter (default: LIBRARIES, read at the call) over the cases ``doc`` ran, with its
    seed; return the peers document."""
    from .. import stop

    os.environ.setdefault("TF_CPP_MIN_LOG_LEVEL", "2")  # before any worker imports TensorFlow
    os.environ.setdefault("KERAS_BACKEND", "tensorflow")
    entries: list[dict[str, Any]] = []
    interrupted = False
    for lib in LIBRARIES if libraries is None else libraries:
        # Ctrl-C (or SIGTERM) during one library's run ends the peers: the libraries after it are not run.
        if interrupted or stop.requested():
            interrupted = True
            entries.append(_entry(lib, "skipped", "not run: the command was interrupted"))
            continue
        entries.append(_run_one(lib, doc, quiet, stream))
        interrupted = entries[-1]["status"] == "incomplete"
    return {"schema": PEERS_SCHEMA, "schema_version": PEERS_VERSION, "op": doc["kernel"]["op"],
            "seed": doc.get("run", {}).get("seed", 0), "case_ids": [c["id"] for c in _cases_run(doc)],
            "interrupted": interrupted, "libraries": entries}


def write_peers(path: str | os.PathLike, peers: dict[str, Any]) -> Path:
    return write_json_atomic(path, peers)


def load_peers(path: str | os.PathLike, doc: dict[str, Any]) -> tuple[dict[str, Any] | None, str]:
    """Read a peers document and check it belongs to ``doc`` (same op, seed and cases).

    Returns (peers, "") or (None, why it cannot be used).
    """
    from ..documents import PEERS, DocumentError, read

    p = Path(path)
    try:
        peers = read(p, PEERS)
    except DocumentError as e:  # truncated, not JSON, another schema: a note, as for a mismatched one
        return None, f"{e}; not used"
    if peers.get("interrupted"):
        return None, f"{p} holds an interrupted run of the libraries"
    want = [c["id"] for c in _cases_run(doc)]
    if (peers.get("op") != doc["kernel"]["op"] or peers.get("seed") != doc.get("run", {}).get("seed", 0)
            or peers.get("case_ids") != want):
        return None, f"{p} was made for other cases or another seed than these results"
    return peers, ""


@dataclass
class Comparison:
    """One (op, dtype, output) row: the kernel's and each library's largest errors on the cases both ran."""

    op: str
    dtype: str
    output: str
    kernel_abs: float
    kernel_ulp: int
    peers: dict[str, dict[str, Any]]  # library name -> {cases, abs, ulp, ratio}


def _finite_max(vals: Iterable[float]) -> float:
    """Largest value, NaN ignored (a NaN error is a mismatch the table already shows); NaN when none."""
    vals = [v for v in vals if not math.isnan(v)]
    return max(vals) if vals else math.nan


def _outputs_by_case(doc: dict[str, Any]) -> dict[tuple[str, str], dict[str, Any]]:
    return {(c["id"], o["name"]): o for c in doc.get("cases", []) if c["status"] in ("passed", "failed")
            for o in c.get("outputs", [])}


def compare(doc: dict[str, Any], peers: dict[str, Any] | None) -> list[Comparison]:
    """Per (op, dtype, output) of the kernel: its max |error| and ULP next to each library's, on the
    cases and outputs both checked, and the ratio kernel / library of the max |error|."""
    if not peers:
        return []
    mine = _outputs_by_case(doc)
    keys: dict[tuple[str, str, str], list[str]] = {}
    case_of = {c["id"]: c["case"] for c in doc.get("cases", [])}
    for cid, name in mine:
        keys.setdefault((case_of[cid]["op"], case_of[cid]["dtype"], name), []).append(cid)
    theirs: dict[str, dict[tuple[str, str], dict[str, Any]]] = {}
    for lib in peers.get("libraries", []):
        for r in lib.get("runs") or []:
            theirs.setdefault(lib["name"], {}).update(_outputs_by_case(r["doc"]))
    rows = []
    for (op, dt, name), cids in keys.items():
        entry: dict[str, dict[str, Any]] = {}
        for lib, outs in theirs.items():
            common = [cid for cid in cids if (cid, name) in outs]
            if not common:
                continue
            k_abs = _finite_max(as_float(mine[(cid, name)].get("max_abs")) for cid in common)
            p_abs = _finite_max(as_float(outs[(cid, name)].get("max_abs")) for cid in common)
            k_ulp = max(int(mine[(cid, name)].get("max_ulp", 0) or 0) for cid in common)
            p_ulp = max(int(outs[(cid, name)].get("max_ulp", 0) or 0) for cid in common)
            entry[lib] = {"cases": len(common), "kernel_abs": k_abs, "abs": p_abs, "kernel_ulp": k_ulp,
                          "ulp": p_ulp, "ratio": _ratio(k_abs, p_abs)}
        if entry:
            all_abs = _finite_max(as_float(mine[(cid, name)].get("max_abs")) for cid in cids)
            all_ulp = max(int(mine[(cid, name)].get("max_ulp", 0) or 0) for cid in cids)
            rows.append(Comparison(op=op, dtype=dt, output=name, kernel_abs=all_abs, kernel_ulp=all_ulp,
                                   peers=entry))
    order = {r["output"]: i for i, r in enumerate(doc.get("summary", []))}
    rows.sort(key=lambda r: (r.op, r.dtype, order.get(r.output, 99)))
    return rows


def own_counts(lib: dict[str, Any]) -> str:
    """A library's own statuses over its runs, e.g. '41 passed, 5 failed, 1 error'."""
    tot: dict[str, int] = {}
    for r in lib.get("runs") or []:
        for k, v in (r["doc"].get("counts") or {}).items():
            tot[k] = tot.get(k, 0) + int(v)
    return ", ".join(f"{v} {k.replace('_', ' ')}" for k, v in tot.items() if v)


def _ratio(mine: float, theirs: float) -> float:
    if math.isnan(mine) or math.isnan(theirs):
        return math.nan
    if mine == theirs:  # both exact (0) or both the same error
        return 1.0
    if theirs <= 0 or not math.isfinite(theirs):
        return math.inf if mine > 0 else 0.0
    return mine / theirs


def ratio_text(r: float) -> str:
    """'1.3×', '0.52×', '∞ (library exact)'; '—' where either error is undefined."""
    if math.isnan(r):
        return "—"
    if math.isinf(r):
        return "∞ (library exact)"
    if r == 0:
        return "0 (kernel exact)"
    if r < 0.01:
        return f"{r:.1e}×"
    return f"{r:.2g}×" if r < 10 else f"{r:.0f}×"


def headline(rows: list[Comparison], only: str | None = None) -> list[str]:
    """Per library (or for library ``only``), the sentence on the output where the kernel's error is
    largest against the library's."""
    out = []
    libs: list[str] = []
    for r in rows:
        for lib in r.peers:
            if lib not in libs and (only is None or lib == only):
                libs.append(lib)
    for lib in libs:
        cands = [(r, r.peers[lib]) for r in rows if lib in r.peers]
        finite = [(r, p) for r, p in cands if math.isfinite(p["ratio"])]
        pool = finite or [(r, p) for r, p in cands if not math.isnan(p["ratio"])]
        if not pool:
            continue
        r, p = max(pool, key=lambda rp: rp[1]["ratio"])
        out.append(f"this kernel's {r.dtype} {r.output} error is {ratio_text(p['ratio'])} {lib}'s on the same "
                   f"inputs ({p['cases']} case(s): max |error| {_num(p['kernel_abs'])} against {_num(p['abs'])})")
    return out


def _num(v: float) -> str:
    from .content import fmt

    return fmt(v) if not math.isnan(v) else "—"
