"""``heliotroped``: the long-running service.

APScheduler (3.x, BlockingScheduler in UTC) is only the alarm clock here: each item
of the day's plan becomes a one-shot job that calls the same
:func:`daemon.station.acquisition.perform` the simulated day uses. All jobs run on one worker
thread, so two targets never fight over the serial ports, and the once-a-minute
``tick`` (heartbeat, systemd watchdog, clock-step check) runs on that same worker: a
worker stuck in a hung call stops the watchdog pings and systemd restarts the service.

The resident process stays small (no pvlib, numpy, scipy or pandas): the day's plan
and the session fits run in short-lived child processes (:mod:`daemon.station.jobs`)
that write into the store; the service reads the stored plan and sun table back and
schedules from them. Tests pass no ``children`` and plan and fit in this process.

Exit codes: 0 stopped by a signal; 74 the store cannot be opened safely (it is left
untouched); 78 bad configuration.
"""

from __future__ import annotations

import argparse
import logging
import os
import signal
import socket
import sys
import threading
from collections.abc import Callable
from datetime import UTC, date, datetime, timedelta
from typing import TYPE_CHECKING

from daemon.config.settings import EX_CONFIG, Config, ConfigError, load_config

if TYPE_CHECKING:
    from drivers.interfaces import Radiometer, Tracker

log = logging.getLogger("heliotroped")

EX_IOERR = 74
MISFIRE_GRACE_S = 120  # a target more than 2 min late is a different air mass: skip it
TICK_S = 60
CLOCK_STEP_S = 60  # a wall-clock step larger than this re-plans the day
# The stop budget, under 5 s whatever the links do: the job in progress gets
# STOP_WAIT_S, then one PARK gets PARK_ONCE_S, then each link SHUTDOWN_S.
STOP_WAIT_S = 2.0  # how long shutdown waits for the job in progress [s]
PARK_ONCE_S = 2.0  # one PARK without retry or back-off [s]
SHUTDOWN_S = 1.0  # per device, to end an exchange another thread is stuck in [s]
RETRY_S = 300  # a job whose store write failed (full disk, read-only) runs again [s]
#: A fit whose child keeps failing (a fault in the science, not the disk) is tried again
#: after RETRY_S, then twice as long each time up to this [s]: never given up, but a
#: few events a day rather than one every five minutes for weeks.
FIT_RETRY_MAX_S = 6 * 3600
# The store's full integrity check runs after READY and then once a day, in a thread of
# its own at the lowest CPU priority, beside acquisition (its cost grows with the store).
STORE_CHECK_EVERY_H = 24
STORE_CHECK_NICE = 19
MIGRATION_WAIT_S = 3600  # the start-up allowance systemd grants a schema upgrade [s]
CHECK_STOP_S = 0.5  # how long the stop path waits for a cancelled store check [s]


def sd_notify(message: str) -> None:
    """Send state lines to systemd (no-op outside a Type=notify unit)."""
    address = os.environ.get("NOTIFY_SOCKET")
    if not address:
        return
    if address.startswith("@"):
        address = "\0" + address[1:]
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
            sock.sendto(message.encode(), address)
    except OSError as exc:
        log.debug("sd_notify failed: %s", exc)


