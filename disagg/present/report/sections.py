"""The report's HTML sections: at a glance, months, drift, fit quality, priors, cautions."""

from __future__ import annotations

import datetime as dt
import math
from typing import TYPE_CHECKING

import numpy as np
import polars as pl

from disagg.analyses.pipeline import CAUTION, BreakdownResult
from disagg.analyses.summary import TariffSummary
from disagg.inputs.notes import group_kinds

if TYPE_CHECKING:
    from disagg.analyses.drift import DriftResult
from disagg.present.report.charts import (
    _Charts,
    _drift_chart,
    _fit_charts,
    _is_base,
    _monthly_chart,
    _num,
    _range_chart,
    e,
)
from disagg.present.report.styles import (
    CHART_LABEL_CHARS,
    DRIFT_PANELS_PER_CHART,
    MIN_DAYS_FOR_DAILY,
    MONTHS_PER_TABLE,
)

LOCKOUT = ("Before anyone services a piece of equipment, it is isolated from every energy "
           "source and locked and tagged out (lockout/tagout), and the isolation is verified "
           "before work starts.")


def _range_rows(table: pl.DataFrame, names: list[str], total_kwh: float) -> list[dict]:
    """Each row name's totals over the range (sum over months)."""
    has_peak = "peak_kw" in table.columns
    has_cost = "cost" in table.columns
    aggs = [pl.col("run_hours").sum(), pl.col("kwh").sum(), pl.col("kwh_low").sum(),
            pl.col("kwh_high").sum(), pl.col("kwh_low").null_count().alias("no_low"),
            pl.col("kwh_high").null_count().alias("no_high"), pl.len().alias("months")]
    if has_peak:
        aggs.append(pl.col("peak_kw").max())
    if has_cost:
        aggs += [pl.col("cost").sum(), pl.col("cost").null_count().alias("no_cost")]
    totals = {r["equipment"]: r for r in table.group_by("equipment").agg(aggs)
              .iter_rows(named=True)}
    rows = []
    for n in names:
        if n not in totals:
            continue
        r = totals[n]
        ranged = r["no_low"] == 0 and r["no_high"] == 0
        rows.append({
            "equipment": n, "run_hours": r["run_hours"], "kwh": float(r["kwh"]),
            "kwh_low": float(r["kwh_low"]) if ranged else None,
            "kwh_high": float(r["kwh_high"]) if ranged else None,
            # Estimated gap energy is not metered: no share of the metered energy.
            "share": (r["kwh"] / total_kwh if total_kwh and n != "estimated-gaps"
                      else float("nan")),
            "peak_kw": r.get("peak_kw"),
            "cost": r["cost"] if has_cost and r["no_cost"] < r["months"] else None,
        })
    return rows


def local_span(result: BreakdownResult) -> tuple[str, str]:
    tz = result.site.timezone
    f = result.estimates.frame
    first = f["start_utc"].min().astimezone(_zone(tz)).date()
    last = (f["end_utc"].max() - dt.timedelta(microseconds=1)).astimezone(_zone(tz)).date()
    return first.isoformat(), last.isoformat()


def _zone(tz: str):
    from zoneinfo import ZoneInfo

    return ZoneInfo(tz)


def _fit_series(result: BreakdownResult) -> tuple[np.ndarray, np.ndarray, np.ndarray, str]:
    """Metered and fitted kWh summed per local day (per local hour for short ranges)."""
    est = result.estimates
    local = est.frame["start_utc"].dt.convert_time_zone(result.site.timezone)
    frame = pl.DataFrame({"t": local, "y": est.y, "f": est.fitted})
    days = frame["t"].dt.date().n_unique()
    unit = "day" if days >= MIN_DAYS_FOR_DAILY else "hour"
    key = (pl.col("t").dt.date() if unit == "day"
           else pl.col("t").dt.truncate("1h").dt.replace_time_zone(None))
    g = (frame.group_by(key.alias("k")).agg(pl.col("y").sum(), pl.col("f").sum()).sort("k"))
    return g["k"].to_numpy(), g["y"].to_numpy(), g["f"].to_numpy(), unit


def _swatch(colour: str) -> str:
    return f'<span class="swatch" style="background:{colour}"></span>'


def _eq(name: str, colour: str | None = None) -> str:
    """An equipment name (with its colour swatch when given), kept on one line unless it is
    long."""
    cls = "eq" if len(name) <= CHART_LABEL_CHARS else "long"
    swatch = _swatch(colour) if colour else ""
    return f'<span class="{cls}">{swatch}{e(name)}</span>'


def _table(headers: list[tuple[str, bool]], rows: list[list[str]], cls: str = "") -> str:
    """A table; headers are (escaped html, numeric?); cells are ready html."""
    num = [n for _, n in headers]
    head = "".join(f'<th class="num">{h}</th>' if n else f"<th>{h}</th>" for h, n in headers)
    body = "".join("<tr>" + "".join(f'<td class="num">{c}</td>' if num[i] else f"<td>{c}</td>"
                                    for i, c in enumerate(r)) + "</tr>" for r in rows)
    klass = f' class="{cls}"' if cls else ""
    return f"<table{klass}><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _figure(svg: str, caption: str) -> str:
    return f"<figure>{svg}<figcaption>{caption}</figcaption></figure>"


def _list(items: list[str]) -> str:
    return "<ul>" + "".join(f"<li>{i}</li>" for i in items) + "</ul>" if items else ""


