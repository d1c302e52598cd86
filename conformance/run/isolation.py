"""Keeping a kernel in its box: process groups, death with the run, forked copies, floating-point state.

A worker process (conformance.run.pool) calls ``enter_worker`` first. Then:

- The worker leads its own process group, and every process its kernel starts stays in it
  unless it leaves on purpose (setsid): ``kill_group`` ends them all at once, at the end of
  a run, on a crash or timeout restart, and on Ctrl-C. A worker in its own group does not
  get the terminal's Ctrl-C (the run stops it) and ignores SIGTTOU/SIGTTIN, so a kernel
  that prints from a background group is not stopped by job control.
- The worker dies with the run. On Linux the kernel sends it SIGKILL when the run process
  dies (``PR_SET_PDEATHSIG`` through ctypes), even from SIGKILL, and a small reaper process
  in the worker's group, told in the same way when the worker dies, kills the group, so
  that the kernel's own children go too. Elsewhere a daemon thread of the worker watches
  for the run process to go (its parent id changes) and kills the group; it needs the
  interpreter lock, so a kernel that holds it forever in C code outlives the run there.
  (PR_SET_PDEATHSIG fires when the thread that started the worker ends: the pool starts
  and stops its workers in one thread, which is why it is safe.)
- ``call_kernel`` wraps every call of a kernel entry point. It saves and restores the
  floating-point state (NumPy's error handling, the warning filters, and the C
  floating-point environment: rounding mode, exception flags, and on x86 the MXCSR's
  flush-to-zero bits), so that a kernel that calls ``np.seterr(all="raise")`` or changes
  the rounding mode cannot change what the harness computes after it. And it catches a
  kernel that forks the worker without exec and lets both processes return: the copy is
  stopped before it can answer for the case (only the worker may), it tells the worker
  through a close-on-exec pipe, and the worker reports the case as crashed
  (``ForkedCopy``). A copy that exits (``os._exit``, ``sys.exit``) or execs a program is
  a normal child process and no fault.
"""

from __future__ import annotations

import contextlib
import ctypes
import os
import selectors
import signal
import sys
import threading
import time
import warnings
from typing import Any, Callable

import numpy as np

__all__ = ["enter_worker", "kill_group", "call_kernel", "ForkedCopy", "FORK_GRACE_S"]

#: Seconds the worker waits, after a kernel call in which it forked, for each copy of itself
#: to exit, exec or report that it returned into the harness. A copy that returns does so
#: within microseconds; a child that keeps running without exec (a helper the kernel keeps)
#: costs its case this wait once, and is killed with the worker's group when the run ends.
FORK_GRACE_S = 2.0

_WORKER_PID: int | None = None  # set in a worker process: the pid that may answer for a case
_LIBC: Any = None
_PR_SET_PDEATHSIG = 1  # <linux/prctl.h>


class ForkedCopy(Exception):
    """The kernel forked the worker (no exec) and the copy returned into the harness."""

    def __init__(self, pids: list[int]):
        self.pids = pids
        super().__init__(
            f"the kernel forked the worker process (os.fork or fork() without exec) and the copy "
            f"(pid {', '.join(map(str, pids))}) returned from the kernel into the harness, so two processes "
            "would have answered for this case; the copy was stopped before it could, and the worker is replaced")


# ------------------------------------------------------------------ the worker's process

def enter_worker(parent_pid: int) -> bool:
    """Set up a new worker process; return whether it leads its own process group."""
    global _WORKER_PID
    _WORKER_PID = os.getpid()
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C goes to the run, which ends the workers itself
    for name in ("SIGTTOU", "SIGTTIN"):
        if hasattr(signal, name):
            signal.signal(getattr(signal, name), signal.SIG_IGN)
    grouped = False
    if hasattr(os, "setpgid"):
        try:
            os.setpgid(0, 0)
            grouped = True
        except OSError:
            pass
    if _set_pdeathsig(signal.SIGKILL):
        if os.getppid() != parent_pid:  # the run died before the request took effect
            os._exit(1)
        if grouped:
            _start_reaper()
    else:
        threading.Thread(target=_watch_parent, args=(parent_pid, grouped), name="refnorm-parent-watch",
                         daemon=True).start()
    return grouped


def _libc():
    global _LIBC
    if _LIBC is None:
        try:
            _LIBC = ctypes.CDLL(None, use_errno=True)
        except OSError:
            _LIBC = False
    return _LIBC or None


def _set_pdeathsig(sig: int) -> bool:
    if not sys.platform.startswith("linux"):
        return False
    libc = _libc()
    prctl = getattr(libc, "prctl", None) if libc else None
    if prctl is None:
        return False
    z = ctypes.c_ulong(0)
    return prctl(ctypes.c_int(_PR_SET_PDEATHSIG), ctypes.c_ulong(int(sig)), z, z, z) == 0


