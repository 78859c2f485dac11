"""Meter-data validation in the trade's VEE sense (validation, estimation, editing).

Utility VEE standards check interval data for missing intervals, zero reads during outages,
spikes, short or long intervals after a time reset and register (pulse) overflow
(docs/references.md section 7, read from their tables of contents). Each check here is a pure
function over the meter readings that returns a :class:`Finding`: what was found, how many,
the first few times (local ISO 8601 with the UTC offset, as the file's stamp edge) and the
policy the tool applies, all in one readable line. ``disagg.inputs.readers.read_meter`` runs them.

Policies, one per finding kind:

- ``duplicate``: identical rows at one time: one kept. Different readings at one time: an
  error, unless ``on_duplicate`` is ``keep-first`` or ``keep-last``.
- ``negative``: an error (the file cannot be used).
- ``off-interval``: readings off the file's interval grid, or less than one interval from
  their neighbour (a run of 5-minute data in a 15-minute file): left out, never resampled.
- ``rollover``: a cumulative register (unit ``kWh-register``) that passed its largest value:
  the interval energy is counted across the rollover.
- ``dst-repeated`` / ``dst-skipped``: the local hour that happens twice or not at all in a
  file of naive local times: times are stored in UTC; nothing is left out.
- ``gap``: intervals absent between the first and last reading: left out, never filled.
- ``spike``: readings far above the rest (rule in :func:`spikes`): left out of the fit.
- ``zero-run``: ``ZERO_RUN_MIN`` minutes or more of zero readings: kept, but flagged as a
  possible outage or meter fault.

Estimation (:func:`estimate_short_gaps`) is offered separately and never changes the fit.
"""

from __future__ import annotations

import datetime as dt
import math
import zoneinfo
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import polars as pl

from disagg.errors import ConfigError, InputError

# How many times a finding's message lists before "and N more".
FIRST_TIMES = 3
# Scaled MAD: 1.4826 x MAD estimates the standard deviation of normal data (1 / the normal
# distribution's 0.75 quantile, 1 / 0.6745). Hampel 1974, JASA 69(346); Rousseeuw & Croux
# 1993, JASA 88(424) (from memory).
MAD_CONSISTENCY = 1.4826
# A spike lies more than this many scaled MADs above the file's median (common practice, no
# source: 3 is the usual Hampel threshold for outliers, 6 keeps to gross errors) ...
SPIKE_MADS = 6.0
# ... and above this multiple of the file's 99th-percentile reading. Our choice, no source:
# a pure MAD rule takes the ordinary peaks of an intermittent load for spikes [ran]: on the
# open household data of tests/test_household.py (15-minute readings), 6 scaled MADs from the
# hour-of-week median flagged 5 to 65 of about 2900 intervals in three of its six months;
# in 2009-07's 65 the house's own sub-meters measured a median 70 % of the energy, so they
# are loads, not meter faults, and leaving them out would bias the fit (it selects on the
# meter reading). Measured: the highest reading is 1.17 x the 99th percentile on the demo
# year and at most 1.70 x on the household months, so a factor of 2 leaves real peaks
# alone. Limits: a peak that recurs in fewer than 1 % of the readings, or one-minute data of
# an intermittent load, can pass the factor; a fault in more than 1 % of the readings
# raises the percentile and hides itself.
SPIKE_PERCENTILE = 0.99
SPIKE_PERCENTILE_FACTOR = 2.0
# Below this many readings the 99th percentile is the largest readings themselves and the
# spike check is not run.
SPIKE_MIN_READINGS = 100
# A run of zero readings this long or longer is flagged [min] (common practice, no source:
# two hours of exactly nothing is rare for a whole building outside an outage).
ZERO_RUN_MIN = 120
ON_DUPLICATE = ("error", "keep-first", "keep-last")
# Longest gap estimate_short_gaps fills [intervals] (common practice, no source: an hour of
# 15-minute data).
ESTIMATE_MAX_GAP = 4


