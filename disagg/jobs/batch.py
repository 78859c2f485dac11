"""`disagg batch`: the breakdown of many sites, each in its own process or on a Dask cluster.

A portfolio is a folder of site files (every ``*.toml`` directly in it, in name order) or a
portfolio file::

    [portfolio]
    sites = ["north-wing.toml", "../depot/depot.toml"]   # relative to this file
    history = "history"                                  # optional: history folder for sites
                                                         # without a [history] table of their own

Each site's job (:func:`run_site`) reads, fits and writes that site's usual outputs into
``OUT/<site file name without .toml>/``, optionally tracks drift, stores its months in the
history store, and returns plain picklable data (:class:`SiteOutcome`), whether it succeeded
or not: one bad site never stops the others. The jobs run in a local process pool or, with a
cluster address, on an existing Dask distributed cluster (same function, same results).

An interrupt (Ctrl-C) stops the batch: no site starts after it, the sites running finish
their files, and run_portfolio raises :class:`BatchInterrupted` with the counts; no
portfolio table is returned, so the caller writes no portfolio.csv for a part of the sites.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import contextlib
import datetime as dt
import multiprocessing
import os
import re
import signal
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from disagg.errors import ConfigError, DisaggError
from disagg.present.terminal import DRIFT_NOT_RUN
from disagg.progress import Progress, report

# Start method of the local worker processes. "forkserver": every worker is forked from a
# small server process that has no polars thread pool, so no thread's lock is copied mid-state
# (the hazard of fork once polars or numpy threads exist in the parent). Measured here with 8
# copies of the demo site-year on 2 busy cores: fork, forkserver and spawn within noise of each
# other (1 worker 8.4-11.5 s, 2 workers 4.6-7.0 s), a worker's first site about 0.4 s slower
# than its later ones (imports).
START_METHOD = "forkserver"
# Seconds to wait for a Dask scheduler to answer before giving up: the whole connection
# (TCP connect, Dask's handshake and an identity request), not only the TCP connect.
CLUSTER_CONNECT_TIMEOUT_S = 20
# Seconds a cluster batch waits while the scheduler has no worker (none joined, or the last
# one stopped) before it gives up with an error, and how often it looks [s].
CLUSTER_IDLE_TIMEOUT_S = 60.0
CLUSTER_POLL_S = 1.0
# A scheduler address as Dask prints it: tcp:// or tls://, a host name, IPv4 or [IPv6]
# address, and a port.
CLUSTER_ADDRESS = re.compile(r"(tcp|tls)://(\[[0-9A-Fa-f:.]+\]|[A-Za-z0-9_.-]+):([0-9]{1,5})")


class BatchInterrupted(KeyboardInterrupt):
    """The batch was interrupted (Ctrl-C): finished sites have their files, the rest did not
    run. A KeyboardInterrupt, so code that does not know it still stops."""

    def __init__(self, finished: int, not_run: int) -> None:
        super().__init__(f"{finished} sites finished, {not_run} not run")
        self.finished = finished
        self.not_run = not_run


@dataclass(frozen=True)
class Portfolio:
    """The site files of a portfolio and its default history folder."""

    source: Path  # the folder or the portfolio file
    sites: tuple[Path, ...]
    history: Path | None = None

    @property
    def base(self) -> Path:
        """The folder the sites' paths are relative to: the folder itself, or the portfolio
        file's folder."""
        return self.source if self.source.is_dir() else self.source.parent

    def folder_name(self, site: Path) -> str:
        """A site's output folder, relative to --out: its path relative to the portfolio
        without .toml (``school/site.toml`` -> ``school/site``); a site file outside the
        portfolio's folder gets its file name without .toml."""
        try:
            rel = site.relative_to(self.base)
        except ValueError:
            return site.stem
        return rel.with_suffix("").as_posix()


@dataclass(frozen=True)
class SiteJob:
    """One site's work: plain data, so it pickles to any process or cluster worker."""

    site_file: str  # absolute path
    out_dir: str  # absolute path of this site's output folder
    date_from: dt.date | None = None
    date_to: dt.date | None = None
    drift: bool = False
    history: str | None = None  # the portfolio's history folder, used when the site has none
    drift_reference: tuple[dt.date, dt.date] | None = None  # None: drift's default
    name: str | None = None  # the output folder relative to --out; None: the file's stem

    @property
    def folder(self) -> str:
        return self.name or Path(self.site_file).stem


