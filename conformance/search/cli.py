"""`refnorm search` and `refnorm check --replay` (registered through conformance.cli.EXTENSIONS; docs/search.md).

refnorm search SPEC [--op OP] [--dtype D] [--evaluations N] [--seed S] [--output NAME ...] [--out DIR] [--quiet]
refnorm check SPEC --replay PATH          PATH: a reproducer folder, its reproducer.json, or a folder of them

Exit codes of search: 0 no failure found, 1 a failure found (its reproducer written under --out),
2 bad usage (found before the first evaluation), 3 interrupted (the summary written so far is
marked incomplete). check --replay exits as check does.
"""

from __future__ import annotations

import argparse
import shlex
from pathlib import Path
from typing import Any, Sequence

from .. import dtypes as _dtypes
from ..kernel import OPS
from ..options import DEFAULTS, number_type, tolerance_type

__all__ = ["add_commands", "add_check_arguments", "prepare", "cmd_search", "DEFAULT_EVALUATIONS"]

DEFAULT_EVALUATIONS = 200


def _usage(msg: str) -> Exception:
    from ..cli import UsageError

    return UsageError(msg)


def add_check_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--replay", metavar="PATH", help="rerun stored reproducers (refnorm search --out) instead of "
                        "the catalog: a reproducer folder, its reproducer.json, or a folder of them")


def prepare(args: argparse.Namespace) -> None:
    """--replay: the path exists and holds reproducers; no catalog selection, seed or tolerance beside it (each
    reproducer carries its own seed and overrides)."""
    if getattr(args, "replay", None) is None:
        return
    from .reproducer import ReproducerError, find_reproducers

    typed = [("--case", args.case), ("--shard", getattr(args, "shard", None))]
    if getattr(args, "profile", None) is None:  # a profile fills --seed and --tolerance; typed, they would be ignored
        typed += [("--seed", args.seed), ("--tolerance", args.tolerance)]
    clash = [o for o, v in typed if v is not None and v != []]
    if clash:
        raise _usage(f"--replay reruns stored reproducers; it takes no {', '.join(clash)}")
    try:
        find_reproducers(args.replay)
    except ReproducerError as e:
        raise _usage(f"--replay: {e}") from None


def replay_check(args: argparse.Namespace, kernel: Any, spec: str, argv: Sequence[str]) -> dict[str, Any]:
    """check's run for --replay: the reproducers checked against the kernel, then rerun (a results document)."""
    from .replay import load_reproducers, replay_document
    from .reproducer import ReproducerError

    try:
        reps = load_reproducers(args.replay, kernel)
    except ReproducerError as e:
        raise _usage(f"--replay: {e}") from None
    return replay_document(kernel, reps, spec=spec, timeout=args.timeout, command="refnorm " + shlex.join(argv),
                           quiet=args.quiet)


def add_commands(subparsers: Any) -> None:
    s = subparsers.add_parser(
        "search", help="search the cases the kernel's declaration admits for the largest budget used; shrink a failure",
        description="Draw cases the declaration admits (shapes, layouts, strides, value recipes, eps, weights, "
                    "momentum) with hypothesis, steer towards the largest budget used per output, shrink a failure "
                    "to a minimal case and store it as a replayable reproducer (docs/search.md).")
    s.add_argument("spec", help="the kernel, as refnorm check takes it")
    s.add_argument("--op", choices=OPS, help="the op (must match the kernel's declaration)")
    s.add_argument("--dtype", choices=_dtypes.FORMATS, help="the storage dtype (default: the first declared)")
    s.add_argument("--evaluations", type=number_type("evaluations"), default=DEFAULT_EVALUATIONS, metavar="N",
                   help=f"kernel runs while searching, 1 to 1000000 (default {DEFAULT_EVALUATIONS}); shrinking a "
                        "failure may take as many again")
    s.add_argument("--seed", type=number_type("seed"), default=DEFAULTS["seed"],
                   help="seed of the search and of the case data, 0 <= N < 2**63 (default 0)")
    s.add_argument("--output", action="append", default=[], metavar="NAME",
                   help="count only failures of this output (repeatable; a crash always counts)")
    s.add_argument("--timeout", type=number_type("timeout"), default=DEFAULTS["timeout"],
                   help="seconds per evaluation (default 120)")
    s.add_argument("--tolerance", action="append", type=tolerance_type, default=[], metavar="OUTPUT=ATOL,RTOL",
                   help="replace the derived bound of one output by atol + rtol*|oracle| (repeatable)")
    s.add_argument("--out", metavar="DIR", help="a new or empty folder: search.json and the reproducer")
    s.add_argument("--quiet", action="store_true", help="no progress lines")
    s.set_defaults(func=cmd_search)


