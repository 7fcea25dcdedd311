"""Langley regression: exactness, agreement with scipy, outliers, bad input, uncertainty."""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.config.settings import FitSettings
from daemon.science.langley import (
    drift_sensitivity,
    fit_line,
    fit_session,
    lag1_autocorrelation,
    residual_correlation,
    residual_trend,
    v0_at_1au,
)

SETTINGS = FitSettings()  # air mass 2-6, clip 2.5 SD, keep >= 60 %, >= 8 points, span >= 2
# Looser residual limits for tests that add large synthetic noise on purpose.
NOISY = replace(SETTINGS, max_residual_sd=0.01, max_abs_residual=0.05)
AIRMASS = np.arange(2.0, 6.0001, 0.25)  # the default plan's targets: 17 points


def beer_lambert(v0: float, tau: float, airmass: np.ndarray) -> np.ndarray:
    # Beer-Lambert-Bouguer law V = V0 exp(-tau m): common practice, no source.
    return v0 * np.exp(-tau * airmass)


def ar1_noise(rng: np.random.Generator, n: int, phi: float) -> np.ndarray:
    e = np.empty(n)
    e[0] = rng.normal()
    for i in range(1, n):
        e[i] = phi * e[i - 1] + math.sqrt(1.0 - phi * phi) * rng.normal()
    return e


# --------------------------------------------------------------------------- fit_line

@pytest.mark.parametrize("seed", range(5))
def test_fit_line_agrees_with_scipy_linregress(seed):
    # Reference: scipy.stats.linregress (general reference library).
    rng = np.random.default_rng(seed)
    x = rng.uniform(2.0, 6.0, 25) + 100.0 * seed  # offsets test the centred sums
    y = 0.3 - 0.12 * x + rng.normal(0.0, 0.01, x.size)
    ours = fit_line(x, y)
    ref = scipy.stats.linregress(x, y)
    assert ours.slope == pytest.approx(ref.slope, rel=1e-12)
    assert ours.intercept == pytest.approx(ref.intercept, rel=1e-12)
    assert ours.se_slope == pytest.approx(ref.stderr, rel=1e-12)
    assert ours.se_intercept == pytest.approx(ref.intercept_stderr, rel=1e-12)
    assert ours.n == x.size


def test_fit_line_two_points_has_no_residual_sd():
    f = fit_line([1.0, 3.0], [2.0, 6.0])
    assert f.slope == pytest.approx(2.0) and f.intercept == pytest.approx(0.0, abs=1e-15)
    assert math.isnan(f.residual_sd) and math.isnan(f.se_intercept)


@pytest.mark.parametrize("x, y, match", [
    ([1.0], [1.0], "at least 2"),
    ([2.0, 2.0, 2.0], [1.0, 2.0, 3.0], "spread in x"),
    ([1.0, 2.0], [1.0], "equal lengths"),
    ([1.0, 2.0, np.nan], [1.0, 2.0, 3.0], "finite"),
])
def test_fit_line_rejects_bad_input_with_a_message(x, y, match):
    with pytest.raises(ValueError, match=match):
        fit_line(x, y)


# --------------------------------------------------------------------------- fit_session

def test_noise_free_data_recover_v0_and_tau_exactly():
    v0, tau = 1.8734, 0.1432  # 500 nm-like: Rayleigh plus a little aerosol at 3650 m
    r = fit_session(AIRMASS, beer_lambert(v0, tau, AIRMASS), SETTINGS)
    assert r.v0 == pytest.approx(v0, rel=1e-9)
    assert r.tau == pytest.approx(tau, rel=1e-9)
    assert r.ln_v0 == pytest.approx(math.log(v0), abs=1e-9)
    assert r.accepted and r.reasons == ()
    assert r.n_used == r.n_total == AIRMASS.size
    assert all(r.used)
    assert (r.airmass_min, r.airmass_max) == (2.0, 6.0)
    assert r.residual_sd < 1e-12


def test_points_outside_the_window_are_left_out_and_flagged():
    m = np.arange(1.5, 8.01, 0.25)
    r = fit_session(m, beer_lambert(1.2, 0.3, m), SETTINGS)
    inside = (m >= 2.0) & (m <= 6.0)
    assert r.used == tuple(bool(b) for b in inside)
    assert r.n_total == m.size and r.n_used == int(inside.sum())
    assert r.v0 == pytest.approx(1.2, rel=1e-9)
    assert any("outside the air-mass window 2 to 6" in n for n in r.notes)


