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
import os
import sys
import traceback
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence, TextIO

from . import __version__, methods
from .errors import EXIT_BUSY, EXIT_EMPTY, EXIT_FAILED, SegwatchError, UsageError
from .redact import redact

if TYPE_CHECKING:  # the command line imports the heavy modules only when a command needs them
    from .model import MetricResult, StoredResult
    from .runner import PeriodReport

log = logging.getLogger(__name__)

#: exit status when stdout is closed before everything was written (``... | head``): 128 + SIGPIPE,
#: what a shell reports for a program that a closed pipe stopped
EXIT_PIPE_CLOSED = 141
#: ``--pairs`` forms (the same as :data:`monitor.model.PAIR_FORMS`, named here so that start-up needs no numpy)
PAIR_CHOICES = ("top", "significant", "all")

EXAMPLES = {
    "run": "segwatch run configs/demo.yaml --period 2026-W14 --json",
    "backfill": "segwatch backfill configs/demo.yaml --from 2026-W01 --to 2026-W26",
    "history": "segwatch history configs/demo.yaml --metric dwell_hours",
    "check": "segwatch check configs/demo.yaml",
    "report": "segwatch report configs/demo.yaml --period 2026-W20 --out reports/2026-W20.html",
    "serve": "segwatch serve configs/demo.yaml configs/pricing.yaml",
    "alerts": "segwatch alerts configs/demo.yaml --retry",
}


def _add_global_options(parser: argparse.ArgumentParser, *, top: bool) -> None:
    """The options every command takes, before or after the command name.

    On the subcommands they default to ``SUPPRESS``, so that an option given before the
    command (``segwatch -v run ...``) is not reset by the subcommand's own default.
    """
    def default(value: Any) -> Any:
        return value if top else argparse.SUPPRESS

    g = parser.add_argument_group("logging (before or after the command)")
    g.add_argument("--debug", action="store_true", default=default(False),
                   help="show tracebacks and debug logging")
    g.add_argument("-v", "--verbose", action="store_true", default=default(False), help="log progress to stderr")
    g.add_argument("-q", "--quiet", action="store_true", default=default(False),
                   help="only warnings and errors on stderr (no progress bar)")
    g.add_argument("--log-format", choices=("text", "json"), default=default("text"),
                   help="stderr log lines as text (default) or JSON Lines; times are ISO 8601 UTC")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="segwatch",
        description="Watch recurring comparisons between segments, period after period.",
        epilog="exit codes: 0 done, 1 run failed, 2 bad usage or config, 3 skipped (another process has "
               "the period), 4 the period had no rows",
    )
    parser.add_argument("--version", action="version", version=f"segwatch {__version__}")
    _add_global_options(parser, top=True)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def command(name: str, help_text: str, description: str | None = None) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help_text, description=description or help_text,
                           epilog=f"example: {EXAMPLES[name]}")
        _add_global_options(p, top=False)
        return p

    def add(name: str, help_text: str) -> argparse.ArgumentParser:
        p = command(name, help_text)
        p.add_argument("config", metavar="CONFIG", help="the job's YAML config file")
        return p

    p = add("run", "compute one period (default: the latest complete one), store it and send its alerts")
    p.add_argument("--period", metavar="ID", help="period identifier: 2026-02-03, 2026-W06 or 2026-02")
    p.add_argument("--json", action="store_true", help="print the result as one JSON document")
    p.add_argument("--dry-run", action="store_true",
                   help="compute and compare with the stored history, but store nothing and send nothing")
    p.add_argument("--pairs", choices=PAIR_CHOICES, default="top",
                   help="which post-hoc pairs --json prints per metric: top (default: every pair of up to 24 "
                        "segments or of a reference metric, else the 20 smallest adjusted p-values; "
                        "pairs_left_out counts the rest), significant (top plus every significant pair of a "
                        "significant metric) or all")

    p = add("backfill", "run every period in a range, oldest first")
    p.add_argument("--from", dest="first", metavar="ID", required=True, help="first period")
    p.add_argument("--to", dest="last", metavar="ID", required=True, help="last period")
    p.add_argument("--json", action="store_true", help="print one JSON document per period (JSON Lines)")
    p.add_argument("--pairs", choices=PAIR_CHOICES, default="top", help="which pairs --json prints (as for run)")

    p = add("history", "print the stored results over periods")
    p.add_argument("--metric", metavar="NAME", help="one metric, segment by segment")
    p.add_argument("--json", action="store_true", help="print the stored entries as JSON (same as --format json)")
    p.add_argument("--format", choices=("table", "json", "jsonl", "csv"), default="table",
                   help="table (default); json: one document; jsonl: one JSON object per stored metric-period, "
                        "then per event; csv: one row per period, metric and segment")

    p = add("check", "validate the config and reach the source and history databases")
    p.add_argument("--period", metavar="ID",
                   help="the period whose window is queried and counted (default: the latest complete one)")

    p = add("report", "write a self-contained HTML report of one stored period (reads the history only)")
    p.add_argument("--period", metavar="ID", help="a stored period (default: the latest stored one)")
    p.add_argument("--periods", type=int, metavar="N",
                   help="how many stored periods the pictures over time cover (default: report.periods, 12)")
    p.add_argument("--out", metavar="FILE", required=True, help="the HTML file to write (replaced if it exists)")

    p = command("serve", "run every job on its schedule until SIGINT/SIGTERM, catching up missed periods",
                "Run every job on its cron `schedule` (read in UTC) until SIGINT/SIGTERM; "
                "at start and on every tick, compute each closed period not yet done.")
    p.add_argument("configs", nargs="+", metavar="CONFIG", help="job YAML config files, one job each")
    p.add_argument("--retry-minutes", type=float, default=5.0, metavar="N",
                   help="retry failed periods and undelivered alerts every N minutes (default 5)")

    p = add("alerts", "list undelivered (pending) and dead-lettered alerts; --retry sends them now")
    p.add_argument("--retry", action="store_true", help="send pending and dead alerts again now, ignoring backoff")
    p.add_argument("--json", action="store_true", help="print the alerts as one JSON document")
    return parser


