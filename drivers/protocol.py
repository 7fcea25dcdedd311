"""The heliotrope line protocol: a pure codec, no I/O.

One request or reply per line of printable ASCII ending in CR LF (CR or LF alone is
accepted on input). Requests are short enough to type at a terminal::

    [#<rid> ]<CMD>[ <arg>...][*<crc>]

Replies always carry the request id and a checksum::

    #<rid> OK <CMD> <field>...*<CRC>
    #<rid> ERR <code> <text>*<CRC>

``<crc>`` is CRC-16/CCITT-FALSE (``binascii.crc_hqx(data, 0xFFFF)``) over every byte
before the ``*``, written as four hexadecimal digits. The request id is 0 to 65535; a
request typed without one is answered with id 0. drivers/PROTOCOL.md is the reference
for every command, field, unit and error code; the tests check its examples against
this module.

Exceptions raised by the decoders:

- :class:`FrameError` (a :class:`~drivers.interfaces.LinkError`): the line is not a
  well-formed reply (noise, truncation, wrong shape).
- :class:`ChecksumError` (a LinkError): the checksum does not match.
- :class:`StaleReply` (a LinkError): a good reply to an earlier request; discard it
  and keep reading.
- :class:`ErrorReply` (a :class:`~drivers.interfaces.DeviceError`): the device answered
  ``ERR``; carries ``code`` and ``text``.
- :class:`BadPayload` (a DeviceError): a good reply whose fields make no sense.
- :class:`BadRequest` (a ValueError, raised on the device side by
  :func:`decode_request` and the argument parsers): carries the error code, text and
  the request id to answer with.
"""

from __future__ import annotations

import binascii
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from enum import IntEnum

from drivers.interfaces import (
    Burst,
    DeviceError,
    Housekeeping,
    Identity,
    LinkError,
    TrackerState,
)

# ---------------------------------------------------------------------------- constants

EOL = b"\r\n"
RID_MAX = 65535
#: Longest line either side will accept [bytes]; a burst of MAX_SAMPLES on 16 channels
#: fits with room to spare.
MAX_LINE_BYTES = 200_000
#: Longest request a device accepts [bytes, without the end of line].
MAX_REQUEST_BYTES = 256
#: Longest field of an OK reply [characters]. The longest the protocol sends is a time
#: (24); the rest is room for long model or firmware names. A longer field is a frame
#: error, so no number of thousands of digits ever reaches int() or float().
MAX_FIELD_CHARS = 64
#: Most digits of a whole-number field: 18 fit in a signed 64-bit integer, and any
#: such count converts to a float exactly enough.
MAX_INT_DIGITS = 18
#: Longest ERR text kept [characters]; a longer one is cut (the code is what counts).
MAX_ERROR_TEXT_CHARS = 200
#: Longest burst or dark a device accepts [samples].
MAX_SAMPLES = 1000
#: Slowest sample period a device may have; drivers size their timeouts from it [s].
MAX_SAMPLE_PERIOD_S = 0.2
#: Characters one burst value may take on the wire, with its separating space.
VALUE_CHARS = 14
#: Reply time of every command except BURST, DARK and RST [s].
MAX_REPLY_S = 0.5
#: Reply time of RST [s].
MAX_RESET_S = 2.0

# Device kinds as the ID reply names them.
KIND_RADIOMETER = "RAD"
KIND_TRACKER = "TRK"

# Command names.
ID = "ID"
CLK = "CLK"
STATUS = "STATUS"
BURST = "BURST"
DARK = "DARK"
HK = "HK"
RST = "RST"
GOTO = "GOTO"
SUN = "SUN"
PARK = "PARK"

RADIOMETER_COMMANDS = frozenset({ID, CLK, STATUS, BURST, DARK, HK, RST})
TRACKER_COMMANDS = frozenset({ID, CLK, STATUS, GOTO, SUN, PARK})

#: Radiometer states in its STATUS reply.
RADIOMETER_STATES = ("READY", "BUSY", "FAULT")
#: Tracker modes on the wire; the driver reports them lower-case (interfaces.TrackerState).
TRACKER_MODES = ("IDLE", "SLEWING", "TRACKING", "PARKED", "FAULT")
#: Written in place of a pressure when no barometer is fitted.
NOT_FITTED = "-"

