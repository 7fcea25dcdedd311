"""`heliotrope probe` on a text-command station: the same five readings through the
driver interfaces as on the reference and Modbus stations, the tracker never moved,
and the dark-level hint when the simulator's clock puts the site at night."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from daemon.commands import cli
from daemon.station.bench import simulator

CONFIG = Path(__file__).resolve().parents[1] / "config" / "pico-sereno-scpi.yaml"


@pytest.fixture(scope="module")
def sim():
    # 04:00 UTC is about 21:15 local mean solar time at Pico Sereno (101.3 W): night.
    with simulator("pico-sereno-clear", seed=3, port="pty",
                   sim_args=("--family", "text",
                             "--start-utc", "2025-02-12T04:00:00Z")) as ends:
        yield ends


def test_probe_reads_every_device_of_the_text_station(capsys, sim):
    code = cli.main(["probe", "--config", str(CONFIG), "--radiometer-port", sim.radiometer,
                     "--tracker-port", sim.tracker, "--json"])
    report = json.loads(capsys.readouterr().out)
    assert code == 0, report["problems"]
    assert [(c["device"], c["command"]) for c in report["checks"]] == [
        ("radiometer", "identify"), ("radiometer", "burst 10"),
        ("radiometer", "housekeeping"), ("tracker", "identify"), ("tracker", "state")]
    by = {(c["device"], c["command"]): c["reading"] for c in report["checks"]}
    assert by[("tracker", "state")]["mode"] == "parked"  # never moved
    assert report["tracker_moved"] is False
    # Night at the site: every channel at dark level, and the probe says what it means.
    assert any("dark level" in n and "sun is down" in n for n in report["notes"]), report
