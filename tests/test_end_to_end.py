"""One whole simulated clear day at Pico Sereno through the real protocol.

The simulator runs as its own process; the daemon reaches it through a real
pseudo-terminal (and, once, loopback TCP) exactly as it reaches the instrument in
the field."""

from __future__ import annotations

import json
import math
from datetime import date
from pathlib import Path

import pytest

from daemon.commands.cli import main
from daemon.config.settings import load_config
from daemon.station.bench import run_simulated_day

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"
DAY = date(2027, 2, 15)

CONTRACT_KEYS = {"date", "session", "channel", "wavelength_nm", "v0", "v0_1au", "v0_rel_unc",
                 "tau", "n_used", "n_total", "airmass_min", "airmass_max", "accepted",
                 "reasons"}


@pytest.fixture(scope="module")
def clear_day(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("e2e")
    return run_simulated_day(load_config(CONFIG), DAY, tmp / "day.db", "pico-sereno-clear",
                             seed=7, port="pty", work_dir=tmp)


@pytest.mark.slow
def test_clear_day_recovers_every_v0_within_half_a_percent(clear_day):
    # 0.5 % is the walking skeleton's acceptance figure on a clean simulated day; the
    # truth is the simulator's own V0 at 1 AU.
    truth = clear_day.truth["channels"]
    assert clear_day.targets_ok == clear_day.targets_planned > 30
    assert len(clear_day.results) == 12  # six channels, two sessions
    for r in clear_day.results:
        err = r["v0_1au"] / truth[r["channel"]]["v0_1au"] - 1.0
        assert abs(err) < 0.005, (r["channel"], r["session"], err)
        assert r["accepted"], r["reasons"]
        assert r["reasons"] == []
        assert 0 < r["v0_rel_unc"] < 0.005


@pytest.mark.slow
def test_results_follow_the_json_contract(clear_day):
    for r in clear_day.results:
        assert set(r) == CONTRACT_KEYS
        assert r["session"] in ("am", "pm") and r["date"] == DAY.isoformat()
        assert isinstance(r["accepted"], bool) and isinstance(r["reasons"], list)
        assert r["airmass_min"] >= 2.0 - 0.01 and r["airmass_max"] <= 6.0 + 0.01
        assert r["n_used"] <= r["n_total"]
        assert math.isfinite(r["tau"]) and r["tau"] > 0


@pytest.mark.slow
def test_today_reads_the_day_back_from_the_store(clear_day, capsys):
    assert main(["today", "--db", clear_day.store_path, "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)["results"]
    by_key = {(r["session"], r["channel"]): r for r in rows}
    for r in clear_day.results:
        stored = by_key[(r["session"], r["channel"])]
        assert stored["v0_1au"] == pytest.approx(r["v0_1au"], rel=1e-12)
    assert main(["today", "--db", clear_day.store_path]) == 0
    text = capsys.readouterr().out
    assert "380" in text and "1020" in text
    assert max(len(line) for line in text.splitlines()) <= 80


@pytest.mark.slow
def test_demo_over_tcp_prints_the_contract(tmp_path, capsys):
    assert main(["demo", "--port", "tcp:0", "--seed", "3", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert set(out["truth"]) == {"380", "440", "500", "675", "870", "1020"}
    assert len(out["results"]) == 12
    for r in out["results"]:
        assert set(r) == CONTRACT_KEYS
        assert abs(r["v0_1au"] / out["truth"][r["channel"]]["v0_1au"] - 1) < 0.005


def test_demo_says_why_the_simulator_did_not_start(capsys):
    assert main(["demo", "--scenario", "no-such-scenario"]) == 69
    err = capsys.readouterr().err
    assert "the simulator did not start" in err and "'no-such-scenario' not found" in err


def test_demo_refuses_a_scenario_at_another_site(capsys):
    assert main(["demo", "--scenario", "brightwater-hazy"]) == 69
    err = capsys.readouterr().err
    assert "scenario is at Brightwater College roof" in err
    assert "configuration is for Pico Sereno Station" in err
