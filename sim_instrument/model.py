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
    station.truth() -> dict          # {"channels": {name: {"wavelength_nm", "v0_1au"}},
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
sample_interval_s``). Each sample is the direct-sun signal of :mod:`sky` at its own
time, but only while the tracker is locked on the sun at the burst's start (else the
optics see sky-free darkness: a "lost lock" reading), plus the channel's dark signal,
plus Gaussian noise of standard deviation ``sqrt((relative * V)^2 + read_v^2)``,
clipped to ``[0, full_scale_v]``; a channel is flagged saturated when any of its
samples reaches full scale. ``dark(n)`` is the same with the shutter closed.

Tracker. Starts parked. ``goto`` slews both axes at once at ``slew_rate_deg_s``
(azimuth the short way round); the mode is ``slewing`` until arrival, then ``idle``.
With ``follow_sun(True)`` the sun sensor captures the sun whenever the tracker is
at rest within ``capture_range_deg`` of the true sun (checked on arrival, when the
follow is switched on, and at every later look while it is on); it is then
``tracking``, ``locked``, pointing at the sun with an rms error of
``lock_pointing_error_deg``, and it follows the sun until the sun drops below the
horizon. With the follow on but no capture, the mode is ``tracking`` with
``locked`` false. ``goto`` keeps the follow setting (so "goto the sun, then follow"
and "follow, then goto the sun" both end locked). ``park`` switches the follow off
and slews to the park position; the mode is ``parked`` on arrival.

Randomness. Three generators spawned from ``numpy.random.SeedSequence(seed)``: the
radiometer's noise, the tracker's pointing jitter and the housekeeping noise, so
polling the tracker does not change the radiometer's noise. The whole station is
deterministic for a given seed, scenario and sequence of calls and clock settings
(with ``speed=0``, or with a deterministic ``monotonic``).

