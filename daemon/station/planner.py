"""The day's plan: when the sun crosses each target air mass, and what follows.

:func:`plan_day` is a pure function of the configuration and the civil date at the
site. The plan covers that date from local midnight to the next local midnight
(``site.timezone``) and holds:

- one *target* for every configured air mass in the morning session ``am`` (air mass
  falling toward solar noon) and in the afternoon session ``pm`` (air mass rising),
  at the instant (within :data:`_TIME_TOL_S`, stored to the millisecond) at which the
  relative Kasten-Young air mass on the apparent zenith equals the target;
- optionally, ``routine`` targets every ``plan.routine_interval_min`` minutes
  between the last morning and the first afternoon target;
- events: ``fit_am`` and ``fit_pm`` :data:`FIT_DELAY_S` after the last target of each
  session, ``park`` ``plan.park_after_sunset_min`` after sunset (at local midnight
  on a day of polar night), and ``replan`` :data:`REPLAN_AFTER_MIDNIGHT_S` after the
  next local midnight, when the next date's plan is due;
- the targets the sun never reaches that day, each with its reason, and notes on
  anything unusual (polar day or night, a time zone far from the site's longitude).

How the crossings are found: one solar-position evaluation on a grid of
:data:`GRID_STEP_S` over the day, with the solar transits and anti-transits added
as grid nodes so that the apparent zenith is monotonic between neighbouring nodes;
a sign change of ``zenith - target zenith`` brackets each crossing. The target
zeniths come from inverting the Kasten-Young formula once. All brackets are then
refined together, one vectorised solar-position call per step, by inverse quadratic
interpolation safeguarded with regula falsi (Brent's idea, without the bisection
steps); from a 5-minute grid one step usually meets the tolerance, so a day costs
two solar-position calls. Sunrise and sunset are crossings of the geometric zenith
90.8333 degrees in the same pass.

Sessions are told apart by the direction of the crossing, not by the clock, so a
time zone far from the site's longitude still gives correct sessions (with a note).
"""

from __future__ import annotations

import functools
import math
from datetime import UTC, date, datetime, timedelta
from zoneinfo import ZoneInfo

import numpy as np
import pvlib

from daemon.config.settings import Config
from daemon.science.solar import (
    HORIZON_AIRMASS,
    apparent_zenith_from_airmass,
    delta_t_estimate_s,
    relative_airmass,
    site_pressure_hpa,
    sun_position_unix,
    sun_table,
)
from daemon.science.suntable import SunTable
from daemon.station.plans import (  # noqa: F401 - the plan's records, re-exported
    Plan,
    PlanEvent,
    PlannedTarget,
    SkippedTarget,
)

#: Spacing of the coarse grid that brackets every crossing [s].
GRID_STEP_S = 300.0

#: Geometric zenith of the sun's centre at sunrise and sunset [degrees]: 34' of
#: standard refraction plus 16' of semi-diameter (Reda and Andreas 2004, A.2, h0').
SUNRISE_ZENITH_DEG = 90.8333

#: Delay from a session's last target to its fit [s]. The executor runs timeline
#: items one at a time, so a slow last measurement only postpones the fit.
FIT_DELAY_S = 120.0

#: The next date's plan is made this long after the next local midnight [s]
#: (the service schedules the same moment).
REPLAN_AFTER_MIDNIGHT_S = 300.0

#: Refinement stops when the zenith's miss, divided by its rate of change, puts the
#: crossing less than this from the planned time [s] ...
_TIME_TOL_S = 0.05
#: ... or the miss is below this [degrees] ...
_ZENITH_TOL_DEG = 1e-7
#: ... or the bracket is narrower than this [s].
_BRACKET_TOL_S = 1e-3
_MAX_ITERATIONS = 40

#: A local midnight further than this from solar midnight earns a time-zone hint [h].
_MIDNIGHT_OFFSET_NOTE_H = 3.0

