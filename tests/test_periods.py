"""Tests for monitor.periods and monitor.clock.

Outside references used here:

* ISO 8601 week numbering as implemented by the Python standard library
  (``datetime.date.isocalendar`` and ``date.fromisocalendar``).
* Clock-change dates and offsets from the published rules, written out below as UTC
  instants, then compared with what our windows (built on ``zoneinfo`` + tzdata) give:
  - EU: summer time starts the last Sunday of March and ends the last Sunday of
    October, both at 01:00 UTC (Directive 2000/84/EC).
  - USA: daylight time starts the second Sunday of March and ends the first Sunday of
    November, at 02:00 local time (Energy Policy Act of 2005).
  - Lord Howe Island: +10:30 standard, +11:00 in summer, a 30-minute change on the first
    Sunday of October / April at 02:00 local (tz database "australasia"; from memory).
  - Brazil 2018/19: summer time began 2018-11-04 at 00:00 and ended 2019-02-17 at 00:00
    (Decree 9,242/2017; from memory), so midnight itself was skipped / repeated.
  - Samoa skipped 30 December 2011 when it moved across the date line (tz database
    "australasia", Pacific/Apia).
"""

from __future__ import annotations

from datetime import date, datetime, timedelta, timezone

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.clock import Clock, FixedClock, SystemClock
from monitor.errors import PeriodError
from monitor.periods import (
    KINDS,
    latest_complete,
    parse_period,
    period_containing,
    period_range,
    periods_between,
)

UTC = timezone.utc
HOUR = timedelta(hours=1)


def utc(*args: int) -> datetime:
    return datetime(*args, tzinfo=UTC)


# -- identifiers and windows ------------------------------------------------------------


class TestIdentifiers:
    def test_contract_example_week(self):
        # reference: CONTRACT.md, `segwatch run --json` example (2026-W06 in UTC)
        p = parse_period("week", "2026-W06", "UTC")
        assert p.start.isoformat() == "2026-02-02T00:00:00+00:00"
        assert p.end.isoformat() == "2026-02-09T00:00:00+00:00"
        assert (p.kind, p.ident, str(p)) == ("week", "2026-W06", "2026-W06")

    def test_day_and_month_windows(self):
        day = parse_period("day", "2026-02-03", "UTC")
        assert (day.start_utc, day.end_utc) == (utc(2026, 2, 3), utc(2026, 2, 4))
        month = parse_period("month", "2024-02", "UTC")
        assert (month.start_utc, month.end_utc) == (utc(2024, 2, 1), utc(2024, 3, 1))
        assert month.duration == timedelta(days=29)  # 2024 is a leap year (Gregorian rule)

    def test_december_to_january(self):
        dec = parse_period("month", "2026-12", "Europe/Berlin")
        jan = dec.next()
        assert jan.ident == "2027-01"
        assert dec.end == jan.start
        assert jan.start.isoformat() == "2027-01-01T00:00:00+01:00"
        assert jan.previous() == dec
        assert parse_period("day", "2026-12-31", "UTC").next().ident == "2027-01-01"

    def test_week_one_of_2026_starts_in_2025(self):
        # reference: datetime.date.fromisocalendar (ISO 8601 week dates)
        assert date.fromisocalendar(2026, 1, 1) == date(2025, 12, 29)
        p = parse_period("week", "2026-W01", "UTC")
        assert p.start_utc == utc(2025, 12, 29)
        assert p.previous().ident == "2025-W52"

    def test_2020_has_week_53(self):
        # reference: datetime.date.isocalendar — 2020-12-31 is in week 53 of 2020
        assert date(2020, 12, 31).isocalendar()[:2] == (2020, 53)
        p = parse_period("week", "2020-W53", "UTC")
        assert (p.start_utc, p.end_utc) == (utc(2020, 12, 28), utc(2021, 1, 4))
        assert p.next().ident == "2021-W01"

    def test_2021_has_no_week_53(self):
        # reference: datetime.date.isocalendar — 28 December 2021 is in week 52
        assert date(2021, 12, 28).isocalendar()[:2] == (2021, 52)
        with pytest.raises(PeriodError) as err:
            parse_period("week", "2021-W53", "UTC")
        assert str(err.value) == (
            "period '2021-W53' does not exist: 2021 has 52 ISO weeks, W01 to W52; "
            "expected an ISO week like 2026-W06"
        )

    def test_new_year_2027_is_in_2026_w53(self):
        # reference: datetime.date.isocalendar
        assert date(2027, 1, 1).isocalendar()[:2] == (2026, 53)
        assert period_containing("week", utc(2027, 1, 1, 12), "UTC").ident == "2026-W53"

    def test_week_identifiers_follow_isocalendar_for_sixteen_years(self):
        # reference: datetime.date.isocalendar, every day 2015-01-01 .. 2030-12-31
        day = date(2015, 1, 1)
        while day <= date(2030, 12, 31):
            iso = day.isocalendar()
            noon = datetime(day.year, day.month, day.day, 12, tzinfo=UTC)
            p = period_containing("week", noon, "UTC")
            assert p.ident == f"{iso.year:04d}-W{iso.week:02d}", day
            assert p.start_utc.date() == date.fromisocalendar(iso.year, iso.week, 1)
            day += timedelta(days=1)

    def test_periods_sort_in_time_order(self):
        weeks = [parse_period("week", i, "UTC") for i in ("2026-W10", "2025-W52", "2026-W02", "2026-W01")]
        assert [p.ident for p in sorted(weeks)] == ["2025-W52", "2026-W01", "2026-W02", "2026-W10"]

    def test_period_is_frozen(self):
        p = parse_period("day", "2026-02-03", "UTC")
        with pytest.raises(AttributeError):
            p.ident = "2026-02-04"  # type: ignore[misc]


