"""The service outlives what a harsh season does to it: a store that refuses writes
(a full disk, a read-only file system) at plan or fit time, a dead link at stop, and
a device that answers a well-framed reply with a hostile field."""

from __future__ import annotations

import errno
import json
import sqlite3
from datetime import UTC, date, datetime, timedelta

import pytest
from apscheduler.schedulers.background import BackgroundScheduler

from daemon.commands import cli
from daemon.config.settings import load_config
from daemon.station.clock import SimClock
from daemon.station.planner import plan_day
from daemon.station.service import RETRY_S, Service, release_devices
from daemon.store.reader import StoreError
from daemon.store.writer import Store
from drivers import protocol as p
from drivers.interfaces import Identity
from drivers.reference import SerialRadiometer, SerialTracker
from drivers.transport import LinkShutDown, ScriptedPort, Transport
from tests.fakes import FakeRadiometer, FakeTracker
from tests.test_probe import CONFIG, codec_device, line_device

DAY = date(2027, 2, 15)
# The three ways SQLite and the store refuse a write (sqlite3 error texts as SQLite
# words them, from memory; StoreError is ours).
REFUSALS = [
    sqlite3.OperationalError("database or disk is full"),
    sqlite3.OperationalError("attempt to write a readonly database"),
    StoreError("the store is read-only: remount the data partition read-write"),
]


@pytest.fixture
def cfg():
    return load_config(CONFIG)


def _service(cfg, tmp_path, start: datetime, radiometer=None, tracker=None) -> Service:
    svc = Service(cfg, Store.open(tmp_path / "s.db"), radiometer or FakeRadiometer(),
                  tracker or FakeTracker(), clock=SimClock(start),
                  scheduler=BackgroundScheduler(timezone=UTC))
    # Started but paused: jobs get their run times and stay put; _run_jobs plays them
    # in order on the simulated clock, as the one worker thread would.
    svc.scheduler.start(paused=True)
    return svc


def _run_jobs(svc: Service, until: datetime) -> int:
    """Run every job due up to ``until`` in time order, moving the simulated clock;
    the number run."""
    ran = 0
    while True:
        due = [j for j in svc.scheduler.get_jobs()
               if j.id != "tick" and j.next_run_time <= until]
        if not due:
            return ran
        job = min(due, key=lambda j: j.next_run_time)
        job.remove()  # before running: a retry may re-add a job of the same id
        if job.next_run_time > svc.clock.now():
            svc.clock.sleep_until(job.next_run_time)
        job.func(*job.args, **job.kwargs)
        ran += 1


def _events(svc: Service, kind: str) -> list[str]:
    rows = svc.station.store.conn.execute(
        "select message from events where kind = ? order by id", (kind,)).fetchall()
    return [r[0] for r in rows]


def _failing(real, error: Exception, times: int) -> tuple[dict, object]:
    left = {"n": times}

    def write(*args, **kwargs):
        if left["n"]:
            left["n"] -= 1
            raise error
        return real(*args, **kwargs)
    return left, write


# ------------------------------------------------------------------ a refused write

@pytest.mark.parametrize("error", REFUSALS, ids=["disk-full", "read-only", "store-error"])
def test_a_refused_plan_write_is_retried_and_the_next_day_is_measured(
        cfg, tmp_path, monkeypatch, caplog, error):
    today, tomorrow = plan_day(cfg, DAY), plan_day(cfg, DAY + timedelta(days=1))
    evening = max(e.time_utc for e in today.events if e.kind in ("park", "replan"))
    svc = _service(cfg, tmp_path, evening - timedelta(minutes=1))
    svc.schedule_day(DAY)
    store = svc.station.store
    left, write = _failing(store.save_plan, error, 3)
    monkeypatch.setattr(store, "save_plan", write)  # the disk fills at plan time

    _run_jobs(svc, tomorrow.targets[-1].time_utc + timedelta(minutes=1))

    assert left["n"] == 0, "the plan write was not tried again"
    refused = [m for m in _events(svc, "store_error") if "plan for 2027-02-16" in m]
    assert len(refused) == 3 and "not stored" in caplog.text
    row = store.conn.execute("select created_utc from plans where plan_date = ?",
                             ("2027-02-16",)).fetchone()
    assert row is not None, "the plan was never stored once space came back"
    # tried every RETRY_S, so stored well before the first target of the day
    assert datetime.fromisoformat(row[0]) < tomorrow.targets[0].time_utc
    ok = store.conn.execute("select count(*) from measurements where plan_date = ? and "
                            "status = 'ok'", ("2027-02-16",)).fetchone()[0]
    assert ok == len(tomorrow.targets)
    assert any(j.id.startswith("plan-next-2027-02-16") for j in svc.scheduler.get_jobs())


