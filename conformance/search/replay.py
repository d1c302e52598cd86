"""`refnorm check SPEC --replay PATH`: rerun stored reproducers and judge them with the same bounds.

Every reproducer under PATH is read and checked first (conformance.search.reproducer: hashes, fields,
the kernel's op and dtypes, the inputs regenerated bit for bit), so a bad one is a usage error before
any case runs. Each case then runs as `refnorm check` runs a case, in an isolated worker process,
with the reproducer's seed and tolerance overrides; the result is a normal results document
(run.tier "replay"; run.seed the first reproducer's; run.replay lists, per reproducer, its folder, seed,
overrides and whether the result equals the search's to the last bit: every metric, message and status,
timings aside).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path
from typing import Any, Sequence, TextIO

from ..kernel import Kernel
from ..results import CaseResult, build_document, now_iso
from ..run.execute import skip_reason
from ..run.progress import Progress
from .reproducer import Reproducer, ReproducerError, check_inputs, comparable, find_reproducers, read_reproducer

__all__ = ["load_reproducers", "replay", "replay_document"]


def load_reproducers(path: str | os.PathLike, kernel: Kernel) -> list[Reproducer]:
    """Every reproducer at ``path``, checked against the kernel. Raises ReproducerError naming the first bad one."""
    reps = [read_reproducer(p) for p in find_reproducers(path)]
    for r in reps:
        if r.case.op != kernel.op:
            raise ReproducerError(f"{r.folder}: a reproducer of {r.case.op}, but kernel {kernel.name!r} is a "
                                  f"{kernel.op} kernel")
        why = skip_reason(kernel, r.case)
        if why:
            raise ReproducerError(f"{r.folder}: kernel {kernel.name!r} does not admit this case: {why}")
        check_inputs(r, kernel)
    ids = [r.case.id for r in reps]
    if len(set(ids)) != len(ids):  # a results document holds each case once
        dup = next(i for i in ids if ids.count(i) > 1)
        raise ReproducerError(f"{path}: two reproducers hold the same case {dup[:200]!r}; replay them one at a time")
    return reps


def replay(kernel: Kernel, rep: Reproducer, *, spec: str | None = None, timeout: float = 120.0) -> CaseResult:
    """One reproducer's case, run in a worker process of its own."""
    from ..gate.worker import KeptWorker

    w = KeptWorker(kernel, seed=rep.seed, timeout=timeout, spec=spec, overrides=rep.overrides)
    try:
        return w.run_one(rep.case)
    finally:
        w.close()


def replay_document(kernel: Kernel, reps: Sequence[Reproducer], *, spec: str | None = None, timeout: float = 120.0,
                    command: str = "", stream: TextIO | None = None, quiet: bool = False) -> dict[str, Any]:
    """The results document of the reproducers' cases (Ctrl-C: the cases so far, marked incomplete)."""
    started, t0 = now_iso(), time.monotonic()
    results: list[CaseResult] = []
    records: list[dict[str, Any]] = []
    prog = Progress(len(reps), stream or sys.stderr, quiet=quiet)
    complete = True
    try:
        for r in reps:
            res = replay(kernel, r, spec=spec, timeout=timeout)
            results.append(res)
            records.append({"reproducer": str(r.folder), "seed": r.seed, "id": r.case.id,
                            "overrides": {k: list(v) for k, v in r.overrides.items()},
                            "matches_search": comparable(res) == r.result})
            prog.update(res)
    except KeyboardInterrupt:
        complete = False
    finally:
        prog.close()
    run = {"tier": "replay", "seed": reps[0].seed if reps else 0, "dtypes": sorted({r.case.dtype for r in reps}),
           "case_ids": [r.case.id for r in reps], "workers": 1, "timeout_s": timeout,
           # one set of overrides when every reproducer has the same, else each record's own (run.replay)
           "overrides": ({k: list(v) for k, v in reps[0].overrides.items()}
                         if reps and all(r.overrides == reps[0].overrides for r in reps) else {}),
           "started": started,
           "finished": now_iso(), "duration_s": round(time.monotonic() - t0, 3), "cases_selected": len(reps),
           "command": command, "spec": spec, "pid": os.getpid(), "replay": records}
    return build_document(kernel.declaration(), run, results, complete, selected=[r.case.id for r in reps])
