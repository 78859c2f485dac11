"""The `disagg` command: thin typer commands over the library.

Each command parses its arguments and calls library functions; errors from bad input become
one ``Error: ...`` line on stderr and exit status 1. An unexpected internal error prints a
short line and exit status 2; ``--debug`` shows its full trace.
"""

from __future__ import annotations

import datetime as dt
import gc
import os
import re
import sys
from pathlib import Path
from typing import Annotated, Optional

import typer

from disagg.errors import DisaggError

# The fits multiply tall, narrow matrices, where BLAS threads cost more than they save (seen
# here: a fit 5-8x slower with OpenBLAS's default threads on a 2-core machine). Set for the
# command's own process (and the batch workers it starts) before numpy is first imported by
# a command; a user's own setting wins. The library itself leaves the caller's settings alone.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")


# Address space the command's libraries take to load (numpy, polars, scipy and their
# thread pools: VmPeak 572 MB measured here after importing a breakdown's modules) plus a
# margin. Under a smaller `ulimit -v` the imports fail inside C extensions (a MemoryError,
# "failed to map segment", or a polars import that hangs), so the entry point refuses first.
START_ADDRESS_BYTES = 600 * 2**20


def _address_limit_error() -> str | None:
    """The Error text when RLIMIT_AS leaves too little room to load the libraries, else
    None. Counts what this process has mapped already (VmSize): libraries loaded before the
    limit was set need no more room."""
    import resource

    soft = resource.getrlimit(resource.RLIMIT_AS)[0]
    if soft == resource.RLIM_INFINITY or soft <= 0:
        return None
    try:
        status = Path("/proc/self/status").read_text(encoding="utf-8")
        size = next(int(x.split()[1]) * 1024 for x in status.splitlines()
                    if x.startswith("VmSize:"))
    except (OSError, StopIteration, ValueError):
        return None
    if soft >= max(START_ADDRESS_BYTES, size + 32 * 2**20):
        return None
    return (f"a memory limit of {soft / 2**20:.0f} MB (ulimit -v) is too small to start: "
            f"disagg needs about {START_ADDRESS_BYTES / 2**20:.0f} MB of address space to "
            "load its libraries, more for the data; raise the limit")


def _out_of_memory(exc: BaseException) -> bool:
    """Whether an exception escaping a command is the process running out of memory (also
    while importing a library: an ImportError or OSError with ENOMEM / "failed to map")."""
    import errno

    if isinstance(exc, MemoryError):
        return True
    if isinstance(exc, OSError) and exc.errno == errno.ENOMEM:
        return True
    text = str(exc).lower()
    return isinstance(exc, (ImportError, OSError)) and (
        "failed to map segment" in text or "cannot allocate memory" in text)


# Plain option values without pydantic. typer (0.2x) turns each command-line value into its
# Python type with a pydantic TypeAdapter, so any command imported pydantic (about 0.08 s CPU
# of a breakdown's start, measured here) just to read a path, a word or a number. The values
# this CLI takes in the plain forms below are converted here, to the very value typer's
# adapter gives (tests/test_plain_values.py compares the two); everything else (an empty
# path, a number written another way, a typer without this layer) goes to typer's own.
_PLAIN_FLOAT = re.compile(r"-?[0-9]{1,15}(\.[0-9]{1,15})?")
_PLAIN_INT = re.compile(r"-?[0-9]{1,15}")


def _plain_value(annotation, info, value):
    """The converted value, or _NOT_PLAIN when typer's own conversion must decide."""
    if (annotation is str and type(value) is str) or (annotation is bool
                                                       and type(value) is bool):
        return value
    if annotation is float:
        if type(value) is float:
            return value
        if type(value) is str and _PLAIN_FLOAT.fullmatch(value):
            return float(value)
    if annotation is int:
        if type(value) is int:
            return value
        if type(value) is str and _PLAIN_INT.fullmatch(value):
            return int(value)
    if annotation is Path and info.path_type in (None, Path) and (
            type(value) is str and value) and not (
            info.exists or info.readable or info.writable or info.resolve_path
            or info.allow_dash or not info.file_okay or not info.dir_okay):
        return Path(value)  # typer's path check has nothing to refuse with these settings
    return _NOT_PLAIN


