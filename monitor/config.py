"""The job file: YAML in, frozen and validated objects out.

One YAML file describes one job (see CONTRACT.md, "Config file")::

    cfg = load_config("configs/depot-weekly.yaml")
    cfg.source.table, cfg.period, [m.name for m in cfg.metrics]

This module is the edge: everything a user can get wrong is caught here, once, and
reported as a :class:`~monitor.errors.ConfigError` with one line of the form::

    <file>: <key path>: <what is wrong> (given: <value>; accepted: <what>)

e.g. ``jobs/depots.yaml: metrics[1].test: unknown test (given: 'anvoa'; accepted: auto, anova, welch,
kruskal)``. Code below this module trusts the objects it returns.

Besides checking keys, types and values, loading

* expands ``${NAME}`` in every string value from the environment (``$${`` is a literal
  ``${``); a number or true/false may come from a variable too (``port: ${SMTP_PORT}``);
* makes relative paths absolute against the config file's folder: the ``log`` alert
  ``path``, a relative ``command`` executable (``./notify.sh``), and the file of
  ``sqlite:///`` and ``duckdb:///`` URLs;
* fills defaults: ``job`` is the file's stem, ``history.url`` is
  ``sqlite:///<config folder>/.segwatch/history.sqlite``.

Secrets stay out of ``repr()`` and of error messages: database URLs show ``***`` for a
password; SMTP passwords and webhook header values show ``<hidden>``.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import logging
import math
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, fields, replace
from datetime import date
from pathlib import Path
from typing import Any, Callable, NoReturn
from urllib.parse import quote, unquote
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError, available_timezones

import yaml

from monitor import methods
from monitor.delivery.sinks import base as sink_types
from monitor.errors import ConfigError
from monitor.redact import redact

__all__ = [
    "SourceConfig",
    "MetricConfig",
    "FdrConfig",
    "HistoryConfig",
    "AlertConfig",
    "QualityConfig",
    "PosthocConfig",
    "JobConfig",
    "load_config",
    "parse_config",
    "config_hash",
    "display_url",
]

logger = logging.getLogger(__name__)

PERIOD_KINDS = ("day", "week", "month")
TRANSFORMS = ("none", "log", "log1p")
ADJUSTMENTS = ("bh", "by", "holm", "bonferroni", "none")
NAIVE_TIME = ("local", "utc")


def tests() -> tuple[str, ...]:
    """The accepted ``metrics[i].test`` values: ``auto`` and every registered test method."""
    return (methods.AUTO, *methods.names())


# -- the objects -------------------------------------------------------------------------


@dataclass(frozen=True, repr=False)
class SourceConfig:
    """Where the records come from. Exactly one of ``table`` and ``query`` is set
    (``source.file`` becomes a ``query`` over the file in an in-memory DuckDB, ``file`` its path).

    ``query`` is one SELECT (or WITH) statement with trailing semicolons and comments
    removed, so it can be wrapped as a subquery. ``naive_time`` says how timestamps
    without a zone are read: as wall time in the job's zone (``local``) or as UTC.
    """

    url: str
    table: str | None
    query: str | None
    time_column: str
    segment_column: str
    naive_time: str = "local"
    file: str | None = None  # source.file: the CSV/Parquet file behind ``query`` (DuckDB in memory)
    #: Seconds one source statement may run before the engine stops it (``source.timeout``).
    timeout: float = 300.0

    @property
    def display_url(self) -> str:
        """The URL with any password replaced by ``***``, for logs and messages."""
        return display_url(self.url)

    def __repr__(self) -> str:
        return _repr_with(self, url=self.display_url)


@dataclass(frozen=True)
class MetricConfig:
    """One numeric column compared across segments.

    ``name`` identifies the metric in results and history (it defaults to ``column``;
    two entries may share a column under different names). ``min_effect`` is in
    omega-squared units.
    """

    column: str
    name: str
    test: str = "auto"
    reference: str | None = None
    transform: str = "none"
    unit: str | None = None
    decimals: int | None = None
    min_effect: float | None = None
    label: str | None = None
    adjust_for: tuple[str, ...] = ()  # categorical columns the segments are compared within
    min_difference: float | None = None  # a practical threshold: in the metric's units, or a percentage
    min_difference_percent: bool = False  # min_difference is a percentage (``"5%"``)


@dataclass(frozen=True)
class FdrConfig:
    """Multiplicity control across the metrics of one period.

    ``pairs`` says how post-hoc pairs are read inside a significant metric:
    ``within`` (each metric's family at ``alpha``) or ``selective`` (Benjamini &
    Bogomolov 2014: at ``alpha * R / m``, R metrics selected out of m).
    """

    method: str = "bh"
    level: float = 0.05
    pairs: str = "within"


@dataclass(frozen=True)
class DecisionConfig:
    """When a metric "now differs", and when an assumption check "now fails" (see
    :mod:`monitor.decisions`).

    ``rule``: ``two_period`` (the default: this period's evidence with the previous
    period's, held to a level set from the yearly budgets, with hysteresis) or
    ``per_period`` (each period alone: ``q <= fdr.level``, with ``confirm``).
    ``false_alarms_per_year``: the expected number of false metric-level alarms a year
    the job may raise; ``check_alarms_per_year`` the same for assumption checks.
    ``weight_now``: the share of the level spent on this period alone.
    ``clear_above`` and ``quiet_periods``: an announcement is taken back after
    ``quiet_periods`` periods in a row whose p-values are all above ``clear_above``.
    """

    rule: str = "two_period"
    false_alarms_per_year: float = 1.0
    check_alarms_per_year: float = 1.0
    weight_now: float = 0.2
    clear_above: float = 0.10
    quiet_periods: int = 2

    def to_json(self) -> dict[str, Any]:
        return {"rule": self.rule, "false_alarms_per_year": self.false_alarms_per_year,
                "check_alarms_per_year": self.check_alarms_per_year, "weight_now": self.weight_now,
                "clear_above": self.clear_above, "quiet_periods": self.quiet_periods}


@dataclass(frozen=True)
class SamplingConfig:
    """How values (for ranks and diagnostics) are obtained when sums are pushed down.

    ``mode``: ``auto`` (all values while a period's rows fit under ``cap`` per
    segment, a seeded random sample above that), ``full`` (always all values) or
    ``sample`` (always a sample of at most ``cap`` per segment).
    """

    mode: str = "auto"
    cap: int = 5000
    seed: int = 0


@dataclass(frozen=True)
class ScheduleOptions:
    """Scheduling knobs: wait ``settle_minutes`` after a period closes before computing
    it (late data), and recompute the last ``lookback`` closed periods on every tick."""

    settle_minutes: int = 0
    lookback: int = 0


@dataclass(frozen=True)
class ReportConfig:
    """Report settings: how many periods the trend pictures cover, where ``serve``
    writes a report after each run (``path`` may contain ``{period}``), and whether
    the email digest attaches it."""

    periods: int = 12
    path: Path | None = None
    attach: bool = False


@dataclass(frozen=True, repr=False)
class HistoryConfig:
    """Where results, events and the period ledger are stored (an SQLAlchemy URL)."""

    url: str

    @property
    def display_url(self) -> str:
        return display_url(self.url)

    def __repr__(self) -> str:
        return _repr_with(self, url=self.display_url)


#: One configured alert: the frozen config object of its channel type (see
#: :mod:`monitor.delivery.sinks`; ``type`` names the type, ``kinds`` the event kinds it receives).
AlertConfig = Any


@dataclass(frozen=True)
class QualityConfig:
    """Data-quality limits: the share of unusable values tolerated, and rows needed per segment."""

    max_bad_share: float = 0.05
    min_rows_per_segment: int = 2


@dataclass(frozen=True)
class PosthocConfig:
    """Post-hoc settings: p-value adjustment for Dunn's pairs, and the confidence of intervals."""

    dunn_adjust: str = "holm"
    confidence: float = 0.95


@dataclass(frozen=True)
class JobConfig:
    """One validated job. ``path`` is the absolute path of the file it came from."""

    job: str
    path: Path
    source: SourceConfig
    period: str
    timezone: str
    metrics: tuple[MetricConfig, ...]
    fdr: FdrConfig
    history: HistoryConfig
    alerts: tuple[AlertConfig, ...]
    schedule: str | None
    quality: QualityConfig
    posthoc: PosthocConfig
    alpha: float = 0.05
    compute: str = "pushdown"
    sampling: SamplingConfig = SamplingConfig()
    confirm: int = 1
    power: float = 0.8
    scheduling: ScheduleOptions = ScheduleOptions()
    report: ReportConfig = ReportConfig()
    decision: DecisionConfig = DecisionConfig()

    @property
    def zone(self) -> ZoneInfo:
        return ZoneInfo(self.timezone)

    @property
    def fingerprint(self) -> str:
        """See :func:`config_hash`."""
        return config_hash(self)


def config_hash(cfg: JobConfig) -> str:
    """A short, stable hash of the settings that change a computed statistic.

    It covers each metric's name, column, test, reference, transform, min_effect and
    adjust_for (in name order, since order changes no result), the FDR method and level, ``alpha``,
    the post-hoc settings, the quality limits and the decision rule. Labels, units, decimals, alerts,
    schedule and the source are left out. Returns 12 hex digits of a SHA-256.
    """
    settings = {
        "version": 1,
        "metrics": sorted(
            [m.name, m.column, m.test, m.reference, m.transform, m.min_effect]
            + ([list(m.adjust_for)] if m.adjust_for else [])  # hashes of jobs without adjust_for unchanged
            + ([m.min_difference, m.min_difference_percent] if m.min_difference is not None else [])
            for m in cfg.metrics
        ),
        "fdr": [cfg.fdr.method, cfg.fdr.level, cfg.fdr.pairs],
        "sampling": [cfg.sampling.mode, cfg.sampling.cap, cfg.sampling.seed],
        "confirm": cfg.confirm,
        "alpha": cfg.alpha,
        "posthoc": [cfg.posthoc.dunn_adjust, cfg.posthoc.confidence],
        "quality": [cfg.quality.max_bad_share, cfg.quality.min_rows_per_segment],
        "decision": cfg.decision.to_json(),
    }
    blob = json.dumps(settings, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(blob.encode("utf-8")).hexdigest()[:12]


def display_url(url: str) -> str:
    """``url`` with its secrets (password, secret parameters, token-like path segments) as ``***``."""
    return redact(url)


def _repr_with(obj: Any, **shown: Any) -> str:
    """A dataclass repr with some fields shown differently (masked secrets)."""
    parts = (f"{f.name}={shown.get(f.name, getattr(obj, f.name))!r}" for f in fields(obj))
    return f"{type(obj).__name__}({', '.join(parts)})"


# -- reading the file --------------------------------------------------------------------


def load_config(path: str | os.PathLike[str]) -> JobConfig:
    """Read, parse and validate the job file at ``path``.

    Raises
    ------
    ConfigError
        The file is missing, unreadable, not YAML, empty, or any key is invalid.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except IsADirectoryError:
        raise ConfigError(f"{path}: is a folder, not a config file") from None
    except UnicodeDecodeError as exc:
        byte = exc.object[exc.start]
        raise ConfigError(f"{path}: is not UTF-8 text (byte {byte:#04x} at offset {exc.start})") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the config file: {exc.strerror}") from None
    try:
        data = yaml.load(text, Loader=_Loader)  # noqa: S506 - a SafeLoader subclass
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f"line {mark.line + 1}, column {mark.column + 1}: " if mark else ""
        what = "; ".join(part for part in (exc.context, exc.problem) if part)
        if isinstance(exc, (yaml.scanner.ScannerError, yaml.parser.ParserError)):
            what += " (check indentation, and quote values that start with * & ! or contain ': ')"
        raise ConfigError(f"{path}: {where}invalid YAML: {what}") from None
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: invalid YAML: {' '.join(str(exc).split())}") from None
    if data is None:
        raise ConfigError(
            f"{path}: the config file is empty; expected a mapping with source, period, timezone and metrics"
        )
    logger.debug("read config %s", path)
    return parse_config(data, path)


class _Loader(yaml.SafeLoader):
    """PyYAML's safe loader, except that a repeated key is an error instead of a silent overwrite."""


def _construct_mapping(loader: _Loader, node: yaml.MappingNode) -> dict:
    first_line: dict[Any, int] = {}
    for key_node, _ in node.value:
        if key_node.tag == "tag:yaml.org,2002:merge":
            continue
        key = loader.construct_object(key_node, deep=True)
        try:
            if key in first_line:
                raise yaml.constructor.ConstructorError(
                    None, None, f"duplicate key {key!r} (first at line {first_line[key]})", key_node.start_mark
                )
            first_line[key] = key_node.start_mark.line + 1
        except TypeError:  # an unhashable key; the base constructor reports it
            break
    return loader.construct_mapping(node, deep=True)


_Loader.add_constructor(yaml.resolver.BaseResolver.DEFAULT_MAPPING_TAG, _construct_mapping)


# -- validation --------------------------------------------------------------------------


def _decision(r: "_Reader", top: dict) -> DecisionConfig:
    d = r.section(top, "decision", "", _DECISION_KEYS)
    budget = "a positive number of false alarms a year, e.g. 1 (or 0.5 for one in two years)"
    return DecisionConfig(
        rule=r.choice(d, "rule", "decision", ("two_period", "per_period"), "decision rule", default="two_period"),
        false_alarms_per_year=r.number(d, "false_alarms_per_year", "decision", lambda x: 0 < x <= 1000, budget,
                                       default=1.0),
        check_alarms_per_year=r.number(d, "check_alarms_per_year", "decision", lambda x: 0 < x <= 1000, budget,
                                       default=1.0),
        weight_now=r.number(d, "weight_now", "decision", lambda x: 0 < x < 1,
                            "a share strictly between 0 and 1, e.g. 0.2", default=0.2),
        clear_above=r.number(d, "clear_above", "decision", lambda x: 0 < x < 1,
                             "a p-value strictly between 0 and 1, e.g. 0.1", default=0.10),
        quiet_periods=r.integer(d, "quiet_periods", "decision", lambda x: 1 <= x <= 52,
                                "a whole number from 1 to 52", default=2),
    )


def _confirm(r: "_Reader", top: dict, decision: DecisionConfig) -> int:
    confirm = r.integer(top, "confirm", "", lambda x: 1 <= x <= 52, "a whole number from 1 to 52", default=1)
    if confirm > 1 and decision.rule != "per_period":
        r.fail("confirm", "applies only to decision.rule: per_period (the default two_period rule already "
               "weighs the previous period); add `decision: {rule: per_period}` or drop confirm",
               confirm, "1, or any whole number up to 52 with decision.rule: per_period")
    return confirm

_TOP_KEYS = ("job", "source", "period", "timezone", "metrics", "fdr", "history", "alerts",
             "schedule", "quality", "posthoc", "alpha", "compute", "sampling", "confirm", "power",
             "scheduling", "report", "decision")
_DECISION_KEYS = ("rule", "false_alarms_per_year", "check_alarms_per_year", "weight_now", "clear_above",
                  "quiet_periods")
_SOURCE_KEYS = ("url", "table", "query", "file", "time_column", "segment_column", "naive_time", "timeout")
#: source.file: how DuckDB reads each kind of file (the name's ending, lowercase).
FILE_READERS = {".csv": "read_csv_auto", ".tsv": "read_csv_auto", ".csv.gz": "read_csv_auto",
                ".tsv.gz": "read_csv_auto", ".parquet": "read_parquet"}
#: ``source.timeout`` when not given: five minutes per statement.
SOURCE_TIMEOUT_SECONDS = 300.0
_TIMEOUT_MAX_SECONDS = 7 * 86400.0
_DURATION = re.compile(r"P(?:(\d+)D)?(?:T(?=\d)(?:(\d+)H)?(?:(\d+)M)?(?:(\d+(?:\.\d+)?)S)?)?", re.IGNORECASE)
_METRIC_KEYS = ("column", "name", "test", "reference", "transform", "unit", "decimals", "min_effect", "label",
                "adjust_for", "min_difference")

_MISSING: Any = type("_Missing", (), {"__repr__": lambda self: "nothing"})()
_REQUIRED: Any = type("_Required", (), {})()
_HIDDEN = "<hidden>"
_PLACEHOLDER = re.compile(r"\$\$\{|\$\{([A-Za-z_][A-Za-z0-9_]*)\}|\$\{")
_BOOL_WORDS = {"true": True, "yes": True, "on": True, "false": False, "no": False, "off": False}
_ENV_HINT = "variables that are set in the environment, as ${NAME}; $${ for a literal ${"


def parse_config(data: Mapping, path: str | os.PathLike[str], environ: Mapping[str, str] | None = None) -> JobConfig:
    """Validate already-parsed YAML ``data`` as if read from ``path``.

    ``environ`` replaces ``os.environ`` for ``${NAME}`` expansion (tests pass a dict).

    Raises
    ------
    ConfigError
        The first problem found, as one line naming file, key path, value and what is accepted.
    """
    path = Path(path)
    r = _Reader(str(path), Path(os.path.normpath(path.absolute().parent)), os.environ if environ is None else environ)
    top = r.mapping(data, "", _TOP_KEYS, "a mapping with keys source, period, timezone, metrics and optional others")
    job = r.text(top, "job", "", "a job name", default=path.stem)
    if not job.isprintable():
        r.fail("job", "must be printable text on one line", job, "a job name")
    source = _source(r, top)
    period = r.choice(top, "period", "", PERIOD_KINDS, "period kind")
    timezone = _timezone(r, top)
    metrics = _metrics(r, top, source)
    fdr = r.section(top, "fdr", "", ("method", "level", "pairs"))
    sampling = r.section(top, "sampling", "", ("mode", "cap", "seed"))
    scheduling = r.section(top, "scheduling", "", ("settle_minutes", "lookback"))
    report = r.section(top, "report", "", ("periods", "path", "attach"))
    decision = _decision(r, top)
    report_path = r.text(report, "path", "report", "a file path, may contain {period}", default=None)
    history = r.section(top, "history", "", ("url",))
    quality = r.section(top, "quality", "", ("max_bad_share", "min_rows_per_segment"))
    posthoc = r.section(top, "posthoc", "", ("dunn_adjust", "confidence"))
    default_history = f"sqlite:///{r.folder / '.segwatch' / 'history.sqlite'}"
    schedule = _schedule(r, top, parse=False)  # the cron parser (APScheduler) only once all else is valid
    config = JobConfig(
        job=job,
        path=Path(os.path.normpath(path.absolute())),
        source=source,
        period=period,
        timezone=timezone,
        metrics=metrics,
        fdr=FdrConfig(
            method=r.choice(fdr, "method", "fdr", ADJUSTMENTS, "FDR method", default="bh"),
            level=r.number(fdr, "level", "fdr", _open_unit, "a number between 0 and 1, e.g. 0.05", default=0.05),
            pairs=r.choice(fdr, "pairs", "fdr", ("within", "selective"), "pair reading", default="within"),
        ),
        history=HistoryConfig(url=_db_url(r, history, "url", "history", default=default_history)),
        alerts=_alerts(r, top),
        schedule=schedule,
        quality=QualityConfig(
            max_bad_share=r.number(quality, "max_bad_share", "quality", lambda x: 0 <= x <= 1,
                                   "a share from 0 to 1, e.g. 0.05", default=0.05),
            min_rows_per_segment=r.integer(quality, "min_rows_per_segment", "quality", lambda x: x >= 2,
                                           "a whole number of at least 2", default=2),
        ),
        posthoc=PosthocConfig(
            dunn_adjust=r.choice(posthoc, "dunn_adjust", "posthoc", ADJUSTMENTS, "adjustment", default="holm"),
            confidence=r.number(posthoc, "confidence", "posthoc", _open_unit,
                                "a level between 0 and 1, e.g. 0.95", default=0.95),
        ),
        alpha=r.number(top, "alpha", "", _open_unit, "a number between 0 and 1, e.g. 0.05", default=0.05),
        compute=r.choice(top, "compute", "", ("pushdown", "local"), "compute mode", default="pushdown"),
        sampling=SamplingConfig(
            mode=r.choice(sampling, "mode", "sampling", ("auto", "full", "sample"), "sampling mode", default="auto"),
            cap=r.integer(sampling, "cap", "sampling", lambda x: x >= 10, "a whole number of at least 10",
                          default=5000),
            seed=r.integer(sampling, "seed", "sampling", lambda x: x >= 0, "a whole number of at least 0",
                           default=0),
        ),
        confirm=_confirm(r, top, decision),
        decision=decision,
        power=r.number(top, "power", "", _open_unit, "a probability between 0 and 1, e.g. 0.8", default=0.8),
        scheduling=ScheduleOptions(
            settle_minutes=r.integer(scheduling, "settle_minutes", "scheduling", lambda x: 0 <= x <= 60 * 24 * 31,
                                     "minutes from 0 to 44640", default=0),
            lookback=r.integer(scheduling, "lookback", "scheduling", lambda x: 0 <= x <= 52,
                               "a number of periods from 0 to 52", default=0),
        ),
        report=ReportConfig(
            periods=r.integer(report, "periods", "report", lambda x: 1 <= x <= 520, "a whole number from 1 to 520",
                              default=12),
            path=r.folder_path(report_path) if report_path else None,
            attach=r.boolean(report, "attach", "report", default=False),
        ),
    )
    if schedule is not None:
        _schedule(r, top)
    return replace(config, source=replace(config.source, url=_file_url(r, config.source.url)),
                   history=replace(config.history, url=_file_url(r, config.history.url)))


def _open_unit(x: float) -> bool:
    return 0 < x < 1


def _source(r: _Reader, top: dict) -> SourceConfig:
    src = r.section(top, "source", "", _SOURCE_KEYS, required=True)
    file = None
    if src.get("file") is not None:
        url, table, query, file = _file_source(r, src)
    else:
        url = _db_url(r, src, "url", "source")
        table = r.text(src, "table", "source", "a table name", default=None)
        query = src.get("query")
        if table is not None and query is not None:
            r.fail("source.query", "cannot be combined with source.table; give exactly one of them",
                   query, "either table or query")
        if table is None and query is None:
            r.fail("source.table", "is required unless source.query is given", _MISSING,
                   "a table name, or a SELECT statement under source.query")
        if query is not None:
            query = _select(r, r.text(src, "query", "source", "one SELECT statement"))
    time_column = r.text(src, "time_column", "source", "the name of the timestamp or date column")
    segment_column = r.text(src, "segment_column", "source", "the name of the column holding the segments")
    if segment_column.casefold() == time_column.casefold():
        r.fail("source.segment_column", "is the same column as source.time_column", segment_column,
               "a column other than the time column")
    naive_time = r.choice(src, "naive_time", "source", NAIVE_TIME, "naive_time", default="local")
    return SourceConfig(url, table, query, time_column, segment_column, naive_time, file, _timeout(r, src))


def _file_source(r: _Reader, src: dict) -> tuple[str, None, str, str]:
    """``source.file``: a CSV or Parquet file read by DuckDB in memory, as a ``query:``
    over it (DuckDB's ``read_csv_auto`` / ``read_parquet``); returns url, table, query, file."""
    for other in ("url", "table", "query"):
        if src.get(other) is not None:
            r.fail(f"source.{other}", "cannot be combined with source.file (the file is read by DuckDB in memory)",
                   src[other], "source.file alone, or source.url with source.table or source.query")
    accepted = f"a {', '.join(FILE_READERS)} file; a relative path is taken from the config file's folder"
    text = r.text(src, "file", "source", accepted)
    path = r.folder_path(text)
    name = path.name.lower()
    ending = next((e for e in sorted(FILE_READERS, key=len, reverse=True) if name.endswith(e)), None)
    if ending is None:
        r.fail("source.file", "is not a file segwatch can read by its name's ending", text, accepted)
    if not path.is_file():
        r.fail("source.file", f"no such file: {path}" if not path.exists() else f"is not a file: {path}",
               text, accepted)
    import importlib.util

    if importlib.util.find_spec("duckdb_engine") is None:
        r.fail("source.file", "is read through DuckDB, which is not installed", text,
               "pip install duckdb duckdb-engine (or the engines extra: pip install -e '.[engines]')")
    literal = str(path).replace("'", "''")
    return "duckdb:///:memory:", None, f"SELECT * FROM {FILE_READERS[ending]}('{literal}')", str(path)


def _timeout(r: _Reader, src: dict) -> float:
    """``source.timeout``: seconds (a number) or an ISO 8601 duration (``PT5M``, ``PT90S``, ``PT1H``)."""
    accepted = (f"seconds from 0.1 to {_TIMEOUT_MAX_SECONDS:.0f}, or an ISO 8601 duration such as PT5M "
                "(default PT5M)")
    value = src.get("timeout")
    if isinstance(value, str) and "${" in value:
        value = r.expand(value, "source.timeout").strip()
        try:
            value = float(value)
        except ValueError:
            pass
    if isinstance(value, str):
        match = _DURATION.fullmatch(value.strip())
        if match is None or value.strip().upper() in ("P", "PT"):
            r.fail("source.timeout", "is not a number of seconds or an ISO 8601 duration", value, accepted)
        days, hours, minutes, seconds = (float(x) if x else 0.0 for x in match.groups())
        value = ((days * 24 + hours) * 60 + minutes) * 60 + seconds
    return r.number({"timeout": value} if value is not None else {}, "timeout", "source",
                    lambda x: 0.1 <= x <= _TIMEOUT_MAX_SECONDS, accepted, default=SOURCE_TIMEOUT_SECONDS)


def _select(r: _Reader, sql: str) -> str:
    """Check that ``sql`` is one SELECT/WITH statement; return it without trailing ``;`` and comments.

    Quoted strings and identifiers, PostgreSQL's dollar-quoted strings (``$$...$$``,
    ``$tag$...$tag$``) and comments are skipped when looking for a ``;``. A backslash
    escapes a quote in MySQL/MariaDB strings but not in standard SQL, so the text is read
    both ways and refused if either reading finds a second statement. (The source is also
    read in a read-only session: this check is for clear messages, not the only guard.)
    """
    accepted = "one SELECT or WITH ... SELECT statement"
    first = last = None
    for backslash in (False, True):
        first_b, last_b, semicolons = _scan_sql(sql, backslash)
        if first_b is None:
            r.fail("source.query", "holds no SQL statement", sql, accepted)
        inner = [p for p in semicolons if p < last_b]
        if inner:
            r.fail("source.query", f"holds more than one statement (a ';' at character {inner[0] + 1})", sql,
                   accepted)
        if not backslash:
            first, last = first_b, last_b
    keyword = re.match(r"[(\s]*([A-Za-z]+)", sql[first:])
    if keyword is None or keyword.group(1).lower() not in ("select", "with"):
        r.fail("source.query", "must be a SELECT statement (or WITH ... SELECT)", sql, accepted)
    return sql[: last + 1]


_DOLLAR_TAG = re.compile(r"\$(?:[A-Za-z_][A-Za-z0-9_]*)?\$")


def _scan_sql(sql: str, backslash: bool) -> tuple[int | None, int | None, list[int]]:
    """The first and last characters of ``sql`` outside comments, and where its ``;`` are."""
    first = last = None
    semicolons: list[int] = []
    i, n = 0, len(sql)
    while i < n:
        if sql.startswith("--", i):
            end = sql.find("\n", i)
            i = n if end < 0 else end + 1
            continue
        if sql.startswith("/*", i):
            end = sql.find("*/", i + 2)
            i = n if end < 0 else end + 2
            continue
        ch = sql[i]
        tag = _DOLLAR_TAG.match(sql, i) if ch == "$" else None
        if tag is not None and (i == 0 or not (sql[i - 1].isalnum() or sql[i - 1] in "_$")):
            end = sql.find(tag.group(0), tag.end())  # a dollar-quoted string runs to the same tag
            first = i if first is None else first
            last = i = n - 1 if end < 0 else end + len(tag.group(0)) - 1
            i += 1
            continue
        if ch in "'\"`":  # a quoted string or identifier; a doubled quote stays inside
            end = i + 1
            while True:
                while backslash and ch == "'" and end < n:
                    hit = sql.find(ch, end)
                    if hit < 0:
                        break
                    slashes = len(sql[end:hit]) - len(sql[end:hit].rstrip("\\"))
                    if slashes % 2 == 0:
                        break
                    end = hit + 1
                end = sql.find(ch, end)
                if end < 0 or not sql.startswith(ch * 2, end):
                    break
                end += 2
            first = i if first is None else first
            last = i = n - 1 if end < 0 else end
            i += 1
            continue
        if ch == ";":
            semicolons.append(i)
        elif not ch.isspace():
            first = i if first is None else first
            last = i
        i += 1
    return first, last, semicolons


def _timezone(r: _Reader, top: dict) -> str:
    name = r.text(top, "timezone", "", "an IANA time zone name like UTC or Europe/Berlin")
    try:
        ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError, OSError):
        known = {zone.lower(): zone for zone in available_timezones()}
        close = difflib.get_close_matches(name.lower(), known, n=1, cutoff=0.75)
        hint = f"; did you mean {known[close[0]]!r}?" if close else ""
        r.fail("timezone", f"unknown time zone{hint}", name, "an IANA time zone name like UTC or Europe/Berlin")
    return name


def _metrics(r: _Reader, top: dict, source: SourceConfig) -> tuple[MetricConfig, ...]:
    accepted = "a list of metrics, each a column name or a mapping with column and optional test, name, ..."
    items = r.listing(top, "metrics", "", accepted)
    metrics: list[MetricConfig] = []
    where: dict[str, int] = {}
    for index, item in enumerate(items):
        path = f"metrics[{index}]"
        if isinstance(item, str):
            item = {"column": item}
        spec = r.mapping(item, path, _METRIC_KEYS, "a column name, or a mapping with column and optional "
                         + ", ".join(_METRIC_KEYS[1:]))
        column = r.text(spec, "column", path, "the name of a numeric column")
        for other, key in ((source.segment_column, "segment_column"), (source.time_column, "time_column")):
            if column.casefold() == other.casefold():
                r.fail(f"{path}.column", f"is source.{key}; a metric must be another column", column,
                       "a numeric column other than the segment and time columns")
        name = r.text(spec, "name", path, "a metric name", default=column)
        if name in where:
            key = "name" if "name" in spec else "column"
            r.fail(f"{path}.{key}", f"repeats the metric name of metrics[{where[name]}]", name,
                   "a name no other metric has, via name: when one column is used twice")
        where[name] = index
        metrics.append(MetricConfig(
            column=column,
            name=name,
            test=r.choice(spec, "test", path, tests(), "test", default=methods.AUTO),
            reference=r.text(spec, "reference", path, 'a segment value as text, numbers in quotes like "3"',
                             default=None),
            transform=r.choice(spec, "transform", path, TRANSFORMS, "transform", default="none"),
            unit=r.text(spec, "unit", path, "a unit label like EUR or h", default=None),
            decimals=r.integer(spec, "decimals", path, lambda x: 0 <= x <= 12, "a whole number from 0 to 12",
                               default=None),
            # Cohen's (1988) small / medium / large effect sizes, common practice
            min_effect=r.number(spec, "min_effect", path, lambda x: 0 <= x < 1,
                                "an omega squared from 0 up to 1, e.g. 0.01 small, 0.06 medium, 0.14 large",
                                default=None),
            label=r.text(spec, "label", path, "a display label", default=None),
            adjust_for=_adjust_for(r, spec, path, column, source),
            **_min_difference(r, spec, path),
        ))
        chosen = metrics[-1]
        if chosen.test != methods.AUTO and chosen.transform != "none" and not methods.get(chosen.test).transforms:
            r.fail(f"{path}.transform", f"cannot be used with test: {chosen.test}, which compares the values as "
                   "they are (0 and 1)", chosen.transform, "none (leave transform out)")
        if metrics[-1].adjust_for:
            if metrics[-1].reference is None:
                r.fail(f"{path}.adjust_for", "needs a reference segment to measure the adjusted gaps against",
                       list(metrics[-1].adjust_for), f"also set {path}.reference, e.g. reference: Basic")
            test = metrics[-1].test
            if test != methods.AUTO and methods.get(test).adjusted_covariance is None:
                ok = [n for n in methods.names() if methods.get(n).adjusted_covariance is not None]
                r.fail(f"{path}.test", f"cannot be adjusted for strata (no additive model is fitted for "
                       f"{methods.get(test).label})",
                       test, f"{', '.join(ok)} or {methods.AUTO} with adjust_for")
    return tuple(metrics)


def _min_difference(r: _Reader, spec: dict, path: str) -> dict[str, Any]:
    """``metrics[i].min_difference``: a number in the metric's units (``2`` for 2 h) or a
    percentage as text (``"5%"``); under ``transform: log`` only a percentage (a gap there
    is a ratio)."""
    value = spec.get("min_difference")
    if value is None:
        return {}
    where = f"{path}.min_difference"
    accepted = "a positive number in the metric's units (e.g. 2) or a percentage in quotes (e.g. \"5%\")"
    percent = isinstance(value, str)
    if percent:
        text = value.strip()
        match = re.fullmatch(r"(\d+(?:\.\d*)?|\.\d+)\s*%", text)
        if not match:
            r.fail(where, "is not a number or a percentage", value, accepted)
        number = float(match.group(1))
    elif isinstance(value, bool) or not isinstance(value, (int, float)):
        r.fail(where, f"must be a number or a percentage, not {_describe(value)}", value, accepted)
    else:
        number = float(value)
    if not (math.isfinite(number) and number > 0) or (percent and number >= 1000):
        r.fail(where, "is out of range", value, accepted)
    if not percent and spec.get("transform") in ("log", "log1p"):
        r.fail(where, "must be a percentage under transform: log (gaps are ratios there)", value,
               'a percentage in quotes, e.g. "5%"')
    return {"min_difference": number, "min_difference_percent": percent}


def _adjust_for(r: _Reader, spec: dict, path: str, column: str, source: SourceConfig) -> tuple[str, ...]:
    """``metrics[i].adjust_for``: distinct categorical columns, none of them the metric, segment or time column."""
    if spec.get("adjust_for") is None:
        return ()
    accepted = "a list of categorical column names, e.g. [household_size, region]"
    if isinstance(spec["adjust_for"], str):
        r.fail(f"{path}.adjust_for", "must be a list", spec["adjust_for"], f"{accepted} (brackets even for one)")
    names = r.strings(spec, "adjust_for", path, accepted)
    seen: dict[str, int] = {}
    for index, name in enumerate(names):
        where = f"{path}.adjust_for[{index}]"
        for other, key in ((source.segment_column, "source.segment_column"),
                           (source.time_column, "source.time_column"), (column, f"{path}.column")):
            if name.casefold() == other.casefold():
                r.fail(where, f"is {key}; adjust for another column", name, accepted)
        if name.casefold() in seen:
            r.fail(where, f"repeats {path}.adjust_for[{seen[name.casefold()]}]", name, "each column once")
        seen[name.casefold()] = index
    return names


def _alerts(r: _Reader, top: dict) -> tuple[AlertConfig, ...]:
    """Each ``alerts[i]`` read by its channel type (:mod:`monitor.delivery.sinks`)."""
    known = sink_types.types()
    kinds = ", ".join(known)
    items = r.listing(top, "alerts", "", f"a list of alerts, each a mapping with type: {kinds}",
                      default=[], allow_empty=True)
    alerts: list[AlertConfig] = []
    for index, item in enumerate(items):
        path = f"alerts[{index}]"
        if not isinstance(item, Mapping):
            r.mapping(item, path, None, f"a mapping with type: {kinds}")
        kind = r.choice(item, "type", path, known, "alert type")
        sink_type = sink_types.get(kind)
        spec = r.mapping(item, path, sink_type.keys, f"a mapping with keys {', '.join(sink_type.keys)}")
        alerts.append(sink_type.parse(r, spec, path))
    return tuple(alerts)


def _positive(x: float) -> bool:
    return x > 0


def _schedule(r: _Reader, top: dict, *, parse: bool = True) -> str | None:
    accepted = "5 cron fields with day names, like '0 6 * * mon' or '30 7 * * mon-fri'"
    text = r.text(top, "schedule", "", accepted, default=None)
    if text is None:
        return None
    parts = text.split()
    if len(parts) != 5:
        r.fail("schedule", f"needs 5 cron fields (minute hour day-of-month month day-of-week), found {len(parts)}",
               text, accepted)
    if any(ch.isdigit() for ch in parts[4]):
        r.fail("schedule", "day-of-week numbers are ambiguous (cron counts 0 as Sunday, the scheduler as Monday);"
               " use day names mon..sun", text, accepted)
    if parts[2] != "*" and parts[4] != "*":
        r.fail("schedule", "restricts both day-of-month and day-of-week (cron fires when either matches,"
               " the scheduler only when both do); restrict one of them", text, accepted)
    if not parse:
        return " ".join(parts)
    from apscheduler.triggers.cron import CronTrigger  # imported here: config errors stay fast

    try:
        CronTrigger.from_crontab(text, timezone="UTC")
    except ValueError as exc:
        r.fail("schedule", f"is not a valid cron expression: {exc}", text, accepted)
    return " ".join(parts)


# The form of an SQLAlchemy URL, as SQLAlchemy's own parser (sqlalchemy.engine.url._parse_url) reads
# it; checked here without importing SQLAlchemy, so that a bad config fails fast.
_URL = re.compile(
    r"""(?P<name>[\w+]+)://
        (?:(?P<username>[^:/]*)(?::(?P<password>[^@]*))?@)?
        (?:(?:\[(?P<ipv6host>[^/?]+)\]|(?P<ipv4host>[^/:?]+))?(?::(?P<port>[^/?]*))?)?
        (?:/(?P<database>[^?]*))?
        (?:\?(?P<query>.*))?""",
    re.X,
)


def _db_url(r: _Reader, section: dict, key: str, path: str, default: Any = _REQUIRED) -> str:
    """A database URL of SQLAlchemy's form (a relative file is made absolute later, by :func:`_file_url`)."""
    accepted = "an SQLAlchemy URL like sqlite:///data/depots.sqlite or postgresql://user@host/db"
    text = r.text(section, key, path, accepted, default=default)
    url = _URL.match(text)
    if url is None:
        r.fail(_join(path, key), "is not a database URL", text, accepted)
    if url["port"] and not url["port"].isdigit():
        r.fail(_join(path, key), f"has a port that is not a number ({url['port']!r})", text, accepted)
    return text


def _file_url(r: _Reader, text: str) -> str:
    """``text`` with a relative SQLite/DuckDB file made absolute (against the config's folder).

    The engine registry says which engines name files in their URLs; it loads SQLAlchemy,
    so this runs once every other key is valid (a bad config fails fast).
    """
    from monitor import engines

    url = _URL.match(text)
    database = unquote(url["database"]) if url["database"] is not None else None
    if not engines.get(url["name"].split("+")[0]).file_urls or not database or ":" in database:
        return text  # a server, an in-memory database, or a file: / md: URI
    absolute = quote(str(r.folder_path(database)), safe=" +/")
    return text[:url.start("database")] + absolute + text[url.end("database"):]


def _join(path: str, key: Any) -> str:
    return f"{path}.{key}" if path else str(key)


def _describe(value: Any) -> str:
    if isinstance(value, bool):
        return "true/false"
    if isinstance(value, int):
        return "a whole number"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, str):
        return "text"
    if isinstance(value, Mapping):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    if isinstance(value, date):
        return "a date"
    if value is None:
        return "empty"
    return type(value).__name__


