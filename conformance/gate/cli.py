"""Command-line hooks of the CI gate (see conformance.cli.EXTENSIONS and docs/ci.md).

`refnorm check` gains --profile, --baseline, --growth, --growth-floor and --junit.
New commands: `refnorm gate` (every kernel of a profile, one exit status) and
`refnorm diff OLD.json NEW.json`.

With --profile or --baseline, `refnorm check` exits by the gate's verdict
(doc["gate"]["verdict"]): 0 pass, 1 fail; 2 and 3 keep their meaning.
"""

from __future__ import annotations

import argparse
import re
import shlex
import sys
from pathlib import Path
from typing import Any, Sequence

from ..destinations import DestinationError, file_target, fit_name, folder_target, input_folder
from ..options import number_type, shard_type
from .profile import DEFAULT_GROWTH, DEFAULT_GROWTH_FLOOR, ProfileError, find_profile, load_profile

__all__ = ["add_check_arguments", "add_commands", "prepare", "amend", "emit", "verdict_lines", "exit_code",
           "DocumentGate"]

#: Options of `refnorm check` whose value a profile may supply when the command line does not
#: (check leaves them None when they are not given; conformance.options.DEFAULTS applies after).
_PROFILE_OPTIONS = ("tier", "seed", "workers", "timeout")


def _gate_arguments(p: argparse.ArgumentParser, *, per_kernel_baseline: bool = True) -> None:
    if per_kernel_baseline:
        p.add_argument("--baseline", metavar="OLD.json",
                       help="fail a passed output whose budget used grew more than --growth times over this "
                            "earlier results file (same case id and output)")
    p.add_argument("--growth", type=number_type("growth"), metavar="F",
                   help="allowed growth factor over the baseline, > 1 and at most 1e6 (default: the profile's, "
                        f"else {DEFAULT_GROWTH:g})")
    p.add_argument("--growth-floor", type=number_type("growth_floor"), metavar="B",
                   help="budgets below B count as B when measuring growth, 0 <= B < 1 (default: the profile's, "
                        f"else {DEFAULT_GROWTH_FLOOR:g})")
    p.add_argument("--junit", metavar="PATH", help="write JUnit XML here")


def add_check_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--profile", metavar="PATH",
                        help="apply a gate profile (refnorm.toml, or pyproject.toml with [tool.refnorm]): its "
                             "tier, dtypes, seed, workers, timeout, tolerances and waivers; options given here win")
    _gate_arguments(parser)


def _usage(msg: str) -> Exception:
    from ..cli import UsageError

    return UsageError(msg)


def _load_profile(path: str | None):
    if path is None:
        return None
    try:
        return load_profile(path)
    except ProfileError as e:
        raise _usage(str(e)) from None


def _destination(check, path: str, option: str) -> Path:
    try:
        return check(path, option)
    except DestinationError as e:
        raise _usage(str(e)) from None


def prepare(args: argparse.Namespace) -> None:
    """Before `refnorm check` loads the kernel: the --junit destination, the profile (whose plan
    fills the options the command line left None, and loads the kernel) and the baseline."""
    from .plan import PlanError, plan_runs

    if args.junit is not None:
        args.junit = _destination(file_target, args.junit, "--junit")
    prof = _load_profile(args.profile)
    if prof is not None:
        from ..cli import check_spec

        spec = check_spec(args.spec, args.op)
        given = {k: getattr(args, k) for k in _PROFILE_OPTIONS if getattr(args, k) is not None}
        try:
            plan = plan_runs(prof, specs=[spec], dtypes=args.dtype, overrides=dict(args.tolerance),
                             case_ids=args.case, growth=args.growth, growth_floor=args.growth_floor, **given)[0]
        except PlanError as e:
            raise _usage(str(e)) from None
        args.tier, args.seed, args.workers, args.timeout = plan.tier, plan.seed, plan.workers, plan.timeout
        entry = prof.entry_for(spec)
        if args.dtype or (entry and entry.dtypes) or prof.dtypes:
            args.dtype = list(plan.dtypes)
        args.tolerance = list(plan.overrides.items())
        if not getattr(args, "accept_inconclusive", None):
            args.accept_inconclusive = list(plan.accept_inconclusive)
        args.loaded_kernel = (plan.kernel, spec)
        args._refnorm_plan = plan
        if args.baseline is None and plan.baseline is not None:
            args.baseline = str(plan.baseline)
    if args.baseline is not None:  # read it before the run: a bad path must not cost a run
        args._refnorm_baseline_doc = _load_doc(args.baseline, "baseline")


