"""The switch-on response check (intervals.switch_on_response, response_columns).

Invented buildings with known truth (tests/synthetic.make_building): an unlogged load that
starts whenever the heater H-1 switches on and runs for 30 minutes (people who draw hot
water switch on lights), so a levels fit reads part of it as the heater's draw.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import statsmodels.api as sm

from disagg.fit.design import design
from disagg.fit.estimate import estimate_draws
from disagg.fit.intervals import response_columns
from disagg.fit.select import Form
from synthetic import make_building

COINCIDENT_KW = 4.0


def with_coincident_load(seed: int, noise_kwh: float = 0.5):
    """make_building's well-specified building plus COINCIDENT_KW for the two 15-minute
    intervals that follow each switch-on of H-1 (counted in whole switches: the rise of its
    on-fraction), in no run log."""
    s = make_building(seed, noise_kwh=noise_kwh)
    a = s.aligned
    frac = a.hours[:, a.equipment_ids.index("H-1")] / 0.25
    rise = np.r_[0.0, np.maximum(np.diff(frac), 0.0)]
    extra = COINCIDENT_KW * 0.25 * (rise + np.r_[0.0, rise[:-1]])
    frame = a.frame.with_columns(a.frame["energy_kwh"] + extra)
    return s, dataclasses.replace(a, frame=frame, cache={})


def test_columns_count_each_switch_on_in_its_lags_and_stop_at_gaps():
    # 15-minute rows: the 45-minute window is three lags, one column each.
    ih = np.full(8, 0.25)
    start = np.arange(8) * 900 * 10**9
    end = start + 900 * 10**9
    h = np.array([0, 1, 1, 0, 0.5, 1, 0, 0]) * 0.25
    R = response_columns(h[:, None], ih, start, end)
    rise = np.array([0, 1, 0, 0, 0.5, 0.5, 0, 0])
    np.testing.assert_allclose(R[:, 0], rise * 0.25)
    np.testing.assert_allclose(R[:, 1], np.r_[0, rise[:-1]] * 0.25)
    np.testing.assert_allclose(R[:, 2], np.r_[0, 0, rise[:-2]] * 0.25)
    # A gap before row 5: no rise at the gap, and no lag reaches across it.
    start2, end2 = start.copy(), end.copy()
    start2[5:] += 3600 * 10**9
    end2[5:] += 3600 * 10**9
    R2 = response_columns(h[:, None], ih, start2, end2)
    np.testing.assert_allclose(R2[:, 0], np.r_[rise[:5], 0, 0, 0] * 0.25)
    np.testing.assert_allclose(R2[5:, 1:], 0.0)
    # 1-minute rows: 45 lags in three blocks of 15.
    n = 60
    ih1 = np.full(n, 1 / 60)
    s1 = np.arange(n) * 60 * 10**9
    h1 = np.zeros(n)
    h1[10:] = 1 / 60  # one switch-on at row 10
    R1 = response_columns(h1[:, None], ih1, s1, s1 + 60 * 10**9)
    assert R1.shape == (n, 3)
    for b in range(3):
        want = np.zeros(n)
        want[10 + 15 * b:10 + 15 * (b + 1)] = 1 / 60
        np.testing.assert_allclose(R1[:, b], want)


def test_the_refit_holds_the_heaters_own_draw_and_the_interval_covers_it():
    s, aligned = with_coincident_load(0)
    e = estimate_draws(s.site, aligned, form=Form("occupied", False))
    ids = [t.id for t in e.terms]
    i = ids.index("H-1")
    truth = s.true_kw["H-1"]
    r = e.variants["switch-on response"]["H-1"]
    # The levels draw takes part of the coincident load (its spells last 2.5 h on average:
    # 4 kW x 0.5 h per switch-on is about +4 % of 18 kW) and its HAC interval misses.
    assert e.kw[i] > truth + 3 * e.se_hac_kw[i]
    # The refit with the response columns holds the heater's own draw.
    assert r["kw"] == pytest.approx(truth, abs=3 * r["se_kw"])
    assert e.kw_low[i] <= truth <= e.kw_high[i]


def test_refit_matches_statsmodels_ols_on_the_same_columns():
    # Outside check: statsmodels OLS on [design, response columns] (static occupied form,
    # no priors: the weak prior's ridge is negligible).
    s, aligned = with_coincident_load(1)
    e = estimate_draws(s.site, aligned, form=Form("occupied", False))
    members = [t.members for t in e.terms if t.id in aligned.equipment_ids]
    d = design(s.site, aligned, members, Form("occupied", False))
    k = len(members)  # all five loads of make_building are on-off: each gets its columns
    start = d.frame["start_utc"].dt.epoch("ns").to_numpy()
    end = d.frame["end_utc"].dt.epoch("ns").to_numpy()
    R = response_columns(d.X[:, :k], d.frame["interval_h"].to_numpy(), start, end)
    ols = sm.OLS(d.y, np.column_stack([d.X, R])).fit()
    for j, m in enumerate(members):
        got = e.variants["switch-on response"][m[0]]["kw"]
        assert got == pytest.approx(ols.params[j], rel=1e-6), m


def test_no_widening_without_a_coincident_load():
    # Well-specified building: the refit agrees with the fit, no interval names it.
    for seed in (2, 3):
        s = make_building(seed)
        e = estimate_draws(s.site, s.aligned)
        entry = e.variants.get("switch-on response")
        # The check ran (not skipped, not screened) on every load: all five of make_building's
        # loads are on-off, fitted one by one.
        assert entry and not {"skipped", "screened"} & set(entry), entry
        assert set(entry) == {t.id for t in e.terms if t.column is not None} and len(entry) == 5
        for i, t in enumerate(e.terms):
            assert entry[t.id]["kw"] == pytest.approx(e.kw[i], abs=3 * e.se_hac_kw[i])
        assert not any("switch-on response" in w for w in e.warnings)


def test_a_month_checks_only_the_loads_whose_draw_moved_in_the_range():
    # A month's fit looks only at the loads the range's check moved (H-1, whose coincident
    # load moves the others' draws too), and with nothing to look at says it was screened.
    from disagg.fit.intervals import response_moved

    s, aligned = with_coincident_load(0)
    whole = estimate_draws(s.site, aligned, form=Form("occupied", False))
    moved = response_moved(whole.variants)
    assert "H-1" in moved and len(moved) < len(whole.variants["switch-on response"])
    month = dataclasses.replace(aligned, use=aligned.use & (np.arange(len(aligned.use))
                                                              < 96 * 28))
    e = estimate_draws(s.site, month, form=whole.form, response_loads={"H-1"})
    assert set(e.variants["switch-on response"]) == {"H-1"}
    e = estimate_draws(s.site, month, form=whole.form, response_loads=moved)
    assert set(e.variants["switch-on response"]) == moved
    e = estimate_draws(s.site, month, form=whole.form, response_loads=frozenset())
    assert e.variants["switch-on response"] == {
        "screened": "no load's draw moved with its switch-on response in the whole range's fit"}
