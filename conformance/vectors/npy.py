"""Strict `.npy` files: version 1.0, little-endian, C order, five element types, no pickles.

The format is NumPy's (numpy.lib.format, "NPY format version 1.0"): the magic string
``\\x93NUMPY``, the version bytes 1 and 0, a little-endian uint16 header length, an ASCII
header holding a Python dict literal with exactly the keys 'descr', 'fortran_order' and
'shape', then the array's bytes in C order. Files are written with NumPy's own writer
(``numpy.lib.format.write_array``, version (1, 0), allow_pickle=False).

Reading never unpickles and never trusts a size before checking it. A file is refused, with
an NpyError that names it and says why, unless:

- it is a regular file of at most LIMITS.max_bytes bytes;
- the magic and the version (1, 0) are right and the header is at most LIMITS.max_header
  bytes of printable ASCII (NumPy's own default limit on a header it parses, 10000);
- the header parses as a dict literal (``ast.literal_eval``: literals only) with exactly those
  keys; 'descr' is one of DESCRS (written out: '<f8', '<f4', '<f2', '<u2', '|u1'; object
  arrays, whose descr is '|O', are pickles and are refused); 'fortran_order' is False;
  'shape' is a tuple of at most LIMITS.max_ndim integers >= 0 whose product is at most
  LIMITS.max_elements;
- the file holds exactly the header and prod(shape) * itemsize bytes (a truncated file and
  one with trailing bytes are both refused).

Number formats that NumPy's `.npy` cannot name (bfloat16, the float8 formats: ml_dtypes
types, whose descr would be a raw void) are stored as their bit patterns in the unsigned
integer of their width; ``stored_dtype`` says which, ``encode``/``decode`` convert by
reinterpreting the bits (no rounding).
"""

from __future__ import annotations

import ast
import io
import os
import stat
import struct
from dataclasses import dataclass
from pathlib import Path
from typing import IO

import numpy as np

from .. import dtypes

__all__ = ["NpyError", "Limits", "LIMITS", "DESCRS", "Header", "read_header", "read_npy", "write_npy",
           "stored_dtype", "as_bits", "encode", "decode", "MAGIC"]

MAGIC = b"\x93NUMPY"
#: Element types a vectors file may hold: descr -> dtype. Everything else is refused.
DESCRS = {d: np.dtype(d) for d in ("<f8", "<f4", "<f2", "<u2", "|u1")}
_KEYS = frozenset(("descr", "fortran_order", "shape"))


class NpyError(ValueError):
    """A `.npy` file that is refused; the message names the file and what is wrong with it."""


@dataclass(frozen=True)
class Limits:
    """What a `.npy` file may claim before it is read (see the module docstring)."""

    max_header: int = 10000
    max_ndim: int = 32
    max_elements: int = 1 << 28
    max_bytes: int = 1 << 31


LIMITS = Limits()


@dataclass(frozen=True)
class Header:
    """A checked header: element type, shape, where the data starts and how many bytes it has."""

    descr: str
    shape: tuple[int, ...]
    offset: int
    nbytes: int

    @property
    def dtype(self) -> np.dtype:
        return DESCRS[self.descr]


def _shown(path: str | os.PathLike) -> str:
    text = os.fspath(path)
    text = os.fsdecode(text) if isinstance(text, bytes) else text
    return text if text.isprintable() and len(text) <= 300 else repr(text[:300])


