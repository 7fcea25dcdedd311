"""The simulated station as text-command instruments: a SCPI voltmeter and a tracker.

The same :class:`~sim_instrument.model.SimulatedStation` the reference simulator serves,
behind two other faces, on the same endpoints (:mod:`sim_instrument.server`'s
pseudo-terminals or loopback TCP, with the same line faults and scheduled events):

**Radiometer: a voltmeter with a channel scanner speaking SCPI.** Program messages end
with LF (IEEE 488.2-1992 sec. 7.5: the program message terminator is NL); message units
are separated by ``;`` and a leading ``:`` roots a header (sec. 7.3, SCPI-1999 Vol. 1
sec. 6.2.4; this instrument writes every header in full, so it does not keep the
"current path" between units). Keywords match in their short or long form
(SCPI-1999 Vol. 1 sec. 6.2.1). Responses are NR3 numbers (IEEE 488.2 sec. 8.7.4)
separated by ``,``, the responses of one message by ``;`` (sec. 8.4.1), ended by LF.
A refused command answers nothing and queues an error for ``SYSTem:ERRor?``
(SCPI-1999 Vol. 2 sec. 21.8).

    *IDN?                          maker,model,serial,firmware (IEEE 488.2 sec. 10.14)
    *RST  *CLS  *OPC?              reset; clear the error queue; answers 1
    SYSTem:DATE y,m,d              set the clock's date (SCPI-1999 Vol. 2 sec. 21.7)
    SYSTem:TIME h,m,s              set the clock's time of day, s may have decimals
    SYSTem:ERRor?                  code,"text"; 0,"No error" when the queue is empty
    SAMPle:COUNt n                 samples per measurement (1-1000)
    SHUTter:CLOSe  SHUTter:OPEN    the dark shutter (our own words: no standard has one)
    MEASure:VOLTage:DC? (@list)    signal channels 101-1NN: COUNt samples of each listed
                                   channel, sample after sample; 204 supply through a
                                   1:4 divider, 205 humidity sensor (10 mV per %RH),
                                   206 barometer (see PRESSURE_* below)
    MEASure:TEMPerature? (@list)   201 detector, 202 case, 203 ambient [degrees C]

**Tracker: a small microcontroller firmware.** Short commands of our own, CR-ended
lines both ways:

    ID                  ID=model;SN=serial;FW=firmware
    T 2027-02-15T13:05:02.125Z      set the clock (ISO 8601, UTC)
    G az el             slew to azimuth, elevation [degrees]   -> OK
    F 1 | F 0           follow the sun on or off               -> OK
    P                   park                                   -> OK
    S                   S=m AZ=az EL=el L=0|1 E=err  (m: I idle, M slewing, T tracking,
                        P parked, F fault)
    errors              E1 unknown command, E2 bad argument, E3 refused by the mount
"""

from __future__ import annotations

import re
import threading
from datetime import UTC, datetime
from typing import Any

from sim_instrument.server import RADIOMETER, TRACKER, DeviceEmulator

MAX_COUNT = 1000
#: Signal channels are 101, 102, ... in the station's channel order.
FIRST_SIGNAL_CHANNEL = 101
TEMPERATURE_CHANNELS = {201: "detector_temp_c", 202: "case_temp_c", 203: "ambient_temp_c"}
SUPPLY_CHANNEL, HUMIDITY_CHANNEL, PRESSURE_CHANNEL = 204, 205, 206
SUPPLY_DIVIDER = 4.0  # the supply is read through a 1:4 divider
HUMIDITY_V_PER_PCT = 0.01
#: The barometer's output: PRESSURE_OFFSET_HPA + volts * PRESSURE_HPA_PER_V.
PRESSURE_OFFSET_HPA = 425.0
PRESSURE_HPA_PER_V = 150.0
#: SCPI's not-a-number (SCPI-1999 Vol. 1 sec. 7.2.1.5): a channel with no sensor.
SCPI_NAN = 9.91e37

TRACKER_MODE_LETTERS = {"idle": "I", "slewing": "M", "tracking": "T", "parked": "P",
                        "fault": "F"}

# SCPI-1999 Vol. 2 sec. 21.8.9-21.8.10 error numbers and texts (from memory of the
# standard's table).
SYNTAX_ERROR = (-102, "Syntax error")
MISSING_PARAMETER = (-109, "Missing parameter")
UNDEFINED_HEADER = (-113, "Undefined header")
PARAMETER_NOT_ALLOWED = (-108, "Parameter not allowed")
SETTINGS_CONFLICT = (-221, "Settings conflict")
DATA_OUT_OF_RANGE = (-222, "Data out of range")
ILLEGAL_PARAMETER = (-224, "Illegal parameter value")
QUEUE_OVERFLOW = (-350, "Queue overflow")
ERROR_QUEUE_LENGTH = 10


