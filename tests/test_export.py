"""``heliotrope export``: units in the CSV header, values equal to the raw samples'
statistics, local-date ranges, streaming, and safe output files."""

from __future__ import annotations

import csv
import datetime as dt
import io
import json

import numpy as np
import pytest

from daemon.commands import export as ex
from daemon.commands.cli import main
from daemon.store.reader import open_readonly, results_between
from tests.synthetic_store import DAY, build_day

D = DAY.isoformat()


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    return build_day(tmp_path_factory.mktemp("export") / "day.db")


def _run(capsys, *argv) -> tuple[int, str, str]:
    rc = main(list(argv))
    cap = capsys.readouterr()
    return rc, cap.out, cap.err


def test_measurements_csv_has_units_and_the_samples_statistics(day, capsys):
    rc, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                      "measurements")
    assert rc == 0
    rows = list(csv.reader(io.StringIO(out)))
    header = rows[0]
    for col in ("sun_mean_v [V]", "sun_sd_v [V]", "dark_mean_v [V]", "airmass [1]",
                "pressure_hpa [hPa]", "pointing_error_deg [deg]", "detector_temp_c [degC]",
                "supply_v [V]", "time_utc", "channel"):
        assert col in header, col
    body = [dict(zip(header, r, strict=True)) for r in rows[1:]]
    n_channels = len(day.config.channels)
    assert len(body) == len(day.records) * n_channels
    # Mean and sample standard deviation recomputed with numpy from the written samples.
    rec = day.records[day.outlier_id]
    mine = [r for r in body if r["measurement_id"] == str(day.outlier_id)]
    for r in mine:
        c = rec.channels.index(r["channel"])
        sun = np.array([s[c] for s in rec.sun])
        dark = np.array([s[c] for s in rec.dark])
        assert float(r["sun_mean_v [V]"]) == pytest.approx(sun.mean(), rel=1e-12)
        assert float(r["sun_sd_v [V]"]) == pytest.approx(sun.std(ddof=1), rel=1e-9)
        assert float(r["dark_mean_v [V]"]) == pytest.approx(dark.mean(), rel=1e-12)
        assert r["n_sun"] == "10" and r["n_dark"] == "5" and r["locked"] == "true"
    failed = [r for r in body if r["measurement_id"] == str(day.failed_id)]
    assert {r["status"] for r in failed} == {"failed"}
    assert all(r["sun_mean_v [V]"] == "" and r["n_sun"] == "0" for r in failed)


def test_json_is_one_array_with_the_same_rows(day, capsys):
    _, out_csv, _ = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                         "measurements", "--format", "csv")
    rc, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                      "measurements", "--format", "json")
    assert rc == 0
    rows = json.loads(out)
    assert isinstance(rows, list) and len(rows) == len(out_csv.splitlines()) - 1
    assert set(rows[0]) == {c for c, _ in ex.MEASUREMENT_COLUMNS}
    assert isinstance(rows[0]["locked"], bool)


def test_samples_export_holds_every_raw_value(day, capsys):
    rc, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                      "samples", "--format", "json")
    assert rc == 0
    rows = json.loads(out)
    expected = sum(len(r.sun) + len(r.dark) for r in day.records.values()) * 6
    assert len(rows) == expected
    rec = day.records[day.outlier_id]
    sun_500 = [r["value_v"] for r in rows if r["measurement_id"] == day.outlier_id
               and r["kind"] == "sun" and r["channel"] == "500"]
    assert sun_500 == [s[rec.channels.index("500")] for s in rec.sun]


def test_results_export_matches_the_reader(day, capsys):
    rc, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", D, "--to", D,
                      "--what", "results", "--format", "json")
    assert rc == 0
    rows = json.loads(out)
    conn = open_readonly(day.path)
    try:
        want = results_between(conn, D, D)
    finally:
        conn.close()
    assert [{k: r[k] for k in want[0]} for r in rows] == want
    assert all(r["fitted_utc"] for r in rows)
    rc, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                      "results")
    header = out.splitlines()[0]
    assert "v0_1au [V]" in header and "wavelength_nm [nm]" in header and "tau [1]" in header


def test_events_follow_the_local_date(day, capsys):
    # Pico Sereno keeps America/Mexico_City time, UTC-6 (IANA tz database): 05:30 UTC on
    # the 16th is 23:30 on the 15th; 06:30 UTC is already the 16th.
    rc, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                      "events", "--format", "json")
    assert rc == 0
    kinds = [e["kind"] for e in json.loads(out)]
    assert "late" in kinds and "next_day" not in kinds and "no_lock" in kinds
    _, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", "2027-02-16",
                     "--what", "events", "--format", "json")
    assert [e["kind"] for e in json.loads(out)] == ["next_day"]


def test_empty_range_gives_a_header_or_an_empty_array(day, capsys):
    _, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", "2020-01-01",
                     "--what", "measurements")
    assert len(out.splitlines()) == 1
    _, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", "2020-01-01",
                     "--what", "results", "--format", "json")
    assert json.loads(out) == []


