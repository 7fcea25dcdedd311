"""``heliotrope export --format netcdf``: measurements (and aerosol optical depth, when
a calibration is stored) as one NetCDF-4 file following the CF conventions (1.8).

Coordinates ``time`` (seconds since 1970-01-01 UTC), ``channel`` (its name) and
``wavelength`` (per channel); CF standard names where the standard name table has one
(solar zenith and azimuth angle, surface air pressure, aerosol optical thickness);
the configuration that produced the data (its text and SHA-256) and the software
version as global attributes. Written with the netCDF4 library (the ``netcdf`` extra),
imported only when this format is asked for.
"""

from __future__ import annotations

import datetime as _dt
import math
import sqlite3
from collections.abc import Iterable
from pathlib import Path
from typing import Any

EPOCH = _dt.datetime(1970, 1, 1, tzinfo=_dt.UTC)
FILL = -9999.0  # _FillValue of every float variable

# name: (dims, units, standard_name or None, long_name); "m" = per time, "mc" = per time
# and channel. Standard names from the CF standard name table.
VARIABLES: dict[str, tuple[str, str, str | None, str]] = {
    "signal": ("mc", "V", None, "dark-corrected mean direct-sun signal of the burst"),
    "signal_sd": ("mc", "V", None, "standard deviation of the burst's sun samples"),
    "dark": ("mc", "V", None, "mean dark signal"),
    "solar_zenith_angle": ("m", "degree", "solar_zenith_angle",
                           "apparent (refracted) solar zenith angle at the burst's mean time"),
    "solar_azimuth_angle": ("m", "degree", "solar_azimuth_angle",
                            "solar azimuth angle, clockwise from north"),
    "airmass": ("m", "1", None, "relative optical air mass (Kasten and Young 1989)"),
    "ozone_airmass": ("m", "1", None, "ozone air mass (layer at 22 km)"),
    "surface_air_pressure": ("m", "hPa", "surface_air_pressure", "station pressure"),
    "detector_temperature": ("m", "degC", None, "detector temperature (housekeeping)"),
    "pointing_error": ("m", "degree", None, "tracker pointing error"),
    "aod": ("mc", "1", "atmosphere_optical_thickness_due_to_ambient_aerosol_particles",
            "aerosol optical depth from the stored calibration"),
}


class NetcdfUnavailable(Exception):
    """The netCDF4 library is not installed."""


def _netcdf4():
    try:
        import netCDF4
    except ImportError:
        raise NetcdfUnavailable("the NetCDF export needs the netCDF4 library: install "
                                "heliotrope with its netcdf extra (pip install "
                                "'heliotrope[netcdf]')") from None
    return netCDF4


def _channels(conn: sqlite3.Connection, config) -> list[tuple[str, float]]:
    """(name, wavelength [nm]) in the instrument's order: the configuration's, else the
    stored session results' wavelengths."""
    if config is not None:
        return [(ch.name, ch.wavelength_nm) for ch in config.channels]
    names = [r[0] for r in conn.execute(
        "SELECT channel FROM measurement_channels GROUP BY channel ORDER BY "
        "min(channel_index)")]
    waves = dict(conn.execute("SELECT channel, max(wavelength_nm) FROM session_results "
                              "GROUP BY channel").fetchall())
    return [(n, waves.get(n) or math.nan) for n in names]


