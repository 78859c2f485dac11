"""Drift tracking on the synthetic office year with weather (tests/synthetic_year.py).

Usage: python bench/drift.py [SEEDS]   (default 20; one process, about 2-3 minutes)

Prints, as tables (memory 30 days, threshold 10 %, default per-load references):
- the degrading lead chiller: CH-1 +15 % from 2025-07-25; it always runs with its condenser
  pump CWP-1, so the group CH-1+CWP-1 is tracked: detection delay, other loads alarmed,
  whether the year-end change interval holds the group's true +13.3 %;
- false alarms over SEEDS years of the same building without any change (runs with any
  alarm, load-years with an alarm, by load), with a wandering baseload (a random walk of
  0.15 kW per interval: about 28 kW sd over the year, as the old misspecified building), and
  on the
  misspecified 240-day building of tests/synthetic.py;
- detection delay and other-load alarms for +10/15/30 % steps in a cycling load (air
  compressor AC-1, from 2025-06-01), a seasonal one (lag chiller CH-2, from 2025-08-10, late
  in its season) and a schedule-bound one (air handler AHU-1, from 2025-06-01), over a
  quarter of SEEDS each;
- the tracker's run time (disagg.analyses.track.nlms, per-weight form, and the scales)
  for a site-year of 15-minute intervals with 30 loads plus two baseload columns.

Writes the same text into the drift section of bench/RESULTS.md.
"""

import contextlib
import io
import os
import platform
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
sys.path.insert(0, str(Path(__file__).resolve().parent))
from _results import put_section  # noqa: E402

import datetime as dt  # noqa: E402

import numpy as np  # noqa: E402

from disagg.analyses.drift import drift_aligned  # noqa: E402
from disagg.analyses.track import PER_WEIGHT_DELTA, nlms, scales_for_memory  # noqa: E402
from synthetic_year import CHILLER_STEP_ON, make_year  # noqa: E402

GROUP = "CH-1+CWP-1"
GROUP_TRUE_CHANGE = 18.0 / 135.0
STEP_CASES = {"cycling AC-1": ("AC-1", dt.date(2025, 6, 1)),
              "seasonal CH-2": ("CH-2", dt.date(2025, 8, 10)),
              "schedule AHU-1": ("AHU-1", dt.date(2025, 6, 1))}


def first_alarms(result) -> dict[str, dt.date]:
    return {a.equipment: dt.date.fromisoformat(a.first_alarm_date)
            for a in result.summary.alarms}


def chiller(n_seeds: int) -> None:
    print(f"\nDegrading lead chiller (CH-1 +15 % from {CHILLER_STEP_ON}, tracked as {GROUP}), "
          f"{n_seeds} seeds")
    delays, covered, others, seconds = [], 0, {}, []
    for seed in range(n_seeds):
        s = make_year(seed, steps={"CH-1": (1.15, CHILLER_STEP_ON)})
        t0 = time.perf_counter()
        r = drift_aligned(s.site, s.aligned)
        seconds.append(time.perf_counter() - t0)
        first = first_alarms(r)
        if GROUP in first:
            delays.append((first[GROUP] - CHILLER_STEP_ON).days)
            a = next(a for a in r.summary.alarms if a.equipment == GROUP)
            covered += a.change_low <= GROUP_TRUE_CHANGE <= a.change_high
        for eq in first:
            if eq != GROUP:
                others[eq] = others.get(eq, 0) + 1
    other = ", ".join(f"{k} ({v})" for k, v in sorted(others.items())) or "none"
    stats = (f"min {min(delays)} / median {np.median(delays):.0f} / max {max(delays)} d"
             if delays else "-")
    print(f"group alarmed {len(delays)} of {n_seeds}; delay {stats}; within 45 d: "
          f"{sum(d <= 45 for d in delays)} of {n_seeds}")
    print(f"year-end change interval holds the true +{GROUP_TRUE_CHANGE:.1%}: {covered} of "
          f"{len(delays)}; other loads alarmed (runs): {other}")
    print(f"drift_aligned on the site-year (3 reference fits + tracker): median "
          f"{np.median(seconds):.2f} s")


