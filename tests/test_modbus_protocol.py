"""The Modbus drivers against (request bytes, reply bytes) pairs on a real serial line.

A scripted peer holds the far end of a pseudo-terminal: it reads each request the
driver sends, checks it byte for byte against the frame the specification lays out,
and answers with the scripted reply. Every frame here is written out from the
specification's layout, not produced by pymodbus: Modbus over Serial Line V1.02
sec. 2.5.1 (RTU frame: address, function, data, CRC low byte first) and sec. 6.2.2
(CRC-16, polynomial 0xA001 reflected, preset 0xFFFF); Modbus Application Protocol
V1.1b3 secs. 6.4 (04 Read Input Registers), 6.5 (05 Write Single Coil),
6.12 (16 Write Multiple Registers), 7 (exception responses: function + 0x80, code).
"""

from __future__ import annotations

import os
import select
import threading
import time
import tty
from datetime import UTC, datetime

import pytest

from drivers.interfaces import DeviceError, LinkError
from drivers.modbus import ModbusLink, ModbusRadiometer, ModbusTracker
from drivers.modbus_map import check_radiometer_options, check_tracker_options


def crc16(frame: bytes) -> bytes:
    """CRC of an RTU frame as sent (low byte first): Modbus over Serial Line V1.02
    sec. 6.2.2, written from its description, independent of pymodbus."""
    crc = 0xFFFF
    for byte in frame:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ 0xA001 if crc & 1 else crc >> 1
    return crc.to_bytes(2, "little")


def rtu(*parts: int | bytes) -> bytes:
    body = b"".join(p if isinstance(p, bytes) else bytes([p]) for p in parts)
    return body + crc16(body)


def u16(*values: int) -> bytes:
    return b"".join(v.to_bytes(2, "big") for v in values)


def test_crc_matches_published_examples():
    # 01 03 00 00 00 0A -> C5 CD: the usual worked example of a Read Holding Registers
    # request (from memory). 02 07 -> CRC 0x1241, sent 41 12: the CRC example of Modbus
    # over Serial Line V1.02 sec. 6.2.2 (from memory).
    assert crc16(bytes.fromhex("01030000000A")) == bytes.fromhex("C5CD")
    assert crc16(bytes.fromhex("0207")) == bytes.fromhex("4112")


class ScriptedPeer(threading.Thread):
    """The device end of a pty: for each pair, read the request, check it, reply."""

    def __init__(self, master: int, pairs: list[tuple[bytes, bytes]]) -> None:
        super().__init__(daemon=True)
        self.master = master
        self.pairs = list(pairs)
        self.error: str | None = None

    def run(self) -> None:
        while self.pairs:
            expected, reply = self.pairs[0]
            got = b""
            deadline = time.monotonic() + 5.0
            while len(got) < len(expected) and time.monotonic() < deadline:
                ready, _, _ = select.select([self.master], [], [], 0.05)
                if ready:
                    got += os.read(self.master, len(expected) - len(got))
            if got != expected:
                self.error = f"request {got.hex(' ')} does not match {expected.hex(' ')}"
                return
            self.pairs.pop(0)
            if reply:
                os.write(self.master, reply)

    def check(self) -> None:
        self.join(timeout=5)
        assert self.error is None, self.error
        assert not self.pairs, f"{len(self.pairs)} scripted request(s) never sent"


RADIOMETER_MAP = check_radiometer_options({
    "link": "rtu", "unit_id": 1, "serial": {"parity": "none", "stopbits": 2},
    "channels": {"function": "input", "data_type": "int32", "registers": [0, 2],
                 "scale_v": 1.0e-6, "full_scale_raw": 5_000_000},
    "burst_interval_s": 0.0,
    "dark_shutter": {"coil": 3, "settle_s": 0.0},
    "housekeeping": {"detector_temp_c": {"register": 20, "data_type": "int16", "scale": 0.01},
                     "supply_v": {"register": 21, "scale": 0.001}},
})
TRACKER_MAP = check_tracker_options({
    "link": "rtu", "unit_id": 2, "serial": {"parity": "none", "stopbits": 2},
    "setpoint": {"azimuth": 0, "elevation": 2, "data_type": "int32", "scale_deg": 0.0001},
    "actual": {"function": "input", "azimuth": 0, "elevation": 2, "data_type": "int32",
               "scale_deg": 0.0001},
    "status": {"function": "input", "register": 4,
               "bits": {"moving": 0, "tracking": 1, "parked": 2, "locked": 4}},
    "commands": {"goto": {"coil": 0}, "follow": {"coil": 1}, "park": {"register": 10,
                                                                       "value": 7}},
    "clock": {"register": 100},
})


