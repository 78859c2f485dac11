"""`disagg compare`: each equipment's running draw in two periods, and whether it changed.

The site's files are read and aligned once over their whole span; each period is then the
intervals whose start falls on one of its local dates, fitted on its own exactly as
``disagg breakdown`` fits a range. The two fits are matched by equipment id (a combined
group such as ``CH-1+CHWP-1`` matches only a group of the same members) and every draw gets
a verdict: ``rising``, ``falling``, ``steady`` or ``unclear``.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

from disagg import __version__
from disagg.analyses.groups import group_id, grouped_site, inseparable_groups
from disagg.analyses.pipeline import CAUTION, check_confidence, load_inputs
from disagg.analyses.summary import ComparePeriod, CompareReport
from disagg.analyses.verdict import RULE as VERDICT_RULE
from disagg.analyses.verdict import VERDICTS, change_verdict  # noqa: F401 - VERDICTS: API
from disagg.errors import ConfigError, InputError
from disagg.fit.align import BASELOAD_COLUMN_COUNT, Aligned
from disagg.fit.estimate import Estimates, WeatherFit, estimate_draws
from disagg.fit.select import FormChoice, lowest
from disagg.inputs.config import SiteConfig, parse_period  # noqa: F401 - part of this module's API

COLUMNS = ["equipment", "kw_before", "kw_before_low", "kw_before_high", "kw_after",
           "kw_after_low", "kw_after_high", "change", "p_value", "verdict"]
# An estimate with one of these flags says more about the prior or the schedule than about
# the draw, so a change between two of them is no evidence (the flags of estimate.py).
UNCLEAR_FLAGS = ("prior-driven", "schedule-bound", "not-run")
UNCLEAR_FLAG_PREFIXES = ("inseparable:",)
# Smallest relative change called rising or falling by default: 5 % of the earlier draw
# (common practice, no source: below that, metering and weather noise dominate in practice).
DEFAULT_MIN_CHANGE = 0.05

METHOD = {
    "standard_error": (
        "each period's standard error is the larger of se_kw (Newey-West HAC on local-day sums, "
        "widened to the delete-a-block jackknife where that is significantly larger) and the "
        "larger half-width of the reported interval divided by its critical value, so that the "
        "baseload-profile refits that widen the interval widen the test too"),
    "test": ("z = (kw_after - kw_before) / sqrt(se_before^2 + se_after^2), the two periods' "
             "fits taken as independent; p_value two-sided from the standard normal"),
    "change": "after / before - 1 (fraction); interval by the delta method for a ratio",
    "verdict": ("unclear when an id is fitted in only one period, or either estimate is "
                "prior-driven, inseparable:<id>, schedule-bound or not-run, or the earlier draw "
                "is 0 kW; else the rule shared with disagg history --compare "
                "(disagg.analyses.verdict): " + VERDICT_RULE),
    "groups": ("loads whose run-hours are correlated at |r| >= 0.95 over the two periods are "
               "compared as their group A+B (its combined draw, fitted with the members' "
               "priors set aside); the members' rows say so"),
    "weather": ("a draw that varies with outdoor temperature is compared at the earlier "
                "fit's reference temperature (the site's [weather] reference_temp when set)"),
    "multiple_comparisons": "none: each equipment is tested on its own",
    "baseload_form": ("one baseload form for both periods (as one baseline model serves both "
                      "periods in measurement and verification): the form the before "
                      "period's data choose (breakdown's comparison of forms), kept with its "
                      "credible rivals for the after period, unless the site file's "
                      "[baseload] form pins one; baseload_form says which, and which form "
                      "each period's data prefer on their own"),
}


@dataclass
class CompareResult:
    """What ``disagg compare`` computes: compare.csv's table and compare.json's content."""

    site: SiteConfig
    table: pl.DataFrame
    report: CompareReport


def _unclear_flags(flags: list[str]) -> list[str]:
    return [f for f in flags if f in UNCLEAR_FLAGS or f.startswith(UNCLEAR_FLAG_PREFIXES)]


def _where(est: Estimates, eq_id: str) -> str:
    """In words, what a fit did with an id it has no fitted row for."""
    for t in est.terms:
        if t.id == eq_id:
            return "not run" if "not-run" in t.flags else "fitted"
        if len(t.members) > 1 and eq_id in t.members:
            return f"part of the combined row {t.id!r}"
    if eq_id in est.base_id.split("+")[1:]:
        return f"in the baseload row {est.base_id!r}"
    members = eq_id.split("+")
    if len(members) > 1:
        return "not combined: " + "; ".join(f"{m} {_where(est, m)}" for m in members)
    return "absent"


def _weather(est: Estimates, eq_id: str) -> WeatherFit | None:
    """The weather term of an id's fitted row, if its draw varies with temperature."""
    info = getattr(est, "weather", None) or {}
    for i, t in enumerate(est.terms):
        if t.id == eq_id:
            return info.get(i)
    return None


