"""Site TOML file -> typed, validated settings.

Paths inside the TOML are resolved against the TOML's own folder. Every problem raises
:class:`ConfigError` naming the file, the table and key, the bad value and what was expected.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import difflib
import math
import os
import re
import tomllib
import zoneinfo
from dataclasses import dataclass
from pathlib import Path

from disagg.errors import ConfigError
from disagg.inputs.paths import special_kind

METER_UNITS = ("kWh", "Wh", "kW")
# A cumulative register: each reading is the meter's running total [kWh x multiplier], and an
# interval's energy is the difference of consecutive readings (disagg.inputs.vee.register_energy).
REGISTER_UNIT = "kWh-register"
# A float64 holds whole numbers exactly up to 2^53 (about 9 x 10^15): 15 digits at most.
MAX_REGISTER_DIGITS = 15
STAMPS = ("end", "start")
ALLOWED_INTERVALS_MIN = (1, 5, 10, 15, 30, 60)
RUNLOG_LAYOUTS = ("events", "samples", "runtime")
BASELOAD_PROFILES = ("constant", "occupied", "hour-of-week")
# Baseload forms: a profile, alone or plus a wandering level (disagg.fit.wander); "auto" lets
# the data choose among the declared profile and the simpler ones (disagg.fit.select).
BASELOAD_FORMS = ("auto",) + tuple(f"{p}{lv}" for p in BASELOAD_PROFILES
                                    + ("occupied-edges", "hour-of-week-edges")
                                    for lv in ("", "+level"))
CONTROLS = ("on-off", "variable")
WEATHER_MODES = ("cooling", "heating")
SMALLEST_SIZE = 1e-6
# No setting of building equipment (kW, hp, V, A, minutes, kWh per register unit) comes near
# this; a larger one is a typing error (common practice, no source).
LARGEST_SIZE = 1e9
# Settings of temperature (balance_temp, reference_temp), in the weather file's unit, lie
# within this many degrees of zero (common practice, no source).
MAX_ABS_TEMP = 200.0
TEMP_UNITS = ("F", "C")
WEEKDAYS = ("Mon", "Tue", "Wed", "Thu", "Fri", "Sat", "Sun")

# Motor output to input: 1 hp = 0.746 kW (US DOE, "Determining Electric Motor Load and
# Efficiency", which uses 0.7457).
KW_PER_HP = 0.746
# A running draw guessed from a nameplate: 80 % of full-load input, standard deviation 30 % of
# full-load input. Common practice, no source: motors and compressors mostly run between
# 60 % and 100 % of full load.
NAMEPLATE_RUNNING_FRACTION = 0.8
NAMEPLATE_SD_FRACTION = 0.3
# draw_kw given without draw_sd_kw: standard deviation 25 % of draw_kw (common practice, no source).
DRAW_ONLY_SD_FRACTION = 0.25


@dataclass(frozen=True)
class MeterSettings:
    """Where the utility interval meter export is and how to read it."""

    file: Path
    time_column: str | None  # None for a Green Button .xml file (it states its own times)
    value_column: str | None  # None for a Green Button .xml file
    unit: str | None  # kWh, Wh, or kW (mean demand over the interval); None for .xml
    stamp: str | None  # which edge of the interval the time marks: end or start; None for .xml
    interval_min: int | None  # None: inferred from the data
    register_digits: int | None = None  # kWh-register: digits of the register (rolls over)
    multiplier: float = 1.0  # kWh-register: kWh per register unit (CT/PT ratio, pulse weight)
    date_order: str | None = None  # ymd, mdy, dmy or a format string; None = from the column
    on_duplicate: str = "error"  # different readings at one time: error, keep-first, keep-last


@dataclass(frozen=True)
class RunlogSettings:
    """Where the building automation run log is and which layout it has."""

    file: Path
    layout: str  # events, samples or runtime
    time_column: str
    equipment_column: str | None = None  # events, runtime
    state_column: str | None = None  # events
    minutes_column: str | None = None  # runtime
    max_hold_min: float | None = None  # samples: longest a sample holds
    stamp: str = "start"  # runtime: which edge of its interval the time marks
    interval_min: int | None = None  # runtime: length of its intervals, None = inferred
    date_order: str | None = None  # ymd, mdy, dmy or a format string; None = from the column
    log_offset_min: float = 0.0  # minutes added to every log time to reach the meter's clock


@dataclass(frozen=True)
class Spell:
    """A weekly occupied spell: days 0=Mon..6=Sun, minutes after local midnight."""

    days: tuple[int, ...]
    start_min: int
    end_min: int  # may be 1440 for 24:00


@dataclass(frozen=True)
class BaseloadSettings:
    """Shape of the load that no run log explains (lights, plugs, controls)."""

    profile: str = "constant"
    spells: tuple[Spell, ...] = ()
    spell_text: tuple[str, ...] = ()
    closed: tuple[dt.date, ...] = ()  # local dates on which no occupied spell applies
    # "auto" (the data chooses) or a pinned form such as "occupied+level" (BASELOAD_FORMS).
    form: str = "auto"


@dataclass(frozen=True)
class Prior:
    """The engineer's prior knowledge of a running draw: mean +- sd [kW], or none."""

    draw_kw: float | None
    sd_kw: float | None
    source: str  # how it was derived, in words

    @property
    def informative(self) -> bool:
        return self.draw_kw is not None and self.sd_kw is not None


