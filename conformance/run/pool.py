"""Worker processes that run cases in isolation: a crash or hang costs one case, not the run.

Each worker runs one case at a time and answers over a pipe. The parent waits
with a per-case deadline: a worker that dies (segfault, abort, os._exit) gives
its case status "crashed" with the signal or exit code; one that passes the
deadline is killed and its case gets "timed out". Either way a fresh worker
takes its place.

Workers start with "spawn" when the kernel can be re-loaded from its spec
(no state inherited from the parent, safe with threaded libraries), and with
"fork" when the kernel exists only as an object in this process.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import signal
import time
from dataclasses import dataclass, field
from multiprocessing.connection import Connection, wait
from typing import Any, Callable, Iterable, Mapping

from ..cases.model import Case
from ..kernel import Kernel, load_kernel
from ..results import CaseResult

__all__ = ["WorkerPool"]

#: Seconds a worker may take to import and load the kernel before its first case.
_STARTUP_TIMEOUT = 600.0


def _worker_main(conn: Connection, kernel: Kernel | None, spec: str | None, seed: int,
                 overrides: Mapping[str, tuple[float, float]] | None) -> None:
    # Ctrl-C goes to the parent, which ends the workers itself.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    # The parent reports a crash by its signal; a Python stack dump from here would only be noise.
    import faulthandler

    faulthandler.disable()
    from .execute import execute_case

    if kernel is None:
        try:
            kernel = load_kernel(spec)
        except Exception as e:  # the parent loaded it once; say why it failed here
            conn.send(("load_error", f"{type(e).__name__}: {e}"))
            return
    # Tell the parent this worker is ready, so that start-up (imports) never counts against a case's timeout.
    conn.send(("ready", os.getpid()))
    while True:
        try:
            msg = conn.recv()
        except EOFError:
            return
        if msg is None:
            return
        case = Case.from_dict(msg)
        try:
            res = execute_case(kernel, case, seed, overrides)
        except Exception as e:  # a harness bug must not take the run down either
            import traceback

            res = CaseResult(id=case.id, case=case.as_dict(), status="error",
                             message=f"harness error: {type(e).__name__}: {e}\n{traceback.format_exc(limit=6)}")
        conn.send(res.to_dict())


@dataclass
class _Worker:
    proc: Any
    conn: Connection
    case: Case | None = None
    started: float = 0.0


@dataclass
class WorkerPool:
    """Run cases over ``workers`` processes; ``on_result`` is called as each case ends."""

    kernel: Kernel
    seed: int
    workers: int = 1
    timeout: float = 120.0
    spec: str | None = None
    overrides: Mapping[str, tuple[float, float]] | None = None
    _ctx: Any = field(init=False, default=None)
    _pool: list[_Worker] = field(init=False, default_factory=list)

    def __post_init__(self) -> None:
        method = "spawn" if self.spec else ("fork" if "fork" in mp.get_all_start_methods() else "spawn")
        self._ctx = mp.get_context(method)
        if method == "spawn" and not self.spec:
            raise ValueError("this platform cannot fork: give the kernel's spec so workers can load it")

    def _start(self) -> _Worker:
        parent, child = self._ctx.Pipe()
        kernel = None if self.spec else self.kernel
        p = self._ctx.Process(target=_worker_main, args=(child, kernel, self.spec, self.seed, self.overrides),
                              daemon=True)
        p.start()
        child.close()
        if not parent.poll(_STARTUP_TIMEOUT):
            p.kill()
            raise RuntimeError(f"a worker process did not start within {_STARTUP_TIMEOUT:g} s")
        try:
            tag, info = parent.recv()
        except EOFError:
            p.join(timeout=5)
            raise RuntimeError(f"a worker process died while starting (exit code {p.exitcode})") from None
        if tag != "ready":
            p.join(timeout=5)
            raise RuntimeError(f"a worker process could not load the kernel: {info}")
        return _Worker(proc=p, conn=parent)

    def _stop(self, w: _Worker, kill: bool = False) -> None:
        try:
            if kill:
                w.proc.kill()
            else:
                w.conn.send(None)
        except (OSError, BrokenPipeError):
            pass
        w.proc.join(timeout=5)
        if w.proc.is_alive():
            w.proc.kill()
            w.proc.join(timeout=5)
        w.conn.close()

    def run(self, cases: Iterable[Case], on_result: Callable[[CaseResult], None]) -> None:
        pending = list(cases)[::-1]
        n = max(1, min(self.workers, len(pending)))
        self._pool = [self._start() for _ in range(n)]
        try:
            while pending or any(w.case is not None for w in self._pool):
                for w in self._pool:
                    if w.case is None and pending:
                        w.case = pending.pop()
                        w.started = time.monotonic()
                        w.conn.send(w.case.as_dict())
                busy = [w for w in self._pool if w.case is not None]
                deadline = min(w.started + self.timeout for w in busy)
                ready = wait([w.conn for w in busy] + [w.proc.sentinel for w in busy],
                             timeout=max(0.0, deadline - time.monotonic()))
                for i, w in enumerate(self._pool):
                    if w.case is None:
                        continue
                    if w.conn in ready or w.proc.sentinel in ready:
                        res = self._collect(w)
                    elif time.monotonic() >= w.started + self.timeout:
                        res = CaseResult(id=w.case.id, case=w.case.as_dict(), status="timed_out",
                                         message=f"no answer within the per-case timeout of {self.timeout:g} s; "
                                                 "the worker was killed",
                                         duration_s=self.timeout)
                        self._stop(w, kill=True)
                        w = self._pool[i] = self._start()
                    else:
                        continue
                    if res.status == "crashed":
                        self._pool[i] = self._start()
                    else:
                        self._pool[i].case = None
                    on_result(res)
        finally:
            for w in self._pool:
                self._stop(w, kill=w.case is not None)
            self._pool = []

    def _collect(self, w: _Worker) -> CaseResult:
        case, elapsed = w.case, time.monotonic() - w.started
        try:
            if w.conn.poll():
                return CaseResult.from_dict(w.conn.recv())
        except (EOFError, OSError):
            pass
        w.proc.join(timeout=5)
        code = w.proc.exitcode
        if code is not None and code < 0:
            try:
                how = f"killed by signal {signal.Signals(-code).name} ({-code})"
            except ValueError:
                how = f"killed by signal {-code}"
        else:
            how = f"exited with code {code}"
        self._stop(w, kill=True)
        return CaseResult(id=case.id, case=case.as_dict(), status="crashed",
                          message=f"the worker process running the kernel {how}", duration_s=elapsed)
