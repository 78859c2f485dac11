"""The interval checks of issue 10 that no other test would notice breaking: the between-week
variance of each draw (DerSimonian-Laird tau^2) and the monthly kWh it widens, the spread
between credible baseload forms (intervals.form_spread), and the flags with their plain-words
reasons (form-sensitive, schedule-edge, and those of a combined row).

All buildings here are invented (tests/synthetic.py). Outside check: statsmodels'
random-effects pooling (statsmodels.stats.meta_analysis.combine_effects, method_re="dl").
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from statsmodels.stats.meta_analysis import combine_effects
from synthetic import TZ, aligned_15min, make_building, make_office

from disagg.analyses.breakdown import monthly_breakdown
from disagg.fit.estimate import estimate_draws
from disagg.fit.intervals import (
    FORM_SENSITIVE,
    POOL_MIN_DOF,
    POOL_WEEKS,
    Hull,
    Jackknife,
    between_week_variance,
    form_spread,
    level_smoother,
)
from disagg.fit.select import CREDIBLE_WEIGHT, Form, FormChoice, FormScore
from disagg.fit.wander import Spacing, smooth_level

# --- between-week variance (DerSimonian-Laird) --------------------------------------------


def _weekly_case(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Six weeks of seven days, 8 intervals a day, two loads: the first draws 1.5 kW (sd)
    more or less from one week to the next (the second, running alongside it, sees that in
    its residuals too). Returns H (n, 2) [h], u (n,) residual [kWh], b (2,) [kW], week,
    days (n,)."""
    rng = np.random.default_rng(seed)
    weeks, per_day = 6, 8
    days = np.repeat(np.arange(weeks * 7), per_day)
    week = days // 7
    H = rng.uniform(0.0, 0.25, (len(days), 2))
    shift_kw = rng.normal(0.0, 1.5, weeks)[week]  # the first load's weekly departure
    u = H[:, 0] * shift_kw + rng.normal(0.0, 0.05, len(days))
    return H, u, np.array([10.0, 4.0]), week, days