SESSIONS = ("am", "pm")
_SESSION_WORDS = {"am": "morning", "pm": "afternoon"}


# --------------------------------------------------------------------------- helpers

def _utc(unix_s: float) -> datetime:
    return datetime.fromtimestamp(round(float(unix_s), 3), UTC)


@functools.lru_cache(maxsize=32)
def _target_zeniths(targets: tuple[float, ...]) -> tuple[float, ...]:
    return tuple(float(z) for z in np.atleast_1d(apparent_zenith_from_airmass(list(targets))))


def _predicted_transits(u0: float, u1: float,
                        longitude_deg: float) -> tuple[np.ndarray, np.ndarray]:
    """Mean noons and approximate solar transits [POSIX s] for the UTC dates around a window.

    Uses Spencer's equation of time (good to about half a minute); the grid only
    needs a node near each transit, and the reported noon is corrected afterwards
    with the SPA's own equation of time.
    """
    first = math.floor(u0 / 86400.0) - 1
    days = np.arange(first, math.floor(u1 / 86400.0) + 2, dtype=float)
    dayofyear = np.array([datetime.fromtimestamp(d * 86400.0, UTC).timetuple().tm_yday
                          for d in days], dtype=float)
    mean_noon = days * 86400.0 + 43200.0 - longitude_deg / 15.0 * 3600.0
    transit = mean_noon - 60.0 * pvlib.solarposition.equation_of_time_spencer71(dayofyear)
    return mean_noon, transit


def _refine(a: np.ndarray, b: np.ndarray, c: np.ndarray, fa: np.ndarray, fb: np.ndarray,
            fc: np.ndarray, geometric: np.ndarray, zenith_target: np.ndarray,
            sun) -> tuple[np.ndarray, ...]:
    """Bracketed root refinement of all crossings at once.

    ``f(t) = zenith(t) - zenith_target`` changes sign between ``a`` and ``b``
    (seconds from any origin that ``sun`` understands); ``c`` is a third point
    nearby, ``fa``, ``fb``, ``fc`` the values there. The zenith is the geometric one
    where ``geometric`` is true, else the apparent one. Each step tries inverse
    quadratic interpolation through the three latest points and falls back to
    regula falsi when that leaves the bracket, as in Brent's method; the bracket is
    kept throughout, so a root is never lost. Returns the root times with the
    apparent zenith and azimuth there [degrees].
    """
    a, b, c, fa, fb, fc = (np.array(x, dtype=float) for x in (a, b, c, fa, fb, fc))
    n = a.size
    root = np.full(n, np.nan)
    app_zenith = np.full(n, np.nan)
    azimuth = np.full(n, np.nan)
    active = np.arange(n)
    with np.errstate(divide="ignore", invalid="ignore"):
        for _ in range(_MAX_ITERATIONS):
            if active.size == 0:
                break
            A, B, C = a[active], b[active], c[active]
            FA, FB, FC = fa[active], fb[active], fc[active]
            x = (A * FB * FC / ((FA - FB) * (FA - FC)) + B * FA * FC / ((FB - FA) * (FB - FC))
                 + C * FA * FB / ((FC - FA) * (FC - FB)))
            lo, hi = np.minimum(A, B), np.maximum(A, B)
            inside = np.isfinite(x) & (x > lo) & (x < hi)
            falsi = B - FB * (B - A) / (FB - FA)
            falsi = np.where(np.isfinite(falsi), falsi, 0.5 * (A + B))
            x = np.where(inside, x, falsi)
            pos = sun(x)
            fx = np.where(geometric[active], pos.zenith_deg, pos.apparent_zenith_deg) \
                - zenith_target[active]
            root[active] = x
            app_zenith[active] = pos.apparent_zenith_deg
            azimuth[active] = pos.azimuth_deg
            # x replaces the bracket end with the same sign; that end becomes c.
            like_a = np.signbit(fx) == np.signbit(FA)
            c[active] = np.where(like_a, A, B)
            fc[active] = np.where(like_a, FA, FB)
            a[active] = np.where(like_a, x, A)
            fa[active] = np.where(like_a, fx, FA)
            b[active] = np.where(like_a, B, x)
            fb[active] = np.where(like_a, FB, fx)
            width = np.abs(b[active] - a[active])
            rate = np.abs(fb[active] - fa[active]) / width  # [degrees per s]
            done = ((np.abs(fx) <= _ZENITH_TOL_DEG) | (np.abs(fx) <= rate * _TIME_TOL_S)
                    | (width <= _BRACKET_TOL_S))
            active = active[~done]
    return root, app_zenith, azimuth


