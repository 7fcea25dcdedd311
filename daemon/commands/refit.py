"""``heliotrope refit``: the session fit, offline, on a CSV file of readings.

The file has a header line and one reading per line::

    time_utc,channel,signal[,pressure_hpa][,detector_temp_c]
    2027-02-15T13:41:07Z,500,1.8731,645.2,25.01

``time_utc`` is ISO 8601 (a time without a zone is taken as UTC), ``channel`` a
channel name of the configuration, ``signal`` the dark-corrected direct-sun signal
[V]; the optional ``pressure_hpa`` [hPa] feeds the pressure normalisation and
``detector_temp_c`` [degC] the detector-temperature correction (an empty cell is
"not known"). The columns may come in any order. Air masses, the ozone air mass
and the Earth-Sun factor are computed from the configuration's site
(:mod:`daemon.science.solar`); readings are grouped into local plan dates and morning or
afternoon by the local apparent solar time, and every group is fitted exactly as
the service fits a stored session (:func:`daemon.science.sessionfit.fit_series`).

A malformed file raises :class:`RefitError` naming the line and what is wrong.
Values the fit can judge (NaN, zero or negative signals, the sun below the
horizon, a single point) are not errors: they become reasons in the results.
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import math
from collections import defaultdict
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from daemon.config.settings import Config
from daemon.science import solar
from daemon.science.sessionfit import (
    ChannelSeries,
    apply_day_check,
    fit_series,
    temperature_corrected,
)
from daemon.store.reader import result_contract

REQUIRED_COLUMNS = ("time_utc", "channel", "signal")
OPTIONAL_COLUMNS = ("pressure_hpa", "detector_temp_c")
PRESSURE_RANGE_HPA = (300.0, 1100.0)
DETECTOR_TEMP_RANGE_C = (-60.0, 90.0)
MAX_READINGS = 2_000_000  # far beyond a year of bursts; guards against a wrong file


class RefitError(Exception):
    """The readings file cannot be used; the message names the line and the problem."""


@dataclass(frozen=True)
class Reading:
    line: int
    time_utc: _dt.datetime
    channel: str
    signal_v: float
    pressure_hpa: float
    detector_temp_c: float


def _number(text: str, what: str, where: str, allow_empty: bool,
            bounds: tuple[float, float] | None = None, unit: str = "") -> float:
    text = text.strip()
    if not text:
        if allow_empty:
            return math.nan
        raise RefitError(f"{where}: {what} is empty; give a number")
    try:
        value = float(text)
    except ValueError:
        raise RefitError(f"{where}: {what} {text!r} is not a number") from None
    if bounds is not None and not (bounds[0] <= value <= bounds[1]):
        raise RefitError(f"{where}: {what} {text} is out of range; allowed {bounds[0]:g} to "
                         f"{bounds[1]:g}{' ' + unit if unit else ''} (or leave it empty)")
    return value


def _time(text: str, where: str) -> _dt.datetime:
    text = text.strip()
    try:
        t = _dt.datetime.fromisoformat(text)
    except ValueError:
        raise RefitError(f"{where}: time_utc {text!r} is not an ISO 8601 time; write it as "
                         "for example 2027-02-15T13:41:07Z") from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=_dt.UTC)  # the column says UTC
    return t.astimezone(_dt.UTC)


def _lines(reader: Any, source: str) -> Iterator[tuple[int, list[str]]]:
    """Non-blank CSV records with the line number they start on."""
    line = 1
    while True:
        try:
            fields = next(reader)
        except StopIteration:
            return
        except csv.Error as exc:
            raise RefitError(f"{source}: line {reader.line_num}: not valid CSV ({exc})") from None
        if any(f.strip() for f in fields):
            yield line, fields
        line = reader.line_num + 1


def read_readings(text: str, config: Config, source: str = "<csv>") -> list[Reading]:
    """Parse and check the CSV text of a readings file.

    Parameters
    ----------
    text : str
        The file's content.
    config : Config
        Supplies the channel names a reading may name.
    source : str
        The file name, for messages.

    Returns
    -------
    list of Reading

    Raises
    ------
    RefitError
        Empty file, bad header, a line with the wrong number of fields, an unparsable
        time or number, an unknown channel, a pressure or temperature out of range,
        or the same channel twice at the same time; the message names the line.
    """
    if not text.strip():
        raise RefitError(f"{source}: the file is empty; expected a header line "
                         f"'{','.join(REQUIRED_COLUMNS)}' and one reading per line")
    reader = csv.reader(io.StringIO(text.lstrip("\ufeff")), strict=True)
    lines = _lines(reader, source)
    header_line, fields = next(lines)
    header = [f.strip() for f in fields]
    where = f"{source}: line {header_line}"
    known = REQUIRED_COLUMNS + OPTIONAL_COLUMNS
    for name in header:
        if name not in known:
            raise RefitError(f"{where}: unknown column {name!r} in the header; allowed "
                             f"columns: {', '.join(known)} (the first three required)")
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        raise RefitError(f"{where}: the header lacks {', '.join(missing)}; it must name "
                         f"{', '.join(REQUIRED_COLUMNS)} (optional: "
                         f"{', '.join(OPTIONAL_COLUMNS)})")
    dupes = sorted({c for c in header if header.count(c) > 1})
    if dupes:
        raise RefitError(f"{where}: column {dupes[0]!r} appears twice in the header")
    col = {name: i for i, name in enumerate(header)}
    names = [c.name for c in config.channels]
    seen: dict[tuple[_dt.datetime, str], int] = {}
    out: list[Reading] = []
    for line, fields in lines:
        where = f"{source}: line {line}"
        if len(fields) != len(header):
            raise RefitError(f"{where}: {len(fields)} fields, but the header has "
                             f"{len(header)} ({','.join(header)})")
        if len(out) >= MAX_READINGS:
            raise RefitError(f"{where}: more than {MAX_READINGS} readings; split the file")
        t = _time(fields[col["time_utc"]], where)
        channel = fields[col["channel"]].strip()
        if channel not in names:
            raise RefitError(f"{where}: unknown channel {channel!r}; the configuration "
                             f"{config.source} has {', '.join(names)}")
        signal = _number(fields[col["signal"]], "signal", where, allow_empty=False)
        pressure = (_number(fields[col["pressure_hpa"]], "pressure_hpa", where, True,
                            PRESSURE_RANGE_HPA, "hPa") if "pressure_hpa" in col else math.nan)
        temp = (_number(fields[col["detector_temp_c"]], "detector_temp_c", where, True,
                        DETECTOR_TEMP_RANGE_C, "degC")
                if "detector_temp_c" in col else math.nan)
        key = (t, channel)
        if key in seen:
            raise RefitError(f"{where}: a second reading of channel {channel} at "
                             f"{t.isoformat()} (the first is on line {seen[key]}); "
                             "remove one of them")
        seen[key] = line
        out.append(Reading(line, t, channel, signal, pressure, temp))
    if not out:
        raise RefitError(f"{source}: no readings after the header on line {header_line}; "
                         "add one line per reading")
    return out


def refit_readings(readings: list[Reading], config: Config) -> dict[str, Any]:
    """Fit every (plan date, session) group of the readings.

    Returns
    -------
    dict
        ``results``: rows in the JSON contract (:data:`daemon.store.reader.RESULT_KEYS`),
        ordered by date, session and configuration order; ``details``: per row its
        ``notes``, ``tau_aerosol``, ``tau_rayleigh``, ``tau_ozone``, ``residual_sd``,
        ``e0_1au_w_m2_nm`` and ``astm_ratio``; ``readings``: how many were read.
    """
    times = sorted({r.time_utc for r in readings})
    pos = solar.sun_position(times, config.site)
    zenith = np.asarray(pos.apparent_zenith_deg, dtype=float)
    airmass = np.asarray(solar.relative_airmass(zenith), dtype=float)
    ozone_m = np.asarray(solar.ozone_airmass(zenith, config.site.elevation_m), dtype=float)
    esf = np.asarray(solar.earth_sun_factor(times), dtype=float)
    # Local apparent solar time decides morning or afternoon, which stays right where
    # the sun passes north of the zenith (azimuth would not).
    solar_hour = np.array([(t.hour + t.minute / 60 + t.second / 3600) for t in times])
    solar_hour = (solar_hour + config.site.longitude_deg / 15.0
                  + np.asarray(pos.equation_of_time_min) / 60.0) % 24.0
    index = {t: i for i, t in enumerate(times)}
    tz = config.tz
    groups: dict[tuple[str, str], list[Reading]] = defaultdict(list)
    for r in readings:
        i = index[r.time_utc]
        session = "am" if solar_hour[i] < 12.0 else "pm"
        groups[(r.time_utc.astimezone(tz).date().isoformat(), session)].append(r)
    results: list[dict[str, Any]] = []
    details: list[dict[str, Any]] = []
    for (date, session) in sorted(groups):
        series = {}
        for ch in config.channels:
            rs = sorted((r for r in groups[(date, session)] if r.channel == ch.name),
                        key=lambda r: r.time_utc)
            idx = [index[r.time_utc] for r in rs]
            signal = np.array([temperature_corrected(r.signal_v, r.detector_temp_c, ch)
                               for r in rs], dtype=float)
            series[ch.name] = ChannelSeries(
                airmass=airmass[idx], ozone_airmass=ozone_m[idx],
                pressure_hpa=np.array([r.pressure_hpa for r in rs], dtype=float),
                signal_v=signal, earth_sun_factor=esf[idx], n_total=len(rs), notes=[],
                hours=np.array([r.time_utc.timestamp() / 3600.0 for r in rs], dtype=float))
        for row in fit_series(series, config, date, session):
            results.append(result_contract(row))
            details.append({k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                            for k, v in row.items()
                            if k in ("date", "session", "channel", "notes", "tau_aerosol",
                                     "tau_rayleigh", "tau_ozone", "residual_sd",
                                     "e0_1au_w_m2_nm", "astm_ratio")})
    for date in sorted({r["date"] for r in results}):
        am = [r for r in results if r["date"] == date and r["session"] == "am"]
        pm = [r for r in results if r["date"] == date and r["session"] == "pm"]
        apply_day_check(am, pm, config.fit)
    return {"results": results, "details": details, "readings": len(readings)}


def refit_file(path: str | Path, config: Config) -> dict[str, Any]:
    """Read a readings CSV file and fit it; see :func:`read_readings` for the format.

    Raises
    ------
    FileNotFoundError
        The file does not exist.
    RefitError
        The file is not a well-formed readings file.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise RefitError(f"{p}: not UTF-8 text ({exc.reason} at byte {exc.start}); save "
                         "the readings as a plain UTF-8 CSV file") from None
    except IsADirectoryError:
        raise RefitError(f"{p}: is a directory; pass the readings CSV file") from None
    out = refit_readings(read_readings(text, config, str(p)), config)
    out["csv"] = str(p)
    out["config"] = config.source
    return out


def refit_command(args: Any) -> int:
    """``heliotrope refit``: fit a readings CSV offline and print the results."""
    from daemon.commands.errors import EX_DATAERR, EX_NOINPUT, CommandError
    from daemon.commands.storedconfig import choose_config
    from daemon.commands.tables import dumps, results_table

    config = choose_config(args.config, getattr(args, "db", None),
                           "refit needs the site and the channels").config
    try:
        out = refit_file(args.csv, config)
    except FileNotFoundError:
        raise CommandError(f"{args.csv}: no such file; pass the readings CSV "
                           f"({','.join(REQUIRED_COLUMNS)})", EX_NOINPUT) from None
    except RefitError as exc:
        raise CommandError(str(exc), EX_DATAERR) from None
    if args.json:
        print(dumps(out))
        return 0
    print(f"{out['readings']} readings from {out['csv']} fitted with {out['config']}")
    print(results_table(out["results"]))
    return 0