def _parse_header(raw: bytes, where: str, limits: Limits) -> tuple[str, tuple[int, ...]]:
    def bad(why: str) -> NpyError:
        return NpyError(f"{where}: {why}")

    try:
        text = raw.decode("ascii")
    except UnicodeDecodeError:
        raise bad("the header is not ASCII") from None
    if not all(c.isprintable() or c in "\n\t" for c in text):
        raise bad("the header holds control characters")
    try:
        d = ast.literal_eval(text.strip())
    except (ValueError, SyntaxError, TypeError, MemoryError, RecursionError):
        raise bad("the header is not a Python dict literal (expected {'descr': ..., 'fortran_order': False, "
                  "'shape': (...)})") from None
    if not isinstance(d, dict):
        raise bad(f"the header is a {type(d).__name__}, expected a dict")
    keys = set(d)
    if keys != _KEYS:
        got = sorted(map(repr, keys))[:6]
        raise bad(f"the header has keys {', '.join(got) or 'none'}, expected exactly 'descr', 'fortran_order', "
                  "'shape'")
    descr = d["descr"]
    if not isinstance(descr, str):
        raise bad(f"descr is a {type(descr).__name__} (a structured or nested type), expected one of "
                  f"{', '.join(DESCRS)}")
    if descr not in DESCRS:
        why = " (an object array: a pickle, never read)" if "O" in descr else (
            " (big-endian)" if descr.startswith(">") else "")
        raise bad(f"descr is {descr[:20]!r}{why}, expected one of {', '.join(DESCRS)}")
    fo = d["fortran_order"]
    if fo is not False:
        raise bad(f"fortran_order is {fo!r:.20}, expected False (C order)")
    shape = d["shape"]
    if not isinstance(shape, tuple) or not all(isinstance(n, int) and not isinstance(n, bool) for n in shape):
        raise bad(f"shape is {shape!r:.60}, expected a tuple of integers")
    if len(shape) > limits.max_ndim:
        raise bad(f"shape has {len(shape)} dimensions, over the limit of {limits.max_ndim}")
    if any(n < 0 for n in shape):
        raise bad(f"shape {shape!r:.60} has a negative dimension")
    count = 1
    for n in shape:
        count *= n
        if count > limits.max_elements:
            raise bad(f"shape {shape!r:.80} has more than {limits.max_elements} elements, the limit")
    return descr, shape


def _read_header(f: IO[bytes], size: int, where: str, limits: Limits) -> Header:
    head = f.read(10)
    if len(head) < 10 or head[:6] != MAGIC:
        raise NpyError(f"{where}: not a .npy file (no \\x93NUMPY magic string at its start)")
    if head[6:8] != b"\x01\x00":
        raise NpyError(f"{where}: .npy version {head[6]}.{head[7]}, expected 1.0")
    (hlen,) = struct.unpack("<H", head[8:10])
    if hlen > limits.max_header:
        raise NpyError(f"{where}: the header is {hlen} bytes, over the limit of {limits.max_header}")
    raw = f.read(hlen)
    if len(raw) < hlen:
        raise NpyError(f"{where}: truncated in the header ({len(raw)} of {hlen} bytes)")
    descr, shape = _parse_header(raw, where, limits)
    count = 1
    for n in shape:
        count *= n
    nbytes = count * DESCRS[descr].itemsize
    offset = 10 + hlen
    if offset + nbytes != size:
        what = "truncated" if offset + nbytes > size else "has trailing bytes"
        raise NpyError(f"{where}: {what}: {size - offset} bytes of data, expected {nbytes} for shape {shape} of "
                       f"{descr}")
    return Header(descr=descr, shape=shape, offset=offset, nbytes=nbytes)


def _open(path: str | os.PathLike, limits: Limits) -> tuple[IO[bytes], int]:
    where = _shown(path)
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise NpyError(f"{where}: no such file") from None
    except (OSError, ValueError) as e:
        raise NpyError(f"{where}: cannot be examined: {getattr(e, 'strerror', None) or e}") from None
    if not stat.S_ISREG(st.st_mode):
        raise NpyError(f"{where}: not a regular file")
    if st.st_size > limits.max_bytes:
        raise NpyError(f"{where}: {st.st_size} bytes, over the limit of {limits.max_bytes}")
    try:
        f = open(path, "rb")
    except OSError as e:
        raise NpyError(f"{where}: cannot be read: {e.strerror or e}") from None
    return f, os.fstat(f.fileno()).st_size


