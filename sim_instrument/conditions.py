"""The day's weather and sky as pure functions of instrument time.

Everything that changes through a scenario's day (aerosol drift and its short-term
variability, cloud passages, the pressure tide, ambient, case and detector
temperatures, humidity, wind) is a function of POSIX time [s] and of random numbers
drawn once, when the station is built. So a reading depends only on when it is
taken, never on how often the host asked before: reproducible for a seed, and the
samples of one burst see one continuous sky.
"""

from __future__ import annotations

import math

import numpy as np

from sim_instrument import sky
from sim_instrument.faults import solar_hour
from sim_instrument.scenario import Scenario

#: Warmest time of a clear day, local mean solar time [h] (common practice, no source).
WARMEST_SOLAR_H = 15.0
#: Electronics warm the case this much above ambient, day and night [K].
CASE_SELF_HEATING_K = 2.0
#: Clouds drift in and out over this long at the edges of their window [h].
CLOUD_EDGE_H = 5.0 / 60.0


class SmoothNoise:
    """A smooth random function of time with zero mean and unit variance.

    A sum of ``k`` cosines with random phases and periods scattered (log-normally)
    about ``period_s``: stationary, continuous, and cheap to evaluate at any time.
    """

    def __init__(self, rng: np.random.Generator, period_s: float, k: int = 12) -> None:
        self.freq_hz = np.exp(rng.normal(0.0, 0.5, k)) / period_s
        self.phase = rng.uniform(0.0, 2.0 * np.pi, k)
        self.scale = math.sqrt(2.0 / k)

    def __call__(self, epoch_s: np.ndarray | float) -> np.ndarray:
        t = np.asarray(epoch_s, dtype=float)[..., None]
        # Reduce the time first: 2 pi f t at t ~ 1.7e9 s would lose phase precision.
        cycles = np.mod(t * self.freq_hz, 1.0)
        return self.scale * np.cos(2.0 * np.pi * cycles + self.phase).sum(axis=-1)


