"""Meter and run-log files (CSV or Parquet) -> polars frames and state segments in UTC.

Row numbers in messages are the file's line numbers for CSV (the header is line 1) and
1-based data rows for Parquet.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl

from disagg.config import (ALLOWED_INTERVALS_MIN, MeterSettings, RunlogSettings, SiteConfig,
                           WeatherSettings)
from disagg.errors import InputError

_OFFSET = re.compile(r"(Z|[+-]\d{2}:?\d{2})$")
_NS_PER_MIN = 60_000_000_000
_ON_WORDS = {"on": 1.0, "off": 0.0, "true": 1.0, "false": 0.0, "1": 1.0, "0": 0.0}


def _row_label(path: Path, index: int) -> str:
    """The user-facing row for a 0-based data index."""
    return f"line {index + 2}" if path.suffix.lower() == ".csv" else f"row {index + 1}"


def read_table(path: Path, what: str) -> pl.DataFrame:
    """Read a CSV (every column as text) or Parquet file.

    Raises:
        InputError: missing file, unknown extension, or a file the reader cannot parse.
    """
    if not path.exists():
        raise InputError(f"{path}: no such {what} file; check the path in the site file")
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            return pl.read_csv(path, infer_schema=False)
        if suffix in (".parquet", ".pq"):
            return pl.read_parquet(path)
    except (pl.exceptions.PolarsError, OSError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{path}: cannot read the {what} file ({first})") from None
    raise InputError(f"{path}: unknown file type {suffix!r}; expected .csv or .parquet")


def require_columns(frame: pl.DataFrame, path: Path, columns: list[str]) -> None:
    """Raise InputError naming the first configured column the file lacks."""
    for col in columns:
        if col not in frame.columns:
            raise InputError(f"{path}: column {col!r} not found; the file has "
                             f"{', '.join(repr(c) for c in frame.columns)}")


def parse_times(frame: pl.DataFrame, column: str, tz: str, path: Path,
                by: pl.Series | None = None) -> pl.Series:
    """Timestamps -> UTC datetimes [us].

    Text with a UTC offset (``2025-03-09T03:15:00-05:00``) is converted directly. Naive text
    is local time in ``tz``. A time in the hour that occurs twice when clocks go back is the
    first occurrence until the times step backwards or repeat inside that hour (in file order,
    within each ``by`` group such as an equipment id), and the second occurrence after that. A time
    that does not exist (clocks skip it) is an error.

    Raises:
        InputError: a time that cannot be parsed or does not exist, naming its row.
    """
    s = frame.get_column(column)
    if s.dtype == pl.Datetime:
        if s.dtype.time_zone is not None:  # type: ignore[union-attr]
            return s.dt.convert_time_zone("UTC").dt.cast_time_unit("us")
        naive = s.dt.cast_time_unit("us")
    else:
        text = s.cast(pl.String).str.strip_chars()
        if text.null_count() or (text == "").any():
            idx = int((text.is_null() | (text == "")).arg_max())  # type: ignore[arg-type]
            raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: empty time; "
                             "expected a date and time such as 2025-03-09T03:15:00")
        first = text[0] if len(text) else ""
        offset = bool(_OFFSET.search(first))
        if offset:
            parsed = text.str.to_datetime(time_zone="UTC", strict=False, time_unit="us")
        else:
            parsed = text.str.to_datetime(strict=False, time_unit="us")
        if parsed.null_count():
            idx = int(parsed.is_null().arg_max())  # type: ignore[arg-type]
            raise InputError(
                f"{path}: {_row_label(path, idx)}, column {column!r}: cannot read time "
                f"{text[idx]!r}; expected the same form as the first row ({first!r})")
        if offset:
            return parsed
        naive = parsed
    early = naive.dt.replace_time_zone(tz, ambiguous="earliest", non_existent="null")
    if early.null_count():
        idx = int(early.is_null().arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: local time "
                         f"{naive[idx]} does not exist in {tz} (clocks skip it); remove the row "
                         "or export times with a UTC offset")
    late = naive.dt.replace_time_zone(tz, ambiguous="latest", non_existent="null")
    df = pl.DataFrame({"t": naive, "e": early, "l": late,
                       "g": by if by is not None else pl.repeat("", len(naive), eager=True)})
    amb = pl.col("e") != pl.col("l")
    # A repeat of the previous time also starts the second pass: hourly exports show the
    # repeated hour as the same clock time twice (01:00 CDT, then 01:00 CST).
    df = df.with_columns(back=(amb & (pl.col("t") <= pl.col("t").shift(1).over("g"))).fill_null(False))
    second = amb & (pl.col("back").cum_sum().over("g", pl.col("t").dt.date()) >= 1)
    local = df.select(pl.when(second).then(pl.col("l")).otherwise(pl.col("e"))).to_series()
    return local.dt.convert_time_zone("UTC")


def _numbers(frame: pl.DataFrame, column: str, path: Path, what: str) -> pl.Series:
    """A column as float64; empty cells become null, anything else unreadable is an error."""
    s = frame.get_column(column)
    if s.dtype.is_numeric():
        return s.cast(pl.Float64)
    text = s.cast(pl.String).str.strip_chars()
    values = text.cast(pl.Float64, strict=False)
    bad = values.is_null() & text.is_not_null() & (text != "")
    if bad.any():
        idx = int(bad.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: {text[idx]!r} "
                         f"is not a number; expected {what}")
    return values


@dataclass
class MeterData:
    """Meter intervals in UTC with their energy.

    frame columns: start_utc, end_utc [datetime, UTC], energy_kwh [kWh, null = no reading].
    """

    frame: pl.DataFrame
    interval_min: int
    path: Path
    rows_read: int
    duplicates_dropped: int = 0
    notes: list[str] = field(default_factory=list)


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


def read_meter(settings: MeterSettings, tz: str) -> MeterData:
    """Read the utility interval meter export.

    Returns:
        Intervals sorted by start, with energy in kWh (kW readings are multiplied by the
        interval length in hours, Wh divided by 1000).

    Raises:
        InputError: missing column, unreadable time or value, negative energy, duplicate
        times with different values, or an interval that is not 1, 5, 10, 15, 30 or 60 min.
    """
    path = settings.file
    raw = read_table(path, "meter")
    require_columns(raw, path, [settings.time_column, settings.value_column])
    times = parse_times(raw, settings.time_column, tz, path)
    values = _numbers(raw, settings.value_column, path, f"energy in {settings.unit}")
    if (values < 0).any():
        idx = int((values < 0).arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {settings.value_column!r}: "
                         f"negative reading {values[idx]:g}; expected energy of 0 or more")
    df = pl.DataFrame({"t": times, "v": values, "row": pl.int_range(len(times), eager=True)})
    # Same time twice: identical readings are one reading; different readings are an error.
    dup = df.filter(pl.col("t").is_duplicated())
    dropped = 0
    if dup.height:
        conflict = dup.group_by("t").agg(pl.col("v").n_unique().alias("n"),
                                         pl.col("row").sort()).filter(pl.col("n") > 1)
        if conflict.height:
            first = conflict.sort(pl.col("row").list.first()).row(0, named=True)
            r0, r1 = first["row"][0], first["row"][1]
            raise InputError(
                f"{path}: {_row_label(path, r1)}, column {settings.time_column!r}: time "
                f"{first['t']} repeats {_row_label(path, r0)} with a different reading; "
                "expected one reading per interval")
        before = df.height
        df = df.unique(subset="t", keep="first", maintain_order=True)
        dropped = before - df.height
    df = df.sort("t")
    interval_min = settings.interval_min or infer_interval_min(df["t"], path, "meter")
    step = pl.duration(minutes=interval_min)
    if settings.stamp == "end":
        df = df.with_columns(start_utc=pl.col("t") - step, end_utc=pl.col("t"))
    else:
        df = df.with_columns(start_utc=pl.col("t"), end_utc=pl.col("t") + step)
    scale = {"kWh": 1.0, "Wh": 1e-3, "kW": interval_min / 60.0}[settings.unit]
    frame = df.select("start_utc", "end_utc", (pl.col("v") * scale).alias("energy_kwh"))
    notes = []
    if dropped:
        notes.append(f"{dropped} repeated meter rows with identical readings were dropped")
    return MeterData(frame, interval_min, path, raw.height, dropped, notes)


@dataclass
class Segments:
    """Piecewise-constant state of one piece of equipment.

    start_ns, end_ns: segment edges [ns since 1970-01-01 UTC], sorted and disjoint;
    value: status 0..1 held over the segment. Time not covered by a segment is unknown.
    """

    start_ns: np.ndarray
    end_ns: np.ndarray
    value: np.ndarray


@dataclass
class RunLog:
    """Every configured equipment's state segments, and what was read."""

    segments: dict[str, Segments]
    path: Path
    rows_read: int
    notes: list[str] = field(default_factory=list)


