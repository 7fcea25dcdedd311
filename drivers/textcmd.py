"""Text-command radiometer and tracker: one line out, one line back, per action.

The command set comes from the configuration (:mod:`drivers.textcmd_spec`); this module
sends each action's command, waits for a line that matches the action's pattern and
turns its named groups into the interface's fields. The link is
:class:`drivers.transport.Transport`'s: the same lazy opening, reopening with back-off,
retries within the port's budget and counters; only one attempt's bytes differ.

On the link:

- A line that matches neither the action's pattern nor the device's error pattern is
  noise, a damaged reply or a late reply to an earlier attempt: it is counted as
  garbage and skipped, and the driver waits on for the reply until the attempt's
  deadline. No usable reply in time is a timeout: counted, and retried within the
  port's retries.
- A line matching the error pattern is the device refusing: :class:`TextDeviceError`, not
  retried (the same command would be refused again).
- A SCPI instrument answers a command it refuses with nothing, and queues the error
  (SCPI-1999 Vol. 2, sec. 21.8, SYSTem:ERRor?). With an ``error_query`` the driver asks
  for that error after a timeout: a non-zero code is a :class:`TextDeviceError`, zero
  means the reply was lost and the attempt is retried.
- A text protocol has no request ids and no checksums: the input is emptied before each
  attempt, so a late reply is not taken for the next one's unless it arrives after that
  attempt was sent; a bit flipped inside a digit cannot be seen at all.
"""

from __future__ import annotations

import contextlib
import logging
import math
import time
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from typing import Any

from drivers.interfaces import (
    Burst,
    DeviceError,
    Housekeeping,
    Identity,
    Radiometer,
    Tracker,
    TrackerState,
)
from drivers.protocol import FrameError
from drivers.textcmd_spec import (
    SCPI_NAN,
    SCPI_OVERLOAD,
    ActionSpec,
    TextSpec,
    check_radiometer_options,
    check_tracker_options,
    clock_fields,
)
from drivers.transport import PORT_FAILURES, READ_SLICE_S, LinkTimeout, OnTransport, Transport

log = logging.getLogger(__name__)

#: Longest reply line accepted [bytes]: 1000 samples of 6 channels in SCPI's NR3 form.
MAX_REPLY_BYTES = 128 * 1024
MAX_SAMPLES = 1000

Groups = dict[str, str | None]


class TextDeviceError(DeviceError):
    """The device refused a command: an error reply, or an entry in its error queue."""

    def __init__(self, device: str, action: str, code: str | None, message: str) -> None:
        where = f"error {code}" if code is not None else "error"
        super().__init__(f"{device}: {action} refused by the device ({where}: {message})")
        self.code = code
        self.device_message = message


