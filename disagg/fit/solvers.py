"""Regularized least squares with non-negative draws and autocorrelation-robust covariance.

Pure functions on arrays. The model for interval t is

    energy_kwh[t] = sum_j draw_kw[j] * run_h[t, j] + sum_m base_kw[m] * base_h[t, m] + u[t]

fitted by least squares with a Tikhonov (ridge) penalty pulling each draw toward the
engineer's prior, and bounds keeping every kW non-negative.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


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
        problem; otherwise the exact bounded solution of the augmented system (after a
        tall-skinny QR compression, see compress): the unbounded solution when it is within
        the bounds, else the primal-dual active-set method (_active_set), and bounded-variable
        least squares (scipy ``lsq_linear``, method ``bvls``) where that does not settle or
        the free columns are rank deficient.

    References:
        Hoerl, A. E. & Kennard, R. W. (1970). Ridge regression. Technometrics 12(1), 55-67.
        Stark, P. B. & Parker, R. L. (1995). Bounded-variable least-squares. Computational
        Statistics 10(2), 129-141.
    """
    if not (penalty > 0).any() and not np.isfinite(lower).any():
        return np.linalg.lstsq(X, y, rcond=None)[0]
    if X.shape[0] > 2 * X.shape[1]:
        X, y = compress(X, y)
    return _solve_small(X, y, prior_mean, penalty, lower)


