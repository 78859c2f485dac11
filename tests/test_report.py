"""The HTML report (disagg.present.report) and `disagg report`.

The site here is invented: three loads with random on/off spells from a seeded numpy
generator, a constant baseload and small meter noise over 40 days (two calendar months),
written as a meter CSV, an events run log and a site TOML with a flat tariff. One equipment
id is the text `<script>alert(1)</script>`: it must show as text everywhere, never as markup.
A second, shorter site (16 days) has meter rows missing from its file, an outdoor temperature
file in °F with one cooling load, and a time-of-use tariff with a holiday and a demand price:
the headline's interval counts, the temperatures' unit, the tariff table and each month's peak
time are checked on it.
The Chromium test renders the report headless and checks the page for console messages and
a screenshot that is not blank.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import re
import subprocess
import tomllib
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from sitefiles import write_site_toml
from typer.testing import CliRunner

from disagg.analyses.pipeline import CAUTION, breakdown_site
from disagg.cli import app
from disagg.inputs.config import to_celsius
from disagg.jobs.site import drift_for
from disagg.present.report import (
    LOCKOUT,
    UNEXPLAINED_PEAK,
    from_celsius,
    interval_counts,
    render_report,
)

TZ = "America/Chicago"
START_LOCAL = dt.datetime(2025, 1, 20)  # a Monday; 40 days reach into February
DAYS = 40
SCRIPT_ID = "<script>alert(1)</script>"
# id -> (true draw [kW], display name); the names carry characters HTML and matplotlib treat
# specially (& " < > $).
LOADS = {
    "CH-1": (40.0, 'Chiller & pump "north"'),
    SCRIPT_ID: (12.0, "Fan <b>bold</b> costs $5 or $6"),
    "P-1": (5.0, "Pump, heating"),
}
BASELOAD_KW = 20.0
NOISE_KWH = 0.3
GRID_MIN = 5
REFERENCE = "2025-01-20:2025-02-02"  # two weeks: leaves 26 days to track
CURRENCY = "EUR"
BALANCE_F = 62.0  # CH-1's balance temperature in the °F site [°F]
REFERENCE_F = 77.0  # the °F site's reference temperature [°F]
DROPPED = 20  # meter rows left out of the °F site's file
TOU = f"""[tariff]
currency = "{CURRENCY}"
energy_price = 0.125
demand_price = 12.0
holidays = ["2025-01-27"]

