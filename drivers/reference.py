"""The reference radiometer and tracker: the heliotrope line protocol over a Transport.

These speak drivers/PROTOCOL.md, which the simulator also serves. A driver for other
hardware implements :class:`~drivers.interfaces.Radiometer` or
:class:`~drivers.interfaces.Tracker` the same way in its own module.

The factories do not open the port: the first command does, and a missing port is
reported then, with a hint (see :class:`drivers.transport.PortUnavailable`).
"""

from __future__ import annotations

import math
from datetime import datetime

from drivers import protocol as p
from drivers.interfaces import (
    Burst,
    DeviceError,
    Housekeeping,
    Identity,
    Radiometer,
    Tracker,
    TrackerState,
)
from drivers.transport import OnTransport, Transport

_KIND_NAMES = {p.KIND_RADIOMETER: "radiometer", p.KIND_TRACKER: "tracker"}


def _identify(transport: Transport, want_kind: str) -> tuple[Identity, int | None]:
    kind, identity, channels = p.parse_identity(transport.exchange(p.ID))
    if kind != want_kind:
        raise DeviceError(
            f"{transport.name}: the device on {transport.url} is a "
            f"{_KIND_NAMES.get(kind, kind)}, not a {_KIND_NAMES[want_kind]}: are the "
            "radiometer and tracker ports swapped in the configuration?"
        )
    return identity, channels


def _set_clock(transport: Transport, when: datetime) -> None:
    if when.tzinfo is None:
        raise ValueError(f"set_clock needs a timezone-aware UTC time, got {when!r}")
    transport.exchange(p.CLK, [p.format_time(when)])


def _read_clock(transport: Transport) -> datetime:
    return p.parse_clock(transport.exchange(p.CLK))


class SerialRadiometer(OnTransport, Radiometer):
    """A multi-channel radiometer speaking the heliotrope line protocol."""

    def __init__(self, transport: Transport) -> None:
        self.transport = transport
        self._channels: int | None = None

    def identify(self) -> Identity:
        identity, channels = _identify(self.transport, p.KIND_RADIOMETER)
        self._channels = channels
        return identity

    def channel_count(self) -> int:
        if self._channels is None:
            self.identify()
        assert self._channels is not None
        return self._channels

    def set_clock(self, when: datetime) -> None:
        _set_clock(self.transport, when)

    def clock(self) -> datetime:
        """The instrument's clock (UTC)."""
        return _read_clock(self.transport)

    def read_burst(self, n: int) -> Burst:
        return self._samples(p.BURST, n)

    def read_dark(self, n: int) -> Burst:
        return self._samples(p.DARK, n)

    def _samples(self, cmd: str, n: int) -> Burst:
        if not 1 <= n <= p.MAX_SAMPLES:
            raise ValueError(f"{cmd} of {n} samples: the protocol allows 1-{p.MAX_SAMPLES}")
        channels = self.channel_count()
        timeout_s = p.reply_timeout_s(cmd, n, channels, self.transport.baudrate)
        burst = p.parse_burst(self.transport.exchange(cmd, [n], timeout_s=timeout_s))
        if len(burst.samples) != n or len(burst.saturated) != channels:
            raise p.BadPayload(
                f"{cmd} {n} answered with {len(burst.samples)} samples of "
                f"{len(burst.saturated)} channels; expected {n} of {channels}"
            )
        return burst

    def read_housekeeping(self) -> Housekeeping:
        return p.parse_housekeeping(self.transport.exchange(p.HK))

    def status(self) -> p.RadiometerStatus:
        """State, uptime and request counters as the instrument reports them."""
        return p.parse_radiometer_status(self.transport.exchange(p.STATUS))

    def reset(self) -> None:
        self.transport.exchange(p.RST, timeout_s=p.reply_timeout_s(p.RST))
        self._channels = None


class SerialTracker(OnTransport, Tracker):
    """A two-axis sun tracker speaking the heliotrope line protocol."""

    def __init__(self, transport: Transport) -> None:
        self.transport = transport

    def identify(self) -> Identity:
        return _identify(self.transport, p.KIND_TRACKER)[0]

    def set_clock(self, when: datetime) -> None:
        _set_clock(self.transport, when)

    def clock(self) -> datetime:
        """The tracker's clock (UTC)."""
        return _read_clock(self.transport)

    def goto(self, azimuth_deg: float, elevation_deg: float) -> None:
        if not (math.isfinite(azimuth_deg) and math.isfinite(elevation_deg)):
            raise ValueError(f"goto({azimuth_deg}, {elevation_deg}): angles must be finite")
        # Any azimuth names a direction; the device wants 0 <= az < 360.
        az = azimuth_deg % 360.0
        if p.format_angle_deg(az) == p.format_angle_deg(360.0):
            az = 0.0
        self.transport.exchange(p.GOTO, [p.format_angle_deg(az), p.format_angle_deg(elevation_deg)])

    def follow_sun(self, on: bool) -> None:
        self.transport.exchange(p.SUN, ["1" if on else "0"])

    def state(self) -> TrackerState:
        return p.parse_tracker_state(self.transport.exchange(p.STATUS))

    def park(self) -> None:
        self.transport.exchange(p.PARK)

    def park_once(self, timeout_s: float = 2.0) -> None:
        """One PARK, no retry, no back-off, within about ``timeout_s`` [s].

        PARK alone also stops following the sun (PROTOCOL.md, tracker commands), so
        the stop path needs no SUN 0 before it."""
        self.transport.exchange_once(p.PARK, timeout_s=timeout_s)


def open_radiometer(
    url: str, baudrate: int = 19200, timeout_s: float = 2.0, retries: int = 3,
    options: None = None,
) -> SerialRadiometer:
    """A :class:`SerialRadiometer` on ``url`` (device path or pyserial URL); opens lazily."""
    return SerialRadiometer(Transport(url, baudrate, timeout_s, retries, name="radiometer"))


def open_tracker(
    url: str, baudrate: int = 19200, timeout_s: float = 2.0, retries: int = 3,
    options: None = None,
) -> SerialTracker:
    """A :class:`SerialTracker` on ``url`` (device path or pyserial URL); opens lazily."""
    return SerialTracker(Transport(url, baudrate, timeout_s, retries, name="tracker"))