@dataclass(frozen=True)
class Finding:
    """One meter-data problem: kind, how many readings or intervals, when, and the policy.

    times: the first few times concerned (local ISO 8601 with UTC offset), at most FIRST_TIMES.
    message: the whole finding in one readable line.
    starts_utc: for ``spike``, the start of every interval left out (to count them later).
    replaces: an older note that said the same (so that it is not printed twice).
    """

    kind: str
    count: int
    times: tuple[str, ...]
    policy: str
    message: str
    starts_utc: tuple[dt.datetime, ...] = ()
    replaces: str = ""

    def as_dict(self) -> dict:
        """JSON-ready form: kind, count, times, policy, message."""
        return {"kind": self.kind, "count": self.count, "times": list(self.times),
                "policy": self.policy, "message": self.message}


def _plural(n: int, word: str, many: str | None = None) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {many or word + 's'}"


def local_iso(times: pl.Series, tz: str) -> list[str]:
    """UTC datetimes -> local ISO 8601 text with the UTC offset, e.g. 2025-01-06T00:15:00-06:00."""
    if times.len() == 0:
        return []
    return (times.dt.convert_time_zone(tz).dt.strftime("%Y-%m-%dT%H:%M:%S%:z")).to_list()


def _listed(items: list[str], total: int) -> str:
    """The first FIRST_TIMES items, and how many more."""
    text = ", ".join(items[:FIRST_TIMES])
    return text + (f" and {total - FIRST_TIMES} more" if total > FIRST_TIMES else "")


def check_on_duplicate(on_duplicate: str) -> None:
    """Raise ConfigError unless on_duplicate is one of ON_DUPLICATE."""
    if on_duplicate not in ON_DUPLICATE:
        raise ConfigError(f"--on-duplicate {on_duplicate!r}: expected one of "
                          f"{', '.join(ON_DUPLICATE)}")


# ---------------------------------------------------------------------------------------
# Validation of the readings as read (times in UTC, values in the file's unit)


def negative_readings(values: pl.Series, where: Callable[[int], str]) -> Finding | None:
    """Negative readings: a meter that delivers energy does not read below zero.

    Args:
        values: the readings in file order (null = no reading).
        where: 0-based row -> "FILE: line N, column 'C'" for the message.

    Returns:
        None, or a ``negative`` finding whose message is the error to raise (policy: error).
    """
    negative = (values < 0).fill_null(False)
    if not negative.any():
        return None
    idx = int(negative.arg_max())  # type: ignore[arg-type]
    return Finding("negative", int(negative.sum()), (), "error",
                   f"{where(idx)}: negative reading {values[idx]:g}; expected energy of 0 or more")


def resolve_duplicates(df: pl.DataFrame, on_duplicate: str, tz: str,
                       conflict_error: Callable[[dt.datetime, int, int], str]
                       ) -> tuple[pl.DataFrame, list[Finding]]:
    """One reading per time: drop repeated rows, by the on_duplicate policy.

    Args:
        df: columns t (UTC time as stamped), v (reading), row (0-based row in the file), in
            file order.
        on_duplicate: ``error`` (different readings at one time are an error), ``keep-first``
            or ``keep-last`` (the first or last such row in the file is kept).
        conflict_error: (time, first row, second row) -> the error message.

    Returns:
        (the rows kept, in file order; findings: one for identical repeats, one for kept
        conflicting repeats).

    Raises:
        InputError: different readings at one time with on_duplicate = error.
    """
    check_on_duplicate(on_duplicate)
    dup = df.filter(pl.col("t").is_duplicated())
    if dup.height == 0:
        return df, []
    groups = dup.group_by("t").agg(pl.col("v").n_unique().alias("n"), pl.col("row").sort(),
                                   pl.len().alias("rows")).sort(pl.col("row").list.first())
    conflict = groups.filter(pl.col("n") > 1)
    if conflict.height and on_duplicate == "error":
        first = conflict.row(0, named=True)
        raise InputError(conflict_error(first["t"], first["row"][0], first["row"][1]))
    keep = "last" if on_duplicate == "keep-last" else "first"
    identical = groups.filter(pl.col("n") == 1)
    out = pl.concat([
        df.filter(~pl.col("t").is_in(conflict["t"].implode())),
        df.filter(pl.col("t").is_in(conflict["t"].implode()))
          .unique(subset="t", keep=keep, maintain_order=True),
    ]).sort("row").unique(subset="t", keep="first", maintain_order=True)
    findings = []
    if identical.height:
        dropped = int(identical["rows"].sum()) - identical.height
        n = identical.height
        times = local_iso(identical["t"], tz)
        policy = f"one row of each kept, {_plural(dropped, 'row')} dropped"
        findings.append(Finding(
            "duplicate", dropped, tuple(times[:FIRST_TIMES]), policy,
            f"meter duplicates: {_plural(n, 'time')} {'appears' if n == 1 else 'appear'} more "
            f"than once with identical readings ({_listed(times, n)}); policy: {policy}",
            replaces=f"{dropped} repeated meter rows with identical readings were dropped"))
    if conflict.height:
        dropped = int(conflict["rows"].sum()) - conflict.height
        n = conflict.height
        times = local_iso(conflict["t"], tz)
        policy = (f"the {keep} row of each kept (on_duplicate = {on_duplicate}), "
                  f"{_plural(dropped, 'row')} dropped")
        findings.append(Finding(
            "duplicate", dropped, tuple(times[:FIRST_TIMES]), policy,
            f"meter duplicates: {_plural(n, 'time')} {'appears' if n == 1 else 'appear'} more "
            f"than once with different readings ({_listed(times, n)}); policy: {policy}"))
    return out, findings


