"""The simulator's protocol server and its command line, with the real simulated station."""

from __future__ import annotations

import json
import os
import selectors
import signal
import socket
import subprocess
import sys
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from drivers import protocol as p
from drivers.reference import SerialRadiometer, SerialTracker, open_radiometer, open_tracker
from drivers.transport import Transport
from sim_instrument import cli
from sim_instrument.model import SimulatedStation
from sim_instrument.scenario import load_scenario
from sim_instrument.server import DeviceEmulator, LineAssembler, LineFaults, StationServer

ROOT = Path(__file__).resolve().parents[1]
SCENARIO = "pico-sereno-clear"
# Mid-afternoon at Pico Sereno on the scenario's date: the sun is well up.
AFTERNOON = datetime(2025, 2, 12, 21, 0, tzinfo=UTC)


@pytest.fixture(scope="module")
def scenario():
    return load_scenario(SCENARIO)


@pytest.fixture
def station(scenario):
    return SimulatedStation(scenario, seed=1, speed=0)


# ---------------------------------------------------------------------------- lines


def test_line_assembler_accepts_every_line_ending_and_backspace():
    la = LineAssembler()
    assert la.feed(b"id\r") == [b"id"]
    assert la.feed(b"hk\n#3 st") == [b"hk"]
    assert la.feed(b"atux\x7fs\r\n\r\n") == [b"#3 status"]
    assert la.feed(b"hkk\x08\r") == [b"hk"]
    assert la.feed(b"\n\n") == []


def test_line_assembler_flags_an_overlong_line_and_recovers():
    la = LineAssembler()
    assert la.feed(b"x" * 1000 + b"\r\nid\r\n") == [None, b"id"]


# ---------------------------------------------------------------------------- devices


def _ask(emulator: DeviceEmulator, text: str):
    reply, delay = emulator.handle(text.encode())
    rid = p.decode_request(text).rid if "#" in text else 0
    try:
        return p.decode_reply(reply, rid).fields, delay
    except p.ErrorReply as exc:
        return exc, delay


def test_emulators_answer_from_the_station(station, scenario):
    lock = threading.Lock()
    rad = DeviceEmulator("radiometer", station, lock)
    trk = DeviceEmulator("tracker", station, lock)
    fields, _ = _ask(rad, "id")
    assert fields == ("RAD", scenario.instrument.model, scenario.instrument.serial,
                      scenario.instrument.firmware, str(len(scenario.instrument.channels)))
    assert _ask(trk, "id")[0][0] == "TRK"
    # one clock for both devices
    assert _ask(rad, "clk 2025-02-12T21:00:00Z")[0] == ("2025-02-12T21:00:00.000Z",)
    assert _ask(trk, "clk")[0] == ("2025-02-12T21:00:00.000Z",)
    burst = p.parse_burst(_ask(rad, "#9 burst 4")[0])
    assert len(burst.samples) == 4 and len(burst.saturated) == 6
    assert burst.duration_s == pytest.approx(3 * scenario.instrument.sample_interval_s)
    hk = p.parse_housekeeping(_ask(rad, "hk")[0])
    assert hk.pressure_hpa == pytest.approx(scenario.site.pressure_hpa, abs=5)
    state = p.parse_tracker_state(_ask(trk, "status")[0])
    assert state.mode == "parked"


def test_emulator_errors(station):
    lock = threading.Lock()
    rad = DeviceEmulator("radiometer", station, lock)
    trk = DeviceEmulator("tracker", station, lock)
    err, _ = _ask(rad, "goto 10 10")
    assert err.code == p.Code.UNKNOWN and "tracker command" in err.text
    err, _ = _ask(trk, "#4 goto 10")
    assert (err.code, err.rid) == (p.Code.ARGUMENT, 4)
    err, _ = _ask(rad, "burst 0")
    assert err.code == p.Code.ARGUMENT
    err, _ = _ask(rad, "clk tomorrow")
    assert err.code == p.Code.ARGUMENT and "ISO 8601" in err.text
    reply, _ = rad.handle(None)
    with pytest.raises(p.ErrorReply) as info:
        p.decode_reply(reply, 0)
    assert info.value.code == p.Code.SYNTAX
    status = p.parse_radiometer_status(_ask(rad, "status")[0])
    assert (status.requests, status.errors) == (5, 4)
    assert _ask(rad, "rst")[0] == ()
    status = p.parse_radiometer_status(_ask(rad, "status")[0])
    assert (status.requests, status.errors) == (1, 0)


