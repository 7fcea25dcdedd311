"""Child process for the kill and power-loss tests: acquires simulated days into a store,
printing one line for every write as soon as its transaction has committed, until killed.

    python -m tests.kill_child STORE FIRST_DAY [RADIOMETER_URL TRACKER_URL [CONFIG]]

Without URLs the devices are the in-process fakes (fast: many writes between kills);
with them the configured drivers (the reference ones of ``config/pico-sereno.yaml``,
or those of CONFIG, e.g. the Modbus station) talk to a running ``heliotrope-sim`` over
its pseudo-terminals, the real serial path. The lines::

    ready
    measurement ID
    event ID
    plan DATE
    results DATE SESSION CHANNEL[,CHANNEL...]
"""

from __future__ import annotations

import dataclasses
import sys
from datetime import date, timedelta
from pathlib import Path

from daemon.config.settings import load_config
from daemon.station.acquisition import Station, local_midnight_utc, open_devices, run_day
from daemon.station.clock import SimClock
from daemon.store.writer import Store
from tests.fakes import FakeRadiometer, FakeTracker

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"


def _say(line: str) -> None:
    print(line, flush=True)


class ReportingStore(Store):
    """The service's store, saying what it committed once each write has returned."""

    def record_measurement(self, rec):
        mid = super().record_measurement(rec)
        _say(f"measurement {mid}")
        return mid

    def record_event(self, time_utc, level, kind, message, detail=None):
        eid = super().record_event(time_utc, level, kind, message, detail)
        _say(f"event {eid}")
        return eid

    def save_plan(self, plan_date, plan_dict, created_utc=None, *args, **kwargs):
        super().save_plan(plan_date, plan_dict, created_utc, *args, **kwargs)
        _say(f"plan {plan_date}")

    def save_session_results(self, plan_date, session, rows, fitted_utc=None):
        rows = list(rows)
        super().save_session_results(plan_date, session, rows, fitted_utc)
        if rows:
            _say(f"results {plan_date} {session} {','.join(str(r['channel']) for r in rows)}")


@dataclasses.dataclass
class Committed:
    """What a child said it committed, gathered over every child of one store."""

    measurements: set[int] = dataclasses.field(default_factory=set)
    events: set[int] = dataclasses.field(default_factory=set)
    plans: set[str] = dataclasses.field(default_factory=set)
    results: set[tuple[str, str, str]] = dataclasses.field(default_factory=set)

    def add(self, output: str) -> None:
        """Take in a child's standard output (a last line cut short by the kill is
        not a report: the child had not finished saying it)."""
        lines = output.split("\n")
        for line in lines[:-1] if not output.endswith("\n") else lines:
            word, *rest = line.split()  or [""]
            if word == "measurement":
                self.measurements.add(int(rest[0]))
            elif word == "event":
                self.events.add(int(rest[0]))
            elif word == "plan":
                self.plans.add(rest[0])
            elif word == "results":
                self.results |= {(rest[0], rest[1], ch) for ch in rest[2].split(",")}

    def count(self) -> int:
        return (len(self.measurements) + len(self.events) + len(self.plans)
                + len(self.results))


def audit(db: str | Path, committed: Committed, samples_per_ok: int) -> dict[str, int]:
    """Check a store after a kill or a power cut; return the row count of each table.

    The file passes ``PRAGMA integrity_check`` and ``foreign_key_check``; every write
    reported as committed is there; no measurement is partly stored (an 'ok' one has
    all its samples, channels and housekeeping, a failed one none); every plan is whole
    JSON; every session result has its fit points, one per point of the session.
    """
    import json
    import sqlite3

    conn = sqlite3.connect(db)
    try:
        assert conn.execute("pragma integrity_check").fetchone()[0] == "ok"
        assert conn.execute("pragma foreign_key_check").fetchall() == []
        ids = {r[0] for r in conn.execute("select id from measurements")}
        lost = committed.measurements - ids
        assert not lost, f"measurements lost: {sorted(lost)[:5]}"
        for mid, status, n_samples, n_channels, n_hk in conn.execute("""
                select m.id, m.status,
                       (select count(*) from samples s where s.measurement_id = m.id),
                       (select count(*) from measurement_channels c
                        where c.measurement_id = m.id),
                       (select count(*) from housekeeping h where h.measurement_id = m.id)
                from measurements m"""):
            if status == "ok":
                assert (n_samples, n_channels, n_hk) == (samples_per_ok, 6, 1), \
                    f"measurement {mid} partial: {n_samples} samples, {n_hk} housekeeping"
            else:
                assert (n_samples, n_hk) == (0, 0), f"failed measurement {mid} has data"
        events = {r[0]: r[1:] for r in conn.execute(
            "select id, time_utc, kind, message from events")}
        lost = committed.events - set(events)
        assert not lost, f"events lost: {sorted(lost)[:5]}"
        assert all(all(v) for v in events.values()), "an event row lacks its time or text"
        plans = dict(conn.execute("select plan_date, plan_json from plans").fetchall())
        assert committed.plans <= set(plans), f"plans lost: {committed.plans - set(plans)}"
        for text in plans.values():
            assert json.loads(text)["targets"]
        results = {r[:3]: r[3:] for r in conn.execute(
            "select plan_date, session, channel, n_total, n_used from session_results")}
        lost = committed.results - set(results)
        assert not lost, f"session results lost: {sorted(lost)[:5]}"
        points = {r[:3]: r[3:] for r in conn.execute("""
            select plan_date, session, channel, count(*), sum(role = 'used')
            from fit_points group by plan_date, session, channel""")}
        for key, (n_total, n_used) in results.items():
            assert points.get(key, (0, 0)) == (n_total, n_used), \
                f"fit points of {key} do not match its result ({n_total} points, {n_used} used)"
        return {"measurements": len(ids), "events": len(events), "plans": len(plans),
                "results": len(results), "fit_points": sum(p[0] for p in points.values())}
    finally:
        conn.close()


def main() -> None:
    store_path, first = sys.argv[1], date.fromisoformat(sys.argv[2])
    urls = sys.argv[3:5]
    cfg = load_config(sys.argv[5] if len(sys.argv) > 5 else CONFIG)
    if urls:
        cfg = dataclasses.replace(
            cfg, radiometer=dataclasses.replace(cfg.radiometer, url=urls[0]),
            tracker=dataclasses.replace(cfg.tracker, url=urls[1]))
    store = ReportingStore.open(store_path)
    _say("ready")
    day = first
    while True:
        radiometer, tracker = (open_devices(cfg) if urls
                               else (FakeRadiometer(fail_bursts={5}), FakeTracker()))
        station = Station(cfg, radiometer, tracker, store,
                          SimClock(local_midnight_utc(cfg, day)))
        station.event("info", "start", f"kill test child acquiring {day}")
        run_day(station, day)
        if urls:
            radiometer.close()
            tracker.close()
        day += timedelta(days=1)


if __name__ == "__main__":
    main()