@dataclass(frozen=True)
class Equipment:
    """One logged load."""

    id: str
    name: str
    kind: str
    control: str  # on-off or variable
    exponent: float  # power ~ status ** exponent for variable control
    prior: Prior
    full_load_kw: float | None  # from the nameplate, if any
    weather: str | None = None  # cooling or heating: the draw varies with outdoor temperature
    balance_temp_c: float | None = None  # change point of that variation [degC]
    aliases: tuple[str, ...] = ()  # former ids in the run log (equipment renamed mid-period)


@dataclass(frozen=True)
class WeatherSettings:
    """Outdoor temperature file; temperatures are converted to degC on reading."""

    file: Path
    time_column: str
    temp_column: str
    unit: str  # F or C, as in the file (balance and reference temperatures use it too)
    reference_temp_c: float | None  # drift and comparison are stated at this temperature
    date_order: str | None = None  # ymd, mdy, dmy or a format string; None = from the column


def to_celsius(value: float, unit: str) -> float:
    """A temperature in the weather file's unit -> degC."""
    return (value - 32.0) * 5.0 / 9.0 if unit == "F" else value


@dataclass(frozen=True)
class TouPeriod:
    """A time-of-use period: its price [currency/kWh] on its weekly local-time spells."""

    name: str
    price_per_kwh: float
    spells: tuple[Spell, ...]
    spell_text: tuple[str, ...]


@dataclass(frozen=True)
class TariffSettings:
    """Energy and demand prices: flat, or time-of-use periods over a default price.

    energy_price_per_kwh applies to every interval outside the time-of-use periods (to all of
    them for a flat tariff); demand_price_per_kw multiplies the month's peak demand [kW].
    """

    currency: str
    energy_price_per_kwh: float
    demand_price_per_kw: float = 0.0
    periods: tuple[TouPeriod, ...] = ()
    holidays: tuple[dt.date, ...] = ()  # local dates on which no time-of-use period applies


@dataclass(frozen=True)
class SiteConfig:
    """Everything a run needs to know about one site."""

    path: Path
    name: str
    timezone: str
    meter: MeterSettings
    runlog: RunlogSettings
    baseload: BaseloadSettings
    equipment: tuple[Equipment, ...]
    weather: WeatherSettings | None = None
    tariff: TariffSettings | None = None
    history: Path | None = None  # [history] folder: the history store (disagg.present.history)

    def equipment_ids(self) -> list[str]:
        return [e.id for e in self.equipment]

    def input_files(self) -> list[Path]:
        """The files a run reads (the site file, meter, run log, weather): never outputs."""
        files = [self.path, self.meter.file, self.runlog.file]
        return files + ([self.weather.file] if self.weather is not None else [])


def did_you_mean(name: str, known, form: str = "{}") -> str:
    """`` (did you mean X?)`` with the known name nearest to name (difflib, case ignored), or
    "" when none is near; form wraps the name, e.g. "[{}]"."""
    lowered = {k.lower(): k for k in known}
    near = difflib.get_close_matches(name.lower(), list(lowered), n=1, cutoff=0.6)
    return f" (did you mean {form.format(lowered[near[0]])}?)" if near else ""


# The tables of a site file, as written in it.
SITE_TABLES = {"site": "[site]", "meter": "[meter]", "runlog": "[runlog]",
               "baseload": "[baseload]", "equipment": "[[equipment]]", "weather": "[weather]",
               "tariff": "[tariff]", "history": "[history]"}


def _check_top_level(path: Path, data: dict) -> None:
    """Every top-level name must be one of SITE_TABLES: a misspelt table ([histroy]) or a
    setting above the first table would otherwise be ignored silently.

    Raises:
        ConfigError: naming it, with the nearest table name.
    """
    expected = ", ".join(SITE_TABLES.values())
    for key, value in data.items():
        if key in SITE_TABLES:
            continue
        if isinstance(value, dict):
            what = f"[{key}]: unknown table"
        elif isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
            what = f"[[{key}]]: unknown table"
        else:
            raise ConfigError(f"{path}: {key} = {value!r}: a setting outside any table; every "
                              f"setting belongs in one of the tables {expected}"
                              f"{did_you_mean(key, SITE_TABLES, '{}')}")
        near = difflib.get_close_matches(key.lower(), list(SITE_TABLES), n=1, cutoff=0.6)
        hint = f" (did you mean {SITE_TABLES[near[0]]}?)" if near else ""
        raise ConfigError(f"{path}: {what}{hint}; expected only {expected}")


