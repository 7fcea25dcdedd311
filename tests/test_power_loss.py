"""Power loss for real: the store on a file system that forgets every unsynced write.

A SIGKILL keeps the kernel's page cache, so the kill test passes even with
``PRAGMA synchronous=OFF``. Here the store lives on :mod:`tests.powercut_fs`, a FUSE
file system that holds written data in memory until it is fsynced and drops it (or
tears it, sector by sector) when the "power" is cut. First the file system is shown
to do that (its own tests, and SQLite at ``synchronous=OFF`` and ``NORMAL`` losing
acknowledged commits on it); then the service's writer stores measurements, events,
plans and session results on it, the power is cut at random moments and exactly
inside the WAL's appends and fsyncs, and after each remount the store passes the kill
test's audit.

Sources: SQLite's documentation of ``PRAGMA synchronous``
(https://www.sqlite.org/pragma.html#pragma_synchronous: in WAL mode FULL syncs the WAL
at every commit; NORMAL "loses durability" - a commit may roll back after a power
loss - but keeps the file consistent), and its atomic-commit and WAL pages
(https://www.sqlite.org/atomiccommit.html, https://www.sqlite.org/wal.html). Linux
fsync(2) and close(2) ("a successful close does not guarantee that the data has been
successfully saved to disk") for what the file system models.
"""

from __future__ import annotations

import errno
import os
import random
import sqlite3
import subprocess
import sys
import time
from contextlib import suppress
from datetime import date, timedelta
from pathlib import Path

import pytest

from daemon.store.writer import Store
from tests.kill_child import Committed, audit
from tests.powercut_fs import SECTOR, Disk, why_not_mountable

ROOT = Path(__file__).resolve().parent.parent
CUTS = 8
SAMPLES_PER_OK = 6 * (10 + 5)  # six channels, burst of 10 and dark of 5 (pico-sereno.yaml)


def _disk_or_skip(tmp_path: Path, name: str = "m", cap: int | None = None) -> Disk:
    reason = why_not_mountable()
    if reason:
        pytest.skip(f"power-loss test needs FUSE: {reason}")
    disk = Disk(tmp_path / "backing", tmp_path / name, cap)
    try:
        return disk.mount()
    except OSError as exc:
        pytest.skip(f"power-loss test needs FUSE: {exc}")


@pytest.fixture
def disk(tmp_path):
    d = _disk_or_skip(tmp_path)
    yield d
    d.unmount()


def _write(path: Path, data: bytes, sync: bool, offset: int = 0) -> None:
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        os.pwrite(fd, data, offset)
        if sync:
            os.fsync(fd)
    finally:
        os.close(fd)


# --------------------------------------------------------------- the file system itself

def test_unsynced_writes_are_read_back_then_dropped_at_the_cut(disk):
    kept, lost = disk.mountpoint / "kept", disk.mountpoint / "lost"
    _write(kept, b"A" * 3000, sync=True)
    _write(kept, b"B" * 100, sync=False, offset=1000)  # overwrites part of synced data
    _write(lost, b"never synced", sync=False)
    # Before the cut every program sees its writes, as through a page cache.
    assert lost.read_bytes() == b"never synced"
    assert kept.read_bytes()[1000:1100] == b"B" * 100
    # close(2) is not fsync(2): closing did not make them durable.
    assert disk.cut() == 2  # one sector of each unsynced write
    with pytest.raises(OSError) as err:
        kept.read_bytes()
    assert err.value.errno == errno.EIO  # the power is off
    disk.unmount()
    assert (disk.backing / "kept").read_bytes() == b"A" * 3000
    assert (disk.backing / "lost").read_bytes() == b""  # the name survives, not the data


def test_a_torn_cut_keeps_some_unsynced_sectors_and_every_synced_one(disk):
    f = disk.mountpoint / "f"
    _write(f, b"S" * (64 * SECTOR), sync=True)
    _write(f, b"U" * (64 * SECTOR), sync=False)
    dropped = disk.cut(torn_seed=3)
    disk.unmount()
    data = (disk.backing / "f").read_bytes()
    sectors = [data[i:i + SECTOR] for i in range(0, len(data), SECTOR)]
    assert len(sectors) == 64 and set(sectors) == {b"S" * SECTOR, b"U" * SECTOR}
    assert sectors.count(b"S" * SECTOR) == dropped


