"""Put the results documents of a sharded run back together (`refnorm merge`).

N documents written by `refnorm check ... --shard K/N` (or `refnorm gate --shard K/N`) are the
shards of one run when they agree on everything that decides which cases run and how they are
judged: the kernel's declaration, the refnorm version, the tier, the seed, the dtypes, the named
cases, the tolerance overrides, the per-case timeout, and the shard record's count, rule and
selection (the ids of the whole selection and the shard of each). A merge refuses shards that
differ in any of these (MergeError, naming the field and both values), a document that is not a
shard's, the same shard given twice, and a shard whose cases are not the ones its record assigns
to it.

The merged document is the one the unsharded run would have written: the cases in selection
order, counts, summary, coverage and verdict computed from them by conformance.results; timing
fields, process ids, the command and the environment of each shard are kept under
``run.merged.shards``. A missing shard, or a shard that was interrupted, leaves cases without a
result: the merged document is then incomplete (coverage names them), never conformant.

A shard judged by a gate (`--profile`, `--baseline`) carries the gate's decision for its cases
alone (a waiver stale on one shard may be used on another). The merge sets those decisions aside
(conformance.gate.decide.remove_gate) and the gate, when `refnorm merge` is given a profile or a
baseline, judges the whole run once.
"""

from __future__ import annotations

import copy
import os
from typing import Any, Mapping, Sequence

from ..documents import DocumentError, json_path, read
from ..results import CaseResult, build_document
from .shards import selection_digest, shard_of

__all__ = ["MergeError", "SAME_RUN", "read_shards", "merge_documents", "merged_lines"]

#: Fields (JSON paths as tuples) on which every shard of one run agrees.
SAME_RUN: tuple[tuple[str, ...], ...] = (
    ("kernel",),
    ("environment", "refnorm"),
    ("run", "tier"),
    ("run", "seed"),
    ("run", "dtypes"),
    ("run", "case_ids"),
    ("run", "overrides"),
    ("run", "accept_inconclusive"),
    ("run", "timeout_s"),
    ("run", "shard", "count"),
    ("run", "shard", "rule"),
    ("run", "shard", "cost_model"),
    ("run", "shard", "selection_sha256"),
    ("run", "shard", "assignment"),
)

#: Environment facts whose differences between shards a merge reports (each case was judged where it ran).
_ENV_NOTED = ("python", "numpy", "ml_dtypes", "torch", "tensorflow", "keras", "onnx", "onnxruntime", "platform",
              "machine", "processor", "cpu_count")

_MISSING = object()


class MergeError(ValueError):
    """Documents that are not the shards of one run; the message names the file, the field and the values."""


def _short(v: Any, limit: int = 80) -> str:
    import json

    try:
        text = json.dumps(v, sort_keys=True)
    except (TypeError, ValueError):
        text = repr(v)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _get(doc: Mapping[str, Any], path: Sequence[str]) -> Any:
    node: Any = doc
    for p in path:
        if not isinstance(node, Mapping) or p not in node:
            return _MISSING
        node = node[p]
    return node


def _first_difference(a: Any, b: Any, path: tuple) -> tuple[tuple, Any, Any]:
    """The first path at which two JSON values differ, with the two values there."""
    if isinstance(a, Mapping) and isinstance(b, Mapping):
        for k in list(a) + [k for k in b if k not in a]:
            va, vb = a.get(k, _MISSING), b.get(k, _MISSING)
            if va != vb:
                return _first_difference(va, vb, path + (k,))
    if isinstance(a, list) and isinstance(b, list) and len(a) == len(b):
        for i, (va, vb) in enumerate(zip(a, b)):
            if va != vb:
                return _first_difference(va, vb, path + (i,))
    return path, a, b


def _shown(v: Any) -> str:
    return "absent" if v is _MISSING else _short(v)


def read_shards(paths: Sequence[str | os.PathLike]) -> list[tuple[str, dict[str, Any]]]:
    """Read each file with conformance.documents (schema and rules); raise DocumentError naming the file."""
    return [(os.fspath(p), read(p)) for p in paths]


