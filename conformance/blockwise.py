"""Elementwise formulas evaluated block by block, so that their temporaries stay in cache.

A bound such as dx's is a sum of some 40 elementwise terms. Evaluated on whole arrays of 2^21
float64 values, every term is a pass over memory into a fresh 16 MiB temporary; evaluated on
blocks of :data:`BLOCK` elements, the temporaries of one block fit in the core's L2 cache and are
reused. Elementwise IEEE 754 arithmetic rounds each result on its own, so the values are the
same, bit for bit, whatever the blocks (IEEE 754-2019 §5.1: each operation is correctly rounded).
"""

from __future__ import annotations

import math
from typing import Callable, Iterator

import numpy as np

__all__ = ["BLOCK", "block_slices", "evaluate"]

#: Elements per block: 2^14 float64 values are 128 KiB; a formula's dozen live temporaries of one
#: block stay within a 1-2 MiB L2 cache (measured on the 2-core development machine:
#: docs/performance.md).
BLOCK = 1 << 14


def block_slices(shape: tuple[int, ...], block: int = BLOCK) -> Iterator[tuple[slice, ...]]:
    """Index tuples (one slice per axis) that cut an array of ``shape`` into C-order pieces of at
    most about ``block`` elements: whole trailing axes, a range of the first axis that does not fit."""
    shape = tuple(int(d) for d in shape)
    if math.prod(shape) <= block or not shape:
        yield tuple(slice(None) for _ in shape)
        return
    inner, a = 1, len(shape) - 1
    while a > 0 and inner * shape[a] <= block:
        inner *= shape[a]
        a -= 1
    step = max(1, block // inner)
    rest = tuple(slice(None) for _ in shape[a + 1:])
    for outer in np.ndindex(*shape[:a]):
        head = tuple(slice(i, i + 1) for i in outer)
        for lo in range(0, shape[a], step):
            yield head + (slice(lo, min(lo + step, shape[a])),) + rest


def _piece(a, idx: tuple[slice, ...]):
    """The part of operand ``a`` (broadcastable to the full shape, aligned right) that block ``idx`` uses."""
    if not isinstance(a, np.ndarray) or a.ndim == 0:
        return a
    own = idx[len(idx) - a.ndim:]
    return a[tuple(s if n != 1 else slice(None) for s, n in zip(own, a.shape))]


def evaluate(shape: tuple[int, ...], formula: Callable[..., object], block: int = BLOCK, dtype=np.float64,
             **operands) -> tuple[np.ndarray, list]:
    """``formula(out=..., **pieces)`` block by block into a new array of ``shape`` and ``dtype``.

    Each operand is a scalar or an array broadcastable to ``shape``; the formula receives the
    piece of each that one block needs and writes the block's values into ``out`` (or returns
    them). It may return a pair (values or None, extra): the extras of all blocks come back as a
    list, in block order, for the caller to reduce (a maximum, a count).
    """
    result = np.empty(shape, dtype=dtype)
    extras = []
    for idx in block_slices(shape, block):
        out = result[idx] if idx else result[...]  # a 0-d array's block is the array itself (a view)
        got = formula(out=out, **{k: _piece(v, idx) for k, v in operands.items()})
        if isinstance(got, tuple):
            got, extra = got
            extras.append(extra)
        if got is not None and got is not out:
            out[...] = got
    return result, extras
