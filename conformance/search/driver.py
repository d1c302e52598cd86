"""The worst-case search: hypothesis drives drawn cases towards the largest budget used, and shrinks a failure.

Each example is one drawn case (conformance.search.space) run as `refnorm check` runs a case:
inputs from the case and the seed, the kernel in an isolated worker process (conformance.gate.worker,
a crash or a hang costs that evaluation), the oracle, the derived bounds and the comparison
(conformance.run.execute). For every output the example reports ``target(budget used, label=output)``,
so hypothesis's targeted phase (hypothesis.target: hill climbing on each label's observations)
climbs towards the cases that use most of their bound. A case whose status is failed, crashed,
timed out or error (results.BAD) is a failure; hypothesis then shrinks it (simpler shapes,
recipes and fields that still fail) and the last failing example it runs is the minimal one.

Evaluations are counted: at most ``evaluations`` kernel runs while searching, and at most
``shrink_evaluations`` more while shrinking (past that, a case not yet run counts as passing, so
shrinking stops where it stands). A case that has run is never run again: its result is kept by id,
so the replay of the minimal example at the end is the result the search saw.
"""

from __future__ import annotations

import math
import sys
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence, TextIO

from hypothesis import HealthCheck, Phase, Verbosity, assume, given, seed as hseed, settings, target

from ..cases.model import Case
from ..kernel import Kernel
from ..results import BAD, CaseResult, as_float
from .space import LIMITS, Limits, cases

__all__ = ["Worst", "Finding", "SearchOutcome", "run_search", "failing_outputs"]


@dataclass
class Worst:
    """The largest budget used seen on one output, and the case (and evaluation number) that reached it."""

    output: str
    budget_used: float
    case: Case
    passed: bool     # the output's own verdict in that case
    evaluation: int


@dataclass
class Finding:
    """A failing case: its result (as the search saw it), its failing outputs, when it was run."""

    case: Case
    result: CaseResult
    outputs: tuple[str, ...]
    evaluation: int


@dataclass
class SearchOutcome:
    """What a search ran and found. ``first`` is the first failure, ``minimal`` the shrunk one."""

    evaluations: int = 0
    search_evaluations: int = 0
    shrink_evaluations: int = 0
    skipped: int = 0
    worst: dict[str, Worst] = field(default_factory=dict)
    first: Finding | None = None
    minimal: Finding | None = None
    duration_s: float = 0.0
    interrupted: str | None = None  # the signal that stopped the search early (KeyboardInterrupt's)


def failing_outputs(res: CaseResult) -> tuple[str, ...]:
    """The outputs a result fails on ("*" for a case that failed as a whole: a crash, a modified input)."""
    names = tuple(o["name"] for o in res.outputs if not o.get("passed", True))
    if res.status in BAD and (not names or res.modified_inputs):
        names += ("*",)
    return names


def _harness_error(res: CaseResult) -> bool:
    """A case that the harness could not run (execute's "harness error"): the case's fault, not the kernel's."""
    return res.status == "error" and res.message.startswith("harness error")


class _Failure(Exception):
    """Raised inside the hypothesis test for a failing case; hypothesis shrinks it."""


def run_search(kernel: Kernel, dtype: str, evaluate: Callable[[Case], CaseResult], *, evaluations: int, seed: int,
               shrink_evaluations: int | None = None, focus: Sequence[str] = (), limits: Limits = LIMITS,
               stream: TextIO | None = None, quiet: bool = True) -> SearchOutcome:
    """Search drawn cases of ``kernel`` in ``dtype`` with ``evaluate`` (a case to its CaseResult).

    ``focus``: outputs whose failure counts (empty: any output, a crash, a modified input); a crash,
    a timeout and an error always count. The same kernel, dtype, seed and evaluations give the same
    cases in the same order (hypothesis.seed, no example database) when the kernel is deterministic.
    """
    out = SearchOutcome()
    shrink_limit = evaluations if shrink_evaluations is None else shrink_evaluations
    seen: dict[str, CaseResult] = {}
    order: dict[str, int] = {}  # case id -> its evaluation number (from 1)
    t0 = time.monotonic()
    log = stream or sys.stderr
    step = max(1, evaluations // 10)
    tty = not quiet and hasattr(log, "isatty") and log.isatty()

    def fails(res: CaseResult) -> tuple[str, ...]:
        names = failing_outputs(res)
        if _harness_error(res):
            return ()
        if res.status in ("crashed", "timed_out", "error"):
            return names or ("*",)
        if res.status != "failed":
            return ()
        return tuple(n for n in names if not focus or n in focus)

    def run(case: Case) -> CaseResult | None:
        if case.id in seen:
            return seen[case.id]
        if out.first is None and out.search_evaluations >= evaluations:
            return None
        if out.first is not None and out.shrink_evaluations >= shrink_limit:
            return None  # the shrink budget is spent: what is not yet run counts as passing
        res = evaluate(case)
        seen[case.id] = res
        out.evaluations += 1
        order[case.id] = out.evaluations
        if out.first is None:
            out.search_evaluations += 1
        else:
            out.shrink_evaluations += 1
        if res.status == "skipped":
            out.skipped += 1
        for o in res.outputs:
            b = as_float(o.get("budget_used"))
            if math.isnan(b):
                continue
            w = out.worst.get(o["name"])
            if w is None or b > w.budget_used:
                out.worst[o["name"]] = Worst(o["name"], b, case, bool(o.get("passed")), out.evaluations)
        if not quiet and (tty or out.evaluations % step == 0):  # a redrawn line on a terminal, plain lines in logs
            worst = max((w.budget_used for w in out.worst.values()), default=0.0)
            text = (f"[{out.evaluations} evaluations] worst budget used {worst:.3g}"
                    f"{', failure found, shrinking' if out.first else ''}, {time.monotonic() - t0:.1f} s")
            log.write("\r\033[K" + text if tty else text + "\n")
            log.flush()
        return res

    # hypothesis counts an example drawn twice (kept by id, not run again) as two: ask for more examples than
    # evaluations; run() stops running the kernel once ``evaluations`` distinct cases have run
    @settings(max_examples=2 * evaluations, database=None, deadline=None, verbosity=Verbosity.quiet,
              suppress_health_check=list(HealthCheck), report_multiple_bugs=False,
              phases=(Phase.generate, Phase.target, Phase.shrink))
    @hseed(seed)
    @given(cases(kernel, dtype, limits))
    def probe(case: Case) -> None:
        res = run(case)
        if res is None:
            return
        # beyond the declared range, or a case the oracle itself refuses: not an example of the kernel
        assume(res.status != "skipped" and not _harness_error(res))
        for o in res.outputs:
            b = as_float(o.get("budget_used"))
            if not math.isnan(b):
                target(min(b, 1e300), label=o["name"])
        names = fails(res)
        if names:
            found = Finding(case, res, names, order[case.id])
            if out.first is None:
                out.first = found
            out.minimal = found
            raise _Failure(case.id)

    try:
        probe()
    except _Failure:
        pass
    except KeyboardInterrupt as e:  # what was found so far is kept: the caller writes it, marked incomplete
        out.interrupted = getattr(e, "signal", "SIGINT")
    if tty:
        log.write("\r\033[K")
        log.flush()
    out.duration_s = time.monotonic() - t0
    return out
