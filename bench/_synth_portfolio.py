"""Synthetic portfolio sites with known truth, for bench/portfolio.py. Everything is invented.

A site is one year (2025, local time America/Chicago) of meter readings (kWh per interval,
stamped at the interval's end with its UTC offset), an event run log (time, point, on/off)
and a site TOML. Each load switches on and off at random (geometric spell lengths on a
10-second grid, so events fall between meter interval edges); some loads only run in
occupied hours. The meter reads each load's running draw times its exact run-hours, plus an
occupied/unoccupied baseload and AR(1) noise. Half the loads carry a nameplate near their
true draw; the other half have no prior. The truth (draws, baseload) is returned and written
beside the data.
"""

from __future__ import annotations

import datetime as dt
import json
import sys
import zoneinfo
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from sitefiles import write_site_toml  # noqa: E402

TZ = "America/Chicago"
YEAR = 2025
STEP_S = 10  # simulation grid [s]
SPELLS = ("Mon-Fri 07:00-19:00", "Sat 08:00-13:00")
BASE_UNOCCUPIED_KW = 30.0
BASE_OCCUPIED_EXTRA_KW = 15.0
NOISE_SD_KWH_PER_H = 6.0  # meter noise sd per hour of interval [kWh]; per interval scales
NOISE_AR = 0.6  # AR(1) coefficient of the noise (per interval)
KINDS = ("air", "pumping", "cooling", "heating", "compressed air", "water heating")


@dataclass
class SiteTruth:
    toml: Path
    meter: Path
    runlog: Path
    equipment: list[str]
    draw_kw: dict[str, float]
    base_kw: dict[str, float]  # occupied, unoccupied
    event_rows: int
    intervals: int


def _occupied(local_start: pl.Series) -> np.ndarray:
    """True where a local time is inside the spells of SPELLS (whole hours)."""
    wd = local_start.dt.weekday().cast(pl.Int64).to_numpy()  # Mon = 1
    hour = local_start.dt.hour().cast(pl.Int64).to_numpy()
    return ((wd <= 5) & (hour >= 7) & (hour < 19)) | ((wd == 6) & (hour >= 8) & (hour < 13))


def _spells(n_steps: int, mean_on: float, mean_off: float,
            rng: np.random.Generator) -> np.ndarray:
    """0/1 state per grid step with geometric on and off spell lengths [steps]."""
    count = int(n_steps / (mean_on + mean_off) * 1.3) + 16
    on = rng.geometric(1.0 / mean_on, count)
    off = rng.geometric(1.0 / mean_off, count)
    lengths = np.column_stack([off, on]).ravel()
    states = np.tile(np.array([0, 1], dtype=np.int8), count)
    first = int(rng.integers(0, 2))
    state = np.repeat(states[first:], lengths[first:])
    while len(state) < n_steps:  # very unlikely: draw more spells
        state = np.concatenate([state, _spells(n_steps, mean_on, mean_off, rng)])
    return state[:n_steps]


