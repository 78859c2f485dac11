"""Meter and run-log files (CSV or Parquet) -> polars frames and state segments in UTC.

Row numbers in messages are the file's line numbers for CSV (the header is line 1) and
1-based data rows for Parquet. A meter file may also be a Green Button (NAESB ESPI) .xml
download, whose readings are named by position ("IntervalReading 17").
"""

from __future__ import annotations

import datetime as dt
import difflib
import math
import re
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl

from disagg import vee
from disagg.config import (
    ALLOWED_INTERVALS_MIN,
    REGISTER_UNIT,
    MeterSettings,
    RunlogSettings,
    SiteConfig,
    WeatherSettings,
)
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


@dataclass
class MeterData:
    """Meter intervals in UTC with their energy.

    frame columns: start_utc, end_utc [datetime, UTC], energy_kwh [kWh, null = no reading].
    findings: the meter validation's findings (disagg.vee.Finding), in the order checked.
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


def _naive_times(frame: pl.DataFrame, column: str) -> bool:
    """True when the time column holds naive local times (parse_times' rule)."""
    s = frame.get_column(column)
    if s.dtype == pl.Datetime:
        return s.dtype.time_zone is None  # type: ignore[union-attr]
    text = s.cast(pl.String).str.strip_chars().drop_nulls()
    return not (len(text) and _OFFSET.search(text[0]))


def read_meter(settings: MeterSettings, tz: str, on_duplicate: str = "error") -> MeterData:
    """Read the utility interval meter export and validate it (disagg.vee).

    A .xml file is a Green Button download (see read_greenbutton); its intervals get the
    same checks. A ``kWh-register`` file holds cumulative register readings; each interval's
    energy is the difference from the reading one interval earlier, times the multiplier,
    across a rollover when register_digits is set (disagg.vee.register_energy).

    Findings (disagg.vee.Finding, one line each with times, count and policy): duplicate
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
    times = parse_times(raw, settings.time_column, tz, path)
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
                           "expected one reading per interval"))
    dropped = rows_read - df.height
    df = df.sort("t")
    interval_min = settings.interval_min or infer_interval_min(df["t"], path, "meter")
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
    frame, more = vee.validate_frame(frame, interval_min, stamp, tz)
    notes = [f.replaces for f in findings if f.replaces]
    return MeterData(frame, interval_min, path, rows_read, dropped, notes, findings + more)


# ---------------------------------------------------------------------------------------
# Green Button (NAESB REQ.21 ESPI) interval-data XML

ATOM_NS = "http://www.w3.org/2005/Atom"
ESPI_NS = "http://naesb.org/espi"
# ReadingType codes read here (NAESB REQ.21 ESPI, usage.xsd v3.3, read; references.md
# section 8): uom 72 = Wh, uom 38 = W; accumulationBehaviour 4 = deltaData, the energy of
# each interval rather than a register reading.
GB_UOM_WH = 72
GB_UOM_W = 38
GB_DELTA_DATA = 4
# powerOfTenMultiplier codes run from -12 (pico) to 12 (tera) (from memory).
GB_MAX_POWER_OF_TEN = 12
# Times and durations beyond 2200-01-01 UTC [s since 1970] are refused: no meter reads then,
# and polars datetimes in microseconds overflow far beyond.
GB_MAX_SECONDS = 7_258_118_400
_GB_WHAT = "a Green Button (NAESB ESPI) interval-data XML file"
_INTEGER = re.compile(r"^[+-]?\d+$")


def _atom(tag: str) -> str:
    return f"{{{ATOM_NS}}}{tag}"


def _espi(tag: str) -> str:
    return f"{{{ESPI_NS}}}{tag}"


@dataclass
class _GbEntry:
    """One Atom entry of a Green Button feed: its links and the ESPI resources it holds."""

    title: str
    self_href: str | None
    up_href: str | None
    related: list[str]
    resources: list[ET.Element]

    def holds(self, kind: str) -> bool:
        return any(r.tag == _espi(kind) for r in self.resources)

    def name(self) -> str:
        parts = [repr(self.title)] if self.title else []
        parts += [f"at {self.self_href}"] if self.self_href else []
        return " ".join(parts) or "(no title or self link)"


def _same_href(a: str | None, b: str | None) -> bool:
    """Two links name the same resource; one may be an absolute URL and the other relative."""
    if not a or not b:
        return False
    return a == b or a.endswith("/" + b) or b.endswith("/" + a)


def _gb_parse(path: Path) -> ET.Element:
    """The file's XML tree; nothing outside the file is fetched or expanded."""
    try:
        exists = path.is_file()
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: cannot use this meter file path ({exc})") from None
    if not exists:
        raise InputError(f"{path}: no such meter file; check the path in the site file")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{path}: cannot read the meter file "
                         f"({exc.strerror or type(exc).__name__})") from None
    if not data.strip():
        raise InputError(f"{path}: the file is empty; expected {_GB_WHAT}")
    # A Green Button file has no document type declaration; refusing one keeps entity
    # expansion, and any reference to another file or address, out of the reader.
    if b"<!DOCTYPE" in data or b"<!ENTITY" in data:
        raise InputError(f"{path}: the file holds a <!DOCTYPE> or <!ENTITY> declaration; "
                         f"expected {_GB_WHAT}, which has none")
    try:
        return ET.fromstring(data)
    except ET.ParseError as exc:
        line, column = exc.position
        reason = str(exc).split(": line ")[0]
        raise InputError(f"{path}: line {line}, column {column + 1}: not well-formed XML "
                         f"({reason}); expected {_GB_WHAT}") from None


