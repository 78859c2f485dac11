"""The history store: every month's breakdown and drift results, kept as a Parquet dataset.

Layout under the folder named by ``[history] folder`` (site file) or ``history`` (portfolio
file), hive-partitioned so that polars (or any Parquet reader) can scan it with no server::

    FOLDER/kind=breakdown/site=<site id>/period=YYYY-MM/part.parquet
    FOLDER/kind=drift/site=<site id>/period=YYYY-MM/part.parquet

The site id is the site file's name without ``.toml``, with every character other than
letters, digits, ``.``, ``_`` and ``-`` replaced by ``_`` (``Main Library.toml`` ->
``Main_Library``). The file name, not the ``[site] name``, so that renaming a building's
display name does not split its history and the id is the same as the folder ``disagg batch``
writes the site's outputs into. Two site files with the same name in different folders that
share one history folder would share an id: give them different file names. Two file names
that differ only in the characters replaced (``a b.toml`` and ``a_b.toml``) would also share
one; storing the second is refused with an error naming both files.

A period is a local calendar month of the site. Storing a month replaces everything stored
for that site, kind and month, so running a month twice leaves one copy. Each stored breakdown
month carries its coverage: the intervals used, the local days with at least one of them, and
the first and last such day. A breakdown month is stored only when

- the run's requested range (``--from``/``--to``; none means unbounded) holds the whole
  calendar month: a range that cuts a month short never replaces it. A month that is short
  only because the data end (or start) there is stored, with its coverage;
- and it has data on at least as many days as the stored run of that month: a run whose data
  hold a few days of a month already stored in full (an export starting on the month's last
  day) leaves it alone. Delete the month's folder to replace it anyway.

The months left as they were are returned with the reason (:class:`Stored`), and the commands
print them as notes. Drift months are merged by day instead: the new run's days replace the
same days, other days of that month are kept (a run continued with ``--state`` covers only the
days after the previous run).

A command checks that the history folder can be written (:func:`check_folder`) before it
writes any output, so a bad history folder fails with nothing written; if storing still fails
after the outputs were written, its error says so (:func:`outputs_already_written`).

Writes are atomic per run: every new month file is first written in full into a hidden
staging folder inside FOLDER, and then all of them are put in place as one set behind one
commit point (disagg.present.commit): an error, Ctrl-C or kill leaves all of the run's months
stored or none of them. Runs storing into one folder take turns on its lock file
(``FOLDER/.disagg-lock``, fcntl.flock): the read of stored months, the merge and the write of
one run never interleave with another's, so two runs at once lose no month or day.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import re
import shutil
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl
from scipy.special import ndtri

from disagg import __version__
from disagg.analyses.verdict import RULE as VERDICT_RULE
from disagg.analyses.verdict import change_verdict
from disagg.errors import DisaggError, InputError, OutputError
from disagg.present import commit

# Only whether flock exists here: commit.flock_waiting takes the lock.
try:
    import fcntl  # noqa: F401
except ImportError:  # not on this system (Windows): runs do not take turns there
    fcntl = None

KINDS = ("breakdown", "drift")
# The lock file inside the history folder, and how long a run waits for another's lock [s].
LOCK_FILE = ".disagg-lock"
LOCK_TIMEOUT_S = 600.0
# Partition keys (taken from the folder names, never stored inside the files).
HIVE_SCHEMA = {"site": pl.String, "period": pl.String}

# Columns of a stored breakdown month, in order, with their types; cost and peak_kw are null
# when the breakdown has no such column (a site without a [tariff], or an older run).
BREAKDOWN_SCHEMA = {
    "site_name": pl.String, "site_file": pl.String, "equipment": pl.String,
    "run_hours": pl.Float64, "kw": pl.Float64, "kw_low": pl.Float64, "kw_high": pl.Float64,
    "kwh": pl.Float64, "kwh_low": pl.Float64, "kwh_high": pl.Float64, "share": pl.Float64,
    "flags": pl.String, "peak_kw": pl.Float64, "cost": pl.Float64, "currency": pl.String,
    # The month's coverage (the same on every row of a month; null in months stored before
    # coverage was kept): intervals used, local days with at least one of them, first and last.
    "intervals_used": pl.Int64, "days_with_data": pl.Int64, "first_date": pl.Date,
    "last_date": pl.Date,
    "run_utc": pl.Datetime("us", "UTC"), "tool_version": pl.String,
}
COVERAGE_COLUMNS = ("intervals_used", "days_with_data", "first_date", "last_date")
DRIFT_SCHEMA = {
    "site_name": pl.String, "site_file": pl.String, "date": pl.Date, "equipment": pl.String,
    "kw_tracked": pl.Float64, "kw_low": pl.Float64, "kw_high": pl.Float64,
    "kw_reference": pl.Float64, "change": pl.Float64, "alarm": pl.Boolean,
    "run_utc": pl.Datetime("us", "UTC"), "tool_version": pl.String,
}
_SCHEMAS = {"breakdown": BREAKDOWN_SCHEMA, "drift": DRIFT_SCHEMA}


# A site file with this generic name (a folder per building, each holding site.toml) is
# known by its folder's name instead.
GENERIC_SITE_STEM = "site"


def site_id(site_file: str | Path) -> str:
    """The history's id of a site: its file name without .toml (for ``site.toml``, its
    folder's name), filesystem-safe."""
    path = Path(site_file)
    stem = path.stem
    if stem == GENERIC_SITE_STEM and path.parent.name:
        stem = path.parent.name
    text = re.sub(r"[^A-Za-z0-9._-]", "_", stem).lstrip(".")
    return text or "site"


