"""Cirrus-contaminated and drifting sessions: what the fit accepts must be honest."""

from __future__ import annotations

import math

import numpy as np
import pytest

from daemon.science.sessionfit import ChannelSeries, apply_day_check, fit_series
from tests.langley_sessions import days, pico_config, simulate_session


def _series(s, config):
    net, cv = s.net_signal(), s.burst_cv()
    hours = np.array([t.timestamp() / 3600.0 for t in s.times])
    out = {}
    for j, name in enumerate(s.channels):
        keep = cv[:, j] <= config.fit.max_cv  # the daemon's cloud screen
        out[name] = ChannelSeries(s.airmass[keep], s.ozone_airmass[keep], s.pressure_hpa[keep],
                                  net[keep, j], s.earth_sun_factor[keep], len(s.times),
                                  hours=hours[keep])
    return out


@pytest.mark.slow
def test_accepted_cirrus_sessions_err_within_three_stated_uncertainties():
    # A standard uncertainty describes the spread of the error (JCGM 100:2008, GUM;
    # from memory): an accepted session beyond three of them would be a dishonest one.
    config = pico_config()
    accepted = rejected = unchecked = 0
    z = []
    for day in days(20):
        rows = {}
        for session in ("am", "pm"):
            s = simulate_session(day, session, "cirrus", seed=0)
            rows[session] = fit_series(_series(s, config), config, s.date, session)
        # A drift through a half-day leaves no trace in that session (Shaw 1983, Bull.
        # AMS 64:4-10; from memory): the day's other session is the check, as in the
        # service (daemon.station.fitting).
        apply_day_check(rows["am"], rows["pm"], config.fit)
        for session in ("am", "pm"):
            for r in rows[session]:
                if not r["accepted"]:
                    rejected += 1
                    assert r["reasons"]  # every rejection says why
                    continue
                accepted += 1
                # Without the other session's V0 nothing checks a drift: the row says so.
                assert any(n.startswith("not visible in one session") for n in r["notes"])
                other = rows["pm" if session == "am" else "am"]
                partner = next(o for o in other if o["channel"] == r["channel"])
                if not partner["accepted"]:  # a refused session testifies only weakly
                    unchecked += 1
                    continue
                err = math.log(r["v0_1au"] / s.v0_1au_true[r["channel"]])
                z.append(err / r["v0_rel_unc"])
                assert abs(err) < 3 * r["v0_rel_unc"], (s.date, session, r["channel"], err)
    # Most cirrus half-days are refused; some (cirrus only at the edges, removed as
    # outliers) are good enough to keep.
    assert rejected > 3 * accepted > 0
    # On these days every accepted session's partner was refused: no data checks their
    # drift (README, "what no session can see"); the campaign's repeatability does later.
    assert unchecked <= accepted
    if z:
        assert float(np.sqrt(np.mean(np.square(z)))) < 1.5


def test_a_thin_cirrus_band_is_named_in_the_reasons():
    config = pico_config()
    reasons = []
    for day in days(4):
        s = simulate_session(day, "am", "cirrus", seed=1)
        for r in fit_series(_series(s, config), config, s.date, "am"):
            reasons += r["reasons"]
    text = " | ".join(reasons)
    assert "in ln V above the limit" in text or "residuals bend by" in text
