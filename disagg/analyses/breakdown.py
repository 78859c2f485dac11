"""Fitted draws -> monthly rows that add up to the metered kWh of the intervals used.

Each calendar month of the site's local time gets one row per equipment (or combined group),
a baseload row and an unexplained row (the month's residual energy), so that the month's
kwh column sums exactly to its metered kWh.
"""

from __future__ import annotations

import numpy as np
import polars as pl

from disagg.analyses.tariff import interval_prices, price_table
from disagg.fit.estimate import Estimates
from disagg.inputs.config import TariffSettings

COLUMNS = ["period", "equipment", "run_hours", "kw", "kw_low", "kw_high", "kwh", "kwh_low",
           "kwh_high", "share", "flags", "peak_kw", "cost"]
_ROW_SCHEMA = {"period": pl.String, "equipment": pl.String, "run_hours": pl.Float64,
               "kw": pl.Float64, "kw_low": pl.Float64, "kw_high": pl.Float64, "kwh": pl.Float64,
               "kwh_low": pl.Float64, "kwh_high": pl.Float64, "share": pl.Float64,
               "flags": pl.String}
SCHEMA = {**_ROW_SCHEMA, "peak_kw": pl.Float64, "cost": pl.Float64}


def interval_parts_kwh(est: Estimates, rows: np.ndarray | slice = slice(None)) -> np.ndarray:
    """Each breakdown row's energy in each used interval [kWh], shape (n_used, terms + 2),
    or in the intervals `rows` (a month's: a long series never holds all of them at once).

    Columns in row order: the terms, the baseload, and the unexplained rest, so that every
    interval's parts add up to its metered energy.
    """
    hours = est.hours[rows]
    n, k = hours.shape
    parts = np.zeros((n, k + 2))
    for i, t in enumerate(est.terms):
        if t.column is None:
            continue
        if i in est.weather:
            w = est.weather[i]
            parts[:, i] = (w.kw_at_balance * hours[:, i]
                           + w.slope_kw_per_degc * est.weather_hours[rows][:, i])
        else:
            parts[:, i] = est.kw[i] * hours[:, i]
    parts[:, k] = est.base[rows] @ est.base_kw
    if est.level_kwh is not None:
        parts[:, k] += est.level_kwh[rows]
    parts[:, k + 1] = est.y[rows] - parts[:, :k + 1].sum(axis=1)
    return parts