def make_site(folder: Path, index: int, *, interval_min: int = 15, n_equipment: int = 20,
              seed: int = 2025) -> SiteTruth:
    """Write site `index` (files siteNNN.toml in folder, data in folder/data) and return its
    truth. The same (index, interval_min, n_equipment, seed) gives the same files."""
    rng = np.random.default_rng([seed, index, interval_min, n_equipment])
    folder = Path(folder)
    data = folder / "data"
    data.mkdir(parents=True, exist_ok=True)
    name = f"site{index:03d}" + ("" if interval_min == 15 else f"_{interval_min}min")
    zone = zoneinfo.ZoneInfo(TZ)
    first_utc = dt.datetime(YEAR, 1, 1, tzinfo=zone).astimezone(dt.UTC)
    end_utc_excl = dt.datetime(YEAR + 1, 1, 1, tzinfo=zone).astimezone(dt.UTC)
    start_utc = pl.datetime_range(first_utc, end_utc_excl, f"{interval_min}m", eager=True,
                                  time_zone="UTC", closed="left")
    n = len(start_utc)
    occupied = _occupied(start_utc.dt.convert_time_zone(TZ))
    per = interval_min * 60 // STEP_S
    n_steps = n * per
    occ_steps = np.repeat(occupied, per)

    ids = [f"EQ-{j + 1:02d}" for j in range(n_equipment)]
    draw = np.round(rng.uniform(3.0, 60.0, n_equipment), 2)
    hours = np.empty((n, n_equipment))
    events = []
    step_ns = STEP_S * 1_000_000_000
    t0_ns = int(first_utc.timestamp()) * 1_000_000_000
    for j in range(n_equipment):
        mean_on = rng.uniform(15, 45) * 60 / STEP_S
        mean_off = rng.uniform(15, 45) * 60 / STEP_S
        state = _spells(n_steps, mean_on, mean_off, rng)
        if j % 4 == 1:  # runs only in occupied hours
            state = state * occ_steps
        hours[:, j] = state.reshape(n, per).sum(axis=1) * (STEP_S / 3600.0)
        change = np.flatnonzero(np.diff(state)) + 1
        at = np.concatenate([[0], change, [n_steps]])
        value = np.concatenate([state[at[:-1]], [state[-1]]])
        events.append(pl.DataFrame({"t": t0_ns + at.astype(np.int64) * step_ns,
                                    "point": ids[j], "on": value.astype(bool)}))
    log = pl.concat(events).sort("t", maintain_order=True)
    log = log.select(
        pl.from_epoch("t", time_unit="ns").dt.replace_time_zone("UTC")
        .dt.convert_time_zone(TZ).dt.strftime("%Y-%m-%dT%H:%M:%S%:z").alias("time"),
        "point", pl.when(pl.col("on")).then(pl.lit("on")).otherwise(pl.lit("off")).alias("state"))

    length_h = interval_min / 60.0
    occ_h = occupied * length_h
    base = BASE_UNOCCUPIED_KW * length_h + BASE_OCCUPIED_EXTRA_KW * occ_h
    eps = rng.normal(0.0, NOISE_SD_KWH_PER_H * length_h, n)
    noise = np.empty(n)
    noise[0] = eps[0]
    for t in range(1, n):
        noise[t] = NOISE_AR * noise[t - 1] + eps[t]
    kwh = np.round(hours @ draw + base + noise, 3)
    end_utc = start_utc.dt.offset_by(f"{interval_min}m")
    meter = pl.DataFrame({"reading_end": end_utc.dt.convert_time_zone(TZ)
                          .dt.strftime("%Y-%m-%dT%H:%M:%S%:z"), "kwh": kwh})

    meter_path = data / f"{name}_meter.csv"
    log_path = data / f"{name}_runlog.csv"
    meter.write_csv(meter_path)
    log.write_csv(log_path)
    equipment = []
    for j, eid in enumerate(ids):
        eq = {"id": eid, "name": f"Load {j + 1} (synthetic)", "kind": KINDS[j % len(KINDS)]}
        if j % 2 == 0:  # a nameplate near the truth: prior 80 % of full load (config._prior)
            eq["rated_kw"] = round(float(draw[j] / 0.8 * rng.uniform(0.9, 1.1)), 2)
        equipment.append(eq)
    toml = write_site_toml(
        folder / f"{name}.toml", name=f"Bench {name} (synthetic)", timezone=TZ,
        meter_file=f"data/{meter_path.name}", runlog_file=f"data/{log_path.name}",
        meter={"time_column": "reading_end", "interval_minutes": interval_min},
        profile="occupied", occupied=SPELLS, equipment=equipment,
        header=f"# Synthetic bench site {name} (bench/_synth_portfolio.py); every number\n"
               "# is invented.\n")
    truth = SiteTruth(toml, meter_path, log_path, ids, dict(zip(ids, map(float, draw))),
                      {"occupied": BASE_UNOCCUPIED_KW + BASE_OCCUPIED_EXTRA_KW,
                       "unoccupied": BASE_UNOCCUPIED_KW}, log.height, n)
    (data / f"{name}_truth.json").write_text(json.dumps(
        {"draw_kw": truth.draw_kw, "base_kw": truth.base_kw, "event_rows": truth.event_rows,
         "intervals": n}, indent=1))
    return truth
