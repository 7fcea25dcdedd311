"""heliotroped drives a Modbus station: started against the Modbus RTU simulator on
pseudo-terminals, it reaches READY with both devices identified over Modbus, and
SIGTERM parks the tracker (a write to its park coil) and exits 0."""

from __future__ import annotations

import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
from datetime import UTC, datetime
from pathlib import Path

import pytest
import yaml

from daemon.station.bench import quiet_site

ROOT = Path(__file__).resolve().parent.parent
CONFIG = ROOT / "config" / "pico-sereno-modbus.yaml"


@pytest.mark.slow
def test_the_service_runs_a_modbus_station_and_stops_cleanly(tmp_path):
    sim = subprocess.Popen([sys.executable, "-m", "sim_instrument", "--scenario",
                            "pico-sereno-clear", "--family", "modbus-rtu", "--register-map",
                            str(CONFIG), "--port", "pty", "--stdin-lifeline", "-v"],
                           stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                           stderr=subprocess.PIPE, text=True)
    try:
        ends = json.loads(sim.stdout.readline())
        # No real target near the hour the test runs at: the life cycle is what is tested.
        data = quiet_site(yaml.safe_load(CONFIG.read_text()), datetime.now(UTC))
        data["instrument"]["radiometer"]["port"] = ends["radiometer"]
        data["instrument"]["tracker"]["port"] = ends["tracker"]
        data["store"]["path"] = str(tmp_path / "svc.db")
        cfg_path = tmp_path / "svc.yaml"
        cfg_path.write_text(yaml.safe_dump(data))
        notify_path = tmp_path / "notify.sock"
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        sock.bind(str(notify_path))
        sock.settimeout(60)
        env = dict(os.environ, NOTIFY_SOCKET=str(notify_path))
        svc = subprocess.Popen([sys.executable, "-m", "daemon.station.service", "--config",
                                str(cfg_path)], env=env, stderr=subprocess.PIPE, text=True)
        got: list[str] = []
        while "READY=1" not in got:
            got += sock.recv(4096).decode().splitlines()
        svc.send_signal(signal.SIGTERM)
        rc = svc.wait(timeout=60)
        assert rc == 0, svc.stderr.read()
        with sqlite3.connect(tmp_path / "svc.db") as conn:
            events = conn.execute("select kind, message from events order by id").fetchall()
        kinds = [k for k, _ in events]
        assert kinds[0] == "start" and kinds[-1] == "stop"
        devices = " ".join(m for k, m in events if k == "device")
        assert "PS-AI8 analog input" in devices and "PS-TR2 motion controller" in devices
    finally:
        sim.stdin.close()
        sim.wait(timeout=15)
        log = sim.stderr.read()
        sim.stderr.close()
        sim.stdout.close()
    # The stop path's park went out on the wire: pymodbus decoded it in the simulator
    # as function 05 Write Single Coil to the tracker's park coil (2).
    tracker = [line for line in log.splitlines() if "tracker: unit 2 function" in line]
    assert tracker[-1].endswith("function 5 address 2"), tracker[-3:]
