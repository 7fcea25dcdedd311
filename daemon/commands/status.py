"""``heliotrope status``: is the station alive and well, for a person or a monitor.

Everything comes from the store through a read-only connection (standard library
only): the service's heartbeat (written every minute and after each plan item), the
last measurement, the next planned target, the tracker as the last measurement saw
it, the newest housekeeping, the faults of the last 24 h, free disk and store size,
and the software version.

The exit code follows the monitoring-plugin convention, so cron or a monitoring
system can call it over SSH: 0 healthy, 1 warning, 2 stale or failing. A store that
cannot be read (any SQLite error, a damaged row) is "failing" (2), in one line: nothing
can be said about the station. So is a station with nothing planned ahead and no plan
for today: the service would not measure again without a restart.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import shutil
import sqlite3
import sys
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from daemon.commands.tables import dumps, fmt, table

OK, WARNING, CRITICAL = 0, 1, 2
STATE_NAMES = {OK: "OK", WARNING: "WARNING", CRITICAL: "CRITICAL"}

# The heartbeat job shares the service's single worker with the targets; one target
# (slew up to 3 min, lock, burst, dark) can hold it for about 4 min.
WARN_HEARTBEAT_MIN = 5.0
CRIT_HEARTBEAT_MIN = 15.0
FUTURE_SKEW_S = 120.0  # a heartbeat this far ahead of our clock means a clock is wrong
FAULT_LEVELS = ("warning", "error", "critical")
FAULT_WINDOW = _dt.timedelta(hours=24)
FAILING_RUN = 3  # this many failed measurements in a row (within 24 h) is "failing"
WARN_DISK_FREE_PCT = 10.0
CRIT_DISK_FREE_PCT = 2.0
CRIT_DISK_FREE_BYTES = 100 * 1024 * 1024
# The next day is planned one second after the stored plan's last event (the replan
# after local midnight); a plan item this recently past still counts as ahead, as the
# job may wait for the single worker like the heartbeat does.
PLAN_GRACE = _dt.timedelta(minutes=CRIT_HEARTBEAT_MIN)


# --------------------------------------------------------------------------- time text

def parse_utc(text: str) -> _dt.datetime:
    """An aware datetime from stored ISO 8601 text (naive text is taken as UTC)."""
    t = _dt.datetime.fromisoformat(text)
    return t if t.tzinfo else t.replace(tzinfo=_dt.UTC)


def site_zone(name: str | None) -> ZoneInfo:
    """The site's time zone by IANA name; UTC when unknown."""
    try:
        return ZoneInfo(name or "UTC")
    except (ZoneInfoNotFoundError, ValueError):
        return ZoneInfo("UTC")


def utc_local(when: str | _dt.datetime | None, tz: ZoneInfo, with_date: bool = True) -> str:
    """``2027-02-15 14:05:12 UTC (08:05 local)``: UTC first, the site's clock beside it."""
    if when is None:
        return "-"
    t = parse_utc(when) if isinstance(when, str) else when
    u = t.astimezone(_dt.UTC)
    head = u.strftime("%Y-%m-%d %H:%M:%S" if with_date else "%H:%M:%S")
    if tz.key == "UTC":
        return f"{head} UTC"
    return f"{head} UTC ({t.astimezone(tz).strftime('%H:%M')} local)"


def age_text(seconds: float | None) -> str:
    """A short age: ``42 s``, ``7 min``, ``3.5 h``, ``2.0 d``."""
    if seconds is None:
        return "-"
    s = abs(seconds)
    if s < 120:
        text = f"{s:.0f} s"
    elif s < 7200:
        text = f"{s / 60:.0f} min"
    elif s < 172800:
        text = f"{s / 3600:.1f} h"
    else:
        text = f"{s / 86400:.1f} d"
    return text if seconds >= 0 else f"{text} in the future"


# --------------------------------------------------------------------------- version

