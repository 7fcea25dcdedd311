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
from functools import lru_cache
from typing import Any

import numpy as np

from daemon.config.settings import Channel, Config, FitSettings
from daemon.science import atmosphere
from daemon.science.lamp import lamp_check, lamp_note
from daemon.science.langley import (
    FitResult,
    drift_sensitivity,
    fit_coordinates,
    fit_session,
    intercept_weights,
    v0_at_1au,
    with_terms,
)
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


# --------------------------------------------------------------------------- budget

#: Scale heights of the aerosol above the site the budget spans [km]: the fitter puts
#: the aerosol on the Kasten-Young air mass of the whole atmosphere, a real aerosol
#: sits lower (scale heights of one to two kilometres are typical; from memory).
AEROSOL_SCALE_HEIGHTS_KM = (0.5, 3.0)
#: Heights of the ozone layer the budget spans [km]: the fitter's layer is at 22 km
#: (Komhyr 1980); the ozone maximum lies between about 18 and 26 km with latitude and
#: season (from memory). The budget takes them in both published conventions, above
#: sea level (Komhyr 1980) and above the observer (SPECTRL2: Bird and Riordan 1986,
#: eq. 2-10), see :func:`ozone_layer_airmasses`.
OZONE_LAYER_HEIGHTS_KM = (18.0, 26.0)
#: Gaussian FWHM to standard deviation: 2 sqrt(2 ln 2) (common practice, no source).
FWHM_PER_SD = 2.0 * math.sqrt(2.0 * math.log(2.0))
#: Rayleigh optical depth falls about as wavelength^-4 (Bodhaine et al. 1999; the
#: exponent is nearer 4.05 in the visible, 4 keeps the term simple and slightly small).
RAYLEIGH_EXPONENT = 4.0
#: Budget terms the sessions of a campaign share: dividing them by the number of
#: sessions would claim an accuracy the model does not have.
SYSTEMATIC_TERMS = ("filter_width", "aerosol_layer_airmass", "ozone_airmass_model",
                    "ozone_optical_depth")
#: A water-vapour channel's terms its sessions share besides those: the filter's ``b``
#: and the vapour's layer air mass (its aerosol from the window channels is each
#: session's own).
WATER_VAPOUR_SHARED_TERMS = ("water_vapour_exponent", "water_vapour_airmass_model")
#: Relative standard uncertainty of the ozone optical depth the correction uses [fraction]:
#: the configured nominal column against the day's (total ozone varies by some 5-10 %
#: from day to day and with the season; from memory) and the band's cross-section
#: (published tables differ by a few per cent in the Chappuis band, more on its wings,
#: and a rectangle of the bandwidth stands for the real filter; from memory). A
#: judgement, no source; a configured cross-section does not remove the column's part.
OZONE_TAU_REL_UNC = 0.10
#: Drift rate [optical depth per hour] for the statement of what one session cannot see.
UNSEEN_DRIFT_PER_HOUR = 0.001


#: Share of the band-curvature correction kept as its uncertainty (see
#: :func:`systematic_terms`).
BAND_MODEL_SHARE = 0.25


