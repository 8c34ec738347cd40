"""A self-contained HTML report of one stored period, read from the history only.

::

    from monitor.config import load_config
    from monitor.present.report import write_report
    from monitor.runner import Job

    with Job(load_config("configs/demo.yaml")) as job:
        write_report(job, "2026-W20", Path("week20.html"))

The report never touches the source database: everything comes from what
``segwatch run`` stored (:meth:`History.periods`, :meth:`History.metric_history`,
:meth:`History.events`), so it can be written anywhere the history is reachable and
always shows exactly what the alerts were based on.

What is on the page
-------------------
1. The front page: job, period and window; this period's events as sentences;
   every metric in one table sorted by q-value (method and why, statistic with its
   degrees of freedom, p, q, effect size with its interval, segments that stand
   apart, assumption checks with the ``watched`` ones first, the note and the
   sensitivity warning); then a short block on reading the results with care.
2. Per metric: the segments side by side as box plots of the stored quantiles
   (5%, 25%, median, 75%, 95%; see :data:`monitor.analysis.QUANTILE_LEVELS`),
   falling back to mean ± 1 sd when no quantiles are stored, or to means with 95%
   intervals when every box would be flat (a metric with few distinct values);
   the segment table; each segment's mean with its 95% interval over the last
   ``periods`` stored periods; the q-value over the same periods on a log scale
   with the false-discovery level and the events marked; a matrix of the pairwise
   adjusted p-values (a one-column table for a many-to-one design).

The file holds no scripts and no external references: styles are inline, pictures
are inline SVG (see :mod:`monitor.present.plots`), fonts are the reader's system fonts, and a
Content-Security-Policy meta tag forbids the browser to fetch anything.

Intervals over time are ``mean ± t(0.975, n-1) · sd / sqrt(n)``, the two-sided 95%
Student t interval for one segment's mean in one period, formed from the stored
``n``, ``mean`` and ``sd`` (Student 1908); it treats the records as independent.
"""

from __future__ import annotations

import html
import logging
import math
import os
import tempfile
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Mapping, Protocol, Sequence

from scipy import stats as sps

from .. import __version__, methods
from . import plots
from ..model import QUANTILE_KEYS, Check, EffectSize, MetricResult, PairRow, StoredResult, StoredRun
from ..config import JobConfig, MetricConfig
from ..redact import redact
from ..errors import SegwatchError, UsageError
from ..events import CHECK_NAMES
from ..periods import Period, parse_period

if TYPE_CHECKING:
    from ..store.history import History


class JobLike(Protocol):
    """What the report needs of a job (a :class:`monitor.runner.Job` has these): its
    config and its history. The runner sits above this module and is never imported."""

    config: JobConfig
    history: "History"

log = logging.getLogger(__name__)

EFFECT_NAMES = {"omega_squared": "ω²", "eta_squared": "η²", "epsilon_squared": "ε²", "cohens_f": "Cohen's f",
                "cohens_w": "Cohen's w"}
KIND_ORDER = ("emerged", "cleared", "assumption_broken", "data_quality", "segment_missing", "segment_new",
              "assumption_restored")
KIND_WORDS = {
    "emerged": "new difference",
    "cleared": "difference gone",
    "assumption_broken": "check fails",
    "assumption_restored": "check passes again",
    "segment_new": "new {seg}",
    "segment_missing": "{seg} missing",
    "data_quality": "data quality",
}
PERIOD_WORDS = {"day": "day", "week": "week", "month": "month"}
MATRIX_MAX = 24  # above this many segments the pair matrix becomes a list of significant pairs


# ------------------------------------------------------------------ data


@dataclass(frozen=True)
class ReportData:
    """Everything the page shows, read from the history in one go (typed, as stored).

    Every verdict is shown as it was judged when stored: the level and the adjustment
    method are the stored run's (:attr:`StoredRun.settings`), never today's config; a
    period stored before runs recorded their settings shows its stored verdicts and
    says that the level was not recorded.
    """

    job: str
    config_path: str
    history_url: str
    period_kind: str
    timezone: str
    segment_word: str
    run: StoredRun  # the stored run of the period
    window: tuple[str, ...]  # stored periods in the trend pictures, oldest first, ending at the period
    results: tuple[StoredResult, ...]  # this period's stored verdicts, sorted by q-value
    trail_results: Mapping[str, tuple[StoredResult, ...]]  # metric -> stored verdicts over the window
    events_now: tuple[dict[str, Any], ...]
    events_window: tuple[dict[str, Any], ...]
    metric_config: Mapping[str, MetricConfig]

    @property
    def period(self) -> str:
        return self.run.period

    @property
    def fdr_level(self) -> float | None:
        """The level this period's verdicts were judged at (None: not recorded when stored)."""
        return self.run.level

    @property
    def fdr_method(self) -> str | None:
        """The adjustment across metrics this period was judged with (None: not recorded)."""
        return self.run.settings.fdr_method if self.run.settings is not None else None


def collect(history: "History", config: JobConfig, period: Period | str | None = None,
            periods: int | None = None) -> ReportData:
    """Read what the report needs from ``history``; the one place inputs are checked.

    Raises :class:`~monitor.errors.UsageError` (exit 2) when nothing is stored yet,
    when ``period`` is not stored, or when ``periods`` is below 1.
    """
    count = config.report.periods if periods is None else periods
    if isinstance(count, bool) or not isinstance(count, int) or count < 1:
        raise UsageError(f"periods: give a whole number of at least 1, not {count!r}")
    ident = period.ident if isinstance(period, Period) else period
    if ident is not None:  # a malformed identifier says so (PeriodError, exit 2) before the lookup
        ident = parse_period(config.period, ident, config.timezone).ident
    stored = history.runs()
    cfg_arg = str(config.path)
    if not stored:
        raise UsageError(
            f"no stored periods for job {config.job} in the history at {redact(config.history.url)}; "
            f"run `segwatch run {cfg_arg}` (or `segwatch backfill`) first")
    idents = [r.period for r in stored]
    if ident is None:
        pos = len(stored) - 1
    elif ident in idents:
        pos = idents.index(ident)
    else:
        raise UsageError(
            f"period {ident} is not stored for job {config.job} (stored: {idents[0]} to {idents[-1]}, "
            f"{len(idents)} periods); run `segwatch run {cfg_arg} --period {ident}` first")
    run = stored[pos]
    window = tuple(idents[max(0, pos - count + 1):pos + 1])
    inside = set(window)
    entries = [r for r in history.results(None) if r.period in inside]
    now = [r for r in entries if r.period == run.period]
    now.sort(key=lambda r: (_sort_q(r.result.q_value), r.metric))
    trail: dict[str, list[StoredResult]] = {r.metric: [] for r in now}
    for r in entries:
        if r.metric in trail:
            trail[r.metric].append(r)
    events_window = tuple(e for e in history.events() if e["period"] in inside
                          and not str(e["kind"]).startswith("op_"))  # operational events are not about the data
    events_now = tuple(sorted((e for e in events_window if e["period"] == run.period),
                              key=lambda e: (_kind_rank(e["kind"]), e["metric"] or "", e["segment"] or "")))
    trail_results = {k: tuple(v) for k, v in trail.items()}
    return ReportData(
        job=config.job, config_path=cfg_arg, history_url=redact(config.history.url),
        period_kind=config.period, timezone=config.timezone, segment_word=config.source.segment_column,
        run=run, window=window, results=tuple(now), trail_results=trail_results,
        events_now=events_now, events_window=events_window,
        metric_config={m.name: m for m in config.metrics},
    )


