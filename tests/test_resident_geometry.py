"""The resident service's geometry without pvlib: the day's sun table interpolated, the
SPA's refraction written out, and the stored values held to pvlib's SPA (the reference
library; Reda and Andreas 2004, Solar Energy 76, 577) at the same instants."""

from __future__ import annotations

import dataclasses
import math
import sqlite3
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import numpy as np
import pvlib
import pytest

from daemon.config.settings import load_config
from daemon.science import atmosphere, solar
from daemon.science.suntable import SunTable
from daemon.station.acquisition import Station, local_midnight_utc, run_day
from daemon.station.clock import SimClock
from daemon.station.planner import plan_day, plan_sun_table
from daemon.store.writer import Store
from tests.fakes import FakeRadiometer, FakeTracker

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"
DAY = date(2027, 2, 15)
# The SPA works in Julian days near 2.46e6, whose float64 spacing (5e-10 days, 4.7e-5 s)
# moves its own zenith by up to about 2e-7 degrees from one instant to the next (computed,
# no source): the angles are held to 1e-6 degrees, the air mass to 1e-7 relative.
ANGLE_TOL_DEG = 1e-6


@pytest.fixture(scope="module")
def cfg():
    return load_config(CONFIG)


# ------------------------------------------------------------------ the formulas

def test_refraction_is_the_spas_as_pvlib_codes_it():
    # pvlib.spa.atmospheric_refraction_correction is the SPA's eq. 42 (the reference
    # implementation); ours must agree to rounding over the whole sky and below the
    # horizon, where both switch refraction off.
    for p_hpa, t_c in ((1013.25, 10.0), (650.0, 5.0), (600.0, -15.0), (700.0, 30.0)):
        for e0 in np.linspace(-3.0, 90.0, 931):
            ref = pvlib.spa.atmospheric_refraction_correction(
                p_hpa, t_c, float(e0), atmosphere.SPA_HORIZON_REFRACTION_DEG)
            ours = atmosphere.refraction_deg(float(e0), p_hpa, t_c)
            assert ours == pytest.approx(ref, rel=1e-12, abs=1e-15), (p_hpa, t_c, e0)
    # Bennett's refraction at the horizon is about 34' at sea level (from memory).
    assert 0.45 < atmosphere.refraction_deg(0.0, 1010.0, 10.0) < 0.6
    with pytest.raises(ValueError, match="pressure_hpa"):
        atmosphere.refraction_deg(30.0, -1.0, 10.0)


def test_the_scalar_air_masses_are_the_array_ones():
    # The array forms are held to pvlib's kastenyoung1989 in test_atmosphere_light.py.
    for z in (0.0, 30.0, 60.0, 80.5, 89.9, 90.0):
        assert atmosphere.kasten_young_airmass_at(z) == pytest.approx(
            pvlib.atmosphere.get_relative_airmass(z, model="kastenyoung1989"), rel=1e-12)
        assert atmosphere.ozone_airmass_at(z, 3650.0) == pytest.approx(
            atmosphere.ozone_airmass(z, 3650.0), rel=1e-12)
    assert math.isnan(atmosphere.kasten_young_airmass_at(90.5))
    assert math.isnan(atmosphere.ozone_airmass_at(90.5, 3650.0))


# ------------------------------------------------------------------ the table

def _am6_time(cfg, day: date, session: str) -> datetime:
    return next(t.time_utc for t in plan_day(cfg, day).targets
                if t.session == session and t.airmass == 6.0)


@pytest.mark.parametrize("pressure_hpa", [600.0, 650.0, 700.0])
def test_the_table_gives_the_spas_air_mass_far_below_a_hundredth_percent(cfg, pressure_hpa):
    """At air mass 6 (both sessions) and at instants between the grid's nodes, the
    interpolated and refracted geometry against pvlib's SPA at the same instant and
    pressure: the air mass must agree far below 0.01 % (we ask 1e-7, relative)."""
    assert 6.0 in cfg.plan.airmass_targets()
    table = plan_sun_table(cfg, DAY)
    worst = 0.0
    for session in ("am", "pm"):
        t6 = _am6_time(cfg, DAY, session)
        for offset_s in (-600.0, -37.3, 0.0, 12.5, 29.9, 30.0, 45.1, 600.0):
            when = t6 + timedelta(seconds=offset_s)
            ours = table.geometry_at(when, cfg.site.elevation_m, pressure_hpa,
                                     cfg.site.temperature_c)
            ref = solar.geometry_at(when, cfg.site, pressure_hpa)
            assert ours.apparent_zenith_deg == pytest.approx(ref.apparent_zenith_deg,
                                                             abs=ANGLE_TOL_DEG)
            assert ours.azimuth_deg == pytest.approx(ref.azimuth_deg, abs=ANGLE_TOL_DEG)
            assert ours.ozone_airmass == pytest.approx(ref.ozone_airmass, rel=1e-7)
            assert ours.earth_sun_factor == pytest.approx(ref.earth_sun_factor, rel=1e-9)
            worst = max(worst, abs(ours.airmass / ref.airmass - 1.0))
    assert worst < 1e-7, f"air mass off by {worst:.2e} (relative)"


