"""The report's command-line hooks (see conformance.cli.EXTENSIONS).

refnorm check SPEC ... --report DIR [--peers | --no-peers]
refnorm report RESULTS.json --out DIR [--peers | --no-peers]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any, Sequence

__all__ = ["add_check_arguments", "add_commands", "emit", "cmd_report"]

_PEERS_HELP = ("run the torch CPU and TF/Keras CPU adapters of the op on the same cases and seed, and show their "
               "errors beside the kernel's (default: on, for each library that is installed)")


def add_check_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--report", metavar="DIR", help="write report.html (self-contained), report.md and "
                        "results.json (and peers.json) into DIR")
    parser.add_argument("--peers", action=argparse.BooleanOptionalAction, default=None,
                        help=_PEERS_HELP + "; applies to --report")


def add_commands(subparsers: Any) -> None:
    r = subparsers.add_parser("report", help="render the report of a results file (from `check --json`)")
    r.add_argument("results", metavar="RESULTS.json", help="a results document written by refnorm check")
    r.add_argument("--out", required=True, metavar="DIR", help="folder for report.html, report.md, results.json")
    r.add_argument("--peers", action=argparse.BooleanOptionalAction, default=None,
                   help=_PEERS_HELP + "; a peers.json in DIR or beside RESULTS.json made for the same cases "
                   "and seed is reused instead of running them again")
    r.add_argument("--quiet", action="store_true", help="no progress output")
    r.set_defaults(func=cmd_report)


def _print_paths(paths: dict[str, Path]) -> None:
    print(f"report: {paths['html']}")
    print(f"summary: {paths['markdown']}")


def emit(args: argparse.Namespace, doc: dict[str, Any]) -> None:
    """After a check: write the report folder when --report was given."""
    from . import gather_peers, write_report

    if not getattr(args, "report", None):
        if getattr(args, "peers", None):
            print("refnorm: note: --peers has an effect only with --report", file=sys.stderr)
        return
    quiet = getattr(args, "quiet", False)
    peers, note = gather_peers(doc, args.peers, quiet=quiet, stream=None if quiet else sys.stderr)
    _print_paths(write_report(doc, args.report, peers=peers, peers_note=note))


def cmd_report(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from ..cli import EXIT_OK, UsageError
    from ..results import load
    from . import FILES, gather_peers, write_report

    src = Path(args.results)
    try:
        doc = load(src)
    except ValueError as e:  # conformance.documents.DocumentError: names the file and the field
        raise UsageError(f"RESULTS.json: {e}") from None
    out = Path(args.out)
    stored = [out / FILES["peers"], src.parent / FILES["peers"]]
    peers, note = gather_peers(doc, args.peers, stored=stored, quiet=args.quiet,
                               stream=None if args.quiet else sys.stderr)
    _print_paths(write_report(doc, out, peers=peers, peers_note=note))
    return EXIT_OK
