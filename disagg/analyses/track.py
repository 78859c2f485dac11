"""Delta-rule (normalized LMS) tracking of every draw, and drift alarms.

Pure functions on arrays. The tracker walks the intervals in time order; after each one it
moves the draws and baseload levels by a step proportional to the residual times that
interval's equipment-hours, normalized by their squared norm:

    e_t = y_t - w . x_t,    w <- w + mu e_t x_t / (delta + x_t . x_t)

Per-weight form (a diagonal step matrix D = diag(d), d_j > 0, fixed during a run):

    w <- w + mu e_t D x_t / (delta + x_t . D x_t)

It is normalized LMS on the rescaled inputs u = D^(1/2) x with weights v = D^(-1/2) w
(y = w . x = v . u, and the update of v is the plain normalized one), so the stable range
stays 0 < mu < 2 for any fixed positive d. `scales_for_memory` chooses d so that every
column forgets at its own requested pace whatever its duty cycle.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.linalg import solve_discrete_lyapunov

# Normalized LMS converges in the mean square for 0 < mu < 2 (Haykin, Adaptive Filter Theory,
# the normalized LMS chapter, from memory; also stated in vendor DSP documentation, read via
# docs/references.md section 4). A step at or beyond it is refused.
MU_MAX = 2.0
# Exponentially weighted moving-average control chart: alarm beyond L standard deviations
# (Roberts 1959, Technometrics 1(3), 239-250; L = 3 is common practice, e.g. Montgomery,
# Introduction to Statistical Quality Control, from memory).
EWMA_L = 3.0


def nlms(X: np.ndarray, y: np.ndarray, w0: np.ndarray, mu: float, delta: float,
         scale: np.ndarray | None = None, rows: np.ndarray | None = None) -> np.ndarray:
    """Normalized LMS weights after each row (per-weight form when `scale` is given).

    Args:
        X: (n, p) inputs in time order [h]; y: (n,) targets [kWh]; w0: (p,) start [kW].
        mu: step size, 0 < mu < 2; delta: regularization of the norm [h^2], > 0.
        scale: (p,) the diagonal d of the step matrix, every d_j > 0 and finite; None is
            d = 1 (the plain normalized form). delta is then in units of x . D x.
        rows: strictly increasing row indices whose weights are kept (None: every row). A long
            1-minute series needs only the weights at each day's end: keeping only those
            saves an (n, p) array.

    Returns:
        (n, p) weights after each update [kW], or (len(rows), p) with `rows`.

    Raises:
        ValueError: mu outside (0, 2), delta <= 0, or a scale not positive and finite.

    References:
        Widrow, B. & Hoff, M. E. (1960). Adaptive switching circuits. IRE WESCON Convention
        Record 4, 96-104 (the LMS rule); Nagumo, J. & Noda, A. (1967). A learning method for
        system identification. IEEE Trans. Automatic Control 12(3), 282-287 (normalized form).
    """
    if not 0.0 < mu < MU_MAX:
        raise ValueError(f"step size {mu:g} is outside the stable range 0 < mu < {MU_MAX:g}")
    if delta <= 0:
        raise ValueError("delta must be above 0")
    n, p = X.shape
    if scale is not None:
        scale = np.asarray(scale, dtype=float)
        if scale.shape != (p,) or not np.all(np.isfinite(scale) & (scale > 0)):
            raise ValueError("every per-weight scale must be above 0 and finite")
    keep = np.arange(n) if rows is None else np.asarray(rows, dtype=np.int64).reshape(-1)
    if rows is not None and len(keep) and (np.any(np.diff(keep) <= 0) or keep[0] < 0
                                           or keep[-1] >= n):
        raise ValueError("the rows to keep must be increasing indices of X's rows")
    W = np.empty((len(keep), p))
    w = np.array(w0, dtype=float)
    # The recursion is sequential; a plain loop of p-vector updates takes about 0.12 s for a
    # site-year of 15-minute data with 31 columns (measured), so no compiled code is needed.
    # The scaled rows and gains are made a chunk of rows at a time (row-wise, the same
    # numbers), so that a long series holds no second (n, p) array.
    wanted = keep.tolist()
    slot = 0
    nxt = wanted[0] if wanted else -1
    for a in range(0, n, _NLMS_CHUNK_ROWS):
        b = min(a + _NLMS_CHUNK_ROWS, n)
        Xc = X[a:b]
        XD = Xc if scale is None else Xc * scale
        gain = mu / (delta + np.einsum("ij,ij->i", Xc, XD))
        yc = y[a:b]
        for t in range(b - a):
            e = yc[t] - Xc[t] @ w
            w += (gain[t] * e) * XD[t]
            if a + t == nxt:
                W[slot] = w
                slot += 1
                nxt = wanted[slot] if slot < len(wanted) else -1
    return W


# Rows per chunk of nlms's scaled inputs and gains: bounds its temporary memory.
_NLMS_CHUNK_ROWS = 65536


def mean_gains(X: np.ndarray, delta: float) -> np.ndarray:
    """Mean per-coordinate update gain g_j = mean_t x_tj^2 / (delta + |x_t|^2).

    For small steps, coordinate j of the tracker forgets with time constant about
    1 / (mu g_j) intervals (a mean-gain approximation of the normalized LMS update).
    """
    return np.mean(X**2 / (delta + np.sum(X**2, axis=1))[:, None], axis=0)


def step_from_memory(X: np.ndarray, memory_intervals: float, delta: float,
                     active: np.ndarray | None = None) -> tuple[float, np.ndarray]:
    """Step size giving the typical tracked draw a memory of memory_intervals.

    mu = 1 / (memory x median_j g_j) over the columns in `active` (the equipment draws).

    Returns:
        (mu, per-column time constants [intervals] 1 / (mu g_j); inf where g_j = 0).
    """
    g = mean_gains(X, delta)
    sel = g[active] if active is not None else g
    sel = sel[sel > 0]
    typical = float(np.median(sel)) if len(sel) else float(np.median(g[g > 0]))
    mu = 1.0 / (memory_intervals * typical)
    with np.errstate(divide="ignore"):
        tau = np.where(g > 0, 1.0 / (mu * g), np.inf)
    return mu, tau


def column_rates(X: np.ndarray, scale: np.ndarray, mu: float, delta: float,
                 rows: np.ndarray | None = None) -> np.ndarray:
    """Mean per-interval forgetting rate of each column of the per-weight tracker.

    rho_j = mu mean_t d_j x_tj^2 / (delta + x_t . D x_t), the mean taken over the rows where
    rows[:, j] is True (all rows when rows is None). For small steps column j forgets with
    time constant about 1 / rho_j intervals of those rows (mean-gain approximation; the
    coupling between columns that run together is left out, tests/test_track.py measures it).

    Args:
        X: (n, p) inputs; scale: (p,) d; rows: (n, p) booleans or None.

    Returns:
        (p,) rates per interval; 0 where a column is never excited in its rows.
    """
    q = X**2 * scale
    share = q / (delta + q.sum(axis=1))[:, None]
    if rows is None:
        return mu * share.mean(axis=0)
    counts = rows.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(counts > 0, (share * rows).sum(axis=0) / np.maximum(counts, 1), 0.0)
    return mu * m


# Fixed-point iterations of scales_for_memory and the damping exponent of each update
# (a measured choice: 40 damped steps bring reachable targets within 0.1 %).
SCALE_ITERATIONS = 40
SCALE_DAMPING = 0.8
# Accept when every column's [exp(-A T)]_jj is within 0.2 % of 1/e in -log terms; rebuild
# the Gram part of A every few iterations.
SCALE_TOLERANCE = 2e-3
REBUILD_EVERY = 4
# The regularization delta of the per-weight form is 1 (in units of x . D x); the scales d
# carry the units of the data.
PER_WEIGHT_DELTA = 1.0


def step_for_rates(total_rate: float) -> float:
    """The step mu used for per-column rates adding up to total_rate [1/interval].

    The shares d_j x_j^2 / (delta + x . D x) of a row add up to less than 1, so the rates
    add up to less than mu: mu must exceed their sum, and it must stay below 2. mu = 1, the
    fastest step of the normalized form (references: Haykin, from memory), whenever the
    rates add up to 0.5 or less (any memory of days on 15-minute data); else twice their
    sum. A sum of 1 or more (2 x sum >= 2) cannot be tracked and is refused by the caller.
    """
    return max(1.0, 2.0 * total_rate)


def mean_update(X: np.ndarray, scale: np.ndarray, mu: float,
                delta: float = PER_WEIGHT_DELTA) -> np.ndarray:
    """The mean update matrix A = mu mean_t D x_t x_t' / (delta + x_t . D x_t).

    In the mean, the weight error of the per-weight tracker follows e <- (I - A) e per
    interval (independence assumption, small steps), so after a step of size s in column j's
    draw, column j's tracked weight has covered 1 - [exp(-A t)]_jj of it after t intervals.
    """
    XD = X * scale
    s = 1.0 / (delta + np.einsum("ij,ij->i", X, XD))
    return mu * (XD * s[:, None]).T @ X / max(len(X), 1)


def scales_for_memory(X: np.ndarray, memory_intervals: np.ndarray, mu: float,
                      row_sets: list[tuple[np.ndarray, np.ndarray]] | None = None,
                      delta: float = PER_WEIGHT_DELTA, calibrate: np.ndarray | None = None
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Per-weight scales d giving each column its own memory at step mu.

    The memory of column j is the time its tracked weight takes to cover 1 - 1/e of a step
    in its own draw, in the mean dynamics of `mean_update`: [exp(-A T_j)]_jj = 1/e (the
    diagonal through the eigenvectors of the symmetric D^(1/2) M D^(1/2), A = D M). This
    counts the coupling between columns that run together (the baseload columns share every
    row with every load), which the diagonal alone (the mean gain) leaves out. d is found by
    multiplicative fixed-point steps d_j <- d_j / k_j^0.8 with k_j = -ln [exp(-A T_j)]_jj
    (k_j = 1 at the target), started from the unnormalized solution
    d_j = delta / (mu T_j mean x_j^2). While x . D x is small against delta the update is
    plain LMS with the diagonal step matrix (mu / delta) D and each column's pace is set by
    its own d_j whatever its duty cycle; the normalization caps the step on rows where
    x . D x grows large, and keeps the stable range 0 < mu < 2 (module docstring).

    Args:
        X: (n, p) inputs [h]; memory_intervals: (p,) requested memories [intervals]; mu: the
            step, 0 < mu < 2; row_sets: (row indices, column indices) pairs: the memory of
            those columns is counted on those rows (e.g. each load's own reference period);
            None: every column on all rows. Columns in no set keep d = 1 / (mu mean x^2).
        calibrate: (p,) booleans, the columns whose memory is solved for (None: all); the
            others keep the unnormalized start d_j = delta / (mu T_j mean x_j^2), their
            memory only approximate (e.g. the 168 hour-of-week baseload levels).

    Returns:
        (d, achieved memories [intervals]; inf for a column never excited).
    """
    X = np.asarray(X, dtype=float)
    n, p = X.shape
    T = np.asarray(memory_intervals, dtype=float)
    if row_sets is None:
        row_sets = [(np.arange(n), np.arange(p))]
    power = np.zeros(p)
    owner = np.full(p, -1)
    for k, (r, cols) in enumerate(row_sets):
        sub = X[r]
        power[cols] = (sub[:, cols] ** 2).mean(axis=0) if len(r) else 0.0
        owner[cols] = k
    excited = power > 0
    solve = excited & (np.ones(p, dtype=bool) if calibrate is None
                       else np.asarray(calibrate, dtype=bool))
    safe_power = np.where(excited, power, 1.0)
    d = np.where(excited, delta / (mu * T * safe_power), delta / (mu * safe_power))
    achieved = np.full(p, np.inf)
    # A = D M with M = mu X' diag(g) X / n, g_t = 1 / (delta + x_t . D x_t). g moves little
    # between iterations (it is about 1 / delta while x . D x is small), so M is rebuilt
    # every REBUILD_EVERY iterations and always before convergence is accepted; on sparse
    # rows (differenced data) through a sparse product.
    subs = [_rows_matrix(X[r]) for r, _ in row_sets]
    M: dict[int, np.ndarray] = {}
    fresh = False
    for it in range(SCALE_ITERATIONS):
        fresh = it % REBUILD_EVERY == 0
        kappa = np.ones(p)
        for k, (r, cols) in enumerate(row_sets):
            cols = np.asarray(cols)
            cols = cols[excited[cols]]
            if not len(cols):
                continue
            if fresh or k not in M:
                M[k] = _weighted_gram(subs[k], X[r], d, mu, delta)
            # A = D M is similar to the symmetric B = D^(1/2) M D^(1/2) through a diagonal
            # matrix, so exp(-A T) and exp(-B T) have the same diagonal: one eigh serves
            # every memory.
            root = np.sqrt(d)
            lam, V = np.linalg.eigh(root[:, None] * M[k] * root[None, :])
            V2 = V**2
            for Tj in np.unique(T[cols]):
                these = cols[T[cols] == Tj]
                g = (V2[these] @ np.exp(-np.maximum(lam, 0.0) * Tj))
                kappa[these] = -np.log(np.clip(g, 1e-300, 1.0 - 1e-15))
        with np.errstate(divide="ignore"):
            achieved = np.where(excited, T / kappa, np.inf)
        if np.all(np.abs(kappa[solve] - 1.0) < SCALE_TOLERANCE):
            if fresh:
                break
            M.clear()  # confirm with g at the current d
            continue
        d = np.where(solve, d * kappa ** -SCALE_DAMPING, d)
    return d, achieved


