"""Serve one simulated station as two serial devices: radiometer and tracker.

Each device is an endpoint a driver opens like a serial port: a pseudo-terminal (the
client opens the slave path, e.g. ``/dev/pts/7``) or a TCP port on 127.0.0.1 (the
client opens ``socket://127.0.0.1:PORT``). One thread per endpoint; the station is
shared, so every call into it holds one lock.

:class:`DeviceEmulator` turns a request line into a reply line and knows nothing of
I/O; the endpoints move bytes. The station is used only through the methods of the
contract in ``sim_instrument/model.py``.
"""

from __future__ import annotations

import contextlib
import errno
import logging
import os
import random
import selectors
import socket
import threading
import time
import tty
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

from drivers import protocol as p
from drivers.interfaces import Burst, Housekeeping, Identity, TrackerState

log = logging.getLogger(__name__)

#: Longest request line accepted [bytes]; a request is a few dozen.
MAX_REQUEST_BYTES = 256
#: How long a reply may wait for a client that does not read before it is dropped [s].
WRITE_TIMEOUT_S = 2.0

RADIOMETER = "radiometer"
TRACKER = "tracker"


# ---------------------------------------------------------------------------- lines


class LineAssembler:
    """Bytes in, complete request lines out.

    CR, LF and CR LF all end a line; backspace and DEL delete the last character, so
    a person at a terminal can correct a typo. A line longer than MAX_REQUEST_BYTES
    is returned as ``None`` (answer it with a syntax error) and the rest of it skipped.
    """

    def __init__(self) -> None:
        self._buf = bytearray()
        self._overlong = False

    def feed(self, data: bytes) -> list[bytes | None]:
        lines: list[bytes | None] = []
        for byte in data:
            if byte in (0x0A, 0x0D):
                if self._overlong:
                    lines.append(None)
                elif self._buf:
                    lines.append(bytes(self._buf))
                self._buf.clear()
                self._overlong = False
            elif byte in (0x08, 0x7F):
                if self._buf:
                    self._buf.pop()
            elif not self._overlong:
                self._buf.append(byte)
                if len(self._buf) > MAX_REQUEST_BYTES:
                    self._overlong = True
                    self._buf.clear()
        return lines


# ---------------------------------------------------------------------------- devices