def _gb_hrefs(entry: ET.Element, rel: str) -> list[str]:
    """The entry's link targets of one relation, without a trailing slash."""
    hrefs = [(link.get("href") or "").strip().rstrip("/") for link in entry.findall(_atom("link"))
             if link.get("rel") == rel]
    return [h for h in hrefs if h]


def _gb_entries(root: ET.Element) -> list[_GbEntry]:
    """The feed's entries; a file that is not an Atom feed is one entry with no links."""
    entries = []
    for entry in root.iter(_atom("entry")):
        content = entry.find(_atom("content"))
        resources = ([c for c in content if c.tag.startswith(f"{{{ESPI_NS}}}")]
                     if content is not None else [])
        selfs, ups = _gb_hrefs(entry, "self"), _gb_hrefs(entry, "up")
        entries.append(_GbEntry((entry.findtext(_atom("title")) or "").strip(),
                                selfs[0] if selfs else None, ups[0] if ups else None,
                                _gb_hrefs(entry, "related"), resources))
    if not entries:
        kinds = {_espi("MeterReading"), _espi("ReadingType"), _espi("IntervalBlock")}
        entries.append(_GbEntry("", None, None, [], [e for e in root.iter() if e.tag in kinds]))
    return entries


def _gb_int(path: Path, element: ET.Element, tag: str, where: str, expected: str,
            low: int = -(2 ** 63), high: int = 2 ** 63 - 1) -> int | None:
    """A whole-number child element's value, or None when the element is absent."""
    text = element.findtext(_espi(tag))
    if text is None:
        return None
    text = text.strip()
    if not _INTEGER.match(text):
        raise InputError(f"{path}: {where}: {tag} {text!r} is not a whole number; "
                         f"expected {expected}")
    value = int(text)
    if not low <= value <= high:
        raise InputError(f"{path}: {where}: {tag} {value} is out of range; expected {expected}")
    return value


def _gb_need(path: Path, element: ET.Element, tag: str, where: str, expected: str,
             low: int = -(2 ** 63), high: int = 2 ** 63 - 1) -> int:
    """A whole-number child element that must be there."""
    value = _gb_int(path, element, tag, where, expected, low, high)
    if value is None:
        raise InputError(f"{path}: {where}: {tag} is missing; expected {expected}")
    return value


def _gb_belongs(block: _GbEntry, reading: _GbEntry) -> bool:
    """An IntervalBlock entry belongs to a MeterReading entry by its links."""
    if any(_same_href(block.up_href, h) for h in reading.related):
        return True
    return bool(reading.self_href and block.self_href
                and block.self_href.startswith(reading.self_href + "/"))


