"""Clock offset between the run logs and the meter: the shift that best explains the meter.

Building automation clocks are often minutes off the utility meter's. Every run-log segment is
shifted by each candidate offset, aligned with the meter intervals, and the meter energy is
fitted by non-negative least squares on the equipment-hours and the baseload columns; the
offset with the smallest residual sum of squares is the estimate. This is a search, not the
reported fit: no prior, no weather columns.

Sign convention: the offset is the number of minutes to ADD to the run-log times to put them
on the meter's clock, as ``disagg.inputs.readers.read_runlog(..., offset_min=...)`` applies it. A log
whose clock runs 7 minutes behind the meter's (it records 10:00 for what the meter calls
10:07) has an offset of +7.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field

import numpy as np
import polars as pl

from disagg.errors import InputError
from disagg.fit.align import Aligned, align, probe_rss
from disagg.fit.design import BaseloadBuilder
from disagg.fit.solvers import solve_regularized
from disagg.inputs.config import SiteConfig
from disagg.inputs.readers import MeterData, RunLog, Segments

NS_PER_MIN = 60_000_000_000
# The curve is flat (no offset claimed) when its best RSS is within this fraction of its worst
# (common practice, no source: this project's choice of a 1 % contrast).
FLAT_CONTRAST = 0.01
# A second local minimum is ambiguous when it sits within this fraction of the curve's range
# above the best, and a separate minimum only when the curve rises between them by at least
# PROMINENCE_FRACTION of the range (project choices, no source).
AMBIGUOUS_FRACTION = 0.10
PROMINENCE_FRACTION = 0.05
# The plateau is the offsets around the best whose RSS is within this fraction of the curve's
# range above the best: how sharp the minimum is, in minutes (project choice, no source).
PLATEAU_FRACTION = 0.05
# Sub-minute refinement: a finer grid of this step [min] over one coarse step either side.
FINE_STEP_MIN = 0.25
# Fewest intervals, covered by the log at every candidate offset, that the search needs.
MIN_INTERVALS = 96


@dataclass
class OffsetResult:
    """The clock-offset search and its verdict.

    best_offset_min: minutes to add to run-log times to match the meter clock [min] (the
        refined minimum; on a flat curve it is still the argmin, but `clear` is False).
    table: one row per candidate, sorted by offset: offset_min [min], rss_kwh2 [kWh^2],
        r2 (fraction 0..1), grid (True for the coarse grid, False for the refinement).
    rss_best_kwh2, rss_zero_kwh2, rss_worst_kwh2: RSS at the best offset, with no shift, and
        the worst over the coarse grid [kWh^2].
    contrast: (worst - best) / worst over the coarse grid, fraction 0..1.
    plateau_min: (low, high) span of coarse offsets around the best whose RSS is within
        PLATEAU_FRACTION of the range above the best [min].
    second_offset_min, second_rss_kwh2: the best separate local minimum other than the
        global one on the coarse grid (None if there is none) [min], [kWh^2].
    flat, at_edge, ambiguous: the sharpness checks; clear: none of them fired.
    n_intervals: meter intervals scored at every offset (read and covered by the log).
    verdict: the finding in plain words.
    """

    best_offset_min: float
    table: pl.DataFrame
    rss_best_kwh2: float
    rss_zero_kwh2: float
    rss_worst_kwh2: float
    contrast: float
    plateau_min: tuple[float, float]
    second_offset_min: float | None
    second_rss_kwh2: float | None
    flat: bool
    at_edge: bool
    ambiguous: bool
    n_intervals: int
    window_min: float
    step_min: float
    verdict: str
    notes: list[str] = field(default_factory=list)

    @property
    def clear(self) -> bool:
        return not (self.flat or self.at_edge or self.ambiguous)


def shift_runlog(runlog: RunLog, offset_min: float) -> RunLog:
    """A copy of the run log with every segment moved later by offset_min [min]."""
    off = np.int64(round(offset_min * NS_PER_MIN))
    segs = {k: Segments(s.start_ns + off, s.end_ns + off, s.value)
            for k, s in runlog.segments.items()}
    return RunLog(segs, runlog.path, runlog.rows_read, list(runlog.notes))


def _rss(X: np.ndarray, y: np.ndarray) -> float:
    """Residual sum of squares of the non-negative least-squares fit of y on X [y^2].

    Non-negative because no draw and no baseload level can be below zero: without the bound a
    shift that turns a regularly cycling load's on-spells into its off-spells would fit as
    well as the true one, with a negative draw.

    References:
        Lawson & Hanson (1974), Solving Least Squares Problems, ch. 23 (scipy.optimize.nnls).
    """
    from scipy.optimize import (
        nnls,  # imported here: the breakdown's quick test needs no scipy
    )

    _, rnorm = nnls(X, y)
    return float(rnorm) ** 2


def _rss_quick(X: np.ndarray, y: np.ndarray) -> float:
    """_rss with this project's bounded solver (disagg.fit.solvers.solve_regularized without a
    penalty, bounds at 0): the same non-negative least squares, without importing scipy."""
    zeros = np.zeros(X.shape[1])
    b = solve_regularized(X, y, zeros, zeros, zeros)
    return float(((y - X @ b) ** 2).sum())


def _grid(window_min: float, step_min: float) -> np.ndarray:
    k = math.floor(window_min / step_min + 1e-9)
    grid = step_min * np.arange(-k, k + 1)
    if window_min - k * step_min > 1e-9:  # the window's ends are always searched
        grid = np.concatenate(([-window_min], grid, [window_min]))
    return np.round(grid, 9)


def _parabola_vertex(x: np.ndarray, y: np.ndarray) -> float | None:
    """Vertex of the parabola through three equally spaced points, if it opens upward."""
    h = x[1] - x[0]
    curv = y[0] - 2 * y[1] + y[2]
    if curv <= 0:
        return None
    return float(x[1] + 0.5 * h * (y[0] - y[2]) / curv)


def estimate_log_offset(site: SiteConfig, meter: MeterData, runlog: RunLog,
                        window_min: float = 30.0, step_min: float = 1.0) -> OffsetResult:
    """Minutes to add to the run-log times so that they best explain the meter.

    For each offset on a grid of step_min over [-window_min, +window_min] the run-log segments
    are shifted, aligned with the meter intervals (disagg.fit.align.align) and the interval energy
    is fitted by non-negative least squares on [equipment-hours, baseload columns]; the score is
    the residual sum of squares (RSS). Every offset is scored on the same intervals: those with
    a reading that the log covers at every candidate offset, so that a shift does not win by
    dropping intervals. Around the best grid point a finer grid (FINE_STEP_MIN) over one coarse
    step either side is scored and a parabola through the best fine point and its neighbours
    gives the sub-grid estimate.

    Sharpness checks: `flat` when the best RSS is within FLAT_CONTRAST of the worst;
    `at_edge` when the best grid point is an end of the window (the true offset may lie
    beyond it); `ambiguous` when another separate local minimum is nearly as good.

    Args:
        site: the site settings (equipment exponents, baseload profile, time zone).
        meter: the meter intervals.
        runlog: the run log as read (offset 0).
        window_min: largest offset searched either way [min], > 0.
        step_min: grid step [min], > 0 and at most window_min.

    Returns:
        The estimate, the RSS table and the verdict.

    Raises:
        ValueError: window_min or step_min not a positive finite number, or step > window.
        InputError: fewer than MIN_INTERVALS meter intervals with a reading are covered by
            the log at every offset.
    """
    for name, value in (("window_min", window_min), ("step_min", step_min)):
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
            raise ValueError(f"{name} = {value!r}: expected a number of minutes above 0")
    if step_min > window_min:
        raise ValueError(f"step_min = {step_min:g} is larger than window_min = {window_min:g}; "
                         "expected a step no larger than the window")

    first = align(site, meter, runlog)
    frame = first.frame
    y_all = frame["energy_kwh"].to_numpy().astype(float)
    # The declared profile's columns of the intervals the unmoved log covers (the builder's):
    # every scored interval is one of them, offset 0 being on the grid. at[i]: interval i's
    # row among them.
    if first.use.any():
        base, _ = BaseloadBuilder.declared(site, first)
    else:
        base = np.empty((0, 1))
    at = np.cumsum(first.use) - 1

    hours: dict[float, np.ndarray] = {}
    use: dict[float, np.ndarray] = {}

    def run(offsets: np.ndarray) -> None:
        for off in offsets:
            off = float(off)
            if off in hours:
                continue
            a = first if off == 0.0 else align(site, meter, shift_runlog(runlog, off))
            hours[off] = a.hours
            use[off] = a.use

    def score(offsets: list[float], mask: np.ndarray) -> np.ndarray:
        y = y_all[mask]
        b = base[at[mask]]
        return np.array([_rss(np.column_stack([hours[o][mask], b]), y) for o in offsets])

    def common(offsets) -> np.ndarray:
        mask = np.ones(frame.height, dtype=bool)
        for o in offsets:
            mask &= use[o]
        return mask

    grid = _grid(float(window_min), float(step_min))
    run(grid)
    mask = common(grid)
    if mask.sum() < MIN_INTERVALS:
        raise InputError(
            f"{runlog.path}: only {int(mask.sum())} meter intervals with a reading are covered "
            f"by the run log at every offset within +-{window_min:g} min; expected at least "
            f"{MIN_INTERVALS} to estimate the clock offset (check that the log and the meter "
            "cover the same period, or narrow the window)")
    rss_grid = score(list(grid), mask)
    i_best = int(np.argmin(rss_grid))

    # Finer grid over one coarse step either side of the best grid point, inside the window.
    lo = max(grid[i_best] - step_min, -window_min)
    hi = min(grid[i_best] + step_min, window_min)
    fine = np.round(np.arange(lo, hi + 1e-9, min(FINE_STEP_MIN, step_min)), 9)
    run(fine)
    on_grid = {float(g) for g in grid}
    offsets = sorted(on_grid | {float(o) for o in fine})
    narrower = mask & common(fine)
    if np.array_equal(narrower, mask):  # the grid's scores stand; score only the new offsets
        done = dict(zip((float(g) for g in grid), rss_grid))
        new = [o for o in offsets if o not in done]
        rss_new = score(new, mask)
        done.update(zip(new, rss_new))
        rss_all = np.array([done[o] for o in offsets])
    else:
        mask = narrower
        rss_all = score(offsets, mask)
    y_used = y_all[mask]
    tss = float(((y_used - y_used.mean()) ** 2).sum())
    r2_all = 1.0 - rss_all / tss if tss > 0 else np.full(len(rss_all), np.nan)
    table = pl.DataFrame({"offset_min": offsets, "rss_kwh2": rss_all, "r2": r2_all,
                          "grid": [o in on_grid for o in offsets]})

    pos = {o: k for k, o in enumerate(offsets)}
    rss_grid = np.array([rss_all[pos[float(g)]] for g in grid])
    i_best = int(np.argmin(rss_grid))
    fine_off = [o for o in offsets if lo - 1e-9 <= o <= hi + 1e-9]
    fine_rss = np.array([rss_all[pos[o]] for o in fine_off])
    j = int(np.argmin(fine_rss))
    best, rss_best = fine_off[j], float(fine_rss[j])
    if rss_grid[i_best] < rss_best:  # fewer intervals moved the grid's minimum elsewhere
        best, rss_best = float(grid[i_best]), float(rss_grid[i_best])
    elif 0 < j < len(fine_off) - 1:
        vertex = _parabola_vertex(np.array(fine_off[j - 1:j + 2]), fine_rss[j - 1:j + 2])
        if vertex is not None:
            best = float(np.clip(vertex, fine_off[j - 1], fine_off[j + 1]))
    # At the edge: the curve still falls where the search stops.
    at_edge = abs(abs(best) - window_min) < 1e-9

    worst = float(rss_grid.max())
    span = worst - float(rss_grid.min())
    contrast = span / worst if worst > 0 else 0.0
    flat = contrast < FLAT_CONTRAST

    # Plateau: the contiguous run of grid offsets around the best within the threshold.
    level = rss_grid[i_best] + PLATEAU_FRACTION * span
    a = b = i_best
    while a > 0 and rss_grid[a - 1] <= level:
        a -= 1
    while b < len(grid) - 1 and rss_grid[b + 1] <= level:
        b += 1
    plateau = (float(grid[a]), float(grid[b]))

    # Separate local minima: the curve must rise between them and the best.
    second_off = second_rss = None
    for k in range(len(grid)):
        if k == i_best:
            continue
        left = rss_grid[k - 1] if k > 0 else np.inf
        right = rss_grid[k + 1] if k < len(grid) - 1 else np.inf
        if not (rss_grid[k] <= left and rss_grid[k] <= right):
            continue
        between = rss_grid[min(k, i_best):max(k, i_best) + 1]
        if between.max() - rss_grid[k] < PROMINENCE_FRACTION * span:
            continue
        if second_rss is None or rss_grid[k] < second_rss:
            second_off, second_rss = float(grid[k]), float(rss_grid[k])
    ambiguous = (second_rss is not None and span > 0
                 and second_rss - rss_grid[i_best] < AMBIGUOUS_FRACTION * span)

    rss_zero = float(rss_all[pos[0.0]])
    verdict = _verdict(best, window_min, rss_best, rss_zero, worst, contrast, plateau,
                       second_off, flat, at_edge, ambiguous, int(mask.sum()))
    return OffsetResult(best, table, rss_best, rss_zero, worst, contrast, plateau, second_off,
                        second_rss, flat, at_edge, ambiguous, int(mask.sum()), float(window_min),
                        float(step_min), verdict)


def _verdict(best: float, window_min: float, rss_best: float, rss_zero: float, worst: float,
             contrast: float, plateau: tuple[float, float], second: float | None, flat: bool,
             at_edge: bool, ambiguous: bool, n: int) -> str:
    """The finding in words an engineer can act on."""
    if flat:
        return (f"no clear clock offset: over +-{window_min:g} min the fit of {n} intervals "
                f"changes by only {100 * contrast:.2g} % (best within {FLAT_CONTRAST:.0%} of the "
                "worst); the logs do not pin the offset down, so none is claimed; check the "
                "clocks by hand")
    if at_edge:
        return (f"the best offset lies at the edge of the searched window ({best:+g} min of "
                f"+-{window_min:g} min): the true offset may be larger; widen the window before "
                "applying it")
    gain = 100 * (1 - rss_best / rss_zero) if rss_zero > 0 else 0.0
    if ambiguous:
        return (f"ambiguous clock offset: {best:+.1f} min and {second:+g} min explain the meter "
                "nearly equally well; check the clocks by hand before applying either")
    sharp = (f"offsets from {plateau[0]:+g} to {plateau[1]:+g} min come within "
             f"{PLATEAU_FRACTION:.0%} of the best (as a share of the curve's range)")
    if abs(best) < 0.5:
        return (f"the run-log and meter clocks agree within half a minute (best offset "
                f"{best:+.1f} min): no shift needed; {sharp}")
    return (f"the run logs match the meter best when shifted by {best:+.1f} min (add this to "
            f"the log times): residual sum of squares {gain:.0f} % lower than with no shift; "
            f"{sharp}")


# The breakdown's quick test: the fit with the logs as read against the logs moved this many
# minutes either way. Only when one of the two explains the meter better does the full search
# run (+-QUICK_WINDOW_MIN); a clear offset of at least MATERIAL_OFFSET_MIN that lowers the RSS
# by at least MATERIAL_GAIN is reported (project choices, no source: a few minutes on 15-minute
# intervals already moves draws by tens of per cent in this project's tests).
QUICK_PROBE_MIN = 3.0
QUICK_WINDOW_MIN = 30.0
MATERIAL_OFFSET_MIN = 1.0
MATERIAL_GAIN = 0.05


def offset_warning(site: SiteConfig, meter: MeterData, runlog: RunLog,
                   applied_min: float = 0.0, aligned: Aligned | None = None,
                   date_from: dt.date | None = None,
                   date_to: dt.date | None = None) -> str | None:
    """A warning with the --log-offset to try when the run-log clock is materially off, else None.

    Cheap in the usual case (clocks agree): the run's own alignment and the logs moved
    +-QUICK_PROBE_MIN (align.probe_rss: each load's hours at the moved interval edges) are
    scored on the intervals all three cover, with the declared profile's baseload columns
    (design.BaseloadBuilder.declared): three small NNLS fits. Only when a moved log
    fits better does estimate_log_offset search +-QUICK_WINDOW_MIN.

    Args:
        runlog: as read, with applied_min [min] already added to its times.
        aligned: the run's own alignment of meter and runlog over [date_from, date_to] (the
            probe at 0 and its baseload columns, shared with the run's fits), or None.
    """
    if aligned is None:
        aligned = align(site, meter, runlog, date_from, date_to)
    if not aligned.use.any():
        return None
    # The declared profile's columns of the intervals used, from the one design builder.
    base, _ = BaseloadBuilder.declared(site, aligned)
    probes_min = [-QUICK_PROBE_MIN, QUICK_PROBE_MIN]
    # A chunk of rows at a time (no moved log's hours held whole: long 1-minute series).
    covered, rss = probe_rss(site, aligned, runlog, probes_min, base)
    if covered < MIN_INTERVALS:
        return None
    if rss is None:
        probes = [aligned] + [align(site, meter, shift_runlog(runlog, m), date_from, date_to)
                              for m in probes_min]
        mask = probes[0].use & probes[1].use & probes[2].use
        y = aligned.frame["energy_kwh"].to_numpy().astype(float)[mask]
        b = base[(np.cumsum(aligned.use) - 1)[mask]]
        rss = [_rss_quick(np.column_stack([a.hours[mask], b]), y) for a in probes]
    if rss[0] <= min(rss[1], rss[2]):
        return None
    try:
        r = estimate_log_offset(site, meter, runlog, window_min=QUICK_WINDOW_MIN)
    except InputError:
        return None
    total = round(applied_min + r.best_offset_min, 1)
    check = f"disagg check {site.path.name} --find-offset"
    if r.at_edge:
        return (f"the run-log clock looks off from the meter's by more than {QUICK_WINDOW_MIN:g} "
                f"min (the best shift is at the edge of +-{QUICK_WINDOW_MIN:g} min); run "
                f"`{check} --offset-window 240` and apply what it finds with --log-offset "
                "(or log_offset_minutes in the site file's [runlog])")
    gain = 1.0 - r.rss_best_kwh2 / r.rss_zero_kwh2 if r.rss_zero_kwh2 > 0 else 0.0
    if not r.clear or abs(r.best_offset_min) < MATERIAL_OFFSET_MIN or gain < MATERIAL_GAIN:
        return None
    return (f"the run logs match the meter best when shifted by {r.best_offset_min:+.1f} min "
            f"({100 * gain:.0f} % smaller residual than as read): the building automation clock "
            "is probably off, which biases the draws; check with "
            f"`{check}` and re-run with --log-offset {total:g} (or set log_offset_minutes = "
            f"{total:g} in the site file's [runlog])")
