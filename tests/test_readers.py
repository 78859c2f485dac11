"""Tests for disagg.inputs.readers: meter and run-log files -> UTC frames and state segments.

Every file here is small and invented, written into tmp_path next to a site TOML that is
read with disagg.inputs.config.load_site, so paths in messages are the resolved paths the user sees.
Error messages are checked in full: they start with the file path, then the CSV line (the
header is line 1) or the Parquet row, the column, the bad value and what was expected.
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path

import polars as pl
import pytest

from disagg.inputs.config import load_site
from disagg.errors import InputError
from disagg.inputs.readers import read_meter, read_runlog

UTC = dt.timezone.utc
NS_PER_MIN = 60_000_000_000

EQUIPMENT_TOML = """
[[equipment]]
id = "CH-1"

[[equipment]]
id = "AHU-1"
control = "variable"
exponent = 2.0

[[equipment]]
id = "P-1"
"""


def _write_site(tmp_path: Path, *, meter_file: str = "meter.csv", meter_extra: str = "",
                runlog_file: str = "log.csv", runlog: str | None = None,
                timezone: str = "America/Chicago", unit: str = "kWh") -> Path:
    """Write site.toml into tmp_path; meter columns `time` and `kwh`."""
    if runlog is None:
        runlog = ('layout = "events"\ntime_column = "time"\nequipment_column = "point"\n'
                  'state_column = "state"')
    text = f"""
[site]
name = "Reader test site"
timezone = "{timezone}"

[meter]
file = "{meter_file}"
time_column = "time"
value_column = "kwh"
unit = "{unit}"
{meter_extra}

