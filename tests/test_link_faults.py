"""Every fault the simulator can play, against the real drivers over real endpoints.

The reference drivers (drivers/reference.py over drivers/transport.py) talk to the
simulator's protocol server over a pseudo-terminal or loopback TCP, exactly as in the
field. The station's clock is frozen (speed 0) and moved by the drivers' CLK commands,
so scheduled faults fire when the tests say.
"""

from __future__ import annotations

import dataclasses
import json
import selectors
import subprocess
import sys
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from drivers.interfaces import LinkError
from drivers.reference import SerialRadiometer, SerialTracker
from drivers.transport import Transport
from sim_instrument.faults import (
    FaultEvent,
    FaultPlan,
    LineFaults,
    crossed,
    solar_hour,
)
from sim_instrument.model import SimulatedStation
from sim_instrument.scenario import load_scenario
from sim_instrument.server import StationServer

ROOT = Path(__file__).resolve().parents[1]
LON = -101.30  # Pico Sereno Station
# 15:00 UTC at Pico Sereno is 8.247 h local mean solar time: the sun is well up.
T0 = datetime(2025, 2, 12, 15, 0, tzinfo=UTC)
T0_SOLAR_H = 15.0 + LON / 15.0

ENDPOINTS = ["pty", "tcp"]


@pytest.fixture(scope="module")
def scenario():
    return load_scenario("pico-sereno-clear")


def make_server(scenario, endpoint, *, line=None, events=(), late_reply_s=3.0, seed=1,
                record=False, station_seed=1):
    plan = FaultPlan(line=line or LineFaults(), late_reply_s=late_reply_s,
                     events=tuple(e for e in events if e.kind != "tracker_stall"))
    stalls = tuple(e for e in events if e.kind == "tracker_stall")
    station = SimulatedStation(dataclasses.replace(scenario, faults=FaultPlan(events=stalls)),
                               seed=station_seed, speed=0)
    return StationServer(station, endpoint, fault_plan=plan, longitude_deg=LON, seed=seed,
                         record=record)


def radiometer(server, timeout_s=0.3, retries=4, **kwargs):
    return SerialRadiometer(Transport(server.urls["radiometer"], timeout_s=timeout_s,
                                      retries=retries, backoff_s=(0.05, 0.2), **kwargs))


def tracker(server, timeout_s=0.3, retries=4, **kwargs):
    return SerialTracker(Transport(server.urls["tracker"], timeout_s=timeout_s,
                                   retries=retries, backoff_s=(0.05, 0.2), **kwargs))


def at_solar(hours_after_t0: float) -> datetime:
    return T0 + timedelta(hours=hours_after_t0)


# ------------------------------------------------------------------- schedule

def test_solar_hour_and_crossing():
    # Local mean solar time = UTC + longitude / 15 deg per hour (common practice, no source).
    assert solar_hour(T0.timestamp(), LON) == pytest.approx(T0_SOLAR_H)
    t = T0.timestamp()
    assert crossed(t, t + 600, T0_SOLAR_H + 0.1, LON)
    assert not crossed(t, t + 300, T0_SOLAR_H + 0.1, LON)
    assert not crossed(t + 600, t, T0_SOLAR_H + 0.1, LON)  # a clock set back crosses nothing
    # A jump of a day or more is the host setting another date: nothing fires.
    assert not crossed(t, t + 2 * 86400, T0_SOLAR_H + 0.1, LON)
    assert crossed(t, t + 20 * 3600, (T0_SOLAR_H + 19.0) % 24.0, LON)  # across midnight


def test_fault_plan_and_event_checks():
    with pytest.raises(ValueError, match="fault kind"):
        FaultEvent(kind="meltdown", at_solar_h=8.0)
    with pytest.raises(ValueError, match="tracker_stall happens to the tracker"):
        FaultEvent(kind="tracker_stall", at_solar_h=8.0, device="radiometer", duration_s=5)
    with pytest.raises(ValueError, match="probability"):
        LineFaults(drop=1.5)
    assert LineFaults.parse("late=0.5,garble=0.1") == LineFaults(late=0.5, garble=0.1)