# --------------------------------------------------------------------------- the plan

def plan_day(config: Config, day: date) -> Plan:
    """Plan one civil date at the configured site.

    Parameters
    ----------
    config : daemon.config.settings.Config
        Site (position, time zone, nominal pressure and temperature for refraction)
        and plan settings (target air masses, routine cadence, parking delay).
    day : datetime.date
        The civil date at the site; the plan runs from its local midnight to the next.

    Returns
    -------
    Plan
        Never raises for geometry: a target the sun does not reach is listed in
        ``skipped`` with the reason, and polar day or night give notes.
    """
    if isinstance(day, datetime) or not isinstance(day, date):
        raise TypeError(f"day must be a datetime.date (the civil date at the site), got "
                        f"{day!r}")
    site = config.site
    tz = ZoneInfo(site.timezone)
    next_day = day + timedelta(days=1)
    w0 = datetime(day.year, day.month, day.day, tzinfo=tz).astimezone(UTC)
    w1 = datetime(next_day.year, next_day.month, next_day.day, tzinfo=tz).astimezone(UTC)
    u0, u1 = w0.timestamp(), w1.timestamp()
    pressure = site_pressure_hpa(site)
    delta_t = delta_t_estimate_s(day.year, day.month)

    def sun(unix_s):
        return sun_position_unix(unix_s, site, pressure, site.temperature_c, delta_t)

    notes: list[str] = []

    # Grid with the transits and anti-transits as nodes: between neighbours the
    # zenith is monotonic, so one sign change means exactly one crossing.
    mean_noons, transits = _predicted_transits(u0, u1, site.longitude_deg)
    extremes = np.concatenate([transits, transits + 43200.0])
    extremes = extremes[(extremes > u0) & (extremes < u1)]
    grid = np.unique(np.concatenate([np.arange(u0, u1, GRID_STEP_S), [u1], extremes]))
    pos = sun(grid)

    # Solar noon: mean noon minus the SPA's equation of time at the transit node.
    noons = []
    for mean_noon, t in zip(mean_noons, transits, strict=True):
        if u0 < t < u1:
            i = int(np.searchsorted(grid, t))
            exact = mean_noon - 60.0 * pos.equation_of_time_min[i]
            if u0 <= exact < u1:
                noons.append(float(exact))
    noon = min(noons, key=lambda t: abs(t - 0.5 * (u0 + u1))) if noons else None
    if not noons:
        notes.append("no solar noon falls within this civil day; check site.timezone "
                     f"({site.timezone}) against the site's longitude")
    elif len(noons) > 1:
        notes.append("two solar noons fall within this civil day; the one nearer local "
                     "noon is reported")

    targets_all = config.plan.airmass_targets()
    reachable = tuple(m for m in targets_all if m <= HORIZON_AIRMASS)
    zt = np.array(_target_zeniths(reachable) + (SUNRISE_ZENITH_DEG,), dtype=float)
    geometric = np.zeros(zt.size, dtype=bool)
    geometric[-1] = True
    zen_grid = np.where(geometric[:, None], pos.zenith_deg[None, :],
                        pos.apparent_zenith_deg[None, :])
    f = zen_grid - zt[:, None]
    above = f > 0.0
    row, col = np.nonzero(above[:, :-1] != above[:, 1:])
    rising = above[row, col]  # zenith falling through the target: the sun climbs
    third = np.where(col + 2 < grid.size, col + 2, col - 1)  # a neighbour for the first
    offset = grid - u0  # seconds from local midnight keep the interpolation well scaled
    roots, root_zenith, root_azimuth = _refine(
        offset[col], offset[col + 1], offset[third], f[row, col], f[row, col + 1],
        f[row, third], geometric[row], zt[row], lambda x: sun(u0 + x))
    roots = roots + u0

    # Targets, by session.
    planned: list[PlannedTarget] = []
    found: set[tuple[str, float]] = set()
    horizon_row = zt.size - 1
    rises, sets = [], []
    for k, up, t, z, az in zip(row, rising, roots, root_zenith, root_azimuth, strict=True):
        if k == horizon_row:
            (rises if up else sets).append(float(t))
            continue
        session = "am" if up else "pm"
        m = reachable[k]
        found.add((session, m))
        planned.append(PlannedTarget(time_utc=_utc(t), session=session, airmass=m,
                                     apparent_zenith_deg=float(z), azimuth_deg=float(az)))

    # Sun up/down extremes over the day, for the reasons.
    grid_airmass = np.asarray(relative_airmass(pos.apparent_zenith_deg))
    up_nodes = np.isfinite(grid_airmass)
    lowest = float(np.min(grid_airmass[up_nodes])) if up_nodes.any() else math.nan
    highest = math.inf if not up_nodes.all() else float(np.max(grid_airmass))
    always_down = bool(np.all(pos.zenith_deg > SUNRISE_ZENITH_DEG))
    always_up = bool(np.all(pos.zenith_deg < SUNRISE_ZENITH_DEG))

    skipped: list[SkippedTarget] = []
    for session in SESSIONS:
        for m in targets_all:
            if (session, m) in found:
                continue
            skipped.append(SkippedTarget(session, m, _skip_reason(
                session, m, lowest, highest, always_down, site.timezone)))

    # Sunrise and sunset around the solar noon, else the first and last in the window.
    sunrise = sunset = None
    if rises:
        before = [t for t in rises if noon is None or t < noon]
        sunrise = max(before) if before else min(rises)
    if sets:
        after = [t for t in sets if noon is None or t > noon]
        sunset = min(after) if after else max(sets)

    # Routine cadence between the sessions.
    interval_s = config.plan.routine_interval_min * 60.0
    am_times = [t.time_utc.timestamp() for t in planned if t.session == "am"]
    pm_times = [t.time_utc.timestamp() for t in planned if t.session == "pm"]
    if interval_s > 0:
        last_am = max(am_times) if am_times else None
        first_pm = min((t for t in pm_times if last_am is None or t > last_am), default=None)
        if last_am is None or first_pm is None:
            missing = ("no morning target" if last_am is None else
                       "no afternoon target after the last morning one")
            notes.append("no routine targets: the routine cadence runs between the last "
                         f"morning and the first afternoon target, and today has {missing}")
        else:
            times = np.arange(last_am + interval_s, first_pm - 0.5 * interval_s, interval_s)
            if times.size:
                rpos = sun(times)
                for t, z, az in zip(times, rpos.apparent_zenith_deg, rpos.azimuth_deg,
                                    strict=True):
                    planned.append(PlannedTarget(
                        time_utc=_utc(t), session="routine",
                        airmass=float(relative_airmass(float(z))),
                        apparent_zenith_deg=float(z), azimuth_deg=float(az)))
    planned.sort(key=lambda p: p.time_utc)

    events: list[PlanEvent] = []
    for session, times in (("am", am_times), ("pm", pm_times)):
        if times:
            events.append(PlanEvent(_utc(max(times) + FIT_DELAY_S), f"fit_{session}"))
    if sunset is not None:
        events.append(PlanEvent(_utc(sunset + config.plan.park_after_sunset_min * 60.0),
                                "park"))
    elif always_down:
        events.append(PlanEvent(w0, "park"))
    events.append(PlanEvent(_utc(u1 + REPLAN_AFTER_MIDNIGHT_S), "replan"))
    events.sort(key=lambda e: e.time_utc)

    if always_down:
        notes.append("polar night: the sun stays below the horizon all day; nothing to "
                     "measure and the tracker stays parked")
    elif always_up:
        notes.append("polar day: the sun does not set; the tracker is not parked")
    else:
        if sunrise is None or sunset is None:
            missing = " and ".join(w for w, t in (("sunrise", sunrise), ("sunset", sunset))
                                   if t is None)
            notes.append(f"no {missing} within this civil day")
        if pos.zenith_deg[0] < SUNRISE_ZENITH_DEG or pos.zenith_deg[-1] < SUNRISE_ZENITH_DEG:
            # Up at midnight is normal in a high-latitude summer; far from solar midnight
            # it points at a time zone that does not suit the longitude.
            solar_midnights = transits + 43200.0
            off_h = float(np.min(np.abs(solar_midnights - u0))) / 3600.0
            advice = (f"; local midnight is {off_h:.1f} h from solar midnight: check that "
                      f"site.timezone ({site.timezone}) suits the site's longitude"
                      if off_h > _MIDNIGHT_OFFSET_NOTE_H else "")
            notes.append("the sun is up at local midnight: a session may run across the day "
                         f"boundary{advice}")
    n_skipped = len(skipped)
    if n_skipped and not always_down:
        notes.append(f"{n_skipped} of {2 * len(targets_all)} session targets are out of "
                     "reach today (see skipped)")

    return Plan(
        date=day, site_name=site.name, timezone=site.timezone,
        targets=tuple(planned), skipped=tuple(skipped), events=tuple(events),
        sunrise_utc=None if sunrise is None else _utc(sunrise),
        sunset_utc=None if sunset is None else _utc(sunset),
        solar_noon_utc=None if noon is None else _utc(noon),
        notes=tuple(notes),
    )


