"""The Langley-versus-lamp check: V0 at 1 AU over the absolute responsivity.

A channel whose absolute responsivity is known from a lamp calibration turns its
Langley V0 at 1 AU into the extraterrestrial spectral irradiance it saw; the ratio
to a reference solar spectrum's band mean tells whether the two calibrations agree.
"""

from __future__ import annotations

import math

import numpy as np

from daemon.science.filters import (
    astm_filter_mean_w_m2_nm,
    astm_g173_extraterrestrial,
    channel_filter,
)

_trapezoid = getattr(np, "trapezoid", None) or np.trapz  # numpy < 2 has only trapz


def astm_g173_band_mean_w_m2_nm(wavelength_nm: float, bandwidth_nm: float) -> float:
    """Mean extraterrestrial spectral irradiance at 1 AU over a rectangular band.

    Parameters
    ----------
    wavelength_nm : float
        Band centre [nm], 280 to 4000 nm.
    bandwidth_nm : float
        Full band width [nm], positive.

    Returns
    -------
    float
        Band mean [W m^-2 nm^-1], trapezoidal integration of the tabulated values
        with linear interpolation at the band edges.

    References
    ----------
    ASTM G173-03, "Standard tables for reference solar spectral irradiances",
    extraterrestrial column, as shipped with pvlib (``data/ASTMG173.csv``, read by
    ``pvlib.spectrum.get_reference_spectra``).
    """
    if not (math.isfinite(bandwidth_nm) and bandwidth_nm > 0):
        raise ValueError(f"bandwidth_nm must be a positive number of nm, got {bandwidth_nm!r}")
    wl, e0 = astm_g173_extraterrestrial()
    lo, hi = wavelength_nm - bandwidth_nm / 2.0, wavelength_nm + bandwidth_nm / 2.0
    if lo < wl[0] or hi > wl[-1]:
        raise ValueError(f"ASTM G173 covers {wl[0]:g} to {wl[-1]:g} nm; the band "
                         f"{lo:g} to {hi:g} nm is outside it")
    inside = (wl > lo) & (wl < hi)
    x = np.concatenate(([lo], wl[inside], [hi]))
    y = np.concatenate(([np.interp(lo, wl, e0)], e0[inside], [np.interp(hi, wl, e0)]))
    return float(_trapezoid(y, x) / bandwidth_nm)


def lamp_check(v0_1au_v: float, channel) -> tuple[float, float, float] | None:
    """Extraterrestrial irradiance from a Langley V0 and its ratio to ASTM G173.

    The reference is the ASTM G173 extraterrestrial spectrum weighted by the channel's
    filter function (:func:`daemon.science.filters.astm_filter_mean_w_m2_nm`; the
    default filter is a Gaussian of FWHM ``bandwidth_nm``).

    Parameters
    ----------
    v0_1au_v : float
        V0 at 1 AU [V].
    channel : daemon.config.settings.Channel
        ``responsivity_v_per_w_m2_nm`` [V per W m^-2 nm^-1] and its filter.

    Returns
    -------
    (e0_1au, astm_band_mean, ratio) or None
        Irradiance at 1 AU implied by the Langley V0 [W m^-2 nm^-1], the
        filter-weighted ASTM G173 mean [W m^-2 nm^-1] and their ratio; None without a
        responsivity or a finite V0, or for a filter outside the ASTM table.
    """
    resp = channel.responsivity_v_per_w_m2_nm
    if resp is None or v0_1au_v is None or not math.isfinite(v0_1au_v):
        return None
    try:
        ref = astm_filter_mean_w_m2_nm(channel_filter(channel))
    except ValueError:
        return None
    e0 = float(v0_1au_v) / float(resp)
    return e0, ref, e0 / ref


def lamp_note(check: tuple[float, float, float]) -> str:
    """The one-line note of a Langley-versus-lamp check."""
    e0, ref, ratio = check
    return (f"Langley versus lamp: V0 at 1 AU over the responsivity gives {e0:.4f} "
            f"W m-2 nm-1, {ratio:.4f} times the filter-weighted ASTM G173 mean {ref:.4f}")
