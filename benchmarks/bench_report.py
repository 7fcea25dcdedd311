"""Size and build time of the daily report (``heliotrope report``).

Builds the report in this process, N times, from the synthetic clear day of
tests/synthetic_store.py with a refused session, the day's AOD and a five-day
calibration whose response drifts (tests/report_stores.py, ``build_drift_campaign``),
and prints the median build time and the page's size, total and in inline SVG. Figures
go into DEVELOPERS.md ("Benchmarks").

    .venv/bin/python benchmarks/bench_report.py [--runs N]
"""

from __future__ import annotations

import argparse
import re
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=11)
    args = ap.parse_args()
    from tests.report_stores import build_drift_campaign, report_page

    with tempfile.TemporaryDirectory() as tmp:
        day = build_drift_campaign(Path(tmp) / "cal.db")
        times, page = [], ""
        for _ in range(args.runs):
            t0 = time.perf_counter()
            page = report_page(day)
            times.append((time.perf_counter() - t0) * 1000)
    svg = sum(len(m) for m in re.findall(r"<svg .*?</svg>", page, re.S))
    print(f"report build: median {statistics.median(times):.1f} ms over {args.runs} runs "
          f"(min {min(times):.1f}, max {max(times):.1f})")
    print(f"page: {len(page.encode()) / 1024:.1f} kB, of which inline SVG "
          f"{svg / 1024:.1f} kB in {page.count('<svg')} charts")


if __name__ == "__main__":
    main()
