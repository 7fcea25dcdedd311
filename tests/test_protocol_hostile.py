"""A hostile device: frames whose checksum is right but whose fields are not.

The checksum protects against damage on the line, not against a device (or firmware
bug) that seals nonsense correctly. Every frame here is sealed with the codec's own
:func:`drivers.protocol.crc16`, so it passes the checksum and reaches the field
parsers; the only exceptions allowed are the ones drivers/protocol.py documents.
"""

from __future__ import annotations

import random

import pytest

from drivers import protocol as p

# What decode_reply and the payload parsers may raise (drivers/protocol.py docstring).
DOCUMENTED_REPLY_ERRORS = (p.FrameError, p.StaleReply, p.ErrorReply, p.BadPayload)

PARSERS = {
    p.ID: p.parse_identity,
    p.CLK: p.parse_clock,
    p.BURST: p.parse_burst,
    p.DARK: p.parse_burst,
    p.HK: p.parse_housekeeping,
    p.STATUS: p.parse_radiometer_status,
}
TRACKER_PARSERS = {p.STATUS: p.parse_tracker_state}

ARG_PARSERS = {
    p.BURST: p.parse_samples_arg,
    p.DARK: p.parse_samples_arg,
    p.CLK: p.parse_clock_arg,
    p.GOTO: p.parse_goto_args,
    p.SUN: p.parse_sun_arg,
    p.ID: p.parse_no_args,
    p.HK: p.parse_no_args,
    p.PARK: p.parse_no_args,
}

# Spellings Python's float() or int() accept, or choke on, that are not plain decimal
# numbers (PROTOCOL.md, "Framing"): common practice, no source, for the list itself;
# float() accepting 'nan', 'infinity' and '1_0' is the Python documentation of float().
HOSTILE_FIELDS = [
    "", "nan", "NaN", "-nan", "inf", "-inf", "+Infinity", "infinity", "1_0.5", "1_000",
    "1e999", "-1e999", "1e-999", "1e99999", "0x1p3", "0x10", ".", "-", "+", "e5", "1e",
    "--1", "1..2", "1.2.3", " 1", "1 ", "\t1", "1\n", "*", "#", "#1", "OK", "ERR", "*0000",
    "\u00b2", "\u0663", "\uff11\uff12", "\u00bd", "\u2160", "1\u00a0", "\x00", "\x7f",
    "\u00e9t\u00e9", "\U0001f600", "9" * 18, "9" * 19, "1" * 64, "1" * 65,
    "2025-02-12T18:00:00.000Z", "0001-01-01T00:00:00Z", "9999-12-31T23:59:59.999999Z",
    "0000-01-01T00:00:00Z", "2025-02-30T00:00:00Z", "2025-02-12T18:00:00+01:00",
    "READY", "TRACKING", "RAD", "TRK", "000000", "0", "1", "-0.0", "1e308", "1.8e308",
]
HUGE_LENGTHS = [100, 400, 4300, 4301, 5000, 20_000]


def _random_field(rng: random.Random) -> str:
    roll = rng.random()
    if roll < 0.35:
        return rng.choice(HOSTILE_FIELDS)
    if roll < 0.45:
        return rng.choice(["", "-", "+"]) + str(rng.getrandbits(rng.randint(1, 100)))
    if roll < 0.50:
        # The case of issue 14: a number of thousands of digits.
        body = rng.choice("123456789") * rng.choice(HUGE_LENGTHS)
        return rng.choice(["", "-", "0.", "1e"]) + body
    if roll < 0.60:
        return bytes(32 + b % 95 for b in rng.randbytes(rng.randint(0, 12))).decode()
    if roll < 0.65:
        return rng.randbytes(2 * rng.randint(0, 6)).decode("utf-16-le", errors="replace")
    return repr(rng.uniform(-1e4, 1e4)) if rng.random() < 0.5 else str(rng.randint(0, 2000))


def _seal(body: str) -> bytes:
    raw = body.encode("utf-8", errors="surrogatepass")
    return raw + b"*%04X" % p.crc16(raw) + p.EOL


def _random_reply(rng: random.Random, rid: int) -> tuple[bytes, dict]:
    cmd = rng.choice([*PARSERS, p.GOTO, p.SUN, p.PARK, p.RST, "X" * 13, "hk", ""])
    reply_rid = rid if rng.random() < 0.9 else rng.choice([0, rid + 1, 65536, 10**6])
    head = f"#{reply_rid}"
    roll = rng.random()
    fields = [_random_field(rng) for _ in range(rng.randint(0, 12))]
    if roll < 0.8:
        lead = {p.ID: ["RAD", "TRK"], p.STATUS: list(p.TRACKER_MODES) + ["READY"]}
        if cmd in lead and fields and rng.random() < 0.7:
            fields[0] = rng.choice(lead[cmd])
        body = " ".join([head, "OK", cmd, *fields])
    elif roll < 0.9:
        body = " ".join([head, "ERR", _random_field(rng), *fields])
    else:
        body = rng.choice(["", "#", head, head + " OK", head + "  OK HK 1"]) + " ".join(fields)
    parsers = TRACKER_PARSERS if rng.random() < 0.3 else PARSERS
    return _seal(body), parsers


