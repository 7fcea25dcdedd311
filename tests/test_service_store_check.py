"""Start-up bounded by the work: the service opens the store with the header and schema
checks only, reaches READY, and runs the full integrity check afterwards beside
acquisition; its outcome is an event that ``status`` reports."""

from __future__ import annotations

import datetime as dt
import hashlib
import sqlite3
import threading
from datetime import UTC, datetime

import numpy as np
import pytest
from apscheduler.schedulers.background import BackgroundScheduler

from daemon.commands.status import format_status, station_status
from daemon.config.settings import load_config
from daemon.station import service as service_mod
from daemon.station.clock import SimClock
from daemon.station.service import Service
from daemon.store.reader import latest_event
from daemon.store.writer import Store, StoreError, integrity_problems
from tests.fakes import FakeRadiometer, FakeTracker
from tests.test_service import CONFIG
from tests.test_store import make_record

PAGE = 4096  # SQLite's default page size (sqlite.org/pragma.html#pragma_page_size)


def _filled(path, n: int = 60):
    s = Store.open(path)
    for i in range(n):
        s.record_measurement(make_record(i))
    s.close()


def _damage_data_pages(path) -> None:
    """Overwrite two pages in the middle of the file: stored rows, not the schema on
    page 1 (sqlite.org/fileformat2.html, 'The Database Header' and 'Storage Of The SQL
    Database Schema')."""
    data = bytearray(path.read_bytes())
    n_pages = len(data) // PAGE
    assert n_pages > 20
    k = n_pages // 2
    data[k * PAGE:(k + 2) * PAGE] = np.random.default_rng(3).bytes(2 * PAGE)
    path.write_bytes(bytes(data))


