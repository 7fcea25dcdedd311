"""Aerosol optical depth per measurement and the Angstrom exponent."""

from __future__ import annotations

import datetime as dt
import math
import sqlite3
from dataclasses import replace

import numpy as np
import pytest

from daemon.config.settings import Channel
from daemon.science import solar
from daemon.science.aod import aerosol_optical_depth, angstrom_exponent, angstrom_pair
from daemon.station import fitting as fitting_mod
from daemon.station.fitting import fit_stored_session, update_aod
from daemon.store.reader import aod_between, open_readonly, stored_calibration
from daemon.store.writer import Store
from tests.langley_sessions import pico_config, simulate_session

NOW = dt.datetime(2027, 2, 16, 3, 0, tzinfo=dt.UTC)
DAY = dt.date(2027, 2, 15)
# Rayleigh optical depth at 1013.25 hPa by channel [nm]: Bodhaine, B. A. et al. (1999),
# J. Atmos. Oceanic Technol. 16:1854-1861, eq. 30, table in docs/REFERENCES.md (F).
BODHAINE_1013_HPA = {380.0: 0.44618, 440.0: 0.24261, 500.0: 0.14335, 675.0: 0.04220,
                     870.0: 0.01513, 1020.0: 0.00798}


def test_aerosol_optical_depth_of_noise_free_beer_lambert():
    # Beer-Lambert with Rayleigh (Bodhaine at 645 hPa), ozone on the Komhyr air mass
    # and aerosol on the Kasten-Young air mass (docs/REFERENCES.md).
    m = float(solar.relative_airmass(75.0))
    m_o3 = float(solar.ozone_airmass(75.0, 3650.0))
    tau_r = float(solar.rayleigh_optical_depth(500.0, 645.0))
    assert tau_r == pytest.approx(0.14335 * 645 / 1013.25, rel=1e-4)  # docs/REFERENCES.md table
    tau_o3, tau_a, v0, f = 0.0083, 0.0312, 3.1, 1.0296
    v = v0 * f * math.exp(-tau_r * m - tau_o3 * m_o3 - tau_a * m)
    total, aerosol = aerosol_optical_depth(v, v0, f, m, m_o3, tau_r, tau_o3)
    assert aerosol == pytest.approx(tau_a, abs=1e-12)
    assert total == pytest.approx(tau_r + tau_a + tau_o3 * m_o3 / m, abs=1e-12)
    with pytest.raises(ValueError, match="must be positive"):
        aerosol_optical_depth(0.0, v0, f, m, m_o3, tau_r, tau_o3)


def test_a_v0_error_gives_an_aod_error_of_e_over_m():
    # A relative error e in V0 gives an optical-depth error e/m (docs/REFERENCES.md, F).
    m = 3.0
    _, a = aerosol_optical_depth(1.0, 2.0, 1.0, m, m, 0.1, 0.0)
    _, b = aerosol_optical_depth(1.0, 2.0 * 1.01, 1.0, m, m, 0.1, 0.0)
    assert b - a == pytest.approx(math.log(1.01) / m, rel=1e-12)


def test_angstrom_exponent_of_a_power_law():
    # Angstrom, A. (1929), Geogr. Ann. 11:156-166: tau = beta lambda^-alpha.
    alpha, beta = 1.3, 0.02
    t1, t2 = beta * (0.44) ** -alpha, beta * (0.87) ** -alpha
    assert angstrom_exponent(t1, 440.0, t2, 870.0) == pytest.approx(alpha, rel=1e-12)
    assert math.isnan(angstrom_exponent(-0.01, 440.0, t2, 870.0))
    assert math.isnan(angstrom_exponent(t1, 440.0, t2, 440.0))


def test_angstrom_pair_default_and_configured():
    config = pico_config()
    assert [c.name for c in angstrom_pair(config)] == ["440", "870"]
    chosen = replace(config, fit=replace(config.fit, angstrom_channels=("1020", "380")))
    assert [c.name for c in angstrom_pair(chosen)] == ["380", "1020"]
    one = replace(config, channels=(Channel("500", 500.0, 10.0),))
    assert angstrom_pair(one) is None


def _calibration(store, truth, first="2027-02-15", last="2027-02-15"):
    rows = [{"channel": name, "wavelength_nm": float(name), "v0_1au": v0,
             "v0_1au_unc": v0 * 0.001, "repeatability_pct": 0.2, "n_sessions": 10,
             "n_flagged": 0, "drift_pct_per_year": None, "drift_unc_pct_per_year": None,
             "e0_1au_w_m2_nm": None, "astm_ratio": None, "usable": True, "sessions": [],
             "reasons": []} for name, v0 in truth.items()]
    return store.save_calibration(NOW, first, last, "Pico Sereno Station", {}, [], rows)


