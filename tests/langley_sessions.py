"""Simulated Langley sessions at Pico Sereno for the fit tests and the fit benchmark.

The signals come from the simulator's own physics (:mod:`sim_instrument.sky`:
Bodhaine Rayleigh at the pressure of the moment, Komhyr ozone air mass with the
day's true ozone column, Angstrom aerosol, Kasten-Young air mass, SPA geometry and
Earth-Sun distance) at the times the daemon's planner chooses, with the simulator's
detector noise; the geometry stored with each measurement is the daemon's own
(:mod:`daemon.science.solar`), as in the field. On top of the simulator's constant sky, a
"realistic" clear day has what a real one has: the aerosol wanders (a first-order
autoregressive series), the ozone column is not the nominal one, and the pressure
drifts with the weather and the daily tide.

Scenarios (invented demo data, nothing measured):

- ``clear``: aerosol 0.01-0.04 at 500 nm wandering with sd 0.0003 and a 30 min
  correlation time, ozone 260 +/- 8 DU, pressure 645 +/- 2 hPa.
- ``cirrus``: the clear day plus one to three thin cirrus bands per half-day, each a
  smooth bump of spectrally neutral optical depth 0.02-0.15 lasting 20-80 minutes,
  with fast flicker inside a burst (sd 20 % of the cirrus optical depth).
- ``hazy``: a hazier day (0.06-0.12) whose aerosol drifts by 0.01-0.05 at 500 nm
  through each half-day (haze building up or clearing).

Tests and benchmarks may import ``sim_instrument``; the daemon never does.
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, replace
from functools import lru_cache
from pathlib import Path

import numpy as np

from daemon.config.settings import Config, load_config
from daemon.science import solar
from daemon.station.planner import plan_day
from daemon.store.writer import MeasurementRecord
from drivers.interfaces import Housekeeping
from sim_instrument import sky
from sim_instrument.scenario import load_scenario

CONFIG_PATH = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"
SCENARIOS = ("clear", "cirrus", "hazy")
BURST_SAMPLES = 10
DARK_SAMPLES = 5
SAMPLE_INTERVAL_S = 0.2
LOCK_DELAY_S = 4.0  # slew, lock and clock sync before the burst starts
# Aerosol wander of a good, stable clear day: sd at 500 nm and correlation time [s].
WANDER_SD_500 = 0.0003
WANDER_TIME_S = 1800.0


@lru_cache(maxsize=1)
def pico_config() -> Config:
    # The sessions here follow the fitter's own monochromatic model (the simulator's
    # reference sky), so the corrections for a real sky's band and layers stay off.
    config = load_config(CONFIG_PATH)
    return replace(config, fit=replace(config.fit, correct_model_terms=False))


@lru_cache(maxsize=1)
def _scenario():
    return load_scenario("pico-sereno-clear")


@lru_cache(maxsize=64)
def _plan(day: dt.date):
    return plan_day(pico_config(), day)


@dataclass
class Session:
    """One simulated half-day: what the daemon stores, plus the truth."""

    date: str
    session: str
    scenario: str
    times: list[dt.datetime]  # burst mean times, UTC
    airmass: np.ndarray  # daemon geometry (Kasten-Young, apparent zenith)
    ozone_airmass: np.ndarray
    apparent_zenith_deg: np.ndarray
    azimuth_deg: np.ndarray
    earth_sun_factor: np.ndarray
    pressure_hpa: np.ndarray  # what the barometer reads
    sun: np.ndarray  # (points, samples, channels) raw sun samples [V]
    dark: np.ndarray  # (points, dark samples, channels) [V]
    channels: tuple[str, ...]
    v0_1au_true: dict[str, float]
    ozone_du_true: float
    aod_true: np.ndarray  # (points, channels) burst-mean aerosol plus cirrus optical depth

    def net_signal(self) -> np.ndarray:
        """Dark-subtracted burst means, (points, channels) [V]."""
        return self.sun.mean(axis=1) - self.dark.mean(axis=1)

    def burst_cv(self) -> np.ndarray:
        return self.sun.std(axis=1, ddof=1) / self.net_signal()

    def records(self) -> list[MeasurementRecord]:
        recs = []
        for i, t in enumerate(self.times):
            recs.append(MeasurementRecord(
                time_utc=t, plan_date=self.date, session=self.session,
                target_airmass=float(self.airmass[i]), status="ok", failure=None,
                apparent_zenith_deg=float(self.apparent_zenith_deg[i]),
                azimuth_deg=float(self.azimuth_deg[i]), airmass=float(self.airmass[i]),
                ozone_airmass=float(self.ozone_airmass[i]),
                earth_sun_factor=float(self.earth_sun_factor[i]),
                pressure_hpa=float(self.pressure_hpa[i]), pointing_error_deg=0.02,
                locked=True, duration_s=SAMPLE_INTERVAL_S * (BURST_SAMPLES - 1),
                channels=self.channels, sun=tuple(map(tuple, self.sun[i].tolist())),
                dark=tuple(map(tuple, self.dark[i].tolist())),
                saturated=(False,) * len(self.channels),
                housekeeping=Housekeeping(detector_temp_c=25.0, case_temp_c=15.0,
                                          ambient_temp_c=5.0, supply_v=12.6,
                                          humidity_pct=20.0,
                                          pressure_hpa=float(self.pressure_hpa[i]))))
        return recs


def _ar1(rng: np.random.Generator, t_s: np.ndarray, sd: float, tau_s: float) -> np.ndarray:
    """Stationary first-order autoregressive series sampled at times ``t_s`` [s]."""
    out = np.empty(t_s.size)
    out[0] = sd * rng.standard_normal()
    for i in range(1, t_s.size):
        phi = math.exp(-(t_s[i] - t_s[i - 1]) / tau_s)
        out[i] = phi * out[i - 1] + sd * math.sqrt(1 - phi * phi) * rng.standard_normal()
    return out


def simulate_session(day: dt.date, session: str, scenario: str, seed: int, *,
                     wander_sd_500: float | None = None, noise: bool = True,
                     ozone_du: float | None = None, pressure_hpa: float | None = None
                     ) -> Session:
    """One half-day at Pico Sereno under ``scenario``, reproducible from ``seed``.

    ``wander_sd_500`` overrides the aerosol wander, ``noise=False`` leaves out the
    detector noise, ``ozone_du`` and ``pressure_hpa`` fix the day's true ozone column
    and a constant pressure.
    """
    wander = WANDER_SD_500 if wander_sd_500 is None else wander_sd_500
    noise_flag = noise
    if scenario not in SCENARIOS:
        raise ValueError(f"scenario must be one of {SCENARIOS}, got {scenario!r}")
    cfg = pico_config()
    scen = _scenario()
    rng = np.random.default_rng([seed, day.toordinal(), SCENARIOS.index(scenario),
                                 0 if session == "am" else 1])
    targets = [t for t in _plan(day).targets if t.session == session]
    starts = np.array([t.time_utc.timestamp() + LOCK_DELAY_S for t in targets])
    offsets = SAMPLE_INTERVAL_S * np.arange(BURST_SAMPLES)
    sample_t = (starts[:, None] + offsets[None, :]).ravel()
    mean_t = starts + offsets.mean()
    t0 = float(sample_t.min())
    rel_t = sample_t - t0

    site = scen.site
    pressure_day = 645.0 + 2.0 * rng.standard_normal()
    tide = 0.6 * np.sin(2 * np.pi * (sample_t / 86400.0) * 2.0 + rng.uniform(0, 2 * np.pi))
    pressure = pressure_day + tide + np.linspace(0, rng.normal(0, 0.8), sample_t.size)
    if pressure_hpa is not None:
        pressure = np.full(sample_t.size, float(pressure_hpa))
    day_ozone = 260.0 + 8.0 * rng.standard_normal()
    ozone_du = day_ozone if ozone_du is None else float(ozone_du)
    alpha = rng.uniform(0.8, 1.6)
    if scenario == "hazy":
        base = rng.uniform(0.06, 0.12)
        drift = rng.uniform(0.01, 0.05) * rng.choice([-1.0, 1.0])
        tau500 = base + drift * rel_t / max(rel_t.max(), 1.0)
    else:
        tau500 = np.full(sample_t.size, rng.uniform(0.01, 0.04))
    tau500 = tau500 + _ar1(rng, rel_t, wander, WANDER_TIME_S)
    tau500 = np.maximum(tau500, 0.002)
    tau_cirrus = np.zeros(sample_t.size)
    if scenario == "cirrus":
        for _ in range(rng.integers(1, 4)):
            centre = rng.uniform(0, rel_t.max())
            width = rng.uniform(1200, 4800) / 2.0
            depth = rng.uniform(0.02, 0.15)
            tau_cirrus += depth * np.exp(-0.5 * ((rel_t - centre) / (width / 2.0)) ** 2)
        tau_cirrus *= 1.0 + 0.2 * rng.standard_normal(sample_t.size)
        tau_cirrus = np.maximum(tau_cirrus, 0.0)

    index = sky.to_datetime_index(sample_t)
    geo = sky.solar_position(index, site.latitude_deg, site.longitude_deg, site.elevation_m,
                             site.pressure_hpa, site.temperature_c)
    m_ky = np.asarray(sky.relative_airmass_kasten_young(geo.apparent_zenith_deg))
    m_o3 = np.asarray(sky.ozone_airmass(geo.apparent_zenith_deg, site.elevation_m / 1000.0))
    esf = sky.earth_sun_factor(index)
    channels = scen.instrument.channels
    wl = np.array([c.wavelength_nm for c in channels])
    v0 = np.array([c.v0_1au_v for c in channels])
    dark_v = np.array([c.dark_v for c in channels])
    tau_r = np.asarray(sky.rayleigh_optical_depth(wl[None, :], pressure[:, None]))
    tau_o3 = np.array([sky.ozone_optical_depth(w, ozone_du) for w in wl])
    tau_a = tau500[:, None] * (wl[None, :] / 500.0) ** (-alpha)
    slant = (tau_r + tau_a + tau_cirrus[:, None]) * m_ky[:, None] + tau_o3[None, :] * m_o3[:, None]
    clean = v0[None, :] * esf[:, None] * np.exp(-slant)
    noise = scen.instrument.noise
    noise_on = noise_flag
    n_pts = len(targets)

    def noisy(v: np.ndarray) -> np.ndarray:
        if not noise_on:
            return v
        sd = np.sqrt((noise.relative * v) ** 2 + noise.read_v ** 2)
        return v + sd * rng.standard_normal(v.shape)

    sun = noisy(clean + dark_v[None, :]).reshape(n_pts, BURST_SAMPLES, len(channels))
    dark = noisy(np.tile(dark_v, (n_pts * DARK_SAMPLES, 1))).reshape(
        n_pts, DARK_SAMPLES, len(channels))

    # What the daemon stores: its own geometry at the burst's mean time.
    times = [dt.datetime.fromtimestamp(float(t), dt.UTC) for t in mean_t]
    measured_p = pressure.reshape(n_pts, BURST_SAMPLES).mean(axis=1)
    if noise_flag:
        measured_p = measured_p.round(1)  # the barometer's resolution
    pos = solar.sun_position(times, cfg.site, float(measured_p.mean()))
    z = pos.apparent_zenith_deg
    return Session(
        date=day.isoformat(), session=session, scenario=scenario, times=times,
        airmass=np.asarray(solar.relative_airmass(z), dtype=float),
        ozone_airmass=np.asarray(solar.ozone_airmass(z, cfg.site.elevation_m), dtype=float),
        apparent_zenith_deg=np.asarray(z, dtype=float),
        azimuth_deg=np.asarray(pos.azimuth_deg, dtype=float),
        earth_sun_factor=np.asarray(solar.earth_sun_factor(times), dtype=float),
        pressure_hpa=measured_p, sun=sun, dark=dark,
        channels=tuple(c.name for c in channels),
        v0_1au_true={c.name: c.v0_1au_v for c in channels}, ozone_du_true=ozone_du,
        aod_true=(tau_a + tau_cirrus[:, None]).reshape(n_pts, BURST_SAMPLES,
                                                       len(channels)).mean(axis=1))


def days(n: int, first: dt.date = dt.date(2027, 2, 1)) -> list[dt.date]:
    return [first + dt.timedelta(days=i) for i in range(n)]


def with_fit(config: Config, **changes) -> Config:
    return replace(config, fit=replace(config.fit, **changes))
