"""Provenance: the store records the configuration each run used (text, SHA-256,
software version, origin); results and calibrations point to it; the read commands use
it when no --config is given."""

from __future__ import annotations

import datetime as dt
import json
import sqlite3
from pathlib import Path

import pytest

from daemon.commands.cli import main
from daemon.station.fitting import fit_stored_session
from daemon.store.reader import open_readonly, stored_configuration
from daemon.store.writer import Store
from tests.synthetic_store import CONFIG_PATH, DAY, build_day
from tests.test_status import _copy

UTC = dt.UTC
NOW = dt.datetime(2027, 2, 16, 1, 0, tzinfo=UTC)


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    return build_day(tmp_path_factory.mktemp("prov") / "day.db")


def _refit_with_recorded_config(path: Path, day) -> int:
    with Store.open(path) as store:
        cid = store.record_configuration(CONFIG_PATH.read_text(), str(CONFIG_PATH), "0.1.0",
                                         NOW)
        for session in ("am", "pm"):
            fit_stored_session(store, day.config, DAY.isoformat(), session, NOW)
    return cid


def test_sha256_of_the_text_and_one_row_per_text_version_and_origin(tmp_path):
    with Store.open(tmp_path / "s.db") as store:
        first = store.record_configuration("abc", "a.yaml", "0.1.0", NOW)
        again = store.record_configuration("abc", "b.yaml", "0.1.0", NOW + dt.timedelta(hours=1))
        other = store.record_configuration("abc", "a.yaml", "0.2.0", NOW)
        bench = store.record_configuration("abc", "a.yaml", "0.1.0", NOW, origin="bench")
        with pytest.raises(ValueError, match="origin"):
            store.record_configuration("abc", "a.yaml", "0.1.0", NOW, origin="elsewhere")
        with pytest.raises(ValueError, match="empty"):
            store.record_configuration("  \n", "a.yaml", "0.1.0", NOW)
    assert first == again and len({first, other, bench}) == 3
    conn = open_readonly(tmp_path / "s.db")
    row = stored_configuration(conn, first)
    conn.close()
    # FIPS 180-2, Appendix B.1: SHA-256("abc").
    assert row["sha256"] == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert row["source"] == "b.yaml" and row["last_used_utc"].startswith("2027-02-16T02:00")


