"""The one design builder: the intervals used, their baseload columns for any form, weather
columns and the full design rows (term hours [h], weather slope columns [h degC], baseload
columns [h]). estimate_draws (breakdown and compare) and drift build their designs here;
the clock test, the inseparable groups and check take the declared profile's columns from
BaseloadBuilder.declared: every baseload column is made here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import polars as pl

from disagg.fit.align import (
    NS_PER_H,
    Aligned,
    baseload_columns,
    edge_columns,
    frame_arrays,
    frame_baseload,
    hours_buffer,
)
from disagg.fit.select import Form, kept_columns
from disagg.fit.solvers import Indicators
from disagg.fit.wander import Spacing, smooth_level
from disagg.inputs.config import BaseloadSettings, SiteConfig

# Intervals shorter than this [h] give the hour-of-week profile its within-hour slopes
# (BaseloadBuilder.within_hour_slopes); hourly data have no within-hour shape to fit.
WITHIN_HOUR_MAX_H = 1.0
SLOPE_PREFIX = "baseload_slope_h"


def degrees(temp_c: np.ndarray, mode: str, balance_c: float) -> np.ndarray:
    """Degrees beyond the balance temperature: (T - Tb)+ for cooling, (Tb - T)+ for heating.

    References:
        Kissock, J. K., Haberl, J. S. & Claridge, D. E. (2003). Inverse modeling toolkit:
        numerical algorithms (ASHRAE RP-1050). ASHRAE Transactions 109(2) (three-parameter
        change-point forms; citation from memory).
    """
    d = temp_c - balance_c if mode == "cooling" else balance_c - temp_c
    return np.maximum(d, 0.0)


def weather_specs(site: SiteConfig, term_members: list[list[str]]) -> dict[int, tuple[str, float]]:
    """Term index -> (mode, balance temperature [degC]) for terms with a weather-dependent
    member (a combined group takes its first such member's setting)."""
    by_id = {e.id: e for e in site.equipment}
    out = {}
    for c, members in enumerate(term_members):
        for m in members:
            e = by_id[m]
            if e.weather:
                out[c] = (e.weather, float(e.balance_temp_c))
                break
    return out


def weather_columns(H: np.ndarray, temp_c: np.ndarray | None,
                    specs: dict[int, tuple[str, float]]) -> np.ndarray:
    """Hours x degrees beyond balance for each weather term, in term order [h degC]."""
    if not specs:
        return np.zeros((H.shape[0], 0))
    return np.column_stack([H[:, c] * degrees(temp_c, mode, bal) for c, (mode, bal) in specs.items()])


def _local_days(local_date: np.ndarray) -> np.ndarray:
    """Consecutive integer label (1, 2, ...) of each row's local calendar day (as days since
    1970-01-01)."""
    return np.unique(local_date, return_inverse=True)[1].reshape(-1).astype(np.int64) + 1


@dataclass
class Rows:
    """The intervals used (aligned.use) and their arrays.

    y: metered energy [kWh]; interval_h: interval length [h]; start_ns, end_ns: edges [ns,
    UTC]; local_date: local date (days since 1970-01-01); hour_of_week, minute_of_day, month:
    as in
    align.frame_arrays; days: consecutive local-day labels 1, 2, ...; sp: the time spacing of
    the rows (disagg.fit.wander).
    """

    aligned: Aligned
    tz: str
    frame: pl.DataFrame
    everything: bool
    y: np.ndarray
    interval_h: np.ndarray
    start_ns: np.ndarray
    end_ns: np.ndarray
    local_date: np.ndarray
    hour_of_week: np.ndarray
    minute_of_day: np.ndarray
    month: np.ndarray
    days: np.ndarray
    sp: Spacing

    @property
    def n(self) -> int:
        return self.frame.height

    @property
    def hours(self) -> np.ndarray:
        """(n, equipment) run-hours of the rows used [h] (read only: no copy when every row
        is used)."""
        a = self.aligned
        return a.hours if self.everything else a.hours[a.use]

    @property
    def temp_c(self) -> np.ndarray | None:
        a = self.aligned
        return a.temp_c[a.use] if a.temp_c is not None else None


def rows_of(aligned: Aligned, tz: str) -> Rows:
    """The used rows of aligned; the whole-frame arrays are computed once
    (align.frame_arrays), a month's fit takes its rows."""
    use = aligned.use
    everything = bool(use.all())
    frame = aligned.frame if everything else aligned.frame.filter(pl.Series(use))
    arrays = {k: v if everything else v[use] for k, v in frame_arrays(aligned, tz).items()}
    start_ns, end_ns = arrays["start_ns"], arrays["end_ns"]
    return Rows(aligned=aligned, tz=tz, frame=frame, everything=everything,
                y=frame["energy_kwh"].to_numpy().astype(float),
                interval_h=frame["interval_h"].to_numpy(), start_ns=start_ns, end_ns=end_ns,
                local_date=arrays["local_date"], hour_of_week=arrays["hour_of_week"],
                minute_of_day=arrays["minute_of_day"],
                month=arrays["month"], days=_local_days(arrays["local_date"]),
                sp=Spacing.from_ns(start_ns, end_ns))


def _profile_columns(settings: BaseloadSettings, aligned: Aligned, tz: str, everything: bool,
                     frame: pl.DataFrame | None = None, start_ns: np.ndarray | None = None,
                     end_ns: np.ndarray | None = None, how: np.ndarray | None = None,
                     sel: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
    """A profile's own columns [h] over the used rows (frame, start_ns, end_ns, how: theirs;
    needed for hour-of-week only), or a boolean selection of them."""
    if settings.profile == "hour-of-week":
        if sel is None:
            return baseload_columns(settings, tz, frame["start_utc"], start_ns, end_ns, how=how)
        return baseload_columns(settings, tz, frame["start_utc"].filter(pl.Series(sel)),
                                start_ns[sel], end_ns[sel], how=how[sel])
    cols, names = frame_baseload(aligned, settings, tz)
    cols = cols if everything else cols[aligned.use]
    return (cols if sel is None else cols[sel]), names


@dataclass
class BaseloadBuilder:
    """The baseload columns [h] of any profile over the rows used (or a boolean selection of
    them): the declared profile with its closures; another profile with the declared closures
    as an extra column (it must nest the declared one); "-edges" forms with the columns of
    the declared spells' edges (align.edge_columns)."""

    site: SiteConfig
    rows: Rows

    def _settings_cols(self, settings: BaseloadSettings,
                       sel: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
        r = self.rows
        return _profile_columns(settings, r.aligned, r.tz, r.everything, r.frame, r.start_ns,
                                r.end_ns, r.hour_of_week, sel)

    def declared_columns(self, sel: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
        """The declared profile's own columns [h] and their names: its levels with its
        closures (hour-of-week: 168 levels, and 24 for closed days when closures are declared),
        no within-hour slopes and no edges. What the clock test, the inseparable groups and
        check's inseparability use (columns(profile) adds the within-hour slopes for the
        fits). Constant and occupied columns are the frame's, computed once per frame
        (align.frame_baseload) and read only."""
        return self._settings_cols(self.site.baseload, sel)

    @staticmethod
    def declared(site: SiteConfig, aligned: Aligned) -> tuple[np.ndarray, list[str]]:
        """BaseloadBuilder(site, rows_of(aligned, tz)).declared_columns(), the same numbers,
        without making the rest of Rows (the energy, day labels and time spacing that the
        fits need: on a long 1-minute series tens of MB that raised drift's peak memory)."""
        tz = site.timezone
        use = aligned.use
        everything = bool(use.all())
        if site.baseload.profile != "hour-of-week":
            return _profile_columns(site.baseload, aligned, tz, everything)
        a = frame_arrays(aligned, tz)
        frame = aligned.frame if everything else aligned.frame.filter(pl.Series(use))
        start_ns, end_ns, how = ((a[k] if everything else a[k][use])
                                 for k in ("start_ns", "end_ns", "hour_of_week"))
        return _profile_columns(site.baseload, aligned, tz, everything, frame, start_ns, end_ns,
                                how)

    def closure_column(self, sel: np.ndarray | None = None) -> np.ndarray:
        """The spell hours that the declared closure calendar removes [h]."""
        base = self.site.baseload
        full, _ = self._settings_cols(BaseloadSettings("occupied", base.spells), sel)
        shut, _ = self._settings_cols(base, sel)
        return full[:, 0] - shut[:, 0]

    def columns(self, profile: str, sel: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
        """The baseload columns of a profile [h] and their names."""
        base = self.site.baseload
        r = self.rows
        if profile.endswith("-edges"):
            cols, names = self.columns(profile[:-len("-edges")], sel)
            rows = slice(None) if sel is None else sel
            starts = r.frame["start_utc"] if sel is None else r.frame["start_utc"].filter(
                pl.Series(sel))
            more, more_names = edge_columns(base, r.tz, starts,
                                            (r.end_ns[rows] - r.start_ns[rows]) / NS_PER_H,
                                            hourly=profile.startswith("hour-of-week"))
            return np.column_stack([cols, more]), names + more_names
        if profile == base.profile:
            cols, names = self._settings_cols(base, sel)
        else:
            cols, names = self._settings_cols(BaseloadSettings(profile, base.spells,
                                                               base.spell_text), sel)
            if base.closed and base.spells:
                cols = np.column_stack([cols, self.closure_column(sel)])
                names = names + ["baseload_closed_kw"]
        if profile == "hour-of-week":
            more, more_names = self.within_hour_slopes(sel)
            if more.shape[1]:
                cols, names = np.column_stack([cols, more]), names + more_names
        return cols, names

    def within_hour_slopes(self, sel: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
        """The hour-of-week profile's slope within the clock hour, one column per local hour
        of the day [h x h]: the interval's length times its midpoint's offset from the middle
        of its clock hour (the coefficient is kW per hour). None for hourly or longer data.

        Why: hourly levels leave a smooth daily swing's within-hour rise as a sawtooth, and a
        variable-speed load whose speed follows the same daily shape took part of it (the
        office's VF-1, +1.1 % on average in the swing scenario; bench/RESULTS_baseload.md).
        Each column sums to zero over a whole hour of equal intervals, so the hourly levels
        keep their meaning."""
        r = self.rows
        ih = (r.end_ns - r.start_ns) / NS_PER_H
        if sel is not None:
            ih = ih[sel]
        if ih.size == 0 or float(np.median(ih)) >= WITHIN_HOUR_MAX_H:
            return np.zeros((ih.size, 0)), []
        starts = r.frame["start_utc"] if sel is None else r.frame["start_utc"].filter(
            pl.Series(sel))
        local = starts.dt.convert_time_zone(r.tz).dt.replace_time_zone(None)  # wall clock
        hour = local.dt.hour().to_numpy().astype(np.int64)
        offset = (local.dt.minute().to_numpy() / 60.0 + ih / 2.0) - 0.5
        cols = np.zeros((ih.size, 24))
        cols[np.arange(ih.size), hour] = offset * ih
        return cols, [f"{SLOPE_PREFIX}{h:02d}_kw_per_h" for h in range(24)]

    def hour_of_week_sparse(self) -> tuple[np.ndarray, list[str], Indicators]:
        """The hour-of-week profile stored sparsely: the dense closure column (when closures
        are declared) and within-hour slopes with their names, and the 168 hour-of-week
        columns by row (solvers.Indicators)."""
        r = self.rows
        ind = Indicators(r.hour_of_week, (r.end_ns - r.start_ns) / NS_PER_H, 168)
        base = self.site.baseload
        dense, names = self.within_hour_slopes()
        if base.closed and base.spells:
            dense = np.column_stack([self.closure_column()[:, None], dense])
            names = ["baseload_closed_kw"] + names
        return dense, names, ind

    def hour_of_week_blocks(self):
        """hour_of_week_sparse with its dense columns made for any block of rows instead of
        held whole (a long series: the within-hour slopes are n x 24 numbers): (a function
        of (lo, hi) giving rows lo..hi of the dense columns, their names, the Indicators).
        The same numbers as hour_of_week_sparse's columns."""
        r = self.rows
        ind = Indicators(r.hour_of_week, (r.end_ns - r.start_ns) / NS_PER_H, 168)
        base = self.site.baseload
        closure = self.closure_column() if base.closed and base.spells else None
        ih = (r.end_ns - r.start_ns) / NS_PER_H
        slopes = ih.size > 0 and float(np.median(ih)) < WITHIN_HOUR_MAX_H
        names = ([] if closure is None else ["baseload_closed_kw"]) + (
            [f"{SLOPE_PREFIX}{h:02d}_kw_per_h" for h in range(24)] if slopes else [])
        hour = value = None
        if slopes:  # within_hour_slopes' one nonzero of each row
            local = r.frame["start_utc"].dt.convert_time_zone(r.tz).dt.replace_time_zone(None)
            hour = local.dt.hour().to_numpy().astype(np.int64)
            value = ((local.dt.minute().to_numpy() / 60.0 + ih / 2.0) - 0.5) * ih
        width = len(names)

        def dense(lo: int, hi: int) -> np.ndarray:
            out = np.zeros((hi - lo, width))
            if closure is not None:
                out[:, 0] = closure[lo:hi]
            if slopes:
                first = 0 if closure is None else 1
                out[np.arange(hi - lo), first + hour[lo:hi]] = value[lo:hi]
            return out

        return dense, names, ind

    def for_form(self, form: Form) -> tuple[np.ndarray, list[str]]:
        """The columns of a form: with the level, without the profile's constant direction
        (select.kept_columns)."""
        B, names = self.columns(form.profile)
        if form.level:
            keep = kept_columns(form.profile, B.shape[1])
            B, names = B[:, keep], [names[i] for i in keep]
        return B, names


def signed_columns(names: list[str]) -> np.ndarray:
    """Which baseload columns may take either sign (the within-hour slopes); the others are
    kW levels, non-negative in a static fit."""
    return np.array([n.startswith(SLOPE_PREFIX) for n in names], dtype=bool)


def term_hours(H: np.ndarray, index: dict[str, int], members: list[str]) -> np.ndarray:
    """A term's run-hours [h]: the load's own, or the mean of a combined group's members."""
    if len(members) == 1:
        return H[:, index[members[0]]]
    return H[:, [index[m] for m in members]].mean(axis=1)


def design_matrix(Hcols: list[np.ndarray], temp_c: np.ndarray | None,
                  specs: dict[int, tuple[str, float]], B: np.ndarray,
                  into: np.ndarray | None = None) -> np.ndarray:
    """The design, built once: each term's hours, then each weather term's hours x degrees
    beyond its balance temperature (slope columns, ASHRAE change-point form), then the
    baseload columns. Slices of it are views (a site-year of 1-minute data: ~200 MB per copy
    saved). into: an array of the design's shape to write it in (align.hours_buffer: its
    first columns are the term hours already)."""
    k = len(Hcols)
    n = B.shape[0]
    kx = k + len(specs)
    shape = (n, kx + B.shape[1])
    X = into if into is not None and into.shape == shape else np.empty(shape)
    for c in range(k):
        h = Hcols[c]
        if not (h.__array_interface__["data"][0] == X[:, c].__array_interface__["data"][0]
                and h.strides == X[:, c].strides):  # not already there (into)
            X[:, c] = h
    X[:, k:kx] = weather_columns(X[:, :k], temp_c, specs)
    X[:, kx:] = B
    return X


@dataclass
class Design:
    """One design for every caller (breakdown, drift, compare): the used intervals, their
    design rows in the order estimate_draws uses (term hours [h], weather slope columns
    [h degC], baseload columns [h]) and energy [kWh].

    form: the baseload form; with the level, the baseload columns are the profile's without
    its constant direction (select.kept_columns) and the level is not in X (baseload_level).
    """

    frame: pl.DataFrame
    X: np.ndarray
    y: np.ndarray
    term_members: list[list[str]]
    n_weather: int
    base_names: list[str]
    form: Form


def design(site: SiteConfig, aligned: Aligned, term_members: list[list[str]],
           form: Form | None = None, consume_hours: bool = False) -> Design:
    """The design of the intervals aligned.use for the given terms (each a list of equipment
    ids whose hours are averaged, as a combined row) and baseload form (default: the
    declared profile without the level): the columns estimate_draws fits.

    consume_hours: the design may be written in place of aligned.hours (align.hours_buffer)
    when it can; the caller must then treat aligned.hours as gone once it changes the
    design (drift differences it in place and drops them)."""
    form = form or Form(site.baseload.profile, level=False)
    rows = rows_of(aligned, site.timezone)
    index = {e: j for j, e in enumerate(aligned.equipment_ids)}
    H = rows.hours
    specs = weather_specs(site, term_members)
    B, names = BaseloadBuilder(site, rows).for_form(form)
    into = (hours_buffer(aligned, term_members, len(term_members) + len(specs) + B.shape[1])
            if consume_hours else None)
    X = design_matrix([term_hours(H, index, m) for m in term_members], rows.temp_c, specs, B,
                      into=into)
    return Design(rows.frame, X, rows.y, term_members, len(specs), names, form)


def baseload_level(d: Design, coef: np.ndarray) -> np.ndarray:
    """The wandering level's energy in each interval [kWh] given the design's coefficients
    (zero without the level): the smoother's mean of the residual kW (disagg.fit.wander)."""
    if not d.form.level:
        return np.zeros(len(d.y))
    start_ns = d.frame["start_utc"].dt.epoch("ns").to_numpy()
    end_ns = d.frame["end_utc"].dt.epoch("ns").to_numpy()
    sp = Spacing.from_ns(start_ns, end_ns)
    return smooth_level((d.y - d.X @ coef) / sp.h, sp, d.form.q) * sp.h
