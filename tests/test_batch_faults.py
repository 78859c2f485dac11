"""`disagg batch` under faults: a killed batch leaves no process behind, a dead worker fails
only its own site, formula-like headers are neutralised, colliding history ids are refused.
All data invented (tests/synthetic.py buildings via test_portfolio.write_site_files)."""

from __future__ import annotations

import io
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import polars as pl
import pytest
from test_portfolio import write_site_files

from disagg.errors import ConfigError
from disagg.jobs import batch
from disagg.jobs.batch import Portfolio, PortfolioResult, SiteJob, SiteOutcome
from disagg.present.outputs import write_portfolio


def test_portfolio_headers_built_from_formula_like_ids_are_neutralised(tmp_path):
    # OWASP "CSV Injection" (from memory): cells, headers included, starting with =, +, -, @
    # are prefixed with a single quote.
    outcomes = [SiteOutcome("/s/a.toml", "a", "ok", "A", period="2025-01..2025-01",
                            metered_kwh=10.0,
                            equipment_kwh={"=cmd|' /C calc'!A0": 1.0, "+X": 2.0, "-Y": 3.0,
                                           "@Z": 4.0, "'-Y": 5.0, "AHU-1": 6.0})]
    result = PortfolioResult(Portfolio(tmp_path / "sites", ()), batch.portfolio_frame(outcomes),
                             outcomes)
    (path,) = write_portfolio(result, tmp_path / "out")
    header = path.read_text(encoding="utf-8").splitlines()[0].split(",")
    kwh = [h for h in header if h.endswith("_kwh") and h != "metered_kwh"]
    assert kwh == ["'=cmd|' /C calc'!A0_kwh", "'+X_kwh", "''-Y_kwh", "'@Z_kwh", "'-Y_kwh",
                   "AHU-1_kwh"]
    assert not any(h.lstrip('"').startswith(("=", "+", "-", "@")) for h in header)
    # The values stay under their (quoted) headers.
    table = pl.read_csv(path)
    assert table["''-Y_kwh"].to_list() == [3.0] and table["'-Y_kwh"].to_list() == [5.0]


def test_site_files_whose_history_ids_would_collide_are_refused(tmp_path):
    for name in ("a b.toml", "a_b.toml"):
        (tmp_path / name).write_text("[site]\n", encoding="utf-8")
    with pytest.raises(ConfigError) as exc:
        batch.load_portfolio(tmp_path)
    assert str(exc.value) == (
        f"{tmp_path}: {tmp_path / 'a b.toml'} and {tmp_path / 'a_b.toml'} would share the "
        "history id 'a_b' (file names that differ only in characters other than letters, "
        "digits, '.', '_' and '-'); give the site files different names")


def _fake_site(job: SiteJob) -> SiteOutcome:
    """A stand-in for run_site in forked workers: the site named doomed kills its worker
    as the out-of-memory killer would; the others take a moment and succeed."""
    if Path(job.site_file).stem == "doomed":
        os.kill(os.getpid(), signal.SIGKILL)
    time.sleep(0.3)
    return SiteOutcome(job.site_file, Path(job.site_file).stem, "ok", "x",
                       metered_kwh=float(os.getpid()))


def test_a_dead_worker_fails_only_its_own_site(tmp_path, monkeypatch):
    monkeypatch.setattr(batch, "run_site", _fake_site)
    monkeypatch.setattr(batch, "_site_name", lambda f: None)
    names = ["a", "b", "doomed", "c", "d", "e"]
    jobs = [SiteJob(str(tmp_path / f"{n}.toml"), str(tmp_path / "out" / n)) for n in names]
    seen = []
    outcomes = batch._run_locally(jobs, 2, "fork", lambda *a: seen.append(a))
    status = {o.folder: o.status for o in outcomes}
    assert status == {"a": "ok", "b": "ok", "doomed": "failed", "c": "ok", "d": "ok", "e": "ok"}
    doomed = outcomes[2]
    assert doomed.error == ("the worker running this site stopped (killed by SIGKILL, as the "
                            "out-of-memory killer does; it stopped again when the site ran "
                            "alone)")
    assert seen[-1] == ("sites", 6, 6)


def _start_batch(tmp_path: Path, out: Path, first_seed: int, days: int = 60) -> subprocess.Popen:
    """`disagg batch` of six synthetic sites on 2 workers, in its own process group."""
    sites = tmp_path / "sites"
    for i in range(6):
        write_site_files(sites, f"s{i}", first_seed + i, days=days, data_dir=tmp_path / "data")
    return subprocess.Popen([sys.executable, "-m", "disagg.cli", "batch", str(sites),
                             "--out", str(out), "--workers", "2", "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            start_new_session=True)


def _group(pgid: int) -> list[int]:
    """Live (not zombie) processes of a process group, from /proc."""
    pids = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:
            continue
        fields = stat[stat.rindex(")") + 2:].split()
        if int(fields[2]) == pgid and fields[0] != "Z":
            pids.append(int(entry.name))
    return pids


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs Linux /proc")
@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGKILL])
def test_a_killed_batch_leaves_no_process_of_its_group(tmp_path, sig):
    out = tmp_path / "out"
    proc = _start_batch(tmp_path, out, first_seed=40)
    try:
        deadline = time.monotonic() + 120
        # Wait until the pool is up: the batch, its forkserver and at least one worker.
        while len(_group(proc.pid)) < 3 and time.monotonic() < deadline:
            assert proc.poll() is None, proc.stderr.read()
            time.sleep(0.05)
        assert len(_group(proc.pid)) >= 3
        os.kill(proc.pid, sig)
        _, err = proc.communicate(timeout=60)  # returns once every holder of the pipes is gone
        deadline = time.monotonic() + 30
        while _group(proc.pid) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert _group(proc.pid) == []
        if sig == signal.SIGTERM:
            assert proc.returncode == 128 + signal.SIGTERM
            lines = err.decode().splitlines()
            assert len(lines) == 1 and lines[0].startswith("Stopped by SIGTERM: "), lines
            assert lines[0].endswith("not run; portfolio.csv not written")
        assert not (out / "portfolio.csv").exists()
    finally:
        for pid in _group(proc.pid):
            os.kill(pid, signal.SIGKILL)