_FLAG_WORDS = {
    "combined": "combined (run together, one row)",
    "unstable": "interval widened",
    "not-run": "did not run",
    "variable": "variable speed",
    "prior-driven": "decided by its prior",
    "range-draw": "whole-range draw",
    "estimated": "estimated",
    "form-sensitive": "depends on the baseload's shape",
    "schedule-edge": "switches near the schedule's edges",
    "switch-steps": "meter steps differ at switch-on and switch-off",
    "at-zero": "at zero",
    "schedule-bound": "on the baseload's schedule",
}

# Plain words for the baseload forms (disagg.fit.select).
FORM_WORDS = {
    "constant": "one constant level",
    "occupied": "one level while occupied and one while unoccupied",
    "occupied-edges": "occupied and unoccupied levels with their own shape around the "
                      "schedule's starts and ends",
    "hour-of-week": "its own level for each hour of the week",
    "hour-of-week-edges": "its own level for each hour of the week, with its own shape "
                          "around the schedule's starts and ends",
}


def form_sentence(form: dict) -> str:
    """One plain sentence on the baseload form used and how the others compared."""
    used = str(form.get("used", ""))
    profile, _, level = used.partition("+")
    words = FORM_WORDS.get(profile, profile)
    how = ("as the engineer pinned it in the site file" if form.get("pinned")
           else "chosen by the data")
    text = (f"The baseload (load no run log explains) was modelled as {words}"
            + (", plus a level that wanders slowly over time" if level else "")
            + f" ({e(used)}, {how}).")
    forms = form.get("forms", [])
    base = next((float(f.get("delta") or 0.0) for f in forms if f.get("form") == used), 0.0)
    others = sorted(((float(f.get("delta") or 0.0) - base, str(f.get("form")))
                     for f in forms if f.get("form") != used))
    better = [(d, f) for d, f in others if d < 0]
    worse = [(d, f) for d, f in others if d >= 0]
    if better:
        text += (" The data fit the meter better with "
                 + ", ".join(f"{e(f)} (by {_num(-d, 0)})" for d, f in better)
                 + " on the criterion (QAIC; differences above about 10 are clear): the "
                   "pinned form may shift the draws; see the flags.")
    if worse:
        shown = worse[:4]
        lead = ("The other forms" if len(shown) == len(worse)
                else f"The next {len(shown)} of {len(worse)} other forms")
        text += (f" {lead} fitted the meter worse by "
                 + ", ".join(f"{_num(d, 0)} ({e(f)})" for d, f in shown)
                 + " on the criterion (QAIC; differences above about 10 are clear).")
    return text


def _flag_text(flags: str | list[str]) -> str:
    items = flags if isinstance(flags, list) else [f for f in (flags or "").split(";") if f]
    out = []
    for f in dict.fromkeys(items):
        if f.startswith("inseparable:"):
            out.append(f"cannot be told apart from {f.split(':', 1)[1]}")
        else:
            out.append(_FLAG_WORDS.get(f, f))
    return e(", ".join(out))


def _currency(result: BreakdownResult) -> str:
    tariff = result.fit.tariff
    return (tariff.currency if tariff is not None else "") or "currency"


def _has_cost(table: pl.DataFrame) -> bool:
    return "cost" in table.columns and table["cost"].is_not_null().any()


def _has_peak(table: pl.DataFrame) -> bool:
    return "peak_kw" in table.columns and table["peak_kw"].is_not_null().any()


def _metered_total(table: pl.DataFrame) -> float:
    return float(table.filter(pl.col("equipment") != "estimated-gaps")["kwh"].sum())


def interval_counts(c: dict) -> str:
    """'1,466 of 1,486 meter intervals used (20 without a reading)' from the interval counts
    of fit.json (disagg.fit.align: intervals in the file, absent from it, used, no_reading,
    log_unknown, weather_unknown; spikes, which are among no_reading)."""
    used = int(c.get("used", 0))
    in_range = int(c.get("intervals", 0)) + int(c.get("absent", 0))
    spikes = int(c.get("spikes", 0))
    reasons = [(int(c.get("absent", 0)) + int(c.get("no_reading", 0)) - spikes,
                "without a reading"),
               (spikes, "set aside as spikes"),
               (int(c.get("log_unknown", 0)), "with a run-log state unknown"),
               (int(c.get("weather_unknown", 0)), "without an outdoor temperature")]
    why = ", ".join(f"{_num(n)} {words}" for n, words in reasons if n > 0)
    text = f"{_num(used)} of {_num(in_range)} meter intervals used"
    return text + (f" ({why})" if why else "")


# The summary names this many biggest users, a draw change from the first to the last month
# of at least CHANGE_WORTH_NAMING, and an unexplained share above UNEXPLAINED_WORTH_NAMING
# (project choices, no source: the threshold matches drift's default of 10 %).
BIGGEST_USERS = 3
CHANGE_WORTH_NAMING = 0.10
UNEXPLAINED_WORTH_NAMING = 0.10
LOOK_AT = 4  # points to look at, at most


def _pct(x: float) -> str:
    return f"{100 * x:+.0f} %"


def _summary(result: BreakdownResult, drift: DriftResult | None,
             names: list[str]) -> str:
    """"In short": the biggest users, what changed and what to look at, in plain words, for
    the first printed page."""
    table = result.breakdown
    metered = _metered_total(table)
    rows = _range_rows(table, names, metered)
    full = {eq.id: eq.name for eq in result.site.equipment}
    loads = sorted((r for r in rows if not _is_base(r["equipment"])
                    and r["equipment"] not in ("unexplained", "estimated-gaps")),
                   key=lambda r: -r["kwh"])
    items = []
    if loads and metered:
        top = [f"{e(r['equipment'])}" + (f" ({e(full[r['equipment']])})"
                                         if full.get(r["equipment"], r["equipment"])
                                         != r["equipment"] else "")
               + f" {_num(r['kwh'])} kWh ({_num(100 * r['kwh'] / metered, 0)} %)"
               for r in loads[:BIGGEST_USERS]]
        items.append(f"<b>Biggest users</b> of the {_num(metered)} kWh metered: "
                     + "; ".join(top) + ".")
    items.append("<b>What changed:</b> " + _what_changed(result, drift))
    look = _look_at(result, rows, metered)
    items.append("<b>What to look at:</b> " + (" ".join(look) if look else
                                               "nothing stands out in these data."))
    return ('<div class="summary" id="summary"><h2>In short</h2><ul>'
            + "".join(f"<li>{i}</li>" for i in items) + "</ul></div>")