def report_html(history: "History", config: JobConfig, period: Period | str | None = None,
                periods: int | None = None) -> str:
    """The report as one HTML document (the hook for other writers, e.g. an email digest)."""
    return render_html(collect(history, config, period, periods))


def render_report(job: JobLike, period: Period | str | None = None, periods: int | None = None) -> str:
    """The report of ``job``'s stored ``period`` (None: the latest stored) as HTML text."""
    return report_html(job.history, job.config, period, periods)


def write_report(job: JobLike, period: Period | str | None, out: Path, periods: int | None = None) -> Path:
    """Write the report to ``out`` (replacing it atomically) and return the path.

    ``periods`` is how many stored periods the pictures over time cover (default:
    the config's ``report.periods``).
    """
    text = render_report(job, period, periods)
    out = Path(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".tmp", dir=out.parent)
        try:
            with os.fdopen(fd, "w", encoding="utf-8") as fh:
                fh.write(text)
            os.replace(tmp, out)
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
    except OSError as exc:
        raise SegwatchError(f"cannot write the report to {out}: {exc.strerror or exc}") from exc
    log.info("report for %s written to %s (%d bytes)", job.config.job, out, len(text))
    return out


# ------------------------------------------------------------------ numbers and words


def _sort_q(q: Any) -> float:
    return q if isinstance(q, (int, float)) and math.isfinite(q) else math.inf


def _kind_rank(kind: str) -> int:
    return KIND_ORDER.index(kind) if kind in KIND_ORDER else len(KIND_ORDER)


def _ok(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def num(x: Any, digits: int = 3, decimals: int | None = None) -> str:
    """A readable number: ``decimals`` places when given, else about ``digits``
    significant digits without exponent between 0.001 and 1e7; "–" when missing."""
    if not _ok(x):
        return "–"
    x = float(x)
    if decimals is not None:
        return f"{x:,.{decimals}f}".replace("-", "−")
    if x == 0:
        return "0"
    mag = math.floor(math.log10(abs(x)))
    if mag < -3 or mag >= 7:
        return f"{x:.{max(0, digits - 1)}e}".replace("-", "−")
    places = max(0, digits - 1 - mag)
    return f"{x:,.{places}f}".replace("-", "−")


def pval(x: Any) -> str:
    """p and q values: two significant digits, and "< 0.0001" below that."""
    if not _ok(x):
        return "–"
    if x < 1e-4:
        return "< 0.0001"
    if x < 1e-3:
        return f"{x:.5f}"
    if x >= 0.995:
        return "1.0"
    return num(x, 2)


def pexact(x: Any) -> str:
    return f"{x:.3g}" if _ok(x) else "not computed"


def _e(x: Any) -> str:
    return html.escape(str(x), quote=True)


def t_interval(n: Any, mean: Any, sd: Any, confidence: float = 0.95) -> tuple[float, float]:
    """The Student t interval ``mean ± t(1-(1-c)/2, n-1) · sd / sqrt(n)`` (NaN when n < 2).

    Notes
    -----
    Student (1908), "The probable error of a mean", Biometrika 6(1). Assumes
    independent records and a roughly normal mean (central limit theorem for
    larger n).
    """
    if not (_ok(n) and _ok(mean) and _ok(sd)) or n < 2:
        return math.nan, math.nan
    half = float(sps.t.ppf(0.5 + confidence / 2, int(n) - 1)) * float(sd) / math.sqrt(float(n))
    return float(mean) - half, float(mean) + half


def _method_label(name: Any, default: Any = "") -> str:
    """A stored method name as people read it (the registered method's label)."""
    method = methods.find(name)
    return method.label if method else default


def _stat_text(m: MetricResult | Mapping[str, Any]) -> str:
    """The statistic with its degrees of freedom as the method writes it (a stored entry's JSON is read first)."""
    if not isinstance(m, MetricResult):
        m = MetricResult.from_json(m)
    if not _ok(m.statistic):
        return "not computed"
    df = [num(d, 4) if _ok(d) and d != int(d) else (str(int(d)) if _ok(d) else "–") for d in m.df]
    method = methods.find(m.method)
    if method is None:  # a method this release does not know (stored by another one)
        return f"{m.method}({', '.join(df)}) = {num(m.statistic, 4)}"
    return method.statistic_text(num(m.statistic, 4), df)


def _effect_text(eff: EffectSize | None) -> str:
    if eff is None or not _ok(eff.value):
        return "–"
    text = f"{EFFECT_NAMES.get(eff.name, eff.name)} {num(eff.value, 2)}"
    if _ok(eff.ci_low) and _ok(eff.ci_high):
        text += f" ({num(eff.ci_low, 2)} to {num(eff.ci_high, 2)})"
    return text


CHECK_SHORT = {"brown_forsythe": "equal spread", "normality": "normality", "sd_ratio": "spread ratio",
               "n_ratio": "size ratio", "outlier_share": "outliers"}


def _check_name(key: str, long: bool = False) -> str:
    if long:
        return CHECK_NAMES.get(key, key.replace("_", " "))
    return CHECK_SHORT.get(key, key.replace("_", " "))


def _reason(m: MetricResult) -> str:
    """The stored reason for the method, without a leading repeat of the method's name."""
    text = m.method_reason or ""
    name = _method_label(m.method)
    if name and text.startswith(name + ":"):
        text = text[len(name) + 1:].strip()
    return text[:1].upper() + text[1:] if text else ""


def lvl(x: Any) -> str:
    """A level such as 0.05, as written in the config."""
    return f"{x:g}" if _ok(x) else "–"


def _ordered_checks(m: MetricResult) -> list[tuple[Check, bool]]:
    """The assumption checks with whether each is watched, the watched ones first, then by name."""
    checks = [(c, k in m.relevant_checks) for k, c in m.assumptions.items()]
    return sorted(checks, key=lambda cw: (not cw[1], cw[0].name))


def _display(m: MetricResult, cfg: MetricConfig | None) -> str:
    return cfg.label if cfg and cfg.label else m.metric


def _unit_label(m: MetricResult, cfg: MetricConfig | None) -> str:
    base = _display(m, cfg)
    unit = m.unit or (cfg.unit if cfg else None)
    transform = cfg.transform if cfg else "none"
    if transform == "log1p":
        return f"log1p({base})"
    if transform == "log":
        return f"{base} ({unit + ', ' if unit else ''}log scale)"
    return f"{base} ({unit})" if unit else base


# ------------------------------------------------------------------ page


def render_html(data: ReportData) -> str:
    """The whole page for ``data``."""
    title = f"{data.job} · {data.period}"
    sections = [_masthead(data), _contents(data), _events_section(data), _overview(data), _care(data)]
    sections += [_metric_section(data, sr.result, i) for i, sr in enumerate(data.results)]
    sections.append(_footer(data))
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
        "<meta http-equiv=\"Content-Security-Policy\" "
        "content=\"default-src 'none'; style-src 'unsafe-inline'; img-src data:\">\n"
        "<meta name=\"color-scheme\" content=\"light\">\n"
        f"<meta name=\"generator\" content=\"segwatch {_e(__version__)}\">\n"
        f"<title>{_e(title)}</title>\n<style>{CSS}</style>\n</head>\n<body>\n<main>\n"
        + "\n".join(sections) + "\n</main>\n</body>\n</html>\n"
    )