def _gb_meter_reading(path: Path, entries: list[_GbEntry],
                      blocks: list[tuple[_GbEntry, ET.Element]]
                      ) -> tuple[_GbEntry | None, list[ET.Element]]:
    """The one MeterReading whose IntervalBlocks are read, and those blocks."""
    readings = [e for e in entries if e.holds("MeterReading")]
    if len(readings) <= 1:
        return (readings[0] if readings else None), [b for _, b in blocks]
    owners: dict[int, _GbEntry] = {}
    for entry, _ in blocks:
        found = [r for r in readings if _gb_belongs(entry, r)]
        if len(found) != 1:
            raise InputError(
                f"{path}: cannot tell which of the {len(readings)} MeterReadings the IntervalBlock "
                f"entry {entry.name()} belongs to; expected its rel=\"up\" link to name one "
                "MeterReading's IntervalBlock list; export one meter reading's interval data")
        owners[id(found[0])] = found[0]
    if len(owners) > 1:
        names = "; ".join(r.name() for r in readings if id(r) in owners)
        raise InputError(f"{path}: interval data for {len(owners)} MeterReadings ({names}); "
                         "expected one; export the interval data of one meter reading (one "
                         "meter, one quantity) on its own")
    owner = next(iter(owners.values()))
    return owner, [b for e, b in blocks if _gb_belongs(e, owner)]


def _gb_reading_type(path: Path, owner: _GbEntry | None, entries: list[_GbEntry]) -> ET.Element:
    """The ReadingType of the MeterReading: linked from it, or the file's only one."""
    types = [(e, r) for e in entries for r in e.resources if r.tag == _espi("ReadingType")]
    if owner is not None:
        linked = [r for e, r in types if any(_same_href(e.self_href, h) for h in owner.related)]
        if len(linked) == 1:
            return linked[0]
    if len(types) == 1:
        return types[0][1]
    if not types:
        raise InputError(f"{path}: no ReadingType found; expected one giving the unit (uom) "
                         "and powerOfTenMultiplier of the IntervalReading values")
    raise InputError(f"{path}: {len(types)} ReadingTypes and none of them linked from the "
                     "MeterReading; cannot tell the readings' unit; expected the MeterReading "
                     "entry to link its ReadingType (rel=\"related\")")


def _gb_kwh(value: int | None, duration_s: int, uom: int, power_of_ten: int) -> float | None:
    """One reading -> kWh, in exact integer arithmetic until one correctly rounded division.

    Wh: value x 10^n / 1000. W (mean demand over the reading): value x 10^n x duration_s /
    3600 / 1000.
    """
    if value is None:
        return None
    num, den = (value, 1000) if uom == GB_UOM_WH else (value * duration_s, 3_600_000)
    if power_of_ten >= 0:
        num *= 10 ** power_of_ten
    else:
        den *= 10 ** -power_of_ten
    return num / den