def software_version() -> str:
    """The installed heliotrope version.

    Read from the distribution's METADATA file on ``sys.path``: importing
    ``importlib.metadata`` costs about 50 ms, a third of the read commands' budget.
    """
    for entry in sys.path:
        try:
            base = Path(entry or ".")
            found = sorted(base.glob("heliotrope-*.dist-info"))
        except OSError:
            continue
        for info in found:
            try:
                with (info / "METADATA").open(encoding="utf-8") as fh:
                    for line in fh:
                        if line.startswith("Version:"):
                            return line.split(":", 1)[1].strip()
                        if not line.strip():
                            break
            except OSError:
                continue
    from importlib import metadata
    try:
        return metadata.version("heliotrope")
    except metadata.PackageNotFoundError:
        return "unknown (not installed)"


# --------------------------------------------------------------------------- the checks

def _next_target(plans: list[dict], now: _dt.datetime) -> dict | None:
    best = None
    for plan in plans:
        for t in plan.get("targets", []):
            when = parse_utc(t["time_utc"])
            if when > now and (best is None or when < best[0]):
                best = (when, {**t, "plan_date": plan.get("date")})
    return best[1] if best else None


def _planned_park(plans: list[dict], now: _dt.datetime) -> str | None:
    """The latest planned park that is already past, as ISO text."""
    latest = None
    for plan in plans:
        for e in plan.get("events", []):
            if e.get("kind") == "park":
                when = parse_utc(e["time_utc"])
                if when <= now and (latest is None or when > latest):
                    latest = when
    return latest.isoformat() if latest else None


def _tracker(last: dict | None, park_utc: str | None, faults: list[dict]) -> dict[str, Any]:
    """What the store says about the tracker: the last measurement's lock and pointing,
    a planned park since then, and the newest tracker-related fault."""
    out: dict[str, Any] = {"state": "unknown", "time_utc": None, "locked": None,
                           "pointing_error_deg": None, "source": None, "latest_fault": None}
    if last is not None:
        out.update(time_utc=last["time_utc"], locked=last["locked"],
                   pointing_error_deg=last["pointing_error_deg"], source="last measurement")
        if last["status"] == "ok":
            out["state"] = "locked on the sun" if last["locked"] else "measured without lock"
        else:
            out["state"] = f"last target failed: {last['failure']}"
    if park_utc is not None and (last is None or park_utc > last["time_utc"]):
        out.update(state="parked (as planned)", time_utc=park_utc, source="plan")
    tracker_faults = [f for f in faults if f["kind"] in ("no_lock", "device_fault")]
    if tracker_faults:
        f = tracker_faults[-1]
        out["latest_fault"] = {"time_utc": f["time_utc"], "kind": f["kind"],
                               "message": f["message"]}
    return out


def _disk(db_path: Path) -> dict[str, Any] | None:
    try:
        usage = shutil.disk_usage(db_path.parent)
    except OSError:
        return None
    return {"free_bytes": usage.free, "total_bytes": usage.total,
            "free_pct": 100.0 * usage.free / usage.total if usage.total else None}


