"""pytest plugin: the case catalog as test items, one per case, so a port's CI runs it as tests.

    pytest --refnorm-kernel SPEC [--refnorm-tier T] [--refnorm-dtype D ...] [--refnorm-seed N]
           [--refnorm-profile PATH] [--refnorm-case ID ...] [--refnorm-timeout S] [--refnorm-shard K/N]
           [--refnorm-baseline OLD.json] [--refnorm-growth F] [--refnorm-growth-floor B] [--refnorm-replay DIR]

Registered through the ``pytest11`` entry point (and loadable with
``-p conformance.pytest_plugin``); it does nothing unless --refnorm-kernel or
--refnorm-profile is given. Items are ``KERNEL::OP.DTYPE::CASE_ID`` in catalog order,
the same in every process, so pytest-xdist (``-n auto``) can spread them. Each item
runs its case in a worker process kept alive across items (one per kernel and pytest
process): a crash or a hang costs that item only. Waivers, tolerance overrides and
baselines follow the same rules as `refnorm gate` (conformance.gate; docs/ci.md):
a waived failure is an expected failure (xfail), an expired waiver fails its items.
"""

from __future__ import annotations

import json
from typing import Any

import pytest

_STATE = pytest.StashKey["_State"]()


def pytest_addoption(parser: pytest.Parser) -> None:
    # The numbers are checked against the limits that `refnorm check` and the profile use
    # (conformance.options): a bad value is pytest's usage error before collection.
    from conformance.options import number_type, shard_type

    g = parser.getgroup("refnorm", "conformance of normalization kernels (refnorm)")
    g.addoption("--refnorm-kernel", action="append", default=[], metavar="SPEC",
                help="check this kernel (module:attr or path/file.py:attr); repeatable")
    g.addoption("--refnorm-profile", metavar="PATH",
                help="a gate profile (refnorm.toml or pyproject.toml with [tool.refnorm]): kernels, tier, dtypes, "
                     "seed, tolerances, waivers; options given here win")
    g.addoption("--refnorm-tier", choices=("smoke", "standard", "exhaustive"),
                help="catalog tier (default: the profile's, else standard)")
    g.addoption("--refnorm-dtype", action="append", default=[], metavar="D",
                help="storage dtype to check (repeatable or comma-separated; default: all the kernel declares)")
    g.addoption("--refnorm-seed", type=number_type("seed"), metavar="N",
                help="seed of the case data (default: the profile's, else 0)")
    g.addoption("--refnorm-case", action="append", default=[], metavar="ID", help="only this case id (repeatable)")
    g.addoption("--refnorm-shard", type=shard_type, metavar="K/N",
                help="collect only shard K of N of each kernel's cases (1 <= K <= N <= 256; the cut of "
                     "`refnorm check --shard`): one CI job per shard")
    g.addoption("--refnorm-timeout", type=number_type("timeout"), metavar="S",
                help="per-case timeout in seconds (default: the profile's, else 120)")
    g.addoption("--refnorm-baseline", metavar="OLD.json",
                help="fail a passed output whose budget used grew more than --refnorm-growth times over this file")
    g.addoption("--refnorm-growth", type=number_type("growth"), metavar="F",
                help="allowed growth over the baseline (default 2)")
    g.addoption("--refnorm-growth-floor", type=number_type("growth_floor"), metavar="B",
                help="budgets below B count as B when measuring growth (default 0.01)")
    # --- stored reproducers of refnorm search (conformance.search; docs/search.md) ---
    g.addoption("--refnorm-replay", metavar="DIR",
                help="also run each stored reproducer (refnorm search --out) under DIR of the kernel's op and dtypes "
                     "as a test item")


class CaseFailure(Exception):
    """A case that did not pass the gate; its text is the whole report (no traceback)."""


