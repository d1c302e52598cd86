"""The manifest of a vectors folder: what each case holds, its JSON Schema, and its checks on reading.

A folder written by `refnorm export` (docs/vectors.md):

    manifest.json           every case: id, op, shapes, layouts, conventions, precision, parameters,
                            each file with its sha256; the refnorm version and the seed
    manifest.json.sha256    the sha256 of manifest.json, in the form sha256sum writes and checks
    index.txt               the same cases, one field per line, for test benches without a JSON parser
    cases/<dir>/inputs/     what the kernel consumes (x, dy, weight, bias, running statistics, ...)
    cases/<dir>/expected/   the oracle's float64 values of every checked output
    cases/<dir>/bounds/     the per-element bound (float64) of every checked output

Reading checks, in this order, and stops at the first failure with a VectorsError that names
the file: the folder; manifest.json (a regular file of at most MAX_MANIFEST bytes) against
manifest.json.sha256; strict JSON (no NaN or Infinity constants); the schema (SCHEMA, also
docs/vectors-schema.json; the jsonschema package, Draft 2020-12); then what a schema cannot
say: every file path relative and inside the folder, case ids and folders unique, each case
record the catalog's own (its fields give back its id), the op and formats known, each
stored type the one its format is stored as. ``verify_files`` then hashes every listed file.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import stat
from dataclasses import dataclass
from pathlib import Path, PurePosixPath
from typing import Any

from .. import dtypes, ops
from ..cases.model import TIERS, Case
from ..kernel import ENTRY_POINTS, SUMMATION_MODELS
from ..results import as_float
from ..tolerances import OUTPUTS
from .npy import DESCRS, stored_dtype

__all__ = ["SCHEMA", "SCHEMA_NAME", "SCHEMA_VERSION", "MANIFEST", "DIGEST", "INDEX", "MAX_MANIFEST",
           "INPUTS", "VectorsError", "Manifest", "CaseEntry", "OutputEntry", "FileRef", "load_manifest",
           "verify_files", "sha256_file", "digest_line", "file_path", "EXPORTABLE_OPS"]

#: The ops whose cases vectors can hold: one process's inputs and outputs (a multi-replica op's
#: kernel needs the harness's process group and collectives: conformance.run.replicas).
EXPORTABLE_OPS = tuple(n for n in ops.OPS if not ops.get(n).replicas)
SCHEMA_NAME = "refnorm.vectors"
SCHEMA_VERSION = 1
MANIFEST = "manifest.json"
DIGEST = "manifest.json.sha256"
INDEX = "index.txt"
#: The largest manifest read (a standard-tier export of one op and dtype is well under 1 MiB).
MAX_MANIFEST = 64 << 20
#: The inputs a case may hold: the kernel's arrays, then the saved statistics a backward-only
#: declaration is given (the oracle's, rounded to the params format, as `refnorm check` gives them).
INPUTS = ("x", "dy", "weight", "bias", "running_mean", "running_var", "residual", "residual_bias", "dh",
          "h") + ops.STATISTICS
_MAX_FILE = 1 << 31

_HEX = "^[0-9a-f]{64}$"
_PATH = r"^(?!/)(?!.*(^|/)\.\.?(/|$))[A-Za-z0-9_.=,+-]+(/[A-Za-z0-9_.=,+-]+)*$"
_DIR = r"^[A-Za-z0-9_-]{1,64}$"


def _array(items: dict[str, Any], **kw: Any) -> dict[str, Any]:
    return {"type": "array", "items": items, **kw}


_NUM = {"oneOf": [{"type": "number"}, {"enum": ["inf", "-inf", "nan"]}]}
_DIM = {"type": "integer", "minimum": 0}
_FORMAT = {"enum": list(dtypes.FORMATS)}
_FILE = {"type": "object", "required": ["file", "sha256"], "additionalProperties": False,
         "properties": {"file": {"type": "string", "pattern": _PATH, "maxLength": 1000},
                        "sha256": {"type": "string", "pattern": _HEX}}}
_COUNTS = {"type": "object", "required": ["nan", "posinf", "neginf"], "additionalProperties": False,
           "properties": {k: {"type": "integer", "minimum": 0} for k in ("nan", "posinf", "neginf")}}
_PRECISION = {
    "type": "object", "required": ["storage", "params", "accumulate", "summation", "lam", "output_accumulate"],
    "properties": {"storage": _FORMAT, "params": _FORMAT, "accumulate": _FORMAT,
                   "summation": {"enum": list(SUMMATION_MODELS)}, "lam": {"type": "number", "exclusiveMinimum": 0},
                   "output_accumulate": {"type": "object", "additionalProperties": _FORMAT}}}
_KERNEL = {
    "type": "object",
    "required": ["name", "op", "entry_points", "outputs", "grads", "dtypes", "conventions", "precision"],
    "properties": {
        "name": {"type": "string", "maxLength": 1000}, "op": {"enum": list(EXPORTABLE_OPS)},
        "entry_points": _array({"enum": list(ENTRY_POINTS)}, minItems=1),
        "outputs": _array({"enum": list(OUTPUTS)}), "grads": _array({"enum": list(ops.GRADS)}),
        "dtypes": _array(_FORMAT, minItems=1), "layouts": _array({"type": "string"}),
        "conventions": {"type": "object", "additionalProperties": {"anyOf": [
            {"type": ["string", "number", "boolean", "null"]}, {"type": "array", "items": {"type": "string"}}]}},
        "precision": {"type": "object", "additionalProperties": _PRECISION},
        "notes": {"type": "string"},
        # as the results document types them (docs/results-schema.json): score copies the declaration there
        **{f: {"type": "boolean"} for f in ("strided", "optional_params", "momentum_none", "updates_running")},
        "min_reduction": {"type": "integer", "minimum": 1},
        "device": {"type": ["string", "null"], "maxLength": 1000}}}
_CASE_RECORD = {
    "type": "object",
    "required": ["op", "dtype", "shape", "layout", "values", "weight", "bias", "eps", "mode", "running",
                 "momentum", "batches_seen", "strides", "groups", "norm_ndim", "id"],
    "properties": {
        "op": {"enum": list(EXPORTABLE_OPS)}, "dtype": _FORMAT, "shape": _array(_DIM, maxItems=32),
        "layout": {"type": "string"}, "values": {"type": "string"}, "weight": {"type": "string"},
        "bias": {"type": "string"}, "eps": {"type": "number", "minimum": 0}, "mode": {"enum": ["train", "eval"]},
        "running": {"type": "boolean"}, "momentum": {"type": ["number", "null"]},
        "batches_seen": {"type": "integer", "minimum": 0}, "strides": {"type": "string"},
        "groups": {"type": "integer", "minimum": 0}, "norm_ndim": {"type": "integer", "minimum": 0},
        "tier": {"enum": list(TIERS) + ["search"]}, "id": {"type": "string"}}}  # search: drawn (docs/search.md)
_INPUT = {
    "type": "object",
    "required": ["name", "format", "npy_dtype", "shape", "strides", "offset", "buffer_elements", "nonfinite",
                 "file", "sha256"],
    "additionalProperties": False,
    "properties": {
        "name": {"enum": list(INPUTS)}, "format": _FORMAT, "npy_dtype": {"enum": list(DESCRS)},
        "shape": _array(_DIM, maxItems=32), "strides": _array({"type": "integer"}, maxItems=32),
        "offset": _DIM, "buffer_elements": _DIM, "nonfinite": _COUNTS,
        "file": _FILE["properties"]["file"], "sha256": _FILE["properties"]["sha256"]}}
_OUTPUT = {
    "type": "object",
    "required": ["name", "entry_point", "format", "npy_dtype", "shape", "file", "expected", "bound"],
    "additionalProperties": False,
    "properties": {
        "name": {"enum": list(OUTPUTS)}, "entry_point": {"enum": list(ENTRY_POINTS)}, "format": _FORMAT,
        "npy_dtype": {"enum": list(DESCRS)}, "shape": _array(_DIM, maxItems=32),
        "file": {"type": "string", "pattern": r"^[a-z_]+\.npy$"},
        "expected": {**_FILE, "required": ["file", "sha256", "nonfinite"],
                     "properties": {**_FILE["properties"], "nonfinite": _COUNTS}},
        "bound": {**_FILE, "required": ["file", "sha256", "kind", "formula", "terms"],
                  "properties": {**_FILE["properties"], "kind": {"enum": ["derived", "override"]},
                                 "formula": {"type": "string"},
                                 "terms": {"type": "object", "additionalProperties": _NUM}}}}}
_PARAMS = {
    "type": "object",
    "required": ["eps", "mode", "training", "running", "momentum", "batches_seen", "running_style", "kwargs"],
    "additionalProperties": False,
    "properties": {
        "eps": {"type": "number", "minimum": 0}, "mode": {"enum": ["train", "eval"]}, "training": {"type": "boolean"},
        "running": {"type": "boolean"}, "momentum": {"type": ["number", "null"]},
        "batches_seen": {"type": "integer", "minimum": 0}, "running_style": {"enum": ["return", "inplace"]},
        "kwargs": {"type": "object", "additionalProperties": {
            "oneOf": [{"type": "integer"}, _array({"type": "integer"}, maxItems=32)]}}}}
_CASE = {
    "type": "object",
    "required": ["id", "dir", "case", "skipped"],
    "properties": {
        "id": {"type": "string", "maxLength": 1000}, "dir": {"type": "string", "pattern": _DIR},
        "case": _CASE_RECORD, "skipped": {"type": ["string", "null"]},
        "entry_points": _array({"enum": list(ENTRY_POINTS)}), "params": _PARAMS, "precision": _PRECISION,
        "conventions": {"type": "object"}, "inputs": _array(_INPUT), "outputs": _array(_OUTPUT)},
    "if": {"properties": {"skipped": {"type": "null"}}},
    "then": {"required": ["entry_points", "params", "precision", "conventions", "inputs", "outputs"]}}

#: The manifest's JSON Schema (Draft 2020-12). docs/vectors-schema.json is this, written out.
SCHEMA: dict[str, Any] = {
    "$schema": "https://json-schema.org/draft/2020-12/schema",
    "$id": f"{SCHEMA_NAME}/{SCHEMA_VERSION}",
    "title": f"refnorm vectors manifest, schema version {SCHEMA_VERSION}",
    "description": ("manifest.json of a folder written by `refnorm export` (docs/vectors.md). Paths are relative "
                    "to the folder, '/'-separated. Floats that are not finite are the strings \"inf\", \"-inf\", "
                    "\"nan\"."),
    "type": "object",
    "required": ["schema", "schema_version", "refnorm", "created", "command", "seed", "tier", "op", "dtypes",
                 "declaration", "kernel", "stored_formats", "overrides", "index", "cases", "caution"],
    "properties": {
        "schema": {"const": SCHEMA_NAME}, "schema_version": {"const": SCHEMA_VERSION},
        "refnorm": {"type": "string"}, "created": {"type": "string"}, "command": {"type": "string"},
        "seed": {"type": "integer", "minimum": 0, "maximum": 2 ** 63 - 1},
        "tier": {"enum": list(TIERS) + ["selected"]}, "op": {"enum": list(EXPORTABLE_OPS)},
        "dtypes": _array(_FORMAT, minItems=1), "declaration": {"type": ["string", "null"]},
        "kernel": _KERNEL,
        "stored_formats": {"type": "object", "additionalProperties": {"enum": list(DESCRS)}},
        "overrides": {"type": "object", "additionalProperties": _array({"type": "number", "minimum": 0},
                                                                      minItems=2, maxItems=2)},
        "index": _FILE, "cases": _array(_CASE), "caution": {"type": "string"}},
}


class VectorsError(ValueError):
    """A vectors folder that cannot be used; the message names the file and what is wrong."""


@dataclass(frozen=True)
class FileRef:
    path: str
    sha256: str


@dataclass(frozen=True)
class OutputEntry:
    """One checked output: its format and stored type, shape, and the stored expected values and bound."""

    name: str
    entry_point: str
    format: str
    npy_dtype: str
    shape: tuple[int, ...]
    file: str
    expected: FileRef
    bound: FileRef
    bound_kind: str
    formula: str
    terms: dict[str, float]


@dataclass(frozen=True)
class CaseEntry:
    id: str
    dir: str
    case: Case
    skipped: str | None
    outputs: tuple[OutputEntry, ...]
    files: tuple[FileRef, ...]


@dataclass(frozen=True)
class Manifest:
    folder: Path
    data: dict[str, Any]
    sha256: str
    cases: tuple[CaseEntry, ...]

    @property
    def files(self) -> list[FileRef]:
        out = [FileRef(self.data["index"]["file"], self.data["index"]["sha256"])]
        for c in self.cases:
            out += c.files
        return out


def digest_line(sha: str) -> str:
    """manifest.json.sha256's content: sha256sum's form, so `sha256sum -c manifest.json.sha256` checks it."""
    return f"{sha}  {MANIFEST}\n"


def _regular(p: Path, what: str, limit: int) -> int:
    try:
        st = os.stat(p)
    except FileNotFoundError:
        raise VectorsError(f"{what}: {p} does not exist") from None
    except OSError as e:
        raise VectorsError(f"{what}: {p} cannot be examined: {e.strerror or e}") from None
    if not stat.S_ISREG(st.st_mode):
        raise VectorsError(f"{what}: {p} is not a regular file")
    if st.st_size > limit:
        raise VectorsError(f"{what}: {p} is {st.st_size} bytes, over the limit of {limit}")
    return st.st_size


def file_path(folder: Path, rel: str, what: str) -> Path:
    """``folder / rel`` for a manifest path: relative, '/'-separated, no '.' or '..' part, inside the folder."""
    pp = PurePosixPath(rel)
    if not re.match(_PATH, rel) or pp.is_absolute() or any(part in (".", "..") for part in pp.parts):
        raise VectorsError(f"{what}: the path {rel[:200]!r} is not a plain relative path inside the folder")
    p = folder.joinpath(*pp.parts)
    try:
        inside = p.resolve().is_relative_to(folder.resolve())
    except (OSError, RuntimeError):  # a symlink loop
        inside = False
    if not inside:
        raise VectorsError(f"{what}: {rel} leads outside the folder {folder} (a symlink?)")
    return p


def sha256_file(p: Path, what: str, limit: int = _MAX_FILE) -> str:
    _regular(p, what, limit)
    h = hashlib.sha256()
    try:
        with open(p, "rb") as f:
            for block in iter(lambda: f.read(1 << 20), b""):
                h.update(block)
    except OSError as e:
        raise VectorsError(f"{what}: {p} cannot be read: {e.strerror or e}") from None
    return h.hexdigest()


def _no_constants(name: str) -> Any:
    raise ValueError(f"the JSON constant {name} is not allowed (non-finite numbers are written as strings)")


def _validator():
    try:
        import jsonschema
    except ImportError:
        raise VectorsError("reading a vectors folder needs the jsonschema package: pip install 'refnorm[harness]'") \
            from None
    return jsonschema.Draft202012Validator(SCHEMA)


def _schema_error(doc: Any, where: str) -> None:
    v = _validator()
    import jsonschema

    err = jsonschema.exceptions.best_match(v.iter_errors(doc))
    if err is not None:
        path = "/".join(str(p) for p in err.absolute_path) or "(top level)"
        msg = err.message if len(err.message) <= 300 else err.message[:297] + "..."
        raise VectorsError(f"{where}: does not follow the vectors schema at {path}: {msg}")


def _counts_ok(entry: dict[str, Any], shape: tuple[int, ...], what: str) -> None:
    n = 1
    for d in shape:
        n *= d
    c = entry["nonfinite"]
    if c["nan"] + c["posinf"] + c["neginf"] > n:
        raise VectorsError(f"{what}: counts more non-finite values than its {n} elements")


def _case(folder: Path, c: dict[str, Any], where: str, op: str) -> CaseEntry:
    cid = c["id"]
    what = f"{where}: case {cid[:200]!r}"
    try:
        case = Case.from_dict(c["case"])
        rebuilt = case.id
    except (KeyError, TypeError, ValueError, ArithmeticError) as e:
        raise VectorsError(f"{what}: its case record is not a catalog case: {type(e).__name__}: {e}") from None
    if rebuilt != cid or c["case"]["id"] != cid:
        raise VectorsError(f"{what}: its case record gives the id {rebuilt[:200]!r}")
    if case.op != op:
        raise VectorsError(f"{what}: op {case.op}, but the manifest is for {op}")
    files: list[FileRef] = []
    outs: list[OutputEntry] = []
    if c["skipped"] is not None:
        return CaseEntry(id=cid, dir=c["dir"], case=case, skipped=c["skipped"], outputs=(), files=())
    if c["precision"]["storage"] != case.dtype:
        raise VectorsError(f"{what}: precision.storage is {c['precision']['storage']}, the case's dtype {case.dtype}")
    for e in c["inputs"]:
        file_path(folder, e["file"], f"{what}: input {e['name']}")
        if stored_dtype(e["format"]).str != e["npy_dtype"]:
            raise VectorsError(f"{what}: input {e['name']} of format {e['format']} is stored as "
                               f"{stored_dtype(e['format']).str}, not {e['npy_dtype']}")
        if not (len(e["shape"]) == len(e["strides"])):
            raise VectorsError(f"{what}: input {e['name']} has {len(e['shape'])} dimensions and "
                               f"{len(e['strides'])} strides")
        _counts_ok(e, tuple(e["shape"]), f"{what}: input {e['name']}")
        files.append(FileRef(e["file"], e["sha256"]))
    names = set()
    for o in c["outputs"]:
        ow = f"{what}: output {o['name']}"
        if o["name"] in names:
            raise VectorsError(f"{ow}: listed twice")
        names.add(o["name"])
        if o["file"] != f"{o['name']}.npy":
            raise VectorsError(f"{ow}: its file in the outputs folder must be {o['name']}.npy, not {o['file']}")
        if stored_dtype(o["format"]).str != o["npy_dtype"]:
            raise VectorsError(f"{ow}: format {o['format']} is stored as {stored_dtype(o['format']).str}, "
                               f"not {o['npy_dtype']}")
        shape = tuple(o["shape"])
        _counts_ok(o["expected"], shape, f"{ow}: expected")
        exp = FileRef(o["expected"]["file"], o["expected"]["sha256"])
        bnd = FileRef(o["bound"]["file"], o["bound"]["sha256"])
        for ref, kind in ((exp, "expected"), (bnd, "bound")):
            file_path(folder, ref.path, f"{ow}: {kind}")
        files += [exp, bnd]
        outs.append(OutputEntry(name=o["name"], entry_point=o["entry_point"], format=o["format"],
                                npy_dtype=o["npy_dtype"], shape=shape, file=o["file"], expected=exp, bound=bnd,
                                bound_kind=o["bound"]["kind"], formula=o["bound"]["formula"],
                                terms={k: as_float(v) for k, v in o["bound"]["terms"].items()}))
    return CaseEntry(id=cid, dir=c["dir"], case=case, skipped=None, outputs=tuple(outs), files=tuple(files))


def parse_manifest(raw: bytes, folder: Path, where: str = MANIFEST) -> Manifest:
    """Check and parse manifest bytes (the sha256 check is load_manifest's). Raises VectorsError."""
    try:
        doc = json.loads(raw.decode("utf-8"), parse_constant=_no_constants)
    except UnicodeDecodeError as e:
        raise VectorsError(f"{where}: not UTF-8 text: {e.reason} at byte {e.start}") from None
    except (ValueError, RecursionError) as e:  # JSONDecodeError is a ValueError
        raise VectorsError(f"{where}: not valid JSON: {str(e)[:300]}") from None
    _schema_error(doc, where)
    if doc["kernel"]["op"] != doc["op"]:
        raise VectorsError(f"{where}: kernel.op is {doc['kernel']['op']}, but the manifest is for {doc['op']}")
    for fmt, descr in doc["stored_formats"].items():
        if fmt not in dtypes.FORMATS or stored_dtype(fmt).str != descr:
            raise VectorsError(f"{where}: stored_formats says {fmt[:40]!r} is stored as {descr}, which this refnorm "
                               "does not read")
    file_path(folder, doc["index"]["file"], f"{where}: index")
    cases, ids, dirs = [], set(), set()
    for c in doc["cases"]:
        if c["id"] in ids:
            raise VectorsError(f"{where}: case {c['id'][:200]!r} is listed twice")
        if c["dir"] in dirs:
            raise VectorsError(f"{where}: two cases share the folder {c['dir']}")
        ids.add(c["id"])
        dirs.add(c["dir"])
        try:
            cases.append(_case(folder, c, where, doc["op"]))
        except VectorsError:
            raise
        except (ArithmeticError, ValueError, TypeError, KeyError) as e:  # e.g. an integer beyond float64
            raise VectorsError(f"{where}: case {c['id'][:200]!r}: a value this refnorm cannot use: "
                               f"{type(e).__name__}: {str(e)[:200]}") from None
    sha = hashlib.sha256(raw).hexdigest()
    return Manifest(folder=folder, data=doc, sha256=sha, cases=tuple(cases))


def load_manifest(folder: str | os.PathLike) -> Manifest:
    """Read and check DIR/manifest.json (module docstring). Raises VectorsError."""
    d = Path(folder)
    if not d.is_dir():
        raise VectorsError(f"{d}: not a folder (expected a folder written by refnorm export)")
    mp, dp = d / MANIFEST, d / DIGEST
    _regular(mp, MANIFEST, MAX_MANIFEST)
    _regular(dp, DIGEST, 1024)
    try:
        raw = mp.read_bytes()
        line = dp.read_bytes()
    except OSError as e:
        raise VectorsError(f"{d}: cannot read the manifest: {e.strerror or e}") from None
    m = re.fullmatch(rb"([0-9a-f]{64})[ \t]+\*?manifest\.json\r?\n?", line)
    if m is None:
        raise VectorsError(f"{dp}: expected one line '<sha256>  {MANIFEST}' (as sha256sum writes it)")
    got = hashlib.sha256(raw).hexdigest()
    if got != m.group(1).decode():
        raise VectorsError(f"{mp}: its sha256 is {got}, but {DIGEST} records {m.group(1).decode()}: the manifest "
                           "changed after export")
    return parse_manifest(raw, d, str(mp))


def verify_files(man: Manifest) -> None:
    """Hash every file the manifest lists; a missing file or a different sha256 is a VectorsError."""
    for ref in man.files:
        p = file_path(man.folder, ref.path, ref.path)
        got = sha256_file(p, ref.path)
        if got != ref.sha256:
            raise VectorsError(f"{p}: its sha256 is {got}, but the manifest records {ref.sha256}: the file changed "
                               "after export")
