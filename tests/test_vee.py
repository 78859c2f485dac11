"""Tests for disagg.inputs.vee: meter-data validation (VEE), one small file per finding.

Every meter file here is invented and has exactly the problem under test; it is written into
tmp_path next to a site TOML read with disagg.inputs.config.load_site, as in tests/test_readers.py.
Each finding's message is checked in full. Times in messages are local (America/Chicago: CST
is UTC-06:00 in January) and show the file's stamp, the interval's end by default.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from disagg.inputs.config import load_site
from disagg.errors import ConfigError, InputError
from disagg.present.terminal import check_summary
from disagg.analyses.pipeline import breakdown_site, check_site, load_inputs
from disagg.inputs.readers import read_meter
from disagg.inputs.vee import (
    ESTIMATE_MAX_GAP,
    MAD_CONSISTENCY,
    SPIKE_MADS,
    ZERO_RUN_MIN,
    estimate_short_gaps,
    monthly_totals,
)

T0 = dt.datetime(2025, 1, 6)  # a Monday in CST (UTC-06:00)
STEP = dt.timedelta(minutes=15)


def _site(tmp_path: Path, rows: list[str], *, unit: str = "kWh", meter_extra: str = "",
          header: str = "time,kwh") -> Path:
    """Write meter.csv, an events run log covering the meter's period, and site.toml."""
    (tmp_path / "meter.csv").write_text(header + "\n" + "\n".join(rows) + "\n", encoding="utf-8")
    times = sorted(r.split(",")[0] for r in rows)
    first = dt.datetime.fromisoformat(times[0]) - dt.timedelta(hours=2)
    last = dt.datetime.fromisoformat(times[-1]) + dt.timedelta(hours=2)
    log = ["time,point,state"]
    t = first
    on = True
    while t <= last:  # CH-1 alternates on and off every 45 minutes, so it can be fitted
        log.append(f"{t.isoformat(sep=' ')},CH-1,{'on' if on else 'off'}")
        t += dt.timedelta(minutes=45)
        on = not on
    (tmp_path / "log.csv").write_text("\n".join(log) + "\n", encoding="utf-8")
    text = f"""
[site]
name = "VEE test site"
timezone = "America/Chicago"

[meter]
file = "meter.csv"
time_column = "time"
value_column = "kwh"
unit = "{unit}"
{meter_extra}

[runlog]
file = "log.csv"
layout = "events"
time_column = "time"
equipment_column = "point"
state_column = "state"

[[equipment]]
id = "CH-1"
"""
    path = tmp_path / "site.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _rows(n: int, value=lambda i: 1.0, skip: set[int] = frozenset(), start=T0) -> list[str]:
    """n readings every 15 minutes ending at start + 15 min, ..., leaving out indexes in skip."""
    return [f"{(start + STEP * (i + 1)).isoformat(sep=' ')},{value(i)}"
            for i in range(n) if i not in skip]


def _read(tmp_path: Path, rows: list[str], on_duplicate: str = "error", **kw):
    site = load_site(_site(tmp_path, rows, **kw))
    return read_meter(site.meter, site.timezone, on_duplicate=on_duplicate)


def _messages(meter) -> list[str]:
    return [f.message for f in meter.findings]


def test_clean_file_has_no_findings(tmp_path):
    m = _read(tmp_path, _rows(12))
    assert m.findings == []


# ---------------------------------------------------------------------------------------
# Gaps


def test_gaps_are_listed_with_their_first_missing_time_and_left_out(tmp_path):
    # Readings ending 01:00 and 01:15 (indexes 3, 4) and 02:15 (index 8) are missing.
    m = _read(tmp_path, _rows(12, skip={3, 4, 8}))
    assert _messages(m) == [
        "meter gaps: 3 readings missing between the first and last reading, in 2 gaps "
        "(2 from 2025-01-06T01:00:00-06:00, 1 from 2025-01-06T02:15:00-06:00); policy: left "
        "out of the fit, not filled"]
    f = m.findings[0]
    assert (f.kind, f.count) == ("gap", 3)
    assert f.times == ("2025-01-06T01:00:00-06:00", "2025-01-06T02:15:00-06:00")
    assert m.frame.height == 9  # nothing filled in