class DeviceEmulator:
    """Answers the requests of one device of a simulated station. No I/O.

    Parameters
    ----------
    kind
        ``"radiometer"`` or ``"tracker"``.
    station
        A ``SimulatedStation`` (or anything with the same methods).
    lock
        Held around every call into the station (it is shared by both devices).
    reply_delay_scale
        Wall seconds per instrument second a BURST or DARK reply is held back, so
        the client waits as it would for the instrument (0 = answer at once).
    """

    def __init__(self, kind: str, station: Any, lock: threading.Lock,
                 reply_delay_scale: float = 0.0) -> None:
        if kind not in (RADIOMETER, TRACKER):
            raise ValueError(f"device kind {kind!r} must be {RADIOMETER!r} or {TRACKER!r}")
        self.kind = kind
        self.station = station
        self.lock = lock
        self.reply_delay_scale = reply_delay_scale
        self._handlers: dict[str, Callable[[p.Request], tuple[list[str], float]]]
        if kind == RADIOMETER:
            self._handlers = {
                p.ID: self._radiometer_id, p.CLK: self._clock, p.STATUS: self._radiometer_status,
                p.BURST: self._burst, p.DARK: self._dark, p.HK: self._housekeeping,
                p.RST: self._reset,
            }
        else:
            self._handlers = {
                p.ID: self._tracker_id, p.CLK: self._clock, p.STATUS: self._tracker_state,
                p.GOTO: self._goto, p.SUN: self._sun, p.PARK: self._park,
            }
        self._restart_counters()

    def _restart_counters(self) -> None:
        self.started = time.monotonic()
        self.requests = 0
        self.errors = 0

    def handle(self, line: bytes | None) -> tuple[bytes | None, float]:
        """The reply to one request line and how long to hold it back [s].

        ``line`` is None for a line that was too long. The reply is None for a line
        that is itself a reply: a line that echoes what we send (a terminal left in
        echo mode) must not start an endless conversation with ourselves.
        """
        req: p.Request | None = None
        try:
            if line is not None and _looks_like_a_reply(line):
                return None, 0.0
            self.requests += 1
            if line is None:
                raise p.BadRequest(p.Code.SYNTAX,
                                   f"request longer than {MAX_REQUEST_BYTES} bytes")
            req = p.decode_request(line)
            handler = self._handlers.get(req.cmd)
            if handler is None:
                raise p.BadRequest(p.Code.UNKNOWN, self._unknown(req.cmd), req.rid)
            fields, delay_s = handler(req)
            return p.encode_reply(req.rid, req.cmd, fields), delay_s
        except p.BadRequest as exc:
            self.errors += 1
            return p.encode_error(exc.rid, exc.code, exc.text), 0.0
        except Exception as exc:
            self.errors += 1
            log.exception("%s: failed to answer %r", self.kind, line)
            return p.encode_error(req.rid if req else 0, p.Code.HARDWARE,
                                  f"{type(exc).__name__}: {exc}"), 0.0

    def _unknown(self, cmd: str) -> str:
        other = p.TRACKER_COMMANDS if self.kind == RADIOMETER else p.RADIOMETER_COMMANDS
        mine = sorted(self._handlers)
        if cmd in other:
            other_kind = TRACKER if self.kind == RADIOMETER else RADIOMETER
            return (f"{cmd} is a {other_kind} command, not a {self.kind} command; this device "
                    f"knows {' '.join(mine)}")
        return f"unknown command {cmd}; this device knows {' '.join(mine)}"

    @contextlib.contextmanager
    def _station(self, req: p.Request) -> Iterator[Any]:
        """The station, locked. A ValueError from it (a limit of its own that the codec
        let through) is answered as a bad argument."""
        with self.lock:
            try:
                yield self.station
            except ValueError as exc:
                raise p.BadRequest(p.Code.ARGUMENT, str(exc), req.rid) from None

    def _call(self, req: p.Request, method: str, *args: Any) -> Any:
        with self._station(req) as station:
            return getattr(station, method)(*args)

    # -- both devices

    def _clock(self, req: p.Request) -> tuple[list[str], float]:
        when = p.parse_clock_arg(req)
        with self._station(req) as station:
            if when is not None:
                station.set_clock(when)
            now = station.now()
        return [p.format_time(now)], 0.0

    # -- radiometer

    def _radiometer_id(self, req: p.Request) -> tuple[list[str], float]:
        p.parse_no_args(req)
        with self._station(req) as station:
            model, serial, firmware = station.radiometer_identity()
            channels = station.channel_count()
        return p.identity_fields(p.KIND_RADIOMETER, Identity(model, serial, firmware),
                                 channels), 0.0

    def _radiometer_status(self, req: p.Request) -> tuple[list[str], float]:
        p.parse_no_args(req)
        status = p.RadiometerStatus("READY", int(time.monotonic() - self.started),
                                    self.requests, self.errors)
        return p.radiometer_status_fields(status), 0.0

    def _samples(self, req: p.Request, method: str) -> tuple[list[str], float]:
        n = p.parse_samples_arg(req)
        samples, duration_s, saturated = self._call(req, method, n)
        burst = Burst(tuple(tuple(float(v) for v in row) for row in samples),
                      float(duration_s), tuple(bool(s) for s in saturated))
        return p.burst_fields(burst), max(0.0, duration_s * self.reply_delay_scale)

    def _burst(self, req: p.Request) -> tuple[list[str], float]:
        return self._samples(req, "burst")

    def _dark(self, req: p.Request) -> tuple[list[str], float]:
        return self._samples(req, "dark")

    def _housekeeping(self, req: p.Request) -> tuple[list[str], float]:
        p.parse_no_args(req)
        hk = self._call(req, "housekeeping")
        return p.housekeeping_fields(Housekeeping(**hk)), 0.0

    def _reset(self, req: p.Request) -> tuple[list[str], float]:
        p.parse_no_args(req)
        self._call(req, "reset_radiometer")
        self._restart_counters()
        return [], 0.0

    # -- tracker

    def _tracker_id(self, req: p.Request) -> tuple[list[str], float]:
        p.parse_no_args(req)
        model, serial, firmware = self._call(req, "tracker_identity")
        return p.identity_fields(p.KIND_TRACKER, Identity(model, serial, firmware)), 0.0

    def _tracker_state(self, req: p.Request) -> tuple[list[str], float]:
        p.parse_no_args(req)
        state = self._call(req, "tracker_state")
        return p.tracker_state_fields(TrackerState(**state)), 0.0

    def _goto(self, req: p.Request) -> tuple[list[str], float]:
        az, el = p.parse_goto_args(req)
        self._call(req, "goto", az, el)
        return [p.format_angle_deg(az), p.format_angle_deg(el)], 0.0

    def _sun(self, req: p.Request) -> tuple[list[str], float]:
        on = p.parse_sun_arg(req)
        self._call(req, "follow_sun", on)
        return ["1" if on else "0"], 0.0

    def _park(self, req: p.Request) -> tuple[list[str], float]:
        p.parse_no_args(req)
        self._call(req, "park")
        return [], 0.0


