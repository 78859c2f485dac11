"""Terminal text: every command's summary for a person (and breakdown's --json for scripts).

Summaries are built from result objects before any file is written, so a summary that
fails leaves the output folder untouched.
"""

from __future__ import annotations

import datetime as dt
import math
import zoneinfo
from pathlib import Path
from typing import TYPE_CHECKING

import polars as pl

from disagg.analyses.pipeline import CAUTION, BreakdownResult, CheckResult
from disagg.inputs.notes import group_kinds
from disagg.present.outputs import to_json

if TYPE_CHECKING:
    from disagg.analyses.compare import CompareResult
    from disagg.analyses.drift import DriftResult
    from disagg.jobs.batch import PortfolioResult
    from disagg.present.history import HistoryComparison

def _fmt(x: float | None, digits: int = 1) -> str:
    return "-" if x is None or not math.isfinite(x) else f"{x:,.{digits}f}"


def _num_spec(x: float | None, spec: str) -> str:
    return "-" if x is None or not math.isfinite(x) else format(x, spec)


def breakdown_summary(result: BreakdownResult) -> str:
    """A short readable table of the whole range, the fit quality, warnings and the caution."""
    t = result.breakdown
    totals = (t.group_by("equipment", maintain_order=True)
              .agg(pl.col("run_hours").sum(), pl.col("kwh").sum(),
                   pl.col("kwh_low").sum(), pl.col("kwh_high").sum(),
                   pl.col("kwh_low").null_count().alias("no_range"), pl.col("flags"),
                   pl.col("cost").sum(), pl.col("cost").null_count().alias("no_cost")))
    metered = float(result.estimates.y.sum())
    tariff = result.fit.tariff
    currency = tariff.currency if tariff is not None else ""
    draws = {d.equipment: d for d in result.fit.draws}
    order = {e: i for i, e in enumerate(draws)}
    last = len(order) + 1
    totals = totals.with_columns(
        pl.col("equipment").replace_strict(order, default=len(order), return_dtype=pl.Int64)
        .alias("o")).with_columns(
        pl.when(pl.col("equipment").str.starts_with("baseload")).then(last)
        .when(pl.col("equipment") == "unexplained").then(last + 1)
        .otherwise(pl.col("o")).alias("o")).sort("o", maintain_order=True)
    periods = t["period"].unique().sort()
    own = any(m.own_fit for m in result.fit.months.values())
    lines = [f"{result.site.name}: {periods[0]} to {periods[-1]}, "
             f"{result.aligned.counts['used']:,} intervals used, metered {metered:,.0f} kWh",
             "",
             ("kWh: sum of each month's own fit; " if own else "")
             + "kW: the draw fitted over the whole range; run h [h], kWh [kWh], kW [kW]",
             f"{'equipment':<22} {'run h':>7} {'kWh':>10} {'kWh range':>19} {'share':>6} "
             f"{'kW':>7} {'kW range':>13}  "
             + (f"{'cost ' + currency[:5]:>11}  " if tariff is not None else "") + "flags"]
    any_variable = False
    for r in totals.iter_rows(named=True):
        d = draws.get(r["equipment"])
        kw, kw_rng = "-", "-"
        if d is not None and d.kw is not None:
            kw = _fmt(d.kw)
            if d.kw_low is not None:
                kw_rng = f"{_fmt(d.kw_low)}-{_fmt(d.kw_high)}"
        kwh_rng = "-" if r["no_range"] else f"{_fmt(r['kwh_low'], 0)}-{_fmt(r['kwh_high'], 0)}"
        flags = ";".join(d.flags) if d is not None else ";".join(dict.fromkeys(
            f for cell in r["flags"] for f in (cell or "").split(";") if f))
        any_variable |= "variable" in flags
        kwh = r["kwh"] + 0.0 if abs(r["kwh"]) >= 0.5 else 0.0  # no "-0"
        share = 100 * kwh / metered if metered else 0.0
        cost = ""
        if tariff is not None:
            cost = f"{'-' if r['no_cost'] else _fmt(r['cost'] + 0.0, 2):>11}  "
        lines.append(f"{r['equipment'][:22]:<22} {_fmt(r['run_hours'], 0):>7} {_fmt(kwh, 0):>10} "
                     f"{kwh_rng:>19} {share:>5.1f}% {kw:>7} {kw_rng:>13}  {cost}{flags}")
    lines.append("flags: whole-range fit; each month's are in breakdown.csv. baseload and "
                 "unexplained run h: interval hours.")
    lines.append("unexplained: metered minus everything fitted; about 0 kWh whenever a month "
                 "is fitted on its own data (its baseload takes the mean), so judge the fit by "
                 "CV(RMSE) below; its cost is that misfit priced interval by interval and in the "
                 "month's peak interval.")
    if any_variable:
        lines.append("run h of variable equipment: equivalent full-load hours "
                     "(integral of status ** exponent).")
    if tariff is not None:
        months_cost = tariff.months
        total = sum(m.cost for m in months_cost)
        demand = sum(m.demand_cost for m in months_cost)
        lines += ["", f"Cost of the intervals used: {_fmt(total, 2)} {currency} (energy "
                      f"{_fmt(total - demand, 2)}, demand {_fmt(demand, 2)} over "
                      f"{len(months_cost)} month{'s' if len(months_cost) != 1 else ''}); "
                      "each row's peak_kw and cost are in breakdown.csv."]
    q = result.fit.fit_quality
    hq = q.get("hourly")
    if hq:
        meets = "meets" if q["ashrae_guideline_14"]["hourly_meets"] else "does not meet"
        lines += ["", f"Hourly fit: CV(RMSE) {hq['cv_rmse_pct']:.1f} %, NMBE {hq['nmbe_pct']:.2f} %,"
                      f" R2 {hq['r2']:.3f} ({meets} the ASHRAE Guideline 14 hourly criteria "
                      "30 % / 10 %)"]
    lines.append(f"Intervals at {100 * result.estimates.confidence:g} % confidence.")
    form = result.estimates.form
    if form is not None:
        how = "pinned in the site file" if form.pinned else "chosen by the data"
        lines.append(f"Baseload form: {form.form.name} ({how}; fit.json baseload.form "
                     "compares the others).")
    months = result.fit.months
    if months:
        n_own = sum(1 for m in months.values() if m.own_fit)
        lines.append(f"{n_own} of {len(months)} months fitted on their own data; their draws, "
                     "flags and notes are in fit.json (months).")
    for w in group_kinds(result.fit.warnings):
        lines.append(f"Note: {w}")
    lines += ["", f"Caution: {CAUTION}"]
    return "\n".join(lines)

