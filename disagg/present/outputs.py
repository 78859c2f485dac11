"""The one place that writes files, and the text summaries printed to the terminal.

Every run writes all its files into a hidden staging folder inside the output folder and then
puts them in place as one set behind one commit point (disagg.present.commit), so a failed or
interrupted run leaves the whole previous set or the whole new one, never a mix.
An output never replaces an input file.
"""

from __future__ import annotations

import json
import math
import os
import shutil
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

import polars as pl
import polars.selectors as cs

from disagg.analyses.pipeline import CAUTION, BreakdownResult
from disagg.errors import OutputError
from disagg.present import commit

if TYPE_CHECKING:  # types only: a breakdown does not import drift or compare
    from disagg.analyses.compare import CompareResult
    from disagg.analyses.drift import DriftResult

# Cells starting with these can run as formulas when a spreadsheet opens a CSV; OWASP
# ("CSV Injection" page, from memory) recommends a leading single quote.
_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def neutralise_csv_text(frame: pl.DataFrame) -> pl.DataFrame:
    """Prefix a single quote to text cells, and to column headers, that a spreadsheet would
    read as a formula (headers are built from equipment ids in portfolio.csv: ``<id>_kwh``)."""
    text_cols = [c for c, t in frame.schema.items() if t == pl.String]
    if text_cols:
        frame = frame.with_columns(
            pl.when(pl.any_horizontal(pl.col(c).str.starts_with(s) for s in _FORMULA_START))
            .then(pl.lit("'") + pl.col(c)).otherwise(pl.col(c)).alias(c)
            for c in text_cols)
    renames = {c: f"'{c}" for c in frame.columns if c.startswith(_FORMULA_START)}
    # Keep headers distinct: an id of its own could already start with the quote ("'-x").
    for c, quoted in list(renames.items()):
        while quoted in frame.columns:
            quoted = "'" + quoted
        renames[c] = quoted
    return frame.rename(renames) if renames else frame


def for_csv(frame: pl.DataFrame) -> pl.DataFrame:
    """The frame as a CSV file shows it (6 decimals): formula-like text neutralised, and a
    float that would print as -0.000000 (a residual of -1e-10 kWh) written as 0."""
    floats = [c for c, t in frame.schema.items() if t in (pl.Float64, pl.Float32)]
    if floats:
        frame = frame.with_columns(
            pl.when(pl.col(c).abs() < 5e-7).then(0.0).otherwise(pl.col(c)).alias(c)
            for c in floats)
    return neutralise_csv_text(frame)


def write_atomically(out_dir: Path, files: dict[str, Callable[[Path], None]],
                     inputs: list[Path], remove: tuple[str, ...] = ()) -> list[Path]:
    """Write several files into out_dir as one set: all of them, or none.

    Every file is first written in full into a hidden staging folder inside out_dir; then
    the set is put in place behind one commit point (disagg.present.commit): any
    interruption, Ctrl-C included, leaves out_dir with the whole previous set or the whole
    new one, and never deletes a previous file without its replacement in place. Files of
    out_dir under other names are left alone. Staging folders left by killed runs are
    finished or removed first.

    Args:
        out_dir: destination folder (created if missing).
        files: file name -> function writing that file at the given path.
        inputs: the run's input files, which must never be overwritten.
        remove: names of files that belong to this kind of set but that this run does not
            write (an earlier run's report.html when this one has none): removed as part of
            the same commit, so the folder never mixes two runs' files.

    Returns:
        The paths written.

    Raises:
        OutputError: the folder cannot be created or written, a name is taken by a folder,
            or a name would replace an input.
    """
    out_dir = _resolved(out_dir)
    targets = [out_dir / name for name in files]
    resolved_inputs = {_resolved(p) for p in inputs}
    for t in targets:
        if _resolved(t) in resolved_inputs:
            raise OutputError(f"{t}: writing here would replace an input file; choose another --out")
        if t.is_dir():
            raise OutputError(f"{t}: is a folder, so the file {t.name} cannot be written there; "
                              "move the folder or choose another --out")
    created = _make_folder(out_dir)
    try:
        tmp = commit.staging(out_dir)
    except OutputError:
        _remove_if_created(created)
        raise
    try:
        for name, write in files.items():
            write(tmp / name)
        commit._step("staged")
        with commit.folder_locked(out_dir):
            # An earlier run's file of this kind of set that this run does not write (never
            # an input, never a folder), decided under the lock: a run that committed since
            # this one started is "earlier" too.
            stale = [n for n in remove if n not in files and (out_dir / n).is_file()
                     and _resolved(out_dir / n) not in resolved_inputs]
            commit.commit(tmp, [(name, out_dir / name) for name in files]
                          + [(None, out_dir / name) for name in stale])
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        _remove_if_created(created)
        raise OutputError(f"{out_dir}: cannot write the outputs ({_reason(exc)}){_where(exc)}; "
                          "the previous files are left as they were") from None
    except pl.exceptions.PolarsError as exc:
        # polars reports a failed write (disk full, ...) as its own error, not an OSError.
        shutil.rmtree(tmp, ignore_errors=True)
        _remove_if_created(created)
        raise OutputError(f"{out_dir}: cannot write the outputs ({_first_line(exc)}); "
                          "the previous files are left as they were") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        _remove_if_created(created)
        raise
    shutil.rmtree(tmp, ignore_errors=True)
    return targets