def _load_doc(path: str, what: str) -> dict[str, Any]:
    from ..results import load

    try:
        return load(path)
    except ValueError as e:  # conformance.documents.DocumentError: names the file and the field
        raise _usage(f"{what}: {e}") from None


def amend(args: argparse.Namespace, doc: dict[str, Any]) -> dict[str, Any]:
    """Apply the baseline and the profile's waivers; record the decision as doc["gate"]."""
    if getattr(args, "command", None) != "check":
        return doc
    plan = getattr(args, "_refnorm_plan", None)
    baseline_path = args.baseline
    if plan is None and not baseline_path:
        return doc
    from .decide import apply_gate

    growth = args.growth or (plan.growth if plan else None)
    floor = args.growth_floor if args.growth_floor is not None else (plan.growth_floor if plan else None)
    baseline = getattr(args, "_refnorm_baseline_doc", None)
    doc, _ = apply_gate(doc, waivers=plan.waivers if plan else (), baseline=baseline,
                        baseline_path=baseline_path, growth=growth, growth_floor=floor,
                        profile=args.profile)
    return doc


def emit(args: argparse.Namespace, doc: dict[str, Any]) -> list[str]:
    """Write JUnit XML (--junit); return the line naming it."""
    if getattr(args, "command", None) != "check" or not getattr(args, "junit", None):
        return []
    from .junit import write_junit

    return [f"junit: {write_junit(args.junit, [doc])}"]


def verdict_lines(args: argparse.Namespace, doc: dict[str, Any]) -> list[str]:
    """The gate's decision, waivers and baseline, after check's verdict."""
    from .decide import gate_lines

    lines = gate_lines(doc)
    return [""] + lines if lines else []


def exit_code(args: argparse.Namespace, doc: dict[str, Any], code: int) -> int:
    """With --profile or --baseline, check exits by the gate's verdict (0 pass, 1 fail)."""
    from .. import cli

    gate = doc.get("gate")
    if gate is None or code not in (cli.EXIT_OK, cli.EXIT_FAIL, cli.EXIT_INCONCLUSIVE):
        return code
    return {"pass": cli.EXIT_OK, "inconclusive": cli.EXIT_INCONCLUSIVE}.get(gate["verdict"], cli.EXIT_FAIL)


# ---------------------------------------------------------------- a gate on a document made elsewhere
class DocumentGate:
    """The gate's hooks for a command that makes its results document without running a kernel here
    (`refnorm score`, `refnorm merge`): the baseline, a profile's waivers and growth settings, JUnit XML,
    then the gate's own verdict lines and exit status, as `refnorm check --profile/--baseline` has them.

    ``command`` and ``fixed_at`` say in a note where the bounds came from, since a profile's tolerances
    cannot change a document's bounds after the fact.
    """

    def __init__(self, command: str, fixed_at: str) -> None:
        self.command, self.fixed_at = command, fixed_at
        self.waivers: tuple = ()
        self.growth: float | None = None
        self.floor: float | None = None
        self.baseline: dict[str, Any] | None = None

    @staticmethod
    def add_arguments(parser: argparse.ArgumentParser) -> None:
        """--profile (its waivers and growth settings), --baseline, --growth, --growth-floor, --junit."""
        parser.add_argument("--profile", metavar="PATH", help="apply a gate profile's waivers and growth settings "
                            "(its tier, seed, dtypes and tolerances were fixed by the runs)")
        _gate_arguments(parser)

    def prepare(self, args: argparse.Namespace) -> None:
        if args.junit is not None:
            args.junit = file_target(args.junit, "--junit")
        if args.profile is not None:
            prof = _load_profile(args.profile)
            self.waivers, self.growth, self.floor = prof.waivers, prof.growth, prof.growth_floor
            if prof.tolerances:
                print(f"refnorm: note: the tolerances of {args.profile} do not apply to {self.command}: the bounds "
                      f"were fixed {self.fixed_at}", file=sys.stderr)
        if args.growth is not None:
            self.growth = args.growth
        if args.growth_floor is not None:
            self.floor = args.growth_floor
        if args.baseline is not None:
            self.baseline = _load_doc(args.baseline, f"baseline {args.baseline}")

    def amend(self, args: argparse.Namespace, doc: dict[str, Any]) -> dict[str, Any]:
        if args.profile is None and self.baseline is None:
            return doc
        from .decide import apply_gate

        doc, _ = apply_gate(doc, waivers=self.waivers, baseline=self.baseline, baseline_path=args.baseline,
                            growth=self.growth, growth_floor=self.floor, profile=args.profile)
        return doc

    def emit(self, args: argparse.Namespace, doc: dict[str, Any]) -> list[str]:
        if not args.junit:
            return []
        from .junit import write_junit

        return [f"junit: {write_junit(args.junit, [doc])}"]

    def verdict_lines(self, args: argparse.Namespace, doc: dict[str, Any]) -> list[str]:
        return verdict_lines(args, doc)

    def exit_code(self, args: argparse.Namespace, doc: dict[str, Any], code: int) -> int:
        return exit_code(args, doc, code)


