"""End-to-end tests of the `disagg` command with typer's CliRunner.

The synthetic site here is invented: three loads with random on/off schedules drawn from a
seeded numpy generator, a constant baseload and small meter noise, written as a meter CSV
(times with UTC offsets), an events run log (naive local times) and a site TOML. The
runner keeps stdout and stderr apart (typer 0.29's CliRunner: `result.stdout`,
`result.stderr`; `result.output` mixes both), so the tests check that a bad input gives
exactly one `Error: ...` line on stderr, nothing on stdout and no files.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import re
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import typer
from sitefiles import write_site_toml
from typer.testing import CliRunner

from disagg.cli import app
from disagg.inputs.config import load_site

README = Path(__file__).resolve().parents[1] / "README.md"
COMMANDS_DOC = Path(__file__).resolve().parents[1] / "docs" / "commands.md"
GUIDE = Path(__file__).resolve().parents[1] / "docs" / "guide.md"
CAUTION_LINE = ("Caution: Estimates are not measurements. Any work on electrical equipment "
                "must follow local codes and be done by licensed, qualified people.")
CSV_COLUMNS = ["period", "equipment", "run_hours", "kw", "kw_low", "kw_high", "kwh", "kwh_low",
               "kwh_high", "share", "flags", "peak_kw", "cost"]
OUTPUT_FILES = ["breakdown.csv", "breakdown.parquet", "fit.json"]

TZ = "America/Chicago"
START_LOCAL = dt.datetime(2025, 1, 20)  # a Monday; the period crosses into February
TRUE_DRAW_KW = {"CH-1": 40.0, "AHU-1": 12.0, "P-1": 5.0}
BASELOAD_KW = 20.0
NOISE_KWH = 0.3  # standard deviation of the meter noise per 15-minute interval
GRID_MIN = 5  # the simulated schedules change state on a 5-minute grid
MAIN_DAYS = 21

runner = CliRunner()


# ---------------------------------------------------------------------------------------
# The synthetic site


def _spells(n_steps: int, rng: np.random.Generator) -> np.ndarray:
    """Random on/off states on the 5-minute grid, spells of 10 minutes to 2.5 hours."""
    state = np.zeros(n_steps, dtype=np.int64)
    i, s = 0, int(rng.integers(0, 2))
    while i < n_steps:
        length = int(rng.integers(2, 31))
        state[i:i + length] = s
        s, i = 1 - s, i + length
    return state


def write_site(folder: Path, days: int = MAIN_DAYS, seed: int = 11, identical: bool = False,
               meter_name: str = "meter.csv") -> dict:
    """Write meter, events run log and site.toml for the synthetic site into folder.

    Args:
        identical: P-1 follows exactly the same schedule as CH-1.

    Returns:
        paths (site, meter, runlog, resolved) and the metered kWh per local month.
    """
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    n = days * 96
    steps = n * 15 // GRID_MIN
    energy_kwh = np.full(n, BASELOAD_KW * 0.25)
    events = []
    grid_local = [START_LOCAL + dt.timedelta(minutes=GRID_MIN * k) for k in range(steps + 1)]
    schedules: dict[str, np.ndarray] = {}
    for eq, kw in TRUE_DRAW_KW.items():
        state = schedules["CH-1"].copy() if identical and eq == "P-1" else _spells(steps, rng)
        schedules[eq] = state
        energy_kwh += kw * state.reshape(n, 15 // GRID_MIN).sum(axis=1) * GRID_MIN / 60.0
        change = np.concatenate([[0], np.flatnonzero(np.diff(state)) + 1, [steps]])
        for k in change:
            on = state[min(k, steps - 1)]  # the closing row repeats the last state
            events.append((grid_local[k].strftime("%Y-%m-%d %H:%M:%S"), eq, "on" if on else "off"))
    energy_kwh = np.round(energy_kwh + rng.normal(0.0, NOISE_KWH, n), 3)

    # Meter: reading at the end of each interval, local time with its UTC offset.
    start_utc = pl.datetime_range(
        dt.datetime(2025, 1, 20, 6, 0, tzinfo=dt.timezone.utc),
        dt.datetime(2025, 1, 20, 6, 0, tzinfo=dt.timezone.utc) + dt.timedelta(minutes=15 * (n - 1)),
        interval="15m", eager=True, time_zone="UTC")
    end_local = (start_utc + dt.timedelta(minutes=15)).dt.convert_time_zone(TZ)
    meter = pl.DataFrame({"end": end_local.dt.to_string("%Y-%m-%dT%H:%M:%S%:z"),
                          "kwh": energy_kwh})
    meter.write_csv(folder / meter_name)
    log = pl.DataFrame(events, schema=["time", "point", "state"], orient="row").sort(
        "time", "point", maintain_order=True)
    log.write_csv(folder / "runlog.csv")
    write_site_toml(folder / "site.toml", name="Synthetic test site", timezone=TZ,
                    meter_file=meter_name, runlog_file="runlog.csv", equipment=list(TRUE_DRAW_KW))
    month = start_utc.dt.convert_time_zone(TZ).dt.strftime("%Y-%m").to_numpy()
    metered = {m: float(energy_kwh[month == m].sum()) for m in sorted(set(month))}
    folder = folder.resolve()
    return {"folder": folder, "site": folder / "site.toml", "meter": folder / meter_name,
            "runlog": folder / "runlog.csv", "metered_kwh": metered, "intervals": n}


def _sha256(paths: list[Path]) -> dict[Path, str]:
    return {p: hashlib.sha256(p.read_bytes()).hexdigest() for p in paths}


def _inputs(s: dict) -> list[Path]:
    return [s["site"], s["meter"], s["runlog"]]


def _replace_line(path: Path, line_no: int, new: str) -> None:
    """Replace 1-based line line_no of a text file."""
    lines = path.read_text(encoding="utf-8").splitlines()
    lines[line_no - 1] = new
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


# ---------------------------------------------------------------------------------------
# Help and README


def _commands() -> dict:
    return typer.main.get_command(app).commands  # type: ignore[attr-defined]


COMMANDS = ["batch", "breakdown", "check", "compare", "demo", "drift", "history", "report"]


def test_the_app_registers_the_documented_commands():
    assert sorted(_commands()) == COMMANDS


@pytest.mark.parametrize("command", COMMANDS)
def test_each_command_has_help_text(command):
    cmd = _commands()[command]
    result = runner.invoke(app, [command, "--help"])
    assert result.exit_code == 0, result.output
    text = " ".join(result.stdout.replace("│", " ").split())
    assert cmd.help and " ".join(cmd.help.split()) in text
    # Every argument and option says what it is for.
    undocumented = [p.name for p in cmd.params if not getattr(p, "help", None)]
    assert undocumented == []


def test_every_command_appears_in_the_command_reference():
    # The full reference lives in docs/commands.md (generated; tests/test_docs.py checks it).
    text = COMMANDS_DOC.read_text(encoding="utf-8")
    missing = [c for c in _commands() if not re.search(rf"\bdisagg {re.escape(c)}\b", text)]
    assert missing == []


# ---------------------------------------------------------------------------------------
# breakdown on the synthetic site


@pytest.fixture(scope="module")
def main_run(tmp_path_factory):
    s = write_site(tmp_path_factory.mktemp("synthetic") / "data")
    out = s["folder"].parent / "out"
    before = _sha256(_inputs(s))
    result = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(out)])
    return s, out, result, before


def test_breakdown_exits_0_and_prints_the_summary_and_caution(main_run):
    s, out, result, _ = main_run
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    lines = result.stdout.splitlines()
    assert CAUTION_LINE in lines
    assert lines[0].startswith("Synthetic test site: 2025-01 to 2025-02, 2,016 intervals used")
    assert lines[-1] == "Wrote " + ", ".join(str(out.resolve() / f) for f in OUTPUT_FILES)
    # The logs are on the meter's clock: the quick clock test stays silent.
    assert "match the meter best" not in result.stdout


def test_breakdown_writes_exactly_the_three_files_and_no_temporary_folder(main_run):
    _, out, result, _ = main_run
    assert result.exit_code == 0, result.output
    assert sorted(p.name for p in out.iterdir()) == OUTPUT_FILES  # includes hidden names


def test_breakdown_csv_columns_rows_and_parquet_agree(main_run):
    _, out, result, _ = main_run
    assert result.exit_code == 0, result.output
    csv = pl.read_csv(out / "breakdown.csv", infer_schema_length=None)
    assert csv.columns == CSV_COLUMNS
    rows = [(r["period"], r["equipment"]) for r in csv.select("period", "equipment").to_dicts()]
    assert rows == [(m, e) for m in ("2025-01", "2025-02")
                    for e in ("CH-1", "AHU-1", "P-1", "baseload", "unexplained")]
    parquet = pl.read_parquet(out / "breakdown.parquet")
    assert parquet.columns == CSV_COLUMNS
    assert parquet.select("period", "equipment").rows() == rows
    # The CSV has 6 decimals.
    assert np.allclose(csv["kwh"].to_numpy(), parquet["kwh"].to_numpy(), rtol=0, atol=1e-6)


def test_breakdown_months_add_up_to_the_metered_kwh_of_the_intervals_used(main_run):
    s, out, result, _ = main_run
    assert result.exit_code == 0, result.output
    fit = json.loads((out / "fit.json").read_text(encoding="utf-8"))
    # No gaps and no unknown states in this site: every interval is used.
    assert fit["intervals"]["used"] == s["intervals"] == 2016
    assert fit["intervals"]["intervals"] == 2016
    csv = pl.read_csv(out / "breakdown.csv", infer_schema_length=None)
    sums = dict(csv.group_by("period").agg(pl.col("kwh").sum()).iter_rows())
    assert sorted(sums) == sorted(s["metered_kwh"])
    for period, metered in s["metered_kwh"].items():
        # 5 rows written with 6 decimals: at most 5 x 0.5e-6 kWh of rounding.
        assert sums[period] == pytest.approx(metered, abs=5e-6), period
    shares = dict(csv.group_by("period").agg(pl.col("share").sum()).iter_rows())
    for period in s["metered_kwh"]:
        assert shares[period] == pytest.approx(1.0, abs=5e-6)


def test_breakdown_recovers_the_known_draws(main_run):
    # Well-specified synthetic site, about 250 run hours per load and 0.3 kWh noise per
    # interval: the standard errors are near 0.1 kW, so 0.5 kW is a loose bound.
    _, out, result, _ = main_run
    assert result.exit_code == 0, result.output
    fit = json.loads((out / "fit.json").read_text(encoding="utf-8"))
    draws = {d["equipment"]: d["kw"] for d in fit["draws"]}
    assert sorted(draws) == sorted(TRUE_DRAW_KW)
    for eq, kw in TRUE_DRAW_KW.items():
        assert draws[eq] == pytest.approx(kw, abs=0.5), eq
    assert fit["baseload"]["columns"][0]["kw"] == pytest.approx(BASELOAD_KW, abs=0.5)


def test_breakdown_leaves_the_inputs_untouched(main_run):
    s, _, result, before = main_run
    assert result.exit_code == 0, result.output
    assert _sha256(_inputs(s)) == before


def test_breakdown_out_in_the_data_folder_is_fine_when_no_name_clashes(tmp_path):
    s = write_site(tmp_path / "data", days=7, seed=3)
    before = _sha256(_inputs(s))
    result = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(s["folder"])])
    assert result.exit_code == 0, result.output
    assert _sha256(_inputs(s)) == before
    assert sorted(p.name for p in s["folder"].iterdir()) == sorted(
        OUTPUT_FILES + ["meter.csv", "runlog.csv", "site.toml"])


def test_breakdown_refuses_to_overwrite_an_input(tmp_path):
    # The meter file is called breakdown.csv and --out is its own folder.
    s = write_site(tmp_path / "data", days=7, seed=3, meter_name="breakdown.csv")
    before = _sha256(_inputs(s))
    result = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(s["folder"])])
    assert result.exit_code == 1
    assert result.stderr == (f"Error: {s['meter']}: writing here would replace an input file; "
                             "choose another --out\n")
    assert result.stdout == ""
    assert _sha256(_inputs(s)) == before
    assert sorted(p.name for p in s["folder"].iterdir()) == ["breakdown.csv", "runlog.csv",
                                                             "site.toml"]


# ---------------------------------------------------------------------------------------
# Bad input: one Error line, exit 1, nothing written


def _missing_column(s):
    _replace_line(s["meter"], 1, "end,energy")
    return f"{s['meter']}: column 'kwh' not found; the file has 'end', 'energy'"


def _bad_time(s):
    _replace_line(s["meter"], 5, "2025-01-20 25:00,5.0")
    return (f"{s['meter']}: line 5, column 'end': cannot read time '2025-01-20 25:00'; expected "
            "the same form as the first row ('2025-01-20T00:15:00-06:00')")


def _unknown_equipment(s):
    first = s["runlog"].read_text(encoding="utf-8").splitlines()[2]
    _replace_line(s["runlog"], 3, re.sub(r",[^,]+,", ",CH-9,", first, count=1))
    return (f"{s['runlog']}: line 3, column 'point': unknown equipment id 'CH-9'; did you mean "
            "'CH-1'? expected one of the site file's ids (CH-1, AHU-1, P-1)")


def _negative_energy(s):
    _replace_line(s["meter"], 10, "2025-01-20T02:15:00-06:00,-1.5")
    return (f"{s['meter']}: line 10, column 'kwh': negative reading -1.5; expected energy of 0 "
            "or more")


def _conflicting_duplicate(s):
    # Line 6 is the reading ending 01:15 local = 07:15 UTC; repeat it with another value.
    text = s["meter"].read_text(encoding="utf-8")
    s["meter"].write_text(text + "2025-01-20T01:15:00-06:00,99.0\n", encoding="utf-8")
    last_line = s["intervals"] + 2
    return (f"{s['meter']}: line {last_line}, column 'end': time 2025-01-20 07:15:00+00:00 "
            "repeats line 6 with a different reading; expected one reading per interval")


def _wrong_unit(s):
    text = s["site"].read_text(encoding="utf-8")
    s["site"].write_text(text.replace('unit = "kWh"', 'unit = "kwh"'), encoding="utf-8")
    return f"{s['site']}: [meter] unit = 'kwh': expected one of kWh, Wh, kW"


def _interval_in_site_file(s):
    text = s["site"].read_text(encoding="utf-8")
    s["site"].write_text(text.replace('stamp = "end"', 'stamp = "end"\ninterval_minutes = 7'),
                         encoding="utf-8")
    return f"{s['site']}: [meter] interval_minutes = 7: expected one of 1, 5, 10, 15, 30, 60 minutes"


def _interval_in_data(s):
    ends = [(dt.datetime(2025, 1, 20) + dt.timedelta(minutes=7 * (i + 1))).isoformat() + "-06:00"
            for i in range(200)]
    pl.DataFrame({"end": ends, "kwh": [5.0] * 200}).write_csv(s["meter"])
    return f"{s['meter']}: the meter interval is 7 minutes; expected one of 1, 5, 10, 15, 30, 60 minutes"


def _missing_site(s):
    s["site"].unlink()
    return f"{s['site']}: no such site file"


BAD_INPUTS = {
    "missing column": (_missing_column, []),
    "unparseable time": (_bad_time, []),
    "unknown equipment id": (_unknown_equipment, []),
    "negative energy": (_negative_energy, []),
    "duplicate time, different value": (_conflicting_duplicate, []),
    "wrong unit word": (_wrong_unit, []),
    "interval not allowed (site file)": (_interval_in_site_file, []),
    "interval not allowed (data)": (_interval_in_data, []),
    "missing site file": (_missing_site, []),
    "bad --from date": (lambda s: "--from '2025-02-30': expected a date such as 2025-03-01",
                        ["--from", "2025-02-30"]),
    "bad --to date": (lambda s: "--to 'March': expected a date such as 2025-03-01",
                      ["--to", "March"]),
    "--confidence 1.5": (lambda s: "--confidence 1.5: expected a fraction from 0.5 to 0.999",
                         ["--confidence", "1.5"]),
    "--to before --from": (lambda s: "--to 2025-01-21 is before --from 2025-01-25",
                           ["--from", "2025-01-25", "--to", "2025-01-21"]),
}


@pytest.mark.parametrize("case", list(BAD_INPUTS))
def test_bad_input_gives_one_error_line_exit_1_and_no_output(tmp_path, case):
    s = write_site(tmp_path / "data", days=3, seed=5)
    spoil, extra_args = BAD_INPUTS[case]
    message = spoil(s)
    out = tmp_path / "out"
    result = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(out), *extra_args])
    assert result.exit_code == 1, result.output
    assert result.stderr == f"Error: {message}\n"
    assert result.stdout == ""
    assert "Traceback" not in result.output
    assert not out.exists() or sorted(out.iterdir()) == []


@pytest.mark.parametrize("case", ["unknown equipment id", "wrong unit word", "missing site file"])
def test_check_gives_the_same_error_line(tmp_path, case):
    s = write_site(tmp_path / "data", days=3, seed=5)
    spoil, _ = BAD_INPUTS[case]
    message = spoil(s)
    result = runner.invoke(app, ["check", str(s["site"])])
    assert result.exit_code == 1, result.output
    assert result.stderr == f"Error: {message}\n"
    assert result.stdout == ""


# ---------------------------------------------------------------------------------------
# check


def test_check_reports_the_intervals_and_exits_0(main_run):
    s, _, _, before = main_run
    result = runner.invoke(app, ["check", str(s["site"])])
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    lines = result.stdout.splitlines()
    # Times in the site's zone (America/Chicago: UTC-6 in winter).
    assert lines[0] == ("Synthetic test site: 2025-01-20T00:00:00-06:00 to "
                        "2025-02-10T00:00:00-06:00 (America/Chicago), 15-minute meter intervals")
    assert lines[1] == ("intervals 2,016: used 2,016, absent 0, no reading 0, run-log state "
                        "unknown 0")
    assert [ln.split()[0] for ln in lines[2:5]] == ["CH-1", "AHU-1", "P-1"]
    assert not any("cannot be told apart" in ln for ln in lines)
    assert _sha256(_inputs(s)) == before


def test_check_names_equipment_with_identical_schedules(tmp_path):
    s = write_site(tmp_path / "data", days=7, seed=8, identical=True)
    result = runner.invoke(app, ["check", str(s["site"])])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert "cannot be told apart: CH-1 and P-1 (correlation of hours 1.000)" in lines
    assert sum("cannot be told apart" in ln for ln in lines) == 1
    written = sorted(p.relative_to(tmp_path).as_posix() for p in tmp_path.rglob("*"))
    assert written == ["data", "data/meter.csv", "data/runlog.csv", "data/site.toml"]  # no output


# ---------------------------------------------------------------------------------------
# demo


def test_demo_writes_the_demo_site_and_its_breakdown(tmp_path):
    out = tmp_path / "demo"
    result = runner.invoke(app, ["demo", "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert result.stderr == ""
    toml = out / "demo_site" / "demo.toml"
    assert toml.is_file()
    site = load_site(toml)
    assert site.meter.file.is_file() and site.runlog.file.is_file()
    csv = pl.read_csv(out / "breakdown.csv", infer_schema_length=None)
    assert csv.columns == CSV_COLUMNS
    assert sorted(csv["period"].unique()) == [f"2025-{m:02d}" for m in range(1, 13)]
    assert sorted(p.name for p in out.iterdir()) == sorted(OUTPUT_FILES + ["demo_site",
                                                                           "report.html"])
    assert "<svg" in (out / "report.html").read_text(encoding="utf-8")
    assert CAUTION_LINE in result.stdout.splitlines()
    form = json.loads((out / "fit.json").read_text())["baseload"]["form"]
    assert (f"Baseload form: {form['used']} (chosen by the data; fit.json baseload.form "
            "compares the others).") in result.stdout.splitlines()
    # The unexplained row is a residual of about 1e-10 kWh: no "-0.000000" in the file.
    assert ",-0.000000" not in (out / "breakdown.csv").read_text()


# ---------------------------------------------------------------------------------------
# inputs that read but cannot be fitted


def test_a_header_only_run_log_is_an_error_line_not_a_crash(tmp_path):
    s = write_site(tmp_path / "data", days=3, seed=5)
    s["runlog"].write_text("time,point,state\n")
    for command in (["check", str(s["site"])],
                    ["breakdown", str(s["site"]), "--out", str(tmp_path / "out")]):
        result = runner.invoke(app, command)
        assert result.exit_code == 1, result.output
        assert result.stderr == (
            f"Error: {s['runlog']} (288 meter intervals: 0 without a reading, 288 with a "
            "run-log state unknown): no interval has both a meter reading and a known state "
            "for every equipment; no known state at all for CH-1, AHU-1, P-1 (expected "
            "run-log rows with CH-1, AHU-1, P-1 in column 'point')\n")
        assert "Traceback" not in result.output
    assert not (tmp_path / "out").exists()


def test_check_exits_1_when_too_few_intervals_to_fit(tmp_path):
    s = write_site(tmp_path / "data", days=3, seed=5)
    lines = s["meter"].read_text().splitlines()
    s["meter"].write_text("\n".join(lines[:4]) + "\n")  # 3 readings for 4 unknowns
    text = s["site"].read_text().replace('stamp = "end"', 'stamp = "end"\ninterval_minutes = 15')
    s["site"].write_text(text)
    result = runner.invoke(app, ["check", str(s["site"])])
    assert result.exit_code == 1, result.output
    assert result.stderr == (f"Error: {s['runlog']} (3 meter intervals: 0 without a reading, 0 "
                             "with a run-log state unknown): only 3 usable meter intervals for 4 "
                             "unknowns; a fit needs at least 6\n")


def test_check_finds_the_run_log_clock_offset_and_breakdown_applies_one(tmp_path):
    s = write_site(tmp_path / "data", days=7, seed=8)
    result = runner.invoke(app, ["check", str(s["site"]), "--find-offset", "--log-offset", "-6"])
    assert result.exit_code == 0, result.output
    line = [ln for ln in result.stdout.splitlines() if ln.startswith("Run-log clock:")]
    # The log was read 6 minutes early: the search puts it back with +6 (within a minute).
    assert len(line) == 1 and "shifted by +" in line[0], line
    best = float(line[0].split("shifted by ")[1].split(" min")[0])
    assert abs(best - 6.0) <= 1.0
    out = tmp_path / "out"
    result = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(out), "--log-offset", "2"])
    assert result.exit_code == 0, result.output
    assert "every run-log time is shifted by +2 min onto the meter's clock" in result.stdout


def test_on_duplicate_keep_first_turns_the_conflict_error_into_a_finding(tmp_path):
    s = write_site(tmp_path / "data", days=3, seed=5)
    _conflicting_duplicate(s)
    out = tmp_path / "out"
    refused = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(out)])
    assert refused.exit_code == 1
    kept = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(out),
                               "--on-duplicate", "keep-first"])
    assert kept.exit_code == 0, kept.output
    assert ("Note: meter duplicates: 1 time appears more than once with different readings "
            "(2025-01-20T01:15:00-06:00); policy: the first row of each kept "
            "(on_duplicate = keep-first), 1 row dropped") in kept.stdout.splitlines()
    bad = runner.invoke(app, ["check", str(s["site"]), "--on-duplicate", "keep-middle"])
    assert bad.exit_code == 1
    assert bad.stderr == ("Error: --on-duplicate 'keep-middle': expected one of error, "
                          "keep-first, keep-last\n")


# Each command with arguments that run it on the 4-day synthetic site of write_site.
EVERY_FIT_COMMAND = {
    "breakdown": ["--out", "{out}"],
    "check": [],
    "report": ["--out", "{out}", "--no-drift"],
    "drift": ["--out", "{out}", "--reference", "2025-01-20:2025-01-21"],
    "compare": ["--out", "{out}", "--before", "2025-01-20:2025-01-21",
                "--after", "2025-01-22:2025-01-23"],
    "batch": ["--out", "{out}", "--workers", "1"],
}


@pytest.mark.parametrize("command", sorted(EVERY_FIT_COMMAND))
def test_the_site_files_duplicate_policy_reaches_every_command(tmp_path, command):
    s = write_site(tmp_path / "data", days=4, seed=5)
    message = _conflicting_duplicate(s)
    target = str(s["folder"]) if command == "batch" else str(s["site"])
    args = [a.format(out=tmp_path / "out") for a in EVERY_FIT_COMMAND[command]]
    refused = runner.invoke(app, [command, target] + args)
    assert refused.exit_code == 1, refused.output
    assert message in refused.stderr
    text = s["site"].read_text(encoding="utf-8")
    s["site"].write_text(text.replace('stamp = "end"', 'stamp = "end"\non_duplicate = "keep-first"'),
                         encoding="utf-8")
    kept = runner.invoke(app, [command, target] + args)
    assert kept.exit_code == 0, kept.output
    # The command line still wins over the site file.
    if command in ("breakdown", "check"):
        again = runner.invoke(app, [command, target] + args + ["--on-duplicate", "error"])
        assert again.exit_code == 1 and message in again.stderr


def test_site_file_settings_are_checked(tmp_path):
    s = write_site(tmp_path / "data", days=2, seed=5)
    text = s["site"].read_text(encoding="utf-8")
    for old, new, message in [
        ('stamp = "end"', 'stamp = "end"\non_duplicate = "keep-middle"',
         "[meter] on_duplicate = 'keep-middle': expected one of error, keep-first, keep-last"),
        ('state_column = "state"', 'state_column = "state"\nlog_offset_minutes = 20000',
         "[runlog] log_offset_minutes = 20000.0: expected a number of minutes from -10080 to "
         "10080"),
    ]:
        s["site"].write_text(text.replace(old, new), encoding="utf-8")
        result = runner.invoke(app, ["check", str(s["site"])])
        assert result.exit_code == 1
        assert result.stderr == f"Error: {s['site']}: {message}\n"


def test_breakdown_warns_of_a_run_log_clock_offset_and_the_site_file_can_apply_it(tmp_path):
    s = write_site(tmp_path / "data", days=7, seed=8)
    text = s["site"].read_text(encoding="utf-8")
    # The log read 4 minutes early (as a building automation clock 4 minutes ahead would be).
    s["site"].write_text(text.replace('state_column = "state"',
                                      'state_column = "state"\nlog_offset_minutes = -4'),
                         encoding="utf-8")
    out = tmp_path / "out"
    result = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(out)])
    assert result.exit_code == 0, result.output
    warning = [ln for ln in result.stdout.splitlines() if "match the meter best" in ln]
    assert len(warning) == 1, result.stdout
    # The search finds +4 on top of the -4 applied: the suggested total is 0 (within a minute).
    suggested = float(warning[0].split("--log-offset ")[1].split(" ")[0])
    assert abs(suggested) <= 1.0, warning
    assert "shifted by -4 min onto the meter's clock" in result.stdout
    # The command line overrides the site file: the true clock gives no warning.
    fixed = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(out), "--log-offset",
                                f"{suggested:g}"])
    assert fixed.exit_code == 0, fixed.output
    assert "match the meter best" not in fixed.stdout


def test_estimate_fills_short_gaps_for_the_monthly_totals_only(tmp_path):
    s = write_site(tmp_path / "data", days=3, seed=5)
    lines = s["meter"].read_text(encoding="utf-8").splitlines()
    gone = [float(lines[i].split(",")[1]) for i in (10, 11)]
    before, after = float(lines[9].split(",")[1]), float(lines[12].split(",")[1])
    s["meter"].write_text("\n".join(lines[:10] + lines[12:]) + "\n", encoding="utf-8")
    plain, est = tmp_path / "plain", tmp_path / "est"
    assert runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(plain)]).exit_code == 0
    result = runner.invoke(app, ["breakdown", str(s["site"]), "--out", str(est), "--estimate"])
    assert result.exit_code == 0, result.output
    a = pl.read_parquet(plain / "breakdown.parquet")
    b = pl.read_parquet(est / "breakdown.parquet")
    assert "estimated-gaps" not in a["equipment"].to_list()
    row = b.filter(pl.col("equipment") == "estimated-gaps").row(0, named=True)
    # Linear interpolation between the readings on either side (k/(m+1), m = 2).
    expected = (before + (after - before) / 3) + (before + 2 * (after - before) / 3)
    assert row["kwh"] == pytest.approx(expected, rel=1e-9)
    assert row["flags"].startswith("estimated;")
    assert abs(row["kwh"] - sum(gone)) < 3 * max(gone)  # a plausible fill, not a guess of zero
    # The fit never sees estimated energy: every other row is unchanged.
    assert b.filter(pl.col("equipment") != "estimated-gaps").equals(a)
    assert json.loads((est / "fit.json").read_text())["estimated_months"] == ["2025-01"]


@pytest.mark.parametrize("args, message", [
    (["--log-offset", "nan"], "--log-offset nan: expected a number of minutes from -10080 to 10080"),
    (["--log-offset", "1e12"], "--log-offset 1e+12: expected a number of minutes from -10080 to 10080"),
    (["--find-offset", "--offset-window", "1e9"],
     "--offset-window 1e+09: expected minutes above 0 and at most 720"),
])
def test_offsets_out_of_range_are_error_lines(tmp_path, args, message):
    # Found by the property tests: these used to crash (exit 2) or exhaust memory.
    s = write_site(tmp_path / "data", days=2, seed=5)
    result = runner.invoke(app, ["check", str(s["site"]), *args])
    assert result.exit_code == 1, result.output
    assert result.stderr == f"Error: {message}\n"


def test_a_tiny_nameplate_and_an_odd_time_zone_are_error_lines(tmp_path):
    s = write_site(tmp_path / "data", days=2, seed=5)
    text = s["site"].read_text()
    s["site"].write_text(text.replace('timezone = "America/Chicago"', 'timezone = "America"'))
    result = runner.invoke(app, ["check", str(s["site"])])
    assert result.exit_code == 1
    assert result.stderr == (f"Error: {s['site']}: [site] timezone = 'America': expected an IANA "
                             'time zone name such as "America/Chicago"\n')
    s["site"].write_text(text.replace('[[equipment]]\nid = "CH-1"\n',
                                      '[[equipment]]\nid = "CH-1"\nrated_kw = 1e-300\n'))
    result = runner.invoke(app, ["check", str(s["site"])])
    assert result.exit_code == 1
    assert result.stderr == (f"Error: {s['site']}: [equipment CH-1] rated_kw = 1e-300: expected "
                             "a number above 0 (at least 1e-06)\n")


def test_a_nan_meter_reading_is_an_error_line(tmp_path):
    s = write_site(tmp_path / "data", days=2, seed=5)
    lines = s["meter"].read_text().splitlines()
    lines[5] = lines[5].split(",")[0] + ",NaN"
    s["meter"].write_text("\n".join(lines) + "\n")
    result = runner.invoke(app, ["check", str(s["site"])])
    assert result.exit_code == 1
    assert result.stderr == (f"Error: {s['meter']}: line 6, column 'kwh': 'NaN' is not a number; "
                             "expected energy in kWh\n")


def test_help_keeps_site_file_tables_and_shows_no_value_for_flags():
    # Help text names site-file tables such as [runlog]; a markup renderer would drop them.
    r = runner.invoke(app, ["breakdown", "--help"], terminal_width=100)
    assert r.exit_code == 0
    text = " ".join(r.output.split())
    assert "the site file's [runlog] log_offset_minutes, else 0." in text
    assert "the site file's [meter] on_duplicate, else error." in text
    assert "--xlsx Also write breakdown.xlsx" in text  # a flag takes no value
    assert "<bool>" not in text
