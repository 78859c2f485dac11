"""One call per job: read, align, fit, break down. Each returns plain data.

``run_breakdown`` and ``run_check`` are what the CLI calls; a Python user can call
``breakdown_site`` for the result without writing any file.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl

from disagg import __version__
from disagg.analyses.breakdown import monthly_breakdown
from disagg.analyses.clock import offset_warning
from disagg.analyses.summary import (
    BaseloadColumn,
    BaseloadSummary,
    CheckReport,
    ClockOffset,
    Draw,
    FitSummary,
    MonthFit,
    TariffMonth,
    TariffSummary,
    WeatherDraw,
)
from disagg.errors import ConfigError, InputError
from disagg.fit.align import (
    BASELOAD_COLUMN_COUNT,
    Aligned,
    align,
    frame_arrays,
)
from disagg.fit.design import BaseloadBuilder
from disagg.fit.estimate import Estimates, estimate_draws, inseparable
from disagg.fit.intervals import response_moved
from disagg.inputs.config import SiteConfig, load_site
from disagg.inputs.logcheck import coverage_findings
from disagg.inputs.notes import tidy
from disagg.inputs.readers import read_meter, read_runlog, read_weather
from disagg.inputs.vee import Finding
from disagg.progress import Progress, report

CAUTION = ("Estimates are not measurements. Any work on electrical equipment must follow local "
           "codes and be done by licensed, qualified people.")

# ASHRAE Guideline 14-2014 calibration criteria: hourly data CV(RMSE) 30 %, NMBE 10 %;
# monthly data CV(RMSE) 15 %, NMBE 5 % (read, quoted from the guideline in a secondary source).
G14_HOURLY = {"cv_rmse_pct": 30.0, "nmbe_pct": 10.0}
G14_MONTHLY = {"cv_rmse_pct": 15.0, "nmbe_pct": 5.0}


@dataclass
class BreakdownResult:
    """What ``disagg breakdown`` computes: the monthly table and the fit's details."""

    site: SiteConfig
    breakdown: pl.DataFrame
    fit: FitSummary
    estimates: Estimates
    aligned: Aligned
    findings: list[Finding] = field(default_factory=list)  # the meter validation's (disagg.inputs.vee)


def load_inputs(site_path: str | Path, date_from: dt.date | None = None,
                date_to: dt.date | None = None,
                log_offset_min: float | None = None, *,
                on_duplicate: str | None = None) -> tuple[SiteConfig, Aligned]:
    """Read the site file, the meter and the run log, and align them.

    log_offset_min: minutes added to every run-log time to put it on the meter's clock; None
        takes the site file's ``[runlog] log_offset_minutes`` (default 0).
    on_duplicate: different meter readings at one time are an error (``error``), or the
        first or last such row is kept (``keep-first``, ``keep-last``); None takes the site
        file's ``[meter] on_duplicate`` (default ``error``).

    The meter validation's findings (disagg.inputs.vee) lead aligned.notes, one line each;
    aligned.counts["spikes"] counts the intervals left out as spikes (they are also in
    ``no_reading``: their energy was set to null).

    Raises:
        ConfigError, InputError: bad settings or files.
    """
    site, aligned, _ = load_validated(site_path, date_from, date_to, log_offset_min,
                                      on_duplicate=on_duplicate)
    return site, aligned


def load_validated(site_path: str | Path, date_from: dt.date | None = None,
                   date_to: dt.date | None = None, log_offset_min: float | None = None, *,
                   on_duplicate: str | None = None,
                   progress: Progress | None = None) -> tuple[SiteConfig, Aligned, list[Finding]]:
    """load_inputs, and the meter validation's findings as well. progress: called as
    progress("reading", done, 4) after the meter, the run log, the weather and the alignment."""
    site, _, _, aligned, findings = _read_all(site_path, date_from, date_to, log_offset_min,
                                              on_duplicate, progress)
    return site, aligned, findings


