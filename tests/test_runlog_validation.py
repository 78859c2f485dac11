"""Run-log validation: each finding from a small file that has exactly that problem.

Findings land in RunLog.notes (or come from disagg.inputs.logcheck.coverage_findings) as one line
each; errors raise InputError / ConfigError. Every message is checked in full. The site's
time zone is UTC so the times in the files are the times in the messages.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import polars as pl
import pytest

from disagg.inputs.config import load_site
from disagg.errors import ConfigError, InputError
from disagg.inputs.logcheck import coverage_findings
from disagg.inputs.readers import read_meter, read_runlog

UTC = dt.timezone.utc
EVENTS = ('layout = "events"\ntime_column = "time"\nequipment_column = "point"\n'
          'state_column = "state"')
SAMPLES = 'layout = "samples"\ntime_column = "time"\nmax_hold_minutes = 20'
RUNTIME = ('layout = "runtime"\ntime_column = "time"\nequipment_column = "point"\n'
           'minutes_column = "run_min"\ninterval_minutes = 15')
PLAIN = '[[equipment]]\nid = "CH-1"\n\n[[equipment]]\nid = "AHU-1"\n\n[[equipment]]\nid = "P-1"\n'
RENAMED = PLAIN.replace('id = "CH-1"\n', 'id = "CH-1"\naliases = ["CH-OLD"]\n')


def _site(folder: Path, log_rows: list[str], header: str = "time,point,state",
          runlog: str = EVENTS, equipment: str = PLAIN,
          meter_rows: tuple[str, ...] = ("2025-01-06 00:15:00,1.0",)):
    """Write meter.csv (end-stamped kWh), log.csv and site.toml; return the loaded site."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "meter.csv").write_text("time,kwh\n" + "\n".join(meter_rows) + "\n",
                                      encoding="utf-8")
    (folder / "log.csv").write_text(header + "\n" + "\n".join(log_rows) + "\n", encoding="utf-8")
    (folder / "site.toml").write_text(
        f'[site]\nname = "Validation"\ntimezone = "UTC"\n\n[meter]\nfile = "meter.csv"\n'
        f'time_column = "time"\nvalue_column = "kwh"\nunit = "kWh"\n\n[runlog]\n'
        f'file = "log.csv"\n{runlog}\n\n{equipment}', encoding="utf-8")
    return load_site(folder / "site.toml")


def _t(h: int, m: int) -> dt.datetime:
    return dt.datetime(2025, 1, 6, h, m, tzinfo=UTC)


def _segments(log, eq: str) -> list[tuple[dt.datetime, dt.datetime, float]]:
    seg = log.segments[eq]
    to_dt = lambda ns: dt.datetime.fromtimestamp(int(ns) // 1_000_000_000, UTC)  # noqa: E731
    return [(to_dt(a), to_dt(b), float(v)) for a, b, v in zip(seg.start_ns, seg.end_ns, seg.value)]


def _error(site) -> str:
    with pytest.raises(InputError) as exc:
        read_runlog(site.runlog, site)
    return str(exc.value)


# ---------------------------------------------------------------------------------------
# Unknown equipment ids: the error suggests the nearest configured id


@pytest.mark.parametrize("written, nearest", [("AHU1", "AHU-1"), ("p-1", "P-1"), ("CH-2", "CH-1")])
def test_unknown_id_suggests_the_nearest_configured_id(tmp_path, written, nearest):
    site = _site(tmp_path, ["2025-01-06 00:00:00,CH-1,on", f"2025-01-06 00:10:00,{written},on"])
    assert _error(site) == (f"{site.runlog.file}: line 3, column 'point': unknown equipment id "
                            f"{written!r}; did you mean {nearest!r}? expected one of the site "
                            "file's ids (CH-1, AHU-1, P-1)")


def test_unknown_id_without_a_close_match_names_the_other_unknown_ids(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,FAN-7,on", "2025-01-06 00:10:00,ZZ-9,on",
                            "2025-01-06 00:20:00,FAN-7,off", "2025-01-06 00:30:00,CH-1,on"])
    assert _error(site) == (f"{site.runlog.file}: line 2, column 'point': unknown equipment id "
                            "'FAN-7'; expected one of the site file's ids (CH-1, AHU-1, P-1); "
                            "the file also has unknown ids 'ZZ-9'")


