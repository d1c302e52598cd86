"""From a profile and command-line choices to one run plan per kernel.

Precedence, highest first: the command line, the profile's kernel entry, the
profile's top level, the harness's defaults (tier standard, seed 0, one worker,
120 s per case, every dtype the kernel declares). Shared by `refnorm check --profile`,
`refnorm gate` and the pytest plugin, so that all three select the same cases.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Mapping, Sequence

from ..kernel import Kernel, KernelError, load_kernel
from ..options import DEFAULTS, OptionError, check_number
from .profile import DEFAULT_GROWTH, DEFAULT_GROWTH_FLOOR, Profile, Waiver, loadable_spec

__all__ = ["Plan", "PlanError", "plan_runs", "loadable_spec", "DEFAULTS"]


class PlanError(ValueError):
    """A choice that cannot be run; the message says what to change."""


@dataclass
class Plan:
    """Everything needed to run and gate one kernel."""

    spec: str
    kernel: Kernel
    dtypes: tuple[str, ...]
    tier: str
    seed: int
    workers: int
    timeout: float
    overrides: dict[str, tuple[float, float]] = field(default_factory=dict)
    case_ids: tuple[str, ...] = ()
    baseline: Path | None = None
    growth: float = DEFAULT_GROWTH
    growth_floor: float = DEFAULT_GROWTH_FLOOR
    waivers: tuple[Waiver, ...] = ()
    accept_inconclusive: tuple[str, ...] = ()

    @property
    def load_spec(self) -> str:
        """The spec with a file path made absolute, for worker processes that may start elsewhere."""
        return loadable_spec(self.spec)

    def run_options(self, command: str = ""):
        from ..run import RunOptions

        return RunOptions(tier=self.tier, dtypes=self.dtypes, case_ids=self.case_ids, seed=self.seed,
                          workers=self.workers, timeout=self.timeout, overrides=dict(self.overrides),
                          command=command, accept_inconclusive=self.accept_inconclusive)

    def cases(self):
        """The cases this plan runs, in catalog order (conformance.run.select_cases)."""
        from ..run import select_cases

        try:
            return select_cases(self.kernel, self.run_options())
        except KeyError as e:
            raise PlanError(str(e.args[0]) if e.args else str(e)) from None


def _load(spec: str) -> Kernel:
    try:
        return load_kernel(spec)
    except KernelError as e:
        raise PlanError(str(e)) from None
    except (OSError, ValueError) as e:  # a path the file system refuses (too long, a NUL character)
        raise PlanError(f"kernel spec {spec!r}: {e}") from None


def _checked(kind: str, value, label: str):
    """A number from a caller (the command line, the plugin, a profile) within options.LIMITS."""
    if value is None:
        return None
    try:
        return check_number(kind, value)
    except OptionError as e:
        raise PlanError(f"{label}: {e}") from None


def plan_runs(profile: Profile | None, *, specs: Sequence[str] = (), tier: str | None = None,
              dtypes: Sequence[str] | None = None, seed: int | None = None, workers: int | None = None,
              timeout: float | None = None, overrides: Mapping[str, tuple[float, float]] | None = None,
              case_ids: Sequence[str] = (), baseline: str | Path | None = None, growth: float | None = None,
              growth_floor: float | None = None) -> list[Plan]:
    """One Plan per kernel: ``specs`` when given, else the profile's kernels."""
    prof = profile or Profile()
    if prof.path is not None:  # module specs in a profile are imported from the profile's folder
        folder = str(prof.path.parent.resolve())
        if folder not in sys.path:
            sys.path.insert(0, folder)
    chosen = list(specs) or [k.spec for k in prof.kernels]
    if not chosen:
        where = f" in {prof.path}" if prof.path else ""
        raise PlanError(f"no kernel to check: give a kernel spec, or list kernels{where} (key 'kernels')")
    seed, workers, timeout = (_checked("seed", seed, "seed"), _checked("workers", workers, "workers"),
                              _checked("timeout", timeout, "timeout"))
    growth = _checked("growth", growth, "growth")
    growth_floor = _checked("growth_floor", growth_floor, "growth floor")
    dtypes = tuple(dict.fromkeys(dtypes)) if dtypes else None
    case_ids = tuple(dict.fromkeys(case_ids))  # a case named twice runs once
    plans = []
    for spec in chosen:
        kernel = _load(spec)
        entry = prof.entry_for(spec)
        if prof.ops and kernel.op not in prof.ops:
            raise PlanError(f"kernel {kernel.name!r} from {spec} declares op {kernel.op}, which the profile "
                            f"{prof.path} does not list in 'ops' ({', '.join(prof.ops)})")
        dts = tuple(dtypes) if dtypes else ((entry.dtypes if entry and entry.dtypes else None) or prof.dtypes)
        if dts:
            undeclared = [d for d in dts if d not in kernel.dtypes]
            if undeclared:
                src = "the command line" if dtypes else f"the profile {prof.path}"
                raise PlanError(f"dtypes {', '.join(undeclared)} (from {src}): kernel {kernel.name!r} declares only "
                                f"{', '.join(kernel.dtypes)}")
        else:
            dts = tuple(kernel.dtypes)
        for cid in case_ids:
            if not cid.startswith(kernel.op + "/"):
                raise PlanError(f"case {cid!r} is not a {kernel.op} case (ids start with the op)")
        ov = prof.overrides_for(kernel.op)
        ov.update(overrides or {})
        w = prof.workers if workers is None else workers
        t = prof.timeout if timeout is None else timeout
        w = DEFAULTS["workers"] if w is None else w
        t = DEFAULTS["timeout"] if t is None else t
        bl = Path(baseline) if baseline is not None else (entry.baseline if entry else None)
        plans.append(Plan(
            spec=spec, kernel=kernel, dtypes=dts,
            tier=tier or prof.tier or DEFAULTS["tier"],
            seed=seed if seed is not None else (prof.seed if prof.seed is not None else DEFAULTS["seed"]),
            workers=w, timeout=float(t), overrides=ov, case_ids=tuple(case_ids), baseline=bl,
            accept_inconclusive=tuple(prof.accept_inconclusive),
            growth=growth if growth is not None else (prof.growth or DEFAULT_GROWTH),
            growth_floor=growth_floor if growth_floor is not None else (
                prof.growth_floor if prof.growth_floor is not None else DEFAULT_GROWTH_FLOOR),
            waivers=prof.waivers,
        ))
    return plans