def _rows_matrix(X: np.ndarray):
    """X as a sparse CSR matrix when at most a fifth of it is non-zero, else as it is."""
    if X.size and np.count_nonzero(X) <= 0.2 * X.size:
        return sparse.csr_matrix(X)
    return X


def _weighted_gram(Xs, X: np.ndarray, scale: np.ndarray, mu: float,
                   delta: float) -> np.ndarray:
    """mu X' diag(g) X / n with g_t = 1 / (delta + x_t . D x_t) (see mean_update)."""
    n = max(X.shape[0], 1)
    g = 1.0 / (delta + np.einsum("ij,ij->i", X, X * scale))
    if sparse.issparse(Xs):
        G = Xs.multiply(g[:, None]).tocsr()
        return mu * np.asarray((Xs.T @ G).todense()) / n
    return mu * (X * g[:, None]).T @ X / n


def weight_covariance(X: np.ndarray, scale: np.ndarray, mu: float, autocov: np.ndarray,
                      delta: float = PER_WEIGHT_DELTA) -> np.ndarray:
    """Steady-state covariance of the per-weight tracker's weights around their mean.

    Independence theory of LMS (Haykin, Adaptive Filter Theory, from memory): the weight
    error c_t = w_t - w* follows c <- (I - mu g D x x') c + mu g D x e with g = 1 /
    (delta + x . D x), so its covariance S solves the discrete Lyapunov equation
    S = (I - A) S (I - A)' + Q, A = `mean_update`, Q = mu^2 sum_l gamma_l mean_t
    g_t g_(t+l) D x_t x_(t+l)' D (symmetrized), gamma_l the residual autocovariance at lag l
    (differenced data have correlated neighbours). The coupling between columns that run
    together is in A's off-diagonal terms. A direction that no row excites keeps 0.

    Args:
        X: (n, p) inputs; scale: (p,) d; autocov: (L + 1,) residual autocovariances
            [kWh^2] at lags 0..L.

    Returns:
        (p, p) covariance [kW^2].
    """
    X = np.asarray(X, dtype=float)
    n, p = X.shape
    excited = np.flatnonzero(np.any(X != 0, axis=0))
    S = np.zeros((p, p))
    if not len(excited) or n == 0:
        return S
    Xe = X[:, excited]
    de = scale[excited]
    g = 1.0 / (delta + np.einsum("ij,ij->i", X, X * scale))
    G = Xe * de * g[:, None]  # rows: g_t D x_t
    A = mu * G.T @ Xe / n
    Q = np.zeros((len(excited), len(excited)))
    for lag, gamma in enumerate(np.asarray(autocov, dtype=float)):
        if lag >= n:
            break
        if lag == 0:
            Q += gamma * G.T @ G / n
        else:
            C = G[lag:].T @ G[:n - lag] / n
            Q += gamma * (C + C.T)
    Q *= mu**2
    F = (1.0 - 1e-9) * (np.eye(len(excited)) - A)
    S_e = solve_discrete_lyapunov(F, Q)
    S[np.ix_(excited, excited)] = (S_e + S_e.T) / 2.0
    return S


