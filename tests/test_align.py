"""Tests for disagg.fit.align: exact overlap of run-log states with meter intervals, DST days in the
site's time zone (through the real readers), weekly spells and the baseload columns.

Hand-computed values are in hours. DST facts (common practice, docs/references.md section 7, and
the IANA tz database for America/Chicago): in 2025 clocks go forward at 02:00 on Sunday
9 March (a 23-hour local day, 92 fifteen-minute intervals) and back at 02:00 on Sunday
2 November (a 25-hour day, 100 intervals).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import polars as pl
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from disagg.fit.align import align, baseload_columns, overlap_hours, spell_segments
from disagg.inputs.config import BaseloadSettings, load_site, parse_spell
from disagg.inputs.readers import Segments, read_meter, read_runlog

TZ = "America/Chicago"
ZONE = ZoneInfo(TZ)
UTC = dt.timezone.utc
SPRING_FORWARD = dt.date(2025, 3, 9)
FALL_BACK = dt.date(2025, 11, 2)
# 23 h x 4 and 25 h x 4 fifteen-minute intervals (docs/references.md section 7).
INTERVALS_ON_DST_DAY = {SPRING_FORWARD: 92, FALL_BACK: 100}
HOURS_ON_DST_DAY = {SPRING_FORWARD: 23.0, FALL_BACK: 25.0}
# Float sums of ns / 3.6e12 over a day: exact to well below a microsecond.
TOL_H = 1e-9


def ns(text: str) -> int:
    """A UTC time such as '2025-01-06T10:07:30' -> ns since 1970."""
    return int(np.datetime64(text, "ns").astype(np.int64))


def segs(*rows: tuple[str, str, float]) -> Segments:
    """Segments from (start, end, status) rows in UTC text."""
    return Segments(np.array([ns(a) for a, _, _ in rows], dtype=np.int64),
                    np.array([ns(b) for _, b, _ in rows], dtype=np.int64),
                    np.array([v for _, _, v in rows], dtype=float))


def grid(first: str, count: int, minutes: int = 15) -> tuple[np.ndarray, np.ndarray]:
    start = ns(first) + np.arange(count, dtype=np.int64) * minutes * 60_000_000_000
    return start, start + minutes * 60_000_000_000


# --- Hand-computed overlaps ------------------------------------------------------------------

def test_event_inside_an_interval_splits_it_exactly():
    # Off from 10:00, on from 10:07:30 to 10:30: 7.5 of the first 15 minutes are on.
    seg = segs(("2025-01-06T10:00", "2025-01-06T10:07:30", 0.0),
               ("2025-01-06T10:07:30", "2025-01-06T10:30", 1.0))
    start, end = grid("2025-01-06T10:00", 2)
    run_h, unknown_h = overlap_hours(seg, start, end)
    np.testing.assert_allclose(run_h, [0.125, 0.25], atol=TOL_H)
    np.testing.assert_allclose(unknown_h, [0.0, 0.0], atol=TOL_H)


def test_events_across_and_exactly_on_interval_edges():
    seg = segs(("2025-01-06T09:00", "2025-01-06T10:10", 0.0),
               ("2025-01-06T10:10", "2025-01-06T10:20", 1.0),   # across the 10:15 edge
               ("2025-01-06T10:20", "2025-01-06T10:30", 0.0),
               ("2025-01-06T10:30", "2025-01-06T10:45", 1.0),   # exactly one interval
               ("2025-01-06T10:45", "2025-01-06T12:00", 0.0))
    start, end = grid("2025-01-06T10:00", 4)
    run_h, unknown_h = overlap_hours(seg, start, end)
    # 10:00-10:15: 5 min; 10:15-10:30: 5 min; 10:30-10:45: 15 min; 10:45-11:00: none.
    np.testing.assert_allclose(run_h, [5 / 60, 5 / 60, 0.25, 0.0], atol=TOL_H)
    np.testing.assert_allclose(unknown_h, 0.0, atol=TOL_H)


def test_state_spanning_many_intervals():
    # On from 08:05 to 14:00 over 15-minute intervals 08:00..14:15.
    seg = segs(("2025-01-06T07:00", "2025-01-06T08:05", 0.0),
               ("2025-01-06T08:05", "2025-01-06T14:00", 1.0),
               ("2025-01-06T14:00", "2025-01-06T15:00", 0.0))
    start, end = grid("2025-01-06T08:00", 26)
    run_h, _ = overlap_hours(seg, start, end)
    expected = np.full(26, 0.25)
    expected[0] = 10 / 60          # 08:05-08:15
    expected[24:] = 0.0            # 14:00-14:15 and 14:15-14:30
    np.testing.assert_allclose(run_h, expected, atol=TOL_H)
    assert run_h.sum() == pytest.approx(5 + 55 / 60, abs=TOL_H)


def test_unknown_before_first_segment_in_gaps_and_after_last():
    seg = segs(("2025-01-06T10:05", "2025-01-06T10:20", 1.0),
               ("2025-01-06T10:25", "2025-01-06T10:40", 0.0))   # 10:20-10:25 not logged
    start, end = grid("2025-01-06T09:45", 5)
    run_h, unknown_h = overlap_hours(seg, start, end)
    # 09:45-10:00 nothing logged; 10:00-10:15: 5 unknown, 10 on; 10:15-10:30: 5 on, 5 unknown,
    # 5 off; 10:30-10:45: 10 off, 5 unknown; 10:45-11:00 nothing logged.
    np.testing.assert_allclose(run_h, [0.0, 10 / 60, 5 / 60, 0.0, 0.0], atol=TOL_H)
    np.testing.assert_allclose(unknown_h, [0.25, 5 / 60, 5 / 60, 5 / 60, 0.25], atol=TOL_H)


def test_no_segments_is_all_unknown():
    empty = Segments(np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0))
    start, end = grid("2025-01-06T10:00", 3)
    run_h, unknown_h = overlap_hours(empty, start, end)
    np.testing.assert_allclose(run_h, 0.0)
    np.testing.assert_allclose(unknown_h, 0.25)


def test_variable_status_integrates_status_to_the_exponent():
    seg = segs(("2025-01-06T10:00", "2025-01-06T10:15", 0.5),
               ("2025-01-06T10:15", "2025-01-06T10:20", 1.0),
               ("2025-01-06T10:20", "2025-01-06T10:30", 0.8))
    start, end = grid("2025-01-06T10:00", 2)
    run_h, _ = overlap_hours(seg, start, end, exponent=2.5)
    np.testing.assert_allclose(run_h, [0.25 * 0.5**2.5, 5 / 60 + 10 / 60 * 0.8**2.5],
                               rtol=1e-12)
    run_lin, _ = overlap_hours(seg, start, end, exponent=1.0)
    np.testing.assert_allclose(run_lin, [0.125, 5 / 60 + 10 / 60 * 0.8], rtol=1e-12)


@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_overlap_is_additive_over_any_split(data):
    # Random segments with gaps (second resolution) over one hour, and random cut points.
    t0 = ns("2025-01-06T10:00")
    edges = sorted(data.draw(st.sets(st.integers(0, 3600), min_size=2, max_size=12)))
    pairs = [(a, b) for a, b in zip(edges[:-1], edges[1:])]
    keep = data.draw(st.lists(st.booleans(), min_size=len(pairs), max_size=len(pairs)))
    vals = data.draw(st.lists(st.floats(0, 1), min_size=len(pairs), max_size=len(pairs)))
    rows = [(a, b, v) for (a, b), k, v in zip(pairs, keep, vals) if k]
    s_ns = 1_000_000_000
    seg = Segments(np.array([t0 + a * s_ns for a, _, _ in rows], dtype=np.int64),
                   np.array([t0 + b * s_ns for _, b, _ in rows], dtype=np.int64),
                   np.array([v for _, _, v in rows], dtype=float))
    cuts = sorted(data.draw(st.sets(st.integers(1, 3599), max_size=8)))
    bounds = np.array([0, *cuts, 3600], dtype=np.int64) * s_ns + t0
    exponent = data.draw(st.sampled_from([1.0, 2.0, 2.7]))
    run_h, unknown_h = overlap_hours(seg, bounds[:-1], bounds[1:], exponent)
    whole_run, whole_unknown = overlap_hours(seg, bounds[:1], bounds[-1:], exponent)
    exact_run = sum(v**exponent * (b - a) for a, b, v in rows) / 3600
    exact_unknown = 1.0 - sum(b - a for a, b, _ in rows) / 3600
    assert run_h.sum() == pytest.approx(exact_run, abs=TOL_H)
    assert whole_run[0] == pytest.approx(exact_run, abs=TOL_H)
    assert unknown_h.sum() == pytest.approx(exact_unknown, abs=TOL_H)
    assert whole_unknown[0] == pytest.approx(exact_unknown, abs=TOL_H)


# --- DST days through the real readers -------------------------------------------------------

SITE_TOML = """\
[site]
name = "DST test building"
timezone = "America/Chicago"

