"""One job per command for one site: read, fit, analyse, write, store.

Each ``run_*`` function takes a small options dataclass (validated once, when it is made) and
returns a ``Run``: the analysis result, the terminal summary (built before anything is
written, so a summary that fails leaves the output folder untouched), the files written and
the notes for the person running it. The command line (disagg/cli.py) only parses, calls one
of these and prints; ``disagg batch`` (disagg/jobs/batch.py) calls the same ones per site.
"""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from disagg.analyses.pipeline import (
    CAUTION,
    BreakdownResult,
    breakdown_site,
    check_confidence,
    check_log_offset,
    check_memory_days,
    check_range,
    check_site,
)
from disagg.errors import ConfigError, DisaggError, InputError, OutputError
from disagg.inputs.config import check_regular_file, load_site, resolve_path
from disagg.inputs.vee import check_on_duplicate
from disagg.present import commit, terminal
from disagg.present.outputs import (
    OPTIONAL_BREAKDOWN_FILES,
    neutralise_csv_text,
    write_atomically,
    write_breakdown,
    write_compare,
    write_demo_site,
    write_drift,
    write_report,
)
from disagg.progress import Progress

if TYPE_CHECKING:
    from disagg.analyses.drift import DriftResult

Period = tuple[dt.date, dt.date]


def finish_dead_writes(out: Path) -> None:
    """Before a run: finish (or remove) what runs killed while writing into out left there
    (disagg.present.commit.recover), so the folder holds whole sets even when this run fails
    before writing its own."""
    if Path(out).is_dir():
        commit.recover(Path(out).resolve())


def check_out_folder(out: Path) -> None:
    """Raise OutputError, before any reading or fitting, when --out names an existing file."""
    if Path(out).exists() and not Path(out).is_dir():
        raise OutputError(f"--out {out}: is a file, not a folder; give a folder for the "
                          "result files")


# Virtual memory a breakdown, report or drift run takes beyond what the process holds when
# it starts (VmPeak at the end less VmSize at the check; measured 2026-12-04, 2 CPUs): a
# part that does not depend on the data (polars' and numpy's thread pools and their malloc
# arenas: 720-840 MiB on a 1-minute site-year, 1.0 GiB on the demo site), taken as 900 MiB
# [bytes], and a part per meter interval and (equipment + 4) columns [bytes]: the largest
# growth of peak virtual memory per year of 1-minute data with 30 loads among the three
# commands, 819 MiB (breakdown; bench/longsite.py, bench/LONGSITE.md), is 48 bytes, taken
# as 50. Used only under a memory limit (ulimit -v), to refuse a run that cannot fit with one
# Error line instead of an allocation abort in the middle of it.
RUN_BASE_BYTES = 900 * 2**20
RUN_BYTES_PER_CELL = 50


def check_memory_limit(site_path: Path, date_from: dt.date | None = None,
                       date_to: dt.date | None = None) -> None:
    """Raise InputError, before reading, when a memory limit (ulimit -v: RLIMIT_AS, or
    RLIMIT_DATA) leaves too little room for this site's meter file.

    The need is estimated from the meter file's lines (a CSV file; other formats and runs
    over a date range are not estimated) times (equipment + 4) columns times
    RUN_BYTES_PER_CELL. Without a limit nothing is read. A polars allocation that fails
    under such a limit aborts the process (no Python exception), hence the check up front.
    """
    import resource

    limits = []
    for name, status_field in (("RLIMIT_AS", "VmSize"), ("RLIMIT_DATA", "VmData")):
        soft = resource.getrlimit(getattr(resource, name))[0]
        if soft != resource.RLIM_INFINITY and soft > 0:
            limits.append((soft, status_field))
    if not limits or date_from is not None or date_to is not None:
        return
    try:
        status = Path("/proc/self/status").read_text(encoding="utf-8")
    except OSError:
        return
    used = {line.split(":")[0]: int(line.split()[1]) * 1024
            for line in status.splitlines() if line.startswith(("VmSize:", "VmData:"))}
    site = load_site(site_path)
    meter = Path(site.meter.file)
    if meter.suffix.lower() not in (".csv", ".txt") or not meter.is_file():
        return
    lines = 0
    with meter.open("rb") as fh:
        while chunk := fh.read(1 << 20):
            lines += chunk.count(b"\n")
    need = RUN_BASE_BYTES + lines * (len(site.equipment) + 4) * RUN_BYTES_PER_CELL
    for soft, status_field in limits:
        if used.get(status_field, 0) + need > soft:
            raise InputError(
                f"{meter}: {lines} lines x {len(site.equipment)} loads need about "
                f"{(used.get(status_field, 0) + need) / 2**30:.1f} GB of memory, but this "
                f"process may use {soft / 2**30:.1f} GB (ulimit -v); raise the limit or run "
                "a shorter period with --from/--to")