def _check_record(source: str, doc: Mapping[str, Any]) -> Mapping[str, Any]:
    """The document's shard record, checked against itself and against the document's cases."""
    s = shard_of(doc)
    if s is None:
        raise DocumentError(source, "run.shard", "not a shard's results (written without --shard): refnorm merge "
                            "puts together the documents of `refnorm check ... --shard K/N`, one per shard")
    ids, where = s["selection"], s["assignment"]
    if s["index"] > s["count"]:
        raise DocumentError(source, "run.shard.index", f"is {s['index']}, more than the count {s['count']}")
    if len(ids) != s["selected"] or len(where) != len(ids):
        raise DocumentError(source, "run.shard", f"names {len(ids)} selected case(s) and assigns {len(where)}, "
                            f"but says selected={s['selected']}")
    if selection_digest(ids) != s["selection_sha256"]:
        raise DocumentError(source, "run.shard.selection_sha256", "is not the sha256 of run.shard.selection "
                            "(the document was changed after the run)")
    if len(set(ids)) != len(ids):
        raise DocumentError(source, "run.shard.selection", "names a case more than once")
    for i, k in enumerate(where):
        if not 1 <= k <= s["count"]:
            raise DocumentError(source, json_path(("run", "shard", "assignment", i)),
                                f"is {k}, expected a shard from 1 to {s['count']}")
    shard_by_id = dict(zip(ids, where))
    for i, c in enumerate(doc["cases"]):
        k = shard_by_id.get(c["id"])
        if k is None:
            raise DocumentError(source, json_path(("cases", i, "id")), f"case {_short(c['id'])} is not in the "
                                "run's selection (run.shard.selection)")
        if k != s["index"]:
            raise DocumentError(source, json_path(("cases", i, "id")), f"case {_short(c['id'])} belongs to shard "
                                f"{k}/{s['count']}, not to this shard {s['index']}/{s['count']}")
    return s


def _results_equal(a: Mapping[str, Any], b: Mapping[str, Any]) -> bool:
    """Two documents of one shard with the same case results (timings aside)."""
    def strip(doc: Mapping[str, Any]) -> list[dict[str, Any]]:
        return [{k: v for k, v in c.items() if k not in ("duration_s", "kernel_s", "oracle_s")} for c in doc["cases"]]

    return strip(a) == strip(b)


def merge_documents(shards: Sequence[tuple[str, Mapping[str, Any]]], *, command: str = "") -> dict[str, Any]:
    """The results document of the whole run from its shards' documents (see the module docstring).

    ``shards`` are (source, document) pairs, each document read by conformance.documents. Raises
    MergeError or DocumentError when they are not the shards of one run.
    """
    if not shards:
        raise MergeError("no shard given: name the results files of `refnorm check ... --shard K/N`")
    records = [_check_record(src, doc) for src, doc in shards]
    src0, doc0 = shards[0]
    for src, doc in shards[1:]:
        for path in SAME_RUN:
            a, b = _get(doc0, path), _get(doc, path)
            if a != b:
                where, va, vb = _first_difference(a, b, tuple(path))
                theirs = f"it is absent in {src0}" if va is _MISSING else f"{src0} has {_shown(va)}"
                raise MergeError(f"{src}: {json_path(where)} is {_shown(vb)}, but {theirs}: the shards of one run "
                                 "share their kernel declaration, refnorm version, tier, seed, dtypes, cases, "
                                 "tolerance overrides, timeout and selection")
    by_index: dict[int, int] = {}
    for i, (src, doc) in enumerate(shards):
        k = records[i]["index"]
        if k in by_index:
            j = by_index[k]
            other_src, other = shards[j]
            n = len(doc["cases"])
            same = "with the same results" if _results_equal(doc, other) else "with different results"
            raise MergeError(f"{src} and {other_src} are both shard {k}/{records[i]['count']} ({same}; {n} "
                             f"case(s) would have two results): give each shard once")
        by_index[k] = i
    count = records[0]["count"]
    ids, where = records[0]["selection"], records[0]["assignment"]
    docs = [copy.deepcopy(dict(doc)) for _, doc in shards]
    from ..gate.decide import remove_gate

    gated = [src for (src, _), d in zip(shards, docs) if remove_gate(d)]
    order = sorted(by_index)  # shards by index: the merged run's facts come from the lowest one given
    results: dict[str, dict[str, Any]] = {}
    for k in order:
        for c in docs[by_index[k]]["cases"]:
            results[c["id"]] = c
    cases = [CaseResult.from_dict(results[cid]) for cid in ids if cid in results]
    missing_shards = [k for k in range(1, count + 1) if k not in by_index]
    first = docs[by_index[order[0]]]
    runs = [docs[by_index[k]]["run"] for k in order]
    interrupted = next((r.get("interrupted") for r in runs if r.get("interrupted")), None)
    durations = [r.get("duration_s") for r in runs]
    run = {
        "tier": first["run"]["tier"],
        "seed": first["run"]["seed"],
        "dtypes": first["run"].get("dtypes"),
        "case_ids": first["run"].get("case_ids", []),
        "workers": first["run"].get("workers"),
        "worker_threads": first["run"].get("worker_threads"),
        "timeout_s": first["run"].get("timeout_s"),
        "overrides": first["run"].get("overrides", {}),
        "accept_inconclusive": first["run"].get("accept_inconclusive", []),
        "started": min(r["started"] for r in runs),
        "finished": max(r["finished"] for r in runs),
        "duration_s": round(sum(durations), 3) if all(isinstance(d, (int, float)) for d in durations) else None,
        "cases_selected": len(ids),
        "interrupted": interrupted,
        "command": command or None,
        "spec": first["run"].get("spec"),
        "pid": None,
        "merged": {
            "count": count,
            "rule": records[0]["rule"],
            "selection_sha256": records[0]["selection_sha256"],
            "missing_shards": missing_shards,
            "missing_cases": [sum(1 for w in where if w == k) for k in missing_shards],
            "gated": gated,
            "notes": _notes(shards, by_index, docs),
            "shards": [_shard_facts(shards[by_index[k]][0], docs[by_index[k]], records[by_index[k]])
                       for k in order],
        },
    }
    run = {k: v for k, v in run.items() if v is not None or k in ("interrupted", "command", "spec", "pid",
                                                                   "duration_s")}
    complete = all(d["complete"] for d in docs) and not missing_shards
    return build_document(first["kernel"], run, cases, complete, env=first["environment"], selected=list(ids))


