"""Serve one simulated station as two serial devices: radiometer and tracker.

Each device is an endpoint a driver opens like a serial port: a pseudo-terminal (the
client opens the slave path, e.g. ``/dev/pts/7``) or a TCP port on 127.0.0.1 (the
client opens ``socket://127.0.0.1:PORT``). One thread per endpoint; the station is
shared, so every call into it holds one lock.

:class:`DeviceEmulator` turns a request line into a reply line and knows nothing of
I/O; the endpoints move bytes and play the faults of :mod:`sim_instrument.faults`
(damage per reply at a rate; reboots, vanishing ports and one-shot line faults when
the instrument clock crosses their time). The station is used only through the
methods of the contract in ``sim_instrument/model.py``.
"""

from __future__ import annotations

import contextlib
import errno
import logging
import os
import selectors
import shutil
import socket
import tempfile
import threading
import time
import tty
from collections.abc import Callable, Iterator
from typing import Any

from drivers import protocol as p
from drivers.interfaces import Burst, Housekeeping, Identity, TrackerState
from sim_instrument.faults import (
    DEFAULT_LATE_REPLY_S,
    Damager,
    FaultEvent,
    FaultPlan,
    LineFaults,
    crossed,
)

__all__ = ["DeviceEmulator", "LineAssembler", "LineFaults", "PtyEndpoint", "StationServer",
           "TcpEndpoint"]

EOL = b"\r\n"

log = logging.getLogger(__name__)

#: Longest request line accepted [bytes]; a request is a few dozen. The codec's bound.
MAX_REQUEST_BYTES = p.MAX_REQUEST_BYTES
#: How long a reply may wait for a client that does not read before it is dropped [s].
WRITE_TIMEOUT_S = 2.0
#: A vanishing port goes this long after the request that triggers it [s].
VANISH_SETTLE_S = 0.05

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

    def new_assembler(self) -> LineAssembler:
        """What cuts this device's requests out of the byte stream."""
        return LineAssembler()

    def _restart_counters(self) -> None:
        self.started = time.monotonic()
        self.requests = 0
        self.errors = 0

    def reboot(self) -> None:
        """The device restarts: counters from zero; the tracker also stops and forgets."""
        with self.lock:
            if self.kind == RADIOMETER:
                self.station.reset_radiometer()
            else:
                self.station.reset_tracker()
        self._restart_counters()

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


# ---------------------------------------------------------------------------- endpoints


def _banner(emulator: DeviceEmulator) -> bytes:
    """What a device prints as it boots: text the host must take for noise."""
    with emulator.lock:
        if emulator.kind == RADIOMETER:
            model, serial, firmware = emulator.station.radiometer_identity()
        else:
            model, serial, firmware = emulator.station.tracker_identity()
    return f"{model} {serial} firmware {firmware} booting... ready".encode("ascii") + EOL