class TestParseErrors:
    @pytest.mark.parametrize(
        ("kind", "ident", "message"),
        [
            ("week", "2026-06",
             "period '2026-06' does not fit period kind 'week'; expected an ISO week like 2026-W06"),
            ("week", "2026-02-03",
             "period '2026-02-03' does not fit period kind 'week'; expected an ISO week like 2026-W06"),
            ("week", "2026-w06",
             "period '2026-w06' does not fit period kind 'week'; expected an ISO week like 2026-W06"),
            ("day", "2026-2-3",
             "period '2026-2-3' does not fit period kind 'day'; expected a day like 2026-02-03"),
            ("day", " 2026-02-03",
             "period ' 2026-02-03' does not fit period kind 'day'; expected a day like 2026-02-03"),
            ("month", "2026-W06",
             "period '2026-W06' does not fit period kind 'month'; expected a month like 2026-02"),
            ("month", "2026-13",
             "period '2026-13' does not exist: months run from 01 to 12; expected a month like 2026-02"),
            ("day", "2026-02-29",
             "period '2026-02-29' does not exist: 2026-02 has 28 days; expected a day like 2026-02-03"),
            ("week", "2026-W00",
             "period '2026-W00' does not exist: 2026 has 53 ISO weeks, W01 to W53; "
             "expected an ISO week like 2026-W06"),
            ("month", "0000-05",
             "period '0000-05' does not exist: years run from 0001 to 9999; expected a month like 2026-02"),
        ],
    )
    def test_message(self, kind, ident, message):
        with pytest.raises(PeriodError) as err:
            parse_period(kind, ident, "UTC")
        assert str(err.value) == message

    def test_leap_day_exists_in_2024(self):
        # Gregorian leap-year rule
        assert parse_period("day", "2024-02-29", "UTC").next().ident == "2024-03-01"

    def test_unknown_kind(self):
        with pytest.raises(ValueError, match="unknown period kind 'hour'; expected one of day, week, month"):
            parse_period("hour", "2026-02-03", "UTC")

    def test_unknown_zone(self):
        with pytest.raises(ValueError, match="unknown time zone 'Mars/Olympus'"):
            parse_period("day", "2026-02-03", "Mars/Olympus")

    def test_naive_instant_is_refused(self):
        with pytest.raises(ValueError, match="instant 2026-02-03T12:00:00 has no time zone; pass an aware datetime"):
            period_containing("day", datetime(2026, 2, 3, 12), "UTC")


# -- clock changes ----------------------------------------------------------------------


