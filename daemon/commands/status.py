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
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from daemon.commands.tables import dumps, fmt
from daemon.store.reader import software_version

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
    """A short length of time: ``42 s``, ``7 min``, ``3.5 h``, ``2.0 d`` (sign dropped)."""
    if seconds is None:
        return "-"
    s = abs(seconds)
    if s < 120:
        return f"{s:.0f} s"
    if s < 7200:
        return f"{s / 60:.0f} min"
    if s < 172800:
        return f"{s / 3600:.1f} h"
    return f"{s / 86400:.1f} d"


def ago(seconds: float | None) -> str:
    """``7 min ago`` for a past reading, ``3.5 h ahead of this clock`` for one stamped
    in the future (a clock is wrong, or the store is a simulated one)."""
    if seconds is None:
        return "age unknown"
    return f"{age_text(seconds)} ago" if seconds >= 0 else \
        f"{age_text(seconds)} ahead of this clock"


def _age_s(when: str | None, now: _dt.datetime) -> float | None:
    return None if when is None else round((now - parse_utc(when)).total_seconds(), 1)


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
                           "disk": _disk(path),
                           "thresholds": {"heartbeat_warn_s": warn_heartbeat_min * 60,
                                          "heartbeat_crit_s": crit_heartbeat_min * 60,
                                          "disk_warn_free_pct": WARN_DISK_FREE_PCT,
                                          "disk_crit_free_pct": CRIT_DISK_FREE_PCT}}
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
    origins = storeread.configuration_origins(conn)
    simulated = "bench" in origins and "service" not in origins
    out["simulated"] = simulated
    if simulated:
        # Its times are the simulator's clock: ages and plans say nothing of a station.
        last_beat = utc_local(beat, ZoneInfo("UTC")) if beat else "never"
        problems.append((WARNING, "a simulated store (made on the bench by `heliotrope "
                                  "demo`): its times are the simulated clock's, last "
                                  f"heartbeat {last_beat}"
                                  "; point --db at a station's store to watch a station"))
        if beat is not None:
            now = beat  # the ages below are then on the store's own (simulated) clock
            out["service"]["heartbeat_age_s"] = 0.0
    elif beat is None:
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
    if not simulated:
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

    if last is not None:
        last["age_s"] = _age_s(last["time_utc"], now)
    nxt = _next_target(plans, now)
    if nxt is not None:
        nxt["in_s"] = -_age_s(nxt["time_utc"], now)
    out["next_target"] = nxt
    hk = storeread.latest_housekeeping(conn)
    if hk is not None:
        hk["age_s"] = _age_s(hk["time_utc"], now)
    out["housekeeping"] = hk
    # "Today" of a simulated store is the day of its last measurement.
    day_of = parse_utc(last["time_utc"]) if simulated and last is not None else now
    today = day_of.astimezone(site_zone(out["timezone"])).date()
    todays = [p for p in plans if p.get("date") == today.isoformat()]
    out["targets_today"] = {
        "date": today.isoformat(), "measured": storeread.targets_measured(
            conn, today, now.astimezone(_dt.UTC).isoformat()),
        "planned": (sum(1 for t in todays[0]["targets"] if t["session"] in ("am", "pm"))
                    if todays else None)}

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
    out["tracker"] = tr = _tracker(last, _planned_park(plans, now), faults)
    tr["age_s"] = _age_s(tr["time_utc"], now)
    for f in out["faults_24h"]["latest"]:
        f["age_s"] = _age_s(f["time_utc"], now)
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
                "faults_24h", "timezone", "site_name", "plan", "targets_today"):
        out.setdefault(key, None)
    out.setdefault("simulated", False)
    st = {"state": STATE_NAMES[code], "exit_code": code,
          "problems": [p[1] for p in problems], **out}
    st["perfdata"] = perfdata(st)
    return st


# --------------------------------------------------------------------------- output

def _mib(n: int | None) -> str:
    return "-" if n is None else f"{n / 2**20:.1f} MiB"


def _perf_number(value: float | None, spec: str) -> str:
    return "U" if value is None else format(value, spec)  # U: the plugins' "unknown"


def perfdata(st: dict[str, Any]) -> str:
    """Performance data in the monitoring-plugin format, ``'label'=value[UOM];warn;crit;
    min;max`` separated by spaces: heartbeat age [s], free disk [%] (alert below the
    thresholds, range ``N:``), detector temperature [deg C, no unit of the format], and
    the targets measured today (max: those planned)."""
    th = st["thresholds"]
    svc = st.get("service") or {}
    disk = st.get("disk") or {}
    hk = st.get("housekeeping") or {}
    today = st.get("targets_today") or {}
    items = [
        f"'heartbeat_age'={_perf_number(svc.get('heartbeat_age_s'), '.0f')}s;"
        f"{th['heartbeat_warn_s']:.0f};{th['heartbeat_crit_s']:.0f};0;",
        f"'disk_free'={_perf_number(disk.get('free_pct'), '.1f')}%;"
        f"{th['disk_warn_free_pct']:g}:;{th['disk_crit_free_pct']:g}:;0;100",
        f"'detector_temp'={_perf_number(hk.get('detector_temp_c'), '.2f')};;;;",
        f"'targets_today'={_perf_number(today.get('measured'), 'd')};;;0;"
        + ("" if today.get("planned") is None else str(today["planned"])),
    ]
    return " ".join(items)


