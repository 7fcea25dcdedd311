"""The simulator's independent sky: its physics against published values, and the
daemon's fit on it.

The independent sky (:mod:`sim_instrument.spectral_sky`) shares no formula with the
fitter: Rayleigh with the site's gravity, SPECTRL2 ozone and water vapour, aerosol and
water on layer air masses, all integrated over the filter x ASTM G173. Where the
fitter's model and this sky differ the fit must still land within its stated
uncertainty; where a Done-when of issue 13 is not met yet, the test says so (strict
xfail, naming the missing budget term), so that it turns red the day it passes; none is
open now).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import replace

import numpy as np
import pytest

from sim_instrument import filters as simfilters
from sim_instrument import spectral_sky as sk
from sim_instrument.scenario import load_scenario
from sim_instrument.sessions import session_series
from tests.independent_sky import config_for, days, fit_rows, v0_error

BODHAINE_EQ30 = {  # docs/REFERENCES.md: Bodhaine et al. (1999) eq. 30, 1013.25 hPa (F)
    340: 0.71248, 380: 0.44618, 440: 0.24261, 500: 0.14335, 675: 0.04220, 870: 0.01513,
    1020: 0.00798}


# ------------------------------------------------------------------------ Rayleigh

@pytest.mark.parametrize("wavelength_nm, tau", sorted(BODHAINE_EQ30.items()))
def test_rayleigh_with_gravity_reproduces_eq_30_at_its_reference(wavelength_nm, tau):
    # Cross-section (eq. 29) x column P A / (m_a g), g at 45 deg and the sea-level
    # column's mass-weighted height, is the eq. 30 fit (Bodhaine et al. 1999).
    # (the table's values are cut to 5 decimals: within one unit of the last)
    assert sk.rayleigh_optical_depth(wavelength_nm, 1013.25, 45.0, 0.0) == pytest.approx(
        tau, abs=1e-5)


def test_gravity_at_sea_level_and_at_the_site():
    # Bodhaine et al. (1999) eq. 22: 980.616 cm s^-2 at 45 deg by construction; at the
    # equator and the poles close to WGS 84 normal gravity, 978.033 and 983.219 cm s^-2
    # (NIMA TR8350.2; from memory).
    assert sk.gravity_cm_s2(45.0, 0.0) == pytest.approx(980.616, abs=1e-9)
    assert sk.gravity_cm_s2(0.0, 0.0) == pytest.approx(978.033, abs=0.02)
    assert sk.gravity_cm_s2(90.0, 0.0) == pytest.approx(983.219, abs=0.02)
    # Free-air gradient 3.086e-6 s^-2 (common practice, no source): eq. 23's linear term.
    drop = sk.gravity_cm_s2(45.0, 0.0) - sk.gravity_cm_s2(45.0, 1000.0)
    assert drop == pytest.approx(0.3086, abs=0.001)
    # At Pico Sereno (20 N, 3650 m) gravity is lower, so a hPa holds more molecules:
    # tau_R is about 0.3 % above the pressure-scaled eq. 30 (the estimate in
    # daemon/science/atmosphere.py, which leaves the gravity term out).
    ratio = sk.rayleigh_optical_depth(500.0, 645.0, 19.95, 3650.0) / (
        BODHAINE_EQ30[500] * 645.0 / 1013.25)
    assert 1.002 < ratio < 1.004


# ------------------------------------------------------------------------ SPECTRL2

def _pvlib_spectrl2(zenith_deg: float, airmass: float, water_cm: float, ozone_atm_cm: float):
    from pvlib.spectrum.spectrl2 import _SPECTRL2_COEFFS, _spectrl2_transmittances
    out = _spectrl2_transmittances(np.array([zenith_deg]), np.array([airmass]),
                                   np.array([64500.0]), np.array([water_cm]),
                                   np.array([ozone_atm_cm]), np.zeros((122, 1)),
                                   np.zeros((122, 1)), 40)
    return _SPECTRL2_COEFFS["wavelength"], out[3][:, 0], out[4][:, 0]


@pytest.mark.parametrize("zenith_deg", [0.0, 60.0, 75.0, 80.0])
def test_ozone_and_water_vapour_are_pvlibs_spectrl2(zenith_deg):
    # pvlib's SPECTRL2 (Bird and Riordan 1986, eqs. 2-8 to 2-10): ozone transmittance
    # with its ozone air mass, water-vapour transmittance for a given air mass.
    wl, t_w, t_o = _pvlib_spectrl2(zenith_deg, 2.7, 1.1, 0.26)
    ours_o = np.exp(-sk.ozone_absorption_per_atm_cm(wl) * 0.26
                    * sk.ozone_airmass_spectrl2(zenith_deg))
    np.testing.assert_allclose(ours_o, t_o, rtol=1e-12)
    band = (wl >= sk.WATER_VAPOUR_BAND_NM[0]) & (wl <= sk.WATER_VAPOUR_BAND_NM[1])
    ours_w = sk.water_vapour_transmittance(sk.water_vapour_absorption_per_cm(wl), 1.1, 2.7)
    np.testing.assert_allclose(ours_w[band], t_w[band], rtol=1e-12)


def test_spectrl2_ozone_air_mass_differs_from_komhyrs():
    # The fitter uses Komhyr's shell at 22 km above a station at its height
    # (docs/REFERENCES.md: 5.21166 at 80 deg for sea level, F); SPECTRL2's eq. 2-10
    # has no station height and R = 6370 km: the sky's ozone air mass is another one.
    assert sk.ozone_airmass_spectrl2(0.0) == pytest.approx(1.0, abs=1e-5)
    m80 = float(sk.ozone_airmass_spectrl2(80.0))
    assert m80 == pytest.approx(5.21166, rel=3e-3) and m80 != pytest.approx(5.21166, rel=1e-5)


# ------------------------------------------------------------------------ layer air masses

def test_exponential_layer_air_mass_limits():
    # Zenith: 1. A very thin layer: the plane-parallel secant (common practice, no source).
    assert sk.exponential_layer_airmass(0.0, 2.0, 3.65) == pytest.approx(1.0, abs=1e-12)
    assert sk.exponential_layer_airmass(60.0, 0.01) == pytest.approx(2.0, rel=1e-5)
    # Numerical check of the quadrature: a 200 000-step trapezoid of the same integral.
    for z in (70.0, 80.0, 85.0):
        r0, h = sk.EARTH_RADIUS_KM + 3.65, 1.5
        u = np.linspace(0.0, 60.0, 200_001)
        r = r0 + u * h
        f = np.exp(-u) * r / np.sqrt(r * r - (r0 * np.sin(np.radians(z))) ** 2)
        trapezoid = getattr(np, "trapezoid", None) or np.trapz
        assert sk.exponential_layer_airmass(z, h, 3.65) == pytest.approx(trapezoid(f, u),
                                                                         rel=1e-6)
    # A layer sits lower than the whole atmosphere: its air mass exceeds Kasten and
    # Young's at 80 deg (5.58604, docs/REFERENCES.md) but stays below the secant (5.75877).
    m = float(sk.exponential_layer_airmass(80.0, 1.5, 3.65))
    assert 5.58604 < m < 5.75877


# ------------------------------------------------------------------------ band integral

def test_a_narrow_filter_gives_beer_lambert_at_its_centre():
    # With a 0.5 nm filter the band mean is the monochromatic transmittance (to the
    # band's curvature): exp(-(tau_R m + tau_a m_a)) with no ozone or water at 1020 nm.
    band = simfilters.band(simfilters.gaussian(1020.0, 0.5))
    z = np.array([70.0])
    state = sk.SkyState(apparent_zenith_deg=z, pressure_hpa=np.array([645.0]),
                        tau_500=np.array([0.05]), angstrom_alpha=1.3, ozone_du=260.0,
                        precipitable_water_cm=np.array([1.0]), tau_cloud=np.array([0.0]))
    k = sk.SkyConstants(19.95, 3650.0, 1.5, 2.0)
    res = sk.band_transmittance(band, state, k)
    m = res.airmass_kasten_young[0]
    tau_r = sk.rayleigh_optical_depth(1020.0, 645.0, 19.95, 3650.0)
    tau_a = 0.05 * (1020.0 / 500.0) ** -1.3
    want = np.exp(-(tau_r * m + tau_a * res.airmass_aerosol[0]))
    assert res.transmittance[0] == pytest.approx(want, rel=2e-6)


# ------------------------------------------------------------------------ session series

def _with_water(scenario, water_cm: float):
    return replace(scenario, atmosphere=replace(scenario.atmosphere,
                                                precipitable_water_cm=water_cm))


def test_session_series_meets_its_targets_in_the_daemons_geometry():
    # The bursts sit where the daemon's own geometry (NREL SPA and Kasten-Young,
    # daemon.science.solar) puts the air-mass targets.
    from tests.independent_sky import channel_series
    scen = load_scenario("pico-sereno-independent")
    r = session_series(scen, dt.date(2025, 2, 12), "am", seed=1, burst_noise_relative=0.0)
    s = channel_series(r, config_for(scen))["500"]
    assert np.all(np.diff(r.epoch_s) > 0) and np.all(np.diff(s.airmass) < 0)  # morning
    np.testing.assert_allclose(s.airmass[::-1], np.arange(2.0, 6.001, 0.1), atol=2e-3)
    # Without noise every burst mean is V0 (r0/r)^2 times the band transmittance.
    t = r.truth["500"]
    np.testing.assert_allclose(r.signal_v[:, 2], 3.10 * r.earth_sun_factor * t.transmittance,
                               rtol=1e-5)


def test_a_western_afternoon_crosses_00_utc():
    # 150 W: local noon is near 22 h UTC, so the afternoon ends on the next UTC date.
    scen = load_scenario("pico-sereno-independent")
    west = replace(scen, site=replace(scen.site, longitude_deg=-150.0))
    r = session_series(west, dt.date(2025, 2, 12), "pm", seed=2)
    dates = {t.date() for t in r.times_utc}
    assert dates == {dt.date(2025, 2, 13)} or dates == {dt.date(2025, 2, 12),
                                                         dt.date(2025, 2, 13)}
    assert np.all(np.diff(r.hours) > 0) and 12.0 < r.hours[0] < r.hours[-1] < 20.0


def _stable_sessions(scen, n_days: int, noise: float, seed: int):
    cfg = config_for(scen)
    out = []
    for d in days(n_days):
        for session in ("am", "pm"):
            r = session_series(scen, d, session, seed=seed, burst_noise_relative=noise)
            out.append((r, fit_rows(r, cfg)))
    return out


WINDOW = ("380", "440", "500", "675", "870", "1020")


def test_window_channels_on_the_independent_stable_sky_within_their_uncertainty():
    # Done-when of issue 13 (window channels): the fit's error stays inside three of its
    # own stated uncertainties on a sky it did not write (noise 0.1 % per burst mean).
    sessions = _stable_sessions(load_scenario("pico-sereno-independent"), 3, 0.001, 5)
    for r, rows in sessions:
        for name in WINDOW:
            row = rows[name]
            assert row["accepted"], (name, row["reasons"])
            assert abs(v0_error(row, r)) < 3 * row["v0_rel_unc"], (name, v0_error(row, r))


def test_window_channels_on_the_independent_stable_sky_within_0_15_percent():
    # Done-when of issue 13: V0 within 0.15 % of the truth at every wavelength, 380 nm
    # included (stable sky, noise 0.05-0.2 % per burst mean; Schmid and Wehrli 1995
    # report below 0.25 % rms at a 3580 m station, docs/REFERENCES.md).
    sessions = _stable_sessions(load_scenario("pico-sereno-independent"), 3, 0.001, 5)
    for name in WINDOW:
        errors = [v0_error(rows[name], r) for r, rows in sessions]
        assert abs(float(np.mean(errors))) < 0.0015, (name, np.mean(errors))


@pytest.mark.parametrize("water_cm", [0.2, 0.5, 1.0, 2.0])
def test_940_nm_on_the_independent_sky(water_cm):
    # Done-when of issue 13 (940 nm): at columns 0.2 to 2 cm every accepted session lies
    # within three stated uncertainties, and a campaign of ten stable days (the mean of
    # its accepted sessions) is within 1 % (Schmid and Wehrli 1995: 1.0 % at 0.94 um with
    # a modified Langley, docs/REFERENCES.md).
    scen = _with_water(load_scenario("pico-sereno-independent"), water_cm)
    sessions = _stable_sessions(scen, 10, 0.001, 7)
    errors = []
    for r, rows in sessions:
        row = rows["940"]
        if not row["accepted"]:
            continue
        err = v0_error(row, r)
        assert abs(err) < 3 * row["v0_rel_unc"], (water_cm, err, row["v0_rel_unc"])
        errors.append(err)
        # the session's column from a and b against the sky's truth (an independent
        # band integral on another air mass): within 3 %
        assert row["precipitable_water_cm"] == pytest.approx(water_cm, rel=0.03)
    assert len(errors) >= 10
    assert abs(float(np.mean(errors))) < 0.01


@pytest.mark.parametrize("water_cm", [0.2, 1.0, 2.0])
def test_940_nm_layer_air_masses_are_corrected_and_budgeted(water_cm):
    # The sky puts its vapour and aerosol on exponential layers (2 and 1.5 km); the
    # fit's modified Langley uses Kasten's 1965 water-vapour air mass and puts the
    # window channels' aerosol on Kasten-Young's. Without noise, what is left after the
    # layers' corrections lies within one stated uncertainty (before them, at 1 cm, the
    # error was 2.6 uncertainties: -0.13 % against 0.05 %); switched off
    # (fit.correct_model_terms: false), nothing is corrected and the terms grow.
    scen = _with_water(load_scenario("pico-sereno-independent"), water_cm)
    cfg = config_for(scen)
    r = session_series(scen, days(1)[0], "am", seed=3, burst_noise_relative=1e-7)
    row = fit_rows(r, cfg)["940"]
    budget = row["uncertainty_budget"]
    assert budget["water_vapour_airmass_model"] > 0 and budget["aerosol_layer_airmass"] > 0
    corrected = "V0 corrected by water vapour airmass model"
    assert any(n.startswith(corrected) for n in row["notes"]), row["notes"]
    assert abs(v0_error(row, r)) < row["v0_rel_unc"], (v0_error(row, r), row["v0_rel_unc"])
    plain = fit_rows(r, replace(cfg, fit=replace(cfg.fit, correct_model_terms=False)))["940"]
    assert not any(n.startswith(corrected) for n in plain["notes"])
    for term in ("water_vapour_airmass_model", "aerosol_layer_airmass"):
        assert plain["uncertainty_budget"][term] >= budget[term]
    assert plain["v0_1au"] != pytest.approx(row["v0_1au"], rel=1e-6)


def test_the_simulated_station_runs_the_independent_sky():
    # The protocol's station and session_series are two doors to one sky: a burst's
    # noise-free mean signal is V0 (r0/r)^2 times the band transmittance of
    # sim_instrument.spectral_sky at the burst's own geometry and pressure, and the
    # truth says which sky ran, the filters and the layer air masses.
    from datetime import UTC, datetime, timedelta

    from sim_instrument import sky as refsky
    from sim_instrument.model import SimulatedStation
    scen = load_scenario("pico-sereno-independent")
    when = datetime(2025, 2, 12, 14, 30, tzinfo=UTC)
    st = SimulatedStation(scen, seed=0, speed=0.0)
    st.set_clock(when)
    site = scen.site
    geo = refsky.solar_position([when], site.latitude_deg, site.longitude_deg,
                                site.elevation_m, site.pressure_hpa, site.temperature_c)
    st.goto(float(geo.azimuth_deg[0]), float(geo.apparent_elevation_deg[0]))
    st.follow_sun(True)
    st.set_clock(when + timedelta(seconds=60))
    assert st.tracker_state()["locked"]
    st.burst(10)
    truth = st.truth()
    assert truth["atmosphere"]["sky"] == "independent"
    assert truth["channels"]["940"]["filter"] == "Gaussian 940 nm, FWHM 10 nm"
    reading = truth["readings"][-1]
    assert reading["airmass_aerosol"] > reading["airmass_rayleigh"]  # a low layer
    assert reading["airmass_ozone"] != pytest.approx(reading["airmass_rayleigh"], rel=1e-4)
    wv = reading["channels"]["940"]
    assert wv["tau_water_vapour"] > 0.0 and wv["tau_effective"] > wv["tau_rayleigh"]
    # the same instant through session_series' sky
    r = session_series(scen, dt.date(2025, 2, 12), "am", seed=0, burst_noise_relative=0.0,
                       times_utc=[datetime.fromisoformat(reading["mean_utc"])])
    assert reading["channels"]["500"]["signal_v"] == pytest.approx(
        r.signal_v[0, 2] * reading["field_of_view_fraction"], rel=2e-4)
