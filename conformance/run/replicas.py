"""Run a multi-replica batch norm kernel as R processes over torch.distributed (gloo, CPU).

A case (:class:`ReplicaCase`) is a batch norm case of the global batch (its inputs, values and
bounds are the single-process case's) and a shard plan: replica r holds samples
[n_0 + ... + n_{r-1}, ... + n_r) along axis 0. The harness starts one process per replica
("spawn": refnorm and torch start threads, and a forked copy of a threaded process may hold a
lock forever), joins them into a gloo process group on a free local port, and hands each the
kernel (loaded from its spec), its shard and :class:`Collectives`, framework-neutral all-reduce
and all-gather of NumPy arrays over that group. Each replica runs forward, then backward with the
statistics its forward saved, and sends its outputs back. The first replica that fails, exits or
outlives the case's time ends the case: every replica's process group is killed, the case gets a
status ("error", "crashed", "timed_out") that names the replica and why, and no process outlives
the case.

A replica kernel is an object (or a zero-argument factory of one) with

    forward(x, weight, bias, *, rank, world_size, comm, axis, eps, running_mean, running_var, momentum)
        -> {"y", "mean", "rstd"[, "running_mean", "running_var"]}
    backward(dy, x, weight, *, rank, world_size, comm, mean, rstd, axis, eps)
        -> {"dx", "dweight", "dbias"}

where x, dy are the replica's shard in the storage dtype and running statistics are given only
when the case updates them (momentum on the new value, unbiased running variance: torch's
conventions). Its declaration (:class:`ReplicaKernel`) says whether dweight/dbias are the
replica's local sums or the reduced ones.
"""

from __future__ import annotations

import importlib
import math
import multiprocessing as mp
import os
import socket
import time
import traceback
from dataclasses import dataclass, field, replace
from datetime import timedelta
from multiprocessing.connection import wait
from typing import Any

import numpy as np

from refnorm import replicas as oracle
from refnorm.replicas import PARAM_GRAD_MODES

from .. import dtypes
from ..cases.generators import make_inputs
from ..cases.model import Case
from ..compare import compare_output, unread_output
from ..kernel import Conventions, Precision
from ..ops.replica_batch_norm import BASE, NAME
from ..results import CaseResult, cap_text
from ..tolerances.bound import Bound
from ..tolerances import override_bound
from ..tolerances.bounds import derive_bounds, output_dtype
from . import isolation

__all__ = ["ReplicaKernel", "ReplicaCase", "Collectives", "CollectiveError", "run_replica_case",
           "replica_cases", "merge_bound", "OP"]

OP = NAME
#: Outputs compared per replica: its y and dx shares, and the global ones every replica returns.
FORWARD_OUTPUTS = ("y", "mean", "rstd")
RUNNING = ("running_mean", "running_var")
BACKWARD_OUTPUTS = ("dx", "dweight", "dbias")
#: dtypes a collective carries (bfloat16 travels as torch.bfloat16).
_COLLECTIVE_DTYPES = ("float16", "bfloat16", "float32", "float64", "int32", "int64")
_MAX_NDIM = 8


class CollectiveError(RuntimeError):
    """A collective called with arrays that differ across replicas, or with something not an array."""


# ------------------------------------------------------------------ declarations and cases

@dataclass(frozen=True)
class ReplicaKernel:
    """A multi-replica batch norm kernel.

    name : shown in results.
    spec : "module:attribute" of the kernel object or of a zero-argument factory (each replica loads it).
    precision : its Precision for the storage dtype of the cases it runs (bounds: conformance.kernel).
    param_grads : "reduced" (every replica returns the sums over all replicas) or "local" (its own shard's).
    timeout_s : wall-clock limit of one case, start-up included; collectives time out at the same limit.
    """

    name: str
    spec: str
    precision: Precision = field(default_factory=Precision)
    param_grads: str = "reduced"
    timeout_s: float = 60.0

    def __post_init__(self) -> None:
        if not isinstance(self.spec, str) or ":" not in self.spec:
            raise ValueError(f"spec is {self.spec!r}, expected 'module:attribute' (importable in every replica)")
        if self.param_grads not in PARAM_GRAD_MODES:
            raise ValueError(f"param_grads is {self.param_grads!r}, expected one of {', '.join(PARAM_GRAD_MODES)}")
        if not (isinstance(self.timeout_s, (int, float)) and 0 < self.timeout_s <= 3600):
            raise ValueError(f"timeout_s is {self.timeout_s!r}, expected seconds in (0, 3600]")