[[tariff.periods]]
name = "on-peak"
price = 0.25
spells = ["Mon-Fri 12:00-18:00"]
"""

# Elements an HTML document closes implicitly (HTML Living Standard, "void elements").
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}
# Units the report puts in brackets on axis labels and numeric column headers.
UNITS = ("kWh", "kW", "%", "h", "d", CURRENCY, "YYYY-MM", "local", "count", "intervals")

CHROMIUM = "/usr/bin/chromium"

runner = CliRunner()


# ---------------------------------------------------------------------------------------
# The synthetic site


def _spells(n_steps: int, rng: np.random.Generator) -> np.ndarray:
    state = np.zeros(n_steps, dtype=np.int64)
    i, s = 0, int(rng.integers(0, 2))
    while i < n_steps:
        length = int(rng.integers(2, 31))
        state[i:i + length] = s
        s, i = 1 - s, i + length
    return state


def write_site(folder: Path, tariff: bool = True, days: int = DAYS, seed: int = 5,
               drop_rows: int = 0, fahrenheit: bool = False, tou: bool = False) -> Path:
    """Meter CSV, events run log and site.toml in folder; returns the TOML path.

    drop_rows: that many meter rows in a block from the middle of the file are left out.
    fahrenheit: an hourly outdoor temperature file in °F, and CH-1 a cooling load with a
        balance temperature of BALANCE_F (its true draw does not vary: the fit's slope is
        near zero, and the report only has to state the temperatures).
    tou: the tariff has the time-of-use periods, holidays and demand price of TOU.
    """
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    n = days * 96
    steps = n * 15 // GRID_MIN
    energy = np.full(n, BASELOAD_KW * 0.25)
    grid = [START_LOCAL + dt.timedelta(minutes=GRID_MIN * k) for k in range(steps + 1)]
    events = []
    for eq, (kw, _) in LOADS.items():
        state = _spells(steps, rng)
        energy += kw * state.reshape(n, 15 // GRID_MIN).sum(axis=1) * GRID_MIN / 60.0
        for k in np.concatenate([[0], np.flatnonzero(np.diff(state)) + 1, [steps]]):
            on = state[min(k, steps - 1)]
            events.append((grid[k].strftime("%Y-%m-%d %H:%M:%S"), eq, "on" if on else "off"))
    energy = np.round(energy + rng.normal(0.0, NOISE_KWH, n), 3)
    t0 = dt.datetime(2025, 1, 20, 6, 0, tzinfo=dt.UTC)
    start_utc = pl.datetime_range(t0, t0 + dt.timedelta(minutes=15 * (n - 1)), "15m",
                                  eager=True, time_zone="UTC")
    end_local = (start_utc + dt.timedelta(minutes=15)).dt.convert_time_zone(TZ)
    meter = pl.DataFrame({"end": end_local.dt.to_string("%Y-%m-%dT%H:%M:%S%:z"), "kwh": energy})
    if drop_rows:
        middle = n // 2
        meter = pl.concat([meter[:middle], meter[middle + drop_rows:]])
    meter.write_csv(folder / "meter.csv")
    weather: dict = {}
    if fahrenheit:
        hours = pl.datetime_range(t0 - dt.timedelta(hours=1), t0 + dt.timedelta(days=days, hours=1),
                                  "1h", eager=True, time_zone="UTC")
        temp_f = 60.0 + 15.0 * np.sin(np.arange(len(hours)) * 2 * np.pi / 24) + rng.normal(
            0.0, 2.0, len(hours))
        pl.DataFrame({"time": hours.dt.to_string("%Y-%m-%dT%H:%M:%S%:z"),
                      "temp_f": np.round(temp_f, 1)}).write_csv(folder / "weather.csv")
        weather = {"weather": {"file": "weather.csv", "time_column": "time",
                               "temp_column": "temp_f", "unit": "F",
                               "reference_temp": REFERENCE_F}}
    pl.DataFrame(events, schema=["time", "point", "state"], orient="row").sort(
        "time", "point", maintain_order=True).write_csv(folder / "runlog.csv")
    equipment = [{"id": eq, "name": name, **({"draw_kw": 5.0} if eq == "P-1" else {}),
                  **({"weather": "cooling", "balance_temp": BALANCE_F}
                     if fahrenheit and eq == "CH-1" else {})}
                 for eq, (_, name) in LOADS.items()]
    tables = dict(weather)
    if tariff:
        tables["tariff"] = (tomllib.loads(TOU)["tariff"] if tou else
                            {"currency": CURRENCY, "energy_price": 0.20, "demand_price": 10.0})
    write_site_toml(folder / "site.toml", name="Test <site> & Co", timezone=TZ,
                    meter_file="meter.csv", runlog_file="runlog.csv", equipment=equipment,
                    tables=tables)
    return (folder / "site.toml").resolve()


@pytest.fixture(scope="module")
def site(tmp_path_factory) -> Path:
    return write_site(tmp_path_factory.mktemp("site"))


@pytest.fixture(scope="module")
def result(site):
    return breakdown_site(site)


@pytest.fixture(scope="module")
def site_f(tmp_path_factory) -> Path:
    """16 days, DROPPED meter rows missing, weather in °F, a time-of-use tariff."""
    return write_site(tmp_path_factory.mktemp("site_f"), days=16, drop_rows=DROPPED,
                      fahrenheit=True, tou=True)


@pytest.fixture(scope="module")
def result_f(site_f):
    return breakdown_site(site_f)


@pytest.fixture(scope="module")
def report_f(result_f) -> str:
    return render_report(result_f)


@pytest.fixture(scope="module")
def drift(result):
    tracked, note = drift_for(result, 7.0, (dt.date(2025, 1, 20), dt.date(2025, 2, 2)))
    assert note is None, note
    return tracked


@pytest.fixture(scope="module")
def drawn(result, drift) -> dict:
    calls = []
    text = render_report(result, drift, progress=lambda *a: calls.append(a))
    return {"html": text, "calls": calls}


@pytest.fixture(scope="module")
def report(drawn) -> str:
    return drawn["html"]


# ---------------------------------------------------------------------------------------
# Reading the document


class Strict(HTMLParser):
    """Checks that every non-void element is closed in order; collects text, attributes,
    and the text of each SVG's axis labels (groups with ids ending in xlabel*/ylabel*)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.text: list[str] = []
        self.attrs: list[tuple[str, str, str | None]] = []
        self.tags: list[str] = []
        self.svgs: list[dict] = []
        self._label_depth: int | None = None
        # Each SVG's "axes": one dict per matplotlib axes, axis group id -> {"kind": x or y,
        # "ticks": tick-label texts, "label": the axis label's text or None}.
        self._axis: dict | None = None
        self._axis_depth: int | None = None
        self._tick_depth: int | None = None
        self.doctype = False
        self.th_num: list[str] = []
        self._in_th_num: int | None = None

    def handle_decl(self, decl):
        self.doctype |= decl.lower() == "doctype html"

    def handle_starttag(self, tag, attrs):
        self._start(tag, attrs)
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self._start(tag, attrs)

    def _start(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            self.attrs.append((tag, k, v))
        a = dict(attrs)
        gid = (a.get("id") or "") if tag == "g" else ""
        if tag == "svg":
            self.svgs.append({"labels": [], "depth": len(self.stack), "axes": []})
        if re.search(r"-axes_\d+$", gid):
            self.svgs[-1]["axes"].append({})
        if re.search(r"-matplotlib\.axis_\d+$", gid):
            self._axis_depth = len(self.stack)
            self._axis = {"ticks": [], "label": None, "kind": None}
            self.svgs[-1]["axes"][-1][gid] = self._axis
        tick = re.search(r"-(x|y)tick_\d+$", gid)
        if tick and self._axis is not None:
            self._tick_depth = len(self.stack)
            self._axis["kind"] = tick.group(1)
            self._axis["ticks"].append("")
        label = re.search(r"-(x|y)label", gid)
        if label:
            self._label_depth = len(self.stack)
            self.svgs[-1]["labels"].append("")
            if self._axis is not None:
                self._axis["kind"] = label.group(1)
                self._axis["label"] = ""
        if tag == "th" and "num" in (a.get("class") or ""):
            self._in_th_num = len(self.stack)
            self.th_num.append("")

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1] if self.stack else 'nothing'}")
            return
        self.stack.pop()
        if self._label_depth is not None and len(self.stack) == self._label_depth:
            self._label_depth = None
        if self._tick_depth is not None and len(self.stack) == self._tick_depth:
            self._tick_depth = None
        if self._axis_depth is not None and len(self.stack) == self._axis_depth:
            self._axis_depth, self._axis = None, None
        if self._in_th_num is not None and len(self.stack) == self._in_th_num:
            self._in_th_num = None

    def handle_data(self, data):
        self.text.append(data)
        if self._label_depth is not None:
            self.svgs[-1]["labels"][-1] += data.strip()
            if self._axis is not None:
                self._axis["label"] += data.strip()
        if self._tick_depth is not None:
            self._axis["ticks"][-1] += data.strip()
        if self._in_th_num is not None:
            self.th_num[-1] += data


