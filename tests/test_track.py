"""The normalized LMS tracker and the alarm rule (disagg.analyses.track) on arrays with known truth.

All data here is invented. Outside facts (docs/references.md section 4, LMS and normalized LMS):
- normalized LMS, w <- w + mu e x / (delta + x'x), is stable for 0 < mu < 2 [read, vendor DSP
  documentation; Haykin, Adaptive Filter Theory, normalized LMS chapter: from memory];
- plain LMS, w <- w + mu e x (this convention, not Widrow & Stearns' 2 mu), converges for
  0 < mu < 2 / lambda_max(R), practically 0 < mu < 2 / trace(R) [read, DSP textbook, adaptive
  filtering chapter; Haykin: from memory];
- LMS misadjustment (excess over the minimum mean-square error, as a fraction of it)
  M = mu trace(R) / (2 - mu trace(R)) in this convention; with every row of the same norm,
  normalized LMS is plain LMS with step mu / |x|^2, so M = mu / (2 - mu) [Haykin, from memory].
"""

from __future__ import annotations

import numpy as np
import pytest

from disagg.analyses.track import EWMA_L, MU_MAX, ewma_alarms, mean_gains, nlms, step_from_memory

# Normalized LMS stable range 0 < mu < 2 (docs/references.md section 4; Haykin, from memory).
NLMS_MU_BOUND = 2.0
# Plain LMS: stable for mu < 2 / trace(R) (docs/references.md section 4, DSP textbook [read]).
LMS_BOUND_NUMERATOR = 2.0
# Misadjustment of normalized LMS on rows of equal norm: M = mu / (2 - mu) (Haykin, from
# memory; see the module docstring).
DELTA = 1e-6
INTERVALS_PER_DAY = 96


