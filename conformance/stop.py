"""How a command stops: SIGINT, SIGTERM and SIGHUP all end a run as Ctrl-C does.

A CI runner cancels or times out a job with SIGTERM (SIGHUP when its terminal goes). The
command must then do what it does on Ctrl-C: stop the workers with their process groups,
write the partial results marked incomplete, and exit 3. ``handle_stops()`` installs, in
the main thread and for the duration of a command only, handlers that raise ``Stopped``
(a KeyboardInterrupt, so every ``except KeyboardInterrupt`` path of the library applies),
and puts the previous handlers back at its end. Importing the library changes no signal
disposition.

Only the first signal raises. Later ones are reported on stderr and otherwise ignored, so
that a second Ctrl-C cannot break the writing of the partial results (SIGKILL still ends
the process). Inside ``holding()`` the first signal is held instead of raised, so that a
results file or a gate's summary is written whole; ``interruptible()`` opens a block
within it where signals raise again (the runner's worker pool), and raises at once if a
signal was held. ``requested()`` names the signal that asked the command to stop, if any.
Without handle_stops() (library use) none of this applies: Python's own Ctrl-C handling does.
"""

from __future__ import annotations

import contextlib
import os
import signal
import threading
from collections.abc import Iterator

__all__ = ["Stopped", "handle_stops", "holding", "interruptible", "requested"]

_NAMES = tuple(n for n in ("SIGINT", "SIGTERM", "SIGHUP") if hasattr(signal, n))


class Stopped(KeyboardInterrupt):
    """A signal asked the command to stop; ``signal`` is its name."""

    def __init__(self, name: str):
        super().__init__(name)
        self.signal = name


class _State:
    def __init__(self) -> None:
        self.depth = 0  # nesting of handle_stops()
        self.first: str | None = None  # the first signal received
        self.raised = False  # Stopped has been raised once
        self.modes: list[str] = []  # "hold" / "raise", innermost last


_S = _State()


def _raise_now() -> bool:
    return not _S.modes or _S.modes[-1] == "raise"


def _on_signal(signum: int, frame) -> None:
    name = signal.Signals(signum).name
    first = _S.first is None
    if first:
        _S.first = name
    if not _S.raised and _raise_now():
        _S.raised = True
        raise Stopped(name)
    if not first:  # os.write, not print: the main thread may be inside a write to stderr
        with contextlib.suppress(OSError):
            os.write(2, f"refnorm: {name} received; already stopping (writing what was done)\n".encode())


@contextlib.contextmanager
def handle_stops() -> Iterator[None]:
    """SIGINT, SIGTERM and SIGHUP raise Stopped inside the block (main thread only; else a no-op)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = {n: signal.getsignal(getattr(signal, n)) for n in _NAMES}
    if _S.depth == 0:
        _S.first, _S.raised, _S.modes = None, False, []
    _S.depth += 1
    try:
        for n in _NAMES:
            signal.signal(getattr(signal, n), _on_signal)
        yield
    finally:
        for n, h in old.items():
            signal.signal(getattr(signal, n), h if h is not None else signal.SIG_DFL)
        _S.depth -= 1
        if _S.depth == 0:
            _S.first, _S.raised, _S.modes = None, False, []


@contextlib.contextmanager
def holding() -> Iterator[None]:
    """Inside: a signal is held (requested() says so) instead of raised."""
    _S.modes.append("hold")
    try:
        yield
    finally:
        _S.modes.pop()


@contextlib.contextmanager
def interruptible() -> Iterator[None]:
    """Inside: signals raise Stopped, and one held before raises on entry."""
    _S.modes.append("raise")
    try:
        if _S.depth and _S.first is not None and not _S.raised:
            _S.raised = True
            raise Stopped(_S.first)
        yield
    finally:
        _S.modes.pop()


def requested() -> str | None:
    """The name of the signal that asked this command to stop, or None."""
    return _S.first if _S.depth else None