@pytest.mark.parametrize(
    ("zone", "kind", "ident", "start", "end", "hours"),
    [
        # EU rule: change at 01:00 UTC on the last Sundays of March and October
        ("Europe/Berlin", "day", "2026-03-29", utc(2026, 3, 28, 23), utc(2026, 3, 29, 22), 23),
        ("Europe/Berlin", "day", "2026-10-25", utc(2026, 10, 24, 22), utc(2026, 10, 25, 23), 25),
        ("Europe/Berlin", "week", "2026-W13", utc(2026, 3, 22, 23), utc(2026, 3, 29, 22), 167),
        ("Europe/Berlin", "week", "2026-W43", utc(2026, 10, 18, 22), utc(2026, 10, 25, 23), 169),
        ("Europe/Berlin", "month", "2026-03", utc(2026, 2, 28, 23), utc(2026, 3, 31, 22), 31 * 24 - 1),
        ("Europe/Berlin", "month", "2026-10", utc(2026, 9, 30, 22), utc(2026, 10, 31, 23), 31 * 24 + 1),
        # US rule: 2nd Sunday of March and 1st Sunday of November (EST -5, EDT -4)
        ("America/New_York", "day", "2026-03-08", utc(2026, 3, 8, 5), utc(2026, 3, 9, 4), 23),
        ("America/New_York", "day", "2026-11-01", utc(2026, 11, 1, 4), utc(2026, 11, 2, 5), 25),
        ("America/New_York", "week", "2026-W10", utc(2026, 3, 2, 5), utc(2026, 3, 9, 4), 167),
        ("America/New_York", "week", "2026-W44", utc(2026, 10, 26, 4), utc(2026, 11, 2, 5), 169),
        # Lord Howe: half-hour change, +10:30 <-> +11:00
        ("Australia/Lord_Howe", "day", "2026-10-04",
         datetime(2026, 10, 3, 13, 30, tzinfo=UTC), utc(2026, 10, 4, 13), 23.5),
        ("Australia/Lord_Howe", "day", "2026-04-05",
         utc(2026, 4, 4, 13), datetime(2026, 4, 5, 13, 30, tzinfo=UTC), 24.5),
        # Brazil: midnight skipped (day starts at 01:00 local) and midnight repeated
        ("America/Sao_Paulo", "day", "2018-11-04", utc(2018, 11, 4, 3), utc(2018, 11, 5, 2), 23),
        ("America/Sao_Paulo", "day", "2019-02-16", utc(2019, 2, 16, 2), utc(2019, 2, 17, 3), 25),
        # Samoa: 30 December 2011 never happened; the week around it is 6 days long
        ("Pacific/Apia", "day", "2011-12-30", utc(2011, 12, 30, 10), utc(2011, 12, 30, 10), 0),
        ("Pacific/Apia", "week", "2011-W52", utc(2011, 12, 26, 10), utc(2012, 1, 1, 10), 6 * 24),
    ],
)
def test_windows_across_clock_changes(zone, kind, ident, start, end, hours):
    p = parse_period(kind, ident, zone)
    assert (p.start_utc, p.end_utc) == (start, end)
    assert p.duration == timedelta(hours=hours)


def test_skipped_midnight_starts_the_day_at_the_first_real_instant():
    # Brazil 2018-11-04: clocks went from 00:00 to 01:00 (see module docstring)
    p = parse_period("day", "2018-11-04", "America/Sao_Paulo")
    assert p.start.isoformat() == "2018-11-04T01:00:00-02:00"
    assert p.previous().end == p.start


def test_repeated_hour_is_assigned_by_instant_not_by_wall_time():
    # EU rule: 2026-10-25 01:00 UTC clocks go back from 03:00 CEST to 02:00 CET, so the
    # wall time 02:30 happens twice: 00:30 UTC (CEST) and 01:30 UTC (CET).
    zone = "Europe/Berlin"
    day = parse_period("day", "2026-10-25", zone)
    for moment in (utc(2026, 10, 25, 0, 30), utc(2026, 10, 25, 1, 30)):
        assert day.contains(moment)
        assert period_containing("day", moment, zone) == day
    last_instant = day.end_utc - timedelta(microseconds=1)
    assert day.contains(last_instant) and not day.contains(day.end_utc)
    assert period_containing("day", day.end_utc, zone).ident == "2026-10-26"


def test_containment_works_with_instants_in_any_zone():
    day = parse_period("day", "2026-03-29", "Europe/Berlin")
    tokyo = datetime(2026, 3, 29, 7, 30, tzinfo=timezone(timedelta(hours=9)))  # 22:30 UTC on the 28th
    assert tokyo.astimezone(UTC) == utc(2026, 3, 28, 22, 30)
    assert not day.contains(tokyo)
    assert period_containing("day", tokyo, "Europe/Berlin").ident == "2026-03-28"
    with pytest.raises(ValueError, match="has no time zone"):
        day.contains(datetime(2026, 3, 29, 12))


ZONES = ["UTC", "Europe/Berlin", "America/New_York", "Australia/Lord_Howe", "America/Sao_Paulo",
         "Pacific/Apia", "Asia/Kathmandu", "America/St_Johns", "Africa/Casablanca"]


@settings(max_examples=300, deadline=None, database=None)
@given(
    kind=st.sampled_from(KINDS),
    zone=st.sampled_from(ZONES),
    moment=st.datetimes(min_value=datetime(1990, 1, 1), max_value=datetime(2040, 1, 1), timezones=st.just(UTC)),
)
def test_windows_tile_the_time_line(kind, zone, moment):
    # invariants: every instant is in exactly one window; windows meet end to start;
    # an identifier names the same window it was computed from
    p = period_containing(kind, moment, zone)
    assert p.contains(moment)
    assert p.next().start_utc == p.end_utc
    assert p.previous().end_utc == p.start_utc
    assert p.previous().next() == p
    assert parse_period(kind, p.ident, zone) == p
    assert not p.next().contains(moment) and not p.previous().contains(moment)