def _side(est: Estimates, eq_id: str, temp_c: float | None = None) -> dict:
    """One period's estimate of an id: kW, interval, the standard error used, flags.

    Args:
        temp_c: for a draw that varies with outdoor temperature, restate it at this
            temperature [degC] (None: at the fit's own reference temperature).
    """
    index = {t.id: i for i, t in enumerate(est.terms)}
    i = index.get(eq_id)
    if i is None or est.terms[i].column is None:
        return {"fitted": False, "where": _where(est, eq_id),
                "flags": est.terms[i].flags if i is not None else []}
    kw, low, high = float(est.kw[i]), float(est.kw_low[i]), float(est.kw_high[i])
    # The interval's larger half: the upper one is never cut at 0 kW; the lower one may hold
    # a baseload variant that the upper one does not.
    se = max(float(est.se_kw[i]), max(high - kw, kw - low) / est.critical)
    side = {"fitted": True, "where": "fitted", "kw": kw, "kw_low": low, "kw_high": high,
            "se_kw": se, "se_hac_kw": float(est.se_hac_kw[i]), "flags": list(est.terms[i].flags)}
    w = _weather(est, eq_id)
    if w is not None:
        side["reference_temp_c"] = float(w.reference_temp_c)
        if temp_c is not None and temp_c != w.reference_temp_c:
            # draw(T) = draw at balance + slope x degrees beyond balance (change-point form);
            # its variance a' V a with a = (1, degrees) and V the widened (draw, slope)
            # covariance of the fit.
            d = (temp_c - w.balance_temp_c if w.mode == "cooling"
                 else w.balance_temp_c - temp_c)
            a = np.array([1.0, max(d, 0.0)])
            kw = float(w.kw_at_balance + w.slope_kw_per_degc * a[1])
            se = float(np.sqrt(max(a @ np.asarray(w.cov) @ a, 0.0)))
            side.update(kw=kw, kw_low=max(kw - est.critical * se, 0.0),
                        kw_high=kw + est.critical * se, se_kw=se, reference_temp_c=temp_c)
    return side


