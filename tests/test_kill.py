"""Whatever is committed survives a SIGKILL, and nothing is ever half-stored.

The acquisition process (:mod:`tests.kill_child`) is killed with SIGKILL at random
moments; after every kill the file passes ``PRAGMA integrity_check``, no measurement
is partly stored, and every measurement, event, plan and session result (with its fit
points) that the child reported as committed is still there. Once with the in-process
fake devices (many writes between kills), once through the real serial path: the
reference drivers talking to ``heliotrope-sim`` over its pseudo-terminals, so that a
kill also lands in the middle of an exchange on the line.

The properties are the design brief's ("a kill -9 at any moment loses nothing that
was committed and never corrupts the file") and SQLite's documented atomic commit
(https://www.sqlite.org/atomiccommit.html); a SIGKILL keeps the page cache, so the
power-loss test (tests/test_power_loss.py) covers what this one cannot.
"""

from __future__ import annotations

import random
import subprocess
import sys
import time
from datetime import date, timedelta
from pathlib import Path

import pytest

from daemon.config.settings import load_config
from daemon.station.bench import simulator
from tests.kill_child import CONFIG, Committed, audit

ROOT = Path(__file__).resolve().parent.parent
KILLS = 50
SERIAL_KILLS = 12
MODBUS_KILLS = 5
SAMPLES_PER_OK = 6 * (10 + 5)  # six channels, burst of 10 and dark of 5 (pico-sereno.yaml)


def kill_rounds(db: Path, rounds: int, reports: tuple[int, int], seed: int,
                urls: list[str] = (), log: Path | None = None,
                config: Path | None = None) -> Committed:
    """Start the child, let it report a random number of commits, SIGKILL it after a
    random few milliseconds more (so the kill falls anywhere in the writes that
    follow, whatever the machine's speed), audit; repeat."""
    rng = random.Random(seed)
    committed = Committed()
    before: dict[str, int] = {}
    for k in range(rounds):
        child = subprocess.Popen(
            [sys.executable, "-m", "tests.kill_child", str(db),
             (date(2027, 1, 1) + timedelta(days=k)).isoformat(), *urls,
             *([str(config)] if config else [])],
            cwd=ROOT, stdout=subprocess.PIPE, text=True,
            stderr=log.open("a") if log else subprocess.DEVNULL)
        assert child.stdout.readline().strip() == "ready"
        said = [child.stdout.readline() for _ in range(rng.randint(*reports))]
        time.sleep(rng.uniform(0.0, 0.05))
        child.kill()
        out, _ = child.communicate(timeout=30)
        committed.add("".join(said) + out)
        counts = audit(db, committed, SAMPLES_PER_OK)
        assert all(counts[k] >= n for k, n in before.items()), (before, counts)
        before = counts
    return committed


@pytest.mark.slow
def test_fifty_kills_lose_nothing_committed(tmp_path):
    committed = kill_rounds(tmp_path / "kill.db", KILLS, (1, 150), seed=20271215)
    # The kills did land during acquisition, fits and plans, not only between them.
    assert len(committed.measurements) > KILLS
    assert committed.plans and committed.events and committed.results


@pytest.mark.slow
def test_kills_through_the_real_serial_path_lose_nothing_committed(tmp_path):
    load_config(CONFIG)  # the child's configuration, checked here for a clear failure
    with simulator("pico-sereno-clear", seed=11, port="pty") as ends:
        committed = kill_rounds(tmp_path / "kill.db", SERIAL_KILLS, (1, 120),
                                seed=20271216, urls=[ends.radiometer, ends.tracker],
                                log=tmp_path / "child.log")
    # Measurements came over the line, so the kills fell among real exchanges.
    assert len(committed.measurements) >= SERIAL_KILLS, (tmp_path / "child.log").read_text()
    assert committed.plans


@pytest.mark.slow
def test_kills_on_a_modbus_station_lose_nothing_committed(tmp_path):
    """The same through the Modbus RTU drivers and the Modbus simulator on pseudo-
    terminals: a kill also lands between a request frame and its reply."""
    modbus = ROOT / "config" / "pico-sereno-modbus.yaml"
    load_config(modbus)
    sim_args = ("--family", "modbus-rtu", "--register-map", str(modbus))
    with simulator("pico-sereno-clear", seed=12, port="pty", sim_args=sim_args) as ends:
        # Fewer rounds than the reference path: a Modbus day is slower to reach (each
        # sample a request), and the reference test already covers the writes' variety.
        committed = kill_rounds(tmp_path / "kill.db", MODBUS_KILLS, (1, 60),
                                seed=20271217, urls=[ends.radiometer, ends.tracker],
                                log=tmp_path / "child.log", config=modbus)
    assert len(committed.measurements) >= MODBUS_KILLS, (tmp_path / "child.log").read_text()
    assert committed.plans
