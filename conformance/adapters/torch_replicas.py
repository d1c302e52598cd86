"""Synchronized batch norm composed of torch CPU ops, as a multi-replica kernel under test.

Spec forms: ``conformance.adapters.torch_replicas:kernel`` (a conformance.Kernel of op
replica_batch_norm, for ``refnorm check``, the pytest plugin and the report; each replica loads it
from that spec) and ``conformance.adapters.torch_replicas:composition`` (the bare object of a
conformance.run.replicas.ReplicaKernel). torch is imported in each replica when it first calls it.
It needs the harness's collectives (conformance.run.replicas).

torch's own cross-replica primitives do not run on the CPU (checked here, torch 2.13):
``torch.nn.SyncBatchNorm`` raises "SyncBatchNorm expected input tensor to be on GPU or XPU ..."
when a process group is initialised, and ``torch.batch_norm_stats`` (the kernel it calls for the
shard's statistics) has no CPU implementation ("Could not run 'aten::batch_norm_stats' with
arguments from the 'CPU' backend"). So this peer composes what SyncBatchNorm does (from
memory of its source: shard mean and inverse std, an all-gather of (mean, invstd, count), a merge
weighted by counts, the running variance from the global count, and in backward an all-reduce
of sum(dy) and sum(dy * xhat)) out of torch CPU tensor ops:

- forward: torch.var_mean(correction=0) of the shard in the storage format (float32), an
  all-gather of (count, mean, M2), the Chan, Golub & LeVeque merge (1983, eq. 2.1) in rank order in
  float32, y = (x - mean) * (rstd * weight) + bias;
- backward: sum(dy) and sum(dy * xhat) of the shard in float32 (torch.sum), one all-reduce of both,
  dx = weight rstd (dy - s1/n - xhat s2/n); dweight/dbias are the reduced sums.

Declared precision: float32 storage and accumulation, the default probabilistic summation model
(torch's CPU reductions are vectorised and cascaded; docs/library-precision.md).
"""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["composition", "kernel", "TorchReplicaComposition"]


class TorchReplicaComposition:
    """The kernel object each replica loads (float32 and float64 storage)."""

    param_grads = "reduced"

    def __init__(self) -> None:
        import torch

        self.torch = torch

    def _nc(self, a: np.ndarray, axis: int):
        t = self.torch.from_numpy(np.ascontiguousarray(a))
        t = t.movedim(axis % t.ndim, 1)
        return t.reshape(t.shape[0], t.shape[1], -1)

    def _back(self, t, like: np.ndarray, axis: int) -> np.ndarray:
        ax = axis % like.ndim
        shape = list(np.moveaxis(np.empty(like.shape, dtype=np.int8), ax, 1).shape)
        return np.ascontiguousarray(t.reshape(shape).movedim(1, ax).numpy())

    def forward(self, x, weight, bias, *, rank, world_size, comm, axis, eps, running_mean, running_var, momentum):
        torch = self.torch
        xt = self._nc(x, axis)
        c = xt.shape[1]
        n_loc = xt.shape[0] * xt.shape[2]
        var, mean = torch.var_mean(xt, dim=(0, 2), correction=0)
        m2 = var * n_loc
        row = torch.cat([torch.full((1,), float(n_loc), dtype=xt.dtype), mean, m2]).numpy()
        rows = [torch.from_numpy(r) for r in comm.all_gather(row)]
        n, mean, m2 = rows[0][0], rows[0][1:1 + c], rows[0][1 + c:]
        for r in rows[1:]:
            nb, mb, sb = r[0], r[1:1 + c], r[1 + c:]
            tot = n + nb
            delta = mb - mean
            mean = mean + delta * (nb / tot)
            m2 = m2 + sb + delta * delta * (n * nb / tot)
            n = tot
        rstd = torch.rsqrt(m2 / n + eps)
        w = torch.ones(c, dtype=xt.dtype) if weight is None else torch.from_numpy(weight)
        b = torch.zeros(c, dtype=xt.dtype) if bias is None else torch.from_numpy(bias)
        y = (xt - mean[None, :, None]) * (rstd * w)[None, :, None] + b[None, :, None]
        out = {"y": self._back(y, x, axis), "mean": mean.numpy().copy(), "rstd": rstd.numpy().copy()}
        if running_mean is not None:
            rm, rv = torch.from_numpy(running_mean), torch.from_numpy(running_var)
            out["running_mean"] = ((1 - momentum) * rm + momentum * mean).numpy()
            out["running_var"] = ((1 - momentum) * rv + momentum * (m2 / (n - 1))).numpy()
        return out

    def backward(self, dy, x, weight, *, rank, world_size, comm, mean, rstd, axis, eps):
        torch = self.torch
        xt, dt = self._nc(x, axis), self._nc(dy, axis)
        c = xt.shape[1]
        mean_t, rstd_t = torch.from_numpy(mean), torch.from_numpy(rstd)
        xhat = (xt - mean_t[None, :, None]) * rstd_t[None, :, None]
        sums = torch.cat([dt.sum(dim=(0, 2)), (dt * xhat).sum(dim=(0, 2))]).numpy()
        s = torch.from_numpy(comm.all_reduce(sums))
        n = float(comm.all_reduce(np.array([xt.shape[0] * xt.shape[2]], dtype=np.int64))[0])
        s1, s2 = s[:c], s[c:]
        w = torch.ones(c, dtype=xt.dtype) if weight is None else torch.from_numpy(weight)
        dx = (w * rstd_t)[None, :, None] * (dt - (s1 / n)[None, :, None] - xhat * (s2 / n)[None, :, None])
        return {"dx": self._back(dx, x, axis), "dweight": s2.numpy().copy(), "dbias": s1.numpy().copy()}


def composition() -> Any:
    """A TorchReplicaComposition (imports torch)."""
    return TorchReplicaComposition()


_ONE: list[TorchReplicaComposition] = []


def _composition() -> TorchReplicaComposition:
    if not _ONE:  # one per replica process, made on its first call (torch is imported then)
        _ONE.append(TorchReplicaComposition())
    return _ONE[0]


def _forward(x, weight, bias, **kw):
    return _composition().forward(x, weight, bias, **kw)


def _backward(dy, x, weight, **kw):
    return _composition().backward(dy, x, weight, **kw)


def kernel():
    """The composition as a conformance.Kernel of op replica_batch_norm (float32 and float64 storage,
    the dweight/dbias sums reduced over every replica)."""
    from ..kernel import Conventions, Kernel

    return Kernel(name="torch CPU composition (multi-replica)", op="replica_batch_norm", forward=_forward,
                  backward=_backward, outputs=("y", "mean", "rstd", "running_mean", "running_var"),
                  dtypes=("float32", "float64"), conventions=Conventions(saved=("mean", "rstd")),
                  momentum_none=False,
                  notes="SyncBatchNorm's algorithm composed of torch CPU ops (SyncBatchNorm refuses the CPU)")