@dataclass(frozen=True)
class ReplicaCase:
    """A batch norm case of the global batch (``base``, op BASE.name) split into ``shards`` samples per replica."""

    base: Case
    shards: tuple[int, ...]

    def __post_init__(self) -> None:
        if self.base.op != BASE.name or self.base.mode != "train" or self.base.strides != "contiguous":
            raise ValueError(f"base is {self.base.id}, expected a contiguous {BASE.name} case in train mode")
        if not (2 <= len(self.shards) <= 8) or any(not isinstance(n, int) or n < 1 for n in self.shards):
            raise ValueError(f"shards is {self.shards!r}, expected 2..8 sample counts >= 1")
        if sum(self.shards) != self.base.shape[0]:
            raise ValueError(f"shards {self.shards} sum to {sum(self.shards)}, expected the batch {self.base.shape[0]}")

    @classmethod
    def of(cls, case: Case) -> "ReplicaCase":
        """The plan of a catalog case of the registered op (op OP, Case.shards set)."""
        if case.op != OP:
            raise ValueError(f"case {case.id} is not a {OP} case")
        return cls(replace(case, op=BASE.name, shards=()), tuple(case.shards))

    @property
    def case(self) -> Case:
        """The case as the catalog lists it: op OP with its shard plan (its id, its data's seed)."""
        return replace(self.base, op=OP, shards=self.shards)

    @property
    def replicas(self) -> int:
        return len(self.shards)

    @property
    def id(self) -> str:
        """The catalog id: replica_batch_norm/<dtype>/<layout>/<shape>/replicas=R,shards=n0+n1+.../..."""
        return self.case.id

    def as_dict(self) -> dict[str, Any]:
        return self.case.as_dict()


def replica_cases(dtype: str = "float32", tier: str = "standard") -> list[ReplicaCase]:
    """The catalog's plans of a tier (conformance.cases.catalog: R = 2..4, unequal shards, one-sample
    shards, both layouts, the standard tier's long reduction (batch norm's (16, 2, 256, 256): 2^20
    elements per channel) and cancellation values (generators.CANCELLATION))."""
    from ..cases import catalog

    return [ReplicaCase.of(c) for c in catalog([OP], [dtype], tier)]


# ------------------------------------------------------------------ collectives (in each replica)

class Collectives:
    """All-reduce and all-gather of NumPy arrays over the replicas' process group.

    Before each collective the replicas exchange the array's dtype and shape; if they differ,
    every replica raises CollectiveError naming each replica's array (gloo itself would hang
    or read past a buffer).
    """

    def __init__(self, rank: int, world_size: int):
        self.rank, self.world_size = rank, world_size
        import torch
        import torch.distributed as dist
        self._torch, self._dist = torch, dist

    def _agree(self, what: str, a: Any) -> np.ndarray:
        torch = self._torch
        ok = isinstance(a, np.ndarray) and str(a.dtype) in _COLLECTIVE_DTYPES and a.ndim <= _MAX_NDIM
        head = np.full(_MAX_NDIM + 2, -1, dtype=np.int64)
        if ok:
            head[0] = _COLLECTIVE_DTYPES.index(str(a.dtype))
            head[1] = a.ndim
            head[2:2 + a.ndim] = a.shape
        heads = [torch.zeros(_MAX_NDIM + 2, dtype=torch.int64) for _ in range(self.world_size)]
        self._dist.all_gather(heads, torch.from_numpy(head))
        rows = [h.numpy() for h in heads]
        if any((r != rows[0]).any() or r[0] < 0 for r in rows):
            def desc(r):
                return "not an array of " + "/".join(_COLLECTIVE_DTYPES) if r[0] < 0 else \
                    f"{_COLLECTIVE_DTYPES[r[0]]}{tuple(int(v) for v in r[2:2 + r[1]])}"
            raise CollectiveError(f"{what}: the replicas passed different arrays: "
                                  + ", ".join(f"replica {k}: {desc(r)}" for k, r in enumerate(rows)))
        return np.ascontiguousarray(a)

    def _tensor(self, a: np.ndarray):
        torch = self._torch
        if str(a.dtype) == "bfloat16":
            return torch.from_numpy(a.view(np.uint16).copy()).view(torch.bfloat16)
        return torch.from_numpy(a.copy())

    def _array(self, t, like: np.ndarray) -> np.ndarray:
        if str(like.dtype) == "bfloat16":
            return t.view(self._torch.uint16).numpy().view(like.dtype).copy()
        return t.numpy().copy()

    def all_reduce(self, a: np.ndarray, op: str = "sum") -> np.ndarray:
        """The elementwise sum (or "max", "min") of ``a`` over the replicas, in a's dtype and shape."""
        ops = {"sum": self._dist.ReduceOp.SUM, "max": self._dist.ReduceOp.MAX, "min": self._dist.ReduceOp.MIN}
        if op not in ops:
            raise CollectiveError(f"all_reduce: op is {op!r}, expected one of {', '.join(ops)}")
        a = self._agree("all_reduce", a)
        t = self._tensor(a)
        self._dist.all_reduce(t, op=ops[op])
        return self._array(t, a)

    def all_gather(self, a: np.ndarray) -> list[np.ndarray]:
        """Every replica's ``a``, in rank order."""
        a = self._agree("all_gather", a)
        t = self._tensor(a)
        outs = [self._torch.empty_like(t) for _ in range(self.world_size)]
        self._dist.all_gather(outs, t)
        return [self._array(o, a) for o in outs]