# ---------------------------------------------------------------- refnorm gate
def add_commands(subparsers) -> None:
    from .. import dtypes as _dtypes
    from ..cases import TIERS

    g = subparsers.add_parser("gate", help="check every kernel of a profile and give one pass/fail exit status",
                              description="Run every kernel of the profile, apply its waivers and baselines, and "
                                          "exit 0 only if every kernel passes the gate.")
    g.add_argument("--profile", metavar="PATH",
                   help="the profile (default: ./refnorm.toml, else ./pyproject.toml with [tool.refnorm])")
    g.add_argument("--kernel", action="append", default=[], metavar="SPEC",
                   help="check this kernel instead of the profile's list (repeatable)")
    g.add_argument("--tier", choices=TIERS, help="catalog tier (default: the profile's, else standard)")
    g.add_argument("--dtype", nargs="+", choices=_dtypes.FORMATS, help="storage dtypes (default: the profile's)")
    g.add_argument("--seed", type=number_type("seed"),
                   help="seed of the case data, 0 <= N < 2**63 (default: the profile's, else 0)")
    g.add_argument("--workers", type=number_type("workers"),
                   help="worker processes, 1 to 256 (default: the profile's, else 1)")
    g.add_argument("--timeout", type=number_type("timeout"),
                   help="per-case timeout in seconds, > 0 and at most 86400 (default: the profile's, else 120)")
    g.add_argument("--shard", type=shard_type, metavar="K/N",
                   help="run only shard K of N of each kernel's cases (1 <= K <= N <= 256); each kernel's N results "
                        "files go together with refnorm merge, whose gate is the whole run's")
    g.add_argument("--shard-durations", metavar="DIR",
                   help="with --shard: balance each kernel's shards by the measured case durations of DIR/NAME.json "
                        "(results files named as --json-dir writes them: a baseline folder, say); a kernel without "
                        "one is cut by the cost model")
    g.add_argument("--json-dir", metavar="DIR", help="write each kernel's results document here as NAME.json")
    g.add_argument("--baseline-dir", metavar="DIR",
                   help="earlier results documents named as --json-dir writes them (NAME.json): the baseline of "
                        "each kernel (a kernel's 'baseline' in the profile wins)")
    _gate_arguments(g, per_kernel_baseline=False)
    g.add_argument("--quiet", action="store_true", help="no progress output")
    g.set_defaults(func=cmd_gate)

    d = subparsers.add_parser("diff", help="what changed between two results files; exit 1 if anything got worse",
                              description="Compare NEW.json with OLD.json case by case: status changes, outputs "
                                          "whose budget used grew or shrank by more than --growth, cases added "
                                          "and removed. Exit 1 if anything got worse.")
    d.add_argument("old", metavar="OLD.json")
    d.add_argument("new", metavar="NEW.json")
    d.add_argument("--growth", type=number_type("growth"), default=DEFAULT_GROWTH, metavar="F",
                   help=f"factor that counts as grown or shrunk (default {DEFAULT_GROWTH:g})")
    d.add_argument("--growth-floor", type=number_type("growth_floor"), default=DEFAULT_GROWTH_FLOOR, metavar="B",
                   help=f"budgets below B count as B (default {DEFAULT_GROWTH_FLOOR:g})")
    d.set_defaults(func=cmd_diff)