def _what_changed(result: BreakdownResult, drift: DriftResult | None) -> str:
    if drift is not None and drift.summary.alarms:
        parts = [f"{e(a.equipment)} {_pct(a.change)} since the reference period "
                 f"(first alarm {e(a.first_alarm_date)})" for a in drift.summary.alarms]
        return "drift alarms for " + "; ".join(parts) + " (see Drift over time)."
    months = result.fit.own_months()
    if len(months) >= 2:
        (p0, m0), (p1, m1) = next(iter(months.items())), list(months.items())[-1]
        first = {d.equipment: d.kw for d in m0.draws if d.kw}
        last = {d.equipment: d.kw for d in m1.draws if d.kw}
        moves = sorted(((last[k] / first[k] - 1.0, k) for k in first if k in last
                        and first[k] > 0), key=lambda m: -abs(m[0]))
        named = [f"{e(k)} {_num(first[k], 1)} kW in {p0} to {_num(last[k], 1)} kW in {p1} "
                 f"({_pct(c)})" for c, k in moves if abs(c) >= CHANGE_WORTH_NAMING]
        if named:
            return ("draws that moved by 10 % or more from the first to the last month: "
                    + "; ".join(named[:3]) + " (see Month by month).")
        return (f"no load's draw moved by 10 % or more from {p0} to {p1}"
                + ("; no drift alarm." if drift is not None else "."))
    return ("one month of data: nothing to compare yet"
            + ("; no drift alarm." if drift is not None else "."))


def _look_at(result: BreakdownResult, rows: list[dict], metered: float) -> list[str]:
    fit = result.fit
    out = []
    clock = [w for w in fit.warnings if "match the meter best" in str(w)
             or "run-log clock looks off" in str(w)]
    if clock:
        out.append("the run-log clock seems off from the meter's (see the notes on the fit "
                   "page): fix it first, it biases every draw.")
    grouped = [d.equipment for d in fit.draws if "+" in d.equipment]
    if grouped:
        out.append(f"{_names(grouped)} run together and are shown as one row: a separate "
                   "run-log point or a spot measurement would split them.")
    if fit.fit_quality["ashrae_guideline_14"]["hourly_meets"] is False:
        out.append("the hourly fit does not meet the ASHRAE Guideline 14 criteria: read the "
                   "figures as rough.")
    unexplained = sum(r["kwh"] for r in rows if r["equipment"] == "unexplained")
    if metered and abs(unexplained) / metered >= UNEXPLAINED_WORTH_NAMING:
        out.append(f"{_num(100 * unexplained / metered, 0)} % of the metered energy is "
                   "unexplained: a load without a run log may be missing.")
    n_notes = len(group_kinds(fit.warnings))
    if n_notes:
        out.append(f"{n_notes} note{'s' * (n_notes != 1)} on the data and the fit (fit page).")
    return out[:LOOK_AT]


def _header(result: BreakdownResult, periods: list[str]) -> str:
    first, last = local_span(result)
    fit = result.fit
    c = fit.intervals
    months = (f"{len(periods)} month{'s' * (len(periods) != 1)}, {periods[0]} to {periods[-1]}"
              if periods else "no months")
    sections = ["The range at a glance", "Month by month", "Drift over time", "How good the fit is",
                "What cannot be told apart", "Cautions"]
    ids = ["glance", "months", "drift", "fit", "priors", "cautions"]
    toc = "".join(f'<li><a href="#{i}">{s}</a></li>' for i, s in zip(ids, sections))
    made = dt.datetime.now(_zone(result.site.timezone)).date().isoformat()
    return (f'<header class="top"><h1>{e(result.site.name)}</h1>'
            f"<p>Generated on {made} by {e(fit.tool)}.</p>"
            f"<p>Energy by equipment, {e(first)} to {e(last)} (local dates, "
            f"{e(result.site.timezone)}): {e(months)}.</p>"
            f"<p>{interval_counts(c)}; intervals at {100 * result.estimates.confidence:g} % "
            "confidence.</p>"
            f'<nav class="toc"><ol>{toc}</ol></nav></header>')


