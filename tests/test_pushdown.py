"""The aggregate SQL builder (monitor.source.pushdown) and the sampling rule (monitor.source.sampling).

Checked here without a server: the SQL shape on several dialects (CASE, never
FILTER; columns quoted from column objects; shifted sums, never a raw sum of
squares), compilation for a distributed SQL engine's dialect (Trino, compile only),
the conversion of aggregate rows into summaries against numpy/scipy on the same
values, and the sampling thresholds.
"""

from __future__ import annotations

import math
from decimal import Decimal

import numpy as np
import pytest
import sqlalchemy as sa
from scipy import stats
from sqlalchemy.dialects import mysql, postgresql, sqlite

from monitor.source import pushdown, sampling
from monitor.config import MetricConfig
from monitor.source.pushdown import EngineTraits, Shift

METRICS = (
    MetricConfig(column="dwell hours", name="dwell"),  # a name that needs quoting
    MetricConfig(column="cost", name="cost_log", transform="log"),
    MetricConfig(column="amount", name="amount"),
    MetricConfig(column="flag", name="flag"),
)


def _table() -> sa.Table:
    return sa.Table(
        "shipments", sa.MetaData(),
        sa.Column("id", sa.Integer, primary_key=True),
        sa.Column("ts", sa.DateTime),
        sa.Column("depot", sa.String(20)),
        sa.Column("dwell hours", sa.Double),
        sa.Column("cost", sa.Float),
        sa.Column("amount", sa.Numeric(12, 2)),
        sa.Column("flag", sa.Boolean),
        sa.Column("note", sa.Text),
    )


def _dialects():
    from trino.sqlalchemy.dialect import TrinoDialect  # a distributed SQL engine's dialect

    import duckdb_engine

    return {
        "sqlite": sqlite.dialect(),
        "postgresql": postgresql.dialect(),
        "mysql": mysql.dialect(),
        "duckdb": duckdb_engine.Dialect(),
        "trino": TrinoDialect(),
    }


def _compiled(dialect_name: str) -> str:
    dialect = _dialects()[dialect_name]
    traits = EngineTraits.of(dialect)
    t = _table()
    plans, reason = pushdown.plan_metrics(t, METRICS, traits)
    assert reason is None
    shifts = {p.position: Shift.from_probe(p, Decimal("10.5") if p.exact else 10.5, 4.0) for p in plans}
    where = sa.and_(t.c.ts >= sa.literal("2026-03-02"), t.c.ts < sa.literal("2026-03-09"))
    stmt = pushdown.aggregate_query(t, "depot", plans, where, shifts, traits)
    return str(stmt.compile(dialect=dialect, compile_kwargs={"literal_binds": True}))


@pytest.mark.parametrize("name", ["sqlite", "postgresql", "mysql", "duckdb", "trino"])
def test_aggregate_sql_shape(name):
    sql = _compiled(name)
    upper = sql.upper()
    assert "FILTER" not in upper  # MySQL has none: conditional aggregates are CASE
    assert "CASE WHEN" in upper and "GROUP BY" in upper
    assert "LN(" in upper  # the log transform runs in the database
    quote = {"mysql": "`"}.get(name, '"')
    assert f"{quote}dwell hours{quote}" in sql  # a column object, quoted by the dialect
    assert "ROUND(" in upper  # the split of the shifted values (see aggregate_query)
    if name == "sqlite":
        assert "typeof(" in sql
    if name == "mysql":
        assert "+ 0E0" in sql  # double precision without CAST AS DOUBLE
    if name == "postgresql":
        assert "OFFSET 0" in upper


def test_trino_compiles_every_query():
    """Compile only (no server): the probe, the aggregate and a sampled values query."""
    dialect = _dialects()["trino"]
    traits = EngineTraits.of(dialect)
    t = _table()
    plans, _ = pushdown.plan_metrics(t, METRICS, traits)
    where = t.c.ts >= sa.literal("2026-03-02")
    probe = pushdown.probe_query(t, plans, where, traits)
    hashed = pushdown.hash_expr([t.c.id], 7, traits)
    values = pushdown.values_query(t, "depot", plans, where, traits, hashed=hashed,
                                   thresholds=[("0a000000", ["Harbor", "Ridge"])])
    texts = [str(q.compile(dialect=dialect, compile_kwargs={"literal_binds": True})) for q in (probe, values)]
    assert "LIMIT 1000" in texts[0]
    assert "lower(to_hex(md5(to_utf8(" in texts[1]
    assert "'0a000000'" in texts[1]


def test_text_column_is_not_pushed_down():
    traits = EngineTraits.of(postgresql.dialect())
    plans, reason = pushdown.plan_metrics(_table(), [MetricConfig(column="note", name="note")], traits)
    assert plans == ()
    assert reason == "metric column 'note' has type TEXT, not a number; the push-down needs numeric columns"