#: GOTO limits [degrees].
AZIMUTH_RANGE_DEG = (0.0, 360.0)  # 0 <= az < 360, from north, clockwise
ELEVATION_RANGE_DEG = (0.0, 90.0)  # inclusive


class Code(IntEnum):
    """Error codes of ``ERR`` replies (PROTOCOL.md, "Error codes")."""

    SYNTAX = 10  # the request line is malformed
    CHECKSUM = 11  # the request carried a checksum and it is wrong
    UNKNOWN = 12  # no such command on this device
    ARGUMENT = 13  # wrong number, format or range of arguments
    BUSY = 20  # still working on something else; try again
    NOT_READY = 21  # not ready: not locked, not homed, not initialised
    HARDWARE = 30  # hardware fault; a person should look


#: Codes after which the same request may simply be sent again: the request was
#: damaged in transit or the device was momentarily busy.
RETRYABLE_CODES = frozenset({Code.SYNTAX, Code.CHECKSUM, Code.BUSY})

_RID_RE = re.compile(r"#(\d{1,5})")
_CMD_RE = re.compile(r"[A-Z][A-Z0-9]{0,11}")
_CRC_RE = re.compile(r"[0-9A-Fa-f]{4}")
_ERR_CODE_RE = re.compile(r"[0-9]{1,5}")
_INT_RE = re.compile(rf"[0-9]{{1,{MAX_INT_DIGITS}}}")
# Plain decimal as PROTOCOL.md writes numbers: no digit separators ('1_0.5' is not
# 10.5), no 'nan' or 'inf' spellings, no hexadecimal, at most a 3-digit exponent.
_FLOAT_RE = re.compile(r"[+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]{1,3})?")

# ---------------------------------------------------------------------------- exceptions


class ProtocolError(LinkError):
    """A line that is not a usable reply. ``line`` holds the bytes as received."""

    def __init__(self, message: str, line: bytes = b"") -> None:
        super().__init__(message)
        self.line = line

    def __str__(self) -> str:
        return str(self.args[0])


class FrameError(ProtocolError):
    """Not a well-formed reply: noise, a truncated line, or the wrong shape."""


class ChecksumError(ProtocolError):
    """The reply's checksum does not match its content."""


class StaleReply(ProtocolError):
    """A well-formed reply to some other request id (a late answer to an old request)."""

    def __init__(self, rid: int, expected_rid: int, line: bytes = b"") -> None:
        super().__init__(f"reply to request #{rid} while waiting for #{expected_rid}", line)
        self.rid = rid
        self.expected_rid = expected_rid


class ErrorReply(DeviceError):
    """The device answered ``ERR <code> <text>``."""

    def __init__(self, rid: int, code: int, text: str) -> None:
        try:
            name = Code(code).name
        except ValueError:
            name = "UNLISTED"
        super().__init__(f"device error {code} ({name}): {text}")
        self.rid = rid
        self.code = code
        self.name = name
        self.text = text

    @property
    def retryable(self) -> bool:
        return self.code in RETRYABLE_CODES


class BadPayload(DeviceError):
    """A well-formed reply whose fields do not have the documented shape."""


class BadRequest(ValueError):
    """Device side: a request that must be answered with ``ERR``.

    ``rid`` is the id to answer with: the request's own when it could be read, else 0.
    """

    def __init__(self, code: Code, text: str, rid: int = 0) -> None:
        super().__init__(text)
        self.code = code
        self.text = text
        self.rid = rid


# ---------------------------------------------------------------------------- framing


@dataclass(frozen=True)
class Request:
    rid: int
    cmd: str
    args: tuple[str, ...] = ()
    had_crc: bool = False


@dataclass(frozen=True)
class Reply:
    rid: int
    cmd: str
    fields: tuple[str, ...] = ()


def crc16(data: bytes) -> int:
    """CRC-16/CCITT-FALSE of ``data`` (polynomial 0x1021, initial value 0xFFFF)."""
    return binascii.crc_hqx(data, 0xFFFF)


def _seal(body: str) -> bytes:
    raw = body.encode("ascii")
    return raw + b"*%04X" % crc16(raw) + EOL


