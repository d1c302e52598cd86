"""The report's command-line hooks (see conformance.cli.EXTENSIONS).

refnorm check SPEC ... --report DIR [--peers | --no-peers]
refnorm report RESULTS.json --out DIR [--peers | --no-peers]
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any, Sequence

__all__ = ["add_check_arguments", "add_commands", "prepare", "emit", "cmd_report"]

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


def _report_lines(paths: dict[str, Path]) -> list[str]:
    return [f"report: {paths['html']}", f"summary: {paths['markdown']}"]


def _need_plots(option: str) -> None:
    """The report's plots need matplotlib (the optional `report` extra): say so before any run."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        from ..cli import UsageError

        raise UsageError(f"{option} needs matplotlib for the report's plots, and it is not installed: install "
                         "the report extra (pip install 'refnorm[report]')") from None


def _report_folder(path: str, option: str) -> Path:
    from ..cli import UsageError
    from ..destinations import DestinationError, folder_target
    from . import FILES

    try:
        return folder_target(path, option, files=FILES.values())
    except DestinationError as e:
        raise UsageError(str(e)) from None


def prepare(args: argparse.Namespace) -> None:
    """Before `refnorm check` loads the kernel: the --report folder and matplotlib."""
    if getattr(args, "report", None) is None:
        if getattr(args, "peers", None):
            print("refnorm: note: --peers has an effect only with --report", file=sys.stderr)
        return
    args.report = _report_folder(args.report, "--report")
    _need_plots("--report")


def emit(args: argparse.Namespace, doc: dict[str, Any]) -> list[str]:
    """After a check: write the report folder when --report was given; return the lines naming it."""
    from . import gather_peers, write_report

    if not getattr(args, "report", None):
        return []
    quiet = getattr(args, "quiet", False)
    peers, note = gather_peers(doc, args.peers, quiet=quiet, stream=None if quiet else sys.stderr)
    lines = _report_lines(write_report(doc, args.report, peers=peers, peers_note=note))
    if _peers_interrupted(peers):
        from .. import stop

        if not stop.requested():  # under the command line's handlers the check already exits 3
            raise KeyboardInterrupt
    return lines


def _peers_interrupted(peers: dict[str, Any] | None) -> bool:
    if peers and peers.get("interrupted"):
        print("refnorm: the reference libraries' runs were interrupted; the report says which ran", file=sys.stderr)
        return True
    return False


def cmd_report(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from ..cli import EXIT_OK, UsageError
    from ..results import load
    from . import FILES, gather_peers, write_report

    src = Path(args.results)
    try:
        doc = load(src)
    except ValueError as e:  # conformance.documents.DocumentError: names the file and the field
        raise UsageError(f"RESULTS.json: {e}") from None
    out = _report_folder(args.out, "--out")
    _need_plots("refnorm report")
    stored = [out / FILES["peers"], src.parent / FILES["peers"]]
    peers, note = gather_peers(doc, args.peers, stored=stored, quiet=args.quiet,
                               stream=None if args.quiet else sys.stderr)
    for line in _report_lines(write_report(doc, out, peers=peers, peers_note=note)):
        print(line)
    if _peers_interrupted(peers):
        from ..cli import EXIT_INTERRUPTED

        return EXIT_INTERRUPTED
    return EXIT_OK