def _read_all(site_path: str | Path, date_from: dt.date | None, date_to: dt.date | None,
              log_offset_min: float | None, on_duplicate: str | None,
              progress: Progress | None = None):
    """load_validated's work, also returning the meter and run log as read:
    (site, meter, runlog, aligned, findings)."""
    site = load_site(site_path)
    log_offset_min = site.runlog.log_offset_min if log_offset_min is None else log_offset_min
    on_duplicate = site.meter.on_duplicate if on_duplicate is None else on_duplicate
    check_range(date_from, date_to)
    check_log_offset(log_offset_min)
    report(progress, "reading", 0, 4)
    meter = read_meter(site.meter, site.timezone, on_duplicate=on_duplicate)
    report(progress, "reading", 1, 4)
    runlog = read_runlog(site.runlog, site, offset_min=log_offset_min)
    report(progress, "reading", 2, 4)
    weather = read_weather(site.weather, site.timezone) if site.weather else None
    report(progress, "reading", 3, 4)
    aligned = align(site, meter, runlog, date_from, date_to, weather)
    report(progress, "reading", 4, 4)
    if aligned.counts["intervals"] == 0:
        raise InputError(f"{site.meter.file}: no meter intervals between "
                         f"{date_from or 'the start'} and {date_to or 'the end'}")
    findings: list[Finding] = meter.findings
    replaced = {f.replaces for f in findings}
    align_notes = aligned.notes
    if any(f.kind == "gap" for f in findings):  # the gap finding already says so, with times
        align_notes = [n for n in align_notes
                       if "meter intervals are absent from the file" not in n]
    aligned.notes = tidy([f.message for f in findings]
                         + [n for n in meter.notes if n not in replaced] + runlog.notes
                         + coverage_findings(runlog, aligned.frame) + align_notes,
                         site.input_files(), site.path.parent, site.timezone)
    spike_starts = [t for f in findings if f.kind == "spike" for t in f.starts_utc]
    aligned.counts["spikes"] = int(aligned.frame["start_utc"].is_in(spike_starts).sum())
    return site, meter, runlog, aligned, findings


def breakdown_site(site_path: str | Path, date_from: dt.date | None = None,
                   date_to: dt.date | None = None, confidence: float = 0.95,
                   log_offset_min: float | None = None, *,
                   on_duplicate: str | None = None, estimate: bool = False,
                   progress: Progress | None = None) -> BreakdownResult:
    """Monthly per-equipment kWh with intervals, for one site.

    on_duplicate: see load_inputs. progress: called as progress(step, done, total) while
    reading and fitting (disagg.progress). The meter validation's findings are in the result, in
    fit.meter_validation and, one line each, in fit.warnings.

    Raises:
        ConfigError, InputError: bad settings, files, or too little usable data.
    """
    check_confidence(confidence)
    site, meter, runlog, aligned, findings = _read_all(site_path, date_from, date_to,
                                                       log_offset_min, on_duplicate, progress)
    require_usable(site, aligned)
    applied = site.runlog.log_offset_min if log_offset_min is None else log_offset_min
    clock_warning = offset_warning(site, meter, runlog, applied, aligned, date_from, date_to)
    if clock_warning:
        aligned.notes.append(clock_warning)
    report(progress, "fitting", 0, 1)
    try:
        est = estimate_draws(site, aligned, confidence)
    except ValueError as exc:
        raise InputError(f"{_short_data_source(site, aligned)}: {exc}") from None
    table, months = monthly_fits(site, aligned, est, confidence, progress)
    estimated_months: list[str] = []
    if estimate:
        table, estimated_months = _add_estimated_gaps(table, aligned, site.timezone)
    fit = fit_summary(site, aligned, est)
    fit.estimated_months = estimated_months
    fit.months = months
    fit.meter_validation = list(findings)
    fit.tariff = tariff_summary(site, table, aligned)
    if fit.tariff is not None:
        fit.warnings += fit.tariff.warnings
    return BreakdownResult(site, table, fit, est, aligned, findings)


