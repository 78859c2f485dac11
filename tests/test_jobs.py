"""disagg.jobs.site: one job function per command, used by the CLI and by batch.

All data invented: tests/synthetic.py buildings written by test_portfolio.write_site_files.
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path

import polars as pl
import pytest
from polars.testing import assert_frame_equal
from test_portfolio import write_site_files
from typer.testing import CliRunner

from disagg.cli import app
from disagg.errors import ConfigError
from disagg.jobs.batch import run_portfolio
from disagg.jobs.site import (
    BreakdownOptions,
    CheckOptions,
    HistoryOptions,
    ReportOptions,
    run_breakdown,
    run_check,
)

runner = CliRunner()


@pytest.mark.parametrize("make, message", [
    (lambda p: BreakdownOptions(p, p, confidence=0.3),
     "--confidence 0.3: expected a fraction from 0.5 to 0.999"),
    (lambda p: BreakdownOptions(p, p, on_duplicate="newest"),
     "--on-duplicate 'newest': expected one of error, keep-first, keep-last"),
    (lambda p: BreakdownOptions(p, p, log_offset_min=float("nan")),
     "--log-offset nan: expected a number of minutes from -10080 to 10080"),
    (lambda p: ReportOptions(p, p, dt.date(2025, 3, 5), dt.date(2025, 3, 1)),
     "--to 2025-03-01 is before --from 2025-03-05"),
    (lambda p: CheckOptions(p, dt.date(2025, 3, 5), dt.date(2025, 3, 1)),
     "--to 2025-03-01 is before --from 2025-03-05"),
    (lambda p: HistoryOptions(p, before="2025-03"),
     "--before and --after: give both to compare stored months"),
])
def test_options_are_checked_when_made(tmp_path, make, message):
    # The settings are refused before any file is read: the site file does not even exist.
    with pytest.raises(ConfigError) as err:
        make(tmp_path / "missing.toml")
    assert str(err.value) == message


def test_the_library_refuses_what_the_options_refuse(tmp_path):
    # One check, used by the options and by the library function a Python user may call.
    from disagg.analyses.pipeline import breakdown_site

    with pytest.raises(ConfigError, match=r"^--confidence 0.3: expected a fraction"):
        breakdown_site(tmp_path / "missing.toml", confidence=0.3)


def test_run_breakdown_returns_what_it_wrote(tmp_path):
    toml = write_site_files(tmp_path, "plant", seed=3, history="history")
    run = run_breakdown(BreakdownOptions(toml, tmp_path / "out"))
    written = sorted(p.name for p in (tmp_path / "out").iterdir())
    assert written == ["breakdown.csv", "breakdown.parquet", "fit.json"]
    assert [p.name for p in run.paths[:3]] == ["breakdown.csv", "breakdown.parquet", "fit.json"]
    # The history's site folder is named after the three files.
    assert run.paths[3].name == "site=plant" and run.paths[3].parent.name == "kind=breakdown"
    assert run.summary.startswith(run.result.site.name)
    assert run.notes == []


def test_run_check_writes_nothing(tmp_path):
    toml = write_site_files(tmp_path, "plant", seed=3)
    before = sorted(tmp_path.rglob("*"))
    run = run_check(CheckOptions(toml))
    assert run.paths == [] and run.summary
    assert sorted(tmp_path.rglob("*")) == before


def test_batch_and_breakdown_write_the_same_files(tmp_path):
    sites = tmp_path / "sites"
    sites.mkdir()
    toml = write_site_files(sites, "plant", seed=7)
    r = runner.invoke(app, ["breakdown", str(toml), "--out", str(tmp_path / "one")])
    assert r.exit_code == 0, r.output
    run_portfolio(sites, tmp_path / "many", workers=1)
    for name in ("breakdown.csv", "fit.json"):
        one = (tmp_path / "one" / name).read_bytes()
        many = (tmp_path / "many" / "plant" / name).read_bytes()
        assert one == many, name
    assert_frame_equal(pl.read_parquet(tmp_path / "one" / "breakdown.parquet"),
                       pl.read_parquet(tmp_path / "many" / "plant" / "breakdown.parquet"))


def test_cli_prints_the_jobs_summary(tmp_path):
    toml = write_site_files(tmp_path, "plant", seed=3)
    run = run_breakdown(BreakdownOptions(toml, tmp_path / "lib"))
    r = runner.invoke(app, ["breakdown", str(toml), "--out", str(tmp_path / "cli")])
    assert r.exit_code == 0, r.output
    assert r.stdout.startswith(run.summary)
    assert Path(r.stdout.strip().splitlines()[-1].split(", ")[-1]).name == "fit.json"


def test_buildings_with_a_site_toml_each_keep_their_own_history(tmp_path):
    # The common portfolio layout: a folder per building, each holding site.toml, and one
    # shared history folder. Each building's history is kept under its folder's name.
    store = tmp_path / "history"
    for name, seed in (("north", 3), ("south", 4)):
        write_site_files(tmp_path / "sites" / name, "site", seed=seed, history=store.as_posix())
    result = run_portfolio(tmp_path / "sites", tmp_path / "out", workers=1)
    assert [o.status for o in result.outcomes] == ["ok", "ok"], [o.error for o in result.outcomes]
    stored = sorted(p.name for p in (store / "kind=breakdown").iterdir())
    assert stored == ["site=north", "site=south"]


def test_a_rerun_without_the_report_removes_the_earlier_report(tmp_path):
    # report.html of an earlier run would describe other results than the new breakdown.csv.
    toml = write_site_files(tmp_path, "plant", seed=3)
    out = tmp_path / "out"
    first = run_breakdown(BreakdownOptions(toml, out, report=True, xlsx=True))
    assert {p.name for p in first.paths} >= {"report.html", "breakdown.xlsx"}
    again = run_breakdown(BreakdownOptions(toml, out, confidence=0.9, xlsx=True))
    assert sorted(p.name for p in out.iterdir()) == [
        "breakdown.csv", "breakdown.parquet", "breakdown.xlsx", "fit.json"]
    assert again.notes == [f"removed report.html of an earlier run from {out}: it described "
                           "other results (add --report to write a new one)"]


def test_the_breakdown_files_hold_no_negative_zero(tmp_path):
    toml = write_site_files(tmp_path, "plant", seed=3)
    run_breakdown(BreakdownOptions(toml, tmp_path / "out"))
    text = (tmp_path / "out" / "breakdown.csv").read_text()
    # A field that is exactly a negative zero ("-0", "-0.000000"); a small negative number
    # such as -0.019619 is a real value.
    fields = [f for line in text.splitlines() for f in line.split(",")]
    assert not [f for f in fields if re.fullmatch(r"-0(\.0*)?", f)]
    assert any(re.fullmatch(r"0(\.0*)?", f) for f in fields)  # zeros are written, as 0


def test_an_out_that_is_a_file_is_refused_before_reading(tmp_path):
    target = tmp_path / "results"
    target.write_text("not a folder\n")
    r = runner.invoke(app, ["breakdown", str(tmp_path / "missing.toml"), "--out", str(target)])
    assert r.exit_code == 1
    assert r.stderr == (f"Error: --out {target}: is a file, not a folder; give a folder for "
                        "the result files\n")