def test_gaps_lists_three_and_counts_the_rest(tmp_path):
    m = _read(tmp_path, _rows(20, skip={2, 5, 8, 11, 14}))
    assert _messages(m) == [
        "meter gaps: 5 readings missing between the first and last reading, in 5 gaps "
        "(1 from 2025-01-06T00:45:00-06:00, 1 from 2025-01-06T01:30:00-06:00, "
        "1 from 2025-01-06T02:15:00-06:00 and 2 more); policy: left out of the fit, not filled"]


# ---------------------------------------------------------------------------------------
# Duplicates


def test_identical_duplicates_are_dropped_and_reported_once(tmp_path):
    site = _site(tmp_path, _rows(4) + _rows(2))  # readings ending 00:15 and 00:30 twice
    m = read_meter(load_site(site).meter, "America/Chicago")
    assert _messages(m) == [
        "meter duplicates: 2 times appear more than once with identical readings "
        "(2025-01-06T00:15:00-06:00, 2025-01-06T00:30:00-06:00); policy: one row of each "
        "kept, 2 rows dropped"]
    assert m.duplicates_dropped == 2 and m.frame.height == 4
    # The pipeline prints the finding instead of the reader's older note, not both.
    _, aligned = load_inputs(site)
    assert aligned.notes.count(m.findings[0].message) == 1
    assert "2 repeated meter rows with identical readings were dropped" not in aligned.notes


def _conflicting_rows() -> list[str]:
    # The reading ending 00:30 appears three times: 2.0, 2.5, then 3.0.
    return _rows(4, value=lambda i: float(i + 1)) + [
        "2025-01-06 00:30:00,2.5", "2025-01-06 00:30:00,3.0"]


def test_conflicting_duplicates_are_an_error_by_default(tmp_path):
    with pytest.raises(InputError) as exc:
        _read(tmp_path, _conflicting_rows())
    path = (tmp_path / "meter.csv").resolve()
    assert str(exc.value) == (
        f"{path}: line 6, column 'time': time 2025-01-06 06:30:00+00:00 repeats line 3 with a "
        "different reading; expected one reading per interval")


@pytest.mark.parametrize("policy, kept", [("keep-first", 2.0), ("keep-last", 3.0)])
def test_conflicting_duplicates_keep_first_or_last(tmp_path, policy, kept):
    m = _read(tmp_path, _conflicting_rows(), on_duplicate=policy)
    which = policy.split("-")[1]
    assert _messages(m) == [
        "meter duplicates: 1 time appears more than once with different readings "
        f"(2025-01-06T00:30:00-06:00); policy: the {which} row of each kept (on_duplicate = "
        f"{policy}), 2 rows dropped"]
    assert m.frame["energy_kwh"].to_list() == [1.0, kept, 3.0, 4.0]
    assert m.duplicates_dropped == 2


def test_on_duplicate_must_be_a_known_policy(tmp_path):
    with pytest.raises(ConfigError) as exc:
        _read(tmp_path, _rows(4), on_duplicate="keep-middle")
    assert str(exc.value) == ("--on-duplicate 'keep-middle': expected one of error, keep-first, "
                              "keep-last")


# ---------------------------------------------------------------------------------------
# Spikes


# Reading 144 ends 2025-01-07 12:15 local (145 x 15 min after T0).
SPIKE_INDEX = 144


def _spike_rows() -> list[str]:
    """Three days: 8 kWh per reading from 00:15 to 12:00, 12 kWh from 12:15 to 24:00, and one
    reading of 100 kWh instead of 12 ending 2025-01-07 12:15."""
    def value(i: int) -> float:
        if i == SPIKE_INDEX:
            return 100.0
        return 8.0 if (i % 96) < 48 else 12.0
    return _rows(288, value)