def require_usable(site: SiteConfig, aligned: Aligned) -> None:
    """Raise InputError when too few intervals have both a reading and every state known."""
    used = int(aligned.use.sum())
    n_unknowns = len(aligned.equipment_ids) + BASELOAD_COLUMN_COUNT[site.baseload.profile]
    if used == 0:
        raise InputError(f"{_short_data_source(site, aligned)}: no interval has both a meter "
                         "reading and a known state for every equipment"
                         + _never_known(site, aligned))
    if used < n_unknowns + 2:
        raise InputError(f"{_short_data_source(site, aligned)}: only {used} usable meter "
                         f"intervals for {n_unknowns} unknowns; a fit needs at least "
                         f"{n_unknowns + 2}")


def _add_estimated_gaps(table: pl.DataFrame, aligned: Aligned,
                        tz: str) -> tuple[pl.DataFrame, list[str]]:
    """Add, for each month with short meter gaps, an `estimated-gaps` row holding their energy
    filled by linear interpolation (disagg.inputs.vee.estimate_short_gaps), flagged `estimated`.

    The fit never sees estimated energy; only the month's total grows by it.
    """
    from disagg.inputs.vee import ESTIMATE_MAX_GAP, estimate_short_gaps, monthly_totals

    frame = aligned.frame.select("start_utc", "end_utc", "energy_kwh")
    filled = estimate_short_gaps(frame, aligned.interval_min)
    totals = monthly_totals(filled, tz).filter(pl.col("estimated"))
    rows = []
    for r in totals.iter_rows(named=True):
        hours = r["estimated_intervals"] * aligned.interval_min / 60.0
        rows.append({"period": r["period"], "equipment": "estimated-gaps", "run_hours": hours,
                     "kw": r["estimated_kwh"] / hours, "kw_low": None, "kw_high": None,
                     "kwh": r["estimated_kwh"], "kwh_low": None, "kwh_high": None,
                     "share": None,
                     "flags": f"estimated;gaps of at most {ESTIMATE_MAX_GAP} intervals, "
                              "linear interpolation"})
    if not rows:
        return table, []
    extra = pl.DataFrame(rows, schema=table.schema)
    return (pl.concat([table, extra]).sort("period", maintain_order=True),
            totals["period"].to_list())


def _peaks(aligned: Aligned, tz: str) -> pl.DataFrame:
    """Per local month: the highest demand [kW] among the intervals used and among all
    intervals with a reading, and when each began (UTC)."""
    f = (aligned.frame.with_columns(
        (pl.col("energy_kwh") / pl.col("interval_h")).alias("kw"),
        pl.col("start_utc").dt.convert_time_zone(tz).dt.strftime("%Y-%m").alias("period"),
        pl.Series("used", aligned.use))
        .filter(pl.col("kw").is_not_null()))
    return f.group_by("period", maintain_order=True).agg(
        pl.col("kw").filter("used").max().alias("used_kw"),
        pl.col("start_utc").filter("used").sort_by(pl.col("kw").filter("used"),
                                                   descending=True, maintain_order=True)
        .first().alias("used_at"),
        pl.col("kw").max().alias("all_kw"),
        pl.col("start_utc").sort_by("kw", descending=True, maintain_order=True).first()
        .alias("all_at"))