def breakdown_json(result: BreakdownResult, paths: list[Path]) -> str:
    """The summary for scripts (``--json``): totals per row over the range, cost, fit quality,
    notes, the caution and the files written."""
    t = result.breakdown
    totals = (t.group_by("equipment", maintain_order=True)
              .agg(pl.col("run_hours").sum(), pl.col("kwh").sum(), pl.col("kwh_low").sum(),
                   pl.col("kwh_high").sum(), pl.col("kwh_low").null_count().alias("no_range"),
                   pl.col("cost").sum(), pl.col("cost").null_count().alias("no_cost"),
                   pl.col("flags")))
    metered = float(result.estimates.y.sum())
    rows = [{"equipment": r["equipment"], "run_hours": r["run_hours"], "kwh": r["kwh"],
             "kwh_low": None if r["no_range"] else r["kwh_low"],
             "kwh_high": None if r["no_range"] else r["kwh_high"],
             "share": r["kwh"] / metered if metered else None,
             "cost": None if r["no_cost"] else r["cost"],
             "flags": sorted({f for cell in r["flags"] for f in (cell or "").split(";") if f})}
            for r in totals.iter_rows(named=True)]
    tariff = result.fit.tariff
    periods = t["period"].unique().sort().to_list()
    return to_json({
        "site": result.site.name, "first_period": periods[0], "last_period": periods[-1],
        "intervals_used": result.aligned.counts["used"],
        "metered_kwh": metered,
        "currency": tariff.currency if tariff is not None else None,
        "cost": sum(m.cost for m in tariff.months) if tariff is not None else None,
        "equipment": rows, "fit_quality": result.fit.fit_quality,
        "warnings": result.fit.warnings, "caution": CAUTION,
        "files": [str(p) for p in paths]})

