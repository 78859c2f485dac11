"""Interval coverage on synthetic buildings with known truth (tests/synthetic.py).

Draws over the whole range (whole-range fit) and monthly kWh (each month's own fit).

Usage: python bench/coverage.py [SEEDS]   (default 100)

Prints, for the well-specified and the misspecified building, how often each load's stated
95 % interval holds its true mean draw, next to the plain HAC interval's coverage.
"""

import os
import sys
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import numpy as np  # noqa: E402

from disagg.fit.estimate import estimate_draws  # noqa: E402
from disagg.analyses.pipeline import monthly_fits  # noqa: E402
from synthetic import make_building  # noqa: E402


def main(n_seeds: int) -> None:
    for mis in (False, True):
        rows: dict[str, list[tuple[bool, bool, float]]] = {}
        unstable = 0
        month_hits: list[bool] = []
        for seed in range(n_seeds):
            s = make_building(seed, misspecified=mis)
            e = estimate_draws(s.site, s.aligned)
            table, _ = monthly_fits(s.site, s.aligned, e, 0.95)
            for r in table.iter_rows(named=True):
                key = (r["period"], r["equipment"])
                if key in s.true_kwh_month and r["run_hours"] > 0:
                    month_hits.append(r["kwh_low"] <= s.true_kwh_month[key] <= r["kwh_high"])
            for i, t in enumerate(e.terms):
                truth = s.true_kw[t.id]
                rows.setdefault(t.id, []).append(
                    (bool(e.kw_low[i] <= truth <= e.kw_high[i]),
                     bool(abs(e.kw[i] - truth) <= e.critical * e.se_hac_kw[i]),
                     float(e.kw_high[i] - e.kw_low[i])))
                unstable += "unstable" in t.flags
        name = "misspecified" if mis else "well-specified"
        print(f"\n{name}, {n_seeds} seeds")
        print(f"{'load':<6} {'coverage':>9} {'HAC only':>9} {'mean width kW':>14}")
        every = []
        for k, v in rows.items():
            a = np.array(v)
            every += v
            print(f"{k:<6} {a[:, 0].mean():>9.3f} {a[:, 1].mean():>9.3f} {a[:, 2].mean():>14.2f}")
        a = np.array(every)
        print(f"{'all':<6} {a[:, 0].mean():>9.3f} {a[:, 1].mean():>9.3f}   unstable flags: "
              f"{unstable} of {len(every)}")
        print(f"monthly kWh rows (each month's own fit): {np.mean(month_hits):.3f} of "
              f"{len(month_hits)} intervals hold the true monthly kWh")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100)