class Service:
    """The scheduler adapter. ``scheduler`` and ``clock`` are injectable for tests."""

    def __init__(self, config: Config, store, radiometer, tracker, clock=None,
                 scheduler=None, children=None):
        """``children`` (a :class:`daemon.station.jobs.ChildJobs`, or anything with its
        ``plan``, ``fit``, ``sun_table`` and ``cancel``) plans and fits in child
        processes; without it both run in this process (the tests' seam)."""
        from apscheduler.events import EVENT_JOB_ERROR, EVENT_JOB_MISSED
        from apscheduler.executors.pool import ThreadPoolExecutor
        from apscheduler.schedulers.blocking import BlockingScheduler

        from daemon.station.acquisition import Station
        from daemon.station.clock import RealClock, StepDetector

        self.clock = clock or RealClock()
        self.children = children
        self.station = Station(config, radiometer, tracker, store, self.clock)
        if children is not None:
            self.station.fitter = self._fit_in_child
            self.station.sun_fallback = children.sun_table
        self.steps = StepDetector(self.clock, CLOCK_STEP_S)
        self.fits: dict[str, list[dict]] = {}
        self.done: set[tuple] = set()
        self._child_failures: dict[tuple, int] = {}  # (day, item) -> failed fit children
        self.day: date | None = None
        self.last_result = "no session fitted yet"
        self._idle = threading.Event()
        self._idle.set()
        self._check_thread: threading.Thread | None = None
        self.scheduler = scheduler or BlockingScheduler(
            timezone=UTC,
            executors={"default": ThreadPoolExecutor(max_workers=1)},
            # Each job says its own grace; coalesce so a backlog after a stall runs once.
            job_defaults={"misfire_grace_time": MISFIRE_GRACE_S, "coalesce": True,
                          "max_instances": 1},
        )
        self.scheduler.add_listener(self._on_job_event, EVENT_JOB_ERROR | EVENT_JOB_MISSED)

    # ------------------------------------------------------------------ planning

    def local_today(self) -> date:
        return self.clock.now().astimezone(self.station.config.tz).date()

    def schedule_day(self, day: date) -> None:
        """Plan ``day`` (in a child, or here without ``children``), read the stored plan
        and sun table back and turn every item still ahead into a job.

        Raises :class:`daemon.station.jobs.ChildFailed` when the child fails or what is
        stored was computed from another configuration (its SHA-256 differs)."""
        from daemon.science.suntable import SunTable
        from daemon.station.jobs import ChildFailed, plan_and_store
        from daemon.station.plans import Plan

        now = self.clock.now()
        if self.children is not None:
            out = self.children.plan(day, now)
        else:
            out = plan_and_store(self.station.config, self.station.store, day, now)
        own = self.station.config_sha256
        if out["config_sha256"] != own:
            raise ChildFailed(f"the plan for {day} was computed from another configuration "
                              f"(SHA-256 {str(out['config_sha256'])[:12]}, ours {own[:12]}); "
                              "not used")
        if out["stored"]:
            plan_dict, table = self._stored_plan(day)
        else:
            plan_dict, table = out["plan"], out["sun_table"]
        try:
            plan, sun = Plan.from_dict(plan_dict), SunTable.from_dict(table)
        except ValueError as exc:
            raise ChildFailed(f"the plan for {day}: {exc}") from None
        self.station.use_sun_table(day, sun)
        # The targets do not need the stored plan: schedule them even when it cannot be
        # written, and keep trying to store it, so a full disk costs no day.
        self.schedule_plan(plan, day)
        if not out["stored"]:
            self._retry_later(f"save-plan-{day}", f"plan for {day} not stored",
                              out["store_error"], self._store_plan, day, out)

    def _stored_plan(self, day: date) -> tuple[dict, dict]:
        """The plan and sun table of ``day`` as stored, both for our configuration."""
        from daemon.station.jobs import ChildFailed

        store, own = self.station.store, self.station.config_sha256
        plan, table = store.stored_plan(day), store.sun_table(day)
        if plan is None or table is None:
            raise ChildFailed(f"the plan for {day} was reported stored but is not in the "
                              "store")
        if plan[0] != own or table[0] != own:
            raise ChildFailed(f"the stored plan for {day} was computed from another "
                              "configuration (its SHA-256 is not ours); not used")
        return plan[1], table[1]

    def _store_plan(self, day: date, out: dict) -> None:
        from daemon.station.jobs import store_plan

        store_plan(self.station.store, day, out, self.clock.now())

    def _fit_in_child(self, day: date, session: str, now: datetime) -> list[dict]:
        """The station's fitter with ``children``: the child fits and stores; the rows
        are read back from the store."""
        self.children.fit(day, session, now)
        return self.station.store.session_results(day, session)

    def again_later(self, job_id: str, func: Callable[..., object], *args: object,
                    delay_s: float = RETRY_S) -> datetime:
        """Run ``func(*args)`` again in ``delay_s`` (RETRY_S) as the one-shot job
        ``job_id`` (replacing an earlier retry of the same job); return when. Every job
        that must not be lost to a failing write or a silent device comes back through
        here."""
        when = self.clock.now() + timedelta(seconds=delay_s)
        self.scheduler.add_job(func, "date", run_date=when, args=list(args), id=job_id,
                               replace_existing=True, misfire_grace_time=None)
        return when

    def guarded(self, job_id: str, what: str, func: Callable[..., object], *args: object) -> bool:
        """Run ``func(*args)``; when the store refuses the write (a full disk, a
        read-only file system), log it, store an event if the store takes it, and run
        the same call again in RETRY_S as job ``retry-<job_id>``, until it succeeds.

        Returns True when ``func`` succeeded."""
        from daemon.station.acquisition import STORE_ERRORS

        try:
            func(*args)
        except STORE_ERRORS as exc:
            self._retry_later(job_id, what, exc, func, *args)
            return False
        return True

    def _retry_later(self, job_id: str, what: str, why: object,
                     func: Callable[..., object], *args: object) -> None:
        """A refused write: an event, and ``guarded(func, *args)`` again in RETRY_S."""
        when = self.again_later(f"retry-{job_id}", self.guarded, job_id, what, func, *args)
        self.station.event("error", "store_error",
                           f"{what}: {why}; trying again at {when:%H:%M:%S} UTC",
                           {"job": job_id})

    def schedule_plan(self, plan, day: date) -> None:
        """Jobs for the items of ``plan`` that are still ahead. Items already past (a
        restart or a clock step in mid-session) are recorded as missed targets; items
        already carried out are not repeated."""
        from daemon.station.plans import PlannedTarget

        for job in self.scheduler.get_jobs():
            if job.id.startswith("plan-"):
                job.remove()
        if day != self.day:
            self.fits, self.done, self.day = {}, set(), day
            self._child_failures = {}
        now = self.clock.now()
        missed = 0
        for i, item in enumerate(plan.timeline()):
            # Plan items are frozen values and the plan a pure function of (config, day),
            # so a re-plan of the same day yields equal items: done ones are not repeated.
            key = (day, item)
            if key in self.done:
                continue
            if item.time_utc < now - timedelta(seconds=MISFIRE_GRACE_S):
                self.done.add(key)
                if isinstance(item, PlannedTarget):
                    missed += 1
                    self.station.event("warning", "missed_target",
                                       f"{item.session} target m={item.airmass:g} at "
                                       f"{item.time_utc:%H:%M:%S} UTC passed before it "
                                       "could be measured")
                continue
            self.scheduler.add_job(self.run_item, "date", run_date=item.time_utc,
                                   args=[item, day], id=f"plan-{day}-{i}",
                                   misfire_grace_time=MISFIRE_GRACE_S)
        ends = [e.time_utc for e in plan.events if e.kind in ("park", "replan")]
        next_plan = max(ends) if ends else datetime(
            day.year, day.month, day.day, tzinfo=self.station.config.tz) + timedelta(days=1)
        self.scheduler.add_job(self.plan_next, "date",
                               run_date=max(next_plan, now) + timedelta(seconds=1),
                               args=[day + timedelta(days=1)], id=f"plan-next-{day}",
                               misfire_grace_time=None)
        upcoming = len([t for t in plan.targets if t.time_utc >= now])
        self.station.event("info", "plan",
                           f"plan for {day}: {len(plan.targets)} targets, {upcoming} ahead, "
                           f"{missed} missed", {"date": day.isoformat()})
        self._status()

    def plan_next(self, day: date) -> None:
        """The job that plans the next day. Planning itself never stops the service:
        whatever goes wrong, the job comes back in RETRY_S, so a day always lies ahead."""
        try:
            self.schedule_day(day)
        except Exception as exc:  # without this job no day would ever be planned again
            log.exception("planning %s failed", day)
            when = self.again_later(f"plan-next-retry-{day}", self.plan_next, day)
            self.station.event("error", "job_error",
                               f"planning {day} failed: {exc!r}; no target is scheduled; "
                               f"trying again at {when:%H:%M:%S} UTC")

    # ------------------------------------------------------------------ jobs

    def run_item(self, item, day: date) -> None:
        """One plan item on the worker thread; nothing it raises stops the service."""
        from daemon.station.acquisition import STORE_ERRORS, perform
        from daemon.station.jobs import ChildFailed, StoreRefused

        key = (day, item)
        if key in self.done or self.station.stopping.is_set():
            return
        self.done.add(key)
        self._idle.clear()
        try:
            result = perform(self.station, item, day, self.fits, strict=True)
        except (*STORE_ERRORS, ChildFailed) as exc:
            # A fit whose results could not be written, or whose child failed: the same
            # item again later (a target never gets here: its air mass would be gone).
            self.done.discard(key)
            delay = RETRY_S
            if isinstance(exc, ChildFailed) and not isinstance(exc, StoreRefused):
                failures = self._child_failures.get(key, 0)
                self._child_failures[key] = failures + 1
                delay = min(RETRY_S * 2 ** min(failures, 16), FIT_RETRY_MAX_S)
            when = self.again_later(f"retry-{day}-{item.kind}", self.run_item, item, day,
                                    delay_s=delay)
            kind = "job_error" if isinstance(exc, ChildFailed) else "store_error"
            self.station.event("error", kind,
                               f"{_describe(item)} not stored: {exc}; trying again at "
                               f"{when:%H:%M:%S} UTC")
            return
        except Exception as exc:  # the service must outlive any one item
            log.exception("plan item failed")
            self.station.event("error", "job_error", f"{_describe(item)} failed: {exc!r}")
            return
        finally:
            self._idle.set()
        if isinstance(result, list):
            accepted = sum(1 for r in result if r["accepted"])
            self.last_result = (f"{day} {item.kind[-2:]}: {accepted}/{len(result)} "
                                "channels accepted")
        self._heartbeat()
        self._status()

    def tick(self) -> None:
        """Every minute, on the worker: watchdog, heartbeat, clock-step check."""
        sd_notify("WATCHDOG=1")
        self._heartbeat()
        step = self.steps.check()
        if step is not None:
            self.station.event("warning", "clock_step",
                               f"wall clock stepped {step:+.0f} s; re-planning",
                               {"step_s": step})
            self.plan_next(self.local_today())
        # A stopped scheduler lists no jobs (APScheduler 3: only those added before it
        # started), so a tick that runs while the service stops would cry wolf.
        if not self.station.stopping.is_set() and not self._jobs_ahead():
            log.error("no job ahead: nothing is scheduled to plan another day; "
                      "restart the service (systemctl restart heliotroped)")

    def _jobs_ahead(self) -> bool:
        return any(j.id.startswith("plan-next") for j in self.scheduler.get_jobs())

    def _heartbeat(self) -> None:
        from daemon.station.acquisition import STORE_ERRORS

        try:
            self.station.store.heartbeat(self.clock.now())
        except STORE_ERRORS as exc:
            log.error("heartbeat not stored: %s", exc)

    def _status(self) -> None:
        nxt = [j for j in self.scheduler.get_jobs()
               if j.id.startswith("plan-") and j.args and hasattr(j.args[0], "airmass")]
        when = min(nxt, key=lambda j: j.args[0].time_utc).args[0] if nxt else None
        head = (f"next {when.session} m={when.airmass:g} at {when.time_utc:%H:%M} UTC"
                if when else "no target ahead")
        sd_notify(f"STATUS={head}; last: {self.last_result}")

    def _on_job_event(self, event) -> None:
        if getattr(event, "exception", None) is not None:
            self.station.event("error", "job_error",
                               f"job {event.job_id} failed: {event.exception!r}")
        else:
            self.station.event("warning", "missed_target",
                               f"job {event.job_id} missed its time "
                               f"{event.scheduled_run_time:%Y-%m-%d %H:%M:%S} UTC")

    # ------------------------------------------------------------------ store check

    def start_store_check(self) -> threading.Thread:
        """Start the full integrity check of the store in a background thread and
        return it; its outcome is a ``store_check`` event (``status`` reports it)."""
        thread = threading.Thread(target=self.check_store, name="store-check", daemon=True)
        thread.start()
        self._check_thread = thread
        return thread

    def check_store(self) -> None:
        """``PRAGMA quick_check`` on a read-only connection of its own, at nice
        STORE_CHECK_NICE: the writer goes on beside it (WAL mode). A damaged store is an
        error event and acquisition goes on (stopping would lose the targets, and the
        data already stored stays as it is)."""
        import time

        from daemon.store.writer import StoreError, integrity_problems

        try:  # Linux: a thread's own nice value (the others keep theirs)
            os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), STORE_CHECK_NICE)
        except (OSError, AttributeError) as exc:
            log.debug("store check at normal priority: %s", exc)
        t0 = time.monotonic()
        stopping = self.station.stopping
        try:
            problems = integrity_problems(self.station.store.path, cancel=stopping)
        except StoreError as exc:
            problems = [str(exc)]
        except Exception as exc:  # the check must never stop the service
            log.exception("store check failed")
            problems = [f"the check itself failed: {exc!r}"]
        took = time.monotonic() - t0
        if stopping.is_set():  # cut short by the stop: no verdict, the next start checks
            return
        if problems:
            self.station.event("error", "store_check",
                               f"store integrity check failed ({'; '.join(problems[:3])}); "
                               "acquisition goes on. At the next visit: stop the service, "
                               "copy the store aside and recover it with the sqlite3 "
                               "shell's .recover", {"ok": False, "seconds": round(took, 1),
                                                     "problems": problems})
        else:
            self.station.event("info", "store_check",
                               f"store integrity check passed in {took:.1f} s",
                               {"ok": True, "seconds": round(took, 1)})

    # ------------------------------------------------------------------ life cycle

    def stop(self, *_args) -> None:
        """Stop taking jobs, interrupt waits, let ``run`` clean up. Idempotent.

        Called from an ordinary thread, never from a signal handler: stopping the
        scheduler takes locks that the interrupted main thread may be holding."""
        self.station.stopping.set()
        self.clock.wake()
        if self.children is not None:  # a plan or fit in progress: killed, not awaited
            self.children.cancel()
        if self.scheduler.running:
            self.scheduler.shutdown(wait=False)

    def identify_devices(self, names: tuple[str, ...] = ("radiometer", "tracker")) -> None:
        """Ask each device who it is. Any driver error (no answer, a garbled or hostile
        reply, a ValueError from a field no codec should have let through) counts as a
        device that did not answer: logged, and asked again in RETRY_S, so a hostile
        device never drives the service into a restart loop."""
        devices = {"radiometer": self.station.radiometer, "tracker": self.station.tracker}
        silent = []
        for name in names:
            try:
                ident = devices[name].identify()
                self.station.event("info", "device", f"{name}: {ident.model} serial "
                                   f"{ident.serial} firmware {ident.firmware}")
            except Exception as exc:  # a device must never stop the service
                log.debug("%s identify failed", name, exc_info=True)
                silent.append(name)
                self.station.event("error", "device_fault",
                                   f"{name} does not answer: {type(exc).__name__}: {exc}; "
                                   f"asking again in {RETRY_S} s, acquisition retries at "
                                   "every target")
        if silent and not self.station.stopping.is_set():
            self.again_later("identify", self.identify_devices, tuple(silent))

    def run(self) -> None:
        self.station.event("info", "start", "service started")
        self.identify_devices()
        self.plan_next(self.local_today())
        self.scheduler.add_job(self.tick, "interval", seconds=TICK_S, id="tick",
                               next_run_time=self.clock.now(), misfire_grace_time=None,
                               coalesce=True)
        sd_notify("READY=1")
        self.scheduler.add_job(self.start_store_check, "interval", hours=STORE_CHECK_EVERY_H,
                               id="store-check", next_run_time=self.clock.now(),
                               misfire_grace_time=None, coalesce=True)
        if not self.station.stopping.is_set():
            self.scheduler.start()  # blocks until stop()
        sd_notify("STOPPING=1")
        self.finish()

    def finish(self) -> None:
        """The stop path: bounded whatever the links do (see STOP_WAIT_S)."""
        if self._drain():
            self.station.park_once(PARK_ONCE_S)
        else:  # two threads on one serial line would garble both: leave the tracker
            self.station.event("warning", "not_parked", "tracker not parked: a "
                               f"measurement was still running after {STOP_WAIT_S:g} s")
        if self._check_thread is not None:  # cancelled by `stopping`: ends within ms
            self._check_thread.join(CHECK_STOP_S)
        self.station.event("info", "stop", "service stopped")

    def _drain(self) -> bool:
        """Wait briefly for the job in progress (it gives up at its next step); True
        when the worker is idle and the devices are free."""
        return self._idle.wait(STOP_WAIT_S)


