"""The read commands against a hostile store: no -shm can be written (service stopped,
group read-only), a damaged file, a damaged plan row, and a station with nothing
planned ahead. Each ends in one clear line and a non-zero exit, never a traceback."""

from __future__ import annotations

import datetime as dt
import json
import os
import shutil
import sqlite3
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

from daemon.commands.cli import main
from daemon.commands.status import CRITICAL, format_status, station_status
from daemon.store import reader
from daemon.store.writer import Store
from tests import test_status as status_tests
from tests.synthetic_store import CONFIG_PATH, DAY

UTC = dt.UTC
D = DAY.isoformat()
ROOT = Path(__file__).resolve().parent.parent
NOBODY_UID = NOGROUP_GID = 65534

# The closed synthetic day and a private copy of it, as the status tests use them.
day = status_tests.day
_copy = status_tests._copy


def _last_event_utc(day) -> dt.datetime:
    return max(e.time_utc for e in day.plan.events)


# --------------------------------------------------------------------------- no -shm

def _as_nobody(python: str, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        ["setpriv", f"--reuid={NOBODY_UID}", f"--regid={NOGROUP_GID}", "--clear-groups",
         "--", python, "-B", *args],
        capture_output=True, text=True, timeout=60, cwd="/",
        env={"PATH": "/usr/bin:/bin", "PYTHONPATH": str(ROOT), "LANG": "C.UTF-8"})


def _python_for_nobody() -> str | None:
    """An interpreter the unprivileged user may run that imports the read path (the
    read commands need the standard library only)."""
    if shutil.which("setpriv") is None:
        return None
    for python in (sys.executable, "/usr/bin/python3"):
        try:
            r = _as_nobody(python, "-c", "import sys; assert sys.version_info >= (3, 11); "
                                         "import daemon.commands.cli")
        except (OSError, subprocess.SubprocessError):
            continue
        if r.returncode == 0:
            return python
    return None


def test_group_reader_of_a_stopped_service_reads_in_immutable_mode(day):
    # The README's permission model, for real: state directory 0750 and store 0640,
    # owned by the service (root here), the reader only in the group. SQLite's WAL
    # reader must create the -shm file and cannot; the command falls back to the
    # immutable mode and says so (SQLite URI parameters "mode=ro", "immutable=1":
    # https://www.sqlite.org/uri.html).
    if os.geteuid() != 0:
        pytest.skip("needs root to give the store to a group and run as another user")
    python = _python_for_nobody()
    if python is None:
        pytest.skip("no setpriv, or no Python >= 3.11 the user nobody may run")
    top = Path(tempfile.mkdtemp(prefix="heliotrope-ro-"))
    try:
        top.chmod(0o755)
        state = top / "state"
        state.mkdir()
        db = state / "store.db"
        db.write_bytes(day.path.read_bytes())
        with Store.open(db) as s:  # the service's writer: WAL mode, then a clean stop
            assert s.conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert not Path(f"{db}-shm").exists() and not Path(f"{db}-wal").exists()
        os.chown(state, 0, NOGROUP_GID)
        os.chown(db, 0, NOGROUP_GID)
        state.chmod(0o750)
        db.chmod(0o640)
        r = _as_nobody(python, "-m", "daemon.commands.cli", "plan", "--db", str(db),
                       "--date", D)
        assert r.returncode == 0, r.stderr
        assert r.stdout.startswith(f"plan for {D} at ")
        notice = r.stderr.strip()
        assert len(notice.splitlines()) == 1 and "immutable" in notice
        assert "safe only while heliotroped is stopped" in notice and "-wal" in notice
        assert "Traceback" not in r.stderr
        # The fallback read nothing and wrote nothing: no -shm or -wal appeared.
        assert not Path(f"{db}-shm").exists() and not Path(f"{db}-wal").exists()
    finally:
        shutil.rmtree(top, ignore_errors=True)


