"""Modbus radiometers and trackers: a register map (drivers/modbus_map.py) over pymodbus.

pymodbus builds and checks every frame (RTU on a serial line with its CRC, or TCP with
its MBAP header); this module decides what to read and write, and treats the link as
drivers/transport.py treats the reference protocol: one request at a time under a
lock, a bounded number of attempts of the configured timeout each, faults counted by
kind (:meth:`ModbusLink.counters`) and a port that vanished reopened with back-off.
Timeouts, CRC errors, exception responses and a vanished adapter are LinkErrors once
the attempts are spent; none is fatal.

The exception codes that say the request itself is wrong (1 illegal function, 2
illegal data address, 3 illegal data value; Modbus Application Protocol V1.1b3
sec. 7) are not retried: asking again cannot help, and the message points at the
register map. They are DeviceErrors.
"""

from __future__ import annotations

import contextlib
import dataclasses
import logging
import math
import threading
import time
from collections.abc import Callable, Sequence
from datetime import datetime
from typing import Any

from pymodbus.client import ModbusSerialClient, ModbusTcpClient
from pymodbus.client.mixin import ModbusClientMixin
from pymodbus.exceptions import ModbusException
from pymodbus.framer import FramerRTU

from drivers.interfaces import (
    Burst,
    DeviceError,
    Housekeeping,
    Identity,
    LinkError,
    Radiometer,
    Tracker,
    TrackerState,
)
from drivers.modbus_map import (
    MAX_READ_REGISTERS,
    Command,
    Link,
    RadiometerMap,
    TrackerMap,
    Value,
)
from drivers.transport import PORT_FAILURES, LinkCounters, LinkShutDown, LinkTimeout

log = logging.getLogger(__name__)
# pymodbus logs each timeout or refused open as an ERROR ("No response received ...")
# although we retry it; this module logs every fault with what became of it and counts
# it, so only pymodbus's own failures (CRITICAL) pass. Lower it to debug pymodbus.
logging.getLogger("pymodbus.logging").setLevel(logging.CRITICAL)

DATATYPE = ModbusClientMixin.DATATYPE
#: Exception codes that mean "this request is wrong" (V1.1b3 sec. 7): not retried.
REQUEST_ERRORS = {1: "illegal function", 2: "illegal data address", 3: "illegal data value"}
EXCEPTION_NAMES = {**REQUEST_ERRORS, 4: "server device failure", 5: "acknowledge",
                   6: "server device busy", 8: "memory parity error",
                   10: "gateway path unavailable", 11: "gateway target failed to respond"}
#: Most samples one burst may ask for (as the reference protocol allows).
MAX_SAMPLES = 1000


class ExceptionResponse(LinkError):
    """The device answered with a Modbus exception that may pass (busy, failure)."""


class CrcError(LinkError):
    """Bytes came back, but no frame with a good CRC."""


def decode(v: Value, registers: Sequence[int]) -> float:
    """The raw number ``registers`` hold as ``v.data_type`` (pymodbus's conversion)."""
    return float(ModbusClientMixin.convert_from_registers(
        list(registers), DATATYPE[v.data_type.upper()], word_order=v.word_order))


def encode(v: Value, raw: float) -> list[int]:
    """The registers that hold ``raw`` as ``v.data_type``."""
    number: float = raw if v.data_type == "float32" else int(raw)
    return ModbusClientMixin.convert_to_registers(
        number, DATATYPE[v.data_type.upper()], word_order=v.word_order)


@dataclasses.dataclass(frozen=True)
class Span:
    """One read request: ``count`` registers of ``function`` from ``address``."""

    function: str
    address: int
    count: int


def spans(values: Sequence[Value]) -> list[Span]:
    """Contiguous runs of ``values`` as few read requests as the protocol allows.

    Only registers next to each other are merged: reading an address the map does not
    name can draw exception 2 from a device with holes in its map."""
    out: list[Span] = []
    for v in sorted(values, key=lambda v: (v.function, v.address)):
        last = out[-1] if out else None
        if (last and last.function == v.function and last.address + last.count == v.address
                and last.count + v.count <= MAX_READ_REGISTERS):
            out[-1] = Span(v.function, last.address, last.count + v.count)
        else:
            out.append(Span(v.function, v.address, v.count))
    return out


