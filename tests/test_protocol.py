"""The line protocol: PROTOCOL.md's examples, codec round trips and a decoder fuzz.

Every example block in drivers/PROTOCOL.md is checked here byte for byte: the
``driver:`` blocks drive SerialRadiometer/SerialTracker through a scripted port (each
(request, reply) pair must be used, in order), and the ``typed:`` blocks are replayed
into the simulator's device emulator with a fake station holding the same values.
"""

from __future__ import annotations

import binascii
import contextlib
import math
import re
import threading
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from drivers import protocol as p
from drivers.interfaces import Burst, DeviceError, Housekeeping, Identity, LinkError, TrackerState
from drivers.reference import SerialRadiometer, SerialTracker
from drivers.transport import scripted_transport
from sim_instrument.server import DeviceEmulator

PROTOCOL_MD = Path(__file__).resolve().parents[1] / "drivers" / "PROTOCOL.md"


# ---------------------------------------------------------------------------- fixtures


class FakeStation:
    """The station contract of sim_instrument/model.py with PROTOCOL.md's fixed values."""

    SUN_V = [0.9123457, 1.873204, 2.551093, 2.49331, 1.903377, 1.507716]
    DARK_V = [0.002101, 0.001797, 0.001603, 0.001512, 0.001894, 0.002611]

    def __init__(self) -> None:
        self.clock = datetime(2025, 2, 12, 18, 0, 0, tzinfo=UTC)
        self.calls: list[tuple] = []

    def now(self):
        return self.clock

    def set_clock(self, when):
        self.calls.append(("set_clock", when))
        self.clock = when

    def radiometer_identity(self):
        return ("HR6-SIM", "PS-0042", "1.4.2")

    def tracker_identity(self):
        return ("HT2-SIM", "PS-T-0017", "2.1.0")

    def channel_count(self):
        return 6

    def burst(self, n):
        self.calls.append(("burst", n))
        rows = [[round(v * (1 + 0.0004 * (i - c % 3)), 7) for c, v in enumerate(self.SUN_V)]
                for i in range(n)]
        return rows, 0.2 * (n - 1), [False] * 6

    def dark(self, n):
        self.calls.append(("dark", n))
        rows = [[round(v + 1e-6 * (i - c % 2), 7) for c, v in enumerate(self.DARK_V)]
                for i in range(n)]
        return rows, 0.2 * (n - 1), [False] * 6

    def housekeeping(self):
        return {"detector_temp_c": 24.82, "case_temp_c": 15.62, "ambient_temp_c": 7.93,
                "supply_v": 12.619, "humidity_pct": 23.0, "pressure_hpa": 645.0}

    def goto(self, azimuth_deg, elevation_deg):
        self.calls.append(("goto", azimuth_deg, elevation_deg))

    def follow_sun(self, on):
        self.calls.append(("follow_sun", on))

    def park(self):
        self.calls.append(("park",))

    def tracker_state(self):
        return {"mode": "tracking", "azimuth_deg": 143.261, "elevation_deg": 38.0391,
                "locked": True, "error_deg": 0.014}

    def reset_radiometer(self):
        self.calls.append(("reset_radiometer",))

    def truth(self):
        return {"channels": {}, "readings": []}


def _example_blocks() -> list[tuple[str, str, list[str]]]:
    """(kind, header, body lines) of every ``driver:``/``typed:`` block in PROTOCOL.md."""
    text = PROTOCOL_MD.read_text(encoding="utf-8")
    blocks = []
    for body in re.findall(r"```text\n(.*?)```", text, re.S):
        lines = body.rstrip("\n").split("\n")
        head = re.match(r"(driver|typed): (.+)", lines[0])
        if head:
            blocks.append((head.group(1), head.group(2), lines[1:]))
    return blocks


def _pairs(lines: list[str]) -> list[tuple[bytes, bytes]]:
    sent = [ln[2:].encode() + b"\r\n" for ln in lines if ln.startswith("> ")]
    got = [ln[2:].encode() + b"\r\n" for ln in lines if ln.startswith("< ")]
    assert len(sent) == len(got), "every request in an example needs its reply"
    return list(zip(sent, got, strict=True))


DRIVER_EXAMPLES = [(h, ln) for kind, h, ln in _example_blocks() if kind == "driver"]
TYPED_EXAMPLES = [(h, ln) for kind, h, ln in _example_blocks() if kind == "typed"]


