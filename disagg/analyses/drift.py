"""`disagg drift`: track every draw through time from a reference fit, and raise drift alarms.

Loads the data cannot tell apart (run-hours correlated at |r| >= 0.95 over the data) are
tracked, alarmed and reported as their group (`A+B`, disagg.analyses.groups): the group's
combined draw is well determined even where each member's is not. Each tracked load (or
group) has its own reference: by default its first 90 days, from its first day of running,
that hold at least 48 run-hours, so seasonal equipment is tracked from its own season;
`reference` pins one period for all. Each reference period is fitted once (the batch fit of
disagg.fit.estimate) and every load starts from its own period's draw, so there is no
burn-in.

The per-weight normalized LMS tracker (disagg.analyses.track) walks every usable interval
in time order; its diagonal step matrix gives each load the requested memory in days
whatever its duty cycle. Each local day's last tracked value is compared with the reference
by an EWMA control-chart rule plus a practical relative-change threshold. Change figures
take the tracker's lag out (track.recent_level) and carry the reference's own uncertainty.
A saved state lets next month's export continue exactly where this one stopped.
"""

from __future__ import annotations

import base64
import dataclasses
import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl
from scipy.linalg import pinvh
from scipy.special import ndtri

from disagg.analyses.groups import group_id, grouped_site, inseparable_groups
from disagg.analyses.pipeline import CAUTION, load_inputs, require_usable
from disagg.analyses.summary import DriftAlarm, DriftSummary
from disagg.analyses.track import (
    EWMA_L,
    MU_MAX,
    PER_WEIGHT_DELTA,
    ewma_alarms,
    nlms,
    recent_levels,
    scales_for_memory,
    step_for_rates,
    weight_covariance,
)
from disagg.errors import ConfigError, InputError
from disagg.fit.align import Aligned
from disagg.fit.estimate import (
    Estimates,
    degrees,
    design,
    estimate_draws,
    weather_specs,
)
from disagg.fit.design import BaseloadBuilder, rows_of
from disagg.fit.select import Form, kept_columns
from disagg.fit.solvers import quantile
from disagg.inputs.config import SiteConfig

DEFAULT_REFERENCE_DAYS = 90
# A load's reference period must hold at least this many run-hours (two full days of
# running; common practice, no source): fewer pin its draw down too loosely to alarm on.
MIN_REFERENCE_RUN_H = 48.0
# Chart limit: the chance of a false alarm per tracked load and year is held near 0.2 % by
# a Bonferroni split over the year's independent stretches of one memory length (the tracked
# value forgets in about tau days): L = Phi^-1(1 - 0.002 / (2 x 365 / tau)), 3.77 at 30
# days (common practice in spirit, no source for the 0.2 %, a design choice; the measured
# rate is in bench/RESULTS.md).
FALSE_ALARM_PER_LOAD_YEAR = 0.002


def chart_limit(tau_days: float) -> float:
    """The EWMA chart's L for a tracker forgetting in tau_days (at least EWMA_L = 3)."""
    blocks = max(1.0, 365.25 / tau_days) if np.isfinite(tau_days) and tau_days > 0 else 1.0
    return max(EWMA_L, float(ndtri(1.0 - FALSE_ALARM_PER_LOAD_YEAR / (2.0 * blocks))))


# The recent level must span at least this many days before it can alarm (a week: every
# weekday schedule seen; common practice, no source).
MIN_RECENT_DAYS = 7

# Residual autocovariance lags in the tracker's band: one hour of 15-minute intervals
# (differenced residuals are correlated at lag 1; a little further for slow noise).
BAND_LAGS = 4
NOT_ALARMED_FLAGS = ("prior-driven", "inseparable:", "schedule-bound", "not-run")
STATE_VERSION = 2


@dataclass
class DriftResult:
    """drift.csv rows, drift.json content, and the state to continue from."""

    table: pl.DataFrame
    summary: DriftSummary
    state: dict


def _design(site, aligned, term_members: list[list[str]],
            consume_hours: bool = False) -> tuple[pl.DataFrame, np.ndarray, np.ndarray]:
    """Used intervals, their design rows and energy: the breakdown's own design builder
    (disagg.fit.estimate.design) with the declared profile and no wandering level, in the
    order estimate_draws uses (term hours, weather slope columns, baseload columns)."""
    d = design(site, aligned, term_members, consume_hours=consume_hours)
    return d.frame, d.X, d.y


# Rows per chunk of the sums over a long series' hours (bounds their temporary memory).
_SUM_CHUNK_ROWS = 65536


def _last_row(frame: pl.DataFrame, X: np.ndarray, y: np.ndarray) -> dict:
    """The last interval's end, design row and energy, for the saved state (differences'
    `previous` of the next run)."""
    return {"end_utc": frame["end_utc"][-1].isoformat(), "x": X[-1].tolist(),
            "y": float(y[-1])}


def bartlett_lrv(x: np.ndarray, lags: int) -> float:
    """Long-run variance of a series about zero: gamma_0 + 2 sum_l (1 - l / (L + 1)) gamma_l
    (Bartlett weights, Newey & West 1987), autocovariances by FFT."""
    n = len(x)
    if n == 0:
        return 0.0
    lags = min(lags, n - 1)
    f = np.fft.rfft(x, 2 * n)
    ac = np.fft.irfft(f * np.conj(f))[:lags + 1] / n
    w = 1.0 - np.arange(lags + 1) / (lags + 1)
    return float(ac[0] + 2.0 * np.sum(w[1:] * ac[1:]))


