"""The two device interfaces the daemon talks to.

A driver for another instrument implements one of these classes in one module on
top of :mod:`drivers.transport`. Everything crossing this seam is plain data in SI
or trade units named in the field; no driver returns protocol text.
"""

from __future__ import annotations

import abc
from dataclasses import dataclass
from datetime import datetime


class DeviceError(Exception):
    """The device answered, but with an error, or with something that makes no sense."""


class LinkError(OSError):
    """No usable answer: timeout, garbage, checksum failure or a vanished port."""


class DriverConfigError(ValueError):
    """A driver's ``options`` block is wrong; ``key`` is the path inside that block.

    Raised by a driver family's option check while the configuration is read, so a
    wrong register map or command template is found at start-up (exit 78), never at
    the first target."""

    def __init__(self, key: str, message: str):
        super().__init__(f"{key}: {message}" if key else message)
        self.key = key
        self.message = message


@dataclass(frozen=True)
class Identity:
    model: str
    serial: str
    firmware: str


@dataclass(frozen=True)
class Burst:
    """A burst of samples on all channels, in the instrument's channel order.

    ``samples[i][c]`` is sample ``i`` of channel ``c`` [V]. ``duration_s`` is the time
    from the first to the last sample as the instrument reports it; the burst's mean
    time is the command time plus half of it.
    """

    samples: tuple[tuple[float, ...], ...]
    duration_s: float
    saturated: tuple[bool, ...]  # per channel: any sample at full scale


@dataclass(frozen=True)
class Housekeeping:
    detector_temp_c: float
    case_temp_c: float
    ambient_temp_c: float
    supply_v: float
    humidity_pct: float
    pressure_hpa: float | None  # None when no barometer is fitted


@dataclass(frozen=True)
class TrackerState:
    mode: str  # "idle", "slewing", "tracking", "parked", "fault"
    azimuth_deg: float  # from north, clockwise
    elevation_deg: float
    locked: bool  # sun sensor has the sun within its capture range
    error_deg: float  # pointing error from the sun sensor (0 when not locked)


class Radiometer(abc.ABC):
    @abc.abstractmethod
    def identify(self) -> Identity: ...

    @abc.abstractmethod
    def channel_count(self) -> int: ...

    @abc.abstractmethod
    def set_clock(self, when: datetime) -> None:
        """Set the instrument's clock to ``when`` (UTC, timezone-aware)."""

    @abc.abstractmethod
    def read_burst(self, n: int) -> Burst: ...

    @abc.abstractmethod
    def read_dark(self, n: int) -> Burst:
        """Shutter closed, ``n`` samples on all channels."""

    @abc.abstractmethod
    def read_housekeeping(self) -> Housekeeping: ...

    @abc.abstractmethod
    def reset(self) -> None: ...

    def link_counters(self) -> dict[str, int]:
        """Link faults seen so far (timeouts, bad checksums, reconnects...), by kind.

        Drivers without a counted link return an empty mapping."""
        return {}

    @abc.abstractmethod
    def close(self) -> None: ...

    def shutdown(self, timeout_s: float = 1.0) -> None:
        """Close for good within about ``timeout_s`` [s], even with a command in
        progress in another thread (which then fails with a LinkError).

        For the stop path. Drivers whose close can block longer override this; the
        default is :meth:`close`."""
        self.close()


class Tracker(abc.ABC):
    @abc.abstractmethod
    def identify(self) -> Identity: ...

    @abc.abstractmethod
    def set_clock(self, when: datetime) -> None: ...

    @abc.abstractmethod
    def goto(self, azimuth_deg: float, elevation_deg: float) -> None:
        """Start a slew; returns at once. Poll :meth:`state` for arrival."""

    @abc.abstractmethod
    def follow_sun(self, on: bool) -> None:
        """Closed-loop tracking on the sun sensor on or off."""

    @abc.abstractmethod
    def state(self) -> TrackerState: ...

    @abc.abstractmethod
    def park(self) -> None: ...

    def park_once(self, timeout_s: float = 2.0) -> None:
        """Park with one try within about ``timeout_s`` [s]: no retry, no back-off.

        For the stop path, where a dead link must not hold up the exit. Drivers whose
        :meth:`park` retries override this; the default is :meth:`park`.

        Raises LinkError or DeviceError as :meth:`park` does."""
        self.park()

    def link_counters(self) -> dict[str, int]:
        """Link faults seen so far (timeouts, bad checksums, reconnects...), by kind.

        Drivers without a counted link return an empty mapping."""
        return {}

    @abc.abstractmethod
    def close(self) -> None: ...

    def shutdown(self, timeout_s: float = 1.0) -> None:
        """Close for good within about ``timeout_s`` [s], even with a command in
        progress in another thread (which then fails with a LinkError).

        For the stop path. Drivers whose close can block longer override this; the
        default is :meth:`close`."""
        self.close()
