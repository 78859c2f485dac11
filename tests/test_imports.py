"""A breakdown imports only what it uses: no drift, compare, report or history code, and
none of the libraries the other commands need (plotting, workbooks, statsmodels; pydantic,
which typer would use to read the options: disagg.cli._plain_value), so that
a site-year's run does not pay for them at start-up (bench/portfolio.py measures the time)."""

from __future__ import annotations

import subprocess
import sys

from test_cli import write_site

NOT_IN_A_BREAKDOWN = ("statsmodels", "matplotlib", "xlsxwriter", "pydantic",
                      "disagg.analyses.drift", "disagg.analyses.compare", "disagg.analyses.track",
                      "disagg.present.report", "disagg.present.history")

RUN = """
import sys
sys.argv = ["disagg", "breakdown", sys.argv[1], "--out", sys.argv[2]]
from disagg.cli import app
try:
    app()
except SystemExit as exc:
    code = exc.code
print("EXIT", code)
print("MODULES", " ".join(sorted(sys.modules)))
"""


def test_a_breakdown_does_not_import_the_other_commands_code(tmp_path):
    s = write_site(tmp_path / "data", days=7, seed=3)
    out = tmp_path / "out"
    proc = subprocess.run([sys.executable, "-c", RUN, str(s["site"]), str(out)],
                          capture_output=True, text=True, check=True)
    lines = dict(line.split(" ", 1) for line in proc.stdout.splitlines()
                 if line.startswith(("EXIT", "MODULES")))
    assert lines["EXIT"].strip() in ("0", "None"), proc.stdout + proc.stderr
    assert (out / "fit.json").is_file()
    loaded = lines["MODULES"].split()
    assert "disagg.fit.estimate" in loaded  # the run did fit
    assert [m for m in loaded if m.startswith(NOT_IN_A_BREAKDOWN)] == []
