"""The report's plots, drawn with matplotlib's Agg backend into PNG bytes (no display, no pyplot state).

ulp_distribution  per dtype: the share of elements at each ULP distance, one line per output
error_vs_length   per dtype, one panel per output: each case's max |error| and its bound
                  against the reduction length, log-log
budget_used       per dtype: each (case, output)'s fraction of its bound used, sorted, with the 1.0 line
"""

from __future__ import annotations

import base64
import io
import math
import re
from dataclasses import dataclass
from typing import Any, Iterable

from ..cases.model import Case
from ..results import as_float
from ..text import visible

__all__ = ["Plot", "all_plots", "ulp_distribution", "error_vs_length", "budget_used", "reduction_length"]

#: Plotted magnitudes are kept within [1/_CAP, _CAP]: a log axis needs a positive floor below the
#: smallest value and decades of room above the largest (margins, the shaded band over 1.0), which
#: a float near its overflow threshold (or a subnormal) does not leave. Values beyond are treated as
#: the non-finite ones: counted, and drawn at the edge or left out with a note.
_CAP = 1e200

_ORDER = {"y": 0, "h": 0.5, "mean": 1, "rstd": 2, "var": 2, "var_unbiased": 2, "std": 2, "running_mean": 3,
          "running_var": 4, "dx": 5, "dweight": 6, "dbias": 7}


@dataclass
class Plot:
    """A drawn figure: PNG bytes, a title and a one-line caption saying what to look for."""

    key: str
    title: str
    caption: str
    png: bytes
    alt: str

    @property
    def data_uri(self) -> str:
        return "data:image/png;base64," + base64.b64encode(self.png).decode("ascii")


def _label(text: Any, limit: int = 60) -> str:
    """Text from a document (an output or dtype name) for a figure: one line, control characters
    visible, at most ``limit`` characters, and every "$" escaped so that matplotlib never parses it
    as mathtext (a name such as "$\\frac$" would otherwise fail to draw)."""
    t = visible(text).replace("\n", " ")
    if len(t) > limit:
        t = t[:limit - 1] + "…"
    if t.startswith("_"):  # matplotlib leaves labels that start with "_" out of legends
        t = " " + t
    return t.replace("$", r"\$")


def _finite(v: float) -> bool:
    """A value a log axis can place: finite, and no larger than _CAP."""
    return math.isfinite(v) and abs(v) <= _CAP


def _plain_log_ticks(axis) -> None:
    """Decade ticks only: minor ticks on a log axis over many decades cost seconds to lay out."""
    from matplotlib.ticker import LogLocator, NullLocator

    axis.set_major_locator(LogLocator(base=10, numticks=8))
    axis.set_minor_locator(NullLocator())


def _figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _png(fig) -> bytes:
    import warnings

    buf = io.BytesIO()
    with warnings.catch_warnings():
        # A name from a document may hold characters the font has no glyph for: they are drawn as
        # boxes, and matplotlib's warning about each one is noise in a report run's output.
        warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from font")
        warnings.filterwarnings("ignore", message=r"Matplotlib currently does not support")
        warnings.filterwarnings("ignore", message=r"constrained_layout not applied")
        fig.savefig(buf, format="png", dpi=100, metadata={"Software": None})
    return buf.getvalue()


def _colors(n: int) -> list:
    from matplotlib import colormaps

    cmap = colormaps["tab10"]
    return [cmap(i % 10) for i in range(n)]


def _ran(doc: dict[str, Any]) -> list[dict[str, Any]]:
    return [c for c in doc.get("cases", []) if c["status"] != "skipped" and c.get("outputs")]


def _dtypes(doc: dict[str, Any]) -> list[str]:
    seen: list[str] = []
    for c in _ran(doc):
        if c["case"]["dtype"] not in seen:
            seen.append(c["case"]["dtype"])
    return seen