class Conditions:
    """Weather, sky and instrument temperatures of one scenario through the day.

    Parameters
    ----------
    scenario : Scenario
    rng : numpy.random.Generator
        Used only here, only at construction.
    """

    def __init__(self, scenario: Scenario, rng: np.random.Generator) -> None:
        self.scenario = scenario
        atm = scenario.atmosphere
        self._aerosol_noise = SmoothNoise(rng, atm.aerosol_variability_period_s)
        self._gust_noise = SmoothNoise(rng, 60.0)
        self._cloud_noise = [SmoothNoise(rng, c.cell_s) for c in atm.clouds]
        # Drawn last, so scenarios without a wave keep their random streams.
        self._wave_phase = float(rng.uniform(0.0, 2.0 * np.pi)) if atm.aerosol_wave else 0.0

    def solar_h(self, epoch_s: np.ndarray | float) -> np.ndarray:
        """Local mean solar time [h]."""
        return solar_hour(np.asarray(epoch_s, dtype=float), self.scenario.site.longitude_deg)

    # ------------------------------------------------------------------ sky

    def tau_500(self, epoch_s: np.ndarray | float) -> np.ndarray:
        """Aerosol optical depth at 500 nm: drift within its window, then variability."""
        atm = self.scenario.atmosphere
        h = self.solar_h(epoch_s)
        hours = np.clip(h, atm.aerosol_drift_from_solar_h, atm.aerosol_drift_until_solar_h) \
            - atm.aerosol_drift_from_solar_h
        tau = atm.aerosol_tau_500 + atm.aerosol_drift_per_h * hours
        if atm.aerosol_wave:
            tau = tau * (1.0 + atm.aerosol_wave * np.sin(
                2.0 * np.pi * h / atm.aerosol_wave_period_h + self._wave_phase))
        if atm.aerosol_noon_peak:
            tau = tau + atm.aerosol_noon_peak * np.exp(
                -0.5 * ((h - 12.0) / atm.aerosol_noon_peak_width_h) ** 2)
        if atm.aerosol_variability:
            tau = tau * (1.0 + atm.aerosol_variability * self._aerosol_noise(epoch_s))
        return np.maximum(tau, 0.0)

    def cloud_optical_depth(self, epoch_s: np.ndarray | float) -> np.ndarray:
        """Grey vertical optical depth of every cloud over the sun, summed."""
        h = self.solar_h(epoch_s)
        total = np.zeros(np.shape(h))
        for cloud, noise in zip(self.scenario.atmosphere.clouds, self._cloud_noise,
                                strict=True):
            edge = np.clip((h - cloud.from_solar_h) / CLOUD_EDGE_H, 0.0, 1.0) * np.clip(
                (cloud.until_solar_h - h) / CLOUD_EDGE_H, 0.0, 1.0)
            if not np.any(edge):
                continue
            patches = np.maximum(1.0 + cloud.patchiness * noise(epoch_s), 0.0)
            total = total + cloud.optical_depth * edge * patches
        return total

    def pressure_hpa(self, epoch_s: np.ndarray | float) -> np.ndarray:
        """Station pressure with its semidiurnal tide and the day's trend [hPa]."""
        site, weather = self.scenario.site, self.scenario.weather
        h = self.solar_h(epoch_s)
        p = np.asarray(sky.semidiurnal_pressure_hpa(site.pressure_hpa, weather.pressure_tide_hpa,
                                                    h), dtype=float)
        if weather.pressure_trend_hpa_per_h:
            p = p + weather.pressure_trend_hpa_per_h * (h - 12.0)
        return p

    # ------------------------------------------------------------------ weather

    def _diurnal(self, epoch_s: np.ndarray | float) -> np.ndarray:
        """cos of the phase from the warmest hour: 1 at 15 h, -1 at 3 h."""
        return np.cos(2.0 * np.pi * (self.solar_h(epoch_s) - WARMEST_SOLAR_H) / 24.0)

    def ambient_c(self, epoch_s: np.ndarray | float) -> np.ndarray:
        w = self.scenario.weather
        return self.scenario.site.temperature_c + w.ambient_diurnal_range_k / 2.0 * \
            self._diurnal(epoch_s)

    def humidity_pct(self, epoch_s: np.ndarray | float) -> np.ndarray:
        w = self.scenario.weather
        rh = w.humidity_pct - w.humidity_diurnal_range_pct / 2.0 * self._diurnal(epoch_s)
        return np.clip(rh, 3.0, 100.0)

    def wind_m_s(self, epoch_s: np.ndarray | float) -> np.ndarray:
        w = self.scenario.weather
        wind = w.wind_m_s + w.wind_diurnal_range_m_s / 2.0 * self._diurnal(epoch_s)
        if w.wind_gust_sd_m_s:
            wind = wind + w.wind_gust_sd_m_s * self._gust_noise(epoch_s)
        return np.maximum(wind, 0.0)

    def case_c(self, epoch_s: np.ndarray | float) -> np.ndarray:
        """Instrument case: ambient, plus its electronics, plus the sun on it by day."""
        h = self.solar_h(epoch_s)
        daylight = np.maximum(0.0, np.cos(2.0 * np.pi * (h - 12.0) / 24.0))
        heating = self.scenario.instrument.thermal.case_sun_heating_k
        return self.ambient_c(epoch_s) + CASE_SELF_HEATING_K + heating * daylight

    def detector_c(self, epoch_s: np.ndarray | float) -> np.ndarray:
        """Detector block: thermostatted (leaking a little of the case) or riding the case."""
        th = self.scenario.instrument.thermal
        case = self.case_c(epoch_s)
        if th.detector_regulated:
            return th.detector_setpoint_c + th.regulation_leak * (case - th.detector_setpoint_c)
        return case + th.unregulated_offset_k
