"""Cost of breakdown's quick run-log clock test (disagg.analyses.clock.offset_warning).

Usage: python bench/clock_check.py [REPEATS]   (default 3)

On the committed demo site (configs/demo.toml: one year of 15-minute data, 35,040 intervals)
times, best of REPEATS, in CPU time of this process (time.process_time: the machine is shared,
so wall time moves with the other work on it) and wall time: the whole breakdown
(disagg.analyses.pipeline.breakdown_site) with and without the quick test (runs alternate,
so that the machine's load hits both alike), the quick test alone with the logs on the
meter's clock (the usual case: the run's own alignment against the log moved +-3 min, three
small non-negative fits) given the run's alignment as the breakdown gives it, and the quick
test with the logs 4 minutes off (the full +-30 min search runs and a warning is written).
The load average is printed before and after.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # as the command line sets it


def best_of(repeats: int, fn) -> tuple[float, float]:
    """(least CPU time [s], least wall time [s]) of repeats calls of fn."""
    cpu, wall = [], []
    for _ in range(repeats):
        c0, t0 = time.process_time(), time.perf_counter()
        fn()
        cpu.append(time.process_time() - c0)
        wall.append(time.perf_counter() - t0)
    return min(cpu), min(wall)


def main() -> None:
    repeats = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    from disagg.analyses.clock import offset_warning, shift_runlog
    from disagg.analyses.pipeline import breakdown_site
    from disagg.fit.align import align
    from disagg.inputs.config import load_site
    from disagg.inputs.readers import read_meter, read_runlog, read_weather

    print(f"load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    site_path = ROOT / "configs" / "demo.toml"
    site = load_site(site_path)
    meter = read_meter(site.meter, site.timezone)
    log = read_runlog(site.runlog, site)
    weather = read_weather(site.weather, site.timezone) if site.weather else None
    off = shift_runlog(log, -4.0)
    import disagg.analyses.pipeline as pipeline

    real = pipeline.offset_warning
    with_test, without = [], []
    for _ in range(repeats):
        pipeline.offset_warning = real
        with_test.append(best_of(1, lambda: breakdown_site(site_path)))
        pipeline.offset_warning = lambda *a, **k: None
        without.append(best_of(1, lambda: breakdown_site(site_path)))
    pipeline.offset_warning = real
    (wc, ww), (oc, ow) = min(with_test), min(without)
    print(f"breakdown of the demo year: CPU {wc:.3f} s with the quick test, {oc:.3f} s without "
          f"(wall {ww:.3f} / {ow:.3f} s; best of {repeats} each)")

    # As the breakdown calls it: with the run's alignment, made fresh (not timed) each time.
    quick = []
    for _ in range(repeats):
        aligned = align(site, meter, log, None, None, weather)
        quick.append(best_of(1, lambda: offset_warning(site, meter, log, 0.0, aligned)))
    qc, qw = min(quick)
    print(f"quick test, clocks agree: CPU {qc:.3f} s (wall {qw:.3f} s; best of {repeats}; "
          "the run's alignment not counted)")
    fc, fw = best_of(1, lambda: offset_warning(site, meter, off))
    print(f"quick test, log 4 min off (full search): CPU {fc:.2f} s (wall {fw:.2f} s)")
    print(f"load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")


if __name__ == "__main__":
    main()
