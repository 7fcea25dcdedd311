"""Calibration campaigns: the accepted sessions of a date range combined per channel.

A single half-day's V0 carries the sky of that half-day; a calibration is the robust
mean of many accepted sessions, with their repeatability (the percent rms spread,
0.25 % at a good high-mountain station: Schmid, B. and Wehrli, C. 1995, Applied
Optics 34(21):4500-4512), the sessions that disagree flagged, and the drift of V0
over the campaign. :func:`combine_sessions` is the pure part; :func:`calibrate`
reads the session results, stores the calibration record and computes the aerosol
optical depth of the campaign's measurements (:mod:`daemon.science.aod`).
"""

from __future__ import annotations

import datetime as _dt
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from daemon.config.settings import Channel, Config
from daemon.science.lamp import lamp_check
from daemon.science.langley import fit_line
from daemon.science.points import DAYS_PER_YEAR, SESSION_DAY_FRACTION
from daemon.science.sessionfit import shared_unc

#: Normal-consistent scale of the median absolute deviation (common practice, no source).
MAD_TO_SD = 1.4826
# At most this share of a campaign's sessions may be flagged: beyond it the spread
# is the campaign's, not a few bad days'.
MAX_FLAGGED_FRACTION = 0.5
# Points of the nominal session over a stored row's air-mass range on which the shared
# model terms are evaluated (the default plan's 17 targets).
NOMINAL_POINTS = 17


class CalibrationError(Exception):
    """No calibration can be made; the message says why and what to do."""


@dataclass(frozen=True)
class SessionV0:
    """One accepted session's V0 at 1 AU [V] and its relative standard uncertainty.

    ``shared_rel_unc`` is the part of ``v0_rel_unc`` all sessions share (the model
    terms, :func:`daemon.science.sessionfit.shared_unc`) [fraction].
    """

    date: str
    session: str
    v0_1au: float
    v0_rel_unc: float | None = None
    shared_rel_unc: float = 0.0


@dataclass
class ChannelCalibration:
    """One channel's combined campaign result.

    ``v0_1au`` [V] is the mean of the sessions kept, ``v0_1au_unc`` [V] its standard
    uncertainty (:func:`campaign_uncertainty`), ``repeatability_pct`` the rms spread of
    the kept sessions about it [percent], ``drift_pct_per_year`` the slope of V0 against
    time relative to the mean [percent per year] (None with fewer than three kept
    sessions on two or more dates). ``sessions`` lists every
    session with its deviation and whether it was flagged; ``usable`` is False when
    fewer than the required sessions are kept, and ``reasons`` says why.
    """

    channel: str
    wavelength_nm: float
    v0_1au: float | None
    v0_1au_unc: float | None
    repeatability_pct: float | None
    n_sessions: int
    n_flagged: int
    drift_pct_per_year: float | None
    drift_unc_pct_per_year: float | None
    usable: bool
    sessions: list[dict[str, Any]] = field(default_factory=list)
    reasons: list[str] = field(default_factory=list)
    e0_1au_w_m2_nm: float | None = None
    astm_ratio: float | None = None


def _years(date: str, session: str) -> float:
    d = _dt.date.fromisoformat(date)
    fraction = SESSION_DAY_FRACTION["am" if session == "am" else "pm"]
    return (d.toordinal() + fraction) / DAYS_PER_YEAR


def campaign_uncertainty(mean: float, sd: float, stated: np.ndarray,
                         shared: np.ndarray) -> float:
    """Standard uncertainty of a campaign's mean V0 [V].

    Parameters
    ----------
    mean : float
        Mean V0 of the kept sessions [V].
    sd : float
        Their sample standard deviation [V] (NaN with one session).
    stated : ndarray
        Each kept session's stated relative uncertainty [fraction] (NaN unknown).
    shared : ndarray
        The part of it all sessions share [fraction].

    Returns
    -------
    float
        ``sqrt(max(sd^2 / N, mean(u_i^2) / N) + u_shared^2)``, with ``u_i`` the part of
        each session's uncertainty that is its own, ``sqrt(stated^2 - shared^2)``, and
        ``u_shared`` the rms of the shared parts.

    Notes
    -----
    The mean of N independent sessions has the standard error ``sd / sqrt(N)``
    (JCGM 100:2008, GUM, sec. 4.2.3); what the sessions share does not average out and
    is added undivided (GUM sec. 5.2, fully correlated inputs). The larger of the
    observed scatter and the stated independent parts is used, so neither sessions
    that happen to agree nor a campaign of few sessions can claim more than the other
    allows.
    """
    n = stated.size
    shared = np.where(np.isfinite(shared), shared, 0.0)
    own = np.sqrt(np.maximum(np.where(np.isfinite(stated), stated, 0.0) ** 2 - shared ** 2,
                             0.0))
    scatter = (sd / mean) ** 2 / n if math.isfinite(sd) else 0.0
    stated_part = float(np.mean(own ** 2)) / n
    return mean * math.sqrt(max(scatter, stated_part) + float(np.mean(shared ** 2)))


