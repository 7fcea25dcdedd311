"""Ozone absorption of a radiometer channel: the daemon's own cross-section table.

The daemon never imports the simulator; this table is its own copy of the published
values, with the status of each bin stated beside it. Standard library only.

The ozone optical depth of a band is the band-mean absorption cross-section times
the ozone column: ``tau_O3 = sigma [cm^2] * column [DU] * 2.687e16 [cm^-2 DU^-1]``.
"""

from __future__ import annotations

import math

#: Molecules per square centimetre in one Dobson unit (the definition of the DU).
MOLECULES_PER_DU_CM2 = 2.687e16

#: Width of the tabulated bins [nm]; each key is a bin's lower edge [nm].
BIN_WIDTH_NM = 10

#: Ozone absorption cross-section, 10-nm bin means [cm^2 molecule^-1] at 233 K, keyed
#: by the bin's lower edge [nm]. Data set: Serdyuchenko, A. et al. (2014), Atmos. Meas.
#: Tech. 7:625-636, and Gorshelev, V. et al. (2014), Atmos. Meas. Tech. 7:609-624.
#: Status: "C" bin means as listed in docs/REFERENCES.md (440, 490, 500, 600, 670);
#: "S" bins are 10-nm means of the same 233 K data set as tabulated (in m^2) in
#: E. Bruneton's precomputed atmospheric scattering demo (2017, demo.cc,
#: kOzoneCrossSection); its 440/490/500/600/670 bins agree with docs/REFERENCES.md,
#: the others were not checked against the original files; "M" from memory, order of
#: magnitude only (weak Wulf bands: below 3e-4 in optical depth at 260 DU, so an error
#: there is harmless).
CROSS_SECTION_CM2: dict[int, tuple[float, str]] = {
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
    1010: (3.0e-24, "M"),
    1020: (3.0e-24, "M"),
}


def band_cross_section_cm2(wavelength_nm: float, bandwidth_nm: float) -> float | None:
    """Mean ozone cross-section over a rectangular band, or None if not tabulated.

    Parameters
    ----------
    wavelength_nm : float
        Band centre [nm].
    bandwidth_nm : float
        Full band width [nm], positive.

    Returns
    -------
    float or None
        Overlap-weighted mean of the 10-nm bins the band covers [cm^2]; None when
        any part of the band falls in a bin the table does not hold (the caller then
        says so: set the channel's ``ozone_cross_section_cm2`` in the configuration).
    """
    if not (math.isfinite(bandwidth_nm) and bandwidth_nm > 0):
        raise ValueError(f"bandwidth_nm must be a positive number of nm, got {bandwidth_nm!r}")
    lo = wavelength_nm - bandwidth_nm / 2.0
    hi = wavelength_nm + bandwidth_nm / 2.0
    edge = int(math.floor(lo / BIN_WIDTH_NM)) * BIN_WIDTH_NM
    total = 0.0
    while edge < hi:
        overlap = min(hi, edge + BIN_WIDTH_NM) - max(lo, edge)
        if overlap > 0:
            if edge not in CROSS_SECTION_CM2:
                return None
            total += CROSS_SECTION_CM2[edge][0] * overlap
        edge += BIN_WIDTH_NM
    return total / bandwidth_nm


def channel_cross_section_cm2(channel) -> float | None:
    """The channel's configured cross-section, else the table's band mean, else None.

    Parameters
    ----------
    channel : daemon.config.settings.Channel
        ``ozone_cross_section_cm2`` [cm^2] wins when set; otherwise
        ``wavelength_nm`` and ``bandwidth_nm`` [nm] look the band up in the table.
    """
    if channel.ozone_cross_section_cm2 is not None:
        return float(channel.ozone_cross_section_cm2)
    return band_cross_section_cm2(channel.wavelength_nm, channel.bandwidth_nm)


def ozone_optical_depth(cross_section_cm2: float, ozone_du: float) -> float:
    """Vertical ozone optical depth [dimensionless] of a column of ``ozone_du`` [DU]."""
    return float(cross_section_cm2) * float(ozone_du) * MOLECULES_PER_DU_CM2
