"""The history store (disagg.present.history) and `disagg history`.

All data invented: tests/synthetic.py buildings written to disk by
test_portfolio.write_site_files; H-1's draw rises 50 % (18 -> 27 kW) on 2025-04-01.
"""

from __future__ import annotations

import datetime as dt
import errno
import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from polars.testing import assert_frame_equal
from test_portfolio import meter_months, write_site_files
from typer.testing import CliRunner

from disagg.present import history
from disagg.cli import app
from disagg.inputs.config import load_site
from disagg.errors import ConfigError
from disagg.analyses.pipeline import breakdown_site

runner = CliRunner()
STEP_ON = dt.date(2025, 4, 1)
TRUE_H1_KW = (18.0, 27.0)  # synthetic.make_building: H-1 draws 18 kW, x 1.5 from STEP_ON


def _site(tmp_path: Path, stem: str = "plant", seed: int = 31) -> Path:
    return write_site_files(tmp_path, stem, seed, step=("H-1", 1.5), step_on=STEP_ON,
                            history="hist")


def _breakdown(toml: Path, out: Path, *extra: str) -> None:
    r = runner.invoke(app, ["breakdown", str(toml), "--out", str(out), "--quiet", *extra])
    assert r.exit_code == 0, r.output


def _stored_part(frame: pl.DataFrame) -> pl.DataFrame:
    """The breakdown.csv columns of stored rows, in breakdown.csv's order."""
    return frame.select("period", "equipment", "run_hours", "kw", "kw_low", "kw_high", "kwh",
                        "kwh_low", "kwh_high", "share", "flags")


def _full_march_site(tmp_path: Path) -> Path:
    """All of March 2025 (31 days; the clock goes forward on the 9th) and April 1-14."""
    return write_site_files(tmp_path, "plant", 33, start=dt.date(2025, 3, 1), days=45,
                            history="hist")


def _csv_part(path: Path) -> pl.DataFrame:
    t = pl.read_csv(path, schema_overrides={"flags": pl.String})
    return _stored_part(t.with_columns(pl.col("flags").fill_null("")))


# ---------------------------------------------------------------------------------------
# Storing and replacing


def test_running_the_same_months_twice_leaves_one_copy(tmp_path):
    toml = _site(tmp_path)
    _breakdown(toml, tmp_path / "out1")
    first = history.read_history(tmp_path / "hist")
    _breakdown(toml, tmp_path / "out2")
    second = history.read_history(tmp_path / "hist")
    assert second.height == first.height == pl.read_csv(tmp_path / "out2" / "breakdown.csv").height
    assert second.select("period", "equipment").is_duplicated().sum() == 0
    assert_frame_equal(_stored_part(second).with_columns(pl.col("flags").fill_null("")),
                       _csv_part(tmp_path / "out2" / "breakdown.csv"), rel_tol=1e-6,
                       abs_tol=1e-5)  # breakdown.csv has 6 decimals
    assert (second["run_utc"] >= first["run_utc"]).all()
    assert second["site"].unique().to_list() == ["plant"]
    assert second["site_name"].unique().to_list() == ["Synthetic plant"]
    assert second["tool_version"].unique().to_list() == [__import__("disagg").__version__]
    parts = sorted(p.relative_to(tmp_path / "hist").as_posix()
                   for p in (tmp_path / "hist").rglob("*.parquet"))
    assert parts == ["kind=breakdown/site=plant/period=2025-03/part.parquet",
                     "kind=breakdown/site=plant/period=2025-04/part.parquet"]


def test_rerunning_one_month_replaces_that_month_only(tmp_path):
    toml = _site(tmp_path)
    _breakdown(toml, tmp_path / "all")
    before = history.read_history(tmp_path / "hist")
    _breakdown(toml, tmp_path / "april", "--from", "2025-04-01", "--confidence", "0.9")
    after = history.read_history(tmp_path / "hist")
    march = pl.col("period") == "2025-03"
    assert_frame_equal(before.filter(march), after.filter(march), check_exact=True)
    april = after.filter(~march)
    assert_frame_equal(_stored_part(april).with_columns(pl.col("flags").fill_null("")),
                       _csv_part(tmp_path / "april" / "breakdown.csv"), rel_tol=1e-6,
                       abs_tol=1e-5)
    # The new April really differs (90 % intervals are narrower than 95 %).
    old_april = before.filter(~march)
    assert (april["kw_high"] - april["kw_low"] < old_april["kw_high"] - old_april["kw_low"]).any()


