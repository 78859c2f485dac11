"""Outdoor temperature readings -> temperatures in degC in UTC time."""

from __future__ import annotations

import polars as pl

from disagg.errors import InputError
from disagg.inputs.config import (
    WeatherSettings,
)
from disagg.inputs.readers.tables import (
    _numbers,
    _row_label,
    parse_times,
    read_table,
    require_columns,
)

# Beyond any outdoor temperature recorded (-89.2 degC and 56.7 degC, the WMO's world
# records, from memory), with a wide margin: a value outside is a sensor fault or a typo.
MIN_OUTDOOR_C, MAX_OUTDOOR_C = -100.0, 100.0


def read_weather(settings: WeatherSettings, tz: str) -> pl.DataFrame:
    """Outdoor temperature readings -> frame t (UTC) and temp_c [degC], sorted by time.

    Empty cells are unknown and dropped. Raises InputError for a missing column, an
    unreadable time or temperature, or the same time twice with different readings.
    """
    path = settings.file
    raw = read_table(path, "weather", [settings.time_column, settings.temp_column])
    require_columns(raw, path, [settings.time_column, settings.temp_column])
    t = parse_times(raw, settings.time_column, tz, path, date_order=settings.date_order,
                    setting="[weather] date_order")
    temp = _numbers(raw, settings.temp_column, path, f"a temperature in {settings.unit}")
    if settings.unit == "F":
        temp = (temp - 32.0) * 5.0 / 9.0
    odd = ((temp < MIN_OUTDOOR_C) | (temp > MAX_OUTDOOR_C)).fill_null(False)
    if odd.any():
        idx = int(odd.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {settings.temp_column!r}: "
                         f"{raw.get_column(settings.temp_column)[idx]} {settings.unit} is no "
                         f"outdoor temperature; expected {MIN_OUTDOOR_C:g} to {MAX_OUTDOOR_C:g} "
                         "degC")
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
