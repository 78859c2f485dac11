"""Synthetic buildings with known truth: recovery, interval coverage, what cannot be told apart,
and months that add up. All data here is invented (tests/synthetic.py)."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from disagg.analyses.breakdown import monthly_breakdown
from disagg.fit.estimate import estimate_draws
from disagg.fit.solvers import quantile
from synthetic import TZ, make_building

SEEDS = range(30)
# Measured on 2026-12-04 over these 30 seeds (5 loads each, 150 intervals per case; the
# misspecified building now takes the data-chosen hour-of-week+level form, so its plain
# interval covers too): well-specified 0.933 (HAC alone 0.920); misspecified 0.940 (HAC
# alone 0.940; F-1 0.933). bench/RESULTS_baseload.md has the same 30 seeds' 0.927 / 0.947.
# Binomial spread of a true 95 % interval over 150 trials (scipy.stats.binom(150, 0.95)):
# sd 1.8 %; P(fewer than 135 covered, i.e. under 0.90) = 0.0036; P(148 or more, i.e. above
# 0.98) = 0.018; its central 95 % range is 137-147 (0.913-0.980). The bounds are that range
# rounded out: under 0.90 the intervals are too narrow, above 0.98 too wide (the issue's
# 90-98 % target). The 150 trials are not independent (five loads share a building), so
# the true spread is somewhat larger. bench/coverage.py runs more seeds and prints detail.
MIN_COVERAGE_WELL = 0.90
MIN_COVERAGE_MISSPECIFIED = 0.90
MAX_COVERAGE = 0.98
# One load over the 30 seeds: scipy.stats.binom(30, p).cdf(25) (fewer than 0.85 covered) is
# 0.016 at a true p = 0.95 and 0.18 at p = 0.90: a coarse guard that catches a collapse (the
# plain HAC interval once covered the scheduled fan in 0 of 30), not a small shortfall.
MIN_COVERAGE_ONE_LOAD = 0.85


def _coverage(misspecified: bool) -> tuple[float, float, dict[str, float]]:
    hits, hac_hits, by_id = [], [], {}
    for seed in SEEDS:
        s = make_building(seed, misspecified=misspecified)
        e = estimate_draws(s.site, s.aligned)
        q = e.critical
        for i, t in enumerate(e.terms):
            truth = s.true_kw[t.id]
            ok = e.kw_low[i] <= truth <= e.kw_high[i]
            hits.append(ok)
            by_id.setdefault(t.id, []).append(ok)
            hac_hits.append(abs(e.kw[i] - truth) <= q * e.se_hac_kw[i])
    return float(np.mean(hits)), float(np.mean(hac_hits)), {k: float(np.mean(v)) for k, v in by_id.items()}


def test_exact_recovery_without_noise_or_prior():
    s = make_building(7, noise_kwh=0.0)
    e = estimate_draws(s.site, s.aligned)
    for i, t in enumerate(e.terms):
        assert e.kw[i] == pytest.approx(s.true_kw[t.id], rel=1e-7)
    np.testing.assert_allclose(e.base_kw, [30.0, 15.0], rtol=1e-7)
    # Exact data: nothing moves under the stability checks, so nothing is flagged unstable.
    assert not any("unstable" in t.flags for t in e.terms)


def test_coverage_well_specified():
    overall, hac_only, by_id = _coverage(misspecified=False)
    assert overall >= MIN_COVERAGE_WELL, (overall, hac_only, by_id)
    assert overall <= MAX_COVERAGE, "intervals far wider than needed when the model is right"


def test_coverage_misspecified_baseload_and_weather():
    overall, hac_only, by_id = _coverage(misspecified=True)
    assert overall >= MIN_COVERAGE_MISSPECIFIED, (overall, hac_only, by_id)
    assert overall <= MAX_COVERAGE, (overall, hac_only, by_id)
    # The scheduled fan absorbs the occupied baseload the engineer did not declare when the
    # baseload form misses it: its interval must still hold the truth.
    assert by_id["F-1"] >= MIN_COVERAGE_ONE_LOAD, by_id


def test_naive_interval_misses_the_scheduled_fan_when_misspecified():
    s = make_building(3, misspecified=True)
    # Pinned to the declared (wrong) constant baseload: the plain robust interval misses the
    # scheduled fan; the stability checks widen it to hold the truth and flag it.
    pinned = dataclasses.replace(s.site, baseload=dataclasses.replace(s.site.baseload,
                                                                     form="constant"))
    e = estimate_draws(pinned, s.aligned)
    assert e.form.form.name == "constant" and e.form.pinned
    i = [t.id for t in e.terms].index("F-1")
    truth = s.true_kw["F-1"]
    assert abs(e.kw[i] - truth) > e.critical * e.se_hac_kw[i]  # the plain HAC interval misses
    assert e.kw_low[i] <= truth <= e.kw_high[i]
    assert "unstable" in e.terms[i].flags


def test_form_chosen_by_the_data_recovers_the_scheduled_fan_when_misspecified():
    s = make_building(3, misspecified=True)
    e = estimate_draws(s.site, s.aligned)
    # The data prefer a baseload that follows the hour of the week and wanders.
    assert e.form.form.name == "hour-of-week+level" and not e.form.pinned
    assert e.form.form.q > 0
    i = [t.id for t in e.terms].index("F-1")
    truth = s.true_kw["F-1"]
    assert e.kw[i] == pytest.approx(truth, rel=0.03)
    assert e.kw_low[i] <= truth <= e.kw_high[i]


def test_pair_running_together_without_priors_is_one_row():
    s = make_building(11, together=True)
    e = estimate_draws(s.site, s.aligned)
    ids = [t.id for t in e.terms]
    assert "CH-1+P-1" in ids and "CH-1" not in ids and "P-1" not in ids
    i = ids.index("CH-1+P-1")
    assert "combined" in e.terms[i].flags
    assert e.kw_low[i] <= s.true_kw["CH-1"] + s.true_kw["P-1"] <= e.kw_high[i]


def test_pair_running_together_with_priors_stays_separate_and_flagged():
    s = make_building(11, together=True, priors={"CH-1": (55.0, 10.0), "P-1": (8.0, 2.0)})
    e = estimate_draws(s.site, s.aligned)
    flags = {t.id: t.flags for t in e.terms}
    assert "inseparable:P-1" in flags["CH-1"] and "inseparable:CH-1" in flags["P-1"]
    i, j = [t.id for t in e.terms].index("CH-1"), [t.id for t in e.terms].index("P-1")
    # The data fix the sum; the priors split it.
    assert e.kw[i] + e.kw[j] == pytest.approx(67.5, rel=0.01)
    assert "prior-driven" in flags["CH-1"] or "prior-driven" in flags["P-1"]


def test_load_on_the_baseload_schedule_without_prior_joins_the_baseload_row():
    s = make_building(5)
    # F-1 made to run exactly on the declared occupied schedule.
    hours = s.aligned.hours.copy()
    j = s.aligned.equipment_ids.index("F-1")
    local = s.aligned.frame["start_utc"].dt.convert_time_zone(TZ)
    h = local.dt.hour().to_numpy()
    wd = local.dt.weekday().to_numpy()
    hours[:, j] = np.where((wd <= 5) & (h >= 7) & (h < 19), 0.25, 0.0)
    aligned = dataclasses.replace(s.aligned, hours=hours)
    e = estimate_draws(s.site, aligned)
    assert e.base_id == "baseload+F-1"
    assert "F-1" not in [t.id for t in e.terms]


def test_prior_dominates_when_the_data_cannot_decide():
    s = make_building(2, together=True, priors={"P-1": (8.0, 0.01)})
    e = estimate_draws(s.site, s.aligned)
    p = [t.id for t in e.terms].index("P-1")
    assert "prior-driven" in e.terms[p].flags
    assert e.kw[p] == pytest.approx(8.0, abs=0.05)


@settings(max_examples=8, deadline=None)
@given(seed=st.integers(0, 10_000), mis=st.booleans(), days=st.integers(10, 40))
def test_every_month_adds_up_to_the_metered_kwh(seed, mis, days):
    s = make_building(seed, days=days, misspecified=mis)
    e = estimate_draws(s.site, s.aligned)
    table = monthly_breakdown(e, TZ)
    local_month = s.aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.strftime("%Y-%m")
    y = s.aligned.frame["energy_kwh"].to_numpy()
    for period, rows in table.group_by("period"):
        metered = y[(local_month == period[0]).to_numpy()].sum()
        assert rows["kwh"].sum() == pytest.approx(metered, rel=1e-9, abs=1e-6)
        assert rows["share"].sum() == pytest.approx(1.0, rel=1e-9)


def test_wider_confidence_gives_wider_intervals():
    s = make_building(4)
    e90 = estimate_draws(s.site, s.aligned, confidence=0.90)
    e99 = estimate_draws(s.site, s.aligned, confidence=0.99)
    assert np.all(e99.kw_high - e99.kw_low > e90.kw_high - e90.kw_low)
    assert quantile(0.99) > quantile(0.90)


def test_informative_prior_is_reported_in_the_terms():
    s = make_building(1, priors={"C-1": (5.0, 1.0)})
    e = estimate_draws(s.site, s.aligned)
    t = e.terms[[t.id for t in e.terms].index("C-1")]
    assert (t.prior_kw, t.prior_sd_kw) == (5.0, 1.0)