def test_an_echoed_reply_is_not_answered(station):
    """A terminal in echo mode sends our replies back: answering them would loop forever."""
    rad = DeviceEmulator("radiometer", station, threading.Lock())
    reply, _ = rad.handle(b"id")
    assert rad.handle(reply.rstrip(b"\r\n")) == (None, 0.0)
    assert rad.handle(p.encode_error(0, p.Code.UNKNOWN, "x").rstrip(b"\r\n"))[0] is None
    assert p.parse_radiometer_status(_ask(rad, "status")[0]).requests == 2


class BrokenStation:
    """The real station, except that the ADC and the azimuth axis fail."""

    def __init__(self, real):
        self.real = real

    def __getattr__(self, name):
        return getattr(self.real, name)

    def burst(self, n):
        raise RuntimeError("detector ADC not responding")

    def goto(self, azimuth_deg, elevation_deg):
        raise ValueError("azimuth beyond the cable wrap")


def test_station_failures_become_error_replies(station):
    lock = threading.Lock()
    rad = DeviceEmulator("radiometer", BrokenStation(station), lock)
    trk = DeviceEmulator("tracker", BrokenStation(station), lock)
    err, _ = _ask(rad, "#3 burst 2")
    assert (err.code, err.rid) == (p.Code.HARDWARE, 3) and "ADC" in err.text
    err, _ = _ask(trk, "goto 10 10")
    assert err.code == p.Code.ARGUMENT and "cable wrap" in err.text
    assert _ask(rad, "hk")[0]  # still answering


def test_realtime_replies_are_held_for_the_burst_duration(station, scenario):
    rad = DeviceEmulator("radiometer", station, threading.Lock(), reply_delay_scale=0.5)
    _, delay = _ask(rad, "burst 5")
    assert delay == pytest.approx(0.5 * 4 * scenario.instrument.sample_interval_s)
    assert _ask(rad, "hk")[1] == 0


def test_line_faults_spec():
    f = LineFaults.parse("drop=0.1, corrupt=0.02")
    assert (f.drop, f.corrupt, f.garble) == (0.1, 0.02, 0.0)
    assert not LineFaults.parse("").any
    for bad in ("drop", "explode=0.1", "drop=2", "drop=lots"):
        with pytest.raises(ValueError, match="line fault"):
            LineFaults.parse(bad)


# ---------------------------------------------------------------------------- served


def _point_at_the_sun_and_lock(radiometer: SerialRadiometer, tracker: SerialTracker) -> None:
    import pandas as pd
    import pvlib

    radiometer.set_clock(AFTERNOON)
    tracker.set_clock(AFTERNOON)
    # pvlib's solar position for the scenario's site, to aim within the capture range
    pos = pvlib.solarposition.get_solarposition(pd.DatetimeIndex([AFTERNOON]), 19.95, -101.30,
                                                altitude=3650)
    tracker.goto(float(pos["azimuth"].iloc[0]), float(pos["apparent_elevation"].iloc[0]))
    tracker.follow_sun(True)
    # The simulator's clock is frozen (--speed 0): moving it on lets the slew finish.
    later = AFTERNOON + timedelta(minutes=1)
    radiometer.set_clock(later)
    state = tracker.state()
    assert state.mode == "tracking" and state.locked, state


