"""End-of-session Langley fit: screen, correct, fit, save.

For each configured channel, every 'ok' measurement of the session is screened
(no confirmed sun lock, saturation, a burst too variable to be clear sky), the
mean dark signal is subtracted and the detector-temperature correction applied.
Before the fit ln V is corrected for what the Kasten-Young air mass does not
describe (:func:`extinction_corrections`): ozone sits in a layer near 22 km and has
an air mass of its own, and a pressure change through the session changes the
Rayleigh optical depth. Window channels are fitted with ln V against air mass
(:func:`daemon.langley.fit_session`); a water-vapour channel near 940 nm with the
modified Langley, once the window channels have given the aerosol. V0 is normalised
to 1 AU with the mean Earth-Sun factor of the points used, and the rows are saved
to the store and returned in the JSON contract of :mod:`daemon.storeread`.

Every row also carries ``fit_points``: per measurement of the session the (x, y) the
fit used and the point's role (:func:`fit_point_records`). The store keeps them
beside the result, so the read-only plot and report show exactly the fitted points
without importing this module (which needs pvlib).

:func:`fit_series` is the store-free core; the offline ``refit`` command uses it too.
"""

from __future__ import annotations

import datetime as _dt
import logging
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from daemon import solar
from daemon.config import Channel, Config, FitSettings
from daemon.lamp import lamp_check, lamp_note
from daemon.langley import FitResult, fit_coordinates, fit_session, v0_at_1au
from daemon.ozone import channel_cross_section_cm2, ozone_optical_depth
from daemon.store import FIT_SESSIONS, SessionPoint, Store
from daemon.storeread import FIT_POINT_ROLES, RESULT_KEYS, check_plan_date, results_between

log = logging.getLogger(__name__)

#: Channels below this wavelength [nm] need the pressure normalisation when the
#: pressure moves more than ``fit.max_pressure_change_hpa`` (BSRN Operations Manual,
#: McArthur 2005, WMO/TD-No. 1274, sec. 7.4.2.1).
PRESSURE_SENSITIVE_BELOW_NM = 500.0


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


# --------------------------------------------------------------------------- series

#: Keys of the screening rules, in the order they are tried (:func:`point_signal`).
SCREENING_KEYS = ("missing", "unlocked", "saturated", "cloudy")

#: Roles of a point in a stored session fit (the ``fit_points`` table): in the final
#: line; a candidate clipped as an outlier; outside the air-mass window or without a
#: finite x or y; dropped by screening (``reason`` says which rule); a candidate of a
#: channel that got no line (too few points, or a water-vapour channel without the
#: aerosol it needs).
ROLE_USED, ROLE_REJECTED, ROLE_OUTSIDE, ROLE_SCREENED, ROLE_UNFITTED = FIT_POINT_ROLES


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
        return PointSignal(net, "cloudy", cv, no_dark)
    hk = p.housekeeping
    no_hk = False
    if hk is not None:
        net = temperature_corrected(net, hk.detector_temp_c, channel)
    elif channel.temp_coeff_per_k != 0.0:
        no_hk = True
    return PointSignal(net, None, cv, no_dark, no_hk)


def _count(n: int, what: str) -> str:
    return f"{n} burst{'s' if n != 1 else ''} {what}"


def _screened_signal(p: SessionPoint, channel: Channel) -> float:
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
        return float(solar.ozone_airmass(p.apparent_zenith_deg, config.site.elevation_m))
    return math.nan


def screen_channel(points: Sequence[SessionPoint], channel: Channel,
                   config: Config) -> ChannelSeries:
    """The screened, dark-subtracted, temperature-corrected points of one channel."""
    max_cv = config.fit.max_cv
    max_pointing = config.acquisition.max_pointing_error_deg
    rows: list[tuple[float, float, float, float, float, float]] = []
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
                            _screened_signal(p, channel)))
            continue
        no_dark += ps.no_dark
        no_hk += ps.no_housekeeping
        ids.append(p.measurement_id)
        rows.append((airmass,
                     _point_ozone_airmass(p, config), _point_pressure(p), ps.signal_v,
                     math.nan if p.earth_sun_factor is None else p.earth_sun_factor,
                     p.time_utc.timestamp() / 3600.0))
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
    arr = np.array(rows, dtype=float).reshape(-1, 6)
    out = np.array(dropped, dtype=float).reshape(-1, 4)
    screened = ScreenedPoints(measurement_ids=np.array(dropped_ids, dtype=np.int64),
                              reasons=tuple(dropped_why), airmass=out[:, 0],
                              ozone_airmass=out[:, 1], pressure_hpa=out[:, 2],
                              signal_v=out[:, 3])
    return ChannelSeries(airmass=arr[:, 0], ozone_airmass=arr[:, 1], pressure_hpa=arr[:, 2],
                         signal_v=arr[:, 3], earth_sun_factor=arr[:, 4],
                         n_total=len(points), notes=notes, hours=arr[:, 5],
                         measurement_ids=np.array(ids, dtype=np.int64), screened=screened)


