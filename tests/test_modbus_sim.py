"""The Modbus simulator: the station behind a register map, answered by pymodbus's
own request classes, with the exception codes of Modbus Application Protocol V1.1b3
sec. 7 where the map or the model refuses, and its command line."""

from __future__ import annotations

import asyncio
import subprocess
import sys
import threading
from datetime import UTC, datetime
from pathlib import Path

import pytest
import yaml
from pymodbus.constants import ExcCodes

from drivers.modbus_map import check_radiometer_options, check_tracker_options
from sim_instrument.modbus_server import (
    FrameAssembler,
    ModbusEmulator,
    ModbusFaults,
    RegisterImage,
    load_register_maps,
)
from sim_instrument.model import SimulatedStation
from sim_instrument.scenario import load_scenario
from tests.test_modbus_protocol import rtu

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "config" / "pico-sereno-modbus.yaml"
DATA = yaml.safe_load(CONFIG.read_text())
RAD = check_radiometer_options(DATA["instrument"]["radiometer"]["options"])
TRK = check_tracker_options(DATA["instrument"]["tracker"]["options"])
NOON = datetime(2027, 2, 15, 18, 0, tzinfo=UTC)


@pytest.fixture
def station():
    s = SimulatedStation(load_scenario("pico-sereno-clear"), seed=3, speed=0.0)
    s.set_clock(NOON)
    return s


def _get(image: RegisterImage, fc: int, address: int, count: int):
    return asyncio.run(image.async_getValues(1, fc, address, count))


def _set(image: RegisterImage, fc: int, address: int, values):
    return asyncio.run(image.async_setValues(1, fc, address, values))


def test_an_address_the_map_does_not_name_is_exception_2(station):
    image = RegisterImage("radiometer", station, RAD)
    assert _get(image, 4, 12, 1) == ExcCodes.ILLEGAL_ADDRESS  # after the six channels
    assert _get(image, 3, 0, 2) == ExcCodes.ILLEGAL_ADDRESS  # channels are input registers
    assert _set(image, 5, 7, [True]) == ExcCodes.ILLEGAL_ADDRESS  # not the shutter coil


def test_reading_a_channel_again_takes_a_new_sample(station):
    image = RegisterImage("radiometer", station, RAD)
    first = _get(image, 4, 0, 12)
    again = _get(image, 4, 0, 12)
    assert len(first) == 12 and first != again  # noise: two samples, not one twice
    before = len(station.truth()["readings"])
    _get(image, 4, 0, 2)
    _get(image, 4, 2, 2)  # the rest of the same sample: no new reading
    assert len(station.truth()["readings"]) == before + 1


def test_the_model_refusing_an_elevation_is_exception_3(station):
    image = RegisterImage("tracker", station, TRK)
    # -30 degrees at 0.0001 deg/count as int32, high word first.
    raw = (-300000) & 0xFFFFFFFF
    assert _set(image, 16, 0, [0, 0, raw >> 16, raw & 0xFFFF]) is None  # the setpoint
    assert _set(image, 5, 0, [True]) == ExcCodes.ILLEGAL_VALUE  # goto: below the limit


def test_the_clock_block_sets_the_shared_instrument_clock(station):
    image = RegisterImage("tracker", station, TRK)
    when = datetime(2027, 2, 15, 20, 30, 15, 500000, tzinfo=UTC)
    seconds = int(when.timestamp())
    assert _set(image, 16, 100, [seconds >> 16, seconds & 0xFFFF, 500]) is None
    assert station.now() == when
    assert _get(image, 3, 100, 3) == [seconds >> 16, seconds & 0xFFFF, 500]


def test_a_request_with_a_bad_crc_gets_no_answer(station):
    emulator = ModbusEmulator("radiometer", station, threading.Lock(), RAD, "rtu")
    assembler = emulator.new_assembler()
    # 01 04 00 14 00 06 + CRC (Modbus over Serial Line V1.02 sec. 6.2.2), then damaged.
    frame = rtu(0x01, 0x04, 0x00, 0x14, 0x00, 0x06)
    assert isinstance(assembler, FrameAssembler)
    assert assembler.feed(frame[:-1] + bytes([frame[-1] ^ 0xFF])) == []
    (pdu,) = assembler.feed(frame)
    reply, _ = emulator.handle(pdu)
    assert reply[:3] == bytes([0x01, 0x04, 12])  # 6 registers, 12 bytes (V1.1b3 sec. 6.4)
    emulator.close()


def test_requests_for_another_unit_are_left_to_it(station):
    emulator = ModbusEmulator("tracker", station, threading.Lock(), TRK, "rtu")
    (pdu,) = emulator.new_assembler().feed(bytes.fromhex("010400000001") + bytes.fromhex(
        "31CA"))  # unit 1 on the tracker's (unit 2) line
    assert emulator.handle(pdu) == (None, 0.0)
    emulator.close()


def test_the_modbus_fault_spec_refuses_what_modbus_cannot_tell_apart():
    assert ModbusFaults.parse("drop=0.02,exception=0.01").exception == 0.01
    with pytest.raises(ValueError, match="NAME one of drop, corrupt, truncate, exception"):
        ModbusFaults.parse("stale=0.01")


def test_load_register_maps_names_what_is_wrong(tmp_path):
    assert load_register_maps(CONFIG)[2] == "rtu"
    ref = tmp_path / "ref.yaml"
    ref.write_text((ROOT / "config" / "pico-sereno.yaml").read_text())
    with pytest.raises(ValueError, match="instrument.radiometer.driver is 'reference'"):
        load_register_maps(ref)


@pytest.mark.parametrize("args,message", [
    (["--family", "modbus-rtu"], "needs --register-map"),
    (["--family", "modbus-tcp", "--register-map", str(CONFIG), "--port", "pty"],
     "use --port tcp:PORT"),
    (["--family", "modbus-tcp", "--register-map", str(CONFIG), "--port", "tcp:0"],
     "its link is rtu; serve it with --family modbus-rtu"),
    (["--family", "modbus-rtu", "--register-map", str(CONFIG), "--line-faults", "late=0.1"],
     "Modbus line fault 'late=0.1'"),
])
def test_sim_command_line_errors(args, message):
    proc = subprocess.run([sys.executable, "-m", "sim_instrument", "--scenario",
                           "pico-sereno-clear", *args], capture_output=True, text=True,
                          timeout=60)
    assert proc.returncode == 2
    assert message in proc.stderr
