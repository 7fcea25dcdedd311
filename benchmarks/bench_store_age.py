"""Cost of the read paths against the store's age: 1 day, 1 year (and 10 years with --ten).

The newest day is the synthetic clear day of ``tests/synthetic_store.py``, written
through the service's writer and fitted by the service's own session fit. The earlier
days are copies of it at the real cadence (its measurements with 10 sun and 5 dark
samples per channel, housekeeping, channel rows, session results, fit points and
plan), shifted back one local date each, bulk-inserted with ``executemany`` in one
transaction into a schema made by the writer's own migrations. Oldest days get the
lowest ids, as in a store that grew day by day.

Printed per store: the median wall time of fresh ``heliotrope today --json``,
``status --json``, ``results --from D`` and ``plot`` processes beside the bare
interpreter (``python3 -c pass`` of a fresh venv; and this venv's, which also runs
the editable install's finder, see ``bench_read_commands.py``) and ``plot``'s
ratio to it; the median time of one session's points read
(``reader.session_points``, in-process); the samples export of the newest day and of
the whole store: time to the first row, rows per second of its CSV (in-process, to
/dev/null) and of the whole ``heliotrope export --what samples --format csv`` command
(a fresh process, read from a pipe), beside ``sqlite3 -csv`` on the same rows when it
is installed; and heliotroped's start-up to READY against the simulator, warm and
with the store's pages dropped, beside the full integrity check it runs after READY;
on the 1-year and 10-year stores ``calibrate`` over the newest year, wall time and
peak resident memory.

    .venv/bin/python benchmarks/bench_store_age.py [--runs N] [--ten]
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as dt
import os
import re
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

_DATE = re.compile(r"\d{4}-\d{2}-\d{2}")
# Tables copied per day, with the columns that hold a measurement id.
_PER_MEASUREMENT = ("measurement_channels", "samples", "housekeeping", "fit_points")


def _shift(value: object, days: int) -> object:
    """Move every ISO date inside a text ``days`` back; the time of day stays."""
    if not isinstance(value, str):
        return value
    return _DATE.sub(lambda m: (dt.date.fromisoformat(m.group(0))
                                - dt.timedelta(days=days)).isoformat(), value)


def build_store(path: Path, n_days: int) -> dict[str, int]:
    """Write a store of ``n_days`` days ending on the synthetic day; return row counts."""
    from sqlite_utils import Database

    from daemon.store.writer import migrations
    from tests.synthetic_store import build_day

    template = path.with_name("template.db")
    build_day(template, heartbeat=dt.datetime.now(dt.UTC))
    src = sqlite3.connect(template)
    conn = sqlite3.connect(path)
    migrations.apply(Database(conn, execute_plugins=False))
    conn.execute("PRAGMA journal_mode = WAL")

    def rows(table: str) -> tuple[list[str], list[tuple]]:
        cur = src.execute(f"SELECT * FROM {table}")
        return [d[0] for d in cur.description], cur.fetchall()

    meas_cols, meas = rows("measurements")
    id_col = meas_cols.index("id")
    first_id = min(r[id_col] for r in meas)
    per_day = max(r[id_col] for r in meas) - first_id + 1
    dependents = {t: rows(t) for t in _PER_MEASUREMENT}
    copied = {t: rows(t) for t in ("session_results", "plans", "events", "meta")}

    def insert(table: str, cols: list[str], data: list[tuple]) -> None:
        conn.executemany(f"INSERT INTO {table} ({', '.join(cols)}) VALUES "
                         f"({', '.join('?' * len(cols))})", data)

    with conn:
        for k in range(n_days - 1, -1, -1):  # oldest first
            base = (n_days - 1 - k) * per_day - first_id + 1

            def day(data: list[tuple], cols: list[str], k: int = k,
                    base: int = base) -> list[tuple]:
                mid = cols.index("measurement_id") if "measurement_id" in cols else None
                ident = cols.index("id") if "id" in cols else None
                out = []
                for r in data:
                    r = [_shift(v, k) for v in r]
                    if mid is not None:
                        r[mid] += base
                    if ident is not None:
                        r[ident] += base
                    out.append(tuple(r))
                return out

            insert("measurements", meas_cols, day(meas, meas_cols))
            for table, (cols, data) in dependents.items():
                insert(table, cols, day(data, cols))
            for table in ("session_results", "plans"):
                cols, data = copied[table]
                insert(table, cols, [tuple(_shift(v, k) for v in r) for r in data])
        for table in ("events", "meta"):
            cols, data = copied[table]
            insert(table, [c for c in cols if c != "id"],
                   [tuple(v for c, v in zip(cols, r, strict=True) if c != "id") for r in data])
    counts = {t: conn.execute(f"SELECT count(*) FROM {t}").fetchone()[0]
              for t in ("measurements", "samples")}
    conn.close()
    src.close()
    template.unlink()
    return counts


#: The samples export's rows in one query for the shell, in the order of the indexes
#: (the measurements by (plan_date, time_utc), each one's samples by the primary key):
#: the export's rows, with no sort at all, the shell's fastest way to them.
SHELL_SAMPLES_SQL = """
SELECT m.id, m.time_utc, m.plan_date, m.session, s.channel, s.kind, s.sample_index, s.value_v
FROM measurements m CROSS JOIN samples s ON s.measurement_id = m.id
WHERE m.plan_date BETWEEN ?1 AND ?2
ORDER BY m.plan_date, m.time_utc, m.id, s.kind, s.channel, s.sample_index
"""


def _export_figures(db: Path, first: str, last: str) -> tuple[float, int, float]:
    """Time to the first samples-export row [ms] (rows as dicts, in-process), rows, and
    rows per second of the CSV the command writes (in-process, to /dev/null)."""
    from daemon.commands.export import export_rows, write_samples_csv
    from daemon.store.reader import open_readonly

    conn = open_readonly(db)
    t0 = time.perf_counter()
    next(export_rows(conn, "samples", first, last))
    t_first = (time.perf_counter() - t0) * 1000
    with open(os.devnull, "w", encoding="utf-8", newline="") as sink:
        t0 = time.perf_counter()
        n = write_samples_csv(conn, first, last, sink)
        total = time.perf_counter() - t0
    conn.close()
    return t_first, n, n / total


def _command_rows_per_s(base: list[str], env: dict, first: str, last: str) -> float:
    """``heliotrope export --what samples --format csv`` as an operator runs it, a fresh
    process reading its CSV from a pipe as the shell's figure does [rows/s]."""
    t0 = time.perf_counter()
    out = subprocess.run(base + ["export", "--what", "samples", "--format", "csv", "--from",
                                 first, "--to", last], capture_output=True, check=True,
                         env=env).stdout
    return (out.count(b"\n") - 1) / (time.perf_counter() - t0)  # less the header


