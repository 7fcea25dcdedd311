"""The service adapter: planning into scheduler jobs, restarts and clock steps, a full
disk, a corrupt store, and the life cycle under systemd (READY, STATUS, WATCHDOG,
STOPPING, SIGTERM)."""

from __future__ import annotations

import hashlib
import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import pytest
import yaml
from apscheduler.schedulers.background import BackgroundScheduler

from daemon.config.settings import load_config
from daemon.station.acquisition import local_midnight_utc
from daemon.station.bench import quiet_site
from daemon.station.clock import SimClock
from daemon.station.planner import PlannedTarget, plan_day
from daemon.station.service import Service
from daemon.store.writer import Store, config_digest
from tests.fakes import FakeRadiometer, FakeTracker

ROOT = Path(__file__).resolve().parent.parent
CONFIG = ROOT / "config" / "pico-sereno.yaml"
DAY = date(2027, 2, 15)


@pytest.fixture
def cfg():
    return load_config(CONFIG)


def _service(cfg, tmp_path, start: datetime) -> Service:
    store = Store.open(tmp_path / "s.db")
    clock = SimClock(start)
    # A scheduler that is never started: the test looks at its jobs and runs them.
    return Service(cfg, store, FakeRadiometer(), FakeTracker(), clock=clock,
                   scheduler=BackgroundScheduler(timezone=UTC))


def _events(svc: Service, kind: str) -> list[str]:
    rows = svc.station.store.conn.execute(
        "select message from events where kind = ? order by id", (kind,)).fetchall()
    return [r[0] for r in rows]


def _target_jobs(svc: Service) -> list[PlannedTarget]:
    return sorted((j.args[0] for j in svc.scheduler.get_jobs()
                   if j.id.startswith("plan-") and isinstance(j.args[0], PlannedTarget)),
                  key=lambda t: t.time_utc)


def test_a_fresh_day_schedules_every_target(cfg, tmp_path):
    svc = _service(cfg, tmp_path, local_midnight_utc(cfg, DAY))
    svc.schedule_day(DAY)
    plan = plan_day(cfg, DAY)
    assert [t.time_utc for t in _target_jobs(svc)] == [t.time_utc for t in plan.targets]
    assert any(j.id.startswith("plan-next-") for j in svc.scheduler.get_jobs())
    assert _events(svc, "missed_target") == []


def test_restart_in_mid_session_measures_the_rest_and_records_the_missed(cfg, tmp_path):
    plan = plan_day(cfg, DAY)
    am = [t for t in plan.targets if t.session == "am"]
    restart = am[5].time_utc + timedelta(minutes=5)  # five targets ago, plus a bit
    svc = _service(cfg, tmp_path, restart)
    svc.schedule_day(DAY)
    ahead = _target_jobs(svc)
    assert ahead[0].time_utc > restart - timedelta(minutes=2)
    assert len(ahead) == len(plan.targets) - len(_events(svc, "missed_target"))
    assert len(_events(svc, "missed_target")) >= 5


def test_clock_step_back_replans_without_measuring_twice(cfg, tmp_path):
    plan = plan_day(cfg, DAY)
    am = [t for t in plan.targets if t.session == "am"]
    svc = _service(cfg, tmp_path, am[0].time_utc - timedelta(seconds=1))
    svc.schedule_day(DAY)
    for t in am[:4]:  # the worker measures four targets
        svc.clock.sleep_until(t.time_utc)
        svc.run_item(t, DAY)
    svc.clock.step_wall(-600)  # NTP pulls the clock back ten minutes in mid-session
    svc.tick()
    assert _events(svc, "clock_step") == ["wall clock stepped -600 s; re-planning"]
    again = {t.time_utc for t in _target_jobs(svc)}
    assert not again & {t.time_utc for t in am[:4]}
    n = svc.station.store.conn.execute("select count(*) from measurements").fetchone()[0]
    assert n == 4


def test_clock_step_ahead_records_the_targets_jumped_over(cfg, tmp_path):
    plan = plan_day(cfg, DAY)
    am = [t for t in plan.targets if t.session == "am"]
    svc = _service(cfg, tmp_path, am[3].time_utc - timedelta(seconds=1))
    svc.schedule_day(DAY)
    before = len(_events(svc, "missed_target"))
    svc.clock.step_wall(+600)
    svc.tick()
    assert _events(svc, "clock_step") == ["wall clock stepped +600 s; re-planning"]
    jumped = [t for t in am[3:] if t.time_utc < am[3].time_utc + timedelta(seconds=480)]
    assert len(_events(svc, "missed_target")) - before == len(jumped) > 0


