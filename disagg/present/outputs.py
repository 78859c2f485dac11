"""The one place that writes files, and the text summaries printed to the terminal.

Every run writes all its files into a hidden temporary folder inside the output folder and
then renames them into place, so a failed or interrupted run leaves no half-written file.
An output never replaces an input file.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path

import polars as pl

from disagg.errors import OutputError
from disagg.analyses.drift import DriftResult
from disagg.analyses.pipeline import CAUTION, BreakdownResult, CheckResult

# Cells starting with these can run as formulas when a spreadsheet opens a CSV; OWASP
# ("CSV Injection" page, from memory) recommends a leading single quote.
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def neutralise_csv_text(frame: pl.DataFrame) -> pl.DataFrame:
    """Prefix a single quote to text cells that a spreadsheet would read as a formula."""
    text_cols = [c for c, t in frame.schema.items() if t == pl.String]
    return frame.with_columns(
        pl.when(pl.any_horizontal(pl.col(c).str.starts_with(s) for s in _FORMULA_START))
        .then(pl.lit("'") + pl.col(c)).otherwise(pl.col(c)).alias(c)
        for c in text_cols) if text_cols else frame


def write_atomically(out_dir: Path, files: dict[str, Callable[[Path], None]],
                     inputs: list[Path]) -> list[Path]:
    """Write several files into out_dir all at once: all of them, or none.

    Every file is first written into a hidden temporary folder inside out_dir. Then each
    file already in out_dir under one of the names is moved aside into that folder, and the
    new file moved into place; if any move fails, the new files are taken out again and the
    old ones put back, so out_dir holds either the whole previous run or the whole new one.

    Args:
        out_dir: destination folder (created if missing).
        files: file name -> function writing that file at the given path.
        inputs: the run's input files, which must never be overwritten.

    Returns:
        The paths written.

    Raises:
        OutputError: the folder cannot be created or written, a name is taken by a folder,
            or a name would replace an input.
    """
    out_dir = Path(out_dir).resolve()
    targets = [out_dir / name for name in files]
    resolved_inputs = {p.resolve() for p in inputs}
    for t in targets:
        if t.resolve() in resolved_inputs:
            raise OutputError(f"{t}: writing here would replace an input file; choose another --out")
        if t.is_dir():
            raise OutputError(f"{t}: is a folder, so the file {t.name} cannot be written there; "
                              "move the folder or choose another --out")
    try:
        out_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{out_dir}: cannot create the output folder ({exc.strerror})") from None
    try:
        tmp = Path(tempfile.mkdtemp(prefix=".disagg-tmp-", dir=out_dir))
    except OSError as exc:
        raise OutputError(f"{out_dir}: cannot write in the output folder ({exc.strerror})") from None
    old = tmp / ".previous"
    moved: list[str] = []  # names whose previous file is in `old`
    placed: list[str] = []  # names whose new file is in out_dir
    try:
        for name, write in files.items():
            write(tmp / name)
        old.mkdir()
        for name in files:
            if (out_dir / name).exists():
                os.replace(out_dir / name, old / name)
                moved.append(name)
            os.replace(tmp / name, out_dir / name)
            placed.append(name)
    except OSError as exc:
        for name in placed:
            with contextlib.suppress(OSError):
                (out_dir / name).unlink()
        for name in moved:
            with contextlib.suppress(OSError):
                os.replace(old / name, out_dir / name)
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        raise OutputError(f"{out_dir}: cannot write the outputs ({exc.strerror}){where}; "
                          "the previous files are left as they were") from None
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return targets


def _clean(value):
    """JSON-ready: non-finite floats become null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    return value


def to_json(data: dict) -> str:
    return json.dumps(_clean(data), indent=2, ensure_ascii=False) + "\n"