def station_status(db_path: str | Path, now: _dt.datetime,
                   warn_heartbeat_min: float = WARN_HEARTBEAT_MIN,
                   crit_heartbeat_min: float = CRIT_HEARTBEAT_MIN) -> dict[str, Any]:
    """Collect the station's status from the store at ``db_path`` as seen at ``now``.

    Parameters
    ----------
    db_path : str or Path
        The service's store.
    now : datetime
        Aware UTC time the status refers to (the system clock in the command).
    warn_heartbeat_min, crit_heartbeat_min : float
        Heartbeat ages [min] from which the status is a warning, or critical (stale).

    Returns
    -------
    dict
        ``state`` ('OK', 'WARNING' or 'CRITICAL'), ``exit_code`` (0, 1, 2),
        ``problems`` (what made the state worse than OK, worst first), and the
        sections ``service``, ``last_measurement``, ``next_target``, ``tracker``,
        ``housekeeping``, ``faults_24h``, ``disk``, ``store`` and ``version``.
    """
    from daemon.store import reader as storeread

    path = Path(db_path).expanduser()
    problems: list[tuple[int, str]] = []
    out: dict[str, Any] = {"checked_utc": now.astimezone(_dt.UTC).isoformat(),
                           "version": software_version(),
                           "store": {"path": str(path),
                                     "size_bytes": storeread.store_files_size(path)},
                           "disk": _disk(path)}
    try:
        conn = storeread.open_readonly(path)
    except storeread.StoreError as exc:
        problems.append((CRITICAL, f"cannot read the store: {exc}"))
        return _finish(out, problems)
    try:
        _collect(conn, now, out, problems, warn_heartbeat_min, crit_heartbeat_min)
    except (sqlite3.Error, storeread.StoreError, ValueError) as exc:
        # First among the critical ones: it is why the rest may be missing or wrong.
        problems.insert(0, (CRITICAL, _read_failure(exc)))
    finally:
        conn.close()
    disk = out["disk"]
    if disk is not None and disk["free_pct"] is not None:
        free_mib = disk["free_bytes"] / 2**20
        if disk["free_pct"] < CRIT_DISK_FREE_PCT or disk["free_bytes"] < CRIT_DISK_FREE_BYTES:
            problems.append((CRITICAL, f"disk nearly full: {free_mib:.0f} MiB "
                                       f"({disk['free_pct']:.1f} %) free"))
        elif disk["free_pct"] < WARN_DISK_FREE_PCT:
            problems.append((WARNING, f"disk getting full: {disk['free_pct']:.1f} % free"))
    return _finish(out, problems)


def _read_failure(exc: Exception) -> str:
    """One line for a store that failed in the middle of the checks."""
    from daemon.store import reader as storeread

    if isinstance(exc, storeread.StoreError):
        text = str(exc)
    elif isinstance(exc, sqlite3.Error):
        text = f"cannot read the store: {exc}"
        if storeread.is_damage(exc):
            text += f"; {storeread.DAMAGE_ADVICE}"
    else:
        text = f"cannot read the store: a stored value is damaged ({exc})"
    return " ".join(text.split())


def _anything_ahead(plans: list[dict], after: _dt.datetime) -> bool:
    return any(parse_utc(item["time_utc"]) > after
               for plan in plans for item in plan["targets"] + plan.get("events", []))


def _plan_check(plans: list[dict], latest: dict | None, now: _dt.datetime,
                out: dict, problems: list) -> None:
    """Nothing ahead in the stored plans and no plan for today: acquisition has stopped
    (a plan write failed, a job was lost), though the heartbeat may be fresh."""
    today = now.astimezone(site_zone(out["timezone"])).date().isoformat()
    newest = None if latest is None else str(latest["date"])
    older = newest is None or newest < today
    ahead = _anything_ahead(plans, now - PLAN_GRACE)
    out["plan"] = {"newest_date": newest, "today": today, "older_than_today": older,
                   "anything_ahead": ahead}
    if older and not ahead:
        which = "no plan is stored" if newest is None else \
            f"the newest stored plan is for {newest}, older than today ({today})"
        problems.append((CRITICAL, f"nothing planned ahead: {which}; the service will not "
                                   "measure again until it plans a day: see `journalctl -u "
                                   "heliotroped` and restart it"))