def _states(frame: pl.DataFrame, column: str, path: Path) -> pl.Series:
    """State words or numbers -> status 0..1 (on/off, 1/0, true/false, or a fraction)."""
    s = frame.get_column(column)
    if s.dtype == pl.Boolean:
        return s.cast(pl.Float64)
    if s.dtype.is_numeric():
        values = s.cast(pl.Float64)
        text = values.cast(pl.String)
    else:
        text = s.cast(pl.String).str.strip_chars().str.to_lowercase()
        words = text.replace_strict(_ON_WORDS, default=None, return_dtype=pl.Float64)
        values = pl.select(pl.coalesce(words, text.cast(pl.Float64, strict=False))).to_series()
    bad = values.is_null() | (values < 0) | (values > 1) | values.is_nan()
    if bad.any():
        idx = int(bad.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: state "
                         f"{s[idx]!r}; expected on/off, 1/0, true/false or a number from 0 to 1")
    return values


def _check_ids(ids: pl.Series, known: list[str], path: Path, column: str) -> None:
    unknown = ~ids.is_in(known)
    if unknown.any():
        idx = int(unknown.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: unknown "
                         f"equipment id {ids[idx]!r}; expected one of the site file's ids "
                         f"({', '.join(known)})")


def _to_segments(df: pl.DataFrame, ids: list[str], end_col: str) -> dict[str, Segments]:
    """Frame with eq, t (start), end and value columns -> per-equipment sorted Segments."""
    out: dict[str, Segments] = {}
    df = df.with_columns(pl.col("t").dt.epoch("ns").alias("s_ns"),
                         pl.col(end_col).dt.epoch("ns").alias("e_ns"))
    parts = {k[0]: g for k, g in df.partition_by("eq", as_dict=True).items()}
    for eq in ids:
        g = parts.get(eq)
        if g is None or g.height == 0:
            empty = np.empty(0, dtype=np.int64)
            out[eq] = Segments(empty, empty.copy(), np.empty(0))
            continue
        g = g.sort("s_ns").filter(pl.col("e_ns") > pl.col("s_ns"))
        out[eq] = Segments(g["s_ns"].to_numpy().astype(np.int64),
                           g["e_ns"].to_numpy().astype(np.int64),
                           g["v"].to_numpy().astype(np.float64))
    return out