# ------------------------------------------------------------- line faults at a rate

@pytest.mark.parametrize("endpoint", ENDPOINTS)
def test_garbage_and_bad_checksums_are_skipped_and_retried(scenario, endpoint):
    with make_server(scenario, endpoint, line=LineFaults(garble=0.3, corrupt=0.3)) as server:
        rad = radiometer(server, retries=6)
        for _ in range(30):
            assert rad.read_housekeeping().supply_v > 0
        c = rad.transport.counters
        rad.close()
        counts = server.fault_counts()["radiometer"]
    assert c.exchanges == 30
    assert c.garbage > 0 and c.crc_errors > 0 and c.retries >= c.crc_errors
    assert counts["garbage"] > 0 and counts["corrupt"] > 0


@pytest.mark.parametrize("endpoint", ENDPOINTS)
def test_dropped_truncated_and_stale_replies(scenario, endpoint):
    faults = LineFaults(drop=0.15, truncate=0.15, stale=0.3)
    with make_server(scenario, endpoint, line=faults, seed=4) as server:
        rad = radiometer(server, timeout_s=0.2, retries=8)
        rad.set_clock(T0)
        values = [rad.read_housekeeping() for _ in range(25)]
        c = rad.transport.counters
        rad.close()
        counts = server.fault_counts()["radiometer"]
    assert all(v.pressure_hpa == pytest.approx(645.0) for v in values)
    assert counts["drop"] > 0 and counts["truncate"] > 0 and counts["stale"] > 0
    assert c.timeouts > 0 and c.stale > 0 and c.garbage > 0  # truncated lines are noise


@pytest.mark.parametrize("endpoint", ENDPOINTS)
def test_a_late_reply_is_a_timeout_not_a_wrong_reading(scenario, endpoint):
    # One reply, scheduled, is held 0.6 s; the host waits 0.25 s and does not retry.
    events = [FaultEvent(kind="late", at_solar_h=T0_SOLAR_H + 0.5)]
    with make_server(scenario, endpoint, events=events, late_reply_s=0.6) as server:
        rad = radiometer(server, timeout_s=0.25, retries=0)
        rad.set_clock(at_solar(0.0))
        rad.set_clock(at_solar(1.0))  # crosses the event: the next reply is late
        with pytest.raises(LinkError, match="no usable reply to HK"):
            rad.read_housekeeping()
        time.sleep(0.5)  # the late reply arrives while nobody waits for it
        hk = rad.read_housekeeping()
        c = rad.transport.counters
        rad.close()
    # The late reply was recognised by its request id as stale and discarded, never
    # taken as the answer to the next request.
    assert hk.supply_v > 0
    assert c.timeouts == 1 and c.stale == 1 and c.exchanges == 3


def test_late_replies_at_a_rate_are_ridden_out(scenario):
    with make_server(scenario, "tcp", line=LineFaults(late=0.2), late_reply_s=0.3,
                     seed=6) as server:
        rad = radiometer(server, timeout_s=0.2, retries=10)
        values = [rad.read_housekeeping().pressure_hpa for _ in range(15)]
        c = rad.transport.counters
        rad.close()
        counts = server.fault_counts()["radiometer"]
    assert values == [pytest.approx(645.0)] * 15
    assert counts["late"] > 0 and c.timeouts > 0 and c.stale > 0


# ---------------------------------------------------------------- scheduled faults

@pytest.mark.parametrize("endpoint", ENDPOINTS)
def test_one_shot_line_faults_fire_when_the_clock_crosses_them(scenario, endpoint):
    events = [FaultEvent(kind="garbage", at_solar_h=T0_SOLAR_H + 0.5),
              FaultEvent(kind="corrupt", at_solar_h=T0_SOLAR_H + 1.5)]
    with make_server(scenario, endpoint, events=events) as server:
        rad = radiometer(server)
        rad.set_clock(at_solar(0.0))
        rad.read_housekeeping()
        assert rad.transport.counters.garbage == 0 and rad.transport.counters.crc_errors == 0
        rad.set_clock(at_solar(1.0))  # crosses the garbage: the next reply carries it
        rad.read_housekeeping()
        assert rad.transport.counters.garbage == 1 and rad.transport.counters.crc_errors == 0
        rad.set_clock(at_solar(2.0))  # crosses the corruption
        rad.read_housekeeping()
        rad.read_housekeeping()
        c = rad.transport.counters
        rad.close()
    assert c.garbage == 1 and c.crc_errors == 1 and c.retries == 1