def test_spike_is_listed_with_its_value_and_the_rule(tmp_path):
    m = _read(tmp_path, _spike_rows())
    # 144 readings of 8 and 143 of 12 besides the spike: median 10, MAD 2, 99th percentile 12.
    # Limit = max(10 + 6 x 1.4826 x 2, 2 x 12) = 27.7912 kWh.
    assert 10 + SPIKE_MADS * MAD_CONSISTENCY * 2 == pytest.approx(27.7912, abs=1e-9)
    assert _messages(m) == [
        "meter spikes: 1 reading above 27.7912 kWh (the larger of the median + 6 scaled MADs "
        "and 2 x the 99th percentile), 100 kWh at 2025-01-07T12:15:00-06:00; policy: left out "
        "of the fit"]
    f = m.findings[0]
    assert (f.kind, f.count, f.times) == ("spike", 1, ("2025-01-07T12:15:00-06:00",))
    assert m.frame["energy_kwh"][SPIKE_INDEX] is None
    assert m.frame["energy_kwh"].null_count() == 1


def test_spike_of_a_kw_meter_is_stated_in_kw(tmp_path):
    # The same readings as mean demand [kW] on 15-minute intervals: the limit and the reading
    # are stated in kW as the file gives them (27.7912 kWh per 15 min = 111.165 kW is the same
    # rule on 4 x the values).
    rows = [f"{r.split(',')[0]},{float(r.split(',')[1]) * 4:g}" for r in _spike_rows()]
    m = _read(tmp_path, rows, unit="kW")
    assert _messages(m) == [
        "meter spikes: 1 reading above 111.165 kW (the larger of the median + 6 scaled MADs "
        "and 2 x the 99th percentile), 400 kW at 2025-01-07T12:15:00-06:00; policy: left out "
        "of the fit"]


def test_spike_is_left_out_of_the_fit_and_counted(tmp_path):
    site_path = _site(tmp_path, _spike_rows())
    _, aligned = load_inputs(site_path)
    start = aligned.frame["start_utc"].to_list().index(
        dt.datetime(2025, 1, 7, 18, 0, tzinfo=dt.UTC))  # 12:00 CST
    assert not aligned.use[start]
    assert aligned.use.sum() == aligned.frame.height - 1
    assert aligned.counts["spikes"] == 1
    assert aligned.counts["no_reading"] == 1  # its energy is null: no usable reading
    assert aligned.notes[0].startswith("meter spikes: 1 reading above 27.7912 kWh")


def test_a_tall_peak_that_recurs_is_not_a_spike(tmp_path):
    # A load that reaches 40 kWh for half an hour every afternoon (6 of 288 readings, 2 %) is
    # the building's, not a meter fault: the 99th percentile is 40 and the limit 80.
    m = _read(tmp_path, _rows(288, lambda i: 40.0 if i % 96 in (60, 61) else (
        8.0 if (i % 96) < 48 else 12.0)))
    assert m.findings == []


def test_too_few_readings_are_not_checked_for_spikes(tmp_path):
    m = _read(tmp_path, _rows(99, lambda i: 1000.0 if i == 50 else 1.0))
    assert m.findings == []


# ---------------------------------------------------------------------------------------
# Long zero runs


def test_a_long_zero_run_is_kept_and_flagged(tmp_path):
    m = _read(tmp_path, _rows(20, lambda i: 0 if 5 <= i < 15 else 1.0))
    assert _messages(m) == [
        "meter zero runs: 10 zero readings in 1 run of 120 minutes or longer "
        "(10 from 2025-01-06T01:30:00-06:00); policy: kept in the fit but flagged (possible "
        "outage or meter fault)"]
    assert m.frame["energy_kwh"].to_list().count(0.0) == 10  # kept