def monthly_breakdown(est: Estimates, tz: str, tariff: TariffSettings | None = None) -> pl.DataFrame:
    """One row per month x (equipment, baseload, unexplained).

    Columns: period (YYYY-MM, local), equipment (id, ids joined by '+' for a combined row),
    run_hours [h] (equivalent full-load hours for variable equipment; interval hours for
    baseload and unexplained), kw, kw_low, kw_high [kW], kwh, kwh_low, kwh_high [kWh],
    share (fraction 0..1 of the month's metered kWh), flags (words joined by ';'),
    peak_kw [kW] (the row's estimated draw in the interval of the month's highest metered
    demand among the intervals used; the rows add up to that peak), cost [currency] (energy
    at each interval's price plus the demand price x peak_kw; null without a tariff; see
    disagg.analyses.tariff).
    """
    if est.local_month is not None and est.local_month[0] == tz:
        month = est.local_month[1]
    else:
        local = est.frame["start_utc"].dt.convert_time_zone(tz)
        month = (local.dt.year().cast(pl.Int32) * 100
                 + local.dt.month().cast(pl.Int32)).to_numpy()
    interval_h = est.frame["interval_h"].to_numpy()
    price = None
    if tariff is not None:
        start_ns = est.frame["start_utc"].dt.epoch("ns").to_numpy()
        end_ns = est.frame["end_utc"].dt.epoch("ns").to_numpy()
        price = interval_prices(tariff, tz, start_ns, end_ns)
    demand_price = tariff.demand_price_per_kw if tariff is not None else 0.0
    tables: list[pl.DataFrame] = []
    # Weekly run-hours over the whole fit, for the between-week variation of each draw.
    weeks, week_of = (np.unique(est.week, return_inverse=True) if est.week is not None
                      else (np.zeros(1), np.zeros(len(month), dtype=np.int64)))
    week_of = week_of.reshape(-1)
    # sq_w: each week's weight in the fitted draw [h^2]: its sum of squared run-hours
    # (least squares: b = sum h y / sum h^2), or with the wandering level its sum of g x h,
    # g the part of the run-hours the level leaves (intervals.between_week_variance).
    if est.week_gh_h2 is not None and est.week_gh_h2.shape == (len(weeks), est.hours.shape[1]):
        sq_w = est.week_gh_h2
    else:
        sq_w = np.zeros((len(weeks), est.hours.shape[1]))  # (no column: a fit without loads)
        for i in range(est.hours.shape[1]):
            sq_w[:, i] = np.bincount(week_of, weights=est.hours[:, i] ** 2,
                                     minlength=len(weeks))
    sq = sq_w.sum(axis=0)
    for code in np.unique(month):
        period = f"{code // 100:04d}-{code % 100:02d}"
        rows: list[dict] = []
        m = month == code
        metered = float(est.y[m].sum())
        explained = 0.0
        run_hs = est.hours[m].sum(axis=0)
        deg_hs = est.weather_hours[m].sum(axis=0) if est.weather_hours is not None else None
        for i, t in enumerate(est.terms):
            run_h = float(run_hs[i])
            kw = float(est.kw[i])
            if t.column is None:
                # Did not run in this fit: no draw to state (its prior is in fit.json).
                kwh = kwh_lo = kwh_hi = 0.0
                kw = lo = hi = float("nan")
            elif i in est.weather and run_h > 0:
                # Draw varies with outdoor temperature: energy = b0 x run_h + slope x
                # sum(run_h x degrees beyond balance), interval from their covariance.
                w = est.weather[i]
                deg_h = float(deg_hs[i])
                a = np.array([run_h, deg_h])
                kwh = w.kw_at_balance * run_h + w.slope_kw_per_degc * deg_h
                half = est.critical * float(np.sqrt(max(a @ w.cov @ a, 0.0)))
                kwh_lo, kwh_hi = max(kwh - half, 0.0), kwh + half
                kw, lo, hi = kwh / run_h, kwh_lo / run_h, kwh_hi / run_h
            else:
                kwh = kw * run_h
                lo, hi = float(est.kw_low[i]), float(est.kw_high[i])
                kwh_lo, kwh_hi = lo * run_h, hi * run_h
                tau2 = float(est.tau2_kw2[i]) if est.tau2_kw2 is not None else 0.0
                if tau2 > 0 and run_h > 0:
                    # The month's energy is sum_w draw_w x run_mw; the fitted draw averages the
                    # weeks in proportion to sq_w, so each week's own deviation (variance
                    # tau^2) enters with c_w = run_mw - run_m sq_w / sum sq_v (0 for a
                    # month's own static fit of an on-off load: it already weighs its weeks
                    # by their run-hours; not so with the level).
                    run_mw = np.bincount(week_of[m], weights=est.hours[m, i],
                                         minlength=len(weeks))
                    cw = (run_mw - run_h * sq_w[:, i] / sq[i] if sq[i] > 0
                          else np.zeros(len(weeks)))
                    extra = est.critical * float(np.sqrt(tau2 * np.sum(cw**2)))
                    kwh_lo = max(kwh - float(np.hypot(kwh - kwh_lo, extra)), 0.0)
                    kwh_hi = kwh + float(np.hypot(kwh_hi - kwh, extra))
            explained += kwh
            rows.append(_row(period, t.id, run_h, kw, lo, hi, kwh, kwh_lo, kwh_hi, metered,
                             ";".join(t.flags)))
        hours = float(interval_h[m].sum())
        c = est.base[m].sum(axis=0)
        base_kwh = float(c @ est.base_kw)
        if est.level_kwh is not None:
            base_kwh += float(est.level_kwh[m].sum())
        # With the wandering level, its own estimation error too (estimate.base_var_kwh2).
        var = (est.base_var_kwh2 or {}).get(int(code), c @ est.cov_base @ c)
        half = est.critical * float(np.sqrt(max(var, 0.0)))
        base_lo, base_hi = max(base_kwh - half, 0.0), base_kwh + half
        explained += base_kwh
        rows.append(_row(period, est.base_id, hours, base_kwh / hours, base_lo / hours,
                         base_hi / hours, base_kwh, base_lo, base_hi, metered, ""))
        rest = metered - explained
        rows.append(_row(period, "unexplained", hours, rest / hours, float("nan"),
                         float("nan"), rest, float("nan"), float("nan"), metered, ""))
        tables.append(price_table(pl.DataFrame(rows, schema=_ROW_SCHEMA, orient="row"),
                                  interval_parts_kwh(est, m), interval_h[m],
                                  None if price is None else price[m], demand_price))
    frame = pl.concat(tables) if tables else pl.DataFrame(schema=SCHEMA)
    return frame.with_columns(pl.col(pl.Float64).fill_nan(None))


def _row(period, equipment, run_h, kw, lo, hi, kwh, kwh_lo, kwh_hi, metered, flags) -> dict:
    return {"period": period, "equipment": equipment, "run_hours": run_h, "kw": kw,
            "kw_low": lo, "kw_high": hi, "kwh": kwh, "kwh_low": kwh_lo, "kwh_high": kwh_hi,
            "share": kwh / metered if metered else float("nan"), "flags": flags}
