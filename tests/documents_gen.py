"""Hypothesis strategies for the documents refnorm reads, built from docs/results-schema.json itself.

``instances(schema)`` draws a JSON value that the (sub)schema accepts: it interprets the keywords the
schema uses (JSON Schema 2020-12: $ref, const, enum, type, properties, required,
additionalProperties, propertyNames, items, minItems/maxItems, minimum/maximum,
exclusiveMinimum, pattern, anyOf/oneOf, allOf with if/then). Strings come from a pool of
hostile text (markup, script and image injection, control characters, lone surrogates,
bidirectional overrides, long names) mixed with arbitrary text, so a document that the schema
accepts is also an attack on every writer.

``results_documents()`` links what the schema cannot (summary rows that name cases of the
document, peers files made for its cases, counts that agree with the statuses) so that the
renderers' deep paths run; ``peers_documents(doc)`` does the same for a peers file;
``hostile(doc)`` turns a document's JSON text into a malformed or hostile one, recording what
was changed and where. The package hypothesis-jsonschema would do the first part; it is not a
dependency, and the subset of keywords here is small.
"""

from __future__ import annotations

import copy
import json
import math
import re
from dataclasses import dataclass
from typing import Any

from hypothesis import HealthCheck, Phase, settings
from hypothesis import strategies as st

from conformance.documents import SCHEMA_PATH

SCHEMA: dict[str, Any] = json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))


def generated(n: int) -> settings:
    """Exactly ``n`` generated inputs, the same ones on every machine (derandomize), no deadline, and no
    shrinking: a failing document is reported as generated (shrinking documents this large takes
    minutes), and the same seed gives it again."""
    return settings(max_examples=n, deadline=None, derandomize=True, database=None, phases=[Phase.generate],
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.filter_too_much, HealthCheck.large_base_example])

#: Text that means something to some writer: HTML and Markdown injection (OWASP XSS filter evasion
#: cheat sheet, common practice), folding and table breakers, GitHub math, terminal escapes (ECMA-48),
#: NUL, a lone surrogate (RFC 8259 §8.2), bidirectional overrides (CVE-2021-42574), XML-forbidden
#: characters (XML 1.0 §2.2), mathtext, and names longer than a file name may be (255 bytes).
HOSTILE = (
    "<script>alert(1)</script>",
    '<img src=x onerror="alert(1)">',
    "<svg onload=alert(1)>",
    "[click](javascript:alert(1))",
    "![pixel](https://tracker.invalid/p.png)",
    "<https://tracker.invalid/x>",
    "</details><details open>",
    "</code></sub>",
    "\n</details>\n\n# heading",
    "a | b | c",
    "`tick` ``double``",
    "**bold** _em_ ~~strike~~",
    "$\\frac{1}{0}$ $x$",
    "- item",
    "1. item",
    "> quote",
    "&amp; &lt; &#x3c;",
    "\"quoted\" 'single' `",
    "\x1b[31mred\x1b[0m\x1b]0;title\x07",
    "nul\x00byte",
    "cr\roverwrite",
    "lone \ud800 surrogate",
    "\udfff",
    "rtl \u202eevil\u202c",
    "\ufffe\uffff",
    "tab\tand\u2028line",
    "\\",
    "k" * 300,
    "é" * 150,
    "../../etc/passwd",
    "C:\\con\\nul",
    "",
)

_TEXT = st.text(st.characters(codec=None, exclude_categories=()), max_size=8)


def hostile_text() -> st.SearchStrategy[str]:
    return st.one_of(st.sampled_from(HOSTILE), _TEXT,
                     st.tuples(_TEXT, st.sampled_from(HOSTILE), _TEXT).map("".join))


def _resolve(ref: str) -> Any:
    node: Any = SCHEMA
    for part in ref.lstrip("#").split("/")[1:]:
        node = node[part]
    return node


def _deref(schema: Any) -> Any:
    while isinstance(schema, dict) and "$ref" in schema:
        rest = {k: v for k, v in schema.items() if k not in ("$ref", "description")}
        schema = {**_resolve(schema["$ref"]), **rest}
    return schema