Truth. Every burst appends an entry to ``truth()["readings"]`` with the burst's
times, the lock state, the true optical depths per channel (total and Rayleigh,
ozone, aerosol), the air masses and the Earth-Sun factor at the burst's mean time,
and the noise-free mean direct-sun signal per channel.
"""

from __future__ import annotations

import math
import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime

import numpy as np

from sim_instrument import sky
from sim_instrument.scenario import Scenario

MAX_SAMPLES = 10_000  # per burst or dark read
MIN_TRACKER_ELEVATION_DEG = -5.0
MIN_LOCK_SUN_ELEVATION_DEG = 0.0  # the sun sensor loses the sun at the horizon

DETECTOR_SETPOINT_C = 25.0  # thermostatted detector block
AMBIENT_DIURNAL_HALF_RANGE_K = 5.0  # dry high site (common practice, no source)
WARMEST_LOCAL_SOLAR_HOUR = 15.0
SUPPLY_V = 12.6


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

        rad_seq, trk_seq, hk_seq = np.random.SeedSequence(seed).spawn(3)
        self._rng_radiometer = np.random.default_rng(rad_seq)
        self._rng_tracker = np.random.default_rng(trk_seq)
        self._rng_housekeeping = np.random.default_rng(hk_seq)

        site, atm, inst = scenario.site, scenario.atmosphere, scenario.instrument
        self._names = [c.name for c in inst.channels]
        self._wavelength_nm = np.array([c.wavelength_nm for c in inst.channels])
        self._v0_1au_v = np.array([c.v0_1au_v for c in inst.channels])
        self._dark_v = np.array([c.dark_v for c in inst.channels])
        # The atmosphere of a scenario is constant, so its optical depths are too.
        self._tau_rayleigh = np.asarray(
            sky.rayleigh_optical_depth(self._wavelength_nm, site.pressure_hpa), dtype=float)
        self._tau_ozone = np.array([sky.ozone_optical_depth(w, atm.ozone_du)
                                    for w in self._wavelength_nm])
        self._tau_aerosol = np.asarray(
            sky.aerosol_optical_depth(self._wavelength_nm, atm.aerosol_tau_500,
                                      atm.angstrom_alpha), dtype=float)
        self._station_height_km = site.elevation_m / 1000.0

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
        sigma = np.sqrt((noise.relative * clean_v) ** 2 + noise.read_v ** 2)
        raw = clean_v + sigma * self._rng_radiometer.standard_normal(clean_v.shape)
        saturated = (raw >= full_scale).any(axis=0)
        samples = np.clip(raw, 0.0, full_scale)
        return samples.tolist(), [bool(s) for s in saturated]

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
            locked = self._locked
            site = self.scenario.site
            # One pvlib call for the n sample times plus the burst's mean time.
            times = t0 + dt * np.arange(n + 1, dtype=float)
            times[n] = t0 + dt * (n - 1) / 2.0
            index = sky.to_datetime_index(times)
            geo = sky.solar_position(index, site.latitude_deg, site.longitude_deg,
                                     site.elevation_m, site.pressure_hpa, site.temperature_c)
            m_ky = np.asarray(sky.relative_airmass_kasten_young(geo.apparent_zenith_deg))
            m_o3 = np.asarray(sky.ozone_airmass(geo.apparent_zenith_deg,
                                                self._station_height_km))
            esf = float(sky.earth_sun_factor(index[n:])[0])  # varies 1e-8 within a burst
            sun_v = sky.direct_sun_signal_v(
                self._v0_1au_v, esf,
                (self._tau_rayleigh, self._tau_ozone, self._tau_aerosol),
                (m_ky[:, None], m_o3[:, None], m_ky[:, None]))
            sun_v = np.nan_to_num(sun_v, nan=0.0)  # sun below the horizon
            clean = (sun_v[:n] if locked else np.zeros_like(sun_v[:n])) + self._dark_v
            samples, saturated = self._noisy(clean)
            duration_s = dt * (n - 1)
            self._record_burst(t0, n, duration_s, locked, geo, m_ky[n], m_o3[n], esf,
                               sun_v[:n].mean(axis=0) if locked else None, saturated)
            return samples, duration_s, saturated

    def dark(self, n: int) -> tuple[list[list[float]], float, list[bool]]:
        """``n`` samples on every channel with the shutter closed (same shape as burst)."""
        self._check_n(n)
        with self._lock:
            clean = np.tile(self._dark_v, (n, 1))
            samples, saturated = self._noisy(clean)
            return samples, self.scenario.instrument.sample_interval_s * (n - 1), saturated

    def _record_burst(self, t0: float, n: int, duration_s: float, locked: bool,
                      geo: sky.SolarGeometry, m_ky: float, m_o3: float, esf: float,
                      mean_sun_v: np.ndarray | None, saturated: list[bool]) -> None:
        channels = {}
        for c, name in enumerate(self._names):
            tau_r = float(self._tau_rayleigh[c])
            tau_o = float(self._tau_ozone[c])
            tau_a = float(self._tau_aerosol[c])
            channels[name] = {
                "tau_total": tau_r + tau_o + tau_a,
                "tau_rayleigh": tau_r,
                "tau_ozone": tau_o,
                "tau_aerosol": tau_a,
                "signal_v": None if mean_sun_v is None else float(mean_sun_v[c]),
                "saturated": saturated[c],
            }
        self._readings.append({
            "kind": "burst",
            "start_utc": _iso(t0),
            "mean_utc": _iso(t0 + duration_s / 2.0),
            "samples": n,
            "duration_s": duration_s,
            "locked": locked,
            "apparent_zenith_deg": _json_float(geo.apparent_zenith_deg[n]),
            "solar_azimuth_deg": _json_float(geo.azimuth_deg[n]),
            "airmass_rayleigh": _json_float(m_ky),
            "airmass_aerosol": _json_float(m_ky),
            "airmass_ozone": _json_float(m_o3),
            "earth_sun_factor": esf,
            "channels": channels,
        })

    def housekeeping(self) -> dict:
        """Temperatures [degrees C], supply [V], humidity [%] and pressure [hPa] now.

        Ambient air follows a cosine diurnal cycle about the site temperature,
        warmest at 15 h local solar time; the case warms in the sun; the detector
        block is thermostatted and leaks a little of the case's swing.
        """
        with self._lock:
            t = self._now_s()
            site = self.scenario.site
            utc_hours = (t % 86400.0) / 3600.0
            solar_hour = (utc_hours + site.longitude_deg / 15.0) % 24.0
            phase = 2.0 * math.pi * (solar_hour - WARMEST_LOCAL_SOLAR_HOUR) / 24.0
            ambient = site.temperature_c + AMBIENT_DIURNAL_HALF_RANGE_K * math.cos(phase)
            daylight = max(0.0, math.cos(2.0 * math.pi * (solar_hour - 12.0) / 24.0))
            case = ambient + 2.0 + 6.0 * daylight
            detector = DETECTOR_SETPOINT_C + 0.02 * (case - DETECTOR_SETPOINT_C)
            humidity = min(100.0, max(3.0, 35.0 - 20.0 * math.cos(phase)))
            jitter = self._rng_housekeeping.standard_normal(5).tolist()
            return {
                "detector_temp_c": round(detector + 0.01 * jitter[0], 3),
                "case_temp_c": round(case + 0.05 * jitter[1], 2),
                "ambient_temp_c": round(ambient + 0.1 * jitter[2], 2),
                "supply_v": round(SUPPLY_V + 0.02 * jitter[3], 3),
                "humidity_pct": round(min(100.0, max(0.0, humidity + 0.5 * jitter[4])), 1),
                # The sky's pressure is constant in a scenario; the barometer reads it.
                "pressure_hpa": site.pressure_hpa,
            }

    def reset_radiometer(self) -> None:
        """Reboot the radiometer: it keeps the shared clock and its calibration."""
        with self._lock:
            self._radiometer_resets += 1

    # ---------------------------------------------------------------- tracker

    def _sun(self, t: float) -> tuple[float, float]:
        """True sun (azimuth, apparent elevation) [degrees] at instrument time ``t``."""
        if self._sun_cache is not None and self._sun_cache[0] == t:
            return self._sun_cache[1], self._sun_cache[2]
        site = self.scenario.site
        geo = sky.solar_position(np.array([t]), site.latitude_deg, site.longitude_deg,
                                 site.elevation_m, site.pressure_hpa, site.temperature_c)
        az, el = float(geo.azimuth_deg[0]), float(geo.apparent_elevation_deg[0])
        self._sun_cache = (t, az, el)
        return az, el

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

    def _try_capture(self, t: float) -> None:
        sun_az, sun_el = self._sun(t)
        if sun_el < MIN_LOCK_SUN_ELEVATION_DEG:
            return
        if angular_separation_deg(self._az, self._el, sun_az, sun_el) <= \
                self.scenario.tracker.capture_range_deg:
            self._locked = True
            self._draw_pointing_error()

    def _draw_pointing_error(self) -> None:
        # Two axes each with sd err/sqrt(2) give an rms total error of err.
        sd = self.scenario.tracker.lock_pointing_error_deg / math.sqrt(2.0)
        self._off_az, self._off_el = (float(x) for x in sd * self._rng_tracker.standard_normal(2))

    def _advance(self, t: float) -> None:
        """Bring the tracker's state up to instrument time ``t``."""
        t = max(t, self._t_state)
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
            az, el = self._pointing(t)
            self._start_slew(az, el, float(azimuth_deg) % 360.0, float(elevation_deg), t, "idle")
            self._advance(t)  # a zero-length slew arrives at once

    def follow_sun(self, on: bool) -> None:
        """Switch closed-loop sun following on or off."""
        with self._lock:
            t = self._now_s()
            self._advance(t)
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
            self._start_slew(az, el, trk.park_azimuth_deg % 360.0, trk.park_elevation_deg, t,
                             "parked")
            self._advance(t)

    def tracker_state(self) -> dict:
        """Mode, pointing [degrees], lock and pointing error [degrees] now."""
        with self._lock:
            t = self._now_s()
            self._advance(t)
            if self._locked:
                self._draw_pointing_error()
            az, el = self._pointing(t)
            error = 0.0
            if self._locked:
                sun_az, sun_el = self._sun(t)
                error = angular_separation_deg(az, el, sun_az, sun_el)
            return {"mode": self._mode, "azimuth_deg": az, "elevation_deg": el,
                    "locked": self._locked, "error_deg": error}

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
                "atmosphere": {"ozone_du": atm.ozone_du,
                               "aerosol_tau_500": atm.aerosol_tau_500,
                               "angstrom_alpha": atm.angstrom_alpha},
                "channels": {c.name: {"wavelength_nm": c.wavelength_nm, "v0_1au": c.v0_1au_v,
                                      "dark_v": c.dark_v}
                             for c in self.scenario.instrument.channels},
                "radiometer_resets": self._radiometer_resets,
                "readings": [dict(r, channels={k: dict(v) for k, v in r["channels"].items()})
                             for r in self._readings],
            }