def recent_level(daily: np.ndarray, tau_days: float, lag_days: int) -> np.ndarray:
    """The tracked value with the tracker's lag taken out: the mean draw of the last days.

    A tracker that forgets with time constant tau is an exponential filter:
    w_t = a w_(t-L) + (1 - a) m_t, a = exp(-L / tau), where m_t is the exponentially
    weighted mean of the draw over the last L days only. So m_t = (w_t - a w_(t-L)) / (1 - a)
    follows a step fully once L days have passed, whatever came before (the first L days
    have no value: NaN). Its noise is larger than w_t's: see `recent_sd_factor`.

    Args:
        daily: (d, ...) tracked values per day; tau_days: time constant [d]; lag_days: L >= 1.
    """
    a = float(np.exp(-lag_days / tau_days)) if np.isfinite(tau_days) and tau_days > 0 else 1.0
    out = np.full(daily.shape, np.nan)
    if a >= 1.0 or lag_days >= len(daily):
        return out
    out[lag_days:] = (daily[lag_days:] - a * daily[:-lag_days]) / (1.0 - a)
    return out


def recent_levels(series: np.ndarray, first: int, tau_days: float,
                  lag_days: int) -> tuple[np.ndarray, np.ndarray]:
    """`recent_level` for rows first.. of a daily series, the lag cut to the rows before.

    Row i uses lag min(lag_days, i), so a short run (fewer days than the lag, the series
    starting with the start value) still gets a lag-free level, noisier the shorter the lag.

    Returns:
        (levels, sd factors `recent_sd_factor` of each row's lag); without a finite tau
        (a load never excited) the tracked values and factor 1.
    """
    idx = np.arange(first, len(series))
    if not (np.isfinite(tau_days) and tau_days > 0) or first < 1:
        return series[idx].astype(float), np.ones(len(idx))
    lag = np.minimum(lag_days, idx)
    a = np.exp(-lag / tau_days)
    level = (series[idx] - a * series[idx - lag]) / (1.0 - a)
    return level, np.sqrt((1.0 + a) / (1.0 - a))


