"""Service figures: resident memory over a simulated month, idle CPU between targets, and
the delay from a target's planned time to the start of its burst in real time.

    .venv/bin/python benchmarks/bench_service.py [--days 30] [--idle-s 60] [--targets 8]

Prints the figures; exits 1 if a budget is missed (resident memory 60 MB, its growth
5 MB over the month, idle CPU 1 % of a core). Runs against the simulator over loopback
TCP. The month runs the service as heliotroped does (the plan and the fits in child
processes) in a fresh interpreter of its own, on a simulated clock, and reports that
process's own memory.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from daemon.config.settings import load_config, parse_config  # noqa: E402
from daemon.station.bench import bench_rig, quiet_site, simulator  # noqa: E402
from daemon.station.clock import SimClock  # noqa: E402
from daemon.station.plans import Plan, PlannedTarget  # noqa: E402

CONFIG = ROOT / "config" / "pico-sereno.yaml"


def rss_mb() -> float:
    return proc_mb("self")


def memory_over_month(days: int) -> dict:
    """The resident figures of ``days`` simulated days, from a fresh interpreter running
    :func:`month_in_this_process` (so nothing this script imported counts)."""
    proc = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--month-child",
                           str(days)], cwd=ROOT, capture_output=True, text=True, check=False)
    if proc.returncode != 0:
        raise SystemExit(f"the month's process failed:\n{proc.stderr[-2000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def month_in_this_process(days: int) -> dict:
    """``days`` simulated days of the service with child planning and fitting, through
    the simulator; this process's VmRSS after the first day and after the last, its
    VmHWM, and the heavy modules it holds (none expected)."""
    from daemon.station import service as service_mod

    # As heliotroped's main does; this script imports nothing of the writer before.
    service_mod.import_writer_without_type_maps()
    from apscheduler.schedulers.background import BackgroundScheduler

    from daemon.station.acquisition import local_midnight_utc
    from daemon.station.jobs import ChildJobs
    from daemon.store.reader import software_version

    first = date(2027, 3, 1)
    out: dict = {}
    with tempfile.TemporaryDirectory() as tmp, bench_rig(
            load_config(CONFIG), Path(tmp) / "month.db", "pico-sereno-clear", 1,
            "tcp:0") as (cfg, store, radiometer, tracker):
        store.record_configuration(cfg.text, cfg.source, software_version(),
                                   local_midnight_utc(cfg, first))
        clock = SimClock(local_midnight_utc(cfg, first))
        svc = service_mod.Service(cfg, store, radiometer, tracker, clock=clock,
                                  scheduler=BackgroundScheduler(timezone=UTC),
                                  children=ChildJobs(cfg, str(store.path)))
        svc.scheduler.start(paused=True)
        svc.plan_next(first)
        for k in range(days):
            _play_jobs(svc, local_midnight_utc(cfg, first + timedelta(days=k + 1)))
            if k == 0:
                out["rss_1_day_mb"] = rss_mb()
        out["rss_month_mb"] = rss_mb()
        out["hwm_mb"] = proc_mb("self", "VmHWM")
        out["measurements"] = store.conn.execute(
            "SELECT count(*) FROM measurements WHERE status = 'ok'").fetchone()[0]
        out["fits"] = store.conn.execute(
            "SELECT count(DISTINCT plan_date || session) FROM session_results").fetchone()[0]
        svc.scheduler.shutdown(wait=False)
    out["heavy"] = sorted(m for m in ("pandas", "numpy", "scipy", "pvlib") if m in sys.modules)
    return out


def _play_jobs(svc, until: datetime) -> None:
    """Run every job due up to ``until`` in time order on the simulated clock, as the
    service's one worker thread would (the minute tick included)."""
    while True:
        due = [j for j in svc.scheduler.get_jobs() if j.next_run_time <= until]
        if not due:
            return
        job = min(due, key=lambda j: j.next_run_time)
        if job.id == "tick" or job.trigger.__class__.__name__ == "IntervalTrigger":
            job.remove()
            continue
        job.remove()
        if job.next_run_time > svc.clock.now():
            svc.clock.sleep_until(job.next_run_time)
        job.func(*job.args, **job.kwargs)


