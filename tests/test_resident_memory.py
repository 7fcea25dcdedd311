"""The resident service holds no pandas, numpy, scipy or pvlib: a simulated day through
the real child processes (plan and fits in fresh interpreters, writing into the store)
leaves none of them in the resident process's sys.modules; the store's writer imported
without sqlite-utils' optional type maps still writes every column type; and a child
that fails, hangs, is cancelled or answers for another configuration costs an event and
a retry, never acquisition. (Memory itself is measured by benchmarks/bench_service.py.)"""

from __future__ import annotations

import json
import subprocess
import sys
import threading
import time
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import pytest
import yaml
from apscheduler.schedulers.background import BackgroundScheduler

from daemon.config.settings import load_config
from daemon.station.clock import SimClock
from daemon.station.jobs import ChildFailed, ChildJobs
from daemon.station.service import Service
from daemon.store.writer import Store, config_digest
from tests.fakes import FakeRadiometer, FakeTracker

ROOT = Path(__file__).resolve().parent.parent
CONFIG = ROOT / "config" / "pico-sereno.yaml"
DAY = date(2027, 2, 15)
HEAVY = ("pandas", "numpy", "scipy", "pvlib")

# A fresh interpreter: the service's own import of the writer, then a day of jobs on a
# simulated clock, played in order as the one worker thread would (as in
# tests/test_service_survives.py), with the real child processes.
DAY_SCRIPT = r"""
import json, sys
from datetime import UTC, date, datetime, timedelta
from daemon.station import service as service_mod
service_mod.import_writer_without_type_maps()
from apscheduler.schedulers.background import BackgroundScheduler
from daemon.config.settings import load_config
from daemon.station.clock import SimClock
from daemon.station.jobs import ChildJobs
from daemon.store.writer import Store
from tests.fakes import FakeRadiometer, FakeTracker

cfg = load_config(sys.argv[1])
store = Store.open(cfg.store_path, full_check=False)
from daemon.store.reader import software_version
store.record_configuration(cfg.text, cfg.source, software_version(),
                           datetime(2027, 2, 15, tzinfo=UTC))  # as heliotroped's main
day = date.fromisoformat(sys.argv[2])
svc = service_mod.Service(cfg, store, FakeRadiometer(), FakeTracker(),
                          clock=SimClock(datetime.fromisoformat(sys.argv[3])),
                          scheduler=BackgroundScheduler(timezone=UTC),
                          children=ChildJobs(cfg, cfg.store_path))
svc.scheduler.start(paused=True)
svc.plan_next(day)
until = datetime.fromisoformat(sys.argv[4])
while True:
    due = [j for j in svc.scheduler.get_jobs() if j.next_run_time <= until]
    if not due:
        break
    job = min(due, key=lambda j: j.next_run_time)
    job.remove()
    if job.next_run_time > svc.clock.now():
        svc.clock.sleep_until(job.next_run_time)
    job.func(*job.args, **job.kwargs)
heavy = sorted(m for m in sys.modules if m.split(".")[0] in HEAVY and sys.modules[m])
print(json.dumps({"heavy": heavy, "last": svc.last_result}))
""".replace("HEAVY", repr(HEAVY))


def _config_file(tmp_path: Path) -> Path:
    data = yaml.safe_load(CONFIG.read_text())
    data["store"]["path"] = str(tmp_path / "resident.db")
    path = tmp_path / "station.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