def test_each_month_is_stored_with_its_coverage(tmp_path):
    toml = _full_march_site(tmp_path)
    _breakdown(toml, tmp_path / "out")
    stored = history.read_history(tmp_path / "hist")
    coverage = stored.group_by("period", maintain_order=True).agg(
        pl.col(c).unique() for c in history.COVERAGE_COLUMNS)
    assert coverage.height == 2 and all(coverage[c].list.len().to_list() == [1, 1]
                                        for c in history.COVERAGE_COLUMNS)
    coverage = coverage.with_columns(pl.col(c).list.first() for c in history.COVERAGE_COLUMNS)
    # Intervals counted straight from the meter file (every interval is used here): March
    # has 31 x 96 - 4 (the hour skipped on 2025-03-09), April 14 x 96.
    meter = pl.read_csv(load_site(toml).meter.file)
    assert meter.height == 2972 + 1344
    assert coverage.rows() == [
        ("2025-03", 2972, 31, dt.date(2025, 3, 1), dt.date(2025, 3, 31)),
        ("2025-04", 1344, 14, dt.date(2025, 4, 1), dt.date(2025, 4, 14))]


def test_a_part_month_run_leaves_the_stored_whole_month_and_says_so(tmp_path):
    toml = _full_march_site(tmp_path)
    _breakdown(toml, tmp_path / "full")
    before = history.read_history(tmp_path / "hist")
    march = pl.col("period") == "2025-03"
    r = runner.invoke(app, ["breakdown", str(toml), "--out", str(tmp_path / "part"), "--from",
                            "2025-03-20", "--confidence", "0.9"])
    assert r.exit_code == 0, r.output
    notes = [line for line in r.stdout.splitlines() if line.startswith("Note: 2025-")]
    assert notes == [("Note: 2025-03 not stored in the history: --from 2025-03-20 is after its "
                      "first day, so this run has only part of the month (data on 12 days "
                      "(2025-03-20 to 2025-03-31)); a month is stored only from a run whose "
                      "range holds all of it, and any stored run of it is kept")]
    # With --json the note goes to stderr, so stdout stays one JSON document; --quiet: none.
    r = runner.invoke(app, ["breakdown", str(toml), "--out", str(tmp_path / "part_json"),
                            "--from", "2025-03-20", "--confidence", "0.9", "--json"])
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout)["first_period"] == "2025-03"
    assert r.stderr.splitlines() == notes
    r = runner.invoke(app, ["breakdown", str(toml), "--out", str(tmp_path / "part_quiet"),
                            "--from", "2025-03-20", "--confidence", "0.9", "--quiet"])
    assert r.exit_code == 0 and r.stdout == "" and r.stderr == ""
    after = history.read_history(tmp_path / "hist")
    assert_frame_equal(after.filter(march), before.filter(march), check_exact=True)
    # The whole March is what is stored: its kWh are the meter file's.
    metered = meter_months(toml).filter(march)["kwh"][0]
    assert after.filter(march)["kwh"].sum() == pytest.approx(metered, rel=1e-9)
    part = pl.read_csv(tmp_path / "part" / "breakdown.csv").filter(march)["kwh"].sum()
    assert part < 0.5 * metered  # the part-month run really differs
    # April lies wholly inside --from 2025-03-20..(no end) and is short only because the
    # data end: it is stored, from the new run (90 % intervals).
    april = after.filter(~march)
    assert_frame_equal(_stored_part(april).with_columns(pl.col("flags").fill_null("")),
                       _csv_part(tmp_path / "part" / "breakdown.csv")
                       .filter(pl.col("period") == "2025-04"), rel_tol=1e-6, abs_tol=1e-5)
    # --to cuts April short: in the library, the months left and why.
    result = breakdown_site(toml, None, dt.date(2025, 4, 10))
    stored = history.store_breakdown(tmp_path / "hist", result, None, dt.date(2025, 4, 10))
    assert [p.parent.name for p in stored.files] == ["period=2025-03"]
    assert stored.notes == [("2025-04 not stored in the history: --to 2025-04-10 is before its "
                             "last day, so this run has only part of the month (data on 10 days "
                             "(2025-04-01 to 2025-04-10)); a month is stored only from a run "
                             "whose range holds all of it, and any stored run of it is kept")]
    assert_frame_equal(history.read_history(tmp_path / "hist").filter(~march), april,
                       check_exact=True)


