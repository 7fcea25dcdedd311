"""The simulated station as Modbus devices: RTU on pseudo-terminals, TCP on loopback.

The same :class:`~sim_instrument.model.SimulatedStation` the reference server serves,
behind the register maps of a station's configuration (``drivers.modbus_map``, the
daemon's own parser, so the bench serves exactly the map the daemon reads).
pymodbus does the protocol: its framer cuts requests out of the byte stream and
checks their CRC or MBAP header, its request classes execute themselves against our
register image (:class:`RegisterImage`, the datastore interface pymodbus's own server
uses) and build the responses, and its framer encodes them. The endpoints, the fault
plan and the damage per reply are the reference server's (``sim_instrument/server.py``).

The register image follows the model, it does not copy it:

- a read of channel registers takes one sample (``station.burst(1)``, or
  ``station.dark(1)`` with the shutter coil on) the first time, and a fresh one once a
  register of the current sample is read again, so a burst is N reads;
- a read of housekeeping registers reads ``station.housekeeping()`` once per request;
- the tracker's actual position, status bits and pointing error come from
  ``station.tracker_state()``, one call per request; writing the setpoint (then the
  goto command, if the map has one), the follow and park commands call ``goto``,
  ``follow_sun`` and ``park``;
- the clock block sets and reads the shared instrument clock.

An address the map does not name answers exception 2; a value the model refuses (an
elevation below its limit) answers exception 3 (Modbus Application Protocol V1.1b3
sec. 7).
"""

from __future__ import annotations

import asyncio
import logging
import random
import threading
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import yaml
from pymodbus.client.mixin import ModbusClientMixin
from pymodbus.constants import ExcCodes
from pymodbus.framer import FramerRTU, FramerSocket
from pymodbus.pdu import DecodePDU, ExceptionResponse

from drivers.modbus_map import (
    CLOCK_REGISTERS,
    Command,
    RadiometerMap,
    TrackerMap,
    Value,
    check_radiometer_options,
    check_tracker_options,
)
from sim_instrument.faults import LineFaults, parse_fault_spec

log = logging.getLogger(__name__)

DATATYPE = ModbusClientMixin.DATATYPE
RADIOMETER = "radiometer"
TRACKER = "tracker"
# pymodbus reads back what a write request wrote, with the write's function code.
READ_FUNCTIONS = {1: "coil", 5: "coil", 15: "coil", 3: "holding", 6: "holding",
                  16: "holding", 4: "input"}
WRITE_FUNCTIONS = {5: "coil", 15: "coil", 6: "holding", 16: "holding"}


# ---------------------------------------------------------------------------- faults


@dataclass(frozen=True)
class ModbusFaults:
    """The Modbus flavour of ``--line-faults``: probabilities per reply.

    ``drop`` (no reply: the host times out), ``corrupt`` (one bit flipped: the CRC
    fails), ``truncate`` (the reply cut short), ``exception`` (exception 6, server
    device busy, instead of the answer). The reference flavour's ``garble``, ``stale``
    and ``late`` are refused: Modbus RTU has no request id, so a late reply would be
    taken for the answer to the next request, as it would on a real bus.
    """

    drop: float = 0.0
    corrupt: float = 0.0
    truncate: float = 0.0
    exception: float = 0.0

    @classmethod
    def parse(cls, spec: str) -> ModbusFaults:
        return parse_fault_spec(cls, spec, "Modbus line fault")

    def line(self) -> LineFaults:
        """The part the reference server's damager plays on the reply bytes."""
        return LineFaults(drop=self.drop, corrupt=self.corrupt, truncate=self.truncate)


# ---------------------------------------------------------------------------- maps


def load_register_maps(path: str | Path) -> tuple[RadiometerMap, TrackerMap, str]:
    """The radiometer and tracker maps of a station configuration file, and its link
    kind. Raises ValueError naming the key when the file holds no usable Modbus maps."""
    try:
        data = yaml.safe_load(Path(path).read_text(encoding="utf-8"))
    except (OSError, yaml.YAMLError) as exc:
        raise ValueError(f"--register-map {path}: cannot read it ({exc})") from None
    try:
        inst = data["instrument"]
        maps = []
        for kind, check in ((RADIOMETER, check_radiometer_options),
                            (TRACKER, check_tracker_options)):
            port = inst[kind]
            if port.get("driver") != "modbus":
                raise ValueError(f"--register-map {path}: instrument.{kind}.driver is "
                                 f"{port.get('driver', 'reference')!r}, not 'modbus'")
            try:
                maps.append(check(port.get("options")))
            except ValueError as exc:
                raise ValueError(f"--register-map {path}: instrument.{kind}.options."
                                 f"{exc}") from None
    except (KeyError, TypeError, AttributeError):
        raise ValueError(f"--register-map {path}: no instrument.radiometer and "
                         "instrument.tracker blocks") from None
    radiometer, tracker = maps
    if radiometer.link.kind != tracker.link.kind:
        raise ValueError(f"--register-map {path}: the radiometer is on {radiometer.link.kind}"
                         f" and the tracker on {tracker.link.kind}; the simulator serves one")
    return radiometer, tracker, radiometer.link.kind