def test_unknown_id_with_aliases_configured_lists_the_former_ids(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,CH-OLD,on", "2025-01-06 00:10:00,AHU1,on"],
                 equipment=RENAMED)
    assert _error(site) == (f"{site.runlog.file}: line 3, column 'point': unknown equipment id "
                            "'AHU1'; did you mean 'AHU-1'? expected one of the site file's ids "
                            "(CH-1, AHU-1, P-1) or their former ids (CH-OLD)")


def test_empty_equipment_id_is_an_error(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,CH-1,on", "2025-01-06 00:10:00,,on"])
    assert _error(site) == (f"{site.runlog.file}: line 3, column 'point': empty equipment id; "
                            "expected one of the site file's ids (CH-1, AHU-1, P-1)")


def test_samples_column_with_a_misspelt_id_suggests_the_nearest(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,on,off"], header="time,CH-1,P1",
                 runlog=SAMPLES)
    assert _error(site) == (f"{site.runlog.file}: column 'P1' is not a configured equipment "
                            "id; did you mean 'P-1'? expected the time column and columns named "
                            "CH-1, AHU-1, P-1")


# ---------------------------------------------------------------------------------------
# Equipment renamed mid-period: aliases


def test_aliases_are_read_from_the_site_file(tmp_path):
    two = 'id = "CH-1"\naliases = [" CH-OLD ", "CH-A"]\n'
    site = _site(tmp_path, ["2025-01-06 00:00:00,CH-1,on"],
                 equipment=PLAIN.replace('id = "CH-1"\n', two))
    assert [e.aliases for e in site.equipment] == [("CH-OLD", "CH-A"), (), ()]


@pytest.mark.parametrize("table, error", [
    ('id = "CH-1"\naliases = ["P-1"]\n',
     "[equipment CH-1] aliases[0] = 'P-1': is the id of another equipment; an alias is a former "
     "id that no configured equipment uses; remove it"),
    ('id = "CH-1"\naliases = ["OLD", "CH-1"]\n',
     "[equipment CH-1] aliases[1] = 'CH-1': already names equipment 'CH-1'; remove it"),
    ('id = "CH-1"\naliases = ["OLD", "OLD"]\n',
     "[equipment CH-1] aliases[1] = 'OLD': already names equipment 'CH-1'; remove it"),
    ('id = "CH-1"\naliases = "OLD"\n',
     "[equipment CH-1] aliases = 'OLD': expected a list"),
    ('id = "CH-1"\naliases = [7]\n',
     "[equipment CH-1] aliases[0] = 7: expected text, a former id of equipment 'CH-1'"),
    ('id = "CH-1"\naliases = ["A,B"]\n',
     "[equipment CH-1] aliases[0] = 'A,B': expected a non-empty id without '+', ';', ',' or "
     "line breaks"),
])
def test_bad_aliases_are_config_errors(tmp_path, table, error):
    with pytest.raises(ConfigError) as exc:
        _site(tmp_path, ["2025-01-06 00:00:00,CH-1,on"],
              equipment=PLAIN.replace('id = "CH-1"\n', table))
    assert str(exc.value) == f"{(tmp_path / 'site.toml').resolve()}: {error}"


def test_alias_used_by_two_equipment_is_a_config_error(tmp_path):
    both = RENAMED.replace('id = "P-1"\n', 'id = "P-1"\naliases = ["CH-OLD"]\n')
    with pytest.raises(ConfigError) as exc:
        _site(tmp_path, ["2025-01-06 00:00:00,CH-1,on"], equipment=both)
    assert str(exc.value) == (f"{(tmp_path / 'site.toml').resolve()}: [equipment P-1] "
                              "aliases[0] = 'CH-OLD': is already an alias of equipment 'CH-1'; a "
                              "former id can count as one equipment only; remove one")


RENAMED_ROWS = ["2025-01-06 00:00:00,CH-OLD,on", "2025-01-06 00:00:00,AHU-1,0.5",
                "2025-01-06 00:00:00,P-1,on", "2025-01-06 00:30:00,CH-OLD,off",
                "2025-01-06 01:00:00,CH-1,on", "2025-01-06 01:30:00,CH-1,off",
                "2025-01-06 01:30:00,P-1,off"]


def test_events_rows_of_a_former_id_land_on_the_new_ids_segments(tmp_path):
    site = _site(tmp_path / "a", RENAMED_ROWS, equipment=RENAMED)
    log = read_runlog(site.runlog, site)
    # The last CH-OLD event (off at 00:30) holds until CH-1's next event: one equipment.
    assert _segments(log, "CH-1") == [(_t(0, 0), _t(0, 30), 1.0), (_t(0, 30), _t(1, 0), 0.0),
                                      (_t(1, 0), _t(1, 30), 1.0)]
    assert log.notes == [f"{site.runlog.file}: 2 rows of former id 'CH-OLD' counted as equipment "
                         "'CH-1' (2025-01-06 00:00:00+00:00 to 2025-01-06 00:30:00+00:00)"]
    # The same as a log that always used the new id.
    same = _site(tmp_path / "b", [r.replace("CH-OLD", "CH-1") for r in RENAMED_ROWS])
    renamed_log = read_runlog(same.runlog, same)
    for eq in ("CH-1", "AHU-1", "P-1"):
        assert _segments(log, eq) == _segments(renamed_log, eq)
    assert renamed_log.notes == []


def test_runtime_rows_of_a_former_id_land_on_the_new_ids_segments(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,CH-OLD,15", "2025-01-06 00:15:00,CH-1,6",
                            "2025-01-06 00:00:00,P-1,3"],
                 header="time,point,run_min", runlog=RUNTIME, equipment=RENAMED)
    log = read_runlog(site.runlog, site)
    assert _segments(log, "CH-1") == [(_t(0, 0), _t(0, 15), 1.0), (_t(0, 15), _t(0, 30), 0.4)]
    assert log.notes == [f"{site.runlog.file}: 1 row of former id 'CH-OLD' counted as equipment "
                         "'CH-1' (2025-01-06 00:00:00+00:00 to 2025-01-06 00:00:00+00:00)"]


