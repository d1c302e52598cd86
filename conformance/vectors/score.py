"""`refnorm score`: judge a target's outputs against an exported folder, as `refnorm check` would.

The target writes, per case, one `.npy` file per output into OUTPUTS/<dir>/ (the manifest's
``dir`` and each output's ``file``), in the output's stored type; or OUTPUTS/<dir>/error.txt
to report that the kernel refused the case (the case is then an "error", as a kernel that
raises is in `refnorm check`). Each output is compared with conformance.compare.compare_output
against the stored float64 expected values under the stored bound, whose record (kind,
formula, terms) is the export's, so a target that returns the bits a kernel returned in
`refnorm check` gets the same results, budget for budget.

A missing, unreadable or refused output file fails its case, naming the output and why; the
other outputs and cases are still scored.
"""

from __future__ import annotations

import os
import stat
import sys
import time
from pathlib import Path
from typing import Any, TextIO

import numpy as np

from ..cases.model import Case
from ..compare import compare_output, unread_output
from ..results import CaseResult, build_document, now_iso
from ..run.execute import judged
from ..run.progress import Progress
from ..tolerances import Bound
from .manifest import CaseEntry, Manifest, OutputEntry, VectorsError, file_path
from .npy import NpyError, as_bits, decode, read_npy

__all__ = ["score_outputs", "ERROR_FILE", "MAX_ERROR_TEXT"]

#: A file a target writes into a case's folder instead of outputs when its kernel refuses the case.
ERROR_FILE = "error.txt"
#: The most of error.txt that is read (the rest is cut, and the message says so).
MAX_ERROR_TEXT = 4096


def _stored(man: Manifest, ref_path: str, shape: tuple[int, ...], what: str) -> np.ndarray:
    """A float64 array of the export (already hashed): a failure here is a broken folder, not the target's."""
    try:
        return read_npy(file_path(man.folder, ref_path, what), shape=shape, descr="<f8")
    except NpyError as e:
        raise VectorsError(f"{what}: {e}") from None


def _target_error(p: Path) -> str | None:
    """The text of error.txt when the target wrote one (cut to MAX_ERROR_TEXT bytes)."""
    try:
        st = os.stat(p)
    except OSError:
        return None
    if not stat.S_ISREG(st.st_mode):
        return f"{p.name} is not a regular file"
    try:
        with open(p, "rb") as f:
            raw = f.read(MAX_ERROR_TEXT + 1)
    except OSError as e:
        return f"{p.name} cannot be read: {e.strerror or e}"
    text = raw[:MAX_ERROR_TEXT].decode("utf-8", "replace").strip()
    return (text or "(empty)") + (" [cut]" if len(raw) > MAX_ERROR_TEXT else "")


def _actual(path: Path, out: OutputEntry, shown: str) -> np.ndarray | str:
    """The target's output as an array of its format, or why it cannot be used."""
    if not os.path.lexists(path):
        return f"output {out.name}: no file {shown} (the target wrote none)"
    bits = as_bits(out.format)
    what = f"{out.format}, stored as {out.npy_dtype}" + (" bit patterns" if bits else "")
    try:
        a = read_npy(path, shape=out.shape, descr=out.npy_dtype)
    except NpyError as e:
        return f"output {out.name} ({what}): {e}"
    return decode(a, out.format)


def _score_case(man: Manifest, entry: CaseEntry, outputs: Path) -> CaseResult:
    t0 = time.perf_counter()
    case: Case = entry.case
    if entry.skipped is not None:
        return CaseResult(id=entry.id, case=case.as_dict(), status="skipped", message=entry.skipped)
    folder = outputs / entry.dir
    err = _target_error(folder / ERROR_FILE)
    if err is not None:
        return CaseResult(id=entry.id, case=case.as_dict(), status="error",
                          message=f"the target reported an error ({entry.dir}/{ERROR_FILE}): {err}",
                          duration_s=time.perf_counter() - t0)
    results = []
    for out in entry.outputs:
        exp = _stored(man, out.expected.path, out.shape, f"case {entry.id}: expected {out.name}")
        vals = _stored(man, out.bound.path, out.shape, f"case {entry.id}: bound of {out.name}")
        bound = Bound(output=out.name, values=vals, formula=out.formula, terms=dict(out.terms), kind=out.bound_kind)
        act = _actual(folder / out.file, out, f"{entry.dir}/{out.file}")
        if isinstance(act, str):
            results.append(unread_output(out.name, exp, bound, dtype=out.format, message=act))
        else:
            results.append(compare_output(out.name, act, exp, bound, dtype=out.format))
    return judged(case, results, duration_s=time.perf_counter() - t0)


def score_outputs(man: Manifest, outputs: str | os.PathLike, *, command: str = "", stream: TextIO | None = None,
                  quiet: bool = False) -> dict[str, Any]:
    """The results document (conformance.results.build_document) of the target's outputs.

    Ctrl-C stops scoring: the document then has complete=False and holds the cases scored.
    Raises VectorsError for a stored file that cannot be read (the folder is broken).
    """
    import warnings

    out_dir = Path(outputs)
    data = man.data
    started, t0 = now_iso(), time.monotonic()
    results: list[CaseResult] = []
    to_score = [c for c in man.cases if c.skipped is None]
    prog = Progress(len(to_score), stream or sys.stderr, quiet=quiet)
    complete = True
    try:
        with warnings.catch_warnings(), np.errstate(all="ignore"):
            warnings.simplefilter("ignore", RuntimeWarning)
            for entry in man.cases:
                r = _score_case(man, entry, out_dir)
                results.append(r)
                if entry.skipped is None:
                    prog.update(r)
    except KeyboardInterrupt:
        complete = False
    finally:
        prog.close()
    ids = [c.id for c in man.cases]
    run = {
        "tier": data["tier"],
        "seed": data["seed"],
        "dtypes": list(data["dtypes"]),
        "case_ids": ids if data["tier"] == "selected" else [],
        "workers": 1,
        "timeout_s": None,
        "overrides": dict(data["overrides"]),
        "started": started,
        "finished": now_iso(),
        "duration_s": round(time.monotonic() - t0, 3),
        "cases_selected": len(ids),
        "command": command,
        "spec": None,
        "pid": os.getpid(),
        "vectors": {"folder": str(man.folder), "outputs": str(out_dir), "manifest_sha256": man.sha256,
                    "exported": data["created"], "exported_by": f"refnorm {data['refnorm']}",
                    "export_command": data["command"], "declaration": data["declaration"]},
    }
    doc = build_document(data["kernel"], run, results, complete)
    from ..documents import RESULTS, _schema_error

    err = _schema_error(doc, RESULTS)  # what the manifest declared must make a results document refnorm reads
    if err is not None:
        raise VectorsError(f"{man.folder}: the manifest's declaration gives a results document that is not valid "
                           f"at {err[0] or 'its top'}: {err[1]}")
    return doc