@pytest.mark.parametrize("endpoint", ENDPOINTS)
def test_a_reboot_goes_silent_then_comes_back_with_fresh_counters(scenario, endpoint):
    events = [FaultEvent(kind="reboot", device="radiometer", at_solar_h=T0_SOLAR_H + 0.5,
                         duration_s=0.8)]
    with make_server(scenario, endpoint, events=events) as server:
        rad = radiometer(server, timeout_s=0.3, retries=0)
        rad.set_clock(at_solar(0.0))
        for _ in range(3):
            rad.read_housekeeping()
        assert rad.status().requests >= 4
        rad.set_clock(at_solar(1.0))  # crosses the reboot: the next request is lost
        with pytest.raises(LinkError):
            rad.read_housekeeping()
        rad.transport.retries = 8  # rides out the rest of the boot
        status = rad.status()
        c = rad.transport.counters
        assert c.timeouts >= 2  # the device was silent while it booted
        rad.close()
        truth = server.station.truth()
    assert status.requests <= 3  # counted since the reboot
    assert c.garbage >= 1  # the boot banner, taken for noise
    assert truth["radiometer_resets"] == 1


@pytest.mark.parametrize("endpoint", ENDPOINTS)
def test_a_vanished_port_is_reopened_and_the_next_command_succeeds(scenario, endpoint):
    events = [FaultEvent(kind="port_vanish", device="tracker", at_solar_h=T0_SOLAR_H + 0.5,
                         duration_s=0.6)]
    with make_server(scenario, endpoint, events=events) as server:
        url = server.urls["tracker"]
        trk = tracker(server, timeout_s=0.3, retries=1)
        trk.set_clock(at_solar(0.0))
        assert trk.identify().model == "HT2-SIM"
        trk.set_clock(at_solar(1.0))  # crosses the event: the port goes with the next request
        with pytest.raises(LinkError):
            trk.state()
        time.sleep(0.9)  # the port is back after 0.6 s
        assert server.urls["tracker"] == url  # same path or port, as a by-id link would be
        assert trk.identify().serial == "PS-T-0017"
        assert trk.state().mode == "parked"
        c = trk.transport.counters
        trk.close()
        counts = server.fault_counts()["tracker"]
    assert counts["port_vanish"] == 1
    assert c.reconnects == 1


@pytest.mark.parametrize("endpoint", ENDPOINTS)
def test_a_tracker_stall_is_seen_through_the_driver(scenario, endpoint):
    events = [FaultEvent(kind="tracker_stall", device="tracker", at_solar_h=T0_SOLAR_H + 0.5,
                         duration_s=600.0)]
    with make_server(scenario, endpoint, events=events) as server:
        trk = tracker(server)
        trk.set_clock(at_solar(0.4))
        trk.goto(100.0, 30.0)
        trk.set_clock(at_solar(0.45))
        assert trk.state().mode == "idle"
        trk.set_clock(at_solar(0.55))  # inside the 10-minute stall
        stalled = trk.state()
        trk.goto(200.0, 45.0)
        trk.set_clock(at_solar(0.6))
        still = trk.state()
        trk.set_clock(at_solar(0.7))  # over: the last goto is carried out
        after = trk.state()
        trk.close()
    assert stalled.mode == "fault" and not stalled.locked
    assert (still.mode, still.azimuth_deg, still.elevation_deg) == (
        "fault", stalled.azimuth_deg, stalled.elevation_deg)
    assert after.mode == "idle"
    assert (after.azimuth_deg, after.elevation_deg) == pytest.approx((200.0, 45.0))


# ----------------------------------------------------------------- the fault storm