def test_fallback_when_the_first_open_cannot_write_the_shm(day, tmp_path, monkeypatch, capsys):
    # Where no other user is at hand: the first, ordinary read-only open fails with
    # the error SQLite gives a reader that cannot write the -shm (as observed in the
    # test above), the immutable open must then succeed.
    path = _copy(day, tmp_path)
    real = sqlite3.connect
    uris = []

    def connect(database, *a, **kw):
        uris.append(database)
        if "immutable=1" not in database:
            raise sqlite3.OperationalError("attempt to write a readonly database")
        return real(database, *a, **kw)

    monkeypatch.setattr(reader.sqlite3, "connect", connect)
    assert main(["plan", "--db", str(path), "--date", D, "--json"]) == 0
    out, err = capsys.readouterr()
    assert json.loads(out)["date"] == D
    assert err.count("\n") == 1 and "immutable mode" in err
    assert uris[-1].endswith("?mode=ro&immutable=1")
    # Any other open failure is not papered over with the immutable mode.
    monkeypatch.setattr(reader.sqlite3, "connect", lambda *a, **kw: (_ for _ in ()).throw(
        sqlite3.OperationalError("disk I/O error")))
    assert main(["today", "--db", str(path)]) == 66
    assert "immutable" not in capsys.readouterr().err


# --------------------------------------------------------------------------- damaged file

def _garble_table(path: Path, table: str) -> None:
    """Garble the root b-tree pages of ``table`` and its indexes (SQLite file format:
    pages are numbered from 1, page N starts at (N - 1) * page_size;
    https://www.sqlite.org/fileformat.html)."""
    with sqlite3.connect(path) as conn:
        size = conn.execute("PRAGMA page_size").fetchone()[0]
        roots = [r[0] for r in conn.execute(
            "SELECT rootpage FROM sqlite_master WHERE tbl_name = ? AND rootpage > 0", (table,))]
    conn.close()
    with path.open("r+b") as fh:
        for root in roots:
            fh.seek((root - 1) * size)
            fh.write(b"\xa5" * size)


def _assert_recover_advice(text: str) -> None:
    assert ".recover" in text and "never delete the -wal or -shm" in text
    assert "pass --db" not in text


def test_a_file_that_is_not_a_database_gets_the_recover_advice(tmp_path, capsys):
    path = tmp_path / "store.db"
    path.write_bytes(b"\x5a" * 8192)  # no SQLite header: "file is not a database"
    assert main(["today", "--db", str(path)]) == 66
    err = capsys.readouterr().err
    assert "file is not a database" in err
    _assert_recover_advice(err)
    assert path.read_bytes() == b"\x5a" * 8192  # left exactly as it was


def test_a_malformed_store_gets_the_recover_advice(day, tmp_path, capsys):
    path = _copy(day, tmp_path)
    with path.open("r+b") as fh:  # page 1 after the 100-byte header: the schema table
        fh.seek(100)
        fh.write(b"\xa5" * 400)
    assert main(["today", "--db", str(path)]) == 66
    err = capsys.readouterr().err
    assert "malformed" in err
    _assert_recover_advice(err)


def test_status_is_critical_in_one_line_when_a_table_is_damaged(day, tmp_path, capsys):
    path = _copy(day, tmp_path)
    with Store.open(path) as s:
        s.heartbeat(dt.datetime.now(UTC))
    _garble_table(path, "meta")  # opens fine; the heartbeat query fails
    assert main(["status", "--db", str(path)]) == CRITICAL
    head = capsys.readouterr().out.splitlines()[0]
    assert head.startswith("CRITICAL: cannot read the store: ") and "malformed" in head
    _assert_recover_advice(head)


def test_status_is_critical_on_any_sqlite_error(day, tmp_path, monkeypatch):
    path = _copy(day, tmp_path)

    def locked(conn, *a):
        raise sqlite3.OperationalError("database is locked")

    monkeypatch.setattr(reader, "events_between", locked)
    st = station_status(path, _last_event_utc(day) - dt.timedelta(hours=1))
    assert st["exit_code"] == CRITICAL
    assert st["problems"][0] == "cannot read the store: database is locked"


# --------------------------------------------------------------------------- damaged plan

