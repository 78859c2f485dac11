"""Before/after check of a speed change: the fit results of two versions of disagg agree.

Usage: python bench/fit_equivalence.py [REV] [--tol 1e-9] [--q-tol 1e-6]
       (default REV: HEAD; compares the working tree with REV)

Fits, with each version in its own process (REV unpacked by `git archive` into a temporary
folder), the same cases: the demo building (disagg.demo, whole breakdown), the synthetic
buildings of tests/synthetic.py (seeds 0-2, well- and misspecified; whole-range fit and the
monthly fits), the office scenarios of tests/synthetic.make_office (seed 0, a year; the
forms chosen there include hour-of-week-edges with the wandering level) and one bench
site-year (bench/_synth_portfolio.py). For each case it compares the draws, their
intervals and standard errors, the baseload, the level, the fitted kWh, the form chosen,
every compared form's likelihood, weight, draws and standard errors, the flags and warnings,
and every column of the monthly table, and prints the largest relative difference
(|a - b| / max(|a|, |b|, 1e-9)) of each kind above the tolerance. The noise ratio q of each
form is the result of a numerical search: it is held to --q-tol instead.

Exit status 1 when anything differs beyond the tolerances. A script, not a test.
"""

from __future__ import annotations

import argparse
import os
import pickle
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def snapshot(out: Path, root: Path) -> None:
    """Fit every case with the disagg importable from root; pickle the results to out."""
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    sys.path[:0] = [str(root), str(root / "tests"), str(root / "bench")]
    import numpy as np
    from _synth_portfolio import make_site
    from synthetic import SCENARIOS, make_building, make_office

    import disagg
    from disagg.analyses.pipeline import breakdown_site, monthly_fits
    from disagg.fit.estimate import estimate_draws
    from disagg.present.outputs import write_demo_site

    assert Path(disagg.__file__).resolve().is_relative_to(root.resolve()), disagg.__file__

    def est(e) -> dict:
        d = {k: np.asarray(getattr(e, k), dtype=float)
             for k in ("kw", "kw_low", "kw_high", "se_kw", "se_hac_kw", "base_kw", "level_kwh",
                       "fitted")}
        d["form"] = (e.form.form.name, e.form.form.q)
        d["scores"] = [(s.form.name, s.form.q, s.neg2ll, s.n_params, s.criterion, s.weight,
                        np.asarray(s.draws_kw), np.asarray(s.se_kw)) for s in e.form.scores]
        d["flags"] = [(t.id, tuple(t.flags)) for t in e.terms]
        d["warnings"] = list(e.warnings)
        return d

    def table(t) -> dict:
        return {c: t[c].to_numpy() for c in t.columns}

    res, cpu = {}, {}
    for seed in range(3):
        for mis in (False, True):
            s = make_building(seed, misspecified=mis)
            c = time.process_time()
            e = estimate_draws(s.site, s.aligned)
            tab, _ = monthly_fits(s.site, s.aligned, e, 0.95)
            cpu[f"building {seed} {'mis' if mis else 'well'}"] = time.process_time() - c
            res[f"building {seed} {'mis' if mis else 'well'}"] = (est(e), table(tab))
    for sc in SCENARIOS:
        s = make_office(0, sc)
        c = time.process_time()
        e = estimate_draws(s.site, s.aligned)
        tab, _ = monthly_fits(s.site, s.aligned, e, 0.95)
        cpu[f"office {sc}"] = time.process_time() - c
        res[f"office {sc}"] = (est(e), table(tab))
    with tempfile.TemporaryDirectory() as tmp:
        tomls = {"demo": write_demo_site(Path(tmp) / "demo"),
                 "bench site": make_site(Path(tmp) / "bench", 0).toml}
        for name, toml in tomls.items():
            c = time.process_time()
            r = breakdown_site(toml)
            cpu[name] = time.process_time() - c
            res[name] = (est(r.estimates), table(r.breakdown))
    res["_cpu_s"] = cpu
    res["_load"] = os.getloadavg()[0]
    out.write_bytes(pickle.dumps(res))


