"""Weather-aware draws: the change-point term, its reading, and the tracker across a summer.
All data invented (tests/synthetic.py plus a synthetic outdoor temperature)."""

from __future__ import annotations

import dataclasses
import datetime as dt

import numpy as np
import polars as pl
import pytest

from disagg.fit.align import interval_temperature
from disagg.analyses.breakdown import monthly_breakdown
from disagg.inputs.config import WeatherSettings, load_site
from disagg.analyses.drift import drift_aligned
from disagg.errors import ConfigError, InputError
from disagg.fit.estimate import degrees, estimate_draws
from disagg.inputs.readers import read_weather
from synthetic import TZ, make_building

BALANCE_C = 18.0
SLOPE_KW_PER_C = 1.2  # the chiller draws 1.2 kW more per degC above 18 degC (invented)


def _warm_building(seed: int, days: int, noise_kwh: float, with_weather: bool = True):
    """make_building plus an outdoor temperature and a chiller whose draw follows it."""
    s = make_building(seed, days=days, noise_kwh=noise_kwh, start=dt.date(2025, 5, 5))
    frame = s.aligned.frame
    n = frame.height
    t_days = np.arange(n) / 96.0
    rng = np.random.default_rng(seed + 1000)
    temp = (16.0 + 14.0 * np.sin(np.pi * t_days / days) + 5.0 * np.sin(2 * np.pi * (t_days - 0.375))
            + np.repeat(rng.normal(0, 1.5, days + 1), 96)[:n])
    j = s.aligned.equipment_ids.index("CH-1")
    extra = SLOPE_KW_PER_C * degrees(temp, "cooling", BALANCE_C) * s.aligned.hours[:, j]
    y = frame["energy_kwh"].to_numpy() + extra
    aligned = dataclasses.replace(s.aligned, frame=frame.with_columns(energy_kwh=pl.Series(y)),
                                  temp_c=temp)
    eq = tuple(dataclasses.replace(e, weather="cooling", balance_temp_c=BALANCE_C)
               if e.id == "CH-1" and with_weather else e for e in s.site.equipment)
    weather = WeatherSettings(s.site.path, "t", "temp", "C", None) if with_weather else None
    site = dataclasses.replace(s.site, equipment=eq, weather=weather)
    return site, aligned, s, temp


def test_exact_recovery_of_draw_and_slope_without_noise():
    site, aligned, s, temp = _warm_building(3, days=40, noise_kwh=0.0)
    e = estimate_draws(site, aligned)
    i = [t.id for t in e.terms].index("CH-1")
    w = e.weather[i]
    assert w.kw_at_balance == pytest.approx(60.0, rel=1e-7)
    assert w.slope_kw_per_degc == pytest.approx(SLOPE_KW_PER_C, rel=1e-6)
    # Stated at the reference temperature: the run-hour-weighted mean temperature.
    run = aligned.hours[:, aligned.equipment_ids.index("CH-1")]
    t_ref = float(np.sum(run * temp) / run.sum())
    assert w.reference_temp_c == pytest.approx(t_ref)
    assert e.kw[i] == pytest.approx(60.0 + SLOPE_KW_PER_C * max(t_ref - BALANCE_C, 0.0), rel=1e-6)
    # Each month's chiller kWh is the true energy of that month.
    table = monthly_breakdown(e, TZ)
    month = aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.strftime("%Y-%m").to_numpy()
    extra = SLOPE_KW_PER_C * degrees(temp, "cooling", BALANCE_C) * run
    for r in table.filter(pl.col("equipment") == "CH-1").iter_rows(named=True):
        true_kwh = s.true_kwh_month[(r["period"], "CH-1")] + extra[month == r["period"]].sum()
        assert r["kwh"] == pytest.approx(true_kwh, rel=1e-6)
        assert r["kwh_low"] <= r["kwh"] <= r["kwh_high"]


def test_a_warm_summer_is_not_degradation_with_the_weather_term():
    site, aligned, _, _ = _warm_building(5, days=150, noise_kwh=0.5)
    ref = (dt.date(2025, 5, 5), dt.date(2025, 6, 15))
    with_term = drift_aligned(site, aligned, memory_days=20, reference=ref)
    assert with_term.summary.alarms == []
    # The same building without the term: the chiller's rising draw looks like drift (of the
    # chiller or of the pump that runs with it; seed 5 alarms the pump).
    plain_site = dataclasses.replace(site, equipment=tuple(
        dataclasses.replace(e, weather=None, balance_temp_c=None) for e in site.equipment),
        weather=None)
    plain = drift_aligned(plain_site, aligned, memory_days=20, reference=ref)
    assert {a.equipment for a in plain.summary.alarms} & {"CH-1", "P-1"}


def test_interval_temperature_interpolates_and_marks_gaps():
    t0 = dt.datetime(2025, 7, 1, tzinfo=dt.timezone.utc)
    readings = pl.DataFrame({"t": [t0, t0 + dt.timedelta(hours=1), t0 + dt.timedelta(hours=6)],
                             "temp_c": [20.0, 22.0, 30.0]})
    ns = 1_000_000_000

    def at(minutes):
        return int((t0 + dt.timedelta(minutes=minutes)).timestamp()) * ns

    start = np.array([at(0), at(15), at(120), at(540)])
    end = start + 15 * 60 * ns
    out = interval_temperature(readings, start, end)
    # Midpoints 00:07:30 and 00:22:30 lie between 20 and 22 degC readings one hour apart.
    assert out[0] == pytest.approx(20.0 + 2.0 * 7.5 / 60.0)
    assert out[1] == pytest.approx(20.0 + 2.0 * 22.5 / 60.0)
    # 02:07:30 is 1.1 h from the 01:00 reading: within the 3 h allowed.
    assert np.isfinite(out[2])
    # 09:07:30 is 3.1 h after the last reading: unknown.
    assert np.isnan(out[3])


