"""The vectors round trip through C: export, the example driver (examples/c_kernel/vectors_driver.c)
and score give what `refnorm check` gives on the C ABI adapter; the C `.npy` reader refuses what
refnorm's reader refuses.

The kernel is the same compiled C code both ways (norm_kernel.c: in process through ctypes for
check, linked into the driver for score), with the same inputs in the same memory layout, so
its outputs are the same bits and every per-case record must be equal, budget for budget. The
`.npy` files the C reader is fed are written by NumPy (numpy.save, "NPY format version 1.0")
and then damaged. Skipped where no C compiler is found.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest

from conformance.cases import catalog
from conformance.cli import main
from conformance.vectors.npy import NpyError, read_npy

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "examples" / "c_kernel"


@pytest.fixture(scope="module")
def build(tmp_path_factory) -> Path:
    """The example library and driver built into a private directory."""
    if shutil.which("cc") is None or shutil.which("make") is None:
        pytest.skip("no C compiler (cc) or make on this machine: the C example cannot be built")
    out = tmp_path_factory.mktemp("c_vectors")
    proc = subprocess.run(["make", "-C", str(EXAMPLE), f"BUILD={out}"], capture_output=True, text=True)
    assert proc.returncode == 0, f"building the C example failed:\n{proc.stdout}\n{proc.stderr}"
    assert (out / "libnormkernel.so").is_file() and (out / "vectors_driver").is_file(), proc.stdout
    return out


@pytest.fixture(scope="module")
def c_lib(build):
    mp = pytest.MonkeyPatch()
    mp.setenv("REFNORM_C_KERNEL_LIB", str(build / "libnormkernel.so"))
    yield build
    mp.undo()


def _ids(op: str) -> list[str]:
    """The smoke tier, and the standard tier's layouts, strides, value kinds and modes on small shapes."""
    smoke = [c.id for c in catalog([op], ["float32"], "smoke")]
    extra = [c.id for c in catalog([op], ["float32"], "standard")
             if c.numel <= 4000 and (c.strides != "contiguous" or c.mode == "eval" or c.values in (
                 "nonfinite", "constant", "zeros") or (c.running and c.momentum is None) or c.group_length == 1)]
    return list(dict.fromkeys(smoke + extra))