def _greenbutton_frame(path: Path) -> pl.DataFrame:
    """Every IntervalReading of the file's one MeterReading, in file order.

    Columns: reading (1-based position among the file's IntervalReadings), value (the
    integer as written, null if absent), duration_s [s], start_utc, end_utc [UTC, us],
    energy_kwh [kWh, null = no reading].
    """
    root = _gb_parse(path)
    position = {id(e): i + 1 for i, e in enumerate(root.iter(_espi("IntervalReading")))}
    entries = _gb_entries(root)
    blocks = [(e, r) for e in entries for r in e.resources
              if r.tag == _espi("IntervalBlock") and r.find(_espi("IntervalReading")) is not None]
    if not position or not blocks:
        raise InputError(f"{path}: no IntervalReading found; expected {_GB_WHAT}: entries "
                         f"whose content holds IntervalBlock elements with IntervalReading "
                         f"elements (namespace {ESPI_NS})")
    owner, owned = _gb_meter_reading(path, entries, blocks)
    rtype = _gb_reading_type(path, owner, entries)
    units = (f"{GB_UOM_WH} (Wh, energy per interval) or {GB_UOM_W} (W, mean demand over the "
             "interval)")
    uom = _gb_need(path, rtype, "uom", "ReadingType", f"a unit code: {units}")
    if uom not in (GB_UOM_WH, GB_UOM_W):
        raise InputError(f"{path}: ReadingType: uom {uom} is not a supported unit code; "
                         f"expected {units}")
    power_of_ten = _gb_int(path, rtype, "powerOfTenMultiplier", "ReadingType",
                           f"a power of ten from -{GB_MAX_POWER_OF_TEN} to {GB_MAX_POWER_OF_TEN}",
                           low=-GB_MAX_POWER_OF_TEN, high=GB_MAX_POWER_OF_TEN) or 0
    accumulation = _gb_int(path, rtype, "accumulationBehaviour", "ReadingType",
                           f"{GB_DELTA_DATA} (deltaData)")
    if uom == GB_UOM_WH and accumulation not in (None, GB_DELTA_DATA):
        raise InputError(f"{path}: ReadingType: accumulationBehaviour {accumulation}: the Wh "
                         "values are not the energy of each interval; expected "
                         f"{GB_DELTA_DATA} (deltaData)")
    length_s = _gb_int(path, rtype, "intervalLength", "ReadingType", "a duration in seconds",
                       low=1, high=GB_MAX_SECONDS)
    seconds = "whole seconds since 1970-01-01 UTC, before 2200"
    rows: list[tuple[int, int | None, int, int, float | None]] = []
    for block in owned:
        interval = block.find(_espi("interval"))
        block_start = (None if interval is None else
                       _gb_int(path, interval, "start", "IntervalBlock interval", seconds,
                               low=0, high=GB_MAX_SECONDS))
        for k, reading in enumerate(block.findall(_espi("IntervalReading"))):
            where = f"IntervalReading {position[id(reading)]}"
            period = reading.find(_espi("timePeriod"))
            if period is not None:
                start = _gb_need(path, period, "start", f"{where} timePeriod", seconds,
                                 low=0, high=GB_MAX_SECONDS)
                duration = _gb_need(path, period, "duration", f"{where} timePeriod",
                                    "a duration in seconds", high=GB_MAX_SECONDS)
            elif block_start is not None and length_s is not None:
                # Without a timePeriod the readings follow one another from the block's
                # start, one per ReadingType intervalLength (usage.xsd, from memory).
                start, duration = block_start + k * length_s, length_s
            else:
                raise InputError(f"{path}: {where}: timePeriod is missing; expected a "
                                 "timePeriod with start and duration in seconds")
            if duration <= 0:
                raise InputError(f"{path}: {where}: duration {duration} s; expected a "
                                 "duration above 0 seconds")
            value = _gb_int(path, reading, "value", where, "a whole number (ESPI stores "
                            "readings as integers scaled by the ReadingType's "
                            "powerOfTenMultiplier)")
            rows.append((position[id(reading)], value, start, duration,
                         _gb_kwh(value, duration, uom, power_of_ten)))
    df = pl.DataFrame(rows, schema={"reading": pl.Int64, "value": pl.Int64, "start_s": pl.Int64,
                                    "duration_s": pl.Int64, "energy_kwh": pl.Float64},
                      orient="row")
    utc = [pl.from_epoch(pl.col("start_s"), "s"),
           pl.from_epoch(pl.col("start_s") + pl.col("duration_s"), "s")]
    return df.select(
        "reading", "value", "duration_s",
        utc[0].dt.cast_time_unit("us").dt.replace_time_zone("UTC").alias("start_utc"),
        utc[1].dt.cast_time_unit("us").dt.replace_time_zone("UTC").alias("end_utc"),
        "energy_kwh")