@pytest.fixture
def line():
    master, slave = os.openpty()
    tty.setraw(slave)
    peers: list[ScriptedPeer] = []

    def start(pairs, register_map, retries=0):
        peer = ScriptedPeer(master, pairs)
        peer.start()
        peers.append(peer)
        link = ModbusLink(os.ttyname(slave), 19200, 0.3, retries, register_map.link,
                          name="dut", backoff_s=(0.0, 0.0))
        device = (ModbusRadiometer(link, register_map) if register_map is RADIOMETER_MAP
                  else ModbusTracker(link, register_map))
        return device, peer

    yield start
    for peer in peers:
        peer.join(timeout=1)
    os.close(master)
    os.close(slave)


def test_housekeeping_is_one_read_input_registers(line):
    # V1.1b3 sec. 6.4: request 04, start address, quantity; response 04, byte count,
    # registers high byte first.
    request = rtu(0x01, 0x04, u16(20, 2))
    reply = rtu(0x01, 0x04, 4, u16(2475, 12345))
    radiometer, peer = line([(request, reply)], RADIOMETER_MAP)
    hk = radiometer.read_housekeeping()
    peer.check()
    assert hk.detector_temp_c == pytest.approx(24.75)
    assert hk.supply_v == pytest.approx(12.345)
    assert hk.pressure_hpa is None  # not in this map


def test_a_burst_opens_the_shutter_then_reads_each_sample(line):
    # V1.1b3 sec. 6.5: coil off is 00 00 (on is FF 00); the response echoes the request.
    shutter_open = rtu(0x01, 0x05, u16(3, 0x0000))
    read = rtu(0x01, 0x04, u16(0, 4))
    # int32 high word first: 1234567 = 0x0012D687; 5000000 = 0x004C4B40 (full scale).
    sample_1 = rtu(0x01, 0x04, 8, u16(0x0012, 0xD687, 0x004C, 0x4B40))
    sample_2 = rtu(0x01, 0x04, 8, u16(0x0012, 0xD688, 0x0000, 0x0001))
    radiometer, peer = line([(shutter_open, shutter_open), (read, sample_1),
                             (read, sample_2)], RADIOMETER_MAP)
    burst = radiometer.read_burst(2)
    peer.check()
    assert burst.samples == ((pytest.approx(1.234567), pytest.approx(5.0)),
                             (pytest.approx(1.234568), pytest.approx(1e-6)))
    assert burst.saturated == (False, True)
    assert burst.duration_s >= 0


def test_goto_writes_both_setpoints_in_one_request_then_the_goto_coil(line):
    # V1.1b3 sec. 6.12: 10, start, quantity, byte count, values; the response carries
    # start and quantity. 123.4567 deg at 0.0001 deg/count = 1234567 = 0x0012D687;
    # 45 deg = 450000 = 0x0006DDD0.
    write = rtu(0x02, 0x10, u16(0, 4), 8, u16(0x0012, 0xD687, 0x0006, 0xDDD0))
    written = rtu(0x02, 0x10, u16(0, 4))
    coil_on = rtu(0x02, 0x05, u16(0, 0xFF00))
    tracker, peer = line([(write, written), (coil_on, coil_on)], TRACKER_MAP)
    tracker.goto(123.4567, 45.0)
    peer.check()


def test_state_and_park_by_register_value(line):
    read = rtu(0x02, 0x04, u16(0, 5))
    # az 180.5 deg = 1805000 = 0x001B8AC8, el 30.25 deg = 302500 = 0x00049DA4, status
    # bits tracking (1) and locked (4).
    reply = rtu(0x02, 0x04, 10, u16(0x001B, 0x8AC8, 0x0004, 0x9DA4, 0b10010))
    park = rtu(0x02, 0x06, u16(10, 7))  # 06 Write Single Register (V1.1b3 sec. 6.6)
    tracker, peer = line([(read, reply), (park, park)], TRACKER_MAP)
    state = tracker.state()
    tracker.park()
    peer.check()
    assert state.mode == "tracking" and state.locked
    assert state.azimuth_deg == pytest.approx(180.5)
    assert state.elevation_deg == pytest.approx(30.25)