def test_the_table_covers_daylight_and_refuses_the_night(cfg):
    table = plan_sun_table(cfg, DAY)
    plan = plan_day(cfg, DAY)
    for t in plan.targets:
        assert table.covers(t.time_utc)
    assert table.covers(plan.sunrise_utc) and table.covers(plan.sunset_utc)
    midnight = local_midnight_utc(cfg, DAY)
    assert table.geometry_at(midnight + timedelta(hours=2), cfg.site.elevation_m, 650.0,
                             5.0) is None
    with pytest.raises(ValueError, match="naive"):
        table.geometry_at(datetime(2027, 2, 15, 12), cfg.site.elevation_m, 650.0, 5.0)
    # about 13 h of nodes a minute apart, not the whole day
    assert 600 < len(table.zenith_deg) < 900


def test_the_azimuth_is_continuous_through_north(cfg):
    # A midsummer day at a fictional site north of the Arctic circle (Kvitfjell Varde,
    # 69.6 N): the sun does not set, so its azimuth passes north (0/360) in the table.
    site = dataclasses.replace(cfg.site, name="Kvitfjell Varde", latitude_deg=69.6,
                               longitude_deg=18.9, elevation_m=400.0,
                               timezone="Europe/Oslo", temperature_c=8.0)
    polar = dataclasses.replace(cfg, site=site)
    day = date(2027, 6, 21)
    table = plan_sun_table(polar, day)
    start = local_midnight_utc(polar, day)
    assert table.covers(start + timedelta(minutes=2))
    for minutes in range(2, 24 * 60 - 2, 37):
        when = start + timedelta(minutes=minutes, seconds=11)
        ours = table.geometry_at(when, site.elevation_m, 970.0, site.temperature_c)
        ref = solar.geometry_at(when, site, 970.0)
        assert ours.apparent_zenith_deg == pytest.approx(ref.apparent_zenith_deg,
                                                         abs=ANGLE_TOL_DEG)
        d_az = (ours.azimuth_deg - ref.azimuth_deg + 180.0) % 360.0 - 180.0
        assert abs(d_az) < ANGLE_TOL_DEG


def test_a_damaged_table_is_refused_with_a_reason():
    with pytest.raises(ValueError, match="version-1"):
        SunTable.from_dict({"version": 9})
    with pytest.raises(ValueError, match="damaged"):
        SunTable.from_dict({"version": 1, "start_unix": 0.0, "step_s": 60.0,
                            "delta_t_s": 69.0, "zenith_deg": [1.0, "x"],
                            "azimuth_deg": [1.0, 2.0], "distance_au": [1.0, 1.0]})
    with pytest.raises(ValueError, match="zeniths"):
        SunTable(0.0, 60.0, (1.0,), (), (1.0,), 69.0)


# ------------------------------------------------------------------ what is stored

def _station(cfg, tmp_path, **kwargs):
    store = Store.open(tmp_path / "t.db")
    clock = SimClock(local_midnight_utc(cfg, DAY))
    return Station(cfg, FakeRadiometer(), FakeTracker(), store, clock, **kwargs)