def write_breakdown(result: BreakdownResult, out_dir: Path, *, xlsx: bool = False,
                    report_html: str | None = None) -> list[Path]:
    """Write breakdown.csv, breakdown.parquet and fit.json into out_dir, all at once; with
    xlsx also breakdown.xlsx (see write_workbook), with report_html also report.html."""
    table = result.breakdown
    site = result.site
    files = {
        "breakdown.csv": lambda p: neutralise_csv_text(table).write_csv(p, float_precision=6),
        "breakdown.parquet": lambda p: table.write_parquet(p),
        "fit.json": lambda p: p.write_text(to_json(result.fit), encoding="utf-8"),
    }
    if xlsx:
        files["breakdown.xlsx"] = lambda p: write_workbook(workbook_tables(result), p)
    if report_html is not None:
        files["report.html"] = lambda p: p.write_text(report_html, encoding="utf-8")
    return write_atomically(out_dir, files, site.input_files())


# Unit of each breakdown column, shown in spreadsheet headers as "name [unit]".
COLUMN_UNITS = {"run_hours": "h", "kw": "kW", "kw_low": "kW", "kw_high": "kW", "kwh": "kWh",
                "kwh_low": "kWh", "kwh_high": "kWh", "share": "fraction 0-1", "peak_kw": "kW",
                "se_kw": "kW", "prior_kw": "kW", "prior_sd_kw": "kW",
                "prior_weight": "fraction 0-1", "metered_kwh": "kWh", "energy_cost": None,
                "demand_cost": None, "cost": None, "demand_price_per_kw": None,
                "cv_rmse_pct": "%", "nmbe_pct": "%"}


def _with_units(frame: pl.DataFrame, currency: str) -> pl.DataFrame:
    def unit(c: str) -> str | None:
        if c in ("cost", "energy_cost", "demand_cost"):
            return currency or None
        return COLUMN_UNITS.get(c)

    return frame.rename({c: f"{c} [{unit(c)}]" for c in frame.columns if unit(c)})


def workbook_tables(result: BreakdownResult) -> dict[str, pl.DataFrame]:
    """The spreadsheet's sheets: sheet name -> table, units in the column headers."""
    tariff = result.fit.get("tariff") or {}
    currency = tariff.get("currency", "")
    draws = pl.DataFrame([{k: d.get(k) for k in ("equipment", "kw", "kw_low", "kw_high",
                                                 "se_kw", "prior_kw", "prior_sd_kw",
                                                 "prior_source", "prior_weight")}
                          | {"run_hours": d["run_hours"], "flags": ";".join(d["flags"])}
                          for d in result.fit["draws"]],
                         schema={"equipment": pl.String, "kw": pl.Float64, "kw_low": pl.Float64,
                                 "kw_high": pl.Float64, "se_kw": pl.Float64,
                                 "prior_kw": pl.Float64, "prior_sd_kw": pl.Float64,
                                 "prior_source": pl.String, "prior_weight": pl.Float64,
                                 "run_hours": pl.Float64, "flags": pl.String})
    table = result.breakdown
    if not tariff:
        table = table.drop("cost")
    sheets = {"breakdown": table, "draws": draws}
    if tariff:
        sheets["costs"] = pl.DataFrame(
            tariff["months"], schema={"period": pl.String, "metered_kwh": pl.Float64,
                                      "peak_kw": pl.Float64, "demand_cost": pl.Float64,
                                      "energy_cost": pl.Float64, "cost": pl.Float64})
    notes = [("caution", CAUTION)] + [("note", w) for w in result.fit["warnings"]]
    sheets["notes"] = pl.DataFrame(notes, schema={"kind": pl.String, "text": pl.String},
                                   orient="row")
    return {name: _with_units(frame, currency) for name, frame in sheets.items()}


def write_workbook(sheets: dict[str, pl.DataFrame], path: Path) -> None:
    """One .xlsx workbook, one sheet per table; numbers stay numbers, and text is stored as
    text, never as a formula (xlsxwriter's strings_to_formulas off), so names from users
    cannot run in a spreadsheet."""
    import xlsxwriter

    with xlsxwriter.Workbook(str(path), {"strings_to_formulas": False,
                                         "strings_to_urls": False,
                                         "nan_inf_to_errors": True}) as book:
        for name, frame in sheets.items():
            frame.write_excel(workbook=book, worksheet=name, autofit=True,
                              float_precision=6)


