"""The report's pictures, drawn with matplotlib and returned as inline SVG text.

Three pictures per metric (see :mod:`monitor.present.report` for what they mean):

* :func:`box_svg` — the segments of one period side by side, one box each;
* :func:`trend_svg` — each segment's mean with its 95% interval over the recent
  periods, one small panel per segment with the other segments drawn faintly behind
  (written as SVG directly, text outlined as matplotlib does: see its notes);
* :func:`qvalue_svg` — the metric's q-value over the periods on a log scale, with
  the false-discovery level and the periods' events marked.

Design rules, written down once
-------------------------------
* The object-oriented API only (:class:`matplotlib.figure.Figure`, no ``pyplot``), so
  no backend is selected and no figure is kept; rcParams are set in a context, under a
  lock because they are process-wide.
* Text is drawn as outlines (``svg.fonttype: path``) with the DejaVu font that ships
  inside matplotlib: the picture looks the same everywhere and no font is fetched.
* Colours come from the Okabe & Ito (2008) palette, which stays distinguishable under
  the common colour-vision deficiencies; no meaning is carried by colour alone (a
  flagged segment also gets a marker shape and words, events get distinct shapes).
* Each SVG gets ``role="img"``, an ``aria-label`` and a ``<title>``; its element ids are
  prefixed with a per-picture key so several pictures can share one HTML page; the
  width and height are dropped so the page's CSS sizes it.

References
----------
Okabe, M. and Ito, K. (2008). Color Universal Design (CUD): how to make figures and
presentations that are friendly to colorblind people. J*FLY data depository.
"""

from __future__ import annotations

import functools
import html
import io
import logging
import math
import re
import threading
from dataclasses import dataclass
from typing import Sequence

import matplotlib
from matplotlib.figure import Figure
from matplotlib.font_manager import FontProperties
from matplotlib.lines import Line2D
from matplotlib.patches import Rectangle
from matplotlib.path import Path
from matplotlib.textpath import TextToPath
from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullFormatter

log = logging.getLogger(__name__)

# Okabe & Ito (2008)
INK = "#1f2a36"
GREY = "#9aa3ad"
FAINT = "#d5dae0"
BOX = "#c9d6e3"
HIGH = "#D55E00"  # vermillion
LOW = "#0072B2"  # blue
GREEN = "#009E73"  # bluish green
ORANGE = "#E69F00"
PURPLE = "#CC79A7"

# rcParams are process-wide: one picture at a time (``serve`` may write reports from several threads)
_LOCK = threading.RLock()

FLAG_COLOUR = {"high": HIGH, "low": LOW}
FLAG_MARK = {"high": "▲", "low": "▼"}

RC = {
    "svg.fonttype": "path",
    "svg.hashsalt": "segwatch",  # stable ids: the same data draws the same SVG
    "font.family": "DejaVu Sans",
    "font.size": 9,
    "axes.edgecolor": GREY,
    "axes.labelcolor": INK,
    "axes.titlesize": 9,
    "axes.titleweight": "bold",
    "axes.titlecolor": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "xtick.color": "#56606b",
    "ytick.color": "#56606b",
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "grid.color": "#e6e9ed",
    "grid.linewidth": 0.8,
    "legend.frameon": False,
    "figure.facecolor": "none",
    "axes.facecolor": "none",
}


@dataclass(frozen=True)
class Box:
    """One segment's box: quantiles (q05, q25, q50, q75, q95) when stored; without them
    a bar from ``low`` to ``high`` (mean ± sd, or an interval) around the ``mean``."""

    segment: str
    n: int
    mean: float
    low: float = math.nan
    high: float = math.nan
    quantiles: tuple[float, ...] = ()
    flag: str | None = None
    excluded: bool = False


@dataclass(frozen=True)
class Point:
    """A segment's mean in one period with its 95% interval (NaN when it cannot be formed)."""

    index: int  # position of the period in the window
    mean: float
    low: float
    high: float
    flag: str | None = None


def _figure(width: float, height: float, *, left: float = 0.75, right: float = 0.12, top: float = 0.12,
            bottom: float = 0.45, hspace: float = 0.2, wspace: float = 0.2) -> Figure:
    """A figure with fixed margins in inches (no layout engine: it would draw every picture twice)."""
    fig = Figure(figsize=(width, height), dpi=100)
    fig.subplots_adjust(left=left / width, right=1 - right / width, top=1 - top / height, bottom=bottom / height,
                        hspace=hspace, wspace=wspace)
    return fig