@contextlib.contextmanager
def running_service(tmp: Path, ends, store_path: Path):
    """heliotroped as a child process on the simulator's ``ends`` and the store at
    ``store_path``; yields (process, seconds from spawn to its READY=1). Stops it with
    SIGTERM on leaving; the stop's duration is then in ``process.stop_s``."""
    data = yaml.safe_load(CONFIG.read_text())
    data["instrument"]["radiometer"]["port"] = ends.radiometer
    data["instrument"]["tracker"]["port"] = ends.tracker
    data["store"]["path"] = str(store_path)
    data = quiet_site(data, datetime.now(UTC))
    cfg_path = tmp / "service.yaml"
    cfg_path.write_text(yaml.safe_dump(data))
    sock_path = tmp / "notify"
    sock_path.unlink(missing_ok=True)
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(sock_path))
    sock.settimeout(120)
    t0 = time.monotonic()
    proc = subprocess.Popen([sys.executable, "-m", "daemon.station.service", "--config",
                             str(cfg_path), "--log-level", "ERROR"],
                            env=dict(os.environ, NOTIFY_SOCKET=str(sock_path)))
    try:
        while b"READY=1" not in sock.recv(4096):
            pass
        yield proc, time.monotonic() - t0
    finally:
        s0 = time.monotonic()
        proc.terminate()
        proc.wait(timeout=30)
        proc.stop_s = time.monotonic() - s0
        sock.close()