def clock_registers(when: datetime) -> list[int]:
    """``when`` as the clock block: Unix seconds (uint32, high word first), then ms."""
    if when.tzinfo is None:
        raise ValueError(f"set_clock needs a timezone-aware UTC time, got {when!r}")
    t = when.timestamp()
    seconds = int(math.floor(t))
    ms = min(999, int(round((t - seconds) * 1000)))
    return ModbusClientMixin.convert_to_registers(seconds, DATATYPE.UINT32, "big") + [ms]


ClientFactory = Callable[..., Any]


def _make_client(url: str, baudrate: int, timeout_s: float, link: Link,
                 trace_packet: Callable[[bool, bytes], bytes]) -> Any:
    if link.kind == "tcp":
        host, sep, port = url.rpartition(":")
        if not sep or not port.isdigit() or not host:
            raise ValueError(f"a Modbus TCP port is HOST:PORT (e.g. 192.168.1.20:502), got "
                             f"{url!r}")
        return ModbusTcpClient(host, port=int(port), timeout=timeout_s, retries=0,
                               trace_packet=trace_packet)
    return ModbusSerialClient(url, baudrate=baudrate, parity=link.parity,
                              stopbits=link.stopbits, bytesize=link.bytesize,
                              timeout=timeout_s, retries=0, trace_packet=trace_packet)


