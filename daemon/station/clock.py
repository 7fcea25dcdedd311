"""Clocks: the one place the daemon reads time.

Every component that needs the time takes a :class:`Clock`. ``RealClock`` is for
operation; ``SimClock`` jumps from event to event so that a whole day runs in
seconds for tests, the demo and the bench. Wall-clock time (``now``) is always an
aware UTC datetime; durations and deadlines use ``monotonic`` because boards without
a real-time clock step their wall clock when NTP syncs.
"""

from __future__ import annotations

import threading
import time
from datetime import UTC, datetime, timedelta
from typing import Protocol


class Clock(Protocol):
    def now(self) -> datetime:
        """Current time, aware UTC."""

    def monotonic(self) -> float:
        """Seconds on a clock that never steps; only differences mean anything."""

    def sleep(self, seconds: float) -> None:
        """Wait ``seconds``; returns early if :meth:`wake` is called."""

    def sleep_until(self, when: datetime) -> None:
        """Wait until wall time ``when`` (aware); returns early if woken."""

    def wake(self) -> None:
        """Interrupt a sleep in progress (for shutdown)."""


def require_utc(when: datetime) -> datetime:
    """Return ``when`` in UTC; refuse naive datetimes, which are ambiguous."""
    if when.tzinfo is None or when.utcoffset() is None:
        raise ValueError(f"naive datetime {when!r}: every time in heliotrope is timezone-aware")
    return when.astimezone(UTC)


class RealClock:
    """The system clock. Long sleeps are cut into slices so a stepped wall clock is
    noticed within ``slice_s`` instead of after the whole (wrong) interval."""

    def __init__(self, slice_s: float = 30.0):
        self._slice_s = slice_s
        self._woken = threading.Event()

    def now(self) -> datetime:
        return datetime.now(UTC)

    def monotonic(self) -> float:
        return time.monotonic()

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            self._woken.wait(seconds)

    def sleep_until(self, when: datetime) -> None:
        when = require_utc(when)
        while not self._woken.is_set():
            remaining = (when - self.now()).total_seconds()
            if remaining <= 0:
                return
            self._woken.wait(min(remaining, self._slice_s))

    def wake(self) -> None:
        self._woken.set()


class SimClock:
    """A simulated clock that stands still until asked to sleep, then jumps.

    Sleeping moves the clock forward instantly, so code that waits for a target at
    14:05 UTC returns at once with ``now()`` equal to 14:05. ``monotonic`` is the
    simulated seconds since the start, so deadlines behave as in the field.
    """

    def __init__(self, start: datetime):
        self._start = require_utc(start)
        self._elapsed = 0.0

    def now(self) -> datetime:
        return self._start + timedelta(seconds=self._elapsed)

    def monotonic(self) -> float:
        return self._elapsed

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            self._elapsed += seconds

    def sleep_until(self, when: datetime) -> None:
        ahead = (require_utc(when) - self.now()).total_seconds()
        self.sleep(ahead)

    def advance(self, seconds: float) -> None:
        """Move the clock forward (tests: work that took time)."""
        self.sleep(seconds)

    def step_wall(self, seconds: float) -> None:
        """Step the wall clock alone, as NTP does on a board without a real-time clock."""
        self._start += timedelta(seconds=seconds)

    def wake(self) -> None:
        pass


class StepDetector:
    """Notices the wall clock stepping against the monotonic clock.

    Each :meth:`check` compares how far wall time and monotonic time moved since the
    previous check; a difference beyond ``threshold_s`` is a step (an NTP sync after a
    boot without a real-time clock, an operator's ``date -s``). Slow slewing stays below
    the threshold and is absorbed.
    """

    def __init__(self, clock: Clock, threshold_s: float = 60.0):
        self.clock = clock
        self.threshold_s = threshold_s
        self._wall = clock.now()
        self._mono = clock.monotonic()

    def check(self) -> float | None:
        """The step in seconds (positive: wall clock jumped ahead) or None."""
        wall, mono = self.clock.now(), self.clock.monotonic()
        step = (wall - self._wall).total_seconds() - (mono - self._mono)
        self._wall, self._mono = wall, mono
        return step if abs(step) > self.threshold_s else None