def solve_compressed(R: np.ndarray, z: np.ndarray, prior_mean: np.ndarray,
                     penalty: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """solve_regularized's bounded solve on a system already compressed to (R, z) (see
    compress), e.g. one factorised a chunk of rows at a time (align.probe_rss)."""
    return _solve_small(R, z, prior_mean, penalty, lower)


def _solve_small(X: np.ndarray, y: np.ndarray, prior_mean: np.ndarray, penalty: np.ndarray,
                 lower: np.ndarray) -> np.ndarray:
    """solve_regularized's bounded ridge solve on a (compressed) system."""
    if X.shape[1] >= _NORMAL_MIN_COLS and (penalty > 0).all():
        x = _solve_normal(X, y, prior_mean, penalty, lower)
        if x is not None:
            return x
    rows = penalty > 0
    root = np.sqrt(penalty[rows])
    aug_X = np.vstack([X, np.diag(np.sqrt(penalty))[rows]])
    aug_y = np.concatenate([y, root * prior_mean[rows]])
    # Scale columns so the solver's tolerances mean the same for kW and for hours.
    norm = np.linalg.norm(aug_X, axis=0)
    norm[norm == 0] = 1.0
    A = aug_X / norm
    lb = lower * norm
    # The unbounded least-squares solution, computed as scipy's lsq_linear does, is the
    # answer when it is within the bounds; otherwise the active-set method (the unique
    # minimiser, as bvls), with lsq_linear itself (and its ~0.3 s import) as the fallback.
    x = np.linalg.lstsq(A, aug_y, rcond=-1)[0]
    if not np.all(x >= lb):
        x = _active_set(lambda fixed: _lstsq_fixed(A, aug_y, lb, fixed),
                        lambda v: A.T @ (A @ v - aug_y), lb, x)
    if x is None:
        from scipy.optimize import lsq_linear

        x = lsq_linear(A, aug_y, bounds=(lb, np.full(len(lower), np.inf)),
                       method="bvls", tol=1e-12).x
    return np.maximum(x / norm, lower)


# From this many columns, with a penalty on every column, _solve_small solves the normal
# equations by Cholesky (the penalty makes them positive definite) instead of an SVD
# least-squares solve of the augmented system: a wide design (the hour-of-week baseload)
# takes ~50 such solves per fit.
_NORMAL_MIN_COLS = 60


def _solve_normal(X: np.ndarray, y: np.ndarray, prior_mean: np.ndarray, penalty: np.ndarray,
                  lower: np.ndarray) -> np.ndarray | None:
    """The bounded ridge solution from the normal equations (X'X + P) b = X'y + P m, scaled
    to unit diagonal, with the same active-set method; None when a Cholesky factorisation
    fails (the caller then solves the augmented system)."""
    from scipy.linalg import cho_factor, cho_solve

    A = X.T @ X + np.diag(penalty)
    g = X.T @ y + penalty * prior_mean
    d = np.sqrt(np.diag(A))
    A = A / np.outer(d, d)
    g = g / d
    lb = lower * d
    try:
        x = cho_solve(cho_factor(A, check_finite=False), g, check_finite=False)
    except np.linalg.LinAlgError:
        return None
    if not np.all(x >= lb):
        def solve_fixed(fixed: np.ndarray) -> np.ndarray | None:
            free = ~fixed
            v = np.where(fixed, lb, 0.0)
            if free.any():
                rhs = g[free] - A[np.ix_(free, fixed)] @ lb[fixed] if fixed.any() else g[free]
                try:
                    v[free] = cho_solve(cho_factor(A[np.ix_(free, free)], check_finite=False),
                                        rhs, check_finite=False)
                except np.linalg.LinAlgError:
                    return None
            return v

        x = _active_set(solve_fixed, lambda v: A @ v - g, lb, x)
        if x is None:
            return None
    return np.maximum(x / d, lower)


# Iterations of _active_set before the bounded solve falls back to scipy's bvls.
_ACTIVE_SET_MAX_ITER = 50


def _active_set(solve_fixed, gradient, lower: np.ndarray, start: np.ndarray) -> np.ndarray | None:
    """Minimiser of a strictly convex quadratic subject to x >= lower (lower may be -inf), by
    the primal-dual active-set method: fix at their bounds the variables whose unconstrained
    value falls below them, solve for the others, release a fixed variable whose gradient
    points into the feasible side, fix a free one that falls below its bound; repeat until
    nothing changes. Then x satisfies the KKT conditions, which characterise the unique
    minimiser (what a bounded-variable least-squares solver returns).

    Args:
        solve_fixed: fixed mask -> the minimiser with the fixed variables at their bounds,
            or None (a free set the data cannot determine).
        gradient: x -> gradient of the objective.
        start: the unconstrained minimiser.

    Returns:
        x, or None when it did not settle within _ACTIVE_SET_MAX_ITER iterations or a solve
        failed (the caller then uses another solver).

    References:
        Hintermueller, M., Ito, K. & Kunisch, K. (2002). The primal-dual active set strategy
        as a semismooth Newton method. SIAM J. Optimization 13(3), 865-888 (from memory).
    """
    bounded = np.isfinite(lower)
    fixed = bounded & (start < lower)
    x = start
    scale_x = max(1.0, float(np.max(np.abs(np.where(bounded, lower, 0.0)))),
                  float(np.max(np.abs(start))))
    tol_x = 1e-12 * scale_x
    tol_g = 1e-12 * max(1.0, float(np.max(np.abs(gradient(np.zeros_like(start))))))
    for _ in range(_ACTIVE_SET_MAX_ITER):
        x = solve_fixed(fixed)
        if x is None:
            return None
        g = gradient(x)
        release = fixed & (g < -tol_g)
        add = ~fixed & bounded & (x < lower - tol_x)
        if not release.any() and not add.any():
            return np.where(fixed, lower, x)
        fixed = (fixed & ~release) | add
    return None


def _lstsq_fixed(A: np.ndarray, b: np.ndarray, lower: np.ndarray,
                 fixed: np.ndarray) -> np.ndarray | None:
    """argmin ||A x - b|| with x[fixed] = lower[fixed]; None if the free columns are not of
    full rank."""
    free = ~fixed
    x = np.where(fixed, lower, 0.0)
    if free.any():
        rhs = b - A[:, fixed] @ lower[fixed] if fixed.any() else b
        sol, _, rank, _ = np.linalg.lstsq(A[:, free], rhs, rcond=-1)
        if rank < int(free.sum()):
            return None
        x[free] = sol
    return x


# Rows per chunk of the tall-skinny QR (compress): a chunk of a design stays in cache, which
# makes the chunked factorisation 2-5x faster than one LAPACK call on the whole design here.
_QR_CHUNK_ROWS = 2048
# Rows per chunk of the passes that only sum over rows (projections, score sums): bounds the
# temporary memory of a long design (1-minute data) without slowing a short one.
_SUM_CHUNK_ROWS = 65536
QR_CHUNK_ROWS = _QR_CHUNK_ROWS  # for callers that factorise in the same chunks
# Designs with at least this many columns are searched for indicator-like columns (one
# nonzero per row among them, such as the hour-of-week baseload), which compress exactly
# without a QR.
_DISJOINT_MIN_COLS = 32
DISJOINT_MIN_COLS = _DISJOINT_MIN_COLS


@dataclass(frozen=True)
class Indicators:
    """Design columns with at most one nonzero per row, stored by row.

    Row t holds value[t] in column level[t] and 0 in the other columns (level -1: in none).
    Such columns (the hour-of-week baseload: the interval's hours in the column of its hour
    of the week) are n_levels dense columns that would take n x n_levels numbers.

    level: (n,) integers in -1..n_levels-1; value: (n,) [h]; n_levels: number of columns.
    """

    level: np.ndarray
    value: np.ndarray
    n_levels: int

    def dense(self) -> np.ndarray:
        """The (n, n_levels) dense columns."""
        out = np.zeros((len(self.level), self.n_levels))
        has = self.level >= 0
        out[np.flatnonzero(has), self.level[has]] = self.value[has]
        return out

    def matvec(self, coef: np.ndarray) -> np.ndarray:
        """The columns times coef (n_levels,): value[t] * coef[level[t]]."""
        return np.where(self.level >= 0, self.value * coef[np.maximum(self.level, 0)], 0.0)


def compress(X: np.ndarray, y: np.ndarray,
             indicators: Indicators | None = None) -> tuple[np.ndarray, np.ndarray]:
    """A small system with the same least-squares geometry as a tall one.

    Returns (R, z), R (q, q) and z (q,), with R'R = Z'Z and R'z = Z'y (up to rounding) for
    the design Z = [X, indicator columns] (q columns), so ||y - Z b||^2 = ||z - R b||^2 +
    constant for every b: any fit that depends on the data only through ||y - Z b||^2 can
    be done on (R, z). R is upper triangular up to a permutation of its columns.

    Args:
        X: (n, p) with n > q; y: (n,); indicators: optional columns after X's.

    The QR factorisation is done in row chunks, each chunk's R stacked and factorised again
    (tall-skinny QR: as stable as one Householder QR, and faster because each chunk stays
    in cache). Columns that share no nonzero row (indicator columns, such as the hour-of-week
    baseload) are orthogonal already: they are normalised, the other columns are projected
    off them (twice, for orthogonality to working precision), and only the rest is factorised.

    References:
        Demmel, J., Grigori, L., Hoemmen, M. & Langou, J. (2012). Communication-optimal
        parallel and sequential QR and LU factorizations. SIAM J. Sci. Comput. 34(1)
        (tall-skinny QR; from memory). Giraud, L., Langou, J. & Rozloznik, M. (2005). The loss
        of orthogonality in the Gram-Schmidt orthogonalization process. Computers & Mathematics
        with Applications 50 ("twice is enough"; from memory).
    """
    p = X.shape[1]
    if indicators is not None:
        return _compress_levels(X, y, indicators.level, indicators.value, indicators.n_levels)
    if p >= _DISJOINT_MIN_COLS:
        disjoint = _disjoint_columns(X)
        if len(disjoint) >= p // 2:
            rest = np.setdiff1d(np.arange(p), disjoint)
            if isinstance(X, LazyRows):
                parts = [_level_value(X[i:i + _SUM_CHUNK_ROWS][:, disjoint])
                         for i in range(0, len(X), _SUM_CHUNK_ROWS)]
                level = np.concatenate([a for a, _ in parts])
                value = np.concatenate([b for _, b in parts])
                del parts
                T = X.columns(rest)
            else:
                level, value = _level_value(X[:, disjoint])
                T = X[:, rest]
            r, z = _compress_levels(T, y, level, value, len(disjoint))
            out = np.empty_like(r)
            out[:, np.concatenate([rest, disjoint])] = r
            return out, z
    r = _tsqr_xy(X, y)
    return r[:p, :p], r[:p, p]


def _level_value(D: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The column of the one nonzero of each row of D (-1: none) and its value."""
    nz = D != 0
    level = np.where(nz.any(axis=1), np.argmax(nz, axis=1), -1)
    return level, D.sum(axis=1)  # the others add 0 exactly


class LazyRows:
    """A tall (n, p) design made a block of rows at a time, when a solver reads it.

    The whole array never exists: `make(b)` returns the rows bounds[b]:bounds[b + 1] of the
    design (blocks chosen by the caller, e.g. whole days), and a row slice X[i:j] is put
    together from the blocks it meets (the last block made is kept, as slices are read in
    order). fit_model, compress and _factor_levels accept it where they take a design: they
    read a design only by row slices and products X @ b, one chunk at a time, so the fit is
    the one on the materialised array (the same rows in the same chunks). Other callers
    materialise it (`X[:]`); a small design should be passed as an array.
    """

    def __init__(self, bounds: np.ndarray, p: int, make, cols: np.ndarray | None = None):
        self.bounds = np.asarray(bounds, dtype=np.int64)
        self.make = make
        self.cols = cols
        self.shape = (int(self.bounds[-1]), p if cols is None else len(cols))
        self._last: tuple[int, np.ndarray] | None = None

    def __len__(self) -> int:
        return self.shape[0]

    def _block(self, b: int) -> np.ndarray:
        if self._last is None or self._last[0] != b:
            self._last = None  # release the previous block first
            self._last = (b, self.make(b))
        return self._last[1]

    def __getitem__(self, key: slice) -> np.ndarray:
        if not isinstance(key, slice):
            raise TypeError("LazyRows takes row slices only")
        i, j, step = key.indices(self.shape[0])
        if step != 1:
            raise TypeError("LazyRows takes row slices with step 1 only")
        j = max(i, j)
        first = int(np.searchsorted(self.bounds, i, side="right")) - 1
        pieces = []
        b = first
        while b < len(self.bounds) - 1 and self.bounds[b] < j:
            lo, hi = self.bounds[b], self.bounds[b + 1]
            block = self._block(b)
            pieces.append(block[max(i, lo) - lo:min(j, hi) - lo])
            b += 1
        if not pieces:
            return np.empty((0, self.shape[1]))
        out = pieces[0] if len(pieces) == 1 else np.concatenate(pieces)
        if self.cols is not None:
            out = out[:, self.cols]
        return np.ascontiguousarray(out)

    def columns(self, cols: np.ndarray) -> LazyRows:
        """The same rows, only the columns `cols` (of this design's columns)."""
        full = cols if self.cols is None else self.cols[cols]
        return LazyRows(self.bounds, 0, self.make, np.asarray(full))

    def __matmul__(self, b: np.ndarray) -> np.ndarray:
        n = self.shape[0]
        out = np.empty(n)
        for i in range(0, n, _SUM_CHUNK_ROWS):
            out[i:i + _SUM_CHUNK_ROWS] = self[i:i + _SUM_CHUNK_ROWS] @ b
        return out

    def dense(self) -> np.ndarray:
        """The whole array (for small designs only)."""
        return self[0:self.shape[0]]


def _tsqr_r(Z: np.ndarray) -> np.ndarray:
    """The R factor of Z (n, q) by QR of row chunks, then of their stacked R factors."""
    if len(Z) <= 2 * _QR_CHUNK_ROWS:
        return np.linalg.qr(Z, mode="r")
    parts = [np.linalg.qr(Z[i:i + _QR_CHUNK_ROWS], mode="r")
             for i in range(0, len(Z), _QR_CHUNK_ROWS)]
    return np.linalg.qr(np.vstack(parts), mode="r")


def _tsqr_xy(X: np.ndarray, y: np.ndarray) -> np.ndarray:
    """_tsqr_r of [X, y], one chunk of [X, y] in memory at a time."""
    if len(X) <= 2 * _QR_CHUNK_ROWS:
        X = X.dense() if isinstance(X, LazyRows) else X
        return np.linalg.qr(np.column_stack([X, y]), mode="r")
    parts = [np.linalg.qr(np.column_stack([X[i:i + _QR_CHUNK_ROWS], y[i:i + _QR_CHUNK_ROWS]]),
                          mode="r")
             for i in range(0, len(X), _QR_CHUNK_ROWS)]
    return np.linalg.qr(np.vstack(parts), mode="r")


def _disjoint_columns(X: np.ndarray) -> np.ndarray:
    """Indices of columns that share no nonzero row with each other, among the nonzero
    columns with at most half their rows nonzero (greedily: the columns that share the
    fewest of their rows with the others first)."""
    if isinstance(X, LazyRows):
        nz = np.concatenate([X[i:i + _SUM_CHUNK_ROWS] != 0
                             for i in range(0, len(X), _SUM_CHUNK_ROWS)])
    else:
        nz = X != 0
    count = nz.sum(axis=0)
    cand = np.flatnonzero((count > 0) & (count <= len(X) // 2))
    if len(cand) == 0:
        return cand
    nzc = np.asfortranarray(nz[:, cand])
    shared = nzc.sum(axis=1) > 1
    if not shared.any():
        return cand
    shared_frac = (nzc & shared[:, None]).sum(axis=0) / count[cand]
    taken = np.zeros(len(X), dtype=bool)
    chosen = []
    for a in np.lexsort((count[cand], shared_frac)):
        if not (taken & nzc[:, a]).any():
            chosen.append(cand[a])
            taken |= nzc[:, a]
    return np.sort(np.array(chosen, dtype=np.intp))


def _compress_levels(T: np.ndarray, y: np.ndarray, level: np.ndarray, value: np.ndarray,
                     s: int) -> tuple[np.ndarray, np.ndarray]:
    """compress() of [T, indicator columns] (row i: value[i] in column level[i], -1 = none),
    with R's columns in that order."""
    return _factor_levels(T, y, level, value, s).dense()


@dataclass
class _Levels:
    """compress() of [T, S] for indicator columns S, in block form.

    The columns of S are orthogonal: their normalised columns Q_S and norms `norm` (s,) are
    their QR factors. T and y are split as Q_S [CT, cy] plus a residual orthogonal to S,
    whose R factor is [RT, ry] (t + 1 columns). So R = [[CT, diag(norm)], [RT, 0]] and
    z = [cy, ry], with R's columns in the order [T, S].

    Fits on (R, z) are then done by eliminating the indicator levels one at a time (each
    meets only its own row), leaving t x t problems instead of (t + s) x (t + s).
    """

    CT: np.ndarray  # (s, t)
    cy: np.ndarray  # (s,)
    norm: np.ndarray  # (s,)
    RT: np.ndarray  # (t, t)
    ry: np.ndarray  # (t,)

    def dense(self) -> tuple[np.ndarray, np.ndarray]:
        s, t = self.CT.shape
        R = np.zeros((t + s, t + s))
        R[:s, :t] = self.CT
        R[:s, t:] = np.diag(self.norm)
        R[s:s + len(self.RT), :t] = self.RT
        z = np.zeros(t + s)
        z[:s] = self.cy
        z[s:s + len(self.ry)] = self.ry
        return R, z

    def unpenalized(self) -> tuple[np.ndarray, int]:
        """Least-squares coefficients (minimum norm) and the rank."""
        bT, _, rank, _ = np.linalg.lstsq(self.RT, self.ry, rcond=None)
        has = self.norm > 0
        bS = np.where(has, (self.cy - self.CT @ bT) / np.where(has, self.norm, 1.0), 0.0)
        return np.concatenate([bT, bS]), int(rank) + int(has.sum())

    def solve(self, mean: np.ndarray, pen: np.ndarray, lower: np.ndarray) -> np.ndarray | None:
        """The ridge solution subject to b >= lower, or None when some level is not
        determined or the active-set iteration does not settle (then the dense system)."""
        b = self.solve_fixed(mean, pen, lower, np.zeros(len(lower), dtype=bool))
        if b is None or np.all(b >= lower):
            return b
        R, z = self.dense()
        return _active_set(lambda fixed: self.solve_fixed(mean, pen, lower, fixed),
                           lambda v: R.T @ (R @ v - z) + pen * (v - mean), lower, b)

    def solve_fixed(self, mean: np.ndarray, pen: np.ndarray, lower: np.ndarray,
                    fixed: np.ndarray) -> np.ndarray | None:
        """The ridge solution with b[fixed] = lower[fixed] and the rest free (no bounds), or
        None when the free coefficients are not determined."""
        t = self.CT.shape[1]
        pT, pS = pen[:t], pen[t:]
        fT, fS = fixed[:t], fixed[t:]
        a = self.norm**2 + pS
        if not np.all(a[~fS] > 0):
            return None
        bT = np.where(fT, lower[:t], 0.0)
        known = self.CT[:, fT] @ bT[fT] if fT.any() else 0.0  # fixed T columns' part
        # Level m's two rows (data: cy_m = CT_m bT + norm_m b_m; prior: b_m = mean_m) leave,
        # once b_m is chosen best, one row for bT with weight sqrt(pS_m / a_m); a level fixed
        # at its bound leaves its data row with weight 1.
        b_fixed_S = lower[t:]
        wgt = np.where(fS, 1.0, np.sqrt(np.divide(pS, a, out=np.zeros_like(a), where=a > 0)))
        target = np.where(fS, self.cy - self.norm * b_fixed_S, self.cy - self.norm * mean[t:])
        free = ~fT
        rows = free & (pT > 0)
        A = np.vstack([wgt[:, None] * self.CT[:, free], self.RT[:, free],
                       np.diag(np.sqrt(pT))[np.ix_(rows, free)]])
        rhs = np.concatenate([wgt * (target - known),
                              self.ry - (self.RT[:, fT] @ bT[fT] if fT.any() else 0.0),
                              np.sqrt(pT[rows]) * mean[:t][rows]])
        if free.any():
            col = np.linalg.norm(A, axis=0)
            col[col == 0] = 1.0
            sol, _, rank, _ = np.linalg.lstsq(A / col, rhs, rcond=-1)
            if rank < int(free.sum()):
                return None
            bT[free] = sol / col
        bS = np.where(fS, b_fixed_S,
                      (self.norm * (self.cy - self.CT @ bT) + pS * mean[t:])
                      / np.where(fS, 1.0, a))
        return np.concatenate([bT, bS])

    def inverse(self, pen: np.ndarray) -> np.ndarray | None:
        """(R'R + diag(pen))^-1 by the Schur complement of the diagonal level block, or None
        when that matrix is singular to working precision."""
        s, t = self.CT.shape
        pT, pS = pen[:t], pen[t:]
        a = self.norm**2 + pS
        if not np.all(a > 0):
            return None
        M = self.RT.T @ self.RT + np.diag(pT) + (self.CT.T * (pS / a)) @ self.CT
        d = np.diag(M)
        if not np.all(d > 0):
            return None
        sc = 1.0 / np.sqrt(d)
        ev, V = np.linalg.eigh(sc[:, None] * M * sc[None, :])
        if ev.min() <= max(M.shape) * np.finfo(float).eps * ev.max():
            return None  # a direction the pseudo-inverse would drop
        M_inv = sc[:, None] * ((V / ev) @ V.T) * sc[None, :]
        F = self.CT.T * (self.norm / a)  # (t, s)
        TS = -M_inv @ F
        out = np.empty((t + s, t + s))
        out[:t, :t] = M_inv
        out[:t, t:] = TS
        out[t:, :t] = TS.T
        out[t:, t:] = F.T @ M_inv @ F
        out[np.arange(t, t + s), np.arange(t, t + s)] += 1.0 / a
        return out


def _factor_levels(T: np.ndarray, y: np.ndarray, level: np.ndarray, value: np.ndarray,
                   s: int) -> _Levels:
    """_Levels of [T, indicator columns] (row i: value[i] in column level[i], -1 = none).

    T and y are projected off the normalised indicator columns twice ("twice is enough"),
    and the residual is factorised by tall-skinny QR, a chunk of rows at a time, so no copy
    of T is made.
    """
    n, t = T.shape
    has = level >= 0
    lev = np.where(has, level, 0)
    v = np.where(has, value, 0.0)
    norm = np.sqrt(np.bincount(lev, weights=v * v, minlength=s))
    w = np.divide(v, norm[lev], out=np.zeros(n), where=v != 0)  # normalised columns, by row
    # Subtracting a projection of all zeros (the first pass's) changes no number when every
    # w >= 0 (w x 0 = +0, and E - (+0) is E, -0 and NaN included): it is then skipped.
    w_nonneg = bool(np.all(w >= 0))

    def residual(i: int, size: int, C: np.ndarray) -> np.ndarray:
        """Rows i..i+size of [T, y] minus their projection C on the indicator columns."""
        rows = min(size, n - i)
        E = np.empty((rows, t + 1), order="F")  # columns contiguous, for bincount and QR
        E[:, :t] = T[i:i + rows]
        E[:, t] = y[i:i + rows]
        if not (w_nonneg and not C.any()):
            E -= w[i:i + rows, None] * C.T[:, lev[i:i + rows]].T
        return E

    C = np.zeros((s, t + 1))
    if n <= _SUM_CHUNK_ROWS:  # one copy of [T, y], projected in place
        E = residual(0, n, C)
        for _ in range(2):
            c = np.column_stack([np.bincount(lev, weights=w * E[:, k], minlength=s)
                                 for k in range(t + 1)])
            E -= w[:, None] * c.T[:, lev].T
            C += c
        parts = [np.linalg.qr(E[i:i + _QR_CHUNK_ROWS], mode="r")
                 for i in range(0, n, _QR_CHUNK_ROWS)]
    else:
        for _ in range(2):
            c = np.zeros_like(C)
            for i in range(0, n, _SUM_CHUNK_ROWS):
                E = residual(i, _SUM_CHUNK_ROWS, C) * w[i:i + _SUM_CHUNK_ROWS, None]
                lv = lev[i:i + _SUM_CHUNK_ROWS]
                for k in range(t + 1):
                    c[:, k] += np.bincount(lv, weights=E[:, k], minlength=s)
            C += c
        parts = [np.linalg.qr(residual(i, _QR_CHUNK_ROWS, C), mode="r")
                 for i in range(0, n, _QR_CHUNK_ROWS)]
    r_rest = parts[0] if len(parts) == 1 else np.linalg.qr(np.vstack(parts), mode="r")
    return _Levels(C[:, :t], C[:, t], norm, r_rest[:t, :t], r_rest[:t, t])


def _block_ids(block: np.ndarray) -> tuple[np.ndarray, int]:
    """Block number 0..G-1 of each row, for non-decreasing block labels, and G."""
    labels, ids = np.unique(block, return_inverse=True)
    return ids.reshape(-1), len(labels)


def _score_sums(X: np.ndarray, u: np.ndarray, ids: np.ndarray, G: int) -> np.ndarray:
    """Sums of the scores X[t] * u[t] within blocks (ids: block number of each row, in
    non-decreasing runs), one chunk of rows in memory at a time."""
    out = np.zeros((G, X.shape[1]))
    for i in range(0, len(u), _SUM_CHUNK_ROWS):
        b = ids[i:i + _SUM_CHUNK_ROWS]
        first = np.concatenate([[0], np.flatnonzero(np.diff(b)) + 1])
        out[b[first]] += np.add.reduceat(X[i:i + _SUM_CHUNK_ROWS] * u[i:i + len(b), None],
                                         first, axis=0)
    return out


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
              lag: int | None = None, penalty: np.ndarray | None = None,
              indicators: Indicators | None = None) -> Fit:
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
        prior_mean, prior_sd: (q,) [kW]; lower: (q,) bounds [kW]; q = p, plus the number of
            indicator columns when given.
        block: (n,) non-decreasing block labels; None = every row its own block.
        lag: Bartlett lag in blocks; None = Newey-West (1994) rule.
        penalty: (q,) fixed penalty weights instead of the sigma^2 / sd^2 rule (refits).
        indicators: more design columns after X's, stored by row (the same fit as with
            their dense columns appended to X, without the memory).

    References:
        Newey & West (1987), Econometrica 55(3), Eq. (2); Hoerl & Kennard (1970),
        Technometrics 12(1); Cameron, A. C. & Miller, D. L. (2015), A practitioner's guide to
        cluster-robust inference, J. Human Resources 50(2) (G/(G-1) factor; from memory).
    """
    if indicators is not None and (block is None or not len(y) > 2 * (X.shape[1]
                                                                       + indicators.n_levels)):
        X = X.dense() if isinstance(X, LazyRows) else X
        X, indicators = np.column_stack([X, indicators.dense()]), None
    if isinstance(X, LazyRows) and (block is None or not len(y) > 2 * X.shape[1]):
        X = X.dense()  # a short design, or scores by row: the plain path
    n, p = X.shape
    q = p + (indicators.n_levels if indicators is not None else 0)
    prec = np.where(np.isfinite(prior_sd) & (prior_sd > 0), 1.0 / np.square(prior_sd), 0.0)
    mean = np.where(prec > 0, prior_mean, 0.0)

    def predict(b: np.ndarray) -> np.ndarray:
        if indicators is None:
            return X @ b
        return X @ b[:p] + indicators.matvec(b[p:])

    # Every solve below sees the data only through ||y - X b||^2: on a tall design, factorise
    # once and solve the small system (R, z) each time.
    tall = n > 2 * q
    levels = None
    if indicators is not None:  # tall, see above
        levels = _factor_levels(X, y, indicators.level, indicators.value, indicators.n_levels)
        r, z = levels.dense()
        xtx = r.T @ r
    elif tall:
        r, z = compress(X, y)
        xtx = r.T @ r
    else:
        xtx = X.T @ X

    def solve(pen: np.ndarray) -> np.ndarray:
        if levels is not None:
            b = levels.solve(mean, pen, lower)
            if b is not None:
                return b
        if tall and ((pen > 0).any() or np.isfinite(lower).any()):
            return _solve_small(r, z, mean, pen, lower)
        return solve_regularized(X.dense() if isinstance(X, LazyRows) else X, y, mean, pen,
                                 lower)

    inverses: dict[bytes, np.ndarray] = {}

    def inverse(pen: np.ndarray) -> np.ndarray:
        """(X'X + diag(pen))^+ (by blocks when the design has indicator columns)."""
        key = pen.tobytes()
        if key not in inverses:
            inv = levels.inverse(pen) if levels is not None else None
            inverses[key] = inv if inv is not None else _pinv_scaled(xtx + np.diag(pen))
        return inverses[key]

    if penalty is None:
        if levels is not None:
            b0, rank = levels.unpenalized()
        elif tall:
            b0, _, rank, _ = np.linalg.lstsq(r, z, rcond=None)
        else:
            qf, r0 = np.linalg.qr(X, mode="reduced")
            b0, _, rank, _ = np.linalg.lstsq(r0, qf.T @ y, rcond=None)
        sigma2 = float(np.sum((y - predict(b0)) ** 2) / max(n - rank, 1))
        for _ in range(2):
            pen = sigma2 * prec
            b = solve(pen)
            edf = float(np.trace(inverse(pen) @ xtx))
            sigma2 = float(np.sum((y - predict(b)) ** 2) / max(n - edf, 1.0))
        pen = sigma2 * prec
    else:
        pen = penalty
    b = solve(pen)
    u = y - predict(b)
    A_inv = inverse(pen)
    edf = float(np.trace(A_inv @ xtx))
    sigma2 = float(np.sum(u**2) / max(n - edf, 1.0))
    if block is None:
        scores = X * u[:, None]
    else:
        ids, G = _block_ids(block)
        scores = _score_sums(X, u, ids, G)
        if indicators is not None:
            ind = indicators
            has = ind.level >= 0
            key = ids[has] * ind.n_levels + ind.level[has]
            part = np.bincount(key, weights=ind.value[has] * u[has], minlength=G * ind.n_levels)
            scores = np.column_stack([scores, part.reshape(G, ind.n_levels)])
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
    return s[:, None] * _pinvh(s[:, None] * A * s[None, :]) * s[None, :]


def _pinvh(A: np.ndarray) -> np.ndarray:
    """Pseudo-inverse of a symmetric matrix from its eigendecomposition, dropping eigenvalues
    at or below max(shape) x machine epsilon x the largest (scipy.linalg.pinvh's default
    cut-off; written with numpy so that the breakdown needs no scipy import, ~0.3 s)."""
    w, V = np.linalg.eigh(A)
    if len(w) == 0:
        return np.zeros_like(A)
    keep = np.abs(w) > max(A.shape) * np.finfo(float).eps * np.max(np.abs(w))
    return (V[:, keep] / w[keep]) @ V[:, keep].T


def quantile(confidence: float, df: float | None = None) -> float:
    """Two-sided critical value: normal, or Student t with df degrees of freedom
    (scipy.special ``ndtri`` and ``stdtrit``)."""
    from scipy.special import ndtri, stdtrit

    a = 0.5 + confidence / 2.0
    if df is None or not np.isfinite(df):
        return float(ndtri(a))
    return float(stdtrit(df, a))


def chi2_upper_quantile(df: float, tail: float) -> float:
    """x with P(X > x) = tail for X chi-square with df degrees of freedom
    (scipy.special ``chdtri``)."""
    from scipy.special import chdtri

    return float(chdtri(df, tail))


# Columns from which jackknife_cov forms each leave-one-out factor from Gram matrices.
_JACKKNIFE_GRAM_MIN_COLS = 100


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
    p = X.shape[1]
    plain = not (penalty > 0).any() and not np.isfinite(lower).any()
    keep_rows = [groups != g for g in labels]
    if (plain or min(int(k.sum()) for k in keep_rows) <= 2 * p
            or (p >= _DISJOINT_MIN_COLS and len(_disjoint_columns(X)) >= p // 2)):
        # Each refit on its own rows (compress() finds the indicator columns of each).
        est = np.array([solve_regularized(X[k], y[k], prec_mean, penalty, lower)
                        for k in keep_rows])
    else:
        # Factorise each block once; the rows without block g factorise as the stack of the
        # other blocks' R factors (the same least-squares problem, exactly).
        parts = []
        for g in labels:
            rows = groups == g
            parts.append(_tsqr_xy(X[rows], y[rows]))
        est = []
        # A wide design (hour-of-week baseload whitened for the wandering level) takes each
        # leave-one-out factor from the Gram matrices, G_-i = G - G_i, by Cholesky (p^3 / 3
        # per block instead of a QR of the stacked factors); where that is not positive
        # definite to working precision, the QR of the stack as for narrow designs.
        wide = p >= _JACKKNIFE_GRAM_MIN_COLS
        grams = [pt.T @ pt for pt in parts] if wide else []
        total = sum(grams) if wide else None
        for i in range(len(labels)):
            r = None
            if wide:
                try:
                    r = np.linalg.cholesky(total - grams[i]).T
                except np.linalg.LinAlgError:
                    r = None
                if r is not None and not np.all(np.isfinite(r)):
                    r = None
            if r is None:
                r = _tsqr_r(np.vstack(parts[:i] + parts[i + 1:]))
            est.append(_solve_small(r[:p, :p], r[:p, p], prec_mean, penalty, lower))
        est = np.array(est)
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
    if n <= _SUM_CHUNK_ROWS:
        sd = H.std(axis=0)
        Hc = H - H.mean(axis=0)
        cross = Hc.T @ Hc
        del Hc
    else:  # the same sums a chunk of rows at a time: no copy of a long H
        mean = H.mean(axis=0)
        cross = np.zeros((k, k))
        for i in range(0, n, _SUM_CHUNK_ROWS):
            Hc = H[i:i + _SUM_CHUNK_ROWS] - mean
            cross += Hc.T @ Hc
        sd = np.sqrt(np.maximum(np.diag(cross), 0.0) / n)
    with np.errstate(invalid="ignore", divide="ignore"):
        corr = cross / n / np.outer(sd, sd)
    corr = np.nan_to_num(corr, nan=0.0)
    np.fill_diagonal(corr, 1.0)
    # Every regression below is read off one Gram matrix of [B, H]: these are diagnostics,
    # so the normal equations' lost digits do not matter, and the tall matrix is read once.
    G = np.zeros((m + k, m + k))
    for i in range(0, n, _SUM_CHUNK_ROWS):
        Z = np.column_stack([B[i:i + _SUM_CHUNK_ROWS], H[i:i + _SUM_CHUNK_ROWS]])
        G += Z.T @ Z
    tss = n * sd**2
    r2_base = np.array([_r2_gram(G, list(range(m)), m + j, tss[j]) for j in range(k)])
    r2_all = _r2_on_the_rest(G, m, tss)
    if r2_all is None:
        r2_all = np.array([_r2_gram(G, [i for i in range(m + k) if i != m + j], m + j, tss[j])
                           for j in range(k)])
    with np.errstate(divide="ignore"):
        vif = np.where(r2_all < 1.0, 1.0 / (1.0 - r2_all), np.inf)
    return {"corr": corr, "r2_base": r2_base, "r2_all": r2_all, "vif": vif}


# Largest condition number of the scaled Gram matrix for which _r2_on_the_rest reads every
# regression off its inverse (its digits then suffice for 1e-9 agreement with one solve per
# column); beyond it, one least-squares solve per column.
_R2_INVERSE_MAX_COND = 1e6


def _r2_on_the_rest(G: np.ndarray, m: int, tss: np.ndarray) -> np.ndarray | None:
    """Centred R^2 of each column m, m+1, ... of the Gram matrix G on all the other columns:
    the residual sum of squares of column j on the others is 1 / (G^-1)_jj. None when G is
    not well conditioned (then _r2_gram per column)."""
    d = np.sqrt(np.diag(G))
    if not np.all(d > 0) or np.any(tss <= 1e-12 * np.maximum(d[m:] ** 2, 1e-300)):
        return None
    Gs = G / np.outer(d, d)
    w, V = np.linalg.eigh(Gs)
    if w.min() <= 0 or w.max() > _R2_INVERSE_MAX_COND * w.min():
        return None
    inv_diag = np.einsum("ij,ij->i", V / w, V)[m:] / d[m:] ** 2
    return np.clip(1.0 - 1.0 / inv_diag / tss, 0.0, 1.0)


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
