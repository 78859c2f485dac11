"""Run log against meter: does each equipment's log cover the meter period?

The readers know one file at a time; this check needs both. Time a log does not cover is
already unknown for that equipment (disagg.fit.align leaves the meter intervals there out of the
fit); these findings say where that time is, so the engineer sees it named.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl

from disagg.inputs.readers import RunLog

_NS_PER_H = 3_600_000_000_000
_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.timezone.utc)


def _when(ns: int) -> dt.datetime:
    """ns since 1970-01-01 UTC -> an aware datetime, printed like the readers' times."""
    return _EPOCH + dt.timedelta(microseconds=int(ns) // 1000)


def _hours(ns: int) -> str:
    """A duration for a message: minutes below an hour, else hours to 0.01 h."""
    if ns < _NS_PER_H:
        return f"{ns / 60e9:.4g} min"
    return f"{ns / _NS_PER_H:.2f}".rstrip("0").rstrip(".") + " h"


def coverage_findings(runlog: RunLog, meter_frame: pl.DataFrame) -> list[str]:
    """One line per equipment whose run log leaves part of the meter period uncovered.

    The meter period runs from the earliest interval start to the latest interval end of
    meter_frame. For each equipment (in the run log's order) the uncovered time of that
    period is split into the time before its first logged state, after its last one, and in
    gaps between its states (a samples log silent beyond max_hold, missing runtime rows).

    Args:
        runlog: as read by ``disagg.inputs.readers.read_runlog`` (times already on the meter's clock).
        meter_frame: columns start_utc, end_utc [datetime, UTC], e.g. ``MeterData.frame``, or
            ``Aligned.frame`` for the dates a run selected.

    Returns:
        Findings, one readable line each; empty when every equipment covers the period (or
        the frame has no intervals).
    """
    if meter_frame.height == 0:
        return []
    m0 = int(meter_frame["start_utc"].dt.epoch("ns").min())  # type: ignore[arg-type]
    m1 = int(meter_frame["end_utc"].dt.epoch("ns").max())  # type: ignore[arg-type]
    meter = f"the meter period {_when(m0)} to {_when(m1)} ({_hours(m1 - m0)})"
    out = []
    for eq, seg in runlog.segments.items():
        if len(seg.start_ns) == 0:
            out.append(f"{runlog.path}: equipment {eq!r}: no logged state in {meter}; every "
                       "meter interval is left out of the fit")
            continue
        first, last = int(seg.start_ns[0]), int(seg.end_ns[-1])
        covered = int(np.sum(np.clip(np.minimum(seg.end_ns, m1) - np.maximum(seg.start_ns, m0),
                                     0, None)))
        before = max(0, min(first, m1) - m0)
        after = max(0, m1 - max(last, m0))
        gaps_ns = (m1 - m0) - covered - before - after
        if before == after == gaps_ns == 0:
            continue
        parts = []
        if before:
            parts.append(f"{_hours(before)} before the log starts")
        if after:
            parts.append(f"{_hours(after)} after it ends")
        if gaps_ns:
            # The first gap inside the period: the end of a segment that the next one does
            # not start at, clipped to the period.
            ends = np.maximum(seg.end_ns[:-1], m0)
            starts = np.minimum(seg.start_ns[1:], m1)
            open_ = np.flatnonzero(starts > ends)
            first_gap = f" (first from {_when(ends[open_[0]])})" if len(open_) else ""
            parts.append(f"{_hours(gaps_ns)} in gaps{first_gap}")
        out.append(f"{runlog.path}: equipment {eq!r}: the log covers {_hours(covered)} of "
                   f"{meter}, its states run from {_when(first)} to {_when(last)}; not covered: "
                   f"{', '.join(parts)}; meter intervals there are left out of the fit")
    return out