WEATHER_SITE = """\
[site]
name = "Weather test"
timezone = "America/Chicago"

[meter]
file = "meter.csv"
time_column = "t"
value_column = "kwh"
unit = "kWh"

[runlog]
file = "log.csv"
layout = "events"
time_column = "t"
equipment_column = "eq"
state_column = "s"

[weather]
file = "weather.csv"
time_column = "time"
temp_column = "temp"
unit = "F"

[[equipment]]
id = "CH-1"
weather = "cooling"
balance_temp = 65
"""


def test_weather_settings_and_fahrenheit_reading(tmp_path):
    (tmp_path / "site.toml").write_text(WEATHER_SITE)
    (tmp_path / "weather.csv").write_text("time,temp\n2025-07-01 00:00,86\n2025-07-01 01:00,\n"
                                          "2025-07-01 02:00,77\n")
    site = load_site(tmp_path / "site.toml")
    # 65 F = 18.333 degC (degC = (F - 32) x 5/9, the definition of the two scales).
    assert site.equipment[0].balance_temp_c == pytest.approx(18.3333333, abs=1e-6)
    w = read_weather(site.weather, site.timezone)
    assert w["temp_c"].to_list() == pytest.approx([30.0, 25.0])  # 86 F, 77 F; empty dropped


def test_weather_dates_follow_the_weather_date_order(tmp_path):
    # 07/01/2025 is 1 July month first and 7 January day first: the file cannot say which.
    (tmp_path / "weather.csv").write_text("time,temp\n07/01/2025 00:00,86\n07/01/2025 01:00,77\n")
    (tmp_path / "site.toml").write_text(WEATHER_SITE)
    site = load_site(tmp_path / "site.toml")
    with pytest.raises(InputError) as exc:
        read_weather(site.weather, site.timezone)
    assert "set [weather] date_order = \"mdy\"" in str(exc.value)
    (tmp_path / "site.toml").write_text(WEATHER_SITE.replace('unit = "F"\n',
                                                             'unit = "F"\ndate_order = "mdy"\n'))
    site = load_site(tmp_path / "site.toml")
    w = read_weather(site.weather, site.timezone)
    # 1 July 2025 00:00 CDT (-05:00) = 05:00 UTC.
    assert w["t"].to_list()[0] == dt.datetime(2025, 7, 1, 5, 0, tzinfo=dt.timezone.utc)


def test_weather_equipment_without_a_weather_table_is_an_error(tmp_path):
    text = WEATHER_SITE.replace('[weather]\nfile = "weather.csv"\ntime_column = "time"\n'
                                'temp_column = "temp"\nunit = "F"\n', "")
    (tmp_path / "site.toml").write_text(text)
    with pytest.raises(ConfigError) as exc:
        load_site(tmp_path / "site.toml")
    assert str(exc.value) == (f"{tmp_path / 'site.toml'}: [equipment CH-1] weather = 'cooling': "
                              "needs a [weather] table with the outdoor temperature file")


def test_conflicting_weather_readings_are_an_error(tmp_path):
    (tmp_path / "site.toml").write_text(WEATHER_SITE)
    (tmp_path / "weather.csv").write_text("time,temp\n2025-07-01 00:00,86\n2025-07-01 00:00,80\n")
    site = load_site(tmp_path / "site.toml")
    with pytest.raises(InputError) as exc:
        read_weather(site.weather, site.timezone)
    assert str(exc.value) == (f"{tmp_path / 'weather.csv'}: line 2, column 'time': time "
                              "2025-07-01 05:00:00+00:00 appears twice with different "
                              "temperatures; expected one reading per time")


def test_closure_calendar_removes_the_occupied_spell(tmp_path):
    from disagg.fit.align import baseload_columns
    from disagg.inputs.config import BaseloadSettings, parse_spell

    spells = (parse_spell("Mon-Fri 07:00-19:00"),)
    day = pl.datetime_range(dt.datetime(2025, 12, 24), dt.datetime(2025, 12, 26, 23, 45), "15m",
                            eager=True).dt.replace_time_zone(TZ).dt.convert_time_zone("UTC")
    s_ns = day.dt.epoch("ns").to_numpy()
    e_ns = s_ns + 15 * 60 * 1_000_000_000
    open_cols, _ = baseload_columns(BaseloadSettings("occupied", spells), TZ, day, s_ns, e_ns)
    shut_cols, _ = baseload_columns(BaseloadSettings("occupied", spells, (), (dt.date(2025, 12, 25),)),
                                    TZ, day, s_ns, e_ns)
    assert open_cols[:, 0].sum() == pytest.approx(36.0)  # three weekdays x 12 h
    assert shut_cols[:, 0].sum() == pytest.approx(24.0)  # Christmas Day closed
    assert shut_cols.sum() == pytest.approx(open_cols.sum())