def write_netcdf(conn: sqlite3.Connection, rows: Iterable[dict], first: str, last: str,
                 path: Path, *, config=None, configuration: dict | None = None,
                 version: str = "unknown") -> int:
    """Write the 'ok' measurements among ``rows`` (the measurements export's rows of
    plan dates ``first`` to ``last``) to ``path``; return the number of times written."""
    from daemon.store.reader import aod_between

    nc4 = _netcdf4()
    channels = _channels(conn, config)
    col = {name: i for i, (name, _) in enumerate(channels)}
    times: list[str] = []
    per_m: dict[str, list[float]] = {k: [] for k, v in VARIABLES.items() if v[0] == "m"}
    per_mc: dict[str, list[list[float]]] = {k: [] for k, v in VARIABLES.items() if v[0] == "mc"}
    sessions: list[str] = []
    index: dict[int, int] = {}
    for r in rows:
        if r["status"] != "ok" or r["channel"] not in col:
            continue
        mid = r["measurement_id"]
        if mid not in index:
            index[mid] = len(times)
            times.append(r["time_utc"])
            sessions.append(r["session"])
            pressure = r["housekeeping_pressure_hpa"]
            for key, value in (("solar_zenith_angle", r["apparent_zenith_deg"]),
                               ("solar_azimuth_angle", r["azimuth_deg"]),
                               ("airmass", r["airmass"]), ("ozone_airmass", r["ozone_airmass"]),
                               ("surface_air_pressure",
                                r["pressure_hpa"] if pressure is None else pressure),
                               ("detector_temperature", r["detector_temp_c"]),
                               ("pointing_error", r["pointing_error_deg"])):
                per_m[key].append(value)
            for key in per_mc:
                per_mc[key].append([None] * len(channels))
        i, c = index[mid], col[r["channel"]]
        dark = r["dark_mean_v"]
        if r["sun_mean_v"] is not None:
            per_mc["signal"][i][c] = r["sun_mean_v"] - (dark or 0.0)
        per_mc["signal_sd"][i][c] = r["sun_sd_v"]
        per_mc["dark"][i][c] = dark
    for a in aod_between(conn, first, last):
        i = index.get(a["measurement_id"])
        if i is not None and a["channel"] in col and a["flag"] is None:
            per_mc["aod"][i][col[a["channel"]]] = a["aod"]

    ds = nc4.Dataset(str(path), "w", format="NETCDF4")
    try:
        ds.createDimension("time", len(times))
        ds.createDimension("channel", len(channels))
        t = ds.createVariable("time", "f8", ("time",))
        t.standard_name = "time"
        t.long_name = "mean time of the burst"
        t.units = "seconds since 1970-01-01 00:00:00 UTC"
        t.calendar = "standard"
        t.axis = "T"
        t[:] = [(_dt.datetime.fromisoformat(x) - EPOCH).total_seconds() for x in times]
        ch = ds.createVariable("channel", str, ("channel",))
        ch.long_name = "channel name"
        for k, (name, _) in enumerate(channels):
            ch[k] = name
        w = ds.createVariable("wavelength", "f8", ("channel",))
        w.standard_name = "radiation_wavelength"
        w.long_name = "nominal centre wavelength of the channel"
        w.units = "nm"
        w[:] = [wl for _, wl in channels]
        s = ds.createVariable("session", str, ("time",))
        s.long_name = "session of the plan: am, pm or routine"
        for k, name in enumerate(sessions):
            s[k] = name
        for name, (dims, units, standard, long_name) in VARIABLES.items():
            shape = ("time",) if dims == "m" else ("time", "channel")
            v = ds.createVariable(name, "f8", shape, fill_value=FILL)
            v.units = units
            v.long_name = long_name
            if standard:
                v.standard_name = standard
            if dims == "mc":
                v.coordinates = "wavelength"
            data = per_m[name] if dims == "m" else per_mc[name]
            if times:
                v[:] = _filled(data)
        _global_attributes(ds, config, configuration, version, first, last)
    finally:
        ds.close()
    return len(times)


def _filled(data: list) -> Any:
    import numpy as np

    arr = np.array(data, dtype=object)
    out = np.where(np.equal(arr, None), FILL, arr).astype(float)
    out[~np.isfinite(out)] = FILL
    return out


def _global_attributes(ds, config, configuration: dict | None, version: str,
                       first: str, last: str) -> None:
    now = _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat()
    ds.Conventions = "CF-1.8"
    ds.title = f"heliotrope sun-radiometer measurements, {first} to {last}"
    ds.source = f"heliotrope {version}"
    ds.history = f"{now} heliotrope export --format netcdf"
    if config is not None:
        ds.site_name = config.site.name
        ds.site_latitude_deg = config.site.latitude_deg
        ds.site_longitude_deg = config.site.longitude_deg
        ds.site_elevation_m = config.site.elevation_m
    if configuration is not None:
        ds.heliotrope_configuration_sha256 = configuration["sha256"]
        ds.heliotrope_configuration_origin = configuration["origin"]
        ds.heliotrope_configuration_version = configuration["software_version"]
        ds.heliotrope_configuration = configuration["text"]
