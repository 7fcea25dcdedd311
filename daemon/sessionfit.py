"""End-of-session Langley fit from the store: screen, correct, fit, save.

For each configured channel, every 'ok' measurement of the session is screened
(no confirmed sun lock, saturation, a burst too variable to be clear sky), the
mean dark signal is subtracted, the detector-temperature correction applied, and
ln V fitted against air mass (:func:`daemon.langley.fit_session`). V0 is then
normalised to 1 AU with the mean Earth-Sun factor of the points used, and the rows
are saved to the store and returned in the JSON contract of
:mod:`daemon.storeread`.
"""

from __future__ import annotations

import datetime as _dt
import math
from typing import Any

import numpy as np

from daemon.config import Channel, Config
from daemon.langley import FitResult, fit_session, v0_at_1au
from daemon.store import FIT_SESSIONS, SessionPoint, Store
from daemon.storeread import RESULT_KEYS, check_plan_date


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


def _count(n: int, what: str) -> str:
    return f"{n} burst{'s' if n != 1 else ''} {what}"


def _screen_channel(points: list[SessionPoint], channel: Channel,
                    config: Config) -> tuple[list[float], list[float], list[float], list[str]]:
    """Air masses, corrected signals [V] and Earth-Sun factors of the points kept."""
    max_cv = config.fit.max_cv
    max_pointing = config.acquisition.max_pointing_error_deg
    airmass: list[float] = []
    signal: list[float] = []
    factor: list[float] = []
    missing = unlocked = saturated = cloudy = no_dark = no_hk = 0
    for p in points:
        st = p.channels.get(channel.name)
        if st is None or st.n_sun == 0 or st.sun_mean_v is None:
            missing += 1
            continue
        pointing_ok = p.pointing_error_deg is None or p.pointing_error_deg <= max_pointing
        if not p.locked or not pointing_ok:
            unlocked += 1
            continue
        if st.saturated:
            saturated += 1
            continue
        dark = st.dark_mean_v
        if dark is None:
            no_dark += 1
            dark = 0.0
        net = st.sun_mean_v - dark
        # The spread of a clear-sky burst is detector noise; a cloud edge or thin
        # cirrus passing through the field of view makes it jump.
        if st.sun_sd_v is not None and net > 0.0 and st.sun_sd_v / net > max_cv:
            cloudy += 1
            continue
        hk = p.housekeeping
        if hk is not None:
            net = temperature_corrected(net, hk.detector_temp_c, channel)
        elif channel.temp_coeff_per_k != 0.0:
            no_hk += 1
        airmass.append(math.nan if p.airmass is None else p.airmass)
        signal.append(net)
        factor.append(math.nan if p.earth_sun_factor is None else p.earth_sun_factor)
    notes = []
    if missing:
        notes.append(_count(missing, f"without samples of channel {channel.name}"))
    if unlocked:
        notes.append(_count(unlocked, "screened: sun lock not confirmed or pointing error above "
                                      f"{max_pointing:g} degrees"))
    if saturated:
        notes.append(_count(saturated, "screened: saturated"))
    if cloudy:
        notes.append(_count(cloudy, f"screened as cloudy: burst coefficient of variation "
                                    f"above {max_cv:g}"))
    if no_dark:
        notes.append(_count(no_dark, "without a dark reading: dark taken as 0 V"))
    if no_hk:
        notes.append(_count(no_hk, "without housekeeping: no detector-temperature correction"))
    return airmass, signal, factor, notes


def _row(plan_date: str, session: str, channel: Channel, fit: FitResult, n_total: int,
         factors: list[float], screen_notes: list[str]) -> dict[str, Any]:
    used = np.asarray(fit.used, dtype=bool)
    f = np.asarray(factors, dtype=float)[used] if used.any() else np.empty(0)
    notes = list(screen_notes) + list(fit.notes)
    mean_factor = math.nan
    v0_1au = math.nan
    if f.size and np.all(np.isfinite(f)) and np.all(f > 0):
        mean_factor = float(f.mean())
        if math.isfinite(fit.v0):
            v0_1au = v0_at_1au(fit.v0, mean_factor)
    elif f.size:
        notes.append("Earth-Sun factor missing for some used points: V0 at 1 AU not computed")
    # A rejected fit lists its failed criteria first, then everything that explains
    # why points were missing; an accepted fit has no reasons (the contract).
    reasons = [] if fit.accepted else list(fit.reasons) + [n for n in notes
                                                           if n not in fit.reasons]
    return {
        "date": plan_date, "session": session, "channel": channel.name,
        "wavelength_nm": channel.wavelength_nm,
        "v0": fit.v0, "v0_1au": v0_1au, "v0_rel_unc": fit.v0_rel_unc, "tau": fit.tau,
        "n_used": fit.n_used, "n_total": n_total,
        "airmass_min": fit.airmass_min, "airmass_max": fit.airmass_max,
        "accepted": fit.accepted, "reasons": reasons,
        "notes": notes, "earth_sun_factor": mean_factor, "residual_sd": fit.residual_sd,
    }


def _contract(row: dict[str, Any]) -> dict[str, Any]:
    out = {}
    for key in RESULT_KEYS:
        value = row[key]
        if isinstance(value, float) and not math.isfinite(value):
            value = None
        out[key] = value
    return out


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
        are None. A re-fit replaces the stored rows of the same channels.
    """
    date = check_plan_date(plan_date)
    if session not in FIT_SESSIONS:
        raise ValueError(f"only 'am' and 'pm' sessions are fitted; got {session!r}")
    points = store.session_points(date, session)
    rows = []
    for channel in config.channels:
        airmass, signal, factors, screen_notes = _screen_channel(points, channel, config)
        fit = fit_session(np.asarray(airmass), np.asarray(signal), config.fit)
        rows.append(_row(date, session, channel, fit, len(points), factors, screen_notes))
    store.save_session_results(date, session, rows, fitted_utc=fitted_utc)
    return [_contract(r) for r in rows]
