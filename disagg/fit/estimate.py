"""Aligned intervals -> fitted draws, with what cannot be told apart and honest intervals.

estimate_draws is a short sequence of named stages, each with a typed result:

    rows      design.rows_of          the intervals used and their arrays (Rows)
    terms     terms.plan_terms        what can be told apart: combined groups, loads folded
                                      into the baseload row, flags (TermPlan)
    design    design.BaseloadBuilder  the one design builder (also design() for drift)
              design.design_matrix
    form      choose_form             the baseload form, compared or pinned (FormChoice)
    solve     solve.solve             the fit and the wandering level (Solved)
    intervals intervals.intervals     jackknife, variants hull, by-day projection, credible
                                      forms' spread, schedule edges, tau^2 (Intervals)
    flags     term_results            per-term draws, intervals and flags (TermResults)
    assemble  assemble                Estimates, with fit.json's quality and identifiability
"""

from __future__ import annotations

from collections.abc import Collection
from dataclasses import dataclass, field

import numpy as np
import polars as pl

from disagg.fit.align import NS_PER_H, Aligned, hours_buffer, share_hours
from disagg.fit.design import (  # noqa: F401  (design, baseload_level, weather_specs: API)
    BaseloadBuilder,
    Design,
    Rows,
    _local_days,
    baseload_level,
    degrees,
    design,
    design_matrix,
    rows_of,
    term_hours,
    weather_columns,
    weather_specs,
)
from disagg.fit.intervals import (  # noqa: F401  (re-exported for callers and tests)
    FORM_SENSITIVE,
    JACKKNIFE_BLOCKS,
    MIN_ROWS_PER_COLUMN,
    MORE_FLEXIBLE,
    NUMERICAL_TOL,
    PRIOR_DRIVEN_WEIGHT,
    SCHEDULE_EDGE_MIN,
    SCHEDULE_EDGE_MIN_SWITCHES,
    SCHEDULE_EDGE_SHARE,
    Intervals,
    _project_out_days,
    between_week_variance,
    fitted_of,
    intervals,
    kw_range_text,
    kw_text,
    level_sum_variance,
    level_sum_variances,
    schedule_edge_share,
)
from disagg.fit.select import (
    Form,
    FormChoice,
    compare_forms,
    lowest,
    overdispersion,
    score,
)
from disagg.fit.solve import Priors, Solved, solve
from disagg.fit.solvers import Fit, fit_quality
from disagg.fit.terms import (  # noqa: F401  (re-exported for callers and tests)
    INSEPARABLE_R,
    INSEPARABLE_R2,
    LONG_DESIGN_ROWS,
    Term,
    TermPlan,
    inseparable,
    plan_terms,
)
from disagg.fit.wander import Spacing
from disagg.inputs.config import SiteConfig

# An interval that the stability checks widened by at least this factor is unstable.
UNSTABLE_WIDENING = 1.25
# ... and only when the widened interval matters: its half-width at least this share of the
# draw (common practice, no source). A narrower interval is still widened, but not flagged:
# +-0.1 % of a chiller's draw sends nobody to check the schedule.
UNSTABLE_MIN_HALF_SHARE = 0.02
# "Weak" prior for equipment and baseload columns without one: mean 0, sd 10 x the peak
# metered demand. It only keeps the solve well posed; prior_weight reports when it mattered.
WEAK_SD_FACTOR = 10.0
# Profiles the form comparison tries beside the declared one (the simpler ones it nests).
SIMPLER = {"constant": (), "occupied": ("constant",), "hour-of-week": ("occupied", "constant")}
HOW_LEVELS = 168
# Rows above which the forms are compared on a sample of whole weeks (choose_form): about
# 9 weeks of 15-minute data. Project choice for speed, no outside source.
COMPARE_MAX_ROWS = 6000


@dataclass
class WeatherFit:
    """A draw that varies with outdoor temperature: draw at balance + slope x degrees beyond
    balance (the three-parameter change-point form; ASHRAE Guideline 14 inverse models)."""

    mode: str  # "cooling" (degrees above balance) or "heating" (below)
    balance_temp_c: float
    reference_temp_c: float  # where the term's kw is stated [degC]
    kw_at_balance: float
    slope_kw_per_degc: float
    slope_se_kw_per_degc: float
    # (2, 2) covariance of (draw at balance [kW], slope [kW/degC]), widened as much as the
    # stability checks widened the draw's own interval.
    cov: np.ndarray


