"""Tests for reading Green Button (NAESB REQ.21 ESPI) interval-data XML as a meter file.

The files in tests/data/ were written by hand from the standard's structure (an Atom feed
whose entries hold UsagePoint, LocalTimeParameters, MeterReading, ReadingType and
IntervalBlock); they are invented, four 15-minute readings on 2012-03-01 05:00-06:00 UTC:
greenbutton_15min_wh.xml in Wh (uom 72, powerOfTenMultiplier 0), greenbutton_15min_mwh.xml
the same energy in mWh (multiplier -3), greenbutton_15min_w.xml the same energy as mean
demand in W (uom 38). Other files are generated here with the same structure. Error
messages are checked in full: they name the file, the reading by its position in the file
("IntervalReading 3") or the element, and what was expected.
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from polars.testing import assert_frame_equal
from typer.testing import CliRunner

from disagg.cli import app
from disagg.inputs.config import load_site
from disagg.errors import ConfigError, InputError
from disagg.analyses.pipeline import breakdown_site
from disagg.inputs.readers import read_greenbutton, read_meter

DATA = Path(__file__).resolve().parent / "data"
WH_FILE = DATA / "greenbutton_15min_wh.xml"
MWH_FILE = DATA / "greenbutton_15min_mwh.xml"
W_FILE = DATA / "greenbutton_15min_w.xml"
UTC = dt.UTC
ATOM = "http://www.w3.org/2005/Atom"
ESPI = "http://naesb.org/espi"
WHAT = "a Green Button (NAESB ESPI) interval-data XML file"

# Worked check, NAESB REQ.21 ESPI usage.xsd v3.3 as summarised in docs/references.md section 8
# (read): intervalLength 900, uom 72 (Wh), powerOfTenMultiplier 0, a reading starting at
# 1330578000 s (2012-03-01 05:00 UTC) lasting 900 s with value 282 holds 0.282 kWh, a mean
# demand of 1.128 kW. The source prints three decimals, so the tolerance is half a unit in
# the third decimal.
CHECK_START_S = 1330578000
CHECK_START_UTC = dt.datetime(2012, 3, 1, 5, 0, tzinfo=UTC)
CHECK_DURATION_S = 900
CHECK_VALUE = 282
CHECK_KWH = 0.282
CHECK_KW = 1.128
CHECK_TOL = 0.0005
# The hand-written files' four readings [Wh], in file order (invented).
FILE_WH = [282, 301, 275, 290]


# ---------------------------------------------------------------------------------------
# Writing Green Button feeds


def _entry(self_href: str, content: str, *, up: str = "", related: tuple[str, ...] = (),
           title: str = "") -> str:
    links = [f'<link rel="self" href="{self_href}"/>']
    links += [f'<link rel="up" href="{up}"/>'] if up else []
    links += [f'<link rel="related" href="{r}"/>' for r in related]
    return (f"<entry><id>urn:disagg-test:{self_href}</id>{''.join(links)}"
            f"<title>{title}</title><content>{content}</content>"
            "<updated>2012-03-02T00:00:00Z</updated></entry>")


def _reading_type(k: int, uom: int, power_of_ten: int | None, accumulation: int | None,
                  interval_length_s: int) -> str:
    fields = ([f"<accumulationBehaviour>{accumulation}</accumulationBehaviour>"]
              if accumulation is not None else [])
    fields += ["<commodity>1</commodity>", "<flowDirection>1</flowDirection>",
               f"<intervalLength>{interval_length_s}</intervalLength>", "<kind>12</kind>"]
    fields += ([f"<powerOfTenMultiplier>{power_of_ten}</powerOfTenMultiplier>"]
               if power_of_ten is not None else [])
    fields += [f"<uom>{uom}</uom>"]
    return _entry(f"ReadingType/{k}",
                  f'<ReadingType xmlns="{ESPI}">{"".join(fields)}</ReadingType>',
                  up="ReadingType")


def _interval_reading(start_s: int | None, duration_s: int | None, value: object) -> str:
    period = ("" if start_s is None else
              f"<timePeriod><duration>{duration_s}</duration><start>{start_s}</start></timePeriod>")
    val = "" if value is None else f"<value>{value}</value>"
    return f"<IntervalReading>{period}{val}</IntervalReading>"


def _meter_reading(k: int, readings: list[tuple], *, title: str = "", reading_type: int = 1,
                   block_size: int = 96) -> list[str]:
    """A MeterReading entry and its IntervalBlock entries (one per block_size readings)."""
    base = f"RetailCustomer/1/UsagePoint/1/MeterReading/{k}"
    out = [_entry(base, f'<MeterReading xmlns="{ESPI}"/>',
                  up="RetailCustomer/1/UsagePoint/1/MeterReading",
                  related=(f"{base}/IntervalBlock", f"ReadingType/{reading_type}"), title=title)]
    for b in range(0, max(len(readings), 1), block_size):
        chunk = readings[b:b + block_size]
        timed = [r for r in chunk if isinstance(r[0], int) and isinstance(r[1], int)]
        block_start = min((r[0] for r in timed), default=0)
        block_end = max((r[0] + r[1] for r in timed), default=block_start)
        body = "".join(_interval_reading(*r) for r in chunk)
        out.append(_entry(f"{base}/IntervalBlock/{b // block_size + 1}",
                          f'<IntervalBlock xmlns="{ESPI}"><interval><duration>'
                          f"{block_end - block_start}</duration><start>{block_start}</start>"
                          f"</interval>{body}</IntervalBlock>",
                          up=f"{base}/IntervalBlock"))
    return out


def _feed(entries: list[str]) -> str:
    usage_point = _entry("RetailCustomer/1/UsagePoint/1",
                         f'<UsagePoint xmlns="{ESPI}"><ServiceCategory><kind>0</kind>'
                         "</ServiceCategory></UsagePoint>",
                         up="RetailCustomer/1/UsagePoint",
                         related=("RetailCustomer/1/UsagePoint/1/MeterReading",))
    return (f'<?xml version="1.0" encoding="UTF-8"?>\n<feed xmlns="{ATOM}">'
            "<id>urn:uuid:feed</id><title>Green Button Usage Feed</title>"
            f"<updated>2012-03-02T00:00:00Z</updated>\n{usage_point}\n"
            + "\n".join(entries) + "\n</feed>\n")


def greenbutton_xml(readings: list[tuple], *, uom: int = 72, power_of_ten: int | None = 0,
                    accumulation: int | None = 4, interval_length_s: int = 900) -> str:
    """A feed with one MeterReading; readings are (start_s, duration_s, value) tuples."""
    return _feed([_reading_type(1, uom, power_of_ten, accumulation, interval_length_s),
                  *_meter_reading(1, readings, title="Electricity")])


def _quarter_hours(values: list[object], start_s: int = CHECK_START_S) -> list[tuple]:
    return [(start_s + 900 * i, 900, v) for i, v in enumerate(values)]


def _write(tmp_path: Path, text: str, name: str = "meter.xml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path.resolve()


def _message(exc_info) -> str:
    return str(exc_info.value)


# ---------------------------------------------------------------------------------------
# Site files with a Green Button meter

EVENTS_TOML = ('[runlog]\nfile = "log.csv"\nlayout = "events"\ntime_column = "time"\n'
               'equipment_column = "point"\nstate_column = "state"\n')


def _site(tmp_path: Path, meter_file: str, meter_extra: str = "") -> Path:
    path = tmp_path / "site.toml"
    path.write_text(f'''[site]
name = "Green Button test site"
timezone = "America/New_York"

[meter]
file = "{meter_file}"
{meter_extra}

{EVENTS_TOML}
[[equipment]]
id = "CH-1"
''', encoding="utf-8")
    return path


def _meter_from(tmp_path: Path, text: str, meter_extra: str = ""):
    """Write meter.xml and a site file; return the site's settings."""
    _write(tmp_path, text)
    return load_site(_site(tmp_path, "meter.xml", meter_extra))


