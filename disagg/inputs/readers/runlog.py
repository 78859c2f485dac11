"""Building-automation run logs (events, samples or minutes run; long or wide) -> state segments."""

from __future__ import annotations

import datetime as dt
import difflib
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl

from disagg.errors import InputError
from disagg.inputs.config import (
    RunlogSettings,
    SiteConfig,
)
from disagg.inputs.readers.meter import infer_interval_min
from disagg.inputs.readers.tables import (
    _ON_WORDS,
    _numbers,
    _row_label,
    parse_times,
    read_table,
    repeated_hour_hint,
    require_columns,
)


@dataclass
class Segments:
    """Piecewise-constant state of one piece of equipment.

    start_ns, end_ns: segment edges [ns since 1970-01-01 UTC], sorted and disjoint;
    value: status 0..1 held over the segment. Time not covered by a segment is unknown.
    """

    start_ns: np.ndarray
    end_ns: np.ndarray
    value: np.ndarray


@dataclass
class RunLog:
    """Every configured equipment's state segments, and what was read."""

    segments: dict[str, Segments]
    path: Path
    rows_read: int
    notes: list[str] = field(default_factory=list)


def _states(frame: pl.DataFrame, column: str, path: Path) -> pl.Series:
    """State words or numbers -> status 0..1 (on/off, 1/0, true/false, or a fraction)."""
    s = frame.get_column(column)
    if s.dtype == pl.Boolean:
        return s.cast(pl.Float64)
    if s.dtype.is_numeric():
        values = s.cast(pl.Float64)
        text = values.cast(pl.String)
    else:
        # A log repeats a few state words: read each distinct text once, then map every row.
        raw = s.cast(pl.String)
        distinct = raw.unique()
        text = distinct.str.strip_chars().str.to_lowercase()
        words = text.replace_strict(_ON_WORDS, default=None, return_dtype=pl.Float64)
        read = pl.select(pl.coalesce(words, text.cast(pl.Float64, strict=False))).to_series()
        if len(distinct) <= _FEW_STATES:
            # A when-chain over the few distinct texts: the same values as replace_strict,
            # several times faster on a long log (9 -> 2 ms on 320,000 rows of on/off).
            chain = None
            for d, r in zip(distinct.to_list(), read.to_list()):
                if d is None:
                    continue  # a null stays null, as with replace_strict
                cond = pl.lit(raw) == d
                chain = (pl.when(cond) if chain is None else chain.when(cond)).then(
                    pl.lit(r, dtype=pl.Float64))
            values = (pl.select(chain.otherwise(None).cast(pl.Float64)).to_series()
                      .alias(raw.name) if chain is not None
                      else pl.Series(raw.name, [None] * len(raw), dtype=pl.Float64))
        else:
            values = raw.replace_strict(distinct, read, default=None, return_dtype=pl.Float64)
    bad = values.is_null() | (values < 0) | (values > 1) | values.is_nan()
    if bad.any():
        idx = int(bad.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {column!r}: state "
                         f"{s[idx]!r}; expected on/off, 1/0, true/false or a number from 0 to 1")
    return values


# Distinct state texts up to which _states maps them with a when-chain.
_FEW_STATES = 8


def _alias_map(site: SiteConfig) -> dict[str, str]:
    """Former id (an ``aliases`` entry) -> the configured id it counts as."""
    return {a: e.id for e in site.equipment for a in e.aliases}


def _did_you_mean(name: str, candidates: list[str]) -> str:
    """`` did you mean 'X'?`` for the candidate closest to name, ignoring case, or ''.

    Closeness is difflib's ratio (standard library), at least its default cutoff 0.6.
    """
    lower = {c.lower(): c for c in candidates}
    close = difflib.get_close_matches(name.lower(), list(lower), n=1)
    return f" did you mean {lower[close[0]]!r}?" if close else ""


def _expected_ids(known: list[str], aliases: dict[str, str]) -> str:
    former = f" or their former ids ({', '.join(aliases)})" if aliases else ""
    return f"({', '.join(known)}){former}"