# -- latest complete period ---------------------------------------------------------------


class TestLatestComplete:
    def test_now_exactly_at_the_end_makes_it_complete(self):
        assert latest_complete("week", utc(2026, 2, 9), "UTC").ident == "2026-W06"
        assert latest_complete("week", utc(2026, 2, 9) - timedelta(microseconds=1), "UTC").ident == "2026-W05"

    def test_day_boundary_on_a_short_day(self):
        # 2026-03-30 00:00 CEST is 2026-03-29 22:00 UTC (EU rule)
        now = utc(2026, 3, 29, 22)
        assert latest_complete("day", now, "Europe/Berlin").ident == "2026-03-29"
        assert latest_complete("day", now - timedelta(microseconds=1), "Europe/Berlin").ident == "2026-03-28"

    def test_month_at_new_year_in_new_york(self):
        now = utc(2027, 1, 1, 5)  # midnight EST
        assert latest_complete("month", now, "America/New_York").ident == "2026-12"
        assert latest_complete("month", now - HOUR, "America/New_York").ident == "2026-11"

    def test_with_a_fixed_clock(self):
        clock = FixedClock(datetime(2026, 3, 30, 8, 0, tzinfo=UTC))
        assert latest_complete("week", clock.now(), "Europe/Berlin").ident == "2026-W13"
        clock.advance(timedelta(days=7))
        assert latest_complete("week", clock.now(), "Europe/Berlin").ident == "2026-W14"


# -- ranges ---------------------------------------------------------------------------


class TestRanges:
    def test_range_across_a_53_week_year(self):
        # reference: datetime.date.isocalendar — 2020 has 53 ISO weeks
        weeks = period_range("week", "2020-W52", "2021-W02", "UTC")
        assert [p.ident for p in weeks] == ["2020-W52", "2020-W53", "2021-W01", "2021-W02"]

    def test_range_of_months_across_new_year(self):
        months = period_range("month", "2026-11", "2027-02", "Europe/Berlin")
        assert [p.ident for p in months] == ["2026-11", "2026-12", "2027-01", "2027-02"]
        assert all(a.end == b.start for a, b in zip(months, months[1:]))

    def test_single_period_range(self):
        assert [p.ident for p in period_range("day", "2026-02-03", "2026-02-03", "UTC")] == ["2026-02-03"]

    def test_backwards_range(self):
        with pytest.raises(PeriodError) as err:
            period_range("week", "2026-W08", "2026-W06", "UTC")
        assert str(err.value) == (
            "period range '2026-W08' to '2026-W06' runs backwards; the first period must not come after the last"
        )

    def test_range_checks_identifiers(self):
        with pytest.raises(PeriodError, match="period '2026-06' does not fit period kind 'week'"):
            period_range("week", "2026-W01", "2026-06", "UTC")

    def test_periods_between_instants(self):
        days = periods_between("day", utc(2026, 3, 28, 23), utc(2026, 3, 30, 22, 0, 1), "Europe/Berlin")
        assert [p.ident for p in days] == ["2026-03-29", "2026-03-30", "2026-03-31"]
        assert periods_between("day", utc(2026, 3, 2), utc(2026, 3, 1), "UTC") == []

    def test_periods_between_leaves_out_a_skipped_day(self):
        # Samoa, 30 December 2011 (see module docstring)
        # 2011-12-31 09:00 UTC is 23:00 on the 31st in Apia (+14:00)
        days = periods_between("day", utc(2011, 12, 29, 12), utc(2011, 12, 31, 9), "Pacific/Apia")
        assert [p.ident for p in days] == ["2011-12-29", "2011-12-31"]
        assert period_range("day", "2011-12-29", "2011-12-31", "Pacific/Apia")[1].duration == timedelta(0)


# -- clock ----------------------------------------------------------------------------


class TestClock:
    def test_fixed_clock_answers_in_utc(self):
        berlin_noon = datetime(2026, 7, 1, 12, tzinfo=timezone(timedelta(hours=2)))
        clock = FixedClock(berlin_noon)
        assert clock.now() == utc(2026, 7, 1, 10)
        assert clock.now().tzinfo is UTC
        clock.set(utc(2027, 1, 1))
        assert clock.now() == utc(2027, 1, 1)
        assert isinstance(clock, Clock)

    def test_fixed_clock_refuses_naive(self):
        with pytest.raises(ValueError, match="FixedClock needs an aware datetime, got naive 2026-01-01T00:00:00"):
            FixedClock(datetime(2026, 1, 1))

    def test_system_clock_is_aware_utc(self):
        now = SystemClock().now()
        assert now.tzinfo is UTC
        assert isinstance(SystemClock(), Clock)
