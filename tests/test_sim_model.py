"""The simulated station and its scenarios: clock, radiometer, tracker, truth.

Most tests freeze the instrument clock (speed=0) and move it with set_clock, so no
test depends on wall-clock time.
"""

from __future__ import annotations

import dataclasses
import json
import math
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pvlib
import pytest
import yaml

from sim_instrument import sky
from sim_instrument.model import SimulatedStation, angular_separation_deg
from sim_instrument.scenario import (
    SCENARIO_DIR,
    ScenarioError,
    available_scenarios,
    load_scenario,
)

MORNING = datetime(2025, 2, 12, 15, 0, 0, tzinfo=UTC)  # sun about 22 deg up at the site
NIGHT = datetime(2025, 2, 13, 5, 0, 0, tzinfo=UTC)


@pytest.fixture(scope="module")
def scenario():
    return load_scenario("pico-sereno-clear")


def quiet(scenario, **atmosphere):
    """The scenario without noise (and optionally with another atmosphere)."""
    inst = dataclasses.replace(scenario.instrument,
                               noise=dataclasses.replace(scenario.instrument.noise,
                                                         relative=0.0, read_v=0.0))
    atm = dataclasses.replace(scenario.atmosphere, **atmosphere)
    return dataclasses.replace(scenario, instrument=inst, atmosphere=atm)


def sun_at(scenario, when):
    """Sun (azimuth, apparent elevation) straight from pvlib, independent of sky.py."""
    s = scenario.site
    sp = pvlib.solarposition.spa_python(
        [when], s.latitude_deg, s.longitude_deg, altitude=s.elevation_m,
        pressure=s.pressure_hpa * 100.0, temperature=s.temperature_c)
    return float(sp["azimuth"].iloc[0]), float(sp["apparent_elevation"].iloc[0])


def locked_station(scenario, when=MORNING, seed=0):
    st = SimulatedStation(scenario, seed=seed, speed=0.0)
    st.set_clock(when)
    st.goto(*sun_at(scenario, when))
    st.follow_sun(True)
    st.set_clock(when + timedelta(seconds=60))  # any slew from the zenith is over by then
    assert st.tracker_state()["locked"]
    return st


# ------------------------------------------------------------------- scenario

def test_shipped_scenario_is_pico_sereno(scenario):
    # The product owner's demo site: 19.95 N, 101.30 W, 3650 m, 260 DU, six channels.
    assert "pico-sereno-clear" in available_scenarios()
    assert scenario.site.name == "Pico Sereno Station"
    assert (scenario.site.latitude_deg, scenario.site.longitude_deg) == (19.95, -101.30)
    assert scenario.site.elevation_m == 3650
    assert scenario.atmosphere.ozone_du == 260
    assert [c.wavelength_nm for c in scenario.instrument.channels] == [380, 440, 500, 675,
                                                                        870, 1020]
    assert all(1.2 <= c.v0_1au_v <= 3.5 for c in scenario.instrument.channels)
    assert scenario.start_utc.tzinfo is not None


def test_shipped_pressure_follows_the_barometric_formula(scenario):
    # ICAO standard atmosphere barometric formula, p = 1013.25 (1 - 2.25577e-5 h)^5.25588
    # hPa with h in m (common practice, no source; the same formula as
    # pvlib.atmosphere.alt2pres): about 645 hPa at 3650 m.
    expected = 1013.25 * (1.0 - 2.25577e-5 * 3650.0) ** 5.25588
    assert scenario.site.pressure_hpa == pytest.approx(expected, abs=0.5)


def raw_scenario():
    return yaml.safe_load((SCENARIO_DIR / "pico-sereno-clear.yaml").read_text())


def write(tmp_path: Path, data) -> Path:
    path = tmp_path / "variant.yaml"
    path.write_text(yaml.safe_dump(data))
    return path


def test_load_by_path_equals_load_by_name(scenario, tmp_path):
    assert load_scenario(write(tmp_path, raw_scenario())) == dataclasses.replace(
        scenario, name="variant")
    assert load_scenario(SCENARIO_DIR / "pico-sereno-clear.yaml") == scenario