def test_samples_column_of_a_former_id_fills_the_new_ids_column(tmp_path):
    # Renamed at 00:20: the old column is empty from then on, the new one before then.
    site = _site(tmp_path, ["2025-01-06 00:00:00,on,,1,1", "2025-01-06 00:10:00,off,,1,1",
                            "2025-01-06 00:20:00,,on,1,1", "2025-01-06 00:30:00,,off,1,1"],
                 header="time,CH-OLD,CH-1,AHU-1,P-1", runlog=SAMPLES, equipment=RENAMED)
    log = read_runlog(site.runlog, site)
    assert _segments(log, "CH-1") == [(_t(0, 0), _t(0, 10), 1.0), (_t(0, 10), _t(0, 20), 0.0),
                                      (_t(0, 20), _t(0, 30), 1.0), (_t(0, 30), _t(0, 50), 0.0)]
    assert log.notes == [f"{site.runlog.file}: 2 samples in column 'CH-OLD' (a former id) counted "
                         "as equipment 'CH-1' (2025-01-06 00:00:00+00:00 to "
                         "2025-01-06 00:10:00+00:00)"]


# ---------------------------------------------------------------------------------------
# Contradictory simultaneous states (events: tests/test_readers.py)


def test_events_former_and_new_id_with_different_states_at_one_time_is_an_error(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,CH-OLD,on", "2025-01-06 00:00:00,CH-1,off"],
                 equipment=RENAMED)
    assert _error(site) == (f"{site.runlog.file}: line 2: equipment 'CH-1' has different states "
                            "at the same time 2025-01-06 00:00:00+00:00; expected one state")