def test_data_holding_less_of_a_stored_month_do_not_replace_it(tmp_path):
    toml = _full_march_site(tmp_path)
    _breakdown(toml, tmp_path / "full")
    before = history.read_history(tmp_path / "hist")
    # The next export of the same site (same file name, same history folder) starts on
    # March 30 and has no --from: its March is short because its data start there.
    later = write_site_files(tmp_path / "later", "plant", 34, start=dt.date(2025, 3, 30),
                             days=20, history=str(tmp_path / "hist"))
    r = runner.invoke(app, ["breakdown", str(later), "--out", str(tmp_path / "later_out")])
    assert r.exit_code == 0, r.output
    march_dir = tmp_path / "hist" / "kind=breakdown" / "site=plant" / "period=2025-03"
    notes = [line for line in r.stdout.splitlines() if line.startswith("Note: 2025-")]
    assert notes == [("Note: 2025-03 not stored in the history: the stored run of this month "
                      "has data on 31 days (2025-03-01 to 2025-03-31), this run only on 2 days "
                      f"(2025-03-30 to 2025-03-31); the stored month is kept (delete "
                      f"{march_dir} to replace it)")]
    after = history.read_history(tmp_path / "hist")
    march = pl.col("period") == "2025-03"
    assert_frame_equal(after.filter(march), before.filter(march), check_exact=True)
    # April: 18 days now against 14 stored: replaced by the new run.
    assert after.filter(~march)["days_with_data"].unique().to_list() == [18]


def test_an_unwritable_history_folder_fails_before_any_output(tmp_path):
    (tmp_path / "blocker").write_text("a file where the history folder's parent should be")
    toml = write_site_files(tmp_path, "plant", 31, days=10, history="blocker/hist")
    for command in ("breakdown", "drift"):
        out = tmp_path / f"out_{command}"
        r = runner.invoke(app, [command, str(toml), "--out", str(out)])
        assert r.exit_code == 1
        assert r.stderr.splitlines() == [(f"Error: {tmp_path / 'blocker' / 'hist'}: cannot "
                                         "create the history folder (Not a directory)")]
        assert r.stdout == ""
        assert not out.exists()


def test_a_history_failing_after_the_outputs_says_they_were_written(tmp_path, monkeypatch):
    toml = _site(tmp_path)

    def full_disk(frame, path):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(history, "_write_part", full_disk)
    for command, written in (("breakdown", "breakdown.csv"), ("drift", "drift.csv")):
        out = tmp_path / f"out_{command}"
        r = runner.invoke(app, [command, str(toml), "--out", str(out)])
        assert r.exit_code == 1
        assert r.stderr.splitlines() == [(f"Error: {tmp_path / 'hist'}: cannot write the history "
                                         "(No space left on device); the outputs were written "
                                         f"in {out} but the history was not updated")]
        assert (out / written).exists()
    assert not list((tmp_path / "hist").rglob("*.parquet"))