def _encode(v: Value, value: float) -> list[int]:
    raw = v.to_raw(value)
    number: float = raw if v.data_type == "float32" else int(raw)
    return ModbusClientMixin.convert_to_registers(number, DATATYPE[v.data_type.upper()],
                                                  word_order=v.word_order)


def _decode(v: Value, registers: Sequence[int]) -> float:
    return v.to_value(float(ModbusClientMixin.convert_from_registers(
        list(registers), DATATYPE[v.data_type.upper()], word_order=v.word_order)))


def _clock_time(registers: Sequence[int]) -> datetime:
    seconds = int(ModbusClientMixin.convert_from_registers(list(registers[:2]),
                                                           DATATYPE.UINT32, "big"))
    return datetime.fromtimestamp(seconds + min(registers[2], 999) / 1000.0, UTC)


def _clock_registers(when: datetime) -> list[int]:
    t = when.timestamp()
    seconds = int(t)
    return ModbusClientMixin.convert_to_registers(seconds, DATATYPE.UINT32, "big") + [
        min(999, int(round((t - seconds) * 1000)))]


class _Refused(Exception):
    def __init__(self, code: ExcCodes) -> None:
        self.code = code


# ---------------------------------------------------------------------------- images


class RegisterImage:
    """What one simulated device shows in its register tables, computed from the
    station when read. Implements the two calls a pymodbus request makes on a server
    context (``async_getValues``, ``async_setValues``); returns ExcCodes to refuse."""

    def __init__(self, kind: str, station: Any, register_map: RadiometerMap | TrackerMap
                 ) -> None:
        self.kind = kind
        self.station = station
        self.map = register_map
        self._sample: dict[int, int] = {}  # input/holding address -> register
        self._consumed: set[tuple[str, int]] = set()
        self.shutter_closed = False
        self._setpoint: dict[int, int] = {}
        self._coils: dict[int, bool] = {}
        self._command_registers: dict[int, int] = {}
        self.channel_addresses: dict[tuple[str, int], tuple[int, int]] = {}
        if isinstance(register_map, RadiometerMap):
            for c, v in enumerate(register_map.channels):
                for i in range(v.count):
                    self.channel_addresses[(v.function, v.address + i)] = (c, i)

    # -- pymodbus's datastore calls

    async def async_getValues(self, device_id: int, func_code: int, address: int,
                              count: int = 1) -> list[int] | list[bool] | ExcCodes:
        table = READ_FUNCTIONS.get(func_code)
        if table is None:
            return ExcCodes.ILLEGAL_FUNCTION
        try:
            return self.read(table, address, count)
        except _Refused as exc:
            return exc.code

    async def async_setValues(self, device_id: int, func_code: int, address: int,
                              values: Sequence[int] | Sequence[bool]) -> ExcCodes | None:
        table = WRITE_FUNCTIONS.get(func_code)
        if table is None:
            return ExcCodes.ILLEGAL_FUNCTION
        try:
            self.write(table, address, list(values))
        except _Refused as exc:
            return exc.code
        except ValueError as exc:
            log.info("%s: refused write at %d: %s", self.kind, address, exc)
            return ExcCodes.ILLEGAL_VALUE
        return None

    # -- reads

    def read(self, table: str, address: int, count: int) -> list[int] | list[bool]:
        wanted = range(address, address + count)
        if table == "coil":
            return [self._coil(a) for a in wanted]
        out: dict[int, int] = {}
        m = self.map
        if m.clock_register is not None and table == "holding" and any(
                m.clock_register <= a < m.clock_register + CLOCK_REGISTERS for a in wanted):
            regs = _clock_registers(self.station.now())
            out.update({m.clock_register + i: r for i, r in enumerate(regs)})
        if isinstance(m, RadiometerMap):
            self._radiometer_read(table, wanted, out)
        else:
            self._tracker_read(table, wanted, out)
        missing = [a for a in wanted if a not in out]
        if missing:
            raise _Refused(ExcCodes.ILLEGAL_ADDRESS)
        return [out[a] for a in wanted]

    def _coil(self, address: int) -> bool:
        m = self.map
        if isinstance(m, RadiometerMap) and address == m.shutter_coil:
            return self.shutter_closed
        if isinstance(m, TrackerMap) and address in _command_coils(m):
            return self._coils.get(address, False)
        raise _Refused(ExcCodes.ILLEGAL_ADDRESS)

    def _radiometer_read(self, table: str, wanted: range, out: dict[int, int]) -> None:
        m = self.map
        assert isinstance(m, RadiometerMap)
        hits = [(table, a) for a in wanted if (table, a) in self.channel_addresses]
        if hits:
            if not self._sample or any(h in self._consumed for h in hits):
                self._draw_sample()
            self._consumed.update(hits)
            for _, a in hits:
                out[a] = self._sample[a]
        hk = [(name, v) for name, v in m.housekeeping if v.function == table and any(
            v.address <= a < v.address + v.count for a in wanted)]
        if hk:
            now = self.station.housekeeping()
            for name, v in hk:
                value = now.get(name)
                if value is None:
                    continue  # no barometer: the register stays unanswered
                for i, r in enumerate(_encode(v, float(value))):
                    out[v.address + i] = r

    def _draw_sample(self) -> None:
        m = self.map
        assert isinstance(m, RadiometerMap)
        samples, _, _ = (self.station.dark(1) if self.shutter_closed else
                         self.station.burst(1))
        self._sample = {}
        self._consumed = set()
        for v, volts in zip(m.channels, samples[0], strict=True):
            for i, r in enumerate(_encode(v, float(volts))):
                self._sample[v.address + i] = r

    def _tracker_read(self, table: str, wanted: range, out: dict[int, int]) -> None:
        m = self.map
        assert isinstance(m, TrackerMap)
        if table == "holding":
            for c in (m.goto, m.follow, m.park):
                if c is not None and c.register in wanted:
                    out[c.register] = self._command_registers.get(c.register, 0)
            for v in (m.setpoint_azimuth, m.setpoint_elevation):
                for i in range(v.count):
                    if v.address + i in wanted:
                        out[v.address + i] = self._setpoint.get(v.address + i, 0)
        state_values = [v for v in (m.actual_azimuth, m.actual_elevation, m.status,
                                    m.pointing_error)
                        if v is not None and v.function == table and any(
                            v.address <= a < v.address + v.count for a in wanted)]
        if not state_values:
            return
        s = self.station.tracker_state()
        bits = 0
        for name, flag in (("moving", s["mode"] == "slewing"),
                           ("tracking", s["mode"] == "tracking"),
                           ("parked", s["mode"] == "parked"),
                           ("fault", s["mode"] == "fault"), ("locked", s["locked"])):
            bit = m.bit(name)
            if bit is not None and flag:
                bits |= 1 << bit
        for v in state_values:
            if v is m.status:
                regs = ModbusClientMixin.convert_to_registers(
                    bits, DATATYPE[v.data_type.upper()], word_order=v.word_order)
            elif v is m.actual_azimuth:
                regs = _encode(v, s["azimuth_deg"])
            elif v is m.actual_elevation:
                regs = _encode(v, s["elevation_deg"])
            else:
                regs = _encode(v, s["error_deg"])
            for i, r in enumerate(regs):
                out[v.address + i] = r

    # -- writes

    def write(self, table: str, address: int, values: list) -> None:
        m = self.map
        if (table == "holding" and m.clock_register == address
                and len(values) == CLOCK_REGISTERS):
            self.station.set_clock(_clock_time(values))
            return
        if isinstance(m, RadiometerMap):
            if table == "coil" and address == m.shutter_coil and len(values) == 1:
                self.shutter_closed = bool(values[0])
                self._sample = {}  # the next read is of the new light
                return
            raise _Refused(ExcCodes.ILLEGAL_ADDRESS)
        self._tracker_write(m, table, address, values)

    def _tracker_write(self, m: TrackerMap, table: str, address: int, values: list) -> None:
        setpoint = {v.address + i for v in (m.setpoint_azimuth, m.setpoint_elevation)
                    for i in range(v.count)}
        if table == "holding" and all(address + i in setpoint for i in range(len(values))):
            for i, r in enumerate(values):
                self._setpoint[address + i] = int(r)
            if m.goto is None:
                self._goto()
            return
        if len(values) != 1:
            raise _Refused(ExcCodes.ILLEGAL_ADDRESS)
        value = values[0]
        for name, cmd in (("goto", m.goto), ("follow", m.follow), ("park", m.park)):
            if cmd is None or not _is(cmd, table, address):
                continue
            on = bool(value) if cmd.coil is not None else int(value) == cmd.on_value
            if cmd.coil is not None:
                self._coils[address] = on
            elif name == "follow" and int(value) not in (cmd.on_value, cmd.off_value):
                raise _Refused(ExcCodes.ILLEGAL_VALUE)
            else:
                self._command_registers[address] = int(value)
            if name == "goto" and on:
                self._goto()
            elif name == "follow":
                self.station.follow_sun(on)
            elif name == "park" and on:
                self.station.park()
            return
        raise _Refused(ExcCodes.ILLEGAL_ADDRESS)

    def _goto(self) -> None:
        m = self.map
        assert isinstance(m, TrackerMap)
        az_v, el_v = m.setpoint_azimuth, m.setpoint_elevation
        az = _decode(az_v, [self._setpoint.get(az_v.address + i, 0) for i in range(az_v.count)])
        el = _decode(el_v, [self._setpoint.get(el_v.address + i, 0) for i in range(el_v.count)])
        self.station.goto(az, el)


