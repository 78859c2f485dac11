"""Hostile inputs and failing disks end in exit 1 and one `Error:` line naming the file and the
reason: never an internal error (exit 2), a traceback, a warning on stderr or "(None)".
All data invented (the synthetic site of test_cli.write_site)."""

from __future__ import annotations

import os
import shutil
import warnings
from pathlib import Path

import polars as pl
import pytest
from test_cli import write_site
from typer.testing import CliRunner

from disagg import cli
from disagg.cli import app
from disagg.present import commit

runner = CliRunner()


@pytest.fixture(scope="module")
def base(tmp_path_factory) -> dict:
    return write_site(tmp_path_factory.mktemp("site") / "site", days=10, seed=3)


def _copy(base: dict, tmp_path: Path) -> Path:
    folder = tmp_path / "site"
    shutil.copytree(base["folder"], folder)
    return folder


def _one_error(args: list[str]) -> str:
    r = runner.invoke(app, args)
    lines = r.stderr.splitlines()
    assert r.exit_code == 1, (r.exit_code, r.output)
    assert len(lines) == 1 and lines[0].startswith("Error: "), lines
    assert "internal error" not in lines[0] and "(None)" not in lines[0]
    return lines[0]


def _edit_meter_line(folder: Path, line_no: int, edit) -> None:
    meter = folder / "meter.csv"
    lines = meter.read_text().splitlines()
    lines[line_no - 1] = edit(lines[line_no - 1])
    meter.write_text("\n".join(lines) + "\n")


@pytest.mark.parametrize("year", ["0001", "2300", "9999"])
def test_a_time_in_a_far_year_is_an_error_naming_the_row(base, tmp_path, year):
    folder = _copy(base, tmp_path)
    _edit_meter_line(folder, 6, lambda line: year + line[4:])
    written = (folder / "meter.csv").read_text().splitlines()[5].split(",")[0]
    err = _one_error(["breakdown", str(folder / "site.toml"), "--out", str(tmp_path / "out")])
    # The time as written in the file (it was shown converted to UTC).
    assert err == (f"Error: {folder / 'meter.csv'}: line 6, column 'end': time {written} is "
                   "outside the years 1900 to 2199; expected a date and time such as "
                   "2025-03-09T03:15:00")


@pytest.mark.parametrize("value", ["inf", "1e308", "-inf"])
def test_an_infinite_or_huge_meter_reading_is_an_error(base, tmp_path, value):
    folder = _copy(base, tmp_path)
    _edit_meter_line(folder, 6, lambda line: line.split(",")[0] + "," + value)
    err = _one_error(["breakdown", str(folder / "site.toml"), "--out", str(tmp_path / "out")])
    assert err.startswith(f"Error: {folder / 'meter.csv'}: line 6, column 'kwh': ")
    assert "is too large (more than 1e+15 in size); expected energy in kWh" in err
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("value", ["inf", "1e308", "-300"])
def test_an_impossible_outdoor_temperature_is_blamed_on_the_weather_file(base, tmp_path, value):
    folder = _copy(base, tmp_path)
    times = pl.read_csv(folder / "meter.csv")["end"].to_list()[::4]
    temps = ["20.0"] * len(times)
    temps[3] = value
    (folder / "weather.csv").write_text(
        "time,temp\n" + "".join(f"{t},{v}\n" for t, v in zip(times, temps)))
    site = folder / "site.toml"
    site.write_text(site.read_text().replace(
        '[[equipment]]\nid = "CH-1"\n',
        '[[equipment]]\nid = "CH-1"\nweather = "cooling"\nbalance_temp = 15\n', 1)
        + '\n[weather]\nfile = "weather.csv"\ntime_column = "time"\ntemp_column = "temp"\n'
          'unit = "C"\n')
    err = _one_error(["breakdown", str(site), "--out", str(tmp_path / "out")])
    assert err.startswith(f"Error: {folder / 'weather.csv'}: line 5, column 'temp': ")


@pytest.mark.parametrize("setting, message", [
    ("draw_kw = 1e308", "[equipment CH-1] draw_kw = 1e+308: expected a number above 0 and at "
                        "most 1e+09"),
    ("rated_kw = inf", "[equipment CH-1] rated_kw = inf: expected a number above 0 and at "
                       "most 1e+09"),
    ("draw_kw = 10\ndraw_sd_kw = 1e300", "[equipment CH-1] draw_sd_kw = 1e+300: expected a "
                                         "number above 0 and at most 1e+09")])
def test_huge_or_infinite_settings_are_refused(base, tmp_path, setting, message):
    folder = _copy(base, tmp_path)
    site = folder / "site.toml"
    site.write_text(site.read_text().replace('id = "CH-1"\n', f'id = "CH-1"\n{setting}\n'))
    err = _one_error(["breakdown", str(site), "--out", str(tmp_path / "out")])
    assert err == f"Error: {site}: {message}"