_SCALAR = st.one_of(st.none(), st.booleans(), st.integers(-10, 10),
                    st.floats(allow_nan=False, allow_infinity=False), hostile_text())
#: Any small JSON value, for places the schema leaves open.
_ANY_JSON = st.one_of(_SCALAR, st.lists(_SCALAR, max_size=2), st.dictionaries(hostile_text(), _SCALAR, max_size=2))
_CACHE: dict[str, st.SearchStrategy] = {}


def instances(schema: Any, max_items: int = 3) -> st.SearchStrategy:
    """A strategy for JSON values the (sub)schema accepts (built once per subschema and cached)."""
    key = json.dumps([schema, max_items], sort_keys=True, default=str)
    if key not in _CACHE:
        _CACHE[key] = _build(_deref(schema), max_items)
    return _CACHE[key]


def _split_on_if(schema: dict[str, Any]) -> list[dict[str, Any]] | None:
    """An object schema whose allOf holds if/then on one enumerated property (the case's op), as one
    plain schema per value of that property."""
    conds = [c for c in schema.get("allOf", []) if "if" in c]
    if not conds:
        return None
    keys = {k for c in conds for k in c["if"].get("properties", {})}
    assert len(keys) == 1, "if-conditions on one property only"
    (key,) = keys
    values = _deref(schema["properties"][key])["enum"]
    out = []
    for v in values:
        props = dict(schema["properties"])
        props[key] = {"const": v}
        required = list(schema.get("required", []))
        for c in conds:
            sub = c["if"]["properties"][key]
            if ("const" in sub and v == sub["const"]) or ("enum" in sub and v in sub["enum"]):
                for k, extra in c["then"].get("properties", {}).items():
                    props[k] = {**_deref(props.get(k, {})), **extra}
                required += [k for k in c["then"].get("required", []) if k not in required]
        rest = {k: x for k, x in schema.items() if k not in ("allOf", "properties", "required")}
        out.append({**rest, "properties": props, "required": required})
    return out


def _build(schema: Any, max_items: int) -> st.SearchStrategy:
    if schema is True or schema == {} or (isinstance(schema, dict) and set(schema) <= {"description"}):
        return _ANY_JSON
    if "const" in schema:
        return st.just(schema["const"]).map(copy.deepcopy)
    if "enum" in schema:
        return st.sampled_from(schema["enum"]).map(copy.deepcopy)
    for key in ("anyOf", "oneOf"):
        if key in schema:
            rest = {k: v for k, v in schema.items() if k != key}
            return st.one_of([instances({**rest, **_deref(b)}, max_items) for b in schema[key]])
    split = _split_on_if(schema)
    if split is not None:
        return st.one_of([instances(v, max_items) for v in split])
    types = schema.get("type")
    if types is None:
        types = "object" if "properties" in schema else ("array" if "items" in schema else None)
    if types is None:
        return _ANY_JSON
    if isinstance(types, list):
        return st.one_of([instances({**schema, "type": t}, max_items) for t in types])
    t = types
    if t == "object":
        return _object(schema, max_items)
    if t == "array":
        lo = schema.get("minItems", 0)
        hi = min(schema.get("maxItems", lo + max_items), lo + max_items)
        return st.lists(instances(schema.get("items", True), max_items), min_size=lo, max_size=hi)
    if t == "string":
        if "pattern" in schema:
            return st.from_regex(schema["pattern"], fullmatch=True)
        return hostile_text()
    if t == "integer":
        lo, hi = schema.get("minimum", -(2 ** 62)), schema.get("maximum", 2 ** 62)
        edge = [v for v in (lo, hi, 0, 1, 2) if lo <= v <= hi]
        return st.one_of(st.sampled_from(edge), st.integers(lo, min(hi, lo + 100)), st.integers(lo, hi))
    if t == "number":
        lo = schema.get("minimum", schema.get("exclusiveMinimum"))
        excl = "exclusiveMinimum" in schema
        xs = st.one_of(st.sampled_from([1e308, 1.7976931348623157e308, 5e-324, 1e-300, 0.0, 1.0, 0.5, 1.5, 1e300,
                                        -1.0, -1e308]),
                       st.floats(allow_nan=False, allow_infinity=False))
        if lo is None:
            return xs

        def bounded(x: float) -> float:
            if x < lo or (excl and x <= lo):
                x = abs(x) + max(lo, 0.0) + (1.0 if excl else 0.0)
            if x < lo or (excl and x <= lo) or not math.isfinite(x):
                x = float(lo) + 1.0
            return x

        return xs.map(bounded)
    if t == "boolean":
        return st.booleans()
    if t == "null":
        return st.none()
    raise AssertionError(f"schema type {t!r} not handled")