def parse(text: str) -> Strict:
    p = Strict()
    p.feed(text)
    p.close()
    return p


def plain_text(text: str) -> str:
    return " ".join(" ".join(parse(text).text).split())


# ---------------------------------------------------------------------------------------
# The document


def test_the_report_is_one_well_formed_html_document(report):
    p = parse(report)
    assert p.doctype
    assert p.errors == []
    assert p.stack == []
    assert p.tags.count("html") == 1 and p.tags.count("body") == 1
    assert p.tags.count("section") == 6


def test_the_strict_parser_catches_an_unclosed_or_crossed_element():
    # The check above can fail: a <div> closed by </p>, and a <table> left open.
    assert parse("<div><p>x</div></p>").errors
    assert parse("<table><tr><td>x</td></tr>").stack == ["table"]


def test_ids_are_unique_across_the_inline_charts(report):
    ids = [v for _, k, v in parse(report).attrs if k == "id"]
    assert len(ids) > 100  # matplotlib names every group
    assert len(ids) == len(set(ids))
    # Every internal reference points to an id of the document.
    refs = re.findall(r'(?:href="#|url\(#)([^")]+)', report)
    assert refs and set(refs) <= set(ids)


def test_every_equipment_name_and_id_appears_as_text(report, result):
    text = plain_text(report)
    for eq, (_, name) in LOADS.items():
        assert eq in text
        assert name in text
    assert "Test <site> & Co" in text
    for row in result.breakdown["equipment"].unique():
        assert row in text


def test_a_script_tag_in_a_name_is_text_not_markup(report):
    assert "<script" not in report.lower()
    escaped = "&lt;script&gt;alert(1)&lt;/script&gt;"
    svgs = re.findall(r"<svg.*?</svg>", report, flags=re.DOTALL)
    outside = re.sub(r"<svg.*?</svg>", "", report, flags=re.DOTALL)
    # In the tables, and inside the charts' own text (matplotlib's SVG escaping).
    assert escaped in outside
    assert sum(escaped in s for s in svgs) >= 3  # range chart, month legend, drift panel
    assert "<b>bold</b>" not in report
    assert "&lt;b&gt;bold&lt;/b&gt;" in report


def test_every_chart_is_an_inline_svg_with_units_on_its_axis_labels(report):
    p = parse(report)
    assert not {"img", "object", "iframe", "embed", "canvas", "link", "script"} & set(p.tags)
    # At a glance, month by month, one drift chart (3 loads), fit over time, residuals.
    assert len(p.svgs) == 5
    for svg in p.svgs:
        assert svg["labels"], "a chart without axis labels"
        for label in svg["labels"]:
            units = re.findall(r"\[([^\]]+)\]", label)
            assert units and any(u in unit for unit in units for u in UNITS), label
    labels = [lab for svg in p.svgs for lab in svg["labels"]]
    assert "Energy per month [kWh]" in labels
    assert "Draw [kW]" in labels


