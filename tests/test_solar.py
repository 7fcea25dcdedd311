"""Solar geometry and air masses checked against published values (docs/REFERENCES.md)."""

from __future__ import annotations

import math
from datetime import UTC, date, datetime, timedelta, timezone

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from daemon.config.settings import Site
from daemon.science import solar

# NREL SPA worked example inputs: Reda and Andreas (2004), NREL/TP-560-34302, Table A5.1.
SPA_SITE = Site(name="SPA worked example", latitude_deg=39.742476, longitude_deg=-105.1786,
                elevation_m=1830.14, timezone="Etc/GMT+7", pressure_hpa=820.0,
                temperature_c=11.0, ozone_du=300.0)
SPA_TIME = datetime(2003, 10, 17, 12, 30, 30, tzinfo=timezone(timedelta(hours=-7)))
SPA_DELTA_T_S = 67.0

PICO = Site(name="Pico Sereno Station", latitude_deg=19.95, longitude_deg=-101.30,
            elevation_m=3650.0, timezone="America/Mexico_City", pressure_hpa=None,
            temperature_c=5.0, ozone_du=260.0)


# --------------------------------------------------------------------------- SPA

def test_spa_worked_example_position():
    # Reda and Andreas (2004), Table A5.1: topocentric zenith 50.111622 deg (refracted),
    # topocentric azimuth 194.340241 deg (east of north), equation of time 14.641503 min
    # (docs/REFERENCES.md gives 14.64 min).
    pos = solar.sun_position([SPA_TIME], SPA_SITE, pressure_hpa=820.0, temperature_c=11.0,
                             delta_t_s=SPA_DELTA_T_S)
    assert_allclose(pos.apparent_zenith_deg, [50.111622], atol=1e-4)
    assert_allclose(pos.azimuth_deg, [194.340241], atol=1e-4)
    assert_allclose(pos.apparent_elevation_deg, [90 - 50.111622], atol=1e-4)
    assert_allclose(pos.equation_of_time_min, [14.64], atol=0.005)
    # The refraction the SPA applies here is positive and well under a degree (common
    # practice, no source): the geometric zenith lies below the apparent one.
    assert 0.0 < pos.zenith_deg[0] - pos.apparent_zenith_deg[0] < 0.1


def test_spa_worked_example_earth_sun_distance():
    # Reda and Andreas (2004), Table A5.1: Earth radius vector 0.9965422974 AU.
    r = solar.earth_sun_distance_au(SPA_TIME, delta_t_s=SPA_DELTA_T_S)
    assert r == pytest.approx(0.9965422974, abs=1e-8)
    assert solar.earth_sun_factor(SPA_TIME, SPA_DELTA_T_S) == pytest.approx(
        1 / 0.9965422974**2, rel=1e-8)


def test_sun_position_accepts_index_and_any_zone():
    times = [SPA_TIME, SPA_TIME + timedelta(hours=1)]
    as_list = solar.sun_position(times, SPA_SITE, delta_t_s=SPA_DELTA_T_S)
    as_utc = solar.sun_position([t.astimezone(UTC) for t in times], SPA_SITE,
                                delta_t_s=SPA_DELTA_T_S)
    as_index = solar.sun_position(pd.DatetimeIndex(times).tz_convert("UTC"), SPA_SITE,
                                  delta_t_s=SPA_DELTA_T_S)
    for other in (as_utc, as_index):
        assert_allclose(other.apparent_zenith_deg, as_list.apparent_zenith_deg, atol=1e-12)
        assert_allclose(other.azimuth_deg, as_list.azimuth_deg, atol=1e-12)
    assert as_list.apparent_zenith_deg.shape == (2,)
    with pytest.raises(ValueError):
        as_list.azimuth_deg[0] = 0.0  # results are read-only