@dataclass
class SiteOutcome:
    """What one site's job returns: plain data, the same wherever the job ran."""

    site_file: str
    folder: str  # the output folder relative to --out (Portfolio.folder_name)
    status: str  # ok or failed
    site: str | None = None  # the [site] name, when the file could be read
    error: str | None = None  # one line, as `disagg breakdown` would print it after "Error: "
    period: str | None = None  # first..last local month
    metered_kwh: float | None = None
    equipment_kwh: dict[str, float] = field(default_factory=dict)  # row -> kWh over the range
    alarms: int | None = None  # drift alarms (None when drift was not run or tracked no day)
    cv_rmse_pct: float | None = None  # hourly, ASHRAE Guideline 14 form
    nmbe_pct: float | None = None
    peak_kw: float | None = None  # highest monthly peak demand of the intervals used [kW]
    cost: float | None = None  # over the range, in currency (None without a [tariff])
    currency: str | None = None
    alarm_equipment: list[str] | None = None  # ids with a drift alarm (None: see alarms)
    drift_note: str | None = None  # what the alarm count means, or why there is none
    history_note: str | None = None  # months not stored in the history, and why
    files: list[str] = field(default_factory=list)
    seconds: float = 0.0  # wall time of the job (not part of the portfolio table)
    # breakdown.csv's rows: period, equipment, kwh, kwh_low, kwh_high, share, flags
    months: list[dict] = field(default_factory=list)


@dataclass
class PortfolioResult:
    """The portfolio table (one row per site, in portfolio order) and every site's outcome."""

    portfolio: Portfolio
    frame: pl.DataFrame
    outcomes: list[SiteOutcome]
    equipment: pl.DataFrame | None = None  # equipment_frame: the long form

    @property
    def failed(self) -> list[SiteOutcome]:
        return [o for o in self.outcomes if o.status != "ok"]


def load_portfolio(path: str | Path) -> Portfolio:
    """A folder of site files, or a portfolio file listing them.

    A folder's sites are every ``*.toml`` directly in it and every ``*/site.toml`` one level
    down (a folder per building, each holding its site.toml).

    Raises:
        ConfigError: no such folder or file, no sites, a bad portfolio file, or two sites
            whose file names would share an output folder.
    """
    from disagg.inputs.config import parse_toml, resolve_path

    path = resolve_path(path, "portfolio")
    history = None
    if path.is_dir():
        sites = sorted((p for p in path.glob("*.toml")
                        if p.is_file() and not p.name.startswith(".")), key=lambda p: p.name)
        sites += sorted((p for p in path.glob("*/site.toml")
                         if p.is_file() and not p.parent.name.startswith(".")),
                        key=lambda p: p.parent.name)
        if not sites:
            raise ConfigError(f"{path}: no *.toml site files in this folder")
    elif path.is_file():
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise ConfigError(f"{path}: cannot read the portfolio file ({exc})") from None
        data = parse_toml(text, path)
        if set(data) != {"portfolio"} or not isinstance(data["portfolio"], dict):
            hint = ("; this looks like a site file: run it with disagg breakdown"
                    if "site" in data else "")
            raise ConfigError(f"{path}: expected only a [portfolio] table with sites = "
                              f"[\"site.toml\", ...]{hint}")
        table = data["portfolio"]
        for key in table:
            if key not in ("sites", "history"):
                import difflib

                near = difflib.get_close_matches(key.lower(), ["history", "sites"], n=1,
                                                 cutoff=0.6)
                hint = f" (did you mean {near[0]}?)" if near else ""
                raise ConfigError(f"{path}: [portfolio] {key}: unknown setting{hint}; expected "
                                  "one of history, sites")
        listed = table.get("sites")
        if not isinstance(listed, list) or not listed:
            raise ConfigError(f"{path}: [portfolio] sites = {listed!r}: expected a list of "
                              "site files such as [\"north-wing.toml\"]")
        sites = []
        for i, s in enumerate(listed):
            if not isinstance(s, str) or not s.strip():
                raise ConfigError(f"{path}: [portfolio] sites[{i}] = {s!r}: expected the path "
                                  "of a site file")
            sites.append((path.parent / s).resolve())
        if "history" in table:
            h = table["history"]
            if not isinstance(h, str) or not h.strip():
                raise ConfigError(f"{path}: [portfolio] history = {h!r}: expected a folder path")
            history = (path.parent / h).resolve()
    else:
        raise ConfigError(f"{path}: no such folder or portfolio file")
    pf = Portfolio(path, tuple(sites), history)
    seen: dict[str, Path] = {}
    for s in sites:
        name = pf.folder_name(s)
        if name in seen:
            raise ConfigError(f"{path}: {seen[name]} and {s} would both write to the output "
                              f"folder {name!r}; give the site files different names")
        seen[name] = s
    from disagg.present.history import site_id

    ids: dict[str, Path] = {}
    for s in sites:
        sid = site_id(s)
        if sid in ids:
            raise ConfigError(f"{path}: {ids[sid]} and {s} would share the history id {sid!r} "
                              "(file names that differ only in characters other than letters, "
                              "digits, '.', '_' and '-'); give the site files different names")
        ids[sid] = s
    return pf


