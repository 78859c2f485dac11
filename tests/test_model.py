"""Tests for disagg.fit.solvers: the solver and covariance against statsmodels, scipy and NIST StRD.

Digits are compared as the log relative error LRE = -log10(|x - c| / |c|), the measure NIST
uses for its certified values.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import nnls
from statsmodels.datasets import longley
from statsmodels.stats import sandwich_covariance as sw

from disagg.fit.solvers import (block_sums, collinearity, fit_model, fit_quality, hac_meat,
                          solve_regularized)

# --- Outside check values --------------------------------------------------------------------
# NIST StRD linear regression, "Longley" (docs/references.md section 1) [read, via copies of the
# NIST file]; y = TOTEMP, x1..x6 = GNPDEFL, GNP, UNEMP, ARMED, POP, YEAR, constant first.
LONGLEY_B = np.array([-3482258.63459582, 15.0618722713733, -0.0358191792925910,
                      -2.02022980381683, -1.03322686717359, -0.0511041056535807,
                      1829.15146461355])
LONGLEY_SD = np.array([890420.383607373, 84.9149257747669, 0.0334910077722432,
                       0.488399681651699, 0.214274163161675, 0.226073200069370,
                       455.478499142212])
LONGLEY_RESID_SD = 304.854073561965
LONGLEY_R2 = 0.995479004577296
# NIST prints 15 significant digits; Longley is ill-conditioned (cond(X) ~ 5e9), so an SVD
# solver keeps about 10-13 of them (docs/references.md: statsmodels reaches 10.9-13). We ask 10.
LONGLEY_MIN_LRE = 10.0

# NIST StRD "Norris" (docs/references.md section 1) [read]; data as printed there.
NORRIS_X = np.array([
    0.2, 337.4, 118.2, 884.6, 10.1, 226.5, 666.3, 996.3, 448.6, 777.0, 558.2, 0.4, 0.6, 775.5,
    666.9, 338.0, 447.5, 11.6, 556.0, 228.1, 995.8, 887.6, 120.2, 0.3, 0.3, 556.8, 339.1,
    887.2, 999.0, 779.0, 11.1, 118.3, 229.2, 669.1, 448.9, 0.5])
NORRIS_Y = np.array([
    0.1, 338.8, 118.1, 888.0, 9.2, 228.1, 668.5, 998.5, 449.1, 778.9, 559.2, 0.3, 0.1, 778.1,
    668.8, 339.3, 448.9, 10.8, 557.7, 228.3, 998.0, 888.8, 119.6, 0.3, 0.6, 557.6, 339.3,
    888.0, 998.5, 778.9, 10.2, 117.6, 228.9, 668.4, 449.2, 0.2])
NORRIS_B = np.array([-0.262323073774029, 1.00211681802045])
NORRIS_SD = np.array([0.232818234301152, 0.000429796848199937])
NORRIS_RESID_SD = 0.884796396144373
NORRIS_R2 = 0.999993745883712
# Norris is well conditioned ("lower difficulty"): ask 11 of the 15 printed digits.
NORRIS_MIN_LRE = 11.0

# Newey-West standard errors of Norris (constant first), Bartlett lag L = 1, without the
# n/(n-k) small-sample correction (docs/references.md section 2) [ran, statsmodels 0.15.0], printed
# to 15 significant digits; asked to 10 (sandwich of a cond ~ 2e3 problem loses a few).
NORRIS_HAC1_SE = np.array([0.165356005563330, 0.000552180455394664])
NORRIS_HAC_MIN_LRE = 10.0

# Longley heteroskedasticity-robust (HC0 = HAC with L = 0) standard errors as printed by SAS,
# quoted in statsmodels' tests (docs/references.md section 2), printed to 5-8 significant digits.
# Tolerance: one unit in the last printed place (not half: statsmodels' B4 is 0.1462450, on a
# rounding boundary) plus 2e-7 relative, because fit_model inverts X'X, whose condition after
# column scaling is 1.9e9: about 7 digits survive (measured 6e-8 relative to statsmodels'
# SVD-based value, which matters for B6's 8 printed digits).
LONGLEY_HC0_SAS = np.array([832212, 51.22035, 0.02458, 0.38324, 0.14625, 0.15821, 428.38438])
LONGLEY_HC0_SAS_ULP = np.array([1, 1e-5, 1e-5, 1e-5, 1e-5, 1e-5, 1e-5])
LONGLEY_HC0_REL = 2e-7


def lre(x: np.ndarray, certified: np.ndarray) -> np.ndarray:
    """Log relative error: the number of correct significant digits."""
    with np.errstate(divide="ignore"):
        return -np.log10(np.abs(x - certified) / np.abs(certified))


def no_prior(p: int):
    """prior_mean, penalty, lower for a plain least-squares solve."""
    return np.zeros(p), np.zeros(p), np.full(p, -np.inf)


def longley_xy() -> tuple[np.ndarray, np.ndarray]:
    data = longley.load_pandas()
    assert list(data.exog.columns) == ["GNPDEFL", "GNP", "UNEMP", "ARMED", "POP", "YEAR"]
    X = np.column_stack([np.ones(len(data.endog)), data.exog.to_numpy(float)])
    return X, data.endog.to_numpy(float)


def norris_xy() -> tuple[np.ndarray, np.ndarray]:
    return np.column_stack([np.ones_like(NORRIS_X), NORRIS_X]), NORRIS_Y


def classical_sd(X: np.ndarray, resid: np.ndarray) -> np.ndarray:
    """OLS standard errors s^2 (X'X)^-1 with s^2 = RSS / (n - p), (X'X)^-1 = R^-1 R^-T."""
    n, p = X.shape
    r = np.linalg.qr(X, mode="r")
    r_inv = np.linalg.inv(r)
    return np.sqrt(np.sum(resid**2) / (n - p) * np.sum(r_inv**2, axis=1))


def generated(seed: int, n: int = 240, ar: float = 0.6):
    """A design like the project's: baseload hours plus three equipment-hour columns, with
    AR(1) errors so that HAC and plain standard errors differ."""
    rng = np.random.default_rng(seed)
    X = np.column_stack([np.full(n, 0.25), rng.uniform(0, 0.25, (n, 3))])
    e = np.empty(n)
    e[0] = rng.normal()
    for t in range(1, n):
        e[t] = ar * e[t - 1] + rng.normal()
    y = X @ np.array([40.0, 20.0, 60.0, 5.0]) + 0.5 * e
    return X, y


# --- Plain least squares against statsmodels OLS and NIST StRD -------------------------------

@pytest.mark.parametrize("seed", [0, 1, 2])
def test_unpenalized_solve_matches_statsmodels_ols(seed):
    X, y = generated(seed)
    b = solve_regularized(X, y, *no_prior(X.shape[1]))
    ref = sm.OLS(y, X).fit().params
    # cond(X) ~ 10 here: agreement to ~1e-13 is expected; 1e-10 leaves room for BLAS order.
    np.testing.assert_allclose(b, ref, rtol=1e-10)


@pytest.mark.parametrize("lag", [0, 1, 4, 12])
def test_fit_model_without_prior_gives_statsmodels_hac(lag):
    X, y = generated(7)
    p = X.shape[1]
    fit = fit_model(X, y, np.zeros(p), np.full(p, np.inf), np.full(p, -np.inf),
                    block=None, lag=lag)
    ref = sm.OLS(y, X).fit(cov_type="HAC", cov_kwds={"maxlags": lag})
    # No prior: P = 0, so A^-1 (S + sigma^2 P) A^-1 is the plain sandwich (X'X)^-1 S (X'X)^-1
    # that statsmodels computes (use_correction is off by default through fit). Both compute
    # the same sums in float64 on a cond ~ 10 design: 1e-9 relative.
    np.testing.assert_allclose(fit.coef, ref.params, rtol=1e-10)
    np.testing.assert_allclose(fit.cov, ref.cov_params(), rtol=1e-9)
    np.testing.assert_allclose(fit.se, ref.bse, rtol=1e-9)
    assert fit.lag == lag
    assert np.all(fit.prior_weight == 0.0)


@pytest.mark.parametrize("lag", [0, 1, 2, 5, 39, 45])
def test_hac_meat_equals_statsmodels_s_hac_simple(lag):
    rng = np.random.default_rng(lag)
    scores = rng.normal(size=(40, 3)) * np.array([1.0, 10.0, 0.1])
    # Lags 39 and 45 reach the end of the 40 rows: the missing products count as zero.
    np.testing.assert_allclose(hac_meat(scores, lag), sw.S_hac_simple(scores, nlags=lag),
                               rtol=1e-12, atol=1e-12)


def test_longley_matches_nist_certified_values():
    X, y = longley_xy()
    b = solve_regularized(X, y, *no_prior(X.shape[1]))
    digits = lre(b, LONGLEY_B)
    assert digits.min() >= LONGLEY_MIN_LRE, digits
    resid = y - X @ b
    n, p = X.shape
    assert lre(np.sqrt(resid @ resid / (n - p)), LONGLEY_RESID_SD) >= LONGLEY_MIN_LRE
    r2 = 1.0 - resid @ resid / np.sum((y - y.mean()) ** 2)
    assert lre(r2, LONGLEY_R2) >= LONGLEY_MIN_LRE
    # The certified standard deviations need (X'X)^-1 as well, formed here as R^-1 R^-T from
    # the QR of X (backward stable; measured 12.3 digits): the solver's residuals decide them.
    assert lre(classical_sd(X, resid), LONGLEY_SD).min() >= LONGLEY_MIN_LRE


def test_longley_fit_model_residual_variance_and_edf():
    # fit_model's own residual variance is RSS / (n - edf); with no prior edf must be p = 7
    # even though X'X has condition ~2e19 (a rank cut-off on unscaled X'X gave edf = 6).
    X, y = longley_xy()
    p = X.shape[1]
    fit = fit_model(X, y, np.zeros(p), np.full(p, np.inf), np.full(p, -np.inf), lag=0)
    assert fit.edf == pytest.approx(7.0, abs=1e-6)
    assert lre(np.sqrt(fit.sigma2), LONGLEY_RESID_SD) >= 7.0


def test_norris_matches_nist_certified_values():
    X, y = norris_xy()
    b = solve_regularized(X, y, *no_prior(2))
    assert lre(b, NORRIS_B).min() >= NORRIS_MIN_LRE
    resid = y - X @ b
    assert lre(np.sqrt(resid @ resid / (len(y) - 2)), NORRIS_RESID_SD) >= NORRIS_MIN_LRE
    r2 = 1.0 - resid @ resid / np.sum((y - y.mean()) ** 2)
    assert lre(r2, NORRIS_R2) >= NORRIS_MIN_LRE
    assert lre(classical_sd(X, resid), NORRIS_SD).min() >= NORRIS_MIN_LRE


def test_norris_hac_lag1_matches_statsmodels_check_values():
    X, y = norris_xy()
    fit = fit_model(X, y, np.zeros(2), np.full(2, np.inf), np.full(2, -np.inf),
                    block=None, lag=1)
    assert lre(fit.se, NORRIS_HAC1_SE).min() >= NORRIS_HAC_MIN_LRE


def test_longley_hc0_matches_sas():
    X, y = longley_xy()
    p = X.shape[1]
    fit = fit_model(X, y, np.zeros(p), np.full(p, np.inf), np.full(p, -np.inf),
                    block=None, lag=0)
    tol = LONGLEY_HC0_SAS_ULP + LONGLEY_HC0_REL * LONGLEY_HC0_SAS
    np.testing.assert_array_less(np.abs(fit.se - LONGLEY_HC0_SAS), tol)
    # And statsmodels' HC0 on the same data, to the ~7 digits a sandwich of Longley keeps.
    ref = sm.OLS(y, X).fit(cov_type="HC0").bse
    assert lre(fit.se, ref).min() >= 6.5


# --- Blocked (cluster-robust) covariance -----------------------------------------------------

def _grouped(seed: int = 3):
    rng = np.random.default_rng(seed)
    sizes = rng.integers(5, 15, size=14)           # 14 blocks of unequal length
    groups = np.repeat(np.arange(len(sizes)), sizes)
    n = len(groups)
    X = np.column_stack([np.ones(n), rng.uniform(0, 1, (n, 2))])
    day_effect = rng.normal(size=len(sizes))[groups]  # errors correlated within a block
    y = X @ np.array([1.0, 2.0, 3.0]) + day_effect + rng.normal(size=n)
    return X, y, groups


def test_block_sums_meat_equals_statsmodels_cluster_meat():
    X, y, groups = _grouped()
    res = sm.OLS(y, X).fit()
    xu = X * res.resid[:, None]
    sums = block_sums(xu, groups)
    assert sums.shape == (len(np.unique(groups)), X.shape[1])
    np.testing.assert_allclose(hac_meat(sums, 0), sw.S_crosssection(xu, groups), rtol=1e-12)


def test_fit_model_blocked_is_cluster_robust_times_g_over_g_minus_1():
    # fit_model multiplies the blocked meat by G/(G-1) (G blocks) and nothing else, so with
    # lag 0 and no prior its covariance is statsmodels' cov_cluster(use_correction=False)
    # times G/(G-1); statsmodels' use_correction=True multiplies by G/(G-1) (n-1)/(n-k),
    # so fit_model = cov_cluster(use_correction=True) x (n-k)/(n-1).
    X, y, groups = _grouped()
    n, k = X.shape
    g = len(np.unique(groups))
    res = sm.OLS(y, X).fit()
    fit = fit_model(X, y, np.zeros(k), np.full(k, np.inf), np.full(k, -np.inf),
                    block=groups, lag=0)
    assert fit.n_blocks == g
    plain = sw.cov_cluster(res, groups, use_correction=False)
    corrected = sw.cov_cluster(res, groups, use_correction=True)
    np.testing.assert_allclose(fit.cov, plain * g / (g - 1.0), rtol=1e-10)
    np.testing.assert_allclose(fit.cov, corrected * (n - k) / (n - 1.0), rtol=1e-10)


# --- Ridge toward a prior and non-negative bounds --------------------------------------------

def test_ridge_matches_closed_form():
    # Hoerl & Kennard (1970), Technometrics 12(1): b = (X'X + P)^-1 (X'y + P mu), here with
    # the penalty centred on a prior mean mu rather than 0.
    X, y = generated(11, n=60)
    p = X.shape[1]
    mu = np.array([35.0, 25.0, 50.0, 8.0])
    pen = np.array([0.0, 2.0, 0.5, 10.0])
    b = solve_regularized(X, y, mu, pen, np.full(p, -np.inf))
    P = np.diag(pen)
    closed = np.linalg.solve(X.T @ X + P, X.T @ y + P @ mu)
    # bvls is run with tol 1e-12 on a cond ~ 10 system: agreement to 1e-9 relative.
    np.testing.assert_allclose(b, closed, rtol=1e-9)
    # The penalty pulls each draw toward its prior compared with plain least squares.
    ols = solve_regularized(X, y, *no_prior(p))
    assert np.all(np.abs(b - mu)[pen > 0] <= np.abs(ols - mu)[pen > 0])


def test_nonnegative_bound_zeroes_a_negative_coefficient_like_nnls():
    rng = np.random.default_rng(5)
    n = 80
    X = rng.uniform(0, 0.25, (n, 3))
    y = X @ np.array([30.0, -12.0, 18.0]) + 0.05 * rng.normal(size=n)
    unconstrained = solve_regularized(X, y, *no_prior(3))
    assert unconstrained[1] < 0
    b = solve_regularized(X, y, np.zeros(3), np.zeros(3), np.zeros(3))
    ref, _ = nnls(X, y)
    assert b[1] == 0.0
    assert np.all(b >= 0.0)
    # Both are exact active-set solutions of the same problem: agree to 1e-9 relative.
    np.testing.assert_allclose(b, ref, rtol=1e-9, atol=1e-10)


# --- ASHRAE Guideline 14 fit quality ---------------------------------------------------------

def test_fit_quality_hand_computed():
    y = np.array([10.0, 12.0, 9.0, 11.0, 13.0])
    fitted = np.array([9.5, 12.5, 9.0, 10.0, 12.0])
    # residuals y - yhat = 0.5, -0.5, 0, 1, 1: sum 2, sum of squares 2.5; n = 5, p = 2,
    # n - p = 3; ybar = 55 / 5 = 11; total sum of squares 1 + 1 + 4 + 0 + 4 = 10.
    # CV(RMSE) = 100 sqrt(2.5 / 3) / 11 = 100 x 0.91287093 / 11 = 8.298827 %
    # NMBE = 100 x 2 / (3 x 11) = 6.060606 %;  R^2 = 1 - 2.5 / 10 = 0.75
    q = fit_quality(y, fitted, n_params=2)
    assert q["cv_rmse_pct"] == pytest.approx(100.0 * np.sqrt(2.5 / 3.0) / 11.0, rel=1e-12)
    assert q["cv_rmse_pct"] == pytest.approx(8.298827, abs=5e-7)  # 6 decimals written above
    assert q["nmbe_pct"] == pytest.approx(200.0 / 33.0, rel=1e-12)
    assert q["nmbe_pct"] == pytest.approx(6.060606, abs=5e-7)
    assert q["r2"] == pytest.approx(0.75, rel=1e-12)
    assert (q["n"], q["p"]) == (5, 2.0)


# --- Collinearity diagnostics ----------------------------------------------------------------

def test_collinearity_identical_columns_and_column_equal_to_baseload():
    rng = np.random.default_rng(2)
    n = 200
    a = rng.uniform(0, 0.25, n)
    other = rng.uniform(0, 0.25, n)
    always_on = np.full(n, 0.25)                    # runs every minute: same as baseload
    H = np.column_stack([a, a, other, always_on])
    B = np.full((n, 1), 0.25)                      # constant baseload: interval hours
    d = collinearity(H, B)
    assert d["corr"][0, 1] == pytest.approx(1.0, abs=1e-12)
    assert abs(d["corr"][0, 2]) < 0.3
    assert d["vif"][0] > 1e8 and d["vif"][1] > 1e8
    assert d["r2_base"][3] == 1.0
    assert d["vif"][2] < 2.0
    assert d["r2_base"][0] < 0.1


# --- Invariants ------------------------------------------------------------------------------

@settings(max_examples=40, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(6, 40), p=st.integers(1, 4),
       bounded=st.booleans())
def test_duplicating_every_row_keeps_coefficients(seed, n, p, bounded):
    rng = np.random.default_rng(seed)
    X = rng.uniform(0, 1, (n, p))
    y = X @ rng.normal(0, 5, p) + rng.normal(0, 1, n)
    lower = np.zeros(p) if bounded else np.full(p, -np.inf)
    b1 = solve_regularized(X, y, np.zeros(p), np.zeros(p), lower)
    b2 = solve_regularized(np.vstack([X, X]), np.concatenate([y, y]), np.zeros(p),
                           np.zeros(p), lower)
    scale = max(1.0, float(np.max(np.abs(b1))))
    np.testing.assert_allclose(b2, b1, rtol=1e-8, atol=1e-8 * scale)
