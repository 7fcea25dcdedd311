"""Half-day measurement series on the independent sky, without the serial protocol.

:func:`session_series` gives what a radiometer would have measured at each air-mass
target of one morning or afternoon (burst samples, burst means, the barometer's
pressure) and the truth of the sky behind it (V0 at 1 AU, the Earth-Sun factor, the
band-weighted optical depths, precipitable water). Benchmarks and accuracy tests
feed it to the daemon's fit; the simulator never imports the daemon, so the fit and
this sky share no formula.

The series are what the daemon's screening hands the fit: dark-free, at the
reference detector temperature, sun locked and in the field of view. Weather and
sky follow the scenario (:class:`sim_instrument.conditions.Conditions`: aerosol
drift and variability, cloud, pressure tide) on the scenario's
``atmosphere.sky`` physics for every channel (the independent sky unless the
scenario says ``reference``).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from sim_instrument import filters, sky, spectral_sky
from sim_instrument.conditions import Conditions
from sim_instrument.scenario import BROADBAND, REFERENCE_SKY, Scenario, channel_filter

#: Air-mass targets of a session when none are given: 2 to 6 in steps of 0.1.
DEFAULT_AIRMASS_TARGETS = tuple(np.round(np.arange(2.0, 6.0001, 0.1), 3))
SESSIONS = ("am", "pm")


@dataclass(frozen=True)
class ChannelTruth:
    """What the sky did to one channel; arrays have one value per target."""

    v0_1au_v: float  # top-of-atmosphere signal at 1 AU, band-integrated [V]
    centroid_nm: float  # response-weighted mean wavelength of the filter [nm]
    tau_rayleigh: np.ndarray  # band-weighted vertical optical depths
    tau_ozone: np.ndarray
    tau_aerosol: np.ndarray
    tau_cloud: np.ndarray
    transmittance_water_vapour: np.ndarray  # band-weighted, slant
    transmittance: np.ndarray  # band-weighted total, slant
    effective_total: np.ndarray  # -ln(transmittance) / Kasten-Young air mass


@dataclass(frozen=True)
class SessionSeries:
    """One half-day's measurements (dark-free) and its truth.

    ``signal_v[i, c]`` is the burst mean of ``samples_v[i, :, c]`` [V]; times are the
    burst mean times (UTC); ``hours`` are hours since local mean solar midnight
    (monotonic across 00 h UTC).
    """

    scenario: str
    local_date: dt.date
    session: str
    channels: tuple[str, ...]
    wavelength_nm: np.ndarray  # nominal, per channel
    target_airmass: np.ndarray
    times_utc: tuple[dt.datetime, ...]
    epoch_s: np.ndarray
    hours: np.ndarray
    signal_v: np.ndarray  # (targets, channels)
    samples_v: np.ndarray  # (targets, samples, channels)
    pressure_hpa: np.ndarray  # the barometer at each burst mean time
    earth_sun_factor: np.ndarray  # truth: (1 AU / r)^2, NREL SPA distance
    apparent_zenith_deg: np.ndarray  # truth, NREL SPA with refraction
    airmass_kasten_young: np.ndarray  # truth: Kasten-Young on the apparent zenith
    precipitable_water_cm: np.ndarray
    ozone_du: float
    sky: str
    truth: dict[str, ChannelTruth] = field(default_factory=dict)


def local_midnight_epoch_s(local_date: dt.date, longitude_deg: float) -> float:
    """POSIX time of local mean solar midnight starting ``local_date`` [s]."""
    utc_midnight = dt.datetime(local_date.year, local_date.month, local_date.day,
                               tzinfo=dt.UTC).timestamp()
    return utc_midnight - longitude_deg / 15.0 * 3600.0


def target_times_s(scenario: Scenario, local_date: dt.date, session: str,
                   airmass_targets: Sequence[float]) -> np.ndarray:
    """When the Kasten-Young air mass crosses each target, morning or afternoon [s].

    SPA once a minute through the local day, then linear interpolation of time in air
    mass on the half-day's monotonic branch; targets the sun never reaches are dropped.
    """
    if session not in SESSIONS:
        raise ValueError(f"session must be 'am' or 'pm', got {session!r}")
    site = scenario.site
    t0 = local_midnight_epoch_s(local_date, site.longitude_deg)
    grid = t0 + 60.0 * np.arange(24 * 60 + 1, dtype=float)
    geo = sky.solar_position(grid, site.latitude_deg, site.longitude_deg, site.elevation_m,
                             site.pressure_hpa, site.temperature_c)
    m = np.asarray(sky.relative_airmass_kasten_young(geo.apparent_zenith_deg))
    noon = int(np.argmin(geo.apparent_zenith_deg))
    up = np.isfinite(m) & (geo.apparent_zenith_deg < 89.0)
    # From noon back to midnight (am) or on to midnight (pm): the air mass increases.
    idx = np.arange(noon, -1, -1) if session == "am" else np.arange(noon, len(grid))
    stop = np.argmax(~up[idx]) if (~up[idx]).any() else len(idx)
    idx = idx[:stop]
    mm, tt = m[idx], grid[idx]
    # keep the strictly increasing run from noon (it is, up to refraction noise)
    keep = np.concatenate(([True], np.diff(np.maximum.accumulate(mm)) > 0))
    mm, tt = mm[keep], tt[keep]
    targets = np.asarray(airmass_targets, dtype=float)
    inside = (targets >= mm[0]) & (targets <= mm[-1])
    times = np.interp(targets[inside], mm, tt)
    return np.sort(times)


def session_series(scenario: Scenario, local_date: dt.date, session: str, *, seed: int = 0,
                   airmass_targets: Sequence[float] = DEFAULT_AIRMASS_TARGETS,
                   times_utc: Sequence[dt.datetime] | None = None,
                   samples_per_burst: int = 10,
                   burst_noise_relative: float | None = None) -> SessionSeries:
    """Simulate one half-day of burst measurements on the scenario's sky.

    Parameters
    ----------
    scenario : Scenario
        Site, sky, channels (broadband channels are left out) and noise.
    local_date : datetime.date
        Local mean solar date of the session (a western site's afternoon may end
        after 00 h UTC of the next date).
    session : 'am' or 'pm'
    seed : int
        Seeds the day's conditions and the detector noise.
    airmass_targets : sequence of float
        Kasten-Young air masses of the bursts (ignored when ``times_utc`` is given).
    times_utc : sequence of aware datetimes, optional
        Burst mean times, e.g. from the daemon's plan.
    samples_per_burst : int
        Samples per burst, ``sample_interval_s`` apart.
    burst_noise_relative : float, optional
        Relative standard deviation of a burst mean; the default is the scenario's
        per-sample noise (relative and read), which averages down by sqrt(samples).
    """
    if samples_per_burst < 1:
        raise ValueError(f"samples_per_burst must be at least 1, got {samples_per_burst}")
    site, atm, inst = scenario.site, scenario.atmosphere, scenario.instrument
    channels = [c for c in inst.channels if c.kind != BROADBAND]
    if not channels:
        raise ValueError(f"scenario {scenario.name} has no spectral channel")
    sky_seq, noise_seq = np.random.SeedSequence(
        [seed, local_date.toordinal(), SESSIONS.index(session)]).spawn(2)
    cond = Conditions(scenario, np.random.default_rng(sky_seq))
    rng = np.random.default_rng(noise_seq)

    if times_utc is not None:
        mean_t = np.array([t.timestamp() for t in times_utc], dtype=float)
    else:
        mean_t = target_times_s(scenario, local_date, session, airmass_targets)
    n, k = len(mean_t), samples_per_burst
    dts = inst.sample_interval_s * (np.arange(k) - (k - 1) / 2.0)
    t_all = np.concatenate([(mean_t[:, None] + dts[None, :]).ravel(), mean_t])
    index = sky.to_datetime_index(t_all)
    pressure = cond.pressure_hpa(t_all)
    geo = sky.solar_position(index, site.latitude_deg, site.longitude_deg, site.elevation_m,
                             float(np.mean(pressure)), site.temperature_c)
    esf_mean = sky.earth_sun_factor(index[n * k:])
    esf = np.repeat(esf_mean, k)
    esf_all = np.concatenate([esf, esf_mean])
    water = np.full(t_all.shape, atm.precipitable_water_cm)
    state = spectral_sky.SkyState(
        apparent_zenith_deg=geo.apparent_zenith_deg, pressure_hpa=pressure,
        tau_500=cond.tau_500(t_all), angstrom_alpha=atm.angstrom_alpha,
        ozone_du=atm.ozone_du, precipitable_water_cm=water,
        tau_cloud=cond.cloud_optical_depth(t_all))
    consts = spectral_sky.SkyConstants(site.latitude_deg, site.elevation_m,
                                       atm.aerosol_scale_height_km,
                                       atm.water_vapour_scale_height_km)
    masses = spectral_sky.airmasses(state, consts)
    clean = np.empty((len(t_all), len(channels)))
    truth: dict[str, ChannelTruth] = {}
    for j, ch in enumerate(channels):
        filt = channel_filter(ch)
        if atm.sky == REFERENCE_SKY:
            res = _reference_band(ch, state, site, masses)
        else:
            res = spectral_sky.band_transmittance(filters.band(filt), state, consts, masses)
        clean[:, j] = ch.v0_1au_v * esf_all * res.transmittance
        mid = slice(n * k, None)
        truth[ch.name] = ChannelTruth(
            v0_1au_v=ch.v0_1au_v, centroid_nm=filt.centroid_nm,
            tau_rayleigh=res.tau_rayleigh[mid], tau_ozone=res.tau_ozone[mid],
            tau_aerosol=res.tau_aerosol[mid], tau_cloud=res.tau_cloud[mid],
            transmittance_water_vapour=res.transmittance_water_vapour[mid],
            transmittance=res.transmittance[mid], effective_total=res.effective_total[mid])
    sun = clean[: n * k].reshape(n, k, len(channels))
    if burst_noise_relative is not None:
        sigma = burst_noise_relative * np.sqrt(k) * sun
    else:
        sigma = np.sqrt((inst.noise.relative * sun) ** 2 + inst.noise.shot_v ** 2 * sun
                        + inst.noise.read_v ** 2)
    samples = sun + sigma * rng.standard_normal(sun.shape)
    origin = local_midnight_epoch_s(local_date, site.longitude_deg)
    return SessionSeries(
        scenario=scenario.name, local_date=local_date, session=session,
        channels=tuple(c.name for c in channels),
        wavelength_nm=np.array([c.wavelength_nm for c in channels]),
        target_airmass=masses["kasten_young"][n * k:],
        times_utc=tuple(dt.datetime.fromtimestamp(t, dt.UTC) for t in mean_t),
        epoch_s=mean_t, hours=(mean_t - origin) / 3600.0,
        signal_v=samples.mean(axis=1), samples_v=samples,
        pressure_hpa=pressure[n * k:], earth_sun_factor=esf_mean,
        apparent_zenith_deg=geo.apparent_zenith_deg[n * k:],
        airmass_kasten_young=masses["kasten_young"][n * k:],
        precipitable_water_cm=water[n * k:], ozone_du=atm.ozone_du, sky=atm.sky,
        truth=truth)


def _reference_band(ch, state: spectral_sky.SkyState, site, masses) -> spectral_sky.BandResult:
    """The reference sky's channel-centre Beer-Lambert, in the independent sky's shape."""
    m = np.asarray(masses["kasten_young"])
    m_o3 = np.asarray(sky.ozone_airmass(state.apparent_zenith_deg, site.elevation_m / 1000.0))
    tau_r = np.asarray(sky.rayleigh_optical_depth(ch.wavelength_nm, state.pressure_hpa))
    tau_o = np.full(m.shape, sky.ozone_optical_depth(ch.wavelength_nm, state.ozone_du,
                                                      ch.bandwidth_nm))
    tau_a = np.asarray(sky.aerosol_optical_depth(ch.wavelength_nm, state.tau_500,
                                                 state.angstrom_alpha))
    t_wv = sky.water_vapour_band_transmittance(ch.wavelength_nm, ch.bandwidth_nm,
                                               state.precipitable_water_cm,
                                               np.nan_to_num(m, nan=1.0))
    with np.errstate(invalid="ignore", over="ignore"):
        t = np.exp(-((tau_r + tau_a + state.tau_cloud) * m + tau_o * m_o3)) * t_wv
        eff = -np.log(t) / m
    return spectral_sky.BandResult(
        transmittance=np.nan_to_num(t, nan=0.0), tau_rayleigh=tau_r, tau_ozone=tau_o,
        tau_aerosol=tau_a, tau_cloud=state.tau_cloud, transmittance_water_vapour=t_wv,
        airmass_kasten_young=m, airmass_ozone=m_o3, airmass_aerosol=m,
        airmass_water_vapour=m, effective_total=eff)

