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
import tomllib
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


@dataclass
class SiteOutcome:
    """What one site's job returns: plain data, the same wherever the job ran."""

    site_file: str
    folder: str  # the output folder's name (the site file's name without .toml)
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


@dataclass
class PortfolioResult:
    """The portfolio table (one row per site, in portfolio order) and every site's outcome."""

    portfolio: Portfolio
    frame: pl.DataFrame
    outcomes: list[SiteOutcome]

    @property
    def failed(self) -> list[SiteOutcome]:
        return [o for o in self.outcomes if o.status != "ok"]


def load_portfolio(path: str | Path) -> Portfolio:
    """A folder of site files, or a portfolio file listing them.

    Raises:
        ConfigError: no such folder or file, no sites, a bad portfolio file, or two sites
            whose file names would share an output folder.
    """
    path = Path(path).resolve()
    history = None
    if path.is_dir():
        sites = sorted((p for p in path.glob("*.toml")
                        if p.is_file() and not p.name.startswith(".")), key=lambda p: p.name)
        if not sites:
            raise ConfigError(f"{path}: no *.toml site files in this folder")
    elif path.is_file():
        try:
            data = tomllib.loads(path.read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError) as exc:
            raise ConfigError(f"{path}: cannot read the portfolio file ({exc})") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"{path}: not valid TOML ({exc})") from None
        if set(data) != {"portfolio"} or not isinstance(data["portfolio"], dict):
            hint = ("; this looks like a site file: run it with disagg breakdown"
                    if "site" in data else "")
            raise ConfigError(f"{path}: expected only a [portfolio] table with sites = "
                              f"[\"site.toml\", ...]{hint}")
        table = data["portfolio"]
        for key in table:
            if key not in ("sites", "history"):
                raise ConfigError(f"{path}: [portfolio] {key}: unknown setting; expected one "
                                  "of history, sites")
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
    seen: dict[str, Path] = {}
    for s in sites:
        if s.stem in seen:
            raise ConfigError(f"{path}: {seen[s.stem]} and {s} would both write to the output "
                              f"folder {s.stem!r}; give the site files different names")
        seen[s.stem] = s
    return Portfolio(path, tuple(sites), history)


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
    folder = Path(job.site_file).stem
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
    hourly = result.fit.get("fit_quality", {}).get("hourly") or {}
    month_peaks = (table.filter(pl.col("peak_kw").is_not_null())
                   .group_by("period").agg(pl.col("peak_kw").sum())["peak_kw"])
    tariff = result.fit.get("tariff")
    alarms, alarmed, drift_note = _alarms(drift)
    return SiteOutcome(
        site_file=job.site_file, folder=Path(job.site_file).stem, status="ok", site=site.name,
        period=f"{periods[0]}..{periods[-1]}", metered_kwh=float(table["kwh"].sum()),
        equipment_kwh={e: float(k) for e, k in totals.iter_rows()},
        alarms=alarms, cv_rmse_pct=hourly.get("cv_rmse_pct"), nmbe_pct=hourly.get("nmbe_pct"),
        peak_kw=float(month_peaks.max()) if month_peaks.len() else None,
        cost=float(sum(m["cost"] for m in tariff["months"])) if tariff else None,
        currency=tariff["currency"] if tariff else None,
        alarm_equipment=alarmed, drift_note=drift_note,
        history_note=" | ".join(run.notes) if run.notes else None,
        files=[str(p) for p in files])


def _alarms(drift) -> tuple[int | None, list[str] | None, str]:
    """(alarm count, alarmed ids, note) of a drift result; no count when the tracker followed
    no day after its reference period (within it, the draws are the reference: 0 alarms
    there would say nothing)."""
    if drift is None:
        return None, None, DRIFT_NOT_RUN
    ref = drift.summary["reference"]
    dates = drift.table["date"]
    after = dates.filter(dates > dt.date.fromisoformat(ref["to"])).n_unique()
    if after == 0:
        return None, None, (f"no alarm count: no day tracked after the reference period "
                            f"{ref['from']} to {ref['to']} (data to {dates.max()}); alarms "
                            "need data after it: give batch --reference a shorter period")
    alarmed = [a["equipment"] for a in drift.summary["alarms"]]
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
    jobs = [SiteJob(str(s), str(out / s.stem), date_from, date_to, drift,
                    str(pf.history) if pf.history else None, drift_reference)
            for s in pf.sites]
    total = len(jobs)
    report(progress, "sites", 0, total)
    if cluster is not None:
        outcomes = _run_on_cluster(cluster, jobs, progress)
    else:
        outcomes = _run_locally(jobs, workers or os.cpu_count() or 1, start_method, progress)
    return PortfolioResult(pf, portfolio_frame(outcomes), outcomes)