def _looks_like_a_reply(line: bytes) -> bool:
    words = line.split(None, 2)
    return len(words) >= 2 and words[0].startswith(b"#") and words[1] in (b"OK", b"ERR")


# ---------------------------------------------------------------------------- faults


@dataclass(frozen=True)
class LineFaults:
    """Probabilities of damage to each reply, for reliability tests.

    ``drop``: the reply is not sent. ``garble``: a line of noise goes first.
    ``truncate``: only the first part of the reply is sent (then CR LF). ``corrupt``:
    one character is changed, so the checksum fails. ``stale``: the previous reply is
    sent again first.
    """

    drop: float = 0.0
    garble: float = 0.0
    truncate: float = 0.0
    corrupt: float = 0.0
    stale: float = 0.0

    @classmethod
    def parse(cls, spec: str) -> LineFaults:
        """From ``"drop=0.05,corrupt=0.02"``; raises ValueError saying what is wrong."""
        values: dict[str, float] = {}
        names = list(cls.__dataclass_fields__)
        for item in filter(None, (s.strip() for s in spec.split(","))):
            name, sep, value = item.partition("=")
            if not sep or name not in names:
                raise ValueError(f"line fault {item!r}: expected NAME=PROBABILITY with NAME "
                                 f"one of {', '.join(names)}")
            try:
                prob = float(value)
            except ValueError:
                raise ValueError(f"line fault {item!r}: {value!r} is not a number") from None
            if not 0.0 <= prob <= 1.0:
                raise ValueError(f"line fault {item!r}: probability must be 0 to 1")
            values[name] = prob
        return cls(**values)

    @property
    def any(self) -> bool:
        return any((self.drop, self.garble, self.truncate, self.corrupt, self.stale))


class _Damager:
    def __init__(self, faults: LineFaults | None, seed: int) -> None:
        self.faults = faults
        self.rng = random.Random(seed)
        self.previous: bytes | None = None

    def apply(self, reply: bytes) -> list[bytes]:
        f, rng = self.faults, self.rng
        previous, self.previous = self.previous, reply
        if f is None or not f.any:
            return [reply]
        out: list[bytes] = []
        if previous is not None and rng.random() < f.stale:
            out.append(previous)
        if rng.random() < f.garble:
            noise = bytes(rng.randrange(0x20, 0x7F) for _ in range(rng.randrange(1, 40)))
            out.append(noise + b"\r\n")
        if rng.random() < f.drop:
            return out
        if rng.random() < f.truncate:
            reply = reply[: rng.randrange(1, len(reply) - 2)] + b"\r\n"
        elif rng.random() < f.corrupt:
            body = bytearray(reply)
            i = rng.randrange(0, len(reply) - 2)
            body[i] ^= 0x01
            reply = bytes(body)
        out.append(reply)
        return out


# ---------------------------------------------------------------------------- endpoints


