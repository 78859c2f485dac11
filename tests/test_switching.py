"""The switching-steps check (disagg.fit.intervals.switching_steps): a load's draw from the
meter's steps where it switches on against those where it switches off. Synthetic data with
known truth (invented here, tests/synthetic.py) and an outside check against statsmodels OLS."""

from __future__ import annotations

import dataclasses

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm

from disagg.fit.estimate import estimate_draws
from disagg.fit.intervals import STEP_SENSITIVE, split_switching, switching_steps
from synthetic import make_building


def _with_coincident_load(seed: int, load: str = "H-1", kw: float = 6.0, lasts: int = 4):
    """The well-specified building plus an unlogged load of `kw` that starts whenever `load`
    switches on for a spell longer than `lasts` intervals and runs `lasts` intervals (say,
    lights switched on by whoever made the logged load start, off again before it stops)."""
    s = make_building(seed)
    j = s.aligned.equipment_ids.index(load)
    on = s.aligned.hours[:, j] > 0
    starts = np.flatnonzero(on[1:] & ~on[:-1]) + 1
    extra = np.zeros(len(on))
    for i in starts:
        if on[i:i + lasts + 1].all():
            extra[i:i + lasts] = kw * 0.25
    frame = s.aligned.frame.with_columns(pl.col("energy_kwh") + extra)
    return s, dataclasses.replace(s.aligned, frame=frame)


def test_split_parts_add_up_and_carry_only_rises_or_falls():
    h = np.array([0.0, 0.25, 0.25, 0.1, 0.0, 0.2, 0.25, 0.0])
    ih = np.full(len(h), 0.25)
    up, down = split_switching(h, ih)
    assert up + down == pytest.approx(h, abs=1e-12)
    assert np.all(np.diff(up / ih) >= 0) and np.all(np.diff(down / ih) <= 0)
    # The on-fraction rises 1.0 + 0.8 + 0.2 in all: the on part ends at 2.0 (its start 0).
    assert up[-1] / 0.25 == pytest.approx(2.0)