def test_pressure_is_derived_when_left_out(tmp_path):
    data = raw_scenario()
    del data["site"]["pressure_hpa"]
    s = load_scenario(write(tmp_path, data))
    # Same ICAO barometric formula as above (common practice, no source).
    # pvlib's constants differ in the last digits: 0.05 hPa is 8e-5 of the pressure.
    assert s.site.pressure_hpa == pytest.approx(
        1013.25 * (1.0 - 2.25577e-5 * 3650.0) ** 5.25588, abs=0.05)


@pytest.mark.parametrize(("mutate", "message"), [
    (lambda d: d["instrument"]["channels"][1].update(colour="blue"),
     r"unknown key 'instrument\.channels\[1\]\.colour'"),
    (lambda d: d.update(wind_m_s=3), r"unknown key 'wind_m_s'"),
    (lambda d: d["site"].pop("latitude_deg"), r"'site\.latitude_deg' is missing"),
    (lambda d: d["atmosphere"].update(ozone_du=-5), r"'atmosphere\.ozone_du' must lie in"),
    (lambda d: d["tracker"].update(slew_rate_deg_s="fast"),
     r"'tracker\.slew_rate_deg_s' must be a number"),
    (lambda d: d.update(start_utc="2025-02-12T12:30:00"), r"'start_utc' must carry a time zone"),
    (lambda d: d["instrument"]["channels"].append(dict(d["instrument"]["channels"][0])),
     r"duplicate channel names \['380'\]"),
    (lambda d: d["instrument"]["channels"][0].update(wavelength_nm=940),
     r"channels\[0\]\.wavelength_nm'.*no ozone cross-section"),
    (lambda d: d["instrument"]["noise"].update(relative=True),
     r"'instrument\.noise\.relative' must be a number"),
])
def test_bad_scenarios_are_rejected_naming_the_key(tmp_path, mutate, message):
    data = raw_scenario()
    mutate(data)
    with pytest.raises(ScenarioError, match=message):
        load_scenario(write(tmp_path, data))


def test_unknown_scenario_name_lists_the_shipped_ones():
    with pytest.raises(ScenarioError, match="pico-sereno-clear"):
        load_scenario("no-such-scenario")


def test_broken_yaml_is_reported(tmp_path):
    path = tmp_path / "broken.yaml"
    path.write_text("site: [unclosed\n")
    with pytest.raises(ScenarioError, match="not valid YAML"):
        load_scenario(path)


# ---------------------------------------------------------------------- clock

class FakeMonotonic:
    def __init__(self):
        self.t = 1000.0

    def __call__(self):
        return self.t


def test_clock_runs_at_speed_from_the_last_setting(scenario):
    mono = FakeMonotonic()
    st = SimulatedStation(scenario, speed=60.0, monotonic=mono)
    assert st.now() == scenario.start_utc
    mono.t += 2.0
    assert st.now() == scenario.start_utc + timedelta(seconds=120)
    st.set_clock(MORNING)
    assert st.now() == MORNING
    mono.t += 0.5
    assert st.now() == MORNING + timedelta(seconds=30)


def test_frozen_clock_and_bad_settings(scenario):
    st = SimulatedStation(scenario, speed=0.0)
    st.set_clock(MORNING)
    assert st.now() == MORNING == st.now()
    with pytest.raises(ValueError, match="timezone-aware"):
        st.set_clock(datetime(2025, 2, 12, 15, 0))
    with pytest.raises(ValueError, match="speed"):
        SimulatedStation(scenario, speed=-1.0)


# ------------------------------------------------------------------ radiometer

def test_identities_and_channels(scenario):
    st = SimulatedStation(scenario, speed=0.0)
    assert st.radiometer_identity() == ("HR6-SIM", "PS-0042", "1.4.2")
    assert st.tracker_identity() == ("HT2-SIM", "PS-T-0017", "2.1.0")
    assert st.channel_count() == 6