def test_exact_only_where_the_engine_has_exact_decimals():
    t = _table()
    kinds = {}
    for name in ("postgresql", "mysql", "sqlite", "duckdb"):
        traits = EngineTraits.of(_dialects()[name])
        plans, _ = pushdown.plan_metrics(t, METRICS, traits)
        kinds[name] = [p.kind for p in plans]
    assert kinds["postgresql"] == ["float", "float", "exact", "bool"]
    assert kinds["mysql"] == ["float", "float", "exact", "bool"]
    assert kinds["sqlite"] == kinds["duckdb"] == ["float", "float", "float", "bool"]
    # MySQL decimals too wide for exact fourth powers fall back to doubles
    wide = sa.Table("w", sa.MetaData(), sa.Column("a", sa.Numeric(40, 20)))
    plans, _ = pushdown.plan_metrics(wide, [MetricConfig(column="a", name="a")],
                                     EngineTraits.of(mysql.dialect()))
    assert plans[0].kind == "float"


def _fake_row(values: np.ndarray, shift: Shift, label: str = "A", extra_rows: int = 0) -> dict:
    """What the database would return for one segment, computed here with numpy."""
    d = values - shift.k
    h = np.round(d * shift.scale) / shift.scale
    low = d - h
    return {
        "seg": label, "rows": len(values) + extra_rows, "nn0": len(values), "fin0": len(values),
        "n0": len(values), "lo0": values.min(), "hi0": values.max(),
        "s1h_0": h.sum(), "s1l_0": low.sum(), "s2h_0": (h * h).sum(), "s2m_0": (h * low).sum(),
        "s2l_0": (low * low).sum(), "s3_0": (d**3).sum(), "s4_0": (d**4).sum(),
    }


def test_read_aggregate_matches_scipy_on_large_offsets():
    rng = np.random.default_rng(3)
    values = 1e9 + rng.normal(0, 1e-3, 500)
    plan = pushdown.MetricPlan(0, MetricConfig(column="x", name="x"), "x", "float")
    shift = Shift.from_probe(plan, float(values[:100].mean()), float(np.ptp(values[:100])))
    traits = EngineTraits("postgresql", typeof=False, non_finite=True, exact=True)
    agg = pushdown.read_aggregate([_fake_row(values, shift, extra_rows=2)], [plan], {0: shift}, traits)
    summary = agg.metrics[0]["A"]
    m = summary.moments
    # reference: numpy / scipy on the same values less 1e9 (an exact subtraction by
    # Sterbenz's lemma; shape statistics do not change with a shift, and scipy's own
    # rounded mean near 1e9 would cost it digits)
    near = values - 1e9
    assert m.n == 500
    assert m.mean == pytest.approx(np.mean(values), rel=1e-15)
    assert float(m.var) == pytest.approx(np.var(near, ddof=1), rel=1e-9)
    assert float(m.skewness) == pytest.approx(stats.skew(near), abs=1e-6)
    assert float(m.excess_kurtosis) == pytest.approx(stats.kurtosis(near), abs=1e-6)
    assert summary.quality.rows == 502 and summary.quality.null == 2
    assert agg.total_rows == 502 and agg.labels == ("A",)


def test_read_aggregate_constant_segment_has_exact_zeros():
    values = np.full(7, 3.25)
    plan = pushdown.MetricPlan(0, MetricConfig(column="x", name="x"), "x", "float")
    shift = Shift.from_probe(plan, 1.0, 0.0)
    traits = EngineTraits("duckdb", typeof=False, non_finite=True, exact=False)
    agg = pushdown.read_aggregate([_fake_row(values, shift)], [plan], {0: shift}, traits)
    m = agg.metrics[0]["A"].moments
    # reference: Moments.from_values gives exact zeros for a constant segment
    assert (m.n, m.mean, m.m2, m.m3, m.m4) == (7, 3.25, 0.0, 0.0, 0.0)


def test_segments_that_print_alike_are_merged():
    rng = np.random.default_rng(5)
    a, b = rng.normal(5, 1, 30), rng.normal(6, 1, 20)
    plan = pushdown.MetricPlan(0, MetricConfig(column="x", name="x"), "x", "float")
    shift = Shift.from_probe(plan, 5.0, 4.0)
    traits = EngineTraits("sqlite", typeof=True, non_finite=True, exact=False)
    rows = []
    for label, vals in ((1, a), ("1", b)):
        r = _fake_row(vals, shift, label=label)
        r["num0"] = len(vals)
        rows.append(r)
    agg = pushdown.read_aggregate(rows, [plan], {0: shift}, traits)
    both = np.concatenate([a, b])
    m = agg.metrics[0]["1"].moments
    assert agg.labels == ("1",) and agg.raw["1"] == (1, "1")
    # reference: numpy on the union of the values
    assert m.n == 50 and m.mean == pytest.approx(both.mean(), rel=1e-14)
    assert float(m.var) == pytest.approx(both.var(ddof=1), rel=1e-12)