def test_samples_former_and_new_column_with_different_states_in_one_row_is_an_error(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,on,", "2025-01-06 00:10:00,on,off"],
                 header="time,CH-OLD,CH-1", runlog=SAMPLES, equipment=RENAMED)
    assert _error(site) == (f"{site.runlog.file}: line 3: equipment 'CH-1' has different states "
                            "at the same time 2025-01-06 00:10:00+00:00 (columns 'CH-OLD', "
                            "'CH-1'); expected one state")


def test_samples_two_rows_at_one_time_with_different_states_is_an_error(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,on", "2025-01-06 00:10:00,on",
                            "2025-01-06 00:10:00,off"], header="time,CH-1", runlog=SAMPLES)
    assert _error(site) == (f"{site.runlog.file}: line 3: equipment 'CH-1' has different states "
                            "at the same time 2025-01-06 00:10:00+00:00; expected one state")


def test_runtime_two_rows_at_one_time_with_different_minutes_is_an_error(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,P-1,3", "2025-01-06 00:00:00,CH-1,5",
                            "2025-01-06 00:00:00,CH-OLD,7"],
                 header="time,point,run_min", runlog=RUNTIME, equipment=RENAMED)
    assert _error(site) == (f"{site.runlog.file}: line 3: equipment 'CH-1' has different run "
                            "minutes at the same time 2025-01-06 00:00:00+00:00; expected one "
                            "value per interval")


# ---------------------------------------------------------------------------------------
# Events out of order


OUT_OF_ORDER = ["2025-01-06 00:00:00,CH-1,on",
                "2025-01-06 00:00:00,AHU-1,on",
                "2025-01-06 00:30:00,CH-1,off",
                "2025-01-06 00:10:00,P-1,on",     # earlier than line 4, but another equipment
                "2025-01-06 00:20:00,CH-1,on",    # earlier than CH-1's 00:30: out of order
                "2025-01-06 00:40:00,P-1,off",
                "2025-01-06 00:35:00,P-1,on",     # earlier than P-1's 00:40: out of order
                "2025-01-06 01:00:00,CH-1,off"]


def test_events_out_of_order_are_counted_and_sorted_by_time(tmp_path):
    site = _site(tmp_path / "a", OUT_OF_ORDER)
    log = read_runlog(site.runlog, site)
    assert log.notes == [f"{site.runlog.file}: 2 rows out of time order, earlier than the "
                         "previous row of the same equipment (first: line 6, 'CH-1' at "
                         "2025-01-06 00:20:00+00:00); policy: sorted by time"]
    assert _segments(log, "CH-1") == [(_t(0, 0), _t(0, 20), 1.0), (_t(0, 20), _t(0, 30), 1.0),
                                      (_t(0, 30), _t(1, 0), 0.0)]
    # Policy: the same segments as the file sorted by time, which has no finding.
    ordered = _site(tmp_path / "b", sorted(OUT_OF_ORDER))
    ordered_log = read_runlog(ordered.runlog, ordered)
    assert ordered_log.notes == []
    for eq in ("CH-1", "AHU-1", "P-1"):
        assert _segments(log, eq) == _segments(ordered_log, eq)


def test_samples_rows_out_of_order_are_counted(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,on", "2025-01-06 00:20:00,off",
                            "2025-01-06 00:10:00,on", "2025-01-06 00:30:00,off"],
                 header="time,CH-1", runlog=SAMPLES)
    log = read_runlog(site.runlog, site)
    assert log.notes == [
        "no run-log column for AHU-1, P-1: left out as unknown",
        f"{site.runlog.file}: 1 row out of time order, earlier than the previous row (first: "
        "line 4, at 2025-01-06 00:10:00+00:00); policy: sorted by time"]
    assert _segments(log, "CH-1")[:3] == [(_t(0, 0), _t(0, 10), 1.0), (_t(0, 10), _t(0, 20), 1.0),
                                          (_t(0, 20), _t(0, 30), 0.0)]


# ---------------------------------------------------------------------------------------
# Samples stale beyond max_hold


