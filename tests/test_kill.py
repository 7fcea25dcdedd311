"""A measurement is in the store completely or not at all: the acquisition process is
killed with SIGKILL 50 times at random moments; after every kill the file passes
`PRAGMA integrity_check`, no measurement is partly stored, and every measurement the
child reported as committed is still there."""

from __future__ import annotations

import random
import sqlite3
import subprocess
import sys
import time
from datetime import date, timedelta
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
KILLS = 50
SAMPLES_PER_OK = 6 * (10 + 5)  # six channels, burst of 10 and dark of 5 (pico-sereno.yaml)


def _check(db: Path, committed: set[int]) -> int:
    conn = sqlite3.connect(db)
    try:
        assert conn.execute("pragma integrity_check").fetchone()[0] == "ok"
        ids = {r[0] for r in conn.execute("select id from measurements")}
        assert committed <= ids, f"lost after kill: {sorted(committed - ids)[:5]}"
        rows = conn.execute("""
            select m.id, m.status,
                   (select count(*) from samples s where s.measurement_id = m.id),
                   (select count(*) from housekeeping h where h.measurement_id = m.id)
            from measurements m""").fetchall()
        for mid, status, n_samples, n_hk in rows:
            if status == "ok":
                assert (n_samples, n_hk) == (SAMPLES_PER_OK, 1), f"measurement {mid} partial"
            else:
                assert (n_samples, n_hk) == (0, 0), f"failed measurement {mid} has data"
        return len(ids)
    finally:
        conn.close()


@pytest.mark.slow
def test_fifty_kills_lose_nothing_committed(tmp_path):
    rng = random.Random(20271215)
    db = tmp_path / "kill.db"
    committed: set[int] = set()
    total = 0
    for k in range(KILLS):
        child = subprocess.Popen(
            [sys.executable, "-m", "tests.kill_child", str(db),
             (date(2027, 1, 1) + timedelta(days=k)).isoformat()],
            cwd=ROOT, stdout=subprocess.PIPE, text=True)
        assert child.stdout.readline().strip() == "ready"
        time.sleep(rng.uniform(0.0, 0.6))
        child.kill()
        out, _ = child.communicate(timeout=30)
        committed |= {int(line) for line in out.split() if line.isdigit()}
        n = _check(db, committed)
        assert n >= total
        total = n
    assert len(committed) > KILLS  # the kills did land during acquisition