# ---------------------------------------------------------------------------------------
# Values: the worked check, the multiplier, Wh and W


def test_worked_check_from_the_standard():
    frame = read_greenbutton(WH_FILE)
    assert frame.columns == ["start_utc", "end_utc", "energy_kwh"]
    first = frame.row(0, named=True)
    assert first["start_utc"] == CHECK_START_UTC
    assert dt.datetime.fromtimestamp(CHECK_START_S, UTC) == CHECK_START_UTC
    duration_s = (first["end_utc"] - first["start_utc"]).total_seconds()
    assert duration_s == CHECK_DURATION_S
    assert first["energy_kwh"] == pytest.approx(CHECK_KWH, abs=CHECK_TOL)
    mean_kw = first["energy_kwh"] / (duration_s / 3600.0)
    assert mean_kw == pytest.approx(CHECK_KW, abs=CHECK_TOL)


def test_the_hand_written_file_reads_every_interval_in_utc():
    frame = read_greenbutton(WH_FILE)
    assert frame.schema["start_utc"] == pl.Datetime("us", "UTC")
    assert frame.schema["end_utc"] == pl.Datetime("us", "UTC")
    assert frame["start_utc"].to_list() == [CHECK_START_UTC + dt.timedelta(minutes=15 * i)
                                            for i in range(4)]
    assert frame["end_utc"].to_list() == [CHECK_START_UTC + dt.timedelta(minutes=15 * (i + 1))
                                          for i in range(4)]
    # Exact: the reader divides the whole number by 1000 once, correctly rounded.
    assert frame["energy_kwh"].to_list() == [wh / 1000 for wh in FILE_WH]