_NOT_PLAIN = object()


def _plain_values() -> None:
    """Let typer's parameters convert the plain values above without pydantic (installed once,
    when this module is imported; a typer without this layer is left as it is)."""
    try:
        from dataclasses import dataclass

        from typer._coercion import RuntimeParam, build_runtime_param
        from typer.core import _TyperParameter
    except ImportError:
        return
    if not hasattr(_TyperParameter, "get_runtime_param"):
        return

    @dataclass(frozen=True)
    class PlainParam(RuntimeParam):
        descriptor: object = None

        def _coerce_value(self, value, param, ctx):
            plain = _plain_value(self.annotation, self.parameter_info, value)
            if plain is not _NOT_PLAIN:
                return plain
            return build_runtime_param(self.descriptor)._coerce_value(value, param, ctx)

    typer_runtime_param = _TyperParameter.get_runtime_param

    def get_runtime_param(self):
        d = self.type_descriptor
        info = d.parameter_info
        if (self._runtime_param is None and d.file_annotation is None and not self.multiple
                and self.nargs == 1 and info.parser is None and info.min is None
                and info.max is None and not info.clamp
                and d.annotation in (str, float, int, bool, Path)):
            self._runtime_param = PlainParam(parameter_info=info, annotation=d.annotation,
                                             descriptor=d)
        return typer_runtime_param(self)

    _TyperParameter.get_runtime_param = get_runtime_param


_plain_values()


class _App(typer.Typer):
    """The typer app with the entry guard: a memory limit too small to start, or memory
    running out outside a command's own guard (its lazy imports), is one Error line and exit
    status 1, not a traceback (typer's own traceback printer needs memory to import too)."""

    def __call__(self, *args, **kwargs):
        message = _address_limit_error()
        if message is not None:
            sys.stderr.write(f"Error: {message}\n")
            raise SystemExit(1)
        try:
            return super().__call__(*args, **kwargs)
        except Exception as exc:  # noqa: BLE001 - only memory failures are handled here
            if not _out_of_memory(exc) or _state["debug"]:
                raise
            sys.stderr.write("Error: out of memory while loading the program's libraries or "
                             "data (a memory limit such as ulimit -v, or the machine's "
                             "memory); raise the limit or run a shorter period with "
                             "--from/--to\n")
            raise SystemExit(1) from None


app = _App(
    add_completion=False,
    # Plain help text: site-file tables such as [runlog] are written as they are (rich markup
    # would read them as style tags and drop them), and flags show no value placeholder.
    rich_markup_mode=None,
    no_args_is_help=True,
    help="Per-equipment monthly energy from one interval meter and the building automation "
         "run logs, with honest uncertainty.",
)

_state = {"debug": False}


@app.callback()
def _main(debug: Annotated[bool, typer.Option("--debug", help="Show the full trace of an "
                                              "unexpected internal error.")] = False) -> None:
    _state["debug"] = debug


def _fail(message: str, code: int = 1) -> None:
    typer.echo(f"Error: {message}", err=True)
    raise typer.Exit(code)


def _guard(fn):
    """Run fn(); turn library errors into one Error line (exit 1).

    Python and library warnings (numpy's RuntimeWarning, ...) are not printed: what matters
    to the engineer is in the outputs' notes and an error is an Error line; --debug shows
    them after the command.
    """
    import warnings

    if _state.get("gc_paused"):  # the console entry paused it for the imports (main)
        gc.freeze()
        gc.enable()
        _state["gc_paused"] = False
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            return _guarded(fn)
        finally:
            if _state["debug"]:
                for w in caught:
                    typer.echo(warnings.formatwarning(w.message, w.category, w.filename,
                                                      w.lineno).rstrip(), err=True)


