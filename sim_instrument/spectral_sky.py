"""The independent sky: physics the daemon's fitter does not share.

The reference sky of :mod:`sim_instrument.sky` evaluates Beer-Lambert at the channel
centre with the same simplifications as the fitter, so a fit recovers its V0 by
construction. This sky is built from other published formulations, spectrally
resolved and integrated over each channel's filter times the extraterrestrial
spectrum (:mod:`sim_instrument.filters`):

- Rayleigh: the Bodhaine et al. (1999) cross-section (eq. 29) times the column
  number of molecules ``P A / (m_a g)`` with ``g`` at the site's latitude and the
  mass-weighted height of its air column (eqs. 22-23); Kasten and Young (1989)
  air mass.
- Ozone: SPECTRL2's absorption coefficients (Bird and Riordan 1986, table 1, as
  shipped in pvlib) and SPECTRL2's ozone air mass (their eq. 2-10, after Iqbal 1983),
  not the fitter's Komhyr 22-km shell at the station's height.
- Aerosol: Angstrom law per wavelength, on the air mass of an exponential layer of
  scale height ``H_a`` above the station, integrated through spherical shells.
- Water vapour: SPECTRL2's absorption coefficients and transmittance (eq. 2-8), on
  the air mass of an exponential layer of scale height ``H_w``.
- Cloud: grey, on the Kasten-Young air mass.

Not modelled (say so where it matters): water vapour outside the 940-nm band
(:data:`WATER_VAPOUR_BAND_NM`); mixed-gas (O2, CO2) absorption, which has no
band at the channels used here; forward-scattered diffuse light in the field of
view; the refraction of the slant path through the layers (the shell integrals use
the apparent zenith); the temperature dependence of the ozone cross-section.

Units are in the names: nm, hPa, degrees, km, cm; optical depths are dimensionless.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pvlib

from sim_instrument.filters import Band

#: Avogadro's number [mol^-1] (CODATA value as used by Bodhaine et al. 1999).
AVOGADRO = 6.0221367e23
#: Earth radius for the layer air masses [km] (mean radius, common practice, no source).
EARTH_RADIUS_KM = 6371.0
#: Gauss-Laguerre nodes for the exponential-layer air mass (error below 1e-6 for
#: zenith angles up to 85 degrees, checked against a 2000-point trapezoid in tests).
LAGUERRE_NODES = 48


# ----------------------------------------------------------------------------- Rayleigh

def rayleigh_cross_section_cm2(wavelength_nm: np.ndarray | float) -> np.ndarray:
    """Rayleigh scattering cross-section per molecule of dry air, 360 ppm CO2 [cm^2].

    Bodhaine, B. A., Wood, N. B., Dutton, E. G. and Slusser, J. R. (1999), "On
    Rayleigh optical depth calculations", J. Atmos. Oceanic Technol. 16:1854-1861,
    eq. 29 (lambda in micrometres, result in 1e-28 cm^2).
    """
    lam = np.asarray(wavelength_nm, dtype=float) / 1000.0
    lam2 = lam * lam
    return 1e-28 * (1.0455996 - 341.29061 / lam2 - 0.90230850 * lam2) / (
        1.0 + 0.0027059889 / lam2 - 85.968563 * lam2)


def column_mass_weighted_height_m(elevation_m: float) -> float:
    """Mass-weighted height of the air column above a site [m].

    ``z_c = 0.73737 z + 5517.56`` (Bodhaine et al. 1999, the column-height fit given
    with eqs. 22-23 for the US Standard Atmosphere; from memory).
    """
    return 0.73737 * float(elevation_m) + 5517.56


def gravity_cm_s2(latitude_deg: float, height_m: float) -> float:
    """Acceleration of gravity at a latitude and height [cm s^-2].

    Bodhaine et al. (1999) eq. 22 (sea level, after List 1968) and eq. 23 (height
    ``z`` in metres).
    """
    c2 = np.cos(np.radians(2.0 * float(latitude_deg)))
    g0 = 980.6160 * (1.0 - 0.0026373 * c2 + 0.0000059 * c2 * c2)
    z = float(height_m)
    return float(g0 - (3.085462e-4 + 2.27e-7 * c2) * z + (7.254e-11 + 1.0e-13 * c2) * z * z
                 - (1.517e-17 + 6e-20 * c2) * z ** 3)


def dry_air_molar_mass_g_mol(co2_ppm: float = 360.0) -> float:
    """Mean molecular weight of dry air [g mol^-1]: ``15.0556 CO2 + 28.9595``.

    Bodhaine et al. (1999), with CO2 as a volume fraction (from memory).
    """
    return 15.0556 * co2_ppm * 1e-6 + 28.9595


def rayleigh_optical_depth(wavelength_nm: np.ndarray | float, pressure_hpa: np.ndarray | float,
                           latitude_deg: float, elevation_m: float) -> np.ndarray:
    """Rayleigh optical depth with the site's gravity, ``sigma P A / (m_a g)``.

    Parameters
    ----------
    wavelength_nm : float or array
    pressure_hpa : float or array
        Station pressure [hPa] (1 hPa = 1000 dyn cm^-2); broadcasts with the wavelength.
    latitude_deg, elevation_m : float
        Site; gravity is taken at the column's mass-weighted height above it.

    References
    ----------
    Bodhaine et al. (1999), eqs. 22-23 and 29 and the optical depth as a cross-section
    times the column of molecules. At 45 deg, sea level and 1013.25 hPa this equals
    their eq. 30 to 1e-4 (tests/test_sim_sky_independent.py).
    """
    g = gravity_cm_s2(latitude_deg, column_mass_weighted_height_m(elevation_m))
    p_dyn = np.asarray(pressure_hpa, dtype=float) * 1000.0
    return rayleigh_cross_section_cm2(wavelength_nm) * p_dyn * AVOGADRO / (
        dry_air_molar_mass_g_mol() * g)


# ----------------------------------------------------------------------------- SPECTRL2

@lru_cache(maxsize=1)
def _spectrl2_table() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """SPECTRL2 wavelengths [nm], water-vapour [cm^-1] and ozone [(atm-cm)^-1] coefficients.

    Bird and Riordan (1986), table 1, as pvlib ships it (private table of
    ``pvlib.spectrum.spectrl2``); checked for its shape so a pvlib change is loud.
    """
    try:
        from pvlib.spectrum.spectrl2 import _SPECTRL2_COEFFS as table
    except ImportError as exc:  # pragma: no cover - depends on the pvlib release
        raise RuntimeError("this pvlib has no SPECTRL2 coefficient table "
                           "(pvlib.spectrum.spectrl2._SPECTRL2_COEFFS); pin pvlib 0.10-0.13")\
            from exc
    if table.shape != (122,) or table["wavelength"][0] != 300.0:
        raise RuntimeError("unexpected SPECTRL2 table layout in pvlib; check the pin")
    return (np.asarray(table["wavelength"], dtype=float),
            np.asarray(table["water_vapor_absorption"], dtype=float),
            np.asarray(table["ozone_absorption"], dtype=float))


#: The water-vapour band the sky models [nm]: SPECTRL2's grid points 880 to 993.5 nm.
#: Outside it the absorption is set to 0: window channels (675, 870, 1020 nm) are
#: chosen to avoid water vapour (common practice, no source), and SPECTRL2's grid
#: (10 to 47 nm apart there) would smear the 720, 820 and 1100 nm bands' wings into
#: them by linear interpolation, which is an artefact of the grid, not the sky.
WATER_VAPOUR_BAND_NM = (880.0, 993.5)


def water_vapour_absorption_per_cm(wavelength_nm: np.ndarray) -> np.ndarray:
    """SPECTRL2 water-vapour absorption coefficient, linear between its grid points [cm^-1].

    Zero outside :data:`WATER_VAPOUR_BAND_NM`.
    """
    wl, aw, _ = _spectrl2_table()
    x = np.asarray(wavelength_nm, dtype=float)
    lo, hi = WATER_VAPOUR_BAND_NM
    return np.where((x < lo) | (x > hi), 0.0, np.interp(x, wl, aw))


def ozone_absorption_per_atm_cm(wavelength_nm: np.ndarray) -> np.ndarray:
    """SPECTRL2 ozone absorption coefficient, linear between its grid points [(atm-cm)^-1]."""
    wl, _, ao = _spectrl2_table()
    return np.interp(np.asarray(wavelength_nm, dtype=float), wl, ao)


def water_vapour_transmittance(absorption_per_cm: np.ndarray, precipitable_water_cm,
                               airmass) -> np.ndarray:
    """SPECTRL2 water-vapour transmittance ``exp(-0.2385 aWM / (1 + 20.07 aWM)^0.45)``.

    Bird and Riordan (1986), eq. 2-8; every argument broadcasts.
    """
    x = np.asarray(absorption_per_cm, dtype=float) * np.asarray(precipitable_water_cm,
                                                                 dtype=float) * np.asarray(
        airmass, dtype=float)
    return np.exp(-0.2385 * x / (1.0 + 20.07 * x) ** 0.45)


def ozone_airmass_spectrl2(apparent_zenith_deg) -> np.ndarray:
    """SPECTRL2 ozone air mass ``(1 + h/6370) / sqrt(cos^2 z + 2 h/6370)``, h = 22 km.

    Bird and Riordan (1986), eq. 2-10 (after Iqbal 1983). It has no station height.
    """
    z = np.radians(np.asarray(apparent_zenith_deg, dtype=float))
    h = 22.0 / 6370.0
    return (1.0 + h) / np.sqrt(np.cos(z) ** 2 + 2.0 * h)


# ----------------------------------------------------------------------------- layers

@lru_cache(maxsize=4)
def _laguerre(n: int) -> tuple[np.ndarray, np.ndarray]:
    return np.polynomial.laguerre.laggauss(n)


def exponential_layer_airmass(zenith_deg, scale_height_km: float,
                              station_height_km: float = 0.0) -> np.ndarray:
    """Relative air mass of an absorber whose density falls as exp(-h / H) above the station.

    ``m = int_0^inf exp(-u) (r0 + uH) / sqrt((r0 + uH)^2 - r0^2 sin^2 z) du`` with
    ``r0 = R + station height``: the slant path through spherical shells, unrefracted,
    weighted by the density (the integral of a straight ray through a spherically
    stratified layer; e.g. Kasten 1965 uses the same construction for the whole
    atmosphere, from memory). Gauss-Laguerre quadrature; NaN above 90 degrees.

    Parameters
    ----------
    zenith_deg : float or array
        Zenith angle of the ray at the station [degrees].
    scale_height_km : float
        Scale height of the absorber [km], positive.
    station_height_km : float
        Station height above sea level [km].
    """
    z = np.asarray(zenith_deg, dtype=float)
    u, w = _laguerre(LAGUERRE_NODES)
    r0 = EARTH_RADIUS_KM + station_height_km
    s2 = np.sin(np.radians(np.minimum(z, 90.0)))[..., None] ** 2
    r = r0 + u * scale_height_km
    m = (w * r / np.sqrt(r * r - r0 * r0 * s2)).sum(axis=-1)
    return np.where(z > 90.0, np.nan, m)


# ----------------------------------------------------------------------------- the sky

@dataclass(frozen=True)
class SkyState:
    """What the sky is at a set of times (arrays of one value per time)."""

    apparent_zenith_deg: np.ndarray
    pressure_hpa: np.ndarray
    tau_500: np.ndarray  # aerosol optical depth at 500 nm
    angstrom_alpha: float
    ozone_du: float
    precipitable_water_cm: np.ndarray
    tau_cloud: np.ndarray  # grey


@dataclass(frozen=True)
class SkyConstants:
    """The site and the layer heights of the independent sky."""

    latitude_deg: float
    elevation_m: float
    aerosol_scale_height_km: float
    water_vapour_scale_height_km: float


@dataclass(frozen=True)
class BandResult:
    """One channel's band-weighted transmittance and its parts, one value per time.

    ``transmittance`` is what multiplies ``V0 (r0/r)^2``. The ``tau_*`` are the
    band-weighted vertical optical depths (weighted by filter x spectrum); the
    ``effective_*`` the optical depth a straight Langley would see per Kasten-Young
    air mass, ``-ln(T) / m``, for the whole and for each part taken alone.
    """

    transmittance: np.ndarray
    tau_rayleigh: np.ndarray
    tau_ozone: np.ndarray
    tau_aerosol: np.ndarray
    tau_cloud: np.ndarray
    transmittance_water_vapour: np.ndarray
    airmass_kasten_young: np.ndarray
    airmass_ozone: np.ndarray
    airmass_aerosol: np.ndarray
    airmass_water_vapour: np.ndarray
    effective_total: np.ndarray


def airmasses(state: SkyState, k: SkyConstants) -> dict[str, np.ndarray]:
    """Air mass of each absorber at the state's apparent zenith [dimensionless]."""
    z = state.apparent_zenith_deg
    h = k.elevation_m / 1000.0
    return {
        "kasten_young": np.asarray(pvlib.atmosphere.get_relative_airmass(
            z, model="kastenyoung1989"), dtype=float),
        "ozone": ozone_airmass_spectrl2(z),
        "aerosol": exponential_layer_airmass(z, k.aerosol_scale_height_km, h),
        "water_vapour": exponential_layer_airmass(z, k.water_vapour_scale_height_km, h),
    }