def read_runlog(settings: RunlogSettings, site: SiteConfig) -> RunLog:
    """Read the building automation run log in any of the three layouts.

    events: a state holds until that equipment's next event, and the last one until the
    log's last time. samples: a sample holds until the next sample of that column, but at
    most max_hold_minutes; an empty cell is unknown. runtime: run minutes in each log
    interval, spread evenly over it.

    Raises:
        InputError: missing column, unreadable time or state, unknown equipment id,
        two different states for one equipment at one time.
    """
    path = settings.file
    raw = read_table(path, "run log")
    ids = site.equipment_ids()
    tz = site.timezone
    notes: list[str] = []
    if settings.layout == "samples":
        require_columns(raw, path, [settings.time_column])
        present = [c for c in raw.columns if c != settings.time_column]
        for c in present:
            if c not in ids:
                raise InputError(f"{path}: column {c!r} is not a configured equipment id; "
                                 f"expected the time column and columns named {', '.join(ids)}")
        missing = [e for e in ids if e not in present]
        if missing:
            notes.append(f"no run-log column for {', '.join(missing)}: left out as unknown")
        t = parse_times(raw, settings.time_column, tz, path)
        hold = pl.duration(microseconds=int(round(settings.max_hold_min * 60e6)))
        frames = []
        for c in present:
            col = raw.get_column(c)
            text = col.cast(pl.String).str.strip_chars() if not col.dtype.is_numeric() else None
            empty = col.is_null() if text is None else (text.is_null() | (text == ""))
            filled = raw.select(pl.when(empty).then(pl.lit("0")).otherwise(pl.col(c).cast(pl.String)).alias(c))
            v = _states(filled, c, path)
            f = pl.DataFrame({"t": t, "v": v, "empty": empty}).sort("t")
            f = f.with_columns(nxt=pl.col("t").shift(-1))
            f = f.with_columns(end=pl.min_horizontal(pl.col("nxt"), pl.col("t") + hold))
            f = f.filter(~pl.col("empty") & pl.col("end").is_not_null())
            frames.append(f.select(pl.lit(c).alias("eq"), "t", "end", "v"))
        df = pl.concat(frames) if frames else pl.DataFrame(schema={"eq": pl.String, "t": t.dtype, "end": t.dtype, "v": pl.Float64})
        return RunLog(_to_segments(df, ids, "end"), path, raw.height, notes)

    if settings.layout == "events":
        cols = [settings.time_column, settings.equipment_column, settings.state_column]
    else:
        cols = [settings.time_column, settings.equipment_column, settings.minutes_column]
    require_columns(raw, path, cols)  # type: ignore[arg-type]
    eq = raw.get_column(settings.equipment_column).cast(pl.String).str.strip_chars()  # type: ignore[arg-type]
    _check_ids(eq, ids, path, settings.equipment_column)  # type: ignore[arg-type]
    t = parse_times(raw, settings.time_column, tz, path, by=eq)
    if settings.layout == "events":
        v = _states(raw, settings.state_column, path)  # type: ignore[arg-type]
        df = pl.DataFrame({"eq": eq, "t": t, "v": v, "row": pl.int_range(raw.height, eager=True)})
        clash = (df.group_by("eq", "t").agg(pl.col("v").n_unique().alias("n"), pl.col("row").min())
                 .filter(pl.col("n") > 1).sort("row"))
        if clash.height:
            r = clash.row(0, named=True)
            raise InputError(f"{path}: {_row_label(path, r['row'])}: equipment {r['eq']!r} has "
                             f"different states at the same time {r['t']}; expected one state")
        if df.height == 0:
            notes.append(f"{path}: the run log has no rows: every state is unknown")
            return RunLog(_to_segments(df.with_columns(end=pl.col("t")), ids, "end"), path,
                          raw.height, notes)
        log_end = df["t"].max()
        df = (df.unique(subset=["eq", "t"], keep="first").sort("eq", "t")
              .with_columns(end=pl.col("t").shift(-1).over("eq"))
              .with_columns(pl.col("end").fill_null(log_end)))
        missing = [e for e in ids if e not in set(df["eq"].unique().to_list())]
        if missing:
            notes.append(f"no run-log events for {', '.join(missing)}: left out as unknown")
        return RunLog(_to_segments(df, ids, "end"), path, raw.height, notes)

    minutes = _numbers(raw, settings.minutes_column, path, "run minutes")  # type: ignore[arg-type]
    df = pl.DataFrame({"eq": eq, "t": t, "m": minutes}).filter(pl.col("m").is_not_null())
    step_min = settings.interval_min or infer_interval_min(df["t"].unique(), path, "run-log")
    if ((df["m"] < 0) | (df["m"] > step_min)).any():
        idx = int(((minutes < 0) | (minutes > step_min)).arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {settings.minutes_column!r}: "
                         f"{minutes[idx]:g} run minutes; expected 0 to {step_min} per interval")
    step = pl.duration(minutes=step_min)
    if settings.stamp == "end":
        df = df.with_columns(end=pl.col("t"), t=pl.col("t") - step)
    else:
        df = df.with_columns(end=pl.col("t") + step)
    df = df.with_columns(v=pl.col("m") / step_min).unique(subset=["eq", "t"], keep="first")
    return RunLog(_to_segments(df, ids, "end"), path, raw.height, notes)