def systematic_terms(channel: Channel, config: Config, airmass: np.ndarray,
                     tau_total: float, pressure_hpa: float | None = None
                     ) -> tuple[dict[str, float], dict[str, float]]:
    """What the fitter's line leaves out of a window channel: corrections and uncertainties.

    Parameters
    ----------
    channel : Channel
        Wavelength and bandwidth (taken as a Gaussian FWHM) [nm].
    config : Config
        Site (height, nominal pressure, ozone column).
    airmass : ndarray
        Kasten-Young air masses of the fitted points.
    tau_total : float
        The fitted total optical depth (its aerosol share sizes the layer term).
    pressure_hpa : float, optional
        Station pressure [hPa]; default the site's nominal one.

    Returns
    -------
    (shifts, terms) : dict, dict
        ``shifts``: the expected bias of the fitted ln V0 by name, to be subtracted
        [ln V]; ``terms``: the relative standard uncertainties of V0 left after that
        [fraction], by the same names: ``filter_width``, ``aerosol_layer_airmass``,
        ``ozone_airmass_model``, and in ``terms`` only ``ozone_optical_depth``
        (both empty without two distinct air masses).

    Notes
    -----
    Each term is the intercept of a straight line fitted to the ln V pattern the
    model leaves out, over the session's own air masses: what it moves ln V0 by.

    ``filter_width``: across a band the Rayleigh optical depth changes, and the mean of
    ``exp(-tau m)`` over the band is ``exp(-tau_mean m + var(tau) m^2 / 2)`` to second
    order (the cumulant expansion), a curvature a line turns into a low V0; ``var(tau)``
    from ``dtau/dlambda = -4 tau / lambda`` over a Gaussian band.

    ``aerosol_layer_airmass``: ``-tau_a (m_layer - m)`` for a thin layer at one of
    :data:`AEROSOL_SCALE_HEIGHTS_KM` above the site (Komhyr's spherical-shell form,
    :func:`daemon.science.atmosphere.ozone_airmass`), ``tau_a`` the fitted optical
    depth minus Rayleigh and ozone.

    ``ozone_airmass_model``: ``-tau_O3 (m_h - m_O3(22 km))`` over the published ozone
    air masses :func:`ozone_layer_airmasses` gives (Komhyr's shell at
    :data:`OZONE_LAYER_HEIGHTS_KM` above sea level, and SPECTRL2's formula with those
    heights above the observer); the range is their smallest to largest shift. At a
    sea-level station both conventions agree; at 3650 m the second puts the layer up
    to 3.65 km higher, which widens and moves the range.

    ``ozone_optical_depth``: the ozone correction ``tau_O3 (m_O3 - m)`` is only as good
    as ``tau_O3``; :data:`OZONE_TAU_REL_UNC` of its intercept, not corrected (the
    error has no known sign).

    The layer and ozone air-mass terms are biases known to lie within a range:
    corrected to its middle, with the rectangular half-width over sqrt(3) as the
    uncertainty (JCGM 100:2008, GUM, sec. 4.3.7). The band term is corrected in full;
    a quarter of it stays as its uncertainty (the filter's real shape, the solar
    spectrum's slope across it and the exponent 4 against 4.05; a judgement, no
    source).
    """
    from daemon.science.atmosphere import ozone_airmass

    m = np.asarray(airmass, dtype=float)
    m = m[np.isfinite(m)]
    if m.size < 2 or np.ptp(m) == 0.0:
        return {}, {}
    p = atmosphere.site_pressure_hpa(config.site) if pressure_hpa is None else pressure_hpa
    lam = channel.wavelength_nm
    tau_r = float(atmosphere.rayleigh_optical_depth(lam, p))
    sigma = channel_cross_section_cm2(channel)
    tau_o3 = 0.0 if sigma is None else ozone_optical_depth(sigma, config.site.ozone_du)
    tau_a = tau_total - tau_r - tau_o3 if math.isfinite(tau_total) else 0.0
    tau_a = max(tau_a, 0.0)
    z = _zenith_of(tuple(m.tolist()))
    m, z = m[np.isfinite(z)], z[np.isfinite(z)]  # beyond the horizon's air mass: no zenith
    if m.size < 2 or np.ptp(m) == 0.0:
        return {}, {}
    elev_m = config.site.elevation_m

    weights = intercept_weights(m)

    def shift(pattern: np.ndarray) -> float:  # the intercept of a line fitted to it
        return float(weights @ pattern)

    sd_tau = RAYLEIGH_EXPONENT * tau_r * (channel.bandwidth_nm / FWHM_PER_SD) / lam
    width = shift(0.5 * sd_tau * sd_tau * m * m)
    layer = range_term([shift(-tau_a * (m_h - m)) for m_h in layer_airmasses(
        z, elev_m, AEROSOL_SCALE_HEIGHTS_KM)])
    m_o3 = ozone_airmass(z, elev_m)
    ozone = range_term([shift(-tau_o3 * (m_h - m_o3))
                        for m_h in ozone_layer_airmasses(z, elev_m)])
    shifts = {"filter_width": width, "aerosol_layer_airmass": layer[0],
              "ozone_airmass_model": ozone[0]}
    terms = {"filter_width": BAND_MODEL_SHARE * abs(width),
             "aerosol_layer_airmass": layer[1], "ozone_airmass_model": ozone[1],
             "ozone_optical_depth": OZONE_TAU_REL_UNC * abs(shift(tau_o3 * (m_o3 - m)))}
    return shifts, terms


def range_term(shifts: Sequence[float]) -> tuple[float, float]:
    """A bias known to lie between the smallest and largest of ``shifts``: its middle
    and the rectangular half-width over sqrt(3) (JCGM 100:2008, GUM, sec. 4.3.7)."""
    lo, hi = min(shifts), max(shifts)
    return 0.5 * (lo + hi), 0.5 * (hi - lo) / math.sqrt(3.0)


def layer_airmasses(apparent_zenith_deg: np.ndarray, station_height_m: float,
                    heights_km: Sequence[float]) -> list[np.ndarray]:
    """Air masses of thin layers ``heights_km`` above the station (Komhyr's
    spherical-shell form, :func:`daemon.science.atmosphere.ozone_airmass`): the
    aerosol's and the water vapour's in the budget."""
    from daemon.science.atmosphere import ozone_airmass

    site_km = station_height_m / 1000.0
    return [ozone_airmass(apparent_zenith_deg, station_height_m, site_km + h)
            for h in heights_km]


@lru_cache(maxsize=32)
def _zenith_of(airmass: tuple[float, ...]) -> np.ndarray:
    """:func:`daemon.science.atmosphere.zenith_from_kasten_young`, read-only and kept
    for the last few air-mass sets: a campaign asks for each session's nominal air
    masses once per channel, and the channels of a session share them."""
    z = atmosphere.zenith_from_kasten_young(np.asarray(airmass, dtype=float))
    z.setflags(write=False)
    return z