def _resolved(path: Path) -> Path:
    """path.resolve(), with a symbolic link loop an OutputError."""
    try:
        return Path(path).resolve()
    except (OSError, RuntimeError) as exc:
        why = "a symbolic link loop" if isinstance(exc, RuntimeError) else _reason(exc)
        raise OutputError(f"{path}: cannot use this output path ({why})") from None


def _reason(exc: OSError) -> str:
    """An OS error's reason in words, never "None"."""
    return (exc.strerror or (os.strerror(exc.errno) if exc.errno else None) or str(exc)
            or type(exc).__name__)


def _where(exc: OSError) -> str:
    """The file an OS error names, by its name in the output folder (the staging folder it
    was in is gone)."""
    return f" ({Path(exc.filename).name})" if getattr(exc, "filename", None) else ""


def _first_line(exc: BaseException) -> str:
    """The first line of an error; of polars' "... underlying IO error: REASON", the reason."""
    text = str(exc).strip().splitlines()
    line = text[0] if text else type(exc).__name__
    return line.split("underlying IO error: ", 1)[-1]


def _make_folder(folder: Path) -> list[Path]:
    """Create folder and its missing parents; return those created (deepest last).

    Raises:
        OutputError: it cannot be created.
    """
    missing = []
    p = folder
    while not p.exists() and p != p.parent:
        missing.append(p)
        p = p.parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{folder}: cannot create the output folder ({_reason(exc)})") from None
    return list(reversed(missing))


def _remove_if_created(created: list[Path]) -> None:
    """A failed write leaves no empty output folder it created."""
    for folder in reversed(created):
        try:
            folder.rmdir()
        except OSError:
            return


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
    xlsx also breakdown.xlsx (see write_workbook), with report_html also report.html. An
    earlier run's breakdown.xlsx or report.html that this run does not write is removed in the
    same commit (OPTIONAL_BREAKDOWN_FILES), so the folder holds one run's results."""
    # -0.0 (a difference that rounds to nothing) is written as 0.
    table = result.breakdown.with_columns(cs.float() + 0.0)
    site = result.site
    files = {
        "breakdown.csv": lambda p: for_csv(table).write_csv(p, float_precision=6),
        "breakdown.parquet": lambda p: table.write_parquet(p),
        "fit.json": lambda p: p.write_text(to_json(result.fit.as_json()), encoding="utf-8"),
    }
    if xlsx:
        files["breakdown.xlsx"] = lambda p: write_workbook(workbook_tables(result), p)
    if report_html is not None:
        files["report.html"] = lambda p: p.write_text(report_html, encoding="utf-8")
    return write_atomically(out_dir, files, site.input_files(),
                            remove=OPTIONAL_BREAKDOWN_FILES)