def _collect(conn, now: _dt.datetime, out: dict, problems: list,
             warn_min: float, crit_min: float) -> None:
    from daemon.store import reader as storeread

    beat = storeread.last_heartbeat(conn)
    age = None if beat is None else (now - beat).total_seconds()
    out["service"] = {"heartbeat_utc": None if beat is None else beat.isoformat(),
                      "heartbeat_age_s": None if age is None else round(age, 1)}
    if beat is None:
        problems.append((CRITICAL, "the service has never written a heartbeat: "
                                   "is heliotroped running?"))
    elif age < -FUTURE_SKEW_S:
        problems.append((WARNING, f"the heartbeat is {age_text(-age)} ahead of this clock: "
                                  "check the clocks (NTP)"))
    elif age > crit_min * 60:
        problems.append((CRITICAL, f"stale: last heartbeat {age_text(age)} ago; "
                                   "check `systemctl status heliotroped`"))
    elif age > warn_min * 60:
        problems.append((WARNING, f"heartbeat {age_text(age)} old (expected every minute)"))

    plans = storeread.plans_from(conn, (now - _dt.timedelta(days=2)).date())
    latest_plan = storeread.stored_plan(conn)
    out["timezone"] = (latest_plan or {}).get("timezone") or "UTC"
    out["site_name"] = (latest_plan or {}).get("site_name")
    _plan_check(plans, latest_plan, now, out, problems)

    last = storeread.last_measurement(conn)
    out["last_measurement"] = last
    since = (now - FAULT_WINDOW).astimezone(_dt.UTC).isoformat()
    if last is not None and last["status"] == "failed":
        recent = storeread.recent_outcomes(conn, since, FAILING_RUN)
        if len(recent) >= FAILING_RUN and all(s == "failed" for s in recent):
            problems.append((CRITICAL, f"failing: the last {FAILING_RUN} measurements failed "
                                       f"(latest: {last['failure']})"))
        else:
            problems.append((WARNING, f"the last measurement failed: {last['failure']}"))

    out["next_target"] = _next_target(plans, now)
    hk = storeread.latest_housekeeping(conn)
    out["housekeeping"] = hk

    end = (now + _dt.timedelta(seconds=1)).astimezone(_dt.UTC).isoformat()
    faults = storeread.events_between(conn, since, end, FAULT_LEVELS)
    by_level = {lvl: sum(1 for f in faults if f["level"] == lvl) for lvl in FAULT_LEVELS}
    out["faults_24h"] = {"count": len(faults), "by_level": by_level,
                         "latest": [{k: f[k] for k in ("time_utc", "level", "kind", "message")}
                                    for f in faults[-5:][::-1]]}
    if faults:
        worst = CRITICAL if by_level["critical"] else WARNING
        newest = faults[-1]
        problems.append((worst, f"{len(faults)} fault event{'s' if len(faults) != 1 else ''} "
                                f"in 24 h (newest: {newest['kind']}: {newest['message']})"))
    out["tracker"] = _tracker(last, _planned_park(plans, now), faults)
    # The service's integrity check runs daily: the newest within a week.
    check = storeread.latest_event(conn, "store_check",
                                   (now - _dt.timedelta(days=7)).astimezone(_dt.UTC).isoformat())
    out["store"]["check"] = None if check is None else {
        "time_utc": check["time_utc"], "ok": check["level"] == "info", "message": check["message"]}
    if check is not None and check["level"] != "info":
        problems.append((CRITICAL, check["message"]))


def _finish(out: dict, problems: list[tuple[int, str]]) -> dict[str, Any]:
    problems.sort(key=lambda p: -p[0])
    code = problems[0][0] if problems else OK
    for key in ("service", "last_measurement", "next_target", "tracker", "housekeeping",
                "faults_24h", "timezone", "site_name", "plan"):
        out.setdefault(key, None)
    return {"state": STATE_NAMES[code], "exit_code": code,
            "problems": [p[1] for p in problems], **out}


# --------------------------------------------------------------------------- output

def _mib(n: int | None) -> str:
    return "-" if n is None else f"{n / 2**20:.1f} MiB"