def differences(frame: pl.DataFrame, X: np.ndarray, y: np.ndarray,
                previous: dict | None, *, in_place: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Each interval's design row and energy minus the previous interval's.

    A baseload level that wanders slowly, and anything constant over two adjacent intervals,
    cancels; an on/off load shows only where it switches, so loads that switch at different
    times are nearly uncorrelated and a change in one is not blamed on another that runs
    alongside it. An interval whose predecessor is not the interval just before it (a gap)
    gets a zero row, and is not learnt from.

    Args:
        previous: the last interval before `frame` ({"end_utc", "x", "y"}) or None.
        in_place: overwrite X and y with the differences (and return them): a long 1-minute
            design is not held twice. The differences are made one column at a time, so the
            temporary memory is one column.
    """
    start = frame["start_utc"].to_numpy()
    end = frame["end_utc"].to_numpy()
    dX = X if in_place else np.empty_like(X)
    dy = y if in_place else np.empty_like(y)
    n = len(y)
    first_x = first_y = None
    if previous is not None and n:
        prev_end = np.datetime64(dt.datetime.fromisoformat(previous["end_utc"])
                                 .astimezone(dt.UTC).replace(tzinfo=None), "us")
        if start[0].astype("datetime64[us]") == prev_end:
            first_x = X[0] - np.asarray(previous["x"], dtype=float)
            first_y = y[0] - float(previous["y"])
    if n > 1:
        gap = ~(start[1:] == end[:-1])
        for j in range(X.shape[1]):
            col = X[:, j]
            d = col[1:] - col[:-1]
            d[gap] = 0.0
            dX[1:, j] = d
        d = y[1:] - y[:-1]
        d[gap] = 0.0
        dy[1:] = d
    if n:
        dX[0] = 0.0 if first_x is None else first_x
        dy[0] = 0.0 if first_y is None else first_y
    return dX, dy


def reference_window(day_run_h: np.ndarray, days: list[dt.date], length_days: int,
                     min_run_h: float) -> tuple[dt.date, dt.date] | None:
    """A load's own reference: the first `length_days` days, starting on a day it runs,
    that hold at least min_run_h run-hours (None when no such stretch exists).

    Args:
        day_run_h: (d,) run-hours per local day; days: those local dates, ascending.
    """
    ordinal = np.array([d.toordinal() for d in days])
    cum = np.r_[0.0, np.cumsum(day_run_h)]
    for i in np.flatnonzero(day_run_h > 0):
        end = np.searchsorted(ordinal, ordinal[i] + length_days, side="left")
        if cum[end] - cum[i] >= min_run_h:
            return days[i], dt.date.fromordinal(int(ordinal[i]) + length_days - 1)
    return None


def drift_site(site_path: str | Path, memory_days: float = 30.0, step: float | None = None,
               reference: tuple[dt.date, dt.date] | None = None, threshold: float = 0.10,
               confidence: float = 0.95, state: dict | None = None,
               date_from: dt.date | None = None, date_to: dt.date | None = None,
               log_offset_min: float | None = None, baseload_memory_days: float | None = None,
               min_reference_run_h: float = MIN_REFERENCE_RUN_H) -> DriftResult:
    """Track each draw day by day and flag drift against its reference.

    Args:
        memory_days: the tracker's memory [d] for every load, whatever its duty cycle.
        step: the normalized LMS step size mu instead of the default; 0 < step < 2 (the
            per-weight scales still give each load memory_days relative to the others).
        reference: one reference period for all loads (local dates, inclusive); default:
            each load's own first 90 days holding min_reference_run_h run-hours.
        threshold: relative change that matters (fraction).
        state: a saved state from an earlier run: continue after its last interval with its
            references, step size, scales and weights.
        baseload_memory_days: memory of the baseload levels [d]; default memory_days.
        min_reference_run_h: run-hours a load's own reference period must hold.

    Raises:
        ConfigError: a step outside 0 < mu < 2 (or a memory needing one), bad settings.
        InputError: unusable inputs, or a state that does not fit this site.
    """
    site, aligned = load_inputs(site_path, date_from, date_to, log_offset_min)
    return drift_aligned(site, aligned, memory_days, step, reference, threshold, confidence,
                         state, baseload_memory_days=baseload_memory_days,
                         min_reference_run_h=min_reference_run_h, consume_hours=True)


def _fit_window(site: SiteConfig, aligned: Aligned, local_day: np.ndarray,
                window: tuple[dt.date, dt.date], confidence: float) -> Estimates:
    """The batch fit of one reference period.

    Raises:
        InputError: too little usable data in the period.
    """
    ref_aligned = _window_aligned(aligned, local_day, window)
    require_usable(site, ref_aligned)
    try:
        # The tracker's design carries the declared profile's columns (no wandering level):
        # its reference fits use that form, so their baseload weights fit the design.
        return estimate_draws(site, ref_aligned, confidence,
                              form=Form(site.baseload.profile, level=False))
    except ValueError as exc:
        raise InputError(f"{site.meter.file}: reference period {window[0]}..{window[1]}: "
                         f"{exc}") from None


def _chosen_fit(site: SiteConfig, aligned: Aligned, local_day: np.ndarray,
                window: tuple[dt.date, dt.date], confidence: float) -> Estimates | str:
    """The reference period fitted as breakdown fits it: the baseload form the data choose
    (or the one [baseload] form pins), with the wandering level when chosen; or why not."""
    try:
        return estimate_draws(site, _window_aligned(aligned, local_day, window), confidence)
    except ValueError as exc:
        return str(exc)


def _window_aligned(aligned: Aligned, local_day: np.ndarray,
                    window: tuple[dt.date, dt.date]) -> Aligned:
    """The aligned data with only the usable intervals on the window's local dates."""
    return dataclasses.replace(aligned, use=aligned.use
                               & (local_day >= np.datetime64(window[0]))
                               & (local_day <= np.datetime64(window[1])))


def reference_form_check(ref: Estimates, chosen: Estimates | str, i: int,
                         members: list[str]) -> dict:
    """How a tracked load's draw in the declared profile's fit of its reference period (the
    static form the tracker's design carries) compares with its draw under the form the
    data choose for the same period (breakdown's form, disagg.fit.estimate.choose_form).

    They differ materially ("differs") when the data choose another form and either draw
    lies outside the other's interval, or the chosen form has no row of its own for the
    load. With the reference from the declared profile ("reference_from"; drift_aligned
    may switch it to the chosen form) such a load's absolute reference level is
    "uncertain", said in "reason" in plain words. Draws in kW with their intervals.
    """
    out = {"form_declared": _form_name(ref), "kw_declared_form": float(ref.kw[i]),
           "kw_declared_form_low": float(ref.kw_low[i]),
           "kw_declared_form_high": float(ref.kw_high[i]), "form_chosen": None,
           "kw_chosen_form": None, "kw_chosen_form_low": None, "kw_chosen_form_high": None,
           "differs": False, "reference_from": "form_declared", "uncertain": False}
    if isinstance(chosen, str):
        out["detail"] = f"the form the data choose could not be fitted: {chosen}"
        return out
    out["form_chosen"] = chosen.form.form.name
    if chosen.form.form.name == out["form_declared"]:
        return out
    j, t = _find_term(chosen, members)
    if j is None:
        out["differs"] = out["uncertain"] = True
        out["reason"] = (f"its absolute reference level is uncertain: under the baseload form "
                         f"the data choose for its reference period ({out['form_chosen']}), "
                         f"{t.removeprefix('in its reference period ')}; changes are still "
                         "tracked against its reference draw")
        return out
    a, lo_a, hi_a = float(chosen.kw[j]), float(chosen.kw_low[j]), float(chosen.kw_high[j])
    out.update(kw_chosen_form=a, kw_chosen_form_low=lo_a, kw_chosen_form_high=hi_a)
    r, lo_r, hi_r = (out["kw_declared_form"], out["kw_declared_form_low"],
                     out["kw_declared_form_high"])
    if not (lo_r <= a <= hi_r and lo_a <= r <= hi_a):
        out["differs"] = out["uncertain"] = True
        out["reason"] = (f"its absolute reference level is uncertain: the reference fit "
                         f"(baseload {out['form_declared']}) gives {r:.2f} kW ({lo_r:.2f} to "
                         f"{hi_r:.2f}), the form the data choose for the same period "
                         f"({out['form_chosen']}) {a:.2f} kW ({lo_a:.2f} to {hi_a:.2f}); "
                         "changes are still tracked against the reference draw")
    return out


def _same_split(static: Estimates, chosen: Estimates | str) -> bool:
    """Whether the chosen form's fit has the same fitted rows (and baseload row) as the
    declared profile's fit of the same period."""
    if isinstance(chosen, str):
        return False

    def split(est):
        return sorted(sorted(t.members) for t in est.terms
                      if t.column is not None and "not-run" not in t.flags), est.base_id
    return split(static) == split(chosen)


# Rows per block of the offset's baseload columns (bounds their temporary memory).
_OFFSET_CHUNK_ROWS = 32768


def _offset_kwh(site: SiteConfig, aligned: Aligned, offset: dict | None) -> np.ndarray | None:
    """The reference fit's baseload profile energy in each used interval [kWh]: the chosen
    form's profile columns times their reference coefficients (without the wandering level,
    whose steps stay in the tracked data as they did in the reference period), a block of
    rows at a time; None without an offset."""
    if offset is None:
        return None
    form = Form.parse(offset["form"])
    coef = np.asarray(offset["coef_kw"], dtype=float)
    rows = rows_of(aligned, site.timezone)
    builder = BaseloadBuilder(site, rows)
    out = np.zeros(rows.n)
    if not len(coef):
        return out
    for a in range(0, rows.n, _OFFSET_CHUNK_ROWS):
        sel = np.zeros(rows.n, dtype=bool)
        sel[a:a + _OFFSET_CHUNK_ROWS] = True
        B, _ = builder.columns(form.profile, sel)
        if form.level:
            B = B[:, kept_columns(form.profile, B.shape[1])]
        if B.shape[1] != len(coef):
            raise InputError(f"{site.path}: the reference's baseload offset has {len(coef)} "
                             f"columns but the form {form.name} gives {B.shape[1]} here; "
                             "start without --state")
        out[a:a + _OFFSET_CHUNK_ROWS] = B @ coef
    return out


def _form_name(est: Estimates) -> str:
    """The name of the baseload form a fit used (e.g. occupied, hour-of-week+level)."""
    return est.form.form.name if est.form is not None else "?"


def _find_term(est: Estimates, members: list[str]):
    """(index, term) of the fitted row with exactly these members, or (None, why not)."""
    for i, t in enumerate(est.terms):
        if sorted(t.members) == sorted(members):
            if t.column is None or "not-run" in t.flags:
                return None, "it did not run in its reference period"
            return i, t
    if any(m in est.base_id.split("+")[1:] for m in members):
        return None, (f"in its reference period it runs on the baseload schedule: its energy "
                      f"is in the row {est.base_id!r}")
    for t in est.terms:
        if set(members) & set(t.members):
            return None, f"in its reference period it is part of the row {t.id!r}"
    return None, "its reference period has no fitted row for it"


def drift_aligned(site: SiteConfig, aligned: Aligned, memory_days: float = 30.0,
                  step: float | None = None,
                  reference: tuple[dt.date, dt.date] | None = None, threshold: float = 0.10,
                  confidence: float = 0.95, state: dict | None = None, *,
                  baseload_memory_days: float | None = None,
                  min_reference_run_h: float = MIN_REFERENCE_RUN_H,
                  reference_days: int = DEFAULT_REFERENCE_DAYS,
                  consume_hours: bool = False) -> DriftResult:
    """drift_site on intervals already read and aligned (see drift_site for the arguments).

    consume_hours: the tracked design may be written over aligned.hours (a long series then
    holds one (n, k) array, not two; design.design); aligned.hours is None afterwards when it
    was. For callers that need the hours no more (drift_site, the report's drift)."""
    if not 0.0 < threshold < 10.0:
        raise ConfigError(f"--threshold {threshold}: expected a fraction above 0, e.g. 0.10")
    if step is not None and not 0.0 < step < MU_MAX:
        raise ConfigError(f"--step {step:g}: outside the stable range 0 < mu < {MU_MAX:g} of "
                          "normalized LMS (Haykin, Adaptive Filter Theory); use a value such "
                          "as 0.05")
    if memory_days <= 0:
        raise ConfigError(f"--memory {memory_days:g}: expected a number of days above 0")
    base_memory = memory_days if baseload_memory_days is None else baseload_memory_days
    if base_memory <= 0:
        raise ConfigError(f"--baseload-memory {base_memory:g}: expected a number of days above 0")
    tz = site.timezone
    notes: list[str] = list(aligned.notes)
    per_day = 1440 / aligned.interval_min
    z = quantile(confidence)
    local_day_all = aligned.frame["start_utc"].dt.convert_time_zone(tz).dt.date()

    if state is None:
        require_usable(site, aligned)
        local_day = local_day_all.to_numpy().astype("datetime64[D]")
        used_days = local_day_all.filter(pl.Series(aligned.use))
        first = used_days.min()
        main = reference or (first, first + dt.timedelta(days=reference_days - 1))
        groups = inseparable_groups(site, aligned)
        gsite = grouped_site(site, groups)
        grouped = {m for g in groups for m in g}
        # Run-hours of each load over the intervals used (only > 0 is asked), a chunk of
        # rows at a time: no copy of the whole (n, k) hours.
        used_idx = np.flatnonzero(aligned.use)
        run_total = np.zeros(aligned.hours.shape[1])
        for a in range(0, len(used_idx), _SUM_CHUNK_ROWS):
            run_total += np.nansum(aligned.hours[used_idx[a:a + _SUM_CHUNK_ROWS]], axis=0)
        index = {e: j for j, e in enumerate(aligned.equipment_ids)}
        candidates = [g for g in groups] + [
            [e] for e in aligned.equipment_ids if e not in grouped and run_total[index[e]] > 0]
        order = {e.id: k for k, e in enumerate(site.equipment)}
        candidates.sort(key=lambda m: order.get(m[0], 0))
        # Run-hours per local day of each candidate (a group: the mean of its members').
        uniq, pos = np.unique(local_day[used_idx], return_inverse=True)
        day_list = uniq.astype("datetime64[D]").astype(object).tolist()
        pos = pos.reshape(-1)
        windows: dict[str, tuple[dt.date, dt.date]] = {}
        no_reference: dict[str, str] = {}
        for members in candidates:
            cid = group_id(members)
            h = aligned.hours[np.ix_(used_idx, [index[m] for m in members])].mean(axis=1)
            per_day_h = np.bincount(pos, weights=h, minlength=len(day_list))
            if reference is not None:
                windows[cid] = reference
                continue
            in_main = per_day_h[[i for i, d in enumerate(day_list)
                                 if main[0] <= d <= main[1]]].sum()
            if in_main >= min_reference_run_h:
                windows[cid] = main
                continue
            own = reference_window(per_day_h, day_list, reference_days, min_reference_run_h)
            if own is None:
                best = max((per_day_h[[i for i, d in enumerate(day_list)
                                       if s <= d < s + dt.timedelta(days=reference_days)]].sum()
                            for s in day_list[::7]), default=0.0)
                no_reference[cid] = (f"no {reference_days} days of the data hold "
                                     f"{min_reference_run_h:g} of its run-hours (at most about "
                                     f"{best:.0f}; {per_day_h.sum():.0f} in all): not tracked")
                continue
            windows[cid] = own
        fits: dict[tuple[dt.date, dt.date], Estimates] = {
            main: _fit_window(gsite, aligned, local_day, main, confidence)}
        for w in sorted(set(windows.values())):
            if w not in fits:
                try:
                    fits[w] = _fit_window(gsite, aligned, local_day, w, confidence)
                except InputError as exc:
                    for cid, cw in list(windows.items()):
                        if cw == w:
                            no_reference[cid] = f"its reference period {w[0]}..{w[1]}: {exc}"
                            del windows[cid]
        main_est = fits[main]
        # Each reference period fitted again as breakdown fits it (the form the data
        # choose): the tracker's design cannot carry that form, but its draws show whether
        # the reference draws lean on the declared profile.
        chosen = {w: _chosen_fit(gsite, aligned, local_day, w, confidence) for w in fits}
        ids, members, flags, found = [], [], [], []
        for m in candidates:
            cid = group_id(m)
            if cid not in windows:
                continue
            est = fits[windows[cid]]
            i, t = _find_term(est, m)
            if i is None:
                no_reference[cid] = f"not tracked: {t}"
                continue
            ids.append(cid)
            members.append(m)
            flags.append(list(t.flags))
            found.append((est, i, t))
        k = len(ids)
        form_check = {cid: reference_form_check(est, chosen[windows[cid]], i, m)
                      for cid, m, (est, i, _) in zip(ids, members, found)}
        used_windows = sorted({windows[c] for c in ids} | {main})
        # The reference draws come from the form the data choose when every reference
        # period's chosen fit splits the loads as its declared-profile fit does: its
        # baseload shape beyond the declared profile is then taken out of the metered
        # energy as a fixed offset, so that the tracker's equilibrium is those draws.
        offset = None
        main_differs = (not isinstance(chosen[main], str)
                        and _form_name(chosen[main]) != _form_name(fits[main]))
        if main_differs and all(_same_split(fits[w], chosen[w]) for w in used_windows):
            static_found = found
            found = [(chosen[windows[cid]], *_find_term(chosen[windows[cid]], m))
                     for cid, m in zip(ids, members)]
            flags = [list(t.flags) for _, _, t in found]
            c_main = chosen[main]
            m_c = c_main.base.shape[1]
            offset = {"form": c_main.form.form.name, "q": c_main.form.form.q,
                      "coef_kw": (np.asarray(c_main.design_coef)[-m_c:].tolist()
                                  if m_c else [])}
            for cid in ids:
                form_check[cid].update(reference_from="form_chosen", uncertain=False)
                form_check[cid].pop("reason", None)
        elif main_differs:
            notes.append("the reference draws are from the declared baseload profile: the "
                         "form the data choose for a reference period splits the loads "
                         "differently (another combined row, or a load in the baseload row)")
        reference_forms = [
            {"from": w[0].isoformat(), "to": w[1].isoformat(),
             "form_used": (_form_name(chosen[w]) if offset is not None else _form_name(fits[w])),
             "form_declared": _form_name(fits[w]),
             "form_chosen": (None if isinstance(chosen[w], str) else _form_name(chosen[w])),
             "comparison": (chosen[w] if isinstance(chosen[w], str)
                            else chosen[w].form.as_json())}
            for w in sorted(fits) if any(windows.get(c) == w for c in ids)]
        if k == 0:
            why = "; ".join(f"{c}: {r}" for c, r in no_reference.items())
            raise InputError(f"{site.meter.file}: no load has a reference period to track it "
                             f"from ({why})")
        specs = weather_specs(site, members)
        ref_kw = np.array([est.kw[i] for est, i, _ in found])
        ref_se = np.array([est.se_kw[i] for est, i, _ in found])
        ref_run_h = np.array([est.hours[:, i].sum() for est, i, _ in found])
        m_base = main_est.base.shape[1]
        w0 = np.concatenate([
            [est.design_coef[t.column] for est, _, t in found],
            [found[c][0].weather[found[c][1]].slope_kw_per_degc for c in specs],
            np.asarray(main_est.design_coef)[-m_base:] if m_base else []]).astype(float)
        offset_kwh = _offset_kwh(site, aligned, offset)
        w0_static = None
        if offset is not None:
            w0_static = np.concatenate([
                [est.design_coef[t.column] for est, _, t in static_found],
                [static_found[c][0].weather[static_found[c][1]].slope_kw_per_degc
                 for c in specs],
                np.asarray(main_est.design_coef)[-m_base:] if m_base else []]).astype(float)
        # Weather terms are tracked as (draw at balance, slope) and stated at the reference
        # temperature: column c, slope column, degrees beyond balance at that temperature.
        at_ref = [[c, k + s_i,
                   float(degrees(np.array([found[c][0].weather[found[c][1]].reference_temp_c]),
                                 *specs[c])[0])]
                  for s_i, c in enumerate(specs)]
        main_intervals = int(main_est.frame.height)
        # The reference fits (and their design arrays) are done with: a long series' tracked
        # design comes next.
        del fits, chosen, found, main_est
        static_found = None
        frame, X_level, y_level = _design(site, aligned, members, consume_hours)
        if consume_hours and aligned.hours.base is not None and np.shares_memory(
                X_level[:1], aligned.hours[:1]):
            aligned.hours = None  # its numbers are about to become the differences
        if X_level.shape[1] != len(w0):
            raise InputError(f"{site.path}: the reference fit has {len(w0)} columns but the "
                             f"tracked design {X_level.shape[1]}")
        if offset_kwh is not None:
            y_level -= offset_kwh
        last_row = _last_row(frame, X_level, y_level)
        X, y = differences(frame, X_level, y_level, None, in_place=True)
        del X_level, y_level  # now the differences
        row_day = (frame["start_utc"].dt.convert_time_zone(tz).dt.date().to_numpy()
                   .astype("datetime64[D]"))
        if offset_kwh is not None and m_base:
            # The declared profile's weights at the equilibrium of the main reference period
            # (what the offset leaves of the baseload), the loads' draws held at the reference.
            rows = np.flatnonzero((row_day >= np.datetime64(main[0]))
                                  & (row_day <= np.datetime64(main[1])))
            kb = X.shape[1] - m_base
            rest = y[rows] - X[rows, :kb] @ w0[:kb]
            w0[kb:] = np.linalg.lstsq(X[rows, kb:], rest, rcond=None)[0]
        d_offset = (None if offset_kwh is None else
                    differences(frame, np.zeros((len(offset_kwh), 0)), offset_kwh, None)[1])
        del offset_kwh
        memory = np.full(X.shape[1], memory_days * per_day)
        memory[k + len(specs):] = base_memory * per_day
        row_sets = []
        for w in sorted(set(windows[c] for c in ids) | {main}):
            cols = [j for j, c in enumerate(ids) if windows[c] == w]
            cols += [k + s_i for s_i, c in enumerate(specs) if windows[ids[c]] == w]
            if w == main:
                cols += list(range(k + len(specs), X.shape[1]))
            rows = np.flatnonzero((row_day >= np.datetime64(w[0]))
                                  & (row_day <= np.datetime64(w[1])))
            if cols:
                row_sets.append((rows, np.array(cols)))
        if step is None:
            total_rate = float(np.sum(1.0 / memory))
            mu = step_for_rates(total_rate)
            if not mu < MU_MAX:
                shortest = memory_days * mu / (0.999 * MU_MAX)
                raise ConfigError(f"--memory {memory_days:g}: this memory needs step size "
                                  f"mu = {mu:.3g}, outside the stable range 0 < mu < {MU_MAX:g} "
                                  "of normalized LMS; use a memory of at least "
                                  f"{math.ceil(shortest * 100) / 100:g} days")
        else:
            mu = step
        delta = PER_WEIGHT_DELTA
        # The loads' (and their weather slopes') memories are solved for; the baseload
        # levels keep the unnormalized start (their memory approximate).
        calibrate = np.arange(X.shape[1]) < k + len(specs)
        scales, tau_all = scales_for_memory(X, memory, mu, row_sets, delta, calibrate)
        tau_intervals = tau_all[:k]
        # Band: the steady-state standard deviation of each tracked weight from the
        # independence theory of LMS (track.weight_covariance), over its own reference
        # period, with the differenced residual's autocovariance at the reference draws up
        # to BAND_LAGS (differencing makes neighbouring residuals correlated); the coupling
        # with loads that switch together is included.
        # With the reference form's offset, the band still counts the baseload's shape
        # beyond the declared profile as noise (the residuals of the declared profile's
        # reference fit): the offset is the reference period's shape, and the shape of
        # later periods may differ from it where the declared columns cannot follow.
        resid = y - X @ w0 if d_offset is None else (y + d_offset) - X @ w0_static
        del d_offset
        sd = np.zeros(k)
        ls_factor = np.ones(k)
        for rows, cols in row_sets:
            if len(rows) <= BAND_LAGS:
                continue
            r_w = resid[rows]
            gamma = np.array([float(np.mean(r_w[lag:] * r_w[:len(r_w) - lag]))
                              for lag in range(BAND_LAGS + 1)])
            S = weight_covariance(X[rows], scales, mu, gamma, delta)
            for j in cols[cols < k]:
                # Residuals correlated beyond BAND_LAGS (slow noise, an undeclared weather
                # effect) widen the band by the ratio of the score's long-run variance over
                # a day to that over BAND_LAGS (Bartlett weights; Newey & West 1987).
                score = X[rows, j] * r_w
                wide = bartlett_lrv(score, int(per_day))
                narrow = bartlett_lrv(score, BAND_LAGS)
                inflate = math.sqrt(wide / narrow) if narrow > 0 and wide > narrow else 1.0
                sd[j] = inflate * math.sqrt(max(float(S[j, j]), 0.0))
                # The windowed check's least-squares variance sigma^2 (X'X)^-1 assumes
                # uncorrelated residuals: its correction for this load's score.
                x = X[rows, j]
                white = gamma[0] * float(np.mean(x * x))
                ls_factor[j] = inflate * (math.sqrt(max(narrow, 0.0) / white)
                                          if white > 0 else 1.0)
        reference_info = {"from": main[0].isoformat(), "to": main[1].isoformat(),
                          "intervals": main_intervals}
        windows_info = {c: [windows[c][0].isoformat(), windows[c][1].isoformat()] for c in ids}
        status = _status(site, aligned, ids, members, groups, no_reference, run_total, index)
        last_end = None
        first_alarm: dict[str, str] = {}
        tail: list[list[float]] = []
        stats_tail: list = []
        min_run_h = min_reference_run_h
    else:
        _check_state(state, site)
        ids, members, flags = state["ids"], state["members"], state["flags"]
        ref_kw, ref_se = np.array(state["reference_kw"]), np.array(state["reference_se_kw"])
        ref_run_h = np.array(state["reference_run_h"])
        w0, mu, delta = np.array(state["weights"]), state["mu"], state["delta"]
        scales = np.array(state["scales"])
        at_ref = state["weather_at_reference"]
        reference_info = state["reference"]
        windows_info = state["reference_per_equipment"]
        status = state["equipment"]
        groups = state["groups"]
        last_end = dt.datetime.fromisoformat(state["last_end_utc"])
        first_alarm = dict(state["first_alarm"])
        sd = np.array(state["sd_kw"])
        tau_intervals = np.array(state["tau_intervals"], dtype=float)
        tail = state["daily_tail"]
        min_run_h = float(state.get("min_reference_run_h", MIN_REFERENCE_RUN_H))
        ls_factor = np.array(state["ls_factor"], dtype=float)
        stats_tail = [_unpack_day(item, k_all=len(state["weights"]))
                      for item in state["day_stats_tail"]]
        # States saved before the reference forms were recorded have none.
        reference_forms = state.get("reference_forms", [])
        form_check = state.get("reference_form_check", {})
        k = len(ids)
        later = (aligned.frame["start_utc"] >= last_end).to_numpy()
        aligned = dataclasses.replace(aligned, use=aligned.use & later)
        if not aligned.use.any():
            raise InputError(f"{site.meter.file}: no usable interval after the saved state's "
                             f"last one ({state['last_end_utc']})")
        offset = state.get("baseload_offset")
        offset_kwh = _offset_kwh(site, aligned, offset)
        frame, X_level, y_level = _design(site, aligned, members)
        if X_level.shape[1] != len(w0):
            raise InputError(f"{site.path}: the saved state has {len(w0)} tracked columns but "
                             f"this site's baseload profile gives {X_level.shape[1]}; start "
                             "without --state")
        if offset_kwh is not None:
            y_level -= offset_kwh
        del offset_kwh
        last_row = _last_row(frame, X_level, y_level)
        X, y = differences(frame, X_level, y_level, state["last_row"], in_place=True)
        del X_level, y_level  # now the differences

    day = frame["start_utc"].dt.convert_time_zone(tz).dt.date()
    last_of_day = np.flatnonzero(np.r_[(day[1:] != day[:-1]).to_numpy(), True])
    days = day.gather(last_of_day).to_list()
    # Only each day's last weights are used (and the very last, for the state): W is
    # (days, p), not (intervals, p).
    W = nlms(X, y, w0, mu, delta, scales, rows=last_of_day)
    daily = W[:, :k].copy()
    for c, s_col, d_ref in at_ref:
        daily[:, int(c)] += W[:, int(s_col)] * d_ref
    tau_days = tau_intervals / per_day
    lag_days = [max(1, int(round(t))) if np.isfinite(t) else 1 for t in tau_days]
    n_tail = max(lag_days, default=1) + 1
    if state is None:
        # The series starts with the start value (the reference draws), so that the first
        # days get a lag-free level too (track.recent_levels).
        start = np.array(w0[:k], dtype=float)
        for c, s_col, d_ref in at_ref:
            start[int(c)] += w0[int(s_col)] * d_ref
        past = start[None, :]
    else:
        past = np.array(tail, dtype=float).reshape(-1, k)
    series = np.vstack([past, daily])
    recent = np.empty_like(daily)
    factor = np.empty_like(daily)
    for j in range(k):
        recent[:, j], factor[:, j] = recent_levels(series[:, j], len(past), tau_days[j],
                                                   lag_days[j])
    # The alarm reads the recent level (the mean draw of the last memory-length, the
    # tracker's lag taken out): it follows a step fully within one memory. It and the
    # reference are both uncertain.
    sd_recent_all = sd[None, :] * factor
    sd_alarm = np.sqrt(sd_recent_all**2 + ref_se[None, :] ** 2)
    day_start = np.r_[0, last_of_day[:-1] + 1]
    # X'X made exactly symmetric, so that the state's upper triangle restores it bit for bit.
    day_stats = [(_symmetric(X[a:b].T @ X[a:b]), X[a:b].T @ y[a:b], float(y[a:b] @ y[a:b]),
                  int(np.count_nonzero(np.any(X[a:b] != 0, axis=1))))
                 for a, b in zip(day_start, last_of_day + 1)]
    window = _WindowCheck(stats_tail + day_stats, k, at_ref, ref_kw, ref_se, ls_factor,
                          threshold, [chart_limit(t) for t in tau_days])
    rows = []
    alarms = []
    for j, eq in enumerate(ids):
        why = _not_alarmed(flags[j], ref_run_h[j], min_run_h)
        if why is None:
            alarm = ewma_alarms(recent[:, j], ref_kw[j], sd_alarm[:, j], threshold,
                                chart_limit(tau_days[j]))
            # A level over only a few days rests on a handful of switchings: its error is far
            # from normal, so it is not alarmed on before MIN_RECENT_DAYS.
            alarm &= (len(past) + np.arange(len(days))) >= min(MIN_RECENT_DAYS, lag_days[j])
            for d_i in np.flatnonzero(alarm):
                alarm[d_i] = window.confirms(j, len(stats_tail) + d_i, lag_days[j])
        else:
            alarm = np.zeros(len(days), dtype=bool)
        if alarm.any() and eq not in first_alarm:
            first_alarm[eq] = days[int(np.argmax(alarm))].isoformat()
        for d_i, d in enumerate(days):
            kw = float(daily[d_i, j])
            lvl = float(recent[d_i, j])
            c_low = c_high = None
            if ref_kw[j] > 0 and math.isfinite(lvl):
                c_low, c_high = _change_interval(lvl, float(sd_recent_all[d_i, j]), ref_kw[j],
                                                 ref_se[j], z)
            rows.append({"date": d, "equipment": eq, "kw_tracked": kw,
                         "kw_low": kw - z * sd[j], "kw_high": kw + z * sd[j],
                         "kw_reference": float(ref_kw[j]),
                         "change": kw / ref_kw[j] - 1.0 if ref_kw[j] else None,
                         "alarm": bool(alarm[d_i]),
                         "kw_recent": lvl if math.isfinite(lvl) else None,
                         "change_low": c_low, "change_high": c_high})
        if why is not None:
            notes.append(f"{eq}: tracked but not alarmed ({why})")
    for eq, first_date in first_alarm.items():
        j = ids.index(eq)
        kw = float(daily[-1, j])
        lvl = float(recent[-1, j])
        sd_recent = float(sd_recent_all[-1, j])
        low, high = _change_interval(lvl, sd_recent, ref_kw[j], ref_se[j], z)
        alarms.append(DriftAlarm(
            equipment=eq, members=members[j], first_alarm_date=first_date,
            kw_reference=float(ref_kw[j]), kw_latest=kw, kw_recent=lvl,
            change=lvl / ref_kw[j] - 1.0, change_low=low, change_high=high,
            change_tracked=kw / ref_kw[j] - 1.0,
            recent_days=min(lag_days[j], len(series) - 1), as_of=days[-1].isoformat()))
    span_days = (days[-1] - days[0]).days + 1
    memory_used = {eq: float(tau_days[j]) if np.isfinite(tau_days[j]) else None
                   for j, eq in enumerate(ids)}
    if state is None and step is None and memory_days > span_days / 3:
        notes.append(f"the memory of {memory_days:g} days is over a third of the {span_days} days "
                     "of data: the tracker cannot follow a change within this data; use a "
                     "shorter --memory")
    if state is None and step is None:
        for j, eq in enumerate(ids):
            if np.isfinite(tau_days[j]) and tau_days[j] > 1.25 * memory_days:
                notes.append(f"{eq} runs too seldom to follow changes within {memory_days:g} "
                             f"days beside the other loads: its memory is {tau_days[j]:.0f} days")
    for eq in ids:
        if form_check.get(eq, {}).get("uncertain"):
            notes.append(f"{eq}: {form_check[eq]['reason']}")
    for row in status:
        if row["status"] != "tracked":
            notes.append(f"{row['equipment']}: {row['detail']}"
                         + (" (as of the run that started the saved state; run without "
                            "--state to give it a reference from the data now at hand)"
                            if state is not None and row["status"] in ("not run", "no reference")
                            else ""))
    table = pl.DataFrame(rows, schema={"date": pl.Date, "equipment": pl.String,
                                       "kw_tracked": pl.Float64, "kw_low": pl.Float64,
                                       "kw_high": pl.Float64, "kw_reference": pl.Float64,
                                       "change": pl.Float64, "alarm": pl.Boolean,
                                       "kw_recent": pl.Float64, "change_low": pl.Float64,
                                       "change_high": pl.Float64})
    summary = DriftSummary(
        site=site.name,
        step_size_mu=mu,
        stable_range=(f"0 < mu < {MU_MAX:g} (normalized LMS; Haykin, Adaptive Filter "
                      "Theory; it holds for the per-weight form, which is normalized LMS "
                      "on inputs rescaled by the square roots of the per-weight scales)"),
        memory_days_requested=None if step is not None or state is not None else memory_days,
        memory_days_per_equipment=memory_used,
        reference=reference_info,
        reference_per_equipment=windows_info,
        groups=[group_id(g) for g in groups],
        equipment=status,
        threshold=threshold,
        rule=("alarm when |recent level - reference| exceeds both L standard deviations "
              "(of the recent level, the mean draw of the last memory-length with the "
              "tracker's lag taken out, and of the reference together; an EWMA control "
              "chart, Roberts 1959, read without its lag; "
              f"L = Phi^-1(1 - {FALSE_ALARM_PER_LOAD_YEAR:g} / (2 x 365 / memory)), at least "
              f"{EWMA_L:g}, for about {100 * FALSE_ALARM_PER_LOAD_YEAR:g} % false alarms per load "
              "and year) and threshold x reference"),
        chart_limit_L={eq: chart_limit(tau_days[j]) for j, eq in enumerate(ids)},
        change_interval=("change: the mean draw of the last recent_days days (the tracker's "
                         "lag taken out, track.recent_level) over the reference draw, minus "
                         "1; its interval carries that level's and the reference's standard "
                         "errors (delta method)"),
        band_sd_kw={eq: float(sd[j]) for j, eq in enumerate(ids)},
        alarms=alarms,
        notes=notes,
        caution=CAUTION,
        reference_forms=reference_forms,
        reference_form_check=form_check,
    )
    new_state = {
        "version": STATE_VERSION, "site": site.name, "timezone": tz,
        "baseload_profile": site.baseload.profile,
        "ids": ids, "members": members, "flags": flags, "groups": groups,
        "reference": reference_info, "reference_per_equipment": windows_info,
        "equipment": status,
        "reference_kw": ref_kw.tolist(),
        "reference_se_kw": ref_se.tolist(), "reference_run_h": ref_run_h.tolist(),
        "weights": W[-1].tolist(), "mu": mu, "delta": delta, "scales": scales.tolist(),
        "weather_at_reference": at_ref,
        "sd_kw": sd.tolist(), "tau_intervals": tau_intervals.tolist(),
        "last_end_utc": frame["end_utc"].max().isoformat(),
        "first_alarm": first_alarm,
        "daily_tail": series[-n_tail:].tolist(),
        "ls_factor": ls_factor.tolist(),
        "min_reference_run_h": min_run_h,
        "day_stats_tail": [_pack_day(*item) for item in (stats_tail + day_stats)[-n_tail:]],
        "last_row": last_row,
        "reference_forms": reference_forms,
        "reference_form_check": form_check,
        "baseload_offset": offset,
    }
    return DriftResult(table, summary, new_state)


def _symmetric(S: np.ndarray) -> np.ndarray:
    upper = np.triu(S)
    return upper + np.triu(upper, 1).T


def _pack_day(S: np.ndarray, b: np.ndarray, c: float, n: int) -> list:
    """One day's sums for the state file: X'X's upper triangle and X'y as base64 of their
    float64 bytes (exact, and about a third of the size of decimal text)."""
    upper = S[np.triu_indices(len(S))]
    return [base64.b64encode(np.ascontiguousarray(upper, "<f8").tobytes()).decode("ascii"),
            base64.b64encode(np.ascontiguousarray(b, "<f8").tobytes()).decode("ascii"),
            float(c), int(n)]


def _unpack_day(item: list, k_all: int) -> tuple:
    """_pack_day's inverse for a design of k_all columns."""
    upper = np.frombuffer(base64.b64decode(item[0]), "<f8")
    b = np.frombuffer(base64.b64decode(item[1]), "<f8").copy()
    if len(upper) != k_all * (k_all + 1) // 2 or len(b) != k_all:
        raise InputError("the --state file's daily sums do not fit its tracked columns; "
                         "start without --state")
    S = np.zeros((k_all, k_all))
    S[np.triu_indices(k_all)] = upper
    S = S + np.triu(S, 1).T
    return S, b, float(item[2]), int(item[3])


class _WindowCheck:
    """The windowed least-squares check of an alarm.

    The tracker's transient can put part of one load's change on another that switches
    with it; a least-squares fit of the same differenced rows over the alarm's window (the
    last memory-length of days) solves the attribution exactly. An alarm stands only where
    that fit's draw, too, is beyond the threshold and beyond L standard deviations of it
    and the reference together (sigma^2 (X'X)^+ with the load's correction for correlated
    residuals). Days' sums X'X, X'y, y'y are kept, so a continued run checks the same
    windows.
    """

    def __init__(self, stats, k, at_ref, ref_kw, ref_se, factor, threshold, limits):
        self.stats, self.k, self.at_ref = stats, k, at_ref
        self.ref_kw, self.ref_se, self.factor = ref_kw, ref_se, factor
        self.threshold, self.limits = threshold, limits
        self.cache: dict = {}

    def _fit(self, i: int, lag: int):
        key = (i, lag)
        if key not in self.cache:
            part = self.stats[max(0, i - lag + 1):i + 1]
            S = sum(p[0] for p in part)
            b = sum(p[1] for p in part)
            c = sum(p[2] for p in part)
            n = sum(p[3] for p in part)
            P = pinvh(S)
            w = P @ b
            rank = int(np.linalg.matrix_rank(S))
            rss = max(c - 2.0 * w @ b + w @ S @ w, 0.0)
            s2 = rss / (n - rank) if n > rank + 10 else np.inf
            self.cache[key] = (w, P, s2)
        return self.cache[key]

    def confirms(self, j: int, i: int, lag: int) -> bool:
        w, P, s2 = self._fit(i, lag)
        a = np.zeros(len(w))
        a[j] = 1.0
        for c, s_col, d_ref in self.at_ref:
            if int(c) == j:
                a[int(s_col)] = d_ref
        value = float(a @ w)
        var = s2 * float(a @ P @ a) * self.factor[j] ** 2
        if not np.isfinite(var):
            return False
        dev = abs(value - self.ref_kw[j])
        return bool(dev > self.threshold * abs(self.ref_kw[j])
                    and dev > self.limits[j] * math.sqrt(var + self.ref_se[j] ** 2))


def _change_interval(level: float, sd_level: float, ref: float, ref_se: float,
                     z: float) -> tuple[float, float]:
    """Interval of level / ref - 1 with both uncertain (delta method for a ratio)."""
    change = level / ref - 1.0
    half = z * math.hypot(sd_level, (level / ref) * ref_se) / ref
    return change - half, change + half


def _status(site, aligned, ids, members, groups, no_reference, run_total,
            index) -> list[dict]:
    """One row per configured equipment: tracked, covered by a group, or why not tracked."""
    rows = []
    tracked = dict(zip(ids, members))
    member_of = {m: group_id(g) for g in groups for m in g}
    for e in site.equipment:
        gid = member_of.get(e.id)
        if gid is not None:
            if gid in tracked:
                rows.append({"equipment": e.id, "status": "covered by group", "tracked_as": gid,
                             "detail": (f"covered by the group {gid}: its members run together "
                                        "and the data cannot tell them apart; the group's "
                                        "combined draw is tracked and alarmed")})
            else:
                rows.append({"equipment": e.id, "status": "no reference", "tracked_as": gid,
                             "detail": (f"in the group {gid}, "
                                        f"{no_reference.get(gid, 'not tracked')}")})
            continue
        if e.id in tracked:
            rows.append({"equipment": e.id, "status": "tracked", "tracked_as": e.id,
                         "detail": "tracked"})
        elif e.id not in index or run_total[index[e.id]] <= 0:
            rows.append({"equipment": e.id, "status": "not run", "tracked_as": None,
                         "detail": "did not run in the data: not tracked"})
        else:
            rows.append({"equipment": e.id, "status": "no reference", "tracked_as": None,
                         "detail": no_reference.get(e.id, "not tracked")})
    return rows


def _not_alarmed(flags: list[str], run_h: float,
                 min_run_h: float = MIN_REFERENCE_RUN_H) -> str | None:
    for f in flags:
        if any(f.startswith(p) for p in NOT_ALARMED_FLAGS):
            return f"its reference draw is {f}: the data cannot pin it down"
    if run_h < min_run_h:
        return f"only {run_h:.0f} run-hours in its reference period, under {min_run_h:g}"
    return None


def _check_state(state: dict, site) -> None:
    needed = {"version", "ids", "members", "weights", "mu", "delta", "last_end_utc",
              "reference_kw", "reference_se_kw", "reference_run_h", "sd_kw", "first_alarm",
              "reference", "flags", "tau_intervals", "weather_at_reference", "scales",
              "reference_per_equipment", "equipment", "groups", "daily_tail", "last_row",
              "ls_factor", "day_stats_tail"}
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