def _check_token(token: str, what: str) -> str:
    if not token or not token.isascii() or not token.isprintable() or "*" in token or any(
        ch.isspace() for ch in token
    ):
        raise ValueError(f"{what} {token!r} must be printable ASCII without spaces or '*'")
    return token


def _check_rid(rid: int) -> int:
    if not 0 <= rid <= RID_MAX:
        raise ValueError(f"request id {rid} is outside 0..{RID_MAX}")
    return rid


def token(text: str) -> str:
    """Make free text (a model name, say) into one field: spaces and '*' become '_'."""
    cleaned = "".join(
        ch if ch.isascii() and ch.isprintable() and not ch.isspace() and ch != "*" else "_"
        for ch in str(text)
    )
    return cleaned or "_"


def _text(text: str) -> str:
    """Free text for the end of an ERR reply: one line of printable ASCII, no '*'."""
    cleaned = "".join(
        ch if ch.isascii() and ch.isprintable() and ch != "*" else " " for ch in str(text)
    )
    return " ".join(cleaned.split()) or "-"


def encode_request(rid: int, cmd: str, args: Sequence[str] = ()) -> bytes:
    """The request line ``#<rid> <CMD> <args>*<CRC>`` CR LF, as a machine sends it."""
    _check_rid(rid)
    if not _CMD_RE.fullmatch(cmd):
        raise ValueError(f"command {cmd!r} must be 1-12 upper-case letters and digits")
    parts = [f"#{rid}", cmd, *(_check_token(str(a), "argument") for a in args)]
    return _seal(" ".join(parts))


def encode_reply(rid: int, cmd: str, fields: Sequence[str] = ()) -> bytes:
    """The reply line ``#<rid> OK <CMD> <fields>*<CRC>`` CR LF."""
    _check_rid(rid)
    if not _CMD_RE.fullmatch(cmd):
        raise ValueError(f"command {cmd!r} must be 1-12 upper-case letters and digits")
    parts = [f"#{rid}", "OK", cmd, *(_check_token(str(f), "field") for f in fields)]
    return _seal(" ".join(parts))


def encode_error(rid: int, code: int, text: str) -> bytes:
    """The reply line ``#<rid> ERR <code> <text>*<CRC>`` CR LF."""
    _check_rid(rid)
    return _seal(f"#{rid} ERR {int(code)} {_text(text)}")


def _strip_eol(line: bytes | str) -> bytes:
    if isinstance(line, str):
        line = line.encode("ascii", errors="replace")
    return line.rstrip(b"\r\n")


def _split_crc(raw: bytes) -> tuple[bytes, str | None]:
    """(body, crc digits or None). Raises ValueError with a reason when malformed."""
    star = raw.rfind(b"*")
    if star < 0:
        return raw, None
    if raw.count(b"*") > 1:
        raise ValueError("more than one '*' in the line")
    digits = raw[star + 1 :].decode("ascii", errors="replace")
    if not _CRC_RE.fullmatch(digits):
        raise ValueError(f"checksum {digits!r} is not four hexadecimal digits")
    return raw[:star], digits


def decode_request(line: bytes | str) -> Request:
    """Device side: parse one request line.

    Raises
    ------
    BadRequest
        With ``Code.SYNTAX`` or ``Code.CHECKSUM`` and the id to answer with.
    """
    raw = _strip_eol(line)
    salvaged = _salvage_rid(raw)
    if len(raw) > MAX_REQUEST_BYTES:
        raise BadRequest(
            Code.SYNTAX, f"request longer than {MAX_REQUEST_BYTES} bytes; shorten it", salvaged
        )
    try:
        body, digits = _split_crc(raw)
    except ValueError as exc:
        raise BadRequest(Code.SYNTAX, str(exc), salvaged) from None
    if digits is not None and int(digits, 16) != crc16(body):
        raise BadRequest(
            Code.CHECKSUM,
            f"checksum {digits.upper()} does not match {crc16(body):04X}; resend",
            salvaged,
        )
    try:
        text = body.decode("ascii")
    except UnicodeDecodeError:
        raise BadRequest(Code.SYNTAX, "request is not plain ASCII", salvaged) from None
    if not text.isprintable():
        raise BadRequest(Code.SYNTAX, "request has control characters", salvaged)
    words = text.split()
    rid = 0
    if words and words[0].startswith("#"):
        match = _RID_RE.fullmatch(words[0])
        if not match or int(match.group(1)) > RID_MAX:
            raise BadRequest(Code.SYNTAX, f"request id must be #0 to #{RID_MAX}", 0)
        rid = int(match.group(1))
        words = words[1:]
    if not words:
        raise BadRequest(Code.SYNTAX, "no command in the request", rid)
    cmd = words[0].upper()
    if not _CMD_RE.fullmatch(cmd):
        raise BadRequest(Code.SYNTAX, f"{words[0]!r} is not a command name", rid)
    return Request(rid, cmd, tuple(words[1:]), digits is not None)


