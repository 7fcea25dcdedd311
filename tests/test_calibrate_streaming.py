"""``calibrate`` feeds its AOD values to the store in batches of whole sessions instead of
holding the campaign, stores them with one prepared statement, and imports neither
pvlib nor scipy (the station pressure from elevation is written out, held to pvlib's)."""

from __future__ import annotations

import datetime as dt
import shutil
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import pvlib
import pytest
from sqlite_utils import Database

import daemon.station.fitting as fitting
from daemon.config.settings import load_config
from daemon.science.atmosphere import site_pressure_hpa
from daemon.store.reader import stored_calibration
from daemon.store.writer import Store
from tests.synthetic_store import CONFIG_PATH, DAY, V0, build_day

ROOT = Path(__file__).resolve().parent.parent
NOW = dt.datetime(2027, 2, 16, 12, 0, tzinfo=dt.UTC)


@pytest.mark.parametrize("elevation_m", [-400.0, 0.0, 1000.0, 3580.0, 5400.0])
def test_station_pressure_matches_pvlib(elevation_m):
    # Reference: pvlib.atmosphere.alt2pres [Pa] (Portland State Aerospace Society 2004).
    site = replace(load_config(CONFIG_PATH).site, elevation_m=elevation_m, pressure_hpa=None)
    expected = float(pvlib.atmosphere.alt2pres(elevation_m)) / 100.0
    assert site_pressure_hpa(site) == pytest.approx(expected, rel=1e-12)


def test_calibrate_and_the_fits_import_no_pvlib_or_scipy():
    # The read path's rule (DESIGN.md) for the heavy libraries, applied to calibrate
    # and the session fit; sqlite-utils itself pulls in pandas when it is installed.
    code = ("import sys, daemon.commands.calibrate, daemon.station.fitting; "
            "print(sorted({'pvlib', 'scipy', 'h5py', 'requests'} "
            "& {m.split('.')[0] for m in sys.modules}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=ROOT)
    assert out.stdout.strip() == "[]"



def test_computing_the_aerosol_loads_no_pvlib_either(tmp_path):
    """Not only the imports: computing a calibrated day's AOD (what calibrate does after
    the campaign) loads none of them. It did, through the water-vapour step's Rayleigh
    and ozone air mass taken from the solar module, imported even with no 940 nm
    channel: 1.5 s and about 50 MB more per calibrate."""
    path = tmp_path / "day.db"
    cal = _calibrated_day(path)
    code = ("import sys\n"
            "from daemon.config.settings import load_config\n"
            "from daemon.station.fitting import update_aod\n"
            "from daemon.store.reader import stored_calibration\n"
            "from daemon.store.writer import Store\n"
            f"with Store.open({str(path)!r}) as s:\n"
            f"    cal = stored_calibration(s.conn, {cal['id']})\n"
            f"    n = update_aod(s, load_config({str(CONFIG_PATH)!r}), {DAY.isoformat()!r}, "
            f"{DAY.isoformat()!r}, calibration=cal)\n"
            "print(n, sorted({'pvlib', 'scipy', 'h5py', 'requests'} "
            "& {m.split('.')[0] for m in sys.modules}))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=ROOT, timeout=120)
    assert out.returncode == 0, out.stderr
    n, modules = out.stdout.split(None, 1)
    assert int(n) > 0 and modules.strip() == "[]", out.stdout


def _calibrated_day(path: Path) -> dict:
    build_day(path)
    cfg = load_config(CONFIG_PATH)
    rows = [{"channel": c.name, "wavelength_nm": c.wavelength_nm, "v0_1au": V0[c.name],
             "v0_1au_unc": 0.001, "repeatability_pct": 0.2, "n_sessions": 3,
             "n_flagged": 0, "drift_pct_per_year": None, "drift_unc_pct_per_year": None,
             "usable": True, "sessions": [], "reasons": []}
            for c in cfg.channels if c.name in V0]
    with Store.open(path) as s:
        cid = s.save_calibration(NOW, DAY.isoformat(), DAY.isoformat(), cfg.site.name,
                                 {}, [], rows)
        return stored_calibration(s.conn, cid)


def _aod(path: Path) -> tuple[list, list]:
    db = Database(path)
    try:
        return (list(db.query("SELECT * FROM aod ORDER BY measurement_id, channel")),
                list(db.query("SELECT * FROM aod_angstrom ORDER BY measurement_id")))
    finally:
        db.close()


def _two_copies(tmp_path: Path) -> tuple[Path, Path, dict]:
    """The calibrated day twice (no AOD yet in either), and the calibration."""
    first, second = tmp_path / "first.db", tmp_path / "second.db"
    cal = _calibrated_day(first)
    shutil.copy(first, second)
    return first, second, cal


def test_batches_store_what_one_batch_stores(tmp_path, monkeypatch):
    one, many, cal = _two_copies(tmp_path)
    cfg = load_config(CONFIG_PATH)
    counts = {}
    for path, batch in ((one, 10**9), (many, 1)):
        monkeypatch.setattr(fitting, "AOD_BATCH_ROWS", batch)
        with Store.open(path) as s:
            counts[path] = fitting.update_aod(s, cfg, DAY.isoformat(), DAY.isoformat(),
                                              calibration=cal)
    aod_one, alpha_one = _aod(one)
    assert counts[one] == counts[many] == len(aod_one) > 0
    assert _aod(many) == (aod_one, alpha_one)  # common practice, no source


def test_the_prepared_insert_stores_what_sqlite_utils_stores(tmp_path, monkeypatch):
    ours, ref, cal = _two_copies(tmp_path)
    cfg = load_config(CONFIG_PATH)
    seen: list[tuple[list, list]] = []
    original = Store.save_aod

    def keep(self, rows, angstrom=()):
        rows, angstrom = list(rows), list(angstrom)
        seen.append((rows, angstrom))
        return original(self, rows, angstrom)

    monkeypatch.setattr(Store, "save_aod", keep)
    with Store.open(ours) as s:
        fitting.update_aod(s, cfg, DAY.isoformat(), DAY.isoformat(), calibration=cal)
    # Reference: sqlite-utils' own insert_all(replace=True) of the same cleaned rows.
    text = ("channel", "flag", "channel_short", "channel_long")
    ints = ("measurement_id", "calibration_id")

    def tidy(r):  # NaN to NULL, as save_aod documents
        return {k: (v if k in text else int(v) if k in ints else
                    (None if v is None or v != v else float(v))) for k, v in r.items()}

    db = Database(ref)
    for rows, angstrom in seen:
        db["aod"].insert_all([tidy(r) for r in rows], replace=True)
        db["aod_angstrom"].insert_all([tidy(r) for r in angstrom], replace=True)
    db.conn.commit()
    db.close()
    assert _aod(ours) == _aod(ref)
    assert _aod(ours)[0]


def test_an_unknown_column_is_refused(tmp_path):
    with Store.open(tmp_path / "s.db") as s, pytest.raises(ValueError, match="no column wobble"):
        s.save_aod([{"measurement_id": 1, "channel": "500", "wobble": 1.0}])