def off_interval(t: pl.Series, interval_min: int, stamp: str) -> pl.Series:
    """Readings whose energy does not cover one interval of the file's grid.

    A reading is off when its time is off the grid most readings follow (time modulo the
    interval), or when it is less than one interval from its neighbour on its interval's side
    (the previous reading for stamp ``end``, the next for ``start``): inside a run of 5-minute
    readings in a 15-minute file every reading covers 5 minutes, even those on the grid.

    Args:
        t: reading times [UTC], sorted, without repeats.
        interval_min: the file's interval [min].
        stamp: ``end`` or ``start``: which edge of its interval a reading's time marks.

    Returns:
        Boolean series, True where the reading is off.
    """
    if t.len() == 0:
        return pl.Series(dtype=pl.Boolean)
    step_us = interval_min * 60_000_000
    phase = t.dt.epoch("us") % step_us
    grid = phase.mode().sort()[0]
    gap_us = (t.diff() if stamp == "end" else -t.diff(-1)).dt.total_microseconds()
    short = (gap_us < step_us).fill_null(False)
    return (phase != grid) | short


def off_interval_finding(t: pl.Series, off: pl.Series, interval_min: int, stamp: str,
                         tz: str) -> Finding | None:
    """The ``off-interval`` finding for the readings off marks (policy: left out)."""
    n = int(off.sum())
    if not n:
        return None
    times = local_iso(t.filter(off), tz)
    side = "after the previous" if stamp == "end" else "before the next"
    policy = "left out of the fit, not resampled (such a reading covers another length of time)"
    return Finding(
        "off-interval", n, tuple(times[:FIRST_TIMES]), policy,
        f"meter interval changes: {_plural(n, 'reading')} off the {interval_min}-minute grid or "
        f"less than {interval_min} minutes {side} reading ({_listed(times, n)}); "
        f"policy: {policy}")