def test_a_power_of_ten_multiplier_of_minus_3_reads_mwh_as_the_same_energy():
    assert_frame_equal(read_greenbutton(MWH_FILE), read_greenbutton(WH_FILE), check_exact=True)


def test_mean_demand_in_watts_reads_as_the_same_energy():
    # 282 Wh in 15 minutes is 1128 W of mean demand: W x 0.25 h / 1000 = kWh.
    assert_frame_equal(read_greenbutton(W_FILE), read_greenbutton(WH_FILE), check_exact=True)


@pytest.mark.parametrize("uom, power_of_ten, value, duration_s, kwh", [
    (72, 0, 282, 900, 0.282),
    (72, -3, 282000, 900, 0.282),
    (72, 1, 28, 900, 0.28),  # 28 x 10 Wh
    (72, 3, 2, 900, 2.0),  # 2 kWh written as 2 x 10^3 Wh
    (38, 0, 1128, 900, 0.282),
    (38, 0, 1128, 3600, 1.128),  # the same mean demand held for an hour
    (38, 3, 2, 1800, 1.0),  # 2 kW for half an hour
    (38, -1, 11280, 900, 0.282),
])
def test_values_are_scaled_by_the_multiplier_and_unit(tmp_path, uom, power_of_ten, value,
                                                      duration_s, kwh):
    path = _write(tmp_path, greenbutton_xml([(CHECK_START_S, duration_s, value)], uom=uom,
                                            power_of_ten=power_of_ten,
                                            interval_length_s=duration_s))
    frame = read_greenbutton(path)
    assert frame["energy_kwh"].to_list() == [kwh]
    assert frame["end_utc"][0] - frame["start_utc"][0] == dt.timedelta(seconds=duration_s)


def test_an_absent_multiplier_means_ten_to_the_zero(tmp_path):
    path = _write(tmp_path, greenbutton_xml(_quarter_hours([282]), power_of_ten=None))
    assert read_greenbutton(path)["energy_kwh"].to_list() == [0.282]


def test_a_reading_without_a_value_is_no_reading(tmp_path):
    path = _write(tmp_path, greenbutton_xml(_quarter_hours([282, None, 290])))
    assert read_greenbutton(path)["energy_kwh"].to_list() == [0.282, None, 0.29]