def _load(target: Any) -> Any:
    """The kernel object a replica calls: ``target`` itself (a Kernel received pickled), the Kernel a
    spec names (conformance.kernel.load_kernel: modules, files, factories), or the object (or the
    zero-argument factory's object) of a ``module:attribute`` spec with forward and backward."""
    from ..kernel import Kernel, KernelError, load_kernel

    if not isinstance(target, str):
        return target
    try:
        return load_kernel(target)
    except KernelError as e:
        if "expected a conformance.Kernel" not in str(e):
            raise
    mod, _, attr = target.partition(":")
    obj = importlib.import_module(mod)
    for part in attr.split("."):
        obj = getattr(obj, part)
    if isinstance(obj, type) or (not hasattr(obj, "forward") and callable(obj)):
        obj = obj()
    for entry in ("forward", "backward"):
        if not callable(getattr(obj, entry, None)):
            raise TypeError(f"{target} has no callable {entry}(...)")
    return obj


def _outputs(res: Any, names: tuple[str, ...], entry: str) -> dict[str, Any]:
    if not isinstance(res, dict):
        raise TypeError(f"{entry} returned {type(res).__name__}, expected a dict with {', '.join(names)}")
    missing = [n for n in names if n not in res]
    if missing:
        raise TypeError(f"{entry} returned no {', '.join(missing)} (keys: {', '.join(map(str, res))})")
    return {n: np.asarray(res[n]) for n in names}


def _replica_main(rank: int, world: int, port: int, spec: str, work: dict, conn, parent_pid: int,
                  timeout_s: float) -> None:
    isolation.enter_worker(parent_pid)
    import faulthandler

    faulthandler.disable()
    stage = "start-up"
    try:
        import torch.distributed as dist

        stage = "joining the process group"
        dist.init_process_group("gloo", init_method=f"tcp://127.0.0.1:{port}", rank=rank, world_size=world,
                                timeout=timedelta(seconds=timeout_s))
        stage = "loading the kernel"
        kernel = _load(spec)
        comm = Collectives(rank, world)
        common = {"rank": rank, "world_size": world, "comm": comm, "axis": work["axis"], "eps": work["eps"]}
        stage = "forward"
        fwd_kw = dict(common, running_mean=work["running_mean"], running_var=work["running_var"],
                      momentum=work["momentum"])
        names = FORWARD_OUTPUTS + (RUNNING if work["running_mean"] is not None else ())
        fwd = _outputs(kernel.forward(work["x"], work["weight"], work["bias"], **fwd_kw), names, "forward")
        stage = "backward"
        bwd = _outputs(kernel.backward(work["dy"], work["x"], work["weight"], mean=fwd["mean"], rstd=fwd["rstd"],
                                       **common), BACKWARD_OUTPUTS, "backward")
        conn.send(("done", {**fwd, **bwd}))
        stage = "leaving the process group"
        dist.destroy_process_group()
    except BaseException as e:  # one message; the parent ends every replica
        tb = "".join(traceback.format_exception(type(e), e, e.__traceback__, limit=-4))
        try:
            conn.send(("error", stage, cap_text(f"{type(e).__name__}: {e}\n{tb}", 4000)))
        except Exception:
            pass
    finally:
        conn.close()
    os._exit(0)