@dataclass
class Run:
    """What a job did.

    result: the analysis result (BreakdownResult, DriftResult, CompareResult, ...).
    summary: the terminal text, built before any file was written.
    paths: every file (or history folder) written, in order.
    notes: lines for the person running the job (months not stored in the history, ...).
    """

    result: Any
    summary: str
    paths: list[Path] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)


# A default-reference drift run needs at least this many days of data after the reference
# period to have anything to show (common practice, no source: four weeks).
MIN_TRACKED_DAYS = 28


def drift_for(result: BreakdownResult, memory_days: float = 30.0,
              reference: tuple[dt.date, dt.date] | None = None,
              threshold: float = 0.10) -> tuple[DriftResult | None, str | None]:
    """The drift result for a breakdown's own intervals, or None and the reason why not.

    With the default reference (the first 90 days) the data must reach MIN_TRACKED_DAYS past
    it; a given reference period must hold enough usable intervals for a fit (else the
    reason names the period and the dates the data cover). A drift run that fails on these
    data (disagg.errors.DisaggError: a memory that needs an unstable step, ...) is left out
    with its message.

    Raises:
        ConfigError: memory_days not above 0 (a bad option, not a property of the data).
    """
    from disagg.analyses.drift import DEFAULT_REFERENCE_DAYS, drift_aligned
    from disagg.fit.align import BASELOAD_COLUMN_COUNT
    from disagg.present.report.sections import local_span

    check_memory_days(memory_days)
    first, last = local_span(result)
    span_days = (dt.date.fromisoformat(last) - dt.date.fromisoformat(first)).days + 1
    if reference is None and span_days < DEFAULT_REFERENCE_DAYS + MIN_TRACKED_DAYS:
        return None, (f"Drift is left out: the data cover {span_days} days, and tracking "
                      f"needs the {DEFAULT_REFERENCE_DAYS}-day reference period plus at least "
                      f"{MIN_TRACKED_DAYS} days after it; a shorter reference period can be "
                      "given with --reference FROM:TO.")
    if reference is not None:
        # Said here in the reference period's terms: drift_aligned would blame the files.
        aligned = result.aligned
        local_day = aligned.frame["start_utc"].dt.convert_time_zone(result.site.timezone).dt.date()
        inside = int((aligned.use & ((local_day >= reference[0])
                                     & (local_day <= reference[1])).to_numpy()).sum())
        needed = (len(aligned.equipment_ids)
                  + BASELOAD_COLUMN_COUNT[result.site.baseload.profile] + 2)
        period = f"the reference period {reference[0]} to {reference[1]}"
        if inside == 0:
            return None, (f"Drift is left out: {period} has no usable intervals in the data, "
                          f"which cover {first} to {last}; give a reference period inside "
                          "them with --reference FROM:TO.")
        if inside < needed:
            return None, (f"Drift is left out: {period} has only {inside:,} usable intervals "
                          f"in the data, which cover {first} to {last}; a fit needs at least "
                          f"{needed:,}.")
    try:
        # The report needs the hours no more (its breakdown table is made): the tracked
        # design may take their place (drift_aligned consume_hours).
        drift = drift_aligned(result.site, result.aligned, memory_days, None, reference,
                              threshold, result.estimates.confidence,
                              consume_hours=result.estimates.hours is None)
    except DisaggError as exc:
        return None, f"Drift is left out: {exc}"
    return drift, None


@dataclass(frozen=True)
class BreakdownOptions:
    """Settings of one breakdown run (disagg breakdown, demo, and each site of a batch).

    history: a history folder to use when the site file names none (a portfolio's).
    drift: also track the draws (batch --drift), with drift_reference as the reference.
    """

    site: Path
    out: Path
    date_from: dt.date | None = None
    date_to: dt.date | None = None
    confidence: float = 0.95
    log_offset_min: float | None = None  # None: the site file's, else 0
    on_duplicate: str | None = None  # None: the site file's, else error
    estimate_gaps: bool = False
    xlsx: bool = False
    report: bool = False
    history: Path | None = None
    drift: bool = False
    drift_reference: Period | None = None

    def __post_init__(self) -> None:
        check_out_folder(self.out)
        check_range(self.date_from, self.date_to)
        check_confidence(self.confidence)
        if self.log_offset_min is not None:
            check_log_offset(self.log_offset_min)
        if self.on_duplicate is not None:
            check_on_duplicate(self.on_duplicate)