def _check_ids(ids: pl.Series, known: list[str], path: Path, column: str,
               aliases: dict[str, str] | None = None) -> None:
    """Raise InputError at the first row whose id is neither configured nor a former id.

    The message suggests the nearest configured id and names the file's other unknown ids.
    """
    aliases = aliases or {}
    valid = known + list(aliases)
    unknown = (~ids.is_in(valid)).fill_null(True) | (ids == "").fill_null(True)
    if unknown.any():
        idx = int(unknown.arg_max())  # type: ignore[arg-type]
        bad = ids[idx]
        where = f"{path}: {_row_label(path, idx)}, column {column!r}"
        if not bad:
            raise InputError(f"{where}: empty equipment id; expected one of the site file's ids "
                             f"{_expected_ids(known, aliases)}")
        others = [i for i in ids.filter(unknown).unique(maintain_order=True).to_list()
                  if i and i != bad]
        also = ""
        if others:
            more = f" and {len(others) - 5} more" if len(others) > 5 else ""
            also = (f"; the file also has unknown ids "
                    f"{', '.join(repr(i) for i in others[:5])}{more}")
        raise InputError(f"{where}: unknown equipment id {bad!r};{_did_you_mean(bad, valid)} "
                         f"expected one of the site file's ids {_expected_ids(known, aliases)}"
                         f"{also}")


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def _order_notes(path: Path, t: pl.Series, by: pl.Series | None) -> list[str]:
    """A finding for rows earlier than the previous row (of the same equipment), in file order."""
    g = by if by is not None else pl.repeat("", len(t), eager=True)
    back = (pl.DataFrame({"t": t, "g": g})
            .select((pl.col("t") < pl.col("t").shift(1).over("g")).fill_null(False))
            .to_series())
    n = int(back.sum())
    if not n:
        return []
    idx = int(back.arg_max())  # type: ignore[arg-type]
    who = f"{by[idx]!r} at {t[idx]}" if by is not None else f"at {t[idx]}"
    same = " of the same equipment" if by is not None else ""
    return [(f"{path}: {_plural(n, 'row')} out of time order, earlier than the previous "
            f"row{same} (first: {_row_label(path, idx)}, {who}); policy: sorted by time")]


def _alias_notes(path: Path, written: pl.Series, t: pl.Series,
                 aliases: dict[str, str]) -> list[str]:
    """One line per former id used in the file: how many rows now count as which equipment."""
    notes = []
    for old, new in aliases.items():
        mask = (written == old).fill_null(False)
        if mask.any():
            times = t.filter(mask)
            notes.append(f"{path}: {_plural(int(mask.sum()), 'row')} of former id {old!r} counted "
                         f"as equipment {new!r} ({times.min()} to {times.max()})")
    return notes


def _sample_frame(raw: pl.DataFrame, cols: list[str], eq_id: str, t: pl.Series, path: Path,
                  aliases: dict[str, str]) -> tuple[pl.DataFrame, list[str]]:
    """One equipment's samples in file order: t, v (status 0..1, null = empty cell), row.

    Columns of a former id (alias) fill the cells the others leave empty.

    Raises:
        InputError: two columns with different states in one row, or two rows at one time
        with different states.
    """
    masked = []
    for c in cols:
        col = raw.get_column(c)
        text = col.cast(pl.String).str.strip_chars() if not col.dtype.is_numeric() else None
        empty = col.is_null() if text is None else (text.is_null() | (text == ""))
        filled = raw.select(pl.when(empty).then(pl.lit("0"))
                            .otherwise(pl.col(c).cast(pl.String)).alias(c))
        v = _states(filled, c, path)
        masked.append(v.zip_with(~empty, pl.Series(c, [None] * len(v), dtype=pl.Float64)).alias(c))
    w = pl.DataFrame(masked)
    notes = []
    if len(cols) > 1:
        differ = w.select(pl.min_horizontal(cols) != pl.max_horizontal(cols)).to_series()
        differ = differ.fill_null(False)
        if differ.any():
            idx = int(differ.arg_max())  # type: ignore[arg-type]
            both = ", ".join(repr(c) for c in cols if w[c][idx] is not None)
            raise InputError(f"{path}: {_row_label(path, idx)}: equipment {eq_id!r} has different "
                             f"states at the same time {t[idx]} (columns {both}); expected one "
                             "state")
        for c in cols:
            seen = w[c].is_not_null()
            if c in aliases and seen.any():
                times = t.filter(seen)
                notes.append(f"{path}: {_plural(int(seen.sum()), 'sample')} in column {c!r} (a "
                             f"former id) counted as equipment {eq_id!r} ({times.min()} to "
                             f"{times.max()})")
    v = w.select(pl.coalesce(cols)).to_series()
    f = pl.DataFrame({"t": t, "v": v, "row": pl.int_range(len(t), eager=True)})
    clash = (f.drop_nulls("v").group_by("t")
             .agg(pl.col("v").n_unique().alias("n"), pl.col("row").min())
             .filter(pl.col("n") > 1).sort("row"))
    if clash.height:
        r = clash.row(0, named=True)
        raise InputError(f"{path}: {_row_label(path, r['row'])}: equipment {eq_id!r} has "
                         f"different states at the same time {r['t']}; expected one state")
    return f, notes