def _object(schema: dict[str, Any], max_items: int) -> st.SearchStrategy:
    props = schema.get("properties", {})
    required = set(schema.get("required", []))
    fixed = st.fixed_dictionaries({k: instances(v, max_items) for k, v in props.items() if k in required},
                                  optional={k: instances(v, max_items) for k, v in props.items() if k not in required})
    extra = schema.get("additionalProperties", True)
    if extra is False:
        return fixed
    keys = (st.from_regex(schema["propertyNames"]["pattern"], fullmatch=True) if "propertyNames" in schema
            else hostile_text().filter(lambda k: k not in props))
    values = instances(extra, max_items) if isinstance(extra, dict) else _ANY_JSON
    extras = st.dictionaries(keys, values, max_size=3 if isinstance(extra, dict) else 1)
    return st.tuples(extras, fixed).map(lambda kv: {**kv[0], **kv[1]})


# ------------------------------------------------------------------------------------- documents
def _statuses_fixed(doc: dict[str, Any]) -> None:
    """Make counts, ids and the verdict agree with the cases (conformance.documents' rules)."""
    from conformance.results import STATUSES, case_results, verdict

    seen: set[str] = set()
    for i, c in enumerate(doc["cases"]):
        while c["id"] in seen:
            c["id"] = f"{c['id']}#{i}"
        seen.add(c["id"])
    for s in STATUSES:
        doc["counts"][s] = sum(1 for c in doc["cases"] if c["status"] == s)
    if doc["verdict"] == "conformant":
        doc["verdict"] = verdict(case_results(doc), bool(doc["complete"]))


#: The results schema with its cases left to results_documents (drawn there, so not twice).
_WITHOUT_CASES = {**SCHEMA, "properties": {**SCHEMA["properties"], "cases": {"type": "array", "maxItems": 0}}}


#: The ops whose case shape the schema asks to have a channel axis (its case_fields' if/then on op).
_CHANNEL_OPS = tuple(op for c in _resolve("#/$defs/case_fields").get("allOf", [])
                     if c["then"].get("properties", {}).get("shape", {}).get("minItems") == 2
                     for op in c["if"]["properties"]["op"].get("enum", [c["if"]["properties"]["op"].get("const")]))


@st.composite
def results_documents(draw, link: bool = True) -> dict[str, Any]:
    """A results document the schema accepts; with ``link``, one shaped like a run's: one to three
    cases, most with outputs, a summary that names them (half the time the runner's own summary),
    and case ops that match the kernel's."""
    from conformance.results import case_results, summarize

    doc = draw(instances(_WITHOUT_CASES if link else SCHEMA, max_items=2))
    if link:
        doc["cases"] = draw(st.lists(instances(_resolve("#/$defs/case"), max_items=2), min_size=1, max_size=3))
        for c in doc["cases"]:
            if not c["outputs"] and draw(st.integers(0, 3)):
                c["outputs"] = draw(st.lists(instances(_resolve("#/$defs/output"), max_items=2), min_size=1,
                                             max_size=2))
            if draw(st.booleans()):
                c["case"]["op"] = doc["kernel"]["op"]
                if c["case"]["op"] in _CHANNEL_OPS and len(c["case"]["shape"]) < 2:
                    c["case"]["shape"] = c["case"]["shape"] + [2]
                if c["case"]["op"] == "group_norm" and c["case"].get("groups", 0) < 1:
                    c["case"]["groups"] = 1
        if draw(st.booleans()):
            doc["summary"] = json.loads(json.dumps(summarize(case_results(doc))))
        else:
            for r in doc["summary"]:
                if draw(st.booleans()):
                    c = doc["cases"][draw(st.integers(0, len(doc["cases"]) - 1))]
                    r["worst_case"] = c["id"]
                    if c["outputs"] and draw(st.booleans()):
                        r["output"] = c["outputs"][0]["name"]
    _statuses_fixed(doc)
    return doc


