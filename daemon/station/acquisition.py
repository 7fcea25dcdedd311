"""Acquisition: what happens at each planned moment of a day.

:class:`Station` ties the devices, the store and the clock together and knows how to
measure one target (point, lock, burst, dark, housekeeping, geometry, store) and how
to fit a finished session. :func:`run_day` walks a day's plan with any clock: the
simulated clock for the demo and the tests, the real clock in the service. Device
trouble never escapes from here: it becomes an event and, for a target, a measurement
stored as failed, and the day goes on.

This module is part of the resident service, which holds no pvlib, numpy, scipy or
pandas (DEVELOPERS.md, "Architecture"): the geometry of a burst comes from the day's
stored sun table (:mod:`daemon.science.suntable`), the fit and the plan from
callables that run in a child process in the service (:mod:`daemon.station.jobs`) and
in this process for the demo, the bench and the tests, which import the science
lazily.
"""

from __future__ import annotations

import dataclasses
import logging
import math
import threading
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from typing import Any

from daemon.config.settings import Config
from daemon.science.atmosphere import site_pressure_hpa
from daemon.science.suntable import Geometry, SunTable
from daemon.station.clock import Clock
from daemon.station.jobs import ChildFailed
from daemon.station.plans import Plan, PlanEvent, PlannedTarget
from daemon.store.writer import STORE_ERRORS, MeasurementRecord, Store, config_digest
from drivers.interfaces import (
    Burst,
    DeviceError,
    Housekeeping,
    LinkError,
    Radiometer,
    Tracker,
    TrackerState,
)

log = logging.getLogger(__name__)

LINK_FAULT_KINDS = ("retries", "timeouts", "crc_errors", "stale", "garbage", "reconnects",
                    "device_errors")
# Housekeeping outside these bounds is a sensor fault or a firmware sentinel (-999.9),
# not weather: it is stored as unknown, never used (common practice, no source; the
# pressure bounds match the offline refit's).
PLAUSIBLE_HOUSEKEEPING = {
    "detector_temp_c": (-60.0, 90.0), "case_temp_c": (-60.0, 90.0),
    "ambient_temp_c": (-60.0, 60.0), "supply_v": (0.0, 60.0), "humidity_pct": (0.0, 100.0),
    "pressure_hpa": (300.0, 1100.0),
}
POLL_S = 1.0  # tracker state polling interval while waiting for a lock
SLEW_TIMEOUT_S = 180.0  # a full-circle slew of a slow tracker, with margin
SUN_TABLES_HELD = 3  # sun tables kept in memory (today's, and a day either side)

#: Fits one stored session and stores the results: (plan date, session, now) -> rows.
Fitter = Callable[[date, str, datetime], list[dict[str, Any]]]
#: A sun table around one instant, as a dict (:meth:`SunTable.to_dict`).
SunFallback = Callable[[datetime], dict[str, Any]]


class NoSunLock(Exception):
    """The tracker did not confirm the sun within the allowed time."""


class Abandoned(Exception):
    """The service is stopping; the measurement in progress is dropped whole."""


@dataclass(frozen=True)
class TargetOutcome:
    target: PlannedTarget
    measurement_id: int | None
    ok: bool
    message: str


