"""Wall time of the operator's read commands, as a person over SSH would start them.

Each command runs as a fresh process (the installed ``heliotrope`` script when it is
there, else ``python -m daemon.commands.cli``) against a synthetic clear day, and the median of
N runs is printed beside that of the bare interpreter, after the project's bytecode
caches are written (:func:`compile_bytecode`). The bare interpreter (:data:`BARE`) is
``python3 -c pass`` in a fresh venv with nothing installed (:func:`bare_python`), the
interpreter's own start-up with its site module: this development venv's ``python3 -c
pass`` also runs the editable install's import finder, which imports ``pathlib``,
``re`` and ``urllib.parse`` at every start (some 25-35 ms here) and which a station's
installed package does not have; it is printed too, but the ratios are taken against
the interpreter's own start.
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
#: The bare interpreter the budgets' ratios are taken against: a fresh venv's, so none
#: of this venv's .pth files (the editable install's finder) run.
BARE = "python3 -c pass (fresh venv)"


def bare_python(directory: Path) -> str:
    """The interpreter of a fresh venv made in ``directory``, with nothing installed."""
    import venv

    venv.EnvBuilder(with_pip=False).create(directory)
    return str(directory / "bin" / "python")


_compiled = False


def compile_bytecode() -> None:
    """Write the project's bytecode caches (``__pycache__``), as installing the package
    does: pip compiles every module it installs. Without them, and with
    PYTHONDONTWRITEBYTECODE set (as in the development shell), every fresh process
    compiles each of our modules it imports from source again: 70 to 140 ms more for
    ``plot`` in two runs on the development machine, measured as if it were the command's
    own start-up."""
    global _compiled
    if not _compiled:
        import compileall

        for package in ("daemon", "drivers"):
            compileall.compile_dir(ROOT / package, quiet=1)
        _compiled = True


def _run_ms(cmd: list[str], env: dict) -> float:
    """Wall time of one fresh process [ms]; exits the benchmark if the command failed."""
    t0 = time.perf_counter()
    r = subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, env=env,
                       cwd=ROOT)
    elapsed = (time.perf_counter() - t0) * 1000
    if r.returncode not in (0, 1):
        raise SystemExit(f"{' '.join(cmd)} failed ({r.returncode}): {r.stderr.decode()}")
    return elapsed


def _median_ms(cmd: list[str], runs: int, env: dict) -> float:
    compile_bytecode()
    return statistics.median(_run_ms(cmd, env) for _ in range(runs))


def record_station_configuration(db: Path, config_path: Path) -> None:
    """Record the configuration in the store as the service does at every start, so
    ``plot`` and ``report`` read it from the store (its JSON form) as on a station."""
    from daemon.store.writer import Store

    with Store.open(db) as store:
        store.record_configuration(config_path.read_text(), str(config_path), "bench",
                                   dt.datetime.now(dt.UTC))


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
        record_station_configuration(db, CONFIG_PATH)
        env = {**os.environ, "HELIOTROPE_DB": str(db), "HELIOTROPE_CONFIG": str(CONFIG_PATH)}
        cases = [
            (BARE, [bare_python(Path(tmp) / "bare"), "-c", "pass"]),
            ("python3 -c pass (this venv)", [sys.executable, "-c", "pass"]),
            ("heliotrope today --json", base + ["today", "--json"]),
            ("heliotrope status --json", base + ["status", "--json"]),
            ("heliotrope results --from D", base + ["results", "--from", d]),
            ("heliotrope plan --date D --json", base + ["plan", "--date", d, "--json"]),
            ("heliotrope export measurements csv",
             base + ["export", "--from", d, "--what", "measurements"]),
            ("heliotrope ssh-gate (today --json)", base + ["ssh-gate"]),
            ("heliotrope plot --session am", base + ["plot", "--date", d, "--channel", "500",
                                                     "--session", "am"]),
            ("heliotrope plot --session am --config", base + [
                "plot", "--date", d, "--channel", "500", "--session", "am", "--config",
                str(CONFIG_PATH)]),
            ("heliotrope report", base + ["report", "--date", d]),
        ]
        print(f"{'command':<38} {'median [ms]':>12} {'x bare':>7}   ({args.runs} runs each, "
              f"{os.cpu_count()} CPUs, Python {sys.version.split()[0]})")
        # Round robin, one run of every command per round, so that the load of a shared
        # machine, which drifts over a minute, weighs on every command alike.
        compile_bytecode()
        times: dict[str, list[float]] = {name: [] for name, _ in cases}
        for _ in range(args.runs):
            for name, cmd in cases:
                run_env = ({**env, "SSH_ORIGINAL_COMMAND": "today --json"} if "gate" in name
                           else env)
                times[name].append(_run_ms(cmd, run_env))
        results = {name: statistics.median(t) for name, t in times.items()}
        bare = results[BARE]
        for name, median in results.items():
            print(f"{name:<38} {median:>12.1f} {median / bare:>7.2f}")
    today = results["heliotrope today --json"]
    verdict = "within" if today <= BUDGET_MS else "OVER"
    print(f"today --json: {today:.1f} ms, {today - bare:.1f} ms above "
          f"the bare interpreter ({BARE}); {verdict} the {BUDGET_MS:.0f} ms budget")
    for name, times_bare in (("heliotrope plot --session am", 3), ("heliotrope report", 10)):
        ratio = results[name] / bare
        print(f"{name.removeprefix('heliotrope ')}: {ratio:.2f} times the bare interpreter "
              f"({BARE}); "
              f"{'within' if ratio <= times_bare else 'OVER'} the {times_bare} times budget "
              "(DEVELOPERS.md, \"Ten years on a small board\")")
    return 0


if __name__ == "__main__":
    sys.exit(main())
