"""Kernels that attack the harness's process protocol, for tests/test_faults.py.

Each computes a correct float32 layer norm (tests/harness_kernels.py: Ba, Kiros & Hinton 2016,
eq. 4, two-pass variance) and misbehaves in one way. Those that start processes or need to be
watched write what they do into the folder named by the environment variable REFNORM_FAULT_DIR:

    worker.<pid>   touched by every call: a worker process that ran the kernel
    child.<pid>    a process the kernel started (it must not outlive the run)
    hanging        touched when the kernel starts to hang
    loading        touched when the slow factory starts

The protocol forgers find the worker's pipe, request token and pid in the frame of
conformance.run.pool._worker_main (locals ``conn``, ``token``, ``me``, ``case``): fault
injection that knows the harness's internals on purpose, so that it works through spawned
workers, the command line and the pytest plugin alike.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

if str(Path(__file__).resolve().parent) not in sys.path:  # loaded by path (a kernel spec) in a fresh process
    sys.path.insert(0, str(Path(__file__).resolve().parent))

from conformance import Kernel  # noqa: E402
from harness_kernels import _decl, good_layer_norm, ln_forward  # noqa: E402


def _dir() -> Path | None:
    d = os.environ.get("REFNORM_FAULT_DIR")
    return Path(d) if d else None


def _mark(name: str) -> None:
    d = _dir()
    if d is not None:
        (d / name).touch()


def _ln(x, weight, bias, eps, normalized_shape):
    _mark(f"worker.{os.getpid()}")
    return ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)


# ---------------------------------------------------------------- forks
def _fork_return(x, weight, bias, *, eps, normalized_shape):
    """The reproducer of the fault: forks once and lets both processes return; NaN on rows of 96."""
    y, mean, rstd = _ln(x, weight, bias, eps, normalized_shape)
    if x.shape[-1] == 96:
        y = y.copy()
        y.reshape(-1)[0] = np.nan
    os.fork()
    return y, mean, rstd


def _fork_sleep(x, weight, bias, *, eps, normalized_shape):
    """Forks a child that sleeps inside the kernel (never returns) and answers correctly."""
    out = _ln(x, weight, bias, eps, normalized_shape)
    pid = os.fork()
    if pid == 0:
        time.sleep(600)
        os._exit(0)
    _mark(f"child.{pid}")
    return out


def _fork_exit(x, weight, bias, *, eps, normalized_shape):
    """Forks a child that does a little work and leaves with sys.exit: a normal child, no fault."""
    out = _ln(x, weight, bias, eps, normalized_shape)
    if os.fork() == 0:
        sys.exit(0)
    return out


def _spawn_sleep(x, weight, bias, *, eps, normalized_shape):
    """Starts a program (fork + exec) that sleeps, holding the worker's stdout, and answers correctly."""
    out = _ln(x, weight, bias, eps, normalized_shape)
    p = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(600)"], stdout=sys.stdout.fileno())
    _mark(f"child.{p.pid}")
    return out


fork_return = _decl("forks and both return (NaN on rows of 96)", _fork_return)
fork_sleep = _decl("forks a sleeping child", _fork_sleep)
fork_exit = _decl("forks a child that exits", _fork_exit)
spawn_sleep = _decl("starts a sleeping program", _spawn_sleep)


# ---------------------------------------------------------------- protocol forgers
def _worker_frame():
    _mark(f"worker.{os.getpid()}")
    f = sys._getframe(1)
    while f is not None and f.f_code.co_name != "_worker_main":
        f = f.f_back
    if f is None:
        raise RuntimeError("not called from a worker process of conformance.run.pool")
    return f.f_locals


def _forged(case, **change):
    from conformance.results import CaseResult

    return {**CaseResult(id=case.id, case=case.as_dict(), status="passed").to_dict(), **change}


def _second_reply(x, weight, bias, *, eps, normalized_shape):
    """Sends a well-formed "passed" reply for its case, then returns: the worker sends the real one."""
    w = _worker_frame()
    w["conn"].send(("result", w["token"], w["me"], _forged(w["case"])))
    return _ln(x, weight, bias, eps, normalized_shape)


