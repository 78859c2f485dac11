"""Run logs -> equipment-hours in every meter interval, by exact overlap.

A state is piecewise constant in time. The equipment-hours of interval [a, b) are the
integral of status ** exponent over [a, b): an event at 10:07:30 splits the 10:00-10:15
interval exactly. Time that no segment covers is unknown, and an interval with any unknown
time for any equipment is left out of the fit (and counted).
"""

from __future__ import annotations

import datetime as dt
import zoneinfo
from dataclasses import dataclass, field

import numpy as np
import polars as pl

from disagg.inputs.config import BaseloadSettings, SiteConfig, Spell
from disagg.inputs.readers import MeterData, RunLog, Segments

NS_PER_H = 3_600_000_000_000
# An interval whose midpoint is further than this from every temperature reading has no
# known temperature [h] (common practice, no source: hourly weather data with a gap or two).
MAX_WEATHER_GAP_H = 3.0
# Unknown time shorter than this is float noise, not a gap [h] (about 4 microseconds).
_UNKNOWN_TOL_H = 1e-9


def _cumulative(seg: Segments, t_ns: np.ndarray, exponent: float) -> tuple[np.ndarray, np.ndarray]:
    """Integral of status**exponent and of coverage from -inf to each time in t_ns [h]."""
    n = len(seg.start_ns)
    if n == 0:
        zero = np.zeros(len(t_ns))
        return zero, zero.copy()
    dur_ns = seg.end_ns - seg.start_ns
    weight = np.power(seg.value, exponent) if exponent != 1.0 else seg.value
    dur_h = dur_ns / NS_PER_H
    cum_val = np.concatenate(([0.0], np.cumsum(weight * dur_h)))
    cum_cov = np.concatenate(([0.0], np.cumsum(dur_h)))
    idx = np.searchsorted(seg.start_ns, t_ns, side="right") - 1
    inside = idx >= 0
    j = np.where(inside, idx, 0)
    part_h = np.clip(t_ns - seg.start_ns[j], 0, dur_ns[j]) / NS_PER_H
    val = np.where(inside, cum_val[j] + weight[j] * part_h, 0.0)
    cov = np.where(inside, cum_cov[j] + part_h, 0.0)
    return val, cov


