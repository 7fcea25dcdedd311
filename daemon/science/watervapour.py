"""Water-vapour constants of the modified Langley, from the channel's filter.

A filter radiometer's band-averaged water-vapour transmittance is not an exponential
in air mass; the modified Langley writes it ``T_w = exp(-a (m W)^b)`` with ``m`` the
air mass and ``W`` the precipitable water [cm], so that ``ln V + (known extinctions)``
is a straight line in ``m^b`` with intercept ``ln V0``. The constants belong to the
filter: ``a`` and ``b`` are fitted to ``ln(-ln T_w)`` against ``ln(m W)`` where
``T_w`` is the band average of a published absorption model over the filter x
extraterrestrial spectrum, for the site's pressure and the columns expected
(Reagan, J. A. et al. 1995, "Assessment of atmospheric limitations on the
determination of the solar spectral constant from ground-based spectroradiometer
measurements", IEEE Trans. Geosci. Remote Sens. 24:258, and Schmid, B. et al. 2001,
"Comparison of columnar water-vapor measurements from solar transmittance methods",
Applied Optics 40:1886-1896, describe the practice; citations from memory).

The absorption model is SPECTRL2's (Bird, R. E. and Riordan, C. 1986, J. Climate
Appl. Meteor. 25:87-97, eq. 2-8 and table 1 as shipped in pvlib). It has no pressure
broadening, so pressure enters only through the Rayleigh weighting across the band;
that limitation, and the model's own error against line-by-line spectroscopy, is
something no session can see.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np

from daemon.config.filterfile import FilterSpec
from daemon.science.atmosphere import rayleigh_optical_depth
from daemon.science.filters import solar_weights

#: Pressure spread over which ``b`` is derived, as a fraction of the site's pressure
#: (weather and tide at a mountain site stay within a few per cent: common practice,
#: no source).
PRESSURE_SPREAD = 0.03
#: Grid of the derivation: air masses and columns per axis.
GRID_POINTS = 9


@dataclass(frozen=True)
class WaterVapourConstants:
    """``T_w = exp(-a (m W)^b)`` for one filter, with standard uncertainties.

    ``u_b`` combines the spread of ``b`` fitted column by column over the range and
    across the pressure spread with the standard error of the fit; ``u_a`` likewise.
    ``max_residual`` is the largest misfit of the power law in ``ln T_w`` over the grid.
    """

    a: float
    b: float
    u_a: float
    u_b: float
    airmass_range: tuple[float, float]
    column_range_cm: tuple[float, float]
    pressure_hpa: float
    max_residual: float

    def transmittance(self, slant_column_cm: np.ndarray) -> np.ndarray:
        return np.exp(-self.a * np.asarray(slant_column_cm, dtype=float) ** self.b)

    def column_cm(self, slant_absorption: np.ndarray, airmass: np.ndarray) -> np.ndarray:
        """Precipitable water [cm] from ``-ln T_w`` at each air mass (NaN where <= 0)."""
        x = np.asarray(slant_absorption, dtype=float)
        with np.errstate(invalid="ignore", divide="ignore"):
            w = np.where(x > 0, (x / self.a) ** (1.0 / self.b), np.nan) / np.asarray(
                airmass, dtype=float)
        return w


def water_vapour_airmass(apparent_zenith_deg) -> np.ndarray:
    """Relative air mass of water vapour, Kasten (1965).

    ``m_w = 1 / (cos z + 0.0548 (92.65 - z)^-1.452)``, z the apparent zenith [degrees]:
    water vapour sits low, so its slant path grows faster towards the horizon than the
    whole atmosphere's (at 80 degrees 5.71 against Kasten-Young's 5.59). Kasten, F.
    (1965), "A new table and approximation formula for the relative optical air mass",
    Arch. Meteor. Geophys. Bioklim. B14:206-223 (coefficients from memory, as quoted
    for water vapour by Gueymard's SMARTS model). NaN above 90 degrees.
    """
    z = np.asarray(apparent_zenith_deg, dtype=float)
    with np.errstate(invalid="ignore"):
        m = 1.0 / (np.cos(np.radians(z)) + 0.0548 * (92.65 - z) ** -1.452)
    return np.where(z <= 90.0, m, np.nan)


def water_vapour_airmass_from_kasten_young(airmass) -> np.ndarray:
    """:func:`water_vapour_airmass` at the zenith of a Kasten-Young air mass."""
    from daemon.science.atmosphere import zenith_from_kasten_young

    return water_vapour_airmass(zenith_from_kasten_young(np.asarray(airmass, dtype=float)))


@lru_cache(maxsize=1)
def _spectrl2_water() -> tuple[np.ndarray, np.ndarray]:
    """SPECTRL2 wavelengths [nm] and water-vapour absorption coefficients [cm^-1]."""
    from pvlib.spectrum.spectrl2 import _SPECTRL2_COEFFS as table  # pvlib's copy of table 1

    return (np.asarray(table["wavelength"], dtype=float),
            np.asarray(table["water_vapor_absorption"], dtype=float))


def spectral_transmittance(wavelength_nm: np.ndarray, slant_column_cm: np.ndarray) -> np.ndarray:
    """SPECTRL2 monochromatic water-vapour transmittance, shape (columns, wavelengths).

    ``exp(-0.2385 a_w mW / (1 + 20.07 a_w mW)^0.45)`` (Bird and Riordan 1986, eq. 2-8),
    with ``a_w`` interpolated linearly in SPECTRL2's table.
    """
    wl, aw = _spectrl2_water()
    x = np.asarray(slant_column_cm, dtype=float)[..., None] * np.interp(wavelength_nm, wl, aw)
    return np.exp(-0.2385 * x / (1.0 + 20.07 * x) ** 0.45)


def band_transmittance(spec: FilterSpec, airmass: np.ndarray, column_cm: np.ndarray,
                       pressure_hpa: float) -> np.ndarray:
    """Band-averaged water-vapour transmittance at each (air mass, column) pair.

    The average is weighted by filter x extraterrestrial spectrum x the Rayleigh
    transmittance at the pressure, i.e. what the channel sees divided by what it would
    see without water vapour.
    """
    grid, w = solar_weights(spec)
    m = np.asarray(airmass, dtype=float)
    weights = w * np.exp(-np.outer(m, rayleigh_optical_depth(grid, pressure_hpa)))
    t = spectral_transmittance(grid, m * np.asarray(column_cm, dtype=float))
    return (t * weights).sum(axis=-1) / weights.sum(axis=-1)


def _power_law(airmass: np.ndarray, column_cm: np.ndarray, t: np.ndarray
               ) -> tuple[float, float, float, float, float]:
    """Fit ln(-ln T) = ln a + b ln(mW): a, b, se(ln a), se(b), max residual in ln T."""
    x = np.log(airmass * column_cm)
    y = np.log(-np.log(t))
    design = np.column_stack([np.ones_like(x), x])
    coef, *_ = np.linalg.lstsq(design, y, rcond=None)
    resid = y - design @ coef
    dof = max(len(x) - 2, 1)
    cov = np.linalg.inv(design.T @ design) * float(resid @ resid) / dof
    a, b = math.exp(coef[0]), float(coef[1])
    misfit = float(np.max(np.abs(np.log(t) + a * (airmass * column_cm) ** b)))
    return a, b, math.sqrt(cov[0, 0]), math.sqrt(cov[1, 1]), misfit


def derive_constants(spec: FilterSpec, pressure_hpa: float,
                     airmass_range: tuple[float, float],
                     column_range_cm: tuple[float, float]) -> WaterVapourConstants:
    """Fit ``a``, ``b`` over an air-mass window and a column range, with uncertainties.

    Parameters
    ----------
    spec : FilterSpec
        The channel's filter.
    pressure_hpa : float
        Site pressure [hPa].
    airmass_range : (float, float)
        Air masses of the fit window.
    column_range_cm : (float, float)
        Precipitable water expected [cm], both positive.

    The central ``a``, ``b`` come from the whole grid (air masses linear, columns
    logarithmic, :data:`GRID_POINTS` each) at the site's pressure. ``u_b`` is the root
    sum of squares of the rms departure of ``b`` fitted at each column alone, of half
    the change of ``b`` across +/- :data:`PRESSURE_SPREAD` in pressure, and of the
    fit's standard error; ``u_a`` the same for ``a`` (relative, times ``a``).
    """
    (m_lo, m_hi), (w_lo, w_hi) = airmass_range, column_range_cm
    if not (0 < m_lo < m_hi and 0 < w_lo <= w_hi):
        raise ValueError(f"need 0 < airmass_min < airmass_max and 0 < column_min <= "
                         f"column_max, got {airmass_range} and {column_range_cm}")
    masses = np.linspace(m_lo, m_hi, GRID_POINTS)
    columns = np.geomspace(w_lo, w_hi, GRID_POINTS) if w_hi > w_lo else np.array([w_lo])
    mm, ww = (g.ravel() for g in np.meshgrid(masses, columns))

    def fit_at(p: float, mask: np.ndarray | None = None):
        t = band_transmittance(spec, mm, ww, p)
        if mask is None:
            return _power_law(mm, ww, t)
        return _power_law(mm[mask], ww[mask], t[mask])

    a, b, se_ln_a, se_b, misfit = fit_at(pressure_hpa)
    per_column = [fit_at(pressure_hpa, ww == w) for w in columns] if len(columns) > 1 else []
    spread_b = math.sqrt(np.mean([(f[1] - b) ** 2 for f in per_column])) if per_column else 0.0
    spread_ln_a = math.sqrt(np.mean([(math.log(f[0] / a)) ** 2 for f in per_column])) \
        if per_column else 0.0
    hi = fit_at(pressure_hpa * (1.0 + PRESSURE_SPREAD))
    lo = fit_at(pressure_hpa * (1.0 - PRESSURE_SPREAD))
    dp_b = abs(hi[1] - lo[1]) / 2.0
    dp_ln_a = abs(math.log(hi[0] / lo[0])) / 2.0
    u_b = math.sqrt(spread_b ** 2 + dp_b ** 2 + se_b ** 2)
    u_a = a * math.sqrt(spread_ln_a ** 2 + dp_ln_a ** 2 + se_ln_a ** 2)
    return WaterVapourConstants(a=a, b=b, u_a=u_a, u_b=u_b,
                                airmass_range=(float(m_lo), float(m_hi)),
                                column_range_cm=(float(w_lo), float(w_hi)),
                                pressure_hpa=float(pressure_hpa), max_residual=misfit)


@lru_cache(maxsize=32)
def channel_constants(spec: FilterSpec, pressure_hpa: float, airmass_range: tuple[float, float],
                      column_range_cm: tuple[float, float]) -> WaterVapourConstants:
    """:func:`derive_constants`, cached (the filter spec is hashable)."""
    return derive_constants(spec, pressure_hpa, airmass_range, column_range_cm)


def precipitable_water_cm(signal_v: float, v0_1au_v: float, earth_sun_factor: float,
                          airmass: float, ozone_airmass: float, tau_rayleigh: float,
                          tau_ozone: float, tau_aerosol: float,
                          constants: WaterVapourConstants) -> float:
    """Precipitable water [cm] of one measurement of a calibrated water-vapour channel.

    ``W = ([ln(V0 f / V) - tau_R m - tau_O3 m_O3 - tau_a m] / a)^(1/b) / m_w`` with
    ``m`` the Kasten-Young air mass (Rayleigh and aerosol), ``m_O3`` the ozone air mass
    and ``m_w`` the water-vapour air mass (Kasten 1965) at the same zenith; NaN when
    the water-vapour absorption left is not positive.
    """
    slant = math.log(v0_1au_v * earth_sun_factor / signal_v) - tau_rayleigh * airmass - \
        tau_ozone * ozone_airmass - tau_aerosol * airmass
    if not slant > 0.0:
        return math.nan
    m_w = float(water_vapour_airmass_from_kasten_young(np.array([airmass]))[0])
    return (slant / constants.a) ** (1.0 / constants.b) / m_w


def water_vapour_channels(config, v0: dict) -> list:
    """Calibrated water-vapour channels with a filter: those that give a column."""
    return [c for c in config.channels if c.water_vapour and c.name in v0
            and c.filter is not None and c.filter.given]


def point_water(p, channels, config, v0: dict, window_aod: dict, calibration_id: int,
                aerosol_at) -> list:
    """``aod`` table rows of one measurement's calibrated water-vapour channels.

    Each row carries the precipitable water [cm] (:func:`precipitable_water_cm`) and
    a None ``aod``; the aerosol at the channel comes from the same measurement's
    unflagged window AODs through ``aerosol_at(wavelength_nm, {nm: aod})`` (the
    session fit's Angstrom interpolation, :func:`daemon.science.sessionfit.aerosol_at`).
    """
    from daemon.science.atmosphere import ozone_airmass, rayleigh_optical_depth
    from daemon.science.ozone import channel_cross_section_cm2, ozone_optical_depth
    from daemon.science.screening import point_signal

    m, esf = p.airmass, p.earth_sun_factor
    if not channels or m is None or not m > 0 or esf is None or not esf > 0:
        return []
    aerosol = {r["wavelength_nm"]: r["aod"] for r in window_aod.values()
               if not r["flag"] and r["aod"] is not None and r["aod"] > 0}
    rows = []
    for c in channels:
        ps = point_signal(p, c, config)
        tau_a = aerosol_at(c.wavelength_nm, aerosol)
        if ps.signal_v is None or not ps.signal_v > 0 or ps.screened is not None or \
                tau_a is None:
            continue
        pressure = (p.housekeeping.pressure_hpa if p.housekeeping is not None and
                    p.housekeeping.pressure_hpa is not None else p.pressure_hpa)
        if pressure is None:
            pressure = config.site.pressure_hpa or 1013.25
        m_o3 = p.ozone_airmass if p.ozone_airmass is not None else float(
            ozone_airmass(p.apparent_zenith_deg, config.site.elevation_m))
        sigma = channel_cross_section_cm2(c)
        tau_o3 = 0.0 if sigma is None else ozone_optical_depth(sigma, config.site.ozone_du)
        tau_r = float(rayleigh_optical_depth(c.wavelength_nm, pressure))
        k = channel_constants(c.filter, round(float(pressure)), (config.fit.airmass_min,
                                                                 config.fit.airmass_max),
                              c.water_vapour_range_cm)
        cal = v0[c.name]
        w = precipitable_water_cm(ps.signal_v, cal["v0_1au"], esf, m, m_o3, tau_r, tau_o3,
                                  tau_a[0], k)
        rows.append({
            "measurement_id": p.measurement_id, "channel": c.name,
            "calibration_id": calibration_id, "wavelength_nm": c.wavelength_nm,
            "aod": None, "aod_unc": None,
            "tau_total": math.log(cal["v0_1au"] * esf / ps.signal_v) / m,
            "tau_rayleigh": tau_r, "tau_ozone": tau_o3, "airmass": m, "ozone_airmass": m_o3,
            "pressure_hpa": pressure, "flag": None, "precipitable_water_cm": w,
        })
    return rows
