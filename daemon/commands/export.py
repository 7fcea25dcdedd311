"""``heliotrope export``: stored data as CSV or JSON, streamed row by row.

Rows come straight from an SQLite cursor and go straight to the output, so a year's
export needs no more memory than a day's. CSV headers carry each column's unit in
brackets (``sun_mean_v [V]``, ``airmass [1]`` for a dimensionless number); JSON is one
array of objects whose keys are the bare column names, written element by element.

What can be exported (``--what``), for local dates ``--from`` to ``--to``:

``measurements``
    one row per measurement and channel: geometry, pointing, the channel's mean and
    standard deviation of the sun samples, the mean dark signal, and housekeeping
``samples``
    every raw sample (sun and dark), one row each
``results``
    the session results (the JSON contract of ``today``) with the fit time
``aod``
    aerosol optical depth per measurement and channel, from the stored calibration
``events``
    the service's events between local midnight of ``--from`` and local midnight after
    ``--to`` (the site's time zone from the stored plans)
``readings``
    exactly the file ``heliotrope refit --csv`` reads (header ``time_utc,channel,signal,
    pressure_hpa,detector_temp_c``, no units in it): per morning and afternoon
    measurement that was measured, locked and not saturated, the dark-corrected mean
    signal of each channel [V], the pressure [hPa] and detector temperature [degC] the
    service's fit uses. A burst's spread (the cloud screen) is not in it: refit fits
    every reading it is given.

Standard library only: this is a read command.
"""

from __future__ import annotations

import argparse
import csv
import datetime as _dt
import io
import json
import math
import os
import sqlite3
import sys
import tempfile
from collections.abc import Iterable, Iterator
from itertools import groupby
from operator import itemgetter
from pathlib import Path
from typing import IO, Any

from daemon.commands.output import OutputPathError, check_out_path
from daemon.store.reader import sample_stats_cte

# (column, unit); unit None for text, flags and counts, "1" for dimensionless numbers.
MEASUREMENT_COLUMNS: tuple[tuple[str, str | None], ...] = (
    ("measurement_id", None), ("time_utc", None), ("plan_date", None), ("session", None),
    ("status", None), ("failure", None), ("target_airmass", "1"),
    ("apparent_zenith_deg", "deg"), ("azimuth_deg", "deg"), ("airmass", "1"),
    ("ozone_airmass", "1"), ("earth_sun_factor", "1"), ("pressure_hpa", "hPa"),
    ("pointing_error_deg", "deg"), ("locked", None), ("duration_s", "s"),
    ("channel", None), ("saturated", None), ("sun_mean_v", "V"), ("sun_sd_v", "V"),
    ("n_sun", None), ("dark_mean_v", "V"), ("n_dark", None),
    ("detector_temp_c", "degC"), ("case_temp_c", "degC"), ("ambient_temp_c", "degC"),
    ("supply_v", "V"), ("humidity_pct", "%"), ("housekeeping_pressure_hpa", "hPa"),
)
SAMPLE_COLUMNS: tuple[tuple[str, str | None], ...] = (
    ("measurement_id", None), ("time_utc", None), ("plan_date", None), ("session", None),
    ("channel", None), ("kind", None), ("sample_index", None), ("value_v", "V"),
)
_SAMPLE_NAMES = tuple(c for c, _ in SAMPLE_COLUMNS)
RESULT_COLUMNS: tuple[tuple[str, str | None], ...] = (
    ("date", None), ("session", None), ("channel", None), ("wavelength_nm", "nm"),
    ("v0", "V"), ("v0_1au", "V"), ("v0_rel_unc", "1"), ("tau", "1"), ("n_used", None),
    ("n_total", None), ("airmass_min", "1"), ("airmass_max", "1"), ("accepted", None),
    ("reasons", None), ("fitted_utc", None),
)
AOD_COLUMNS: tuple[tuple[str, str | None], ...] = (
    ("time_utc", None), ("plan_date", None), ("session", None), ("measurement_id", None),
    ("channel", None), ("wavelength_nm", "nm"), ("aod", "1"), ("aod_unc", "1"),
    ("tau_total", "1"), ("tau_rayleigh", "1"), ("tau_ozone", "1"), ("airmass", "1"),
    ("ozone_airmass", "1"), ("pressure_hpa", "hPa"), ("flag", None),
    ("calibration_id", None), ("angstrom_alpha", "1"), ("angstrom_channels", None),
    ("precipitable_water_cm", "cm"),
)
EVENT_COLUMNS: tuple[tuple[str, str | None], ...] = (
    ("id", None), ("time_utc", None), ("level", None), ("kind", None), ("message", None),
    ("detail", None),
)
# The refit input format (daemon/commands/refit.py): bare names, units in its docstring.
READING_COLUMNS: tuple[tuple[str, str | None], ...] = (
    ("time_utc", None), ("channel", None), ("signal", None), ("pressure_hpa", None),
    ("detector_temp_c", None),
)
COLUMNS = {"measurements": MEASUREMENT_COLUMNS, "samples": SAMPLE_COLUMNS,
           "results": RESULT_COLUMNS, "aod": AOD_COLUMNS, "events": EVENT_COLUMNS,
           "readings": READING_COLUMNS}