# --------------------------------------------------------------------------- corrections

@dataclass(frozen=True)
class Extinction:
    """The known extinction of one channel over one session.

    ``ln_correction`` is added to ln V point by point; ``tau_rayleigh`` [at
    ``reference_pressure_hpa``] and ``tau_ozone`` are vertical optical depths;
    ``tau_ozone`` is NaN when the band's ozone cross-section is unknown.
    """

    ln_correction: np.ndarray
    tau_rayleigh: float
    tau_ozone: float
    reference_pressure_hpa: float
    notes: tuple[str, ...]
    failures: tuple[str, ...]
    pressure_normalised: bool = False

    def correction_at(self, airmass: np.ndarray, ozone_airmass: np.ndarray,
                      pressure_hpa: np.ndarray) -> np.ndarray:
        """The ln V correction of this session at any points [ln V].

        The same formula :func:`extinction_corrections` applies to the fitted points
        (``ln_correction``), for points screened out of the fit: a missing pressure
        counts as the session's reference pressure.
        """
        m = np.asarray(airmass, dtype=float)
        p_ref = self.reference_pressure_hpa
        p = np.asarray(pressure_hpa, dtype=float)
        p_filled = np.where(np.isfinite(p), p, p_ref)
        correction = np.zeros_like(m)
        if self.pressure_normalised:
            tau_r_i = self.tau_rayleigh * p_filled / p_ref  # Rayleigh optical depth scales with p
            correction = correction + (tau_r_i - self.tau_rayleigh) * m
        if self.tau_ozone > 0.0:  # False for NaN: no cross-section, no correction
            correction = correction + self.tau_ozone * (np.asarray(ozone_airmass, dtype=float)
                                                        - m)
        return correction


