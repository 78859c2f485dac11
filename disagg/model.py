"""Regularized least squares with non-negative draws and autocorrelation-robust covariance.

Pure functions on arrays. The model for interval t is

    energy_kwh[t] = sum_j draw_kw[j] * run_h[t, j] + sum_m base_kw[m] * base_h[t, m] + u[t]

fitted by least squares with a Tikhonov (ridge) penalty pulling each draw toward the
engineer's prior, and bounds keeping every kW non-negative.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg
from scipy.special import ndtri, stdtrit


def newey_west_lag(n_obs: int) -> int:
    """Newey & West (1994) rule of thumb for the Bartlett lag: floor(4 (n/100)^(2/9)).

    References:
        Newey, W. K. & West, K. D. (1994). Automatic lag selection in covariance matrix
        estimation. Review of Economic Studies 61(4), 631-653. The same rule is statsmodels'
        default in ``sandwich_covariance.S_hac_simple``.
    """
    return int(np.floor(4.0 * (n_obs / 100.0) ** (2.0 / 9.0)))


def hac_meat(scores: np.ndarray, lag: int) -> np.ndarray:
    """Newey-West middle matrix S = G0 + sum_{l=1..L} w_l (G_l + G_l') with Bartlett weights.

    Written out rather than imported because statsmodels' sandwich module costs about a
    second to import; tests check it against ``statsmodels`` ``S_hac_simple``.

    Args:
        scores: (n, k) rows x_t * u_t, in time order, equally spaced.
        lag: L >= 0; weights w_l = 1 - l / (L + 1).

    Returns:
        (k, k) matrix, without any 1/n factor.

    References:
        Newey, W. K. & West, K. D. (1987). A simple, positive semi-definite,
        heteroskedasticity and autocorrelation consistent covariance matrix.
        Econometrica 55(3), 703-708, Eq. (2).
    """
    s = scores.T @ scores
    for lag_l in range(1, min(lag, len(scores) - 1) + 1):
        g = scores[lag_l:].T @ scores[:-lag_l]
        s += (1.0 - lag_l / (lag + 1.0)) * (g + g.T)
    return s


def block_sums(scores: np.ndarray, block: np.ndarray) -> np.ndarray:
    """Sum score rows within consecutive blocks (e.g. local days).

    Args:
        scores: (n, k).
        block: (n,) non-decreasing integer block labels.

    Returns:
        (n_blocks, k) sums in block order.
    """
    _, first = np.unique(block, return_index=True)
    return np.add.reduceat(scores, np.sort(first), axis=0)


def solve_regularized(X: np.ndarray, y: np.ndarray, prior_mean: np.ndarray,
                      penalty: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """argmin ||y - X b||^2 + sum_j penalty_j (b_j - prior_mean_j)^2 subject to b >= lower.

    Args:
        X: (n, p) design; y: (n,) target.
        prior_mean: (p,) centre of the penalty; penalty: (p,) weights >= 0 (0 = none).
        lower: (p,) lower bounds (-inf = none).

    Returns:
        (p,) coefficients. Without penalty and bounds this is the SVD least-squares solution
        (numpy ``lstsq``), which keeps about 10+ digits on the ill-conditioned NIST Longley
        problem; otherwise the exact bounded solution of the augmented system by
        bounded-variable least squares (scipy ``lsq_linear``, method ``bvls``).

    References:
        Hoerl, A. E. & Kennard, R. W. (1970). Ridge regression. Technometrics 12(1), 55-67.
        Stark, P. B. & Parker, R. L. (1995). Bounded-variable least-squares. Computational
        Statistics 10(2), 129-141.
    """
    rows = penalty > 0
    if not rows.any() and not np.isfinite(lower).any():
        return np.linalg.lstsq(X, y, rcond=None)[0]
    if X.shape[0] > 2 * X.shape[1]:
        # ||y - Xb||^2 = ||Q'y - Rb||^2 + const for X = QR: solve the small system instead.
        q, r = np.linalg.qr(X, mode="reduced")
        X, y = r, q.T @ y
    root = np.sqrt(penalty[rows])
    aug_X = np.vstack([X, np.diag(np.sqrt(penalty))[rows]])
    aug_y = np.concatenate([y, root * prior_mean[rows]])
    # Scale columns so the solver's tolerances mean the same for kW and for hours.
    norm = np.linalg.norm(aug_X, axis=0)
    norm[norm == 0] = 1.0
    from scipy.optimize import lsq_linear  # ~0.3 s import, only needed here

    res = lsq_linear(aug_X / norm, aug_y, bounds=(lower * norm, np.full(len(lower), np.inf)),
                     method="bvls", tol=1e-12)
    b = res.x / norm
    return np.maximum(b, lower)


@dataclass
class Fit:
    """A fitted model and its covariance.

    coef: (p,) [kW]; cov: (p, p) [kW^2]; residual: (n,) [kWh]; sigma2: residual variance
    per interval [kWh^2]; prior_weight: (p,) share of each estimate decided by its prior
    (0 = data only, 1 = prior only); edf: effective number of parameters; lag: Bartlett lag
    in blocks; n_blocks: number of blocks in the covariance.
    """

    coef: np.ndarray
    cov: np.ndarray
    residual: np.ndarray
    sigma2: float
    prior_weight: np.ndarray
    edf: float
    lag: int
    n_blocks: int
    penalty: np.ndarray

    @property
    def se(self) -> np.ndarray:
        return np.sqrt(np.maximum(np.diag(self.cov), 0.0))


def fit_model(X: np.ndarray, y: np.ndarray, prior_mean: np.ndarray, prior_sd: np.ndarray,
              lower: np.ndarray, block: np.ndarray | None = None,
              lag: int | None = None, penalty: np.ndarray | None = None) -> Fit:
    """Ridge-toward-prior fit with non-negative bounds and a HAC sandwich covariance.

    The penalty of draw j is sigma^2 / prior_sd_j^2, so that the fit is the posterior mode
    of a Gaussian prior N(prior_mean, prior_sd^2) with noise variance sigma^2 per interval
    (sigma^2 re-estimated from the residuals, two passes). prior_sd = inf means no prior.

    Covariance: V = A^-1 (S + sigma^2 P) A^-1 with A = X'X + P, P = diag(penalty) and S the
    Newey-West matrix of the scores x_t u_t summed within blocks (local days when given),
    Bartlett lag by the Newey-West (1994) rule over the number of blocks, times G/(G-1) for
    G blocks. With P = 0 this is the usual HAC sandwich; with S = sigma^2 X'X (independent
    errors) it is the Gaussian posterior covariance sigma^2 A^-1.

    Args:
        X: (n, p) design [h]; y: (n,) energy [kWh].
        prior_mean, prior_sd: (p,) [kW]; lower: (p,) bounds [kW].
        block: (n,) non-decreasing block labels; None = every row its own block.
        lag: Bartlett lag in blocks; None = Newey-West (1994) rule.
        penalty: (p,) fixed penalty weights instead of the sigma^2 / sd^2 rule (refits).

    References:
        Newey & West (1987), Econometrica 55(3), Eq. (2); Hoerl & Kennard (1970),
        Technometrics 12(1); Cameron, A. C. & Miller, D. L. (2015), A practitioner's guide to
        cluster-robust inference, J. Human Resources 50(2) (G/(G-1) factor; from memory).
    """
    n, p = X.shape
    prec = np.where(np.isfinite(prior_sd) & (prior_sd > 0), 1.0 / np.square(prior_sd), 0.0)
    mean = np.where(prec > 0, prior_mean, 0.0)
    if penalty is None:
        q, r = np.linalg.qr(X, mode="reduced")
        b0, _, rank, _ = np.linalg.lstsq(r, q.T @ y, rcond=None)
        sigma2 = float(np.sum((y - X @ b0) ** 2) / max(n - rank, 1))
        for _ in range(2):
            pen = sigma2 * prec
            b = solve_regularized(X, y, mean, pen, lower)
            edf = _edf(X, pen)
            sigma2 = float(np.sum((y - X @ b) ** 2) / max(n - edf, 1.0))
        pen = sigma2 * prec
    else:
        pen = penalty
    b = solve_regularized(X, y, mean, pen, lower)
    u = y - X @ b
    edf = _edf(X, pen)
    sigma2 = float(np.sum(u**2) / max(n - edf, 1.0))
    xtx = X.T @ X
    A = xtx + np.diag(pen)
    A_inv = _pinv_scaled(A)
    scores = X * u[:, None]
    if block is not None:
        scores = block_sums(scores, block)
    g = len(scores)
    L = newey_west_lag(g) if lag is None else lag
    S = hac_meat(scores, L)
    if block is not None and g > 1:
        S *= g / (g - 1.0)
    cov = A_inv @ (S + sigma2 * np.diag(pen)) @ A_inv
    prior_weight = np.clip(np.diag(A_inv @ np.diag(pen)), 0.0, 1.0)
    return Fit(b, cov, u, sigma2, prior_weight, edf, L, g, pen)


def _pinv_scaled(A: np.ndarray) -> np.ndarray:
    """Pseudo-inverse of a symmetric positive semi-definite matrix, computed on D A D with
    D = diag(A)^-1/2 so that the rank cut-off does not depend on the columns' units: a plain
    ``pinvh`` of Longley's X'X (condition 2e19) drops a direction that is only badly scaled.
    A zero column stays a zero row and column."""
    d = np.diag(A)
    s = np.where(d > 0, 1.0 / np.sqrt(np.where(d > 0, d, 1.0)), 1.0)
    return s[:, None] * linalg.pinvh(s[:, None] * A * s[None, :]) * s[None, :]


def _edf(X: np.ndarray, pen: np.ndarray) -> float:
    """Effective number of parameters trace((X'X + P)^-1 X'X)."""
    xtx = X.T @ X
    return float(np.trace(_pinv_scaled(xtx + np.diag(pen)) @ xtx))


def quantile(confidence: float, df: float | None = None) -> float:
    """Two-sided critical value: normal, or Student t with df degrees of freedom."""
    a = 0.5 + confidence / 2.0
    return float(ndtri(a) if df is None or not np.isfinite(df) else stdtrit(df, a))


def jackknife_cov(X: np.ndarray, y: np.ndarray, prior_mean: np.ndarray, penalty: np.ndarray,
                  lower: np.ndarray, groups: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Delete-a-block jackknife covariance over contiguous time blocks.

    Each block is left out in turn and the model refitted with the same penalty;
    V_J = (K-1)/K sum_k (b_(-k) - mean)(b_(-k) - mean)'.

    Args:
        groups: (n,) block label of each row, K distinct labels.

    Returns:
        (cov (p, p), leave-one-out estimates (K, p)).

    References:
        Kunsch, H. R. (1989). The jackknife and the bootstrap for general stationary
        observations. Annals of Statistics 17(3), 1217-1241.
    """
    labels = np.unique(groups)
    prec_mean = np.where(penalty > 0, prior_mean, 0.0)
    est = np.array([solve_regularized(X[groups != g], y[groups != g], prec_mean, penalty, lower)
                    for g in labels])
    k = len(labels)
    d = est - est.mean(axis=0)
    return (k - 1.0) / k * d.T @ d, est


def collinearity(H: np.ndarray, B: np.ndarray) -> dict[str, np.ndarray]:
    """How well each equipment column can be told apart from the others and from baseload.

    Args:
        H: (n, k) equipment-hours; B: (n, m) baseload columns (their span holds a constant).

    Returns:
        corr: (k, k) correlation of the hours (0 where a column is constant);
        r2_base: (k,) R^2 of each column regressed on the baseload columns;
        r2_all: (k,) R^2 of each column on the baseload and all other equipment columns;
        vif: (k,) variance inflation factor 1 / (1 - r2_all).

    References:
        Belsley, D. A., Kuh, E. & Welsch, R. E. (1980). Regression Diagnostics. Wiley, ch. 3.
    """
    n, k = H.shape
    m = B.shape[1]
    sd = H.std(axis=0)
    Hc = H - H.mean(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = (Hc.T @ Hc) / n / np.outer(sd, sd)
    corr = np.nan_to_num(corr, nan=0.0)
    np.fill_diagonal(corr, 1.0)
    # Every regression below is read off one Gram matrix of [B, H]: these are diagnostics,
    # so the normal equations' lost digits do not matter, and the tall matrix is read once.
    Z = np.column_stack([B, H])
    G = Z.T @ Z
    tss = n * sd**2
    r2_base = np.array([_r2_gram(G, list(range(m)), m + j, tss[j]) for j in range(k)])
    r2_all = np.array([_r2_gram(G, [i for i in range(m + k) if i != m + j], m + j, tss[j])
                       for j in range(k)])
    with np.errstate(divide="ignore"):
        vif = np.where(r2_all < 1.0, 1.0 / (1.0 - r2_all), np.inf)
    return {"corr": corr, "r2_base": r2_base, "r2_all": r2_all, "vif": vif}


def _r2_gram(G: np.ndarray, cols: list[int], j: int, tss: float) -> float:
    """Centred R^2 of column j on columns cols (whose span holds a constant), from the Gram
    matrix G; 1 when column j is constant."""
    if tss <= 1e-12 * max(G[j, j], 1e-300):
        return 1.0
    sub = G[np.ix_(cols, cols)]
    coef = np.linalg.lstsq(sub, G[cols, j], rcond=None)[0]
    rss = G[j, j] - G[j, cols] @ coef
    return float(min(1.0, max(0.0, 1.0 - rss / tss)))


def fit_quality(y: np.ndarray, fitted: np.ndarray, n_params: float) -> dict[str, float]:
    """CV(RMSE) and NMBE as ASHRAE Guideline 14 defines them, and R^2.

    CV(RMSE) = 100 sqrt(sum (y - yhat)^2 / (n - p)) / ybar;
    NMBE = 100 sum (y - yhat) / ((n - p) ybar). This uses the n - p form, p = number of
    fitted parameters.

    References:
        ASHRAE Guideline 14-2014, Measurement of Energy, Demand, and Water Savings,
        Annex B (formulas quoted from memory via secondary sources).
    """
    n = len(y)
    dof = max(n - n_params, 1.0)
    ybar = float(np.mean(y))
    resid = y - fitted
    tss = float(np.sum((y - ybar) ** 2))
    return {
        "cv_rmse_pct": float(100.0 * np.sqrt(np.sum(resid**2) / dof) / ybar) if ybar else float("nan"),
        "nmbe_pct": float(100.0 * np.sum(resid) / (dof * ybar)) if ybar else float("nan"),
        "r2": float(1.0 - np.sum(resid**2) / tss) if tss > 0 else float("nan"),
        "n": n,
        "p": float(n_params),
    }
