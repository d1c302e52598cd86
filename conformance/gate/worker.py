"""One worker process kept alive across cases, for callers that get their cases one at a time (pytest).

conformance.run.pool.WorkerPool starts its workers at the beginning of ``run`` and
stops them at its end; a pytest item asks for one case at a time, so this keeps a
single worker of such a pool between calls. A crash, a timeout or a protocol error
costs the case it happened in, and a fresh worker takes over for the next one, as in
the pool; ``close()`` stops the worker and kills its process group (what its kernel
started included).

Each reply is confirmed before ``run_one`` returns (see the pool's protocol), so a
second reply to a case is caught while that case is still being reported. A stray
reply to an earlier case (already reported) is named in the case during which it
arrives, which is then crashed.
"""

from __future__ import annotations

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
        self._dispatch(0, case)
        w = self._pool[0]
        if wait([w.conn, w.exit_fd], timeout=self.timeout):
            res, usable = self._answer(w)
        else:
            res, usable = self._timed_out(w), False
        self._late.clear()  # an earlier item is already reported; _answer named it in this case's message
        if usable:
            w.case = None
        else:
            self._pool = []
        return res

    def close(self) -> None:
        for w in list(self._live):
            self._stop(w, kill=w.case is not None)
        self._pool = []