class _Refused(Exception):
    def __init__(self, code: int, text: str) -> None:
        super().__init__(text)
        self.code = code
        self.text = text


def _keyword_matches(token: str, spec: str) -> bool:
    """SCPI-1999 Vol. 1 sec. 6.2.1: a keyword matches in its short form (the capitals)
    or its long form, in any case."""
    short = "".join(c for c in spec if not c.islower())
    return token.upper() in (short.upper(), spec.upper())


def _header_matches(header: str, spec: str) -> bool:
    tokens, nodes = header.split(":"), spec.split(":")
    return len(tokens) == len(nodes) and all(_keyword_matches(t, n)
                                             for t, n in zip(tokens, nodes, strict=True))


_CHANNEL_LIST = re.compile(r"\(@\s*([0-9:,\s]+)\)")


def parse_channel_list(text: str) -> list[int]:
    """``(@101:103,105)`` -> [101, 102, 103, 105] (SCPI-1999 Vol. 1 sec. 8.3.2)."""
    m = _CHANNEL_LIST.fullmatch(text.strip())
    if not m:
        raise _Refused(*SYNTAX_ERROR) if text.strip() else _Refused(*MISSING_PARAMETER)
    out: list[int] = []
    for item in m.group(1).split(","):
        lo, sep, hi = item.strip().partition(":")
        if not lo.isdigit() or (sep and not hi.strip().isdigit()):
            raise _Refused(*SYNTAX_ERROR)
        a, b = int(lo), int(hi) if sep else int(lo)
        if b < a or b - a > 100:
            raise _Refused(*DATA_OUT_OF_RANGE)
        out.extend(range(a, b + 1))
    return out


def nr3(value: float) -> str:
    """IEEE 488.2 sec. 8.7.4 NR3: ``+2.34567890E+00``."""
    return f"{value:+.8E}"


class _TextEmulator(DeviceEmulator):
    """A :class:`~sim_instrument.server.DeviceEmulator` with another command set: the
    kind, the station under its lock, counters and reboot are the reference's; only
    :meth:`handle` differs."""

    eol = b"\n"


