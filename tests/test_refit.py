"""``heliotrope refit``: the offline fit of a readings CSV, and its bad-input messages."""

from __future__ import annotations

import datetime as dt
import json
from dataclasses import replace

import numpy as np
import pytest

from daemon.commands.cli import main
from daemon.commands.refit import RefitError, read_readings, refit_file, refit_readings
from daemon.station.fitting import fit_stored_session
from daemon.store.reader import RESULT_KEYS
from daemon.store.writer import Store
from tests.langley_sessions import CONFIG_PATH, pico_config, simulate_session

DAY = dt.date(2027, 2, 15)
NOW = dt.datetime(2027, 2, 16, 3, 0, tzinfo=dt.UTC)


def _csv(sessions, with_optional=True) -> str:
    head = "time_utc,channel,signal" + (",pressure_hpa,detector_temp_c" if with_optional
                                        else "")
    lines = [head]
    for s in sessions:
        net = s.net_signal()
        for i, t in enumerate(s.times):
            for j, name in enumerate(s.channels):
                row = f"{t.isoformat().replace('+00:00', 'Z')},{name},{float(net[i, j])!r}"
                if with_optional:
                    row += f",{s.pressure_hpa[i]:.1f},25.0"
                lines.append(row)
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def day_sessions():
    return [simulate_session(DAY, "am", "clear", 2), simulate_session(DAY, "pm", "clear", 2)]


def test_refit_recovers_the_day_and_splits_morning_and_afternoon(tmp_path, day_sessions):
    path = tmp_path / "readings.csv"
    path.write_text(_csv(day_sessions))
    out = refit_file(path, pico_config())
    assert out["readings"] == sum(len(s.times) for s in day_sessions) * 6
    assert [(r["date"], r["session"]) for r in out["results"]] == (
        [("2027-02-15", "am")] * 6 + [("2027-02-15", "pm")] * 6)
    truth = day_sessions[0].v0_1au_true
    for r in out["results"]:
        assert tuple(r) == RESULT_KEYS
        assert r["accepted"], r["reasons"]
        # Simulated clear day (invented truth); the aerosol wander and the noise
        # leave a few tenths of a percent, as on a real high-mountain day.
        assert r["v0_1au"] == pytest.approx(truth[r["channel"]], rel=0.005)
    assert len(out["details"]) == 12 and all("notes" in d for d in out["details"])


def test_refit_gives_the_same_numbers_as_the_service_fit(tmp_path, day_sessions):
    s = day_sessions[0]
    path = tmp_path / "am.csv"
    path.write_text(_csv([s]))
    offline = refit_file(path, pico_config())["results"]
    store = Store.open(tmp_path / "h.db")
    try:
        for rec in s.records():
            store.record_measurement(rec)
        online = fit_stored_session(store, pico_config(), s.date, "am", NOW)
    finally:
        store.close()
    for a, b in zip(offline, online, strict=True):
        assert a["channel"] == b["channel"] and a["n_used"] == b["n_used"]
        # Same fit; the air masses differ only by the refraction pressure (nominal
        # here, measured in the service): parts in a million.
        assert a["v0_1au"] == pytest.approx(b["v0_1au"], rel=2e-5)
        assert a["tau"] == pytest.approx(b["tau"], abs=2e-5)


def test_detector_temperature_column_is_applied(day_sessions):
    config = pico_config()
    warm = replace(config, channels=tuple(replace(c, temp_coeff_per_k=0.003)
                                          if c.name == "1020" else c
                                          for c in config.channels))
    s = day_sessions[1]
    temps = np.linspace(15.0, 35.0, len(s.times))
    gain = 1 + 0.003 * (temps - 25.0)  # the detector's response to its temperature
    lines = ["time_utc,channel,signal,detector_temp_c"]
    net = s.net_signal()
    for i, t in enumerate(s.times):
        for j, name in enumerate(s.channels):
            lines.append(f"{t.isoformat()},{name},{float(net[i, j] * gain[i])!r},{temps[i]:.2f}")
    readings = read_readings("\n".join(lines), warm)
    good = refit_readings(readings, warm)["results"][-1]
    bad = refit_readings(readings, config)["results"][-1]
    truth = s.v0_1au_true["1020"]
    assert abs(good["v0_1au"] / truth - 1) < 0.003
    assert abs(bad["v0_1au"] / truth - 1) > 0.01


