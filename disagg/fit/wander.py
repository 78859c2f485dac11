"""A baseload that wanders: the declared profile plus a slowly varying level.

The local-level model (Harvey 1989; Durbin & Koopman 2012, ch. 2) for the metered power of
interval t (kW = kWh / interval hours):

    z_t = x_t' b + mu_t + e_t,      e_t ~ N(0, sigma^2 v_t),   v_t = h0 / h_t
    mu_t = mu_{t-1} + w_t,          w_t ~ N(0, q sigma^2 dt_t / h0)

where h_t is the interval length, h0 the median interval length, dt_t the hours from the
previous used interval's start to this one's (gaps let the level walk further) and the first
level is diffuse (unknown, no prior). q is the noise ratio: the variance of the level's step
per interval over the variance of the interval noise. q = 0 is a constant level, i.e. the
ordinary levels regression with an intercept.

Estimation by generalised least squares on first differences: Delta z = Delta X b + u with
cov(u) = sigma^2 T, T tridiagonal (T_ii = q dt_i / h0 + v_i + v_{i-1}, T_i,i-1 = -v_{i-1}).
T = L L' with L lower bidiagonal (banded Cholesky), so whitening (L^-1 Delta X, L^-1 Delta z)
and the log-determinant cost O(n) per column. Differencing removes the level's unknown start
exactly as the diffuse Kalman filter does, so the likelihood of the differences is the diffuse
likelihood of the levels (Durbin & Koopman 2012, sec. 7.2). q is chosen by the concentrated
(profile) likelihood; given b, the level is the smoother's mean: the solution of the
tridiagonal system (V^-1 + D' W D) mu = V^-1 (z - X b).

Pure functions on arrays; the caller (estimate.py) builds the design and reuses the bounded
ridge solver on the whitened rows.

References:
    Harvey, A. C. (1989). Forecasting, Structural Time Series Models and the Kalman Filter.
    Cambridge University Press.
    Durbin, J. & Koopman, S. J. (2012). Time Series Analysis by State Space Methods, 2nd ed.
    Oxford University Press.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy.linalg import cho_factor, cho_solve, cholesky_banded, solveh_banded
from scipy.linalg.lapack import dtbtrs

# Bounds of the noise-ratio search (per interval): below Q_MIN the level is constant for all
# practical purposes over a year of 15-minute data. Q_MAX keeps the level slow: at q = 0.01
# the level's step per interval has a tenth of the noise's sd, so over a day of 15-minute
# intervals it moves about as much as one interval's noise. A faster level would also
# follow the steps of loads that switch near the same times (measured: a fan starting on
# lights that ramp came out 15-20 % high with q ~ 2); fast baseload changes are left to the
# profile and to the noise, whose persistence the HAC covariance accounts for.
# (Project choice, measured on tests/synthetic.make_office; no outside source.)
Q_MIN = 1e-7
Q_MAX = 1e-2
# Grid points of the profile-likelihood search (log-spaced), refined by a parabola.
Q_GRID = 7


@dataclass(frozen=True)
class Spacing:
    """Time structure of the rows used: interval lengths and the steps between them.

    h: (n,) interval length [h]; dt: (n-1,) hours between consecutive rows' starts;
    h0: median interval length [h] (the unit of q).
    """

    h: np.ndarray
    dt: np.ndarray
    h0: float

    @classmethod
    def from_ns(cls, start_ns: np.ndarray, end_ns: np.ndarray) -> Spacing:
        h = (end_ns - start_ns) / 3.6e12
        return cls(h=h, dt=np.diff(start_ns) / 3.6e12, h0=float(np.median(h)))

    def rows(self, sl: slice) -> Spacing:
        """The spacing of a contiguous run of rows."""
        return Spacing(h=self.h[sl], dt=self.dt[sl.start:max(sl.stop - 1, sl.start)], h0=self.h0)

    @property
    def v(self) -> np.ndarray:
        """Relative noise variance of each row's kW: h0 / h."""
        return self.h0 / self.h