def _when(iso: str) -> str:
    try:
        dt = datetime.fromisoformat(iso)
    except (TypeError, ValueError):
        return _e(iso)
    return f"{dt:%a %d %b %Y %H:%M}"


def _masthead(d: ReportData) -> str:
    word = PERIOD_WORDS.get(d.period_kind, "period")
    run = d.run
    segs = run.segments
    sig = [r.result for r in d.results if r.result.significant]
    computed = [r for r in d.results if r.result.computed]
    if sig:
        names = ", ".join(f"<a href=\"#{_anchor(m.metric)}\">{_e(_display(m, d.metric_config.get(m.metric)))}</a>"
                          for m in sig)
        lede = (f"{len(sig)} of {len(d.results)} metrics differ by {_e(d.segment_word)} this {word}: "
                f"{names}.")
    else:
        lede = f"None of the {len(d.results)} metrics differs clearly by {_e(d.segment_word)} this {word}."
    if len(computed) < len(d.results):
        lede += f" {len(d.results) - len(computed)} could not be computed (see the notes)."
    n_ev = len(d.events_now)
    lede += (f" {n_ev} event{'s' if n_ev != 1 else ''} this {word}." if n_ev
             else " Nothing changed since the previous stored period.")
    method = {"bh": "Benjamini-Hochberg", "by": "Benjamini-Yekutieli", "holm": "Holm",
              "bonferroni": "Bonferroni", "none": "no adjustment", None: "a method not recorded"}.get(
        d.fdr_method, d.fdr_method)
    return (
        "<header class=\"masthead\">\n"
        f"<p class=\"eyebrow\">segwatch report · job <strong>{_e(d.job)}</strong></p>\n"
        f"<h1>{_e(word.capitalize())} {_e(d.period)}</h1>\n"
        f"<p class=\"window\">{_when(run.period_start)} to {_when(run.period_end)}, "
        f"{_e(d.timezone)} · {num(run.rows, decimals=0)} rows · {len(segs)} segments ({_e(d.segment_word)}) · "
        f"q-values by {_e(method)}, {_level_words(d.fdr_level)}</p>\n"
        f"<p class=\"lede\">{lede}</p>\n</header>"
    )


def _level_words(level: float | None) -> str:
    """How the page names the level a period was judged at."""
    return f"level {lvl(level)}" if level is not None else "level not recorded (stored before runs kept their settings)"


def _anchor(metric: str) -> str:
    return "metric-" + "".join(c if c.isalnum() or c in "-_" else "-" for c in metric)


def _contents(d: ReportData) -> str:
    items = ["<li><a href=\"#events\">Events</a></li>", "<li><a href=\"#metrics\">All metrics</a></li>",
             "<li><a href=\"#care\">Reading with care</a></li>"]
    items += [f"<li><a href=\"#{_anchor(r.metric)}\">{_e(_display(r.result, d.metric_config.get(r.metric)))}</a></li>"
              for r in d.results]
    return f"<nav class=\"contents\" aria-label=\"Contents\"><ul>{''.join(items)}</ul></nav>"


def _event_item(e: Mapping[str, Any], seg_word: str, with_period: bool = False) -> str:
    kind = e["kind"]
    tag = KIND_WORDS.get(kind, kind.replace("_", " ")).format(seg=seg_word)
    when = f"<span class=\"when\">{_e(e['period'])}</span> " if with_period else ""
    return (f"<li class=\"event ev-{_e(kind)}\"><span class=\"tag\">{_e(tag)}</span> "
            f"{when}<span class=\"msg\">{_e(e['message'])}</span></li>")


def _events_section(d: ReportData) -> str:
    word = PERIOD_WORDS.get(d.period_kind, "period")
    if d.events_now:
        body = "<ul class=\"events\">" + "".join(_event_item(e, d.segment_word) for e in d.events_now) + "</ul>"
    else:
        body = (f"<p class=\"quiet\">No events this {word}: every verdict, check and {_e(d.segment_word)} "
                "is as it was in the previous stored period.</p>")
    return (f"<section id=\"events\" aria-labelledby=\"events-h\">\n"
            f"<h2 id=\"events-h\">What changed this {word}</h2>\n{body}\n</section>")


def _verdict_chip(m: MetricResult) -> str:
    if not m.computed:
        return "<span class=\"chip chip-na\">not computed</span>"
    if m.significant:  # the verdict as stored, at the level the period was judged at
        return "<span class=\"chip chip-sig\">differs</span>"
    return "<span class=\"chip chip-ns\">no clear difference</span>"


def _flagged(m: MetricResult) -> list[tuple[str, str]]:
    return [(s.segment, s.flag) for s in m.segments if s.flag in ("high", "low")]


def _flag_html(m: MetricResult) -> str:
    out = [f"<span class=\"flag flag-{f}\">{plots.FLAG_MARK[f]} {_e(s)} {'above' if f == 'high' else 'below'}</span>"
           for s, f in _flagged(m)]
    return "<br>".join(out) or "<span class=\"quiet\">none</span>"


def _checks_html(m: MetricResult) -> str:
    checks = _ordered_checks(m)
    if not checks:
        return "<span class=\"quiet\">not run (no values)</span>"
    parts = [] if any(w for _, w in checks) else ["<span class=\"quiet\">none watched</span>"]
    others_ok = others_bad = 0
    for c, watched in checks:
        if not watched:
            if c.passed is False:
                others_bad += 1
            else:
                others_ok += 1
            continue
        parts.append(_check_chip(c))
    if others_ok or others_bad:
        rest = []
        if others_bad:
            rest.append(f"{others_bad} fail{'s' if others_bad == 1 else ''}")
        if others_ok:
            rest.append(f"{others_ok} pass{'es' if others_ok == 1 else ''}")
        parts.append(f"<span class=\"quiet\">others: {', '.join(rest)}</span>")
    return "<br>".join(parts)


def _check_chip(c: Check) -> str:
    state, cls = ("passes", "ok") if c.passed else ("fails", "bad") if c.passed is False else ("not run", "na")
    return f"<span class=\"check check-{cls}\">{_e(_check_name(c.name))}: {state}</span>"


def _notes(m: MetricResult) -> list[str]:
    out = []
    if m.note:
        out.append(str(m.note))
    sens = m.sensitivity
    if sens is not None and sens.underpowered:
        out.append(f"underpowered: with these sizes only effects of Cohen's f {num(sens.min_f, 2)}"
                   f" or more are detected with probability {num(sens.power, 2)}"
                   + (f" (a spread of {num(sens.min_diff)} in the means)" if _ok(sens.min_diff) else ""))
    if m.sample_size:
        out.append(f"values are a random sample of up to {m.sample_size} per segment")
    return out


