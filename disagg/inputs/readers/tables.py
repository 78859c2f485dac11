"""Generic reading of CSV and Parquet tables: columns, times, numbers, with row numbers in messages."""

from __future__ import annotations

import re
from pathlib import Path

import polars as pl

from disagg.errors import InputError

_OFFSET = re.compile(r"(Z|[+-]\d{2}:?\d{2})$")
_NS_PER_MIN = 60_000_000_000
_ON_WORDS = {"on": 1.0, "off": 0.0, "true": 1.0, "false": 0.0, "1": 1.0, "0": 0.0}


def _row_label(path: Path, index: int) -> str:
    """The user-facing row for a 0-based data index."""
    return f"line {index + 2}" if path.suffix.lower() == ".csv" else f"row {index + 1}"


def read_table(path: Path, what: str, columns: list[str] | None = None) -> pl.DataFrame:
    """Read a CSV (every column as text) or Parquet file.

    Args:
        columns: read only these (a lazy polars scan that skips the others, so a trend export
            with many unused columns costs no memory for them); None = every column.

    Raises:
        InputError: missing file, unknown extension, a missing column, or a file the reader
        cannot parse.
    """
    try:
        exists = path.is_file()
    except (OSError, ValueError) as exc:  # e.g. a name too long for the file system
        raise InputError(f"{path}: cannot use this {what} file path ({exc})") from None
    if not exists:
        raise InputError(f"{path}: no such {what} file; check the path in the site file")
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            lazy = pl.scan_csv(path, infer_schema=False)
        elif suffix in (".parquet", ".pq"):
            lazy = pl.scan_parquet(path)
        else:
            lazy = None
        if lazy is not None:
            if columns is None:
                return lazy.collect()
            names = lazy.collect_schema().names()
            for col in columns:
                if col not in names:
                    raise InputError(f"{path}: column {col!r} not found; the file has "
                                     f"{', '.join(repr(c) for c in names)}")
            return lazy.select(list(dict.fromkeys(columns))).collect()
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


_OFFSET_FORM = re.compile(r"^([+-])(\d{2}):(\d{2})$")


def _parse_offset_times(text: pl.Series) -> pl.Series | None:
    """UTC datetimes [us] of text that is all in the form 2025-03-09T03:15:00-05:00 (or with a
    space for the T), or None (then the general parser decides, and reports bad rows).

    Four times faster than polars' inference on such text: the wall-clock part is parsed
    with a fixed format, the few distinct offsets once each.
    """
    first = text[0] if len(text) else ""
    if len(first) != 25 or first[10] not in "T ":
        return None
    if not (text.str.len_bytes() == 25).all():
        return None
    fmt = f"%Y-%m-%d{first[10]}%H:%M:%S"
    wall = text.str.slice(0, 19).str.to_datetime(fmt, strict=False, time_unit="us")
    if wall.null_count():
        return None
    offsets = text.str.slice(19)
    distinct = offsets.unique().to_list()
    minutes = []
    for o in distinct:
        m = _OFFSET_FORM.match(o or "")
        if m is None or int(m.group(2)) > 14 or int(m.group(3)) > 59:
            return None
        minutes.append((-1 if m.group(1) == "-" else 1) * (int(m.group(2)) * 60 + int(m.group(3))))
    shift_us = offsets.replace_strict(distinct, minutes, return_dtype=pl.Int64) * 60_000_000
    return pl.from_epoch(wall.dt.epoch("us") - shift_us, time_unit="us").dt.replace_time_zone("UTC")


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
        if s.null_count():
            idx = int(s.is_null().arg_max())  # type: ignore[arg-type]
            raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: empty time; "
                             "expected a date and time such as 2025-03-09T03:15:00")
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
        fast = _parse_offset_times(text) if offset else None
        if fast is not None:
            return fast
        try:
            if offset:
                parsed = text.str.to_datetime(time_zone="UTC", strict=False, time_unit="us")
            else:
                parsed = text.str.to_datetime(strict=False, time_unit="us")
        except pl.exceptions.ComputeError:  # polars found no date form in the first rows
            raise InputError(f"{path}: {_row_label(path, 0)}, column {column!r}: cannot read "
                             f"time {first!r}; expected a date and time such as "
                             "2025-03-09T03:15:00") from None
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
    if not (early != late).any():
        # No time in a repeated hour: nothing to resolve (and no large frame to build).
        return early.dt.convert_time_zone("UTC")
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
        values = s.cast(pl.Float64)
        if values.is_nan().any():
            idx = int(values.is_nan().arg_max())  # type: ignore[arg-type]
            raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: NaN is not a "
                             f"number; expected {what}")
        return values
    text = s.cast(pl.String).str.strip_chars()
    values = text.cast(pl.Float64, strict=False)
    bad = (values.is_null() & text.is_not_null() & (text != "")) | values.is_nan()
    if bad.any():
        idx = int(bad.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: {text[idx]!r} "
                         f"is not a number; expected {what}")
    return values