def test_samples_silences_longer_than_max_hold_are_counted_per_equipment(tmp_path):
    # max_hold_minutes = 20. CH-1: gaps 20 (not longer), 40, 10, 30, 10 min. AHU-1: one
    # sample at 00:00 and the next at 01:50. P-1: stops at 01:10, 40 min before the log ends.
    site = _site(tmp_path, ["2025-01-06 00:00:00,on,0.5,1", "2025-01-06 00:20:00,off,,1",
                            "2025-01-06 01:00:00,on,,1", "2025-01-06 01:10:00,off,,1",
                            "2025-01-06 01:40:00,on,,", "2025-01-06 01:50:00,off,1,"],
                 header="time,CH-1,AHU-1,P-1", runlog=SAMPLES)
    log = read_runlog(site.runlog, site)
    path = site.runlog.file
    policy = ("policy: more than 20 min after a sample the state is unknown, and meter "
              "intervals then are left out")
    assert log.notes == [
        f"{path}: equipment 'CH-1': 2 silences longer than max_hold_minutes = 20 (first: 40 min "
        f"without a sample from 2025-01-06 00:20:00+00:00); {policy}",
        f"{path}: equipment 'AHU-1': 1 silence longer than max_hold_minutes = 20 (first: 110 min "
        f"without a sample from 2025-01-06 00:00:00+00:00); {policy}",
        f"{path}: equipment 'P-1': 2 silences longer than max_hold_minutes = 20 (first: 40 min "
        f"without a sample from 2025-01-06 00:20:00+00:00); {policy}"]
    # Already unknown beyond the hold: CH-1's 00:20 sample holds 00:20-00:40 only.
    assert _segments(log, "CH-1")[1] == (_t(0, 20), _t(0, 40), 0.0)


def test_samples_without_long_silences_have_no_finding(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,on,1,0", "2025-01-06 00:20:00,off,1,0",
                            "2025-01-06 00:40:00,on,0,1"], header="time,CH-1,AHU-1,P-1",
                 runlog=SAMPLES)
    assert read_runlog(site.runlog, site).notes == []


# ---------------------------------------------------------------------------------------
# Logs that do not cover the meter period: disagg.inputs.logcheck.coverage_findings

# End-stamped readings 00:15 to 03:00: intervals 00:00 to 03:00.
METER_3H = tuple(f"2025-01-06 {(i + 1) // 4:02d}:{15 * ((i + 1) % 4):02d}:00,1.0"
                 for i in range(12))


def test_coverage_names_time_before_and_after_the_log_and_equipment_never_logged(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:30:00,CH-1,on", "2025-01-06 00:00:00,P-1,on",
                            "2025-01-06 01:30:00,CH-1,off", "2025-01-06 02:30:00,P-1,off"],
                 meter_rows=METER_3H)
    meter = read_meter(site.meter, site.timezone)
    log = read_runlog(site.runlog, site)
    path = site.runlog.file
    period = ("the meter period 2025-01-06 00:00:00+00:00 to 2025-01-06 03:00:00+00:00 (3 h)")
    assert coverage_findings(log, meter.frame) == [
        f"{path}: equipment 'CH-1': the log covers 2 h of {period}, its states run from "
        "2025-01-06 00:30:00+00:00 to 2025-01-06 02:30:00+00:00; not covered: 30 min before "
        "the log starts, 30 min after it ends; meter intervals there are left out of the fit",
        f"{path}: equipment 'AHU-1': no logged state in {period}; every meter interval is left "
        "out of the fit",
        f"{path}: equipment 'P-1': the log covers 2.5 h of {period}, its states run from "
        "2025-01-06 00:00:00+00:00 to 2025-01-06 02:30:00+00:00; not covered: 30 min after it "
        "ends; meter intervals there are left out of the fit"]