def _stale_notes(path: Path, eq_id: str, f: pl.DataFrame, hold_min: float,
                 log_end: dt.datetime) -> list[str]:
    """A finding for silences longer than max_hold: from a sample to the next, or to the log's end.

    f: one row per time, sorted, v null for an empty cell (which is not a sample).
    """
    s = f.filter(pl.col("v").is_not_null())
    gap_min = (s.select((pl.col("t").shift(-1).fill_null(log_end) - pl.col("t"))
                        .dt.total_microseconds() / 60e6).to_series())
    stale = gap_min > hold_min
    n = int(stale.sum())
    if not n:
        return []
    idx = int(stale.arg_max())  # type: ignore[arg-type]
    return [(f"{path}: equipment {eq_id!r}: {_plural(n, 'silence')} longer than max_hold_minutes "
            f"= {hold_min:g} (first: {gap_min[idx]:g} min without a sample from {s['t'][idx]}); "
            f"policy: more than {hold_min:g} min after a sample the state is unknown, and meter "
            "intervals then are left out")]


def _sorted_segments(df: pl.DataFrame, ids: list[str]) -> dict[str, Segments]:
    """_to_segments(df, ids, "end") of a frame already sorted by equipment (eq: an Enum of
    the ids, in their order) and then time, with one row per equipment and time: each
    equipment's rows are one run of the frame, sliced without a sort or a partition."""
    cats = list(dict.fromkeys(ids))
    code = df["eq"].to_physical().to_numpy()
    s_ns = df["t"].dt.epoch("ns").to_numpy().astype(np.int64)
    e_ns = df["end"].dt.epoch("ns").to_numpy().astype(np.int64)
    v = df["v"].to_numpy().astype(np.float64)
    bounds = np.searchsorted(code, np.arange(len(cats) + 1))
    out: dict[str, Segments] = {}
    for j, eq in enumerate(cats):
        run = slice(bounds[j], bounds[j + 1])
        keep = e_ns[run] > s_ns[run]
        out[eq] = Segments(s_ns[run][keep], e_ns[run][keep], v[run][keep])
    return out


def _to_segments(df: pl.DataFrame, ids: list[str], end_col: str) -> dict[str, Segments]:
    """Frame with eq, t (start), end and value columns -> per-equipment sorted Segments."""
    out: dict[str, Segments] = {}
    df = df.with_columns(pl.col("t").dt.epoch("ns").alias("s_ns"),
                         pl.col(end_col).dt.epoch("ns").alias("e_ns"))
    parts = {k[0]: g for k, g in df.partition_by("eq", as_dict=True).items()}
    for eq in ids:
        g = parts.get(eq)
        if g is None or g.height == 0:
            empty = np.empty(0, dtype=np.int64)
            out[eq] = Segments(empty, empty.copy(), np.empty(0))
            continue
        g = g.sort("s_ns").filter(pl.col("e_ns") > pl.col("s_ns"))
        out[eq] = Segments(g["s_ns"].to_numpy().astype(np.int64),
                           g["e_ns"].to_numpy().astype(np.int64),
                           g["v"].to_numpy().astype(np.float64))
    return out