def run_site(job: SiteJob) -> SiteOutcome:
    """One site's whole job; never raises for the site's own problems.

    Reads and fits the site (disagg.analyses.pipeline.breakdown_site), tracks drift when asked
    (disagg.analyses.drift.drift_aligned on the same aligned data, default settings), writes the
    outputs into job.out_dir, and stores the months in the history store when the site file
    or the job names a history folder (checked before any output is written). Any exception
    becomes a failed outcome with a one-line error; nothing is written for a site whose fit,
    drift or history folder failed, and an error storing the history after the outputs were
    written says so.
    """
    t0 = time.perf_counter()
    folder = job.folder
    try:
        outcome = _run_site(job)
    except (KeyboardInterrupt, SystemExit):
        raise
    except DisaggError as exc:
        outcome = SiteOutcome(job.site_file, folder, "failed", _site_name(job.site_file),
                              " ".join(str(exc).split("\n")))
    except BaseException as exc:  # noqa: BLE001 - isolate any failure to its own site
        outcome = SiteOutcome(job.site_file, folder, "failed", _site_name(job.site_file),
                              f"internal error ({type(exc).__name__}: {exc})")
    outcome.seconds = time.perf_counter() - t0
    return outcome


def _site_name(site_file: str) -> str | None:
    from disagg.inputs.config import load_site

    try:
        return load_site(site_file).name
    except Exception:  # noqa: BLE001 - the name is only a label for a failed site
        return None


def _run_site(job: SiteJob) -> SiteOutcome:
    from disagg.jobs.site import BreakdownOptions, run_breakdown

    run = run_breakdown(BreakdownOptions(
        Path(job.site_file), Path(job.out_dir), job.date_from, job.date_to,
        history=Path(job.history) if job.history else None, drift=job.drift,
        drift_reference=job.drift_reference))
    result, drift = run.result if job.drift else (run.result, None)
    site, files = result.site, run.paths
    table = result.breakdown
    periods = table["period"].unique().sort()
    totals = table.group_by("equipment", maintain_order=True).agg(pl.col("kwh").sum())
    hourly = result.fit.fit_quality.get("hourly") or {}
    month_peaks = (table.filter(pl.col("peak_kw").is_not_null())
                   .group_by("period").agg(pl.col("peak_kw").sum())["peak_kw"])
    tariff = result.fit.tariff
    alarms, alarmed, drift_note = _alarms(drift)
    return SiteOutcome(
        site_file=job.site_file, folder=job.folder, status="ok", site=site.name,
        period=f"{periods[0]}..{periods[-1]}", metered_kwh=float(table["kwh"].sum()),
        equipment_kwh={e: float(k) for e, k in totals.iter_rows()},
        months=table.select(EQUIPMENT_COLUMNS[2:]).to_dicts(),
        alarms=alarms, cv_rmse_pct=hourly.get("cv_rmse_pct"), nmbe_pct=hourly.get("nmbe_pct"),
        peak_kw=float(month_peaks.max()) if month_peaks.len() else None,
        cost=float(sum(m.cost for m in tariff.months)) if tariff is not None else None,
        currency=tariff.currency if tariff is not None else None,
        alarm_equipment=alarmed, drift_note=drift_note,
        history_note=" | ".join(run.notes) if run.notes else None,
        files=[str(p) for p in files])


def _alarms(drift) -> tuple[int | None, list[str] | None, str]:
    """(alarm count, alarmed ids, note) of a drift result; no count when the tracker followed
    no day after its reference period (within it, the draws are the reference: 0 alarms
    there would say nothing)."""
    if drift is None:
        return None, None, DRIFT_NOT_RUN
    ref = drift.summary.reference
    dates = drift.table["date"]
    after = dates.filter(dates > dt.date.fromisoformat(ref["to"])).n_unique()
    if after == 0:
        return None, None, (f"no alarm count: no day tracked after the reference period "
                            f"{ref['from']} to {ref['to']} (data to {dates.max()}); alarms "
                            "need data after it: give batch --reference a shorter period")
    alarmed = [a.equipment for a in drift.summary.alarms]
    return len(alarmed), alarmed, (f"{after} day{'s' * (after != 1)} tracked after the "
                                   f"reference period {ref['from']} to {ref['to']}")