def band_transmittance(band: Band, state: SkyState, k: SkyConstants,
                       masses: dict[str, np.ndarray] | None = None) -> BandResult:
    """Band-weighted direct-beam transmittance of one channel at every time of ``state``."""
    m = masses if masses is not None else airmasses(state, k)
    wl = band.wavelength_nm[None, :]
    p = state.pressure_hpa[:, None]
    tau_r = rayleigh_optical_depth(wl, p, k.latitude_deg, k.elevation_m)
    tau_o = ozone_absorption_per_atm_cm(wl) * (state.ozone_du / 1000.0)
    tau_a = state.tau_500[:, None] * (wl / 500.0) ** (-state.angstrom_alpha)
    tau_c = state.tau_cloud[:, None]
    m_ky = np.nan_to_num(m["kasten_young"], nan=np.inf)[:, None]
    m_o = np.nan_to_num(m["ozone"], nan=np.inf)[:, None]
    m_a = np.nan_to_num(m["aerosol"], nan=np.inf)[:, None]
    m_w = np.nan_to_num(m["water_vapour"], nan=np.inf)[:, None]
    t_wv = water_vapour_transmittance(water_vapour_absorption_per_cm(wl),
                                      state.precipitable_water_cm[:, None], m_w)
    with np.errstate(invalid="ignore", over="ignore"):
        mono = np.exp(-(tau_r * m_ky + tau_o * m_o + tau_a * m_a + tau_c * m_ky)) * t_wv
        t = band.mean(mono)
        eff = -np.log(t) / m["kasten_young"]
    return BandResult(
        transmittance=np.nan_to_num(t, nan=0.0),
        tau_rayleigh=band.mean(tau_r),
        tau_ozone=np.full(len(state.pressure_hpa), float(band.mean(tau_o[0]))),
        tau_aerosol=band.mean(tau_a),
        tau_cloud=state.tau_cloud.astype(float),
        transmittance_water_vapour=band.mean(np.broadcast_to(t_wv, mono.shape)),
        airmass_kasten_young=m["kasten_young"], airmass_ozone=m["ozone"],
        airmass_aerosol=m["aerosol"], airmass_water_vapour=m["water_vapour"],
        effective_total=eff)
