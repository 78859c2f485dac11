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

from disagg.analyses.compare import CompareResult
from disagg.analyses.drift import DriftResult
from disagg.analyses.pipeline import CAUTION, BreakdownResult
from disagg.errors import OutputError

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


def write_compare(result: CompareResult, out_dir: Path) -> list[Path]:
    """Write compare.csv and compare.json into out_dir, all or nothing.

    Raises:
        OutputError: the folder cannot be written, or a name would replace an input.
    """
    t = result.table.with_columns(
        pl.col("kw_before", "kw_before_low", "kw_before_high", "kw_after", "kw_after_low",
               "kw_after_high", "change").round(6),
        pl.col("p_value").round_sig_figs(4))
    site = result.site
    files = {
        "compare.csv": lambda p: neutralise_csv_text(t).write_csv(p),
        "compare.json": lambda p: p.write_text(to_json(result.report), encoding="utf-8"),
    }
    return write_atomically(out_dir, files, site.input_files())