def tariff_summary(site: SiteConfig, table: pl.DataFrame,
                   aligned: Aligned) -> TariffSummary | None:
    """The tariff and each month's cost for fit.json (None without a [tariff])."""
    t = site.tariff
    if t is None:
        return None
    priced = table.filter(pl.col("cost").is_not_null())
    months = (priced.group_by("period", maintain_order=True)
              .agg(pl.col("kwh").sum().alias("metered_kwh"), pl.col("cost").sum(),
                   pl.col("peak_kw").sum()))
    peaks = {r["period"]: r for r in _peaks(aligned, site.timezone).iter_rows(named=True)}
    warnings = []
    for period, p in peaks.items():
        if p["used_kw"] is not None and p["all_kw"] > p["used_kw"] * (1 + 1e-9):
            warnings.append(
                f"{period}: the month's highest reading, {p['all_kw']:,.1f} kW from "
                f"{p['all_at'].isoformat()}, is in an interval left out of the fit; its demand "
                f"cost uses the highest interval used, {p['used_kw']:,.1f} kW from "
                f"{p['used_at'].isoformat()}, so a bill's demand charge can be higher")
    return TariffSummary(
        currency=t.currency,
        energy_price_per_kwh=t.energy_price_per_kwh,
        demand_price_per_kw=t.demand_price_per_kw,
        periods=[{"name": p.name, "price_per_kwh": p.price_per_kwh,
                  "spells": list(p.spell_text)} for p in t.periods],
        holidays=[d.isoformat() for d in t.holidays],
        months=[TariffMonth(period=r["period"], metered_kwh=r["metered_kwh"],
                            peak_kw=r["peak_kw"],
                            peak_start_utc=(peaks[r["period"]]["used_at"].isoformat()
                                            if r["period"] in peaks else None),
                            demand_cost=r["peak_kw"] * t.demand_price_per_kw,
                            energy_cost=r["cost"] - r["peak_kw"] * t.demand_price_per_kw,
                            cost=r["cost"]) for r in months.iter_rows(named=True)],
        method=("cost of the intervals used by the fit: each row's estimated energy in "
                "every interval at that interval's price, plus the demand price x the row's "
                "estimated draw in the interval of the month's highest metered demand "
                "(the meter interval taken as the demand interval); intervals left out of "
                "the fit and estimated-gaps rows are not priced, so a utility bill can be "
                "higher"),
        warnings=warnings,
    )


def _never_known(site: SiteConfig, aligned: Aligned) -> str:
    """'; no known state at all for X (expected ...)' naming the equipment whose state is
    unknown in every interval, such as a load missing from a wide (samples) run log."""
    known = ~np.isnan(aligned.hours)
    never = [eq for j, eq in enumerate(aligned.equipment_ids) if not known[:, j].any()]
    if not never:
        return ""
    ids = ", ".join(never)
    if site.runlog.layout == "samples":
        expected = f"a run-log column named {ids}" if len(never) == 1 else \
            f"run-log columns named {ids}"
    else:
        expected = f"run-log rows with {ids} in column {site.runlog.equipment_column!r}"
    return f"; no known state at all for {ids} (expected {expected})"


def _short_data_source(site: SiteConfig, aligned: Aligned) -> str:
    """Which file to blame when too few intervals are usable, with the counts."""
    c = aligned.counts
    culprit = site.runlog.file if c["log_unknown"] >= c["no_reading"] else site.meter.file
    return (f"{culprit} ({c['intervals']} meter intervals: {c['no_reading']} without a reading, "
            f"{c['log_unknown']} with a run-log state unknown)")


# A month with fewer local days of usable intervals than this takes the whole range's draws
# (flag `range-draw`) rather than a fit of its own (common practice, no source: a week covers
# every day type once).
MIN_MONTH_DAYS = 7


