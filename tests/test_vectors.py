"""Portable test vectors (`refnorm export`, `refnorm score`, docs/vectors.md), from Python.

Outside references: the `.npy` layout is NumPy's (numpy.lib.format, "NPY format version 1.0"),
read back here with numpy.load and written with numpy.save; sha256 is FIPS 180-4 (hashlib);
manifests and results are validated with the jsonschema package (JSON Schema draft 2020-12);
JUnit XML is parsed with xml.etree. A perfect target returns the expected values rounded to
nearest in each output's format: its error is at most u |x| (normal range) or half the smallest
subnormal (IEEE 754-2019 §4.3.1, round to nearest; Higham 2002, Theorem 2.2), which every
derived bound holds as its final rounding term (docs/tolerances.md), so it passes with 0 ULP.
Adjacent bit patterns of a binary floating-point format of the same sign are adjacent values
(IEEE 754-2019 §3.4), so adding k to the pattern of a finite nonzero value moves it k ULPs away
from zero.
"""

from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, event, given, seed, settings
from hypothesis import strategies as st

from conformance import dtypes, ops
from conformance.cases import find_case
from conformance.cases.generators import make_inputs
from conformance.cli import main
from conformance.kernel import Precision
from conformance.vectors.manifest import EXPORTABLE_OPS, SCHEMA, VectorsError, load_manifest, parse_manifest
from conformance.vectors.npy import LIMITS, NpyError, decode, encode, read_npy, stored_dtype, write_npy

ROOT = Path(__file__).resolve().parents[1]
jsonschema = pytest.importorskip("jsonschema")
RESULTS_SCHEMA = json.loads((ROOT / "docs" / "results-schema.json").read_text())

# One declaration per family, each small (the smoke tier): what the command line writes.
TARGETS = {
    # layer norm with bfloat16 storage and float32 statistics: bit patterns on disk
    "ln_bf16": ["--op", "layer_norm", "--dtype", "bfloat16", "--tier", "smoke", "--precision", "params=float32",
                "--conventions", "saved=mean+rstd"],
    # batch norm with float16 storage, float32 parameters, running statistics updated in place
    "bn_f16": ["--op", "batch_norm", "--dtype", "float16", "--tier", "smoke", "--precision",
               "params=float32,accumulate=float32", "--conventions", "saved=mean+rstd,running=inplace"],
    # group norm in float8 (e4m3fn): one byte per element, no infinities
    "gn_f8": ["--op", "group_norm", "--dtype", "float8_e4m3fn", "--case",
              "group_norm/float8_e4m3fn/channels_first/4x6x5x5/groups=3/normal/w=random/b=random/eps=1e-05/train/contiguous",
              "--precision", "params=float32,accumulate=float32"],
    # RMS norm, backward only: the saved rstd is an input (the oracle's, rounded, as check gives it)
    "rms_bwd": ["--op", "rms_norm", "--dtype", "float32", "--tier", "smoke", "--conventions", "saved=rstd",
                "--entry-points", "backward"],
}


def _export(tmp: Path, name: str, *extra: str) -> Path:
    out = tmp / f"v_{name}"
    rc = main(["export", *TARGETS[name], *extra, "--out", str(out), "--quiet"])
    assert rc == 0
    return out


@pytest.fixture(scope="module")
def vectors(tmp_path_factory):
    """Exported folders by name (each exported once per module); tests copy before changing one."""
    tmp = tmp_path_factory.mktemp("vectors")
    made: dict[str, Path] = {}

    def get(name: str) -> Path:
        if name not in made:
            made[name] = _export(tmp, name)
        return made[name]
    return get


def _manifest(v: Path) -> dict:
    return json.loads((v / "manifest.json").read_text())


def perfect(v: Path, out: Path) -> Path:
    """A perfect target: every output is the expected value rounded to its format (numpy.load reads them)."""
    for c in _manifest(v)["cases"]:
        if c["skipped"] is not None:
            continue
        d = out / c["dir"]
        d.mkdir(parents=True, exist_ok=True)
        for o in c["outputs"]:
            e = np.load(v / o["expected"]["file"], allow_pickle=False)
            write_npy(d / o["file"], encode(e.astype(dtypes.dtype_of(o["format"])), o["format"]))
    return out


def score(v: Path, out: Path, tmp: Path, *extra: str) -> tuple[int, dict | None]:
    js = tmp / "score.json"
    if js.exists():
        js.unlink()
    rc = main(["score", str(v), str(out), "--json", str(js), "--quiet", *extra])
    doc = json.loads(js.read_text()) if js.exists() else None
    if doc is not None:
        jsonschema.Draft202012Validator(RESULTS_SCHEMA).validate(doc)
    return rc, doc


def _step(a: np.ndarray, fmt: str, k: int) -> np.ndarray:
    """Move a value of format ``fmt`` k ULPs away from zero through its bit pattern (module docstring)."""
    bits = encode(np.asarray(a), fmt).view(f"<u{dtypes.dtype_of(fmt).itemsize}")
    return decode((bits + k).astype(bits.dtype).view(stored_dtype(fmt)), fmt)