def test_a_zero_run_just_short_of_two_hours_is_not_flagged(tmp_path):
    need = ZERO_RUN_MIN // 15  # 8 readings of 15 minutes
    m = _read(tmp_path, _rows(20, lambda i: 0 if 5 <= i < 5 + need - 1 else 1.0))
    assert m.findings == []
    m = _read(tmp_path, _rows(20, lambda i: 0 if 5 <= i < 5 + need else 1.0))
    assert [(f.kind, f.count) for f in m.findings] == [("zero-run", need)]


def test_a_gap_splits_a_zero_run(tmp_path):
    # 5 zeros, one missing reading, 5 zeros: two runs of 75 minutes, neither flagged.
    m = _read(tmp_path, _rows(20, lambda i: 0 if 5 <= i < 16 else 1.0, skip={10}))
    assert [f.kind for f in m.findings] == ["gap"]


# ---------------------------------------------------------------------------------------
# Negative readings


def test_negative_reading_is_an_error_naming_the_line(tmp_path):
    with pytest.raises(InputError) as exc:
        _read(tmp_path, _rows(4, lambda i: -0.5 if i == 2 else 1.0))
    path = (tmp_path / "meter.csv").resolve()
    assert str(exc.value) == (f"{path}: line 4, column 'kwh': negative reading -0.5; expected "
                              "energy of 0 or more")


# ---------------------------------------------------------------------------------------
# Interval length changes


def test_a_run_of_five_minute_readings_in_a_fifteen_minute_file_is_left_out(tmp_path):
    # 15-minute readings to 03:00, then 5-minute readings 03:05..03:30, then 15-minute again.
    times = [T0 + STEP * (i + 1) for i in range(12)]
    times += [times[-1] + dt.timedelta(minutes=5 * k) for k in range(1, 7)]
    times += [times[-1] + STEP * k for k in range(1, 5)]
    m = _read(tmp_path, [f"{t.isoformat(sep=' ')},1.0" for t in times])
    assert m.interval_min == 15
    assert _messages(m) == [
        "meter interval changes: 6 readings off the 15-minute grid or less than 15 minutes "
        "after the previous reading (2025-01-06T03:05:00-06:00, 2025-01-06T03:10:00-06:00, "
        "2025-01-06T03:15:00-06:00 and 3 more); policy: left out of the fit, not resampled "
        "(such a reading covers another length of time)",
        "meter gaps: 2 readings missing between the first and last reading, in 1 gap "
        "(2 from 2025-01-06T03:15:00-06:00); policy: left out of the fit, not filled"]
    ends = m.frame["end_utc"].dt.convert_time_zone("America/Chicago").dt.strftime("%H:%M")
    assert "03:05" not in ends.to_list() and "03:15" not in ends.to_list()
    assert (m.frame["end_utc"] - m.frame["start_utc"]).dt.total_minutes().unique().to_list() == [15]
    assert m.frame["start_utc"].is_sorted() and m.frame["start_utc"].diff().min() == STEP


def test_a_reading_off_the_grid_with_stamp_start(tmp_path):
    # Starts 00:00..02:45 on the quarter hours, one at 01:07 instead of 01:00.
    times = [T0 + STEP * i for i in range(12)]
    times[4] = T0 + dt.timedelta(minutes=67)
    m = _read(tmp_path, [f"{t.isoformat(sep=' ')},1.0" for t in times],
              meter_extra='stamp = "start"')
    assert _messages(m) == [
        "meter interval changes: 1 reading off the 15-minute grid or less than 15 minutes "
        "before the next reading (2025-01-06T01:07:00-06:00); policy: left out of the fit, "
        "not resampled (such a reading covers another length of time)",
        "meter gaps: 1 reading missing between the first and last reading, in 1 gap "
        "(1 from 2025-01-06T01:00:00-06:00); policy: left out of the fit, not filled"]


# ---------------------------------------------------------------------------------------
# Daylight saving in naive local times


