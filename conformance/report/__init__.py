"""The tolerance report: one self-contained HTML page, a Markdown summary and the JSON results.

write_report(doc, out_dir, peers=...) writes into out_dir:

  report.html   the page: verdict banner, worst output, table per op/dtype/output,
                libraries side by side, failing cases with rerun commands, plots
                (PNG data: URIs drawn with matplotlib's Agg backend), declaration,
                environment and the caution; it loads nothing from a network
  report.md     the same essentials as Markdown for a pull-request comment
  results.json  the results document (conformance.results)
  peers.json    the peer libraries' runs on the same cases (when peers ran)
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any, Iterable, TextIO

from ..results import write_json_atomic

__all__ = ["write_report", "gather_peers", "FILES"]

#: File names inside a report folder.
FILES = {"html": "report.html", "markdown": "report.md", "results": "results.json", "peers": "peers.json"}


def _write_text(path: Path, text: str) -> Path:
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path


def gather_peers(doc: dict[str, Any], enabled: bool | None, *, stored: Iterable[str | os.PathLike] = (),
                 quiet: bool = True, stream: TextIO | None = None) -> tuple[dict[str, Any] | None, str]:
    """The peers document to show and, when there is none, why.

    enabled False: none. Otherwise a stored peers file that matches ``doc`` (same op, seed and
    cases) is reused; failing that the libraries run now (each one that is not installed or
    does not declare the dtype is recorded with the reason).
    """
    from . import peers as P

    if enabled is False:
        return None, "disabled (--no-peers)"
    if not doc.get("complete", True):
        return None, "the run was interrupted, so the libraries were not run"
    if not any(c["status"] != "skipped" for c in doc.get("cases", [])):
        return None, "no case ran, so there is nothing to compare"
    notes = []
    for path in stored:
        found, why = P.load_peers(path, doc)
        if found is not None:
            return found, ""
        if Path(path).exists():
            notes.append(why)
    return P.run_peers(doc, quiet=quiet, stream=stream), "; ".join(notes)


def write_report(doc: dict[str, Any], out_dir: str | os.PathLike, *, peers: dict[str, Any] | None = None,
                 peers_note: str = "") -> dict[str, Path]:
    """Write report.html, report.md, results.json (and peers.json when given) into out_dir."""
    from .html import render_html
    from .markdown import render_markdown
    from .plots import all_plots
    from .peers import write_peers

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    paths = {"results": write_json_atomic(out / FILES["results"], doc)}
    if peers is not None:
        paths["peers"] = write_peers(out / FILES["peers"], peers)
    paths["html"] = _write_text(out / FILES["html"], render_html(doc, all_plots(doc), peers, peers_note))
    paths["markdown"] = _write_text(out / FILES["markdown"], render_markdown(doc, peers, peers_note))
    return paths