def compare_estimates(before: Estimates, after: Estimates, confidence: float = 0.95,
                      min_change: float = DEFAULT_MIN_CHANGE) -> tuple[pl.DataFrame, list[dict]]:
    """Match two periods' fits by equipment id and test each draw for a change.

    For an id fitted in both periods, with kW draws b (before) and a (after) and standard
    errors s_b, s_a [kW]:

        z = (a - b) / sqrt(s_b^2 + s_a^2),  p_value = 2 Phi(-|z|)  (normal, two-sided),
        change = a / b - 1, its interval change +- q sqrt(s_a^2 + (a/b)^2 s_b^2) / b with
        q = Phi^-1(1/2 + confidence/2) (delta method for a ratio).

    The standard error of each period is the larger of its ``se_kw`` (the Newey-West HAC
    standard error on local-day sums, widened to the delete-a-block jackknife where that is
    significantly larger) and the larger half-width of its reported interval over its
    critical value: ``se_kw`` does not carry the baseload-profile refits, which widen only
    the interval. The two fits use disjoint intervals and are taken as independent.
    A draw that varies with outdoor temperature (a weather term) is compared at one
    temperature, the earlier fit's reference temperature: the later draw is restated there
    from its draw at the balance point, its slope and their covariance.

    Verdict:
        ``unclear`` when the id is fitted in only one period (absent, not run, combined or
        folded into the baseload in the other), when either estimate is flagged
        ``prior-driven``, ``inseparable:<id>``, ``schedule-bound`` or ``not-run``, or when
        the earlier draw is 0 kW; otherwise the shared rule of
        ``disagg.analyses.verdict.change_verdict`` (also used by ``disagg history
        --compare``): ``rising`` or ``falling`` when p_value < 1 - confidence and
        |change| >= min_change; ``steady`` when two one-sided tests (Schuirmann 1987) put
        the change inside +-min_change; else ``unclear``. No correction for testing several
        loads at once.

    Args:
        before, after: the two periods' fits (``disagg.fit.estimate.estimate_draws``).
        confidence: two-sided level of the intervals and of the test, a fraction.
        min_change: smallest |change| called rising or falling, a fraction of the earlier draw.

    Returns:
        (table with columns COLUMNS, one dict per row with the standard errors, z, the
        change's interval, both periods' flags and the reason for an unclear verdict).
        kW [kW], change a fraction, p_value a probability; null where not defined.

    References:
        Casella, G. & Berger, R. L. (2002). Statistical Inference, 2nd ed., Duxbury,
        section 5.5.4 (the delta method; from memory).
    """
    ids: list[str] = []
    for est in (before, after):
        for eq_id in [t.id for t in est.terms] + est.base_id.split("+")[1:]:
            if eq_id not in ids:
                ids.append(eq_id)
    rows, details = [], []
    for eq_id in ids:
        # A draw that varies with outdoor temperature is compared at one temperature: the
        # earlier fit's reference temperature (the site's [weather] reference_temp when set).
        w_before = _weather(before, eq_id)
        temp_c = float(w_before.reference_temp_c) if w_before is not None else None
        b, a = _side(before, eq_id), _side(after, eq_id, temp_c)
        row = {"equipment": eq_id}
        for name, s in (("before", b), ("after", a)):
            row[f"kw_{name}"] = s.get("kw")
            row[f"kw_{name}_low"] = s.get("kw_low")
            row[f"kw_{name}_high"] = s.get("kw_high")
        detail = {"equipment": eq_id, "flags_before": b["flags"], "flags_after": a["flags"],
                  "se_before_kw": b.get("se_kw"), "se_after_kw": a.get("se_kw"),
                  "z": None, "change_low": None, "change_high": None, "reason": None}
        if "reference_temp_c" in b or "reference_temp_c" in a:
            detail["reference_temp_c"] = a.get("reference_temp_c", b.get("reference_temp_c"))
        reasons = []
        for name, s in (("before", b), ("after", a)):
            if not s["fitted"]:
                reasons.append(f"no draw of its own in the {name} period ({s['where']})")
        change = p = None
        if not reasons:
            v = change_verdict(b["kw"], b["se_kw"], a["kw"], a["se_kw"], confidence,
                               min_change)
            p, change = v["p_value"], v["change"]
            detail["z"] = v["z"]
            detail["change_low"], detail["change_high"] = v["change_low"], v["change_high"]
            detail["p_equivalence"] = v["p_equivalence"]
            if change is None:
                reasons.append("the earlier draw is 0 kW: no relative change")
            for name, s in (("before", b), ("after", a)):
                bad = _unclear_flags(s["flags"])
                if bad:
                    reasons.append(f"the {name} estimate is {', '.join(bad)}")
        if reasons:
            verdict = "unclear"
            detail["reason"] = "; ".join(reasons)
        else:
            verdict = v["verdict"]
            if verdict == "unclear":
                detail["reason"] = (f"the change's interval {v['change_low']:+.1%} to "
                                    f"{v['change_high']:+.1%} is neither clearly beyond nor "
                                    f"clearly inside +-{min_change:.0%}")
        row.update(change=change, p_value=p, verdict=verdict)
        detail.update(change=change, p_value=p, verdict=verdict)
        rows.append(row)
        details.append(detail)
    schema = {c: (pl.String if c in ("equipment", "verdict") else pl.Float64) for c in COLUMNS}
    return pl.DataFrame(rows, schema=schema, orient="row"), details


