"""``heliotrope status``: the state, its exit code (monitoring-plugin convention), and
what it reports, at a fixed `now` and through the command."""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path

import pytest

from daemon.commands.cli import main
from daemon.commands.status import CRITICAL, OK, WARNING, station_status, utc_local
from daemon.store.writer import Store
from tests.synthetic_store import DAY, build_day

UTC = dt.UTC


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    return build_day(tmp_path_factory.mktemp("status") / "day.db")


def _copy(day, tmp_path: Path) -> Path:
    # A private copy (closed store: the WAL is checkpointed into the main file).
    dst = tmp_path / "copy.db"
    dst.write_bytes(day.path.read_bytes())
    return dst


def _target_time(day, session: str, index: int) -> dt.datetime:
    return [t for t in day.plan.targets if t.session == session][index].time_utc


def test_healthy_mid_morning(day, tmp_path):
    path = _copy(day, tmp_path)
    now = _target_time(day, "am", 8) + dt.timedelta(seconds=40)
    with Store.open(path) as s:
        s.heartbeat(now - dt.timedelta(seconds=30))
    st = station_status(path, now)
    # The events of the synthetic day are all later than this morning moment.
    assert st["state"] == "OK" and st["exit_code"] == OK, st["problems"]
    assert st["service"]["heartbeat_age_s"] == pytest.approx(30.0)
    # The next target is the first planned one after now: the ninth morning target.
    assert (dt.datetime.fromisoformat(st["next_target"]["time_utc"])
            == _target_time(day, "am", 9))
    assert st["next_target"]["session"] == "am"
    assert st["faults_24h"]["count"] == 0
    assert st["version"] and st["store"]["size_bytes"] > 0
    assert st["disk"]["free_bytes"] > 0


def test_last_measurement_tracker_and_housekeeping(day, tmp_path):
    path = _copy(day, tmp_path)
    n_pm = sum(1 for session, _ in day.record_ids if session == "pm")
    now = _target_time(day, "pm", n_pm - 1) + dt.timedelta(seconds=50)
    with Store.open(path) as s:
        s.heartbeat(now)
    st = station_status(path, now)
    last = st["last_measurement"]
    mid = day.record_ids[("pm", n_pm - 1)]
    assert last["id"] == mid and last["status"] == "ok"
    rec = day.records[mid]
    assert last["housekeeping"]["supply_v"] == pytest.approx(rec.housekeeping.supply_v)
    assert st["housekeeping"]["detector_temp_c"] == pytest.approx(
        rec.housekeeping.detector_temp_c)
    assert st["tracker"]["state"] == "locked on the sun"
    assert st["tracker"]["pointing_error_deg"] == pytest.approx(0.02)


@pytest.mark.parametrize("age_min,state", [(4.0, "OK"), (6.0, "WARNING"), (16.0, "CRITICAL")])
def test_heartbeat_age_sets_the_state(day, tmp_path, age_min, state):
    path = _copy(day, tmp_path)
    now = _target_time(day, "am", 2) + dt.timedelta(seconds=40)
    with Store.open(path) as s:
        s.heartbeat(now - dt.timedelta(minutes=age_min))
    st = station_status(path, now)
    assert st["state"] == state, st["problems"]
    if state != "OK":
        assert "heartbeat" in st["problems"][0]


def test_thresholds_are_options(day, tmp_path):
    path = _copy(day, tmp_path)
    now = _target_time(day, "am", 2) + dt.timedelta(seconds=40)
    with Store.open(path) as s:
        s.heartbeat(now - dt.timedelta(minutes=6))
    assert station_status(path, now, 10, 20)["exit_code"] == OK
    assert station_status(path, now, 2, 5)["exit_code"] == CRITICAL


def test_no_heartbeat_is_critical(day, tmp_path):
    st = station_status(_copy(day, tmp_path), dt.datetime(2027, 2, 15, 16, tzinfo=UTC))
    assert st["exit_code"] == CRITICAL
    assert "never written a heartbeat" in st["problems"][0]


def test_missing_store_is_critical(tmp_path):
    st = station_status(tmp_path / "nothing.db", dt.datetime(2027, 2, 15, 16, tzinfo=UTC))
    assert st["exit_code"] == CRITICAL and "cannot read the store" in st["problems"][0]


