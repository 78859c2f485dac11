"""Green Button (NAESB REQ.21 ESPI) interval-data XML -> intervals in UTC."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

import polars as pl

from disagg.errors import InputError
from disagg.inputs.readers.tables import existing_file

ATOM_NS = "http://www.w3.org/2005/Atom"
ESPI_NS = "http://naesb.org/espi"
# ReadingType codes read here (NAESB REQ.21 ESPI, usage.xsd v3.3, read; docs/references.md
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
    existing_file(path, "meter")
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