def _finite(*xs: float) -> bool:
    return all(x is not None and math.isfinite(x) for x in xs)


def box_svg(boxes: Sequence[Box], *, key: str, label: str, ylabel: str, log_scale: bool = False) -> str:
    """Segments side by side: box from q25 to q75, median line, whiskers at q05 and q95,
    mean as a diamond. A segment without quantiles is drawn as a bar from ``low`` to
    ``high`` with a dot at the mean. Flagged segments are coloured and carry ▲/▼ under
    their name. ``log_scale`` draws the value axis logarithmically."""
    with _LOCK, matplotlib.rc_context(RC):
        fig = _figure(8.4, 3.1, bottom=0.5, top=0.1)
        ax = fig.add_subplot()
        if log_scale:
            _log_axis(ax)
        ax.grid(axis="y")
        ax.set_axisbelow(True)
        names = []
        for i, b in enumerate(boxes):
            colour = FLAG_COLOUR.get(b.flag or "", INK)
            face = {"high": "#f6d5c0", "low": "#c6dcec"}.get(b.flag or "", BOX)
            if b.excluded:
                colour, face = GREY, "none"
            if len(b.quantiles) == 5 and all(_finite(q) for q in b.quantiles):
                q05, q25, q50, q75, q95 = b.quantiles
                ax.vlines(i, q05, q25, color=colour, linewidth=1.2)
                ax.vlines(i, q75, q95, color=colour, linewidth=1.2)
                ax.hlines([q05, q95], i - 0.12, i + 0.12, color=colour, linewidth=1.2)
                ax.add_patch(Rectangle(
                    (i - 0.3, q25), 0.6, q75 - q25, facecolor=face, edgecolor=colour, linewidth=1.2,
                    hatch="///" if b.excluded else None))
                ax.hlines(q50, i - 0.3, i + 0.3, color=colour, linewidth=2.4)
                if _finite(b.mean):
                    ax.plot(i, b.mean, marker="D", markersize=4.5, markerfacecolor="white",
                            markeredgecolor=colour, markeredgewidth=1.2, linestyle="none")
            elif _finite(b.mean):
                if _finite(b.low, b.high):
                    ax.vlines(i, b.low, b.high, color=colour, linewidth=2.0)
                    ax.hlines([b.low, b.high], i - 0.12, i + 0.12, color=colour, linewidth=1.2)
                ax.plot(i, b.mean, marker="o", markersize=5.5, color=colour, linestyle="none")
            mark = FLAG_MARK.get(b.flag or "", "")
            tail = "left out" if b.excluded else f"n={b.n}"
            names.append(f"{b.segment}\n{mark + ' ' if mark else ''}{tail}")
        ax.set_xticks(range(len(boxes)), names)
        for tick, b in zip(ax.get_xticklabels(), boxes):
            tick.set_color(FLAG_COLOUR.get(b.flag or "", GREY if b.excluded else INK))
        ax.tick_params(axis="x", length=0)
        ax.set_xlim(-0.6, len(boxes) - 0.4)
        ax.set_ylabel(ylabel)
        ax.margins(y=0.06)
        return _to_svg(fig, key, label)


def _log_axis(ax) -> None:
    """A logarithmic value axis labelled with plain numbers at 1, 2 and 5 times powers of ten."""
    ax.set_yscale("log")
    ax.yaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _pos: f"{v:g}"))
    ax.yaxis.set_minor_formatter(NullFormatter())


def _short_labels(periods: Sequence[str]) -> list[str]:
    """Drop a year prefix the periods share: 2026-W09 -> W09, 2026-02-03 -> 02-03."""
    years = {p[:4] for p in periods}
    if len(years) == 1 and all(len(p) > 5 and p[4] == "-" for p in periods):
        return [p[5:] for p in periods]
    return list(periods)


