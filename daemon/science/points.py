"""The points a session fit takes in: one measurement reduced to what the fit needs.

Plain data, standard library only: the store's writer and its read-only reader both
build these from the stored rows, and the science screens and fits them.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Any

#: Where a session sits in its day for a campaign's drift fit (mid-morning,
#: mid-afternoon: only the order within a day matters), and the drift's year [days].
#: Shared by :mod:`daemon.science.campaign` and the report's drift chart.
SESSION_DAY_FRACTION = {"am": 0.375, "pm": 0.625}
DAYS_PER_YEAR = 365.25

#: Roles of a point in a stored session fit: in the final line; a candidate the fit
#: clipped as an outlier; outside the air-mass window or without a finite x or y;
#: screened out before the fit (``reason`` names the rule: missing, unlocked,
#: saturated, cloudy); a candidate of a channel that got no line.
FIT_POINT_ROLES = ("used", "rejected", "outside", "screened", "unfitted")


@dataclass(frozen=True)
class ChannelStats:
    """Per-channel aggregates of one measurement's raw samples [V]."""

    sun_mean_v: float | None
    sun_sd_v: float | None  # sample standard deviation; None with fewer than 2 samples
    n_sun: int
    dark_mean_v: float | None  # None when no dark samples were read
    n_dark: int
    saturated: bool


@dataclass(frozen=True)
class SessionPoint:
    """One 'ok' measurement of a session, reduced for the Langley fit."""

    measurement_id: int
    time_utc: _dt.datetime
    target_airmass: float | None
    apparent_zenith_deg: float | None
    azimuth_deg: float | None
    airmass: float | None
    ozone_airmass: float | None
    earth_sun_factor: float | None
    pressure_hpa: float | None
    pointing_error_deg: float | None
    locked: bool
    duration_s: float | None
    housekeeping: Any  # drivers.interfaces.Housekeeping or None: detector_temp_c, pressure_hpa...
    channels: dict[str, ChannelStats] = field(default_factory=dict)