def plan_sun_table(config: Config, day: date) -> SunTable:
    """The sun table of one civil date at the configured site: the SPA's unrefracted
    geometry every :data:`daemon.science.suntable.STEP_S` over the daylight of the plan's
    window (local midnight to the next, as :func:`plan_day`), with the same Delta T.
    A pure function of (config, date), computed and stored with the plan, so that the
    resident service finds each burst's geometry without pvlib."""
    tz = ZoneInfo(config.site.timezone)
    next_day = day + timedelta(days=1)
    u0 = datetime(day.year, day.month, day.day, tzinfo=tz).timestamp()
    u1 = datetime(next_day.year, next_day.month, next_day.day, tzinfo=tz).timestamp()
    return sun_table(config.site, u0, u1, delta_t_estimate_s(day.year, day.month))


def _skip_reason(session: str, airmass: float, lowest: float, highest: float,
                 always_down: bool, timezone: str) -> str:
    if airmass > HORIZON_AIRMASS:
        return (f"air mass {airmass:g} lies beyond the horizon: the Kasten-Young air mass "
                f"of the sun's centre on the apparent horizon is {HORIZON_AIRMASS:.2f}")
    if always_down:
        return "polar night: the sun stays below the horizon all day"
    if math.isnan(lowest):
        return "the sun's centre never rises above the apparent horizon today"
    if airmass < lowest:
        return (f"the sun never gets high enough: the lowest air mass today is "
                f"{lowest:.3f}, at solar noon")
    if airmass > highest:
        return (f"the sun never gets low enough: the highest air mass today is "
                f"{highest:.3f} and the sun does not set")
    return (f"the {_SESSION_WORDS[session]} crossing of air mass {airmass:g} falls outside "
            f"this civil day (local midnight to midnight); check site.timezone ({timezone})")
