"""A stored reproducer: one failing case as a folder of portable vectors plus what the search saw.

    REPRO/manifest.json, manifest.json.sha256, index.txt, cases/0000/...   a vectors folder of the one case
                                                                            (refnorm export's format, docs/vectors.md)
    REPRO/reproducer.json                                                   the case, the seed, the kernel, and
                                                                            the search's result for it

So a reproducer can be rerun by `refnorm check SPEC --replay REPRO`, by the pytest plugin
(``--refnorm-replay DIR``), and by a target without Python (`refnorm score REPRO OUTPUTS`).
Reading it checks everything before anything runs: the manifest's sha256 and schema and every
listed file's sha256 (conformance.vectors.manifest); reproducer.json as strict JSON with every
field of the right type; that both name the same case; and, at replay, that the inputs this
refnorm makes of the case and seed are the stored ones bit for bit (else the reproducer was made by
a generator that differs, and rerunning it would test something else).
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np

import refnorm

from ..cases.generators import make_inputs
from ..cases.model import Case
from ..kernel import Kernel
from ..results import CAUTION, CaseResult, now_iso, write_json_atomic
from ..vectors.export import export_vectors
from ..vectors.manifest import VectorsError, file_path, load_manifest, verify_files
from ..vectors.npy import NpyError, decode, read_npy

__all__ = ["REPRODUCER", "SCHEMA_NAME", "SCHEMA_VERSION", "ReproducerError", "Reproducer", "write_reproducer",
           "read_reproducer", "find_reproducers", "comparable", "check_inputs"]

REPRODUCER = "reproducer.json"
SCHEMA_NAME = "refnorm.reproducer"
SCHEMA_VERSION = 1
#: The largest reproducer.json read (it holds one case's result: kilobytes).
MAX_BYTES = 1 << 22
#: Fields of a result that differ from run to run (timings); everything else must replay to the same.
TIMINGS = ("duration_s", "kernel_s", "oracle_s")
_FIELDS = {"schema": str, "schema_version": int, "refnorm": str, "created": str, "op": str, "dtype": str,
           "seed": int, "kernel": str, "spec": (str, type(None)), "id": str, "case": dict, "failing_outputs": list,
           "result": dict, "evaluation": int, "command": str, "overrides": dict, "caution": str}


class ReproducerError(ValueError):
    """A reproducer that cannot be trusted or does not fit the kernel; the message names the file and why."""


@dataclass(frozen=True)
class Reproducer:
    folder: Path
    data: dict[str, Any]
    case: Case
    manifest: Any

    @property
    def seed(self) -> int:
        return int(self.data["seed"])

    @property
    def overrides(self) -> dict[str, tuple[float, float]]:
        return {k: (float(v[0]), float(v[1])) for k, v in self.data["overrides"].items()}

    @property
    def result(self) -> dict[str, Any]:
        """The search's result for the case (timings left out)."""
        return self.data["result"]


def comparable(result: CaseResult | Mapping[str, Any]) -> dict[str, Any]:
    """A result without its timings: what a replay must reproduce exactly."""
    d = result.to_dict() if isinstance(result, CaseResult) else dict(result)
    return {k: v for k, v in d.items() if k not in TIMINGS}


def write_reproducer(folder: str | os.PathLike, kernel: Kernel, case: Case, seed: int, result: CaseResult, *,
                     failing: tuple[str, ...], evaluation: int, spec: str | None = None,
                     overrides: Mapping[str, tuple[float, float]] | None = None, command: str = "") -> Path:
    """Write REPRO (a new or empty folder): the vectors of ``case`` (refnorm export), then reproducer.json last."""
    d = Path(folder)
    d.mkdir(parents=True, exist_ok=True)
    export_vectors(kernel, [case], d, seed=seed, tier="selected", declaration=spec, overrides=overrides,
                   command=command, quiet=True)
    data = {"schema": SCHEMA_NAME, "schema_version": SCHEMA_VERSION, "refnorm": refnorm.__version__,
            "created": now_iso(), "op": case.op, "dtype": case.dtype, "seed": int(seed), "kernel": kernel.name,
            "spec": spec, "id": case.id, "case": case.as_dict(), "failing_outputs": list(failing),
            "result": comparable(result), "evaluation": int(evaluation), "command": command,
            "overrides": {k: [float(a), float(r)] for k, (a, r) in (overrides or {}).items()},
            "caution": "A reproducer is one case that failed: it shows a defect on these inputs; a pass on it "
                       "after a fix is evidence on this case only. " + CAUTION}
    return write_json_atomic(d / REPRODUCER, data)


def _no_constants(name: str) -> Any:
    raise ValueError(f"the JSON constant {name} is not allowed")