class OutputClosed(Exception):
    """Whoever reads stdout has gone (``segwatch history ... | head``)."""


class _Stdout:
    """stdout for the commands: a closed pipe becomes :class:`OutputClosed`, told apart
    from a broken pipe anywhere else (an alert command's stdin, a socket)."""

    def __init__(self, stream: TextIO):
        self._stream = stream

    def write(self, text: str) -> int:
        try:
            return self._stream.write(text)
        except BrokenPipeError:
            raise OutputClosed from None

    def flush(self) -> None:
        try:
            self._stream.flush()
        except BrokenPipeError:
            raise OutputClosed from None

    def __getattr__(self, name: str) -> Any:
        return getattr(self._stream, name)


def _silence_stdout() -> None:
    """Point the stdout descriptor at the null device, so that the interpreter's last
    flush at exit finds no closed pipe (and prints no second error)."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):  # no real descriptor (a test's capture): nothing to flush
        pass


def _log_level(args: argparse.Namespace) -> int:
    if args.debug:
        return logging.DEBUG
    if args.verbose:
        return logging.INFO
    return logging.WARNING  # also under -q: warnings and errors only


def main(argv: Sequence[str] | None = None) -> int:
    out = _Stdout(sys.stdout)
    try:
        parser = build_parser()
        try:
            stdout, sys.stdout = sys.stdout, out  # --help and --version print through argparse
            args = parser.parse_args(argv)
        finally:
            sys.stdout = stdout
    except OutputClosed:
        _silence_stdout()
        return EXIT_PIPE_CLOSED
    from . import logs

    handler = logs.configure(_log_level(args), args.log_format, sys.stderr)
    try:
        return _dispatch(args, out)
    finally:
        logs.remove(handler)


def _say_error(args: argparse.Namespace, message: str, code: int) -> None:
    """The one stderr line of a failure: ``Error: ...`` as text, or a JSON Lines record."""
    message = redact(message)
    if args.log_format == "json":
        log.error("%s", message, extra={"exit_code": code})
    else:
        print(f"Error: {message}", file=sys.stderr)


def _dispatch(args: argparse.Namespace, out: _Stdout) -> int:
    try:
        code = COMMANDS[args.command](args, out)
        out.flush()
        return code
    except OutputClosed:
        _silence_stdout()
        return EXIT_PIPE_CLOSED
    except SegwatchError as exc:
        if exc.exit_code == EXIT_BUSY:  # another process is computing it: a notice, not an error
            if args.log_format == "json":
                log.warning("%s", exc, extra={"exit_code": exc.exit_code})
            else:
                print(redact(f"Skipped: {exc}"), file=sys.stderr)
            return exc.exit_code
        if args.debug:
            traceback.print_exc()
        _say_error(args, str(exc), exc.exit_code)
        return exc.exit_code
    except KeyboardInterrupt:
        _say_error(args, "interrupted", EXIT_FAILED)
        return EXIT_FAILED
    except Exception as exc:  # noqa: BLE001 - the last line of defence: one line, exit 1
        if args.debug:
            traceback.print_exc()
        _say_error(args, f"unexpected {type(exc).__name__}: {exc} (run again with --debug for details)",
                   EXIT_FAILED)
        return EXIT_FAILED


# ------------------------------------------------------------------ commands


def _load(path: str) -> Any:
    from .config import load_config

    return load_config(path)


def _job(cfg: Any) -> Any:
    from .runner import Job

    return Job(cfg)


def dump_run(report: Any, out: TextIO, pairs: str = "top") -> None:
    """Write one period's ``run --json`` document (``pairs``: one of :data:`PAIR_CHOICES`)."""
    out.write(json.dumps(report.to_json(pairs), indent=2))
    out.write("\n")


