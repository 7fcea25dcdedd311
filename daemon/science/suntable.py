"""The day's sun table: the SPA's geometry on a time grid, read back without pvlib.

The plan's child process (:mod:`daemon.station.jobs`) evaluates the Solar Position
Algorithm once per day on a grid of :data:`STEP_S` covering daylight and stores the
*geometric* (unrefracted) topocentric zenith, the azimuth and the Earth-Sun distance
(:func:`daemon.science.solar.sun_table`). The resident service interpolates that table
at a burst's mean time and applies the SPA's refraction with the pressure of the
moment (:func:`daemon.science.atmosphere.refraction_deg`), so it never imports pvlib,
pandas or numpy. This module is pure Python for that reason.

Interpolation is by a cubic through the four nodes around the instant (Lagrange). The
zenith varies on the scale of the Earth's rotation (1 / omega, about 3.8 h), so on a
60-s grid the cubic's error is of order (omega h)^4 of the swing, about 1e-8 degrees
(tests/test_resident_geometry.py measures it against pvlib's SPA). The azimuth is stored
unwrapped (continuous through north) and returned modulo 360; where the sun passes
within a degree or two of the zenith the azimuth turns fast and the cubic follows it
less closely (hundredths of a degree), which only the tracker's first aim sees.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from daemon.science.atmosphere import (
    kasten_young_airmass_at,
    ozone_airmass_at,
    positive,
    refraction_deg,
)

#: Spacing of the table [s].
STEP_S = 60.0
#: The table covers the nodes where the geometric zenith is below this [degrees] (the
#: apparent horizon lies near 90.6), with :data:`PAD_NODES` more at each end.
COVER_ZENITH_DEG = 92.0
PAD_NODES = 2
_FORMAT_VERSION = 1


@dataclass(frozen=True)
class Geometry:
    """Solar geometry at one instant, as stored with each measurement.

    Attributes
    ----------
    time_utc : datetime
        The instant (aware, UTC).
    apparent_zenith_deg, azimuth_deg, apparent_elevation_deg : float
        Refracted zenith, azimuth east of north, refracted elevation [degrees].
    airmass : float
        Relative Kasten-Young air mass; NaN with the sun below the horizon.
    ozone_airmass : float
        Komhyr ozone air mass for a 22 km layer; NaN below the horizon.
    earth_sun_factor : float
        ``(1 AU / r)^2`` [dimensionless].
    distance_au : float
        Earth-Sun distance [AU].
    pressure_hpa : float
        The pressure used for refraction [hPa].
    """

    time_utc: datetime
    apparent_zenith_deg: float
    azimuth_deg: float
    apparent_elevation_deg: float
    airmass: float
    ozone_airmass: float
    earth_sun_factor: float
    distance_au: float
    pressure_hpa: float


def geometry_from(when_utc: datetime, zenith_deg: float, azimuth_deg: float,
                  distance_au: float, elevation_m: float, pressure_hpa: float,
                  temperature_c: float) -> Geometry:
    """The stored geometry of one instant from the unrefracted zenith: the SPA's
    refraction at ``pressure_hpa`` [hPa] and ``temperature_c`` [degC], then the air
    masses on the apparent zenith."""
    e0 = 90.0 - zenith_deg
    elevation = e0 + refraction_deg(e0, pressure_hpa, temperature_c)
    apparent_zenith = 90.0 - elevation
    return Geometry(
        time_utc=when_utc.astimezone(UTC), apparent_zenith_deg=apparent_zenith,
        azimuth_deg=azimuth_deg % 360.0, apparent_elevation_deg=elevation,
        airmass=kasten_young_airmass_at(apparent_zenith),
        ozone_airmass=ozone_airmass_at(apparent_zenith, elevation_m),
        earth_sun_factor=1.0 / (distance_au * distance_au), distance_au=distance_au,
        pressure_hpa=pressure_hpa)


@dataclass(frozen=True)
class SunTable:
    """The SPA's unrefracted geometry on a uniform grid (see the module docstring).

    Attributes
    ----------
    start_unix : float
        The first node [POSIX s].
    step_s : float
        Node spacing [s].
    zenith_deg : tuple of float
        Topocentric zenith without refraction at each node [degrees].
    azimuth_deg : tuple of float
        Azimuth east of north, unwrapped (it may leave 0-360) [degrees].
    distance_au : tuple of float
        Earth-Sun distance [AU].
    delta_t_s : float
        Terrestrial minus universal time the SPA ran with [s].
    """

    start_unix: float
    step_s: float
    zenith_deg: tuple[float, ...]
    azimuth_deg: tuple[float, ...]
    distance_au: tuple[float, ...]
    delta_t_s: float

    def __post_init__(self) -> None:
        n = len(self.zenith_deg)
        if len(self.azimuth_deg) != n or len(self.distance_au) != n:
            raise ValueError(f"sun table: {n} zeniths but {len(self.azimuth_deg)} azimuths "
                             f"and {len(self.distance_au)} distances")
        positive("step_s", self.step_s, "s")

    @property
    def end_unix(self) -> float:
        """The last node [POSIX s] (before the first when the table is empty)."""
        return self.start_unix + (len(self.zenith_deg) - 1) * self.step_s

    def covers(self, when_utc: datetime) -> bool:
        """True when ``when_utc`` lies within the table and it has the four nodes a
        cubic needs."""
        u = when_utc.timestamp()
        return len(self.zenith_deg) >= 4 and self.start_unix <= u <= self.end_unix

    def geometry_at(self, when_utc: datetime, elevation_m: float, pressure_hpa: float,
                    temperature_c: float) -> Geometry | None:
        """The geometry at ``when_utc`` (aware), refracted at ``pressure_hpa`` [hPa] and
        ``temperature_c`` [degC] for a station at ``elevation_m`` [m]; None when the
        instant lies outside the table (the caller falls back, see
        :class:`daemon.station.acquisition.Station`)."""
        if when_utc.tzinfo is None:
            raise ValueError(f"naive datetime {when_utc!r}: pass an aware UTC time")
        if not self.covers(when_utc):
            return None
        x = (when_utc.timestamp() - self.start_unix) / self.step_s
        n = len(self.zenith_deg)
        i = min(max(int(math.floor(x)) - 1, 0), n - 4)  # nodes i..i+3 around x
        weights = _lagrange_weights(x - i)
        zenith, azimuth, distance = (
            math.fsum(w * v for w, v in zip(weights, values[i:i + 4], strict=True))
            for values in (self.zenith_deg, self.azimuth_deg, self.distance_au))
        return geometry_from(when_utc, zenith, azimuth, distance, elevation_m,
                             pressure_hpa, temperature_c)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form."""
        return {"version": _FORMAT_VERSION, "start_unix": self.start_unix,
                "step_s": self.step_s, "delta_t_s": self.delta_t_s,
                "zenith_deg": list(self.zenith_deg), "azimuth_deg": list(self.azimuth_deg),
                "distance_au": list(self.distance_au)}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SunTable:
        """Rebuild from :meth:`to_dict` output; ValueError naming what is damaged."""
        if not isinstance(d, Mapping) or d.get("version") != _FORMAT_VERSION:
            raise ValueError("sun table: not a version-1 table; the service computes it "
                             "again when it next plans the day")
        try:
            return cls(start_unix=_number(d["start_unix"]), step_s=_number(d["step_s"]),
                       zenith_deg=_numbers(d["zenith_deg"]),
                       azimuth_deg=_numbers(d["azimuth_deg"]),
                       distance_au=_numbers(d["distance_au"]),
                       delta_t_s=_number(d["delta_t_s"]))
        except (KeyError, TypeError) as exc:
            raise ValueError(f"sun table: damaged ({exc!r}); the service computes it "
                             "again when it next plans the day") from None


def _lagrange_weights(t: float) -> tuple[float, float, float, float]:
    """Weights of the cubic through nodes 0, 1, 2, 3 at position ``t`` (in steps)."""
    return (-(t - 1) * (t - 2) * (t - 3) / 6.0, t * (t - 2) * (t - 3) / 2.0,
            -t * (t - 1) * (t - 3) / 2.0, t * (t - 1) * (t - 2) / 6.0)


def _number(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) \
            or not math.isfinite(value):
        raise TypeError(f"{value!r} is not a finite number")
    return float(value)


def _numbers(values: Sequence[Any]) -> tuple[float, ...]:
    if not isinstance(values, list | tuple):
        raise TypeError(f"{type(values).__name__} is not a list of numbers")
    return tuple(_number(v) for v in values)