def overlap_hours(seg: Segments, start_ns: np.ndarray, end_ns: np.ndarray,
                  exponent: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """Equipment-hours and unknown hours in each interval [start, end).

    Args:
        seg: sorted, disjoint state segments of one piece of equipment.
        start_ns, end_ns: interval edges, shape (n,) [ns since epoch, UTC].
        exponent: power-vs-output exponent; the integrand is status ** exponent.

    Returns:
        (run_h, unknown_h), each shape (n,) [h].
    """
    if len(start_ns) > 1 and np.array_equal(start_ns[1:], end_ns[:-1]):
        # Back-to-back intervals (the usual meter): each edge is evaluated once.
        v, c = _cumulative(seg, np.concatenate([start_ns, end_ns[-1:]]), exponent)
        v0, v1, c0, c1 = v[:-1], v[1:], c[:-1], c[1:]
    else:
        v1, c1 = _cumulative(seg, end_ns, exponent)
        v0, c0 = _cumulative(seg, start_ns, exponent)
    length_h = (end_ns - start_ns) / NS_PER_H
    return v1 - v0, np.maximum(length_h - (c1 - c0), 0.0)


def interval_temperature(weather: pl.DataFrame, start_ns: np.ndarray,
                         end_ns: np.ndarray) -> np.ndarray:
    """Outdoor temperature at each interval's midpoint by linear interpolation [degC].

    NaN where the midpoint is further than MAX_WEATHER_GAP_H from the nearest reading
    (before the first or after the last reading, the nearest reading's value holds).
    """
    t = weather["t"].dt.epoch("ns").to_numpy().astype(np.int64)
    v = weather["temp_c"].to_numpy().astype(float)
    mid = start_ns + (end_ns - start_ns) // 2
    if len(t) == 0:
        return np.full(len(mid), np.nan)
    out = np.interp(mid.astype(float), t.astype(float), v)
    j = np.searchsorted(t, mid)
    left = t[np.clip(j - 1, 0, len(t) - 1)]
    right = t[np.clip(j, 0, len(t) - 1)]
    nearest = np.minimum(np.abs(mid - left), np.abs(right - mid))
    out[nearest > MAX_WEATHER_GAP_H * NS_PER_H] = np.nan  # np.interp holds the end values
    return out


def spell_segments(spells: tuple[Spell, ...], tz: str, first_ns: int, last_ns: int,
                   closed: tuple[dt.date, ...] = ()) -> Segments:
    """Weekly local-time spells -> UTC segments covering [first_ns, last_ns] (status 1).

    Local dates in `closed` (holidays, closures) have no spell. A spell edge in a skipped local hour moves to the first valid time after it; an edge in
    a repeated hour takes the first occurrence.
    """
    zone = zoneinfo.ZoneInfo(tz)
    utc = dt.UTC
    d0 = dt.datetime.fromtimestamp(first_ns / 1e9, utc).astimezone(zone).date() - dt.timedelta(days=1)
    d1 = dt.datetime.fromtimestamp(last_ns / 1e9, utc).astimezone(zone).date() + dt.timedelta(days=1)
    edges: list[tuple[int, int]] = []
    day = d0
    skip = set(closed)
    while day <= d1:
        for sp in spells if day not in skip else ():
            if day.weekday() in sp.days:
                a = _local_to_ns(day, sp.start_min, zone)
                b = _local_to_ns(day, sp.end_min, zone)
                edges.append((a, b))
        day += dt.timedelta(days=1)
    edges.sort()
    merged: list[list[int]] = []
    for a, b in edges:
        if merged and a <= merged[-1][1]:
            merged[-1][1] = max(merged[-1][1], b)
        else:
            merged.append([a, b])
    arr = np.array(merged, dtype=np.int64).reshape(-1, 2)
    return Segments(arr[:, 0].copy(), arr[:, 1].copy(), np.ones(len(arr)))


def _local_to_ns(day: dt.date, minute: int, zone: zoneinfo.ZoneInfo) -> int:
    naive = dt.datetime.combine(day, dt.time()) + dt.timedelta(minutes=minute)
    local = naive.replace(tzinfo=zone, fold=0)
    # A skipped local time does not survive the round trip through UTC. The first valid time
    # after it is the moment of the clock change; changes fall on whole minutes.
    probe = naive
    while local.astimezone(dt.UTC).astimezone(zone).replace(tzinfo=None) != probe:
        probe += dt.timedelta(minutes=1)
        local = probe.replace(tzinfo=zone, fold=0)
    return int(local.timestamp() * 1_000_000) * 1000


# Number of design columns (fitted baseload levels) of each profile.
BASELOAD_COLUMN_COUNT = {"constant": 1, "occupied": 2, "hour-of-week": 168}


def baseload_columns(base: BaseloadSettings, tz: str, start_utc: pl.Series,
                     start_ns: np.ndarray, end_ns: np.ndarray,
                     how: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
    """Design columns for the baseload profile [h]: the baseload kW multiply these.

    constant: the interval length. occupied: occupied and unoccupied hours of the interval
    (exact overlap with the weekly spells). hour-of-week: the interval length in the column
    of its local start's hour of the week (Mon 00:00 = 0); meter intervals are at most 60
    minutes, so only an interval not aligned to the clock hour could straddle two.
    """
    length_h = (end_ns - start_ns) / NS_PER_H
    if base.profile == "constant":
        return length_h[:, None], ["baseload_kw"]
    if base.profile == "occupied":
        seg = spell_segments(base.spells, tz, int(start_ns.min()), int(end_ns.max()), base.closed)
        occ, _ = overlap_hours(seg, start_ns, end_ns)
        return np.column_stack([occ, length_h - occ]), ["baseload_occupied_kw", "baseload_unoccupied_kw"]
    how = hour_of_week_codes(base, start_utc, tz, how)
    n_levels = 168 + (24 if base.closed else 0)
    cols = np.zeros((len(length_h), n_levels))
    cols[np.arange(len(length_h)), how] = length_h
    names = [f"baseload_how{h:03d}_kw" for h in range(168)]
    names += [f"baseload_closed_h{h:02d}_kw" for h in range(n_levels - 168)]
    return cols, names


def hour_of_week_codes(base: BaseloadSettings, start_utc: pl.Series, tz: str,
                       how: np.ndarray | None = None) -> np.ndarray:
    """The hour-of-week baseload's level of each interval: the local hour of the week
    (0..167), or 168 + the local hour of the day on a declared closed date (closed days get
    their own daily profile)."""
    if how is None:
        how = hour_of_week(start_utc, tz)
    if not base.closed:
        return how
    local = start_utc.dt.convert_time_zone(tz)
    shut = local.dt.date().is_in(list(base.closed)).to_numpy()
    return np.where(shut, 168 + how % 24, how)


def hour_of_week(start_utc: pl.Series, tz: str) -> np.ndarray:
    """Hour of the week of each local start time, Mon 00:00-00:59 = 0 ... Sun 23:00 = 167."""
    local = start_utc.dt.convert_time_zone(tz).dt.replace_time_zone(None)  # wall clock, once
    # weekday() and hour() are Int8: widen before the arithmetic, or Sat 08:00 (128) wraps.
    return ((local.dt.weekday().cast(pl.Int64) - 1) * 24
            + local.dt.hour().cast(pl.Int64)).to_numpy()


@dataclass
class Aligned:
    """Meter intervals with the equipment-hours and baseload columns of the model.

    frame: start_utc, end_utc [UTC], energy_kwh [kWh, null = no reading], interval_h [h].
    hours: (n, k) equipment-hours [h] (status**exponent integrated), NaN where unknown.
    use: (n,) True where the interval has a reading and every equipment's state is known.
    """

    frame: pl.DataFrame
    equipment_ids: list[str]
    hours: np.ndarray
    use: np.ndarray
    interval_min: int
    counts: dict[str, int] = field(default_factory=dict)
    unknown_by_equipment: dict[str, int] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    temp_c: np.ndarray | None = None  # (n,) outdoor temperature [degC], NaN where unknown
    # Per-interval arrays of the whole frame that every fit needs (frame_arrays,
    # frame_baseload), computed once: copies made with dataclasses.replace (another `use`,
    # for a month or a reference period) share it.
    cache: dict = field(default_factory=dict, repr=False, compare=False)


# Rows per chunk of the passes over a long series (probe_rss): bounds the temporary memory
# of 1-minute data (65,536 rows x 30 loads: 16 MB).
CHUNK_ROWS = 65536


# share_hours: the design may be at most this many times the hours' size. Sharing saves an
# (n, k) copy while the fit runs but keeps the whole design alive after it: a net saving only
# while the design adds no more columns than the hours have. Common practice, no source.
SHARE_MAX_WIDENING = 2.0


# align leaves room for this many baseload columns beside the hours (hours_buffer).
SPARE_MAX_COLUMNS = 4


def hours_buffer(aligned: Aligned, term_members: list[list[str]], width: int) -> np.ndarray | None:
    """The (n, width) array whose first k columns are aligned.hours, when a design of the
    loads themselves (one term each, in aligned's order, every interval used) can be written
    there in place: its term columns are the hours already, the rest of its columns go into
    the room align left. None otherwise (the design is then a new array).

    Writing into it changes aligned.hours only beyond its k columns (a design that is
    differenced in place, as drift's, consumes the hours: drift then drops them).
    """
    H = aligned.hours
    base = H.base
    n, k = H.shape
    if (base is None or base.ndim != 2 or base.shape != (n, width) or width < k
            or not base.flags.c_contiguous or not aligned.use.all()
            or H.__array_interface__["data"][0] != base.__array_interface__["data"][0]
            or H.strides != base.strides
            or term_members != [[e] for e in aligned.equipment_ids]):
        return None
    return base


def share_hours(aligned: Aligned, Hf: np.ndarray, term_members: list[list[str]]) -> bool:
    """Point aligned.hours at a design's term columns Hf when they hold the same numbers, so
    that a whole-range fit of a long series keeps one (n, k) array of hours, not two.

    They do when every interval is used and the terms are the loads themselves, one each, in
    aligned's order (no combined, folded or idle load); the columns are compared, and
    aligned.hours is left alone otherwise. aligned.hours then becomes a read-only view of the
    design (the same values; nothing writes into aligned hours after alignment).

    Returns:
        True when aligned.hours now shares Hf's memory.
    """
    H = aligned.hours
    if (not aligned.use.all() or Hf.shape != H.shape or Hf is H
            or term_members != [[e] for e in aligned.equipment_ids]):
        return False
    # A view keeps its whole parent alive: share only when the design adds few columns to
    # the hours (a wide baseload form's design would otherwise outlive the fit).
    parent = Hf if Hf.base is None else Hf.base
    if parent.size > SHARE_MAX_WIDENING * Hf.size:
        return False
    # Hf laid over H's own memory (a design written into hours_buffer) holds its numbers.
    same_memory = (Hf.__array_interface__["data"][0] == H.__array_interface__["data"][0]
                   and Hf.strides == H.strides)
    if not same_memory and not all(np.array_equal(Hf[:, j], H[:, j])
                                   for j in range(H.shape[1])):
        return False
    view = Hf.view()
    view.flags.writeable = False
    aligned.hours = view
    return True


class _Shifted:
    """One equipment's run log, evaluated at interval edges moved by an offset: the
    _cumulative sums of its segments made once (for every offset and chunk of rows), the
    same numbers as overlap_hours of the moved log (shift the edges back instead of the
    segments forward: the same integers)."""

    def __init__(self, seg: Segments, exponent: float):
        self.seg = seg
        self.exponent = exponent
        self.dur_ns = seg.end_ns - seg.start_ns
        self.weight = np.power(seg.value, exponent) if exponent != 1.0 else seg.value
        dur_h = self.dur_ns / NS_PER_H
        self.cum_val = np.concatenate(([0.0], np.cumsum(self.weight * dur_h)))
        self.cum_cov = np.concatenate(([0.0], np.cumsum(dur_h)))
        n = len(seg.start_ns)
        # Without gaps between segments the log covers [first start, last end) exactly:
        # only intervals reaching outside it have unknown time.
        self.gapless = n > 0 and bool(np.array_equal(seg.start_ns[1:], seg.end_ns[:-1]))

    def _values(self, t_ns: np.ndarray) -> np.ndarray:
        """_cumulative's first result (the integral of status**exponent up to each time)."""
        seg = self.seg
        idx = np.searchsorted(seg.start_ns, t_ns, side="right") - 1
        if idx.size and idx.min() >= 0:  # every time after the first segment's start
            part_h = np.clip(t_ns - seg.start_ns[idx], 0, self.dur_ns[idx]) / NS_PER_H
            return self.cum_val[idx] + self.weight[idx] * part_h
        inside = idx >= 0
        j = np.where(inside, idx, 0)
        part_h = np.clip(t_ns - seg.start_ns[j], 0, self.dur_ns[j]) / NS_PER_H
        return np.where(inside, self.cum_val[j] + self.weight[j] * part_h, 0.0)

    def _unknown(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """overlap_hours' unknown_h of intervals [a, b) > _UNKNOWN_TOL_H (its float sums)."""
        seg = self.seg

        def covered(t_ns: np.ndarray) -> np.ndarray:  # _cumulative's second result
            idx = np.searchsorted(seg.start_ns, t_ns, side="right") - 1
            inside = idx >= 0
            j = np.where(inside, idx, 0)
            part_h = np.clip(t_ns - seg.start_ns[j], 0, self.dur_ns[j]) / NS_PER_H
            return np.where(inside, self.cum_cov[j] + part_h, 0.0)

        unknown_h = np.maximum((b - a) / NS_PER_H - (covered(b) - covered(a)), 0.0)
        return unknown_h > _UNKNOWN_TOL_H

    def hours(self, start_ns: np.ndarray, end_ns: np.ndarray,
              offset_ns: int) -> tuple[np.ndarray, np.ndarray]:
        """(run_h [h], unknown) of overlap_hours(moved segments, start_ns, end_ns,
        exponent), the log moved later by offset_ns; unknown: unknown_h > _UNKNOWN_TOL_H."""
        seg = self.seg
        a, b = start_ns - offset_ns, end_ns - offset_ns
        if len(seg.start_ns) == 0:
            return np.zeros(len(a)), (b - a) / NS_PER_H > _UNKNOWN_TOL_H
        back_to_back = len(a) > 1 and np.array_equal(a[1:], b[:-1])
        if back_to_back:
            v = self._values(np.concatenate([a, b[-1:]]))
            run_h = v[1:] - v[:-1]
        else:
            run_h = self._values(b) - self._values(a)
        if not self.gapless:
            return run_h, self._unknown(a, b)
        # Gapless: the unknown time is the part outside [first start, last end); it is zero
        # inside (overlap_hours' float sums are then below _UNKNOWN_TOL_H by orders of
        # magnitude); overlap_hours' sums (_unknown) decide the few that reach outside.
        out = (a < seg.start_ns[0]) | (b > seg.end_ns[-1])
        unknown = np.zeros(len(a), dtype=bool)
        if out.any():
            unknown[out] = self._unknown(a[out], b[out])
        return run_h, unknown


def probe_rss(site: SiteConfig, aligned: Aligned, runlog: RunLog, offsets_min: list[float],
              base: np.ndarray) -> tuple[int, list[float] | None]:
    """Residual sum of squares of the non-negative least-squares fit of the meter on the
    equipment-hours and baseload columns, for aligned's own hours and for runlog moved later
    by each of offsets_min [min] (as clock.shift_runlog moves it), on the intervals all of
    them cover [kWh^2].

    runlog: the log aligned was made from. base: the baseload columns of the intervals
    aligned.use (design.BaseloadBuilder.declared_columns).

    The same fits as aligning each moved log (align) and solving on the stacked columns
    (solvers.solve_regularized without penalty, bounds at 0), but a chunk of rows at a time,
    in one pass: the moved logs' hours are never held whole, so a long 1-minute series holds
    no second (n, k) array. Each load's cumulative sums are made once (_Shifted) and
    evaluated at the interval edges moved back by each offset (the same numbers as
    overlap_hours of the moved log). The rows are factorised in the same chunks as
    solvers.compress (the same R factor); the residual sum of squares is read off R
    (||[X y] [b; -1]||^2, equal up to rounding).

    Returns:
        (intervals covered by all, [rss of aligned, rss of each offset]); the list is None
        when the solver would not compress this design (at most 2 x columns intervals, or a
        design wide enough for solvers.compress's indicator path): the caller then aligns
        and solves as usual.
    """
    from disagg.fit.solvers import DISJOINT_MIN_COLS, QR_CHUNK_ROWS, solve_compressed

    a = frame_arrays(aligned, site.timezone)
    start_ns, end_ns = a["start_ns"], a["end_ns"]
    eqs = site.equipment
    k = len(eqs)
    p = k + base.shape[1]
    wide = p >= DISJOINT_MIN_COLS  # the solver would not compress: count the rows only
    y_all = aligned.frame["energy_kwh"].to_numpy().astype(float)
    use = aligned.use
    everything = bool(use.all())
    at = None if everything else np.cumsum(use) - 1  # a used interval's row of base
    offsets_ns = [int(np.int64(round(o * 60_000_000_000))) for o in offsets_min]
    logs = [_Shifted(runlog.segments[eq.id], eq.exponent) for eq in eqs]
    n_probes = len(offsets_ns) + 1
    # One pass, CHUNK_ROWS intervals at a time: each moved log's hours and unknown time
    # together; the rows every log knows make each probe's [hours, baseload, meter] rows,
    # factorised QR_CHUNK_ROWS kept rows at a time in the order of the rows kept (the
    # chunks of solvers.compress: the same R as factorising all the kept rows).
    pending: list[list[np.ndarray]] = [[] for _ in range(n_probes)]
    parts: list[list[np.ndarray]] = [[] for _ in range(n_probes)]
    covered = n_pending = 0
    chunked = False  # more than 2 x QR_CHUNK_ROWS rows kept: factorised in chunks
    for lo in range(0, len(start_ns), CHUNK_ROWS):
        hi = min(lo + CHUNK_ROWS, len(start_ns))
        keep = use[lo:hi].copy()
        moved = []
        # Column-major rows: each load's hours written as one contiguous column (LAPACK
        # factorises a column-major copy either way: the same R).
        for off in offsets_ns:
            Z = None if wide else np.empty((hi - lo, p + 1), order="F")
            for j, log in enumerate(logs):
                run_h, unknown = log.hours(start_ns[lo:hi], end_ns[lo:hi], off)
                keep &= ~unknown
                if Z is not None:
                    Z[:, j] = run_h
            moved.append(Z)
        n_keep = int(keep.sum())
        covered += n_keep
        if wide:
            continue
        kept = np.flatnonzero(keep)
        # One run of rows (the usual: a moved log loses only the ends): slices, no copies.
        run = n_keep == 0 or kept[-1] - kept[0] + 1 == n_keep
        first = int(kept[0]) if n_keep else 0
        rows = slice(lo + first, lo + first + n_keep) if run else lo + kept
        if everything:
            base_rows = base[rows]
        else:
            base_rows = base[at[rows]]
        Z0 = np.empty((n_keep, p + 1), order="F")
        Z0[:, :k] = aligned.hours[rows]
        Zs = [Z0] + [Z[first:first + n_keep] if run else Z[keep] for Z in moved]
        del moved
        for i, Z in enumerate(Zs):
            Z[:, k:p] = base_rows
            Z[:, p] = y_all[rows]
            pending[i].append(Z)
        del Zs
        n_pending += n_keep
        chunked = chunked or covered > 2 * QR_CHUNK_ROWS
        if chunked and n_pending >= QR_CHUNK_ROWS:
            for i in range(n_probes):
                Z = pending[i][0] if len(pending[i]) == 1 else np.vstack(pending[i])
                full = len(Z) - len(Z) % QR_CHUNK_ROWS
                parts[i] += [np.linalg.qr(Z[c:c + QR_CHUNK_ROWS], mode="r")
                             for c in range(0, full, QR_CHUNK_ROWS)]
                pending[i] = [Z[full:]]
            n_pending %= QR_CHUNK_ROWS
    if covered <= 2 * p or wide:
        return covered, None
    for i in range(n_probes):
        Z = pending[i][0] if len(pending[i]) == 1 else np.vstack(pending[i])
        pending[i] = []
        if chunked:
            parts[i] += [np.linalg.qr(Z[c:c + QR_CHUNK_ROWS], mode="r")
                         for c in range(0, len(Z), QR_CHUNK_ROWS)]
        else:
            parts[i].append(Z)
    out = []
    for i in range(n_probes):
        R = np.linalg.qr(np.vstack(parts[i]), mode="r")
        parts[i] = []
        b = solve_compressed(R[:p, :p], R[:p, p], np.zeros(p), np.zeros(p), np.zeros(p))
        out.append(float(np.sum((R @ np.append(b, -1.0)) ** 2)))
    return covered, out


def frame_arrays(aligned: Aligned, tz: str) -> dict[str, np.ndarray]:
    """Arrays over every interval of aligned.frame, computed once per frame and time zone.

    start_ns, end_ns: interval edges [ns since epoch, UTC]; length_h: interval length [h];
    local_date: local calendar date of the start (days since 1970-01-01); hour_of_week: see
    hour_of_week(); minute_of_day: local hour x 60 + minute of the start; month: local year x
    100 + month of the start.
    """
    key = ("arrays", tz)
    hit = aligned.cache.get(key)
    if hit is not None and hit[0] is aligned.frame:
        return hit[1]
    f = aligned.frame
    # The local wall-clock times as naive datetimes: the zone's rules are applied once, not
    # for each field taken (the same fields, about 40 % less time).
    local = f["start_utc"].dt.convert_time_zone(tz).dt.replace_time_zone(None)
    start_ns = f["start_utc"].dt.epoch("ns").to_numpy().astype(np.int64)
    end_ns = f["end_utc"].dt.epoch("ns").to_numpy().astype(np.int64)
    hour = local.dt.hour().cast(pl.Int64)
    arrays = {
        "start_ns": start_ns, "end_ns": end_ns, "length_h": (end_ns - start_ns) / NS_PER_H,
        "local_date": local.dt.date().cast(pl.Int32).to_numpy(),
        "hour_of_week": ((local.dt.weekday().cast(pl.Int64) - 1) * 24 + hour).to_numpy(),
        "minute_of_day": (hour * 60 + local.dt.minute().cast(pl.Int64)).to_numpy(),
        "month": (local.dt.year().cast(pl.Int32) * 100 + local.dt.month().cast(pl.Int32)).to_numpy(),
    }
    for v in arrays.values():
        v.flags.writeable = False  # shared by every fit of this frame
    aligned.cache[key] = (f, arrays)
    return arrays


def frame_baseload(aligned: Aligned, base: BaseloadSettings,
                   tz: str) -> tuple[np.ndarray, list[str]]:
    """baseload_columns over every interval of aligned.frame, computed once per frame, time
    zone and settings (constant and occupied profiles; hour-of-week is built each time from
    frame_arrays' codes, its 168 columns being too large to keep)."""
    a = frame_arrays(aligned, tz)
    if base.profile == "hour-of-week":
        return baseload_columns(base, tz, aligned.frame["start_utc"], a["start_ns"], a["end_ns"],
                                how=a["hour_of_week"])
    key = ("baseload", base, tz)
    hit = aligned.cache.get(key)
    if hit is not None and hit[0] is aligned.frame:
        return hit[1]
    out = baseload_columns(base, tz, aligned.frame["start_utc"], a["start_ns"], a["end_ns"])
    out[0].flags.writeable = False  # shared by every fit of this frame
    aligned.cache[key] = (aligned.frame, out)
    return out


def align(site: SiteConfig, meter: MeterData, runlog: RunLog,
          date_from: dt.date | None = None, date_to: dt.date | None = None,
          weather: pl.DataFrame | None = None) -> Aligned:
    """Equipment-hours in every meter interval whose local start date is in [from, to].

    Raises:
        ValueError: no meter interval falls in the requested dates.
    """
    frame = meter.frame
    if date_from or date_to:
        local_date = pl.col("start_utc").dt.convert_time_zone(site.timezone).dt.date()
        if date_from:
            frame = frame.filter(local_date >= date_from)
        if date_to:
            frame = frame.filter(local_date <= date_to)
    start_ns = frame["start_utc"].dt.epoch("ns").to_numpy().astype(np.int64)
    end_ns = frame["end_utc"].dt.epoch("ns").to_numpy().astype(np.int64)
    ids = site.equipment_ids()
    # The hours are the first columns of a buffer with room for the declared profile's few
    # baseload columns: a whole-range fit of the loads themselves then writes its design in
    # place (hours_buffer), no second (n, k) array.
    spare = BASELOAD_COLUMN_COUNT.get(site.baseload.profile, 0)
    spare = spare if spare <= SPARE_MAX_COLUMNS else 0
    hours = np.empty((frame.height, len(ids) + spare))[:, :len(ids)]
    known = np.ones(frame.height, dtype=bool)
    unknown_by: dict[str, int] = {}
    for j, eq in enumerate(site.equipment):
        run_h, unknown_h = overlap_hours(runlog.segments[eq.id], start_ns, end_ns, eq.exponent)
        unk = unknown_h > _UNKNOWN_TOL_H
        run_h[unk] = np.nan
        hours[:, j] = run_h
        unknown_by[eq.id] = int(unk.sum())
        known &= ~unk
    reading = frame["energy_kwh"].is_not_null().to_numpy()
    use = reading & known
    temp_c = None
    weather_unknown = 0
    if weather is not None:
        temp_c = interval_temperature(weather, start_ns, end_ns)
        if any(e.weather for e in site.equipment):
            weather_unknown = int((use & np.isnan(temp_c)).sum())
            use &= ~np.isnan(temp_c)
    frame = frame.with_columns(interval_h=pl.Series((end_ns - start_ns) / NS_PER_H))
    span_h = float((end_ns.max() - start_ns.min()) / NS_PER_H) if frame.height else 0.0
    counts = {
        "intervals": frame.height,
        "absent": max(round(span_h * 60 / meter.interval_min) - frame.height, 0),
        "used": int(use.sum()),
        "no_reading": int((~reading).sum()),
        "log_unknown": int((reading & ~known).sum()),
        "weather_unknown": weather_unknown,
    }
    notes = []
    if counts["absent"]:
        notes.append(f"{counts['absent']} meter intervals are absent from the file: left out, "
                     "not filled")
    if counts["no_reading"]:
        notes.append(f"{counts['no_reading']} meter intervals have no reading: left out")
    if counts["log_unknown"]:
        who = ", ".join(f"{k} {v}" for k, v in unknown_by.items() if v)
        notes.append(f"{counts['log_unknown']} intervals have a run-log state that is unknown "
                     f"for some equipment (intervals per equipment: {who}): left out")
    if weather_unknown:
        notes.append(f"{weather_unknown} intervals have no outdoor temperature within "
                     f"{MAX_WEATHER_GAP_H:g} h: left out")
    return Aligned(frame, ids, hours, use, meter.interval_min, counts, unknown_by, notes, temp_c)


# The occupied-edges profile: the baseload's own shape around each declared schedule edge,
# EDGE_HOURS either side, in slots of EDGE_SLOT_MIN minutes (or the meter interval if longer).
# Project choice (lights that ramp over an hour or two around the edges), no outside source.
EDGE_HOURS = 2.0
EDGE_SLOT_MIN = 15


def edge_columns(base: BaseloadSettings, tz: str, start_utc: pl.Series,
                 length_h: np.ndarray, hourly: bool = False) -> tuple[np.ndarray, list[str]]:
    """Extra baseload columns [h] for the occupied-edges profile: for each declared spell's
    start and end, one column per slot from EDGE_HOURS before to EDGE_HOURS after the edge
    (by the interval's local start), on the days the spell applies and that are not closed.
    With the occupied/unoccupied columns they let the baseload ramp around the schedule's
    edges instead of stepping exactly on them.

    hourly: beside hour-of-week columns, which already carry each clock hour's level, the
    slots starting on the hour are left out (the shape within the hour needs the others only;
    with them the columns would repeat the hour-of-week ones exactly)."""
    local = start_utc.dt.convert_time_zone(tz).dt.replace_time_zone(None)  # wall clock, once
    minute = (local.dt.hour().cast(pl.Int64) * 60 + local.dt.minute().cast(pl.Int64)).to_numpy()
    weekday = (local.dt.weekday().cast(pl.Int64) - 1).to_numpy()
    open_day = np.ones(len(minute), dtype=bool)
    if base.closed:
        open_day = ~local.dt.date().is_in(list(base.closed)).to_numpy()
    step = max(EDGE_SLOT_MIN, int(round(float(np.median(length_h)) * 60))) if len(minute) else 15
    slots = int(EDGE_HOURS * 60 // step)
    cols, names = [], []
    for s_i, spell in enumerate(base.spells):
        on_day = np.isin(weekday, spell.days) & open_day
        for label, edge in (("start", spell.start_min), ("end", spell.end_min)):
            for j in range(-slots, slots):
                a = edge + j * step
                if hourly and a % 60 == 0:
                    continue
                hit = on_day & (minute >= a) & (minute < a + step)
                if not hit.any():
                    continue
                cols.append(np.where(hit, length_h, 0.0))
                names.append(f"baseload_edge{s_i}_{label}{j * step:+d}min_kw")
    if not cols:
        return np.zeros((len(minute), 0)), []
    return np.column_stack(cols), names
