"""One serial link to one device: framing, request ids, retries and reconnection.

:class:`Transport` sends one request and returns the fields of the matching reply. It
opens the port on first use (so a missing port is reported when it matters, with a
hint), frames replies with ``read_until`` under ``time.monotonic()`` deadlines, drops
stale replies and noise, retries a bounded number of times and reopens a port that
vanished. Everything it sees is logged at DEBUG; what it survived is counted.

:class:`ScriptedPort` and :func:`scripted_transport` stand in for a device in protocol
tests: a list of (request, reply) pairs, every one of which must be used.
"""

from __future__ import annotations

import contextlib
import dataclasses
import errno
import logging
import secrets
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any

import serial

from drivers.interfaces import LinkError

try:
    import termios

    # pyserial's POSIX flush() calls termios.tcdrain, whose error on a vanished pty or
    # USB adapter is termios.error (EIO): not an OSError, but the same failure.
    PORT_FAILURES: tuple[type[BaseException], ...] = (OSError, termios.error)
except ImportError:  # not POSIX
    PORT_FAILURES = (OSError,)
from drivers.protocol import (
    MAX_LINE_BYTES,
    RID_MAX,
    ChecksumError,
    ErrorReply,
    FrameError,
    ProtocolError,
    StaleReply,
    decode_reply,
    encode_request,
)

log = logging.getLogger(__name__)

#: Longest single wait inside read_until; bounds how far a read can overrun its deadline
#: (pyserial's read_until may wait one full port timeout past its own).
READ_SLICE_S = 0.1
#: Most doublings of the reopen back-off. 2**64 takes any sensible first wait past the
#: longest; the cap keeps 0.25 * 2**n a float after a week of failed opens (n > 1023
#: overflowed).
MAX_BACKOFF_DOUBLINGS = 64


class LinkTimeout(LinkError):
    """No complete reply before the deadline."""


class LinkShutDown(LinkError):
    """The transport was shut down (:meth:`Transport.shutdown`); nothing more is sent."""


class PortUnavailable(LinkError):
    """The port cannot be opened. The message says why and what to do.

    ``permanent`` is True when trying again cannot help (permission denied, a URL
    pyserial does not know), so the transport gives up at once.
    """

    def __init__(self, message: str, permanent: bool = False) -> None:
        super().__init__(message)
        self.permanent = permanent

    def __str__(self) -> str:
        return str(self.args[0])


@dataclasses.dataclass
class LinkCounters:
    """What a transport has seen since it was made."""

    exchanges: int = 0  # requests answered (OK or ERR)
    retries: int = 0  # requests sent again
    timeouts: int = 0  # attempts with no complete reply in time
    crc_errors: int = 0  # replies with a bad checksum
    stale: int = 0  # replies to an earlier request, discarded
    garbage: int = 0  # lines that were not replies, discarded
    reconnects: int = 0  # port reopened after it failed
    device_errors: int = 0  # ERR replies


def is_device_path(url: str) -> bool:
    """True for a device node (``/dev/ttyUSB0``, ``/dev/serial/by-id/...``), False for URLs."""
    return "://" not in url


SerialFactory = Callable[..., Any]