def axis_problems(svgs: list[dict], row_names: set[str]) -> list[str]:
    """Every axis, in every axes of every chart, that shows tick labels but has no label
    with a unit in brackets. One kind of axis is let off: a category axis whose tick labels
    are the breakdown's row names (no unit applies); the names of the axes let off come back
    as 'category: ...' lines so that a test can say which ones they must be."""
    out = []
    for i, svg in enumerate(svgs):
        for j, axes in enumerate(svg["axes"]):
            for gid, axis in axes.items():
                ticks = [t for t in axis["ticks"] if t]
                if not ticks:
                    continue
                where = f"chart {i + 1}, axes {j + 1}, {axis['kind']} axis ({gid})"
                if set(ticks) <= row_names:
                    out.append(f"category: {where}")
                    continue
                label = axis["label"] or ""
                units = re.findall(r"\[([^\]]+)\]", label)
                if not (units and any(u in unit for unit in units for u in UNITS)):
                    out.append(f"{where}: ticks {ticks[:3]} but label {axis['label']!r}")
    return out


def test_every_axis_with_tick_labels_has_its_own_label_with_a_unit(report, result, drift):
    p = parse(report)
    rows = {n[:29] + "…" if len(n) > 30 else n for n in result.breakdown["equipment"]}
    problems = axis_problems(p.svgs, rows)
    # Only the equipment axis of the at-a-glance bars is a category axis.
    assert problems == ["category: chart 1, axes 1, y axis (c1-matplotlib.axis_2)"]
    # Every drift panel (the first chart after the two energy charts) has its own y label,
    # scales differing from panel to panel; dates are shown under the lowest panels only.
    panels = p.svgs[2]["axes"]
    assert len(panels) == drift.table["equipment"].n_unique() == 3
    for axes in panels:
        kinds = {a["kind"]: a for a in axes.values()}
        assert kinds["y"]["label"] == "Draw [kW]"
        assert any(kinds["x"]["ticks"]) == (kinds["x"]["label"] == "Date [local]")


def test_the_axis_check_catches_a_panel_without_a_y_label(report, result):
    # The same charts with one drift panel's y label taken out (its group id renamed so the
    # parser no longer sees a label): the check above must then name that axis.
    svg = re.findall(r"<svg.*?</svg>", report, flags=re.DOTALL)[2]
    broken = svg.replace('id="c3-ylabel-1"', 'id="c3-other-1"', 1)
    assert broken != svg
    rows = set(result.breakdown["equipment"])
    problems = axis_problems(parse(broken).svgs, rows)
    assert len(problems) == 1 and "y axis" in problems[0] and "label None" in problems[0]


def test_every_numeric_column_header_carries_a_unit(report):
    headers = parse(report).th_num
    assert len(headers) > 20
    for h in headers:
        assert re.search(r"\[[^\]]+\]", h), h


def test_no_network_reference(report):
    low = report.lower()
    assert "http://" not in low and "https://" not in low
    assert "@import" not in low
    for tag, k, v in parse(report).attrs:
        if k in ("src", "href", "xlink:href", "action", "srcset", "poster"):
            assert v is not None and (v.startswith(("#", "data:"))), (tag, k, v)
    for target in re.findall(r"url\(\s*([^)]*)\)", report):
        assert target.startswith("#"), target


def test_the_caution_and_lockout_tagout_are_stated(report):
    text = plain_text(report)
    assert CAUTION in text
    assert LOCKOUT in text
    assert "lockout/tagout" in text


def test_costs_are_shown_with_the_tariffs_currency(report, result):
    table = result.breakdown
    total = float(table["cost"].sum())
    assert total > 0
    text = plain_text(report)
    assert f"{total:,.2f} {CURRENCY}" in text  # the at-a-glance figure
    assert f"cost [{CURRENCY}]" in text
    ch1 = float(table.filter(pl.col("equipment") == "CH-1")["cost"].sum())
    assert f"{ch1:,.2f}" in text


def test_without_a_tariff_no_cost_is_shown(tmp_path):
    r = breakdown_site(write_site(tmp_path, tariff=False, days=16))
    text = plain_text(render_report(r))
    assert "cost [" not in text and "Cost" not in text
    assert "Energy per month" in text


def test_the_drift_page_shows_each_tracked_load(report, drift):
    text = plain_text(report)
    section = text.split("3. Drift over time")[1].split("4. How good the fit is")[0]
    for eq in drift.table["equipment"].unique():
        assert eq in section
    # Each load's own reference period, in the drift table.
    assert "reference period" in section
    for eq in drift.table["equipment"].unique():
        assert re.search(re.escape(eq) + r" 2025-01-20 to 2025-02-02 ", section), eq


def test_progress_counts_every_chart_drawn(drawn):
    calls = drawn["calls"]
    n = drawn["html"].count("<svg")
    assert calls == [("drawing", k, n) for k in range(1, n + 1)]