def _onoff_design(n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Equipment-hours per 15-minute interval: a constant baseload column and two on/off loads
    that run together more often than not (correlated columns, rows of unequal norm)."""
    rng = np.random.default_rng(seed)
    a = rng.random(n) < 0.4
    b = np.where(a, rng.random(n) < 0.7, rng.random(n) < 0.2)
    X = 0.25 * np.column_stack([np.ones(n), a, b]).astype(float)
    w_true = np.array([20.0, 60.0, 7.5])  # baseload, chiller-like, pump-like [kW]
    y = X @ w_true + rng.normal(0.0, 0.5, n)  # [kWh]
    return X, y, w_true, np.linalg.lstsq(X, y, rcond=None)[0]


def test_the_stable_range_is_the_published_one():
    assert MU_MAX == NLMS_MU_BOUND


def test_started_far_away_the_long_run_mean_is_the_batch_least_squares_solution():
    n, mu = 40_000, 0.05
    X, y, _, w_ls = _onoff_design(n, seed=1)
    W = nlms(X, y, np.zeros(3), mu, DELTA)
    second = W[n // 2:]
    mean = second.mean(axis=0)
    # Tolerance by batch means: 20 blocks of 1000 steps, each much longer than the slowest
    # time constant 1 / (mu g_j) (about 130 steps here), so block means are close to
    # independent; the standard error of the overall mean is sd(block means) / sqrt(20), and
    # 4 of them bound a normal error with probability 0.99994.
    tau = 1.0 / (mu * mean_gains(X, DELTA))
    blocks = 20
    block_len = len(second) // blocks
    assert block_len > 5 * tau.max()
    block_means = second[:blocks * block_len].reshape(blocks, block_len, 3).mean(axis=1)
    se = block_means.std(axis=0, ddof=1) / np.sqrt(blocks)
    tol = 4.0 * se
    # Measured: |mean - w_ls| / se = 0.50, 1.18, 1.53; se = 0.017, 0.027, 0.029 kW.
    np.testing.assert_array_less(np.abs(mean - w_ls), tol)
    # The start (zero) was far away in units of the tolerance (measured 65 to 300 of them):
    # the check is not vacuous.
    assert np.all(np.abs(w_ls) > 50 * tol)


def test_started_at_the_batch_solution_it_stays_near_it_without_burn_in():
    n = 40_000
    X, y, _, w_ls = _onoff_design(n, seed=1)
    mu, _ = step_from_memory(X, 30 * INTERVALS_PER_DAY, DELTA)  # a 30-day memory
    W = nlms(X, y, w_ls, mu, DELTA)
    deviation = np.abs(W / w_ls - 1.0)
    # Measured: at most 0.95 %, 0.17 %, 1.8 % of the draw over 417 days; on the first day
    # 0.16 %, 0.03 %, 0.16 %. A 10 % drift threshold is far above this.
    assert deviation.max() < 0.03
    assert deviation[:INTERVALS_PER_DAY].max() < 0.005
    # Started from zero instead, the end of the first day is nowhere near (measured 71 %,
    # 96 %, 77 % off): starting from the batch fit is what removes the burn-in.
    cold = nlms(X, y, np.zeros(3), mu, DELTA)
    assert np.abs(cold[INTERVALS_PER_DAY - 1] / w_ls - 1.0).min() > 0.5


@pytest.mark.parametrize("mu", [0.2, 0.5])
def test_steady_state_excess_error_is_the_published_misadjustment(mu):
    # Rows of equal norm with random signs: the case where M = mu / (2 - mu) holds as stated.
    rng = np.random.default_rng(3)
    n, p, noise_sd = 100_000, 4, 0.5
    X = 0.25 * rng.choice([-1.0, 1.0], (n, p))
    w_true = np.arange(1.0, p + 1)
    y = X @ w_true + rng.normal(0.0, noise_sd, n)
    W = nlms(X, y, w_true, mu, DELTA)
    excess = np.einsum("ij,ij->i", X[1:], W[:-1] - w_true)  # a-priori error minus the noise
    ratio = np.mean(excess**2) / noise_sd**2 / (mu / (2.0 - mu))
    # Measured over 10 seeds: ratio 0.998 +- 0.009 (mu = 0.2), 0.999 +- 0.006 (mu = 0.5). A
    # wrong normalization (|x| instead of |x|^2) would give a ratio of about 0.45 here.
    assert ratio == pytest.approx(1.0, abs=0.05)


@pytest.mark.parametrize("mu", [2.0, 2.5, 0.0, -0.1])
def test_a_step_outside_the_stable_range_is_refused(mu):
    X = np.ones((3, 2))
    with pytest.raises(ValueError) as exc:
        nlms(X, np.ones(3), np.zeros(2), mu, DELTA)
    assert str(exc.value) == f"step size {mu:g} is outside the stable range 0 < mu < 2"


def test_delta_must_be_positive():
    with pytest.raises(ValueError, match="^delta must be above 0$"):
        nlms(np.ones((3, 2)), np.ones(3), np.zeros(2), 1.0, 0.0)


def _one_direction_rows(n: int, seed: int) -> np.ndarray:
    """Worst case: every row along one direction, alternating signs, norms from 1e-3 to 1e3."""
    rng = np.random.default_rng(seed)
    u = np.array([0.6, 0.0, 0.8])
    scale = 10.0 ** rng.uniform(-3, 3, n)
    sign = np.where(np.arange(n) % 2 == 0, 1.0, -1.0)
    return (sign * scale)[:, None] * u[None, :]


def test_just_below_the_bound_the_tracker_stays_bounded_on_a_worst_case_input():
    n = 20_000
    w_true = np.array([60.0, 7.5, 11.0])
    w0 = np.zeros(3)
    for X in (_one_direction_rows(n, seed=4),
              # also rows in random directions with the same spread of norms
              _one_direction_rows(n, seed=5)[:, :1] * np.random.default_rng(6).normal(size=(n, 3))):
        y = X @ w_true  # noise-free
        W = nlms(X, y, w0, 1.99, DELTA)
        assert np.all(np.isfinite(W))
        # Each update multiplies the weight error by I - mu x x' / (delta + x'x), whose
        # eigenvalues lie in (1 - mu, 1] within (-1, 1] for 0 < mu < 2: the error never grows.
        dist = np.linalg.norm(W - w_true, axis=1)
        start = np.linalg.norm(w0 - w_true)
        assert dist.max() <= start * (1 + 1e-12)
    # Along the excited direction it even converges (the other directions cannot be seen).
    u = np.array([0.6, 0.0, 0.8])
    X = _one_direction_rows(n, seed=4)
    W = nlms(X, X @ w_true, w0, 1.99, DELTA)
    assert abs((W[-1] - w_true) @ u) < 1e-6 * abs(w_true @ u)


def _plain_lms(X: np.ndarray, y: np.ndarray, w0: np.ndarray, mu: float) -> np.ndarray:
    """Unnormalized LMS (Widrow-Hoff), w <- w + mu e x, for comparison."""
    w = np.array(w0, dtype=float)
    out = np.empty_like(X)
    for t in range(len(y)):
        w = w + mu * (y[t] - X[t] @ w) * X[t]
        out[t] = w
    return out


def test_plain_lms_diverges_beyond_two_over_the_input_power_but_normalized_lms_does_not():
    n = 300
    u = np.array([0.6, 0.0, 0.8])
    X = np.where(np.arange(n) % 2 == 0, 10.0, -10.0)[:, None] * u[None, :]  # |x|^2 = 100
    w_true = np.array([60.0, 7.5, 11.0])
    y = X @ w_true
    w0 = np.zeros(3)
    # Here R = E[x x'] = 100 u u', so lambda_max = trace(R) = 100 and both bounds are 0.02.
    bound = LMS_BOUND_NUMERATOR / 100.0
    start = abs((w0 - w_true) @ u)
    above = _plain_lms(X, y, w0, 1.05 * bound)
    below = _plain_lms(X, y, w0, 0.95 * bound)
    # The error along u is multiplied by 1 - mu |x|^2 each step: -1.1 above, -0.9 below.
    assert abs((above[-1] - w_true) @ u) > 1e6 * start
    assert abs((below[-1] - w_true) @ u) < 1e-6 * start
    W = nlms(X, y, w0, 1.99, DELTA)
    assert np.linalg.norm(W - w_true, axis=1).max() <= np.linalg.norm(w0 - w_true) * (1 + 1e-12)


def _time_to_1_minus_1_over_e(X: np.ndarray, column: int, memory: float) -> tuple[int, float]:
    """Intervals the tracked weight of `column` takes to cover 1 - 1/e of a noise-free step."""
    n, p = X.shape
    mu, tau = step_from_memory(X, memory, DELTA, np.array([column]))
    w = np.full(p, 10.0)
    t0 = n // 4
    truth = np.tile(w, (n, 1))
    truth[t0:, column] += 5.0
    W = nlms(X, np.einsum("ij,ij->i", X, truth), w, mu, DELTA)
    reached = W[t0:, column] >= 10.0 + 5.0 * (1.0 - np.exp(-1.0))
    assert reached.any()
    assert tau[column] == pytest.approx(memory)
    return int(np.argmax(reached)) + 1, mu


@pytest.mark.parametrize("days", [10, 30])
def test_memory_becomes_the_measured_time_constant_on_equal_norm_rows(days):
    # A column excited in every row, beside uncorrelated +-0.25 h columns, all rows of equal
    # norm: the mean-gain conversion is exact in expectation here.
    rng = np.random.default_rng(7)
    n, p = 40_000, 8
    X = 0.25 * np.column_stack([np.ones(n), rng.choice([-1.0, 1.0], (n, p - 1))])
    memory = days * INTERVALS_PER_DAY
    steps, _ = _time_to_1_minus_1_over_e(X, 0, memory)
    # Measured over 10 seeds of this design at 10 and 30 days: factor 0.998-1.004 (other
    # designs, 2 to 31 columns and 200 to 2880 intervals: 0.98-1.02; at 50 intervals and 31
    # columns, 0.88: the approximation needs many intervals per memory).
    assert steps / memory == pytest.approx(1.0, abs=0.03)


def test_memory_on_on_off_hours_is_a_little_slower_than_requested():
    # The realistic case: a baseload column and five on/off loads (rows of unequal norm,
    # columns correlated through the constant). Measured over 10 seeds of this design at 10
    # and 30 days: factor 1.13-1.26 for the constant column, 1.19-1.30 for a load (other
    # on/off designs: 1.02-1.38): the mean-gain conversion understates the memory by up to
    # about 40 %.
    rng = np.random.default_rng(8)
    n = 60_000
    X = 0.25 * np.column_stack([np.ones(n), rng.random((n, 5)) < 0.3])
    memory = 30 * INTERVALS_PER_DAY
    for column in (0, 1):
        steps, _ = _time_to_1_minus_1_over_e(X, column, memory)
        assert 0.95 <= steps / memory <= 1.5, (column, steps / memory)


def test_ewma_alarms_need_both_a_significant_and_a_practical_change():
    assert EWMA_L == 3.0  # L = 3: common practice (Montgomery, from memory)
    reference, threshold = 10.0, 0.10
    tracked = np.array([10.0, 10.2, 10.5, 11.01, 8.9, 9.0, 11.0, 9.5])
    # Narrow band (3 sd = 0.3 kW): the 10 % threshold (1.0 kW, exclusive) decides.
    np.testing.assert_array_equal(
        ewma_alarms(tracked, reference, 0.1, threshold),
        [False, False, False, True, True, False, False, False])
    # Wide band (3 sd = 1.5 kW): a 10 % change is not yet significant.
    np.testing.assert_array_equal(
        ewma_alarms(np.array([10.0, 11.2, 11.6, 8.4, 8.6]), reference, 0.5, threshold),
        [False, False, True, True, False])
    # Another L.
    np.testing.assert_array_equal(
        ewma_alarms(np.array([11.2, 11.6]), reference, 0.5, threshold, L=2.0), [True, True])
    # Zero band (a load never excited): only the threshold counts.
    np.testing.assert_array_equal(
        ewma_alarms(np.array([10.9, 11.1]), reference, 0.0, threshold), [False, True])


# --- the per-weight form (a diagonal step matrix) ----------------------------------------

from disagg.analyses.track import (PER_WEIGHT_DELTA, mean_update, recent_level,  # noqa: E402
                          recent_sd_factor, scales_for_memory)


def _cycling(n: int, on: float, off: float, rng: np.random.Generator) -> np.ndarray:
    """On/off spells with geometric lengths (mean on and off lengths in intervals)."""
    out = np.zeros(n)
    i, state = 0, 0
    while i < n:
        length = int(rng.geometric(1.0 / (on if state else off)))
        out[i:i + length] = state
        i += length
        state = 1 - state
    return out


# (mean on, mean off) spell lengths: duty cycles of about 3 %, 17 %, 50 % and 83 %.
SPELLS = [(2, 60), (4, 20), (6, 6), (20, 4)]


def _duty_design(n: int, seed: int) -> np.ndarray:
    """Four cycling loads of very different duty, and occupied/unoccupied baseload hours."""
    rng = np.random.default_rng(seed)
    H = 0.25 * np.column_stack([_cycling(n, a, b, rng) for a, b in SPELLS])
    occupied = 0.25 * ((np.arange(n) % 96 >= 28) & (np.arange(n) % 96 < 76))
    return np.column_stack([H, occupied, 0.25 - occupied])


def _crossing(X, w, column, mu, d, starts) -> float:
    """Intervals the mean tracked response of `column` takes to cover 1 - 1/e of a
    noise-free +50 % step in its draw, averaged over steps at the given start rows (the
    memory is defined for the mean dynamics; one step's crossing depends on that stretch's
    spells)."""
    length = min(len(X) - t0 for t0 in starts)
    response = np.zeros(length)
    for t0 in starts:
        truth = np.tile(w, (len(X), 1))
        truth[t0:, column] *= 1.5
        W = nlms(X[t0 - 1:], np.einsum("ij,ij->i", X, truth)[t0 - 1:], w, mu,
                 PER_WEIGHT_DELTA, d)
        response += (W[1:length + 1, column] / w[column] - 1.0) / 0.5
    response /= len(starts)
    reached = response >= 1.0 - np.exp(-1.0)
    assert reached.any()
    return float(np.argmax(reached)) + 1.0


@pytest.mark.parametrize("seed", [3])
def test_per_weight_memory_is_reached_whatever_the_duty_cycle(seed):
    # Noise-free data, so the response is the tracker's own dynamics; started at the truth
    # at each of 8 step times and averaged. The scales are solved in the mean dynamics
    # (independence assumption). Measured on seeds 1-5 at 10 and 30 days: a single step's
    # crossing varies 0.65-1.29 x the memory (mostly the 3 % load, excited only ~30 times in
    # 10 days); the mean over 8 steps measured 0.93-1.20 x the memory over the 6 columns,
    # seeds 1-5 and both memories (1.20: the 3 % load at 10 days; 0.97-1.09 at 30 days).
    # Tolerance 0.8-1.25: the measured spread plus a margin (no source). The plain
    # normalized form misses by far more (below).
    X = _duty_design(96 * 300, seed)
    duty = (X[:, :4] > 0).mean(axis=0)
    assert duty.min() < 0.05 and duty.max() > 0.8
    w = np.array([10.0, 20.0, 30.0, 40.0, 15.0, 8.0])
    starts = [96 * (20 + 25 * i) for i in range(8)]
    for days in (10, 30):
        memory = days * INTERVALS_PER_DAY
        d, achieved = scales_for_memory(X, np.full(6, memory), 1.0)
        np.testing.assert_allclose(achieved, memory, rtol=0.01)
        for column in range(6):
            factor = _crossing(X, w, column, 1.0, d, starts) / memory
            assert 0.8 <= factor <= 1.25, (days, column, factor)
    # The plain normalized form with one step for all cannot do this: at the step giving
    # the typical load a 30-day mean-gain memory, the 3 % load is far slower than the 83 %
    # one (measured on seeds 1-5: the 3 % load does not reach 1 - 1/e of a single step
    # within 10 memories, the 83 % one after 0.65-0.70 memories).
    mu, _ = step_from_memory(X, 30 * INTERVALS_PER_DAY, DELTA, np.arange(4))
    rare = _plain_crossing(X, w, 0, mu)
    busy = _plain_crossing(X, w, 3, mu)
    assert rare > 4.0 * busy


def _plain_crossing(X, w, column, mu) -> int:
    truth = np.tile(w, (len(X), 1))
    t0 = len(X) // 4
    truth[t0:, column] *= 1.5
    W = nlms(X, np.einsum("ij,ij->i", X, truth), w, mu, DELTA)
    reached = W[t0:, column] >= w[column] * (1.0 + 0.5 * (1.0 - np.exp(-1.0)))
    return int(np.argmax(reached)) + 1 if reached.any() else len(X)


def test_per_weight_tracker_converges_to_least_squares_on_stationary_data():
    rng = np.random.default_rng(11)
    n = 96 * 500
    X = _duty_design(n, 11)
    w_true = np.array([10.0, 20.0, 30.0, 40.0, 15.0, 8.0])
    y = X @ w_true + rng.normal(0.0, 0.5, n)
    w_ls = np.linalg.lstsq(X, y, rcond=None)[0]
    d, achieved = scales_for_memory(X, np.full(6, 5 * INTERVALS_PER_DAY), 1.0)
    W = nlms(X, y, np.zeros(6), 1.0, PER_WEIGHT_DELTA, d)
    second = W[n // 2:]
    # Batch means as in the plain test above: 20 blocks, each at least 2 memories long.
    blocks = 20
    block_len = len(second) // blocks
    assert block_len >= 2 * achieved.max()
    block_means = second[:blocks * block_len].reshape(blocks, block_len, 6).mean(axis=1)
    se = block_means.std(axis=0, ddof=1) / np.sqrt(blocks)
    np.testing.assert_array_less(np.abs(second.mean(axis=0) - w_ls), 4.0 * se)
    assert np.all(np.abs(w_ls) > 10 * 4.0 * se)  # started far away: not vacuous


def test_per_weight_update_never_grows_the_error_in_its_own_metric_below_the_bound():
    # The per-weight form is normalized LMS on u = D^(1/2) x, v = D^(-1/2) w: each update
    # multiplies the error of v by I - mu u u' / (delta + u'u), eigenvalues in (1 - mu, 1],
    # so |D^(-1/2) (w - w*)| never grows for 0 < mu < 2, for any fixed positive D.
    rng = np.random.default_rng(12)
    n = 20_000
    X = _one_direction_rows(n, seed=4)[:, :1] * rng.normal(size=(n, 3))
    w_true = np.array([60.0, 7.5, 11.0])
    for d in (np.array([1e-3, 1.0, 1e3]), 10.0 ** rng.uniform(-4, 4, 3)):
        W = nlms(X, X @ w_true, np.zeros(3), 1.99, PER_WEIGHT_DELTA, d)
        dist = np.linalg.norm((W - w_true) / np.sqrt(d), axis=1)
        start = np.linalg.norm(w_true / np.sqrt(d))
        assert np.all(np.diff(np.r_[start, dist]) <= 1e-9 * dist.max())
    # Beyond the bound (nlms refuses it, so the update is written out here) the error grows:
    # rows of norm 10 along one direction, D = diag(d): each step multiplies the error along
    # it by 1 - mu u'u / (delta + u'u), about -1.5 at mu = 2.5 and -0.99 at mu = 1.99.
    d = np.array([0.5, 2.0, 8.0])
    u_dir = np.array([0.6, 0.0, 0.8])
    rows = 10.0 * np.where(np.arange(300) % 2 == 0, 1.0, -1.0)[:, None] * u_dir

    def error_after(mu):
        w = np.zeros(3)
        for x in rows:
            w = w + mu * (x @ w_true - x @ w) * (d * x) / (PER_WEIGHT_DELTA + x @ (d * x))
        return abs((w - w_true) @ u_dir)

    start_error = abs(w_true @ u_dir)
    assert error_after(2.5) > 1e6 * start_error
    assert error_after(1.99) < start_error


@pytest.mark.parametrize("scale", [[1.0, 0.0, 1.0], [1.0, -1.0, 1.0], [1.0, np.inf, 1.0],
                                   [1.0, 1.0]])
def test_a_scale_not_positive_and_finite_is_refused(scale):
    with pytest.raises(ValueError, match="^every per-weight scale must be above 0 and finite$"):
        nlms(np.ones((3, 3)), np.ones(3), np.zeros(3), 1.0, 1.0, np.array(scale))


@pytest.mark.parametrize("mu", [2.0, 0.0])
def test_the_per_weight_form_keeps_the_refusal_outside_the_stable_range(mu):
    with pytest.raises(ValueError, match="outside the stable range 0 < mu < 2"):
        nlms(np.ones((3, 2)), np.ones(3), np.zeros(2), mu, 1.0, np.ones(2))


def test_mean_update_is_the_average_of_the_rows_updates():
    X = _duty_design(500, 3)
    d = np.linspace(0.5, 2.0, 6)
    A = mean_update(X, d, 0.7)
    by_hand = sum(0.7 * np.outer(d * x, x) / (1.0 + x @ (d * x)) for x in X) / len(X)
    np.testing.assert_allclose(A, by_hand, rtol=1e-12)


def test_recent_level_takes_the_lag_out_of_an_exponential_filter():
    tau, days, step_day = 20.0, 200, 100
    draw = np.where(np.arange(days) >= step_day, 11.5, 10.0)
    a = np.exp(-1.0 / tau)
    tracked = np.empty(days)
    w = 10.0
    for t in range(days):  # a daily exponential filter with time constant tau
        w = a * w + (1 - a) * draw[t]
        tracked[t] = w
    lag = 20
    level = recent_level(tracked, tau, lag)
    assert np.isnan(level[:lag]).all()
    # Exact once the last `lag` days all lie after the step; the filter itself is still
    # 1 - e^-1 short of the step there.
    np.testing.assert_allclose(level[step_day + lag - 1:], 11.5, rtol=1e-12)
    assert tracked[step_day + lag - 1] < 11.5 - 0.3
    np.testing.assert_allclose(level[lag:step_day], 10.0, rtol=1e-12)
    # sqrt((1 + e^-1) / (1 - e^-1)) at lag = tau.
    assert recent_sd_factor(tau, 20) == pytest.approx(np.sqrt((1 + np.exp(-1)) / (1 - np.exp(-1))))


def test_weight_covariance_matches_the_simulated_spread_of_the_weights():
    # Independence theory against simulation: stationary data, white noise (sd 0.5 kWh),
    # started at the truth; the weights' spread over 400 days at a 5-day memory.
    from disagg.analyses.track import weight_covariance
    rng = np.random.default_rng(21)
    n = 96 * 400
    X = _duty_design(n, 21)
    w = np.array([10.0, 20.0, 30.0, 40.0, 15.0, 8.0])
    y = X @ w + rng.normal(0.0, 0.5, n)
    d, _ = scales_for_memory(X, np.full(6, 5 * INTERVALS_PER_DAY), 1.0)
    W = nlms(X, y, w, 1.0, PER_WEIGHT_DELTA, d)
    simulated = np.sqrt(np.mean((W - w) ** 2, axis=0))
    predicted = np.sqrt(np.diag(weight_covariance(X, d, 1.0, np.array([0.25]))))
    # 400 days hold 80 memories: the simulated sd is known to about 1 / sqrt(2 x 80) = 8 %.
    # Measured ratios simulated / predicted: 0.93-1.03 on this seed; 0.89-1.25 over seeds
    # 21-23 (1.25: the 3 % load, whose weight moves seldom, so its spread is known least).
    # Tolerance 25 %.
    ratio = simulated / predicted
    assert np.all(np.abs(ratio - 1.0) < 0.25), ratio
    assert predicted.min() > 0