DAMAGED_PLANS = {
    "not JSON": "{not json",
    "no targets": json.dumps({"date": D}),
    "target without time": json.dumps({"date": D, "targets": [{"session": "am"}]}),
    "bad time text": json.dumps({"date": D, "events": [], "targets": [
        {"time_utc": "noon", "session": "am", "airmass": 2.0, "apparent_zenith_deg": 60.0,
         "azimuth_deg": 90.0}]}),
}


def _damage_plan(path: Path, plan_json: str) -> None:
    with sqlite3.connect(path) as conn:
        conn.execute("UPDATE plans SET plan_json = ? WHERE plan_date = ?", (plan_json, D))
    conn.close()


@pytest.mark.parametrize("kind", sorted(DAMAGED_PLANS))
def test_a_damaged_plan_row_is_critical_and_clear(day, tmp_path, capsys, kind):
    path = _copy(day, tmp_path)
    _damage_plan(path, DAMAGED_PLANS[kind])
    now = _last_event_utc(day) - dt.timedelta(hours=3)
    with Store.open(path) as s:
        s.heartbeat(now)
    st = station_status(path, now)
    assert st["exit_code"] == CRITICAL
    assert st["problems"][0].startswith(f"the stored plan for {D} is damaged")
    assert "\n" not in st["problems"][0]

    assert main(["plan", "--db", str(path), "--date", D]) == 66
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"the stored plan for {D} is damaged" in err
    assert "--config" in err  # what to do: compute the plan instead

    assert main(["report", "--db", str(path), "--date", D, "--config", str(CONFIG_PATH)]) != 0
    assert "is damaged" in capsys.readouterr().err


def test_status_command_on_a_damaged_plan_exits_2_without_traceback(day, tmp_path, capsys):
    path = _copy(day, tmp_path)
    _damage_plan(path, DAMAGED_PLANS["not JSON"])
    assert main(["status", "--db", str(path)]) == CRITICAL
    assert capsys.readouterr().out.startswith(f"CRITICAL: the stored plan for {D} is damaged")


# --------------------------------------------------------------------------- nothing ahead

def test_nothing_planned_ahead_and_no_plan_for_today_is_critical(day, tmp_path):
    # The full-disk case: the next day's plan was never written, yet the heartbeat is
    # fresh. Noon of the next local day, long after the stored plan's replan event.
    path = _copy(day, tmp_path)
    # Not before: after the last target the next plan is still ahead (the replan event
    # after local midnight, and shortly after it while the job may wait for the worker).
    for now in (max(t.time_utc for t in day.plan.targets) + dt.timedelta(hours=1),
                _last_event_utc(day) + dt.timedelta(minutes=2)):
        with Store.open(path) as s:
            s.heartbeat(now - dt.timedelta(seconds=30))
        st = station_status(path, now)
        assert not any(p.startswith("nothing planned ahead") for p in st["problems"]), now
        assert st["next_target"] is None
    now = _last_event_utc(day) + dt.timedelta(hours=12)
    with Store.open(path) as s:
        s.heartbeat(now - dt.timedelta(seconds=30))
    st = station_status(path, now)
    assert st["exit_code"] == CRITICAL
    assert st["problems"][0].startswith("nothing planned ahead: the newest stored plan is for "
                                        f"{D}, older than today")
    assert st["plan"]["older_than_today"] and not st["plan"]["anything_ahead"]


def test_status_says_the_newest_plan_is_older_than_today(day, tmp_path, capsys):
    path = _copy(day, tmp_path)
    now = _last_event_utc(day) + dt.timedelta(minutes=2)  # past midnight, replan pending
    with Store.open(path) as s:
        s.heartbeat(now - dt.timedelta(seconds=30))
    st = station_status(path, now)
    assert not any(p.startswith("nothing planned ahead") for p in st["problems"])
    assert st["plan"] == {"newest_date": D, "today": (DAY + dt.timedelta(days=1)).isoformat(),
                          "older_than_today": True, "anything_ahead": True}
    rows = format_status(st, now).splitlines()
    assert any(r.startswith("newest plan") and r.endswith(f"{D} (older than today, "
                                                          f"{st['plan']['today']})")
               for r in rows), rows