def _decode_and_parse(frame: bytes, rid: int, parsers: dict) -> None:
    reply = p.decode_reply(frame, rid)
    parser = parsers.get(reply.cmd)
    if parser is not None:
        parser(reply.fields)


def test_100k_sealed_hostile_replies_raise_only_documented_errors():
    rng = random.Random(14)  # seeded: a failure names a frame that can be replayed
    rid = 4242
    outcomes: dict[str, int] = {}
    for _ in range(100_000):
        frame, parsers = _random_reply(rng, rid)
        try:
            _decode_and_parse(frame, rid, parsers)
        except DOCUMENTED_REPLY_ERRORS as exc:
            outcomes[type(exc).__name__] = outcomes.get(type(exc).__name__, 0) + 1
            # The message must stay readable: a 20,000-digit field is not echoed whole.
            assert len(str(exc)) < 400, (frame[:120], str(exc)[:200])
        except Exception as exc:  # noqa: BLE001 - the point is to catch anything else
            pytest.fail(f"{type(exc).__name__} escaped the codec for {frame[:200]!r}: {exc}")
        else:
            outcomes["ok"] = outcomes.get("ok", 0) + 1
    # The generator must reach every branch, else the fuzz proves less than it says.
    for kind in ("FrameError", "StaleReply", "ErrorReply", "BadPayload"):
        assert outcomes.get(kind, 0) > 100, outcomes


def test_sealed_hostile_requests_raise_only_bad_request():
    rng = random.Random(1414)
    for _ in range(20_000):
        cmd = rng.choice([*ARG_PARSERS, "goto", "burst"])
        args = [_random_field(rng) for _ in range(rng.randint(0, 3))]
        head = rng.choice(["", "#7 ", "#99999 ", "#" + "9" * 400 + " "])
        frame = _seal(head + " ".join([cmd, *args]))
        try:
            req = p.decode_request(frame)
            parser = ARG_PARSERS.get(req.cmd)
            if parser is not None:
                parser(req)
        except p.BadRequest as exc:
            assert 0 <= exc.rid <= p.RID_MAX
            assert len(exc.text) < 400
        except Exception as exc:  # noqa: BLE001
            pytest.fail(f"{type(exc).__name__} escaped for request {frame[:200]!r}: {exc}")


# Each case below raised something undocumented before the field bounds (issue 14):
# the first column names what, as measured on main before the change.
OVERLONG_REPLIES = [
    ("ValueError", "#1 ERR " + "9" * 5000 + " shutter"),
    ("ValueError", "#1 OK BURST " + "9" * 5000 + " 1 400 0 1.0"),
    ("OverflowError", "#1 OK BURST 1 1 " + "9" * 400 + " 0 1.0"),
    ("ValueError", "#1 OK ID RAD HR6-SIM PS-0042 1.4.2 " + "9" * 5000),
    ("ValueError", "#1 OK STATUS READY " + "9" * 5000 + " 412 2"),
]


@pytest.mark.parametrize(("before", "body"), OVERLONG_REPLIES)
def test_overlong_numbers_are_frame_errors(before, body):
    with pytest.raises(p.FrameError, match="1 to 5 digits|longer than 64"):
        _decode_and_parse(_seal(body), 1, PARSERS)


@pytest.mark.parametrize(
    ("before", "body"), [case for case in OVERLONG_REPLIES if " OK " in case[1]]
)
def test_parsers_bound_numbers_given_directly(before, body):
    # Another driver may call the parsers with fields it split itself, so they bound
    # the numbers too rather than relying on decode_reply.
    words = body.split(" ")
    with pytest.raises(p.BadPayload, match="whole number of 1 to 18 digits"):
        PARSERS[words[2]](words[3:])


def test_digit_separators_and_nan_spellings_are_not_numbers():
    # Python's float() takes '1_0.5' as 10.5 and 'nan' as NaN (Python documentation of
    # float()); the protocol's plain decimal takes neither.
    for text in ("1_0.5", "nan", "inf", "1e999", "0x10"):
        with pytest.raises(p.BadPayload):
            p.parse_housekeeping([text, "1", "1", "1", "1", "-"])
    with pytest.raises(p.BadRequest):
        p.parse_goto_args(p.Request(0, p.GOTO, ("1_0.5", "20")))


def test_long_error_text_is_cut_and_keeps_its_code():
    with pytest.raises(p.ErrorReply) as info:
        p.decode_reply(_seal("#1 ERR 30 " + "x" * 5000), 1)
    assert info.value.code == 30
    assert info.value.text.startswith("x" * p.MAX_ERROR_TEXT_CHARS + "... (cut from 5000")


def test_overlong_lines_are_frame_errors():
    with pytest.raises(p.FrameError, match="longer than"):
        p.decode_reply(_seal("#1 OK HK " + "1 " * p.MAX_LINE_BYTES), 1)
    with pytest.raises(p.BadRequest) as info:
        p.decode_request(_seal("#3 HK " + "x" * p.MAX_REQUEST_BYTES))
    assert (info.value.code, info.value.rid) == (p.Code.SYNTAX, 3)