def _is(cmd: Command, table: str, address: int) -> bool:
    if cmd.coil is not None:
        return table == "coil" and cmd.coil == address
    return table == "holding" and cmd.register == address


def _command_coils(m: TrackerMap) -> set[int]:
    return {c.coil for c in (m.goto, m.follow, m.park) if c is not None and c.coil is not None}


# ---------------------------------------------------------------------------- devices


class FrameAssembler:
    """Bytes in, request PDUs out, cut by pymodbus's framer (which drops a frame whose
    CRC fails, as a device on the bus does)."""

    def __init__(self, framer: Any) -> None:
        self.framer = framer
        self._buf = b""

    def feed(self, data: bytes) -> list[Any]:
        self._buf += data
        out = []
        while self._buf:
            try:
                used, pdu = self.framer.handleFrame(self._buf, 0, 0)
            except Exception as exc:  # a frame pymodbus cannot decode: skip a byte
                log.debug("undecodable request bytes (%s)", exc)
                used, pdu = 1, None
            if not used:
                break
            self._buf = self._buf[used:]
            if pdu is None:
                break
            out.append(pdu)
        if len(self._buf) > 512:  # never a request: noise
            self._buf = b""
        return out


class ModbusEmulator:
    """One Modbus device of the simulated station, with the interface the reference
    server's endpoints drive (``kind``, ``station``, ``lock``, :meth:`handle`,
    :meth:`reboot`, :meth:`new_assembler`). No I/O."""

    def __init__(self, kind: str, station: Any, lock: threading.Lock, register_map: Any,
                 link: str, *, exception_rate: float = 0.0, seed: int = 0) -> None:
        self.kind = kind
        self.station = station
        self.lock = lock
        self.map = register_map
        self.unit_id = register_map.link.unit_id
        self.image = RegisterImage(kind, station, register_map)
        self._framer_class = FramerSocket if link == "tcp" else FramerRTU
        self._out = self._framer_class(DecodePDU(is_server=False))
        self._loop = asyncio.new_event_loop()
        self.exception_rate = exception_rate
        self._rng = random.Random(seed)
        self.exceptions = 0

    def new_assembler(self) -> FrameAssembler:
        return FrameAssembler(self._framer_class(DecodePDU(is_server=True)))

    def reboot(self) -> None:
        with self.lock:
            if self.kind == RADIOMETER:
                self.station.reset_radiometer()
                self.image.shutter_closed = False
            else:
                self.station.reset_tracker()

    def handle(self, pdu: Any) -> tuple[bytes | None, float]:
        """The response frame to one request PDU (None: not for this unit)."""
        log.debug("%s: unit %d function %d address %s", self.kind, pdu.dev_id,
                  pdu.function_code, getattr(pdu, "address", "-"))
        if pdu.dev_id != self.unit_id:
            return None, 0.0  # another unit on the bus answers that
        if self.exception_rate and self._rng.random() < self.exception_rate:
            self.exceptions += 1
            response = ExceptionResponse(pdu.function_code, ExcCodes.DEVICE_BUSY)
        else:
            with self.lock:
                try:
                    response = self._loop.run_until_complete(
                        pdu.datastore_update(self.image, pdu.dev_id))
                except Exception:
                    log.exception("%s: failed to answer %r", self.kind, pdu)
                    response = ExceptionResponse(pdu.function_code, ExcCodes.DEVICE_FAILURE)
        response.dev_id = pdu.dev_id
        response.transaction_id = pdu.transaction_id
        return self._out.buildFrame(response), 0.0

    def close(self) -> None:
        self._loop.close()


def emulator_factory(radiometer_map: RadiometerMap, tracker_map: TrackerMap, link: str,
                     exception_rate: float = 0.0, seed: int = 0):
    """A ``make_emulator`` for :class:`sim_instrument.server.StationServer`."""

    def make(kind: str, station: Any, lock: threading.Lock, reply_delay_scale: float
             ) -> ModbusEmulator:
        m = radiometer_map if kind == RADIOMETER else tracker_map
        return ModbusEmulator(kind, station, lock, m, link, exception_rate=exception_rate,
                              seed=seed + (kind == TRACKER))

    return make
