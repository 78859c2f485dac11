"""`disagg batch` and disagg.jobs.batch: many sites in parallel processes, failure isolation,
the portfolio table.

All data invented: the sites are tests/synthetic.py buildings (five on-off loads with seeded
random schedules, an occupied/unoccupied baseload, small meter noise), written to disk as a
meter CSV, an events run log and a site TOML by write_site_files below (also used by
test_history.py and test_cluster.py).
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
from sitefiles import write_site_toml
from synthetic import SPELLS, TZ, make_building
from typer.testing import CliRunner

from disagg.cli import app
from disagg.errors import ConfigError
from disagg.inputs.config import load_site
from disagg.jobs import batch as portfolio
from disagg.jobs.batch import (
    Portfolio,
    PortfolioResult,
    SiteJob,
    SiteOutcome,
    load_portfolio,
    portfolio_frame,
    run_portfolio,
    run_site,
)
from disagg.present import history
from disagg.present.terminal import DRIFT_NOT_RUN, portfolio_summary

runner = CliRunner()
START = dt.date(2025, 3, 17)  # a Monday; 28 days cross into April (no DST change in range)
DAYS = 28
BAD_ROW = 40  # 1-based line of the meter CSV that the broken site gets wrong
INTERVAL_H = 0.25  # the synthetic meters' 15-minute intervals [h]


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
    return write_site_toml(
        folder / f"{stem}.toml", name=f"Synthetic {stem}", timezone=TZ,
        meter_file=data_dir / "meter.csv", runlog_file=data_dir / "runlog.csv",
        profile="occupied", occupied=SPELLS, history=history,
        equipment=[e for e in s.aligned.equipment_ids if e not in drop])


def break_meter(toml: Path) -> None:
    """Put text where a number belongs on line BAD_ROW of the site's meter CSV."""
    meter = load_site(toml).meter.file
    lines = meter.read_text(encoding="utf-8").splitlines()
    lines[BAD_ROW - 1] = lines[BAD_ROW - 1].split(",")[0] + ",twelve"
    meter.write_text("\n".join(lines) + "\n", encoding="utf-8")


def add_flat_tariff(toml: Path, currency: str, energy_price: float, demand_price: float) -> None:
    """Append a [tariff] with one energy price [per kWh] and a demand price [per kW]."""
    with toml.open("a", encoding="utf-8") as f:
        f.write(f'\n[tariff]\ncurrency = "{currency}"\nenergy_price = {energy_price}\n'
                f"demand_price = {demand_price}\n")


def meter_months(toml: Path) -> pl.DataFrame:
    """Straight from the site's meter CSV: per local month (of each interval's start), the
    kWh and the highest interval demand [kW]."""
    meter = pl.read_csv(load_site(toml).meter.file)
    start = (pl.col("end").str.to_datetime("%Y-%m-%dT%H:%M:%S%:z")
             .dt.convert_time_zone(TZ) - pl.duration(minutes=15))
    return (meter.with_columns(start.dt.strftime("%Y-%m").alias("period"))
            .group_by("period").agg(pl.col("kwh").sum(),
                                    (pl.col("kwh").max() / INTERVAL_H).alias("peak_kw"))
            .sort("period"))


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
        # The highest interval demand of the meter file (every interval is used here).
        assert row["peak_kw"] == pytest.approx(meter_months(tomls[stem])["peak_kw"].max(),
                                               rel=1e-9)
        assert row["cost"] is None and row["currency"] is None  # no [tariff]
        # Drift not asked for: no alarm count, and the note says why.
        assert row["alarms"] is None and row["alarm_equipment"] is None
        assert row["drift_note"] == DRIFT_NOT_RUN


def test_batch_prints_the_summary_with_caution(folder_run):
    _, _, _out, result = folder_run
    lines = result.stdout.splitlines()
    assert lines[0].endswith("3 sites, 2 ok, 1 failed" + lines[0].split("failed")[1])
    # Each site's line starts with its file name, then its [site] name.
    for stem, status in (("alpha", "ok"), ("bravo", "failed"), ("charlie", "ok")):
        line = next(x for x in lines if x.startswith(f"{stem} "))
        assert line.split()[1:3] == ["Synthetic", stem] and line.endswith(status)
    assert "alarms: drift not tracked (add --drift to count drift alarms)" in lines
    assert ("Caution: Estimates are not measurements. Any work on electrical equipment must "
            "follow local codes and be done by licensed, qualified people.") in lines


