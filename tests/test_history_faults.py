"""The history store under faults: a run's months all or none, concurrent runs lose nothing,
ids that would collide are refused, a file of another schema is one error (all data invented)."""

from __future__ import annotations

import datetime as dt
import json
import os
import subprocess
import sys
import textwrap
import time
from pathlib import Path
from types import SimpleNamespace

import polars as pl
import pytest

from disagg.errors import InputError, OutputError
from disagg.present import commit, history

PERIODS = [f"2025-{m:02d}" for m in range(1, 13)]


def _months(tag: str) -> dict[str, pl.DataFrame]:
    return {p: pl.DataFrame({"equipment": ["H-1"], "flags": [tag]}) for p in PERIODS}


def _stored_flags(folder: Path) -> dict[str, str]:
    out = {}
    for p in PERIODS:
        part = folder / "kind=breakdown" / "site=plant" / f"period={p}" / "part.parquet"
        out[p] = pl.read_parquet(part)["flags"][0]
    return out


def _store(folder: Path, tag: str) -> None:
    history._replace_months(folder, "breakdown", "plant", _months(tag))


def test_an_interrupt_before_the_commit_point_keeps_every_old_month(tmp_path, monkeypatch):
    _store(tmp_path, "old")

    def hook(step):
        if step == "backed-up":
            raise KeyboardInterrupt

    monkeypatch.setattr(commit, "after_step", hook)
    with pytest.raises(KeyboardInterrupt):
        _store(tmp_path, "new")
    assert set(_stored_flags(tmp_path).values()) == {"old"}
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(commit.PREFIX)]


def test_an_interrupt_after_the_fourth_month_stores_all_twelve(tmp_path, monkeypatch):
    # The failure the issue saw: months 1-4 new, 5-12 old.
    _store(tmp_path, "old")
    placed = []

    def hook(step):
        if step.startswith("placed"):
            placed.append(step)
            if len(placed) == 4:
                raise KeyboardInterrupt

    monkeypatch.setattr(commit, "after_step", hook)
    with pytest.raises(KeyboardInterrupt):
        _store(tmp_path, "new")
    assert set(_stored_flags(tmp_path).values()) == {"new"}


def test_a_failed_rename_of_the_fifth_month_puts_the_first_four_back(tmp_path, monkeypatch):
    _store(tmp_path, "old")
    real = os.replace

    def flaky(src, dst):
        if "period=2025-05" in str(dst) and commit.PREFIX in str(src) and ".previous" not in str(src):
            raise OSError(28, "No space left on device", str(dst))
        return real(src, dst)

    monkeypatch.setattr(commit.os, "replace", flaky)
    with pytest.raises(OutputError) as exc:
        _store(tmp_path, "new")
    assert str(exc.value) == f"{tmp_path}: cannot write the history (No space left on device)"
    assert set(_stored_flags(tmp_path).values()) == {"old"}


def test_a_run_killed_between_two_months_is_finished_by_the_next_store(tmp_path):
    _store(tmp_path, "old")
    code = textwrap.dedent(f"""
        import os
        import polars as pl
        from pathlib import Path
        from disagg.present import commit, history
        n = []
        def hook(step):
            if step.startswith("placed"):
                n.append(step)
                if len(n) == 4:
                    os._exit(9)
        commit.after_step = hook
        history._replace_months(Path({str(tmp_path)!r}), "breakdown", "plant",
            {{p: pl.DataFrame({{"equipment": ["H-1"], "flags": ["new"]}}) for p in {PERIODS!r}}})
    """)
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 9, proc.stderr
    assert sorted(_stored_flags(tmp_path).values()).count("new") == 4  # as the kill left it
    # The next run into the folder first finishes the killed run's months.
    history._replace_months(tmp_path, "drift", "other", {})
    assert set(_stored_flags(tmp_path).values()) == {"new"}


# ---------------------------------------------------------------------------------------
# Two runs at once

