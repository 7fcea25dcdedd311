"""Transport: framing, stale ids, retries, reconnection, counters and port errors."""

from __future__ import annotations

import errno
import logging
import socket
import threading
from collections.abc import Callable

import pytest
import serial

from drivers import protocol as p
from drivers.interfaces import LinkError
from drivers.transport import (
    LinkTimeout,
    PortUnavailable,
    ScriptedPort,
    Transport,
    is_device_path,
    scripted_transport,
)

HK_FIELDS = ["24.82", "15.62", "7.93", "12.619", "23.0", "645.0"]


def req(rid: int, cmd: str = "HK", *args: str) -> bytes:
    return p.encode_request(rid, cmd, list(args))


def ok(rid: int, cmd: str = "HK", fields=HK_FIELDS) -> bytes:
    return p.encode_reply(rid, cmd, fields)


def test_exchange_returns_the_fields_and_counts():
    with scripted_transport([(req(5), ok(5))], first_rid=5) as t:
        assert t.exchange("HK") == tuple(HK_FIELDS)
    assert t.counters.exchanges == 1
    assert t.counters.retries == t.counters.timeouts == 0


def test_stale_and_garbage_lines_are_skipped_and_counted():
    noisy = b"\x00\xffnoise\r\n" + ok(4) + b"half a li" + b"ne\r\n" + ok(5)
    with scripted_transport([(req(5), noisy)], first_rid=5) as t:
        assert t.exchange("HK") == tuple(HK_FIELDS)
    c = t.counters
    assert (c.stale, c.garbage, c.retries) == (1, 2, 0)


def test_noise_glued_to_a_reply_by_a_bare_cr_does_not_spoil_it():
    with scripted_transport([(req(5), b"@@##\r" + ok(5))], first_rid=5) as t:
        assert t.exchange("HK") == tuple(HK_FIELDS)
    assert t.counters.garbage == 1


def test_a_late_reply_from_a_timed_out_attempt_is_discarded_as_stale():
    pairs = [(req(7), b""), (req(8), ok(7) + ok(8))]
    with scripted_transport(pairs, first_rid=7, timeout_s=0.05, retries=1) as t:
        assert t.exchange("HK") == tuple(HK_FIELDS)
    c = t.counters
    assert (c.timeouts, c.retries, c.stale, c.exchanges) == (1, 1, 1, 1)


def test_bad_checksum_is_retried_at_once():
    damaged = ok(1).replace(b"24.82", b"24.83")
    with scripted_transport([(req(1), damaged), (req(2), ok(2))], retries=2) as t:
        assert t.exchange("HK") == tuple(HK_FIELDS)
    assert (t.counters.crc_errors, t.counters.retries) == (1, 1)


def test_gives_up_after_the_retries_with_a_link_error():
    pairs = [(req(1), b""), (req(2), b""), (req(3), b"#3 OK HK 1 2")]  # last one truncated
    with scripted_transport(pairs, timeout_s=0.05, retries=2) as t, \
            pytest.raises(LinkError, match="after 3 attempts") as info:
        t.exchange("HK")
    assert isinstance(info.value.__cause__, LinkTimeout)
    assert "unfinished line" in str(info.value.__cause__)
    assert t.counters.timeouts == 3 and t.counters.exchanges == 0


def test_retryable_device_errors_are_retried_others_raised_at_once():
    busy = p.encode_error(1, p.Code.BUSY, "measuring")
    with scripted_transport([(req(1), busy), (req(2), ok(2))], retries=1) as t:
        assert t.exchange("HK") == tuple(HK_FIELDS)
    assert t.counters.device_errors == 1
    # ARGUMENT is not retried: the script has one pair only, a retry would fail it
    bad = p.encode_error(1, p.Code.ARGUMENT, "usage: BURST <samples 1-1000>")
    with scripted_transport([(req(1, "BURST", "0"), bad)], retries=3) as t, \
            pytest.raises(p.ErrorReply) as info:
        t.exchange("BURST", [0])
    assert info.value.code == p.Code.ARGUMENT and "usage" in info.value.text


