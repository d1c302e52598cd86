"""Views of a case's arrays that make every statistic a reduction over fixed axes.

Every op's x (logical shape ``case.shape``) is reshaped, never copied unless its
strides demand it, into the view its description's axes rule gives
(conformance.ops.axes: (pre, C, post) for one statistic per channel, (N, G, C/G, S)
or (N, S, G, C/G) for per-sample groups, (rows, K) for trailing axes). Reductions
keep their dims, so a per-statistic array broadcasts against the view.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np

from .. import ops
from ..cases.model import Case
from ..ops.axes import View

__all__ = ["Grouping", "grouping"]


@dataclass(frozen=True)
class Grouping(View):
    """How a case's elementwise, per-statistic and per-parameter arrays line up: the op's View of
    x (conformance.ops.axes.View) and the case's logical shape."""

    shape: tuple[int, ...]

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
    v = ops.get(case.op).axes.view(case)
    return Grouping(**{f.name: getattr(v, f.name) for f in fields(v)}, shape=tuple(case.shape))
