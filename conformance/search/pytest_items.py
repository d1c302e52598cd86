"""Stored reproducers as pytest items: ``pytest --refnorm-kernel SPEC --refnorm-replay DIR`` adds, beside the
kernel's catalog items, one item per reproducer under DIR
of the kernel's op and dtypes, named ``KERNEL::replay::CASE_ID``. Each reruns its stored case with the
reproducer's seed and tolerance overrides in a worker process (conformance.search.replay) and is
judged as a catalog item is (waivers, inconclusive passes); a reproducer that cannot be trusted is a
collection error naming its file, and one whose inputs this refnorm no longer makes bit for bit fails
its item with that reason.
"""

from __future__ import annotations

from typing import Any

import pytest

from ..pytest_plugin import _STATE, CaseFailure, CaseItem
from .reproducer import Reproducer, ReproducerError, check_inputs, find_reproducers, read_reproducer

__all__ = ["ReplayNode", "ReplayItem"]


class ReplayNode(pytest.Collector):
    """The reproducers under one folder that the kernel's declaration covers (its op and dtypes)."""

    def __init__(self, *, index: int, folder: str, **kw: Any):
        super().__init__(**kw)
        self.index = index
        self.folder = folder

    def collect(self):
        kernel = self.config.stash[_STATE].plans[self.index].kernel
        try:
            reps = [read_reproducer(p) for p in find_reproducers(self.folder)]
        except ReproducerError as e:
            raise self.CollectError(f"refnorm: --refnorm-replay: {e}") from None
        mine = [r for r in reps if r.case.op == kernel.op and r.case.dtype in kernel.dtypes]
        return [ReplayItem.from_parent(self, name=r.case.id, index=self.index, case=r.case, reproducer=r)
                for r in mine]


class ReplayItem(CaseItem):
    """One stored reproducer, rerun."""

    def __init__(self, *, reproducer: Reproducer, **kw: Any):
        super().__init__(**kw)
        self.reproducer = reproducer

    def _result(self, state: Any, plan: Any) -> Any:
        from .replay import replay

        try:
            check_inputs(self.reproducer, plan.kernel)
        except ReproducerError as e:
            raise CaseFailure(f"reproducer cannot be replayed: {e}") from None
        return replay(plan.kernel, self.reproducer, spec=plan.load_spec, timeout=plan.timeout)

    def _report(self, plan: Any, status: str, msg: str) -> str:
        import shlex

        repro = ["refnorm", "check", plan.spec, "--replay", str(self.reproducer.folder)]
        return (f"{status}: {self.case.id}\n{msg}\n"
                f"kernel {plan.kernel.name!r} ({plan.spec}); reproduce: {shlex.join(repro)}")

    def reportinfo(self):
        return self.path, None, f"refnorm reproducer {self.reproducer.folder}"
