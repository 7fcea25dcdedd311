"""The day's plan and the session fits in short-lived child processes.

The resident service (``heliotroped``) keeps pvlib, numpy, scipy and pandas out of its
own process: they are needed only to plan a day and to fit a session, twice or three
times a day, and they would hold some 100 MB for the rest of it. Each of those steps
runs here instead, in a fresh interpreter::

    python -m daemon.station.jobs plan --store PATH --date YYYY-MM-DD --now ISO
    python -m daemon.station.jobs fit --store PATH --date YYYY-MM-DD --session am --now ISO
    python -m daemon.station.jobs sun --time ISO

The configuration text comes on standard input (``--source`` names its file, for
messages and relative paths), so the child works from exactly the configuration the
service runs with, whatever happened to the file since. ``plan`` stores the plan and
the day's sun table with that text's SHA-256 and prints a one-line JSON summary;
``fit`` runs :func:`daemon.station.fitting.fit_stored_session`, which stores the
results, and prints the accepted count; ``sun`` prints a short sun table around one
instant (the fallback for a burst outside the stored table) and writes nothing.

Exit codes: 0 done; 75 the store refused the write (``plan`` still prints the plan, so
the service schedules it and stores it later); 78 bad configuration; 1 anything else,
with the traceback on standard error (the service relays it to the journal).

The parent's side is :class:`ChildJobs`: it bounds each child's wall time, kills it past
the bound or when the service stops, and raises :class:`ChildFailed` for anything but
success; the service turns that into an event and tries again in ``RETRY_S``.
"""

from __future__ import annotations

import argparse
import json
import logging
import signal
import subprocess
import sys
import threading
from collections.abc import Sequence
from datetime import UTC, date, datetime
from typing import Any

from daemon.config.settings import EX_CONFIG, Config, ConfigError, config_from_text

log = logging.getLogger(__name__)

EX_TEMPFAIL = 75  # sysexits.h: the store refused the write; try again later
#: Wall-time bounds of the children [s]: a plan takes about 3 s and a fit 2-5 s on the
#: development machine (most of it importing pvlib and numpy); ten times that leaves
#: room for a slow board and stays far inside the unit's WatchdogSec (600 s).
PLAN_TIMEOUT_S = 60.0
FIT_TIMEOUT_S = 120.0
SUN_TIMEOUT_S = 60.0
#: Half-width of the fallback sun table around one instant [s].
SUN_FALLBACK_HALF_S = 300.0
_STDERR_LINES = 40  # at most this much of a failing child's standard error is relayed


class ChildFailed(Exception):
    """A child process failed, crashed, timed out or printed nonsense; the message says
    which and what it wrote last."""


class StoreRefused(ChildFailed):
    """The child's store write was refused (a full disk, a read-only file system)."""


# --------------------------------------------------------------------------- the work

def plan_and_store(config: Config, store, day: date, now: datetime) -> dict[str, Any]:
    """Plan ``day``, compute its sun table, store both with the configuration's SHA-256
    and return ``{"config_sha256", "plan", "sun_table", "stored", "store_error"}``.

    The one planning path: the child runs it, and so does the service's in-process
    planner (tests). A store that refuses the write leaves ``stored`` False and the
    reason in ``store_error``; the caller stores the returned plan later.
    """
    from daemon.store.writer import STORE_ERRORS

    out = compute_plan(config, day)
    try:
        store_plan(store, day, out, now)
        out["stored"] = True
    except STORE_ERRORS as exc:
        out["store_error"] = str(exc)
    return out


def compute_plan(config: Config, day: date, plan=None) -> dict[str, Any]:
    """The plan of ``day`` (``plan`` when given, a :class:`~daemon.station.plans.Plan`)
    and its sun table, as :func:`plan_and_store` returns them (not yet stored)."""
    from daemon.station.planner import plan_day, plan_sun_table
    from daemon.store.writer import config_digest

    return {"config_sha256": config_digest(config.text),
            "plan": (plan or plan_day(config, day)).to_dict(),
            "sun_table": plan_sun_table(config, day).to_dict(),
            "stored": False, "store_error": None}


def store_plan(store, day: date, out: dict[str, Any], now: datetime) -> None:
    """Store the plan and sun table of :func:`compute_plan` in one transaction."""
    store.save_plan(day, out["plan"], now, out["config_sha256"], out["sun_table"])