def check_summary(result: CheckResult) -> str:
    r = result.report
    c = r.intervals
    zone = zoneinfo.ZoneInfo(result.site.timezone)
    start, end = (dt.datetime.fromisoformat(t).astimezone(zone).isoformat()
                  for t in (r.start_utc, r.end_utc))
    lines = [f"{r.site}: {start} to {end} ({result.site.timezone}), "
             f"{r.interval_min}-minute meter intervals",
             f"intervals {c['intervals']:,}: used {c['used']:,}, absent {c['absent']:,}, "
             f"no reading {c['no_reading']:,}, run-log state unknown {c['log_unknown']:,}"]
    for e, h in r.run_hours.items():
        lines.append(f"  {e:<20} {h:>10,.1f} run h")
    for a, b, rho in r.inseparable_pairs:
        lines.append(f"cannot be told apart: {a} and {b} (correlation of hours {rho:.3f})")
    for e in r.inseparable_from_baseload:
        lines.append(f"cannot be told apart from the baseload schedule: {e}")
    for e in r.not_run:
        lines.append(f"never ran in this period: {e}")
    findings = r.findings
    if findings:
        lines.append(f"Meter validation: {len(findings)} finding{'s' * (len(findings) != 1)}")
        lines += [f"  {f.message}" for f in findings]
    else:
        lines.append("Meter validation: no gaps, duplicates, spikes, zero runs, interval "
                     "changes, daylight-saving hours or register rollovers found")
    lines += [f"Note: {n}" for n in r.notes]
    if r.clock_offset is not None:
        lines.append(f"Run-log clock: {r.clock_offset.verdict}")
    return "\n".join(lines)

def drift_summary(result: DriftResult) -> str:
    """Step size, per-equipment latest tracked draw and change, alarms, notes, caution."""
    s = result.summary
    t = result.table
    lines = [f"{s.site}: step size mu = {s.step_size_mu:.4g} "
             f"(stable range 0 < mu < 2), threshold {100 * s.threshold:g} %; each load "
             "tracked from its own reference period",
             "",
             f"{'equipment':<22} {'reference period':>23} {'reference kW':>12} {'latest kW':>10} "
             f"{'change':>8} {'memory d':>9}  alarm"]
    windows = s.reference_per_equipment
    alarmed = {a.equipment: a for a in s.alarms}
    for eq in t["equipment"].unique(maintain_order=True):
        rows = t.filter(pl.col("equipment") == eq)
        last = rows.row(-1, named=True)
        mem = s.memory_days_per_equipment.get(eq)
        change = last["change"]
        w = windows.get(eq)
        period = f"{w[0]} to {w[1]}" if w else "-"
        lines.append(f"{eq[:22]:<22} {period:>23} {last['kw_reference']:>12.2f} "
                     f"{last['kw_tracked']:>10.2f} "
                     f"{'-' if change is None else f'{100 * change:+.1f} %':>8} "
                     f"{'-' if mem is None else f'{mem:.0f}':>9}  "
                     + (f"since {alarmed[eq].first_alarm_date}" if eq in alarmed else ""))
    lines += [f"Baseload: {text}" for text in s.reference_forms_text()]
    for a in s.alarms:
        lines.append(f"Alarm: {a.equipment} from {a.first_alarm_date}: draw "
                     f"{100 * a.change:+.1f} % ({100 * a.change_low:+.1f} to "
                     f"{100 * a.change_high:+.1f} %) as of {a.as_of}"
                     f" (mean of its last {a.recent_days} days, the tracker's lag taken out)")
    lines += [f"Note: {n}" for n in s.notes]
    lines += ["", f"Caution: {CAUTION}"]
    return "\n".join(lines)


