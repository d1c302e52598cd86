"""Worker processes that run cases in isolation: a crash or hang costs one case, not the run.

Each worker runs one case at a time and answers over a pipe. The parent waits
with a per-case deadline: a worker that dies (segfault, abort, os._exit) gives
its case status "crashed" with the signal or exit code; one that passes the
deadline is killed and its case gets "timed out". Either way a fresh worker
takes its place.

The protocol. The parent sends ``("case", token, case)`` with a fresh random token; the
worker answers ``("result", token, pid, result)``; the parent then sends ``("sync", token2)``
and the worker answers ``("synced", token2, pid)``. A worker answers in order, so anything
that arrives between its result and its confirmation is a second reply. A reply that cannot
be read, that carries another token, another process id or another case id, that comes
twice, or a worker that dies before confirming its reply, is a protocol error: the case is
"crashed" with a message that begins "protocol error", and the worker is stopped with its
whole process group and replaced. A second reply to a case already delivered is reported
as a crashed replacement result for that case (``on_result`` is called again with its id).

Process hygiene (conformance.run.isolation): each worker leads its own process group,
which holds whatever its kernel starts; stopping a worker (end of the run, crash, timeout,
protocol error, Ctrl-C) kills that group, and a worker dies with the run process even when
that is killed with SIGKILL. Worker deaths are watched through a pidfd on Linux (the
multiprocessing sentinel stays open while any child of the worker lives).

Threads. With more than one worker each gets the usable CPUs divided by the number of workers as
its thread count (``worker_threads``): the usual thread-count variables are set for it (those the
user has set are left alone) and torch, when the kernel loaded it, is told the same count. Without
this every worker's OpenMP and BLAS pools size themselves to the whole machine, and W workers run
W times as many spinning threads as there are cores (measured: small torch cases ran 2.3x slower
with 2 workers on 2 cores). One worker keeps the libraries' own defaults.

Workers start with "spawn" when the kernel can be re-loaded from its spec
(no state inherited from the parent, safe with threaded libraries), and with
"fork" when the kernel exists only as an object in this process.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import secrets
import signal
import time
from contextlib import contextmanager
from dataclasses import dataclass, field
from multiprocessing.connection import Connection, wait
from typing import Any, Callable, Iterable, Mapping

from ..cases.model import Case
from ..kernel import Kernel, load_kernel
from ..results import STATUSES, CaseResult, cap_text
from . import isolation

__all__ = ["WorkerPool", "worker_threads", "THREAD_VARIABLES"]

#: The environment variables that size the thread pools a worker's libraries start: OpenMP (torch's
#: intra-op pool, OpenBLAS built with OpenMP), OpenBLAS, MKL, TensorFlow's intra-op pool, and the
#: oracle's own (refnorm._parallel).
THREAD_VARIABLES = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "TF_NUM_INTRAOP_THREADS",
                    "REFNORM_NUM_THREADS")


def worker_threads(workers: int, environ: Mapping[str, str] | None = None) -> dict[str, str]:
    """The thread-count variables a worker of a pool of ``workers`` gets: max(1, CPUs // workers) for each
    of THREAD_VARIABLES not already set in ``environ`` (os.environ); {} for one worker."""
    environ = os.environ if environ is None else environ
    if workers <= 1:
        return {}
    try:
        cpus = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        cpus = os.cpu_count() or 1
    n = str(max(1, cpus // workers))
    return {v: n for v in THREAD_VARIABLES if not environ.get(v, "").strip()}


@contextmanager
def _environment(extra: Mapping[str, str]):
    """os.environ with ``extra`` added while a worker starts (a spawned or forked child copies it)."""
    old = {k: os.environ.get(k) for k in extra}
    os.environ.update(extra)
    try:
        yield
    finally:
        for k, v in old.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


def _limit_torch_threads() -> None:
    """Tell an already imported torch the OMP_NUM_THREADS this worker was given (a forked worker
    inherits the parent's torch, whose pool was sized before the variable was set)."""
    import sys

    torch = sys.modules.get("torch")
    n = os.environ.get("OMP_NUM_THREADS", "")
    if torch is not None and n.isdigit() and int(n) > 0:
        try:
            torch.set_num_threads(int(n))
        except Exception:  # a torch that refuses: its default stays, which is only slower
            pass


#: Seconds a worker may take to import and load the kernel before its first case.
_STARTUP_TIMEOUT = 600.0
#: Seconds a worker may take to confirm its reply (it answers at once; this only bounds a broken one).
_CONFIRM_TIMEOUT = 30.0
#: Seconds a stopped worker may take to exit before its group is killed.
_STOP_WAIT = 5.0


def _worker_main(conn: Connection, kernel: Kernel | None, spec: str | None, seed: int,
                 overrides: Mapping[str, tuple[float, float]] | None, parent_pid: int,
                 timeout: float | None = None, threads: Mapping[str, str] | None = None) -> None:
    grouped = isolation.enter_worker(parent_pid)
    # The parent reports a crash by its signal; a Python stack dump from here would only be noise.
    import faulthandler

    faulthandler.disable()
    from . import execute as _execute_module
    from .execute import describe_exception, execute_case

    _execute_module.CASE_TIMEOUT_S = timeout  # a failed case's diagnosis keeps within it

    if kernel is None:
        try:
            kernel = load_kernel(spec)
        except Exception as e:  # the parent loaded it once; say why it failed here
            conn.send(("load_error", cap_text(f"{type(e).__name__}: {e}")))
            return
    if threads and "OMP_NUM_THREADS" in threads:
        _limit_torch_threads()
    me = os.getpid()
    # Tell the parent this worker is ready, so that start-up (imports) never counts against a case's timeout.
    conn.send(("ready", me, grouped))
    while True:
        try:
            msg = conn.recv()
        except EOFError:
            return
        if msg is None:
            return
        tag, token, body = msg
        if tag == "sync":
            conn.send(("synced", token, me))
            continue
        case = Case.from_dict(body)
        try:
            res = execute_case(kernel, case, seed, overrides)
        except Exception as e:  # a harness bug must not take the run down either
            res = CaseResult(id=case.id, case=case.as_dict(), status="error",
                             message=f"harness error: {describe_exception(e, frames=6)}")
        if os.getpid() != me:  # a forked copy that got past the kernel call's guard: only the worker answers
            os._exit(0)
        _reply(conn, token, me, res)


def _reply(conn: Connection, token: str, pid: int, res: CaseResult) -> None:
    conn.send(("result", token, pid, res.to_dict()))


def _pidfd(pid: int) -> int | None:
    try:
        return os.pidfd_open(pid)
    except (AttributeError, OSError):
        return None


def _brief(msg: Any) -> str:
    return cap_text(repr(msg), 200)


@dataclass
class _Worker:
    proc: Any
    conn: Connection
    pid: int
    exit_fd: Any  # readable once the worker has exited (not reaped): a pidfd, else the sentinel
    pidfd: int | None = None
    case: Case | None = None
    started: float = 0.0
    token: str = ""
    answered: dict[str, Case] = field(default_factory=dict)  # tokens of earlier requests
    reaped: bool = False


class _Protocol(Exception):
    """A reply that breaks the protocol; the message says how."""


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
    _live: list[_Worker] = field(init=False, default_factory=list)  # every started, unstopped worker
    _late: list[CaseResult] = field(init=False, default_factory=list)  # replacements for delivered cases

    def __post_init__(self) -> None:
        method = "spawn" if self.spec else ("fork" if "fork" in mp.get_all_start_methods() else "spawn")
        self._ctx = mp.get_context(method)
        if method == "spawn" and not self.spec:
            raise ValueError("this platform cannot fork: give the kernel's spec so workers can load it")

    # ---------------------------------------------------------------- workers
    def _start(self) -> _Worker:
        return self._ready(self._launch())

    def _launch(self) -> _Worker:
        """Start a worker process (it imports and loads the kernel while the caller goes on)."""
        parent, child = self._ctx.Pipe()
        kernel = None if self.spec else self.kernel
        threads = worker_threads(self.workers)
        p = self._ctx.Process(target=_worker_main,
                              args=(child, kernel, self.spec, self.seed, self.overrides, os.getpid(), self.timeout,
                                    threads),
                              daemon=True)
        with _environment(threads):
            p.start()
        child.close()
        pidfd = _pidfd(p.pid)
        w = _Worker(proc=p, conn=parent, pid=p.pid, exit_fd=pidfd if pidfd is not None else p.sentinel, pidfd=pidfd)
        self._live.append(w)  # from here on, whatever happens, _stop can find it
        return w

    def _ready(self, w: _Worker) -> _Worker:
        """Wait for a launched worker's ready message; a worker that fails to start is stopped."""
        parent, p = w.conn, w.proc
        try:
            if not wait([parent, w.exit_fd], timeout=_STARTUP_TIMEOUT):
                raise RuntimeError(f"a worker process did not start within {_STARTUP_TIMEOUT:g} s")
            try:
                msg = parent.recv() if parent.poll() else None
            except (EOFError, OSError):
                msg = None
            if msg is None:
                wait([w.exit_fd], timeout=_STOP_WAIT)
                raise RuntimeError(f"a worker process died while starting ({self._how_ended(w)})")
            if msg[0] == "load_error":
                raise RuntimeError(f"a worker process could not load the kernel: {msg[1]}")
            if msg[0] != "ready" or msg[1] != p.pid:
                raise RuntimeError(f"a worker process sent {_brief(msg)} instead of its ready message")
        except BaseException:
            self._stop(w, kill=True)
            raise
        return w

    def _how_ended(self, w: _Worker) -> str:
        """How a worker that has exited ended (reaps it after killing what is left of its group)."""
        isolation.kill_group(w.pid)
        w.proc.join(timeout=_STOP_WAIT)
        w.reaped = True
        code = w.proc.exitcode
        if code is not None and code < 0:
            try:
                return f"killed by signal {signal.Signals(-code).name} ({-code})"
            except ValueError:
                return f"killed by signal {-code}"
        return f"exited with code {code}"

    def _stop(self, w: _Worker, kill: bool = False) -> None:
        """End a worker and its process group; a graceful stop first lets it leave its loop."""
        if w not in self._live:
            return
        self._live.remove(w)
        if not kill:
            try:
                w.conn.send(None)
                wait([w.exit_fd], timeout=_STOP_WAIT)  # exited, not yet reaped: its pid still names its group
                self._drain(w)
            except (OSError, EOFError):
                pass
        if not w.reaped:  # a zombie still holds its pid, so the group id cannot have been reused
            isolation.kill_group(w.pid)  # the worker (if still there) and every process its kernel left
        w.proc.kill()
        w.proc.join(timeout=_STOP_WAIT)
        w.reaped = True
        w.conn.close()
        if w.pidfd is not None:
            os.close(w.pidfd)

    def _drain(self, w: _Worker) -> None:
        """Messages left on a stopped worker's pipe: each is a late second reply."""
        while w.conn.poll(0):
            try:
                msg = w.conn.recv()
            except (EOFError, OSError):
                return
            except Exception:  # an unreadable stream: nothing more can be read from it
                return
            self._late_reply(w, msg, "after the worker was told to stop")

    def _late_reply(self, w: _Worker, msg: Any, when: str) -> str | None:
        """Record a crashed replacement for the earlier case a stray reply names; return that case's id."""
        token = msg[1] if isinstance(msg, tuple) and len(msg) > 1 else None
        earlier = w.answered.get(token) if isinstance(token, str) else None
        if earlier is None:
            return None
        self._late.append(CaseResult(
            id=earlier.id, case=earlier.as_dict(), status="crashed",
            message=f"protocol error: a second reply to this case arrived {when}; its first reply cannot be "
                    "trusted"))
        return earlier.id

    # ---------------------------------------------------------------- one exchange
    def _send(self, w: _Worker, case: Case) -> None:
        w.case, w.started, w.token = case, time.monotonic(), secrets.token_hex(8)
        w.conn.send(("case", w.token, case.as_dict()))

    def _dispatch(self, i: int, case: Case) -> None:
        """Send ``case`` to worker i; one that died while idle is replaced first."""
        try:
            self._send(self._pool[i], case)
        except OSError:
            self._stop(self._pool[i], kill=True)
            self._pool[i] = self._start()
            self._send(self._pool[i], case)

    def _answer(self, w: _Worker) -> tuple[CaseResult, bool]:
        """The checked answer to w's case, and whether w may take the next case (else it is stopped)."""
        case, elapsed = w.case, time.monotonic() - w.started
        try:
            msg = self._read(w)
            if msg is None:  # nothing to read: the worker died (or closed its end of the pipe)
                if wait([w.exit_fd], timeout=_STOP_WAIT):
                    how = self._how_ended(w)
                else:
                    how = "closed its end of the pipe without answering (it was killed)"
                self._stop(w, kill=True)
                return CaseResult(id=case.id, case=case.as_dict(), status="crashed",
                                  message=f"the worker process running the kernel {how}", duration_s=elapsed), False
            res = self._check(w, msg)
            self._confirm(w)
        except _Protocol as e:
            self._stop(w, kill=True)
            return CaseResult(id=case.id, case=case.as_dict(), status="crashed",
                              message=f"protocol error: {e}; the worker and its process group were stopped and a "
                                      "fresh worker takes over", duration_s=elapsed), False
        w.answered[w.token] = case
        if res.status == "crashed":  # the worker caught a fault of its own process (a forked copy): replace it
            self._stop(w, kill=True)
            return res, False
        return res, True

    def _read(self, w: _Worker) -> Any:
        try:
            if not w.conn.poll():
                return None
            return w.conn.recv()
        except (EOFError, OSError):
            return None
        except Exception as e:  # a corrupt stream: unpickling raises many types
            raise _Protocol(f"an unreadable reply ({type(e).__name__}: {cap_text(str(e), 200)})") from None

    def _check(self, w: _Worker, msg: Any) -> CaseResult:
        if not (isinstance(msg, tuple) and len(msg) == 4 and msg[0] == "result"):
            raise _Protocol(f"an unexpected message {_brief(msg)} instead of a result")
        _, token, pid, body = msg
        if token != w.token:
            earlier = self._late_reply(w, msg, f"while case {w.case.id} ran")
            if earlier is not None:
                raise _Protocol(f"a second reply to the earlier case {earlier} arrived while this case ran")
            raise _Protocol(f"a reply with token {_brief(token)}, which was never sent")
        if pid != w.pid:
            raise _Protocol(f"a reply from process {pid}, not from the worker (process {w.pid}): a process the "
                            "kernel forked answered")
        if not isinstance(body, dict) or body.get("id") != w.case.id:
            got = body.get("id") if isinstance(body, dict) else body
            raise _Protocol(f"a result for case {_brief(got)}, not for the case sent")
        if body.get("status") not in STATUSES:
            raise _Protocol(f"a result with status {_brief(body.get('status'))}")
        try:
            return CaseResult.from_dict(body)
        except Exception as e:
            raise _Protocol(f"a result that cannot be read ({type(e).__name__}: {e})") from None

    def _confirm(self, w: _Worker) -> None:
        """Ask the worker to confirm; anything else it sent in between is a second reply."""
        token = secrets.token_hex(8)
        try:
            w.conn.send(("sync", token, None))
        except OSError:
            raise _Protocol("the worker was gone right after its reply, before confirming it") from None
        deadline = time.monotonic() + _CONFIRM_TIMEOUT
        while True:
            left = deadline - time.monotonic()
            if left <= 0 or not wait([w.conn, w.exit_fd], timeout=left):
                raise _Protocol(f"no confirmation of its reply within {_CONFIRM_TIMEOUT:g} s")
            msg = self._read(w)
            if msg is None:
                wait([w.exit_fd], timeout=_STOP_WAIT)
                raise _Protocol(f"the worker process {self._how_ended(w)} right after its reply, before "
                                "confirming it")
            if msg == ("synced", token, w.pid):
                return
            if isinstance(msg, tuple) and len(msg) == 4 and msg[0] == "result" and msg[1] == w.token:
                raise _Protocol("a second reply to this case")
            earlier = self._late_reply(w, msg, f"while case {w.case.id} was being confirmed")
            if earlier is not None:
                raise _Protocol(f"a second reply to the earlier case {earlier} arrived after this case's reply")
            raise _Protocol(f"an unexpected message {_brief(msg)} after its reply")

    def _timed_out(self, w: _Worker) -> CaseResult:
        case = w.case
        self._stop(w, kill=True)
        return CaseResult(id=case.id, case=case.as_dict(), status="timed_out",
                          message=f"no answer within the per-case timeout of {self.timeout:g} s; the worker and "
                                  "its process group were killed", duration_s=self.timeout)

    def _deliver_late(self, on_result: Callable[[CaseResult], None]) -> None:
        while self._late:
            on_result(self._late.pop(0))

    # ---------------------------------------------------------------- the run
    def run(self, cases: Iterable[Case], on_result: Callable[[CaseResult], None]) -> None:
        pending = list(cases)[::-1]
        if not pending:
            return
        n = max(1, min(self.workers, len(pending)))
        finished = False
        try:
            # Launched together, so that their imports overlap (torch's takes seconds), then awaited.
            launched = [self._launch() for _ in range(n)]
            self._pool = [self._ready(w) for w in launched]
            while pending or any(w.case is not None for w in self._pool):
                for i, w in enumerate(self._pool):
                    if w.case is None and pending:
                        self._dispatch(i, pending.pop())
                busy = [w for w in self._pool if w.case is not None]
                deadline = min(w.started + self.timeout for w in busy)
                ready = wait([w.conn for w in busy] + [w.exit_fd for w in busy],
                             timeout=max(0.0, deadline - time.monotonic()))
                for i, w in enumerate(self._pool):
                    if w.case is None:
                        continue
                    if w.conn in ready or w.exit_fd in ready:
                        res, usable = self._answer(w)
                    elif time.monotonic() >= w.started + self.timeout:
                        res, usable = self._timed_out(w), False
                    else:
                        continue
                    if usable:
                        w.case = None
                    on_result(res)
                    self._deliver_late(on_result)
                    if not usable:
                        self._pool[i] = self._start()
            finished = True
        finally:
            for w in list(self._live):  # on Ctrl-C or an error: kill at once
                self._stop(w, kill=not finished or w.case is not None)
            self._pool = []
        self._deliver_late(on_result)