def read_reproducer(path: str | os.PathLike) -> Reproducer:
    """A reproducer folder (or its reproducer.json), checked as the module docstring says. Raises ReproducerError."""
    p = Path(path)
    folder = p.parent if p.name == REPRODUCER and not p.is_dir() else p
    jp = folder / REPRODUCER
    if not folder.is_dir():
        raise ReproducerError(f"{p}: not a reproducer folder (expected a folder holding {REPRODUCER}, written by "
                              "refnorm search --out)")
    try:
        if not jp.is_file():
            raise ReproducerError(f"{jp}: missing (a reproducer folder holds {REPRODUCER})")
        if jp.stat().st_size > MAX_BYTES:
            raise ReproducerError(f"{jp}: larger than {MAX_BYTES} bytes; a reproducer's is kilobytes")
        data = json.loads(jp.read_bytes().decode("utf-8"), parse_constant=_no_constants)
    except ReproducerError:
        raise
    except (OSError, UnicodeDecodeError, ValueError) as e:
        raise ReproducerError(f"{jp}: cannot be read as JSON: {e}") from None
    if not isinstance(data, dict):
        raise ReproducerError(f"{jp}: expected a JSON object, received {type(data).__name__}")
    for k, t in _FIELDS.items():
        if k not in data:
            raise ReproducerError(f"{jp}: the field {k!r} is missing")
        if not isinstance(data[k], t) or isinstance(data[k], bool):
            raise ReproducerError(f"{jp}: the field {k!r} has type {type(data[k]).__name__}")
    if data["schema"] != SCHEMA_NAME or data["schema_version"] != SCHEMA_VERSION:
        raise ReproducerError(f"{jp}: schema {data['schema']!r} version {data['schema_version']}, expected "
                              f"{SCHEMA_NAME!r} version {SCHEMA_VERSION}")
    try:
        case = Case.from_dict(data["case"])
        cid = case.id
    except (KeyError, TypeError, ValueError, ArithmeticError) as e:
        raise ReproducerError(f"{jp}: its case record is not a case: {type(e).__name__}: {e}") from None
    if cid != data["id"] or data["case"].get("id") != cid:
        raise ReproducerError(f"{jp}: its case record gives the id {cid[:200]!r}, not {data['id'][:200]!r}")
    try:
        man = load_manifest(folder)
        verify_files(man)
    except VectorsError as e:
        raise ReproducerError(f"{folder}: its vectors cannot be trusted: {e}") from None
    if [c.id for c in man.cases] != [cid] or man.data["seed"] != data["seed"]:
        raise ReproducerError(f"{folder}: the manifest holds {[c.id for c in man.cases][:3]} (seed {man.data['seed']}), "
                              f"not the reproducer's case {cid[:200]!r} (seed {data['seed']})")
    return Reproducer(folder=folder, data=data, case=case, manifest=man)


def find_reproducers(path: str | os.PathLike) -> list[Path]:
    """The reproducer folders at ``path``: itself (a reproducer folder or its reproducer.json), or every
    folder below it that holds a reproducer.json, sorted. Raises ReproducerError when there is none."""
    p = Path(path)
    if not os.path.lexists(p):
        raise ReproducerError(f"{p}: no such file or folder")
    if p.is_file() or (p / REPRODUCER).exists():
        return [p]
    if not p.is_dir():
        raise ReproducerError(f"{p}: neither a reproducer nor a folder of reproducers")
    found = sorted(q.parent for q in p.rglob(REPRODUCER))
    if not found:
        raise ReproducerError(f"{p}: holds no reproducer (no {REPRODUCER} below it)")
    return found


def check_inputs(rep: Reproducer, kernel: Kernel) -> None:
    """That this refnorm makes, of the reproducer's case and seed under the kernel's declaration, exactly the
    stored inputs (bit for bit, NaN payloads and signed zeros included). Raises ReproducerError."""
    entry = rep.manifest.data["cases"][0]
    made = make_inputs(rep.case, kernel.precision_for(rep.case.dtype), rep.seed)
    for i in entry.get("inputs", []):
        name = i["name"]
        if name not in made:  # saved statistics given to a backward-only kernel: the oracle's, not drawn
            continue
        try:
            stored = decode(read_npy(file_path(rep.folder, i["file"], f"input {name}"), shape=tuple(i["shape"]),
                                     descr=i["npy_dtype"]), i["format"])
        except (NpyError, VectorsError) as e:
            raise ReproducerError(f"{rep.folder}: input {name}: {e}") from None
        got = made[name]
        same = (got is not None and np.shape(got) == stored.shape and np.asarray(got).dtype == stored.dtype
                and np.ascontiguousarray(got).tobytes() == stored.tobytes())
        if not same:
            raise ReproducerError(f"{rep.folder}: input {name} differs from what this refnorm ({refnorm.__version__}) "
                                  f"makes of the case and seed {rep.seed} under kernel {kernel.name!r}'s declaration "
                                  f"(the reproducer was made by refnorm {rep.data['refnorm']}, for kernel "
                                  f"{rep.data['kernel']!r}): rerun the search to make a new one")