def read_greenbutton(path: Path) -> pl.DataFrame:
    """Read a Green Button (NAESB REQ.21 ESPI) interval-data XML download.

    Every IntervalReading of the file's one MeterReading gives an interval from its
    timePeriod (start [s since 1970-01-01 UTC], duration [s]) and its energy from the
    integer value x 10^powerOfTenMultiplier in the ReadingType's unit: uom 72 (Wh) / 1000,
    or uom 38 (W, mean demand over the interval) x duration [h] / 1000. Times are UTC, so
    LocalTimeParameters are not needed. The file is parsed by the standard library and
    nothing it names is fetched.

    Args:
        path: the .xml file.

    Returns:
        Rows in file order: start_utc, end_utc [datetime, UTC, us], energy_kwh [kWh, null
        where a reading has no value].

    Raises:
        InputError: missing, empty or malformed file; no IntervalReading; interval data of
        more than one MeterReading; no usable ReadingType; a unit code other than 72 or 38;
        a time, duration or value that is not a whole number; a duration of 0 or less.
        Readings are named by their position in the file ("IntervalReading 17").

    References:
        NAESB REQ.21 Energy Services Provider Interface (ESPI), usage.xsd v3.3:
        IntervalBlock, IntervalReading, ReadingType.
    """
    return _greenbutton_frame(Path(path)).select("start_utc", "end_utc", "energy_kwh")


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
        # A log repeats a few state words: read each distinct text once, then map every row.
        raw = s.cast(pl.String)
        distinct = raw.unique()
        text = distinct.str.strip_chars().str.to_lowercase()
        words = text.replace_strict(_ON_WORDS, default=None, return_dtype=pl.Float64)
        read = pl.select(pl.coalesce(words, text.cast(pl.Float64, strict=False))).to_series()
        values = raw.replace_strict(distinct, read, default=None, return_dtype=pl.Float64)
    bad = values.is_null() | (values < 0) | (values > 1) | values.is_nan()
    if bad.any():
        idx = int(bad.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: state "
                         f"{s[idx]!r}; expected on/off, 1/0, true/false or a number from 0 to 1")
    return values


def _alias_map(site: SiteConfig) -> dict[str, str]:
    """Former id (an ``aliases`` entry) -> the configured id it counts as."""
    return {a: e.id for e in site.equipment for a in e.aliases}


def _did_you_mean(name: str, candidates: list[str]) -> str:
    """`` did you mean 'X'?`` for the candidate closest to name, ignoring case, or ''.

    Closeness is difflib's ratio (standard library), at least its default cutoff 0.6.
    """
    lower = {c.lower(): c for c in candidates}
    close = difflib.get_close_matches(name.lower(), list(lower), n=1)
    return f" did you mean {lower[close[0]]!r}?" if close else ""


def _expected_ids(known: list[str], aliases: dict[str, str]) -> str:
    former = f" or their former ids ({', '.join(aliases)})" if aliases else ""
    return f"({', '.join(known)}){former}"


def _check_ids(ids: pl.Series, known: list[str], path: Path, column: str,
               aliases: dict[str, str] | None = None) -> None:
    """Raise InputError at the first row whose id is neither configured nor a former id.

    The message suggests the nearest configured id and names the file's other unknown ids.
    """
    aliases = aliases or {}
    valid = known + list(aliases)
    unknown = (~ids.is_in(valid)).fill_null(True) | (ids == "").fill_null(True)
    if unknown.any():
        idx = int(unknown.arg_max())  # type: ignore[arg-type]
        bad = ids[idx]
        where = f"{path}: {_row_label(path, idx)}, column {column!r}"
        if not bad:
            raise InputError(f"{where}: empty equipment id; expected one of the site file's ids "
                             f"{_expected_ids(known, aliases)}")
        others = [i for i in ids.filter(unknown).unique(maintain_order=True).to_list()
                  if i and i != bad]
        also = ""
        if others:
            more = f" and {len(others) - 5} more" if len(others) > 5 else ""
            also = (f"; the file also has unknown ids "
                    f"{', '.join(repr(i) for i in others[:5])}{more}")
        raise InputError(f"{where}: unknown equipment id {bad!r};{_did_you_mean(bad, valid)} "
                         f"expected one of the site file's ids {_expected_ids(known, aliases)}"
                         f"{also}")


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def _order_notes(path: Path, t: pl.Series, by: pl.Series | None) -> list[str]:
    """A finding for rows earlier than the previous row (of the same equipment), in file order."""
    g = by if by is not None else pl.repeat("", len(t), eager=True)
    back = (pl.DataFrame({"t": t, "g": g})
            .select((pl.col("t") < pl.col("t").shift(1).over("g")).fill_null(False))
            .to_series())
    n = int(back.sum())
    if not n:
        return []
    idx = int(back.arg_max())  # type: ignore[arg-type]
    who = f"{by[idx]!r} at {t[idx]}" if by is not None else f"at {t[idx]}"
    same = " of the same equipment" if by is not None else ""
    return [(f"{path}: {_plural(n, 'row')} out of time order, earlier than the previous "
            f"row{same} (first: {_row_label(path, idx)}, {who}); policy: sorted by time")]