def _guarded(fn):
    try:
        return fn()
    except DisaggError as exc:
        _fail(str(exc).replace("\n", " "))
    except typer.Exit:
        raise
    except BrokenPipeError as exc:
        if _stdout_gone():
            # The reader of our output went away (e.g. `| head`): not an error of ours.
            sys.stderr.close()
            raise typer.Exit(0) from None
        # Another pipe broke (a helper process's): an error like any other.
        if _state["debug"]:
            raise
        _fail(f"internal error (BrokenPipeError: {exc}); run `disagg --debug ...` for the "
              "full trace and report it", code=2)
    except KeyboardInterrupt:
        # Ctrl-C: every writer commits a whole set or nothing (disagg.present.commit).
        typer.echo("Interrupted: each output folder holds either its previous files or the "
                   "complete new set, never a mix", err=True)
        raise typer.Exit(130) from None
    except SystemExit:
        raise
    except MemoryError:
        # numpy (or Python) could not allocate: the data need more memory than the process
        # may use. (A polars allocation failure aborts instead; see jobs.check_memory_limit.)
        if _state["debug"]:
            raise
        _fail("out of memory: the data need more memory than this process may use (a "
              "memory limit such as ulimit -v, or the machine's memory); run a shorter "
              "period with --from/--to, or raise the limit")
    except BaseException as exc:  # noqa: BLE001 - the last line of defence for users
        # BaseException, not Exception: a library panic (polars' PanicException) is one.
        if _state["debug"]:
            raise
        _fail(f"internal error ({type(exc).__name__}: {exc}); run `disagg --debug ...` for the "
              "full trace and report it", code=2)


def _stdout_gone() -> bool:
    """Whether standard output is a pipe whose reader has gone (poll reports an error on
    it); True when that cannot be told (no file descriptor), as before this check."""
    import select

    try:
        poll = select.poll()
        poll.register(sys.stdout.fileno(), select.POLLOUT)
        return any(event & (select.POLLERR | select.POLLHUP) for _, event in poll.poll(0))
    except (AttributeError, OSError, ValueError):
        return True


def _signal_name(signum: int) -> str:
    import signal

    try:
        return signal.Signals(signum).name
    except ValueError:
        return f"signal {signum}"


def _date(value: str | None, option: str) -> dt.date | None:
    if value is None:
        return None
    try:
        return dt.date.fromisoformat(value)
    except ValueError:
        _fail(f"{option} {value!r}: expected a date such as 2025-03-01")
    return None


def _print_run(run, *, quiet: bool = False, as_json: bool = False) -> None:
    """Print a job's summary, the files written and its notes."""
    if as_json:
        from disagg.present.terminal import breakdown_json

        typer.echo(breakdown_json(run.result, run.paths), nl=False)
    elif not quiet:
        typer.echo(run.summary)
        typer.echo("\nWrote " + ", ".join(str(p) for p in run.paths))
    for note in [] if quiet else run.notes:
        typer.echo(f"Note: {note}", err=as_json)


def _with_bar(quiet: bool, job):
    """Run job(bar) with a terminal progress bar (only when stderr is a terminal)."""
    from disagg.progress import terminal_bar

    bar = terminal_bar(quiet)
    try:
        return job(bar)
    finally:
        if bar is not None:
            bar.close()


# Paths are not checked by typer (readable=False): its check answers a file the user cannot
# read with a usage panel and exit 2; the job's own checks name the file and the reason.
def _path_argument(**kwargs):
    return typer.Argument(readable=False, **kwargs)


def _path_option(*names: str, **kwargs):
    return typer.Option(*names, readable=False, **kwargs)


SiteArg = Annotated[Path, _path_argument(help="The site TOML file.", show_default=False,
                                          metavar="SITE")]
FromOpt = Annotated[Optional[str], typer.Option("--from", help="First local date to use "
                                                "(YYYY-MM-DD); default: the meter's first.")]