def portfolio_frame(outcomes: list[SiteOutcome]) -> pl.DataFrame:
    """One row per site: site, site_file, period, metered_kwh, peak_kw, one ``<row>_kwh``
    column per breakdown row found in any site (equipment in order of first appearance, then
    baseload and unexplained; null where a site has no such row), cost, currency, alarms,
    alarm_equipment (ids joined by ';'), drift_note, hourly_cv_rmse_pct, hourly_nmbe_pct,
    status, error, history_note."""
    rows: list[str] = []
    for o in outcomes:
        rows += [e for e in o.equipment_kwh if e not in rows]
    tail = [e for e in rows if e.startswith("baseload")] + [e for e in rows
                                                             if e == "unexplained"]
    rows = [e for e in rows if e not in tail] + tail
    schema = {"site": pl.String, "site_file": pl.String, "period": pl.String,
              "metered_kwh": pl.Float64, "peak_kw": pl.Float64,
              **{f"{e}_kwh": pl.Float64 for e in rows},
              "cost": pl.Float64, "currency": pl.String, "alarms": pl.Int64,
              "alarm_equipment": pl.String, "drift_note": pl.String,
              "hourly_cv_rmse_pct": pl.Float64, "hourly_nmbe_pct": pl.Float64,
              "status": pl.String, "error": pl.String, "history_note": pl.String}
    data = []
    for o in outcomes:
        data.append({"site": o.site, "site_file": o.site_file, "period": o.period,
                     "metered_kwh": o.metered_kwh, "peak_kw": o.peak_kw,
                     **{f"{e}_kwh": o.equipment_kwh.get(e) for e in rows},
                     "cost": o.cost, "currency": o.currency, "alarms": o.alarms,
                     "alarm_equipment": (None if o.alarm_equipment is None
                                         else ";".join(o.alarm_equipment)),
                     "drift_note": o.drift_note, "hourly_cv_rmse_pct": o.cv_rmse_pct,
                     "hourly_nmbe_pct": o.nmbe_pct, "status": o.status, "error": o.error,
                     "history_note": o.history_note})
    return pl.DataFrame(data, schema=schema, orient="row") if data else pl.DataFrame(schema=schema)


# portfolio_equipment.csv: one row per site, month and breakdown row.
EQUIPMENT_COLUMNS = ["site", "site_name", "period", "equipment", "kwh", "kwh_low", "kwh_high",
                     "share", "flags"]


def equipment_frame(outcomes: list[SiteOutcome]) -> pl.DataFrame:
    """The long form beside portfolio.csv: one row per site, month and breakdown row (columns
    EQUIPMENT_COLUMNS; site = the output folder, which names the site uniquely; site_name = its
    [site] name), so that equipment ids, which belong to their site, are never mixed."""
    schema = {"site": pl.String, "site_name": pl.String, "period": pl.String,
              "equipment": pl.String, "kwh": pl.Float64, "kwh_low": pl.Float64,
              "kwh_high": pl.Float64, "share": pl.Float64, "flags": pl.String}
    data = [{"site": o.folder, "site_name": o.site, **row}
            for o in outcomes if o.status == "ok" for row in o.months]
    return pl.DataFrame(data, schema=schema, orient="row") if data else pl.DataFrame(schema=schema)


def run_portfolio(portfolio: str | Path | Portfolio, out_dir: str | Path,
                  workers: int | None = None, cluster: str | None = None,
                  date_from: dt.date | None = None, date_to: dt.date | None = None,
                  drift: bool = False, progress: Progress | None = None,
                  start_method: str = START_METHOD,
                  drift_reference: tuple[dt.date, dt.date] | None = None) -> PortfolioResult:
    """Run every site of a portfolio; return the portfolio table and each site's outcome.

    Writes each site's outputs into out_dir/<site file name without .toml>/ (and its history)
    from inside its job; writes nothing else (see disagg.present.outputs.write_portfolio).

    Args:
        workers: local worker processes (default: all cores; at most the number of sites).
        cluster: the address of a Dask distributed scheduler (such as tcp://10.0.0.5:8786):
            run the jobs there instead of locally. Every worker needs disagg installed and
            the inputs and out_dir at the same paths.
        drift: also track drift on each site (default settings) and count its alarms.
        progress: called as progress("sites", done, total) as sites finish.
        start_method: multiprocessing start method of the local workers.
        drift_reference: the drift reference period (local dates, inclusive) of every site;
            None: drift's default (each site's first 90 days).

    Raises:
        ConfigError: a bad portfolio, --workers below 1, both workers and cluster, a
            malformed cluster address or a cluster that cannot be reached.
        BatchInterrupted: an interrupt (KeyboardInterrupt) while the sites ran.
    """
    pf = portfolio if isinstance(portfolio, Portfolio) else load_portfolio(portfolio)
    if date_from and date_to and date_to < date_from:
        raise ConfigError(f"--to {date_to} is before --from {date_from}")
    if workers is not None and workers < 1:
        raise ConfigError(f"--workers {workers}: expected 1 or more")
    if workers is not None and cluster is not None:
        raise ConfigError("--workers and --cluster: the cluster's workers run the sites; "
                          "give one of the two")
    if drift_reference is not None and not drift:
        raise ConfigError("--reference: a drift reference period needs --drift")
    if cluster is not None:
        check_cluster_address(cluster)
    out = Path(out_dir).resolve()
    jobs = [SiteJob(str(s), str(out / pf.folder_name(s)), date_from, date_to, drift,
                    str(pf.history) if pf.history else None, drift_reference,
                    pf.folder_name(s))
            for s in pf.sites]
    total = len(jobs)
    report(progress, "sites", 0, total)
    if cluster is not None:
        outcomes = _run_on_cluster(cluster, jobs, progress)
    else:
        outcomes = _run_locally(jobs, workers or os.cpu_count() or 1, start_method, progress)
    return PortfolioResult(pf, portfolio_frame(outcomes), outcomes,
                           equipment_frame(outcomes))


