"""``heliotrope refit`` on a large readings file: wall time and peak memory.

Writes a readings CSV of ``--rows`` readings (default one million: six channels every
30 s while the sun is up at Pico Sereno, day after day, with the optional pressure and
detector-temperature columns), then runs ``heliotrope refit --json`` on it as a fresh
process and prints its wall time and peak resident memory (the child's ``VmHWM``),
beside those of the same process that only imports the command line. The signals
follow Beer-Lambert with an invented V0 and optical depth (demo data only: the figures
here are about speed and memory).

    .venv/bin/python benchmarks/bench_refit.py [--rows 1000000] [--keep FILE]
"""

from __future__ import annotations

import argparse
import math
import os
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np

from daemon.config.settings import load_config
from daemon.science import solar

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "config" / "pico-sereno.yaml"
CADENCE_S = 30


def write_readings(path: Path, rows: int) -> int:
    config = load_config(CONFIG)
    names = [c.name for c in config.channels]
    rng = np.random.default_rng(5)
    written = 0
    day = datetime(2027, 1, 1, tzinfo=UTC)
    with path.open("w") as f:
        f.write("time_utc,channel,signal,pressure_hpa,detector_temp_c\n")
        while written < rows:
            times = [day + timedelta(seconds=s) for s in range(0, 86400, CADENCE_S)]
            zen = np.asarray(solar.sun_position(times, config.site).apparent_zenith_deg)
            m = np.asarray(solar.relative_airmass(zen), dtype=float)
            for t, mi in zip(times, m, strict=True):
                if not (math.isfinite(mi) and mi < 12) or written >= rows:
                    continue
                stamp = t.strftime("%Y-%m-%dT%H:%M:%SZ")
                for j, name in enumerate(names):
                    v = (1.5 + 0.1 * j) * math.exp(-(0.05 + 0.02 * j) * mi)
                    v *= 1 + 0.002 * rng.standard_normal()
                    f.write(f"{stamp},{name},{v:.6f},645.0,25.0\n")
                    written += 1
                    if written >= rows:
                        break
            day += timedelta(days=1)
    return written


# The child reports its own peak (VmHWM, reset at exec): ru_maxrss of a child would
# include this process's memory, inherited through fork before the exec.
PEAK = ("import sys\n"
        "from daemon.commands.cli import main\n"
        "rc = 0 if len(sys.argv) == 1 else main(sys.argv[1:])\n"
        "hwm = [x for x in open('/proc/self/status') if x.startswith('VmHWM')]\n"
        "print(hwm[0].split()[1], file=sys.stderr)\n"
        "sys.exit(rc)\n")


def run(args: list[str]) -> tuple[float, float, int]:
    """Wall time [s] and peak resident memory [MiB] of one fresh ``heliotrope`` process
    (no arguments: the interpreter and the command's imports only), and its exit code."""
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", PEAK, *args], stdout=subprocess.DEVNULL,
                          stderr=subprocess.PIPE, text=True, check=False, cwd=ROOT)
    wall = time.perf_counter() - t0
    lines = proc.stderr.strip().splitlines()
    if proc.returncode:
        print(lines[-2:-1], file=sys.stderr)
    return wall, int(lines[-1]) / 1024, proc.returncode


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--keep", type=Path, help="write the readings here and keep them")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        path = args.keep or Path(tmp) / "readings.csv"
        t0 = time.perf_counter()
        n = write_readings(path, args.rows)
        print(f"wrote {n} readings ({path.stat().st_size / 2**20:.1f} MiB) in "
              f"{time.perf_counter() - t0:.1f} s")
        bare_wall, bare_rss, _ = run([])
        wall, rss, rc = run(["refit", "--config", str(CONFIG), "--csv", str(path), "--json"])
        print(f"interpreter and command imports: {bare_wall:.2f} s, peak RSS "
              f"{bare_rss:.0f} MiB")
        print(f"refit of {n} readings: exit {rc}, {wall:.1f} s wall, peak RSS {rss:.0f} MiB "
              f"({os.cpu_count()} cores)")
        return 1 if rc else 0


if __name__ == "__main__":
    sys.exit(main())