def test_aod_export_uses_the_calibration_table(tmp_path, capsys):
    from daemon.store.writer import Store

    day = build_day(tmp_path / "aod.db", fit=False, events=False)
    mid = day.record_ids[("am", 0)]
    with Store.open(day.path) as s:
        cid = s.save_calibration(dt.datetime(2027, 3, 1, tzinfo=dt.UTC), D, D,
                                 "Pico Sereno Station", {}, [], [])
        s.save_aod([{"measurement_id": mid, "channel": "500", "calibration_id": cid,
                     "wavelength_nm": 500.0, "aod": 0.021, "aod_unc": 0.001,
                     "tau_total": 0.1196, "tau_rayleigh": 0.0915, "tau_ozone": 0.0081,
                     "airmass": 6.0, "ozone_airmass": 5.6, "pressure_hpa": 645.0,
                     "flag": None}])
    rc, out, _ = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what", "aod")
    assert rc == 0
    rows = list(csv.DictReader(io.StringIO(out)))
    assert len(rows) == 1 and rows[0]["channel"] == "500"
    assert float(rows[0]["aod [1]"]) == pytest.approx(0.021)
    assert "wavelength_nm [nm]" in rows[0]


def test_writers_stream_row_by_row():
    pulled: list[int] = []

    def rows():
        for i in range(5):
            pulled.append(i)
            yield {"id": i, "time_utc": "t", "level": "info", "kind": "k", "message": "m",
                   "detail": None}

    class Sink(io.StringIO):
        """Records how many rows had been pulled when the first row reached the output."""

        def __init__(self, marker: str):
            super().__init__()
            self.marker, self.pulled_at_first_row = marker, None

        def write(self, text):
            if self.pulled_at_first_row is None and self.marker in text:
                self.pulled_at_first_row = len(pulled)
            return super().write(text)

    for writer, marker in ((ex.write_json, '"id": 0'), (ex.write_csv, "0,t,info")):
        pulled.clear()
        sink = Sink(marker)
        assert writer(rows(), ex.EVENT_COLUMNS, sink) == 5
        assert sink.pulled_at_first_row == 1, writer.__name__
    buf = io.StringIO()
    ex.write_json(rows(), ex.EVENT_COLUMNS, buf)
    assert [r["id"] for r in json.loads(buf.getvalue())] == [0, 1, 2, 3, 4]


def test_row_sources_are_lazy(day):
    conn = open_readonly(day.path)
    try:
        for what in ex.WHATS:
            it = ex.export_rows(conn, what, D, D)
            assert iter(it) is it, what  # a generator over the cursor, not a list
    finally:
        conn.close()


def test_out_file_is_written_whole_and_never_the_store(day, tmp_path, capsys):
    out = tmp_path / "m.csv"
    rc, stdout, err = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                           "results", "--out", str(out))
    assert rc == 0 and stdout == "" and "12 results rows written" in err
    assert out.read_text().startswith("date,session,channel")
    assert not list(tmp_path.glob(".m.csv.*"))  # no temporary file left behind
    rc, _, err = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                      "results", "--out", str(day.path))
    assert rc == 64 and "the store itself" in err
    rc, _, err = _run(capsys, "export", "--db", str(day.path), "--from", D, "--what",
                      "results", "--out", str(tmp_path / "no" / "such" / "dir.csv"))
    assert rc == 64 and "does not exist" in err


def test_bad_ranges_and_stores_are_clear(day, tmp_path, capsys):
    rc, _, err = _run(capsys, "export", "--db", str(day.path), "--from", "2027-02-16",
                      "--to", D, "--what", "results")
    assert rc == 64 and "before the start date" in err
    rc, _, err = _run(capsys, "export", "--db", str(tmp_path / "x.db"), "--from", D,
                      "--what", "results")
    assert rc == 66 and "no store here" in err
    with pytest.raises(SystemExit):
        main(["export", "--db", str(day.path), "--from", "15/02/2027", "--what", "results"])
    assert "YYYY-MM-DD" in capsys.readouterr().err


def test_the_samples_csv_from_tuples_is_the_generic_writer_byte_for_byte(day):
    """The samples export writes CSV straight from the query's tuples; the generic
    writer from the row dicts is its reference (common practice, no source)."""
    conn = open_readonly(day.path)
    try:
        d = DAY.isoformat()
        fast, generic = io.StringIO(), io.StringIO()
        n_fast = ex.write_samples_csv(conn, d, d, fast)
        n_generic = ex.write_csv(ex.sample_rows(conn, d, d), ex.SAMPLE_COLUMNS, generic)
        via_export = io.StringIO()
        ex.export(conn, "samples", d, d, "csv", via_export)
    finally:
        conn.close()
    assert n_fast == n_generic > 0
    assert fast.getvalue() == generic.getvalue() == via_export.getvalue()
    # A non-finite value (a store written by something else) is an empty field in both.
    assert ex._csv_cell(float("inf")) == "" and ex._csv_cell(float("nan")) == ""
    assert ex._csv_cell(True) == "true" and ex._csv_cell(1) == 1


