"""Which baseload form the data support: compare forms by a penalised likelihood.

Forms: a profile (constant, occupied, hour-of-week) alone, or plus a wandering level
(disagg.fit.wander). Every form is fitted on the same first differences of the metered kW, so
their likelihoods are comparable: a form without the level is the wander model at q = 0
(its intercept is the level's unknown start). The criterion is Akaike's, with the
likelihood divided by an overdispersion factor c (the quasi-likelihood form, QAIC; Burnham &
Anderson 2002, sec. 2.5, from memory): c is the long-run variance of the most flexible
form's whitened residuals over their variance (Bartlett weights, Newey-West lag), at least 1
(1 for independent rows; meter noise that persists over hours makes the plain likelihood
overconfident and would pick the most flexible form).

    QAIC = (-2 log L) / c + 2 p

with p the number of fitted coefficients the data can tell apart (the rank of the design;
the level's q counts as one); among forms with the same criterion the declared profile is
taken. Akaike's penalty,
not Schwarz's log N: the aim is the form that predicts the meter best, and AIC is
asymptotically equivalent to leave-one-out cross-validation (Stone 1977); the log N penalty
refused the 168-level profile on a month of data even where it was the true shape (the
scheduled fan of tests/synthetic.py's misspecified building then came out 30 % high). Each
form gets the weight exp(-dQAIC / 2) normalised over the forms (Burnham & Anderson 2002,
sec. 2.9); forms with weight at least CREDIBLE_WEIGHT are credible and their disagreement
widens the intervals (disagg.fit.estimate).

References:
    Akaike, H. (1974). A new look at the statistical model identification. IEEE
    Transactions on Automatic Control 19(6), 716-723.
    Stone, M. (1977). An asymptotic equivalence of choice of model by cross-validation and
    Akaike's criterion. J. Royal Statistical Society B 39(1), 44-47.
    Burnham, K. P. & Anderson, D. R. (2002). Model Selection and Multimodel Inference, 2nd
    ed. Springer (QAIC, model weights; from memory).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from disagg.fit.solvers import newey_west_lag, solve_regularized
from disagg.fit.wander import (
    Q_MAX,
    Spacing,
    band_factor,
    neg2_loglik_n,
    normal_solve,
    profile_q,
    whiten_columns,
)

# A form whose weight is at least this is credible: its draws count in the intervals.
# Common practice, no source (a model with 5 % weight is one the data do not rule out).
CREDIBLE_WEIGHT = 0.05


@dataclass(frozen=True)
class Form:
    """A baseload form: the profile, with or without the wandering level (noise ratio q)."""

    profile: str
    level: bool
    q: float = 0.0

    @property
    def name(self) -> str:
        return self.profile + ("+level" if self.level else "")

    @classmethod
    def parse(cls, name: str) -> Form:
        profile, _, lv = name.partition("+")
        return cls(profile, lv == "level")


@dataclass
class FormScore:
    """One form's fit in the comparison."""

    form: Form
    neg2ll: float
    n_params: int
    criterion: float = float("nan")
    delta: float = float("nan")
    weight: float = float("nan")
    draws_kw: np.ndarray = field(default_factory=lambda: np.zeros(0))
    se_kw: np.ndarray = field(default_factory=lambda: np.zeros(0))


@dataclass
class FormChoice:
    """The form used, how it was chosen and how the others compared."""

    form: Form
    pinned: bool
    scores: list[FormScore]
    overdispersion: float
    criterion: str = "QAIC on first differences (lower is better)"
    # A month's fit takes its range's form (and scores only the range's credible rivals).
    from_range: bool = False

    def credible(self) -> list[FormScore]:
        return [s for s in self.scores if s.weight >= CREDIBLE_WEIGHT]

    def as_json(self) -> dict:
        return {
            "used": self.form.name, "q": self.form.q, "pinned": self.pinned,
            "from_range": self.from_range,
            "criterion": self.criterion, "overdispersion": self.overdispersion,
            "credible_weight": CREDIBLE_WEIGHT, "q_max": Q_MAX,
            "forms": [{"form": s.form.name, "q": s.form.q,
                       "q_at_max": bool(s.form.level and s.form.q >= Q_MAX * (1 - 1e-9)),
                       "neg2_loglik": s.neg2ll,
                       "parameters": s.n_params, "criterion": s.criterion,
                       "delta": s.delta, "weight": s.weight} for s in self.scores],
        }