def _month_dir(folder: Path, kind: str, site: str, period: str) -> Path:
    return folder / f"kind={kind}" / f"site={site}" / f"period={period}"


def check_folder(folder: str | Path) -> Path:
    """Create the history folder if missing and check that files can be written in it (by
    creating and removing an empty hidden file); call before writing any output.

    Returns:
        The folder, resolved.

    Raises:
        OutputError: the folder cannot be created or written.
    """
    folder = Path(folder).resolve()
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"{folder}: cannot create the history folder ({exc.strerror})") from None
    try:
        fd, probe = tempfile.mkstemp(prefix=".disagg-probe-", dir=folder)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise OutputError(f"{folder}: cannot write in the history folder ({exc.strerror})") from None
    return folder


def check_site_id(folder: str | Path, site, kinds: tuple[str, ...] = KINDS) -> None:
    """Refuse, before any output is written, a site whose history id another site file's
    history already uses (see _check_id; storing checks again under the lock)."""
    folder = Path(folder).resolve()
    sid = site_id(site.path)
    for kind in kinds:
        _check_id(folder, kind, sid, site)


@contextlib.contextmanager
def outputs_already_written(written: list[Path]) -> Iterator[None]:
    """Around storing that follows writing a run's outputs: a DisaggError raised inside
    becomes an OutputError saying the outputs were written and the history was not updated."""
    try:
        yield
    except DisaggError as exc:
        where = f" in {Path(written[0]).parent}" if written else ""
        raise OutputError(f"{exc}; the outputs were written{where} but the history was not "
                          "updated") from None


def _write_part(frame: pl.DataFrame, path: Path) -> None:
    """Write one month file (the single place a history file is written)."""
    frame.write_parquet(path)


@contextlib.contextmanager
def _locked(folder: Path) -> Iterator[None]:
    """Hold the history folder's lock file (fcntl.flock on FOLDER/.disagg-lock) inside the
    block: runs storing into one folder take turns, so none loses another's months or days.

    Raises:
        OutputError: the lock file cannot be opened, or another run held it for
            LOCK_TIMEOUT_S seconds.
    """
    if fcntl is None:
        yield
        return
    path = folder / LOCK_FILE
    try:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
    except OSError as exc:
        raise OutputError(f"{path}: cannot open the history's lock file ({exc.strerror})") from None
    try:
        no_locks = commit.flock_waiting(
            fd, LOCK_TIMEOUT_S, f"{path}: another run has held the history's lock for "
            f"{LOCK_TIMEOUT_S:g} s; try again when it has finished")
        if no_locks is not None:  # a file system without locks
            raise OutputError(f"{path}: cannot lock the history ({no_locks.strerror})")
        yield
    finally:
        os.close(fd)  # releases the lock