def cmd_run(args: argparse.Namespace, out: TextIO) -> int:
    with _job(_load(args.config)) as job:
        report = job.run(args.period, store=False) if args.dry_run else job.run(args.period)
        empty = _empty_line(job, report, latest=args.period is None) if report.rows == 0 else None
    if args.json:
        dump_run(report, out, args.pairs)
    else:
        out.write(render_report(report))
    if empty:
        out.flush()
        _notice(args, empty, EXIT_EMPTY)
        return EXIT_EMPTY
    return 0


def _where(cfg: Any) -> str:
    src = cfg.source
    if src.file:
        return f"{Path(src.file).name}'s {src.time_column}"
    return f"{src.table}.{src.time_column}" if src.table else f"the query's {src.time_column}"


def _empty_line(job: Any, report: PeriodReport, *, latest: bool) -> str:
    """The one line for a period without rows: which window was read where, and what may be wrong."""
    cfg, p = job.config, report.period
    window = f"{_where(cfg)} in [{p.start:%Y-%m-%d %H:%M}, {p.end:%Y-%m-%d %H:%M}) {p.start.tzinfo}"
    newest = _newest(job)
    if latest:
        before = job.history.previous(p)
        since = (f"the newest stored period is {before.period}: has the data stopped arriving?" if before
                 else "nothing is stored yet; give --period for an earlier one")
        return (f"the latest complete period, {p.ident}, of job {cfg.job} had no rows ({window}); nothing stored; "
                f"{newest}{since}")
    return (f"period {p.ident} of job {cfg.job} had no rows ({window}); nothing stored; {newest}if the table has "
            f"rows then, check that source.time_column holds timestamps or dates segwatch can read (segwatch check)")


def _newest(job: Any) -> str:
    """'the newest record is ...; ' (or that the source has none), for the empty-period line."""
    try:
        newest = job.source.newest_record()
    except SegwatchError:
        return ""
    return "the source has no records; " if newest is None else f"the newest record is {_time_text(newest)}; "


def _notice(args: argparse.Namespace, text: str, code: int) -> None:
    """A one-line notice on stderr that is not a failure (skipped, empty): shown under -q too."""
    if args.log_format == "json":
        log.warning("%s", text, extra={"exit_code": code})
    else:
        print(f"Note: {text}", file=sys.stderr)


def cmd_backfill(args: argparse.Namespace, out: TextIO) -> int:
    with _job(_load(args.config)) as job:
        periods = job.periods(args.first, args.last)
        bar = Progress(len(periods)) if sys.stderr.isatty() and not args.json and not args.quiet else None
        reports = []
        if bar and periods:
            bar.update(0, periods[0].ident)
        for i, report in enumerate(job.backfill_runs(periods)):
            if bar and i + 1 < len(periods):
                bar.update(i + 1, periods[i + 1].ident)
            reports.append(report)
            if args.json:
                out.write(json.dumps(report.to_json(args.pairs)) + "\n")
        if bar:
            bar.done()
        cfg = job.config
    if not args.json:
        out.write(render_backfill(cfg.job, reports))
    empty = [r.period.ident for r in reports if r.rows == 0]
    if reports and len(empty) == len(reports):
        out.flush()
        _notice(args, f"no period from {reports[0].period.ident} to {reports[-1].period.ident} of job {cfg.job} "
                      f"had rows in {_where(cfg)}; nothing stored. Check the range, and that source.time_column "
                      f"holds timestamps or dates segwatch can read", EXIT_EMPTY)
        return EXIT_EMPTY
    return 0