@pytest.mark.parametrize("value", ["nan", "inf", "1e308"])
def test_a_non_finite_reference_temperature_is_refused(base, tmp_path, value):
    folder = _copy(base, tmp_path)
    (folder / "weather.csv").write_text("time,temp\n2025-01-20 06:00,5\n")
    site = folder / "site.toml"
    site.write_text(site.read_text() + '\n[weather]\nfile = "weather.csv"\ntime_column = '
                    f'"time"\ntemp_column = "temp"\nunit = "F"\nreference_temp = {value}\n')
    err = _one_error(["check", str(site)])
    assert err == (f"Error: {site}: [weather] reference_temp = {float(value)!r}: expected a "
                   "temperature from -200 to 200")


@pytest.mark.parametrize("option", ["--memory", "--baseload-memory"])
@pytest.mark.parametrize("memory", ["nan", "inf", "-1", "1e308", "1e200", "3661"])
def test_drift_memory_that_is_not_a_number_of_days_is_refused(base, tmp_path, option, memory):
    # 1e200 and 1e308 days used to end in an internal error (an overflow, a failed
    # eigenvalue solve); the longest memory is ten years (pipeline.MAX_MEMORY_DAYS).
    err = _one_error(["drift", str(base["site"]), "--out", str(tmp_path / "out"),
                      option, memory])
    assert err == (f"Error: {option} {float(memory):g}: expected a number of days above 0 "
                   "and at most 3660")


def test_report_memory_that_is_not_a_number_of_days_is_refused(base, tmp_path):
    err = _one_error(["report", str(base["site"]), "--out", str(tmp_path / "out"),
                      "--memory", "1e308"])
    assert err == "Error: --memory 1e+308: expected a number of days above 0 and at most 3660"


@pytest.mark.parametrize("key", ["weights", "mu", "scales", "delta"])
def test_a_state_file_with_nan_or_null_numbers_is_refused(base, tmp_path, key):
    # An edited --state file: NaN weights used to give a drift table of NaN whose alarms could
    # never fire (exit 0), a NaN step an internal error.
    import json

    state = tmp_path / "state.json"
    r = runner.invoke(app, ["drift", str(base["site"]), "--out", str(tmp_path / "a"),
                            "--state", str(state), "--memory", "2"])
    assert r.exit_code == 0, r.output
    saved = json.loads(state.read_text())
    for bad, word in ((float("nan"), "NaN"), (None, None)):
        edited = dict(saved)
        edited[key] = ([bad] * len(saved[key]) if isinstance(saved[key], list) else bad)
        state.write_text(json.dumps(edited))
        err = _one_error(["drift", str(base["site"]), "--out", str(tmp_path / "b"),
                          "--state", str(state), "--memory", "2"])
        if word:
            assert err == (f"Error: {state}: cannot read the tracker state (NaN where a "
                           "finite number was expected)")
        else:
            assert err == (f"Error: {state}: the tracker state's {key!r} holds something other "
                           "than numbers; start without --state")
    assert not (tmp_path / "b").exists()


def test_a_site_file_the_user_may_not_read_is_not_a_usage_error(base, tmp_path, monkeypatch):
    # typer's own readability check (os.access) answered with a usage panel and exit 2; the
    # job reads the file itself (test_an_unreadable_site_file_is_one_error_line: its Error
    # line). Here os.access says no while the file can be read (as for root): the run goes on.
    site = base["site"]
    real = os.access
    monkeypatch.setattr(os, "access", lambda p, mode, *a, **k: (
        False if Path(p) == Path(site) else real(p, mode, *a, **k)))
    r = runner.invoke(app, ["check", str(site)])
    assert r.exit_code == 0, r.output


def test_interval_minutes_disagreeing_with_the_data_is_an_error(base, tmp_path):
    folder = _copy(base, tmp_path)
    site = folder / "site.toml"
    site.write_text(site.read_text().replace('stamp = "end"', 'stamp = "end"\n'
                                             'interval_minutes = 5'))
    err = _one_error(["breakdown", str(site), "--out", str(tmp_path / "out")])
    assert err == (f"Error: {folder / 'meter.csv'}: the readings are 15 minutes apart (the most "
                   "common spacing) but the site file sets interval_minutes = 5; remove "
                   "interval_minutes or correct it")


def test_a_fifo_as_state_file_is_refused_before_reading(base, tmp_path):
    fifo = tmp_path / "state.json"
    os.mkfifo(fifo)  # reading it would block forever
    err = _one_error(["drift", str(base["site"]), "--out", str(tmp_path / "out"),
                      "--state", str(fifo)])
    assert err == (f"Error: {fifo}: is a FIFO (named pipe), not a file; give the tracker state "
                   "file (--state) itself")


