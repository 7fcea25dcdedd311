"""The text-command simulator: its SCPI voltmeter and short-command tracker, alone and
behind the text drivers on a real pseudo-terminal, with line faults.

The SCPI rules checked are named beside each test (IEEE 488.2-1992, SCPI-1999). The
drivers' configuration is config/pico-sereno-scpi.yaml's.
"""

from __future__ import annotations

import threading
from datetime import UTC, datetime
from pathlib import Path

import pytest

from daemon.config.settings import load_config
from drivers.textcmd import TextDeviceError, TextRadiometer, TextTracker
from sim_instrument.faults import LineFaults
from sim_instrument.model import SimulatedStation
from sim_instrument.scenario import load_scenario
from sim_instrument.server import StationServer
from sim_instrument.text_server import (
    FirmwareTracker,
    ScpiRadiometer,
    parse_channel_list,
    text_emulator,
)

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno-scpi.yaml"
NOON = datetime(2027, 2, 15, 18, 30, tzinfo=UTC)  # near local noon at Pico Sereno


@pytest.fixture
def station():
    s = SimulatedStation(load_scenario("pico-sereno-clear"), seed=3, speed=0)
    s.set_clock(NOON)
    return s


def _ask(device, line: str) -> bytes | None:
    return device.handle(line.encode())[0]


def test_keywords_match_in_short_and_long_form_in_any_case(station):
    # SCPI-1999 Vol. 1 sec. 6.2.1: the short form is the capitals of the keyword; either
    # form, in upper or lower case, is accepted.
    scpi = ScpiRadiometer(station, threading.Lock())
    for header in ("SAMP:COUN 3", "sample:count 3", "SAMPle:COUNt 3", ":samp:coun 3"):
        assert _ask(scpi, header) is None  # a command that is not a query answers nothing
        assert _ask(scpi, "SAMP:COUN?") == b"3\n"
    assert _ask(scpi, "SAMPL:COUN 3") is None
    assert _ask(scpi, "SYST:ERR?") == b'-113,"Undefined header"\n'


def test_error_queue_is_first_in_first_out_and_reports_no_error_when_empty(station):
    # SCPI-1999 Vol. 2 sec. 21.8: SYSTem:ERRor? returns the oldest error first, and
    # 0,"No error" once the queue is empty; *CLS empties it (IEEE 488.2 sec. 10.3).
    scpi = ScpiRadiometer(station, threading.Lock())
    _ask(scpi, "BOGUS")
    _ask(scpi, "SAMP:COUN 0")
    assert _ask(scpi, "SYST:ERR?") == b'-113,"Undefined header"\n'
    assert _ask(scpi, "SYST:ERR?") == b'-222,"Data out of range"\n'
    assert _ask(scpi, "SYST:ERR?") == b'+0,"No error"\n'
    _ask(scpi, "BOGUS")
    _ask(scpi, "*CLS")
    assert _ask(scpi, "SYST:ERR?") == b'+0,"No error"\n'


def test_channel_lists_take_ranges_and_single_channels():
    # SCPI-1999 Vol. 1 sec. 8.3.2: (@101:103,105) is channels 101 to 103 and 105.
    assert parse_channel_list("(@101:103,105)") == [101, 102, 103, 105]
    assert parse_channel_list("(@204)") == [204]


def test_a_scan_returns_count_samples_of_every_listed_channel(station):
    # IEEE 488.2-1992 sec. 8.7.4 (NR3) and sec. 8.4.2 (',' between data elements).
    scpi = ScpiRadiometer(station, threading.Lock())
    reply = _ask(scpi, "SAMP:COUN 4;:MEAS:VOLT:DC? (@101:106)")
    assert reply.endswith(b"\n")
    values = [float(v) for v in reply.decode().strip().split(",")]
    assert len(values) == 4 * 6 and all(0 < v < 5 for v in values)
    assert all(len(v) == 15 for v in reply.decode().strip().split(","))  # +d.ddddddddE+dd


def test_the_tracker_refuses_with_an_error_line(station):
    tracker = FirmwareTracker(station, threading.Lock())
    assert _ask(tracker, "G 10 95") .startswith(b"E3 ")  # elevation above the zenith
    assert _ask(tracker, "Z") == b"E1 unknown command\r"
    assert _ask(tracker, "F 2") == b"E2 F takes 0 or 1\r"
    assert _ask(tracker, "P") == b"OK\r"


@pytest.fixture
def drivers_on_pty(station, request):
    faults = getattr(request, "param", None)
    cfg = load_config(CONFIG)
    server = StationServer(station, "pty", line_faults=faults, seed=5, make_emulator=text_emulator)
    with server:
        urls = server.urls
        r = TextRadiometer(cfg.radiometer.options, urls["radiometer"], 19200, 0.5, 3)
        t = TextTracker(cfg.tracker.options, urls["tracker"], 19200, 0.5, 3)
        yield r, t, server
        r.close()
        t.close()


def test_a_clean_link_identifies_reads_and_points(drivers_on_pty):
    r, t, _ = drivers_on_pty
    assert r.identify().model == "HELIOTROPE-SIM HR6-SIM"  # IEEE 488.2 sec. 10.14
    assert t.identify().serial == "PS-T-0017"
    r.set_clock(NOON)
    t.set_clock(NOON)
    burst = r.read_burst(10)
    assert len(burst.samples) == 10 and len(burst.samples[0]) == 6
    dark = r.read_dark(5)
    # The dark signal is the scenario's few millivolts (dark_v 1.5-2.6 mV).
    assert all(0 < v < 0.01 for row in dark.samples for v in row)
    hk = r.read_housekeeping()
    assert hk.pressure_hpa == pytest.approx(645.0, abs=5)  # the scenario's station pressure
    t.goto(120.0, 40.0)
    assert t.state().mode in ("slewing", "idle")
    with pytest.raises(TextDeviceError, match="error 3"):
        t.goto(0.0, 95.0)
    assert r.link_counters()["garbage"] == 0 and r.link_counters()["timeouts"] == 0


@pytest.mark.parametrize("drivers_on_pty", [LineFaults(drop=0.08, garble=0.08,
                                                       truncate=0.08)], indirect=True)
def test_dropped_garbled_and_truncated_replies_are_counted_and_survived(drivers_on_pty):
    # The link faults of sim_instrument/faults.py at about 8 % each: every call still
    # returns within its retries, and what was survived is in the counters.
    r, t, server = drivers_on_pty
    r.set_clock(NOON)
    for _ in range(25):
        assert len(r.read_burst(3).samples) == 3
        assert t.state().mode in ("parked", "idle", "slewing", "tracking")
    counts = server.fault_counts()
    inflicted = sum(counts[d][k] for d in counts for k in ("drop", "garbage", "truncate"))
    seen = {k: r.link_counters()[k] + t.link_counters()[k] for k in ("garbage", "timeouts")}
    assert inflicted > 0 and seen["garbage"] > 0 and seen["timeouts"] > 0