# ------------------------------------------------------------------ the format and the manifest
def test_docs_schema_is_the_schema_the_reader_uses():
    doc = json.loads((ROOT / "docs" / "vectors-schema.json").read_text())
    assert doc == json.loads(json.dumps(SCHEMA))
    jsonschema.Draft202012Validator.check_schema(doc)


def test_manifest_describes_every_case_and_file(vectors):
    v = vectors("bn_f16")
    m = _manifest(v)
    jsonschema.Draft202012Validator(json.loads((ROOT / "docs" / "vectors-schema.json").read_text())).validate(m)
    line = (v / "manifest.json.sha256").read_text()
    # sha256sum's line form, FIPS 180-4 digest of the bytes
    assert line == f"{hashlib.sha256((v / 'manifest.json').read_bytes()).hexdigest()}  manifest.json\n"
    assert m["seed"] == 0 and m["refnorm"] and m["op"] == "batch_norm" and m["stored_formats"] == {
        "float16": "<f2", "float32": "<f4"}
    running = [c for c in m["cases"] if c["case"]["running"]]
    assert running and all(c["params"]["running_style"] == "inplace" and c["params"]["momentum"] == 0.1
                           for c in running)
    assert {o["name"] for o in running[0]["outputs"]} >= {"running_mean", "running_var"}
    for c in m["cases"]:
        assert c["params"]["eps"] == c["case"]["eps"] and c["params"]["kwargs"]["axis"] in (1, 3)
        for ref in c["inputs"] + [o["expected"] for o in c["outputs"]] + [o["bound"] for o in c["outputs"]]:
            assert hashlib.sha256((v / ref["file"]).read_bytes()).hexdigest() == ref["sha256"]
        for i in c["inputs"]:
            a = np.load(v / i["file"], allow_pickle=False)
            assert a.dtype.str == i["npy_dtype"] and list(a.shape) == i["shape"]
            f64 = a.astype(np.float64)
            assert i["nonfinite"] == {"nan": int(np.isnan(f64).sum()), "posinf": int((f64 == np.inf).sum()),
                                      "neginf": int((f64 == -np.inf).sum())}


def test_stored_inputs_and_layout_are_what_check_gives_the_kernel(vectors):
    v = vectors("ln_bf16")
    for c in _manifest(v)["cases"]:
        case = find_case(c["id"])
        got = make_inputs(case, Precision(storage="bfloat16", params="float32"), 0)
        for i in c["inputs"]:
            stored = decode(np.load(v / i["file"], allow_pickle=False), i["format"])
            want = got[i["name"]]
            assert stored.dtype == want.dtype and stored.tobytes() == np.ascontiguousarray(want).tobytes()
            # rebuilding the buffer from strides/offset/buffer_elements gives the kernel's memory layout
            buf = np.zeros(i["buffer_elements"], dtype=want.dtype)
            view = np.lib.stride_tricks.as_strided(buf[i["offset"]:], shape=want.shape,
                                                   strides=[s * want.itemsize for s in i["strides"]])
            view[...] = stored
            assert view.strides == want.strides


def test_bfloat16_and_float8_round_trip_bit_for_bit():
    ml = pytest.importorskip("ml_dtypes")
    for fmt, dt in (("bfloat16", ml.bfloat16), ("float8_e4m3fn", ml.float8_e4m3fn), ("float8_e5m2", ml.float8_e5m2)):
        # every bit pattern of the format, NaNs included
        n = 1 << (8 * np.dtype(dt).itemsize)
        bits = np.arange(n, dtype=f"<u{np.dtype(dt).itemsize}")
        a = bits.view(dt)
        st_ = encode(a, fmt)
        assert st_.dtype == stored_dtype(fmt) and np.array_equal(st_, bits)
        assert np.array_equal(decode(st_, fmt).view(bits.dtype), bits)


# ------------------------------------------------------------------ score: a perfect target, a few ULPs off
@pytest.mark.parametrize("name", sorted(TARGETS))
def test_a_perfect_target_passes_every_output_with_zero_ulp(vectors, tmp_path, name):
    v = vectors(name)
    rc, doc = score(v, perfect(v, tmp_path / "out"), tmp_path)
    assert rc == 0 and doc["verdict"] == "conformant", [c["message"] for c in doc["cases"]]
    run = [c for c in doc["cases"] if c["status"] != "skipped"]
    assert run and all(c["status"] == "passed" for c in run)
    for c in run:
        for o in c["outputs"]:
            assert o["max_ulp"] == 0 and 0 <= float(o["budget_used"]) <= 1.0, (c["id"], o["name"])
    if name == "rms_bwd":  # backward only: the saved rstd was an input, and only the grads are checked
        m = _manifest(v)
        assert all({i["name"] for i in c["inputs"]} >= {"x", "dy", "rstd"} and
                   {o["name"] for o in c["outputs"]} <= {"dx", "dweight", "dbias"} for c in m["cases"])
    assert doc["run"]["vectors"]["manifest_sha256"] == hashlib.sha256((v / "manifest.json").read_bytes()).hexdigest()