def check_regular_file(path: Path, what: str) -> None:
    """Refuse, before reading, a path that is not a regular file: a FIFO would block the run
    forever and a device such as /dev/zero would be read until memory runs out.

    Raises:
        ConfigError: a FIFO, device, socket or folder, or a path that cannot be looked up
            (a symbolic link loop, say); a missing file is left to the reader.
    """
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        return
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the {what} ({exc.strerror})") from None
    kind = special_kind(mode)
    if kind is not None:
        raise ConfigError(f"{path}: is {kind}, not a file; give the {what} itself")


def resolve_path(path: str | Path, what: str) -> Path:
    """path made absolute with symbolic links followed.

    Raises:
        ConfigError: a symbolic link loop, or a path the system cannot use.
    """
    try:
        return Path(path).resolve()
    except (OSError, RuntimeError, ValueError) as exc:
        why = ("a symbolic link loop" if isinstance(exc, RuntimeError)
               or getattr(exc, "errno", None) == 40 else str(exc))
        raise ConfigError(f"{path}: cannot use this {what} path ({why})") from None


class _Table:
    """A TOML table with the file and table name kept for error messages."""

    def __init__(self, path: Path, name: str, data: object):
        self.path = path
        self.name = name
        if not isinstance(data, dict):
            raise ConfigError(f"{path}: [{name}] must be a table, found {type(data).__name__}")
        self.data = data

    def only(self, allowed: set[str]) -> None:
        """Refuse keys the table does not use: a misspelt key must not be ignored silently."""
        for key in self.data:
            if key not in allowed:
                raise ConfigError(f"{self.where(key)}: unknown setting{did_you_mean(key, allowed)}"
                                  f"; expected one of {', '.join(sorted(allowed))}")

    def where(self, key: str) -> str:
        return f"{self.path}: [{self.name}] {key}"

    def get(self, key: str, kind: type | tuple, required: bool = True, default=None):
        if key not in self.data:
            if required:
                raise ConfigError(f"{self.where(key)} is missing; add it to the file")
            return default
        value = self.data[key]
        kinds = kind if isinstance(kind, tuple) else (kind,)
        if float in kinds and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if not isinstance(value, kinds) or isinstance(value, bool) and bool not in kinds:
            words = {"str": "text", "float": "a number", "int": "a whole number",
                     "list": "a list", "bool": "true or false"}
            names = " or ".join(words.get(k.__name__, k.__name__) for k in kinds)
            raise ConfigError(f"{self.where(key)} = {value!r}: expected {names}")
        return value

    def choice(self, key: str, choices: tuple, required: bool = True, default=None):
        value = self.get(key, str, required, default)
        if value is not None and value not in choices:
            raise ConfigError(
                f"{self.where(key)} = {value!r}: expected one of {', '.join(choices)}")
        return value

    def positive(self, key: str, required: bool = False, upper: float | None = None):
        value = self.get(key, float, required)
        if value is None:
            return None
        # Sizes below 1e-6 (kW, hp, V, A, ...) are no real equipment and would make the
        # prior's precision 1 / sd^2 overflow; above LARGEST_SIZE, underflow.
        limit = LARGEST_SIZE if upper is None else upper
        if not math.isfinite(value) or value < SMALLEST_SIZE or value > limit:
            shown = upper if upper is not None else (limit if value > limit else None)
            bound = f" and at most {shown:g}" if shown is not None else ""
            raise ConfigError(f"{self.where(key)} = {value!r}: expected a number above 0{bound}"
                              + (f" (at least {SMALLEST_SIZE:g})" if 0 < value < SMALLEST_SIZE
                                 else ""))
        return value

    def file(self, key: str) -> Path:
        text = self.get(key, str)
        try:
            return (self.path.parent / text).resolve()
        except (OSError, ValueError, RuntimeError) as exc:
            raise ConfigError(f"{self.where(key)} = {text!r}: not a usable path ({exc})") from None


def _interval(table: _Table, key: str) -> int | None:
    value = table.get(key, int, required=False)
    if value is not None and value not in ALLOWED_INTERVALS_MIN:
        raise ConfigError(f"{table.where(key)} = {value!r}: expected one of "
                          f"{', '.join(map(str, ALLOWED_INTERVALS_MIN))} minutes")
    return value