@pytest.mark.parametrize("text, message", [
    ("", "the file is empty; expected a header line 'time_utc,channel,signal'"),
    ("\n\n", "the file is empty"),
    ("time,channel,signal\n", "line 1: unknown column 'time' in the header"),
    ("time_utc,signal\n", "line 1: the header lacks channel"),
    ("time_utc,channel,signal,signal\n", "line 1: column 'signal' appears twice"),
    ("time_utc,channel,signal\n", "no readings after the header on line 1"),
    ("time_utc,channel,signal\n2027-02-15T13:00:00Z,500\n",
     "line 2: 2 fields, but the header has 3"),
    ("time_utc,channel,signal\nyesterday,500,1.0\n",
     "line 2: time_utc 'yesterday' is not an ISO 8601 time"),
    ("# notes\ntime_utc,channel,signal\n", "line 1: unknown column '# notes'"),
    ("time_utc,channel,signal\n2027-02-15T13:00:00Z,940,1.0\n",
     "line 2: unknown channel '940'; the configuration"),
    ("time_utc,channel,signal\n2027-02-15T13:00:00Z,500,high\n",
     "line 2: signal 'high' is not a number"),
    ("time_utc,channel,signal\n2027-02-15T13:00:00Z,500,\n", "line 2: signal is empty"),
    ("time_utc,channel,signal,pressure_hpa\n2027-02-15T13:00:00Z,500,1.0,64.5\n",
     "line 2: pressure_hpa 64.5 is out of range; allowed 300 to 1100 hPa"),
    ("time_utc,channel,signal\n\n2027-02-15T13:00:00Z,500,1.0\n"
     "2027-02-15T13:00:00+00:00,500,1.1\n",
     "line 4: a second reading of channel 500 at 2027-02-15T13:00:00+00:00 (the first is "
     "on line 3)"),
    ('time_utc,channel,signal\n2027-02-15T13:00:00Z,"500,1.0\n', "not valid CSV"),
])
def test_malformed_files_name_the_line(text, message):
    with pytest.raises(RefitError) as err:
        read_readings(text, pico_config(), "r.csv")
    assert message in str(err.value)
    assert str(err.value).startswith("r.csv")


@pytest.mark.parametrize("signals, phrase", [
    (["1.0"], "only 1 usable point of 1"),
    (["nan", "nan", "nan"], "3 points dropped: signal not finite"),
    (["0", "-0.5", "0"], "3 points dropped: signal zero or negative"),
])
def test_values_the_fit_can_judge_become_reasons(signals, phrase):
    lines = ["time_utc,channel,signal"]
    for i, v in enumerate(signals):
        lines.append(f"2027-02-15T14:{10 + 10 * i}:00Z,500,{v}")
    out = refit_readings(read_readings("\n".join(lines), pico_config()), pico_config())
    row = next(r for r in out["results"] if r["channel"] == "500")
    assert not row["accepted"] and row["v0"] is None
    assert any(phrase in x for x in row["reasons"]), row["reasons"]
    json.dumps(out, allow_nan=False)


def test_readings_at_night_are_dropped_with_a_reason():
    lines = ["time_utc,channel,signal"] + [f"2027-02-15T0{h}:00:00Z,675,1.0" for h in range(5)]
    out = refit_readings(read_readings("\n".join(lines), pico_config()), pico_config())
    row = next(r for r in out["results"] if r["channel"] == "675")
    assert any("air mass not finite" in x for x in row["reasons"])


def test_refit_command_exit_codes_and_json(tmp_path, capsys, day_sessions):
    good = tmp_path / "good.csv"
    good.write_text(_csv(day_sessions[:1], with_optional=False))
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(good), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert len(out["results"]) == 6 and set(out["results"][0]) == set(RESULT_KEYS)
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(good)]) == 0
    text = capsys.readouterr().out
    assert max(len(line) for line in text.splitlines() if str(good) not in line) <= 80

    bad = tmp_path / "bad.csv"
    bad.write_text("time_utc,channel,signal\n2027-02-15T13:00:00Z,500,x\n")
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(bad)]) == 65
    err = capsys.readouterr().err
    assert "line 2: signal 'x' is not a number" in err and "Traceback" not in err
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(empty)]) == 65
    binary = tmp_path / "bin.csv"
    binary.write_bytes(b"\xff\xfe\x00garbage")
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(binary)]) == 65
    assert "not UTF-8 text" in capsys.readouterr().err
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv",
                 str(tmp_path / "none.csv")]) == 66
    assert main(["refit", "--config", str(tmp_path / "none.yaml"), "--csv", str(good)]) == 78
