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

import contextlib
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any, Callable, Iterable, Iterator, TextIO

from ..results import write_json_atomic

__all__ = ["write_report", "gather_peers", "FILES"]

#: File names inside a report folder.
FILES = {"html": "report.html", "markdown": "report.md", "results": "results.json", "peers": "peers.json"}


@contextlib.contextmanager
def _folder_lock(folder: Path) -> Iterator[None]:
    """Hold an exclusive lock on the report folder itself (flock(2) on its directory), so that two
    runs writing into one folder install their files one after the other. No lock file is left
    behind. Where flock is not available (Windows) the files are still each replaced atomically."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        yield
        return
    fd = os.open(folder, os.O_RDONLY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)  # closing the last descriptor releases the lock


def _install(out: Path, files: dict[str, str | dict[str, Any]],
             stale: dict[str, Callable[[Path], bool]] | None = None) -> dict[str, Path]:
    """Write ``files`` (name -> text, or a JSON document) into ``out`` as one unit.

    Each file is written in full into a temporary folder inside ``out`` (same file system), then,
    under the folder's lock, every one is renamed into place (rename(2) replaces atomically) and each
    file named in ``stale`` whose test says it does not belong with them is deleted. A second run
    into the same folder waits for the lock, so the folder always ends with the files of one run;
    nothing temporary is left behind, even on error.
    """
    out.mkdir(parents=True, exist_ok=True)
    stage = Path(tempfile.mkdtemp(prefix=".refnorm-report-", dir=out))
    try:
        staged = {}
        for name, content in files.items():
            if isinstance(content, str):
                data = content.encode("utf-8")  # the renderers leave no lone surrogate (conformance.text)
                (stage / name).write_bytes(data)
                mask = os.umask(0)
                os.umask(mask)
                os.chmod(stage / name, 0o666 & ~mask)
            else:
                write_json_atomic(stage / name, content)
            staged[name] = stage / name
        paths = {}
        with _folder_lock(out):
            for name, src in staged.items():
                os.replace(src, out / name)
                paths[name] = out / name
            for name, is_stale in (stale or {}).items():
                if (out / name).is_file() and is_stale(out / name):
                    with contextlib.suppress(FileNotFoundError):
                        (out / name).unlink()
        return paths
    finally:
        shutil.rmtree(stage, ignore_errors=True)


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
    """Write report.html, report.md, results.json (and peers.json when given) into out_dir, as one unit.

    Everything is rendered before anything is written; the files then replace those of an earlier
    run together (see _install). Without peers, a peers.json already in the folder stays only if it
    was made for these results (same op, seed and cases): it is never left beside results it does
    not belong to.
    """
    from .html import render_html
    from .markdown import render_markdown
    from .plots import all_plots

    out = Path(out_dir)
    files: dict[str, str | dict[str, Any]] = {
        FILES["results"]: doc,
        FILES["html"]: render_html(doc, all_plots(doc), peers, peers_note),
        FILES["markdown"]: render_markdown(doc, peers, peers_note),
    }
    if peers is not None:
        files[FILES["peers"]] = peers
    from .peers import load_peers

    stale = {} if peers is not None else {FILES["peers"]: lambda p: load_peers(p, doc)[0] is None}
    written = _install(out, files, stale)
    return {key: written[name] for key, name in FILES.items() if name in written}
