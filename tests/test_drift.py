"""Drift tracking and alarms (disagg.analyses.drift) on synthetic buildings with known truth.

All data here is invented (tests/synthetic.py). The stable range 0 < mu < 2 of normalized LMS
is from docs/references.md section 4 (vendor DSP documentation [read]; Haykin, Adaptive Filter
Theory [memory]); the EWMA rule is in tests/test_track.py (drift reads it on the lag-free
recent level with L = Phi^-1(1 - 0.002 / (2 x 365 / memory)), at least 3). tests/synthetic_year.py
builds the office year with weather, an interlocked chiller and pump and a seasonal chiller.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import re

import numpy as np
import polars as pl
import pytest

from disagg.analyses.drift import drift_aligned
from disagg.errors import ConfigError, InputError
from disagg.present.outputs import to_json
from synthetic import TZ, make_building

START = dt.date(2025, 3, 3)  # make_building's first day
DAYS = 240
STEP_ON = START + dt.timedelta(days=120)
STEP_LOAD, STEP_FACTOR = "H-1", 1.15
STEP_SEEDS = range(10)
# Detection delay of a +15 % step in H-1 (memory 30 days, threshold 10 %, default
# reference), measured on 2026-12-04 with the per-weight tracker on differenced data, the
# alarm read on the lag-free recent level and confirmed by a least-squares fit of the same
# window, over these 10 seeds: 18, 17, 20, 20, 20, 20, 23, 20, 18, 19 days (was 39-49 with
# one step size for all loads and the lagging tracked value). Both read the last 30 days, so
# they pass 10 % of a 15 % step once about two thirds of the window lie after the step.
MAX_DELAY_DAYS = 30
FALSE_ALARM_SEEDS = range(30)
# Stationary 240-day buildings, measured on 2026-12-01 over these 30 seeds: 0 of 30 runs and
# 0 of 150 load-runs with any alarm (bench/drift.py, seeds 0-99: 0 of 100 runs, 0 of 500
# load-runs); again 0 of 30 on 2026-12-04 with the per-weight tracker and the windowed
# check. With 0 of 30 observed, the false-alarm rate per run is below 10 % with 95 %
# confidence (rule of three); one run is allowed so that the bound is not the measurement.
MAX_FALSE_ALARM_RUNS = 1
THRESHOLD = 0.10


def _first_alarms(result) -> dict[str, dt.date]:
    return {a.equipment: dt.date.fromisoformat(a.first_alarm_date)
            for a in result.summary.alarms}


def test_a_15_percent_step_is_alarmed_for_that_load_only_within_the_stated_delay():
    # H-1 cycles on its own. The tracker works on differenced data, where loads show only
    # when they switch, so a step is not blamed on a load that runs alongside (before: a
    # step in CH-1 was first alarmed on its pump P-1 in 20 of 20 runs; bench/drift.py).
    delays, covered = [], 0
    for seed in STEP_SEEDS:
        s = make_building(seed, days=DAYS, step=(STEP_LOAD, STEP_FACTOR), step_on=STEP_ON)
        result = drift_aligned(s.site, s.aligned)
        first = _first_alarms(result)
        assert set(first) == {STEP_LOAD}, (seed, first)
        delays.append((first[STEP_LOAD] - STEP_ON).days)
        alarm = result.table.filter(pl.col("equipment") == STEP_LOAD)
        assert not alarm.filter(pl.col("date") < STEP_ON)["alarm"].any()
        # The change 120 days after the step: the mean draw of the last memory-length over
        # the reference (the tracker's lag taken out), its interval carrying that level's
        # and the reference's errors. Measured: 0.139-0.171; the 95 % interval holds the true
        # 0.15 in 10 of 10 seeds (before, without the lag and the reference's error: 2 of 10).
        a = result.summary.alarms[0]
        assert THRESHOLD < a.change < 0.2, (seed, a.change)
        covered += a.change_low <= STEP_FACTOR - 1 <= a.change_high
    assert max(delays) <= MAX_DELAY_DAYS, delays
    assert min(delays) > 0, delays
    # 95 % intervals: 8 or more of 10 hold the truth with probability 0.99 (binomial).
    assert covered >= 8


def test_stationary_buildings_rarely_alarm():
    runs_with_alarm, load_runs_with_alarm, load_runs = 0, 0, 0
    for seed in FALSE_ALARM_SEEDS:
        s = make_building(seed, days=DAYS)
        first = _first_alarms(drift_aligned(s.site, s.aligned))
        runs_with_alarm += bool(first)
        load_runs_with_alarm += len(first)
        load_runs += len(s.aligned.equipment_ids)
    assert runs_with_alarm <= MAX_FALSE_ALARM_RUNS, (runs_with_alarm, load_runs_with_alarm)
    assert load_runs_with_alarm <= MAX_FALSE_ALARM_RUNS, (load_runs_with_alarm, load_runs)


def _months(aligned) -> list[np.ndarray]:
    """Masks of the used intervals in each local calendar month, in time order."""
    month = aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.strftime("%Y-%m").to_numpy()
    return [aligned.use & (month == m) for m in sorted(set(month))]


def test_month_by_month_equals_one_pass():
    s = make_building(11, days=150, step=(STEP_LOAD, STEP_FACTOR), step_on=dt.date(2025, 5, 1))
    reference = (START, dt.date(2025, 3, 31))  # the first month, the same for both
    whole = drift_aligned(s.site, s.aligned, reference=reference)
    tables, state, last = [], None, None
    for mask in _months(s.aligned):
        month = dataclasses.replace(s.aligned, use=mask)
        last = drift_aligned(s.site, month, reference=reference, state=state)
        tables.append(last.table)
        # As through --state: the state goes through its JSON file between months.
        state = json.loads(to_json(last.state))
    assert len(tables) == 5
    monthly = pl.concat(tables).sort("equipment", "date", maintain_order=True)
    one = whole.table.sort("equipment", "date", maintain_order=True)
    assert monthly.select("date", "equipment").equals(one.select("date", "equipment"))
    # The same floating-point operations in the same order: equal to the last bit.
    np.testing.assert_array_equal(monthly["kw_tracked"].to_numpy(), one["kw_tracked"].to_numpy())
    np.testing.assert_array_equal(monthly["alarm"].to_numpy(), one["alarm"].to_numpy())
    np.testing.assert_array_equal(monthly["kw_low"].to_numpy(), one["kw_low"].to_numpy())
    # Not a vacuous comparison: the step is alarmed, and the first alarm date is carried on.
    assert one["alarm"].any()
    assert _first_alarms(last) == _first_alarms(whole)
    assert last.state["weights"] == whole.state["weights"]


@pytest.fixture(scope="module")
def building_120_days():
    return make_building(12, days=120)


@pytest.mark.parametrize("step, shown", [(2.0, "2"), (2.5, "2.5"), (0.0, "0")])
def test_a_step_outside_the_stable_range_is_refused(building_120_days, step, shown):
    s = building_120_days
    with pytest.raises(ConfigError) as exc:
        drift_aligned(s.site, s.aligned, step=step)
    assert str(exc.value) == (f"--step {shown}: outside the stable range 0 < mu < 2 of "
                              "normalized LMS (Haykin, Adaptive Filter Theory); use a value "
                              "such as 0.05")


def test_a_step_just_inside_the_range_runs(building_120_days):
    s = building_120_days
    result = drift_aligned(s.site, s.aligned, step=1.99)
    assert result.summary.step_size_mu == 1.99
    assert np.isfinite(result.table["kw_tracked"].to_numpy()).all()


def test_a_memory_needing_an_unstable_step_is_refused_naming_the_shortest_memory(building_120_days):
    s = building_120_days
    with pytest.raises(ConfigError) as exc:
        drift_aligned(s.site, s.aligned, memory_days=0.01)
    m = re.fullmatch(r"--memory 0\.01: this memory needs step size mu = ([0-9.]+), outside the "
                     r"stable range 0 < mu < 2 of normalized LMS; use a memory of at least "
                     r"([0-9.]+) days", str(exc.value))
    assert m, str(exc.value)
    assert float(m.group(1)) >= 2.0
    shortest = float(m.group(2))
    # The memory it names is accepted, and gives a step inside the range.
    result = drift_aligned(s.site, s.aligned, memory_days=shortest)
    mu = result.summary.step_size_mu
    assert mu > 1.0 and mu < 2.0


def test_memory_over_a_third_of_the_data_is_warned_about(building_120_days):
    s = building_120_days
    note = ("the memory of 41 days is over a third of the 120 days of data: the tracker cannot "
            "follow a change within this data; use a shorter --memory")
    assert note in drift_aligned(s.site, s.aligned, memory_days=41).summary.notes
    notes = drift_aligned(s.site, s.aligned, memory_days=39).summary.notes
    assert not any("over a third" in n for n in notes)


def test_memory_must_be_positive(building_120_days):
    s = building_120_days
    with pytest.raises(ConfigError) as exc:
        drift_aligned(s.site, s.aligned, memory_days=0)
    assert str(exc.value) == "--memory 0: expected a number of days above 0"


def test_loads_that_run_together_are_tracked_and_alarmed_as_their_group():
    # The pump runs exactly with the chiller and has a tight prior, so the breakdown keeps
    # them as two rows, each inseparable from the other. Their combined draw is well
    # determined: drift tracks and alarms the group CH-1+P-1 (true 60 + 7.5 kW; the
    # chiller's +15 % is +9 kW, +13.3 % of the group).
    s = make_building(13, days=150, together=True, priors={"P-1": (7.5, 0.5)},
                      step=("CH-1", STEP_FACTOR), step_on=dt.date(2025, 6, 15))
    result = drift_aligned(s.site, s.aligned)
    summary = result.summary
    assert summary.groups == ["CH-1+P-1"]
    status = {r["equipment"]: r for r in summary.equipment}
    for eq in ("CH-1", "P-1"):
        assert status[eq]["status"] == "covered by group"
        assert status[eq]["tracked_as"] == "CH-1+P-1"
        assert eq not in set(result.table["equipment"])
    assert ("CH-1: covered by the group CH-1+P-1: its members run together and the data "
            "cannot tell them apart; the group's combined draw is tracked and alarmed"
            ) in summary.notes
    first = _first_alarms(result)
    assert set(first) == {"CH-1+P-1"}
    # Measured: alarmed 2025-07-06 (21 days after the step), change +13.4 % (13.0 to 13.9).
    assert dt.date(2025, 6, 15) < first["CH-1+P-1"] <= dt.date(2025, 6, 15) + dt.timedelta(days=45)
    alarm = summary.alarms[0]
    assert alarm.members == ["CH-1", "P-1"]
    truth = 9.0 / 67.5
    assert alarm.change_low <= truth <= alarm.change_high
    assert alarm.kw_reference == pytest.approx(67.5, rel=0.02)


# --- the synthetic office year of tests/synthetic_year.py ----------------------------------

from synthetic_year import CHILLER_STEP_ON, make_year  # noqa: E402


def test_the_degrading_chiller_group_is_alarmed_within_45_days_and_nothing_else():
    # The lead chiller CH-1 (+15 % from 2025-07-25) always runs with its condenser pump
    # CWP-1; both have nameplate priors. The lag chiller CH-2 runs only in summer.
    s = make_year(0, steps={"CH-1": (1.15, CHILLER_STEP_ON)})
    result = drift_aligned(s.site, s.aligned)
    first = _first_alarms(result)
    assert set(first) == {"CH-1+CWP-1"}, first
    delay = (first["CH-1+CWP-1"] - CHILLER_STEP_ON).days
    assert 0 < delay <= 45, delay
    # The lag chiller is tracked from its own season, not missing.
    windows = result.summary.reference_per_equipment
    assert "CH-2" in windows
    assert dt.date.fromisoformat(windows["CH-2"][0]) >= dt.date(2025, 4, 1)
    assert windows["AC-1"] == ["2025-01-01", "2025-03-31"]
    # The group's true change: +18 kW on 135 kW.
    a = result.summary.alarms[0]
    assert a.change_low <= 18.0 / 135.0 <= a.change_high, a


def test_a_seasonal_load_is_tracked_from_its_own_season_and_its_step_alarmed():
    # CH-2 first runs in late April; its own reference is its first 90 days from then. A
    # +30 % step from 2025-08-10 (late in its season) is alarmed on CH-2 alone.
    s = make_year(1, steps={"CH-2": (1.30, dt.date(2025, 8, 10))})
    result = drift_aligned(s.site, s.aligned)
    window = [dt.date.fromisoformat(d) for d in result.summary.reference_per_equipment["CH-2"]]
    local = s.aligned.frame["start_utc"].dt.convert_time_zone("America/Chicago").dt.date()
    first_run = local.filter(s.aligned.hours[:, s.aligned.equipment_ids.index("CH-2")] > 0).min()
    assert window[0] == first_run
    assert (window[1] - window[0]).days == 89
    first = _first_alarms(result)
    assert set(first) == {"CH-2"}, first
    assert dt.date(2025, 8, 10) < first["CH-2"] <= dt.date(2025, 9, 30)
    # With one reference for all (the first 90 days) CH-2 never ran in it: listed, with why.
    pinned = drift_aligned(s.site, s.aligned, reference=(dt.date(2025, 1, 1), dt.date(2025, 3, 31)))
    status = {r["equipment"]: r for r in pinned.summary.equipment}
    assert status["CH-2"]["status"] == "no reference"
    assert "did not run in its reference period" in status["CH-2"]["detail"]
    assert "CH-2" not in set(pinned.table["equipment"])


def test_loads_that_never_reach_the_reference_run_hours_are_listed_with_the_reason():
    s = make_year(2, days=200)
    # 200 days: CH-2 runs about 440 h in all, the air compressor AC-1 about 525 h per 90 days.
    result = drift_aligned(s.site, s.aligned, min_reference_run_h=600.0)
    status = {r["equipment"]: r for r in result.summary.equipment}
    assert status["CH-2"]["status"] == "no reference"
    for eq in ("CH-2", "AC-1"):
        assert status[eq]["status"] == "no reference"
        assert status[eq]["detail"].startswith("no 90 days of the data hold 600 of its run-hours")
        assert any(n.startswith(f"{eq}: no 90 days of the data hold 600")
                   for n in result.summary.notes)
        assert eq not in set(result.table["equipment"])
    assert status["FZ-1"]["status"] == "tracked"
    # Nothing reaches 5000 run-hours in 90 days: one clear error.
    with pytest.raises(InputError, match="no load has a reference period"):
        drift_aligned(s.site, s.aligned, min_reference_run_h=5000.0)


def test_drift_command_takes_the_reference_hours_and_refuses_a_bad_value(tmp_path):
    from typer.testing import CliRunner

    from disagg.cli import app
    from test_cli import write_site
    paths = write_site(tmp_path)
    runner = CliRunner()
    r = runner.invoke(app, ["drift", str(paths["site"]), "--out", str(tmp_path / "bad"),
                            "--reference-hours", "0"])
    assert r.exit_code == 1
    assert r.output.strip() == "Error: --reference-hours 0: expected run-hours above 0"
    assert not (tmp_path / "bad").exists()
    r = runner.invoke(app, ["drift", str(paths["site"]), "--out", str(tmp_path / "ok"),
                            "--reference-hours", "10", "--baseload-memory", "5"])
    assert r.exit_code == 0, r.output
    summary = json.loads((tmp_path / "ok" / "drift.json").read_text(encoding="utf-8"))
    assert summary["equipment"] and summary["reference_per_equipment"]


def test_a_step_is_alarmed_on_its_load_and_not_on_the_pump_that_switches_with_it():
    # P-1 runs whenever CH-1 runs (and at other times): their switchings often coincide, so
    # the tracker's transient puts part of CH-1's +15 % on P-1. Measured on seeds 0-9: before
    # the windowed least-squares check P-1 alarmed in 10 of 10 runs (CH-1 after 11-14 days);
    # with it only CH-1 alarms, after 18-20 days (the check reads the whole 30-day window).
    for seed in range(3):
        s = make_building(seed, days=DAYS, step=("CH-1", STEP_FACTOR), step_on=STEP_ON)
        first = _first_alarms(drift_aligned(s.site, s.aligned))
        assert set(first) == {"CH-1"}, (seed, first)
        assert 0 < (first["CH-1"] - STEP_ON).days <= MAX_DELAY_DAYS


def test_differences_skip_gaps_and_continue_from_the_previous_run():
    from disagg.analyses.drift import differences
    t0 = dt.datetime(2025, 1, 1, tzinfo=dt.UTC)
    starts = [t0 + dt.timedelta(minutes=15 * i) for i in (0, 1, 2, 5, 6)]  # a gap after 2
    frame = pl.DataFrame({"start_utc": starts,
                          "end_utc": [s + dt.timedelta(minutes=15) for s in starts]})
    X = np.array([[0.25, 1.0], [0.0, 1.0], [0.25, 1.0], [0.25, 1.0], [0.0, 1.0]])
    y = np.array([10.0, 4.0, 9.0, 11.0, 5.0])
    dX, dy = differences(frame, X, y, None)
    np.testing.assert_array_equal(dX, [[0, 0], [-0.25, 0], [0.25, 0], [0, 0], [-0.25, 0]])
    np.testing.assert_array_equal(dy, [0.0, -6.0, 5.0, 0.0, -6.0])
    # The first row continues from the previous run's last interval when it is adjacent.
    prev = {"end_utc": starts[0].isoformat(), "x": [0.0, 1.0], "y": 3.0}
    dX2, dy2 = differences(frame, X, y, prev)
    np.testing.assert_array_equal(dX2[0], [0.25, 0.0])
    assert dy2[0] == 7.0
    # Not adjacent: no difference across the gap.
    far = {"end_utc": (t0 - dt.timedelta(hours=1)).isoformat(), "x": [0.0, 1.0], "y": 3.0}
    dX3, dy3 = differences(frame, X, y, far)
    assert dy3[0] == 0.0 and not dX3[0].any()
