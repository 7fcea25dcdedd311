"""Whole simulated days through the daemon: the simulator's scenarios seen end to end.

Each day runs daemon.station.bench.run_simulated_day: the simulator as its own process on
pseudo-terminals, the real drivers, planner, acquisition, store and fit. The truth is
the simulator's own V0 at 1 AU. (The fault-storm day through the daemon is
tests/test_fault_storm.py; every fault against the drivers is tests/test_link_faults.py.)
"""

from __future__ import annotations

from dataclasses import replace
from datetime import date
from pathlib import Path

import pytest

from daemon.config.settings import load_config
from daemon.station.bench import run_simulated_day

CONFIG_DIR = Path(__file__).resolve().parent.parent / "config"
PICO_DAY = date(2027, 2, 15)
BRIGHTWATER_DAY = date(2027, 6, 20)
WINDOW_CHANNELS = ("380", "440", "500", "675", "870", "1020")


def _day(tmp_path_factory, config: str, scenario: str, day: date, seed: int):
    tmp = tmp_path_factory.mktemp(scenario)
    cfg = load_config(CONFIG_DIR / config)
    # These scenarios run the simulator's reference sky (the fitter's own monochromatic
    # model): the corrections for a real sky's band and layers stay off.
    cfg = replace(cfg, fit=replace(cfg.fit, correct_model_terms=False))
    return run_simulated_day(cfg, day, tmp / "day.db", scenario, seed=seed, port="pty",
                             work_dir=tmp)


@pytest.fixture(scope="module")
def pico(tmp_path_factory):
    return _day(tmp_path_factory, "pico-sereno.yaml", "pico-sereno-clear", PICO_DAY, 11)


@pytest.fixture(scope="module")
def brightwater(tmp_path_factory):
    return _day(tmp_path_factory, "brightwater.yaml", "brightwater-hazy", BRIGHTWATER_DAY, 11)


def _errors(run) -> dict[tuple[str, str], float]:
    truth = run.truth["channels"]
    return {(r["session"], r["channel"]): r["v0_1au"] / truth[r["channel"]]["v0_1au"] - 1.0
            for r in run.results if r["v0_1au"] is not None}


@pytest.mark.slow
def test_hazy_low_site_errs_more_than_the_mountain_yet_within_ten_percent(pico, brightwater,
                                                                          capsys):
    # A drifting, flickering aerosol over a low site biases the Langley V0 by percents
    # (Weihs et al. 1995: 1.2-7 % at low sites; Shaw 1983 on drifting optical depth;
    # docs/REFERENCES.md), while a clean, stable mountain day gives a small fraction of a
    # percent. Rule of thumb of the trade: even a mid-latitude city site, on a
    # cloud-free day, recovers V0 within about 10 % (common practice, no source).
    pico_err, bw_err = _errors(pico), _errors(brightwater)
    with capsys.disabled():
        print("\nLangley V0 error against the simulator's truth [%]")
        print(f"{'session':8}{'channel':>8}{'Pico Sereno':>14}{'Brightwater':>14}")
        for session in ("am", "pm"):
            for ch in (*WINDOW_CHANNELS, "940"):
                p = pico_err.get((session, ch))
                b = bw_err.get((session, ch))
                cells = [f"{100 * x:+14.2f}" if x is not None else f"{'-':>14}"
                         for x in (p, b)]
                print(f"{session:8}{ch:>8}{cells[0]}{cells[1]}")
    assert pico.targets_ok == pico.targets_planned
    assert brightwater.targets_ok >= brightwater.targets_planned - 2
    pico_window = [abs(pico_err[(s, c)]) for s in ("am", "pm") for c in WINDOW_CHANNELS]
    bw_window = [abs(bw_err[(s, c)]) for s in ("am", "pm") for c in WINDOW_CHANNELS
                 if (s, c) in bw_err]
    assert len(bw_window) >= 10
    # Visibly worse: the largest Brightwater error is several times Pico Sereno's and
    # above 1 %; every Brightwater window channel stays within 10 %. (The 940 nm
    # channel is printed, not judged: how the daemon fits a water-vapour channel is the
    # fit's business, and its Langley is not straight by nature.)
    assert max(bw_window) > max(1.0e-2, 5 * max(pico_window))
    assert max(bw_window) < 0.10
    assert max(pico_window) < 0.001  # measured 0.04 % at worst on this seed