def _band(sp: Spacing, q: float) -> np.ndarray:
    """T in lower banded storage (2, n-1): row 0 the diagonal, row 1 the sub-diagonal."""
    v = sp.v
    diag = q * sp.dt / sp.h0 + v[1:] + v[:-1]
    sub = np.zeros_like(diag)
    sub[:-1] = -v[1:-1]
    return np.vstack([diag, sub])


@dataclass(frozen=True)
class Whitened:
    """Whitened differences W = L^-1 [Delta X, Delta z] (rows = n - 1) and log det T."""

    W: np.ndarray
    logdet: float

    @property
    def X(self) -> np.ndarray:
        return self.W[:, :-1]

    @property
    def z(self) -> np.ndarray:
        return self.W[:, -1]


def whiten(X: np.ndarray, z: np.ndarray, sp: Spacing, q: float,
           scale: np.ndarray | None = None) -> Whitened:
    """GLS whitening of the differenced model at noise ratio q.

    Args:
        X: (n, p) design in kW units (columns divided by interval hours); z: (n,) kW.
        scale: (n,) row factors applied first (1 / interval hours for a design in kWh and
            hours), without a scaled copy of X.
    """
    lower, logdet = band_factor(sp, q)
    rhs = np.empty((len(z) - 1, X.shape[1] + 1), order="F")
    if scale is None:
        np.subtract(X[1:], X[:-1], out=rhs[:, :-1])
        np.subtract(z[1:], z[:-1], out=rhs[:, -1])
    else:
        a, b = scale[1:], scale[:-1]
        for j in range(X.shape[1]):  # one column at a time: no n x p temporary
            np.subtract(X[1:, j] * a, X[:-1, j] * b, out=rhs[:, j])
        np.subtract(z[1:] * a, z[:-1] * b, out=rhs[:, -1])
    return Whitened(W=_forward(lower, rhs), logdet=logdet)


def band_factor(sp: Spacing, q: float) -> tuple[np.ndarray, float]:
    """The banded Cholesky factor L of T at noise ratio q (LAPACK's lower triangular band
    storage: diagonal, sub-diagonal) and log det T."""
    lower = cholesky_banded(_band(sp, q), lower=True, check_finite=False)
    return lower, 2.0 * float(np.sum(np.log(lower[0])))