def _shell_rows_per_s(db: Path, first: str, last: str) -> float | None:
    """The ``sqlite3`` shell on the same rows, CSV read from a pipe [rows/s]."""
    shell = shutil.which("sqlite3")
    if shell is None:
        return None
    sql = SHELL_SAMPLES_SQL.replace("?1", f"'{first}'").replace("?2", f"'{last}'")
    t0 = time.perf_counter()
    out = subprocess.run([shell, "-readonly", "-csv", str(db), sql], capture_output=True,
                         check=True).stdout
    return out.count(b"\n") / (time.perf_counter() - t0)


def bench(n_days: int, runs: int) -> None:
    from benchmarks.bench_read_commands import (
        BARE,
        _median_ms,
        bare_python,
        record_station_configuration,
    )
    from daemon.store.reader import open_readonly, session_points
    from tests.synthetic_store import CONFIG_PATH, DAY

    script = Path(sys.executable).with_name("heliotrope")
    base = [str(script)] if script.exists() else [sys.executable, "-m", "daemon.commands.cli"]
    d = DAY.isoformat()
    first = (DAY - dt.timedelta(days=n_days - 1)).isoformat()
    with tempfile.TemporaryDirectory() as tmp:
        db = Path(tmp) / "heliotrope.db"
        t0 = time.perf_counter()
        counts = build_store(db, n_days)
        record_station_configuration(db, CONFIG_PATH)
        size = db.stat().st_size / 2**20
        print(f"\n{n_days} days: {counts['measurements']:,} measurements, "
              f"{counts['samples']:,} samples, {size:.0f} MiB, built in "
              f"{time.perf_counter() - t0:.1f} s")
        env = {**os.environ, "HELIOTROPE_DB": str(db), "HELIOTROPE_CONFIG": str(CONFIG_PATH)}
        cases = [
            (BARE, [bare_python(Path(tmp) / "bare"), "-c", "pass"]),
            ("python3 -c pass (this venv)", [sys.executable, "-c", "pass"]),
            ("today --json", base + ["today", "--json"]),
            ("status --json", base + ["status", "--json"]),
            ("results --from D", base + ["results", "--from", d]),
            ("plot --session am", base + ["plot", "--date", d, "--channel", "500",
                                          "--session", "am"]),
        ]
        medians = {}
        for name, cmd in cases:
            medians[name] = _median_ms(cmd, runs, env)
            print(f"  {name:<32} {medians[name]:>9.1f} ms")
        print(f"  plot: {medians['plot --session am'] / medians[BARE]:.2f} times {BARE}")
        conn = open_readonly(db)
        times = []
        for _ in range(max(runs, 5)):
            t1 = time.perf_counter()
            session_points(conn, d, "am")
            times.append((time.perf_counter() - t1) * 1000)
        conn.close()
        print(f"  {'session_points (one session)':<32} {statistics.median(times):>9.2f} ms")
        for label, a in (("newest day", d), ("whole store", first)):
            t_first, n, rate = _export_figures(db, a, d)
            command = _command_rows_per_s(base, env, a, d)
            shell = _shell_rows_per_s(db, a, d)
            beside = "" if shell is None else (
                f"; sqlite3 -csv shell {shell:,.0f} rows/s (CSV {shell / rate:.2f} times, "
                f"command {shell / command:.2f} times slower)")
            print(f"  samples export, {label}: first row {t_first:.1f} ms, {n:,} rows; CSV "
                  f"{rate:,.0f} rows/s, the whole command {command:,.0f} rows/s{beside}")
        _startup_figures(db, Path(tmp))
        if n_days >= 365:  # last: it writes a calibration and the year's AOD
            year = (DAY - dt.timedelta(days=364)).isoformat()
            wall, peak = _wall_and_peak(base + ["calibrate", "--from", year, "--to", d], env)
            print(f"  calibrate over a year              {wall * 1000:9.0f} ms, "
                  f"peak RSS {peak:.0f} MB")