def _fmt(x: float | None, digits: int = 1) -> str:
    return "-" if x is None or not math.isfinite(x) else f"{x:,.{digits}f}"


def breakdown_summary(result: BreakdownResult) -> str:
    """A short readable table of the whole range, the fit quality, warnings and the caution."""
    t = result.breakdown
    totals = (t.group_by("equipment", maintain_order=True)
              .agg(pl.col("run_hours").sum(), pl.col("kwh").sum(),
                   pl.col("kwh_low").sum(), pl.col("kwh_high").sum(),
                   pl.col("kwh_low").null_count().alias("no_range"), pl.col("flags"),
                   pl.col("cost").sum(), pl.col("cost").null_count().alias("no_cost")))
    metered = float(result.estimates.y.sum())
    tariff = result.fit.get("tariff")
    currency = tariff["currency"] if tariff else ""
    draws = {d["equipment"]: d for d in result.fit["draws"]}
    order = {e: i for i, e in enumerate(draws)}
    last = len(order) + 1
    totals = totals.with_columns(
        pl.col("equipment").replace_strict(order, default=len(order), return_dtype=pl.Int64)
        .alias("o")).with_columns(
        pl.when(pl.col("equipment").str.starts_with("baseload")).then(last)
        .when(pl.col("equipment") == "unexplained").then(last + 1)
        .otherwise(pl.col("o")).alias("o")).sort("o", maintain_order=True)
    periods = t["period"].unique().sort()
    own = any(m.get("own_fit") for m in result.fit.get("months", {}).values())
    lines = [f"{result.site.name}: {periods[0]} to {periods[-1]}, "
             f"{result.aligned.counts['used']:,} intervals used, metered {metered:,.0f} kWh",
             "",
             ("kWh: sum of each month's own fit; " if own else "")
             + "kW: the draw fitted over the whole range; run h [h], kWh [kWh], kW [kW]",
             f"{'equipment':<22} {'run h':>7} {'kWh':>10} {'kWh range':>19} {'share':>6} "
             f"{'kW':>7} {'kW range':>13}  "
             + (f"{'cost ' + currency[:5]:>11}  " if tariff else "") + "flags"]
    any_variable = False
    for r in totals.iter_rows(named=True):
        d = draws.get(r["equipment"])
        kw, kw_rng = "-", "-"
        if d and d["kw"] is not None:
            kw = _fmt(d["kw"])
            if d["kw_low"] is not None:
                kw_rng = f"{_fmt(d['kw_low'])}-{_fmt(d['kw_high'])}"
        kwh_rng = "-" if r["no_range"] else f"{_fmt(r['kwh_low'], 0)}-{_fmt(r['kwh_high'], 0)}"
        flags = ";".join(d["flags"]) if d else ";".join(dict.fromkeys(
            f for cell in r["flags"] for f in (cell or "").split(";") if f))
        any_variable |= "variable" in flags
        kwh = r["kwh"] + 0.0 if abs(r["kwh"]) >= 0.5 else 0.0  # no "-0"
        share = 100 * kwh / metered if metered else 0.0
        cost = ""
        if tariff:
            cost = f"{'-' if r['no_cost'] else _fmt(r['cost'] + 0.0, 2):>11}  "
        lines.append(f"{r['equipment'][:22]:<22} {_fmt(r['run_hours'], 0):>7} {_fmt(kwh, 0):>10} "
                     f"{kwh_rng:>19} {share:>5.1f}% {kw:>7} {kw_rng:>13}  {cost}{flags}")
    lines.append("flags: whole-range fit; each month's are in breakdown.csv. baseload and "
                 "unexplained run h: interval hours.")
    if any_variable:
        lines.append("run h of variable equipment: equivalent full-load hours "
                     "(integral of status ** exponent).")
    if tariff:
        months_cost = tariff["months"]
        total = sum(m["cost"] for m in months_cost)
        demand = sum(m["demand_cost"] for m in months_cost)
        lines += ["", f"Cost of the intervals used: {_fmt(total, 2)} {currency} (energy "
                      f"{_fmt(total - demand, 2)}, demand {_fmt(demand, 2)} over "
                      f"{len(months_cost)} month{'s' if len(months_cost) != 1 else ''}); "
                      "each row's peak_kw and cost are in breakdown.csv."]
    q = result.fit["fit_quality"]
    hq = q.get("hourly")
    if hq:
        meets = "meets" if q["ashrae_guideline_14"]["hourly_meets"] else "does not meet"
        lines += ["", f"Hourly fit: CV(RMSE) {hq['cv_rmse_pct']:.1f} %, NMBE {hq['nmbe_pct']:.2f} %,"
                      f" R2 {hq['r2']:.3f} ({meets} the ASHRAE Guideline 14 hourly criteria "
                      "30 % / 10 %)"]
    lines.append(f"Intervals at {100 * result.estimates.confidence:g} % confidence.")
    months = result.fit.get("months", {})
    if months:
        n_own = sum(1 for m in months.values() if m.get("own_fit"))
        lines.append(f"{n_own} of {len(months)} months fitted on their own data; their draws, "
                     "flags and notes are in fit.json (months).")
    for w in result.fit["warnings"]:
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
    tariff = result.fit.get("tariff")
    periods = t["period"].unique().sort().to_list()
    return to_json({
        "site": result.site.name, "first_period": periods[0], "last_period": periods[-1],
        "intervals_used": result.aligned.counts["used"],
        "metered_kwh": metered,
        "currency": tariff["currency"] if tariff else None,
        "cost": sum(m["cost"] for m in tariff["months"]) if tariff else None,
        "equipment": rows, "fit_quality": result.fit["fit_quality"],
        "warnings": result.fit["warnings"], "caution": CAUTION,
        "files": [str(p) for p in paths]})