def _lost(job: SiteJob, exc: BaseException | str) -> SiteOutcome:
    """The outcome of a job whose worker died (killed, out of memory) before returning."""
    why = exc if isinstance(exc, str) else f"{type(exc).__name__}: {exc}"
    return SiteOutcome(job.site_file, Path(job.site_file).stem, "failed",
                       _site_name(job.site_file),
                       f"the worker running this site stopped ({why})")


class BatchTerminated(BatchInterrupted):
    """The batch got SIGTERM or SIGHUP: its workers were stopped at once (files they were
    writing are left whole, old or new: see disagg.present.commit)."""

    def __init__(self, signum: int, finished: int, not_run: int) -> None:
        super().__init__(finished, not_run)
        self.signum = signum


class _Terminate(BaseException):
    """Raised in the main thread by the SIGTERM/SIGHUP handler of a local batch."""

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = signum


# Signals that stop a local batch at once (Ctrl-C, SIGINT, stops it gently: see run_portfolio).
TERMINATING_SIGNALS = tuple(getattr(signal, n) for n in ("SIGTERM", "SIGHUP")
                            if hasattr(signal, n))


class _Signals:
    """While a local batch runs (main thread only): SIGTERM and SIGHUP raise _Terminate so
    the pool can be shut, except inside held(), which delays them to its end (a worker half
    started when the batch exits would print a traceback from its start-up)."""

    def __init__(self) -> None:
        self.holding = False
        self.pending: int | None = None

    def handler(self, signum, frame) -> None:
        for sig in TERMINATING_SIGNALS:  # a second signal must not break the clean-up
            signal.signal(sig, signal.SIG_IGN)
        if self.holding:
            self.pending = signum
            return
        raise _Terminate(signum)

    @contextlib.contextmanager
    def held(self):
        self.holding = True
        try:
            yield
        finally:
            self.holding = False
        if self.pending is not None:
            raise _Terminate(self.pending)


@contextlib.contextmanager
def _terminate_on_signals():
    import threading

    signals = _Signals()
    if threading.current_thread() is not threading.main_thread():
        yield signals
        return
    previous = {sig: signal.signal(sig, signals.handler) for sig in TERMINATING_SIGNALS}
    try:
        yield signals
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old if old is not None else signal.SIG_DFL)


# Set in each local worker process (see _init_worker): once set, jobs not yet started return
# at once without running. _STATE[i] says how far job i got: 0 not started, 1 running, 2 done.
_STOP = None
_STATE = None


def _die_with_batch(batch_pid: int) -> None:
    """Start a thread that kills this worker as soon as the batch process exits, even by
    SIGKILL (it then cannot stop its workers). The worker's own parent may be the pool's
    forkserver, which stays alive as long as a worker does, so the batch is watched itself:
    through a pidfd where Linux has them, else by asking every half second."""
    import select
    import threading

    def watch() -> None:
        try:
            fd = os.pidfd_open(batch_pid)
            select.select([fd], [], [])
        except (AttributeError, OSError):  # no pidfd here, or the batch has already gone
            while True:
                try:
                    os.kill(batch_pid, 0)
                except ProcessLookupError:
                    break
                except OSError:
                    pass
                time.sleep(0.5)
        os.kill(os.getpid(), signal.SIGKILL)

    threading.Thread(target=watch, name="disagg-batch-watch", daemon=True).start()


def _init_worker(stop, state, batch_pid: int) -> None:
    """Local worker start-up: ignore Ctrl-C (the parent decides what stops), die with the
    batch, keep the stop flag and the jobs' state array."""
    global _STOP, _STATE
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _die_with_batch(batch_pid)
    _STOP = stop
    _STATE = state


def _run_job(index: int, job: SiteJob) -> SiteOutcome | None:
    """run_site, or None when the batch was interrupted before this job started."""
    if _STOP is not None and _STOP.is_set():
        return None
    if _STATE is not None:
        _STATE[index] = 1
    outcome = run_site(job)
    if _STATE is not None:
        _STATE[index] = 2
    return outcome


def _kill_pool(pool: ProcessPoolExecutor) -> None:
    """Stop a pool's workers now (SIGTERM, then SIGKILL after 2 s) and shut it."""
    procs = list((getattr(pool, "_processes", None) or {}).values())
    for proc in procs:
        with contextlib.suppress(Exception):
            proc.terminate()
    deadline = time.monotonic() + 2.0
    for proc in procs:
        with contextlib.suppress(Exception):
            proc.join(max(0.0, deadline - time.monotonic()))
            if proc.is_alive():
                proc.kill()
                proc.join(1.0)
    with contextlib.suppress(Exception):
        pool.shutdown(wait=False, cancel_futures=True)