def combine_sessions(channel: str, wavelength_nm: float, values: Sequence[SessionV0],
                     clip_sigma: float = 3.0, min_sessions: int = 3,
                     spread_floor_rel: float = 0.0) -> ChannelCalibration:
    """Robust mean of one channel's session V0 values, with flags and drift.

    ``spread_floor_rel`` [fraction] is a lower bound of the sessions' spread known from
    elsewhere (:func:`same_day_pair_sd`): the standard error of the mean uses the
    larger of it and the kept sessions' own spread (the repeatability stays the kept
    sessions' spread, and the clipping does not use it).

    Parameters
    ----------
    channel : str
        Channel name.
    wavelength_nm : float
        Its wavelength [nm].
    values : sequence of SessionV0
        The accepted sessions of the campaign.
    clip_sigma : float
        A session further than this many spreads from the centre is flagged and left
        out. The centre is the median of all sessions at first, then the mean of the
        kept sessions; the spread is the normal-consistent MAD at first, then the sample
        standard deviation of the kept sessions, never below the median stated
        uncertainty.
    min_sessions : int
        Kept sessions the channel needs to be usable.

    Returns
    -------
    ChannelCalibration

    Notes
    -----
    Start from the median and the normal-consistent median absolute deviation, then
    iterate: flag the sessions beyond ``clip_sigma`` spreads of the mean of the kept
    ones, recompute the mean and the sample standard deviation, until nothing
    changes (sigma clipping; common practice, no source). The spread is never taken
    below the median stated uncertainty of the sessions, so a campaign that happens
    to agree too well does not flag an honest session. No more than half of the
    sessions are ever flagged.
    """
    vals = [s for s in values if s.v0_1au is not None and math.isfinite(s.v0_1au)
            and s.v0_1au > 0]
    n = len(vals)
    if n == 0:
        return ChannelCalibration(channel, wavelength_nm, None, None, None, 0, 0, None, None,
                                  False, [], ["no accepted session in the campaign"])
    x = np.array([s.v0_1au for s in vals])
    stated = np.array([s.v0_rel_unc if s.v0_rel_unc is not None and math.isfinite(
        s.v0_rel_unc) else math.nan for s in vals])
    floor = float(np.nanmedian(stated)) * float(np.median(x)) if np.isfinite(stated).any() \
        else 0.0
    center = float(np.median(x))
    spread = max(MAD_TO_SD * float(np.median(np.abs(x - center))), floor)
    keep = np.ones(n, dtype=bool)
    max_flag = int(math.floor(MAX_FLAGGED_FRACTION * n))
    for _ in range(20):
        dev = np.abs(x - center)
        new = dev <= clip_sigma * spread if spread > 0 else np.ones(n, dtype=bool)
        if int((~new).sum()) > max_flag:
            order = np.argsort(-dev, kind="stable")
            new = np.ones(n, dtype=bool)
            new[order[:max_flag]] = False
        if np.array_equal(new, keep):
            break
        keep = new
        center = float(x[keep].mean())
        sd = float(x[keep].std(ddof=1)) if keep.sum() >= 2 else 0.0
        spread = max(sd, floor)
    kept = x[keep]
    mean = float(kept.mean())
    n_kept = int(keep.sum())
    sd = float(kept.std(ddof=1)) if n_kept >= 2 else math.nan
    sd_unc = sd
    if spread_floor_rel > 0.0 and not (math.isfinite(sd) and sd >= spread_floor_rel * mean):
        sd_unc = spread_floor_rel * mean
    shared = np.array([s.shared_rel_unc for s in vals])[keep]
    if n_kept == 1 and not math.isfinite(stated[keep][0]):
        unc = math.nan
    else:
        unc = campaign_uncertainty(mean, sd_unc, stated[keep], shared)
    sessions = []
    for s, k in zip(vals, keep, strict=True):
        dev_pct = 100.0 * (s.v0_1au / mean - 1.0)
        entry = {"date": s.date, "session": s.session, "v0_1au": s.v0_1au,
                 "v0_rel_unc": s.v0_rel_unc, "deviation_pct": dev_pct, "flagged": not k}
        if not k:
            entry["why"] = (f"V0 at 1 AU {s.v0_1au:.5f} V is {dev_pct:+.2f} % from the "
                            f"campaign mean, beyond {clip_sigma:g} times the spread of the "
                            f"kept sessions ({100 * spread / mean:.2f} %)")
        sessions.append(entry)
    drift = drift_unc = None
    t = np.array([_years(s.date, s.session) for s, k in zip(vals, keep, strict=True) if k])
    if n_kept >= 3 and len({s.date for s, k in zip(vals, keep, strict=True) if k}) >= 2:
        line = fit_line(t - t.mean(), kept)
        drift = 100.0 * line.slope / mean
        drift_unc = 100.0 * line.se_slope / mean
    reasons = []
    if n_kept < min_sessions:
        reasons.append(f"only {n_kept} accepted session{'s' if n_kept != 1 else ''} kept, "
                       f"fewer than the required {min_sessions} (fit.campaign_min_sessions)")
    return ChannelCalibration(
        channel=channel, wavelength_nm=wavelength_nm, v0_1au=mean,
        v0_1au_unc=unc if math.isfinite(unc) else None,
        repeatability_pct=100.0 * sd / mean if math.isfinite(sd) else None,
        n_sessions=n_kept, n_flagged=n - n_kept, drift_pct_per_year=drift,
        drift_unc_pct_per_year=drift_unc, usable=not reasons, sessions=sessions,
        reasons=reasons)


