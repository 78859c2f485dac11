"""The staged estimation (disagg.fit.estimate): each stage's typed result, the one design
builder, and the whole pipeline checked against an independent statsmodels fit. Data are the
invented synthetic buildings (tests/synthetic.py)."""

from __future__ import annotations

import dataclasses
import datetime as dt

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