def add_member_rows(table: pl.DataFrame, details: list[dict],
                    groups: list[list[str]]) -> tuple[pl.DataFrame, list[dict]]:
    """After each group's row, one row per member saying it is covered by the group."""
    rows, out = [], []
    for row, d in zip(table.iter_rows(named=True), details):
        rows.append(row)
        out.append(d)
        for g in groups:
            if row["equipment"] == group_id(g):
                for m in g:
                    rows.append({c: None for c in COLUMNS} | {"equipment": m,
                                                             "verdict": "unclear"})
                    out.append({"equipment": m, "flags_before": [], "flags_after": [],
                                "se_before_kw": None, "se_after_kw": None, "z": None,
                                "change_low": None, "change_high": None, "change": None,
                                "p_value": None, "verdict": "unclear",
                                "covered_by": row["equipment"],
                                "reason": (f"covered by the group row {row['equipment']!r}: "
                                           "its members run together and the data cannot "
                                           "tell them apart")})
    schema = {c: (pl.String if c in ("equipment", "verdict") else pl.Float64) for c in COLUMNS}
    return pl.DataFrame(rows, schema=schema, orient="row"), out


def _period_fit(site: SiteConfig, aligned: Aligned, local_day: np.ndarray,
                period: tuple[dt.date, dt.date], label: str, confidence: float,
                form: FormChoice | None = None) -> Estimates:
    """Fit the intervals whose start falls on the period's local dates.

    form: the baseload form to use with its credible rivals (the before period's choice);
    None: the data choose (or the site file pins it), as breakdown does.

    Raises:
        InputError: no usable interval, or too few to fit, in the period.
    """
    d0, d1 = period
    inside = (local_day >= d0) & (local_day <= d1)
    mask = aligned.use & inside
    where = f"{label} {d0}:{d1}"
    if not inside.any():
        first, last = local_day.min(), local_day.max()
        raise InputError(f"{site.meter.file}: no meter intervals in {where}; the meter "
                         f"covers {first} to {last} (local dates)")
    used = int(mask.sum())
    n_unknowns = len(aligned.equipment_ids) + BASELOAD_COLUMN_COUNT[site.baseload.profile]
    if used == 0:
        raise InputError(f"{site.meter.file}: no interval in {where} has both a meter reading "
                         "and a known run-log state for every equipment")
    if used < n_unknowns + 2:
        raise InputError(f"{site.meter.file}: only {used} usable meter intervals in {where} "
                         f"for {n_unknowns} unknowns; a fit needs at least {n_unknowns + 2}")
    try:
        return estimate_draws(site, dataclasses.replace(aligned, use=mask), confidence,
                              form=form)
    except ValueError as exc:
        raise InputError(f"{site.meter.file}: {where}: {exc}") from None


def preferred_form(choice: FormChoice) -> str:
    """The form a period's data prefer: the lowest criterion among the forms compared (ties
    to the form used), even where [baseload] form pins another."""
    tied = [sc.form.name for sc in lowest(choice.scores)]
    return choice.form.name if choice.form.name in tied else tied[0]


def baseload_form_of(est_before: Estimates, est_after: Estimates,
                     after_own: Estimates) -> dict:
    """compare.json's `baseload_form`: the form both periods use, where it was chosen, each
    period's own preference, and in words when the after period alone would differ."""
    used = est_before.form.form.name
    pinned = est_before.form.pinned
    before_prefers = preferred_form(est_before.form)
    after_prefers = preferred_form(after_own.form)
    where = ("pinned by the site file's [baseload] form" if pinned else
             "chosen by the data of the before period (the baseline) and kept for the after "
             "period, so that a change in a draw is not a change of baseload form")
    out = {"used": used, "q_before": est_before.form.form.q,
           "q_after": est_after.form.form.q, "pinned": pinned, "chosen": where,
           "before_prefers": before_prefers, "after_prefers": after_prefers,
           "before_forms": est_before.form.as_json(), "after_forms": after_own.form.as_json(),
           "note": None}
    if after_prefers != used:
        tried = {sc.form.name for sc in est_before.form.scores}
        why = ("the before period has too few intervals to try that form" if
               after_prefers not in tried else
               "the baseload's shape may itself have changed between the periods")
        out["note"] = (f"the after period on its own would have chosen the baseload form "
                       f"{after_prefers}, not {used}; both periods use {used} ("
                       + ("pinned by the site file" if pinned else "the before period's choice")
                       + f") so that the draws compare like with like; {why}")
    return out


