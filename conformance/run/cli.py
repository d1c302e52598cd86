"""`refnorm merge`: the results files of a sharded run put back together (registered through
conformance.cli.EXTENSIONS; docs/ci.md, "Sharding a run over several machines").

refnorm merge SHARD.json ... [--json PATH] [--report DIR] [--junit PATH] [--profile PATH] [--baseline OLD.json]

Exit codes as `refnorm check`: 0 conformant (with --profile or --baseline: the gate passes), 1 not
conformant (the gate fails), 2 bad usage or files that are not the shards of one run (nothing is
written), 3 the merged results do not cover the selection (a shard missing or interrupted; the merged
document is still written, marked incomplete).
"""

from __future__ import annotations

import argparse
import shlex
from typing import Any, Sequence

__all__ = ["add_commands", "cmd_merge"]


def add_commands(subparsers: Any) -> None:
    from ..gate.cli import DocumentGate
    from ..report import cli as report_cli

    m = subparsers.add_parser(
        "merge", help="put the results files of a sharded run (check --shard K/N) back together",
        description="Combine the results documents of `refnorm check ... --shard K/N` (one per shard) into the "
                    "document of the whole run, as the unsharded run would have written it; refuse documents that "
                    "are not the shards of one run. The merged document takes --report, --junit, --profile and "
                    "--baseline as `refnorm check` does.")
    m.add_argument("shards", nargs="+", metavar="SHARD.json", help="the shards' results files (any order)")
    m.add_argument("--json", metavar="PATH", help="write the merged results document (JSON) here")
    DocumentGate.add_arguments(m)
    report_cli.add_check_arguments(m)
    m.add_argument("--quiet", action="store_true", help="no progress output")
    m.set_defaults(func=cmd_merge)


class _MergeLines:
    """What the merge put together, printed after the verdict."""

    def verdict_lines(self, args: argparse.Namespace, doc: dict[str, Any]) -> list[str]:
        from ..text import visible
        from .merge import merged_lines

        lines = merged_lines(doc)
        return [""] + [visible(x) for x in lines] if lines else []


def cmd_merge(args: argparse.Namespace, argv: Sequence[str]) -> int:
    from .. import cli
    from ..gate.cli import DocumentGate
    from ..report import cli as report_cli
    from .merge import merge_documents, read_shards

    hooks = [report_cli, DocumentGate("merge", "by the shards' runs (run.overrides)"), _MergeLines()]
    cli.prepare_outputs(args, hooks)
    try:
        doc = merge_documents(read_shards(args.shards), command="refnorm " + shlex.join(argv))
    except ValueError as e:  # MergeError, or conformance.documents.DocumentError naming the file and the field
        raise cli.UsageError(str(e)) from None
    return cli.finish(args, doc, hooks)