def test_a_refused_fit_write_is_retried_until_the_results_are_stored(
        cfg, tmp_path, monkeypatch):
    plan = plan_day(cfg, DAY)
    fit_am = next(e for e in plan.events if e.kind == "fit_am")
    svc = _service(cfg, tmp_path, plan.targets[0].time_utc - timedelta(minutes=1))
    svc.schedule_day(DAY)
    store = svc.station.store
    left, write = _failing(store.save_session_results,
                           sqlite3.OperationalError("database or disk is full"), 2)
    monkeypatch.setattr(store, "save_session_results", write)

    _run_jobs(svc, fit_am.time_utc + timedelta(seconds=3 * RETRY_S))

    assert left["n"] == 0
    assert len([m for m in _events(svc, "store_error") if "fit_am" in m]) == 2
    n = store.conn.execute("select count(*) from session_results where plan_date = ? "
                           "and session = 'am'", (DAY.isoformat(),)).fetchone()[0]
    assert n == len(cfg.channels)
    assert len(_events(svc, "session_fit")) == 1


def test_a_day_that_cannot_be_planned_is_planned_again_later(cfg, tmp_path, monkeypatch):
    import daemon.station.planner as planner
    real = planner.plan_day
    calls = {"n": 0}

    def broken(config, day):
        calls["n"] += 1
        if calls["n"] == 1:
            raise RuntimeError("ephemeris out of range")
        return real(config, day)

    monkeypatch.setattr(planner, "plan_day", broken)
    svc = _service(cfg, tmp_path, datetime(2027, 2, 15, 6, tzinfo=UTC))
    svc.plan_next(DAY)
    assert "planning 2027-02-15 failed" in _events(svc, "job_error")[0]
    assert [j.id for j in svc.scheduler.get_jobs()] == ["plan-next-retry-2027-02-15"]
    _run_jobs(svc, svc.clock.now() + timedelta(seconds=RETRY_S))
    assert len(_events(svc, "plan")) == 1


def test_a_tick_with_no_next_day_ahead_says_so(cfg, tmp_path, caplog):
    svc = _service(cfg, tmp_path, datetime(2027, 2, 15, 6, tzinfo=UTC))
    svc.schedule_day(DAY)
    svc.tick()
    assert "no job ahead" not in caplog.text
    for job in svc.scheduler.get_jobs():
        if job.id.startswith("plan-next"):
            job.remove()  # as if the job that plans tomorrow were lost
    svc.tick()
    assert "no job ahead" in caplog.text


def test_a_tick_while_the_service_stops_raises_no_alarm(cfg, tmp_path, caplog):
    """Seen in the start-up benchmark: a SIGTERM just after READY shuts the scheduler
    down while the first tick runs, and a stopped APScheduler 3 scheduler lists none of
    its jobs (BaseScheduler.get_jobs), which read as "no job ahead"."""
    svc = _service(cfg, tmp_path, datetime(2027, 2, 15, 6, tzinfo=UTC))
    svc.schedule_day(DAY)  # the helper started the scheduler (paused)
    svc.stop()
    assert not [j for j in svc.scheduler.get_jobs() if j.id.startswith("plan-next")]
    svc.tick()
    assert "no job ahead" not in caplog.text


# ------------------------------------------------------------------ the stop path

def _dead_tracker(opens: list, sleeps: list) -> SerialTracker:
    def vanished(url, **kwargs):
        opens.append(url)
        raise OSError(errno.ENOENT, "No such file or directory", url)
    return SerialTracker(Transport("/dev/serial/by-id/usb-gone", timeout_s=0.5, retries=3,
                                   name="tracker", serial_factory=vanished,
                                   sleep=sleeps.append))


def test_stop_with_a_dead_tracker_link_parks_once_without_back_off(cfg, tmp_path):
    opens: list[str] = []
    sleeps: list[float] = []
    svc = _service(cfg, tmp_path, datetime(2027, 2, 15, 12, tzinfo=UTC),
                   tracker=_dead_tracker(opens, sleeps))
    svc.stop()
    svc.finish()
    assert len(opens) == 1, "park was tried more than once (or not at all)"
    assert sleeps == [], "the stop path waited out a back-off"
    assert any("parking at stop failed" in m for m in _events(svc, "device_fault"))
    assert _events(svc, "stop") == ["service stopped"]