def test_readings_without_time_period_follow_the_block_start_at_the_interval_length(tmp_path):
    text = greenbutton_xml(_quarter_hours([282, 301, 275]))
    # Keep the block's interval and the ReadingType's intervalLength; drop the timePeriods.
    stripped = re.sub(r"<timePeriod>.*?</timePeriod>", "", text)
    assert "<timePeriod>" not in stripped
    assert_frame_equal(read_greenbutton(_write(tmp_path, stripped, "bare.xml")),
                       read_greenbutton(_write(tmp_path, text)), check_exact=True)


def test_a_second_meter_reading_without_interval_data_is_ignored(tmp_path):
    other = _entry("RetailCustomer/1/UsagePoint/1/MeterReading/2",
                   f'<MeterReading xmlns="{ESPI}"/>',
                   related=("RetailCustomer/1/UsagePoint/1/MeterReading/2/IntervalBlock",
                            "ReadingType/2"), title="Daily register")
    text = _feed([_reading_type(1, 72, 0, 4, 900), _reading_type(2, 38, 0, None, 86400), other,
                  *_meter_reading(1, _quarter_hours([282, 301]), title="Electricity")])
    assert read_greenbutton(_write(tmp_path, text))["energy_kwh"].to_list() == [0.282, 0.301]


# ---------------------------------------------------------------------------------------
# read_meter and the site file


def test_read_meter_dispatches_xml_to_the_green_button_reader(tmp_path):
    _write(tmp_path, WH_FILE.read_text(encoding="utf-8"))
    site = load_site(_site(tmp_path, "meter.xml"))
    assert site.meter.time_column is None and site.meter.unit is None
    m = read_meter(site.meter, site.timezone)
    assert m.interval_min == 15
    assert m.rows_read == 4 and m.duplicates_dropped == 0 and m.notes == []
    assert m.path == (tmp_path / "meter.xml").resolve()
    assert_frame_equal(m.frame, read_greenbutton(WH_FILE))


def test_read_meter_sorts_by_start_and_drops_identical_repeats(tmp_path):
    readings = _quarter_hours([282, 301, 275, 290])
    site = _meter_from(tmp_path, greenbutton_xml([readings[2], readings[0], readings[1],
                                                  readings[0], readings[3]]))
    m = read_meter(site.meter, site.timezone)
    assert m.rows_read == 5 and m.duplicates_dropped == 1
    assert m.notes == ["1 repeated meter IntervalReadings with identical values were dropped"]
    assert_frame_equal(m.frame, read_greenbutton(WH_FILE))


def test_interval_minutes_in_the_site_file_must_match_the_readings(tmp_path):
    site = _meter_from(tmp_path, WH_FILE.read_text(encoding="utf-8"), "interval_minutes = 15")
    assert read_meter(site.meter, site.timezone).interval_min == 15
    site = _meter_from(tmp_path, WH_FILE.read_text(encoding="utf-8"), "interval_minutes = 30")
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{site.meter.file}: the readings last 15 minutes but the site "
                             "file sets interval_minutes = 30; remove interval_minutes or "
                             "correct it")


def test_csv_settings_are_refused_for_an_xml_meter(tmp_path):
    _write(tmp_path, WH_FILE.read_text(encoding="utf-8"))
    path = _site(tmp_path, "meter.xml", 'unit = "kWh"')
    with pytest.raises(ConfigError) as exc:
        load_site(path)
    assert _message(exc) == (f"{path.resolve()}: [meter] unit: not used with a Green Button .xml "
                             "meter file (the file states its own times and unit); remove it")


def test_a_csv_meter_still_needs_its_columns(tmp_path):
    path = _site(tmp_path, "meter.csv", 'value_column = "kwh"\nunit = "kWh"')
    with pytest.raises(ConfigError) as exc:
        load_site(path)
    assert _message(exc) == (f"{path.resolve()}: [meter] time_column is missing; add it to the "
                             "file")


# ---------------------------------------------------------------------------------------
# Errors


