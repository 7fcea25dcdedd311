"""Register maps for Modbus radiometers and trackers, read from the configuration.

Pure: no pymodbus, no pyserial. :func:`check_radiometer_options` and
:func:`check_tracker_options` turn the ``options`` block of a port into a frozen
:class:`RadiometerMap` or :class:`TrackerMap`, or raise
:class:`~drivers.interfaces.DriverConfigError` naming the key inside the block. The
driver (:mod:`drivers.modbus`) and the simulator (``sim_instrument/modbus_server.py``)
both work from these objects, so a map the daemon accepts is a map the bench serves.

Addresses are the protocol's 0-based register numbers (what goes in the request
frame), not the 1-based "40001" numbering some data sheets print.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from drivers.interfaces import DriverConfigError, Identity

#: Unit ids a server may have: 0 is broadcast, 248-255 are reserved (Modbus over Serial
#: Line V1.02 sec. 2.2; Modbus Application Protocol V1.1b3 sec. 4.4 for TCP's unit id).
UNIT_ID_RANGE = (1, 247)
#: Highest protocol address: addresses are 16 bits (Modbus Application Protocol V1.1b3
#: sec. 4.4, "addressed from 0 to 65535").
MAX_ADDRESS = 65535
#: Read Input/Holding Registers carry 1 to 125 registers (V1.1b3 secs. 6.3 and 6.4).
MAX_READ_REGISTERS = 125

#: Register tables a value can be read from: input registers (function 04) and
#: holding registers (function 03). Coils (01/05) carry bits only.
REGISTER_FUNCTIONS = ("input", "holding")
#: Data type -> (registers it takes, smallest, largest raw value).
DATA_TYPES: dict[str, tuple[int, float, float]] = {
    "int16": (1, -(2**15), 2**15 - 1),
    "uint16": (1, 0, 2**16 - 1),
    "int32": (2, -(2**31), 2**31 - 1),
    "uint32": (2, 0, 2**32 - 1),
    "float32": (2, -3.4028234663852886e38, 3.4028234663852886e38),
}
#: For 32-bit types: "big" puts the high word at the lower address (the usual reading
#: of V1.1b3 sec. 4.2, big-endian), "little" the low word first.
WORD_ORDERS = ("big", "little")
LINKS = ("rtu", "tcp")
#: The housekeeping values an interface Housekeeping carries; each is optional here.
HOUSEKEEPING_FIELDS = ("detector_temp_c", "case_temp_c", "ambient_temp_c", "supply_v",
                       "humidity_pct", "pressure_hpa")
STATUS_BITS = ("moving", "tracking", "parked", "fault", "locked")
#: A clock block takes three holding registers: Unix seconds as uint32 (big word order)
#: then milliseconds as uint16. Our own layout, written with function 16.
CLOCK_REGISTERS = 3
PARITIES = {"none": "N", "even": "E", "odd": "O"}


@dataclass(frozen=True)
class Value:
    """One number in a register table: raw = registers decoded as ``data_type``;
    value = raw * scale + offset (in the unit of the field that holds it)."""

    function: str  # "input" or "holding"
    address: int
    data_type: str
    word_order: str
    scale: float
    offset: float

    @property
    def count(self) -> int:
        return DATA_TYPES[self.data_type][0]

    def to_value(self, raw: float) -> float:
        return raw * self.scale + self.offset

    def to_raw(self, value: float) -> float:
        """The raw number that reads as ``value`` (for writing setpoints and for the
        simulator), clipped to what the data type holds."""
        raw = (value - self.offset) / self.scale
        _, lo, hi = DATA_TYPES[self.data_type]
        if self.data_type != "float32":
            raw = round(raw)
        return min(max(raw, lo), hi)


@dataclass(frozen=True)
class Command:
    """A command: a coil set on (and, for a switch, off), or a value written to a
    holding register (``on_value`` / ``off_value``)."""

    coil: int | None
    register: int | None
    on_value: int = 1
    off_value: int = 0


@dataclass(frozen=True)
class Link:
    kind: str  # "rtu" or "tcp"
    unit_id: int
    parity: str  # "N", "E", "O" (serial only)
    stopbits: int
    bytesize: int


@dataclass(frozen=True)
class RadiometerMap:
    link: Link
    identity: Identity
    read_device_id: bool  # ask the device (function 43/14) rather than use ``identity``
    channels: tuple[Value, ...]
    full_scale_raw: float  # a raw reading at or beyond this (in magnitude) is saturated
    burst_interval_s: float
    shutter_coil: int | None
    shutter_settle_s: float
    housekeeping: tuple[tuple[str, Value], ...]
    clock_register: int | None


@dataclass(frozen=True)
class TrackerMap:
    link: Link
    identity: Identity
    read_device_id: bool
    setpoint_azimuth: Value
    setpoint_elevation: Value
    actual_azimuth: Value
    actual_elevation: Value
    pointing_error: Value | None
    status: Value
    status_bits: tuple[tuple[str, int], ...]  # name -> bit number, in STATUS_BITS order
    goto: Command | None  # None: writing the setpoints starts the slew
    follow: Command
    park: Command
    clock_register: int | None

    def bit(self, name: str) -> int | None:
        return dict(self.status_bits).get(name)


# ---------------------------------------------------------------------------- reading


class _Block:
    """One mapping of the options block, with its path for messages; every key must be
    read, so a typo is an error rather than a silent default."""

    def __init__(self, raw: Any, path: str) -> None:
        if not isinstance(raw, Mapping):
            raise DriverConfigError(path, f"must be a mapping, got {type(raw).__name__}")
        self.raw = dict(raw)
        self.path = path
        self.seen: set[str] = set()

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def has(self, name: str) -> bool:
        return name in self.raw

    def get(self, name: str, default: Any = ..., ) -> Any:
        self.seen.add(name)
        if name not in self.raw:
            if default is ...:
                raise DriverConfigError(self.key(name), "missing; this key is required")
            return default
        return self.raw[name]

    def integer(self, name: str, lo: int, hi: int, default: Any = ...) -> int:
        value = self.get(name, default)
        if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
            raise DriverConfigError(self.key(name), f"must be an integer from {lo} to {hi}, "
                                    f"got {value!r}")
        return value

    def number(self, name: str, default: Any = ..., *, nonzero: bool = False,
               lo: float = -math.inf) -> float:
        value = self.get(name, default)
        if isinstance(value, bool) or not isinstance(value, int | float) or not \
                math.isfinite(value) or value < lo or (nonzero and value == 0):
            what = "a finite number" + (" other than 0" if nonzero else "") + \
                (f" >= {lo:g}" if lo > -math.inf else "")
            raise DriverConfigError(self.key(name), f"must be {what}, got {value!r}")
        return float(value)

    def choice(self, name: str, choices: Iterable[str], default: Any = ...) -> str:
        choices = tuple(choices)
        value = self.get(name, default)
        if value not in choices:
            raise DriverConfigError(self.key(name), f"must be one of {', '.join(choices)}, "
                                    f"got {value!r}")
        return value

    def text(self, name: str, default: Any = ...) -> str:
        value = self.get(name, default)
        if isinstance(value, int | float) and not isinstance(value, bool):
            value = str(value)
        if not isinstance(value, str) or not re.fullmatch(r"[ -~]{1,64}", value):
            raise DriverConfigError(self.key(name), "must be printable text of 1-64 "
                                    f"characters, got {value!r}")
        return value

    def block(self, name: str, default: Any = ...) -> _Block | None:
        value = self.get(name, default)
        if value is None:
            return None
        return _Block(value, self.key(name))

    def done(self) -> None:
        unknown = sorted(set(self.raw) - self.seen)
        if unknown:
            raise DriverConfigError(self.key(unknown[0]), "unknown key; known here: "
                                    + ", ".join(sorted(self.seen)))


@dataclass(frozen=True)
class _Format:
    function: str
    data_type: str
    word_order: str
    scale: float
    offset: float

    def at(self, b: _Block, key: str, address: int) -> Value:
        count = DATA_TYPES[self.data_type][0]
        if address + count - 1 > MAX_ADDRESS:
            raise DriverConfigError(b.key(key), f"{self.data_type} at {address} runs past "
                                    f"the last address {MAX_ADDRESS}")
        return Value(self.function, address, self.data_type, self.word_order, self.scale,
                     self.offset)


def _format(b: _Block, unit: str = "", functions: tuple[str, ...] = REGISTER_FUNCTIONS,
            function: str | None = None, scale: Any = ...) -> _Format:
    """How the values of ``b`` are encoded: table, data type, word order, scale and
    offset (``scale<unit>``, ``offset<unit>``), and an optional ``count`` that must fit."""
    if function is None:
        function = b.choice("function", functions, functions[0] if len(functions) == 1
                            else "input")
    data_type = b.choice("data_type", DATA_TYPES, "uint16")
    count = DATA_TYPES[data_type][0]
    word_order = b.choice("word_order", WORD_ORDERS, "big")
    if b.has("count"):
        given = b.integer("count", 1, MAX_READ_REGISTERS)
        if given != count:
            raise DriverConfigError(b.key("count"), f"{given} register(s) do not fit data "
                                    f"type {data_type}, which takes {count}")
    if scale is ...:
        scale = b.number("scale" + unit, 1.0, nonzero=True)
    offset = b.number("offset" + unit, 0.0)
    return _Format(function, data_type, word_order, scale, offset)


def _address(b: _Block, key: str) -> int:
    return b.integer(key, 0, MAX_ADDRESS)


def _link(b: _Block) -> Link:
    kind = b.choice("link", LINKS)
    unit_id = b.integer("unit_id", *UNIT_ID_RANGE)
    serial = b.block("serial", {})
    assert serial is not None
    # 8 data bits, even parity, 1 stop bit is the default of Modbus over Serial Line
    # V1.02 sec. 2.5.1; no parity needs 2 stop bits there, but many modules ship 8N1.
    parity = PARITIES[serial.choice("parity", PARITIES, "even")]
    stopbits = serial.integer("stopbits", 1, 2, 1)
    bytesize = serial.integer("bytesize", 7, 8, 8)
    serial.done()
    if kind == "tcp" and serial.raw:
        raise DriverConfigError(b.key("serial"), "a tcp link has no serial settings; remove "
                                "the block or use link: rtu")
    return Link(kind, unit_id, parity, stopbits, bytesize)


def _identity(b: _Block, kind: str) -> tuple[Identity, bool]:
    read_device_id = b.get("read_device_id", False)
    if not isinstance(read_device_id, bool):
        raise DriverConfigError(b.key("read_device_id"), "must be true or false, got "
                                f"{read_device_id!r}")
    ident = b.block("identity", {})
    assert ident is not None
    fixed = Identity(ident.text("model", f"modbus {kind}"), ident.text("serial", "unknown"),
                          ident.text("firmware", "unknown"))
    ident.done()
    return fixed, read_device_id


def _command(b: _Block, name: str, switch: bool, default: Any = ...) -> Command | None:
    c = b.block(name, default)
    if c is None:
        return None
    if c.has("coil") == c.has("register"):
        raise DriverConfigError(c.path, "give either coil: ADDRESS or register: ADDRESS "
                                "(with value)")
    if c.has("coil"):
        cmd = Command(coil=c.integer("coil", 0, MAX_ADDRESS), register=None)
    else:
        on = c.integer("on_value" if switch else "value", 0, 65535, 1)
        off = c.integer("off_value", 0, 65535, 0) if switch else 0
        if switch and on == off:
            raise DriverConfigError(c.key("off_value"), f"must differ from on_value ({on})")
        cmd = Command(coil=None, register=c.integer("register", 0, MAX_ADDRESS),
                      on_value=on, off_value=off)
    c.done()
    return cmd


def _clock(b: _Block) -> int | None:
    c = b.block("clock", None)
    if c is None:
        return None
    address = c.integer("register", 0, MAX_ADDRESS - CLOCK_REGISTERS + 1)
    c.done()
    return address


class _Occupancy:
    """Which addresses of which table are taken, and by which key: two keys on one
    register would read each other's numbers."""

    def __init__(self) -> None:
        self.taken: dict[tuple[str, int], str] = {}

    def claim(self, table: str, address: int, count: int, key: str) -> None:
        for a in range(address, address + count):
            other = self.taken.get((table, a))
            if other is not None:
                raise DriverConfigError(key, f"{table} register {a} is also used by {other}; "
                                        "every value needs registers of its own")
            self.taken[(table, a)] = key

    def value(self, v: Value, key: str) -> None:
        self.claim(v.function, v.address, v.count, key)

    def command(self, c: Command | None, key: str) -> None:
        if c is None:
            return
        if c.coil is not None:
            self.claim("coil", c.coil, 1, key)
        else:
            assert c.register is not None
            self.claim("holding", c.register, 1, key)