def _outputs(cases: Iterable[dict[str, Any]]) -> list[str]:
    names = {o["name"] for c in cases for o in c["outputs"]}
    return sorted(names, key=lambda n: (_ORDER.get(n, 8), n))


def _bin_key(label: str) -> float:
    m = re.search(r"\d+", label)
    return float(m.group()) if m else math.inf


def _grid(n: int, max_cols: int) -> tuple[int, int]:
    cols = min(n, max_cols)
    return math.ceil(n / cols), cols


def ulp_distribution(doc: dict[str, Any]) -> Plot | None:
    """Share of elements per ULP-distance bin (summed over cases), one panel per dtype, a line per output."""
    dts = [d for d in _dtypes(doc) if any(o.get("ulp_hist") for c in _ran(doc) if c["case"]["dtype"] == d
                                          for o in c["outputs"])]
    if not dts:
        return None
    rows, cols = _grid(len(dts), 2)
    fig = _figure(11, 3.6 * rows)
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    for ax, dt in zip(axes, dts):
        cases = [c for c in _ran(doc) if c["case"]["dtype"] == dt]
        names = _outputs(cases)
        bins = sorted({b for c in cases for o in c["outputs"] for b in (o.get("ulp_hist") or {})}, key=_bin_key)
        pos = {b: i for i, b in enumerate(bins)}
        for name, color in zip(names, _colors(len(names))):
            counts = [0] * len(bins)
            for c in cases:
                for o in c["outputs"]:
                    if o["name"] == name:
                        for b, k in (o.get("ulp_hist") or {}).items():
                            counts[pos[b]] += int(k)
            total = sum(counts)
            if not total:
                continue
            # NaN at empty bins breaks the line there: a segment never bridges bins with no element.
            ys = [k / total if k else math.nan for k in counts]
            ax.plot(range(len(bins)), ys, marker="o", ms=4, lw=1.4, color=color, label=_label(name))
        ax.set_yscale("log")
        _plain_log_ticks(ax.yaxis)
        ax.set_xticks(range(len(bins)))
        ax.set_xticklabels([_label(b) for b in bins], rotation=45 if len(bins) > 8 else 0, fontsize=8)
        ax.set_xlabel("ULP distance from the oracle (in the output's dtype)", fontsize=9)
        ax.set_ylabel("share of elements")
        ax.set_title(f"{_label(dt)} storage", fontsize=10)
        ax.grid(True, which="major", alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=8, ncol=2)
    for ax in axes[len(dts):]:
        ax.set_visible(False)
    return Plot(key="ulp", title="Distribution of ULP errors per output", png=_png(fig),
                alt="share of elements at each ULP distance, per output and dtype",
                caption="Look at the right tail: mass beyond the first few bins means some elements are many "
                        "representable values off, even where every bound holds.")


def reduction_length(case: dict[str, Any], output: str) -> int:
    """The reduction behind an output: Case.param_length for dweight/dbias, else Case.group_length."""
    c = Case.from_dict(case)
    return c.param_length if output in ("dweight", "dbias") else c.group_length


_LENGTH_STYLE = {
    "pass": dict(marker="o", ms=5, color="#1f6fb4", alpha=0.75),
    "fail": dict(marker="o", ms=5, color="#c0262d", alpha=0.75),
    "exact_pass": dict(marker="v", ms=5, color="#1f6fb4", alpha=0.6),
    "exact_fail": dict(marker="v", ms=5, color="#c0262d", alpha=0.6),
    "bound": dict(marker="^", ms=6, mfc="none", mec="#444444", mew=1.0),
    "bound_max": dict(marker="_", ms=9, color="#444444", mew=1.4),
}