def _driver(build: Path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([str(build / "vectors_driver"), *args], capture_output=True, text=True, timeout=120)


@pytest.mark.parametrize("op", ["layer_norm", "batch_norm"])
def test_export_driver_score_equals_check_case_by_case(c_lib, tmp_path, capsys, op):
    spec = f"{EXAMPLE / 'kernel.py'}:{op}"
    ids = _ids(op)
    selection = [a for cid in ids for a in ("--case", cid)]
    v, out = tmp_path / "v", tmp_path / "out"
    assert main(["export", "--op", op, "--dtype", "float32", "--declaration", spec, *selection, "--out", str(v),
                 "--quiet"]) == 0
    proc = _driver(c_lib, str(v), str(out))
    assert proc.returncode == 0, proc.stderr
    assert main(["score", str(v), str(out), "--json", str(tmp_path / "score.json"), "--junit",
                 str(tmp_path / "score.xml"), "--quiet"]) == 0
    assert main(["check", spec, *selection, "--json", str(tmp_path / "check.json"), "--junit",
                 str(tmp_path / "check.xml"), "--quiet"]) == 0
    capsys.readouterr()
    s = json.loads((tmp_path / "score.json").read_text())
    c = json.loads((tmp_path / "check.json").read_text())
    assert [r["id"] for r in s["cases"]] == [r["id"] for r in c["cases"]] == ids
    for a, b in zip(s["cases"], c["cases"]):
        assert a["status"] == b["status"] == "passed", a["id"]
        # every metric, the budget used, the bound's record and the message: the same comparison
        assert a["outputs"] == b["outputs"], a["id"]
    assert s["summary"] == c["summary"] and s["counts"] == c["counts"] and s["kernel"] == c["kernel"]
    assert s["verdict"] == c["verdict"] == "conformant"
    # the JUnit XML of both names the same test cases with the same outcomes
    def outcomes(path):
        suite = ET.parse(path).getroot().find("testsuite")
        return {t.get("name"): [ch.tag for ch in t] for t in suite.iter("testcase")}
    assert outcomes(tmp_path / "score.xml") == outcomes(tmp_path / "check.xml")
    strided = [cid for cid in ids if not cid.endswith("/contiguous")]
    assert strided, "the round trip must include non-contiguous layouts"


def test_the_driver_writes_error_txt_for_what_its_kernel_cannot_take(c_lib, tmp_path, capsys):
    # bfloat16 storage: the example kernel is float32 only; every case says so, and the run goes on
    v, out = tmp_path / "v", tmp_path / "out"
    assert main(["export", "--op", "layer_norm", "--dtype", "bfloat16", "--tier", "smoke", "--precision",
                 "params=float32", "--conventions", "saved=mean+rstd", "--out", str(v), "--quiet"]) == 0
    proc = _driver(c_lib, str(v), str(out))
    assert proc.returncode == 0, proc.stderr
    assert main(["score", str(v), str(out), "--json", str(tmp_path / "s.json"), "--quiet"]) == 1
    doc = json.loads((tmp_path / "s.json").read_text())
    assert doc["counts"]["error"] == len(doc["cases"]) == 4
    assert all("takes float32 (<f4); input x is bfloat16 (<u2)" in c["message"] for c in doc["cases"])


# ------------------------------------------------------------------ the C reader
def _npy(header: str, data: bytes = b"", version: bytes = b"\x01\x00") -> bytes:
    return b"\x93NUMPY" + version + len(header).to_bytes(2, "little") + header.encode("latin-1") + data


HOSTILE = {
    "empty": b"",
    "magic": b"\x93NUMPZ\x01\x00\x00\x00",
    "version2": _npy("{}", version=b"\x02\x00"),
    "long_header": b"\x93NUMPY\x01\x00\xff\xff" + b" " * 65535,
    "object": None,  # written by numpy.save below
    "big_endian": None,
    "fortran": None,
    "structured": _npy("{'descr': [('a', '<f4')], 'fortran_order': False, 'shape': (2,), }", b"\0" * 8),
    "int32": _npy("{'descr': '<i4', 'fortran_order': False, 'shape': (2,), }", b"\0" * 8),
    "negative": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (-2,), }"),
    "not_tuple": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2), }", b"\0" * 8),
    "huge": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (1099511627776,), }"),
    "overflow": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (99999999999999999999,), }"),
    "many_dims": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (%s), }" % ("1, " * 33)),
    "missing_key": _npy("{'descr': '<f4', 'shape': (2,), }", b"\0" * 8),
    "extra_key": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), 'x': 1}", b"\0" * 8),
    "control": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), }\x01", b"\0" * 8),
    "truncated": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), }", b"\0" * 7),
    "trailing": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), }", b"\0" * 9),
    "junk_after": _npy("{'descr': '<f4', 'fortran_order': False, 'shape': (2,), } x", b"\0" * 8),
}


def _write_hostile(tmp: Path) -> dict[str, Path]:
    paths = {}
    for name, raw in HOSTILE.items():
        p = tmp / f"{name}.npy"
        if name == "object":
            np.save(p, np.array([{"k": 1}], dtype=object), allow_pickle=True)
        elif name == "big_endian":
            np.save(p, np.zeros(3, dtype=">f4"))
        elif name == "fortran":
            np.save(p, np.asfortranarray(np.zeros((2, 3), dtype=np.float32)))
        else:
            p.write_bytes(raw)
        paths[name] = p
    return paths


def _c_verdicts(build: Path, paths: list[Path]) -> list[str]:
    proc = _driver(build, "--check", *map(str, paths))
    assert proc.returncode in (0, 1), (proc.returncode, proc.stderr)  # never a crash
    lines = proc.stdout.splitlines()
    assert len(lines) == len(paths), proc.stdout
    return lines


