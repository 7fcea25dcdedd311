"""The Langley-versus-lamp check against the ASTM G173 extraterrestrial spectrum."""

from __future__ import annotations

import datetime as dt
import json
import math
from dataclasses import replace

import pytest

from daemon.config.settings import Channel
from daemon.science.filters import astm_filter_mean_w_m2_nm, channel_filter
from daemon.science.lamp import astm_g173_band_mean_w_m2_nm, lamp_check, lamp_note
from daemon.station.fitting import fit_stored_session
from daemon.store.writer import Store
from tests.langley_sessions import pico_config, simulate_session


@pytest.mark.parametrize("wavelength_nm, box_mean", [
    # ASTM G173-03 extraterrestrial column, 10-nm box means (docs/REFERENCES.md, F).
    (380, 1.0873), (440, 1.8263), (500, 1.9191), (675, 1.5093), (870, 0.9497),
    (940, 0.8397), (1020, 0.7034),
])
def test_astm_band_means_match_the_reference_table(wavelength_nm, box_mean):
    assert astm_g173_band_mean_w_m2_nm(wavelength_nm, 10.0) == pytest.approx(box_mean,
                                                                           abs=6e-4)


def test_bad_bands_are_refused():
    with pytest.raises(ValueError, match="ASTM G173 covers"):
        astm_g173_band_mean_w_m2_nm(270.0, 10.0)
    with pytest.raises(ValueError, match="positive"):
        astm_g173_band_mean_w_m2_nm(500.0, 0.0)


def test_lamp_check_ratio_and_note():
    ch = Channel("500", 500.0, 10.0, responsivity_v_per_w_m2_nm=1.6)
    e0, ref, ratio = lamp_check(1.6 * 1.9191 * 1.01, ch)
    assert e0 == pytest.approx(1.9191 * 1.01, rel=1e-12)
    assert ratio == pytest.approx(1.01 * 1.9191 / ref, rel=1e-12)
    assert lamp_check(1.0, replace(ch, responsivity_v_per_w_m2_nm=None)) is None
    assert lamp_check(math.nan, ch) is None
    assert lamp_note((1.9, 1.92, 0.9896)).startswith("Langley versus lamp: V0 at 1 AU")


def test_session_fit_reports_the_lamp_check(tmp_path):
    # A responsivity that makes the simulator's V0 equal the ASTM band mean: the
    # ratio from the fitted V0 is then 1 within the fit's error.
    s = simulate_session(dt.date(2027, 2, 15), "pm", "clear", 1, wander_sd_500=0.0)
    config = pico_config()
    resp = s.v0_1au_true["675"] / astm_filter_mean_w_m2_nm(
        channel_filter(config.channel("675")))
    config = replace(config, channels=tuple(
        replace(c, responsivity_v_per_w_m2_nm=resp) if c.name == "675" else c
        for c in config.channels))
    store = Store.open(tmp_path / "h.db")
    try:
        for rec in s.records():
            store.record_measurement(rec)
        fit_stored_session(store, config, s.date, "pm", dt.datetime.now(dt.UTC))
        notes = json.loads(store.conn.execute(
            "SELECT notes FROM session_results WHERE channel = '675'").fetchone()[0])
    finally:
        store.close()
    note = next(n for n in notes if n.startswith("Langley versus lamp"))
    ratio = float(note.split(" times ")[0].rsplit(", ", 1)[1])
    assert ratio == pytest.approx(1.0, abs=0.002)