def test_sun_position_unix_matches_spa_python():
    # Consistency, not physics: the planner's fast path is the same pvlib routine.
    times = [datetime(2024, 3, 20, 12, tzinfo=UTC) + timedelta(minutes=37 * i)
             for i in range(20)]
    slow = solar.sun_position(times, PICO, pressure_hpa=640.0, temperature_c=5.0,
                              delta_t_s=69.0)
    unix = np.array([t.timestamp() for t in times])
    fast = solar.sun_position_unix(unix, PICO, 640.0, 5.0, 69.0)
    for name in ("apparent_zenith_deg", "zenith_deg", "azimuth_deg",
                 "apparent_elevation_deg", "equation_of_time_min"):
        assert_allclose(getattr(fast, name), getattr(slow, name), atol=1e-9, err_msg=name)


def test_naive_times_are_refused_with_advice():
    naive = datetime(2024, 3, 20, 12)
    with pytest.raises(ValueError, match="naive"):
        solar.sun_position([naive], PICO)
    with pytest.raises(ValueError, match="tz_localize"):
        solar.sun_position(pd.DatetimeIndex([naive]), PICO)
    with pytest.raises(ValueError, match="naive"):
        solar.geometry_at(naive, PICO)
    with pytest.raises(TypeError, match="datetime"):
        solar.sun_position(["2024-03-20T12:00:00+00:00"], PICO)


def test_noon_zenith_at_equinox_is_latitude():
    # At the March equinox the declination is near zero, so the noon zenith equals the
    # latitude (common practice, no source); 2024-03-20 03:06 UTC equinox, so declination
    # at the site's noon is about +0.37 deg (from memory): allow 0.5 deg.
    times = [datetime(2024, 3, 20, 18, 52, tzinfo=UTC) + timedelta(minutes=m)
             for m in range(-30, 31)]
    pos = solar.sun_position(times, PICO)
    assert pos.zenith_deg.min() == pytest.approx(PICO.latitude_deg, abs=0.5)


# --------------------------------------------------------------------------- air mass

@pytest.mark.parametrize("zenith, expected", [
    # Kasten and Young (1989) eq. 3, values computed from the formula (docs/REFERENCES.md, F).
    (0.0, 0.99971), (60.0, 1.99429), (70.0, 2.90315), (80.0, 5.58604), (85.0, 10.30579),
    (90.0, 37.91961),
])
def test_kasten_young_formula_values(zenith, expected):
    assert solar.relative_airmass(zenith) == pytest.approx(expected, abs=1e-5)


@pytest.mark.parametrize("zenith, table, rel", [
    # Kasten and Young (1989) table, second-hand (docs/REFERENCES.md, C); the paper gives the
    # formula's error against its table as under 0.5 % down to the horizon (from memory).
    (80.0, 5.5841, 0.001), (85.0, 10.3164, 0.0015), (90.0, 38.0868, 0.005),
])
def test_kasten_young_formula_against_table(zenith, table, rel):
    assert solar.relative_airmass(zenith) == pytest.approx(table, rel=rel)


def test_airmass_departs_from_secant_where_published():
    # docs/REFERENCES.md (F): sec z exceeds Kasten-Young by 0.1 % at 42.2 deg, by 1 % at 72.9.
    for z, excess in ((42.2, 0.001), (72.9, 0.01)):
        ratio = 1.0 / math.cos(math.radians(z)) / solar.relative_airmass(z)
        assert ratio - 1.0 == pytest.approx(excess, abs=5e-5)


def test_airmass_below_horizon_is_nan_and_arrays_work():
    am = solar.relative_airmass([30.0, 89.9, 90.1, 120.0])
    assert isinstance(am, np.ndarray)
    assert np.isfinite(am[:2]).all() and np.isnan(am[2:]).all()
    assert isinstance(solar.relative_airmass(45.0), float)
    assert abs(solar.HORIZON_AIRMASS - 37.91961) < 1e-5


def test_apparent_zenith_from_airmass_inverts_kasten_young():
    # Round trip through the published values: KY89 gives 1.99429 at 60 deg, 5.58604 at 80
    # (docs/REFERENCES.md, F).
    assert solar.apparent_zenith_from_airmass(1.99429) == pytest.approx(60.0, abs=1e-4)
    assert solar.apparent_zenith_from_airmass(5.58604) == pytest.approx(80.0, abs=1e-4)
    m = np.array([1.0, 2.0, 6.0, 20.0, 37.9])
    z = solar.apparent_zenith_from_airmass(m)
    assert_allclose(solar.relative_airmass(z), m, rtol=1e-12)
    assert np.isnan(solar.apparent_zenith_from_airmass([0.5, 40.0])).all()