def read_weather(settings: WeatherSettings, tz: str) -> pl.DataFrame:
    """Outdoor temperature readings -> frame t (UTC) and temp_c [degC], sorted by time.

    Empty cells are unknown and dropped. Raises InputError for a missing column, an
    unreadable time or temperature, or the same time twice with different readings.
    """
    path = settings.file
    raw = read_table(path, "weather")
    require_columns(raw, path, [settings.time_column, settings.temp_column])
    t = parse_times(raw, settings.time_column, tz, path)
    temp = _numbers(raw, settings.temp_column, path, f"a temperature in {settings.unit}")
    if settings.unit == "F":
        temp = (temp - 32.0) * 5.0 / 9.0
    df = pl.DataFrame({"t": t, "temp_c": temp, "row": pl.int_range(raw.height, eager=True)})
    clash = (df.group_by("t").agg(pl.col("temp_c").n_unique().alias("n"), pl.col("row").min())
             .filter(pl.col("n") > 1).sort("row"))
    if clash.height:
        r = clash.row(0, named=True)
        raise InputError(f"{path}: {_row_label(path, r['row'])}, column "
                         f"{settings.time_column!r}: time {r['t']} appears twice with different "
                         "temperatures; expected one reading per time")
    return (df.drop_nulls("temp_c").unique(subset="t", keep="first").sort("t")
            .select("t", "temp_c"))