@dataclass
class Estimates:
    """Fitted draws and everything the breakdown and fit.json need.

    hours: (n_used, n_terms) equipment-hours of each term [h] in the intervals used;
    base: (n_used, m) baseload columns [h]; y: (n_used,) metered energy [kWh].
    kw, kw_low, kw_high, se_kw: (n_terms,) [kW], NaN for terms not fitted.
    cov_base: (m, m) covariance of the baseload kW [kW^2], widened like the draws.
    """

    terms: list[Term]
    base_names: list[str]
    base_id: str
    frame: pl.DataFrame  # used intervals: start_utc, end_utc, energy_kwh, interval_h
    hours: np.ndarray
    base: np.ndarray
    y: np.ndarray
    fitted: np.ndarray
    kw: np.ndarray
    kw_low: np.ndarray
    kw_high: np.ndarray
    se_kw: np.ndarray
    se_hac_kw: np.ndarray
    se_jackknife_kw: np.ndarray
    base_kw: np.ndarray
    cov_base: np.ndarray
    critical: float
    confidence: float
    fit: Fit
    quality: dict
    identifiability: dict
    variants: dict
    warnings: list[str]
    # Weather terms: weather_hours (n_used, n_terms) hours x degrees beyond balance [h degC];
    # weather: term index -> its WeatherFit.
    weather_hours: np.ndarray | None = None
    weather: dict[int, WeatherFit] = field(default_factory=dict)
    design_coef: np.ndarray | None = None  # the full coefficient vector [kW, kW/degC, kW]
    # The baseload form used and how the others compared (disagg.fit.select).
    form: FormChoice | None = None
    # (n_used,) the wandering level's energy in each interval [kWh] (zero without a level);
    # the baseload row is base @ base_kw + level_kwh.
    level_kwh: np.ndarray | None = None
    # (n_terms,) between-week variance of each draw (DerSimonian-Laird tau^2) [kW^2] and
    # (n_used,) each interval's local week label: the monthly kWh intervals use them.
    tau2_kw2: np.ndarray | None = None
    week: np.ndarray | None = None
    # (n_weeks, n_terms) each week's weight in the fitted draw [h^2] (weeks in increasing
    # order; intervals.BetweenWeeks.gh_h2); None: each week's sum of squared run-hours.
    week_gh_h2: np.ndarray | None = None
    # With the wandering level: local month (year x 100 + month) -> variance of the month's
    # baseload energy, the profile's and the level's together [kWh^2]
    # (intervals.level_sum_variance); None without the level (cov_base then suffices).
    base_var_kwh2: dict[int, float] | None = None
    # The same for the whole range's baseload energy [kWh^2] (None without the level).
    base_range_var_kwh2: float | None = None
    # (time zone, (n_used,) local year x 100 + month of each interval in that zone), as
    # align.frame_arrays made them: the monthly table need not convert the times again.
    local_month: tuple[str, np.ndarray] | None = None



def estimate_draws(site: SiteConfig, aligned: Aligned, confidence: float = 0.95,
                   form: Form | FormChoice | None = None,
                   response_loads: Collection[str] | None = None) -> Estimates:
    """Fit every draw on the intervals used and decide what can be told apart.

    form: the baseload form to use (with its noise ratio q), or a range's FormChoice (a
    month's fit: the same form, the same rivals); None = choose it from the data (or take
    the one pinned by [baseload] form), see disagg.fit.select.
    response_loads: the loads the switch-on response check looks at (a month's fit: those
    whose draw moved in the range's check, intervals.response_moved); None = every one.

    Raises:
        ValueError: too few usable intervals to fit.
    """
    rows = rows_of(aligned, site.timezone)
    builder = BaseloadBuilder(site, rows)
    B, base_names = builder.columns(site.baseload.profile)
    warnings = check_size(site, rows.n, len(aligned.equipment_ids), B.shape[1])
    H = rows.hours
    plan = plan_terms(site, aligned.equipment_ids, H, B)
    warnings += plan.warnings
    index = {e: j for j, e in enumerate(aligned.equipment_ids)}
    specs = weather_specs(site, plan.members)
    X = design_matrix([term_hours(H, index, m) for m in plan.members], rows.temp_c, specs, B,
                      into=hours_buffer(aligned, plan.members,
                                        len(plan.members) + len(specs) + B.shape[1]))
    del H, B
    # Long series: aligned.hours becomes a view of the design's term columns when they are
    # the same numbers (one (n, k) array through the fit, not two; align.share_hours).
    share_hours(aligned, X[:, :len(plan.members)], plan.members)
    k, kx = len(plan.fitted), len(plan.fitted) + len(specs)
    priors = Priors(plan.fitted, len(specs), WEAK_SD_FACTOR * max(float(np.max(
        rows.y / rows.interval_h)), 1.0))
    choice = choose_form(site, X[:, :kx], rows.y, rows.sp, rows.days, priors(0),
                         builder.columns, form, (rows.start_ns, rows.end_ns, rows.local_date))
    solved = solve(rows, X, k, kx, base_names, choice, builder, priors)
    del X
    share_hours(aligned, solved.Hf, plan.members)  # the chosen form's design, if rebuilt
    iv = intervals(site, rows, solved, builder, priors, plan.fitted, confidence,
                   response_loads)
    warnings += iv.jk.warnings
    res = term_results(site, rows, plan, solved, iv, specs)
    warnings += res.warnings
    return assemble(rows, plan, solved, iv, res, confidence, warnings)