# Files a breakdown writes only when asked (--xlsx, --report).
OPTIONAL_BREAKDOWN_FILES = ("breakdown.xlsx", "report.html")


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
    tariff = result.fit.tariff
    currency = tariff.currency if tariff is not None else ""
    draws = pl.DataFrame([{"equipment": d.equipment, "kw": d.kw, "kw_low": d.kw_low,
                           "kw_high": d.kw_high, "se_kw": d.se_kw, "prior_kw": d.prior_kw,
                           "prior_sd_kw": d.prior_sd_kw, "prior_source": d.prior_source,
                           "prior_weight": d.prior_weight, "run_hours": d.run_hours,
                           "flags": ";".join(d.flags)}
                          for d in result.fit.draws],
                         schema={"equipment": pl.String, "kw": pl.Float64, "kw_low": pl.Float64,
                                 "kw_high": pl.Float64, "se_kw": pl.Float64,
                                 "prior_kw": pl.Float64, "prior_sd_kw": pl.Float64,
                                 "prior_source": pl.String, "prior_weight": pl.Float64,
                                 "run_hours": pl.Float64, "flags": pl.String})
    table = result.breakdown
    if tariff is None:
        table = table.drop("cost")
    sheets = {"breakdown": table, "draws": draws}
    if tariff is not None:
        sheets["costs"] = pl.DataFrame(
            [m.as_json() for m in tariff.months], schema={"period": pl.String, "metered_kwh": pl.Float64,
                                      "peak_kw": pl.Float64, "demand_cost": pl.Float64,
                                      "energy_cost": pl.Float64, "cost": pl.Float64})
    notes = [("caution", CAUTION)] + [("note", w) for w in result.fit.warnings]
    sheets["notes"] = pl.DataFrame(notes, schema={"kind": pl.String, "text": pl.String},
                                   orient="row")
    return {name: _with_units(frame, currency) for name, frame in sheets.items()}


def write_workbook(sheets: dict[str, pl.DataFrame], path: Path) -> None:
    """One .xlsx workbook, one sheet per table; numbers stay numbers, and text is stored as
    text, never as a formula (xlsxwriter's strings_to_formulas off), so names from users
    cannot run in a spreadsheet."""
    import io

    import xlsxwriter

    # Built in memory and then written as one file: a full disk is then a plain OSError of
    # that write (xlsxwriter writing the file itself leaves a half-closed zip file that
    # prints a second error when collected).
    buffer = io.BytesIO()
    with xlsxwriter.Workbook(buffer, {"strings_to_formulas": False, "strings_to_urls": False,
                                      "nan_inf_to_errors": True, "in_memory": True}) as book:
        for name, frame in sheets.items():
            frame.write_excel(workbook=book, worksheet=name, autofit=True,
                              float_precision=6)
    Path(path).write_bytes(buffer.getvalue())


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
        "drift.csv": lambda p: for_csv(table).write_csv(p, float_precision=6),
        "drift.json": lambda p: p.write_text(to_json(result.summary.as_json()), encoding="utf-8"),
    }, inputs)
    if state_path is not None:
        state_path = Path(state_path).resolve()
        paths += write_atomically(state_path.parent, {
            state_path.name: lambda p: p.write_text(to_json(result.state), encoding="utf-8")},
            inputs)
    return paths


def write_portfolio(result, out_dir: Path) -> list[Path]:
    """Write portfolio.csv (one row per site; see disagg.jobs.batch.portfolio_frame) and
    portfolio_equipment.csv (one row per site, month and breakdown row; equipment_frame) into
    out_dir, atomically, with text cells neutralised for spreadsheets.

    Args:
        result: a disagg.jobs.batch.PortfolioResult.
    """
    frame = result.frame
    inputs = [result.portfolio.source, *result.portfolio.sites]
    files = {
        "portfolio.csv": lambda p: for_csv(frame).write_csv(p, float_precision=6)}
    if result.equipment is not None:
        files["portfolio_equipment.csv"] = lambda p: for_csv(
            result.equipment).write_csv(p, float_precision=6)
    return write_atomically(out_dir, files, [p for p in inputs if p.is_file()])


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
        "compare.json": lambda p: p.write_text(to_json(result.report.as_json()), encoding="utf-8"),
    }
    return write_atomically(out_dir, files, site.input_files())