def _shard_facts(source: str, doc: Mapping[str, Any], record: Mapping[str, Any]) -> dict[str, Any]:
    run = doc["run"]
    return {"index": record["index"], "source": source, "complete": doc["complete"],
            "cases": len(doc["cases"]), "expected_cost": record["costs"][record["index"] - 1],
            **{k: run.get(k) for k in ("started", "finished", "duration_s", "workers", "worker_threads", "command",
                                       "spec", "pid", "interrupted")},
            "environment": doc["environment"]}


def _notes(shards: Sequence[tuple[str, Mapping[str, Any]]], by_index: Mapping[int, int],
           docs: Sequence[Mapping[str, Any]]) -> list[str]:
    """Differences between shards that do not make them another run, but that a reader should know."""
    notes = []
    order = sorted(by_index)
    for key in _ENV_NOTED:
        seen: dict[str, list[int]] = {}
        for k in order:
            v = docs[by_index[k]]["environment"].get(key)
            seen.setdefault(_short(v), []).append(k)
        if len(seen) > 1:
            parts = "; ".join(f"{v} on shard(s) {', '.join(map(str, ks))}" for v, ks in seen.items())
            notes.append(f"the shards ran with different environment.{key}: {parts} (each case was judged where "
                         "it ran; the case data come from NumPy's generators, whose streams NumPy may change "
                         "between versions)" if key in ("numpy",) else
                         f"the shards ran with different environment.{key}: {parts}")
    specs = {docs[by_index[k]]["run"].get("spec") for k in order}
    if len(specs) > 1:
        notes.append(f"the shards loaded the kernel from different specs ({', '.join(sorted(map(str, specs)))}); "
                     "their declarations are the same")
    return notes


def merged_lines(doc: Mapping[str, Any]) -> list[str]:
    """What a merge put together: the shards given, the shards missing and the cases they would have held."""
    m = (doc.get("run") or {}).get("merged")
    if not m:
        return []
    given = [s["index"] for s in m.get("shards", [])]
    selected = (doc.get("coverage") or {}).get("selected", "?")
    lines = [f"merge: {len(given)} of {m['count']} shard(s) of {selected} selected case(s) (selection sha256 "
             f"{m['selection_sha256'][:12]})"]
    for k, n in zip(m.get("missing_shards", []), m.get("missing_cases", [])):
        lines.append(f"merge: shard {k}/{m['count']} is missing: its {n} case(s) have no result; the merged run is "
                     "incomplete")
    for s in m.get("shards", []):
        if not s.get("complete", True):
            why = f"interrupted by {s['interrupted']}" if s.get("interrupted") else "incomplete"
            lines.append(f"merge: shard {s['index']}/{m['count']} ({s['source']}) is {why}")
    if m.get("gated"):
        lines.append(f"merge: the gate decisions of {len(m['gated'])} shard(s) were set aside (each judged only its "
                     "own cases); the gate judges the merged run when refnorm merge is given --profile or --baseline")
    lines += [f"note: {n}" for n in m.get("notes", [])]
    return lines
