"""Long series (1-minute data over years): the memory-saving paths give the same numbers.

The chunked and in-place paths (align.probe_rss, align.share_hours, drift.differences in
place, track.nlms keeping some rows) are checked against the plain whole-array computation
they replace, with small chunks so that the chunk edges are crossed. The data are the
synthetic clock-test building (invented). The memory itself is measured by
bench/longsite.py, not here (no timed or memory-bound test).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import polars as pl
import pytest

from disagg.analyses import clock
from disagg.analyses.drift import differences
from disagg.analyses.track import nlms
from disagg.fit import align as align_mod
from disagg.fit import solvers
from disagg.fit.align import align, frame_baseload, probe_rss
from disagg.fit.design import BaseloadBuilder, rows_of
from disagg.fit.estimate import design, weather_columns, weather_specs
from test_clock import LOADS, Building, _read


@pytest.fixture(scope="module")
def site_file(tmp_path_factory):
    b = Building(tmp_path_factory.mktemp("long"), seed=8, loads=LOADS)
    b.write_meter()
    return b.write_log("log", 0.0)


@pytest.mark.parametrize("small_chunks", [False, True])
@pytest.mark.parametrize("shift_min", [2.0, 150.0])
@pytest.mark.parametrize("some_unused", [False, True])
def test_probe_rss_is_the_fit_of_each_aligned_log(site_file, monkeypatch, small_chunks,
                                                   shift_min, some_unused):
    """The chunked probe equals aligning each moved log and solving on the stacked columns
    (the 150-minute shift moves the log past its 2-hour margin: some intervals are unknown
    to a moved log and left out of all three fits; some_unused: every 7th interval is not
    used by the run, so the baseload columns, of the used intervals, are not the frame's)."""
    if small_chunks:  # chunk edges inside the 1,344 intervals, the QR's chunks too
        monkeypatch.setattr(align_mod, "CHUNK_ROWS", 200)
        monkeypatch.setattr(solvers, "_QR_CHUNK_ROWS", 64)
        monkeypatch.setattr(solvers, "QR_CHUNK_ROWS", 64)
    site, meter, log = _read(site_file)
    aligned = align(site, meter, log)
    if some_unused:
        aligned.use = aligned.use & (np.arange(len(aligned.use)) % 7 != 3)
    base, _ = BaseloadBuilder(site, rows_of(aligned, site.timezone)).declared_columns()
    covered, rss = probe_rss(site, aligned, log, [-shift_min, shift_min], base)
    moved = [clock.shift_runlog(log, p) for p in (-shift_min, shift_min)]
    probes = [aligned] + [align(site, meter, m) for m in moved]
    mask = probes[0].use & probes[1].use & probes[2].use
    y = aligned.frame["energy_kwh"].to_numpy().astype(float)[mask]
    full, _ = frame_baseload(aligned, site.baseload, site.timezone)  # every interval's
    expected = [clock._rss_quick(np.column_stack([a.hours[mask], full[mask]]), y)
                for a in probes]
    assert covered == int(mask.sum())
    assert (covered < len(mask)) == (shift_min > 120 or some_unused)
    np.testing.assert_allclose(rss, expected, rtol=1e-9)


@pytest.mark.parametrize("profile", ["constant", "occupied", "hour-of-week"])
@pytest.mark.parametrize("closed", [False, True])
@pytest.mark.parametrize("some_unused", [False, True])
def test_declared_columns_without_rows_equal_the_builders(site_file, profile, closed,
                                                           some_unused):
    """BaseloadBuilder.declared (the clock test's, groups' and check's columns, made without
    the fits' Rows) gives the builder's declared_columns bit for bit."""
    import dataclasses

    from disagg.inputs.config import BaseloadSettings, parse_spell

    site, meter, log = _read(site_file)
    spells = ("Mon-Fri 07:00-19:00",)
    shut = (dt.date(2025, 5, 7),) if closed else ()
    site = dataclasses.replace(site, baseload=BaseloadSettings(
        profile, tuple(parse_spell(t) for t in spells), spells, shut))
    aligned = align(site, meter, log)
    if some_unused:
        aligned.use = aligned.use & (np.arange(len(aligned.use)) % 5 != 1)
    B, names = BaseloadBuilder.declared(site, aligned)
    want, want_names = BaseloadBuilder(site, rows_of(aligned, site.timezone)).declared_columns()
    assert names == want_names
    np.testing.assert_array_equal(B, want)
    assert B.shape == (int(aligned.use.sum()), {"constant": 1, "occupied": 2}.get(
        profile, 168 + 24 * closed))
    # And against align.baseload_columns on the used rows' own times, a path that shares
    # neither design._profile_columns nor the row filtering with the two above.
    import polars as pl

    from disagg.fit.align import baseload_columns

    used = aligned.frame.filter(pl.Series(aligned.use))
    ref, ref_names = baseload_columns(site.baseload, site.timezone, used["start_utc"],
                                      used["start_utc"].dt.epoch("ns").to_numpy(),
                                      used["end_utc"].dt.epoch("ns").to_numpy())
    assert names == ref_names
    np.testing.assert_array_equal(B, ref)


@pytest.mark.parametrize("offset_min", [-3.0, 0.0, 3.0, 150.0, -150.0, 0.25])
@pytest.mark.parametrize("gaps", [False, True])
def test_moved_edges_give_the_hours_of_the_moved_log(site_file, offset_min, gaps):
    """align._Shifted (probe_rss's hours of a moved log) gives overlap_hours of the moved
    segments bit for bit, and the same intervals with unknown time, with the log's first
    and last segments inside the meter period (150 min) and with gaps between segments."""
    site, meter, log = _read(site_file)
    f = meter.frame
    s_ns = f["start_utc"].dt.epoch("ns").to_numpy().astype(np.int64)
    e_ns = f["end_utc"].dt.epoch("ns").to_numpy().astype(np.int64)
    moved = clock.shift_runlog(log, offset_min)
    for eq in site.equipment:
        seg, mseg = log.segments[eq.id], moved.segments[eq.id]
        if gaps:  # every 5th segment dropped: unknown time inside the log
            keep = np.arange(len(seg.start_ns)) % 5 != 2
            seg = type(seg)(seg.start_ns[keep], seg.end_ns[keep], seg.value[keep])
            mseg = type(mseg)(mseg.start_ns[keep], mseg.end_ns[keep], mseg.value[keep])
        for exponent in (1.0, 2.5):
            run_h, unknown = align_mod._Shifted(seg, exponent).hours(
                s_ns, e_ns, int(np.int64(round(offset_min * clock.NS_PER_MIN))))
            want_h, want_unknown = align_mod.overlap_hours(mseg, s_ns, e_ns, exponent)
            np.testing.assert_array_equal(run_h, want_h)
            np.testing.assert_array_equal(unknown, want_unknown > align_mod._UNKNOWN_TOL_H)
            assert unknown.any() == (gaps or abs(offset_min) > 120)


def test_design_matches_the_whole_array_construction(site_file):
    site, meter, log = _read(site_file)
    aligned = align(site, meter, log)
    use = aligned.use.copy()
    use[::7] = False  # some intervals left out
    aligned.use = use
    terms = [["CH-1"], ["AHU-1", "P-1"]]  # a combined row: the mean of its members
    index = {e: j for j, e in enumerate(aligned.equipment_ids)}
    H = aligned.hours[use]
    expected = np.column_stack([H[:, [index[m] for m in t]].mean(axis=1) for t in terms])
    d = design(site, aligned, terms)
    f = aligned.frame.filter(pl.Series(use))
    s_ns, e_ns = (f[c].dt.epoch("ns").to_numpy() for c in ("start_utc", "end_utc"))
    B, _ = align_mod.baseload_columns(site.baseload, site.timezone, f["start_utc"], s_ns, e_ns)
    W = weather_columns(expected, None, weather_specs(site, terms))
    np.testing.assert_array_equal(d.X, np.column_stack([expected, W, B]))


def test_differences_in_place_equal_the_copy():
    rng = np.random.default_rng(3)
    t0 = dt.datetime(2025, 1, 1, tzinfo=dt.UTC)
    steps = np.cumsum(rng.choice([1, 1, 1, 3], 400))  # gaps of two missing minutes
    starts = [t0 + dt.timedelta(minutes=int(s)) for s in steps]
    frame = pl.DataFrame({"start_utc": starts,
                          "end_utc": [s + dt.timedelta(minutes=1) for s in starts]})
    X = rng.random((400, 5))
    y = rng.random(400)
    prev = {"end_utc": starts[0].isoformat(), "x": [0.5] * 5, "y": 0.25}
    for previous in (None, prev):
        dX, dy = differences(frame, X, y, previous)
        X2, y2 = X.copy(), y.copy()
        dX2, dy2 = differences(frame, X2, y2, previous, in_place=True)
        assert dX2 is X2 and dy2 is y2
        np.testing.assert_array_equal(dX2, dX)
        np.testing.assert_array_equal(dy2, dy)
        assert dX[1:][np.diff(steps) != 1].sum() == 0.0  # no difference across a gap


def test_nlms_keeping_some_rows_equals_those_rows_of_the_full_run(monkeypatch):
    monkeypatch.setattr("disagg.analyses.track._NLMS_CHUNK_ROWS", 37)
    rng = np.random.default_rng(4)
    X = rng.random((300, 4)) * (rng.random((300, 4)) < 0.4)
    y = X @ np.array([2.0, 5.0, 1.0, 3.0]) + rng.normal(0, 0.1, 300)
    scale = np.array([1.0, 2.0, 0.5, 1.5])
    full = nlms(X, y, np.zeros(4), 0.5, 1.0, scale)
    rows = np.array([0, 36, 37, 150, 299])
    np.testing.assert_array_equal(nlms(X, y, np.zeros(4), 0.5, 1.0, scale, rows=rows),
                                  full[rows])
    with pytest.raises(ValueError, match="increasing"):
        nlms(X, y, np.zeros(4), 0.5, 1.0, scale, rows=np.array([5, 3]))


# --- memory limits ------------------------------------------------------------------------

# The limit is set after the command's modules are loaded (as under a limit that lets the
# program start), with `room` MB of address space to spare.
_UNDER_LIMIT = """
import resource, sys
from disagg.cli import app
import disagg.analyses.drift, disagg.jobs.site, disagg.present.report, typer.rich_utils
vm = [int(x.split()[1]) * 1024 for x in open('/proc/self/status') if x.startswith('VmSize:')][0]
resource.setrlimit(resource.RLIMIT_AS, (vm + int(sys.argv[1]) * 2**20, resource.RLIM_INFINITY))
sys.argv = ['disagg'] + sys.argv[2:]
app()
"""


@pytest.mark.parametrize("command", ["breakdown", "report", "drift"])
def test_a_run_that_cannot_fit_under_a_memory_limit_is_one_error_line(tmp_path, command):
    """Under `ulimit -v` (RLIMIT_AS) with 64 MB of address space to spare, a site of 200,000
    meter rows is refused before reading with one Error line and exit 1, not an allocation
    abort (exit 134, as before the check) or a traceback. The rows are invented and never
    parsed."""
    import subprocess
    import sys

    from sitefiles import write_site_toml

    t0 = dt.datetime(2025, 1, 1, 0, 1)
    rows = "".join(f"{t0 + dt.timedelta(minutes=i):%Y-%m-%dT%H:%M},0.5\n"
                   for i in range(200_000))
    (tmp_path / "meter.csv").write_text("time,kwh\n" + rows)
    (tmp_path / "log.csv").write_text("time,point,state\n2025-01-01T00:00,A,on\n")
    site = write_site_toml(tmp_path / "site.toml", name="Limit test", timezone="UTC",
                           meter_file="meter.csv", runlog_file="log.csv",
                           equipment=["A", "B", "C"])
    out = subprocess.run([sys.executable, "-c", _UNDER_LIMIT, "64", command, str(site),
                          "--out", str(tmp_path / "out")],
                         capture_output=True, text=True, timeout=120)
    lines = out.stderr.strip().splitlines()
    assert out.returncode == 1, out.stderr
    assert len(lines) == 1 and lines[0].startswith("Error: "), out.stderr
    assert "meter.csv: 200001 lines x 3 loads" in lines[0] and "ulimit -v" in lines[0]
    assert not (tmp_path / "out").exists()


def test_memory_error_is_one_error_line(capsys):
    """numpy raises MemoryError when an array cannot be allocated: one Error line, exit 1."""
    import typer

    from disagg import cli

    def fails():
        raise MemoryError("Unable to allocate 1.26 GiB for an array with shape (5259600, 30)")

    with pytest.raises(typer.Exit) as exc:
        cli._guard(fails)
    assert exc.value.exit_code == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("Error: out of memory")


def test_a_whole_range_fit_shares_the_aligned_hours_with_its_design(site_file):
    """After the whole-range fit, aligned.hours is a read-only view of the fit's term columns
    with the same numbers (one (n, k) array, not two); a fit of some intervals leaves it."""
    import dataclasses

    from disagg.fit.estimate import estimate_draws

    site, meter, log = _read(site_file)
    aligned = align(site, meter, log)
    assert aligned.use.all()
    before = aligned.hours.copy()
    part = dataclasses.replace(aligned, use=np.arange(len(aligned.use)) < 700)
    estimate_draws(site, part)
    assert part.hours is aligned.hours  # a fit of some intervals shares nothing
    est = estimate_draws(site, aligned)
    assert np.shares_memory(aligned.hours, est.hours)
    assert not aligned.hours.flags.writeable
    np.testing.assert_array_equal(aligned.hours, before)


def test_a_small_site_runs_under_a_generous_memory_limit(tmp_path, site_file):
    """The check does not refuse what fits: the clock-test building (1,344 intervals) under
    a limit 3 GB above the loaded program runs to the end (exit 0, its files written)."""
    import subprocess
    import sys

    out = subprocess.run([sys.executable, "-c", _UNDER_LIMIT, "3072", "breakdown",
                          str(site_file), "--out", str(tmp_path / "out"), "-q"],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert (tmp_path / "out" / "breakdown.csv").is_file()


def test_hours_are_not_shared_with_a_much_wider_design(site_file):
    """A view keeps its whole parent alive: the hours are not pointed at a design more than
    SHARE_MAX_WIDENING times their size (a wide baseload form), only at a narrow one."""
    from disagg.fit.align import SHARE_MAX_WIDENING, share_hours

    site, meter, log = _read(site_file)
    aligned = align(site, meter, log)
    H = aligned.hours.copy()
    n, k = H.shape
    members = [[e] for e in aligned.equipment_ids]
    wide = np.column_stack([H, np.zeros((n, int(SHARE_MAX_WIDENING * k) + 1))])
    assert not share_hours(aligned, wide[:, :k], members)
    assert not np.shares_memory(aligned.hours, wide)
    narrow = np.column_stack([H, np.zeros((n, 1))])
    assert share_hours(aligned, narrow[:, :k], members)
    assert np.shares_memory(aligned.hours, narrow)


# --- designs made a block of rows at a time (solvers.LazyRows) ----------------------------

def _switching_whole(X, interval_h, keep, k, kx):
    """switching_steps' differenced design as it was built: each whole column split."""
    from disagg.fit.intervals import split_switching

    inv_h = 1.0 / interval_h
    Xd = np.empty((int(keep.sum()), k + kx))
    for c in range(k):
        up, down = split_switching(X[:, c], interval_h)
        Xd[:, c] = np.diff(up * inv_h)[keep]
        Xd[:, k + c] = np.diff(down * inv_h)[keep]
    for c in range(k, kx):
        Xd[:, k + c] = np.diff(X[:, c] * inv_h)[keep]
    return Xd


@pytest.mark.parametrize("block_steps", [7, 64, 5000])
def test_switching_design_by_blocks_equals_the_whole_columns(block_steps):
    """Blocks of 7 and 64 steps (checkpoints of the running sum of rises every block) give
    exactly the numbers of splitting each whole column, with left-out steps and a first
    kept step at row 0 or later; 5,000 is one block."""
    from disagg.fit.intervals import switching_design

    rng = np.random.default_rng(12)
    n, k, kx = 1500, 3, 4
    interval_h = np.where(rng.random(n) < 0.1, 0.5, 0.25)
    X = np.column_stack([rng.random((n, k)) * (rng.random((n, k)) < 0.5) * interval_h[:, None],
                         rng.normal(0, 3, (n, kx - k))])
    for keep in (rng.random(n - 1) < 0.8, np.r_[False, False, rng.random(n - 3) < 0.5]):
        lazy = switching_design(X, interval_h, keep, k, kx, block_steps=block_steps)
        whole = _switching_whole(X, interval_h, keep, k, kx)
        assert lazy.shape == whole.shape
        np.testing.assert_array_equal(lazy.dense(), whole)
        np.testing.assert_array_equal(lazy[13:211], whole[13:211])  # across blocks
        np.testing.assert_array_equal(lazy @ np.arange(1.0, k + kx + 1),
                                      whole @ np.arange(1.0, k + kx + 1))


@pytest.mark.parametrize("with_levels", [False, True])
def test_fit_on_a_lazy_design_equals_the_fit_on_the_array(monkeypatch, with_levels):
    """fit_model reads a LazyRows design by row slices only: the same coefficients,
    covariance, prior weights and residuals (1e-9) as on the materialised array, with small
    chunks so that block, QR and sum chunk edges all fall inside the rows; with and without
    indicator columns (switching_steps' hourly mean steps)."""
    from disagg.fit.solvers import Indicators, LazyRows, fit_model

    monkeypatch.setattr(solvers, "_QR_CHUNK_ROWS", 64)
    monkeypatch.setattr(solvers, "_SUM_CHUNK_ROWS", 300)
    rng = np.random.default_rng(5)
    n, p = 2000, 6
    X = rng.random((n, p)) * (rng.random((n, p)) < 0.6)
    y = X @ np.array([3.0, 1.0, 0.0, 2.0, 5.0, 0.5]) + rng.normal(0, 0.3, n)
    block = np.repeat(np.arange(n // 50), 50)
    bounds = np.array([0, 170, 171, 900, 1333, n])
    lazy = LazyRows(bounds, p, lambda b: X[bounds[b]:bounds[b + 1]].copy())
    ind = Indicators(rng.integers(-1, 24, n), np.ones(n), 24) if with_levels else None
    q = p + (24 if with_levels else 0)
    args = (y, np.zeros(q), np.r_[np.full(p, 4.0), np.full(q - p, 100.0)],
            np.r_[np.zeros(p), np.full(q - p, -np.inf)])
    a = fit_model(X, *args, block=block, indicators=ind)
    b = fit_model(lazy, *args, block=block, indicators=ind)
    for field in ("coef", "cov", "prior_weight", "residual"):
        np.testing.assert_allclose(getattr(b, field), getattr(a, field), rtol=1e-9,
                                   atol=1e-12 * np.abs(getattr(a, field)).max())
    assert (a.sigma2, a.edf, a.lag, a.n_blocks) == pytest.approx((b.sigma2, b.edf, b.lag,
                                                                  b.n_blocks), rel=1e-9)
    np.testing.assert_array_equal(lazy.columns(np.array([4, 1]))[5:900], X[5:900][:, [4, 1]])


def test_by_day_variant_by_blocks_equals_the_projected_array(site_file, monkeypatch):
    """The by-day variant fitted on its projected design made a few days at a time equals
    the fit on the whole projected array (_project_out_days, as it was built), with blocks of
    about 3 days so that block edges fall inside the clock-test building's 14 days."""
    from disagg.fit import intervals as iv_mod
    from disagg.fit.design import BaseloadBuilder, design_matrix, rows_of, term_hours
    from disagg.fit.estimate import WEAK_SD_FACTOR, Priors, solve
    from disagg.fit.select import Form, FormChoice
    from disagg.fit.solvers import fit_model
    from disagg.fit.terms import plan_terms

    monkeypatch.setattr(iv_mod, "_PROJECT_CHUNK_ROWS", 300)
    site, meter, log = _read(site_file)
    aligned = align(site, meter, log)
    rows = rows_of(aligned, site.timezone)
    builder = BaseloadBuilder(site, rows)
    B, names = builder.columns("constant")
    H = rows.hours
    plan = plan_terms(site, aligned.equipment_ids, H, B)
    index = {e: j for j, e in enumerate(aligned.equipment_ids)}
    X = design_matrix([term_hours(H, index, m) for m in plan.members], rows.temp_c, {}, B)
    k = len(plan.fitted)
    priors = Priors(plan.fitted, 0, WEAK_SD_FACTOR * float(np.max(rows.y / rows.interval_h)))
    choice = FormChoice(Form("constant", False), True, [], 1.0)
    s = solve(rows, X, k, k, names, choice, builder, priors)
    hull = iv_mod.Hull.start(s.coef, iv_mod.jackknife(s, rows, 0.95), 0.95)
    name, entry, bound = iv_mod.by_day_variant(rows, s, priors, plan.fitted,
                                               int(rows.days.max()), hull)
    # The whole projected array, as by_day_variant built it before.
    V = iv_mod._project_out_days(np.column_stack([s.Hx, rows.y]), rows.interval_h[:, None],
                                 rows.days)
    md, sdd = priors(0)
    fd = fit_model(V[:, :-1], V[:, -1], md, sdd, np.zeros(k), block=rows.days)
    for t in plan.fitted:
        c = t.column
        assert entry[t.id]["kw"] == pytest.approx(float(fd.coef[c]), rel=1e-9)
        assert entry[t.id]["se_kw"] == pytest.approx(float(fd.se[c]), rel=1e-9)
        Hc = s.Hf[:, c]
        r2 = 1.0 - float(np.sum(V[:, c] ** 2)) / float(np.sum((Hc - Hc.mean()) ** 2))
        assert entry[t.id]["r2_with_daily_baseload"] == pytest.approx(r2, rel=1e-9, abs=1e-12)
    assert name == "constant-by-day" and len(entry) == k


# --- the entry guard under a tiny address-space limit -------------------------------------

@pytest.mark.parametrize("limit_mb", [200, 300, 550])
def test_a_limit_too_small_to_load_the_libraries_is_one_error_line(tmp_path, site_file,
                                                                    limit_mb):
    """`ulimit -v` of 200-550 MB (RLIMIT_AS set before the program starts): the imports of
    numpy/polars would fail inside C extensions (a MemoryError traceback, or a polars import
    that hung until killed at 550 MB); the entry point refuses with one Error line, exit 1,
    quickly."""
    import resource
    import subprocess
    import sys

    def limit():
        resource.setrlimit(resource.RLIMIT_AS, (limit_mb * 2**20, resource.RLIM_INFINITY))

    out = subprocess.run([sys.executable, "-m", "disagg.cli", "breakdown", str(site_file),
                          "--out", str(tmp_path / "out")], capture_output=True, text=True,
                         timeout=60, preexec_fn=limit)
    lines = out.stderr.strip().splitlines()
    assert out.returncode == 1, out.stderr
    assert len(lines) == 1 and lines[0].startswith("Error: a memory limit of "), out.stderr
    assert "ulimit -v" in lines[0]
    assert not (tmp_path / "out").exists()


def test_memory_running_out_in_a_command_s_imports_is_one_error_line(capsys, monkeypatch):
    """Outside a command's own guard (its lazy imports), an import that fails for want of
    memory ("failed to map segment", as unicodedata's did under 500 MB) is one Error line and
    exit 1; any other error is left alone."""
    from disagg import cli

    monkeypatch.setattr(cli, "_address_limit_error", lambda: None)
    app = cli._App(add_completion=False)

    @app.command()
    def boom(kind: str) -> None:
        if kind == "map":
            raise ImportError("/usr/lib/x.so: failed to map segment from shared object")
        if kind == "memory":
            raise MemoryError()
        raise ImportError("No module named 'nothere'")

    for kind in ("map", "memory"):
        with pytest.raises(SystemExit) as exc:
            app([kind], standalone_mode=True)
        assert exc.value.code == 1
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and err[0].startswith("Error: out of memory"), err
    with pytest.raises(ImportError, match="nothere"):
        app(["other"], standalone_mode=True)


# --- designs written over the hours (align.hours_buffer) ----------------------------------

def _fresh_buffer(aligned, site):
    """aligned with its own hours buffer as align makes it: the hours, then room for the
    declared profile's baseload columns."""
    import dataclasses

    from disagg.fit.align import BASELOAD_COLUMN_COUNT

    n, k = aligned.hours.shape
    base = np.empty((n, k + BASELOAD_COLUMN_COUNT[site.baseload.profile]))
    base[:, :k] = aligned.hours
    return dataclasses.replace(aligned, hours=base[:, :k])


def test_a_whole_range_design_is_written_beside_the_hours_with_the_same_fit(site_file):
    """align leaves room beside the hours for the declared profile's baseload columns; the
    whole-range fit writes its design there (one (n, k + m) array, the hours its first
    columns) and fits the same numbers as on a design built as a new array."""
    import dataclasses

    from disagg.fit.align import hours_buffer
    from disagg.fit.estimate import estimate_draws

    site, meter, log = _read(site_file)
    aligned = align(site, meter, log)
    k = aligned.hours.shape[1]
    members = [[e] for e in aligned.equipment_ids]
    buf = hours_buffer(aligned, members, aligned.hours.base.shape[1])
    assert buf is not None and buf.shape[1] > k
    plain = dataclasses.replace(aligned, hours=np.ascontiguousarray(aligned.hours))
    assert hours_buffer(plain, members, k + 1) is None  # no room: a new design
    shared = _fresh_buffer(aligned, site)
    plain_hours, buffer = plain.hours, shared.hours.base
    a = estimate_draws(site, plain)
    b = estimate_draws(site, shared)
    assert b.hours.base is buffer  # the design is the hours' own buffer
    assert not np.shares_memory(a.hours, plain_hours)  # a new design
    for f in ("kw", "kw_low", "kw_high", "se_kw", "base_kw", "cov_base", "fitted"):
        np.testing.assert_array_equal(getattr(b, f), getattr(a, f))
    assert b.warnings == a.warnings


def test_drift_writing_its_design_over_the_hours_gives_the_same_result():
    """drift_aligned(consume_hours=True) differences its design in the hours' own buffer
    (no second (n, k) array) and drops aligned.hours; the drift table, summary and state are
    those of a run that builds its design as a new array."""
    from synthetic import make_building

    from disagg.analyses.drift import drift_aligned
    from disagg.fit.align import hours_buffer

    s = make_building(12, days=120)
    kept = _fresh_buffer(s.aligned, s.site)
    consumed = _fresh_buffer(s.aligned, s.site)
    assert hours_buffer(consumed, [[e] for e in consumed.equipment_ids],
                        consumed.hours.base.shape[1]) is not None
    a = drift_aligned(s.site, kept)
    b = drift_aligned(s.site, consumed, consume_hours=True)
    assert consumed.hours is None and kept.hours is not None
    assert a.table.equals(b.table)
    assert a.state == b.state


def test_interval_parts_of_some_rows_equal_those_rows_of_the_whole(site_file):
    """monthly_breakdown takes each month's interval parts alone (a long series holds one
    month's (rows, terms + 2) array, not the whole range's): the same numbers."""
    from disagg.analyses.breakdown import interval_parts_kwh
    from disagg.fit.estimate import estimate_draws

    site, meter, log = _read(site_file)
    est = estimate_draws(site, align(site, meter, log))
    whole = interval_parts_kwh(est)
    rows = np.zeros(len(est.y), dtype=bool)
    rows[100:700] = True
    np.testing.assert_array_equal(interval_parts_kwh(est, rows), whole[rows])
    np.testing.assert_allclose(whole.sum(axis=1), est.y, rtol=1e-12)


def test_a_long_series_hour_of_week_variant_by_blocks_equals_the_array(monkeypatch):
    """The hour-of-week rival of a long series is fitted on [run-hours, closure and
    within-hour slope columns] made a block of rows at a time (no (n, k + 25) copy): the
    same variant draws, standard errors and prior weights (1e-9) as on the whole array; the
    blocks' columns are hour_of_week_sparse's exactly. Long is made short here (a threshold
    of 100 rows, blocks of 3,000) on the 120-day synthetic building (invented)."""
    from synthetic import make_building

    from disagg.fit import intervals as iv_mod
    from disagg.fit.design import BaseloadBuilder, rows_of
    from disagg.fit.estimate import estimate_draws
    from disagg.fit.select import Form

    s = make_building(12, days=120)
    builder = BaseloadBuilder(s.site, rows_of(s.aligned, s.site.timezone))
    dense, names, ind = builder.hour_of_week_blocks()
    whole, names_w, ind_w = builder.hour_of_week_sparse()
    assert names == names_w and any(n.startswith("baseload_slope_h") for n in names)
    np.testing.assert_array_equal(np.vstack([dense(0, 500), dense(500, len(whole))]), whole)
    np.testing.assert_array_equal(ind.level, ind_w.level)
    form = Form(s.site.baseload.profile, False)
    assert "hour-of-week" in iv_mod.MORE_FLEXIBLE[form.profile]
    a = estimate_draws(s.site, s.aligned, form=form)
    monkeypatch.setattr(iv_mod, "LONG_DESIGN_ROWS", 100)
    monkeypatch.setattr(iv_mod, "_VARIANT_BLOCK_ROWS", 3000)
    b = estimate_draws(s.site, s.aligned, form=form)
    va, vb = a.variants["hour-of-week"], b.variants["hour-of-week"]
    assert set(va) == set(vb) and "skipped" not in va
    for tid in va:
        for key in ("kw", "se_kw"):
            assert vb[tid][key] == pytest.approx(va[tid][key], rel=1e-9)
        assert vb[tid]["prior_weight"] == pytest.approx(va[tid]["prior_weight"], rel=1e-6,
                                                        abs=1e-12)
    np.testing.assert_allclose(b.kw_low, a.kw_low, rtol=1e-9)
    np.testing.assert_allclose(b.kw_high, a.kw_high, rtol=1e-9)