def same_day_pair_sd(rows: Sequence[Mapping[str, Any]]) -> tuple[float, int]:
    """A session's spread from its day's morning-afternoon disagreements [fraction].

    Parameters
    ----------
    rows : sequence of mapping
        One channel's session rows (the JSON contract). A day counts when both its
        sessions have a V0 at 1 AU and each was accepted or refused only for the
        disagreement itself (:data:`daemon.science.sessionfit.DAY_CHECK_REASON` first):
        a session refused for its own plot testifies to something else.

    Returns
    -------
    (sd, n_pairs)
        ``sqrt(sum d^2 / (2 n))`` with ``d`` the relative difference of each pair (the
        standard deviation of one measurement from duplicate pairs, Dahlberg's formula;
        from memory), NaN without a pair.

    Notes
    -----
    Each session errs by its statistics and by the drift of its half-day; with the two
    independent, ``E[d^2] = 2 s^2``, ``s`` the whole per-session spread, which the
    spread of accepted sessions alone understates once the day check has refused the
    pairs that disagree most (a steady drift that biases the two sessions opposite
    ways gives ``E[d^2] = 4 s^2``: then this errs high). A drift both sessions share (a
    haze peaking at noon) does not show in ``d`` at all (Shaw 1983, from memory).
    """
    from daemon.science.sessionfit import DAY_CHECK_REASON

    def usable(r: Mapping[str, Any]) -> bool:
        v = r.get("v0_1au")
        if v is None or not math.isfinite(v) or v <= 0:
            return False
        reasons = r.get("reasons") or []
        return bool(r.get("accepted")) or bool(reasons) and str(reasons[0]).startswith(
            DAY_CHECK_REASON)

    by_day: dict[str, dict[str, float]] = {}
    for r in rows:
        if usable(r):
            by_day.setdefault(r["date"], {})[r["session"]] = float(r["v0_1au"])
    d = [v["pm"] / v["am"] - 1.0 for v in by_day.values() if "am" in v and "pm" in v]
    if not d:
        return math.nan, 0
    return math.sqrt(float(np.mean(np.square(d))) / 2.0), len(d)


#: Same-day pairs needed before their spread bounds a campaign's uncertainty and the
#: drift allowance of later sessions.
MIN_DAY_PAIRS = 3