def _salvage_rid(raw: bytes) -> int:
    match = re.match(rb"\s*#(\d{1,5})(?:\s|\*|$)", raw)
    if match and int(match.group(1)) <= RID_MAX:
        return int(match.group(1))
    return 0


def decode_reply(line: bytes | str, expected_rid: int, expected_cmd: str | None = None) -> Reply:
    """Host side: parse one reply line and check it answers request ``expected_rid``.

    Returns the :class:`Reply` of an ``OK`` line.

    Raises
    ------
    FrameError
        Not a well-formed reply (or an OK for a different command than ``expected_cmd``),
        including a line longer than ``MAX_LINE_BYTES``, a field of an OK reply longer
        than ``MAX_FIELD_CHARS`` and an ERR code that is not 1 to 5 digits.
    ChecksumError
        The checksum does not match.
    StaleReply
        A good reply carrying another request id.
    ErrorReply
        A good ``ERR`` reply to this request.
    """
    raw = _strip_eol(line)
    if len(raw) > MAX_LINE_BYTES:
        raise FrameError(
            f"not a reply line: {len(raw)} bytes, longer than {MAX_LINE_BYTES}", raw[:80]
        )
    try:
        body, digits = _split_crc(raw)
    except ValueError as exc:
        raise FrameError(f"not a reply line: {exc}", raw) from None
    if digits is None:
        raise FrameError("not a reply line: no checksum (truncated or noise)", raw)
    if int(digits, 16) != crc16(body):
        raise ChecksumError(
            f"reply checksum {digits.upper()} does not match {crc16(body):04X}", raw
        )
    try:
        text = body.decode("ascii")
    except UnicodeDecodeError:
        raise FrameError("not a reply line: not plain ASCII", raw) from None
    if not text.isprintable():
        raise FrameError("not a reply line: control characters", raw)
    words = text.split(" ")
    match = _RID_RE.fullmatch(words[0])
    if not match or int(match.group(1)) > RID_MAX or len(words) < 3:
        raise FrameError("not a reply line: expected '#<id> OK|ERR ...'", raw)
    rid = int(match.group(1))
    if rid != expected_rid:
        raise StaleReply(rid, expected_rid, raw)
    status = words[1]
    if status == "ERR":
        if not _ERR_CODE_RE.fullmatch(words[2]):
            raise FrameError(f"error reply with a code {words[2][:20]!r} that is not "
                             "1 to 5 digits", raw)
        text = " ".join(words[3:])
        if len(text) > MAX_ERROR_TEXT_CHARS:
            text = f"{text[:MAX_ERROR_TEXT_CHARS]}... (cut from {len(text)} characters)"
        raise ErrorReply(rid, int(words[2]), text)
    if status != "OK" or not _CMD_RE.fullmatch(words[2]) or "" in words:
        raise FrameError("not a reply line: expected '#<id> OK <CMD> <fields>'", raw)
    longest = max(len(w) for w in words)
    if longest > MAX_FIELD_CHARS:
        raise FrameError(f"not a reply line: a field of {longest} characters, longer than "
                         f"{MAX_FIELD_CHARS}", raw)
    if expected_cmd is not None and words[2] != expected_cmd:
        raise FrameError(f"reply is for {words[2]}, the request was {expected_cmd}", raw)
    return Reply(rid, words[2], tuple(words[3:]))


# ---------------------------------------------------------------------------- payloads
# One pair per reply shape: *_fields() builds the fields a device sends, parse_*()
# turns them back into the interface types. Both sides use these, so the wire format
# lives here only.