@pytest.mark.parametrize("name, output", [("ln_bf16", "y"), ("ln_bf16", "rstd"), ("bn_f16", "running_var"),
                                          ("gn_f8", "dx")])
def test_a_few_ulps_beyond_the_bound_fail_on_that_output_only(vectors, tmp_path, name, output):
    v = vectors(name)
    out = perfect(v, tmp_path / "out")
    m = _manifest(v)
    c = next(c for c in m["cases"] if c["skipped"] is None and any(o["name"] == output for o in c["outputs"]))
    o = next(o for o in c["outputs"] if o["name"] == output)
    exp = np.load(v / o["expected"]["file"], allow_pickle=False)
    bound = np.load(v / o["bound"]["file"], allow_pickle=False)
    fmt = o["format"]
    rounded = exp.astype(dtypes.dtype_of(fmt))
    idx = np.unravel_index(int(np.argmax(np.where(np.isfinite(exp) & (rounded != 0), np.abs(exp), -1))), exp.shape)
    # the fewest ULPs that exceed the bound, plus two: off by a few ULPs beyond it
    k = 1
    while abs(float(_step(rounded[idx], fmt, k)) - exp[idx]) <= bound[idx]:
        k += 1
    k += 2
    bad = rounded.copy()
    bad[idx] = _step(rounded[idx], fmt, k)
    write_npy(out / c["dir"] / o["file"], encode(bad, fmt))
    rc, doc = score(v, out, tmp_path)
    assert rc == 1 and doc["verdict"] == "not conformant"
    res = {r["id"]: r for r in doc["cases"]}
    failed = res[c["id"]]
    assert failed["status"] == "failed" and failed["message"].startswith(f"{output}: Not within")
    outs = {r["name"]: r for r in failed["outputs"]}
    assert not outs[output]["passed"] and outs[output]["mismatched"] == 1
    assert outs[output]["max_ulp"] == k and tuple(outs[output]["worst_index"]) == tuple(int(i) for i in idx)
    assert all(r["passed"] for n, r in outs.items() if n != output)
    assert all(r["status"] in ("passed", "skipped") for i, r in res.items() if i != c["id"])


# ------------------------------------------------------------------ hostile outputs: one case fails, named
def _pickle_bomb(path: Path, sentinel: Path) -> None:
    class Boom:
        def __reduce__(self):
            return (open, (str(sentinel), "w"))
    np.save(path, np.array([Boom()], dtype=object), allow_pickle=True)


def _hostile(kind: str, p: Path, good: np.ndarray, tmp: Path) -> str:
    """Replace the target's file p with something hostile; return words the message must hold."""
    if kind == "truncated":
        raw = p.read_bytes()
        p.write_bytes(raw[:-3])
        return "truncated"
    if kind == "trailing":
        p.write_bytes(p.read_bytes() + b"\0\0\0\0")
        return "trailing bytes"
    if kind == "wrong_dtype":
        np.save(p, good.astype(np.float64))
        return "element type <f8, expected"
    if kind == "wrong_shape":
        np.save(p, np.ascontiguousarray(good.reshape(-1)[:-1]))
        return "shape"
    if kind == "pickled":
        _pickle_bomb(p, tmp / "unpickled")
        return "pickle, never read"
    if kind == "oversized_header":
        hdr = "{'descr': '<f4', 'fortran_order': False, 'shape': (1099511627776,), }"
        p.write_bytes(b"\x93NUMPY\x01\x00" + len(hdr).to_bytes(2, "little") + hdr.encode())
        return "elements, the limit"
    if kind == "oversized_file":
        with open(p, "wb") as f:  # sparse: no disk used
            f.truncate(LIMITS.max_bytes + 1)
        return "over the limit"
    if kind == "fortran":
        hdr = "{'descr': '%s', 'fortran_order': True, 'shape': %r, }" % (good.dtype.str, good.shape)
        p.write_bytes(b"\x93NUMPY\x01\x00" + len(hdr).to_bytes(2, "little") + hdr.encode() + good.tobytes())
        return "fortran_order is True"
    if kind == "big_endian":
        np.save(p, good.astype(good.dtype.newbyteorder(">")))
        return "big-endian"
    if kind == "version_2":
        raw = bytearray(p.read_bytes())
        raw[6] = 2
        p.write_bytes(bytes(raw))
        return "version 2.0"
    if kind == "not_npy":
        p.write_text("1.0 2.0 3.0\n")
        return "not a .npy file"
    if kind == "folder":
        p.unlink()
        p.mkdir()
        return "not a regular file"
    if kind == "missing":
        p.unlink()
        return "the target wrote none"
    raise AssertionError(kind)


