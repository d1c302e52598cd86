"""Where artefacts go: every output path is checked (and its folder created) before a run starts.

A results file, report folder or JUnit file that cannot be written must cost a usage error
(exit 2) before the first case, never a traceback after the whole run. The checks:

- the path is not empty and has no NUL character; each component fits in NAME_MAX (255)
  bytes and the whole in PATH_MAX (4096) bytes, the limits of Linux's common file systems
  (POSIX.1-2017 <limits.h>; the values are Linux's);
- a file target is not a folder, nor a device, pipe or socket (an atomic rename would replace
  the node itself); a folder target is not a file;
- the folder exists or can be created, and a file can be created in it: a probe file is made
  and removed, which also catches read-only mounts and /proc, where permission bits (and a
  root user's os.access) say nothing.

write_atomic writes through a temporary file beside the target, renamed into place, and
removes the temporary file when anything fails.
"""

from __future__ import annotations

import os
import stat
import tempfile
from pathlib import Path
from typing import IO, Callable, Iterable

__all__ = ["DestinationError", "file_target", "folder_target", "input_folder", "write_atomic",
           "NAME_MAX", "PATH_MAX", "fit_name"]

NAME_MAX = 255
PATH_MAX = 4096


class DestinationError(ValueError):
    """An output path that cannot be written; the message names the option and the path."""


def _fail(option: str, path: object, why: str) -> DestinationError:
    text = str(path)
    shown = text if text.isprintable() and len(text) <= 300 else repr(text[:300] + ("..." if len(text) > 300
                                                                                      else ""))
    return DestinationError(f"{option} {shown}: {why}")


def _path(path: str | os.PathLike, option: str) -> Path:
    text = os.fspath(path)
    if isinstance(text, bytes):
        text = os.fsdecode(text)
    if not text:
        raise DestinationError(f"{option}: the path is empty; give a file or folder name")
    if "\x00" in text:
        raise _fail(option, text, "the path contains a NUL character")
    try:
        raw = os.fsencode(text)
    except UnicodeEncodeError:
        raise _fail(option, text, "the path cannot be encoded for this file system") from None
    if len(raw) >= PATH_MAX:
        raise _fail(option, text, f"the path is {len(raw)} bytes long, over the limit of {PATH_MAX - 1}")
    for part in Path(text).parts:
        n = len(os.fsencode(part))
        if n > NAME_MAX:
            raise _fail(option, text, f"a name in the path is {n} bytes long, over the limit of {NAME_MAX} "
                                      f"bytes per name ({part[:40]}...)")
    return Path(text)


def _probe(folder: Path, option: str, shown: object) -> None:
    try:
        fd, tmp = tempfile.mkstemp(prefix=".refnorm-probe-", dir=folder)
    except OSError as e:
        raise _fail(option, shown, f"cannot create files in the folder {folder}: {e.strerror or e}") from None
    os.close(fd)
    try:
        os.unlink(tmp)
    except OSError:
        pass


def _kind(st: os.stat_result) -> str:
    if stat.S_ISDIR(st.st_mode):
        return "a folder"
    if stat.S_ISREG(st.st_mode):
        return "a file"
    return "a device, pipe or socket"


def _stat(p: Path, option: str, shown: object) -> os.stat_result | None:
    try:
        return os.stat(p)
    except FileNotFoundError:
        return None
    except NotADirectoryError:
        raise _fail(option, shown, "a part of the path is a file, not a folder") from None
    except OSError as e:
        raise _fail(option, shown, f"cannot be examined: {e.strerror or e}") from None


def _mkdir(p: Path, option: str, shown: object) -> None:
    try:
        p.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        raise _fail(option, shown, "a part of the path is a file, not a folder") from None
    except OSError as e:
        raise _fail(option, shown, f"cannot create the folder {p}: {e.strerror or e}") from None


def folder_target(path: str | os.PathLike, option: str, *, files: Iterable[str] = ()) -> Path:
    """A folder to write into: created if missing, checked writable; ``files`` it will hold must
    not be folders (or devices). Returns the folder. Raises DestinationError."""
    p = _path(path, option)
    st = _stat(p, option, path)
    if st is not None and not stat.S_ISDIR(st.st_mode):
        raise _fail(option, path, f"is {_kind(st)}, expected a folder (it would hold "
                                  f"{', '.join(files) or 'the output files'})")
    if st is None:
        _mkdir(p, option, path)
    for name in files:
        fst = _stat(p / name, option, p / name)
        if fst is not None and not stat.S_ISREG(fst.st_mode):
            raise _fail(option, path, f"{p / name} is {_kind(fst)}, expected a file or nothing")
    _probe(p, option, path)
    return p


def file_target(path: str | os.PathLike, option: str) -> Path:
    """A file to write (atomically, through a temporary file beside it): not a folder or a device;
    its folder is created and checked writable. Returns the path. Raises DestinationError."""
    p = _path(path, option)
    st = _stat(p, option, path)
    if st is not None and not stat.S_ISREG(st.st_mode):
        raise _fail(option, path, f"is {_kind(st)}, expected a file name")
    parent = p.parent
    pst = _stat(parent, option, path)
    if pst is not None and not stat.S_ISDIR(pst.st_mode):
        raise _fail(option, path, f"{parent} is {_kind(pst)}, not a folder")
    if pst is None:
        _mkdir(parent, option, path)
    _probe(parent, option, path)
    return p


def input_folder(path: str | os.PathLike, option: str) -> Path | None:
    """A folder to read from: None when it does not exist; an error when the name is bad or the
    path is not a folder. Raises DestinationError."""
    p = _path(path, option)
    st = _stat(p, option, path)
    if st is None:
        return None
    if not stat.S_ISDIR(st.st_mode):
        raise _fail(option, path, f"is {_kind(st)}, expected a folder")
    return p


def fit_name(base: str, suffix: str, limit: int = NAME_MAX) -> str:
    """``base + suffix`` cut so that it fits in ``limit`` bytes; a cut name ends in a digest of the
    whole base (so that two long names that share a beginning stay apart)."""
    if len(os.fsencode(base + suffix)) <= limit:
        return base + suffix
    import hashlib

    tag = "-" + hashlib.sha256(os.fsencode(base)).hexdigest()[:10]
    room = limit - len(os.fsencode(tag + suffix))
    cut = base
    while len(os.fsencode(cut)) > room:
        cut = cut[:-1]
    return cut + tag + suffix


def write_atomic(path: str | os.PathLike, write: Callable[[IO], None], *, binary: bool = False) -> Path:
    """Write a file through a temporary file beside ``path``, renamed into place (atomic on POSIX).

    The temporary file is removed when anything fails; the file gets the mode a plain open()
    would give it (0666 less the umask). Raises OSError (IsADirectoryError for a folder).
    """
    p = Path(path)
    if p.is_dir():
        raise IsADirectoryError(f"{p} is a folder")
    p.parent.mkdir(parents=True, exist_ok=True)
    prefix = f".{p.name}." if len(os.fsencode(p.name)) <= 200 else ".refnorm-"
    fd, tmp = tempfile.mkstemp(prefix=prefix, suffix=".tmp", dir=p.parent)
    try:
        with os.fdopen(fd, "wb" if binary else "w", **({} if binary else {"encoding": "utf-8"})) as f:
            write(f)
        # mkstemp creates the file 0600; give it the mode a plain open() would (umask applied).
        mask = os.umask(0)
        os.umask(mask)
        os.chmod(tmp, 0o666 & ~mask)
        os.replace(tmp, p)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
    return p
