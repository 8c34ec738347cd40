"""The ``segwatch`` command line: a thin layer over :class:`monitor.runner.Job`.

Each command loads the config, calls one method of the API and prints. Expected
failures become one ``Error: ...`` line on stderr and the contract's exit code
(1 run failed, 2 bad usage or config); ``--debug`` adds the traceback.
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import sys
import traceback
from typing import Any, Sequence, TextIO

from . import __version__
from .config import load_config
from .errors import SegwatchError, UsageError
from .runner import Job, PeriodReport

log = logging.getLogger(__name__)

EXAMPLES = {
    "run": "segwatch run configs/demo.yaml --period 2026-W14 --json",
    "backfill": "segwatch backfill configs/demo.yaml --from 2026-W01 --to 2026-W26",
    "history": "segwatch history configs/demo.yaml --metric dwell_hours",
    "check": "segwatch check configs/demo.yaml",
}


def build_parser() -> argparse.ArgumentParser:
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")
    common.add_argument("-v", "--verbose", action="store_true", help="log progress to stderr")

    parser = argparse.ArgumentParser(
        prog="segwatch",
        description="Watch recurring comparisons between segments, period after period.",
        parents=[common],
    )
    parser.add_argument("--version", action="version", version=f"segwatch {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def add(name: str, help_text: str) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help_text, description=help_text, parents=[common],
                           epilog=f"example: {EXAMPLES[name]}")
        p.add_argument("config", metavar="CONFIG", help="the job's YAML config file")
        return p

    p = add("run", "compute one period (default: the latest complete one), store it and send its alerts")
    p.add_argument("--period", metavar="ID", help="period identifier: 2026-02-03, 2026-W06 or 2026-02")
    p.add_argument("--json", action="store_true", help="print the result as one JSON document")

    p = add("backfill", "run every period in a range, oldest first")
    p.add_argument("--from", dest="first", metavar="ID", required=True, help="first period")
    p.add_argument("--to", dest="last", metavar="ID", required=True, help="last period")
    p.add_argument("--json", action="store_true", help="print one JSON document per period (JSON Lines)")

    p = add("history", "print the stored results over periods")
    p.add_argument("--metric", metavar="NAME", help="one metric, segment by segment")
    p.add_argument("--json", action="store_true", help="print the stored entries as JSON")

    add("check", "validate the config and reach the source and history databases")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    level = logging.DEBUG if args.debug else logging.INFO if args.verbose else logging.WARNING
    logging.basicConfig(level=level, stream=sys.stderr, format="%(levelname)s %(name)s: %(message)s")
    try:
        return COMMANDS[args.command](args, sys.stdout)
    except SegwatchError as exc:
        if args.debug:
            traceback.print_exc()
        print(f"Error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("Error: interrupted", file=sys.stderr)
        return 1
    except Exception as exc:  # noqa: BLE001 - the last line of defence: one line, exit 1
        if args.debug:
            traceback.print_exc()
        print(f"Error: unexpected {type(exc).__name__}: {exc} (run again with --debug for details)",
              file=sys.stderr)
        return 1


# ------------------------------------------------------------------ commands


def cmd_run(args: argparse.Namespace, out: TextIO) -> int:
    with Job(load_config(args.config)) as job:
        report = job.run(args.period)
    if args.json:
        json.dump(report.to_json(), out, indent=2)
        out.write("\n")
    else:
        out.write(render_report(report))
    return 0


def cmd_backfill(args: argparse.Namespace, out: TextIO) -> int:
    with Job(load_config(args.config)) as job:
        periods = job.periods(args.first, args.last)
        bar = Progress(len(periods)) if sys.stderr.isatty() and not args.json else None
        reports = []
        for i, p in enumerate(periods):
            if bar:
                bar.update(i, p.ident)
            report = job.run(p)
            reports.append(report)
            if args.json:
                out.write(json.dumps(report.to_json()) + "\n")
        if bar:
            bar.done()
    if not args.json:
        out.write(render_backfill(job.config.job, reports))
    return 0


def cmd_history(args: argparse.Namespace, out: TextIO) -> int:
    cfg = load_config(args.config)
    with Job(cfg) as job:
        names = [m.name for m in cfg.metrics]
        if args.metric is not None and args.metric not in names:
            raise UsageError(
                f"--metric: no metric {args.metric!r} in {cfg.path} (metrics: {', '.join(names)})")
        entries = job.history.metric_history(args.metric)
        events = job.history.events()
    if args.json:
        json.dump({"job": cfg.job, "metrics": entries, "events": events}, out, indent=2)
        out.write("\n")
        return 0
    if not entries:
        out.write(f"No stored periods for job {cfg.job} yet; run `segwatch run {args.config}` first.\n")
        return 0
    if args.metric:
        out.write(render_metric_history(args.metric, entries))
    else:
        out.write(render_overview(cfg.job, entries, cfg.fdr.level))
    return 0


def cmd_check(args: argparse.Namespace, out: TextIO) -> int:
    cfg = load_config(args.config)
    out.write(f"config   {cfg.path}: job {cfg.job}, {len(cfg.metrics)} metrics, period {cfg.period}, "
              f"zone {cfg.timezone}\n")
    with Job(cfg) as job:
        info = job.source.describe()
        out.write(f"source   {info.dialect} {info.server_version}: {len(info.columns)} columns, "
                  f"all configured columns present\n")
        out.write(f"history  {job.history.describe()}: tables ready\n")
        for s in job.sinks:
            out.write(f"alert    {s.channel}\n")
    out.write("ok\n")
    return 0


COMMANDS = {"run": cmd_run, "backfill": cmd_backfill, "history": cmd_history, "check": cmd_check}


# ------------------------------------------------------------------ rendering


class Progress:
    """A one-line progress bar on stderr (only used when stderr is a terminal)."""

    def __init__(self, total: int, width: int = 30):
        self.total, self.width = max(total, 1), width

    def update(self, done: int, label: str) -> None:
        filled = int(self.width * done / self.total)
        sys.stderr.write(f"\r[{'#' * filled}{'.' * (self.width - filled)}] {done}/{self.total} {label} ")
        sys.stderr.flush()

    def done(self) -> None:
        self.update(self.total, "done")
        sys.stderr.write("\n")


def _g(x: Any, digits: int = 3) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.{digits}g}"


def _p(x: Any) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.1e}" if x < 0.001 else f"{x:.3f}"


def _table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    widths = [max(len(str(c)) for c in col) for col in zip(header, *rows)]
    lines = ["  ".join(str(c).ljust(w) for c, w in zip(header, widths)).rstrip()]
    lines.append("  ".join("-" * w for w in widths))
    lines += ["  ".join(str(c).ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows]
    return "\n".join(lines) + "\n"


def _metric_row(m: dict[str, Any]) -> list[str]:
    df = m.get("df") or []
    stat = "-" if m.get("statistic") is None else (
        f"{'H' if m['method'] == 'kruskal' else 'F'}({', '.join(_g(d, 4) for d in df)}) = {_g(m['statistic'], 4)}")
    eff = m.get("effect_size") or {}
    flagged = ", ".join(f"{s['segment']} {'▲' if s['flag'] == 'high' else '▼'}"
                        for s in m.get("segments", []) if s.get("flag"))
    broken = [k for k, c in (m.get("assumptions") or {}).items() if c.get("passed") is False]
    return [m["metric"], m["method"], stat, _p(m.get("p_value")), _p(m.get("q_value")),
            "yes" if m.get("significant") else "no",
            f"{eff.get('name', '').replace('_squared', '²').replace('omega', 'ω').replace('epsilon', 'ε')} "
            f"{_g(eff.get('value'), 2)}" if eff else "-",
            flagged or "-", ", ".join(broken) or "-"]


METRIC_HEADER = ["metric", "method", "statistic", "p", "q", "sig", "effect", "stands apart", "checks failing"]


def render_report(report: PeriodReport) -> str:
    doc = report.to_json()
    p = report.period
    head = (f"{report.job} {p.ident}  [{p.start:%Y-%m-%d %H:%M} .. {p.end:%Y-%m-%d %H:%M}) {p.start.tzinfo}  "
            f"{report.rows} rows, {len(report.segments)} segments\n\n")
    body = _table(METRIC_HEADER, [_metric_row(m) for m in doc["metrics"]])
    notes = [f"  {m['metric']}: {m['note']}" for m in doc["metrics"] if m.get("note")]
    if notes:
        body += "\nnotes:\n" + "\n".join(notes) + "\n"
    if report.events:
        body += "\nevents:\n" + "".join(f"  {e.kind:<20} {e.message}\n" for e in report.events)
    else:
        body += "\nno events: nothing changed since the previous stored period.\n"
    return head + body


def render_backfill(job: str, reports: Sequence[PeriodReport]) -> str:
    if not reports:
        return "No periods in that range.\n"
    lines = [f"{job}: {len(reports)} periods computed, {reports[0].period.ident} to {reports[-1].period.ident}", ""]
    counts: dict[str, int] = {}
    for r in reports:
        for e in r.events:
            counts[e.kind] = counts.get(e.kind, 0) + 1
    lines.append("events by kind: " + (", ".join(f"{k} {n}" for k, n in sorted(counts.items())) or "none"))
    lines.append("")
    for r in reports:
        for e in r.events:
            lines.append(f"{r.period.ident}  {e.kind:<20} {e.message}")
    return "\n".join(lines) + "\n"


def render_overview(job: str, entries: Sequence[dict[str, Any]], level: float) -> str:
    """Metrics x periods: q-value, with * where significant."""
    periods = list(dict.fromkeys(e["period"] for e in entries))
    metrics = list(dict.fromkeys(e["metric"] for e in entries))
    cell = {(e["metric"], e["period"]): e for e in entries}
    rows = []
    for p in periods:
        row = [p]
        for m in metrics:
            e = cell.get((m, p))
            row.append("" if e is None else _p(e.get("q_value")) + ("*" if e.get("significant") else " "))
        rows.append(row)
    return (f"{job}: q-values by period (* = significant at {level})\n\n"
            + _table(["period", *metrics], rows))


def render_metric_history(metric: str, entries: Sequence[dict[str, Any]]) -> str:
    """Segments x periods: mean, with ▲/▼ where flagged."""
    periods = [e["period"] for e in entries]
    segs = sorted({s["segment"] for e in entries for s in e.get("segments", [])})
    rows = []
    for e in entries:
        by = {s["segment"]: s for s in e.get("segments", [])}
        row = [e["period"], e["method"], _p(e.get("q_value")) + ("*" if e.get("significant") else " ")]
        for s in segs:
            x = by.get(s)
            mark = {"high": "▲", "low": "▼"}.get(x.get("flag"), " ") if x else ""
            row.append("" if x is None else f"{_g(x.get('mean'), 4)}{mark}")
        rows.append(row)
    return (f"{metric}: segment means by period (▲/▼ = stands above/below the rest; * = significant)\n\n"
            + _table(["period", "method", "q", *segs], rows)) if periods else ""
