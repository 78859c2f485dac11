"""Portfolio benchmark: speed and memory of disagg on synthetic site-years, next to the
straightforward approach a user would otherwise write. A script, not a test.

Usage: python bench/portfolio.py [--sites N] [--quick] [--keep DIR]

Generates N synthetic sites (bench/_synth_portfolio.py: one year of 15-minute data, 20
loads, ~300k event-log rows each, known truth) and one site-year of 1-minute data with 50
loads, then measures, and writes the table to bench/RESULTS.md (replaced on every run):

- `disagg breakdown SITE --out DIR` end-to-end as a fresh process (process start included),
  each site once after one untimed run (the generated files synced to disk first): median
  seconds per site-year, max RSS of the process (os.wait4);
- in a fresh process per site, each step alone (the better of two runs, so imports and
  caches are warm; wall and CPU time): reading, alignment, the whole-range fit (with the
  baseload form comparison), the 12 monthly fits as a breakdown does them (each month
  reusing the range's form choice, disagg.analyses.pipeline.monthly_fits), the drift
  tracker (disagg.analyses.drift.drift_site, and disagg.analyses.track.nlms alone inside it);
- `disagg batch FOLDER --out DIR --workers 1` and `--workers 2`: portfolio throughput, and
  from it the time for 1,000 site-years on 2 cores;
- max RSS of the breakdown of the 1-minute, 50-load site-year;
- process start-up alone (a process that imports what a breakdown imports), also once
  without disagg's compiled bytecode;
- the straightforward approach (pandas reads the CSV files, a Python loop over the run log's
  on-spells builds the run-hours of every interval, statsmodels OLS with Newey-West HAC
  covariance for the whole year and each of the 12 months) as a fresh process on the same
  files: its time, disagg's speed as a ratio to it (wall and CPU time), and both
  approaches' errors against the true draws.

Every wall time is next to the 1-minute load average when it was taken: the machine may be
shared, and other work inflates wall times but hardly CPU times.

Installed copy: the README installs disagg with `pip install .`, so the timed `disagg` is a
normal (non-editable) install of the working tree: `pip install --no-deps --target` into a
temporary folder (pip builds the wheel and compiles the modules, as for a user), run by a
temporary venv (`python -m venv --without-pip`) whose one .pth file puts that folder and then
this environment's site-packages on the path (for numpy, polars, scipy, typer; their own .pth
files, such as an editable install's finder, are not run). The editable install of the source
tree this script runs from pays its import finder on every start (about 0.025 s): its
breakdown is timed too, taken in turn with the installed copy's, and reported beside it. When
the copy cannot be made (pip fails, say without the build backend), everything is timed on
the editable install and the results say so.

Bytecode: `pip install .` compiles a package's modules when it installs them, so an installed
disagg (like pandas and statsmodels beside it) starts from compiled bytecode. From a source
tree (an editable install) with PYTHONDONTWRITEBYTECODE=1 set, every process would compile
disagg's modules again (about 0.1 s, not what a user's install does): for the editable runs
the benchmark compiles them first (compileall, as pip does; the __pycache__ folders it made
are removed at the end) and reports start-up both ways.

--quick: 3 sites (the default is 8). --keep DIR: generate into DIR and keep the files.
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # before numpy: single-threaded BLAS, as disagg runs

import argparse
import datetime as dt
import json
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "RESULTS.md"
# Targets of issue 5 (project choices, no outside source).
TARGET_SITE_S = 1.5
TARGET_RATIO = 6.0
TARGET_PORTFOLIO_S = 600.0
TARGET_PEAK_MB = 1024.0
PORTFOLIO_SITE_YEARS = 1000


# --- the straightforward approach (run as its own process: --naive SITE.toml OUT.json) -------

def naive(site_toml: Path) -> dict:
    """What a user would write without disagg: pandas, a Python loop, statsmodels OLS + HAC.

    Returns the draws [kW] of the whole year and of each month, and the time of each step.
    """
    times = {}
    t0 = time.perf_counter()
    import tomllib

    import numpy as np
    import pandas as pd
    import statsmodels.api as sm

    times["import_s"] = time.perf_counter() - t0
    t = time.perf_counter()
    cfg = tomllib.loads(site_toml.read_text())
    folder = site_toml.parent
    step_min = cfg["meter"]["interval_minutes"]
    meter = pd.read_csv(folder / cfg["meter"]["file"])
    end = pd.to_datetime(meter["reading_end"], utc=True, format="ISO8601")
    start = end - pd.Timedelta(minutes=step_min)
    log = pd.read_csv(folder / cfg["runlog"]["file"])
    log["time"] = pd.to_datetime(log["time"], utc=True, format="ISO8601")
    log["on"] = log["state"].str.lower().eq("on")
    times["read_s"] = time.perf_counter() - t

    t = time.perf_counter()
    ids = [e["id"] for e in cfg["equipment"]]
    n = len(meter)
    t0_ns = int(start.iloc[0].value)  # Timestamp.value: always nanoseconds
    step_ns = step_min * 60 * 1_000_000_000
    hours = np.zeros((n, len(ids)))
    for j, eid in enumerate(ids):
        g = log[log["point"] == eid].sort_values("time", kind="stable")
        stamps = g["time"].dt.as_unit("ns").astype("int64").to_numpy()
        on = g["on"].to_numpy()
        for a, b, s in zip(stamps[:-1], stamps[1:], on[:-1]):
            if not s:
                continue
            for k in range((a - t0_ns) // step_ns, (b - 1 - t0_ns) // step_ns + 1):
                if 0 <= k < n:
                    lo = max(a, t0_ns + k * step_ns)
                    hi = min(b, t0_ns + (k + 1) * step_ns)
                    hours[k, j] += (hi - lo) / 3.6e12
    local = start.dt.tz_convert(cfg["site"]["timezone"])
    wd, hr = local.dt.day_of_week.to_numpy(), local.dt.hour.to_numpy()
    occupied = ((wd < 5) & (hr >= 7) & (hr < 19)) | ((wd == 5) & (hr >= 8) & (hr < 13))
    length_h = step_min / 60.0
    X = np.column_stack([hours, occupied * length_h, (~occupied) * length_h])
    y = meter["kwh"].to_numpy(dtype=float)
    times["hours_matrix_s"] = time.perf_counter() - t

    def fit(rows) -> dict:
        lag = int(4 * (rows.sum() / 100.0) ** (2.0 / 9.0))  # Newey-West (1994) rule
        res = sm.OLS(y[rows], X[rows]).fit(cov_type="HAC", cov_kwds={"maxlags": lag})
        return {e: float(b) for e, b in zip(ids, res.params[:len(ids)])}

    t = time.perf_counter()
    whole = fit(np.ones(n, dtype=bool))
    times["fit_whole_s"] = time.perf_counter() - t
    t = time.perf_counter()
    month = local.dt.strftime("%Y-%m").to_numpy()
    months = {m: fit(month == m) for m in sorted(set(month))}
    times["fit_months_s"] = time.perf_counter() - t
    times["total_in_process_s"] = time.perf_counter() - t0
    return {"draws": whole, "months": months, "times": times}


# --- disagg's steps alone (run as its own process: --stages SITE.toml OUT.json) -------------

def stages(site_toml: Path) -> dict:
    """Each step of a breakdown and the drift tracker, timed alone (best of two runs)."""
    import disagg.analyses.drift as drift_mod
    from disagg.analyses.pipeline import monthly_fits
    from disagg.fit.align import align
    from disagg.inputs.config import load_site
    from disagg.fit.estimate import estimate_draws
    from disagg.inputs.readers import read_meter, read_runlog

    nlms_s = []
    real_nlms = drift_mod.nlms

    def timed_nlms(*args, **kwargs):
        t = time.perf_counter()
        out = real_nlms(*args, **kwargs)
        nlms_s.append(time.perf_counter() - t)
        return out

    drift_mod.nlms = timed_nlms
    best: dict[str, float] = {}

    def clock(name: str, fn, *args):
        t, c = time.perf_counter(), time.process_time()
        out = fn(*args)
        best[name] = min(best.get(name, float("inf")), time.perf_counter() - t)
        best[name + "_cpu"] = min(best.get(name + "_cpu", float("inf")),
                                  time.process_time() - c)
        return out

    for _ in range(2):
        site = load_site(site_toml)
        meter = clock("read_meter_s", read_meter, site.meter, site.timezone)
        runlog = clock("read_runlog_s", read_runlog, site.runlog, site)
        aligned = clock("align_s", align, site, meter, runlog)
        whole = clock("fit_whole_s", estimate_draws, site, aligned)
        clock("fit_12_months_s", monthly_fits, site, aligned, whole, whole.confidence)
        clock("drift_site_s", drift_mod.drift_site, site_toml)
    best["nlms_s"] = min(nlms_s)
    best["load"] = os.getloadavg()[0]
    return best


def office_fits() -> dict:
    """The slow baseload forms: the whole-range fit and the monthly fits of the synthetic
    office year (tests/synthetic.make_office, seed 0) whose data choose the hour-of-week
    profile with the schedule-edge slots and the wandering level (scenarios swing and all);
    best of two runs, wall and CPU time."""
    sys.path.insert(0, str(HERE.parent / "tests"))
    from synthetic import make_office

    from disagg.analyses.pipeline import monthly_fits
    from disagg.fit.estimate import estimate_draws

    out = {}
    for scenario in ("swing", "all"):
        s = make_office(0, scenario)
        best = (float("inf"), float("inf"))
        for _ in range(2):
            t, c = time.perf_counter(), time.process_time()
            e = estimate_draws(s.site, s.aligned)
            monthly_fits(s.site, s.aligned, e, e.confidence)
            best = min(best, (time.perf_counter() - t, time.process_time() - c))
        out[scenario] = {"wall_s": best[0], "cpu_s": best[1], "form": e.form.form.name,
                         "load": os.getloadavg()[0]}
    return out


# --- measuring ------------------------------------------------------------------------------

def run(cmd: list[str], env: dict[str, str] | None = None, cwd: str | None = None) -> dict:
    """Run cmd; wall time [s], CPU time [s], max RSS [MB] of the process, exit status.

    The max RSS comes from GNU time (/usr/bin/time) when present: the rusage of a child
    forked from this (large) process would count this process's memory until the exec.
    """
    gnu_time = Path("/usr/bin/time")
    with tempfile.TemporaryDirectory() as tmp:
        stats = Path(tmp) / "time.txt"
        full = ([str(gnu_time), "-f", "%M %U %S", "-o", str(stats)] + cmd
                if gnu_time.exists() else cmd)
        t = time.perf_counter()
        proc = subprocess.Popen(full, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                                env=None if env is None else {**os.environ, **env}, cwd=cwd)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t
        err = proc.stderr.read().decode(errors="replace") if proc.stderr else ""
        proc.stderr.close()
        rss_mb, cpu = usage.ru_maxrss / 1024.0, usage.ru_utime + usage.ru_stime
        if gnu_time.exists() and stats.exists():
            last = stats.read_text().split()[-3:]
            rss_mb, cpu = int(last[0]) / 1024.0, float(last[1]) + float(last[2])
    return {"wall_s": wall, "cpu_s": cpu, "rss_mb": rss_mb,
            "ok": os.waitstatus_to_exitcode(status) == 0,
            "stderr": err.strip().splitlines()[-1:] if err.strip() else []}


# What a breakdown imports before it runs (the start-up measure), as the `disagg` command
# does it (disagg.cli.main: no cyclic garbage collection during the imports, no interpreter
# teardown).
STARTUP_IMPORTS = "import gc; gc.disable(); import os, disagg.cli, disagg.jobs.site; os._exit(0)"


def disagg_package() -> Path:
    import disagg

    return Path(disagg.__file__).resolve().parent


def compile_disagg() -> list[Path]:
    """Compile disagg's modules to bytecode as `pip install` does (compileall); the
    __pycache__ folders made, for removal at the end."""
    import compileall

    package = disagg_package()
    before = set(package.rglob("__pycache__"))
    compileall.compile_dir(str(package), quiet=1)
    return sorted(set(package.rglob("__pycache__")) - before)


def startups(installed: Install | None, n: int = 5) -> dict[str, tuple[float, float]]:
    """Median wall and CPU time [s] of a process that imports what a breakdown imports, by
    kind: "installed" (the installed copy, when made), "editable" (this environment, with
    disagg's bytecode) and "source" (a copy of the package without __pycache__ first on the
    path, PYTHONDONTWRITEBYTECODE=1: every process compiles disagg's modules); the kinds
    taken in turn, so all see the same load."""
    # Run from an empty folder: `python -c` puts the working folder first on the path, and
    # a checkout's own disagg there would be imported instead of the one meant.
    with tempfile.TemporaryDirectory() as src, tempfile.TemporaryDirectory() as here:
        shutil.copytree(disagg_package(), Path(src) / "disagg",
                        ignore=shutil.ignore_patterns("__pycache__"))
        kinds = {"editable": (sys.executable, None),
                 "source": (sys.executable, {"PYTHONPATH": src, "PYTHONDONTWRITEBYTECODE": "1"})}
        if installed is not None:
            kinds = {"installed": (installed.python, None), **kinds}
        runs: dict[str, list[dict]] = {k: [] for k in kinds}
        for _ in range(n):
            for kind, (python, env) in kinds.items():
                runs[kind].append(run([python, "-c", STARTUP_IMPORTS], env, here))
    med = statistics.median
    return {k: (med(r["wall_s"] for r in v), med(r["cpu_s"] for r in v)) for k, v in runs.items()}


def disagg_exe() -> str:
    exe = Path(sys.executable).with_name("disagg")
    return str(exe) if exe.exists() else (shutil.which("disagg") or "disagg")


@dataclass
class Install:
    """A way to run disagg: its interpreter and its `disagg` command, and what it is."""

    python: str
    exe: str
    kind: str


def installed_copy(folder: Path) -> Install | None:
    """A normal (non-editable) install of the working tree, as `pip install .` makes it (see
    the module's docstring); None when pip cannot make it."""
    import sysconfig

    target, venv, src = folder / "site", folder / "venv", folder / "src"
    # pip builds from a copy of what the package is made of, so the working tree gets no
    # build/ folder (whose stale files a later build could pick up).
    src.mkdir(parents=True)
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(HERE.parent / name, src / name)
    shutil.copytree(HERE.parent / "disagg", src / "disagg",
                    ignore=shutil.ignore_patterns("__pycache__"))
    try:
        subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps",
                        "--disable-pip-version-check", "--target", str(target), str(src)],
                       check=True, capture_output=True, timeout=600)
        subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True,
                       capture_output=True, timeout=120)
    except (OSError, subprocess.SubprocessError):
        return None
    python = venv / "bin" / "python"
    purelib = subprocess.run([str(python), "-c", "import sysconfig; "
                              "print(sysconfig.get_paths()['purelib'])"], check=True,
                             capture_output=True, text=True).stdout.strip()
    here = dict.fromkeys([sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]])
    Path(purelib, "disagg_bench.pth").write_text("\n".join([str(target), *here]) + "\n")
    # The console script pip writes for [project.scripts] disagg = "disagg.cli:main".
    exe = venv / "bin" / "disagg"
    exe.write_text(f"#!{python}\nimport sys\nfrom disagg.cli import main\n"
                   "if __name__ == '__main__':\n    sys.exit(main())\n")
    exe.chmod(0o755)
    # From the install folder: `python -c` puts the working folder first on the path, and a
    # checkout's own disagg there would be found instead.
    check = subprocess.run([str(python), "-c", "import disagg; print(disagg.__file__)"],
                           capture_output=True, text=True, cwd=folder)
    if check.returncode != 0 or not check.stdout.strip().startswith(str(target)):
        return None
    return Install(str(python), str(exe), "installed")


