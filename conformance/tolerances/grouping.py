"""Views of a case's arrays that make every statistic a reduction over fixed axes.

Every op's x (logical shape ``case.shape``) is reshaped, never copied unless its
strides demand it, into a view whose statistic axes and parameter axes are fixed:

    batch_norm       (pre, C, post)        statistics over (0, 2), parameters over (0, 2)
    group/instance   (N, G, C/G, S)        statistics over (2, 3), parameters over (0, 3)   channels first
                     (N, S, G, C/G)        statistics over (1, 3), parameters over (0, 1)   channels last
    layer/RMS        (rows, K)             statistics over (1,),   parameters over (0,)

(instance norm is group norm with G = C). Reductions keep their dims, so a
per-statistic array broadcasts against the view.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..cases.model import Case

__all__ = ["Grouping", "grouping"]


@dataclass(frozen=True)
class Grouping:
    """How a case's elementwise, per-statistic and per-parameter arrays line up."""

    shape: tuple[int, ...]
    view_shape: tuple[int, ...]
    red: tuple[int, ...]
    param_red: tuple[int, ...]
    stat_shape: tuple[int, ...]
    param_shape: tuple[int, ...]
    param_kd: tuple[int, ...]
    n: int
    m: int

    def view(self, a: np.ndarray) -> np.ndarray:
        """An elementwise array of the case's shape in the view."""
        return np.asarray(a, dtype=np.float64).reshape(self.view_shape)

    def unview(self, v: np.ndarray) -> np.ndarray:
        """Back from the view to the case's shape (broadcasting per-statistic arrays first)."""
        return np.broadcast_to(v, self.view_shape).reshape(self.shape)

    def gsum(self, v: np.ndarray) -> np.ndarray:
        return np.sum(v, axis=self.red, keepdims=True)

    def gmean(self, v: np.ndarray) -> np.ndarray:
        return np.sum(v, axis=self.red, keepdims=True) / self.n

    def psum(self, v: np.ndarray) -> np.ndarray:
        return np.sum(np.broadcast_to(v, self.view_shape), axis=self.param_red, keepdims=True)

    def stat_out(self, k: np.ndarray) -> np.ndarray:
        """A keepdims per-statistic array in the op's public statistic shape."""
        kd = tuple(1 if i in self.red else d for i, d in enumerate(self.view_shape))
        return np.broadcast_to(k, kd).reshape(self.stat_shape)

    def param_out(self, p: np.ndarray) -> np.ndarray:
        """A keepdims per-parameter array in the parameters' public shape."""
        return np.broadcast_to(p, self.param_kd).reshape(self.param_shape)

    def param_in(self, p: np.ndarray | None) -> np.ndarray | None:
        """A parameter (weight, bias, running statistic) of public shape, broadcastable to the view."""
        if p is None:
            return None
        return np.asarray(p, dtype=np.float64).reshape(self.param_kd)

    def stat_in(self, s: np.ndarray) -> np.ndarray:
        """A statistic of public shape as a keepdims array of the view."""
        kd = tuple(1 if i in self.red else d for i, d in enumerate(self.view_shape))
        return np.asarray(s, dtype=np.float64).reshape(kd)


def grouping(case: Case) -> Grouping:
    """The view of ``case``'s arrays (see the module docstring)."""
    shape = tuple(case.shape)
    if case.op in ("layer_norm", "rms_norm"):
        k = math.prod(case.normalized_shape)
        rows = math.prod(shape) // k
        lead = shape[: len(shape) - case.norm_ndim]
        return Grouping(shape, (rows, k), (1,), (0,), lead, case.normalized_shape, (1, k), k, rows)
    ax = case.channel_axis
    c = shape[ax]
    if case.op == "batch_norm":
        pre, post = math.prod(shape[:ax]), math.prod(shape[ax + 1:])
        v = (pre, c, post)
        return Grouping(shape, v, (0, 2), (0, 2), (c,), (c,), (1, c, 1), pre * post, pre * post)
    g = c if case.op == "instance_norm" else case.groups
    if g < 1 or c % g:
        raise ValueError(f"case.groups is {g}, expected a positive divisor of the {c} channels")
    cg = c // g
    nb = shape[0]
    s = math.prod(shape) // (nb * c)
    if ax == 1:
        v, red, pred, pkd = (nb, g, cg, s), (2, 3), (0, 3), (1, g, cg, 1)
    else:
        v, red, pred, pkd = (nb, s, g, cg), (1, 3), (0, 1), (1, 1, g, cg)
    return Grouping(shape, v, red, pred, (nb, g), (c,), pkd, cg * s, nb * s)