def cmd_history(args: argparse.Namespace, out: TextIO) -> int:
    cfg = _load(args.config)
    with _job(cfg) as job:
        names = [m.name for m in cfg.metrics]
        if args.metric is not None and args.metric not in names:
            raise UsageError(
                f"--metric: no metric {args.metric!r} in {cfg.path} (metrics: {', '.join(names)})")
        results = job.history.results(args.metric)  # typed; each with the level its period was judged at
        events = job.history.events()
    fmt = "json" if args.json else args.format
    if fmt == "json":
        json.dump({"job": cfg.job, "metrics": [r.to_json() for r in results], "events": events}, out, indent=2)
        out.write("\n")
        return 0
    if fmt == "jsonl":
        for r in results:
            out.write(json.dumps({"record": "metric", "job": cfg.job, **r.to_json()}, ensure_ascii=False) + "\n")
        for ev in events:
            out.write(json.dumps({"record": "event", "job": cfg.job, **ev}, ensure_ascii=False, default=str) + "\n")
        return 0
    if fmt == "csv":
        write_history_csv(cfg.job, results, out)
        return 0
    if not results:
        out.write(f"No stored periods for job {cfg.job} yet; run `segwatch run {args.config}` first.\n")
        return 0
    if args.metric:
        out.write(render_metric_history(args.metric, results))
    else:
        out.write(render_overview(cfg.job, results))
    return 0


HISTORY_CSV_COLUMNS = ("job", "period", "metric", "method", "statistic", "df_between", "df_within", "p_value",
                       "q_value", "significant", "effect", "effect_value", "segment", "n", "mean", "sd", "flag",
                       "excluded", "judged_at")


def write_history_csv(job: str, results: Sequence[StoredResult], out: TextIO) -> None:
    """The stored history as CSV (RFC 4180), one row per period, metric and segment (a metric
    without segments gets one row with the segment cells empty); labels exactly as stored;
    ``judged_at`` is the level the period was judged at (empty when not recorded)."""
    import csv

    writer = csv.writer(out, lineterminator="\r\n")
    writer.writerow(HISTORY_CSV_COLUMNS)
    for sr in results:
        r = sr.result
        df = list(r.df) + [None, None]
        eff = r.effect_size
        head = [job, sr.period, r.metric, r.method, _cell(r.statistic), _cell(df[0]), _cell(df[1]),
                _cell(r.p_value), _cell(r.q_value), r.significant, eff.name if eff else None,
                _cell(eff.value) if eff else None]
        for seg in r.segments or (None,):
            tail = [None] * 6 if seg is None else [seg.segment, seg.n, _cell(seg.mean), _cell(seg.sd), seg.flag,
                                                   seg.excluded]
            writer.writerow(["" if v is None else v for v in head + tail + [_cell(sr.judged_at)]])


def _cell(x: Any) -> Any:
    """A number for a table cell: None for NaN (an empty cell), else as stored."""
    return None if x is None or (isinstance(x, float) and not math.isfinite(x)) else x


def cmd_check(args: argparse.Namespace, out: TextIO) -> int:
    cfg = _load(args.config)
    out.write(f"config   {cfg.path}: job {cfg.job}, {len(cfg.metrics)} metrics, period {cfg.period}, "
              f"zone {cfg.timezone}\n")
    with _job(cfg) as job:
        info = job.source.describe()
        out.write(redact(f"source   {info.dialect} {info.server_version}: {len(info.columns)} columns, "
                         f"all configured columns present\n"))
        job.source.check_columns()
        out.write(f"columns  {cfg.source.time_column} holds times segwatch can place; the metric columns "
                  f"hold numbers\n")
        period = job.period(args.period)
        sent = job.source.check_window(period)
        rows = job.source.count_rows(period)
        out.write(f"window   {period.ident}: {sent} {'query' if sent == 1 else 'queries'} of the period "
                  f"answered; {rows:,} {'row' if rows == 1 else 'rows'} in it\n")
        if rows == 0:
            newest = job.source.newest_record()
            empty = (f"period {period.ident} of job {cfg.job} has no rows ({_where(cfg)} in "
                     f"[{period.start:%Y-%m-%d %H:%M}, {period.end:%Y-%m-%d %H:%M}) {period.start.tzinfo}); "
                     + (f"the newest record is {_time_text(newest)}: check an earlier period with --period, "
                        f"or check that the data still arrive" if newest is not None
                        else "the source has no records at all"))
        job.source.check_references()
        if any(m.reference is not None for m in cfg.metrics):
            out.write(f"source   reference segments present in {cfg.source.segment_column}\n")
        out.write(redact(f"history  {job.history.describe()}: tables ready\n"))
        for s in job.sinks:
            out.write(f"alert    {redact(s.channel)}\n")
    if rows == 0:
        out.flush()
        _notice(args, empty, EXIT_EMPTY)  # a run of this period would store nothing
        return EXIT_EMPTY
    out.write("ok\n")
    return 0