def _period_ticks(ax, periods: Sequence[str], most: int = 6) -> None:
    """At most ``most`` evenly spaced period labels, counted back from the latest one."""
    n = len(periods)
    step = max(1, math.ceil((n - 1) / max(1, most - 1))) if n > 1 else 1
    idx = list(range(n - 1, -1, -step))[::-1]
    labels = _short_labels(periods)
    ax.set_xticks(idx, [labels[i] for i in idx])
    ax.set_xlim(-0.5, n - 0.5)


def trend_svg(series: Sequence[tuple[str, Sequence[Point]]], periods: Sequence[str], *, key: str,
              label: str, ylabel: str, columns: int = 4, log_scale: bool = False) -> str:
    """One small panel per segment: its mean and 95% interval per period (dark), the other
    segments' means behind it (light grey); a period where the segment was flagged
    gets a coloured ▲ (high) or ▼ (low) marker.

    Written as SVG directly (lines, markers, text as DejaVu Sans outlines), not
    through a matplotlib figure: a grid of small panels is mostly axes, ticks and labels, which
    matplotlib builds as many artists per panel (about 0.4 s of CPU per metric for 8
    panels); here each panel is a few elements. The value axis (shared by every panel)
    takes its ticks from matplotlib's locators, so it reads like the other pictures.
    """
    if log_scale:  # a value the log axis cannot show is left out, as matplotlib masks it
        def pos(v: float) -> float:
            return v if _finite(v) and v > 0 else math.nan
        series = [(s, [Point(p.index, pos(p.mean), pos(p.low), pos(p.high), p.flag) for p in pts])
                  for s, pts in series]
    k = max(1, len(series))
    cols = min(columns, k)
    rows = math.ceil(k / cols)
    n = len(periods)
    width, left, right, gap = 840.0, 62.0, 10.0, 10.0
    panel_w = (width - left - right - gap * (cols - 1)) / cols
    panel_h, title_h, axis_h, vgap = 128.0, 18.0, 18.0, 14.0
    height = 8.0 + rows * (title_h + panel_h + axis_h) + (rows - 1) * vgap
    values = [v for _, pts in series for p in pts for v in (p.mean, p.low, p.high) if _finite(v)]
    lo, hi = (min(values), max(values)) if values else (0.0, 1.0)
    ticks, fwd = _value_axis(lo, hi, log_scale)
    lo_t, hi_t = fwd(ticks[0]), fwd(ticks[-1])
    span = (hi_t - lo_t) or 1.0
    xs = _period_tick_index(n, most=4)
    short = _short_labels(periods)

    out: list[str] = []
    for i, (segment, points) in enumerate(series):
        r, c = divmod(i, cols)
        x0 = left + c * (panel_w + gap)
        y0 = 8.0 + r * (title_h + panel_h + axis_h + vgap) + title_h

        def px(ix: float) -> float:
            return x0 + (ix + 0.5) / max(n, 1) * panel_w

        def py(v: float) -> float:
            return y0 + panel_h * (1 - (fwd(v) - lo_t) / span)

        out.append(_text(segment, x0, y0 - 5, colour=INK, bold=True))
        grid = "".join(f"M{x0:.1f} {py(t):.1f}H{x0 + panel_w:.1f}" for t in ticks)
        out.append(f'<path d="{grid}" stroke="#e6e9ed" stroke-width="0.8" fill="none"/>')
        out.append(f'<path d="M{x0:.1f} {y0:.1f}V{y0 + panel_h:.1f}H{x0 + panel_w:.1f}" stroke="{GREY}" '
                   'stroke-width="0.8" fill="none"/>')
        faint = "".join(_polyline(opts, n, px, py) for other, opts in series if other != segment)
        if faint:
            out.append(f'<path d="{faint}" stroke="{FAINT}" stroke-width="1" fill="none"/>')
        bars = "".join(f"M{px(p.index):.1f} {py(p.low):.1f}V{py(p.high):.1f}" for p in points
                       if _finite(p.low, p.high))
        if bars:
            out.append(f'<path d="{bars}" stroke="{INK}" stroke-opacity="0.55" stroke-width="1" fill="none"/>')
        own = _polyline(points, n, px, py)
        if own:
            out.append(f'<path d="{own}" stroke="{INK}" stroke-width="1.4" fill="none"/>')
        for p in points:
            if not _finite(p.mean):
                continue
            x, y = px(p.index), py(p.mean)
            if p.flag == "high":
                out.append(f'<path d="M{x:.1f} {y - 4.5:.1f}L{x + 4.2:.1f} {y + 3:.1f}H{x - 4.2:.1f}Z" fill="{HIGH}"/>')
            elif p.flag == "low":
                out.append(f'<path d="M{x:.1f} {y + 4.5:.1f}L{x + 4.2:.1f} {y - 3:.1f}H{x - 4.2:.1f}Z" fill="{LOW}"/>')
            else:
                out.append(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="1.9" fill="{INK}"/>')
        base = y0 + panel_h
        out.append("".join(_text(short[ix], px(ix), base + 13, anchor="middle") for ix in xs))
        if c == 0:
            out.append("".join(_text(_tick_text(t), x0 - 4, py(t) + 3.5, anchor="end") for t in ticks))
            out.append(_text(ylabel, x0 - 44, y0 + panel_h / 2, colour=INK, anchor="middle", rotate=True))
    safe = html.escape(label, quote=True)
    return (f'<svg class="chart" role="img" aria-label="{safe}" viewBox="0 0 {width:.0f} {height:.0f}" '
            f'preserveAspectRatio="xMidYMid meet">'
            f"<title>{html.escape(label)}</title>{''.join(out)}</svg>")


_TEXT_PATHS = TextToPath()
_PATH_STEPS = {Path.MOVETO: ("M", 1), Path.LINETO: ("L", 1), Path.CURVE3: ("Q", 2), Path.CURVE4: ("C", 3)}


@functools.lru_cache(maxsize=4096)
def _outline(text: str, size: float, bold: bool) -> tuple[str, float]:
    """SVG path data of ``text`` in DejaVu Sans at ``size`` (y down, baseline at 0) and its width.

    The same outlines matplotlib writes under ``svg.fonttype: path``, so no font is
    needed to show the picture; cached, since labels repeat from picture to picture.
    """
    prop = FontProperties(family="DejaVu Sans", size=size, weight="bold" if bold else "normal")
    with _LOCK:  # the font objects are shared by the process's threads
        verts, codes = _TEXT_PATHS.get_text_path(prop, text)
        width = _TEXT_PATHS.get_text_width_height_descent(text, prop, ismath=False)[0]
    d, i = [], 0
    while i < len(codes):
        code = codes[i]
        if code == Path.CLOSEPOLY:
            d.append("Z")
            i += 1
            continue
        letter, count = _PATH_STEPS.get(code, ("L", 1))
        pts = verts[i:i + count]
        d.append(letter + " ".join(f"{x:.2f} {-y:.2f}" for x, y in pts))
        i += count
    return "".join(d), float(width)


def _text(text: str, x: float, y: float, *, colour: str = "#56606b", size: float = 11.0, bold: bool = False,
          anchor: str = "start", rotate: bool = False) -> str:
    """``text`` as an outlined path with its baseline at (x, y); ``anchor`` start, middle or end."""
    if not text:
        return ""
    d, width = _outline(text, size, bold)
    shift = {"start": 0.0, "middle": -width / 2, "end": -width}[anchor]
    turn = " rotate(-90)" if rotate else ""
    return f'<path transform="translate({x:.1f} {y:.1f}){turn} translate({shift:.2f} 0)" d="{d}" fill="{colour}"/>'


def _value_axis(lo: float, hi: float, log_scale: bool):
    """Ticks covering [lo, hi] from matplotlib's locators (no figure drawn) and the axis mapping."""
    if log_scale:
        lo, hi = max(lo, 1e-300), max(hi, lo * 1.0001)
        ticks = [t for t in LogLocator(base=10, subs=(1.0, 2.0, 5.0)).tick_values(lo, hi)]
        below = [t for t in ticks if t <= lo]
        above = [t for t in ticks if t >= hi]
        inside = [t for t in ticks if lo < t < hi]
        ticks = [below[-1] if below else lo, *inside, above[0] if above else hi]
        return ticks, math.log10
    if hi - lo <= 0:
        lo, hi = lo - 0.5, hi + 0.5
    ticks = list(MaxNLocator(nbins=5).tick_values(lo, hi))
    return ticks, (lambda v: v)


def _tick_text(v: float) -> str:
    return f"{v:g}" if abs(v) >= 1e-4 or v == 0 else f"{v:.1e}"


def _period_tick_index(n: int, most: int = 6) -> list[int]:
    """At most ``most`` evenly spaced period positions, counted back from the latest one."""
    step = max(1, math.ceil((n - 1) / max(1, most - 1))) if n > 1 else 1
    return list(range(n - 1, -1, -step))[::-1]


def _polyline(points: Sequence[Point], n: int, px, py) -> str:
    """SVG path data through the finite means in period order, broken where a period has none."""
    xs, ys = _line(points, n)
    d, pen = [], False
    for x, y in zip(xs, ys):
        if not _finite(y):
            pen = False
            continue
        d.append(f"{'L' if pen else 'M'}{px(x):.1f} {py(y):.1f}")
        pen = True
    return "".join(d) if any(part.startswith("L") for part in d) else ""


def _line(points: Sequence[Point], n: int) -> tuple[list[float], list[float]]:
    """x and y for a line with gaps where a period has no mean."""
    ys = [math.nan] * n
    for p in points:
        ys[p.index] = p.mean if _finite(p.mean) else math.nan
    return list(range(n)), ys


EVENT_STYLE = {
    # kind: (marker, colour, words for the caption, words for the legend)
    "emerged": ("^", HIGH, "difference emerged", "emerged"),
    "cleared": ("v", GREEN, "difference cleared", "cleared"),
    "assumption_broken": ("X", ORANGE, "assumption check failed", "check failed"),
}

Q_FLOOR = 1e-12


def qvalue_svg(periods: Sequence[str], q: Sequence[float], level: float,
               events: Sequence[tuple[int, str]], *, key: str, label: str,
               failing: Sequence[bool] = (), significant: Sequence[bool] | None = None) -> str:
    """The q-value per period on a log scale (values below 1e-12 drawn at 1e-12), the
    false-discovery level as a dashed line (none when ``level`` is NaN: not recorded),
    filled dots where significant (``significant``: each period's stored verdict;
    default q at or below ``level``), a light band behind the periods where a watched
    assumption check failed, and a strip of event markers above the chart (one marker
    per kind per period)."""
    with _LOCK, matplotlib.rc_context(RC):
        fig = _figure(8.4, 2.7, right=0.5, top=0.05, bottom=0.62, hspace=0.08)
        strip, ax = fig.subplots(2, 1, sharex=True, height_ratios=[0.5, 5])
        ax.set_yscale("log")
        ax.grid(axis="y", which="major")
        ax.set_axisbelow(True)
        xs = list(range(len(periods)))
        ys = [max(v, Q_FLOOR) if _finite(v) else math.nan for v in q]
        finite = [y for y in ys if _finite(y)]
        has_level = _finite(level)
        floor = [level / 10] if has_level else []
        bottom = min([*floor, *finite]) / 3 if finite else (level / 100 if has_level else 1e-3)
        if significant is None:
            significant = [_finite(v) and has_level and v <= level for v in ys]
        ax.set_ylim(bottom, 1.6)
        shaded = False
        for i, bad in enumerate(failing):
            if bad:
                ax.axvspan(i - 0.5, i + 0.5, color="#fbe9c6", linewidth=0, zorder=0)
                shaded = True
        if has_level:
            ax.axhline(level, color=HIGH, linestyle=(0, (5, 3)), linewidth=1.2, zorder=2)
            ax.annotate(f"level\n{level:g}", (1, level), xytext=(5, 0), textcoords="offset points",
                        xycoords=("axes fraction", "data"), color=HIGH, ha="left", va="center", fontsize=8)
        ax.plot(xs, ys, color=LOW, linewidth=1.4, zorder=3)
        for sig in (True, False):
            pts = [(x, y) for x, y, s in zip(xs, ys, significant) if _finite(y) and bool(s) == sig]
            if pts:
                ax.plot([x for x, _ in pts], [y for _, y in pts], marker="o", markersize=5, linestyle="none",
                        zorder=4, markeredgecolor=LOW, markerfacecolor=LOW if sig else "white",
                        markeredgewidth=1.2)
        shown = []
        rows = {"emerged": 1, "cleared": 1, "assumption_broken": 0}
        for kind, (marker, colour, _, _) in EVENT_STYLE.items():
            idx = sorted({i for i, k in events if k == kind})
            if idx:
                strip.plot(idx, [rows[kind]] * len(idx), marker=marker, markersize=6.5, color=colour,
                           linestyle="none", clip_on=False)
                shown.append(kind)
        strip.set_ylim(-0.6, 1.6)
        strip.set_yticks([])
        strip.tick_params(axis="x", length=0, labelbottom=False)
        for side in ("left", "bottom"):
            strip.spines[side].set_visible(False)
        strip.set_ylabel("events", rotation=0, ha="right", va="center", fontsize=8, color="#56606b")
        ax.yaxis.set_minor_formatter(NullFormatter())
        ax.yaxis.set_major_locator(LogLocator(base=10, numticks=6))
        ax.set_ylabel("q-value (log scale)")
        _period_ticks(ax, periods, most=8)
        handles = [
            Line2D([], [], color=LOW, marker="o", markerfacecolor=LOW, label="q (filled: at or below level)"),
            Line2D([], [], color=HIGH, linestyle=(0, (5, 3)), label="level"),
        ] + [
            Line2D([], [], color=EVENT_STYLE[k][1], marker=EVENT_STYLE[k][0], linestyle="none",
                   label="event: " + EVENT_STYLE[k][3])
            for k in shown
        ]
        if shaded:
            handles.append(Rectangle((0, 0), 1, 1, facecolor="#fbe9c6", label="watched check failing"))
        fig.legend(handles=handles, loc="lower center", bbox_to_anchor=(0.5, 0.0), ncols=len(handles),
                   fontsize=8, handlelength=2.0)
        return _to_svg(fig, key, label)


# ------------------------------------------------------------------ SVG text

_XML_HEAD = re.compile(r"<\?xml[^>]*\?>\s*|<!DOCTYPE[^>]*>\s*", re.S)
_METADATA = re.compile(r"<metadata>.*?</metadata>\s*", re.S)
_ROOT = re.compile(r"<svg\b[^>]*>")
_ID = re.compile(r'\bid="([^"]+)"')
_HREF = re.compile(r'href="#([^"]+)"')
_URL = re.compile(r"url\(#([^)]+)\)")
_VIEWBOX = re.compile(r'viewBox="([^"]+)"')
_BETWEEN_TAGS = re.compile(r">\s+<")
_NEWLINES = re.compile(r"\s*\n\s*")
_DECIMALS = re.compile(r"-?\d+\.\d{3,}")
_PATH_DATA = re.compile(r' (d|x|y|width|height)="([^"]*)"')  # coordinates in pt; never transforms


def _round2(m: re.Match) -> str:
    return f"{float(m.group(0)):.2f}"


def _to_svg(fig: Figure, key: str, label: str) -> str:
    """The figure as an inline ``<svg>`` element for an HTML page (see the module notes)."""
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
    text = _METADATA.sub("", _XML_HEAD.sub("", buf.getvalue()))
    # smaller: no indentation, one line per path, 0.01 pt precision, only the ids something refers to
    text = _NEWLINES.sub(" ", _BETWEEN_TAGS.sub("><", text))
    text = _PATH_DATA.sub(lambda m: f' {m.group(1)}="' + _DECIMALS.sub(_round2, m.group(2)) + '"', text)
    used = set(_HREF.findall(text)) | set(_URL.findall(text))
    text = _ID.sub(lambda m: f'id="{key}-{m.group(1)}"' if m.group(1) in used else "", text)
    text = _HREF.sub(lambda m: f'href="#{key}-{m.group(1)}"', text)
    text = _URL.sub(lambda m: f"url(#{key}-{m.group(1)})", text)
    root = _ROOT.search(text)
    if root is None:  # pragma: no cover - matplotlib always writes one
        raise RuntimeError("matplotlib wrote no <svg> element")
    viewbox = _VIEWBOX.search(root.group(0))
    safe = html.escape(label, quote=True)
    new_root = (f'<svg class="chart" role="img" aria-label="{safe}" '
                f'viewBox="{viewbox.group(1) if viewbox else ""}" preserveAspectRatio="xMidYMid meet">'
                f"<title>{html.escape(label)}</title>")
    text = text[:root.start()] + new_root + text[root.end():]
    return text.strip()