class _State:
    """The plans of this pytest process, their baselines and their kept worker processes."""

    def __init__(self, config: pytest.Config):
        from conformance.gate.plan import plan_runs
        from conformance.gate.profile import load_profile
        from conformance.gate.waivers import today_utc

        opt = config.getoption
        prof_path = opt("refnorm_profile")
        self.profile = load_profile(prof_path) if prof_path is not None else None
        dts = [d for v in opt("refnorm_dtype") for d in v.split(",") if d]
        self.plans = plan_runs(self.profile, specs=opt("refnorm_kernel"), tier=opt("refnorm_tier"),
                               dtypes=dts or None, seed=opt("refnorm_seed"), timeout=opt("refnorm_timeout"),
                               case_ids=opt("refnorm_case"), baseline=opt("refnorm_baseline"),
                               growth=opt("refnorm_growth"), growth_floor=opt("refnorm_growth_floor"))
        self.shard = opt("refnorm_shard")
        self.replay = opt("refnorm_replay")  # stored reproducers (conformance.search)
        self.today = today_utc()
        self.baselines: dict[int, dict[str, Any]] = {}
        for i, p in enumerate(self.plans):
            if p.baseline is not None:
                from conformance.gate.baseline import baseline_index
                from conformance.results import load

                try:
                    self.baselines[i] = baseline_index(load(p.baseline))
                except (OSError, ValueError) as e:
                    raise pytest.UsageError(f"refnorm: baseline {p.baseline}: {e}") from None
        self.pools: dict[int, Any] = {}
        self.uses: list[Any] = []
        self.statuses: dict[str, int] = {}
        self.numerics: dict[str, list[dict[str, Any]]] = {}  # kernel name -> cases' per-output statistics
        self.numerics_text: list[str] = []

    def pool(self, i: int):
        if i not in self.pools:
            from conformance.gate.worker import KeptWorker

            p = self.plans[i]
            self.pools[i] = KeptWorker(p.kernel, seed=p.seed, timeout=p.timeout, spec=p.load_spec,
                                       overrides=dict(p.overrides))
        return self.pools[i]

    def close(self) -> None:
        for pool in self.pools.values():
            pool.close()
        self.pools = {}

    # hooks of this process (registered as a plugin object in pytest_configure)
    def pytest_runtest_logreport(self, report: pytest.TestReport) -> None:
        """Gather each case's waiver use; under xdist this runs in the controller, so it sees every case."""
        props = dict(getattr(report, "user_properties", ()) or ())
        if report.when != "call" or "refnorm_waivers" not in props:
            return
        self.uses.append(_unpack(str(props["refnorm_waivers"])))
        st = str(props.get("refnorm_status"))
        self.statuses[st] = self.statuses.get(st, 0) + 1
        if "refnorm_numerics" in props:
            kernel, case = json.loads(str(props["refnorm_numerics"]))
            self.numerics.setdefault(kernel, []).append(case)

    # --- run-level numerics (issue 11): a rounding-bias failure fails the session --------------------------
    @pytest.hookimpl(tryfirst=True)
    def pytest_sessionfinish(self, session: pytest.Session, exitstatus: int) -> None:
        """The run-level rounding-bias test and effective precision over each kernel's cases; a flagged
        output (directed rounding where round to nearest is declared) makes the session fail."""
        from conformance.effective_precision import describe as describe_precision
        from conformance.effective_precision import run_precision
        from conformance.rounding_bias import describe, flagged, run_bias

        if hasattr(session.config, "workerinput"):  # an xdist worker sees part of the cases: the controller decides
            return
        failed = False
        for kernel, cases in self.numerics.items():
            rows = run_bias(cases)
            bad = flagged(rows)
            failed = failed or bool(bad)
            self.numerics_text += [f"FAILED (run level) {kernel}: {describe(r)}" for r in bad]
            self.numerics_text += [f"{kernel}: effective precision: {describe_precision(r, case=False)}"
                                   for r in run_precision(cases)]
        if failed and session.exitstatus == 0:
            session.exitstatus = pytest.ExitCode.TESTS_FAILED
    # --- end of run-level numerics ----------------------------------------------------------------------

    def pytest_terminal_summary(self, terminalreporter, exitstatus, config: pytest.Config) -> None:
        from conformance.gate.waivers import waiver_summary
        from conformance.results import CAUTION

        tr = terminalreporter
        tr.section("refnorm")
        if self.statuses:
            tr.write_line("case statuses: " + ", ".join(f"{n} {s}" for s, n in sorted(self.statuses.items())))
        waivers = self.profile.waivers if self.profile else ()
        ws = waiver_summary(waivers, self.uses)
        if self.shard:  # a waiver stale or unmatched on this shard may be used on another
            k, n = self.shard
            tr.write_line(f"shard {k}/{n} of each kernel's cases only: the outcome of the whole catalog is that of "
                          f"all {n} shards together")
            ws = {**ws, "stale": [], "unmatched": []}
        for w in ws["expired"]:
            tr.write_line(f"expired waiver #{w['index']} (case {w['case']!r}, expired {w['expires']}) matches "
                          f"{w['cases']} case(s): its items fail; renew or remove it")
        for w in ws["stale"]:
            tr.write_line(f"warning: stale waiver #{w['index']} (case {w['case']!r}"
                          f"{' output ' + w['output'] if w.get('output') else ''}) matches cases but no failure: "
                          "remove it")
        if self.uses:
            for w in ws["unmatched"]:
                tr.write_line(f"warning: waiver #{w['index']} (case {w['case']!r}) matches no case run here")
        from conformance.text import visible

        for line in self.numerics_text:
            tr.write_line(visible(line))
        tr.write_line("note: " + CAUTION)


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line("markers", "refnorm: a case of the refnorm conformance catalog")
    if not config.getoption("refnorm_kernel") and config.getoption("refnorm_profile") is None:
        return
    from conformance.gate.plan import PlanError
    from conformance.gate.profile import ProfileError

    try:
        state = _State(config)
    except (ProfileError, PlanError) as e:
        raise pytest.UsageError(f"refnorm: {e}") from None
    config.stash[_STATE] = state
    config.pluginmanager.register(state, "refnorm-state")