def test_burst_shape_and_duration(scenario):
    st = locked_station(scenario)
    samples, duration_s, saturated = st.burst(7)
    assert len(samples) == 7 and all(len(row) == 6 for row in samples)
    assert all(isinstance(v, float) for row in samples for v in row)
    assert duration_s == pytest.approx(6 * scenario.instrument.sample_interval_s)
    assert saturated == [False] * 6
    assert st.burst(1)[1] == 0.0
    with pytest.raises(ValueError, match="sample count"):
        st.burst(0)


def test_dark_is_the_dark_signal_plus_read_noise(scenario):
    st = SimulatedStation(scenario, seed=3, speed=0.0)
    samples, duration_s, saturated = st.dark(400)
    arr = np.array(samples)
    dark = np.array([c.dark_v for c in scenario.instrument.channels])
    read = scenario.instrument.noise.read_v
    assert arr.shape == (400, 6)
    assert duration_s == pytest.approx(399 * scenario.instrument.sample_interval_s)
    assert saturated == [False] * 6
    # Mean within 5 standard errors, spread within 20 % of the read noise
    # (Gaussian sampling statistics, common practice, no source).
    assert np.all(np.abs(arr.mean(axis=0) - dark) < 5 * read / math.sqrt(400))
    assert np.allclose(arr.std(axis=0, ddof=1), read, rtol=0.2)


def test_seeded_station_is_reproducible(scenario):
    def run(seed):
        st = locked_station(scenario, seed=seed)
        out = [st.burst(10)[0], st.dark(5)[0], st.tracker_state(), st.housekeeping()]
        st.set_clock(MORNING + timedelta(hours=1))
        out += [st.burst(10)[0], st.tracker_state()]
        return out

    assert run(7) == run(7)
    assert run(7)[0] != run(8)[0]


def test_tracker_polling_does_not_change_the_radiometer_noise(scenario):
    a = locked_station(scenario, seed=5)
    b = locked_station(scenario, seed=5)
    for _ in range(5):
        b.tracker_state()
    assert a.burst(10)[0] == b.burst(10)[0]


def test_lost_lock_reads_only_dark(scenario):
    st = SimulatedStation(quiet(scenario), speed=0.0)
    st.set_clock(MORNING)  # still parked at the zenith, sun 22 deg up
    samples, _, _ = st.burst(3)
    dark = [c.dark_v for c in scenario.instrument.channels]
    assert all(row == pytest.approx(dark, abs=1e-15) for row in samples)
    assert st.truth()["readings"][-1]["locked"] is False


def test_locked_signal_is_well_above_dark(scenario):
    st = locked_station(scenario)
    mean = np.array(st.burst(10)[0]).mean(axis=0)
    assert np.all(mean > 0.3)


def test_saturation_clips_at_full_scale_and_flags_the_channel(scenario):
    inst = dataclasses.replace(scenario.instrument, full_scale_v=1.0)
    st = locked_station(dataclasses.replace(scenario, instrument=inst))
    samples, _, saturated = st.burst(10)
    arr = np.array(samples)
    clean = np.array([c["signal_v"] for c in st.truth()["readings"][-1]["channels"].values()])
    # 380 nm gives about 0.6 V at air mass 2.6; the other five exceed 1 V.
    assert saturated == [bool(v > 1.0) for v in clean] == [False] + [True] * 5
    assert arr.max() == 1.0
    assert np.all(arr[:, 1:] == 1.0)