def _glance(result: BreakdownResult, ch: _Charts, names: list[str]) -> str:
    table = result.breakdown
    metered = _metered_total(table)
    rows = _range_rows(table, names, metered)
    has_cost, has_peak = _has_cost(table), _has_peak(table)
    cur = _currency(result)
    draws = {d.equipment: d for d in result.fit.draws}
    full_names = {eq.id: eq.name for eq in result.site.equipment}
    loads_kwh = sum(r["kwh"] for r in rows if not _is_base(r["equipment"])
                    and r["equipment"] not in ("unexplained", "estimated-gaps"))
    kpis = [("Metered energy", f"{_num(metered)} kWh")]
    estimated = sum(r["kwh"] for r in rows if r["equipment"] == "estimated-gaps")
    if estimated:
        kpis.append(("Estimated for short meter gaps", f"{_num(estimated)} kWh"))
    if has_cost:
        kpis.append(("Cost of the metered energy", f"{_num(float(table['cost'].sum()), 2)} {cur}"))
    if metered:
        kpis.append(("Explained by equipment", f"{_num(100 * loads_kwh / metered, 1)} %"))
    kpi_html = "".join(f"<div class=\"kpi\"><span>{e(k)}</span><b>{e(v)}</b></div>"
                       for k, v in kpis)
    svg = _range_chart(ch, rows)
    headers = [("equipment", False), ("run [h]", True), ("energy [kWh]", True),
               ("interval [kWh]", True), ("share [%]", True), ("draw [kW]", True)]
    if has_peak:
        headers.append(("peak share [kW]", True))
    if has_cost:
        headers.append((f"cost [{e(cur)}]", True))
    headers.append(("notes", False))
    body = []
    for r in rows:
        n = r["equipment"]
        d = draws.get(n)
        if d is not None:
            name = d.name or n
        elif _is_base(n):
            name = "baseload (load no run log explains)"
        elif n == "unexplained":
            name = "metered minus everything fitted"
        else:
            name = full_names.get(n, n)
        kw = _num(d.kw, 1) if d is not None and d.kw is not None else "-"
        interval = (f"{_num(r['kwh_low'])}–{_num(r['kwh_high'])}"
                    if r["kwh_low"] is not None else "-")
        if d is not None:
            flags = d.flags
        else:
            flags = table.filter(pl.col("equipment") == n)["flags"].to_list()
            flags = [f for cell in flags for f in (cell or "").split(";") if f]
        label = _eq(n, ch.colour(n))
        if name != n:
            label += f'<br><span class="name">{e(name)}</span>'
        cells = [label, _num(r["run_hours"]), _num(r["kwh"]), interval,
                 _num(100 * r["share"], 1), kw]
        if has_peak:
            cells.append(_num(r["peak_kw"], 1))
        if has_cost:
            cells.append(_num(r["cost"], 2))
        cells.append(_flag_text(flags))
        body.append(cells)
    metered_rows = [r for r in rows if r["equipment"] != "estimated-gaps"]
    total = ["total metered", "", _num(sum(r["kwh"] for r in metered_rows)), "", "100.0", ""]
    if has_peak:
        total.append("")
    if has_cost:
        total.append(_num(sum(r["cost"] or 0.0 for r in rows), 2))
    total.append("")
    tab = _table(headers, body)
    tab = tab.replace("</tbody>", "<tr class=\"total\">" + "".join(
        f'<td class="num">{c}</td>' if headers[i][1] else f"<td>{c}</td>"
        for i, c in enumerate(total)) + "</tr></tbody>")
    own = any(m.own_fit for m in result.fit.months.values())
    notes = [
        "Energy and its interval are sums over the months"
        + (" of each month's own fit" if own else "")
        + "; the interval of a sum of months is the sum of the monthly interval ends, so it "
          "is on the wide side. Draw: the whole range's fitted draw (full-speed draw for "
          "variable-speed equipment; for a weather-dependent load, at its reference "
          "temperature). Share: of the metered energy.",
        ("One load, several draw figures: this page gives the draw fitted on the whole range; "
         "the month-by-month page gives each month's own fit (which follows that month's "
         "weather and condition), the drift page the draw tracked day by day, and the last "
         "page the engineer's prior (nameplate or guess) the fit started from. They differ "
         "because each rests on different data; use this page's figure for the range as a "
         "whole."),
        ("Unexplained is what the meter recorded and nothing fitted accounts for; it can be "
         "negative when the fit overshoots."),
    ]
    if estimated:
        notes.append("Estimated gaps: energy filled in by linear interpolation for short meter "
                     "gaps; not metered, so not in the total or the shares.")
    tariff = result.fit.tariff
    if has_peak:
        notes.append("Peak share [kW]: each row's estimated draw during the interval of a "
                     "month's highest metered demand, which is when the demand charge is set "
                     "(the billing peak), not the load's own maximum; the column shows the "
                     "largest over the months. The rows of a month add up to that month's peak "
                     "demand. " + UNEXPLAINED_PEAK)
    if has_cost and tariff is not None:
        notes.append("Cost: " + e(tariff.method) + ". The tariff and the time of each "
                     'month\'s peak are on the <a href="#months">month-by-month page</a>.')
    return (f'<section class="page first" id="glance"><h2>1. The range at a glance</h2>'
            f'<div class="kpis">{kpi_html}</div>'
            + _figure(svg, "Energy of each equipment over the whole range, with its interval "
                           "(whiskers); baseload in grey, unexplained in a light neutral.")
            + f'<div class="scroll">{tab}</div>'
            + "".join(f'<p class="muted">{n}</p>' for n in notes) + "</section>")


UNEXPLAINED_PEAK = ("The unexplained row's peak share, and so its demand cost, is negative "
                    "when the fitted loads add up to more than the meter read in that interval.")


def _price(value: float | None) -> str:
    """A price with at least 2 and at most 5 decimals: 0.082, 13.50."""
    if value is None or not math.isfinite(value):
        return "-"
    text = f"{value:,.5f}".rstrip("0")
    return text + "0" * max(0, 2 - len(text.split(".")[1]))


def _local_time(utc_iso: str | None, tz) -> str:
    """An ISO UTC time as local weekday, date, time and zone abbreviation:
    'Tue 2025-07-15 15:30 CDT'."""
    if not utc_iso:
        return "-"
    when = dt.datetime.fromisoformat(utc_iso)
    if when.tzinfo is None:  # fit.json writes UTC times; a bare one is UTC too
        when = when.replace(tzinfo=dt.UTC)
    return e(when.astimezone(tz).strftime("%a %Y-%m-%d %H:%M %Z"))