def test_repeated_hour_when_clocks_go_back_is_reported(tmp_path):
    local = ["00:45", "01:00", "01:15", "01:30", "01:45",  # first pass, CDT
             "01:00", "01:15", "01:30", "01:45",           # second pass, CST
             "02:00"]
    m = _read(tmp_path, [f"2025-11-02 {t}:00,1" for t in local])
    assert _messages(m) == [
        "meter DST repeated hour: on 2025-11-02 clocks in America/Chicago go back from 02:00 "
        "to 01:00, so local times 01:00-02:00 happen twice; by their order in the file 4 "
        "readings there were placed in the first pass (UTC-05:00) and 4 in the second "
        "(UTC-06:00), 4 expected in each; policy: kept, stored in UTC"]
    assert m.findings[0].times == ("2025-11-02T01:00:00-06:00",)
    assert m.frame.height == 10


def test_repeated_hour_written_once_shows_the_missing_pass(tmp_path):
    # The export kept one pass of the repeated hour: the second pass is absent (a gap).
    local = ["00:45", "01:00", "01:15", "01:30", "01:45", "02:00", "02:15"]
    m = _read(tmp_path, [f"2025-11-02 {t}:00,1" for t in local])
    assert [f.kind for f in m.findings] == ["dst-repeated", "gap"]
    assert "4 readings there were placed in the first pass (UTC-05:00) and 0 in the second" \
        in m.findings[0].message


def test_skipped_hour_when_clocks_go_forward_is_reported(tmp_path):
    m = _read(tmp_path, ["2025-03-09 01:30:00,1", "2025-03-09 01:45:00,1",
                         "2025-03-09 03:00:00,1", "2025-03-09 03:15:00,1"])
    assert _messages(m) == [
        "meter DST skipped hour: on 2025-03-09 clocks in America/Chicago go forward from 02:00 "
        "to 03:00, so local times 02:00-03:00 do not exist; the file rightly has no readings "
        "there (4 intervals fewer that day); policy: nothing left out, stored in UTC"]
    assert m.findings[0].count == 4


def test_times_with_utc_offsets_have_no_dst_finding(tmp_path):
    m = _read(tmp_path, ["2025-03-09T01:30:00-06:00,1", "2025-03-09T01:45:00-06:00,1",
                         "2025-03-09T03:00:00-05:00,1", "2025-03-09T03:15:00-05:00,1"])
    assert m.findings == []


# ---------------------------------------------------------------------------------------
# Cumulative register readings


REGISTER = 'register_digits = 5\nmultiplier = 2'


def test_register_readings_become_interval_energy_across_a_rollover(tmp_path):
    # A 5-digit register times 2: 99970 -> 99990 is 20 x 2 = 40 kWh; 99990 -> 00012 rolls
    # over: (12 - 99990 + 10^5) mod 10^5 = 22, x 2 = 44 kWh (docs/references.md section 7).
    rows = ["2025-01-06 00:15:00,99970", "2025-01-06 00:30:00,99990",
            "2025-01-06 00:45:00,00012", "2025-01-06 01:00:00,30"]
    m = _read(tmp_path, rows, unit="kWh-register", meter_extra=REGISTER)
    assert m.frame["energy_kwh"].to_list() == [40.0, 44.0, 36.0]
    assert m.frame["end_utc"][0] == dt.datetime(2025, 1, 6, 6, 30, tzinfo=dt.UTC)
    assert _messages(m) == [
        "meter register rollovers: 1 reading rolled over past 99999, register_digits = 5 "
        "(2025-01-06T00:45:00-06:00); policy: interval energy = (R2 - R1 + 10^5) mod 10^5 x "
        "multiplier 2"]


def test_register_interval_after_a_gap_has_no_reading(tmp_path):
    # 00:45 is missing: the 00:30 -> 01:00 difference spans two intervals and is not split.
    rows = ["2025-01-06 00:15:00,100", "2025-01-06 00:30:00,110", "2025-01-06 01:00:00,130",
            "2025-01-06 01:15:00,135"]
    m = _read(tmp_path, rows, unit="kWh-register")
    assert m.frame["energy_kwh"].to_list() == [10.0, None, 5.0]