def pytest_unconfigure(config: pytest.Config) -> None:
    state = config.stash.get(_STATE, None)
    if state is not None:
        state.close()


class KernelNode(pytest.Collector):
    """All cases of one kernel, grouped by op and dtype."""

    def __init__(self, *, index: int, **kw: Any):
        super().__init__(**kw)
        self.index = index

    def collect(self):
        from conformance.gate.plan import PlanError

        state = self.config.stash[_STATE]
        plan = state.plans[self.index]
        try:
            cases = plan.cases()
        except PlanError as e:  # an unknown --refnorm-case id: a collection error without a traceback
            raise self.CollectError(f"refnorm: {e}") from None
        if state.shard is not None:  # the same deterministic cut in every process and on every machine
            from conformance.run.shards import cut

            cases = list(cut(cases, *state.shard).cases)
        groups: dict[str, list] = {}
        for case in cases:
            groups.setdefault(f"{case.op}.{case.dtype}", []).append(case)
        nodes = [GroupNode.from_parent(self, name=g, index=self.index, cases=cs) for g, cs in groups.items()]
        if state.replay:  # stored reproducers of refnorm search, one item each (conformance.search.pytest_items)
            from conformance.search.pytest_items import ReplayNode

            nodes.append(ReplayNode.from_parent(self, name="replay", index=self.index, folder=state.replay))
        return nodes


class GroupNode(pytest.Collector):
    """The cases of one op and dtype (the JUnit classname)."""

    def __init__(self, *, index: int, cases: list, **kw: Any):
        super().__init__(**kw)
        self.index = index
        self.cases = cases

    def collect(self):
        return [CaseItem.from_parent(self, name=c.id, index=self.index, case=c) for c in self.cases]