# The column of each profile that the level (or the intercept of the differences) replaces.
CONSTANT_COLUMN = {"constant": 0, "occupied": 1, "occupied-edges": 1, "hour-of-week": 0,
                   "hour-of-week-edges": 0}


def kept_columns(profile: str, m: int) -> list[int]:
    """Indices of a profile's m baseload columns that stay beside the level: all but the
    direction of the constant (constant: its one column; occupied: the unoccupied hours,
    so the occupied column is the occupied kW above the unoccupied level; hour-of-week:
    Monday 00:00-01:00, the others are kW above it). Extra columns (closed hours) stay."""
    drop = CONSTANT_COLUMN[profile]
    return [i for i in range(m) if i != drop]


def drop_constant(profile: str, B: np.ndarray, h: np.ndarray) -> np.ndarray:
    """The profile's columns in kW units (divided by interval hours) without the direction
    of the constant (kept_columns)."""
    n, m = B.shape
    drop = CONSTANT_COLUMN[profile] if m else 0
    # Written column-major (as whiten_columns reads it), without a copy of the kept columns.
    out = np.empty((max(m - 1, 0), n)).T
    if m:
        np.divide(B[:, :drop], h[:, None], out=out[:, :drop])
        np.divide(B[:, drop + 1:], h[:, None], out=out[:, drop:])
    return out


@dataclass
class _Gram:
    """W'W of the whitened [X, z] at one q, and log det T; W = [E, Zb, z] whitened, kept in
    its parts (the shared [E, z] and the profile's Zb) for the residual."""

    G: np.ndarray
    logdet: float
    n: int
    Wez: np.ndarray  # the whitened [E, z]
    Wb: np.ndarray  # the whitened profile columns

    def residual(self, b: np.ndarray) -> np.ndarray:
        """Whitened residual z - [E, Zb] b."""
        k = self.Wez.shape[1] - 1
        r = self.Wez[:, k] - self.Wez[:, :k] @ b[:k]
        if self.Wb.shape[1]:
            r = r - self.Wb @ b[k:]
        return r

    def fit(self, mean: np.ndarray, pen: np.ndarray, lower: np.ndarray) -> tuple[np.ndarray, float]:
        """Bounded ridge solve from the Gram matrix; (coefficients, residual sum of squares)."""
        p = self.G.shape[0] - 1
        Gxx, gxz, gzz = self.G[:p, :p], self.G[:p, p], self.G[p, p]
        if p == 0:
            return np.zeros(0), float(gzz)
        # The unpenalised solution is needed only without a penalty (and to see whether it
        # keeps the bounds).
        b = None if (pen > 0).any() else normal_solve(Gxx, gxz)
        if b is None or np.any(b < lower):
            # The compressed system R'R = Gxx, R'c = gxz has the same least-squares problem.
            w, V = np.linalg.eigh(Gxx)
            keep = w > w.max() * 1e-12 if w.size else w
            R = (V[:, keep] * np.sqrt(w[keep])).T
            c = (V[:, keep].T @ gxz) / np.sqrt(w[keep])
            b = solve_regularized(R, c, mean, pen, lower)
        rss = float(gzz - 2 * b @ gxz + b @ Gxx @ b)
        return b, max(rss, 0.0)