def test_protocol_md_has_examples_for_every_command():
    """A protocol test per command: each command of each device appears in an example."""
    seen: dict[str, set[str]] = {"radiometer": set(), "tracker": set()}
    for header, lines in DRIVER_EXAMPLES:
        device = header.split(".")[0]
        for request, _ in _pairs(lines):
            seen[device].add(p.decode_request(request).cmd)
    assert seen["radiometer"] == p.RADIOMETER_COMMANDS
    assert seen["tracker"] == p.TRACKER_COMMANDS
    # and one error reply per device
    for device in ("radiometer", "tracker"):
        assert any(h.startswith(device) and ln[-1].startswith("raises: ErrorReply")
                   for h, ln in DRIVER_EXAMPLES)
    assert {h for h, _ in TYPED_EXAMPLES} == {"radiometer", "tracker"}


@pytest.mark.parametrize(("call", "lines"), DRIVER_EXAMPLES,
                         ids=[f"{i}-{h}" for i, (h, _) in enumerate(DRIVER_EXAMPLES)])
def test_driver_example(call, lines):
    """Each driver example runs exactly its (request, reply) pairs and returns what it says."""
    pairs = _pairs(lines)
    first_rid = p.decode_request(pairs[0][0]).rid
    outcome = lines[-1]
    with scripted_transport(pairs, first_rid=first_rid) as transport:
        driver = (SerialRadiometer if call.startswith("radiometer") else SerialTracker)(transport)
        env = {"radiometer": driver, "tracker": driver, "datetime": datetime, "UTC": UTC,
               "__builtins__": {}}
        if outcome.startswith("raises: ErrorReply"):
            code = int(outcome.rsplit("=", 1)[1])
            with pytest.raises(p.ErrorReply) as info:
                eval(call, env)
            assert info.value.code == code
            assert isinstance(info.value, DeviceError)
        else:
            result = eval(call, env)
            assert outcome == f"returns: {result!r}"


@pytest.mark.parametrize(("device", "lines"), TYPED_EXAMPLES, ids=[h for h, _ in TYPED_EXAMPLES])
def test_typed_example_matches_the_simulator(device, lines):
    """What a person types at a terminal gets, byte for byte, the documented reply."""
    emulator = DeviceEmulator(device, FakeStation(), threading.Lock())
    typed = [ln[2:] for ln in lines if ln.startswith("> ")]
    replies = [ln[2:] for ln in lines if ln.startswith("< ")]
    for text, expected in zip(typed, replies, strict=True):
        reply, _delay = emulator.handle(text.encode())
        assert reply == expected.encode() + b"\r\n"


def test_every_example_line_is_a_valid_frame():
    ok = errors = 0
    for _kind, _head, lines in _example_blocks():
        rid = None
        for line in lines:
            if line.startswith("> "):
                try:
                    rid = p.decode_request(line[2:]).rid
                except p.BadRequest as exc:  # the documented bad-checksum example
                    assert exc.code == p.Code.CHECKSUM
                    rid = exc.rid
            elif line.startswith("< "):
                try:
                    p.decode_reply(line[2:], rid)
                    ok += 1
                except p.ErrorReply:
                    errors += 1
    assert ok >= 20 and errors >= 5


# ---------------------------------------------------------------------------- checksum


def _crc16_ccitt_false_bitwise(data: bytes) -> int:
    """Straight from the definition: poly 0x1021, init 0xFFFF, MSB first, no final XOR."""
    crc = 0xFFFF
    for byte in data:
        crc ^= byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) if crc & 0x8000 else crc << 1
            crc &= 0xFFFF
    return crc


def test_crc_check_value():
    # CRC-16/CCITT-FALSE (CRC-16/IBM-3740 in the CRC RevEng catalogue) has check value
    # 0x29B1 over ASCII "123456789" (from memory).
    assert p.crc16(b"123456789") == 0x29B1
    assert _crc16_ccitt_false_bitwise(b"123456789") == 0x29B1


@given(st.binary(max_size=200))
def test_crc_matches_the_bitwise_definition(data):
    assert p.crc16(data) == _crc16_ccitt_false_bitwise(data)