def test_ln_v_is_linear_in_air_mass_with_slope_minus_tau(scenario):
    # The Langley relation: ln[(V - dark) / (r0/r)^2] = ln V0 - tau m on a clear,
    # stable, ozone-free day with Rayleigh and aerosol on the same (Kasten-Young) air
    # mass (common practice, no source). Independent pieces: the air mass from pvlib's
    # Kasten-Young 1989 on pvlib's SPA apparent zenith, (r0/r)^2 from pvlib's NREL SPA
    # distance, and tau = Bodhaine 1999 at 1013.25 hPa (REFERENCES.md table, F)
    # scaled to the site's 645 hPa plus the aerosol optical depth 0.02 at 500 nm.
    sc = quiet(scenario, ozone_du=0.0)
    st = locked_station(sc, when=datetime(2025, 2, 12, 13, 55, tzinfo=UTC))
    site = sc.site
    xs, ys = [], []
    for minutes in range(0, 100, 5):
        when = datetime(2025, 2, 12, 14, 0, tzinfo=UTC) + timedelta(minutes=minutes)
        st.set_clock(when)
        v = st.burst(1)[0][0][2] - sc.instrument.channels[2].dark_v  # 500 nm
        sp = pvlib.solarposition.spa_python([when], site.latitude_deg, site.longitude_deg,
                                            altitude=site.elevation_m,
                                            pressure=site.pressure_hpa * 100.0,
                                            temperature=site.temperature_c)
        m = pvlib.atmosphere.get_relative_airmass(sp["apparent_zenith"].iloc[0],
                                                  model="kastenyoung1989")
        r = pvlib.solarposition.nrel_earthsun_distance([when]).iloc[0]
        xs.append(m)
        ys.append(math.log(v * r * r))
    assert min(xs) < 2.5 and max(xs) > 5.0  # a real Langley air-mass range
    slope, intercept = np.polyfit(xs, ys, 1)
    tau_500 = 0.14335 * 645.0 / 1013.25 + 0.02
    assert slope == pytest.approx(-tau_500, abs=1e-5)
    assert math.exp(intercept) == pytest.approx(sc.instrument.channels[2].v0_1au_v, rel=1e-5)


def test_ozone_rides_on_its_own_air_mass(scenario):
    # With ozone the signal follows ln V0' - (tau_R + tau_a) m_KY - tau_O3 m_O3, the
    # ozone air mass being Komhyr's (1980) thin layer at 22 km seen from 3.65 km
    # (formula with R = 6371.229 km as in REFERENCES.md). Its air mass grows slower
    # than Kasten-Young's (5.21 against 5.59 at z = 80 deg at sea level, REFERENCES.md,
    # F), so a plain Langley slope lies between -(tau_R + tau_a) and -tau_total.
    st = locked_station(quiet(scenario), when=datetime(2025, 2, 12, 13, 55, tzinfo=UTC))
    for minutes in range(0, 100, 5):
        st.set_clock(datetime(2025, 2, 12, 14, 0, tzinfo=UTC) + timedelta(minutes=minutes))
        st.burst(1)
    readings = st.truth()["readings"][1:]
    z = np.radians([r["apparent_zenith_deg"] for r in readings])
    komhyr = (6371.229 + 22.0) / np.sqrt((6371.229 + 22.0) ** 2
                                         - ((6371.229 + 3.65) * np.sin(z)) ** 2)
    assert np.allclose([r["airmass_ozone"] for r in readings], komhyr, rtol=1e-12)
    m = np.array([r["airmass_rayleigh"] for r in readings])
    ch = readings[0]["channels"]["675"]  # the channel with the largest ozone share
    ln_v = np.log([r["channels"]["675"]["signal_v"] / r["earth_sun_factor"]
                   for r in readings])
    slope, _ = np.polyfit(m, ln_v + ch["tau_ozone"] * komhyr, 1)
    assert slope == pytest.approx(-(ch["tau_rayleigh"] + ch["tau_aerosol"]), abs=1e-9)
    plain, _ = np.polyfit(m, ln_v, 1)
    assert -ch["tau_total"] < plain < -(ch["tau_rayleigh"] + ch["tau_aerosol"])