def proc_mb(pid: int | str, field: str = "VmRSS") -> float:
    """A memory figure of process ``pid`` from /proc/<pid>/status (proc(5)) [MB]."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1]) / 1024
    return float("nan")


def idle_cpu(idle_s: float) -> tuple[float, float, float]:
    """Percent of one core used by heliotroped over ``idle_s`` seconds with no target,
    the seconds from SIGTERM to its exit, and its resident memory at the end of the
    idle time [MB] (the budget of issue 16: 60 MB steady)."""
    with (tempfile.TemporaryDirectory() as tmp,
          simulator("pico-sereno-clear", 1, "tcp:0") as ends,
          running_service(Path(tmp), ends, Path(tmp) / "idle.db") as (proc, _ready_s)):
        time.sleep(2)  # let start-up work (first tick, plan, store check) finish

        def cpu_s() -> float:
            fields = Path(f"/proc/{proc.pid}/stat").read_text().rsplit(")", 1)[1].split()
            return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

        c0, t0 = cpu_s(), time.monotonic()
        time.sleep(idle_s)
        c1, t1 = cpu_s(), time.monotonic()
        resident = proc_mb(proc.pid)
    return 100.0 * (c1 - c0) / (t1 - t0), proc.stop_s, resident


class _Timed:
    """Wraps a radiometer; notes the wall time at which each burst command starts."""

    def __init__(self, inner):
        self.inner = inner
        self.starts: list[datetime] = []

    def read_burst(self, n):
        self.starts.append(datetime.now(UTC))
        return self.inner.read_burst(n)

    def __getattr__(self, name):
        return getattr(self.inner, name)


def target_latency(n: int) -> list[float]:
    """Seconds from each planned time to its burst start, real clock, APScheduler."""
    import threading

    from apscheduler.schedulers.background import BackgroundScheduler

    from daemon.station.service import Service

    # Move the site (daemon configuration and simulator scenario alike) to the longitude
    # where it is about noon now, so the sun is up whatever the hour of the run.
    now = datetime.now(UTC)
    lon = ((12.0 - (now.hour + now.minute / 60)) * 15.0 + 180.0) % 360.0 - 180.0
    tmp_dir = tempfile.TemporaryDirectory()
    tmp = Path(tmp_dir.name)
    scen = yaml.safe_load((ROOT / "sim_instrument" / "scenarios" /
                           "pico-sereno-clear.yaml").read_text())
    scen["site"]["longitude_deg"] = lon
    (tmp / "noon.yaml").write_text(yaml.safe_dump(scen))
    data = yaml.safe_load(CONFIG.read_text())
    data["site"]["longitude_deg"], data["site"]["timezone"] = lon, "UTC"
    site_cfg = parse_config(data)
    with tmp_dir, bench_rig(site_cfg, tmp / "latency.db", str(tmp / "noon.yaml"), 1,
                            "tcp:0") as (cfg, store, radiometer, tracker):
        timed = _Timed(radiometer)
        sched = BackgroundScheduler(timezone=UTC)
        svc = Service(cfg, store, timed, tracker, scheduler=sched)
        now = datetime.now(UTC)
        day = now.astimezone(cfg.tz).date()
        # Synthetic targets every 4 s: the figure is the scheduler and the acquisition
        # path, not the sky.
        # Lock on the sun first, so the figure is the scheduler and acquisition path and
        # not the first slew. The simulator's sun is wherever the real hour puts it.
        from daemon.science.solar import geometry_at
        aim = geometry_at(now, cfg.site)  # this benchmark process may use pvlib
        if aim.apparent_elevation_deg < 5:
            print("latency: the sun is down at the site now; run this in its daytime")
            return []
        from daemon.station.planner import plan_sun_table
        svc.station.use_sun_table(day, plan_sun_table(cfg, day))  # as the plan child stores
        svc.station.sync_clocks()
        tracker.goto(aim.azimuth_deg, aim.apparent_elevation_deg)
        tracker.follow_sun(True)
        settle = time.monotonic() + 120
        while not tracker.state().locked and time.monotonic() < settle:
            time.sleep(1)
            svc.station.sync_clocks()
        now = datetime.now(UTC)
        targets = tuple(PlannedTarget(now + timedelta(seconds=4 * (k + 1)), "routine",
                                      1.0 + k / 1000, 0.0, 0.0) for k in range(n))
        plan = Plan(day, cfg.site.name, cfg.site.timezone, targets, (), (), None, None,
                    None, ())
        svc.schedule_plan(plan, day)
        sched.start()
        done = threading.Event()
        deadline = time.monotonic() + 8 * (n + 4)
        while len(timed.starts) < n and time.monotonic() < deadline and not done.is_set():
            time.sleep(0.2)
        # Let the last measurement finish first: APScheduler 3's shutdown(wait=True) holds
        # the job-store lock while it waits for the worker, and the worker's last step
        # (the STATUS line) lists the jobs under that lock.
        svc._idle.wait(60)
        time.sleep(0.5)
        sched.shutdown(wait=True)
    return [(s - t.time_utc).total_seconds() for s, t in zip(timed.starts, targets,
                                                             strict=False)]


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--days", type=int, default=30)
    ap.add_argument("--idle-s", type=float, default=60)
    ap.add_argument("--targets", type=int, default=8)
    ap.add_argument("--month-child", type=int, metavar="DAYS", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.month_child:
        print(json.dumps(month_in_this_process(args.month_child)))
        return 0
    ok = True

    month_figures = memory_over_month(args.days)
    one, month = month_figures["rss_1_day_mb"], month_figures["rss_month_mb"]
    growth = month - one
    print(f"resident service (plan and fits in children), {args.days} simulated days: "
          f"{month_figures['measurements']} measurements, {month_figures['fits']} session "
          f"fits; memory after 1 day {one:.1f} MB, after {args.days} days {month:.1f} MB "
          f"(growth {growth:+.1f} MB; budget 5 MB), peak {month_figures['hwm_mb']:.1f} MB "
          f"(budget 60 MB); heavy modules held: {month_figures['heavy'] or 'none'}")
    ok &= growth < 5.0 and month_figures["hwm_mb"] < 60.0 and not month_figures["heavy"]

    cpu, stop_s, resident = idle_cpu(args.idle_s)
    print(f"idle service CPU over {args.idle_s:g} s: {cpu:.2f} % of one core (budget 1 %)")
    print(f"resident memory of the idle heliotroped process: {resident:.1f} MB "
          "(budget 60 MB)")
    print(f"SIGTERM to exit (parks the tracker, closes ports and store): {stop_s:.2f} s "
          "(budget 5 s)")
    ok &= cpu < 1.0 and stop_s < 5.0 and resident < 60.0

    delays = target_latency(args.targets)
    if delays:
        print(f"planned time to burst start over {len(delays)} targets: median "
              f"{statistics.median(delays) * 1000:.0f} ms, worst {max(delays) * 1000:.0f} ms")
    else:
        print("latency: no burst started (is the simulator answering?)")
        ok = False
    print(json.dumps({"rss_1_day_mb": one, "rss_month_mb": month,
                      "hwm_month_mb": month_figures["hwm_mb"], "idle_cpu_pct": cpu,
                      "service_rss_mb": resident,
                      "stop_s": stop_s,
                      "latency_s": delays}))
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