def _overview(d: ReportData) -> str:
    rows = []
    two_level = next((sr.result.decision.level for sr in d.results if sr.result.decision is not None
                      and sr.result.decision.rule == "two_period" and _ok(sr.result.decision.level)), None)
    for sr in d.results:
        m = sr.result
        cfg = d.metric_config.get(m.metric)
        method = _method_label(m.method, m.method)
        notes = _notes(m)
        why = f"<strong>{_e(method)}</strong>: {_e(_reason(m))}"
        if notes:
            why += "<br>" + "<br>".join(f"<span class=\"note-label\">Note</span> {_e(n)}" for n in notes)
        sig = " class=\"is-sig\"" if m.significant else ""
        rows.append(
            f"<tbody{sig}><tr class=\"main\">"
            f"<th scope=\"row\" rowspan=\"2\"><a href=\"#{_anchor(m.metric)}\">{_e(_display(m, cfg))}</a>"
            f"<br>{_verdict_chip(m)}</th>"
            f"<td class=\"num q\" title=\"q = {_e(pexact(m.q_value))}\">{pval(m.q_value)}</td>"
            f"<td class=\"num\" title=\"p = {_e(pexact(m.p_value))}\">{pval(m.p_value)}</td>"
            f"<td class=\"num\">{_e(_stat_text(m))}</td>"
            f"<td class=\"num\">{_e(_effect_text(m.effect_size))}</td>"
            f"<td>{_flag_html(m)}</td>"
            f"<td>{_checks_html(m)}</td>"
            f"</tr><tr class=\"why\"><td colspan=\"6\">{why}</td></tr></tbody>")
    head = ("<tr><th scope=\"col\">Metric</th><th scope=\"col\">q</th><th scope=\"col\">p</th>"
            "<th scope=\"col\">Statistic (df)</th><th scope=\"col\">Effect size (95% interval)</th>"
            "<th scope=\"col\">Standing apart</th><th scope=\"col\">Assumption checks, watched first</th></tr>")
    return (
        "<section id=\"metrics\" aria-labelledby=\"metrics-h\">\n"
        "<h2 id=\"metrics-h\">All metrics, smallest q-value first</h2>\n"
        + (f"<p class=\"hint\">A metric differs when the evidence of this period and the one before it "
           f"is at most the level of the job's false-alarm budget ({lvl(two_level)} per metric this period, "
           f"as stored; q, p adjusted across the {len(d.results)} metrics, is shown for reading). "
           if two_level is not None else
           f"<p class=\"hint\">q is p adjusted across the {len(d.results)} metrics of the period; a metric "
           + (f"differs when q is at most {lvl(d.fdr_level)} (the level this period was judged at). "
              if d.fdr_level is not None else
              "differs as judged when it was stored (the level was not recorded then). "))
        + f"A {_e(d.segment_word)} can stand apart only inside a metric "
        "that differs. Watched checks decide the method and raise events; the others are shown for "
        "information. The second line of each metric says which test was used and why.</p>\n"
        f"<div class=\"scroll\"><table class=\"overview\">\n<thead>{head}</thead>\n"
        + "\n".join(rows) + "\n</table></div>\n</section>"
    )


def _care(d: ReportData) -> str:
    word = PERIOD_WORDS.get(d.period_kind, "period")
    seg = _e(d.segment_word)
    return f"""<aside id="care" class="care" aria-labelledby="care-h">
<h2 id="care-h">Reading these results with care</h2>
<ul>
<li><strong>Significant does not mean important.</strong> A small q-value says a gap is unlikely to be noise,
not that it is large enough to matter. Judge size from the effect size and the pictures, in the metric's own
units.</li>
<li><strong>Records are treated as independent.</strong> Records that come in clumps (one route, one customer,
one shift) make the evidence look stronger than it is.</li>
<li><strong>Every {word} is another look.</strong> q-values limit false discoveries among the metrics of one
{word}, not across {word}s. Over many {word}s some flags will be chance; a gap that lasts deserves more trust
than a single one.</li>
<li><strong>These records were observed, not assigned.</strong> A {seg} that stands apart may differ in its mix of
work, customers or conditions; the numbers do not say why, and do not show a cause.</li>
<li><strong>Not a basis for decisions about people or prices on its own.</strong> Decisions on pay, prices,
staffing or anyone's performance need review by qualified people and must follow local law and agreements.</li>
</ul>
</aside>"""


# ------------------------------------------------------------------ per metric


def _metric_section(d: ReportData, m: MetricResult, index: int) -> str:
    cfg = d.metric_config.get(m.metric)
    name = _display(m, cfg)
    key = f"f{index}"
    decimals = cfg.decimals if cfg else None
    parts = [
        f"<section class=\"metric\" id=\"{_anchor(m.metric)}\" aria-labelledby=\"{key}-h\">",
        f"<h2 id=\"{key}-h\">{_e(name)} {_verdict_chip(m)}</h2>",
        f"<p class=\"summary\">{_summary(d, m, decimals)}</p>",
        _facts(d, m),
        _box_figure(d, m, cfg, key, decimals),
        _segment_table(m, decimals, d.segment_word, _scale(cfg)),
        _trend_figure(d, m, cfg, key, decimals),
        _q_figure(d, m, key),
        _pairs_figure(d, m, decimals),
        "</section>",
    ]
    return "\n".join(p for p in parts if p)


def _summary(d: ReportData, m: MetricResult, decimals: int | None) -> str:
    word = PERIOD_WORDS.get(d.period_kind, "period")
    seg = _e(d.segment_word)
    q = m.q_value
    if not m.computed:
        return f"Not computed this {word}: {_e(m.note or 'no reason stored')}."
    verdict = m.decision
    two = verdict is not None and verdict.rule == "two_period"
    if two:  # the stored verdict and the level it was held to, never today's config
        over = f"over this {word} and {_e(verdict.before)}" if verdict.before else f"from this {word} alone"
        why = f"evidence {pval(verdict.evidence)} {over}"
        at = lvl(verdict.level)
    if m.significant:
        if two:
            text = f"It differs by {seg} this {word} ({why}, at or below the level {at} of the job's false-alarm budget)."
        else:
            text = (f"It differs by {seg} this {word} (q {pval(q)}, at or below {lvl(d.fdr_level)}, the level it was "
                    f"judged at)." if d.fdr_level is not None else
                    f"It differs by {seg} this {word} (q {pval(q)}; judged so when stored, at a level not recorded).")
        sc = _scale(d.metric_config.get(m.metric))
        for s in m.segments:
            if s.flag in ("high", "low") and _ok(s.mean) and _ok(s.diff_vs_rest):
                rest = sc.back(s.mean - s.diff_vs_rest)
                text += (f" {_e(s.segment)} stands {'above' if s.flag == 'high' else 'below'} the rest: "
                         f"{sc.centre} {num(sc.back(s.mean), decimals=decimals)} against "
                         f"{num(rest, decimals=decimals)} for the rest's records.")
        if not _flagged(m):
            text += f" No single {seg} stands apart from most of the others."
        return text
    if two:
        return f"No clear difference by {seg} this {word} ({why}, above the level {at})."
    if d.fdr_level is None:
        return f"No clear difference by {seg} this {word} (q {pval(q)}; judged so when stored, at a level not recorded)."
    return f"No clear difference by {seg} this {word} (q {pval(q)}, above {lvl(d.fdr_level)}, the level it was judged at)."


