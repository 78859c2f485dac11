"""`disagg batch --cluster`: the same per-site jobs on a Dask distributed cluster.

The test starts a LocalCluster on loopback (two worker processes, one thread each, no
dashboard) and checks that the cluster run equals the local process-pool run, row for row,
with the same per-site files. All data invented (test_portfolio.write_site_files).
"""

from __future__ import annotations

import http.server
import subprocess
import sys
import threading

import pytest
from distributed import LocalCluster
from polars.testing import assert_frame_equal
from test_portfolio import break_meter, write_site_files
from typer.testing import CliRunner

from disagg.jobs import batch as portfolio
from disagg.cli import app
from disagg.jobs.batch import run_portfolio

runner = CliRunner()


@pytest.fixture(scope="module")
def cluster():
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as c:
        yield c


@pytest.fixture(scope="module")
def sites(tmp_path_factory):
    root = tmp_path_factory.mktemp("cluster")
    folder = root / "sites"
    for stem, seed in (("east", 41), ("west", 42), ("broken", 43)):
        write_site_files(folder, stem, seed, days=12, data_dir=root / "data")
    break_meter(folder / "broken.toml")
    return root, folder


def test_the_cluster_run_equals_the_local_run(cluster, sites):
    root, folder = sites
    local = run_portfolio(folder, root / "local", workers=2)
    remote = run_portfolio(folder, root / "remote", cluster=cluster.scheduler_address)
    assert [o.status for o in local.outcomes] == ["failed", "ok", "ok"]  # name order
    assert_frame_equal(local.frame, remote.frame, check_exact=True)
    for stem in ("east", "west"):
        for name in ("breakdown.csv", "breakdown.parquet", "fit.json"):
            assert (root / "local" / stem / name).read_bytes() == \
                (root / "remote" / stem / name).read_bytes(), (stem, name)


def test_batch_cli_on_the_cluster(cluster, sites):
    root, folder = sites
    out = root / "cli"
    r = runner.invoke(app, ["batch", str(folder), "--out", str(out), "--cluster",
                            cluster.scheduler_address])
    assert r.exit_code == 1  # the broken site
    assert len(r.stderr.splitlines()) == 1
    assert r.stderr.startswith(f"Error: {folder / 'broken.toml'}: ")
    assert (out / "portfolio.csv").exists() and (out / "east" / "breakdown.csv").exists()


@pytest.fixture
def web_server():
    """A plain HTTP server on loopback (as a scheduler's dashboard port is): it accepts the
    connection but never answers in Dask's protocol."""
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _QuietHandler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield f"tcp://127.0.0.1:{server.server_address[1]}"
    server.shutdown()
    server.server_close()


class _QuietHandler(http.server.SimpleHTTPRequestHandler):
    def log_message(self, *args):  # no request log on the test's stderr
        pass


def test_a_web_server_address_is_one_error_line_within_the_timeout(tmp_path, sites, web_server,
                                                                    monkeypatch):
    _, folder = sites
    monkeypatch.setattr(portfolio, "CLUSTER_CONNECT_TIMEOUT_S", 1)
    r = runner.invoke(app, ["batch", str(folder), "--out", str(tmp_path / "out"), "--cluster",
                            web_server])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [(f"Error: --cluster {web_server}: cannot reach a Dask "
                                     "scheduler there (no answer in Dask's protocol within "
                                     "1 s)")]
    assert not (tmp_path / "out").exists()


def test_no_trace_is_printed_when_the_command_exits(tmp_path, sites, web_server):
    # In a process of its own, so anything printed while Python shuts down is seen too.
    _, folder = sites
    code = ("import sys; from disagg.jobs import batch as portfolio; portfolio.CLUSTER_CONNECT_TIMEOUT_S = 1; "
            "from disagg.cli import app; sys.argv[0] = 'disagg'; app()")
    for address in (web_server, "notanaddress"):
        # timeout: only a guard against hanging the suite if the bug came back (the command
        # gives up after 1 s); nothing here measures speed.
        done = subprocess.run([sys.executable, "-c", code, "batch", str(folder), "--out",
                               str(tmp_path / "out"), "--cluster", address],
                              check=False, capture_output=True, text=True, timeout=300)
        assert done.returncode == 1, done.stderr
        assert len(done.stderr.splitlines()) == 1, done.stderr
        assert done.stderr.startswith(f"Error: --cluster {address}: ")
        assert done.stdout == ""


@pytest.mark.parametrize("address", ["notanaddress", "127.0.0.1:8786", "http://10.0.0.5:8786",
                                     "tcp://10.0.0.5", "tcp://10.0.0.5:99999"])
def test_a_malformed_address_is_refused_before_any_connection(tmp_path, sites, address):
    _, folder = sites
    r = runner.invoke(app, ["batch", str(folder), "--out", str(tmp_path / "out"), "--cluster",
                            address])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [(f"Error: --cluster {address}: expected a Dask scheduler "
                                     "address tcp://HOST:PORT or tls://HOST:PORT, such as "
                                     "tcp://10.0.0.5:8786")]


def test_a_worker_address_is_refused_with_a_hint(tmp_path, cluster, sites):
    _, folder = sites
    worker = next(iter(cluster.scheduler_info["workers"]))
    r = runner.invoke(app, ["batch", str(folder), "--out", str(tmp_path / "out"), "--cluster",
                            worker])
    assert r.exit_code == 1
    assert r.stderr.splitlines() == [(f"Error: --cluster {worker}: this is a Dask worker; give "
                                     "the scheduler's address (the one the workers were "
                                     "started with)")]


def test_an_unreachable_scheduler_is_one_error_line(tmp_path, sites, monkeypatch):
    _, folder = sites
    monkeypatch.setattr(portfolio, "CLUSTER_CONNECT_TIMEOUT_S", 1)
    r = runner.invoke(app, ["batch", str(folder), "--out", str(tmp_path / "out"), "--cluster",
                            "tcp://127.0.0.1:9"])
    assert r.exit_code == 1
    lines = r.stderr.splitlines()
    assert len(lines) == 1
    assert lines[0].startswith("Error: --cluster tcp://127.0.0.1:9: cannot reach a Dask "
                               "scheduler there (")
    assert not (tmp_path / "out").exists()
