"""Synthetic buildings with known truth, built in memory for recovery and coverage tests.

Everything here is invented. A building has a few on-off loads with random schedules
(some cycling, some following the occupied schedule with daily jitter), 15-minute
intervals, and a baseload that follows the declared occupied/unoccupied profile exactly
(well-specified) or not (misspecified: closures the profile does not know, a slow wander,
and draws that vary with a weather-like signal).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

from disagg.fit.align import Aligned
from disagg.inputs.config import (BaseloadSettings, Equipment, MeterSettings, Prior, RunlogSettings,
                           SiteConfig, parse_spell)

TZ = "America/Chicago"
SPELLS = ("Mon-Fri 07:00-19:00",)


@dataclass
class Synthetic:
    site: SiteConfig
    aligned: Aligned
    true_kw: dict[str, float]  # energy / run-hours over the whole period [kW]
    true_kwh_month: dict[tuple[str, str], float]


def _cycle(n: int, on: float, off: float, rng: np.random.Generator) -> np.ndarray:
    """On/off spells (in intervals) with geometric lengths."""
    out = np.zeros(n)
    i, state = int(rng.integers(0, 8)), 0
    while i < n:
        length = int(rng.geometric(1.0 / (on if state else off)))
        out[i:i + length] = state
        i += length
        state = 1 - state
    return out


def make_building(seed: int, days: int = 56, misspecified: bool = False, noise_kwh: float = 0.5,
                  priors: dict[str, tuple[float, float]] | None = None,
                  together: bool = False, start: dt.date = dt.date(2025, 3, 3),
                  step: tuple[str, float] | None = None,
                  step_on: dt.date | None = None) -> Synthetic:
    """A building of five loads over `days` days of 15-minute intervals.

    Args:
        misspecified: the engineer declares a constant baseload, but the true baseload is
            30 kW occupied / 15 kW unoccupied with closures (8 % of weekdays at the
            unoccupied level) and a slow wander; draws of CH-1 and F-1 vary +-15 % with a
            weather-like signal; AR(1) noise.
        noise_kwh: standard deviation of the meter noise per interval [kWh].
        priors: equipment id -> (draw_kw, draw_sd_kw).
        together: the pump P-1 runs exactly when the chiller CH-1 runs.
        step: (equipment id, factor): that load's draw is multiplied by factor from the
            first local day of the second calendar month on (or from `step_on` on).
        step_on: local date from which `step` applies; None keeps the second calendar month.
    """
    rng = np.random.default_rng(seed)
    n = days * 96
    t0 = dt.datetime.combine(start, dt.time(), tzinfo=None)
    local = pl.datetime_range(t0, t0 + dt.timedelta(minutes=15 * (n - 1)), "15m",
                              eager=True).dt.replace_time_zone(TZ, ambiguous="earliest",
                                                               non_existent="null")
    local = local.drop_nulls()
    n = len(local)
    start_utc = local.dt.convert_time_zone("UTC")
    hour = local.dt.hour().to_numpy() + local.dt.minute().to_numpy() / 60
    wday = local.dt.weekday().to_numpy() - 1
    day = (local.dt.date().rank("dense").to_numpy() - 1).astype(int)
    occupied = (wday < 5) & (hour >= 7) & (hour < 19)
    closed_day = rng.random(day.max() + 1) < (0.08 if misspecified else 0.0)
    open_now = occupied & ~closed_day[day]
    shift = rng.normal(0, 0.5, day.max() + 1)[day]

    status = {
        "CH-1": _cycle(n, 6, 4, rng),
        "F-1": ((wday < 5) & (hour >= 6.5 + shift) & (hour < 18.5 + shift)).astype(float),
        "C-1": _cycle(n, 2, 5, rng),
        "H-1": _cycle(n, 10, 20, rng),
    }
    status["P-1"] = status["CH-1"].copy() if together else np.maximum(
        status["CH-1"], _cycle(n, 3, 12, rng)) * (rng.random(n) < 0.97)
    draws = {"CH-1": 60.0, "P-1": 7.5, "F-1": 11.0, "C-1": 5.5, "H-1": 18.0}
    weather = np.sin(2 * np.pi * np.arange(n) / (96 * 9.0) + rng.uniform(0, 6.3))
    energy = {}
    for k, s in status.items():
        kw = draws[k] * (1 + (0.15 * weather if misspecified and k in ("CH-1", "F-1") else 0.0))
        if step and k == step[0]:
            if step_on is None:
                month_no = local.dt.month().to_numpy()
                kw = kw * np.where(month_no != month_no[0], step[1], 1.0)
            else:
                kw = kw * np.where((local.dt.date() >= step_on).to_numpy(), step[1], 1.0)
        energy[k] = kw * s * 0.25
    base_kw = np.where(open_now if misspecified else occupied, 30.0, 15.0)
    if misspecified:
        wander = np.cumsum(rng.normal(0, 0.15, n))
        base_kw = base_kw + wander - wander.mean()
        e = np.zeros(n)
        shocks = rng.normal(0, noise_kwh, n)
        for i in range(1, n):
            e[i] = 0.8 * e[i - 1] + shocks[i] * 0.6
        noise = e
    else:
        noise = rng.normal(0, noise_kwh, n)
    y = sum(energy.values()) + base_kw * 0.25 + noise
    y = np.maximum(y, 0)

    ids = list(status)
    priors = priors or {}
    equipment = tuple(
        Equipment(i, i, "load", "on-off", 1.0,
                  Prior(priors[i][0], priors[i][1], "test") if i in priors
                  else Prior(None, None, "none"), None) for i in ids)
    site = SiteConfig(
        path=Path("/synthetic/site.toml"), name=f"synthetic {seed}", timezone=TZ,
        meter=MeterSettings(Path("/synthetic/meter.csv"), "t", "v", "kWh", "end", 15),
        runlog=RunlogSettings(Path("/synthetic/log.csv"), "events", "t", "eq", "s"),
        baseload=(BaseloadSettings("constant") if misspecified else
                  BaseloadSettings("occupied", tuple(parse_spell(s) for s in SPELLS), SPELLS)),
        equipment=equipment)
    frame = pl.DataFrame({"start_utc": start_utc,
                          "end_utc": start_utc + dt.timedelta(minutes=15),
                          "energy_kwh": y, "interval_h": np.full(n, 0.25)})
    hours = np.column_stack([status[i] * 0.25 for i in ids])
    aligned = Aligned(frame, ids, hours, np.ones(n, dtype=bool), 15,
                      {"intervals": n, "used": n, "absent": 0, "no_reading": 0, "log_unknown": 0},
                      {i: 0 for i in ids})
    true_kw = {i: float(energy[i].sum() / hours[:, k].sum()) for k, i in enumerate(ids)}
    month = local.dt.strftime("%Y-%m").to_numpy()
    true_month = {(m, i): float(energy[i][month == m].sum()) for m in set(month) for i in ids}
    return Synthetic(site, aligned, true_kw, true_month)