class Station:
    """The devices, the store and the clock of one site."""

    def __init__(self, config: Config, radiometer: Radiometer, tracker: Tracker,
                 store: Store, clock: Clock, fitter: Fitter | None = None,
                 sun_fallback: SunFallback | None = None):
        self.config = config
        self.radiometer = radiometer
        self.tracker = tracker
        self.store = store
        self.clock = clock
        self.pressure_hpa = site_pressure_hpa(config.site)
        self.stopping = threading.Event()
        self._link_seen: dict[str, dict[str, int]] = {}
        #: The SHA-256 of the configuration text: a plan or sun table stored for
        #: another one is not used.
        self.config_sha256 = config_digest(config.text)
        #: Fits a session (in this process unless the service hands it to a child).
        self.fitter: Fitter = fitter or self._fit_here
        #: A sun table around an instant the day's table does not cover.
        self.sun_fallback: SunFallback = sun_fallback or self._sun_table_here
        self._sun_tables: dict[str, SunTable | None] = {}

    # ------------------------------------------------------------------ geometry

    def use_sun_table(self, plan_date: date, table: SunTable) -> None:
        """Take ``table`` as the sun table of ``plan_date`` (just planned)."""
        self._sun_tables[plan_date.isoformat()] = table
        while len(self._sun_tables) > SUN_TABLES_HELD:
            self._sun_tables.pop(min(self._sun_tables))

    def geometry(self, when: datetime, plan_date: date, pressure_hpa: float) -> Geometry:
        """Solar geometry at ``when`` from the stored sun table of ``plan_date``, refracted
        at ``pressure_hpa`` [hPa] and the site's temperature. Outside the table (or with
        none stored for this configuration) it comes from :attr:`sun_fallback`, with a
        warning event, so the stored value is the SPA's either way."""
        site = self.config.site
        table = self._sun_table(plan_date)
        geo = None if table is None else table.geometry_at(when, site.elevation_m,
                                                           pressure_hpa, site.temperature_c)
        if geo is None:
            self.event("warning", "geometry_fallback",
                       f"{when:%Y-%m-%d %H:%M:%S} UTC lies outside the stored sun table of "
                       f"{plan_date}; geometry computed by the full solar position algorithm",
                       {"date": plan_date.isoformat()})
            geo = SunTable.from_dict(self.sun_fallback(when)).geometry_at(
                when, site.elevation_m, pressure_hpa, site.temperature_c)
            if geo is None:
                raise ChildFailed(f"the fallback sun table does not cover {when.isoformat()}")
        return geo

    def _sun_table(self, plan_date: date) -> SunTable | None:
        key = plan_date.isoformat()
        if key not in self._sun_tables:
            table = None
            try:
                stored = self.store.sun_table(key)
                if stored is not None and stored[0] == self.config_sha256:
                    table = SunTable.from_dict(stored[1])
            except (ValueError, *STORE_ERRORS) as exc:
                log.error("sun table of %s not usable: %s", key, exc)
            self.use_sun_table(plan_date, table)
        return self._sun_tables[key]

    def _sun_table_here(self, when: datetime) -> dict[str, Any]:
        from daemon.station.jobs import sun_table_around

        return sun_table_around(self.config, when)

    # ------------------------------------------------------------------ events

    def event(self, level: str, kind: str, message: str, detail: dict | None = None) -> None:
        """Log and store an event. A store that cannot be written (a full disk) is logged
        to the journal and survived: losing an event must never stop acquisition."""
        getattr(log, level if level in ("info", "warning", "error") else "info")(message)
        try:
            self.store.record_event(self.clock.now(), level, kind, message, detail)
        except STORE_ERRORS as exc:
            log.error("could not store event %r: %s", kind, exc)

    def record_link_faults(self) -> None:
        """Store one event per device whose link counters grew since the last look
        (garbage, bad checksums, timeouts, reconnects recovered by the transport)."""
        for name, device in (("radiometer", self.radiometer), ("tracker", self.tracker)):
            now = device.link_counters()
            before = self._link_seen.get(name, {})
            grown = {k: v - before.get(k, 0) for k, v in now.items()
                     if k in LINK_FAULT_KINDS and v > before.get(k, 0)}
            self._link_seen[name] = now
            if grown:
                what = ", ".join(f"{v} {k.replace('_', ' ')}" for k, v in sorted(grown.items()))
                self.event("warning", "link_fault", f"{name} link: {what} (recovered)",
                           {"device": name, **grown})

    # ------------------------------------------------------------------ devices

    def sync_clocks(self) -> None:
        """Set both devices' clocks from ours. Done at every target and after every wait,
        so a simulated clock that jumps keeps the bench instruments in step."""
        now = self.clock.now()
        self.radiometer.set_clock(now)
        self.tracker.set_clock(now)

    def _check_stop(self) -> None:
        if self.stopping.is_set():
            raise Abandoned("service stopping")

    def _pause(self) -> None:
        """One polling interval; gives up at once when the service is stopping."""
        self._check_stop()
        self.clock.sleep(POLL_S)
        self._check_stop()
        self.sync_clocks()

    def _wait_for_lock(self) -> TrackerState:
        acq = self.config.acquisition
        start = self.clock.monotonic()
        state = self.tracker.state()
        while state.mode == "slewing" and self.clock.monotonic() - start < SLEW_TIMEOUT_S:
            self._pause()
            state = self.tracker.state()
        lock_start = self.clock.monotonic()
        while True:
            if state.locked and state.error_deg <= acq.max_pointing_error_deg:
                return state
            if self.clock.monotonic() - lock_start >= acq.lock_timeout_s:
                why = ("still slewing" if state.mode == "slewing" else
                       f"pointing error {state.error_deg:.3f} deg" if state.locked else
                       "sun sensor reports no lock")
                raise NoSunLock(f"no sun lock after {acq.lock_timeout_s:g} s ({why})")
            self._pause()
            state = self.tracker.state()

    # ------------------------------------------------------------------ one target

    def measure(self, target: PlannedTarget, plan_date: date) -> TargetOutcome:
        """Point, lock, read and store one target.

        Never raises for device trouble or a store that cannot be written: a failed
        target is stored as a failed measurement with its reason, and a store write
        that fails (a full disk) leaves the store as it was and is logged.
        """
        what = f"{target.session} target m={target.airmass:g}"
        try:
            rec = self._acquire(target, plan_date)
            ok, message = True, "ok"
        except Abandoned:
            self.event("warning", "abandoned", f"{what}: abandoned, service stopping")
            return TargetOutcome(target, None, False, "abandoned")
        except (LinkError, DeviceError, NoSunLock) as exc:
            message = f"{what}: {exc}"
            kind = "no_lock" if isinstance(exc, NoSunLock) else "device_fault"
            self.event("warning", kind, message, {"error": type(exc).__name__})
            rec = self._failed_record(target, plan_date, str(exc))
            ok = False
        except Exception as exc:  # a bug must cost one target, not the day
            log.exception("%s: acquisition failed", what)
            message = f"{what}: acquisition failed: {exc!r}"
            self.event("error", "acquisition_error", message, {"error": type(exc).__name__})
            rec = self._failed_record(target, plan_date, f"acquisition failed: {exc!r}")
            ok = False
        finally:
            self.record_link_faults()
        try:
            mid = self.store.record_measurement(rec)
        except STORE_ERRORS as exc:
            log.error("%s: measurement not stored: %s", what, exc)
            self.event("error", "store_error", f"{what}: measurement not stored: {exc}")
            return TargetOutcome(target, None, False, f"not stored: {exc}")
        return TargetOutcome(target, mid, ok, message)

    def _acquire(self, target: PlannedTarget, plan_date: date) -> MeasurementRecord:
        acq = self.config.acquisition
        self.sync_clocks()
        state = self.tracker.state()
        # A tracker already locked on the sun (between the targets of a session) is left
        # alone: a new slew would only cost lock time.
        if not (state.mode == "tracking" and state.locked
                and state.error_deg <= acq.max_pointing_error_deg):
            aim = self.geometry(self.clock.now(), plan_date, self.pressure_hpa)
            self.tracker.goto(aim.azimuth_deg, aim.apparent_elevation_deg)
            self.tracker.follow_sun(True)
        self._wait_for_lock()
        self._check_stop()
        self.sync_clocks()
        started = self.clock.now()
        burst = self.radiometer.read_burst(acq.burst_samples)
        self._check_stop()
        dark = (self.radiometer.read_dark(acq.dark_samples) if acq.dark_samples
                else Burst(samples=(), duration_s=0.0, saturated=()))
        self._check_stop()
        housekeeping = self._plausible(self.radiometer.read_housekeeping())
        after = self.tracker.state()
        self._check_shape(burst, dark)
        mean_time = started + timedelta(seconds=burst.duration_s / 2)
        pressure = housekeeping.pressure_hpa or self.pressure_hpa
        geo = self.geometry(mean_time, plan_date, pressure)
        return MeasurementRecord(
            time_utc=mean_time, plan_date=plan_date.isoformat(), session=target.session,
            target_airmass=target.airmass, status="ok", failure=None,
            apparent_zenith_deg=geo.apparent_zenith_deg, azimuth_deg=geo.azimuth_deg,
            airmass=geo.airmass, ozone_airmass=geo.ozone_airmass,
            earth_sun_factor=geo.earth_sun_factor, pressure_hpa=pressure,
            pointing_error_deg=after.error_deg, locked=after.locked,
            duration_s=burst.duration_s, channels=self._channel_names(),
            sun=burst.samples, dark=dark.samples, saturated=burst.saturated,
            housekeeping=housekeeping,
        )

    def _plausible(self, hk: Housekeeping) -> Housekeeping:
        """Housekeeping with implausible values replaced by unknown (NaN, or None for
        the pressure), each replacement recorded as an event."""
        bad = {}
        for name, (lo, hi) in PLAUSIBLE_HOUSEKEEPING.items():
            value = getattr(hk, name)
            if value is not None and not (math.isfinite(value) and lo <= value <= hi):
                bad[name] = value
        if not bad:
            return hk
        what = ", ".join(f"{k} {v!r}" for k, v in bad.items())
        self.event("warning", "housekeeping_implausible",
                   f"housekeeping out of range, stored as unknown: {what}", bad)
        fixes = {k: (None if k == "pressure_hpa" else math.nan) for k in bad}
        return dataclasses.replace(hk, **fixes)

    def _channel_names(self) -> tuple[str, ...]:
        return tuple(ch.name for ch in self.config.channels)

    def _check_shape(self, burst: Burst, dark: Burst) -> None:
        n = len(self.config.channels)
        for name, b in (("burst", burst), ("dark", dark)):
            for row in b.samples:
                if len(row) != n:
                    raise DeviceError(f"{name} has {len(row)} channels but the configuration "
                                      f"lists {n}; check instrument.channels")

    def _failed_record(self, target: PlannedTarget, plan_date: date,
                       why: str) -> MeasurementRecord:
        now = self.clock.now()
        try:
            geo = self.geometry(now, plan_date, self.pressure_hpa)
        except Exception as exc:  # the failure must still be stored, without geometry
            log.error("no geometry for the failed measurement: %s", exc)
            geo = _NO_GEOMETRY
        return MeasurementRecord(
            time_utc=now, plan_date=plan_date.isoformat(), session=target.session,
            target_airmass=target.airmass, status="failed", failure=why,
            apparent_zenith_deg=geo.apparent_zenith_deg, azimuth_deg=geo.azimuth_deg,
            airmass=geo.airmass, ozone_airmass=geo.ozone_airmass,
            earth_sun_factor=geo.earth_sun_factor, pressure_hpa=self.pressure_hpa,
            pointing_error_deg=None, locked=False, duration_s=0.0,
            channels=self._channel_names(), sun=(), dark=(), saturated=(),
            housekeeping=None,
        )

    # ------------------------------------------------------------------ sessions

    def fit_session(self, plan_date: date, session: str, strict: bool = False) -> list[dict]:
        """Fit a finished session from the store and store the result.

        A store that refuses the write is logged; with ``strict`` the error is raised
        as well, for a caller that tries again later (the service)."""
        try:
            rows = self.fitter(plan_date, session, self.clock.now())
        except (*STORE_ERRORS, ChildFailed) as exc:
            if strict:
                raise
            self.event("error", "store_error" if isinstance(exc, STORE_ERRORS) else
                       "job_error", f"{plan_date} {session}: fit not stored: {exc}")
            return []
        accepted = sum(1 for r in rows if r["accepted"])
        self.event("info", "session_fit",
                   f"{plan_date} {session}: {accepted}/{len(rows)} channels accepted",
                   {"date": plan_date.isoformat(), "session": session})
        return rows

    def _fit_here(self, plan_date: date, session: str, now: datetime) -> list[dict[str, Any]]:
        from daemon.station.fitting import fit_stored_session

        return fit_stored_session(self.store, self.config, plan_date.isoformat(), session, now)

    def park(self) -> None:
        try:
            self.tracker.follow_sun(False)
            self.tracker.park()
        except (LinkError, DeviceError) as exc:
            self.event("warning", "device_fault", f"parking failed: {exc}")

    def park_once(self, timeout_s: float = 2.0) -> None:
        """The stop path's park: one PARK within about ``timeout_s`` [s], no retry and
        no back-off, so a dead link cannot hold up the exit."""
        try:
            self.tracker.park_once(timeout_s=timeout_s)
        except (LinkError, DeviceError) as exc:
            self.event("warning", "device_fault", f"parking at stop failed: {exc}; "
                       "the tracker was left where it is")