def _start_reaper() -> None:
    """Fork a process that waits for the worker's death and then kills the worker's group."""
    with warnings.catch_warnings():  # forking a process with library threads: the child runs no library code
        warnings.simplefilter("ignore", DeprecationWarning)
        worker = os.getpid()
        signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGUSR1})
        try:
            pid = os.fork()
        finally:
            if os.getpid() == worker:
                signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGUSR1})
    if pid:
        return
    try:  # the reaper: hold nothing of the worker's (a pipeline must not wait on it), wait, kill
        null = os.open(os.devnull, os.O_RDWR)
        for fd in (0, 1, 2):
            os.dup2(null, fd)
        try:
            top = os.sysconf("SC_OPEN_MAX")
        except (ValueError, OSError):
            top = 1 << 16
        os.closerange(3, top if top > 3 else 1 << 16)
        if _set_pdeathsig(signal.SIGUSR1) and os.getppid() == worker:
            signal.sigwait({signal.SIGUSR1})
        os.killpg(os.getpgrp(), signal.SIGKILL)
    finally:
        os._exit(0)


def _watch_parent(parent_pid: int, grouped: bool) -> None:
    while os.getppid() == parent_pid:
        time.sleep(0.5)
    if grouped:
        os.killpg(os.getpgrp(), signal.SIGKILL)
    os._exit(1)


def kill_group(pid: int) -> None:
    """SIGKILL the process group that worker ``pid`` leads: the worker and what its kernel started.

    Call it before the worker is reaped (a zombie still holds its pid, so the group id cannot
    have been reused). A group that no longer exists is not an error.
    """
    if hasattr(os, "killpg"):
        try:
            os.killpg(pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass


# ------------------------------------------------------------------ one kernel call

class _FloatingPointState:
    """NumPy's error handling and the C floating-point environment, saved to be put back."""

    _ENV_BYTES = 512  # larger than any fenv_t (x86-64 glibc: 32 bytes; aarch64: 8)

    def __init__(self) -> None:
        self.np_err = np.geterr()
        self.np_call = np.geterrcall()
        self.env = None
        libc = _libc()
        if libc is not None and hasattr(libc, "fegetenv") and hasattr(libc, "fesetenv"):
            buf = ctypes.create_string_buffer(self._ENV_BYTES)
            if libc.fegetenv(buf) == 0:
                self.env = buf

    def restore(self) -> None:
        np.seterr(**self.np_err)
        np.seterrcall(self.np_call)
        if self.env is not None:
            _libc().fesetenv(self.env)


class _ForkWatch:
    """A pipe whose write end every forked copy of the worker inherits (and loses on exec)."""

    def __init__(self) -> None:
        self.r, self.w = os.pipe()  # both close-on-exec (PEP 446)

    def note_and_exit(self, code: int, report: bool) -> None:
        """In a copy: say so (when it returned into the harness) and end without running anything more."""
        if report:
            try:
                os.write(self.w, b"%d\n" % os.getpid())
            except OSError:
                pass
        else:
            for f in (sys.stdout, sys.stderr):  # a child that exits on purpose keeps what it printed
                with contextlib.suppress(Exception):
                    f.flush()
        os._exit(code)

    def copies(self) -> list[int]:
        """In the worker: the pids of copies that returned into the harness (waiting FORK_GRACE_S at most)."""
        with contextlib.suppress(OSError):
            os.close(self.w)
        data = b""
        deadline = time.monotonic() + FORK_GRACE_S
        try:
            with selectors.DefaultSelector() as sel:
                sel.register(self.r, selectors.EVENT_READ)
                while (left := deadline - time.monotonic()) > 0 and sel.select(left):
                    chunk = os.read(self.r, 4096)
                    if not chunk:  # every copy has exited or exec'd (or none was made)
                        break
                    data += chunk
        except OSError:
            pass
        finally:
            with contextlib.suppress(OSError):
                os.close(self.r)
        pids = [int(p) for p in data.split() if p.isdigit()]
        for p in pids:  # each exits right after writing: reap it
            with contextlib.suppress(ChildProcessError, OSError):
                os.waitpid(p, 0)
        return pids


def _exit_code(e: BaseException | None) -> tuple[int, bool]:
    """(exit code, whether the copy returned into the harness) for how a copy leaves the kernel."""
    if isinstance(e, SystemExit):
        c = e.code
        if c is None:
            return 0, False
        if isinstance(c, int):
            return c & 0xFF, False
        with contextlib.suppress(Exception):
            print(c, file=sys.stderr)
        return 1, False
    if isinstance(e, KeyboardInterrupt):
        return 130, False
    return 0, True


def call_kernel(thunk: Callable[[], Any]) -> Any:
    """``thunk()`` with the floating-point state restored afterwards and forked copies caught.

    Raises ForkedCopy (from the kernel's exception, if any) when a copy of the worker came
    back; otherwise returns or raises what the kernel did.
    """
    watch = _ForkWatch() if _WORKER_PID is not None and hasattr(os, "fork") else None
    state = _FloatingPointState()
    try:
        with warnings.catch_warnings():
            out = thunk()
    except BaseException as e:
        copies = _after_call(watch, state, e)
        if copies:
            raise ForkedCopy(copies) from e
        raise
    copies = _after_call(watch, state, None)
    if copies:
        raise ForkedCopy(copies)
    return out


def _after_call(watch: _ForkWatch | None, state: _FloatingPointState, e: BaseException | None) -> list[int]:
    if watch is not None and os.getpid() != _WORKER_PID:
        code, returned = _exit_code(e)
        watch.note_and_exit(code, returned)  # does not return
    state.restore()
    return watch.copies() if watch is not None else []
