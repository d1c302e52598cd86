"""Small named results of the oracle's functions."""

from __future__ import annotations

from dataclasses import dataclass, fields

import numpy as np


@dataclass(frozen=True)
class NormForward:
    """Forward result, all float64.

    y : shape of x.
    mean : per-statistic mean of the normalized groups (None for RMS norm).
    var : the biased variance used to normalize (the mean square for RMS norm).
    rstd : 1/sqrt(var + eps) (or 1/(sqrt(var) + eps) with eps_placement="outside").
    running_mean, running_var : the updated running statistics, when running
        statistics were given in training mode; the given ones in eval mode; else None.

    The statistic shapes are the op's own: (C,) for batch norm, (N, G) for group
    norm, (N, C) for instance norm, the leading (batch) shape for layer/RMS norm.
    """

    y: np.ndarray
    mean: np.ndarray | None
    var: np.ndarray
    rstd: np.ndarray
    running_mean: np.ndarray | None = None
    running_var: np.ndarray | None = None

    def as_dict(self) -> dict[str, np.ndarray]:
        """The outputs that are present, by name."""
        return {f.name: getattr(self, f.name) for f in fields(self) if getattr(self, f.name) is not None}


@dataclass(frozen=True)
class NormBackward:
    """Backward result, all float64.

    dx : shape of x.
    dweight, dbias : shape of the weight; the gradients with respect to a weight
        and a bias, computed whether or not the layer has them (they do not
        change dx). dweight is taken at the given weight (or at 1).
    """

    dx: np.ndarray
    dweight: np.ndarray
    dbias: np.ndarray

    def as_dict(self) -> dict[str, np.ndarray]:
        return {f.name: getattr(self, f.name) for f in fields(self)}