def false_alarms(n_seeds: int, wander_kw: float = 0.0) -> None:
    runs, load_years, per_load, n_loads = 0, 0, {}, 0
    for seed in range(n_seeds):
        s = make_year(1000 + seed, wander_kw=wander_kw)
        r = drift_aligned(s.site, s.aligned)
        first = first_alarms(r)
        n_loads += len(r.summary.band_sd_kw)
        runs += bool(first)
        load_years += len(first)
        for eq in first:
            per_load[eq] = per_load.get(eq, 0) + 1
    name = "no change" if not wander_kw else f"baseload wander {wander_kw:g} kW/step"
    detail = ", ".join(f"{k} {v}" for k, v in sorted(per_load.items())) or "-"
    print(f"{name:<30} {n_seeds:>5} {runs:>4} ({runs / n_seeds:5.1%}) "
          f"{load_years:>4} of {n_loads:<4} ({load_years / max(n_loads, 1):5.1%})  {detail}")


def misspecified(n_seeds: int) -> None:
    """The misspecified 240-day building of tests/synthetic.py (constant baseload declared;
    true baseload occupied/unoccupied with closures and a ~23 kW wander; CH-1 and F-1 draws
    +-15 % with a weather-like signal): runs with any alarm."""
    from synthetic import make_building
    runs, per_load = 0, {}
    for seed in range(n_seeds):
        s = make_building(seed, days=240, misspecified=True)
        first = first_alarms(drift_aligned(s.site, s.aligned))
        runs += bool(first)
        for eq in first:
            per_load[eq] = per_load.get(eq, 0) + 1
    detail = ", ".join(f"{k} {v}" for k, v in sorted(per_load.items())) or "-"
    print(f"{'misspecified 240-day building':<30} {n_seeds:>5} {runs:>4} ({runs / n_seeds:5.1%})"
          f" {'':>19}  {detail}")


def blame(n_seeds: int) -> None:
    """A +15 % step in the chiller CH-1 of tests/synthetic.py's 240-day building, whose pump
    P-1 runs whenever it runs (and at other times): is the step alarmed on CH-1 alone?"""
    from synthetic import make_building
    step_on = dt.date(2025, 3, 3) + dt.timedelta(days=120)
    found, others = [], {}
    for seed in range(n_seeds):
        s = make_building(seed, days=240, step=("CH-1", 1.15), step_on=step_on)
        first = first_alarms(drift_aligned(s.site, s.aligned))
        if "CH-1" in first:
            found.append((first["CH-1"] - step_on).days)
        for eq in first:
            if eq != "CH-1":
                others[eq] = others.get(eq, 0) + 1
    other = ", ".join(f"{k} ({v})" for k, v in sorted(others.items())) or "none"
    d = f"{min(found)}-{np.median(found):.0f}-{max(found)} d" if found else "-"
    print(f"\nChiller step with a pump switching alongside (240-day building, {n_seeds} seeds): "
          f"CH-1 alarmed {len(found)} of {n_seeds} after {d}; other loads alarmed (runs): "
          f"{other}")


def steps(n_seeds: int) -> None:
    print(f"\nSteps, {n_seeds} seeds each: detected / delay min-median-max [d] / other loads "
          "alarmed (runs)")
    print(f"{'case':<16} {'step':>5} {'detected':>9} {'delay d':>14}  others")
    for case, (load, on) in STEP_CASES.items():
        for factor in (1.10, 1.15, 1.30):
            found, others = [], {}
            for seed in range(n_seeds):
                s = make_year(2000 + seed, steps={load: (factor, on)})
                first = first_alarms(drift_aligned(s.site, s.aligned))
                if load in first:
                    found.append((first[load] - on).days)
                for eq in first:
                    if eq != load:
                        others[eq] = others.get(eq, 0) + 1
            other = ", ".join(f"{k} ({v})" for k, v in sorted(others.items())) or "none"
            d = (f"{min(found)}-{np.median(found):.0f}-{max(found)}" if found else "-")
            print(f"{case:<16} {factor - 1:>+5.0%} {len(found):>4} of {n_seeds:<2} {d:>14}  "
                  f"{other}")


