"""Acquisition logic with in-process fake devices and a simulated clock: what is stored,
what becomes an event, and that device trouble never stops the day."""

from __future__ import annotations

import sqlite3
from datetime import date
from pathlib import Path

import pytest

from daemon.config.settings import load_config
from daemon.station.acquisition import Station, local_midnight_utc, perform, run_day
from daemon.station.clock import SimClock
from daemon.station.planner import plan_day
from daemon.store.writer import Store
from tests.fakes import FakeRadiometer, FakeTracker

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"
DAY = date(2027, 2, 15)


@pytest.fixture
def cfg():
    return load_config(CONFIG)


def _station(cfg, tmp_path, radiometer=None, tracker=None):
    store = Store.open(tmp_path / "t.db")
    clock = SimClock(local_midnight_utc(cfg, DAY))
    return Station(cfg, radiometer or FakeRadiometer(), tracker or FakeTracker(), store, clock)


def _rows(path, sql):
    conn = sqlite3.connect(path)
    try:
        return conn.execute(sql).fetchall()
    finally:
        conn.close()


def test_a_day_with_a_timeout_and_a_lost_lock_goes_on(cfg, tmp_path):
    radiometer = FakeRadiometer(fail_bursts={3})
    station = _station(cfg, tmp_path, radiometer=radiometer)
    plan = plan_day(cfg, DAY)
    outcomes = []
    run_day(station, DAY, plan, on_step=outcomes.append)
    station.store.close()
    n_targets = len(plan.targets)
    assert len(outcomes) == n_targets
    assert sum(not o.ok for o in outcomes) == 1
    db = tmp_path / "t.db"
    status = dict(_rows(db, "select status, count(*) from measurements group by status"))
    assert status == {"ok": n_targets - 1, "failed": 1}
    # the failed measurement has no samples; every ok one has a burst and a dark per channel
    assert _rows(db, "select count(*) from samples s join measurements m "
                     "on m.id = s.measurement_id where m.status = 'failed'") == [(0,)]
    per = _rows(db, "select count(*) from samples group by measurement_id")
    assert {c for (c,) in per} == {6 * (cfg.acquisition.burst_samples
                                        + cfg.acquisition.dark_samples)}
    kinds = [k for (k,) in _rows(db, "select kind from events")]
    assert kinds.count("device_fault") == 1 and kinds.count("session_fit") == 2


def test_no_sun_lock_is_a_failed_measurement_with_a_reason(cfg, tmp_path):
    station = _station(cfg, tmp_path, tracker=FakeTracker(locks=False))
    target = plan_day(cfg, DAY).targets[0]
    station.clock.sleep_until(target.time_utc)
    outcome = station.measure(target, DAY)
    assert not outcome.ok
    assert "no sun lock after 30 s (sun sensor reports no lock)" in outcome.message
    station.store.close()
    rows = _rows(tmp_path / "t.db", "select status, failure from measurements")
    assert rows == [("failed", "no sun lock after 30 s (sun sensor reports no lock)")]


def test_a_target_long_past_is_recorded_as_missed_not_measured(cfg, tmp_path):
    station = _station(cfg, tmp_path)
    target = plan_day(cfg, DAY).targets[0]
    station.clock.sleep_until(target.time_utc)
    station.clock.advance(600)  # a restart ten minutes after the target
    assert perform(station, target, DAY, {}) is None
    station.store.close()
    assert _rows(tmp_path / "t.db", "select count(*) from measurements") == [(0,)]
    events = _rows(tmp_path / "t.db", "select kind, message from events")
    assert events[0][0] == "missed_target" and "missed by 0:10:00" in events[0][1]


def test_instrument_clocks_are_set_at_every_target(cfg, tmp_path):
    radiometer = FakeRadiometer()
    station = _station(cfg, tmp_path, radiometer=radiometer)
    target = plan_day(cfg, DAY).targets[2]
    station.clock.sleep_until(target.time_utc)
    station.measure(target, DAY)
    station.store.close()
    assert radiometer.clock_sets and radiometer.clock_sets[-1] >= target.time_utc


class _SentinelRadiometer(FakeRadiometer):
    """Firmware that reports a missing sensor as -999.9."""

    def read_housekeeping(self):
        from drivers.interfaces import Housekeeping
        return Housekeeping(-999.9, 20.0, 5.0, 12.6, 30.0, -999.9)


def test_implausible_housekeeping_is_stored_as_unknown_and_the_burst_kept(cfg, tmp_path):
    station = _station(cfg, tmp_path, radiometer=_SentinelRadiometer())
    target = plan_day(cfg, DAY).targets[0]
    station.clock.sleep_until(target.time_utc)
    assert station.measure(target, DAY).ok
    station.store.close()
    db = tmp_path / "t.db"
    (pressure,) = _rows(db, "select pressure_hpa from measurements")[0]
    assert pressure == pytest.approx(station.pressure_hpa)  # the site's, not -999.9
    assert _rows(db, "select detector_temp_c, pressure_hpa, case_temp_c from housekeeping") == [
        (None, None, 20.0)]
    assert _rows(db, "select count(*) from samples") == [(6 * 15,)]
    (msg,) = _rows(db, "select message from events where kind = 'housekeeping_implausible'")[0]
    assert "detector_temp_c -999.9" in msg and "pressure_hpa -999.9" in msg
