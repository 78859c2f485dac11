"""`disagg batch` and disagg.portfolio: many sites in parallel processes, failure isolation,
the portfolio table.

All data invented: the sites are tests/synthetic.py buildings (five on-off loads with seeded
random schedules, an occupied/unoccupied baseload, small meter noise), written to disk as a
meter CSV, an events run log and a site TOML by write_site_files below (also used by
test_history.py and test_cluster.py).
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from polars.testing import assert_frame_equal
from synthetic import SPELLS, TZ, make_building
from typer.testing import CliRunner

from disagg.cli import app
from disagg.config import load_site
from disagg.errors import ConfigError
from disagg.portfolio import SiteOutcome, load_portfolio, portfolio_frame, run_portfolio

runner = CliRunner()
START = dt.date(2025, 3, 17)  # a Monday; 28 days cross into April (no DST change in range)
DAYS = 28
BAD_ROW = 40  # 1-based line of the meter CSV that the broken site gets wrong


def write_site_files(folder: Path, stem: str, seed: int, *, days: int = DAYS,
                     start: dt.date = START, drop: tuple[str, ...] = (),
                     step: tuple[str, float] | None = None, step_on: dt.date | None = None,
                     data_dir: Path | None = None, history: str | None = None) -> Path:
    """Write a synthetic building's meter CSV, events run log and `<stem>.toml` into folder.

    Args:
        drop: equipment ids left out of the site file and the run log (their energy stays in
            the meter, so it shows as baseload or unexplained: a site with fewer logged loads).
        step, step_on: see synthetic.make_building (a draw that changes on a date).
        data_dir: folder for the meter and log files (default: folder); the TOML names them
            by absolute path.
        history: the [history] folder, as written in the TOML.

    Returns:
        The site TOML's path.
    """
    s = make_building(seed, days=days, start=start, step=step, step_on=step_on)
    data_dir = (data_dir or folder) / stem
    data_dir.mkdir(parents=True, exist_ok=True)
    frame = s.aligned.frame
    fmt = "%Y-%m-%dT%H:%M:%S%:z"
    pl.DataFrame({
        "end": frame["end_utc"].dt.convert_time_zone(TZ).dt.to_string(fmt),
        "kwh": np.round(frame["energy_kwh"].to_numpy(), 4),
    }).write_csv(data_dir / "meter.csv")
    times = frame["start_utc"].dt.convert_time_zone(TZ).dt.to_string(fmt).to_list()
    end = frame["end_utc"].dt.convert_time_zone(TZ).dt.to_string(fmt)[-1]
    rows = []
    for j, eq in enumerate(s.aligned.equipment_ids):
        if eq in drop:
            continue
        on = s.aligned.hours[:, j] > 0
        change = np.flatnonzero(np.r_[True, on[1:] != on[:-1]])
        rows += [(times[k], eq, "on" if on[k] else "off") for k in change]
        rows.append((end, eq, "on" if on[-1] else "off"))  # the log's last time
    pl.DataFrame(rows, schema=["time", "point", "state"], orient="row").write_csv(
        data_dir / "runlog.csv")
    equipment = "\n".join(f'[[equipment]]\nid = "{e}"\n' for e in s.aligned.equipment_ids
                          if e not in drop)
    spells = ", ".join(f'"{x}"' for x in SPELLS)
    hist = f'\n[history]\nfolder = "{history}"\n' if history else ""
    toml = folder / f"{stem}.toml"
    folder.mkdir(parents=True, exist_ok=True)
    toml.write_text(f'''[site]
name = "Synthetic {stem}"
timezone = "{TZ}"

[meter]
file = "{(data_dir / 'meter.csv').as_posix()}"
time_column = "end"
value_column = "kwh"
unit = "kWh"
stamp = "end"

[runlog]
file = "{(data_dir / 'runlog.csv').as_posix()}"
layout = "events"
time_column = "time"
equipment_column = "point"
state_column = "state"

[baseload]
profile = "occupied"
occupied = [{spells}]
{hist}
{equipment}''', encoding="utf-8")
    return toml


def break_meter(toml: Path) -> None:
    """Put text where a number belongs on line BAD_ROW of the site's meter CSV."""
    meter = load_site(toml).meter.file
    lines = meter.read_text(encoding="utf-8").splitlines()
    lines[BAD_ROW - 1] = lines[BAD_ROW - 1].split(",")[0] + ",twelve"
    meter.write_text("\n".join(lines) + "\n", encoding="utf-8")