def _tariff_table(result: BreakdownResult, tariff: TariffSummary) -> str:
    """The tariff as priced: energy prices (outside and in each time-of-use period, with its
    spells), holidays and the demand price, with how demand is measured."""
    cur = e(tariff.currency or _currency(result))
    periods = tariff.periods
    holidays = tariff.holidays
    demand = tariff.demand_price_per_kw
    energy = tariff.energy_price_per_kwh
    rows = [["energy, outside the periods below" if periods else "energy",
             _price(energy), "kWh", "every other hour" if periods else "every hour"]]
    for p in periods:
        rows.append([f"energy, {e(str(p['name']))}", _price(p["price_per_kwh"]),
                     "kWh", e(", ".join(str(x) for x in p["spells"])) + " (local time)"
                     + (", not on holidays" if holidays else "")])
    if holidays:
        rows.append(["holidays", "-", "-",
                     ", ".join(f'<span class="eq">{e(str(h))}</span>' for h in holidays)
                     + (": every hour at the price outside the periods" if periods else "")])
    minutes = result.aligned.interval_min
    rows.append(["demand", _price(demand), "kW",
                 (f"the month's highest demand over one meter interval ({minutes:g} min), "
                  "at any hour")])
    table = _table([("charge", False), (f"price [{cur} per unit]", True), ("unit", False),
                    ("applies", False)], rows)
    return (table + '<p class="muted">The meter interval is taken as the demand interval, and '
            "only one demand charge, on the month's highest interval demand at any hour, is "
            "modelled: a bill with demand charges by time of day, a ratchet, a minimum charge, "
            "taxes or fixed charges differs from these costs.</p>")


def _month_table(names: list[str], periods: list[str], values: dict[tuple[str, str], float],
                 colours: dict[str, str], unit: str, digits: int) -> str:
    out = []
    for k in range(0, len(periods), MONTHS_PER_TABLE):
        chunk = periods[k:k + MONTHS_PER_TABLE]
        headers = [("equipment", False)] + [(f'<span class="eq">{p}</span><br>[{e(unit)}]', True)
                                          for p in chunk]
        last = k + MONTHS_PER_TABLE >= len(periods)
        if last:
            headers.append((f"all<br>[{e(unit)}]", True))
        rows = []
        for n in names:
            cells = [_eq(n, colours[n])]
            cells += [_num(values.get((p, n)), digits) for p in chunk]
            if last:
                cells.append(_num(sum(values.get((p, n), 0.0) for p in periods), digits))
            rows.append(cells)
        label = "total with estimated gaps" if "estimated-gaps" in names else "total"
        totals = [label] + [_num(sum(values.get((p, n), 0.0) for n in names), digits)
                              for p in chunk]
        if last:
            totals.append(_num(sum(values.get((p, n), 0.0) for p in periods for n in names),
                               digits))
        rows.append(totals)
        html_table = _table(headers, rows, "wide")
        # The last body row is the total.
        i = html_table.rfind("<tr>")
        html_table = html_table[:i] + '<tr class="total">' + html_table[i + 4:]
        out.append(f'<div class="scroll">{html_table}</div>')
    return "".join(out)


def _months(result: BreakdownResult, ch: _Charts, names: list[str], periods: list[str]) -> str:
    table = result.breakdown
    kwh = {(r["period"], r["equipment"]): float(r["kwh"]) for r in
           table.select("period", "equipment", "kwh").iter_rows(named=True)
           if r["kwh"] is not None}
    svg = _monthly_chart(ch, periods, names, kwh)
    parts = ['<section class="page" id="months"><h2>2. Month by month</h2>',
             _figure(svg, "Energy per month, one colour per equipment. Parts above zero add up "
                          "to the metered total (black mark) plus any negative unexplained "
                          "part, which is drawn below zero."),
             "<h3>Energy per month</h3>",
             _month_table(names, periods, kwh, ch.colours, "kWh", 0)]
    if _has_cost(table):
        cur = _currency(result)
        cost = {(r["period"], r["equipment"]): float(r["cost"]) for r in
                table.select("period", "equipment", "cost").iter_rows(named=True)
                if r["cost"] is not None}
        parts += [f"<h3>Cost per month ({e(cur)}, rounded to whole units)</h3>",
                  _month_table(names, periods, cost, ch.colours, cur, 0)]
        tariff = result.fit.tariff
        if tariff is not None:
            parts += ["<h3>The tariff</h3>", _tariff_table(result, tariff)]
        months = tariff.months if tariff is not None else []
        if months:
            tz = _zone(result.site.timezone)
            rows = [[_eq(m.period),
                     f'<span class="eq">{_local_time(m.peak_start_utc, tz)}</span>',
                     _num(m.metered_kwh), _num(m.peak_kw, 1),
                     _num(m.energy_cost, 2), _num(m.demand_cost, 2),
                     _num(m.cost, 2)] for m in months]
            parts += ["<h3>The bill, month by month</h3>",
                      _table([("month", False), ("peak interval starts (local)", False),
                              ("metered [kWh]", True), ("peak demand [kW]", True),
                              (f"energy cost [{e(cur)}]", True),
                              (f"demand cost [{e(cur)}]", True), (f"cost [{e(cur)}]", True)],
                             rows),
                      ('<p class="muted">Peak demand: the highest interval demand of the month '
                       "among the intervals used, starting at the local time shown. Each row's "
                       "peak share [kW] is its estimated draw during that interval (coincident "
                       "with the billing peak, not the load's own maximum), and its demand cost "
                       f"is that share times the demand price. {UNEXPLAINED_PEAK}</p>")]
    not_own = {p: m for p, m in result.fit.months.items() if not m.own_fit}
    if not_own:
        parts.append("<p class=\"muted\">"
                     + "; ".join(f"{e(p)}: {e(str(m.reason))}"
                                 for p, m in not_own.items()) + ".</p>")
    parts.append("</section>")
    return "".join(parts)