class _Endpoint(threading.Thread):
    """One device's byte stream: read requests, write replies, until stopped.

    It also plays the device's faults: line damage per reply (:class:`Damager`) and
    the scheduled events of :mod:`sim_instrument.faults` (reboot, port vanishing,
    one-shot line faults), fired when the instrument clock crosses their time.
    """

    url: str

    def __init__(self, emulator: DeviceEmulator, faults: LineFaults | None, seed: int, *,
                 events: tuple[FaultEvent, ...] = (), longitude_deg: float = 0.0,
                 late_reply_s: float = DEFAULT_LATE_REPLY_S, record: bool = False) -> None:
        super().__init__(name=f"sim-{emulator.kind}", daemon=True)
        self.emulator = emulator
        self.damager = Damager(faults, seed, late_reply_s)
        self.events = list(events)
        self.longitude_deg = longitude_deg
        self._last_epoch_s: float | None = None
        self._armed: list[FaultEvent] = []
        self._silent_until = 0.0  # monotonic time a reboot ends
        self._banner_due = False
        self.reboots = 0
        self.vanishes = 0
        self.replies = 0
        #: Every chunk written, when ``record`` is on (for reproducibility tests).
        self.transcript: list[bytes] | None = [] if record else None
        self._stop_event = threading.Event()
        self._wake_r, self._wake_w = os.pipe()
        self._closed = False
        self.selector = selectors.DefaultSelector()
        self.selector.register(self._wake_r, selectors.EVENT_READ)

    @property
    def fault_counts(self) -> dict[str, int]:
        """What this endpoint did to its host so far, by kind."""
        return dict(self.damager.counts, reboot=self.reboots, port_vanish=self.vanishes,
                    replies=self.replies)

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

    def vanish(self, duration_s: float) -> None:
        """Take the port away for ``duration_s`` [s], then bring it back."""
        raise NotImplementedError

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

    # -- scheduled events

    def _crossed_events(self) -> list[FaultEvent]:
        if not self.events:
            return []
        with self.emulator.lock:
            now = self.emulator.station.now().timestamp()
        last, self._last_epoch_s = self._last_epoch_s, now
        if last is None:
            return []
        fired = [e for e in self.events if crossed(last, now, e.at_solar_h, self.longitude_deg)]
        for e in fired:
            self.events.remove(e)
        return fired

    def _fire(self, event: FaultEvent) -> str | None:
        """Start one event; returns "vanish" or "reboot" when the request is lost to it."""
        log.info("%s: fault %s at %.3f h solar time", self.emulator.kind, event.kind,
                 event.at_solar_h)
        if event.kind == "port_vanish":
            self.vanishes += 1
            self.vanish(event.duration_s)
            return "vanish"
        if event.kind == "reboot":
            self.reboots += 1
            self._silent_until = time.monotonic() + event.duration_s
            self._banner_due = True
            self.emulator.reboot()
            return "reboot"
        self.damager.pending.add(event.kind)
        return None

    def answer(self, lines: list[bytes | None], write: Callable[[bytes], None]) -> None:
        for line in lines:
            fired, self._armed = self._armed + self._crossed_events(), []
            lost = None
            for event in fired:
                lost = self._fire(event) or lost
            if lost == "vanish":
                return  # the rest of what was read went with the port
            if lost == "reboot" or time.monotonic() < self._silent_until:
                log.debug("%s rebooting: request %r lost", self.emulator.kind, line)
                continue
            reply, delay_s = self.emulator.handle(line)
            log.debug("%s request %r", self.emulator.kind, line)
            # A CLK that jumps the clock past an event fires it at the next request.
            self._armed = self._crossed_events()
            if reply is None:
                continue
            self.replies += 1
            chunks, late_s = self.damager.apply(reply)
            if self._banner_due:
                self._banner_due = False
                chunks.insert(0, _banner(self.emulator))
            delay_s += late_s
            if delay_s > 0 and self._stop_event.wait(delay_s):
                return
            for chunk in chunks:
                log.debug("%s reply %r", self.emulator.kind, chunk)
                if self.transcript is not None:
                    self.transcript.append(chunk)
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
    """A pseudo-terminal; the client opens :attr:`url` (the slave path) as a serial port.

    With ``link_path`` the url is a symbolic link to the slave, as udev's
    ``/dev/serial/by-id`` links are to a USB adapter: a port that vanishes and returns
    comes back as a new pseudo-terminal under the same link.
    """

    def __init__(self, emulator: DeviceEmulator, faults: LineFaults | None, seed: int, *,
                 link_path: str | None = None, **kwargs: Any) -> None:
        super().__init__(emulator, faults, seed, **kwargs)
        self.link_path = link_path
        self._open_pty()

    def _open_pty(self) -> None:
        self.master, self._slave = os.openpty()
        self._pty_open = True
        # Raw at once: a cooked pty would echo our replies back to us before the
        # client opens it and sets its own mode.
        tty.setraw(self._slave)
        slave_path = os.ttyname(self._slave)
        if self.link_path:
            tmp = f"{self.link_path}.new"
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
            os.symlink(slave_path, tmp)
            os.replace(tmp, self.link_path)
            self.url = self.link_path
        else:
            self.url = slave_path
        os.set_blocking(self.master, False)
        self.lines = self.emulator.new_assembler()
        self.selector.register(self.master, selectors.EVENT_READ)

    def _close_pty(self) -> None:
        if not self._pty_open:
            return  # never close a descriptor number twice: it may belong to someone else
        self._pty_open = False
        with contextlib.suppress(KeyError, ValueError):
            self.selector.unregister(self.master)
        for fd in (self.master, self._slave):
            with contextlib.suppress(OSError):
                os.close(fd)
        if self.link_path:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(self.link_path)

    def vanish(self, duration_s: float) -> None:
        # The port goes a moment after the request that triggers it was read, as a
        # cable pulled at some instant would, not inside the host's write.
        self._stop_event.wait(VANISH_SETTLE_S)
        self._close_pty()
        if self._stop_event.wait(duration_s):
            return
        self._open_pty()

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
        except OSError as exc:
            log.warning("%s: reply lost (%s)", self.emulator.kind, exc)

    def release(self) -> None:
        # Keeping our own slave fd open until here means a client that closes and
        # reopens the port never sees the pty hang up.
        self._close_pty()