def _shown(text: str) -> str:
    """``text`` for a message: a field from a hostile device may be any length."""
    return repr(text) if len(text) <= MAX_FIELD_CHARS else f"{text[:20]!r}... ({len(text)} chars)"


def _float(text: str, what: str) -> float:
    # Checked here as well as in decode_reply: other drivers call the parsers with
    # fields of their own.
    if len(text) > MAX_FIELD_CHARS or not _FLOAT_RE.fullmatch(text):
        raise BadPayload(f"{what} {_shown(text)} is not a plain decimal number")
    value = float(text)
    if not math.isfinite(value):
        raise BadPayload(f"{what} {_shown(text)} is too large for a number")
    return value


def _int(text: str, what: str) -> int:
    if not _INT_RE.fullmatch(text):
        raise BadPayload(f"{what} {_shown(text)} is not a whole number of 1 to "
                         f"{MAX_INT_DIGITS} digits")
    return int(text)


def _need(fields: Sequence[str], n: int, what: str) -> None:
    if len(fields) != n:
        raise BadPayload(f"{what} reply has {len(fields)} fields, expected {n}")


def format_volts(value_v: float) -> str:
    """A sample value [V] with 7 significant digits."""
    if not math.isfinite(value_v):
        raise ValueError(f"sample value {value_v!r} is not finite")
    return f"{value_v:.7g}"


def format_time(when: datetime) -> str:
    """ISO 8601 UTC with milliseconds, ``2024-06-21T18:00:00.000Z``."""
    if when.tzinfo is None or when.utcoffset() is None:
        raise ValueError(f"time {when!r} has no time zone; give UTC")
    utc = when.astimezone(UTC)
    return utc.strftime("%Y-%m-%dT%H:%M:%S.") + f"{utc.microsecond // 1000:03d}Z"


def parse_time(text: str) -> datetime:
    """Inverse of :func:`format_time`; accepts any ISO 8601 time with a UTC offset of 0.

    Raises ValueError with the reason.
    """
    try:
        when = datetime.fromisoformat(text)
    except ValueError:
        raise ValueError(f"time {text!r} is not ISO 8601 (like 2024-06-21T18:00:00Z)") from None
    if when.tzinfo is None or when.utcoffset() is None:
        raise ValueError(f"time {text!r} has no zone; end it with Z (UTC)")
    if when.utcoffset().total_seconds() != 0:
        raise ValueError(f"time {text!r} is not UTC; give it in UTC ending with Z")
    return when.astimezone(UTC)


def parse_clock(fields: Sequence[str]) -> datetime:
    """The time of a CLK reply (UTC). Raises BadPayload when it is not one ISO 8601 UTC time."""
    _need(fields, 1, "CLK")
    try:
        return parse_time(fields[0])
    except (ValueError, OverflowError) as exc:
        # OverflowError: a year at the edge of datetime's range cannot be moved to UTC.
        raise BadPayload(f"CLK reply: {exc}") from None


def identity_fields(kind: str, identity: Identity, channel_count: int | None = None) -> list[str]:
    fields = [kind, token(identity.model), token(identity.serial), token(identity.firmware)]
    if kind == KIND_RADIOMETER:
        if channel_count is None or channel_count < 1:
            raise ValueError("a radiometer's ID reply needs its channel count (1 or more)")
        fields.append(str(channel_count))
    return fields


def parse_identity(fields: Sequence[str]) -> tuple[str, Identity, int | None]:
    """(kind, identity, channel count or None for a tracker) from an ID reply."""
    if not fields:
        raise BadPayload("ID reply has no fields")
    kind = fields[0]
    if kind == KIND_RADIOMETER:
        _need(fields, 5, "radiometer ID")
        count = _int(fields[4], "channel count")
        if count < 1:
            raise BadPayload("radiometer reports 0 channels")
        return kind, Identity(fields[1], fields[2], fields[3]), count
    if kind == KIND_TRACKER:
        _need(fields, 4, "tracker ID")
        return kind, Identity(fields[1], fields[2], fields[3]), None
    raise BadPayload(f"ID reply names an unknown device kind {kind!r}")