def register_energy(t: pl.Series, reading: pl.Series, interval_min: int, digits: int | None,
                    multiplier: float, tz: str, row: pl.Series, row_label: Callable[[int], str],
                    where: str) -> tuple[pl.Series, Finding | None]:
    """Cumulative register readings -> energy of the interval ending at each reading [kWh].

    The interval ending at a reading gets (R2 - R1) x multiplier from the previous reading
    exactly one interval earlier; with ``digits`` set, a reading below the previous one is a
    rollover: (R2 - R1 + 10^digits) mod 10^digits x multiplier (docs/references.md section 7,
    from memory). An interval whose previous reading is missing or further back is null (its
    energy is known only together with the gap's), and so is the first reading's.

    Args:
        t: reading times [UTC], sorted, without repeats.
        reading: the register readings [kWh before the multiplier], null = no reading.
        digits: the register's number of digits, or None (then it must never decrease).
        multiplier: the meter multiplier (CT/PT ratio, pulse weight).
        row: the 0-based file row of each reading.
        row_label: 0-based file row -> "line N" (CSV) or "row N" (Parquet).
        where: "FILE" and ", column 'C'" joined by "{}" for the row, e.g. "f.csv: {}, column 'kwh'".

    Raises:
        InputError: a decrease without digits set, or a reading at or above 10^digits,
            naming the row.
    """
    n = t.len()
    r = reading.to_numpy().astype(float)
    rows = row.to_numpy()
    top = 10.0 ** digits if digits is not None else math.inf
    if digits is not None:
        over = np.nonzero(r >= top)[0]
        if len(over):
            i = int(over[0])
            raise InputError(f"{where.format(row_label(int(rows[i])))}: register reading "
                             f"{r[i]:g} has more than "
                             f"{digits} digits; expected below {top:.0f} (register_digits = "
                             f"{digits}); correct register_digits in [meter]")
    known = np.nonzero(~np.isnan(r))[0]
    a, b = known[:-1], known[1:]  # each known reading and the known reading before it
    delta = r[b] - r[a]
    down = delta < 0
    if down.any() and digits is None:
        i, j = int(a[down][0]), int(b[down][0])
        raise InputError(
            f"{where.format(row_label(int(rows[j])))}: register reading {r[j]:g} is below the "
            f"previous reading {r[i]:g} ({row_label(int(rows[i]))}); expected a register that "
            "never decreases; if it rolls over, set register_digits in [meter]")
    delta[down] = (delta[down] + top) % top
    t_us = t.dt.epoch("us").to_numpy()
    next_one = (b == a + 1) & (t_us[b] - t_us[a] == interval_min * 60_000_000)
    energy = np.full(n, np.nan)
    energy[b[next_one]] = delta[next_one] * multiplier
    rolled = [int(i) for i in b[down]]
    out = pl.Series("energy_kwh", energy).fill_nan(None)
    if not rolled:
        return out, None
    times = local_iso(t.gather(rolled), tz)
    policy = (f"interval energy = (R2 - R1 + 10^{digits}) mod 10^{digits} x multiplier "
              f"{multiplier:g}")
    return out, Finding(
        "rollover", len(rolled), tuple(times[:FIRST_TIMES]), policy,
        f"meter register rollovers: {_plural(len(rolled), 'reading')} rolled over past "
        f"{top - 1:.0f}, register_digits = {digits} ({_listed(times, len(rolled))}); "
        f"policy: {policy}")