def test_malformed_xml(tmp_path):
    path = _write(tmp_path, f'<?xml version="1.0"?>\n<feed xmlns="{ATOM}">\n<entry>\n</feed>\n')
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: line 4, column 3: not well-formed XML (mismatched tag); "
                             f"expected {WHAT}")


def test_empty_file(tmp_path):
    path = _write(tmp_path, "")
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == f"{path}: the file is empty; expected {WHAT}"


def test_a_feed_without_interval_readings(tmp_path):
    path = _write(tmp_path, greenbutton_xml([]))
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: no IntervalReading found; expected {WHAT}: entries whose "
                             "content holds IntervalBlock elements with IntervalReading "
                             f"elements (namespace {ESPI})")


def test_missing_file(tmp_path):
    path = (tmp_path / "absent.xml").resolve()
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == f"{path}: no such meter file; check the path in the site file"


def test_a_document_type_declaration_is_refused_and_nothing_is_fetched(tmp_path):
    secret = tmp_path / "secret.txt"
    secret.write_text("999", encoding="utf-8")
    text = greenbutton_xml(_quarter_hours(["&x;"])).replace(
        "<feed", f'<!DOCTYPE feed [<!ENTITY x SYSTEM "{secret.as_uri()}">]>\n<feed', 1)
    path = _write(tmp_path, text)
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: the file holds a <!DOCTYPE> or <!ENTITY> declaration; "
                             f"expected {WHAT}, which has none")


@pytest.mark.parametrize("uom", [42, 169, 73])
def test_unsupported_unit_code(tmp_path, uom):
    path = _write(tmp_path, greenbutton_xml(_quarter_hours([282]), uom=uom))
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: ReadingType: uom {uom} is not a supported unit code; "
                             "expected 72 (Wh, energy per interval) or 38 (W, mean demand over "
                             "the interval)")


def test_register_readings_in_wh_are_refused(tmp_path):
    path = _write(tmp_path, greenbutton_xml(_quarter_hours([282]), accumulation=1))
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: ReadingType: accumulationBehaviour 1: the Wh values are "
                             "not the energy of each interval; expected 4 (deltaData)")


def test_non_integer_value_names_the_reading(tmp_path):
    path = _write(tmp_path, greenbutton_xml(_quarter_hours([282, 301, "28.2", 290])))
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: IntervalReading 3: value '28.2' is not a whole number; "
                             "expected a whole number (ESPI stores readings as integers scaled "
                             "by the ReadingType's powerOfTenMultiplier)")


def test_reading_positions_count_across_blocks(tmp_path):
    values: list[object] = [282] * 17
    values[16] = "x"
    text = _feed([_reading_type(1, 72, 0, 4, 900),
                  *_meter_reading(1, _quarter_hours(values), block_size=5)])
    path = _write(tmp_path, text)
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc).startswith(f"{path}: IntervalReading 17: value 'x' is not a whole number")


def test_negative_duration(tmp_path):
    path = _write(tmp_path, greenbutton_xml([(CHECK_START_S, 900, 282),
                                             (CHECK_START_S + 900, -900, 301)]))
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: IntervalReading 2: duration -900 s; expected a duration "
                             "above 0 seconds")


def test_a_time_that_is_not_a_whole_number(tmp_path):
    path = _write(tmp_path, greenbutton_xml([(CHECK_START_S, 900, 282),
                                             ("2012-03-01T05:15:00Z", 900, 301)]))
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: IntervalReading 2 timePeriod: start "
                             "'2012-03-01T05:15:00Z' is not a whole number; expected whole "
                             "seconds since 1970-01-01 UTC, before 2200")


def test_no_reading_type(tmp_path):
    path = _write(tmp_path, _feed(_meter_reading(1, _quarter_hours([282]))))
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (f"{path}: no ReadingType found; expected one giving the unit (uom) "
                             "and powerOfTenMultiplier of the IntervalReading values")


