"""Run a kernel over the catalog and build the results document."""

from __future__ import annotations

import os
import sys
import time
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, TextIO

from .. import stop
from ..cases import catalog, find_case
from ..cases.model import Case
from ..kernel import Kernel
from ..results import CaseResult, build_document, now_iso
from .execute import skip_reason
from .pool import THREAD_VARIABLES, WorkerPool, worker_threads
from .progress import Progress

__all__ = ["RunOptions", "select_cases", "run_check"]


@dataclass
class RunOptions:
    """What to run and how. ``overrides`` maps an output name to a fixed (atol, rtol); ``shard`` is
    (K, N): run only shard K of N of the selected cases (conformance.run.shards)."""

    tier: str = "standard"
    dtypes: tuple[str, ...] | None = None
    case_ids: tuple[str, ...] = ()
    seed: int = 0
    workers: int = 1
    timeout: float = 120.0
    overrides: Mapping[str, tuple[float, float]] = field(default_factory=dict)
    command: str = ""
    shard: tuple[int, int] | None = None
    #: with ``shard``: measured seconds per case id of an earlier run, and what names it (shards.read_durations)
    shard_durations: tuple[Mapping[str, float], str] | None = None
    #: outputs whose inconclusive passes the user accepts (conformance.evidence; recorded in the results)
    accept_inconclusive: tuple[str, ...] = ()


def select_cases(kernel: Kernel, opts: RunOptions) -> list[Case]:
    """The catalog cases for the kernel's op and dtypes (or the named cases only, each once)."""
    if opts.case_ids:
        return [find_case(cid) for cid in dict.fromkeys(opts.case_ids)]
    dts = opts.dtypes or kernel.dtypes
    if kernel.quantization is not None:  # a quantized y: the quantized cases of its declaration
        from ..quantized import declared_cases

        return declared_cases(kernel, catalog([kernel.op], dts, opts.tier, quantized=True))
    return catalog([kernel.op], dts, opts.tier)


def run_check(kernel: Kernel, opts: RunOptions, *, spec: str | None = None,
              stream: TextIO | None = None, quiet: bool = False) -> dict[str, Any]:
    """Run every selected case in worker processes; return the results document.

    With ``opts.shard`` = (K, N) only shard K of the selection runs: the document's coverage and
    ``run.cases_selected`` count that shard's cases, and ``run.shard`` records the whole selection.

    Ctrl-C (and, under the command line's conformance.stop handlers, SIGTERM and SIGHUP)
    stops the run: the document then has complete=False, verdict "incomplete" and the
    signal in run["interrupted"]. Every selected case gets exactly one result: a second
    result delivered for a case makes it "crashed", and a case that got none although the
    run was not interrupted is "crashed" too; the document's "coverage" checks it again.
    """
    cases = select_cases(kernel, opts)
    shard = None
    if opts.shard is not None:  # the document covers this shard's cases; run.shard names the whole selection
        from .shards import cut

        durations, source = opts.shard_durations or (None, "")
        shard = cut(cases, *opts.shard, durations=durations, durations_source=source)
        cases = list(shard.cases)
    started, t0 = now_iso(), time.monotonic()
    results: dict[str, CaseResult] = {}
    to_run = []
    for c in cases:
        why = skip_reason(kernel, c)
        if why:
            results[c.id] = CaseResult(id=c.id, case=c.as_dict(), status="skipped", message=why)
        else:
            to_run.append(c)
    sent = {c.id for c in to_run}
    stray: list[CaseResult] = []  # results for ids that were never sent: kept, so that coverage names them
    prog = Progress(len(to_run), stream or sys.stderr, quiet=quiet)
    interrupted: str | None = None

    def done(r: CaseResult) -> None:
        if r.id not in sent:
            stray.append(r)
        elif r.id in results:  # a second result for one case is never kept in silence
            results[r.id] = r if r.status == "crashed" else CaseResult(
                id=r.id, case=r.case, status="crashed",
                message="protocol error: two results were delivered for this case; neither can be trusted")
        else:
            results[r.id] = r
            prog.update(r)

    pool = WorkerPool(kernel, seed=opts.seed, workers=opts.workers, timeout=opts.timeout, spec=spec,
                      overrides=dict(opts.overrides))
    try:
        with stop.interruptible():
            pool.run(to_run, done)
    except KeyboardInterrupt as e:
        interrupted = getattr(e, "signal", "SIGINT")
    finally:
        prog.close()
    with stop.holding():  # a signal now must not cost the document
        if interrupted is None:
            for c in to_run:
                if c.id not in results:
                    results[c.id] = CaseResult(
                        id=c.id, case=c.as_dict(), status="crashed",
                        message="no result came back for this case although the run was not interrupted "
                                "(a fault of the harness: please report it)")
        ordered = [results[c.id] for c in cases if c.id in results] + stray
        run = {
            "tier": opts.tier if not opts.case_ids else "selected",
            "seed": opts.seed,
            "dtypes": list(opts.dtypes or kernel.dtypes),
            "case_ids": list(opts.case_ids),
            "workers": opts.workers,
            # what each worker's thread pools were sized by (conformance.run.pool.worker_threads)
            "worker_threads": {v: os.environ.get(v, "").strip() or worker_threads(opts.workers).get(v)
                               for v in THREAD_VARIABLES
                               if os.environ.get(v, "").strip() or v in worker_threads(opts.workers)},
            "timeout_s": opts.timeout,
            "overrides": {k: list(v) for k, v in opts.overrides.items()},
            "accept_inconclusive": list(opts.accept_inconclusive),
            "started": started,
            "finished": now_iso(),
            "duration_s": round(time.monotonic() - t0, 3),
            "cases_selected": len(cases),
            "interrupted": interrupted,
            "command": opts.command,
            "spec": spec,
            "pid": os.getpid(),
        }
        if shard is not None:
            run["shard"] = shard.record
        return build_document(kernel.declaration(), run, ordered, interrupted is None,
                              selected=[c.id for c in cases])