def extinction_corrections(series: ChannelSeries, channel: Channel,
                           config: Config) -> Extinction:
    """Ozone air-mass correction and pressure normalisation of ln V for one channel.

    Parameters
    ----------
    series : ChannelSeries
        Air mass, ozone air mass and pressure [hPa] of each point.
    channel : Channel
        Wavelength, bandwidth and optional ``ozone_cross_section_cm2``.
    config : Config
        ``site.ozone_du`` (nominal column [DU]), ``fit.normalise_pressure`` and
        ``fit.max_pressure_change_hpa``.

    Returns
    -------
    Extinction

    Notes
    -----
    With ``m`` the Kasten-Young air mass and ``m_O3`` the ozone air mass of a layer
    at 22 km (Komhyr 1980), ``ln V = ln V0 - tau m + tau_O3 (m - m_O3)``: the ozone
    path is not proportional to ``m``, so ln V is slightly curved in ``m`` and the
    intercept of a straight line is biased (about -0.2 % at 500 and 675 nm at
    3650 m with 260 DU). Adding ``tau_O3 (m_O3 - m)`` straightens it; ``tau_O3`` is
    the nominal column times the band's cross-section (:mod:`daemon.ozone`), and a
    10 % error in the column leaves a tenth of the bias.

    Rayleigh scattering by a pressure ``p`` has optical depth ``tau_R(p)``
    (Bodhaine et al. 1999) on the Kasten-Young air mass (their formula is for the
    Rayleigh atmosphere). When the pressure moves through the session, adding
    ``(tau_R(p_i) - tau_R(p_ref)) m_i`` refers every point to the session's mean
    pressure ``p_ref``. Without that normalisation the BSRN rule applies: a change
    above ``max_pressure_change_hpa`` fails the channels below 500 nm.
    """
    fit = config.fit
    m = series.airmass
    notes: list[str] = []
    failures: list[str] = []
    p = series.pressure_hpa
    finite_p = p[np.isfinite(p)]
    nominal = solar.site_pressure_hpa(config.site)
    p_ref = float(finite_p.mean()) if finite_p.size else nominal
    if finite_p.size < p.size and p.size:
        notes.append(f"{p.size - finite_p.size} of {p.size} points without a pressure: "
                     f"taken as {p_ref:.1f} hPa")
    p_filled = np.where(np.isfinite(p), p, p_ref)
    change = float(np.ptp(p_filled)) if p_filled.size else 0.0
    tau_r_ref = float(solar.rayleigh_optical_depth(channel.wavelength_nm, p_ref))
    normalised = change > 0.0 and fit.normalise_pressure
    if normalised:
        if change > fit.max_pressure_change_hpa:
            notes.append(f"pressure changed by {change:.1f} hPa during the session: ln V "
                         f"normalised to the mean {p_ref:.1f} hPa")
    elif change > fit.max_pressure_change_hpa and (
            channel.wavelength_nm < PRESSURE_SENSITIVE_BELOW_NM):
        failures.append(f"pressure changed by {change:.1f} hPa during the session (limit "
                        f"{fit.max_pressure_change_hpa:g} hPa without normalisation): "
                        f"channels below {PRESSURE_SENSITIVE_BELOW_NM:g} nm need "
                        "fit.normalise_pressure")
    sigma = channel_cross_section_cm2(channel)
    if sigma is None:
        tau_o3 = math.nan
        notes.append(f"no ozone cross-section for the {channel.bandwidth_nm:g} nm band at "
                     f"{channel.wavelength_nm:g} nm: ozone not corrected; set "
                     "ozone_cross_section_cm2 for this channel")
    else:
        tau_o3 = ozone_optical_depth(sigma, config.site.ozone_du)
    ext = Extinction(ln_correction=np.zeros_like(m), tau_rayleigh=tau_r_ref, tau_ozone=tau_o3,
                     reference_pressure_hpa=p_ref, notes=tuple(notes),
                     failures=tuple(failures), pressure_normalised=normalised)
    return replace(ext, ln_correction=ext.correction_at(m, series.ozone_airmass, p))


#: Reference wavelength [nm] of ``fit.tau_drift_per_hour``; the drift allowed for
#: scales as wavelength^-1, an aerosol-like Angstrom exponent of 1 (common practice,
#: no source).
DRIFT_REFERENCE_NM = 500.0


def drift_per_hour(channel: Channel, config: Config) -> float:
    """The unseen drift of the optical depth allowed for in a channel [per hour]."""
    return config.fit.tau_drift_per_hour * DRIFT_REFERENCE_NM / channel.wavelength_nm


def _known_tau(ext: Extinction) -> float:
    return ext.tau_rayleigh + (0.0 if math.isnan(ext.tau_ozone) else ext.tau_ozone)


# --------------------------------------------------------------------------- water vapour

def aerosol_at(wavelength_nm: float, aerosol: Mapping[float, float]) -> tuple[float, str] | None:
    """Aerosol optical depth at ``wavelength_nm`` from window channels, Angstrom law.

    Parameters
    ----------
    wavelength_nm : float
        Where the aerosol optical depth is wanted [nm].
    aerosol : mapping of float to float
        Wavelength [nm] to aerosol optical depth of accepted window fits.

    Returns
    -------
    (tau_a, how) or None
        Log-log interpolation (or extrapolation) between the two positive values
        nearest in wavelength, one on each side where possible (Angstrom, A. 1929,
        Geogr. Ann. 11:156-166); None with fewer than two positive values.
    """
    positive = sorted((w, t) for w, t in aerosol.items() if t > 0.0 and math.isfinite(t))
    if len(positive) < 2:
        return None
    below = [wt for wt in positive if wt[0] <= wavelength_nm]
    above = [wt for wt in positive if wt[0] > wavelength_nm]
    if below and above:
        (w1, t1), (w2, t2) = below[-1], above[0]
    else:
        near = sorted(positive, key=lambda wt: abs(wt[0] - wavelength_nm))[:2]
        (w1, t1), (w2, t2) = sorted(near)
    alpha = -math.log(t2 / t1) / math.log(w2 / w1)
    tau = t1 * (wavelength_nm / w1) ** (-alpha)
    return tau, f"{w1:g} and {w2:g} nm (Angstrom exponent {alpha:.2f})"