def _wall_and_peak(cmd: list[str], env: dict) -> tuple[float, float]:
    """Wall time [s] and peak resident memory [MB] of one run of ``cmd``.

    The peak is the child's own VmHWM (proc(5)), read every 20 ms until it exits:
    ``ru_maxrss`` from wait4 would not do, as Linux carries the forking parent's high
    water mark (this script's, with the store builder's imports) across exec."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, cwd=ROOT, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    from benchmarks.bench_service import proc_mb

    peak = 0.0
    while proc.poll() is None:
        with contextlib.suppress(OSError, ValueError):  # exiting between poll and read
            peak = max(peak, proc_mb(proc.pid, "VmHWM"))
        time.sleep(0.02)
    wall = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"{' '.join(cmd)} failed ({proc.returncode}): "
                         f"{proc.stderr.read().decode()}")
    return wall, peak


def drop_cached_pages(db: Path) -> None:
    """Ask the kernel to forget the store's cached pages (clean pages only, hence the
    fsync): the next read comes from the disk, as after a reboot."""
    for path in (db, db.with_name(db.name + "-wal")):
        if path.exists():
            fd = os.open(path, os.O_RDONLY)
            try:
                os.fsync(fd)
                os.posix_fadvise(fd, 0, 0, os.POSIX_FADV_DONTNEED)
            finally:
                os.close(fd)


def _startup_figures(db: Path, tmp: Path) -> None:
    """heliotroped's spawn to READY=1 on this store (against the simulator), warm and
    with the store's pages dropped; beside it the full integrity check it now runs
    after READY, warm and cold."""
    from benchmarks.bench_service import running_service
    from daemon.station.bench import simulator
    from daemon.store.writer import integrity_problems

    for state in ("warm", "cold"):
        t0 = time.perf_counter()
        if state == "cold":
            drop_cached_pages(db)
        assert integrity_problems(db) == []
        check_s = time.perf_counter() - t0
        with simulator("pico-sereno-clear", 1, "tcp:0") as ends:
            if state == "cold":
                drop_cached_pages(db)
            with running_service(tmp, ends, db) as (_proc, ready_s):
                pass
        print(f"  start-up to READY, {state:<4}: {ready_s * 1000:7.0f} ms; the full "
              f"integrity check (after READY now): {check_s * 1000:7.0f} ms")


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--runs", type=int, default=11, help="runs per median (default 11)")
    p.add_argument("--ten", action="store_true", help="also build and time a 10-year store")
    args = p.parse_args()
    print(f"{os.cpu_count()} CPUs, Python {sys.version.split()[0]}, "
          f"SQLite {sqlite3.sqlite_version}")
    for n_days in (1, 365) + ((3652,) if args.ten else ()):
        bench(n_days, args.runs)
    return 0


if __name__ == "__main__":
    sys.exit(main())