def run_breakdown(opts: BreakdownOptions, progress: Progress | None = None) -> Run:
    """Fit the site, write its files (and report), then store its months in the history.

    A bad history folder fails before any output is written; an error storing the history
    after the outputs were written says so (disagg.present.history.outputs_already_written).
    With opts.drift the result is a (BreakdownResult, DriftResult) pair.
    """
    finish_dead_writes(opts.out)
    check_memory_limit(opts.site, opts.date_from, opts.date_to)
    result = breakdown_site(opts.site, opts.date_from, opts.date_to, opts.confidence,
                            opts.log_offset_min, on_duplicate=opts.on_duplicate,
                            estimate=opts.estimate_gaps, progress=progress)
    drift = None
    if opts.drift:
        from disagg.analyses.drift import drift_aligned

        drift = drift_aligned(result.site, result.aligned, reference=opts.drift_reference)
    html = None
    if opts.report:
        from disagg.present.report import render_report

        tracked, note = drift_for(result)
        html = render_report(result, tracked, progress=progress, drift_note=note)
    summary = terminal.breakdown_summary(result)
    folder = result.site.history or opts.history
    if folder is not None:
        from disagg.present import history as hist  # only when a history is used
        hist.check_folder(folder)  # a bad history folder fails before any output
        hist.check_site_id(folder, result.site)  # so does an id another site file uses
    written = {"breakdown.xlsx": opts.xlsx, "report.html": html is not None}
    stale = [n for n in OPTIONAL_BREAKDOWN_FILES
             if not written[n] and (Path(opts.out) / n).is_file()]
    paths = write_breakdown(result, opts.out, xlsx=opts.xlsx, report_html=html)
    if drift is not None:
        paths += write_drift(drift, opts.out, result.site.input_files())
    notes = [f"removed {n} of an earlier run from {opts.out}: it described other results "
             f"(add --{'xlsx' if n.endswith('.xlsx') else 'report'} to write a new one)"
             for n in stale]
    if folder is not None:
        with hist.outputs_already_written(paths):
            stored = hist.store_breakdown(folder, result, opts.date_from, opts.date_to)
            if stored.files:
                paths.append(hist.site_folder(folder, "breakdown", result.site.path))
            notes += stored.notes
            if drift is not None:
                hist.store_drift(folder, result.site, drift)
                paths.append(hist.site_folder(folder, "drift", result.site.path))
    return Run(result if drift is None else (result, drift), summary, paths, notes)


@dataclass(frozen=True)
class CheckOptions:
    """Settings of disagg check; offset_window_min None = no clock-offset search."""

    site: Path
    date_from: dt.date | None = None
    date_to: dt.date | None = None
    log_offset_min: float | None = None  # None: the site file's, else 0
    offset_window_min: float | None = None
    on_duplicate: str | None = None  # None: the site file's, else error

    def __post_init__(self) -> None:
        check_range(self.date_from, self.date_to)


def run_check(opts: CheckOptions) -> Run:
    """Read and align the inputs and say what was found, without fitting; writes nothing."""
    result = check_site(opts.site, opts.date_from, opts.date_to, opts.log_offset_min,
                        opts.offset_window_min, on_duplicate=opts.on_duplicate)
    return Run(result, terminal.check_summary(result))


@dataclass(frozen=True)
class DemoOptions:
    """Settings of disagg demo: the demo site goes to out/demo_site, its results to out."""

    out: Path
    confidence: float = 0.95
    xlsx: bool = False

    def __post_init__(self) -> None:
        check_out_folder(self.out)
        check_confidence(self.confidence)


def run_demo(opts: DemoOptions, progress: Progress | None = None) -> tuple[Path, Run]:
    """Write the invented demo building's files, then run the breakdown with its report.

    Returns the demo's site file and the breakdown's Run.
    """
    toml = write_demo_site(opts.out / "demo_site")
    run = run_breakdown(BreakdownOptions(toml, opts.out, confidence=opts.confidence,
                                         xlsx=opts.xlsx, report=True), progress)
    return toml, run