def dst_hours(t: pl.Series, tz: str, interval_min: int) -> list[Finding]:
    """The daylight-saving changes inside a file of naive local times, one finding each.

    Clocks going back repeat a local hour: parse_times placed each reading in it in the first
    or the second pass by its order in the file; the finding says how many went where.
    Clocks going forward skip a local hour: the file rightly has no readings there.

    Args:
        t: reading times [UTC], sorted (parsed from naive local times in tz).

    Returns:
        ``dst-repeated`` and ``dst-skipped`` findings, in time order (policy: stored in UTC,
        nothing left out).
    """
    if t.len() < 2:
        return []
    zone = zoneinfo.ZoneInfo(tz)
    local = t.dt.convert_time_zone(tz)
    offset = (local.dt.replace_time_zone(None) - t.dt.replace_time_zone(None)).dt.total_seconds()
    change = np.nonzero(np.diff(offset.to_numpy()) != 0)[0]
    findings = []
    for i in change:
        lo, hi = t[int(i)], t[int(i) + 1]
        before = lo.astimezone(zone).utcoffset()
        while hi - lo > dt.timedelta(seconds=1):  # bisect to the moment the offset changes
            mid = lo + (hi - lo) / 2
            if mid.astimezone(zone).utcoffset() == before:
                lo = mid
            else:
                hi = mid
        moment = hi.replace(microsecond=0)
        after = moment.astimezone(zone).utcoffset()
        shift = after - before
        n_int = int(abs(shift).total_seconds() // 60 // interval_min)
        at = moment.astimezone(zone)
        when = at.isoformat()
        if shift < dt.timedelta(0):  # clocks go back: local [at, at - shift) happens twice
            a, b = at.replace(tzinfo=None), at.replace(tzinfo=None) - shift
            naive = local.dt.replace_time_zone(None)
            inside = (naive >= a) & (naive < b)
            first = int((inside & (t < moment)).sum())
            second = int((inside & (t >= moment)).sum())
            policy = "kept, stored in UTC"
            findings.append(Finding(
                "dst-repeated", first + second, (when,), policy,
                f"meter DST repeated hour: on {a:%Y-%m-%d} clocks in {tz} go back from "
                f"{b:%H:%M} to {a:%H:%M}, so local times {a:%H:%M}-{b:%H:%M} happen twice; by "
                f"their order in the file {first} readings there were placed in the first pass "
                f"(UTC{_offset(before)}) and {second} in the second (UTC{_offset(after)}), "
                f"{n_int} expected in each; policy: {policy}"))
        else:  # clocks go forward: local [at - shift, at) does not exist
            a, b = at.replace(tzinfo=None) - shift, at.replace(tzinfo=None)
            policy = "nothing left out, stored in UTC"
            findings.append(Finding(
                "dst-skipped", n_int, (when,), policy,
                f"meter DST skipped hour: on {a:%Y-%m-%d} clocks in {tz} go forward from "
                f"{a:%H:%M} to {b:%H:%M}, so local times {a:%H:%M}-{b:%H:%M} do not exist; the "
                f"file rightly has no readings there ({_plural(n_int, 'interval')} fewer that "
                f"day); policy: {policy}"))
    return findings


def _offset(delta: dt.timedelta | None) -> str:
    minutes = int((delta or dt.timedelta(0)).total_seconds() // 60)
    sign = "-" if minutes < 0 else "+"
    return f"{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"


# ---------------------------------------------------------------------------------------
# Validation of the meter frame (start_utc, end_utc, energy_kwh)


def _stamps(frame: pl.DataFrame, edge: str) -> pl.Series:
    return frame["end_utc" if edge == "end" else "start_utc"]


def gaps(frame: pl.DataFrame, interval_min: int, edge: str, tz: str) -> Finding | None:
    """Intervals absent between the first and last reading (policy: left out, not filled).

    Args:
        frame: start_utc, end_utc, energy_kwh, sorted by start, on one interval grid.
        edge: ``end`` or ``start``: which edge the times in the message show (the file's stamp).

    Returns:
        A ``gap`` finding (count = absent intervals; times = each gap's first missing stamp),
        or None.
    """
    if frame.height < 2:
        return None
    step = dt.timedelta(minutes=interval_min)
    starts = frame["start_utc"]
    missing = ((starts.diff().dt.total_microseconds() // (interval_min * 60_000_000)) - 1)
    missing_n = missing.fill_null(0).to_numpy()
    at = np.nonzero(missing_n > 0)[0]
    if not len(at):
        return None
    lengths = [int(missing_n[i]) for i in at]
    shift = step if edge == "end" else dt.timedelta(0)
    first_missing = starts.gather(at - 1) + step + shift
    times = local_iso(first_missing, tz)
    total = sum(lengths)
    items = [f"{k} from {t}" for t, k in zip(times, lengths)]
    policy = "left out of the fit, not filled"
    return Finding(
        "gap", total, tuple(times[:FIRST_TIMES]), policy,
        f"meter gaps: {_plural(total, 'reading')} missing between the first and last reading, "
        f"in {_plural(len(at), 'gap')} ({_listed(items, len(at))}); policy: {policy}")


def spikes(frame: pl.DataFrame, edge: str, tz: str, unit: str = "kWh",
           interval_min: int | None = None) -> tuple[pl.Series, Finding | None]:
    """Readings far above the rest of the file (policy: left out of the fit).

    Rule: a reading is a spike when it exceeds the file's median by more than SPIKE_MADS
    scaled MADs (MAD_CONSISTENCY x the median absolute deviation from the median) and also
    exceeds SPIKE_PERCENTILE_FACTOR x the file's 99th-percentile reading. Only readings above
    are spikes; readings at zero are the zero-run check's. Files with fewer than
    SPIKE_MIN_READINGS readings are not checked.

    Returns:
        (boolean series over the frame's rows, True for a spike; the ``spike`` finding or None).

    References:
        Hampel, F. R. (1974). The influence curve and its role in robust estimation. JASA
        69(346). Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute
        deviation. JASA 88(424). (From memory.)
    """
    e = frame["energy_kwh"]
    values = e.drop_nulls().to_numpy().astype(float)
    none = pl.Series([False] * frame.height)
    if len(values) < SPIKE_MIN_READINGS:
        return none, None
    med = float(np.median(values))
    scale = MAD_CONSISTENCY * float(np.median(np.abs(values - med)))
    high = float(np.quantile(values, SPIKE_PERCENTILE))
    limit = max(med + SPIKE_MADS * scale, SPIKE_PERCENTILE_FACTOR * high)
    mask = (e > limit).fill_null(False)
    n = int(mask.sum())
    if not n:
        return mask, None
    hit = frame.filter(mask)
    times = local_iso(_stamps(hit, edge), tz)
    # In the file's unit: kW readings are mean demand (kWh x 60 / interval minutes), Wh x 1000.
    shown = {"kW": 60.0 / interval_min if interval_min else None, "Wh": 1000.0}.get(unit)
    if shown is None:
        shown, unit = 1.0, "kWh"
    items = [f"{v * shown:.6g} {unit} at {t}" for t, v in zip(times, hit["energy_kwh"])]
    policy = "left out of the fit"
    return mask, Finding(
        "spike", n, tuple(times[:FIRST_TIMES]), policy,
        f"meter spikes: {_plural(n, 'reading')} above {limit * shown:.6g} {unit} (the larger of "
        "the "
        f"median + {SPIKE_MADS:g} scaled MADs and {SPIKE_PERCENTILE_FACTOR:g} x the 99th "
        f"percentile), {_listed(items, n)}; policy: {policy}",
        starts_utc=tuple(hit["start_utc"].to_list()))


def zero_runs(frame: pl.DataFrame, interval_min: int, edge: str, tz: str) -> Finding | None:
    """Runs of zero readings lasting ZERO_RUN_MIN minutes or more (policy: kept, flagged).

    A run is consecutive intervals (no gap between them) that each read exactly 0.

    Returns:
        A ``zero-run`` finding (count = zero readings in such runs; times = each run's first
        reading), or None.
    """
    need = math.ceil(ZERO_RUN_MIN / interval_min)
    if frame.height < need:
        return None
    zero = (frame["energy_kwh"] == 0).fill_null(False)
    joined = frame["start_utc"] == frame["end_utc"].shift(1)
    new_run = zero & ~(zero.shift(1).fill_null(False) & joined.fill_null(False))
    df = pl.DataFrame({"zero": zero, "run": new_run.cum_sum(), "t": _stamps(frame, edge)})
    runs = (df.filter("zero").group_by("run", maintain_order=True)
            .agg(pl.col("t").first(), pl.len().alias("n")).filter(pl.col("n") >= need))
    if runs.height == 0:
        return None
    times = local_iso(runs["t"], tz)
    items = [f"{k} from {t}" for t, k in zip(times, runs["n"])]
    total = int(runs["n"].sum())
    policy = "kept in the fit but flagged (possible outage or meter fault)"
    return Finding(
        "zero-run", total, tuple(times[:FIRST_TIMES]), policy,
        f"meter zero runs: {_plural(total, 'zero reading')} in {_plural(runs.height, 'run')} of "
        f"{ZERO_RUN_MIN} minutes or longer ({_listed(items, runs.height)}); policy: {policy}")


def validate_frame(frame: pl.DataFrame, interval_min: int, edge: str,
                   tz: str, unit: str = "kWh") -> tuple[pl.DataFrame, list[Finding]]:
    """Gaps, spikes and zero runs of a meter frame; spikes' energy set to null (left out).

    Args:
        frame: start_utc, end_utc [UTC], energy_kwh [kWh], sorted by start, one interval grid.
        unit: the meter file's unit (kWh, Wh or kW): the spike finding states its readings and
            limit in it, as the engineer sees them in the file.

    Returns:
        (the frame with spike readings null, the findings).
    """
    findings = [f for f in (gaps(frame, interval_min, edge, tz),) if f]
    mask, spike = spikes(frame, edge, tz, unit, interval_min)
    if spike:
        findings.append(spike)
        frame = frame.with_columns(pl.when(mask).then(None).otherwise(pl.col("energy_kwh"))
                                   .alias("energy_kwh"))
    zero = zero_runs(frame, interval_min, edge, tz)
    if zero:
        findings.append(zero)
    return frame, findings


# ---------------------------------------------------------------------------------------
# Estimation: only for monthly totals, never for the fit


def estimate_short_gaps(frame: pl.DataFrame, interval_min: int,
                        max_gap: int = ESTIMATE_MAX_GAP) -> pl.DataFrame:
    """Fill runs of at most max_gap missing intervals by linear interpolation.

    Missing means absent from the frame or present with no reading. A run with a reading on
    both sides gets E_k = E_a + (E_b - E_a) x k / (m + 1) for its k-th interval (k = 1..m),
    E_a and E_b the readings before and after. Longer runs, and runs at either end, stay null.
    For monthly totals only: the fit must not see estimated energy.

    Args:
        frame: start_utc, end_utc [UTC], energy_kwh [kWh, null = no reading], sorted, on one
            grid of interval_min.
        interval_min: the interval [min].
        max_gap: the longest run filled [intervals], at least 1.

    Returns:
        Every interval from the first to the last: start_utc, end_utc, energy_kwh, and
        estimated (True where the energy was filled in).

    Raises:
        ValueError: max_gap below 1.
    """
    if max_gap < 1:
        raise ValueError(f"max_gap = {max_gap}: expected at least 1 interval")
    if frame.height == 0:
        return frame.select("start_utc", "end_utc", "energy_kwh").with_columns(
            estimated=pl.lit(False))
    step = dt.timedelta(minutes=interval_min)
    tz = frame["start_utc"].dtype.time_zone  # type: ignore[union-attr]
    grid = pl.datetime_range(frame["start_utc"].min(), frame["start_utc"].max(), step,
                             time_unit=frame["start_utc"].dtype.time_unit,  # type: ignore[union-attr]
                             time_zone=tz, eager=True).alias("start_utc")
    full = (pl.DataFrame(grid).join(frame.select("start_utc", "energy_kwh"), on="start_utc",
                                    how="left")
            .with_columns(end_utc=pl.col("start_utc") + step))
    e = full["energy_kwh"].to_numpy().astype(float)
    missing = np.isnan(e)
    filled = e.copy()
    i = 0
    while i < len(e):
        if not missing[i]:
            i += 1
            continue
        j = i
        while j < len(e) and missing[j]:
            j += 1
        m = j - i
        if i > 0 and j < len(e) and m <= max_gap:
            k = np.arange(1, m + 1)
            filled[i:j] = e[i - 1] + (e[j] - e[i - 1]) * k / (m + 1)
        i = j
    estimated = missing & ~np.isnan(filled)
    return full.select("start_utc", "end_utc").with_columns(
        energy_kwh=pl.Series(filled).fill_nan(None), estimated=pl.Series(estimated))


def monthly_totals(filled: pl.DataFrame, tz: str) -> pl.DataFrame:
    """Monthly metered kWh with the estimated part shown apart, for estimate_short_gaps' output.

    Returns:
        period (YYYY-MM, local), metered_kwh (readings), estimated_kwh (filled intervals),
        total_kwh, estimated_intervals, and estimated (True for a month that holds any
        estimate: mark it).
    """
    local = pl.col("start_utc").dt.convert_time_zone(tz).dt.strftime("%Y-%m")
    return (filled.group_by(local.alias("period"), maintain_order=True).agg(
        pl.col("energy_kwh").filter(~pl.col("estimated")).sum().alias("metered_kwh"),
        pl.col("energy_kwh").filter(pl.col("estimated")).sum().alias("estimated_kwh"),
        pl.col("estimated").sum().cast(pl.Int64).alias("estimated_intervals"))
        .with_columns(total_kwh=pl.col("metered_kwh") + pl.col("estimated_kwh"),
                      estimated=pl.col("estimated_intervals") > 0)
        .sort("period"))
