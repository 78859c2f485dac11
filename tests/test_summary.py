"""Tests for disagg.analyses.summary: the fit's details are typed data, and fit.json is their
one JSON form (schema_version, keys, weather draws)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from disagg.analyses.pipeline import breakdown_site
from disagg.analyses.summary import (
    FIT_SCHEMA_VERSION,
    Draw,
    DriftAlarm,
    DriftSummary,
    FitSummary,
    MonthFit,
    WeatherDraw,
)
from disagg.present.outputs import to_json, write_breakdown

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    # The bundled demo building (invented): a tariff, a weather-dependent load, a combined
    # pair and months fitted on their own.
    out = tmp_path_factory.mktemp("summary")
    result = breakdown_site(ROOT / "configs" / "demo.toml")
    write_breakdown(result, out)
    return result, json.loads((out / "fit.json").read_text())


def test_fit_json_is_the_summarys_json_form(written):
    result, on_disk = written
    assert isinstance(result.fit, FitSummary)
    assert on_disk["schema_version"] == FIT_SCHEMA_VERSION == 3
    # The file holds exactly the typed summary, key for key, in order.
    assert json.loads(to_json(result.fit.as_json())) == on_disk
    assert list(on_disk) == list(result.fit.as_json())
    assert on_disk["tariff"]["months"][0]["period"] == result.fit.tariff.months[0].period
    assert any("weather" in d for d in on_disk["draws"])
    assert [d["equipment"] for d in on_disk["draws"]] == [d.equipment for d in result.fit.draws]
    months = {p: m.own_fit for p, m in result.fit.months.items()}
    assert months and all(isinstance(m, MonthFit) for m in result.fit.months.values())
    assert {p: m["own_fit"] for p, m in on_disk["months"].items()} == months


def test_only_weather_draws_state_their_reference_temperature():
    base = dict(equipment="CH-1", members=["CH-1"], name="chiller", kw=80.0, se_kw=1.0,
                se_hac_kw=1.0, se_jackknife_kw=None, kw_low=78.0, kw_high=82.0, prior_kw=None,
                prior_sd_kw=None, prior_source="none", prior_weight=0.0,
                between_week_sd_kw=0.5, run_hours=100.0, flags=[])
    plain = Draw(**base).as_json()
    assert "weather" not in plain and "kw_at" not in plain
    w = WeatherDraw("cooling", 18.0, 25.0, 70.0, 1.4, 0.1)
    rich = Draw(**base, weather=w).as_json()
    assert rich["kw_at"] == "reference temperature"
    assert rich["weather"]["slope_kw_per_degc"] == 1.4
    assert list(rich)[:len(plain)] == list(plain)


def test_drift_json_is_the_drift_summarys_json_form(tmp_path):
    # The bundled demo building (invented): DH-1's draw rises 15 % on 2025-08-01.
    from disagg.analyses.drift import drift_site
    from disagg.present.outputs import write_drift

    result = drift_site(ROOT / "configs" / "demo.toml")
    assert isinstance(result.summary, DriftSummary)
    assert all(isinstance(a, DriftAlarm) for a in result.summary.alarms)
    write_drift(result, tmp_path, [])
    on_disk = json.loads((tmp_path / "drift.json").read_text())
    assert json.loads(to_json(result.summary.as_json())) == on_disk
    assert [a["equipment"] for a in on_disk["alarms"]] == ["DH-1"]
    assert on_disk["alarms"][0]["first_alarm_date"] == result.summary.alarms[0].first_alarm_date


def test_compare_json_is_the_compare_reports_json_form(tmp_path):
    # The bundled demo building (invented): spring against autumn of its one year.
    import datetime as dt

    from disagg.analyses.compare import compare_site
    from disagg.analyses.summary import CompareReport
    from disagg.present.outputs import write_compare

    result = compare_site(ROOT / "configs" / "demo.toml",
                          (dt.date(2025, 3, 1), dt.date(2025, 5, 31)),
                          (dt.date(2025, 9, 1), dt.date(2025, 11, 30)))
    assert isinstance(result.report, CompareReport)
    write_compare(result, tmp_path)
    on_disk = json.loads((tmp_path / "compare.json").read_text())
    assert json.loads(to_json(result.report.as_json())) == on_disk
    assert on_disk["periods"]["before"]["from"] == "2025-03-01"
    assert on_disk["periods"]["after"]["intervals_used"] == result.report.after.intervals_used