class ScpiRadiometer(_TextEmulator):
    """The radiometer as a SCPI voltmeter with a scanner. No I/O: lines in, lines out."""

    eol = b"\n"

    def __init__(self, station: Any, lock: threading.Lock,
                 reply_delay_scale: float = 0.0) -> None:
        super().__init__(RADIOMETER, station, lock, reply_delay_scale)

    def _restart_counters(self) -> None:
        super()._restart_counters()
        self.count = 1
        self.shutter_closed = False
        self.error_queue: list[tuple[int, str]] = []

    def _queue(self, code: int, text: str) -> None:
        self.errors += 1
        if len(self.error_queue) < ERROR_QUEUE_LENGTH - 1:
            self.error_queue.append((code, text))
        elif len(self.error_queue) == ERROR_QUEUE_LENGTH - 1:
            self.error_queue.append(QUEUE_OVERFLOW)

    def handle(self, line: bytes | None) -> tuple[bytes | None, float]:
        """The response to one program message and how long to hold it back [s]."""
        self.requests += 1
        if line is None:
            self._queue(*SYNTAX_ERROR)
            return None, 0.0
        try:
            text = line.decode("ascii")
        except UnicodeDecodeError:
            self._queue(*SYNTAX_ERROR)
            return None, 0.0
        if text[:1] in '+-0123456789"':
            return None, 0.0  # our own response echoed back: never answer it
        responses: list[str] = []
        delay_s = 0.0
        try:
            for unit in text.split(";"):
                unit = unit.strip()
                if not unit:
                    continue
                header, _, params = unit.partition(" ")
                answer, unit_delay = self._unit(header.lstrip(":"), params.strip())
                delay_s += unit_delay
                if answer is not None:
                    responses.append(answer)
        except _Refused as exc:
            # The message stops at the refused unit and answers nothing; the error waits
            # in the queue for SYSTem:ERRor?.
            self._queue(exc.code, exc.text)
            return None, 0.0
        if not responses:
            return None, 0.0
        return ";".join(responses).encode("ascii") + self.eol, delay_s

    def _unit(self, header: str, params: str) -> tuple[str | None, float]:
        def is_(spec: str) -> bool:
            return _header_matches(header, spec)

        def no_params() -> None:
            if params:
                raise _Refused(*PARAMETER_NOT_ALLOWED)

        if header.upper() == "*IDN?":
            no_params()
            with self.lock:
                model, serial, firmware = self.station.radiometer_identity()
            return f"HELIOTROPE-SIM,{model},{serial},{firmware}", 0.0
        if header.upper() == "*RST":
            no_params()
            with self.lock:
                self.station.reset_radiometer()
            queue = self.error_queue
            self._restart_counters()
            self.error_queue = queue  # *RST leaves the error queue alone (488.2 10.32)
            return None, 0.0
        if header.upper() == "*CLS":
            no_params()
            self.error_queue = []
            return None, 0.0
        if header.upper() == "*OPC?":
            no_params()
            return "1", 0.0
        if is_("SYSTem:ERRor?") or is_("SYSTem:ERRor:NEXT?"):
            no_params()
            code, text = self.error_queue.pop(0) if self.error_queue else (0, "No error")
            return f'{code:+d},"{text}"', 0.0
        if is_("SYSTem:DATE"):
            y, m, d = self._integers(params, 3)
            self._set_clock(lambda now: now.replace(year=y, month=m, day=d))
            return None, 0.0
        if is_("SYSTem:TIME"):
            h, mi, s = self._numbers(params, 3)
            if s != s or not 0 <= s < 60 or h != int(h) or mi != int(mi):
                raise _Refused(*DATA_OUT_OF_RANGE)
            micro = round((s - int(s)) * 1e6)
            whole = int(s) + micro // 1_000_000
            micro %= 1_000_000
            self._set_clock(lambda now: now.replace(hour=int(h), minute=int(mi),
                                                    second=whole, microsecond=micro))
            return None, 0.0
        if is_("SAMPle:COUNt"):
            (n,) = self._integers(params, 1)
            if not 1 <= n <= MAX_COUNT:
                raise _Refused(*DATA_OUT_OF_RANGE)
            self.count = n
            return None, 0.0
        if is_("SAMPle:COUNt?"):
            no_params()
            return str(self.count), 0.0
        if is_("SHUTter:CLOSe"):
            no_params()
            self.shutter_closed = True
            return None, 0.0
        if is_("SHUTter:OPEN"):
            no_params()
            self.shutter_closed = False
            return None, 0.0
        if is_("MEASure:VOLTage:DC?") or is_("MEASure:VOLTage?"):
            return self._measure_volts(parse_channel_list(params))
        if is_("MEASure:TEMPerature?"):
            channels = parse_channel_list(params)
            if any(c not in TEMPERATURE_CHANNELS for c in channels):
                raise _Refused(*ILLEGAL_PARAMETER)
            with self.lock:
                hk = self.station.housekeeping()
            return ",".join(nr3(hk[TEMPERATURE_CHANNELS[c]]) for c in channels), 0.0
        raise _Refused(*UNDEFINED_HEADER)

    def _set_clock(self, change: Any) -> None:
        with self.lock:
            try:
                self.station.set_clock(change(self.station.now()))
            except ValueError:
                raise _Refused(*DATA_OUT_OF_RANGE) from None

    def _numbers(self, params: str, n: int) -> list[float]:
        items = [p.strip() for p in params.split(",")] if params.strip() else []
        if len(items) < n:
            raise _Refused(*MISSING_PARAMETER)
        if len(items) > n:
            raise _Refused(*PARAMETER_NOT_ALLOWED)
        try:
            return [float(p) for p in items]
        except ValueError:
            raise _Refused(*ILLEGAL_PARAMETER) from None

    def _integers(self, params: str, n: int) -> list[int]:
        values = self._numbers(params, n)
        if any(v != int(v) for v in values):
            raise _Refused(*ILLEGAL_PARAMETER)
        return [int(v) for v in values]

    def _measure_volts(self, channels: list[int]) -> tuple[str, float]:
        with self.lock:
            n_signal = self.station.channel_count()
        signal = range(FIRST_SIGNAL_CHANNEL, FIRST_SIGNAL_CHANNEL + n_signal)
        hk_channels = (SUPPLY_CHANNEL, HUMIDITY_CHANNEL, PRESSURE_CHANNEL)
        if all(c in signal for c in channels):
            with self.lock:
                read = self.station.dark if self.shutter_closed else self.station.burst
                samples, duration_s, _ = read(self.count)
            idx = [c - FIRST_SIGNAL_CHANNEL for c in channels]
            values = [nr3(float(row[i])) for row in samples for i in idx]
            return ",".join(values), max(0.0, duration_s * self.reply_delay_scale)
        if all(c in hk_channels for c in channels):
            with self.lock:
                hk = self.station.housekeeping()
            volts = {SUPPLY_CHANNEL: hk["supply_v"] / SUPPLY_DIVIDER,
                     HUMIDITY_CHANNEL: hk["humidity_pct"] * HUMIDITY_V_PER_PCT,
                     PRESSURE_CHANNEL: (SCPI_NAN if hk["pressure_hpa"] is None else
                                        (hk["pressure_hpa"] - PRESSURE_OFFSET_HPA)
                                        / PRESSURE_HPA_PER_V)}
            return ",".join(nr3(volts[c]) for c in channels), 0.0
        if all(c in signal or c in hk_channels for c in channels):
            raise _Refused(*SETTINGS_CONFLICT)  # one scan reads one card
        raise _Refused(*ILLEGAL_PARAMETER)


