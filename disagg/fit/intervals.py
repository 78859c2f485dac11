"""The intervals stage: each draw's HAC interval widened where the estimate moves with the time
period (delete-a-block jackknife), with a more flexible baseload profile (variants hull),
with a separate baseload level for each day (by-day projection), between credible baseload
forms (their weighted spread), with the baseload's own shape around the schedule's edges,
between the meter's steps where a load switches on and where it switches off, or with the
energy that follows its switch-ons (switch_on_response); and each draw's real week-to-week
variation (DerSimonian-Laird tau^2) for the monthly kWh.
"""

from __future__ import annotations

from collections.abc import Callable, Collection
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import cho_solve_banded, cholesky_banded, solveh_banded

from disagg.fit.design import SLOPE_PREFIX, BaseloadBuilder, Rows, signed_columns
from disagg.fit.select import FormChoice
from disagg.fit.solve import Priors, Solved
from disagg.fit.solvers import (
    Indicators,
    LazyRows,
    chi2_upper_quantile,
    fit_model,
    jackknife_cov,
    quantile,
)
from disagg.fit.terms import LONG_DESIGN_ROWS, Term
from disagg.fit.wander import Spacing, band_factor, whiten_columns
from disagg.inputs.config import BaseloadSettings, SiteConfig

# An estimate whose posterior precision comes at least half from its prior is prior-driven.
PRIOR_DRIVEN_WEIGHT = 0.5
JACKKNIFE_BLOCKS = 10
# A baseload variant is refitted only with at least this many intervals per fitted column
# (common practice, no source): fewer, and it fits the noise.
MIN_ROWS_PER_COLUMN = 10
# Differences in kW smaller than this fraction of the draw (or of 1 kW) are rounding, not a
# change: they neither widen an interval nor flag it.
NUMERICAL_TOL = 1e-6
MORE_FLEXIBLE = {"constant": ("occupied", "hour-of-week"), "occupied": ("hour-of-week",),
                 "occupied-edges": ("hour-of-week",), "hour-of-week": (),
                 "hour-of-week-edges": ()}
# A draw that moves by more than this fraction between credible baseload forms (and by more
# than its own interval's half-width) is flagged form-sensitive. Common practice, no source.
FORM_SENSITIVE = 0.10
# A load whose switch-on and switch-off step draws differ significantly has its interval
# widened to span both (switching_steps); it is flagged switch-steps, with its own warning,
# when they differ by more than this fraction of its draw (smaller differences show through
# the unstable flag when they widen the interval materially). Common practice, no source:
# the same "material" as FORM_SENSITIVE.
STEP_SENSITIVE = 0.10
# A load with at least this share of its switching within SCHEDULE_EDGE_MIN minutes of the
# declared schedule's edges (and at least SCHEDULE_EDGE_MIN_SWITCHES switches) is flagged
# schedule-edge. Common practice, no source.
SCHEDULE_EDGE_SHARE = 0.5
SCHEDULE_EDGE_MIN = 60
SCHEDULE_EDGE_MIN_SWITCHES = 8


@dataclass
class Jackknife:
    """The HAC interval and the delete-a-block jackknife's check of it (per design column).

    se_hac, half_hac: HAC standard error and half-width [kW]; se_jack, cov_jack: jackknife
    (NaN / zeros with fewer than 4 days); use_jack: where the jackknife is significantly
    larger; q_hac, q_jack: critical values; half: the interval's half-width after it.
    """

    se_hac: np.ndarray
    half_hac: np.ndarray
    se_jack: np.ndarray
    cov_jack: np.ndarray
    use_jack: np.ndarray
    q_hac: float
    q_jack: float
    half: np.ndarray
    n_days: int
    warnings: list[str] = field(default_factory=list)

    @property
    def checked(self) -> bool:
        return self.n_days >= 4


def _kw_decimals(kw: float) -> int:
    a = abs(kw)
    return 0 if a >= 100 else 1 if a >= 1 else 2 if a >= 0.1 else 3


def kw_text(kw: float) -> str:
    """A draw in words: 0 decimals from 100 kW, 1 from 1 kW, else 2 (3 below 0.1 kW);
    trailing zeros kept (10.0 beside 10.2)."""
    return f"{kw:.{_kw_decimals(kw)}f}"


def kw_range_text(low: float, high: float) -> str:
    """An interval in words, both ends with the finer of their decimals (9.8-10.3)."""
    d = max(_kw_decimals(low), _kw_decimals(high))
    return f"{low:.{d}f}-{high:.{d}f}"