def whiten_columns(X: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """L^-1 Delta X for the factor L of band_factor: the whitening of whiten() for columns
    alone (each column is whitened on its own, so a design's columns may be whitened in
    parts that share L)."""
    rhs = np.empty((len(X) - 1, X.shape[1]), order="F")
    np.subtract(X[1:], X[:-1], out=rhs)
    return _forward(lower, rhs)


def _forward(lower: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """L^-1 rhs (in place when rhs is Fortran-ordered). L is lower bidiagonal, stored as
    LAPACK's triangular band (diagonal, sub-diagonal): the triangular band solve (dtbtrs) is
    the forward substitution, O(n) per column."""
    if rhs.shape[1] == 0:
        return rhs
    out, info = dtbtrs(lower, rhs, uplo="L", overwrite_b=1)
    if info != 0:
        raise np.linalg.LinAlgError(f"banded triangular solve failed (info {info})")
    return out


def neg2_loglik(w: Whitened, rss: float) -> float:
    """-2 x the concentrated (sigma^2 profiled out) diffuse log-likelihood, without the
    constant N (1 + log 2 pi)."""
    n = len(w.z)
    return n * np.log(max(rss, 1e-300) / n) + w.logdet


def neg2_loglik_n(n: int, rss: float, logdet: float) -> float:
    """neg2_loglik from the number of differences n, the RSS and log det T."""
    return n * np.log(max(rss, 1e-300) / n) + logdet


def gram_rss(w: Whitened) -> float:
    """Residual sum of squares of the least-squares fit of w.z on w.X, from the Gram matrix
    (rank-deficient columns allowed: any solution of the normal equations has the same
    residual)."""
    return gram_rss_g(w.W.T @ w.W)


def gram_rss_g(G: np.ndarray) -> float:
    """gram_rss from the Gram matrix G of [X, z] (z last)."""
    p = G.shape[0] - 1
    if p == 0:
        return float(G[0, 0])
    return max(float(G[p, p] - normal_solve(G[:p, :p], G[:p, p]) @ G[:p, p]), 0.0)


def normal_solve(G: np.ndarray, g: np.ndarray) -> np.ndarray:
    """A solution of the normal equations G b = g (G symmetric positive semi-definite):
    Cholesky when G is positive definite, else the least-squares (minimum-norm) solution."""
    try:
        c = cho_factor(G, check_finite=False)
        b = cho_solve(c, g, check_finite=False)
        if np.all(np.isfinite(b)) and np.all(np.abs(np.diag(c[0])) > 1e-10 * np.sqrt(
                np.maximum(np.diag(G), 1e-300))):
            return b
    except np.linalg.LinAlgError:
        pass
    return np.linalg.lstsq(G, g, rcond=None)[0]


@dataclass(frozen=True)
class LevelFit:
    """Profile-likelihood choice of the noise ratio: q, -2 log L at q and at q = 0."""

    q: float
    neg2ll: float
    neg2ll_static: float
    evaluated: tuple[tuple[float, float], ...]  # (q, -2 log L) of every trial


def profile_q(X: np.ndarray, z: np.ndarray, sp: Spacing, grid: int = Q_GRID,
              q_max: float = Q_MAX,
              gram: Callable[[float], tuple[np.ndarray, float]] | None = None) -> LevelFit:
    """The noise ratio q maximising the concentrated likelihood of the differences.

    A log-spaced grid over [Q_MIN, q_max], then parabolas (in log q) through the best point
    and its neighbours, twice; q = 0 (a constant level) is always a candidate.

    gram: optional q -> (W'W of the whitened [X, z], log det T), for a caller that whitens
    columns it shares between several designs once (disagg.fit.select); X and z are then
    used only for the number of rows.
    """
    def f(q: float) -> float:
        if gram is not None:
            G, logdet = gram(q)
            return float(neg2_loglik_n(len(z) - 1, gram_rss_g(G), logdet))
        w = whiten(X, z, sp, q)
        return float(neg2_loglik(w, gram_rss(w)))

    trials = {float(q): f(float(q)) for q in np.geomspace(Q_MIN, q_max, grid)}
    for _ in range(2):
        qs = np.array(sorted(trials))
        vals = np.array([trials[q] for q in qs])
        i = int(np.argmin(vals))
        if not 0 < i < len(qs) - 1:
            break
        x = np.log(qs[i - 1:i + 2])
        a, b_, _ = np.polyfit(x, vals[i - 1:i + 2], 2)
        if a <= 0:
            break
        qv = float(np.exp(np.clip(-b_ / (2 * a), x[0], x[2])))
        if qv in trials:
            break
        trials[qv] = f(qv)
    static = f(0.0)
    best_q = min(trials, key=trials.get)
    best = trials[best_q]
    evaluated = tuple(sorted(trials.items())) + ((0.0, static),)
    if static <= best:
        best_q, best = 0.0, static
    return LevelFit(q=best_q, neg2ll=best, neg2ll_static=static, evaluated=evaluated)


def smooth_level(r: np.ndarray, sp: Spacing, q: float) -> np.ndarray:
    """The level's smoothed mean given the residual kW r = z - X b: the minimiser of
    sum (r_t - mu_t)^2 / v_t + sum (mu_t - mu_{t-1})^2 h0 / (q dt_t) (Durbin & Koopman 2012,
    sec. 2.4; the Kalman smoother's mean for a diffuse start). q = 0: the weighted mean."""
    iv = 1.0 / sp.v
    if q <= 0.0 or len(r) < 2:
        return np.full(len(r), float(np.sum(iv * r) / np.sum(iv)))
    w = sp.h0 / (q * sp.dt)
    diag = iv.copy()
    diag[:-1] += w
    diag[1:] += w
    upper = np.concatenate([[0.0], -w])
    return solveh_banded(np.vstack([upper, diag]), iv * r, check_finite=False)
