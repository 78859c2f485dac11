"""Drift tracker on synthetic buildings with known truth (tests/synthetic.py).

Usage: python bench/drift.py [SEEDS]   (default 100 for false alarms; a fifth of that for steps)

Prints, as tables:
- detection delay of a +15 % step in one load halfway through a 240-day building (memory
  30 days, threshold 10 %, default 90-day reference), per stepped load, and which other loads
  alarmed in those runs;
- false alarms on stationary 240-day buildings: runs with any alarm, load-runs with an alarm
  (well-specified, and the misspecified building of tests/synthetic.py for comparison);
- the run time of the tracker (disagg.analyses.track.nlms alone) for a site-year of 15-minute
  intervals with 30 pieces of equipment plus two baseload columns, median of 7 runs.
"""

import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import datetime as dt  # noqa: E402

import numpy as np  # noqa: E402

from disagg.analyses.drift import drift_aligned  # noqa: E402
from disagg.analyses.track import nlms, step_from_memory  # noqa: E402
from synthetic import make_building  # noqa: E402

START = dt.date(2025, 3, 3)
DAYS = 240
STEP_ON = START + dt.timedelta(days=120)
LOADS = ("CH-1", "P-1", "F-1", "C-1", "H-1")


def first_alarms(result) -> dict[str, dt.date]:
    return {a["equipment"]: dt.date.fromisoformat(a["first_alarm_date"])
            for a in result.summary["alarms"]}


def delays(n_seeds: int) -> None:
    print(f"\n+15 % step on {STEP_ON} in a {DAYS}-day building, {n_seeds} seeds, memory 30 d, "
          "threshold 10 %")
    print(f"{'load':<6} {'detected':>9} {'min d':>6} {'median d':>9} {'max d':>6}  "
          "other loads alarmed (runs)")
    for load in LOADS:
        found, others = [], {}
        for seed in range(n_seeds):
            s = make_building(seed, days=DAYS, step=(load, 1.15), step_on=STEP_ON)
            first = first_alarms(drift_aligned(s.site, s.aligned))
            if load in first:
                found.append((first[load] - STEP_ON).days)
            for eq in first:
                if eq != load:
                    others[eq] = others.get(eq, 0) + 1
        other = ", ".join(f"{k} ({v})" for k, v in sorted(others.items())) or "none"
        stats = (f"{min(found):>6} {np.median(found):>9.1f} {max(found):>6}" if found
                 else f"{'-':>6} {'-':>9} {'-':>6}")
        print(f"{load:<6} {len(found):>4} of {n_seeds:<2} {stats}  {other}")


def false_alarms(n_seeds: int, misspecified: bool) -> None:
    runs, load_runs, per_load = 0, 0, {}
    for seed in range(n_seeds):
        s = make_building(seed, days=DAYS, misspecified=misspecified)
        first = first_alarms(drift_aligned(s.site, s.aligned))
        runs += bool(first)
        load_runs += len(first)
        for eq in first:
            per_load[eq] = per_load.get(eq, 0) + 1
    name = "misspecified" if misspecified else "well-specified"
    detail = ", ".join(f"{k} {v}" for k, v in sorted(per_load.items())) or "-"
    print(f"{name:<15} {n_seeds:>6} {runs:>7} ({runs / n_seeds:6.1%}) "
          f"{load_runs:>6} of {5 * n_seeds:<4} ({load_runs / (5 * n_seeds):6.1%})  {detail}")


def run_time() -> None:
    rng = np.random.default_rng(0)
    n, k = 365 * 96, 30
    hours = 0.25 * (rng.random((n, k)) < rng.uniform(0.1, 0.6, k))
    occupied = 0.25 * ((np.arange(n) % 96 >= 28) & (np.arange(n) % 96 < 76))
    X = np.column_stack([hours, occupied, 0.25 - occupied])
    w = np.concatenate([rng.uniform(2, 80, k), [30.0, 15.0]])
    y = X @ w + rng.normal(0, 0.5, n)
    delta = 1e-6 * float(np.mean(np.sum(X**2, axis=1)))
    mu, _ = step_from_memory(X, 30 * 96, delta, np.arange(k))
    times = []
    for _ in range(7):
        t0 = time.perf_counter()
        nlms(X, y, w, mu, delta)
        times.append(time.perf_counter() - t0)
    print(f"\ntracker run time (nlms alone), {n} intervals x {X.shape[1]} columns "
          f"({k} equipment + 2 baseload), 7 runs")
    print(f"{'median s':>9} {'min s':>7} {'max s':>7}")
    print(f"{np.median(times):>9.3f} {min(times):>7.3f} {max(times):>7.3f}")


def main(n_seeds: int) -> None:
    delays(max(n_seeds // 5, 1))
    print(f"\nfalse alarms on stationary {DAYS}-day buildings (memory 30 d, threshold 10 %)")
    print(f"{'building':<15} {'seeds':>6} {'runs with alarm':>16} {'load-runs with alarm':>21}"
          "  by load")
    false_alarms(n_seeds, misspecified=False)
    false_alarms(max(n_seeds // 5, 1), misspecified=True)
    run_time()


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100)
