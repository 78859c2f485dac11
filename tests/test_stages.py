"""The staged estimation (disagg.fit.estimate): each stage's typed result, the one design
builder, and the whole pipeline checked against an independent statsmodels fit. Data are the
invented synthetic buildings (tests/synthetic.py)."""

from __future__ import annotations

import dataclasses
import datetime as dt
import warnings

import numpy as np
import pytest
import statsmodels.api as sm

from disagg.fit.design import BaseloadBuilder, baseload_level, design, rows_of
from disagg.fit.estimate import estimate_draws
from disagg.fit.select import Form
from disagg.fit.terms import plan_terms
from synthetic import TZ, make_building


def _pinned(s, form: str, **baseload):
    return dataclasses.replace(s.site, baseload=dataclasses.replace(
        s.site.baseload, form=form, **baseload))


def test_staged_fit_agrees_with_statsmodels_least_squares():
    # A static form pinned: the draws are ordinary least squares on [term hours, baseload
    # columns], up to the weak prior (sd 10 x the peak demand) and bounds that do not bind.
    s = make_building(4)
    site = _pinned(s, "occupied")
    e = estimate_draws(site, s.aligned)
    fitted = [t for t in e.terms if t.column is not None]
    X = np.column_stack([e.hours[:, [e.terms.index(t) for t in fitted]], e.base])
    ols = sm.OLS(e.y, X).fit()
    k = len(fitted)
    assert e.kw[[e.terms.index(t) for t in fitted]] == pytest.approx(ols.params[:k], rel=1e-4)
    assert e.base_kw == pytest.approx(ols.params[k:], rel=1e-4)
    assert e.fitted == pytest.approx(ols.fittedvalues, rel=1e-4, abs=1e-6)
    # The intervals contain the estimate and are at least the HAC interval.
    i = [e.terms.index(t) for t in fitted]
    assert np.all(e.kw_low[i] <= e.kw[i]) and np.all(e.kw[i] <= e.kw_high[i])
    assert np.all(e.kw_high[i] - e.kw[i] >= e.critical * e.se_hac_kw[i] * (1 - 1e-12))


def test_term_plan_combines_the_pair_and_its_column_is_their_mean_hours():
    s = make_building(3, together=True)
    rows = rows_of(s.aligned, TZ)
    B, _ = BaseloadBuilder(s.site, rows).columns(s.site.baseload.profile)
    plan = plan_terms(s.site, s.aligned.equipment_ids, rows.hours, B)
    pair = next(t for t in plan.terms if "combined" in t.flags)
    assert pair.members == ["CH-1", "P-1"]
    assert [t.column for t in plan.fitted] == list(range(len(plan.fitted)))
    e = estimate_draws(s.site, s.aligned)
    j = [t.id for t in e.terms].index(pair.id)
    ids = s.aligned.equipment_ids
    expect = s.aligned.hours[:, [ids.index("CH-1"), ids.index("P-1")]].mean(axis=1)
    assert e.hours[:, j] == pytest.approx(expect)


@pytest.mark.parametrize("form", ["constant", "hour-of-week", "constant+level"])
def test_design_builder_gives_estimate_draws_design_with_declared_closures(form):
    # Closures declared on an occupied profile and another form pinned: the other profile
    # gets the closures as an extra column, in the breakdown's fit and in design() alike.
    s = make_building(3, days=70)
    site = _pinned(s, form, closed=(dt.date(2025, 3, 12), dt.date(2025, 4, 2)))
    e = estimate_draws(site, s.aligned)
    assert "baseload_closed_kw" in e.base_names
    fitted = [t for t in e.terms if t.column is not None]
    d = design(site, s.aligned, [t.members for t in fitted], e.form.form)
    assert d.base_names == e.base_names
    assert d.X.shape[1] == len(e.design_coef)
    level = baseload_level(d, e.design_coef)
    assert d.X @ e.design_coef + level == pytest.approx(e.fitted, abs=1e-9)


def test_design_default_is_the_declared_profile_without_level():
    s = make_building(2)
    d = design(s.site, s.aligned, [["CH-1"], ["F-1"]])
    assert d.form == Form(s.site.baseload.profile, level=False)
    assert d.X.shape == (s.aligned.use.sum(), 2 + 2)
    assert d.base_names == ["baseload_occupied_kw", "baseload_unoccupied_kw"]


