"""Interval coverage on synthetic buildings with known truth (tests/synthetic.py).

Draws over the whole range (whole-range fit) and monthly kWh (each month's own fit).

Usage: python bench/coverage.py [SEEDS]   (default 100)
       python bench/coverage.py --office [SEEDS] [DAYS] [SCENARIOS]  (default 5 364 all five)
       SEEDS: a count (seeds 0..N-1) or a range FIRST:STOP (100:105 = seeds 100-104, for a
       check on seeds not used while developing)

Prints, for the well-specified and the misspecified building, how often each load's stated
95 % interval holds its true mean draw, next to the plain HAC interval's coverage.

--office: the invented office of tests/synthetic.make_office (daily baseload swing, lights
ramping around the schedule's edges, slow wander, a fan locked to the schedule), per
scenario: the baseload forms chosen, each load's error over the whole range, the share of
equipment-months whose 95 % kWh interval holds the true kWh and the intervals' median width
relative to the true kWh, overall and per load, and the same for every month taken from the
whole range's draws (what a month too short for its own fit gets). SCENARIOS may also
name "wander-weekly" (synthetic.WEEKLY_SCENARIO: the wander plus a chiller whose draw
changes from week to week; not in the default five). "Identifiable" rows are those without prior-driven or inseparable
flags (the locked fan LF-1 is neither identifiable nor meant to be).
"""

import os
import sys
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

import numpy as np  # noqa: E402

from disagg.analyses.breakdown import monthly_breakdown  # noqa: E402
from disagg.fit.estimate import estimate_draws  # noqa: E402
from disagg.analyses.pipeline import monthly_fits  # noqa: E402
from synthetic import SCENARIOS, make_building, make_office  # noqa: E402


def main(n_seeds: int) -> None:
    for mis in (False, True):
        rows: dict[str, list[tuple[bool, bool, float]]] = {}
        unstable = 0
        month_hits: list[bool] = []
        month_widths: list[float] = []
        forms: dict[str, int] = {}
        for seed in range(n_seeds):
            s = make_building(seed, misspecified=mis)
            e = estimate_draws(s.site, s.aligned)
            forms[e.form.form.name] = forms.get(e.form.form.name, 0) + 1
            table, _ = monthly_fits(s.site, s.aligned, e, 0.95)
            for r in table.iter_rows(named=True):
                key = (r["period"], r["equipment"])
                if key in s.true_kwh_month and r["run_hours"] > 0:
                    truth = s.true_kwh_month[key]
                    month_hits.append(r["kwh_low"] <= truth <= r["kwh_high"])
                    if truth > 0:
                        month_widths.append((r["kwh_high"] - r["kwh_low"]) / truth)
            for i, t in enumerate(e.terms):
                truth = s.true_kw[t.id]
                rows.setdefault(t.id, []).append(
                    (bool(e.kw_low[i] <= truth <= e.kw_high[i]),
                     bool(abs(e.kw[i] - truth) <= e.critical * e.se_hac_kw[i]),
                     float(e.kw_high[i] - e.kw_low[i])))
                unstable += "unstable" in t.flags
        name = "misspecified" if mis else "well-specified"
        print(f"\n{name}, {n_seeds} seeds; forms chosen {forms}")
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
              f"{len(month_hits)} intervals hold the true monthly kWh; median relative width "
              f"{np.median(month_widths):.3f}")


def seed_range(text: str) -> range:
    """'5' -> seeds 0-4; '100:105' -> seeds 100-104."""
    first, _, stop = text.partition(":")
    return range(int(first), int(stop)) if stop else range(int(first))


def office(seeds: range, days: int, scenarios: tuple[str, ...]) -> None:
    import time
    from collections import Counter

    for scenario in scenarios:
        errs: dict[str, list[float]] = {}
        hits, hits_ident, widths, forms, secs = [], [], [], Counter(), []
        by_load: dict[str, list[tuple[bool, float]]] = {}
        range_load: dict[str, list[tuple[bool, float]]] = {}
        for seed in seeds:
            s = make_office(seed, scenario, days=days)
            t0 = time.perf_counter()
            e = estimate_draws(s.site, s.aligned)
            table, _ = monthly_fits(s.site, s.aligned, e, 0.95)
            secs.append(time.perf_counter() - t0)
            forms[e.form.form.name] += 1
            flags = {t.id: t.flags for t in e.terms}
            # Every month from the whole range's draws (as a month too short for a fit of
            # its own, or a one-month range): the case the between-week variance is for.
            for r in monthly_breakdown(e, s.site.timezone).iter_rows(named=True):
                truth = s.true_kwh_month.get((r["period"], r["equipment"]))
                if truth and r["run_hours"]:
                    range_load.setdefault(r["equipment"], []).append(
                        (r["kwh_low"] <= truth <= r["kwh_high"],
                         (r["kwh_high"] - r["kwh_low"]) / truth))
            for i, t in enumerate(e.terms):
                errs.setdefault(t.id, []).append(e.kw[i] / s.true_kw[t.id] - 1.0)
            for r in table.iter_rows(named=True):
                key = (r["period"], r["equipment"])
                truth = s.true_kwh_month.get(key)
                if truth is None or not r["run_hours"] or truth <= 0:
                    continue
                ok = r["kwh_low"] <= truth <= r["kwh_high"]
                hits.append(ok)
                widths.append((r["kwh_high"] - r["kwh_low"]) / truth)
                by_load.setdefault(r["equipment"], []).append((ok, widths[-1]))
                ident = not any(f == "prior-driven" or f.startswith("inseparable")
                                for f in flags.get(r["equipment"], []))
                if ident:
                    hits_ident.append(ok)
        print(f"\noffice, scenario {scenario}, seeds {seeds.start}-{seeds.stop - 1} x {days} "
              "days: forms "
              f"{dict(forms)}; fit + monthly fits {np.median(secs):.2f} s (median)")
        for k, v in errs.items():
            a = np.array(v)
            print(f"  {k:<11} error over the range: median {100 * np.median(a):+.1f} %, "
                  f"worst {100 * a[np.argmax(np.abs(a))]:+.1f} %")
        print(f"  equipment-months covered: {np.mean(hits):.3f} of {len(hits)} "
              f"(identifiable rows {np.mean(hits_ident):.3f} of {len(hits_ident)}); "
              f"median relative width {np.median(widths):.3f}")
        print("  per load, covered / median relative width: " + "; ".join(
            f"{k} {np.mean([o for o, _ in v]):.3f} / {np.median([w for _, w in v]):.3f}"
            for k, v in by_load.items()))
        every = [x for v in range_load.values() for x in v]
        print(f"  months from the range's draws: covered {np.mean([o for o, _ in every]):.3f}, "
              f"median relative width {np.median([w for _, w in every]):.3f}; per load: "
              + "; ".join(f"{k} {np.mean([o for o, _ in v]):.3f} / "
                          f"{np.median([w for _, w in v]):.3f}" for k, v in range_load.items()))


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--office":
        office(seed_range(sys.argv[2]) if len(sys.argv) > 2 else range(5),
               int(sys.argv[3]) if len(sys.argv) > 3 else 364,
               tuple(sys.argv[4].split(",")) if len(sys.argv) > 4 else SCENARIOS)
    else:
        main(int(sys.argv[1]) if len(sys.argv) > 1 else 100)
