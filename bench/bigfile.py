"""Peak memory and time of reading a very large events run log (disagg.inputs.readers.read_runlog).

Usage: python bench/bigfile.py [ROWS]   (default 10,000,000)

Writes into a temporary folder (removed at the end) an invented site: runlog.csv with ROWS
events of 20 pieces of equipment (random on/off switching, about one event a minute per
equipment, naive local times in America/Chicago, all equipment interleaved in time order as
a building automation export lists them), a 15-minute meter.csv for the log's span and a
minimal site.toml. Then, each in a fresh Python process so that its peak is its own:

- baseline: import disagg and polars and read the site file, nothing else;
- read: the same plus read_runlog on the log.

Each process reports its peak resident memory (resource.getrusage(RUSAGE_SELF).ru_maxrss,
KiB on Linux). Prints the log's size on disk, both peaks, the ratios of the read's peak (and
of its peak above the baseline) to the file size, and the wall time of read_runlog.

The files are generated in a process of their own too: Linux carries a process's peak
resident memory over fork and exec, so a measuring process started from a parent that had
built the 10-million-row frame would report the parent's peak.
"""

from __future__ import annotations

import datetime as dt
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from sitefiles import write_site_toml  # noqa: E402

ROWS = 10_000_000
N_EQUIPMENT = 20
TZ = "America/Chicago"
START_UTC = dt.datetime(2025, 1, 1, 6, 0, tzinfo=dt.timezone.utc)  # local midnight
MEAN_GAP_S = 63  # about one event a minute per equipment: 10 M rows span about a year
SEED = 2025

CHILD = r"""
import json, resource, sys, time
mode, site_path = sys.argv[1], sys.argv[2]
from disagg.inputs.config import load_site
from disagg.inputs.readers import read_runlog
site = load_site(site_path)
out = {"mode": mode}
if mode == "read":
    t0 = time.perf_counter()
    log = read_runlog(site.runlog, site)
    out["read_s"] = time.perf_counter() - t0
    out["rows_read"] = log.rows_read
    out["segments"] = int(sum(len(s.start_ns) for s in log.segments.values()))
out["maxrss_kib"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps(out))
"""


def write_site(folder: Path, rows: int) -> dict:
    """Write runlog.csv, meter.csv and site.toml; return the log's span and meter rows."""
    import numpy as np
    import polars as pl

    rng = np.random.default_rng(SEED)
    per_eq = rows // N_EQUIPMENT
    ids = [f"EQ-{k + 1:02d}" for k in range(N_EQUIPMENT)]
    frames = []
    for k, eq in enumerate(ids):
        n = per_eq + (1 if k < rows % N_EQUIPMENT else 0)
        # Strictly increasing event times (gaps of 1 to 2 x MEAN_GAP_S - 1 seconds) and
        # alternating states from a random first one.
        offsets_s = np.cumsum(rng.integers(1, 2 * MEAN_GAP_S, n))
        states = (np.arange(n) + rng.integers(0, 2)) % 2
        frames.append(pl.DataFrame({
            "s": offsets_s, "point": pl.repeat(eq, n, eager=True),
            "state": np.where(states == 1, "on", "off")}))
    log = pl.concat(frames).sort("s", maintain_order=True)
    start_local = pl.lit(START_UTC).dt.convert_time_zone(TZ)
    log = log.select(
        (start_local + pl.duration(seconds=pl.col("s"))).dt.strftime("%Y-%m-%d %H:%M:%S")
        .alias("time"), "point", "state")
    span_s = max(int(f["s"].max()) for f in frames)
    log.write_csv(folder / "runlog.csv")
    del log, frames

    n_meter = span_s // 900 + 2
    ends = pl.datetime_range(START_UTC + dt.timedelta(minutes=15),
                             START_UTC + dt.timedelta(minutes=15 * n_meter), "15m", eager=True,
                             time_zone="UTC")
    pl.DataFrame({"end": ends.dt.convert_time_zone(TZ).dt.to_string("%Y-%m-%dT%H:%M:%S%:z"),
                  "kwh": np.round(rng.uniform(20.0, 80.0, n_meter), 3)}).write_csv(
        folder / "meter.csv")
    write_site_toml(folder / "site.toml", name="Large log bench (invented)", timezone=TZ,
                    meter_file="meter.csv", runlog_file="runlog.csv", equipment=list(ids))
    return {"span_days": span_s / 86400, "meter_rows": n_meter}


def child(args: list[str]) -> dict:
    """Run this file or CHILD in a fresh Python process; its last stdout line is JSON."""
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    done = subprocess.run([sys.executable, *args], capture_output=True, text=True, env=env,
                          check=False)
    if done.returncode != 0:
        raise SystemExit(f"{args[-2:]} process failed:\n{done.stderr}")
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    if sys.argv[1:2] == ["--generate"]:
        folder, rows = Path(sys.argv[2]), int(sys.argv[3])
        t0 = time.perf_counter()
        info = write_site(folder, rows)
        print(json.dumps({**info, "gen_s": time.perf_counter() - t0}))
        return
    rows = int(sys.argv[1]) if len(sys.argv) > 1 else ROWS
    with tempfile.TemporaryDirectory(prefix="disagg-bigfile-") as d:
        folder = Path(d)
        info = child([__file__, "--generate", str(folder), str(rows)])
        size_b = (folder / "runlog.csv").stat().st_size
        site = str(folder / "site.toml")
        base = child(["-c", CHILD, "baseline", site])
        read = child(["-c", CHILD, "read", site])
        versions = child(["-c", "import json, sys, polars; print(json.dumps("
                          "[sys.version.split()[0], polars.__version__]))"])
    size_mib = size_b / (1024 * 1024)
    peak_mib = read["maxrss_kib"] / 1024
    base_mib = base["maxrss_kib"] / 1024
    print(f"run log: {rows:,} event rows, {N_EQUIPMENT} equipment, {info['span_days']:.1f} days, "
          f"naive local times ({TZ}); written in {info['gen_s']:.1f} s")
    print(f"file size:                      {size_mib:10.1f} MiB ({size_b:,} bytes)")
    print(f"peak RSS, baseline process:     {base_mib:10.1f} MiB (imports + site file)")
    print(f"peak RSS, read_runlog process:  {peak_mib:10.1f} MiB")
    print(f"peak / file size:               {peak_mib / size_mib:10.2f}")
    print(f"(peak - baseline) / file size:  {(peak_mib - base_mib) / size_mib:10.2f}")
    print(f"read_runlog wall time:          {read['read_s']:10.1f} s "
          f"(rows read {read['rows_read']:,}, state segments {read['segments']:,})")
    print(f"python {versions[0]}, polars {versions[1]}, {os.cpu_count()} CPUs")


if __name__ == "__main__":
    main()
