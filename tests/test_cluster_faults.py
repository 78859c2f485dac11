"""`disagg batch --cluster` when the cluster fails: a scheduler without workers, or one that
goes away mid-batch, ends in one `Error:` line, not a silent wait or a traceback.
All data invented (test_portfolio.write_site_files)."""

from __future__ import annotations

import logging
import socket
import subprocess
import sys
import threading
import time

import pytest
from distributed import LocalCluster
from test_portfolio import write_site_files
from typer.testing import CliRunner

from disagg.cli import app
from disagg.jobs import batch

runner = CliRunner()


@pytest.fixture(scope="module")
def sites(tmp_path_factory):
    root = tmp_path_factory.mktemp("cluster_faults")
    for i in range(4):
        write_site_files(root / "sites", f"s{i}", 60 + i, days=40, data_dir=root / "data")
    return root


def test_a_scheduler_without_workers_is_one_error_after_the_set_time(sites, monkeypatch):
    monkeypatch.setattr(batch, "CLUSTER_IDLE_TIMEOUT_S", 2.0)
    monkeypatch.setattr(batch, "CLUSTER_POLL_S", 0.2)
    with LocalCluster(n_workers=0, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as empty:
        t0 = time.monotonic()
        r = runner.invoke(app, ["batch", str(sites / "sites"), "--out", str(sites / "out0"),
                                "--cluster", empty.scheduler_address, "--quiet"])
        waited = time.monotonic() - t0
    assert r.exit_code == 1, r.output
    assert r.stderr.splitlines() == [
        f"Error: --cluster {empty.scheduler_address}: the scheduler has had no worker for 2 s, "
        "so nothing runs the sites (0 sites finished, 4 not run); start workers for it, or run "
        "without --cluster"]
    assert waited < 60
    assert not (sites / "out0" / "portfolio.csv").exists()


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_a_scheduler_killed_mid_batch_is_one_error(sites, monkeypatch):
    monkeypatch.setattr(batch, "CLUSTER_CONNECT_TIMEOUT_S", 5)
    monkeypatch.setattr(batch, "CLUSTER_POLL_S", 0.2)
    port = _free_port()
    address = f"tcp://127.0.0.1:{port}"
    scheduler = subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
         "--port", str(port), "--no-dashboard"], stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL)
    worker = subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nthreads", "1",
         "--no-nanny", "--no-dashboard", "--death-timeout", "10"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    out = sites / "out1"

    def kill_when_started():
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and not any(out.glob("*/breakdown.csv")):
            time.sleep(0.05)
        scheduler.kill()

    # dask's own log handlers write to the real stderr, which CliRunner does not capture: a
    # handler beside them sees what they would print (a lost scheduler is an ERROR record
    # with a traceback of some 35 lines).
    records: list[logging.LogRecord] = []
    seen = logging.Handler()
    seen.emit = records.append
    logging.getLogger("distributed").addHandler(seen)
    try:
        killer = threading.Thread(target=kill_when_started, daemon=True)
        killer.start()
        r = runner.invoke(app, ["batch", str(sites / "sites"), "--out", str(out), "--cluster",
                                address, "--quiet"])
        killer.join(10)
        logging.getLogger("distributed").removeHandler(seen)
        assert [rec for rec in records if rec.levelno >= logging.WARNING] == []
        lines = r.stderr.splitlines()
        assert r.exit_code == 1, r.output
        assert len(lines) == 1, lines
        assert lines[0].startswith(f"Error: --cluster {address}: lost the connection to the "
                                   "scheduler ("), lines
        assert "not run" in lines[0] and "Traceback" not in r.output
        assert not (out / "portfolio.csv").exists()
    finally:
        for proc in (scheduler, worker):
            proc.kill()
            proc.wait(30)