def test_request_ids_wrap_and_skip_zero():
    pairs = [(req(65535), ok(65535)), (req(1), ok(1))]
    with scripted_transport(pairs, first_rid=65535) as t:
        t.exchange("HK")
        t.exchange("HK")


def test_first_request_id_is_random_by_default():
    ids = {Transport("loop://")._next_rid() for _ in range(20)}
    assert len(ids) > 1 and all(1 <= i <= p.RID_MAX for i in ids)


def test_exchanges_are_logged_at_debug(caplog):
    caplog.set_level(logging.DEBUG, logger="drivers.transport")
    with scripted_transport([(req(1), ok(1))]) as t:
        t.exchange("HK")
    text = caplog.text
    assert repr(req(1)) in text and repr(ok(1)) in text


def test_overlong_line_is_dropped(monkeypatch):
    monkeypatch.setattr("drivers.transport.MAX_LINE_BYTES", 64)
    with scripted_transport([(req(1), b"x" * 200 + b"\r\n" + ok(1, "HK", ["1"]))]) as t:
        assert t.exchange("HK") == ("1",)
    assert t.counters.garbage >= 1


# ---------------------------------------------------------------------------- opening


class Factory:
    """Records how the transport opens ports; returns or raises what it is given."""

    def __init__(self, *outcomes) -> None:
        self.outcomes = list(outcomes)
        self.calls: list[tuple[str, dict]] = []

    def __call__(self, url, **kwargs):
        self.calls.append((url, kwargs))
        outcome = self.outcomes.pop(0)
        if isinstance(outcome, BaseException):
            raise outcome
        return outcome


def test_is_device_path():
    assert is_device_path("/dev/serial/by-id/usb-x-if00")
    assert not is_device_path("socket://127.0.0.1:7700")
    assert not is_device_path("loop://")


@pytest.mark.parametrize(("url", "exclusive"), [
    ("/dev/ttyUSB0", True), ("socket://127.0.0.1:1", None), ("loop://", None)])
def test_exclusive_only_on_device_paths(url, exclusive):
    port = ScriptedPort([(req(1), ok(1))])
    factory = Factory(port)
    t = Transport(url, 9600, 0.5, 0, first_rid=1, serial_factory=factory)
    assert factory.calls == []  # lazy: nothing opened yet
    t.exchange("HK")
    (_, kwargs), = factory.calls
    assert kwargs.get("exclusive") is exclusive
    assert kwargs["baudrate"] == 9600


def test_missing_port_is_reported_on_first_use_with_a_hint():
    sleeps: list[float] = []
    t = Transport("/dev/heliotrope-no-such-port", retries=2, name="radiometer",
                  backoff_s=(0.5, 1.0), sleep=sleeps.append)
    with pytest.raises(PortUnavailable, match="no such port") as info:
        t.exchange("ID")
    assert "radiometer" in str(info.value) and "list_ports" in str(info.value)
    assert sleeps == [0.5, 1.0, 1.0]  # doubling back-off, capped


def test_permission_denied_names_the_dialout_group_and_is_not_retried():
    denied = serial.SerialException(errno.EACCES, "could not open port /dev/ttyUSB0")
    factory = Factory(denied)
    t = Transport("/dev/ttyUSB0", retries=3, serial_factory=factory, sleep=lambda s: None)
    with pytest.raises(PortUnavailable, match="dialout"):
        t.exchange("ID")
    assert len(factory.calls) == 1


def test_unknown_url_scheme_is_a_clear_permanent_error():
    t = Transport("bogus://x", retries=3, sleep=lambda s: None)
    with pytest.raises(PortUnavailable, match="cannot use port"):
        t.exchange("ID")


class VanishingPort(ScriptedPort):
    """Works for the scripted pairs, then fails like an unplugged USB adapter."""

    def write(self, data):
        if not self._pairs:
            raise serial.SerialException(errno.EIO, "write failed: [Errno 5] Input/output error")
        return super().write(data)


