"""Clocks: the simulated clock jumps, the real clock is aware UTC and interruptible."""

from __future__ import annotations

import threading
from datetime import UTC, datetime, timedelta, timezone

import pytest

from daemon.station.clock import RealClock, SimClock, require_utc


def test_sim_clock_jumps_to_the_next_event():
    start = datetime(2027, 2, 15, 6, 0, tzinfo=UTC)
    clock = SimClock(start)
    assert clock.now() == start and clock.monotonic() == 0.0
    clock.sleep_until(start + timedelta(hours=2, seconds=30))
    assert clock.now() == start + timedelta(hours=2, seconds=30)
    assert clock.monotonic() == 7230.0
    clock.sleep_until(start)  # the past: no jump backwards
    assert clock.now() == start + timedelta(hours=2, seconds=30)
    clock.sleep(-5)
    assert clock.monotonic() == 7230.0


def test_sim_clock_accepts_other_zones_and_refuses_naive_times():
    local = datetime(2027, 2, 15, 0, 0, tzinfo=timezone(timedelta(hours=-6)))
    assert SimClock(local).now() == datetime(2027, 2, 15, 6, 0, tzinfo=UTC)
    with pytest.raises(ValueError, match="naive datetime"):
        SimClock(datetime(2027, 2, 15))
    with pytest.raises(ValueError, match="timezone-aware"):
        require_utc(datetime(2027, 2, 15, 12))


def test_real_clock_is_aware_utc_and_wakes_early():
    clock = RealClock()
    assert clock.now().tzinfo is UTC
    sleeper = threading.Thread(target=clock.sleep_until,
                               args=(clock.now() + timedelta(hours=1),), daemon=True)
    sleeper.start()
    clock.wake()
    sleeper.join(timeout=60)  # a hang guard: without wake() this is an hour
    assert not sleeper.is_alive()


def test_step_detector_sees_steps_of_the_wall_clock_only():
    from daemon.station.clock import StepDetector

    clock = SimClock(datetime(2027, 2, 15, 15, 0, tzinfo=UTC))
    watch = StepDetector(clock, threshold_s=60)
    clock.advance(3600)  # an hour of ordinary time: no step
    assert watch.check() is None
    clock.step_wall(-600)  # NTP pulls the clock back ten minutes
    assert watch.check() == pytest.approx(-600)
    clock.step_wall(45)  # under the threshold: absorbed
    assert watch.check() is None
    clock.advance(30)
    clock.step_wall(600)
    assert watch.check() == pytest.approx(600)
