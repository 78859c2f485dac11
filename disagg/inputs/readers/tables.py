"""Generic reading of CSV and Parquet tables: columns, times, numbers, with row numbers in messages."""

from __future__ import annotations

import datetime as dt
import os
import re
from pathlib import Path

import polars as pl

from disagg.errors import InputError
from disagg.inputs.paths import special_kind

_OFFSET = re.compile(r"(Z|[+-]\d{2}:?\d{2})$")
_NS_PER_MIN = 60_000_000_000
_ON_WORDS = {"on": 1.0, "off": 0.0, "true": 1.0, "false": 0.0, "1": 1.0, "0": 0.0}


def _row_label(path: Path, index: int) -> str:
    """The user-facing row for a 0-based data index."""
    return f"line {index + 2}" if path.suffix.lower() == ".csv" else f"row {index + 1}"


def first_non_utf8(path: Path, chunk_bytes: int = 1 << 20) -> tuple[int, int] | None:
    """(line number, byte value) of the first byte that is not UTF-8 text, None when the whole
    file is; read a chunk at a time (a character split between chunks is carried over)."""
    line, carry = 1, b""
    with path.open("rb") as f:
        while True:
            chunk = f.read(chunk_bytes)
            data = carry + chunk
            if not data:
                return None
            try:
                data.decode("utf-8")
                carry = b""
                line += data.count(b"\n")
            except UnicodeDecodeError as exc:
                if exc.reason == "unexpected end of data" and chunk:
                    carry = data[exc.start:]
                    line += data[:exc.start].count(b"\n")
                else:
                    return line + data[:exc.start].count(b"\n"), data[exc.start]
            if not chunk:
                return None


def _encoding_error(path: Path, what: str) -> InputError | None:
    """The error for a file that is not UTF-8 text (None when it is, or cannot be read)."""
    try:
        bad = first_non_utf8(path)
    except OSError:
        return None
    if bad is None:
        return None
    line, byte = bad
    try:
        with path.open("rb") as f:
            head = f.read(2)
    except OSError:
        head = b""
    # A UTF-16 file starts with its byte order mark FF FE or FE FF (Unicode Standard, sec. 23.8).
    maybe = ("it is UTF-16 text" if head in (b"\xff\xfe", b"\xfe\xff")
             else "it may be Latin-1 or Windows-1252")
    return InputError(f"{path}: line {line}: byte 0x{byte:02X} is not UTF-8 text; expected a "
                      f"UTF-8 {what} file ({maybe}): export or save it as UTF-8")


def existing_file(path: Path, what: str) -> None:
    """Raise InputError unless path is an existing regular file: a missing one, or a FIFO
    (reading it would block forever), device (read until memory runs out), socket or folder,
    named as such (paths.special_kind, as config.check_regular_file for the site file)."""
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise InputError(f"{path}: no such {what} file; check the path in the site file") from None
    except (OSError, ValueError) as exc:  # a name too long, a symbolic link loop, ...
        why = getattr(exc, "strerror", None) or exc
        raise InputError(f"{path}: cannot use this {what} file path ({why})") from None
    kind = special_kind(mode)
    if kind is not None:
        raise InputError(f"{path}: is {kind}, not a file; give the {what} file itself")


def read_table(path: Path, what: str, columns: list[str] | None = None) -> pl.DataFrame:
    """Read a CSV (every column as text) or Parquet file.

    Args:
        columns: read only these (a lazy polars scan that skips the others, so a trend export
            with many unused columns costs no memory for them); None = every column.

    Raises:
        InputError: missing file, unknown extension, a missing column, or a file the reader
        cannot parse.
    """
    existing_file(path, what)
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
                    if suffix == ".csv" and any("\ufffd" in c for c in names):
                        raise _encoding_error(path, what) or InputError(
                            f"{path}: column {col!r} not found; the file has "
                            f"{', '.join(repr(c) for c in names)}")
                    raise InputError(f"{path}: column {col!r} not found; the file has "
                                     f"{', '.join(repr(c) for c in names)}")
            if suffix != ".csv":
                schema = lazy.collect_schema()
                for col in columns:
                    if schema[col].is_nested():
                        raise InputError(f"{path}: column {col!r} holds {schema[col]} values; "
                                         "expected one number or text per row")
            return lazy.select(list(dict.fromkeys(columns))).collect()
    except (pl.exceptions.PolarsError, OSError) as exc:
        if suffix == ".csv" and "utf-8" in str(exc).lower().replace("utf8", "utf-8"):
            encoding = _encoding_error(path, what)
            if encoding is not None:
                raise encoding from None
        if suffix == ".csv" and "more fields" in str(exc):
            long_row = _first_long_row(path, what)
            if long_row is not None:
                raise long_row from None
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{path}: cannot read the {what} file ({first})") from None
    raise InputError(f"{path}: unknown file type {suffix!r}; expected .csv or .parquet")