[meter]
file = "{meter}"
time_column = "reading_end"
value_column = "kwh"
unit = "kWh"
stamp = "end"

[runlog]
file = "{events}"
layout = "events"
time_column = "time"
equipment_column = "point"
state_column = "state"

[[equipment]]
id = "AHU-1"
rated_kw = 20

[[equipment]]
id = "P-1"
rated_kw = 5
"""


def _local(day: dt.date, hour: int = 0, minute: int = 0, fold: int = 0) -> dt.datetime:
    return dt.datetime(day.year, day.month, day.day, hour, minute, tzinfo=ZONE, fold=fold)


def _write_site(folder: Path, day: dt.date, with_offset: bool) -> Path:
    """Meter for the local days before, of and after ``day``, and events: AHU-1 on for all
    of ``day``; P-1 on for 45 minutes across the clock change (01:30 -> 01:15 the second
    time when clocks go back; 01:30 -> 03:15 when they go forward)."""
    folder.mkdir()
    fmt = (lambda t: t.astimezone(ZONE).isoformat()) if with_offset else \
        (lambda t: t.astimezone(ZONE).strftime("%Y-%m-%dT%H:%M:%S"))
    first = _local(day - dt.timedelta(days=1)).astimezone(UTC)
    last = _local(day + dt.timedelta(days=2)).astimezone(UTC)
    n = int((last - first) / dt.timedelta(minutes=15))
    ends = [first + dt.timedelta(minutes=15 * (i + 1)) for i in range(n)]
    lines = ["reading_end,kwh"] + [f"{fmt(t)},{1 + (i % 7) / 10:.1f}" for i, t in enumerate(ends)]
    (folder / "meter.csv").write_text("\n".join(lines) + "\n")

    if day == FALL_BACK:
        p_on, p_off = _local(day, 1, 30, fold=0), _local(day, 1, 15, fold=1)
    else:
        p_on, p_off = _local(day, 1, 30), _local(day, 3, 15)
    assert p_off.astimezone(UTC) - p_on.astimezone(UTC) == dt.timedelta(minutes=45)
    events = [
        ("AHU-1", _local(day - dt.timedelta(days=1)), "off"),
        ("AHU-1", _local(day), "on"),
        ("AHU-1", _local(day + dt.timedelta(days=1)), "off"),
        ("P-1", _local(day - dt.timedelta(days=1)), "off"),
        ("P-1", p_on, "on"),
        ("P-1", p_off, "off"),
        ("P-1", _local(day + dt.timedelta(days=2)), "off"),  # the log's last time
        ("AHU-1", _local(day + dt.timedelta(days=2)), "off"),
    ]
    rows = ["time,point,state"] + [f"{fmt(t)},{eq},{state}" for eq, t, state in events]
    (folder / "events.csv").write_text("\n".join(rows) + "\n")
    toml = folder / "site.toml"
    toml.write_text(SITE_TOML.format(meter="meter.csv", events="events.csv"))
    return toml


def _aligned(toml: Path):
    site = load_site(toml)
    meter = read_meter(site.meter, site.timezone)
    runlog = read_runlog(site.runlog, site)
    return align(site, meter, runlog)


@pytest.mark.parametrize("day", [SPRING_FORWARD, FALL_BACK], ids=["spring", "fall"])
def test_dst_day_intervals_and_run_hours(tmp_path, day):
    a = _aligned(_write_site(tmp_path / "naive", day, with_offset=False))
    assert a.interval_min == 15
    local_day = a.frame["start_utc"].dt.convert_time_zone(TZ).dt.date().to_numpy()
    days = [day - dt.timedelta(days=1), day, day + dt.timedelta(days=1)]
    counts = [int((local_day == d).sum()) for d in days]
    assert counts == [96, INTERVALS_ON_DST_DAY[day], 96]
    assert a.counts["absent"] == 0 and a.counts["used"] == sum(counts)
    assert a.use.all()
    ahu = a.hours[:, a.equipment_ids.index("AHU-1")]
    pump = a.hours[:, a.equipment_ids.index("P-1")]
    on_day = local_day == day
    assert ahu[on_day].sum() == pytest.approx(HOURS_ON_DST_DAY[day], abs=TOL_H)
    assert ahu[~on_day].sum() == pytest.approx(0.0, abs=TOL_H)
    assert pump.sum() == pytest.approx(0.75, abs=TOL_H)
    assert pump[on_day].sum() == pytest.approx(0.75, abs=TOL_H)
    np.testing.assert_allclose(a.frame["interval_h"].to_numpy(), 0.25, atol=TOL_H)


@pytest.mark.parametrize("day", [SPRING_FORWARD, FALL_BACK], ids=["spring", "fall"])
def test_dst_naive_local_and_utc_offset_give_identical_alignment(tmp_path, day):
    naive = _aligned(_write_site(tmp_path / "naive", day, with_offset=False))
    offset = _aligned(_write_site(tmp_path / "offset", day, with_offset=True))
    assert naive.frame.equals(offset.frame)
    np.testing.assert_array_equal(naive.hours, offset.hours)
    np.testing.assert_array_equal(naive.use, offset.use)
    assert naive.counts == offset.counts


# --- Weekly spells across DST ----------------------------------------------------------------

def _spell_hours(spells, first_local: dt.datetime, last_local: dt.datetime):
    seg = spell_segments(tuple(parse_spell(s) for s in spells), TZ,
                         int(first_local.timestamp()) * 10**9, int(last_local.timestamp()) * 10**9)
    out = []
    for a, b in zip(seg.start_ns, seg.end_ns):
        start = dt.datetime.fromtimestamp(a / 1e9, UTC).astimezone(ZONE)
        out.append((start.date(), start.strftime("%H:%M"), (b - a) / 3.6e12))
    return out


@pytest.mark.parametrize("day", [SPRING_FORWARD, FALL_BACK], ids=["spring", "fall"])
def test_weekday_and_sunday_spells_keep_their_local_length_across_dst(day):
    # Fri before to Tue after the Sunday change: 07:00-19:00 local is 12 h every day, with
    # the UTC start one hour earlier after spring forward and one hour later after fall back.
    found = _spell_hours(["Mon-Fri 07:00-19:00", "Sun 07:00-19:00"],
                         _local(day - dt.timedelta(days=2)), _local(day + dt.timedelta(days=2)))
    in_range = [f for f in found if day - dt.timedelta(days=2) <= f[0] <= day + dt.timedelta(days=2)]
    dates = [f[0] for f in in_range]
    assert dates == [day - dt.timedelta(days=2), day, day + dt.timedelta(days=1),
                     day + dt.timedelta(days=2)]
    for _, local_start, hours in in_range:
        assert local_start == "07:00"
        assert hours == pytest.approx(12.0, abs=TOL_H)


@pytest.mark.parametrize(("day", "spell", "expected_h"), [
    # 01:00-05:00 local holds the clock change: 3 h when an hour is missing, 5 h when repeated.
    (SPRING_FORWARD, "Sun 01:00-05:00", 3.0),
    (FALL_BACK, "Sun 01:00-05:00", 5.0),
    # An edge in the missing hour moves to the first valid time after it (03:00 CDT, the
    # moment of the change): 02:30-04:00 -> 03:00-04:00, and 01:00-02:30 -> 01:00 CST-03:00
    # CDT, one hour each.
    (SPRING_FORWARD, "Sun 02:30-04:00", 1.0),
    (SPRING_FORWARD, "Sun 01:00-02:30", 1.0),
    # An edge in the repeated hour takes its first occurrence: 01:30 CDT -> 03:00 CST.
    (FALL_BACK, "Sun 01:30-03:00", 2.5),
])
def test_spell_edges_in_missing_or_repeated_hour(day, spell, expected_h):
    found = _spell_hours([spell], _local(day - dt.timedelta(days=1)), _local(day))
    on_day = [h for d, _, h in found if d == day]
    assert on_day == [pytest.approx(expected_h, abs=TOL_H)]


# --- Baseload columns ------------------------------------------------------------------------

def _week(first_local: dt.datetime, minutes: int = 15):
    """Intervals of ``minutes`` over one local week from ``first_local``: (start_utc, start, end)."""
    first = first_local.astimezone(UTC)
    last = (first_local.replace(tzinfo=None) + dt.timedelta(days=7)).replace(tzinfo=ZONE)
    n = int((last.astimezone(UTC) - first) / dt.timedelta(minutes=minutes))
    start = int(first.timestamp()) * 10**9 + np.arange(n, dtype=np.int64) * minutes * 60 * 10**9
    end = start + minutes * 60 * 10**9
    series = pl.Series("start_utc", start).cast(pl.Datetime("ns")).dt.replace_time_zone("UTC")
    return series, start, end


def test_baseload_constant_is_interval_hours():
    s, start, end = _week(_local(dt.date(2025, 1, 6)))
    cols, names = baseload_columns(BaseloadSettings("constant"), TZ, s, start, end)
    assert names == ["baseload_kw"]
    assert cols.shape == (7 * 96, 1)
    np.testing.assert_allclose(cols[:, 0], 0.25, atol=TOL_H)


@pytest.mark.parametrize("monday", [dt.date(2025, 1, 6), dt.date(2025, 3, 3),
                                    dt.date(2025, 3, 10)])
def test_baseload_occupied_plus_unoccupied_is_interval_hours(monday):
    spells = ("Mon-Fri 07:00-19:00", "Sat 08:00-13:00")
    base = BaseloadSettings("occupied", tuple(parse_spell(t) for t in spells), spells)
    # Start at a quarter past to test intervals that straddle the spell edges, too.
    s, start, end = _week(_local(monday, 0, 10), minutes=15)
    cols, names = baseload_columns(base, TZ, s, start, end)
    assert names == ["baseload_occupied_kw", "baseload_unoccupied_kw"]
    np.testing.assert_allclose(cols.sum(axis=1), (end - start) / 3.6e12, atol=TOL_H)
    # 5 x 12 h + 5 h occupied in any week, whether or not it holds a clock change.
    assert cols[:, 0].sum() == pytest.approx(65.0, abs=TOL_H)
    # The 06:55-07:10 local interval on Monday holds 10 occupied minutes.
    local = s.dt.convert_time_zone(TZ)
    row = int(((local.dt.hour() == 6) & (local.dt.minute() == 55)).arg_max())
    assert cols[row, 0] == pytest.approx(10 / 60, abs=TOL_H)


def test_baseload_hour_of_week_is_one_hot():
    s, start, end = _week(_local(dt.date(2025, 1, 6)))       # Monday 00:00 local
    cols, names = baseload_columns(BaseloadSettings("hour-of-week"), TZ, s, start, end)
    assert cols.shape == (7 * 96, 168) and len(names) == 168
    assert names[0] == "baseload_how000_kw" and names[167] == "baseload_how167_kw"
    assert np.all((cols > 0).sum(axis=1) == 1)
    np.testing.assert_allclose(cols.sum(axis=1), 0.25, atol=TOL_H)
    # Row i of a week from Monday 00:00 falls in hour-of-week i // 4.
    np.testing.assert_array_equal(np.argmax(cols, axis=1), np.arange(7 * 96) // 4)
    np.testing.assert_allclose(cols.sum(axis=0), 1.0, atol=TOL_H)


@pytest.mark.parametrize(("monday", "hour_of_week", "hours"), [
    (dt.date(2025, 3, 3), 6 * 24 + 2, 0.0),    # Sun 02:00-03:00 local does not exist
    (dt.date(2025, 10, 27), 6 * 24 + 1, 2.0),  # Sun 01:00-02:00 local happens twice
])
def test_baseload_hour_of_week_on_dst_sundays(monday, hour_of_week, hours):
    s, start, end = _week(_local(monday))
    cols, _ = baseload_columns(BaseloadSettings("hour-of-week"), TZ, s, start, end)
    totals = cols.sum(axis=0)
    assert totals[hour_of_week] == pytest.approx(hours, abs=TOL_H)
    others = np.delete(totals, hour_of_week)
    np.testing.assert_allclose(others, 1.0, atol=TOL_H)


@pytest.mark.parametrize("tz", ["America/Chicago", "Asia/Kolkata", "Australia/Lord_Howe"])
def test_frame_arrays_local_fields_match_the_standard_library(tz):
    """frame_arrays' local date, hour of the week, minute of the day and month of each
    interval start, against Python's zoneinfo (the IANA rules, standard library) over a year
    of 15-minute intervals: the clock changes of Chicago (1 h), Lord Howe (30 min) and a
    half-hour offset without any (Kolkata)."""
    from disagg.fit.align import Aligned, frame_arrays

    starts = pl.datetime_range(dt.datetime(2025, 1, 1, tzinfo=dt.UTC),
                               dt.datetime(2025, 12, 31, 23, 45, tzinfo=dt.UTC), "15m",
                               time_unit="us", eager=True)
    frame = pl.DataFrame({"start_utc": starts,
                          "end_utc": starts + dt.timedelta(minutes=15),
                          "energy_kwh": np.ones(len(starts)), "interval_h": 0.25})
    aligned = Aligned(frame=frame, equipment_ids=[], hours=np.zeros((len(starts), 0)),
                      use=np.ones(len(starts), dtype=bool), interval_min=15)
    a = frame_arrays(aligned, tz)
    zone = ZoneInfo(tz)
    local = [t.astimezone(zone) for t in starts.to_list()]
    assert a["local_date"].tolist() == [(t.date() - dt.date(1970, 1, 1)).days for t in local]
    assert a["hour_of_week"].tolist() == [t.weekday() * 24 + t.hour for t in local]
    assert a["minute_of_day"].tolist() == [t.hour * 60 + t.minute for t in local]
    assert a["month"].tolist() == [t.year * 100 + t.month for t in local]