def _alias_notes(path: Path, written: pl.Series, t: pl.Series,
                 aliases: dict[str, str]) -> list[str]:
    """One line per former id used in the file: how many rows now count as which equipment."""
    notes = []
    for old, new in aliases.items():
        mask = (written == old).fill_null(False)
        if mask.any():
            times = t.filter(mask)
            notes.append(f"{path}: {_plural(int(mask.sum()), 'row')} of former id {old!r} counted "
                         f"as equipment {new!r} ({times.min()} to {times.max()})")
    return notes


def _sample_frame(raw: pl.DataFrame, cols: list[str], eq_id: str, t: pl.Series, path: Path,
                  aliases: dict[str, str]) -> tuple[pl.DataFrame, list[str]]:
    """One equipment's samples in file order: t, v (status 0..1, null = empty cell), row.

    Columns of a former id (alias) fill the cells the others leave empty.

    Raises:
        InputError: two columns with different states in one row, or two rows at one time
        with different states.
    """
    masked = []
    for c in cols:
        col = raw.get_column(c)
        text = col.cast(pl.String).str.strip_chars() if not col.dtype.is_numeric() else None
        empty = col.is_null() if text is None else (text.is_null() | (text == ""))
        filled = raw.select(pl.when(empty).then(pl.lit("0"))
                            .otherwise(pl.col(c).cast(pl.String)).alias(c))
        v = _states(filled, c, path)
        masked.append(v.zip_with(~empty, pl.Series(c, [None] * len(v), dtype=pl.Float64)).alias(c))
    w = pl.DataFrame(masked)
    notes = []
    if len(cols) > 1:
        differ = w.select(pl.min_horizontal(cols) != pl.max_horizontal(cols)).to_series()
        differ = differ.fill_null(False)
        if differ.any():
            idx = int(differ.arg_max())  # type: ignore[arg-type]
            both = ", ".join(repr(c) for c in cols if w[c][idx] is not None)
            raise InputError(f"{path}: {_row_label(path, idx)}: equipment {eq_id!r} has different "
                             f"states at the same time {t[idx]} (columns {both}); expected one "
                             "state")
        for c in cols:
            seen = w[c].is_not_null()
            if c in aliases and seen.any():
                times = t.filter(seen)
                notes.append(f"{path}: {_plural(int(seen.sum()), 'sample')} in column {c!r} (a "
                             f"former id) counted as equipment {eq_id!r} ({times.min()} to "
                             f"{times.max()})")
    v = w.select(pl.coalesce(cols)).to_series()
    f = pl.DataFrame({"t": t, "v": v, "row": pl.int_range(len(t), eager=True)})
    clash = (f.drop_nulls("v").group_by("t")
             .agg(pl.col("v").n_unique().alias("n"), pl.col("row").min())
             .filter(pl.col("n") > 1).sort("row"))
    if clash.height:
        r = clash.row(0, named=True)
        raise InputError(f"{path}: {_row_label(path, r['row'])}: equipment {eq_id!r} has "
                         f"different states at the same time {r['t']}; expected one state")
    return f, notes


def _stale_notes(path: Path, eq_id: str, f: pl.DataFrame, hold_min: float,
                 log_end: dt.datetime) -> list[str]:
    """A finding for silences longer than max_hold: from a sample to the next, or to the log's end.

    f: one row per time, sorted, v null for an empty cell (which is not a sample).
    """
    s = f.filter(pl.col("v").is_not_null())
    gap_min = (s.select((pl.col("t").shift(-1).fill_null(log_end) - pl.col("t"))
                        .dt.total_microseconds() / 60e6).to_series())
    stale = gap_min > hold_min
    n = int(stale.sum())
    if not n:
        return []
    idx = int(stale.arg_max())  # type: ignore[arg-type]
    return [(f"{path}: equipment {eq_id!r}: {_plural(n, 'silence')} longer than max_hold_minutes "
            f"= {hold_min:g} (first: {gap_min[idx]:g} min without a sample from {s['t'][idx]}); "
            f"policy: more than {hold_min:g} min after a sample the state is unknown, and meter "
            "intervals then are left out")]


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


