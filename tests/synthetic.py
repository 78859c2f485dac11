"""Synthetic buildings with known truth, built in memory for recovery and coverage tests.

Everything here is invented. A building has a few on-off loads with random schedules
(some cycling, some following the occupied schedule with daily jitter), 15-minute
intervals, and a baseload that follows the declared occupied/unoccupied profile exactly
(well-specified) or not (misspecified: closures the profile does not know, a slow wander,
and draws that vary with a weather-like signal).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl

from disagg.fit.align import Aligned
from disagg.inputs.config import (BaseloadSettings, Equipment, MeterSettings, Prior, RunlogSettings,
                           SiteConfig, WeatherSettings, parse_spell)

TZ = "America/Chicago"
SPELLS = ("Mon-Fri 07:00-19:00",)


def synthetic_site(stem: str, name: str, ids: list[str], priors: dict[str, tuple[float, float]],
                   prior_source: str, baseload: BaseloadSettings, variable: tuple[str, ...] = (),
                   weather: WeatherSettings | None = None) -> SiteConfig:
    """The settings of an in-memory synthetic building (no files behind them): a 15-minute
    end-stamped kWh meter, an events run log, one load per id (variable speed for those in
    `variable`, a prior of (kW, sd) for those in `priors`)."""
    equipment = tuple(
        Equipment(i, i, "load", "variable" if i in variable else "on-off", 1.0,
                  Prior(*priors[i], prior_source) if i in priors else Prior(None, None, "none"),
                  None) for i in ids)
    return SiteConfig(
        path=Path(f"/synthetic/{stem}.toml"), name=name, timezone=TZ,
        meter=MeterSettings(Path("/synthetic/meter.csv"), "t", "v", "kWh", "end", 15),
        runlog=RunlogSettings(Path("/synthetic/log.csv"), "events", "t", "eq", "s"),
        baseload=baseload, equipment=equipment, weather=weather)


def occupied_baseload(spells: tuple[str, ...]) -> BaseloadSettings:
    """An occupied/unoccupied baseload declared by weekly spells ("Mon-Fri 07:00-19:00")."""
    return BaseloadSettings("occupied", tuple(parse_spell(s) for s in spells), spells)


@dataclass
class Synthetic:
    site: SiteConfig
    aligned: Aligned
    true_kw: dict[str, float]  # energy / run-hours over the whole period [kW]
    true_kwh_month: dict[tuple[str, str], float]
    # The unlogged baseload's energy by local month "YYYY-MM" [kWh] (noise excluded).
    true_base_kwh_month: dict[str, float] = field(default_factory=dict)


def aligned_15min(start_utc: pl.Series, energy_kwh: np.ndarray, status: dict[str, np.ndarray],
                  temp_c: np.ndarray | None = None) -> Aligned:
    """Every 15-minute interval used, with each load's run-hours (status x 0.25 h) [h]."""
    n = len(energy_kwh)
    ids = list(status)
    frame = pl.DataFrame({"start_utc": start_utc,
                          "end_utc": start_utc + dt.timedelta(minutes=15),
                          "energy_kwh": energy_kwh, "interval_h": np.full(n, 0.25)})
    hours = np.column_stack([status[i] * 0.25 for i in ids])
    return Aligned(frame, ids, hours, np.ones(n, dtype=bool), 15,
                   {"intervals": n, "used": n, "absent": 0, "no_reading": 0, "log_unknown": 0},
                   {i: 0 for i in ids}, temp_c=temp_c)


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
    base = BaseloadSettings("constant") if misspecified else occupied_baseload(SPELLS)
    site = synthetic_site("site", f"synthetic {seed}", ids, priors or {}, "test", base)
    aligned = aligned_15min(start_utc, y, status)
    hours = aligned.hours
    true_kw = {i: float(energy[i].sum() / hours[:, k].sum()) for k, i in enumerate(ids)}
    month = local.dt.strftime("%Y-%m").to_numpy()
    true_month = {(m, i): float(energy[i][month == m].sum()) for m in set(month) for i in ids}
    true_base = {m: float(base_kw[month == m].sum() * 0.25) for m in set(month)}
    return Synthetic(site, aligned, true_kw, true_month, true_base)


# --- buildings whose baseload moves with the time of day or drifts (issue 10) --------------

OFFICE_SPELLS = ("Mon-Fri 07:00-18:00",)
OFFICE_DRAWS = {"CH-1": 55.0, "WH-1": 12.0, "VF-1": 15.0, "AHU-1": 22.0, "AP-1": 4.0,
                "LF-1": 6.0}
# Scenarios: what the unlogged baseload does besides its declared occupied step.
SCENARIOS = ("step", "swing", "ramps", "wander", "all")
# Not among SCENARIOS (an extra case for the between-week variance, issue 10 item 3):
# "wander" plus a chiller whose draw differs from one local week to the next.
WEEKLY_SCENARIO = "wander-weekly"
WEEKLY_LOAD, WEEKLY_SD_SHARE = "CH-1", 0.15


