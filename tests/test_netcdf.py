"""The NetCDF export, opened with a general-purpose reader (xarray, netCDF4 engine) and
checked against the CF conventions and the store's own CSV export."""

from __future__ import annotations

import csv
import datetime as dt
import io
from pathlib import Path

import numpy as np
import pytest

from daemon.commands.cli import main
from daemon.store.writer import Store
from tests.synthetic_store import CONFIG_PATH, DAY, build_day

xr = pytest.importorskip("xarray", reason="the NetCDF test reads the file with xarray "
                         "(test extra)")
pytest.importorskip("netCDF4", reason="the NetCDF export needs netCDF4 (netcdf extra)")

D = DAY.isoformat()


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    path = tmp_path_factory.mktemp("nc") / "day.db"
    day = build_day(path)
    with Store.open(path) as s:
        s.record_configuration(CONFIG_PATH.read_text(), str(CONFIG_PATH), "0.1.0",
                               dt.datetime(2027, 2, 15, 6, tzinfo=dt.UTC))
    return day


def _export(store, tmp_path: Path, capsys) -> Path:
    out = tmp_path / "day.nc"
    assert main(["export", "--what", "measurements", "--format", "netcdf", "--from", D,
                 "--db", str(store.path), "--out", str(out)]) == 0
    assert "CF-1.8" in capsys.readouterr().err
    return out


def test_cf_coordinates_units_and_standard_names(store, tmp_path, capsys):
    ds = xr.open_dataset(_export(store, tmp_path, capsys))
    try:
        # CF conventions 1.8, section 4.4: a time coordinate with "since" units, which a
        # CF-aware reader decodes to datetimes.
        assert ds.attrs["Conventions"] == "CF-1.8"
        assert np.issubdtype(ds["time"].dtype, np.datetime64)
        assert ds["time"].attrs["standard_name"] == "time"
        assert list(ds["channel"].values) == [c.name for c in store.config.channels]
        assert list(ds["wavelength"].values) == [c.wavelength_nm for c in store.config.channels]
        # Standard names from the CF standard name table.
        assert ds["wavelength"].attrs["standard_name"] == "radiation_wavelength"
        assert ds["solar_zenith_angle"].attrs["standard_name"] == "solar_zenith_angle"
        assert ds["solar_azimuth_angle"].attrs["standard_name"] == "solar_azimuth_angle"
        assert ds["surface_air_pressure"].attrs["standard_name"] == "surface_air_pressure"
        assert ds["aod"].attrs["standard_name"] == \
            "atmosphere_optical_thickness_due_to_ambient_aerosol_particles"
        assert ds["signal"].attrs["units"] == "V" and ds["signal"].dims == ("time", "channel")
        # Provenance: the recorded configuration's text and hash, and the version.
        assert ds.attrs["heliotrope_configuration"] == CONFIG_PATH.read_text()
        assert len(ds.attrs["heliotrope_configuration_sha256"]) == 64
        assert ds.attrs["source"].startswith("heliotrope ")
    finally:
        ds.close()


def test_values_match_the_csv_export(store, tmp_path, capsys):
    ds = xr.open_dataset(_export(store, tmp_path, capsys))
    assert main(["export", "--what", "measurements", "--from", D, "--db", str(store.path)]) == 0
    rows = [r for r in csv.DictReader(io.StringIO(capsys.readouterr().out))
            if r["status"] == "ok"]
    try:
        times = sorted({r["time_utc"] for r in rows})
        assert ds.sizes["time"] == len(times)
        first = [r for r in rows if r["time_utc"] == times[0]]
        for r in first:
            got = ds["signal"].sel(channel=r["channel"]).isel(time=0).item()
            dark = float(r["dark_mean_v [V]"] or 0.0)
            assert got == pytest.approx(float(r["sun_mean_v [V]"]) - dark, rel=1e-12)
        want = np.datetime64(dt.datetime.fromisoformat(times[0]).replace(tzinfo=None), "ns")
        assert abs(ds["time"].values[0] - want) < np.timedelta64(1, "ms")
        assert ds["airmass"].isel(time=0).item() == pytest.approx(float(first[0]["airmass [1]"]))
        # No calibration in this store: no AOD, written as missing.
        assert bool(ds["aod"].isnull().all())
    finally:
        ds.close()


def test_netcdf_needs_the_measurements_and_a_file(store, capsys):
    assert main(["export", "--what", "events", "--format", "netcdf", "--from", D,
                 "--db", str(store.path), "--out", "x.nc"]) == 64
    assert main(["export", "--what", "measurements", "--format", "netcdf", "--from", D,
                 "--db", str(store.path)]) == 64
    assert "--out FILE.nc" in capsys.readouterr().err