def format_status(st: dict[str, Any], now: _dt.datetime) -> str:
    """The status as a few aligned lines for an 80-column terminal."""
    tz = site_zone(st.get("timezone"))
    if st["problems"]:
        head = f"{st['state']}: {st['problems'][0]}"
    else:
        head = f"{st['state']}: heartbeat {age_text(st['service']['heartbeat_age_s'])} ago"
    rows: list[list[str]] = []
    svc = st.get("service")
    if svc is not None:
        rows.append(["heartbeat", f"{utc_local(svc['heartbeat_utc'], tz)}, "
                                  f"{age_text(svc['heartbeat_age_s'])} ago"
                     if svc["heartbeat_utc"] else "never"])
    last = st.get("last_measurement")
    if last is not None:
        what = f"{last['session']} m={fmt(last['target_airmass'], '.2f')} {last['status']}"
        rows.append(["last measurement", f"{utc_local(last['time_utc'], tz)}, {what}"])
    elif svc is not None:
        rows.append(["last measurement", "none yet"])
    nxt = st.get("next_target")
    if nxt is not None:
        rows.append(["next target", f"{utc_local(nxt['time_utc'], tz)}, {nxt['session']} "
                                    f"m={nxt['airmass']:.2f}"])
    elif svc is not None:
        rows.append(["next target", "none in the stored plans"])
    plan = st.get("plan")
    if plan is not None:
        rows.append(["newest plan", (plan["newest_date"] or "none")
                     + (f" (older than today, {plan['today']})" if plan["older_than_today"]
                        else "")])
    tr = st.get("tracker")
    if tr is not None:
        text = tr["state"]
        if tr["pointing_error_deg"] is not None and tr["source"] == "last measurement":
            text += f", {tr['pointing_error_deg']:.3f} deg off"
        if tr["time_utc"]:
            text += f" at {utc_local(tr['time_utc'], tz, with_date=False)}"
        rows.append(["tracker", text])
    hk = st.get("housekeeping")
    if hk is not None:
        rows.append(["temperatures", f"detector {fmt(hk['detector_temp_c'], '.1f')} C, "
                                     f"case {fmt(hk['case_temp_c'], '.1f')} C, "
                                     f"ambient {fmt(hk['ambient_temp_c'], '.1f')} C"])
        rows.append(["supply", f"{fmt(hk['supply_v'], '.2f')} V "
                               f"at {utc_local(hk['time_utc'], tz, with_date=False)}"])
    faults = st.get("faults_24h")
    if faults is not None:
        if faults["count"]:
            levels = ", ".join(f"{n} {lvl}" for lvl, n in faults["by_level"].items() if n)
            rows.append(["faults (24 h)", f"{faults['count']} ({levels})"])
            for f in faults["latest"][:3]:
                rows.append(["", f"{utc_local(f['time_utc'], tz, with_date=False)} "
                                 f"{f['kind']}: {f['message']}"])
        else:
            rows.append(["faults (24 h)", "none"])
    disk = st.get("disk")
    if disk is not None:
        rows.append(["disk free", f"{_mib(disk['free_bytes'])} "
                                  f"({fmt(disk['free_pct'], '.1f')} %)"])
    rows.append(["store", f"{st['store']['path']}, {_mib(st['store']['size_bytes'])}"])
    if st["store"].get("check"):
        rows.append(["store check", f"{utc_local(st['store']['check']['time_utc'], tz)}, "
                                    f"{st['store']['check']['message']}"])
    rows.append(["version", f"heliotrope {st['version']}"])
    for p in st["problems"][1:]:
        rows.append(["also", p])
    lines = table(["", ""], rows).splitlines()[1:]
    return "\n".join([head] + [_clip(line) for line in lines])


def _clip(line: str, width: int = 80) -> str:
    return line if len(line) <= width else line[: width - 3] + "..."


def cmd_status(args: argparse.Namespace) -> int:
    now = _dt.datetime.now(_dt.UTC)
    if args.warn_minutes <= 0 or args.crit_minutes < args.warn_minutes:
        from daemon.commands.errors import EX_USAGE, CommandError
        raise CommandError(f"--warn-minutes {args.warn_minutes:g} and --crit-minutes "
                           f"{args.crit_minutes:g}: both must be positive and the critical "
                           "age at least the warning age", EX_USAGE)
    st = station_status(args.db, now, args.warn_minutes, args.crit_minutes)
    if args.json:
        print(dumps(st))
    else:
        print(format_status(st, now))
    return st["exit_code"]