def _temperature(table: _Table, key: str, required: bool) -> float | None:
    """A temperature setting: finite, within MAX_ABS_TEMP of zero.

    Raises:
        ConfigError: missing (when required), not a number, or out of that range.
    """
    value = table.get(key, float, required=required)
    if value is not None and not (math.isfinite(value) and abs(value) <= MAX_ABS_TEMP):
        raise ConfigError(f"{table.where(key)} = {value!r}: expected a temperature from "
                          f"{-MAX_ABS_TEMP:g} to {MAX_ABS_TEMP:g}")
    return value


DATE_ORDERS = ("ymd", "mdy", "dmy")
DUPLICATE_POLICIES = ("error", "keep-first", "keep-last")  # as disagg.inputs.vee.ON_DUPLICATE
# Clock offsets beyond a week are no clock error but a wrong file (common practice, no source).
MAX_LOG_OFFSET_MIN = 7 * 24 * 60


def _date_order(table: _Table) -> str | None:
    """date_order: the order of numeric dates (ymd, mdy, dmy) or a whole format string such as
    "%m/%d/%Y %I:%M %p" (strftime codes); None lets the reader decide from the column."""
    value = table.get("date_order", str, required=False)
    if value is None or value in DATE_ORDERS or "%" in value:
        return value
    raise ConfigError(f"{table.where('date_order')} = {value!r}: expected \"ymd\" (2024-10-13), "
                      "\"mdy\" (10/13/2024), \"dmy\" (13/10/2024) or a format string such as "
                      "\"%m/%d/%Y %H:%M\"")


def _log_offset(table: _Table) -> float:
    """[runlog] log_offset_minutes: minutes added to every run-log time (the --log-offset)."""
    value = table.get("log_offset_minutes", float, required=False, default=0.0)
    if not (math.isfinite(value) and abs(value) <= MAX_LOG_OFFSET_MIN):
        raise ConfigError(f"{table.where('log_offset_minutes')} = {value!r}: expected a number "
                          f"of minutes from -{MAX_LOG_OFFSET_MIN} to {MAX_LOG_OFFSET_MIN}")
    return value


def _is_greenbutton(table: _Table) -> bool:
    """True when the [meter] file is a Green Button (NAESB ESPI) .xml download."""
    text = table.data.get("file")
    return isinstance(text, str) and text.strip().lower().endswith(".xml")


def _greenbutton_meter(table: _Table) -> MeterSettings:
    """[meter] settings for a Green Button .xml file: only file and interval_minutes apply.

    The file gives each reading's start and duration in UTC epoch seconds and its unit in
    the ReadingType, so the column, unit and stamp settings of a CSV export would be
    ignored; they are refused rather than silently ignored.
    """
    for key in ("time_column", "value_column", "unit", "stamp"):
        if key in table.data:
            raise ConfigError(f"{table.where(key)}: not used with a Green Button .xml meter file "
                              "(the file states its own times and unit); remove it")
    table.only({"file", "interval_minutes"})
    return MeterSettings(file=table.file("file"), time_column=None, value_column=None,
                         unit=None, stamp=None, interval_min=_interval(table, "interval_minutes"))


def _csv_meter(table: _Table) -> MeterSettings:
    """[meter] settings for a CSV or Parquet export.

    unit = "kWh-register" (a cumulative register) also takes register_digits (whole number,
    the register rolls over past 10^digits - 1; without it a decrease is an error) and
    multiplier (kWh per register unit, default 1); each interval runs from one register reading
    to the next, so stamp can only be "end".
    """
    register = table.data.get("unit") == REGISTER_UNIT
    extra = {"register_digits", "multiplier"}
    for key in sorted(extra & set(table.data)):
        if not register:
            raise ConfigError(f"{table.where(key)}: only used with unit = \"{REGISTER_UNIT}\"; "
                              "remove it or set that unit")
    table.only({"file", "time_column", "value_column", "unit", "stamp", "interval_minutes",
                "date_order", "on_duplicate"} | extra)
    digits, multiplier = None, 1.0
    if register:
        digits = table.get("register_digits", int, required=False)
        if digits is not None and not 1 <= digits <= MAX_REGISTER_DIGITS:
            raise ConfigError(f"{table.where('register_digits')} = {digits!r}: expected a whole "
                              f"number from 1 to {MAX_REGISTER_DIGITS}")
        multiplier = table.positive("multiplier") or 1.0
        if table.data.get("stamp", "end") != "end":
            raise ConfigError(f"{table.where('stamp')} = {table.data['stamp']!r}: a register "
                              "reading ends the interval since the previous reading; remove "
                              "stamp or set it to \"end\"")
    return MeterSettings(
        file=table.file("file"),
        time_column=table.get("time_column", str),
        value_column=table.get("value_column", str),
        unit=REGISTER_UNIT if register else table.choice("unit", METER_UNITS),
        stamp=table.choice("stamp", STAMPS, required=False, default="end"),
        interval_min=_interval(table, "interval_minutes"),
        register_digits=digits,
        multiplier=multiplier,
        date_order=_date_order(table),
        on_duplicate=table.choice("on_duplicate", DUPLICATE_POLICIES, required=False,
                                  default="error"),
    )