def _sha(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _service(store: Store, start: datetime) -> Service:
    cfg = load_config(CONFIG)
    return Service(cfg, store, FakeRadiometer(), FakeTracker(), clock=SimClock(start),
                   scheduler=BackgroundScheduler(timezone=UTC))


def _events(store: Store, kind: str) -> list[tuple[str, str]]:
    return store.conn.execute("SELECT level, message FROM events WHERE kind = ? ORDER BY id",
                              (kind,)).fetchall()


def test_a_sound_store_passes_the_check(tmp_path):
    db = tmp_path / "s.db"
    _filled(db)
    # PRAGMA quick_check answers the single row 'ok' for a sound database
    # (sqlite.org/pragma.html#pragma_quick_check): no complaints.
    assert integrity_problems(db) == []


def test_damaged_rows_open_without_the_full_check_and_fail_it_later(tmp_path):
    db = tmp_path / "s.db"
    _filled(db)
    _damage_data_pages(db)
    before = _sha(db)
    with pytest.raises(StoreError, match="damaged|integrity"):
        Store.open(db)  # the full check (the default) still refuses it
    assert _sha(db) == before
    # The schema is intact, so the bounded open succeeds...
    store = Store.open(db, full_check=False)
    try:
        # ...and the full check finds the damage (quick_check reports b-tree and
        # record-format problems: sqlite.org/pragma.html#pragma_quick_check).
        problems = integrity_problems(db)
        assert problems and all(p != "ok" for p in problems)
    finally:
        store.close()


def test_the_service_reports_a_failed_check_as_an_event_and_in_status(tmp_path):
    db = tmp_path / "s.db"
    _filled(db)
    _damage_data_pages(db)
    store = Store.open(db, full_check=False)
    now = datetime(2027, 2, 15, 3, 0, tzinfo=UTC)
    svc = _service(store, now)
    try:
        svc.start_store_check().join(timeout=60)
        [(level, message)] = _events(store, "store_check")
        assert level == "error" and "failed" in message and ".recover" in message
    finally:
        store.close()
    st = station_status(db, now)
    assert st["store"]["check"]["ok"] is False
    assert any("store integrity check failed" in p for p in st["problems"])
    assert "store check" in format_status(st, now)


def test_the_service_reports_a_passed_check(tmp_path):
    db = tmp_path / "s.db"
    _filled(db)
    store = Store.open(db, full_check=False)
    now = datetime(2027, 2, 15, 3, 0, tzinfo=UTC)
    svc = _service(store, now)
    try:
        svc.check_store()
        [(level, message)] = _events(store, "store_check")
        assert level == "info" and message.startswith("store integrity check passed")
    finally:
        store.close()
    st = station_status(db, now + dt.timedelta(minutes=1))
    assert st["store"]["check"]["ok"] is True
    assert not any("integrity" in p for p in st["problems"])


def test_the_check_is_scheduled_after_ready_and_daily(tmp_path, monkeypatch):
    notes: list[str] = []
    store = Store.open(tmp_path / "s.db", full_check=False)
    svc = _service(store, datetime(2027, 2, 15, 3, 0, tzinfo=UTC))
    monkeypatch.setattr(service_mod, "sd_notify",
                        lambda m: notes.append(m if m == "READY=1" else "other"))
    monkeypatch.setattr(svc.scheduler, "add_job", _recording(svc.scheduler.add_job, notes))
    svc.station.stopping.set()  # run() goes through start-up and straight to its stop path
    try:
        svc.run()
    finally:
        store.close()
    assert "READY=1" in notes and "job store-check" in notes
    assert notes.index("READY=1") < notes.index("job store-check")
    job = svc.scheduler.get_job("store-check")
    assert job.trigger.interval == dt.timedelta(hours=service_mod.STORE_CHECK_EVERY_H)


def _recording(add_job, notes):
    def wrapped(*args, **kwargs):
        notes.append(f"job {kwargs.get('id')}")
        return add_job(*args, **kwargs)
    return wrapped


def test_a_stop_cancels_the_check_without_a_verdict(tmp_path):
    db = tmp_path / "s.db"
    _filled(db, 200)
    cancel = threading.Event()
    cancel.set()
    # A progress handler that returns non-zero interrupts the statement
    # (sqlite.org/c3ref/progress_handler.html; Python's sqlite3 set_progress_handler).
    with pytest.raises(StoreError, match="interrupted"):
        integrity_problems(db, cancel=cancel)
    store = Store.open(db, full_check=False)
    svc = _service(store, datetime(2027, 2, 15, 3, 0, tzinfo=UTC))
    try:
        svc.station.stopping.set()
        svc.check_store()
        assert _events(store, "store_check") == []
    finally:
        store.close()


def test_a_schema_upgrade_asks_systemd_for_more_time(tmp_path, monkeypatch):
    import daemon.store.writer as writer

    sent: list[str] = []
    monkeypatch.setattr(service_mod, "sd_notify", sent.append)
    db = tmp_path / "s.db"
    Store.open(db, full_check=False, on_migrate=service_mod._migrating).close()  # new store
    assert sent == [f"EXTEND_TIMEOUT_USEC={service_mod.MIGRATION_WAIT_S * 1_000_000}"]
    sent.clear()
    Store.open(db, full_check=False, on_migrate=service_mod._migrating).close()
    assert sent == []  # up to date: nothing to wait for
    seen: list[list[str]] = []
    conn = sqlite3.connect(db)
    # m004 only creates indexes IF NOT EXISTS, so it can run a second time.
    redo = "m004_indexes_by_date"
    assert redo in writer.KNOWN_MIGRATIONS
    conn.execute("DELETE FROM _sqlite_migrations WHERE name = ?", (redo,))
    conn.commit()
    conn.close()
    Store.open(db, full_check=False, on_migrate=seen.append).close()
    assert seen == [[redo]]


def test_status_reaches_the_check_event_through_the_time_index(tmp_path):
    # EXPLAIN QUERY PLAN says SEARCH ... USING INDEX for an index search and SCAN for a
    # full pass (sqlite.org/eqp.html): the lookup must not grow with the store's age.
    db = tmp_path / "s.db"
    Store.open(db).close()
    conn = sqlite3.connect(db)
    try:
        sent: list[str] = []
        conn.set_trace_callback(sent.append)  # the statement latest_event runs, bound
        latest_event(conn, "store_check", "2027-01-01T00:00:00+00:00")
        conn.set_trace_callback(None)
        [sql] = [q for q in sent if "FROM events" in q]
        plan = " ".join(r[3] for r in conn.execute("EXPLAIN QUERY PLAN " + sql))
    finally:
        conn.close()
    assert "USING INDEX" in plan and "SCAN events" not in plan, plan