def _facts(d: ReportData, m: MetricResult) -> str:
    items = [
        ("Test", f"{_e(_method_label(m.method, m.method))}. {_e(_reason(m))}"),
        ("Result", f"{_e(_stat_text(m))}, p {pval(m.p_value)}, q {pval(m.q_value)}"),
        ("Effect size", _e(_effect_text(m.effect_size))
         + "".join(f"; {_e(_effect_text(x))}" for x in m.extra_effects)),
    ]
    checks = _ordered_checks(m)
    if checks:
        lines = []
        for c, watched in checks:
            lines.append(f"{_check_chip(c)}{' <span class=watched>watched</span>' if watched else ''}"
                         f" <span class=\"quiet\">{_e(c.detail)}</span>")
        items.append(("Checks", "<br>".join(lines)))
    for n in _notes(m):
        items.append(("Note", _e(n)))
    dq = m.quality
    if dq.rows:
        bad = dq.bad
        items.append(("Data", f"{num(dq.rows, decimals=0)} rows, {bad} unusable values"
                              + (f" ({num(100 * dq.bad_share, 2)}%)" if bad and _ok(dq.bad_share) else "")))
    body = "".join(f"<dt>{k}</dt><dd>{v}</dd>" for k, v in items)
    return f"<dl class=\"facts\">{body}</dl>"


@dataclass(frozen=True)
class Scale:
    """How a metric's analysed values are shown: as they are, or back from logs.

    Under ``transform: log`` the stored means, intervals and quantiles are of the
    logged values; ``exp`` of a quantile is the quantile of the original values and
    ``exp`` of the mean is the geometric mean, so the pictures show the metric's own
    units on a logarithmic axis.
    """

    back: Callable[[float], float]
    log_axis: bool
    centre: str  # what the centre is called: "mean" or "geometric mean"


def _scale(cfg: MetricConfig | None) -> Scale:
    if cfg is not None and cfg.transform == "log":
        return Scale(lambda x: math.exp(x) if _ok(x) else math.nan, True, "geometric mean")
    return Scale(lambda x: x, False, "mean")


def _boxes(m: MetricResult, sc: Scale, intervals: bool = False) -> list[plots.Box]:
    """The segments as boxes on the display scale; without quantiles (or with
    ``intervals``) a bar of mean ± 1 sd (or the 95% interval of the mean)."""
    out = []
    for s in m.segments:
        qs = tuple(sc.back(float(x)) for x in s.quantiles) if s.quantiles and all(
            _ok(x) for x in s.quantiles) and not intervals else ()
        mean, sd = _f(s.mean), _f(s.sd)
        lo, hi = t_interval(s.n, mean, sd) if intervals else (mean - sd, mean + sd)
        out.append(plots.Box(s.segment, int(s.n or 0), sc.back(mean), sc.back(lo), sc.back(hi), qs, s.flag,
                             bool(s.excluded)))
    return out


def _f(x: Any) -> float:
    return float(x) if _ok(x) else math.nan


def _box_figure(d: ReportData, m: MetricResult, cfg: MetricConfig | None, key: str,
                decimals: int | None) -> str:
    sc = _scale(cfg)
    boxes = _boxes(m, sc)
    if not boxes:
        return ""
    seg = d.segment_word
    name = _display(m, cfg)
    raw = [dict(zip(QUANTILE_KEYS, s.quantiles)) for s in m.segments if s.quantiles]
    with_q = [b for b in boxes if b.quantiles]
    flat = bool(raw) and all(q.get("q25") == q.get("q75") for q in raw)
    if flat:
        # every middle half is one value (few distinct values): boxes say nothing, show means and intervals
        boxes = _boxes(m, sc, intervals=True)
        how = (f"Each dot is the {seg}'s {sc.centre}, with its 95% interval. The middle half of every {seg} "
               "is a single value (the metric takes few distinct values), so boxes would be flat lines.")
    elif len(with_q) == len(boxes):
        how = (f"Each box spans the middle half of the {seg}'s values (25% to 75%), the thick line is the "
               f"median, the whiskers reach from 5% to 95%, and the diamond is the {sc.centre}.")
        if m.sample_size:
            how += f" Quantiles are estimated from a random sample of up to {m.sample_size} values per {seg}."
    else:
        how = (f"Quantiles were not stored for {'some' if with_q else 'these'} segments (the period was computed "
               "without values), so those are drawn as mean ± 1 standard deviation instead of a box.")
    if sc.log_axis:
        how += " The axis is logarithmic (the metric is compared on the log scale)."
    label = f"{name}, {d.period}: {len(boxes)} segments ({seg}) side by side"
    svg = plots.box_svg(boxes, key=f"{key}box", label=label, ylabel=_unit_label(m, cfg), log_scale=sc.log_axis)
    text = _box_summary(m, boxes, seg, decimals, flat, sc)
    return (f"<figure class=\"chart\" aria-labelledby=\"{key}box-c\">{svg}"
            f"<figcaption id=\"{key}box-c\"><strong>{_e(d.period)}, {_e(seg)} by {_e(seg)}.</strong> {_e(how)} "
            f"{_e(text)}</figcaption></figure>")


def _box_summary(m: MetricResult, boxes: Sequence[plots.Box], seg: str, decimals: int | None,
                 flat: bool, sc: Scale) -> str:
    use_median = not flat and all(b.quantiles for b in boxes if not b.excluded)
    vals = [(b.quantiles[2] if use_median else b.mean, b.segment) for b in boxes
            if not b.excluded and _ok(b.quantiles[2] if use_median else b.mean)]
    if not vals:
        return ""
    lo, hi = min(vals), max(vals)
    what = "Medians" if use_median else sc.centre.capitalize() + "s"
    text = (f"{what} range from {num(lo[0], decimals=decimals)} ({lo[1]}) to "
            f"{num(hi[0], decimals=decimals)} ({hi[1]}).")
    flagged = _flagged(m)
    if flagged:
        text += " " + "; ".join(f"{s} stands {'above' if f == 'high' else 'below'} the rest" for s, f in flagged) + "."
    # spreads are compared on the analysed scale (for a logged metric: as ratios q75/q25)
    spreads = [(b.quantiles[3] - b.quantiles[1], b.segment) if not sc.log_axis else
               (math.log(b.quantiles[3] / b.quantiles[1]), b.segment)
               for b in boxes if b.quantiles and not b.excluded and not flat]
    if len(spreads) >= 2:
        spreads.sort()
        if spreads[0][0] > 0 and spreads[-1][0] / spreads[0][0] >= 2:
            text += (f" Spreads differ: the middle half of {spreads[-1][1]} is "
                     f"{num(spreads[-1][0] / spreads[0][0], 2)} times as wide as that of {spreads[0][1]}.")
    excluded = [b.segment for b in boxes if b.excluded]
    if excluded:
        text += f" Left out of the test for too few values: {', '.join(excluded)}."
    return text


