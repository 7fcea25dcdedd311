"""The simulator's instrument clock at start-up (``heliotrope-sim --start-utc``): local
mean solar noon of the scenario's date unless set, so a burst typed by hand can see the
sun; and what ``probe`` says of a dark-level burst and an unlocked tracker."""

from __future__ import annotations

import signal
import time
from datetime import UTC, datetime

import pandas as pd
import pvlib
import pytest

from daemon.commands.probe import probe_station
from daemon.config.settings import Port
from drivers.reference import open_radiometer, open_tracker
from sim_instrument.cli import main, start_clock
from sim_instrument.scenario import load_scenario
from tests.test_sim_server import _finish, _start_sim

# The equation of time stays within about 16.5 min of zero all year (from memory; its
# extremes are about -14 min in February and +16.4 min in early November).
EQUATION_OF_TIME_MAX_MIN = 16.5


@pytest.mark.parametrize("name", ["pico-sereno-clear", "brightwater-hazy"])
def test_default_start_is_the_site_s_noon(name):
    sc = load_scenario(name)
    site = sc.site
    start = start_clock(None, sc.start_utc, site.longitude_deg)
    # The sun's transit from pvlib's SPA (Reda and Andreas 2004) as the reference.
    day = pd.DatetimeIndex([pd.Timestamp(start).tz_convert("UTC").normalize()])
    transit = pvlib.solarposition.sun_rise_set_transit_spa(
        day, site.latitude_deg, site.longitude_deg)["transit"].iloc[0]
    # Transit of the local day may fall on the previous UTC date: take the nearest.
    gap_min = min(abs((transit + pd.Timedelta(days=k) - pd.Timestamp(start)).total_seconds())
                  for k in (-1, 0, 1)) / 60
    assert gap_min <= EQUATION_OF_TIME_MAX_MIN
    elevation = pvlib.solarposition.get_solarposition(
        pd.DatetimeIndex([pd.Timestamp(start)]), site.latitude_deg, site.longitude_deg,
        site.elevation_m)["apparent_elevation"].iloc[0]
    assert elevation > 30  # the sun well up at either site (our invented scenarios)
    # The same local date as the scenario's own start, in local mean solar time.
    offset = pd.Timedelta(hours=site.longitude_deg / 15)
    assert (pd.Timestamp(start) + offset).date() == (pd.Timestamp(sc.start_utc) + offset).date()


def test_start_can_be_set_or_kept_from_the_scenario():
    sc = load_scenario("pico-sereno-clear")
    lon = sc.site.longitude_deg
    assert start_clock("scenario", sc.start_utc, lon) == sc.start_utc
    assert start_clock("2025-02-12T15:00:00+00:00", sc.start_utc, lon) == datetime(
        2025, 2, 12, 15, tzinfo=UTC)
    with pytest.raises(ValueError, match="ISO 8601 time with its zone"):
        start_clock("2025-02-12T15:00:00", sc.start_utc, lon)
    with pytest.raises(ValueError, match="--start-utc 'noonish'"):
        start_clock("noonish", sc.start_utc, lon)


@pytest.mark.parametrize("args", [(), ("--start-utc", "scenario")])
def test_the_simulator_s_clock_starts_there(args):
    sc = load_scenario("pico-sereno-clear")
    expected = start_clock(args[1] if args else None, sc.start_utc, sc.site.longitude_deg)
    proc, info = _start_sim("--port", "tcp:0", *args)
    try:
        radiometer = open_radiometer(info["radiometer"], timeout_s=2.0, retries=1)
        try:
            assert radiometer.clock() == expected  # --speed 0: the clock stands still
        finally:
            radiometer.close()
    finally:
        proc.send_signal(signal.SIGTERM)
        rc, err = _finish(proc)
    assert rc == 0, err


def test_a_bad_start_is_a_usage_error(capsys):
    assert main(["--scenario", "pico-sereno-clear", "--port", "tcp:0",
                 "--start-utc", "tomorrow"]) == 2
    assert "--start-utc 'tomorrow'" in capsys.readouterr().err


def _probe_notes(info) -> tuple[list[str], dict]:
    report = probe_station(Port(url=info["radiometer"], baudrate=19200, timeout_s=2.0,
                                retries=1),
                           Port(url=info["tracker"], baudrate=19200, timeout_s=2.0, retries=1),
                           burst_samples=3)
    burst = next(c for c in report.checks if c.command == "BURST 3")
    return report.notes, burst.reading


def test_probe_says_why_the_sun_is_not_seen_and_a_locked_sun_is():
    # --speed 10: a 33-degree slew at 5 deg/s (the scenario's tracker) takes 0.7 s.
    sc = load_scenario("pico-sereno-clear")
    site = sc.site
    proc, info = _start_sim("--port", "tcp:0", "--speed", "10")
    try:
        # Parked at the zenith at noon: the direct beam misses the radiometer.
        notes, burst = _probe_notes(info)
        dark = [n for n in notes if "dark level" in n]
        assert dark and "the sun is down at the site, or the optics are capped" in dark[0]
        assert "not on the sun" in dark[0]  # parked: no lock
        assert not any("following the sun but not locked" in n for n in notes)
        tracker = open_tracker(info["tracker"], timeout_s=2.0, retries=1)
        try:
            tracker.follow_sun(True)  # SUN 1 from park: follows the zenith, unlocked
            notes, _ = _probe_notes(info)
            (hint,) = [n for n in notes if n.startswith("tracker: following the sun but not")]
            assert "capture range" in hint and "zenith" in hint
            # Pointed at the sun (pvlib's SPA as the reference position) it locks on.
            radiometer = open_radiometer(info["radiometer"], timeout_s=2.0, retries=1)
            try:
                now = pd.Timestamp(radiometer.clock())
            finally:
                radiometer.close()
            sun = pvlib.solarposition.get_solarposition(
                pd.DatetimeIndex([now]), site.latitude_deg, site.longitude_deg,
                site.elevation_m, pressure=site.pressure_hpa * 100,
                temperature=site.temperature_c).iloc[0]
            tracker.goto(float(sun["azimuth"]), float(sun["apparent_elevation"]))
            deadline = time.monotonic() + 60  # a guard against a hang, not a timing check
            while not tracker.state().locked:
                assert time.monotonic() < deadline, "the tracker never locked on the sun"
                time.sleep(0.2)
        finally:
            tracker.close()
        notes, burst = _probe_notes(info)
        assert not any("dark level" in n or "not locked" in n for n in notes), notes
        assert max(burst["mean_v"]) > 0.5  # the direct beam at noon, our invented scenario
    finally:
        proc.send_signal(signal.SIGTERM)
        rc, err = _finish(proc)
    assert rc == 0, err