def _single_run(toml: Path, out: Path) -> tuple[int, str]:
    """`disagg breakdown` of one site: (exit code, stderr)."""
    r = runner.invoke(app, ["breakdown", str(toml), "--out", str(out), "--quiet"])
    return r.exit_code, r.stderr


# ---------------------------------------------------------------------------------------
# A folder portfolio with one broken site


@pytest.fixture(scope="module")
def folder_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("portfolio")
    sites = root / "sites"
    tomls = {stem: write_site_files(sites, stem, seed, data_dir=root / "data")
             for stem, seed in (("alpha", 1), ("bravo", 2), ("charlie", 3))}
    break_meter(tomls["bravo"])
    out = root / "out"
    result = runner.invoke(app, ["batch", str(sites), "--out", str(out), "--workers", "2"])
    return root, tomls, out, result


def test_batch_exits_1_and_reports_only_the_broken_site(folder_run):
    root, tomls, _out, result = folder_run
    assert result.exit_code == 1, result.output
    code, single_err = _single_run(tomls["bravo"], root / "single_bravo")
    assert code == 1
    message = single_err.strip().removeprefix("Error: ")
    assert "meter.csv" in message and str(BAD_ROW) in message  # names the file and the row
    # The same error `disagg breakdown` gives, after the site file's path; one line.
    assert result.stderr.splitlines() == [f"Error: {tomls['bravo']}: {message}"]


def test_the_other_sites_finish_with_the_same_files_as_a_single_run(folder_run):
    root, tomls, out, _ = folder_run
    for stem in ("alpha", "charlie"):
        single = root / f"single_{stem}"
        assert _single_run(tomls[stem], single)[0] == 0
        for name in ("breakdown.csv", "fit.json"):
            assert (out / stem / name).read_bytes() == (single / name).read_bytes(), (stem, name)
    assert not (out / "bravo").exists()  # nothing written for the failed site


def test_portfolio_csv_has_a_row_per_site_with_status_and_error(folder_run):
    root, tomls, out, _ = folder_run
    table = pl.read_csv(out / "portfolio.csv", infer_schema_length=0)
    assert table["site_file"].to_list() == [str(tomls[s]) for s in ("alpha", "bravo", "charlie")]
    assert table["status"].to_list() == ["ok", "failed", "ok"]
    _, err = _single_run(tomls["bravo"], root / "single_bravo_2")
    assert table["error"].to_list() == [None, err.strip().removeprefix("Error: "), None]
    assert table["site"].to_list() == ["Synthetic alpha", "Synthetic bravo", "Synthetic charlie"]
    failed = table.row(1, named=True)
    assert failed["period"] is None and failed["metered_kwh"] is None


def test_portfolio_kwh_columns_are_the_breakdown_sums(folder_run):
    _, tomls, out, _ = folder_run
    table = pl.read_csv(out / "portfolio.csv")
    kwh_cols = [c for c in table.columns if c.endswith("_kwh") and c != "metered_kwh"]
    # Baseload rows (F-1 follows the occupied schedule, so it may be folded into one) and
    # the unexplained row come last.
    assert kwh_cols[-1] == "unexplained_kwh" and kwh_cols[-2].startswith("baseload")
    for i, stem in ((0, "alpha"), (2, "charlie")):
        row = table.row(i, named=True)
        bd = pl.read_csv(out / stem / "breakdown.csv")
        sums = dict(bd.group_by("equipment").agg(pl.col("kwh").sum()).iter_rows())
        assert {c.removesuffix("_kwh") for c in kwh_cols if row[c] is not None} == set(sums)
        for e, kwh in sums.items():
            assert row[f"{e}_kwh"] == pytest.approx(kwh, rel=1e-6, abs=1e-4)
        # The breakdown adds up to the meter: every interval of these sites is usable.
        metered = pl.read_csv(load_site(tomls[stem]).meter.file)["kwh"]
        assert row["metered_kwh"] == pytest.approx(metered.sum(), rel=1e-9)
        assert row["period"] == "2025-03..2025-04"
        fit = json.loads((out / stem / "fit.json").read_text())
        assert row["hourly_cv_rmse_pct"] == pytest.approx(
            fit["fit_quality"]["hourly"]["cv_rmse_pct"], rel=1e-5)
        assert row["alarms"] is None  # drift not asked for