def test_absolute_airmass_scales_with_pressure():
    # Absolute air mass = relative x p / p0 (common practice, no source).
    assert solar.absolute_airmass(2.0, 1013.25) == pytest.approx(2.0, rel=1e-12)
    assert solar.absolute_airmass(2.0, 650.0) == pytest.approx(2.0 * 650.0 / 1013.25,
                                                               rel=1e-12)
    assert_allclose(solar.absolute_airmass([1.0, 3.0], 506.625), [0.5, 1.5], rtol=1e-12)
    with pytest.raises(ValueError, match="pressure_hpa"):
        solar.absolute_airmass(2.0, 0.0)


@pytest.mark.parametrize("zenith, expected", [
    # Komhyr (1980) formula (docs/REFERENCES.md, formula C, values F): sea level, 22 km layer.
    (60.0, 1.97970), (80.0, 5.21166), (90.0, 12.06446),
])
def test_ozone_airmass_komhyr(zenith, expected):
    assert solar.ozone_airmass(zenith, 0.0, 22.0) == pytest.approx(expected, abs=1e-5)


def test_ozone_airmass_behaviour():
    # At the zenith a thin layer is crossed once; near the horizon the ozone air mass is
    # below the relative air mass because the layer is high and the Earth curved (common
    # practice, no source). In Komhyr's formula the local zenith angle at the layer obeys
    # sin z' = (R + r) / (R + h) sin z, so a higher station meets the layer more obliquely.
    assert solar.ozone_airmass(0.0, 3650.0) == pytest.approx(1.0, abs=1e-12)
    assert solar.ozone_airmass(85.0, 0.0) < solar.relative_airmass(85.0)
    assert solar.ozone_airmass(80.0, 3650.0) > solar.ozone_airmass(80.0, 0.0)
    assert np.isnan(solar.ozone_airmass(90.5, 0.0))
    with pytest.raises(ValueError, match="below the ozone layer"):
        solar.ozone_airmass(60.0, 25000.0, 22.0)


# --------------------------------------------------------------------------- Rayleigh

WAVELENGTHS_NM = [340, 380, 440, 500, 675, 870, 1020]


@pytest.mark.parametrize("pressure, expected", [
    # Bodhaine et al. (1999) eq. 30, tabulated in docs/REFERENCES.md (F) to five decimals.
    (1013.25, [0.71248, 0.44618, 0.24261, 0.14335, 0.04220, 0.01513, 0.00798]),
    (700.0, [0.49221, 0.30824, 0.16760, 0.09904, 0.02916, 0.01046, 0.00551]),
])
def test_rayleigh_bodhaine(pressure, expected):
    assert_allclose(solar.rayleigh_optical_depth(WAVELENGTHS_NM, pressure), expected,
                    atol=6e-6)


def test_rayleigh_close_to_hansen_travis():
    # Hansen and Travis (1974), Space Sci. Rev. 16:527 (docs/REFERENCES.md, F): an independent
    # approximation, within 0.5 % of Bodhaine over 340-1020 nm.
    hansen = [0.71015, 0.44568, 0.24276, 0.14359, 0.04233, 0.01518, 0.00800]
    assert_allclose(solar.rayleigh_optical_depth(WAVELENGTHS_NM), hansen, rtol=5e-3)


def test_rayleigh_rejects_bad_input():
    with pytest.raises(ValueError, match="wavelength_nm"):
        solar.rayleigh_optical_depth(-500.0)
    with pytest.raises(ValueError, match="pressure_hpa"):
        solar.rayleigh_optical_depth(500.0, float("nan"))
    assert isinstance(solar.rayleigh_optical_depth(500.0), float)


# --------------------------------------------------------------------------- Earth-Sun