_SPELL = re.compile(r"^\s*([A-Za-z]{3})(?:\s*-\s*([A-Za-z]{3}))?\s+(\d{1,2}):(\d{2})\s*-\s*(\d{1,2}):(\d{2})\s*$")


def parse_spell(text: str) -> Spell:
    """Parse a weekly spell such as ``"Mon-Fri 07:00-19:00"`` or ``"Sat 09:00-13:00"``.

    Raises:
        ValueError: the text is not of that form.
    """
    m = _SPELL.match(text)
    if not m:
        raise ValueError("expected a spell such as \"Mon-Fri 07:00-19:00\"")
    day_names = [d.capitalize() for d in (m.group(1), m.group(2) or m.group(1))]
    for d in day_names:
        if d not in WEEKDAYS:
            raise ValueError(f"unknown day {d!r}; expected one of {', '.join(WEEKDAYS)}")
    d0, d1 = (WEEKDAYS.index(d) for d in day_names)
    days = tuple((d0 + i) % 7 for i in range((d1 - d0) % 7 + 1))
    h0, m0, h1, m1 = (int(m.group(i)) for i in (3, 4, 5, 6))
    start, end = h0 * 60 + m0, h1 * 60 + m1
    if m0 > 59 or m1 > 59 or start >= 1440 or end > 1440 or end <= start:
        raise ValueError("times must be HH:MM with the end after the start, at most 24:00")
    return Spell(days=days, start_min=start, end_min=end)


def _prior(t: _Table, eq_id: str) -> tuple[Prior, float | None]:
    """The running-draw prior and the full-load input power from what is known of the size."""
    full_load_kw = None
    size_source = ""
    rated_kw = t.positive("rated_kw")
    hp = t.positive("hp")
    volts = t.positive("volts")
    if rated_kw is not None:
        full_load_kw, size_source = rated_kw, f"rated_kw {rated_kw:g}"
    elif hp is not None:
        eff = t.positive("efficiency", required=True, upper=1.0)
        # US DOE, "Determining Electric Motor Load and Efficiency": input = hp x 0.746 / eff.
        full_load_kw = hp * KW_PER_HP / eff
        size_source = f"{hp:g} hp x 0.746 / efficiency {eff:g}"
    elif volts is not None:
        amps = t.positive("amps", required=True)
        pf = t.positive("power_factor", required=True, upper=1.0)
        phases = t.get("phases", int)
        if phases not in (1, 3):
            raise ConfigError(f"{t.where('phases')} = {phases!r}: expected 1 or 3")
        # US DOE, same fact sheet, Eq. 1: P = sqrt(3) x V x I x PF / 1000 for three phases.
        factor = math.sqrt(3.0) if phases == 3 else 1.0
        full_load_kw = factor * volts * amps * pf / 1000.0
        size_source = (f"{'sqrt(3) x ' if phases == 3 else ''}{volts:g} V x {amps:g} A"
                       f" x PF {pf:g} / 1000")

    draw_kw = t.positive("draw_kw")
    sd_kw = t.positive("draw_sd_kw")
    if sd_kw is not None and draw_kw is None:
        raise ConfigError(f"{t.where('draw_sd_kw')} is given without draw_kw for "
                          f"equipment {eq_id!r}; add draw_kw or remove draw_sd_kw")
    if draw_kw is not None:
        if sd_kw is None:
            sd_kw = DRAW_ONLY_SD_FRACTION * draw_kw
            return Prior(draw_kw, sd_kw, "draw_kw; sd 25 % of draw_kw (common practice)"), full_load_kw
        return Prior(draw_kw, sd_kw, "draw_kw +- draw_sd_kw"), full_load_kw
    if full_load_kw is not None:
        return (Prior(NAMEPLATE_RUNNING_FRACTION * full_load_kw,
                      NAMEPLATE_SD_FRACTION * full_load_kw,
                      f"80 % +- 30 % of full-load input {full_load_kw:.3g} kW ({size_source})"),
                full_load_kw)
    return Prior(None, None, "none (no size or draw given)"), None


# The breakdown's own rows: no equipment may take their names.
RESERVED_IDS = ("baseload", "unexplained", "estimated-gaps")