def sun_table_around(config: Config, when: datetime) -> dict[str, Any]:
    """A sun table from ``SUN_FALLBACK_HALF_S`` before ``when`` to as long after, every
    node kept (the instant may lie at night: a failed measurement's)."""
    from daemon.science.solar import delta_t_estimate_s, sun_table

    u = when.timestamp()
    table = sun_table(config.site, u - SUN_FALLBACK_HALF_S, u + SUN_FALLBACK_HALF_S,
                      delta_t_estimate_s(when.year, when.month), cover_zenith_deg=180.0)
    return table.to_dict()


# --------------------------------------------------------------------------- the child

def main(argv: Sequence[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m daemon.station.jobs",
                                description="heliotroped's child processes (it starts them; "
                                "the configuration text comes on standard input)")
    p.add_argument("job", choices=("plan", "fit", "sun"))
    p.add_argument("--source", default="<stdin>", help="the configuration file's path")
    p.add_argument("--store", help="the store's path (plan, fit)")
    p.add_argument("--date", type=date.fromisoformat, help="the plan date (plan, fit)")
    p.add_argument("--session", choices=("am", "pm"), help="the session (fit)")
    p.add_argument("--now", type=_aware, help="the service clock's time (plan, fit)")
    p.add_argument("--time", type=_aware, help="the instant (sun)")
    args = p.parse_args(argv)
    # heliotroped blocks SIGTERM and SIGINT in all its threads (one thread waits for
    # them) and a child inherits that mask: unblock them, so that systemd's stop of the
    # unit's control group ends a child too.
    signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGTERM, signal.SIGINT})
    logging.basicConfig(level="WARNING", format="%(levelname)s %(name)s: %(message)s")
    try:
        config = config_from_text(sys.stdin.read(), args.source)
    except ConfigError as exc:
        print(f"heliotrope child: {exc}", file=sys.stderr)
        return EX_CONFIG
    if args.job == "sun":
        _emit(sun_table_around(config, _need(p, args, "time")))
        return 0

    from daemon.store.reader import software_version
    from daemon.store.writer import STORE_ERRORS, Store

    day, now = _need(p, args, "date"), _need(p, args, "now")
    try:
        store = Store.open(_need(p, args, "store"), full_check=False)
    except STORE_ERRORS as exc:
        print(f"heliotrope child: {exc}", file=sys.stderr)
        return EX_TEMPFAIL
    try:
        if args.job == "plan":
            out = plan_and_store(config, store, day, now)
            _emit(out)
            if not out["stored"]:
                print(f"heliotrope child: plan not stored: {out['store_error']}",
                      file=sys.stderr)
                return EX_TEMPFAIL
            return 0
        from daemon.station.fitting import fit_stored_session

        session = _need(p, args, "session")
        try:
            # The results point to the configuration row the service recorded (the same
            # text, version and origin reuse it).
            store.record_configuration(config.text, config.source, software_version(), now)
            rows = fit_stored_session(store, config, day, session, now)
        except STORE_ERRORS as exc:
            print(f"heliotrope child: {day} {session} fit not stored: {exc}",
                  file=sys.stderr)
            return EX_TEMPFAIL
        _emit({"accepted": sum(1 for r in rows if r["accepted"]), "channels": len(rows)})
        return 0
    finally:
        store.close()


def _aware(text: str) -> datetime:
    t = datetime.fromisoformat(text)
    if t.tzinfo is None:
        raise argparse.ArgumentTypeError(f"{text!r} has no UTC offset")
    return t.astimezone(UTC)


def _need(p: argparse.ArgumentParser, args: argparse.Namespace, name: str) -> Any:
    value = getattr(args, name)
    if value is None:
        p.error(f"the {args.job} job needs --{name}")
    return value


def _emit(out: dict[str, Any]) -> None:
    sys.stdout.write(json.dumps(out, allow_nan=False) + "\n")
    sys.stdout.flush()


# --------------------------------------------------------------------------- the parent

