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
"""

from __future__ import annotations

import datetime as dt
import multiprocessing
import os
import time
import tomllib
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

from disagg.errors import ConfigError, DisaggError
from disagg.progress import Progress, report

# Start method of the local worker processes. "forkserver": every worker is forked from a
# small server process that has no polars thread pool, so no thread's lock is copied mid-state
# (the hazard of fork once polars or numpy threads exist in the parent). Measured here with 8
# copies of the demo site-year on 2 busy cores: fork, forkserver and spawn within noise of each
# other (1 worker 8.4-11.5 s, 2 workers 4.6-7.0 s), a worker's first site about 0.4 s slower
# than its later ones (imports).
START_METHOD = "forkserver"
# Seconds to wait for a Dask scheduler to answer before giving up.
CLUSTER_CONNECT_TIMEOUT_S = 20


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
    alarms: int | None = None  # drift alarms (None when drift was not run)
    cv_rmse_pct: float | None = None  # hourly, ASHRAE Guideline 14 form
    nmbe_pct: float | None = None
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

    Reads and fits the site (disagg.pipeline.breakdown_site), tracks drift when asked
    (disagg.drift.drift_aligned on the same aligned data, default settings), writes the
    outputs into job.out_dir, and stores the months in the history store when the site file
    or the job names a history folder. Any exception becomes a failed outcome with a
    one-line error; nothing is written for a site whose fit or drift failed.
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
    from disagg.config import load_site

    try:
        return load_site(site_file).name
    except Exception:  # noqa: BLE001 - the name is only a label for a failed site
        return None


def _run_site(job: SiteJob) -> SiteOutcome:
    from disagg.outputs import write_breakdown, write_drift
    from disagg.pipeline import breakdown_site

    result = breakdown_site(job.site_file, job.date_from, job.date_to)
    drift = None
    if job.drift:
        from disagg.drift import drift_aligned

        drift = drift_aligned(result.site, result.aligned)
    out = Path(job.out_dir)
    site = result.site
    files = write_breakdown(result, out)
    if drift is not None:
        files += write_drift(drift, out, [site.path, site.meter.file, site.runlog.file])
    history = site.history or (Path(job.history) if job.history else None)
    if history is not None:
        from disagg.history import store_breakdown, store_drift

        files += store_breakdown(history, result)
        if drift is not None:
            files += store_drift(history, site, drift)
    table = result.breakdown
    periods = table["period"].unique().sort()
    totals = table.group_by("equipment", maintain_order=True).agg(pl.col("kwh").sum())
    hourly = result.fit.get("fit_quality", {}).get("hourly") or {}
    return SiteOutcome(
        site_file=job.site_file, folder=Path(job.site_file).stem, status="ok", site=site.name,
        period=f"{periods[0]}..{periods[-1]}", metered_kwh=float(table["kwh"].sum()),
        equipment_kwh={e: float(k) for e, k in totals.iter_rows()},
        alarms=None if drift is None else len(drift.summary["alarms"]),
        cv_rmse_pct=hourly.get("cv_rmse_pct"), nmbe_pct=hourly.get("nmbe_pct"),
        files=[str(p) for p in files])


def portfolio_frame(outcomes: list[SiteOutcome]) -> pl.DataFrame:
    """One row per site: site, site_file, period, metered_kwh, one ``<row>_kwh`` column per
    breakdown row found in any site (equipment in order of first appearance, then baseload
    and unexplained; null where a site has no such row), alarms, hourly_cv_rmse_pct,
    hourly_nmbe_pct, status, error."""
    rows: list[str] = []
    for o in outcomes:
        rows += [e for e in o.equipment_kwh if e not in rows]
    tail = [e for e in rows if e.startswith("baseload")] + [e for e in rows
                                                             if e == "unexplained"]
    rows = [e for e in rows if e not in tail] + tail
    schema = {"site": pl.String, "site_file": pl.String, "period": pl.String,
              "metered_kwh": pl.Float64, **{f"{e}_kwh": pl.Float64 for e in rows},
              "alarms": pl.Int64, "hourly_cv_rmse_pct": pl.Float64,
              "hourly_nmbe_pct": pl.Float64, "status": pl.String, "error": pl.String}
    data = []
    for o in outcomes:
        data.append({"site": o.site, "site_file": o.site_file, "period": o.period,
                     "metered_kwh": o.metered_kwh,
                     **{f"{e}_kwh": o.equipment_kwh.get(e) for e in rows},
                     "alarms": o.alarms, "hourly_cv_rmse_pct": o.cv_rmse_pct,
                     "hourly_nmbe_pct": o.nmbe_pct, "status": o.status, "error": o.error})
    return pl.DataFrame(data, schema=schema, orient="row") if data else pl.DataFrame(schema=schema)


def run_portfolio(portfolio: str | Path | Portfolio, out_dir: str | Path,
                  workers: int | None = None, cluster: str | None = None,
                  date_from: dt.date | None = None, date_to: dt.date | None = None,
                  drift: bool = False, progress: Progress | None = None,
                  start_method: str = START_METHOD) -> PortfolioResult:
    """Run every site of a portfolio; return the portfolio table and each site's outcome.

    Writes each site's outputs into out_dir/<site file name without .toml>/ (and its history)
    from inside its job; writes nothing else (see disagg.outputs.write_portfolio).

    Args:
        workers: local worker processes (default: all cores; at most the number of sites).
        cluster: the address of a Dask distributed scheduler (such as tcp://10.0.0.5:8786):
            run the jobs there instead of locally. Every worker needs disagg installed and
            the inputs and out_dir at the same paths.
        drift: also track drift on each site (default settings) and count its alarms.
        progress: called as progress("sites", done, total) as sites finish.
        start_method: multiprocessing start method of the local workers.

    Raises:
        ConfigError: a bad portfolio, --workers below 1, both workers and cluster, or a
            cluster that cannot be reached.
    """
    pf = portfolio if isinstance(portfolio, Portfolio) else load_portfolio(portfolio)
    if date_from and date_to and date_to < date_from:
        raise ConfigError(f"--to {date_to} is before --from {date_from}")
    if workers is not None and workers < 1:
        raise ConfigError(f"--workers {workers}: expected 1 or more")
    if workers is not None and cluster is not None:
        raise ConfigError("--workers and --cluster: the cluster's workers run the sites; "
                          "give one of the two")
    out = Path(out_dir).resolve()
    jobs = [SiteJob(str(s), str(out / s.stem), date_from, date_to, drift,
                    str(pf.history) if pf.history else None) for s in pf.sites]
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


def _run_locally(jobs: list[SiteJob], workers: int, start_method: str,
                 progress: Progress | None) -> list[SiteOutcome]:
    context = multiprocessing.get_context(start_method)
    outcomes: list[SiteOutcome | None] = [None] * len(jobs)
    with ProcessPoolExecutor(max_workers=min(workers, len(jobs)), mp_context=context) as pool:
        futures = {pool.submit(run_site, job): i for i, job in enumerate(jobs)}
        try:
            for done, fut in enumerate(as_completed(futures), start=1):
                i = futures[fut]
                try:
                    outcomes[i] = fut.result()
                except Exception as exc:  # noqa: BLE001 - BrokenProcessPool and the like
                    outcomes[i] = _lost(jobs[i], exc)
                report(progress, "sites", done, len(jobs))
        except KeyboardInterrupt:
            # Stop at once: sites not started are dropped, running ones finish their writes.
            pool.shutdown(wait=False, cancel_futures=True)
            raise
    return outcomes  # type: ignore[return-value]


def _run_on_cluster(address: str, jobs: list[SiteJob],
                    progress: Progress | None) -> list[SiteOutcome]:
    try:
        from distributed import Client
        from distributed import as_completed as dask_completed
    except ImportError:
        raise ConfigError(f"--cluster {address}: needs dask distributed; install it with "
                          "pip install 'disagg[cluster]'") from None
    try:
        client = Client(address, timeout=CLUSTER_CONNECT_TIMEOUT_S, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise ConfigError(f"--cluster {address}: cannot reach a Dask scheduler there "
                          f"({type(exc).__name__}: {exc})") from None
    outcomes: list[SiteOutcome | None] = [None] * len(jobs)
    try:
        with client.as_current():
            futures = client.map(run_site, jobs, pure=False)
            index = {f.key: i for i, f in enumerate(futures)}
            for done, fut in enumerate(dask_completed(futures), start=1):
                i = index[fut.key]
                try:
                    outcomes[i] = fut.result()
                except Exception as exc:  # noqa: BLE001 - a worker died (KilledWorker, ...)
                    outcomes[i] = _lost(jobs[i], exc)
                report(progress, "sites", done, len(jobs))
    finally:
        client.close()
    return outcomes  # type: ignore[return-value]


# Sites listed one per line in the terminal summary; portfolio.csv always has them all.
SUMMARY_MAX_SITES = 50


def _f(x: float | None, digits: int = 1) -> str:
    return "-" if x is None else f"{x:,.{digits}f}"


def portfolio_summary(result: PortfolioResult, seconds: float | None = None) -> str:
    """A short table of the sites (the first SUMMARY_MAX_SITES), counts and the caution."""
    from disagg.pipeline import CAUTION

    n, failed = len(result.outcomes), len(result.failed)
    took = f" in {seconds:,.1f} s" if seconds is not None else ""
    lines = [(f"{result.portfolio.source}: {n} site{'s' * (n != 1)}, {n - failed} ok, "
              f"{failed} failed{took}"),
             (f"{'site':<28} {'period':<16} {'metered kWh':>12} {'alarms':>6} "
              f"{'CV(RMSE) %':>10} {'NMBE %':>7}  status")]
    for o in result.outcomes[:SUMMARY_MAX_SITES]:
        label = o.folder if o.site is None else o.site
        lines.append(f"{label[:28]:<28} {o.period or '-':<16} {_f(o.metered_kwh, 0):>12} "
                     f"{'-' if o.alarms is None else o.alarms:>6} {_f(o.cv_rmse_pct):>10} "
                     f"{_f(o.nmbe_pct, 2):>7}  {o.status}")
    if n > SUMMARY_MAX_SITES:
        lines.append(f"... and {n - SUMMARY_MAX_SITES} more sites: see portfolio.csv")
    if all(o.alarms is None for o in result.outcomes):
        lines.append("alarms: drift not tracked (add --drift to count drift alarms)")
    lines.append("CV(RMSE) and NMBE: hourly, as ASHRAE Guideline 14 defines them (criteria 30 % "
                 "and 10 %); each site's details are in its folder's fit.json")
    lines += ["", f"Caution: {CAUTION}"]
    return "\n".join(lines)
