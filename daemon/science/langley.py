"""Langley regression: ln V against air mass, extrapolated to air mass zero.

Pure numpy functions, no I/O. Beer-Lambert-Bouguer for a direct-sun signal,

    V(m) = V0 * exp(-tau * m)   so   ln V = ln V0 - tau * m,

where ``V`` is the dark-corrected signal [V], ``m`` the relative optical air mass
[dimensionless], ``tau`` the total optical depth [dimensionless] and ``V0`` the
signal the instrument would read above the atmosphere on that day [V]. A straight
line through ``(m, ln V)`` gives ``ln V0`` as its intercept and ``-tau`` as its
slope.

Point selection follows the objective approach of Harrison, L. and Michalsky, J.
(1994), "Objective algorithms for the retrieval of optical depths from ground-based
measurements", Applied Optics 33(22):5126-5132: a fixed air-mass window, then the
worst outlier removed one at a time and the line refitted, while a minimum share
of the points is always kept.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace
from statistics import NormalDist

import numpy as np
from numpy.typing import ArrayLike

from daemon.config.settings import FitSettings

# Fewer points leave no degree of freedom for a residual SD.
MIN_FIT_POINTS = 3
# Relative widening of the air-mass window at both edges: a target planned on the edge
# is measured seconds after its time (lock, half a burst) and must still count.
WINDOW_EDGE_TOLERANCE = 0.01


@dataclass(frozen=True)
class LineFit:
    """Ordinary least-squares line ``y = intercept + slope * x``.

    ``residual_sd`` is sqrt(SSR / (n - 2)); it and the standard errors are NaN when
    ``n == 2`` (no degree of freedom left).
    """

    intercept: float
    slope: float
    se_intercept: float
    se_slope: float
    residual_sd: float
    n: int


@dataclass(frozen=True)
class FitResult:
    """One channel's Langley fit over one session.

    Attributes
    ----------
    v0 : float
        Extrapolated signal at air mass zero on the day [V] (NaN when no fit).
    ln_v0 : float
        Natural log of ``v0`` (the fitted intercept).
    tau : float
        Fitted total optical depth (minus the slope) [dimensionless].
    v0_rel_unc : float
        Relative standard uncertainty of ``v0`` [fraction]: the standard error of
        the intercept in ln V, inflated for correlated residuals.
    tau_unc : float
        Standard uncertainty of ``tau``, inflated the same way.
    n_used, n_total : int
        Points in the final fit; points given.
    airmass_min, airmass_max : float
        Air-mass range of the points used.
    residual_sd : float
        Residual standard deviation of the final fit [ln V].
    lag1_autocorr : float
        Lag-1 autocorrelation of the residuals ordered by air mass.
    used : tuple of bool
        Aligned with the input: True where the point is in the final fit.
    accepted : bool
        All acceptance criteria passed.
    reasons : tuple of str
        Why the fit is not accepted (failed criteria first, then what was dropped);
        empty when accepted.
    notes : tuple of str
        What was dropped or adjusted and why, whether accepted or not.
    max_abs_residual : float
        Largest absolute residual of a point in the final fit [ln V].
    residual_trend : float
        Peak-to-peak bend of the residuals across the fitted air masses [ln V]: the
        quadratic part of a parabola fitted to them (see :func:`residual_trend`).
    residual_trend_t : float
        t statistic of that quadratic term.
    v0_drift_unc : float
        The part of ``v0_rel_unc`` that allows for an unseen linear drift of the
        optical depth during the session (see :func:`drift_sensitivity`) [fraction].
    in_window : tuple of bool
        Aligned with the input: True where the point was a candidate for the fit
        (signal, air mass and correction usable, air mass inside the window). A
        candidate not in ``used`` was rejected as an outlier when the fit has a line
        (``n_used > 0``); otherwise there were too few candidates for a line.
    v0_stat_unc : float
        The statistical part of ``v0_rel_unc``: the widened standard error of the
        intercept [fraction].
    budget : tuple of (str, float)
        Every named term of ``v0_rel_unc`` [fraction], added in quadrature:
        ``statistical``, ``drift`` (when ``drift_per_hour`` was given) and the terms
        the caller passed (``extra_terms``).
    """

    v0: float
    ln_v0: float
    tau: float
    v0_rel_unc: float
    tau_unc: float
    n_used: int
    n_total: int
    airmass_min: float
    airmass_max: float
    residual_sd: float
    lag1_autocorr: float
    used: tuple[bool, ...]
    accepted: bool
    reasons: tuple[str, ...]
    notes: tuple[str, ...] = ()
    max_abs_residual: float = math.nan
    residual_trend: float = math.nan
    residual_trend_t: float = math.nan
    v0_drift_unc: float = 0.0
    in_window: tuple[bool, ...] = ()
    v0_stat_unc: float = math.nan
    budget: tuple[tuple[str, float], ...] = ()


def fit_coordinates(airmass: ArrayLike, signal: ArrayLike,
                    ln_correction: ArrayLike | None = None,
                    regressor_exponent: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """The (x, y) of every point as :func:`fit_session` fits them.

    Parameters
    ----------
    airmass : array_like
        Relative optical air mass of each point [dimensionless].
    signal : array_like
        Dark-corrected signal of each point [V].
    ln_correction : array_like, optional
        Added to ln V, one value per point [ln V].
    regressor_exponent : float, default 1
        ``x = m ** regressor_exponent``.

    Returns
    -------
    x, y : ndarray
        ``x`` the regressor (air mass, or ``m^b``), ``y = ln V + ln_correction``;
        NaN where a value is not finite (a signal that is zero or negative, a
        missing air mass or correction).
    """
    m = np.asarray(airmass, dtype=float).ravel()
    v = np.asarray(signal, dtype=float).ravel()
    corr = (np.zeros_like(m) if ln_correction is None
            else np.asarray(ln_correction, dtype=float).ravel())
    b = float(regressor_exponent)
    with np.errstate(invalid="ignore", divide="ignore"):
        x = m if b == 1.0 else m ** b
        y = np.log(v) + corr
    x = np.where(np.isfinite(x), x, math.nan)
    y = np.where(np.isfinite(y), y, math.nan)
    return x, y


def fit_line(x: ArrayLike, y: ArrayLike) -> LineFit:
    """Ordinary least squares of ``y`` on ``x`` in closed form.

    Centred sums keep the result accurate when ``x`` sits far from zero.

    Parameters
    ----------
    x, y : array_like
        Equal-length 1-D arrays of finite values, at least two points, ``x`` not all equal.

    Returns
    -------
    LineFit
    """
    x = np.asarray(x, dtype=float).ravel()
    y = np.asarray(y, dtype=float).ravel()
    if x.shape != y.shape:
        raise ValueError(f"fit_line: x has {x.size} values but y has {y.size}; pass equal lengths")
    n = x.size
    if n < 2:
        raise ValueError(f"fit_line: {n} point(s) given; a line needs at least 2")
    if not (np.all(np.isfinite(x)) and np.all(np.isfinite(y))):
        raise ValueError("fit_line: x and y must be finite; drop NaN or infinite values first")
    x_mean = x.mean()
    y_mean = y.mean()
    dx = x - x_mean
    sxx = float(np.dot(dx, dx))
    if sxx == 0.0:
        raise ValueError(f"fit_line: all x values equal {x[0]:g}; a line needs a spread in x")
    slope = float(np.dot(dx, y - y_mean)) / sxx
    intercept = float(y_mean - slope * x_mean)
    if n > 2:
        resid = y - (intercept + slope * x)
        residual_sd = math.sqrt(float(np.dot(resid, resid)) / (n - 2))
        se_slope = residual_sd / math.sqrt(sxx)
        se_intercept = residual_sd * math.sqrt(1.0 / n + x_mean * x_mean / sxx)
    else:
        residual_sd = se_slope = se_intercept = math.nan
    return LineFit(intercept=intercept, slope=slope, se_intercept=se_intercept,
                   se_slope=se_slope, residual_sd=residual_sd, n=n)


def intercept_weights(x: ArrayLike) -> np.ndarray:
    """Weights ``w`` with ``fit_line(x, y).intercept == w @ y`` for every ``y``.

    The least-squares intercept is linear in ``y``: ``w_i = 1/n - x_mean (x_i - x_mean)
    / Sxx`` (common practice, no source). For many patterns over the same ``x`` (the
    budget's model terms) one dot product each replaces a fit each.

    Parameters
    ----------
    x : array_like
        1-D array of finite values, at least two, not all equal.
    """
    x = np.asarray(x, dtype=float).ravel()
    if x.size < 2 or not np.all(np.isfinite(x)):
        raise ValueError(f"intercept_weights: {x.size} value(s) given; a line needs at least "
                         "2 finite x values")
    x_mean = x.mean()
    dx = x - x_mean
    sxx = float(np.dot(dx, dx))
    if sxx == 0.0:
        raise ValueError(f"intercept_weights: all x values equal {x[0]:g}; a line needs a "
                         "spread in x")
    return 1.0 / x.size - x_mean * dx / sxx


def lag1_autocorrelation(residuals: ArrayLike) -> float:
    """Lag-1 autocorrelation coefficient of a residual series (in the given order).

    ``r1 = sum(e[t] e[t+1]) / sum(e[t]^2)``; zero when the series has no variance or
    fewer than three values.
    """
    e = np.asarray(residuals, dtype=float).ravel()
    if e.size < 3:
        return 0.0
    e = e - e.mean()
    denom = float(np.dot(e, e))
    if denom == 0.0:
        return 0.0
    return float(np.dot(e[:-1], e[1:])) / denom


# Above this the AR(1) model makes the intercept variance grow without bound as
# phi -> 1; a cap keeps the stated uncertainty finite (it is already about 5x the
# white-noise error for 17 points).
MAX_AR1_PHI = 0.95


@dataclass(frozen=True)
class Correlation:
    """How correlated the residuals of a line fit are, and what that does to the errors.

    ``r1`` is the observed lag-1 autocorrelation, ``phi`` the AR(1) parameter
    estimated from it, ``inflation`` the factor (>= 1) that widens the OLS standard
    errors, and ``n_eff`` the equivalent number of independent points.
    """

    r1: float
    phi: float
    inflation: float
    n_eff: float


def residual_correlation(x: ArrayLike, residuals: ArrayLike) -> Correlation:
    """Widening of OLS errors for residuals that are correlated from point to point.

    Parameters
    ----------
    x : array_like
        Regressor values of the fitted points, in the order the correlation is
        judged in (the caller sorts by air mass).
    residuals : array_like
        OLS residuals of a line fit on ``x``, same order.

    Notes
    -----
    The residuals are modelled as a first-order autoregressive series in point
    order, correlation ``phi^|i-j|``. A straight-line fit removes slow drifts, so
    the raw lag-1 autocorrelation of the residuals is biased low (about -2/n with
    no correlation at all); ``phi`` is therefore chosen so that the expected lag-1
    autocorrelation of the residuals of this very design matches the observed one
    (moment matching, bisection). The residual variance is re-estimated as
    ``SSR / tr(M R)`` (``M`` the residual-maker matrix, ``R`` the correlation
    matrix) and the intercept variance taken from the OLS sandwich
    ``c' R c`` (common practice, no source). The effective sample size idea is that
    of Santer, B. D. et al. (2000), J. Geophys. Res. 105(D6):7337-7356 (from memory);
    ``n_eff = n / inflation**2`` is reported in its spirit. The inflation is never
    below 1: anticorrelated residuals do not narrow the error.
    """
    xs = np.asarray(x, dtype=float).ravel()
    e = np.asarray(residuals, dtype=float).ravel()
    n = xs.size
    r1 = lag1_autocorrelation(e)
    if n <= 3 or float(np.dot(e, e)) == 0.0:
        return Correlation(r1=r1, phi=0.0, inflation=1.0, n_eff=float(n))
    design = np.column_stack([np.ones(n), xs])
    weights = np.linalg.solve(design.T @ design, design.T)  # rows: intercept, slope weights
    resid_maker = np.eye(n) - design @ weights
    lag = np.zeros((n, n))
    i = np.arange(n - 1)
    lag[i, i + 1] = lag[i + 1, i] = 0.5
    mam = resid_maker @ lag @ resid_maker
    distance = np.abs(np.arange(n)[:, None] - np.arange(n)[None, :])
    # sum(A * phi^|i-j|) is a polynomial in phi whose coefficients are A's diagonal
    # sums: computed once, each step of the bisection is then two polynomial values.
    num = np.bincount(distance.ravel(), weights=mam.ravel(), minlength=n)[::-1].tolist()
    den = np.bincount(distance.ravel(), weights=resid_maker.ravel(),
                      minlength=n)[::-1].tolist()

    def expected_r1(phi: float) -> float:
        a = b = 0.0
        for cn, cd in zip(num, den, strict=True):  # Horner, on plain floats
            a = a * phi + cn
            b = b * phi + cd
        return a / b

    lo, hi = 0.0, MAX_AR1_PHI
    if r1 <= expected_r1(0.0):
        phi = 0.0
    elif r1 >= expected_r1(hi):
        phi = hi
    else:
        for _ in range(40):
            mid = 0.5 * (lo + hi)
            if expected_r1(mid) < r1:
                lo = mid
            else:
                hi = mid
        phi = 0.5 * (lo + hi)
    corr = phi ** distance
    c = weights[0]
    var_white = float(c @ c) / (n - 2)  # per unit SSR
    var_corr = float(c @ corr @ c) / float(np.sum(resid_maker * corr))
    inflation = max(1.0, math.sqrt(var_corr / var_white))
    return Correlation(r1=r1, phi=phi, inflation=inflation, n_eff=n / inflation**2)


def _no_fit(n_total: int, used: np.ndarray, reasons: list[str], notes: list[str],
            in_window: np.ndarray) -> FitResult:
    nan = math.nan
    return FitResult(v0=nan, ln_v0=nan, tau=nan, v0_rel_unc=nan, tau_unc=nan, n_used=0,
                     n_total=n_total, airmass_min=nan, airmass_max=nan, residual_sd=nan,
                     lag1_autocorr=nan, used=tuple(bool(u) for u in used), accepted=False,
                     reasons=tuple(reasons + notes), notes=tuple(notes),
                     in_window=tuple(bool(w) for w in in_window))


def _plural(n: int, word: str) -> str:
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


# A bend in the residuals counts as a trend only when the quadratic term is this many
# standard errors from zero: a noisy but straight session is not a drifting one.
TREND_MIN_T = 3.0


def residual_trend(x: ArrayLike, residuals: ArrayLike) -> tuple[float, float]:
    """Systematic bend left in the residuals of a straight-line fit.

    A parabola is fitted to the residuals against ``x``; since they are already
    free of any straight line, its quadratic part is what the line missed.

    Parameters
    ----------
    x : array_like
        Regressor of the fitted points (air mass).
    residuals : array_like
        Residuals of the line fit [ln V], same order.

    Returns
    -------
    bend : float
        Peak-to-peak of the fitted parabola over the range of ``x`` [ln V]
        (0 with fewer than four points).
    t : float
        Quadratic coefficient over its standard error (0 when it cannot be judged).

    Notes
    -----
    An optical depth that drifts through a half-day (haze building up, a thin cirrus
    band moving in) bends the Langley plot, because the extinction is then the
    product of a changing optical depth and a changing air mass; a straight fit
    through a bent plot biases V0 (Shaw 1983, Bull. AMS 64:4-10; from memory). The
    BSRN Operations Manual (McArthur 2005, WMO/TD-No. 1274, sec. 7.4.2.1) rejects a
    Langley plot whose residuals show a trend.
    """
    xs = np.asarray(x, dtype=float).ravel()
    e = np.asarray(residuals, dtype=float).ravel()
    n = xs.size
    if n < 4 or np.ptp(xs) == 0.0:
        return 0.0, 0.0
    u = (xs - xs.mean()) / np.ptp(xs)  # scaled for a well-conditioned design
    design = np.column_stack([np.ones(n), u, u * u])
    coef, _, rank, _ = np.linalg.lstsq(design, e, rcond=None)
    if rank < 3:
        return 0.0, 0.0
    grid = np.linspace(u.min(), u.max(), 64)
    curve = coef[0] + coef[1] * grid + coef[2] * grid * grid
    bend = float(np.ptp(curve))
    dof = n - 3
    if dof <= 0:
        return bend, 0.0
    ssr = float(np.sum((e - design @ coef) ** 2))
    cov = np.linalg.inv(design.T @ design) * (ssr / dof)
    se = math.sqrt(max(float(cov[2, 2]), 0.0))
    if se == 0.0:
        return bend, math.inf if coef[2] != 0.0 else 0.0
    return bend, float(coef[2] / se)


def drift_sensitivity(x: ArrayLike, airmass: ArrayLike, hours: ArrayLike) -> float:
    """How much a linear drift of the optical depth moves the fitted ln V0.

    Parameters
    ----------
    x : array_like
        Regressor of the fitted points (air mass, or ``m^b``).
    airmass : array_like
        Air mass of the same points (the path the drifting optical depth acts on).
    hours : array_like
        Time of each point [h], any origin.

    Returns
    -------
    float
        ``d ln V0 / d r`` [h]: the change of the fitted intercept per unit drift rate
        ``r`` [per hour] of the optical depth, ``tau(t) = tau + r (t - t_mean)``.

    Notes
    -----
    The drift adds ``-r (t_i - t_mean) m_i`` to ln V. Through a half-day the time is
    close to a straight function of ``1/m``, so the product is close to a constant
    plus a multiple of ``m``: the Langley plot stays straight and the drift goes
    almost wholly into the intercept, where no residual test can see it (Shaw 1983,
    Bull. AMS 64:4-10; from memory). The sensitivity is the OLS intercept of that
    pattern, computed for the session's own times and air masses.
    """
    xs = np.asarray(x, dtype=float).ravel()
    m = np.asarray(airmass, dtype=float).ravel()
    h = np.asarray(hours, dtype=float).ravel()
    if xs.size < 2 or np.ptp(xs) == 0.0 or not np.all(np.isfinite(h)):
        return 0.0
    pattern = -(h - h.mean()) * m
    return float(fit_line(xs, pattern).intercept)


def chi2_quantile(p: float, dof: float) -> float:
    """Quantile of the chi-square distribution with ``dof`` degrees of freedom.

    Wilson, E. B. and Hilferty, M. M. (1931), "The distribution of chi-square", PNAS
    17:684-688: ``(X / dof)^(1/3)`` is close to normal with mean ``1 - 2/(9 dof)`` and
    variance ``2/(9 dof)``. Within 1 % of the exact quantile at 0.95-0.99 from two
    degrees of freedom up, and at 0.999 from six (checked against scipy in the tests);
    stdlib only, so the science needs no scipy.
    """
    if not 0.0 < p < 1.0 or not dof > 0.0:
        raise ValueError(f"chi2_quantile: p in (0, 1) and dof > 0 required, got {p!r}, {dof!r}")
    z = NormalDist().inv_cdf(p)
    c = 2.0 / (9.0 * dof)
    return dof * max(1.0 - c + z * math.sqrt(c), 0.0) ** 3


def largest_residual_limit(n: int, false_refusal_rate: float) -> float:
    """How many point SDs the largest of ``n`` normal residuals may reach.

    The two-sided normal quantile at ``1 - rate / (2 n)``: the chance that any of ``n``
    independent normal residuals goes beyond it is at most ``rate`` whatever ``n``
    (Bonferroni inequality; Dunn, O. J. 1961, "Multiple comparisons among means", JASA
    56:52-64). Chauvenet's criterion is the same construction at ``rate = 0.5``
    (Taylor, J. R. 1997, An Introduction to Error Analysis, 2nd ed., sec. 6.2).
    """
    if n < 1:
        raise ValueError(f"largest_residual_limit: n must be at least 1, got {n}")
    return NormalDist().inv_cdf(1.0 - false_refusal_rate / (2.0 * n))


def point_scatter(settings: FitSettings, burst_sd_ln: np.ndarray) -> np.ndarray:
    """The scatter a stable sky allows each point, in ln V.

    ``settings.max_residual_sd`` is the sky's own scatter from burst to burst; where
    the burst's samples give the standard error of its mean (``burst_sd_ln``, NaN where
    unknown) the two are added in quadrature, so a noisy detector is judged against its
    own noise and not refused for it.
    """
    sky = settings.max_residual_sd
    noise = np.where(np.isfinite(burst_sd_ln) & (burst_sd_ln > 0.0), burst_sd_ln, 0.0)
    return np.sqrt(sky * sky + noise * noise)


def residual_reasons(residuals: np.ndarray, settings: FitSettings,
                     burst_sd_ln: np.ndarray) -> list[str]:
    """Residual criteria of one fit; the reasons for refusal in words (empty: passed).

    ``settings.acceptance == "absolute"``: the BSRN-style fixed limits, residual SD at
    most ``max_residual_sd`` and no residual beyond ``max_abs_residual`` [ln V]
    (McArthur 2005, BSRN Operations Manual, WMO/TD-No. 1274, sec. 7.4.2.1). Their
    false-refusal rate grows with the point count: of 45 points with exactly the
    allowed scatter, one almost surely exceeds two SDs.

    ``"scaled"``: each residual is measured in the scatter a stable sky allows the
    point (:func:`point_scatter`). The sum of their squares is tested against the
    chi-square quantile at ``1 - false_refusal_rate`` for ``n - 2`` degrees of freedom,
    the largest against :func:`largest_residual_limit`; on a stable sky each refuses
    with probability about ``false_refusal_rate``, whatever the point count.
    """
    e = np.asarray(residuals, dtype=float)
    n = e.size
    sd = math.sqrt(float(np.dot(e, e)) / (n - 2)) if n > 2 else math.nan
    reasons: list[str] = []
    if settings.acceptance == "absolute":
        max_abs = float(np.max(np.abs(e))) if n else math.nan
        if not sd <= settings.max_residual_sd:
            reasons.append(f"residual SD {sd:.4f} in ln V above the limit "
                           f"{settings.max_residual_sd:.4f}")
        if not max_abs <= settings.max_abs_residual:
            reasons.append(f"largest residual {max_abs:.4f} in ln V above the limit "
                           f"{settings.max_abs_residual:.4f}")
        return reasons
    if n <= 2:
        return reasons
    rate = settings.false_refusal_rate
    scale = point_scatter(settings, np.asarray(burst_sd_ln, dtype=float))
    z = e / scale
    chi2 = float(np.dot(z, z))
    limit = chi2_quantile(1.0 - rate, n - 2)
    allowed = math.sqrt(float(np.mean(scale * scale)))
    if not chi2 <= limit:
        reasons.append(f"residual SD {sd:.4f} in ln V is more than a stable sky gives: "
                       f"{allowed:.4f} per point allowed (fit.max_residual_sd and the "
                       f"bursts' own scatter), chi-square {chi2:.1f} above {limit:.1f} "
                       f"for {n - 2} degrees of freedom at fit.false_refusal_rate {rate:g}")
    worst = int(np.argmax(np.abs(z)))
    z_limit = largest_residual_limit(n, rate)
    if not abs(z[worst]) <= z_limit:
        reasons.append(f"largest residual {e[worst]:+.4f} in ln V is {abs(z[worst]):.1f} "
                       f"times the {scale[worst]:.4f} a stable sky allows that point, above "
                       f"{z_limit:.2f} for {n} points at fit.false_refusal_rate {rate:g}")
    return reasons


def fit_session(airmass: ArrayLike, signal: ArrayLike, settings: FitSettings, *,
                ln_correction: ArrayLike | None = None, tau_floor: float | None = None,
                regressor_exponent: float = 1.0, hours: ArrayLike | None = None,
                drift_per_hour: float = 0.0, burst_sd_ln: ArrayLike | None = None,
                extra_terms: Mapping[str, float] | None = None) -> FitResult:
    """Fit one channel's session: ln V against air mass with outlier rejection.

    Parameters
    ----------
    airmass : array_like
        Relative optical air mass of each point [dimensionless].
    signal : array_like
        Dark-corrected direct-sun signal of each point [V], same length.
    settings : FitSettings
        Air-mass window, clipping, and acceptance criteria.
    ln_correction : array_like, optional
        Added to ln V before the fit, one value per point [ln V]: the ozone air-mass
        correction ``tau_O3 (m_O3 - m)``, the pressure normalisation, or (for a
        water-vapour channel) the known extinctions. A non-finite value drops the point.
    tau_floor : float, optional
        Smallest physical optical depth: Rayleigh plus ozone [dimensionless]. The fit
        fails when the fitted ``tau`` lies below ``tau_floor +
        settings.min_aerosol_optical_depth``. Without it, only ``tau > 0`` is checked.
    regressor_exponent : float, default 1
        Fit against ``m ** regressor_exponent`` (the modified Langley of a
        water-vapour channel uses about 0.5-0.6); the window and the span still
        apply to ``m``, and ``tau`` is then minus the slope against ``m^b``.
    hours : array_like, optional
        Time of each point [h], any origin; with ``drift_per_hour`` it adds the
        drift term to the uncertainty.
    drift_per_hour : float, default 0
        Standard uncertainty of an unseen linear drift of the optical depth during
        the session [per hour], a prior on the drift rate; the session fit passes
        none (its drift terms come from the data, ``extra_terms``).
    burst_sd_ln : array_like, optional
        Standard error of each point's burst mean from its own samples [ln V], NaN
        where unknown; the scaled acceptance adds it to the sky's allowed scatter
        (:func:`residual_reasons`).
    extra_terms : mapping of str to float, optional
        Further named relative standard uncertainties of V0 [fraction], added in
        quadrature and listed in ``budget``.

    Returns
    -------
    FitResult
        Never raises for bad data: with fewer than three usable points every number
        is NaN, ``accepted`` is False and ``reasons`` says why.

    Notes
    -----
    Points outside ``[settings.airmass_min, settings.airmass_max]`` (widened by
    ``WINDOW_EDGE_TOLERANCE`` of each edge, because a target planned exactly on the
    edge is measured a few seconds late and lands a hair outside) and points whose
    signal is not finite or not positive are left out. The worst point beyond
    ``settings.clip_sigma`` residual SDs is removed and the line refitted, one point
    at a time, while at least ``settings.min_fraction_kept`` of the usable points in
    the window (and never fewer than three) stay in the fit.

    Acceptance criteria, each a reason in words when it fails: at least
    ``min_points`` points kept, an air-mass span of at least ``min_airmass_span``,
    residuals no larger than a stable sky gives (:func:`residual_reasons`, scaled
    or absolute per ``settings.acceptance``), no significant bend of the residuals larger than
    ``max_residual_trend`` [ln V] (:func:`residual_trend`), and an optical depth that
    is physical (not below Rayleigh plus ozone, see ``tau_floor``).

    The relative uncertainty of V0 is the standard error of the intercept of
    ln V, which is exactly the relative error of V0 to first order. Residuals that
    drift together along the air mass (changing haze, a thin cirrus band) are not
    independent, so the standard error is widened for their lag-1 autocorrelation
    (see :func:`residual_correlation`). A slow drift of the optical depth leaves
    the plot straight and moves the intercept unseen, so the stated uncertainty adds
    in quadrature ``|drift_sensitivity| * drift_per_hour`` (a prior on the drift
    rate; :func:`drift_sensitivity`).
    """
    m = np.asarray(airmass, dtype=float).ravel()
    v = np.asarray(signal, dtype=float).ravel()
    if m.shape != v.shape:
        raise ValueError(f"fit_session: {m.size} air masses but {v.size} signals; "
                         "pass one signal per air mass")
    if ln_correction is None:
        corr_ln = np.zeros_like(m)
    else:
        corr_ln = np.asarray(ln_correction, dtype=float).ravel()
        if corr_ln.shape != m.shape:
            raise ValueError(f"fit_session: {corr_ln.size} ln V corrections for {m.size} "
                             "points; pass one correction per point")
    h_all = (np.full(m.shape, math.nan) if hours is None
             else np.asarray(hours, dtype=float).ravel())
    if h_all.shape != m.shape:
        raise ValueError(f"fit_session: {h_all.size} times for {m.size} points; pass one "
                         "time per point")
    noise_all = (np.full(m.shape, math.nan) if burst_sd_ln is None
                 else np.asarray(burst_sd_ln, dtype=float).ravel())
    if noise_all.shape != m.shape:
        raise ValueError(f"fit_session: {noise_all.size} burst scatters for {m.size} points; "
                         "pass one per point")
    b = float(regressor_exponent)
    if not (math.isfinite(b) and b > 0.0):
        raise ValueError(f"regressor_exponent must be a positive number, got {b!r}")
    n_total = m.size
    used = np.zeros(n_total, dtype=bool)
    notes: list[str] = []
    lo, hi = settings.airmass_min, settings.airmass_max

    nonfinite_sig = ~np.isfinite(v)
    with np.errstate(invalid="ignore"):
        nonpositive_sig = np.isfinite(v) & (v <= 0.0)
        bad_sig = nonfinite_sig | nonpositive_sig
        finite_m = np.isfinite(m)
        in_window = (finite_m & (m >= lo * (1 - WINDOW_EDGE_TOLERANCE))
                     & (m <= hi * (1 + WINDOW_EDGE_TOLERANCE)))
    bad_corr = ~np.isfinite(corr_ln) & ~bad_sig & finite_m
    if nonfinite_sig.any():
        notes.append(f"{_plural(int(nonfinite_sig.sum()), 'point')} dropped: signal not finite")
    if nonpositive_sig.any():
        notes.append(f"{_plural(int(nonpositive_sig.sum()), 'point')} dropped: "
                     "signal zero or negative")
    n_bad_m = int((~finite_m & ~bad_sig).sum())
    if n_bad_m:
        notes.append(f"{_plural(n_bad_m, 'point')} dropped: air mass not finite")
    if bad_corr.any():
        notes.append(f"{_plural(int(bad_corr.sum()), 'point')} dropped: no extinction "
                     "correction (ozone air mass or pressure missing)")
    n_outside = int((finite_m & ~in_window & ~bad_sig & ~bad_corr).sum())
    if n_outside:
        notes.append(f"{_plural(n_outside, 'point')} outside the air-mass window "
                     f"{lo:g} to {hi:g}")

    candidate = in_window & ~bad_sig & ~bad_corr
    candidates = np.flatnonzero(candidate)
    n_window = candidates.size
    if n_window < MIN_FIT_POINTS:
        what = "no usable points" if n_window == 0 else f"only {_plural(n_window, 'usable point')}"
        return _no_fit(n_total, used, [
            f"{what} of {n_total} in the air-mass window {lo:g} to {hi:g}; "
            f"a Langley fit needs at least {MIN_FIT_POINTS}"], notes, candidate)
    am = m[candidates]
    # One definition of the plotted and the fitted coordinates (fit_coordinates).
    x_all, y_all = fit_coordinates(m, v, corr_ln, b)
    x = x_all[candidates]
    y = y_all[candidates]
    if np.ptp(x) == 0.0:
        return _no_fit(n_total, used, [
            f"all {n_window} usable points are at air mass {am[0]:g}; "
            "a Langley fit needs a spread in air mass"], notes, candidate)

    keep = np.ones(n_window, dtype=bool)
    min_keep = max(MIN_FIT_POINTS, math.ceil(settings.min_fraction_kept * n_window - 1e-9))
    n_clipped = 0
    fit = fit_line(x, y)
    while int(keep.sum()) - 1 >= min_keep and fit.residual_sd > 0.0:
        resid = np.abs(y - (fit.intercept + fit.slope * x))
        resid[~keep] = -1.0
        worst = int(np.argmax(resid))
        if resid[worst] <= settings.clip_sigma * fit.residual_sd:
            break
        trial = keep.copy()
        trial[worst] = False
        if np.ptp(x[trial]) == 0.0:
            break
        keep = trial
        n_clipped += 1
        fit = fit_line(x[keep], y[keep])
    if n_clipped:
        notes.append(f"{_plural(n_clipped, 'point')} rejected as outliers beyond "
                     f"{settings.clip_sigma:g} residual SDs")
    if fit.residual_sd > 0.0:
        beyond = np.abs(y - (fit.intercept + fit.slope * x))[keep] > (
            settings.clip_sigma * fit.residual_sd)
        if beyond.any():
            notes.append(f"{_plural(int(beyond.sum()), 'point')} beyond "
                         f"{settings.clip_sigma:g} residual SDs kept: no more than "
                         f"{n_window - min_keep} of {n_window} may be rejected")

    xu, yu, mu = x[keep], y[keep], am[keep]
    n_used = xu.size
    order = np.argsort(xu, kind="stable")
    resid_sorted = (yu - (fit.intercept + fit.slope * xu))[order]
    corr = residual_correlation(xu[order], resid_sorted)
    inflation = corr.inflation
    if inflation > 1.0:
        notes.append(f"residuals correlated along air mass (lag-1 r = {corr.r1:.2f}, "
                     f"about {corr.n_eff:.1f} independent points): "
                     f"uncertainty widened {inflation:.2f} times")
    used[candidates[keep]] = True
    max_abs = float(np.max(np.abs(resid_sorted))) if n_used else math.nan
    drift_unc = 0.0
    if drift_per_hour > 0.0:
        hu = h_all[candidates][keep]
        drift_unc = abs(drift_sensitivity(xu, mu, hu)) * drift_per_hour
    stat_unc = fit.se_intercept * inflation
    budget = [("statistical", stat_unc)]
    if drift_unc > 0.0:
        budget.append(("drift", drift_unc))
        notes.append(f"uncertainty includes {100 * drift_unc:.3f} % for an unseen drift of "
                     f"the optical depth of {drift_per_hour:.5f} per hour")
    budget += [(k, float(u)) for k, u in (extra_terms or {}).items() if u > 0.0]
    v0_unc = math.sqrt(sum(u * u for _, u in budget))
    bend, bend_t = residual_trend(xu[order], resid_sorted)

    tau = -fit.slope
    span = float(mu.max() - mu.min())
    reasons: list[str] = []
    if n_used < settings.min_points:
        reasons.append(f"only {n_used} points used, fewer than the required "
                       f"{settings.min_points}")
    if span < settings.min_airmass_span:
        reasons.append(f"air-mass span {span:.2f} below the required "
                       f"{settings.min_airmass_span:.2f}")
    reasons += residual_reasons(yu - (fit.intercept + fit.slope * xu), settings,
                                noise_all[candidates][keep])
    if bend > settings.max_residual_trend and abs(bend_t) >= TREND_MIN_T:
        reasons.append(f"residuals bend by {bend:.4f} in ln V across air mass "
                       f"{mu.min():.2f} to {mu.max():.2f} (limit "
                       f"{settings.max_residual_trend:.4f}): the optical depth changed "
                       "during the session")
    if b != 1.0:
        if not tau > 0.0:
            reasons.append(f"fitted water-vapour absorption {tau:.4f} (against m^{b:g}) "
                           "is not positive")
    elif tau_floor is None:
        if not tau > 0.0:
            reasons.append(f"fitted optical depth {tau:.4f} is not positive")
    elif not tau >= tau_floor + settings.min_aerosol_optical_depth:
        reasons.append(f"fitted optical depth {tau:.4f} is below Rayleigh plus ozone "
                       f"{tau_floor:.4f} (aerosol {tau - tau_floor:+.4f}, lowest allowed "
                       f"{settings.min_aerosol_optical_depth:+.4f}): not physical")
    accepted = not reasons
    return FitResult(
        v0=math.exp(fit.intercept), ln_v0=fit.intercept, tau=tau,
        v0_rel_unc=v0_unc, tau_unc=fit.se_slope * inflation,
        n_used=n_used, n_total=n_total,
        airmass_min=float(mu.min()), airmass_max=float(mu.max()),
        residual_sd=fit.residual_sd, lag1_autocorr=corr.r1,
        used=tuple(bool(u) for u in used), accepted=accepted,
        reasons=() if accepted else tuple(reasons + notes), notes=tuple(notes),
        max_abs_residual=max_abs, residual_trend=bend, residual_trend_t=bend_t,
        v0_drift_unc=drift_unc, in_window=tuple(bool(c) for c in candidate),
        v0_stat_unc=stat_unc, budget=tuple(budget))


def with_terms(fit: FitResult, terms: Mapping[str, float],
               notes: tuple[str, ...] = ()) -> FitResult:
    """``fit`` with further named relative uncertainties of V0 added in quadrature.

    Terms already in ``fit.budget`` under the same name are replaced; zero terms are
    left out. ``notes`` are appended to the fit's notes (and to its reasons when the
    fit is refused, where the notes are repeated).
    """
    budget = dict(fit.budget)
    budget.update({k: float(u) for k, u in terms.items() if u > 0.0 and math.isfinite(u)})
    unc = math.sqrt(sum(u * u for u in budget.values())) if budget else fit.v0_rel_unc
    if math.isnan(fit.v0):
        unc = math.nan
    reasons = fit.reasons if fit.accepted else fit.reasons + tuple(notes)
    return replace(fit, v0_rel_unc=unc, budget=tuple(budget.items()),
                   notes=fit.notes + tuple(notes), reasons=reasons)


def v0_at_1au(v0_day: float, earth_sun_factor: float) -> float:
    """Normalise a V0 fitted on one day to the mean Earth-Sun distance.

    Parameters
    ----------
    v0_day : float
        V0 fitted on the day [V].
    earth_sun_factor : float
        ``(r0 / r)^2`` on the day [dimensionless], r the Earth-Sun distance and r0
        one astronomical unit (about 1.034 in early January, 0.967 in early July).

    Returns
    -------
    float
        V0 at 1 AU [V]: ``v0_day / earth_sun_factor``.

    Notes
    -----
    Irradiance falls with the square of the distance from the sun, so the signal
    above the atmosphere on the day is ``V0_1au * (r0 / r)^2``. Dividing by the
    factor removes the yearly +/-3.4 % swing and makes V0 from different days
    comparable. A NaN ``v0_day`` gives NaN.
    """
    factor = float(earth_sun_factor)
    if not math.isfinite(factor) or factor <= 0.0:
        raise ValueError(f"earth_sun_factor must be a positive number near 1 "
                         f"((r0/r)^2 on the day), got {earth_sun_factor!r}")
    return float(v0_day) / factor