def test_register_decrease_without_digits_is_an_error_naming_the_row(tmp_path):
    rows = ["2025-01-06 00:15:00,99970", "2025-01-06 00:30:00,99990",
            "2025-01-06 00:45:00,12"]
    with pytest.raises(InputError) as exc:
        _read(tmp_path, rows, unit="kWh-register")
    path = (tmp_path / "meter.csv").resolve()
    assert str(exc.value) == (
        f"{path}: line 4, column 'kwh': register reading 12 is below the previous reading 99990 "
        "(line 3); expected a register that never decreases; if it rolls over, set "
        "register_digits in [meter]")


def test_register_reading_with_too_many_digits_is_an_error(tmp_path):
    rows = ["2025-01-06 00:15:00,99970", "2025-01-06 00:30:00,123456"]
    with pytest.raises(InputError) as exc:
        _read(tmp_path, rows, unit="kWh-register", meter_extra=REGISTER)
    path = (tmp_path / "meter.csv").resolve()
    assert str(exc.value) == (
        f"{path}: line 3, column 'kwh': register reading 123456 has more than 5 digits; "
        "expected below 100000 (register_digits = 5); correct register_digits in [meter]")


def test_register_settings_only_with_the_register_unit(tmp_path):
    path = _site(tmp_path, _rows(4), meter_extra="register_digits = 5")
    with pytest.raises(ConfigError) as exc:
        load_site(path)
    assert str(exc.value) == (f"{path.resolve()}: [meter] register_digits: only used with "
                              "unit = \"kWh-register\"; remove it or set that unit")


@pytest.mark.parametrize("extra, message", [
    ("register_digits = 0", "[meter] register_digits = 0: expected a whole number from 1 to 15"),
    ("multiplier = -1", "[meter] multiplier = -1.0: expected a number above 0"),
    ('stamp = "start"', "[meter] stamp = 'start': a register reading ends the interval since "
                        "the previous reading; remove stamp or set it to \"end\""),
])
def test_register_settings_are_checked(tmp_path, extra, message):
    path = _site(tmp_path, _rows(4), unit="kWh-register", meter_extra=extra)
    with pytest.raises(ConfigError) as exc:
        load_site(path)
    assert str(exc.value) == f"{path.resolve()}: {message}"


# ---------------------------------------------------------------------------------------
# check reports the findings


def test_check_report_and_summary_list_the_findings(tmp_path):
    rows = _spike_rows()
    del rows[200]  # one missing reading too
    result = check_site(_site(tmp_path, rows))
    kinds = [f.kind for f in result.report.findings]
    assert kinds == ["gap", "spike"]
    assert set(result.report.findings[0].as_dict()) == {"kind", "count", "times", "policy",
                                                        "message"}
    lines = check_summary(result).splitlines()
    at = lines.index("Meter validation: 2 findings")
    assert lines[at + 1] == "  " + result.report.findings[0].message
    assert lines[at + 2] == "  " + result.report.findings[1].message
    assert not any(f.message in n for n in result.report.notes
                   for f in result.report.findings)


def test_breakdown_carries_the_findings_and_leaves_the_spike_out(tmp_path):
    result = breakdown_site(_site(tmp_path, _spike_rows()))
    assert [f.kind for f in result.fit.meter_validation] == ["spike"]
    assert result.findings[0].message in result.fit.warnings
    assert result.fit.intervals["spikes"] == 1
    # The months add up to the metered kWh of the intervals used: 144 x 8 + 143 x 12, no 100.
    assert result.breakdown["kwh"].sum() == pytest.approx(144 * 8.0 + 143 * 12.0, abs=1e-6)