def test_fault_in_the_last_24_h_is_a_warning_and_older_ones_are_not(day, tmp_path):
    path = _copy(day, tmp_path)
    failed_at = day.records[day.failed_id].time_utc
    now = failed_at + dt.timedelta(minutes=10)
    with Store.open(path) as s:
        s.heartbeat(now)
        s.record_event(now - dt.timedelta(hours=30), "error", "device_fault", "old fault")
    st = station_status(path, now)
    assert st["exit_code"] == WARNING
    assert st["faults_24h"]["count"] == 1  # the failed target's no_lock, not the old one
    assert st["faults_24h"]["latest"][0]["kind"] == "no_lock"
    assert st["tracker"]["latest_fault"]["kind"] == "no_lock"


def test_critical_event_makes_it_critical(day, tmp_path):
    path = _copy(day, tmp_path)
    now = _target_time(day, "am", 2) + dt.timedelta(seconds=40)
    with Store.open(path) as s:
        s.heartbeat(now)
        s.record_event(now - dt.timedelta(minutes=1), "critical", "store", "disk error")
    assert station_status(path, now)["exit_code"] == CRITICAL


def test_last_measurement_failed_is_a_warning_three_in_a_row_critical(tmp_path):
    from dataclasses import replace

    day = build_day(tmp_path / "fails.db", fit=False, events=False)
    first = day.records[day.record_ids[("am", 0)]]
    now = first.time_utc + dt.timedelta(minutes=1)
    # A fresh store: one good measurement, then failures.
    path = tmp_path / "f.db"
    with Store.open(path) as s:
        s.save_plan(DAY.isoformat(), day.plan.to_dict(), created_utc=now)
        s.record_measurement(first)
        failed = replace(first, status="failed", failure="no sun lock after 30 s", sun=(),
                         dark=(), saturated=(), housekeeping=None)
        for k in range(1, 3):
            s.record_measurement(replace(failed, time_utc=first.time_utc
                                         + dt.timedelta(seconds=k)))
        s.heartbeat(now)
    assert station_status(path, now)["exit_code"] == WARNING
    with Store.open(path) as s:
        s.record_measurement(replace(failed, time_utc=first.time_utc + dt.timedelta(seconds=3)))
    st = station_status(path, now)
    assert st["exit_code"] == CRITICAL and st["problems"][0].startswith("failing")
    assert st["tracker"]["state"].startswith("last target failed")


def test_parked_after_the_planned_park(day, tmp_path):
    path = _copy(day, tmp_path)
    park = next(e for e in day.plan.events if e.kind == "park").time_utc
    now = park + dt.timedelta(minutes=30)
    with Store.open(path) as s:
        s.heartbeat(now)
    st = station_status(path, now)
    assert st["tracker"]["state"] == "parked (as planned)"
    assert st["next_target"] is None  # no plan for the next day stored


def test_heartbeat_far_in_the_future_is_a_clock_warning(day, tmp_path):
    path = _copy(day, tmp_path)
    now = _target_time(day, "am", 2)
    with Store.open(path) as s:
        s.heartbeat(now + dt.timedelta(hours=1))
    st = station_status(path, now)
    assert st["exit_code"] == WARNING and "clock" in st["problems"][0]


def test_command_exit_codes_and_80_columns(day, tmp_path, capsys, monkeypatch):
    path = _copy(day, tmp_path)
    # A fixed clock inside the synthetic day: the real one would leave its plan behind.
    fixed = _target_time(day, "am", 8) + dt.timedelta(seconds=40)
    monkeypatch.setattr("daemon.commands.status._now", lambda: fixed)
    with Store.open(path) as s:
        s.heartbeat(fixed)
    assert main(["status", "--db", str(path)]) == OK
    text = capsys.readouterr().out
    assert text.startswith("OK: heartbeat")
    assert max(len(line) for line in text.splitlines()) <= 80
    for label in ("heartbeat", "last measurement", "tracker", "temperatures", "supply",
                  "faults (24 h)", "disk free", "store", "version"):
        assert label in text, label
    assert main(["status", "--db", str(path), "--json"]) == OK
    st = json.loads(capsys.readouterr().out)
    assert st["state"] == "OK" and st["timezone"] == "America/Mexico_City"
    with Store.open(path) as s:
        s.heartbeat(fixed - dt.timedelta(minutes=20))
    assert main(["status", "--db", str(path)]) == CRITICAL
    assert capsys.readouterr().out.startswith("CRITICAL: stale")
    assert main(["status", "--db", str(tmp_path / "none.db")]) == CRITICAL
    assert main(["status", "--db", str(path), "--warn-minutes", "9",
                 "--crit-minutes", "3"]) == 64