def test_a_negative_unexplained_part_is_drawn_below_zero(result):
    # Force the unexplained energy negative, a third of the largest month: the month
    # chart's axis then reaches below zero (the part is stacked downward from zero, not
    # hidden or netted off).
    largest = float(result.breakdown.group_by("period").agg(pl.col("kwh").sum())["kwh"].max())
    table = result.breakdown.with_columns(
        pl.when(pl.col("equipment") == "unexplained").then(pl.lit(-largest / 3))
        .otherwise(pl.col("kwh")).alias("kwh"))
    shifted = type(result)(result.site, table, result.fit, result.estimates, result.aligned,
                           result.findings)
    text = render_report(shifted)
    month_svg = re.findall(r"<svg.*?</svg>", text, flags=re.DOTALL)[1]
    ticks = [t for t in re.findall(r">([^<>]+)</text>", month_svg)]
    assert any(re.fullmatch(r"-[\d,]+", t) for t in ticks), ticks
    original = re.findall(r"<svg.*?</svg>", render_report(result), flags=re.DOTALL)[1]
    assert not any(re.fullmatch(r"-[\d,]+", t)
                   for t in re.findall(r">([^<>]+)</text>", original))


def test_the_headline_counts_the_meter_rows_missing_from_the_file(site_f, result_f, report_f):
    rows = pl.read_csv(site_f.parent / "meter.csv").height
    assert rows == 16 * 96 - DROPPED
    c = result_f.fit.intervals
    # Every row in the file is used; the DROPPED rows, absent from it, are not.
    assert (c["intervals"], c["absent"], c["used"]) == (rows, DROPPED, rows)
    text = plain_text(report_f)
    assert (f"{rows:,} of {rows + DROPPED:,} meter intervals used ({DROPPED} without a "
            "reading); intervals at 95 % confidence.") in text
    left_out = text.split("What was left out and why")[1]
    assert f"meter intervals in the range (first to last reading) {rows + DROPPED:,}" in left_out
    assert f"in the meter file {rows:,}" in left_out
    assert f"absent from the meter file (left out, not filled) {DROPPED}" in left_out


@pytest.mark.parametrize("counts, words", [
    ({"intervals": 100, "absent": 0, "used": 100, "no_reading": 0, "log_unknown": 0,
      "weather_unknown": 0, "spikes": 0}, "100 of 100 meter intervals used"),
    # Spikes are among the intervals without a reading (their energy was set to null).
    ({"intervals": 1200, "absent": 5, "used": 1180, "no_reading": 7, "log_unknown": 10,
      "weather_unknown": 3, "spikes": 2},
     ("1,180 of 1,205 meter intervals used (10 without a reading, 2 set aside as spikes, 10 "
      "with a run-log state unknown, 3 without an outdoor temperature)")),
])
def test_interval_counts_name_every_reason_an_interval_was_left_out(counts, words):
    assert interval_counts(counts) == words
    # The reasons add up to the intervals not used.
    numbers = [int(n.replace(",", "")) for n in re.findall(r"\d[\d,]*", words)]
    assert numbers[0] + sum(numbers[2:]) == numbers[1]


# The Fahrenheit scale: water freezes at 32 °F and boils at 212 °F (0 and 100 °C) at
# standard pressure; 1 °C = 1.8 °F (from memory; the scale's definition). Exact in floats to
# 1e-12.
FREEZING_F, BOILING_F = 32.0, 212.0


def test_from_celsius_is_the_inverse_of_the_configs_to_celsius():
    assert from_celsius(0.0, "F") == pytest.approx(FREEZING_F, abs=1e-12)
    assert from_celsius(100.0, "F") == pytest.approx(BOILING_F, abs=1e-12)
    assert from_celsius(-40.0, "F") == pytest.approx(-40.0, abs=1e-12)


def test_fahrenheit_values_agree_with_scipy():
    # The values above are from memory: scipy.constants.convert_temperature checks them.
    from scipy.constants import convert_temperature

    assert convert_temperature(0.0, "Celsius", "Fahrenheit") == pytest.approx(FREEZING_F,
                                                                              abs=1e-12)
    assert convert_temperature(100.0, "Celsius", "Fahrenheit") == pytest.approx(BOILING_F,
                                                                                abs=1e-12)
    for t in (-12.5, 0.0, 16.7, 62.0, 104.0):
        for unit in ("F", "C"):
            assert from_celsius(to_celsius(t, unit), unit) == pytest.approx(t, abs=1e-12)
    assert from_celsius(21.0, "C") == 21.0


def test_temperatures_are_stated_in_the_sites_weather_unit(result_f, report_f):
    draw = result_f.fit.draw("CH-1")
    # The fit works in °C: 62 °F is 16.7 °C, 77 °F is 25 °C.
    assert draw.weather.balance_temp_c == pytest.approx(to_celsius(BALANCE_F, "F"))
    assert draw.weather.reference_temp_c == pytest.approx(to_celsius(REFERENCE_F, "F"))
    text = plain_text(report_f)
    assert (f"CH-1 draws more the hotter it is beyond {BALANCE_F:.1f} °F outdoors; its draw is "
            f"stated at {REFERENCE_F:.1f} °F.") in text
    assert "°C" not in text