def _out_folder(path: str) -> Path:
    from ..destinations import DestinationError, folder_target

    try:
        p = folder_target(path, "--out")
    except DestinationError as e:
        raise _usage(str(e)) from None
    if any(p.iterdir()):
        raise _usage(f"--out {path}: the folder is not empty; give a new or empty folder (a search never "
                     "overwrites reproducers)")
    return p


def cmd_search(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .. import ops, stop
    from ..cli import EXIT_FAIL, EXIT_INTERRUPTED, EXIT_OK, resolve_kernel
    from ..results import write_json_atomic
    from ..gate.worker import KeptWorker
    from .driver import run_search
    from .reproducer import write_reproducer
    from .summary import SUMMARY, summary_document, summary_lines

    out = _out_folder(args.out) if args.out is not None else None  # before the kernel loads: a bad path costs nothing
    kernel, spec = resolve_kernel(args.spec, args.op)
    if kernel.quantization is not None:
        raise _usage(f"kernel {kernel.name!r} declares a quantized y: the search covers unquantized outputs only; "
                     "check it with refnorm check")
    if ops.get(kernel.op).replicas:
        raise _usage(f"kernel {kernel.name!r} is of op {kernel.op}, whose cases are shard plans run as processes "
                     "over a process group: the search draws one process's cases; check it with refnorm check")
    dtype = args.dtype or kernel.dtypes[0]
    if dtype not in kernel.dtypes:
        raise _usage(f"--dtype {dtype}: kernel {kernel.name!r} declares only {', '.join(kernel.dtypes)}")
    known = ops.get(kernel.op).outputs
    bad = [o for o in args.output if o not in known]
    if bad:
        raise _usage(f"--output {', '.join(bad)}: not an output of {kernel.op} (its outputs: {', '.join(known)})")
    overrides = dict(args.tolerance)
    command = "refnorm " + shlex.join(argv)
    worker = KeptWorker(kernel, seed=args.seed, timeout=args.timeout, spec=spec, overrides=overrides)
    try:
        with stop.interruptible():
            outcome = run_search(kernel, dtype, worker.run_one, evaluations=args.evaluations, seed=args.seed,
                                 focus=tuple(args.output), quiet=args.quiet)
    finally:
        worker.close()
    with stop.holding():  # a signal from here on waits until the files are written
        repro = None
        if out is not None and outcome.minimal is not None:
            m = outcome.minimal
            repro = out / "reproducer"
            write_reproducer(repro, kernel, m.case, args.seed, m.result, failing=m.outputs, evaluation=m.evaluation,
                             spec=spec, overrides=overrides, command=command)
        doc = summary_document(kernel, outcome, op=kernel.op, dtype=dtype, seed=args.seed, evaluations=args.evaluations,
                               shrink_evaluations=args.evaluations, focus=args.output, spec=spec, command=command,
                               reproducer=None if repro is None else str(repro))
        if out is not None:
            write_json_atomic(out / SUMMARY, doc)
    for line in summary_lines(doc):
        print(line)
    if repro is not None:
        print(f"rerun: refnorm check {shlex.quote(spec)} --replay {shlex.quote(str(repro))}")
    if out is not None:
        print(f"summary: {out / SUMMARY}")
    if outcome.interrupted is not None or stop.requested():
        return EXIT_INTERRUPTED
    return EXIT_FAIL if outcome.minimal is not None else EXIT_OK