def test_cloud_points_are_rejected_and_v0_stays_close():
    rng = np.random.default_rng(42)
    v0, tau = 1.5, 0.12
    ln_v = math.log(v0) - tau * AIRMASS + rng.normal(0.0, 0.002, AIRMASS.size)
    cloud = [5, 11]  # two bursts attenuated by passing cloud
    ln_v[cloud] += [-0.06, -0.09]
    r = fit_session(AIRMASS, np.exp(ln_v), NOISY)
    assert not r.used[5] and not r.used[11]
    assert sum(r.used) == AIRMASS.size - 2
    # A high site recovers V0 to a few tenths of a percent (Schmid and Wehrli 1995,
    # Applied Optics 34(21):4500, V0 scatter below 0.25 % rms); allow 0.5 % here.
    assert r.v0 == pytest.approx(v0, rel=5e-3)
    assert r.accepted
    assert any("2 points rejected as outliers" in n for n in r.notes)
    # Without clipping the same data miss by more: the test can fail.
    no_clip = fit_session(AIRMASS, np.exp(ln_v), replace(NOISY, clip_sigma=10.0))
    assert abs(no_clip.v0 / v0 - 1) > 2 * abs(r.v0 / v0 - 1)


def test_rejection_never_keeps_fewer_than_the_minimum_fraction():
    rng = np.random.default_rng(3)
    m = np.linspace(2.0, 6.0, 10)
    ln_v = 0.4 - 0.1 * m + rng.normal(0.0, 0.001, m.size)
    ln_v[::2] += rng.uniform(-0.3, 0.3, 5)  # half the points wild
    settings = replace(SETTINGS, min_fraction_kept=0.6, min_points=3)
    r = fit_session(m, np.exp(ln_v), settings)
    assert r.n_used >= math.ceil(0.6 * m.size)


@pytest.mark.parametrize("airmass, signal, phrase", [
    ([], [], "no usable points of 0"),
    ([3.0], [1.0], "only 1 usable point of 1"),
    ([3.0, 4.0], [1.0, 0.9], "only 2 usable points"),
    ([2.5, 3.0, 3.5, 4.0], [np.nan, np.nan, np.inf, np.nan], "no usable points of 4"),
    ([2.5, 3.0, 3.5, 4.0], [0.0, -0.1, -1.0, 0.0], "no usable points of 4"),
    ([1.1, 1.5, 7.0, 9.0], [1.0, 0.9, 0.5, 0.4], "no usable points of 4"),
    ([3.0, 3.0, 3.0, 3.0], [1.0, 1.01, 0.99, 1.0], "all 4 usable points are at air mass 3"),
])
def test_bad_inputs_give_reasons_not_crashes(airmass, signal, phrase):
    r = fit_session(np.asarray(airmass, float), np.asarray(signal, float), SETTINGS)
    assert not r.accepted
    assert math.isnan(r.v0) and math.isnan(r.tau) and math.isnan(r.v0_rel_unc)
    assert r.n_used == 0 and r.n_total == len(airmass)
    assert r.used == (False,) * len(airmass)
    assert any(phrase in reason for reason in r.reasons), r.reasons


def test_dropped_signals_are_counted_in_the_reasons():
    m = AIRMASS
    v = beer_lambert(1.0, 0.1, m)
    v[[0, 1]] = np.nan
    v[2] = 0.0
    v[3] = -0.01
    r = fit_session(m, v, replace(SETTINGS, min_points=20))
    assert not r.accepted
    assert "2 points dropped: signal not finite" in r.reasons
    assert "2 points dropped: signal zero or negative" in r.reasons
    assert r.reasons[0] == "only 13 points used, fewer than the required 20"