def test_a_deeply_nested_portfolio_file_is_a_config_error(tmp_path):
    pf = tmp_path / "p.toml"
    pf.write_text("[portfolio]\nsites = " + "[" * 3000 + "]" * 3000 + "\n", encoding="utf-8")
    with pytest.raises(ConfigError) as exc:
        batch.load_portfolio(pf)
    assert str(exc.value) == (f"{pf}: not valid TOML for disagg (arrays or tables nested more "
                              "than 50 deep)")


def _stat(pid: int) -> tuple[int, str]:
    """(parent pid, command line) of a process."""
    stat = Path(f"/proc/{pid}/stat").read_text()
    cmd = Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
    return int(stat[stat.rindex(")") + 2:].split()[1]), cmd


@pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="needs Linux /proc")
def test_a_worker_killed_from_outside_costs_no_site(tmp_path):
    # As the out-of-memory killer would: SIGKILL one busy worker of a real batch (forkserver).
    # Its site runs again alone and succeeds, the others on a fresh pool: every site is ok.
    out = tmp_path / "out"
    # Sites long enough that the batch is still running when a worker is killed (with
    # 60-day sites the whole batch could finish within the wait below).
    proc = _start_batch(tmp_path, out, first_seed=50, days=240)
    try:
        deadline = time.monotonic() + 120
        workers: list[int] = []
        while not workers and time.monotonic() < deadline:
            assert proc.poll() is None, proc.stderr.read()
            procs = {}
            for pid in _group(proc.pid):
                try:
                    procs[pid] = _stat(pid)
                except OSError:
                    continue
            servers = [p for p, (ppid, cmd) in procs.items()
                       if ppid == proc.pid and "forkserver" in cmd]
            workers = [p for p, (ppid, _) in procs.items() if servers and ppid == servers[0]]
            time.sleep(0.05)
        assert workers
        time.sleep(0.5)  # busy with a site by now
        os.kill(workers[0], signal.SIGKILL)
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err.decode()
        table = pl.read_csv(out / "portfolio.csv")
        assert table["status"].to_list() == ["ok"] * 6
    finally:
        for pid in _group(proc.pid):
            os.kill(pid, signal.SIGKILL)


def test_worker_processes_that_cannot_start_are_an_error_not_a_silent_success(tmp_path,
                                                                               monkeypatch):
    # Starting the pool's processes failed with a BrokenPipeError (a forkserver that could
    # not run as this user): the CLI took it for its own output pipe closing and exited 0
    # having written nothing.
    import concurrent.futures

    from typer.testing import CliRunner

    from disagg.cli import app

    def broken(self, *args, **kwargs):
        raise BrokenPipeError(32, "Broken pipe")

    monkeypatch.setattr(concurrent.futures.ProcessPoolExecutor, "submit", broken)
    jobs = [SiteJob(str(tmp_path / "a.toml"), str(tmp_path / "out" / "a"))]
    with pytest.raises(batch.DisaggError) as exc:
        batch._run_locally(jobs, 2, "fork", None)
    assert str(exc.value) == ("cannot start the local worker processes (BrokenPipeError: "
                              "[Errno 32] Broken pipe); no site was run")
    sites = tmp_path / "sites"
    write_site_files(sites, "s0", 1, days=20, data_dir=tmp_path / "data")
    write_site_files(sites, "s1", 2, days=20, data_dir=tmp_path / "data")
    r = CliRunner().invoke(app, ["batch", str(sites), "--out", str(tmp_path / "o"),
                                 "--workers", "2", "--quiet"])
    assert r.exit_code == 1, r.output
    assert r.stderr.splitlines() == [
        "Error: cannot start the local worker processes (BrokenPipeError: [Errno 32] Broken "
        "pipe); no site was run"]
    assert not (tmp_path / "o" / "portfolio.csv").exists()


def test_a_broken_pipe_that_is_not_standard_output_is_not_a_silent_success(monkeypatch):
    # Only a closed standard output (`disagg ... | head`) ends quietly with status 0.
    import typer

    from disagg import cli

    def fn():
        raise BrokenPipeError(32, "Broken pipe")

    monkeypatch.setattr(cli, "_stdout_gone", lambda: False)
    with pytest.raises(typer.Exit) as exc:
        cli._guarded(fn)
    assert exc.value.exit_code == 2
    monkeypatch.setattr(cli, "_stdout_gone", lambda: True)
    monkeypatch.setattr(sys, "stderr", io.StringIO())  # closed by the quiet exit
    with pytest.raises(typer.Exit) as exc:
        cli._guarded(fn)
    assert exc.value.exit_code == 0