@pytest.mark.parametrize("day, factor", [
    # Ephemeris 2024 (docs/REFERENCES.md, F): perihelion 3 Jan r = 0.983307 AU, (1/r)^2 = 1.03424;
    # aphelion 5 Jul r = 1.016725 AU, (1/r)^2 = 0.96737.
    (date(2024, 1, 3), 1.03424), (date(2024, 7, 5), 0.96737),
])
def test_earth_sun_factor_at_apsides(day, factor):
    t = datetime(day.year, day.month, day.day, 3, tzinfo=UTC)
    assert solar.earth_sun_factor(t) == pytest.approx(factor, rel=1e-3)


def test_earth_sun_factor_against_spencer_over_a_year():
    # Spencer (1971), Search 2(5):172 (citation from memory; formula docs/REFERENCES.md C).
    # docs/REFERENCES.md puts Spencer within 0.1 % of the ephemeris; against the SPA we find
    # up to 0.104 % in May-June 2024 (a leap year shifts Spencer's day angle), so the
    # tolerance is 0.15 %, still far inside the 7 % seasonal swing.
    days = pd.date_range("2024-01-01 12:00", periods=366, freq="D", tz="UTC")
    g = 2 * np.pi * (days.day_of_year.to_numpy() - 1) / 365
    spencer = (1.000110 + 0.034221 * np.cos(g) + 0.001280 * np.sin(g)
               + 0.000719 * np.cos(2 * g) + 0.000077 * np.sin(2 * g))
    assert_allclose(solar.earth_sun_factor(days), spencer, rtol=1.5e-3)


# --------------------------------------------------------------------------- pressure

def test_site_pressure():
    assert solar.site_pressure_hpa(SPA_SITE) == 820.0
    # U.S. Standard Atmosphere 1976, troposphere: p = 1013.25 (1 - 2.25577e-5 h)^5.25588
    # hPa (from memory).
    for h in (0.0, 3650.0, 5000.0):
        site = Site("x", 0.0, 0.0, h, "UTC", None, 10.0, 300.0)
        iso = 1013.25 * (1 - 2.25577e-5 * h) ** 5.25588
        assert solar.site_pressure_hpa(site) == pytest.approx(iso, rel=1e-3)


# --------------------------------------------------------------------------- one instant

def test_geometry_at_spa_example():
    # Reda and Andreas (2004), Table A5.1 as above. The default delta T (about 64.5 s in
    # 2003) instead of 67 s moves the sun by well under 0.001 deg: the heliocentric
    # position changes about 0.04 arcsec per second of TT (from memory).
    g = solar.geometry_at(SPA_TIME, SPA_SITE)
    assert g.time_utc == SPA_TIME and g.time_utc.utcoffset() == timedelta(0)
    assert g.apparent_zenith_deg == pytest.approx(50.111622, abs=1e-3)
    assert g.azimuth_deg == pytest.approx(194.340241, abs=1e-3)
    assert g.apparent_elevation_deg == pytest.approx(90 - g.apparent_zenith_deg, abs=1e-12)
    assert g.distance_au == pytest.approx(0.9965422974, abs=1e-6)
    assert g.earth_sun_factor == pytest.approx(1 / g.distance_au**2, rel=1e-12)
    assert g.airmass == pytest.approx(solar.relative_airmass(g.apparent_zenith_deg))
    assert g.ozone_airmass == pytest.approx(
        solar.ozone_airmass(g.apparent_zenith_deg, SPA_SITE.elevation_m))
    assert g.pressure_hpa == 820.0


def test_geometry_at_pressure_override_and_night():
    day = solar.geometry_at(datetime(2024, 3, 20, 18, 52, tzinfo=UTC), PICO, pressure_hpa=600)
    assert day.pressure_hpa == 600
    night = solar.geometry_at(datetime(2024, 3, 20, 6, 0, tzinfo=UTC), PICO)
    assert night.apparent_elevation_deg < 0
    assert math.isnan(night.airmass) and math.isnan(night.ozone_airmass)
    assert night.pressure_hpa == pytest.approx(solar.site_pressure_hpa(PICO))
