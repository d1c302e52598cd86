"""The command line: `refnorm check`, `refnorm cases`.

Exit codes: 0 conformant; 1 not conformant; 2 bad usage (an option out of its limits, an
output path that cannot be written, a bad kernel spec or a kernel that cannot load: all
found before the first case runs; or an artefact that could not be written after the run);
3 interrupted by SIGINT, SIGTERM or SIGHUP, or results that do not cover the selected cases
(a partial results file is still written, marked incomplete; the workers and whatever their
kernels started are killed).

Artefacts are written before anything is printed, and a closed stdout (`... | head -1`)
changes neither the exit code nor the files.
"""

from __future__ import annotations

import argparse
import os
import shlex
import sys
from typing import Any, Sequence

from . import dtypes as _dtypes
from .cases import TIERS, catalog
from .destinations import DestinationError, file_target
from .kernel import OPS, Kernel, KernelError, load_kernel
from .options import DEFAULTS, OUTPUT_NAMES, number_type, shard_type, tolerance_type

EXIT_OK, EXIT_FAIL, EXIT_USAGE, EXIT_INTERRUPTED, EXIT_INCONCLUSIVE = 0, 1, 2, 3, 4

#: Modules that extend the command line. Each may define, called in this order by `refnorm check`:
#:   add_check_arguments(parser)       options of `refnorm check`; run options that a profile may fill
#:                                     (--tier, --seed, --workers, --timeout) are None when not given
#:   add_commands(subparsers)          further subcommands (set func=fn(args, argv) -> exit code)
#:   prepare(args)                     before check loads the kernel: validate options, read input files,
#:                                     check output destinations (conformance.destinations), fill options
#:                                     left None (a profile); raise UsageError. It may load the kernel
#:                                     itself and leave (kernel, spec) in args.loaded_kernel
#:   amend(args, doc) -> doc           change a check's results before they are written and printed
#:                                     (waivers, baselines); must keep doc's schema
#:   emit(args, doc) -> [str]          write further artefacts of a check (reports, JUnit XML); return
#:                                     lines naming them, printed after the summary
#:   verdict_lines(args, doc) -> [str] lines printed after the verdict (the gate's decision)
#:   exit_code(args, doc, code) -> int after every artefact is written: the exit status (the gate's)
#: Another command that makes a results document (`refnorm score`) runs the same steps with its own
#: hooks: prepare_outputs(args, hooks) before, finish(args, doc, hooks) after.
EXTENSIONS = ("conformance.adapters.cli", "conformance.report.cli", "conformance.gate.cli", "conformance.vectors.cli",
              "conformance.run.cli", "conformance.search.cli")


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


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="refnorm", description="Check normalization kernels against a float64 oracle "
                                "under derived tolerances.")
    sub = p.add_subparsers(dest="command", required=True)

    c = sub.add_parser("check", help="run a kernel over the case catalog and give a verdict")
    c.add_argument("spec", help="the kernel: module:attr or path/to/file.py:attr (a Kernel or a function "
                                "returning one); with --op, a module alone picks module:OP")
    c.add_argument("--op", choices=OPS, help="the op to check (must match the kernel's declaration)")
    c.add_argument("--dtype", nargs="+", choices=_dtypes.FORMATS, help="storage dtypes (default: all declared)")
    # None means "not given": a profile (--profile) may fill it, else DEFAULTS applies.
    c.add_argument("--tier", choices=TIERS, help=f"catalog tier (default: {DEFAULTS['tier']})")
    c.add_argument("--seed", type=number_type("seed"), help=f"seed of the case data, 0 <= N < 2**63 "
                   f"(default {DEFAULTS['seed']})")
    c.add_argument("--case", action="append", default=[], metavar="ID",
                   help="run only this case id (repeatable; a repeated id runs once)")
    c.add_argument("--shard", type=shard_type, metavar="K/N",
                   help="run only shard K of N of the selected cases (1 <= K <= N <= 256; deterministic, balanced "
                        "by expected cost); put the N results files together with refnorm merge")
    c.add_argument("--shard-durations", metavar="DOC.json",
                   help="with --shard: balance the shards by the measured case durations of this earlier results "
                        "file of the kernel (a baseline, say) instead of the cost model; every shard must be given "
                        "the same file")
    c.add_argument("--workers", type=number_type("workers"), help=f"worker processes, 1 to 256 "
                   f"(default {DEFAULTS['workers']})")
    c.add_argument("--timeout", type=number_type("timeout"), help="per-case timeout in seconds, > 0 and at most "
                   f"86400 (default {DEFAULTS['timeout']:g})")
    c.add_argument("--json", metavar="PATH", help="write the results document (JSON) here")
    c.add_argument("--tolerance", action="append", type=tolerance_type, default=[], metavar="OUTPUT=ATOL,RTOL",
                   help="replace the derived bound of one output by atol + rtol*|oracle| (repeatable; ATOL, RTOL "
                        "finite, >= 0 and at most 1e100)")
    c.add_argument("--accept-inconclusive", action="append", default=[], metavar="OUTPUT", choices=OUTPUT_NAMES,
                   help="accept passes of this output under a bound that is not informative (repeatable; "
                        "recorded in the results and the report); without it such a run is INCONCLUSIVE, exit 4")
    c.add_argument("--quiet", action="store_true", help="no progress output")
    c.set_defaults(func=cmd_check)
    for ext in _extensions():
        if hasattr(ext, "add_check_arguments"):
            ext.add_check_arguments(c)

    s = sub.add_parser("cases", help="list the case catalog")
    s.add_argument("--op", nargs="+", choices=OPS, default=list(OPS))
    s.add_argument("--dtype", nargs="+", choices=_dtypes.FORMATS, default=["float32"])
    s.add_argument("--tier", choices=TIERS, default="standard")
    s.add_argument("--quantized", action="store_true",
                   help="also list the quantized-y cases (ids ending out=FORMAT,scale=MODE)")
    s.set_defaults(func=cmd_cases)
    for ext in _extensions():
        if hasattr(ext, "add_commands"):
            ext.add_commands(sub)
    return p