class Transport:
    """Request/reply exchanges with one device over pyserial.

    Parameters
    ----------
    url
        Anything ``serial.serial_for_url`` opens: a device path, ``socket://HOST:PORT``,
        ``loop://``.
    baudrate
        Line speed [bit/s]; ignored by socket:// and loop://.
    timeout_s
        How long one attempt waits for its reply [s], unless the caller gives a longer
        one for a slow command.
    retries
        How many times a failed attempt is repeated (so ``retries + 1`` attempts).
    name
        Used in log lines and error messages (default: the URL).
    backoff_s
        (first, longest) wait before reopening a failed port [s]; doubles each time.
    first_rid
        First request id; random by default so that a restarted process does not take
        a late reply to its predecessor's request for its own.
    serial_factory
        Opens the port; ``serial.serial_for_url`` unless a test substitutes a fake.
    sleep
        Used for back-off waits; by default a wait that :meth:`shutdown` cuts short.

    An exchange returns or raises within ``(retries + 1) * (timeout + backoff_s[1] +
    READ_SLICE_S)``.
    """

    def __init__(
        self,
        url: str,
        baudrate: int = 19200,
        timeout_s: float = 2.0,
        retries: int = 3,
        *,
        name: str | None = None,
        backoff_s: tuple[float, float] = (0.25, 5.0),
        first_rid: int | None = None,
        serial_factory: SerialFactory = serial.serial_for_url,
        sleep: Callable[[float], None] | None = None,
    ) -> None:
        if not url:
            raise ValueError("empty port: give a device path such as /dev/ttyUSB0 or a URL")
        if timeout_s <= 0:
            raise ValueError(f"timeout_s {timeout_s} must be > 0")
        if retries < 0:
            raise ValueError(f"retries {retries} must be >= 0")
        first_s, longest_s = backoff_s
        if not (0 <= first_s <= longest_s < float("inf")):
            raise ValueError(f"backoff_s {backoff_s} must be (first, longest) with "
                             "0 <= first <= longest, finite [s]")
        self.url = url
        self.baudrate = baudrate
        self.timeout_s = timeout_s
        self.retries = retries
        self.name = name or url
        self._backoff_first_s, self._backoff_max_s = backoff_s
        self._factory = serial_factory
        # Set by shutdown(): back-off waits and reads end at once, no new attempt starts.
        self._stopping = threading.Event()
        self._sleep = sleep if sleep is not None else self._stopping.wait
        self._rid = first_rid if first_rid is not None else secrets.randbelow(RID_MAX) + 1
        if not 1 <= self._rid <= RID_MAX:
            raise ValueError(f"first_rid {first_rid} must be 1..{RID_MAX}")
        self._port: Any = None
        self._port_failed = False
        self._failures = 0  # consecutive port failures, for the back-off
        self._lock = threading.Lock()
        self._counters = LinkCounters()

    # ------------------------------------------------------------------ public

    @property
    def counters(self) -> LinkCounters:
        """A copy of the counters."""
        return dataclasses.replace(self._counters)

    @property
    def is_open(self) -> bool:
        return self._port is not None

    def open(self) -> None:
        """Open the port now rather than on first use. Raises PortUnavailable."""
        with self._lock:
            self._ensure_open()

    def close(self) -> None:
        """Close the port; the next exchange opens it again."""
        with self._lock:
            self._drop_port()

    def shutdown(self, timeout_s: float = 1.0) -> bool:
        """Close for good within about ``timeout_s`` [s], even mid-exchange.

        An exchange in progress in another thread stops at its next step (a back-off
        wait or a read slice ends at once) and raises LinkError; later exchanges raise
        LinkError without touching the port. Returns False when that exchange had not
        let go of the link within ``timeout_s`` (a write blocked in the operating
        system); the port is then closed under it, which ends such a write.
        """
        self._stopping.set()
        got_lock = self._lock.acquire(timeout=timeout_s)
        try:
            self._drop_port()
        finally:
            if got_lock:
                self._lock.release()
        return got_lock

    def __enter__(self) -> Transport:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def exchange(
        self, cmd: str, args: Sequence[str | int] = (), *, timeout_s: float | None = None
    ) -> tuple[str, ...]:
        """Send ``cmd`` with ``args`` and return the fields of its ``OK`` reply.

        ``timeout_s`` gives a slow command (a long burst) a longer wait per attempt
        [s]; it never shortens the configured one.

        Raises
        ------
        drivers.protocol.ErrorReply
            The device answered ERR (after retrying the codes that allow it).
        PortUnavailable
            The port cannot be opened.
        drivers.interfaces.LinkError
            No usable reply after every attempt; its ``__cause__`` is the last failure.
        """
        per_try_s = self.timeout_s if timeout_s is None else max(timeout_s, self.timeout_s)
        str_args = [str(a) for a in args]
        with self._lock:
            last: Exception | None = None
            for attempt in range(self.retries + 1):
                self._check_not_stopping(cmd)
                if attempt:
                    self._counters.retries += 1
                    log.info("%s: %s attempt %d of %d after: %s",
                             self.name, cmd, attempt + 1, self.retries + 1, last)
                try:
                    fields = self._attempt(cmd, str_args, per_try_s)
                except LinkShutDown:
                    raise
                except ErrorReply as exc:
                    self._counters.device_errors += 1
                    if exc.retryable and attempt < self.retries:
                        last = exc
                        continue
                    raise
                except PortUnavailable as exc:
                    if exc.permanent:
                        raise
                    last = exc
                    self._back_off()
                    continue
                except (LinkTimeout, ProtocolError) as exc:
                    last = exc
                    continue
                except PORT_FAILURES as exc:
                    # SerialException is an OSError; a vanished USB adapter gives a bare
                    # OSError. Either way the port object is finished: reopen it.
                    log.warning("%s: port failed during %s (%s); will reopen", self.name, cmd, exc)
                    self._drop_port()
                    self._port_failed = True
                    self._failures += 1
                    last = exc
                    self._back_off()
                    continue
                self._counters.exchanges += 1
                self._failures = 0
                return fields
        if isinstance(last, PortUnavailable):
            raise last
        raise LinkError(
            f"{self.name}: no usable reply to {cmd} after {self.retries + 1} attempts "
            f"(last: {last})"
        ) from last

    def exchange_once(
        self, cmd: str, args: Sequence[str | int] = (), *, timeout_s: float | None = None
    ) -> tuple[str, ...]:
        """One attempt at ``cmd``, with no retry and no back-off: for the shutdown path.

        Returns or raises within about ``timeout_s + READ_SLICE_S`` plus the time the
        operating system takes to refuse an open, whatever state the link is in (a port
        that takes no bytes at all can hold a write for the configured ``timeout_s``
        more). Unlike :meth:`exchange`, ``timeout_s`` may be shorter than the configured
        timeout: it is the caller's whole budget [s], including any wait for an
        exchange another thread is in the middle of.

        Raises
        ------
        drivers.protocol.ErrorReply
            The device answered ERR.
        PortUnavailable
            The port cannot be opened (not retried, no back-off).
        drivers.interfaces.LinkError
            No usable reply to the one attempt, the port failed, or another thread
            held the link for the whole budget.
        """
        budget_s = self.timeout_s if timeout_s is None else timeout_s
        if not 0 < budget_s < float("inf"):
            raise ValueError(f"timeout_s {timeout_s} must be > 0 and finite")
        str_args = [str(a) for a in args]
        deadline = time.monotonic() + budget_s
        if not self._lock.acquire(timeout=budget_s):
            raise LinkError(f"{self.name}: link busy with another exchange for {budget_s:g} s; "
                            f"{cmd} not sent")
        try:
            self._check_not_stopping(cmd)
            # What the wait for the lock left of the budget, but a read slice at least.
            per_try_s = max(deadline - time.monotonic(), READ_SLICE_S)
            fields = self._attempt(cmd, str_args, per_try_s)
        except ErrorReply:
            self._counters.device_errors += 1
            raise
        except (LinkShutDown, LinkTimeout, ProtocolError, PortUnavailable):
            raise
        except PORT_FAILURES as exc:
            self._drop_port()
            self._port_failed = True
            self._failures += 1
            raise LinkError(f"{self.name}: port failed during {cmd} ({exc})") from exc
        finally:
            self._lock.release()
        self._counters.exchanges += 1
        self._failures = 0
        return fields

    # ------------------------------------------------------------------ internals

    def _check_not_stopping(self, cmd: str) -> None:
        if self._stopping.is_set():
            raise LinkShutDown(f"{self.name}: shut down; {cmd} not sent")

    def _next_rid(self) -> int:
        rid = self._rid
        # 0 is what a person typing at a terminal gets; never use it, so such replies
        # are always stale to us.
        self._rid = rid + 1 if rid < RID_MAX else 1
        return rid

    def _attempt(self, cmd: str, args: list[str], per_try_s: float) -> tuple[str, ...]:
        port = self._ensure_open()
        rid = self._next_rid()
        request = encode_request(rid, cmd, args)
        log.debug("%s > %r", self.name, request)
        port.write(request)
        port.flush()
        return self._read_reply(port, rid, cmd, per_try_s)

    def _read_reply(self, port: Any, rid: int, cmd: str, per_try_s: float) -> tuple[str, ...]:
        deadline = time.monotonic() + per_try_s
        pending = b""
        while True:
            self._check_not_stopping(cmd)
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                self._counters.timeouts += 1
                if pending:
                    self._counters.garbage += 1
                    log.debug("%s < unfinished %r", self.name, pending)
                tail = f" ({len(pending)} bytes of an unfinished line)" if pending else ""
                raise LinkTimeout(f"{self.name}: no reply to #{rid} {cmd} "
                                  f"within {per_try_s:g} s{tail}")
            wait_s = min(remaining, READ_SLICE_S)
            if port.timeout != wait_s:
                port.timeout = wait_s
            pending += port.read_until(b"\n", MAX_LINE_BYTES - len(pending))
            if not pending.endswith(b"\n"):
                if len(pending) >= MAX_LINE_BYTES:
                    self._counters.garbage += 1
                    log.debug("%s < overlong line dropped (%d bytes)", self.name, len(pending))
                    pending = b""
                continue
            line, pending = pending, b""
            log.debug("%s < %r", self.name, line)
            # A CR alone also ends a line, so noise glued to the front of a reply by a
            # CR cannot spoil the reply.
            for segment in line.split(b"\r"):
                segment = segment.strip(b"\n")
                if not segment.strip():
                    continue
                try:
                    reply = decode_reply(segment, rid, cmd)
                except StaleReply as exc:
                    self._counters.stale += 1
                    log.debug("%s: discarded %s", self.name, exc)
                    continue
                except ChecksumError:
                    # Most likely our own reply, damaged: asking again is quicker than
                    # waiting out the deadline for a reply that will not come.
                    self._counters.crc_errors += 1
                    raise
                except FrameError as exc:
                    self._counters.garbage += 1
                    log.debug("%s: discarded %s", self.name, exc)
                    continue
                return reply.fields

    def _ensure_open(self) -> Any:
        if self._port is not None:
            return self._port
        kwargs: dict[str, Any] = {
            "baudrate": self.baudrate,
            "timeout": READ_SLICE_S,
            "write_timeout": self.timeout_s,
        }
        if is_device_path(self.url):
            # Two programs on one serial line interleave bytes; refuse to share it.
            kwargs["exclusive"] = True
        try:
            port = self._factory(self.url, **kwargs)
        except ValueError as exc:
            raise PortUnavailable(
                f"{self.name}: cannot use port {self.url!r}: {exc}. Give a device path "
                "(/dev/serial/by-id/...) or a URL such as socket://127.0.0.1:PORT",
                permanent=True,
            ) from exc
        except OSError as exc:
            self._failures += 1
            raise _explain_open_failure(self.name, self.url, exc) from exc
        with contextlib.suppress(*PORT_FAILURES, AttributeError):
            port.reset_input_buffer()
        if self._port_failed:
            self._counters.reconnects += 1
            self._port_failed = False
            log.warning("%s: port reopened", self.name)
        else:
            log.debug("%s: port opened", self.name)
        self._port = port
        return port

    def _drop_port(self) -> None:
        port, self._port = self._port, None
        if port is not None:
            with contextlib.suppress(Exception):
                port.close()

    def _back_off(self) -> None:
        doublings = min(max(0, self._failures - 1), MAX_BACKOFF_DOUBLINGS)
        delay = min(self._backoff_max_s, self._backoff_first_s * 2.0**doublings)
        log.debug("%s: waiting %.2f s before reopening", self.name, delay)
        self._sleep(delay)


