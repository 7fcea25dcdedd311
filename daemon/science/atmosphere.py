"""Extinction formulas of the atmosphere that need no solar position, and refraction.

Komhyr's ozone air mass and Bodhaine's Rayleigh optical depth are short published
formulas pvlib does not carry. They live apart from :mod:`daemon.science.solar` (which
imports pvlib and pandas) so the screening of a session, which the read-only commands
reuse, can call them without the heavy imports. Angles in degrees, pressures in hPa.

This module imports numpy only inside the functions that take arrays: the resident
service (``heliotroped``) uses the scalar forms (:func:`kasten_young_airmass_at`,
:func:`ozone_airmass_at`, :func:`refraction_deg`, :func:`site_pressure_hpa`) and holds
no numpy (DEVELOPERS.md, "Architecture").
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, TypeAlias

if TYPE_CHECKING:
    from collections.abc import Sequence

    import numpy as np

    from daemon.config.settings import Site

#: Standard sea-level pressure [hPa]; Bodhaine et al. (1999) tabulate at this pressure.
STANDARD_PRESSURE_HPA = 1013.25

#: Mean Earth radius used by Komhyr (1980) for the ozone air mass [km].
EARTH_RADIUS_KM = 6371.229

# A string: numpy is not imported here at run time (see the module docstring).
ArrayLike: TypeAlias = "float | Sequence[float] | np.ndarray"


def site_pressure_hpa(site: Site) -> float:
    """Nominal station pressure of a site [hPa].

    Parameters
    ----------
    site : daemon.config.settings.Site
        ``site.pressure_hpa`` is used when set; otherwise the pressure follows from
        ``site.elevation_m`` through the standard atmosphere.

    Returns
    -------
    float
        Station pressure [hPa].

    Notes
    -----
    The elevation formula is that of ``pvlib.atmosphere.alt2pres`` (a fit to the 1976
    U.S. Standard Atmosphere: Portland State Aerospace Society, "A Quick Derivation
    relating altitude to air pressure", version 1.03, 2004), written out here so that
    the fits and ``calibrate`` need not import pvlib and pandas (about 110 MB); the
    tests hold it to pvlib's. Weather moves the real pressure by a few hPa; the measured
    housekeeping pressure should be preferred when there is one.
    """
    if site.pressure_hpa is not None:
        return float(site.pressure_hpa)
    return ((44331.514 - float(site.elevation_m)) / 11880.516) ** (1 / 0.1902632)


def positive(name: str, value: float, unit: str) -> float:
    """``value`` as a float; ValueError naming it unless positive and finite."""
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise ValueError(f"{name} must be a positive finite number of {unit}, got {value!r}")
    return value


def like_input(value: ArrayLike, result: np.ndarray) -> float | np.ndarray:
    """Return a float for scalar input, an array otherwise."""
    import numpy as np

    return float(result) if np.ndim(value) == 0 else np.asarray(result, dtype=float)


def ozone_airmass(apparent_zenith_deg: ArrayLike, station_height_m: float,
                  layer_height_km: float = 22.0) -> float | np.ndarray:
    """Air mass of a thin ozone layer over a spherical Earth (Komhyr 1980).

    ``mu = (R + h) / sqrt((R + h)^2 - (R + r)^2 sin^2 z)``, with R = 6371.229 km,
    h the layer height and r the station height.

    Parameters
    ----------
    apparent_zenith_deg : float or array_like
        Refracted solar zenith angle at the station [degrees].
    station_height_m : float
        Station height above sea level [m].
    layer_height_km : float, default 22.0
        Height of the effective ozone layer above sea level [km].

    Returns
    -------
    float or numpy.ndarray
        Ozone air mass [dimensionless]; NaN where the apparent zenith exceeds 90
        degrees, as for :func:`relative_airmass`.

    References
    ----------
    Komhyr, W. D. (1980), "Operations handbook - ozone observations with a Dobson
    spectrophotometer", WMO Global Ozone Research and Monitoring Project Report
    No. 6 (citation from memory; formula as given in docs/REFERENCES.md).
    """
    import numpy as np

    z = np.asarray(apparent_zenith_deg, dtype=float)
    mu = _komhyr(np.sin(np.radians(z)), station_height_m, layer_height_km)
    return like_input(apparent_zenith_deg, np.where(z > 90.0, np.nan, mu))


def ozone_airmass_at(apparent_zenith_deg: float, station_height_m: float,
                     layer_height_km: float = 22.0) -> float:
    """:func:`ozone_airmass` of one zenith angle, without numpy [dimensionless]; NaN
    beyond 90 degrees."""
    z = float(apparent_zenith_deg)
    if not z <= 90.0:
        return math.nan
    return float(_komhyr(math.sin(math.radians(z)), station_height_m, layer_height_km))


def _komhyr(sin_z, station_height_m: float, layer_height_km: float):
    """Komhyr's ratio for ``sin_z``, a float or an array (one formula for both forms)."""
    r_km = float(station_height_m) / 1000.0
    h_km = positive("layer_height_km", layer_height_km, "km")
    if r_km >= h_km:
        raise ValueError(f"station_height_m ({station_height_m:g} m) must lie below the ozone "
                         f"layer ({h_km:g} km)")
    outer = EARTH_RADIUS_KM + h_km
    inner = (EARTH_RADIUS_KM + r_km) * sin_z
    return outer / (outer**2 - inner**2) ** 0.5


#: Earth radius of the SPECTRL2 ozone air mass [km] (Bird and Riordan 1986, eq. 2-10).
SPECTRL2_EARTH_RADIUS_KM = 6370.0


def ozone_airmass_above_observer(apparent_zenith_deg: ArrayLike,
                                 layer_height_km: float = 22.0) -> float | np.ndarray:
    """Ozone air mass with the layer height counted from the observer (SPECTRL2).

    ``M_o = (1 + h/R) / sqrt(cos^2 z + 2 h/R)``, R = 6370 km, h the layer's height
    above the observer: Bird and Riordan (1986), SERI/TR-215-2436 and J. Clim. Appl.
    Meteorol. 25:87-97, eq. 2-10 (after Iqbal 1983; citations from memory, the formula
    as pvlib has it), with h = 22 km there; the same
    formula pvlib's ``spectrum.spectrl2`` evaluates (tests/test_uncertainty.py holds
    it to pvlib). It has no station height: at a mountain station it puts the layer
    higher above sea level than Komhyr's form (:func:`ozone_airmass`) with the same h,
    a difference of convention the budget's ``ozone_airmass_model`` term spans.

    Parameters
    ----------
    apparent_zenith_deg : float or array_like
        Refracted solar zenith angle at the station [degrees].
    layer_height_km : float, default 22.0
        Height of the effective ozone layer above the observer [km].

    Returns
    -------
    float or numpy.ndarray
        Ozone air mass [dimensionless]; NaN beyond 90 degrees.
    """
    import numpy as np

    h = positive("layer_height_km", layer_height_km, "km") / SPECTRL2_EARTH_RADIUS_KM
    z = np.asarray(apparent_zenith_deg, dtype=float)
    mu = (1.0 + h) / np.sqrt(np.cos(np.radians(z)) ** 2 + 2.0 * h)
    return like_input(apparent_zenith_deg, np.where(z > 90.0, np.nan, mu))


# --------------------------------------------------------------------------- Rayleigh

def rayleigh_optical_depth(wavelength_nm: ArrayLike,
                           pressure_hpa: float = STANDARD_PRESSURE_HPA) -> float | np.ndarray:
    """Rayleigh optical depth of a dry standard atmosphere (Bodhaine et al. 1999).

    Parameters
    ----------
    wavelength_nm : float or array_like
        Wavelength [nm], positive.
    pressure_hpa : float, default 1013.25
        Station pressure [hPa]; the sea-level value is scaled by ``p / 1013.25``.

    Returns
    -------
    float or numpy.ndarray
        Vertical Rayleigh optical depth [dimensionless].

    References
    ----------
    Bodhaine, B. A., Wood, N. B., Dutton, E. G. and Slusser, J. R. (1999), "On
    Rayleigh optical depth calculations", Journal of Atmospheric and Oceanic
    Technology 16(11):1854-1861,
    :doi:`10.1175/1520-0426(1999)016<1854:ORODC>2.0.CO;2`, eq. 30 (360 ppm CO2,
    sea level, 45 degrees latitude).

    Notes
    -----
    Only the pressure scaling is applied. The gravity term is left out: optical depth
    goes as ``p / (m_a g)``, with ``g`` taken at the latitude and the mass-weighted
    height of the air column (Bodhaine et al. 1999, eq. 22-23 and the ``m_a g`` term;
    from memory). At 3650 m and 20 deg N, ``g`` is lower than at the 45 deg sea-level
    reference, so this function gives tau_R about 0.3 % too small (estimate).
    """
    p = positive("pressure_hpa", pressure_hpa, "hPa")
    bad = ValueError(f"wavelength_nm must be positive finite numbers of nm, got "
                     f"{wavelength_nm!r}")
    if isinstance(wavelength_nm, int | float):  # one wavelength (per point): no numpy
        wl = float(wavelength_nm)
        if not (math.isfinite(wl) and wl > 0):
            raise bad
        return float(_bodhaine((wl / 1000.0) ** 2)) * (p / STANDARD_PRESSURE_HPA)
    import numpy as np

    wl = np.asarray(wavelength_nm, dtype=float)
    if not np.all(np.isfinite(wl) & (wl > 0)):
        raise bad
    tau = _bodhaine((wl / 1000.0) ** 2)
    return like_input(wavelength_nm, tau * (p / STANDARD_PRESSURE_HPA))


def _bodhaine(um2):
    """Bodhaine et al. (1999) eq. 30 at sea level, of the squared wavelength [um^2]."""
    return (0.0021520 * (1.0455996 - 341.29061 / um2 - 0.90230850 * um2)
            / (1.0 + 0.0027059889 / um2 - 85.968563 * um2))


#: Relative air mass at the horizon by Kasten and Young (1989), at 90 degrees.
KY_HORIZON_AIRMASS = 1.0 / (0.50572 * 6.07995 ** -1.6364)


def kasten_young_airmass(apparent_zenith_deg: ArrayLike) -> np.ndarray:
    """Relative optical air mass of Kasten and Young (1989), Appl. Opt. 28, 4735:
    ``1 / (cos z + 0.50572 (96.07995 - z)^-1.6364)``, z the apparent zenith [deg];
    NaN beyond 90 degrees. The same formula as pvlib's ``kastenyoung1989`` (held to it
    by tests/test_atmosphere_light.py), written out so a session fit needs no pvlib."""
    import numpy as np

    z = np.atleast_1d(np.asarray(apparent_zenith_deg, dtype=float))
    with np.errstate(invalid="ignore", divide="ignore"):
        am = _kasten_young(z, np.cos(np.radians(z)))
    return np.where((z >= 0.0) & (z <= 90.0), am, np.nan)


def kasten_young_airmass_at(apparent_zenith_deg: float) -> float:
    """:func:`kasten_young_airmass` of one zenith angle, without numpy; NaN outside
    0 to 90 degrees."""
    z = float(apparent_zenith_deg)
    if not 0.0 <= z <= 90.0:
        return math.nan
    return float(_kasten_young(z, math.cos(math.radians(z))))


def _kasten_young(z, cos_z):
    """Kasten and Young's formula for ``z`` and its cosine, floats or arrays."""
    return 1.0 / (cos_z + 0.50572 * (96.07995 - z) ** -1.6364)


def zenith_from_kasten_young(airmass: ArrayLike) -> np.ndarray:
    """Invert :func:`kasten_young_airmass` by bisection (the formula increases
    monotonically on 0-90 degrees; 52 halvings, a double's mantissa, leave 2e-14
    degrees): the apparent zenith [deg] of each air mass, NaN outside
    1/(1 + 0.50572 x 96.07995^-1.6364) to :data:`KY_HORIZON_AIRMASS`. The formula is
    evaluated directly in the loop (the midpoints stay within 0-90 degrees): a campaign
    inverts the air masses of every stored session."""
    import numpy as np

    m = np.atleast_1d(np.asarray(airmass, dtype=float))
    lo, hi = np.zeros_like(m), np.full_like(m, 90.0)
    for _ in range(52):
        mid = 0.5 * (lo + hi)
        above = _kasten_young(mid, np.cos(np.radians(mid))) > m
        hi, lo = np.where(above, mid, hi), np.where(above, lo, mid)
    z = 0.5 * (lo + hi)
    low = kasten_young_airmass(0.0)[0]
    return np.where((m >= low) & (m <= KY_HORIZON_AIRMASS), z, np.nan)


# --------------------------------------------------------------------------- refraction

#: Refraction at sunrise and sunset [degrees], the SPA's typical value (Reda and
#: Andreas 2004, worked example inputs) and pvlib's default; below an unrefracted
#: elevation of -(0.26667 + this) the SPA applies no refraction.
SPA_HORIZON_REFRACTION_DEG = 0.5667


def refraction_deg(elevation_deg: float, pressure_hpa: float, temperature_c: float) -> float:
    """Atmospheric refraction of the sun's centre by the SPA [degrees], one angle.

    ``(P / 1010) (283 / (273 + T)) 1.02 / (60 tan(e0 + 10.3 / (e0 + 5.11)))`` with the
    unrefracted topocentric elevation ``e0`` [degrees], the pressure ``P`` [hPa] and the
    temperature ``T`` [degC]; zero when ``e0`` lies below ``-(0.26667 + 0.5667)``
    degrees. The apparent elevation is ``e0`` plus this.

    Parameters
    ----------
    elevation_deg : float
        Topocentric elevation without refraction, ``90 - zenith`` [degrees].
    pressure_hpa : float
        Station pressure [hPa].
    temperature_c : float
        Air temperature [degC].

    Returns
    -------
    float
        Refraction [degrees], positive (the sun appears higher).

    References
    ----------
    Reda, I. and Andreas, A. (2004), "Solar position algorithm for solar radiation
    applications", Solar Energy 76(5):577-589, :doi:`10.1016/j.solener.2003.12.003`,
    eq. 42 (after Bennett's formula); written out here so the resident service needs
    no pvlib; held to ``pvlib.spa.atmospheric_refraction_correction`` by
    tests/test_resident_geometry.py.
    """
    e0 = float(elevation_deg)
    p = positive("pressure_hpa", pressure_hpa, "hPa")
    if e0 < -(0.26667 + SPA_HORIZON_REFRACTION_DEG):
        return 0.0
    return ((p / 1010.0) * (283.0 / (273.0 + float(temperature_c)))
            * 1.02 / (60.0 * math.tan(math.radians(e0 + 10.3 / (e0 + 5.11)))))
