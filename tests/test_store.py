"""The SQLite store: round trip, atomicity, WAL readers, damaged files, read-only API."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
import os
import sqlite3
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

import daemon.store.writer as store_mod
from daemon.store import reader as storeread
from daemon.store.writer import MeasurementRecord, Store, StoreError
from drivers.interfaces import Housekeeping

UTC = dt.UTC
T0 = dt.datetime(2025, 3, 21, 13, 30, tzinfo=UTC)
CHANNELS = ("380", "440", "500", "675", "870", "1020")
HK = Housekeeping(detector_temp_c=24.5, case_temp_c=21.0, ambient_temp_c=4.0, supply_v=12.3,
                  humidity_pct=18.0, pressure_hpa=648.2)
TABLES = ("measurements", "measurement_channels", "samples", "housekeeping")


def make_record(i: int = 0, *, session: str = "pm", status: str = "ok", seed: int = 0,
                n_sun: int = 10, n_dark: int = 5, **changes) -> MeasurementRecord:
    rng = np.random.default_rng(seed + i)
    base = np.linspace(0.8, 2.4, len(CHANNELS))
    sun = base * (1 + rng.normal(0, 1e-3, (n_sun, len(CHANNELS))))
    dark = 0.004 + rng.normal(0, 1e-4, (n_dark, len(CHANNELS)))
    rec = MeasurementRecord(
        time_utc=T0 + dt.timedelta(minutes=7 * i), plan_date="2025-03-21", session=session,
        target_airmass=2.0 + 0.25 * i, status=status,
        failure=None if status == "ok" else "sun lock lost during the burst",
        apparent_zenith_deg=60.0 + i, azimuth_deg=250.0 + i, airmass=2.0 + 0.25 * i,
        ozone_airmass=1.98 + 0.25 * i, earth_sun_factor=1.0035, pressure_hpa=648.2,
        pointing_error_deg=0.02, locked=True, duration_s=1.2, channels=CHANNELS,
        sun=tuple(map(tuple, sun.tolist())), dark=tuple(map(tuple, dark.tolist())),
        saturated=(False,) * len(CHANNELS), housekeeping=HK)
    return replace(rec, **changes)


def count(conn: sqlite3.Connection, table: str) -> int:
    return conn.execute(f"SELECT count(*) FROM {table}").fetchone()[0]


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def db_path(tmp_path: Path) -> Path:
    return tmp_path / "var" / "lib" / "heliotrope" / "heliotrope.db"


@pytest.fixture
def store(db_path: Path):
    s = Store.open(db_path)
    yield s
    s.close()


# --------------------------------------------------------------------------- opening

def test_open_creates_dirs_and_sets_the_pragmas(store, db_path):
    assert db_path.is_file()
    conn = store.conn
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert conn.execute("PRAGMA foreign_keys").fetchone()[0] == 1
    assert conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL
    assert conn.execute("PRAGMA busy_timeout").fetchone()[0] >= 1000
    names = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    assert {"measurements", "samples", "housekeeping", "events", "plans", "session_results",
            "meta", "measurement_channels", "fit_points", "_sqlite_migrations"} <= names


def test_reopening_applies_no_migration_twice(db_path):
    Store.open(db_path).close()
    s = Store.open(db_path)
    try:
        rows = s.conn.execute("SELECT name FROM _sqlite_migrations "
                              "WHERE migration_set = 'heliotrope'").fetchall()
        assert [r[0] for r in rows] == sorted(store_mod.KNOWN_MIGRATIONS)
    finally:
        s.close()


def test_a_store_from_a_newer_version_is_refused(db_path):
    s = Store.open(db_path)
    s.conn.execute("INSERT INTO _sqlite_migrations (migration_set, name, applied_at) "
                   "VALUES ('heliotrope', 'm999_future', '2030-01-01')")
    s.conn.commit()
    s.close()
    with pytest.raises(StoreError, match="newer heliotrope"):
        Store.open(db_path)


def test_random_bytes_are_refused_and_left_untouched(tmp_path):
    p = tmp_path / "not-a-store.db"
    p.write_bytes(np.random.default_rng(7).bytes(64 * 1024))
    before = sha256(p)
    with pytest.raises(StoreError, match="not an SQLite database.*left untouched"):
        Store.open(p)
    assert sha256(p) == before
    assert sorted(os.listdir(tmp_path)) == ["not-a-store.db"]  # no -wal, -shm or journal


def test_a_damaged_sqlite_file_is_refused_and_left_untouched(tmp_path):
    p = tmp_path / "damaged.db"
    s = Store.open(p)
    for i in range(40):
        s.record_measurement(make_record(i))
    s.close()
    data = bytearray(p.read_bytes())
    page = 4096
    assert len(data) > 6 * page
    data[3 * page:5 * page] = np.random.default_rng(1).bytes(2 * page)
    p.write_bytes(bytes(data))
    before = sha256(p)
    with pytest.raises(StoreError, match="damaged|integrity"):
        Store.open(p)
    assert sha256(p) == before


def test_a_directory_is_not_a_store(tmp_path):
    with pytest.raises(StoreError, match="directory"):
        Store.open(tmp_path)


# --------------------------------------------------------------------------- round trip

def test_measurement_round_trip_with_sql_aggregates(store):
    recs = [make_record(i) for i in range(3)]
    ids = [store.record_measurement(r) for r in recs]
    assert ids == sorted(ids) and len(set(ids)) == 3
    assert count(store.conn, "samples") == 3 * (10 + 5) * len(CHANNELS)

    points = store.session_points("2025-03-21", "pm")
    assert [p.measurement_id for p in points] == ids
    for rec, p in zip(recs, points, strict=True):
        assert p.time_utc == rec.time_utc and p.time_utc.tzinfo is not None
        assert p.airmass == rec.airmass and p.earth_sun_factor == rec.earth_sun_factor
        assert p.locked is True and p.housekeeping == HK
        sun = np.asarray(rec.sun)
        dark = np.asarray(rec.dark)
        for c, name in enumerate(CHANNELS):
            st = p.channels[name]
            # Reference: numpy mean and sample standard deviation (ddof=1).
            assert st.sun_mean_v == pytest.approx(sun[:, c].mean(), rel=1e-12)
            assert st.sun_sd_v == pytest.approx(sun[:, c].std(ddof=1), rel=1e-9)
            assert st.dark_mean_v == pytest.approx(dark[:, c].mean(), rel=1e-12)
            assert (st.n_sun, st.n_dark, st.saturated) == (10, 5, False)


def test_raw_samples_are_kept_exactly(store):
    rec = make_record(0)
    mid = store.record_measurement(rec)
    rows = store.conn.execute(
        "SELECT sample_index, channel, value_v FROM samples WHERE measurement_id = ? AND "
        "kind = 'sun'", (mid,)).fetchall()
    back = {(i, ch): v for i, ch, v in rows}
    for i, sample in enumerate(rec.sun):
        for ch, v in zip(CHANNELS, sample, strict=True):
            assert back[(i, ch)] == v  # bit for bit: results can be re-derived


def test_standard_deviation_survives_a_large_offset(store):
    # 5 V with 1e-7 V noise: a one-pass sum-of-squares variance would lose it to
    # rounding; the two-pass SQL must not. Reference: numpy std(ddof=1).
    rng = np.random.default_rng(5)
    sun = 5.0 + rng.normal(0.0, 1e-7, (10, len(CHANNELS)))
    store.record_measurement(make_record(0, sun=tuple(map(tuple, sun.tolist()))))
    st = store.session_points("2025-03-21", "pm")[0].channels["500"]
    assert st.sun_sd_v == pytest.approx(sun[:, 2].std(ddof=1), rel=1e-4)


def test_session_points_keep_only_ok_measurements_of_that_session(store):
    store.record_measurement(make_record(0))
    store.record_measurement(make_record(1, status="failed"))
    store.record_measurement(make_record(2, session="am"))
    store.record_measurement(make_record(3, session="routine"))
    store.record_measurement(make_record(4, saturated=(False, False, True, False, False, False),
                                         housekeeping=None, dark=()))
    pm = store.session_points("2025-03-21", "pm")
    assert [p.target_airmass for p in pm] == [2.0, 3.0]
    last = pm[1]
    assert last.housekeeping is None
    assert last.channels["500"].saturated and not last.channels["440"].saturated
    assert last.channels["500"].dark_mean_v is None and last.channels["500"].n_dark == 0
    assert len(store.session_points("2025-03-21", "am")) == 1
    assert store.session_points("2025-03-22", "pm") == []


def test_a_failed_measurement_without_samples_is_stored(store):
    rec = make_record(0, status="failed", sun=(), dark=(), channels=(), saturated=(),
                      housekeeping=None, airmass=None, apparent_zenith_deg=math.nan)
    mid = store.record_measurement(rec)
    row = store.conn.execute("SELECT status, failure, airmass, apparent_zenith_deg, n_samples "
                             "FROM measurements WHERE id = ?", (mid,)).fetchone()
    assert row == ("failed", "sun lock lost during the burst", None, None, 0)


@pytest.mark.parametrize("changes, match", [
    ({"session": "noon"}, "session must be one of"),
    ({"status": "maybe"}, "status must be"),
    ({"status": "failed", "failure": None}, "failure text"),
    ({"plan_date": "21/03/2025"}, "YYYY-MM-DD"),
    ({"channels": ("a", "a", "b", "c", "d", "e")}, "repeat"),
    ({"saturated": (False,)}, "1 flags for 6 channels"),
    ({"sun": ()}, "at least one sun sample"),
    ({"time_utc": dt.datetime(2025, 3, 21, 13, 30)}, "naive datetime"),
])
def test_malformed_records_are_refused_with_a_message(store, changes, match):
    with pytest.raises(ValueError, match=match):
        store.record_measurement(make_record(0, **changes))
    assert all(count(store.conn, t) == 0 for t in TABLES)


# --------------------------------------------------------------------------- atomicity

def test_a_channel_count_mismatch_stores_nothing(store):
    good = make_record(0)
    bad_sun = good.sun[:-1] + (good.sun[-1][:-1],)  # last sample lost a channel
    with pytest.raises(ValueError, match="sun sample 9 has 5 values for 6 channels"):
        store.record_measurement(replace(good, sun=bad_sun))
    assert all(count(store.conn, t) == 0 for t in TABLES)


def test_a_failure_midway_through_the_samples_rolls_everything_back(store, monkeypatch):
    store.record_measurement(make_record(0))
    real = store_mod._sample_rows

    def failing_rows(mid, rec):
        for n, row in enumerate(real(mid, rec)):
            if n == 40:
                raise OSError("disk went away")
            yield row

    monkeypatch.setattr(store_mod, "_sample_rows", failing_rows)
    with pytest.raises(OSError, match="disk went away"):
        store.record_measurement(make_record(1))
    assert [count(store.conn, t) for t in TABLES] == [1, 6, 90, 1]
    monkeypatch.undo()
    store.record_measurement(make_record(2))  # the store is still usable
    assert count(store.conn, "measurements") == 2


def test_a_failure_in_the_housekeeping_rolls_everything_back(store):
    class BrokenHousekeeping:
        detector_temp_c = 20.0

        @property
        def case_temp_c(self):
            raise RuntimeError("housekeeping reply garbled")

    with pytest.raises(RuntimeError, match="garbled"):
        store.record_measurement(make_record(0, housekeeping=BrokenHousekeeping()))
    assert all(count(store.conn, t) == 0 for t in TABLES)


# --------------------------------------------------------------------------- events etc.

def test_naive_timestamps_are_rejected_everywhere(store):
    naive = dt.datetime(2025, 3, 21, 12, 0)
    with pytest.raises(ValueError, match="naive"):
        store.record_event(naive, "info", "start", "service started")
    with pytest.raises(ValueError, match="naive"):
        store.heartbeat(naive)
    with pytest.raises(ValueError, match="naive"):
        store.save_plan("2025-03-21", {"a": 1}, created_utc=naive)


def test_timestamps_are_stored_as_utc_with_offset(store):
    local = dt.datetime(2025, 3, 21, 7, 30, tzinfo=dt.timezone(dt.timedelta(hours=-6)))
    eid = store.record_event(local, "warning", "serial", "timeout on radiometer",
                             {"retries": 3, "ratio": math.nan, "when": local})
    row = store.conn.execute("SELECT time_utc, detail FROM events WHERE id = ?",
                             (eid,)).fetchone()
    assert row[0] == "2025-03-21T13:30:00.000000+00:00"
    assert json.loads(row[1]) == {"retries": 3, "ratio": None,
                                  "when": "2025-03-21T13:30:00.000000+00:00"}
    with pytest.raises(ValueError, match="event level"):
        store.record_event(T0, "loud", "x", "y")


def test_read_helpers_for_events_plans_and_heartbeat(store, db_path):
    store.record_event(T0, "info", "start", "service started")
    store.record_event(T0 + dt.timedelta(minutes=1), "error", "serial", "port vanished",
                       {"port": "/dev/ttyUSB0"})
    # Plans as the reader checks them: a date and a list of targets (empty here).
    first = {"date": "2025-03-21", "targets": [], "sunrise": T0}
    replan = {"date": "2025-03-21", "targets": [], "note": "re-plan"}
    store.save_plan("2025-03-21", first, created_utc=T0)
    store.save_plan("2025-03-21", replan, created_utc=T0)  # re-plan replaces
    store.heartbeat(T0 + dt.timedelta(minutes=2))
    store.record_measurement(make_record(0))
    conn = storeread.open_readonly(db_path)
    try:
        events = storeread.recent_events(conn, limit=5)
        assert [e["kind"] for e in events] == ["serial", "start"]
        assert events[0]["detail"] == {"port": "/dev/ttyUSB0"} and events[1]["detail"] is None
        earlier = {"date": "2025-03-20", "targets": []}
        store.save_plan("2025-03-20", earlier, created_utc=T0)
        assert storeread.stored_plan(conn, "2025-03-21") == replan
        assert storeread.stored_plan(conn) == replan  # the newest date
        assert storeread.stored_plan(conn, dt.date(2025, 3, 20)) == earlier
        assert storeread.stored_plan(conn, dt.date(2025, 3, 22)) is None
        assert storeread.last_heartbeat(conn) == T0 + dt.timedelta(minutes=2)
        day = storeread.day_measurements(conn, "2025-03-21")
        assert len(day) == 1 and day[0]["locked"] is True and day[0]["n_samples"] == 10
    finally:
        conn.close()


# --------------------------------------------------------------------------- results

def result_row(channel: str, wl: float, **changes) -> dict:
    row = {"channel": channel, "wavelength_nm": wl, "v0": 1.5, "v0_1au": 1.49,
           "v0_rel_unc": 0.002, "tau": 0.12, "n_used": 15, "n_total": 17,
           "airmass_min": 2.0, "airmass_max": 6.0, "accepted": True, "reasons": []}
    row.update(changes)
    return row


def test_the_shared_part_of_a_result_is_stored_and_read_back(store, db_path):
    # m009: the fit's shared part of V0's uncertainty, read back by (date, session,
    # channel) for the campaign; a row without one is left out (common practice, no
    # source: a round trip).
    store.save_session_results("2025-03-21", "am", [
        result_row("940", 940, v0_shared_rel_unc=0.0023), result_row("500", 500)],
        fitted_utc=T0)
    conn = storeread.open_readonly(db_path)
    try:
        assert storeread.shared_uncertainties(conn, "2025-03-20", "2025-03-22") == {
            ("2025-03-21", "am", "940"): 0.0023}
        assert storeread.shared_uncertainties(conn, "2025-03-22", "2025-03-22") == {}
    finally:
        conn.close()


def test_session_results_replace_on_refit_and_nan_becomes_null(store, db_path):
    store.save_session_results("2025-03-20", "am", [result_row("500", 500)], fitted_utc=T0)
    store.save_session_results("2025-03-21", "am", [result_row("870", 870),
                                                    result_row("500", 500)], fitted_utc=T0)
    store.save_session_results("2025-03-21", "pm", [result_row(
        "500", 500, v0=math.nan, v0_1au=math.nan, v0_rel_unc=math.nan, tau=math.nan,
        n_used=0, airmass_min=math.nan, airmass_max=math.nan, accepted=False,
        reasons=["no usable points of 17 in the air-mass window 2 to 6"])], fitted_utc=T0)
    # The re-fit of the morning replaces the 500 nm row, keeps the 870 nm row.
    store.save_session_results("2025-03-21", "am", [result_row("500", 500, v0=1.6)],
                               fitted_utc=T0 + dt.timedelta(hours=1))
    assert count(store.conn, "session_results") == 4
    assert store.conn.execute("SELECT v0 FROM session_results WHERE plan_date='2025-03-21' "
                              "AND session='pm'").fetchone()[0] is None

    conn = storeread.open_readonly(db_path)
    try:
        latest = storeread.latest_results(conn)
        assert [(r["session"], r["channel"]) for r in latest] == [
            ("am", "500"), ("am", "870"), ("pm", "500")]
        assert all(tuple(r) == storeread.RESULT_KEYS for r in latest)
        assert latest[0]["v0"] == 1.6 and latest[0]["accepted"] is True
        pm = latest[2]
        assert pm["v0"] is None and pm["accepted"] is False and pm["reasons"]
        json.dumps(latest, allow_nan=False)  # strict JSON: no NaN anywhere
        assert len(storeread.results_between(conn, "2025-03-20", "2025-03-21")) == 4
        assert [r["date"] for r in storeread.results_between(conn, "2025-03-20",
                                                             dt.date(2025, 3, 20))] == [
            "2025-03-20"]
        with pytest.raises(ValueError, match="YYYY-MM-DD"):
            storeread.results_between(conn, "yesterday", "2025-03-21")
        with pytest.raises(ValueError, match="before the start date"):
            storeread.results_between(conn, "2025-03-21", "2025-03-20")
    finally:
        conn.close()


def test_session_results_refuse_mismatched_rows(store):
    with pytest.raises(ValueError, match="saved under"):
        store.save_session_results("2025-03-21", "am",
                                   [result_row("500", 500, date="2025-03-20")], fitted_utc=T0)
    with pytest.raises(ValueError, match="'am' or 'pm'"):
        store.save_session_results("2025-03-21", "routine", [], fitted_utc=T0)


def test_fit_points_are_replaced_with_their_results_in_one_transaction(store, db_path):
    ids = [store.record_measurement(make_record(i, session="am")) for i in range(4)]
    pts = [{"measurement_id": ids[0], "x": 2.0, "y": 0.3, "role": "used", "reason": None},
           {"measurement_id": ids[1], "x": 2.25, "y": math.nan, "role": "rejected",
            "reason": None},
           {"measurement_id": ids[2], "x": 2.5, "y": 0.2, "role": "screened",
            "reason": "cloudy"}]
    store.save_session_results("2025-03-21", "am", [
        result_row("500", 500, fit_points=pts),
        result_row("870", 870, fit_points=pts[:1])], fitted_utc=T0)
    conn = storeread.open_readonly(db_path)
    try:
        got = storeread.fit_points(conn, "2025-03-21", "am", "500")
        assert [(g["measurement_id"], g["role"], g["reason"]) for g in got] == [
            (ids[0], "used", None), (ids[1], "rejected", None), (ids[2], "screened", "cloudy")]
        assert got[1]["y"] is None and got[0]["x"] == 2.0  # NaN is stored as NULL
        assert storeread.fit_points(conn, "2025-03-21", "pm", "500") == []

        # A re-fit of 500 nm replaces its points, even when it brings none; 870 stays.
        store.save_session_results("2025-03-21", "am", [result_row(
            "500", 500, fit_points=[dict(pts[0], role="outside")])], fitted_utc=T0)
        got = storeread.fit_points(conn, "2025-03-21", "am", "500")
        assert [(g["measurement_id"], g["role"]) for g in got] == [(ids[0], "outside")]
        store.save_session_results("2025-03-21", "am", [result_row("500", 500)],
                                   fitted_utc=T0)
        assert storeread.fit_points(conn, "2025-03-21", "am", "500") == []
        assert len(storeread.fit_points(conn, "2025-03-21", "am", "870")) == 1

        # A point of an unknown measurement fails the foreign key: the result row of
        # that save is not written either.
        bad = dict(pts[0], measurement_id=9999)
        with pytest.raises(sqlite3.IntegrityError):
            store.save_session_results("2025-03-21", "am", [result_row(
                "870", 870, v0=9.9, fit_points=[bad])], fitted_utc=T0)
        assert storeread.results_between(conn, "2025-03-21", "2025-03-21")[1]["v0"] == 1.5
        assert len(storeread.fit_points(conn, "2025-03-21", "am", "870")) == 1
    finally:
        conn.close()


def test_fit_points_refuse_bad_records(store):
    mid = store.record_measurement(make_record(0, session="am"))
    ok = {"measurement_id": mid, "x": 2.0, "y": 0.3, "role": "used", "reason": None}
    for change, message in (({"role": "kept"}, "has role 'kept'"),
                            ({"role": "screened"}, "screening key as its reason"),
                            ({"reason": "cloudy"}, "screening key as its reason"),
                            ({"measurement_id": None}, "no measurement_id")):
        with pytest.raises(ValueError, match=message):
            store.save_session_results("2025-03-21", "am", [result_row(
                "500", 500, fit_points=[dict(ok, **change)])], fitted_utc=T0)
    assert count(store.conn, "session_results") == 0


def test_fit_points_reader_on_a_store_without_the_table(store, db_path):
    # A store written before the fit_points migration: the reader says so with None,
    # and the writer adds the table when it next opens the store.
    store.conn.execute("DROP TABLE fit_points")
    store.conn.execute("DELETE FROM _sqlite_migrations WHERE name = 'm003_fit_points'")
    store.conn.commit()
    conn = storeread.open_readonly(db_path)
    try:
        assert storeread.fit_points(conn, "2025-03-21", "am", "500") is None
        Store.open(db_path).close()
        assert storeread.fit_points(conn, "2025-03-21", "am", "500") == []
    finally:
        conn.close()


def test_latest_results_of_an_empty_store(store, db_path):
    conn = storeread.open_readonly(db_path)
    try:
        assert storeread.latest_results(conn) == []
    finally:
        conn.close()


# --------------------------------------------------------------------------- readers

def test_reader_sees_committed_data_while_the_writer_is_open(store, db_path):
    store.record_measurement(make_record(0))
    reader = storeread.open_readonly(db_path)
    try:
        assert count(reader, "measurements") == 1
        # An open write transaction in the writer is invisible to the reader...
        with store.db.atomic():
            store.db["events"].insert({"time_utc": store_mod.utc_iso(T0), "level": "info",
                                       "kind": "k", "message": "m"})
            assert count(reader, "events") == 0
        # ...until it commits.
        assert count(reader, "events") == 1
        # A reader in the middle of a read does not block the writer (WAL).
        cur = reader.execute("SELECT value_v FROM samples")
        cur.fetchone()
        store.record_measurement(make_record(1))
        cur.fetchall()
        assert count(reader, "measurements") == 2
        # The reader can never write.
        with pytest.raises(sqlite3.OperationalError, match="readonly|read-only"):
            reader.execute("DELETE FROM measurements")
        with pytest.raises(sqlite3.OperationalError):
            reader.execute("CREATE TABLE x (a)")
    finally:
        reader.close()
    assert count(store.conn, "measurements") == 2


def test_open_readonly_explains_a_missing_or_wrong_file(tmp_path):
    with pytest.raises(storeread.StoreReadError, match="pass --db"):
        storeread.open_readonly(tmp_path / "nowhere.db")
    assert issubclass(storeread.StoreReadError, StoreError)
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"hello, this is not sqlite at all" * 100)
    with pytest.raises(StoreError, match="not a readable SQLite store"):
        storeread.open_readonly(junk)
    other = tmp_path / "other.db"
    c = sqlite3.connect(other)
    c.execute("CREATE TABLE t (a)")
    c.commit()
    c.close()
    with pytest.raises(StoreError, match="without heliotrope tables"):
        storeread.open_readonly(other)


def test_storeread_imports_only_the_standard_library():
    # The operator's read path must start fast: no sqlite-utils, numpy, pandas or pvlib.
    code = ("import sys, daemon.store.reader; "
            "heavy = {'sqlite_utils', 'numpy', 'pandas', 'pvlib', 'yaml', 'scipy'}; "
            "print(sorted(heavy & {m.split('.')[0] for m in sys.modules}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=Path(__file__).resolve().parents[1])
    assert out.stdout.strip() == "[]"


def test_committed_measurements_survive_a_kill_9(db_path):
    # The writer dies by SIGKILL with its connection open and the WAL not checkpointed.
    code = (
        "import os, signal, sys\n"
        "sys.path.insert(0, 'tests')\n"
        "from test_store import make_record\n"
        "from daemon.store.writer import Store\n"
        f"s = Store.open({str(db_path)!r})\n"
        "for i in range(3):\n"
        "    s.record_measurement(make_record(i))\n"
        "os.kill(os.getpid(), signal.SIGKILL)\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          cwd=Path(__file__).resolve().parents[1])
    assert proc.returncode == -9, proc.stderr
    assert Path(str(db_path) + "-wal").exists()  # the commits live in the WAL
    s = Store.open(db_path)  # passes quick_check
    try:
        assert count(s.conn, "measurements") == 3
        assert count(s.conn, "samples") == 3 * 15 * len(CHANNELS)
    finally:
        s.close()