def check_size(site: SiteConfig, n: int, n_loads: int, m: int) -> list[str]:
    """Refuse a fit with too few intervals (ValueError); warn about a short hour-of-week."""
    if n < n_loads + m + 2:
        raise ValueError(f"only {n} usable meter intervals for {n_loads + m} "
                         "unknowns; widen the date range or fix the gaps reported by check")
    warnings: list[str] = []
    if site.baseload.profile == "hour-of-week" and n < MIN_ROWS_PER_COLUMN * m:
        warnings.append(f"the hour-of-week baseload has 168 levels but only {n} intervals "
                        f"(under {MIN_ROWS_PER_COLUMN} per level): its shape is poorly known; "
                        "use occupied or constant for short ranges")
    return warnings


@dataclass
class TermResults:
    """The flags stage's result, per term in row order (NaN where not fitted).

    kw, kw_low, kw_high, se_kw: the draw (at the reference temperature for a weather term),
    its interval and the standard error that goes with it [kW]; se_hac, se_jack: the HAC
    and jackknife standard errors [kW]; hours, weather_hours: (n, terms) [h], [h degC];
    weather: term index -> fit.json's weather block (with the (draw, slope) covariance).
    The terms' flags are appended to the plan's Term objects.
    """

    kw: np.ndarray
    kw_low: np.ndarray
    kw_high: np.ndarray
    se_kw: np.ndarray
    se_hac: np.ndarray
    se_jack: np.ndarray
    hours: np.ndarray
    weather_hours: np.ndarray
    weather: dict[int, WeatherFit]
    warnings: list[str] = field(default_factory=list)