def monthly_fits(site: SiteConfig, aligned: Aligned, whole: Estimates,
                 confidence: float,
                 progress: Progress | None = None) -> tuple[pl.DataFrame, dict[str, MonthFit]]:
    """Breakdown rows with each month's own fit, so a month's kWh follows that month's draws.

    A range of one month is the whole-range fit. A month with fewer than MIN_MONTH_DAYS days
    of usable intervals, or too few to fit, takes the whole range's draws, flagged
    `range-draw`. A month whose own fit folds a different set of loads into the baseload row
    than the whole range's keeps its own draws, but each load's interval also holds the
    month priced with the whole range's draws (_with_range_draws), with a warning.

    Returns:
        (the breakdown table, per-month draws for fit.json).
    """
    tz = site.timezone
    # The whole range's rows are needed only for a month without a fit of its own.
    whole_table: pl.DataFrame | None = None
    arrays = frame_arrays(aligned, tz)
    month_code, day = arrays["month"], arrays["local_date"]
    codes = np.unique(month_code[aligned.use])
    periods = [f"{c // 100:04d}-{c % 100:02d}" for c in codes]
    if len(periods) <= 1:
        report(progress, "fitting", 1, 1)
        return monthly_breakdown(whole, tz, site.tariff), {}
    combined = {t.id: t.members for t in whole.terms if len(t.members) > 1}
    moved = response_moved(whole.variants)  # a month checks only these for a response
    tables, months = [], {}
    for done, (code, period) in enumerate(zip(codes, periods, strict=True)):
        report(progress, "fitting", done + 1, len(periods) + 1)
        mask = aligned.use & (month_code == code)
        est = None
        if len(np.unique(day[mask])) >= MIN_MONTH_DAYS:
            try:
                est = estimate_draws(site, dataclasses.replace(aligned, use=mask), confidence,
                                     form=whole.form, response_loads=moved)
            except ValueError:
                est = None
        if est is None:
            if whole_table is None:
                whole_table = monthly_breakdown(whole, tz, site.tariff)
            rows = whole_table.filter(pl.col("period") == period)
            own = ~pl.col("equipment").is_in([whole.base_id, "unexplained"])
            tables.append(rows.with_columns(
                pl.when(own).then(pl.concat_str([pl.col("flags"), pl.lit("range-draw")],
                                                separator=";").str.strip_chars(";"))
                .otherwise(pl.col("flags")).alias("flags")))
            months[period] = MonthFit(own_fit=False, reason=f"fewer than {MIN_MONTH_DAYS} days "
                                      "of usable intervals: the whole range's draws are used")
            continue
        table = _same_names(monthly_breakdown(est, tz, site.tariff), combined)
        warnings = est.warnings
        if est.base_id != whole.base_id:
            if whole_table is None:
                whole_table = monthly_breakdown(whole, tz, site.tariff)
            table, widened = _with_range_draws(
                table, whole_table.filter(pl.col("period") == period),
                [est.base_id, whole.base_id, "unexplained"])
            warnings = warnings + [
                f"this month's own data give the baseload row {est.base_id!r} where the whole "
                f"range gives {whole.base_id!r} (a load runs on the baseload schedule in this "
                "month only, or the other way round): the other loads' draws may take up "
                "what the schedule's shape misses, so each load's interval also holds the "
                "whole range's draw" + (f" (widened: {', '.join(widened)})" if widened else "")]
        tables.append(table)
        months[period] = MonthFit(
            own_fit=True, draws=draw_list(est), baseload_row=est.base_id,
            baseload_form=est.form.as_json() if est.form is not None else None,
            fit_quality=est.quality, warnings=warnings)
    report(progress, "fitting", len(periods) + 1, len(periods) + 1)
    return pl.concat(tables), months