def ozone_layer_airmasses(apparent_zenith_deg: np.ndarray,
                          station_height_m: float) -> list[np.ndarray]:
    """The ozone air masses the budget's ``ozone_airmass_model`` term spans.

    Komhyr's spherical shell (:func:`daemon.science.atmosphere.ozone_airmass`, the
    layer height above sea level) and SPECTRL2's formula
    (:func:`daemon.science.atmosphere.ozone_airmass_above_observer`, Bird and Riordan
    1986, eq. 2-10: the height above the observer), each at both ends of
    :data:`OZONE_LAYER_HEIGHTS_KM`. Two published models of the same path that differ
    by their convention at a mountain station: which one the real sky follows no
    session can tell, so the budget spans both. A layer end at or below the station
    is left out of Komhyr's (the formula needs the layer above the observer).
    """
    from daemon.science.atmosphere import ozone_airmass, ozone_airmass_above_observer

    out = [ozone_airmass(apparent_zenith_deg, station_height_m, h)
           for h in OZONE_LAYER_HEIGHTS_KM if h > station_height_m / 1000.0]
    out += [ozone_airmass_above_observer(apparent_zenith_deg, h)
            for h in OZONE_LAYER_HEIGHTS_KM]
    return [np.asarray(m, dtype=float) for m in out]


def model_terms(channel: Channel, config: Config, airmass: np.ndarray, tau_total: float,
                pressure_hpa: float | None = None) -> tuple[dict[str, float], dict[str, float]]:
    """:func:`systematic_terms` as ``fit.correct_model_terms`` applies them.

    Corrected: the shifts and what is left of each term. Not corrected: no shifts, and
    each bias counts in full, rms about zero (JCGM 100:2008, GUM, sec. F.2.4.5).
    """
    return as_configured(*systematic_terms(channel, config, airmass, tau_total,
                                           pressure_hpa), config)


def as_configured(shifts: dict[str, float], terms: dict[str, float], config: Config
                  ) -> tuple[dict[str, float], dict[str, float]]:
    """Model terms as ``fit.correct_model_terms`` applies them: the shifts and what is
    left of each term; or no shifts, each bias counted in full (JCGM 100:2008, GUM,
    sec. F.2.4.5)."""
    if config.fit.correct_model_terms:
        return shifts, terms
    return {}, {k: math.hypot(u, shifts.get(k, 0.0)) for k, u in terms.items()}


def correction_note(shifts: Mapping[str, float], why: str) -> str:
    """The note of a V0 corrected by ``shifts`` (ln V, subtracted), and why."""
    return ("V0 corrected by " + ", ".join(f"{k.replace('_', ' ')} {-100 * v:+.3f} %"
                                           for k, v in shifts.items()) + why)


def shared_unc(channel: Channel, config: Config, airmass: np.ndarray, tau_total: float) -> float:
    """The part of a window channel's V0 uncertainty its sessions share [fraction].

    The root sum of squares of the :data:`SYSTEMATIC_TERMS` (:func:`model_terms`): the
    same model is wrong the same way on every clear day, so a campaign does not divide
    it by its number of sessions. Zero for a water-vapour channel.
    """
    if channel.water_vapour:
        return 0.0
    _, terms = model_terms(channel, config, airmass, tau_total)
    return math.sqrt(sum(terms.get(k, 0.0) ** 2 for k in SYSTEMATIC_TERMS))


def drift_allowance(stat_and_model_unc: float, repeatability: float | None) -> float:
    """The drift allowance a stored campaign's repeatability gives a session [fraction].

    The spread of a campaign's session V0 values (``repeatability``, relative) is
    what the sessions' own statistics and model terms, plus the drift no session can
    see, do to one session; the part the first two do not explain,
    ``sqrt(R^2 - u^2)``, is the drift's (never negative). A session is then never
    stated better than the site has shown it repeats.
    """
    if repeatability is None or not math.isfinite(repeatability) or repeatability <= 0.0:
        return 0.0
    u = stat_and_model_unc if math.isfinite(stat_and_model_unc) else 0.0
    return math.sqrt(max(repeatability * repeatability - u * u, 0.0))


def unseen_note(fit: FitResult, hours: np.ndarray | None, airmass: np.ndarray) -> str | None:
    """What this session cannot see, in numbers: a steady drift of the optical depth."""
    if hours is None or fit.n_used < 2:
        return None
    used = np.asarray(fit.used, dtype=bool)
    h = np.asarray(hours, dtype=float)[used]
    m = np.asarray(airmass, dtype=float)[used]
    if not np.all(np.isfinite(h)) or np.ptp(m) == 0.0:
        return None
    shift = abs(drift_sensitivity(m, m, h)) * UNSEEN_DRIFT_PER_HOUR
    return (f"not visible in one session: a steady drift of the optical depth of "
            f"{UNSEEN_DRIFT_PER_HOUR:g} per hour keeps the plot straight and moves V0 by "
            f"{100 * shift:.2f} %; the same day's other session and the campaign's "
            "repeatability are the checks. A change both sessions of a day share (a haze "
            "that peaks near noon) moves them alike, and one that recurs every day moves "
            "the campaign too: no check here sees it (Shaw 1983)")