def _drift_writer(folder: Path, site_file: Path, days: list[int], go: Path) -> subprocess.Popen:
    code = textwrap.dedent(f"""
        import datetime as dt, time
        from pathlib import Path
        from types import SimpleNamespace
        import polars as pl
        from disagg.present import history
        go = Path({str(go)!r})
        while not go.exists():
            time.sleep(0.01)
        days = {days!r}
        table = pl.DataFrame({{"date": [dt.date(2025, 6, d) for d in days],
                               "equipment": ["H-1"] * len(days),
                               "kw_tracked": [float(d) for d in days]}})
        site = SimpleNamespace(name="Plant", path=Path({str(site_file)!r}))
        for d in days:
            history.store_drift({str(folder)!r}, site,
                                SimpleNamespace(table=table.filter(pl.col("date").dt.day() == d)))
    """)
    return subprocess.Popen([sys.executable, "-c", code], stderr=subprocess.PIPE, text=True)


def test_two_runs_storing_drift_days_at_once_lose_none(tmp_path):
    go = tmp_path / "go"
    site_file = tmp_path / "plant.toml"
    odd, even = list(range(1, 31, 2)), list(range(2, 31, 2))
    procs = [_drift_writer(tmp_path / "hist", site_file, days, go) for days in (odd, even)]
    time.sleep(1.0)
    go.touch()
    for p in procs:
        assert p.wait(timeout=300) == 0, p.stderr.read()
    stored = history.read_history(tmp_path / "hist", "plant", kind="drift")
    assert sorted(d.day for d in stored["date"]) == list(range(1, 31))


def test_a_second_run_waits_for_the_history_lock(tmp_path):
    folder = history.check_folder(tmp_path / "hist")
    go = tmp_path / "go"
    go.touch()
    with history._locked(folder):
        proc = _drift_writer(folder, tmp_path / "plant.toml", [5], go)
        time.sleep(3.0)
        assert proc.poll() is None  # still waiting for the lock
    assert proc.wait(timeout=120) == 0, proc.stderr.read()
    stored = history.read_history(folder, "plant", kind="drift")
    assert stored["date"].to_list() == [dt.date(2025, 6, 5)]


# ---------------------------------------------------------------------------------------
# Ids and foreign files

def _drift_of(days):
    return SimpleNamespace(table=pl.DataFrame({
        "date": [dt.date(2025, 6, d) for d in days], "equipment": ["H-1"] * len(days),
        "kw_tracked": [1.0] * len(days)}))


def test_site_files_whose_ids_would_collide_are_refused(tmp_path):
    spaced = SimpleNamespace(name="A", path=tmp_path / "a b.toml")
    underscored = SimpleNamespace(name="B", path=tmp_path / "a_b.toml")
    assert history.site_id(spaced.path) == history.site_id(underscored.path) == "a_b"
    history.store_drift(tmp_path / "hist", spaced, _drift_of([1]))
    with pytest.raises(OutputError) as exc:
        history.store_drift(tmp_path / "hist", underscored, _drift_of([2]))
    assert str(exc.value) == (
        f"{underscored.path}: its history id 'a_b' is already used in {tmp_path / 'hist'} by "
        "the site file a b.toml; names that differ only in characters other than "
        "letters, digits, '.', '_' and '-' share an id: rename one of the two")
    stored = history.read_history(tmp_path / "hist", "a_b", kind="drift")
    assert stored["date"].to_list() == [dt.date(2025, 6, 1)]  # the first site's day, alone
    # The same file run again (even from another folder) is the same site.
    moved = SimpleNamespace(name="A", path=tmp_path / "elsewhere" / "a b.toml")
    history.store_drift(tmp_path / "hist", moved, _drift_of([2]))


def test_a_history_file_of_another_schema_is_one_error(tmp_path):
    part = tmp_path / "kind=breakdown" / "site=plant" / "period=2025-01" / "part.parquet"
    part.parent.mkdir(parents=True)
    pl.DataFrame({"kw": ["high"], "equipment": ["H-1"]}).write_parquet(part)
    with pytest.raises(InputError) as exc:
        history.read_history(tmp_path, "plant")
    assert str(exc.value) == (f"{tmp_path / 'kind=breakdown'}: not a disagg history file: its "
                              "column 'kw' holds String, expected Float64; move it out of the "
                              "history folder")
    with pytest.raises(InputError) as exc:
        history._read_file(part, history.BREAKDOWN_SCHEMA)
    assert str(exc.value).startswith(f"{part}: not a disagg history file: its column 'kw'")