def _time_text(value: Any) -> str:
    if isinstance(value, datetime):
        return value.isoformat(sep=" ", timespec="seconds")
    return str(value)


def cmd_serve(args: argparse.Namespace, out: TextIO) -> int:
    import signal

    from .scheduler import Service

    service = Service([_load(path) for path in args.configs], retry_minutes=args.retry_minutes)

    def on_signal(signum: int, _frame: Any) -> None:
        log.info("received %s", signal.Signals(signum).name)
        service.stop_event.set()

    previous = {sig: signal.signal(sig, on_signal) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        service.start()
        for name, when in service.next_ticks().items():
            job = service.jobs[name]
            out.write(f"serving {name}: schedule {job.config.schedule!r} (UTC), next tick "
                      f"{when.isoformat().replace('+00:00', 'Z') if when else 'never'}; catching up now\n")
        out.flush()
        while not service.stop_event.wait(1.0):
            pass
        out.write("stopping: finishing the period being computed\n")
        out.flush()
    finally:
        service.shutdown()
        for sig, handler in previous.items():
            signal.signal(sig, handler)
    out.write("stopped\n")
    return 0


def cmd_alerts(args: argparse.Namespace, out: TextIO) -> int:
    cfg = _load(args.config)
    with _job(cfg) as job:
        outcome = None
        if args.retry:
            job.history.requeue(job.clock.now())
            outcome = job.deliver(force=True)
        rows = job.history.alerts()
        periods = sorted((e for e in job.ledger.entries().values() if e.state != "done"), key=lambda e: e.period)
    undelivered = bool(outcome and (outcome.busy or rows))
    if args.json:
        doc: dict[str, Any] = {"job": cfg.job, "alerts": [r.to_json() for r in rows],
                               "periods": [e.to_json() for e in periods]}
        if outcome is not None:
            doc["retry"] = {"sent": outcome.sent, "retrying": outcome.retrying, "dead": outcome.dead,
                            "busy": outcome.busy}
        out.write(redact(json.dumps(doc, indent=2)))
        out.write("\n")
        return 1 if undelivered else 0
    if outcome is not None:
        if outcome.busy:
            out.write(f"alerts of {cfg.job} are being delivered by {outcome.busy}; try again later\n")
        else:
            out.write(f"retry: {outcome.sent} sent, {outcome.retrying} still failing, {outcome.dead} dead\n")
    if not rows:
        out.write(f"No pending or dead alerts for job {cfg.job}.\n")
    else:
        counts = {s: sum(r.status == s for r in rows) for s in ("pending", "dead")}
        out.write(f"{cfg.job}: {counts['pending']} pending, {counts['dead']} dead\n\n")
        out.write(_table(
            ["status", "channel", "period", "kind", "metric", "segment", "attempts", "next try", "last error"],
            [[r.status, redact(r.channel), r.period or "-", r.kind, r.metric or "-", r.segment or "-",
              str(r.attempts),
              "-" if r.status == "dead" else (r.next_attempt_at.strftime("%Y-%m-%d %H:%M:%SZ")
                                              if r.next_attempt_at else "now"),
              redact(r.last_error) or "-"] for r in rows]))
    if periods:
        out.write("\nperiods not done:\n")
        out.write(_table(["period", "state", "attempts", "last error"],
                         [[e.period, e.state, str(e.attempts), redact(e.last_error) or "-"] for e in periods]))
    return 1 if undelivered else 0


def cmd_report(args: argparse.Namespace, out: TextIO) -> int:
    from .present.report import write_report  # matplotlib is imported only when a report is written

    if args.periods is not None and args.periods < 1:
        raise UsageError(f"--periods: give a whole number of at least 1, not {args.periods}")
    cfg = _load(args.config)
    with _job(cfg) as job:
        path = write_report(job, args.period, Path(args.out), args.periods)
    out.write(f"wrote {path}\n")
    return 0


COMMANDS = {"run": cmd_run, "backfill": cmd_backfill, "history": cmd_history, "check": cmd_check,
            "serve": cmd_serve, "alerts": cmd_alerts, "report": cmd_report}


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


def _statistic_text(method: str, value: str, df: Sequence[str]) -> str:
    known = methods.find(method)
    return known.statistic_text(value, df) if known else f"{method}({', '.join(df)}) = {value}"


def _g(x: Any, digits: int = 3) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.{digits}g}"


def _p(x: Any) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    return f"{x:.1e}" if x < 0.001 else f"{x:.3f}"