# --------------------------------------------------------------------------- rows

def _row(plan_date: str, session: str, channel: Channel, fit: FitResult | None, n_total: int,
         factors: np.ndarray, notes: list[str], failures: Sequence[str] = (),
         ext: Extinction | None = None, report_tau: bool = True) -> dict[str, Any]:
    """One result row: the contract keys plus notes and details for the store."""
    nan = math.nan
    v0 = v0_1au = mean_factor = nan
    accepted = False
    reasons: list[str] = []
    notes = list(notes)
    if fit is not None:
        used = np.asarray(fit.used, dtype=bool)
        f = factors[used] if used.any() else np.empty(0)
        notes += list(fit.notes)
        v0 = fit.v0
        if f.size and np.all(np.isfinite(f)) and np.all(f > 0):
            mean_factor = float(f.mean())
            if math.isfinite(fit.v0):
                v0_1au = v0_at_1au(fit.v0, mean_factor)
        elif f.size:
            notes.append("Earth-Sun factor missing for some used points: V0 at 1 AU not "
                          "computed")
        accepted = fit.accepted and not failures
        if not accepted:
            # Failed criteria first, then everything that explains missing points.
            first = [r for r in fit.reasons if r not in fit.notes] + list(failures)
            reasons = first + [n for n in notes if n not in first]
    else:
        reasons = list(failures) + notes
    check = lamp_check(v0_1au, channel) if math.isfinite(v0_1au) else None
    if check is not None:
        notes.append(lamp_note(check))
    tau = fit.tau if fit is not None and report_tau else nan
    tau_aerosol = (tau - _known_tau(ext) if ext is not None and math.isfinite(tau)
                   and not math.isnan(ext.tau_ozone) else nan)
    return {
        "date": plan_date, "session": session, "channel": channel.name,
        "wavelength_nm": channel.wavelength_nm,
        "v0": v0, "v0_1au": v0_1au, "v0_rel_unc": fit.v0_rel_unc if fit else nan,
        "tau": tau, "n_used": fit.n_used if fit else 0, "n_total": n_total,
        "airmass_min": fit.airmass_min if fit else nan,
        "airmass_max": fit.airmass_max if fit else nan,
        "accepted": accepted, "reasons": [] if accepted else reasons,
        "notes": notes, "earth_sun_factor": mean_factor,
        "residual_sd": fit.residual_sd if fit else nan,
        "tau_aerosol": tau_aerosol,
        "tau_rayleigh": ext.tau_rayleigh if ext else nan,
        "tau_ozone": ext.tau_ozone if ext else nan,
        "e0_1au_w_m2_nm": check[0] if check else nan,
        "astm_ratio": check[2] if check else nan,
    }


def fit_point_records(s: ChannelSeries, fit: FitResult | None, x: np.ndarray, y: np.ndarray,
                      screened_x: np.ndarray, screened_y: np.ndarray) -> list[dict[str, Any]]:
    """Per measurement of one channel's session: the (x, y) the fit used and its role.

    Parameters
    ----------
    s : ChannelSeries
        The series that was fitted, with ``measurement_ids`` and ``screened``
        (None ids are stored as None: a series built outside the store has none).
    fit : FitResult or None
        The fit of ``s`` (None: the channel was not fitted at all).
    x, y : ndarray
        Regressor (air mass, or ``m^b``) and ``ln V`` plus the corrections, one per
        point of ``s``, as :func:`daemon.langley.fit_coordinates` gives them for the
        arguments of the fit [ln V]; NaN where not finite.
    screened_x, screened_y : ndarray
        The same for the screened points of ``s``, with the same corrections.

    Returns
    -------
    list of dict
        ``measurement_id``, ``x``, ``y``, ``role`` (:data:`ROLE_USED`,
        :data:`ROLE_REJECTED`, :data:`ROLE_OUTSIDE`, :data:`ROLE_SCREENED` or
        :data:`ROLE_UNFITTED`) and ``reason`` (the screening key, else None).
    """
    n = s.airmass.size
    ids: list[int | None] = ([None] * n if s.measurement_ids is None
                             else [int(i) for i in s.measurement_ids])
    has_line = fit is not None and fit.n_used > 0
    records = []
    for i in range(n):
        if fit is None:
            role = ROLE_UNFITTED
        elif fit.used[i]:
            role = ROLE_USED
        elif fit.in_window[i]:
            # A candidate left out of a fitted line was clipped as an outlier.
            role = ROLE_REJECTED if has_line else ROLE_UNFITTED
        else:
            role = ROLE_OUTSIDE
        records.append({"measurement_id": ids[i], "x": float(x[i]), "y": float(y[i]),
                        "role": role, "reason": None})
    if s.screened is not None:
        for i, (mid, why) in enumerate(zip(s.screened.measurement_ids, s.screened.reasons,
                                           strict=True)):
            records.append({"measurement_id": int(mid), "x": float(screened_x[i]),
                            "y": float(screened_y[i]), "role": ROLE_SCREENED,
                            "reason": why})
    return records