# ------------------------------------------------------------------ the harness side

def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _work(case: ReplicaCase, inp: dict[str, Any], running: bool = True) -> list[dict[str, Any]]:
    bounds = np.cumsum((0,) + case.shards)
    if not running:  # a kernel declared not to update them is given none (and checked on none)
        inp = dict(inp, running_mean=None, running_var=None)
    out = []
    for r in range(case.replicas):
        sl = slice(int(bounds[r]), int(bounds[r + 1]))
        out.append({"x": np.ascontiguousarray(inp["x"][sl]), "dy": np.ascontiguousarray(inp["dy"][sl]),
                    "weight": inp["weight"], "bias": inp["bias"], "running_mean": inp["running_mean"],
                    "running_var": inp["running_var"], "axis": case.base.channel_axis - len(case.base.shape)
                    if case.base.layout == "channels_last" else 1, "eps": case.base.eps,
                    "momentum": case.base.momentum})
    return out


def _stop_all(procs: list) -> None:
    for p in procs:
        if p.pid is not None:
            isolation.kill_group(p.pid)  # the replica and anything its kernel started
            if p.is_alive():
                p.kill()
    for p in procs:
        p.join(5)


@dataclass(frozen=True)
class _Target:
    """What the replicas run and how it is judged, from a ReplicaKernel or a conformance.Kernel."""

    name: str
    load: Any  # a spec string each replica loads, or the Kernel itself (sent pickled)
    precision: Precision
    param_grads: str
    timeout_s: float
    running: bool


def _target(kernel: Any, dtype: str) -> _Target:
    from ..kernel import Kernel

    if isinstance(kernel, Kernel):
        return _Target(kernel.name, kernel.source or kernel, kernel.precision_for(dtype),
                       kernel.conventions.param_grads, REPLICA_TIMEOUT_S, kernel.updates_running)
    return _Target(kernel.name, kernel.spec, replace(kernel.precision, storage=dtype).resolved(),
                   kernel.param_grads, kernel.timeout_s, True)


#: A conformance.Kernel's replicas' wall-clock limit per case, start-up included (below the run's
#: per-case timeout, conformance.run.pool, so that the case reports which replica hung).
REPLICA_TIMEOUT_S = 60.0


class _ChildrenAllowed:
    """Within a run's worker (a daemon process, which multiprocessing forbids to start children), let
    it start the replicas: they are stopped by _stop_all, and die with the worker (enter_worker)."""

    def __enter__(self):
        self.proc = mp.current_process()
        self.was = self.proc.daemon
        if self.was:
            self.proc.daemon = False
        return self

    def __exit__(self, *exc):
        if self.was:
            self.proc.daemon = True
        return False


def _gather(kernel: _Target, case: ReplicaCase, work: list[dict]) -> tuple[list[dict] | None, str, str]:
    """Run the replicas; (outputs per replica, "", "") or (None, status, message)."""
    with _ChildrenAllowed():
        return _gather_replicas(kernel, case, work)