def burst_fields(burst: Burst) -> list[str]:
    """Fields of a BURST or DARK reply: n, c, duration [ms], flags, n*c values [V]."""
    n = len(burst.samples)
    c = len(burst.saturated)
    if c < 1:
        raise ValueError("a burst needs at least one channel")
    if any(len(row) != c for row in burst.samples):
        raise ValueError(f"every sample row must have {c} values")
    if not math.isfinite(burst.duration_s) or burst.duration_s < 0:
        raise ValueError(f"burst duration {burst.duration_s!r} s must be finite, >= 0")
    flags = "".join("1" if s else "0" for s in burst.saturated)
    values = [format_volts(v) for row in burst.samples for v in row]
    return [str(n), str(c), str(round(burst.duration_s * 1000)), flags, *values]


def parse_burst(fields: Sequence[str]) -> Burst:
    if len(fields) < 4:
        raise BadPayload(f"burst reply has {len(fields)} fields, expected at least 4")
    n = _int(fields[0], "sample count")
    c = _int(fields[1], "channel count")
    duration_ms = _int(fields[2], "duration [ms]")
    flags = fields[3]
    if c < 1 or len(flags) != c or set(flags) - {"0", "1"}:
        raise BadPayload(f"saturation flags {flags!r} do not match {c} channels")
    _need(fields, 4 + n * c, f"{n}x{c} burst")
    values = [_float(v, "sample value") for v in fields[4:]]
    samples = tuple(tuple(values[i * c : (i + 1) * c]) for i in range(n))
    return Burst(samples, duration_ms / 1000.0, tuple(f == "1" for f in flags))


def housekeeping_fields(hk: Housekeeping) -> list[str]:
    pressure = NOT_FITTED if hk.pressure_hpa is None else f"{hk.pressure_hpa:.1f}"
    return [
        f"{hk.detector_temp_c:.2f}",
        f"{hk.case_temp_c:.2f}",
        f"{hk.ambient_temp_c:.2f}",
        f"{hk.supply_v:.3f}",
        f"{hk.humidity_pct:.1f}",
        pressure,
    ]


def parse_housekeeping(fields: Sequence[str]) -> Housekeeping:
    _need(fields, 6, "HK")
    pressure = None if fields[5] == NOT_FITTED else _float(fields[5], "pressure [hPa]")
    return Housekeeping(
        detector_temp_c=_float(fields[0], "detector temperature [degC]"),
        case_temp_c=_float(fields[1], "case temperature [degC]"),
        ambient_temp_c=_float(fields[2], "ambient temperature [degC]"),
        supply_v=_float(fields[3], "supply [V]"),
        humidity_pct=_float(fields[4], "humidity [%]"),
        pressure_hpa=pressure,
    )


def tracker_state_fields(state: TrackerState) -> list[str]:
    mode = state.mode.upper()
    if mode not in TRACKER_MODES:
        raise ValueError(f"tracker mode {state.mode!r} is not one of {TRACKER_MODES}")
    return [
        mode,
        f"{state.azimuth_deg:.4f}",
        f"{state.elevation_deg:.4f}",
        "1" if state.locked else "0",
        f"{state.error_deg:.4f}",
    ]


def parse_tracker_state(fields: Sequence[str]) -> TrackerState:
    _need(fields, 5, "tracker STATUS")
    if fields[0] not in TRACKER_MODES:
        raise BadPayload(f"tracker mode {fields[0]!r} is not one of {TRACKER_MODES}")
    if fields[3] not in ("0", "1"):
        raise BadPayload(f"lock flag {fields[3]!r} is not 0 or 1")
    return TrackerState(
        mode=fields[0].lower(),
        azimuth_deg=_float(fields[1], "azimuth [deg]"),
        elevation_deg=_float(fields[2], "elevation [deg]"),
        locked=fields[3] == "1",
        error_deg=_float(fields[4], "pointing error [deg]"),
    )


@dataclass(frozen=True)
class RadiometerStatus:
    state: str  # one of RADIOMETER_STATES
    uptime_s: int  # since power-up or the last RST
    requests: int  # requests answered since then
    errors: int  # of which answered with ERR


def radiometer_status_fields(status: RadiometerStatus) -> list[str]:
    if status.state not in RADIOMETER_STATES:
        raise ValueError(f"radiometer state {status.state!r} is not one of {RADIOMETER_STATES}")
    return [status.state, str(status.uptime_s), str(status.requests), str(status.errors)]