def test_exact_on_and_off_steps_without_noise():
    # y = 10 kW x on-fraction + 3 kW unlogged from each switch-on until two intervals after
    # the switch-off + 20 kW: the meter steps +13 kW at switch-on and -10 kW at switch-off
    # (the unlogged load stops later, in intervals where the logged load does not switch).
    n = 400
    frac = np.tile(np.r_[np.ones(8), np.zeros(8)], n // 16)
    unlogged = np.tile(np.r_[np.ones(10), np.zeros(6)], n // 16)
    ih = np.full(n, 0.25)
    y = (10.0 * frac + 3.0 * unlogged + 20.0) * ih
    X = np.column_stack([frac * ih, ih])  # run-hours, constant baseload column
    days = np.repeat(np.arange(n // 96 + 1), 96)[:n]
    st = switching_steps(X, y, 1, 1, ih, (np.zeros(1), np.full(1, 1e6)), days[1:])
    assert st.on_kw[0] == pytest.approx(13.0, abs=1e-6)
    assert st.off_kw[0] == pytest.approx(10.0, abs=1e-6)


def test_step_draws_match_statsmodels_ols_on_the_differenced_split_design():
    rng = np.random.default_rng(5)
    n = 600
    ih = np.where(np.arange(n) % 50 == 0, 0.5, 0.25)  # some longer intervals
    frac = np.clip((rng.random(n) < 0.3) + 0.0 - 0.2 * (rng.random(n) < 0.1), 0, 1)
    frac2 = (rng.random(n) < 0.5) * rng.random(n)
    occupied = (np.arange(n) // 40) % 2  # a stepping baseload profile
    level = np.cumsum(rng.normal(0, 0.3, n))  # and a wandering level
    y = (8.0 * frac + 3.0 * frac2 + 15.0 + 6.0 * occupied + level
         + rng.normal(0, 1.0, n)) * ih
    X = np.column_stack([frac * ih, frac2 * ih, occupied * ih])
    days = np.repeat(np.arange(n), 96)[:n]
    st = switching_steps(X, y, 2, 2, ih, (np.zeros(2), np.full(2, 1e8)), days[1:])
    # Reference: OLS of the kW differences on the split columns' differences, without the
    # steps where the profile changes (there its difference is not zero).
    parts = [split_switching(X[:, c], ih) for c in range(2)]
    Xs = np.column_stack([parts[0][0], parts[1][0], parts[0][1], parts[1][1]]) / ih[:, None]
    keep = np.diff(occupied) == 0
    ref = sm.OLS(np.diff(y / ih)[keep], np.diff(Xs, axis=0)[keep]).fit()
    assert np.r_[st.on_kw, st.off_kw] == pytest.approx(ref.params, rel=1e-6)
    assert np.r_[st.on_kw, st.off_kw] == pytest.approx([8.0, 3.0, 8.0, 3.0], abs=0.6)


def test_a_coincident_unlogged_load_is_flagged_and_its_interval_holds_the_own_draw():
    s, aligned = _with_coincident_load(2)
    e = estimate_draws(s.site, aligned)
    i = [t.id for t in e.terms].index("H-1")
    truth = s.true_kw["H-1"]  # the load's own draw: 18 kW
    # The levels fit takes in some of the coincident energy...
    assert e.kw[i] > truth * 1.05
    # ... the switch-off steps do not, and the interval spans both.
    assert "switch-steps" in e.terms[i].flags
    assert e.kw_low[i] <= truth <= e.kw_high[i]
    assert any("H-1: the meter steps by" in w for w in e.warnings)
    entry = e.variants["switch steps"]["H-1"]
    assert entry["kw_at_switch_off"] == pytest.approx(truth, rel=0.03)
    assert entry["kw"] > truth + 2.0  # the 6 kW start partly falls in the switching interval


def test_no_flag_where_every_load_is_its_logged_self():
    s = make_building(2)
    e = estimate_draws(s.site, s.aligned)
    assert not any("switch-steps" in t.flags for t in e.terms)
    for t in e.terms:
        entry = e.variants["switch steps"][t.id]
        assert abs(entry["z_difference"]) < 3.0, t.id


def test_a_small_significant_difference_widens_without_the_flag():
    # 1.5 kW that starts with an 18 kW load: its step draws differ significantly but by
    # under STEP_SENSITIVE of the draw; the interval spans both, the widening shows as
    # `unstable` and its warning names the two step draws.
    s, aligned = _with_coincident_load(2, kw=1.5)
    e = estimate_draws(s.site, aligned)
    i = [t.id for t in e.terms].index("H-1")
    entry = e.variants["switch steps"]["H-1"]
    assert abs(entry["z_difference"]) > 1.96
    assert abs(entry["kw"] - entry["kw_at_switch_off"]) < STEP_SENSITIVE * e.kw[i]
    assert "switch-steps" not in e.terms[i].flags and "unstable" in e.terms[i].flags
    assert e.kw_low[i] <= min(entry["kw"], entry["kw_at_switch_off"])
    assert e.kw_high[i] >= max(entry["kw"], entry["kw_at_switch_off"])
    assert e.kw_low[i] <= s.true_kw["H-1"] <= e.kw_high[i]
    assert any("H-1 is unstable" in w and "where it switches off" in w for w in e.warnings)


def test_a_variable_speed_load_is_not_judged_by_its_steps():
    # In the office with every baseload departure ("all"), the variable-speed fan's rise and
    # fall draws differ by 11 % (z about 2): those are speed changes, not switching, and
    # leave its interval alone.
    from synthetic import make_office

    s = make_office(0, "all")
    e = estimate_draws(s.site, s.aligned)
    i = [t.id for t in e.terms].index("VF-1")
    entry = e.variants["switch steps"]["VF-1"]
    assert "variable" in e.terms[i].flags
    assert abs(entry["z_difference"]) > 1.96
    assert abs(entry["kw"] - entry["kw_at_switch_off"]) > STEP_SENSITIVE * e.kw[i]
    assert "switch-steps" not in e.terms[i].flags
    assert not any("VF-1" in w and "where it switches off" in w for w in e.warnings)


def test_a_baseload_that_swings_through_the_hour_does_not_move_the_steps():
    # The office's daily swing (+-6 kW, peak 15:00) rises through every morning hour, when
    # the water heater cycles: without the hourly mean steps the swing would add to its
    # switch-on steps and take from its switch-off steps.
    from synthetic import make_office

    s = make_office(1, "swing")
    e = estimate_draws(s.site, s.aligned)
    entry = e.variants["switch steps"]["WH-1"]
    assert abs(entry["z_difference"]) < 1.96
    assert entry["kw"] == pytest.approx(s.true_kw["WH-1"], rel=0.05)
    assert entry["kw_at_switch_off"] == pytest.approx(s.true_kw["WH-1"], rel=0.05)


def test_a_step_across_a_meter_gap_is_no_switching_step():
    # The exact building of test_exact_on_and_off_steps_without_noise, read in two pieces with
    # a gap between them: after the gap the baseload is 40 kW higher and the load is on. The
    # step across the gap is left out, so both step draws stay exact.
    n = 400
    frac = np.tile(np.r_[np.ones(8), np.zeros(8)], n // 16)
    unlogged = np.tile(np.r_[np.ones(10), np.zeros(6)], n // 16)
    ih = np.full(n, 0.25)
    base = np.where(np.arange(n) >= 208, 60.0, 20.0)  # row 208 starts a spell, after the gap
    y = (10.0 * frac + 3.0 * unlogged + base) * ih
    X = np.column_stack([frac * ih, ih])
    days = np.repeat(np.arange(n // 96 + 1), 96)[:n]
    adjacent = np.ones(n - 1, dtype=bool)
    adjacent[207] = False  # rows 207 and 208 are hours apart
    prior = (np.zeros(1), np.full(1, 1e6))
    st = switching_steps(X, y, 1, 1, ih, prior, days[1:], adjacent=adjacent)
    assert (st.on_kw[0], st.off_kw[0]) == pytest.approx((13.0, 10.0), abs=1e-6)
    # Taken as a switching step, the gap's 40 kW jump would move the switch-on draw.
    moved = switching_steps(X, y, 1, 1, ih, prior, days[1:])
    assert abs(moved.on_kw[0] - 13.0) > 0.5