def _exit_reason(procs) -> str | None:
    """How dead workers ended, such as 'killed by SIGKILL, as the out-of-memory killer does'."""
    deadline = time.monotonic() + 1.0
    for proc in procs:
        # The pool's own thread may be reaping the process at this moment: ask again.
        while proc.exitcode is None and time.monotonic() < deadline:
            time.sleep(0.02)
    for proc in procs:
        code = proc.exitcode
        if code is not None and code < 0:
            try:
                name = signal.Signals(-code).name
            except ValueError:
                name = f"signal {-code}"
            hint = ", as the out-of-memory killer does" if -code == signal.SIGKILL else ""
            return f"killed by {name}{hint}"
        if code not in (None, 0):
            return f"exit status {code}"
    return None


def _run_locally(jobs: list[SiteJob], workers: int, start_method: str,
                 progress: Progress | None) -> list[SiteOutcome]:
    """Run the jobs on local worker processes.

    A worker that dies (killed, out of memory) breaks its pool; then every job that had not
    started runs again on a fresh pool, and every job that was running (or had finished
    without its result arriving) runs again alone: a job that kills a pool of its own is the
    one that failed, and only it is marked so.
    """
    context = multiprocessing.get_context(start_method)
    outcomes: list[SiteOutcome | None] = [None] * len(jobs)
    counter = [0]
    todo = list(range(len(jobs)))
    suspects: list[int] = []
    idle_breaks = 0
    with _terminate_on_signals() as signals:
        while todo or suspects:
            alone = not todo
            batch = todo if todo else [suspects.pop(0)]
            started, reason = _run_pool(context, jobs, batch, 1 if alone else workers,
                                        outcomes, counter, progress, signals)
            if reason is None:
                todo = [i for i in todo if outcomes[i] is None] if not alone else todo
                continue
            left = [i for i in batch if outcomes[i] is None]
            if alone:
                for i in left:
                    outcomes[i] = _lost(jobs[i], f"{reason}; it stopped again when the site "
                                                 "ran alone")
                    _count(counter, progress, len(jobs))
                continue
            hit = [i for i in left if i in started]
            if not hit:
                idle_breaks += 1
            if idle_breaks >= 2:  # the pool breaks with no job running: not a site's fault
                for i in left:
                    outcomes[i] = _lost(jobs[i], reason)
                    _count(counter, progress, len(jobs))
                left = []
            suspects += hit
            todo = [i for i in left if i not in hit]
    return outcomes  # type: ignore[return-value]


def _count(counter: list[int], progress: Progress | None, total: int) -> None:
    counter[0] += 1
    report(progress, "sites", counter[0], total)


def _run_pool(context, jobs: list[SiteJob], indices: list[int], workers: int,
              outcomes: list, counter: list[int], progress: Progress | None,
              signals: _Signals) -> tuple[set[int], str | None]:
    """Run jobs[indices] on one pool, filling outcomes; return (the indices that had started
    when the pool broke, why it broke), or (set(), None) when it did not break.

    Raises:
        BatchInterrupted: Ctrl-C (the running sites finish first; a second one stops them).
        BatchTerminated: SIGTERM or SIGHUP (the workers are stopped at once).
    """
    stop = context.Event()
    state = context.Array("b", len(jobs), lock=False)
    total = len(jobs)
    pool = ProcessPoolExecutor(max_workers=min(workers, len(indices)), mp_context=context,
                               initializer=_init_worker, initargs=(stop, state, os.getpid()))
    futures = {}
    try:
        try:
            with signals.held():  # submitting starts the workers
                for i in indices:
                    futures[pool.submit(_run_job, i, jobs[i])] = i
        except OSError as exc:  # the start method's server or a worker cannot be started
            _kill_pool(pool)
            raise DisaggError(f"cannot start the local worker processes ({type(exc).__name__}: "
                              f"{exc}); no site was run") from None
        procs = list((getattr(pool, "_processes", None) or {}).values())
        for fut in as_completed(futures):
            i = futures[fut]
            procs = list((getattr(pool, "_processes", None) or {}).values()) or procs
            try:
                outcomes[i] = fut.result()
            except concurrent.futures.process.BrokenProcessPool as exc:
                for f, j in futures.items():  # results that arrived before the break
                    if (outcomes[j] is None and f.done() and not f.cancelled()
                            and f.exception() is None):
                        outcomes[j] = f.result()
                        _count(counter, progress, total)
                started = {j for j in indices if state[j] != 0 and outcomes[j] is None}
                reason = _exit_reason(procs) or f"{type(exc).__name__}: {exc}"
                pool.shutdown(wait=True, cancel_futures=True)
                return started, reason
            except Exception as exc:  # noqa: BLE001 - a result that cannot come back
                outcomes[i] = _lost(jobs[i], exc)
            _count(counter, progress, total)
    except _Terminate as term:
        stop.set()
        _kill_pool(pool)
        finished = sum(o is not None for o in outcomes)
        raise BatchTerminated(term.signum, finished, total - finished) from None
    except KeyboardInterrupt:
        # No site starts after the interrupt (queued ones are cancelled, or see the flag
        # when a worker picks them up); the ones running finish their files, which are
        # written atomically either way. A second interrupt stops them at once.
        stop.set()
        for fut in futures:
            fut.cancel()
        try:
            concurrent.futures.wait(futures)
        except (KeyboardInterrupt, _Terminate):
            _kill_pool(pool)
        for fut, i in futures.items():
            if (outcomes[i] is None and fut.done() and not fut.cancelled()
                    and fut.exception() is None and fut.result() is not None):
                outcomes[i] = fut.result()
        finished = sum(o is not None for o in outcomes)
        raise BatchInterrupted(finished, total - finished) from None
    finally:
        with contextlib.suppress(Exception):
            pool.shutdown(wait=True, cancel_futures=True)
    return set(), None