def compare_summary(result: CompareResult) -> str:
    """A short readable table of both periods' draws, the verdicts, notes and the caution."""
    r = result.report
    pb, pa = r.before, r.after
    level = f"{100 * r.confidence:g} %"
    lines = [(f"{r.site}: draws before {pb.date_from} to {pb.date_to} ({pb.intervals_used:,} "
             f"intervals used) and after {pa.date_from} to {pa.date_to} "
             f"({pa.intervals_used:,} intervals used)"),
             "",
             f"kW: running draw [kW] and its {level} range; change: after / before - 1 [%]",
             (f"{'equipment':<22} {'kW before':>9} {'range':>15} {'kW after':>9} {'range':>15} "
             f"{'change':>8} {'p-value':>8}  verdict")]

    def rng(lo, hi):
        return "-" if lo is None else f"{_num_spec(lo, ',.2f')}-{_num_spec(hi, ',.2f')}"

    for row in result.table.iter_rows(named=True):
        p = row["p_value"]
        p_text = "-" if p is None else ("<0.001" if p < 0.001 else f"{p:.3f}")
        change = "-" if row["change"] is None else f"{100 * row['change']:+.1f} %"
        lines.append(f"{row['equipment'][:22]:<22} {_num_spec(row['kw_before'], ',.2f'):>9} "
                     f"{rng(row['kw_before_low'], row['kw_before_high']):>15} "
                     f"{_num_spec(row['kw_after'], ',.2f'):>9} "
                     f"{rng(row['kw_after_low'], row['kw_after_high']):>15} "
                     f"{change:>8} {p_text:>8}  {row['verdict']}")
    lines.append(f"rising/falling: p-value under {1 - r.confidence:.3g} and a change of at "
                 f"least {100 * r.min_change:g} %; steady: two one-sided tests put the change "
                 f"inside +-{100 * r.min_change:g} %; unclear: the data cannot tell (why "
                 "below).")
    f = r.baseload_form
    if f:
        lines.append(f"Baseload form: {f['used']} in both periods, {f['chosen']}")
        if f["note"]:
            lines.append(f"Note: {f['note']}")
    for d in r.equipment:
        if d.get("reference_temp_c") is not None:
            lines.append(f"{d['equipment']}: both draws at {d['reference_temp_c']:.1f} degC "
                         "outdoor temperature")
    for d in r.equipment:
        if d["reason"]:
            lines.append(f"unclear {d['equipment']}: {d['reason']}")
    for name, p in (("before", pb), ("after", pa)):
        for w in p.warnings:
            lines.append(f"Note ({name}): {w}")
    for n in r.data_notes:
        lines.append(f"Note: {n}")
    lines += ["", f"Caution: {CAUTION}"]
    return "\n".join(lines)


def report_summary(result: BreakdownResult, drift: DriftResult | None) -> str:
    """One line for the terminal: site, months, metered kWh, cost, drift alarms."""
    from disagg.present.report.charts import _num as _fmt_report
    from disagg.present.report.sections import _currency, _has_cost, _metered_total

    table = result.breakdown
    periods = sorted(table["period"].unique().to_list())
    line = (f"{result.site.name}: {periods[0]} to {periods[-1]}, metered "
            f"{_fmt_report(_metered_total(table))} kWh")
    if _has_cost(table):
        line += f", cost {_fmt_report(float(table['cost'].sum()), 2)} {_currency(result)}"
    if drift is None:
        return line + "; drift left out"
    alarms = [a.equipment for a in drift.summary.alarms]
    return line + (f"; drift alarms: {', '.join(alarms)}" if alarms else "; no drift alarm")


# Sites listed one per line in the terminal summary; portfolio.csv always has them all.
SUMMARY_MAX_SITES = 50


DRIFT_NOT_RUN = "drift not tracked (batch --drift tracks it)"


def portfolio_summary(result: PortfolioResult, seconds: float | None = None) -> str:
    """A short table of the sites (the first SUMMARY_MAX_SITES), counts and the caution."""
    n, failed = len(result.outcomes), len(result.failed)
    took = f" in {seconds:,.1f} s" if seconds is not None else ""
    lines = [(f"{result.portfolio.source}: {n} site{'s' * (n != 1)}, {n - failed} ok, "
              f"{failed} failed{took}"),
             (f"{'file':<18} {'site':<24} {'period':<16} {'metered kWh':>12} {'peak kW':>8} "
              f"{'cost':>14} {'alarms':>6} {'CV(RMSE) %':>10} {'NMBE %':>7}  status")]
    for o in result.outcomes[:SUMMARY_MAX_SITES]:
        cost = "-" if o.cost is None else f"{_fmt(o.cost, 0)} {(o.currency or '')[:4]}"
        lines.append(f"{o.folder[:18]:<18} {(o.site or '-')[:24]:<24} {o.period or '-':<16} "
                     f"{_fmt(o.metered_kwh, 0):>12} {_fmt(o.peak_kw):>8} {cost:>14} "
                     f"{'-' if o.alarms is None else o.alarms:>6} {_fmt(o.cv_rmse_pct):>10} "
                     f"{_fmt(o.nmbe_pct, 2):>7}  {o.status}")
    if n > SUMMARY_MAX_SITES:
        lines.append(f"... and {n - SUMMARY_MAX_SITES} more sites: see portfolio.csv")
    ok = [o for o in result.outcomes if o.status == "ok"]
    if ok and all(o.drift_note == DRIFT_NOT_RUN for o in ok):
        lines.append("alarms: drift not tracked (add --drift to count drift alarms)")
    elif any(o.alarms is None for o in ok):
        lines.append("alarms: - where no day was tracked after the drift reference period; "
                     "see drift_note in portfolio.csv")
    unstored = sum(1 for o in ok if o.history_note)
    if unstored:
        lines.append(f"history: {unstored} site{'s' * (unstored != 1)} with months not stored "
                     "(a --from/--to range that cuts a month short, or a stored month with "
                     "more data); see history_note in portfolio.csv")
    lines.append("file: the site file's path in the portfolio without .toml (its output folder); peak kW: the highest "
                 "monthly peak demand of the intervals used; cost: over the range (sites "
                 "with a [tariff])")
    lines.append("CV(RMSE) and NMBE: hourly, as ASHRAE Guideline 14 defines them (criteria 30 % "
                 "and 10 %); each site's details are in its folder's fit.json")
    lines += ["", f"Caution: {CAUTION}"]
    return "\n".join(lines)


