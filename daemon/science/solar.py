"""Solar geometry and air masses for one site: pure functions over times and angles.

Everything here is a thin, documented layer over pvlib (solar position, refraction,
relative air mass, Earth-Sun distance, standard-atmosphere pressure) plus the two
short published formulas pvlib does not carry (Komhyr's ozone air mass and
Bodhaine's Rayleigh optical depth). Angles are in degrees, pressures in hPa, times
are timezone-aware ``datetime`` objects or a tz-aware ``pandas.DatetimeIndex``.

Conventions
-----------
- Zenith angles are topocentric. *Apparent* means refracted (the direction the
  tracker sees); plain ``zenith_deg`` is the geometric, unrefracted angle.
- Azimuth is measured from north, eastward (pvlib's and the SPA's convention).
- Relative air mass follows Kasten and Young (1989) on the apparent zenith; it is NaN
  while the sun is below the horizon (apparent zenith above 90 degrees).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import pvlib
import pvlib.spa

from daemon.science.atmosphere import (  # noqa: F401 - part of this module's interface
    SPA_HORIZON_REFRACTION_DEG,
    STANDARD_PRESSURE_HPA,
    ArrayLike,
    like_input,
    ozone_airmass,
    positive,
    rayleigh_optical_depth,
    site_pressure_hpa,
    zenith_from_kasten_young,
)
from daemon.science.suntable import COVER_ZENITH_DEG, PAD_NODES, STEP_S, Geometry, SunTable

if TYPE_CHECKING:
    from daemon.config.settings import Site

Times = datetime | Sequence[datetime] | pd.DatetimeIndex


# --------------------------------------------------------------------------- inputs

def _to_utc_index(times_utc: Times) -> pd.DatetimeIndex:
    """A UTC ``DatetimeIndex`` from aware datetimes; naive input is refused."""
    if isinstance(times_utc, pd.DatetimeIndex):
        if times_utc.tz is None:
            raise ValueError("times_utc is a naive DatetimeIndex; localise it first "
                             "(index.tz_localize('UTC')) so every instant is unambiguous")
        return times_utc.tz_convert("UTC")
    if isinstance(times_utc, datetime):
        times_utc = [times_utc]
    converted = []
    for i, t in enumerate(times_utc):
        if not isinstance(t, datetime):
            raise TypeError(f"times_utc[{i}] is {type(t).__name__}; pass aware "
                            "datetime.datetime objects or a tz-aware pandas.DatetimeIndex")
        if t.tzinfo is None or t.utcoffset() is None:
            raise ValueError(f"times_utc[{i}] ({t.isoformat()}) is a naive datetime; attach a "
                             "time zone (tzinfo=datetime.UTC) so the instant is unambiguous")
        converted.append(t.astimezone(UTC))
    return pd.DatetimeIndex(converted).as_unit("ns")


def _unix_seconds(index: pd.DatetimeIndex) -> np.ndarray:
    return index.as_unit("ns").asi8 / 1e9


# --------------------------------------------------------------------------- pressure

# --------------------------------------------------------------------------- position

@dataclass(frozen=True, eq=False)
class SunPosition:
    """Solar position at a series of instants; every field is a read-only array.

    Attributes
    ----------
    apparent_zenith_deg : numpy.ndarray
        Topocentric zenith angle with refraction [degrees].
    zenith_deg : numpy.ndarray
        Topocentric zenith angle without refraction [degrees].
    azimuth_deg : numpy.ndarray
        Azimuth east of north [degrees].
    apparent_elevation_deg : numpy.ndarray
        ``90 - apparent_zenith_deg`` [degrees].
    equation_of_time_min : numpy.ndarray
        Apparent minus mean solar time [minutes].
    """

    apparent_zenith_deg: np.ndarray
    zenith_deg: np.ndarray
    azimuth_deg: np.ndarray
    apparent_elevation_deg: np.ndarray
    equation_of_time_min: np.ndarray

    def __post_init__(self) -> None:
        for value in vars(self).values():
            value.setflags(write=False)


def sun_position(times_utc: Times, site: Site, pressure_hpa: float | None = None,
                 temperature_c: float | None = None,
                 delta_t_s: float | None = None) -> SunPosition:
    """Topocentric solar position by the NREL Solar Position Algorithm.

    Parameters
    ----------
    times_utc : datetime, sequence of datetime or pandas.DatetimeIndex
        Timezone-aware instants (any zone; converted to UTC). Naive input is refused.
    site : daemon.config.settings.Site
        Latitude, longitude [degrees, east positive] and elevation [m].
    pressure_hpa : float, optional
        Pressure for the refraction correction [hPa]; default
        :func:`site_pressure_hpa`.
    temperature_c : float, optional
        Air temperature for the refraction correction [degC]; default
        ``site.temperature_c``.
    delta_t_s : float, optional
        Terrestrial minus universal time [s]. Default: pvlib's polynomial estimate
        for the year and month (``pvlib.spa.calculate_deltat``, about 69 s in the
        2020s). One second of error moves the sun by about 0.004 degrees.

    Returns
    -------
    SunPosition

    References
    ----------
    Reda, I. and Andreas, A. (2004), "Solar position algorithm for solar radiation
    applications", Solar Energy 76(5):577-589, :doi:`10.1016/j.solener.2003.12.003`;
    implemented by ``pvlib.solarposition.spa_python`` (method ``numpy``).
    """
    index = _to_utc_index(times_utc)
    p_hpa = site_pressure_hpa(site) if pressure_hpa is None else pressure_hpa
    p_hpa = positive("pressure_hpa", p_hpa, "hPa")
    temp_c = site.temperature_c if temperature_c is None else float(temperature_c)
    frame = pvlib.solarposition.spa_python(
        index, site.latitude_deg, site.longitude_deg, altitude=site.elevation_m,
        pressure=p_hpa * 100.0, temperature=temp_c, delta_t=delta_t_s, how="numpy")
    return SunPosition(
        apparent_zenith_deg=frame["apparent_zenith"].to_numpy(dtype=float, copy=True),
        zenith_deg=frame["zenith"].to_numpy(dtype=float, copy=True),
        azimuth_deg=frame["azimuth"].to_numpy(dtype=float, copy=True),
        apparent_elevation_deg=frame["apparent_elevation"].to_numpy(dtype=float, copy=True),
        equation_of_time_min=frame["equation_of_time"].to_numpy(dtype=float, copy=True),
    )


def sun_position_unix(unix_s: np.ndarray, site: Site, pressure_hpa: float,
                      temperature_c: float, delta_t_s: float) -> SunPosition:
    """:func:`sun_position` on POSIX seconds, for the planner's inner loop.

    Parameters
    ----------
    unix_s : numpy.ndarray
        Instants as seconds since 1970-01-01 UTC [s].
    site : daemon.config.settings.Site
    pressure_hpa : float
        Pressure for refraction [hPa].
    temperature_c : float
        Temperature for refraction [degC].
    delta_t_s : float
        Terrestrial minus universal time [s].

    Returns
    -------
    SunPosition

    Notes
    -----
    Calls ``pvlib.spa.solar_position``, the routine ``spa_python`` runs after turning
    its index into POSIX seconds, so both give identical numbers (a test pins this);
    skipping the pandas round trip saves about a fifth of each call.
    """
    result = pvlib.spa.solar_position(
        np.asarray(unix_s, dtype=float), site.latitude_deg, site.longitude_deg,
        site.elevation_m, pressure_hpa, temperature_c, delta_t_s,
        SPA_HORIZON_REFRACTION_DEG)
    app_zenith, zenith, app_elevation, _elevation, azimuth, eot = (
        np.array(row, dtype=float) for row in result)
    return SunPosition(apparent_zenith_deg=app_zenith, zenith_deg=zenith,
                       azimuth_deg=azimuth, apparent_elevation_deg=app_elevation,
                       equation_of_time_min=eot)


def delta_t_estimate_s(year: int, month: int) -> float:
    """pvlib's estimate of terrestrial minus universal time for a month [s].

    Parameters
    ----------
    year, month : int

    Returns
    -------
    float
        Delta T [s] from the polynomials of Espenak and Meeus as coded in
        ``pvlib.spa.calculate_deltat``.
    """
    return float(pvlib.spa.calculate_deltat(year, month))


# --------------------------------------------------------------------------- air mass

def relative_airmass(apparent_zenith_deg: ArrayLike) -> float | np.ndarray:
    """Relative optical air mass of Kasten and Young (1989).

    Parameters
    ----------
    apparent_zenith_deg : float or array_like
        Refracted solar zenith angle [degrees].

    Returns
    -------
    float or numpy.ndarray
        Relative air mass [dimensionless]; NaN where the apparent zenith exceeds
        90 degrees (sun below the horizon).

    References
    ----------
    Kasten, F. and Young, A. T. (1989), "Revised optical air mass tables and
    approximation formula", Applied Optics 28(22):4735-4738,
    :doi:`10.1364/AO.28.004735`, eq. 3; via ``pvlib.atmosphere.get_relative_airmass``.
    """
    z = np.asarray(apparent_zenith_deg, dtype=float)
    am = pvlib.atmosphere.get_relative_airmass(z, model="kastenyoung1989")
    return like_input(apparent_zenith_deg, am)


#: Kasten-Young air mass with the sun's centre on the apparent horizon (about 37.92).
HORIZON_AIRMASS = float(relative_airmass(90.0))


def apparent_zenith_from_airmass(airmass: ArrayLike) -> float | np.ndarray:
    """Invert :func:`relative_airmass`: the apparent zenith of a given air mass.

    Parameters
    ----------
    airmass : float or array_like
        Relative Kasten-Young air mass, from ``relative_airmass(0)`` (0.99971) to
        :data:`HORIZON_AIRMASS` (37.92) [dimensionless].

    Returns
    -------
    float or numpy.ndarray
        Apparent zenith angle [degrees]; NaN for air masses outside that range.

    Notes
    -----
    The bisection of :func:`daemon.science.atmosphere.zenith_from_kasten_young` (the
    same formula as pvlib's ``kastenyoung1989``, held to it by
    tests/test_atmosphere_light.py).
    """
    z = zenith_from_kasten_young(airmass)
    return like_input(airmass, z if np.ndim(airmass) else z[0])


def absolute_airmass(relative: ArrayLike, pressure_hpa: float) -> float | np.ndarray:
    """Pressure-corrected air mass.

    Parameters
    ----------
    relative : float or array_like
        Relative air mass [dimensionless].
    pressure_hpa : float
        Station pressure [hPa]. Required on purpose: pvlib's default is sea level,
        which overstates the Rayleigh path by half on a high mountain.

    Returns
    -------
    float or numpy.ndarray
        ``relative * pressure_hpa / 1013.25`` [dimensionless].
    """
    p = positive("pressure_hpa", pressure_hpa, "hPa")
    am = pvlib.atmosphere.get_absolute_airmass(np.asarray(relative, dtype=float), p * 100.0)
    return like_input(relative, am)


# --------------------------------------------------------------------------- Earth-Sun

def earth_sun_distance_au(times_utc: Times,
                          delta_t_s: float | None = None) -> float | np.ndarray:
    """Earth-Sun distance [AU] by the SPA (``pvlib.solarposition.nrel_earthsun_distance``).

    Parameters
    ----------
    times_utc : datetime, sequence of datetime or pandas.DatetimeIndex
        Timezone-aware instants.
    delta_t_s : float, optional
        Terrestrial minus universal time [s]; default pvlib's estimate for the month.
        The distance is insensitive to it.

    Returns
    -------
    float or numpy.ndarray
        Distance [AU]; a float for a single datetime.
    """
    index = _to_utc_index(times_utc)
    r = pvlib.solarposition.nrel_earthsun_distance(index, how="numpy", delta_t=delta_t_s)
    r = np.asarray(r, dtype=float)
    return float(r[0]) if isinstance(times_utc, datetime) else r


def earth_sun_factor(times_utc: Times, delta_t_s: float | None = None) -> float | np.ndarray:
    """Inverse-square Earth-Sun distance factor ``(r0 / r)^2`` [dimensionless].

    Multiply a signal measured at distance ``r`` by the inverse of this factor (or a
    V0 fitted on that day by it) to refer it to the mean distance ``r0`` = 1 AU.

    Parameters
    ----------
    times_utc : datetime, sequence of datetime or pandas.DatetimeIndex
        Timezone-aware instants.
    delta_t_s : float, optional
        As for :func:`earth_sun_distance_au`.

    Returns
    -------
    float or numpy.ndarray
        About 1.034 in early January, 0.967 in early July; a float for a single
        datetime.
    """
    r = earth_sun_distance_au(times_utc, delta_t_s)
    return 1.0 / (r * r) if isinstance(r, float) else 1.0 / np.square(r)


# --------------------------------------------------------------------------- one instant

def geometry_at(when_utc: datetime, site: Site, pressure_hpa: float | None = None) -> Geometry:
    """Solar geometry and air masses at one instant.

    Parameters
    ----------
    when_utc : datetime
        Timezone-aware instant (converted to UTC).
    site : daemon.config.settings.Site
    pressure_hpa : float, optional
        Measured station pressure [hPa]; default :func:`site_pressure_hpa`. Used for
        refraction and reported back.

    Returns
    -------
    Geometry
    """
    index = _to_utc_index(when_utc)
    p_hpa = site_pressure_hpa(site) if pressure_hpa is None else pressure_hpa
    p_hpa = positive("pressure_hpa", p_hpa, "hPa")
    pos = sun_position(index, site, p_hpa)
    z = float(pos.apparent_zenith_deg[0])
    r = float(earth_sun_distance_au(index)[0])
    return Geometry(
        time_utc=when_utc.astimezone(UTC),
        apparent_zenith_deg=z,
        azimuth_deg=float(pos.azimuth_deg[0]),
        apparent_elevation_deg=float(pos.apparent_elevation_deg[0]),
        airmass=float(relative_airmass(z)),
        ozone_airmass=float(ozone_airmass(z, site.elevation_m)),
        earth_sun_factor=1.0 / (r * r),
        distance_au=r,
        pressure_hpa=p_hpa,
    )


# --------------------------------------------------------------------------- sun table

def sun_table(site: Site, start_unix: float, end_unix: float, delta_t_s: float,
              step_s: float = STEP_S, cover_zenith_deg: float = COVER_ZENITH_DEG) -> SunTable:
    """The SPA's unrefracted geometry on a grid, for reading back without pvlib.

    Parameters
    ----------
    site : daemon.config.settings.Site
    start_unix, end_unix : float
        The window [POSIX s]; nodes run from ``start_unix`` every ``step_s`` up to
        and including the first at or after ``end_unix``.
    delta_t_s : float
        Terrestrial minus universal time [s].
    step_s : float, default :data:`daemon.science.suntable.STEP_S`
    cover_zenith_deg : float, default :data:`daemon.science.suntable.COVER_ZENITH_DEG`
        The table keeps the nodes where the geometric zenith is below this [degrees]
        (180 keeps them all).

    Returns
    -------
    SunTable
        Trimmed to the nodes where the geometric zenith is below
        ``cover_zenith_deg``, with
        :data:`~daemon.science.suntable.PAD_NODES` more at each end (the cubic needs
        them); empty when the sun stays below that all window long.

    Notes
    -----
    The geometric zenith, azimuth and distance do not depend on pressure or
    temperature; refraction is applied when the table is read
    (:meth:`SunTable.geometry_at`).
    """
    n = int(math.ceil((end_unix - start_unix) / step_s)) + 1
    grid = start_unix + step_s * np.arange(n, dtype=float)
    pos = sun_position_unix(grid, site, site_pressure_hpa(site), site.temperature_c,
                            delta_t_s)
    up = np.nonzero(pos.zenith_deg <= cover_zenith_deg)[0]
    if up.size == 0:
        return SunTable(start_unix=float(start_unix), step_s=float(step_s), zenith_deg=(),
                        azimuth_deg=(), distance_au=(), delta_t_s=float(delta_t_s))
    first, last = max(int(up[0]) - PAD_NODES, 0), min(int(up[-1]) + PAD_NODES, n - 1)
    part = slice(first, last + 1)
    distance = pvlib.spa.earthsun_distance(grid[part], delta_t_s, 1)
    return SunTable(
        start_unix=float(grid[first]), step_s=float(step_s),
        zenith_deg=tuple(float(v) for v in pos.zenith_deg[part]),
        azimuth_deg=tuple(float(v) for v in np.unwrap(pos.azimuth_deg[part], period=360.0)),
        distance_au=tuple(float(v) for v in np.asarray(distance, dtype=float)),
        delta_t_s=float(delta_t_s))