def run_time() -> None:
    rng = np.random.default_rng(0)
    n, k = 365 * 96, 30
    hours = 0.25 * (rng.random((n, k)) < rng.uniform(0.03, 0.6, k))
    occupied = 0.25 * ((np.arange(n) % 96 >= 28) & (np.arange(n) % 96 < 76))
    X = np.column_stack([hours, occupied, 0.25 - occupied])
    w = np.concatenate([rng.uniform(2, 80, k), [30.0, 15.0]])
    y = X @ w + rng.normal(0, 0.5, n)
    dX, dy = np.diff(X, axis=0, prepend=X[:1]), np.diff(y, prepend=y[:1])
    t0 = time.perf_counter()
    d, _ = scales_for_memory(dX[:90 * 96], np.full(X.shape[1], 30 * 96.0), 1.0)
    t_scales = time.perf_counter() - t0
    times = []
    for _ in range(7):
        t0 = time.perf_counter()
        nlms(dX, dy, w, 1.0, PER_WEIGHT_DELTA, d)
        times.append(time.perf_counter() - t0)
    print(f"\ntracker run time, {n} intervals x {X.shape[1]} columns ({k} loads + 2 baseload), "
          "per-weight form on differenced data, 7 runs")
    print(f"nlms: median {np.median(times):.3f} s (min {min(times):.3f}, max {max(times):.3f}); "
          f"scales for a 30-day memory from 90 reference days: {t_scales:.3f} s")


BEGIN, END = "<!-- drift: begin (bench/drift.py) -->", "<!-- drift: end -->"


class _Tee(io.TextIOBase):
    """Print and keep what was printed."""

    def __init__(self, out):
        self.out, self.kept = out, []

    def write(self, text):
        self.kept.append(text)
        return self.out.write(text)


def write_results(text: str, n_seeds: int) -> None:
    """Replace the drift section of bench/RESULTS.md (bench/portfolio.py keeps it)."""
    when = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC")
    section = "\n".join([
        BEGIN, "", "## Drift benchmark", "",
        f"Regenerated by `python bench/drift.py {n_seeds}` (do not edit by hand); run {when} on "
        f"{os.cpu_count()} CPUs, {platform.python_version()}. Synthetic office year with weather "
        "(tests/synthetic_year.py, every number invented); memory 30 days, threshold 10 %.", "",
        "```", text.strip(), "```", "", END])
    put_section(BEGIN, END, section)


def main(n_seeds: int) -> None:
    tee = _Tee(sys.stdout)
    with contextlib.redirect_stdout(tee):
        run_all(n_seeds)
    write_results("".join(tee.kept), n_seeds)


def run_all(n_seeds: int) -> None:
    t0 = time.perf_counter()
    chiller(max(n_seeds // 2, 1))
    print(f"\nFalse alarms, years without any change ({n_seeds} seeds; the wander: "
          f"{max(n_seeds // 2, 1)})")
    print(f"{'building':<30} {'seeds':>5} {'runs with alarm':>16} {'load-years alarmed':>19}"
          "  by load")
    false_alarms(n_seeds)
    false_alarms(max(n_seeds // 2, 1), wander_kw=0.15)
    misspecified(max(n_seeds // 2, 1))
    blame(max(n_seeds // 2, 1))
    steps(max(n_seeds // 4, 1))
    run_time()
    print(f"\n(bench total {time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 20)
