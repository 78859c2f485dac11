"""Fit results of estimate_draws on a fixed set of cases, saved and compared: the check that a
restructuring of disagg/fit/estimate.py changes no number.

    python bench/estimate_golden.py save /tmp/golden.pkl      # before the change
    python bench/estimate_golden.py compare /tmp/golden.pkl   # after: differences > 1e-12
    python bench/estimate_golden.py compare /tmp/golden.pkl --tol 1e-9   # a speed change

The fit.json blocks (form, variants, identifiability, quality) are saved as JSON text and
compared number by number, to the same tolerance (relative, or absolute below 1).

Cases (all invented data: the demo building and tests/synthetic*.py): the demo site's whole
breakdown; well-specified and misspecified synthetic buildings (occupied profile, constant
declared, with a wandering level); a combined always-together pair; a folded schedule-bound
load; declared closures on an hour-of-week profile; a pinned form; a month's fit that reuses
the range's FormChoice; the office with a moving baseload (several forms compared); a weather
term on the synthetic year. Each saves kw, kw_low, kw_high, se_kw, base_kw, cov_base,
level_kwh, tau2, the warnings, each term's flags, the fit.json dicts and the monthly table.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import pickle
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from disagg.analyses.breakdown import monthly_breakdown  # noqa: E402
from disagg.analyses.pipeline import breakdown_site  # noqa: E402
from disagg.fit.estimate import estimate_draws  # noqa: E402
from disagg.fit.select import Form  # noqa: E402
from synthetic import TZ, make_building, make_office  # noqa: E402
from synthetic_year import make_year  # noqa: E402


def _pack(e, tz: str) -> dict:
    table = monthly_breakdown(e, tz)
    return {
        "ids": [t.id for t in e.terms], "flags": [list(t.flags) for t in e.terms],
        "kw": e.kw, "kw_low": e.kw_low, "kw_high": e.kw_high, "se_kw": e.se_kw,
        "se_hac": e.se_hac_kw, "se_jack": e.se_jackknife_kw, "base_kw": e.base_kw,
        "cov_base": e.cov_base, "base_names": list(e.base_names), "base_id": e.base_id,
        "level_kwh": e.level_kwh, "tau2": e.tau2_kw2, "fitted": e.fitted,
        "design_coef": e.design_coef, "critical": e.critical, "warnings": list(e.warnings),
        "form": json.dumps(e.form.as_json(), sort_keys=True, default=str) if e.form else None,
        "variants": json.dumps(e.variants, sort_keys=True, default=str),
        "identifiability": json.dumps(e.identifiability, sort_keys=True, default=str),
        "quality": json.dumps(e.quality, sort_keys=True, default=str),
        "weather": {i: dataclasses.asdict(w) for i, w in e.weather.items()},
        "table": {c: table[c].to_list() for c in table.columns},
    }


def _site_with(s, **baseload):
    return dataclasses.replace(s.site, baseload=dataclasses.replace(s.site.baseload, **baseload))


def cases() -> dict[str, dict]:
    out = {}
    r = breakdown_site(ROOT / "configs" / "demo.toml")
    out["demo"] = _pack(r.estimates, r.site.timezone)
    # The demo's breakdown table: every month refitted with the range's FormChoice.
    out["demo-months"] = {"table": {c: r.breakdown[c].to_list() for c in r.breakdown.columns}}
    for name, kw in {"well": {}, "misspecified": {"misspecified": True},
                     "together": {"together": True},
                     "priors": {"priors": {"CH-1": (60.0, 6.0), "F-1": (11.0, 2.0)}}}.items():
        s = make_building(2, **kw)
        whole = estimate_draws(s.site, s.aligned)
        out[name] = _pack(whole, TZ)
        month = dataclasses.replace(s.aligned, use=s.aligned.use
                                    & (np.arange(len(s.aligned.use)) < 96 * 28))
        out[name + "-month"] = _pack(estimate_draws(s.site, month, form=whole.form), TZ)
    s = make_building(5, misspecified=True)
    out["pinned"] = _pack(estimate_draws(_site_with(s, form="constant+level"), s.aligned), TZ)
    out["static-pinned"] = _pack(estimate_draws(s.site, s.aligned, form=Form("constant", False)),
                                 TZ)
    s = make_building(3)
    closed = (dt.date(2025, 3, 12), dt.date(2025, 4, 2))
    out["how-closed"] = _pack(estimate_draws(_site_with(s, profile="hour-of-week",
                                                        closed=closed), s.aligned), TZ)
    out["occupied-closed"] = _pack(estimate_draws(_site_with(s, profile="occupied",
                                                             closed=closed), s.aligned), TZ)
    out["constant"] = _pack(estimate_draws(_site_with(s, profile="constant", spells=(),
                                                      spell_text=()), s.aligned), TZ)
    s = make_office(1, "all", days=63)
    out["office"] = _pack(estimate_draws(s.site, s.aligned, confidence=0.9), TZ)
    s = make_year(1, days=120)
    eq = tuple(dataclasses.replace(e, weather="cooling", balance_temp_c=18.0)
               if e.id == "CH-1" else e for e in s.site.equipment)
    site = dataclasses.replace(s.site, equipment=eq)
    out["weather"] = _pack(estimate_draws(site, s.aligned), TZ)
    return out


def _diff(a, b, path: str, tol: float, bad: list[str]) -> None:
    if isinstance(a, str) and isinstance(b, str) and a[:1] in "{[" and a != b:
        try:  # a fit.json block as JSON text: compare its numbers to the tolerance
            a, b = json.loads(a), json.loads(b)
        except ValueError:
            pass
    if isinstance(a, list) and isinstance(b, list) and any(
            isinstance(x, (dict, list)) for x in a + b):
        if len(a) != len(b):
            bad.append(f"{path}: length {len(a)} != {len(b)}")
            return
        for i, (x, z) in enumerate(zip(a, b)):
            _diff(x, z, f"{path}[{i}]", tol, bad)
        return
    if isinstance(a, dict):
        if set(a) != set(b):
            bad.append(f"{path}: keys {sorted(map(str, set(a) ^ set(b)))}")
        for k in a:
            if k in b:
                _diff(a[k], b[k], f"{path}.{k}", tol, bad)
    elif isinstance(a, (np.ndarray, list, tuple)) and not (
            isinstance(a, list) and a and isinstance(a[0], str)):
        try:
            x = np.asarray(a, dtype=float)
            z = np.asarray(b, dtype=float)
        except (TypeError, ValueError):
            if a != b:
                bad.append(f"{path}: {a!r} != {b!r}")
            return
        if x.shape != z.shape:
            bad.append(f"{path}: shape {x.shape} != {z.shape}")
            return
        scale = np.maximum(np.abs(x), 1.0)
        ok = (np.abs(x - z) <= tol * scale) | (np.isnan(x) & np.isnan(z))
        if not ok.all():
            i = np.flatnonzero(~ok.ravel())[0]
            bad.append(f"{path}: {(~ok).sum()} values differ, first {x.ravel()[i]!r} -> "
                       f"{z.ravel()[i]!r}")
    elif (isinstance(a, (int, float)) and isinstance(b, (int, float))
          and not isinstance(a, bool) and not isinstance(b, bool)):
        if not (abs(a - b) <= tol * max(abs(a), 1.0) or (np.isnan(a) and np.isnan(b))):
            bad.append(f"{path}: {a!r} -> {b!r}")
    elif a != b:
        bad.append(f"{path}: {str(a)[:200]!r} -> {str(b)[:200]!r}")


def main() -> int:
    args = sys.argv[1:]
    tol = 1e-12
    if "--tol" in args:
        i = args.index("--tol")
        tol = float(args[i + 1])
        del args[i:i + 2]
    mode, path = args[0], Path(args[1])
    skip = set(args[2:])  # fields to leave out of the comparison (changed on purpose)
    now = cases()
    if mode == "save":
        path.write_bytes(pickle.dumps(now))
        print(f"saved {len(now)} cases to {path}")
        return 0
    before = pickle.loads(path.read_bytes())
    bad: list[str] = []
    for name, fields in before.items():
        for k, v in fields.items():
            if k not in skip:
                _diff(v, now[name][k], f"{name}.{k}", tol, bad)
    print("\n".join(bad) if bad else f"all {len(before)} cases identical to {tol:g}")
    return 1 if bad else 0


if __name__ == "__main__":
    raise SystemExit(main())