#: Longest NAME of a results file NAME.json, in bytes: room is left for the "-N" of a repeated name and the ".json" suffix.
MAX_NAME = 230


def result_name(kernel_name: str, taken: set[str]) -> str:
    """A file name (without .json) for a kernel's results: its name with anything but [A-Za-z0-9._-]
    made '_', cut to fit a file name (a cut name ends in a digest of the whole), '-2', '-3', ...
    added when another kernel has the name already."""
    base = fit_name(re.sub(r"[^A-Za-z0-9._-]+", "_", kernel_name).strip("._") or "kernel", "", MAX_NAME)
    name, i = base, 2
    while name in taken:
        name, i = f"{base}-{i}", i + 1
    taken.add(name)
    return name


def cmd_gate(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .. import cli, stop
    from ..results import write_json_atomic
    from ..run import run_check
    from ..summary import incomplete_lines, summary_table, verdict_lines
    from .decide import GATE_CAUTION, apply_gate, gate_lines
    from .plan import PlanError, plan_runs
    from .waivers import waiver_summary

    # Destinations first: a path that cannot be written must not cost a run (nor a kernel load).
    json_dir = _destination(folder_target, args.json_dir, "--json-dir") if args.json_dir is not None else None
    junit = _destination(file_target, args.junit, "--junit") if args.junit is not None else None
    baseline_dir = None
    if args.baseline_dir is not None:
        baseline_dir = _destination(input_folder, args.baseline_dir, "--baseline-dir")
        if baseline_dir is None:
            print(f"warning: --baseline-dir {args.baseline_dir} does not exist; growth not checked")
    notes: list[str] = []
    path = args.profile if args.profile is not None else find_profile(Path.cwd(), notes)
    if path is None and not args.kernel:
        raise _usage("no profile: give --profile PATH, or put refnorm.toml (or [tool.refnorm] in pyproject.toml) "
                     "in this folder, or name kernels with --kernel" + "".join(f" (note: {n})" for n in notes))
    for n in notes:
        print(f"note: {n}")
    prof = _load_profile(str(path)) if path is not None else None
    try:
        plans = plan_runs(prof, specs=args.kernel, tier=args.tier, dtypes=args.dtype, seed=args.seed,
                          workers=args.workers, timeout=args.timeout, growth=args.growth,
                          growth_floor=args.growth_floor)
    except PlanError as e:
        raise _usage(str(e)) from None
    command = "refnorm " + shlex.join(argv)
    taken: set[str] = set()
    names = [result_name(p.kernel.name, taken) for p in plans]
    if json_dir is not None:
        for name in names:
            _destination(file_target, json_dir / f"{name}.json", "--json-dir")
    durations: list = [None] * len(plans)
    if args.shard_durations is not None:
        from ..run.shards import read_durations

        if args.shard is None:
            raise _usage("--shard-durations balances the shards of --shard K/N: give --shard too")
        folder = _destination(input_folder, args.shard_durations, "--shard-durations")
        for i, (plan, name) in enumerate(zip(plans, names)):
            cand = folder / f"{name}.json" if folder is not None else None
            if cand is None or not cand.is_file():
                print(f"warning: no {args.shard_durations}/{name}.json for kernel {plan.kernel.name!r}: its shards "
                      "are cut by the cost model")
                continue
            try:
                durations[i] = read_durations(str(cand))
            except ValueError as e:
                raise _usage(f"--shard-durations: {e}") from None
    baselines = []  # read them all before the first run: a bad file must not cost a run
    for plan, name in zip(plans, names):
        bl_path = plan.baseline
        if bl_path is None and baseline_dir is not None:
            cand = baseline_dir / f"{name}.json"
            bl_path = cand if cand.is_file() else None
            if bl_path is None:
                print(f"warning: no baseline {cand} for kernel {plan.kernel.name!r}; growth not checked")
        baselines.append((bl_path, _load_doc(str(bl_path), "baseline") if bl_path else None))
    docs, uses, unwritten = [], [], []
    interrupted = False
    with stop.holding():  # a signal stops the gate between kernels; the pool of a running kernel raises it
        for plan, name, (bl_path, baseline), measured in zip(plans, names, baselines, durations):
            if stop.requested():
                interrupted = True
                break
            print(f"== {plan.kernel.name} ({plan.spec}): {plan.kernel.op}, {', '.join(plan.dtypes)}, {plan.tier} "
                  f"tier, seed {plan.seed}", flush=True)
            opts = plan.run_options(command)
            opts.shard, opts.shard_durations = args.shard, measured
            doc = run_check(plan.kernel, opts, spec=plan.load_spec, quiet=args.quiet)
            doc, u = apply_gate(doc, waivers=plan.waivers, baseline=baseline,
                                baseline_path=str(bl_path) if bl_path else None, growth=plan.growth,
                                growth_floor=plan.growth_floor, profile=str(path) if path else None)
            uses += u
            docs.append(doc)
            written = None
            if json_dir is not None:  # the file first, then the lines
                try:
                    written = write_json_atomic(json_dir / f"{name}.json", doc)
                except OSError as e:
                    unwritten.append(f"--json-dir {json_dir / f'{name}.json'}: {e.strerror or e}")
            print(summary_table(doc))
            print()
            for line in verdict_lines(doc)[:1] + incomplete_lines(doc) + gate_lines(doc, stale=False)[:-1]:
                print(line)
            if written is not None:
                print(f"results: {written}")
            print()
            if not doc["complete"] or stop.requested():
                interrupted = True
                break
        junit_line = None
        if junit is not None:
            from .junit import write_junit

            try:
                junit_line = f"junit: {write_junit(junit, docs)}"
            except OSError as e:
                unwritten.append(f"--junit {junit}: {e.strerror or e}")
        waivers = prof.waivers if prof else ()
        ws = waiver_summary(waivers, uses)
        if args.shard:  # a waiver stale or unmatched here may be used on another shard: the merge judges that
            ws = {**ws, "stale": [], "unmatched": []}
        for w in ws["stale"]:
            print(f"warning: stale waiver #{w['index']} (case {w['case']!r}"
                  f"{' output ' + w['output'] if w.get('output') else ''}): matches cases but no failure: remove it")
        for w in ws["unmatched"]:
            print(f"warning: waiver #{w['index']} (case {w['case']!r}) matches no case of any kernel checked: "
                  "remove it or fix its pattern")
        if junit_line:
            print(junit_line)
        failed = [d["kernel"]["name"] for d in docs if d["gate"]["verdict"] != "pass"]
        verdict = "FAIL" if failed or interrupted else "PASS"
        stopped = ""
        if interrupted:
            by = stop.requested() or next((d["run"].get("interrupted") for d in docs if d["run"].get("interrupted")),
                                          None)
            stopped = f" (interrupted{f' by {by}' if by else ''}; {len(plans) - len(docs)} kernel(s) not run)"
        print(f"gate: {verdict}: {len(docs) - len(failed)} of {len(plans)} kernel(s) pass"
              + (f"; failing: {', '.join(failed)}" if failed else "") + stopped)
        if args.shard:
            print(f"gate: shard {args.shard[0]}/{args.shard[1]} of each kernel only: the gate of the whole run is "
                  "`refnorm merge` over each kernel's shards (with --profile)")
        print("note: " + GATE_CAUTION)
        for line in unwritten:
            print(f"refnorm: error: could not write {line}", file=sys.stderr)
    if interrupted:
        return cli.EXIT_INTERRUPTED
    if unwritten:
        return cli.EXIT_USAGE
    if failed and all(d["gate"]["verdict"] == "inconclusive" for d in docs if d["gate"]["verdict"] != "pass"):
        return cli.EXIT_INCONCLUSIVE
    return cli.EXIT_FAIL if failed else cli.EXIT_OK


def cmd_diff(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .. import cli
    from .diff import diff_docs

    old = _load_doc(args.old, "OLD")
    new = _load_doc(args.new, "NEW")
    d = diff_docs(old, new, factor=args.growth, floor=args.growth_floor)
    for line in d.lines():
        print(line)
    return cli.EXIT_FAIL if d.worse else cli.EXIT_OK