def test_release_shuts_both_links_for_good(cfg):
    opens: list[str] = []
    tracker = _dead_tracker(opens, [])
    port = ScriptedPort([])
    radiometer = SerialRadiometer(Transport("scripted://", timeout_s=0.3, retries=0,
                                            serial_factory=lambda url, **kw: port))
    release_devices(radiometer, tracker)
    # after shutdown no exchange touches a port again
    with pytest.raises(LinkShutDown):
        tracker.park()
    with pytest.raises(LinkShutDown):
        radiometer.identify()
    assert opens == [] and port.written == []


# ------------------------------------------------------------------ a hostile device

def _hostile_radiometer() -> SerialRadiometer:
    # A well-framed ID reply (its checksum is right) whose channel count has 5,000 digits.
    hostile = p._seal(f"#1 OK ID RAD HOSTILE H-1 6.6 {'9' * 5000}")
    port = ScriptedPort([(p.encode_request(1, p.ID), hostile)])
    return SerialRadiometer(Transport("scripted://", timeout_s=0.3, retries=0, first_rid=1,
                                      serial_factory=lambda url, **kw: port))


class _UnhardenedRadiometer(FakeRadiometer):
    """A driver of another make that hands a hostile field straight to int()."""

    def __init__(self) -> None:
        super().__init__()
        self.asked = 0

    def identify(self) -> Identity:
        self.asked += 1
        if self.asked == 1:
            int("9" * 5000)  # ValueError: over Python's 4,300-digit limit for int()
        return super().identify()


@pytest.mark.parametrize("make", [_hostile_radiometer, _UnhardenedRadiometer],
                         ids=["frame-error", "value-error"])
def test_a_hostile_device_at_start_up_is_one_that_did_not_answer(cfg, tmp_path, make):
    svc = _service(cfg, tmp_path, datetime(2027, 2, 15, 6, tzinfo=UTC), radiometer=make())
    svc.identify_devices()  # must not raise
    faults = _events(svc, "device_fault")
    assert len(faults) == 1 and faults[0].startswith("radiometer does not answer")
    retry = [j for j in svc.scheduler.get_jobs() if j.id == "identify"]
    assert retry and retry[0].args == (("radiometer",),)
    assert _events(svc, "device") == ["tracker: FAKE-T serial 0002 firmware 1.0"]


def test_a_device_that_answers_later_is_identified_by_the_retry(cfg, tmp_path):
    svc = _service(cfg, tmp_path, datetime(2027, 2, 15, 6, tzinfo=UTC),
                   radiometer=_UnhardenedRadiometer())
    svc.identify_devices()
    _run_jobs(svc, svc.clock.now() + timedelta(seconds=RETRY_S))
    assert _events(svc, "device")[-1] == "radiometer: FAKE-R serial 0001 firmware 1.0"
    assert not [j for j in svc.scheduler.get_jobs() if j.id == "identify"]


def _probe(capsys, url: str) -> tuple[int, dict, str]:
    code = cli.main(["probe", "--config", str(CONFIG), "--radiometer-port", url,
                     "--tracker-port", "/dev/does-not-exist", "--json"])
    captured = capsys.readouterr()
    return code, json.loads(captured.out), captured.err


def test_probe_of_a_device_with_a_hostile_field_exits_69(capsys):
    def answer(line: bytes) -> bytes:
        req = p.decode_request(line)
        return p._seal(f"#{req.rid} OK ID RAD HOSTILE H-1 6.6 {'9' * 5000}")
    with line_device(answer) as url:
        code, report, err = _probe(capsys, url)
    assert code == 69 and "Traceback" not in err
    first = report["checks"][0]
    assert not first["ok"] and first["message"].startswith("radiometer:")


def test_probe_turns_a_value_error_from_the_driver_into_exit_69(capsys, monkeypatch):
    # Stands in for a parser that trusts the field: int() of 6,000 digits raises
    # ValueError (Python's limit for int() of a string is 4,300 digits).
    def trusting(fields):
        return fields[0], Identity(*fields[1:4]), int(fields[4] * 100)
    monkeypatch.setattr(p, "parse_identity", trusting)
    handlers = {p.ID: lambda req: [p.KIND_RADIOMETER, "HOSTILE", "H-1", "6.6", "9" * 60]}
    with line_device(codec_device(handlers)) as url:
        code, report, err = _probe(capsys, url)
    assert code == 69 and "Traceback" not in err
    first = report["checks"][0]
    assert first["problem"] == "bad_reply"
    assert "makes no sense (ValueError" in first["message"]