def term_results(site: SiteConfig, rows: Rows, plan: TermPlan, s: Solved, iv: Intervals,
                 wspecs: dict[int, tuple[str, float]]) -> TermResults:
    """Each term's draw and interval, and its flags with their plain-words reasons."""
    warnings: list[str] = []
    coef, low, high, jk = s.coef, iv.low, iv.high, iv.jk
    q_hac, half_hac, se_final = jk.q_hac, jk.half_hac, iv.se_final
    for c in iv.schedule_bound:
        t = plan.fitted[c]
        t.flags.append("schedule-bound")
        warnings.append(f"{t.id} runs on the same days and hours as the baseload "
                        "schedule: its draw holds only if the baseload follows its "
                        "declared schedule on every day")
    terms, n, k = plan.terms, rows.n, s.k
    Hf, Wf, cov = s.Hf, s.Wf, s.fit.cov
    temp = rows.temp_c
    nt = len(terms)
    kw = np.full(nt, np.nan)
    kw_low = np.full(nt, np.nan)
    kw_high = np.full(nt, np.nan)
    se_kw = np.full(nt, np.nan)
    se_h = np.full(nt, np.nan)
    se_j = np.full(nt, np.nan)
    # With every term fitted, in design order, the term hours are the design's own columns:
    # a view, not a second (n, k) copy (a site-year of 1-minute data: ~125 MB).
    as_design = [t.column for t in terms] == list(range(k))
    hours = Hf if as_design else np.zeros((n, nt))
    weather_hours = np.zeros((n, nt))
    weather_info: dict[int, WeatherFit] = {}
    for i, t in enumerate(terms):
        if t.column is None:
            if t.prior_kw is not None:
                kw[i] = t.prior_kw
            continue
        c = t.column
        if not as_design:
            hours[:, i] = Hf[:, c]
        kw[i], kw_low[i], kw_high[i] = coef[c], low[c], high[c]
        # The standard error that goes with the final (possibly widened, lopsided) interval.
        se_kw[i] = max(se_final[c], (coef[c] - low[c]) / q_hac, (high[c] - coef[c]) / q_hac)
        se_h[i], se_j[i] = jk.se_hac[c], jk.se_jack[c]
        if s.fit.prior_weight[c] >= PRIOR_DRIVEN_WEIGHT:
            t.flags.append("prior-driven")
            if t.prior_kw is None:
                warnings.append(f"{t.id}: the data cannot determine its draw and it has no "
                                "prior; its kW is not meaningful")
        grew = (high[c] - low[c]) - UNSTABLE_WIDENING * iv.width_hac[c]
        if (iv.widened[c] and grew > NUMERICAL_TOL * max(abs(coef[c]), 1.0)
                and (high[c] - low[c]) / 2.0 >= UNSTABLE_MIN_HALF_SHARE * abs(coef[c])):
            t.flags.append("unstable")
            at = " at its balance temperature" if c in wspecs else ""
            why = [f"{kw_text(coef[c])} kW{at} with the {s.choice.form.name} baseload"]
            why += iv.moved.get(c, [])
            if jk.use_jack[c]:
                why.append(f"leaving out single time blocks moves it by +-{jk.se_jack[c]:.2g} "
                           "kW (1 sd)")
            warnings.append(f"{t.id} is unstable: {'; '.join(why)}. Its interval{at} "
                            f"{kw_range_text(low[c], high[c])} kW spans these; check "
                            "the declared baseload schedule and whether its draw changes over "
                            "the period")
        if c in iv.form_moves:
            t.flags.append("form-sensitive")
            why = ("the baseload form was pinned in the site file" if s.choice.pinned
                   else "the data cannot tell which baseload shape is right")
            warnings.append(f"{t.id} depends on the baseload form: {kw_text(coef[c])} kW with "
                            f"the {s.choice.form.name} baseload, "
                            f"{'; '.join(iv.form_moves[c])}; {why}, and the interval "
                            "includes both")
        if c in iv.step_moves:
            t.flags.append("switch-steps")
            warnings.append(f"{t.id}: the meter steps by {iv.step_moves[c]}: something not in "
                            "the run log tends to start or stop with it (or its logged times "
                            "are off at one edge); its interval "
                            f"{kw_range_text(low[c], high[c])} kW spans both")
        if c in iv.edge_moves:
            t.flags.append("schedule-edge")
            warnings.append(f"{t.id} switches near the declared schedule's edges "
                            f"({iv.edge_moves[c]} happens within {SCHEDULE_EDGE_MIN} minutes "
                            "of a start or end of the occupied hours): the data can mix it up "
                            "with the baseload changing at those times; its interval "
                            f"{kw_range_text(low[c], high[c])} kW includes the estimate "
                            "with the "
                            "baseload's own shape around the edges")
        if coef[c] <= 1e-9:
            t.flags.append("at-zero")
        if c in wspecs:
            s_col = k + list(wspecs).index(c)
            mode, balance_c = wspecs[c]
            weather_hours[:, i] = Wf[:, s_col - k]
            run = Hf[:, c]
            t_ref = (site.weather.reference_temp_c if site.weather.reference_temp_c is not None
                     else float(np.sum(run * temp) / run.sum()) if run.sum() > 0 else balance_c)
            d_ref = degrees(np.array([t_ref]), mode, balance_c)[0]
            # Widen the (draw, slope) covariance as much as the stability checks widened
            # the draw's own interval.
            ratio = (max(1.0, (high[c] - low[c]) / (2.0 * half_hac[c])) if half_hac[c] > 0
                     else 1.0)
            V2 = cov[np.ix_([c, s_col], [c, s_col])] * ratio**2
            a = np.array([1.0, d_ref])
            half_ref = q_hac * float(np.sqrt(max(a @ V2 @ a, 0.0)))
            kw[i] = coef[c] + coef[s_col] * d_ref
            kw_low[i], kw_high[i] = max(kw[i] - half_ref, 0.0), kw[i] + half_ref
            se_kw[i] = half_ref / q_hac
            weather_info[i] = WeatherFit(
                mode=mode, balance_temp_c=balance_c, reference_temp_c=t_ref,
                kw_at_balance=float(coef[c]), slope_kw_per_degc=float(coef[s_col]),
                slope_se_kw_per_degc=float(np.sqrt(max(V2[1, 1], 0.0))), cov=V2)
    return TermResults(kw=kw, kw_low=kw_low, kw_high=kw_high, se_kw=se_kw, se_hac=se_h,
                       se_jack=se_j, hours=hours, weather_hours=weather_hours,
                       weather=weather_info, warnings=warnings)


