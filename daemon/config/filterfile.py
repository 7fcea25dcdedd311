"""A channel's filter function as the configuration gives it (standard library only).

``filter: {file: filters/xyz.csv}`` names a two-column CSV file of wavelength [nm] and
relative response, with the header ``wavelength_nm,relative_response``, its path
relative to the configuration file; ``filter: {centre_nm: .., fwhm_nm: ..}`` is a
Gaussian. Without ``filter:`` the channel's ``wavelength_nm`` and ``bandwidth_nm`` make
a Gaussian (FWHM = bandwidth) with ``given`` false: good enough for the lamp check,
not for deriving water-vapour constants (``daemon.science.watervapour``).

The file format and its checks (each message names the line) are
:mod:`drivers.filtertable`'s.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from drivers.filtertable import FilterFileError, read_filter_table

__all__ = ["FilterFileError", "FilterSpec", "gaussian_spec", "read_filter_spec"]

@dataclass(frozen=True)
class FilterSpec:
    """A filter function: a table (``wavelength_nm`` ascending, ``response``), or a Gaussian.

    ``given`` is false for the default made from ``wavelength_nm`` and ``bandwidth_nm``.
    """

    kind: str  # "file" or "gaussian"
    given: bool
    source: str  # the file's path, or a description of the Gaussian
    centre_nm: float | None = None
    fwhm_nm: float | None = None
    wavelength_nm: tuple[float, ...] = ()
    response: tuple[float, ...] = ()


def gaussian_spec(centre_nm: float, fwhm_nm: float, given: bool) -> FilterSpec:
    return FilterSpec("gaussian", given, f"Gaussian {centre_nm:g} nm, FWHM {fwhm_nm:g} nm",
                      centre_nm=float(centre_nm), fwhm_nm=float(fwhm_nm))


def read_filter_spec(path: Path) -> FilterSpec:
    """A filter table file as a FilterSpec; raises FilterFileError naming the line."""
    wl, resp = read_filter_table(path)
    return FilterSpec("file", True, str(path), wavelength_nm=wl, response=resp)