def test_the_summary_tells_sites_of_one_name_apart_by_file():
    outcomes = [SiteOutcome(f"/p/{stem}.toml", stem, "ok", "Main Library", None,
                            "2025-01..2025-01", 100.0 * i, {"X": 1.0}, None, 5.0, 0.1,
                            peak_kw=12.5, cost=1234.5, currency="EUR",
                            drift_note=DRIFT_NOT_RUN)
                for i, stem in enumerate(("north", "south", "east", "west"), start=1)]
    text = portfolio_summary(PortfolioResult(Portfolio(Path("/p"), ()), pl.DataFrame(),
                                             outcomes))
    rows = [line.split() for line in text.splitlines()
            if line.split()[:1] in (["north"], ["south"], ["east"], ["west"])]
    assert [r[:3] for r in rows] == [[s, "Main", "Library"]
                                     for s in ("north", "south", "east", "west")]
    assert [r[4] for r in rows] == ["100", "200", "300", "400"]  # metered kWh
    assert rows[0][5:8] == ["12.5", "1,234", "EUR"]  # peak kW, cost and its currency


# ---------------------------------------------------------------------------------------
# A portfolio file, sites with different equipment, drift, progress


def test_portfolio_file_with_different_equipment_cost_and_drift(tmp_path):
    # north: H-1's draw rises 50 % on 2025-04-01; south: no H-1 logged, steady, a tariff.
    a = write_site_files(tmp_path / "north", "north", 4, step=("H-1", 1.5),
                         step_on=dt.date(2025, 4, 1))
    b = write_site_files(tmp_path / "south", "south", 5, drop=("H-1",))
    add_flat_tariff(b, "EUR", 0.2, 10.0)
    pf = tmp_path / "estate.toml"
    pf.write_text('[portfolio]\nsites = ["north/north.toml", "south/south.toml"]\n'
                  'history = "hist"\n', encoding="utf-8")
    reference = "2025-03-17:2025-03-28"  # then 16 days tracked, 13 of them after the step
    calls = []
    result = run_portfolio(pf, tmp_path / "out", workers=1, drift=True,
                           progress=lambda *a: calls.append(a),
                           drift_reference=(dt.date(2025, 3, 17), dt.date(2025, 3, 28)))
    assert [o.status for o in result.outcomes] == ["ok", "ok"], result.outcomes
    assert calls[0] == ("sites", 0, 2) and calls[-1] == ("sites", 2, 2)
    frame = result.frame
    assert frame["site_file"].to_list() == [str(a), str(b)]
    # H-1 is logged at north only: south's column is null, and its energy is in south's
    # baseload and unexplained rows.
    assert frame["H-1_kwh"][0] > 0 and frame["H-1_kwh"][1] is None
    for i, stem in enumerate(("north", "south")):
        # Alarms as `disagg drift` with the same reference counts them.
        single = tmp_path / f"drift_{stem}"
        r = runner.invoke(app, ["drift", str(tmp_path / stem / f"{stem}.toml"), "--out",
                                str(single), "--reference", reference])
        assert r.exit_code == 0, r.output
        alarms = json.loads((single / "drift.json").read_text())["alarms"]
        assert frame["alarms"][i] == len(alarms)
        assert frame["alarm_equipment"][i] == ";".join(x["equipment"] for x in alarms)
        assert frame["drift_note"][i] == ("16 days tracked after the reference period "
                                          "2025-03-17 to 2025-03-28")
        # Output folders follow the site's path in the portfolio: north/north.toml -> north/north.
        assert (tmp_path / "out" / stem / stem / "drift.csv").read_bytes() == \
            (single / "drift.csv").read_bytes()
    # The real step is found at north, and nothing at the steady south.
    assert frame["alarms"].to_list() == [1, 0]
    assert frame["alarm_equipment"].to_list() == ["H-1", ""]
    # Cost: south's flat tariff applied to its meter file directly: energy price x kWh plus
    # demand price x each month's highest interval demand.
    months = meter_months(b)
    assert frame["currency"].to_list() == [None, "EUR"]
    assert frame["cost"][0] is None
    assert frame["cost"][1] == pytest.approx(0.2 * months["kwh"].sum()
                                             + 10.0 * months["peak_kw"].sum(), rel=1e-9)
    assert frame["peak_kw"][1] == pytest.approx(months["peak_kw"].max(), rel=1e-9)
    fit = json.loads((tmp_path / "out" / "south" / "south" / "fit.json").read_text())
    assert frame["peak_kw"][1] == pytest.approx(max(m["peak_kw"]
                                                    for m in fit["tariff"]["months"]), rel=1e-9)
    # The portfolio's history folder got both sites, both kinds.
    assert sorted(history.read_history(tmp_path / "hist")["site"].unique()) == ["north", "south"]
    assert sorted(history.read_history(tmp_path / "hist", kind="drift")["site"].unique()) == [
        "north", "south"]