def assemble(rows: Rows, plan: TermPlan, s: Solved, iv: Intervals, res: TermResults,
             confidence: float, warnings: list[str]) -> Estimates:
    """The Estimates: the baseload's covariance (widened to the jackknife's like the
    draws), the fitted energy, fit quality (per interval, per whole clock hour, per month)
    and fit.json's identifiability block."""
    X, coef, jk = s.X, s.coef, iv.jk
    base_slice = slice(s.kx, X.shape[1])
    cov = s.fit.cov
    cov_base = cov[base_slice, base_slice]
    if jk.checked:
        cov_base = _wider(cov[base_slice, base_slice], jk.cov_jack[base_slice, base_slice] *
                          (jk.q_jack / jk.q_hac) ** 2)
    fitted = fitted_of(X, coef, s.level_kwh)
    y = rows.y
    quality = {"interval": fit_quality(y, fitted, X.shape[1])}
    # Fit quality by clock hour (UTC hours: whole hours of every zone with whole-hour
    # offsets) and by local month.
    _, hour = np.unique(rows.start_ns // NS_PER_H, return_inverse=True)
    hour = hour.reshape(-1)
    whole = np.abs(np.bincount(hour, weights=rows.interval_h) - 1.0) < 1e-9
    if whole.sum() > X.shape[1] + 1:
        quality["hourly"] = fit_quality(np.bincount(hour, weights=y)[whole],
                                        np.bincount(hour, weights=fitted)[whole], X.shape[1])
    y_sum = float(np.sum(y))
    quality["monthly"] = {"months": len(np.unique(rows.month)),
                          "nmbe_pct": float(100 * (y_sum - float(np.sum(fitted))) / y_sum)
                          if y_sum else float("nan")}
    base_var = base_range_var = None
    if s.level:
        covs = (cov,) + ((jk.cov_jack * (jk.q_jack / jk.q_hac) ** 2,) if jk.checked else ())
        # Each month's and the whole range's, with one factorisation (the same numbers as
        # level_sum_variance by months and with one label).
        months = np.unique(rows.month)
        var = level_sum_variances(rows.sp, s.choice.form.q, s.fit.sigma2, X, base_slice,
                                  [rows.month == m for m in months]
                                  + [np.ones(rows.n, dtype=bool)], covs)
        base_var = {int(m): v for m, v in zip(months, var)}
        base_range_var = var[-1]
    k = s.k
    return Estimates(
        terms=plan.terms, base_names=s.base_names, base_id=plan.base_id, frame=rows.frame,
        hours=res.hours, base=s.B, y=y, fitted=fitted, kw=res.kw, kw_low=res.kw_low,
        kw_high=res.kw_high, se_kw=res.se_kw, se_hac_kw=res.se_hac,
        se_jackknife_kw=res.se_jack, base_kw=coef[base_slice], cov_base=cov_base,
        weather_hours=res.weather_hours, weather=res.weather, design_coef=coef,
        critical=jk.q_hac, confidence=confidence, fit=s.fit, quality=quality,
        identifiability=plan.identifiability(PRIOR_DRIVEN_WEIGHT), variants=iv.variants,
        warnings=warnings, form=s.choice, level_kwh=s.level_kwh,
        tau2_kw2=np.array([iv.tau2[t.column] if t.column is not None and t.column < k else 0.0
                           for t in plan.terms]),
        week=iv.week,
        week_gh_h2=np.column_stack([iv.week_gh[:, t.column] if t.column is not None
                                    and t.column < k else np.zeros(len(iv.week_gh))
                                    for t in plan.terms]) if plan.terms else None,
        base_var_kwh2=base_var, base_range_var_kwh2=base_range_var,
        local_month=(rows.tz, rows.month))


def choose_form(site: SiteConfig, Hx: np.ndarray, y: np.ndarray, sp: Spacing, days: np.ndarray,
                prior: tuple[np.ndarray, np.ndarray], base_for,
                given: Form | FormChoice | None,
                when: tuple[np.ndarray, np.ndarray, np.ndarray]) -> FormChoice:
    """The baseload form: compare the declared profile, the simpler ones it nests and the
    richer ones the data can carry, each with the wandering level and the narrow ones also
    without it (disagg.fit.select.compare_forms), and take the lowest criterion, or
    the form pinned by [baseload] form. given: a Form to use; or a FormChoice (a month's
    fit: the range's chosen form and its credible rivals, at the range's noise ratios).
    when: (start_ns, end_ns, local_date) of the rows.

    A range of more than COMPARE_MAX_ROWS rows is compared on a systematic sample of whole
    local weeks (every k-th week, at least COMPARE_MAX_ROWS rows): the level walks across
    the weeks left out (its step variance grows with the time between rows), so every form
    fits the same sample as it would the whole range; the chosen form is then fitted on
    every row.
    """
    start_ns, end_ns, local_date = when
    if len(y) > COMPARE_MAX_ROWS:
        week = (local_date.astype(np.int64) + 3) // 7
        _, week_no = np.unique(week, return_inverse=True)
        step = max(1, int(len(y) // COMPARE_MAX_ROWS))
        sel = (week_no.reshape(-1) % step) == (step // 2)
        if sel.sum() > 2 * Hx.shape[1] + 400:
            inner = base_for
            Hx, y, days = Hx[sel], y[sel], days[sel]
            sp = Spacing.from_ns(start_ns[sel], end_ns[sel])

            def base_for(p: str, _inner=inner, _sel=sel):
                return _inner(p, _sel)
    declared = site.baseload.profile
    fixed: dict[str, float] = {}
    levels = True
    if isinstance(given, FormChoice):
        rivals = given.credible() or [sc for sc in given.scores
                                      if sc.form.name == given.form.name]
        profiles = list(dict.fromkeys([given.form.profile] + [sc.form.profile for sc in rivals]))
        fixed = {sc.form.profile: sc.form.q for sc in given.scores if sc.form.level}
        form, pinned = given.form, given.pinned
    elif isinstance(given, Form):
        profiles, form, pinned = [given.profile], given, True
        levels = given.level
        if given.level and given.q > 0:
            fixed = {given.profile: given.q}
    else:
        profiles = [p for p in SIMPLER[declared]
                    if p != "occupied" or site.baseload.spells][::-1] + [declared]
        if declared == "occupied" and len(y) >= MIN_ROWS_PER_COLUMN * (Hx.shape[1] + 70):
            profiles.append("occupied-edges")
        # The hour-of-week profile is tried too, when the data can carry its 168 levels: a
        # declared schedule states when the building is occupied, not the baseload's shape
        # within the day (lights that ramp, a daily swing).
        # With a declared schedule, it has the occupied-edges columns too.
        if (declared != "hour-of-week"
                and len(y) >= MIN_ROWS_PER_COLUMN * (Hx.shape[1] + HOW_LEVELS + 70)):
            profiles.append("hour-of-week-edges" if "occupied-edges" in profiles
                            else "hour-of-week")
        pinned = site.baseload.form != "auto"
        form = Form.parse(site.baseload.form) if pinned else None
        if form is not None and form.profile not in profiles:
            profiles.append(form.profile)  # pinned beyond what the data would be offered
    cols = {p: base_for(p)[0] for p in profiles}
    mean, sd = prior
    names = ({sc.form.name for sc in rivals} | {given.form.name}
             if isinstance(given, FormChoice) else None)
    scores, resid = compare_forms(Hx, y, sp, cols, days, mean, sd, levels=levels,
                                  fixed_q=fixed or None, only=names)
    if form is not None and not form.level and not any(sc.form.name == form.name for sc in scores):
        # A wide profile (hour-of-week) is compared with the level only: a pinned static
        # one is scored on its own.
        scores += compare_forms(Hx, y, sp, {form.profile: cols[form.profile]}, days, mean, sd,
                                levels=False)[0]
    c = overdispersion(resid) if resid is not None else 1.0
    score(scores, c, max(len(y) - 1, 1))
    if form is not None:
        match = [sc for sc in scores if sc.form.name == form.name]
        best = match[0].form
    else:
        # Ties (to rounding) go to the declared profile, then to the simpler form.
        best = min(lowest(scores), key=lambda sc: (sc.form.profile != declared, sc.n_params)).form
    return FormChoice(form=best, pinned=pinned, scores=scores, overdispersion=c,
                      from_range=isinstance(given, FormChoice))



def _wider(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The covariance with the larger total variance (for sums of baseload columns)."""
    return a if np.trace(a) >= np.trace(b) else b
