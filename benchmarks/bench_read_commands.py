"""Wall time of the operator's read commands, as a person over SSH would start them.

Each command runs as a fresh process (the installed ``heliotrope`` script when it is
there, else ``python -m daemon.commands.cli``) against a synthetic clear day, and the median of
N runs is printed beside that of ``python3 -c pass`` (the interpreter's own start-up).
Budget (DESIGN.md): ``heliotrope today --json`` under 150 ms on the development machine.

    .venv/bin/python benchmarks/bench_read_commands.py [--runs N]
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

BUDGET_MS = 150.0


def _median_ms(cmd: list[str], runs: int, env: dict) -> float:
    times = []
    for _ in range(runs):
        t0 = time.perf_counter()
        r = subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env,
                           cwd=ROOT)
        times.append((time.perf_counter() - t0) * 1000)
        if r.returncode not in (0, 1):
            raise SystemExit(f"{' '.join(cmd)} failed ({r.returncode}): {r.stderr.decode()}")
    return statistics.median(times)


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--runs", type=int, default=21)
    args = p.parse_args()

    from tests.synthetic_store import CONFIG_PATH, DAY, build_day

    script = Path(sys.executable).with_name("heliotrope")
    base = [str(script)] if script.exists() else [sys.executable, "-m", "daemon.commands.cli"]
    d = DAY.isoformat()
    with tempfile.TemporaryDirectory() as tmp:
        db = Path(tmp) / "heliotrope.db"
        build_day(db, heartbeat=dt.datetime.now(dt.UTC))
        env = {**os.environ, "HELIOTROPE_DB": str(db), "HELIOTROPE_CONFIG": str(CONFIG_PATH)}
        cases = [
            ("python3 -c pass", [sys.executable, "-c", "pass"]),
            ("heliotrope today --json", base + ["today", "--json"]),
            ("heliotrope status --json", base + ["status", "--json"]),
            ("heliotrope results --from D", base + ["results", "--from", d]),
            ("heliotrope plan --date D --json", base + ["plan", "--date", d, "--json"]),
            ("heliotrope export measurements csv",
             base + ["export", "--from", d, "--what", "measurements"]),
            ("heliotrope ssh-gate (today --json)", base + ["ssh-gate"]),
            ("heliotrope plot --session am", base + ["plot", "--date", d, "--channel", "500",
                                                     "--session", "am"]),
            ("heliotrope report", base + ["report", "--date", d]),
        ]
        print(f"{'command':<38} {'median [ms]':>12}   ({args.runs} runs each, "
              f"{os.cpu_count()} CPUs, Python {sys.version.split()[0]})")
        results = {}
        for name, cmd in cases:
            run_env = {**env, "SSH_ORIGINAL_COMMAND": "today --json"} if "gate" in name else env
            results[name] = _median_ms(cmd, args.runs, run_env)
            print(f"{name:<38} {results[name]:>12.1f}")
    today = results["heliotrope today --json"]
    verdict = "within" if today <= BUDGET_MS else "OVER"
    print(f"today --json: {today:.1f} ms, {today - results['python3 -c pass']:.1f} ms above "
          f"the bare interpreter; {verdict} the {BUDGET_MS:.0f} ms budget")
    return 0


if __name__ == "__main__":
    sys.exit(main())