def test_full_disk_is_logged_and_survived(cfg, tmp_path, caplog):
    targets = plan_day(cfg, DAY).targets
    svc = _service(cfg, tmp_path, targets[0].time_utc)
    svc.run_item(targets[0], DAY)
    conn = svc.station.store.conn
    pages = conn.execute("pragma page_count").fetchone()[0]
    conn.execute(f"pragma max_page_count = {pages}")  # the disk is now full
    k = 1
    while "database or disk is full" not in caplog.text:  # free pages fill up first
        assert k < 10, "the store never filled up"
        svc.clock.sleep_until(targets[k].time_utc)
        svc.run_item(targets[k], DAY)  # must not raise
        k += 1
    stored = conn.execute("select count(*) from measurements").fetchone()[0]
    svc.clock.sleep_until(targets[k].time_utc)
    svc.run_item(targets[k], DAY)
    svc.tick()
    assert conn.execute("pragma integrity_check").fetchone()[0] == "ok"
    assert conn.execute("select count(*) from measurements").fetchone()[0] == stored
    # every stored measurement is whole: a burst and a dark on six channels
    per = conn.execute("select count(*) from samples group by measurement_id").fetchall()
    assert len(per) == stored and {c for (c,) in per} == {6 * 15}
    conn.execute("pragma max_page_count = 1073741823")  # space again
    svc.clock.sleep_until(targets[k + 1].time_utc)
    svc.run_item(targets[k + 1], DAY)
    assert conn.execute("select count(*) from measurements").fetchone()[0] == stored + 1


def _site_config(tmp_path: Path, radiometer: str, tracker: str) -> Path:
    # No real target near the hour the test runs at: the life cycle is what is tested.
    data = quiet_site(yaml.safe_load(CONFIG.read_text()), datetime.now(UTC))
    data["instrument"]["radiometer"]["port"] = radiometer
    data["instrument"]["tracker"]["port"] = tracker
    data["store"]["path"] = str(tmp_path / "svc.db")
    path = tmp_path / "svc.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def test_corrupt_store_is_reported_and_never_touched(tmp_path):
    cfg_path = _site_config(tmp_path, "socket://127.0.0.1:9", "socket://127.0.0.1:9")
    db = tmp_path / "svc.db"
    db.write_bytes(os.urandom(8192))
    digest = hashlib.sha256(db.read_bytes()).hexdigest()
    proc = subprocess.run([sys.executable, "-m", "daemon.station.service",
                           "--config", str(cfg_path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 74
    assert str(db) in proc.stderr and "Traceback" not in proc.stderr
    assert hashlib.sha256(db.read_bytes()).hexdigest() == digest
    assert sorted(p.name for p in tmp_path.iterdir()) == ["svc.db", "svc.yaml"]


def test_bad_config_exits_78(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("site: {}\n")
    proc = subprocess.run([sys.executable, "-m", "daemon.station.service", "--config", str(bad)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 78
    assert "site.name: required key is missing" in proc.stderr


@pytest.mark.slow
def test_life_cycle_under_systemd_notify(tmp_path):
    """heliotroped against the simulator on loopback TCP: READY, STATUS and WATCHDOG
    reach the notify socket; SIGTERM parks the tracker and exits 0."""
    sim = subprocess.Popen([sys.executable, "-m", "sim_instrument", "--scenario",
                            "pico-sereno-clear", "--port", "tcp:0", "--stdin-lifeline"],
                           stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        ends = json.loads(sim.stdout.readline())
        cfg_path = _site_config(tmp_path, ends["radiometer"], ends["tracker"])
        notify_path = tmp_path / "notify.sock"
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        sock.bind(str(notify_path))
        sock.settimeout(30)
        env = dict(os.environ, NOTIFY_SOCKET=str(notify_path))
        svc = subprocess.Popen([sys.executable, "-m", "daemon.station.service", "--config",
                                str(cfg_path)], env=env, stderr=subprocess.PIPE, text=True)
        got: list[str] = []
        while not ({"READY=1", "WATCHDOG=1"} <= set(got)):
            got += sock.recv(4096).decode().splitlines()
        assert any(m.startswith("STATUS=") for m in got)
        # The day was planned in a child: the resident process maps no extension module of
        # numpy, pandas or scipy (proc(5), /proc/PID/maps lists the mapped files).
        maps = Path(f"/proc/{svc.pid}/maps").read_text()
        assert [m for m in ("numpy", "pandas", "scipy") if f"/{m}/" in maps] == []
        svc.send_signal(signal.SIGTERM)  # how fast it stops: benchmarks/bench_service.py
        rc = svc.wait(timeout=60)
        while "STOPPING=1" not in got:
            got += sock.recv(4096).decode().splitlines()
        assert rc == 0, svc.stderr.read()
        conn = sqlite3.connect(tmp_path / "svc.db")
        kinds = [k for (k,) in conn.execute("select kind from events order by id")]
        hashes = {h for (h,) in conn.execute("select config_sha256 from plans union "
                                              "select config_sha256 from sun_tables")}
        conn.close()
        assert kinds[0] == "start" and kinds[-1] == "stop"
        assert "device" in kinds and "plan" in kinds
        assert hashes == {config_digest(cfg_path.read_text())}
    finally:
        sim.stdin.close()
        sim.wait(timeout=15)