class TextTransport(Transport):
    """A :class:`Transport` whose attempts are one text command and its reply line.

    ``exchange(action, [line, *extra])`` sends ``line`` and returns what ``parse(action,
    groups, extra)`` makes of the matching reply; ``parse`` raises ValueError for a reply
    that matched but makes no sense (the wrong number of values), which counts as garbage
    and is retried.
    """

    def __init__(self, spec: TextSpec, parse: Callable[[str, Groups, Sequence[str]], Any],
                 url: str, baudrate: int = 19200, timeout_s: float = 2.0, retries: int = 3,
                 **kwargs: Any) -> None:
        super().__init__(url, baudrate, timeout_s, retries, **kwargs)
        self.spec = spec
        self._parse = parse
        # A CRLF line is read up to its LF and the CR stripped; a CR line up to its CR.
        self._eol_byte = spec.line_ending[-1:]

    def _attempt(self, cmd: str, args: list[str], per_try_s: float) -> Any:
        action = self.spec.actions[cmd]
        port = self._ensure_open()
        with contextlib.suppress(*PORT_FAILURES, AttributeError):
            port.reset_input_buffer()  # a late reply to an earlier attempt goes here
        line, extra = args[0], args[1:]
        self._send(port, line)
        deadline = time.monotonic() + per_try_s
        skipped = 0
        while (text := self._read_line(port, deadline)) is not None:
            if self.spec.error_pattern is not None:
                m = self.spec.error_pattern.fullmatch(text)
                if m:
                    self._counters.device_errors += 1
                    groups = m.groupdict()
                    raise TextDeviceError(self.name, cmd, groups.get("code"),
                                          groups.get("message") or text)
            m = action.pattern.fullmatch(text)
            if m is None:
                # Noise, a damaged reply, or a late reply to an earlier attempt: skip it
                # and wait on. (Asking again at once loses to a device still working
                # through earlier requests: each retry then reads the next old reply.)
                self._counters.garbage += 1
                skipped += 1
                log.debug("%s: discarded %r (not a reply to %s)", self.name, text, cmd)
                continue
            try:
                return self._parse(cmd, m.groupdict(), extra)
            except ValueError as exc:
                self._counters.garbage += 1
                raise FrameError(f"{self.name}: reply to {cmd} {text[:60]!r}...: {exc}",
                                 text.encode("ascii", "replace")) from exc
        self._counters.timeouts += 1
        self._ask_error_queue(port, cmd, min(per_try_s, self.timeout_s))
        tail = f" ({skipped} other line{'s' if skipped != 1 else ''} skipped)" if skipped else ""
        raise LinkTimeout(f"{self.name}: no reply to {cmd} matching its pattern within "
                          f"{per_try_s:g} s{tail}")

    def _send(self, port: Any, line: str) -> None:
        data = line.encode("ascii") + self.spec.line_ending
        log.debug("%s > %r", self.name, data)
        port.write(data)
        port.flush()

    def _read_line(self, port: Any, deadline: float) -> str | None:
        """The next complete line as text, or None at the deadline."""
        pending = b""
        while True:
            self._check_not_stopping("read")
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                if pending.strip():
                    self._counters.garbage += 1
                    log.debug("%s < unfinished %r", self.name, pending)
                return None
            wait_s = min(remaining, READ_SLICE_S)
            if port.timeout != wait_s:
                port.timeout = wait_s
            pending += port.read_until(self._eol_byte, MAX_REPLY_BYTES - len(pending))
            if len(pending) >= MAX_REPLY_BYTES and not pending.endswith(self._eol_byte):
                self._counters.garbage += 1
                pending = b""
                continue
            if not pending.endswith(self._eol_byte):
                continue
            log.debug("%s < %r", self.name, pending)
            # Whatever the configured ending, CR and LF left over from a CR LF pair or
            # from noise belong to no reply.
            raw, pending = pending.strip(b"\r\n"), b""
            if not raw:
                continue
            try:
                return raw.decode("ascii")
            except UnicodeDecodeError:
                # Never a reply; the caller's pattern sees the replacement characters
                # and skips it as garbage.
                return raw.decode("ascii", "replace")

    def _ask_error_queue(self, port: Any, cmd: str, wait_s: float) -> None:
        """After a timeout: raise TextDeviceError when the device queued an error.

        Waits at most ``wait_s`` [s] for the answer (no longer than the attempt did, so
        a one-shot exchange keeps about to its budget)."""
        query = self.spec.error_query
        if query is None:
            return
        self._send(port, query.command)
        deadline = time.monotonic() + wait_s
        while (text := self._read_line(port, deadline)) is not None:
            m = query.pattern.fullmatch(text)
            if m is None:
                self._counters.garbage += 1
                continue
            code = m.group("code")
            with contextlib.suppress(ValueError):
                if int(code) == query.no_error_code:
                    return
            self._counters.device_errors += 1
            raise TextDeviceError(self.name, cmd, code, m.group("message"))


# ---------------------------------------------------------------------------- parsing


def _number(action: ActionSpec, groups: Groups, name: str) -> float:
    text = groups.get(name)
    if text is None:
        raise ValueError(f"no {name}")
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"{name} {text!r} is not a finite number")
    f = action.field(name)
    return value * f.scale + f.offset