class _Endpoint(threading.Thread):
    """One device's byte stream: read requests, write replies, until stopped."""

    url: str

    def __init__(self, emulator: DeviceEmulator, faults: LineFaults | None, seed: int) -> None:
        super().__init__(name=f"sim-{emulator.kind}", daemon=True)
        self.emulator = emulator
        self.damager = _Damager(faults, seed)
        self._stop_event = threading.Event()
        self._wake_r, self._wake_w = os.pipe()
        self._closed = False
        self.selector = selectors.DefaultSelector()
        self.selector.register(self._wake_r, selectors.EVENT_READ)

    def stop(self) -> None:
        self._stop_event.set()
        with contextlib.suppress(OSError):
            os.write(self._wake_w, b"x")

    def close(self) -> None:
        """Release every descriptor; safe to call twice (the second call does nothing,
        so a descriptor number reused elsewhere is never closed by mistake)."""
        if self._closed:
            return
        self._closed = True
        self.release()
        self.selector.close()
        for fd in (self._wake_r, self._wake_w):
            with contextlib.suppress(OSError):
                os.close(fd)

    def release(self) -> None:
        """Close the endpoint's own descriptors."""

    def run(self) -> None:
        try:
            while not self._stop_event.is_set():
                for key, _ in self.selector.select():
                    if key.fd == self._wake_r or self._stop_event.is_set():
                        return
                    self.on_readable(key)
        except Exception:
            log.exception("%s endpoint stopped on an unexpected error", self.emulator.kind)
        finally:
            self.close()

    def answer(self, lines: list[bytes | None], write: Callable[[bytes], None]) -> None:
        for line in lines:
            reply, delay_s = self.emulator.handle(line)
            log.debug("%s request %r", self.emulator.kind, line)
            if reply is None:
                continue
            if delay_s > 0 and self._stop_event.wait(delay_s):
                return
            for chunk in self.damager.apply(reply):
                log.debug("%s reply %r", self.emulator.kind, chunk)
                write(chunk)

    def on_readable(self, key: selectors.SelectorKey) -> None:
        raise NotImplementedError


def _write_all(fd: int, data: bytes) -> None:
    """Write to a non-blocking fd, waiting for room at most WRITE_TIMEOUT_S."""
    view = memoryview(data)
    deadline = time.monotonic() + WRITE_TIMEOUT_S
    with selectors.DefaultSelector() as sel:
        sel.register(fd, selectors.EVENT_WRITE)
        while view:
            try:
                view = view[os.write(fd, view):]
                continue
            except BlockingIOError:
                pass
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise TimeoutError("client is not reading")
            sel.select(remaining)


class PtyEndpoint(_Endpoint):
    """A pseudo-terminal; the client opens :attr:`url` (the slave path) as a serial port."""

    def __init__(self, emulator: DeviceEmulator, faults: LineFaults | None, seed: int) -> None:
        super().__init__(emulator, faults, seed)
        self.master, self._slave = os.openpty()
        # Raw at once: a cooked pty would echo our replies back to us before the
        # client opens it and sets its own mode.
        tty.setraw(self._slave)
        self.url = os.ttyname(self._slave)
        os.set_blocking(self.master, False)
        self.lines = LineAssembler()
        self.selector.register(self.master, selectors.EVENT_READ)

    def on_readable(self, key: selectors.SelectorKey) -> None:
        try:
            data = os.read(self.master, 4096)
        except BlockingIOError:
            return
        except OSError as exc:
            if exc.errno == errno.EIO:  # no slave open; we hold one, so only at shutdown
                time.sleep(0.05)
                return
            raise
        self.answer(self.lines.feed(data), self._write)

    def _write(self, data: bytes) -> None:
        try:
            _write_all(self.master, data)
        except TimeoutError:
            log.warning("%s: client is not reading; reply dropped", self.emulator.kind)

    def release(self) -> None:
        # Keeping our own slave fd open until here means a client that closes and
        # reopens the port never sees the pty hang up.
        for fd in (self.master, self._slave):
            with contextlib.suppress(OSError):
                os.close(fd)