def test_coverage_names_gaps_inside_the_log(tmp_path):
    # Runtime rows for CH-1 miss 00:30-01:30 and 01:45-02:00; the others cover 00:00-02:00.
    rows = [f"2025-01-06 {h:02d}:{m:02d}:00,{eq},5" for eq in ("AHU-1", "P-1")
            for h in (0, 1) for m in (0, 15, 30, 45)]
    rows += ["2025-01-06 00:00:00,CH-1,5", "2025-01-06 00:15:00,CH-1,5",
             "2025-01-06 01:30:00,CH-1,5", "2025-01-06 02:00:00,CH-1,5"]
    site = _site(tmp_path, rows, header="time,point,run_min", runlog=RUNTIME,
                 meter_rows=METER_3H[:8])
    log = read_runlog(site.runlog, site)
    meter = read_meter(site.meter, site.timezone)
    assert coverage_findings(log, meter.frame) == [
        f"{site.runlog.file}: equipment 'CH-1': the log covers 45 min of the meter period "
        "2025-01-06 00:00:00+00:00 to 2025-01-06 02:00:00+00:00 (2 h), its states run from "
        "2025-01-06 00:00:00+00:00 to 2025-01-06 02:15:00+00:00; not covered: 1.25 h in gaps "
        "(first from 2025-01-06 00:30:00+00:00); meter intervals there are left out of the fit"]


def test_coverage_of_a_log_that_covers_the_meter_period_has_no_finding(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,CH-1,on", "2025-01-06 00:00:00,AHU-1,on",
                            "2025-01-06 00:00:00,P-1,on", "2025-01-06 03:00:00,P-1,off"],
                 meter_rows=METER_3H)
    meter = read_meter(site.meter, site.timezone)
    assert coverage_findings(read_runlog(site.runlog, site), meter.frame) == []
    assert coverage_findings(read_runlog(site.runlog, site), meter.frame.head(0)) == []


# ---------------------------------------------------------------------------------------
# A load missing from the run log: the error names it


def test_a_wide_log_without_a_loads_column_fails_naming_that_equipment(tmp_path):
    from typer.testing import CliRunner

    from disagg.cli import app
    from test_cli import write_site

    s = write_site(tmp_path / "site", days=3)
    events = pl.read_csv(s["runlog"])
    # The same states in the wide (samples) layout, one column per load, but no P-1 column.
    wide = (events.filter(pl.col("point") != "P-1")
            .pivot(on="point", index="time", values="state", aggregate_function="last")
            .sort("time").fill_null(strategy="forward").drop_nulls())
    wide.write_csv(s["runlog"])
    text = s["site"].read_text(encoding="utf-8").replace(
        'layout = "events"\ntime_column = "time"\nequipment_column = "point"\n'
        'state_column = "state"', 'layout = "samples"\ntime_column = "time"\n'
        'max_hold_minutes = 1440')
    s["site"].write_text(text, encoding="utf-8")
    result = CliRunner().invoke(app, ["check", str(s["site"])])
    assert result.exit_code == 1, result.output
    assert result.stderr.startswith(f"Error: {s['runlog']} (")
    assert result.stderr.endswith(
        ": no interval has both a meter reading and a known state for every equipment; no "
        "known state at all for P-1 (expected a run-log column named P-1)\n")


def test_an_events_log_without_rows_for_a_load_fails_naming_that_equipment(tmp_path):
    from typer.testing import CliRunner

    from disagg.cli import app
    from test_cli import write_site

    s = write_site(tmp_path / "site", days=3)
    pl.read_csv(s["runlog"]).filter(pl.col("point") != "AHU-1").write_csv(s["runlog"])
    result = CliRunner().invoke(app, ["breakdown", str(s["site"]), "--out",
                                      str(tmp_path / "out")])
    assert result.exit_code == 1, result.output
    assert result.stderr.endswith(
        "; no known state at all for AHU-1 (expected run-log rows with AHU-1 in column "
        "'point')\n")
    assert not (tmp_path / "out").exists()


def test_a_row_cut_short_is_named_as_such_not_as_an_empty_id(tmp_path):
    site = _site(tmp_path, ["2025-01-06 00:00:00,CH-1,on", "2025-01-06 00:10:00,"])
    assert _error(site) == (f"{site.runlog.file}: line 3: no 'point' and no 'state': the row "
                            "ends early (is the file cut short?); expected a value in each of "
                            "'time', 'point', 'state'")
