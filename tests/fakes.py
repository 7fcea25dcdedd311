"""In-process stand-ins for the devices, for tests of the acquisition logic.

They obey the driver interfaces and nothing more; the physics of the signal is the
simulator's business and is tested there."""

from __future__ import annotations

from datetime import datetime

from drivers.interfaces import (
    Burst,
    Housekeeping,
    Identity,
    LinkError,
    Radiometer,
    Tracker,
    TrackerState,
)


class FakeRadiometer(Radiometer):
    def __init__(self, channels: int = 6, signal_v: float = 1.0, fail_bursts: set[int] = ()):
        self.channels = channels
        self.signal_v = signal_v
        self.fail_bursts = set(fail_bursts)  # burst numbers (0-based) that time out
        self.bursts = 0
        self.clock_sets: list[datetime] = []

    def identify(self) -> Identity:
        return Identity("FAKE-R", "0001", "1.0")

    def channel_count(self) -> int:
        return self.channels

    def set_clock(self, when: datetime) -> None:
        self.clock_sets.append(when)

    def read_burst(self, n: int) -> Burst:
        k = self.bursts
        self.bursts += 1
        if k in self.fail_bursts:
            raise LinkError("no reply to burst within 2 s")
        return Burst(tuple((self.signal_v,) * self.channels for _ in range(n)),
                     duration_s=0.1 * (n - 1), saturated=(False,) * self.channels)

    def read_dark(self, n: int) -> Burst:
        return Burst(tuple((0.001,) * self.channels for _ in range(n)), 0.1 * (n - 1),
                     (False,) * self.channels)

    def read_housekeeping(self) -> Housekeeping:
        return Housekeeping(25.0, 20.0, 5.0, 12.6, 30.0, None)

    def reset(self) -> None:
        pass

    def close(self) -> None:
        pass


class FakeTracker(Tracker):
    def __init__(self, locks: bool = True, slew_polls: int = 1):
        self.locks = locks
        self.slew_polls = slew_polls
        self._polls_left = 0
        self.mode = "parked"
        self.parks = 0

    def identify(self) -> Identity:
        return Identity("FAKE-T", "0002", "1.0")

    def set_clock(self, when: datetime) -> None:
        pass

    def goto(self, azimuth_deg: float, elevation_deg: float) -> None:
        self.mode = "slewing"
        self._polls_left = self.slew_polls

    def follow_sun(self, on: bool) -> None:
        pass

    def state(self) -> TrackerState:
        if self.mode == "slewing":
            if self._polls_left > 0:
                self._polls_left -= 1
                return TrackerState("slewing", 100.0, 20.0, False, 0.0)
            self.mode = "tracking"
        if self.mode == "tracking" and self.locks:
            return TrackerState("tracking", 100.0, 20.0, True, 0.02)
        return TrackerState(self.mode, 100.0, 20.0, False, 0.0)

    def park(self) -> None:
        self.mode = "parked"
        self.parks += 1

    def close(self) -> None:
        pass