class _Whitening:
    """The whitened columns every form shares (the equipment's E and the metered z), per
    noise ratio q, over one run of rows: each form whitens only its own profile columns
    (whitening is column by column, see wander.whiten_columns)."""

    def __init__(self, E: np.ndarray, z: np.ndarray, sp: Spacing):
        self.Ez = np.column_stack([E, z])
        self.sp = sp
        self._by_q: dict[float, tuple[np.ndarray, float, np.ndarray, np.ndarray]] = {}

    def _shared(self, q: float) -> tuple[np.ndarray, float, np.ndarray, np.ndarray]:
        if q not in self._by_q:
            lower, logdet = band_factor(self.sp, q)
            Wez = whiten_columns(self.Ez, lower)
            self._by_q[q] = (lower, logdet, Wez, Wez.T @ Wez)
        return self._by_q[q]

    def gram(self, Zb: np.ndarray, q: float) -> _Gram:
        """The Gram matrix of the whitened [E, Zb, z] at q."""
        lower, logdet, Wez, Gez = self._shared(q)
        k, m = Wez.shape[1] - 1, Zb.shape[1]
        G = np.empty((k + m + 1, k + m + 1))
        e, last = slice(0, k), k + m
        G[e, e] = Gez[e, e]
        G[e, last] = G[last, e] = Gez[e, k]
        G[last, last] = Gez[k, k]
        Wb = whiten_columns(Zb, lower)
        if m:
            cross = Wez.T @ Wb  # (k + 1, m)
            bb = slice(k, last)
            G[e, bb] = cross[:k]
            G[bb, e] = cross[:k].T
            G[bb, bb] = Wb.T @ Wb
            G[bb, last] = G[last, bb] = cross[k]
        return _Gram(G, logdet, len(Wez), Wez, Wb)


def _rank(G: np.ndarray) -> int:
    """Numerical rank of a Gram matrix (columns scaled to unit norm first): a profile column
    that repeats a load's hours (a fan locked to the schedule) adds no parameter the data
    can fit, so it is not penalised either."""
    if G.shape[0] == 0:
        return 0
    d = np.sqrt(np.maximum(np.diag(G), 1e-300))
    w = np.linalg.eigvalsh(G / np.outer(d, d))
    return int(np.sum(w > w.max() * 1e-9))


def compare_forms(H: np.ndarray, y: np.ndarray, sp: Spacing, profiles: dict[str, np.ndarray],
                  days: np.ndarray, prior_mean: np.ndarray, prior_sd: np.ndarray,
                  levels: bool = True, fixed_q: dict[str, float] | None = None,
                  only: set[str] | None = None) -> tuple[list[FormScore], np.ndarray]:
    """Fit every form on the same differences and score it.

    Args:
        H: (n, k) equipment-hours [h] of the fitted terms; y: (n,) metered energy [kWh].
        profiles: profile name -> (n, m) baseload columns [h].
        days: (n,) local-day labels (for the overdispersion factor).
        prior_mean, prior_sd: (k,) the terms' priors [kW] (ridge, as the final fit).
        levels: also score each profile plus the wandering level.
        fixed_q: profile -> q to use instead of the profile-likelihood search.
        only: the names of the forms to score (None: all); the most flexible form is fitted
            in any case, for the overdispersion.

    A profile of more than WIDE_PROFILE_COLUMNS columns (hour-of-week) after a narrower one
    is scored with the level only, at the narrower profile's noise ratio: q describes the
    level's slow wander, which the narrower profile's fit already shows, and each of its
    likelihood evaluations on a year of rows costs about 0.2 s here.

    The equipment columns and the metered kW are whitened once per noise ratio and shared by
    every form (and by the noise-ratio searches, which try the same grid of q), each form
    whitening only its own profile columns.

    Returns:
        the scores (criterion not yet filled, see score) and the whitened residuals of the
        most flexible form (the last profile's, with the level) for the overdispersion.
    """
    h = sp.h
    z = y / h
    E = H / h[:, None]
    k = H.shape[1]
    scores = []
    residual = None
    last_q = None
    prec = np.where(np.isfinite(prior_sd) & (prior_sd > 0), 1.0 / np.square(prior_sd), 0.0)
    whole = _Whitening(E, z, sp)
    windows: dict[tuple[int, int], _Whitening] = {}
    last_profile = list(profiles)[-1] if profiles else None
    for profile, B in profiles.items():
        Zb = drop_constant(profile, B, h)
        p = k + Zb.shape[1]
        mean = np.concatenate([prior_mean, np.zeros(Zb.shape[1])])
        pr = np.concatenate([prec, np.zeros(Zb.shape[1])])
        lower = np.concatenate([np.zeros(k), np.full(Zb.shape[1], -np.inf)])
        wide = Zb.shape[1] > WIDE_PROFILE_COLUMNS and last_q is not None and levels
        for level in ((True,) if wide else (False, True) if levels else (False,)):
            if level:
                q = (fixed_q or {}).get(profile)
                if q is None and wide:
                    q = last_q
                elif q is None:
                    rows = _window(sp, p)
                    key = (rows.start, rows.stop)
                    if key not in windows:
                        windows[key] = (whole if rows.stop - rows.start == len(z) else
                                        _Whitening(E[rows], z[rows], sp.rows(rows)))
                    win, Zw = windows[key], Zb[rows]
                    q = profile_q(Zw, z[rows], sp.rows(rows),
                                  gram=lambda qq, _w=win, _z=Zw: _gram_of(_w.gram(_z, qq))).q
                last_q = q
            else:
                q = 0.0
            name = Form(profile, level).name
            for_residual = profile == last_profile and (level or not levels)
            if only is not None and name not in only and not for_residual:
                continue
            g = whole.gram(Zb, q)
            b0, rss0 = g.fit(mean, np.zeros_like(pr), np.full(len(pr), -np.inf))
            if for_residual:
                residual = g.residual(b0)
            if only is not None and name not in only:
                continue
            sigma2 = rss0 / max(g.n - p, 1)
            b, rss = g.fit(mean, sigma2 * pr, lower)
            A = g.G[:-1, :-1] + np.diag(sigma2 * pr)
            se = np.sqrt(np.maximum(np.diag(np.linalg.pinv(A)) * sigma2, 0.0))
            scores.append(FormScore(Form(profile, level, q), neg2_loglik_n(g.n, rss0, g.logdet),
                                    _rank(g.G[:-1, :-1]) + 1 + int(level), draws_kw=b[:k],
                                    se_kw=se[:k]))
    return scores, residual