@pytest.mark.parametrize("kind", ["fifo", "folder"])
def test_a_fifo_or_folder_as_meter_file_is_named_as_such(base, tmp_path, kind):
    # It used to say "no such meter file" of a file that exists.
    folder = _copy(base, tmp_path)
    meter = folder / "meter.csv"
    meter.unlink()
    if kind == "fifo":
        os.mkfifo(meter)  # reading it would block forever
    else:
        meter.mkdir()
    err = _one_error(["check", str(folder / "site.toml")])
    what = "a FIFO (named pipe)" if kind == "fifo" else "a folder"
    assert err == f"Error: {meter}: is {what}, not a file; give the meter file itself"


def test_a_row_with_an_extra_field_is_named_by_its_line(base, tmp_path):
    # The reader's own message named no line ("found more fields than defined in 'Schema'").
    folder = _copy(base, tmp_path)
    _edit_meter_line(folder, 11, lambda line: line + ",extra")
    err = _one_error(["check", str(folder / "site.toml")])
    header = (folder / "meter.csv").read_text().splitlines()[0].count(",") + 1
    assert err == (f"Error: {folder / 'meter.csv'}: line 11: {header + 1} fields where the "
                   f"header has {header}; expected a meter file with one value per column (a "
                   "comma in a value must be inside double quotes)")


def test_a_parquet_meter_with_a_list_column_is_refused(base, tmp_path):
    # A List[f64] column ended in an internal error (a failed cast to text).
    folder = _copy(base, tmp_path)
    frame = pl.read_csv(folder / "meter.csv", infer_schema=False)
    value = next(c for c in frame.columns if c != frame.columns[0])
    frame = frame.with_columns(pl.col(value).cast(pl.Float64).map_elements(
        lambda v: [v], return_dtype=pl.List(pl.Float64)))
    frame.write_parquet(folder / "meter.parquet")
    site = folder / "site.toml"
    site.write_text(site.read_text().replace("meter.csv", "meter.parquet"))
    err = _one_error(["check", str(site)])
    assert err == (f"Error: {folder / 'meter.parquet'}: column {value!r} holds List(Float64) "
                   "values; expected one number or text per row")


def test_a_device_as_site_file_is_refused(tmp_path):
    err = _one_error(["check", "/dev/zero"])
    assert err == "Error: /dev/zero: is a device, not a file; give the site file itself"


def test_a_symbolic_link_loop_as_output_folder_is_an_error(base, tmp_path):
    loop = tmp_path / "out"
    loop.symlink_to(tmp_path / "out2")
    (tmp_path / "out2").symlink_to(loop)
    err = _one_error(["breakdown", str(base["site"]), "--out", str(loop)])
    assert err == f"Error: {loop}: cannot use this output path (a symbolic link loop)"


@pytest.mark.skipif(not Path("/dev/full").exists(), reason="needs /dev/full")
@pytest.mark.parametrize("name, extra", [("breakdown.parquet", []),
                                         ("breakdown.xlsx", ["--xlsx"]),
                                         ("breakdown.csv", [])])
def test_a_full_disk_is_one_error_with_the_reason_and_no_folder_left(base, tmp_path,
                                                                      monkeypatch, name, extra):
    # The staged file is a link to /dev/full: every write to it fails with ENOSPC.
    real = commit.staging

    def full(root, what="output folder"):
        folder = real(root, what)
        (folder / name).symlink_to("/dev/full")
        return folder

    monkeypatch.setattr(commit, "staging", full)
    out = tmp_path / "new" / "out"
    err = _one_error(["breakdown", str(base["site"]), "--out", str(out), *extra])
    assert err.startswith(f"Error: {out}: cannot write the outputs (No space left on device")
    assert err.endswith("the previous files are left as they were")
    assert not (tmp_path / "new").exists()  # the folders it created are removed again


def test_warnings_are_not_printed_unless_debugging(capsys):
    def noisy():
        warnings.warn("overflow encountered in square", RuntimeWarning)
        return 7

    assert cli._guard(noisy) == 7
    assert capsys.readouterr().err == ""
    cli._state["debug"] = True
    try:
        cli._guard(noisy)
    finally:
        cli._state["debug"] = False
    assert "RuntimeWarning: overflow encountered in square" in capsys.readouterr().err


def test_an_unreadable_site_file_is_one_error_line(base, tmp_path, monkeypatch):
    # As for a file without read permission (the tests may run as root, who reads anything).
    site = _copy(base, tmp_path) / "site.toml"
    real = Path.read_text

    def denied(self, *args, **kwargs):
        if self == site:
            raise PermissionError(13, "Permission denied", str(self))
        return real(self, *args, **kwargs)

    monkeypatch.setattr(Path, "read_text", denied)
    err = _one_error(["check", str(site)])
    assert err == f"Error: {site}: cannot read the site file (Permission denied)"
