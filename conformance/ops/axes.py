"""How an op's statistics group the axes of x: three rules, one per op family.

Each rule gives, for a case (its logical shape in its layout), the reduction lengths, the
statistic and parameter shapes, the op's structural keyword arguments, and a view of x in
which every statistic is a reduction over fixed axes (reshaped, never copied unless the
strides demand it; reductions keep their dims, so per-statistic arrays broadcast):

    PerChannel        (pre, C, post)   statistics over (0, 2), parameters over (0, 2)   batch norm
    PerSampleGroups   (N, G, C/G, S)   statistics over (2, 3), parameters over (0, 3)   channels first
                      (N, S, G, C/G)   statistics over (1, 3), parameters over (0, 1)   channels last
                                       group norm (G = case.groups), instance norm (G = C)
    TrailingAxes      (rows, K)        statistics over (1,),   parameters over (0,)     layer, RMS norm

The rules take the case duck-typed (shape, channel_axis, channels, groups, normalized_shape,
numel: conformance.cases.model.Case) so that this package imports nothing of the harness.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

__all__ = ["View", "PerChannel", "PerSampleGroups", "TrailingAxes", "statistic_index"]

CHANNEL_LAYOUTS = ("channels_first", "channels_last")
CHANNEL_STRIDES = ("contiguous", "transposed", "sliced", "reversed", "channels_last_memory")
TRAILING_STRIDES = ("contiguous", "transposed", "sliced", "reversed")


@dataclass(frozen=True)
class View:
    """x's canonical view for an op: view shape, statistic and parameter reduction axes, the public
    statistic and parameter shapes, the parameters' keepdims shape, and the lengths n (per
    statistic) and m (per parameter)."""

    view_shape: tuple[int, ...]
    red: tuple[int, ...]
    param_red: tuple[int, ...]
    stat_shape: tuple[int, ...]
    param_shape: tuple[int, ...]
    param_kd: tuple[int, ...]
    n: int
    m: int


def statistic_index(view: View, shape: tuple[int, ...]) -> np.ndarray:
    """For every element of x (logical ``shape``), the flat index of its statistic in the public
    statistic order (the keepdims statistic array, raveled)."""
    kd = tuple(1 if i in view.red else d for i, d in enumerate(view.view_shape))
    ids = np.arange(math.prod(kd)).reshape(kd)
    return np.broadcast_to(ids, view.view_shape).reshape(shape)


class _ChannelAxes:
    """What the channel ops share: a channel axis (1, or last for channels_last), one weight per
    channel, and parameter sums over every axis but the channel."""

    layouts: ClassVar[tuple[str, ...]] = CHANNEL_LAYOUTS
    strides: ClassVar[tuple[str, ...]] = CHANNEL_STRIDES

    def param_length(self, case: Any) -> int:
        return case.numel // case.channels

    def param_shape(self, case: Any) -> tuple[int, ...]:
        return (case.channels,)


@dataclass(frozen=True)
class PerChannel(_ChannelAxes):
    """One statistic per channel, over the batch and every spatial axis (batch norm)."""

    takes_groups: ClassVar[bool] = False

    def case_fields(self, k: int) -> dict[str, int]:
        return {"groups": 0, "norm_ndim": 0}

    def kwargs(self, case: Any) -> dict[str, Any]:
        return {"axis": case.channel_axis}

    def group_length(self, case: Any) -> int:
        return case.numel // case.channels

    def view(self, case: Any) -> View:
        shape = tuple(case.shape)
        ax = case.channel_axis
        c = shape[ax]
        pre, post = math.prod(shape[:ax]), math.prod(shape[ax + 1:])
        return View((pre, c, post), (0, 2), (0, 2), (c,), (c,), (1, c, 1), pre * post, pre * post)


@dataclass(frozen=True)
class PerSampleGroups(_ChannelAxes):
    """One statistic per sample and group of consecutive channels, over the group's channels and
    the spatial axes (Wu & He 2018, §3; section from memory). from_case: G = case.groups (group
    norm, which takes num_groups); else one channel per group, G = C (instance norm)."""

    from_case: bool

    @property
    def takes_groups(self) -> bool:
        return self.from_case

    def groups(self, case: Any) -> int:
        return case.groups if self.from_case else case.channels

    def case_fields(self, k: int) -> dict[str, int]:
        return {"groups": k if self.from_case else 0, "norm_ndim": 0}

    def kwargs(self, case: Any) -> dict[str, Any]:
        if self.from_case:
            return {"num_groups": case.groups, "axis": case.channel_axis}
        return {"axis": case.channel_axis}

    def group_length(self, case: Any) -> int:
        return case.numel // (case.shape[0] * self.groups(case))

    def view(self, case: Any) -> View:
        shape = tuple(case.shape)
        ax = case.channel_axis
        c = shape[ax]
        g = self.groups(case)
        if g < 1 or c % g:
            raise ValueError(f"case.groups is {g}, expected a positive divisor of the {c} channels")
        cg = c // g
        nb = shape[0]
        s = math.prod(shape) // (nb * c)
        if ax == 1:
            v, red, pred, pkd = (nb, g, cg, s), (2, 3), (0, 3), (1, g, cg, 1)
        else:
            v, red, pred, pkd = (nb, s, g, cg), (1, 3), (0, 1), (1, 1, g, cg)
        return View(v, red, pred, (nb, g), (c,), pkd, cg * s, nb * s)


@dataclass(frozen=True)
class TrailingAxes:
    """One statistic per leading index, over the last norm_ndim axes (layer norm, RMS norm)."""

    layouts: ClassVar[tuple[str, ...]] = ("trailing",)
    strides: ClassVar[tuple[str, ...]] = TRAILING_STRIDES
    takes_groups: ClassVar[bool] = False

    def case_fields(self, k: int) -> dict[str, int]:
        return {"groups": 0, "norm_ndim": k}

    def kwargs(self, case: Any) -> dict[str, Any]:
        return {"normalized_shape": case.normalized_shape}

    def group_length(self, case: Any) -> int:
        return math.prod(case.normalized_shape)

    def param_length(self, case: Any) -> int:
        return case.numel // math.prod(case.normalized_shape)

    def param_shape(self, case: Any) -> tuple[int, ...]:
        return case.normalized_shape

    def view(self, case: Any) -> View:
        shape = tuple(case.shape)
        ns = case.normalized_shape
        k = math.prod(ns)
        rows = math.prod(shape) // k
        lead = shape[: len(shape) - case.norm_ndim]
        return View((rows, k), (1,), (0,), lead, ns, (1, k), k, rows)