HOSTILE = ("truncated", "trailing", "wrong_dtype", "wrong_shape", "pickled", "oversized_header", "oversized_file",
           "fortran", "big_endian", "version_2", "not_npy", "folder", "missing")


@pytest.mark.parametrize("kind", HOSTILE)
def test_a_hostile_output_file_fails_its_case_by_name_and_nothing_else(vectors, tmp_path, kind):
    v = vectors("ln_bf16")
    out = perfect(v, tmp_path / "out")
    m = _manifest(v)
    c = m["cases"][1]
    o = next(o for o in c["outputs"] if o["name"] == "mean")  # a float32 output
    p = out / c["dir"] / o["file"]
    words = _hostile(kind, p, np.load(p, allow_pickle=False), tmp_path)
    rc, doc = score(v, out, tmp_path)
    assert rc == 1 and doc is not None
    res = {r["id"]: r for r in doc["cases"]}
    bad = res[c["id"]]
    assert bad["status"] == "failed" and words in bad["message"] and "output mean" in bad["message"], bad["message"]
    outs = {r["name"]: r for r in bad["outputs"]}
    assert not outs["mean"]["passed"] and outs["mean"]["budget_used"] == "inf"
    assert all(r["passed"] for n, r in outs.items() if n != "mean")  # the other outputs were still scored
    assert all(r["status"] == "passed" for i, r in res.items() if i != c["id"])  # and the other cases
    assert not (tmp_path / "unpickled").exists()  # nothing was unpickled


def test_error_txt_makes_the_case_an_error_as_a_raising_kernel_is(vectors, tmp_path):
    v = vectors("ln_bf16")
    out = perfect(v, tmp_path / "out")
    c = _manifest(v)["cases"][0]
    (out / c["dir"] / "error.txt").write_text("npu_ln_forward returned 7 (tile does not fit)\n" + "x" * 10000)
    rc, doc = score(v, out, tmp_path)
    r = next(r for r in doc["cases"] if r["id"] == c["id"])
    assert rc == 1 and r["status"] == "error" and "tile does not fit" in r["message"] and r["message"].endswith("[cut]")
    assert doc["counts"]["error"] == 1 and doc["counts"]["passed"] == len(doc["cases"]) - 1


def test_a_case_folder_the_target_never_wrote_fails_naming_each_output(vectors, tmp_path):
    v = vectors("ln_bf16")
    out = perfect(v, tmp_path / "out")
    c = _manifest(v)["cases"][2]
    shutil.rmtree(out / c["dir"])
    rc, doc = score(v, out, tmp_path)
    r = next(r for r in doc["cases"] if r["id"] == c["id"])
    assert rc == 1 and r["status"] == "failed"
    assert all(f"output {o['name']}: no file {c['dir']}/{o['file']}" in r["message"] for o in c["outputs"])


# ------------------------------------------------------------------ a folder that cannot be trusted: exit 2
def _copy(v: Path, tmp: Path) -> Path:
    dst = tmp / "copy"
    shutil.copytree(v, dst)
    return dst


def _rewrite_manifest(v: Path, change) -> None:
    m = _manifest(v)
    change(m)
    raw = (json.dumps(m, indent=1) + "\n").encode()
    (v / "manifest.json").write_bytes(raw)
    (v / "manifest.json.sha256").write_text(f"{hashlib.sha256(raw).hexdigest()}  manifest.json\n")


def _flip_expected(v: Path) -> str:
    f = v / _manifest(v)["cases"][0]["outputs"][0]["expected"]["file"]
    raw = bytearray(f.read_bytes())
    raw[-1] ^= 1
    f.write_bytes(bytes(raw))
    return "changed after export"


def _truncate_bound(v: Path) -> str:
    f = v / _manifest(v)["cases"][0]["outputs"][0]["bound"]["file"]
    f.write_bytes(f.read_bytes()[:-8])
    return "changed after export"


def _edit_manifest(v: Path) -> str:
    p = v / "manifest.json"
    p.write_text(p.read_text().replace('"seed": 0', '"seed": 1'))
    return "the manifest changed after export"


def _drop_digest(v: Path) -> str:
    (v / "manifest.json.sha256").unlink()
    return "manifest.json.sha256"


def _escape(v: Path) -> str:
    def change(m):
        m["cases"][0]["outputs"][0]["expected"]["file"] = "../../../etc/passwd"
    _rewrite_manifest(v, change)
    return "does not follow the vectors schema"


def _symlink_out(v: Path) -> str:
    ref = _manifest(v)["cases"][0]["outputs"][0]["expected"]["file"]
    (v / ref).unlink()
    (v / ref).symlink_to("/etc/hostname")
    return "leads outside the folder"