def _week_estimates(g: np.ndarray, u: np.ndarray, b: float, week: np.ndarray,
                    days: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each week's draw and its variance as between_week_variance's docstring defines them,
    for g the run-hours column (or the part of it a level leaves), written out week by week:
    b_w = b + sum g u / sum g^2 over the week; the day sums z_d of g (u - g (b_w - b)) (the
    residual of the week's own estimate); per block of POOL_WEEKS weeks, phi = sum z_d^2 /
    sum over weeks of (gg_w - sum_d gg_d^2 / gg_w) with nu = sum of (days - 1);
    var_w = phi nu / ((nu - 2) gg_w). (Every week here runs on every day, and every block
    has at least POOL_MIN_DOF degrees of freedom.)"""
    weeks = np.unique(week)
    est, gg, z2, scale, nu = [], [], [], [], []
    for w in weeks:
        m = week == w
        gg_w = float(np.sum(g[m] ** 2))
        est.append(b + float(np.sum(g[m] * u[m])) / gg_w)
        r = u - g * (est[-1] - b)
        d_of_w = np.unique(days[m])
        z = [float(np.sum(g[m & (days == d)] * r[m & (days == d)])) for d in d_of_w]
        gg_d = [float(np.sum(g[m & (days == d)] ** 2)) for d in d_of_w]
        gg.append(gg_w)
        z2.append(float(np.sum(np.square(z))))
        scale.append(gg_w - float(np.sum(np.square(gg_d))) / gg_w)
        nu.append(len(d_of_w) - 1)
    var = []
    for i in range(len(weeks)):
        blk = slice(i // POOL_WEEKS * POOL_WEEKS, (i // POOL_WEEKS + 1) * POOL_WEEKS)
        n_b = float(np.sum(nu[blk]))
        assert n_b >= POOL_MIN_DOF
        phi = float(np.sum(z2[blk])) / float(np.sum(scale[blk]))
        var.append(phi * n_b / (n_b - 2.0) / gg[i])
    return np.array(est), np.array(var)


def _level_taken(n: int):
    """A wandering level's smoother on n evenly spaced 3-hour rows (wander.smooth_level at
    q = 0.05): run-hours [h] -> the part of them such a level takes [h]."""
    sp = Spacing(h=np.full(n, 3.0), dt=np.full(n - 1, 3.0), h0=3.0)
    return lambda h: smooth_level(h / 3.0, sp, 0.05) * 3.0


@pytest.mark.parametrize("q", [0.0, 1e-4, 0.01])
def test_level_smoother_is_the_levels_smoother(q):
    # intervals.level_smoother (factored once, for many columns) gives wander.smooth_level's
    # numbers on irregular rows (intervals of 1 to 30 minutes, gaps).
    rng = np.random.default_rng(3)
    h = rng.choice([1 / 60, 0.25, 0.5], 3000)
    sp = Spacing(h=h, dt=h[:-1] + rng.choice([0.0, 0.0, 2.0], 2999), h0=0.25)
    for r in (rng.normal(0.0, 1.0, 3000), rng.uniform(0.0, 5.0, 3000)):
        ref = smooth_level(r, sp, q)
        assert np.max(np.abs(level_smoother(sp, q)(r) - ref)) <= 1e-9 * np.max(np.abs(ref))


@pytest.mark.parametrize("level", [False, True])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_between_week_variance_is_statsmodels_dersimonian_laird(seed, level):
    # Outside check: statsmodels combine_effects(..., method_re="dl") (DerSimonian & Laird
    # 1986's moment estimator) on the same per-week estimates and variances; with a level,
    # on the part of each run-hours column the level's smoother leaves.
    H, u, b, week, days = _weekly_case(seed)
    taken = _level_taken(len(u)) if level else None
    tau2 = between_week_variance(H, u, b, week, days, taken).tau2_kw2
    for j in range(2):
        g = H[:, j] - taken(H[:, j]) if level else H[:, j]
        assert not level or np.abs(g - H[:, j]).max() > 1e-3  # the level takes a real part
        est, var = _week_estimates(g, u, b[j], week, days)
        # statsmodels leaves the moment estimate untruncated (negative when the weeks agree
        # better than their variances say); DerSimonian & Laird take max(0, .).
        # (Its Hartung-Knapp variance, not used here, takes a square root of a negative
        # number in such a case: numpy's warning about it is silenced.)
        with np.errstate(invalid="ignore"):
            ref = max(combine_effects(est, var, method_re="dl").tau2, 0.0)
        assert tau2[j] == pytest.approx(ref, rel=1e-9, abs=1e-12), j
    # Not a trivial case: the first load's weeks differ and the moment estimator is positive
    # (a stub that returned zeros would fail here).
    assert tau2[0] > 1e-3 and (level or tau2[1] > 1e-3), tau2


@pytest.mark.parametrize("level", [False, True])
def test_weeks_that_do_not_differ_give_a_positive_tau2_only_as_often_as_chance(level):
    # No week-to-week change at all: 52 weeks of 15-minute rows, a load running 08:00-16:00
    # on weekdays and one running 06:00-18:00 every day, residuals AR(1) noise (rho 0.6, an
    # invented building). Then Q is about chi-square with K - 1 degrees of freedom and
    # tau^2 > 0 only when Q > K - 1: scipy.stats.chi2.sf(51, 51) = 0.474 of the time. Over
    # 40 replicates the share lies in 0.225-0.725 with probability 0.999
    # (scipy.stats.binom.ppf([0.0005, 0.9995], 40, 0.474) / 40). Measured 2026-12-05 with
    # each week's variance from its own 5-7 day sums: tau^2 > 0 in 40 of 40 for both loads
    # (Q 1.8-2.7 times K - 1, found by an independent review); pooled over 4 weeks: see the
    # assertion's bounds.
    rng = np.random.default_rng(7)
    n = 52 * 7 * 96
    days = np.arange(n) // 96
    week = days // 7
    slot = np.arange(n) % 96
    weekday = days % 7 < 5
    H = np.column_stack([((slot >= 32) & (slot < 64) & weekday) * 0.25,
                         ((slot >= 24) & (slot < 72)) * 0.25])
    taken = None
    if level:
        smooth = level_smoother(Spacing(h=np.full(n, 0.25), dt=np.full(n - 1, 0.25),
                                        h0=0.25), 0.01)
        taken = lambda h: smooth(h / 0.25) * 0.25  # noqa: E731
    positive = np.zeros(2)
    for _ in range(40):
        e = np.empty(n)
        shocks = rng.normal(0.0, 0.5, n)
        e[0] = shocks[0]
        for t in range(1, n):  # AR(1): plain loop, 35k rows
            e[t] = 0.6 * e[t - 1] + shocks[t]
        u = e if taken is None else e - taken(e)
        tau2 = between_week_variance(H, u, np.array([20.0, 8.0]), week, days, taken).tau2_kw2
        positive += tau2 > 0
    share = positive / 40
    assert np.all((share >= 0.225) & (share <= 0.725)), share


def _weekly_draw(seed: int, sd_share: float, load: str = "H-1", form: str = "occupied"):
    """tests/synthetic.make_building (well-specified, 12 weeks) where `load` draws a
    different amount each local week: its true draw times (1 + N(0, sd_share)). Returns the
    building's settings pinned to `form` (the declared occupied baseload, static, or with
    the wandering level, which takes up part of each week's change), the aligned data, and
    the variance of the weekly departures [kW^2]."""
    s = make_building(seed, days=84)
    a = s.aligned
    j = a.equipment_ids.index(load)
    local_day = (a.frame["start_utc"].dt.convert_time_zone(TZ).dt.date().to_numpy()
                 .astype("datetime64[D]").astype(np.int64))
    _, week = np.unique((local_day + 3) // 7, return_inverse=True)  # Monday-start weeks
    shift_kw = np.random.default_rng(100 + seed).normal(0.0, sd_share * 18.0, week.max() + 1)
    y = a.frame["energy_kwh"].to_numpy() + a.hours[:, j] * shift_kw[week]
    status = {i: a.hours[:, k] / 0.25 for k, i in enumerate(a.equipment_ids)}
    site = dataclasses.replace(s.site, baseload=dataclasses.replace(s.site.baseload,
                                                                     form=form))
    return site, aligned_15min(a.frame["start_utc"], y, status), float(np.var(shift_kw, ddof=1))


def _tau2_share_of_month(site, aligned, load: str = "H-1") -> tuple[float, np.ndarray]:
    """The load's tau^2 [kW^2] and, per month, the half-width the between-week variance adds
    in quadrature to its kWh interval, as a fraction of the month's kWh."""
    e = estimate_draws(site, aligned)
    assert e.form.form.name == site.baseload.form  # the pinned form was used
    i = [t.id for t in e.terms].index(load)
    with_tau = monthly_breakdown(e, TZ).filter(equipment=load)
    without = monthly_breakdown(dataclasses.replace(e, tau2_kw2=None), TZ).filter(equipment=load)
    h1 = (with_tau["kwh_high"] - with_tau["kwh"]).to_numpy()
    h0 = (without["kwh_high"] - without["kwh"]).to_numpy()
    return float(e.tau2_kw2[i]), np.sqrt(np.maximum(h1**2 - h0**2, 0.0)) / with_tau["kwh"].to_numpy()


@pytest.mark.slow
@pytest.mark.parametrize("form", ["occupied", "occupied+level"])
def test_weeks_that_disagree_widen_the_months_interval_and_weeks_that_agree_do_not(form):
    # Measured on 2026-12-04 (seeds 0-2, the range's draws for each month): a draw that
    # changes by 15 % (sd) from week to week adds 10.3-16.3 % of the month's kWh to the
    # half-width with the static form, 9.1-16.7 % with the level (about 1.96 x 15 % /
    # sqrt(4.3 weeks) = 14 % expected); a constant draw 0.2-0.8 %. Before each week's
    # variance was taken about its own estimate, the first was 2.2-7.4 %; with the level,
    # before its departure was taken on the run-hours the level leaves, 1.8-4.2 %. The
    # bounds (8 % / 1 %) are a project choice between these, no outside source.
    for seed in (0, 1, 2):
        site, aligned, _ = _weekly_draw(seed, 0.15, form=form)
        tau2, extra = _tau2_share_of_month(site, aligned)
        assert tau2 > 0 and np.all(extra > 0.08), (seed, tau2, extra)
        site, aligned, _ = _weekly_draw(seed, 0.0, form=form)
        tau2, extra = _tau2_share_of_month(site, aligned)
        assert np.all(extra < 0.01), (seed, tau2, extra)


@pytest.mark.slow
@pytest.mark.parametrize("form", ["occupied", "occupied+level"])
def test_between_week_variance_estimates_the_true_weekly_spread(form):
    # Known truth: the variance of the weekly departures actually drawn (12 weeks). Before
    # each week's variance was taken about the week's own estimate, tau^2 came out 7-15x too
    # small here (0.46-2.8 kW^2 for a true 6.7-14.4: the whole fit's residual still held the
    # week's departure, so the weeks looked noisier than they were). With the level, before
    # the departure was regressed on the run-hours the level leaves: 0.30-0.82 (now
    # 6.1-14.7; static 8.6-14.1). The DL
    # estimate of 12 weeks spreads about +-40 % (chi-square with 11 degrees of freedom:
    # scipy.stats.chi2.ppf([0.025, 0.975], 11) / 11 = 0.35-1.98), so a factor 2 either way.
    for seed in (0, 1, 2):
        site, aligned, true_tau2 = _weekly_draw(seed, 0.15, form=form)
        tau2, _ = _tau2_share_of_month(site, aligned)
        assert 0.5 * true_tau2 <= tau2 <= 2.0 * true_tau2, (seed, tau2, true_tau2)


@pytest.mark.slow
def test_a_months_own_static_fit_of_an_on_off_load_needs_no_between_week_widening():
    # A month fitted on its own with a static baseload weighs its weeks as least squares
    # does, by each week's sum of squared run-hours, which for an on-off load (0 or 0.25 h an
    # interval) is 0.25 x its run-hours: exactly how the month's energy weighs the weeks'
    # draws, so the weeks' departures cancel out of the month's kWh error (c_w = 0) however
    # large tau^2 is. Measured 2026-12-04 (April, seeds 0-2): tau^2 3.1-12.5 kW^2; with the
    # former weights run_w^2 the interval gained 1.6-2.8 % of the month's kWh, now 0.
    for seed in (0, 1, 2):
        site, aligned, _ = _weekly_draw(seed, 0.15, form="occupied")
        tau2, extra = _tau2_share_of_month(site, _april(aligned))
        assert tau2 > 1.0 and len(extra) == 1 and extra[0] < 1e-3, (seed, tau2, extra)


def _april(aligned):
    month = aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.month().to_numpy()
    return dataclasses.replace(aligned, use=aligned.use & (month == 4))


@pytest.mark.slow
def test_the_weeks_weights_are_how_the_fit_with_the_level_responds_to_one_weeks_change():
    # With the wandering level the fitted draw does not weigh a week by its squared
    # run-hours: the level takes part of a week's change. Known truth by experiment: add
    # 0.5 kW to the load's draw in one week only, refit, and divide the draw's change by
    # 0.5 kW; that is the week's weight, which the monthly interval's week-to-week term uses
    # (Estimates.week_gh_h2 over its sum). Measured 2026-12-05 (April's own fit, 5 weeks):
    # the weights by experiment and week_gh_h2 agree within 0.002 / 0.014 / 0.0003 for
    # seeds 0 / 1 / 2; the squared run-hours miss by up to 0.057 / 0.035 / 0.053 (found by
    # an independent review). Seed 0 here; 0.01 separates the two (project choice, no
    # outside source).
    site, aligned, _ = _weekly_draw(0, 0.15, form="occupied+level")
    april = _april(aligned)
    e = estimate_draws(site, april)
    assert e.form.form.level and e.form.form.q > 0
    i = [t.id for t in e.terms].index("H-1")
    weights = e.week_gh_h2[:, i] / e.week_gh_h2[:, i].sum()
    squared = np.bincount(np.unique(e.week, return_inverse=True)[1].reshape(-1),
                          weights=e.hours[:, i] ** 2)
    squared /= squared.sum()
    assert np.max(np.abs(weights - squared)) > 0.02  # the two rules really differ here
    local_day = (aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.date().to_numpy()
                 .astype("datetime64[D]").astype(np.int64))
    week_all = (local_day + 3) // 7
    j = aligned.equipment_ids.index("H-1")
    status = {d: aligned.hours[:, c] / 0.25 for c, d in enumerate(aligned.equipment_ids)}
    y = aligned.frame["energy_kwh"].to_numpy()
    for w, weight in zip(np.unique(e.week), weights):
        y2 = y + 0.5 * aligned.hours[:, j] * (week_all == w)
        moved = estimate_draws(site, dataclasses.replace(
            aligned_15min(aligned.frame["start_utc"], y2, status), use=april.use))
        measured = (moved.kw[i] - e.kw[i]) / 0.5
        assert measured == pytest.approx(weight, abs=0.01), (w, measured, weight)


# --- disagreement between credible baseload forms (form_spread) ----------------------------


def _score(name: str, weight: float, draws_kw: list[float]) -> FormScore:
    return FormScore(Form.parse(name), 0.0, 1, weight=weight, draws_kw=np.array(draws_kw),
                     se_kw=np.full(len(draws_kw), 0.2))


def _spread(rival_weight: float) -> tuple[Hull, dict[int, list[str]]]:
    """Two loads; the chosen form says 10 and 5 kW, the rival 12 and 5 kW."""
    q, half = 2.0, np.array([0.5, 0.3])
    coef = np.array([10.0, 5.0])
    choice = FormChoice(Form.parse("occupied+level"), False,
                        [_score("occupied+level", 1.0 - rival_weight, [10.0, 5.0]),
                         _score("hour-of-week+level", rival_weight, [12.0, 5.0])], 1.0)
    jk = Jackknife(se_hac=half / q, half_hac=half, se_jack=np.full(2, np.nan),
                   cov_jack=np.zeros((2, 2)), use_jack=np.zeros(2, dtype=bool), q_hac=q,
                   q_jack=q, half=half, n_days=28)
    hull = Hull.start(coef, jk, 0.95)
    return hull, form_spread(choice, 2, jk, hull)


def test_two_credible_forms_that_disagree_widen_the_interval():
    hull, moves = _spread(0.4)
    # The rule of form_spread's docstring (model averaging, Burnham & Anderson 2002, sec.
    # 4.3.2, about the chosen form's draw): half-width in quadrature with
    # q x sqrt(sum of weight x (draw - chosen draw)^2) = 2 x sqrt(0.4 x 2^2).
    half = float(np.hypot(0.5, 2.0 * np.sqrt(0.4 * 4.0)))
    assert hull.low[0] == pytest.approx(10.0 - half, rel=1e-12)
    assert hull.high[0] == pytest.approx(10.0 + half, rel=1e-12)
    assert hull.widened[0]
    # 2 kW apart is more than FORM_SENSITIVE (10 %) of 10 kW and more than the half-width.
    assert 2.0 > FORM_SENSITIVE * 10.0
    assert moves == {0: ["12.0 kW with the hour-of-week+level baseload (weight 0.40)"]}
    # The load the forms agree on keeps its interval.
    assert (hull.low[1], hull.high[1]) == (pytest.approx(4.7), pytest.approx(5.3))
    assert not hull.widened[1]


def test_a_form_the_data_rule_out_does_not_widen_the_interval():
    hull, moves = _spread(0.5 * CREDIBLE_WEIGHT)  # the chosen form has ~all the weight
    assert (hull.low[0], hull.high[0]) == (pytest.approx(9.5), pytest.approx(10.5))
    assert not hull.widened.any() and moves == {}


# --- flags and their reasons ---------------------------------------------------------------


def _flags_and_warnings(site, aligned) -> tuple[dict[str, list[str]], list[str], object]:
    e = estimate_draws(site, aligned)
    return {t.id: list(t.flags) for t in e.terms}, e.warnings, e


def test_a_pinned_form_the_data_reject_is_flagged_form_sensitive():
    # tests/synthetic.make_building's misspecified building pinned to the declared constant
    # baseload: the data give the hour-of-week+level form all the weight, and the scheduled
    # fan F-1 takes 24.6 kW with the pinned form against 11.3 kW with it (truth 11.0 kW).
    s = make_building(3, misspecified=True)
    pinned = dataclasses.replace(s.site, baseload=dataclasses.replace(s.site.baseload,
                                                                     form="constant"))
    flags, warnings, e = _flags_and_warnings(pinned, s.aligned)
    assert e.form.pinned and e.form.form.name == "constant"
    assert "form-sensitive" in flags["F-1"]
    why = [w for w in warnings if w.startswith("F-1 depends on the baseload form")]
    assert len(why) == 1 and "with the hour-of-week+level baseload (weight 1.00)" in why[0]
    assert "the interval includes both" in why[0]
    i = [t.id for t in e.terms].index("F-1")
    credible = next(sc for sc in e.form.scores if sc.form.name == "hour-of-week+level")
    assert e.kw_low[i] <= credible.draws_kw[i] <= e.kw_high[i]
    assert e.kw_low[i] <= s.true_kw["F-1"] <= e.kw_high[i]
    # Clean loads: the forms agree on them (within 1 %), no flag and no warning.
    for clean in ("CH-1", "H-1", "P-1"):
        assert flags[clean] == [], clean
        assert not any(w.startswith(clean) for w in warnings), clean


def test_the_combined_row_of_the_ramping_office_is_flagged_with_reasons():
    # tests/synthetic.make_office "ramps": lights ramp around the schedule's edges, and the
    # air handler and its pump (always together, no priors) switch near them (about 85 % of
    # their switching within an hour of 07:00 / 18:00). Measured 2026-12-04, seed 1, 91 days.
    s = make_office(1, "ramps", days=91)
    flags, warnings, _ = _flags_and_warnings(s.site, s.aligned)
    row = "AHU-1+AP-1"
    assert {"combined", "unstable", "schedule-edge"} <= set(flags[row]), flags[row]
    assert any(w.startswith("AHU-1, AP-1 run together") and f"'{row}'" in w for w in warnings)
    assert any(w.startswith(f"{row} is unstable:") for w in warnings)
    edge = [w for w in warnings if w.startswith(f"{row} switches near the declared schedule's "
                                                "edges")]
    assert len(edge) == 1 and "within 60 minutes of a start or end of the occupied hours" in edge[0]
    # The fan locked to the schedule's edges too; the chiller and the water heater, which
    # cycle regardless of the schedule, are clean.
    assert "schedule-edge" in flags["LF-1"] and "schedule-edge" in flags["VF-1"]
    for clean in ("CH-1", "WH-1"):
        assert flags[clean] == [], clean
        assert not any(w.startswith(clean) for w in warnings), clean
