"""Notes as the engineer reads them (disagg.inputs.notes.tidy): one line per finding that
several loads share, paths relative to the site file, times in the site's zone."""

from __future__ import annotations

from pathlib import Path

import polars as pl
from typer.testing import CliRunner

from disagg.cli import app
from disagg.inputs.notes import tidy
from test_cli import write_site

runner = CliRunner()


def test_lines_that_differ_only_in_the_equipment_become_one_line_with_a_count():
    base = Path("/data/site")
    notes = [f"/data/site/log.csv: equipment '{e}': 1 silence longer than max_hold_minutes = 30 "
             "(first: 120 min without a sample from 2025-01-20 18:00:00+00:00)"
             for e in ("CH-1", "AHU-1", "P-1")]
    notes.append("/data/site/log.csv: equipment 'P-1': another finding")
    out = tidy(notes, [base / "log.csv", base / "site.toml"], base, "America/Chicago")
    assert out == [
        "log.csv: 3 equipment (CH-1, AHU-1, P-1): 1 silence longer than max_hold_minutes = 30 "
        "(first: 120 min without a sample from 2025-01-20T12:00:00-06:00)",
        "log.csv: equipment 'P-1': another finding"]


def test_many_equipment_are_named_up_to_six_then_counted():
    ids = [f"F-{i}" for i in range(9)]
    out = tidy([f"equipment '{e}': no logged state" for e in ids], [], Path("/x"), "UTC")
    assert out == ["9 equipment (F-0, F-1, F-2, F-3, F-4, F-5 and 3 more): no logged state"]


def test_a_file_beside_the_site_folder_is_named_relative_to_it():
    out = tidy(["/a/meters/m.csv: 1 row out of time order"], [Path("/a/meters/m.csv")],
               Path("/a/configs"), "UTC")
    assert out == ["../meters/m.csv: 1 row out of time order"]


def test_a_two_hour_outage_of_meter_and_wide_log_gives_one_line_per_finding_kind(tmp_path):
    s = write_site(tmp_path / "site", days=4)
    events = pl.read_csv(s["runlog"])
    wide = (events.pivot(on="point", index="time", values="state", aggregate_function="last")
            .sort("time").fill_null(strategy="forward").drop_nulls())
    # Samples every 5 minutes (the states as of each time), then a 2-hour outage of both the
    # building automation log and the meter on the second day.
    grid = pl.DataFrame({"time": pl.datetime_range(pl.datetime(2025, 1, 20), pl.datetime(2025, 1, 24),
                                                   "5m", eager=True).dt.strftime("%Y-%m-%d %H:%M:%S")})
    wide = grid.join_asof(wide.sort("time"), on="time").drop_nulls()
    out_of = pl.col("time").is_between(pl.lit("2025-01-21 10:00:00"), pl.lit("2025-01-21 11:55:00"))
    wide.filter(~out_of).write_csv(s["runlog"])
    meter = pl.read_csv(s["meter"])
    meter.filter(~pl.col("end").str.slice(0, 16).is_between(pl.lit("2025-01-21T10:15"),
                                                            pl.lit("2025-01-21T12:00"))
                 ).write_csv(s["meter"])
    text = s["site"].read_text(encoding="utf-8").replace(
        'layout = "events"\ntime_column = "time"\nequipment_column = "point"\n'
        'state_column = "state"', 'layout = "samples"\ntime_column = "time"\n'
        'max_hold_minutes = 30')
    s["site"].write_text(text, encoding="utf-8")
    result = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(tmp_path / "out")])
    assert result.exit_code == 0, result.output
    notes = [ln for ln in result.stdout.splitlines() if ln.startswith("Note: ")]
    about_outage = [n for n in notes if "unstable" not in n and "prior" not in n]
    assert len(about_outage) <= 4, about_outage
    silence = [n for n in about_outage if "silence" in n]
    assert silence == [silence[0]] and "3 equipment (CH-1, AHU-1, P-1)" in silence[0]
    assert silence[0].startswith("Note: runlog.csv: ")
    assert all(str(tmp_path) not in n for n in notes)
    assert all("+00:00" not in n for n in notes)


def test_several_loads_with_the_same_kind_of_finding_are_one_line_with_their_count():
    from disagg.inputs.notes import group_kinds

    lines = ["CH-1, CHWP-1 run together",
             "A is unstable: 1 kW; spans these",
             "other note",
             "B is unstable: 2 kW; spans these",
             "C is at-zero: 0 kW"]
    assert group_kinds(lines) == [
        "CH-1, CHWP-1 run together",
        "2 loads are unstable (A, B); the first: A is unstable: 1 kW; spans these (each one's "
        "figures are in fit.json, warnings)",
        "other note",
        "C is at-zero: 0 kW"]
