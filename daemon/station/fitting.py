"""The store's side of the session fit and the aerosol step: load, run the science, save.

:func:`fit_stored_session` reads one session's points from the store, fits them with
the pure :func:`daemon.science.sessionfit.fit_series`, applies the same-day check
against the stored morning, saves the rows and the per-point records in one
transaction, and then, downstream of the fit, :func:`update_aod` computes the aerosol
optical depth of the session's measurements when a calibration is stored.
"""

from __future__ import annotations

import datetime as _dt
import logging
from collections.abc import Mapping, Sequence
from typing import Any

from daemon.config.settings import Config
from daemon.science import atmosphere
from daemon.science.aod import angstrom_pair, point_alpha, point_aod
from daemon.science.campaign import drift_repeatability
from daemon.science.ozone import channel_cross_section_cm2, ozone_optical_depth
from daemon.science.sessionfit import aerosol_at, apply_day_check, fit_series, screen_channel
from daemon.science.watervapour import point_water, water_vapour_channels
from daemon.store.reader import (
    FIT_SESSIONS,
    SESSIONS,
    check_plan_date,
    result_contract,
    results_between,
    stored_calibration,
)
from daemon.store.writer import Store

log = logging.getLogger(__name__)
# AOD values a campaign holds before it stores them: about 10 MB, some 20 days.
AOD_BATCH_ROWS = 5000


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
        (:data:`daemon.store.reader.RESULT_KEYS`); numbers that could not be computed
        are None. A re-fit replaces the stored rows of the same channels, and with
        them, in the same transaction, the per-point records of the fit
        (``fit_points``, see :func:`fit_point_records`). When a calibration is
        stored, the session's aerosol optical depths are computed and stored too
        (:func:`update_aod`).
    """
    date = check_plan_date(plan_date)
    if session not in FIT_SESSIONS:
        raise ValueError(f"only 'am' and 'pm' sessions are fitted; got {session!r}")
    points = store.session_points(date, session)
    series = {ch.name: screen_channel(points, ch, config) for ch in config.channels}
    rows = fit_series(series, config, date, session, campaign_repeatability(store))
    if session == "pm":
        am_rows = [r for r in results_between(store.conn, date, date) if r["session"] == "am"]
        am_accepted = {r["channel"] for r in am_rows if r["accepted"]}
        am_unc = {r["channel"]: r["v0_rel_unc"] for r in am_rows}
        for channel, reason in apply_day_check(am_rows, rows, config.fit).items():
            if channel in am_accepted:  # stored this morning as accepted: no longer
                store.refuse_session_result(date, "am", channel, reason)
        for r in am_rows:  # widened for the disagreement with this afternoon
            if r["v0_rel_unc"] != am_unc[r["channel"]] and r.get("notes"):
                store.widen_session_result(date, "am", r["channel"], r["v0_rel_unc"],
                                           r["notes"][-1])
    store.save_session_results(date, session, rows, fitted_utc=fitted_utc)
    _update_aod(store, config, date, session, fitted_utc)
    return [result_contract(r) for r in rows]


def campaign_repeatability(store: Store) -> dict[str, float]:
    """The newest stored calibration's repeatability per usable channel [fraction].

    ``heliotrope calibrate`` stores the site's spread of session V0 per channel; the
    session fit takes it as its drift allowance
    (:func:`daemon.science.sessionfit.drift_allowance`). Empty without a calibration.
    """
    cal = stored_calibration(store.conn)
    if cal is None:
        return {}
    # The larger of that and what the campaign's same-day pairs imply (refused included).
    return drift_repeatability(cal["channels"],
                               results_between(store.conn, cal["from"], cal["to"]))


def _update_aod(store: Store, config: Config, date: str, session: str,
                now: _dt.datetime) -> None:
    try:
        update_aod(store, config, date, date, sessions=(session,))
    except Exception as exc:  # noqa: BLE001 - the fit is saved; AOD must not stop the day
        log.exception("AOD update failed")
        store.record_event(now, "error", "aod", f"{date} {session}: aerosol optical depth "
                           f"not computed ({exc})")


def _sessions_in(store: Store, first: str, last: str,
                 sessions: Sequence[str]) -> list[tuple[str, str]]:
    rows = store.conn.execute(
        "SELECT DISTINCT plan_date, session FROM measurements WHERE status = 'ok' "
        "AND plan_date BETWEEN ? AND ? ORDER BY plan_date, session", (first, last)).fetchall()
    return [(d, s) for d, s in rows if s in sessions]


def update_aod(store: Store, config: Config, first: str, last: str,
               sessions: Sequence[str] = SESSIONS,
               calibration: Mapping[str, Any] | None = None) -> int:
    """Compute and store the AOD of every measurement from ``first`` to ``last``.

    Parameters
    ----------
    store : Store
        The service's store (written).
    config : Config
        Channels, ozone column, nominal pressure, screening limits.
    first, last : str
        Plan dates, inclusive (YYYY-MM-DD).
    sessions : sequence of str
        Which sessions: 'am', 'pm', 'routine'.
    calibration : mapping, optional
        A record as :func:`daemon.store.reader.stored_calibration` returns it; default
        the newest stored one. Without any calibration nothing is done.

    Returns
    -------
    int
        The number of (measurement, channel) values stored.

    Notes
    -----
    A measurement without a confirmed lock, saturated, or without a positive signal
    gets no AOD; a burst too variable to be clear sky gets one with a ``flag``.
    Water-vapour channels and channels the calibration cannot use are left out.
    """
    d1, d2 = check_plan_date(first), check_plan_date(last)
    cal = calibration if calibration is not None else stored_calibration(store.conn)
    if cal is None:
        return 0
    v0 = {c["channel"]: c for c in cal["channels"]
          if c["usable"] and c["v0_1au"] is not None and c["v0_1au"] > 0}
    channels = [c for c in config.channels if c.name in v0 and not c.water_vapour]
    if not channels:
        return 0
    water = water_vapour_channels(config, v0)
    nominal_p = atmosphere.site_pressure_hpa(config.site)
    tau_o3 = {}
    for c in channels:
        sigma = channel_cross_section_cm2(c)
        tau_o3[c.name] = None if sigma is None else ozone_optical_depth(sigma,
                                                                        config.site.ozone_du)
    pair = angstrom_pair(config)
    stored = 0
    rows: list[dict[str, Any]] = []
    alphas: list[dict[str, Any]] = []
    # Stored in batches of whole sessions, each batch its own transaction: memory stays
    # that of one batch whatever the campaign's length, and a service writing beside a
    # long campaign waits at most one batch's write. A campaign cut short leaves whole
    # sessions with the new calibration's id on their values; running it again
    # replaces them all.
    for date, session in _sessions_in(store, d1, d2, sessions):
        for p in store.session_points(date, session):
            per_channel = point_aod(p, channels, config, v0, tau_o3, nominal_p, cal["id"])
            rows.extend(per_channel.values())
            rows.extend(point_water(p, water, config, v0, per_channel, cal["id"], aerosol_at))
            if pair is not None:
                alpha = point_alpha(p.measurement_id, per_channel, pair, cal["id"])
                if alpha is not None:
                    alphas.append(alpha)
        if len(rows) >= AOD_BATCH_ROWS:
            stored += store.save_aod(rows, alphas)
            rows, alphas = [], []
    return stored + store.save_aod(rows, alphas)
