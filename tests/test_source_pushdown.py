"""The push-down path of Source.fetch on SQLite: results, sampling, fallbacks and errors.

* The whole comparison (method, statistic, p-values, pairs) is the same under
  ``compute: pushdown`` and ``compute: local`` (1e-9 relative), checked against the
  reference libraries as well (scipy.stats.f_oneway / kruskal on the rows).
* The seeded sample is the ``cap`` rows with the smallest ``md5(id:seed)`` per
  segment (Python's hashlib as the reference), the same on every run, different for
  another seed, and still right when the first read comes up short.
* The shift probe falls back to the first usable value when its rows hold none,
  and large offsets keep their digits (numpy's two-pass variance as the reference).
* A text metric column falls back to the local path with a logged reason; old
  servers are refused with a message naming what was found and what is needed.
"""

from __future__ import annotations

import hashlib
import logging
import math
import sqlite3
from dataclasses import replace
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from monitor.engines import check_server_version
from monitor.engines import sqlite as sqlite_engine
from monitor.source import sampling
from monitor.analysis import analyse_period
from monitor.config import parse_config
from monitor.errors import SourceError
from monitor.periods import parse_period
from monitor.source import Source

MONDAY = datetime(2026, 3, 2)
PERIOD = parse_period("week", "2026-W10", "UTC")


def build(path: Path, per_segment: dict[str, int], *, seed: int = 1, shift: dict[str, float] | None = None,
          leading_nulls: int = 0, text_column: bool = False) -> None:
    rng = np.random.default_rng(seed)
    con = sqlite3.connect(path)
    con.execute(f"CREATE TABLE t (id INTEGER PRIMARY KEY, ts TEXT, seg TEXT, x REAL, big REAL, "
                f"note {'TEXT' if text_column else 'REAL'})")
    rows = []
    rid = 0
    for _ in range(leading_nulls):  # rows first in the table with no usable x
        rid += 1
        rows.append((rid, MONDAY.strftime("%Y-%m-%d 00:00:01"), "A", None, None, None))
    for seg, n in per_segment.items():
        for _ in range(n):
            rid += 1
            ts = (MONDAY + timedelta(seconds=int(rng.integers(0, 7 * 86400)))).strftime("%Y-%m-%d %H:%M:%S")
            x = float(rng.normal(10 + (shift or {}).get(seg, 0.0), 2))
            rows.append((rid, ts, seg, x, 1e9 + float(rng.normal(0, 0.01)), 1.5))
    con.executemany("INSERT INTO t VALUES (?, ?, ?, ?, ?, ?)", rows)
    con.commit()
    con.close()


def config(folder: Path, db_file: Path, metrics=None, **extra):
    data = {
        "source": {"url": f"sqlite:///{db_file}", "table": "t", "time_column": "ts", "segment_column": "seg"},
        "period": "week",
        "timezone": "UTC",
        "metrics": metrics or [{"column": "x", "test": "kruskal"}],
        "history": {"url": f"sqlite:///{folder / 'h.sqlite'}"},
        **extra,
    }
    return parse_config(data, folder / "job.yaml", environ={})


def fetch(cfg):
    src = Source(cfg)
    try:
        return src.fetch(PERIOD)
    finally:
        src.dispose()


def rows_by_segment(db_file: Path, column: str = "x") -> dict[str, list[tuple[int, float]]]:
    con = sqlite3.connect(db_file)
    out: dict[str, list[tuple[int, float]]] = {}
    for rid, seg, x in con.execute(f"SELECT id, seg, {column} FROM t WHERE x IS NOT NULL"):
        out.setdefault(seg, []).append((rid, x))
    con.close()
    return out


