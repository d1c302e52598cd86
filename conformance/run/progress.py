"""Progress while cases run: a bar on a terminal, plain lines in CI logs."""

from __future__ import annotations

import shutil
import sys
import time
from typing import TextIO

from ..results import CaseResult

#: Characters of a case's message shown in its progress line.
_LINE = 240

_MARK = {"passed": "PASS", "inconclusive": "INCONCL", "failed": "FAIL", "crashed": "CRASH", "timed_out": "TIMEOUT",
         "error": "ERROR", "skipped": "SKIP"}


class Progress:
    """Report each finished case. On a TTY: one redrawn bar line, failures printed above it.
    Elsewhere: one plain line per case that did not pass, and a count line every ~10%."""

    def __init__(self, total: int, stream: TextIO | None = None, quiet: bool = False):
        self.total = total
        self.stream = stream or sys.stderr
        self.quiet = quiet
        self.done = 0
        self.bad = 0
        self.t0 = time.monotonic()
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self._next_line = 0

    def update(self, r: CaseResult) -> None:
        self.done += 1
        if r.status not in ("passed", "skipped"):
            self.bad += 1
        if self.quiet:
            return
        if r.status not in ("passed", "skipped"):
            first = r.message.splitlines()[0] if r.message else ""
            if len(first) > _LINE:  # the whole message is in the results; a log line stays a line
                first = first[:_LINE] + f"... [{len(first) - _LINE:,} more characters]"
            self._line(f"{_MARK[r.status]:7s} {r.id}  {first}")
        if self.tty:
            self._bar(r.id)
        elif self.done >= self._next_line or self.done == self.total:
            self._next_line = self.done + max(1, self.total // 10)
            self.stream.write(f"[{self.done}/{self.total}] {self.bad} not passed, "
                              f"{time.monotonic() - self.t0:.1f} s\n")
            self.stream.flush()

    def _line(self, text: str) -> None:
        if self.tty:
            self.stream.write("\r\033[K")
        self.stream.write(text + "\n")
        self.stream.flush()

    def _bar(self, current: str) -> None:
        width = shutil.get_terminal_size((100, 20)).columns
        frac = self.done / max(1, self.total)
        bar_w = 24
        filled = int(frac * bar_w)
        head = f"[{'#' * filled}{'.' * (bar_w - filled)}] {self.done}/{self.total} ({self.bad} not passed) "
        tail = current[: max(0, width - len(head) - 1)]
        self.stream.write("\r\033[K" + head + tail)
        self.stream.flush()

    def close(self) -> None:
        if self.tty and not self.quiet:
            self.stream.write("\r\033[K")
            self.stream.flush()
