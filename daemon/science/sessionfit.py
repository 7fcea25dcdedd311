"""End-of-session Langley fit: screen, correct, fit, save.

For each configured channel, every 'ok' measurement of the session is screened
(no confirmed sun lock, saturation, a burst too variable to be clear sky), the
mean dark signal is subtracted and the detector-temperature correction applied.
Before the fit ln V is corrected for what the Kasten-Young air mass does not
describe (:func:`extinction_corrections`): ozone sits in a layer near 22 km and has
an air mass of its own, and a pressure change through the session changes the
Rayleigh optical depth. Window channels are fitted with ln V against air mass
(:func:`daemon.science.langley.fit_session`); a water-vapour channel near 940 nm with the
modified Langley, once the window channels have given the aerosol. V0 is normalised
to 1 AU with the mean Earth-Sun factor of the points used, and the rows are saved
to the store and returned in the JSON contract of :mod:`daemon.store.reader`.

Every row also carries ``fit_points``: per measurement of the session the (x, y) the
fit used and the point's role (:func:`fit_point_records`). The store keeps them
beside the result, so the read-only plot and report show exactly the fitted points
without importing this module (which needs pvlib).

:func:`fit_series` is the store-free core; the offline ``refit`` command uses it too.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from daemon.config.settings import Channel, Config, FitSettings
from daemon.science import atmosphere
from daemon.science.lamp import lamp_check, lamp_note
from daemon.science.langley import FitResult, fit_coordinates, fit_session, v0_at_1au
from daemon.science.ozone import channel_cross_section_cm2, ozone_optical_depth
from daemon.science.points import FIT_POINT_ROLES
from daemon.science.screening import (  # noqa: F401 - the fit's inputs, named here too
    SCREENING_KEYS,
    ChannelSeries,
    PointSignal,
    ScreenedPoints,
    point_signal,
    screen_channel,
    temperature_corrected,
)

#: Channels below this wavelength [nm] need the pressure normalisation when the
#: pressure moves more than ``fit.max_pressure_change_hpa`` (BSRN Operations Manual,
#: McArthur 2005, WMO/TD-No. 1274, sec. 7.4.2.1).
PRESSURE_SENSITIVE_BELOW_NM = 500.0


#: Roles of a point in a stored session fit (the ``fit_points`` table): in the final
#: line; a candidate clipped as an outlier; outside the air-mass window or without a
#: finite x or y; dropped by screening (``reason`` says which rule); a candidate of a
#: channel that got no line (too few points, or a water-vapour channel without the
#: aerosol it needs).
ROLE_USED, ROLE_REJECTED, ROLE_OUTSIDE, ROLE_SCREENED, ROLE_UNFITTED = FIT_POINT_ROLES


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
    the nominal column times the band's cross-section (:mod:`daemon.science.ozone`), and a
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
    nominal = atmosphere.site_pressure_hpa(config.site)
    p_ref = float(finite_p.mean()) if finite_p.size else nominal
    if finite_p.size < p.size and p.size:
        notes.append(f"{p.size - finite_p.size} of {p.size} points without a pressure: "
                     f"taken as {p_ref:.1f} hPa")
    p_filled = np.where(np.isfinite(p), p, p_ref)
    change = float(np.ptp(p_filled)) if p_filled.size else 0.0
    tau_r_ref = float(atmosphere.rayleigh_optical_depth(channel.wavelength_nm, p_ref))
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
        point of ``s``, as :func:`daemon.science.langley.fit_coordinates` gives them for the
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
        (:data:`daemon.store.reader.RESULT_KEYS`) plus ``notes``, ``earth_sun_factor``,
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