WHATS = tuple(COLUMNS)
FORMATS = ("csv", "json")  # netcdf: daemon/commands/netcdf.py

_MEASUREMENTS_SQL = sample_stats_cte(
    "SELECT id FROM measurements WHERE plan_date BETWEEN ?1 AND ?2") + """
SELECT m.id, m.time_utc, m.plan_date, m.session, m.status, m.failure, m.target_airmass,
       m.apparent_zenith_deg, m.azimuth_deg, m.airmass, m.ozone_airmass,
       m.earth_sun_factor, m.pressure_hpa, m.pointing_error_deg, m.locked, m.duration_s,
       mc.channel, mc.saturated, sun.mean_v, sun.n, spread.ss, dark.mean_v, dark.n,
       h.detector_temp_c, h.case_temp_c, h.ambient_temp_c, h.supply_v, h.humidity_pct,
       h.pressure_hpa
FROM measurements m JOIN sel ON sel.id = m.id
LEFT JOIN measurement_channels mc ON mc.measurement_id = m.id
LEFT JOIN mean sun ON sun.measurement_id = m.id AND sun.channel = mc.channel
     AND sun.kind = 'sun'
LEFT JOIN mean dark ON dark.measurement_id = m.id AND dark.channel = mc.channel
     AND dark.kind = 'dark'
LEFT JOIN spread ON spread.measurement_id = m.id AND spread.channel = mc.channel
LEFT JOIN housekeeping h ON h.measurement_id = m.id
ORDER BY m.time_utc, m.id, mc.channel_index
"""

# Measurements in the order of their (plan_date, time_utc) index, which is time order
# since a plan date is the local date of its measurements; then, per measurement, its
# samples in the order of the samples primary key (measurement_id, kind, channel,
# sample_index), so SQLite sorts nothing at all: the first row comes at once and no
# temporary files are written. The key's order gives runs of one kind and channel;
# :func:`_sample_groups` puts the runs (a dozen per measurement) in the exported order
# by the measurement's channel rows: sun before dark, the instrument's channel order (a
# channel without a channel row first, by name), the sample index. The measurement's
# four columns are read once, not once per sample (the export of millions of rows is
# mostly the making of Python objects).
_SAMPLE_MEASUREMENTS_SQL = """
SELECT id, time_utc, plan_date, session FROM measurements
WHERE plan_date BETWEEN ?1 AND ?2
ORDER BY plan_date, time_utc, id
"""
_MEASUREMENT_SAMPLES_SQL = """
SELECT kind, channel, sample_index, value_v FROM samples
WHERE measurement_id = ?
ORDER BY kind, channel, sample_index
"""
_MEASUREMENT_CHANNELS_SQL = """
SELECT channel, channel_index FROM measurement_channels WHERE measurement_id = ?
"""
# The exported order as SQLite sorts it: the definition the runs' order is held to
# (tests/test_export.py), and how a measurement is read whose keys Python cannot put
# in order (a BLOB, or a text channel index: a store written by something else).
_MEASUREMENT_SAMPLES_SORTED_SQL = """
SELECT s.kind, s.channel, s.sample_index, s.value_v
FROM samples s
LEFT JOIN measurement_channels mc ON mc.measurement_id = s.measurement_id
     AND mc.channel = s.channel
WHERE s.measurement_id = ?
ORDER BY s.kind != 'sun', mc.channel_index IS NOT NULL, mc.channel_index, s.kind, s.channel,
         s.sample_index
"""