def clean(text: Any) -> str:
    """``text`` safe to print on a terminal: every character that is not printable -- control
    characters (ESC of ANSI/OSC sequences, newline, carriage return), bidirectional controls
    (U+202E ...), line separators -- is written as a visible escape (``\\x1b``, ``\\n``, ``\\u202e``).
    Labels come from the source's data, so a table can show them but they cannot drive the terminal,
    reorder a line or forge one."""
    text = str(text)
    if text.isprintable():
        return text
    named = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}
    return "".join(ch if ch.isprintable() else named.get(ch) or
                   (f"\\x{ord(ch):02x}" if ord(ch) < 0x100 else f"\\u{ord(ch):04x}" if ord(ch) < 0x10000
                    else f"\\U{ord(ch):08x}") for ch in text)


def _table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    return _grid(header, rows)


#: how many segments a terminal table names in its "stands apart" column before "+N more"
TOP_SEGMENTS = 5


def _df(d: Any) -> str:
    """A degree of freedom: whole numbers as integers (``F(49, 1000000)``), Welch's fractional
    denominator with one decimal (``F(4, 88.2)``)."""
    if not isinstance(d, (int, float)) or not math.isfinite(d):
        return "-"
    return str(int(d)) if float(d).is_integer() else f"{d:.1f}"


def _standing_apart(segments: Sequence[dict[str, Any]]) -> str:
    """Flagged segments, furthest from the overall mean first; the first few, then ``+N more``."""
    flagged = [s for s in segments if s.get("flag")]
    sized = [(s.get("n") or 0, s.get("mean")) for s in segments]
    total = sum(n for n, m in sized if isinstance(m, (int, float)) and math.isfinite(m))
    centre = (sum(n * m for n, m in sized if isinstance(m, (int, float)) and math.isfinite(m)) / total
              if total else None)

    def distance(s: dict[str, Any]) -> float:
        m = s.get("mean")
        return abs(m - centre) if centre is not None and isinstance(m, (int, float)) and math.isfinite(m) else 0.0

    flagged.sort(key=distance, reverse=True)  # stable: equal distances keep the stored order
    names = [f"{s['segment']} {'▲' if s['flag'] == 'high' else '▼'}" for s in flagged[:TOP_SEGMENTS]]
    if len(flagged) > TOP_SEGMENTS:
        names.append(f"+{len(flagged) - TOP_SEGMENTS} more")
    return ", ".join(names)


def _metric_row(m: dict[str, Any]) -> list[str]:
    df = m.get("df") or []
    stat = "-" if m.get("statistic") is None else (
        _statistic_text(m["method"], _g(m["statistic"], 4), [_df(d) for d in df]))
    eff = m.get("effect_size") or {}
    flagged = _standing_apart(m.get("segments", []))
    broken = [k for k, c in (m.get("assumptions") or {}).items() if c.get("passed") is False]
    d = m.get("decision") or {}
    evidence = _p(d.get("evidence")) if d.get("rule") == "two_period" else "-"
    return [m["metric"], m["method"], stat, _p(m.get("p_value")), _p(m.get("q_value")), evidence,
            "yes" if m.get("significant") else "no",
            f"{eff.get('name', '').replace('_squared', '²').replace('omega', 'ω').replace('epsilon', 'ε')} "
            f"{_g(eff.get('value'), 2)}" if eff else "-",
            flagged or "-", ", ".join(broken) or "-"]


METRIC_HEADER = ["metric", "method", "statistic", "p", "q", "evidence", "differs", "effect", "stands apart",
                 "checks failing"]


def _adjusted_lines(m: dict[str, Any]) -> str:
    """The adjusted gaps of one metric beside the raw ones (``adjust_for``)."""
    adj = m["adjustment"]
    raw = adj.get("raw") or {}
    lines = [f"\n{clean(m['metric'])} within {clean(', '.join(adj['columns']))} (raw: {raw.get('method')}, "
             f"p {_p(raw.get('p_value'))}); simultaneous intervals:"]
    rows = []
    for g in adj["gaps"]:
        if "percent" in g:
            fmt = [_pct(g.get(k)) for k in ("raw_percent", "percent", "percent_low", "percent_high")]
        else:
            fmt = [_g(g.get(k), 4) for k in ("raw_gap", "gap", "ci_low", "ci_high")]
        explained = "-" if g.get("explained") is None else f"{100 * g['explained']:.0f}%"
        rows.append([f"{clean(g['segment'])} vs {clean(g['reference'])}", fmt[0], f"{fmt[1]} [{fmt[2]}, {fmt[3]}]",
                     explained, "yes" if g.get("significant") else "no"])
    return "\n".join(lines) + "\n" + _table(["gap", "raw", "adjusted", "explained", "sig"], rows)