def test_utc_with_local_time_beside_it():
    from zoneinfo import ZoneInfo

    # Mexico City has kept UTC-6 all year since 2022 (IANA tz database).
    t = dt.datetime(2027, 2, 15, 14, 5, 12, tzinfo=UTC)
    assert utc_local(t, ZoneInfo("America/Mexico_City")) == \
        "2027-02-15 14:05:12 UTC (08:05 local)"
    assert utc_local(t, ZoneInfo("UTC"), with_date=False) == "14:05:12 UTC"


# Performance data as the monitoring plugins' development guidelines write it:
# 'label'=value[UOM];[warn];[crit];[min];[max] (monitoring-plugins.org, "Performance data").
PERF_RE = r"'([^']+)'=(-?[0-9.]+|U)(s|%|B|KB|MB|c)?;([^;]*);([^;]*);([^;]*);([^;\s]*)"


def _perf(text: str) -> dict[str, tuple]:
    import re

    tail = text.split("|", 1)[1]
    return {m[0]: m[1:] for m in re.findall(PERF_RE, tail)}


def test_performance_data_and_the_age_of_every_reading(day, tmp_path):
    from daemon.commands.status import format_status

    path = _copy(day, tmp_path)
    now = _target_time(day, "am", 8) + dt.timedelta(seconds=40)
    with Store.open(path) as s:
        s.heartbeat(now - dt.timedelta(seconds=30))
    st = station_status(path, now)
    text = format_status(st, now)
    perf = _perf(text)
    assert set(perf) == {"heartbeat_age", "disk_free", "detector_temp", "targets_today"}
    assert perf["heartbeat_age"][:5] == ("30", "s", "300", "900", "0")
    assert perf["disk_free"][1:4] == ("%", "10:", "2:")  # alert below: range "N:"
    assert float(perf["detector_temp"][0]) == pytest.approx(
        st["housekeeping"]["detector_temp_c"], abs=0.005)
    # Nine morning targets measured by now (the synthetic day measures every target).
    assert perf["targets_today"][0] == "9" and st["targets_today"]["measured"] == 9
    assert int(perf["targets_today"][5]) == st["targets_today"]["planned"] > 9
    # Every reading with its age (the synthetic store holds the whole day, so the last
    # measurement is later than this morning moment: "ahead of this clock").
    lines = text.splitlines()
    for label in ("heartbeat", "last measurement", "tracker", "temperatures", "supply"):
        i = next(i for i, x in enumerate(lines) if x.startswith(label))
        entry = " ".join([lines[i]] + [x.strip() for x in lines[i + 1:i + 3]
                                       if x.startswith(" ")])
        assert " ago" in entry or "ahead of this clock" in entry, entry
    assert max(len(line) for line in text.splitlines()[1:]) <= 80


def test_a_future_heartbeat_reads_ahead_never_in_the_future_ago(day, tmp_path):
    from daemon.commands.status import format_status

    path = _copy(day, tmp_path)
    now = _target_time(day, "am", 2)
    with Store.open(path) as s:
        s.heartbeat(now + dt.timedelta(hours=3))
    text = format_status(station_status(path, now), now)
    assert "in the future ago" not in text and "3.0 h ahead of this clock" in text


def test_a_simulated_store_says_so_instead_of_blaming_ntp(day, tmp_path):
    path = _copy(day, tmp_path)
    now = dt.datetime(2026, 12, 2, 12, 0, tzinfo=UTC)  # long before the simulated day
    with Store.open(path) as s:
        s.record_configuration("site: {}\n", "demo.yaml", "0.1.0", now, origin="bench")
        s.heartbeat(day.plan.targets[-1].time_utc + dt.timedelta(minutes=5))
    st = station_status(path, now)
    assert st["simulated"] and st["exit_code"] == WARNING
    assert "simulated" in st["problems"][0]
    assert not any("NTP" in p or "stale" in p for p in st["problems"])
    # Ages are on the store's own clock: its last measurement came before its heartbeat.
    assert 0 <= st["last_measurement"]["age_s"] < 3600