def make_office(seed: int, scenario: str = "all", days: int = 364, noise_kwh: float = 0.6,
                start: dt.date = dt.date(2025, 1, 6)) -> Synthetic:
    """An invented office of six loads over `days` days of 15-minute intervals.

    Loads: a cycling chiller CH-1 (no prior); a water heater WH-1 that cycles in the morning
    hours 05:00-10:00 (its nameplate prior is exactly right, 12 +- 1.5 kW); a variable-speed
    fan VF-1 (speed 0.3-1.0 during the working day, jittered start; no prior); an air
    handler AHU-1 and its pump AP-1 that always run together, 06:00-18:30 +- 20 min on
    working days (no priors: one combined row); a fan LF-1 locked to the declared schedule
    edges (07:00-18:00 exactly; prior 6 +- 1.5 kW).

    The declared baseload is occupied/unoccupied (Mon-Fri 07:00-18:00); the true one is
    18 kW + 10 kW while occupied, plus, by scenario: "swing" a daily swing of +-6 kW peaking
    at 15:00; "ramps" lights (+12 kW) ramping up linearly 06:00-08:00 and down 17:00-19:00 on
    working days instead of stepping with the schedule; "wander" a slow random walk (sd
    0.8 kW per day, smooth within the day); "all" all three; "step" none (the declared
    profile is exactly right); "wander-weekly" (WEEKLY_SCENARIO) the wander, and CH-1's draw
    times (1 + N(0, 0.15)) drawn afresh for each local Monday-start week (a draw that
    really varies from week to week while the wandering level is chosen). Meter noise:
    AR(1), rho 0.6, sd noise_kwh per interval.
    """
    rng = np.random.default_rng(seed)
    n = days * 96
    t0 = dt.datetime.combine(start, dt.time())
    local = pl.datetime_range(t0, t0 + dt.timedelta(minutes=15 * (n - 1)), "15m",
                              eager=True).dt.replace_time_zone(TZ, ambiguous="earliest",
                                                               non_existent="null")
    local = local.drop_nulls()
    n = len(local)
    hour = local.dt.hour().to_numpy() + local.dt.minute().to_numpy() / 60  # interval start
    mid = hour + 0.125
    wday = local.dt.weekday().to_numpy() - 1
    day = (local.dt.date().rank("dense").to_numpy() - 1).astype(int)
    work = wday < 5
    occupied = work & (hour >= 7) & (hour < 18)

    def fraction_between(a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """Share of each interval [hour, hour + 0.25) inside [a, b)."""
        return np.clip((np.minimum(hour + 0.25, b) - np.maximum(hour, a)) / 0.25, 0.0, 1.0)

    jitter = rng.normal(0, 1 / 3, day.max() + 1)[day]
    status = {
        "CH-1": _cycle(n, 6, 5, rng),
        "WH-1": _cycle(n, 2, 3, rng) * ((hour >= 5) & (hour < 10)),
        "VF-1": work * fraction_between(6.5 + jitter, 18.0 + jitter)
        * np.clip(0.65 + 0.35 * np.sin(2 * np.pi * (mid - 9) / 24)
                  + rng.normal(0, 0.08, n), 0.3, 1.0),
        "AHU-1": work * fraction_between(6.0 + jitter, 18.5 + jitter),
        "LF-1": occupied.astype(float),
    }
    status["AP-1"] = status["AHU-1"].copy()
    base = 18.0 + 10.0 * occupied
    if scenario in ("swing", "all"):
        base = base + 6.0 * np.cos(2 * np.pi * (mid - 15) / 24)
    if scenario in ("ramps", "all"):
        up = np.clip((mid - 6) / 2, 0, 1)
        down = np.clip((19 - mid) / 2, 0, 1)
        base = base + 12.0 * work * np.minimum(up, down)
    if scenario in ("wander", "all", WEEKLY_SCENARIO):
        daily = np.cumsum(rng.normal(0, 0.8, day.max() + 2))
        pos = day + mid / 24
        walk = np.interp(pos, np.arange(len(daily)), daily)
        base = base + walk - walk.mean()
    energy = {k: OFFICE_DRAWS[k] * s * 0.25 for k, s in status.items()}
    if scenario == WEEKLY_SCENARIO:
        # Its own generator, so the other scenarios' draws are unchanged.
        local_day = local.dt.date().to_numpy().astype("datetime64[D]").astype(np.int64)
        _, week = np.unique((local_day + 3) // 7, return_inverse=True)  # Monday-start
        factor = 1.0 + np.random.default_rng(10_000 + seed).normal(
            0.0, WEEKLY_SD_SHARE, week.max() + 1)
        energy[WEEKLY_LOAD] = energy[WEEKLY_LOAD] * factor[week]
    shocks = rng.normal(0, noise_kwh * np.sqrt(1 - 0.36), n)
    e = np.zeros(n)
    for i in range(1, n):
        e[i] = 0.6 * e[i - 1] + shocks[i]
    y = np.maximum(sum(energy.values()) + np.maximum(base, 0) * 0.25 + e, 0)

    ids = list(status)
    site = synthetic_site("office", f"office {scenario} {seed}", ids,
                          {"WH-1": (12.0, 1.5), "LF-1": (6.0, 1.5)}, "test",
                          occupied_baseload(OFFICE_SPELLS), variable=("VF-1",))
    start_utc = local.dt.convert_time_zone("UTC")
    aligned = aligned_15min(start_utc, y, status)
    hours = aligned.hours
    true_kw = {i: float(energy[i].sum() / hours[:, k].sum()) for k, i in enumerate(ids)}
    true_kw["AHU-1+AP-1"] = true_kw["AHU-1"] + true_kw["AP-1"]
    month = local.dt.strftime("%Y-%m").to_numpy()
    true_month = {(m, i): float(energy[i][month == m].sum()) for m in set(month) for i in ids}
    for m in set(month):
        true_month[(m, "AHU-1+AP-1")] = true_month[(m, "AHU-1")] + true_month[(m, "AP-1")]
    true_base = {m: float(np.maximum(base, 0)[month == m].sum() * 0.25) for m in set(month)}
    return Synthetic(site, aligned, true_kw, true_month, true_base)