def test_check_summary_says_when_nothing_was_found(tmp_path):
    result = check_site(_site(tmp_path, _rows(200, lambda i: 8.0 + (i % 7))))
    assert result.report.findings == []
    assert ("Meter validation: no gaps, duplicates, spikes, zero runs, interval changes, "
            "daylight-saving hours or register rollovers found") in check_summary(result)


def test_check_keeps_conflicting_duplicates_when_told(tmp_path):
    rows = _rows(200, lambda i: 8.0 + (i % 7)) + ["2025-01-06 00:30:00,9.5"]
    path = _site(tmp_path, rows)
    with pytest.raises(InputError):
        check_site(path)
    result = check_site(path, on_duplicate="keep-last")
    assert [f.kind for f in result.report.findings] == ["duplicate"]
    assert result.aligned.frame["energy_kwh"][1] == 9.5


# ---------------------------------------------------------------------------------------
# Estimation of short gaps (monthly totals only)


def _frame(starts_min: list[int], values: list[float | None],
           base: dt.datetime = dt.datetime(2025, 1, 6, 6, 0)) -> pl.DataFrame:
    """15-minute meter frame with intervals starting base (UTC) + starts_min minutes."""
    starts = [base.replace(tzinfo=dt.UTC) + dt.timedelta(minutes=m) for m in starts_min]
    return pl.DataFrame({
        "start_utc": starts, "end_utc": [s + STEP for s in starts], "energy_kwh": values},
        schema={"start_utc": pl.Datetime("us", "UTC"), "end_utc": pl.Datetime("us", "UTC"),
                "energy_kwh": pl.Float64})


def test_estimate_short_gaps_interpolates_linearly_and_marks_the_estimates():
    # Readings at intervals 0, 3 (two absent between), 4, 5 with no reading (null), 6, then
    # five absent (7..11, longer than the limit of 4), 12.
    f = _frame([0, 45, 60, 75, 90, 180], [1.0, 4.0, 5.0, None, 9.0, 3.0])
    out = estimate_short_gaps(f, 15)
    assert out.height == 13
    e = out["energy_kwh"].to_list()
    assert e[:7] == pytest.approx([1.0, 2.0, 3.0, 4.0, 5.0, 7.0, 9.0], abs=1e-12)
    assert e[7:12] == [None] * 5  # 5 > ESTIMATE_MAX_GAP: left as no reading
    assert ESTIMATE_MAX_GAP == 4
    assert out["estimated"].to_list() == [False, True, True, False, False, True, False] + \
        [False] * 6


def test_estimate_short_gaps_never_fills_the_ends_and_checks_max_gap():
    f = _frame([0, 15, 30], [None, 2.0, None])
    out = estimate_short_gaps(f, 15)
    assert out["energy_kwh"].to_list() == [None, 2.0, None]
    with pytest.raises(ValueError):
        estimate_short_gaps(f, 15, max_gap=0)


def test_monthly_totals_show_the_estimated_part_and_mark_the_months():
    # Intervals start 05:30, (05:45), (06:00), 06:15 UTC on 2025-02-01 = 23:30, 23:45 on
    # January 31 and 00:00, 00:15 on February 1 in Chicago (CST): the two estimates (2 and 3
    # kWh) fall in different local months.
    f = _frame([0, 45], [1.0, 4.0], base=dt.datetime(2025, 2, 1, 5, 30))
    totals = monthly_totals(estimate_short_gaps(f, 15), "America/Chicago")
    assert totals.to_dicts() == [
        {"period": "2025-01", "metered_kwh": 1.0, "estimated_kwh": 2.0, "estimated_intervals": 1,
         "total_kwh": 3.0, "estimated": True},
        {"period": "2025-02", "metered_kwh": 4.0, "estimated_kwh": 3.0, "estimated_intervals": 1,
         "total_kwh": 7.0, "estimated": True}]
    utc = monthly_totals(estimate_short_gaps(f, 15), "UTC")
    assert utc.select("period", "estimated_intervals").rows() == [("2025-02", 2)]
    assert np.isclose(utc["total_kwh"][0], 10.0)
