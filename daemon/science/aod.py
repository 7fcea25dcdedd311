"""Aerosol optical depth per measurement, once a calibration gives V0.

With V0 at 1 AU from a calibration, each direct-sun measurement gives the total
optical depth along its own path; subtracting the Rayleigh part (at the measured
pressure) and the ozone part (nominal column), each with its own air mass, leaves
the aerosol::

    tau_a = [ln(V0_1au f / V) - tau_R(p) m - tau_O3 m_O3] / m

with ``V`` the dark-subtracted, temperature-corrected signal [V], ``f = (r0/r)^2``
the Earth-Sun factor, ``m`` the Kasten-Young air mass (also used for the aerosol)
and ``m_O3`` the ozone air mass of a layer at 22 km. The Angstrom exponent of a
measurement comes from a pair of channels: ``alpha = -ln(tau_1/tau_2) / ln(l_1/l_2)``
(Angstrom, A. 1929, Geogr. Ann. 11:156-166).

The functions here do the arithmetic on one measurement's points;
:func:`daemon.station.fitting.update_aod` reads measurements from the store and writes
the ``aod`` and ``aod_angstrom`` tables that :func:`daemon.store.reader.aod_between`
reads.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from daemon.config.settings import Channel, Config
from daemon.science import atmosphere
from daemon.science.screening import point_signal

#: Wavelengths [nm] the default Angstrom pair is chosen near (common practice, no source).
DEFAULT_ANGSTROM_NM = (440.0, 870.0)


def aerosol_optical_depth(signal_v: float, v0_1au_v: float, earth_sun_factor: float,
                          airmass: float, ozone_airmass: float, tau_rayleigh: float,
                          tau_ozone: float) -> tuple[float, float]:
    """Total and aerosol optical depth of one direct-sun measurement.

    Parameters
    ----------
    signal_v : float
        Dark-subtracted, temperature-corrected signal [V], positive.
    v0_1au_v : float
        Calibrated V0 at 1 AU [V].
    earth_sun_factor : float
        ``(r0/r)^2`` at the measurement [dimensionless].
    airmass : float
        Kasten-Young relative air mass (Rayleigh and aerosol path).
    ozone_airmass : float
        Ozone air mass.
    tau_rayleigh, tau_ozone : float
        Vertical Rayleigh (at the measured pressure) and ozone optical depths.

    Returns
    -------
    (tau_total, tau_aerosol) : tuple of float
        ``tau_total = ln(V0 f / V) / m`` and the aerosol part [dimensionless].
    """
    if not (signal_v > 0.0 and v0_1au_v > 0.0 and airmass > 0.0 and earth_sun_factor > 0.0):
        raise ValueError("signal, V0, air mass and Earth-Sun factor must be positive; got "
                         f"{signal_v!r}, {v0_1au_v!r}, {airmass!r}, {earth_sun_factor!r}")
    slant = math.log(v0_1au_v * earth_sun_factor / signal_v)
    tau_total = slant / airmass
    tau_a = (slant - tau_rayleigh * airmass - tau_ozone * ozone_airmass) / airmass
    return tau_total, tau_a


def angstrom_exponent(tau_1: float, wavelength_1_nm: float, tau_2: float,
                      wavelength_2_nm: float) -> float:
    """Angstrom exponent from two aerosol optical depths [dimensionless].

    ``alpha = -ln(tau_1 / tau_2) / ln(lambda_1 / lambda_2)``; NaN unless both optical
    depths are positive and the wavelengths differ.
    """
    if not (tau_1 > 0.0 and tau_2 > 0.0) or wavelength_1_nm == wavelength_2_nm:
        return math.nan
    return -math.log(tau_1 / tau_2) / math.log(wavelength_1_nm / wavelength_2_nm)


def angstrom_pair(config: Config) -> tuple[Channel, Channel] | None:
    """The two channels of the Angstrom exponent, shorter wavelength first.

    ``fit.angstrom_channels`` when set; otherwise the window channels nearest to
    440 and 870 nm. None when the instrument has fewer than two window channels.
    """
    window = [c for c in config.channels if not c.water_vapour]
    if config.fit.angstrom_channels is not None:
        a, b = (config.channel(n) for n in config.fit.angstrom_channels)
    else:
        if len({c.wavelength_nm for c in window}) < 2:
            return None
        a = min(window, key=lambda c: abs(c.wavelength_nm - DEFAULT_ANGSTROM_NM[0]))
        rest = [c for c in window if c.wavelength_nm != a.wavelength_nm]
        b = min(rest, key=lambda c: abs(c.wavelength_nm - DEFAULT_ANGSTROM_NM[1]))
    return (a, b) if a.wavelength_nm < b.wavelength_nm else (b, a)


def point_aod(p, channels: Sequence[Channel], config: Config, v0: Mapping[str, Any],
               tau_o3: Mapping[str, float | None], nominal_p: float,
               calibration_id: int) -> dict[str, dict[str, Any]]:
    out: dict[str, dict[str, Any]] = {}
    m = p.airmass
    esf = p.earth_sun_factor
    if m is None or not m > 0 or esf is None or not esf > 0:
        return out
    if p.housekeeping is not None and p.housekeeping.pressure_hpa is not None:
        pressure = p.housekeeping.pressure_hpa
    else:
        pressure = p.pressure_hpa if p.pressure_hpa is not None else nominal_p
    m_o3 = p.ozone_airmass
    if m_o3 is None and p.apparent_zenith_deg is not None:
        m_o3 = float(atmosphere.ozone_airmass(p.apparent_zenith_deg, config.site.elevation_m))
    for c in channels:
        ps = point_signal(p, c, config)
        if ps.signal_v is None or not ps.signal_v > 0.0 or ps.screened not in (None, "cloudy"):
            continue
        flags = []
        if ps.screened == "cloudy":
            flags.append(f"burst coefficient of variation {ps.cv:.4f} above "
                         f"{config.fit.max_cv:g}: cloud likely")
        o3 = tau_o3[c.name]
        if o3 is None:
            o3 = 0.0
            flags.append("no ozone cross-section for this band: ozone not subtracted")
        if m_o3 is None:
            flags.append("no ozone air mass: ozone taken on the Kasten-Young air mass")
        tau_r = float(atmosphere.rayleigh_optical_depth(c.wavelength_nm, pressure))
        cal = v0[c.name]
        total, aod = aerosol_optical_depth(ps.signal_v, cal["v0_1au"], esf, m,
                                           m if m_o3 is None else m_o3, tau_r, o3)
        # A relative V0 error e gives an optical-depth error e/m (docs/REFERENCES.md).
        v0_unc_v = cal.get("v0_1au_unc")
        out[c.name] = {
            "measurement_id": p.measurement_id, "channel": c.name,
            "calibration_id": calibration_id, "wavelength_nm": c.wavelength_nm,
            "aod": aod,
            "aod_unc": (v0_unc_v / cal["v0_1au"] / m) if v0_unc_v is not None else None,
            "tau_total": total, "tau_rayleigh": tau_r, "tau_ozone": o3, "airmass": m,
            "ozone_airmass": m_o3, "pressure_hpa": pressure,
            "flag": "; ".join(flags) if flags else None,
        }
    return out


def point_alpha(measurement_id: int, per_channel: Mapping[str, Mapping[str, Any]],
                 pair: tuple[Channel, Channel], calibration_id: int) -> dict[str, Any] | None:
    a, b = (per_channel.get(c.name) for c in pair)
    if a is None or b is None or a["flag"] or b["flag"]:
        return None
    alpha = angstrom_exponent(a["aod"], pair[0].wavelength_nm, b["aod"], pair[1].wavelength_nm)
    if not math.isfinite(alpha):
        return None
    return {"measurement_id": measurement_id, "calibration_id": calibration_id,
            "angstrom_alpha": alpha, "channel_short": pair[0].name, "channel_long": pair[1].name}
