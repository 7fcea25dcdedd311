"""Water-vapour constants of the modified Langley, derived from a channel's filter."""

from __future__ import annotations

import math

import numpy as np
import pvlib
import pytest

from daemon.config.filterfile import gaussian_spec
from daemon.science import watervapour as wv
from sim_instrument import filters as simfilters
from sim_instrument import spectral_sky

FILTER_940 = gaussian_spec(940.0, 10.0, given=True)
PICO_HPA = 645.0


def test_spectral_transmittance_is_spectrl2s():
    # pvlib's SPECTRL2 (Bird and Riordan 1986, eq. 2-8) on its own 122 wavelengths:
    # the water-vapour transmittance it computes for 1.3 cm at air mass 3.1.
    from pvlib.spectrum.spectrl2 import _SPECTRL2_COEFFS, _spectrl2_transmittances
    out = _spectrl2_transmittances(np.array([70.0]), np.array([3.1]), np.array([64500.0]),
                                   np.array([1.3]), np.array([0.26]),
                                   np.zeros((122, 1)), np.zeros((122, 1)), 40)
    pvlib_t = out[3][:, 0]
    ours = wv.spectral_transmittance(_SPECTRL2_COEFFS["wavelength"], np.array(3.1 * 1.3))
    np.testing.assert_allclose(ours, pvlib_t, rtol=1e-12)


def test_b_of_a_10_nm_filter_at_940_nm_is_near_the_literature_value():
    # Reagan et al. (1995) and Schmid et al. (2001) report b of about 0.5-0.6 for
    # filters of about 10 nm near 940 nm (docs/REFERENCES.md, from memory).
    c = wv.derive_constants(FILTER_940, PICO_HPA, (2.0, 6.0), (0.1, 3.0))
    assert 0.5 < c.b < 0.6
    assert 0.0 < c.u_b < 0.01 and 0.0 < c.u_a < 0.05 * c.a
    # The power law is a fit, not an identity: it misses the band model by some 1e-3
    # in ln T over 0.1-3 cm, and far less over one session's range.
    assert 1e-4 < c.max_residual < 0.02
    narrow = wv.derive_constants(FILTER_940, PICO_HPA, (2.0, 6.0), (0.8, 1.2))
    assert narrow.max_residual < c.max_residual / 5


def test_band_transmittance_agrees_with_the_simulators_own_integration():
    # Two implementations of one published model (SPECTRL2 over filter x ASTM G173):
    # the daemon's and the simulator's (tests/test_sim_sky_independent.py checks that one
    # against pvlib too). They differ in the grid and the Rayleigh weighting only.
    m = np.array([2.0, 4.0, 6.0])
    w = np.full(3, 1.0)
    ours = wv.band_transmittance(FILTER_940, m, w, PICO_HPA)
    band = simfilters.band(simfilters.gaussian(940.0, 10.0))
    t = spectral_sky.water_vapour_transmittance(
        spectral_sky.water_vapour_absorption_per_cm(band.wavelength_nm)[None, :], 1.0,
        m[:, None])
    np.testing.assert_allclose(ours, band.mean(t), rtol=2e-3)


def test_water_vapour_airmass_kasten_1965():
    # Kasten (1965) water-vapour air mass: 1 at the zenith, about 2.00 at 60 degrees and
    # 5.71 at 80 degrees (formula from memory, evaluated here; F), above Kasten and
    # Young's 5.586 for the whole atmosphere at 80 degrees (docs/REFERENCES.md).
    m = wv.water_vapour_airmass(np.array([0.0, 60.0, 80.0, 95.0]))
    assert m[0] == pytest.approx(1.0, abs=2e-4)
    assert m[1] == pytest.approx(1.9986, abs=5e-4)
    assert m[2] == pytest.approx(5.7135, abs=5e-4)
    assert m[2] > 5.58604
    assert math.isnan(m[3])
    # A water layer of 2 km scale height (common practice, no source) through spherical
    # shells gives nearly the same slant path: the simulator's independent geometry.
    z = np.array([60.0, 70.0, 80.0])
    np.testing.assert_allclose(wv.water_vapour_airmass(z),
                               spectral_sky.exponential_layer_airmass(z, 2.0, 3.65), rtol=3e-3)
    # and the Kasten-Young round trip
    ky = pvlib.atmosphere.get_relative_airmass(z, model="kastenyoung1989")
    np.testing.assert_allclose(wv.water_vapour_airmass_from_kasten_young(ky),
                               wv.water_vapour_airmass(z), rtol=1e-9)