def test_the_stored_geometry_of_a_day_is_pvlibs(cfg, tmp_path):
    station = _station(cfg, tmp_path)
    run_day(station, DAY)
    station.store.close()
    conn = sqlite3.connect(tmp_path / "t.db")
    rows = conn.execute("SELECT time_utc, apparent_zenith_deg, azimuth_deg, airmass, "
                        "ozone_airmass, earth_sun_factor, pressure_hpa FROM measurements "
                        "WHERE status = 'ok'").fetchall()
    fallbacks = conn.execute("SELECT count(*) FROM events WHERE kind = 'geometry_fallback'"
                             ).fetchone()[0]
    conn.close()
    assert len(rows) == len(plan_day(cfg, DAY).targets) and fallbacks == 0
    for time_text, zen, az, am, oz, esf, p_hpa in rows:
        ref = solar.geometry_at(datetime.fromisoformat(time_text), cfg.site, p_hpa)
        assert zen == pytest.approx(ref.apparent_zenith_deg, abs=ANGLE_TOL_DEG)
        assert az == pytest.approx(ref.azimuth_deg, abs=ANGLE_TOL_DEG)
        assert am == pytest.approx(ref.airmass, rel=1e-7)
        assert oz == pytest.approx(ref.ozone_airmass, rel=1e-7)
        assert esf == pytest.approx(ref.earth_sun_factor, rel=1e-9)


def test_an_instant_outside_the_table_falls_back_with_an_event(cfg, tmp_path):
    asked = []

    def fallback(when):
        asked.append(when)
        return station._sun_table_here(when)

    station = _station(cfg, tmp_path, sun_fallback=fallback)
    run_day(station, DAY, plan=dataclasses.replace(plan_day(cfg, DAY), targets=()))
    night = local_midnight_utc(cfg, DAY) + timedelta(hours=3)  # no sun table there
    geo = station.geometry(night, DAY, 650.0)
    ref = solar.geometry_at(night, cfg.site, 650.0)
    assert asked == [night]
    assert geo.apparent_zenith_deg == pytest.approx(ref.apparent_zenith_deg,
                                                    abs=ANGLE_TOL_DEG)
    assert math.isnan(geo.airmass) and math.isnan(ref.airmass)
    events = station.store.conn.execute(
        "SELECT message FROM events WHERE kind = 'geometry_fallback'").fetchall()
    assert len(events) == 1 and "outside the stored sun table" in events[0][0]


def test_a_sun_table_stored_for_another_configuration_is_not_used(cfg, tmp_path):
    station = _station(cfg, tmp_path, sun_fallback=lambda when: station._sun_table_here(when))
    table = plan_sun_table(cfg, DAY).to_dict()
    station.store.save_plan(DAY, plan_day(cfg, DAY).to_dict(), datetime.now(UTC),
                            "0" * 64, table)
    noon = plan_day(cfg, DAY).solar_noon_utc
    station.geometry(noon, DAY, 650.0)
    kinds = [k for (k,) in station.store.conn.execute("SELECT kind FROM events")]
    assert kinds == ["geometry_fallback"]


def test_sun_tables_are_kept_a_week_and_plans_for_ever(cfg, tmp_path):
    from daemon.store.writer import SUN_TABLE_KEEP_DAYS

    store = Store.open(tmp_path / "k.db")
    table = plan_sun_table(cfg, DAY).to_dict()
    for k in range(12):
        store.save_plan(DAY + timedelta(days=k), {"version": 1}, datetime.now(UTC),
                        "a" * 64, table)
    dates = [d for (d,) in store.conn.execute("SELECT plan_date FROM sun_tables "
                                              "ORDER BY plan_date")]
    n_plans = store.conn.execute("SELECT count(*) FROM plans").fetchone()[0]
    store.close()
    assert dates[0] == (DAY + timedelta(days=11 - SUN_TABLE_KEEP_DAYS)).isoformat()
    assert len(dates) == SUN_TABLE_KEEP_DAYS + 1 and n_plans == 12


def test_the_fallback_child_gives_the_spas_geometry(cfg):
    # The service's fallback: a fresh interpreter computes a sun table around the
    # instant (python -m daemon.station.jobs sun); nothing is stored.
    from daemon.station.jobs import ChildJobs

    when = datetime(2027, 2, 15, 23, 17, 41, tzinfo=UTC)  # late afternoon at the site
    table = SunTable.from_dict(ChildJobs(cfg, "/nonexistent/store.db").sun_table(when))
    ours = table.geometry_at(when, cfg.site.elevation_m, 640.0, cfg.site.temperature_c)
    ref = solar.geometry_at(when, cfg.site, 640.0)
    assert ours.apparent_zenith_deg == pytest.approx(ref.apparent_zenith_deg,
                                                     abs=ANGLE_TOL_DEG)
    assert ours.airmass == pytest.approx(ref.airmass, rel=1e-7)