def _pct(x: Any) -> str:
    return "n/a" if x is None else f"{x:+.1f}%"


def _decision_line(report: PeriodReport) -> str:
    """What "differs" means in this run, in one sentence (the decision rule and its budget)."""
    verdicts = [m.decision for m in report.metrics if m.decision is not None]
    if not verdicts:
        return ""
    v = verdicts[0]
    if v.rule != "two_period":
        return f"\ndiffers: q at most {v.level:g} in this period (decision.rule: per_period).\n"
    return (f"\ndiffers: the evidence of this period and the one before it (p*) is at most {v.level:.2g}, "
            f"the level of the job's budget of false alarms a year (decision.false_alarms_per_year) over "
            f"{sum(1 for m in report.metrics if m.computed)} metrics; a real change is usually announced in its "
            "first or second period.\n")


def render_report(report: PeriodReport) -> str:
    doc = report.to_json()
    p = report.period
    head = (f"{clean(report.job)} {p.ident}  [{p.start:%Y-%m-%d %H:%M} .. {p.end:%Y-%m-%d %H:%M}) {p.start.tzinfo}  "
            f"{report.rows} rows, {len(report.segments)} segments\n\n")
    if report.rows == 0:
        return head + f"{report.note or 'the source had no rows in this period'}\n"
    body = _table(METRIC_HEADER, [_metric_row(m) for m in doc["metrics"]])
    body += _decision_line(report)
    body += "".join(_adjusted_lines(m) for m in doc["metrics"] if m.get("adjustment"))
    notes = [f"  {clean(m['metric'])}: {clean(m['note'])}" for m in doc["metrics"] if m.get("note")]
    if notes:
        body += "\nnotes:\n" + "\n".join(notes) + "\n"
    if report.events:
        body += "\nevents:\n" + "".join(f"  {e.kind:<20} {clean(e.message)}\n" for e in report.events)
    else:
        body += "\nno events: nothing changed since the previous stored period.\n"
    if report.note:
        body += f"\n{report.note}\n"
    return head + body


def render_backfill(job: str, reports: Sequence[PeriodReport]) -> str:
    if not reports:
        return "No periods in that range.\n"
    empty = [r.period.ident for r in reports if r.rows == 0]
    lines = [f"{clean(job)}: {len(reports)} periods computed, {reports[0].period.ident} to "
             f"{reports[-1].period.ident}"
             + (f"; {len(empty)} had no rows, nothing stored for them: {_runs(empty)}" if empty else ""), ""]
    counts: dict[str, int] = {}
    for r in reports:
        for e in r.events:
            counts[e.kind] = counts.get(e.kind, 0) + 1
    lines.append("events by kind: " + (", ".join(f"{k} {n}" for k, n in sorted(counts.items())) or "none"))
    lines.append("")
    for r in reports:
        for e in r.events:
            lines.append(f"{r.period.ident}  {e.kind:<20} {clean(e.message)}")
    return "\n".join(lines) + "\n"


def _runs(idents: Sequence[str], most: int = 6) -> str:
    """Period identifiers, at most ``most`` of them, then ``+N more``."""
    shown = ", ".join(idents[:most])
    return shown + (f" +{len(idents) - most} more" if len(idents) > most else "")


def _marks(r: MetricResult) -> str:
    """Two marker characters for a stored verdict: * significant (as judged when stored), ! a watched check fails."""
    return ("*" if r.significant else " ") + ("!" if r.watched_failing else " ")