def test_the_tariff_is_shown_where_the_costs_are(report_f):
    text = plain_text(report_f)
    months = text.split("2. Month by month")[1].split("3. Drift over time")[0]
    tariff = months.split("The tariff")[1].split("The bill, month by month")[0]
    assert f"charge price [{CURRENCY} per unit] unit applies" in tariff
    assert "energy, outside the periods below 0.125 kWh every other hour" in tariff
    assert ("energy, on-peak 0.25 kWh Mon-Fri 12:00-18:00 (local time), not on holidays"
            in tariff)
    # (plain_text puts a space between text nodes: the date is a node of its own)
    assert "holidays - - 2025-01-27 : every hour at the price outside the periods" in tariff
    assert ("demand 12.00 kW the month's highest demand over one meter interval (15 min), at "
            "any hour") in tariff
    assert ("The meter interval is taken as the demand interval, and only one demand charge, "
            "on the month's highest interval demand at any hour, is modelled") in tariff


def test_each_months_peak_is_shown_in_local_time_with_the_zone(site_f, report_f):
    # The peak found here from the meter file itself: the row with the highest energy of
    # each local month (every row of the file is used: see the headline test), its start
    # 15 minutes before its end stamp, in the site's zone.
    meter = pl.read_csv(site_f.parent / "meter.csv").with_columns(
        pl.col("end").str.to_datetime("%Y-%m-%dT%H:%M:%S%:z").dt.convert_time_zone(TZ))
    start = meter.with_columns((pl.col("end") - dt.timedelta(minutes=15)).alias("start"))
    peaks = (start.with_columns(pl.col("start").dt.strftime("%Y-%m").alias("month"))
             .sort("kwh", descending=True).group_by("month", maintain_order=True).first()
             .sort("month"))
    text = plain_text(report_f)
    bill = text.split("The bill, month by month")[1].split("3. Drift over time")[0]
    assert bill.startswith(" month peak interval starts (local) metered [kWh] peak demand [kW]")
    assert peaks.height == 2
    for r in peaks.iter_rows(named=True):
        when = r["start"].strftime("%a %Y-%m-%d %H:%M %Z")
        # month, peak start, metered [kWh], peak demand [kW] = the row's kWh / 0.25 h, shown
        # to 0.1 kW (the file's kWh have 3 decimals, so no rounding tie can occur).
        row = re.search(rf"{r['month']} {re.escape(when)} [\d,]+ ([\d,]+\.\d) ", bill)
        assert row, (when, bill[:400])
        assert float(row.group(1).replace(",", "")) == pytest.approx(r["kwh"] / 0.25, abs=0.05)
    # January 2025 is in standard time: CST; the zone abbreviation is shown.
    assert re.search(r"2025-01 \w{3} 2025-01-\d\d \d\d:\d\d CST ", bill)


def test_the_peak_share_and_a_negative_unexplained_cost_are_explained(report_f):
    text = plain_text(report_f)
    glance = text.split("1. The range at a glance")[1].split("2. Month by month")[0]
    months = text.split("2. Month by month")[1].split("3. Drift over time")[0]
    for section in (glance, months):
        assert UNEXPLAINED_PEAK in section
        assert "not the load's own maximum" in section
    assert ("Peak share [kW]: each row's estimated draw during the interval of a month's "
            "highest metered demand") in glance


def test_drift_with_a_reference_period_outside_the_data_says_so(site, tmp_path):
    out = tmp_path / "out"
    r = runner.invoke(app, ["report", str(site), "--out", str(out), "--reference",
                            "2024-01-01:2024-02-01"])
    assert r.exit_code == 0, r.output
    assert r.stdout.splitlines()[0].endswith("; drift left out")
    text = plain_text((out / "report.html").read_text(encoding="utf-8"))
    assert ("Drift is left out: the reference period 2024-01-01 to 2024-02-01 has no usable "
            "intervals in the data, which cover 2025-01-20 to 2025-02-28") in text
    assert "run-log state" not in text.split("3. Drift over time")[1].split("4. How good")[0]


def test_drift_with_too_few_usable_intervals_in_the_reference_period_says_so(result):
    # Only 3 usable intervals on the first day: the reference period of that day alone is
    # too short for a fit of 3 loads and a constant baseload (4 unknowns + 2).
    day = result.aligned.frame["start_utc"].dt.convert_time_zone(TZ).dt.date().to_numpy()
    first = np.flatnonzero(day == dt.date(2025, 1, 20))
    use = result.aligned.use.copy()
    use[first[3:]] = False
    thin = dataclasses.replace(result, aligned=dataclasses.replace(result.aligned, use=use))
    tracked, note = drift_for(thin, 7.0, (dt.date(2025, 1, 20), dt.date(2025, 1, 20)))
    assert tracked is None
    assert note == ("Drift is left out: the reference period 2025-01-20 to 2025-01-20 has only "
                    "3 usable intervals in the data, which cover 2025-01-20 to 2025-02-28; a "
                    "fit needs at least 6.")


# ---------------------------------------------------------------------------------------
# The command


