"""A synthetic office year (or two) with weather, for drift and comparison: known truth.

Everything here is invented. 15-minute intervals in America/Chicago from 2025-01-01. Daily
mean outdoor temperature 13 + 13 sin(2 pi (day - 110) / 365) degC plus AR(1) day-to-day
weather (sd 3 degC) and a +-5 degC daily swing (warmest at 15:00). Loads:

- CH-1 lead chiller, 120 kW, and CWP-1 its condenser pump, 15 kW, interlocked (the pump
  runs exactly when the chiller runs); the chiller runs hour by hour with probability
  (T - 12) / 12, clipped to 0..1. Both have nameplate priors (120 +- 36, 15 +- 4.5 kW), so
  the breakdown keeps them as separate rows, each `inseparable:` from the other.
- CH-2 lag chiller, 100 kW: seasonal, runs only in hours above 24 degC (summer).
- AC-1 air compressor, 22 kW: cycles all year (on spells of 2, off of 6 intervals).
- FZ-1 freezer, 4 kW: cycles, off spells shorter when it is warm (duty 30-55 %).
- AHU-1 air handler fan, 18 kW: schedule-bound, weekdays 06:00-19:00 +- 30 minutes.
- baseload 40 kW occupied (Mon-Fri 07:00-19:00) / 20 kW otherwise, declared as such;
  optionally a slow wander (random walk) the declared profile does not know.
Meter noise: normal, sd 1 kWh per interval.
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import polars as pl

from disagg.inputs.config import WeatherSettings
from synthetic import Synthetic, _cycle, aligned_15min, occupied_baseload, synthetic_site

TZ = "America/Chicago"
SPELLS = ("Mon-Fri 07:00-19:00",)
START = dt.date(2025, 1, 1)
DRAWS_KW = {"CH-1": 120.0, "CWP-1": 15.0, "CH-2": 100.0, "AC-1": 22.0, "FZ-1": 4.0,
            "AHU-1": 18.0}
PRIORS = {"CH-1": (120.0, 36.0), "CWP-1": (15.0, 4.5)}
# The degrading lead chiller of the issue: +15 % from late July.
CHILLER_STEP_ON = dt.date(2025, 7, 25)


def make_year(seed: int, days: int = 365, steps: dict[str, tuple[float, dt.date]] | None = None,
              wander_kw: float = 0.0, noise_kwh: float = 1.0) -> Synthetic:
    """The building over `days` days from 2025-01-01.

    Args:
        steps: equipment id -> (factor, local date from which its draw is multiplied).
        wander_kw: sd of the baseload's random-walk step per interval [kW] (0: none).
    """
    rng = np.random.default_rng(seed)
    n = days * 96
    t0 = dt.datetime.combine(START, dt.time())
    local = pl.datetime_range(t0, t0 + dt.timedelta(minutes=15 * (n - 1)), "15m",
                              eager=True).dt.replace_time_zone(TZ, ambiguous="earliest",
                                                               non_existent="null").drop_nulls()
    n = len(local)
    start_utc = local.dt.convert_time_zone("UTC")
    hour = local.dt.hour().to_numpy() + local.dt.minute().to_numpy() / 60
    wday = local.dt.weekday().to_numpy() - 1
    date = local.dt.date()
    day = (date.rank("dense").to_numpy() - 1).astype(int)
    doy = local.dt.ordinal_day().to_numpy()
    n_days = day.max() + 1
    ar = np.zeros(n_days)
    shocks = rng.normal(0, 3.0 * np.sqrt(1 - 0.7**2), n_days)
    for i in range(1, n_days):
        ar[i] = 0.7 * ar[i - 1] + shocks[i]
    temp = 13 + 13 * np.sin(2 * np.pi * (doy - 110) / 365) + ar[day] \
        + 5 * np.cos(2 * np.pi * (hour - 15) / 24)
    occupied = (wday < 5) & (hour >= 7) & (hour < 19)
    hour_index = np.arange(n) // 4

    def hourly(p: np.ndarray) -> np.ndarray:
        """On for whole hours, each hour with probability p (its first interval's)."""
        u = rng.random(hour_index.max() + 1)[hour_index]
        return (u < p).astype(float)

    lead = hourly(np.clip((temp - 12) / 12, 0, 1))
    lag = hourly(np.clip((temp - 24) / 4, 0, 1)) * lead
    freezer = np.zeros(n)
    i, state = 0, 0
    while i < n:
        off = 6.0 - 3.0 * np.clip((temp[i] - 5) / 25, 0, 1)
        length = int(rng.geometric(1.0 / (3.0 if state else off)))
        freezer[i:i + length] = state
        i += length
        state = 1 - state
    shift = rng.normal(0, 0.5, n_days)[day]
    status = {
        "CH-1": lead,
        "CWP-1": lead.copy(),
        "CH-2": lag,
        "AC-1": _cycle(n, 2, 6, rng),
        "FZ-1": freezer,
        "AHU-1": ((wday < 5) & (hour >= 6 + shift) & (hour < 19 + shift)).astype(float),
    }
    energy = {}
    dates = date.to_numpy()
    for k, s in status.items():
        kw = np.full(n, DRAWS_KW[k])
        if steps and k in steps:
            factor, on = steps[k]
            kw = kw * np.where(dates >= np.datetime64(on), factor, 1.0)
        energy[k] = kw * s * 0.25
    base_kw = np.where(occupied, 40.0, 20.0)
    if wander_kw > 0:
        walk = np.cumsum(rng.normal(0, wander_kw, n))
        base_kw = base_kw + walk - walk.mean()
    y = np.maximum(sum(energy.values()) + base_kw * 0.25 + rng.normal(0, noise_kwh, n), 0.0)

    ids = list(status)
    site = synthetic_site("year", f"synthetic year {seed}", ids, PRIORS, "nameplate",
                          occupied_baseload(SPELLS),
                          weather=WeatherSettings(Path("/synthetic/weather.csv"), "t", "temp",
                                                  "C", None))
    aligned = aligned_15min(start_utc, y, status, temp)
    hours = aligned.hours
    true_kw = {i: float(energy[i].sum() / max(hours[:, k].sum(), 1e-9))
               for k, i in enumerate(ids)}
    month = local.dt.strftime("%Y-%m").to_numpy()
    true_month = {(m, i): float(energy[i][month == m].sum()) for m in set(month) for i in ids}
    return Synthetic(site, aligned, true_kw, true_month)
