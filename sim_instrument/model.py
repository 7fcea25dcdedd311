"""The simulated station: sky, radiometer and tracker sharing one clock.

CONTRACT (used by sim_instrument/server.py; keep these signatures):

    station = SimulatedStation(scenario: Scenario, seed: int = 0, speed: float = 1.0)
    station.now() -> datetime                      # instrument clock, UTC aware
    station.set_clock(when: datetime) -> None      # CLK command (both devices share it)
    station.radiometer_identity() -> tuple[str, str, str]   # model, serial, firmware
    station.tracker_identity() -> tuple[str, str, str]
    station.channel_count() -> int
    station.burst(n: int) -> tuple[list[list[float]], float, list[bool]]
        # samples[i][c] in volts, duration_s, saturated flag per channel
    station.dark(n: int) -> tuple[list[list[float]], float, list[bool]]
    station.housekeeping() -> dict  # detector_temp_c, case_temp_c, ambient_temp_c,
                                    # supply_v, humidity_pct, pressure_hpa (or None)
    station.goto(azimuth_deg: float, elevation_deg: float) -> None
    station.follow_sun(on: bool) -> None
    station.park() -> None
    station.tracker_state() -> dict  # mode, azimuth_deg, elevation_deg, locked, error_deg
    station.reset_radiometer() -> None
    station.reset_tracker() -> None  # a tracker reboot: stops, follow off
    station.truth() -> dict          # {"channels": {name: {"wavelength_nm", "v0_1au", ...}},
                                     #  "readings": [...]}

Behaviour behind the contract
-----------------------------
Clock. ``now() = last set time + (monotonic() - monotonic at the set) * speed``.
``speed=0`` freezes the clock: it then moves only by ``set_clock`` (what the tests
use). Everything else is a function of this instrument time: a slew is in progress
until its arrival time on this clock. Setting the clock forward therefore lets a
pending slew finish, as if the time had passed; setting it backward never undoes
motion (the slew goes on from where it was).

Radiometer. ``burst(n)`` takes ``n`` samples ``sample_interval_s`` apart starting at
``now()`` (the clock is not advanced by the burst; ``duration_s = (n - 1) *
sample_interval_s``). Each sample is the direct-sun signal at its own time: for a
spectral channel Beer-Lambert with the sky of :mod:`sky` (pressure with its tide,
aerosol with its drift and variability, thin cloud, and water vapour in the 940 nm
band); for a broadband channel the SPECTRL2 direct beam of :mod:`broadband`. The
signal is scaled by the channel's responsivity at the detector temperature
(``1 + temp_coeff_per_k * (T_det - reference_temp_c)``) and by the part of the solar
disc inside the field of view, and it is there only while the tracker points at the
sun at the burst's start (else the optics see sky-free darkness: a "lost lock"
reading). Then the dark signal (doubling every ``dark_doubling_k`` kelvin from its
value at 25 degrees C) is added, and Gaussian noise of standard deviation
``sqrt((relative V)^2 + shot_v^2 V / 1 V + read_v^2)``; samples are clipped to
``[0, full_scale_v]`` and a channel is flagged saturated when any of its samples
reaches full scale. ``dark(n)`` is the same with the shutter closed. The weather and
sky are functions of time (:mod:`conditions`).

Tracker. Starts parked. ``goto`` slews both axes at once at ``slew_rate_deg_s``
(azimuth the short way round); the mode is ``slewing`` until arrival, then ``idle``.
With ``follow_sun(True)`` the sun sensor captures the sun whenever the tracker is
at rest within ``capture_range_deg`` of the true sun (checked on arrival, when the
follow is switched on, and at every later look while it is on); it is then
``tracking``, ``locked``, pointing at the sun with an rms error of
``lock_pointing_error_deg``, and it follows the sun until the sun drops below the
horizon. With the follow on but no capture, the mode is ``tracking`` with
``locked`` false. Wind adds ``wind_pointing_error_deg_per_m_s`` of rms pointing error
per m/s. Under cloud whose direct beam is below ``min_direct_fraction_for_lock`` of
clear sky the sun sensor loses the sun: ``locked`` reads false (the mount goes on
following by its ephemeris) and no capture is possible until the cloud thins. During
a scheduled ``tracker_stall`` the mount does not move: the mode is ``fault``, the lock
is lost, commands are accepted and carried out when the stall ends. ``goto`` keeps
the follow setting (so "goto the sun, then follow" and "follow, then goto the sun"
both end locked). ``park`` switches the follow off and slews to the park position;
the mode is ``parked`` on arrival.

Randomness. Four generators spawned from ``numpy.random.SeedSequence(seed)``: the
radiometer's noise, the tracker's pointing jitter, the housekeeping noise and the
day's conditions (drawn once), so polling the tracker does not change the
radiometer's noise. The whole station is
deterministic for a given seed, scenario and sequence of calls and clock settings
(with ``speed=0``, or with a deterministic ``monotonic``).

Truth. Every burst appends an entry to ``truth()["readings"]`` with the burst's
times, the lock state, the true optical depths per channel (total and Rayleigh,
ozone, aerosol, water vapour, cloud; for a broadband channel the effective total
``-ln(V / (V0 (r0/r)^2)) / m``), the air masses, the Earth-Sun factor, pressure,
aerosol, cloud and detector temperature at the burst's mean time, and the noise-free
mean direct-sun signal per channel.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime
from typing import Any

import numpy as np

from sim_instrument import broadband, filters, sky, spectral_sky
from sim_instrument.conditions import Conditions
from sim_instrument.faults import solar_hour
from sim_instrument.scenario import BROADBAND, INDEPENDENT_SKY, Scenario, channel_filter

MAX_SAMPLES = 10_000  # per burst or dark read
MIN_TRACKER_ELEVATION_DEG = -5.0
MIN_LOCK_SUN_ELEVATION_DEG = 0.0  # the sun sensor loses the sun at the horizon

SUN_TABLE_STEPS = 60  # minutes per tracker sun table (one UTC hour)
DARK_REFERENCE_C = 25.0  # the scenario's dark_v is the dark signal at this temperature
SUN_RADIUS_DEG = 0.2665  # the solar disc is 0.533 deg wide at 1 AU (docs/REFERENCES.md, F)


def field_of_view_fraction(offset_deg: float, field_of_view_deg: float) -> float:
    """Part of the solar disc inside a circular field of view [0-1].

    Full while the disc lies inside the field, none once it is wholly outside, linear
    between (a flat-topped response with a narrow penumbra: common practice, no source).
    """
    half = field_of_view_deg / 2.0
    inner, outer = half - SUN_RADIUS_DEG, half + SUN_RADIUS_DEG
    if offset_deg <= inner:
        return 1.0
    if offset_deg >= outer:
        return 0.0
    return (outer - offset_deg) / (outer - inner)


def _epoch_s(when: datetime, what: str) -> float:
    if not isinstance(when, datetime):
        raise TypeError(f"{what} must be a datetime, got {type(when).__name__}")
    if when.tzinfo is None or when.utcoffset() is None:
        raise ValueError(f"{what} must be timezone-aware (UTC), got naive {when.isoformat()}; "
                         f"attach a zone, e.g. datetime(..., tzinfo=timezone.utc)")
    return when.timestamp()


def _iso(epoch_s: float) -> str:
    return datetime.fromtimestamp(epoch_s, UTC).isoformat(timespec="milliseconds")


def _json_float(x: float) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def _channel_truth(c: Any, filtered: bool) -> dict:
    """What a channel really is: V0 at 1 AU [V] and how it was built (and its filter,
    on the independent sky, which integrates over it)."""
    out = {"kind": c.kind, "wavelength_nm": _json_float(c.wavelength_nm),
           "bandwidth_nm": _json_float(c.bandwidth_nm), "v0_1au": c.v0_1au_v,
           "dark_v": c.dark_v, "temp_coeff_per_k": c.temp_coeff_per_k,
           "reference_temp_c": c.reference_temp_c}
    if c.kind == BROADBAND:
        out["responsivity_v_per_w_m2"] = c.responsivity_v_per_w_m2
        out["extraterrestrial_w_m2"] = c.v0_1au_v / c.responsivity_v_per_w_m2
    elif filtered:
        f = channel_filter(c)
        out["filter"] = f.description
        out["filter_centroid_nm"] = f.centroid_nm
    return out


def angular_separation_deg(az1_deg: float, el1_deg: float, az2_deg: float,
                           el2_deg: float) -> float:
    """Great-circle angle between two pointing directions [degrees]."""
    e1, e2 = math.radians(el1_deg), math.radians(el2_deg)
    cos_d = (math.sin(e1) * math.sin(e2)
             + math.cos(e1) * math.cos(e2) * math.cos(math.radians(az2_deg - az1_deg)))
    return math.degrees(math.acos(max(-1.0, min(1.0, cos_d))))


def _short_azimuth_delta_deg(from_deg: float, to_deg: float) -> float:
    return (to_deg - from_deg + 180.0) % 360.0 - 180.0


class SimulatedStation:
    """Sky, radiometer and tracker of one scenario on one instrument clock.

    Parameters
    ----------
    scenario : Scenario
        What to simulate (see :mod:`sim_instrument.scenario`).
    seed : int
        Seed of every random draw.
    speed : float
        Instrument seconds per monotonic second; 0 freezes the clock.
    monotonic : callable, keyword-only
        Source of monotonic seconds (``time.monotonic``); tests may inject their own.
    """

    def __init__(self, scenario: Scenario, seed: int = 0, speed: float = 1.0, *,
                 monotonic: Callable[[], float] = time.monotonic):
        if isinstance(speed, bool) or not isinstance(speed, int | float) or not (
                math.isfinite(speed) and speed >= 0):
            raise ValueError(f"speed must be a finite number >= 0 (instrument seconds per "
                             f"real second; 0 freezes the clock), got {speed!r}")
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
        self.scenario = scenario
        self._speed = float(speed)
        self._monotonic = monotonic
        self._lock = threading.RLock()

        rad_seq, trk_seq, hk_seq, sky_seq = np.random.SeedSequence(seed).spawn(4)
        self._rng_radiometer = np.random.default_rng(rad_seq)
        self._rng_tracker = np.random.default_rng(trk_seq)
        self._rng_housekeeping = np.random.default_rng(hk_seq)
        self.conditions = Conditions(scenario, np.random.default_rng(sky_seq))

        site, atm, inst = scenario.site, scenario.atmosphere, scenario.instrument
        channels = inst.channels
        self._names = [c.name for c in channels]
        self._broadband = np.array([c.kind == BROADBAND for c in channels])
        self._spectral = ~self._broadband
        # Broadband channels get placeholder wavelengths; their spectral columns are
        # replaced by the SPECTRL2 signal.
        self._wavelength_nm = np.array([500.0 if c.kind == BROADBAND else c.wavelength_nm
                                        for c in channels])
        self._v0_1au_v = np.array([c.v0_1au_v for c in channels])
        self._dark_v = np.array([c.dark_v for c in channels])
        self._temp_coeff = np.array([c.temp_coeff_per_k for c in channels])
        self._reference_c = np.array([c.reference_temp_c for c in channels])
        self._responsivity = np.array([c.responsivity_v_per_w_m2 for c in channels])
        self._tau_ozone = np.array([0.0 if c.kind == BROADBAND else
                                    sky.ozone_optical_depth(c.wavelength_nm, atm.ozone_du,
                                                            c.bandwidth_nm)
                                    for c in channels])
        self._water_channels = [
            i for i, c in enumerate(channels) if c.kind != BROADBAND and np.any(
                sky.water_vapour_absorption_coefficient(
                    np.linspace(c.wavelength_nm - c.bandwidth_nm / 2,
                                c.wavelength_nm + c.bandwidth_nm / 2, 41)))]
        self._station_height_km = site.elevation_m / 1000.0
        self._independent = atm.sky == INDEPENDENT_SKY
        self._bands = {i: filters.band(channel_filter(c)) for i, c in enumerate(channels)
                       if c.kind != BROADBAND} if self._independent else {}
        self._sky_constants = spectral_sky.SkyConstants(
            site.latitude_deg, site.elevation_m, atm.aerosol_scale_height_km,
            atm.water_vapour_scale_height_km)

        self._t_set = _epoch_s(scenario.start_utc, "scenario start_utc")
        self._mono_at_set = self._monotonic()

        trk = scenario.tracker
        self._mode = "parked"
        self._follow = False
        self._locked = False
        self._az = trk.park_azimuth_deg % 360.0
        self._el = trk.park_elevation_deg
        self._off_az = 0.0  # pointing error while locked [degrees]
        self._off_el = 0.0
        self._slew: tuple[float, float, float, float, float, float, str] | None = None
        self._t_state = self._t_set
        self._sun_cache: tuple[float, float, float] | None = None
        self._sun_tables: dict[int, tuple[np.ndarray, np.ndarray, np.ndarray]] = {}
        self._stall_events = scenario.faults.stalls
        self._stalled = False
        self._after_stall: tuple[float, float, str] | None = None  # slew to finish
        self._tracker_resets = 0

        self._readings: list[dict] = []
        self._radiometer_resets = 0

    # ------------------------------------------------------------------ clock

    def _now_s(self) -> float:
        return self._t_set + (self._monotonic() - self._mono_at_set) * self._speed

    def now(self) -> datetime:
        """Instrument time, UTC-aware."""
        with self._lock:
            return datetime.fromtimestamp(self._now_s(), UTC)

    def set_clock(self, when: datetime) -> None:
        """Set the shared instrument clock (radiometer and tracker) to ``when``."""
        new = _epoch_s(when, "clock time")
        with self._lock:
            old = self._now_s()
            self._advance(old)
            if new < old:
                # A clock set backward is a correction, not time running backward.
                self._rebase_slew(old, new)
                self._t_state = new
            self._t_set = new
            self._mono_at_set = self._monotonic()

    # --------------------------------------------------------------- identity

    def radiometer_identity(self) -> tuple[str, str, str]:
        inst = self.scenario.instrument
        return inst.model, inst.serial, inst.firmware

    def tracker_identity(self) -> tuple[str, str, str]:
        trk = self.scenario.tracker
        return trk.model, trk.serial, trk.firmware

    def channel_count(self) -> int:
        return len(self._names)

    # ------------------------------------------------------------- radiometer

    def _check_n(self, n: int) -> None:
        if isinstance(n, bool) or not isinstance(n, int | np.integer) or not (
                1 <= n <= MAX_SAMPLES):
            raise ValueError(f"sample count must be an integer from 1 to {MAX_SAMPLES}, "
                             f"got {n!r}")

    def _noisy(self, clean_v: np.ndarray) -> tuple[list[list[float]], list[bool]]:
        noise = self.scenario.instrument.noise
        full_scale = self.scenario.instrument.full_scale_v
        sigma = np.sqrt((noise.relative * clean_v) ** 2 + noise.shot_v ** 2 * clean_v
                        + noise.read_v ** 2)
        raw = clean_v + sigma * self._rng_radiometer.standard_normal(clean_v.shape)
        saturated = (raw >= full_scale).any(axis=0)
        samples = np.clip(raw, 0.0, full_scale)
        return samples.tolist(), [bool(s) for s in saturated]

    def _sky_signal(self, times: np.ndarray) -> dict:
        """Noise-free direct-sun signal of every channel at ``times`` [s], and its parts."""
        site, atm = self.scenario.site, self.scenario.atmosphere
        cond = self.conditions
        index = sky.to_datetime_index(times)
        pressure = cond.pressure_hpa(times)
        geo = sky.solar_position(index, site.latitude_deg, site.longitude_deg,
                                 site.elevation_m, float(np.mean(pressure)),
                                 site.temperature_c)
        m_ky = np.asarray(sky.relative_airmass_kasten_young(geo.apparent_zenith_deg))
        m_o3 = np.asarray(sky.ozone_airmass(geo.apparent_zenith_deg, self._station_height_km))
        esf = float(sky.earth_sun_factor(index[-1:])[0])  # varies 1e-8 within a burst
        tau_500 = cond.tau_500(times)
        tau_cloud = cond.cloud_optical_depth(times)
        detector_c = cond.detector_c(times)
        water_cm = atm.precipitable_water_cm
        tau_r = np.asarray(sky.rayleigh_optical_depth(self._wavelength_nm[None, :],
                                                      pressure[:, None]), dtype=float)
        tau_a = np.asarray(sky.aerosol_optical_depth(self._wavelength_nm[None, :],
                                                     tau_500[:, None], atm.angstrom_alpha),
                           dtype=float)
        m_col = m_ky[:, None]
        transmittance_wv = np.ones((len(times), len(self._names)))
        for c in self._water_channels:
            ch = self.scenario.instrument.channels[c]
            transmittance_wv[:, c] = sky.water_vapour_band_transmittance(
                ch.wavelength_nm, ch.bandwidth_nm, water_cm, np.nan_to_num(m_ky, nan=1.0))
        with np.errstate(invalid="ignore"):
            sun_v = sky.direct_sun_signal_v(
                self._v0_1au_v, esf,
                (tau_r, self._tau_ozone, tau_a + tau_cloud[:, None]),
                (m_col, m_o3[:, None], m_col)) * transmittance_wv
        tau_o = np.broadcast_to(self._tau_ozone, tau_r.shape).copy()
        m_a = m_ky
        if self._independent:
            state = spectral_sky.SkyState(
                apparent_zenith_deg=geo.apparent_zenith_deg, pressure_hpa=pressure,
                tau_500=tau_500, angstrom_alpha=atm.angstrom_alpha, ozone_du=atm.ozone_du,
                precipitable_water_cm=np.full(len(times), water_cm), tau_cloud=tau_cloud)
            masses = spectral_sky.airmasses(state, self._sky_constants)
            m_o3, m_a = masses["ozone"], masses["aerosol"]
            for c, band in self._bands.items():
                res = spectral_sky.band_transmittance(band, state, self._sky_constants, masses)
                sun_v[:, c] = self._v0_1au_v[c] * esf * res.transmittance
                tau_r[:, c], tau_a[:, c] = res.tau_rayleigh, res.tau_aerosol
                tau_o[:, c] = res.tau_ozone
                transmittance_wv[:, c] = res.transmittance_water_vapour
        if self._broadband.any():
            doy = float(index[-1].day_of_year)
            dni = broadband.direct_irradiance_w_m2(
                geo.apparent_zenith_deg, m_ky, pressure, water_cm, atm.ozone_du, tau_500,
                atm.angstrom_alpha, doy) * np.exp(-tau_cloud * np.nan_to_num(m_ky, nan=0.0))
            # SPECTRL2 uses Spencer's distance; the truth's V0 is at 1 AU, so the
            # broadband signal carries SPECTRL2's own (r0/r)^2 already.
            sun_v[:, self._broadband] = dni[:, None] * self._responsivity[self._broadband]
        responsivity = 1.0 + self._temp_coeff * (detector_c[:, None] - self._reference_c)
        sun_v = np.nan_to_num(sun_v, nan=0.0) * responsivity  # sun below the horizon: 0
        return {"geo": geo, "m_ky": m_ky, "m_o3": m_o3, "m_a": m_a, "esf": esf,
                "pressure": pressure, "tau_500": tau_500, "tau_cloud": tau_cloud,
                "detector_c": detector_c, "tau_r": tau_r, "tau_a": tau_a, "tau_o": tau_o,
                "t_wv": transmittance_wv, "sun_v": sun_v, "responsivity": responsivity}

    def _dark_signal_v(self, detector_c: np.ndarray) -> np.ndarray:
        doubling = self.scenario.instrument.thermal.dark_doubling_k
        return self._dark_v * np.exp2((detector_c[:, None] - DARK_REFERENCE_C) / doubling)

    def burst(self, n: int) -> tuple[list[list[float]], float, list[bool]]:
        """``n`` direct-sun samples on every channel.

        Returns
        -------
        samples : list of list of float
            ``samples[i][c]``, sample ``i`` of channel ``c`` [V].
        duration_s : float
            First to last sample [s].
        saturated : list of bool
            Per channel, any sample at full scale.
        """
        self._check_n(n)
        with self._lock:
            dt = self.scenario.instrument.sample_interval_s
            t0 = self._now_s()
            self._advance(t0)
            on_sun = self._locked
            sensor_lock = on_sun and self._sun_visible(t0)
            offset = math.hypot(self._off_az, self._off_el) if on_sun else math.inf
            in_view = field_of_view_fraction(offset, self.scenario.instrument.field_of_view_deg)
            # The n sample times plus the burst's mean time, in one pass.
            times = t0 + dt * np.arange(n + 1, dtype=float)
            times[n] = t0 + dt * (n - 1) / 2.0
            parts = self._sky_signal(times)
            sun_v = parts["sun_v"] * in_view
            clean = (sun_v[:n] if on_sun else np.zeros_like(sun_v[:n])) + \
                self._dark_signal_v(parts["detector_c"][:n])
            samples, saturated = self._noisy(clean)
            duration_s = dt * (n - 1)
            self._record_burst(t0, n, duration_s, sensor_lock, on_sun, in_view, offset,
                               parts, sun_v[:n].mean(axis=0) if on_sun else None, saturated)
            return samples, duration_s, saturated

    def dark(self, n: int) -> tuple[list[list[float]], float, list[bool]]:
        """``n`` samples on every channel with the shutter closed (same shape as burst)."""
        self._check_n(n)
        with self._lock:
            dt = self.scenario.instrument.sample_interval_s
            times = self._now_s() + dt * np.arange(n, dtype=float)
            clean = self._dark_signal_v(self.conditions.detector_c(times))
            samples, saturated = self._noisy(clean)
            return samples, dt * (n - 1), saturated

    def _record_burst(self, t0: float, n: int, duration_s: float, locked: bool, on_sun: bool,
                      in_view: float, offset_deg: float, parts: dict,
                      mean_sun_v: np.ndarray | None, saturated: list[bool]) -> None:
        mid = n  # index of the burst's mean time in the arrays of parts
        m = float(parts["m_ky"][mid])
        esf = parts["esf"]
        tau_cloud = float(parts["tau_cloud"][mid])
        channels = {}
        for c, name in enumerate(self._names):
            if self._broadband[c]:
                ratio = parts["sun_v"][mid, c] / (self._v0_1au_v[c] * esf
                                                  * parts["responsivity"][mid, c])
                tau_eff = -math.log(ratio) / m if ratio > 0 and math.isfinite(m) else math.nan
                channels[name] = {
                    "tau_total": _json_float(tau_eff),
                    "tau_rayleigh": None, "tau_ozone": None, "tau_aerosol": None,
                    "tau_water_vapour": None, "tau_cloud": tau_cloud,
                    "signal_v": None if mean_sun_v is None else float(mean_sun_v[c]),
                    "saturated": saturated[c],
                }
                continue
            tau_r = float(parts["tau_r"][mid, c])
            tau_o = float(parts["tau_o"][mid, c])
            tau_a = float(parts["tau_a"][mid, c])
            t_wv = float(parts["t_wv"][mid, c])
            tau_wv = -math.log(t_wv) / m if t_wv < 1.0 and math.isfinite(m) else 0.0
            ratio = parts["sun_v"][mid, c] / (self._v0_1au_v[c] * esf
                                              * parts["responsivity"][mid, c])
            channels[name] = {
                "tau_total": tau_r + tau_o + tau_a + tau_wv + tau_cloud,
                # what a straight Langley on the Kasten-Young air mass sees
                "tau_effective": _json_float(-math.log(ratio) / m) if ratio > 0 and
                math.isfinite(m) else None,
                "tau_rayleigh": tau_r,
                "tau_ozone": tau_o,
                "tau_aerosol": tau_a,
                "tau_water_vapour": tau_wv,
                "tau_cloud": tau_cloud,
                "signal_v": None if mean_sun_v is None else float(mean_sun_v[c]),
                "saturated": saturated[c],
            }
        geo = parts["geo"]
        self._readings.append({
            "kind": "burst",
            "start_utc": _iso(t0),
            "mean_utc": _iso(t0 + duration_s / 2.0),
            "samples": n,
            "duration_s": duration_s,
            "locked": locked,
            "pointing_at_sun": on_sun,
            "pointing_offset_deg": _json_float(offset_deg),
            "field_of_view_fraction": in_view,
            "apparent_zenith_deg": _json_float(geo.apparent_zenith_deg[mid]),
            "solar_azimuth_deg": _json_float(geo.azimuth_deg[mid]),
            "airmass_rayleigh": _json_float(m),
            "airmass_aerosol": _json_float(parts["m_a"][mid]),
            "airmass_ozone": _json_float(parts["m_o3"][mid]),
            "earth_sun_factor": esf,
            "pressure_hpa": float(parts["pressure"][mid]),
            "aerosol_tau_500": float(parts["tau_500"][mid]),
            "cloud_optical_depth": tau_cloud,
            "precipitable_water_cm": self.scenario.atmosphere.precipitable_water_cm,
            "detector_temp_c": float(parts["detector_c"][mid]),
            "channels": channels,
        })

    def housekeeping(self) -> dict:
        """Temperatures [degrees C], supply [V], humidity [%] and pressure [hPa] now.

        Ambient air follows a cosine diurnal cycle about the site temperature, warmest
        at 15 h local solar time; the case warms in the sun; the detector block is
        thermostatted (leaking a little of the case's swing) or rides the case. The
        barometer reads the station pressure with its tide.
        """
        with self._lock:
            t = self._now_s()
            cond = self.conditions
            jitter = self._rng_housekeeping.standard_normal(5).tolist()
            humidity = float(cond.humidity_pct(t))
            return {
                "detector_temp_c": round(float(cond.detector_c(t)) + 0.01 * jitter[0], 3),
                "case_temp_c": round(float(cond.case_c(t)) + 0.05 * jitter[1], 2),
                "ambient_temp_c": round(float(cond.ambient_c(t)) + 0.1 * jitter[2], 2),
                "supply_v": round(self.scenario.weather.supply_v + 0.02 * jitter[3], 3),
                "humidity_pct": round(min(100.0, max(0.0, humidity + 0.5 * jitter[4])), 1),
                "pressure_hpa": round(float(cond.pressure_hpa(t)), 2),
            }

    def reset_radiometer(self) -> None:
        """Reboot the radiometer: it keeps the shared clock and its calibration."""
        with self._lock:
            self._radiometer_resets += 1

    def reset_tracker(self) -> None:
        """Reboot the tracker: it stops where it is, forgets the follow and the lock."""
        with self._lock:
            t = self._now_s()
            self._advance(t)
            self._az, self._el = self._pointing(t)
            self._slew = None
            self._after_stall = None
            self._follow = False
            self._locked = False
            if not self._stalled:
                self._mode = "idle"
            self._tracker_resets += 1

    # ---------------------------------------------------------------- tracker

    def _sun_table(self, hour: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """NREL SPA once a minute through one UTC hour (azimuth unwrapped)."""
        table = self._sun_tables.get(hour)
        if table is None:
            if len(self._sun_tables) > 48:
                self._sun_tables.clear()
            site = self.scenario.site
            times = hour * 3600.0 + 60.0 * np.arange(SUN_TABLE_STEPS + 1, dtype=float)
            geo = sky.solar_position(times, site.latitude_deg, site.longitude_deg,
                                     site.elevation_m, site.pressure_hpa, site.temperature_c)
            table = (times, np.unwrap(geo.azimuth_deg, period=360.0),
                     geo.apparent_elevation_deg)
            self._sun_tables[hour] = table
        return table

    def _sun(self, t: float) -> tuple[float, float]:
        """True sun (azimuth, apparent elevation) [degrees] at instrument time ``t``.

        The tracker looks at the sun far more often than the radiometer reads it, so it
        interpolates a once-a-minute SPA table: the sun's path bends so little in a
        minute that the error stays below 1e-3 degrees (a twentieth of the lock jitter)
        while the sun is up; below the horizon, where refraction jumps, it is coarser,
        and no lock is possible there anyway.
        The radiometer's own geometry is computed exactly for every sample.
        """
        if self._sun_cache is not None and self._sun_cache[0] == t:
            return self._sun_cache[1], self._sun_cache[2]
        times, az, el = self._sun_table(int(t // 3600.0))
        sun_az = float(np.interp(t, times, az)) % 360.0
        sun_el = float(np.interp(t, times, el))
        self._sun_cache = (t, sun_az, sun_el)
        return sun_az, sun_el

    def _pointing(self, t: float) -> tuple[float, float]:
        """Where the tracker points at ``t`` (state already advanced to ``t``)."""
        if self._slew is not None:
            az0, el0, daz, d_el, t_start, _, _ = self._slew
            step = self.scenario.tracker.slew_rate_deg_s * max(0.0, t - t_start)
            az = az0 + math.copysign(min(abs(daz), step), daz)
            el = el0 + math.copysign(min(abs(d_el), step), d_el)
            return az % 360.0, el
        if self._locked:
            sun_az, sun_el = self._sun(t)
            cos_el = max(math.cos(math.radians(sun_el)), 1e-3)
            return (sun_az + self._off_az / cos_el) % 360.0, sun_el + self._off_el
        return self._az, self._el

    def _sun_visible(self, t: float) -> bool:
        """Whether the sun sensor sees enough direct beam through the cloud at ``t``."""
        if not self.scenario.atmosphere.clouds:
            return True
        tau_cloud = float(self.conditions.cloud_optical_depth(t))
        if tau_cloud <= 0.0:
            return True
        _, sun_el = self._sun(t)
        zenith = 90.0 - sun_el
        m = float(sky.relative_airmass_kasten_young(min(zenith, 90.0)))
        return math.exp(-tau_cloud * m) >= self.scenario.tracker.min_direct_fraction_for_lock

    def _try_capture(self, t: float) -> None:
        sun_az, sun_el = self._sun(t)
        if sun_el < MIN_LOCK_SUN_ELEVATION_DEG or not self._sun_visible(t):
            return
        if angular_separation_deg(self._az, self._el, sun_az, sun_el) <= \
                self.scenario.tracker.capture_range_deg:
            self._locked = True
            self._draw_pointing_error(t)

    def _rms_pointing_error_deg(self, t: float) -> float:
        trk = self.scenario.tracker
        if not trk.wind_pointing_error_deg_per_m_s:
            return trk.lock_pointing_error_deg
        wind = float(self.conditions.wind_m_s(t))
        return trk.lock_pointing_error_deg + trk.wind_pointing_error_deg_per_m_s * wind

    def _draw_pointing_error(self, t: float) -> None:
        # Two axes each with sd err/sqrt(2) give an rms total error of err.
        sd = self._rms_pointing_error_deg(t) / math.sqrt(2.0)
        self._off_az, self._off_el = (float(x) for x in sd * self._rng_tracker.standard_normal(2))

    # -- tracker stalls: windows of instrument time in which the mount cannot move

    def _in_stall(self, t: float) -> bool:
        lon = self.scenario.site.longitude_deg
        h = solar_hour(t, lon)
        return any(0.0 <= ((h - e.at_solar_h) % 24.0) * 3600.0 < e.duration_s
                   for e in self._stall_events)

    def _next_stall_boundary(self, t_from: float, t_to: float) -> float | None:
        """The first start or end of a stall in ``(t_from, t_to]``, if any."""
        if not self._stall_events or t_to <= t_from:
            return None
        lon = self.scenario.site.longitude_deg
        best = None
        for e in self._stall_events:
            # Seconds from t_from to the next start of this event (daily in solar time).
            to_start = ((e.at_solar_h - solar_hour(t_from, lon)) % 24.0) * 3600.0
            for start in (t_from + to_start - 86400.0, t_from + to_start):
                for b in (start, start + e.duration_s):
                    if t_from < b <= t_to and (best is None or b < best):
                        best = b
        return best

    def _set_stall(self, t: float, stalled: bool) -> None:
        if stalled == self._stalled:
            return
        if stalled:
            az, el = self._pointing(t)
            if self._slew is not None:
                az0, el0, daz, d_el, _, _, dest_mode = self._slew
                self._after_stall = ((az0 + daz) % 360.0, el0 + d_el, dest_mode)
                self._slew = None
            self._az, self._el = az, el
            self._locked = False
            self._mode = "fault"
            self._stalled = True
            return
        self._stalled = False
        self._t_state = t
        if self._after_stall is not None:
            to_az, to_el, dest_mode = self._after_stall
            self._after_stall = None
            self._start_slew(self._az, self._el, to_az, to_el, t, dest_mode)
        else:
            self._mode = "tracking" if self._follow else "idle"
            if self._follow:
                self._try_capture(t)

    def _advance(self, t: float) -> None:
        """Bring the tracker's state up to instrument time ``t``."""
        t = max(t, self._t_state)
        while True:
            boundary = self._next_stall_boundary(self._t_state, t)
            if boundary is None:
                break
            self._advance_motion(boundary)
            # Just past the boundary, so rounding of the solar hour cannot misplace it.
            self._set_stall(boundary, self._in_stall(boundary + 1e-3))
        self._advance_motion(t)

    def _advance_motion(self, t: float) -> None:
        t = max(t, self._t_state)
        if self._stalled:
            self._t_state = t
            return
        if self._slew is not None:
            az0, el0, daz, d_el, t_start, duration, dest_mode = self._slew
            t_arrive = t_start + duration
            if t < t_arrive:
                self._t_state = t
                return
            self._slew = None
            self._az, self._el = (az0 + daz) % 360.0, el0 + d_el
            self._mode = dest_mode
            if dest_mode != "parked" and self._follow:
                self._mode = "tracking"
                self._try_capture(t_arrive)
        if self._mode == "tracking":
            if self._locked:
                _, sun_el = self._sun(t)
                if sun_el < MIN_LOCK_SUN_ELEVATION_DEG:
                    # Followed the sun down to the horizon, then lost it and stopped.
                    self._az, self._el = self._pointing(t)
                    self._locked = False
            else:
                self._try_capture(t)
        self._t_state = t

    def _rebase_slew(self, old: float, new: float) -> None:
        if self._slew is None:
            return
        az, el = self._pointing(old)
        _, _, _, _, _, _, dest_mode = self._slew
        dest_az = (self._slew[0] + self._slew[2]) % 360.0
        dest_el = self._slew[1] + self._slew[3]
        self._start_slew(az, el, dest_az, dest_el, new, dest_mode)

    def _start_slew(self, az: float, el: float, to_az: float, to_el: float, t: float,
                    dest_mode: str) -> None:
        daz = _short_azimuth_delta_deg(az, to_az)
        d_el = to_el - el
        duration = max(abs(daz), abs(d_el)) / self.scenario.tracker.slew_rate_deg_s
        self._locked = False
        self._mode = "slewing"
        self._slew = (az, el, daz, d_el, t, duration, dest_mode)
        self._t_state = t

    def goto(self, azimuth_deg: float, elevation_deg: float) -> None:
        """Start a slew to (azimuth from north, elevation) [degrees]; returns at once."""
        for name, value in (("azimuth_deg", azimuth_deg), ("elevation_deg", elevation_deg)):
            if isinstance(value, bool) or not isinstance(value, int | float) or not \
                    math.isfinite(value):
                raise ValueError(f"{name} must be a finite number of degrees, got {value!r}")
        if not MIN_TRACKER_ELEVATION_DEG <= elevation_deg <= 90.0:
            raise ValueError(f"elevation_deg must lie in [{MIN_TRACKER_ELEVATION_DEG:g}, 90] "
                             f"degrees, got {elevation_deg!r}")
        with self._lock:
            t = self._now_s()
            self._advance(t)
            if self._stalled:
                self._after_stall = (float(azimuth_deg) % 360.0, float(elevation_deg), "idle")
                return
            az, el = self._pointing(t)
            self._start_slew(az, el, float(azimuth_deg) % 360.0, float(elevation_deg), t, "idle")
            self._advance(t)  # a zero-length slew arrives at once

    def follow_sun(self, on: bool) -> None:
        """Switch closed-loop sun following on or off."""
        with self._lock:
            t = self._now_s()
            self._advance(t)
            if self._stalled:
                self._follow = bool(on)
                return
            if on:
                self._follow = True
                if self._slew is None:
                    self._mode = "tracking"
                    if not self._locked:
                        self._try_capture(t)
            else:
                self._az, self._el = self._pointing(t)
                self._follow = False
                self._locked = False
                if self._mode == "tracking":
                    self._mode = "idle"

    def park(self) -> None:
        """Stop following and slew to the park position."""
        with self._lock:
            t = self._now_s()
            self._advance(t)
            az, el = self._pointing(t)
            self._follow = False
            trk = self.scenario.tracker
            if self._stalled:
                self._after_stall = (trk.park_azimuth_deg % 360.0, trk.park_elevation_deg,
                                     "parked")
                return
            self._start_slew(az, el, trk.park_azimuth_deg % 360.0, trk.park_elevation_deg, t,
                             "parked")
            self._advance(t)

    def tracker_state(self) -> dict:
        """Mode, pointing [degrees], lock and pointing error [degrees] now."""
        with self._lock:
            t = self._now_s()
            self._advance(t)
            if self._locked:
                self._draw_pointing_error(t)
            az, el = self._pointing(t)
            locked = self._locked and self._sun_visible(t)
            error = 0.0
            if locked:
                sun_az, sun_el = self._sun(t)
                error = angular_separation_deg(az, el, sun_az, sun_el)
            return {"mode": self._mode, "azimuth_deg": az, "elevation_deg": el,
                    "locked": locked, "error_deg": error}

    # ------------------------------------------------------------------ truth

    def truth(self) -> dict:
        """What the simulator really did, as JSON-able data (for tests and the demo)."""
        with self._lock:
            site, atm = self.scenario.site, self.scenario.atmosphere
            return {
                "scenario": self.scenario.name,
                "site": {"name": site.name, "latitude_deg": site.latitude_deg,
                         "longitude_deg": site.longitude_deg, "elevation_m": site.elevation_m,
                         "pressure_hpa": site.pressure_hpa,
                         "temperature_c": site.temperature_c},
                "atmosphere": {"sky": atm.sky, "ozone_du": atm.ozone_du,
                               "aerosol_scale_height_km": atm.aerosol_scale_height_km,
                               "water_vapour_scale_height_km":
                                   atm.water_vapour_scale_height_km,
                               "aerosol_tau_500": atm.aerosol_tau_500,
                               "angstrom_alpha": atm.angstrom_alpha,
                               "precipitable_water_cm": atm.precipitable_water_cm},
                "channels": {c.name: _channel_truth(c, self._independent)
                             for c in self.scenario.instrument.channels},
                "radiometer_resets": self._radiometer_resets,
                "tracker_resets": self._tracker_resets,
                "readings": [dict(r, channels={k: dict(v) for k, v in r["channels"].items()})
                             for r in self._readings],
            }