def budget_terms(fit: FitResult, channel: Channel, config: Config, s: ChannelSeries,
                 repeatability: float | None) -> tuple[FitResult, dict[str, float], list[str]]:
    """A window-channel fit corrected for the model terms, with its named V0 terms."""
    used = np.asarray(fit.used, dtype=bool)
    notes: list[str] = []
    if fit.n_used < 2:
        return fit, {}, notes
    p = s.pressure_hpa[used]
    p_mean = float(np.nanmean(p)) if np.isfinite(p).any() else None
    shifts, terms = model_terms(channel, config, s.airmass[used], fit.tau, p_mean)
    if not config.fit.correct_model_terms:
        notes.append("model terms not corrected (fit.correct_model_terms: false): stated "
                     "as uncertainty")
    total = sum(shifts.values())
    if shifts and math.isfinite(fit.ln_v0):
        fit = replace(fit, ln_v0=fit.ln_v0 - total, v0=math.exp(fit.ln_v0 - total))
        notes.append(correction_note(shifts, " for what a straight line cannot describe"))
    u = math.sqrt(fit.v0_stat_unc ** 2 + sum(t * t for t in terms.values()))
    allowance = drift_allowance(u, repeatability)
    if allowance > 0.0:
        terms["campaign_repeatability"] = allowance
        notes.append(f"drift allowance {100 * allowance:.3f} % from the stored campaign's "
                     f"repeatability {100 * repeatability:.3f} % for this channel")
    return fit, terms, notes


def budget_note(fit: FitResult) -> str:
    """The uncertainty budget of a fit in words, largest term first."""
    parts = sorted(fit.budget, key=lambda kv: -kv[1])
    return ("V0 uncertainty " + f"{100 * fit.v0_rel_unc:.3f} %: "
            + ", ".join(f"{k.replace('_', ' ')} {100 * u:.3f} %" for k, u in parts))


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
    pair = _angstrom_pair(wavelength_nm, aerosol)
    if pair is None:
        return None
    (w1, t1), (w2, t2) = pair
    alpha = -math.log(t2 / t1) / math.log(w2 / w1)
    tau = t1 * (wavelength_nm / w1) ** (-alpha)
    return tau, f"{w1:g} and {w2:g} nm (Angstrom exponent {alpha:.2f})"


def _angstrom_pair(wavelength_nm: float, aerosol: Mapping[float, float]
                   ) -> tuple[tuple[float, float], tuple[float, float]] | None:
    """The two (wavelength, tau) of :func:`aerosol_at`, shorter wavelength first."""
    positive = sorted((w, t) for w, t in aerosol.items() if t > 0.0 and math.isfinite(t))
    if len(positive) < 2:
        return None
    below = [wt for wt in positive if wt[0] <= wavelength_nm]
    above = [wt for wt in positive if wt[0] > wavelength_nm]
    if below and above:
        return below[-1], above[0]
    near = sorted(positive, key=lambda wt: abs(wt[0] - wavelength_nm))[:2]
    first, second = sorted(near)
    return first, second


def aerosol_unc_at(wavelength_nm: float, aerosol: Mapping[float, float],
                   unc: Mapping[float, float]) -> float:
    """Standard uncertainty of :func:`aerosol_at` from the window channels' own [tau].

    ``ln tau(lambda) = (1 - f) ln t1 + f ln t2`` with ``f = ln(lambda/w1) / ln(w2/w1)``
    (the Angstrom law through the two channels), so the relative uncertainties of
    ``t1`` and ``t2`` (their fits' slope uncertainties, independent sessions of
    independent channels) add as ``(1 - f) u1/t1`` and ``f u2/t2`` in quadrature
    (first-order propagation, JCGM 100:2008, GUM, eq. 10). NaN when a channel's
    uncertainty is unknown; 0.0 without a pair.
    """
    pair = _angstrom_pair(wavelength_nm, aerosol)
    if pair is None:
        return 0.0
    (w1, t1), (w2, t2) = pair
    f = math.log(wavelength_nm / w1) / math.log(w2 / w1)
    tau = t1 * (t2 / t1) ** f
    u1, u2 = unc.get(w1, math.nan), unc.get(w2, math.nan)
    return tau * math.hypot((1.0 - f) * u1 / t1, f * u2 / t2)


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
        "uncertainty_budget": dict(fit.budget) if fit else {},
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


def _with_budget(fit: FitResult, terms: Mapping[str, float], notes: list[str],
                 s: ChannelSeries, config: Config) -> FitResult:
    unseen = unseen_note(fit, s.hours, s.airmass)
    notes = list(notes) + ([unseen] if unseen else [])
    if config.fit.tau_drift_per_hour is not None:
        notes.append("fit.tau_drift_per_hour is deprecated and ignored: the drift allowance "
                     "now comes from the same day's other session and the stored "
                     "campaign's repeatability")
    fit = with_terms(fit, terms)
    if fit.budget and math.isfinite(fit.v0_rel_unc):
        notes.append(budget_note(fit))
    return with_terms(fit, {}, tuple(notes))