def child_json(args: list[str]) -> tuple[dict, dict]:
    """Run this script in a child mode that writes JSON; (its JSON, run())."""
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "out.json"
        r = run([sys.executable, str(Path(__file__).resolve())] + args + [str(out)])
        if not r["ok"]:
            raise RuntimeError(f"{args}: {r['stderr']}")
        return json.loads(out.read_text()), r


def draw_errors(draws: dict[str, float], truth: dict[str, float]) -> list[float]:
    """Relative error of each load's draw (loads reported under their own id)."""
    return [abs(draws[e] - kw) / kw for e, kw in truth.items()
            if e in draws and draws[e] is not None]


def disagg_draws(fit_json: Path) -> tuple[dict, dict]:
    fit = json.loads(fit_json.read_text())
    whole = {d["equipment"]: d["kw"] for d in fit["draws"]}
    months = {m: {d["equipment"]: d["kw"] for d in v["draws"]}
              for m, v in fit.get("months", {}).items() if v.get("own_fit")}
    return whole, months


def batch_available() -> bool:
    try:
        r = subprocess.run([disagg_exe(), "batch", "--help"], capture_output=True, timeout=60,
                           check=False)
    except (OSError, subprocess.TimeoutExpired):
        return False
    return r.returncode == 0


def machine() -> dict:
    import numpy
    import polars

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    info = {"date": dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC"),
            "cpus": os.cpu_count(), "cpus_usable": len(os.sched_getaffinity(0)), "cpu": cpu,
            "python": platform.python_version(), "polars": polars.__version__,
            "numpy": numpy.__version__, "platform": platform.platform()}
    for mod in ("pandas", "statsmodels", "disagg"):
        try:
            info[mod] = __import__(mod).__version__
        except ImportError:
            info[mod] = "not installed"
    return info