class ChildJobs:
    """The resident service's side: run one child at a time, bounded, and read its
    answer. ``python`` is the interpreter (default: this one)."""

    def __init__(self, config: Config, store_path: str, python: str = sys.executable,
                 plan_timeout_s: float = PLAN_TIMEOUT_S, fit_timeout_s: float = FIT_TIMEOUT_S,
                 sun_timeout_s: float = SUN_TIMEOUT_S) -> None:
        if not config.text.strip():
            raise ValueError("child jobs need the configuration's text (load_config keeps "
                             "it); a configuration built in memory cannot be handed over")
        self.config = config
        self.store_path = str(store_path)
        self.python = python
        self.timeouts = {"plan": plan_timeout_s, "fit": fit_timeout_s, "sun": sun_timeout_s}
        self._lock = threading.Lock()
        self._running: subprocess.Popen | None = None
        self._cancelled = threading.Event()

    def plan(self, day: date, now: datetime) -> dict[str, Any]:
        """Plan ``day`` in a child; the dict of :func:`plan_and_store`. A store that
        refused the plan still returns it (``stored`` False)."""
        out = self._run("plan", ["--store", self.store_path, "--date", day.isoformat(),
                                 "--now", now.isoformat()], f"planning {day}",
                        tempfail_ok=True)
        for key in ("config_sha256", "plan", "sun_table", "stored"):
            if key not in out:
                raise ChildFailed(f"planning {day}: the child's answer lacks {key!r}")
        return out

    def fit(self, day: date, session: str, now: datetime) -> None:
        """Fit one stored session in a child, which stores the results."""
        self._run("fit", ["--store", self.store_path, "--date", day.isoformat(),
                          "--session", session, "--now", now.isoformat()],
                  f"fitting {day} {session}")

    def sun_table(self, when: datetime) -> dict[str, Any]:
        """A sun table around ``when`` from a child (nothing is stored)."""
        return self._run("sun", ["--time", when.isoformat()], f"sun table at {when:%H:%M:%S}")

    def cancel(self) -> None:
        """Kill the child in progress (the service is stopping); later runs fail at once."""
        self._cancelled.set()  # before looking: see _run
        with self._lock:
            proc = self._running
        if proc is not None and proc.poll() is None:
            proc.kill()

    def _run(self, job: str, args: list[str], what: str,
             tempfail_ok: bool = False) -> dict[str, Any]:
        if self._cancelled.is_set():
            raise ChildFailed(f"{what}: the service is stopping")
        cmd = [self.python, "-m", "daemon.station.jobs", job, "--source",
               self.config.source, *args]
        timeout = self.timeouts[job]
        try:
            proc = subprocess.Popen(cmd, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                    stderr=subprocess.PIPE, text=True)
        except OSError as exc:
            raise ChildFailed(f"{what}: cannot start {self.python}: {exc}") from None
        with self._lock:  # cancel() either sees this child or we see its flag
            self._running = proc
            cancelled = self._cancelled.is_set()
        if cancelled:
            proc.kill()
        try:
            out, err = proc.communicate(self.config.text, timeout=timeout)
        except subprocess.TimeoutExpired:
            proc.kill()
            out, err = proc.communicate()
            self._relay(what, err)
            raise ChildFailed(f"{what}: the child did not finish within {timeout:g} s and "
                              "was killed") from None
        finally:
            with self._lock:
                self._running = None
        self._relay(what, err)
        rc = proc.returncode
        if self._cancelled.is_set():
            raise ChildFailed(f"{what}: cancelled, the service is stopping")
        if rc == EX_TEMPFAIL and not tempfail_ok:
            raise StoreRefused(f"{what}: the store refused the write ({_last(err)})")
        if rc not in (0, EX_TEMPFAIL):
            how = (f"was killed by signal {-rc}" if rc < 0 else f"exited with status {rc}")
            raise ChildFailed(f"{what}: the child {how} ({_last(err)})")
        try:
            answer = json.loads(out.strip().splitlines()[-1])
        except (IndexError, ValueError):
            raise ChildFailed(f"{what}: the child printed no answer ({_last(err)})") from None
        if not isinstance(answer, dict):
            raise ChildFailed(f"{what}: the child's answer is not a JSON object")
        return answer

    @staticmethod
    def _relay(what: str, err: str) -> None:
        """The child's standard error, line by line, into our log (the journal)."""
        lines = [line for line in (err or "").splitlines() if line.strip()]
        for line in lines[-_STDERR_LINES:]:
            log.warning("%s: child: %s", what, line)


def _last(err: str) -> str:
    lines = [line.strip() for line in (err or "").splitlines() if line.strip()]
    return lines[-1] if lines else "nothing on standard error"


if __name__ == "__main__":
    sys.exit(main())
