"""Running-statistic updates (exponential or cumulative moving averages)."""

from __future__ import annotations

from typing import Any

import numpy as np

from ._validate import MOMENTUM_CONVENTIONS, as_float64, check_choice, check_momentum

__all__ = ["running_update"]


def running_update(
    running: Any,
    batch_stat: Any,
    *,
    momentum: float | None = 0.1,
    momentum_convention: str = "new",
    batches_seen: int | None = None,
) -> np.ndarray:
    """Update a running statistic with one batch statistic s.

    momentum_convention="new":  r' = (1 - momentum) * r + momentum * s
        (momentum weights the new batch value; torch BatchNorm/InstanceNorm, ONNX
        BatchNormalization-15 writes it the other way round: from memory).
    momentum_convention="old":  r' = momentum * r + (1 - momentum) * s
        (momentum weights the old running value; Keras BatchNormalization, default
        0.99; Flax BatchNorm, default 0.99: from memory).
    momentum=None:  r' = r + (s - r) / (batches_seen + 1), the cumulative average of
        all batches including this one (torch with momentum=None, where
        batches_seen is num_batches_tracked before the step).

    Parameters
    ----------
    running, batch_stat : arrays of the same shape (any float dtype; computed in float64)
    momentum : float in [0, 1], or None
    momentum_convention : "new" or "old"
    batches_seen : int >= 0, required when momentum is None

    Returns
    -------
    float64 array of the shape of ``running``.
    """
    m, seen = check_momentum(momentum, batches_seen)
    check_choice("momentum_convention", momentum_convention, MOMENTUM_CONVENTIONS)
    r = as_float64("running", running)
    s = as_float64("batch_stat", batch_stat)
    if r.shape != s.shape:
        from .errors import RefnormError

        raise RefnormError(f"batch_stat has shape {s.shape}, expected {r.shape} (the shape of running)")
    return _update(r, s, m, momentum_convention, seen)


def _update(r: np.ndarray, s: np.ndarray, m: float, convention: str, seen: int | None) -> np.ndarray:
    if seen is not None:
        return r + (s - r) / (seen + 1)
    if convention == "new":
        return (1.0 - m) * r + m * s
    return m * r + (1.0 - m) * s