def check_spec(spec: str, op: str | None) -> str:
    """The spec to load: a module alone with --op means module:op (before any ?parameters)."""
    base, q, query = spec.partition("?")
    return f"{base}:{op}{q}{query}" if ":" not in base and op else spec


def resolve_kernel(spec: str, op: str | None, loaded: Kernel | None = None) -> tuple[Kernel, str]:
    """Load the kernel named by spec (module alone + --op means module:op), unless ``loaded`` is it
    already; check --op agrees."""
    spec = check_spec(spec, op)
    if loaded is not None:
        kernel = loaded
    else:
        try:
            kernel = load_kernel(spec)
        except (OSError, ValueError) as e:  # KernelError is handled by main; these are paths the OS refuses
            if isinstance(e, KernelError):
                raise
            raise UsageError(f"kernel spec {spec!r}: {e}") from None
    if op and kernel.op != op:
        raise UsageError(f"--op is {op}, but kernel {kernel.name!r} from {spec} declares op {kernel.op}")
    return kernel, spec


def run_options(args: argparse.Namespace, kernel: Kernel, argv: Sequence[str]):
    from .run import RunOptions

    if args.dtype:
        undeclared = [d for d in args.dtype if d not in kernel.dtypes]
        if undeclared:
            raise UsageError(f"--dtype {' '.join(undeclared)}: kernel {kernel.name!r} declares only "
                             f"{', '.join(kernel.dtypes)}")
    for cid in args.case:
        if not cid.startswith(kernel.op + "/"):
            raise UsageError(f"--case {cid!r} is not a {kernel.op} case (ids start with the op)")
    # a dtype or case named twice runs once
    return RunOptions(tier=args.tier, dtypes=tuple(dict.fromkeys(args.dtype)) if args.dtype else None,
                      case_ids=tuple(dict.fromkeys(args.case)), seed=args.seed, workers=args.workers,
                      timeout=args.timeout, overrides=dict(args.tolerance), command="refnorm " + shlex.join(argv),
                      shard=getattr(args, "shard", None), shard_durations=getattr(args, "_shard_durations", None),
                      accept_inconclusive=tuple(dict.fromkeys(getattr(args, "accept_inconclusive", None) or ())))


def _prepare(args: argparse.Namespace) -> None:
    """check's own options, before the kernel loads: the --json destination, the --shard-durations file."""
    if args.json is not None:
        args.json = file_target(args.json, "--json")
    if getattr(args, "shard_durations", None) is not None:
        from .run.shards import read_durations

        if getattr(args, "shard", None) is None:
            raise UsageError("--shard-durations balances the shards of --shard K/N: give --shard too")
        try:
            args._shard_durations = read_durations(args.shard_durations)
        except ValueError as e:  # conformance.documents.DocumentError: names the file and the field
            raise UsageError(f"--shard-durations: {e}") from None


def prepare_outputs(args: argparse.Namespace, exts) -> None:
    """Before a run: --json's destination, then each extension's ``prepare`` (DestinationError is usage)."""
    try:
        _prepare(args)
        for ext in exts:
            if hasattr(ext, "prepare"):
                ext.prepare(args)
    except DestinationError as e:
        raise UsageError(str(e)) from None