def _segment_table(m: MetricResult, decimals: int | None, seg: str, sc: Scale) -> str:
    if not m.segments:
        return ""
    rows = []
    for s in m.segments:
        qd = {k: sc.back(v) for k, v in zip(QUANTILE_KEYS, s.quantiles)}
        lo, hi = (sc.back(x) for x in t_interval(s.n, s.mean, s.sd))
        flag = s.flag
        verdict = (f"<span class=\"flag flag-{flag}\">{plots.FLAG_MARK[flag]} {'above' if flag == 'high' else 'below'}"
                   "</span>" if flag in ("high", "low") else
                   "<span class=\"quiet\">left out</span>" if s.excluded else "")
        rows.append(
            f"<tr><th scope=\"row\">{_e(s.segment)}</th><td class=\"num\">{num(s.n, decimals=0)}</td>"
            f"<td class=\"num\">{num(sc.back(_f(s.mean)), decimals=decimals)}</td>"
            f"<td class=\"num\">{_range(lo, hi, decimals)}</td>"
            f"<td class=\"num\">{num(s.sd, decimals=decimals)}</td>"
            f"<td class=\"num\">{num(qd.get('q50'), decimals=decimals)}</td>"
            f"<td class=\"num\">{_range(qd.get('q25'), qd.get('q75'), decimals)}</td>"
            f"<td>{verdict}</td></tr>")
    head = (f"<tr><th scope=\"col\">{_e(seg.capitalize())}</th><th scope=\"col\">n</th>"
            f"<th scope=\"col\">{sc.centre}</th><th scope=\"col\">95% interval of the {sc.centre}</th>"
            f"<th scope=\"col\">{'sd of the logs' if sc.log_axis else 'sd'}</th><th scope=\"col\">median</th>"
            "<th scope=\"col\">middle half</th><th scope=\"col\">standing</th></tr>")
    return (f"<details class=\"numbers\" open><summary>The numbers behind the picture</summary>"
            f"<div class=\"scroll\"><table class=\"segments\"><thead>{head}</thead><tbody>{''.join(rows)}</tbody>"
            "</table></div></details>")


def _range(lo: Any, hi: Any, decimals: int | None) -> str:
    return f"{num(lo, decimals=decimals)} to {num(hi, decimals=decimals)}" if _ok(lo) and _ok(hi) else "–"


def _trend_figure(d: ReportData, m: MetricResult, cfg: MetricConfig | None, key: str,
                  decimals: int | None) -> str:
    trail = d.trail_results.get(m.metric, ())
    if not trail:
        return ""
    window = list(d.window)
    pos = {p: i for i, p in enumerate(window)}
    segments = sorted(dict.fromkeys(s.segment for e in trail for s in e.result.segments))
    sc = _scale(cfg)
    series: dict[str, list[plots.Point]] = {s: [] for s in segments}
    for e in trail:
        for s in e.result.segments:
            lo, hi = t_interval(s.n, s.mean, s.sd)
            series[s.segment].append(plots.Point(pos[e.period], sc.back(_f(s.mean)), sc.back(lo), sc.back(hi),
                                                 s.flag))
    seg = d.segment_word
    name = _display(m, cfg)
    label = f"{name}: each {seg}'s {sc.centre} with its 95% interval, {window[0]} to {window[-1]}"
    svg = plots.trend_svg(list(series.items()), window, key=f"{key}trend", label=label,
                          ylabel=_unit_label(m, cfg), log_scale=sc.log_axis)
    text = _trend_summary(series, window, decimals)
    word = _e(PERIOD_WORDS.get(d.period_kind, "period"))
    return (f"<figure class=\"chart\" aria-labelledby=\"{key}trend-c\">{svg}"
            f"<figcaption id=\"{key}trend-c\"><strong>The last {len(window)} stored {word}s.</strong> "
            f"One panel per {_e(seg)}: its {sc.centre} with a 95% interval (dark), the rest behind "
            f"it (grey); {plots.FLAG_MARK['high']} / {plots.FLAG_MARK['low']} mark {word}s where it stood "
            f"above / below the rest. {_e(text)}</figcaption></figure>")


def _trend_summary(series: Mapping[str, Sequence[plots.Point]], window: Sequence[str],
                   decimals: int | None) -> str:
    moves = []
    for s, pts in series.items():
        pts = [p for p in pts if _ok(p.mean)]
        if len(pts) >= 2:
            moves.append((pts[-1].mean - pts[0].mean, s, pts[0], pts[-1]))
    parts = []
    if moves:
        big = max(moves, key=lambda x: abs(x[0]))
        parts.append(f"Largest change: {big[1]}, from {num(big[2].mean, decimals=decimals)} in {window[big[2].index]} "
                     f"to {num(big[3].mean, decimals=decimals)} in {window[big[3].index]}.")
    flagged = {}
    for s, pts in series.items():
        n = sum(1 for p in pts if p.flag in ("high", "low"))
        if n:
            flagged[s] = n
    if flagged:
        parts.append("Stood apart: " + ", ".join(f"{s} in {n} of {len(window)}" for s, n in flagged.items()) + ".")
    gaps = [s for s, pts in series.items() if len({p.index for p in pts}) < len(window)]
    if gaps:
        parts.append("Gaps are periods without records: " + ", ".join(gaps) + ".")
    return " ".join(parts)


def _q_figure(d: ReportData, m: MetricResult, key: str) -> str:
    trail = d.trail_results.get(m.metric, ())
    if not trail:
        return ""
    window = list(d.window)
    pos = {p: i for i, p in enumerate(window)}
    q = [math.nan] * len(window)
    verdict = [False] * len(window)  # each period's verdict as stored, at the level it was judged at
    failing = [False] * len(window)
    for sr in trail:
        i = pos[sr.period]
        q[i] = sr.result.q_value
        verdict[i] = sr.result.significant
        failing[i] = bool(sr.result.watched_failing)
    marks = [(pos[e["period"]], e["kind"]) for e in d.events_window
             if e.get("metric") == m.metric and e["kind"] in plots.EVENT_STYLE]
    name = _display(m, d.metric_config.get(m.metric))
    level = d.fdr_level
    label = f"{name}: q-value per period on a log scale, {window[0]} to {window[-1]}, {_level_words(level)}"
    svg = plots.qvalue_svg(window, q, math.nan if level is None else level, marks, key=f"{key}q", label=label,
                           failing=failing, significant=verdict)
    below = [window[i] for i, v in enumerate(q) if _ok(v) and verdict[i]]
    levels = {sr.judged_at for sr in trail}
    if len(levels) == 1 and level is not None:
        text = f"q at or below {lvl(level)} in {len(below)} of {sum(1 for v in q if _ok(v))} stored periods"
    else:
        text = (f"Differing, each period judged at its own stored level (dashed: this {_e(d.period)}'s"
                f"{'' if level is not None else ', not recorded'}), in {len(below)} of "
                f"{sum(1 for v in q if _ok(v))} stored periods")
    text += f" (first {below[0]}, last {below[-1]})." if below else "."
    if any(_ok(v) and v < plots.Q_FLOOR for v in q):
        text += f" Values below {plots.Q_FLOOR:g} are drawn at {plots.Q_FLOOR:g}."
    if any(failing):
        text += f" A watched assumption check failed in {_spans(window, failing)} (shaded)."
    kinds: dict[str, list[str]] = {}
    for i, k in sorted(set(marks)):
        kinds.setdefault(k, []).append(window[i])
    if kinds:
        text += " Marked: " + "; ".join(
            f"{plots.EVENT_STYLE[k][2]} in {', '.join(ps)}" for k, ps in kinds.items()) + "."
    return (f"<figure class=\"chart chart-short\" aria-labelledby=\"{key}q-c\">{svg}"
            f"<figcaption id=\"{key}q-c\"><strong>The q-value over time.</strong> Lower is stronger evidence; "
            f"below the dashed line the metric counts as differing. {_e(text)}</figcaption></figure>")