def _gram_of(g: _Gram) -> tuple[np.ndarray, float]:
    return g.G, g.logdet


# See compare_forms.
WIDE_PROFILE_COLUMNS = 40
# The noise ratio search uses a window of the rows (contiguous, in the middle of the range)
# of at least Q_WINDOW_ROWS rows and Q_WINDOW_ROWS_PER_COLUMN per design column: the
# likelihood's shape in q is set by the level's local behaviour, which a few weeks show
# (the chosen form is then fitted and scored on every row).
Q_WINDOW_ROWS = 6000
Q_WINDOW_ROWS_PER_COLUMN = 25


def _window(sp: Spacing, p: int) -> slice:
    n = len(sp.h)
    want = max(Q_WINDOW_ROWS, Q_WINDOW_ROWS_PER_COLUMN * p)
    if n <= want:
        return slice(0, n)
    a = (n - want) // 2
    return slice(a, a + want)


def overdispersion(u: np.ndarray) -> float:
    """Long-run variance of the whitened residuals over their variance, at least 1: the
    Bartlett-weighted sum of their autocorrelations, 1 + 2 sum_l (1 - l / (L + 1)) r_l, at
    the Newey-West (1994) lag L (Newey & West 1987)."""
    n = len(u)
    if n < 3:
        return 1.0
    lag = min(newey_west_lag(n), n - 1)
    u = u - u.mean()
    v = float(u @ u)
    if v <= 0:
        return 1.0
    acf = [float(u[l:] @ u[:-l]) / v for l in range(1, lag + 1)]
    return max(1.0, 1.0 + 2.0 * sum((1 - l / (lag + 1.0)) * r for l, r in enumerate(acf, 1)))


def score(scores: list[FormScore], c: float, n: int) -> None:
    """Fill criterion, delta and weight (in place)."""
    crit = np.array([s.neg2ll / c + 2.0 * s.n_params for s in scores])
    delta = crit - crit.min()
    w = np.exp(-0.5 * delta)
    w /= w.sum()
    for s, cr, d, wt in zip(scores, crit, delta, w):
        s.criterion, s.delta, s.weight = float(cr), float(d), float(wt)


def lowest(scores: list[FormScore]) -> list[FormScore]:
    """The scored forms tied (to rounding) at the lowest criterion."""
    low = min(sc.criterion for sc in scores)
    return [sc for sc in scores if sc.criterion - low <= 1e-9 * max(abs(low), 1.0)]