def test_report_command_writes_report_html_and_one_summary_line(site, tmp_path):
    out = tmp_path / "out"
    r = runner.invoke(app, ["report", str(site), "--out", str(out), "--reference", REFERENCE,
                            "--memory", "7"])
    assert r.exit_code == 0, r.output
    lines = r.stdout.splitlines()
    assert len(lines) == 2
    assert lines[0].startswith("Test <site> & Co: 2025-01 to 2025-02, metered ")
    assert ", cost " in lines[0] and lines[0].endswith(f" {CURRENCY}; no drift alarm")
    assert lines[1] == f"Wrote {out.resolve() / 'report.html'} " \
                       f"({(out / 'report.html').stat().st_size:,} bytes)"
    assert sorted(p.name for p in out.iterdir()) == ["report.html"]
    html = (out / "report.html").read_text(encoding="utf-8")
    assert html.count("<svg") == 5


def test_report_command_without_enough_days_leaves_drift_out_and_says_why(site, tmp_path):
    r = runner.invoke(app, ["report", str(site), "--out", str(tmp_path)])
    assert r.exit_code == 0, r.output
    assert r.stdout.splitlines()[0].endswith("; drift left out")
    text = plain_text((tmp_path / "report.html").read_text(encoding="utf-8"))
    assert (f"Drift is left out: the data cover {DAYS} days, and tracking needs the 90-day "
            "reference period plus at least 28 days after it") in text
    r = runner.invoke(app, ["report", str(site), "--out", str(tmp_path), "--no-drift"])
    assert r.exit_code == 0, r.output
    text = plain_text((tmp_path / "report.html").read_text(encoding="utf-8"))
    assert "Drift tracking was not asked for in this report." in text


@pytest.mark.parametrize("args, message", [
    (["--memory", "0"], ("Error: --memory 0: expected a number of days above 0 "
                         "and at most 3660")),
    (["--reference", "2025-02-01"], ("Error: --reference '2025-02-01': expected FROM:TO dates "
                                      "such as 2025-06-01:2025-08-31")),
    (["--from", "2025-13-01"], "Error: --from '2025-13-01': expected a date such as 2025-03-01"),
    (["--confidence", "2"], "Error: --confidence 2.0: expected a fraction from 0.5 to 0.999"),
])
def test_report_command_bad_options_give_one_error_line_and_no_file(site, tmp_path, args,
                                                                    message):
    out = tmp_path / "out"
    r = runner.invoke(app, ["report", str(site), "--out", str(out), *args])
    assert r.exit_code == 1
    assert r.stdout == ""
    assert r.stderr.splitlines() == [message]
    assert not out.exists() or list(out.iterdir()) == []


def test_report_command_missing_site_file(tmp_path):
    r = runner.invoke(app, ["report", str(tmp_path / "nope.toml"), "--out", str(tmp_path)])
    assert r.exit_code == 1
    assert r.stderr.startswith("Error: ") and "nope.toml" in r.stderr
    assert len(r.stderr.splitlines()) == 1
    assert not (tmp_path / "report.html").exists()


def test_report_never_replaces_an_input(site):
    before = site.read_bytes()
    r = runner.invoke(app, ["report", str(site), "--out", str(site.parent), "--no-drift"])
    # report.html is not an input name, so writing next to the inputs is allowed; the inputs
    # stay as they were.
    assert r.exit_code == 0, r.output
    assert site.read_bytes() == before
    (site.parent / "report.html").unlink()


# ---------------------------------------------------------------------------------------
# Headless Chromium


def render_in_chromium(page: Path, png: Path, profile: Path) -> tuple[int, list[str]]:
    """Load the page in headless Chromium and screenshot it; returns the exit status and
    the page's console lines (Chromium logs them with 'CONSOLE' in the line)."""
    cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
           f"--user-data-dir={profile}", "--no-first-run", "--no-default-browser-check",
           "--host-resolver-rules=MAP * ~NOTFOUND",  # nothing may be fetched anyway
           "--enable-logging=stderr", "--v=0", f"--screenshot={png}",
           "--window-size=1200,1600", page.resolve().as_uri()]
    done = subprocess.run(cmd, capture_output=True, text=True, timeout=60, check=False)
    console = [line for line in done.stderr.splitlines() if ":CONSOLE" in line]
    return done.returncode, console


def png_stats(png: Path) -> tuple[float, int]:
    """Pixel standard deviation (0..1 scale) and number of distinct colours of a PNG."""
    import matplotlib.image as mpimg

    img = mpimg.imread(png)[..., :3]
    flat = (img.reshape(-1, 3) * 255).round().astype(np.int64)
    codes = flat[:, 0] * 65536 + flat[:, 1] * 256 + flat[:, 2]
    return float(img.std()), int(np.unique(codes).size)


# A text page on a plain background has a handful of colours; the report's charts give
# hundreds (anti-aliased text and many series colours). Common practice, no source.
MIN_DISTINCT_COLOURS = 200
MIN_PIXEL_SD = 0.05