def _lost(job: SiteJob, exc: BaseException) -> SiteOutcome:
    """The outcome of a job whose worker died (killed, out of memory) before returning."""
    return SiteOutcome(job.site_file, Path(job.site_file).stem, "failed",
                       _site_name(job.site_file),
                       f"the worker running this site stopped ({type(exc).__name__}: {exc})")


# Set in each local worker process (see _init_worker): once set, jobs not yet started return
# at once without running.
_STOP = None


def _init_worker(stop) -> None:
    """Local worker start-up: ignore Ctrl-C (the parent decides what stops) and keep the stop
    flag."""
    global _STOP
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _STOP = stop


def _run_job(job: SiteJob) -> SiteOutcome | None:
    """run_site, or None when the batch was interrupted before this job started."""
    if _STOP is not None and _STOP.is_set():
        return None
    return run_site(job)


def _run_locally(jobs: list[SiteJob], workers: int, start_method: str,
                 progress: Progress | None) -> list[SiteOutcome]:
    context = multiprocessing.get_context(start_method)
    stop = context.Event()
    outcomes: list[SiteOutcome | None] = [None] * len(jobs)
    with ProcessPoolExecutor(max_workers=min(workers, len(jobs)), mp_context=context,
                             initializer=_init_worker, initargs=(stop,)) as pool:
        futures = {pool.submit(_run_job, job): i for i, job in enumerate(jobs)}
        try:
            for done, fut in enumerate(as_completed(futures), start=1):
                i = futures[fut]
                try:
                    outcomes[i] = fut.result()
                except Exception as exc:  # noqa: BLE001 - BrokenProcessPool and the like
                    outcomes[i] = _lost(jobs[i], exc)
                report(progress, "sites", done, len(jobs))
        except KeyboardInterrupt:
            # No site starts after the interrupt (queued ones are cancelled, or see the flag
            # when a worker picks them up); the ones running finish their files, which are
            # written atomically either way. A second interrupt stops them at once.
            stop.set()
            for fut in futures:
                fut.cancel()
            try:
                concurrent.futures.wait(futures)
            except KeyboardInterrupt:
                for proc in list((getattr(pool, "_processes", None) or {}).values()):
                    proc.terminate()
            finished = sum(1 for f in futures if f.done() and not f.cancelled()
                           and f.exception() is None and f.result() is not None)
            raise BatchInterrupted(finished, len(jobs) - finished) from None
    return outcomes  # type: ignore[return-value]


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


def _run_on_cluster(address: str, jobs: list[SiteJob],
                    progress: Progress | None) -> list[SiteOutcome]:
    try:
        from distributed import as_completed as dask_completed
    except ImportError:
        raise ConfigError(f"--cluster {address}: needs dask distributed; install it with "
                          "pip install 'disagg[cluster]'") from None
    client = _connect(address)
    outcomes: list[SiteOutcome | None] = [None] * len(jobs)
    try:
        with client.as_current():
            futures = client.map(run_site, jobs, pure=False)
            index = {f.key: i for i, f in enumerate(futures)}
            try:
                for done, fut in enumerate(dask_completed(futures), start=1):
                    i = index[fut.key]
                    try:
                        outcomes[i] = fut.result()
                    except Exception as exc:  # noqa: BLE001 - a worker died (KilledWorker, ...)
                        outcomes[i] = _lost(jobs[i], exc)
                    report(progress, "sites", done, len(jobs))
            except KeyboardInterrupt:
                # Dask cancels the sites not started; a running one finishes on its worker.
                client.cancel([f for f in futures if not f.done()])
                finished = sum(o is not None for o in outcomes)
                raise BatchInterrupted(finished, len(jobs) - finished) from None
    finally:
        client.close()
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