def _nan_constant(v: Path) -> str:
    def change(m):
        m["seed"] = float("nan")
    m = _manifest(v)
    change(m)
    raw = json.dumps(m).encode()
    (v / "manifest.json").write_bytes(raw)
    (v / "manifest.json.sha256").write_text(f"{hashlib.sha256(raw).hexdigest()}  manifest.json\n")
    return "JSON constant NaN is not allowed"


def _wrong_id(v: Path) -> str:
    def change(m):
        m["cases"][0]["case"]["eps"] = 0.5
    _rewrite_manifest(v, change)
    return "its case record gives the id"


def _huge_number(v: Path) -> str:
    def change(m):
        m["cases"][0]["outputs"][0]["bound"]["terms"]["u_s"] = 10 ** 400  # valid JSON, beyond float64
    _rewrite_manifest(v, change)
    return "a value this refnorm cannot use"


def _huge_eps(v: Path) -> str:
    def change(m):
        m["cases"][0]["case"]["eps"] = 10 ** 400
    _rewrite_manifest(v, change)
    return "not a catalog case"


def _bad_stored_type(v: Path) -> str:
    def change(m):
        m["cases"][0]["outputs"][0]["npy_dtype"] = "<f2"
    _rewrite_manifest(v, change)
    return "is stored as <u2, not <f2"


@pytest.mark.parametrize("tamper", [_flip_expected, _truncate_bound, _edit_manifest, _drop_digest, _escape,
                                    _symlink_out, _nan_constant, _wrong_id, _huge_number, _huge_eps,
                                    _bad_stored_type],
                         ids=lambda f: f.__name__.strip("_"))
def test_a_tampered_folder_is_exit_2_naming_the_file_and_writes_nothing(vectors, tmp_path, capsys, tamper):
    v = _copy(vectors("ln_bf16"), tmp_path)
    out = perfect(v, tmp_path / "out")
    words = tamper(v)
    rc, doc = score(v, out, tmp_path)
    err = capsys.readouterr().err
    assert rc == 2 and doc is None and words in err and "Traceback" not in err, err


