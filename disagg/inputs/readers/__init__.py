"""Input files -> polars frames and state segments in UTC, one module per kind of file.

Row numbers in messages are the file's line numbers for CSV (the header is line 1) and
1-based data rows for Parquet. A meter file may also be a Green Button (NAESB ESPI) .xml
download, whose readings are named by position ("IntervalReading 17").
"""

from disagg.inputs.readers.meter import MeterData, infer_interval_min, read_meter
from disagg.inputs.readers.runlog import RunLog, Segments, read_runlog
from disagg.inputs.readers.tables import parse_times, read_table, require_columns
from disagg.inputs.readers.weather import read_weather

__all__ = ["MeterData", "RunLog", "Segments", "infer_interval_min", "parse_times",
           "read_greenbutton", "read_meter", "read_runlog", "read_table", "read_weather",
           "require_columns"]


def __getattr__(name: str):
    """read_greenbutton on first use: only an .xml meter needs the XML reader."""
    if name == "read_greenbutton":
        from disagg.inputs.readers.greenbutton import read_greenbutton

        return read_greenbutton
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
