"""Coverage of the baseload row's monthly kWh interval when the wandering level is used: the
interval with the level's own estimation error (estimate.base_var_kwh2) against the old one
from the profile's coefficients alone (c' cov_base c), on synthetic buildings with known
baseload energy (tests/synthetic.py: make_building misspecified, make_office scenarios).

    python bench/level_coverage.py [seeds]    # default 10 seeds

Only whole-range fits whose chosen form has the level, and months with at least 7 local days
of intervals. Prints covered / total, the median half-width and the median |error|.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from disagg.analyses.breakdown import monthly_breakdown  # noqa: E402
from disagg.fit.estimate import estimate_draws  # noqa: E402
from synthetic import TZ, make_building, make_office  # noqa: E402


def rows(s) -> list[tuple[float, float, float, float]]:
    """(truth, estimate, new half-width, old half-width) of each baseload month [kWh]."""
    e = estimate_draws(s.site, s.aligned)
    if not e.form.form.level:
        return []
    table = monthly_breakdown(e, TZ).filter(equipment="baseload")
    local = e.frame["start_utc"].dt.convert_time_zone(TZ)
    period = local.dt.strftime("%Y-%m").to_numpy()
    out = []
    for r in table.iter_rows(named=True):
        m = period == r["period"]
        if m.sum() < 7 * 96 or r["period"] not in s.true_base_kwh_month:
            continue
        c = e.base[m].sum(axis=0)
        old = e.critical * float(np.sqrt(max(c @ e.cov_base @ c, 0.0)))
        out.append((s.true_base_kwh_month[r["period"]], r["kwh"], r["kwh_high"] - r["kwh"], old))
    return out


def main() -> None:
    seeds = range(int(sys.argv[1]) if len(sys.argv) > 1 else 10)
    cases = {"building misspecified (56 d)": lambda k: make_building(k, misspecified=True),
             "office wander (91 d)": lambda k: make_office(k, "wander", days=91),
             "office all (91 d)": lambda k: make_office(k, "all", days=91)}
    for name, make in cases.items():
        got = [r for k in seeds for r in rows(make(k))]
        if not got:
            print(f"{name}: the level was never chosen")
            continue
        a = np.array(got)
        err = np.abs(a[:, 1] - a[:, 0])
        print(f"{name}: {len(a)} baseload-months; with the level's error covered "
              f"{np.mean(err <= a[:, 2]):.3f} (median half-width {np.median(a[:, 2]):.0f} kWh), "
              f"profile only {np.mean(err <= a[:, 3]):.3f} (median {np.median(a[:, 3]):.0f} "
              f"kWh); median |error| {np.median(err):.0f} kWh of median "
              f"{np.median(a[:, 0]):.0f} kWh")


if __name__ == "__main__":
    main()