def check_summary(result: CheckResult) -> str:
    r = result.report
    c = r["intervals"]
    lines = [f"{r['site']}: {r['period']['start_utc']} to {r['period']['end_utc']} (UTC), "
             f"{r['interval_min']}-minute meter intervals",
             f"intervals {c['intervals']:,}: used {c['used']:,}, absent {c['absent']:,}, "
             f"no reading {c['no_reading']:,}, run-log state unknown {c['log_unknown']:,}"]
    for e, h in r["run_hours"].items():
        lines.append(f"  {e:<20} {h:>10,.1f} run h")
    for a, b, rho in r["inseparable_pairs"]:
        lines.append(f"cannot be told apart: {a} and {b} (correlation of hours {rho:.3f})")
    for e in r["inseparable_from_baseload"]:
        lines.append(f"cannot be told apart from the baseload schedule: {e}")
    for e in r["not_run"]:
        lines.append(f"never ran in this period: {e}")
    findings = r.get("findings", [])
    if findings:
        lines.append(f"Meter validation: {len(findings)} finding{'s' * (len(findings) != 1)}")
        lines += [f"  {f['message']}" for f in findings]
    else:
        lines.append("Meter validation: no gaps, duplicates, spikes, zero runs, interval "
                     "changes, daylight-saving hours or register rollovers found")
    lines += [f"Note: {n}" for n in r["notes"]]
    if "clock_offset" in r:
        lines.append(f"Run-log clock: {r['clock_offset']['verdict']}")
    return "\n".join(lines)


def write_demo_site(folder: Path, toml_folder: Path | None = None, seed: int | None = None) -> Path:
    """Simulate the demo building and write meter.csv, runlog.csv, weather.csv, truth.csv,
    truth_monthly.csv (in folder) and demo.toml (in toml_folder, default folder).

    Returns:
        The site TOML path.
    """
    from disagg import demo

    folder = Path(folder).resolve()
    toml_folder = Path(toml_folder).resolve() if toml_folder else folder
    data = demo.simulate(demo.SEED if seed is None else seed)
    rel = Path(os.path.relpath(folder, toml_folder))
    text = demo.site_toml((rel / "meter.csv").as_posix(), (rel / "runlog.csv").as_posix(),
                          (rel / "weather.csv").as_posix(), data["closed"])
    write_atomically(folder, {
        "meter.csv": lambda p: data["meter"].write_csv(p),
        "runlog.csv": lambda p: data["events"].write_csv(p),
        "weather.csv": lambda p: data["weather"].write_csv(p),
        "truth.csv": lambda p: data["truth"].write_csv(p, float_precision=4),
        "truth_monthly.csv": lambda p: data["truth_monthly"].write_csv(p, float_precision=4),
    }, [])
    write_atomically(toml_folder, {"demo.toml": lambda p: p.write_text(text, encoding="utf-8")}, [])
    return toml_folder / "demo.toml"