class OnTransport:
    """The link half of a driver whose device sits on one :class:`Transport`: its
    counters, close and shutdown (see the Radiometer and Tracker interfaces)."""

    transport: Transport

    def link_counters(self) -> dict[str, int]:
        return dataclasses.asdict(self.transport.counters)

    def close(self) -> None:
        self.transport.close()

    def shutdown(self, timeout_s: float = 1.0) -> None:
        self.transport.shutdown(timeout_s)


def _explain_open_failure(name: str, url: str, exc: OSError) -> PortUnavailable:
    code = exc.errno
    text = str(exc)
    if code in (errno.ENOENT, errno.ENODEV, errno.ENXIO):
        return PortUnavailable(
            f"{name}: no such port {url}: is the device plugged in and powered? "
            "List ports with 'python -m serial.tools.list_ports -v' and check the port "
            "in the configuration"
        )
    if code in (errno.EACCES, errno.EPERM):
        return PortUnavailable(
            f"{name}: permission denied on {url}: add the service user to the serial "
            "group ('sudo usermod -aG dialout USER', then log in again) or fix the "
            "device's udev rule",
            permanent=True,
        )
    if code in (errno.EBUSY, errno.EAGAIN, errno.EWOULDBLOCK) or "exclusively lock" in text:
        return PortUnavailable(
            f"{name}: {url} is in use by another program (a second service, a terminal "
            "program?); close it and try again"
        )
    if not is_device_path(url):
        return PortUnavailable(
            f"{name}: cannot connect to {url} ({text}); if this is the simulator, is "
            "heliotrope-sim running and is the port number right?"
        )
    return PortUnavailable(f"{name}: cannot open {url}: {text}")