@dataclass(frozen=True)
class DriftOptions:
    """Settings of disagg drift (see disagg.analyses.drift.drift_site)."""

    site: Path
    out: Path
    memory_days: float = 30.0
    step: float | None = None
    reference: Period | None = None
    threshold: float = 0.10
    state: Path | None = None
    date_from: dt.date | None = None
    date_to: dt.date | None = None
    confidence: float = 0.95
    log_offset_min: float | None = None  # None: the site file's, else 0
    baseload_memory_days: float | None = None  # None: memory_days
    min_reference_run_h: float = 48.0  # run-hours a load's own reference period must hold

    def __post_init__(self) -> None:
        check_out_folder(self.out)
        check_range(self.date_from, self.date_to)
        if self.step is None:
            check_memory_days(self.memory_days)
        if self.baseload_memory_days is not None:
            check_memory_days(self.baseload_memory_days, "--baseload-memory")
        if not self.min_reference_run_h > 0:
            raise ConfigError(f"--reference-hours {self.min_reference_run_h:g}: expected "
                              "run-hours above 0")


def _read_state(path: Path | None) -> dict | None:
    """The saved tracker state, or None when there is no such file yet.

    Raises:
        ConfigError: a FIFO, device or folder (refused before reading), a link loop.
        InputError: the file cannot be read or is not JSON.
    """
    if path is None:
        return None
    check_regular_file(resolve_path(path, "--state"), "tracker state file (--state)")
    if not path.exists():
        return None
    def not_finite(word: str) -> float:
        # disagg writes no NaN or Infinity (to_json makes them null): the file was edited.
        raise ValueError(f"{word} where a finite number was expected")

    try:
        state = json.loads(path.read_text(encoding="utf-8"), parse_constant=not_finite)
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: cannot read the tracker state ({exc})") from None
    if isinstance(state, dict):
        for key in ("weights", "scales", "mu", "delta"):
            values = state.get(key)
            flat = values if isinstance(values, list) else [values]
            if key in state and not all(
                    isinstance(v, (int, float)) and not isinstance(v, bool) for v in flat):
                raise InputError(f"{path}: the tracker state's {key!r} holds something other "
                                 "than numbers; start without --state")
    return state


def run_drift(opts: DriftOptions) -> Run:
    """Track every draw, write drift.csv/.json (and the state), store the days tracked."""
    finish_dead_writes(opts.out)
    check_memory_limit(opts.site, opts.date_from, opts.date_to)
    from disagg.analyses.drift import drift_site

    saved = _read_state(opts.state)
    result = drift_site(opts.site, opts.memory_days, opts.step, opts.reference, opts.threshold,
                        opts.confidence, saved, opts.date_from, opts.date_to,
                        opts.log_offset_min, baseload_memory_days=opts.baseload_memory_days,
                        min_reference_run_h=opts.min_reference_run_h)
    summary = terminal.drift_summary(result)
    site = load_site(opts.site)
    from disagg.present import history as hist  # only when a history is used
    hist.check_configured(site)  # a bad history folder fails before any output
    paths = write_drift(result, opts.out, site.input_files(), opts.state)
    paths += hist.store_drift_configured(site, result, paths)
    return Run(result, summary, paths)


@dataclass(frozen=True)
class CompareOptions:
    """Settings of disagg compare. from_history: before/after are (FROM, TO) months such as
    ("2024-06", "2024-08") and the draws come from the stored months, no refit."""

    site: Path
    out: Path
    before: Period | tuple[str, str]
    after: Period | tuple[str, str]
    confidence: float = 0.95
    min_change: float = 0.05
    log_offset_min: float | None = None  # None: the site file's, else 0
    from_history: bool = False

    def __post_init__(self) -> None:
        check_out_folder(self.out)


def run_compare(opts: CompareOptions) -> Run:
    """Each draw in two periods and the verdict; writes compare.csv (and compare.json)."""
    finish_dead_writes(opts.out)
    if opts.from_history:
        site = load_site(opts.site)
        if site.history is None:
            raise ConfigError(f"{site.path}: --from-history needs a [history] folder in the "
                              "site file, such as [history] folder = \"history\"")
        from disagg.present import history as hist  # only when a history is used
        result = hist.compare_from_history(site.history, hist.site_id(site.path), opts.before,
                                           opts.after, opts.min_change)
        summary = terminal.comparison_summary(result, CAUTION)
        paths = write_atomically(opts.out, {
            "compare.csv": lambda p: neutralise_csv_text(result.table)
            .write_csv(p, float_precision=6)}, site.input_files())
        return Run(result, summary, paths)
    from disagg.analyses.compare import compare_site

    result = compare_site(opts.site, opts.before, opts.after, confidence=opts.confidence,
                          min_change=opts.min_change, log_offset_min=opts.log_offset_min)
    summary = terminal.compare_summary(result)
    return Run(result, summary, write_compare(result, opts.out))


