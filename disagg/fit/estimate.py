"""Aligned intervals -> fitted draws, with what cannot be told apart and honest intervals.

Steps: build the design from the intervals used; find equipment that cannot be separated
from other equipment or from the baseload schedule; combine such equipment when no prior can
split it, flag it when one can; fit; then widen each interval where the estimate moves with
the time period (delete-a-block jackknife) or with a more flexible baseload profile, and flag
`unstable` where that widening is large.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import polars as pl

from disagg.fit.align import (
    NS_PER_H,
    Aligned,
    baseload_columns,
    edge_columns,
    frame_arrays,
    frame_baseload,
    share_hours,
    term_hours,
)
from disagg.fit.select import (
    Form,
    FormChoice,
    compare_forms,
    kept_columns,
    overdispersion,
    score,
)
from disagg.fit.solvers import (
    Fit,
    Indicators,
    chi2_upper_quantile,
    collinearity,
    fit_model,
    fit_quality,
    jackknife_cov,
    quantile,
)
from disagg.fit.wander import Spacing, smooth_level, whiten
from disagg.inputs.config import BaseloadSettings, SiteConfig

# Two equipment hour series correlated at or above this cannot be told apart; the same
# bound on R^2 against the baseload columns, and on R^2 against everything (VIF >= 20).
# Common practice, no source (VIF 10-20 is the usual range of rule-of-thumb cut-offs).
INSEPARABLE_R = 0.95
INSEPARABLE_R2 = INSEPARABLE_R**2
# An estimate whose posterior precision comes at least half from its prior is prior-driven.
PRIOR_DRIVEN_WEIGHT = 0.5
# An interval that the stability checks widened by at least this factor is unstable.
UNSTABLE_WIDENING = 1.25
# ... and only when the widened interval matters: its half-width at least this share of the
# draw (common practice, no source). A narrower interval is still widened, but not flagged:
# +-0.1 % of a chiller's draw sends nobody to check the schedule.
UNSTABLE_MIN_HALF_SHARE = 0.02
# "Weak" prior for equipment and baseload columns without one: mean 0, sd 10 x the peak
# metered demand. It only keeps the solve well posed; prior_weight reports when it mattered.
WEAK_SD_FACTOR = 10.0
JACKKNIFE_BLOCKS = 10
# A baseload variant is refitted only with at least this many intervals per fitted column
# (common practice, no source): fewer, and it fits the noise.
MIN_ROWS_PER_COLUMN = 10
# Differences in kW smaller than this fraction of the draw (or of 1 kW) are rounding, not a
# change: they neither widen an interval nor flag it.
NUMERICAL_TOL = 1e-6
# Designs with more rows than this (a year of 1-minute data) are not copied for the
# collinearity diagnostics: collinearity() reads them a chunk of rows at a time.
LONG_DESIGN_ROWS = 65536
MORE_FLEXIBLE = {"constant": ("occupied", "hour-of-week"), "occupied": ("hour-of-week",),
                 "occupied-edges": ("hour-of-week",), "hour-of-week": (),
                 "hour-of-week-edges": ()}
# Profiles the form comparison tries beside the declared one (the simpler ones it nests).
SIMPLER = {"constant": (), "occupied": ("constant",), "hour-of-week": ("occupied", "constant")}
# A draw that moves by more than this fraction between credible baseload forms (and by more
# than its own interval's half-width) is flagged form-sensitive. Common practice, no source.
FORM_SENSITIVE = 0.10
HOW_LEVELS = 168
# Rows above which the forms are compared on a sample of whole weeks (choose_form): about
# 9 weeks of 15-minute data. Project choice for speed, no outside source.
COMPARE_MAX_ROWS = 6000
# A load with at least this share of its switching within SCHEDULE_EDGE_MIN minutes of the
# declared schedule's edges (and at least SCHEDULE_EDGE_MIN_SWITCHES switches) is flagged
# schedule-edge. Common practice, no source.
SCHEDULE_EDGE_SHARE = 0.5
SCHEDULE_EDGE_MIN = 60
SCHEDULE_EDGE_MIN_SWITCHES = 8


@dataclass
class Term:
    """One fitted draw: a piece of equipment, or a combined group that cannot be split."""

    id: str
    members: list[str]
    name: str
    prior_kw: float | None
    prior_sd_kw: float | None
    prior_source: str
    flags: list[str] = field(default_factory=list)
    column: int | None = None  # column in the design, None when not fitted


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
    # weather: term index -> mode, balance and reference temperature [degC], draw at the
    # balance point [kW], slope [kW/degC] and the (draw, slope) covariance "cov".
    weather_hours: np.ndarray | None = None
    weather: dict = field(default_factory=dict)
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


class _UnionFind:
    def __init__(self, n: int):
        self.parent = list(range(n))

    def find(self, i: int) -> int:
        while self.parent[i] != i:
            self.parent[i] = self.parent[self.parent[i]]
            i = self.parent[i]
        return i

    def union(self, i: int, j: int) -> None:
        self.parent[self.find(i)] = self.find(j)


def inseparable(H: np.ndarray, B: np.ndarray) -> dict:
    """Which loads the data cannot tell apart, from each other or from the baseload.

    Args:
        H: (n, k) equipment-hours of the intervals used; B: (n, m) baseload columns.

    Returns:
        active: indices of the loads with run-hours; corr: correlation of the active loads'
        hours (in the order of active); r2_base, vif: index -> figure for active loads;
        pairs: (i, j, r) for active loads with |r| >= INSEPARABLE_R; with_baseload: indices
        whose R^2 against the baseload columns is at least INSEPARABLE_R2.
    """
    run_total = H.sum(axis=0)
    active = [j for j in range(H.shape[1]) if run_total[j] > 0]
    if not active:
        return {"active": [], "corr": np.zeros((0, 0)), "r2_base": {}, "vif": {}, "pairs": [],
                "with_baseload": []}
    # A long design with every load active is used as it is (no copy of 1-minute data).
    long = len(H) > LONG_DESIGN_ROWS and len(active) == H.shape[1]
    d = collinearity(H if long else H[:, active], B)
    pairs = [(active[a], active[b], float(d["corr"][a, b]))
             for a in range(len(active)) for b in range(a + 1, len(active))
             if abs(d["corr"][a, b]) >= INSEPARABLE_R]
    return {
        "active": active, "corr": d["corr"],
        "r2_base": {j: float(d["r2_base"][a]) for a, j in enumerate(active)},
        "vif": {j: float(d["vif"][a]) for a, j in enumerate(active)},
        "pairs": pairs,
        "with_baseload": [j for a, j in enumerate(active) if d["r2_base"][a] >= INSEPARABLE_R2],
    }


def degrees(temp_c: np.ndarray, mode: str, balance_c: float) -> np.ndarray:
    """Degrees beyond the balance temperature: (T - Tb)+ for cooling, (Tb - T)+ for heating.

    References:
        Kissock, J. K., Haberl, J. S. & Claridge, D. E. (2003). Inverse modeling toolkit:
        numerical algorithms (ASHRAE RP-1050). ASHRAE Transactions 109(2) (three-parameter
        change-point forms; citation from memory).
    """
    d = temp_c - balance_c if mode == "cooling" else balance_c - temp_c
    return np.maximum(d, 0.0)


def weather_specs(site: SiteConfig, term_members: list[list[str]]) -> dict[int, tuple[str, float]]:
    """Term index -> (mode, balance temperature [degC]) for terms with a weather-dependent
    member (a combined group takes its first such member's setting)."""
    by_id = {e.id: e for e in site.equipment}
    out = {}
    for c, members in enumerate(term_members):
        for m in members:
            e = by_id[m]
            if e.weather:
                out[c] = (e.weather, float(e.balance_temp_c))
                break
    return out


def weather_columns(H: np.ndarray, temp_c: np.ndarray | None,
                    specs: dict[int, tuple[str, float]]) -> np.ndarray:
    """Hours x degrees beyond balance for each weather term, in term order [h degC]."""
    if not specs:
        return np.zeros((H.shape[0], 0))
    return np.column_stack([H[:, c] * degrees(temp_c, mode, bal) for c, (mode, bal) in specs.items()])


def _local_days(local_date: np.ndarray) -> np.ndarray:
    """Consecutive integer label (1, 2, ...) of each row's local calendar day (as days since
    1970-01-01)."""
    return np.unique(local_date, return_inverse=True)[1].reshape(-1).astype(np.int64) + 1


def estimate_draws(site: SiteConfig, aligned: Aligned, confidence: float = 0.95,
                   form: Form | FormChoice | None = None) -> Estimates:
    """Fit every draw on the intervals used and decide what can be told apart.

    form: the baseload form to use (with its noise ratio q), or a range's FormChoice (a
    month's fit: the same form, the same rivals); None = choose it from the data (or take
    the one pinned by [baseload] form), see disagg.fit.select.

    Raises:
        ValueError: too few usable intervals to fit.
    """
    use = aligned.use
    tz = site.timezone
    frame = aligned.frame.filter(pl.Series(use))
    n = frame.height
    H_all = aligned.hours if use.all() else aligned.hours[use]  # read only: no copy needed
    eq_by_id = {e.id: e for e in site.equipment}
    ids = aligned.equipment_ids
    y = frame["energy_kwh"].to_numpy().astype(float)
    # Whole-frame arrays are computed once (align.frame_arrays); a month's fit takes its rows.
    everything = bool(use.all())
    arrays = {k: v if everything else v[use] for k, v in frame_arrays(aligned, tz).items()}
    start_ns, end_ns = arrays["start_ns"], arrays["end_ns"]

    def base_cols(settings: BaseloadSettings,
                  rows: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
        """A profile's columns over the rows used (or over a selection of them)."""
        if settings.profile == "hour-of-week":
            if rows is None:
                return baseload_columns(settings, tz, frame["start_utc"], start_ns, end_ns,
                                        how=arrays["hour_of_week"])
            return baseload_columns(settings, tz, frame["start_utc"].filter(pl.Series(rows)),
                                    start_ns[rows], end_ns[rows],
                                    how=arrays["hour_of_week"][rows])
        cols, names = frame_baseload(aligned, settings, tz)
        cols = cols if everything else cols[use]
        return (cols if rows is None else cols[rows]), names

    def closure_column(rows: np.ndarray | None = None) -> np.ndarray:
        """A variant must nest the declared profile: it gets the declared closures too, as
        the spell hours that the closure calendar removes."""
        full, _ = base_cols(BaseloadSettings("occupied", site.baseload.spells), rows)
        shut, _ = base_cols(site.baseload, rows)
        return full[:, 0] - shut[:, 0]

    def base_for(profile: str, rows: np.ndarray | None = None) -> tuple[np.ndarray, list[str]]:
        """The baseload columns of a profile [h] (rows: a boolean selection of the rows)."""
        if profile.endswith("-edges"):
            cols, names = base_for(profile[:-len("-edges")], rows)
            sel = slice(None) if rows is None else rows
            starts = frame["start_utc"] if rows is None else frame["start_utc"].filter(
                pl.Series(rows))
            more, more_names = edge_columns(site.baseload, tz, starts,
                                            (end_ns[sel] - start_ns[sel]) / NS_PER_H,
                                            hourly=profile.startswith("hour-of-week"))
            return np.column_stack([cols, more]), names + more_names
        if profile == site.baseload.profile:
            return base_cols(site.baseload, rows)
        cols, names = base_cols(BaseloadSettings(profile, site.baseload.spells,
                                                 site.baseload.spell_text), rows)
        if site.baseload.closed and site.baseload.spells:
            cols = np.column_stack([cols, closure_column(rows)])
            names = names + ["baseload_closed_kw"]
        return cols, names

    def how_columns() -> tuple[np.ndarray, Indicators]:
        """The hour-of-week variant's baseload: dense closure column (when closures are
        declared; see base_for) and the 168 hour-of-week columns by row."""
        ind = Indicators(arrays["hour_of_week"], (end_ns - start_ns) / NS_PER_H, 168)
        if site.baseload.closed and site.baseload.spells:
            return closure_column()[:, None], ind
        return np.zeros((n, 0)), ind

    B, base_names = base_for(site.baseload.profile)
    if n < len(ids) + B.shape[1] + 2:
        raise ValueError(f"only {n} usable meter intervals for {len(ids) + B.shape[1]} "
                         "unknowns; widen the date range or fix the gaps reported by check")
    warnings: list[str] = []
    if site.baseload.profile == "hour-of-week" and n < MIN_ROWS_PER_COLUMN * B.shape[1]:
        warnings.append(f"the hour-of-week baseload has 168 levels but only {n} intervals "
                        f"(under {MIN_ROWS_PER_COLUMN} per level): its shape is poorly known; "
                        "use occupied or constant for short ranges")
    interval_h = frame["interval_h"].to_numpy()
    peak_kw = float(np.max(y / interval_h))
    weak_sd = WEAK_SD_FACTOR * max(peak_kw, 1.0)

    # --- what can be told apart -------------------------------------------------------
    sep = inseparable(H_all, B)
    active = sep["active"]
    r2_base = {ids[j]: r for j, r in sep["r2_base"].items()}
    vif = {ids[j]: v for j, v in sep["vif"].items()}
    has_prior = {e.id: e.prior.informative for e in site.equipment}

    folded: list[str] = []  # no prior and inseparable from the baseload: joins the baseload row
    base_flagged: list[str] = []
    for j in sep["with_baseload"]:
        (base_flagged if has_prior[ids[j]] else folded).append(ids[j])
    pool = [j for j in active if ids[j] not in folded]
    uf = _UnionFind(len(ids))
    for i, j, _ in sep["pairs"]:
        if i in pool and j in pool:
            uf.union(i, j)
    # Several loads that together mirror another (a = b + c) show only in the VIF: join a
    # with the loads that carry its regression on everything else.
    for j in pool:
        if vif[ids[j]] >= 1.0 / (1.0 - INSEPARABLE_R2) and r2_base[ids[j]] < INSEPARABLE_R2:
            others = [i for i in pool if i != j]
            Z = np.column_stack([B] + [H_all[:, i] for i in others])
            coef = np.linalg.lstsq(Z, H_all[:, j], rcond=None)[0][B.shape[1]:]
            sd_j = H_all[:, j].std()
            for i, c in zip(others, coef):
                if sd_j > 0 and abs(c) * H_all[:, i].std() / sd_j >= 0.25:
                    uf.union(i, j)
    groups: dict[int, list[int]] = {}
    for j in pool:
        groups.setdefault(uf.find(j), []).append(j)

    terms: list[Term] = []
    columns: list[np.ndarray] = []
    for j in range(len(ids)):
        eq = eq_by_id[ids[j]]
        if j not in active:
            terms.append(Term(eq.id, [eq.id], eq.name, eq.prior.draw_kw, eq.prior.sd_kw,
                              eq.prior.source, ["not-run"]))
            continue
        if eq.id in folded:
            continue
        members = groups[uf.find(j)]
        # Members without an informative prior cannot be split by anything: one row for them.
        # Members with a prior stay separate; the prior splits them, and they say so.
        no_prior = [i for i in members if not has_prior[ids[i]]]
        if len(no_prior) > 1 and j in no_prior:
            if j != no_prior[0]:
                continue  # the group's row is made at its first member
            gid = "+".join(ids[i] for i in no_prior)
            flags = ["combined"] + [f"inseparable:{ids[i]}" for i in members if i not in no_prior]
            terms.append(Term(gid, [ids[i] for i in no_prior],
                              " + ".join(eq_by_id[ids[i]].name for i in no_prior),
                              None, None, "none (no size or draw given)", flags))
            columns.append(H_all[:, no_prior].mean(axis=1))
            warnings.append(f"{', '.join(ids[i] for i in no_prior)} run together and have no "
                            f"prior that could split them: reported as one row {gid!r}")
            continue
        flags = [f"inseparable:{ids[i]}" for i in members if i != j]
        if eq.id in base_flagged:
            flags.append("inseparable:baseload")
        if flags:
            warnings.append(f"{eq.id} cannot be told apart from "
                            f"{', '.join(f.split(':', 1)[1] for f in flags)} by the data: "
                            "its estimate leans on its prior")
        if eq.control == "variable":
            flags.append("variable")
        terms.append(Term(eq.id, [eq.id], eq.name, eq.prior.draw_kw, eq.prior.sd_kw,
                          eq.prior.source, flags))
        columns.append(H_all[:, j])
    base_id = "+".join(["baseload"] + folded)
    if folded:
        warnings.append(f"{', '.join(folded)} run on the baseload schedule and have no prior: "
                        f"their energy is reported in the row {base_id!r}")
    fitted_terms = [t for t in terms if "not-run" not in t.flags]
    for c, t in enumerate(fitted_terms):
        t.column = c
    k = len(fitted_terms)
    temp = aligned.temp_c[use] if aligned.temp_c is not None else None
    wspecs = weather_specs(site, [t.members for t in fitted_terms])
    # The design, built once: each term's hours (Hf), then each weather term's hours x
    # degrees beyond its balance temperature (Wf: slope columns, ASHRAE change-point form),
    # together the equipment part of every design (Hx), then the baseload columns. Hf, Wf
    # and Hx are views of it (a site-year of 1-minute data: ~200 MB per copy saved).
    kx = k + len(wspecs)
    X = np.empty((n, kx + B.shape[1]))
    for c in range(k):
        X[:, c] = columns[c]
    del columns, H_all
    X[:, k:kx] = weather_columns(X[:, :k], temp, wspecs)
    X[:, kx:] = B
    Hf, Wf, Hx = X[:, :k], X[:, k:kx], X[:, :kx]
    share_hours(aligned, Hf, [t.members for t in fitted_terms])

    # --- fit ----------------------------------------------------------------------------
    def priors(m: int) -> tuple[np.ndarray, np.ndarray]:
        mean = np.array([t.prior_kw if t.prior_kw is not None else 0.0 for t in fitted_terms]
                        + [0.0] * (len(wspecs) + m))
        sd = np.array([t.prior_sd_kw if t.prior_sd_kw is not None else weak_sd
                       for t in fitted_terms] + [weak_sd] * (len(wspecs) + m))
        return mean, sd

    days = _local_days(arrays["local_date"])
    sp = Spacing.from_ns(start_ns, end_ns)

    # --- baseload form: compare, choose (or take the pinned one) -------------------------
    choice = choose_form(site, Hx, y, sp, days, priors(0), base_for, form,
                         (start_ns, end_ns, arrays["local_date"]))
    profile = choice.form.profile
    if profile != site.baseload.profile:
        B, base_names = base_for(profile)
        X = np.column_stack([Hx, B])
        Hf, Wf, Hx = X[:, :k], X[:, k:kx], X[:, :kx]
        share_hours(aligned, Hf, [t.members for t in fitted_terms])
    level_kwh = np.zeros(n)
    if choice.form.level:
        keep = kept_columns(profile, B.shape[1])
        B = B[:, keep]
        base_names = [base_names[i] for i in keep]
        X = np.column_stack([Hx, B])
        Hf, Wf, Hx = X[:, :k], X[:, k:kx], X[:, :kx]
        share_hours(aligned, Hf, [t.members for t in fitted_terms])
    p_mean, p_sd = priors(B.shape[1])
    lower = np.zeros(X.shape[1])
    if choice.form.level:
        # GLS on whitened differences of the kW (disagg.fit.wander); the profile's columns are
        # kW above the level and may be negative.
        lower[kx:] = -np.inf
        wz = whiten(X, y, sp, choice.form.q, scale=1.0 / interval_h)
        Xs, ys, blk = wz.X, wz.z, days[1:]
    else:
        Xs, ys, blk = X, y, days
    fit = fit_model(Xs, ys, p_mean, p_sd, lower, block=blk)
    coef = fit.coef
    if choice.form.level:
        level_kw = smooth_level((y - X @ coef) / interval_h, sp, choice.form.q)
        level_kwh = level_kw * interval_h
    se_hac = fit.se
    cov = fit.cov.copy()
    df = max(fit.n_blocks - 1, 1)

    # --- stability: time blocks and more flexible baseload profiles -------------------
    n_days = int(days.max())
    se_jack = np.full(X.shape[1], np.nan)
    cov_jack = np.zeros_like(cov)
    if n_days >= 4:
        K = min(JACKKNIFE_BLOCKS, n_days)
        blocks = np.minimum((blk - 1) * K // n_days, K - 1)
        cov_jack, _ = jackknife_cov(Xs, ys, p_mean, fit.penalty, lower, blocks)
        se_jack = np.sqrt(np.maximum(np.diag(cov_jack), 0.0))
        df_jack = K - 1
    else:
        warnings.append("fewer than 4 days of data: intervals are not checked for stability")
        df_jack = df
    q_hac = quantile(confidence, df)
    q_jack = quantile(confidence, df_jack)
    half_hac = q_hac * se_hac
    # Widen to the jackknife only where it is significantly larger than the HAC standard
    # error: (se_J / se_HAC)^2 against the chi-square(K-1)/(K-1) upper quantile.
    ratio_bound = chi2_upper_quantile(df_jack, 1.0 - confidence) / df_jack
    with np.errstate(invalid="ignore", divide="ignore"):
        use_jack = ((np.nan_to_num(np.square(se_jack / se_hac), nan=0.0) > ratio_bound)
                    & (np.nan_to_num(se_jack) > NUMERICAL_TOL * np.maximum(np.abs(coef), 1.0)))
    half = np.where(use_jack, np.maximum(half_hac, q_jack * np.nan_to_num(se_jack)), half_hac)
    se_final = half / q_hac
    low = coef - half
    high = coef + half
    widened = use_jack.copy()
    moved: dict[int, list[str]] = {}  # column -> how its estimate moved under the variants
    z_bound = quantile(confidence)

    def widen_with(c: int, b_v: float, se_v: float, what: str) -> None:
        """Take the variant's interval into the hull when it differs significantly
        (Hausman 1978: var(b_v - b) = se_v^2 - se^2 for nested fits; floored at
        (se_v / 4)^2, common practice, no source)."""
        var_d = max(se_v**2 - se_hac[c] ** 2, (0.25 * se_v) ** 2)
        tiny = NUMERICAL_TOL * max(abs(coef[c]), 1.0)
        if abs(b_v - coef[c]) > max(z_bound * np.sqrt(var_d), tiny):
            low[c] = min(low[c], b_v - q_hac * se_v)
            high[c] = max(high[c], b_v + q_hac * se_v)
            widened[c] = True
            moved.setdefault(c, []).append(f"{b_v:.3g} kW with {what}")

    variants: dict[str, dict] = {}
    # With the wandering level, the rival forms are the credible ones of the comparison
    # (below): a static profile the data rule out would only widen the interval (tried: the
    # misspecified building's scheduled fan then had a 16 kW wide interval for an 11 kW draw).
    rivals = () if choice.form.level else MORE_FLEXIBLE[profile]
    for variant in rivals:
        if variant == "occupied" and not site.baseload.spells:
            continue
        ind = None
        if variant == "hour-of-week":
            # The 168 hour-of-week columns are stored by row (model.Indicators), the closure
            # column (if any) stays dense; the baseload columns' order does not matter.
            Bv, ind = how_columns()
            m_cols = Bv.shape[1] + ind.n_levels
        else:
            Bv, _ = base_for(variant)
            m_cols = Bv.shape[1]
        if n < MIN_ROWS_PER_COLUMN * (kx + m_cols):
            variants[variant] = {"skipped": f"fewer than {MIN_ROWS_PER_COLUMN} intervals per "
                                            "fitted column"}
            continue
        Xv = np.column_stack([Hx, Bv]) if Bv.shape[1] else Hx
        mv, sv = priors(m_cols)
        fv = fit_model(Xv, y, mv, sv, np.zeros(kx + m_cols), block=days, indicators=ind)
        se_v = fv.se
        entry = {}
        for t in fitted_terms:
            c = t.column
            # Near-collinearity with the variant's baseload shows in its standard error;
            # only an estimate its (weak) prior decided says nothing about the draw.
            separable = fv.prior_weight[c] < PRIOR_DRIVEN_WEIGHT
            entry[t.id] = {"kw": float(fv.coef[c]), "se_kw": float(se_v[c]),
                           "prior_weight": float(fv.prior_weight[c]),
                           "separable": bool(separable)}
            if separable:
                widen_with(c, float(fv.coef[c]), float(se_v[c]), variant)
        variants[variant] = entry
    # By-day variant: the baseload's level may change from one local day to the next
    # (closures, holidays, events) in ways no weekly profile knows. Profile out a separate
    # baseload level for each day (occupied and unoccupied separately when spells are
    # declared) by Frisch-Waugh-Lovell projection, and refit the draws on what is left.
    n_day_cols = n_days * (2 if profile.startswith("occupied") else 1)
    if (k and not choice.form.level and n_days >= 7
            and n >= MIN_ROWS_PER_COLUMN * (n_day_cols + kx)):
        if profile.startswith("occupied"):
            C = B[:, :2]  # occupied and unoccupied hours, one level each per day
            rest = B[:, 2:]
        else:
            C = interval_h[:, None]
            rest = B if profile == "hour-of-week" else np.zeros((n, 0))
        rest = np.ascontiguousarray(rest)
        Xd = _project_out_days(np.column_stack([Hx, rest, y]), C, days)
        yd = Xd[:, -1]
        Xd = Xd[:, :-1]
        md, sdd = priors(rest.shape[1])
        fd = fit_model(Xd, yd, md, sdd,
                       np.concatenate([np.zeros(kx), np.full(rest.shape[1], -np.inf)]), block=days)
        se_d = fd.se
        entry = {}
        for t in fitted_terms:
            c = t.column
            tss = float(np.sum((Hf[:, c] - Hf[:, c].mean()) ** 2))
            r2_day = 1.0 - float(np.sum(Xd[:, c] ** 2)) / tss if tss > 0 else 1.0
            separable = fd.prior_weight[c] < PRIOR_DRIVEN_WEIGHT
            entry[t.id] = {"kw": float(fd.coef[c]), "se_kw": float(se_d[c]),
                           "prior_weight": float(fd.prior_weight[c]),
                           "separable": bool(separable), "r2_with_daily_baseload": r2_day}
            if separable:
                widen_with(c, float(fd.coef[c]), float(se_d[c]), "daily baseload levels")
            else:
                t.flags.append("schedule-bound")
                warnings.append(f"{t.id} runs on the same days and hours as the baseload "
                                "schedule: its draw holds only if the baseload follows its "
                                "declared schedule on every day")
        variants[f"{profile}-by-day"] = entry
        del Xd, yd  # free the projected design before the results are built
    # Disagreement between credible baseload forms (model averaging): the weighted spread
    # of their draws about the chosen form's is added to the interval in quadrature.
    chosen = next(sc for sc in choice.scores if sc.form.name == choice.form.name)
    form_moves: dict[int, list[str]] = {}
    edge_moves: dict[int, str] = {}
    credible = choice.credible()
    for c in range(k):
        spread2 = sum(sc.weight * (sc.draws_kw[c] - chosen.draws_kw[c]) ** 2
                      for sc in credible if sc is not chosen)
        if spread2 > (NUMERICAL_TOL * max(abs(coef[c]), 1.0)) ** 2:
            extra = q_hac * np.sqrt(spread2)
            low[c] = coef[c] - np.hypot(coef[c] - low[c], extra)
            high[c] = coef[c] + np.hypot(high[c] - coef[c], extra)
            widened[c] = True
        for sc in credible:
            if sc is chosen:
                continue
            d = abs(sc.draws_kw[c] - chosen.draws_kw[c])
            if d > FORM_SENSITIVE * max(abs(chosen.draws_kw[c]), 1e-9) and d > half_hac[c]:
                form_moves.setdefault(c, []).append(
                    f"{sc.draws_kw[c]:.3g} kW with the {sc.form.name} baseload "
                    f"(weight {sc.weight:.2f})")
                moved.setdefault(c, []).append(f"{sc.draws_kw[c]:.3g} kW with {sc.form.name}")
    # Loads that switch near the declared schedule's edges: their draw depends on the
    # baseload's shape around the edges, which only the occupied-edges form states.
    edge_share = schedule_edge_share(Hf, interval_h, site.baseload, tz, frame["start_utc"])
    edge_rival = min((sc for sc in choice.scores if sc.form.profile.endswith("-edges")),
                     key=lambda sc: sc.criterion, default=None)
    for c in range(k):
        if edge_share[c] < SCHEDULE_EDGE_SHARE:
            continue
        edge_moves.setdefault(c, f"{100 * edge_share[c]:.0f} % of its switching")
        if edge_rival is not None and not profile.endswith("-edges"):
            b_e, s_e = float(edge_rival.draws_kw[c]), float(edge_rival.se_kw[c])
            if abs(b_e - coef[c]) > half_hac[c]:
                low[c] = min(low[c], b_e - q_hac * s_e)
                high[c] = max(high[c], b_e + q_hac * s_e)
                widened[c] = True
                moved.setdefault(c, []).append(f"{b_e:.3g} kW with {edge_rival.form.name}")
    # Real week-to-week variation of each draw (DerSimonian-Laird between-week variance).
    week = (arrays["local_date"].astype(np.int64) + 3) // 7  # Monday-start local weeks
    resid = y - fitted_of(X, coef, level_kwh)
    tau2 = between_week_variance(Hf, resid, coef[:k], week, days)
    low = np.maximum(low, 0.0)
    width_hac = (coef + half_hac) - np.maximum(coef - half_hac, 0.0)

    # --- per-term flags and results -------------------------------------------------------
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
    weather_info: dict[int, dict] = {}
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
        se_h[i], se_j[i] = se_hac[c], se_jack[c]
        if fit.prior_weight[c] >= PRIOR_DRIVEN_WEIGHT:
            t.flags.append("prior-driven")
            if t.prior_kw is None:
                warnings.append(f"{t.id}: the data cannot determine its draw and it has no "
                                "prior; its kW is not meaningful")
        grew = (high[c] - low[c]) - UNSTABLE_WIDENING * width_hac[c]
        if (widened[c] and grew > NUMERICAL_TOL * max(abs(coef[c]), 1.0)
                and (high[c] - low[c]) / 2.0 >= UNSTABLE_MIN_HALF_SHARE * abs(coef[c])):
            t.flags.append("unstable")
            at = " at its balance temperature" if c in wspecs else ""
            why = [f"{coef[c]:.3g} kW{at} with the {choice.form.name} baseload"]
            why += moved.get(c, [])
            if use_jack[c]:
                why.append(f"leaving out single time blocks moves it by +-{se_jack[c]:.2g} kW (1 sd)")
            warnings.append(f"{t.id} is unstable: {'; '.join(why)}. Its interval{at} "
                            f"{low[c]:.3g}-{high[c]:.3g} kW spans these; check the declared "
                            "baseload schedule and whether its draw changes over the period")
        if c in form_moves:
            t.flags.append("form-sensitive")
            warnings.append(f"{t.id} depends on the baseload form: {coef[c]:.3g} kW with the "
                            f"{choice.form.name} baseload, {'; '.join(form_moves[c])}; the "
                            "data cannot tell which baseload shape is right, and the interval "
                            "includes both")
        if c in edge_moves:
            t.flags.append("schedule-edge")
            warnings.append(f"{t.id} switches near the declared schedule's edges "
                            f"({edge_moves[c]} happens within {SCHEDULE_EDGE_MIN} minutes of "
                            "a start or end of the occupied hours): the data can mix it up "
                            "with the baseload changing at those times; its interval "
                            f"{low[c]:.3g}-{high[c]:.3g} kW includes the estimate with the "
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
            ratio = max(1.0, (high[c] - low[c]) / (2.0 * half_hac[c])) if half_hac[c] > 0 else 1.0
            V2 = cov[np.ix_([c, s_col], [c, s_col])] * ratio**2
            a = np.array([1.0, d_ref])
            half_ref = q_hac * float(np.sqrt(max(a @ V2 @ a, 0.0)))
            kw[i] = coef[c] + coef[s_col] * d_ref
            kw_low[i], kw_high[i] = max(kw[i] - half_ref, 0.0), kw[i] + half_ref
            se_kw[i] = half_ref / q_hac
            weather_info[i] = {"mode": mode, "balance_temp_c": balance_c,
                               "reference_temp_c": t_ref, "kw_at_balance": float(coef[c]),
                               "slope_kw_per_degc": float(coef[s_col]),
                               "slope_se_kw_per_degc": float(np.sqrt(max(V2[1, 1], 0.0))),
                               "cov": V2}
    base_slice = slice(kx, X.shape[1])
    cov_base = cov[base_slice, base_slice]
    if n_days >= 4:
        cov_base = _wider(cov[base_slice, base_slice], cov_jack[base_slice, base_slice] *
                          (q_jack / q_hac) ** 2)
    fitted = fitted_of(X, coef, level_kwh)

    quality = {"interval": fit_quality(y, fitted, X.shape[1])}
    # Fit quality by clock hour (UTC hours: whole hours of every zone with whole-hour
    # offsets) and by local month.
    _, hour = np.unique(start_ns // NS_PER_H, return_inverse=True)
    hour = hour.reshape(-1)
    whole = np.abs(np.bincount(hour, weights=interval_h) - 1.0) < 1e-9
    if whole.sum() > X.shape[1] + 1:
        quality["hourly"] = fit_quality(np.bincount(hour, weights=y)[whole],
                                        np.bincount(hour, weights=fitted)[whole], X.shape[1])
    y_sum = float(np.sum(y))
    quality["monthly"] = {"months": len(np.unique(arrays["month"])),
                          "nmbe_pct": float(100 * (y_sum - float(np.sum(fitted))) / y_sum)
                          if y_sum else float("nan")}

    ident = {
        "correlation_bound": INSEPARABLE_R,
        "prior_driven_weight": PRIOR_DRIVEN_WEIGHT,
        "equipment": {
            ids[j]: {
                "r2_with_baseload": r2_base.get(ids[j]),
                "vif": vif.get(ids[j]),
                "most_correlated": (None if ids[j] not in vif or len(active) < 2 else
                                    _partner(ids, active, sep["corr"], j)),
            } for j in range(len(ids))},
        "folded_into_baseload": folded,
    }
    return Estimates(
        terms=terms, base_names=base_names, base_id=base_id, frame=frame, hours=hours, base=B,
        y=y, fitted=fitted, kw=kw, kw_low=kw_low, kw_high=kw_high, se_kw=se_kw,
        se_hac_kw=se_h, se_jackknife_kw=se_j, base_kw=coef[base_slice], cov_base=cov_base,
        weather_hours=weather_hours, weather=weather_info, design_coef=coef,
        critical=q_hac, confidence=confidence, fit=fit, quality=quality, identifiability=ident,
        variants=variants, warnings=warnings, form=choice, level_kwh=level_kwh,
        tau2_kw2=np.array([tau2[t.column] if t.column is not None and t.column < k else 0.0
                           for t in terms]),
        week=week)


def fitted_of(X: np.ndarray, coef: np.ndarray, level_kwh: np.ndarray) -> np.ndarray:
    """Fitted energy of each interval [kWh]: design x coefficients plus the level."""
    return X @ coef + level_kwh


def between_week_variance(H: np.ndarray, u: np.ndarray, b: np.ndarray, week: np.ndarray,
                          days: np.ndarray) -> np.ndarray:
    """Each draw's real variation from week to week: the DerSimonian-Laird tau^2 [kW^2].

    Per week, the draw's own estimate with the other terms held at the whole fit's values
    (b_w = b + sum h u / sum h^2 over the week), its variance from the week's local-day sums
    of h u (robust to noise that persists within a day); then the random-effects moment
    estimator over the weeks with at least one run-hour.

    Args:
        H: (n, k) run-hours [h]; u: (n,) residual energy of the whole fit [kWh];
        b: (k,) draws [kW]; week, days: (n,) non-decreasing week and local-day labels.

    References:
        DerSimonian, R. & Laird, N. (1986). Meta-analysis in clinical trials. Controlled
        Clinical Trials 7(3), 177-188.
    """
    k = H.shape[1]
    tau2 = np.zeros(k)
    if k == 0 or len(u) == 0:
        return tau2
    _, wfirst = np.unique(week, return_index=True)
    wfirst = np.sort(wfirst)
    _, dfirst = np.unique(days, return_index=True)
    dfirst = np.sort(dfirst)
    day_week = week[dfirst]
    _, dw = np.unique(day_week, return_inverse=True)
    dw = dw.reshape(-1)
    for j in range(k):  # one column at a time: no n x k temporaries on 1-minute data
        h = H[:, j]
        hu = h * u
        hh = np.add.reduceat(h * h, wfirst)
        run = np.add.reduceat(h, wfirst)
        var_num = np.bincount(dw, weights=np.add.reduceat(hu, dfirst) ** 2,
                              minlength=len(wfirst))
        ok = (run >= 1.0) & (hh > 0) & (var_num > 0)
        if ok.sum() < 3:
            continue
        est = b[j] + np.add.reduceat(hu, wfirst)[ok] / hh[ok]
        var = var_num[ok] / hh[ok] ** 2
        w = 1.0 / var
        mean = np.sum(w * est) / np.sum(w)
        Q = float(np.sum(w * (est - mean) ** 2))
        denom = float(np.sum(w) - np.sum(w**2) / np.sum(w))
        if denom > 0:
            tau2[j] = max(0.0, (Q - (ok.sum() - 1)) / denom)
    return tau2


def schedule_edge_share(H: np.ndarray, interval_h: np.ndarray, base: BaseloadSettings, tz: str,
                        start_utc: pl.Series) -> np.ndarray:
    """Share of each load's switching (its on-fraction changing by at least half an interval
    from one interval to the next) that happens within SCHEDULE_EDGE_MIN minutes of a
    declared spell's start or end, on the days the spell applies; 0 without spells."""
    k = H.shape[1]
    if not base.spells or len(interval_h) < 2 or k == 0:
        return np.zeros(k)
    local = start_utc.dt.convert_time_zone(tz)
    minute = (local.dt.hour().cast(pl.Int64) * 60 + local.dt.minute().cast(pl.Int64)).to_numpy()
    weekday = (local.dt.weekday().cast(pl.Int64) - 1).to_numpy()
    near = np.zeros(len(minute), dtype=bool)
    for spell in base.spells:
        on_day = np.isin(weekday, spell.days)
        for edge in (spell.start_min, spell.end_min):
            d = np.abs(minute - edge)
            near |= on_day & (np.minimum(d, 1440 - d) <= SCHEDULE_EDGE_MIN)
    edge_step = near[1:] | near[:-1]
    total = np.zeros(k)
    at_edge = np.zeros(k)
    for j in range(k):  # one column at a time: no n x k temporaries on 1-minute data
        switch = np.abs(np.diff(H[:, j] / interval_h)) >= 0.5
        total[j] = switch.sum()
        at_edge[j] = (switch & edge_step).sum()
    return np.where(total >= SCHEDULE_EDGE_MIN_SWITCHES, at_edge / np.maximum(total, 1), 0.0)


def choose_form(site: SiteConfig, Hx: np.ndarray, y: np.ndarray, sp: Spacing, days: np.ndarray,
                prior: tuple[np.ndarray, np.ndarray], base_for,
                given: Form | FormChoice | None,
                when: tuple[np.ndarray, np.ndarray, np.ndarray]) -> FormChoice:
    """The baseload form: compare the declared profile and the simpler ones it nests, each
    with and without the wandering level (disagg.fit.select), and take the lowest criterion, or
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
    cols = {p: base_for(p)[0] for p in profiles}
    mean, sd = prior
    scores, resid = compare_forms(Hx, y, sp, cols, days, mean, sd, levels=levels,
                                  fixed_q=fixed or None)
    if isinstance(given, FormChoice):
        names = {sc.form.name for sc in rivals} | {given.form.name}
        scores = [sc for sc in scores if sc.form.name in names]
    c = overdispersion(resid) if resid is not None else 1.0
    score(scores, c, max(len(y) - 1, 1))
    if form is not None:
        match = [sc for sc in scores if sc.form.name == form.name]
        best = match[0].form
    else:
        # Ties (to rounding) go to the declared profile, then to the simpler form.
        low = min(sc.criterion for sc in scores)
        tied = [sc for sc in scores if sc.criterion - low <= 1e-9 * max(abs(low), 1.0)]
        best = min(tied, key=lambda sc: (sc.form.profile != declared, sc.n_params)).form
    return FormChoice(form=best, pinned=pinned, scores=scores, overdispersion=c)


def _project_out_days(V: np.ndarray, C: np.ndarray, days: np.ndarray) -> np.ndarray:
    """Residuals of V's columns after least squares on C's columns separately within each day.

    Args:
        V: (n, q) columns to residualize, overwritten with the residuals (and returned);
        C: (n, c) per-day nuisance columns; days: (n,) non-decreasing day labels.

    Each day's C columns are orthonormalised by Gram-Schmidt (twice, for orthogonality to
    working precision), all days at once; a column that adds no direction within a day (all
    zero, or a multiple of the earlier ones: norm left at most c_rows x machine epsilon x the
    day's largest column norm, as the SVD least-squares rank rule) is skipped for that day.
    The projection on them is then subtracted from V, a few weeks of rows at a time.
    """
    n = len(days)
    starts = np.flatnonzero(np.concatenate([[True], np.diff(days) != 0]))
    bounds = np.append(starts, n)
    chunk_days = max(1, _PROJECT_CHUNK_ROWS * len(starts) // max(n, 1))
    for d0 in range(0, len(starts), chunk_days):
        d1 = min(d0 + chunk_days, len(starts))
        rows = slice(bounds[d0], bounds[d1])
        local = bounds[d0:d1] - bounds[d0]  # first row of each day in the chunk
        sizes = np.diff(np.append(local, bounds[d1] - bounds[d0]))
        day_of = np.repeat(np.arange(d1 - d0), sizes)
        Cc = C[rows]
        tol = (np.finfo(float).eps * np.maximum(sizes, C.shape[1])
               * np.sqrt(np.add.reduceat(Cc * Cc, local, axis=0).max(axis=1)))
        basis: list[np.ndarray] = []
        for k in range(C.shape[1]):
            r = Cc[:, k].copy()
            for _ in range(2):
                for q in basis:
                    r -= q * np.add.reduceat(q * r, local)[day_of]
            norm = np.sqrt(np.add.reduceat(r * r, local))
            keep = norm > tol
            basis.append(np.where(keep[day_of], r / np.where(keep, norm, 1.0)[day_of], 0.0))
        Vc = V[rows]
        for q in basis:
            Vc -= q[:, None] * np.add.reduceat(q[:, None] * Vc, local, axis=0)[day_of]
    return V


# Rows per chunk of _project_out_days (whole days): bounds its temporary memory.
_PROJECT_CHUNK_ROWS = 65536


def _partner(ids: list[str], active: list[int], corr: np.ndarray, j: int) -> dict:
    a = active.index(j)
    row = np.abs(corr[a]).copy()
    row[a] = -1
    b = int(np.argmax(row))
    return {"id": ids[active[b]], "correlation": float(corr[a, b])}


def _wider(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """The covariance with the larger total variance (for sums of baseload columns)."""
    return a if np.trace(a) >= np.trace(b) else b


@dataclass
class Design:
    """One design for every caller (breakdown, drift, compare): the used intervals, their
    design rows in the order estimate_draws uses (term hours [h], weather slope columns
    [h degC], baseload columns [h]) and energy [kWh].

    form: the baseload form; with the level, the baseload columns are the profile's without
    its constant direction (select.kept_columns) and the level is not in X (baseload_level).
    """

    frame: pl.DataFrame
    X: np.ndarray
    y: np.ndarray
    term_members: list[list[str]]
    n_weather: int
    base_names: list[str]
    form: Form


def design(site: SiteConfig, aligned: Aligned, term_members: list[list[str]],
           form: Form | None = None) -> Design:
    """The design of the intervals aligned.use for the given terms (each a list of equipment
    ids whose hours are averaged, as a combined row) and baseload form (default: the
    declared profile without the level)."""
    form = form or Form(site.baseload.profile, level=False)
    use = aligned.use
    frame = aligned.frame.filter(pl.Series(use))
    temp = aligned.temp_c[use] if aligned.temp_c is not None else None
    specs = weather_specs(site, term_members)
    start_ns = frame["start_utc"].dt.epoch("ns").to_numpy()
    end_ns = frame["end_utc"].dt.epoch("ns").to_numpy()
    profile = form.profile.removesuffix("-edges")
    settings = BaseloadSettings(profile, site.baseload.spells, site.baseload.spell_text,
                                site.baseload.closed if profile == site.baseload.profile
                                else (), site.baseload.form)
    B, names = baseload_columns(settings, site.timezone, frame["start_utc"], start_ns, end_ns)
    if form.profile.endswith("-edges"):
        more, more_names = edge_columns(site.baseload, site.timezone, frame["start_utc"],
                                        (end_ns - start_ns) / NS_PER_H,
                                        hourly=form.profile.startswith("hour-of-week"))
        B, names = np.column_stack([B, more]), names + more_names
    if form.level:
        keep = kept_columns(form.profile, B.shape[1])
        B, names = B[:, keep], [names[i] for i in keep]
    # Built in place (align.term_hours: a chunk of rows at a time), so that a long 1-minute
    # series holds no copy of the design beside it.
    kf, kx = len(term_members), len(term_members) + len(specs)
    X = np.empty((frame.height, kx + B.shape[1]))
    term_hours(aligned, term_members, out=X[:, :kf])
    X[:, kf:kx] = weather_columns(X[:, :kf], temp, specs)
    X[:, kx:] = B
    return Design(frame, X, frame["energy_kwh"].to_numpy().astype(float), term_members,
                  len(specs), names, form)


def baseload_level(d: Design, coef: np.ndarray) -> np.ndarray:
    """The wandering level's energy in each interval [kWh] given the design's coefficients
    (zero without the level): the smoother's mean of the residual kW (disagg.fit.wander)."""
    if not d.form.level:
        return np.zeros(len(d.y))
    start_ns = d.frame["start_utc"].dt.epoch("ns").to_numpy()
    end_ns = d.frame["end_utc"].dt.epoch("ns").to_numpy()
    sp = Spacing.from_ns(start_ns, end_ns)
    return smooth_level((d.y - d.X @ coef) / sp.h, sp, d.form.q) * sp.h