def test_crc_worked_example_in_protocol_md():
    text = PROTOCOL_MD.read_text(encoding="utf-8")
    assert "`#1 ID*94E5`" in text
    running = 0xFFFF
    steps = []
    for byte in b"#1 ID":
        running = binascii.crc_hqx(bytes([byte]), running)
        steps.append(f"{running:04X}")
    for value in steps:
        assert value in text
    assert p.encode_request(1, "ID") == b"#1 ID*94E5\r\n"


# ---------------------------------------------------------------------------- framing

tokens = st.text(alphabet=st.characters(min_codepoint=0x21, max_codepoint=0x7E,
                                        exclude_characters="*"), min_size=1, max_size=12)
commands = st.from_regex(r"[A-Z][A-Z0-9]{0,11}", fullmatch=True)
rids = st.integers(0, p.RID_MAX)


@given(rids, commands, st.lists(tokens, max_size=6))
def test_request_round_trip(rid, cmd, args):
    req = p.decode_request(p.encode_request(rid, cmd, args))
    assert (req.rid, req.cmd, req.args, req.had_crc) == (rid, cmd, tuple(args), True)


@given(rids, commands, st.lists(tokens, max_size=6))
def test_reply_round_trip(rid, cmd, fields):
    reply = p.decode_reply(p.encode_reply(rid, cmd, fields), rid, cmd)
    assert (reply.rid, reply.cmd, reply.fields) == (rid, cmd, tuple(fields))


@given(rids, st.sampled_from(list(p.Code)), st.text(max_size=60))
def test_error_round_trip(rid, code, text):
    with pytest.raises(p.ErrorReply) as info:
        p.decode_reply(p.encode_error(rid, code, text), rid)
    assert (info.value.rid, info.value.code) == (rid, code)
    assert info.value.name == code.name
    assert "*" not in info.value.text and "\n" not in info.value.text


def test_typed_requests_are_accepted():
    assert p.decode_request(b"hk\r") == p.Request(0, "HK", (), False)
    assert p.decode_request("  #7   burst   10 \n") == p.Request(7, "BURST", ("10",), False)
    assert p.decode_request(b"goto 120 45\r\n").args == ("120", "45")


@pytest.mark.parametrize(("line", "code"), [
    (b"", p.Code.SYNTAX),
    (b"#12", p.Code.SYNTAX),
    (b"#70000 ID", p.Code.SYNTAX),
    (b"#1 I-D", p.Code.SYNTAX),
    (b"#1 ID*12", p.Code.SYNTAX),
    (b"#1 ID*94E5*94E5", p.Code.SYNTAX),
    (b"#1 ID*0000", p.Code.CHECKSUM),
    (b"#1 ID\x07", p.Code.SYNTAX),
    (b"#1 ID \xff", p.Code.SYNTAX),
])
def test_bad_requests(line, code):
    with pytest.raises(p.BadRequest) as info:
        p.decode_request(line)
    assert info.value.code == code
    assert info.value.text


def test_bad_request_answers_with_the_id_it_can_read():
    with pytest.raises(p.BadRequest) as info:
        p.decode_request(b"#42 HK*0000")
    assert info.value.rid == 42


def test_reply_decoder_exceptions():
    good = p.encode_reply(9, "HK", ["1", "2"])
    assert p.decode_reply(good, 9).fields == ("1", "2")
    assert p.decode_reply(good.rstrip(b"\r\n") + b"\r", 9).fields == ("1", "2")
    assert p.decode_reply(good.decode().lower().replace("ok hk", "OK HK"), 9)  # crc digits
    with pytest.raises(p.StaleReply) as stale:
        p.decode_reply(good, 8)
    assert (stale.value.rid, stale.value.expected_rid) == (9, 8)
    with pytest.raises(p.FrameError):
        p.decode_reply(good[:-8], 9)  # truncated inside the checksum
    with pytest.raises(p.FrameError):
        p.decode_reply(good[:10], 9)  # truncated, no checksum
    with pytest.raises(p.ChecksumError):
        p.decode_reply(good.replace(b"1 2", b"1 3"), 9)
    with pytest.raises(p.FrameError):
        p.decode_reply(good, 9, expected_cmd="ID")
    with pytest.raises(p.FrameError):
        p.decode_reply(good.rstrip(b"\r\n") + good, 9)  # two frames run together
    for exc in (p.FrameError, p.ChecksumError, p.StaleReply):
        assert issubclass(exc, LinkError)
    assert issubclass(p.ErrorReply, DeviceError) and issubclass(p.BadPayload, DeviceError)