def _equipment(path: Path, index: int, data: object, seen: set[str],
               weather: WeatherSettings | None = None) -> Equipment:
    t = _Table(path, f"[equipment] #{index + 1}", data)
    t.name = f"equipment #{index + 1}"
    eq_id = t.get("id", str).strip()
    if not eq_id or any(c in eq_id for c in "+;,\n"):
        raise ConfigError(f"{t.where('id')} = {eq_id!r}: expected a non-empty id without "
                          "'+', ';', ',' or line breaks")
    if eq_id in seen or eq_id in RESERVED_IDS:
        raise ConfigError(f"{t.where('id')} = {eq_id!r}: ids must be unique and not "
                          "'baseload', 'unexplained' or 'estimated-gaps' (the breakdown's own "
                          "rows)")
    seen.add(eq_id)
    t.name = f"equipment {eq_id}"
    t.only({"id", "name", "kind", "control", "exponent", "rated_kw", "hp", "efficiency", "volts",
            "amps", "phases", "power_factor", "draw_kw", "draw_sd_kw", "weather", "balance_temp",
            "aliases"})
    name = t.get("name", str, required=False, default=eq_id)
    kind = t.get("kind", str, required=False, default="")
    control = t.choice("control", CONTROLS, required=False, default="on-off")
    exponent = 1.0
    if control == "variable":
        exponent = t.positive("exponent", upper=4.0) or 1.0
    elif "exponent" in t.data:
        raise ConfigError(f"{t.where('exponent')}: only used with control = \"variable\"")
    prior, full_load_kw = _prior(t, eq_id)
    mode = t.choice("weather", WEATHER_MODES, required=False)
    balance_c = None
    if mode is not None:
        if weather is None:
            raise ConfigError(f"{t.where('weather')} = {mode!r}: needs a [weather] table with "
                              "the outdoor temperature file")
        balance = _temperature(t, "balance_temp", required=True)
        balance_c = to_celsius(balance, weather.unit)
    elif "balance_temp" in t.data:
        raise ConfigError(f"{t.where('balance_temp')}: only used with weather = \"cooling\" or "
                          "\"heating\"")
    aliases = _aliases(t, eq_id)
    return Equipment(eq_id, name, kind, control, exponent, prior, full_load_kw, mode, balance_c,
                     aliases)


def _aliases(t: _Table, eq_id: str) -> tuple[str, ...]:
    """The optional ``aliases`` list: former ids whose run-log rows count as this equipment."""
    out: list[str] = []
    for i, a in enumerate(t.get("aliases", list, required=False, default=[])):
        where = f"{t.where('aliases')}[{i}] = {a!r}"
        if not isinstance(a, str):
            raise ConfigError(f"{where}: expected text, a former id of equipment {eq_id!r}")
        a = a.strip()
        if not a or any(c in a for c in "+;,\n"):
            raise ConfigError(f"{where}: expected a non-empty id without '+', ';', ',' or line "
                              "breaks")
        if a == eq_id or a in out:
            raise ConfigError(f"{where}: already names equipment {eq_id!r}; remove it")
        out.append(a)
    return tuple(out)


def _check_aliases(path: Path, equipment: tuple[Equipment, ...]) -> None:
    """An alias must name one equipment only and must not be another equipment's id.

    Raises:
        ConfigError: naming the equipment, the alias and the other use of it.
    """
    ids = {e.id for e in equipment}
    owner: dict[str, str] = {}
    for e in equipment:
        for i, a in enumerate(e.aliases):
            where = f"{path}: [equipment {e.id}] aliases[{i}] = {a!r}"
            if a in ids:
                raise ConfigError(f"{where}: is the id of another equipment; an alias is a "
                                  "former id that no configured equipment uses; remove it")
            if a in owner:
                raise ConfigError(f"{where}: is already an alias of equipment {owner[a]!r}; "
                                  "a former id can count as one equipment only; remove one")
            owner[a] = e.id


# Deepest nesting of arrays and tables accepted in a TOML file: far more than any site or
# portfolio file needs, far less than the parser's recursion limit.
MAX_TOML_DEPTH = 50


def parse_toml(text: str, path: Path) -> dict:
    """tomllib.loads, with every failure a ConfigError naming the file.

    Raises:
        ConfigError: not valid TOML, or nested deeper than MAX_TOML_DEPTH.
    """
    depth = deepest = 0
    for ch in text:  # brackets in strings count too: an overestimate, never an underestimate
        if ch in "[{":
            depth += 1
            deepest = max(deepest, depth)
        elif ch in "]}":
            depth = max(0, depth - 1)
    if deepest > MAX_TOML_DEPTH:
        raise ConfigError(f"{path}: not valid TOML for disagg (arrays or tables nested more "
                          f"than {MAX_TOML_DEPTH} deep)")
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: not valid TOML ({exc})") from None
    except RecursionError:
        raise ConfigError(f"{path}: not valid TOML for disagg (nested too deeply)") from None