def test_column_from_the_constants_inverts_the_transmittance():
    c = wv.derive_constants(FILTER_940, PICO_HPA, (2.0, 6.0), (0.1, 3.0))
    m = np.array([2.0, 3.0, 5.0])
    slant = c.a * (m * 1.7) ** c.b
    np.testing.assert_allclose(c.column_cm(slant, m), 1.7, rtol=1e-12)
    assert np.isnan(c.column_cm(np.array([0.0]), np.array([2.0]))[0])


def test_bad_ranges_are_refused():
    with pytest.raises(ValueError, match="airmass_min < airmass_max"):
        wv.derive_constants(FILTER_940, PICO_HPA, (6.0, 2.0), (0.1, 3.0))


def test_export_gives_the_precipitable_water_of_each_measurement(tmp_path):
    # A session on the simulator's independent sky (0.8 cm, its own band integral and
    # water air mass), stored as the service would, with a calibration at the true V0:
    # every 940 nm row of 'export --what aod' carries the column, within 3 % of the
    # sky's truth (two implementations of SPECTRL2 on different air masses).
    import datetime as dt

    from daemon.station.fitting import update_aod
    from daemon.store.reader import aod_between
    from daemon.store.writer import Store
    from sim_instrument.scenario import load_scenario
    from sim_instrument.sessions import session_series
    from tests.independent_sky import config_for, records

    scen = load_scenario("pico-sereno-independent")
    config = config_for(scen)
    s = session_series(scen, dt.date(2025, 2, 12), "am", seed=4, burst_noise_relative=0.0005)
    store = Store.open(tmp_path / "h.db")
    try:
        for rec in records(s, config):
            store.record_measurement(rec)
        rows = [{"channel": n, "wavelength_nm": config.channel(n).wavelength_nm,
                 "v0_1au": s.truth[n].v0_1au_v, "v0_1au_unc": 0.001 * s.truth[n].v0_1au_v,
                 "repeatability_pct": 0.2, "n_sessions": 10, "n_flagged": 0,
                 "drift_pct_per_year": None, "drift_unc_pct_per_year": None,
                 "e0_1au_w_m2_nm": None, "astm_ratio": None, "usable": True, "sessions": [],
                 "reasons": []} for n in s.channels]
        store.save_calibration(dt.datetime(2025, 3, 1, tzinfo=dt.UTC), "2025-02-12",
                               "2025-02-12", scen.site.name, {}, [], rows)
        assert update_aod(store, config, "2025-02-12", "2025-02-12") > 0
        out = list(aod_between(store.conn, "2025-02-12", "2025-02-12"))
    finally:
        store.close()
    water = [r for r in out if r["channel"] == "940"]
    assert len(water) == len(s.times_utc)
    assert all(r["aod"] is None for r in water)
    np.testing.assert_allclose([r["precipitable_water_cm"] for r in water], 0.8, rtol=0.03)
    assert all(r["precipitable_water_cm"] is None for r in out if r["channel"] != "940")


def test_the_vapour_layer_heights_span_the_published_scale_heights():
    # ITU-R P.835 (reference standard atmospheres): water vapour on a 2 km scale height
    # (as documented by pyrtlib's standard_water_vapour_pressure, h_0 = 2 km).
    # Gueymard (1994), apparent water-vapour scale height from the surface temperature,
    # H_v = 0.4976 + 1.5265 t + exp(13.6897 t - 14.9188 t^3), t = T / 273.15 K (as
    # quoted in DNV's SolarFarmer calculation reference): 2.15-2.83 km for -10 to 35 degC.
    # Butler's rule for precipitable water: 1.5 km (from memory).
    from daemon.science.sessionfit import WATER_VAPOUR_SCALE_HEIGHTS_KM

    lo, hi = WATER_VAPOUR_SCALE_HEIGHTS_KM

    gueymard = []
    for celsius in range(-10, 36, 5):
        t = (celsius + 273.15) / 273.15
        gueymard.append(0.4976 + 1.5265 * t + math.exp(13.6897 * t - 14.9188 * t ** 3))
    # the 2.15-2.83 km the constant's comment quotes
    assert min(gueymard) == pytest.approx(2.15, abs=0.01)
    assert max(gueymard) == pytest.approx(2.83, abs=0.01)
    published = [2.0, 1.5, *gueymard]
    assert all(lo <= h <= hi for h in published), (published, lo, hi)