# ------------------------------------------------------------------ the command line
@pytest.mark.parametrize("args, words", [
    (["--op", "layer_norm", "--dtype", "float32", "--declaration", "x.py:k", "--precision", "params=float32"],
     "give one or the other"),
    (["--op", "layer_norm", "--dtype", "float32", "--precision", "storage=float16"], "unknown key 'storage'"),
    (["--op", "layer_norm", "--dtype", "float32", "--precision", "accumulate=float13"], "float13"),
    (["--op", "layer_norm", "--dtype", "float32", "--precision", "lam=-3"], "positive finite"),
    (["--op", "layer_norm", "--dtype", "float32", "--conventions", "saved=mean+median"], "median"),
    (["--op", "layer_norm", "--dtype", "float32", "--conventions", "saved"], "KEY=VALUE"),
    (["--op", "layer_norm", "--dtype", "float32", "--case", "batch_norm/float32/x"], "is not a layer_norm case"),
    (["--op", "layer_norm", "--dtype", "float32", "--case", "layer_norm/float32/nope"], "no case with id"),
])
def test_export_usage_errors_are_exit_2_with_the_reason(tmp_path, capsys, args, words):
    rc = main(["export", *args, "--out", str(tmp_path / "v"), "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and words in err and "Traceback" not in err, err
    assert not (tmp_path / "v" / "manifest.json").exists()


def test_export_refuses_a_folder_that_holds_files(tmp_path, capsys):
    (tmp_path / "v").mkdir()
    (tmp_path / "v" / "notes.txt").write_text("keep me")
    rc = main(["export", "--op", "layer_norm", "--dtype", "float32", "--tier", "smoke", "--out", str(tmp_path / "v")])
    assert rc == 2 and "not empty" in capsys.readouterr().err
    assert (tmp_path / "v" / "notes.txt").read_text() == "keep me"


def test_score_usage_errors(vectors, tmp_path, capsys):
    v = vectors("ln_bf16")
    assert main(["score", str(v), str(tmp_path / "none")]) == 2
    assert "no such folder" in capsys.readouterr().err
    (tmp_path / "o").mkdir()
    assert main(["score", str(tmp_path / "o"), str(tmp_path / "o")]) == 2
    assert "manifest.json" in capsys.readouterr().err
    assert main(["score", str(v), str(tmp_path / "o"), "--json", str(tmp_path)]) == 2
    assert "is a folder" in capsys.readouterr().err


def test_score_writes_what_check_writes_and_the_gate_reads_it(vectors, tmp_path, capsys):
    v = vectors("ln_bf16")
    out = perfect(v, tmp_path / "out")
    rc, good = score(v, out, tmp_path)
    assert rc == 0
    (tmp_path / "good.json").write_text(json.dumps(good))
    # one output pushed out of its bound: the JUnit XML names the case, diff and baseline see it
    c = _manifest(v)["cases"][0]
    o = next(o for o in c["outputs"] if o["name"] == "y")
    y = np.load(out / c["dir"] / "y.npy", allow_pickle=False)
    write_npy(out / c["dir"] / "y.npy", (y.view(np.uint16) + np.uint16(40)).astype("<u2"))
    junit = tmp_path / "r.xml"
    rc, bad = score(v, out, tmp_path, "--junit", str(junit), "--baseline", str(tmp_path / "good.json"))
    assert rc == 1
    suite = ET.parse(junit).getroot().find("testsuite")
    cases = {t.get("name"): t for t in suite.iter("testcase")}
    assert set(cases) == {c["id"] for c in _manifest(v)["cases"]}
    assert cases[c["id"]].find("failure") is not None and "y: Not within" in cases[c["id"]].find("failure").get("message")
    (tmp_path / "bad.json").write_text(json.dumps(bad))
    capsys.readouterr()
    assert main(["diff", str(tmp_path / "good.json"), str(tmp_path / "bad.json")]) == 1
    assert c["id"] in capsys.readouterr().out
    # a profile's waiver covers that output until its date: the gate passes, exit 0
    prof = tmp_path / "refnorm.toml"
    prof.write_text(f'[[waivers]]\ncase = "{c["id"]}"\noutput = "{o["name"]}"\nreason = "NPU-123: y rounding"\n'
                    'expires = "2999-01-01"\n')
    rc, waived = score(v, out, tmp_path, "--profile", str(prof))
    assert rc == 0 and waived["gate"]["verdict"] == "pass" and waived["gate"]["waived"] == [c["id"]]


def test_score_report_renders_from_the_document(vectors, tmp_path):
    pytest.importorskip("matplotlib")
    v = vectors("ln_bf16")
    out = perfect(v, tmp_path / "out")
    rc, _ = score(v, out, tmp_path, "--report", str(tmp_path / "review"), "--no-peers")
    assert rc == 0
    html = (tmp_path / "review" / "report.html").read_text()
    assert "not a proof of correctness" in html and "layer_norm" in html


# ------------------------------------------------------------------ the strict reader
def _npy(header: str, data: bytes = b"", version: bytes = b"\x01\x00") -> bytes:
    return b"\x93NUMPY" + version + len(header).to_bytes(2, "little") + header.encode("latin-1") + data


@pytest.mark.parametrize("raw, words", [
    (b"", "no \\x93NUMPY magic"),
    (_npy("{}", version=b"\x03\x00"), "version 3.0"),
    (b"\x93NUMPY\x01\x00\xff\xff" + b" " * 65535, "over the limit of 10000"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), }")[:-3], "truncated in the header"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), }\x07"), "control characters"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), }\xe9"), "not ASCII"),
    (_npy("[1, 2]"), "is a list"),
    (_npy("__import__('os')"), "not a Python dict literal"),
    (_npy("{'descr': '<f4', 'shape': (2,)}"), "expected exactly"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), 'x': 1}"), "expected exactly"),
    (_npy("{'descr': [('a', '<f4')], 'fortran_order': False, 'shape': (2,)}"), "structured"),
    (_npy("{'descr': '|O', 'fortran_order': False, 'shape': (2,)}"), "pickle"),
    (_npy("{'descr': '<i4', 'fortran_order': False, 'shape': (2,)}"), "'<i4'"),
    (_npy("{'descr': '<f4', 'fortran_order': 0, 'shape': (2,)}"), "expected False"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': 2}"), "tuple of integers"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (True,)}"), "tuple of integers"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2.0,)}"), "tuple of integers"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (-2,)}"), "negative"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': %r}" % ((1,) * 33,)), "33 dimensions"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (65536, 65536)}"), "the limit"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,)}", b"\0" * 7), "truncated"),
    (_npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,)}", b"\0" * 9), "trailing bytes"),
])
def test_the_reader_refuses_with_the_reason(tmp_path, raw, words):
    p = tmp_path / "a.npy"
    p.write_bytes(raw)
    with pytest.raises(NpyError) as e:
        read_npy(p)
    assert words in str(e.value) and str(p) in str(e.value)


@pytest.mark.parametrize("descr", ["<f8", "<f4", "<f2", "<u2", "|u1"])
@pytest.mark.parametrize("shape", [(), (0,), (5,), (3, 4), (2, 1, 3)])
def test_the_reader_reads_what_numpy_writes(tmp_path, descr, shape):
    a = (np.arange(int(np.prod(shape))) % 200).astype(descr).reshape(shape)
    p = tmp_path / "a.npy"
    np.save(p, a)  # NumPy's own writer
    b = read_npy(p, shape=shape, descr=descr)
    assert b.dtype == a.dtype and b.shape == a.shape and np.array_equal(a, b)
    write_npy(p, a)  # and NumPy reads what refnorm writes
    c = np.load(p, allow_pickle=False)
    assert c.dtype == a.dtype and np.array_equal(a, c) and p.read_bytes()[6:8] == b"\x01\x00"