def load_site(path: str | Path) -> SiteConfig:
    """Read and check a site TOML file.

    Args:
        path: the site file.

    Returns:
        The settings, with file paths resolved against the TOML's folder.

    Raises:
        ConfigError: the file is missing, is not TOML, or a setting is missing or invalid.
    """
    path = resolve_path(path, "site file")
    check_regular_file(path, "site file")
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such site file") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: cannot read the site file ({exc})") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read the site file ({exc.strerror or exc})") from None
    data = parse_toml(text, path)
    _check_top_level(path, data)

    for key in ("site", "meter", "runlog"):
        if key not in data:
            raise ConfigError(f"{path}: the [{key}] table is missing; add it to the file")
    site = _Table(path, "site", data["site"])
    site.only({"name", "timezone"})
    name = site.get("name", str)
    tz = site.get("timezone", str)
    try:
        zoneinfo.ZoneInfo(tz)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError, OSError):
        raise ConfigError(f"{site.where('timezone')} = {tz!r}: expected an IANA time zone "
                          "name such as \"America/Chicago\"") from None

    m = _Table(path, "meter", data["meter"])
    if _is_greenbutton(m):
        meter = _greenbutton_meter(m)
    else:
        meter = _csv_meter(m)

    r = _Table(path, "runlog", data["runlog"])
    layout = r.choice("layout", RUNLOG_LAYOUTS)
    r.only({"file", "layout", "time_column", "date_order", "log_offset_minutes"} | {
        "events": {"equipment_column", "state_column"},
        "samples": {"max_hold_minutes"},
        "runtime": {"equipment_column", "minutes_column", "stamp", "interval_minutes"}}[layout])
    runlog = RunlogSettings(
        file=r.file("file"),
        layout=layout,
        time_column=r.get("time_column", str),
        equipment_column=r.get("equipment_column", str) if layout != "samples" else None,
        state_column=r.get("state_column", str) if layout == "events" else None,
        minutes_column=r.get("minutes_column", str) if layout == "runtime" else None,
        max_hold_min=r.positive("max_hold_minutes", required=True) if layout == "samples" else None,
        stamp=r.choice("stamp", STAMPS, required=False, default="start") if layout == "runtime" else "start",
        interval_min=_interval(r, "interval_minutes") if layout == "runtime" else None,
        date_order=_date_order(r),
        log_offset_min=_log_offset(r),
    )

    b = _Table(path, "baseload", data.get("baseload", {}))
    profile = b.choice("profile", BASELOAD_PROFILES, required=False, default="constant")
    b.only({"profile", "occupied", "closed", "form"} if profile == "occupied"
           else {"profile", "closed", "form"} if profile == "hour-of-week" else {"profile", "form"})
    form = b.choice("form", BASELOAD_FORMS, required=False, default="auto")
    if form != "auto" and (form.startswith("occupied") or "-edges" in form) and profile != "occupied":
        raise ConfigError(f"{b.where('form')} = {form!r}: the occupied and edges forms need "
                          "profile = \"occupied\" and its spells")
    spells: tuple[Spell, ...] = ()
    spell_text: tuple[str, ...] = ()
    if profile == "occupied":
        spells, spell_text = _spells(b, "occupied", example="Mon-Fri 07:00-19:00")
    closed: list[dt.date] = []
    closed.extend(_dates(b, "closed"))
    baseload = BaseloadSettings(profile, spells, spell_text, tuple(closed), form)

    weather = None
    if "weather" in data:
        w = _Table(path, "weather", data["weather"])
        w.only({"file", "time_column", "temp_column", "unit", "reference_temp", "date_order"})
        unit = w.choice("unit", TEMP_UNITS)
        ref_t = _temperature(w, "reference_temp", required=False)
        weather = WeatherSettings(w.file("file"), w.get("time_column", str),
                                  w.get("temp_column", str), unit,
                                  None if ref_t is None else to_celsius(ref_t, unit),
                                  _date_order(w))
    raw_eq = data.get("equipment", [])
    if not isinstance(raw_eq, list) or not raw_eq:
        raise ConfigError(f"{path}: no [[equipment]] tables; add one per logged load")
    seen: set[str] = set()
    equipment = tuple(_equipment(path, i, e, seen, weather) for i, e in enumerate(raw_eq))
    _check_aliases(path, equipment)
    tariff = _tariff(_Table(path, "tariff", data["tariff"])) if "tariff" in data else None
    history = None
    if "history" in data:
        h = _Table(path, "history", data["history"])
        h.only({"folder"})
        history = h.file("folder")
    return SiteConfig(path, name, tz, meter, runlog, baseload, equipment, weather=weather,
                      tariff=tariff, history=history)