def test_set_clock_writes_unix_seconds_and_milliseconds(line):
    when = datetime(2027, 2, 15, 12, 0, 0, 250000, tzinfo=UTC)
    seconds = int(when.timestamp())  # 1802692800 = 0x6B72_E8C0
    assert seconds == 0x6B72E8C0
    write = rtu(0x02, 0x10, u16(100, 3), 6, u16(0x6B72, 0xE8C0, 250))
    tracker, peer = line([(write, rtu(0x02, 0x10, u16(100, 3)))], TRACKER_MAP)
    tracker.set_clock(when)
    peer.check()


def test_illegal_data_address_is_a_device_error_naming_the_map(line):
    # V1.1b3 sec. 7: function code + 0x80, then the exception code (02 illegal address).
    request = rtu(0x01, 0x04, u16(20, 2))
    radiometer, peer = line([(request, rtu(0x01, 0x84, 0x02))], RADIOMETER_MAP, retries=2)
    with pytest.raises(DeviceError, match=r"exception 2 \(illegal data address\).*register map"):
        radiometer.read_housekeeping()
    peer.check()  # not retried: asking again cannot help
    assert radiometer.link_counters()["device_errors"] == 1


def test_server_busy_is_retried_and_counted(line):
    request = rtu(0x01, 0x04, u16(20, 2))
    reply = rtu(0x01, 0x04, 4, u16(100, 200))
    radiometer, peer = line([(request, rtu(0x01, 0x84, 0x06)), (request, reply)],
                            RADIOMETER_MAP, retries=1)
    assert radiometer.read_housekeeping().detector_temp_c == pytest.approx(1.0)
    peer.check()
    counters = radiometer.link_counters()
    assert counters["device_errors"] == 1 and counters["retries"] == 1


def test_a_reply_with_a_bad_crc_is_counted_and_asked_again(line):
    request = rtu(0x01, 0x04, u16(20, 2))
    good = rtu(0x01, 0x04, 4, u16(100, 200))
    damaged = good[:-1] + bytes([good[-1] ^ 0x01])
    radiometer, peer = line([(request, damaged), (request, good)], RADIOMETER_MAP, retries=1)
    assert radiometer.read_housekeeping().supply_v == pytest.approx(0.2)
    peer.check()
    counters = radiometer.link_counters()
    assert counters["crc_errors"] == 1 and counters["retries"] == 1


def test_silence_is_a_timeout_then_a_link_error(line):
    request = rtu(0x01, 0x04, u16(20, 2))
    radiometer, peer = line([(request, b""), (request, b"")], RADIOMETER_MAP, retries=1)
    with pytest.raises(LinkError, match="no usable reply .* after 2 attempt"):
        radiometer.read_housekeeping()
    peer.check()
    assert radiometer.link_counters()["timeouts"] == 2


def test_a_port_that_is_gone_is_a_link_error_with_a_hint():
    link = ModbusLink("/dev/heliotrope-no-such-port", 19200, 0.2, 1, RADIOMETER_MAP.link,
                      name="dut", backoff_s=(0.0, 0.0))
    with pytest.raises(LinkError, match="adapter plugged in"):
        ModbusRadiometer(link, RADIOMETER_MAP).read_housekeeping()


def test_no_shutter_in_the_map_says_what_to_change():
    options = {"link": "rtu", "unit_id": 1, "channels": {"registers": [0]}}
    m = check_radiometer_options(options)
    link = ModbusLink("/dev/null", 19200, 0.2, 0, m.link, name="dut")
    with pytest.raises(DeviceError, match="dark_shutter or set acquisition.dark_samples: 0"):
        ModbusRadiometer(link, m).read_dark(3)


def test_park_once_sends_one_request_and_no_retry(line):
    # The stop path: one 06 Write Single Register (V1.1b3 sec. 6.6) even with retries left.
    park = rtu(0x02, 0x06, u16(10, 7))
    tracker, peer = line([(park, b"")], TRACKER_MAP, retries=3)
    with pytest.raises(LinkError, match="after 1 attempt"):
        tracker.park_once(timeout_s=2.0)
    peer.check()
    assert tracker.link_counters()["retries"] == 0


def test_after_shutdown_nothing_more_is_sent(line):
    request = rtu(0x01, 0x04, u16(20, 2))
    reply = rtu(0x01, 0x04, 4, u16(100, 200))
    radiometer, peer = line([(request, reply)], RADIOMETER_MAP, retries=3)
    radiometer.read_housekeeping()
    peer.check()
    radiometer.shutdown(timeout_s=1.0)
    with pytest.raises(LinkError, match="shut down; read 2 input register"):
        radiometer.read_housekeeping()  # the peer's script is used up: a send would fail it