def _describe(item) -> str:
    if hasattr(item, "airmass"):
        return f"{item.session} target m={item.airmass:g}"
    return f"{item.kind} at {item.time_utc:%H:%M:%S} UTC"


STOP_SIGNALS = {signal.SIGTERM, signal.SIGINT}


def _stop_on_signal(service: Service, finished: threading.Event) -> None:
    """Wait for SIGTERM or SIGINT in this thread (they are blocked everywhere else) and
    stop the service; repeat until ``run`` has returned, in case the scheduler was still
    starting when the signal came."""
    signal.sigwait(STOP_SIGNALS)
    log.info("stop requested by signal")
    while True:
        service.stop()
        if finished.wait(0.5):
            return


def configure_logging(level: str) -> None:
    """Log to standard error (the journal under systemd) at ``level``.

    The scheduler library (APScheduler) logs every job it adds and runs at INFO, which
    buries our own lines (83 of its lines around our 4 in a day); its loggers are kept
    at WARNING, or at ``level`` if that is stricter, unless ``level`` is DEBUG.

    Parameters
    ----------
    level : str
        'DEBUG', 'INFO', 'WARNING' or 'ERROR'.
    """
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s")
    numeric = logging.getLevelName(level)
    scheduler_level = numeric if numeric == logging.DEBUG else max(numeric, logging.WARNING)
    logging.getLogger("apscheduler").setLevel(scheduler_level)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="heliotroped",
                                description="heliotrope acquisition service (systemd starts it)")
    p.add_argument("--config", default=os.environ.get("HELIOTROPE_CONFIG",
                                                      "/etc/heliotrope/heliotrope.yaml"))
    p.add_argument("--log-level", default="INFO",
                   choices=["DEBUG", "INFO", "WARNING", "ERROR"],
                   help="our own loggers' level (default: %(default)s); the scheduler "
                   "library's loggers stay at WARNING unless DEBUG")
    args = p.parse_args(argv)
    # Signals are taken synchronously by one thread (see _stop_on_signal); threads
    # started from here on inherit the mask.
    signal.pthread_sigmask(signal.SIG_BLOCK, STOP_SIGNALS)
    configure_logging(args.log_level)
    try:
        config = load_config(args.config)
    except ConfigError as exc:
        print(f"heliotroped: {exc}", file=sys.stderr)
        return EX_CONFIG

    import_writer_without_type_maps()
    from daemon.station.acquisition import open_devices
    from daemon.station.jobs import ChildJobs
    from daemon.store.reader import software_version
    from daemon.store.writer import Store, StoreError

    try:
        # The header and schema only: the full check's cost grows with the store, so it
        # runs after READY (see check_store).
        store = Store.open(config.store_path, full_check=False, on_migrate=_migrating)
        # Provenance: every result from now on points to the text this start runs with.
        store.record_configuration(config.text, config.source, software_version(),
                                   datetime.now(UTC))
    except StoreError as exc:
        print(f"heliotroped: {exc}", file=sys.stderr)
        return EX_IOERR
    radiometer, tracker = open_devices(config)
    service = Service(config, store, radiometer, tracker,
                      children=ChildJobs(config, str(store.path)))
    finished = threading.Event()
    threading.Thread(target=_stop_on_signal, args=(service, finished), daemon=True,
                     name="signals").start()
    try:
        service.run()
    finally:
        finished.set()
        release_devices(radiometer, tracker)
        store.close()
    return 0


