"""The console entry point (disagg.cli.main) leaves without the interpreter's teardown once a
command has finished: its exit status, its printed output and the files it wrote must be
exactly those of the usual exit (run as a fresh process, as the installed `disagg` runs)."""

from __future__ import annotations

import json
import subprocess
import sys

from test_cli import write_site

MAIN = "import sys; sys.argv[0] = 'disagg'; from disagg.cli import main; main()"
APP = "import sys; sys.argv[0] = 'disagg'; from disagg.cli import app; app()"


def _run(code: str, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", code, *args], capture_output=True, text=True,
                          timeout=600)


def test_a_finished_breakdown_exits_0_with_all_its_output_and_files(tmp_path):
    s = write_site(tmp_path / "data", days=14, seed=5)
    fast = _run(MAIN, "breakdown", str(s["site"]), "--out", str(tmp_path / "a"), "--json")
    usual = _run(APP, "breakdown", str(s["site"]), "--out", str(tmp_path / "b"), "--json")
    assert fast.returncode == usual.returncode == 0, fast.stderr + usual.stderr
    # The whole JSON summary arrived through the pipe (flushed before leaving).
    a, b = json.loads(fast.stdout), json.loads(usual.stdout)
    assert a["files"] != b["files"]  # written to their own folders
    a.pop("files"), b.pop("files")
    assert a == b
    for name in ("breakdown.csv", "breakdown.parquet", "fit.json"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()


def test_an_error_keeps_its_line_and_exit_status(tmp_path):
    missing = tmp_path / "nowhere.toml"
    fast = _run(MAIN, "breakdown", str(missing), "--out", str(tmp_path / "out"))
    usual = _run(APP, "breakdown", str(missing), "--out", str(tmp_path / "out"))
    assert fast.returncode == usual.returncode == 1
    assert fast.stderr == usual.stderr
    assert fast.stderr.startswith("Error: ")
    assert not (tmp_path / "out").exists()


def test_a_usage_error_and_help_keep_their_exit_status():
    for args in (["breakdown", "--no-such-option"], ["--help"], []):
        fast, usual = _run(MAIN, *args), _run(APP, *args)
        assert fast.returncode == usual.returncode, args
        assert (fast.stdout, fast.stderr) == (usual.stdout, usual.stderr), args
