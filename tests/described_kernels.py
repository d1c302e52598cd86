"""A kernel of any registered op from its description alone: the oracle's values rounded once to the
storage format (a correctly rounded result, within any bound of at least one unit roundoff: Higham
2002, §2.2, eq. 2.4). Used where a test must serve every op without naming one."""

from __future__ import annotations

import numpy as np

import refnorm
from conformance import dtypes
from conformance.kernel import Kernel, call_with


def _all_shards(comm, a: np.ndarray) -> list[np.ndarray]:
    """Every replica's shard of ``a`` (rank order): the shards differ in length along axis 0, and an
    all-gather takes one shape, so each is padded to the longest and cut back."""
    sizes = [int(n[0]) for n in comm.all_gather(np.array([a.shape[0]], dtype=np.int64))]
    pad = np.zeros((max(sizes),) + a.shape[1:], dtype=np.float64)
    pad[:a.shape[0]] = a
    return [g[:n] for g, n in zip(comm.all_gather(pad), sizes)]


def _replica_forward(x, weight, bias, *, rank, comm, axis, eps, **_):
    from refnorm import replicas

    f = replicas.replica_batch_norm_forward(_all_shards(comm, x.astype(np.float64)),
                                            None if weight is None else weight.astype(np.float64),
                                            None if bias is None else bias.astype(np.float64), axis=axis, eps=eps)
    return {"y": f.y[rank].astype(x.dtype), "mean": f.mean.astype(x.dtype), "rstd": f.rstd.astype(x.dtype)}


def _replica_backward(dy, x, weight, *, rank, comm, axis, eps, **_):
    from refnorm import replicas

    g = replicas.replica_batch_norm_backward(_all_shards(comm, dy.astype(np.float64)),
                                             _all_shards(comm, x.astype(np.float64)),
                                             None if weight is None else weight.astype(np.float64), axis=axis, eps=eps)
    return {"dx": g.dx[rank].astype(x.dtype), "dweight": g.dweight.astype(x.dtype), "dbias": g.dbias.astype(x.dtype)}


def rounded_oracle(spec, dtype: str, rnd=None, precision=None) -> Kernel:
    """forward returns y (and h for a fused residual add), backward dx, dweight, dbias, each rounded to
    the storage format ``dtype`` (by ``rnd``, a float64 array -> the format, where given: to nearest
    by default); ``precision`` is the declared Precision (the default's where None). A multi-replica
    op's: each replica gathers the shards, and returns its share of the oracle's y and dx and the
    global statistics and parameter gradients, rounded to nearest."""
    st = dtypes.dtype_of(dtype)
    if spec.replicas:
        from conformance.kernel import Conventions

        return Kernel(name=f"rounded oracle {spec.name}", op=spec.name, dtypes=(dtype,), updates_running=False,
                      forward=_replica_forward, backward=_replica_backward, outputs=("y", "mean", "rstd"),
                      conventions=Conventions(saved=("mean", "rstd")), precision=precision)
    cast = rnd or (lambda a: np.asarray(a).astype(st))

    def rnd(a):
        return None if a is None else cast(np.asarray(a))

    def up(kw):
        return {k: (v.astype(np.float64) if isinstance(v, np.ndarray) else v) for k, v in kw.items()}

    def h_of(kw):
        # a fused residual add: the description's functions normalize h, the sum rounded once to storage
        return refnorm.residual_stream(kw["x"], kw["residual"], kw.get("residual_bias"), h_format=dtype)[1]

    def forward(**kw):
        kw = up(kw)
        if spec.residual:
            h = h_of(kw)
            return rnd(call_with(spec.forward, {**kw, "x": h}).y), rnd(h)
        return rnd(call_with(spec.forward, kw).y)

    def backward(**kw):
        kw = up(kw)
        g = call_with(spec.backward, {**kw, "x": h_of(kw)} if spec.residual else kw)
        dx = g.dx + kw["dh"] if spec.residual else g.dx
        return rnd(dx), rnd(g.dweight), rnd(g.dbias)

    entries = {e: (forward if e.startswith("forward") else backward) for e in spec.entry_points}
    return Kernel(name=f"rounded oracle {spec.name}", op=spec.name, dtypes=(dtype,), updates_running=False,
                  outputs=("y", *spec.residual_outputs), **({"precision": precision} if precision else {}),
                  **entries)