class FirmwareTracker(_TextEmulator):
    """The tracker as a small firmware with one-letter commands. No I/O."""

    eol = b"\r"

    def __init__(self, station: Any, lock: threading.Lock,
                 reply_delay_scale: float = 0.0) -> None:
        super().__init__(TRACKER, station, lock, reply_delay_scale)

    def handle(self, line: bytes | None) -> tuple[bytes | None, float]:
        self.requests += 1
        try:
            text = (line or b"").decode("ascii").strip()
        except UnicodeDecodeError:
            text = "\x00"
        if text == "OK" or text[:3] in ("ID=", "S=I", "S=M", "S=T", "S=P", "S=F"):
            return None, 0.0  # our own reply echoed back
        try:
            reply = self._command(text.split())
        except _Refused as exc:
            self.errors += 1
            reply = f"E{exc.code} {exc.text}"
        return reply.encode("ascii") + self.eol, 0.0

    def _command(self, words: list[str]) -> str:
        if not words:
            raise _Refused(1, "unknown command")
        cmd, args = words[0].upper(), words[1:]

        def arity(n: int) -> None:
            if len(args) != n:
                raise _Refused(2, f"{cmd} takes {n} argument{'s' if n != 1 else ''}")

        with self.lock:
            station = self.station
            try:
                if cmd == "ID":
                    arity(0)
                    model, serial, firmware = station.tracker_identity()
                    return f"ID={model};SN={serial};FW={firmware}"
                if cmd == "T":
                    arity(1)
                    station.set_clock(_parse_iso(args[0]))
                    return "OK"
                if cmd == "G":
                    arity(2)
                    station.goto(*(_float(a) for a in args))
                    return "OK"
                if cmd == "F":
                    arity(1)
                    if args[0] not in ("0", "1"):
                        raise _Refused(2, "F takes 0 or 1")
                    station.follow_sun(args[0] == "1")
                    return "OK"
                if cmd == "P":
                    arity(0)
                    station.park()
                    return "OK"
                if cmd == "S":
                    arity(0)
                    s = station.tracker_state()
                    return (f"S={TRACKER_MODE_LETTERS[s['mode']]} AZ={s['azimuth_deg']:.3f} "
                            f"EL={s['elevation_deg']:.3f} L={1 if s['locked'] else 0} "
                            f"E={s['error_deg']:.4f}")
            except ValueError as exc:
                raise _Refused(3, str(exc)) from None
        raise _Refused(1, "unknown command")


def _float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise _Refused(2, f"{text!r} is not a number") from None
    if value != value or value in (float("inf"), float("-inf")):
        raise _Refused(2, f"{text!r} is not a number")
    return value


def _parse_iso(text: str) -> datetime:
    try:
        when = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise _Refused(2, f"{text!r} is not an ISO 8601 time") from None
    if when.tzinfo is None:
        raise _Refused(2, "the time needs its zone (Z for UTC)")
    return when.astimezone(UTC)


def text_emulator(kind: str, station: Any, lock: threading.Lock,
                  reply_delay_scale: float = 0.0) -> _TextEmulator:
    """The text-command device of ``kind`` for :class:`~sim_instrument.server.StationServer`."""
    if kind == RADIOMETER:
        return ScpiRadiometer(station, lock, reply_delay_scale)
    return FirmwareTracker(station, lock, reply_delay_scale)