def _num(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


def draw_list(est: Estimates) -> list[Draw]:
    """The fitted draws, one per term."""
    draws = []
    for i, t in enumerate(est.terms):
        c = t.column
        w = est.weather.get(i)
        draws.append(Draw(
            equipment=t.id, members=t.members, name=t.name,
            kw=_num(est.kw[i]), se_kw=_num(est.se_kw[i]),
            se_hac_kw=_num(est.se_hac_kw[i]), se_jackknife_kw=_num(est.se_jackknife_kw[i]),
            kw_low=_num(est.kw_low[i]), kw_high=_num(est.kw_high[i]),
            prior_kw=_num(t.prior_kw), prior_sd_kw=_num(t.prior_sd_kw),
            prior_source=t.prior_source,
            prior_weight=None if c is None else _num(est.fit.prior_weight[c]),
            between_week_sd_kw=(None if est.tau2_kw2 is None or c is None
                                else _num(math.sqrt(max(float(est.tau2_kw2[i]), 0.0)))),
            run_hours=float(est.hours[:, i].sum()),
            flags=t.flags,
            weather=None if w is None else WeatherDraw(
                mode=w.mode, balance_temp_c=w.balance_temp_c,
                reference_temp_c=w.reference_temp_c, kw_at_balance=w.kw_at_balance,
                slope_kw_per_degc=w.slope_kw_per_degc,
                slope_se_kw_per_degc=w.slope_se_kw_per_degc)))
    return draws


def _with_range_draws(own: pl.DataFrame, whole_rows: pl.DataFrame,
                      skip: list[str]) -> tuple[pl.DataFrame, list[str]]:
    """A month's own rows with each load's kW and kWh intervals stretched to hold the same
    month priced with the whole range's draws (its `whole_rows`), flagged `unstable` where
    that widened them; rows in `skip` (baseload, unexplained) and loads without a whole-range
    row keep theirs. Returns the table and the loads widened.

    For a month whose own fit folds a different set of loads into the baseload row than the
    whole range's (tests/synthetic.make_office, step scenario: the combined air handler
    12-16 % high with its interval missing in 6 of the 7 months where the fan VF-1 went into
    the baseload row; 53 of 58 covered otherwise).
    """
    ref = whole_rows.filter(~pl.col("equipment").is_in(skip)).select(
        "equipment", *[pl.col(c).alias(f"{c}_range")
                       for c in ("kw_low", "kw_high", "kwh_low", "kwh_high")])
    t = own.join(ref, on="equipment", how="left", maintain_order="left")
    has = pl.col("kwh_low_range").is_not_null() & (pl.col("run_hours") > 0)
    wider = has & ((pl.col("kwh_low_range") < pl.col("kwh_low"))
                   | (pl.col("kwh_high_range") > pl.col("kwh_high")))
    widened = t.filter(wider)["equipment"].to_list()
    t = t.with_columns(
        *[pl.when(has).then(pl.min_horizontal(c, f"{c}_range")).otherwise(pl.col(c)).alias(c)
          for c in ("kw_low", "kwh_low")],
        *[pl.when(has).then(pl.max_horizontal(c, f"{c}_range")).otherwise(pl.col(c)).alias(c)
          for c in ("kw_high", "kwh_high")],
        pl.when(wider & ~pl.col("flags").str.contains(r"(^|;)unstable(;|$)"))
        .then(pl.concat_str([pl.col("flags"), pl.lit("unstable")], separator=";")
              .str.strip_chars(";"))
        .otherwise(pl.col("flags")).alias("flags"))
    return t.select(own.columns), widened


def _same_names(table: pl.DataFrame, combined: dict[str, list[str]]) -> pl.DataFrame:
    """Report a month's not-run members of a whole-range group as that group's one row, so
    a load keeps one name across the months."""
    for gid, members in combined.items():
        rows = table.filter(pl.col("equipment").is_in(members))
        if rows.height == len(members) and (rows["flags"] == "not-run").all():
            first = rows.head(1).with_columns(pl.lit(gid).alias("equipment"),
                                              pl.lit(None, pl.Float64).alias("kw"))
            keep = table.filter(~pl.col("equipment").is_in(members))
            at = table["equipment"].to_list().index(members[0])
            table = pl.concat([keep.head(at), first, keep.slice(at)])
    return table


def fit_summary(site: SiteConfig, aligned: Aligned, est: Estimates) -> FitSummary:
    """Everything behind the breakdown, typed (months, meter validation and tariff are
    filled in by breakdown_site)."""
    start = est.frame["start_utc"].min()
    end = est.frame["end_utc"].max()
    draws = draw_list(est)
    base_se = np.sqrt(np.maximum(np.diag(est.cov_base), 0))
    # The baseload row's energy over the range and its standard error: the profile's columns'
    # error, and with the wandering level the level's own error too (estimate.assemble).
    c = est.base.sum(axis=0)
    base_kwh = float(c @ est.base_kw)
    if est.level_kwh is not None:
        base_kwh += float(est.level_kwh.sum())
    base_var = (est.base_range_var_kwh2 if est.base_range_var_kwh2 is not None
                else float(c @ est.cov_base @ c))
    quality = dict(est.quality)
    quality["ashrae_guideline_14"] = {
        "hourly_criteria": G14_HOURLY, "monthly_criteria": G14_MONTHLY,
        "hourly_meets": ("hourly" in quality
                         and quality["hourly"]["cv_rmse_pct"] <= G14_HOURLY["cv_rmse_pct"]
                         and abs(quality["hourly"]["nmbe_pct"]) <= G14_HOURLY["nmbe_pct"]),
        "formula": "CV(RMSE) and NMBE with n - p in the denominator, p = fitted parameters",
    }
    return FitSummary(
        tool=f"disagg {__version__}",
        site=site.name,
        timezone=site.timezone,
        site_file=str(site.path),
        start_utc=start.isoformat() if start else None,
        end_utc=end.isoformat() if end else None,
        confidence=est.confidence,
        critical_value=est.critical,
        draws=draws,
        baseload=BaseloadSummary(
            row=est.base_id, profile=site.baseload.profile,
            spells=list(site.baseload.spell_text),
            columns=[BaseloadColumn(n, float(b), float(s))
                     for n, b, s in zip(est.base_names, est.base_kw, base_se)],
            form=est.form.as_json() if est.form is not None else None,
            level_kwh=float(est.level_kwh.sum()) if est.level_kwh is not None else 0.0,
            energy_kwh=base_kwh, se_kwh=float(np.sqrt(max(base_var, 0.0)))),
        identifiability=est.identifiability,
        stability={
            "method": ("interval = widest of: Newey-West HAC on local-day sums of scores "
                       "(Bartlett lag by the Newey-West 1994 rule over days, Student t with "
                       "days - 1 df); delete-a-block jackknife over 10 contiguous time blocks "
                       "(Student t, 9 df); and refits with more flexible baseload profiles "
                       "(forms without the level); then the weighted spread of the credible "
                       "baseload forms' draws added in quadrature, and for loads switching "
                       "near the schedule's edges the hull with the edges form; monthly kWh "
                       "intervals also carry the between-week variance of each draw "
                       "(DerSimonian-Laird tau^2)"),
            "hac_lag_days": est.fit.lag, "days": est.fit.n_blocks,
            "baseload_variants": est.variants,
        },
        fit_quality=quality,
        intervals=aligned.counts,
        unknown_intervals_by_equipment=aligned.unknown_by_equipment,
        # With the wandering level the fit's sigma^2 is of the whitened differences [kW^2]:
        # state the interval residuals' sd [kWh] instead (n - fitted coefficients).
        residual_sd_kwh=(math.sqrt(est.fit.sigma2) if est.form is None or not est.form.form.level
                         else math.sqrt(float(np.sum((est.y - est.fitted) ** 2))
                                        / max(len(est.y) - len(est.design_coef), 1))),
        warnings=aligned.notes + est.warnings,
        caution=CAUTION,
    )


@dataclass
class CheckResult:
    """What ``disagg check`` found, without fitting."""

    site: SiteConfig
    aligned: Aligned
    report: CheckReport


def check_site(site_path: str | Path, date_from: dt.date | None = None,
               date_to: dt.date | None = None, log_offset_min: float | None = None,
               offset_window_min: float | None = None, *,
               on_duplicate: str | None = None) -> CheckResult:
    """Read and align everything and say what was found, without fitting.

    The report's "findings" are the meter validation's (disagg.inputs.vee, as dicts with kind,
    count, times, policy and message); its "notes" are the other notes.

    Raises:
        ConfigError, InputError: the inputs cannot be used (including no usable interval).
    """
    site, aligned, findings = load_validated(site_path, date_from, date_to, log_offset_min,
                                             on_duplicate=on_duplicate)
    frame = aligned.frame
    require_usable(site, aligned)
    B, _ = BaseloadBuilder.declared(site, aligned)
    H = aligned.hours[aligned.use]
    run = H.sum(axis=0)
    ids = aligned.equipment_ids
    sep = inseparable(H, B)
    pairs = [(ids[i], ids[j], float(r)) for i, j, r in sep["pairs"]]
    with_base = [ids[j] for j in sep["with_baseload"]]
    report = CheckReport(
        site=site.name,
        start_utc=frame["start_utc"].min().isoformat(),
        end_utc=frame["end_utc"].max().isoformat(),
        interval_min=aligned.interval_min,
        intervals=aligned.counts,
        run_hours={e: float(h) for e, h in zip(aligned.equipment_ids, run)},
        not_run=[e for e, h in zip(aligned.equipment_ids, run) if h == 0],
        inseparable_pairs=pairs,
        inseparable_from_baseload=with_base,
        findings=list(findings),
        notes=[n for n in aligned.notes if n not in {f.message for f in findings}],
    )
    if offset_window_min is not None:
        report.clock_offset = find_log_offset(
            site, offset_window_min,
            site.runlog.log_offset_min if log_offset_min is None else log_offset_min,
            on_duplicate=site.meter.on_duplicate if on_duplicate is None else on_duplicate)
    return CheckResult(site, aligned, report)


# Clock offsets beyond a week are no clock error but a wrong file (common practice, no source);
# the offset search's window is capped at 12 h, its cost growing with the window.
MAX_LOG_OFFSET_MIN = 7 * 24 * 60
MAX_OFFSET_WINDOW_MIN = 12 * 60


def check_range(date_from: dt.date | None, date_to: dt.date | None) -> None:
    """Raise ConfigError when the last date to use comes before the first."""
    if date_from and date_to and date_to < date_from:
        raise ConfigError(f"--to {date_to} is before --from {date_from}")


def check_confidence(confidence: float) -> None:
    """Raise ConfigError for a confidence level outside 0.5 <= level < 1."""
    if not 0.5 <= confidence < 1.0:
        raise ConfigError(f"--confidence {confidence}: expected a fraction from 0.5 to 0.999")


def check_log_offset(offset_min: float) -> None:
    """Raise ConfigError for a --log-offset that is not a finite number within a week."""
    if not (math.isfinite(offset_min) and abs(offset_min) <= MAX_LOG_OFFSET_MIN):
        raise ConfigError(f"--log-offset {offset_min:g}: expected a number of minutes from "
                          f"-{MAX_LOG_OFFSET_MIN} to {MAX_LOG_OFFSET_MIN}")


# Longest tracker memory [d]: ten years, longer than any meter history a drift run compares
# against (common practice, no source).
MAX_MEMORY_DAYS = 3660.0


def check_memory_days(days: float, option: str = "--memory") -> None:
    """Raise ConfigError for a tracker memory that is not a finite number of days above 0 and
    at most MAX_MEMORY_DAYS (option: the command-line option named in the message)."""
    if not (math.isfinite(days) and 0 < days <= MAX_MEMORY_DAYS):
        raise ConfigError(f"{option} {days:g}: expected a number of days above 0 and at most "
                          f"{MAX_MEMORY_DAYS:g}")


def find_log_offset(site: SiteConfig, window_min: float, log_offset_min: float = 0.0, *,
                    on_duplicate: str = "error") -> ClockOffset:
    """Search the run-log clock offset (minutes to add to the log's times, on top of
    log_offset_min) over +-window_min; see disagg.analyses.clock.

    Raises:
        ConfigError: a window that is not a positive number of minutes.
    """
    from disagg.analyses.clock import estimate_log_offset

    if not (math.isfinite(window_min) and 0 < window_min <= MAX_OFFSET_WINDOW_MIN):
        raise ConfigError(f"--offset-window {window_min:g}: expected minutes above 0 and at "
                          f"most {MAX_OFFSET_WINDOW_MIN}")

    meter = read_meter(site.meter, site.timezone, on_duplicate=on_duplicate)
    runlog = read_runlog(site.runlog, site, offset_min=log_offset_min)
    try:
        r = estimate_log_offset(site, meter, runlog, window_min=window_min)
    except ValueError as exc:
        raise ConfigError(f"--offset-window {window_min:g}: {exc}") from None
    return ClockOffset(best_offset_min=r.best_offset_min, clear=r.clear, verdict=r.verdict,
                       window_min=window_min, already_applied_min=log_offset_min)