def compare(a: dict, b: dict, tol: float, q_tol: float) -> bool:
    import numpy as np

    def rel(x, y) -> float:
        x, y = np.asarray(x), np.asarray(y)
        if x.shape != y.shape:
            return float("inf")
        if x.dtype.kind not in "fiu" or y.dtype.kind not in "fiu":
            return 0.0 if np.array_equal(x, y) else float("inf")
        x, y = x.astype(float), y.astype(float)
        both_nan = np.isnan(x) & np.isnan(y)
        with np.errstate(invalid="ignore"):
            d = np.abs(x - y) / np.maximum(np.maximum(np.abs(x), np.abs(y)), 1e-9)
        d = np.where(both_nan, 0.0, d)
        return float(np.max(np.where(np.isnan(d), np.inf, d))) if d.size else 0.0

    same = True
    for case in a:
        if case.startswith("_"):
            continue
        (ea, ta), (eb, tb) = a[case], b[case]
        diffs: list[str] = []

        def check(what: str, r: float, limit: float = tol) -> None:
            if r > limit:
                diffs.append(f"{what} {r:.1e}")

        for k, v in ea.items():
            if k == "form":
                if v[0] != eb[k][0]:
                    diffs.append(f"form {v[0]} vs {eb[k][0]}")
                check("q of the form used", rel(v[1], eb[k][1]), q_tol)
            elif k == "scores":
                if [s[0] for s in v] != [s[0] for s in eb[k]]:
                    diffs.append("forms compared differ")
                    continue
                for sa, sb in zip(v, eb[k]):
                    check(f"{sa[0]} q", rel(sa[1], sb[1]), q_tol)
                    for i, what in enumerate(("-2 log L", "parameters", "criterion",
                                              "weight", "draws", "se"), start=2):
                        check(f"{sa[0]} {what}", rel(sa[i], sb[i]))
            elif k in ("flags", "warnings"):
                if v != eb[k]:
                    diffs.append(f"{k} differ")
            else:
                check(k, rel(v, eb[k]))
        for c, v in ta.items():
            check(f"table {c}", rel(v, tb.get(c, np.array([]))))
        print(f"{case:<22} {'same' if not diffs else 'DIFFERENT: ' + '; '.join(diffs)}")
        same &= not diffs
    return same


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("rev", nargs="?", default="HEAD")
    ap.add_argument("--tol", type=float, default=1e-9)
    ap.add_argument("--q-tol", type=float, default=1e-6)
    ap.add_argument("--snapshot", nargs=2, metavar=("ROOT", "OUT"), help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.snapshot:
        snapshot(Path(a.snapshot[1]), Path(a.snapshot[0]))
        return
    with tempfile.TemporaryDirectory() as tmp:
        old_root = Path(tmp) / "old"
        old_root.mkdir()
        archive = subprocess.run(["git", "-C", str(ROOT), "archive", a.rev],
                                 check=True, capture_output=True).stdout
        subprocess.run(["tar", "-x", "-C", str(old_root)], input=archive, check=True)
        snaps = {}
        for name, root in (("before", old_root), ("after", ROOT)):
            out = Path(tmp) / f"{name}.pkl"
            env = dict(os.environ, PYTHONPATH=str(root))
            subprocess.run([sys.executable, __file__, "--snapshot", str(root), str(out)],
                           check=True, env=env)
            snaps[name] = pickle.loads(out.read_bytes())
    before, after = snaps["before"], snaps["after"]
    print(f"{a.rev} (before) against the working tree (after); tolerance {a.tol:g} relative, "
          f"noise ratios {a.q_tol:g}")
    ok = compare(before, after, a.tol, a.q_tol)
    print("\nCPU seconds per case (fit and monthly fits; before -> after; load average "
          f"{before['_load']:.2f} / {after['_load']:.2f}):")
    for case, c in before["_cpu_s"].items():
        print(f"  {case:<22} {c:6.2f} -> {after['_cpu_s'][case]:6.2f}")
    tb, ta = sum(before["_cpu_s"].values()), sum(after["_cpu_s"].values())
    print(f"  {'total':<22} {tb:6.2f} -> {ta:6.2f}")
    sys.exit(0 if ok else 1)


if __name__ == "__main__":
    main()