def test_pushdown_and_local_give_the_same_comparison(tmp_path):
    f = tmp_path / "s.sqlite"
    build(f, {"A": 40, "B": 55, "C": 35}, shift={"C": 2.5})
    metrics = [{"column": "x", "test": t, "name": f"x_{t}"} for t in ("anova", "welch", "kruskal", "auto")]
    metrics.append({"column": "big", "test": "anova"})
    cfg = config(tmp_path, f, metrics=metrics)
    push, local = fetch(cfg), fetch(replace(cfg, compute="local"))
    rp, rl = analyse_period(push.metrics, cfg), analyse_period(local.metrics, cfg)
    groups = [np.array([x for _, x in v]) for _, v in sorted(rows_by_segment(f).items())]
    for a, b in zip(rp, rl):
        assert a.method == b.method and a.posthoc == b.posthoc
        assert a.statistic == pytest.approx(b.statistic, rel=1e-9)
        assert a.p_value == pytest.approx(b.p_value, rel=1e-9)
        assert [p.p_adj for p in a.pairs] == pytest.approx([p.p_adj for p in b.pairs], rel=1e-9)
    by_name = {r.metric: r for r in rp}
    # reference: scipy.stats.f_oneway and scipy.stats.kruskal on the same rows
    assert by_name["x_anova"].statistic == pytest.approx(stats.f_oneway(*groups).statistic, rel=1e-9)
    assert by_name["x_kruskal"].statistic == pytest.approx(stats.kruskal(*groups).statistic, rel=1e-9)


def _md5_smallest(db_file: Path, cap: int, seed: int) -> dict[str, set[int]]:
    # reference: hashlib.md5 of "<primary key>:<seed>", the cap smallest per segment
    return {
        seg: {rid for _, rid in sorted((hashlib.md5(f"{rid}:{seed}".encode()).hexdigest(), rid)
                                       for rid, _ in rows)[:cap]}
        for seg, rows in rows_by_segment(db_file).items()
    }


def _sampled_ids(data, db_file: Path) -> dict[str, set[int]]:
    x_to_id = {x: rid for rows in rows_by_segment(db_file).values() for rid, x in rows}
    (metric,) = data.metrics
    return {s.segment: {x_to_id[v] for v in s.values} for s in metric.segments}


def test_seeded_sample_is_reproducible_and_follows_the_rule(tmp_path):
    f = tmp_path / "s.sqlite"
    build(f, {"A": 300, "B": 40, "C": 120})
    cfg = config(tmp_path, f, sampling={"mode": "auto", "cap": 50, "seed": 9})
    first, second = fetch(cfg), fetch(cfg)
    ids = _sampled_ids(first, f)
    assert ids == _sampled_ids(second, f)  # same rows on every run
    expected = _md5_smallest(f, 50, 9)
    assert ids["A"] == expected["A"] and ids["C"] == expected["C"]
    assert len(ids["B"]) == 40  # a segment under the cap gives all its rows
    (metric,) = first.metrics
    assert first.sampled and metric.sample_size == 140
    assert {s.segment: s.moments.n for s in metric.segments} == {"A": 300, "B": 40, "C": 120}

    other = _sampled_ids(fetch(replace(cfg, sampling=replace(cfg.sampling, seed=10))), f)
    assert other["A"] != ids["A"] and other["A"] == _md5_smallest(f, 50, 10)["A"]


def test_sample_read_again_when_the_first_read_comes_up_short(tmp_path, monkeypatch):
    f = tmp_path / "s.sqlite"
    build(f, {"A": 400, "B": 260})
    real = sampling.fetch_fraction
    # the first read fetches far too few rows; the second (boosted) must repair it
    monkeypatch.setattr(sampling, "fetch_fraction",
                        lambda n, cap, boost=0: real(n, cap, boost) if boost else 0.01)
    cfg = config(tmp_path, f, sampling={"mode": "sample", "cap": 30, "seed": 2})
    data = fetch(cfg)
    assert _sampled_ids(data, f) == _md5_smallest(f, 30, 2)


