"""`heliotrope probe` on a Modbus station: identify, one burst, housekeeping and the
tracker's state through the drivers' interfaces, timed, with advice when a device does
not answer; the tracker is never moved."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import yaml

from daemon.commands import cli
from daemon.station.bench import simulator

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "config" / "pico-sereno-modbus.yaml"
SIM_ARGS = ("--family", "modbus-rtu", "--register-map", str(CONFIG))


@pytest.fixture(scope="module")
def sim():
    with simulator("pico-sereno-clear", seed=4, port="pty", sim_args=SIM_ARGS) as ends:
        yield ends


def _probe(capsys, config: Path, radiometer: str, tracker: str) -> tuple[int, dict]:
    code = cli.main(["probe", "--config", str(config), "--radiometer-port", radiometer,
                     "--tracker-port", tracker, "--json"])
    return code, json.loads(capsys.readouterr().out)


def test_probe_reads_every_device_of_the_modbus_station(capsys, sim):
    code, report = _probe(capsys, CONFIG, sim.radiometer, sim.tracker)
    assert code == 0, report["problems"]
    commands = [(c["device"], c["command"]) for c in report["checks"]]
    assert commands == [("radiometer", "identify"), ("radiometer", "burst 10"),
                        ("radiometer", "housekeeping"), ("tracker", "identify"),
                        ("tracker", "state")]
    assert all(c["round_trip_s"] > 0 for c in report["checks"])
    by = {(c["device"], c["command"]): c["reading"] for c in report["checks"]}
    assert by[("radiometer", "identify")]["model"] == "PS-AI8 analog input"
    assert by[("radiometer", "burst 10")]["channels"] == 6
    assert 600 < by[("radiometer", "housekeeping")]["pressure_hpa"] < 700
    # The scenario starts parked; a probe that moved it would find it slewing.
    assert by[("tracker", "state")]["mode"] == "parked"
    assert report["tracker_moved"] is False


def test_a_wrong_unit_id_gets_advice_naming_the_key(capsys, sim, tmp_path):
    data = yaml.safe_load(CONFIG.read_text())
    data["instrument"]["radiometer"]["options"]["unit_id"] = 9  # nobody answers 9
    data["instrument"]["radiometer"]["timeout_s"] = 0.2
    data["instrument"]["radiometer"]["retries"] = 0
    wrong = tmp_path / "wrong-unit.yaml"
    wrong.write_text(yaml.safe_dump(data))
    code, report = _probe(capsys, wrong, sim.radiometer, sim.tracker)
    assert code == 69  # EX_UNAVAILABLE
    first = report["checks"][0]
    assert first["problem"] == "no_answer"
    assert "instrument.radiometer.options.unit_id" in first["message"]
    assert [c["problem"] for c in report["checks"][1:3]] == ["not_tried", "not_tried"]


def test_a_missing_adapter_is_named_with_the_key(capsys, sim):
    code, report = _probe(capsys, CONFIG, "/dev/heliotrope-no-such-adapter", sim.tracker)
    assert code == 69
    first = report["checks"][0]
    assert first["problem"] == "no_port"
    assert "instrument.radiometer.port" in first["message"]