def check_cluster_address(address: str) -> None:
    """Raise ConfigError unless address looks like tcp://HOST:PORT or tls://HOST:PORT."""
    m = CLUSTER_ADDRESS.fullmatch(address)
    if m is None or not 1 <= int(m.group(3)) <= 65535:
        raise ConfigError(f"--cluster {address}: expected a Dask scheduler address "
                          "tcp://HOST:PORT or tls://HOST:PORT, such as tcp://10.0.0.5:8786")


async def _probe_scheduler(address: str, timeout_s: float) -> None:
    """Connect, shake hands and ask for the identity of what answers at address; raise
    ConfigError when it is not a Dask scheduler. The whole exchange has one deadline:
    Dask's own connect timeout does not cover its handshake, so a server that accepts
    the connection but never answers in Dask's protocol (a web server, the scheduler's
    dashboard port) would otherwise hang the batch."""
    from distributed.comm import connect
    from distributed.security import Security

    async def exchange():
        comm = await connect(address, timeout=timeout_s,
                             **Security().get_connection_args("client"))
        try:
            await comm.write({"op": "identity", "reply": True})
            return await comm.read()
        finally:
            await comm.close()

    try:
        identity = await asyncio.wait_for(exchange(), timeout_s)
    except TimeoutError:
        raise ConfigError(f"--cluster {address}: cannot reach a Dask scheduler there (no "
                          f"answer in Dask's protocol within {timeout_s:g} s)") from None
    except Exception as exc:  # noqa: BLE001 - refused, closed, TLS settings, bad reply, ...
        raise ConfigError(f"--cluster {address}: cannot reach a Dask scheduler there "
                          f"({type(exc).__name__}: {exc})") from None
    kind = identity.get("type") if isinstance(identity, dict) else None
    if kind == "Worker":
        raise ConfigError(f"--cluster {address}: this is a Dask worker; give the scheduler's "
                          "address (the one the workers were started with)")
    if kind is None or "workers" not in identity:
        raise ConfigError(f"--cluster {address}: what answers there is not a Dask scheduler")


def _connect(address: str):
    """A distributed Client connected to the scheduler at address, within
    CLUSTER_CONNECT_TIMEOUT_S (see _probe_scheduler).

    Raises:
        ConfigError: no Dask scheduler answers there in time.
    """
    from distributed import Client

    timeout_s = CLUSTER_CONNECT_TIMEOUT_S
    # In a thread of its own, so a caller already running an event loop (a notebook) works.
    with concurrent.futures.ThreadPoolExecutor(1) as probe:
        probe.submit(asyncio.run, _probe_scheduler(address, timeout_s)).result()

    class _Client(Client):
        """A Client that, when it fails to start, closes at once rather than from __del__
        (which waits twice the timeout at exit and prints a traceback)."""

        def __init__(self, *args, **kwargs):
            try:
                super().__init__(*args, **kwargs)
            except BaseException:
                with contextlib.suppress(Exception):  # already failing; said below
                    self.close(timeout=1)
                self.status = "closed"
                raise

    try:
        return _Client(address, timeout=timeout_s, set_as_default=False)
    except Exception as exc:  # noqa: BLE001 - the scheduler went away since the probe, ...
        raise ConfigError(f"--cluster {address}: cannot reach a Dask scheduler there "
                          f"({type(exc).__name__}: {exc})") from None


class ClusterError(ConfigError):
    """The cluster stopped doing the batch's work: no worker for CLUSTER_IDLE_TIMEOUT_S, or
    the scheduler went away."""


def _live_workers(client) -> int:
    """How many workers the scheduler has now (asks it)."""
    return len(client.nthreads())


def _run_on_cluster(address: str, jobs: list[SiteJob],
                    progress: Progress | None) -> list[SiteOutcome]:
    """Run the jobs on the cluster's workers.

    Raises:
        ClusterError: the scheduler has no worker for CLUSTER_IDLE_TIMEOUT_S (none at the
            start, or the last one stopped), or the connection to it is lost; the sites not
            finished are cancelled.
        BatchInterrupted: Ctrl-C.
    """
    try:
        from distributed import wait as dask_wait
    except ImportError:
        raise ConfigError(f"--cluster {address}: needs dask distributed; install it with "
                          "pip install 'disagg[cluster]'") from None
    with _dask_logs_quiet():
        return _run_with_client(address, _connect(address), jobs, progress, dask_wait)