def read_runlog(settings: RunlogSettings, site: SiteConfig, offset_min: float = 0.0) -> RunLog:
    """Read the building automation run log in any of the three layouts.

    events: a state holds until that equipment's next event, and the last one until the
    log's last time. samples: a sample holds until the next sample of that column, but at
    most max_hold_minutes; an empty cell is unknown. runtime: run minutes in each log
    interval, spread evenly over it. Rows (or sample columns) under a former id listed in an
    equipment's ``aliases`` count as that equipment.

    Findings go into ``notes``, one line each: rows of former ids, rows out of time order
    (policy: sorted by time), and silences of a sample column longer than max_hold_minutes
    (the time beyond max_hold is unknown). Coverage of the meter period needs the meter:
    see ``disagg.logcheck.coverage_findings``.

    Args:
        offset_min: minutes ADDED to every run-log time once it is parsed to UTC [min], to put
            a building automation clock that is off onto the meter's clock (a log whose clock
            runs 7 minutes behind the meter's needs +7). 0 keeps the times as read.
            ``disagg.clock.estimate_log_offset`` estimates it with this sign.

    Raises:
        InputError: missing column, unreadable time or state, unknown or empty equipment id
        (suggesting the nearest configured id), two different states (or run minutes) for
        one equipment at one time.
        ValueError: offset_min is not a finite number.
    """
    if not math.isfinite(offset_min):
        raise ValueError(f"offset_min = {offset_min!r}: expected a finite number of minutes")
    shift = dt.timedelta(microseconds=round(offset_min * 60e6))
    path = settings.file
    needed = {"events": [settings.time_column, settings.equipment_column, settings.state_column],
              "runtime": [settings.time_column, settings.equipment_column,
                          settings.minutes_column]}.get(settings.layout)
    raw = read_table(path, "run log", needed)  # type: ignore[arg-type]
    ids = site.equipment_ids()
    aliases = _alias_map(site)
    tz = site.timezone
    notes: list[str] = []
    if offset_min:
        notes.append(f"{path}: every run-log time is shifted by {offset_min:+g} min onto the "
                     "meter's clock")
    if settings.layout == "samples":
        require_columns(raw, path, [settings.time_column])
        present = [c for c in raw.columns if c != settings.time_column]
        for c in present:
            if c not in ids and c not in aliases:
                former = f" or former ids {', '.join(aliases)}" if aliases else ""
                raise InputError(f"{path}: column {c!r} is not a configured equipment id;"
                                 f"{_did_you_mean(c, ids + list(aliases))} expected the time "
                                 f"column and columns named {', '.join(ids)}{former}")
        by_eq = {e: [c for c in present if aliases.get(c, c) == e] for e in ids}
        missing = [e for e in ids if not by_eq[e]]
        if missing:
            notes.append(f"no run-log column for {', '.join(missing)}: left out as unknown")
        t = parse_times(raw, settings.time_column, tz, path) + shift
        notes += _order_notes(path, t, None)
        hold = pl.duration(microseconds=round(settings.max_hold_min * 60e6))
        frames = []
        for eq_id, eq_cols in by_eq.items():
            if not eq_cols:
                continue
            f, alias_notes = _sample_frame(raw, eq_cols, eq_id, t, path, aliases)
            notes += alias_notes
            # One row per time, a sample before an empty cell; an empty cell ends the sample
            # before it (unknown from then on).
            f = (f.sort(pl.col("t"), pl.col("v").is_null())
                 .unique(subset="t", keep="first", maintain_order=True))
            f = f.with_columns(nxt=pl.col("t").shift(-1))
            f = f.with_columns(end=pl.min_horizontal(pl.col("nxt"), pl.col("t") + hold))
            notes += _stale_notes(path, eq_id, f, settings.max_hold_min,  # type: ignore[arg-type]
                                  t.max())  # type: ignore[arg-type]
            f = f.filter(pl.col("v").is_not_null() & pl.col("end").is_not_null())
            frames.append(f.select(pl.lit(eq_id).alias("eq"), "t", "end", "v"))
        df = pl.concat(frames) if frames else pl.DataFrame(schema={"eq": pl.String, "t": t.dtype, "end": t.dtype, "v": pl.Float64})
        return RunLog(_to_segments(df, ids, "end"), path, raw.height, notes)

    if settings.layout == "events":
        cols = [settings.time_column, settings.equipment_column, settings.state_column]
    else:
        cols = [settings.time_column, settings.equipment_column, settings.minutes_column]
    require_columns(raw, path, cols)  # type: ignore[arg-type]
    eq = raw.get_column(settings.equipment_column).cast(pl.String).str.strip_chars()  # type: ignore[arg-type]
    _check_ids(eq, ids, path, settings.equipment_column, aliases)  # type: ignore[arg-type]
    written = eq
    if aliases:
        eq = eq.replace(aliases)
    t = parse_times(raw, settings.time_column, tz, path, by=eq) + shift
    notes += _alias_notes(path, written, t, aliases)
    notes += _order_notes(path, t, eq)
    if settings.layout == "events":
        v = _states(raw, settings.state_column, path)  # type: ignore[arg-type]
        n_rows = raw.height
        del raw  # the text columns are no longer needed: free them before the heavy steps
        # One stable sort by (equipment, time) serves the clash check, the de-duplication and
        # the segments; a group_by over every row doubled the peak memory of a large log.
        # Every id is a configured one by now (_check_ids, aliases replaced): as an Enum its
        # codes sort like small integers. numpy's lexsort is stable (rows with the same
        # equipment and time keep file order) and several times faster than a frame sort.
        df = pl.DataFrame({"eq": eq.cast(pl.Enum(list(dict.fromkeys(ids)))), "t": t, "v": v,
                           "row": pl.int_range(n_rows, eager=True)})
        order = np.lexsort((df["t"].dt.epoch("us").to_numpy(),
                            df["eq"].to_physical().to_numpy()))
        df = df[pl.Series(order.astype(np.uint32) if n_rows < 2**32 else order)]
        del order
        del eq, t, v
        same = ((pl.col("eq") == pl.col("eq").shift(1))
                & (pl.col("t") == pl.col("t").shift(1))).fill_null(False)
        bad = df.filter(same & (pl.col("v") != pl.col("v").shift(1)))
        if bad.height:
            r = (df.join(bad.select("eq", "t").unique(), on=["eq", "t"])
                 .group_by("eq", "t").agg(pl.col("row").min()).sort("row").row(0, named=True))
            raise InputError(f"{path}: {_row_label(path, r['row'])}: equipment {r['eq']!r} has "
                             f"different states at the same time {r['t']}; expected one state")
        if df.height == 0:
            notes.append(f"{path}: the run log has no rows: every state is unknown")
            return RunLog(_to_segments(df.with_columns(end=pl.col("t")), ids, "end"), path,
                          n_rows, notes)
        log_end = df["t"].max()
        df = df.filter(~same)  # the first row of each (equipment, time): file order kept
        # Sorted by equipment, so the next row's time ends a state unless the next row is
        # another equipment's (no window function needed).
        df = df.with_columns(end=pl.when(pl.col("eq") == pl.col("eq").shift(-1))
                             .then(pl.col("t").shift(-1)).otherwise(None)
                             .fill_null(log_end))
        present = set(df["eq"].unique().to_list())
        missing = [e for e in ids if e not in present]
        if missing:
            notes.append(f"no run-log events for {', '.join(missing)}: left out as unknown")
        return RunLog(_to_segments(df, ids, "end"), path, n_rows, notes)

    minutes = _numbers(raw, settings.minutes_column, path, "run minutes")  # type: ignore[arg-type]
    df = (pl.DataFrame({"eq": eq, "t": t, "m": minutes,
                        "row": pl.int_range(raw.height, eager=True)})
          .filter(pl.col("m").is_not_null()))
    clash = (df.group_by("eq", "t").agg(pl.col("m").n_unique().alias("n"), pl.col("row").min())
             .filter(pl.col("n") > 1).sort("row"))
    if clash.height:
        r = clash.row(0, named=True)
        raise InputError(f"{path}: {_row_label(path, r['row'])}: equipment {r['eq']!r} has "
                         f"different run minutes at the same time {r['t']}; expected one value "
                         "per interval")
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
    raw = read_table(path, "weather", [settings.time_column, settings.temp_column])
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
