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
from pathlib import Path
from typing import Any, Sequence

from .profile import DEFAULT_GROWTH, DEFAULT_GROWTH_FLOOR, ProfileError, find_profile, load_profile

__all__ = ["add_check_arguments", "add_commands", "amend", "emit"]

#: Options of `refnorm check` whose value a profile may supply when the command line does not.
_PROFILE_OPTIONS = ("tier", "seed", "workers", "timeout")


def _factor(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a factor > 1 (e.g. 2), received {text!r}")
    if not v > 1.0:
        raise argparse.ArgumentTypeError(f"expected a factor > 1 (e.g. 2), received {text!r}")
    return v


def _floor(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a fraction of the bound >= 0 (e.g. 0.01), received {text!r}")
    if not v >= 0.0:
        raise argparse.ArgumentTypeError(f"expected a fraction of the bound >= 0 (e.g. 0.01), received {text!r}")
    return v


def _gate_arguments(p: argparse.ArgumentParser, *, per_kernel_baseline: bool = True) -> None:
    if per_kernel_baseline:
        p.add_argument("--baseline", metavar="OLD.json",
                       help="fail a passed output whose budget used grew more than --growth times over this "
                            "earlier results file (same case id and output)")
    p.add_argument("--growth", type=_factor, metavar="F",
                   help=f"allowed growth factor over the baseline (default: the profile's, else {DEFAULT_GROWTH:g})")
    p.add_argument("--growth-floor", type=_floor, metavar="B",
                   help="budgets below B count as B when measuring growth (default: the profile's, else "
                        f"{DEFAULT_GROWTH_FLOOR:g})")
    p.add_argument("--junit", metavar="PATH", help="write JUnit XML here")


def add_check_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--profile", metavar="PATH",
                        help="apply a gate profile (refnorm.toml, or pyproject.toml with [tool.refnorm]): its "
                             "tier, dtypes, seed, workers, timeout, tolerances and waivers; options given here win")
    _gate_arguments(parser)
    parser.set_defaults(func=_check, _refnorm_check_parser=parser)


_UNSET = object()


def _given(args: argparse.Namespace, argv: Sequence[str]) -> set[str]:
    """Which of _PROFILE_OPTIONS the command line set (a profile fills only the others).

    argparse cannot tell a default from an explicit value, so the check command's own
    arguments are parsed once more with a marker as the default of those options.
    """
    sub = getattr(args, "_refnorm_check_parser", None)
    if sub is None:
        return set(_PROFILE_OPTIONS)
    rest = list(argv[1:]) if argv and argv[0] == "check" else list(argv)
    saved = {k: sub.get_default(k) for k in _PROFILE_OPTIONS}
    sub.set_defaults(**{k: _UNSET for k in _PROFILE_OPTIONS})
    try:
        ns, _ = sub.parse_known_args(rest)
    finally:
        sub.set_defaults(**saved)
    return {k for k in _PROFILE_OPTIONS if getattr(ns, k, _UNSET) is not _UNSET}


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


def _check(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .. import cli
    from .plan import PlanError, plan_runs

    prof = _load_profile(args.profile)
    if prof is not None:
        spec = args.spec if (":" in args.spec or not args.op) else f"{args.spec}:{args.op}"
        given = {k: getattr(args, k) for k in _given(args, argv)}
        try:
            plan = plan_runs(prof, specs=[spec], dtypes=args.dtype, overrides=dict(args.tolerance),
                             case_ids=args.case, growth=args.growth, growth_floor=args.growth_floor, **given)[0]
        except PlanError as e:
            raise _usage(str(e)) from None
        args.tier, args.seed, args.workers, args.timeout = plan.tier, plan.seed, plan.workers, plan.timeout
        if args.dtype or (prof.entry_for(spec) and prof.entry_for(spec).dtypes) or prof.dtypes:
            args.dtype = list(plan.dtypes)
        args.tolerance = list(plan.overrides.items())
        args._refnorm_plan = plan
    plan = getattr(args, "_refnorm_plan", None)
    if args.baseline is None and plan is not None and plan.baseline is not None:
        args.baseline = str(plan.baseline)
    if args.baseline:  # read it before the run: a bad path must not cost a run
        args._refnorm_baseline_doc = _load_doc(args.baseline, "baseline")
    code = cli.cmd_check(args, argv)
    gate = getattr(args, "_refnorm_gate", None)
    if gate is None or code not in (cli.EXIT_OK, cli.EXIT_FAIL):
        return code
    return cli.EXIT_OK if gate["verdict"] == "pass" else cli.EXIT_FAIL


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
    if baseline is None and baseline_path:
        baseline = _load_doc(baseline_path, "baseline")
    doc, _ = apply_gate(doc, waivers=plan.waivers if plan else (), baseline=baseline,
                        baseline_path=baseline_path, growth=growth, growth_floor=floor,
                        profile=args.profile)
    args._refnorm_gate = doc["gate"]
    return doc


def emit(args: argparse.Namespace, doc: dict[str, Any]) -> None:
    """Print the gate's lines and write JUnit XML."""
    if getattr(args, "command", None) != "check":
        return
    from .decide import gate_lines

    lines = gate_lines(doc)
    if lines:
        print()
        for line in lines:
            print(line)
    if getattr(args, "junit", None):
        from .junit import write_junit

        print(f"junit: {write_junit(args.junit, [doc])}")


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
    g.add_argument("--seed", type=int, help="seed of the case data (default: the profile's, else 0)")
    g.add_argument("--workers", type=int, help="worker processes (default: the profile's, else 1)")
    g.add_argument("--timeout", type=float, help="per-case timeout in seconds (default: the profile's, else 120)")
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
    d.add_argument("--growth", type=_factor, default=DEFAULT_GROWTH, metavar="F",
                   help=f"factor that counts as grown or shrunk (default {DEFAULT_GROWTH:g})")
    d.add_argument("--growth-floor", type=_floor, default=DEFAULT_GROWTH_FLOOR, metavar="B",
                   help=f"budgets below B count as B (default {DEFAULT_GROWTH_FLOOR:g})")
    d.set_defaults(func=cmd_diff)


#: Longest NAME of a results file NAME.json: with the suffix and a "-N" for a repeated name it stays
#: within the 255 bytes a file name may have on common file systems (ext4, XFS, APFS, NTFS).
MAX_NAME = 200


def result_name(kernel_name: str, taken: set[str]) -> str:
    """A file name for a kernel's results: its name with anything but [A-Za-z0-9._-] made '_', at
    most MAX_NAME characters (a longer name keeps its start and gets a hash of the whole name, so
    two long names that differ only at the end stay apart)."""
    import hashlib

    base = re.sub(r"[^A-Za-z0-9._-]+", "_", kernel_name).strip("._") or "kernel"
    if len(base) > MAX_NAME:
        digest = hashlib.sha256(kernel_name.encode("utf-8", "surrogatepass")).hexdigest()[:16]
        base = f"{base[:MAX_NAME - 17].rstrip('._-')}-{digest}"
    name, i = base, 2
    while name in taken:
        name, i = f"{base}-{i}", i + 1
    taken.add(name)
    return name


def cmd_gate(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .. import cli
    from ..results import write_json_atomic
    from ..run import run_check
    from ..summary import summary_table, verdict_lines
    from .decide import apply_gate, gate_lines
    from .plan import PlanError, plan_runs
    from .waivers import waiver_summary

    path = args.profile or find_profile(Path.cwd())
    if path is None and not args.kernel:
        raise _usage("no profile: give --profile PATH, or put refnorm.toml (or [tool.refnorm] in pyproject.toml) "
                     "in this folder, or name kernels with --kernel")
    prof = _load_profile(str(path)) if path else None
    try:
        plans = plan_runs(prof, specs=args.kernel, tier=args.tier, dtypes=args.dtype, seed=args.seed,
                          workers=args.workers, timeout=args.timeout, growth=args.growth,
                          growth_floor=args.growth_floor)
    except PlanError as e:
        raise _usage(str(e)) from None
    command = "refnorm " + shlex.join(argv)
    taken: set[str] = set()
    names = [result_name(p.kernel.name, taken) for p in plans]
    baselines = []  # read them all before the first run: a bad file must not cost a run
    for plan, name in zip(plans, names):
        bl_path = plan.baseline
        if bl_path is None and args.baseline_dir:
            cand = Path(args.baseline_dir) / f"{name}.json"
            bl_path = cand if cand.is_file() else None
            if bl_path is None:
                print(f"warning: no baseline {cand} for kernel {plan.kernel.name!r}; growth not checked")
        baselines.append((bl_path, _load_doc(str(bl_path), "baseline") if bl_path else None))
    docs, uses = [], []
    interrupted = False
    for plan, name, (bl_path, baseline) in zip(plans, names, baselines):
        print(f"== {plan.kernel.name} ({plan.spec}): {plan.kernel.op}, {', '.join(plan.dtypes)}, {plan.tier} tier, "
              f"seed {plan.seed}", flush=True)
        doc = run_check(plan.kernel, plan.run_options(command), spec=plan.load_spec, quiet=args.quiet)
        doc, u = apply_gate(doc, waivers=plan.waivers, baseline=baseline,
                            baseline_path=str(bl_path) if bl_path else None, growth=plan.growth,
                            growth_floor=plan.growth_floor, profile=str(path) if path else None)
        uses += u
        docs.append(doc)
        print(summary_table(doc))
        print()
        for line in verdict_lines(doc)[:1] + gate_lines(doc, stale=False)[:-1]:
            print(line)
        if args.json_dir:
            print(f"results: {write_json_atomic(Path(args.json_dir) / f'{name}.json', doc)}")
        print()
        if not doc["complete"]:
            interrupted = True
            break
    waivers = prof.waivers if prof else ()
    ws = waiver_summary(waivers, uses)
    for w in ws["stale"]:
        print(f"warning: stale waiver #{w['index']} (case {w['case']!r}"
              f"{' output ' + w['output'] if w.get('output') else ''}): matches cases but no failure: remove it")
    for w in ws["unmatched"]:
        print(f"warning: waiver #{w['index']} (case {w['case']!r}) matches no case of any kernel checked: "
              "remove it or fix its pattern")
    if args.junit:
        from .junit import write_junit

        print(f"junit: {write_junit(args.junit, docs)}")
    failed = [d["kernel"]["name"] for d in docs if d["gate"]["verdict"] != "pass"]
    verdict = "FAIL" if failed or interrupted else "PASS"
    print(f"gate: {verdict}: {len(docs) - len(failed)} of {len(plans)} kernel(s) pass"
          + (f"; failing: {', '.join(failed)}" if failed else "") + (" (interrupted)" if interrupted else ""))
    from .decide import GATE_CAUTION

    print("note: " + GATE_CAUTION)
    if interrupted:
        return cli.EXIT_INTERRUPTED
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