class TcpEndpoint(_Endpoint):
    """A TCP port on 127.0.0.1; the client opens ``socket://127.0.0.1:PORT``.

    One client at a time, like a serial line: a new connection replaces the old one
    (a client that reconnects after a failure wins over its own dead socket).
    """

    def __init__(self, emulator: DeviceEmulator, faults: LineFaults | None, seed: int,
                 port: int, **kwargs: Any) -> None:
        super().__init__(emulator, faults, seed, **kwargs)
        self.client: socket.socket | None = None
        self._listen(port)
        self.port = self.listener.getsockname()[1]
        self.url = f"socket://127.0.0.1:{self.port}"

    def _listen(self, port: int) -> None:
        # Loopback only: the simulator must never be reachable from the network.
        self.listener = socket.create_server(("127.0.0.1", port))
        self.listener.setblocking(False)
        self.lines = self.emulator.new_assembler()
        self.selector.register(self.listener, selectors.EVENT_READ)

    def vanish(self, duration_s: float) -> None:
        self._stop_event.wait(VANISH_SETTLE_S)
        self._drop_client()
        with contextlib.suppress(KeyError, ValueError):
            self.selector.unregister(self.listener)
        self.listener.close()
        if self._stop_event.wait(duration_s):
            self.listener = socket.socket()  # a closed stand-in for release()
            return
        self._listen(self.port)

    def on_readable(self, key: selectors.SelectorKey) -> None:
        if key.fileobj is self.listener:
            try:
                conn, _ = self.listener.accept()
            except BlockingIOError:
                return
            self._drop_client()
            conn.setblocking(False)
            self.client = conn
            self.lines = self.emulator.new_assembler()
            self.selector.register(conn, selectors.EVENT_READ)
            log.debug("%s: client connected", self.emulator.kind)
            return
        if key.fileobj is not self.client:
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
        Optional damage to replies (:class:`LineFaults`), reproducible by seed; it
        replaces the line faults of ``fault_plan``.
    fault_plan
        Line faults and scheduled events (:class:`~sim_instrument.faults.FaultPlan`),
        usually the scenario's. Tracker stalls in it are the station's business.
    longitude_deg
        The site's longitude [degrees east], to place events in local solar time.
    record
        Keep every chunk each endpoint writes (``server.transcripts()``).
    make_emulator
        ``(kind, station, lock, reply_delay_scale)`` -> the device behind an endpoint:
        :class:`DeviceEmulator` (the reference protocol) unless another family's
        (:mod:`sim_instrument.modbus_server`, :func:`sim_instrument.text_server.text_emulator`).

    With a ``port_vanish`` event on pseudo-terminals, the urls are symbolic links in a
    private temporary directory, re-pointed when the port returns.

    Use as a context manager, or call :meth:`start` and :meth:`stop`.
    """

    def __init__(self, station: Any, endpoint: str = "pty", tcp_port: int = 0, *,
                 reply_delay_scale: float = 0.0, line_faults: LineFaults | None = None,
                 seed: int = 0, fault_plan: FaultPlan | None = None,
                 longitude_deg: float = 0.0, record: bool = False,
                 make_emulator: Callable[..., Any] = DeviceEmulator) -> None:
        if endpoint not in ("pty", "tcp"):
            raise ValueError(f"endpoint {endpoint!r} must be 'pty' or 'tcp'")
        if endpoint == "tcp" and tcp_port and not 1 <= tcp_port <= 65534:
            raise ValueError(f"TCP port {tcp_port} must be 1-65534 (the tracker takes the next)")
        plan = fault_plan or FaultPlan()
        faults = line_faults if line_faults is not None else plan.line
        self.station = station
        self.lock = threading.Lock()
        self._endpoints: list[_Endpoint] = []
        self._link_dir: str | None = None
        if endpoint == "pty" and plan.vanishes:
            self._link_dir = tempfile.mkdtemp(prefix="heliotrope-sim-")
        emulators = [make_emulator(kind, station, self.lock, reply_delay_scale)
                     for kind in (RADIOMETER, TRACKER)]
        try:
            for i, emulator in enumerate(emulators):
                common: dict[str, Any] = dict(
                    events=plan.for_device(emulator.kind), longitude_deg=longitude_deg,
                    late_reply_s=plan.late_reply_s, record=record)
                if endpoint == "pty":
                    link = os.path.join(self._link_dir, emulator.kind) if self._link_dir else None
                    ep: _Endpoint = PtyEndpoint(emulator, faults, seed + i, link_path=link,
                                                **common)
                else:
                    ep = TcpEndpoint(emulator, faults, seed + i,
                                     tcp_port + i if tcp_port else 0, **common)
                self._endpoints.append(ep)
        except BaseException:
            for ep in self._endpoints:
                ep.close()
            self._remove_link_dir()
            raise

    @property
    def urls(self) -> dict[str, str]:
        """``{"radiometer": url, "tracker": url}`` for ``serial.serial_for_url``."""
        return {ep.emulator.kind: ep.url for ep in self._endpoints}

    def transcripts(self) -> dict[str, list[bytes]]:
        """Every chunk each device wrote, when built with ``record=True``."""
        return {ep.emulator.kind: list(ep.transcript or []) for ep in self._endpoints}

    def fault_counts(self) -> dict[str, dict[str, int]]:
        """Per device: replies sent and faults inflicted, by kind."""
        return {ep.emulator.kind: ep.fault_counts for ep in self._endpoints}

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
        self._remove_link_dir()

    def _remove_link_dir(self) -> None:
        if self._link_dir is not None:
            shutil.rmtree(self._link_dir, ignore_errors=True)
            self._link_dir = None

    def __enter__(self) -> StationServer:
        self.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()
