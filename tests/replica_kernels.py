"""Multi-replica batch norm kernels for the harness's tests: a correct NumPy kernel, seeded bugs
(each overrides one step) and hostile replicas.

The correct kernel reads its shard in the storage dtype and computes in float32: two-pass moments
of its shard, an all-gather of every replica's (count, mean, M2), the Chan, Golub & LeVeque merge
(1983, eq. 2.1) in rank order, and in backward an all-reduce of sum(dy) and sum(dy * xhat). The
scenario is invented: a team sharding a sensor-array model across boards writes these as
executable specifications of its device kernels.
"""

from __future__ import annotations

import os
import time

import numpy as np

F32 = np.float32


def _view(a, axis):
    a = np.asarray(a)
    moved = np.moveaxis(a, axis % a.ndim, 1)
    return moved.reshape(moved.shape[0], moved.shape[1], -1)


def _back(v, like, axis):
    ax = axis % like.ndim
    shape = list(np.moveaxis(np.empty(like.shape, dtype=np.int8), ax, 1).shape)
    return np.ascontiguousarray(np.moveaxis(v.reshape(shape), 1, ax))


class ReplicaNorm:
    """Correct synchronized batch norm (float32 arithmetic); dweight/dbias as ``param_grads`` declares."""

    param_grads = "reduced"

    def local_moments(self, xv):
        n = F32(xv.shape[0] * xv.shape[2])
        mean = xv.sum(axis=(0, 2), dtype=F32) / n
        m2 = ((xv - mean[None, :, None]) ** 2).sum(axis=(0, 2), dtype=F32)
        return n, mean, m2

    def merge(self, parts):
        n, mean, m2 = parts[0]
        for nb, mb, sb in parts[1:]:
            tot = n + nb
            delta = mb - mean
            mean = mean + delta * (nb / tot)
            m2 = m2 + sb + delta * delta * (n * nb / tot)
            n = tot
        return n, mean, m2

    def global_moments(self, comm, n, mean, m2):
        c = mean.shape[0]
        rows = comm.all_gather(np.concatenate([np.full(1, n, F32), mean, m2]).astype(F32))
        return self.merge([(r[0], r[1:1 + c], r[1 + c:]) for r in rows])

    def running_var_stat(self, n_global, n_local, m2):
        return m2 / (n_global - 1)

    def forward(self, x, weight, bias, *, rank, world_size, comm, axis, eps, running_mean, running_var, momentum):
        xv = _view(x, axis).astype(F32)
        n_loc, mean_loc, m2_loc = self.local_moments(xv)
        n, mean, m2 = self.global_moments(comm, n_loc, mean_loc, m2_loc)
        var = m2 / n
        rstd = F32(1) / np.sqrt(var + F32(eps))
        w = np.ones_like(mean) if weight is None else weight.astype(F32)
        b = np.zeros_like(mean) if bias is None else bias.astype(F32)
        y = (xv - mean[None, :, None]) * (rstd * w)[None, :, None] + b[None, :, None]
        pdt = mean.dtype if weight is None else weight.dtype
        out = {"y": _back(y, x, axis).astype(x.dtype), "mean": mean.astype(pdt), "rstd": rstd.astype(pdt)}
        if running_mean is not None:
            m = F32(momentum)
            out["running_mean"] = ((1 - m) * running_mean.astype(F32) + m * mean).astype(running_mean.dtype)
            rv = self.running_var_stat(n, n_loc, m2)
            out["running_var"] = ((1 - m) * running_var.astype(F32) + m * rv).astype(running_var.dtype)
        return out

    def reduce_sums(self, comm, s1, s2):
        c = s1.shape[0]
        both = comm.all_reduce(np.concatenate([s1, s2]).astype(F32))
        return both[:c], both[c:]

    def backward(self, dy, x, weight, *, rank, world_size, comm, mean, rstd, axis, eps):
        xv = _view(x, axis).astype(F32)
        dv = _view(dy, axis).astype(F32)
        mean, rstd = mean.astype(F32), rstd.astype(F32)
        xhat = (xv - mean[None, :, None]) * rstd[None, :, None]
        s1_loc = dv.sum(axis=(0, 2), dtype=F32)
        s2_loc = (dv * xhat).sum(axis=(0, 2), dtype=F32)
        n = F32(comm.all_reduce(np.array([xv.shape[0] * xv.shape[2]], dtype=np.int64))[0])
        s1, s2 = self.reduce_sums(comm, s1_loc, s2_loc)
        w = np.ones_like(mean) if weight is None else weight.astype(F32)
        dx = (w * rstd)[None, :, None] * (dv - (s1 / n)[None, :, None] - xhat * (s2 / n)[None, :, None])
        pdt = mean.dtype if weight is None else weight.dtype
        if self.param_grads == "local":
            dw, db = s2_loc, s1_loc
        else:
            dw, db = s2, s1
        return {"dx": _back(dx, x, axis).astype(dy.dtype), "dweight": dw.astype(pdt), "dbias": db.astype(pdt)}