def _length_panel(ax, name: str, cases: list[dict[str, Any]]) -> tuple[set[str], int]:
    """One output's panel; returns the series drawn and the count of points left out (a non-finite or
    off-scale error, or a reduction of no element, which a group norm with more groups than channels has)."""
    series: dict[str, tuple[list[float], list[float]]] = {k: ([], []) for k in _LENGTH_STYLE}
    pts = []  # (n, max |error|, bound at the worst element, largest bound of the case, passed)
    for c in cases:
        for o in c["outputs"]:
            if o["name"] == name:
                pts.append((float(reduction_length(c["case"], name)), as_float(o.get("max_abs")),
                            as_float(o.get("worst_bound")), as_float((o.get("bound") or {}).get("max")),
                            bool(o.get("passed"))))
    finite_pos = [max(v, 1 / _CAP) for _, e, b, _, _ in pts for v in (e, b) if _finite(v) and v > 0]
    floor = min(finite_pos) / 10 if finite_pos else 1e-30
    nonfinite = 0
    for n, e, b, bmax, ok in pts:
        if not _finite(e) or n < 1:
            nonfinite += 1
            continue
        tag = "pass" if ok else "fail"
        # A log axis has no zero: exact (and nonsensical negative) errors are drawn on the floor.
        key, y = (tag, max(e, 1 / _CAP)) if e > 0 else ("exact_" + tag, floor)
        series[key][0].append(n)
        series[key][1].append(y)
        if _finite(b) and b > 0:
            series["bound"][0].append(n)
            series["bound"][1].append(max(b, 1 / _CAP))
        if _finite(bmax) and bmax > 0 and not (_finite(b) and bmax <= b * 1.0001):
            series["bound_max"][0].append(n)
            series["bound_max"][1].append(max(bmax, 1 / _CAP))
    drawn = set()
    for k, (xs, ys) in series.items():
        if xs:
            ax.plot(xs, ys, ls="", **_LENGTH_STYLE[k])
            drawn.add(k)
    if drawn:
        ax.set_xscale("log")
        ax.set_yscale("log")
        _plain_log_ticks(ax.xaxis)
        _plain_log_ticks(ax.yaxis)
    else:  # every error of this output is NaN or infinite: a log axis would have nothing to place
        ax.text(0.5, 0.5, "no finite error to draw", transform=ax.transAxes, ha="center", va="center",
                fontsize=9, color="#5b6470")
    ax.set_title(_label(name), fontsize=10)
    ax.set_xlabel("reduction length n", fontsize=8)
    ax.set_ylabel("|kernel − oracle|", fontsize=8)
    ax.tick_params(labelsize=7)
    ns = [p[0] for p in pts if p[0] > 0]
    if ns and drawn:  # whole decades, so that the axis always has labelled ticks
        ax.set_xlim(10.0 ** math.floor(math.log10(min(ns)) - 0.05), 10.0 ** math.ceil(math.log10(max(ns)) + 0.05))
    ax.grid(True, which="major", alpha=0.3)
    return drawn, nonfinite


def error_vs_length(doc: dict[str, Any]) -> list[Plot]:
    """Per dtype: a log-log panel per output of each case's max |error| (dots), the bound at its worst
    element (triangles) and the largest bound of the case (dashes)."""
    from matplotlib.lines import Line2D

    labels = {"pass": "max |error|, passed", "fail": "max |error|, failed",
              "exact_pass": "exact (0), drawn at the floor", "exact_fail": "exact (0) but failed",
              "bound": "bound at the worst element", "bound_max": "largest bound of the case"}
    plots = []
    for dt in _dtypes(doc):
        cases = [c for c in _ran(doc) if c["case"]["dtype"] == dt]
        names = _outputs(cases)
        rows, cols = _grid(len(names), 4)
        fig = _figure(11, 2.7 * rows + 0.3)
        axes = fig.subplots(rows, cols, squeeze=False).ravel()
        drawn: set[str] = set()
        nonfinite = 0
        for ax, name in zip(axes, names):
            d, k = _length_panel(ax, name, cases)
            drawn |= d
            nonfinite += k
        for ax in axes[len(names):]:
            ax.set_visible(False)
        handles = [Line2D([], [], ls="", label=labels[k], **_LENGTH_STYLE[k]) for k in _LENGTH_STYLE if k in drawn]
        fig.legend(handles=handles, loc="outside lower center", ncol=max(1, len(handles)), fontsize=8, frameon=False)
        note = (f" {nonfinite} point(s) with a non-finite error (NaN/Inf mismatches) or none to place on "
                "the axes are not drawn; see the table."
                if nonfinite else "")
        plots.append(Plot(key=f"length-{dt}", title=f"Error against reduction length ({dt})", png=_png(fig),
                          alt=f"max absolute error and bound against reduction length, {dt}",
                          caption="Look for dots that climb toward their triangles as n grows: an error that "
                                  "outgrows its bound with length is an accumulation the precision model does "
                                  "not describe (n is the group length; the parameter length for dweight/dbias)."
                                  + note))
    return plots


