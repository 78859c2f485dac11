"""Money: a month computed by hand, reproduced to the cent (disagg.analyses.tariff, [tariff]).

The month is February 2025 in America/Chicago (no clock change; 1 Feb is a Saturday, so 20
weekdays and 8 weekend days, 672 hours). The invented building, noise-free:
- baseload 20 kW all the time: 20 x 672 = 13,440 kWh;
- pump P-1, 10 kW, weekdays 08:00-16:00: 20 x 8 = 160 h, 1,600 kWh;
- fan F-1, 4 kW, every day 00:00-06:00: 28 x 6 = 168 h, 672 kWh.
Peak demand: 30 kW (baseload + pump) on weekdays 08:00-16:00; at night 24 kW.

Hand computation (all sums done on paper, not by the code under test):

Flat: 0.12 /kWh, demand 9.50 /kW.
  baseload 13,440 x 0.12 = 1,612.80 + 20 kW x 9.50 = 190.00 -> 1,802.80
  P-1       1,600 x 0.12 =   192.00 + 10 kW x 9.50 =  95.00 ->   287.00
  F-1         672 x 0.12 =    80.64 +  0 kW        =   0.00 ->    80.64
  month    15,712 x 0.12 = 1,885.44 + 30 kW x 9.50 = 285.00 -> 2,170.44

Time of use: 0.10 /kWh, on-peak Mon-Fri 12:00-18:00 at 0.25 /kWh (20 x 6 = 120 h), demand
12.00 /kW.
  baseload on-peak 20 x 120 = 2,400 kWh x 0.25 = 600.00; off-peak 11,040 x 0.10 = 1,104.00;
           demand 20 x 12 = 240.00 -> 1,944.00
  P-1      on-peak 10 x 4 h x 20 = 800 kWh x 0.25 = 200.00; off-peak 800 x 0.10 = 80.00;
           demand 10 x 12 = 120.00 -> 400.00
  F-1      672 x 0.10 = 67.20 -> 67.20
  month    3,200 x 0.25 + 12,512 x 0.10 + 30 x 12 = 800.00 + 1,251.20 + 360.00 = 2,411.20

The same with 2025-02-17 a holiday (no on-peak that day):
  baseload 1,944.00 - 20 kW x 6 h x (0.25 - 0.10) = 1,944.00 - 18.00 = 1,926.00
  P-1        400.00 - 10 kW x 4 h x (0.25 - 0.10) =   400.00 -  6.00 =   394.00
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from typer.testing import CliRunner

from disagg.cli import app
from disagg.inputs.config import load_site
from disagg.errors import ConfigError
from disagg.analyses.pipeline import breakdown_site
from disagg.analyses.tariff import interval_prices, month_costs

CENT = 0.005  # "to the cent": within half a cent

# Hand-computed above (worked by hand; no source beyond the arithmetic in the docstring).
FLAT = {"baseload": 1802.80, "P-1": 287.00, "F-1": 80.64, "unexplained": 0.0}
FLAT_MONTH = 2170.44
TOU = {"baseload": 1944.00, "P-1": 400.00, "F-1": 67.20, "unexplained": 0.0}
TOU_MONTH = 2411.20
TOU_HOLIDAY = {"baseload": 1926.00, "P-1": 394.00, "F-1": 67.20, "unexplained": 0.0}
PEAK_KW = {"baseload": 20.0, "P-1": 10.0, "F-1": 0.0, "unexplained": 0.0}

TZ = "America/Chicago"


def _write_site(folder: Path, tariff: str, pump: str = "P-1") -> Path:
    start = dt.datetime(2025, 2, 1)
    local = pl.datetime_range(start, dt.datetime(2025, 2, 28, 23, 45), "15m", eager=True)
    hour = local.dt.hour().to_numpy()
    weekday = local.dt.weekday().to_numpy() <= 5
    pump_on = weekday & (hour >= 8) & (hour < 16)
    fan_on = hour < 6
    kwh = 0.25 * (20.0 + 10.0 * pump_on + 4.0 * fan_on)
    pl.DataFrame({"start": local.dt.strftime("%Y-%m-%d %H:%M"), "kwh": kwh}).write_csv(
        folder / "meter.csv")
    rows = [("2025-02-01 00:00", pump, "off")]  # known off from the start
    day = start.date()
    while day <= dt.date(2025, 2, 28):
        if day.weekday() < 5:
            rows += [(f"{day} 08:00", pump, "on"), (f"{day} 16:00", pump, "off")]
        rows += [(f"{day} 00:00", "F-1", "on"), (f"{day} 06:00", "F-1", "off")]
        day += dt.timedelta(days=1)
    rows += [("2025-03-01 00:00", pump, "off"), ("2025-03-01 00:00", "F-1", "off")]
    pl.DataFrame(rows, schema=["time", "point", "state"], orient="row").write_csv(
        folder / "runlog.csv")
    toml = folder / "site.toml"
    toml.write_text(f'''[site]
name = "Tariff test building (invented)"
timezone = "{TZ}"

[meter]
file = "meter.csv"
time_column = "start"
value_column = "kwh"
unit = "kWh"
stamp = "start"
interval_minutes = 15

[runlog]
file = "runlog.csv"
layout = "events"
time_column = "time"
equipment_column = "point"
state_column = "state"

[baseload]
profile = "constant"

{tariff}

[[equipment]]
id = '{pump}'
draw_kw = 9.0
draw_sd_kw = 5.0

[[equipment]]
id = "F-1"
draw_kw = 5.0
draw_sd_kw = 5.0
''', encoding="utf-8")
    return toml


FLAT_TOML = '[tariff]\ncurrency = "USD"\nenergy_price = 0.12\ndemand_price = 9.50\n'
TOU_TOML = ('[tariff]\ncurrency = "USD"\nenergy_price = 0.10\ndemand_price = 12.00\n'
            '{holidays}\n[[tariff.periods]]\nname = "on-peak"\nprice = 0.25\n'
            'spells = ["Mon-Fri 12:00-18:00"]\n')


def _costs(toml: Path) -> tuple[dict, dict, dict]:
    result = breakdown_site(toml)
    rows = {r["equipment"]: r for r in result.breakdown.iter_rows(named=True)}
    assert set(rows) == {"P-1", "F-1", "baseload", "unexplained"}
    assert {r["period"] for r in rows.values()} == {"2025-02"}
    return ({k: r["cost"] for k, r in rows.items()}, {k: r["peak_kw"] for k, r in rows.items()},
            None if result.fit.tariff is None else result.fit.tariff.as_json())


@pytest.mark.parametrize("tariff, expected, month", [
    (FLAT_TOML, FLAT, FLAT_MONTH),
    (TOU_TOML.format(holidays=""), TOU, TOU_MONTH),
    (TOU_TOML.format(holidays='holidays = ["2025-02-17"]'), TOU_HOLIDAY,
     TOU_MONTH - 18.00 - 6.00),
], ids=["flat", "time-of-use", "time-of-use-holiday"])
def test_hand_computed_month_to_the_cent(tmp_path, tariff, expected, month):
    cost, peak, summary = _costs(_write_site(tmp_path, tariff))
    for k, v in expected.items():
        assert cost[k] == pytest.approx(v, abs=CENT), k
    for k, v in PEAK_KW.items():
        assert peak[k] == pytest.approx(v, abs=1e-6), k
    assert sum(cost.values()) == pytest.approx(month, abs=CENT)
    (m,) = summary["months"]
    assert m["cost"] == pytest.approx(month, abs=CENT)
    assert m["peak_kw"] == pytest.approx(30.0, abs=1e-6)
    assert summary["currency"] == "USD"


def test_no_tariff_gives_null_costs_but_peak_shares(tmp_path):
    cost, peak, summary = _costs(_write_site(tmp_path, ""))
    assert all(v is None for v in cost.values())
    assert peak["P-1"] == pytest.approx(10.0, abs=1e-6)
    assert summary is None


def test_an_interval_straddling_a_period_edge_pays_both_prices():
    # A 60-minute interval from 11:30 to 12:30 local on a Monday: half at 0.10, half at 0.25.
    site_tou = '[tariff]\ncurrency = "EUR"\nenergy_price = 0.10\n[[tariff.periods]]\n' \
               'name = "peak"\nprice = 0.25\nspells = ["Mon 12:00-18:00"]\n'
    import tomllib

    from disagg.inputs.config import _Table, _tariff
    t = _tariff(_Table(Path("x.toml"), "tariff", tomllib.loads(site_tou)["tariff"]))
    start = pl.Series([dt.datetime(2025, 2, 3, 11, 30)]).dt.replace_time_zone(TZ)
    s_ns = start.dt.epoch("ns").to_numpy()
    price = interval_prices(t, TZ, s_ns, s_ns + 3_600_000_000_000)
    assert price[0] == pytest.approx(0.175, abs=1e-12)


def test_month_costs_split_adds_up():
    parts = np.array([[1.0, 2.0, 0.5], [3.0, 1.0, 0.5]])
    cost, peak_kw, at = month_costs(parts, np.array([0.25, 0.25]), np.array([0.2, 0.1]), 10.0)
    assert at == 1
    np.testing.assert_allclose(peak_kw, [12.0, 4.0, 2.0])
    # 3.5 kWh at 0.2 + 4.5 kWh at 0.1 + 10 x 18 kW, by hand: 0.70 + 0.45 + 180 = 181.15
    assert cost.sum() == pytest.approx(181.15, abs=1e-9)


@pytest.mark.parametrize("body, message", [
    ('currency = "USD"\n', "[tariff] energy_price is missing; add it to the file"),
    ('currency = "USD"\nenergy_price = -0.1\n',
     "[tariff] energy_price = -0.1: expected a price of 0 or more, at most 1e+06"),
    ('currency = "USD"\nenergy_price = 1e308\n',
     "[tariff] energy_price = 1e+308: expected a price of 0 or more, at most 1e+06"),
    ('currency = "USD"\nenergy_price = 0.1\nholidays = [2025-02-17T00:00:00]\n',
     "[tariff] holidays[0] = datetime.datetime(2025, 2, 17, 0, 0): expected a date such as "
     "2025-07-04, without a time of day"),
    ('currency = "USD"\nenergy_price = 0.1\nrate = 3\n',
     "[tariff] rate: unknown setting; expected one of currency, demand_price, energy_price, "
     "holidays, periods"),
    ('currency = "USD"\nenergy_price = 0.1\n[[tariff.periods]]\nname = "a"\nprice = 0.2\n'
     'spells = ["Mon-Fri 12:00-18:00"]\n[[tariff.periods]]\nname = "b"\nprice = 0.3\n'
     'spells = ["Fri 17:00-20:00"]\n',
     "[tariff.periods 2] spells: 'b' overlaps 'a'; each time may have one price"),
    ('currency = "USD"\nenergy_price = 0.1\n[[tariff.periods]]\nname = "a"\nprice = 0.2\n'
     'spells = ["Mon-Fri 12-18"]\n',
     "[tariff.periods 1] spells[0] = 'Mon-Fri 12-18': expected a spell such as"),
])
def test_bad_tariff_settings_are_named(tmp_path, body, message):
    toml = _write_site(tmp_path, "[tariff]\n" + body)
    with pytest.raises(ConfigError) as err:
        load_site(toml)
    assert str(err.value).startswith(f"{toml.resolve()}: {message}")


def test_cli_breakdown_writes_cost_columns(tmp_path):
    toml = _write_site(tmp_path, TOU_TOML.format(holidays=""))
    res = CliRunner().invoke(app, ["breakdown", str(toml), "--out", str(tmp_path / "out")])
    assert res.exit_code == 0, res.output
    csv = pl.read_csv(tmp_path / "out" / "breakdown.csv")
    assert csv["cost"].sum() == pytest.approx(TOU_MONTH, abs=CENT)
    assert "2,411.20 USD" in res.output


def test_a_peak_left_out_of_the_fit_is_named(tmp_path):
    # The fan's log starts on 2 Feb, so 1 Feb is left out of the fit (state unknown); a 50 kW
    # reading at 03:00 that day is the month's highest. The demand cost keeps the 30 kW peak
    # of the intervals used and says so.
    toml = _write_site(tmp_path, FLAT_TOML)
    meter = pl.read_csv(tmp_path / "meter.csv")
    meter = meter.with_columns(pl.when(pl.col("start") == "2025-02-01 03:00").then(12.5)
                               .otherwise(pl.col("kwh")).alias("kwh"))
    meter.write_csv(tmp_path / "meter.csv")
    log = pl.read_csv(tmp_path / "runlog.csv")
    log.filter(~((pl.col("point") == "F-1") & pl.col("time").str.starts_with("2025-02-01"))
               ).write_csv(tmp_path / "runlog.csv")
    result = breakdown_site(toml)
    (m,) = result.fit.tariff.months
    assert m.peak_kw == pytest.approx(30.0, abs=1e-6)
    assert any(w.startswith("2025-02: the month's highest reading, 50.0 kW from "
                            "2025-02-01T09:00:00+00:00, is in an interval left out of the fit")
               for w in result.fit.warnings)


def test_interval_prices_equal_a_minute_by_minute_count_across_a_clock_change():
    # 30-minute intervals through March 2025 in New York (clocks go forward on 9 March),
    # period edges in the middle of intervals, a holiday on 17 March, and a Sunday period
    # spanning the skipped hour. The check counts each minute's local clock time with
    # zoneinfo, a method independent of the exact-overlap code.
    import tomllib
    from zoneinfo import ZoneInfo

    from disagg.inputs.config import _Table, _tariff
    text = ('currency = "USD"\nenergy_price = 0.08\nholidays = ["2025-03-17"]\n'
            '[[periods]]\nname = "peak"\nprice = 0.21\nspells = ["Mon-Fri 12:15-18:45"]\n'
            '[[periods]]\nname = "night"\nprice = 0.05\nspells = ["Sun 01:30-03:15"]\n')
    t = _tariff(_Table(Path("x.toml"), "tariff", tomllib.loads(text)))
    ny, utc = ZoneInfo("America/New_York"), dt.timezone.utc
    t0 = dt.datetime(2025, 3, 1, tzinfo=ny).astimezone(utc)
    t1 = dt.datetime(2025, 4, 1, tzinfo=ny).astimezone(utc)
    n = int((t1 - t0).total_seconds() // 1800)
    start_ns = np.array([int((t0 + dt.timedelta(minutes=30 * j)).timestamp()) * 10**9
                         for j in range(n)], dtype=np.int64)
    price = interval_prices(t, "America/New_York", start_ns, start_ns + 1800 * 10**9)

    def minute_price(m: dt.datetime) -> float:
        loc = m.astimezone(ny)
        hm = loc.hour * 60 + loc.minute
        if loc.date() == dt.date(2025, 3, 17):
            return 0.08
        if loc.weekday() < 5 and 12 * 60 + 15 <= hm < 18 * 60 + 45:
            return 0.21
        if loc.weekday() == 6 and 90 <= hm < 195:
            return 0.05
        return 0.08

    expected = np.array([np.mean([minute_price(t0 + dt.timedelta(minutes=30 * j + k))
                                  for k in range(30)]) for j in range(n)])
    np.testing.assert_allclose(price, expected, rtol=0, atol=1e-12)
    # The skipped hour: on 9 March the night period runs 01:30-02:00 EST and 03:00-03:15
    # EDT, 45 minutes; on other Sundays 105 minutes.
    assert n == 31 * 48 - 2