def read_runlog(settings: RunlogSettings, site: SiteConfig, offset_min: float = 0.0) -> RunLog:
    """Read the building automation run log in any of the three layouts.

    events: a state holds until that equipment's next event, and the last one until the
    log's last time. samples: a sample holds until the next sample of that column, but at
    most max_hold_minutes; an empty cell is unknown. runtime: run minutes in each log
    interval, spread evenly over it. Rows (or sample columns) under a former id listed in an
    equipment's ``aliases`` count as that equipment.

    Findings go into ``notes``, one line each: rows of former ids, rows out of time order
    (policy: sorted by time), and silences of a sample column longer than max_hold_minutes
    (the time beyond max_hold is unknown). Coverage of the meter period needs the meter:
    see ``disagg.inputs.logcheck.coverage_findings``.

    Args:
        offset_min: minutes ADDED to every run-log time once it is parsed to UTC [min], to put
            a building automation clock that is off onto the meter's clock (a log whose clock
            runs 7 minutes behind the meter's needs +7). 0 keeps the times as read.
            ``disagg.analyses.clock.estimate_log_offset`` estimates it with this sign.

    Raises:
        InputError: missing column, unreadable time or state, unknown or empty equipment id
        (suggesting the nearest configured id), two different states (or run minutes) for
        one equipment at one time.
        ValueError: offset_min is not a finite number.
    """
    if not math.isfinite(offset_min):
        raise ValueError(f"offset_min = {offset_min!r}: expected a finite number of minutes")
    shift = dt.timedelta(microseconds=round(offset_min * 60e6))
    path = settings.file
    needed = {"events": [settings.time_column, settings.equipment_column, settings.state_column],
              "runtime": [settings.time_column, settings.equipment_column,
                          settings.minutes_column]}.get(settings.layout)
    raw = read_table(path, "run log", needed)  # type: ignore[arg-type]
    ids = site.equipment_ids()
    aliases = _alias_map(site)
    tz = site.timezone
    notes: list[str] = []
    if offset_min:
        notes.append(f"{path}: every run-log time is shifted by {offset_min:+g} min onto the "
                     "meter's clock")
    if settings.layout == "samples":
        require_columns(raw, path, [settings.time_column])
        present = [c for c in raw.columns if c != settings.time_column]
        for c in present:
            if c not in ids and c not in aliases:
                former = f" or former ids {', '.join(aliases)}" if aliases else ""
                raise InputError(f"{path}: column {c!r} is not a configured equipment id;"
                                 f"{_did_you_mean(c, ids + list(aliases))} expected the time "
                                 f"column and columns named {', '.join(ids)}{former}")
        by_eq = {e: [c for c in present if aliases.get(c, c) == e] for e in ids}
        missing = [e for e in ids if not by_eq[e]]
        if missing:
            notes.append(f"no run-log column for {', '.join(missing)}: left out as unknown")
        t = parse_times(raw, settings.time_column, tz, path, date_order=settings.date_order,
                        setting="[runlog] date_order") + shift
        notes += _order_notes(path, t, None)
        hold = pl.duration(microseconds=round(settings.max_hold_min * 60e6))
        frames = []
        for eq_id, eq_cols in by_eq.items():
            if not eq_cols:
                continue
            f, alias_notes = _sample_frame(raw, eq_cols, eq_id, t, path, aliases)
            notes += alias_notes
            # One row per time, a sample before an empty cell; an empty cell ends the sample
            # before it (unknown from then on).
            f = (f.sort(pl.col("t"), pl.col("v").is_null())
                 .unique(subset="t", keep="first", maintain_order=True))
            f = f.with_columns(nxt=pl.col("t").shift(-1))
            f = f.with_columns(end=pl.min_horizontal(pl.col("nxt"), pl.col("t") + hold))
            notes += _stale_notes(path, eq_id, f, settings.max_hold_min,  # type: ignore[arg-type]
                                  t.max())  # type: ignore[arg-type]
            f = f.filter(pl.col("v").is_not_null() & pl.col("end").is_not_null())
            frames.append(f.select(pl.lit(eq_id).alias("eq"), "t", "end", "v"))
        df = pl.concat(frames) if frames else pl.DataFrame(schema={"eq": pl.String, "t": t.dtype, "end": t.dtype, "v": pl.Float64})
        return RunLog(_to_segments(df, ids, "end"), path, raw.height, notes)

    if settings.layout == "events":
        cols = [settings.time_column, settings.equipment_column, settings.state_column]
    else:
        cols = [settings.time_column, settings.equipment_column, settings.minutes_column]
    require_columns(raw, path, cols)  # type: ignore[arg-type]
    eq = raw.get_column(settings.equipment_column).cast(pl.String).str.strip_chars()  # type: ignore[arg-type]
    # A row cut short (a file truncated mid-line) has neither id nor state: say so rather
    # than blame an empty id.
    cut = ((eq.is_null() | (eq == "")) & raw.get_column(cols[2]).is_null()).fill_null(False)
    if cut.any():
        idx = int(cut.arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}: no {cols[1]!r} and no {cols[2]!r}: "
                         "the row ends early (is the file cut short?); expected a value in "
                         f"each of {', '.join(repr(c) for c in cols)}")
    _check_ids(eq, ids, path, settings.equipment_column, aliases)  # type: ignore[arg-type]
    written = eq
    if aliases:
        eq = eq.replace(aliases)
    t = parse_times(raw, settings.time_column, tz, path, by=eq, date_order=settings.date_order,
                    setting="[runlog] date_order") + shift
    notes += _alias_notes(path, written, t, aliases)
    if settings.layout == "events":
        # Every id is a configured one by now (_check_ids, aliases replaced): as an Enum its
        # codes group and sort like small integers (here and in the frame below).
        eq = eq.cast(pl.Enum(list(dict.fromkeys(ids))))
    notes += _order_notes(path, t, eq)
    if settings.layout == "events":
        v = _states(raw, settings.state_column, path)  # type: ignore[arg-type]
        n_rows = raw.height
        del raw  # the text columns are no longer needed: free them before the heavy steps
        # One stable sort by (equipment, time) serves the clash check, the de-duplication and
        # the segments; a group_by over every row doubled the peak memory of a large log.
        # Every id is a configured one by now (_check_ids, aliases replaced): as an Enum its
        # codes sort like small integers. numpy's lexsort is stable (rows with the same
        # equipment and time keep file order) and several times faster than a frame sort.
        df = pl.DataFrame({"eq": eq, "t": t, "v": v, "row": pl.int_range(n_rows, eager=True)})
        order = np.lexsort((df["t"].dt.epoch("us").to_numpy(),
                            df["eq"].to_physical().to_numpy()))
        df = df[pl.Series(order.astype(np.uint32) if n_rows < 2**32 else order)]
        del order
        del eq, t, v
        same = ((pl.col("eq") == pl.col("eq").shift(1))
                & (pl.col("t") == pl.col("t").shift(1))).fill_null(False)
        bad = df.filter(same & (pl.col("v") != pl.col("v").shift(1)))
        if bad.height:
            r = (df.join(bad.select("eq", "t").unique(), on=["eq", "t"])
                 .group_by("eq", "t").agg(pl.col("row").min()).sort("row").row(0, named=True))
            raise InputError(f"{path}: {_row_label(path, r['row'])}: equipment {r['eq']!r} has "
                             f"different states at the same time {r['t']}; expected one state"
                             f"{repeated_hour_hint(r['t'], tz)}")
        if df.height == 0:
            notes.append(f"{path}: the run log has no rows: every state is unknown")
            return RunLog(_to_segments(df.with_columns(end=pl.col("t")), ids, "end"), path,
                          n_rows, notes)
        log_end = df["t"].max()
        df = df.filter(~same)  # the first row of each (equipment, time): file order kept
        # Sorted by equipment, so the next row's time ends a state unless the next row is
        # another equipment's (no window function needed).
        df = df.with_columns(end=pl.when(pl.col("eq") == pl.col("eq").shift(-1))
                             .then(pl.col("t").shift(-1)).otherwise(None)
                             .fill_null(log_end))
        present = set(df["eq"].unique().to_list())
        missing = [e for e in ids if e not in present]
        if missing:
            notes.append(f"no run-log events for {', '.join(missing)}: left out as unknown")
        return RunLog(_sorted_segments(df, ids), path, n_rows, notes)

    minutes = _numbers(raw, settings.minutes_column, path, "run minutes")  # type: ignore[arg-type]
    df = (pl.DataFrame({"eq": eq, "t": t, "m": minutes,
                        "row": pl.int_range(raw.height, eager=True)})
          .filter(pl.col("m").is_not_null()))
    clash = (df.group_by("eq", "t").agg(pl.col("m").n_unique().alias("n"), pl.col("row").min())
             .filter(pl.col("n") > 1).sort("row"))
    if clash.height:
        r = clash.row(0, named=True)
        raise InputError(f"{path}: {_row_label(path, r['row'])}: equipment {r['eq']!r} has "
                         f"different run minutes at the same time {r['t']}; expected one value "
                         "per interval")
    step_min = settings.interval_min or infer_interval_min(df["t"].unique(), path, "run-log")
    if ((df["m"] < 0) | (df["m"] > step_min)).any():
        idx = int(((minutes < 0) | (minutes > step_min)).arg_max())  # type: ignore[arg-type]
        raise InputError(f"{path}: {_row_label(path, idx)}, column {settings.minutes_column!r}: "
                         f"{minutes[idx]:g} run minutes; expected 0 to {step_min} per interval")
    step = pl.duration(minutes=step_min)
    if settings.stamp == "end":
        df = df.with_columns(end=pl.col("t"), t=pl.col("t") - step)
    else:
        df = df.with_columns(end=pl.col("t") + step)
    df = df.with_columns(v=pl.col("m") / step_min).unique(subset=["eq", "t"], keep="first")
    return RunLog(_to_segments(df, ids, "end"), path, raw.height, notes)
