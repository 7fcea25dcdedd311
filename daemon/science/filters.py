"""Filter functions as the science needs them: sampled, weighted by the solar spectrum.

The configuration reads a channel's filter (:mod:`daemon.config.filterfile`); here it
becomes a response on a wavelength grid and integration weights over the ASTM G173
extraterrestrial spectrum, for the lamp check (the filter-weighted band mean) and for
the water-vapour constants (:mod:`daemon.science.watervapour`).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from daemon.config.filterfile import FilterSpec, gaussian_spec

#: A Gaussian is sampled out to this many FWHM either side of its centre.
GAUSSIAN_REACH_FWHM = 2.5


@lru_cache(maxsize=1)
def astm_g173_extraterrestrial() -> tuple[np.ndarray, np.ndarray]:
    """ASTM G173-03 extraterrestrial column: wavelength [nm], irradiance [W m^-2 nm^-1].

    ASTM G173-03, "Standard tables for reference solar spectral irradiances", as
    shipped with pvlib (``data/ASTMG173.csv``, ``pvlib.spectrum.get_reference_spectra``).
    """
    import pvlib  # heavy: only when a band integral is needed

    spectra = pvlib.spectrum.get_reference_spectra(standard="ASTM G173-03")
    return (spectra.index.to_numpy(dtype=float),
            spectra["extraterrestrial"].to_numpy(dtype=float))


def channel_filter(channel) -> FilterSpec:
    """The channel's filter, or the default Gaussian (FWHM = bandwidth) when it has none."""
    spec = getattr(channel, "filter", None)
    return spec if spec is not None else gaussian_spec(channel.wavelength_nm,
                                                       channel.bandwidth_nm, given=False)


def sampled_response(spec: FilterSpec) -> tuple[np.ndarray, np.ndarray]:
    """The filter's relative response on a grid: wavelength [nm], response (peak 1)."""
    if spec.kind == "file":
        return np.asarray(spec.wavelength_nm, dtype=float), np.asarray(spec.response,
                                                                       dtype=float)
    fwhm = float(spec.fwhm_nm)
    reach = GAUSSIAN_REACH_FWHM * fwhm
    n = 2 * int(math.ceil(reach / min(0.5, fwhm / 10.0))) + 1
    wl = spec.centre_nm + np.linspace(-reach, reach, n)
    return wl, np.exp(-4.0 * math.log(2.0) * ((wl - spec.centre_nm) / fwhm) ** 2)


def solar_weights(spec: FilterSpec) -> tuple[np.ndarray, np.ndarray]:
    """Wavelengths [nm] and weights (sum 1) of response x ASTM G173 extraterrestrial.

    A band-weighted mean of any spectral quantity ``q`` on the same grid is
    ``weights @ q``. The grid is the filter's own plus the ASTM points inside it,
    each carrying its trapezoid share. Raises ValueError outside the ASTM table.
    """
    wl_f, resp = sampled_response(spec)
    wl_e, e0 = astm_g173_extraterrestrial()
    if wl_f[0] < wl_e[0] or wl_f[-1] > wl_e[-1]:
        raise ValueError(f"the filter ({spec.source}) spans {wl_f[0]:g}-{wl_f[-1]:g} nm, "
                         f"beyond ASTM G173's {wl_e[0]:g}-{wl_e[-1]:g} nm")
    grid = np.union1d(wl_f, wl_e[(wl_e > wl_f[0]) & (wl_e < wl_f[-1])])
    share = np.zeros_like(grid)
    half = np.diff(grid) / 2.0
    share[1:] += half
    share[:-1] += half
    w = share * np.interp(grid, wl_f, resp) * np.interp(grid, wl_e, e0)
    return grid, w / w.sum()


def astm_filter_mean_w_m2_nm(spec: FilterSpec) -> float:
    """Filter-weighted mean of the ASTM G173 extraterrestrial irradiance [W m^-2 nm^-1].

    ``int R E0 dl / int R dl`` by the trapezoid rule on :func:`solar_weights`' grid:
    what a channel of absolute responsivity ``V per (W m^-2 nm^-1)`` (referred to the
    response-weighted irradiance) reads at the top of the atmosphere at 1 AU.
    """
    wl_f, resp = sampled_response(spec)
    wl_e, e0 = astm_g173_extraterrestrial()
    grid, _ = solar_weights(spec)
    r = np.interp(grid, wl_f, resp)
    trapezoid = getattr(np, "trapezoid", None) or np.trapz  # numpy < 2 has only trapz
    return float(trapezoid(r * np.interp(grid, wl_e, e0), grid) / trapezoid(r, grid))