# ---------------------------------------------------------------------------- test aid


class ScriptedPort:
    """A fake serial port for protocol tests: exact requests in, canned replies out.

    ``pairs`` is a list of (request bytes the driver must send, reply bytes to play
    back). A reply of ``b""`` plays nothing (a silent device). A request that differs
    from the next expected one raises AssertionError at once; :meth:`assert_done`
    fails if any pair was left unused.
    """

    def __init__(self, pairs: Sequence[tuple[bytes, bytes]]) -> None:
        self._pairs = list(pairs)
        self._rx = b""
        self.timeout: float | None = READ_SLICE_S
        self.written: list[bytes] = []
        self.is_open = True

    def write(self, data: bytes) -> int:
        self.written.append(bytes(data))
        if not self._pairs:
            raise AssertionError(f"unexpected request {bytes(data)!r}: the script is used up")
        expected, reply = self._pairs.pop(0)
        if bytes(data) != expected:
            raise AssertionError(f"request {bytes(data)!r} does not match expected {expected!r}")
        self._rx += reply
        return len(data)

    def read_until(self, expected: bytes = b"\n", size: int | None = None) -> bytes:
        end = self._rx.find(expected)
        if end < 0:
            # A real port waits out its timeout when nothing is coming.
            if not self._rx:
                time.sleep(self.timeout or 0)
            end = len(self._rx)
        else:
            end += len(expected)
        if size is not None:
            end = min(end, size)
        line, self._rx = self._rx[:end], self._rx[end:]
        return line

    def flush(self) -> None:
        pass

    def reset_input_buffer(self) -> None:
        self._rx = b""

    def close(self) -> None:
        self.is_open = False

    def assert_done(self) -> None:
        if self._pairs:
            left = ", ".join(repr(req) for req, _ in self._pairs)
            raise AssertionError(f"{len(self._pairs)} scripted request(s) never sent: {left}")


@contextlib.contextmanager
def scripted_transport(
    pairs: Sequence[tuple[bytes, bytes]],
    *,
    first_rid: int = 1,
    timeout_s: float = 0.3,
    retries: int = 0,
) -> Iterator[Transport]:
    """A Transport talking to a :class:`ScriptedPort`; checks every pair was used."""
    port = ScriptedPort(pairs)
    transport = Transport(
        "scripted://", timeout_s=timeout_s, retries=retries, first_rid=first_rid,
        serial_factory=lambda url, **kwargs: port,
    )
    yield transport
    port.assert_done()