def test_the_samples_csv_from_tuples_quotes_and_blanks_as_the_csv_module(day, tmp_path):
    """Cells a store written by something else may hold (a NULL or infinite value, a
    channel name with a comma or a quote, a missing index) come out of the fast writer
    as the csv module writes them from the row dicts (Python's csv module, QUOTE_MINIMAL,
    is the reference; common practice, no source)."""
    import shutil
    import sqlite3

    db = tmp_path / "odd.db"
    shutil.copy(day.path, db)
    with sqlite3.connect(db) as conn:
        ids = [r[0] for r in conn.execute(
            "SELECT rowid FROM samples ORDER BY rowid LIMIT 4")]
        conn.execute("UPDATE samples SET value_v = NULL WHERE rowid = ?", (ids[0],))
        conn.execute("UPDATE samples SET value_v = 1e999 WHERE rowid = ?", (ids[1],))
        conn.execute("UPDATE samples SET channel = 'a,\"b' WHERE rowid = ?", (ids[2],))
        conn.execute("UPDATE samples SET sample_index = NULL WHERE rowid = ?", (ids[3],))
    conn.close()
    conn = open_readonly(db)
    try:
        d = DAY.isoformat()
        fast, generic = io.StringIO(), io.StringIO()
        ex.write_samples_csv(conn, d, d, fast)
        ex.write_csv(ex.sample_rows(conn, d, d), ex.SAMPLE_COLUMNS, generic)
    finally:
        conn.close()
    assert fast.getvalue() == generic.getvalue()
    assert ',"a,""b",' in fast.getvalue()


def test_the_samples_come_in_sqlite_s_own_order_of_the_export(day, tmp_path, monkeypatch):
    """The samples are read in the primary key's order and their runs put in the export's
    order in Python; SQLite's ORDER BY of the same rows (``_MEASUREMENT_SAMPLES_SORTED_SQL``,
    NULLs first) is the reference, on the synthetic day and on cells a store written by
    something else may hold: a NULL kind or channel, a channel without a channel row, a
    name beyond ASCII, a tie of channel indices, a kind of its own; and a BLOB channel
    and a text channel index, which Python cannot order and which are read sorted by
    SQLite instead (SQLite's documented sort order; common practice, no source)."""
    import shutil
    import sqlite3

    db = tmp_path / "odd.db"
    shutil.copy(day.path, db)
    with sqlite3.connect(db) as conn:
        ids = [r[0] for r in conn.execute(
            "SELECT DISTINCT measurement_id FROM samples ORDER BY measurement_id LIMIT 3")]
        one = conn.execute("SELECT rowid FROM samples WHERE measurement_id = ? "
                           "ORDER BY rowid LIMIT 2", (ids[0],)).fetchall()
        conn.execute("UPDATE samples SET kind = NULL WHERE rowid = ?", one[0])
        conn.execute("UPDATE samples SET channel = NULL WHERE rowid = ?", one[1])
        conn.execute("UPDATE samples SET channel = 'zz' WHERE measurement_id = ? "
                     "AND channel = '500'", (ids[0],))
        conn.execute("UPDATE samples SET channel = '\u00e9' WHERE measurement_id = ? "
                     "AND channel = '675'", (ids[0],))  # beyond ASCII: UTF-8 byte order
        conn.execute("UPDATE measurement_channels SET channel_index = 2.5 "  # a tie below
                     "WHERE measurement_id = ? AND channel = '440'", (ids[0],))
        conn.execute("UPDATE measurement_channels SET channel_index = 2.5 "
                     "WHERE measurement_id = ? AND channel = '870'", (ids[0],))
        conn.execute("UPDATE samples SET kind = 'zzz' WHERE measurement_id = ? "  # in the tie
                     "AND channel = '440' AND kind = 'dark'", (ids[0],))
        conn.execute("UPDATE measurement_channels SET channel_index = 'x' "
                     "WHERE measurement_id = ? AND channel = '380'", (ids[1],))
        conn.execute("UPDATE samples SET channel = X'00ff' WHERE measurement_id = ? "
                     "AND channel = '440'", (ids[2],))
        conn.execute("UPDATE samples SET channel = 'zz' WHERE measurement_id = ? "
                     "AND channel = '500'", (ids[2],))
    conn.close()
    reads = []
    runs = ex._runs
    monkeypatch.setattr(ex, "_runs", lambda rows: reads.append(len(rows)) or runs(rows))
    for path, sorted_by_sqlite in ((day.path, 0), (db, 2)):
        reads.clear()
        conn = open_readonly(path)
        try:
            groups = list(ex._sample_groups(conn, D, D))
            for measurement, measured in groups:
                mine = [row for _, _, rows in measured for row in rows]
                assert mine == [tuple(r) for r in conn.execute(
                    ex._MEASUREMENT_SAMPLES_SORTED_SQL, (measurement[0],))], measurement
                assert all(row[:2] == (kind, channel)
                           for channel, kind, rows in measured for row in rows)
        finally:
            conn.close()
        assert len(groups) > 3
        assert len(reads) == len(groups) + sorted_by_sqlite  # the fallback's second read
