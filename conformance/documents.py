"""Reading the documents refnorm writes: results files (also read as baselines) and peers files.

Every command that reads one (``refnorm report``, ``refnorm diff``, ``check --baseline``,
``gate --baseline-dir``, the pytest plugin's baselines, the peers file of a report folder)
reads it here, once, in this order:

1. the file: a regular file of at most MAX_BYTES, UTF-8 (RFC 8259 §8.1; a byte-order mark is
   ignored);
2. JSON (RFC 8259) with what Python's reader would let through refused: the literals NaN,
   Infinity and -Infinity (not JSON, §6), numbers that overflow a float (1e999), integers of more
   than MAX_DIGITS digits, duplicate keys in an object (§4: names "SHOULD be unique"; readers
   disagree on which one wins), nesting deeper than MAX_DEPTH;
3. lone surrogates (``"\\ud800"``: valid JSON, not encodable as UTF-8) replaced by U+FFFD in every
   string and key (conformance.text.clean), so no writer downstream meets them;
4. the JSON Schema of docs/results-schema.json (Draft 2020-12, the jsonschema package): a
   document it accepts is one every writer renders;
5. the rules a schema cannot state: case ids are unique, ``counts`` agrees with the cases'
   statuses, and a "conformant" verdict is backed by the cases (a verdict is never silently
   wrong, so a document that claims more than its cases show is refused).

Anything else raises DocumentError, which names the file, the field (as a JSON path such as
``cases[3].outputs[0].budget_used``, or a line and column where the text is not JSON) and what
is wrong; the command line turns it into exit status 2.
"""

from __future__ import annotations

import errno
import json
import os
import re
import stat
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable

from .text import clean, visible

__all__ = ["DocumentError", "Kind", "RESULTS", "PEERS", "read", "loads", "check", "json_path",
           "SCHEMA_PATH", "MAX_BYTES", "MAX_DEPTH", "MAX_DIGITS"]

#: The schema of results documents (and, under $defs/peers, of peers files).
SCHEMA_PATH = Path(__file__).resolve().parents[1] / "docs" / "results-schema.json"

#: Largest file read. An exhaustive-tier run of every op and dtype is about 15 MB, its peers
#: file about three times that; a larger file is not one refnorm wrote.
MAX_BYTES = 256 * 2**20
#: Deepest nesting of arrays and objects accepted (a results document nests about 8 deep, a
#: peers file, which holds results documents, about 12).
MAX_DEPTH = 64
#: Longest integer literal accepted (Python refuses to convert more than 4300 digits by default).
MAX_DIGITS = 400


class DocumentError(ValueError):
    """A document that cannot be used: which file, which field (JSON path, or '' for the whole
    file), and what is wrong with it."""

    def __init__(self, source: str, field: str, problem: str):
        self.source, self.field, self.problem = str(source), field, problem
        super().__init__(str(self))

    def __str__(self) -> str:
        src = visible(self.source)  # a path may hold control characters too
        where = f"{src}: {self.field}" if self.field else src
        return f"{where}: {self.problem}"


@dataclass(frozen=True)
class Kind:
    """A kind of document: its ``schema`` value and version, where its JSON Schema is in the schema
    file, and what to call it in messages."""

    name: str
    schema: str
    version: int
    pointer: str
    label: str


RESULTS = Kind("results", "refnorm.results", 1, "", "refnorm results file")
PEERS = Kind("peers", "refnorm.peers", 1, "/$defs/peers", "refnorm peers file")


# ---------------------------------------------------------------------------------------- reading
def read(path: str | os.PathLike, kind: Kind = RESULTS) -> dict[str, Any]:
    """Read and check the document at ``path`` (see the module docstring); raise DocumentError."""
    source = os.fspath(path)
    return loads(_read_bytes(source, kind), source, kind)


