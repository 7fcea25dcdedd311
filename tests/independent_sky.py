"""Half-days on the simulator's independent sky, as the daemon's fit receives them.

:func:`sim_instrument.sessions.session_series` makes the measurements (its own
physics); here they get the daemon's own geometry (:mod:`daemon.science.solar`: SPA,
Kasten-Young air mass, the Komhyr ozone air mass, the Earth-Sun factor) and go to
the daemon's pure fit (:func:`daemon.science.sessionfit.fit_series`), as in the
field. Tests and benchmarks may import both sides; the daemon never imports the
simulator.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import replace
from functools import lru_cache
from pathlib import Path

import numpy as np

from daemon.config.filterfile import gaussian_spec
from daemon.config.settings import Channel, Config, Site, load_config
from daemon.science import atmosphere, solar
from daemon.science.sessionfit import ChannelSeries, fit_series
from sim_instrument.scenario import Scenario, channel_filter
from sim_instrument.sessions import SessionSeries

CONFIG_PATH = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"


@lru_cache(maxsize=1)
def _base_config() -> Config:
    return load_config(CONFIG_PATH)


def config_for(scenario: Scenario, *, filters: bool = True) -> Config:
    """A daemon configuration for the scenario's site and spectral channels.

    Each channel's filter is the scenario's Gaussian (given to the daemon when
    ``filters``); the site's ozone is the scenario's column (a well-known column, as
    from a nearby ozone monitor).
    """
    base = _base_config()
    s = scenario.site
    site = Site(name=s.name, latitude_deg=s.latitude_deg, longitude_deg=s.longitude_deg,
                elevation_m=s.elevation_m, timezone="UTC", pressure_hpa=s.pressure_hpa,
                temperature_c=s.temperature_c, ozone_du=scenario.atmosphere.ozone_du)
    channels = []
    for c in scenario.instrument.channels:
        if c.kind != "spectral":
            continue
        f = channel_filter(c)
        fwhm = c.filter_fwhm_nm if c.filter_fwhm_nm is not None else c.bandwidth_nm
        centre = c.filter_centre_nm if c.filter_centre_nm is not None else c.wavelength_nm
        spec = gaussian_spec(centre, fwhm, given=filters) if f.description.startswith(
            "Gaussian") else None
        water = 925.0 < c.wavelength_nm < 955.0
        channels.append(Channel(name=c.name, wavelength_nm=c.wavelength_nm,
                                bandwidth_nm=c.bandwidth_nm, water_vapour=water,
                                filter=spec))
    return replace(base, site=site, channels=tuple(channels),
                   fit=replace(base.fit, angstrom_channels=None))


def channel_series(series: SessionSeries, config: Config) -> dict[str, ChannelSeries]:
    """The session's burst means with the daemon's geometry at each burst mean time."""
    p_mean = float(np.mean(series.pressure_hpa))
    sun = solar.sun_position(list(series.times_utc), config.site, pressure_hpa=p_mean)
    m = np.asarray(solar.relative_airmass(sun.apparent_zenith_deg), dtype=float)
    m_o3 = np.asarray(atmosphere.ozone_airmass(sun.apparent_zenith_deg,
                                               config.site.elevation_m), dtype=float)
    esf = np.asarray(solar.earth_sun_factor(list(series.times_utc)), dtype=float)
    out = {}
    for j, name in enumerate(series.channels):
        out[name] = ChannelSeries(m, m_o3, series.pressure_hpa.copy(),
                                  series.signal_v[:, j].copy(), esf, len(series.times_utc),
                                  [], series.hours.copy())
    return out


def records(series: SessionSeries, config: Config) -> list:
    """The session as the service would store it (no dark signal, lock confirmed)."""
    from daemon.store.writer import MeasurementRecord
    from drivers.interfaces import Housekeeping

    by_channel = channel_series(series, config)
    first = by_channel[series.channels[0]]
    sun = solar.sun_position(list(series.times_utc), config.site,
                             pressure_hpa=float(np.mean(series.pressure_hpa)))
    k = series.samples_v.shape[1]
    out = []
    for i, t in enumerate(series.times_utc):
        p = float(series.pressure_hpa[i])
        out.append(MeasurementRecord(
            time_utc=t, plan_date=series.local_date.isoformat(), session=series.session,
            target_airmass=float(first.airmass[i]), status="ok", failure=None,
            apparent_zenith_deg=float(sun.apparent_zenith_deg[i]),
            azimuth_deg=float(sun.azimuth_deg[i]), airmass=float(first.airmass[i]),
            ozone_airmass=float(first.ozone_airmass[i]),
            earth_sun_factor=float(first.earth_sun_factor[i]), pressure_hpa=p,
            pointing_error_deg=0.02, locked=True, duration_s=0.2 * (k - 1),
            channels=series.channels, sun=tuple(map(tuple, series.samples_v[i].tolist())),
            dark=tuple((0.0,) * len(series.channels) for _ in range(3)),
            saturated=(False,) * len(series.channels),
            housekeeping=Housekeeping(detector_temp_c=25.0, case_temp_c=15.0,
                                      ambient_temp_c=5.0, supply_v=12.6, humidity_pct=20.0,
                                      pressure_hpa=p)))
    return out


def fit_rows(series: SessionSeries, config: Config) -> dict[str, dict]:
    """The daemon's fit of one simulated session, by channel name."""
    rows = fit_series(channel_series(series, config), config,
                      series.local_date.isoformat(), series.session)
    return {r["channel"]: r for r in rows}


def v0_error(row: dict, series: SessionSeries) -> float:
    """Relative error of the fitted V0 at 1 AU against the sky's truth [fraction]."""
    return row["v0_1au"] / series.truth[row["channel"]].v0_1au_v - 1.0


def days(n: int, start: dt.date = dt.date(2025, 2, 10)) -> list[dt.date]:
    return [start + dt.timedelta(days=i) for i in range(n)]