_RESULTS_SQL = """
SELECT plan_date, session, channel, wavelength_nm, v0, v0_1au, v0_rel_unc, tau, n_used,
       n_total, airmass_min, airmass_max, accepted, reasons, fitted_utc
FROM session_results WHERE plan_date BETWEEN ? AND ?
ORDER BY plan_date, session, wavelength_nm, channel
"""




class ExportError(OutputPathError):
    """The export cannot be made as asked; the message says why and what to do."""


# --------------------------------------------------------------------------- row sources

def measurement_rows(conn: sqlite3.Connection, first: str, last: str) -> Iterator[dict]:
    """One dict per measurement and channel (failed measurements included), time order."""
    names = [c for c, _ in MEASUREMENT_COLUMNS]
    for r in conn.execute(_MEASUREMENTS_SQL, (first, last)):
        r = tuple(r)
        channel, saturated, sun_mean, n_sun, ss, dark_mean, n_dark = r[16:23]
        sd = math.sqrt(ss / (n_sun - 1)) if n_sun and n_sun >= 2 and ss is not None else None
        if channel is not None:  # a measurement without channel rows has no counts either
            n_sun, n_dark = n_sun or 0, n_dark or 0
        values = r[:14] + (None if r[14] is None else bool(r[14]), r[15], channel,
                           None if saturated is None else bool(saturated), sun_mean, sd,
                           n_sun, dark_mean if n_dark else None, n_dark) + r[23:]
        yield dict(zip(names, values, strict=True))


def reading_rows(conn: sqlite3.Connection, first: str, last: str) -> Iterator[dict]:
    """The refit input: per usable morning or afternoon measurement and channel, the
    dark-corrected mean signal [V] with the pressure and detector temperature the
    service's screening gives the fit (daemon.science.screening)."""
    for r in measurement_rows(conn, first, last):
        if (r["status"] != "ok" or r["session"] not in ("am", "pm") or not r["locked"]
                or r["saturated"] or r["sun_mean_v"] is None or not r["n_sun"]):
            continue
        dark = r["dark_mean_v"] or 0.0
        pressure = r["housekeeping_pressure_hpa"]
        yield {"time_utc": r["time_utc"], "channel": r["channel"],
               "signal": r["sun_mean_v"] - dark,
               "pressure_hpa": r["pressure_hpa"] if pressure is None else pressure,
               "detector_temp_c": r["detector_temp_c"]}


def sample_rows(conn: sqlite3.Connection, first: str, last: str) -> Iterator[dict]:
    """Every raw sample [V], sun before dark, in time and channel order."""
    for measurement, runs in _sample_groups(conn, first, last):
        for channel, kind, rows in runs:
            for _, _, index, value in rows:
                yield dict(zip(_SAMPLE_NAMES, measurement + (channel, kind, index, value),
                               strict=True))


def _sample_groups(conn: sqlite3.Connection, first: str, last: str
                   ) -> Iterator[tuple[tuple, list[tuple[Any, Any, list[tuple]]]]]:
    """Per measurement with samples, in time order: its (measurement_id, time_utc,
    plan_date, session) and its samples as runs (channel, kind, rows) in the export's
    order, each row a plain (kind, channel, sample_index, value_v) tuple. All queries
    run in the read transaction the measurements cursor holds open, so they see one
    state of the store."""
    measurements, samples, channels = conn.cursor(), conn.cursor(), conn.cursor()
    for cur in (measurements, samples, channels):
        cur.row_factory = None  # millions of rows: no Row objects
    pairs, order = None, {}
    for m in measurements.execute(_SAMPLE_MEASUREMENTS_SQL, (first, last)):
        rows = samples.execute(_MEASUREMENT_SAMPLES_SQL, (m[0],)).fetchall()
        if not rows:
            continue
        these = channels.execute(_MEASUREMENT_CHANNELS_SQL, (m[0],)).fetchall()
        if these != pairs:  # the channel rows are mostly the same from one to the next
            pairs, order = these, {c: i for c, i in these if c is not None}
        runs = _runs(rows)
        try:
            runs.sort(key=lambda run: _run_key(run, order))
        except TypeError:
            runs = _runs(samples.execute(_MEASUREMENT_SAMPLES_SORTED_SQL, (m[0],)).fetchall())
        yield m, runs


_KIND_CHANNEL = itemgetter(0, 1)