def test_a_run_interrupted_while_writing_leaves_the_history_unchanged(tmp_path, monkeypatch):
    toml = _site(tmp_path)
    folder = tmp_path / "hist"
    history.store_breakdown(folder, breakdown_site(toml))
    before = history.read_history(folder)
    newer = breakdown_site(toml, confidence=0.8)

    real_write = history._write_part
    written = []

    def crash_after_first(frame, path):
        if written:
            raise RuntimeError("simulated crash")
        real_write(frame, path)
        written.append(path)

    monkeypatch.setattr(history, "_write_part", crash_after_first)
    with pytest.raises(RuntimeError, match="simulated crash"):
        history.store_breakdown(folder, newer)
    assert len(written) == 1
    # A process killed outright leaves its temporary folder behind: reading ignores it.
    stale = folder / ".disagg-tmp-killed"
    stale.mkdir()
    (stale / "0.parquet").write_bytes(b"PAR1 half a file")
    after = history.read_history(folder)
    assert_frame_equal(before, after, check_exact=True)
    assert [p.name for p in folder.iterdir() if p.name.startswith(".disagg-tmp-")] == [
        ".disagg-tmp-killed"]
    # Without the crash the same store does change the history: the check above can fail.
    monkeypatch.setattr(history, "_write_part", real_write)
    history.store_breakdown(folder, newer)
    changed = history.read_history(folder)
    assert changed.height == before.height
    assert not changed["kw_low"].equals(before["kw_low"])


def test_drift_runs_store_each_day_once_and_a_continued_run_adds_days(tmp_path):
    toml = _site(tmp_path)
    state = tmp_path / "state.json"
    for out in ("d1", "d2"):
        r = runner.invoke(app, ["drift", str(toml), "--out", str(tmp_path / out), "--to",
                                "2025-03-31", "--state", str(tmp_path / f"{out}.json")])
        assert r.exit_code == 0, r.output
    march = history.read_history(tmp_path / "hist", kind="drift")
    drift_csv = pl.read_csv(tmp_path / "d2" / "drift.csv", try_parse_dates=True)
    assert march.height == drift_csv.height
    assert march.select("date", "equipment").is_duplicated().sum() == 0
    assert march["period"].unique().to_list() == ["2025-03"]
    # Continue from the saved state: April's days are added, March's kept.
    (tmp_path / "d2.json").rename(state)
    r = runner.invoke(app, ["drift", str(toml), "--out", str(tmp_path / "d3"), "--state",
                            str(state)])
    assert r.exit_code == 0, r.output
    both = history.read_history(tmp_path / "hist", kind="drift")
    april_csv = pl.read_csv(tmp_path / "d3" / "drift.csv", try_parse_dates=True)
    assert both.height == march.height + april_csv.height
    assert both.select("date", "equipment").is_duplicated().sum() == 0
    assert_frame_equal(both.filter(pl.col("period") == "2025-03"), march, check_exact=True)
    stored_april = both.filter(pl.col("period") == "2025-04")
    assert stored_april["kw_tracked"].to_list() == pytest.approx(
        april_csv.filter(pl.col("date") >= STEP_ON)["kw_tracked"].to_list(), rel=1e-6)


# ---------------------------------------------------------------------------------------
# `disagg history`


@pytest.fixture(scope="module")
def stored(tmp_path_factory):
    root = tmp_path_factory.mktemp("history")
    toml = _site(root)
    _breakdown(toml, root / "out")
    return root, toml


def test_history_prints_each_equipment_month_by_month(stored):
    root, toml = stored
    r = runner.invoke(app, ["history", str(toml)])
    assert r.exit_code == 0, r.output
    lines = r.stdout.splitlines()
    assert lines[0] == (f"Synthetic plant (history id plant): 2 stored months, 2025-03 to "
                        f"2025-04, in {root / 'hist'}")
    bd = pl.read_csv(root / "out" / "breakdown.csv")
    h1 = bd.filter(pl.col("equipment") == "H-1")
    at = lines.index("H-1")
    assert lines[at + 1].split()[:2] == ["period", "kWh"]
    for k, row in enumerate(h1.iter_rows(named=True)):
        fields = lines[at + 2 + k].split()
        assert fields[0] == row["period"]
        assert fields[1] == f"{row['kwh']:,.0f}"
        assert fields[2] == f"{row['kwh_low']:,.0f}-{row['kwh_high']:,.0f}"
        assert fields[3] == f"{row['kw']:,.1f}"
        assert fields[6] == {"2025-03": "15", "2025-04": "13"}[row["period"]]  # days with data
    assert lines[-1].startswith("Caution: Estimates are not measurements.")