def test_encoders_refuse_what_cannot_be_framed():
    with pytest.raises(ValueError):
        p.encode_request(1, "HK", ["two words"])
    with pytest.raises(ValueError):
        p.encode_request(1, "hk")
    with pytest.raises(ValueError):
        p.encode_reply(70000, "HK")
    with pytest.raises(ValueError):
        p.encode_reply(1, "HK", ["a*b"])
    assert p.token("Model 7 * beta") == "Model_7___beta"


# ---------------------------------------------------------------------------- the fuzz

DOCUMENTED_REPLY_ERRORS = (p.ProtocolError, p.ErrorReply)


@settings(max_examples=300, suppress_health_check=[HealthCheck.too_slow])
@given(st.binary(max_size=120), rids)
def test_random_bytes_give_only_documented_errors(data, rid):
    with contextlib.suppress(DOCUMENTED_REPLY_ERRORS):
        p.decode_reply(data, rid)
    try:
        p.decode_request(data)
    except p.BadRequest as exc:
        assert exc.code in (p.Code.SYNTAX, p.Code.CHECKSUM)
        assert 0 <= exc.rid <= p.RID_MAX


@given(rids, st.lists(tokens, max_size=5), st.data())
def test_damaged_frames_never_decode_as_something_else(rid, fields, data):
    frame = p.encode_reply(rid, "BURST", fields)
    damage = data.draw(st.sampled_from(["truncate", "flip", "concat", "stale"]))
    if damage == "truncate":
        bad = frame[: data.draw(st.integers(0, len(frame) - 3))]
    elif damage == "flip":
        i = data.draw(st.integers(0, len(frame) - 3))
        bad = frame[:i] + bytes([frame[i] ^ data.draw(st.integers(1, 255))]) + frame[i + 1:]
    elif damage == "concat":
        bad = frame.rstrip(b"\r\n") + p.encode_reply((rid + 1) % 65536, "HK", ["1"])
    else:
        bad = p.encode_reply((rid + 1) % 65536, "BURST", fields)
    with pytest.raises(DOCUMENTED_REPLY_ERRORS):
        p.decode_reply(bad, rid, "BURST")
    # and the next good frame still decodes
    assert p.decode_reply(frame, rid, "BURST").fields == tuple(fields)


@settings(max_examples=100, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.binary(max_size=60), max_size=4), st.integers(1, p.RID_MAX - 1))
def test_transport_finds_the_reply_among_noise_and_stale_lines(noise, rid):
    """Noise lines and a stale reply before the real one: the exchange still succeeds."""
    reply = p.encode_reply(rid, "HK", ["24.82", "15.62", "7.93", "12.619", "23.0", "-"])
    stale = p.encode_reply(rid - 1, "HK", ["0", "0", "0", "0", "0", "-"])
    junk = b"".join(n + b"\r\n" for n in noise)
    pairs = [(p.encode_request(rid, "HK"), junk + stale + reply)]
    with scripted_transport(pairs, first_rid=rid) as transport:
        hk = SerialRadiometer(transport).read_housekeeping()
    assert hk.pressure_hpa is None and hk.detector_temp_c == 24.82
    assert transport.counters.stale == 1


# ---------------------------------------------------------------------------- payloads

volts = st.floats(-10.0, 10.0, allow_nan=False)


@given(st.integers(1, 5), st.integers(1, 8), st.data(), st.floats(0, 1000))
def test_burst_round_trip_keeps_7_significant_digits(n, c, data, duration_s):
    samples = tuple(tuple(data.draw(volts) for _ in range(c)) for _ in range(n))
    saturated = tuple(data.draw(st.booleans()) for _ in range(c))
    back = p.parse_burst(p.burst_fields(Burst(samples, duration_s, saturated)))
    assert back.saturated == saturated
    # Whole milliseconds: at most half of one off, which a tie such as 0.3125 s
    # reaches exactly; the 1e-12 s is the binary float's share (common practice, no
    # source).
    assert back.duration_s == pytest.approx(duration_s, abs=5e-4 + 1e-12)
    for row, row_back in zip(samples, back.samples, strict=True):
        for v, v_back in zip(row, row_back, strict=True):
            # 7 significant digits: relative rounding error at most 5e-7
            assert math.isclose(v, v_back, rel_tol=5e-7, abs_tol=1e-300)