def cmd_check(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .run import run_check

    exts = _extensions()
    prepare_outputs(args, exts)
    for k, v in DEFAULTS.items():
        if getattr(args, k, None) is None:
            setattr(args, k, v)
    loaded = getattr(args, "loaded_kernel", None)
    kernel, spec = resolve_kernel(loaded[1] if loaded else args.spec, args.op, loaded[0] if loaded else None)
    opts = run_options(args, kernel, argv)
    try:
        if getattr(args, "replay", None) is not None:  # --replay: stored reproducers (conformance.search.cli)
            from .search.cli import replay_check

            doc = replay_check(args, kernel, spec, argv)
        else:
            doc = run_check(kernel, opts, spec=spec, quiet=args.quiet)
    except KeyError as e:  # an unknown --case id
        raise UsageError(str(e.args[0]) if e.args else str(e))
    return finish(args, doc, exts)


def finish(args: argparse.Namespace, doc: dict[str, Any], exts) -> int:
    """After a run (check's, or any command that makes a results document): amend, write the artefacts,
    print the summary and the verdict, and return the exit status. ``exts`` are the hooks to call."""
    from . import stop
    from .results import write_json_atomic
    from .summary import summary_table, verdict_lines

    with stop.holding():  # a signal from here on is held until the results are written
        for ext in exts:
            if hasattr(ext, "amend"):
                doc = ext.amend(args, doc)
        # Artefacts first: nothing printed (to a closed pipe, say) can cost a file.
        written: list[str] = []
        unwritten: list[str] = []
        if args.json:
            try:
                written.append(f"results: {write_json_atomic(args.json, doc)}")
            except OSError as e:
                unwritten.append(f"--json {args.json}: {e.strerror or e}")
    for ext in exts:
        if hasattr(ext, "emit"):
            try:
                written += ext.emit(args, doc) or []
            except OSError as e:
                unwritten.append(f"{e.filename or 'an artefact'}: {e.strerror or e}")
    print(summary_table(doc))
    print()
    for line in verdict_lines(doc):
        print(line)
    for ext in exts:
        if hasattr(ext, "verdict_lines"):
            for line in ext.verdict_lines(args, doc):
                print(line)
    for line in written:
        print(line)
    for line in unwritten:
        print(f"refnorm: error: could not write {line}", file=sys.stderr)
    if not doc["complete"] or stop.requested():
        if doc["complete"]:
            print(f"refnorm: interrupted by {stop.requested()} after the run; its results are complete",
                  file=sys.stderr)
        return EXIT_INTERRUPTED
    if unwritten:
        return EXIT_USAGE
    code = {"conformant": EXIT_OK, "inconclusive": EXIT_INCONCLUSIVE}.get(doc["verdict"], EXIT_FAIL)
    if doc["verdict"] == "no cases run" and (doc.get("run") or {}).get("shard"):
        code = EXIT_OK  # a shard may hold only skipped cases, or none: the merged run says whether any was checked
    for ext in exts:
        if hasattr(ext, "exit_code"):
            code = ext.exit_code(args, doc, code)
    return code


def cmd_cases(args: argparse.Namespace, argv: Sequence[str]) -> int:
    cases = catalog(args.op, args.dtype, args.tier, quantized=getattr(args, "quantized", False))
    for c in cases:
        print(c.id)
    print(f"{len(cases)} cases ({args.tier} tier)", file=sys.stderr)
    return EXIT_OK


class _PipeSafe:
    """A stdout that a closed pipe cannot break: after the first BrokenPipeError it writes nothing,
    and the file descriptor is pointed at os.devnull so that the interpreter's last flush succeeds
    (the Python documentation's recipe, library/signal.html, "Note on SIGPIPE"). Text the stream's
    encoding cannot hold (a file name's undecodable bytes, kept by os.fsdecode as surrogates) is
    written with backslash escapes, as Python's own stderr does, instead of raising."""

    def __init__(self, stream: Any):
        self._stream, self.broken = stream, False

    def _broke(self) -> None:
        self.broken = True
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, self._stream.fileno())
            os.close(devnull)
        except (OSError, ValueError, AttributeError):  # no file descriptor (a test's stand-in)
            pass

    def write(self, text: str) -> int:
        if not self.broken:
            try:
                try:
                    return self._stream.write(text)
                except UnicodeEncodeError:
                    enc = getattr(self._stream, "encoding", None) or "utf-8"
                    self._stream.write(text.encode(enc, "backslashreplace").decode(enc))
            except BrokenPipeError:
                self._broke()
        return len(text)

    def flush(self) -> None:
        if not self.broken:
            try:
                self._stream.flush()
            except BrokenPipeError:
                self._broke()

    def __getattr__(self, name: str) -> Any:
        return getattr(self._stream, name)


def _closed_stdout_safe(func, args: argparse.Namespace, argv: Sequence[str]) -> int:
    """Run a command with a stdout that a closed pipe cannot break (its exit code stays its own)."""
    saved = sys.stdout
    sys.stdout = safe = _PipeSafe(saved)
    try:
        return func(args, argv)
    finally:
        safe.flush()
        sys.stdout = saved


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
            return _closed_stdout_safe(args.func, args, argv)
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