def test_an_armed_cut_fires_at_the_chosen_fsync_before_it_syncs(disk):
    f = disk.mountpoint / "log"
    disk.arm("fsync", "/log", 2)
    _write(f, b"first", sync=True)          # the first fsync goes through
    with pytest.raises(OSError) as err:
        _write(f, b"second", sync=True, offset=5)  # the power goes inside the second
    assert err.value.errno == errno.EIO
    dropped, where = disk.wait_cut()
    assert (dropped, where) == (1, "fsync /log")
    disk.unmount()
    assert (disk.backing / "log").read_bytes() == b"first"


def test_names_and_synced_data_come_back_on_the_next_mount(tmp_path):
    with _disk_or_skip(tmp_path) as d:
        (d.mountpoint / "dir").mkdir()
        _write(d.mountpoint / "dir" / "a", b"synced", sync=True)
        os.rename(d.mountpoint / "dir" / "a", d.mountpoint / "dir" / "b")
        d.cut()
    with Disk(tmp_path / "backing", tmp_path / "m").mount() as again:
        assert (again.mountpoint / "dir" / "b").read_bytes() == b"synced"
        assert not (again.mountpoint / "dir" / "a").exists()


def test_a_capped_file_system_is_full_and_frees_space(tmp_path):
    with _disk_or_skip(tmp_path, cap=64 * 1024) as d:
        st = os.statvfs(d.mountpoint)
        assert st.f_blocks * st.f_frsize == 64 * 1024  # df shows the cap
        f = d.mountpoint / "big"
        with pytest.raises(OSError) as err:
            f.write_bytes(b"x" * (128 * 1024))
        assert err.value.errno == errno.ENOSPC
        f.unlink()
        _write(d.mountpoint / "small", b"x" * 1024, sync=True)  # space came back


# --------------------------------------------------------------- SQLite on it

def _commit_rows(db: Path, synchronous: str, n: int) -> sqlite3.Connection:
    """Commit ``n`` rows one by one and return the still open connection (closing the
    last connection would checkpoint and sync the WAL before the cut)."""
    conn = sqlite3.connect(db)
    conn.execute("PRAGMA journal_mode = WAL")
    conn.execute(f"PRAGMA synchronous = {synchronous}")
    conn.execute("CREATE TABLE IF NOT EXISTS t (x INTEGER)")
    conn.commit()
    for i in range(n):
        conn.execute("INSERT INTO t VALUES (?)", (i,))
        conn.commit()  # acknowledged
    return conn


@pytest.mark.parametrize("synchronous, survive", [
    ("OFF", False),     # no fsync at all: acknowledged commits vanish
    ("NORMAL", False),  # WAL synced only at checkpoints: the last commits roll back
    ("FULL", True),     # WAL synced at every commit: nothing acknowledged is lost
])
def test_sqlite_keeps_acknowledged_commits_only_when_it_syncs_them(tmp_path, synchronous,
                                                                   survive):
    # pragma synchronous, https://www.sqlite.org/pragma.html#pragma_synchronous
    # (NORMAL in WAL mode "does lose durability" at a power loss).
    d = _disk_or_skip(tmp_path)
    n = 200
    writer = _commit_rows(d.mountpoint / "t.db", synchronous, n)
    d.cut()
    with suppress(sqlite3.Error):
        writer.close()  # the power is off: its last checkpoint fails
    d.unmount()
    with Disk(tmp_path / "backing", tmp_path / "m").mount() as again:
        conn = sqlite3.connect(again.mountpoint / "t.db")
        try:
            assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
            kept = conn.execute("SELECT count(*) FROM sqlite_master WHERE name = 't'"
                                ).fetchone()[0] and conn.execute(
                                    "SELECT count(*) FROM t").fetchone()[0]
        finally:
            conn.close()
    assert (kept == n) is survive, f"{kept} of {n} acknowledged commits kept"


