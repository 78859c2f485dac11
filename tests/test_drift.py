"""Drift tracking and alarms (disagg.analyses.drift) on synthetic buildings with known truth.

All data here is invented (tests/synthetic.py). The stable range 0 < mu < 2 of normalized LMS
is from references.md section 4 (vendor DSP documentation [read]; Haykin, Adaptive Filter
Theory [memory]); the alarm rule and its L = 3 are in tests/test_track.py.
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
from disagg.errors import ConfigError
from disagg.present.outputs import to_json
from synthetic import TZ, make_building

START = dt.date(2025, 3, 3)  # make_building's first day
DAYS = 240
STEP_ON = START + dt.timedelta(days=120)
STEP_LOAD, STEP_FACTOR = "H-1", 1.15
STEP_SEEDS = range(10)
# Detection delay of a +15 % step in H-1 (memory 30 days, threshold 10 %, default 90-day
# reference), measured on 2026-12-01 over these 10 seeds: 39, 44, 44, 48, 49, 44, 49, 39, 46,
# 47 days. Reaching 10 % of a 15 % step takes ln(3) = 1.1 time constants, and the tracked H-1
# has a mean-gain time constant of about 33 days (1.2x that measured, tests/test_track.py).
MAX_DELAY_DAYS = 55
FALSE_ALARM_SEEDS = range(30)
# Stationary 240-day buildings, measured on 2026-12-01 over these 30 seeds: 0 of 30 runs and
# 0 of 150 load-runs with any alarm (bench/drift.py, seeds 0-99: 0 of 100 runs, 0 of 500
# load-runs). With 0 of 30 observed, the false-alarm rate per run is below 10 % with 95 %
# confidence (rule of three); one run is allowed so that the bound is not the measurement.
MAX_FALSE_ALARM_RUNS = 1
THRESHOLD = 0.10


def _first_alarms(result) -> dict[str, dt.date]:
    return {a["equipment"]: dt.date.fromisoformat(a["first_alarm_date"])
            for a in result.summary["alarms"]}


def test_a_15_percent_step_is_alarmed_for_that_load_only_within_the_stated_delay():
    # H-1 cycles on its own. A step in CH-1 instead is first alarmed on its pump P-1, which
    # mostly runs with it (bench/drift.py: P-1 within days in 20 of 20 runs, CH-1 itself after
    # 77-95 days); a step in F-1, which follows the occupied hours, goes into the baseload.
    delays = []
    for seed in STEP_SEEDS:
        s = make_building(seed, days=DAYS, step=(STEP_LOAD, STEP_FACTOR), step_on=STEP_ON)
        result = drift_aligned(s.site, s.aligned)
        first = _first_alarms(result)
        assert set(first) == {STEP_LOAD}, (seed, first)
        delays.append((first[STEP_LOAD] - STEP_ON).days)
        alarm = result.table.filter(pl.col("equipment") == STEP_LOAD)
        assert not alarm.filter(pl.col("date") < STEP_ON)["alarm"].any()
        # The estimated change 120 days after the step: past the threshold, not past the step.
        # (Measured 0.137-0.144: the tracker still lags about 5 % of the step, and the stated
        # interval, which holds noise only, covers the true 0.15 in 2 of 10 seeds.)
        change = result.summary["alarms"][0]["change"]
        assert THRESHOLD < change < STEP_FACTOR - 1 + 0.01, (seed, change)
    assert max(delays) <= MAX_DELAY_DAYS, delays
    assert min(delays) > 0, delays


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
    assert result.summary["step_size_mu"] == 1.99
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
    mu = result.summary["step_size_mu"]
    assert mu > 1.0 and mu < 2.0


def test_memory_over_a_third_of_the_data_is_warned_about(building_120_days):
    s = building_120_days
    note = ("the memory of 41 days is over a third of the 120 days of data: the tracker cannot "
            "follow a change within this data; use a shorter --memory")
    assert note in drift_aligned(s.site, s.aligned, memory_days=41).summary["notes"]
    notes = drift_aligned(s.site, s.aligned, memory_days=39).summary["notes"]
    assert not any("over a third" in n for n in notes)


def test_memory_must_be_positive(building_120_days):
    s = building_120_days
    with pytest.raises(ConfigError) as exc:
        drift_aligned(s.site, s.aligned, memory_days=0)
    assert str(exc.value) == "--memory 0: expected a number of days above 0"


def test_inseparable_and_prior_driven_loads_are_tracked_but_not_alarmed():
    # The pump runs exactly with the chiller; the pump has a tight prior. The chiller's draw
    # steps up 15 %: the tracker cannot tell whose draw rose and shares the rise.
    s = make_building(13, days=150, together=True, priors={"P-1": (7.5, 0.5)},
                      step=("CH-1", STEP_FACTOR), step_on=dt.date(2025, 6, 15))
    result = drift_aligned(s.site, s.aligned)
    notes = result.summary["notes"]
    assert ("CH-1: tracked but not alarmed (its reference draw is inseparable:P-1: the data "
            "cannot pin it down)") in notes
    assert ("P-1: tracked but not alarmed (its reference draw is inseparable:CH-1: the data "
            "cannot pin it down)") in notes
    table = result.table
    for eq in ("CH-1", "P-1"):
        rows = table.filter(pl.col("equipment") == eq)
        assert rows.height == 150
        assert not rows["alarm"].any()
    # The rule alone would have fired on the pump (measured: +55 % at most, far outside its
    # band): it is the flag that keeps it quiet.
    pump = table.filter(pl.col("equipment") == "P-1")
    sd = result.summary["band_sd_kw"]["P-1"]
    moved = (pump["kw_tracked"] - pump["kw_reference"]).abs()
    assert ((moved > 3 * sd) & (pump["change"].abs() > THRESHOLD)).any()
    assert result.summary["alarms"] == []