def _at(when: str | None, age_s: float | None, tz: ZoneInfo, with_date: bool = True) -> str:
    """A reading's time with its age beside it."""
    return f"{utc_local(when, tz, with_date)}, {ago(age_s)}" if when else "never"


def format_status(st: dict[str, Any], now: _dt.datetime, width: int = 80) -> str:
    """The status for a person: the head line (state and worst problem, never wrapped),
    then aligned lines wrapped at ``width`` columns, every reading with its age, then
    the performance data after a ``|`` (monitoring-plugin convention)."""
    tz = site_zone(st.get("timezone"))
    if st["problems"]:
        head = f"{st['state']}: {st['problems'][0]}"
    else:
        head = f"{st['state']}: heartbeat {ago(st['service']['heartbeat_age_s'])}"
    rows: list[list[str]] = []
    if st.get("simulated"):
        rows.append(["store kind", "simulated (bench): times are the simulated clock's"])
    svc = st.get("service")
    if svc is not None:
        rows.append(["heartbeat", _at(svc["heartbeat_utc"], svc["heartbeat_age_s"], tz)])
    last = st.get("last_measurement")
    if last is not None:
        what = f"{last['session']} m={fmt(last['target_airmass'], '.2f')} {last['status']}"
        rows.append(["last measurement", f"{_at(last['time_utc'], last['age_s'], tz)}; {what}"])
    elif svc is not None:
        rows.append(["last measurement", "none yet"])
    nxt = st.get("next_target")
    if nxt is not None:
        rows.append(["next target", f"{utc_local(nxt['time_utc'], tz)}, in "
                                    f"{age_text(nxt['in_s'])}; {nxt['session']} "
                                    f"m={nxt['airmass']:.2f}"])
    elif svc is not None:
        rows.append(["next target", "none in the stored plans"])
    today = st.get("targets_today")
    if today is not None:
        planned = "" if today["planned"] is None else f" of {today['planned']} planned"
        rows.append(["targets today", f"{today['measured']}{planned} measured ({today['date']})"])
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
            text += f"; {_at(tr['time_utc'], tr['age_s'], tz)}"
        rows.append(["tracker", text])
    hk = st.get("housekeeping")
    if hk is not None:
        when = _at(hk["time_utc"], hk["age_s"], tz)
        rows.append(["temperatures", f"detector {fmt(hk['detector_temp_c'], '.1f')} C, "
                                     f"case {fmt(hk['case_temp_c'], '.1f')} C, "
                                     f"ambient {fmt(hk['ambient_temp_c'], '.1f')} C; {when}"])
        rows.append(["supply", f"{fmt(hk['supply_v'], '.2f')} V; {when}"])
    faults = st.get("faults_24h")
    if faults is not None:
        if faults["count"]:
            levels = ", ".join(f"{n} {lvl}" for lvl, n in faults["by_level"].items() if n)
            rows.append(["faults (24 h)", f"{faults['count']} ({levels})"])
            for f in faults["latest"][:3]:
                rows.append(["", f"{utc_local(f['time_utc'], tz)} ({ago(f['age_s'])}) "
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
    label_w = max(len(r[0]) for r in rows)
    # The head stays one line, however long: monitors and mail subjects take line one.
    lines = [head]
    for label, value in rows:
        wrapped = _wrap(value, width - label_w - 2, "")
        lines.append(f"{label.ljust(label_w)}  {wrapped[0]}".rstrip())
        lines += [" " * (label_w + 2) + more for more in wrapped[1:]]
    # Performance data after a '|' in the long output, one item a line: the plugin
    # format allows it there (a first line stays readable at 80 columns).
    items = st["perfdata"].split(" ")
    lines += [f"| {items[0]}"] + items[1:]
    return "\n".join(lines)


def _wrap(text: str, width: int, indent: str) -> list[str]:
    """Words over lines of at most ``width`` columns (a word longer than a line, such
    as a deep path, is split over lines): nothing is cut off."""
    import textwrap

    return textwrap.wrap(text, width, subsequent_indent=indent,
                         break_on_hyphens=False) or [""]


def _now() -> _dt.datetime:
    """The command's clock (the system's); tests put a fixed one in its place."""
    return _dt.datetime.now(_dt.UTC)


def cmd_status(args: argparse.Namespace) -> int:
    now = _now()
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