def test_housekeeping_is_plausible_with_a_diurnal_cycle(scenario):
    st = SimulatedStation(scenario, seed=1, speed=0.0)
    st.set_clock(datetime(2025, 2, 12, 12, 0, tzinfo=UTC))  # about 05:15 local solar time
    dawn = st.housekeeping()
    st.set_clock(datetime(2025, 2, 12, 21, 45, tzinfo=UTC))  # about 15:00 local solar time
    afternoon = st.housekeeping()
    assert set(dawn) == {"detector_temp_c", "case_temp_c", "ambient_temp_c", "supply_v",
                         "humidity_pct", "pressure_hpa"}
    assert afternoon["ambient_temp_c"] > dawn["ambient_temp_c"] + 5.0
    assert afternoon["humidity_pct"] < dawn["humidity_pct"]
    for hk in (dawn, afternoon):
        assert hk["supply_v"] == pytest.approx(12.6, abs=0.2)
        assert hk["detector_temp_c"] == pytest.approx(25.0, abs=1.0)
        assert 0.0 <= hk["humidity_pct"] <= 100.0
        assert hk["pressure_hpa"] == scenario.site.pressure_hpa
        assert all(isinstance(v, float) for v in hk.values())


def test_reset_keeps_the_clock(scenario):
    st = SimulatedStation(scenario, speed=0.0)
    st.set_clock(MORNING)
    st.reset_radiometer()
    assert st.now() == MORNING
    assert st.truth()["radiometer_resets"] == 1


# --------------------------------------------------------------------- tracker

def test_starts_parked(scenario):
    state = SimulatedStation(scenario, speed=0.0).tracker_state()
    assert state == {"mode": "parked", "azimuth_deg": 0.0, "elevation_deg": 90.0,
                     "locked": False, "error_deg": 0.0}


def test_slews_at_the_finite_rate_then_locks(scenario):
    st = SimulatedStation(scenario, seed=2, speed=0.0)
    st.set_clock(MORNING)
    az, el = sun_at(scenario, MORNING)
    st.goto(az, el)
    rate = scenario.tracker.slew_rate_deg_s
    assert st.tracker_state()["mode"] == "slewing"
    st.set_clock(MORNING + timedelta(seconds=4))
    mid = st.tracker_state()
    assert mid["mode"] == "slewing" and not mid["locked"]
    # Both axes move at once at the slew rate: 4 s at 5 deg/s is 20 deg each.
    assert mid["elevation_deg"] == pytest.approx(90.0 - 4 * rate)
    assert mid["azimuth_deg"] == pytest.approx(4 * rate)
    st.follow_sun(True)
    travel_s = max(abs(az), abs(90.0 - el)) / rate
    st.set_clock(MORNING + timedelta(seconds=travel_s - 0.5))
    assert st.tracker_state()["mode"] == "slewing"
    st.set_clock(MORNING + timedelta(seconds=travel_s + 0.5))
    state = st.tracker_state()
    assert state["mode"] == "tracking" and state["locked"]
    assert 0.0 < state["error_deg"] < 5 * scenario.tracker.lock_pointing_error_deg
    sun = sun_at(scenario, MORNING + timedelta(seconds=travel_s + 0.5))
    assert angular_separation_deg(state["azimuth_deg"], state["elevation_deg"],
                                  *sun) == pytest.approx(state["error_deg"], abs=1e-9)


def test_keeps_following_the_sun(scenario):
    st = locked_station(scenario)
    later = MORNING + timedelta(hours=2)
    st.set_clock(later)
    state = st.tracker_state()
    assert state["locked"]
    assert angular_separation_deg(state["azimuth_deg"], state["elevation_deg"],
                                  *sun_at(scenario, later)) < 0.2


def test_outside_capture_range_does_not_lock(scenario):
    st = SimulatedStation(quiet(scenario), speed=0.0)
    st.set_clock(MORNING)
    az, el = sun_at(scenario, MORNING)
    st.follow_sun(True)
    st.goto(az, el + 3.0 * scenario.tracker.capture_range_deg)
    st.set_clock(MORNING + timedelta(seconds=60))
    state = st.tracker_state()
    assert state["mode"] == "tracking" and not state["locked"]
    assert state["error_deg"] == 0.0
    dark = [c.dark_v for c in scenario.instrument.channels]
    assert st.burst(2)[0][0] == pytest.approx(dark, abs=1e-15)