def test_no_alarm_count_when_no_day_is_tracked_after_the_reference(tmp_path):
    # 28 days of data lie inside drift's default 90-day reference period: an alarm count of
    # 0 would say nothing, so there is none, and the note says why.
    toml = write_site_files(tmp_path, "short", 4, step=("H-1", 1.5),
                            step_on=dt.date(2025, 4, 1))
    outcome = run_site(SiteJob(str(toml), str(tmp_path / "out"), drift=True))
    assert outcome.status == "ok", outcome.error
    assert outcome.alarms is None and outcome.alarm_equipment is None
    assert outcome.drift_note == (
        "no alarm count: no day tracked after the reference period 2025-03-17 to 2025-06-14 "
        "(data to 2025-04-13); alarms need data after it: give batch --reference a shorter "
        "period")
    row = portfolio_frame([outcome]).row(0, named=True)
    assert row["alarms"] is None and row["drift_note"] == outcome.drift_note
    assert (tmp_path / "out" / "drift.csv").exists()  # the tracking itself is written


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
                    {"X": 4.0, "baseload": 5.0, "unexplained": 1.0}, 2, 3.0, 0.1,
                    alarm_equipment=["X", "W"], drift_note="9 days tracked")
    b = SiteOutcome("/b.toml", "b", "ok", "B", None, "2025-01..2025-01", 8.0,
                    {"Y": 2.0, "baseload+Z": 6.0, "unexplained": 0.0}, None, 4.0, 0.2,
                    peak_kw=7.0, cost=3.5, currency="USD", drift_note=DRIFT_NOT_RUN,
                    history_note="2025-01 not stored")
    c = SiteOutcome("/c.toml", "c", "failed", None, "bad row")
    frame = portfolio_frame([a, b, c])
    assert frame.columns == ["site", "site_file", "period", "metered_kwh", "peak_kw", "X_kwh",
                             "Y_kwh", "baseload_kwh", "baseload+Z_kwh", "unexplained_kwh",
                             "cost", "currency", "alarms", "alarm_equipment", "drift_note",
                             "hourly_cv_rmse_pct", "hourly_nmbe_pct", "status", "error",
                             "history_note"]
    assert frame["alarms"].to_list() == [2, None, None]
    assert frame["alarm_equipment"].to_list() == ["X;W", None, None]
    assert frame["cost"].to_list() == [None, 3.5, None]
    assert frame["history_note"].to_list() == [None, "2025-01 not stored", None]
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


def test_a_folder_per_building_each_holding_site_toml_runs_into_a_folder_per_building(tmp_path):
    # The common layout: portfolio/<building>/site.toml. Listed in a portfolio file, or found
    # by giving the folder itself.
    root = tmp_path / "portfolio"
    write_site_files(root / "school", "site", 1, days=8)
    write_site_files(root / "warehouse", "site", 2, days=8)
    pf = tmp_path / "p.toml"
    pf.write_text('[portfolio]\nsites = ["portfolio/school/site.toml", '
                  '"portfolio/warehouse/site.toml"]\n', encoding="utf-8")
    for source, out in ((root, tmp_path / "out_folder"), (pf, tmp_path / "out_file")):
        r = runner.invoke(app, ["batch", str(source), "--out", str(out), "--workers", "1"])
        if source == pf:  # names relative to the portfolio file's folder
            out = out / "portfolio"
        assert r.exit_code == 0, r.output
        for building in ("school", "warehouse"):
            assert (out / building / "site" / "breakdown.csv").is_file()
        table = pl.read_csv((tmp_path / "out_file" if source == pf else out) / "portfolio.csv")
        assert table["site_file"].to_list() == [str(root / b / "site.toml")
                                                for b in ("school", "warehouse")]
        # The long form: one row per site, month and breakdown row, the same numbers as each
        # site's breakdown.csv, so equipment of one id in two buildings is never mixed.
        long = pl.read_csv((tmp_path / "out_file" if source == pf else out)
                           / "portfolio_equipment.csv")
        assert long.columns == ["site", "site_name", "period", "equipment", "kwh", "kwh_low",
                                "kwh_high", "share", "flags"]
        for building in ("school", "warehouse"):
            name = f"{building}/site" if source == root else f"portfolio/{building}/site"
            mine = long.filter(pl.col("site") == name).drop("site", "site_name")
            bd = pl.read_csv(out / building / "site" / "breakdown.csv").select(mine.columns)
            assert_frame_equal(mine, bd, check_dtypes=False, rel_tol=1e-6, abs_tol=1e-6)
        assert set(long["site_name"]) == {"Synthetic site"}