def _read_bytes(source: str, kind: Kind) -> bytes:
    try:
        st = os.stat(source)
        if stat.S_ISDIR(st.st_mode):
            raise DocumentError(source, "", f"is a directory, expected a {kind.label}")
        if not stat.S_ISREG(st.st_mode):
            raise DocumentError(source, "", "is not a regular file (a device, pipe or socket)")
        if st.st_size > MAX_BYTES:
            raise DocumentError(source, "", f"is {st.st_size:,} bytes; refnorm reads documents of at most "
                                f"{MAX_BYTES:,} bytes")
        with open(source, "rb") as f:
            data = f.read(MAX_BYTES + 1)
    except DocumentError:
        raise
    except FileNotFoundError:
        raise DocumentError(source, "", "does not exist") from None
    except PermissionError:
        raise DocumentError(source, "", "cannot be read: permission denied") from None
    except OSError as e:
        if e.errno == errno.ENAMETOOLONG:
            raise DocumentError(_short(source), "", "the file name is too long for this system") from None
        raise DocumentError(_short(source), "", f"cannot be read: {e.strerror or e}") from None
    except ValueError as e:  # an embedded NUL in the path
        raise DocumentError(_short(source), "", f"is not a usable path: {e}") from None
    if len(data) > MAX_BYTES:
        raise DocumentError(source, "", f"is larger than {MAX_BYTES:,} bytes")
    return data


def _short(source: str, limit: int = 160) -> str:
    s = visible(source)
    return s if len(s) <= limit else f"{s[:limit // 2]}…{s[-limit // 2:]} ({len(source)} characters)"


def loads(data: bytes | str, source: str = "<document>", kind: Kind = RESULTS) -> dict[str, Any]:
    """Parse and check a document given as bytes (UTF-8) or text; ``source`` names it in errors."""
    if isinstance(data, bytes):
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError as e:
            line, col = _line_col(data[:e.start].decode("utf-8", "replace"), e.start)
            raise DocumentError(source, "", f"is not UTF-8 text (byte 0x{data[e.start]:02x} at line {line}, "
                                f"column {col}); refnorm writes its documents as UTF-8") from None
    else:
        text = data
    if text.startswith("\ufeff"):
        text = text[1:]
    doc = _parse(text, source)
    return check(doc, source, kind)


def _line_col(prefix: str, pos: int) -> tuple[int, int]:
    line = prefix.count("\n") + 1
    return line, len(prefix) - (prefix.rfind("\n") + 1) + 1


class _Refused:
    """A value the JSON text holds that refnorm refuses; found again by its path."""

    def __init__(self, what: str):
        self.what = what


class _Strict(Exception):
    pass


def _strict_hooks(mark: bool) -> dict[str, Any]:
    """json.loads hooks that refuse NaN/Infinity, float overflow, long integers and duplicate keys:
    by raising (mark=False, the fast path) or by leaving a _Refused marker (mark=True, to find where)."""

    def refuse(what: str) -> Any:
        if mark:
            return _Refused(what)
        raise _Strict(what)

    def constant(name: str) -> Any:
        return refuse(f"{name} is not a JSON number (RFC 8259 §6); non-finite floats are written as the "
                      f"strings \"inf\", \"-inf\" and \"nan\"")

    def number(text: str) -> Any:
        v = float(text)
        if v != v or v in (float("inf"), float("-inf")):
            return refuse(f"the number {text[:40]} is out of the range of a float")
        return v

    def integer(text: str) -> Any:
        if len(text) > MAX_DIGITS:
            return refuse(f"an integer of {len(text)} digits (at most {MAX_DIGITS})")
        return int(text)

    def pairs(items: list[tuple[str, Any]]) -> Any:
        d = dict(items)
        if len(d) != len(items):
            seen: set[str] = set()
            dup = next(k for k, _ in items if k in seen or seen.add(k))
            if not mark:
                raise _Strict("duplicate key")
            d[dup] = _Refused(f"the key {_describe(dup)} appears more than once in this object (RFC 8259 §4)")
        return d

    return {"parse_constant": constant, "parse_float": number, "parse_int": integer, "object_pairs_hook": pairs}


_HOOKS = _strict_hooks(False)
_MARKING_HOOKS = _strict_hooks(True)
_LONE_ESCAPE = re.compile(r"\\u[dD][89a-fA-F]")