def test_two_meter_readings_with_interval_data(tmp_path):
    text = _feed([_reading_type(1, 72, 0, 4, 900), _reading_type(2, 72, 0, 4, 3600),
                  *_meter_reading(1, _quarter_hours([282, 301]), title="Electricity 15 min"),
                  *_meter_reading(2, [(CHECK_START_S, 3600, 1148)], title="Electricity hourly",
                                  reading_type=2)])
    path = _write(tmp_path, text)
    with pytest.raises(InputError) as exc:
        read_greenbutton(path)
    assert _message(exc) == (
        f"{path}: interval data for 2 MeterReadings ('Electricity 15 min' at "
        "RetailCustomer/1/UsagePoint/1/MeterReading/1; 'Electricity hourly' at "
        "RetailCustomer/1/UsagePoint/1/MeterReading/2); expected one; export the interval "
        "data of one meter reading (one meter, one quantity) on its own")


def test_negative_value_is_refused_by_read_meter(tmp_path):
    site = _meter_from(tmp_path, greenbutton_xml(_quarter_hours([282, 301, -120, 290])))
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{site.meter.file}: IntervalReading 3: negative value -120; "
                             "expected energy of 0 or more")


def test_an_interval_that_is_not_allowed(tmp_path):
    site = _meter_from(tmp_path, greenbutton_xml([(CHECK_START_S + 1200 * i, 1200, 282)
                                                  for i in range(3)], interval_length_s=1200))
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{site.meter.file}: the meter interval is 20 minutes (readings of "
                             "1200 s); expected one of 1, 5, 10, 15, 30, 60 minutes")


def test_a_reading_of_another_length(tmp_path):
    readings = _quarter_hours([282, 301, 275]) + [(CHECK_START_S + 2700, 3600, 1100)]
    site = _meter_from(tmp_path, greenbutton_xml(readings))
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{site.meter.file}: IntervalReading 4: duration 3600 s; expected "
                             "900 s like the file's other readings (one interval length per "
                             "meter file)")


def test_the_same_start_with_a_different_value(tmp_path):
    readings = _quarter_hours([282, 301, 275])
    site = _meter_from(tmp_path, greenbutton_xml(readings + [(readings[1][0], 900, 300)]))
    with pytest.raises(InputError) as exc:
        read_meter(site.meter, site.timezone)
    assert _message(exc) == (f"{site.meter.file}: IntervalReading 4: start 2012-03-01 "
                             "05:15:00+00:00 repeats IntervalReading 2 with a different reading; "
                             "expected one reading per interval")


def test_the_cli_prints_one_error_line_and_writes_nothing(tmp_path):
    site = tmp_path / "site"
    site.mkdir()
    _write(site, greenbutton_xml(_quarter_hours([282, 301]), uom=42))
    (site / "log.csv").write_text("time,point,state\n2012-03-01T00:00:00,CH-1,on\n",
                                  encoding="utf-8")
    out = tmp_path / "out"
    result = CliRunner().invoke(app, ["breakdown", str(_site(site, "meter.xml")), "--out",
                                      str(out)])
    assert result.exit_code == 1
    assert result.stdout == ""
    assert result.stderr == (f"Error: {(site / 'meter.xml').resolve()}: ReadingType: uom 42 is not "
                             "a supported unit code; expected 72 (Wh, energy per interval) or 38 "
                             "(W, mean demand over the interval)\n")
    assert not out.exists()


# ---------------------------------------------------------------------------------------
# End to end: the same site with a CSV meter and a Green Button meter

E2E_TZ = "America/New_York"
E2E_DAYS = 10
E2E_DRAW_KW = {"CH-1": 30.0, "AHU-1": 8.0}  # invented truth
E2E_BASELOAD_KW = 12.0
E2E_NOISE_KWH = 0.2  # standard deviation of the meter noise per 15-minute interval
E2E_START_UTC = dt.datetime(2025, 4, 7, 4, 0, tzinfo=UTC)  # Mon 2025-04-07 00:00 EDT
GRID_MIN = 5