def _first_long_row(path: Path, what: str) -> InputError | None:
    """The error naming the first line with more fields than the header (read again with
    the csv module, only after the fast reader failed), or None when none is found."""
    import csv

    try:
        with path.open(newline="", encoding="utf-8", errors="replace") as f:
            rows = csv.reader(f)
            header = next(rows, None)
            if header is None:
                return None
            for row in rows:
                if len(row) > len(header):
                    return InputError(
                        f"{path}: line {rows.line_num}: {len(row)} fields where the header has "
                        f"{len(header)}; expected a {what} file with one value per column (a "
                        "comma in a value must be inside double quotes)")
    except (OSError, csv.Error):
        return None
    return None


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
    # Without polars' cache of parsed strings: a log's times are nearly all distinct, and
    # hashing each one costs as much as parsing it (22 -> 12 ms on 320,000 rows).
    wall = text.str.slice(0, 19).str.to_datetime(fmt, strict=False, time_unit="us", cache=False)
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
    # Each row's shift [us], matched against the few distinct offsets (a when-chain: about
    # five times faster than replace_strict on a 320,000-row log, the same numbers).
    shift = pl.when(pl.lit(offsets) == distinct[0]).then(pl.lit(minutes[0] * 60_000_000))
    for o, m in zip(distinct[1:], minutes[1:]):
        shift = shift.when(pl.lit(offsets) == o).then(pl.lit(m * 60_000_000))
    shift_us = pl.select(shift.otherwise(None).cast(pl.Int64)).to_series()
    return pl.from_epoch(wall.dt.epoch("us") - shift_us, time_unit="us").dt.replace_time_zone("UTC")


def repeated_hour_hint(t, tz: str) -> str:
    """"; ..." naming the hour the clocks repeat when they go back, when the UTC time t falls
    in it in the zone tz (two rows there with local times without their UTC offset read as
    one time), else ""."""
    import zoneinfo

    try:
        zone = zoneinfo.ZoneInfo(tz)
        wall = t.astimezone(zone).replace(tzinfo=None)
    except (AttributeError, ValueError, OverflowError, zoneinfo.ZoneInfoNotFoundError):
        return ""
    if (wall.replace(tzinfo=zone, fold=0).utcoffset()
            == wall.replace(tzinfo=zone, fold=1).utcoffset()):
        return ""
    return (f"; {wall:%Y-%m-%d %H:%M} local time occurs twice on the day the clocks go back "
            f"({tz}): give times with their UTC offset (such as "
            f"{wall.replace(tzinfo=zone, fold=1).isoformat()}) or in UTC")


# Times outside these years are typing or export errors, and beyond them the nanosecond
# times of the alignment (numpy datetime64[ns]: years 1678 to 2261) would overflow.
FIRST_YEAR, LAST_YEAR = 1900, 2199


