"""Cost of breakdown's quick run-log clock test (disagg.analyses.clock.offset_warning).

Usage: python bench/clock_check.py [REPEATS]   (default 3)

On the committed demo site (configs/demo.toml: one year of 15-minute data, 35,040 intervals)
times, best of REPEATS: the whole breakdown (disagg.analyses.pipeline.breakdown_site) with
and without the quick test (runs alternate, so that the machine's load hits both alike), the
quick test alone with the logs on the meter's clock (the usual
case: three alignments and three small non-negative fits), and the quick test with the logs
4 minutes off (the full +-30 min search runs and a warning is written).
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def best_of(repeats: int, fn) -> float:
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main() -> None:
    repeats = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    from disagg.analyses.clock import offset_warning, shift_runlog
    from disagg.analyses.pipeline import breakdown_site
    from disagg.inputs.config import load_site
    from disagg.inputs.readers import read_meter, read_runlog

    site_path = ROOT / "configs" / "demo.toml"
    site = load_site(site_path)
    meter = read_meter(site.meter, site.timezone)
    log = read_runlog(site.runlog, site)
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
    print(f"breakdown of the demo year: {min(with_test):.3f} s with the quick test, "
          f"{min(without):.3f} s without (best of {repeats} each)")
    print(f"quick test, clocks agree: {best_of(repeats, lambda: offset_warning(site, meter, log)):.3f} s")
    print(f"quick test, log 4 min off (full search): "
          f"{best_of(1, lambda: offset_warning(site, meter, off)):.2f} s")


if __name__ == "__main__":
    main()