@pytest.mark.slow
def test_a_day_with_child_planning_and_fitting_leaves_no_heavy_module_resident(tmp_path):
    from daemon.station.planner import plan_day

    cfg_path = _config_file(tmp_path)
    cfg = load_config(cfg_path)
    plan = plan_day(cfg, DAY)
    fit_pm = next(e.time_utc for e in plan.events if e.kind == "fit_pm")
    start = plan.targets[0].time_utc - timedelta(minutes=5)
    proc = subprocess.run(
        [sys.executable, "-c", DAY_SCRIPT, str(cfg_path), DAY.isoformat(), start.isoformat(),
         (fit_pm + timedelta(seconds=1)).isoformat()],
        cwd=ROOT, capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    assert out["heavy"] == [], f"the resident process imported {out['heavy']}"
    assert out["last"].startswith(f"{DAY} pm: ")

    with Store.open(cfg.store_path) as store:
        conn = store.conn
        kinds = [k for (k,) in conn.execute("SELECT kind FROM events ORDER BY id")]
        n_ok = conn.execute("SELECT count(*) FROM measurements WHERE status = 'ok'"
                            ).fetchone()[0]
        results = conn.execute("SELECT session, count(*) FROM session_results "
                               "GROUP BY session").fetchall()
        config_ids = {r for (r,) in conn.execute(
            "SELECT DISTINCT configuration_id FROM session_results")}
        plan_hash = conn.execute("SELECT config_sha256 FROM plans WHERE plan_date = ?",
                                 (DAY.isoformat(),)).fetchone()[0]
    assert n_ok == len(plan.targets)
    assert dict(results) == {"am": len(cfg.channels), "pm": len(cfg.channels)}
    assert kinds.count("session_fit") == 2 and "job_error" not in kinds
    assert "geometry_fallback" not in kinds
    assert config_ids == {1}, "the child's results point to the service's configuration"
    assert plan_hash == config_digest(cfg.text)


WRITER_SCRIPT = r"""
import json, sys
from daemon.station import service as service_mod
service_mod.import_writer_without_type_maps()
from sqlite_utils.db import COLUMN_TYPE_MAPPING
from daemon.store.writer import Store, MeasurementRecord
from datetime import UTC, datetime
from drivers.interfaces import Housekeeping
store = Store.open(sys.argv[1])
hk = Housekeeping(detector_temp_c=21.5, case_temp_c=20.0, ambient_temp_c=4.0, supply_v=12.1,
                  humidity_pct=30.0, pressure_hpa=651.2)
mid = store.record_measurement(MeasurementRecord(
    time_utc=datetime(2027, 2, 15, 14, tzinfo=UTC), plan_date="2027-02-15", session="am",
    target_airmass=2.0, status="ok", failure=None, apparent_zenith_deg=60.0,
    azimuth_deg=110.0, airmass=2.0, ozone_airmass=1.98, earth_sun_factor=1.02,
    pressure_hpa=651.2, pointing_error_deg=0.01, locked=True, duration_s=1.5,
    channels=("a", "b"), sun=((1.5, 2.5),), dark=((0.001, 0.002),), saturated=(False, True),
    housekeeping=hk))
types = store.conn.execute(
    "SELECT typeof(time_utc), typeof(airmass), typeof(locked), typeof(n_samples) "
    "FROM measurements WHERE id = ?", (mid,)).fetchone()
sample = store.conn.execute("SELECT typeof(value_v), typeof(sample_index) FROM samples "
                            "LIMIT 1").fetchone()
absent = [m for m in ("pandas", "numpy") if m in sys.modules]
import numpy  # unmarked again after the writer's import: a later import still works
print(json.dumps({"absent": absent, "types": list(types), "sample": list(sample),
                  "map": {t.__name__: COLUMN_TYPE_MAPPING[t] for t in (float, int, str)}}))
"""


def test_the_writer_imported_without_type_maps_still_writes_every_type(tmp_path):
    proc = subprocess.run([sys.executable, "-c", WRITER_SCRIPT, str(tmp_path / "w.db")],
                          cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout)
    assert out["absent"] == []
    # SQLite's storage classes for what we write (sqlite.org, "Datatypes In SQLite").
    assert out["types"] == ["text", "real", "integer", "integer"]
    assert out["sample"] == ["real", "integer"]
    assert out["map"] == {"float": "REAL", "int": "INTEGER", "str": "TEXT"}


# ------------------------------------------------------------------ failing children

def _fake_python(tmp_path: Path, body: str) -> str:
    path = tmp_path / "python"
    path.write_text("#!/bin/sh\n" + body + "\n")
    path.chmod(0o755)
    return str(path)


@pytest.fixture
def cfg():
    return load_config(CONFIG)


def test_a_child_that_crashes_is_a_failure_with_its_last_words(cfg, tmp_path, caplog):
    python = _fake_python(tmp_path, "cat >/dev/null; echo 'MemoryError: the board ran out' "
                          ">&2; exit 3")
    jobs = ChildJobs(cfg, str(tmp_path / "s.db"), python=python)
    with pytest.raises(ChildFailed, match="exited with status 3.*the board ran out"):
        jobs.fit(DAY, "am", datetime(2027, 2, 15, 20, tzinfo=UTC))
    assert "child: MemoryError: the board ran out" in caplog.text  # relayed to the journal


def test_a_child_that_hangs_is_killed_at_its_bound(cfg, tmp_path):
    python = _fake_python(tmp_path, "exec sleep 30")
    jobs = ChildJobs(cfg, str(tmp_path / "s.db"), python=python, plan_timeout_s=0.5)
    t0 = time.monotonic()
    with pytest.raises(ChildFailed, match="did not finish within 0.5 s and was killed"):
        jobs.plan(DAY, datetime(2027, 2, 15, 6, tzinfo=UTC))
    assert time.monotonic() - t0 < 10  # a bound on the kill, not a timing of the work


def test_cancel_kills_the_child_in_progress(cfg, tmp_path):
    python = _fake_python(tmp_path, "exec sleep 30")
    jobs = ChildJobs(cfg, str(tmp_path / "s.db"), python=python)
    threading.Timer(0.3, jobs.cancel).start()
    t0 = time.monotonic()
    with pytest.raises(ChildFailed, match="cancelled, the service is stopping"):
        jobs.fit(DAY, "pm", datetime(2027, 2, 15, 23, tzinfo=UTC))
    assert time.monotonic() - t0 < 10  # killed, not waited for (the child sleeps 30 s)
    with pytest.raises(ChildFailed, match="stopping"):
        jobs.fit(DAY, "pm", datetime(2027, 2, 15, 23, tzinfo=UTC))


def test_a_child_that_prints_no_answer_is_a_failure(cfg, tmp_path):
    python = _fake_python(tmp_path, "cat >/dev/null; echo 'not json'")
    jobs = ChildJobs(cfg, str(tmp_path / "s.db"), python=python)
    with pytest.raises(ChildFailed, match="printed no answer"):
        jobs.sun_table(datetime(2027, 2, 15, 18, tzinfo=UTC))


class _Children:
    """Children that plan for another configuration, or fail, as asked."""

    def __init__(self, cfg, store, fail_first: int = 0, other_hash: bool = False):
        self.cfg, self.store = cfg, store
        self.fail_first, self.other_hash, self.calls = fail_first, other_hash, 0

    def plan(self, day, now):
        from daemon.station.jobs import plan_and_store

        self.calls += 1
        if self.calls <= self.fail_first:
            raise ChildFailed(f"planning {day}: the child was killed by signal 9 (oom)")
        out = plan_and_store(self.cfg, self.store, day, now)
        if self.other_hash:
            out["config_sha256"] = "f" * 64
        return out

    def fit(self, day, session, now):
        raise ChildFailed(f"fitting {day} {session}: the child exited with status 1")

    def sun_table(self, when):
        raise ChildFailed("no fallback in this test")

    def cancel(self):
        pass


def _service(cfg, tmp_path, children, start):
    store = Store.open(tmp_path / "s.db")
    svc = Service(cfg, store, FakeRadiometer(), FakeTracker(), clock=SimClock(start),
                  scheduler=BackgroundScheduler(timezone=UTC),
                  children=children(cfg, store))
    svc.scheduler.start(paused=True)
    return svc


def _events(svc, kind):
    return [m for (m,) in svc.station.store.conn.execute(
        "SELECT message FROM events WHERE kind = ? ORDER BY id", (kind,))]


def test_a_failed_plan_child_is_an_event_and_is_tried_again(cfg, tmp_path):
    svc = _service(cfg, tmp_path, lambda c, s: _Children(c, s, fail_first=1),
                   datetime(2027, 2, 15, 6, tzinfo=UTC))
    svc.plan_next(DAY)
    assert "killed by signal 9" in _events(svc, "job_error")[0]
    assert [j.id for j in svc.scheduler.get_jobs()] == ["plan-next-retry-2027-02-15"]
    retry = svc.scheduler.get_job("plan-next-retry-2027-02-15")
    svc.clock.sleep_until(retry.next_run_time)
    retry.func(*retry.args)
    assert len(_events(svc, "plan")) == 1


def test_a_plan_for_another_configuration_is_not_used(cfg, tmp_path):
    svc = _service(cfg, tmp_path, lambda c, s: _Children(c, s, other_hash=True),
                   datetime(2027, 2, 15, 6, tzinfo=UTC))
    svc.plan_next(DAY)
    assert "another configuration" in _events(svc, "job_error")[0]
    assert not [j for j in svc.scheduler.get_jobs() if j.id.startswith("plan-2027")]


def _failed_morning_fit(cfg, tmp_path):
    """A service whose fit children always fail, just after the morning fit failed once."""
    from daemon.station.planner import plan_day

    plan = plan_day(cfg, DAY)
    fit_am = next(e for e in plan.events if e.kind == "fit_am")
    svc = _service(cfg, tmp_path, _Children, fit_am.time_utc - timedelta(seconds=1))
    svc.schedule_day(DAY)
    svc.clock.sleep_until(fit_am.time_utc)
    svc.run_item(fit_am, DAY)
    return svc, fit_am


def test_a_failed_fit_child_is_an_event_and_the_fit_is_tried_again(cfg, tmp_path):
    from daemon.station.service import RETRY_S

    svc, fit_am = _failed_morning_fit(cfg, tmp_path)
    failed = _events(svc, "job_error")
    assert len(failed) == 1 and "exited with status 1" in failed[0]
    retry = svc.scheduler.get_job(f"retry-{DAY}-fit_am")
    assert retry.next_run_time == fit_am.time_utc + timedelta(seconds=RETRY_S)


def test_a_fit_child_that_keeps_failing_is_tried_less_and_less_often(cfg, tmp_path):
    """Never given up, but backed off: RETRY_S, then doubled each time up to
    FIT_RETRY_MAX_S (common practice for retries, no source), so a fault in the science
    leaves a few events a day, not one every five minutes."""
    from daemon.station.service import FIT_RETRY_MAX_S, RETRY_S

    svc, _ = _failed_morning_fit(cfg, tmp_path)
    delays = []
    for _ in range(9):
        retry = svc.scheduler.get_job(f"retry-{DAY}-fit_am")
        delays.append((retry.next_run_time - svc.clock.now()).total_seconds())
        svc.clock.sleep_until(retry.next_run_time)
        retry.func(*retry.args)
    expected = [min(RETRY_S * 2 ** k, FIT_RETRY_MAX_S) for k in range(9)]
    assert delays == pytest.approx(expected, abs=1.0)
    assert delays[-1] == pytest.approx(FIT_RETRY_MAX_S, abs=1.0)
    assert len(_events(svc, "job_error")) == 10  # every failure is still an event