class ModbusLink:
    """Requests to one unit over one pymodbus client, with our retries and counters.

    Parameters as for :class:`drivers.transport.Transport`; ``link`` is the map's link
    block (rtu or tcp, unit id, serial framing). ``client_factory`` makes the pymodbus
    client (tests may substitute one). A request returns or raises within about
    ``(retries + 1) * (timeout_s + backoff_s[1])``.
    """

    def __init__(self, url: str, baudrate: int, timeout_s: float, retries: int, link: Link,
                 *, name: str, backoff_s: tuple[float, float] = (0.25, 5.0),
                 client_factory: ClientFactory = _make_client) -> None:
        if not url:
            raise ValueError("empty port: give a device path such as /dev/ttyUSB0, or "
                             "HOST:PORT for Modbus TCP")
        if timeout_s <= 0 or retries < 0:
            raise ValueError(f"timeout_s {timeout_s} must be > 0 and retries {retries} >= 0")
        self.url = url
        self.baudrate = baudrate
        self.timeout_s = timeout_s
        self.retries = retries
        self.link = link
        self.name = name
        self._backoff_first_s, self._backoff_max_s = backoff_s
        self._factory = client_factory
        self._client: Any = None
        self._failed = False  # the port failed: the next successful open is a reconnect
        self._failures = 0
        self._rx = b""  # what came back during the current attempt, for classifying
        self._lock = threading.Lock()
        self._stopping = threading.Event()
        self._counters = LinkCounters()

    @property
    def counters(self) -> LinkCounters:
        return dataclasses.replace(self._counters)

    def _trace(self, sending: bool, data: bytes) -> bytes:
        if sending:
            log.debug("%s > %s", self.name, data.hex(" "))
        else:
            self._rx = bytes(data)
            log.debug("%s < %s", self.name, data.hex(" "))
        return data

    def _open(self) -> Any:
        if self._client is None:
            try:
                self._client = self._factory(self.url, self.baudrate, self.timeout_s,
                                             self.link, self._trace)
            except ValueError as exc:
                raise DeviceError(f"{self.name}: {exc}") from None
        if not self._client.connect():
            self._drop()
            self._failed = True
            where = ("is the device powered and on the network, and is HOST:PORT right? "
                     "For the simulator: is heliotrope-sim running?"
                     if self.link.kind == "tcp" else
                     "is the adapter plugged in? List ports with "
                     "'python -m serial.tools.list_ports -v'")
            raise LinkError(f"{self.name}: cannot open {self.url}: {where}")
        if self._failed:
            self._failed = False
            self._counters.reconnects += 1
            log.warning("%s: port reopened", self.name)
        return self._client

    def _drop(self) -> None:
        client, self._client = self._client, None
        if client is not None:
            with contextlib.suppress(Exception):
                client.close()

    def close(self) -> None:
        with self._lock:
            self._drop()

    def shutdown(self, timeout_s: float = 1.0) -> None:
        self._stopping.set()
        got = self._lock.acquire(timeout=timeout_s)
        try:
            self._drop()
        finally:
            if got:
                self._lock.release()

    def _attempt(self, what: str, call: Callable[[Any], Any]) -> Any:
        if self._stopping.is_set():
            raise LinkShutDown(f"{self.name}: shut down; {what} not sent")
        client = self._open()
        self._rx = b""
        try:
            response = call(client)
        except ModbusException as exc:
            # pymodbus says "no response" both for silence and for bytes it could not
            # frame; the bytes it saw tell which.
            if not client.connected:
                raise ConnectionError(str(exc)) from exc
            if self._rx and self.link.kind == "rtu" and not _crc_ok(self._rx):
                self._counters.crc_errors += 1
                raise CrcError(f"{self.name}: {what}: reply failed its CRC "
                               f"({len(self._rx)} bytes)") from exc
            if self._rx:
                self._counters.garbage += 1
            self._counters.timeouts += 1
            raise LinkTimeout(f"{self.name}: no valid reply to {what} within "
                              f"{self.timeout_s:g} s") from exc
        if response.isError():
            code = int(getattr(response, "exception_code", 0))
            self._counters.device_errors += 1
            text = EXCEPTION_NAMES.get(code, "unknown exception")
            if code in REQUEST_ERRORS:
                raise DeviceError(
                    f"{self.name}: unit {self.link.unit_id} refused {what} with exception "
                    f"{code} ({text}): check the register map in instrument.*.options "
                    "against the device's manual (addresses are 0-based)")
            raise ExceptionResponse(f"{self.name}: {what}: exception {code} ({text})")
        return response

    def request(self, what: str, call: Callable[[Any], Any], *, once: bool = False) -> Any:
        """``call(client)`` with the retry policy; returns the pymodbus response."""
        with self._lock:
            last: Exception | None = None
            tries = 1 if once else self.retries + 1
            for attempt in range(tries):
                if attempt:
                    self._counters.retries += 1
                    log.info("%s: %s attempt %d of %d after: %s", self.name, what,
                             attempt + 1, tries, last)
                try:
                    response = self._attempt(what, call)
                except (LinkShutDown, DeviceError):
                    raise
                except (LinkTimeout, CrcError, ExceptionResponse) as exc:
                    last = exc
                    continue
                except (LinkError, ConnectionError, *PORT_FAILURES) as exc:
                    log.warning("%s: port failed during %s (%s); will reopen", self.name,
                                what, exc)
                    self._drop()
                    self._failed = True
                    self._failures += 1
                    last = exc
                    if not once:
                        self._back_off()
                    continue
                self._counters.exchanges += 1
                self._failures = 0
                return response
        raise LinkError(f"{self.name}: no usable reply to {what} after {tries} attempt(s) "
                        f"(last: {last})") from last

    def _back_off(self) -> None:
        doublings = min(max(0, self._failures - 1), 64)
        self._stopping.wait(min(self._backoff_max_s, self._backoff_first_s * 2.0**doublings))

    # ---------------------------------------------------------------- operations

    def read(self, span: Span) -> list[int]:
        unit = self.link.unit_id

        def call(c: Any) -> Any:
            fn = c.read_input_registers if span.function == "input" else \
                c.read_holding_registers
            return fn(span.address, count=span.count, device_id=unit)

        response = self.request(f"read {span.count} {span.function} register(s) at "
                                f"{span.address}", call)
        registers = list(response.registers)
        if len(registers) != span.count:
            self._counters.garbage += 1
            raise LinkError(f"{self.name}: asked for {span.count} registers at "
                            f"{span.address}, got {len(registers)}")
        return registers

    def read_values(self, values: Sequence[Value]) -> list[float]:
        """The raw numbers of ``values`` (in their order), in as few requests as fit."""
        got: dict[tuple[str, int], int] = {}
        for span in spans(values):
            for i, reg in enumerate(self.read(span)):
                got[(span.function, span.address + i)] = reg
        return [decode(v, [got[(v.function, v.address + i)] for i in range(v.count)])
                for v in values]

    def write_registers(self, address: int, registers: list[int], what: str) -> None:
        unit = self.link.unit_id
        self.request(what, lambda c: c.write_registers(address, registers, device_id=unit))

    def write_coil(self, address: int, on: bool, what: str, *, once: bool = False) -> None:
        unit = self.link.unit_id
        self.request(what, lambda c: c.write_coil(address, on, device_id=unit), once=once)

    def command(self, cmd: Command, on: bool, what: str, *, once: bool = False) -> None:
        if cmd.coil is not None:
            self.write_coil(cmd.coil, on, what, once=once)
            return
        assert cmd.register is not None
        value = cmd.on_value if on else cmd.off_value
        unit = self.link.unit_id
        self.request(what, lambda c: c.write_register(cmd.register, value, device_id=unit),
                     once=once)

    def device_identification(self) -> dict[int, str]:
        """Basic device identification objects (function 43/14, V1.1b3 sec. 6.21)."""
        unit = self.link.unit_id
        response = self.request("read device identification",
                                lambda c: c.read_device_information(read_code=1, object_id=0,
                                                                    device_id=unit))
        return {k: (v.decode("ascii", "replace") if isinstance(v, bytes) else str(v))
                for k, v in dict(response.information).items()}

    def set_clock(self, register: int | None, when: datetime) -> None:
        if register is not None:
            self.write_registers(register, clock_registers(when), "set clock")
        elif when.tzinfo is None:
            raise ValueError(f"set_clock needs a timezone-aware UTC time, got {when!r}")