@pytest.mark.parametrize("fields", [
    ["2", "2", "0", "00", "1", "2", "3"],  # too few values
    ["1", "2", "0", "0", "1", "2"],  # flags for one channel of two
    ["1", "1", "0", "2", "1"],  # flag not 0/1
    ["1", "1", "0", "0", "nan"],
    ["1", "1", "-5", "0", "1"],
    ["x"],
])
def test_bad_burst_payloads(fields):
    with pytest.raises(p.BadPayload):
        p.parse_burst(fields)


def test_housekeeping_and_state_round_trips():
    hk = Housekeeping(24.82, 15.62, -7.93, 12.619, 23.0, None)
    assert p.parse_housekeeping(p.housekeeping_fields(hk)) == hk
    hk2 = Housekeeping(24.82, 15.62, 7.93, 12.619, 23.0, 645.0)
    assert p.parse_housekeeping(p.housekeeping_fields(hk2)) == hk2
    state = TrackerState("slewing", 12.3456, 45.0, False, 0.0)
    assert p.parse_tracker_state(p.tracker_state_fields(state)) == state
    with pytest.raises(p.BadPayload):
        p.parse_tracker_state(["SPINNING", "0", "0", "0", "0"])
    with pytest.raises(p.BadPayload):
        p.parse_housekeeping(["1", "2"])


def test_identity_round_trip_and_kind():
    ident = Identity("HR6 SIM", "PS-0042", "1.4.2")
    kind, back, count = p.parse_identity(p.identity_fields(p.KIND_RADIOMETER, ident, 6))
    assert (kind, back, count) == (p.KIND_RADIOMETER, Identity("HR6_SIM", "PS-0042", "1.4.2"), 6)
    with pytest.raises(p.BadPayload):
        p.parse_identity(["XYZ", "a", "b", "c"])


def test_driver_refuses_the_wrong_device():
    """Swapped cables: the radiometer port answers as a tracker."""
    pairs = [(p.encode_request(1, "ID"),
              p.encode_reply(1, "ID", ["TRK", "HT2-SIM", "PS-T-0017", "2.1.0"]))]
    with scripted_transport(pairs) as transport, pytest.raises(DeviceError, match="swapped"):
        SerialRadiometer(transport).identify()


@given(st.datetimes(min_value=datetime(2000, 1, 1), max_value=datetime(2100, 1, 1),
                    timezones=st.just(UTC)))
def test_time_round_trip_to_the_millisecond(when):
    back = p.parse_time(p.format_time(when))
    assert timedelta(0) <= when - back < timedelta(milliseconds=1)


@pytest.mark.parametrize("text", ["2025-02-12T18:00:00", "2025-02-12T18:00:00+01:00", "noon"])
def test_times_that_are_not_utc_are_refused(text):
    with pytest.raises(ValueError):
        p.parse_time(text)


def test_goto_and_sample_argument_limits():
    def req(cmd, *args):
        return p.Request(3, cmd, tuple(args))

    assert p.parse_goto_args(req("GOTO", "359.9999", "90")) == (359.9999, 90.0)
    for args in [("360", "10"), ("-1", "10"), ("10", "90.5"), ("10",), ("a", "b")]:
        with pytest.raises(p.BadRequest) as info:
            p.parse_goto_args(req("GOTO", *args))
        assert (info.value.code, info.value.rid) == (p.Code.ARGUMENT, 3)
    assert p.parse_samples_arg(req("BURST", str(p.MAX_SAMPLES))) == p.MAX_SAMPLES
    for bad in ("0", str(p.MAX_SAMPLES + 1), "-3", "ten"):
        with pytest.raises(p.BadRequest):
            p.parse_samples_arg(req("BURST", bad))


def test_reply_timeout_covers_the_burst_and_its_transmission():
    # 10 samples at the slowest allowed period, 6 channels, 19200 bit/s
    expected = p.MAX_REPLY_S + 10 * p.MAX_SAMPLE_PERIOD_S + (64 + 10 * 6 * 14) * 10 / 19200
    assert p.reply_timeout_s(p.BURST, 10, 6, 19200) == pytest.approx(expected)
    assert p.reply_timeout_s(p.RST) > p.reply_timeout_s(p.HK)