def test_aod_is_stored_after_each_session_fit_once_a_calibration_exists(tmp_path):
    config = pico_config()
    am = simulate_session(DAY, "am", "cirrus", seed=4)
    pm = simulate_session(DAY, "pm", "clear", seed=4, ozone_du=260.0)
    store = Store.open(tmp_path / "h.db")
    try:
        for rec in am.records():
            store.record_measurement(rec)
        fit_stored_session(store, config, am.date, "am", NOW)
        assert store.conn.execute("SELECT count(*) FROM aod").fetchone()[0] == 0
        cid = _calibration(store, am.v0_1au_true)
        ids = [store.record_measurement(rec) for rec in pm.records()]
        fit_stored_session(store, config, pm.date, "pm", NOW)
    finally:
        store.close()
    conn = open_readonly(tmp_path / "h.db")
    try:
        rows = list(aod_between(conn, DAY, DAY))
    finally:
        conn.close()
    # Only the session fitted after the calibration got its AOD.
    assert {r["session"] for r in rows} == {"pm"}
    assert len(rows) == len(ids) * 6
    truth = dict(zip(ids, pm.aod_true, strict=True))
    names = list(pm.channels)
    for r in rows:
        assert r["calibration_id"] == cid and r["flag"] is None
        true = truth[r["measurement_id"]][names.index(r["channel"])]
        # True V0 and the nominal ozone column: what is left is detector noise over m
        # and the daemon's own geometry (its delta T differs from the simulator's by a
        # few seconds: about 0.1 % in m near m = 6).
        assert r["aod"] == pytest.approx(true, abs=3e-4)
        assert r["aod_unc"] == pytest.approx(0.001 / r["airmass"], rel=1e-9)
        # Bodhaine et al. (1999) eq. 30 at 1013.25 hPa, 5-decimal table in
        # docs/REFERENCES.md (F), scaled by p / 1013.25 hPa as that file says.
        assert r["tau_rayleigh"] == pytest.approx(
            BODHAINE_1013_HPA[r["wavelength_nm"]] * r["pressure_hpa"] / 1013.25, abs=4e-6)
        assert r["angstrom_alpha"] is not None


def test_update_aod_for_a_range_flags_cloudy_bursts(tmp_path):
    config = pico_config()
    s = simulate_session(DAY, "am", "clear", seed=5)
    store = Store.open(tmp_path / "h.db")
    try:
        assert update_aod(store, config, "2027-02-15", "2027-02-15") == 0  # no calibration
        recs = s.records()
        # A cloud edge during one burst: large scatter between samples.
        noisy = tuple(tuple(v * (1.0 + (0.05 if i % 2 else -0.05)) for v in row)
                      for i, row in enumerate(recs[3].sun))
        recs[3] = replace(recs[3], sun=noisy)
        recs[5] = replace(recs[5], locked=False)
        ids = [store.record_measurement(r) for r in recs]
        _calibration(store, s.v0_1au_true)
        n = update_aod(store, config, "2027-02-15", "2027-02-15")
        record = stored_calibration(store.conn)
    finally:
        store.close()
    assert record is not None and record["channels"][0]["usable"] is True
    assert n == (len(ids) - 1) * 6  # the unlocked burst gets no AOD
    conn = open_readonly(tmp_path / "h.db")
    try:
        rows = list(aod_between(conn, "2027-02-14", "2027-02-16"))
    finally:
        conn.close()
    cloudy = [r for r in rows if r["measurement_id"] == ids[3]]
    assert cloudy and all(r["flag"].startswith("burst coefficient of variation") for r in cloudy)
    assert all(r["angstrom_alpha"] is None for r in cloudy)
    assert not any(r["measurement_id"] == ids[5] for r in rows)
    times = [r["time_utc"] for r in rows]
    assert times == sorted(times)


def test_aod_between_on_a_store_without_aod_tables(tmp_path):
    path = tmp_path / "old.db"
    with sqlite3.connect(path) as c:  # a store from before AOD existed
        c.execute("CREATE TABLE session_results (plan_date TEXT)")
    conn = open_readonly(path)
    try:
        assert list(aod_between(conn, "2027-01-01", "2027-12-31")) == []
        assert stored_calibration(conn) is None
        with pytest.raises(ValueError, match="before the start date"):
            list(aod_between(conn, "2027-02-02", "2027-02-01"))
    finally:
        conn.close()


def test_a_failing_aod_update_does_not_lose_the_fit(tmp_path, monkeypatch):
    config = pico_config()
    s = simulate_session(DAY, "am", "clear", seed=6)

    def broken(*args, **kwargs):
        raise RuntimeError("disk full")

    monkeypatch.setattr(fitting_mod, "update_aod", broken)
    store = Store.open(tmp_path / "h.db")
    try:
        for rec in s.records():
            store.record_measurement(rec)
        rows = fit_stored_session(store, config, s.date, "am", NOW)
        events = store.conn.execute("SELECT level, kind, message FROM events").fetchall()
    finally:
        store.close()
    assert all(r["accepted"] for r in rows)
    assert events == [("error", "aod", "2027-02-15 am: aerosol optical depth not computed "
                       "(disk full)")]
    assert np.isfinite([r["v0_1au"] for r in rows]).all()