def _runs(rows: list[tuple]) -> list[tuple[Any, Any, list[tuple]]]:
    """Consecutive rows of one (kind, channel) as (channel, kind, rows)."""
    return [(key[1], key[0], list(run)) for key, run in groupby(rows, _KIND_CHANNEL)]


def _run_key(run: tuple[Any, Any, list[tuple]], order: dict) -> tuple:
    """The sort key of a run that :data:`_MEASUREMENT_SAMPLES_SORTED_SQL`'s ORDER BY
    gives its rows, NULL (None) first as SQLite sorts it."""
    channel, kind = run[0], run[1]
    return (-1 if kind is None else kind != "sun", channel in order, order.get(channel, 0),
            _nulls_first(kind), _nulls_first(channel))


def _nulls_first(value: Any) -> tuple:
    return (0, "") if value is None else (1, value)


def write_samples_csv(conn: sqlite3.Connection, first: str, last: str, out: IO[str]) -> int:
    """The samples export as CSV straight from the tuples (what :func:`write_csv` writes
    from :func:`sample_rows`' dicts, byte for byte, in about a quarter of the time)."""
    # The csv module's writerow costs more than the query here; so each cell's text is
    # made by the csv module once per distinct value (a measurement's four fields once
    # per measurement, the few channel names, kinds and indices once per export), a
    # run's first six cells are joined once per run, and only the index and value are
    # added per row: a finite float is its repr, as the csv module writes it; anything
    # else goes through the same cell rule as the generic writer.
    csv.writer(out, lineterminator="\n").writerow(csv_header(SAMPLE_COLUMNS))
    channels, kinds, indices = _CellTexts(), _CellTexts(), _CellTexts()
    isfinite, text = math.isfinite, _csv_text
    n = 0
    for measurement, runs in _sample_groups(conn, first, last):
        head = ",".join(map(text, measurement))
        lines = []
        for channel, kind, rows in runs:
            start = f"{head},{channels[channel]},{kinds[kind]},"
            lines.extend([f"{start}{indices[i]},"
                          f"{repr(v) if type(v) is float and isfinite(v) else text(v)}\n"
                          for _, _, i, v in rows])
            n += len(rows)
        out.write("".join(lines))
    return n


def _csv_text(value: Any) -> str:
    """One cell's text exactly as :func:`write_csv`'s csv writer puts it in a row."""
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerow([_csv_cell(value), ""])
    return buf.getvalue()[:-2]  # without the empty second cell's "," and the line's end


class _CellTexts(dict):
    """The CSV texts of one column's values, each made by :func:`_csv_text` when first
    seen (a column of few distinct values: channel names, sample kinds, indices)."""

    def __missing__(self, value: Any) -> str:
        text = self[value] = _csv_text(value)
        return text



def result_rows(conn: sqlite3.Connection, first: str, last: str) -> Iterator[dict]:
    """Session results in the JSON contract of ``today``, plus ``fitted_utc``."""
    from daemon.store.reader import result_row_to_contract

    for r in conn.execute(_RESULTS_SQL, (first, last)):
        row = dict(zip(("plan_date", "session", "channel", "wavelength_nm", "v0", "v0_1au",
                        "v0_rel_unc", "tau", "n_used", "n_total", "airmass_min",
                        "airmass_max", "accepted", "reasons", "fitted_utc"), tuple(r),
                       strict=True))
        out = result_row_to_contract(row)
        out["fitted_utc"] = row["fitted_utc"]
        yield out


def event_rows(conn: sqlite3.Connection, first: str, last: str) -> Iterator[dict]:
    """Events from local midnight of ``first`` to local midnight after ``last``."""
    from daemon.commands.status import site_zone
    from daemon.store.reader import stored_plan

    plan = stored_plan(conn)
    tz = site_zone((plan or {}).get("timezone"))
    d1 = _dt.date.fromisoformat(first)
    d2 = _dt.date.fromisoformat(last) + _dt.timedelta(days=1)
    start = _dt.datetime(d1.year, d1.month, d1.day, tzinfo=tz).astimezone(_dt.UTC)
    end = _dt.datetime(d2.year, d2.month, d2.day, tzinfo=tz).astimezone(_dt.UTC)
    cur = conn.execute("SELECT id, time_utc, level, kind, message, detail FROM events "
                       "WHERE time_utc >= ? AND time_utc < ? ORDER BY time_utc, id",
                       (start.isoformat(timespec="microseconds"),
                        end.isoformat(timespec="microseconds")))
    for r in cur:
        yield {"id": r[0], "time_utc": r[1], "level": r[2], "kind": r[3], "message": r[4],
               "detail": json.loads(r[5]) if r[5] else None}