def parse_times(frame: pl.DataFrame, column: str, tz: str, path: Path,
                by: pl.Series | None = None, date_order: str | None = None,
                setting: str = "date_order") -> pl.Series:
    """_parse_times, and every time within the years FIRST_YEAR to LAST_YEAR.

    Raises:
        InputError: as _parse_times, or a time outside those years, naming its row.
    """
    times = _parse_times(frame, column, tz, path, by, date_order, setting)
    # The UTC years FIRST_YEAR to LAST_YEAR as a range of times (comparing the times costs
    # far less than taking each one's year).
    outside = ((times < dt.datetime(FIRST_YEAR, 1, 1, tzinfo=dt.timezone.utc))
               | (times >= dt.datetime(LAST_YEAR + 1, 1, 1, tzinfo=dt.timezone.utc)))
    if outside.any():
        idx = int(outside.arg_max())  # type: ignore[arg-type]
        # The time as the file has it (not converted to UTC), when it is text.
        written = frame[column][idx] if frame[column].dtype == pl.String else times[idx]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: time "
                         f"{written} is outside the years {FIRST_YEAR} to {LAST_YEAR}; "
                         "expected a date and time such as 2025-03-09T03:15:00")
    return times


DATE_ORDERS = ("ymd", "mdy", "dmy")
# A date written with numbers: 2024-10-13, 10/13/2024, 13.10.2024, 10/13/24 (then the rest).
_NUMERIC_DATE = r"^(\d{1,4})[/.\-](\d{1,2})[/.\-](\d{1,4})(.*)$"
_ORDER_WORDS = {"ymd": "year-month-day", "mdy": "month/day/year", "dmy": "day/month/year"}


def _ymd_text(text: pl.Series, column: str, path: Path, date_order: str | None,
              setting: str) -> pl.Series:
    """Numeric dates in any order rewritten year first (2024-10-13 ...), the rest unchanged.

    With date_order None the order is decided from the whole column: a 4-digit first part is
    year first; otherwise a first part above 12 somewhere means day first, a second part above
    12 somewhere means month first, and a column where neither happens (every day 12 or less)
    is refused as ambiguous, naming the setting that decides it. Rows that are not numeric
    dates stay as they are (the general parser then reports them).
    """
    first = text[0] if len(text) else ""
    if date_order is None:
        head = re.match(r"^(\d+)[/.\-]", first)
        if head is None or len(head.group(1)) == 4:
            return text  # year first (ISO) or not a numeric date: the general parser decides
    elif date_order == "ymd":
        return text
    parts = text.str.extract_groups(_NUMERIC_DATE)
    a = parts.struct.field("1").cast(pl.Int64, strict=False)
    b = parts.struct.field("2").cast(pl.Int64, strict=False)
    matched = a.is_not_null()
    order = date_order
    if order is None:
        a_big, b_big = (a > 12) & matched, (b > 12) & matched
        if a_big.any() and b_big.any():
            i, j = int(a_big.arg_max()), int(b_big.arg_max())  # type: ignore[arg-type]
            raise InputError(
                f"{path}: column {column!r}: the dates are neither all month/day/year "
                f"({_row_label(path, i)}: {text[i]!r}) nor all day/month/year "
                f"({_row_label(path, j)}: {text[j]!r}); expected one date order in the column")
        if a_big.any():
            order = "dmy"
        elif b_big.any():
            order = "mdy"
        elif (a.filter(matched) == b.filter(matched)).all():
            order = "mdy"  # every date has its month equal to its day: both orders agree
        else:
            raise InputError(
                f"{path}: column {column!r}: dates such as {first!r} can be read month first "
                "or day first (no day above 12 in the file); set "
                f"{setting} = \"mdy\" (10/13/2024) or \"dmy\" (13/10/2024) in the site file")
    y = parts.struct.field("3")
    month, day = (a, b) if order == "mdy" else (b, a)
    year = pl.Series(y).cast(pl.Int64, strict=False)
    year = pl.select(pl.when(pl.lit(y).str.len_chars() == 2).then(pl.lit(year) + 2000)
                     .when(pl.lit(y).str.len_chars() == 4).then(pl.lit(year))
                     .otherwise(None)).to_series()
    iso = pl.select(pl.format("{}-{}-{}{}", pl.lit(year).cast(pl.String).str.zfill(4),
                              pl.lit(month).cast(pl.String).str.zfill(2),
                              pl.lit(day).cast(pl.String).str.zfill(2),
                              pl.lit(parts.struct.field("4")))).to_series()
    good = matched & year.is_not_null() & (month >= 1) & (month <= 12) & (day >= 1) & (day <= 31)
    if not good.all():
        i = int((~good.fill_null(False)).arg_max())  # type: ignore[arg-type]
        how = (f"({setting} = \"{order}\")" if date_order is not None
               else "(the order of the column's other dates)")
        raise InputError(f"{path}: {_row_label(path, i)}, column {column!r}: cannot read time "
                         f"{text[i]!r}; expected a {_ORDER_WORDS[order]} date {how} such as "
                         f"{first!r}")
    return iso


