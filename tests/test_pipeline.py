"""Month-by-month fits over a multi-month range (disagg.analyses.pipeline.monthly_fits).
All data invented (tests/synthetic.py)."""

from __future__ import annotations

import dataclasses

import numpy as np
import polars as pl
import pytest

from disagg.fit.estimate import estimate_draws
from disagg.analyses.pipeline import MIN_MONTH_DAYS, monthly_fits
from synthetic import TZ, make_building


def _month_rows(table: pl.DataFrame, equipment: str) -> dict[str, dict]:
    return {r["period"]: r for r in table.filter(pl.col("equipment") == equipment).iter_rows(named=True)}


def test_each_month_follows_its_own_draw():
    # H-1's draw rises 30 % from April: the whole-range draw sits between the two months'.
    s = make_building(21, days=58, step=("H-1", 1.3))
    whole = estimate_draws(s.site, s.aligned)
    table, months = monthly_fits(s.site, s.aligned, whole, 0.95)
    rows = _month_rows(table, "H-1")
    assert set(rows) == {"2025-03", "2025-04"}
    assert all(m.own_fit for m in months.values())
    for period, r in rows.items():
        truth = s.true_kwh_month[(period, "H-1")]
        assert r["kwh_low"] <= truth <= r["kwh_high"], (period, r, truth)
    assert rows["2025-04"]["kw"] / rows["2025-03"]["kw"] == pytest.approx(1.3, rel=0.03)
    # The single whole-range draw cannot hold both months.
    h = [t.id for t in whole.terms].index("H-1")
    assert not (whole.kw_low[h] * rows["2025-03"]["run_hours"]
                <= s.true_kwh_month[("2025-03", "H-1")]
                <= whole.kw_high[h] * rows["2025-03"]["run_hours"])


def test_a_short_month_takes_the_whole_range_draws_and_says_so():
    s = make_building(8, days=33)  # 2025-03-03 .. 2025-04-04: April has 4 days
    whole = estimate_draws(s.site, s.aligned)
    table, months = monthly_fits(s.site, s.aligned, whole, 0.95)
    assert months["2025-03"].own_fit is True
    assert months["2025-04"].own_fit is False
    april = table.filter(pl.col("period") == "2025-04")
    equipment = april.filter(~pl.col("equipment").is_in(["baseload", "unexplained"]))
    assert all("range-draw" in f.split(";") for f in equipment["flags"])
    assert april.filter(pl.col("equipment") == "baseload")["flags"][0] == ""
    c1 = [t.id for t in whole.terms].index("C-1")
    assert equipment.filter(pl.col("equipment") == "C-1")["kw"][0] == pytest.approx(whole.kw[c1])
    assert MIN_MONTH_DAYS > 4


def test_months_add_up_with_own_fits():
    s = make_building(13, days=45, misspecified=True)
    whole = estimate_draws(s.site, s.aligned)
    table, _ = monthly_fits(s.site, s.aligned, whole, 0.95)
    month = s.aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.strftime("%Y-%m").to_numpy()
    y = s.aligned.frame["energy_kwh"].to_numpy()
    for (period,), rows in table.group_by("period"):
        assert rows["kwh"].sum() == pytest.approx(y[month == period].sum(), rel=1e-9)


def test_a_single_month_range_is_the_whole_range_fit():
    s = make_building(2, days=20)
    use = s.aligned.use.copy()
    whole = estimate_draws(s.site, dataclasses.replace(s.aligned, use=use))
    table, months = monthly_fits(s.site, s.aligned, whole, 0.95)
    assert months == {}
    np.testing.assert_allclose(table.filter(pl.col("equipment") == "C-1")["kw"].to_numpy(),
                               whole.kw[[t.id for t in whole.terms].index("C-1")])


def test_a_month_where_a_load_did_not_run_states_no_draw_for_it():
    # P-1 (given a prior) is switched off for April: that month's row has no kW, not its prior.
    s = make_building(5, days=58, priors={"P-1": (7.5, 0.5)})
    month = s.aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.strftime("%Y-%m").to_numpy()
    j = s.aligned.equipment_ids.index("P-1")
    hours = s.aligned.hours.copy()
    hours[month == "2025-04", j] = 0.0
    aligned = dataclasses.replace(s.aligned, hours=hours)
    whole = estimate_draws(s.site, aligned)
    table, months = monthly_fits(s.site, aligned, whole, 0.95)
    april = table.filter((pl.col("period") == "2025-04") & (pl.col("equipment") == "P-1")).row(
        0, named=True)
    assert months["2025-04"].own_fit and "not-run" in april["flags"].split(";")
    assert april["kw"] is None and april["kwh"] == 0.0
    march = table.filter((pl.col("period") == "2025-03") & (pl.col("equipment") == "P-1"))
    assert march["kw"][0] is not None and march["kwh"][0] > 0