def aod_rows(conn: sqlite3.Connection, first: str, last: str) -> Iterator[dict]:
    """Aerosol optical depths from :func:`daemon.store.reader.aod_between`."""
    from daemon.store.reader import aod_between

    yield from aod_between(conn, first, last)


SOURCES = {"measurements": measurement_rows, "samples": sample_rows, "results": result_rows,
           "aod": aod_rows, "events": event_rows, "readings": reading_rows}


def export_rows(conn: sqlite3.Connection, what: str, first: str | _dt.date,
                last: str | _dt.date) -> Iterator[dict]:
    """Rows of one kind for local dates ``first`` to ``last`` (inclusive), lazily."""

    if what not in SOURCES:
        raise ExportError(f"cannot export {what!r}; choose one of {', '.join(WHATS)}")
    d1, d2 = _check_dates(first, last)
    return SOURCES[what](conn, d1, d2)


def _check_dates(first: str | _dt.date, last: str | _dt.date) -> tuple[str, str]:
    from daemon.store.reader import check_plan_date

    try:
        d1, d2 = check_plan_date(first), check_plan_date(last)
    except ValueError as exc:
        raise ExportError(str(exc)) from None
    if d2 < d1:
        raise ExportError(f"the end date {d2} is before the start date {d1}; swap them")
    return d1, d2


# --------------------------------------------------------------------------- writers

def csv_header(columns: Iterable[tuple[str, str | None]]) -> list[str]:
    """Column names with their units in brackets: ``sun_mean_v [V]``."""
    return [name if unit is None else f"{name} [{unit}]" for name, unit in columns]


def _csv_cell(value: Any) -> Any:
    # The common cases first, by exact type (a bool is an int): millions of cells. The
    # csv module writes None as an empty field and a float as its repr.
    kind = type(value)
    if kind is float:
        return value if math.isfinite(value) else ""
    if kind is str or kind is int or value is None:
        return value
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    if isinstance(value, list):
        return "; ".join(str(v) for v in value)
    if isinstance(value, dict):
        return json.dumps(value, sort_keys=True)
    return value