# ------------------------------------------------------------------ fuzzing (hypothesis, seeded)
_KEYS = st.sampled_from(["descr", "fortran_order", "shape", "extra", "Descr", ""])
_VALUES = st.one_of(
    st.sampled_from(["'<f4'", "'<f8'", "'|u1'", "'<u2'", "'<f2'", "'|O'", "'>f4'", "'<i8'", "'V4'", "[('a','<f4')]",
                     "False", "True", "0", "None", "()", "(3,)", "(2, 3)", "(-1,)", "(True,)", "(2**64,)",
                     "(18446744073709551616,)", "(1e3,)", "((2,),)", "'" + "x" * 300 + "'"]),
    st.tuples(st.integers(-3, 1 << 40), st.integers(0, 5)).map(lambda t: f"({t[0]}, {t[1]})"),
    st.text(alphabet="(){}[]',:.0123456789 abcTrueFalse<>|\n\\x", max_size=40),
)


@st.composite
def _free_headers(draw):
    """Headers from a loose grammar of keys and values, or any text: mostly refused."""
    if draw(st.booleans()):
        items = draw(st.lists(st.tuples(_KEYS, _VALUES), max_size=5))
        text = "{" + ", ".join(f"'{k}': {v}" for k, v in items) + "}"
    else:
        text = draw(st.text(max_size=120))
    body = text.encode("utf-8", "surrogatepass")
    version = draw(st.sampled_from([b"\x01\x00", b"\x01\x00", b"\x02\x00", b"\x00\x00"]))
    hlen = draw(st.one_of(st.just(len(body)), st.integers(0, 70000)))
    data = draw(st.binary(max_size=64))
    return b"\x93NUMPY" + version + (hlen & 0xFFFF).to_bytes(2, "little") + body + data


@st.composite
def _near_valid(draw):
    """A well-formed file (any of the accepted forms: key order, quotes, spacing, trailing comma), then
    up to three byte flips, a cut or a few appended bytes: accepted and refused alike."""
    descr = draw(st.sampled_from(["<f8", "<f4", "<f2", "<u2", "|u1", "|u1", "<f4", "|O", ">f4", "<i4", "<V2"]))
    shape = tuple(draw(st.lists(st.integers(0, 4), max_size=3)))
    q = draw(st.sampled_from(["'", '"']))
    sp = draw(st.sampled_from(["", " ", "  "]))
    dims = ", ".join(map(str, shape)) + ("," if len(shape) == 1 else "")
    items = [f"{q}descr{q}:{sp}{q}{descr}{q}", f"{q}fortran_order{q}:{sp}False", f"{q}shape{q}:{sp}({dims})"]
    items = draw(st.permutations(items))
    text = "{" + ", ".join(items) + (", " if draw(st.booleans()) else "") + "}"
    text += " " * ((64 - (11 + len(text)) % 64) % 64) + "\n"
    size = int(np.prod(shape)) * (np.dtype(descr).itemsize if descr[1] != "O" else 8)
    raw = bytearray(b"\x93NUMPY\x01\x00" + len(text).to_bytes(2, "little") + text.encode() +
                    draw(st.binary(min_size=size, max_size=size)))
    for _ in range(draw(st.integers(0, 3))):
        if draw(st.booleans()):
            raw[draw(st.integers(0, len(raw) - 1))] = draw(st.integers(0, 255))
    cut = draw(st.sampled_from(["none", "none", "cut", "append"]))
    if cut == "cut":
        raw = raw[:draw(st.integers(0, len(raw)))]
    elif cut == "append":
        raw += draw(st.binary(min_size=1, max_size=9))
    return bytes(raw)


@seed(20240611)
@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(raw=st.one_of(_near_valid(), _free_headers()))
def test_fuzzed_npy_headers_give_an_array_or_a_clear_refusal(tmp_path, raw):
    p = tmp_path / "f.npy"
    p.write_bytes(raw)
    try:
        a = read_npy(p)
    except NpyError as e:
        assert str(p) in str(e)
        event("refused: " + " ".join(str(e)[len(str(p)) + 2:].split()[:3]))
        return
    event("accepted")
    # accepted: then NumPy reads the same array from it (numpy.load, allow_pickle=False)
    b = np.load(p, allow_pickle=False)
    assert a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


@pytest.fixture(scope="module")
def small_manifest(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("fuzz")
    v = tmp / "v"
    rc = main(["export", "--op", "layer_norm", "--dtype", "bfloat16", "--precision", "params=float32",
               "--conventions", "saved=mean+rstd", "--case",
               "layer_norm/bfloat16/trailing/2x3x16/norm_ndim=1/normal/w=random/b=random/eps=1e-05/train/contiguous",
               "--out", str(v), "--quiet"])
    assert rc == 0
    return v, perfect(v, tmp / "out"), _manifest(v)


_JSON = st.recursive(st.one_of(st.none(), st.booleans(), st.integers(-(1 << 70), 1 << 70),
                               st.floats(allow_nan=False, allow_infinity=False), st.text(max_size=20),
                               st.sampled_from(["../x", "/etc/passwd", "cases/0000/expected/y.npy", "layer_norm",
                                                "float8_e5m2", "<u2", "nan", "inf", "skipped", 10 ** 400, -0.0,
                                                1e308, 2 ** 63])),
                     lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=8), inner, max_size=3),
                     max_leaves=6)