@contextlib.contextmanager
def _dask_logs_quiet():
    """Keep dask's own log records (a lost scheduler is logged as an ERROR with a traceback
    of some 35 lines) off stderr while the batch runs; what happened is the batch's one
    Error line."""
    import logging

    # Every distributed logger by name: dask's configuration sets some children's levels (a
    # child's record reaches the parent's handlers whatever the parent's level).
    names = ["distributed"] + [n for n in logging.root.manager.loggerDict
                               if n.startswith("distributed.")]
    levels = {n: logging.getLogger(n).level for n in names}
    for n in names:
        logging.getLogger(n).setLevel(logging.CRITICAL + 1)
    try:
        yield
    finally:
        for n, level in levels.items():
            logging.getLogger(n).setLevel(level)


def _run_with_client(address: str, client, jobs: list[SiteJob], progress: Progress | None,
                     dask_wait) -> list[SiteOutcome]:
    outcomes: list[SiteOutcome | None] = [None] * len(jobs)
    total = len(jobs)
    done = 0

    def not_run() -> str:
        finished = sum(o is not None for o in outcomes)
        return f"{finished} site{'s' * (finished != 1)} finished, {total - finished} not run"

    try:
        with client.as_current():
            futures = client.map(run_site, jobs, pure=False)
            index = {f.key: i for i, f in enumerate(futures)}
            pending = set(futures)
            idle_since: float | None = None
            try:
                while pending:
                    try:
                        finished_now, _ = dask_wait(list(pending), timeout=CLUSTER_POLL_S,
                                                    return_when="FIRST_COMPLETED")
                    except TimeoutError:
                        finished_now = set()
                    for fut in finished_now:
                        pending.discard(fut)
                        i = index[fut.key]
                        try:
                            outcomes[i] = fut.result()
                        except (KeyboardInterrupt, SystemExit):
                            raise
                        except BaseException as exc:  # noqa: BLE001 - KilledWorker, cancelled
                            if client.status != "running":
                                raise
                            outcomes[i] = _lost(jobs[i], exc)
                        done += 1
                        report(progress, "sites", done, total)
                    if not pending or finished_now:
                        idle_since = None
                        continue
                    if _live_workers(client) > 0:
                        idle_since = None
                    elif idle_since is None:
                        idle_since = time.monotonic()
                    elif time.monotonic() - idle_since > CLUSTER_IDLE_TIMEOUT_S:
                        client.cancel(list(pending))
                        raise ClusterError(
                            f"--cluster {address}: the scheduler has had no worker for "
                            f"{CLUSTER_IDLE_TIMEOUT_S:g} s, so nothing runs the sites "
                            f"({not_run()}); start workers for it, or run without --cluster")
            except KeyboardInterrupt:
                # Dask cancels the sites not started; a running one finishes on its worker.
                with contextlib.suppress(Exception):
                    client.cancel([f for f in futures if not f.done()])
                finished = sum(o is not None for o in outcomes)
                raise BatchInterrupted(finished, total - finished) from None
    except (ClusterError, BatchInterrupted):
        raise
    except (KeyboardInterrupt, SystemExit):
        raise
    except BaseException as exc:  # noqa: BLE001 - the scheduler went away: closed comm, ...
        text = (str(exc).strip().splitlines() or [""])[0]
        detail = ("" if not text or "cancelled" in type(exc).__name__.lower()
                  else f": {text[:120]}")
        raise ClusterError(f"--cluster {address}: lost the connection to the scheduler "
                           f"({type(exc).__name__}{detail}); {not_run()}") from None
    finally:
        with contextlib.suppress(BaseException):
            client.close(timeout=2)
    return outcomes  # type: ignore[return-value]


@dataclass(frozen=True)
class BatchOptions:
    """Settings of disagg batch (see run_portfolio)."""

    portfolio: Path
    out: Path
    workers: int | None = None
    cluster: str | None = None
    date_from: dt.date | None = None
    date_to: dt.date | None = None
    drift: bool = False
    drift_reference: tuple[dt.date, dt.date] | None = None


def run_batch(opts: BatchOptions, progress: Progress | None = None):
    """Every site's job (run_portfolio), then portfolio.csv; returns a disagg.jobs.site.Run
    whose result is the PortfolioResult. An interrupt (BatchInterrupted) writes no
    portfolio.csv, so a partial table never passes for the portfolio's."""
    from disagg.jobs.site import Run
    from disagg.present.outputs import write_portfolio
    from disagg.present.terminal import portfolio_summary

    t0 = time.perf_counter()
    result = run_portfolio(opts.portfolio, opts.out, opts.workers, opts.cluster, opts.date_from,
                           opts.date_to, opts.drift, progress=progress,
                           drift_reference=opts.drift_reference)
    paths = write_portfolio(result, opts.out)
    return Run(result, portfolio_summary(result, time.perf_counter() - t0), paths)