def read_header(path: str | os.PathLike, *, limits: Limits = LIMITS) -> Header:
    """The checked header of a `.npy` file (the whole file's size is checked against it too)."""
    f, size = _open(path, limits)
    with f:
        return _read_header(f, size, _shown(path), limits)


def read_npy(path: str | os.PathLike, *, shape: tuple[int, ...] | None = None, descr: str | None = None,
             limits: Limits = LIMITS) -> np.ndarray:
    """The array in a strict `.npy` file (module docstring), as a new C-contiguous array.

    ``shape`` and ``descr``, when given, must match the header; they are checked before any
    data is read. Raises NpyError.
    """
    where = _shown(path)
    f, size = _open(path, limits)
    with f:
        h = _read_header(f, size, where, limits)
        if descr is not None and h.descr != descr:
            raise NpyError(f"{where}: element type {h.descr}, expected {descr}")
        if shape is not None and h.shape != tuple(shape):
            raise NpyError(f"{where}: shape {h.shape}, expected {tuple(shape)}")
        data = f.read(h.nbytes)
    if len(data) != h.nbytes:  # the file shrank while it was read
        raise NpyError(f"{where}: truncated while reading ({len(data)} of {h.nbytes} bytes)")
    return np.frombuffer(data, dtype=h.dtype).reshape(h.shape).copy()


def write_npy(path: str | os.PathLike, array: np.ndarray) -> bytes:
    """Write ``array`` (one of DESCRS, any layout) as a version 1.0 `.npy` file; return its bytes."""
    a = _c_order(array)
    if a.dtype.str not in DESCRS:
        raise NpyError(f"{_shown(path)}: cannot store dtype {a.dtype} (stored forms: {', '.join(DESCRS)}; "
                       "encode() a format first)")
    buf = io.BytesIO()
    np.lib.format.write_array(buf, a, version=(1, 0), allow_pickle=False)
    data = buf.getvalue()
    Path(path).write_bytes(data)
    return data


def _c_order(a) -> np.ndarray:
    """A C-contiguous array of the same shape (numpy.ascontiguousarray would make a 0-d array 1-d)."""
    arr = np.asarray(a)
    return arr if arr.flags.c_contiguous else arr.copy(order="C")


def as_bits(fmt: str) -> bool:
    """Whether a format is stored as bit patterns: `.npy` names NumPy's own floats ('<f8', '<f4', '<f2')
    only; an ml_dtypes format has no descr a reader can use (bfloat16's is a raw '<V2')."""
    return dtypes.dtype_of(fmt).newbyteorder("<").str not in DESCRS


def stored_dtype(fmt: str) -> np.dtype:
    """How a number format is stored: itself where `.npy` has a type for it (NumPy's floats), else
    the unsigned integer of its width holding its bit patterns (bfloat16: '<u2', float8: '|u1')."""
    dt = dtypes.dtype_of(fmt)
    if not as_bits(fmt):
        return dt.newbyteorder("<")
    return np.dtype(f"<u{dt.itemsize}")


def encode(a: np.ndarray, fmt: str) -> np.ndarray:
    """``a`` (of format ``fmt``) in its stored form: the same bits, reinterpreted (C-contiguous)."""
    arr = _c_order(a)
    want = dtypes.dtype_of(fmt)
    if arr.dtype != want:
        raise NpyError(f"array of dtype {arr.dtype}, expected the format {fmt}")
    st = stored_dtype(fmt)
    return arr.view(st) if as_bits(fmt) else arr.astype(st, copy=False)


def decode(a: np.ndarray, fmt: str) -> np.ndarray:
    """A stored array read back as the format ``fmt`` (the stored dtype must be stored_dtype(fmt))."""
    want = stored_dtype(fmt)
    if a.dtype != want:
        raise NpyError(f"stored array of dtype {a.dtype.str}, expected {want.str} for {fmt}")
    fdt = dtypes.dtype_of(fmt)
    arr = _c_order(a)
    return arr.view(fdt) if as_bits(fmt) else arr.astype(fdt, copy=False)