def recent_sd_factor(tau_days: float, lag_days: int) -> float:
    """Standard deviation of `recent_level` over that of the tracked value.

    The tracked value averages with weights exp(-s / tau) (effective size 2 tau); the recent
    level with the same weights cut at L (effective size (sum w)^2 / sum w^2
    = 2 tau (1 - a) / (1 + a), a = exp(-L / tau)), so the ratio is sqrt((1 + a) / (1 - a)):
    1.47 at L = tau.
    """
    if not (np.isfinite(tau_days) and tau_days > 0):
        return np.inf
    a = float(np.exp(-lag_days / tau_days))
    return float(np.sqrt((1.0 + a) / (1.0 - a)))


def ewma_alarms(tracked: np.ndarray, reference: float, sd: float, threshold: float,
                L: float = EWMA_L) -> np.ndarray:
    """Alarm where the tracked draw is both statistically and practically away from reference.

    The tracked value is an exponentially weighted average of the data, so it is read as an
    EWMA control chart: alarm when |tracked - reference| > L sd and also > threshold x
    reference (the relative change the user cares about).

    Args:
        tracked: (d,) tracked draw per day [kW]; reference, sd: [kW]; threshold: fraction.

    Returns:
        (d,) booleans.
    """
    diff = np.abs(tracked - reference)
    return (diff > L * sd) & (diff > threshold * abs(reference))