def _decimals(values: Sequence[Any]) -> int:
    """Decimal places that show about three significant digits of the typical value."""
    vals = sorted(abs(v) for v in values if isinstance(v, (int, float)) and math.isfinite(v) and v != 0)
    if not vals:
        return 2
    return min(6, max(0, 2 - math.floor(math.log10(vals[len(vals) // 2]))))


def _grid(header: Sequence[str], rows: Sequence[Sequence[str]], right: Sequence[int] = ()) -> str:
    """A plain-text table; the columns in ``right`` are right-aligned (numbers)."""
    header = [clean(c) for c in header]
    rows = [[clean(c) for c in r] for r in rows]
    widths = [max(len(c) for c in col) for col in zip(header, *rows)]

    def line(cells: Sequence[str]) -> str:
        return "  ".join(str(c).rjust(w) if i in right else str(c).ljust(w)
                         for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    return "\n".join([line(header), "  ".join("-" * w for w in widths), *(line(r) for r in rows)]) + "\n"


def _two_period(r: MetricResult) -> bool:
    return r.decision is not None and r.decision.rule == "two_period"


def _shown_value(r: MetricResult) -> float:
    """What a history cell shows: the decision rule's evidence under the two-period rule, else the q-value."""
    return r.decision.evidence if _two_period(r) else r.q_value


def render_overview(job: str, results: Sequence[StoredResult]) -> str:
    """Metrics x periods: one row per stored period, one column per metric, the q-value
    in each cell with * where the metric differs and ! where a watched check fails.

    A verdict is the one stored, judged at its period's own level: one level for all
    periods is named in the legend, else a ``level`` column gives each period's
    (``?`` for a period stored before runs recorded their settings)."""
    periods = list(dict.fromkeys(r.period for r in results))
    metrics = sorted(dict.fromkeys(r.metric for r in results))
    cell = {(r.metric, r.period): r for r in results}
    level = {r.period: r.judged_at for r in results}
    levels = set(level.values())
    one = next(iter(levels)) if len(levels) == 1 and None not in levels else None
    two = [r.result.decision.level for r in results
           if _two_period(r.result) and math.isfinite(r.result.decision.level)]
    rows = []
    for p in periods:
        row = [p] if one is not None or two else [p, "?" if level[p] is None else f"{level[p]:g}"]
        for m in metrics:
            r = cell.get((m, p))
            row.append("." if r is None else _p(_shown_value(r.result)) + _marks(r.result))
        n_sig = sum(1 for m in metrics if (m, p) in cell and cell[(m, p)].result.significant)
        row.append(str(n_sig) if n_sig else "")
        rows.append(row)
    if two:  # the stored verdicts and levels: a budget changed later does not re-judge them
        shown = f"{min(two):.2g}" if min(two) == max(two) else f"{min(two):.2g} to {max(two):.2g}"
        legend = (f"evidence by period (this period with the one before); * differs (at or below the stored "
                  f"level, {shown}), ! a watched assumption check fails, . not stored")
    else:
        if one is not None:
            judged = f"* differs (q <= {one:g}) at the level stored with every period"
        else:
            judged = ("* differs (q at or below the level its period was judged at, column level; "
                      "? a period stored without its settings: its stored verdict)")
        legend = f"q-value by period; {judged}, ! a watched assumption check fails, . not stored"
    foot = (f"\n{len(periods)} periods, {periods[0]} to {periods[-1]}. One metric segment by segment: "
            "--metric NAME; everything: --json.\n") if periods else ""
    head = ["period"] + ([] if one is not None or two else ["level"])
    return (f"{job}: {legend}\n\n"
            + _grid([*head, *metrics, "differ"], rows, right=range(len(head), len(head) + len(metrics) + 1)) + foot)


def render_metric_history(metric: str, results: Sequence[StoredResult]) -> str:
    """Segments x periods for one metric: one row per stored period, one column per
    segment with its mean (▲/▼ where it stands above/below the rest), plus the test,
    the q-value with * / ! as in the overview (each period judged at its own stored
    level, shown beside it), and the watched checks that fail."""
    if not results:
        return ""
    segs = sorted({s.segment for r in results for s in r.result.segments})
    places = _decimals([s.mean for r in results for s in r.result.segments])
    levels = {sr.judged_at for sr in results}
    one = next(iter(levels)) if len(levels) == 1 and None not in levels else None
    rows = []
    for sr in results:
        r = sr.result
        by = {s.segment: s for s in r.segments}
        row = [sr.period, r.method or "-", _p(r.q_value) + _marks(r)]
        if one is None:
            row.append("?" if sr.judged_at is None else f"{sr.judged_at:g}")
        for s in segs:
            x = by.get(s)
            if x is None:
                row.append(".")
                continue
            text = f"{x.mean:.{places}f}" if math.isfinite(x.mean) else "-"
            mark = {"high": "▲", "low": "▼"}.get(x.flag or "", " ")
            row.append(text + ("~" if x.excluded else mark))
        row.append(", ".join(r.watched_failing))
        rows.append(row)
    judged = (f"q <= {one:g}, the level stored with every period" if one is not None else
              "q at or below the level its period was judged at, column level; ? not recorded")
    legend = ("mean per segment and period; ▲/▼ stands above/below the rest, ~ left out (too few values), "
              f". no records; q: * differs ({judged}), ! a watched check fails")
    unit = next((r.result.unit for r in results if r.result.unit), None)
    head = ["period", "test", "q"] + ([] if one is not None else ["level"])
    return (f"{metric}{f' ({unit})' if unit else ''}: {legend}\n\n"
            + _grid([*head, *segs, "failing checks"], rows, right=range(2, len(segs) + len(head))))
