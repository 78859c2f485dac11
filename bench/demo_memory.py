"""Peak memory of `disagg demo` (target: under 300 MB) and of its simulation alone.

Usage: python bench/demo_memory.py

Each measurement runs in a fresh Python process of its own and reports that process's peak
resident memory (resource.getrusage(RUSAGE_SELF).ru_maxrss, KiB on Linux), so a parent's
peak is never counted: the demo's simulation alone (disagg.demo.simulate), then the whole
`disagg demo --out TMP --quiet` (simulation, files, breakdown and report.html), then, for
scale, the imports only.
"""

from __future__ import annotations

import subprocess
import sys
import tempfile

CHILD = """
import resource, sys
{body}
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""

CASES = {
    "imports only (disagg.demo, polars, numpy, disagg.present.outputs)":
        "import disagg.demo, polars, numpy, disagg.present.outputs",
    "disagg.demo.simulate()": "from disagg import demo; demo.simulate()",
    "disagg demo --out TMP --quiet (simulation, files, breakdown, report)":
        "from disagg.cli import app\n"
        "try:\n    app(['demo', '--out', sys.argv[1], '--quiet'])\n"
        "except SystemExit as exc:\n    assert not exc.code, exc.code",
}


def main() -> None:
    for label, body in CASES.items():
        with tempfile.TemporaryDirectory() as tmp:
            done = subprocess.run([sys.executable, "-c", CHILD.format(body=body), tmp + "/out"],
                                  capture_output=True, text=True, check=True)
        kib = int(done.stdout.strip().splitlines()[-1])
        print(f"{label}: peak {kib / 1024:.0f} MB")


if __name__ == "__main__":
    main()
