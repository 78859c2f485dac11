"""The fast paths of the fit and the readers give what the plain computations give.

Each speed-up (issue 5, bench/portfolio.py) replaced a computation by an equivalent cheaper
one; these tests hold each against the plain one or against scipy:
- critical values: closed forms + Newton vs scipy.special (outside check);
- the active-set bounded solve vs scipy's bounded-variable least squares (outside check);
- the tall-skinny QR compression and the indicator-column (hour-of-week) algebra vs the same
  fit on the dense design;
- the per-day projection vs one least-squares solve per day;
- the fixed-format reading of times with UTC offsets vs polars' general parser;
- fits of a month on the shared whole-frame cache vs a fit with no cache.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import polars as pl
import pytest
from scipy.optimize import lsq_linear
from synthetic import make_building

from disagg.fit.align import Aligned
from disagg.fit.estimate import _project_out_days, estimate_draws
from disagg.fit.solvers import (
    Indicators,
    _factor_levels,
    chi2_upper_quantile,
    compress,
    fit_model,
    quantile,
    solve_regularized,
)
from disagg.inputs.readers.tables import _parse_offset_times

# Printed statistical tables, three decimals (from memory; any t / chi-square table, e.g.
# NIST/SEMATECH e-Handbook 1.3.6.7.2 and 1.3.6.7.4): two-sided 95 % t for 9 and 29 degrees of
# freedom, 99 % t for 9, the normal 1.960, and the upper 5 % point of chi-square(9).
T_975_DF9, T_975_DF29, T_995_DF9, Z_975, CHI2_95_DF9 = 2.262, 2.045, 3.250, 1.960, 16.919
TABLE_TOL = 0.0005  # half a unit in the tables' last printed digit


def test_printed_table_values_agree_with_scipy():
    # The table values above are from memory: scipy.stats' quantile functions check them.
    from scipy.stats import chi2, norm, t

    assert t.ppf(0.975, 9) == pytest.approx(T_975_DF9, abs=TABLE_TOL)
    assert t.ppf(0.975, 29) == pytest.approx(T_975_DF29, abs=TABLE_TOL)
    assert t.ppf(0.995, 9) == pytest.approx(T_995_DF9, abs=TABLE_TOL)
    assert norm.ppf(0.975) == pytest.approx(Z_975, abs=TABLE_TOL)
    assert chi2.ppf(0.95, 9) == pytest.approx(CHI2_95_DF9, abs=TABLE_TOL)


def test_critical_values_match_printed_tables():
    assert quantile(0.95, 9) == pytest.approx(T_975_DF9, abs=TABLE_TOL)
    assert quantile(0.95, 29) == pytest.approx(T_975_DF29, abs=TABLE_TOL)
    assert quantile(0.99, 9) == pytest.approx(T_995_DF9, abs=TABLE_TOL)
    assert quantile(0.95) == pytest.approx(Z_975, abs=TABLE_TOL)
    assert chi2_upper_quantile(9, 0.05) == pytest.approx(CHI2_95_DF9, abs=TABLE_TOL)


@pytest.mark.parametrize("seed, runs, rows, cols, tol, min_active", [
    # Narrow designs: the compressed (QR) solve. With a penalty on every column the problem
    # is strictly convex: one minimiser, which both solvers find up to rounding (cond <= ~1e3
    # here: 1e-9 relative).
    (3, 300, (8, 80), (1, 10), 1e-9, 51),
    # From 60 columns the solve goes through the normal equations (solvers._solve_normal):
    # the same minimiser as bvls on the augmented system.
    (5, 20, (200, 400), (60, 120), 1e-7, 10),
])
def test_bounded_solve_matches_scipy_bvls(seed, runs, rows, cols, tol, min_active):
    rng = np.random.default_rng(seed)
    active = 0
    for _ in range(runs):
        n, p = int(rng.integers(*rows)), int(rng.integers(*cols))
        X = rng.normal(size=(n, p)) * rng.uniform(0.2, 5.0, p)
        y = X @ rng.normal(0, 3, p) + rng.normal(size=n)
        pen = rng.uniform(0.01, 2.0, p)
        mu = rng.normal(0, 2, p)
        lower = np.where(rng.random(p) < 0.7, rng.normal(0, 0.5, p), -np.inf)
        b = solve_regularized(X, y, mu, pen, lower)
        A = np.vstack([X, np.diag(np.sqrt(pen))])
        ref = lsq_linear(A, np.concatenate([y, np.sqrt(pen) * mu]), bounds=(lower, np.inf),
                         method="bvls", tol=1e-12).x
        np.testing.assert_allclose(b, np.maximum(ref, lower), rtol=tol, atol=tol)
        active += int(np.any(np.isclose(b, lower)))
    assert active >= min_active  # the bounds mattered in many of them


def test_compress_keeps_the_least_squares_geometry():
    rng = np.random.default_rng(4)
    n = 10_000  # several QR chunks
    plain = rng.normal(size=(n, 5))
    levels = rng.integers(0, 40, n)
    onehot = np.zeros((n, 40))
    onehot[np.arange(n), levels] = rng.uniform(0.5, 1.0, n)
    y = rng.normal(size=n)
    for X in (plain, np.column_stack([plain, onehot])):  # TSQR; indicator columns found
        R, z = compress(X, y)
        np.testing.assert_allclose(R.T @ R, X.T @ X, rtol=1e-10, atol=1e-9 * n)
        np.testing.assert_allclose(R.T @ z, X.T @ y, rtol=1e-10, atol=1e-9 * n)


def _indicator_design(seed: int, n: int = 3000, s: int = 24):
    rng = np.random.default_rng(seed)
    T = rng.uniform(0, 0.25, (n, 4))
    level = rng.integers(-1, s, n)
    value = np.full(n, 0.25)
    ind = Indicators(level, value, s)
    truth = np.concatenate([rng.uniform(5, 50, 4), rng.uniform(5, 20, s)])
    truth[6] = 0.0  # a level at its bound
    y = np.column_stack([T, ind.dense()]) @ truth + rng.normal(0, 0.3, n)
    return T, y, ind


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_indicator_columns_fit_as_the_dense_design(seed):
    T, y, ind = _indicator_design(seed)
    q = T.shape[1] + ind.n_levels
    days = np.repeat(np.arange(len(y) // 96 + 1), 96)[:len(y)]
    args = (np.r_[20.0, 20.0, np.zeros(q - 2)], np.r_[5.0, 5.0, np.full(q - 2, 1e3)],
            np.zeros(q))
    lean = fit_model(T, y, *args, block=days, indicators=ind)
    dense = fit_model(np.column_stack([T, ind.dense()]), y, *args, block=days)
    # The same posterior mode and sandwich by another exact route: rounding only (cond ~1e2).
    np.testing.assert_allclose(lean.coef, dense.coef, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(lean.cov, dense.cov, rtol=1e-8, atol=1e-12)
    np.testing.assert_allclose(lean.prior_weight, dense.prior_weight, rtol=1e-8, atol=1e-12)
    assert lean.sigma2 == pytest.approx(dense.sigma2, rel=1e-10)


def test_indicator_levels_bounded_solve_matches_scipy_bvls():
    T, y, ind = _indicator_design(5)
    q = T.shape[1] + ind.n_levels
    pen = np.full(q, 0.05)
    mu = np.zeros(q)
    lower = np.zeros(q)
    y = y - 40.0 * ind.dense()[:, 3]  # a level that wants to be negative
    b = _factor_levels(T, y, ind.level, ind.value, ind.n_levels).solve(mu, pen, lower)
    A = np.vstack([np.column_stack([T, ind.dense()]), np.diag(np.sqrt(pen))])
    ref = lsq_linear(A, np.concatenate([y, np.zeros(q)]), bounds=(lower, np.inf),
                     method="bvls", tol=1e-12).x
    assert b[T.shape[1] + 3] == 0.0
    np.testing.assert_allclose(b, ref, rtol=1e-9, atol=1e-9)


def test_per_day_projection_equals_one_solve_per_day():
    rng = np.random.default_rng(6)
    days = np.sort(rng.integers(0, 30, 2000))
    occupied = rng.random(2000) < 0.4
    occupied[days == 3] = False  # a closed day: its occupied column is all zero
    C = np.column_stack([np.where(occupied, 0.25, 0.0), np.where(occupied, 0.0, 0.25)])
    V = rng.normal(size=(2000, 5)) + C @ rng.normal(size=(2, 5))
    expected = V.copy()
    for d in np.unique(days):
        rows = days == d
        coef = np.linalg.lstsq(C[rows], V[rows], rcond=None)[0]
        expected[rows] = V[rows] - C[rows] @ coef
    np.testing.assert_allclose(_project_out_days(V.copy(), C, days), expected,
                               rtol=0, atol=1e-13 * np.abs(V).max())


def test_offset_times_read_as_the_general_parser_reads_them():
    text = pl.Series(["2025-03-09T01:45:00-06:00", "2025-03-09T03:15:00-05:00",
                      "2025-11-02T01:30:00-05:00", "2025-11-02T01:30:00-06:00",
                      "2025-06-01T12:00:00+05:30", "2025-06-01T12:00:00+00:00"])
    general = text.str.to_datetime(time_zone="UTC", strict=False, time_unit="us")
    assert _parse_offset_times(text).equals(general)
    spaced = text.str.replace("T", " ")
    assert _parse_offset_times(spaced).equals(general)
    # Anything else is left to the general parser (None): Z, mixed forms, bad dates.
    assert _parse_offset_times(pl.Series(["2025-03-09T03:15:00Z"])) is None
    assert _parse_offset_times(pl.Series(["2025-03-09T03:15:00-05:00",
                                          "2025-03-09 03:30:00-05:00"])) is None
    assert _parse_offset_times(pl.Series(["2025-13-09T03:15:00-05:00"])) is None


def test_month_fit_on_the_shared_cache_equals_a_fit_without_it():
    s = make_building(11, days=45)
    whole = estimate_draws(s.site, s.aligned)  # fills the whole-frame cache
    assert s.aligned.cache
    month = s.aligned.frame["start_utc"].dt.month().to_numpy()
    mask = s.aligned.use & (month == month[-1])
    cached = estimate_draws(s.site, dataclasses.replace(s.aligned, use=mask))
    a = s.aligned
    fresh = estimate_draws(s.site, Aligned(a.frame, a.equipment_ids, a.hours, mask,
                                           a.interval_min, a.counts, a.unknown_by_equipment))
    assert whole.kw.shape == cached.kw.shape
    np.testing.assert_array_equal(cached.kw, fresh.kw)
    np.testing.assert_array_equal(cached.kw_low, fresh.kw_low)
    np.testing.assert_array_equal(cached.kw_high, fresh.kw_high)
    assert cached.quality == fresh.quality