def test_two_listed_sites_outside_the_portfolio_folder_with_one_file_name_are_refused(tmp_path):
    write_site_files(tmp_path / "x", "site", 1, days=8)
    write_site_files(tmp_path / "y", "site", 2, days=8)
    (tmp_path / "p").mkdir()
    pf = tmp_path / "p" / "p.toml"
    pf.write_text('[portfolio]\nsites = ["../x/site.toml", "../y/site.toml"]\n',
                  encoding="utf-8")
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
    ('[portfolio]\nsites = ["a.toml"]\nhistroy = "h"\n',
     "[portfolio] histroy: unknown setting (did you mean history?); expected one of history, "
     "sites"),
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
    assert r.exit_code == 1
    assert r.stderr.splitlines() == ["Error: --workers 0: expected 1 or more"]
    r = runner.invoke(app, ["batch", str(tmp_path), "--out", str(tmp_path / "out"),
                            "--workers", "2", "--cluster", "tcp://127.0.0.1:1"])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [("Error: --workers and --cluster: the cluster's workers "
                                     "run the sites; give one of the two")]
    r = runner.invoke(app, ["batch", str(tmp_path), "--out", str(tmp_path / "out"),
                            "--reference", "2025-03-17:2025-03-20"])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == ["Error: --reference: a drift reference period needs --drift"]
    assert not (tmp_path / "out").exists()


# ---------------------------------------------------------------------------------------
# Error lines, the history folder, interrupts


def test_a_site_error_that_names_the_site_file_names_it_once(tmp_path):
    toml = write_site_files(tmp_path / "sites", "west", 1, days=8, data_dir=tmp_path / "data")
    add_flat_tariff(toml, "", 0.1, 0.0)  # an empty currency
    with pytest.raises(ConfigError) as err:
        load_site(toml)
    assert str(err.value).startswith(f"{toml}: [tariff] currency")
    r = runner.invoke(app, ["batch", str(tmp_path / "sites"), "--out", str(tmp_path / "out"),
                            "--workers", "1", "--quiet"])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [f"Error: {err.value}"]


def test_an_unwritable_history_folder_fails_the_site_before_its_outputs(tmp_path):
    (tmp_path / "blocker").write_text("a file where the history folder's parent should be")
    toml = write_site_files(tmp_path / "sites", "north", 1, days=8, data_dir=tmp_path / "data",
                            history="../blocker/hist")
    other = write_site_files(tmp_path / "sites", "south", 2, days=8, data_dir=tmp_path / "data")
    r = runner.invoke(app, ["batch", str(tmp_path / "sites"), "--out", str(tmp_path / "out"),
                            "--workers", "1", "--quiet"])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [(f"Error: {toml}: {tmp_path / 'blocker' / 'hist'}: cannot "
                                     "create the history folder (Not a directory)")]
    assert not (tmp_path / "out" / toml.stem).exists()  # nothing written for it
    assert (tmp_path / "out" / other.stem / "breakdown.csv").exists()  # the other finished
    table = pl.read_csv(tmp_path / "out" / "portfolio.csv")
    assert table["status"].to_list() == ["failed", "ok"]


def test_a_history_that_fails_after_the_outputs_says_they_were_written(tmp_path, monkeypatch):
    toml = write_site_files(tmp_path, "north", 1, days=8, history="hist")

    def full_disk(frame, path):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(history, "_write_part", full_disk)  # run_site runs in this process
    out = tmp_path / "out" / "north"
    outcome = run_site(SiteJob(str(toml), str(out)))
    assert outcome.status == "failed"
    assert outcome.error == (f"{tmp_path / 'hist'}: cannot write the history (No space left "
                             f"on device); the outputs were written in {out} but the history "
                             "was not updated")
    assert (out / "breakdown.csv").exists() and (out / "fit.json").exists()
    assert history.read_history(tmp_path / "hist").is_empty()


def test_an_interrupt_stops_the_batch_and_writes_no_portfolio_csv(tmp_path, monkeypatch):
    sites = tmp_path / "sites"
    for stem, seed in (("a", 1), ("b", 2), ("c", 3), ("d", 4), ("e", 5)):
        write_site_files(sites, stem, seed, days=8, data_dir=tmp_path / "data")
    real_report = portfolio.report

    def ctrl_c_after_the_first_site(progress, step, done, total):
        real_report(progress, step, done, total)
        if done == 1:
            raise KeyboardInterrupt  # as Ctrl-C does in the waiting parent process

    monkeypatch.setattr(portfolio, "report", ctrl_c_after_the_first_site)
    r = runner.invoke(app, ["batch", str(sites), "--out", str(tmp_path / "out"),
                            "--workers", "1"])
    assert r.exit_code == 130
    finished = sorted(p.name for p in (tmp_path / "out").iterdir())
    # The first site, and at most the one the worker had started; the others never ran.
    assert finished in (["a"], ["a", "b"])
    assert all((tmp_path / "out" / f / "breakdown.csv").exists() for f in finished)
    assert r.stderr.splitlines() == [(f"Interrupted: {len(finished)} site"
                                     f"{'s' * (len(finished) != 1)} finished, "
                                     f"{5 - len(finished)} not run; portfolio.csv not written")]
    assert r.stdout == ""