def _spans(window: Sequence[str], marks: Sequence[bool]) -> str:
    """The marked periods as runs: "2026-W10 and 2026-W14 to 2026-W20"."""
    runs: list[tuple[int, int]] = []
    for i, on in enumerate(marks):
        if on:
            if runs and runs[-1][1] == i - 1:
                runs[-1] = (runs[-1][0], i)
            else:
                runs.append((i, i))
    parts = [window[a] if a == b else f"{window[a]} to {window[b]}" for a, b in runs]
    return parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " and " + parts[-1]


def _pairs_figure(d: ReportData, m: MetricResult, decimals: int | None) -> str:
    pairs = m.pairs
    if not pairs:
        return ""
    level = m.pair_level if _ok(m.pair_level) else 0.05
    seg = d.segment_word
    family = methods.family(m.posthoc)
    posthoc = family.label if family else m.posthoc or ""
    gate = ("" if m.significant else
            f" The metric does not differ this {PERIOD_WORDS.get(d.period_kind, 'period')}, so no pair counts as a "
            "finding; the values are shown for reference.")
    if m.reference is not None:
        body = _reference_table(m, decimals, level, seg)
        cap = (f"<strong>Each {_e(seg)} against {_e(m.reference)}</strong> ({_e(posthoc)}, adjusted for the "
               f"{len(pairs)} comparisons).{_e(gate)}")
    else:
        names = [s.segment for s in m.segments if not s.excluded]
        names = [n for n in names if any(n in (p.a, p.b) for p in pairs)]
        if len(names) > MATRIX_MAX or m.pairs_left_out:  # a bounded entry: not every pair is there
            body = _pair_list(pairs, level, len(pairs) + m.pairs_left_out)
        else:
            body = _pair_matrix(names, pairs, level)
        cap = (f"<strong>Adjusted p-values of every pair</strong> ({_e(posthoc)}). A shaded cell counts as a "
               f"difference (at or below {lvl(level)}, darker for 0.01 and 0.001); its arrow says whether the "
               f"row's {_e(seg)} is higher (↑) or lower (↓) than the column's.{_e(gate)}")
    return (f"<figure class=\"pairs\"><div class=\"scroll\">{body}</div>"
            f"<figcaption>{cap}</figcaption></figure>")


def _shade(p: Any, level: float) -> str:
    if not _ok(p) or p > level:
        return ""
    if p <= 0.001:
        return "s3"
    if p <= 0.01:
        return "s2"
    return "s1"


def _pair_matrix(names: Sequence[str], pairs: Sequence[PairRow], level: float) -> str:
    look: dict[tuple[str, str], tuple[float, float, bool]] = {}
    for p in pairs:
        look[(p.a, p.b)] = (_f(p.p_adj), _f(p.diff), p.significant)
        look[(p.b, p.a)] = (_f(p.p_adj), -_f(p.diff), p.significant)
    head = "<tr><td></td>" + "".join(f"<th scope=\"col\">{_e(n)}</th>" for n in names[:-1]) + "</tr>"
    rows = []
    for i, r in enumerate(names):
        if i == 0:
            continue
        cells = []
        for j, c in enumerate(names[:-1]):
            if j >= i:
                cells.append("<td class=\"blank\"></td>")
                continue
            p, diff, counts = look.get((r, c), (math.nan, math.nan, False))
            cls = _shade(p, level) if counts else ""
            arrow = ("↑ " if diff > 0 else "↓ " if diff < 0 else "") if cls else ""
            cells.append(f"<td class=\"num {cls}\" title=\"{_e(r)} vs {_e(c)}: p {_e(pexact(p))}\">"
                         f"{arrow}{pval(p)}</td>")
        rows.append(f"<tr><th scope=\"row\">{_e(r)}</th>{''.join(cells)}</tr>")
    return f"<table class=\"matrix\"><thead>{head}</thead><tbody>{''.join(rows)}</tbody></table>"


def _pair_list(pairs: Sequence[PairRow], level: float, total: int | None = None) -> str:
    total = len(pairs) if total is None else total
    hits = sorted((p for p in pairs if p.significant and _ok(p.p_adj)), key=lambda p: p.p_adj)
    if not hits:
        return f"<p class=\"quiet\">No pair at or below {lvl(level)} among {total:,} pairs.</p>"
    rows = "".join(f"<tr><td>{_e(p.a)}</td><td>{_e(p.b)}</td><td class=\"num\">{num(p.diff)}</td>"
                   f"<td class=\"num {_shade(p.p_adj, level)}\">{pval(p.p_adj)}</td></tr>" for p in hits)
    return ("<table class=\"segments\"><thead><tr><th>a</th><th>b</th><th>a − b</th><th>p adjusted</th></tr>"
            f"</thead><tbody>{rows}</tbody></table>")


def _reference_table(m: MetricResult, decimals: int | None, level: float, seg: str) -> str:
    rows = []
    family = methods.family(m.posthoc)
    ranks = family is not None and family.ranks  # Dunn's diff is a gap in mean ranks: no units, no ratio
    points = family is not None and family.points  # a difference of proportions: percentage points
    for p in m.pairs:
        if ranks:
            gap = num(p.diff)
        elif points:
            d, lo, hi = (f"{100 * x:+.1f}" if _ok(x) else "–" for x in (p.diff, p.ci_low, p.ci_high))
            gap = f"{d} pp ({lo} to {hi})"
        elif p.log_scale:  # a difference of logs: the ratio of geometric means and its interval
            gap = f"× {num(_exp(p.diff))} ({num(_exp(p.ci_low))} to {num(_exp(p.ci_high))})"
        else:
            gap = (f"{num(p.diff, decimals=decimals)} ({num(p.ci_low, decimals=decimals)} to "
                   f"{num(p.ci_high, decimals=decimals)})")
        rows.append(f"<tr><th scope=\"row\">{_e(p.a)}</th><td class=\"num\">{gap}</td>"
                    f"<td class=\"num {_shade(p.p_adj, level) if p.significant else ''}\">"
                    f"{pval(p.p_adj)}</td></tr>")
    what = ("gap in mean rank to {ref}" if ranks else "gap in share to {ref} (interval)" if points else
            "ratio to {ref} (interval)" if any(
        p.log_scale for p in m.pairs) else "gap to {ref} (interval)").format(ref=_e(m.reference))
    head = (f"<tr><th scope=\"col\">{_e(seg.capitalize())}</th><th scope=\"col\">{what}</th>"
            "<th scope=\"col\">p adjusted</th></tr>")
    return f"<table class=\"segments\"><thead>{head}</thead><tbody>{''.join(rows)}</tbody></table>"


def _exp(x: float) -> float:
    return math.exp(x) if _ok(x) else math.nan


