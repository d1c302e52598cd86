"""The command line: `refnorm check`, `refnorm cases`.

Exit codes: 0 conformant; 1 not conformant; 2 bad usage, a bad kernel spec or a
kernel that cannot load; 3 interrupted by SIGINT, SIGTERM or SIGHUP, or results
that do not cover the selected cases (a partial results file is still written,
marked incomplete; the workers and whatever their kernels started are killed).
"""

from __future__ import annotations

import argparse
import shlex
import sys
from typing import Sequence

from . import dtypes as _dtypes
from .cases import TIERS, catalog
from .kernel import OPS, Kernel, KernelError, load_kernel

EXIT_OK, EXIT_FAIL, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 3

#: Modules that extend the command line. Each may define
#:   add_check_arguments(parser)       options of `refnorm check`
#:   add_commands(subparsers)          further subcommands (set func=fn(args, argv) -> exit code)
#:   amend(args, doc) -> doc           change a check's results before they are printed and written
#:                                     (waivers, baselines); must keep doc's schema
#:   emit(args, doc)                   write further artefacts of a check (reports, JUnit XML)
EXTENSIONS = ("conformance.report.cli", "conformance.gate.cli")


def _extensions():
    import importlib

    mods = []
    for name in EXTENSIONS:
        try:
            mods.append(importlib.import_module(name))
        except ModuleNotFoundError as e:
            if e.name is None or not name.startswith(e.name):
                raise
    return mods


class UsageError(Exception):
    """Bad usage; the message says what to change."""


def _tolerance(text: str) -> tuple[str, tuple[float, float]]:
    try:
        name, _, rest = text.partition("=")
        atol, rtol = (float(v) for v in rest.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected OUTPUT=ATOL,RTOL (e.g. dx=1e-3,1e-2), received {text!r}")
    if not name or atol < 0 or rtol < 0:
        raise argparse.ArgumentTypeError(f"expected OUTPUT=ATOL,RTOL with ATOL, RTOL >= 0, received {text!r}")
    return name, (atol, rtol)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="refnorm", description="Check normalization kernels against a float64 oracle "
                                "under derived tolerances.")
    sub = p.add_subparsers(dest="command", required=True)

    c = sub.add_parser("check", help="run a kernel over the case catalog and give a verdict")
    c.add_argument("spec", help="the kernel: module:attr or path/to/file.py:attr (a Kernel or a function "
                                "returning one); with --op, a module alone picks module:OP")
    c.add_argument("--op", choices=OPS, help="the op to check (must match the kernel's declaration)")
    c.add_argument("--dtype", nargs="+", choices=_dtypes.FORMATS, help="storage dtypes (default: all declared)")
    c.add_argument("--tier", choices=TIERS, default="standard", help="catalog tier (default: standard)")
    c.add_argument("--seed", type=int, default=0, help="seed of the case data (default 0)")
    c.add_argument("--case", action="append", default=[], metavar="ID", help="run only this case id (repeatable)")
    c.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    c.add_argument("--timeout", type=float, default=120.0, help="per-case timeout in seconds (default 120)")
    c.add_argument("--json", metavar="PATH", help="write the results document (JSON) here")
    c.add_argument("--tolerance", action="append", type=_tolerance, default=[], metavar="OUTPUT=ATOL,RTOL",
                   help="replace the derived bound of one output by atol + rtol*|oracle| (repeatable)")
    c.add_argument("--quiet", action="store_true", help="no progress output")
    c.set_defaults(func=cmd_check)
    for ext in _extensions():
        if hasattr(ext, "add_check_arguments"):
            ext.add_check_arguments(c)

    s = sub.add_parser("cases", help="list the case catalog")
    s.add_argument("--op", nargs="+", choices=OPS, default=list(OPS))
    s.add_argument("--dtype", nargs="+", choices=_dtypes.FORMATS, default=["float32"])
    s.add_argument("--tier", choices=TIERS, default="standard")
    s.set_defaults(func=cmd_cases)
    for ext in _extensions():
        if hasattr(ext, "add_commands"):
            ext.add_commands(sub)
    return p