def _gather_replicas(kernel: _Target, case: ReplicaCase, work: list[dict]) -> tuple[list[dict] | None, str, str]:
    ctx = mp.get_context("spawn")
    port = _free_port()
    conns, procs = [], []
    try:
        for r in range(case.replicas):
            parent, child = ctx.Pipe(duplex=False)
            p = ctx.Process(target=_replica_main, name=f"refnorm-replica-{r}",
                            args=(r, case.replicas, port, kernel.load, work[r], child, os.getpid(), kernel.timeout_s))
            try:
                p.start()
            except Exception as e:  # the Kernel could not be sent (pickled) to a new process
                child.close()
                parent.close()
                return None, "error", (f"replica {r} could not be started: {type(e).__name__}: {e} (a multi-replica "
                                       "kernel must be loadable in a new process: load it from its spec, "
                                       "module:attr, or give it module-level functions)")
            child.close()
            conns.append(parent)
            procs.append(p)
        results: list[dict | None] = [None] * case.replicas
        deadline = time.monotonic() + kernel.timeout_s
        pending = set(range(case.replicas))
        while pending:
            left = deadline - time.monotonic()
            if left <= 0:
                return None, "timed_out", (f"replica(s) {', '.join(map(str, sorted(pending)))} of {case.replicas} "
                                           f"did not finish within {kernel.timeout_s:g} s (a hang in a collective "
                                           "or in the kernel); every replica was stopped")
            ready = wait([conns[r] for r in pending] + [procs[r].sentinel for r in pending], timeout=left)
            for r in sorted(pending):
                if conns[r] in ready:
                    try:
                        msg = conns[r].recv()
                    except (EOFError, OSError):
                        msg = None
                    if msg is None:
                        return None, "crashed", _ended(r, procs[r])
                    if msg[0] == "error":
                        return None, "error", f"replica {r} failed in {msg[1]}: {msg[2]}"
                    results[r] = msg[1]
                    pending.discard(r)
                elif procs[r].sentinel in ready:
                    return None, "crashed", _ended(r, procs[r])
        return results, "", ""
    finally:
        _stop_all(procs)
        for c in conns:
            c.close()


def _ended(r: int, p) -> str:
    p.join(2)
    code = p.exitcode
    how = f"was killed by signal {-code}" if code is not None and code < 0 else f"exited with status {code}"
    return f"replica {r} {how} before sending its outputs; every replica was stopped"


def merge_bound(b: Bound, expected: np.ndarray, replicas: int, u_acc: float) -> Bound:
    """The single-process bound plus the merge's own error (docs/tolerances.md, "Multi-replica batch norm").

    B_R = B_1 (1 + rho) + rho |expected|, rho = gamma_{3 R}(u_acc): each of the R - 1 merge or
    all-reduce steps rounds at most three times (Chan, Golub & LeVeque 1983, eq. 2.1: delta, the
    weighted update, the sum of nonnegative M2 terms), each a relative u_acc (Higham 2002, §3.1).
    """
    k = 3 * replicas
    rho = k * u_acc / (1 - k * u_acc)
    vals = np.asarray(b.values, dtype=np.float64) * (1 + rho) + rho * np.abs(np.nan_to_num(expected, nan=0.0,
                                                                                               posinf=0.0, neginf=0.0))
    return replace(b, values=vals, formula=f"({b.formula}) (1 + rho) + rho |expected|, rho = gamma_3R(u_acc)",
                   terms={**b.terms, "replicas": float(replicas), "merge_rho": rho})


def _share(b: Bound, sl: slice) -> Bound:
    v = np.asarray(b.values)
    return replace(b, values=v[sl] if v.ndim else v)


#: What a failed output of a multi-replica case says in place of a diagnosis.
NO_DIAGNOSIS = ("no diagnosis of {name}: multi-replica cases are not re-evaluated under the alternative "
                "conventions and bug models (not implemented for them); the replica, the output and its "
                "factor over the bound are what is known")


