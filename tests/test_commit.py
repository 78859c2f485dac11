"""A result set has one commit point: any stop leaves the whole old set or the whole new one
(disagg.present.commit, used by disagg.present.outputs.write_atomically and the history)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import pytest

from disagg.errors import OutputError
from disagg.present import commit
from disagg.present.outputs import write_atomically

NAMES = ("breakdown.csv", "breakdown.parquet", "fit.json")


def _old_set(folder: Path) -> None:
    folder.mkdir(exist_ok=True)
    for name in NAMES:
        (folder / name).write_text(f"old {name}\n")
    (folder / "notes.txt").write_text("the user's own file\n")


def _new_files() -> dict:
    return {name: (lambda p, n=name: p.write_text(f"new {n}\n")) for name in NAMES}


def _contents(folder: Path) -> dict[str, str]:
    return {p.name: p.read_text() for p in sorted(folder.iterdir())}


def _stop_at(monkeypatch, step: str, exc: BaseException) -> None:
    def hook(name: str) -> None:
        if name == step:
            raise exc
    monkeypatch.setattr(commit, "after_step", hook)


OLD = {"notes.txt": "the user's own file\n", **{n: f"old {n}\n" for n in NAMES}}
NEW = {"notes.txt": "the user's own file\n", **{n: f"new {n}\n" for n in NAMES}}


@pytest.mark.parametrize("step", ["staged", "backed-up"])
def test_ctrl_c_before_the_commit_point_keeps_the_whole_old_set(tmp_path, monkeypatch, step):
    _old_set(tmp_path)
    _stop_at(monkeypatch, step, KeyboardInterrupt())
    with pytest.raises(KeyboardInterrupt):
        write_atomically(tmp_path, _new_files(), [])
    assert _contents(tmp_path) == OLD  # nothing deleted, no staging folder left


@pytest.mark.parametrize("step", ["committed", "placed breakdown.csv",
                                  "placed breakdown.parquet"])
def test_ctrl_c_after_the_commit_point_finishes_the_new_set(tmp_path, monkeypatch, step):
    # Between two renames (the moment that used to lose the previous breakdown.csv).
    _old_set(tmp_path)
    _stop_at(monkeypatch, step, KeyboardInterrupt())
    with pytest.raises(KeyboardInterrupt):
        write_atomically(tmp_path, _new_files(), [])
    assert _contents(tmp_path) == NEW


def test_a_real_sigint_during_the_renames_is_held_until_the_set_is_in_place(tmp_path,
                                                                           monkeypatch):
    _old_set(tmp_path)
    seen = []

    def hook(name: str) -> None:
        seen.append((name, sorted(p.name for p in tmp_path.iterdir())))
        if name == "placed breakdown.csv":
            # To the main thread itself, so it arrives inside the block.
            signal.pthread_kill(threading.main_thread().ident, signal.SIGINT)

    monkeypatch.setattr(commit, "after_step", hook)
    # Python's own Ctrl-C handler: a process started in the background by a shell without
    # job control (nohup ... &) starts with SIGINT ignored, and then held and re-raised it
    # is ignored too (how this test failed in such runs of .ci/run on 2026-12-05).
    before = signal.signal(signal.SIGINT, signal.default_int_handler)
    try:
        with pytest.raises(KeyboardInterrupt):
            write_atomically(tmp_path, _new_files(), [])
    finally:
        signal.signal(signal.SIGINT, before)
    # The signal arrived after the first rename; the other two still happened.
    assert [s for s, _ in seen][-1] == "placed fit.json"
    assert _contents(tmp_path) == NEW


def _killed_writer(folder: Path, step: str) -> subprocess.CompletedProcess:
    """A separate process writing the new set into folder, killed (os._exit, like SIGKILL:
    no clean-up runs) at the given step."""
    code = textwrap.dedent(f"""
        import os
        from pathlib import Path
        from disagg.present import commit
        from disagg.present.outputs import write_atomically

        def hook(name):
            if name == {step!r}:
                os._exit(9)

        commit.after_step = hook
        write_atomically(Path({str(folder)!r}),
                         {{n: (lambda p, n=n: p.write_text(f"new {{n}}\\n")) for n in {NAMES!r}}},
                         [])
    """)
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=120)


def test_a_run_killed_between_two_renames_is_finished_by_the_next_write(tmp_path):
    _old_set(tmp_path)
    proc = _killed_writer(tmp_path, "placed breakdown.csv")
    assert proc.returncode == 9, proc.stderr
    left = [p.name for p in tmp_path.iterdir() if p.name.startswith(commit.PREFIX)]
    assert len(left) == 1 and (tmp_path / left[0] / commit.JOURNAL).is_file()
    # The next write into the folder first completes the dead run's set, then writes its own.
    write_atomically(tmp_path, {"report.html": lambda p: p.write_text("<html>\n")}, [])
    assert _contents(tmp_path) == {**NEW, "report.html": "<html>\n"}


def test_a_run_killed_before_its_commit_point_leaves_the_old_set_and_is_cleaned(tmp_path):
    _old_set(tmp_path)
    proc = _killed_writer(tmp_path, "backed-up")
    assert proc.returncode == 9, proc.stderr
    assert {p.name for p in tmp_path.iterdir() if p.name.startswith(commit.PREFIX)}
    for name, text in OLD.items():
        assert (tmp_path / name).read_text() == text
    commit.recover(tmp_path)
    assert _contents(tmp_path) == OLD


def test_only_dead_runs_of_this_host_are_cleaned(tmp_path):
    live = tmp_path / f"{commit.PREFIX}{commit._host()}-{os.getppid()}-abc"
    other_host = tmp_path / f"{commit.PREFIX}elsewhere-1-abc"
    not_ours = tmp_path / ".disagg-tmp-notours"
    for d in (live, other_host, not_ours):
        d.mkdir()
    dead_pid = _dead_pid()
    dead = tmp_path / f"{commit.PREFIX}{commit._host()}-{dead_pid}-abc"
    dead.mkdir()
    (dead / "breakdown.csv").write_text("half")
    commit.recover(tmp_path)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(
        [live.name, other_host.name, not_ours.name])


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_a_failed_write_into_a_new_folder_leaves_no_empty_folder(tmp_path):
    out = tmp_path / "a" / "b"

    def full(p):
        raise OSError(28, "No space left on device")

    with pytest.raises(OutputError) as exc:
        write_atomically(out, {"breakdown.csv": full}, [])
    assert "(No space left on device)" in str(exc.value)
    assert list(tmp_path.iterdir()) == []


def test_an_os_error_without_a_reason_is_named_not_none(tmp_path):
    def odd(p):
        raise OSError("disk quota exceeded on the share")

    with pytest.raises(OutputError) as exc:
        write_atomically(tmp_path, {"fit.json": odd}, [])
    assert "None" not in str(exc.value)
    assert "(disk quota exceeded on the share)" in str(exc.value)


def _with_stale_report(folder: Path) -> None:
    _old_set(folder)
    (folder / "report.html").write_text("old report\n")


@pytest.mark.parametrize("step", ["staged", "backed-up"])
def test_a_stale_file_stays_when_stopped_before_the_commit_point(tmp_path, monkeypatch, step):
    _with_stale_report(tmp_path)
    _stop_at(monkeypatch, step, KeyboardInterrupt())
    with pytest.raises(KeyboardInterrupt):
        write_atomically(tmp_path, _new_files(), [], remove=("report.html",))
    assert _contents(tmp_path) == {**OLD, "report.html": "old report\n"}


@pytest.mark.parametrize("step", [None, "committed", "placed breakdown.csv"])
def test_a_stale_file_goes_with_the_new_set(tmp_path, monkeypatch, step):
    _with_stale_report(tmp_path)
    if step is None:
        write_atomically(tmp_path, _new_files(), [], remove=("report.html",))
    else:
        _stop_at(monkeypatch, step, KeyboardInterrupt())
        with pytest.raises(KeyboardInterrupt):
            write_atomically(tmp_path, _new_files(), [], remove=("report.html",))
    assert _contents(tmp_path) == NEW


def test_a_stale_name_that_is_an_input_is_never_removed(tmp_path):
    _with_stale_report(tmp_path)
    write_atomically(tmp_path, _new_files(), [tmp_path / "report.html"], remove=("report.html",))
    assert _contents(tmp_path) == {**NEW, "report.html": "old report\n"}


def test_a_run_that_committed_while_another_was_writing_leaves_no_file_beside_its_set(
        tmp_path, monkeypatch):
    # Run A (no report) is still writing when run B (with a report) commits into the same
    # folder; A commits last. A's set must not keep B's report.html beside it (A decided
    # what was stale before B wrote it; it now decides under the folder's lock, at commit).
    _old_set(tmp_path)
    b_done = []

    def hook(name: str) -> None:
        if name == "staged" and not b_done:
            b_done.append(True)  # B runs now, inside A's write
            write_atomically(tmp_path, {**{n: (lambda p, n=n: p.write_text(f"B {n}\n"))
                                           for n in NAMES},
                                        "report.html": lambda p: p.write_text("B report\n")},
                             [])
    monkeypatch.setattr(commit, "after_step", hook)
    write_atomically(tmp_path, _new_files(), [], remove=("report.html",))
    assert _contents(tmp_path) == NEW


def test_the_folder_lock_makes_a_second_writer_wait(tmp_path, monkeypatch):
    # A second process holding the folder's lock: this writer waits, then says so.
    monkeypatch.setattr(commit, "LOCK_TIMEOUT_S", 0.3)
    holder = subprocess.Popen(
        [sys.executable, "-c", textwrap.dedent(f"""
            import fcntl, os, sys, time
            fd = os.open({str(tmp_path)!r}, os.O_RDONLY)
            fcntl.flock(fd, fcntl.LOCK_EX)
            print("locked", flush=True)
            time.sleep(30)
        """)], stdout=subprocess.PIPE, text=True)
    try:
        assert holder.stdout.readline().strip() == "locked"
        with pytest.raises(OutputError) as exc:
            write_atomically(tmp_path, _new_files(), [])
        assert str(exc.value) == (f"{tmp_path}: another run has been writing into this output "
                                  "folder for 0.3 s; try again when it has finished")
        assert not any(p.name.startswith(commit.PREFIX) for p in tmp_path.iterdir())
    finally:
        holder.kill()
        holder.wait(10)
    write_atomically(tmp_path, _new_files(), [])
    assert {n: (tmp_path / n).read_text() for n in NAMES} == {n: f"new {n}\n" for n in NAMES}


@pytest.mark.parametrize("command", ["breakdown", "drift", "report"])
def test_a_failing_run_still_finishes_what_a_killed_run_left_in_its_folder(tmp_path, command):
    # The folder was mixed (breakdown.csv new, the rest old) until the next successful write
    # into it; now every command writing into --out finishes the dead run's set first.
    from typer.testing import CliRunner

    from disagg.cli import app

    _old_set(tmp_path)
    assert _killed_writer(tmp_path, "placed breakdown.csv").returncode == 9
    r = CliRunner().invoke(app, [command, str(tmp_path / "missing.toml"), "--out",
                                 str(tmp_path)])
    assert r.exit_code == 1 and r.stderr.startswith("Error: "), r.output
    assert _contents(tmp_path) == NEW
