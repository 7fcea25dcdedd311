"""The broadband direct-beam channel: a pyrheliometer-like signal from SPECTRL2.

The channel sees the direct solar beam integrated over 300-4000 nm (a thermopile's
flat response, common practice, no source). The clear-sky direct spectrum comes from
the Bird and Riordan simple spectral model as pvlib implements it
(:func:`pvlib.spectrum.spectrl2`): Rayleigh scattering, aerosol by the Angstrom law,
water vapour, ozone and mixed gases, each per wavelength. Because those optical
depths differ so much across the spectrum (and water vapour saturates), the broadband
signal is not an exponential in air mass: its Langley plot bends, and a straight
line fitted at air masses 2 to 6 extrapolates to less than the true top-of-atmosphere
value.

References
----------
Bird, R. E. and Riordan, C. (1986), "Simple solar spectral model for direct and
diffuse irradiance on horizontal and tilted planes at the earth's surface for
cloudless atmospheres", J. Climate Appl. Meteor. 25:87-97 (NREL TR-215-2436).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
import pvlib

_trapezoid = getattr(np, "trapezoid", None) or np.trapz  # numpy < 2 has only trapz

#: Spectral range of SPECTRL2 and so of the channel [nm].
BAND_NM = (300.0, 4000.0)


def _spectrl2_direct(apparent_zenith_deg: np.ndarray, airmass: np.ndarray,
                     pressure_hpa: np.ndarray, precipitable_water_cm: np.ndarray,
                     ozone_du: float, tau_500: np.ndarray, angstrom_alpha: float,
                     day_of_year: float) -> dict:
    n = apparent_zenith_deg.shape[0]
    return pvlib.spectrum.spectrl2(
        apparent_zenith=apparent_zenith_deg, aoi=np.zeros(n), surface_tilt=0.0,
        ground_albedo=0.2, surface_pressure=pressure_hpa * 100.0, relative_airmass=airmass,
        precipitable_water=precipitable_water_cm, ozone=ozone_du / 1000.0,
        aerosol_turbidity_500nm=tau_500, dayofyear=day_of_year, alpha=angstrom_alpha)


@lru_cache(maxsize=1)
def extraterrestrial_w_m2() -> float:
    """SPECTRL2's top-of-atmosphere irradiance at 1 AU, integrated over 300-4000 nm [W m^-2].

    pvlib applies Spencer's Earth-Sun correction to the model's spectrum; dividing by
    the same factor gives the spectrum at 1 AU.
    """
    doy = 100.0
    out = _spectrl2_direct(np.array([30.0]), np.array([1.15]), np.array([1013.25]),
                           np.array([1.0]), 300.0, np.array([0.1]), 1.14, doy)
    factor = float(pvlib.irradiance.get_extra_radiation(doy, method="spencer",
                                                        solar_constant=1.0))
    return float(_trapezoid(out["dni_extra"][:, 0], out["wavelength"])) / factor


def direct_irradiance_w_m2(apparent_zenith_deg: np.ndarray, airmass: np.ndarray,
                           pressure_hpa: np.ndarray | float,
                           precipitable_water_cm: np.ndarray | float, ozone_du: float,
                           tau_500: np.ndarray | float, angstrom_alpha: float,
                           day_of_year: float) -> np.ndarray:
    """Clear-sky direct normal irradiance over 300-4000 nm [W m^-2], one per time.

    Parameters
    ----------
    apparent_zenith_deg : array
        Refraction-corrected solar zenith [degrees], one per time.
    airmass : array
        Relative air mass (Kasten and Young 1989) [dimensionless], same shape.
    pressure_hpa : float or array
        Station pressure [hPa].
    precipitable_water_cm : float or array
        Precipitable water [cm].
    ozone_du : float
        Total ozone [DU].
    tau_500 : float or array
        Aerosol optical depth at 500 nm [dimensionless].
    angstrom_alpha : float
        Angstrom exponent [dimensionless].
    day_of_year : float
        For the Earth-Sun distance (Spencer 1971, inside SPECTRL2).

    Returns
    -------
    numpy.ndarray
        Direct normal irradiance [W m^-2]; 0 with the sun below the horizon.
    """
    z = np.atleast_1d(np.asarray(apparent_zenith_deg, dtype=float))
    m = np.atleast_1d(np.asarray(airmass, dtype=float))
    up = np.isfinite(m) & (z < 90.0)
    result = np.zeros(z.shape)
    if not up.any():
        return result

    def pick(x: np.ndarray | float) -> np.ndarray:
        arr = np.broadcast_to(np.asarray(x, dtype=float), z.shape)
        return arr[up]

    out = _spectrl2_direct(z[up], m[up], pick(pressure_hpa), pick(precipitable_water_cm),
                           ozone_du, pick(tau_500), angstrom_alpha, day_of_year)
    result[up] = _trapezoid(np.nan_to_num(out["dni"]), out["wavelength"], axis=0)
    return result