def run_replica_case(kernel: Any, case: ReplicaCase | Case, seed: int = 0,
                     overrides: dict[str, tuple[float, float]] | None = None) -> CaseResult:
    """One case: run the replicas, compare each replica's outputs with the oracle's, never raise.

    kernel : a ReplicaKernel, or a conformance.Kernel of the registered op (its replicas load it
        from ``Kernel.source``, else receive it pickled).
    case : a ReplicaCase, or a catalog Case of the registered op (Case.shards set).
    overrides : output name -> (atol, rtol), a fixed tolerance in place of the derived bound.
    """
    t0 = time.perf_counter()
    try:
        plan = case if isinstance(case, ReplicaCase) else ReplicaCase.of(case)
    except Exception as e:
        return CaseResult(id=case.id, case=case.as_dict(), status="error", message=f"not a shard plan: {e}")
    case = plan
    try:
        target = _target(kernel, case.base.dtype)
        prec = target.precision
        inp = make_inputs(case.case, prec, seed)
        work = _work(case, inp, target.running)
    except Exception as e:  # a harness bug costs this case only
        return CaseResult(id=case.id, case=case.as_dict(), status="error", message=f"harness error: {e}")
    t1 = time.perf_counter()
    outs, status, message = _gather(target, case, work)
    if outs is None and "failed in joining the process group" in message:
        # the free port may have been taken between choosing it and binding it: one more try on another
        outs, status, message = _gather(target, case, work)
    t2 = time.perf_counter()
    if outs is None:
        return CaseResult(id=case.id, case=case.as_dict(), status=status, message=message,
                          duration_s=time.perf_counter() - t0, kernel_s=t2 - t1)
    results, msgs = _judge(target, case, prec, inp, outs, work, overrides or {})
    failed = [r for r in results if not r.passed]
    status = "failed" if failed else ("inconclusive" if any(r.inconclusive for r in results) else "passed")
    if not failed:
        msgs = [f"{r.name}: inconclusive: {r.inconclusive}" for r in results if r.inconclusive]
    outputs = [r.to_dict() for r in results]
    for o, r in zip(outputs, results):
        if not r.passed:  # said, not left blank: a reader of the document should not look for one
            o["diagnosis"] = {"text": NO_DIAGNOSIS.format(name=r.name)}
    return CaseResult(id=case.id, case=case.as_dict(), status=status, message="\n".join(msgs),
                      outputs=outputs, duration_s=time.perf_counter() - t0,
                      kernel_s=t2 - t1, oracle_s=time.perf_counter() - t2)


def _judge(kernel: _Target, case: ReplicaCase, prec, inp, outs, work, overrides):
    inp = dict(inp, running_mean=work[0]["running_mean"], running_var=work[0]["running_var"])
    f64 = {k: (None if v is None else np.asarray(v, dtype=np.float64)) for k, v in inp.items()}
    axis = work[0]["axis"]
    xs = [np.asarray(w["x"], dtype=np.float64) for w in work]
    dys = [np.asarray(w["dy"], dtype=np.float64) for w in work]
    fwd = oracle.replica_batch_norm_forward(xs, f64["weight"], f64["bias"], axis=axis, eps=case.base.eps,
                                             running_mean=f64["running_mean"], running_var=f64["running_var"],
                                             momentum=case.base.momentum)
    bwd = oracle.replica_batch_norm_backward(dys, xs, f64["weight"], axis=axis, eps=case.base.eps)
    glob = {"y": np.concatenate(fwd.y), "mean": fwd.mean, "rstd": fwd.rstd, "dx": np.concatenate(bwd.dx),
            "dweight": bwd.dweight, "dbias": bwd.dbias}
    if fwd.running_mean is not None:
        glob.update(running_mean=fwd.running_mean, running_var=fwd.running_var)
    conv = Conventions(saved=("mean", "rstd"))
    single = derive_bounds(case.base, prec, conv, f64, glob)
    u_acc = dtypes.unit_roundoff(prec.accumulate)
    bounds = {k: merge_bound(b, glob[k], case.replicas, u_acc) for k, b in single.items()}
    for name, (atol, rtol) in overrides.items():
        if name in bounds:  # a fixed tolerance replaces the bound, not what a correct result may be
            bounds[name] = replace(override_bound(name, glob[name], atol, rtol), accept=bounds[name].accept)
    edges = np.cumsum((0,) + case.shards)
    results, msgs = [], []
    for r, out in enumerate(outs):
        sl = slice(int(edges[r]), int(edges[r + 1]))
        expected = {"y": fwd.y[r], "dx": bwd.dx[r], **{k: glob[k] for k in glob if k not in ("y", "dx")},
                    **bwd.param_grads(r, kernel.param_grads)}
        for name, exp in expected.items():
            b = _share(bounds[name], sl) if name in ("y", "dx") else bounds[name]
            label = f"replica {r}: {name}"
            if name not in out:
                res = unread_output(label, exp, b, dtype=output_dtype(name, prec), message=f"{label}: not returned")
            else:
                res = compare_output(label, out[name], exp, b, dtype=output_dtype(name, prec))
            results.append(res)
            if not res.passed:
                msgs.append(f"{label}: {res.message}")
    return results, msgs
