"""Filter functions of the simulated radiometer's channels.

A channel's spectral response is either a Gaussian (centre and full width at half
maximum) or a two-column CSV file (``wavelength_nm,relative_response``). The sky
integrates every extinction over the response times the extraterrestrial spectrum
(ASTM G173-03, pvlib's copy), so a channel's signal is the band-weighted mean of the
monochromatic transmittances, not the transmittance at its centre.

This module is the simulator's own: the daemon has its own filter reader
(``daemon/science/filters.py``) and never imports this one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np
import pvlib

from drivers.filtertable import FilterFileError, read_filter_table

_trapezoid = getattr(np, "trapezoid", None) or np.trapz  # numpy < 2 has only trapz

#: A Gaussian filter is sampled over centre +/- this many FWHM (the response there is
#: 2^-(2*2.5)^2 ~ 3e-8 of the peak: nothing left to integrate).
GAUSSIAN_HALF_SPAN_FWHM = 2.5
#: Sampling step of a Gaussian filter [nm]: 0.1 FWHM, at most 0.5 nm.
GAUSSIAN_MAX_STEP_NM = 0.5


class FilterError(ValueError):
    """A filter file or filter description is wrong; the message says where and why."""


@dataclass(frozen=True)
class Filter:
    """Relative spectral response on a wavelength grid [nm], peak normalised to 1."""

    wavelength_nm: np.ndarray
    response: np.ndarray
    description: str

    @property
    def centroid_nm(self) -> float:
        """Response-weighted mean wavelength [nm]."""
        return float(_trapezoid(self.response * self.wavelength_nm, self.wavelength_nm)
                     / _trapezoid(self.response, self.wavelength_nm))


def gaussian(centre_nm: float, fwhm_nm: float) -> Filter:
    """A Gaussian filter of centre and full width at half maximum [nm]."""
    for name, value in (("centre_nm", centre_nm), ("fwhm_nm", fwhm_nm)):
        if isinstance(value, bool) or not isinstance(value, int | float) or not \
                math.isfinite(value) or value <= 0:
            raise FilterError(f"{name} must be a positive number of nm, got {value!r}")
    step = min(GAUSSIAN_MAX_STEP_NM, fwhm_nm / 10.0)
    half = GAUSSIAN_HALF_SPAN_FWHM * fwhm_nm
    n = int(math.ceil(2.0 * half / step)) + 1
    wl = np.linspace(centre_nm - half, centre_nm + half, n)
    sigma = fwhm_nm / (2.0 * math.sqrt(2.0 * math.log(2.0)))
    return Filter(wl, np.exp(-0.5 * ((wl - centre_nm) / sigma) ** 2),
                  f"Gaussian {centre_nm:g} nm, FWHM {fwhm_nm:g} nm")


def load_filter_csv(path: str | Path) -> Filter:
    """Read a filter table file (format and checks: :mod:`drivers.filtertable`)."""
    try:
        wl, resp = read_filter_table(Path(path))
    except FilterFileError as exc:
        raise FilterError(str(exc)) from None
    return Filter(np.asarray(wl), np.asarray(resp), f"file {path}")


@lru_cache(maxsize=1)
def astm_g173_extraterrestrial() -> tuple[np.ndarray, np.ndarray]:
    """ASTM G173-03 extraterrestrial spectrum at 1 AU: wavelength [nm], [W m^-2 nm^-1]."""
    spectra = pvlib.spectrum.get_reference_spectra(standard="ASTM G173-03")
    return (spectra.index.to_numpy(dtype=float),
            spectra["extraterrestrial"].to_numpy(dtype=float))


@dataclass(frozen=True)
class Band:
    """Integration weights of one channel: response x extraterrestrial spectrum.

    ``weight`` sums to 1 over ``wavelength_nm`` (trapezoid weights folded in), so a
    band-weighted mean of any spectral quantity ``q`` is ``(weight * q).sum()``.
    """

    wavelength_nm: np.ndarray
    weight: np.ndarray
    filter: Filter

    def mean(self, spectral: np.ndarray) -> np.ndarray:
        """Band-weighted mean over the last axis of ``spectral`` (one value per grid point)."""
        return np.asarray(spectral, dtype=float) @ self.weight


def band(filt: Filter) -> Band:
    """Integration weights of a filter over the ASTM G173 extraterrestrial spectrum.

    The grid is the filter's own plus the ASTM grid points inside it; the spectrum is
    interpolated linearly. Raises FilterError outside 280-4000 nm.
    """
    wl_e, e0 = astm_g173_extraterrestrial()
    lo, hi = float(filt.wavelength_nm[0]), float(filt.wavelength_nm[-1])
    if lo < wl_e[0] or hi > wl_e[-1]:
        raise FilterError(f"{filt.description}: spans {lo:g}-{hi:g} nm, outside the "
                          f"ASTM G173 spectrum ({wl_e[0]:g}-{wl_e[-1]:g} nm)")
    grid = np.union1d(filt.wavelength_nm, wl_e[(wl_e > lo) & (wl_e < hi)])
    f = np.interp(grid, filt.wavelength_nm, filt.response) * np.interp(grid, wl_e, e0)
    # Trapezoid weights of the grid: each point carries half of each neighbouring interval.
    dx = np.diff(grid)
    w = np.zeros_like(grid)
    w[:-1] += dx / 2.0
    w[1:] += dx / 2.0
    w = w * f
    return Band(grid, w / w.sum(), filt)


def band_extraterrestrial_w_m2_nm(filt: Filter) -> float:
    """Response-weighted mean ASTM G173 extraterrestrial irradiance [W m^-2 nm^-1]."""
    wl_e, e0 = astm_g173_extraterrestrial()
    b = band(filt)
    r = np.interp(b.wavelength_nm, filt.wavelength_nm, filt.response)
    e = np.interp(b.wavelength_nm, wl_e, e0)
    return float(_trapezoid(r * e, b.wavelength_nm) / _trapezoid(r, b.wavelength_nm))