def fmt(x: float, digits: int = 2) -> str:
    return f"{x:.{digits}f}"


def verdict(ok: bool | None) -> str:
    return "not measured" if ok is None else ("met" if ok else "MISSED")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sites", type=int, default=None, help="number of 15-minute site-years")
    ap.add_argument("--quick", action="store_true", help="3 sites")
    ap.add_argument("--keep", type=Path, default=None, help="generate here and keep the files")
    ap.add_argument("--naive", nargs=2, metavar=("SITE", "OUT"), help=argparse.SUPPRESS)
    ap.add_argument("--stages", nargs=2, metavar=("SITE", "OUT"), help=argparse.SUPPRESS)
    ap.add_argument("--office", nargs=1, metavar="OUT", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.office:
        Path(a.office[0]).write_text(json.dumps(office_fits()))
        return
    if a.naive:
        Path(a.naive[1]).write_text(json.dumps(naive(Path(a.naive[0]))))
        return
    if a.stages:
        Path(a.stages[1]).write_text(json.dumps(stages(Path(a.stages[0]))))
        return

    sys.path.insert(0, str(HERE))
    from _synth_portfolio import make_site

    n_sites = a.sites or (3 if a.quick else 8)
    work = Path(a.keep) if a.keep else Path(tempfile.mkdtemp(prefix="disagg-bench-"))
    load_start = os.getloadavg()
    info = machine()
    print(f"generating {n_sites} site-years (15 min, 20 loads) and one 1-minute, 50-load "
          f"site-year in {work}", flush=True)
    portfolio = work / "portfolio"
    sites = [make_site(portfolio, i) for i in range(n_sites)]
    big = make_site(work / "one_minute", 0, interval_min=1, n_equipment=50)
    print("disagg installed from the working tree (pip install --no-deps --target, a "
          "temporary venv)", flush=True)
    installed = installed_copy(work / "install")
    editable = Install(sys.executable, disagg_exe(), "editable")
    if installed is None:
        print("  could not install a copy: every figure is the editable install's", flush=True)
    main_install = installed or editable
    exe = main_install.exe
    print("the editable install's disagg compiled to bytecode (compileall), as pip install does",
          flush=True)
    made = compile_disagg()
    R: dict = {"info": info, "sites": n_sites, "install": main_install.kind,
               "event_rows": statistics.median(s.event_rows for s in sites),
               "big_event_rows": big.event_rows, "big_intervals": big.intervals}

    # The generated files (about 0.5 GB) are written out before anything is timed: the
    # kernel's write-back of them would otherwise land in the first timed runs. One
    # untimed run of each program first (as for the steps, which are the better of two).
    os.sync()
    print("disagg breakdown, one fresh process per site (after one untimed run), the "
          "installed copy and the editable install in turn", flush=True)
    both = [main_install] + ([editable] if installed is not None else [])
    for inst in both:
        run([inst.exe, "breakdown", str(sites[0].toml), "--out", str(work / "out_warm")])
    e2e, e2e_editable, d_err, d_err_month = [], [], [], []
    for i, s in enumerate(sites):
        out = work / "out" / s.toml.stem
        for inst in (both if i % 2 == 0 else both[::-1]):
            r = run([inst.exe, "breakdown", str(s.toml), "--out",
                     str(out if inst is main_install else work / "out_editable" / s.toml.stem)])
            if not r["ok"]:
                raise RuntimeError(f"breakdown {s.toml} ({inst.kind}): {r['stderr']}")
            (e2e if inst is main_install else e2e_editable).append(r)
        whole, months = disagg_draws(out / "fit.json")
        d_err += draw_errors(whole, s.draw_kw)
        for m in months.values():
            d_err_month += draw_errors(m, s.draw_kw)
    R["e2e_wall"] = [r["wall_s"] for r in e2e]
    R["e2e_cpu"] = [r["cpu_s"] for r in e2e]
    R["e2e_load"] = os.getloadavg()[0]
    R["e2e_rss"] = [r["rss_mb"] for r in e2e]
    R["e2e_editable_wall"] = [r["wall_s"] for r in e2e_editable]
    R["e2e_editable_cpu"] = [r["cpu_s"] for r in e2e_editable]

    print("steps alone, one fresh process per site", flush=True)
    st = [child_json(["--stages", str(s.toml)])[0] for s in sites]
    R["stages"] = {k: statistics.median(x[k] for x in st) for k in st[0]}

    print("the slow baseload forms: office year, whole-range and monthly fits", flush=True)
    R["office"] = child_json(["--office"])[0]

    print("straightforward approach (pandas + loop + statsmodels), one process per site",
          flush=True)
    nv, nv_cpu, n_err, n_err_month, nv_in = [], [], [], [], []
    child_json(["--naive", str(sites[0].toml)])  # untimed, as for disagg
    for s in sites:
        res, r = child_json(["--naive", str(s.toml)])
        nv.append(r["wall_s"])
        nv_cpu.append(r["cpu_s"])
        nv_in.append(res["times"])
        n_err += draw_errors(res["draws"], s.draw_kw)
        for m in res["months"].values():
            n_err_month += draw_errors(m, s.draw_kw)
    R["naive_wall"] = nv
    R["naive_cpu"] = nv_cpu
    R["naive_load"] = os.getloadavg()[0]
    R["naive_steps"] = {k: statistics.median(x[k] for x in nv_in) for k in nv_in[0]}
    R["err"] = {"disagg_whole": d_err, "naive_whole": n_err,
                "disagg_month": d_err_month, "naive_month": n_err_month}

    print("1-minute, 50-load site-year", flush=True)
    r = run([exe, "breakdown", str(big.toml), "--out", str(work / "out_big")])
    R["big"] = r
    R["big_load"] = os.getloadavg()[0]

    print("start-up: a process that only imports what a breakdown imports", flush=True)
    ups = startups(installed)
    R["startup"], R["startup_cpu"] = ups[main_install.kind]
    R["startup_editable"], R["startup_src"] = ups["editable"], ups["source"]
    R["startup_load"] = os.getloadavg()[0]

    def batch(folder: Path, workers: int, name: str) -> dict:
        """Best of two runs (other work on the machine only ever slows a run down)."""
        runs = [run([exe, "batch", str(folder), "--out", str(work / f"{name}_{i}"),
                     "--workers", str(workers), "--quiet"]) for i in range(2)]
        return min(runs, key=lambda r: (not r["ok"], r["wall_s"]))

    R["batch"] = {}
    R["batch_load"] = os.getloadavg()[0]
    if batch_available():
        for w in (1, 2):
            print(f"disagg batch --workers {w}", flush=True)
            R["batch"][w] = batch(portfolio, w, f"batch{w}")
        if n_sites >= 2:
            # Half the portfolio as well: the difference is the cost of the other half's
            # sites, without the pool's start-up.
            half = work / "half"
            half.mkdir(exist_ok=True)
            (half / "data").symlink_to(portfolio / "data", target_is_directory=True)
            for s in sites[:n_sites // 2]:
                (half / s.toml.name).write_text(s.toml.read_text())
            print("disagg batch --workers 2, half the portfolio", flush=True)
            R["batch"]["half"] = batch(half, 2, "batch_half")
    else:
        print("disagg batch is not available: portfolio throughput not measured", flush=True)
    R["load"] = (load_start, os.getloadavg())
    for d in made:
        shutil.rmtree(d, ignore_errors=True)
    write_results(R)
    print(RESULTS.read_text())
    if not a.keep:
        shutil.rmtree(work, ignore_errors=True)


def write_results(R: dict) -> None:
    info = R["info"]
    n = R["sites"]
    med = statistics.median
    e2e = med(R["e2e_wall"])
    naive_s = med(R["naive_wall"])
    ratio = naive_s / e2e
    e2e_cpu = med(R["e2e_cpu"])
    ratio_cpu = med(R["naive_cpu"]) / e2e_cpu
    rss = max(R["e2e_rss"])
    st = R["stages"]
    big = R["big"]
    b = R["batch"]
    per_site_2 = b[2]["wall_s"] / n if 2 in b and b[2]["ok"] else None
    thousand = PORTFOLIO_SITE_YEARS * per_site_2 if per_site_2 else None
    # The batch's own CPU time does not include its pool's workers (not its waited children).
    thousand_cpu = (PORTFOLIO_SITE_YEARS * (e2e_cpu - R["startup_cpu"]) / 2.0
                    + R["startup_cpu"])
    marginal = None
    if per_site_2 and "half" in b and b["half"]["ok"]:
        per_site = (b[2]["wall_s"] - b["half"]["wall_s"]) / (n - n // 2)
        fixed = b[2]["wall_s"] - n * per_site
        marginal = (fixed + PORTFOLIO_SITE_YEARS * per_site, fixed, per_site)

    def step(key: str) -> str:
        return f"{fmt(st[key], 3)} (CPU {fmt(st[key + '_cpu'], 3)})"

    def err_text(errs: list[float]) -> str:
        if not errs:
            return "-"
        return f"mean {100 * statistics.fmean(errs):.2f} %, max {100 * max(errs):.2f} %"

    how = ("installed copy: pip install of the working tree" if R["install"] == "installed"
           else "editable install: no installed copy could be made")
    editable_rows = []
    if R.get("e2e_editable_wall"):
        ew, ec = R["e2e_editable_wall"], R["e2e_editable_cpu"]
        editable_rows = [
            ("the same from the editable install (`pip install -e`; its import finder runs at "
             "every start), taken in turn with the row above [s per site-year]",
             (f"{fmt(med(ew))} (median of {len(ew)}; min {fmt(min(ew))}); CPU "
              f"{fmt(med(ec))}"), "", "")]
    startup_rows = []
    if R["install"] == "installed":
        startup_rows = [
            ("process start-up and imports, editable install (disagg's bytecode compiled) [s]",
             (f"{fmt(R['startup_editable'][0], 3)}; CPU "
              f"{fmt(R['startup_editable'][1], 3)}"), "", "")]
    rows = [
        (f"`disagg breakdown` end-to-end, fresh process ({how}) [s per site-year]",
         (f"{fmt(e2e)} (median of {n}; min {fmt(min(R['e2e_wall']))}, max "
         f"{fmt(max(R['e2e_wall']))}; load {R['e2e_load']:.2f}); CPU {fmt(e2e_cpu)}"),
         f"< {TARGET_SITE_S}", verdict(e2e < TARGET_SITE_S)),
        *editable_rows,
        (f"process start-up and imports ({R['install']}; median of 5) [s]",
         (f"{fmt(R['startup'], 3)} (load {R['startup_load']:.2f}); CPU "
          f"{fmt(R['startup_cpu'], 3)}"), "", ""),
        *startup_rows,
        ("process start-up and imports without disagg's bytecode (each process compiles "
         "disagg's modules: a source tree under PYTHONDONTWRITEBYTECODE=1; taken in turn "
         "with the row above) [s]",
         f"{fmt(R['startup_src'][0], 3)}; CPU {fmt(R['startup_src'][1], 3)}",
         "", ""),
        ("reading the meter file [s]", step("read_meter_s"), "", ""),
        ("reading the run log [s]", step("read_runlog_s"), "", ""),
        ("alignment alone [s]", step("align_s"), "", ""),
        ("fit alone: whole-range fit, with the form comparison [s]", step("fit_whole_s"),
         "", ""),
        ("fit alone: the 12 monthly fits [s]", step("fit_12_months_s"), "", ""),
        *[((f"slow forms: office year, scenario {sc} (form {o['form']}), whole-range + "
            "12 monthly fits [s]"),
           f"{fmt(o['wall_s'])} (load {o['load']:.2f}); CPU {fmt(o['cpu_s'])}", "", "")
          for sc, o in R["office"].items()],
        ("drift tracker: `drift_site` (reads, aligns, fits the reference) [s]",
         step("drift_site_s"), "", ""),
        ("drift tracker: `nlms` alone [s]", fmt(st["nlms_s"], 3), "", ""),
        ("peak memory, breakdown of a 15-minute site-year [MB]", f"{rss:.0f}", "", ""),
        ("straightforward approach, fresh process [s per site-year]",
         (f"{fmt(naive_s)} (median of {n}; load {R['naive_load']:.2f}); CPU "
          f"{fmt(med(R['naive_cpu']))}"), "", ""),
        ("disagg's speed as a ratio to it", f"{ratio:.1f}x (CPU time: {ratio_cpu:.1f}x)",
         f">= {TARGET_RATIO:g}x", verdict(ratio >= TARGET_RATIO)),
        ("the most that ratio could be with disagg's start-up alone: straightforward time / "
         "disagg's start-up and imports",
         (f"{naive_s / R['startup']:.1f}x (CPU time: "
          f"{med(R['naive_cpu']) / R['startup_cpu']:.1f}x)"), "", ""),
        ("portfolio, `disagg batch --workers 1` [s for the portfolio; site-years/min]",
         (f"{fmt(b[1]['wall_s'])}; {60 * n / b[1]['wall_s']:.1f}"
          if 1 in b and b[1]["ok"] else "not measured"), "", ""),
        ("portfolio, `disagg batch --workers 2` [s for the portfolio; site-years/min]",
         (f"{fmt(b[2]['wall_s'])}; {60 * n / b[2]['wall_s']:.1f}"
          if per_site_2 else "not measured"), "", ""),
        ((f"{PORTFOLIO_SITE_YEARS:,} site-years on 2 cores, extrapolated: "
          f"{PORTFOLIO_SITE_YEARS:,} x "
         f"(portfolio time / {n}) [min]"),
         f"{thousand / 60:.1f}" if thousand else "not measured",
         f"< {TARGET_PORTFOLIO_S / 60:g}",
         verdict(None if thousand is None else thousand < TARGET_PORTFOLIO_S)),
        ((f"{PORTFOLIO_SITE_YEARS:,} site-years on 2 cores, extrapolated: start-up + "
         f"{PORTFOLIO_SITE_YEARS:,} x the time per further site (from the portfolio and its "
         "half) [min]"),
         (f"{marginal[0] / 60:.1f} (start-up {fmt(marginal[1])} s, {fmt(marginal[2])} s per "
          "site)") if marginal else "not measured", f"< {TARGET_PORTFOLIO_S / 60:g}",
         verdict(None if marginal is None else marginal[0] < TARGET_PORTFOLIO_S)),
        ((f"{PORTFOLIO_SITE_YEARS:,} site-years on 2 otherwise idle cores, estimated from CPU "
          f"time: {PORTFOLIO_SITE_YEARS:,} x (a breakdown's CPU time - start-up and imports' "
          "CPU time) / 2, plus one start-up (each worker imports once) [min]"),
         f"{thousand_cpu / 60:.1f}" if thousand_cpu else "not measured",
         f"< {TARGET_PORTFOLIO_S / 60:g}",
         verdict(None if thousand_cpu is None else thousand_cpu < TARGET_PORTFOLIO_S)),
        ("peak memory, breakdown of a 1-minute site-year with 50 loads [MB]",
         (f"{big['rss_mb']:.0f} ({fmt(big['wall_s'], 1)} s, load {R['big_load']:.2f}; CPU "
          f"{fmt(big['cpu_s'], 1)} s)") if big["ok"] else
         f"failed: {big['stderr']}", f"< {TARGET_PEAK_MB:g}",
         verdict(big["ok"] and big["rss_mb"] < TARGET_PEAK_MB)),
        ("draw error vs truth, whole range: disagg",
         err_text(R["err"]["disagg_whole"]), "", ""),
        ("draw error vs truth, whole range: straightforward",
         err_text(R["err"]["naive_whole"]), "", ""),
        ("draw error vs truth, monthly fits: disagg", err_text(R["err"]["disagg_month"]), "", ""),
        ("draw error vs truth, monthly fits: straightforward",
         err_text(R["err"]["naive_month"]), "", ""),
    ]
    ns = R["naive_steps"]
    steps = {"process start-up and imports": R["startup"],
             "reading the run log": st["read_runlog_s"], "alignment": st["align_s"],
             "the whole-range fit": st["fit_whole_s"],
             "the 12 monthly fits": st["fit_12_months_s"]}
    slowest = max(steps, key=steps.get)
    lines = [
        "# Portfolio benchmark",
        "",
        ("Regenerated by `python bench/portfolio.py` (do not edit by hand). Synthetic inputs "
        "(bench/_synth_portfolio.py, every number invented): each site-year is 35,040 "
        f"15-minute meter readings and an event run log of ~{R['event_rows']:,.0f} rows for 20 "
        "on/off loads (half with a nameplate prior), occupied/unoccupied baseload, AR(1) noise; "
        f"the 1-minute site-year has {R['big_intervals']:,} readings, 50 loads and "
        f"{R['big_event_rows']:,} run-log rows."),
        "",
        (f"Run {info['date']} on {info['cpus']} CPUs ({info['cpus_usable']} usable; "
        f"{info['cpu']}); Python {info['python']}, polars {info['polars']}, numpy "
        f"{info['numpy']}, pandas {info['pandas']}, statsmodels {info['statsmodels']}, "
        f"disagg {info['disagg']}; {info['platform']}. Load average (1 min) at start "
        f"{R['load'][0][0]:.2f}, at end {R['load'][1][0]:.2f} (other work on the machine "
        "slows every figure)."),
        "",
        "| measure | value | target | |",
        "|---|---|---|---|",
    ]
    lines += [f"| {a} | {b_} | {c} | {d} |" for a, b_, c, d in rows]
    lines += [
        "",
        ("The steps alone are the best of two runs in one process (warm; load "
         f"{st['load']:.2f} after them); the end-to-end figures include process start, "
         "imports, validation and writing the files. A breakdown compares the baseload forms "
         "on the whole range (disagg.fit.select), then fits the chosen form on the whole range "
         "and on each month (13 fits; a month reuses the range's choice and noise ratio), "
         "each with a Newey-West covariance and a 10-block jackknife; a static form also gets "
         "the hour-of-week and per-day baseload refits. CPU times are the process's user + "
         "system time: on a shared machine they change much less than wall times. The timed "
         "`disagg` is, unless the first row says otherwise, a normal install of the working "
         "tree as the README's `pip install .` makes it (`pip install --no-deps --target` into "
         "a temporary folder, run by a temporary venv that finds the dependencies in the "
         "benchmark's environment); the editable install's figures are beside it. Every "
         "process starts from compiled bytecode, as after `pip install` (pip compiles the "
         "installed copy; the editable install's modules are compiled first with compileall; "
         "pandas and statsmodels came compiled)."),
        "",
        (f"Slowest step of a breakdown: {slowest} ({fmt(steps[slowest], 3)} s of "
         f"{fmt(e2e)} s). Batch figures are the better of two runs (load average "
         f"{R['batch_load']:.2f} before them, {R['load'][1][0]:.2f} after); with other work on "
         "the machine two workers gain less than two cores would."),
        "",
        ("Straightforward approach, median seconds per site-year in its process: "
        f"imports (pandas, statsmodels.api) {fmt(ns['import_s'])}, reading {fmt(ns['read_s'])}, "
        f"run-hours matrix (Python loop) {fmt(ns['hours_matrix_s'])}, whole-year OLS + HAC "
        f"{fmt(ns['fit_whole_s'])}, 12 monthly OLS + HAC {fmt(ns['fit_months_s'])}. It does "
        "less than disagg (no validation, priors, bounds, jackknife or baseload refits)."),
        "",
    ]
    # Keep bench/drift.py's and bench/longsite.py's sections (between their markers) at the end.
    old = RESULTS.read_text() if RESULTS.exists() else ""
    for begin, end in (("<!-- drift: begin (bench/drift.py) -->", "<!-- drift: end -->"),
                       ("<!-- longsite: begin (bench/longsite.py) -->", "<!-- longsite: end -->")):
        if begin in old and end in old:
            lines += ["", old[old.index(begin):old.index(end) + len(end)], ""]
    RESULTS.write_text("\n".join(lines))


if __name__ == "__main__":
    main()
