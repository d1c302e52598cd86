"""Views of x that turn every operation into a reduction over a few fixed axes."""

from __future__ import annotations

import math

import numpy as np


def channel_view(x: np.ndarray, axis: int) -> np.ndarray:
    """(pre, C, post) view of x around the canonical channel ``axis`` (a copy only if x's strides demand it)."""
    pre = math.prod(x.shape[:axis])
    post = math.prod(x.shape[axis + 1 :])
    return x.reshape(pre, x.shape[axis], post)


def group_view(x: np.ndarray, axis: int, groups: int) -> np.ndarray:
    """(N, G, C/G, S) view for channels at axis 1, (N, S, G, C/G) for channels last.

    The reduction axes are then (2, 3) and (1, 3): contiguous channel groups,
    channel c in group c // (C/G).
    """
    n = x.shape[0]
    c = x.shape[axis]
    if axis == 1:
        s = math.prod(x.shape[2:])
        return x.reshape(n, groups, c // groups, s)
    s = math.prod(x.shape[1:axis]) * math.prod(x.shape[axis + 1 :])
    if axis != x.ndim - 1:
        x = np.moveaxis(x, axis, -1)
    return x.reshape(n, s, groups, c // groups)


def group_view_axes(axis: int) -> tuple[tuple[int, ...], tuple[int, ...]]:
    """(reduction axes, parameter-broadcast axes) of :func:`group_view`'s result."""
    if axis == 1:
        return (2, 3), (0, 3)
    return (1, 3), (0, 1)