def test_reopens_a_port_that_vanished():
    first = VanishingPort([(req(1), ok(1))])
    second = ScriptedPort([(req(3), ok(3))])  # rid 2 died with the first port
    factory = Factory(first, FileNotFoundError(errno.ENOENT, "gone"), second)
    sleeps: list[float] = []
    t = Transport("/dev/ttyUSB0", retries=3, first_rid=1, serial_factory=factory,
                  backoff_s=(0.1, 1.0), sleep=sleeps.append)
    t.exchange("HK")
    assert t.exchange("HK") == tuple(HK_FIELDS)
    assert t.counters.reconnects == 1
    assert sleeps == [0.1, 0.2]
    assert not first.is_open  # the dead port object was closed
    second.assert_done()


class DrainFailsPort(ScriptedPort):
    """A pty or adapter that vanished under flush(): pyserial's tcdrain raises
    termios.error (EIO), which is not an OSError."""

    def write(self, data):
        return len(data)

    def flush(self):
        import termios
        raise termios.error(errno.EIO, "Input/output error")


def test_reopens_a_port_whose_flush_fails_with_a_termios_error():
    second = ScriptedPort([(req(2), ok(2))])  # rid 1 died with the first port
    factory = Factory(DrainFailsPort([]), second)
    t = Transport("/dev/ttyUSB0", retries=2, first_rid=1, serial_factory=factory,
                  backoff_s=(0.1, 1.0), sleep=lambda s: None)
    assert t.exchange("HK") == tuple(HK_FIELDS)
    assert t.counters.reconnects == 1
    second.assert_done()


# ---------------------------------------------------------------------------- real pyserial


def test_loop_url_times_out_cleanly():
    """Over loop:// the device is our own echo: never a reply, so a bounded failure."""
    t = Transport("loop://", timeout_s=0.1, retries=1)
    with pytest.raises(LinkError) as info:
        t.exchange("HK")
    assert isinstance(info.value.__cause__, LinkTimeout)
    assert t.counters.garbage >= 2  # our echoed requests are not replies
    t.close()


class LineServer:
    """A one-thread TCP device on 127.0.0.1: answer(request) gives the bytes to send back,
    or None to hang up."""

    def __init__(self, answer: Callable[[p.Request], bytes | None]) -> None:
        self.answer = answer
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.url = f"socket://127.0.0.1:{self.listener.getsockname()[1]}"
        self.connections = 0
        self.thread = threading.Thread(target=self._run, daemon=True)
        self.thread.start()

    def _run(self) -> None:
        while True:
            try:
                conn, _ = self.listener.accept()
            except OSError:
                return
            self.connections += 1
            with conn, conn.makefile("rb") as reader:
                for line in reader:
                    out = self.answer(p.decode_request(line))
                    if out is None:
                        break
                    conn.sendall(out)

    def close(self) -> None:
        self.listener.close()


def test_over_a_socket_with_stale_replies_and_a_hang_up():
    seen: list[int] = []

    def answer(request: p.Request) -> bytes | None:
        seen.append(request.rid)
        if len(seen) == 2:
            return None  # hang up mid-conversation: the port "vanishes"
        return ok(request.rid - 1) + ok(request.rid)  # a stale reply, then ours

    server = LineServer(answer)
    try:
        t = Transport(server.url, timeout_s=1.0, retries=2, backoff_s=(0.01, 0.01))
        assert t.exchange("HK") == tuple(HK_FIELDS)
        assert t.exchange("HK") == tuple(HK_FIELDS)
        t.close()
    finally:
        server.close()
    c = t.counters
    assert c.exchanges == 2 and c.stale == 2
    assert c.reconnects == 1 and server.connections == 2


def test_nothing_listening_gives_a_hint_about_the_simulator():
    with socket.create_server(("127.0.0.1", 0)) as s:
        port = s.getsockname()[1]
    t = Transport(f"socket://127.0.0.1:{port}", retries=0)
    with pytest.raises(PortUnavailable, match="heliotrope-sim"):
        t.exchange("ID")