class CaseItem(pytest.Item):
    """One case of the catalog, run in the kernel's kept worker process."""

    def __init__(self, *, index: int, case: Any, **kw: Any):
        super().__init__(**kw)
        self.index = index
        self.case = case
        self.add_marker("refnorm")

    def runtest(self) -> None:
        __tracebackhide__ = True
        from conformance.gate.baseline import regress_case
        from conformance.gate.waivers import gate_outcome, judge_case

        state = self.config.stash[_STATE]
        plan = state.plans[self.index]
        from conformance.results import accept_inconclusive

        res = self._result(state, plan)
        # an inconclusive pass fails the item (it is not evidence) unless the profile accepts its outputs
        res = accept_inconclusive([res], getattr(plan, "accept_inconclusive", ()))[0].to_dict()
        regress_case(res, state.baselines.get(self.index, {}).get(self.case.id), plan.growth, plan.growth_floor)
        use = judge_case(res, plan.kernel.name, plan.waivers, state.today)
        outcome, msg = gate_outcome(res)
        self.user_properties.append(("refnorm_status", res["status"]))
        self.user_properties.append(("refnorm_budget_used", ",".join(f"{o['name']}={o.get('budget_used')}"
                                                                     for o in res.get("outputs", []))))
        self.user_properties.append(("refnorm_waivers", _pack(use)))
        self.user_properties.append(("refnorm_numerics", json.dumps([plan.kernel.name, {  # run-level numerics
            "id": res["id"], "status": res["status"], "case": {"op": self.case.op, "dtype": self.case.dtype},
            "outputs": [{k: o.get(k) for k in ("name", "dtype", "rounding", "effective")}
                        for o in res.get("outputs", [])]}])))
        if outcome == "passed":
            return
        if outcome == "skipped":
            pytest.skip(msg)
        if outcome == "waived":
            pytest.xfail(msg)
        raise CaseFailure(self._report(plan, res["status"] if res["status"] != "passed" else "expired waiver", msg))

    def _result(self, state: Any, plan: Any) -> Any:
        """The case's CaseResult: skipped where the kernel excludes it (as the runner does), else run in the
        kernel's kept worker."""
        from conformance.results import CaseResult
        from conformance.run import skip_reason

        why = skip_reason(plan.kernel, self.case)
        return (CaseResult(id=self.case.id, case=self.case.as_dict(), status="skipped", message=why) if why
                else state.pool(self.index).run_one(self.case))

    def _report(self, plan: Any, status: str, msg: str) -> str:
        import shlex

        repro = ["refnorm", "check", plan.spec, "--case", self.case.id, "--seed", str(plan.seed)]
        for name, (a, r) in plan.overrides.items():
            repro += ["--tolerance", f"{name}={a:g},{r:g}"]
        return (f"{status}: {self.case.id}\n{msg}\n"
                f"kernel {plan.kernel.name!r} ({plan.spec}); reproduce: {shlex.join(repro)}")

    def repr_failure(self, excinfo, style=None):
        if isinstance(excinfo.value, CaseFailure):
            return str(excinfo.value)
        return super().repr_failure(excinfo, style=style)

    def reportinfo(self):
        return self.path, None, f"refnorm case {self.name}"


def _pack(use: Any) -> str:
    return ";".join(f"{k}={','.join(map(str, getattr(use, k)))}" for k in ("matched", "hit", "expired"))


def _unpack(text: str):
    from conformance.gate.waivers import WaiverUse

    parts = dict(p.split("=", 1) for p in text.split(";") if "=" in p)
    return WaiverUse(**{k: tuple(int(v) for v in parts.get(k, "").split(",") if v)
                        for k in ("matched", "hit", "expired")})


@pytest.hookimpl(tryfirst=True)
def pytest_collection_modifyitems(session: pytest.Session, config: pytest.Config, items: list) -> None:
    state = config.stash.get(_STATE, None)
    if state is None:
        return
    names: set[str] = set()
    for i, plan in enumerate(state.plans):
        name = plan.kernel.name if plan.kernel.name not in names else plan.spec
        names.add(name)
        node = KernelNode.from_parent(session, name=name, nodeid=name, index=i)
        items.extend(session.genitems(node))