def parse_radiometer_status(fields: Sequence[str]) -> RadiometerStatus:
    _need(fields, 4, "radiometer STATUS")
    if fields[0] not in RADIOMETER_STATES:
        raise BadPayload(f"radiometer state {fields[0]!r} is not one of {RADIOMETER_STATES}")
    return RadiometerStatus(
        fields[0],
        _int(fields[1], "uptime [s]"),
        _int(fields[2], "request count"),
        _int(fields[3], "error count"),
    )


# ---------------------------------------------------------------------------- arguments
# Device side: each returns the typed arguments or raises BadRequest(ARGUMENT).


def _arg_error(req: Request, text: str) -> BadRequest:
    return BadRequest(Code.ARGUMENT, text, req.rid)


def parse_samples_arg(req: Request) -> int:
    """``BURST <n>`` / ``DARK <n>``: 1 <= n <= MAX_SAMPLES."""
    if len(req.args) != 1 or not _INT_RE.fullmatch(req.args[0]):
        raise _arg_error(req, f"usage: {req.cmd} <samples 1-{MAX_SAMPLES}>")
    n = int(req.args[0])
    if not 1 <= n <= MAX_SAMPLES:
        raise _arg_error(req, f"samples {n} outside 1-{MAX_SAMPLES}")
    return n


def parse_clock_arg(req: Request) -> datetime | None:
    """``CLK`` (query, None) or ``CLK <ISO 8601 UTC>`` (set)."""
    if not req.args:
        return None
    if len(req.args) != 1:
        raise _arg_error(req, "usage: CLK [<time like 2024-06-21T18:00:00Z>]")
    try:
        return parse_time(req.args[0])
    except ValueError as exc:
        raise _arg_error(req, str(exc)) from None


def parse_goto_args(req: Request) -> tuple[float, float]:
    """``GOTO <azimuth deg> <elevation deg>``, range-checked."""
    usage = "usage: GOTO <azimuth 0-360 deg> <elevation 0-90 deg>"
    if len(req.args) != 2 or not all(
        len(a) <= MAX_FIELD_CHARS and _FLOAT_RE.fullmatch(a) for a in req.args
    ):
        raise _arg_error(req, usage)
    az, el = float(req.args[0]), float(req.args[1])
    if not (AZIMUTH_RANGE_DEG[0] <= az < AZIMUTH_RANGE_DEG[1]):
        raise _arg_error(req, f"azimuth {req.args[0]} outside 0 <= az < 360 deg")
    if not (ELEVATION_RANGE_DEG[0] <= el <= ELEVATION_RANGE_DEG[1]):
        raise _arg_error(req, f"elevation {req.args[1]} outside 0-90 deg")
    return az, el


def parse_sun_arg(req: Request) -> bool:
    """``SUN 1`` (follow the sun) or ``SUN 0`` (stop)."""
    if len(req.args) != 1 or req.args[0] not in ("0", "1"):
        raise _arg_error(req, "usage: SUN 1 (follow the sun) or SUN 0 (stop)")
    return req.args[0] == "1"


def parse_no_args(req: Request) -> None:
    if req.args:
        raise _arg_error(req, f"{req.cmd} takes no arguments")


def format_angle_deg(value_deg: float) -> str:
    """An angle argument or field [degrees], 4 decimals (0.36 arc seconds)."""
    if not math.isfinite(value_deg):
        raise ValueError(f"angle {value_deg!r} is not finite")
    return f"{value_deg:.4f}"


def reply_timeout_s(cmd: str, samples: int = 0, channels: int = 16, baudrate: int = 19200) -> float:
    """The longest a device may take to finish sending its reply to ``cmd`` [s].

    The documented reply time plus the time to send the longest reply line at
    ``baudrate`` (10 bits per byte).
    """
    if cmd in (BURST, DARK):
        work = MAX_REPLY_S + samples * MAX_SAMPLE_PERIOD_S
        reply_bytes = 64 + samples * channels * VALUE_CHARS
    elif cmd == RST:
        work, reply_bytes = MAX_RESET_S, 64
    else:
        work, reply_bytes = MAX_REPLY_S, 128
    return work + reply_bytes * 10 / baudrate