def _exercise(radiometer: SerialRadiometer, tracker: SerialTracker) -> None:
    assert radiometer.identify().model == "HR6-SIM"
    assert tracker.identify().model == "HT2-SIM"
    assert radiometer.channel_count() == 6
    _point_at_the_sun_and_lock(radiometer, tracker)
    burst = radiometer.read_burst(10)
    dark = radiometer.read_dark(5)
    assert len(burst.samples) == 10 and not any(burst.saturated)
    for c in range(6):
        sun = sum(row[c] for row in burst.samples) / 10
        shut = sum(row[c] for row in dark.samples) / 5
        assert sun > 100 * shut > 0  # locked on the sun: direct beam far above dark
    tracker.park()
    assert tracker.state().mode in ("slewing", "parked")


@pytest.mark.parametrize("endpoint", ["pty", "tcp"])
def test_server_in_process(station, endpoint):
    with StationServer(station, endpoint) as server:
        urls = server.urls
        if endpoint == "tcp":
            assert all(u.startswith("socket://127.0.0.1:") for u in urls.values())
        else:
            assert all(u.startswith("/dev/") for u in urls.values())
        radiometer = open_radiometer(urls["radiometer"], timeout_s=2.0, retries=1)
        tracker = open_tracker(urls["tracker"], timeout_s=2.0, retries=1)
        try:
            _exercise(radiometer, tracker)
        finally:
            radiometer.close()
            tracker.close()


def _free_port_pair() -> int:
    for _ in range(20):
        with socket.create_server(("127.0.0.1", 0)) as s:
            port = s.getsockname()[1]
        if port >= 65535:
            continue
        try:
            with socket.create_server(("127.0.0.1", port + 1)):
                return port
        except OSError:
            continue
    pytest.skip("no two consecutive free ports")


def test_tcp_port_and_the_next_one(station):
    port = _free_port_pair()
    with StationServer(station, "tcp", port) as server:
        assert server.urls == {"radiometer": f"socket://127.0.0.1:{port}",
                               "tracker": f"socket://127.0.0.1:{port + 1}"}


def test_a_new_client_replaces_the_old_one(station):
    with StationServer(station, "tcp") as server:
        url = server.urls["radiometer"]
        first = Transport(url, timeout_s=1.0, retries=2, backoff_s=(0.01, 0.01))
        second = Transport(url, timeout_s=1.0, retries=2, backoff_s=(0.01, 0.01))
        assert first.exchange("ID")[0] == "RAD"
        assert second.exchange("ID")[0] == "RAD"
        assert first.exchange("ID")[0] == "RAD"  # its socket was closed: it reconnects
        assert first.counters.reconnects == 1
        first.close()
        second.close()


def test_drivers_survive_line_faults(station):
    faults = LineFaults(drop=0.1, garble=0.2, truncate=0.05, corrupt=0.1, stale=0.2)
    with StationServer(station, "tcp", line_faults=faults, seed=3) as server:
        radiometer = open_radiometer(server.urls["radiometer"], timeout_s=0.15, retries=8)
        for _ in range(30):
            assert radiometer.read_housekeeping().supply_v > 0
        c = radiometer.transport.counters
        radiometer.close()
    assert c.exchanges == 30
    assert c.garbage > 0 and c.crc_errors > 0 and c.stale > 0 and c.timeouts > 0


# ---------------------------------------------------------------------------- command line