# No energy or demand price comes near this [currency per kWh or per kW]; a larger one is a
# typing error, and would overflow the cost sums (common practice, no source).
MAX_PRICE = 1e6


def _price(t: _Table, key: str, required: bool) -> float | None:
    value = t.get(key, float, required=required)
    if value is not None and (not math.isfinite(value) or value < 0 or value > MAX_PRICE):
        raise ConfigError(f"{t.where(key)} = {value!r}: expected a price of 0 or more, at "
                          f"most {MAX_PRICE:g}")
    return value


def _dates(t: _Table, key: str) -> tuple[dt.date, ...]:
    """A list of local dates (TOML dates or "YYYY-MM-DD" text); a date-time is refused,
    because it would never equal a calendar day and so be ignored."""
    out = []
    for i, d in enumerate(t.get(key, list, required=False, default=[])):
        day = None
        if isinstance(d, dt.date) and not isinstance(d, dt.datetime):
            day = d
        elif isinstance(d, str):
            with contextlib.suppress(ValueError):
                day = dt.date.fromisoformat(d)
        if day is None:
            raise ConfigError(f"{t.where(key)}[{i}] = {d!r}: expected a date such as "
                              "2025-07-04, without a time of day")
        out.append(day)
    return tuple(out)


def _spells(t: _Table, key: str, example: str = "Mon-Fri 12:00-18:00"
            ) -> tuple[tuple[Spell, ...], tuple[str, ...]]:
    """A list of weekly spells (baseload occupied hours, tariff periods) and their texts."""
    raw = t.get(key, list)
    if not raw:
        raise ConfigError(f"{t.where(key)}: expected at least one spell such as "
                          f"\"{example}\"")
    spells = []
    for i, s in enumerate(raw):
        if not isinstance(s, str):
            raise ConfigError(f"{t.where(key)}[{i}] = {s!r}: expected text")
        try:
            spells.append(parse_spell(s))
        except ValueError as exc:
            raise ConfigError(f"{t.where(key)}[{i}] = {s!r}: {exc}") from None
    return tuple(spells), tuple(raw)


def _tariff(t: _Table) -> TariffSettings:
    """[tariff] currency, energy_price, optional demand_price, holidays, [[tariff.periods]]."""
    t.only({"currency", "energy_price", "demand_price", "holidays", "periods"})
    currency = t.get("currency", str)
    if not currency.strip() or len(currency) > 12:
        raise ConfigError(f"{t.where('currency')} = {currency!r}: expected a short currency "
                          "name such as USD or EUR")
    raw = t.get("periods", list, required=False, default=[])
    periods: list[TouPeriod] = []
    for i, p in enumerate(raw):
        pt = _Table(t.path, f"tariff.periods {i + 1}", p)
        pt.only({"name", "price", "spells"})
        name = pt.get("name", str)
        if name in {q.name for q in periods}:
            raise ConfigError(f"{pt.where('name')} = {name!r}: a period of that name is "
                              "already defined")
        spells, text = _spells(pt, "spells")
        for q in periods:
            for a in spells:
                for b in q.spells:
                    if (set(a.days) & set(b.days) and a.start_min < b.end_min
                            and b.start_min < a.end_min):
                        raise ConfigError(f"{pt.where('spells')}: {name!r} overlaps "
                                          f"{q.name!r}; each time may have one price")
        periods.append(TouPeriod(name, _price(pt, "price", True), spells, text))
    return TariffSettings(currency.strip(), _price(t, "energy_price", True),
                          _price(t, "demand_price", False) or 0.0, tuple(periods),
                          _dates(t, "holidays"))


def parse_period(text: str, option: str = "period") -> tuple[dt.date, dt.date]:
    """``"2025-06-01:2025-08-31"`` -> (date(2025, 6, 1), date(2025, 8, 31)), both inclusive.

    Args:
        text: FROM:TO, two ISO dates (local dates of the site).
        option: the option's name for messages, e.g. ``--before``.

    Raises:
        ConfigError: not two dates separated by ':', or FROM after TO.
    """
    parts = text.split(":")
    try:
        if len(parts) != 2:
            raise ValueError
        d0, d1 = (dt.date.fromisoformat(p.strip()) for p in parts)
    except ValueError:
        raise ConfigError(f"{option} {text!r}: expected FROM:TO dates such as "
                          "2025-06-01:2025-08-31") from None
    if d1 < d0:
        raise ConfigError(f"{option} {text!r}: TO {d1} is before FROM {d0}; expected FROM:TO "
                          "with FROM on or before TO")
    return d0, d1