#: What sqlite-utils imports at import time only for its optional column-type maps.
OPTIONAL_TYPE_MAP_MODULES = ("pandas", "numpy")


def import_writer_without_type_maps() -> None:
    """Import the store's writer (and sqlite-utils) without pandas and numpy.

    sqlite-utils 4 imports pandas and numpy at import time, when they are installed
    (pvlib installs them), only to add their scalar types to the map it uses to choose
    a column type when it creates a table from values (``sqlite_utils.db``,
    ``COLUMN_TYPE_MAPPING``); that costs the resident service about 50 MB. Our schema
    is created by the migrations with Python types and the service writes Python
    numbers, so the map is not needed here. The modules are marked absent
    (``sys.modules[name] = None`` makes ``import`` raise ImportError, which sqlite-utils
    catches) only while the writer is imported, then unmarked, so that a later import
    of them still works. Tested by tests/test_resident_memory.py.
    """
    marked = [m for m in OPTIONAL_TYPE_MAP_MODULES if m not in sys.modules]
    for name in marked:
        sys.modules[name] = None  # type: ignore[assignment]
    try:
        import daemon.store.writer  # noqa: F401
    finally:
        for name in marked:
            if sys.modules.get(name, 0) is None:
                del sys.modules[name]


def _migrating(names: list[str]) -> None:
    """Before schema changes: they build indexes over the whole store, which can take
    longer than the unit's TimeoutStartSec on a store of years on an SD card; ask
    systemd for MIGRATION_WAIT_S more (sd_notify(3), EXTEND_TIMEOUT_USEC) so a restart
    never cuts an upgrade short and loops."""
    log.info("updating the store's schema (%s); this may take a while on a large store",
             ", ".join(names))
    sd_notify(f"EXTEND_TIMEOUT_USEC={MIGRATION_WAIT_S * 1_000_000}")


def release_devices(radiometer: Radiometer, tracker: Tracker) -> None:
    """Shut both links within SHUTDOWN_S each, ending any exchange still in progress
    in the worker (so the interpreter's exit does not wait for its retries)."""
    for device in (radiometer, tracker):
        try:
            device.shutdown(timeout_s=SHUTDOWN_S)
        except Exception as exc:  # the other link and the store must still close
            log.error("closing %s: %s", type(device).__name__, exc)


if __name__ == "__main__":
    sys.exit(main())