def _period_report(est: Estimates, period: tuple[dt.date, dt.date],
                   own: Estimates) -> ComparePeriod:
    return ComparePeriod(date_from=period[0].isoformat(), date_to=period[1].isoformat(),
                         intervals_used=int(est.frame.height), days=int(est.fit.n_blocks),
                         critical_value=est.critical, baseload_row=est.base_id,
                         fit_quality=est.quality, warnings=est.warnings,
                         baseload_form=est.form.form.name,
                         form_preferred=preferred_form(own.form))


def compare_site(site_path: str | Path, before: tuple[dt.date, dt.date],
                 after: tuple[dt.date, dt.date], confidence: float = 0.95,
                 min_change: float = DEFAULT_MIN_CHANGE,
                 log_offset_min: float | None = None) -> CompareResult:
    """Fit each period on its own and say, per equipment, whether its draw changed.

    Args:
        site_path: the site TOML.
        before, after: (FROM, TO) local dates, inclusive; they must not overlap.
        confidence: level of the intervals and of the test, a fraction 0.5..0.999.
        min_change: smallest |change| called rising or falling, a fraction of the earlier draw.

    Returns:
        The table of ``compare_estimates`` and compare.json's content.

    Raises:
        ConfigError: bad settings or overlapping periods; InputError: bad files, or a period
        with no (or too little) usable data.
    """
    check_confidence(confidence)
    if not (math.isfinite(min_change) and min_change >= 0.0):
        raise ConfigError(f"--min-change {min_change}: expected a fraction of 0 or more, "
                          "such as 0.05 for 5 %")
    if before[0] <= after[1] and after[0] <= before[1]:
        raise ConfigError(f"--before {before[0]}:{before[1]} and --after {after[0]}:{after[1]} "
                          "overlap; expected two separate periods")
    site, aligned = load_inputs(site_path, log_offset_min=log_offset_min)
    return compare_aligned(site, aligned, before, after, confidence, min_change)


def compare_aligned(site: SiteConfig, aligned: Aligned, before: tuple[dt.date, dt.date],
                    after: tuple[dt.date, dt.date], confidence: float = 0.95,
                    min_change: float = DEFAULT_MIN_CHANGE) -> CompareResult:
    """compare_site on intervals already read and aligned (see compare_site)."""
    local_day = (aligned.frame["start_utc"].dt.convert_time_zone(site.timezone).dt.date()
                 .to_numpy())
    # Loads the two periods' data cannot tell apart are compared as their group.
    both = (((local_day >= before[0]) & (local_day <= before[1]))
            | ((local_day >= after[0]) & (local_day <= after[1])))
    groups = inseparable_groups(site, dataclasses.replace(aligned, use=aligned.use & both))
    gsite = grouped_site(site, groups)
    # One baseload form for both periods, as one baseline model serves both periods in
    # measurement and verification: chosen on the before period (or pinned by the site
    # file) and kept for the after period. The after period is first fitted as its data
    # choose on their own; when they choose the same form, that fit serves (its own noise
    # ratio); else it is fitted again with the before period's form, its credible rivals and
    # their noise ratios (as a month's fit keeps its range's).
    est_before = _period_fit(gsite, aligned, local_day, before, "--before", confidence)
    after_own = _period_fit(gsite, aligned, local_day, after, "--after", confidence)
    est_after = after_own
    if not est_before.form.pinned and after_own.form.form.name != est_before.form.form.name:
        est_after = _period_fit(gsite, aligned, local_day, after, "--after", confidence,
                                form=est_before.form)
    table, details = compare_estimates(est_before, est_after, confidence, min_change)
    table, details = add_member_rows(table, details, groups)
    form = baseload_form_of(est_before, est_after, after_own)
    report = CompareReport(
        tool=f"disagg {__version__}", site=site.name, timezone=site.timezone,
        site_file=str(site.path), confidence=confidence, min_change=min_change, method=METHOD,
        groups=[group_id(g) for g in groups],
        before=_period_report(est_before, before, est_before),
        after=_period_report(est_after, after, after_own),
        equipment=details, data_notes=aligned.notes, caution=CAUTION, baseload_form=form)
    return CompareResult(site, table, report)


