"""Stores for the report tests: the synthetic day of :mod:`tests.synthetic_store` with a
refused session, a stored calibration and the day's aerosol optical depth."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

from daemon.commands.report import build_report
from daemon.station.fitting import update_aod
from daemon.store.reader import open_readonly, results_between
from daemon.store.writer import Store
from tests.synthetic_store import DAY, V0, SyntheticDay, build_day

REFUSED = ("pm", "500")  # the session and channel refused after the fit
REFUSAL = "refused by hand for the report test: V0 differs from the morning's"
CAL_CREATED = dt.datetime(2027, 2, 16, 6, 0, tzinfo=dt.UTC)
CAL_UNC = 0.001  # relative standard uncertainty given to the calibration's V0
MADE = dt.datetime(2027, 2, 16, 7, tzinfo=dt.UTC)  # when the report says it was made


def report_page(day: SyntheticDay, path: Path | None = None) -> str:
    """The report of the synthetic date from ``day``'s store (or a copy at ``path``)."""
    return build_report(path or day.path, day.config, DAY.isoformat(), MADE)


def build_campaign_day(path: Path) -> SyntheticDay:
    """The synthetic day with :data:`REFUSED` refused, a one-day calibration whose V0 at
    1 AU is the synthetic truth (:data:`tests.synthetic_store.V0`), and its AOD."""
    day = build_day(path)
    conn = open_readonly(path)
    try:
        results = results_between(conn, DAY, DAY)
    finally:
        conn.close()
    rows = []
    for name, v0 in V0.items():
        sessions = [{"date": r["date"], "session": r["session"], "v0_1au": r["v0_1au"],
                     "v0_rel_unc": r["v0_rel_unc"],
                     "deviation_pct": 100 * (r["v0_1au"] / v0 - 1),
                     "flagged": (r["session"], name) == REFUSED}
                    for r in results if r["channel"] == name]
        rows.append({"channel": name, "wavelength_nm": float(name), "v0_1au": v0,
                     "v0_1au_unc": v0 * CAL_UNC, "repeatability_pct": 0.1,
                     # kept and flagged, as daemon.science.campaign counts them
                     "n_sessions": sum(1 for s in sessions if not s["flagged"]),
                     "n_flagged": sum(1 for s in sessions if s["flagged"]),
                     "drift_pct_per_year": None, "drift_unc_pct_per_year": None,
                     "e0_1au_w_m2_nm": None, "astm_ratio": None, "usable": True,
                     "sessions": sessions, "reasons": []})
    with Store.open(path) as store:
        store.refuse_session_result(DAY.isoformat(), *REFUSED, REFUSAL)
        store.save_calibration(CAL_CREATED, DAY.isoformat(), DAY.isoformat(),
                               "Pico Sereno Station", {}, ["a one-day campaign (test)"], rows)
        update_aod(store, day.config, DAY.isoformat(), DAY.isoformat())
    return day


DRIFT_DATES = ("2027-02-11", "2027-02-12", "2027-02-13", "2027-02-14", "2027-02-15")
# The invented campaign of the drift chart: each channel's response falls 0.05 % a day
# (a filter ageing fast, so five days show it), morning and afternoon 0.03 % apart, and
# one afternoon 2 % high, which the campaign's sigma clipping flags.
DRIFT_PER_DAY = -0.0005
OUTLIER = ("2027-02-13", "pm", 0.02)
DRIFT_CREATED = dt.datetime(2027, 2, 16, 6, 30, tzinfo=dt.UTC)


def drift_sessions(name: str) -> list:
    """The invented campaign's accepted sessions of channel ``name``."""
    from daemon.science.campaign import SessionV0

    out = []
    for i, date in enumerate(DRIFT_DATES):
        for session, offset in (("am", 0.00015), ("pm", -0.00015)):
            rel = DRIFT_PER_DAY * (i - 2) + offset
            if (date, session) == OUTLIER[:2]:
                rel += OUTLIER[2]
            out.append(SessionV0(date, session, V0[name] * (1 + rel), 0.002))
    return out


def build_drift_campaign(path: Path) -> SyntheticDay:
    """:func:`build_campaign_day`, then a newer calibration over the five dates of
    :data:`DRIFT_DATES`, each channel combined by the campaign's own statistics
    (:func:`daemon.science.campaign.combine_sessions`), as ``calibrate`` stores it."""
    from dataclasses import asdict

    from daemon.science.campaign import combine_sessions

    day = build_campaign_day(path)
    rows = [asdict(combine_sessions(name, float(name), drift_sessions(name)))
            for name in V0]
    with Store.open(path) as store:
        store.save_calibration(DRIFT_CREATED, DRIFT_DATES[0], DRIFT_DATES[-1],
                               "Pico Sereno Station", {},
                               ["a five-day campaign with a drifting response (test)"], rows)
    return day