def _footer(d: ReportData) -> str:
    try:
        when = datetime.fromisoformat((d.run.computed_at or "").replace("Z", "+00:00")).strftime("%Y-%m-%d %H:%M UTC")
    except ValueError:
        when = _e(d.run.computed_at or "")
    return (f"<footer><p>Written by segwatch {_e(__version__)} from the history at {_e(d.history_url)} "
            f"(job {_e(d.job)}, config {_e(d.config_path)}); the period was computed {when}. "
            "Nothing on this page is fetched from elsewhere.</p></footer>")


CSS = """
:root{--ink:#1f2a36;--muted:#5b6673;--rule:#e2ded6;--paper:#fbfaf7;--card:#fff;--high:#b34700;--low:#005a8c;
--sig-bg:#fbe4d4;--ns-bg:#eceff2;--bad-bg:#fdefd2;--bad-ink:#6e4700;--ok-bg:#ddf1e8;--ok-ink:#0b5a43;
--s1:#e1edf6;--s2:#bcd6ea;--s3:#8fbbdc}
*{box-sizing:border-box}
html{background:var(--paper);color:var(--ink);
font:15px/1.5 system-ui,-apple-system,"Segoe UI",Roboto,"Noto Sans","Liberation Sans",Arial,sans-serif;
font-variant-numeric:tabular-nums}
body{margin:0}
main{max-width:74rem;margin:0 auto;padding:2rem 1.5rem 3rem}
a{color:var(--low)}
h1{font-size:2rem;line-height:1.2;margin:.1rem 0 .4rem;font-weight:650}
h2{font-size:1.3rem;margin:0 0 .6rem;font-weight:650}
.masthead{border-bottom:1px solid var(--rule);padding-bottom:1rem;margin-bottom:1rem}
.eyebrow{margin:0;color:var(--muted);font-size:.85rem;letter-spacing:.04em;text-transform:uppercase}
.window{margin:0;color:var(--muted)}
.lede{font-size:1.1rem;margin:.7rem 0 0;max-width:60rem}
.contents ul{list-style:none;margin:0 0 1.5rem;padding:0;display:flex;flex-wrap:wrap;gap:.3rem 1.2rem;font-size:.9rem}
section,aside{margin:0 0 2rem}
.quiet{color:var(--muted)}
.hint{color:var(--muted);font-size:.9rem;margin:-.2rem 0 .7rem;max-width:60rem}
.events{list-style:none;padding:0;margin:0;display:grid;gap:.45rem}
.event{background:var(--card);border:1px solid var(--rule);border-left:4px solid var(--muted);border-radius:4px;
padding:.5rem .8rem}
.ev-emerged{border-left-color:#D55E00}.ev-cleared{border-left-color:#009E73}
.ev-assumption_broken,.ev-data_quality{border-left-color:#E69F00}
.ev-segment_missing,.ev-segment_new{border-left-color:#0072B2}.ev-assumption_restored{border-left-color:#56B4E9}
.tag{display:inline-block;min-width:9.5rem;font-size:.75rem;font-weight:650;text-transform:uppercase;
letter-spacing:.05em;color:var(--muted)}
.when{font-weight:600}
.scroll{overflow-x:auto}
table{border-collapse:collapse;font-size:.88rem}
th,td{text-align:left;vertical-align:top;padding:.45rem .55rem}
thead th{font-size:.78rem;font-weight:650;color:var(--muted);border-bottom:2px solid var(--rule);white-space:nowrap}
tbody tr{border-bottom:1px solid var(--rule)}
tbody th{font-weight:600}
table.overview{width:100%;background:var(--card);border:1px solid var(--rule)}
.overview tbody{border-bottom:1px solid var(--rule)}
.overview tbody tr{border-bottom:none}
.overview tbody.is-sig th[scope=row]{box-shadow:inset 4px 0 0 #D55E00}
.overview tr.main td{padding-bottom:.15rem}
.overview tr.why td{color:var(--muted);font-size:.8rem;padding-top:0;padding-bottom:.6rem}
.overview tr.why strong{color:var(--ink);font-weight:600}
.note-label{font-size:.7rem;text-transform:uppercase;letter-spacing:.05em;font-weight:650}
td.num{white-space:nowrap}
.overview td.q{font-weight:700}
.chip{display:inline-block;margin-top:.2rem;padding:.05rem .5rem;border-radius:999px;font-size:.75rem;
font-weight:600;border:1px solid transparent;white-space:nowrap;vertical-align:middle}
h2 .chip{font-size:.8rem}
.chip-sig{background:var(--sig-bg);color:#7a3000;border-color:#f0bf9c}
.chip-ns{background:var(--ns-bg);color:#3b4652;border-color:#d6dbe0}
.chip-na{background:#fff;color:var(--muted);border-color:var(--rule);border-style:dashed}
.flag{font-weight:600;white-space:nowrap}.flag-high{color:var(--high)}.flag-low{color:var(--low)}
.check{white-space:nowrap;padding:0 .3rem;border-radius:3px}
.check-bad{background:var(--bad-bg);color:var(--bad-ink)}.check-ok{background:var(--ok-bg);color:var(--ok-ink)}
.check-na{color:var(--muted)}
.watched{font-size:.7rem;text-transform:uppercase;letter-spacing:.05em;color:var(--muted);border:1px solid var(--rule);
border-radius:3px;padding:0 .25rem}
.care{background:#f3f1ec;border:1px solid var(--rule);border-radius:6px;padding:1rem 1.3rem}
.care ul{margin:0;padding-left:1.1rem;display:grid;gap:.35rem}
.metric{border-top:1px solid var(--rule);padding-top:1.6rem;margin-top:2.4rem}
.summary{font-size:1.05rem;max-width:60rem;margin:.2rem 0 .8rem}
.facts{display:grid;grid-template-columns:8rem 1fr;gap:.25rem 1rem;margin:0 0 1.2rem;font-size:.88rem}
.facts dt{color:var(--muted);font-weight:600}.facts dd{margin:0}
figure{margin:0 0 1.4rem;background:var(--card);border:1px solid var(--rule);border-radius:6px;padding:.8rem 1rem}
svg.chart{display:block;width:100%;height:auto}
figcaption{font-size:.86rem;color:var(--muted);margin-top:.4rem;max-width:64rem}
figcaption strong{color:var(--ink)}
details.numbers{margin:-.8rem 0 1.4rem;font-size:.88rem}
details.numbers summary{color:var(--muted);cursor:pointer;padding:.3rem 0}
table.segments{background:var(--card);border:1px solid var(--rule)}
table.matrix td,table.matrix th{padding:.3rem .45rem;font-size:.8rem}
table.matrix td.blank{background:none}
table.matrix thead th{writing-mode:initial}
.s1{background:var(--s1)}.s2{background:var(--s2)}.s3{background:var(--s3);font-weight:700}
footer{border-top:1px solid var(--rule);margin-top:2rem;padding-top:.8rem;color:var(--muted);font-size:.8rem}
@media print{
 html{background:#fff;font-size:10.5pt}
 main{max-width:none;padding:0}
 .contents{display:none}
 a{color:inherit;text-decoration:none}
 .metric{break-before:page;border-top:none;margin-top:0}
 figure,table,.event,.care,dl{break-inside:avoid}
 figure,.overview,table.segments,.event{border-color:#999}
 .chip,.check,.watched{border:1px solid #777}
 details.numbers summary{display:none}
 .scroll{overflow:visible}
 @page{size:A4;margin:14mm}
}
"""