def perform(station: Station, item: PlannedTarget | PlanEvent, day: date,
            fits: dict[str, list[dict]], grace: timedelta = timedelta(minutes=2),
            strict: bool = False) -> object:
    """Carry out one timeline item that is due now: measure, fit or park.

    A target more than ``grace`` late (a restart in mid-session, a stepped clock) is
    recorded as missed instead of measured at the wrong air mass. With ``strict`` a fit
    the store refuses raises (one of :data:`STORE_ERRORS`) for the caller to retry.
    """
    late = station.clock.now() - item.time_utc
    if isinstance(item, PlannedTarget):
        if late > grace:
            station.event("warning", "missed_target",
                          f"{item.session} target m={item.airmass:g} planned for "
                          f"{item.time_utc:%H:%M:%S} UTC missed by {late}")
            return None
        return station.measure(item, day)
    if item.kind in ("fit_am", "fit_pm"):
        session = item.kind[-2:]
        fits[session] = station.fit_session(day, session, strict=strict)
        return fits[session]
    if item.kind == "park":
        station.park()
    return None


def run_day(station: Station, day: date, plan: Plan | None = None,
            on_step=None, stop=lambda: False) -> dict[str, list[dict]]:
    """Walk one day's plan with ``station.clock``; return the session fits by session.
    The plan and the day's sun table are computed here (with the science) and stored,
    as the service's child does; a given ``plan`` is stored with the day's sun table."""
    from daemon.station.jobs import compute_plan, store_plan

    out = compute_plan(station.config, day, plan)
    plan = plan or Plan.from_dict(out["plan"])
    store_plan(station.store, day, out, station.clock.now())
    station.use_sun_table(day, SunTable.from_dict(out["sun_table"]))
    fits: dict[str, list[dict]] = {}
    for item in plan.timeline():
        station.clock.sleep_until(item.time_utc)
        if stop():
            break
        outcome = perform(station, item, day, fits)
        if on_step and isinstance(outcome, TargetOutcome):
            on_step(outcome)
        station.store.heartbeat(station.clock.now())
    return fits


#: The geometry of a failed measurement whose time no sun table covers and whose
#: fallback failed too: unknown, stored as NULL.
_NO_GEOMETRY = Geometry(time_utc=datetime.fromtimestamp(0, UTC), apparent_zenith_deg=math.nan,
                        azimuth_deg=math.nan, apparent_elevation_deg=math.nan,
                        airmass=math.nan, ozone_airmass=math.nan,
                        earth_sun_factor=math.nan, distance_au=math.nan,
                        pressure_hpa=math.nan)


def open_devices(config: Config) -> tuple[Radiometer, Tracker]:
    """The configured drivers on the configured ports (opened lazily, on first use)."""
    from drivers import registry

    r, t = config.radiometer, config.tracker
    return (registry.open_radiometer(r.driver, r.url, r.baudrate, r.timeout_s, r.retries,
                                     r.options),
            registry.open_tracker(t.driver, t.url, t.baudrate, t.timeout_s, t.retries,
                                  t.options))


def local_midnight_utc(config: Config, day: date) -> datetime:
    """The start of ``day`` at the site, in UTC."""
    return datetime(day.year, day.month, day.day, tzinfo=config.tz).astimezone(UTC)
