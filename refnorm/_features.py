"""Shared set-up of the feature-axis normalizations (layer norm, RMS norm)."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._validate import canonical_axes, check_sizes, describe
from .errors import RefnormError


@dataclass(frozen=True)
class FeaturePlan:
    """How x is viewed: ``view`` shape, reduction axes ``red`` of the view, the
    parameters' broadcast shape in the view, the axes dweight sums over, and the
    public shapes of the parameters and statistics."""

    view: tuple[int, ...]
    red: tuple[int, ...]
    param_view: tuple[int, ...]
    param_red: tuple[int, ...]
    param_shape: tuple[int, ...]
    stat_shape: tuple[int, ...]


def feature_plan(shape: tuple[int, ...], normalized_shape: Any, axes: Any) -> FeaturePlan:
    """Resolve ``normalized_shape`` (trailing dims of x) or ``axes`` (any axes) into a plan."""
    ndim = len(shape)
    if (normalized_shape is None) == (axes is None):
        raise RefnormError(
            "give exactly one of normalized_shape (the trailing dims of x) and axes (explicit axes); "
            f"received normalized_shape={normalized_shape!r}, axes={axes!r}"
        )
    if normalized_shape is not None:
        ns = check_sizes("normalized_shape", normalized_shape)
        if not ns or len(ns) > ndim or tuple(shape[ndim - len(ns):]) != ns:
            raise RefnormError(
                f"normalized_shape is {ns}, expected the trailing dims of x (shape {shape}), e.g. {shape[-1:]}"
            )
        ax = tuple(range(ndim - len(ns), ndim))
    else:
        ax = canonical_axes(axes, ndim)
    param_shape = tuple(shape[a] for a in ax)
    rest = tuple(a for a in range(ndim) if a not in ax)
    stat_shape = tuple(shape[a] for a in rest)
    if ax == tuple(range(ndim - len(ax), ndim)):
        # Trailing axes: a 2-D view, contiguous rows for a C-ordered x.
        k = math.prod(param_shape)
        r = math.prod(stat_shape)
        return FeaturePlan((r, k), (1,), (1, k), (0,), param_shape, stat_shape)
    pv = tuple(shape[a] if a in ax else 1 for a in range(ndim))
    return FeaturePlan(tuple(shape), ax, pv, rest, param_shape, stat_shape)


def check_param(name: str, a: np.ndarray | None, plan: FeaturePlan) -> np.ndarray | None:
    """Reshape a feature parameter to the view, or explain why its shape is wrong."""
    if a is None:
        return None
    if a.shape != plan.param_shape:
        raise RefnormError(
            f"{name} has shape {a.shape}, expected {plan.param_shape}: one value per element of the normalized axes"
        )
    # The weight's dims are the normalized axes in increasing order, so
    # inserting unit dims elsewhere is a plain reshape.
    return a.reshape(plan.param_view)


def check_stat(name: str, a: np.ndarray | None, plan: FeaturePlan) -> np.ndarray | None:
    """Reshape a saved per-row statistic to keepdims in the view."""
    if a is None:
        return None
    if a.shape != plan.stat_shape:
        raise RefnormError(
            f"{name} has shape {a.shape}, expected {plan.stat_shape}: one value per normalized row "
            f"(received {describe(a)})"
        )
    kd = tuple(1 if i in plan.red else d for i, d in enumerate(plan.view))
    return a.reshape(kd)