def _screened_arrays(s: ChannelSeries) -> ScreenedPoints:
    if s.screened is not None:
        return s.screened
    empty = np.empty(0)
    return ScreenedPoints(np.empty(0, dtype=np.int64), (), empty, empty, empty, empty)


def contract(row: Mapping[str, Any]) -> dict[str, Any]:
    """The JSON-contract keys of a result row, with non-finite numbers as None."""
    out = {}
    for key in RESULT_KEYS:
        value = row[key]
        if isinstance(value, float) and not math.isfinite(value):
            value = None
        out[key] = value
    return out


def fit_series(series: Mapping[str, ChannelSeries], config: Config, plan_date: str,
               session: str) -> list[dict[str, Any]]:
    """Fit every configured channel of one session from its screened series.

    Parameters
    ----------
    series : mapping of channel name to ChannelSeries
        A channel without an entry gets a row that says it has no points.
    config : Config
        Channels, fit settings, site (nominal ozone and pressure).
    plan_date : str
        Local date of the plan, YYYY-MM-DD.
    session : str
        'am' or 'pm'.

    Returns
    -------
    list of dict
        One row per configured channel in configuration order: the contract keys
        (:data:`daemon.storeread.RESULT_KEYS`) plus ``notes``, ``earth_sun_factor``,
        ``residual_sd``, ``tau_aerosol``, ``tau_rayleigh``, ``tau_ozone``,
        ``e0_1au_w_m2_nm`` and ``astm_ratio`` (NaN where not computed), and
        ``fit_points`` (:func:`fit_point_records`).
        Water-vapour channels are fitted after the window channels, whose accepted
        aerosol optical depths they need; their ``tau`` is None (the modified
        Langley's slope is not an optical depth).
    """
    rows: dict[str, dict[str, Any]] = {}
    aerosol: dict[float, float] = {}
    empty = ChannelSeries(*(np.empty(0),) * 5, n_total=0, hours=np.empty(0))
    for channel in config.channels:
        if channel.water_vapour:
            continue
        s = series.get(channel.name, empty)
        ext = extinction_corrections(s, channel, config)
        fit = fit_session(s.airmass, s.signal_v, config.fit, ln_correction=ext.ln_correction,
                          tau_floor=_known_tau(ext), hours=s.hours,
                          drift_per_hour=drift_per_hour(channel, config))
        row = _row(plan_date, session, channel, fit, s.n_total, s.earth_sun_factor,
                   s.notes + list(ext.notes), ext.failures, ext)
        x, y = fit_coordinates(s.airmass, s.signal_v, ext.ln_correction)
        sp = _screened_arrays(s)
        sx, sy = fit_coordinates(sp.airmass, sp.signal_v,
                                 ext.correction_at(sp.airmass, sp.ozone_airmass,
                                                   sp.pressure_hpa))
        row["fit_points"] = fit_point_records(s, fit, x, y, sx, sy)
        rows[channel.name] = row
        if row["accepted"] and math.isfinite(row["tau_aerosol"]):
            aerosol[channel.wavelength_nm] = row["tau_aerosol"]
    for channel in config.channels:
        if channel.water_vapour:
            s = series.get(channel.name, empty)
            rows[channel.name] = _water_vapour_row(s, channel, config, aerosol, plan_date,
                                                   session)
    return [rows[c.name] for c in config.channels]


