"""The campaign's uncertainty: never below what its sessions' scatter allows.

Sessions from the simulator's independent sky (sim_instrument.sessions, its own
physics) fitted by the daemon; the statistics checked against Python's statistics
module and the GUM's rules (JCGM 100:2008).
"""

from __future__ import annotations

import math
import statistics

import numpy as np
import pytest

from daemon.science.campaign import SessionV0, campaign, campaign_uncertainty, combine_sessions
from daemon.science.sessionfit import apply_day_check, fit_series, shared_unc
from sim_instrument.scenario import load_scenario
from sim_instrument.sessions import session_series
from tests.independent_sky import channel_series, config_for, days


def test_agreeing_sessions_cannot_claim_less_than_their_own_uncertainties():
    # Ten sessions that happen to agree to 0.001 %, each stating 0.10 % of which 0.06 %
    # is shared: the mean is uncertain by sqrt(0.08^2 / 10 + 0.06^2) = 0.0657 %
    # (GUM 4.2.3 for the independent part, 5.2 fully correlated for the shared one).
    values = [SessionV0(f"2027-02-{1 + i:02d}", "am", 1.5 * (1 + 1e-5 * (-1) ** i), 0.001,
                        0.0006) for i in range(10)]
    c = combine_sessions("500", 500.0, values)
    assert c.v0_1au_unc / c.v0_1au == pytest.approx(
        math.sqrt(0.0008 ** 2 / 10 + 0.0006 ** 2), rel=1e-6)


def test_scattered_sessions_give_the_standard_error_of_the_mean_plus_the_shared_part():
    values = [1.5012, 1.4987, 1.5003, 1.4995, 1.5020, 1.4990, 1.5008]
    sessions = [SessionV0(f"2027-02-{1 + i:02d}", "pm", v, 1e-5, 1e-5) for i, v in
                enumerate(values)]
    c = combine_sessions("500", 500.0, sessions)
    sem = statistics.stdev(values) / math.sqrt(len(values))  # Python's statistics module
    assert c.v0_1au_unc == pytest.approx(math.hypot(sem, 1e-5 * c.v0_1au), rel=1e-9)


def test_campaign_uncertainty_formula_takes_the_larger_independent_part():
    stated = np.full(4, 0.002)
    shared = np.zeros(4)
    # sd 0.1 % of 1 V over 4 sessions: 0.05 %; stated 0.2 % / 2 = 0.1 %: the larger wins.
    assert campaign_uncertainty(1.0, 0.001, stated, shared) == pytest.approx(0.001)
    assert campaign_uncertainty(1.0, 0.006, stated, shared) == pytest.approx(0.003)


@pytest.fixture(scope="module")
def ten_days():
    """Ten days of the independent sky, fitted and day-checked as the service does:
    (config, result rows, truth V0 at 1 AU by channel)."""
    scenario = load_scenario("pico-sereno-independent")
    config = config_for(scenario)
    results = []
    for i, day in enumerate(days(10)):
        rows = {}
        for session in ("am", "pm"):
            s = session_series(scenario, day, session, seed=200 + i, burst_noise_relative=0.001)
            rows[session] = fit_series(channel_series(s, config), config, day.isoformat(),
                                       session)
        apply_day_check(rows["am"], rows["pm"], config.fit)
        results += rows["am"] + rows["pm"]
    return config, results, {name: t.v0_1au_v for name, t in s.truth.items()}


@pytest.mark.slow
def test_ten_simulated_days_campaign_uncertainty_not_below_spread_over_sqrt_n(ten_days):
    # Done-when: on ten simulated days the campaign uncertainty is not below (session
    # spread) / sqrt(N), and not below what the sessions share; no more the 0.006 to
    # 0.025 % that the standard error of agreeing sessions alone gave.
    config, results, truth = ten_days
    cals = [c for c in campaign(results, config) if c.channel != "940"]
    assert cals and all(c.usable for c in cals)
    for c in cals:
        ch = config.channel(c.channel)
        kept = [x["v0_1au"] for x in c.sessions if not x["flagged"]]
        n = len(kept)
        spread = statistics.stdev(kept)
        assert c.v0_1au_unc >= spread / math.sqrt(n) * (1 - 1e-12)
        row = next(r for r in results if r["channel"] == c.channel and r["accepted"])
        shared = shared_unc(ch, config, np.linspace(row["airmass_min"], row["airmass_max"],
                                                    17), row["tau"])
        assert c.v0_1au_unc / c.v0_1au >= shared * 0.9
        # The campaign's error is within three of its stated uncertainties (GUM: a
        # standard uncertainty; beyond three would be a dishonest one).
        assert abs(c.v0_1au / truth[c.channel] - 1) < 3 * c.v0_1au_unc / c.v0_1au, c.channel


@pytest.mark.slow
def test_the_water_vapour_campaign_keeps_its_shared_terms_whole(ten_days):
    # The 940 nm channel's b and its layer air masses are the same on every day: the
    # campaign adds them whole, not divided by the number of sessions (GUM 5.2, fully
    # correlated), and its error stays within three of its uncertainties.
    config, results, truth = ten_days
    c = next(c for c in campaign(results, config) if c.channel == "940")
    assert c.usable
    shared = [r["v0_shared_rel_unc"] for r in results if r["channel"] == "940"
              and r["accepted"]]
    assert len(shared) >= 10 and min(shared) > 0.0
    assert c.v0_1au_unc / c.v0_1au >= min(shared) * (1 - 1e-9)
    assert abs(c.v0_1au / truth["940"] - 1) < 3 * c.v0_1au_unc / c.v0_1au
    # the shared part is the root sum of squares of the shared budget terms
    r = next(r for r in results if r["channel"] == "940" and r["accepted"])
    names = ("water_vapour_exponent", "water_vapour_airmass_model", "aerosol_layer_airmass")
    assert r["v0_shared_rel_unc"] == pytest.approx(math.sqrt(sum(
        r["uncertainty_budget"].get(k, 0.0) ** 2 for k in names)), rel=1e-12)