def _mapped(action: ActionSpec, groups: Groups, name: str, device: str) -> Any:
    text = (groups.get(name) or "").strip()
    mapping = action.field(name).map or {}
    try:
        return mapping[text]
    except KeyError:
        raise DeviceError(f"{device}: {action.name} reported {name} {text!r}, which the "
                          f"configuration does not know; add it to actions.{action.name}."
                          f"fields.{name}.map (known: {', '.join(map(repr, mapping))})"
                          ) from None


def _identity(groups: Groups) -> Identity:
    model = " ".join(s.strip() for s in (groups.get("manufacturer"), groups.get("model")) if s)
    return Identity(model=model, serial=(groups["serial"] or "").strip(),
                    firmware=(groups["firmware"] or "").strip())


class _TextDevice(OnTransport):
    """What both text devices share: the transport, identify, clock and link."""

    kind = ""

    def __init__(self, spec: TextSpec, url: str, baudrate: int, timeout_s: float,
                 retries: int, **kwargs: Any) -> None:
        self.spec = spec
        self.transport = TextTransport(spec, self._parse, url, baudrate, timeout_s, retries,
                                       name=self.kind, **kwargs)

    def _query(self, action: str, extra: Sequence[Any] = (), *, timeout_s: float | None = None,
               **values: Any) -> Any:
        spec = self.spec.actions[action]
        line = spec.format(**values)
        wait = timeout_s if timeout_s is not None else spec.timeout_s
        return self.transport.exchange(action, [line, *map(str, extra)], timeout_s=wait)

    def _parse(self, action: str, groups: Groups, extra: Sequence[str]) -> Any:
        if action == "identify":
            return _identity(groups)
        return None

    def identify(self) -> Identity:
        return self._query("identify")

    def set_clock(self, when: datetime) -> None:
        if when.tzinfo is None:
            raise ValueError(f"set_clock needs a timezone-aware UTC time, got {when!r}")
        if "set_clock" not in self.spec.actions:
            log.debug("%s: no set_clock action configured; the clock is not set", self.kind)
            return
        self._query("set_clock", **clock_fields(when.astimezone(UTC)))


class TextRadiometer(_TextDevice, Radiometer):
    """A radiometer read through a text-command instrument (voltmeter and scanner)."""

    kind = "radiometer"

    def channel_count(self) -> int:
        assert self.spec.channels is not None
        return self.spec.channels

    def read_burst(self, n: int) -> Burst:
        return self._samples("read_channels", n)

    def read_dark(self, n: int) -> Burst:
        return self._samples("read_dark", n)

    def _samples(self, action: str, n: int) -> Burst:
        if not 1 <= n <= MAX_SAMPLES:
            raise ValueError(f"{action} of {n} samples: the text driver allows 1-{MAX_SAMPLES}")
        spec = self.spec.actions[action]
        # The instrument needs the burst's own span on top of the usual wait.
        span_s = (n - 1) * (spec.sample_interval_s or 0.0)
        timeout_s = (spec.timeout_s or self.transport.timeout_s) + span_s
        return self._query(action, [n], timeout_s=timeout_s, n=n)

    def read_housekeeping(self) -> Housekeeping:
        return self._query("read_housekeeping")

    def reset(self) -> None:
        if "reset" not in self.spec.actions:
            raise DeviceError("radiometer: no reset action in instrument.radiometer.options."
                              "actions; add one to let the daemon reset the instrument")
        self._query("reset")

    def _parse(self, action: str, groups: Groups, extra: Sequence[str]) -> Any:
        spec = self.spec.actions.get(action)
        if action in ("read_channels", "read_dark"):
            assert spec is not None
            return self._burst(spec, groups, int(extra[0]))
        if action == "read_housekeeping":
            assert spec is not None
            return self._housekeeping(spec, groups)
        return super()._parse(action, groups, extra)

    def _burst(self, spec: ActionSpec, groups: Groups, n: int) -> Burst:
        channels = self.channel_count()
        texts = (groups["values"] or "").split(self.spec.separator)
        if len(texts) != n * channels:
            raise ValueError(f"{len(texts)} values, expected {n} samples of {channels} "
                             "channels")
        f = spec.field("values")
        full_scale = self.spec.full_scale_v
        saturated = [False] * channels
        rows = []
        for i in range(n):
            row = []
            for c in range(channels):
                raw = float(texts[i * channels + c])
                if not math.isfinite(raw):
                    raise ValueError(f"value {texts[i * channels + c]!r} is not finite")
                volts = raw * f.scale + f.offset
                if raw >= SCPI_OVERLOAD or (full_scale is not None and volts >= full_scale):
                    saturated[c] = True
                    volts = full_scale if full_scale is not None else volts
                row.append(volts)
            rows.append(tuple(row))
        if "duration_s" in spec.pattern.groupindex and groups.get("duration_s") is not None:
            duration_s = _number(spec, groups, "duration_s")
        else:
            duration_s = (n - 1) * (spec.sample_interval_s or 0.0)
        return Burst(tuple(rows), duration_s, tuple(saturated))

    def _housekeeping(self, spec: ActionSpec, groups: Groups) -> Housekeeping:
        pressure = None
        if groups.get("pressure_hpa") is not None and float(groups["pressure_hpa"] or 0) < SCPI_NAN:
            pressure = _number(spec, groups, "pressure_hpa")
        return Housekeeping(
            detector_temp_c=_number(spec, groups, "detector_temp_c"),
            case_temp_c=_number(spec, groups, "case_temp_c"),
            ambient_temp_c=_number(spec, groups, "ambient_temp_c"),
            supply_v=_number(spec, groups, "supply_v"),
            humidity_pct=_number(spec, groups, "humidity_pct"),
            pressure_hpa=pressure)