ToOpt = Annotated[Optional[str], typer.Option("--to", help="Last local date to use "
                                              "(YYYY-MM-DD), inclusive; default: the meter's last.")]
ConfOpt = Annotated[float, typer.Option("--confidence", help="Confidence level of the "
                                        "intervals, a fraction.")]
DupOpt = Annotated[Optional[str], typer.Option(
    "--on-duplicate", show_default=False, help="Meter readings repeated with different "
    "values: error, keep-first or keep-last; default: the site file's [meter] on_duplicate, "
    "else error.")]
OffsetOpt = Annotated[Optional[float], typer.Option(
    "--log-offset", show_default=False, help="Minutes to add to every run-log time to put it "
    "on the meter's clock (see check --find-offset); default: the site file's [runlog] "
    "log_offset_minutes, else 0.")]
XlsxOpt = Annotated[bool, typer.Option("--xlsx", help="Also write breakdown.xlsx: one sheet "
                                       "per table, units in the headers.")]
ReportOpt = Annotated[bool, typer.Option("--report", help="Also write report.html, the "
                                         "self-contained report for a facilities manager.")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="Print nothing but errors; no "
                                        "progress bar.")]
JsonOpt = Annotated[bool, typer.Option("--json", help="Print the summary as JSON (for "
                                       "scripts) instead of the table.")]


@app.command()
def breakdown(
    site: SiteArg,
    out: Annotated[Path, _path_option("--out", help="Folder for breakdown.csv, "
                                      "breakdown.parquet and fit.json.")],
    date_from: FromOpt = None,
    date_to: ToOpt = None,
    confidence: ConfOpt = 0.95,
    log_offset: OffsetOpt = None,
    on_duplicate: DupOpt = None,
    estimate: Annotated[bool, typer.Option("--estimate", help="Fill meter gaps of at most 4 "
                                           "intervals by linear interpolation, for the monthly "
                                           "totals only (an estimated-gaps row per month).")] = False,
    xlsx: XlsxOpt = False,
    report: ReportOpt = False,
    quiet: QuietOpt = False,
    as_json: JsonOpt = False,
) -> None:
    """Monthly kWh per equipment with intervals; writes breakdown.csv/.parquet and fit.json."""
    from disagg.jobs.site import BreakdownOptions, run_breakdown

    d0, d1 = _date(date_from, "--from"), _date(date_to, "--to")

    def run():
        opts = BreakdownOptions(site, out, d0, d1, confidence, log_offset, on_duplicate,
                                estimate, xlsx=xlsx, report=report)
        _print_run(_with_bar(quiet or as_json, lambda bar: run_breakdown(opts, bar)),
                   quiet=quiet, as_json=as_json)

    _guard(run)


@app.command()
def check(
    site: SiteArg,
    date_from: FromOpt = None,
    date_to: ToOpt = None,
    log_offset: OffsetOpt = None,
    find_offset: Annotated[bool, typer.Option("--find-offset", help="Also search the run "
                                              "log's clock offset from the meter.")] = False,
    offset_window: Annotated[float, typer.Option("--offset-window", help="Search the offset "
                                                 "over plus/minus this many minutes.")] = 30.0,
    on_duplicate: DupOpt = None,
) -> None:
    """Read and align the inputs and report what was found, without fitting."""
    from disagg.jobs.site import CheckOptions, run_check

    d0, d1 = _date(date_from, "--from"), _date(date_to, "--to")
    window = offset_window if find_offset else None
    _guard(lambda: typer.echo(run_check(CheckOptions(site, d0, d1, log_offset, window,
                                                     on_duplicate)).summary))