[runlog]
file = "{runlog_file}"
{runlog}
{EQUIPMENT_TOML}"""
    path = tmp_path / "site.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _csv(path: Path, header: str, rows: list[str]) -> None:
    path.write_text(header + "\n" + "\n".join(rows) + "\n", encoding="utf-8")


def _meter(tmp_path: Path, rows: list[str], header: str = "time,kwh", **site_kw):
    """Write meter.csv and the site file; return (settings of the site, meter file path)."""
    _csv(tmp_path / site_kw.get("meter_file", "meter.csv"), header, rows)
    site = load_site(_write_site(tmp_path, **site_kw))
    return site, site.meter.file


def _utc(*args) -> dt.datetime:
    return dt.datetime(*args, tzinfo=UTC)


def _message(exc_info) -> str:
    return str(exc_info.value)


# ---------------------------------------------------------------------------------------
# Meter: times


def test_meter_times_with_utc_offsets_across_the_spring_change(tmp_path):
    # Chicago springs forward at 2025-03-09 02:00 CST (-06:00) -> 03:00 CDT (-05:00);
    # with offsets in the file the readings are contiguous in UTC.
    site, _ = _meter(tmp_path, [
        "2025-03-09T01:45:00-06:00,1.0",
        "2025-03-09T03:00:00-05:00,2.0",
        "2025-03-09T03:15:00-05:00,3.0",
        "2025-03-09T03:30:00-05:00,4.0",
    ])
    m = read_meter(site.meter, site.timezone)
    assert m.interval_min == 15
    assert m.frame["end_utc"].to_list() == [_utc(2025, 3, 9, 7, 45), _utc(2025, 3, 9, 8, 0),
                                            _utc(2025, 3, 9, 8, 15), _utc(2025, 3, 9, 8, 30)]
    assert m.frame["start_utc"].to_list() == [_utc(2025, 3, 9, 7, 30), _utc(2025, 3, 9, 7, 45),
                                              _utc(2025, 3, 9, 8, 0), _utc(2025, 3, 9, 8, 15)]
    assert m.frame["energy_kwh"].to_list() == [1.0, 2.0, 3.0, 4.0]
    assert m.rows_read == 4
    assert m.duplicates_dropped == 0


def test_meter_naive_times_fall_back_hour_resolved_by_order(tmp_path):
    # 2025-11-02 in Chicago: 01:00-01:59 happens twice, first CDT (-05:00) then CST (-06:00).
    local = ["00:45", "01:00", "01:15", "01:30", "01:45",  # first pass, CDT
             "01:00", "01:15", "01:30", "01:45",           # second pass, CST
             "02:00"]
    site, _ = _meter(tmp_path, [f"2025-11-02 {t}:00,{i + 1}" for i, t in enumerate(local)])
    m = read_meter(site.meter, site.timezone)
    # Stamp "end" (the default): 00:45 CDT = 05:45 UTC, then 15-minute steps to 02:00 CST
    # = 08:00 UTC without a gap or a repeat.
    expected_end = [_utc(2025, 11, 2, 5, 45) + dt.timedelta(minutes=15 * i) for i in range(10)]
    assert m.frame["end_utc"].to_list() == expected_end
    assert m.frame["energy_kwh"].to_list() == [float(i + 1) for i in range(10)]
    assert m.duplicates_dropped == 0


def test_meter_naive_hourly_times_fall_back_hour_written_twice(tmp_path):
    # An hourly export shows the repeated hour as the same clock time twice: 01:00 CDT
    # (06:00 UTC) then 01:00 CST (07:00 UTC). Different readings are not a conflict.
    site, _ = _meter(tmp_path, ["2025-11-02 00:00:00,1", "2025-11-02 01:00:00,2",
                                "2025-11-02 01:00:00,3", "2025-11-02 02:00:00,4"])
    m = read_meter(site.meter, site.timezone)
    assert m.interval_min == 60
    assert m.frame["end_utc"].to_list() == [_utc(2025, 11, 2, 5), _utc(2025, 11, 2, 6),
                                            _utc(2025, 11, 2, 7), _utc(2025, 11, 2, 8)]
    assert m.frame["energy_kwh"].to_list() == [1.0, 2.0, 3.0, 4.0]


def test_meter_naive_times_sorted_as_text_across_the_fall_back_hour_say_why(tmp_path):
    # Sorted as text, the repeated hour's two passes interleave (01:00, 01:00, 01:15, ...):
    # the order no longer tells them apart, and the error says the hour repeats.
    local = ["00:45", "01:00", "01:00", "01:15", "01:15", "01:30", "01:30", "01:45", "01:45",
             "02:00"]
    site, path = _meter(tmp_path, [f"2025-11-02 {t}:00,{i + 1}" for i, t in enumerate(local)])
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (
        f"{path}: line 6, column 'time': time 2025-11-02 07:15:00+00:00 repeats line 5 with a "
        "different reading; expected one reading per interval; 2025-11-02 01:15 local time "
        "occurs twice on the day the clocks go back (America/Chicago): give times with their "
        "UTC offset (such as 2025-11-02T01:15:00-06:00) or in UTC")


def test_meter_naive_skipped_spring_forward_time_is_an_error_naming_the_row(tmp_path):
    site, path = _meter(tmp_path, [
        "2025-03-09 01:30:00,1.0",
        "2025-03-09 01:45:00,1.0",
        "2025-03-09 02:30:00,1.0",  # clocks jump from 02:00 to 03:00: this time never happens
        "2025-03-09 03:15:00,1.0",
    ])
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (
        f"{path}: line 4, column 'time': local time 2025-03-09 02:30:00 does not exist in "
        "America/Chicago (clocks skip it); remove the row or export times with a UTC offset")


def test_meter_naive_times_across_the_spring_change_without_the_skipped_hour(tmp_path):
    site, _ = _meter(tmp_path, ["2025-03-09 01:45:00,1.0", "2025-03-09 03:00:00,1.0",
                                "2025-03-09 03:15:00,1.0"])
    m = read_meter(site.meter, site.timezone)
    assert m.frame["end_utc"].to_list() == [_utc(2025, 3, 9, 7, 45), _utc(2025, 3, 9, 8, 0),
                                            _utc(2025, 3, 9, 8, 15)]


def test_meter_unparseable_time_names_the_line_and_the_first_rows_form(tmp_path):
    site, path = _meter(tmp_path, ["2025-01-06 00:15:00,1.0", "2025-01-06 00:30:00,1.0",
                                   "6 Jan 2025 00:45,1.0"])
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (
        f"{path}: line 4, column 'time': cannot read time '6 Jan 2025 00:45'; expected the "
        "same form as the first row ('2025-01-06 00:15:00')")


# ---------------------------------------------------------------------------------------
# Meter: date order (US exports write the month first: 10/13/2024 00:15)


def test_meter_month_first_dates_are_read_month_first_when_the_column_shows_it(tmp_path):
    # 10/13/2024: 13 cannot be a month, so the whole column is month/day/year.
    site, _ = _meter(tmp_path, ["10/12/2024 23:45,1.0", "10/13/2024 00:00,2.0",
                                "10/13/2024 00:15,3.0"])
    m = read_meter(site.meter, site.timezone)
    # 2024-10-13 00:15 CDT (-05:00) = 05:15 UTC.
    assert m.frame["end_utc"].to_list() == [_utc(2024, 10, 13, 4, 45), _utc(2024, 10, 13, 5, 0),
                                            _utc(2024, 10, 13, 5, 15)]


def test_meter_day_first_dates_are_read_day_first_when_the_column_shows_it(tmp_path):
    site, _ = _meter(tmp_path, ["12.10.2024 23:45,1.0", "13.10.2024 00:00,2.0"])
    m = read_meter(site.meter, site.timezone)
    assert m.frame["end_utc"].to_list() == [_utc(2024, 10, 13, 4, 45), _utc(2024, 10, 13, 5, 0)]


def test_meter_dates_that_fit_both_orders_are_refused_naming_the_setting(tmp_path):
    # Every day is 12 or less: 10/11/2024 is 11 October (US) or 10 November; never guess.
    site, path = _meter(tmp_path, ["10/11/2024 00:15,1.0", "10/11/2024 00:30,1.0",
                                   "10/12/2024 00:15,1.0"])
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (
        f"{path}: column 'time': dates such as '10/11/2024 00:15' can be read month first or "
        "day first (no day above 12 in the file); set [meter] date_order = \"mdy\" "
        "(10/13/2024) or \"dmy\" (13/10/2024) in the site file")


@pytest.mark.parametrize("order, expected_day", [("mdy", 11), ("dmy", 10)])
def test_meter_date_order_setting_decides_an_ambiguous_column(tmp_path, order, expected_day):
    month = 10 if order == "mdy" else 11
    site, _ = _meter(tmp_path, ["10/11/2024 00:15,1.0", "10/11/2024 00:30,1.0"],
                     meter_extra=f'date_order = "{order}"')
    m = read_meter(site.meter, site.timezone)
    # Chicago is on CDT (-05:00) on 11 October and on CST (-06:00) on 10 November.
    hours = 5 if order == "mdy" else 6
    assert m.frame["end_utc"].to_list() == [_utc(2024, month, expected_day, hours, 15),
                                            _utc(2024, month, expected_day, hours, 30)]


def test_meter_date_order_setting_refuses_a_row_in_the_other_order(tmp_path):
    site, path = _meter(tmp_path, ["13/10/2024 00:15,1.0", "13/10/2024 00:30,1.0"],
                        meter_extra='date_order = "mdy"')
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (
        f"{path}: line 2, column 'time': cannot read time '13/10/2024 00:15'; expected a "
        "month/day/year date ([meter] date_order = \"mdy\") such as '13/10/2024 00:15'")


def test_meter_dates_in_both_orders_in_one_column_are_an_error(tmp_path):
    site, path = _meter(tmp_path, ["10/13/2024 00:15,1.0", "14/10/2024 00:30,1.0"])
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (
        f"{path}: column 'time': the dates are neither all month/day/year (line 3: "
        "'14/10/2024 00:30') nor all day/month/year (line 2: '10/13/2024 00:15'); expected "
        "one date order in the column")


def test_meter_date_order_format_string_reads_twelve_hour_times(tmp_path):
    site, _ = _meter(tmp_path, ["10/11/2024 11:45 PM,1.0", "10/12/2024 12:00 AM,2.0",
                                "10/12/2024 12:15 AM,3.0"],
                     meter_extra='date_order = "%m/%d/%Y %I:%M %p"')
    m = read_meter(site.meter, site.timezone)
    assert m.frame["end_utc"].to_list() == [_utc(2024, 10, 12, 4, 45), _utc(2024, 10, 12, 5, 0),
                                            _utc(2024, 10, 12, 5, 15)]


def test_meter_year_first_times_are_unaffected_by_the_order_check(tmp_path):
    site, _ = _meter(tmp_path, ["2024-10-11 00:15:00,1.0", "2024-10-11 00:30:00,1.0"])
    m = read_meter(site.meter, site.timezone)
    assert m.frame["end_utc"].to_list() == [_utc(2024, 10, 11, 5, 15), _utc(2024, 10, 11, 5, 30)]


def test_date_order_setting_must_be_an_order_or_a_format(tmp_path):
    from disagg.errors import ConfigError
    _csv(tmp_path / "meter.csv", "time,kwh", ["2024-10-11 00:15:00,1.0"])
    path = _write_site(tmp_path, meter_extra='date_order = "month-first"')
    with pytest.raises(ConfigError) as exc:
        load_site(path)
    assert _message(exc) == (
        f"{path}: [meter] date_order = 'month-first': expected \"ymd\" (2024-10-13), \"mdy\" "
        "(10/13/2024), \"dmy\" (13/10/2024) or a format string such as \"%m/%d/%Y %H:%M\"")


def test_runlog_dates_follow_the_runlog_date_order(tmp_path):
    site, _ = _runlog(tmp_path, "time,point,state", [
        "10/11/2024 00:00,CH-1,on", "10/11/2024 00:30,CH-1,off"],
        runlog='layout = "events"\ntime_column = "time"\nequipment_column = "point"\n'
               'state_column = "state"\ndate_order = "dmy"')
    log = read_runlog(site.runlog, site)
    # 10 November 2024 00:00 CST (-06:00) = 06:00 UTC.
    assert _segments(log, "CH-1")[0][:2] == (_utc(2024, 11, 10, 6, 0), _utc(2024, 11, 10, 6, 30))


@pytest.mark.parametrize("stamp, first_start, first_end", [
    ("end", _utc(2025, 1, 6, 6, 0), _utc(2025, 1, 6, 6, 15)),
    ("start", _utc(2025, 1, 6, 6, 15), _utc(2025, 1, 6, 6, 30)),
])
def test_meter_stamp_marks_the_end_or_the_start_of_the_interval(tmp_path, stamp, first_start,
                                                                 first_end):
    # 00:15 local in January is 06:15 UTC (CST, -06:00).
    site, _ = _meter(tmp_path, ["2025-01-06 00:15:00,1.0", "2025-01-06 00:30:00,2.0",
                                "2025-01-06 00:45:00,3.0"],
                     meter_extra=f'stamp = "{stamp}"')
    m = read_meter(site.meter, site.timezone)
    assert m.frame["start_utc"][0] == first_start
    assert m.frame["end_utc"][0] == first_end
    gaps = (m.frame["end_utc"] - m.frame["start_utc"]).dt.total_minutes().to_list()
    assert gaps == [15, 15, 15]


# ---------------------------------------------------------------------------------------
# Meter: units, interval, values


@pytest.mark.parametrize("unit, reading, expected_kwh", [
    ("kWh", 2.5, 2.5),
    ("Wh", 2500.0, 2.5),
    ("kW", 10.0, 2.5),  # mean demand 10 kW over a 15-minute interval = 10 x 0.25 h
])
def test_meter_units_become_kwh(tmp_path, unit, reading, expected_kwh):
    site, _ = _meter(tmp_path, [f"2025-01-06 00:{mm}:00,{reading}" for mm in ("15", "30", "45")],
                     unit=unit)
    m = read_meter(site.meter, site.timezone)
    assert m.frame["energy_kwh"].to_list() == pytest.approx([expected_kwh] * 3, rel=1e-12)


def test_meter_kw_reading_uses_the_interval_length_in_hours(tmp_path):
    # Hourly mean demand: 10 kW for 60 minutes is 10 kWh.
    site, _ = _meter(tmp_path, [f"2025-01-06 {hh:02d}:00:00,10" for hh in range(1, 5)], unit="kW")
    m = read_meter(site.meter, site.timezone)
    assert m.interval_min == 60
    assert m.frame["energy_kwh"].to_list() == pytest.approx([10.0] * 4, rel=1e-12)


def test_meter_interval_inferred_as_the_most_common_spacing(tmp_path):
    # 15-minute data with one missing reading (a 30-minute gap) is still 15-minute data.
    times = ["00:15", "00:30", "00:45", "01:15", "01:30", "01:45"]
    site, _ = _meter(tmp_path, [f"2025-01-06 {t}:00,1.0" for t in times])
    m = read_meter(site.meter, site.timezone)
    assert m.interval_min == 15
    assert m.frame.height == 6


def test_meter_interval_not_allowed_is_an_error(tmp_path):
    rows = [(dt.datetime(2025, 1, 6) + dt.timedelta(minutes=7 * i)).isoformat() + ",1.0"
            for i in range(1, 6)]
    site, path = _meter(tmp_path, rows)
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{path}: the meter interval is 7 minutes; expected one of "
                             "1, 5, 10, 15, 30, 60 minutes")


def test_meter_interval_from_the_site_file_agreeing_with_the_data(tmp_path):
    site, _ = _meter(tmp_path, ["2025-01-06 01:00:00,1.0", "2025-01-06 01:15:00,1.0",
                                "2025-01-06 02:00:00,1.0"], meter_extra="interval_minutes = 15")
    m = read_meter(site.meter, site.timezone)
    assert m.interval_min == 15
    assert m.frame["start_utc"].to_list() == [_utc(2025, 1, 6, 6, 45), _utc(2025, 1, 6, 7, 0),
                                              _utc(2025, 1, 6, 7, 45)]


@pytest.mark.parametrize("rows, stated, apart", [
    # interval_minutes = 5 on 15-minute data made every draw about 3 times too high.
    (["2025-01-06 00:15:00,1.0", "2025-01-06 00:30:00,1.0", "2025-01-06 00:45:00,1.0"], 5, 15),
    (["2025-01-06 01:00:00,1.0", "2025-01-06 02:00:00,1.0"], 15, 60),
    (["2025-01-06 00:05:00,1.0", "2025-01-06 00:10:00,1.0", "2025-01-06 00:15:00,1.0"], 15, 5)])
def test_meter_interval_that_disagrees_with_the_data_is_an_error(tmp_path, rows, stated, apart):
    site, path = _meter(tmp_path, rows, meter_extra=f"interval_minutes = {stated}")
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert str(exc.value) == (f"{path}: the readings are {apart} minutes apart (the most common "
                              f"spacing) but the site file sets interval_minutes = {stated}; "
                              "remove interval_minutes or correct it")


def test_meter_identical_duplicate_rows_are_dropped_and_counted(tmp_path):
    site, _ = _meter(tmp_path, ["2025-01-06 00:15:00,1.0", "2025-01-06 00:30:00,2.0",
                                "2025-01-06 00:30:00,2.0", "2025-01-06 00:45:00,3.0",
                                "2025-01-06 00:15:00,1.0"])
    m = read_meter(site.meter, site.timezone)
    assert m.rows_read == 5
    assert m.duplicates_dropped == 2
    assert m.frame["energy_kwh"].to_list() == [1.0, 2.0, 3.0]
    assert m.notes == ["2 repeated meter rows with identical readings were dropped"]


def test_meter_conflicting_duplicates_are_an_error_naming_both_lines(tmp_path):
    site, path = _meter(tmp_path, ["2025-01-06 00:15:00,1.0", "2025-01-06 00:30:00,2.0",
                                   "2025-01-06 00:45:00,3.0", "2025-01-06 00:30:00,2.5"])
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    # 00:30 CST = 06:30 UTC; the message gives the time in UTC.
    assert _message(exc) == (
        f"{path}: line 5, column 'time': time 2025-01-06 06:30:00+00:00 repeats line 3 with a "
        "different reading; expected one reading per interval")


def test_meter_negative_reading_is_an_error(tmp_path):
    site, path = _meter(tmp_path, ["2025-01-06 00:15:00,1.0", "2025-01-06 00:30:00,-0.5",
                                   "2025-01-06 00:45:00,-2"])
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{path}: line 3, column 'kwh': negative reading -0.5; expected "
                             "energy of 0 or more")


def test_meter_non_numeric_reading_is_an_error(tmp_path):
    site, path = _meter(tmp_path, ["2025-01-06 00:15:00,1.0", "2025-01-06 00:30:00,1,5",
                                   "2025-01-06 00:45:00,n/a"], header="time,kwh,note")
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{path}: line 4, column 'kwh': 'n/a' is not a number; expected "
                             "energy in kWh")


def test_meter_empty_reading_is_no_reading_not_an_error(tmp_path):
    site, _ = _meter(tmp_path, ["2025-01-06 00:15:00,1.0", "2025-01-06 00:30:00,",
                                "2025-01-06 00:45:00,3.0"])
    m = read_meter(site.meter, site.timezone)
    assert m.frame["energy_kwh"].to_list() == [1.0, None, 3.0]


def test_meter_missing_column_lists_the_files_columns(tmp_path):
    site, path = _meter(tmp_path, ["2025-01-06 00:15:00,1.0"], header="time,energy")
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == f"{path}: column 'kwh' not found; the file has 'time', 'energy'"


def test_meter_missing_file_names_the_path(tmp_path):
    site = load_site(_write_site(tmp_path, meter_file="nowhere.csv"))
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{tmp_path.resolve() / 'nowhere.csv'}: no such meter file; "
                             "check the path in the site file")


def test_meter_parquet_with_a_naive_datetime_column(tmp_path):
    # Naive datetimes are local site time, as in a CSV; the fall-back hour is taken by order.
    local = [dt.datetime(2025, 11, 2, 0, 45), dt.datetime(2025, 11, 2, 1, 0),
             dt.datetime(2025, 11, 2, 1, 15), dt.datetime(2025, 11, 2, 1, 0),
             dt.datetime(2025, 11, 2, 1, 15)]
    # 1:00 first pass to 1:15 second pass is not 15-minute spacing in the file, so say it.
    pl.DataFrame({"time": local, "kwh": [1.0, 2.0, 3.0, 4.0, 5.0]}).write_parquet(
        tmp_path / "meter.parquet")
    site = load_site(_write_site(tmp_path, meter_file="meter.parquet",
                                 meter_extra="interval_minutes = 15"))
    m = read_meter(site.meter, site.timezone)
    # 00:45 CDT = 05:45 UTC; 01:00, 01:15 CDT = 06:00, 06:15; 01:00, 01:15 CST = 07:00, 07:15.
    assert m.frame["end_utc"].to_list() == [_utc(2025, 11, 2, 5, 45), _utc(2025, 11, 2, 6, 0),
                                            _utc(2025, 11, 2, 6, 15), _utc(2025, 11, 2, 7, 0),
                                            _utc(2025, 11, 2, 7, 15)]
    assert m.frame["energy_kwh"].to_list() == [1.0, 2.0, 3.0, 4.0, 5.0]


def test_meter_parquet_with_a_utc_datetime_column_and_row_numbers_in_messages(tmp_path):
    ends = [_utc(2025, 1, 6, 6, 15) + dt.timedelta(minutes=15 * i) for i in range(4)]
    pl.DataFrame({"time": ends, "kwh": [1.0, 2.0, -3.0, 4.0]},
                 schema={"time": pl.Datetime("ms", "UTC"), "kwh": pl.Float64}).write_parquet(
        tmp_path / "meter.parquet")
    site = load_site(_write_site(tmp_path, meter_file="meter.parquet"))
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{site.meter.file}: row 3, column 'kwh': negative reading -3; "
                             "expected energy of 0 or more")
    pl.DataFrame({"time": ends, "kwh": [1.0, 2.0, 3.0, 4.0]},
                 schema={"time": pl.Datetime("ms", "UTC"), "kwh": pl.Float64}).write_parquet(
        tmp_path / "meter.parquet")
    m = read_meter(site.meter, site.timezone)
    assert m.frame["end_utc"].to_list() == ends
    assert m.frame["start_utc"][0] == _utc(2025, 1, 6, 6, 0)


def test_meter_unknown_extension_is_an_error(tmp_path):
    (tmp_path / "meter.xlsx").write_text("not a table", encoding="utf-8")
    site = load_site(_write_site(tmp_path, meter_file="meter.xlsx"))
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{site.meter.file}: unknown file type '.xlsx'; expected .csv or "
                             ".parquet")


# ---------------------------------------------------------------------------------------
# Run log: events


def _runlog(tmp_path: Path, header: str, rows: list[str], runlog: str | None = None,
            runlog_file: str = "log.csv"):
    """Write a run log and a site file (with a one-row meter); return (site, log path)."""
    _csv(tmp_path / "meter.csv", "time,kwh", ["2025-01-06 00:15:00,1.0"])
    _csv(tmp_path / runlog_file, header, rows)
    site = load_site(_write_site(tmp_path, runlog=runlog, runlog_file=runlog_file))
    return site, site.runlog.file


def _segments(log, eq: str) -> list[tuple[dt.datetime, dt.datetime, float]]:
    seg = log.segments[eq]
    to_dt = lambda ns: dt.datetime.fromtimestamp(int(ns) // 1_000_000_000, UTC)  # noqa: E731
    return [(to_dt(a), to_dt(b), float(v)) for a, b, v in zip(seg.start_ns, seg.end_ns, seg.value)]


def test_events_state_words_numbers_and_fractions(tmp_path):
    # Local times in January are UTC-6. Each state holds until the next event of the same
    # equipment; the last state holds until the log's last time (02:00 local = 08:00 UTC).
    site, _ = _runlog(tmp_path, "time,point,state", [
        "2025-01-06 00:00:00,CH-1,on",
        "2025-01-06 00:00:00,AHU-1,0.5",
        "2025-01-06 00:00:00,P-1,TRUE",
        "2025-01-06 00:30:00,CH-1,Off",
        "2025-01-06 00:45:00,AHU-1,1",
        "2025-01-06 01:00:00,P-1,false",
        "2025-01-06 01:00:00,CH-1,1",
        "2025-01-06 01:10:00,AHU-1,0",
        "2025-01-06 01:20:00,AHU-1,0.25",
        "2025-01-06 02:00:00,CH-1,0",
    ])
    log = read_runlog(site.runlog, site)
    assert log.rows_read == 10
    assert log.notes == []
    t = lambda h, m: _utc(2025, 1, 6, h, m)  # noqa: E731
    assert _segments(log, "CH-1") == [(t(6, 0), t(6, 30), 1.0), (t(6, 30), t(7, 0), 0.0),
                                      (t(7, 0), t(8, 0), 1.0)]
    assert _segments(log, "AHU-1") == [(t(6, 0), t(6, 45), 0.5), (t(6, 45), t(7, 10), 1.0),
                                       (t(7, 10), t(7, 20), 0.0), (t(7, 20), t(8, 0), 0.25)]
    assert _segments(log, "P-1") == [(t(6, 0), t(7, 0), 1.0), (t(7, 0), t(8, 0), 0.0)]


def test_events_equipment_without_events_is_unknown_and_noted(tmp_path):
    site, _ = _runlog(tmp_path, "time,point,state", ["2025-01-06 00:00:00,CH-1,on",
                                                     "2025-01-06 01:00:00,CH-1,off"])
    log = read_runlog(site.runlog, site)
    assert len(log.segments["AHU-1"].start_ns) == 0
    assert len(log.segments["P-1"].start_ns) == 0
    assert log.notes == ["no run-log events for AHU-1, P-1: left out as unknown"]


@pytest.mark.parametrize("state", ["maybe", "1.5", "-0.1", "yes"])
def test_events_state_that_is_not_a_state_is_an_error(tmp_path, state):
    site, path = _runlog(tmp_path, "time,point,state", [
        "2025-01-06 00:00:00,CH-1,on", f"2025-01-06 00:15:00,P-1,{state}"])
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == (f"{path}: line 3, column 'state': state {state!r}; expected "
                             "on/off, 1/0, true/false or a number from 0 to 1")


def test_events_unknown_equipment_id_names_the_id_and_the_configured_ids(tmp_path):
    site, path = _runlog(tmp_path, "time,point,state", [
        "2025-01-06 00:00:00,CH-1,on", "2025-01-06 00:05:00,CH-2,on"])
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == (f"{path}: line 3, column 'point': unknown equipment id 'CH-2'; "
                             "did you mean 'CH-1'? expected one of the site file's ids "
                             "(CH-1, AHU-1, P-1)")


def test_events_two_states_for_one_equipment_at_one_time_is_an_error(tmp_path):
    site, path = _runlog(tmp_path, "time,point,state", [
        "2025-01-06 00:00:00,P-1,on",
        "2025-01-06 00:10:00,CH-1,on",
        "2025-01-06 00:10:00,P-1,off",
        "2025-01-06 00:10:00,CH-1,off",
    ])
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == (f"{path}: line 3: equipment 'CH-1' has different states at the "
                             "same time 2025-01-06 06:10:00+00:00; expected one state")


def test_events_same_state_twice_at_one_time_is_one_event(tmp_path):
    site, _ = _runlog(tmp_path, "time,point,state", [
        "2025-01-06 00:00:00,CH-1,on", "2025-01-06 00:00:00,CH-1,1",
        "2025-01-06 00:20:00,CH-1,off"])
    log = read_runlog(site.runlog, site)
    assert _segments(log, "CH-1") == [(_utc(2025, 1, 6, 6, 0), _utc(2025, 1, 6, 6, 20), 1.0)]


def test_events_missing_column_lists_the_files_columns(tmp_path):
    site, path = _runlog(tmp_path, "time,point,value", ["2025-01-06 00:00:00,CH-1,on"])
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == f"{path}: column 'state' not found; the file has 'time', 'point', 'value'"


def test_events_fall_back_hour_resolved_by_order_per_equipment(tmp_path):
    # Interleaved equipment: each one's times step back into the repeated hour on its own.
    site, _ = _runlog(tmp_path, "time,point,state", [
        "2025-11-02 01:10:00,CH-1,on",    # CDT -> 06:10 UTC
        "2025-11-02 01:40:00,P-1,on",     # CDT -> 06:40 UTC
        "2025-11-02 01:20:00,CH-1,off",   # CDT -> 06:20 UTC (later than CH-1's last: first pass)
        "2025-11-02 01:05:00,P-1,off",    # steps back: CST -> 07:05 UTC
        "2025-11-02 01:05:00,CH-1,on",    # steps back: CST -> 07:05 UTC
        "2025-11-02 01:30:00,CH-1,off",   # second pass continues: CST -> 07:30 UTC
    ])
    log = read_runlog(site.runlog, site)
    t = lambda h, m: _utc(2025, 11, 2, h, m)  # noqa: E731
    assert _segments(log, "CH-1") == [(t(6, 10), t(6, 20), 1.0), (t(6, 20), t(7, 5), 0.0),
                                      (t(7, 5), t(7, 30), 1.0)]
    assert _segments(log, "P-1") == [(t(6, 40), t(7, 5), 1.0), (t(7, 5), t(7, 30), 0.0)]


def test_events_parquet_with_boolean_states(tmp_path):
    _csv(tmp_path / "meter.csv", "time,kwh", ["2025-01-06 00:15:00,1.0"])
    pl.DataFrame({
        "time": [dt.datetime(2025, 1, 6, 0, 0), dt.datetime(2025, 1, 6, 0, 30)],
        "point": ["P-1", "P-1"],
        "state": [True, False],
    }).write_parquet(tmp_path / "log.parquet")
    site = load_site(_write_site(tmp_path, runlog_file="log.parquet"))
    log = read_runlog(site.runlog, site)
    # The last event (off at 00:30) is the log's last time: it closes the on segment only.
    assert _segments(log, "P-1") == [(_utc(2025, 1, 6, 6, 0), _utc(2025, 1, 6, 6, 30), 1.0)]


# ---------------------------------------------------------------------------------------
# Run log: samples

SAMPLES = 'layout = "samples"\ntime_column = "time"\nmax_hold_minutes = 20'


def test_samples_hold_until_the_next_sample_but_no_longer_than_max_hold(tmp_path):
    # Samples every 10 minutes, then a 40-minute silence: the 00:20 sample holds 20 minutes
    # (max_hold_minutes) and 00:40-01:00 is unknown, not off. An empty cell is unknown.
    site, _ = _runlog(tmp_path, "time,CH-1,AHU-1,P-1", [
        "2025-01-06 00:00:00,on,0.5,1",
        "2025-01-06 00:10:00,off,,1",
        "2025-01-06 00:20:00,on,0.75,0",
        "2025-01-06 01:00:00,off,1,0",
    ], runlog=SAMPLES)
    log = read_runlog(site.runlog, site)
    t = lambda h, m: _utc(2025, 1, 6, h, m)  # noqa: E731
    ch = _segments(log, "CH-1")
    assert ch[:3] == [(t(6, 0), t(6, 10), 1.0), (t(6, 10), t(6, 20), 0.0),
                      (t(6, 20), t(6, 40), 1.0)]
    assert ch[3][:1] == (t(7, 0),) and ch[3][2] == 0.0
    ahu = _segments(log, "AHU-1")
    # 00:10 is empty: the 00:00 sample holds only until that (unknown) sample.
    assert ahu[:2] == [(t(6, 0), t(6, 10), 0.5), (t(6, 20), t(6, 40), 0.75)]
    assert ahu[2][0] == t(7, 0) and ahu[2][2] == 1.0
    covered_to_6_40 = [s for s in _segments(log, "P-1") if s[0] < t(6, 40)]
    assert covered_to_6_40 == [(t(6, 0), t(6, 10), 1.0), (t(6, 10), t(6, 20), 1.0),
                               (t(6, 20), t(6, 40), 0.0)]
    # The 40-minute silence is a finding for every column (tests/test_runlog_validation.py
    # checks its wording).
    assert [n.split(": ")[1] for n in log.notes] == ["equipment 'CH-1'", "equipment 'AHU-1'",
                                                     "equipment 'P-1'"]


def test_samples_column_that_is_not_an_equipment_id_is_an_error(tmp_path):
    site, path = _runlog(tmp_path, "time,CH-1,CH-9", ["2025-01-06 00:00:00,on,off"],
                         runlog=SAMPLES)
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == (f"{path}: column 'CH-9' is not a configured equipment id; "
                             "did you mean 'CH-1'? expected the time column and columns named "
                             "CH-1, AHU-1, P-1")


def test_samples_missing_equipment_column_is_unknown_and_noted(tmp_path):
    site, _ = _runlog(tmp_path, "time,CH-1", ["2025-01-06 00:00:00,on",
                                             "2025-01-06 00:10:00,off"], runlog=SAMPLES)
    log = read_runlog(site.runlog, site)
    assert log.notes == ["no run-log column for AHU-1, P-1: left out as unknown"]
    assert len(log.segments["P-1"].start_ns) == 0


def test_samples_bad_state_names_the_line_and_column(tmp_path):
    site, path = _runlog(tmp_path, "time,CH-1,P-1", ["2025-01-06 00:00:00,on,off",
                                                    "2025-01-06 00:10:00,on,auto"],
                         runlog=SAMPLES)
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == (f"{path}: line 3, column 'P-1': state 'auto'; expected on/off, "
                             "1/0, true/false or a number from 0 to 1")


# ---------------------------------------------------------------------------------------
# Run log: runtime

RUNTIME = 'layout = "runtime"\ntime_column = "time"\nequipment_column = "point"\n' \
          'minutes_column = "run_min"'


def test_runtime_minutes_are_spread_evenly_over_the_interval(tmp_path):
    # Stamp "start" (the default for run logs): 00:00 covers 00:00-00:15 local.
    site, _ = _runlog(tmp_path, "time,point,run_min", [
        "2025-01-06 00:00:00,CH-1,15",
        "2025-01-06 00:15:00,CH-1,6",
        "2025-01-06 00:30:00,CH-1,0",
        "2025-01-06 00:00:00,P-1,7.5",
    ], runlog=RUNTIME)
    log = read_runlog(site.runlog, site)
    t = lambda h, m: _utc(2025, 1, 6, h, m)  # noqa: E731
    assert _segments(log, "CH-1") == [(t(6, 0), t(6, 15), 1.0), (t(6, 15), t(6, 30), 0.4),
                                      (t(6, 30), t(6, 45), 0.0)]
    assert _segments(log, "P-1") == [(t(6, 0), t(6, 15), 0.5)]


def test_runtime_stamp_end_marks_the_end_of_the_log_interval(tmp_path):
    site, _ = _runlog(tmp_path, "time,point,run_min", [
        "2025-01-06 00:15:00,CH-1,3", "2025-01-06 00:30:00,CH-1,12"],
        runlog=RUNTIME + '\nstamp = "end"')
    log = read_runlog(site.runlog, site)
    t = lambda h, m: _utc(2025, 1, 6, h, m)  # noqa: E731
    assert _segments(log, "CH-1") == [(t(6, 0), t(6, 15), 0.2), (t(6, 15), t(6, 30), 0.8)]


def test_runtime_minutes_above_the_interval_length_is_an_error(tmp_path):
    site, path = _runlog(tmp_path, "time,point,run_min", [
        "2025-01-06 00:00:00,CH-1,15",
        "2025-01-06 00:15:00,CH-1,16",
        "2025-01-06 00:30:00,CH-1,3",
    ], runlog=RUNTIME)
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == (f"{path}: line 3, column 'run_min': 16 run minutes; expected 0 to "
                             "15 per interval")


def test_runtime_negative_minutes_after_an_empty_cell_names_the_right_line(tmp_path):
    site, path = _runlog(tmp_path, "time,point,run_min", [
        "2025-01-06 00:00:00,CH-1,",
        "2025-01-06 00:15:00,CH-1,5",
        "2025-01-06 00:30:00,CH-1,-1",
    ], runlog=RUNTIME)
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == (f"{path}: line 4, column 'run_min': -1 run minutes; expected 0 to "
                             "15 per interval")


def test_runtime_unknown_equipment_id_is_an_error(tmp_path):
    site, path = _runlog(tmp_path, "time,point,run_min", ["2025-01-06 00:00:00,FAN-7,5"],
                         runlog=RUNTIME)
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    assert _message(exc) == (f"{path}: line 2, column 'point': unknown equipment id 'FAN-7'; "
                             "expected one of the site file's ids (CH-1, AHU-1, P-1)")


def test_messages_start_with_the_resolved_file_path(tmp_path):
    # The site file names the meter relative to itself; the message names the real file.
    sub = tmp_path / "data"
    sub.mkdir()
    _csv(sub / "m.csv", "time,kwh", ["2025-01-06 00:15:00,x"])
    site = load_site(_write_site(tmp_path, meter_file="data/m.csv"))
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    msg = _message(exc)
    assert msg.startswith(str((sub / "m.csv").resolve()) + ": line 2, column 'kwh': ")
    assert re.search(r"'x' is not a number; expected energy in kWh$", msg)
    assert "\n" not in msg  # one line


def test_a_null_in_a_typed_parquet_time_column_is_an_error(tmp_path):
    # Found by the property tests: this used to reach the fit and fail there (exit 2).
    import datetime as _dt

    import polars as _pl

    from disagg.inputs.config import MeterSettings
    from disagg.inputs.readers import read_meter as _read_meter

    path = tmp_path / "meter.parquet"
    t0 = _dt.datetime(2025, 1, 6, 0, 15)
    _pl.DataFrame({"t": [t0, None, t0 + _dt.timedelta(minutes=30)], "kwh": [1.0, 2.0, 3.0]}
                  ).write_parquet(path)
    with pytest.raises(InputError) as exc:
        _read_meter(MeterSettings(path, "t", "kwh", "kWh", "end", None), "America/Chicago")
    assert str(exc.value) == (f"{path}: row 2, column 't': empty time; expected a date and time "
                              "such as 2025-03-09T03:15:00")


# ---------------------------------------------------------------------------------------
# Text encoding and empty files


def test_a_latin1_meter_file_is_named_with_its_line_and_byte(tmp_path):
    # "Zähler" written as Latin-1 (ISO/IEC 8859-1: ä is the single byte 0xE4, which no
    # UTF-8 text holds on its own; RFC 3629 section 3).
    site, path = _meter(tmp_path, ["2025-01-06 00:15:00,1.0"])
    utf8 = "time,kwh\n2025-01-06 00:15:00,1.0\n2025-01-06 00:30:00,2.0\n"
    path.write_bytes(utf8.encode() + "Zähler,4\n".encode("latin-1"))
    with pytest.raises(InputError) as e:
        read_meter(site.meter, site.timezone)
    assert _message(e) == (f"{path}: line 4: byte 0xE4 is not UTF-8 text; expected a UTF-8 "
                           "meter file (it may be Latin-1 or Windows-1252): export or save it "
                           "as UTF-8")


def test_a_utf16_meter_file_is_named_as_utf16(tmp_path):
    # Python's "utf-16" codec writes the byte order mark FF FE first (little-endian here);
    # the Unicode Standard (sec. 23.8) defines that mark.
    site, path = _meter(tmp_path, ["2025-01-06 00:15:00,1.0"])
    path.write_bytes("time,kwh\n2025-01-06 00:15:00,1.0\n".encode("utf-16"))
    with pytest.raises(InputError) as e:
        read_meter(site.meter, site.timezone)
    assert _message(e) == (f"{path}: line 1: byte 0xFF is not UTF-8 text; expected a UTF-8 "
                           "meter file (it is UTF-16 text): export or save it as UTF-8")


def test_a_latin1_header_is_blamed_on_the_encoding_not_a_missing_column(tmp_path):
    site, path = _meter(tmp_path, ["2025-01-06 00:15:00,1.0"], header="time,kwh")
    path.write_bytes("time,kwh,Zähler\n2025-01-06 00:15:00,1.0,x\n".encode("latin-1"))
    text = site.path.read_text(encoding="utf-8").replace('value_column = "kwh"',
                                                        'value_column = "Zähler"')
    site.path.write_text(text, encoding="utf-8")
    site = load_site(site.path)
    with pytest.raises(InputError) as e:
        read_meter(site.meter, site.timezone)
    assert _message(e).startswith(f"{path}: line 1: byte 0xE4 is not UTF-8 text")


def test_first_non_utf8_carries_a_character_split_between_chunks(tmp_path):
    from disagg.inputs.readers.tables import first_non_utf8

    path = tmp_path / "t.csv"
    path.write_bytes("a\nbä\n".encode())  # ä: two bytes in UTF-8, 0xC3 0xA4
    for chunk in (1, 2, 3, 4, 64):
        assert first_non_utf8(path, chunk) is None
    path.write_bytes("a\nb\n".encode() + b"\xc3")  # a character cut off at the end
    assert first_non_utf8(path, 2) == (3, 0xC3)


def test_a_meter_file_with_only_its_header_says_so(tmp_path):
    site, path = _meter(tmp_path, [])
    path.write_text("time,kwh\n", encoding="utf-8")
    with pytest.raises(InputError) as e:
        read_meter(site.meter, site.timezone)
    assert _message(e) == (f"{path}: no readings: the file has its header line but no data "
                           "rows; expected one reading per line below the header")