def history_summary(frame: pl.DataFrame, folder: Path, caution: str) -> str:
    """Each equipment's stored months, one block per equipment, for a terminal.

    Args:
        frame: read_history rows of one site (optionally one equipment).
    """
    periods = frame["period"].unique().sort()
    site = frame["site"][0]
    lines = [(f"{frame['site_name'][-1]} (history id {site}): {len(periods)} stored month"
              f"{'s' * (len(periods) != 1)}, {periods[0]} to {periods[-1]}, in {folder}"),
             ("kWh [kWh] and draw kW [kW] of each month's own run; run h [h]; days: days with "
              "data in the month; stored: when the month was last run (UTC)")]
    for (eq,), g in frame.group_by("equipment", maintain_order=True):
        lines += ["", eq,
                  (f"  {'period':<8} {'kWh':>10} {'kWh range':>19} {'kW':>8} {'kW range':>15} "
                   f"{'run h':>7} {'days':>4}  {'stored':<16}  flags")]
        for r in g.iter_rows(named=True):
            kwh_rng = ("-" if r["kwh_low"] is None
                       else f"{_fmt(r['kwh_low'], 0)}-{_fmt(r['kwh_high'], 0)}")
            kw_rng = "-" if r["kw_low"] is None else f"{_fmt(r['kw_low'])}-{_fmt(r['kw_high'])}"
            stored = r["run_utc"].strftime("%Y-%m-%d %H:%M") if r["run_utc"] else "-"
            days = "-" if r["days_with_data"] is None else r["days_with_data"]
            lines.append(f"  {r['period']:<8} {_fmt(r['kwh'], 0):>10} {kwh_rng:>19} "
                         f"{_fmt(r['kw']):>8} {kw_rng:>15} {_fmt(r['run_hours'], 0):>7} {days:>4}  "
                         f"{stored:<16}  {r['flags'] or ''}")
    lines += ["", f"Caution: {caution}"]
    return "\n".join(lines)


def comparison_summary(result: HistoryComparison, caution: str) -> str:
    """compare_from_history's table for a terminal, with its method and the caution."""
    b0, b1 = result.before
    a0, a1 = result.after
    lines = [(f"Draws from stored months: before {b0} to {b1} ({len(result.months_before)} "
              f"stored), after {a0} to {a1} ({len(result.months_after)} stored)"),
             (f"{'equipment':<22} {'before kW':>9} {'range':>13} {'after kW':>9} {'range':>13} "
              f"{'change':>8}  verdict")]
    for r in result.table.iter_rows(named=True):
        rng = {k: "-" if r[f"kw_{k}_low"] is None or math.isnan(r[f"kw_{k}_low"])
               else f"{_fmt(r[f'kw_{k}_low'])}-{_fmt(r[f'kw_{k}_high'])}" for k in ("before", "after")}
        change = "-" if r["change"] is None else f"{100 * r['change']:+.1f} %"
        lines.append(f"{r['equipment'][:22]:<22} {_fmt(r['kw_before']):>9} {rng['before']:>13} "
                     f"{_fmt(r['kw_after']):>9} {rng['after']:>13} {change:>8}  {r['verdict']}")
    lines += ["", f"Method: {result.method}", "", f"Caution: {caution}"]
    return "\n".join(lines)