def _drift_section(drift: DriftResult | None, ch: _Charts, names: list[str],
                   note: str | None, shown: set[str]) -> str:
    """The drift page; `shown`: notes already on the fit page, not repeated here."""
    head = '<section class="page" id="drift"><h2>3. Drift over time</h2>'
    if drift is None:
        return (head + "<p>" + e(note or "No drift tracking was run for this report.")
                + "</p></section>")
    s = drift.summary
    t = drift.table
    parts = [head,
             ("<p>Each equipment's draw is tracked day by day (per-weight normalized LMS, "
              f"step size {s.step_size_mu:.3g}, the same memory for every "
              "load) from its draw in its own reference period (in the table; loads that run "
              "together and cannot be told apart are tracked as their group A+B). "
              f"Rule: {e(s.rule)}; threshold "
              f"{_num(100 * s.threshold, 0)} %.</p>")]
    forms = s.reference_forms_text()
    if forms:
        parts.append("<p>Baseload: " + e("; ".join(forms)) + ". Where the draws come from "
                     "the declared profile and a load's draw differs under the form the data "
                     "choose, a note below says so: its absolute level is uncertain, its "
                     "changes are still tracked.</p>")
    alarms = s.alarms
    if alarms:
        parts.append(_list([f'<span class="alarm">Alarm: {e(a.equipment)}</span> from '
                            f"{e(a.first_alarm_date)}: draw "
                            f"{_num(100 * a.change, 1)} % ({_num(100 * a.change_low, 1)} "
                            f"to {_num(100 * a.change_high, 1)} %) against its reference, as "
                            f"of {e(a.as_of)}" for a in alarms]))
    else:
        parts.append("<p>No alarm: no tracked draw moved beyond both its band and the "
                     "threshold.</p>")
    for k in range(0, len(names), DRIFT_PANELS_PER_CHART):
        chunk = names[k:k + DRIFT_PANELS_PER_CHART]
        svg = _drift_chart(ch, t, chunk, s, k // DRIFT_PANELS_PER_CHART + 1)
        parts.append(_figure(svg, "Tracked daily draw (line), its band (shaded), the reference "
                                  "draw (dashed), the reference period (grey) and alarm days "
                                  "(red dots)."))
    memory = s.memory_days_per_equipment
    band = s.band_sd_kw
    own = s.reference_per_equipment
    first_alarm = {a.equipment: a.first_alarm_date for a in alarms}
    rows = []
    for n in names:
        last = t.filter(pl.col("equipment") == n).sort("date").row(-1, named=True)
        change = last["change"]
        period = own.get(n)
        rows.append([_eq(n, ch.colour(n)),
                     e(f"{period[0]} to {period[1]}") if period else "-",
                     _num(last["kw_reference"], 2),
                     _num(last["kw_tracked"], 2), "-" if change is None else
                     _num(100 * change, 1), _num(band.get(n), 2), _num(memory.get(n), 0),
                     f'<span class="alarm eq">from {e(first_alarm[n])}</span>'
                     if n in first_alarm else "none"])
    parts.append(_table([("equipment", False), ("reference period", False),
                         ("reference draw [kW]", True),
                         ("latest tracked [kW]", True), ("change [%]", True),
                         ("band sd [kW]", True), ("memory [d]", True), ("alarm", False)], rows))
    notes = [n for n in s.notes if n not in shown]
    if notes:
        parts.append("<h3>Notes</h3>" + _list([e(str(n)) for n in notes]))
    parts.append("</section>")
    return "".join(parts)


def _fit_section(result: BreakdownResult, ch: _Charts) -> str:
    fit = result.fit
    when, y, f, unit = _fit_series(result)
    svg1, svg2 = _fit_charts(ch, when, y, f, unit)
    q = fit.fit_quality
    g14 = q["ashrae_guideline_14"]
    hc = g14["hourly_criteria"]
    mc = g14["monthly_criteria"]

    def verdict(ok: bool | None) -> str:
        if ok is None:
            return "-"
        return '<span class="meets">meets</span>' if ok else '<span class="fails">does not meet</span>'

    rows = []
    iq = q["interval"]
    if iq:
        rows.append(["meter interval", _num(iq.get("n")), _num(iq.get("cv_rmse_pct"), 2), "-",
                     _num(iq.get("nmbe_pct"), 2), "-", "no criterion"])
    hq = q.get("hourly")
    if hq:
        ok = (hq["cv_rmse_pct"] <= hc["cv_rmse_pct"] and abs(hq["nmbe_pct"]) <= hc["nmbe_pct"])
        rows.append(["hourly", _num(hq.get("n")), _num(hq.get("cv_rmse_pct"), 2),
                     _num(hc["cv_rmse_pct"], 0), _num(hq.get("nmbe_pct"), 2),
                     _num(hc["nmbe_pct"], 0), verdict(ok)])
    mq = q["monthly"]
    if mq:
        nmbe = mq.get("nmbe_pct")
        ok = None if nmbe is None or not math.isfinite(nmbe) else abs(nmbe) <= mc["nmbe_pct"]
        rows.append(["monthly", _num(mq.get("months")), "-", _num(mc["cv_rmse_pct"], 0),
                     _num(nmbe, 2), _num(mc["nmbe_pct"], 0), verdict(ok) + " (NMBE)"])
    quality = _table([("level", False), ("points [count]", True), ("CV(RMSE) [%]", True),
                      ("limit [%]", True), ("NMBE [%]", True), ("limit [%]", True),
                      ("ASHRAE Guideline 14 criteria", False)], rows)
    c = fit.intervals
    words = [("in_range", "meter intervals in the range (first to last reading)"),
             ("intervals", "in the meter file"),
             ("used", "used by the fit"),
             ("absent", "absent from the meter file (left out, not filled)"),
             ("no_reading", "without a meter reading (left out)"),
             ("spikes", "of these, readings set aside as spikes"),
             ("log_unknown", "run-log state unknown for some equipment (left out)"),
             ("weather_unknown", "no outdoor temperature near them (left out)")]
    c = {**c, "in_range": int(c.get("intervals", 0)) + int(c.get("absent", 0))}
    count_rows = [[e(w), _num(c.get(k))] for k, w in words if k in c]
    unknown = {k: v for k, v in fit.unknown_intervals_by_equipment.items() if v}
    findings = fit.meter_validation
    warnings = fit.warnings
    finding_messages = {fd.message for fd in findings}
    other_warnings = group_kinds([w for w in warnings if str(w) not in finding_messages])
    parts = ['<section class="page" id="fit"><h2>4. How good the fit is</h2>',
             _figure(svg1, f"Metered and fitted energy per local {unit} (sums of the intervals "
                           "used)."),
             _figure(svg2, f"Metered minus fitted energy per local {unit}."),
             "<h3>Fit quality against ASHRAE Guideline 14</h3>", quality,
             ('<p class="muted">CV(RMSE) and NMBE as in ASHRAE Guideline 14-2014 (Annex B), '
              "with n - p in the denominator (p = fitted parameters). The guideline's "
              f"calibration criteria: hourly data CV(RMSE) within {_num(hc['cv_rmse_pct'], 0)} % "
              f"and NMBE within {_num(hc['nmbe_pct'], 0)} %; monthly data "
              f"{_num(mc['cv_rmse_pct'], 0)} % and {_num(mc['nmbe_pct'], 0)} %. The monthly "
              "CV(RMSE) is not computed: a year has fewer months than the fit has parameters. "
              "Meeting the criteria says the model follows the meter; it does not prove each "
              "equipment's split.</p>"),
             "<h3>What was left out and why</h3>",
             _table([("meter intervals", False), ("count [intervals]", True)], count_rows)]
    if unknown:
        parts.append("<p>Intervals with an unknown run-log state, per equipment: "
                     + e(", ".join(f"{k} {v:,}" for k, v in unknown.items())) + ".</p>")
    if findings:
        parts.append("<h3>Meter validation findings</h3>"
                     + _list([e(fd.message) for fd in findings]))
    else:
        parts.append("<p>The meter validation (gaps, duplicates, spikes, zero runs, interval "
                     "changes, daylight-saving hours, register rollovers) raised no finding; "
                     "intervals left out for other reasons are counted above.</p>")
    form = fit.baseload.form
    if form:
        parts.append("<h3>The baseload's form</h3><p>" + form_sentence(form) + "</p>")
    if other_warnings:
        parts.append("<h3>Notes from the fit</h3>" + _list([e(str(w)) for w in other_warnings]))
    parts.append("</section>")
    return "".join(parts)


def _names(items: list[str]) -> str:
    """'A', 'A and B', 'A, B and C', each in bold and escaped."""
    b = [f'<b class="{"eq" if len(i) <= CHART_LABEL_CHARS else "long"}">{e(i)}</b>'
         for i in items]
    return b[0] if len(b) == 1 else ", ".join(b[:-1]) + " and " + b[-1]


def _weight(w: float | None) -> str:
    if w is None or not math.isfinite(w):
        return "-"
    return "under 0.1" if w < 0.001 else _num(100 * w, 1)


def from_celsius(value_c: float, unit: str) -> float:
    """A temperature [degC] -> the site's weather unit ("F" or "C"); the inverse of
    disagg.inputs.config.to_celsius."""
    return value_c * 9.0 / 5.0 + 32.0 if unit == "F" else value_c


def _temp(value_c: float | None, unit: str) -> str:
    """A temperature given in degC, shown in the site's weather unit: '62.0 °F'."""
    if value_c is None or not math.isfinite(value_c):
        return "-"
    return f"{_num(from_celsius(value_c, unit), 1)} °{'F' if unit == 'F' else 'C'}"


def _priors_section(result: BreakdownResult) -> str:
    fit = result.fit
    ident = fit.identifiability
    bound = ident["correlation_bound"]
    pd_weight = ident["prior_driven_weight"]
    draws = fit.draws
    unit = result.site.weather.unit if result.site.weather is not None else "C"
    sentences: list[str] = []
    groups: dict[str, list[str]] = {"not-run": [], "unstable": [], "variable": [],
                                    "meter": [], "form-sensitive": [], "schedule-edge": [],
                                    "switch-steps": []}
    for d in draws:
        n = d.equipment
        flags = d.flags
        src = d.prior_source or "none"
        w = d.prior_weight
        prior = (f"{_num(d.prior_kw, 1)} ± {_num(d.prior_sd_kw, 1)} kW"
                 if d.prior_kw is not None else None)
        decided_by_prior = False
        if "combined" in flags:
            sentences.append(
                f"{_names(d.members)} ran together whenever they ran (their "
                f"run-hours correlate at {bound:g} or more) and no size or draw was given that "
                "could split them: the meter cannot tell their energy apart, so it is "
                f"reported as one row, <b>{e(n)}</b>.")
        others = [f.split(":", 1)[1] for f in flags if f.startswith("inseparable:")]
        if others:
            who = " and ".join("the baseload schedule" if o == "baseload" else o for o in others)
            sentences.append(
                f"<b>{e(n)}</b> cannot be told apart from {e(who)} by the data. Its share "
                f"is decided by its prior ({e(src)}"
                + (f": {e(prior)}" if prior else "") + "), not by the meter.")
            decided_by_prior = True
        if "prior-driven" in flags:
            sentences.append(
                f"<b>{e(n)}</b>: {_weight(w)} % of the estimate's precision comes from its "
                f"prior ({e(src)}), at least the {_num(100 * pd_weight, 0)} % that makes it "
                "prior-driven: the prior, more than the meter, decided this draw.")
            decided_by_prior = True
        if d.weather is not None:
            wd = d.weather
            sentences.append(
                f"<b>{e(n)}</b> draws more the "
                f"{'hotter' if wd.mode == 'cooling' else 'colder'} it is beyond "
                f"{_temp(wd.balance_temp_c, unit)} outdoors; its draw is stated at "
                f"{_temp(wd.reference_temp_c, unit)}.")
        if "not-run" in flags:
            groups["not-run"].append(n)
            continue
        for f in ("unstable", "variable", "form-sensitive", "schedule-edge", "switch-steps"):
            if f in flags:
                groups[f].append(n)
        if not decided_by_prior and w is not None and w < 0.05:
            groups["meter"].append(n)
    if groups["not-run"]:
        sentences.append(f"{_names(groups['not-run'])} did not run in this range: no energy.")
    if groups["variable"]:
        one = len(groups["variable"]) == 1
        sentences.append(f"{_names(groups['variable'])} "
                         + ("runs at variable speed: its run-hours are equivalent full-load "
                            "hours and its draw is the full-speed draw." if one else
                            "run at variable speed: their run-hours are equivalent full-load "
                            "hours and their draws are full-speed draws."))
    if groups["form-sensitive"]:
        sentences.append(f"The estimate of {_names(groups['form-sensitive'])} depends on which "
                         "shape the baseload is given: forms of the baseload that the data "
                         "cannot rule out give draws more than 10 % apart, and the interval "
                         "spans them.")
    if groups["schedule-edge"]:
        sentences.append(f"{_names(groups['schedule-edge'])} switch mostly within an hour of "
                         "the occupied schedule's starts and ends, where a change of the "
                         "baseload looks the same to the meter; their intervals include the "
                         "estimate with the baseload's own shape around those times.")
    if groups["switch-steps"]:
        sentences.append(f"When {_names(groups['switch-steps'])} switch on, the meter steps by "
                         "a different amount than when they switch off: something not in the "
                         "run log tends to start or stop with them (or the logged times are off "
                         "at one edge), and the meter alone cannot tell which step is the "
                         "load's own; their intervals span both.")
    if groups["unstable"]:
        one = len(groups["unstable"]) == 1
        sentences.append(f"The estimate{'' if one else 's'} of {_names(groups['unstable'])} "
                         "moved with the time period or with the baseload schedule assumed, so "
                         f"{'its interval was' if one else 'their intervals were'} widened to "
                         "cover those results (the notes on the fit page say by how much).")
    folded = ident["folded_into_baseload"]
    if folded:
        base = fit.baseload.row
        sentences.append(f"{_names(folded)} ran on the same schedule as the baseload and have "
                         f"no prior: their energy is reported in the row <b>{e(base)}</b>.")
    if groups["meter"]:
        sentences.append(f"The meter data, not the priors, decided the draws of "
                         f"{_names(groups['meter'])}: their priors carry under 5 % of each "
                         "estimate's precision.")
    month_rows = result.breakdown.filter(pl.col("flags").str.contains("range-draw"))
    if month_rows.height:
        months = sorted(set(month_rows["period"].to_list()))
        sentences.append(f"In {e(', '.join(months))} there were too few days of data for a "
                         "fit of that month's own: those months use the whole range's draws.")
    rows = []
    for d in draws:
        prior = (f"{_num(d.prior_kw, 1)} ± {_num(d.prior_sd_kw, 1)}"
                 if d.prior_kw is not None else "-")
        rng = (f"{_num(d.kw_low, 1)}–{_num(d.kw_high, 1)}"
               if d.kw_low is not None else "-")
        rows.append([_eq(d.equipment), prior,
                     _num(d.kw, 1), rng, _weight(d.prior_weight),
                     e(d.prior_source or "none"), _flag_text(d.flags)])
    tab = _table([("equipment", False), ("prior [kW]", True), ("fitted [kW]", True),
                  ("interval [kW]", True), ("prior weight [%]", True), ("prior from", False),
                  ("notes", False)], rows)
    return ('<section class="page" id="priors"><h2>5. What cannot be told apart, and what the '
            "priors decided</h2>"
            "<p>A prior is the draw the engineer expected, from a nameplate or a given draw. "
            "The fit leans toward it only as far as the meter leaves room; the prior weight "
            "says how much of each estimate's precision came from it (0 %: all from the "
            "meter).</p>"
            + _list(sentences) + tab + "</section>")


def _caution_section(result: BreakdownResult) -> str:
    extra = ("Intervals are at "
             f"{100 * result.estimates.confidence:g} % confidence: the true value can lie "
             "outside them.")
    return ('<section class="page" id="cautions"><h2>6. Cautions</h2>'
            f'<div class="caution"><p>{e(CAUTION)}</p><p>{e(LOCKOUT)}</p></div>'
            f"<p>{e(extra)} Drift alarms point to where to look first; they are not a "
            "diagnosis.</p></section>")