def write_drift(result: DriftResult, out_dir: Path, inputs: list[Path],
                state_path: Path | None = None) -> list[Path]:
    """Write drift.csv and drift.json into out_dir, and the tracker state to state_path."""
    table = result.table
    paths = write_atomically(out_dir, {
        "drift.csv": lambda p: neutralise_csv_text(table).write_csv(p, float_precision=6),
        "drift.json": lambda p: p.write_text(to_json(result.summary), encoding="utf-8"),
    }, inputs)
    if state_path is not None:
        state_path = Path(state_path).resolve()
        paths += write_atomically(state_path.parent, {
            state_path.name: lambda p: p.write_text(to_json(result.state), encoding="utf-8")},
            inputs)
    return paths


def drift_summary(result: DriftResult) -> str:
    """Step size, per-equipment latest tracked draw and change, alarms, notes, caution."""
    s = result.summary
    t = result.table
    lines = [f"{s['site']}: step size mu = {s['step_size_mu']:.4g} "
             f"(stable range 0 < mu < 2), threshold {100 * s['threshold']:g} %; each load "
             "tracked from its own reference period",
             "",
             f"{'equipment':<22} {'reference period':>23} {'reference kW':>12} {'latest kW':>10} "
             f"{'change':>8} {'memory d':>9}  alarm"]
    windows = s.get("reference_per_equipment", {})
    alarmed = {a["equipment"]: a for a in s["alarms"]}
    for eq in t["equipment"].unique(maintain_order=True):
        rows = t.filter(pl.col("equipment") == eq)
        last = rows.row(-1, named=True)
        mem = s["memory_days_per_equipment"].get(eq)
        change = last["change"]
        w = windows.get(eq)
        period = f"{w[0]} to {w[1]}" if w else "-"
        lines.append(f"{eq[:22]:<22} {period:>23} {last['kw_reference']:>12.2f} "
                     f"{last['kw_tracked']:>10.2f} "
                     f"{'-' if change is None else f'{100 * change:+.1f} %':>8} "
                     f"{'-' if mem is None else f'{mem:.0f}':>9}  "
                     + (f"since {alarmed[eq]['first_alarm_date']}" if eq in alarmed else ""))
    for a in s["alarms"]:
        lines.append(f"Alarm: {a['equipment']} from {a['first_alarm_date']}: draw "
                     f"{100 * a['change']:+.1f} % ({100 * a['change_low']:+.1f} to "
                     f"{100 * a['change_high']:+.1f} %) as of {a['as_of']}"
                     + (f" (mean of its last {a['recent_days']} days, the tracker's lag taken "
                        "out)" if "recent_days" in a else ""))
    lines += [f"Note: {n}" for n in s["notes"]]
    lines += ["", f"Caution: {CAUTION}"]
    return "\n".join(lines)


def write_portfolio(result, out_dir: Path) -> list[Path]:
    """Write portfolio.csv (one row per site; see disagg.jobs.batch.portfolio_frame) into
    out_dir, atomically, with text cells neutralised for spreadsheets.

    Args:
        result: a disagg.jobs.batch.PortfolioResult.
    """
    frame = result.frame
    inputs = [result.portfolio.source, *result.portfolio.sites]
    return write_atomically(out_dir, {
        "portfolio.csv": lambda p: neutralise_csv_text(frame).write_csv(p, float_precision=6),
    }, [p for p in inputs if p.is_file()])


def write_report(html: str, out_dir: Path, inputs: list[Path]) -> list[Path]:
    """Write report.html (disagg.present.report) into out_dir atomically; never over an input."""
    return write_atomically(out_dir, {
        "report.html": lambda p: p.write_text(html, encoding="utf-8")}, inputs)