# --------------------------------------------------------------- the service's writer

def test_the_store_syncs_every_commit(disk):
    # The durability setting the README promises (FULL in WAL mode); the cuts below
    # are what it buys.
    store = Store.open(disk.mountpoint / "h.db")
    try:
        assert store.conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        assert store.conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL
    finally:
        store.close()


def _reopen(tmp_path: Path, k: int, committed: Committed, before: dict) -> Disk:
    """Mount again after a cut (the first time: mount, or skip without FUSE) and audit
    the store as the next start of the service would find it."""
    if k == 0:
        return _disk_or_skip(tmp_path)
    d = Disk(tmp_path / "backing", tmp_path / "m").mount()
    counts = audit(d.mountpoint / "h.db", committed, SAMPLES_PER_OK)
    assert all(counts[t] >= n for t, n in before.items()), (before, counts)
    before.update(counts)
    return d


def _writer(db: Path, first: date) -> subprocess.Popen:
    child = subprocess.Popen(
        [sys.executable, "-m", "tests.kill_child", str(db), first.isoformat()],
        cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    assert child.stdout.readline().strip() == "ready"
    return child


@pytest.mark.slow
def test_cuts_inside_wal_appends_and_wal_syncs_lose_nothing_reported(tmp_path):
    # Where the kill test can only hope to land: inside the WAL append of a commit, or
    # inside the fsync that makes it durable (https://www.sqlite.org/wal.html: a
    # commit is durable once its frames and the commit frame are synced).
    rng = random.Random(20271218)
    committed, before, fired = Committed(), {}, []
    for k in range(CUTS):
        d = _reopen(tmp_path, k, committed, before)
        try:
            child = _writer(d.mountpoint / "h.db", date(2027, 5, 1) + timedelta(days=3 * k))
            op = ("write", "fsync")[k % 2]
            d.arm(op, "h.db-wal", rng.randint(1, 40), torn_seed=k if k % 4 >= 2 else None)
            fired.append(d.wait_cut()[1])
            child.kill()
            committed.add(child.communicate(timeout=30)[0])
        finally:
            d.unmount()
    with Disk(tmp_path / "backing", tmp_path / "m").mount() as d:
        audit(d.mountpoint / "h.db", committed, SAMPLES_PER_OK)
    assert sorted(set(fired)) == ["fsync /h.db-wal", "write /h.db-wal"]
    assert len(committed.measurements) > CUTS


@pytest.mark.slow
def test_power_cuts_lose_nothing_the_writer_reported_committed(tmp_path):
    rng = random.Random(20271217)
    committed, before = Committed(), {}
    dropped_total = 0
    for k in range(CUTS):
        d = _reopen(tmp_path, k, committed, before)
        try:
            child = _writer(d.mountpoint / "h.db", date(2027, 3, 1) + timedelta(days=3 * k))
            # After a random number of reported commits (whatever the machine's speed)
            # and a few milliseconds more, the power goes: the disk first (nothing more
            # reaches it), then the process, which can say nothing it had not said.
            said = [child.stdout.readline() for _ in range(rng.randint(1, 150))]
            time.sleep(rng.uniform(0.0, 0.05))
            dropped_total += d.cut(torn_seed=k if k % 2 else None)
            child.kill()
            committed.add("".join(said) + child.communicate(timeout=30)[0])
        finally:
            d.unmount()
    with Disk(tmp_path / "backing", tmp_path / "m").mount() as d:
        counts = audit(d.mountpoint / "h.db", committed, SAMPLES_PER_OK)
    assert counts["measurements"] >= len(committed.measurements) > CUTS
    assert committed.plans and committed.results and committed.events
    # Whether a cut found unsynced data depends on where it fell; the armed test
    # above makes sure some do.
    print(f"{CUTS} cuts, {dropped_total} unsynced sectors dropped or torn, store: {counts}")