def test_the_c_reader_refuses_every_hostile_file_refnorm_refuses(build, tmp_path):
    paths = _write_hostile(tmp_path)
    for (name, p), line in zip(paths.items(), _c_verdicts(build, list(paths.values()))):
        assert line.startswith("refused "), (name, line)
        assert str(p) in line, line
        with pytest.raises(NpyError):
            read_npy(p)


@pytest.mark.parametrize("descr", ["<f8", "<f4", "<f2", "<u2", "|u1"])
def test_the_c_reader_reads_what_numpy_writes(build, tmp_path, descr):
    shapes = [(), (0,), (7,), (3, 5), (2, 1, 4)]
    paths = []
    for i, shape in enumerate(shapes):
        p = tmp_path / f"{i}.npy"
        np.save(p, (np.arange(int(np.prod(shape))) % 100).astype(descr).reshape(shape))
        paths.append(p)
    for shape, line in zip(shapes, _c_verdicts(build, paths)):
        assert line.split() == ["ok", descr, str(len(shape)), *map(str, shape)]


def test_fuzzed_files_the_c_reader_accepts_refnorm_reads_alike(build, tmp_path):
    # A seeded mutation fuzzer (600 files): NumPy-written files of the five types and other types, then
    # byte flips, cuts and appended bytes. The C reader must never crash, and whatever it accepts
    # refnorm's reader accepts with the same type and shape.
    rng = np.random.default_rng(20240613)
    descrs = ["<f8", "<f4", "<f2", "<u2", "|u1", ">f4", "<i2"]
    paths = []
    for i in range(600):
        shape = tuple(int(d) for d in rng.integers(0, 4, size=rng.integers(0, 4)))
        p = tmp_path / f"f{i}.npy"
        np.save(p, np.zeros(shape, dtype=descrs[rng.integers(len(descrs))]))
        raw = bytearray(p.read_bytes())
        for _ in range(int(rng.integers(0, 3))):
            raw[int(rng.integers(len(raw)))] = int(rng.integers(256))
        cut = rng.integers(4)
        if cut == 1:
            raw = raw[:int(rng.integers(len(raw) + 1))]
        elif cut == 2:
            raw += bytes(rng.integers(0, 256, size=int(rng.integers(1, 8)), dtype=np.uint8))
        p.write_bytes(bytes(raw))
        paths.append(p)
    accepted = 0
    for p, line in zip(paths, _c_verdicts(build, paths)):
        if line.startswith("ok "):
            accepted += 1
            a = read_npy(p)
            f = line.split()
            assert f[1] == a.dtype.str and [int(x) for x in f[3:]] == list(a.shape), (p, line)
        else:
            assert line.startswith("refused ") and str(p) in line
    assert 30 < accepted < 570  # both kinds were exercised


def test_the_driver_refuses_a_hostile_index(build, tmp_path):
    v = tmp_path / "v"
    v.mkdir()
    (v / "index.txt").write_text("refnorm-vectors 1\nop layer_norm\ncase 0000 some/id\n"
                                 "input x float32 <f4 ../../etc/passwd 1 4 1 0 4\nend\n")
    proc = _driver(build, str(v), str(tmp_path / "out"))
    assert proc.returncode == 2 and "not the index format" in proc.stderr
    (v / "index.txt").write_text("refnorm-vectors 1\nop layer_norm\ncase 0000 some/id\nmode train\n")
    proc = _driver(build, str(v), str(tmp_path / "out"))
    assert proc.returncode == 2 and "not the index format" in proc.stderr
    (v / "index.txt").write_text("refnorm-vectors 1\nop layer_norm\ncase 0000 some/id\n"
                                 "input x float32 <f4 cases/x.npy 1 4 1 0 99999999999999\nend\n")  # a huge buffer
    proc = _driver(build, str(v), str(tmp_path / "out"))
    assert proc.returncode == 2 and "not the index format" in proc.stderr
    (v / "index.txt").write_text("not an index\n")
    assert _driver(build, str(v), str(tmp_path / "out")).returncode == 2
    assert _driver(build, str(v)).returncode == 2  # usage
