"""Screening of a session's points: what each measurement gives each channel.

A measurement is dropped from a channel's series when it has no samples of the
channel, the sun lock was not confirmed (or the pointing error is too large), the
channel saturated, or the burst varies more than a clear sky allows (``fit.max_cv``).
What is left is dark-subtracted and referred to the reference detector temperature.
The session fit (:mod:`daemon.science.sessionfit`) fits these series; the read-only
plot screens with the same functions: this module imports no pvlib, and numpy only in
the functions that build arrays, so a plot from stored fit points stays light.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from daemon.config.settings import Channel, Config
from daemon.science.points import SessionPoint

if TYPE_CHECKING:
    import numpy as np


def temperature_corrected(signal_v: float, detector_temp_c: float, channel: Channel) -> float:
    """Refer a signal to the channel's reference detector temperature.

    Parameters
    ----------
    signal_v : float
        Dark-corrected signal [V] at detector temperature ``detector_temp_c`` [degC].
    detector_temp_c : float
        Detector temperature from housekeeping [degC]; NaN leaves the signal as is.
    channel : Channel
        ``temp_coeff_per_k`` is the relative responsivity change per kelvin
        [1/K]; ``reference_temp_c`` [degC] the temperature V0 refers to.

    Returns
    -------
    float
        ``V / (1 + temp_coeff_per_k * (T_det - reference_temp_c))`` [V].
    """
    if channel.temp_coeff_per_k == 0.0 or not math.isfinite(detector_temp_c):
        return signal_v
    delta_k = detector_temp_c - channel.reference_temp_c
    return signal_v / (1.0 + channel.temp_coeff_per_k * delta_k)


#: Keys of the screening rules, in the order they are tried (:func:`point_signal`).
SCREENING_KEYS = ("missing", "unlocked", "saturated", "cloudy")



@dataclass
class ScreenedPoints:
    """The measurements screening dropped from one channel's series, kept for display.

    ``reasons`` holds one key of :data:`SCREENING_KEYS` per point; ``signal_v`` is the
    dark-subtracted, temperature-corrected signal [V] (NaN without samples).
    """

    measurement_ids: np.ndarray
    reasons: tuple[str, ...]
    airmass: np.ndarray
    ozone_airmass: np.ndarray
    pressure_hpa: np.ndarray
    signal_v: np.ndarray


@dataclass
class ChannelSeries:
    """One channel's screened, corrected points of one session, ready to fit.

    Every array has one value per point; NaN marks a value that is not known.
    ``n_total`` counts the session's measurements (screened ones included) and
    ``notes`` says what the screening dropped or assumed. ``measurement_ids`` (one
    per point) and ``screened`` come from the store (:func:`screen_channel`); a series
    built elsewhere (the offline refit) may leave them out.
    """

    airmass: np.ndarray
    ozone_airmass: np.ndarray
    pressure_hpa: np.ndarray
    signal_v: np.ndarray  # dark-subtracted, temperature-corrected [V]
    earth_sun_factor: np.ndarray
    n_total: int
    notes: list[str] = field(default_factory=list)
    hours: np.ndarray | None = None  # time of each point [h], any origin
    # Standard error of each burst mean from the burst's own scatter, in ln V
    # (coefficient of variation over sqrt(samples)); NaN where the burst gave no spread.
    burst_sd_ln: np.ndarray | None = None
    measurement_ids: np.ndarray | None = None
    screened: ScreenedPoints | None = None


@dataclass(frozen=True)
class PointSignal:
    """What one measurement gives one channel: a net signal or the reason it has none."""

    signal_v: float | None  # dark-subtracted, temperature-corrected [V]
    screened: str | None  # key of the screening rule that dropped it
    cv: float | None  # burst coefficient of variation
    no_dark: bool = False
    no_housekeeping: bool = False
    n_samples: int = 0  # sun samples in the burst

    @property
    def mean_sd_ln(self) -> float:
        """Standard error of the burst mean in ln V (``cv / sqrt(n)``); NaN when unknown."""
        if self.cv is None or self.n_samples < 2 or not math.isfinite(self.cv):
            return math.nan
        return self.cv / math.sqrt(self.n_samples)


def point_signal(p: SessionPoint, channel: Channel, config: Config) -> PointSignal:
    """Screen one measurement for one channel and correct its signal.

    Screening keys: ``missing`` (no samples of the channel), ``unlocked`` (sun lock
    not confirmed or pointing error above ``acquisition.max_pointing_error_deg``),
    ``saturated``, ``cloudy`` (burst coefficient of variation above ``fit.max_cv``).
    """
    st = p.channels.get(channel.name)
    if st is None or st.n_sun == 0 or st.sun_mean_v is None:
        return PointSignal(None, "missing", None)
    max_pointing = config.acquisition.max_pointing_error_deg
    pointing_ok = p.pointing_error_deg is None or p.pointing_error_deg <= max_pointing
    if not p.locked or not pointing_ok:
        return PointSignal(None, "unlocked", None)
    if st.saturated:
        return PointSignal(None, "saturated", None)
    dark = st.dark_mean_v
    no_dark = dark is None
    net = st.sun_mean_v - (0.0 if dark is None else dark)
    cv = st.sun_sd_v / net if st.sun_sd_v is not None and net > 0.0 else None
    # The spread of a clear-sky burst is detector noise; a cloud edge or thin
    # cirrus passing through the field of view makes it jump.
    if cv is not None and cv > config.fit.max_cv:
        return PointSignal(net, "cloudy", cv, no_dark, n_samples=st.n_sun)
    hk = p.housekeeping
    no_hk = False
    if hk is not None:
        net = temperature_corrected(net, hk.detector_temp_c, channel)
    elif channel.temp_coeff_per_k != 0.0:
        no_hk = True
    return PointSignal(net, None, cv, no_dark, no_hk, n_samples=st.n_sun)


def _count(n: int, what: str) -> str:
    return f"{n} burst{'s' if n != 1 else ''} {what}"


def screened_signal(p: SessionPoint, channel: Channel) -> float:
    """The corrected signal of a screened measurement [V], for display; NaN without samples."""
    st = p.channels.get(channel.name)
    if st is None or st.n_sun == 0 or st.sun_mean_v is None:
        return math.nan
    net = st.sun_mean_v - (0.0 if st.dark_mean_v is None else st.dark_mean_v)
    if p.housekeeping is not None:
        net = temperature_corrected(net, p.housekeeping.detector_temp_c, channel)
    return float(net)


def _point_pressure(p: SessionPoint) -> float:
    if p.housekeeping is not None and p.housekeeping.pressure_hpa is not None:
        value = p.housekeeping.pressure_hpa
    else:
        value = p.pressure_hpa
    return math.nan if value is None or not math.isfinite(value) else float(value)


def _point_ozone_airmass(p: SessionPoint, config: Config) -> float:
    if p.ozone_airmass is not None:
        return float(p.ozone_airmass)
    if p.apparent_zenith_deg is not None:
        from daemon.science.atmosphere import ozone_airmass

        return float(ozone_airmass(p.apparent_zenith_deg, config.site.elevation_m))
    return math.nan


def screen_channel(points: Sequence[SessionPoint], channel: Channel,
                   config: Config) -> ChannelSeries:
    """The screened, dark-subtracted, temperature-corrected points of one channel."""
    import numpy as np

    max_cv = config.fit.max_cv
    max_pointing = config.acquisition.max_pointing_error_deg
    rows: list[tuple[float, float, float, float, float, float, float]] = []
    ids: list[int] = []
    dropped: list[tuple[float, float, float, float]] = []
    dropped_ids: list[int] = []
    dropped_why: list[str] = []
    counts = dict.fromkeys(SCREENING_KEYS, 0)
    no_dark = no_hk = 0
    for p in points:
        ps = point_signal(p, channel, config)
        airmass = math.nan if p.airmass is None else p.airmass
        if ps.screened is not None:
            counts[ps.screened] += 1
            dropped_ids.append(p.measurement_id)
            dropped_why.append(ps.screened)
            dropped.append((airmass, _point_ozone_airmass(p, config), _point_pressure(p),
                            screened_signal(p, channel)))
            continue
        no_dark += ps.no_dark
        no_hk += ps.no_housekeeping
        ids.append(p.measurement_id)
        rows.append((airmass,
                     _point_ozone_airmass(p, config), _point_pressure(p), ps.signal_v,
                     math.nan if p.earth_sun_factor is None else p.earth_sun_factor,
                     p.time_utc.timestamp() / 3600.0, ps.mean_sd_ln))
    notes = []
    if counts["missing"]:
        notes.append(_count(counts["missing"], f"without samples of channel {channel.name}"))
    if counts["unlocked"]:
        notes.append(_count(counts["unlocked"], "screened: sun lock not confirmed or pointing "
                                                f"error above {max_pointing:g} degrees"))
    if counts["saturated"]:
        notes.append(_count(counts["saturated"], "screened: saturated"))
    if counts["cloudy"]:
        notes.append(_count(counts["cloudy"], f"screened as cloudy: burst coefficient of "
                                              f"variation above {max_cv:g}"))
    if no_dark:
        notes.append(_count(no_dark, "without a dark reading: dark taken as 0 V"))
    if no_hk:
        notes.append(_count(no_hk, "without housekeeping: no detector-temperature correction"))
    arr = np.array(rows, dtype=float).reshape(-1, 7)
    out = np.array(dropped, dtype=float).reshape(-1, 4)
    screened = ScreenedPoints(measurement_ids=np.array(dropped_ids, dtype=np.int64),
                              reasons=tuple(dropped_why), airmass=out[:, 0],
                              ozone_airmass=out[:, 1], pressure_hpa=out[:, 2],
                              signal_v=out[:, 3])
    return ChannelSeries(airmass=arr[:, 0], ozone_airmass=arr[:, 1], pressure_hpa=arr[:, 2],
                         signal_v=arr[:, 3], earth_sun_factor=arr[:, 4],
                         n_total=len(points), notes=notes, hours=arr[:, 5],
                         burst_sd_ln=arr[:, 6], measurement_ids=np.array(ids, dtype=np.int64),
                         screened=screened)