def _crc_ok(frame: bytes) -> bool:
    if len(frame) < 4:
        return False
    return FramerRTU.check_CRC(frame[:-2], int.from_bytes(frame[-2:], "big"))


def _identity(link: ModbusLink, fixed: Any, read_device_id: bool) -> Identity:
    if not read_device_id:
        return Identity(fixed.model, fixed.serial, fixed.firmware)
    info = link.device_identification()
    model = " ".join(x for x in (info.get(0, ""), info.get(1, "")) if x) or fixed.model
    return Identity(model, fixed.serial, info.get(2, fixed.firmware))


class _OnLink:
    """What both Modbus devices do with their link."""

    link: ModbusLink

    def link_counters(self) -> dict[str, int]:
        return dataclasses.asdict(self.link.counters)

    def close(self) -> None:
        self.link.close()

    def shutdown(self, timeout_s: float = 1.0) -> None:
        self.link.shutdown(timeout_s)


class ModbusRadiometer(_OnLink, Radiometer):
    """A radiometer whose channels are registers of a Modbus analog-input device."""

    def __init__(self, link: ModbusLink, register_map: RadiometerMap, *,
                 sleep: Callable[[float], None] | None = None) -> None:
        self.link = link
        self.map = register_map
        self._sleep = sleep or link._stopping.wait
        self._shutter_closed: bool | None = None  # unknown until we set it

    def identify(self) -> Identity:
        identity = _identity(self.link, self.map.identity, self.map.read_device_id)
        # One read of the channels, so a device that does not hold them says so now.
        self.link.read_values(self.map.channels[:1])
        return identity

    def channel_count(self) -> int:
        return len(self.map.channels)

    def set_clock(self, when: datetime) -> None:
        self.link.set_clock(self.map.clock_register, when)

    def _shutter(self, closed: bool) -> None:
        assert self.map.shutter_coil is not None
        self.link.write_coil(self.map.shutter_coil, closed,
                             "close shutter" if closed else "open shutter")
        self._shutter_closed = closed

    def read_burst(self, n: int) -> Burst:
        if self.map.shutter_coil is not None and self._shutter_closed is not False:
            self._shutter(False)
            self._sleep(self.map.shutter_settle_s)
        return self._samples(n)

    def read_dark(self, n: int) -> Burst:
        if self.map.shutter_coil is None:
            raise DeviceError(f"{self.link.name}: no dark shutter in the register map; add "
                              "options.dark_shutter or set acquisition.dark_samples: 0")
        self._shutter(True)
        self._sleep(self.map.shutter_settle_s)
        burst = self._samples(n)
        with contextlib.suppress(LinkError):
            self._shutter(False)  # read_burst opens it if this did not
        return burst

    def _samples(self, n: int) -> Burst:
        if not 1 <= n <= MAX_SAMPLES:
            raise ValueError(f"a burst of {n} samples: 1-{MAX_SAMPLES} allowed")
        full = self.map.full_scale_raw
        rows: list[tuple[float, ...]] = []
        saturated = [False] * len(self.map.channels)
        times: list[float] = []
        start = time.monotonic()
        for i in range(n):
            due = start + i * self.map.burst_interval_s
            wait = due - time.monotonic()
            if wait > 0:
                self._sleep(wait)
            times.append(time.monotonic())
            raws = self.link.read_values(self.map.channels)
            for c, raw in enumerate(raws):
                if abs(raw) >= full:
                    saturated[c] = True
            rows.append(tuple(v.to_value(raw) for v, raw in zip(self.map.channels, raws,
                                                                strict=True)))
        return Burst(tuple(rows), times[-1] - times[0], tuple(saturated))

    def read_housekeeping(self) -> Housekeeping:
        names = [name for name, _ in self.map.housekeeping]
        values = [v for _, v in self.map.housekeeping]
        raws = self.link.read_values(values) if values else []
        got = {name: v.to_value(raw) for name, v, raw in zip(names, values, raws, strict=True)}
        nan = math.nan
        return Housekeeping(
            detector_temp_c=got.get("detector_temp_c", nan),
            case_temp_c=got.get("case_temp_c", nan),
            ambient_temp_c=got.get("ambient_temp_c", nan),
            supply_v=got.get("supply_v", nan),
            humidity_pct=got.get("humidity_pct", nan),
            pressure_hpa=got.get("pressure_hpa"),
        )

    def reset(self) -> None:
        # Modbus has no reset of its own: start the link afresh.
        self.link.close()
        self._shutter_closed = None