@dataclass(frozen=True)
class HistoryOptions:
    """Settings of disagg history: show stored months, or compare two spans of them
    (before/after as months FROM:TO such as "2024-06:2024-08"), optionally for one
    equipment, to a CSV file."""

    site: Path
    equipment: str | None = None
    out: Path | None = None
    before: str | None = None
    after: str | None = None
    min_change: float = 0.05
    folder: Path | None = None

    def __post_init__(self) -> None:
        if (self.before is None) != (self.after is None):
            raise ConfigError("--before and --after: give both to compare stored months")


def run_history(opts: HistoryOptions) -> Run:
    """The stored months (or their comparison) as a table; written to opts.out when given."""
    site = load_site(opts.site)
    store = opts.folder.resolve() if opts.folder is not None else site.history
    if store is None:
        raise ConfigError(f"{site.path}: no [history] folder; add [history] folder = "
                          "\"history\" to the site file or give --folder")
    from disagg.present import history as hist  # only when a history is used
    sid = hist.site_id(site.path)
    if opts.before is not None:
        result = hist.compare_from_history(store, sid, hist.parse_months(opts.before, "--before"),
                                           hist.parse_months(opts.after, "--after"),
                                           opts.min_change)
        table = hist.select_equipment(result.table, opts.equipment)
        if opts.equipment is not None:
            result = hist.HistoryComparison(table, result.before, result.after,
                                            result.months_before, result.months_after,
                                            result.method)
        text = terminal.comparison_summary(result, CAUTION)
    else:
        stored = hist.read_history(store, sid)
        if stored.is_empty():
            raise InputError(f"{store}: no stored breakdown of site {sid!r}; run disagg "
                             "breakdown or batch with this history folder set")
        table = result = hist.select_equipment(stored, opts.equipment)
        text = terminal.history_summary(table, store, CAUTION)
    if opts.out is None:
        return Run(result, text)
    target = opts.out.resolve()
    if target.is_dir():
        raise ConfigError(f"--out {opts.out}: {target} is a folder; give a CSV file name such "
                          f"as {target / 'history.csv'}")
    paths = write_atomically(target.parent, {
        target.name: lambda p: neutralise_csv_text(table).write_csv(p, float_precision=6)},
        site.input_files())
    return Run(result, text, paths)


@dataclass(frozen=True)
class ReportOptions:
    """Settings of disagg report; drift=False leaves the drift page out."""

    site: Path
    out: Path
    date_from: dt.date | None = None
    date_to: dt.date | None = None
    confidence: float = 0.95
    log_offset_min: float | None = None  # None: the site file's, else 0
    memory_days: float = 30.0
    reference: Period | None = None
    drift: bool = True

    def __post_init__(self) -> None:
        check_out_folder(self.out)
        check_range(self.date_from, self.date_to)
        check_confidence(self.confidence)
        if self.log_offset_min is not None:
            check_log_offset(self.log_offset_min)
        check_memory_days(self.memory_days)


def _release_fit_columns(result: BreakdownResult) -> None:
    """Drop the whole fit's per-interval columns (term hours, baseload and weather columns:
    estimates.hours, .base, .weather_hours become None) once the breakdown table is made.

    The report renders from the table, the metered and fitted energy and the intervals'
    frame; the drift run that follows needs the memory (a site-year of 1-minute data with 30
    loads: about 125 MB, ten years about 1.3 GB). Only run_report does this, and its result
    says so.
    """
    est = result.estimates
    est.hours = est.base = est.weather_hours = None


def run_report(opts: ReportOptions, progress: Progress | None = None) -> Run:
    """Fit the site, track drift on the same intervals, write report.html.

    Returns a Run whose result is (BreakdownResult, DriftResult or None, the HTML); with
    drift, the breakdown's estimates no longer hold the per-interval fit columns (see
    _release_fit_columns).
    """
    finish_dead_writes(opts.out)
    check_memory_limit(opts.site, opts.date_from, opts.date_to)
    from disagg.present.report import render_report

    result: BreakdownResult = breakdown_site(opts.site, opts.date_from, opts.date_to,
                                             opts.confidence, opts.log_offset_min,
                                             progress=progress)
    if opts.drift:
        _release_fit_columns(result)
        tracked, note = drift_for(result, opts.memory_days, opts.reference)
    else:
        tracked, note = None, "Drift tracking was not asked for in this report."
    html = render_report(result, tracked, progress=progress, drift_note=note)
    summary = terminal.report_summary(result, tracked)
    paths = write_report(html, opts.out, result.site.input_files())
    return Run((result, tracked, html), summary, paths)
