"""`disagg drift`: track every draw through time from a reference fit, and raise drift alarms.

The reference is the batch fit over a reference period (default the first 90 days). The
normalized LMS tracker (disagg.analyses.track) starts from it, so there is no burn-in, and walks every
usable interval in time order. Each local day's last tracked value is compared with the
reference by an EWMA control-chart rule plus a practical relative-change threshold.
A saved state lets next month's export continue exactly where this one stopped.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

from disagg.analyses.pipeline import CAUTION, load_inputs, require_usable
from disagg.analyses.track import (
    EWMA_L,
    MU_MAX,
    ewma_alarms,
    mean_gains,
    nlms,
    step_from_memory,
)
from disagg.errors import ConfigError, InputError
from disagg.fit.align import Aligned, baseload_columns
from disagg.fit.estimate import degrees, estimate_draws, weather_columns, weather_specs
from disagg.fit.select import Form
from disagg.fit.solvers import quantile
from disagg.inputs.config import SiteConfig

DEFAULT_REFERENCE_DAYS = 90
# Regularization of the normalized step: 1e-6 of the mean squared input norm, small enough
# never to matter when any load runs (common practice, no source).
DELTA_FRACTION = 1e-6
# Too few run-hours in the reference period to know the draw well enough to alarm on it.
MIN_REFERENCE_RUN_H = 24.0
NOT_ALARMED_FLAGS = ("prior-driven", "inseparable:", "schedule-bound", "not-run")
STATE_VERSION = 1


@dataclass
class DriftResult:
    """drift.csv rows, drift.json content, and the state to continue from."""

    table: pl.DataFrame
    summary: dict
    state: dict


def _design(site, aligned, term_members: list[list[str]]) -> tuple[pl.DataFrame, np.ndarray, np.ndarray]:
    """Used intervals, their design rows and energy, in the order estimate_draws uses: term
    hours, weather slope columns, baseload columns."""
    use = aligned.use
    frame = aligned.frame.filter(pl.Series(use))
    index = {e: j for j, e in enumerate(aligned.equipment_ids)}
    H = aligned.hours[use]
    cols = [H[:, [index[m] for m in members]].mean(axis=1) for members in term_members]
    Hf = np.column_stack(cols) if cols else np.zeros((frame.height, 0))
    temp = aligned.temp_c[use] if aligned.temp_c is not None else None
    Wf = weather_columns(Hf, temp, weather_specs(site, term_members))
    B, _ = baseload_columns(site.baseload, site.timezone, frame["start_utc"],
                            frame["start_utc"].dt.epoch("ns").to_numpy(),
                            frame["end_utc"].dt.epoch("ns").to_numpy())
    return frame, np.column_stack([Hf, Wf, B]), frame["energy_kwh"].to_numpy().astype(float)


def drift_site(site_path: str | Path, memory_days: float = 30.0, step: float | None = None,
               reference: tuple[dt.date, dt.date] | None = None, threshold: float = 0.10,
               confidence: float = 0.95, state: dict | None = None,
               date_from: dt.date | None = None, date_to: dt.date | None = None,
               log_offset_min: float = 0.0) -> DriftResult:
    """Track each draw day by day and flag drift against the reference.

    Args:
        memory_days: the tracker's memory [d], converted to the step size.
        step: the normalized LMS step size instead of memory_days; 0 < step < 2.
        reference: reference period (local dates, inclusive); default the first 90 days.
        threshold: relative change that matters (fraction).
        state: a saved state from an earlier run: continue after its last interval with its
            reference, step size and weights.

    Raises:
        ConfigError: a step outside 0 < mu < 2 (or a memory needing one), bad settings.
        InputError: unusable inputs, or a state that does not fit this site.
    """
    site, aligned = load_inputs(site_path, date_from, date_to, log_offset_min)
    return drift_aligned(site, aligned, memory_days, step, reference, threshold, confidence,
                         state)


def drift_aligned(site: SiteConfig, aligned: Aligned, memory_days: float = 30.0,
                  step: float | None = None,
                  reference: tuple[dt.date, dt.date] | None = None, threshold: float = 0.10,
                  confidence: float = 0.95, state: dict | None = None) -> DriftResult:
    """drift_site on intervals already read and aligned (see drift_site for the arguments)."""
    if not 0.0 < threshold < 10.0:
        raise ConfigError(f"--threshold {threshold}: expected a fraction above 0, e.g. 0.10")
    if step is not None and not 0.0 < step < MU_MAX:
        raise ConfigError(f"--step {step:g}: outside the stable range 0 < mu < {MU_MAX:g} of "
                          "normalized LMS (Haykin, Adaptive Filter Theory); use a value such "
                          "as 0.05")
    if memory_days <= 0:
        raise ConfigError(f"--memory {memory_days:g}: expected a number of days above 0")
    tz = site.timezone
    notes: list[str] = list(aligned.notes)
    per_day = 1440 / aligned.interval_min
    z = quantile(confidence)

    if state is None:
        require_usable(site, aligned)
        local_day = aligned.frame["start_utc"].dt.convert_time_zone(tz).dt.date()
        first = local_day.filter(pl.Series(aligned.use)).min()
        ref = reference or (first, first + dt.timedelta(days=DEFAULT_REFERENCE_DAYS - 1))
        ref_mask = aligned.use & ((local_day >= ref[0]) & (local_day <= ref[1])).to_numpy()
        ref_aligned = dataclasses.replace(aligned, use=ref_mask)
        require_usable(site, ref_aligned)
        try:
            # The tracker's design carries the declared profile's columns (no wandering
            # level): the reference fit uses that form.
            est = estimate_draws(site, ref_aligned, confidence,
                                 form=Form(site.baseload.profile, level=False))
        except ValueError as exc:
            raise InputError(f"{site.meter.file}: reference period {ref[0]}..{ref[1]}: {exc}") from None
        terms = [t for t in est.terms if t.column is not None]
        idx = [est.terms.index(t) for t in terms]
        members = [t.members for t in terms]
        ids = [t.id for t in terms]
        flags = [t.flags for t in terms]
        ref_kw = np.array([est.kw[i] for i in idx])
        ref_se = np.array([est.se_kw[i] for i in idx])
        ref_run_h = np.array([est.hours[:, i].sum() for i in idx])
        w0 = np.array(est.design_coef, dtype=float)
        # Weather terms are tracked as (draw at balance, slope) and stated at the reference
        # temperature: column c, slope column, degrees beyond balance at that temperature.
        specs = weather_specs(site, members)
        at_ref = [[c, len(ids) + s_i,
                   float(degrees(np.array([est.weather[idx[c]]["reference_temp_c"]]),
                                 *specs[c])[0])]
                  for s_i, c in enumerate(specs)]
        _, X_ref, _ = _design(site, ref_aligned, members)
        delta = DELTA_FRACTION * float(np.mean(np.sum(X_ref**2, axis=1)))
        k = len(ids)
        if step is None:
            mu, _ = step_from_memory(X_ref, memory_days * per_day, delta, np.arange(k))
            if not mu < MU_MAX:
                shortest = memory_days * mu / (0.999 * MU_MAX)
                raise ConfigError(f"--memory {memory_days:g}: this memory needs step size "
                                  f"mu = {mu:.3g}, outside the stable range 0 < mu < {MU_MAX:g} "
                                  "of normalized LMS; use a memory of at least "
                                  f"{math.ceil(shortest * 100) / 100:g} days")
        else:
            mu = step
        n_ref = int(ref_mask.sum())
        g = mean_gains(X_ref, delta)[:k]
        with np.errstate(divide="ignore"):
            tau_intervals = np.where(g > 0, 1.0 / (mu * g), np.inf)
        # Band: the tracker averages about 2 tau intervals (an exponential window with time
        # constant tau has effective size 2 tau), against the reference fit's n_ref intervals.
        with np.errstate(divide="ignore", invalid="ignore"):
            sd = np.nan_to_num(ref_se * np.sqrt(n_ref / (2.0 * tau_intervals)), nan=0.0)
        reference_info = {"from": ref[0].isoformat(), "to": ref[1].isoformat(),
                          "intervals": n_ref}
        last_end = None
        first_alarm: dict[str, str] = {}
    else:
        _check_state(state, site)
        ids, members, flags = state["ids"], state["members"], state["flags"]
        ref_kw, ref_se = np.array(state["reference_kw"]), np.array(state["reference_se_kw"])
        ref_run_h = np.array(state["reference_run_h"])
        w0, mu, delta = np.array(state["weights"]), state["mu"], state["delta"]
        at_ref = state["weather_at_reference"]
        n_ref, reference_info = state["reference"]["intervals"], state["reference"]
        last_end = dt.datetime.fromisoformat(state["last_end_utc"])
        first_alarm = dict(state["first_alarm"])
        sd = np.array(state["sd_kw"])
        tau_intervals = np.array(state["tau_intervals"], dtype=float)
        k = len(ids)
        later = (aligned.frame["start_utc"] >= last_end).to_numpy()
        aligned = dataclasses.replace(aligned, use=aligned.use & later)
        if not aligned.use.any():
            raise InputError(f"{site.meter.file}: no usable interval after the saved state's "
                             f"last one ({state['last_end_utc']})")

    frame, X, y = _design(site, aligned, members)
    if X.shape[1] != len(w0):
        raise InputError(f"{site.path}: the saved state has {len(w0)} tracked columns but this "
                         f"site's baseload profile gives {X.shape[1]}; start without --state")
    W = nlms(X, y, w0, mu, delta)

    day = frame["start_utc"].dt.convert_time_zone(tz).dt.date()
    last_of_day = np.flatnonzero(np.r_[(day[1:] != day[:-1]).to_numpy(), True])
    days = day.gather(last_of_day).to_list()
    daily = W[last_of_day, :k].copy()
    for c, s_col, d_ref in at_ref:
        daily[:, int(c)] += W[last_of_day, int(s_col)] * d_ref
    rows = []
    alarms = []
    for j, eq in enumerate(ids):
        why = _not_alarmed(flags[j], ref_run_h[j])
        if why is None:
            alarm = ewma_alarms(daily[:, j], ref_kw[j], sd[j], threshold)
        else:
            alarm = np.zeros(len(days), dtype=bool)
        if alarm.any() and eq not in first_alarm:
            first_alarm[eq] = days[int(np.argmax(alarm))].isoformat()
        for d_i, d in enumerate(days):
            kw = float(daily[d_i, j])
            rows.append({"date": d, "equipment": eq, "kw_tracked": kw,
                         "kw_low": kw - z * sd[j], "kw_high": kw + z * sd[j],
                         "kw_reference": float(ref_kw[j]),
                         "change": kw / ref_kw[j] - 1.0 if ref_kw[j] else None,
                         "alarm": bool(alarm[d_i])})
        if why is not None:
            notes.append(f"{eq}: tracked but not alarmed ({why})")
    for eq, first_date in first_alarm.items():
        j = ids.index(eq)
        kw = float(daily[-1, j])
        alarms.append({
            "equipment": eq, "first_alarm_date": first_date,
            "kw_reference": float(ref_kw[j]), "kw_latest": kw,
            "change": kw / ref_kw[j] - 1.0,
            "change_low": (kw - z * sd[j]) / ref_kw[j] - 1.0,
            "change_high": (kw + z * sd[j]) / ref_kw[j] - 1.0,
            "as_of": days[-1].isoformat(),
        })
    span_days = (days[-1] - days[0]).days + 1
    # Memory actually achieved on these data (the gains differ from the reference period's
    # when a load runs more or less often).
    g_now = mean_gains(X, delta)[:k]
    memory_used = {eq: float(1.0 / (mu * g_now[j]) / per_day) if g_now[j] > 0 else None
                   for j, eq in enumerate(ids)}
    if state is None and step is None and memory_days > span_days / 3:
        notes.append(f"the memory of {memory_days:g} days is over a third of the {span_days} days "
                     "of data: the tracker cannot follow a change within this data; use a "
                     "shorter --memory")
    table = pl.DataFrame(rows, schema={"date": pl.Date, "equipment": pl.String,
                                       "kw_tracked": pl.Float64, "kw_low": pl.Float64,
                                       "kw_high": pl.Float64, "kw_reference": pl.Float64,
                                       "change": pl.Float64, "alarm": pl.Boolean})
    summary = {
        "site": site.name,
        "step_size_mu": mu,
        "stable_range": f"0 < mu < {MU_MAX:g} (normalized LMS; Haykin, Adaptive Filter Theory)",
        "memory_days_requested": None if step is not None or state is not None else memory_days,
        "memory_days_per_equipment": memory_used,
        "reference": reference_info,
        "threshold": threshold,
        "rule": (f"alarm when |tracked - reference| exceeds both {EWMA_L:g} standard deviations "
                 "of the tracked value (EWMA control chart, Roberts 1959) and threshold x "
                 "reference"),
        "band_sd_kw": {eq: float(sd[j]) for j, eq in enumerate(ids)},
        "alarms": alarms,
        "notes": notes,
        "caution": CAUTION,
    }
    new_state = {
        "version": STATE_VERSION, "site": site.name, "timezone": tz,
        "baseload_profile": site.baseload.profile,
        "ids": ids, "members": members, "flags": flags,
        "reference": reference_info, "reference_kw": ref_kw.tolist(),
        "reference_se_kw": ref_se.tolist(), "reference_run_h": ref_run_h.tolist(),
        "weights": W[-1].tolist(), "mu": mu, "delta": delta, "weather_at_reference": at_ref,
        "sd_kw": sd.tolist(), "tau_intervals": tau_intervals.tolist(),
        "last_end_utc": frame["end_utc"].max().isoformat(),
        "first_alarm": first_alarm,
    }
    return DriftResult(table, summary, new_state)


def _not_alarmed(flags: list[str], run_h: float) -> str | None:
    for f in flags:
        if any(f.startswith(p) for p in NOT_ALARMED_FLAGS):
            return f"its reference draw is {f}: the data cannot pin it down"
    if run_h < MIN_REFERENCE_RUN_H:
        return (f"only {run_h:.0f} run-hours in the reference period, under "
                f"{MIN_REFERENCE_RUN_H:g}")
    return None


def _check_state(state: dict, site) -> None:
    needed = {"version", "ids", "members", "weights", "mu", "delta", "last_end_utc",
              "reference_kw", "reference_se_kw", "reference_run_h", "sd_kw", "first_alarm",
              "reference", "flags", "tau_intervals", "weather_at_reference"}
    missing = needed - set(state)
    if missing or state.get("version") != STATE_VERSION:
        raise InputError(f"the --state file is not a disagg drift state (missing "
                         f"{', '.join(sorted(missing)) or 'version ' + str(STATE_VERSION)})")
    known = set(site.equipment_ids())
    for members in state["members"]:
        for m in members:
            if m not in known:
                raise InputError(f"the --state file tracks equipment {m!r}, which {site.path} "
                                 "does not configure; start without --state")