def budget_used(doc: dict[str, Any]) -> Plot | None:
    """Per dtype: every (case, output)'s fraction of the bound used, sorted, with the pass line at 1.0."""
    dts = _dtypes(doc)
    if not dts:
        return None
    rows, cols = _grid(len(dts), 2)
    fig = _figure(11, 3.6 * rows)
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    for ax, dt in zip(axes, dts):
        cases = [c for c in _ran(doc) if c["case"]["dtype"] == dt]
        names = _outputs(cases)
        color = dict(zip(names, _colors(len(names))))
        pts = sorted(((as_float(o.get("budget_used", 0.0)), o["name"]) for c in cases for o in c["outputs"]),
                     key=lambda p: (math.isnan(p[0]), p[0]))
        pos = [max(b, 1 / _CAP) for b, _ in pts if _finite(b) and b > 0]
        big = [b for b, _ in pts if not _finite(b)]
        log = bool(pos) and (max(pos) / min(pos) > 1e3)
        floor = (min(pos) / 3 if pos else 1e-6) if log else 0.0
        top = max(pos + [1.0]) * (3 if log else 1.1)
        for name in names:
            xs = [i for i, (b, nm) in enumerate(pts) if nm == name]
            ys = []
            for i in xs:
                b = pts[i][0]
                ys.append(top if not _finite(b) else (max(b, 1 / _CAP) if b > 0 else (floor if log else 0.0)))
            ax.plot(xs, ys, "o", ms=4, color=color[name], label=_label(name), alpha=0.85)
        ax.axhline(1.0, color="#c0262d", lw=1.2, ls="--")
        ax.axhspan(1.0, top * 10, color="#c0262d", alpha=0.05, lw=0)
        ax.text(0.01, 1.0, " bound (1.0)", color="#c0262d", fontsize=8, va="bottom",
                transform=ax.get_yaxis_transform())
        if log:
            ax.set_yscale("log")
            _plain_log_ticks(ax.yaxis)
            ax.set_ylim(floor, top * 1.5)
        else:
            ax.set_ylim(0, top)
        ax.set_xlabel(f"(case, output) pairs, sorted ({len(pts)})")
        ax.set_ylabel("fraction of the bound used")
        title = _label(dt) + (f" — {len(big)} non-finite or off-scale drawn at the top" if big else "")
        ax.set_title(title, fontsize=10)
        ax.grid(True, which="major", alpha=0.3)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(fontsize=8, ncol=2, loc="upper left")
    for ax in axes[len(dts):]:
        ax.set_visible(False)
    return Plot(key="budget", title="Fraction of the bound used per case", png=_png(fig),
                alt="fraction of the bound used by each case and output, sorted, with the 1.0 line",
                caption="Points above the dashed 1.0 line failed; a crowd just under it means the kernel passes "
                        "with little headroom, and a case or seed more could tip it over.")


def all_plots(doc: dict[str, Any]) -> list[Plot]:
    """Every plot the document supports, in report order."""
    out: list[Plot] = []
    b = budget_used(doc)
    if b:
        out.append(b)
    u = ulp_distribution(doc)
    if u:
        out.append(u)
    out += error_vs_length(doc)
    return out