def test_each_failed_criterion_is_a_reason_with_its_numbers():
    m = np.linspace(2.0, 3.0, 6)
    wiggle = 0.03 * np.array([1.0, -1.0, 1.0, -1.0, 1.0, -1.0])
    v = np.exp(0.1 + 0.05 * m + wiggle)  # rising with air mass: negative tau
    # The BSRN-style fixed limits (fit.acceptance: absolute) name their limits ...
    r = fit_session(m, v, replace(SETTINGS, acceptance="absolute"))
    assert not r.accepted
    text = " | ".join(r.reasons)
    assert "only 6 points used, fewer than the required 8" in text
    assert "air-mass span 1.00 below the required 2.00" in text
    assert "residual SD 0.0351 in ln V above the limit 0.0030" in text
    assert "largest residual 0.0377 in ln V above the limit 0.0060" in text
    assert "is not positive" in text
    # ... and the scaled ones (the default) their statistics.
    text = " | ".join(fit_session(m, v, SETTINGS).reasons)
    assert "residual SD 0.0351 in ln V is more than a stable sky gives" in text
    assert "for 4 degrees of freedom at fit.false_refusal_rate 0.01" in text
    assert "largest residual -0.0377 in ln V is 12.6 times the 0.0030" in text
    # chi-square 0.99 quantile for 4 degrees of freedom: 13.28 (scipy.stats.chi2.ppf)
    assert "chi-square 548.6 above 13.3 for 4 degrees" in text


def test_mismatched_lengths_are_a_programming_error():
    with pytest.raises(ValueError, match="one signal per air mass"):
        fit_session([2.0, 3.0], [1.0], SETTINGS)


# --------------------------------------------------------------------------- uncertainty

def test_stated_uncertainty_matches_the_scatter_with_white_noise():
    # A standard uncertainty is the standard deviation of the error it describes
    # (JCGM 100:2008, GUM, 2.3.1; from memory): error / uncertainty has rms near 1.
    v0, tau, sd = 1.2, 0.1, 0.003
    z = []
    for seed in range(400):
        rng = np.random.default_rng(seed)
        v = v0 * np.exp(-tau * AIRMASS + rng.normal(0.0, sd, AIRMASS.size))
        r = fit_session(AIRMASS, v, SETTINGS)
        z.append((r.ln_v0 - math.log(v0)) / r.v0_rel_unc)
    rms = float(np.sqrt(np.mean(np.square(z))))
    # A t distribution with 15 degrees of freedom has rms 1.07 (common practice, no source).
    assert 0.85 < rms < 1.25


def test_uncertainty_is_widened_for_correlated_residuals():
    v0, tau, sd, phi = 1.2, 0.1, 0.003, 0.6
    z_stated, z_plain, widen = [], [], []
    for seed in range(300):
        rng = np.random.default_rng(1000 + seed)
        ln_v = math.log(v0) - tau * AIRMASS + sd * ar1_noise(rng, AIRMASS.size, phi)
        r = fit_session(AIRMASS, np.exp(ln_v), SETTINGS)
        used = np.asarray(r.used)
        plain = fit_line(AIRMASS[used], ln_v[used])
        z_stated.append((r.ln_v0 - math.log(v0)) / r.v0_rel_unc)
        z_plain.append((plain.intercept - math.log(v0)) / plain.se_intercept)
        widen.append(r.v0_rel_unc / plain.se_intercept)
    rms_stated = float(np.sqrt(np.mean(np.square(z_stated))))
    rms_plain = float(np.sqrt(np.mean(np.square(z_plain))))
    # The plain OLS error understates the truth badly with correlated residuals;
    # the widened one comes much closer (17 points cannot pin down the correlation).
    assert rms_plain > 1.6
    assert rms_stated < 0.8 * rms_plain
    assert 0.75 < float(np.median(np.abs(z_stated))) / 0.6745 < 1.3  # 0.6745: normal MAD
    assert float(np.median(widen)) > 1.2


def test_strongly_correlated_residuals_over_40_points_are_still_widened():
    # AR(1) noise with phi = 0.7 over 40 points: far beyond what white noise gives a
    # lag-1 r, so every session must be widened, by about what the correlation needs.
    # The need, from the noise model alone (numpy, not the fit): the OLS sandwich
    # variance of the intercept, c' R c with R = phi^|i-j|, over the naive variance,
    # c'c tr(M R) / (n - 2) (common practice, no source).
    v0, tau, sd, phi = 1.2, 0.1, 0.003, 0.7
    m = np.linspace(2.0, 6.0, 40)
    design = np.column_stack([np.ones(m.size), m])
    weights = np.linalg.solve(design.T @ design, design.T)
    c = weights[0]
    corr = phi ** np.abs(np.arange(m.size)[:, None] - np.arange(m.size)[None, :])
    resid_maker = np.eye(m.size) - design @ weights
    needed = math.sqrt(float(c @ corr @ c) / (float(c @ c) * float(np.trace(resid_maker @ corr))
                                              / (m.size - 2)))
    widen = []
    for seed in range(200):
        rng = np.random.default_rng(5000 + seed)
        ln_v = math.log(v0) - tau * m + sd * ar1_noise(rng, m.size, phi)
        r = fit_session(m, np.exp(ln_v), SETTINGS)
        used = np.asarray(r.used)
        widen.append(r.v0_rel_unc / fit_line(m[used], ln_v[used]).se_intercept)
    widen = np.asarray(widen)
    assert float(np.mean(widen > 1.0)) >= 0.95
    # Within the 0.7-1.3 band the project holds error/uncertainty to.
    assert 0.7 * needed < float(np.median(widen)) < 1.3 * needed