@app.command()
def demo(
    out: Annotated[Path, _path_option("--out", help="Folder for the demo site (in demo_site/) "
                                      "and its breakdown.")],
    confidence: ConfOpt = 0.95,
    xlsx: XlsxOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Write the fictional demo building's year of data and run the breakdown on it, with
    its report (report.html)."""
    from disagg.jobs.site import DemoOptions, run_demo

    def run():
        opts = DemoOptions(out, confidence, xlsx)
        toml, result = _with_bar(quiet, lambda bar: run_demo(opts, bar))
        if not quiet:
            typer.echo(f"Demo site written to {toml.parent} (all data invented).")
        _print_run(result, quiet=quiet)

    _guard(run)


@app.command()
def drift(
    site: SiteArg,
    out: Annotated[Path, _path_option("--out", help="Folder for drift.csv and drift.json.")],
    memory: Annotated[float, typer.Option("--memory", help="Tracker memory in days, the same "
                                          "for every load whatever its duty cycle.")] = 30.0,
    step: Annotated[Optional[float], typer.Option("--step", help="Normalized LMS step size "
                                                  "mu (0 < step < 2); default 1.")] = None,
    reference: Annotated[Optional[str], typer.Option("--reference", help="One reference period "
                                                     "FROM:TO (local dates) for all loads; "
                                                     "default each load's own first 90 days "
                                                     "with enough run-hours.")] = None,
    reference_hours: Annotated[float, typer.Option("--reference-hours", help="Run-hours a "
                                                   "load's own reference period must hold.")
                               ] = 48.0,
    baseload_memory: Annotated[Optional[float], typer.Option("--baseload-memory", help="Memory "
                                                             "of the baseload levels in days; "
                                                             "default --memory.")] = None,
    threshold: Annotated[float, typer.Option("--threshold", help="Relative change that "
                                             "matters, a fraction.")] = 0.10,
    state: Annotated[Optional[Path], _path_option("--state", help="Tracker state file: "
                                                  "continue from it if it exists, and save "
                                                  "the new state to it.")] = None,
    date_from: FromOpt = None,
    date_to: ToOpt = None,
    confidence: ConfOpt = 0.95,
    log_offset: OffsetOpt = None,
) -> None:
    """Track every draw day by day with a delta-rule tracker and raise drift alarms."""
    from disagg.inputs.config import parse_period
    from disagg.jobs.site import DriftOptions, run_drift

    d0, d1 = _date(date_from, "--from"), _date(date_to, "--to")

    def run():
        ref = parse_period(reference, "--reference") if reference else None
        _print_run(run_drift(DriftOptions(site, out, memory, step, ref, threshold, state, d0,
                                          d1, confidence, log_offset,
                                          baseload_memory, reference_hours)))

    _guard(run)


@app.command()
def compare(
    site: SiteArg,
    before: Annotated[str, typer.Option("--before", show_default=False, help="The earlier "
                                        "period, FROM:TO local dates inclusive, such as "
                                        "2024-06-01:2024-08-31.")],
    after: Annotated[str, typer.Option("--after", show_default=False, help="The later period, "
                                       "FROM:TO local dates inclusive, such as "
                                       "2025-06-01:2025-08-31.")],
    out: Annotated[Path, _path_option("--out", help="Folder for compare.csv and compare.json.")],
    confidence: ConfOpt = 0.95,
    min_change: Annotated[float, typer.Option("--min-change", help="Smallest change called "
                                              "rising or falling, a fraction of the earlier "
                                              "draw.")] = 0.05,
    log_offset: OffsetOpt = None,
    from_history: Annotated[bool, typer.Option("--from-history", help="Take the periods' "
                                               "draws from the stored months of the site's "
                                               "[history] (--before/--after as months such "
                                               "as 2024-06:2024-08) instead of refitting; "
                                               "writes compare.csv only.")] = False,
) -> None:
    """Each equipment's draw in two periods and whether it rose, fell or held; writes
    compare.csv and compare.json."""
    from disagg.inputs.config import parse_period
    from disagg.jobs.site import CompareOptions, run_compare
    from disagg.present.history import parse_months

    def run():
        if from_history:
            periods = parse_months(before, "--before"), parse_months(after, "--after")
        else:
            periods = parse_period(before, "--before"), parse_period(after, "--after")
        _print_run(run_compare(CompareOptions(site, out, *periods, confidence=confidence,
                                              min_change=min_change, log_offset_min=log_offset,
                                              from_history=from_history)))

    _guard(run)


@app.command()
def batch(
    portfolio: Annotated[Path, _path_argument(help="A folder of site TOML files (every *.toml "
                                              "directly in it and every */site.toml one level "
                                              "down), or a portfolio TOML listing them.",
                                              show_default=False, metavar="PORTFOLIO")],
    out: Annotated[Path, _path_option("--out", help="Folder for portfolio.csv, "
                                      "portfolio_equipment.csv and one output folder per site "
                                      "(its site file's path in the portfolio without "
                                      ".toml).")],
    workers: Annotated[int | None, typer.Option("--workers", help="Local worker processes; "
                                                "default: all cores.")] = None,
    cluster: Annotated[str | None, typer.Option("--cluster", help="Address of a running "
                                                "Dask scheduler (such as "
                                                "tcp://10.0.0.5:8786): run the sites on its "
                                                "workers instead of locally.")] = None,
    date_from: FromOpt = None,
    date_to: ToOpt = None,
    drift_too: Annotated[bool, typer.Option("--drift", help="Also track each site's draws "
                                            "(drift, default settings): drift.csv/.json per "
                                            "site and an alarm count in portfolio.csv.")] = False,
    reference: Annotated[str | None, typer.Option("--reference", help="With --drift: the "
                                                  "drift reference period FROM:TO (local "
                                                  "dates) of every site; default each "
                                                  "site's first 90 days.")] = None,
    quiet: QuietOpt = False,
) -> None:
    """Breakdown of every site of a portfolio in parallel; writes DIR/portfolio.csv and each
    site's files; exit 1 when any site failed, 130 when interrupted."""
    from disagg.inputs.config import parse_period
    from disagg.jobs.batch import BatchInterrupted, BatchOptions, run_batch

    d0, d1 = _date(date_from, "--from"), _date(date_to, "--to")

    def run():
        ref = parse_period(reference, "--reference") if reference else None
        opts = BatchOptions(portfolio, out, workers, cluster, d0, d1, drift_too, ref)
        try:
            done = _with_bar(quiet, lambda bar: run_batch(opts, bar))
        except BatchInterrupted as stop:
            # No portfolio.csv for part of the sites: a previous complete one stays, and a
            # script never reads a partial table as the portfolio's.
            signum = getattr(stop, "signum", None)
            what = "Interrupted" if signum is None else f"Stopped by {_signal_name(signum)}"
            typer.echo(f"{what}: {stop.finished} site{'s' * (stop.finished != 1)} "
                       f"finished, {stop.not_run} not run; portfolio.csv not written",
                       err=True)
            raise typer.Exit(130 if signum is None else 128 + signum) from None
        if not quiet:
            typer.echo(done.summary)
            typer.echo(f"\nWrote {done.paths[0]} and each site's files in {out.resolve()}/<site>/")
        return done.result

    result = _guard(run)
    for o in result.failed:
        # The library's message often starts with the site file already; name it once.
        error = o.error or ""
        if not error.startswith(o.site_file):
            error = f"{o.site_file}: {error}"
        typer.echo(f"Error: {error}", err=True)
    if result.failed:
        raise typer.Exit(1)


@app.command()
def history(
    site: SiteArg,
    equipment: Annotated[str | None, typer.Option("--equipment", help="Only this equipment "
                                                  "id (and combined rows holding it).")] = None,
    out: Annotated[Path | None, typer.Option("--out", help="Write the table to this CSV "
                                             "file instead of printing it.")] = None,
    before: Annotated[str | None, typer.Option("--before", help="Compare stored months: "
                                               "the earlier ones, FROM:TO such as "
                                               "2024-06:2024-08 (with --after).")] = None,
    after: Annotated[str | None, typer.Option("--after", help="Compare stored months: the "
                                              "later ones, FROM:TO such as 2025-06:2025-08 "
                                              "(with --before).")] = None,
    min_change: Annotated[float, typer.Option("--min-change", help="Smallest change called "
                                              "rising or falling, a fraction of the earlier "
                                              "draw.")] = 0.05,
    folder: Annotated[Path | None, typer.Option("--folder", help="The history folder, when "
                                                "the site file has no [history] table (such "
                                                "as a portfolio's).")] = None,
) -> None:
    """Each equipment's stored monthly kWh and draw; with --before/--after, an approximate
    comparison of stored months (disagg compare refits and is exact)."""
    from disagg.jobs.site import HistoryOptions, run_history

    def run():
        result = run_history(HistoryOptions(site, equipment, out, before, after, min_change,
                                            folder))
        typer.echo(f"Wrote {result.paths[0]}" if result.paths else result.summary)

    _guard(run)


@app.command()
def report(
    site: SiteArg,
    out: Annotated[Path, _path_option("--out", help="Folder for report.html.")],
    date_from: FromOpt = None,
    date_to: ToOpt = None,
    confidence: ConfOpt = 0.95,
    log_offset: OffsetOpt = None,
    memory: Annotated[float, typer.Option("--memory", help="Drift tracker memory in days.")] = 30.0,
    reference: Annotated[str | None, typer.Option("--reference", help="Drift reference "
                                                  "period FROM:TO (local dates); default "
                                                  "the first 90 days.")] = None,
    no_drift: Annotated[bool, typer.Option("--no-drift", help="Leave the drift page "
                                           "out.")] = False,
    quiet: QuietOpt = False,
) -> None:
    """Write report.html: one self-contained page (breakdown, costs, drift, fit quality,
    cautions) to read in a browser or print to PDF."""
    from disagg.inputs.config import parse_period
    from disagg.jobs.site import ReportOptions, run_report

    d0, d1 = _date(date_from, "--from"), _date(date_to, "--to")

    def run():
        ref = parse_period(reference, "--reference") if reference else None
        opts = ReportOptions(site, out, d0, d1, confidence, log_offset, memory, ref,
                             not no_drift)
        result = _with_bar(quiet, lambda bar: run_report(opts, bar))
        if not quiet:
            html = result.result[2]
            typer.echo(result.summary)
            typer.echo(f"Wrote {result.paths[0]} ({len(html.encode('utf-8')):,} bytes)")

    _guard(run)


def main() -> None:  # pragma: no cover - console entry point ([project.scripts] disagg)
    """The `disagg` command. After the command has finished, the process leaves without the
    interpreter's teardown: freeing every module, frame and array one by one costs about
    0.1 s of CPU (measured on a breakdown of a 15-minute site-year), while everything the
    command writes is already closed (result files are committed before it returns) and
    its output is flushed here. A process with more than this thread (a batch's watcher,
    a cluster client) or with child processes exits as usual."""
    # No cyclic garbage collection while the command's libraries are imported (they make
    # hundreds of thousands of objects that live as long as the process, and each collection
    # scanned them again: about 0.02-0.04 s CPU of a breakdown, measured here); _guard then
    # freezes them (gc.freeze: never scanned again) and collects as usual from there on.
    gc.disable()
    _state["gc_paused"] = True
    try:
        app()
        code: object = 0
    except SystemExit as exc:
        code = exc.code
    _leave(code)


def _leave(code: object) -> None:  # pragma: no cover - console entry point
    """Exit with code: at once (os._exit) when nothing is left to clean up, else as usual."""
    import threading

    if code is not None and not isinstance(code, int):
        sys.exit(code)  # a message: the usual exit prints it
    mp = sys.modules.get("multiprocessing")
    if threading.active_count() > 1 or (mp is not None and mp.active_children()):
        sys.exit(code)
    try:
        sys.stdout.flush()
        sys.stderr.flush()
    except (OSError, ValueError):  # a closed or broken stream: let Python report it
        sys.exit(code)
    logging = sys.modules.get("logging")
    if logging is not None:
        logging.shutdown()
    os._exit(code or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(app())