@st.composite
def peers_documents(draw, doc: dict[str, Any], link: bool = True) -> dict[str, Any]:
    """A peers file the schema accepts; with ``link``, made for ``doc`` (its op, seed and ran cases),
    and each library that ran has a run over ``doc``'s cases with metrics of its own, so that the
    comparison table has rows."""
    peers = draw(instances(_resolve("#/$defs/peers"), max_items=2))
    for lib in peers["libraries"]:
        for r in lib.get("runs") or []:
            _statuses_fixed(r["doc"])
    if link:
        peers["op"] = doc["kernel"]["op"]
        peers["seed"] = doc["run"]["seed"]
        peers["case_ids"] = [c["id"] for c in doc["cases"] if c["status"] != "skipped"]
        outputs = instances(_resolve("#/$defs/output"), max_items=2)
        if not any(lib["status"] in ("ran", "incomplete") for lib in peers["libraries"]):
            peers["libraries"].append({"name": draw(hostile_text()), "status": "ran"})
        for lib in peers["libraries"]:
            if lib["status"] in ("ran", "incomplete") and not lib.get("runs"):
                lib["runs"] = [draw(instances(_resolve("#/$defs/peers")["properties"]["libraries"]["items"]
                                              ["properties"]["runs"]["items"], max_items=1))]
            for r in lib.get("runs") or []:
                r["doc"]["cases"] = copy.deepcopy(doc["cases"])
                for c in r["doc"]["cases"]:
                    for o in c["outputs"]:
                        if draw(st.booleans()):
                            o.update({k: v for k, v in draw(outputs).items() if k != "name"})
                _statuses_fixed(r["doc"])
    return peers


# ------------------------------------------------------------------------------------- mutations
@dataclass
class Mutation:
    """What ``hostile`` did: its kind, the JSON path it changed (None for a change of the text),
    and the resulting bytes."""

    kind: str
    path: tuple | None
    data: bytes