def _parse_times(frame: pl.DataFrame, column: str, tz: str, path: Path,
                 by: pl.Series | None = None, date_order: str | None = None,
                 setting: str = "date_order") -> pl.Series:
    """Timestamps -> UTC datetimes [us].

    Text with a UTC offset (``2025-03-09T03:15:00-05:00``) is converted directly. Naive text
    is local time in ``tz``. A time in the hour that occurs twice when clocks go back is the
    first occurrence until the times step backwards or repeat inside that hour (in file order,
    within each ``by`` group such as an equipment id), and the second occurrence after that. A time
    that does not exist (clocks skip it) is an error.

    Dates written with numbers in another order than year first (``10/13/2024 00:15``) are
    read in ``date_order`` (``ymd``, ``mdy`` or ``dmy``), or, when it is None, in the one order
    that fits the whole column (see _ymd_text); a ``date_order`` holding ``%`` is a format
    string (chrono/strftime codes, such as ``%m/%d/%Y %I:%M %p``) for the whole time.
    ``setting`` names the site-file setting in messages (``[meter] date_order``).

    Raises:
        InputError: a time that cannot be parsed or does not exist, naming its row; a column
        whose date order cannot be decided.
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
        if date_order is not None and "%" in date_order:
            return _formatted_times(text, column, tz, path, date_order, setting, by)
        shown = text  # messages quote the file's own text
        text = _ymd_text(text, column, path, date_order, setting)
        first = shown[0] if len(shown) else ""
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
                f"{shown[idx]!r}; expected the same form as the first row ({first!r})")
        if offset:
            return parsed
        naive = parsed
    return _localize(naive, column, tz, path, by)


def _formatted_times(text: pl.Series, column: str, tz: str, path: Path, fmt: str,
                     setting: str, by: pl.Series | None) -> pl.Series:
    """Times read with the site file's format string; naive ones are local time in tz."""
    try:
        parsed = text.str.to_datetime(fmt, strict=False, time_unit="us")
    except pl.exceptions.PolarsError as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise InputError(f"{path}: column {column!r}: cannot read the times with {setting} = "
                         f"{fmt!r} ({first})") from None
    if parsed.null_count():
        idx = int(parsed.is_null().arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: cannot read time "
                         f"{text[idx]!r}; expected the form {setting} = {fmt!r}")
    if parsed.dtype.time_zone is not None:  # type: ignore[union-attr]
        return parsed.dt.convert_time_zone("UTC")
    return _localize(parsed, column, tz, path, by)


def _localize(naive: pl.Series, column: str, tz: str, path: Path,
              by: pl.Series | None) -> pl.Series:
    """Naive local times in tz -> UTC (parse_times' rule for the repeated and skipped hours)."""
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
        return _bounded(values, column, path, what)
    text = s.cast(pl.String).str.strip_chars()
    values = text.cast(pl.Float64, strict=False)
    bad = (values.is_null() & text.is_not_null() & (text != "")) | values.is_nan()
    if bad.any():
        idx = int(bad.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: {text[idx]!r} "
                         f"is not a number; expected {what}")
    return _bounded(values, column, path, what)


# Largest magnitude of a number read from an input file: a 15-digit register (the most a
# float64 holds exactly) fits; anything larger, or infinite, is a corrupt cell and would
# overflow the fit's sums of squares.
MAX_INPUT_NUMBER = 1e15


def _bounded(values: pl.Series, column: str, path: Path, what: str) -> pl.Series:
    """values, unless one is infinite or beyond MAX_INPUT_NUMBER (an InputError naming it)."""
    big = (values.abs() > MAX_INPUT_NUMBER).fill_null(False)
    if big.any():
        idx = int(big.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: {values[idx]!r} "
                         f"is too large (more than {MAX_INPUT_NUMBER:g} in size); expected {what}")
    return values