def _water_vapour_row(s: ChannelSeries, channel: Channel, config: Config,
                      aerosol: Mapping[float, float], plan_date: str,
                      session: str) -> dict[str, Any]:
    """The modified Langley: ln V plus the known extinctions against m^b.

    ``V = V0 exp(-tau_R m - tau_O3 m_O3 - tau_a m - a (u m)^b)`` for a water-vapour
    band (water-vapour absorption as a power of the slant column, b about 0.5-0.6;
    docs/REFERENCES.md, from memory), so ``ln V + tau_R m + tau_O3 m_O3 + tau_a m`` is a
    straight line in ``m^b`` with intercept ln V0. ``tau_a`` comes from the session's
    accepted window channels by the Angstrom law.
    """
    b = config.fit.water_vapour_exponent
    tau_a = aerosol_at(channel.wavelength_nm, aerosol)
    sp = _screened_arrays(s)
    if tau_a is None:
        row = _row(plan_date, session, channel, None, s.n_total, s.earth_sun_factor,
                   s.notes, [f"not fitted: water-vapour channel; the modified Langley needs "
                             f"the aerosol from at least two accepted window channels, and "
                             f"this session has {len(aerosol)}"])
        # No aerosol, no corrected ln V: the points are kept with x only.
        row["fit_points"] = fit_point_records(
            s, None, fit_coordinates(s.airmass, s.signal_v, regressor_exponent=b)[0],
            np.full(s.airmass.shape, math.nan),
            fit_coordinates(sp.airmass, sp.signal_v, regressor_exponent=b)[0],
            np.full(sp.airmass.shape, math.nan))
        return row
    ext = extinction_corrections(s, channel, config)
    tau_o3 = 0.0 if math.isnan(ext.tau_ozone) else ext.tau_ozone
    p_ref = ext.reference_pressure_hpa

    def known_extinction(m: np.ndarray, m_o3: np.ndarray, p_hpa: np.ndarray) -> np.ndarray:
        p = np.where(np.isfinite(p_hpa), p_hpa, p_ref)
        tau_r_i = ext.tau_rayleigh * p / p_ref
        return tau_r_i * m + tau_o3 * m_o3 + tau_a[0] * m

    known = known_extinction(s.airmass, s.ozone_airmass, s.pressure_hpa)
    fit = fit_session(s.airmass, s.signal_v, config.fit, ln_correction=known,
                      regressor_exponent=b, hours=s.hours,
                      drift_per_hour=drift_per_hour(channel, config))
    notes = s.notes + [n for n in ext.notes if not n.startswith("no ozone cross-section")]
    notes.append(f"water-vapour channel: modified Langley, ln V plus Rayleigh, ozone and "
                 f"aerosol {tau_a[0]:.4f} (from {tau_a[1]}) against m^{b:g}")
    row = _row(plan_date, session, channel, fit, s.n_total, s.earth_sun_factor, notes,
               ext.failures, None, report_tau=False)
    x, y = fit_coordinates(s.airmass, s.signal_v, known, b)
    sx, sy = fit_coordinates(sp.airmass, sp.signal_v,
                             known_extinction(sp.airmass, sp.ozone_airmass, sp.pressure_hpa),
                             b)
    row["fit_points"] = fit_point_records(s, fit, x, y, sx, sy)
    return row


# --------------------------------------------------------------------------- same day