class TextTracker(_TextDevice, Tracker):
    """A two-axis tracker behind a small text-command firmware."""

    kind = "tracker"

    def goto(self, azimuth_deg: float, elevation_deg: float) -> None:
        if not (math.isfinite(azimuth_deg) and math.isfinite(elevation_deg)):
            raise ValueError(f"goto({azimuth_deg}, {elevation_deg}): angles must be finite")
        self._query("goto", az=azimuth_deg % 360.0, el=elevation_deg)

    def follow_sun(self, on: bool) -> None:
        self._query("follow", on=1 if on else 0)

    def state(self) -> TrackerState:
        return self._query("state")

    def park(self) -> None:
        self._query("park")

    def park_once(self, timeout_s: float = 2.0) -> None:
        """One park command, no retry, no back-off, within about ``timeout_s`` [s]."""
        line = self.spec.actions["park"].format()
        self.transport.exchange_once("park", [line], timeout_s=timeout_s)

    def _parse(self, action: str, groups: Groups, extra: Sequence[str]) -> Any:
        if action != "state":
            return super()._parse(action, groups, extra)
        spec = self.spec.actions["state"]
        locked = bool(_mapped(spec, groups, "locked", self.kind))
        error = _number(spec, groups, "error_deg") if groups.get("error_deg") else 0.0
        return TrackerState(mode=_mapped(spec, groups, "mode", self.kind),
                            azimuth_deg=_number(spec, groups, "azimuth_deg"),
                            elevation_deg=_number(spec, groups, "elevation_deg"),
                            locked=locked, error_deg=error if locked else 0.0)


def open_radiometer(url: str, baudrate: int = 19200, timeout_s: float = 2.0, retries: int = 3,
                    options: TextSpec | Any = None) -> TextRadiometer:
    """The registry's factory; ``options`` is what the option check made (or the raw block)."""
    spec = options if isinstance(options, TextSpec) else check_radiometer_options(options)
    return TextRadiometer(spec, url, baudrate, timeout_s, retries)


def open_tracker(url: str, baudrate: int = 19200, timeout_s: float = 2.0, retries: int = 3,
                 options: TextSpec | Any = None) -> TextTracker:
    """The registry's factory; ``options`` is what the option check made (or the raw block)."""
    spec = options if isinstance(options, TextSpec) else check_tracker_options(options)
    return TextTracker(spec, url, baudrate, timeout_s, retries)