def test_batch_prints_the_summary_with_caution(folder_run):
    _, _, _out, result = folder_run
    lines = result.stdout.splitlines()
    assert lines[0].endswith("3 sites, 2 ok, 1 failed" + lines[0].split("failed")[1])
    assert any(line.startswith("Synthetic bravo") and line.endswith("failed") for line in lines)
    assert ("Caution: Estimates are not measurements. Any work on electrical equipment must "
            "follow local codes and be done by licensed, qualified people.") in lines


# ---------------------------------------------------------------------------------------
# A portfolio file, sites with different equipment, drift, progress


def test_portfolio_file_with_different_equipment_and_drift(tmp_path):
    a = write_site_files(tmp_path / "north", "north", 4)
    b = write_site_files(tmp_path / "south", "south", 5, drop=("H-1",))
    pf = tmp_path / "estate.toml"
    pf.write_text('[portfolio]\nsites = ["north/north.toml", "south/south.toml"]\n'
                  'history = "hist"\n', encoding="utf-8")
    calls = []
    result = run_portfolio(pf, tmp_path / "out", workers=1, drift=True,
                           progress=lambda *a: calls.append(a))
    assert [o.status for o in result.outcomes] == ["ok", "ok"], result.outcomes
    assert calls[0] == ("sites", 0, 2) and calls[-1] == ("sites", 2, 2)
    frame = result.frame
    assert frame["site_file"].to_list() == [str(a), str(b)]
    # H-1 is logged at north only: south's column is null, and its energy is in south's
    # baseload and unexplained rows.
    assert frame["H-1_kwh"][0] > 0 and frame["H-1_kwh"][1] is None
    for i, stem in enumerate(("north", "south")):
        # Alarms as `disagg drift` with its defaults counts them.
        single = tmp_path / f"drift_{stem}"
        r = runner.invoke(app, ["drift", str(tmp_path / stem / f"{stem}.toml"), "--out",
                                str(single)])
        assert r.exit_code == 0, r.output
        alarms = json.loads((single / "drift.json").read_text())["alarms"]
        assert frame["alarms"][i] == len(alarms)
        assert (tmp_path / "out" / stem / "drift.csv").read_bytes() == \
            (single / "drift.csv").read_bytes()
    # The portfolio's history folder got both sites, both kinds.
    from disagg.history import read_history

    assert sorted(read_history(tmp_path / "hist")["site"].unique()) == ["north", "south"]
    assert sorted(read_history(tmp_path / "hist", kind="drift")["site"].unique()) == [
        "north", "south"]


def test_one_worker_and_two_workers_give_the_same_table(tmp_path):
    sites = tmp_path / "sites"
    for stem, seed in (("one", 6), ("two", 7), ("three", 8)):
        write_site_files(sites, stem, seed, days=10, data_dir=tmp_path / "data")
    r1 = run_portfolio(sites, tmp_path / "out1", workers=1)
    r2 = run_portfolio(sites, tmp_path / "out2", workers=2)
    assert_frame_equal(r1.frame, r2.frame, check_exact=True)
    assert r1.frame["site_file"].to_list() == sorted(r1.frame["site_file"].to_list())


# ---------------------------------------------------------------------------------------
# The portfolio table and bad portfolios