def test_history_of_one_equipment_to_csv(stored, tmp_path):
    root, toml = stored
    out = tmp_path / "h1.csv"
    r = runner.invoke(app, ["history", str(toml), "--equipment", "H-1", "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert r.stdout == f"Wrote {out}\n"
    written = pl.read_csv(out, try_parse_dates=True)
    assert written["equipment"].unique().to_list() == ["H-1"]
    assert written["period"].to_list() == ["2025-03", "2025-04"]
    bd = pl.read_csv(root / "out" / "breakdown.csv").filter(pl.col("equipment") == "H-1")
    assert written["kwh"].to_list() == pytest.approx(bd["kwh"].to_list(), rel=1e-6)
    assert written["kw"].to_list() == pytest.approx(bd["kw"].to_list(), rel=1e-6)


def test_history_errors_are_one_line(stored, tmp_path):
    root, toml = stored
    r = runner.invoke(app, ["history", str(toml), "--equipment", "XX-9"])
    assert r.exit_code == 1
    known = history.read_history(root / "hist")["equipment"].unique(maintain_order=True)
    assert r.stderr.splitlines() == [(f"Error: --equipment 'XX-9': no stored rows of it; "
                                     f"stored: {', '.join(known)}")]
    folder = tmp_path / "a_folder"
    folder.mkdir()
    r = runner.invoke(app, ["history", str(toml), "--out", str(folder)])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [(f"Error: --out {folder}: {folder} is a folder; give a CSV "
                                     f"file name such as {folder / 'history.csv'}")]
    bare = tmp_path / "bare.toml"
    bare.write_text(toml.read_text().replace('[history]\nfolder = "hist"\n', ""))
    r = runner.invoke(app, ["history", str(bare)])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [(f"Error: {bare}: no [history] folder; add [history] "
                                     "folder = \"history\" to the site file or give --folder")]
    r = runner.invoke(app, ["history", str(bare), "--folder", str(root / "hist")])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [(f"Error: {root / 'hist'}: no stored breakdown of site "
                                     "'bare'; run disagg breakdown or batch with this history "
                                     "folder set")]


# ---------------------------------------------------------------------------------------
# Comparing stored months


def test_compare_from_history_finds_the_step_and_agrees_with_a_refit(stored, tmp_path):
    root, toml = stored
    result = history.compare_from_history(root / "hist", "plant", ("2025-03", "2025-03"),
                                          ("2025-04", "2025-04"))
    rows = {r["equipment"]: r for r in result.table.iter_rows(named=True)}
    h1 = rows["H-1"]
    assert h1["verdict"] == "rising"
    # Two weeks of data per month fit each draw to about 2 %, so the ratio to about 4 %.
    assert h1["change"] == pytest.approx(TRUE_H1_KW[1] / TRUE_H1_KW[0] - 1, abs=0.05)
    # Steady truth: no false change; with the shared rule (two one-sided tests) the stored
    # intervals show it inside +-5 %.
    assert rows["CH-1"]["verdict"] == "steady"
    assert rows["CH-1"]["change"] == pytest.approx(0.0, abs=0.04)
    # Each period here is one whole stored month, fitted on its own: the exact method (a
    # refit of each period's data) gives the same draws up to the baseload form: the stored
    # month used its range's form and noise ratio, the refit chooses its own (on 2026-12-04
    # at most 0.9 % apart, P-1; the draws themselves are known to about 2 %, see above).
    r = runner.invoke(app, ["compare", str(toml), "--before", "2025-03-17:2025-03-31",
                            "--after", "2025-04-01:2025-04-13", "--out", str(tmp_path / "c")])
    assert r.exit_code == 0, r.output
    exact = {e["equipment"]: e for e in pl.read_csv(tmp_path / "c" / "compare.csv")
             .iter_rows(named=True)}
    for eq, row in rows.items():
        assert row["kw_before"] == pytest.approx(exact[eq]["kw_before"], rel=0.02), eq
        assert row["kw_after"] == pytest.approx(exact[eq]["kw_after"], rel=0.02), eq
    assert exact["H-1"]["verdict"] == "rising"


def test_history_command_compares_stored_months(stored):
    _, toml = stored
    r = runner.invoke(app, ["history", str(toml), "--before", "2025-03", "--after",
                            "2025-04:2025-04"])
    assert r.exit_code == 0, r.output
    lines = r.stdout.splitlines()
    assert lines[0] == ("Draws from stored months: before 2025-03 to 2025-03 (1 stored), "
                        "after 2025-04 to 2025-04 (1 stored)")
    h1 = next(line for line in lines if line.startswith("H-1 "))
    assert h1.split()[-1] == "rising"
    assert any(line.startswith("Method: from stored monthly draws, no refit") for line in lines)
    r = runner.invoke(app, ["history", str(toml), "--before", "2025-3"])
    assert r.stderr.splitlines() == [("Error: --before and --after: give both to compare stored "
                                     "months")]
    r = runner.invoke(app, ["history", str(toml), "--before", "2025-3", "--after", "2025-04"])
    assert r.stderr.splitlines() == [("Error: --before '2025-3': expected months FROM:TO such as "
                                     "2025-01:2025-03, or one month such as 2025-06")]
    r = runner.invoke(app, ["history", str(toml), "--before", "2024-01", "--after", "2025-04"])
    assert r.exit_code == 1
    assert "no stored breakdown of site 'plant' from 2024-01 to 2024-01" in r.stderr


# ---------------------------------------------------------------------------------------
# Settings and ids


def test_history_table_in_the_site_file(tmp_path):
    toml = _site(tmp_path)
    assert load_site(toml).history == (tmp_path / "hist").resolve()
    toml.write_text(toml.read_text().replace('folder = "hist"', 'folder = "hist"\nkeep = 3'))
    with pytest.raises(ConfigError) as err:
        load_site(toml)
    assert str(err.value) == f"{toml}: [history] keep: unknown setting; expected one of folder"


@pytest.mark.parametrize("name, expected", [
    ("Main Library.toml", "Main_Library"), ("north-wing.v2.toml", "north-wing.v2"),
    ("Ünïcode bâtiment.toml", "_n_code_b_timent"), ("..toml", "site"),
])
def test_site_ids_are_filesystem_safe(name, expected):
    assert history.site_id(Path("/x") / name) == expected


def test_reading_an_empty_store_gives_no_rows_with_the_columns(tmp_path):
    frame = history.read_history(tmp_path / "nothing", kind="drift")
    assert frame.is_empty()
    assert frame.columns == ["site", "period", *history.DRIFT_SCHEMA]


def test_compare_takes_its_periods_from_history(stored, tmp_path):
    # The same stored months as `disagg history --before/--after`, through `disagg compare`.
    _, toml = stored
    r = runner.invoke(app, ["compare", str(toml), "--before", "2025-03", "--after", "2025-04",
                            "--out", str(tmp_path / "cmp"), "--from-history"])
    assert r.exit_code == 0, r.output
    assert r.stdout.splitlines()[0] == ("Draws from stored months: before 2025-03 to 2025-03 "
                                        "(1 stored), after 2025-04 to 2025-04 (1 stored)")
    table = pl.read_csv(tmp_path / "cmp" / "compare.csv")
    same = runner.invoke(app, ["history", str(toml), "--before", "2025-03", "--after",
                               "2025-04", "--out", str(tmp_path / "h.csv")])
    assert same.exit_code == 0, same.output
    assert_frame_equal(table, pl.read_csv(tmp_path / "h.csv"))
    assert table.filter(pl.col("equipment") == "H-1")["verdict"][0] == "rising"
    r = runner.invoke(app, ["compare", str(toml), "--before", "2025-03-01:2025-03-31",
                            "--after", "2025-04", "--out", str(tmp_path / "x"),
                            "--from-history"])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [("Error: --before '2025-03-01:2025-03-31': expected months "
                                      "FROM:TO such as 2025-01:2025-03, or one month such as "
                                      "2025-06")]
    assert not (tmp_path / "x").exists()


def test_compare_and_history_give_the_same_verdict_on_the_same_numbers(stored):
    # One rule (disagg.analyses.verdict): history's period figures fed to compare's rule as
    # estimates with those draws and intervals (critical value: the normal 97.5 % point, the
    # level history assumes for stored intervals) give the same verdict, row by row.
    from scipy.special import ndtri

    from disagg.analyses.compare import compare_estimates
    from test_compare import _est
    z = float(ndtri(0.975))

    def via_compare(kb, lb, hb, ka, la, ha, min_change):
        # se_kw 0: compare then takes the interval's larger half over the critical value.
        before = _est([("X", kb, 0.0, [])], critical=z, half={"X": max(hb - kb, kb - lb)})
        after = _est([("X", ka, 0.0, [])], critical=z, half={"X": max(ha - ka, ka - la)})
        return compare_estimates(before, after, 0.95, min_change)[0]["verdict"][0]

    root, _ = stored
    result = history.compare_from_history(root / "hist", "plant", ("2025-03", "2025-03"),
                                          ("2025-04", "2025-04"))
    seen = set()
    for r in result.table.iter_rows(named=True):
        if r["verdict"] == "missing":
            continue
        seen.add(r["verdict"])
        assert via_compare(r["kw_before"], r["kw_before_low"], r["kw_before_high"],
                           r["kw_after"], r["kw_after_low"], r["kw_after_high"],
                           0.05) == r["verdict"]
    assert {"rising", "steady"} <= seen
    # A sweep of made-up numbers crossing every verdict.
    verdicts = set()
    for ka in np.linspace(8.0, 12.0, 33):
        for half in (0.05, 0.3, 1.5):
            args = (10.0, 10.0 - 0.2, 10.0 + 0.2, ka, ka - half, ka + half)
            v = history.period_verdict(*args, min_change=0.05)["verdict"]
            assert via_compare(*args, 0.05) == v, (ka, half)
            verdicts.add(v)
    assert verdicts == {"rising", "falling", "steady", "unclear"}


def test_a_stored_draw_the_data_cannot_pin_down_is_unclear_as_in_compare(stored, tmp_path):
    # A copy of the store with H-1's April month flagged inseparable from C-1 (as the
    # breakdown flags a load it cannot tell apart from another that has a prior).
    import shutil
    root, _ = stored
    copy = tmp_path / "hist"
    shutil.copytree(root / "hist", copy)
    part = next(copy.glob("kind=breakdown/site=plant/period=2025-04/*.parquet"))
    frame = pl.read_parquet(part)
    frame = frame.with_columns(pl.when(pl.col("equipment") == "H-1")
                               .then(pl.lit("inseparable:C-1")).otherwise(pl.col("flags"))
                               .alias("flags"))
    frame.write_parquet(part)
    before = history.compare_from_history(root / "hist", "plant", ("2025-03", "2025-03"),
                                          ("2025-04", "2025-04"))
    after = history.compare_from_history(copy, "plant", ("2025-03", "2025-03"),
                                         ("2025-04", "2025-04"))
    verdict = {r["equipment"]: r["verdict"] for r in after.table.iter_rows(named=True)}
    assert dict(zip(before.table["equipment"], before.table["verdict"]))["H-1"] == "rising"
    assert verdict["H-1"] == "unclear"
    # compare's rule says the same on an estimate with that flag.
    from disagg.analyses.compare import compare_estimates
    from test_compare import _est
    row = after.table.filter(pl.col("equipment") == "H-1").row(0, named=True)
    t, _ = compare_estimates(_est([("H-1", row["kw_before"], 0.01, [])]),
                             _est([("H-1", row["kw_after"], 0.01, ["inseparable:C-1"])]))
    assert t["verdict"][0] == "unclear"