class LocalGrads(ReplicaNorm):
    """Correct, with local parameter gradients (declared param_grads="local")."""

    param_grads = "local"


# ---------------------------------------------------------------- seeded bugs (one step each)

class AveragedVariances(ReplicaNorm):
    """Bug: merges shards by the count-weighted mean of their variances, dropping the between-shard
    term sum n_r (mean_r - mean)^2. Corrupts rstd (and y, dx through it)."""

    def merge(self, parts):
        n = sum(p[0] for p in parts)
        mean = sum(p[0] * p[1] for p in parts) / n
        return n, mean, sum(p[2] for p in parts)


class EqualWeights(ReplicaNorm):
    """Bug: weights every shard equally (mean of the shard means) although their sizes differ.
    Corrupts mean (and running_mean, y)."""

    def merge(self, parts):
        n, _, m2 = super().merge(parts)
        return n, sum(p[1] for p in parts) / F32(len(parts)), m2


class LocalCountRunningVar(ReplicaNorm):
    """Bug: the running variance's Bessel correction uses the replica's own count:
    var * n_r / (n_r - 1) instead of M2 / (n - 1). Corrupts running_var only."""

    def running_var_stat(self, n_global, n_local, m2):
        return (m2 / n_global) * (n_local / (n_local - 1))


class SkipsReduceDyXhat(LocalGrads):
    """Bug: the replica does not all-reduce sum(dy * xhat); dx uses its local sum. Corrupts dx
    (dweight is declared local, so it stays right)."""

    def reduce_sums(self, comm, s1, s2):
        c = s1.shape[0]
        return comm.all_reduce(s1.astype(F32)), s2


# ---------------------------------------------------------------- hostile replicas

class WrongShardShape(ReplicaNorm):
    """Replica 1 returns y with one sample too many."""

    def forward(self, x, weight, bias, **kw):
        out = super().forward(x, weight, bias, **kw)
        if kw["rank"] == 1:
            out["y"] = np.concatenate([out["y"], out["y"][:1]])
        return out


class HangsInCollective(ReplicaNorm):
    """Replica 0 never joins the backward's all-reduce (sleeps); the others wait in it."""

    def backward(self, dy, x, weight, **kw):
        if kw["rank"] == 0:
            time.sleep(3600)
        return super().backward(dy, x, weight, **kw)


class ExitsInForward(ReplicaNorm):
    """Replica 1 ends its process in forward."""

    def forward(self, x, weight, bias, **kw):
        if kw["rank"] == 1:
            os._exit(3)
        return super().forward(x, weight, bias, **kw)


class MismatchedCollective(ReplicaNorm):
    """Each replica all-reduces an array of a different length."""

    def forward(self, x, weight, bias, **kw):
        kw["comm"].all_reduce(np.zeros(kw["rank"] + 1, dtype=F32))
        return super().forward(x, weight, bias, **kw)


class StartsAChild(ReplicaNorm):
    """Replica 0 starts a long-lived child process, then fails: the child must not outlive the case."""

    def forward(self, x, weight, bias, **kw):
        if kw["rank"] == 0:
            import subprocess
            import sys
            child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(3600)"])
            raise RuntimeError(f"replica 0 failed on purpose after starting child pid {child.pid}")
        return super().forward(x, weight, bias, **kw)


class ReturnsAList(ReplicaNorm):
    """Backward returns a list instead of the dict of outputs."""

    def backward(self, dy, x, weight, **kw):
        return list(super().backward(dy, x, weight, **kw).values())


def as_kernel(bug: str = "ReplicaNorm", param_grads: str = ""):
    """One of the kernels above as a conformance.Kernel of the registered op (spec
    ``tests/replica_kernels.py:as_kernel?bug=AveragedVariances``), declared with its own param_grads."""
    from conformance.kernel import Conventions, Kernel

    cls = globals().get(bug)
    if not (isinstance(cls, type) and issubclass(cls, ReplicaNorm)):
        raise ValueError(f"bug is {bug!r}, expected a ReplicaNorm class of tests/replica_kernels.py")
    obj = cls()
    return Kernel(name=f"replica {bug}", op="replica_batch_norm", forward=obj.forward, backward=obj.backward,
                  outputs=("y", "mean", "rstd", "running_mean", "running_var"), dtypes=("float32",),
                  conventions=Conventions(saved=("mean", "rstd"), param_grads=param_grads or cls.param_grads))