def _level_case(q: float, seed: int = 5, n: int = 160):
    """Invented: a load and an occupied-hours column [h], a wandering level, white noise."""
    from disagg.fit.wander import Spacing

    rng = np.random.default_rng(seed)
    h = 0.25
    occ = ((np.arange(n) // 8) % 3 == 0).astype(float)
    X = np.column_stack([(rng.random(n) < 0.4) * h, occ * h])
    sigma2 = 1.3
    mu = 20 + np.cumsum(rng.normal(0, np.sqrt(q * sigma2), n))
    z = X @ np.array([6.0, 4.0]) / h + mu + rng.normal(0, np.sqrt(sigma2), n)  # kW
    start = np.arange(n) * 900 * 10**9
    return X, z, sigma2, Spacing.from_ns(start, start + 900 * 10**9)


def test_baseload_energy_variance_with_the_level_matches_statsmodels_state_space():
    # A month's baseload energy = the profile's c'b + the level's sum h mu_t. Its variance
    # under the local-level model with regressors, from statsmodels' exact-diffuse Kalman
    # smoother with the regressors in the state (UnobservedComponents, mle_regression=False):
    # smoothed state covariances and autocovariances at every lag within the month.
    from disagg.fit.intervals import level_sum_variance
    from disagg.fit.wander import whiten

    q = 0.05
    X, z, sigma2, sp = _level_case(q)
    h = sp.h[0]
    E = X / h
    w = whiten(E, z, sp, q)
    C = sigma2 * np.linalg.inv(w.X.T @ w.X)  # the GLS covariance of the coefficients
    labels = np.repeat([0, 1, 2, 3], [20, 40, 60, 40])
    ours = level_sum_variance(sp, q, sigma2, X, slice(1, 2), labels, (C,))

    mod = sm.tsa.UnobservedComponents(z, level="llevel", exog=E, mle_regression=False)
    mod.ssm.initialize_diffuse()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the loglikelihood-burn note of exact diffuse starts
        res = mod.smooth([sigma2, q * sigma2])
    assert mod.state_names == ["level", "beta.x1", "beta.x2"]
    P = res.smoothed_state_cov
    # statsmodels states no autocovariances within its diffuse periods (the first few rows):
    # the months checked start after them.
    assert res.filter_results.nobs_diffuse < 20
    for lab in (1, 2, 3):
        idx = np.flatnonzero(labels == lab)
        L = len(idx)
        cov_mu = np.diag(P[0, 0, idx])
        for j in range(1, L):
            ac = res.smoother_results.smoothed_state_autocovariance(lag=j)[0, 0]
            for i in range(j, L):
                cov_mu[i, i - j] = cov_mu[i - j, i] = ac[idx[i]]
        a = np.full(L, h)
        c = X[idx, 1].sum()
        reference = (a @ cov_mu @ a + 2 * c * np.sum(a * P[2, 0, idx])
                     + c**2 * P[2, 2, 0])
        assert ours[lab] == pytest.approx(reference, rel=1e-8), lab
    # The level's own error matters: without it (the profile's c'b alone) the variance
    # differs by far more than rounding.
    assert abs(ours[1] - float(X[labels == 1, 1].sum() ** 2 * C[1, 1])) > 0.1 * ours[1]


def test_baseload_energy_variance_with_a_constant_level_is_least_squares_with_intercept():
    from disagg.fit.intervals import level_sum_variance
    from disagg.fit.wander import whiten

    X, z, sigma2, sp = _level_case(0.0, seed=8)
    h = sp.h[0]
    w = whiten(X / h, z, sp, 0.0)
    C = sigma2 * np.linalg.inv(w.X.T @ w.X)
    labels = np.repeat([0, 1], [90, 70])
    ours = level_sum_variance(sp, 0.0, sigma2, X, slice(1, 2), labels, (C,))
    ols = sm.OLS(z, sm.add_constant(X / h)).fit()
    V = sigma2 * ols.normalized_cov_params  # (intercept, load, occupied) [kW^2]
    for lab in (0, 1):
        m = labels == lab
        g = np.array([h * m.sum(), 0.0, X[m, 1].sum()])
        assert ours[lab] == pytest.approx(g @ V @ g, rel=1e-9)


def test_breakdown_baseload_row_uses_the_level_variance():
    from disagg.analyses.breakdown import monthly_breakdown

    s = make_building(2, misspecified=True, days=63)
    e = estimate_draws(s.site, s.aligned)
    assert e.form.form.level and e.base_var_kwh2
    rows = monthly_breakdown(e, TZ).filter(equipment="baseload")
    for r in rows.iter_rows(named=True):
        code = int(r["period"][:4]) * 100 + int(r["period"][5:])
        half = e.critical * np.sqrt(e.base_var_kwh2[code])
        assert r["kwh_high"] - r["kwh"] == pytest.approx(half, rel=1e-9)
        assert r["kwh"] - r["kwh_low"] == pytest.approx(min(half, r["kwh"]), rel=1e-9)
    # Without the level the variance is the profile's alone, as before.
    static = estimate_draws(s.site, s.aligned, form=Form("occupied", False))
    assert static.base_var_kwh2 is None


def test_an_inseparable_load_without_a_prior_is_said_to_lean_on_its_partners_prior():
    """Two loads that always run together, one with a nameplate prior (WH-1) and one without
    (VF-1): each is flagged inseparable from the other, and the warning names whose prior
    does the splitting (VF-1 has none of its own)."""
    from disagg.fit.terms import plan_terms
    from synthetic import make_office

    s = make_office(1, "step", days=14)
    on = (np.random.default_rng(0).random(14 * 96) < 0.4) * 0.25
    plan = plan_terms(s.site, ["WH-1", "VF-1"], np.column_stack([on, on]),
                      np.full((14 * 96, 1), 0.25))
    assert [(t.id, t.flags[0]) for t in plan.terms] == [("WH-1", "inseparable:VF-1"),
                                                         ("VF-1", "inseparable:WH-1")]
    assert plan.warnings == [
        "WH-1 cannot be told apart from VF-1 by the data: its estimate leans on its prior",
        "VF-1 cannot be told apart from WH-1 by the data: its estimate leans on the prior of "
        "WH-1"]


def test_draws_in_warnings_keep_their_decimals():
    from disagg.fit.intervals import kw_range_text, kw_text

    assert [kw_text(x) for x in (123.4, 10.0, 10.25, 0.5, 0.05)] == ["123", "10.0", "10.2",
                                                                      "0.50", "0.050"]
    assert kw_range_text(9.8, 10.3) == "9.8-10.3"
    assert kw_range_text(0.95, 1.05) == "0.95-1.05"