def test_follow_off_then_the_sun_drifts_away(scenario):
    st = locked_station(quiet(scenario))
    st.follow_sun(False)
    assert st.tracker_state()["mode"] == "idle"
    st.set_clock(MORNING + timedelta(minutes=30))
    assert not st.tracker_state()["locked"]
    dark = [c.dark_v for c in scenario.instrument.channels]
    assert st.burst(1)[0][0] == pytest.approx(dark, abs=1e-15)


def test_lock_is_lost_at_sunset(scenario):
    st = locked_station(scenario, when=datetime(2025, 2, 12, 23, 0, tzinfo=UTC))
    st.set_clock(NIGHT)
    state = st.tracker_state()
    assert state["mode"] == "tracking" and not state["locked"]


def test_park_slews_home(scenario):
    st = locked_station(scenario)
    st.park()
    assert st.tracker_state()["mode"] == "slewing"
    st.set_clock(MORNING + timedelta(minutes=5))
    state = st.tracker_state()
    assert state["mode"] == "parked" and not state["locked"]
    assert (state["azimuth_deg"], state["elevation_deg"]) == (0.0, 90.0)


def test_setting_the_clock_back_does_not_undo_motion(scenario):
    st = SimulatedStation(scenario, speed=0.0)
    st.set_clock(MORNING)
    st.goto(180.0, 30.0)
    st.set_clock(MORNING + timedelta(seconds=3))
    before = st.tracker_state()
    st.set_clock(MORNING - timedelta(hours=1))
    after = st.tracker_state()
    assert after["mode"] == "slewing"
    assert after["azimuth_deg"] == pytest.approx(before["azimuth_deg"])
    assert after["elevation_deg"] == pytest.approx(before["elevation_deg"])


@pytest.mark.parametrize(("az", "el", "message"), [
    (10.0, 95.0, "elevation_deg must lie in"),
    (float("nan"), 30.0, "azimuth_deg must be a finite number"),
])
def test_goto_rejects_impossible_targets(scenario, az, el, message):
    with pytest.raises(ValueError, match=message):
        SimulatedStation(scenario, speed=0.0).goto(az, el)


# ----------------------------------------------------------------------- truth

def test_truth_records_every_burst_as_json(scenario):
    st = locked_station(scenario)
    st.burst(10)
    st.dark(5)
    st.set_clock(MORNING + timedelta(minutes=30))
    st.burst(4)
    truth = json.loads(json.dumps(st.truth(), allow_nan=False))
    assert truth["channels"]["500"] == {"wavelength_nm": 500.0, "v0_1au": 3.10,
                                        "dark_v": 0.0016}
    assert [r["samples"] for r in truth["readings"]] == [10, 4]
    first = truth["readings"][0]
    assert first["locked"] is True
    assert first["duration_s"] == pytest.approx(1.8)
    ch = first["channels"]["440"]
    assert ch["tau_total"] == pytest.approx(ch["tau_rayleigh"] + ch["tau_ozone"]
                                            + ch["tau_aerosol"], rel=1e-12)
    # Rayleigh at the site: Bodhaine 1999 eq. 30 at 1013.25 hPa (REFERENCES.md, F)
    # scaled to 645 hPa; ozone and aerosol from the scenario's 260 DU and tau_500.
    assert ch["tau_rayleigh"] == pytest.approx(0.24261 * 645.0 / 1013.25, abs=1e-5)
    assert ch["tau_ozone"] == pytest.approx(sky.ozone_optical_depth(440.0, 260.0), rel=1e-12)
    assert ch["tau_aerosol"] == pytest.approx(0.02 * (440.0 / 500.0) ** -1.3, rel=1e-12)
    assert first["airmass_ozone"] < first["airmass_rayleigh"]  # Komhyr below KY off zenith
    assert 2.0 < first["airmass_rayleigh"] < 3.0
    # Mid-February (r0/r)^2, Spencer 1971 (REFERENCES.md coefficients, from memory).
    assert first["earth_sun_factor"] == pytest.approx(
        sky.earth_sun_factor_spencer(43 + 15.0 / 24.0), abs=1.2e-3)