def _top(options: Any) -> _Block:
    if options is None:
        raise DriverConfigError("", "a modbus driver needs an options block with its "
                                "register map (README, 'Supported hardware')")
    return _Block(options, "")


# ---------------------------------------------------------------------------- the checks


def check_radiometer_options(options: Any) -> RadiometerMap:
    """The radiometer's register map from its ``options`` block."""
    top = _top(options)
    link = _link(top)
    identity, read_device_id = _identity(top, "radiometer")
    taken = _Occupancy()

    ch = top.block("channels")
    assert ch is not None
    registers = ch.get("registers")
    if not isinstance(registers, list) or not registers:
        raise DriverConfigError(ch.key("registers"), "must be a list with one register "
                                "address per channel, in the order of instrument.channels")
    scales = ch.get("scale_v", 1.0)
    if not isinstance(scales, list):
        scales = [scales] * len(registers)
    elif len(scales) != len(registers):
        raise DriverConfigError(ch.key("scale_v"), f"lists {len(scales)} scales for "
                                f"{len(registers)} registers; give one each, or one number")
    channels = []
    for i, (address, scale) in enumerate(zip(registers, scales, strict=True)):
        one = _Block({"registers": address, "scale_v": scale}, f"{ch.path}")
        if isinstance(address, bool) or not isinstance(address, int) or not \
                0 <= address <= MAX_ADDRESS:
            raise DriverConfigError(f"{ch.key('registers')}[{i}]", "must be a register address "
                                    f"0-{MAX_ADDRESS}, got {address!r}")
        scale = one.number("scale_v", nonzero=True)
        fmt = _format(ch, unit="_v", scale=scale)
        v = fmt.at(ch, f"registers[{i}]", address)
        taken.value(v, f"{ch.key('registers')}[{i}]")
        channels.append(v)
    _, lo, hi = DATA_TYPES[channels[0].data_type]
    full_scale = ch.number("full_scale_raw", hi, lo=0.0, nonzero=True)
    if full_scale > max(abs(lo), hi):
        raise DriverConfigError(ch.key("full_scale_raw"), f"{full_scale:g} is beyond what "
                                f"{channels[0].data_type} holds ({hi:g})")
    ch.done()

    interval = top.number("burst_interval_s", 0.1, lo=0.0)
    if interval > 60:
        raise DriverConfigError(top.key("burst_interval_s"), f"{interval:g} s between "
                                "samples is more than a minute; give seconds, 0-60")

    shutter = top.block("dark_shutter", None)
    coil, settle = None, 0.0
    if shutter is not None:
        coil = shutter.integer("coil", 0, MAX_ADDRESS)
        settle = shutter.number("settle_s", 0.2, lo=0.0)
        shutter.done()
        taken.claim("coil", coil, 1, shutter.key("coil"))

    hk_list = []
    hk = top.block("housekeeping", {})
    assert hk is not None
    hk_function = hk.choice("function", REGISTER_FUNCTIONS, "input")
    for name in HOUSEKEEPING_FIELDS:
        sub = hk.block(name, None)
        if sub is None:
            continue
        v = _format(sub, function=hk_function).at(sub, "register", _address(sub, "register"))
        sub.done()
        taken.value(v, sub.key("register"))
        hk_list.append((name, v))
    hk.done()

    clock = _clock(top)
    if clock is not None:
        taken.claim("holding", clock, CLOCK_REGISTERS, top.key("clock.register"))
    top.done()
    return RadiometerMap(link, identity, read_device_id, tuple(channels), full_scale,
                         interval, coil, settle, tuple(hk_list), clock)