def test_reading_the_history_first_finishes_a_killed_run(tmp_path):
    # The same kill as above, then a read (disagg history) before any other write.
    _store(tmp_path, "old")
    staging = tmp_path / f"{commit.PREFIX}{commit._host()}-{_dead_pid()}-abc"
    staging.mkdir()
    moves = []
    for i, p in enumerate(PERIODS[4:]):
        new = pl.DataFrame({"equipment": ["H-1"], "flags": ["new"]})
        new.write_parquet(staging / f"{i}.parquet")
        moves.append([f"{i}.parquet", str(tmp_path / "kind=breakdown" / "site=plant"
                                          / f"period={p}" / "part.parquet")])
    (staging / commit.JOURNAL).write_text(json.dumps({"moves": moves}))
    stored = history.read_history(tmp_path, "plant")
    assert stored.filter(pl.col("period") >= "2025-05")["flags"].unique().to_list() == ["new"]
    assert not staging.exists()


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_site_toml_files_in_folders_whose_ids_would_collide_are_refused(tmp_path):
    spaced = SimpleNamespace(name="A", path=tmp_path / "north wing" / "site.toml")
    underscored = SimpleNamespace(name="B", path=tmp_path / "north_wing" / "site.toml")
    assert history.site_id(spaced.path) == history.site_id(underscored.path) == "north_wing"
    history.store_drift(tmp_path / "hist", spaced, _drift_of([1]))
    with pytest.raises(OutputError) as exc:
        history.store_drift(tmp_path / "hist", underscored, _drift_of([2]))
    assert "by the site file north wing/site.toml;" in str(exc.value)
    moved = SimpleNamespace(name="A", path=tmp_path / "elsewhere" / "north wing" / "site.toml")
    history.store_drift(tmp_path / "hist", moved, _drift_of([2]))  # the same building


def test_a_foreign_file_under_another_site_is_one_error_naming_it(tmp_path):
    # A Parquet file with none of the history's columns under another site's folder used to
    # end every site's `disagg history` in an internal error (a ShapeError from the scan).
    _store(tmp_path, "old")
    part = tmp_path / "kind=breakdown" / "site=other" / "period=2025-01" / "part.parquet"
    part.parent.mkdir(parents=True)
    pl.DataFrame({"foo": [1, 2], "bar": ["x", "y"]}).write_parquet(part)
    with pytest.raises(InputError) as exc:
        history.read_history(tmp_path, "plant")
    assert str(exc.value) == (f"{part}: not a disagg history file: it has no column "
                              "'equipment'; move it out of the history folder")
    part.unlink()
    assert history.read_history(tmp_path, "plant")["flags"].unique().to_list() == ["old"]


@pytest.mark.parametrize("command", ["breakdown", "drift"])
def test_a_colliding_history_id_is_refused_before_any_output(tmp_path, command):
    # The clash used to be found only when storing, after the outputs were written.
    from test_portfolio import write_site_files
    from typer.testing import CliRunner

    from disagg.cli import app

    runner = CliRunner()
    hist = str(tmp_path / "hist")
    first = write_site_files(tmp_path, "a b", 5, days=20, history=hist)
    second = write_site_files(tmp_path, "a_b", 6, days=20, history=hist)
    r = runner.invoke(app, [command, str(first), "--out", str(tmp_path / "out1")] +
                      (["--memory", "2"] if command == "drift" else []))
    assert r.exit_code == 0, r.output
    r = runner.invoke(app, [command, str(second), "--out", str(tmp_path / "out2")] +
                      (["--memory", "2"] if command == "drift" else []))
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [
        f"Error: {second}: its history id 'a_b' is already used in {tmp_path / 'hist'} by the "
        "site file a b.toml; names that differ only in characters other than letters, digits, "
        "'.', '_' and '-' share an id: rename one of the two"]
    assert not (tmp_path / "out2").exists()