def drift_repeatability(channels: Sequence[Mapping[str, Any]],
                        results: Sequence[Mapping[str, Any]]) -> dict[str, float]:
    """Per usable channel of a stored calibration, the spread later sessions allow for.

    Parameters
    ----------
    channels : sequence of mapping
        The calibration's channels (``channel``, ``usable``, ``repeatability_pct``), as
        :func:`daemon.store.reader.stored_calibration` gives them.
    results : sequence of mapping
        The session rows of the calibration's dates, refused ones included.

    Returns
    -------
    dict
        Channel name to the larger of the stored repeatability and the spread its
        same-day pairs imply (:func:`same_day_pair_sd`, with at least
        :data:`MIN_DAY_PAIRS` pairs) [fraction]; the session fit takes it as its drift
        allowance (:func:`daemon.science.sessionfit.drift_allowance`). The accepted
        sessions' spread alone understates a drifting sky's, because the day check
        refused the pairs that disagreed most (Schmid and Wehrli 1995 on repeatability,
        docs/REFERENCES.md; Shaw 1983 on drift, from memory).
    """
    out = {}
    for c in channels:
        rep = c.get("repeatability_pct")
        if not c.get("usable") or rep is None or not rep > 0.0:
            continue
        pair, _ = pair_spread_floor([r for r in results if r["channel"] == c["channel"]])
        out[c["channel"]] = max(rep / 100.0, pair)
    return out


def pair_spread_floor(rows: Sequence[Mapping[str, Any]]) -> tuple[float, int]:
    """:func:`same_day_pair_sd` as a lower bound of the sessions' spread [fraction]: 0
    with fewer than :data:`MIN_DAY_PAIRS` pairs; and the number of pairs."""
    sd, n = same_day_pair_sd(rows)
    return (sd if n >= MIN_DAY_PAIRS and math.isfinite(sd) else 0.0), n


def _shared(channel: Channel, config: Config, row: Mapping[str, Any]) -> float:
    """The shared part of a session's uncertainty: the fit's own figure
    (``v0_shared_rel_unc``, stored with the result since m009), or for an older row
    of a window channel the model terms again from its air-mass range and tau (an
    older water-vapour row has none: 0)."""
    stored = row.get("v0_shared_rel_unc")
    if stored is not None and math.isfinite(stored):
        return float(stored)
    lo, hi, tau = row.get("airmass_min"), row.get("airmass_max"), row.get("tau")
    if lo is None or hi is None or tau is None or not hi > lo:
        return 0.0
    return shared_unc(channel, config, np.linspace(lo, hi, NOMINAL_POINTS), tau)


def campaign(results: Sequence[Mapping[str, Any]], config: Config,
             notes: list[str] | None = None) -> list[ChannelCalibration]:
    """Combine session result rows (the JSON contract) per configured channel.

    Rows that the session fit did not accept are left out; how many is appended to
    ``notes`` when a list is given.
    """
    fit = config.fit
    out = []
    for ch in config.channels:
        rows = [r for r in results if r["channel"] == ch.name]
        accepted = [SessionV0(r["date"], r["session"], r["v0_1au"], r["v0_rel_unc"],
                              _shared(ch, config, r))
                    for r in rows if r["accepted"] and r["v0_1au"] is not None]
        floor, n_pairs = pair_spread_floor(rows)
        cal = combine_sessions(ch.name, ch.wavelength_nm, accepted, fit.campaign_clip_sigma,
                               fit.campaign_min_sessions, floor)
        if floor > 0.0 and notes is not None and (
                cal.repeatability_pct is None or 100.0 * floor > cal.repeatability_pct):
            notes.append(f"{ch.name}: {n_pairs} same-day pairs imply {100 * floor:.3f} % a "
                         "session, above the spread")
        n_rejected = len(rows) - len(accepted)
        if n_rejected and notes is not None:
            notes.append(f"{ch.name}: {n_rejected} session{'s' if n_rejected != 1 else ''} "
                         "not accepted by the session fit left out")
        check = lamp_check(cal.v0_1au, ch) if cal.v0_1au is not None else None
        if check is not None:
            cal.e0_1au_w_m2_nm, cal.astm_ratio = check[0], check[2]
        out.append(cal)
    return out
