"""Batch normalization over a batch split across R replicas (data-parallel, synchronized statistics).

Replica r holds a shard x_r of n_r samples along axis 0. The global statistics of channel c are
those of the concatenated batch; each replica normalizes its own shard with them. The merge of
per-replica moments is Chan, Golub & LeVeque's pairwise update (1979; "Algorithms for computing
the sample variance", The American Statistician 37(3), 1983, eq. 2.1):

    n = n_a + n_b,  delta = mean_b - mean_a,
    mean = mean_a + delta * n_b / n,
    M2   = M2_a + M2_b + delta^2 * n_a * n_b / n,

where M2 is the sum of squared deviations from the mean. The global result is exactly
batch normalization of the concatenation; the functions below compute it so (the two-pass
oracle of :mod:`refnorm.batch_norm` on the concatenated batch) and return each replica's share,
so that their values do not depend on any merge order. :func:`merge_moments` is the merge itself,
as a pure function, for kernels and tests that compose it.

These functions live in this module (``refnorm.replicas``), not in ``refnorm``'s top-level
namespace: their arguments are lists of shards, which the single-process API's checks and its
fuzz table (tests/test_oracle_fuzz.py) do not model; tests/test_oracle_replicas.py checks their
validation instead.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from ._moments import moments
from ._validate import as_float64, canonical_axis, check_choice, check_nonempty
from .batch_norm import batch_norm_backward, batch_norm_forward
from .errors import RefnormError

__all__ = ["merge_moments", "shard_moments", "replica_batch_norm_forward", "replica_batch_norm_backward",
           "ReplicaForward", "ReplicaBackward", "PARAM_GRAD_MODES"]

#: How a replica's dweight/dbias are defined: "reduced" (the sum over every replica, what an
#: all-reduce after the backward gives; torch SyncBatchNorm under DDP, from memory) or "local"
#: (the sum over the replica's own shard, what the backward computes before gradient sync).
PARAM_GRAD_MODES = ("reduced", "local")


@dataclass(frozen=True)
class ReplicaForward:
    """Forward result over R shards, all float64.

    y : one array per replica, the shape of its shard.
    mean, var, rstd : global per-channel statistics (var biased), shape (C,).
    count : the global count per channel, n = sum_r n_r * prod(spatial).
    counts : each replica's count per channel.
    running_mean, running_var : the updated running statistics (global count; None when not given).
    """

    y: tuple[np.ndarray, ...]
    mean: np.ndarray
    var: np.ndarray
    rstd: np.ndarray
    count: int
    counts: tuple[int, ...]
    running_mean: np.ndarray | None = None
    running_var: np.ndarray | None = None


@dataclass(frozen=True)
class ReplicaBackward:
    """Backward result over R shards, all float64.

    dx : one array per replica, the shape of its shard.
    dweight, dbias : the reduced parameter gradients, shape (C,).
    dweight_local, dbias_local : each replica's own share (they sum to the reduced ones).
    """

    dx: tuple[np.ndarray, ...]
    dweight: np.ndarray
    dbias: np.ndarray
    dweight_local: tuple[np.ndarray, ...]
    dbias_local: tuple[np.ndarray, ...]

    def param_grads(self, rank: int, mode: str = "reduced") -> dict[str, np.ndarray]:
        """dweight and dbias as replica ``rank`` returns them under ``mode`` (PARAM_GRAD_MODES)."""
        check_choice("mode", mode, PARAM_GRAD_MODES)
        if mode == "reduced":
            return {"dweight": self.dweight, "dbias": self.dbias}
        return {"dweight": self.dweight_local[rank], "dbias": self.dbias_local[rank]}


def merge_moments(parts: Sequence[tuple[Any, Any, Any]]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Merge (count, mean, M2) triples with Chan, Golub & LeVeque's pairwise update (1983, eq. 2.1).

    Parts are merged as a balanced tree (pairs, then pairs of pairs), the order that keeps
    the rounding error growth at ceil(log2 R) merge steps (Chan et al. 1983, §3). Counts may be
    arrays (per channel) or scalars; a part with count 0 is the identity. Returns float64
    (count, mean, M2) broadcast to a common shape.
    """
    if not isinstance(parts, (list, tuple)) or not parts:
        raise RefnormError(f"parts is {type(parts).__name__}, expected a non-empty list of (count, mean, M2)")
    level = []
    for i, p in enumerate(parts):
        if not isinstance(p, (list, tuple)) or len(p) != 3:
            raise RefnormError(f"parts[{i}] is {p!r:.60}, expected a (count, mean, M2) triple")
        n, m, s = (np.asarray(v, dtype=np.float64) for v in p)
        if np.any(n < 0) or np.any(s < 0):
            raise RefnormError(f"parts[{i}] has a negative count or M2, expected counts >= 0 and M2 >= 0")
        level.append(np.broadcast_arrays(n, m, s))
    while len(level) > 1:
        nxt = [_merge2(level[k], level[k + 1]) for k in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    n, m, s = level[0]
    return n, m, s


def _merge2(a, b):
    na, ma, sa = a
    nb, mb, sb = b
    n = na + nb
    with np.errstate(invalid="ignore", divide="ignore"):
        delta = mb - ma
        frac = np.where(n > 0, nb / np.where(n > 0, n, 1.0), 0.0)
        mean = np.where(nb == 0, ma, np.where(na == 0, mb, ma + delta * frac))
        between = np.where((na == 0) | (nb == 0), 0.0, delta * delta * na * frac)
    return n, mean, sa + sb + between


def shard_moments(x: Any, *, axis: int = 1) -> tuple[int, np.ndarray, np.ndarray]:
    """One shard's (count, mean, M2) per channel: corrected two-pass moments (Higham 2002, §1.9)."""
    xv, c = _channels(x, axis, "x")
    m = moments(xv, (0, 2))
    mean = m.mean.reshape(c)
    m2 = (m.var(ddof=0) * m.n).reshape(c)
    return m.n, mean, m2


def _channels(x: Any, axis: int, name: str) -> tuple[np.ndarray, int]:
    a = as_float64(name, x)
    if a.ndim < 2:
        raise RefnormError(f"{name} has {a.ndim} dimensions, expected at least 2: (N, C, *spatial) or (N, *spatial, C)")
    check_nonempty(name, a)
    ax = canonical_axis(axis, a.ndim) % a.ndim
    c = a.shape[ax]
    moved = np.moveaxis(a, ax, 1)
    return moved.reshape(moved.shape[0], c, -1), c


def _check_shards(name: str, shards: Any, axis: int) -> list[np.ndarray]:
    if not isinstance(shards, (list, tuple)) or len(shards) < 1:
        raise RefnormError(f"{name} is {type(shards).__name__}, expected a non-empty list of one array per replica")
    arrs = [as_float64(f"{name}[{r}]", s) for r, s in enumerate(shards)]
    first = arrs[0]
    for r, a in enumerate(arrs):
        if a.ndim != first.ndim or a.shape[1:] != first.shape[1:] or a.shape[0] < 1:
            raise RefnormError(f"{name}[{r}] has shape {a.shape}, expected (n_{r} >= 1, *{first.shape[1:]}): "
                               "shards differ only in their number of samples (axis 0)")
    return arrs


def _split(a: np.ndarray, sizes: list[int]) -> tuple[np.ndarray, ...]:
    return tuple(np.ascontiguousarray(p) for p in np.split(a, np.cumsum(sizes)[:-1], axis=0))


def replica_batch_norm_forward(
    shards: Sequence[Any],
    weight: Any = None,
    bias: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    running_mean: Any = None,
    running_var: Any = None,
    momentum: float | None = 0.1,
    momentum_convention: str = "new",
    running_var_estimator: str = "unbiased",
    batches_seen: int | None = None,
    eps_placement: str = "inside",
) -> ReplicaForward:
    """Synchronized batch normalization forward over shards x_r of shape (n_r, C, *spatial) or (n_r, *spatial, C).

    y_r = (x_r - mean) / sqrt(var + eps) * weight + bias with the global mean and biased var of
    the concatenated batch (training mode). The running statistics are updated once with the
    global statistics, the unbiased estimator using the global count: M2 / (n - 1) (torch
    SyncBatchNorm, from memory). The other arguments are :func:`refnorm.batch_norm_forward`'s.
    """
    arrs = _check_shards("shards", shards, axis)
    whole = np.concatenate(arrs, axis=0)
    f = batch_norm_forward(whole, weight, bias, axis=axis, eps=eps, training=True, running_mean=running_mean,
                           running_var=running_var, momentum=momentum, momentum_convention=momentum_convention,
                           running_var_estimator=running_var_estimator, batches_seen=batches_seen,
                           eps_placement=eps_placement)
    sizes = [a.shape[0] for a in arrs]
    per = whole[0:1].size // whole.shape[axis % whole.ndim]
    return ReplicaForward(y=_split(f.y, sizes), mean=f.mean, var=f.var, rstd=f.rstd,
                          count=sum(sizes) * per, counts=tuple(n * per for n in sizes),
                          running_mean=f.running_mean, running_var=f.running_var)


def replica_batch_norm_backward(
    dys: Sequence[Any],
    shards: Sequence[Any],
    weight: Any = None,
    *,
    axis: int = 1,
    eps: float = 1e-5,
    eps_placement: str = "inside",
) -> ReplicaBackward:
    """Synchronized batch normalization backward over shards (training mode).

    With xhat = (x - mean) * rstd from the global statistics and the global reductions
    s1 = sum_r sum(dy_r), s2 = sum_r sum(dy_r * xhat_r) (over each shard's batch and spatial axes):
        dx_r = weight * rstd * (dy_r - s1 / n - xhat_r * s2 / n),
        dbias = s1, dweight = s2 (reduced), and replica r's local shares sum(dy_r), sum(dy_r * xhat_r).
    """
    arrs = _check_shards("shards", shards, axis)
    darrs = _check_shards("dys", dys, axis)
    if len(darrs) != len(arrs) or any(d.shape != a.shape for d, a in zip(darrs, arrs)):
        raise RefnormError(f"dys have shapes {[d.shape for d in darrs]}, expected the shards' {[a.shape for a in arrs]}")
    whole = np.concatenate(arrs, axis=0)
    dwhole = np.concatenate(darrs, axis=0)
    g = batch_norm_backward(dwhole, whole, weight, axis=axis, eps=eps, training=True, eps_placement=eps_placement)
    f = batch_norm_forward(whole, None, None, axis=axis, eps=eps, eps_placement=eps_placement)
    dw_local, db_local = [], []
    for a, d in zip(arrs, darrs):
        xv, c = _channels(a, axis, "x")
        dv, _ = _channels(d, axis, "dy")
        xhat = (xv - f.mean.reshape(1, c, 1)) * f.rstd.reshape(1, c, 1)
        dw_local.append((dv * xhat).sum(axis=(0, 2)))
        db_local.append(dv.sum(axis=(0, 2)))
    sizes = [a.shape[0] for a in arrs]
    return ReplicaBackward(dx=_split(g.dx, sizes), dweight=g.dweight, dbias=g.dbias,
                           dweight_local=tuple(dw_local), dbias_local=tuple(db_local))