def test_full_mode_gives_all_values(tmp_path):
    f = tmp_path / "s.sqlite"
    build(f, {"A": 300, "B": 40})
    data = fetch(config(tmp_path, f, sampling={"mode": "full", "cap": 50}))
    (metric,) = data.metrics
    assert not data.sampled and metric.sample_size is None
    assert [len(s.values) for s in metric.segments] == [300, 40]


def test_probe_without_usable_values_falls_back_to_the_first_value(tmp_path):
    f = tmp_path / "s.sqlite"
    build(f, {"A": 200, "B": 150}, leading_nulls=1200)  # the probe's 1000 rows hold no x
    data = fetch(config(tmp_path, f, metrics=[{"column": "x"}, {"column": "big"}],
                        sampling={"mode": "full"}))
    for metric in data.metrics:
        for s in metric.segments:
            # reference: numpy's mean and two-pass variance on the same values
            near = s.values - (1e9 if metric.metric.name == "big" else 0.0)  # exact (Sterbenz)
            assert s.moments.mean == pytest.approx(np.mean(s.values), rel=1e-15)
            assert float(s.moments.var) == pytest.approx(np.var(near, ddof=1), rel=1e-10)
    assert data.metrics[0].quality.null == 1200


def test_text_column_falls_back_to_local_with_a_reason(tmp_path, caplog):
    f = tmp_path / "s.sqlite"
    build(f, {"A": 20, "B": 20}, text_column=True)
    cfg = config(tmp_path, f, metrics=[{"column": "note"}])
    with caplog.at_level(logging.WARNING, logger="monitor.source"):
        data = fetch(cfg)
    assert data.compute == "local"
    assert ("job job: metric column 'note' has type TEXT, not a number; the push-down needs numeric "
            "columns; computing locally (reading the rows) instead") in caplog.messages


def test_old_servers_are_refused_with_a_clear_message():
    with pytest.raises(SourceError) as err:
        check_server_version("sqlite", (3, 24, 0), "source sqlite:///x.sqlite")
    assert str(err.value) == (
        "source sqlite:///x.sqlite: SQLite 3.24.0 is too old; segwatch needs SQLite 3.25 or newer "
        "(window functions); upgrade the server (for SQLite: the library Python's sqlite3 module is built with)"
    )
    with pytest.raises(SourceError, match=r"^src: MariaDB 10\.1\.48 is too old; segwatch needs MariaDB 10\.2 or newer"):
        check_server_version("mariadb", (10, 1, 48), "src")
    with pytest.raises(SourceError, match=r"^src: MySQL 5\.7\.44 is too old; segwatch needs MySQL 8\.0 or newer"):
        check_server_version("mysql", (5, 7, 44), "src")
    with pytest.raises(SourceError, match=r"^src: PostgreSQL 9\.6\.24 is too old; segwatch needs PostgreSQL 10 or newer"):
        check_server_version("postgresql", (9, 6, 24), "src")
    for engine, version in (("sqlite", (3, 25, 0)), ("mariadb", (10, 2, 0)), ("mysql", (8, 0, 1)),
                            ("postgresql", (10, 0)), ("duckdb", (0, 1)), ("postgresql", None)):
        check_server_version(engine, version, "src")  # accepted


def test_sqlite_without_math_functions_gets_a_python_ln():
    con = sqlite3.connect(":memory:")
    assert sqlite_engine.install_sqlite_functions(con, has_ln=False) is True
    # reference: math.log, and Python's hashlib for the md5 function
    assert con.execute("SELECT ln(2.0)").fetchone()[0] == math.log(2.0)
    assert con.execute("SELECT ln(-1.0)").fetchone()[0] is None
    assert con.execute("SELECT segwatch_md5('7:0')").fetchone()[0] == hashlib.md5(b"7:0").hexdigest()
    assert sqlite_engine.install_sqlite_functions(sqlite3.connect(":memory:")) is (not sqlite_engine.sqlite_has_ln(sqlite3.connect(":memory:")))