def check_tracker_options(options: Any) -> TrackerMap:
    """The tracker's register map from its ``options`` block."""
    top = _top(options)
    link = _link(top)
    identity, read_device_id = _identity(top, "tracker")
    taken = _Occupancy()

    def pair(name: str, functions: tuple[str, ...]) -> tuple[Value, Value]:
        b = top.block(name)
        assert b is not None
        fmt = _format(b, unit="_deg", functions=functions)
        out = []
        for axis in ("azimuth", "elevation"):
            v = fmt.at(b, axis, _address(b, axis))
            taken.value(v, b.key(axis))
            out.append(v)
        b.done()
        return out[0], out[1]

    set_az, set_el = pair("setpoint", ("holding",))
    act_az, act_el = pair("actual", REGISTER_FUNCTIONS)

    pe = top.block("pointing_error", None)
    pointing_error = None
    if pe is not None:
        pointing_error = _format(pe, unit="_deg").at(pe, "register", _address(pe, "register"))
        pe.done()
        taken.value(pointing_error, pe.key("register"))

    st = top.block("status")
    assert st is not None
    status = _format(st).at(st, "register", _address(st, "register"))
    if status.data_type not in ("uint16", "uint32"):
        raise DriverConfigError(st.key("data_type"), f"status bits need uint16 or uint32, "
                                f"got {status.data_type}")
    taken.value(status, st.key("register"))
    bits_block = st.block("bits")
    assert bits_block is not None
    width = 16 * status.count
    bits: list[tuple[str, int]] = []
    for name in STATUS_BITS:
        required = name in ("moving", "locked")
        if not required and not bits_block.has(name):
            bits_block.seen.add(name)
            continue
        bit = bits_block.integer(name, 0, width - 1)
        for other, b in bits:
            if b == bit:
                raise DriverConfigError(bits_block.key(name), f"bit {bit} is also {other}")
        bits.append((name, bit))
    bits_block.done()
    st.done()

    commands = top.block("commands")
    assert commands is not None
    goto = _command(commands, "goto", switch=False, default=None)
    follow = _command(commands, "follow", switch=True)
    park = _command(commands, "park", switch=False)
    commands.done()
    assert follow is not None and park is not None
    for name, c in (("goto", goto), ("follow", follow), ("park", park)):
        taken.command(c, commands.key(name))

    clock = _clock(top)
    if clock is not None:
        taken.claim("holding", clock, CLOCK_REGISTERS, top.key("clock.register"))
    top.done()
    return TrackerMap(link, identity, read_device_id, set_az, set_el, act_az, act_el,
                      pointing_error, status, tuple(bits), goto, follow, park, clock)
