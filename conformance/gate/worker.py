"""One worker process kept alive across cases, for callers that get their cases one at a time (pytest).

conformance.run.pool.WorkerPool starts its workers at the beginning of ``run`` and
stops them at its end; a pytest item asks for one case at a time, so this keeps a
single worker of such a pool between calls. A crash or a timeout costs the case it
happened in, and a fresh worker takes over for the next one, as in the pool.
"""

from __future__ import annotations

import time
from multiprocessing.connection import wait

from ..cases.model import Case
from ..kernel import Kernel
from ..results import CaseResult
from ..run.pool import WorkerPool

__all__ = ["KeptWorker"]


class KeptWorker(WorkerPool):
    """``run_one(case)`` runs a case in a worker process that stays up for the next case; ``close()`` ends it."""

    def __init__(self, kernel: Kernel, seed: int, timeout: float = 120.0, spec: str | None = None,
                 overrides=None):
        super().__init__(kernel, seed=seed, workers=1, timeout=timeout, spec=spec, overrides=overrides)

    def run_one(self, case: Case) -> CaseResult:
        if not self._pool:
            self._pool = [self._start()]
        w = self._pool[0]
        w.case, w.started = case, time.monotonic()
        try:
            w.conn.send(case.as_dict())
        except (OSError, BrokenPipeError):  # the worker died between cases: give the case a fresh one
            self._stop(w, kill=True)
            w = self._pool[0] = self._start()
            w.case, w.started = case, time.monotonic()
            w.conn.send(case.as_dict())
        ready = wait([w.conn, w.proc.sentinel], timeout=self.timeout)
        if ready:
            res = self._collect(w)
        else:
            res = CaseResult(id=case.id, case=case.as_dict(), status="timed_out",
                             message=f"no answer within the per-case timeout of {self.timeout:g} s; "
                                     "the worker was killed", duration_s=self.timeout)
            self._stop(w, kill=True)
            self._pool = []
            return res
        if res.status == "crashed":  # _collect has stopped the dead worker
            self._pool = []
        else:
            w.case = None
        return res

    def close(self) -> None:
        for w in self._pool:
            self._stop(w, kill=w.case is not None)
        self._pool = []
