"""The HTML report (disagg.report) and `disagg report`.

The site here is invented: three loads with random on/off spells from a seeded numpy
generator, a constant baseload and small meter noise over 40 days (two calendar months),
written as a meter CSV, an events run log and a site TOML with a flat tariff. One equipment
id is the text `<script>alert(1)</script>`: it must show as text everywhere, never as markup.
The Chromium test renders the report headless and checks the page for console messages and
a screenshot that is not blank.
"""

from __future__ import annotations

import datetime as dt
import re
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import polars as pl
import pytest
from typer.testing import CliRunner

from disagg.cli import app
from disagg.pipeline import CAUTION, breakdown_site
from disagg.report import LOCKOUT, drift_for, render_report

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


def write_site(folder: Path, tariff: bool = True, days: int = DAYS, seed: int = 5) -> Path:
    """Meter CSV, events run log and site.toml in folder; returns the TOML path."""
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
    pl.DataFrame({"end": end_local.dt.to_string("%Y-%m-%dT%H:%M:%S%:z"), "kwh": energy}
                 ).write_csv(folder / "meter.csv")
    pl.DataFrame(events, schema=["time", "point", "state"], orient="row").sort(
        "time", "point", maintain_order=True).write_csv(folder / "runlog.csv")
    equipment = "\n".join(
        f'[[equipment]]\nid = "{eq}"\nname = "{name.replace(chr(34), chr(92) + chr(34))}"\n'
        + ('draw_kw = 5.0\n' if eq == "P-1" else "") for eq, (_, name) in LOADS.items())
    money = (f'[tariff]\ncurrency = "{CURRENCY}"\nenergy_price = 0.20\ndemand_price = 10.0\n'
             if tariff else "")
    (folder / "site.toml").write_text(f'''[site]
name = "Test <site> & Co"
timezone = "{TZ}"

[meter]
file = "meter.csv"
time_column = "end"
value_column = "kwh"
unit = "kWh"
stamp = "end"

[runlog]
file = "runlog.csv"
layout = "events"
time_column = "time"
equipment_column = "point"
state_column = "state"

[baseload]
profile = "constant"

{money}
{equipment}''', encoding="utf-8")
    return (folder / "site.toml").resolve()


@pytest.fixture(scope="module")
def site(tmp_path_factory) -> Path:
    return write_site(tmp_path_factory.mktemp("site"))


@pytest.fixture(scope="module")
def result(site):
    return breakdown_site(site)


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
        if tag == "svg":
            self.svgs.append({"labels": [], "depth": len(self.stack)})
        if tag == "g" and re.search(r"-(x|y)label", a.get("id") or ""):
            self._label_depth = len(self.stack)
            self.svgs[-1]["labels"].append("")
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
        if self._in_th_num is not None and len(self.stack) == self._in_th_num:
            self._in_th_num = None

    def handle_data(self, data):
        self.text.append(data)
        if self._label_depth is not None:
            self.svgs[-1]["labels"][-1] += data.strip()
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
    assert "reference period 2025-01-20 to 2025-02-02" in section


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
    (["--memory", "0"], "Error: --memory 0: expected a number of days above 0"),
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