def _parse(text: str, source: str) -> Any:
    try:
        doc = json.loads(text, **_HOOKS)
    except json.JSONDecodeError as e:
        raise DocumentError(source, "", f"is not JSON: {e.msg} at line {e.lineno}, column {e.colno}") from None
    except RecursionError:
        line, col = _deep_point(text)
        raise DocumentError(source, "", f"nests arrays or objects deeper than {MAX_DEPTH} levels (at line {line}, "
                            f"column {col})") from None
    except (_Strict, ValueError):
        try:
            marked = json.loads(text, **_MARKING_HOOKS)
        except RecursionError:  # pragma: no cover - the first parse would have said so
            line, col = _deep_point(text)
            raise DocumentError(source, "", f"nests arrays or objects deeper than {MAX_DEPTH} levels") from None
        found = _first(marked, lambda v: isinstance(v, _Refused))
        if found is None:  # pragma: no cover - every refusal leaves a marker
            raise DocumentError(source, "", "is not JSON that refnorm reads") from None
        path, marker = found
        raise DocumentError(source, json_path(path), marker.what) from None
    return _tidy(doc, source, clean_strings=bool(_LONE_ESCAPE.search(text)))


def _deep_point(text: str) -> tuple[int, int]:
    """Line and column of the first bracket that opens level MAX_DEPTH + 1 (strings skipped)."""
    depth, in_str, esc = 0, False, False
    for i, ch in enumerate(text):
        if in_str:
            if esc:
                esc = False
            elif ch == "\\":
                esc = True
            elif ch == '"':
                in_str = False
        elif ch == '"':
            in_str = True
        elif ch in "[{":
            depth += 1
            if depth > MAX_DEPTH:
                return _line_col(text[:i], i)
        elif ch in "]}":
            depth -= 1
    return _line_col(text, len(text))


def _tidy(doc: Any, source: str, clean_strings: bool) -> Any:
    """Check the nesting depth and, when the text holds surrogate escapes, clean every string (iteratively)."""
    if clean_strings and isinstance(doc, str):
        return clean(doc)
    stack: list[tuple[Any, tuple]] = [(doc, ())]
    while stack:
        node, path = stack.pop()
        if len(path) >= MAX_DEPTH:
            raise DocumentError(source, json_path(path), f"nests arrays or objects deeper than {MAX_DEPTH} levels")
        if isinstance(node, dict):
            if clean_strings and any(clean(k) != k for k in node):
                items = [(clean(k), v) for k, v in node.items()]
                node.clear()
                node.update(items)
            for k, v in node.items():
                if isinstance(v, str):
                    if clean_strings:
                        node[k] = clean(v)
                elif isinstance(v, (dict, list)):
                    stack.append((v, path + (k,)))
        elif isinstance(node, list):
            for i, v in enumerate(node):
                if isinstance(v, str):
                    if clean_strings:
                        node[i] = clean(v)
                elif isinstance(v, (dict, list)):
                    stack.append((v, path + (i,)))
    return doc


def _first(doc: Any, pred) -> tuple[tuple, Any] | None:
    """The first value (in document order) for which pred holds, with its path."""
    stack: list[tuple[Any, tuple]] = [(doc, ())]
    while stack:
        node, path = stack.pop()
        if pred(node):
            return path, node
        if isinstance(node, dict):
            stack += [(v, path + (k,)) for k, v in reversed(list(node.items()))]
        elif isinstance(node, list):
            stack += [(v, path + (i,)) for i, v in reversed(list(enumerate(node)))]
    return None