def test_residual_correlation_never_narrows_and_detects_drift():
    x = np.linspace(2.0, 6.0, 17)
    alternating = np.tile([1.0, -1.0], 9)[:17]
    assert residual_correlation(x, alternating - alternating.mean()).inflation == 1.0
    drift = np.sin(np.linspace(0.0, 2 * np.pi, 17))  # slow wave left after a line fit
    c = residual_correlation(x, drift)
    assert c.r1 > 0.5 and c.inflation > 2.0 and c.n_eff < 17 / 4


def test_lag1_autocorrelation_of_known_series():
    assert lag1_autocorrelation([1.0, -1.0, 1.0, -1.0]) == pytest.approx(-0.75)
    assert lag1_autocorrelation([0.0, 0.0, 0.0]) == 0.0


# --------------------------------------------------------------------------- 1 AU

def spencer_factor(doy: int) -> float:
    # Spencer (1971), Search 2(5):172 (citation from memory), as in docs/REFERENCES.md.
    g = 2 * math.pi * (doy - 1) / 365
    return (1.000110 + 0.034221 * math.cos(g) + 0.001280 * math.sin(g)
            + 0.000719 * math.cos(2 * g) + 0.000077 * math.sin(2 * g))


def test_v0_at_1au_makes_january_and_july_agree():
    # Spencer's (r0/r)^2: 1.03508 on day 3 and 0.96659 on day 186 (docs/REFERENCES.md, F).
    jan, jul = spencer_factor(3), spencer_factor(186)
    assert jan == pytest.approx(1.03508, abs=1e-5) and jul == pytest.approx(0.96659, abs=1e-5)
    v0_1au = 1.5
    assert v0_at_1au(v0_1au * jan, jan) == pytest.approx(v0_1au, rel=1e-15)
    assert v0_at_1au(v0_1au * jul, jul) == pytest.approx(v0_1au, rel=1e-15)
    # Near perihelion the sun is closer, so the day's V0 is the larger one.
    assert v0_1au * jan > v0_1au > v0_1au * jul
    assert math.isnan(v0_at_1au(math.nan, jan))


@pytest.mark.parametrize("factor", [0.0, -1.0, math.nan, math.inf])
def test_v0_at_1au_rejects_a_bad_factor(factor):
    with pytest.raises(ValueError, match="earth_sun_factor"):
        v0_at_1au(1.0, factor)


# --------------------------------------------------------------------------- extinction

# Geometry of a morning at Pico Sereno (3650 m): apparent zeniths for the default
# targets, Kasten-Young air mass and Komhyr ozone air mass from daemon.science.solar.
ZENITH = np.degrees(np.arccos(1.0 / AIRMASS))  # close enough to span m = 2 to 6


def _airmasses():
    from daemon.science import solar
    m = np.asarray(solar.relative_airmass(ZENITH), dtype=float)
    m_o3 = np.asarray(solar.ozone_airmass(ZENITH, 3650.0), dtype=float)
    return m, m_o3


def test_ozone_correction_makes_noise_free_data_exact():
    # Beer-Lambert with the ozone on its own air mass (Komhyr 1980 layer at 22 km,
    # docs/REFERENCES.md); tau_O3 = 500 nm band at 260 DU from Serdyuchenko et al. (2014)
    # bin means (docs/REFERENCES.md: 9.02e-22 and 1.48e-21 cm^2, 2.687e16 cm^-2 per DU).
    m, m_o3 = _airmasses()
    tau_o3 = 0.5 * (9.02e-22 + 1.48e-21) * 260 * 2.687e16
    tau_rest = 0.0990 + 0.02  # Bodhaine Rayleigh at 700 hPa (docs/REFERENCES.md) plus aerosol
    v0 = 1.9
    v = v0 * np.exp(-tau_rest * m - tau_o3 * m_o3)
    plain = fit_session(m, v, SETTINGS)
    fixed = fit_session(m, v, SETTINGS, ln_correction=tau_o3 * (m_o3 - m),
                        tau_floor=0.0990 + tau_o3)
    # Without the correction ln V bends: the ozone air mass grows slower than m, and the
    # intercept is biased low by a fraction of a percent.
    assert -0.004 < plain.v0 / v0 - 1 < -0.0005
    assert fixed.v0 == pytest.approx(v0, rel=1e-9)
    # The slope is the total optical depth (ozone counted on the Kasten-Young air mass).
    assert fixed.tau == pytest.approx(tau_rest + tau_o3, rel=1e-9)
    assert fixed.accepted and fixed.max_abs_residual < 1e-12