class ModbusTracker(_OnLink, Tracker):
    """A two-axis tracker behind a motion controller with a Modbus register map."""

    def __init__(self, link: ModbusLink, register_map: TrackerMap) -> None:
        self.link = link
        self.map = register_map

    def identify(self) -> Identity:
        identity = _identity(self.link, self.map.identity, self.map.read_device_id)
        self.link.read_values([self.map.status])
        return identity

    def set_clock(self, when: datetime) -> None:
        self.link.set_clock(self.map.clock_register, when)

    def goto(self, azimuth_deg: float, elevation_deg: float) -> None:
        if not (math.isfinite(azimuth_deg) and math.isfinite(elevation_deg)):
            raise ValueError(f"goto({azimuth_deg}, {elevation_deg}): angles must be finite")
        m = self.map
        writes = [(m.setpoint_azimuth, encode(m.setpoint_azimuth,
                                              m.setpoint_azimuth.to_raw(azimuth_deg % 360.0))),
                  (m.setpoint_elevation, encode(m.setpoint_elevation,
                                                m.setpoint_elevation.to_raw(elevation_deg)))]
        writes.sort(key=lambda w: w[0].address)
        first, second = writes
        if first[0].address + first[0].count == second[0].address:
            self.link.write_registers(first[0].address, first[1] + second[1], "write setpoint")
        else:
            for v, regs in writes:
                self.link.write_registers(v.address, regs, "write setpoint")
        if m.goto is not None:
            self.link.command(m.goto, True, "goto")

    def follow_sun(self, on: bool) -> None:
        self.link.command(self.map.follow, on, "follow sun on" if on else "follow sun off")

    def state(self) -> TrackerState:
        m = self.map
        values = [m.actual_azimuth, m.actual_elevation, m.status]
        if m.pointing_error is not None:
            values.append(m.pointing_error)
        raws = self.link.read_values(values)
        az = m.actual_azimuth.to_value(raws[0]) % 360.0
        el = m.actual_elevation.to_value(raws[1])
        bits = int(raws[2])

        def flag(name: str) -> bool:
            bit = m.bit(name)
            return bit is not None and bool(bits >> bit & 1)

        if flag("fault"):
            mode = "fault"
        elif flag("moving"):
            mode = "slewing"
        elif flag("parked"):
            mode = "parked"
        elif flag("tracking"):
            mode = "tracking"
        else:
            mode = "idle"
        locked = flag("locked")
        error = m.pointing_error.to_value(raws[3]) if m.pointing_error is not None and \
            locked else 0.0
        return TrackerState(mode, az, el, locked, error)

    def park(self) -> None:
        self.link.command(self.map.park, True, "park")

    def park_once(self, timeout_s: float = 2.0) -> None:
        self.link.command(self.map.park, True, "park", once=True)


def open_radiometer(url: str, baudrate: int, timeout_s: float, retries: int,
                    options: RadiometerMap) -> ModbusRadiometer:
    """A :class:`ModbusRadiometer` on ``url``; the port opens on the first request."""
    return ModbusRadiometer(ModbusLink(url, baudrate, timeout_s, retries, options.link,
                                       name="radiometer"), options)


def open_tracker(url: str, baudrate: int, timeout_s: float, retries: int,
                 options: TrackerMap) -> ModbusTracker:
    """A :class:`ModbusTracker` on ``url``; the port opens on the first request."""
    return ModbusTracker(ModbusLink(url, baudrate, timeout_s, retries, options.link,
                                    name="tracker"), options)