def _json_value(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def write_csv(rows: Iterable[dict], columns: tuple[tuple[str, str | None], ...],
              out: IO[str]) -> int:
    """Write rows as CSV with a unit-bearing header; return the number of rows."""
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(csv_header(columns) if columns is not READING_COLUMNS
                    else [c for c, _ in columns])
    names = [c for c, _ in columns]
    n = 0
    for row in rows:
        writer.writerow([_csv_cell(row.get(c)) for c in names])
        n += 1
    return n


def write_json(rows: Iterable[dict], columns: tuple[tuple[str, str | None], ...],
               out: IO[str]) -> int:
    """Write rows as one JSON array, element by element; return the number of rows."""
    names = [c for c, _ in columns]
    n = 0
    out.write("[")
    for row in rows:
        out.write(",\n" if n else "\n")
        out.write(json.dumps({c: _json_value(row.get(c)) for c in names}, allow_nan=False))
        n += 1
    out.write("\n]\n" if n else "]\n")
    return n


def export(conn: sqlite3.Connection, what: str, first: str | _dt.date, last: str | _dt.date,
           fmt: str, out: IO[str]) -> int:
    """Stream one kind of rows to ``out`` in ``fmt`` ('csv' or 'json'); return the row count."""
    if fmt not in FORMATS:
        raise ExportError(f"unknown format {fmt!r}; choose csv or json")
    if what == "samples" and fmt == "csv":
        return write_samples_csv(conn, *_check_dates(first, last), out)
    rows = export_rows(conn, what, first, last)
    writer = write_csv if fmt == "csv" else write_json
    return writer(rows, COLUMNS[what], out)


# --------------------------------------------------------------------------- command

def _require_calibration(conn: sqlite3.Connection, db: Path) -> None:
    """Refuse an AOD export from a store with no calibration: AOD is computed from a
    calibration's V0, so there is nothing to show until one is made (exit 1)."""
    from daemon.commands.errors import EX_NOTHING, CommandError
    from daemon.store.reader import stored_calibration

    if stored_calibration(conn) is None:
        raise CommandError(f"{db} holds no calibration, so no aerosol optical depth: run "
                           f"`heliotrope calibrate --from D1 --to D2 --db {db}` first over "
                           "a campaign of clear days (`heliotrope results` lists the dates)",
                           EX_NOTHING)


def _export_netcdf(conn: sqlite3.Connection, args: argparse.Namespace, db: Path,
                   out_path: Path | None, last: _dt.date) -> int:
    """The measurements as a CF NetCDF-4 file, written beside ``out_path`` and renamed."""
    from daemon.commands.errors import EX_CANTCREAT, EX_UNAVAILABLE, EX_USAGE, CommandError
    from daemon.commands.netcdf import NetcdfUnavailable, write_netcdf
    from daemon.commands.output import publish
    from daemon.store.reader import software_version, stored_configuration

    if args.what != "measurements" or out_path is None:
        raise CommandError("--format netcdf writes the measurements (with their aerosol "
                           "optical depth when calibrated) to a file: use --what "
                           "measurements --out FILE.nc", EX_USAGE)
    recorded = stored_configuration(conn)
    config = None
    if recorded is not None:
        from daemon.config.settings import ConfigError, config_from_text
        try:
            config = config_from_text(recorded["text"], f"{db}: recorded configuration")
        except ConfigError:
            config = None  # channel order and wavelengths then come from the store
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{out_path.name}.", dir=out_path.parent)
        os.close(fd)
    except OSError as exc:
        raise CommandError(f"--out {out_path}: cannot write there ({exc})",
                           EX_CANTCREAT) from None
    try:
        d1, d2 = args.from_.isoformat(), last.isoformat()
        n = write_netcdf(conn, measurement_rows(conn, d1, d2), d1, d2, Path(tmp),
                         config=config, configuration=recorded, version=software_version())
        publish(tmp, out_path)
    except NetcdfUnavailable as exc:
        raise CommandError(str(exc), EX_UNAVAILABLE) from None
    except OSError as exc:
        raise CommandError(f"--out {out_path}: cannot write ({exc})", EX_CANTCREAT) from None
    finally:
        Path(tmp).unlink(missing_ok=True)
    return n


def cmd_export(args: argparse.Namespace) -> int:
    from daemon.commands.errors import EX_CANTCREAT, EX_NOINPUT, EX_USAGE, CommandError
    from daemon.commands.output import publish
    from daemon.store.reader import StoreReadError, open_readonly

    last = args.to or args.from_
    db = Path(args.db).expanduser()
    out_path = Path(args.out).expanduser() if args.out else None
    try:
        if out_path is not None:
            check_out_path(out_path, db)
        conn = open_readonly(db)
    except OutputPathError as exc:
        raise CommandError(str(exc), EX_USAGE) from None
    except StoreReadError as exc:
        raise CommandError(str(exc), EX_NOINPUT) from None
    try:
        if args.what == "aod":
            _require_calibration(conn, db)
        if args.format == "netcdf":
            n = _export_netcdf(conn, args, db, out_path, last)
            print(f"{n} measurement{'s' if n != 1 else ''} written to {out_path} (NetCDF-4, "
                  "CF-1.8)", file=sys.stderr)
            return 0
        if out_path is None:
            export(conn, args.what, args.from_, last, args.format, sys.stdout)
            sys.stdout.flush()
            return 0
        # Written beside the target and renamed at the end: a reader of FILE never sees
        # half an export, and a failed export leaves the old file in place.
        try:
            fd, tmp = tempfile.mkstemp(prefix=f".{out_path.name}.", dir=out_path.parent)
        except OSError as exc:
            raise CommandError(f"--out {out_path}: cannot write there ({exc})",
                               EX_CANTCREAT) from None
        try:
            with os.fdopen(fd, "w", encoding="utf-8", newline="") as fh:
                n = export(conn, args.what, args.from_, last, args.format, fh)
            publish(tmp, out_path)
        except OSError as exc:
            raise CommandError(f"--out {out_path}: cannot write ({exc})", EX_CANTCREAT) from None
        finally:
            Path(tmp).unlink(missing_ok=True)
    except OutputPathError as exc:
        raise CommandError(str(exc), EX_USAGE) from None
    finally:
        conn.close()
    print(f"{n} {args.what} row{'s' if n != 1 else ''} written to {out_path}", file=sys.stderr)
    return 0