def test_portfolio_frame_orders_rows_last_and_leaves_missing_equipment_null():
    a = SiteOutcome("/a.toml", "a", "ok", "A", None, "2025-01..2025-02", 10.0,
                    {"X": 4.0, "baseload": 5.0, "unexplained": 1.0}, 2, 3.0, 0.1)
    b = SiteOutcome("/b.toml", "b", "ok", "B", None, "2025-01..2025-01", 8.0,
                    {"Y": 2.0, "baseload+Z": 6.0, "unexplained": 0.0}, None, 4.0, 0.2)
    c = SiteOutcome("/c.toml", "c", "failed", None, "bad row")
    frame = portfolio_frame([a, b, c])
    assert frame.columns == ["site", "site_file", "period", "metered_kwh", "X_kwh", "Y_kwh",
                             "baseload_kwh", "baseload+Z_kwh", "unexplained_kwh", "alarms",
                             "hourly_cv_rmse_pct", "hourly_nmbe_pct", "status", "error"]
    assert frame["X_kwh"].to_list() == [4.0, None, None]
    assert frame["baseload+Z_kwh"].to_list() == [None, 6.0, None]
    assert frame["status"].to_list() == ["ok", "ok", "failed"]
    assert frame["error"].to_list() == [None, None, "bad row"]


def test_site_names_that_look_like_formulas_are_neutralised(tmp_path):
    toml = write_site_files(tmp_path / "sites", "eq", 9, days=10, data_dir=tmp_path / "data")
    text = toml.read_text(encoding="utf-8").replace('name = "Synthetic eq"',
                                                    'name = "=HYPERLINK(1)"')
    toml.write_text(text, encoding="utf-8")
    r = runner.invoke(app, ["batch", str(tmp_path / "sites"), "--out", str(tmp_path / "out"),
                            "--quiet", "--workers", "1"])
    assert r.exit_code == 0, r.output
    assert r.stdout == ""  # --quiet: nothing but errors
    site = pl.read_csv(tmp_path / "out" / "portfolio.csv")["site"][0]
    assert site == "'=HYPERLINK(1)"


def test_two_listed_sites_with_one_file_name_are_refused(tmp_path):
    write_site_files(tmp_path / "x", "site", 1, days=8)
    write_site_files(tmp_path / "y", "site", 2, days=8)
    pf = tmp_path / "p.toml"
    pf.write_text('[portfolio]\nsites = ["x/site.toml", "y/site.toml"]\n', encoding="utf-8")
    r = runner.invoke(app, ["batch", str(pf), "--out", str(tmp_path / "out")])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [
        (f"Error: {pf}: {tmp_path / 'x' / 'site.toml'} and {tmp_path / 'y' / 'site.toml'} would "
        "both write to the output folder 'site'; give the site files different names")]
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("text, expected", [
    ('[site]\nname = "x"\n', ("expected only a [portfolio] table with sites = "
                             "[\"site.toml\", ...]; this looks like a site file: run it with "
                             "disagg breakdown")),
    ('[portfolio]\nsites = []\n', ("[portfolio] sites = []: expected a list of site files such "
                                  "as [\"north-wing.toml\"]")),
    ('[portfolio]\nsites = ["a.toml"]\nworkers = 3\n',
     "[portfolio] workers: unknown setting; expected one of history, sites"),
])
def test_bad_portfolio_files_name_the_problem(tmp_path, text, expected):
    pf = tmp_path / "p.toml"
    pf.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as err:
        load_portfolio(pf)
    assert str(err.value) == f"{pf}: {expected}"


def test_an_empty_folder_and_bad_worker_counts_are_errors(tmp_path):
    r = runner.invoke(app, ["batch", str(tmp_path), "--out", str(tmp_path / "out")])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [f"Error: {tmp_path}: no *.toml site files in this folder"]
    write_site_files(tmp_path, "one", 1, days=8)
    r = runner.invoke(app, ["batch", str(tmp_path), "--out", str(tmp_path / "out"),
                            "--workers", "0"])
    assert r.stderr.splitlines() == ["Error: --workers 0: expected 1 or more"]
    r = runner.invoke(app, ["batch", str(tmp_path), "--out", str(tmp_path / "out"),
                            "--workers", "2", "--cluster", "tcp://127.0.0.1:1"])
    assert r.stderr.splitlines() == [("Error: --workers and --cluster: the cluster's workers "
                                     "run the sites; give one of the two")]
    assert not (tmp_path / "out").exists()