def test_results_and_calibrations_point_to_their_configuration(day, tmp_path, capsys):
    path = _copy(day, tmp_path)
    cid = _refit_with_recorded_config(path, day)
    assert main(["results", "--from", DAY.isoformat(), "--db", str(path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert {r["configuration_id"] for r in out["results"]} == {cid}
    assert [c["id"] for c in out["configurations"]] == [cid]
    assert out["configurations"][0]["origin"] == "service"
    assert main(["results", "--from", DAY.isoformat(), "--db", str(path)]) == 0
    text = capsys.readouterr().out
    assert f"configuration {cid}: sha256 " in text and "service" in text
    # Calibrations: tests/test_readme_commands.py (a campaign needs three sessions).


def test_results_stored_before_provenance_say_so(day, capsys):
    assert main(["results", "--from", DAY.isoformat(), "--db", str(day.path)]) == 0
    assert "before configurations were recorded" in capsys.readouterr().out


def test_plot_and_report_use_the_recorded_configuration(day, tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("HELIOTROPE_CONFIG", str(tmp_path / "absent.yaml"))
    path = _copy(day, tmp_path)
    # Without a recorded configuration: exit 78, saying what to pass.
    assert main(["plot", "--date", DAY.isoformat(), "--channel", "500", "--db",
                 str(path)]) == 78
    assert "--config" in capsys.readouterr().err
    _refit_with_recorded_config(path, day)
    assert main(["plot", "--date", DAY.isoformat(), "--channel", "500", "--db",
                 str(path)]) == 0
    capsys.readouterr()
    assert main(["report", "--date", DAY.isoformat(), "--db", str(path), "--out",
                 str(tmp_path / "r.html")]) == 0
    assert "<html" in (tmp_path / "r.html").read_text().lower()


def test_a_recorded_configuration_this_version_refuses_is_exit_78(day, tmp_path, capsys):
    path = _copy(day, tmp_path)
    text = CONFIG_PATH.read_text() + "\nno_such_section: 1\n"
    with Store.open(path) as store:
        store.record_configuration(text, "future.yaml", "9.0.0", NOW)
    assert main(["plot", "--date", DAY.isoformat(), "--channel", "500", "--db",
                 str(path)]) == 78
    err = capsys.readouterr().err
    assert "no_such_section" in err and "recorded by the store" in err and "--config" in err


def test_a_store_from_before_provenance_is_upgraded_and_keeps_its_results(tmp_path, capsys):
    """A store at m004 (the schema before this one): opening it adds m005 in place, its
    old results point to no configuration, and new results to the recorded one."""
    from sqlite_utils import Database

    from daemon.store import writer

    path = tmp_path / "old.db"
    db = Database(path)
    writer.migrations.apply(db, stop_before="m005_configurations")
    db.close()
    row = {"channel": "500", "wavelength_nm": 500.0, "v0": 3.0, "v0_1au": 3.1,
           "v0_rel_unc": 0.003, "tau": 0.12, "n_used": 17, "n_total": 17,
           "airmass_min": 2.0, "airmass_max": 6.0, "accepted": True, "reasons": []}
    conn = sqlite3.connect(path)
    conn.execute("INSERT INTO session_results (plan_date, session, channel, v0_1au, "
                 "accepted, fitted_utc) VALUES ('2027-02-14', 'am', '500', 3.1, 1, "
                 "'2027-02-14T20:00:00+00:00')")
    conn.commit()
    conn.close()
    with Store.open(path) as store:
        cid = store.record_configuration(CONFIG_PATH.read_text(), str(CONFIG_PATH), "0.1.0",
                                         NOW)
        store.save_session_results(DAY.isoformat(), "am", [row], fitted_utc=NOW)
    assert main(["results", "--from", "2027-02-14", "--to", DAY.isoformat(), "--db",
                 str(path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert [(r["date"], r["configuration_id"]) for r in out["results"]] == \
        [("2027-02-14", None), (DAY.isoformat(), cid)]


def test_demo_never_appends_simulated_days_to_a_station_store(tmp_path, capsys):
    path = tmp_path / "station.db"
    with Store.open(path) as store:
        store.record_configuration(CONFIG_PATH.read_text(), str(CONFIG_PATH), "0.1.0", NOW)
    before = path.read_bytes()
    assert main(["demo", "--append", "--db", str(path)]) == 64
    assert "station's" in capsys.readouterr().err
    assert path.read_bytes() == before


# --------------------------------------------------------------------------- JSON form

def test_the_json_form_holds_the_data_exactly_or_is_not_kept():
    """JSON (RFC 8259) has no dates, no non-finite numbers and only text keys, and a
    Python json round trip turns an integer key into text: such data keeps no JSON form
    (the text is parsed instead); everything else comes back value for value and type
    for type (common practice, no source)."""
    from daemon.config.yamltext import json_form, parse_yaml

    data = parse_yaml(CONFIG_PATH.read_text())
    assert json.loads(json_form(data)) == data
    for text in ("a: 2027-02-15\n", "a: .nan\n", "a: .inf\n", "500: x\n", "a: {1: 2}\n",
                 "true: 1\n"):
        assert json_form(parse_yaml(text)) is None, text
    assert json_form(parse_yaml("a: [1, 1.0, true, null, 'é']\n")) == \
        '{"a":[1,1.0,true,null,"é"]}'


def test_a_recorded_configuration_keeps_its_json_form_and_the_read_commands_use_it(
        tmp_path):
    from daemon.commands.storedconfig import choose_config
    from daemon.config.yamltext import parse_yaml

    path = tmp_path / "s.db"
    commented = CONFIG_PATH.read_text() + "\n# moved to the east pier, 2027-02-15\n"
    with Store.open(path) as store:
        store.record_configuration(commented, "pier.yaml", "0.1.0", NOW)
    conn = open_readonly(path)
    try:
        (stored,) = conn.execute("SELECT data_json FROM configurations").fetchone()
    finally:
        conn.close()
    assert json.loads(stored) == parse_yaml(CONFIG_PATH.read_text())  # comments go
    from_json = choose_config(None, path, "test")
    from_file = choose_config(str(CONFIG_PATH), None, "test").config
    assert from_json.config.text == commented and "data_json" not in from_json.stored
    # Without the JSON form (a store written before it, or data JSON cannot hold) the
    # text is parsed: the same configuration.
    with sqlite3.connect(path) as c:
        c.execute("UPDATE configurations SET data_json = NULL")
    from_text = choose_config(None, path, "test").config
    for config in (from_json.config, from_text):
        assert (config.site, config.channels, config.fit, config.plan) == \
            (from_file.site, from_file.channels, from_file.fit, from_file.plan)


def test_the_upgrade_to_m008_gives_recorded_configurations_their_json_form(tmp_path):
    from sqlite_utils import Database

    from daemon.store import writer

    path = tmp_path / "old.db"
    db = Database(path)
    writer.migrations.apply(db, stop_before="m008_configuration_data")
    db["configurations"].insert({
        "sha256": "0" * 64, "text": CONFIG_PATH.read_text(), "source": "old.yaml",
        "software_version": "0.0.9", "origin": "service",
        "first_used_utc": "2027-02-14T00:00:00+00:00",
        "last_used_utc": "2027-02-14T00:00:00+00:00"})
    db["configurations"].insert({
        "sha256": "1" * 64, "text": "a: 2027-02-15\n", "source": "dated.yaml",
        "software_version": "0.0.9", "origin": "service",
        "first_used_utc": "2027-02-13T00:00:00+00:00",
        "last_used_utc": "2027-02-13T00:00:00+00:00"})
    db.close()
    with Store.open(path):
        pass
    conn = open_readonly(path)
    try:
        got = dict(conn.execute("SELECT source, data_json FROM configurations").fetchall())
        newest = stored_configuration(conn)
    finally:
        conn.close()
    from daemon.config.yamltext import parse_yaml
    assert json.loads(got["old.yaml"]) == parse_yaml(CONFIG_PATH.read_text())
    assert got["dated.yaml"] is None
    assert newest["source"] == "old.yaml" and newest["data_json"] == got["old.yaml"]