def test_shift_scale_is_a_power_of_two_near_the_spread():
    plan = pushdown.MetricPlan(0, MetricConfig(column="x", name="x"), "x", "float")
    s = Shift.from_probe(plan, 100.0, 3.0)
    assert s.k == 100.0 and s.scale == 2.0 ** (12 - 2)  # 3 -> ceil(log2 3) = 2
    assert Shift.from_probe(plan, None, None) == Shift(0.0, 2.0**12)
    assert Shift.from_probe(plan, 1e9, 0.0).scale == 2.0 ** (12 - 30)  # constant probe: |k| decides
    exact = pushdown.MetricPlan(0, MetricConfig(column="x", name="x"), "x", "exact")
    assert Shift.from_probe(exact, Decimal("1.25"), None) == Shift(Decimal("1.25"), None)


# ---------------------------------------------------------------- sampling rule


def test_plan_sample_rule():
    rows = {"A": 40, "B": 9000, "C": 5000}
    assert not sampling.plan_sample("auto", 5000, 0, {"A": 40, "C": 5000}).any  # all fit: all values
    plan = sampling.plan_sample("auto", 5000, 0, rows)
    assert plan.sampled == {"B"}  # only segments above the cap are sampled
    assert sampling.plan_sample("sample", 5000, 0, rows).sampled == {"B"}
    assert not sampling.plan_sample("full", 10, 0, rows).any


def test_fetch_fraction_leaves_room_for_the_cap():
    n, cap = 40_000, 5_000
    p = sampling.fetch_fraction(n, cap)
    # a binomial(n, p) count falls below the cap with probability < 1e-4 (scipy.stats.binom)
    assert stats.binom.cdf(cap - 1, n, p) < 1e-4
    assert p <= 1.2 * (cap + 4 * math.sqrt(cap) + 8) / n  # and does not fetch much more
    assert sampling.fetch_fraction(n, cap, boost=10) == 1.0
    assert sampling.hex_threshold(1.0) is None
    assert sampling.hex_threshold(0.5) == "80000000"
    plan = sampling.plan_sample("sample", cap, 0, {"A": n, "B": 6000})
    groups = sampling.thresholds(plan, {"A": n, "B": 6000}, {"A": ["A"], "B": ["B"]})
    assert [segs for _, segs in groups] == [["A"]]  # B's fraction is 1: read whole, unlisted
    again = sampling.thresholds(plan, {"A": n, "B": 6000}, {"A": ["A"], "B": ["B"]}, only=["B"])
    assert again == [(sampling.EVERY_ROW, ["B"])]  # a re-read lists it explicitly


def test_int64_bounds_pass_the_same_fraction_as_hex_thresholds():
    # a signed 64-bit hash h passes when (h + 2^63) >> 32 < ceil(p 2^32): the hex rule's 32 bits
    assert sampling.int64_bound(1.0) is None
    assert sampling.int64_bound(0.5) == -1  # exactly the lower half of the 64-bit range
    assert sampling.int64_bound(2.0**-32) == -(2**63) + 2**32 - 1
    for p in (0.01, 0.3, 0.77):
        b = sampling.int64_bound(p)
        assert ((b + 2**63) >> 32) + 1 == int(sampling.hex_threshold(p), 16)
    plan = sampling.plan_sample("sample", 10, 0, {"A": 1000, "B": 12})
    assert sampling.thresholds(plan, {"A": 1000, "B": 12}, {"A": ["A"], "B": ["B"]}, only=["B"],
                               kind="int64") == [(2**63 - 1, ["B"])]


def test_md5_60_bounds_keep_the_hex_order():
    # reference: Python's hashlib.md5; the 15-digit prefix as a number orders rows as the digest does
    import hashlib

    digests = sorted(hashlib.md5(f"{i}:3".encode()).hexdigest() for i in range(2000))
    prefixes = [int(d[:15], 16) for d in digests]
    assert prefixes == sorted(prefixes)
    for p in (0.01, 0.25, 0.6):
        t, b = sampling.hex_threshold(p), sampling.md5_60_bound(p)
        assert [d < t for d in digests] == [x <= b for x in prefixes]
    assert sampling.md5_60_bound(1.0) is None


def test_smallest_ignores_row_order():
    h = np.array(["b", "a", "c", "a"])
    v = np.array([2.0, 5.0, 1.0, 4.0])
    picked = sampling.smallest(h, [v], 2)
    assert sorted(v[picked]) == [4.0, 5.0]
    rev = sampling.smallest(h[::-1], [v[::-1]], 2)
    assert sorted(v[::-1][rev]) == [4.0, 5.0]
    assert list(sampling.smallest(h, [v], 10)) == [0, 1, 2, 3]


def test_smallest_breaks_ties_across_the_cut_by_the_values():
    rng = np.random.default_rng(3)
    for _ in range(200):
        n = int(rng.integers(2, 40))
        h = rng.integers(0, 6, n)  # many ties
        v = rng.normal(size=n)
        cap = int(rng.integers(1, n))
        # reference: a plain sort of (hash, value) pairs in Python
        want = sorted(sorted(range(n), key=lambda i: (h[i], v[i]))[:cap])
        assert list(sampling.smallest(h, [v], cap)) == want