class TcpEndpoint(_Endpoint):
    """A TCP port on 127.0.0.1; the client opens ``socket://127.0.0.1:PORT``.

    One client at a time, like a serial line: a new connection replaces the old one
    (a client that reconnects after a failure wins over its own dead socket).
    """

    def __init__(self, emulator: DeviceEmulator, faults: LineFaults | None, seed: int,
                 port: int) -> None:
        super().__init__(emulator, faults, seed)
        # Loopback only: the simulator must never be reachable from the network.
        self.listener = socket.create_server(("127.0.0.1", port))
        self.listener.setblocking(False)
        self.port = self.listener.getsockname()[1]
        self.url = f"socket://127.0.0.1:{self.port}"
        self.client: socket.socket | None = None
        self.lines = LineAssembler()
        self.selector.register(self.listener, selectors.EVENT_READ)

    def on_readable(self, key: selectors.SelectorKey) -> None:
        if key.fileobj is self.listener:
            try:
                conn, _ = self.listener.accept()
            except BlockingIOError:
                return
            self._drop_client()
            conn.setblocking(False)
            self.client = conn
            self.lines = LineAssembler()
            self.selector.register(conn, selectors.EVENT_READ)
            log.debug("%s: client connected", self.emulator.kind)
            return
        try:
            data = self.client.recv(4096) if self.client else b""
        except BlockingIOError:
            return
        except OSError:
            data = b""
        if not data:
            self._drop_client()
            return
        self.answer(self.lines.feed(data), self._write)

    def _write(self, data: bytes) -> None:
        if self.client is None:
            return
        try:
            _write_all(self.client.fileno(), data)
        except (TimeoutError, OSError) as exc:
            log.warning("%s: client gone or not reading (%s)", self.emulator.kind, exc)
            self._drop_client()

    def _drop_client(self) -> None:
        client, self.client = self.client, None
        if client is not None:
            with contextlib.suppress(KeyError, ValueError):
                self.selector.unregister(client)
            client.close()
            log.debug("%s: client disconnected", self.emulator.kind)

    def release(self) -> None:
        self._drop_client()
        self.listener.close()


# ---------------------------------------------------------------------------- server


class StationServer:
    """Serves a station's radiometer and tracker on two endpoints.

    Parameters
    ----------
    station
        The simulated station (shared by both devices).
    endpoint
        ``"pty"`` or ``"tcp"``.
    tcp_port
        For ``"tcp"``: the radiometer's port; the tracker gets the next one. 0 lets
        the system pick two free ports.
    reply_delay_scale
        See :class:`DeviceEmulator`.
    line_faults, seed
        Optional damage to replies (:class:`LineFaults`), reproducible by seed.

    Use as a context manager, or call :meth:`start` and :meth:`stop`.
    """

    def __init__(self, station: Any, endpoint: str = "pty", tcp_port: int = 0, *,
                 reply_delay_scale: float = 0.0, line_faults: LineFaults | None = None,
                 seed: int = 0) -> None:
        if endpoint not in ("pty", "tcp"):
            raise ValueError(f"endpoint {endpoint!r} must be 'pty' or 'tcp'")
        if endpoint == "tcp" and tcp_port and not 1 <= tcp_port <= 65534:
            raise ValueError(f"TCP port {tcp_port} must be 1-65534 (the tracker takes the next)")
        self.station = station
        self.lock = threading.Lock()
        self._endpoints: list[_Endpoint] = []
        emulators = [DeviceEmulator(kind, station, self.lock, reply_delay_scale)
                     for kind in (RADIOMETER, TRACKER)]
        try:
            for i, emulator in enumerate(emulators):
                if endpoint == "pty":
                    ep: _Endpoint = PtyEndpoint(emulator, line_faults, seed + i)
                else:
                    ep = TcpEndpoint(emulator, line_faults, seed + i,
                                     tcp_port + i if tcp_port else 0)
                self._endpoints.append(ep)
        except BaseException:
            for ep in self._endpoints:
                ep.close()
            raise

    @property
    def urls(self) -> dict[str, str]:
        """``{"radiometer": url, "tracker": url}`` for ``serial.serial_for_url``."""
        return {ep.emulator.kind: ep.url for ep in self._endpoints}

    def start(self) -> dict[str, str]:
        for ep in self._endpoints:
            ep.start()
        return self.urls

    def stop(self) -> None:
        for ep in self._endpoints:
            ep.stop()
        for ep in self._endpoints:
            if ep.is_alive():
                ep.join(timeout=5)
            if not ep.is_alive():
                ep.close()

    def __enter__(self) -> StationServer:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()