def test_chromium_renders_the_report_without_console_messages(report, tmp_path):
    page = tmp_path / "report.html"
    page.write_text(report, encoding="utf-8")
    png = tmp_path / "shot.png"
    status, console = render_in_chromium(page, png, tmp_path / "profile")
    assert status == 0
    assert console == []
    sd, colours = png_stats(png)
    assert sd > MIN_PIXEL_SD
    assert colours > MIN_DISTINCT_COLOURS


def test_the_chromium_checks_catch_a_console_error_and_a_blank_page(tmp_path):
    page = tmp_path / "bad.html"
    page.write_text("<!DOCTYPE html><html><head><title>t</title></head><body>"
                    "<script>console.error('deliberate 42');</script></body></html>",
                    encoding="utf-8")
    png = tmp_path / "bad.png"
    status, console = render_in_chromium(page, png, tmp_path / "profile")
    assert status == 0
    assert len(console) == 1 and "deliberate 42" in console[0]
    sd, colours = png_stats(png)
    assert sd < MIN_PIXEL_SD and colours < MIN_DISTINCT_COLOURS


# ---------------------------------------------------------------------------------------
# The first page: when and by what it was made, and the summary in plain words


def test_the_header_says_when_and_by_which_version_the_report_was_made(report, result):
    import zoneinfo

    from disagg import __version__

    today = dt.datetime.now(zoneinfo.ZoneInfo(result.site.timezone)).date().isoformat()
    yesterday = (dt.date.fromisoformat(today) - dt.timedelta(days=1)).isoformat()
    header = report[report.index('<header class="top">'):report.index("</header>")]
    assert (f"Generated on {today} by disagg {__version__}." in header
            or f"Generated on {yesterday} by disagg {__version__}." in header)  # midnight


def test_the_summary_names_the_three_biggest_users_in_order_before_the_first_section(report,
                                                                                     result):
    start = report.index('<div class="summary" id="summary">')
    assert start < report.index('<section class="page first" id="glance">')
    summary = report[start:report.index("</div>", start)]
    table = result.breakdown.filter(~pl.col("equipment").is_in(["unexplained"])
                                    & ~pl.col("equipment").str.starts_with("baseload"))
    totals = table.group_by("equipment").agg(pl.col("kwh").sum()).sort("kwh", descending=True)
    top = totals["equipment"].to_list()[:3]
    biggest = summary[summary.index("Biggest users"):summary.index("</li>")]
    from disagg.present.report.charts import e

    positions = [biggest.index(f"{e(eq)} ") for eq in top]
    assert positions == sorted(positions), (top, biggest)
    assert "What changed:" in summary and "What to look at:" in summary


def test_the_summary_names_drift_alarms_when_there_are_some(result, drift):
    from disagg.present.report.sections import _summary

    html = _summary(result, drift, [])
    alarmed = [a.equipment for a in drift.summary.alarms]
    if alarmed:
        assert "drift alarms for" in html and all(a in html for a in alarmed)
    else:
        assert "drift alarms for" not in html


def test_the_first_section_prints_on_the_first_page_and_the_draw_figures_are_explained(report):
    assert "section.page.first { break-before: auto;" in report
    assert "One load, several draw figures" in report


def test_the_summary_points_at_a_run_log_clock_offset_first(result):
    import dataclasses

    from disagg.present.report.sections import _summary

    fit = dataclasses.replace(result.fit, warnings=list(result.fit.warnings) + [
        "the run logs match the meter best when shifted by +4.0 min (60 % smaller residual "
        "than as read): ..."])
    html = _summary(dataclasses.replace(result, fit=fit), None, [])
    look = html[html.index("What to look at:"):]
    assert look.index("run-log clock seems off") < look.index("note")


@pytest.mark.parametrize("part, key", [("fit_quality", "interval"),
                                       ("fit_quality", "monthly"),
                                       ("fit_quality", "ashrae_guideline_14"),
                                       ("identifiability", "correlation_bound"),
                                       ("identifiability", "folded_into_baseload")])
def test_a_missing_metric_key_fails_loudly_instead_of_an_empty_section(result, part, key):
    # The fit's details are typed (disagg.analyses.summary); its metric mappings are read by
    # key: a renamed key must not give a silently empty page.
    kept = {k: v for k, v in getattr(result.fit, part).items() if k != key}
    broken = dataclasses.replace(result, fit=dataclasses.replace(result.fit, **{part: kept}))
    with pytest.raises(KeyError):
        render_report(broken, None)


def test_a_switch_steps_flag_is_explained_in_plain_words(result):
    import copy

    from disagg.present.report.sections import _priors_section

    fit = copy.deepcopy(result.fit)
    draw = next(d for d in fit.draws if "not-run" not in d.flags)
    before = plain_text(_priors_section(dataclasses.replace(result, fit=fit)))
    assert "switch on, the meter steps" not in before
    draw.flags = [*draw.flags, "switch-steps"]
    text = plain_text(_priors_section(dataclasses.replace(result, fit=fit)))
    assert f"When {draw.equipment} switch on, the meter steps by a different amount" in text
    assert "their intervals span both" in text