def test_optical_depth_below_rayleigh_plus_ozone_is_not_physical():
    m, _ = _airmasses()
    v = 1.5 * np.exp(-0.05 * m)
    r = fit_session(m, v, SETTINGS, tau_floor=0.0990)  # Bodhaine at 700 hPa, 500 nm
    assert not r.accepted
    assert ("fitted optical depth 0.0500 is below Rayleigh plus ozone 0.0990 (aerosol "
            "-0.0490, lowest allowed -0.0100): not physical") in r.reasons
    ok = fit_session(m, 1.5 * np.exp(-0.095 * m), SETTINGS, tau_floor=0.0990)
    assert ok.accepted  # -0.004 aerosol is within the allowed noise margin


def test_a_single_large_residual_fails_the_largest_residual_criterion():
    m, _ = _airmasses()
    ln_v = 0.5 - 0.1 * m + np.random.default_rng(8).normal(0.0, 0.0005, m.size)
    ln_v[8] += 0.009  # a kept point: 9e-3 is within 2.5 SD of the loosened fit below
    # The BSRN-style fixed limit (fit.acceptance: absolute); the scaled rule is in
    # tests/test_acceptance.py.
    settings = replace(SETTINGS, clip_sigma=10.0, max_residual_sd=0.01, acceptance="absolute")
    r = fit_session(m, np.exp(ln_v), settings)
    assert not r.accepted
    assert any(x.startswith("largest residual 0.00") and x.endswith("above the limit 0.0060")
               for x in r.reasons), r.reasons


def test_a_drifting_session_is_rejected_for_its_bent_residuals():
    # An optical depth that changes during the half-day bends the Langley plot
    # (BSRN Operations Manual, McArthur 2005, sec. 7.4.2.1: reject a trend in the
    # residuals). The curvature here is 0.004 m^2 over m = 2 to 6.
    m, _ = _airmasses()
    rng = np.random.default_rng(5)
    bent = 0.4 - 0.1 * m + 0.004 * (m - 4.0) ** 2 + rng.normal(0.0, 0.0004, m.size)
    r = fit_session(m, np.exp(bent), SETTINGS)
    assert not r.accepted
    assert any("residuals bend by" in x and "the optical depth changed" in x
               for x in r.reasons), r.reasons
    assert r.residual_trend == pytest.approx(0.004 * 4.0, rel=0.2)  # ptp of 0.004 (m-4)^2
    straight = 0.4 - 0.1 * m + rng.normal(0.0, 0.0004, m.size)
    s = fit_session(m, np.exp(straight), SETTINGS)
    assert s.accepted and abs(s.residual_trend_t) < 3.0


def test_residual_trend_of_an_exact_parabola():
    x = np.linspace(2.0, 6.0, 17)
    bend, t = residual_trend(x, (x - 4.0) ** 2 - np.mean((x - 4.0) ** 2))
    assert bend == pytest.approx(4.0, rel=1e-3)  # (m-4)^2 spans 0 to 4 on [2, 6]
    assert t == math.inf or t > 1e6
    assert residual_trend([1.0, 2.0, 3.0], [0.0, 0.1, 0.0]) == (0.0, 0.0)


# --------------------------------------------------------------------------- drift

def test_drift_sensitivity_of_a_time_proportional_to_one_over_airmass():
    # If t = c / m + d exactly, the drift pattern -(t - t_mean) m is the constant -c
    # plus a multiple of m, so it moves the intercept by exactly -c and leaves the
    # plot straight (Shaw 1983, Bull. AMS 64:4-10; from memory).
    m = AIRMASS
    hours = 1.5 / m + 7.0
    assert drift_sensitivity(m, m, hours) == pytest.approx(-1.5, rel=1e-12)