def day_disagreements(am_rows: Sequence[Mapping[str, Any]], pm_rows: Sequence[Mapping[str, Any]],
                      settings: FitSettings) -> dict[str, str]:
    """Channels whose morning and afternoon V0 at 1 AU disagree, with the reason.

    A steady drift of the optical depth through a half-day keeps the Langley plot
    straight and moves V0 without a trace in that session's residuals (Shaw 1983, from
    memory); the same day's other session, with the drift running the other way
    against air mass, is the check a single session cannot make. The allowed difference
    is ``settings.max_am_pm_difference`` or three combined stated uncertainties,
    whichever is larger. A pair is compared when at least one session is accepted and
    both have a V0 (a session refused for its residuals still testifies against the
    other); the caller refuses whichever of the two was accepted.
    """
    am = {r["channel"]: r for r in am_rows}
    out = {}
    for pm in pm_rows:
        a = am.get(pm["channel"])
        if a is None or not (pm["accepted"] or a["accepted"]):
            continue
        v_am, v_pm = a["v0_1au"], pm["v0_1au"]
        u_am, u_pm = a["v0_rel_unc"] or 0.0, pm["v0_rel_unc"] or 0.0
        if not (v_am and v_pm and math.isfinite(v_am) and math.isfinite(v_pm)):
            continue
        diff = v_pm / v_am - 1.0
        limit = max(settings.max_am_pm_difference, 3.0 * math.hypot(u_am, u_pm))
        if abs(diff) > limit:
            out[pm["channel"]] = (
                f"morning and afternoon V0 at 1 AU differ by {100 * diff:+.2f} % (allowed "
                f"{100 * limit:.2f} %): the optical depth drifted during the day")
    return out


def apply_day_check(am_rows: Sequence[dict[str, Any]], pm_rows: Sequence[dict[str, Any]],
                    settings: FitSettings) -> dict[str, str]:
    """Refuse, in place, both sessions of every channel whose morning and afternoon
    disagree (:func:`day_disagreements`); return the reasons by channel. A row already
    refused keeps its first reason and gets this one after it."""
    found = day_disagreements(am_rows, pm_rows, settings)
    for row in (*am_rows, *pm_rows):
        reason = found.get(row["channel"])
        if reason is None:
            continue
        if row["accepted"]:
            row["accepted"] = False
            row["reasons"] = [reason, *row.get("notes", ())]
        else:
            row["reasons"] = [*row["reasons"], reason]
    return found


# --------------------------------------------------------------------------- store

def fit_stored_session(store: Store, config: Config, plan_date: str | _dt.date, session: str,
                       fitted_utc: _dt.datetime) -> list[dict[str, Any]]:
    """Fit every configured channel of one stored session, save and return the results.

    Parameters
    ----------
    store : Store
        The open store holding the session's measurements.
    config : Config
        Channels (order, wavelength, temperature coefficient), fit settings and the
        pointing limit used for screening.
    plan_date : str or date
        Local civil date of the plan, YYYY-MM-DD.
    session : str
        'am' or 'pm'.
    fitted_utc : datetime
        Aware UTC time of the fit (from the injected clock).

    Returns
    -------
    list of dict
        One row per channel in configuration order, in the JSON contract
        (:data:`daemon.storeread.RESULT_KEYS`); numbers that could not be computed
        are None. A re-fit replaces the stored rows of the same channels, and with
        them, in the same transaction, the per-point records of the fit
        (``fit_points``, see :func:`fit_point_records`). When a calibration is
        stored, the session's aerosol optical depths are computed and stored too
        (:func:`daemon.aod.update_aod`).
    """
    date = check_plan_date(plan_date)
    if session not in FIT_SESSIONS:
        raise ValueError(f"only 'am' and 'pm' sessions are fitted; got {session!r}")
    points = store.session_points(date, session)
    series = {ch.name: screen_channel(points, ch, config) for ch in config.channels}
    rows = fit_series(series, config, date, session)
    if session == "pm":
        am_rows = [r for r in results_between(store.conn, date, date) if r["session"] == "am"]
        am_accepted = {r["channel"] for r in am_rows if r["accepted"]}
        for channel, reason in apply_day_check(am_rows, rows, config.fit).items():
            if channel in am_accepted:  # stored this morning as accepted: no longer
                store.refuse_session_result(date, "am", channel, reason)
    store.save_session_results(date, session, rows, fitted_utc=fitted_utc)
    _update_aod(store, config, date, session, fitted_utc)
    return [contract(r) for r in rows]


def _update_aod(store: Store, config: Config, date: str, session: str,
                now: _dt.datetime) -> None:
    from daemon.aod import update_aod

    try:
        update_aod(store, config, date, date, sessions=(session,))
    except Exception as exc:  # noqa: BLE001 - the fit is saved; AOD must not stop the day
        log.exception("AOD update failed")
        store.record_event(now, "error", "aod", f"{date} {session}: aerosol optical depth "
                           f"not computed ({exc})")