def _show(value: Any, secret: bool = False) -> str:
    if value is _MISSING:
        return "nothing"
    if value is None:
        return "null"
    if secret:
        return _HIDDEN
    if isinstance(value, bool):
        return "true" if value else "false"
    text = display_url(repr(value))
    return text if len(text) <= 80 else text[:77] + "..."


class _Reader:
    """Typed getters over the parsed YAML that raise one-line ConfigErrors."""

    def __init__(self, file: str, folder: Path, environ: Mapping[str, str]) -> None:
        self.file = file
        self.folder = folder
        self.environ = environ

    def fail(self, path: str, what: str, given: Any, accepted: str, *, secret: bool = False) -> NoReturn:
        message = f"{self.file}: {path or 'top level'}: {what} (given: {_show(given, secret)}; accepted: {accepted})"
        raise ConfigError(" ".join(message.splitlines()))

    def folder_path(self, text: str) -> Path:
        """``text`` as a path; relative ones are taken from the config file's folder."""
        return Path(os.path.normpath(self.folder / Path(text).expanduser()))

    # containers

    def mapping(self, value: Any, path: str, keys: tuple[str, ...] | None, accepted: str) -> dict:
        if not isinstance(value, Mapping):
            self.fail(path, f"must be a mapping, not {_describe(value)}", value, accepted)
        if keys is not None:
            for key in value:
                if key not in keys:
                    close = difflib.get_close_matches(str(key), keys, n=1, cutoff=0.6)
                    hint = f"; did you mean {close[0]!r}?" if close else ""
                    self.fail(_join(path, key), f"unknown key{hint}", key, ", ".join(keys))
        return dict(value)

    def section(self, parent: dict, key: str, path: str, keys: tuple[str, ...] | None, *,
                required: bool = False, accepted: str | None = None) -> dict:
        where = _join(path, key)
        accepted = accepted or f"a mapping with keys {', '.join(keys or ())}"
        value = parent.get(key)
        if value is None:
            if required:
                self.fail(where, "is required", parent.get(key, _MISSING), accepted)
            return {}
        return self.mapping(value, where, keys, accepted)

    def listing(self, parent: dict, key: str, path: str, accepted: str, *, default: Any = _REQUIRED,
             allow_empty: bool = False) -> list:
        where = _join(path, key)
        value = parent.get(key)
        if value is None:
            if default is _REQUIRED:
                self.fail(where, "is required", parent.get(key, _MISSING), accepted)
            return default
        if not isinstance(value, list):
            self.fail(where, f"must be a list, not {_describe(value)}", value, accepted)
        if not value and not allow_empty:
            self.fail(where, "must not be empty", value, accepted)
        return value

    def strings(self, parent: dict, key: str, path: str, accepted: str, *,
                check: Callable[[str], bool] | None = None, bad: str = "must not be blank") -> tuple[str, ...]:
        items = self.listing(parent, key, path, accepted)
        values = []
        for index, item in enumerate(items):
            where = f"{_join(path, key)}[{index}]"
            if not isinstance(item, str):
                self.fail(where, f"must be text, not {_describe(item)}", item, accepted)
            value = self.expand(item, where)
            if not value.strip():
                self.fail(where, "must not be blank", value, accepted)
            if check is not None and not check(value):
                self.fail(where, bad, value, accepted)
            values.append(value)
        return tuple(values)

    # scalars

    def expand(self, text: str, path: str) -> str:
        """``text`` with ``${NAME}`` replaced from the environment and ``$${`` made ``${``."""
        if "${" not in text:
            return text

        def replace(match: re.Match[str]) -> str:
            if match.group(0) == "$${":
                return "${"
            name = match.group(1)
            if name is None:
                self.fail(path, "has a '${' that is not a variable like ${NAME}", text, _ENV_HINT)
            if name not in self.environ:
                self.fail(path, f"environment variable {name} is not set", text, _ENV_HINT)
            return self.environ[name]

        return _PLACEHOLDER.sub(replace, text)

    def text(self, parent: dict, key: str, path: str, accepted: str, *, default: Any = _REQUIRED,
             secret: bool = False, allow_blank: bool = False, blank_is_none: bool = False) -> Any:
        where = _join(path, key)
        value = parent.get(key)
        if value is None:
            if default is _REQUIRED:
                self.fail(where, "is required", parent.get(key, _MISSING), accepted)
            return default
        if not isinstance(value, str):
            self.fail(where, f"must be text, not {_describe(value)}", value, accepted, secret=secret)
        value = self.expand(value, where)
        if not value.strip():
            if blank_is_none:
                return None
            if not allow_blank:
                self.fail(where, "must not be blank", value, accepted)
        return value

    def choice(self, parent: dict, key: str, path: str, choices: tuple[str, ...], noun: str, *,
               default: Any = _REQUIRED) -> str:
        accepted = ", ".join(choices)
        value = self.text(parent, key, path, accepted, default=default)
        if value.lower() in choices:
            return value.lower()
        close = difflib.get_close_matches(value.lower(), choices, n=1, cutoff=0.6)
        hint = f"; did you mean {close[0]!r}?" if close else ""
        self.fail(_join(path, key), f"unknown {noun}{hint}", value, accepted)

    def _scalar(self, parent: dict, key: str, path: str, accepted: str, default: Any) -> Any:
        """The value, the default when absent, or text read from the environment for ``${NAME}``."""
        value = parent.get(key)
        if value is None:
            if default is _REQUIRED:
                self.fail(_join(path, key), "is required", parent.get(key, _MISSING), accepted)
            return _Default(default)
        if isinstance(value, str) and "${" in value:
            return _FromEnv(self.expand(value, _join(path, key)).strip())
        return value

    def number(self, parent: dict, key: str, path: str, check: Callable[[float], bool], accepted: str, *,
               default: Any = _REQUIRED) -> Any:
        where = _join(path, key)
        value = self._scalar(parent, key, path, accepted, default)
        if isinstance(value, _Default):
            return value.value
        if isinstance(value, _FromEnv):
            try:
                value = float(value)
            except ValueError:
                self.fail(where, "must be a number", value, accepted)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            self.fail(where, f"must be a number, not {_describe(value)}", value, accepted)
        if not math.isfinite(value):
            self.fail(where, "must be a finite number", value, accepted)
        if not check(value):
            self.fail(where, "is out of range", value, accepted)
        return float(value)

    def integer(self, parent: dict, key: str, path: str, check: Callable[[int], bool], accepted: str, *,
                default: Any = _REQUIRED) -> Any:
        where = _join(path, key)
        value = self._scalar(parent, key, path, accepted, default)
        if isinstance(value, _Default):
            return value.value
        if isinstance(value, _FromEnv):
            try:
                value = int(value)
            except ValueError:
                self.fail(where, "must be a whole number", value, accepted)
        if isinstance(value, bool) or not isinstance(value, int):
            self.fail(where, f"must be a whole number, not {_describe(value)}", value, accepted)
        if not check(value):
            self.fail(where, "is out of range", value, accepted)
        return value

    def boolean(self, parent: dict, key: str, path: str, *, default: bool) -> bool:
        value = self._scalar(parent, key, path, "true or false", default)
        if isinstance(value, _Default):
            return value.value
        if isinstance(value, _FromEnv) and value.lower() in _BOOL_WORDS:
            return _BOOL_WORDS[value.lower()]
        if not isinstance(value, bool):
            self.fail(_join(path, key), f"must be true or false, not {_describe(value)}", value, "true or false")
        return value


@dataclass(frozen=True)
class _Default:
    """A default standing in for an absent key; it is trusted, not checked."""

    value: Any


class _FromEnv(str):
    """Text that came from an environment variable, so it may stand for a number or a boolean."""