# ---------------------------------------------------------------------------------------- checking
def check(doc: Any, source: str = "<document>", kind: Kind = RESULTS) -> dict[str, Any]:
    """Check a parsed document against its schema and the rules below it; return it unchanged."""
    what = kind.label
    if not isinstance(doc, dict):
        raise DocumentError(source, "", f"expected a JSON object (a {what}), found {_describe(doc)}")
    if doc.get("schema") != kind.schema:
        raise DocumentError(source, "schema", f"not a {what} (schema is {_describe(doc.get('schema'))}, "
                            f"expected {kind.schema!r})")
    if doc.get("schema_version") != kind.version:
        raise DocumentError(source, "schema_version", f"{kind.name} schema version "
                            f"{_describe(doc.get('schema_version'))}; this refnorm reads version {kind.version}")
    err = _schema_error(doc, kind)
    if err is not None:
        raise DocumentError(source, *err)
    if kind is RESULTS:
        _rules(doc, source, ())
    else:
        for i, lib in enumerate(doc["libraries"]):
            for j, r in enumerate(lib.get("runs") or []):
                _rules(r["doc"], source, ("libraries", i, "runs", j, "doc"))
    return doc


def _rules(doc: dict[str, Any], source: str, at: tuple) -> None:
    """What the schema cannot state: unique case ids, counts that agree, a verdict the cases back."""
    from .results import STATUSES, case_results, verdict

    seen: dict[str, int] = {}
    for i, c in enumerate(doc["cases"]):
        if c["id"] in seen:
            raise DocumentError(source, json_path(at + ("cases", i, "id")),
                                f"duplicate case id {_describe(c['id'])} (also cases[{seen[c['id']]}].id)")
        seen[c["id"]] = i
    for s in STATUSES:
        n = sum(1 for c in doc["cases"] if c["status"] == s)
        if doc["counts"].get(s, 0) != n:  # "inconclusive" is absent from documents written before it
            raise DocumentError(source, json_path(at + ("counts", s)),
                                f"is {doc['counts'].get(s, 0)}, but {n} case(s) have status {s!r}")
    if doc["verdict"] == "conformant":
        v = verdict(case_results(doc), bool(doc["complete"]))
        if v != "conformant":
            raise DocumentError(source, json_path(at + ("verdict",)),
                                f"says 'conformant', but the cases and 'complete' give {v!r}")


_VALIDATORS: dict[str, Any] = {}


def _validator(kind: Kind):
    if kind.name not in _VALIDATORS:
        try:
            from jsonschema import Draft202012Validator
        except ImportError:  # pragma: no cover - a dependency of the harness and report extras
            raise DocumentError(str(SCHEMA_PATH), "", "cannot check documents: the jsonschema package is not "
                                "installed (pip install 'refnorm[harness]')") from None
        try:
            schema = json.loads(SCHEMA_PATH.read_text(encoding="utf-8"))
        except OSError as e:  # pragma: no cover - an installation without the schema
            raise DocumentError(str(SCHEMA_PATH), "", f"the results schema cannot be read: {e}") from None
        target = _resolve(schema, kind.pointer)
        _VALIDATORS[kind.name] = Draft202012Validator(_inline(target, schema))
    return _VALIDATORS[kind.name]


def _resolve(schema: dict[str, Any], pointer: str) -> Any:
    node: Any = schema
    for part in pointer.split("/")[1:]:
        node = node[part.replace("~1", "/").replace("~0", "~")]
    return node


def _inline(node: Any, root: dict[str, Any]) -> Any:
    """The schema with its local references ("#", "#/$defs/...") replaced by what they point to.

    The schema file names each definition once; validation of an inlined copy skips the reference
    lookups, which are most of the cost on a results file's tens of thousands of numbers. The schema
    has no recursive reference (a peers file's "#" is the results schema, which never refers back).
    """
    if isinstance(node, dict):
        ref = node.get("$ref")
        if isinstance(ref, str) and ref.startswith("#"):
            target = _inline(_resolve(root, ref[1:]), root)
            if isinstance(target, dict):
                target = {k: v for k, v in target.items() if k not in ("$defs", "$id", "$schema")}
            rest = {k: _inline(v, root) for k, v in node.items() if k != "$ref"}
            if not set(rest) - {"description"}:
                return target
            return {"allOf": [target], **rest}
        return {k: _inline(v, root) for k, v in node.items() if k != "$defs"}
    if isinstance(node, list):
        return [_inline(v, root) for v in node]
    return node