def resolve_kernel(spec: str, op: str | None) -> tuple[Kernel, str]:
    """Load the kernel named by spec (module alone + --op means module:op); check --op agrees."""
    if ":" not in spec and op:
        spec = f"{spec}:{op}"
    kernel = load_kernel(spec)
    if op and kernel.op != op:
        raise UsageError(f"--op is {op}, but kernel {kernel.name!r} from {spec} declares op {kernel.op}")
    return kernel, spec


def run_options(args: argparse.Namespace, kernel: Kernel, argv: Sequence[str]):
    from .run import RunOptions

    if args.workers < 1:
        raise UsageError(f"--workers is {args.workers}, expected an integer >= 1")
    if args.timeout <= 0:
        raise UsageError(f"--timeout is {args.timeout}, expected a positive number of seconds")
    if args.dtype:
        undeclared = [d for d in args.dtype if d not in kernel.dtypes]
        if undeclared:
            raise UsageError(f"--dtype {' '.join(undeclared)}: kernel {kernel.name!r} declares only "
                             f"{', '.join(kernel.dtypes)}")
    for cid in args.case:
        if not cid.startswith(kernel.op + "/"):
            raise UsageError(f"--case {cid!r} is not a {kernel.op} case (ids start with the op)")
    return RunOptions(tier=args.tier, dtypes=tuple(args.dtype) if args.dtype else None,
                      case_ids=tuple(args.case), seed=args.seed, workers=args.workers, timeout=args.timeout,
                      overrides=dict(args.tolerance), command="refnorm " + shlex.join(argv))


def cmd_check(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from . import stop
    from .results import write_json_atomic
    from .run import run_check
    from .summary import summary_table, verdict_lines

    kernel, spec = resolve_kernel(args.spec, args.op)
    opts = run_options(args, kernel, argv)
    try:
        doc = run_check(kernel, opts, spec=spec, quiet=args.quiet)
    except KeyError as e:  # an unknown --case id
        raise UsageError(str(e.args[0]) if e.args else str(e))
    with stop.holding():  # a signal from here on is held until the results are written
        for ext in _extensions():
            if hasattr(ext, "amend"):
                doc = ext.amend(args, doc)
        print(summary_table(doc))
        print()
        for line in verdict_lines(doc):
            print(line)
        if args.json:
            path = write_json_atomic(args.json, doc)
            print(f"results: {path}")
    for ext in _extensions():
        if hasattr(ext, "emit"):
            ext.emit(args, doc)
    if not doc["complete"] or stop.requested():
        if doc["complete"]:
            print(f"refnorm: interrupted by {stop.requested()} after the run; its results are complete",
                  file=sys.stderr)
        return EXIT_INTERRUPTED
    return EXIT_OK if doc["verdict"] == "conformant" else EXIT_FAIL


def cmd_cases(args: argparse.Namespace, argv: Sequence[str]) -> int:
    cases = catalog(args.op, args.dtype, args.tier)
    for c in cases:
        print(c.id)
    print(f"{len(cases)} cases ({args.tier} tier)", file=sys.stderr)
    return EXIT_OK


def main(argv: Sequence[str] | None = None) -> int:
    from .stop import handle_stops

    argv = list(sys.argv[1:] if argv is None else argv)
    with handle_stops():  # SIGTERM and SIGHUP stop a command as Ctrl-C does (conformance.stop)
        try:
            parser = build_parser()
            try:
                args = parser.parse_args(argv)
            except SystemExit as e:  # argparse's own usage errors exit with 2 already
                return int(e.code or 0)
            return args.func(args, argv)
        except (UsageError, KernelError) as e:
            print(f"refnorm: error: {e}", file=sys.stderr)
            return EXIT_USAGE
        except KeyboardInterrupt as e:
            return interrupted(e)


def interrupted(e: BaseException | None = None) -> int:
    """Say that the command was stopped, in one line; the exit code for it."""
    name = getattr(e, "signal", None)
    print(f"refnorm: interrupted{f' by {name}' if name else ''}", file=sys.stderr)
    return EXIT_INTERRUPTED


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