def _write_pair(folder: Path, seed: int = 5) -> tuple[Path, Path, dict[str, float]]:
    """The same synthetic site twice: meter as CSV (kWh) and as Green Button XML (Wh).

    Returns the two site files and the true draws.
    """
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    n = E2E_DAYS * 96
    steps = n * 15 // GRID_MIN
    energy_kwh = np.full(n, E2E_BASELOAD_KW * 0.25)
    events = []
    grid = [E2E_START_UTC + dt.timedelta(minutes=GRID_MIN * k) for k in range(steps + 1)]
    for eq, kw in E2E_DRAW_KW.items():
        state = np.zeros(steps, dtype=np.int64)
        i, s = 0, int(rng.integers(0, 2))
        while i < steps:
            length = int(rng.integers(2, 31))
            state[i:i + length] = s
            s, i = 1 - s, i + length
        energy_kwh += kw * state.reshape(n, 15 // GRID_MIN).sum(axis=1) * GRID_MIN / 60.0
        change = np.concatenate([[0], np.flatnonzero(np.diff(state)) + 1, [steps]])
        for k in change:
            on = state[min(k, steps - 1)]
            events.append((grid[k].isoformat(), eq, "on" if on else "off"))
    wh = np.maximum(np.round((energy_kwh + rng.normal(0.0, E2E_NOISE_KWH, n)) * 1000), 0)
    wh = wh.astype(np.int64)
    pl.DataFrame(events, schema=["time", "point", "state"], orient="row").sort(
        "time", "point", maintain_order=True).write_csv(folder / "log.csv")
    start_s = [int(E2E_START_UTC.timestamp()) + 900 * i for i in range(n)]
    # The CSV holds the shortest text of each wh / 1000, which reads back as the same double.
    pl.DataFrame({"start": [dt.datetime.fromtimestamp(s, UTC).isoformat() for s in start_s],
                  "kwh": [repr(int(w) / 1000) for w in wh]}).write_csv(folder / "meter.csv")
    (folder / "meter.xml").write_text(
        greenbutton_xml([(s, 900, int(w)) for s, w in zip(start_s, wh)]), encoding="utf-8")
    eq_tables = "\n".join(f'[[equipment]]\nid = "{eq}"\n' for eq in E2E_DRAW_KW)
    head = f'[site]\nname = "Green Button end-to-end"\ntimezone = "{E2E_TZ}"\n\n'
    tail = f"\n{EVENTS_TOML}\n[baseload]\nprofile = \"constant\"\n\n{eq_tables}"
    csv_site, xml_site = folder / "site_csv.toml", folder / "site_xml.toml"
    csv_site.write_text(head + '[meter]\nfile = "meter.csv"\ntime_column = "start"\n'
                        'value_column = "kwh"\nunit = "kWh"\nstamp = "start"\n' + tail,
                        encoding="utf-8")
    xml_site.write_text(head + '[meter]\nfile = "meter.xml"\n' + tail, encoding="utf-8")
    return csv_site, xml_site, E2E_DRAW_KW


def test_breakdown_from_green_button_equals_breakdown_from_csv(tmp_path):
    csv_site, xml_site, truth = _write_pair(tmp_path / "site")
    from_csv = breakdown_site(csv_site)
    from_xml = breakdown_site(xml_site)
    assert from_xml.aligned.counts == from_csv.aligned.counts
    assert from_xml.aligned.counts["used"] == E2E_DAYS * 96
    assert_frame_equal(from_xml.aligned.frame, from_csv.aligned.frame, check_exact=True)
    assert_frame_equal(from_xml.breakdown, from_csv.breakdown, check_exact=True)
    # The fit is a real one: each draw lands near the invented truth (noise 0.2 kWh per
    # interval over 960 intervals moves a draw by well under 1 kW).
    rows = {r["equipment"]: r for r in from_xml.breakdown.iter_rows(named=True)}
    for eq, kw in truth.items():
        assert rows[eq]["kw"] == pytest.approx(kw, abs=1.0)