def _schema_error(doc: dict[str, Any], kind: Kind) -> tuple[str, str] | None:
    from jsonschema.exceptions import best_match

    v = _validator(kind)
    err = best_match(v.iter_errors(doc))
    if err is None:
        return None
    return _explain(err)


def _explain(err) -> tuple[str, str]:
    """(JSON path, problem) of a jsonschema ValidationError, in refnorm's words."""
    path = tuple(err.absolute_path)
    kw, want, inst = err.validator, err.validator_value, err.instance
    if kw == "required":
        missing = [k for k in want if isinstance(inst, dict) and k not in inst]
        return json_path(path + (missing[0] if missing else "?",)), "required field is missing"
    if kw == "additionalProperties":
        extra = [k for k in inst if k not in (err.schema.get("properties") or {})] if isinstance(inst, dict) else []
        return json_path(path + (extra[0],) if extra else path), "field not allowed here"
    if kw == "propertyNames":
        return json_path(path), f"key {_describe(inst)} is not allowed here"
    if kw == "type":
        types = [want] if isinstance(want, str) else list(want)
        return json_path(path), f"expected {' or '.join(_TYPE_WORDS.get(t, t) for t in types)}, found {_describe(inst)}"
    if kw == "enum":
        return json_path(path), f"expected one of {', '.join(json.dumps(w) for w in want)}, found {_describe(inst)}"
    if kw == "const":
        return json_path(path), f"expected {json.dumps(want)}, found {_describe(inst)}"
    if kw in _BOUND_WORDS:
        return json_path(path), f"{_describe(inst)} {_BOUND_WORDS[kw]} {want}"
    if kw in ("minItems", "maxItems"):
        n = len(inst) if isinstance(inst, list) else "?"
        return json_path(path), f"expected {'at least' if kw == 'minItems' else 'at most'} {want} item(s), found {n}"
    if kw == "pattern" and want in _NUM_PATTERNS:
        return json_path(path), f"expected {_NUM_PATTERNS[want]}, found {_describe(inst)}"
    if kw == "pattern":
        return json_path(path), f"{_describe(inst)} does not match the pattern {want}"
    if kw in ("anyOf", "oneOf"):
        return json_path(path), f"{_describe(inst)} is none of the allowed forms"
    return json_path(path), visible(err.message)[:200]


_NUM_PATTERNS = {"^(inf|-inf|nan)$": 'a number or one of the strings "inf", "-inf", "nan"',
                 "^(inf|nan)$": 'a number >= 0 or one of the strings "inf", "nan"'}
_TYPE_WORDS = {"object": "an object", "array": "an array", "string": "a string", "integer": "an integer",
               "number": "a number", "boolean": "true or false", "null": "null"}
_BOUND_WORDS = {"minimum": "is less than the minimum", "maximum": "is more than the maximum",
                "exclusiveMinimum": "is not more than", "exclusiveMaximum": "is not less than"}


def _describe(v: Any, limit: int = 60) -> str:
    """A short, printable description of a found value."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if v is None:
        return "null"
    if isinstance(v, dict):
        return "an object"
    if isinstance(v, list):
        return f"an array of {len(v)}"
    if isinstance(v, str):
        s = json.dumps(v[:limit]) + ("…" if len(v) > limit else "")
        return f"the string {s}"
    s = repr(v)
    return s if len(s) <= limit else s[:limit] + "…"


_IDENT = re.compile(r"[A-Za-z_][A-Za-z0-9_]*\Z")


def json_path(parts: Iterable[Any]) -> str:
    """``cases[3].outputs[0].budget_used``; keys that are not identifiers as ``["..."]`` (JSON-quoted)."""
    out = ""
    for p in parts:
        if isinstance(p, int):
            out += f"[{p}]"
        elif _IDENT.match(p):
            out += f".{p}" if out else p
        else:
            q = json.dumps(p[:40]) + ("…" if len(p) > 40 else "")
            out += f"[{q}]"
    return out
