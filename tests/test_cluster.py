"""`disagg batch --cluster`: the same per-site jobs on a Dask distributed cluster.

The test starts a LocalCluster on loopback (two worker processes, one thread each, no
dashboard) and checks that the cluster run equals the local process-pool run, row for row,
with the same per-site files. All data invented (test_portfolio.write_site_files).
"""

from __future__ import annotations

import pytest
from distributed import LocalCluster
from polars.testing import assert_frame_equal
from test_portfolio import break_meter, write_site_files
from typer.testing import CliRunner

from disagg import portfolio
from disagg.cli import app
from disagg.portfolio import run_portfolio

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
