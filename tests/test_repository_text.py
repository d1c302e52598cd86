"""The repository's own text: no file that is tracked holds what a merge left unresolved.

A merge that stops on a conflict writes the two sides between marker lines of seven '<', '=' and
'>' characters (the git-merge manual, "How conflicts are presented"); a commit of such a file
ships both sides and the markers. Checked over every tracked text file, not only code, since a
document (docs/, README.md, DEVELOPERS.md) is what a reviewer reads.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
MARKER = re.compile(r"^(<{7}|={7}|>{7})( |$)", re.MULTILINE)


def _tracked() -> list[Path]:
    if shutil.which("git") is None or not (ROOT / ".git").exists():
        pytest.skip("not a git checkout: the tracked files are not known")
    out = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True, timeout=60, check=True).stdout
    return [ROOT / p for p in out.decode("utf-8", "surrogateescape").split("\0") if p]


def test_the_marker_pattern_sees_a_conflict():
    text = "a\n<<<<<<< HEAD\nb\n=======\nc\n>>>>>>> topic\n"
    assert [m.group(1)[0] for m in MARKER.finditer(text)] == ["<", "=", ">"]
    assert not MARKER.search("a heading\n=========\n")  # a reStructuredText underline is not a marker


def test_no_tracked_text_file_holds_conflict_markers():
    found = []
    for path in _tracked():
        if not path.is_file() or path.stat().st_size > 4 << 20:
            continue
        data = path.read_bytes()
        if b"\0" in data[:8192]:  # binary (compressed records, .npy)
            continue
        text = data.decode("utf-8", "replace")
        found += [f"{path.relative_to(ROOT)}:{text.count(chr(10), 0, m.start()) + 1}" for m in MARKER.finditer(text)]
    assert not found, "unresolved merge conflicts:\n" + "\n".join(found)