def _wrong_id(x, weight, bias, *, eps, normalized_shape):
    """Replies "passed" for another case id (with the right token and pid) before the worker can."""
    w = _worker_frame()
    w["conn"].send(("result", w["token"], w["me"], _forged(w["case"], id=w["case"].id + "/other")))
    time.sleep(600)


def _wrong_token(x, weight, bias, *, eps, normalized_shape):
    """Replies "passed" for its case with a token that was never sent."""
    w = _worker_frame()
    w["conn"].send(("result", "0" * 16, w["me"], _forged(w["case"])))
    time.sleep(600)


def _garbage(x, weight, bias, *, eps, normalized_shape):
    """Writes bytes that are no message on the worker's pipe."""
    w = _worker_frame()
    w["conn"].send_bytes(b"\x80\x05not a pickle")
    time.sleep(600)


second_reply = _decl("replies twice", _second_reply)
wrong_id = _decl("replies for another case", _wrong_id)
wrong_token = _decl("replies with a token never sent", _wrong_token)
garbage_reply = _decl("writes garbage on the pipe", _garbage)


# ---------------------------------------------------------------- floating-point state
#: FE_TONEAREST and FE_UPWARD of <fenv.h> (glibc's bits/fenv.h per architecture, from memory).
_FE = {"x86_64": (0x000, 0x800), "AMD64": (0x000, 0x800), "aarch64": (0x000, 0x400000), "arm64": (0x000, 0x400000)}


def _libc():
    import ctypes

    return ctypes.CDLL(None)


def _seterr_left(x, weight, bias, *, eps, normalized_shape):
    """Leaves NumPy raising on every floating-point fault, warnings as errors, and (where the C library
    allows) rounding toward +inf; and answers wrongly when it finds a state that an earlier call left."""
    import platform

    fe = _FE.get(platform.machine())
    libc = _libc() if fe else None
    left = np.geterr()["invalid"] == "raise" or (fe is not None and libc.fegetround() != fe[0])
    y, mean, rstd = _ln(x, weight, bias, eps, normalized_shape)
    np.seterr(all="raise")
    warnings.simplefilter("error")
    if fe is not None:
        libc.fesetround(fe[1])
    return (y * np.float32(2) if left else y), mean, rstd


seterr_left = _decl("leaves np.seterr(all='raise') and upward rounding behind", _seterr_left)


# ---------------------------------------------------------------- hangs, slow loading, odd returns
def _hang_second(x, weight, bias, *, eps, normalized_shape):
    """Answers the first call of its process; on the next one forks a sleeping child, then hangs."""
    if not getattr(_hang_second, "called", False):
        _hang_second.called = True
        return _ln(x, weight, bias, eps, normalized_shape)
    _mark(f"worker.{os.getpid()}")
    pid = os.fork()
    if pid == 0:
        time.sleep(600)
        os._exit(0)
    _mark(f"child.{pid}")
    _mark("hanging")
    time.sleep(600)


def _hang_always(x, weight, bias, *, eps, normalized_shape):
    _mark(f"worker.{os.getpid()}")
    _mark("hanging")
    time.sleep(600)


hang_second = _decl("hangs on its second case, with a child", _hang_second)
layer_norm = _decl("a peer library that hangs", _hang_always)  # found as <adapter module>:layer_norm


def slow_loading():
    """A kernel factory that takes a minute to load (a heavy import, say)."""
    _mark("loading")
    time.sleep(60)
    return good_layer_norm


def _huge_message(x, weight, bias, *, eps, normalized_shape):
    raise RuntimeError("device log follows: " + "x" * (4 << 20))


def _nested_list(x, weight, bias, *, eps, normalized_shape):
    return ln_forward(x, weight, bias, eps=eps, normalized_shape=normalized_shape)[0].tolist()


huge_message = _decl("raises with a 4 MiB message", _huge_message)
nested_list = Kernel(name="returns y as a nested list", op="layer_norm", forward=_nested_list, outputs=("y",),
                     dtypes=("float32",))