def _replace_months(folder: Path, kind: str, site: str,
                    months: dict[str, pl.DataFrame]) -> list[Path]:
    """Write every month's file into a staging folder inside folder, then put them all in
    place as one set (disagg.present.commit): all the run's months or none.

    Raises:
        OutputError: the folder cannot be created or written.
    """
    folder = check_folder(folder)
    tmp = commit.staging(folder, "history folder")
    moves = []
    try:
        for i, (period, frame) in enumerate(sorted(months.items())):
            name = f"{i}.parquet"
            _write_part(frame, tmp / name)
            moves.append((name, _month_dir(folder, kind, site, period) / "part.parquet"))
        commit._step("staged")
        commit.commit(tmp, moves)
    except (OSError, pl.exceptions.PolarsError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else \
            (str(exc).strip().splitlines() or [type(exc).__name__])[0]
        raise OutputError(f"{folder}: cannot write the history ({reason})") from None
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return [target for _, target in moves]


def _id_source(site_file: str | Path) -> str:
    """The part of a site file's path its id is made from: the file name, or for
    ``site.toml`` its folder's name and the file name (see site_id)."""
    path = Path(site_file)
    if path.stem == GENERIC_SITE_STEM and path.parent.name:
        return f"{path.parent.name}/{path.name}"
    return path.name


def _check_id(folder: Path, kind: str, sid: str, site) -> None:
    """Refuse to store a site under an id that another site file's history already uses
    (``a b.toml`` and ``a_b.toml`` both have the id ``a_b``; so do ``a b/site.toml`` and
    ``a_b/site.toml``). The same file moved to another folder keeps its id and history.

    Raises:
        OutputError: naming both files.
    """
    site_dir = folder / f"kind={kind}" / f"site={sid}"
    for part in sorted(site_dir.glob("period=*/part.parquet"))[:1]:
        try:
            stored = pl.read_parquet(part, columns=["site_file"]).get_column("site_file")
        except (OSError, pl.exceptions.PolarsError):
            return  # read (and reported) where the month itself is read
        names = {_id_source(f) for f in stored.drop_nulls().unique().to_list()}
        if names and _id_source(site.path) not in names:
            other = sorted(names)[0]
            raise OutputError(
                f"{site.path}: its history id {sid!r} is already used in {folder} by the site "
                f"file {other}; names that differ only in characters other than letters, "
                "digits, '.', '_' and '-' share an id: rename one of the two")


def _stamp(frame: pl.DataFrame, site, schema: dict) -> pl.DataFrame:
    """Add site name and file, the run's UTC time and the tool version; fix the columns."""
    run_utc = dt.datetime.now(dt.UTC).replace(microsecond=0)
    frame = frame.with_columns(pl.lit(site.name).alias("site_name"),
                               pl.lit(str(site.path)).alias("site_file"),
                               pl.lit(run_utc).alias("run_utc"),
                               pl.lit(__version__).alias("tool_version"))
    return frame.select(pl.col(c).cast(t) if c in frame.columns else pl.lit(None, t).alias(c)
                        for c, t in schema.items())


@dataclass
class Stored:
    """What storing a breakdown did.

    files: the month files written. skipped: period -> why that month was left as it was.
    """

    files: list[Path] = field(default_factory=list)
    skipped: dict[str, str] = field(default_factory=dict)

    @property
    def notes(self) -> list[str]:
        """One line per month not stored, in month order."""
        return [self.skipped[p] for p in sorted(self.skipped)]


def month_coverage(aligned, tz: str) -> pl.DataFrame:
    """Per local month (by interval start): intervals used, days with data (local days with at
    least one interval used), first_date and last_date of those days.

    Args:
        aligned: disagg.fit.align.Aligned; its ``use`` mask says which intervals the fit used.
        tz: the site's time zone.
    """
    local = aligned.frame["start_utc"].dt.convert_time_zone(tz)
    frame = pl.DataFrame({"period": local.dt.strftime("%Y-%m"), "date": local.dt.date(),
                          "used": pl.Series(aligned.use, dtype=pl.Boolean)})
    return (frame.filter("used").group_by("period").agg(
        pl.len().cast(pl.Int64).alias("intervals_used"),
        pl.col("date").n_unique().cast(pl.Int64).alias("days_with_data"),
        pl.col("date").min().alias("first_date"), pl.col("date").max().alias("last_date"))
        .sort("period"))


def _month_bounds(period: str) -> tuple[dt.date, dt.date]:
    first = dt.date.fromisoformat(f"{period}-01")
    following = (first.replace(day=28) + dt.timedelta(days=4)).replace(day=1)
    return first, following - dt.timedelta(days=1)


def _cut_short(period: str, date_from: dt.date | None, date_to: dt.date | None) -> str | None:
    """Why the requested range does not hold the whole month, or None when it does."""
    first, last = _month_bounds(period)
    why = []
    if date_from is not None and date_from > first:
        why.append(f"--from {date_from} is after its first day")
    if date_to is not None and date_to < last:
        why.append(f"--to {date_to} is before its last day")
    return " and ".join(why) or None


def _days(n: int | None, first, last) -> str:
    return f"{n} day{'s' * (n != 1)} ({first} to {last})"


def store_breakdown(folder: str | Path, result, date_from: dt.date | None = None,
                    date_to: dt.date | None = None) -> Stored:
    """Store each month of a breakdown result (disagg.analyses.pipeline.BreakdownResult) with its
    coverage, replacing what was stored for those months of that site; see the module
    docstring for the months that are left as they were.

    Args:
        date_from, date_to: the run's requested range (local dates, inclusive; None:
            unbounded), as given to disagg.analyses.pipeline.breakdown_site.

    Returns:
        The month files written and the months not stored, with why.

    Raises:
        OutputError: the history folder cannot be written.
        InputError: a stored month file cannot be read.
    """
    site = result.site
    sid = site_id(site.path)
    root = Path(folder).resolve()
    table = result.breakdown
    tariff = getattr(site, "tariff", None)
    if tariff is not None and "cost" in table.columns:
        table = table.with_columns(pl.lit(tariff.currency).alias("currency"))
    coverage = month_coverage(result.aligned, site.timezone)
    table = table.join(coverage, on="period", how="left", maintain_order="left")
    root = check_folder(root)
    with _locked(root):
        _check_id(root, "breakdown", sid, site)
        months, skipped = {}, {}
        for (period,), g in table.group_by("period", maintain_order=True):
            new = g.row(0, named=True)
            have = _days(new["days_with_data"] or 0, new["first_date"], new["last_date"])
            cut = _cut_short(period, date_from, date_to)
            if cut is not None:
                skipped[period] = (f"{period} not stored in the history: {cut}, so this run has "
                                   f"only part of the month (data on {have}); a month is stored "
                                   "only from a run whose range holds all of it, and any stored "
                                   "run of it is kept")
                continue
            old_path = _month_dir(root, "breakdown", sid, period) / "part.parquet"
            if old_path.exists():
                old = _read_file(old_path, BREAKDOWN_SCHEMA).row(0, named=True)
                if (old["days_with_data"] is not None
                        and (new["days_with_data"] or 0) < old["days_with_data"]):
                    skipped[period] = (
                        f"{period} not stored in the history: the stored run of this month has "
                        f"data on {_days(old['days_with_data'], old['first_date'], old['last_date'])}"
                        f", this run only on {have}; the stored month is kept (delete "
                        f"{old_path.parent} to replace it)")
                    continue
            months[period] = _stamp(g.drop("period"), site, BREAKDOWN_SCHEMA)
        files = _replace_months(root, "breakdown", sid, months) if months else []
    return Stored(files, skipped)


def store_drift(folder: str | Path, site, drift_result) -> list[Path]:
    """Store a drift run's daily tracked draws (disagg.analyses.drift.DriftResult.table) by local
    month; a day already stored is replaced, the month's other stored days are kept.

    Args:
        site: the site's settings (disagg.inputs.config.SiteConfig): its name, file and id.

    Returns:
        The month files written.

    Raises:
        OutputError: the history folder cannot be written.
    """
    folder = check_folder(folder)
    sid = site_id(site.path)
    with _locked(folder):
        _check_id(folder, "drift", sid, site)
        table = drift_result.table.with_columns(pl.col("date").dt.strftime("%Y-%m").alias("period"))
        months = {}
        for (period,), g in table.group_by("period", maintain_order=True):
            new = _stamp(g.drop("period"), site, DRIFT_SCHEMA)
            old_path = _month_dir(folder, "drift", sid, period) / "part.parquet"
            if old_path.exists():
                old = _read_file(old_path, DRIFT_SCHEMA)
                new = pl.concat([old.filter(~pl.col("date").is_in(new["date"].implode())), new])
                new = new.sort("date", maintain_order=True)
            months[period] = new
        return _replace_months(folder, "drift", sid, months)


def _read_file(path: Path, schema: dict) -> pl.DataFrame:
    try:
        frame = pl.read_parquet(path)
    except (OSError, pl.exceptions.PolarsError) as exc:
        raise InputError(f"{path}: cannot read this history file ({_first_line(exc)})") from None
    return _conform(frame, schema, path)


def _first_line(exc: BaseException) -> str:
    lines = str(exc).strip().splitlines()
    return lines[0] if lines else type(exc).__name__


def _conform(frame: pl.DataFrame, schema: dict, where: Path) -> pl.DataFrame:
    """frame with exactly the schema's columns (missing ones null).

    Raises:
        InputError: a column holds values of another kind (a file not written by disagg).
    """
    for c, t in schema.items():
        if c in frame.columns:
            try:
                frame.get_column(c).cast(t, strict=True)
            except (pl.exceptions.PolarsError, ValueError, TypeError):
                raise InputError(f"{where}: not a disagg history file: its column {c!r} holds "
                                 f"{frame.schema[c]}, expected {t}; move it out of the history "
                                 "folder") from None
    return frame.select(pl.col(c).cast(t) if c in frame.columns else pl.lit(None, t).alias(c)
                        for c, t in schema.items())


# Columns every stored month of a kind has had since the first layout: a part.parquet
# without them was not written by disagg.
_KEY_COLUMNS = {"breakdown": ("equipment",), "drift": ("date", "equipment")}


def _refuse_foreign_files(root: Path, schema: dict) -> None:
    """Raise InputError naming the first part.parquet under root (another site's included:
    the scan reads them all) that lacks the kind's key columns, before the scan trips over
    it (an internal error) or mixes it in.

    Only each file's footer is read (its schema)."""
    kind = next(k for k, v in _SCHEMAS.items() if v is schema)
    for part in sorted(root.rglob("part.parquet")):
        try:
            names = pl.read_parquet_schema(part)
        except (OSError, pl.exceptions.PolarsError) as exc:
            raise InputError(f"{part}: cannot read this history file ({_first_line(exc)})"
                             ) from None
        missing = [c for c in _KEY_COLUMNS[kind] if c not in names]
        if missing:
            raise InputError(f"{part}: not a disagg history file: it has no column "
                             f"{missing[0]!r}; move it out of the history folder")


def read_history(folder: str | Path, site: str | None = None,
                 kind: str = "breakdown") -> pl.DataFrame:
    """Everything stored of one kind, optionally for one site id (see site_id).

    Returns:
        The stored rows with the partition columns ``site`` and ``period`` first, sorted by
        site and period (rows of a month in their stored order); no rows when nothing is
        stored.

    Raises:
        InputError: a stored file cannot be read.
    """
    if kind not in KINDS:
        raise ValueError(f"kind {kind!r}: expected one of {', '.join(KINDS)}")
    schema = _SCHEMAS[kind]
    # A run killed while putting its months in place: finish it first (see commit.recover).
    commit.recover(Path(folder).resolve())
    root = Path(folder).resolve() / f"kind={kind}"
    empty = pl.DataFrame(schema={**HIVE_SCHEMA, **schema})
    if not root.is_dir() or not any(root.rglob("part.parquet")):
        return empty
    _refuse_foreign_files(root, schema)
    try:
        lf = pl.scan_parquet(root, hive_partitioning=True, hive_schema=HIVE_SCHEMA,
                             missing_columns="insert", extra_columns="ignore")
        if site is not None:
            lf = lf.filter(pl.col("site") == site)
        frame = lf.collect()
    except (OSError, pl.exceptions.PolarsError) as exc:
        raise InputError(f"{root}: cannot read the history ({_first_line(exc)})") from None
    frame = pl.concat([frame.select(*(pl.col(c).cast(t) for c, t in HIVE_SCHEMA.items())),
                       _conform(frame, schema, root)], how="horizontal")
    return frame.sort("site", "period", maintain_order=True)


@dataclass
class HistoryComparison:
    """compare_from_history's result: one row per equipment, and the method in words."""

    table: pl.DataFrame
    before: tuple[str, str]
    after: tuple[str, str]
    months_before: list[str]
    months_after: list[str]
    method: str


COMPARE_METHOD = (
    "from stored monthly draws, no refit: each period's draw is the run-hour-weighted mean of "
    "its months' kw, and its interval the run-hour-weighted means of kw_low and kw_high (as if "
    "the months' errors were fully correlated: wider than a refit's); its standard error the "
    "interval's larger half over the normal 97.5 % point; then the verdict rule shared with "
    "disagg compare: " + VERDICT_RULE + "; unclear when a stored month of either period is "
    "flagged prior-driven, schedule-bound, not-run or inseparable:<id> (disagg compare "
    "compares such loads as their group); missing when a period has no stored run-hours. "
    "Months that were not stored are simply absent. disagg compare refits the periods' data "
    "and is the exact method.")
# Stored rows with these flags (or inseparable:<id>) are unclear, as in disagg compare.
UNCLEAR_FLAGS = ("prior-driven", "schedule-bound", "not-run")
# Stored intervals are the breakdown's 95 % intervals (its default confidence).
STORED_CONFIDENCE = 0.95


def period_verdict(kw_before: float, low_before: float, high_before: float, kw_after: float,
                   low_after: float, high_after: float, min_change: float = 0.05,
                   confidence: float = STORED_CONFIDENCE) -> dict:
    """The shared verdict (disagg.analyses.verdict) on two periods' stored draws.

    Each period's standard error is the larger half of its interval over the normal
    quantile of the stored intervals' level, as disagg compare takes the larger half over
    the fit's critical value.
    """
    z = float(ndtri(0.5 + STORED_CONFIDENCE / 2.0))
    se_b = max(high_before - kw_before, kw_before - low_before) / z
    se_a = max(high_after - kw_after, kw_after - low_after) / z
    return change_verdict(kw_before, se_b, kw_after, se_a, confidence, min_change)


def parse_months(text: str, option: str) -> tuple[str, str]:
    """``"2025-01:2025-03"`` or ``"2025-01"`` -> ("2025-01", "2025-03") (inclusive).

    Raises:
        InputError: not YYYY-MM[:YYYY-MM], or the first after the last.
    """
    parts = [p.strip() for p in text.split(":")]
    ok = 1 <= len(parts) <= 2 and all(re.fullmatch(r"\d{4}-(0[1-9]|1[0-2])", p) for p in parts)
    if not ok:
        raise InputError(f"{option} {text!r}: expected months FROM:TO such as 2025-01:2025-03, "
                         "or one month such as 2025-06")
    first, last = parts[0], parts[-1]
    if last < first:
        raise InputError(f"{option} {text!r}: {last} is before {first}")
    return first, last


def compare_from_history(folder: str | Path, site: str, before: tuple[str, str],
                         after: tuple[str, str], min_change: float = 0.05) -> HistoryComparison:
    """Each equipment's draw in two ranges of stored months, and whether it rose or fell.

    An approximation from the stored monthly results, without touching the meter data:

    - a period's draw [kW] is the run-hour-weighted mean of its months' stored ``kw``
      (equal to the period's energy over its run-hours for an on-off load whose month draws
      were fitted on their own); a weather-dependent load's ``kw`` is at its reference
      temperature, as stored;
    - its interval is the run-hour-weighted mean of the months' ``kw_low`` and ``kw_high``:
      the months' errors are treated as fully correlated, so the interval is never narrower
      than a month's and is wider than a fit over the whole period would give;
    - the verdict is the rule shared with ``disagg compare`` (period_verdict,
      disagg.analyses.verdict.change_verdict): ``rising`` / ``falling`` when the change is
      significant and at least min_change, ``steady`` when two one-sided tests put it
      inside +-min_change, else ``unclear``; ``missing`` when a period has no stored
      run-hours;
    - rows are matched by equipment name as stored (a combined row ``A+B`` is its own row).

    ``disagg compare`` refits the two periods' data and is the exact method.

    Args:
        folder: the history folder.
        site: the site id (see site_id).
        before, after: (first, last) months YYYY-MM, inclusive.
        min_change: smallest relative change called rising or falling (fraction).

    Raises:
        InputError: nothing stored for the site in one of the periods.
    """
    hist = read_history(folder, site)
    frames = {}
    for name, (first, last) in (("before", before), ("after", after)):
        rows = hist.filter(pl.col("period").is_between(pl.lit(first), pl.lit(last))
                           & ~pl.col("equipment").str.starts_with("baseload")
                           & ~pl.col("equipment").is_in(["unexplained", "estimated-gaps"]))
        if rows.is_empty():
            raise InputError(f"{Path(folder).resolve()}: no stored breakdown of site {site!r} "
                             f"from {first} to {last}; run the breakdown for those months "
                             "with a [history] folder set")
        h = pl.col("run_hours")
        weight = pl.when(pl.col("kw").is_not_null() & (h > 0)).then(h).otherwise(0.0)
        frames[name] = rows.group_by("equipment", maintain_order=True).agg(
            ((pl.col("kw") * weight).sum() / weight.sum()).alias(f"kw_{name}"),
            ((pl.col("kw_low") * weight).sum() / weight.sum()).alias(f"kw_{name}_low"),
            ((pl.col("kw_high") * weight).sum() / weight.sum()).alias(f"kw_{name}_high"),
            weight.sum().alias(f"run_hours_{name}"),
            pl.col("period").n_unique().alias(f"months_{name}"),
            pl.col("flags").fill_null("").str.join(";").alias(f"_flags_{name}"))
    table = frames["before"].join(frames["after"], on="equipment", how="full",
                                  coalesce=True, maintain_order="left_right")
    b, a = pl.col("kw_before"), pl.col("kw_after")
    usable = (pl.col("run_hours_before") > 0) & (pl.col("run_hours_after") > 0) & (b > 0)
    change = pl.when(usable).then(a / b - 1.0).otherwise(None)
    table = table.with_columns(change.alias("change"), usable.fill_null(False).alias("_usable"))
    verdicts = []
    for r in table.iter_rows(named=True):
        if not r["_usable"]:
            verdicts.append("missing")
            continue
        flags = f"{r['_flags_before'] or ''};{r['_flags_after'] or ''}".split(";")
        if any(f in UNCLEAR_FLAGS or f.startswith("inseparable:") for f in flags):
            # As disagg compare: a draw the prior or the schedule decides is no evidence of
            # a change (a group is compared as one row only by a refit, disagg compare).
            verdicts.append("unclear")
            continue
        verdicts.append(period_verdict(r["kw_before"], r["kw_before_low"], r["kw_before_high"],
                                       r["kw_after"], r["kw_after_low"], r["kw_after_high"],
                                       min_change)["verdict"])
    table = table.drop("_usable", "_flags_before", "_flags_after").with_columns(
        pl.Series("verdict", verdicts, pl.String))
    periods = {name: sorted(hist.filter(pl.col("period").is_between(pl.lit(rng[0]),
                                                                    pl.lit(rng[1])))["period"]
                            .unique().to_list())
               for name, rng in (("before", before), ("after", after))}
    return HistoryComparison(table, before, after, periods["before"], periods["after"],
                             COMPARE_METHOD)


def select_equipment(frame: pl.DataFrame, equipment: str | None) -> pl.DataFrame:
    """Rows of one equipment id, including combined rows (``A+B``) that hold it.

    Raises:
        InputError: no stored row names that equipment (the stored names are listed).
    """
    if equipment is None:
        return frame
    rows = frame.filter(pl.col("equipment").str.split("+").list.contains(equipment))
    if rows.is_empty():
        known = ", ".join(frame["equipment"].unique(maintain_order=True).to_list())
        raise InputError(f"--equipment {equipment!r}: no stored rows of it; stored: {known}")
    return rows


def site_folder(folder: str | Path, kind: str, site_file: str | Path) -> Path:
    """The site's folder of one kind (breakdown or drift) in the history store."""
    return Path(folder).resolve() / f"kind={kind}" / f"site={site_id(site_file)}"


def check_configured(site) -> None:
    """check_folder and check_site_id on the site's [history] folder, when its file names
    one."""
    folder = getattr(site, "history", None)
    if folder is not None:
        check_folder(folder)
        check_site_id(folder, site)


def store_drift_configured(site, drift_result, written: list[Path] | None = None) -> list[Path]:
    """store_drift into the site's [history] folder when its file names one.

    Returns:
        [the site's drift folder in the store], or [] without a [history] table.

    Raises:
        OutputError: the history cannot be written (saying the outputs were written).
    """
    folder = getattr(site, "history", None)
    if folder is None:
        return []
    with outputs_already_written(written or []):
        store_drift(folder, site, drift_result)
    return [site_folder(folder, "drift", site.path)]