def fit_series(series: Mapping[str, ChannelSeries], config: Config, plan_date: str,
               session: str,
               repeatability: Mapping[str, float] | None = None) -> list[dict[str, Any]]:
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
    repeatability : mapping of channel name to float, optional
        Relative rms spread of session V0 of the stored campaign per channel
        [fraction]; sets the drift allowance of each channel (:func:`drift_allowance`).

    Returns
    -------
    list of dict
        One row per configured channel in configuration order: the contract keys
        (:data:`daemon.store.reader.RESULT_KEYS`) plus ``notes``, ``earth_sun_factor``,
        ``residual_sd``, ``tau_aerosol``, ``tau_rayleigh``, ``tau_ozone``,
        ``e0_1au_w_m2_nm`` and ``astm_ratio`` (NaN where not computed),
        ``fit_points`` (:func:`fit_point_records`) and ``v0_shared_rel_unc``
        (:func:`shared_part`).
        Water-vapour channels are fitted after the window channels, whose accepted
        aerosol optical depths they need; their ``tau`` is None (the modified
        Langley's slope is not an optical depth).
    """
    rows: dict[str, dict[str, Any]] = {}
    aerosol: dict[float, float] = {}
    aerosol_unc: dict[float, float] = {}
    empty = ChannelSeries(*(np.empty(0),) * 5, n_total=0, hours=np.empty(0))
    for channel in config.channels:
        if channel.water_vapour:
            continue
        s = series.get(channel.name, empty)
        ext = extinction_corrections(s, channel, config)
        fit = fit_session(s.airmass, s.signal_v, config.fit, ln_correction=ext.ln_correction,
                          tau_floor=_known_tau(ext), hours=s.hours,
                          burst_sd_ln=s.burst_sd_ln)
        fit, terms, term_notes = budget_terms(fit, channel, config, s,
                                         (repeatability or {}).get(channel.name))
        fit = _with_budget(fit, terms, term_notes, s, config)
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
            aerosol_unc[channel.wavelength_nm] = fit.tau_unc
    for channel in config.channels:
        if channel.water_vapour:
            s = series.get(channel.name, empty)
            rows[channel.name] = _water_vapour_row(s, channel, config, aerosol, plan_date,
                                                   session, repeatability, aerosol_unc)
    for row in rows.values():
        row["v0_shared_rel_unc"] = shared_part(row["uncertainty_budget"])
    return [rows[c.name] for c in config.channels]


def shared_part(budget: Mapping[str, float]) -> float | None:
    """The part of a session's V0 uncertainty the sessions of a campaign share
    [fraction]: the root sum of squares of the budget's :data:`SYSTEMATIC_TERMS` and
    :data:`WATER_VAPOUR_SHARED_TERMS` (None for a session without a budget: not
    fitted). The campaign does not divide it by its number of sessions."""
    if not budget:
        return None
    names = SYSTEMATIC_TERMS + WATER_VAPOUR_SHARED_TERMS
    return math.sqrt(sum(u * u for k, u in budget.items() if k in names))


def _water_vapour_row(s: ChannelSeries, channel: Channel, config: Config,
                      aerosol: Mapping[float, float], plan_date: str, session: str,
                      repeatability: Mapping[str, float] | None = None,
                      aerosol_unc: Mapping[float, float] | None = None) -> dict[str, Any]:
    """The modified Langley: ln V plus the known extinctions against m^b.

    ``V = V0 exp(-tau_R m - tau_O3 m_O3 - tau_a m - a (W m)^b)`` for a water-vapour
    band, so ``ln V + tau_R m + tau_O3 m_O3 + tau_a m`` is a straight line in ``m^b``
    with intercept ln V0 and slope ``-a W^b``. ``tau_a`` comes from the session's
    accepted window channels by the Angstrom law; ``a`` and ``b`` from the channel's
    filter (:func:`water_vapour_fit`). A channel without a filter is not fitted.
    """
    from daemon.science.watervapour import water_vapour_airmass_from_kasten_young

    tau_a = aerosol_at(channel.wavelength_nm, aerosol)
    sp = _screened_arrays(s)
    spec = channel.filter
    failure = None
    if spec is None or not spec.given:
        failure = ("not fitted: water-vapour channel without a filter function; give the "
                   "channel 'filter: {file: <csv>}' or 'filter: {centre_nm: .., fwhm_nm: ..}' "
                   "so that the modified Langley's a and b can be derived from it")
    elif tau_a is None:
        failure = (f"not fitted: water-vapour channel; the modified Langley needs the aerosol "
                   f"from at least two accepted window channels, and this session has "
                   f"{len(aerosol)}")
    if failure is not None:
        b0 = config.fit.water_vapour_exponent
        row = _row(plan_date, session, channel, None, s.n_total, s.earth_sun_factor,
                   s.notes, [failure])
        # No constants or no aerosol, no corrected ln V: the points are kept with x only.
        row["fit_points"] = fit_point_records(
            s, None, fit_coordinates(s.airmass, s.signal_v, regressor_exponent=b0)[0],
            np.full(s.airmass.shape, math.nan),
            fit_coordinates(sp.airmass, sp.signal_v, regressor_exponent=b0)[0],
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
    u_tau_a = aerosol_unc_at(channel.wavelength_nm, aerosol, aerosol_unc or {})
    fit, wv, u_b_rel = water_vapour_fit(s, channel, config, known, p_ref,
                                        known_unc=u_tau_a * s.airmass, tau_a=tau_a[0])
    b = wv.b
    m_w = water_vapour_airmass_from_kasten_young(s.airmass)
    rep = (repeatability or {}).get(channel.name)
    allowance = drift_allowance(fit.v0_rel_unc, rep)
    fit = _with_budget(fit, {"campaign_repeatability": allowance},
                       [f"drift allowance {100 * allowance:.3f} % from the stored campaign's "
                        f"repeatability {100 * rep:.3f} % for this channel"]
                       if allowance > 0.0 else [], s, config)
    notes = s.notes + [n for n in ext.notes if not n.startswith("no ozone cross-section")]
    notes.append(f"water-vapour channel: modified Langley, ln V plus Rayleigh, ozone and "
                 f"aerosol {tau_a[0]:.4f} (from {tau_a[1]}) against m^{b:.4f}; a = {wv.a:.4f} "
                 f"+/- {wv.u_a:.4f}, b = {b:.4f} +/- {wv.u_b:.4f} from the filter "
                 f"({spec.source}) and SPECTRL2 water vapour at {wv.pressure_hpa:.0f} hPa, "
                 f"{wv.column_range_cm[0]:.2f}-{wv.column_range_cm[1]:.2f} cm; b's "
                 f"uncertainty adds {100 * u_b_rel:.2f} % to V0's")
    row = _row(plan_date, session, channel, fit, s.n_total, s.earth_sun_factor, notes,
               ext.failures, None, report_tau=False)
    row.update(water_vapour_row_keys(wv, fit, u_b_rel))
    x, y = fit_coordinates(m_w, s.signal_v, known, b)
    sx, sy = fit_coordinates(water_vapour_airmass_from_kasten_young(sp.airmass), sp.signal_v,
                             known_extinction(sp.airmass, sp.ozone_airmass, sp.pressure_hpa),
                             b)
    row["fit_points"] = fit_point_records(s, fit, x, y, sx, sy)
    return row


def water_vapour_fit(s: ChannelSeries, channel: Channel, config: Config, known: np.ndarray,
                     pressure_hpa: float, known_unc: np.ndarray | None = None, *,
                     tau_a: float) -> tuple[FitResult, Any, float]:
    """The modified-Langley fit with a, b from the filter, and b's share of V0's uncertainty.

    The regressor is ``m_w^b`` with ``m_w`` the water-vapour air mass (Kasten 1965,
    :func:`daemon.science.watervapour.water_vapour_airmass`), not Kasten-Young's: the
    water sits low, and at air mass 6 the two differ by 2 %, which the long
    extrapolation of the modified Langley turns into several per cent of V0.

    First a, b over the channel's ``water_vapour_range_cm``; the fit's slope gives the
    session's column ``W = (slope / a)^(1/b)``; then a, b again over that column
    +/- :data:`WATER_VAPOUR_REFINE` (the session's own range) and the final fit. The fit
    is repeated with ``b +/- u_b``; half the change of ln V0 is b's part of V0's
    relative uncertainty, added in quadrature to the fit's. ``known_unc``, one standard
    uncertainty of ``known`` per point (the aerosol taken from the window channels,
    ``u(tau_a) m``), is propagated the same way: the fit repeated with ``known +/-
    known_unc``, half the change of ln V0 as the ``aerosol_from_window_channels`` term
    (a wrong aerosol adds ``delta tau_a m``, which is curved against ``m_w^b`` and so
    moves the intercept, not only the slope). Last, the layer air masses of the vapour
    and of the aerosol ``tau_a`` (:func:`water_vapour_layer_terms`) correct V0 and add
    their terms.

    Returns the fit (``v0_rel_unc`` including b's, the aerosol's and the layers'
    parts), the constants used and b's part.
    """
    from daemon.science.watervapour import (  # pvlib: only for this channel
        derive_constants,
        water_vapour_airmass_from_kasten_young,
    )

    window = (config.fit.airmass_min, config.fit.airmass_max)
    spec = channel.filter

    m_w = water_vapour_airmass_from_kasten_young(s.airmass)
    # The window stays the configured one in Kasten-Young air mass: its edges in m_w.
    lo, hi = water_vapour_airmass_from_kasten_young(np.array(window))
    settings = replace(config.fit, airmass_min=float(lo), airmass_max=float(hi))

    def run(b: float, correction: np.ndarray = known) -> FitResult:
        return fit_session(m_w, s.signal_v, settings, ln_correction=correction,
                           regressor_exponent=b, hours=s.hours, burst_sd_ln=s.burst_sd_ln)

    wv = derive_constants(spec, pressure_hpa, window, channel.water_vapour_range_cm)
    fit = run(wv.b)
    if math.isfinite(fit.tau) and fit.tau > 0:
        column = (fit.tau / wv.a) ** (1.0 / wv.b)
        lo, hi = channel.water_vapour_range_cm
        column = min(max(column, lo), hi)
        wv = derive_constants(spec, pressure_hpa, window,
                              (column / WATER_VAPOUR_REFINE, column * WATER_VAPOUR_REFINE))
        fit = run(wv.b)
    if not math.isfinite(fit.ln_v0):
        return fit, wv, math.nan
    up, down = run(wv.b + wv.u_b), run(wv.b - wv.u_b)
    u_b_rel = abs(up.ln_v0 - down.ln_v0) / 2.0 if math.isfinite(up.ln_v0 + down.ln_v0) \
        else math.nan
    terms = {"water_vapour_exponent": u_b_rel}
    if known_unc is not None and np.any(np.asarray(known_unc) != 0.0):
        up, down = run(wv.b, known + known_unc), run(wv.b, known - known_unc)
        terms["aerosol_from_window_channels"] = abs(up.ln_v0 - down.ln_v0) / 2.0
    fit, layer_terms, notes = water_vapour_layer_terms(fit, m_w, s.airmass, wv.b, tau_a,
                                                       config)
    return with_terms(fit, {**terms, **layer_terms}, tuple(notes)), wv, u_b_rel


#: Scale heights of the water vapour above the site the budget spans [km]. The fit's
#: water-vapour air mass is Kasten's (1965) formula for one standard profile; the real
#: vapour's slant path is that of its own layer. ITU-R P.835's reference atmosphere
#: puts the vapour on a 2 km scale height (as documented by pyrtlib's
#: ``standard_water_vapour_pressure``); Gueymard's (1994) apparent scale height,
#: ``H_v = 0.4976 + 1.5265 t + exp(13.6897 t - 14.9188 t^3)`` with ``t = T / 273.15 K``
#: (as quoted by DNV's SolarFarmer calculation reference), gives 2.15-2.83 km for
#: surface temperatures of -10 to 35 degC; the rule used with Butler's estimate of
#: precipitable water takes 1.5 km (from memory). The range spans them.
WATER_VAPOUR_SCALE_HEIGHTS_KM = (1.5, 3.0)


def water_vapour_layer_terms(fit: FitResult, m_w: np.ndarray, airmass: np.ndarray, b: float,
                             tau_a: float, config: Config
                             ) -> tuple[FitResult, dict[str, float], list[str]]:
    """The modified Langley's layer air masses: corrections and their terms.

    ``water_vapour_airmass_model``: if the vapour's slant path is ``m_h``, a thin layer
    at a height ``h`` of :data:`WATER_VAPOUR_SCALE_HEIGHTS_KM` above the site
    (:func:`layer_airmasses`) rather than the fit's ``m_w``, the line through
    ``ln V + known`` against ``m_w^b`` misses the pattern ``-tau (m_h^b - m_w^b)``
    (``tau`` the fitted slope, ``a W^b``).
    ``aerosol_layer_airmass``: the known extinction puts the window channels' aerosol
    ``tau_a`` on the Kasten-Young air mass ``m``; on a layer at one of
    :data:`AEROSOL_SCALE_HEIGHTS_KM` the line misses ``-tau_a (m_layer - m)``, which
    against ``m_w^b`` is curved and moves the intercept far more than in a window
    channel's line against ``m``.

    Each bias is the intercept of a line fitted to its pattern over the used points,
    taken as for the window channels (:func:`systematic_terms`): over its range
    (:func:`range_term`) and as ``fit.correct_model_terms`` says (:func:`as_configured`).
    """
    used = np.asarray(fit.used, dtype=bool)
    if fit.n_used < 2 or not (math.isfinite(fit.ln_v0) and math.isfinite(fit.tau)):
        return fit, {}, []
    m = np.asarray(airmass, dtype=float)[used]
    z = _zenith_of(tuple(m.tolist()))
    x = np.asarray(m_w, dtype=float)[used] ** b
    ok = np.isfinite(z) & np.isfinite(x)
    if ok.sum() < 2 or np.ptp(x[ok]) == 0.0:
        return fit, {}, []
    m, z, x = m[ok], z[ok], x[ok]
    elev_m = config.site.elevation_m
    weights = intercept_weights(x)
    vapour = range_term([float(weights @ (-fit.tau * (m_h ** b - x))) for m_h in
                         layer_airmasses(z, elev_m, WATER_VAPOUR_SCALE_HEIGHTS_KM)])
    aerosol = range_term([float(weights @ (-max(tau_a, 0.0) * (m_h - m))) for m_h in
                          layer_airmasses(z, elev_m, AEROSOL_SCALE_HEIGHTS_KM)])
    shifts, terms = as_configured(
        {"water_vapour_airmass_model": vapour[0], "aerosol_layer_airmass": aerosol[0]},
        {"water_vapour_airmass_model": vapour[1], "aerosol_layer_airmass": aerosol[1]},
        config)
    if not shifts:
        return fit, terms, []
    ln_v0 = fit.ln_v0 - sum(shifts.values())
    note = correction_note(
        shifts, f" (the vapour on a layer {WATER_VAPOUR_SCALE_HEIGHTS_KM[0]:g}-"
        f"{WATER_VAPOUR_SCALE_HEIGHTS_KM[1]:g} km and the aerosol on one "
        f"{AEROSOL_SCALE_HEIGHTS_KM[0]:g}-{AEROSOL_SCALE_HEIGHTS_KM[1]:g} km above the "
        "site, not Kasten's 1965 profile and the whole atmosphere's air mass)")
    return replace(fit, ln_v0=ln_v0, v0=math.exp(ln_v0)), terms, [note]


#: The session's own column range for the refined a, b: its first estimate times or
#: divided by this factor (covers the first estimate's error from the wider range's b).
WATER_VAPOUR_REFINE = 1.3


def water_vapour_row_keys(wv: Any, fit: FitResult, u_b_rel: float) -> dict[str, Any]:
    """The row's water-vapour keys: a, b, their uncertainties, b's part, the column."""
    column = (fit.tau / wv.a) ** (1.0 / wv.b) if math.isfinite(fit.tau) and fit.tau > 0 \
        else math.nan
    return {"wv_a": wv.a, "wv_b": wv.b, "wv_u_a": wv.u_a, "wv_u_b": wv.u_b,
            "wv_v0_rel_unc_b": u_b_rel, "precipitable_water_cm": column}


# --------------------------------------------------------------------------- same day

#: How the day check's refusal begins (:func:`day_disagreements`);
#: :func:`daemon.science.campaign.same_day_pair_sd` recognises it.
DAY_CHECK_REASON = "morning and afternoon V0 at 1 AU differ by"


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
                f"{DAY_CHECK_REASON} {100 * diff:+.2f} % (allowed "
                f"{100 * limit:.2f} %): the optical depth drifted during the day")
    return out


def same_day_term(u_am: float, u_pm: float, difference: float) -> float:
    """Drift allowance from one day's morning-afternoon disagreement [fraction].

    With each session off by an independent drift error of SD ``s`` besides its stated
    uncertainty, the relative difference ``d`` of the two V0 has expected square
    ``2 s^2 + u_am^2 + u_pm^2``; one day's estimate of ``s`` is therefore
    ``sqrt(max(d^2 - u_am^2 - u_pm^2, 0) / 2)`` (method of moments, one degree of
    freedom; common practice, no source). A steady drift through the day, which biases
    the two sessions in opposite directions, gives the same value within a factor of
    sqrt(2).
    """
    excess = difference * difference - u_am * u_am - u_pm * u_pm
    return math.sqrt(max(excess, 0.0) / 2.0)


def add_same_day_terms(am_rows: Sequence[dict[str, Any]],
                       pm_rows: Sequence[dict[str, Any]]) -> dict[str, float]:
    """Widen, in place, both sessions of a day for their morning-afternoon disagreement.

    Each channel with a V0 at 1 AU in both sessions gets the :func:`same_day_term` as a
    ``same_day`` budget term in both rows, unless a row's drift allowance from the
    campaign is larger already (both estimate the same drift), and a note saying so.
    Returns the term by channel. (The service stores the morning before the afternoon
    exists; :func:`daemon.station.fitting.fit_stored_session` stores the widened
    morning uncertainty with the afternoon.)
    """
    am = {r["channel"]: r for r in am_rows}
    out: dict[str, float] = {}
    for pm in pm_rows:
        a = am.get(pm["channel"])
        if a is None:
            continue
        v_am, v_pm = a["v0_1au"], pm["v0_1au"]
        u_am, u_pm = a["v0_rel_unc"], pm["v0_rel_unc"]
        values = (v_am, v_pm, u_am, u_pm)
        if not all(v is not None and math.isfinite(v) for v in values) or v_am <= 0:
            continue
        diff = v_pm / v_am - 1.0
        term = same_day_term(u_am, u_pm, diff)
        out[pm["channel"]] = term
        for row, u in ((a, u_am), (pm, u_pm)):
            # Rows of the result contract alone (no notes: a stored morning) stay as
            # they are; the widening's note stays the last (the service stores it).
            if "notes" in row and "campaign_repeatability" not in (
                    row.get("uncertainty_budget") or {}):
                row["notes"] = [*row["notes"], ONE_PAIR_NOTE]
            _widen(row, u, term, f"drift allowance {100 * term:.3f} % from the same day's "
                                 f"morning and afternoon V0 ({100 * diff:+.3f} % apart)")
    return out


#: Said of a session whose drift allowance rests on its own day alone.
ONE_PAIR_NOTE = ("no campaign repeatability in this uncertainty: its drift allowance rests "
                 "on this day's two sessions alone, one degree of freedom (two sessions "
                 "that drifted alike agree by chance, and on a slowly varying sky the "
                 "stated uncertainty is then several times too small); a stored "
                 "calibration's repeatability, from its sessions' spread and its same-day "
                 "pairs, is the allowance from many days (heliotrope calibrate)")


def _widen(row: dict[str, Any], unc: float, term: float, why: str) -> None:
    budget = dict(row.get("uncertainty_budget") or {"stated": unc})
    if term <= 0.0 or term <= budget.get("campaign_repeatability", 0.0):
        return
    budget.pop("campaign_repeatability", None)
    budget["same_day"] = term
    row["uncertainty_budget"] = budget
    row["v0_rel_unc"] = math.sqrt(sum(u * u for u in budget.values()))
    note = f"{why}: V0 uncertainty now {100 * row['v0_rel_unc']:.3f} %"
    row["notes"] = [*row.get("notes", ()), note]
    if not row["accepted"]:
        row["reasons"] = [*row["reasons"], note]


def apply_day_check(am_rows: Sequence[dict[str, Any]], pm_rows: Sequence[dict[str, Any]],
                    settings: FitSettings) -> dict[str, str]:
    """Refuse, in place, both sessions of every channel whose morning and afternoon
    disagree (:func:`day_disagreements`); return the reasons by channel. A row already
    refused keeps its first reason and gets this one after it. The afternoon rows are
    then widened for the disagreement (:func:`add_same_day_terms`): the test uses the
    uncertainties each session stated alone."""
    found = day_disagreements(am_rows, pm_rows, settings)
    add_same_day_terms(am_rows, pm_rows)
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
