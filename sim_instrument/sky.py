"""The clear sky seen by the simulated radiometer: pure functions, no state.

Everything here is the simulator's ground truth. The daemon has its own science
module and must never import this one; tests compare the two only through the data
that crosses the protocol.

Units are in the names or the docstrings. Wavelengths are in nanometres, pressures in
hPa, angles in degrees, optical depths and air masses are dimensionless.

The direct-sun signal of a channel with top-of-atmosphere constant ``V0`` at 1 AU is::

    V = V0 * (r0/r)^2 * exp(-(tau_R m_R + tau_O3 m_O3 + tau_a m_a))

with the Rayleigh and aerosol air masses from Kasten and Young (1989) on the apparent
zenith and the ozone air mass for a thin layer at 22 km (Komhyr 1980). A channel in
the water-vapour band near 940 nm is further multiplied by its band-mean water-vapour
transmittance (:func:`water_vapour_band_transmittance`), which is not an exponential
in air mass; thin cloud adds a grey optical depth on the Kasten-Young air mass.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from functools import lru_cache

import numpy as np
import pandas as pd
import pvlib

STANDARD_PRESSURE_HPA = 1013.25
MOLECULES_PER_DU_CM2 = 2.687e16  # 1 Dobson unit, molecules cm^-2 (definition of the DU)
EARTH_RADIUS_KM = 6371.229  # Komhyr (1980), as quoted in docs/REFERENCES.md
OZONE_LAYER_HEIGHT_KM = 22.0  # effective height of the ozone layer, Komhyr (1980)

# Ozone absorption cross-section, 10-nm bin means [cm^2 molecule^-1], keyed by the
# bin's lower edge [nm]. Source of the data: Serdyuchenko, A. et al. (2014), Atmos.
# Meas. Tech. 7:625-636, and Gorshelev, V. et al. (2014), Atmos. Meas. Tech.
# 7:609-624, at 233 K.
#   "C" bins are the 10-nm means listed in docs/REFERENCES.md (440, 490, 500, 600, 670).
#   "S" bins are 10-nm means of the same 233 K data set as tabulated (in m^2) in
#       E. Bruneton's precomputed atmospheric scattering demo (2017, demo.cc,
#       kOzoneCrossSection); its 440/490/500/600/670 bins agree with docs/REFERENCES.md,
#       the others were not checked against the original files.
#   "M" bins are from memory (order of magnitude only: the Wulf bands are weak,
#       and at 260 DU these give optical depths below 3e-4).
OZONE_BIN_CROSS_SECTION_CM2: dict[int, tuple[float, str]] = {
    370: (2.182e-24, "S"),
    380: (2.818e-24, "S"),
    430: (8.451e-23, "S"),
    440: (1.582e-22, "C"),
    490: (9.016e-22, "C"),
    500: (1.480e-21, "C"),
    600: (5.019e-21, "C"),
    670: (1.473e-21, "C"),
    860: (4.0e-23, "M"),
    870: (4.0e-23, "M"),
    920: (1.5e-23, "M"),
    930: (1.5e-23, "M"),
    940: (1.5e-23, "M"),
    950: (1.5e-23, "M"),
    1010: (3.0e-24, "M"),
    1020: (3.0e-24, "M"),
}
OZONE_BIN_WIDTH_NM = 10


def rayleigh_optical_depth(wavelength_nm: float | np.ndarray,
                           pressure_hpa: float = STANDARD_PRESSURE_HPA) -> float | np.ndarray:
    """Rayleigh optical depth of a vertical path through the whole atmosphere.

    Parameters
    ----------
    wavelength_nm : float or array
        Wavelength [nm], valid about 250-4000 nm.
    pressure_hpa : float
        Station pressure [hPa]; the optical depth scales linearly with it.

    Returns
    -------
    float or array
        Rayleigh optical depth [dimensionless].

    References
    ----------
    Bodhaine, B. A., Wood, N. B., Dutton, E. G. and Slusser, J. R. (1999), "On
    Rayleigh optical depth calculations", J. Atmos. Oceanic Technol. 16:1854-1861,
    eq. 30 (for 1013.25 hPa, 45 deg latitude, sea level, 360 ppm CO2).

    Notes
    -----
    Only the pressure scaling is applied. The gravity term is left out: optical depth
    goes as ``p / (m_a g)``, with ``g`` taken at the latitude and the mass-weighted
    height of the air column (Bodhaine et al. 1999, eq. 22-23 and the ``m_a g`` term;
    from memory). At 3650 m and 20 deg N, ``g`` is lower than at the 45 deg sea-level
    reference, so this function gives tau_R about 0.3 % too small (estimate).
    """
    lam = np.asarray(wavelength_nm, dtype=float) / 1000.0  # eq. 30 is in micrometres
    lam2 = lam * lam
    tau = 0.0021520 * (1.0455996 - 341.29061 / lam2 - 0.90230850 * lam2) / (
        1.0 + 0.0027059889 / lam2 - 85.968563 * lam2)
    tau = tau * (np.asarray(pressure_hpa, dtype=float) / STANDARD_PRESSURE_HPA)
    return float(tau) if np.ndim(tau) == 0 else tau


def ozone_cross_section_cm2(wavelength_nm: float, bandwidth_nm: float = 10.0) -> float:
    """Mean ozone absorption cross-section over a rectangular band.

    The band ``[wavelength_nm - bandwidth_nm/2, wavelength_nm + bandwidth_nm/2]`` is
    averaged over the 10-nm bins of :data:`OZONE_BIN_CROSS_SECTION_CM2`, each weighted
    by its overlap with the band. A band centred on 445 nm with a 10 nm width is
    exactly the 440-450 nm bin.

    Parameters
    ----------
    wavelength_nm : float
        Band centre [nm].
    bandwidth_nm : float
        Full band width [nm], rectangular.

    Returns
    -------
    float
        Cross-section [cm^2 molecule^-1].

    Raises
    ------
    ValueError
        If part of the band falls outside the tabulated bins.
    """
    if not (bandwidth_nm > 0 and np.isfinite(bandwidth_nm)):
        raise ValueError(f"bandwidth_nm must be a positive number, got {bandwidth_nm!r}")
    lo = wavelength_nm - bandwidth_nm / 2.0
    hi = wavelength_nm + bandwidth_nm / 2.0
    first = int(np.floor(lo / OZONE_BIN_WIDTH_NM)) * OZONE_BIN_WIDTH_NM
    total = 0.0
    edge = first
    while edge < hi:
        overlap = min(hi, edge + OZONE_BIN_WIDTH_NM) - max(lo, edge)
        if overlap > 0:
            if edge not in OZONE_BIN_CROSS_SECTION_CM2:
                covered = ", ".join(
                    f"{b}-{b + OZONE_BIN_WIDTH_NM}" for b in sorted(OZONE_BIN_CROSS_SECTION_CM2))
                raise ValueError(
                    f"no ozone cross-section for the {edge}-{edge + OZONE_BIN_WIDTH_NM} nm bin "
                    f"needed by a {bandwidth_nm:g} nm band at {wavelength_nm:g} nm; tabulated "
                    f"bins [nm]: {covered}. Use a channel inside them or extend the table "
                    f"in sim_instrument/sky.py with a sourced value.")
            total += OZONE_BIN_CROSS_SECTION_CM2[edge][0] * overlap
        edge += OZONE_BIN_WIDTH_NM
    return total / bandwidth_nm


def ozone_optical_depth(wavelength_nm: float, ozone_du: float,
                        bandwidth_nm: float = 10.0) -> float:
    """Vertical ozone optical depth of a band.

    Parameters
    ----------
    wavelength_nm : float
        Band centre [nm].
    ozone_du : float
        Total ozone column [DU]; 1 DU = 2.687e16 molecules cm^-2.
    bandwidth_nm : float
        Full band width [nm].

    Returns
    -------
    float
        Ozone optical depth [dimensionless] = cross-section x column.
    """
    return ozone_cross_section_cm2(wavelength_nm, bandwidth_nm) * ozone_du * MOLECULES_PER_DU_CM2


def aerosol_optical_depth(wavelength_nm: float | np.ndarray, tau_500: float,
                          angstrom_alpha: float) -> float | np.ndarray:
    """Aerosol optical depth by the Angstrom law, referenced at 500 nm.

    ``tau_a = tau_500 * (wavelength_nm / 500 nm)^-alpha``, which is the classical
    ``beta * (lambda / 1 um)^-alpha`` with ``beta = tau_500 * 0.5^alpha``
    (:func:`angstrom_beta`). Angstrom, A. (1929), Geogr. Ann. 11:156-166.

    Parameters
    ----------
    wavelength_nm : float or array
        Wavelength [nm].
    tau_500 : float
        Aerosol optical depth at 500 nm [dimensionless].
    angstrom_alpha : float
        Angstrom exponent [dimensionless].
    """
    tau = tau_500 * (np.asarray(wavelength_nm, dtype=float) / 500.0) ** (-angstrom_alpha)
    return float(tau) if np.ndim(tau) == 0 else tau


def angstrom_beta(tau_500: float, angstrom_alpha: float) -> float:
    """Angstrom turbidity coefficient beta: aerosol optical depth at 1000 nm [dimensionless]."""
    return tau_500 * 0.5 ** angstrom_alpha


def relative_airmass_kasten_young(apparent_zenith_deg: float | np.ndarray) -> float | np.ndarray:
    """Relative optical air mass, Kasten and Young (1989) eq. 3, via pvlib.

    Parameters
    ----------
    apparent_zenith_deg : float or array
        Refraction-corrected solar zenith angle [degrees].

    Returns
    -------
    float or array
        Relative air mass [dimensionless]; NaN when the sun is below the horizon
        (zenith above 90 degrees).

    References
    ----------
    Kasten, F. and Young, A. T. (1989), "Revised optical air mass tables and
    approximation formula", Applied Optics 28(22):4735-4738.
    """
    am = pvlib.atmosphere.get_relative_airmass(np.asarray(apparent_zenith_deg, dtype=float),
                                               model="kastenyoung1989")
    return float(am) if np.ndim(am) == 0 else np.asarray(am, dtype=float)


def ozone_airmass(zenith_deg: float | np.ndarray, station_height_km: float = 0.0,
                  layer_height_km: float = OZONE_LAYER_HEIGHT_KM) -> float | np.ndarray:
    """Ozone air mass for a thin spherical shell (Komhyr 1980).

    ``mu = (R + h) / sqrt((R + h)^2 - (R + r)^2 sin^2 z)`` with ``R`` the Earth's
    radius, ``h`` the layer height and ``r`` the station height above sea level.

    Parameters
    ----------
    zenith_deg : float or array
        Solar zenith angle [degrees]; the simulator passes the apparent zenith.
    station_height_km : float
        Station height above sea level [km].
    layer_height_km : float
        Height of the ozone layer [km].

    Returns
    -------
    float or array
        Ozone air mass [dimensionless]; NaN for a zenith above 90 degrees.

    References
    ----------
    Komhyr, W. D. (1980), "Operations handbook - ozone observations with a Dobson
    spectrophotometer", WMO Global Ozone Research and Monitoring Project Report
    No. 6 (citation from memory; formula as in docs/REFERENCES.md).
    """
    z = np.radians(np.asarray(zenith_deg, dtype=float))
    shell = EARTH_RADIUS_KM + layer_height_km
    ground = EARTH_RADIUS_KM + station_height_km
    mu = shell / np.sqrt(shell * shell - (ground * np.sin(z)) ** 2)
    mu = np.where(np.asarray(zenith_deg, dtype=float) > 90.0, np.nan, mu)
    return float(mu) if np.ndim(mu) == 0 else mu


def earth_sun_factor_spencer(day_of_year: float | np.ndarray) -> float | np.ndarray:
    """Eccentricity correction ``(r0/r)^2`` by Spencer's Fourier series.

    Parameters
    ----------
    day_of_year : float or array
        Day of the year, 1 on 1 January.

    Returns
    -------
    float or array
        ``(r0/r)^2`` [dimensionless], r0 = 1 AU.

    References
    ----------
    Spencer, J. W. (1971), "Fourier series representation of the position of the
    sun", Search 2(5):172 (citation from memory; coefficients as in docs/REFERENCES.md).
    """
    g = 2.0 * np.pi * (np.asarray(day_of_year, dtype=float) - 1.0) / 365.0
    f = (1.000110 + 0.034221 * np.cos(g) + 0.001280 * np.sin(g)
         + 0.000719 * np.cos(2 * g) + 0.000077 * np.sin(2 * g))
    return float(f) if np.ndim(f) == 0 else f


def earth_sun_factor(times: pd.DatetimeIndex) -> np.ndarray:
    """Eccentricity correction ``(r0/r)^2`` from NREL SPA's Earth-Sun distance (pvlib).

    Parameters
    ----------
    times : pandas.DatetimeIndex
        UTC times (timezone-aware).

    Returns
    -------
    numpy.ndarray
        ``(1 AU / r)^2`` [dimensionless], one per time.

    References
    ----------
    Reda, I. and Andreas, A. (2004), "Solar position algorithm for solar radiation
    applications", Solar Energy 76(5):577-589, via
    ``pvlib.solarposition.nrel_earthsun_distance``.
    """
    r_au = pvlib.solarposition.nrel_earthsun_distance(times).to_numpy(dtype=float)
    return 1.0 / (r_au * r_au)


@dataclass(frozen=True)
class SolarGeometry:
    """Sun position at a set of times; every array has one value per time."""

    apparent_zenith_deg: np.ndarray  # refraction-corrected
    zenith_deg: np.ndarray  # geometric (topocentric)
    azimuth_deg: np.ndarray  # from north, clockwise
    apparent_elevation_deg: np.ndarray


def to_datetime_index(times: Sequence[datetime] | np.ndarray | pd.DatetimeIndex
                      ) -> pd.DatetimeIndex:
    """Timezone-aware UTC index from datetimes or from POSIX seconds [s]."""
    if isinstance(times, pd.DatetimeIndex):
        index = times
    elif isinstance(times, np.ndarray) and np.issubdtype(times.dtype, np.number):
        index = pd.to_datetime(np.round(times * 1e9).astype("int64"), unit="ns", utc=True)
    else:
        index = pd.DatetimeIndex(list(times))
    if index.tz is None:
        raise ValueError("times must be timezone-aware (UTC); got naive datetimes")
    return index.tz_convert("UTC")


def solar_position(times: Sequence[datetime] | np.ndarray | pd.DatetimeIndex,
                   latitude_deg: float, longitude_deg: float, elevation_m: float,
                   pressure_hpa: float, temperature_c: float) -> SolarGeometry:
    """Topocentric sun position by NREL SPA (pvlib), refraction for the site's air.

    Parameters
    ----------
    times : sequence of aware datetimes, POSIX seconds [s] or pandas.DatetimeIndex
    latitude_deg, longitude_deg : float
        Site position [degrees], north and east positive.
    elevation_m : float
        Site height above sea level [m].
    pressure_hpa : float
        Station pressure [hPa], for refraction.
    temperature_c : float
        Air temperature [degrees C], for refraction.

    References
    ----------
    Reda, I. and Andreas, A. (2004), Solar Energy 76(5):577-589, via
    ``pvlib.solarposition.spa_python`` (delta T 67 s, pvlib's default).
    """
    index = to_datetime_index(times)
    sp = pvlib.solarposition.spa_python(index, latitude_deg, longitude_deg,
                                        altitude=elevation_m, pressure=pressure_hpa * 100.0,
                                        temperature=temperature_c)
    return SolarGeometry(
        apparent_zenith_deg=sp["apparent_zenith"].to_numpy(dtype=float),
        zenith_deg=sp["zenith"].to_numpy(dtype=float),
        azimuth_deg=sp["azimuth"].to_numpy(dtype=float),
        apparent_elevation_deg=sp["apparent_elevation"].to_numpy(dtype=float),
    )


def direct_sun_signal_v(v0_1au_v: float | np.ndarray, earth_sun_factor: float | np.ndarray,
                        optical_depths: Sequence[float | np.ndarray],
                        airmasses: Sequence[float | np.ndarray]) -> np.ndarray:
    """Direct-sun signal by the Beer-Bouguer-Lambert law.

    ``V = V0_1au * (r0/r)^2 * exp(-sum_k tau_k m_k)``. All arguments broadcast
    together (for example optical depths of shape ``(channels,)`` with air masses of
    shape ``(samples, 1)`` give ``(samples, channels)``).

    Parameters
    ----------
    v0_1au_v : float or array
        Top-of-atmosphere signal at 1 AU [V].
    earth_sun_factor : float or array
        ``(r0/r)^2`` [dimensionless].
    optical_depths : sequence of float or array
        Vertical optical depth of each attenuator [dimensionless].
    airmasses : sequence of float or array
        Relative air mass of each attenuator, same order [dimensionless].

    Returns
    -------
    numpy.ndarray
        Signal [V]; NaN where an air mass is NaN (sun below the horizon).
    """
    if len(optical_depths) != len(airmasses):
        raise ValueError(f"got {len(optical_depths)} optical depths but {len(airmasses)} "
                         f"air masses; give one air mass per attenuator")
    slant = sum(np.asarray(t, dtype=float) * np.asarray(m, dtype=float)
                for t, m in zip(optical_depths, airmasses, strict=True))
    return np.asarray(v0_1au_v, dtype=float) * np.asarray(earth_sun_factor, dtype=float) * np.exp(
        -np.asarray(slant, dtype=float))


_trapezoid = getattr(np, "trapezoid", None) or np.trapz  # numpy < 2 has only trapz


@lru_cache(maxsize=1)
def _astm_g173_extraterrestrial() -> tuple[np.ndarray, np.ndarray]:
    spectra = pvlib.spectrum.get_reference_spectra(standard="ASTM G173-03")
    return (spectra.index.to_numpy(dtype=float),
            spectra["extraterrestrial"].to_numpy(dtype=float))


def extraterrestrial_irradiance_w_m2_nm(wavelength_nm: float, bandwidth_nm: float = 0.0) -> float:
    """Top-of-atmosphere spectral irradiance at 1 AU from ASTM G173-03 (pvlib's copy).

    Parameters
    ----------
    wavelength_nm : float
        Wavelength or band centre [nm], 280-4000 nm.
    bandwidth_nm : float
        0 for the (linearly interpolated) point value; otherwise the mean over a
        rectangular band of this full width [nm] (trapezoidal integration).

    Returns
    -------
    float
        Spectral irradiance [W m^-2 nm^-1].

    References
    ----------
    ASTM G173-03, "Standard tables for reference solar spectral irradiances",
    extraterrestrial column, as shipped in pvlib (``data/ASTMG173.csv``, read with
    ``pvlib.spectrum.get_reference_spectra``).
    """
    wl, e0 = _astm_g173_extraterrestrial()
    lo = wavelength_nm - bandwidth_nm / 2.0
    hi = wavelength_nm + bandwidth_nm / 2.0
    if lo < wl[0] or hi > wl[-1]:
        raise ValueError(f"ASTM G173 covers {wl[0]:g}-{wl[-1]:g} nm; "
                         f"{wavelength_nm:g} nm +/- {bandwidth_nm / 2:g} nm is outside it")
    if bandwidth_nm <= 0:
        return float(np.interp(wavelength_nm, wl, e0))
    inside = (wl > lo) & (wl < hi)
    x = np.concatenate(([lo], wl[inside], [hi]))
    y = np.concatenate(([np.interp(lo, wl, e0)], e0[inside], [np.interp(hi, wl, e0)]))
    return float(_trapezoid(y, x) / bandwidth_nm)


# Water-vapour absorption coefficients [cm^-1] of the Bird and Riordan (1986) simple
# spectral model (SPECTRL2), on its own wavelength grid [nm], for the 940 nm band only.
# Source: Bird, R. E. and Riordan, C. (1986), J. Climate Appl. Meteor. 25:87-97,
# table 1 (as shipped in pvlib.spectrum.spectrl2). Outside 880-993.5 nm the simulator
# treats the channels as windows (their water-vapour optical depth is set to 0): the
# 870 and 1020 nm channels are chosen to avoid water vapour (common practice, no
# source), and the 10-nm grid of this table would smear the band's wings into them.
WATER_VAPOUR_GRID_NM = np.array([880.0, 905.0, 915.0, 925.0, 930.0, 937.0, 948.0, 965.0,
                                 980.0, 993.5])
WATER_VAPOUR_ABSORPTION_PER_CM = np.array([0.0026, 7.0, 5.0, 5.0, 27.0, 55.0, 45.0, 4.0,
                                           1.48, 0.1])


def water_vapour_absorption_coefficient(wavelength_nm: float | np.ndarray) -> np.ndarray:
    """SPECTRL2 water-vapour absorption coefficient, linearly interpolated [cm^-1].

    Zero outside 880-993.5 nm (see :data:`WATER_VAPOUR_GRID_NM`).
    """
    wl = np.asarray(wavelength_nm, dtype=float)
    a = np.interp(wl, WATER_VAPOUR_GRID_NM, WATER_VAPOUR_ABSORPTION_PER_CM)
    return np.where((wl < WATER_VAPOUR_GRID_NM[0]) | (wl > WATER_VAPOUR_GRID_NM[-1]), 0.0, a)


def water_vapour_transmittance(absorption_per_cm: float | np.ndarray,
                               precipitable_water_cm: float | np.ndarray,
                               airmass: float | np.ndarray) -> np.ndarray:
    """Monochromatic water-vapour transmittance, Bird and Riordan (1986) eq. 2-8.

    ``T = exp(-0.2385 a W m / (1 + 20.07 a W m)^0.45)`` (Leckner 1978's form). The
    band saturates, so ``-ln T`` grows roughly as ``(W m)^0.55``, not as ``m``.

    Parameters
    ----------
    absorption_per_cm : float or array
        Absorption coefficient ``a`` [cm^-1].
    precipitable_water_cm : float or array
        Precipitable water ``W`` [cm].
    airmass : float or array
        Relative air mass ``m`` [dimensionless].

    References
    ----------
    Bird, R. E. and Riordan, C. (1986), "Simple solar spectral model for direct and
    diffuse irradiance on horizontal and tilted planes at the earth's surface for
    cloudless atmospheres", J. Climate Appl. Meteor. 25:87-97 (NREL TR-215-2436).
    """
    x = (np.asarray(absorption_per_cm, dtype=float) * np.asarray(precipitable_water_cm, float)
         * np.asarray(airmass, dtype=float))
    return np.exp(-0.2385 * x / (1.0 + 20.07 * x) ** 0.45)


def water_vapour_band_transmittance(wavelength_nm: float, bandwidth_nm: float,
                                    precipitable_water_cm: float | np.ndarray,
                                    airmass: float | np.ndarray) -> np.ndarray:
    """Mean water-vapour transmittance over a rectangular band.

    The mean is taken over the transmittance, not the optical depth: that is what a
    filter radiometer sees, and why its Langley plot bends (ln V is not linear in m).

    Parameters
    ----------
    wavelength_nm, bandwidth_nm : float
        Band centre and full width [nm].
    precipitable_water_cm : float or array
        Precipitable water [cm].
    airmass : float or array
        Relative air mass; the result has its shape (broadcast with the water).

    Returns
    -------
    numpy.ndarray
        Band-mean transmittance [dimensionless]; 1 for a window channel.
    """
    steps = np.linspace(wavelength_nm - bandwidth_nm / 2.0, wavelength_nm + bandwidth_nm / 2.0,
                        41)
    a = water_vapour_absorption_coefficient(steps)
    w = np.asarray(precipitable_water_cm, dtype=float)
    m = np.asarray(airmass, dtype=float)
    shape = np.broadcast_shapes(w.shape, m.shape)
    if not a.any():
        return np.ones(shape)
    t = water_vapour_transmittance(a.reshape((-1,) + (1,) * len(shape)), w, m)
    return t.mean(axis=0)


def semidiurnal_pressure_hpa(mean_pressure_hpa: float, tide_amplitude_hpa: float,
                             solar_hour: float | np.ndarray) -> float | np.ndarray:
    """Station pressure with the semidiurnal (S2) atmospheric tide [hPa].

    ``p = p_mean + A cos(2 pi (h - 10) / 12)``: two maxima a day, near 10 and 22 h
    local solar time, of amplitude about 1 hPa in the tropics and less at higher
    latitudes (from memory; Chapman and Lindzen 1970, "Atmospheric Tides").
    """
    h = np.asarray(solar_hour, dtype=float)
    p = mean_pressure_hpa + tide_amplitude_hpa * np.cos(2.0 * np.pi * (h - 10.0) / 12.0)
    return float(p) if np.ndim(p) == 0 else p