@pytest.mark.slow
def test_fault_storm_damages_at_least_five_percent_of_replies():
    storm = load_scenario("pico-sereno-fault-storm")
    # The storm's line faults; its late replies held 0.4 s instead of 3 s to keep the
    # test quick (the host waits 0.2 s either way).
    plan = dataclasses.replace(storm.faults, late_reply_s=0.4, events=())
    station = SimulatedStation(storm, seed=2, speed=0)
    with StationServer(station, "tcp", fault_plan=plan, longitude_deg=LON, seed=2) as server:
        rad = radiometer(server, timeout_s=0.2, retries=10)
        for _ in range(300):
            rad.read_housekeeping()
        c = rad.transport.counters
        rad.close()
        counts = server.fault_counts()["radiometer"]
    assert c.exchanges == 300
    assert (counts["garbage"] + counts["corrupt"]) / counts["replies"] >= 0.05
    assert c.garbage > 0 and c.crc_errors > 0


# ----------------------------------------------------------------- reproducibility

def _scripted_session(server) -> None:
    rad = radiometer(server, timeout_s=0.15, retries=8, first_rid=100)
    trk = tracker(server, timeout_s=0.15, retries=8, first_rid=500)
    try:
        for k in range(4):
            when = at_solar(0.5 * k)
            rad.set_clock(when)
            trk.set_clock(when)
            trk.goto(120.0, 20.0 + k)
            trk.follow_sun(True)
            trk.state()
            rad.read_burst(10)
            rad.read_dark(5)
            rad.read_housekeeping()
        trk.park()
    finally:
        rad.close()
        trk.close()


@pytest.mark.slow
@pytest.mark.parametrize("endpoint", ENDPOINTS)
def test_a_seeded_run_is_reproducible_byte_for_byte(scenario, endpoint):
    faults = LineFaults(garble=0.2, corrupt=0.15, stale=0.1, drop=0.03, truncate=0.03)
    events = [FaultEvent(kind="garbage", at_solar_h=T0_SOLAR_H + 0.7)]
    runs = []
    for _ in range(2):
        with make_server(scenario, endpoint, line=faults, events=events, seed=9,
                         station_seed=9, record=True) as server:
            _scripted_session(server)
            runs.append((server.transcripts(), server.station.truth()))
    (wire_a, truth_a), (wire_b, truth_b) = runs
    assert sum(len(chunks) for chunks in wire_a.values()) > 40
    assert wire_a == wire_b
    assert truth_a == truth_b
    if endpoint == "tcp":
        with make_server(scenario, endpoint, line=faults, seed=10, station_seed=9,
                         record=True) as server:
            _scripted_session(server)
            assert server.transcripts() != wire_a  # another seed, other damage


def _run_cli(tmp_path: Path, tag: str) -> bytes:
    truth = tmp_path / f"truth-{tag}.json"
    proc = subprocess.Popen(
        [sys.executable, "-m", "sim_instrument", "--scenario", "pico-sereno-clear",
         "--port", "tcp:0", "--speed", "0", "--seed", "5", "--truth", str(truth),
         "--line-faults", "garble=0.2,corrupt=0.2,stale=0.1", "--stdin-lifeline"],
        cwd=ROOT, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        with selectors.DefaultSelector() as sel:
            sel.register(proc.stdout, selectors.EVENT_READ)
            assert sel.select(timeout=30), "the simulator printed nothing"
        info = json.loads(proc.stdout.readline())
        rad = SerialRadiometer(Transport(info["radiometer"], timeout_s=0.3, retries=8,
                                         first_rid=1))
        try:
            for k in range(5):
                rad.set_clock(at_solar(0.25 * k))
                rad.read_burst(5)
        finally:
            rad.close()
    finally:
        proc.stdin.close()
        assert proc.wait(timeout=20) == 0, proc.stderr.read().decode()
        proc.stdout.close()
        proc.stderr.close()
    return truth.read_bytes()


@pytest.mark.slow
def test_the_truth_file_of_a_seeded_run_is_reproducible(tmp_path):
    first, second = _run_cli(tmp_path, "a"), _run_cli(tmp_path, "b")
    assert first == second
    data = json.loads(first)
    assert len(data["readings"]) == 5
    assert data["scenario"] == "pico-sereno-clear"
