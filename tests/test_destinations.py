"""conformance.destinations: output paths checked before a run, atomic writes that leave nothing behind.

The limits are Linux's (NAME_MAX 255 bytes per name, PATH_MAX 4096 bytes; POSIX.1-2017 <limits.h>
names them, the values are the common file systems'). Tests run as root in CI, where permission bits
do not stop a write, so unwritable places are made of what stops root too: a file used as a folder,
a FIFO used as a file, a name too long.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

import pytest

from conformance.destinations import (NAME_MAX, DestinationError, file_target, fit_name, folder_target,
                                      input_folder, write_atomic)


def _leftovers(d: Path) -> list[str]:
    return sorted(p.name for p in d.iterdir() if p.name.startswith("."))


def test_a_file_target_creates_its_folders_and_leaves_no_probe(tmp_path):
    p = file_target(tmp_path / "a" / "b" / "r.json", "--json")
    assert p.parent.is_dir() and not p.exists()
    assert _leftovers(p.parent) == []


@pytest.mark.parametrize("make, words", [
    (lambda t: t / "file.txt" / "r.json", "not a folder"),
    (lambda t: t, "is a folder"),
    (lambda t: t / ("x" * (NAME_MAX + 1)), "over the limit of 255"),
    (lambda t: t / ("\u00e9" * 128), "over the limit of 255"),  # 256 bytes in UTF-8, 128 characters
    (lambda t: str(t) + "/a\x00b", "NUL"),
    (lambda t: "", "empty"),
])
def test_bad_file_targets_name_the_option_and_the_path(tmp_path, make, words):
    (tmp_path / "file.txt").write_text("x")
    with pytest.raises(DestinationError) as e:
        file_target(make(tmp_path), "--json")
    assert str(e.value).startswith("--json") and words in str(e.value)


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no FIFOs here")
def test_a_pipe_is_not_a_file_target(tmp_path):
    os.mkfifo(tmp_path / "fifo")
    with pytest.raises(DestinationError, match="device, pipe or socket"):
        file_target(tmp_path / "fifo", "--junit")
    assert stat.S_ISFIFO(os.stat(tmp_path / "fifo").st_mode)  # untouched


def test_folder_targets(tmp_path):
    (tmp_path / "file.txt").write_text("x")
    assert folder_target(tmp_path / "new" / "rep", "--report") == tmp_path / "new" / "rep"
    with pytest.raises(DestinationError, match="is a file, expected a folder"):
        folder_target(tmp_path / "file.txt", "--report")
    (tmp_path / "blocked" / "report.html").mkdir(parents=True)
    with pytest.raises(DestinationError, match="report.html is a folder"):
        folder_target(tmp_path / "blocked", "--report", files=["report.html"])


def test_input_folders(tmp_path):
    (tmp_path / "file.txt").write_text("x")
    assert input_folder(tmp_path, "--baseline-dir") == tmp_path
    assert input_folder(tmp_path / "missing", "--baseline-dir") is None
    with pytest.raises(DestinationError, match="expected a folder"):
        input_folder(tmp_path / "file.txt", "--baseline-dir")
    with pytest.raises(DestinationError, match="255"):
        input_folder(tmp_path / ("b" * 300), "--baseline-dir")


def test_fit_name_keeps_names_within_the_limit_and_apart():
    a, b = fit_name("k" * 400 + "-one", ".json"), fit_name("k" * 400 + "-two", ".json")
    assert a != b and len(a.encode()) <= NAME_MAX and len(b.encode()) <= NAME_MAX
    assert a.endswith(".json") and fit_name("short", ".json") == "short.json"
    multi = fit_name("\u00e9" * 300, ".json")  # 2 bytes a character in UTF-8: cut on characters, not bytes
    assert len(multi.encode()) <= NAME_MAX and multi.encode().decode() == multi


def test_write_atomic_replaces_the_file_and_leaves_nothing_when_the_writer_fails(tmp_path):
    p = tmp_path / "r.json"
    p.write_text("old")

    def broken(f):
        f.write("half")
        raise RuntimeError("the writer failed")

    with pytest.raises(RuntimeError):
        write_atomic(p, broken)
    assert p.read_text() == "old" and _leftovers(tmp_path) == []
    write_atomic(p, lambda f: f.write("new"))
    assert p.read_text() == "new" and _leftovers(tmp_path) == []
    mask = os.umask(0)
    os.umask(mask)
    assert stat.S_IMODE(p.stat().st_mode) == 0o666 & ~mask  # the mode a plain open() gives


def test_write_atomic_refuses_a_folder(tmp_path):
    with pytest.raises(IsADirectoryError):
        write_atomic(tmp_path, lambda f: f.write("x"))
    assert _leftovers(tmp_path) == []


def test_a_target_name_near_the_limit_still_gets_a_temporary_file(tmp_path):
    # The temporary file's name adds a prefix and a random suffix; it must not push the name past the limit.
    p = tmp_path / ("n" * (NAME_MAX - 5) + ".json")
    write_atomic(file_target(p, "--json"), lambda f: f.write("{}"))
    assert p.read_text() == "{}" and _leftovers(tmp_path) == []
