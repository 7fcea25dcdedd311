"""A disk that really fills at plan time: the store on a small tmpfs, filled by a
ballast file just before the next day is planned, then freed. The service plans the
day once space is back and measures it without a restart; while nothing is planned,
``status`` is critical and says why.

tests/test_service_survives.py injects the same refusal as an exception; here SQLite
meets a real ENOSPC ("database or disk is full", SQLITE_FULL in
https://www.sqlite.org/rescode.html) from the kernel.
"""

from __future__ import annotations

import errno
import logging
import os
import subprocess
from datetime import timedelta
from pathlib import Path

import pytest

from daemon.commands.status import CRITICAL, station_status
from daemon.config.settings import load_config
from daemon.station.planner import plan_day
from tests.test_probe import CONFIG
from tests.test_service_survives import DAY, _run_jobs, _service

SIZE_MIB = 16


@pytest.fixture
def small_disk(tmp_path):
    mnt = tmp_path / "disk"
    mnt.mkdir()
    try:
        subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={SIZE_MIB}m,mode=0755", "tmpfs",
                        str(mnt)], check=True, capture_output=True, text=True)
    except (OSError, subprocess.CalledProcessError) as exc:
        why = getattr(exc, "stderr", "") or str(exc)
        pytest.skip(f"a real full disk needs a small tmpfs, and mounting one failed: "
                    f"{why.strip()} (run as root)")
    yield mnt
    subprocess.run(["umount", "-l", str(mnt)], check=False, capture_output=True)


def _fill(mnt: Path) -> Path:
    """Write a ballast file until the file system refuses (ENOSPC)."""
    ballast = mnt / "ballast"
    chunk = b"\0" * 65536
    with ballast.open("wb", buffering=0) as f:
        while True:
            try:
                f.write(chunk)
            except OSError as exc:
                assert exc.errno == errno.ENOSPC
                return ballast


def _nothing_ahead(st: dict) -> bool:
    return any(p.startswith("nothing planned ahead") for p in st["problems"])


def test_a_disk_full_at_plan_time_then_freed_is_measured_without_a_restart(
        small_disk, caplog):
    cfg = load_config(CONFIG)
    today, tomorrow = plan_day(cfg, DAY), plan_day(cfg, DAY + timedelta(days=1))
    evening = max(e.time_utc for e in today.events if e.kind in ("park", "replan"))
    svc = _service(cfg, small_disk, evening - timedelta(minutes=1))
    svc.schedule_day(DAY)
    store = svc.station.store
    db = small_disk / "s.db"
    ballast = _fill(small_disk)
    assert os.statvfs(small_disk).f_bavail == 0

    caplog.set_level(logging.INFO)
    local_midnight = tomorrow.targets[0].time_utc - timedelta(hours=3)
    _run_jobs(svc, local_midnight)
    assert "database or disk is full" in caplog.text  # the refusal reached the journal
    planned = store.conn.execute("select count(*) from plans where plan_date = ?",
                                 ("2027-02-16",)).fetchone()[0]
    assert planned == 0, "the plan was stored on a full disk?"
    # The heartbeat may look fine; the plan check is what tells acquisition stopped.
    st = station_status(db, svc.clock.now())
    assert st["exit_code"] == CRITICAL and _nothing_ahead(st), st["problems"]

    ballast.unlink()  # the operator frees space; nobody restarts the service
    _run_jobs(svc, tomorrow.targets[-1].time_utc + timedelta(minutes=1))
    ok = store.conn.execute("select count(*) from measurements where plan_date = ? and "
                            "status = 'ok'", ("2027-02-16",)).fetchone()[0]
    assert ok == len(tomorrow.targets)
    assert not _nothing_ahead(station_status(db, svc.clock.now()))
    assert store.conn.execute("pragma integrity_check").fetchone()[0] == "ok"
    store.close()