def test_an_unseen_drift_moves_v0_by_its_sensitivity_and_the_uncertainty_covers_it():
    m, _ = _airmasses()
    c = 2.0  # [h]
    hours = c / m  # a morning: time runs as the air mass falls
    rate = 0.002  # optical depth per hour
    tau = 0.12 + rate * (hours - hours.mean())
    v = 1.4 * np.exp(-tau * m)
    r = fit_session(m, v, SETTINGS, hours=hours, drift_per_hour=rate)
    # Closed form: for t = c / m + d a drift r moves ln V0 by exactly -c r (the test
    # above; Shaw 1983, Bull. AMS 64:4-10, from memory).
    expected = -c * rate
    assert r.ln_v0 - math.log(1.4) == pytest.approx(expected, rel=1e-9)
    assert r.accepted  # nothing in the residuals gives the drift away ...
    assert r.v0_drift_unc == pytest.approx(abs(expected), rel=1e-12)  # ... but the error bar does
    assert any("unseen drift" in n for n in r.notes)
    no_prior = fit_session(m, v, SETTINGS, hours=hours)
    assert no_prior.v0_rel_unc < 0.01 * r.v0_rel_unc


# --------------------------------------------------------------------------- water vapour

def test_modified_langley_recovers_v0_of_a_water_vapour_band():
    # Water-vapour transmission as exp(-a (u m)^b), b about 0.5-0.6 (docs/REFERENCES.md,
    # from memory): ln V plus the known extinctions is a line in m^b.
    m, _ = _airmasses()
    b, a_u_b, tau_known = 0.6, 0.25, 0.03
    v = 0.9 * np.exp(-tau_known * m - a_u_b * m ** b)
    r = fit_session(m, v, SETTINGS, ln_correction=tau_known * m, regressor_exponent=b)
    assert r.v0 == pytest.approx(0.9, rel=1e-9)
    assert r.tau == pytest.approx(a_u_b, rel=1e-9)
    assert r.accepted and (r.airmass_min, r.airmass_max) == (pytest.approx(m.min()),
                                                               pytest.approx(m.max()))
    straight = fit_session(m, v, SETTINGS)  # the plain Langley is curved and misses
    assert abs(straight.v0 / 0.9 - 1) > 0.05 and not straight.accepted


# --------------------------------------------------------------------------- bad input

@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(
    st.floats(allow_nan=True, allow_infinity=True, width=64),
    st.floats(allow_nan=True, allow_infinity=True, width=64)), max_size=40))
def test_fit_session_never_raises_on_any_numbers(pairs):
    m = np.array([p[0] for p in pairs], dtype=float)
    v = np.array([p[1] for p in pairs], dtype=float)
    with np.errstate(all="ignore"):
        r = fit_session(m, v, SETTINGS, hours=np.arange(m.size, dtype=float),
                        drift_per_hour=0.001)
    assert r.n_total == m.size and len(r.used) == m.size
    if r.accepted:
        assert math.isfinite(r.v0) and r.v0 > 0 and math.isfinite(r.v0_rel_unc)
    else:
        assert r.reasons


def test_duplicate_air_masses_and_a_single_point_are_judged_not_crashed():
    one = fit_session([3.0], [1.0], SETTINGS)
    assert not one.accepted and "only 1 usable point of 1" in one.reasons[0]
    m = np.array([2.0, 2.0, 4.0, 4.0, 6.0, 6.0])
    dup = fit_session(m, np.exp(-0.1 * m), replace(SETTINGS, min_points=3))
    assert dup.accepted and dup.n_used == 6


def test_intercept_weights_give_numpy_polyfits_intercept():
    # The least-squares intercept as a dot product with weights of x alone, against
    # numpy.polyfit (a general-purpose reference library) on unrelated y.
    from daemon.science.langley import intercept_weights

    rng = np.random.default_rng(4)
    x = np.linspace(1.9, 6.2, 23) ** 0.55
    w = intercept_weights(x)
    for _ in range(5):
        y = rng.normal(size=x.size)
        assert float(w @ y) == pytest.approx(np.polyfit(x, y, 1)[1], abs=1e-12)
    with pytest.raises(ValueError, match="spread in x"):
        intercept_weights([2.0, 2.0, 2.0])
    with pytest.raises(ValueError, match="at least"):
        intercept_weights([1.0])