def _paths(doc, prefix=()):
    yield prefix
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            yield from _paths(v, prefix + (i,))


@seed(20240612)
@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                    HealthCheck.too_slow])
@given(data=st.data())
def test_fuzzed_manifests_are_scored_or_refused_clearly(small_manifest, tmp_path, data):
    from conformance.vectors.score import score_outputs

    v, out, m = small_manifest
    doc = json.loads(json.dumps(m))
    for _ in range(data.draw(st.integers(1, 3))):
        paths = [p for p in _paths(doc) if p]
        path = data.draw(st.sampled_from(paths))
        parent = doc
        for k in path[:-1]:
            parent = parent[k]
        action = data.draw(st.sampled_from(["replace", "delete", "add", "transplant", "transplant"]))
        if action == "transplant":  # a value of the right kind more often: another node of the same manifest
            src = data.draw(st.sampled_from(paths))
            node = doc
            for k in src:
                node = node[k]
            parent[path[-1]] = json.loads(json.dumps(node))
        elif action == "delete":
            del parent[path[-1]]
        elif action == "add" and isinstance(parent, dict):
            parent[data.draw(st.text(max_size=8))] = data.draw(_JSON)
        else:
            parent[path[-1]] = data.draw(_JSON)
    raw = json.dumps(doc).encode()
    try:
        man = parse_manifest(raw, v)
        doc_out = score_outputs(man, out, quiet=True)
    except VectorsError as e:
        assert str(e)
        event("refused: " + ("schema" if "schema" in str(e) else "other check"))
        return
    event(f"scored: {doc_out['verdict']}")
    jsonschema.Draft202012Validator(RESULTS_SCHEMA).validate(doc_out)


def test_load_manifest_refuses_a_folder_without_one(tmp_path):
    with pytest.raises(VectorsError, match="does not exist"):
        load_manifest(tmp_path)
    with pytest.raises(VectorsError, match="not a folder"):
        load_manifest(tmp_path / "nothing")


# ------------------------------------------------------------------ every op: score equals check
def _rounded_oracle(spec, dtype: str):
    """A kernel of any registered op: the oracle's values rounded to the storage format
    (tests/described_kernels.py), the outputs a perfect target writes from the stored expected values."""
    from described_kernels import rounded_oracle

    return rounded_oracle(spec, dtype)


@pytest.mark.parametrize("op", EXPORTABLE_OPS)
def test_for_every_op_score_of_a_perfect_target_is_check_of_the_rounded_oracle(tmp_path, op):
    # The same checked outputs, the same bounds and the same comparison: the records are equal field
    # for field (durations aside), so nothing in export or score depends on which op it is.
    from conformance.cases import catalog
    from conformance.run.execute import execute_case
    from conformance.vectors.export import export_vectors
    from conformance.vectors.score import score_outputs

    kernel = _rounded_oracle(ops.get(op), "float32")
    cases = catalog([op], ["float32"], "smoke")
    v = tmp_path / "v"
    v.mkdir()
    export_vectors(kernel, cases, v, seed=0, tier="smoke", quiet=True)
    doc = score_outputs(load_manifest(v), perfect(v, tmp_path / "out"), quiet=True)
    for got, c in zip(doc["cases"], cases):
        want = execute_case(kernel, c, 0).to_dict()
        assert got["id"] == want["id"] and got["status"] == want["status"] == "passed", want["message"]
        assert got["outputs"] == want["outputs"], c.id


def test_a_multi_replica_kernel_has_no_vectors(tmp_path):
    # Vectors hold one process's calls (docs/vectors.md); a multi-replica kernel needs the harness's process
    # group, so export refuses it by name and writes nothing, and the CLI does not offer the op.
    from conformance.cases import catalog
    from conformance.vectors.export import export_vectors

    replica = [n for n in ops.OPS if ops.get(n).replicas]
    assert replica and not set(replica) & set(EXPORTABLE_OPS)
    kernel = _rounded_oracle(ops.get(replica[0]), "float32")
    with pytest.raises(VectorsError, match="run as replicas over a process group"):
        export_vectors(kernel, catalog(replica, ["float32"], "smoke"), tmp_path, seed=0, tier="smoke", quiet=True)
    assert not any(tmp_path.iterdir())
    r = subprocess.run([sys.executable, "-m", "conformance", "export", "--op", replica[0], "--dtype", "float32",
                        "--out", str(tmp_path / "v")], capture_output=True, text=True, timeout=120)
    assert r.returncode == 2 and "invalid choice" in r.stderr and not (tmp_path / "v").exists()