def _paths(node: Any, path: tuple = ()) -> list[tuple]:
    out = [path]
    if isinstance(node, dict):
        for k, v in node.items():
            out += _paths(v, path + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            out += _paths(v, path + (i,))
    return out


def _get(node: Any, path: tuple) -> Any:
    for p in path:
        node = node[p]
    return node


def _dump(doc: Any) -> bytes:
    return json.dumps(doc, allow_nan=False).encode("utf-8")


_WRONG = (None, True, 0, -1, 2.5, "", "x", "nan", "12x96", [], {}, [None], {"": None})


#: What ``hostile`` can do: to the document, then (``text:...``) to its JSON text.
KINDS = ("delete", "retype", "string", "semantic")
TEXT_KINDS = ("truncate", "nan", "overflow", "digits", "deep", "duplicate_key", "bytes", "bom", "toplevel", "empty",
              "surrogate")
ALL_KINDS = KINDS + tuple(f"text:{k}" for k in TEXT_KINDS)


@st.composite
def hostile(draw, doc: dict[str, Any], kind: str | None = None) -> Mutation:
    """A malformed or hostile variant of ``doc``'s JSON text; ``kind`` (one of ALL_KINDS) or drawn."""
    if kind is None:
        kind = draw(st.sampled_from(ALL_KINDS))
    how = kind[5:] if kind.startswith("text:") else None
    kind = "text" if how else kind
    if kind == "semantic" and "counts" not in doc:  # a peers file: its rules are those of its results
        kind = "retype"
    doc = copy.deepcopy(doc)
    paths = _paths(doc)
    if kind == "delete":
        cands = [p for p in paths if p and isinstance(_get(doc, p[:-1]), dict)]
        p = draw(st.sampled_from(cands))
        del _get(doc, p[:-1])[p[-1]]
        return Mutation(kind, p, _dump(doc))
    if kind == "retype":
        p = draw(st.sampled_from(paths))
        old = _get(doc, p)
        new = draw(st.sampled_from([w for w in _WRONG if type(w) is not type(old)]))
        if p:
            _get(doc, p[:-1])[p[-1]] = new
        else:
            doc = new
        return Mutation(kind, p, _dump(doc))
    if kind == "string":
        cands = [p for p in paths if isinstance(_get(doc, p), str)]
        if not cands:
            return Mutation("none", None, _dump(doc))
        p = draw(st.sampled_from(cands))
        _get(doc, p[:-1])[p[-1]] = draw(hostile_text())
        return Mutation(kind, p, _dump(doc))
    if kind == "semantic":
        what = draw(st.sampled_from(("count", "duplicate", "verdict")))
        if what == "count":
            s = draw(st.sampled_from(sorted(doc["counts"])))
            doc["counts"][s] += 1
            return Mutation("semantic", ("counts", s), _dump(doc))
        if what == "duplicate" and doc["cases"]:
            doc["cases"].append(copy.deepcopy(doc["cases"][0]))
            doc["counts"][doc["cases"][0]["status"]] += 1
            return Mutation("semantic", ("cases", len(doc["cases"]) - 1, "id"), _dump(doc))
        doc["verdict"] = "conformant"
        return Mutation("semantic", ("verdict",), _dump(doc))
    text = _dump(doc).decode("utf-8")
    if how == "truncate":
        cut = draw(st.integers(0, max(0, len(text) - 1)))
        return Mutation("text:truncate", None, text[:cut].encode("utf-8"))
    if how in ("nan", "overflow", "digits"):
        nums = [m for m in re.finditer(r'(?<=[:\[,])(-?\d+(\.\d+)?([eE][-+]?\d+)?)(?=[,\]}])', text)]
        if not nums:
            return Mutation("text:none", None, text.encode("utf-8"))
        m = draw(st.sampled_from(nums))
        lit = {"nan": draw(st.sampled_from(("NaN", "Infinity", "-Infinity"))), "overflow": "1e999",
               "digits": "9" * 5000}[how]
        return Mutation(f"text:{how}", None, (text[:m.start()] + lit + text[m.end():]).encode("utf-8"))
    if how == "deep":
        n = draw(st.sampled_from((65, 1000, 100_000)))
        return Mutation("text:deep", None, (text[:-1] + ', "deep": ' + "[" * n + "]" * n + "}").encode("utf-8"))
    if how == "duplicate_key":
        return Mutation("text:duplicate_key", None, (text[:-1] + ', "verdict": "conformant"}').encode("utf-8"))
    if how == "bytes":
        at = draw(st.integers(0, len(text)))
        raw = text.encode("utf-8")
        return Mutation("text:bytes", None, raw[:at] + draw(st.sampled_from((b"\xff", b"\xc3\x28", b"\xed\xa0\x80")))
                        + raw[at:])
    if how == "bom":
        return Mutation("text:bom", None, b"\xef\xbb\xbf" + text.encode("utf-8"))
    if how == "toplevel":
        return Mutation("text:toplevel", None, draw(st.sampled_from((b"[]", b"null", b'"results"', b"3", b"[{}]",
                                                                     b"true"))))
    if how == "empty":
        return Mutation("text:empty", None, draw(st.sampled_from((b"", b" \n", b"\x00"))))
    # a lone surrogate escape in some string: valid JSON, cleaned by the reader
    strs = [m for m in re.finditer(r'"(?:[^"\\]|\\.)*"', text)]
    m = draw(st.sampled_from(strs))
    return Mutation("text:surrogate", None, (text[:m.end() - 1] + "\\ud800" + text[m.end() - 1:]).encode("utf-8"))
