"""The utility interval meter export (CSV, Parquet or Green Button XML) -> meter intervals in UTC."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from disagg.errors import InputError
from disagg.inputs import vee
from disagg.inputs.config import (
    ALLOWED_INTERVALS_MIN,
    REGISTER_UNIT,
    MeterSettings,
)
from disagg.inputs.readers.greenbutton import _greenbutton_frame
from disagg.inputs.readers.tables import (
    _OFFSET,
    _numbers,
    _row_label,
    parse_times,
    read_table,
    repeated_hour_hint,
    require_columns,
)


@dataclass
class MeterData:
    """Meter intervals in UTC with their energy.

    frame columns: start_utc, end_utc [datetime, UTC], energy_kwh [kWh, null = no reading].
    findings: the meter validation's findings (disagg.inputs.vee.Finding), in the order checked.
    """

    frame: pl.DataFrame
    interval_min: int
    path: Path
    rows_read: int
    duplicates_dropped: int = 0
    notes: list[str] = field(default_factory=list)
    findings: list = field(default_factory=list)


def infer_interval_min(starts: pl.Series, path: Path, what: str) -> int:
    """Most common spacing between sorted times [min], which must be an allowed interval."""
    diffs = starts.sort().diff().drop_nulls().dt.total_seconds()
    diffs = diffs.filter(diffs > 0)
    if diffs.len() == 0:
        raise InputError(f"{path}: fewer than two distinct times; cannot infer the {what} "
                         "interval; set interval_minutes in the site file")
    mode_s = float(diffs.mode().sort()[0])
    if mode_s % 60 or int(mode_s // 60) not in ALLOWED_INTERVALS_MIN:
        raise InputError(f"{path}: the {what} interval is {mode_s / 60:g} minutes; expected one of "
                         f"{', '.join(map(str, ALLOWED_INTERVALS_MIN))} minutes")
    return int(mode_s // 60)


def _check_stated_interval(times: pl.Series, path: Path, stated_min: int) -> None:
    """interval_minutes must agree with the readings' most common spacing: 5 on 15-minute
    data would make every draw about 3 times too high.

    Raises:
        InputError: naming both values.
    """
    diffs = times.sort().diff().drop_nulls().dt.total_seconds()
    diffs = diffs.filter(diffs > 0)
    if diffs.len() == 0:
        return
    mode_s = float(diffs.mode().sort()[0])
    if mode_s != stated_min * 60:
        raise InputError(f"{path}: the readings are {mode_s / 60:g} minutes apart (the most "
                         f"common spacing) but the site file sets interval_minutes = "
                         f"{stated_min}; remove interval_minutes or correct it")


def _naive_times(frame: pl.DataFrame, column: str) -> bool:
    """True when the time column holds naive local times (parse_times' rule)."""
    s = frame.get_column(column)
    if s.dtype == pl.Datetime:
        return s.dtype.time_zone is None  # type: ignore[union-attr]
    text = s.cast(pl.String).str.strip_chars().drop_nulls()
    return not (len(text) and _OFFSET.search(text[0]))


def read_meter(settings: MeterSettings, tz: str, on_duplicate: str = "error") -> MeterData:
    """Read the utility interval meter export and validate it (disagg.inputs.vee).

    A .xml file is a Green Button download (see read_greenbutton); its intervals get the
    same checks. A ``kWh-register`` file holds cumulative register readings; each interval's
    energy is the difference from the reading one interval earlier, times the multiplier,
    across a rollover when register_digits is set (disagg.inputs.vee.register_energy).

    Findings (disagg.inputs.vee.Finding, one line each with times, count and policy): duplicate
    times, readings off the interval grid (left out), register rollovers, the daylight-saving
    hours of a file in naive local time, gaps (left out, not filled), spikes (left out: their
    energy is null) and long zero runs (kept, flagged).

    Args:
        on_duplicate: different readings at one time are an error (``error``), or the first
            (``keep-first``) or last (``keep-last``) such row in the file is kept.

    Returns:
        Intervals sorted by start, with energy in kWh (kW readings are multiplied by the
        interval length in hours, Wh divided by 1000), and the findings.

    Raises:
        InputError: missing column, unreadable time or value, negative energy, duplicate
        times with different values (with on_duplicate = error), an interval that is not 1, 5,
        10, 15, 30 or 60 min, or a register that decreases without register_digits.
        ConfigError: on_duplicate is not one of error, keep-first, keep-last.
    """
    vee.check_on_duplicate(on_duplicate)
    if settings.file.suffix.lower() == ".xml":
        gb = _read_greenbutton_meter(settings)
        gb.frame, findings = vee.validate_frame(gb.frame, gb.interval_min, "start", tz)
        gb.findings = findings
        return gb
    path = settings.file
    raw = read_table(path, "meter", [settings.time_column, settings.value_column])
    require_columns(raw, path, [settings.time_column, settings.value_column])
    if raw.height == 0:
        raise InputError(f"{path}: no readings: the file has its header line but no data rows; "
                         "expected one reading per line below the header")
    times = parse_times(raw, settings.time_column, tz, path, date_order=settings.date_order,
                        setting="[meter] date_order")
    values = _numbers(raw, settings.value_column, path, f"energy in {settings.unit}")
    negative = vee.negative_readings(
        values, lambda i: f"{path}: {_row_label(path, i)}, column {settings.value_column!r}")
    if negative:
        raise InputError(negative.message)
    df = pl.DataFrame({"t": times, "v": values, "row": pl.int_range(len(times), eager=True)})
    rows_read = df.height
    df, findings = vee.resolve_duplicates(
        df, on_duplicate, tz,
        lambda t, r0, r1: (f"{path}: {_row_label(path, r1)}, column {settings.time_column!r}: "
                           f"time {t} repeats {_row_label(path, r0)} with a different reading; "
                           f"expected one reading per interval{repeated_hour_hint(t, tz)}"))
    dropped = rows_read - df.height
    df = df.sort("t")
    interval_min = settings.interval_min or infer_interval_min(df["t"], path, "meter")
    if settings.interval_min is not None:
        _check_stated_interval(df["t"], path, settings.interval_min)
    stamp = settings.stamp or "end"
    off = vee.off_interval(df["t"], interval_min, stamp)
    finding = vee.off_interval_finding(df["t"], off, interval_min, stamp, tz)
    if finding:
        findings.append(finding)
        df = df.filter(~off)
    if settings.unit == REGISTER_UNIT:
        energy, finding = vee.register_energy(
            df["t"], df["v"], interval_min, settings.register_digits, settings.multiplier, tz,
            df["row"], lambda i: _row_label(path, i),
            f"{path}: {{}}, column {settings.value_column!r}")
        findings += [finding] if finding else []
        # The first reading only starts the count: no interval ends there.
        df = df.with_columns(v=energy).slice(1)
        scale = 1.0
    else:
        scale = {"kWh": 1.0, "Wh": 1e-3, "kW": interval_min / 60.0}[settings.unit]
    if _naive_times(raw, settings.time_column):
        findings += vee.dst_hours(df["t"], tz, interval_min)
    step = pl.duration(minutes=interval_min)
    if stamp == "end":
        df = df.with_columns(start_utc=pl.col("t") - step, end_utc=pl.col("t"))
    else:
        df = df.with_columns(start_utc=pl.col("t"), end_utc=pl.col("t") + step)
    frame = df.select("start_utc", "end_utc", (pl.col("v") * scale).alias("energy_kwh"))
    frame, more = vee.validate_frame(frame, interval_min, stamp, tz, settings.unit or "kWh")
    notes = [f.replaces for f in findings if f.replaces]
    return MeterData(frame, interval_min, path, rows_read, dropped, notes, findings + more)


def _read_greenbutton_meter(settings: MeterSettings) -> MeterData:
    """read_meter for a Green Button .xml file: the same checks as for CSV."""
    path = settings.file
    df = _greenbutton_frame(path)
    negative = (df["energy_kwh"] < 0).fill_null(False)
    if negative.any():
        r = df.row(int(negative.arg_max()), named=True)  # type: ignore[arg-type]
        raise InputError(f"{path}: IntervalReading {r['reading']}: negative value {r['value']}; "
                         "expected energy of 0 or more")
    mode_s = int(df["duration_s"].mode().sort()[0])
    if mode_s % 60 or mode_s // 60 not in ALLOWED_INTERVALS_MIN:
        raise InputError(f"{path}: the meter interval is {mode_s / 60:g} minutes (readings of "
                         f"{mode_s} s); expected one of "
                         f"{', '.join(map(str, ALLOWED_INTERVALS_MIN))} minutes")
    odd = df["duration_s"] != mode_s
    if odd.any():
        r = df.row(int(odd.arg_max()), named=True)  # type: ignore[arg-type]
        raise InputError(f"{path}: IntervalReading {r['reading']}: duration {r['duration_s']} s; "
                         f"expected {mode_s} s like the file's other readings (one interval "
                         "length per meter file)")
    interval_min = mode_s // 60
    if settings.interval_min is not None and settings.interval_min != interval_min:
        raise InputError(f"{path}: the readings last {interval_min} minutes but the site file "
                         f"sets interval_minutes = {settings.interval_min}; remove "
                         "interval_minutes or correct it")
    # Same start twice: identical readings are one reading; different readings are an error.
    rows_read = df.height
    dup = df.filter(pl.col("start_utc").is_duplicated())
    if dup.height:
        conflict = (dup.group_by("start_utc")
                    .agg(pl.col("energy_kwh").n_unique().alias("n"), pl.col("reading").sort())
                    .filter(pl.col("n") > 1))
        if conflict.height:
            first = conflict.sort(pl.col("reading").list.first()).row(0, named=True)
            raise InputError(
                f"{path}: IntervalReading {first['reading'][1]}: start {first['start_utc']} "
                f"repeats IntervalReading {first['reading'][0]} with a different reading; "
                "expected one reading per interval")
        df = df.unique(subset="start_utc", keep="first", maintain_order=True)
    dropped = rows_read - df.height
    frame = df.sort("start_utc").select("start_utc", "end_utc", "energy_kwh")
    notes = []
    if dropped:
        notes.append(f"{dropped} repeated meter IntervalReadings with identical values were "
                     "dropped")
    return MeterData(frame, interval_min, path, rows_read, dropped, notes)