def _start_sim(*args: str) -> tuple[subprocess.Popen, dict]:
    proc = subprocess.Popen(
        [sys.executable, "-m", "sim_instrument", "--scenario", SCENARIO, "--speed", "0",
         *args],
        cwd=ROOT, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    with selectors.DefaultSelector() as sel:
        sel.register(proc.stdout, selectors.EVENT_READ)
        if not sel.select(timeout=20):
            proc.kill()
            pytest.fail("simulator printed nothing within 20 s")
    line = proc.stdout.readline()
    if not line:
        proc.wait(5)
        pytest.fail(f"simulator exited: {proc.stderr.read().decode()}")
    return proc, json.loads(line)


def _finish(proc: subprocess.Popen) -> tuple[int, str]:
    try:
        rc = proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()
        pytest.fail("simulator did not stop")
    err = proc.stderr.read().decode()
    for stream in (proc.stdin, proc.stdout, proc.stderr):
        stream.close()
    return rc, err


def test_cli_on_ptys_until_sigterm_writes_the_truth(tmp_path):
    truth = tmp_path / "truth.json"
    proc, info = _start_sim("--port", "pty", "--truth", str(truth))
    assert set(info) == {"radiometer", "tracker", "pid", "site"} and info["pid"] == proc.pid
    assert info["site"]["name"] == "Pico Sereno Station"
    radiometer = open_radiometer(info["radiometer"], timeout_s=2.0, retries=1)
    tracker = open_tracker(info["tracker"], timeout_s=2.0, retries=1)
    try:
        _exercise(radiometer, tracker)
    finally:
        radiometer.close()
        tracker.close()
    assert not truth.exists()
    proc.send_signal(signal.SIGTERM)
    rc, err = _finish(proc)
    assert rc == 0, err
    data = json.loads(truth.read_text())
    assert set(data["channels"]) == {"380", "440", "500", "675", "870", "1020"}
    assert len(data["readings"]) == 1  # the one burst we took
    assert not [f for f in os.listdir(tmp_path) if f != "truth.json"]  # no temp file left


def test_cli_on_tcp_dies_with_its_stdin():
    proc, info = _start_sim("--port", "tcp:0", "--stdin-lifeline")
    assert info["radiometer"].startswith("socket://127.0.0.1:")
    radiometer = open_radiometer(info["radiometer"], timeout_s=2.0, retries=1)
    tracker = open_tracker(info["tracker"], timeout_s=2.0, retries=1)
    try:
        assert radiometer.identify().serial == "PS-0042"
        assert tracker.identify().serial == "PS-T-0017"
        radiometer.set_clock(AFTERNOON)
        assert len(radiometer.read_burst(3).samples) == 3
    finally:
        radiometer.close()
        tracker.close()
    proc.stdin.close()
    rc, err = _finish(proc)
    assert rc == 0, err


@pytest.mark.parametrize(("args", "code", "message"), [
    (["--port", "tcp:http"], cli.EX_USAGE, "tcp:PORT"),
    (["--port", "tcp:65535"], cli.EX_USAGE, "tcp:PORT"),
    (["--port", "pty", "--speed", "-1"], cli.EX_USAGE, "--speed"),
    (["--port", "pty", "--line-faults", "drop=9"], cli.EX_USAGE, "probability"),
    (["--port", "pty", "--truth", "/nonexistent-dir/t.json"], cli.EX_USAGE, "does not exist"),
])
def test_cli_rejects_bad_arguments(args, code, message, capsys):
    assert cli.main(["--scenario", SCENARIO, *args]) == code
    assert message in capsys.readouterr().err


def test_cli_unknown_scenario(capsys):
    assert cli.main(["--scenario", "no-such-day", "--port", "pty"]) == cli.EX_CONFIG
    assert "no-such-day" in capsys.readouterr().err


def test_cli_port_in_use(capsys):
    with socket.create_server(("127.0.0.1", 0)) as busy:
        port = busy.getsockname()[1]
        assert cli.main(["--scenario", SCENARIO, "--port", f"tcp:{port}"]) == cli.EX_CONFIG
    assert "tcp:0" in capsys.readouterr().err


def test_port_spec():
    assert cli.parse_port_spec("pty") == ("pty", 0)
    assert cli.parse_port_spec("tcp:0") == ("tcp", 0)
    assert cli.parse_port_spec("tcp:7700") == ("tcp", 7700)
    with pytest.raises(ValueError):
        cli.parse_port_spec("udp:7700")