def jackknife(s: Solved, rows: Rows, confidence: float) -> Jackknife:
    """Widen to the jackknife only where it is significantly larger than the HAC standard
    error: (se_J / se_HAC)^2 against the chi-square(K-1)/(K-1) upper quantile."""
    fit, coef = s.fit, s.coef
    se_hac = fit.se
    df = max(fit.n_blocks - 1, 1)
    n_days = int(rows.days.max())
    se_jack = np.full(s.X.shape[1], np.nan)
    cov_jack = np.zeros_like(fit.cov)
    warnings = []
    if n_days >= 4:
        K = min(JACKKNIFE_BLOCKS, n_days)
        blocks = np.minimum((s.blk - 1) * K // n_days, K - 1)
        cov_jack, _ = jackknife_cov(s.Xs, s.ys, s.p_mean, fit.penalty, s.lower, blocks)
        se_jack = np.sqrt(np.maximum(np.diag(cov_jack), 0.0))
        df_jack = K - 1
    else:
        warnings.append("fewer than 4 days of data: intervals are not checked for stability")
        df_jack = df
    q_hac = quantile(confidence, df)
    q_jack = quantile(confidence, df_jack)
    half_hac = q_hac * se_hac
    ratio_bound = chi2_upper_quantile(df_jack, 1.0 - confidence) / df_jack
    with np.errstate(invalid="ignore", divide="ignore"):
        use_jack = ((np.nan_to_num(np.square(se_jack / se_hac), nan=0.0) > ratio_bound)
                    & (np.nan_to_num(se_jack) > NUMERICAL_TOL * np.maximum(np.abs(coef), 1.0)))
    half = np.where(use_jack, np.maximum(half_hac, q_jack * np.nan_to_num(se_jack)), half_hac)
    return Jackknife(se_hac=se_hac, half_hac=half_hac, se_jack=se_jack, cov_jack=cov_jack,
                     use_jack=use_jack, q_hac=q_hac, q_jack=q_jack, half=half, n_days=n_days,
                     warnings=warnings)


@dataclass
class Hull:
    """The interval being widened, per design column: low, high [kW], whether widened and how
    the estimate moved (column -> phrases)."""

    coef: np.ndarray
    se_hac: np.ndarray
    q_hac: float
    z_bound: float
    low: np.ndarray
    high: np.ndarray
    widened: np.ndarray
    moved: dict[int, list[str]] = field(default_factory=dict)

    @classmethod
    def start(cls, coef: np.ndarray, jk: Jackknife, confidence: float) -> Hull:
        return cls(coef=coef, se_hac=jk.se_hac, q_hac=jk.q_hac, z_bound=quantile(confidence),
                   low=coef - jk.half, high=coef + jk.half, widened=jk.use_jack.copy())

    def widen_with(self, c: int, b_v: float, se_v: float, what: str) -> bool:
        """Take the variant's interval into the hull when it differs significantly
        (Hausman 1978: var(b_v - b) = se_v^2 - se^2 for nested fits; floored at
        (se_v / 4)^2, common practice, no source); return whether it did."""
        coef = self.coef
        var_d = max(se_v**2 - self.se_hac[c] ** 2, (0.25 * se_v) ** 2)
        tiny = NUMERICAL_TOL * max(abs(coef[c]), 1.0)
        if abs(b_v - coef[c]) > max(self.z_bound * np.sqrt(var_d), tiny):
            self.low[c] = min(self.low[c], b_v - self.q_hac * se_v)
            self.high[c] = max(self.high[c], b_v + self.q_hac * se_v)
            self.widened[c] = True
            self.moved.setdefault(c, []).append(f"{kw_text(b_v)} kW with {what}")
            return True
        return False


def profile_variants(site: SiteConfig, rows: Rows, s: Solved, builder: BaseloadBuilder,
                     priors: Priors, fitted: list[Term], hull: Hull) -> dict[str, dict]:
    """Refit with each more flexible static profile (MORE_FLEXIBLE) and take a variant's
    interval into the hull where it differs significantly. With the wandering level, the
    rival forms are the credible ones of the comparison (form_spread): a static profile the
    data rule out would only widen the interval (tried: the misspecified building's
    scheduled fan then had a 16 kW wide interval for an 11 kW draw).

    Returns fit.json's "variants" entries: variant -> term id -> kw, se_kw, prior_weight,
    separable (or {"skipped": why})."""
    variants: dict[str, dict] = {}
    rivals = () if s.level else MORE_FLEXIBLE[s.choice.form.profile]
    kx, n = s.kx, rows.n
    for variant in rivals:
        if variant == "occupied" and not site.baseload.spells:
            continue
        ind = None
        long = False
        if variant == "hour-of-week" and n > LONG_DESIGN_ROWS:
            # A long series: [Hx, dense columns] made a block of rows at a time (LazyRows).
            dense, names_v, ind = builder.hour_of_week_blocks()
            Hx, w = s.Hx, len(names_v)
            bounds = np.append(np.arange(0, n, _VARIANT_BLOCK_ROWS), n)
            Bv = LazyRows(bounds, kx + w, lambda b: np.column_stack(
                [Hx[bounds[b]:bounds[b + 1]], dense(bounds[b], bounds[b + 1])]))
            long = True
            m_cols = w + ind.n_levels
            signed = np.r_[signed_columns(names_v), np.zeros(ind.n_levels, dtype=bool)]
        elif variant == "hour-of-week":
            # The 168 hour-of-week columns are stored by row (solvers.Indicators), the closure
            # column (if any) and the within-hour slopes stay dense; the baseload columns'
            # order does not matter.
            Bv, names_v, ind = builder.hour_of_week_sparse()
            m_cols = Bv.shape[1] + ind.n_levels
            signed = np.r_[signed_columns(names_v), np.zeros(ind.n_levels, dtype=bool)]
        else:
            Bv, names_v = builder.columns(variant)
            m_cols = Bv.shape[1]
            signed = signed_columns(names_v)
        if n < MIN_ROWS_PER_COLUMN * (kx + m_cols):
            variants[variant] = {"skipped": f"fewer than {MIN_ROWS_PER_COLUMN} intervals per "
                                            "fitted column"}
            continue
        Xv = Bv if long else np.column_stack([s.Hx, Bv]) if Bv.shape[1] else s.Hx
        mv, sv = priors(m_cols)
        lower_v = np.zeros(kx + m_cols)
        lower_v[kx:][signed] = -np.inf
        fv = fit_model(Xv, rows.y, mv, sv, lower_v, block=rows.days, indicators=ind)
        se_v = fv.se
        entry = {}
        for t in fitted:
            c = t.column
            # Near-collinearity with the variant's baseload shows in its standard error;
            # only an estimate its (weak) prior decided says nothing about the draw.
            separable = fv.prior_weight[c] < PRIOR_DRIVEN_WEIGHT
            entry[t.id] = {"kw": float(fv.coef[c]), "se_kw": float(se_v[c]),
                           "prior_weight": float(fv.prior_weight[c]),
                           "separable": bool(separable)}
            if separable:
                hull.widen_with(c, float(fv.coef[c]), float(se_v[c]), variant)
        variants[variant] = entry
    return variants


# Rows per block of a long series' hour-of-week variant design (profile_variants).
_VARIANT_BLOCK_ROWS = 65536


def by_day_variant(rows: Rows, s: Solved, priors: Priors, fitted: list[Term], n_days: int,
                   hull: Hull) -> tuple[str, dict, list[int]] | None:
    """The baseload's level may change from one local day to the next (closures, holidays,
    events) in ways no weekly profile knows. Profile out a separate baseload level for each
    day (occupied and unoccupied separately when spells are declared) by Frisch-Waugh-Lovell
    projection, and refit the draws on what is left.

    Returns (variant name, its fit.json entry, columns of the draws the projection leaves to
    their prior: schedule-bound), or None when the check does not apply."""
    profile = s.choice.form.profile
    k, kx, n = s.k, s.kx, rows.n
    n_day_cols = n_days * (2 if profile.startswith("occupied") else 1)
    if not (k and not s.level and n_days >= 7
            and n >= MIN_ROWS_PER_COLUMN * (n_day_cols + kx)):
        return None
    B = s.B
    if profile.startswith("occupied"):
        C = B[:, :2]  # occupied and unoccupied hours, one level each per day
        rest = B[:, 2:]
    else:
        C = rows.interval_h[:, None]
        rest = B if profile == "hour-of-week" else np.zeros((n, 0))
    rest = np.ascontiguousarray(rest)
    # The projected design [Hx, rest] is made a few weeks at a time whenever the fit reads it
    # (LazyRows): never a second (n, kx) array beside the design.
    proj = _DayProjection(C, rows.days)
    Hx, y = s.Hx, rows.y

    def block(b: int) -> np.ndarray:
        lo, hi = proj.bounds[b], proj.bounds[b + 1]
        return proj.apply(b, np.column_stack([Hx[lo:hi], rest[lo:hi], y[lo:hi]]))

    yd = np.empty(n)
    sq = np.zeros(kx)
    for b in range(len(proj.bounds) - 1):
        V = block(b)
        yd[proj.bounds[b]:proj.bounds[b + 1]] = V[:, -1]
        sq += np.sum(V[:, :kx] ** 2, axis=0)
    del V
    Xd = LazyRows(proj.bounds, kx + rest.shape[1] + 1, block,
                  np.arange(kx + rest.shape[1]))
    md, sdd = priors(rest.shape[1])
    fd = fit_model(Xd, yd, md, sdd,
                   np.concatenate([np.zeros(kx), np.full(rest.shape[1], -np.inf)]),
                   block=rows.days)
    del Xd
    se_d = fd.se
    entry = {}
    bound: list[int] = []
    Hf = s.Hf
    for t in fitted:
        c = t.column
        tss = float(np.sum((Hf[:, c] - Hf[:, c].mean()) ** 2))
        r2_day = 1.0 - float(sq[c]) / tss if tss > 0 else 1.0
        separable = fd.prior_weight[c] < PRIOR_DRIVEN_WEIGHT
        entry[t.id] = {"kw": float(fd.coef[c]), "se_kw": float(se_d[c]),
                       "prior_weight": float(fd.prior_weight[c]),
                       "separable": bool(separable), "r2_with_daily_baseload": r2_day}
        if separable:
            hull.widen_with(c, float(fd.coef[c]), float(se_d[c]), "daily baseload levels")
        else:
            bound.append(c)
    return f"{profile}-by-day", entry, bound


def form_spread(choice: FormChoice, k: int, jk: Jackknife, hull: Hull) -> dict[int, list[str]]:
    """Disagreement between credible baseload forms (model averaging): the weighted spread
    of their draws about the chosen form's is added to the interval in quadrature. Returns
    the columns that move by more than FORM_SENSITIVE between credible forms (-> phrases)."""
    coef, low, high, q_hac = hull.coef, hull.low, hull.high, jk.q_hac
    chosen = next(sc for sc in choice.scores if sc.form.name == choice.form.name)
    form_moves: dict[int, list[str]] = {}
    credible = choice.credible()
    for c in range(k):
        spread2 = sum(sc.weight * (sc.draws_kw[c] - chosen.draws_kw[c]) ** 2
                      for sc in credible if sc is not chosen)
        if spread2 > (NUMERICAL_TOL * max(abs(coef[c]), 1.0)) ** 2:
            extra = q_hac * np.sqrt(spread2)
            low[c] = coef[c] - np.hypot(coef[c] - low[c], extra)
            high[c] = coef[c] + np.hypot(high[c] - coef[c], extra)
            hull.widened[c] = True
        for sc in credible:
            if sc is chosen:
                continue
            d = abs(sc.draws_kw[c] - chosen.draws_kw[c])
            if d > FORM_SENSITIVE * max(abs(chosen.draws_kw[c]), 1e-9) and d > jk.half_hac[c]:
                form_moves.setdefault(c, []).append(
                    f"{kw_text(sc.draws_kw[c])} kW with the {sc.form.name} baseload "
                    f"(weight {sc.weight:.2f})")
                hull.moved.setdefault(c, []).append(
                    f"{kw_text(sc.draws_kw[c])} kW with {sc.form.name}")
    return form_moves


def schedule_edge(site: SiteConfig, rows: Rows, s: Solved, jk: Jackknife,
                  hull: Hull) -> dict[int, str]:
    """Loads that switch near the declared schedule's edges: their draw depends on the
    baseload's shape around the edges, which only the occupied-edges form states. The
    edges form's interval joins the hull where it moves the draw. Returns column -> the
    share of its switching there, in words."""
    coef, q_hac = hull.coef, jk.q_hac
    choice = s.choice
    edge_share = schedule_edge_share(s.Hf, rows.interval_h, site.baseload, rows.minute_of_day,
                                     rows.hour_of_week // 24)
    edge_rival = min((sc for sc in choice.scores if sc.form.profile.endswith("-edges")),
                     key=lambda sc: sc.criterion, default=None)
    edge_moves: dict[int, str] = {}
    for c in range(s.k):
        if edge_share[c] < SCHEDULE_EDGE_SHARE:
            continue
        edge_moves.setdefault(c, f"{100 * edge_share[c]:.0f} % of its switching")
        if edge_rival is not None and not choice.form.profile.endswith("-edges"):
            b_e, s_e = float(edge_rival.draws_kw[c]), float(edge_rival.se_kw[c])
            if abs(b_e - coef[c]) > jk.half_hac[c]:
                hull.low[c] = min(hull.low[c], b_e - q_hac * s_e)
                hull.high[c] = max(hull.high[c], b_e + q_hac * s_e)
                hull.widened[c] = True
                hull.moved.setdefault(c, []).append(
                    f"{kw_text(b_e)} kW with {edge_rival.form.name}")
    return edge_moves


def switch_steps(rows: Rows, s: Solved, priors: Priors, fitted: list[Term], jk: Jackknife,
                 hull: Hull, variants: dict[str, dict],
                 variable: set[str] = frozenset()) -> dict[int, str]:
    """Loads whose meter steps at switch-on and at switch-off give different draws
    (switching_steps): where they differ significantly and by more than the HAC half-width,
    both step draws' intervals join the hull. Only on-off loads and groups of them (a
    variable-speed load's rises and falls are speed changes; `variable`: their ids). Only
    steps between intervals that follow each other without a gap. Adds variants["switch steps"]; returns column ->
    the two step draws in words, for those that differ by more than STEP_SENSITIVE."""
    steps = switching_steps(s.X, rows.y, s.k, s.kx, rows.interval_h, priors(0), rows.days[1:],
                            rows.hour_of_week % 24, priors.weak_sd,
                            adjacent=rows.start_ns[1:] == rows.end_ns[:-1],
                            smooth=frozenset(s.kx + i for i, name in enumerate(s.base_names)
                                             if name.startswith(SLOPE_PREFIX)))
    variants["switch steps"] = ({"skipped": "too few steps"} if steps is None else {
        t.id: {"kw": float(steps.on_kw[t.column]), "se_kw": float(steps.se_on_kw[t.column]),
               "kw_at_switch_off": float(steps.off_kw[t.column]),
               "se_at_switch_off_kw": float(steps.se_off_kw[t.column]),
               "z_difference": float(steps.z[t.column])} for t in fitted})
    step_moves: dict[int, str] = {}
    if steps is None:
        return step_moves
    on_off = {t.column for t in fitted
              if "variable" not in t.flags and not variable.intersection(t.members)}
    for c in sorted(on_off & set(range(s.k))):
        d = abs(steps.on_kw[c] - steps.off_kw[c])
        if abs(steps.z[c]) > hull.z_bound and d > jk.half_hac[c]:
            for b_s, s_s in ((steps.on_kw[c], steps.se_on_kw[c]),
                             (steps.off_kw[c], steps.se_off_kw[c])):
                hull.low[c] = min(hull.low[c], b_s - jk.q_hac * s_s)
                hull.high[c] = max(hull.high[c], b_s + jk.q_hac * s_s)
            hull.widened[c] = True
            why = (f"{kw_text(steps.on_kw[c])} kW where it switches on and "
                   f"{kw_text(steps.off_kw[c])} kW where it switches off")
            hull.moved.setdefault(c, []).append(why)
            if d > STEP_SENSITIVE * abs(hull.coef[c]):
                step_moves[c] = why
    return step_moves


# The switch-on response check: the window after each switch-on [min], split into this many
# columns per load (project choice, no outside source: on the measured household the rest
# of the house stays up for about 30 minutes after the water heater switches on), and the
# longest design it runs on (a year of 1-minute data would need another n x 3k array;
# terms.LONG_DESIGN_ROWS).
RESPONSE_WINDOW_MIN = 45.0
RESPONSE_BLOCKS = 3


def response_columns(H: np.ndarray, interval_h: np.ndarray, start_ns: np.ndarray,
                     end_ns: np.ndarray) -> np.ndarray:
    """For each column of H (run-hours [h]), RESPONSE_BLOCKS columns [h]: the rises of its
    on-fraction (its switch-ons, in whole-switch units) in the interval itself and in the
    intervals before it within RESPONSE_WINDOW_MIN, one column per block of lags, times the
    interval's hours, so the coefficient is the kW that follows a switch-on in that block
    whatever the load does afterwards. A rise is counted only between intervals that follow
    each other without a gap, and a lag only across adjacent intervals."""
    n, k = H.shape
    step_min = float(np.median(interval_h)) * 60.0
    lags = max(1, int(np.ceil(RESPONSE_WINDOW_MIN / step_min - 1e-9)))
    blocks = min(RESPONSE_BLOCKS, lags)
    edges = np.linspace(0, lags, blocks + 1).round().astype(int)
    adjacent = np.r_[False, start_ns[1:] == end_ns[:-1]]
    # run[t]: how many intervals back from t the rows stay adjacent (a lag may not cross a gap)
    at = np.arange(n)
    run = at - np.maximum.accumulate(np.where(adjacent, 0, at))
    R = np.zeros((n, k * blocks))
    ih = interval_h[:, None]
    # A group of loads at a time (elementwise operations: the numbers of one load at a time).
    for cs in _column_groups(k, n):
        rise = np.zeros((n, cs.stop - cs.start))
        np.maximum(np.diff(H[:, cs] / ih, axis=0), 0.0, out=rise[1:])
        rise *= adjacent[:, None]
        for b in range(blocks):
            col = np.zeros_like(rise)
            for lag in range(edges[b], edges[b + 1]):
                if lag == 0:
                    col += rise
                else:
                    col[lag:] += rise[:n - lag] * (run[lag:] >= lag)[:, None]
            R[:, cs.start * blocks + b:cs.stop * blocks:blocks] = col * ih
    return R


def switch_on_response(rows: Rows, s: Solved, priors: Priors, fitted: list[Term],
                       hull: Hull, variants: dict[str, dict],
                       variable: set[str] = frozenset(),
                       only: Collection[str] | None = None) -> None:
    """Refit the chosen form with, for each on-off load, the energy that follows its
    switch-ons whatever it does afterwards (response_columns): an unlogged load that starts
    with it and runs on for a while (people who draw hot water switch on lights) is then not
    read as its draw; the draw is told apart by how long its spells last. Where the draw
    moves significantly (Hull.widen_with: a Hausman-type test), the refit's interval joins
    the hull. Only on-off loads (a variable-speed load's rises are speed changes) and
    designs of at most LONG_DESIGN_ROWS rows. Adds variants["switch-on response"] (each
    load's refit draw, and whether it moved the interval).

    only: the loads (term ids) to check; None = every on-off load. A month's fit checks only
    the loads whose draw moved in its whole range's check (response_moved): the range holds
    all the month's data and more, so a response the range does not show is taken as absent
    (a screening choice, like the month reusing the range's baseload form)."""
    on_off = [t for t in fitted if t.column < s.k and "variable" not in t.flags
              and not variable.intersection(t.members)]
    if only is not None:
        on_off = [t for t in on_off if t.id in only]
        if not on_off:
            variants["switch-on response"] = {
                "screened": "no load's draw moved with its switch-on response in the whole "
                            "range's fit"}
            return
    if not on_off:
        return
    if rows.n > LONG_DESIGN_ROWS:
        variants["switch-on response"] = {"skipped": f"more than {LONG_DESIGN_ROWS} intervals"}
        return
    ih = rows.interval_h
    R = response_columns(s.X[:, [t.column for t in on_off]], ih, rows.start_ns, rows.end_ns)
    m = R.shape[1]
    if s.choice.form.level:
        # The solver's rows are the whitened differences (s.Xs): whitening is column by
        # column, so only the new columns are whitened, with the same factor.
        band, _ = band_factor(rows.sp, s.choice.form.q)
        R /= ih[:, None]  # in place: R is not used in kWh again (no second n x 3k array)
        R = whiten_columns(R, band)
    Xa = np.column_stack([s.Xs, R])
    del R
    mean = np.r_[s.p_mean, np.zeros(m)]
    sd = np.r_[s.p_sd, np.full(m, priors.weak_sd)]
    lower = np.r_[s.lower, np.full(m, -np.inf)]
    f = fit_model(Xa, s.ys, mean, sd, lower, block=s.blk)
    del Xa
    entry = {}
    for t in on_off:
        c = t.column
        moved = hull.widen_with(c, float(f.coef[c]), float(f.se[c]), "a switch-on response")
        entry[t.id] = {"kw": float(f.coef[c]), "se_kw": float(f.se[c]), "moved": moved}
    variants["switch-on response"] = entry


def response_moved(variants: dict[str, dict]) -> frozenset[str]:
    """The loads whose draw moved the interval in a fit's switch-on response check."""
    entry = variants.get("switch-on response", {})
    return frozenset(k for k, v in entry.items() if isinstance(v, dict) and v.get("moved"))


@dataclass
class Intervals:
    """The intervals stage's result, per design column.

    low, high: the final interval [kW] (low >= 0); widened: where a check widened it; moved,
    form_moves, edge_moves, step_moves: how the estimate moved (phrases for the flags);
    schedule_bound: draws the by-day projection leaves to their prior; width_hac: the HAC
    interval's width (clipped at 0) [kW]; tau2: (k,) between-week variance of the draws
    [kW^2]; week: (n,) local Monday-start week of each row; week_gh: (n_weeks, k) each
    week's weight in the fitted draws [h^2] (BetweenWeeks.gh_h2); variants: fit.json's
    "variants".
    """

    jk: Jackknife
    low: np.ndarray
    high: np.ndarray
    widened: np.ndarray
    moved: dict[int, list[str]]
    form_moves: dict[int, list[str]]
    edge_moves: dict[int, str]
    schedule_bound: list[int]
    width_hac: np.ndarray
    tau2: np.ndarray
    week: np.ndarray
    week_gh: np.ndarray
    variants: dict[str, dict]
    step_moves: dict[int, str] = field(default_factory=dict)

    @property
    def se_final(self) -> np.ndarray:
        return self.jk.half / self.jk.q_hac


def intervals(site: SiteConfig, rows: Rows, s: Solved, builder: BaseloadBuilder,
              priors: Priors, fitted: list[Term], confidence: float,
              response_loads: Collection[str] | None = None) -> Intervals:
    """Every check in turn: jackknife, static variants, by-day levels, credible forms,
    schedule edges, switching steps, switch-on response; then the between-week variance."""
    jk = jackknife(s, rows, confidence)
    hull = Hull.start(s.coef, jk, confidence)
    variants = profile_variants(site, rows, s, builder, priors, fitted, hull)
    bound: list[int] = []
    day = by_day_variant(rows, s, priors, fitted, jk.n_days, hull)
    if day is not None:
        name, entry, bound = day
        variants[name] = entry
    form_moves = form_spread(s.choice, s.k, jk, hull)
    edge_moves = schedule_edge(site, rows, s, jk, hull)
    variable = {e.id for e in site.equipment if e.control == "variable"}
    step_moves = switch_steps(rows, s, priors, fitted, jk, hull, variants, variable)
    switch_on_response(rows, s, priors, fitted, hull, variants, variable, response_loads)
    # Real week-to-week variation of each draw (DerSimonian-Laird between-week variance).
    week = (rows.local_date.astype(np.int64) + 3) // 7  # Monday-start local weeks
    resid = rows.y - fitted_of(s.X, s.coef, s.level_kwh)
    # With the level, each week's departure is regressed on the part of the run-hours the
    # level's smoother leaves (between_week_variance's `taken`).
    taken = None
    if s.choice.form.level and s.choice.form.q > 0:
        # (At q = 0 the level is one constant: a week's change hardly moves it, and g =
        # h - mean would bring every off-hours row into the week's regression.)
        ih, smooth = rows.interval_h, level_smoother(rows.sp, s.choice.form.q)
        taken = lambda h: smooth(h / ih) * ih  # noqa: E731
    weeks = between_week_variance(s.Hf, resid, s.coef[:s.k], week, rows.days, taken)
    coef, half_hac = s.coef, jk.half_hac
    return Intervals(jk=jk, low=np.maximum(hull.low, 0.0), high=hull.high,
                     widened=hull.widened, moved=hull.moved, form_moves=form_moves,
                     edge_moves=edge_moves, schedule_bound=bound,
                     width_hac=(coef + half_hac) - np.maximum(coef - half_hac, 0.0),
                     tau2=weeks.tau2_kw2, week=week, week_gh=weeks.gh_h2, variants=variants,
                     step_moves=step_moves)


def level_sum_variance(sp: Spacing, q: float, sigma2: float, X: np.ndarray, base: slice,
                       labels: np.ndarray, covs: tuple[np.ndarray, ...]) -> dict[int, float]:
    """Variance of each label's (month's) baseload energy with the wandering level [kWh^2]:
    the profile's part c'b (c: the label's summed baseload columns [h]) plus the level's
    energy L = sum h_t mu_t over the label's rows.

    Given the coefficients b, the level's posterior is Gaussian with precision
    A / sigma^2, A = V^-1 + D' W D tridiagonal (the smoother of wander.smooth_level: V the
    rows' relative noise variances, W = h0 / (q dt) the random walk's step weights); its
    covariance sigma^2 A^-1 is the smoothed state variance (Durbin & Koopman 2012, sec. 4.4
    and 2.4; a diffuse first level). With a = h on the label's rows and x = A^-1 a (one
    banded solve), Var(L | b) = sigma^2 a'x. The level's mean depends on b through the
    residuals: dL/db = -X'(x / (v h)), so b's error adds g' C g with
    g = (0, ..., c) - X'(x / (v h)) (total variance: E Var(L | b) + Var E(L | b)); C is the
    wider (larger g' C g) of the covariances given (HAC and scaled jackknife).

    Args:
        sp: the rows' spacing; q: noise ratio (0: a constant level); sigma2: noise variance
            of an h0-long interval's kW [kW^2]; X: (n, p) design [h, h degC, h]; base: its
            baseload columns; labels: (n,) integer label of each row; covs: (p, p) [kW^2].

    References:
        Durbin, J. & Koopman, S. J. (2012). Time Series Analysis by State Space Methods, 2nd
        ed. Oxford University Press (state smoothing variance).
    """
    uniq = np.unique(labels)
    out = level_sum_variances(sp, q, sigma2, X, base, [labels == lab for lab in uniq], covs)
    return {int(lab): v for lab, v in zip(uniq, out)}


def level_sum_variances(sp: Spacing, q: float, sigma2: float, X: np.ndarray, base: slice,
                        masks: list[np.ndarray], covs: tuple[np.ndarray, ...]) -> list[float]:
    """level_sum_variance of each set of rows (masks: (n,) booleans; a month's rows, all the
    rows), with one factorisation of A for all of them: the banded solves of every set are
    one LAPACK call with a right-hand side per set, which solves each column on its own (the
    same numbers as one call per set, about half the time on a site-year's months)."""
    h = sp.h
    iv = 1.0 / sp.v
    band = None
    if q > 0.0 and len(h) >= 2:
        w = sp.h0 / (q * sp.dt)
        diag = iv.copy()
        diag[:-1] += w
        diag[1:] += w
        band = np.vstack([np.concatenate([[0.0], -w]), diag])
    out: list[float] = []
    # The right-hand sides a group at a time (at most _LEVEL_RHS_VALUES numbers each: all the
    # months of a 15-minute year at once, a few of a 1-minute year's).
    size = max(1, _LEVEL_RHS_VALUES // max(len(h), 1))
    for g0 in range(0, len(masks), size):
        group = masks[g0:g0 + size]
        A = np.empty((len(h), len(group)), order="F")
        for i, m in enumerate(group):
            np.copyto(A[:, i], np.where(m, h, 0.0))
        if band is not None:
            xs = solveh_banded(band, A, check_finite=False)
            # A month's x decays geometrically away from its rows and ends in subnormal
            # numbers (a quarter of a 15-minute year's entries), on which every product below
            # runs many times slower. Set to zero, they change no sum they enter: each term
            # they give is under 1e-300, far below half a unit in the last place of the
            # month's own terms (same bits on the golden cases, demo and bench sites).
            xs[np.abs(xs) < _TINY] = 0.0
        for i, m in enumerate(group):
            a = A[:, i]
            if band is None:  # a constant level: the weighted mean of the residual kW
                x = np.full(len(h), a.sum() / iv.sum())
            else:
                x = np.ascontiguousarray(xs[:, i])  # contiguous, as one solve's (BLAS dot)
            g = -(X.T @ (iv * x / h))  # matrix-vector products on X: no copy of its rows
            g[base] += (X.T @ m.astype(float))[base]
            var_b = max(float(g @ C @ g) for C in covs)
            out.append(sigma2 * float(a @ x) + max(var_b, 0.0))
        del A
        xs = None
    return out


# Numbers per block of right-hand sides of level_sum_variances (16 MB).
_LEVEL_RHS_VALUES = 2**21
# The smallest normal float64: below it, numbers are subnormal (see level_sum_variances).
_TINY = float(np.finfo(np.float64).tiny)


def fitted_of(X: np.ndarray, coef: np.ndarray, level_kwh: np.ndarray) -> np.ndarray:
    """Fitted energy of each interval [kWh]: design x coefficients plus the level."""
    return X @ coef + level_kwh


def level_smoother(sp: Spacing, q: float) -> Callable[[np.ndarray], np.ndarray]:
    """wander.smooth_level as a function of the residual kW with the tridiagonal system
    factored once (banded Cholesky), for many columns on the same rows: the same numbers,
    a factor's storage (2 n) instead of a fresh band and factor per column."""
    iv = 1.0 / sp.v
    if q <= 0.0 or len(iv) < 2:
        return lambda r: np.full(len(r), float(np.sum(iv * r) / np.sum(iv)))
    w = sp.h0 / (q * sp.dt)
    band = np.empty((2, len(iv)))
    band[0, 0] = 0.0
    np.negative(w, out=band[0, 1:])
    band[1] = iv
    band[1, :-1] += w
    band[1, 1:] += w
    del w
    factor = cholesky_banded(band, overwrite_ab=True, check_finite=False)
    return lambda r: cho_solve_banded((factor, False), iv * r, check_finite=False)


# Consecutive weeks whose within-week noise is pooled (between_week_variance): about a
# month, so a season's larger noise stays with its own weeks. Project choice, no outside
# source. A block with fewer degrees of freedom than POOL_MIN_DOF takes the whole fit's.
POOL_WEEKS = 4
POOL_MIN_DOF = 8.0


@dataclass
class BetweenWeeks:
    """between_week_variance's result.

    tau2_kw2: (k,) each draw's between-week variance [kW^2]; gh_h2: (n_weeks, k) each week's
    sum of g x h (g: the run-hours column, or the part of it the wandering level leaves) [h^2],
    the weight the fitted draw gives the week's own draw (weeks in increasing order).
    """

    tau2_kw2: np.ndarray
    gh_h2: np.ndarray


def between_week_variance(H: np.ndarray, u: np.ndarray, b: np.ndarray, week: np.ndarray,
                          days: np.ndarray,
                          taken: Callable[[np.ndarray], np.ndarray] | None = None
                          ) -> BetweenWeeks:
    """Each draw's real variation from week to week: the DerSimonian-Laird tau^2 [kW^2].

    Per week, the draw's own estimate with the other terms held at the whole fit's values
    (b_w = b + sum g u / sum g^2 over the week). Its variance is phi / sum g^2, where phi,
    the noise scale of a local day's sum of g x residual, is pooled over POOL_WEEKS
    consecutive weeks from the day sums of g (u - g (b_w - b)) (the residual of each week's
    own estimate: the whole fit's residual u still holds the week's own departure, which
    made the within-week variances far too large and tau^2 far too small when the weeks
    really differ). A day sum's expected square is phi (gg_d - gg_d^2 / gg_w) (gg: sum of
    g^2 over the day d and its week w), so phi = sum of squared day sums / sum of
    (gg_w - sum_d gg_d^2 / gg_w); the weights use (nu - 2) / (nu phi), the unbiased estimate
    of 1 / phi for nu degrees of freedom. A week's own 2-7 day sums alone made its variance
    so noisy that the moment estimator's Q came out 1.6-2.7 times its expected K - 1 when
    the weeks did not differ at all (DerSimonian & Laird take the variances as known). Then
    the random-effects moment estimator over the weeks with at least one run-hour.

    g is the run-hours column h itself, or, with the wandering level, the part of h the
    level does not take: h - taken(h). The level is a linear smoother of the fit's residual,
    so a week's departure d in the draw leaves d (h - taken(h)) in u, not d h (the level
    takes about d x the week's mean run-hours as a shift); regressing u on h recovered only
    part of d (tau^2 0.3-0.8 kW^2 for a true 4.6-14.4 on tests/synthetic.make_building).

    Args:
        H: (n, k) run-hours [h]; u: (n,) residual energy of the whole fit [kWh];
        b: (k,) draws [kW]; week, days: (n,) non-decreasing week and local-day labels;
        taken: run-hours column [h] -> the part of it the fit's level takes [h] (None: no
            level).

    References:
        DerSimonian, R. & Laird, N. (1986). Meta-analysis in clinical trials. Controlled
        Clinical Trials 7(3), 177-188.
    """
    k = H.shape[1]
    tau2 = np.zeros(k)
    _, wfirst = np.unique(week, return_index=True)
    wfirst = np.sort(wfirst)
    gh_all = np.zeros((len(wfirst), k))
    if k == 0 or len(u) == 0:
        return BetweenWeeks(tau2, gh_all)
    _, dfirst = np.unique(days, return_index=True)
    dfirst = np.sort(dfirst)
    day_week = week[dfirst]
    _, dw = np.unique(day_week, return_inverse=True)
    dw = dw.reshape(-1)
    block = np.arange(len(wfirst)) // POOL_WEEKS
    for j in range(k):  # one column at a time: no n x k temporaries on 1-minute data
        h = H[:, j]
        run = np.add.reduceat(h, wfirst)
        g = h if taken is None else h - taken(h)
        gu = g * u
        g2 = g * g
        gg = np.add.reduceat(g2, wfirst)
        gh_all[:, j] = gg if taken is None else np.add.reduceat(g * h, wfirst)
        dep = np.divide(np.add.reduceat(gu, wfirst), gg, out=np.zeros(len(gg)), where=gg > 0)
        gg_day = np.add.reduceat(g2, dfirst)
        day = np.add.reduceat(gu, dfirst) - dep[dw] * gg_day
        ok = (run >= 1.0) & (gg > 0)
        if ok.sum() < 3:
            continue
        sq_num = np.bincount(dw, weights=day**2, minlength=len(wfirst))
        # expected sum of squared day sums of each week / phi [h^2], and its degrees of
        # freedom (the week's days with run-hours, minus its own estimate)
        scale = gg - np.divide(np.bincount(dw, weights=gg_day**2, minlength=len(gg)), gg,
                               out=np.zeros(len(gg)), where=gg > 0)
        nu = np.bincount(dw, weights=(gg_day > 0).astype(float), minlength=len(gg)) - 1.0
        bk, nb = block[ok], block[-1] + 1
        num_b = np.bincount(bk, weights=sq_num[ok], minlength=nb)
        scale_b = np.bincount(bk, weights=scale[ok], minlength=nb)
        nu_b = np.bincount(bk, weights=np.maximum(nu[ok], 0.0), minlength=nb)
        nu_all, num_all = float(nu_b.sum()), float(num_b.sum())
        if nu_all <= 2.0 or num_all <= 0.0:
            continue
        # Each block's inverse scale (nu - 2) / (nu phi); the whole fit's where a block has
        # too few degrees of freedom.
        inv_phi = np.full(nb, (nu_all - 2.0) / nu_all * scale_b.sum() / num_all)
        pooled = (nu_b >= POOL_MIN_DOF) & (num_b > 0)
        inv_phi[pooled] = ((nu_b[pooled] - 2.0) / nu_b[pooled] * scale_b[pooled]
                           / num_b[pooled])
        est = b[j] + dep[ok]
        w = gg[ok] * inv_phi[block[ok]]
        mean = np.sum(w * est) / np.sum(w)
        Q = float(np.sum(w * (est - mean) ** 2))
        denom = float(np.sum(w) - np.sum(w**2) / np.sum(w))
        if denom > 0:
            tau2[j] = max(0.0, (Q - (ok.sum() - 1)) / denom)
    return BetweenWeeks(tau2, gh_all)


@dataclass
class SwitchingSteps:
    """Each load's draw seen separately in the meter's steps where it switches on and where
    it switches off (switching_steps).

    on_kw, off_kw, se_on_kw, se_off_kw: (k,) [kW]; z: (k,) (on - off) / its standard error,
    0 where either draw is prior-driven in the split fit.
    """

    on_kw: np.ndarray
    off_kw: np.ndarray
    se_on_kw: np.ndarray
    se_off_kw: np.ndarray
    z: np.ndarray


def split_switching(h: np.ndarray, interval_h: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split one run-hours column [h] into a switch-on part and a switch-off part [h] that
    add up to it: the on part's on-fraction accumulates the rises of the load's on-fraction
    from one interval to the next, the off part's its falls (so the first differences of
    the on part are the rises, those of the off part the falls)."""
    frac = h / interval_h
    up = np.empty_like(frac)
    up[0] = frac[0]
    np.cumsum(np.maximum(np.diff(frac), 0.0), out=up[1:])
    up[1:] += frac[0]
    return up * interval_h, (frac - up) * interval_h


def switching_design(X: np.ndarray, interval_h: np.ndarray, keep: np.ndarray, k: int,
                     kx: int, block_steps: int | None = None) -> LazyRows:
    """switching_steps' differenced design on the kept steps, made a block of steps at a time
    (solvers.LazyRows: a long series never holds the (steps, k + kx) array): column c < k is
    the first difference of load c's switch-on part in kW (split_switching), column k + c
    its switch-off part, columns 2k..k+kx-1 the differenced weather columns. The same numbers
    as splitting each whole column: the running sum of the rises is continued from a
    checkpoint at each block's first row in the same order (a cumulative sum is sequential),
    so every value is computed exactly as on the whole column. The loads are taken a group
    of columns at a time (_SWITCH_GROUP_VALUES numbers per temporary: every operation is
    elementwise or a cumulative sum down each column, so the numbers are those of one
    column at a time, with a few numpy calls instead of a few per load).

    Args:
        X: (n, >= kx) run-hours then weather columns; interval_h: (n,); keep: (n - 1,) the
            steps kept; block_steps: steps per block (default solvers' sum chunk).
    """
    G = block_steps or _SWITCH_BLOCK_STEPS
    inv_h = 1.0 / interval_h
    steps = np.flatnonzero(keep)
    bounds = np.append(np.arange(0, len(steps), G), len(steps))
    # Block b's steps are made from rows r0 - 1 .. r1 (first(b)); ckpt[b, c]: the running
    # sum of load c's rises before row first(b) (split_switching's cumulative sum there).
    first = np.maximum(steps[bounds[:-1]] - 1, 0) if len(steps) else np.zeros(0, np.int64)
    ckpt = np.zeros((len(first), k))
    frac0 = X[0, :k] / interval_h[0]
    later = first > 0  # blocks after the first row (none when the steps are one block)
    if later.any():
        for cs in _column_groups(k, len(interval_h)):
            run = np.cumsum(np.maximum(np.diff(X[:, cs] / interval_h[:, None], axis=0), 0.0),
                            axis=0)
            ckpt[later, cs] = run[first[later] - 1]
            del run

    def block(b: int) -> np.ndarray:
        d = steps[bounds[b]:bounds[b + 1]]
        r0, r1 = int(d[0]), int(d[-1]) + 1  # rows r0..r1 make these steps
        a = int(first[b])  # the rises from row a on are summed from ckpt[b]
        ih, ivh = interval_h[r0:r1 + 1, None], inv_h[r0:r1 + 1, None]
        pick = d - r0
        lo = max(r0, 1)
        out = np.empty((len(d), k + kx))
        for cs in _column_groups(k, r1 + 1 - a):
            frac_a = X[a:r1 + 1, cs] / interval_h[a:r1 + 1, None]  # on-fractions, rows a..r1
            rise = np.maximum(np.diff(frac_a, axis=0), 0.0)
            # Continued from the checkpoint in the same order (a cumulative sum is sequential).
            run = (np.cumsum(np.concatenate([ckpt[b:b + 1, cs], rise]), axis=0)[1:] if a
                   else np.cumsum(rise, axis=0))
            del rise
            up = np.empty((r1 + 1 - r0, cs.stop - cs.start))  # split_switching's up, r0..r1
            if r0 == 0:
                up[0] = frac0[cs]
            up[lo - r0:] = run[lo - 1 - a:r1 - a] + frac0[cs]
            del run
            frac = frac_a[r0 - a:]
            out[:, cs] = np.diff(up * ih * ivh, axis=0)[pick]
            out[:, k + cs.start:k + cs.stop] = np.diff((frac - up) * ih * ivh, axis=0)[pick]
        if kx > k:
            out[:, 2 * k:] = np.diff(X[r0:r1 + 1, k:kx] * ivh, axis=0)[pick]
        return out

    return LazyRows(bounds, k + kx, block)


def _column_groups(k: int, rows: int) -> list[slice]:
    """Slices of the k load columns, each with at most _SWITCH_GROUP_VALUES numbers over
    `rows` rows (at least one column)."""
    size = max(1, _SWITCH_GROUP_VALUES // max(rows, 1))
    return [slice(c, min(c + size, k)) for c in range(0, k, size)]


# Numbers per temporary array of switching_design (2 MB): the 1-minute site-year's blocks
# of 65,536 steps take 4 loads at a time, a 15-minute site-year's whole range 7.
_SWITCH_GROUP_VALUES = 2**18


# Steps per block of switching_design (and between its checkpoints).
_SWITCH_BLOCK_STEPS = 65536


def switching_steps(X: np.ndarray, y: np.ndarray, k: int, kx: int, interval_h: np.ndarray,
                    prior: tuple[np.ndarray, np.ndarray], block: np.ndarray,
                    hour_of_day: np.ndarray | None = None, drift_sd: float = 1e3,
                    adjacent: np.ndarray | None = None,
                    smooth: frozenset[int] = frozenset()) -> SwitchingSteps | None:
    """Refit on first differences (kW) with each of the first k columns (run-hours) split
    into its switch-on and switch-off parts (split_switching): each load gets one draw from
    the meter's steps where it switches on and one from those where it switches off.

    With a right model the two agree. They differ when something unlogged tends to start
    (or stop) with the load (a coincident load: people who draw hot water also switch on
    lights), or when the status is clipped or late at one edge (a status sampled once a
    minute counts a partly-on minute as on or off: errors in the run-hours, Fuller 1987);
    one draw from all intervals then mixes the coincident energy in, and the data alone
    cannot tell which step is the load's own. Differencing removes any slow baseload level;
    the steps where the declared baseload profile itself changes (its columns X[:, kx:]
    differ from the interval before: an hour of the week, a schedule edge, a closed day) are
    left out, so the profile drops out of the differenced model and the check holds for
    every baseload form at the cost of a k-column fit. With hour_of_day, each local hour of
    the day also gets its own mean step (kW per interval): a baseload that rises or falls
    through the hour (a daily swing, lights that ramp) would otherwise add to the steps of
    the loads that switch at those hours.

    Args:
        X: (n, p) the chosen form's design in kWh and hours: run-hours (k columns), weather
            slope columns (up to kx), then the baseload profile; y: (n,) kWh;
        interval_h: (n,) hours of each interval; prior: (>= kx,) prior means and sds of X's
        first kx columns; block: (n - 1,) non-decreasing block labels of the differenced
        rows (for the HAC covariance); hour_of_day: (n,) local hour 0..23 of each interval,
        or None; drift_sd: prior sd of the hourly mean steps [kW] (weak); adjacent: (n - 1,)
        whether each interval starts where the one before ends (a step across a meter gap or
        a left-out interval is no switching step and is left out); None = all adjacent;
        smooth: baseload columns that change at every step but only smoothly (the
        hour-of-week profile's within-hour slopes): not a profile change, their mean step
        within each hour is the hour's mean step.

    Returns:
        The two draws per load, or None when there is nothing to check or fewer than
        MIN_ROWS_PER_COLUMN steps per column are left.

    References:
        Fuller, W. A. (1987). Measurement Error Models. Wiley.
    """
    n, p = X.shape
    if k == 0 or n < 3:
        return None
    inv_h = 1.0 / interval_h
    keep = np.ones(n - 1, dtype=bool) if adjacent is None else adjacent.copy()
    for c in range(kx, p):  # one column at a time: no n x p temporary
        if c in smooth:
            continue
        keep &= np.abs(np.diff(X[:, c] * inv_h)) <= NUMERICAL_TOL
    ind = None
    if hour_of_day is not None:
        hours, level = np.unique(hour_of_day[1:][keep], return_inverse=True)
        ind = Indicators(level.reshape(-1), np.ones(len(level)), len(hours))
    nh = ind.n_levels if ind is not None else 0
    m = k + kx
    if keep.sum() < MIN_ROWS_PER_COLUMN * (m + nh):
        return None
    Xd = switching_design(X, interval_h, keep, k, kx)  # made a block of steps at a time
    mean, sd = prior
    f = fit_model(Xd, np.diff(y * inv_h)[keep], np.concatenate([mean[:k], mean[:kx], np.zeros(nh)]),
                  np.concatenate([sd[:k], sd[:kx], np.full(nh, drift_sd)]),
                  np.r_[np.zeros(m), np.full(nh, -np.inf)], block=block[keep], indicators=ind)
    on, off = f.coef[:k], f.coef[k:2 * k]
    idx = np.arange(k)
    var_d = np.maximum(f.cov[idx, idx] + f.cov[k + idx, k + idx] - 2.0 * f.cov[idx, k + idx], 0.0)
    fitted = (f.prior_weight[:k] < PRIOR_DRIVEN_WEIGHT) & (f.prior_weight[k:2 * k]
                                                           < PRIOR_DRIVEN_WEIGHT)
    ok = fitted & (var_d > 0)
    z = np.zeros(k)
    z[ok] = (on[ok] - off[ok]) / np.sqrt(var_d[ok])
    return SwitchingSteps(on.copy(), off.copy(), np.sqrt(np.maximum(f.cov[idx, idx], 0.0)),
                          np.sqrt(np.maximum(f.cov[k + idx, k + idx], 0.0)), z)


def schedule_edge_share(H: np.ndarray, interval_h: np.ndarray, base: BaseloadSettings,
                        minute: np.ndarray, weekday: np.ndarray) -> np.ndarray:
    """Share of each load's switching (its on-fraction changing by at least half an interval
    from one interval to the next) that happens within SCHEDULE_EDGE_MIN minutes of a
    declared spell's start or end, on the days the spell applies; 0 without spells.
    minute, weekday: each interval's local start, hour x 60 + minute and day of the week
    (0 = Monday), as align.frame_arrays makes them once per frame (the time zone's rules are
    not applied again for every fit)."""
    k = H.shape[1]
    if not base.spells or len(interval_h) < 2 or k == 0:
        return np.zeros(k)
    near = np.zeros(len(minute), dtype=bool)
    for spell in base.spells:
        on_day = np.isin(weekday, spell.days)
        for edge in (spell.start_min, spell.end_min):
            d = np.abs(minute - edge)
            near |= on_day & (np.minimum(d, 1440 - d) <= SCHEDULE_EDGE_MIN)
    edge_step = near[1:] | near[:-1]
    total = np.zeros(k)
    at_edge = np.zeros(k)
    for cs in _column_groups(k, len(interval_h)):  # bounded temporaries on 1-minute data
        switch = np.abs(np.diff(H[:, cs] / interval_h[:, None], axis=0)) >= 0.5
        total[cs] = switch.sum(axis=0)
        at_edge[cs] = (switch & edge_step[:, None]).sum(axis=0)
    return np.where(total >= SCHEDULE_EDGE_MIN_SWITCHES, at_edge / np.maximum(total, 1), 0.0)


def _project_out_days(V: np.ndarray, C: np.ndarray, days: np.ndarray) -> np.ndarray:
    """Residuals of V's columns after least squares on C's columns separately within each day.

    Args:
        V: (n, q) columns to residualize, overwritten with the residuals (and returned);
        C: (n, c) per-day nuisance columns; days: (n,) non-decreasing day labels.

    Each day's C columns are orthonormalised by Gram-Schmidt (twice, for orthogonality to
    working precision), all days at once; a column that adds no direction within a day (all
    zero, or a multiple of the earlier ones: norm left at most c_rows x machine epsilon x the
    day's largest column norm, as the SVD least-squares rank rule) is skipped for that day.
    The projection on them is then subtracted from V, a few weeks of rows at a time
    (_DayProjection: the same numbers a block of whole days at a time).
    """
    proj = _DayProjection(C, days)
    for b in range(len(proj.bounds) - 1):
        lo, hi = proj.bounds[b], proj.bounds[b + 1]
        proj.apply(b, V[lo:hi])
    return V


class _DayProjection:
    """_project_out_days in blocks of whole days: the orthonormal per-day basis of C's
    columns (c vectors of n numbers), and its projection subtracted from any block of rows.

    bounds: (blocks + 1,) first row of each block (a few weeks of whole days) and n."""

    def __init__(self, C: np.ndarray, days: np.ndarray):
        n = len(days)
        starts = np.flatnonzero(np.concatenate([[True], np.diff(days) != 0]))
        day_bounds = np.append(starts, n)
        chunk_days = max(1, _PROJECT_CHUNK_ROWS * len(starts) // max(n, 1))
        firsts = list(range(0, len(starts), chunk_days))
        self.bounds = np.append(day_bounds[firsts], n)
        self.local: list[np.ndarray] = []
        self.day_of: list[np.ndarray] = []
        self.basis = [np.empty(n) for _ in range(C.shape[1])]
        for d0 in firsts:
            d1 = min(d0 + chunk_days, len(starts))
            rows = slice(day_bounds[d0], day_bounds[d1])
            local = day_bounds[d0:d1] - day_bounds[d0]  # first row of each day in the chunk
            sizes = np.diff(np.append(local, day_bounds[d1] - day_bounds[d0]))
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
                self.basis[k][rows] = basis[-1]
            self.local.append(local)
            self.day_of.append(day_of)

    def apply(self, b: int, Vc: np.ndarray) -> np.ndarray:
        """Subtract the projection from Vc, the rows of block b (in place; returned)."""
        rows = slice(self.bounds[b], self.bounds[b + 1])
        local, day_of = self.local[b], self.day_of[b]
        for q_all in self.basis:
            q = q_all[rows]
            Vc -= q[:, None] * np.add.reduceat(q[:, None] * Vc, local, axis=0)[day_of]
        return Vc


# Rows per chunk of _project_out_days (whole days): bounds its temporary memory.
_PROJECT_CHUNK_ROWS = 65536
