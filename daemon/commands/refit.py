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

Only a regular file is read (:func:`open_regular`; a FIFO or a device raises
:class:`RefitInputError`), line by line with each line bounded
(:data:`MAX_LINE_CHARS`); the checked readings are held in columns
(:class:`Readings`, at most :data:`MAX_READINGS`) and fitted one local date at a time.
A malformed file raises :class:`RefitError` naming the line and what is wrong.
Values the fit can judge (NaN, zero or negative signals, the sun below the
horizon, a single point) are not errors: they become reasons in the results.
"""

from __future__ import annotations

import array
import csv
import datetime as _dt
import io
import math
import os
import re
import stat
from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import IO, Any

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
MAX_LINE_CHARS = 1024  # a reading line is about 60 characters
# The years the solar position can be computed for: pvlib works on pandas times,
# which end in 1677 and 2262.
YEARS = (1700, 2200)
# A decimal number as a person writes one (ASCII digits, no digit separators), or
# nan / inf, which the fit then judges.
_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*(?:[eE][+-]?\d+)?|\.\d+(?:[eE][+-]?\d+)?"
                     r"|nan|inf|infinity)", re.ASCII | re.IGNORECASE)
DETAIL_KEYS = ("date", "session", "channel", "notes", "tau_aerosol", "tau_rayleigh",
               "tau_ozone", "residual_sd", "e0_1au_w_m2_nm", "astm_ratio")
_EPOCH = _dt.datetime(1970, 1, 1, tzinfo=_dt.UTC)
_US = _dt.timedelta(microseconds=1)


class RefitError(Exception):
    """The readings file cannot be used; the message names the line and the problem."""


class RefitInputError(RefitError):
    """The readings path is not a regular file that can be read (exit 66, not 65)."""


class Readings:
    """Checked readings held in columns, in file order: a million take about 50 MB,
    not a Python object each."""

    def __init__(self, channels: tuple[str, ...]):
        self.channels = channels
        self.line = array.array("q")
        self.time_us = array.array("q")  # microseconds since 1970-01-01 UTC
        self.channel = array.array("h")  # index into ``channels``
        self.signal_v = array.array("d")
        self.pressure_hpa = array.array("d")
        self.detector_temp_c = array.array("d")

    def append(self, line: int, time_us: int, channel: int, signal_v: float,
               pressure_hpa: float, detector_temp_c: float) -> None:
        self.line.append(line)
        self.time_us.append(time_us)
        self.channel.append(channel)
        self.signal_v.append(signal_v)
        self.pressure_hpa.append(pressure_hpa)
        self.detector_temp_c.append(detector_temp_c)

    def __len__(self) -> int:
        return len(self.line)

    def columns(self) -> dict[str, np.ndarray]:
        return {name: np.frombuffer(getattr(self, name), dtype=dtype) for name, dtype in (
            ("line", np.int64), ("time_us", np.int64), ("channel", np.int16),
            ("signal_v", float), ("pressure_hpa", float), ("detector_temp_c", float))}


def _number(text: str, what: str, where: str, allow_empty: bool,
            bounds: tuple[float, float] | None = None, unit: str = "") -> float:
    text = text.strip()
    if not text:
        if allow_empty:
            return math.nan
        raise RefitError(f"{where}: {what} is empty; give a number")
    if "_" in text:
        raise RefitError(f"{where}: {what} {text!r} has a digit separator '_'; write the "
                         "number without it (for example 10.5)")
    if not _NUMBER.fullmatch(text):
        raise RefitError(f"{where}: {what} {text!r} is not a number")
    value = float(text)
    if bounds is not None and not (bounds[0] <= value <= bounds[1]):
        raise RefitError(f"{where}: {what} {text} is out of range; allowed {bounds[0]:g} to "
                         f"{bounds[1]:g}{' ' + unit if unit else ''} (or leave it empty)")
    return value


def _time_us(text: str, where: str) -> int:
    """ISO 8601 time as microseconds since 1970 UTC; a time without a zone is UTC."""
    text = text.strip()
    example = "write it as for example 2027-02-15T13:41:07Z"
    try:
        t = _dt.datetime.fromisoformat(text)
    except ValueError:
        raise RefitError(f"{where}: time_utc {text!r} is not an ISO 8601 time; "
                         f"{example}") from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=_dt.UTC)  # the column says UTC
    try:
        utc = t.astimezone(_dt.UTC)
    except OverflowError:  # 0001-01-01 east of UTC, 9999-12-31 west of it
        utc = None
    if utc is None or not (YEARS[0] <= utc.year <= YEARS[1]):
        raise RefitError(f"{where}: time_utc {text!r} is outside the years {YEARS[0]} to "
                         f"{YEARS[1]} the solar position is computed for; {example}")
    return (utc - _EPOCH) // _US


def _bounded_lines(f: IO, source: str) -> Iterator[str]:
    """The lines of a text or binary (UTF-8) file, refusing one longer than
    :data:`MAX_LINE_CHARS` (a binary or wrong file) before it is held in memory."""
    n = 0
    while True:
        line = f.readline(4 * MAX_LINE_CHARS + 2)  # a character is at most 4 bytes
        if not line:
            return
        n += 1
        if isinstance(line, bytes):
            try:
                line = line.decode("utf-8")
            except UnicodeDecodeError as exc:
                raise RefitError(f"{source}: line {n}: not UTF-8 text ({exc.reason} at "
                                 f"byte {exc.start} of the line); save the readings as a "
                                 "plain UTF-8 CSV file") from None
        if len(line.rstrip("\r\n")) > MAX_LINE_CHARS:
            raise RefitError(f"{source}: line {n} is longer than {MAX_LINE_CHARS} "
                             "characters; a reading is one short line "
                             f"({','.join(REQUIRED_COLUMNS)}): is this the readings file?")
        yield line


def _records(lines: Iterable[str], source: str) -> Iterator[tuple[int, list[str]]]:
    """Non-blank CSV records with the line number they start on."""
    reader = csv.reader(lines, strict=True)
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


def read_readings(text: str | IO, config: Config,
                  source: str = "<csv>") -> Readings:
    """Parse and check the CSV text of a readings file.

    Parameters
    ----------
    text : str or file
        The file's content, or the file open for reading (text, or binary UTF-8): it is
        read line by line and only the checked readings are held.
    config : Config
        Supplies the channel names a reading may name.
    source : str
        The file name, for messages.

    Returns
    -------
    Readings

    Raises
    ------
    RefitError
        Empty file (or only a byte-order mark, blank lines or commas), bad header, a
        line too long or with the wrong number of fields, an unparsable time or number
        (digit separators included), a time outside :data:`YEARS`, an unknown channel,
        a pressure or temperature out of range, more than :data:`MAX_READINGS`
        readings, or the same channel twice at the same time; the message names the
        line.
    """
    f = io.StringIO(text, newline="") if isinstance(text, str) else text
    records = _records(_strip_bom(_bounded_lines(f, source)), source)
    empty = (f"{source}: the file is empty; expected a header line "
             f"'{','.join(REQUIRED_COLUMNS)}' and one reading per line")
    try:
        header_line, fields = next(records)
    except StopIteration:
        raise RefitError(empty + " (it holds no field with text: only blank lines, "
                         "commas or a byte-order mark)") from None
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
    names = tuple(c.name for c in config.channels)
    index = {name: i for i, name in enumerate(names)}
    out = Readings(names)
    for line, fields in records:
        where = f"{source}: line {line}"
        if len(fields) != len(header):
            raise RefitError(f"{where}: {len(fields)} fields, but the header has "
                             f"{len(header)} ({','.join(header)})")
        if len(out) >= MAX_READINGS:
            raise RefitError(f"{where}: more than {MAX_READINGS} readings; split the file")
        t = _time_us(fields[col["time_utc"]], where)
        channel = fields[col["channel"]].strip()
        if channel not in index:
            raise RefitError(f"{where}: unknown channel {channel!r}; the configuration "
                             f"{config.source} has {', '.join(names)}")
        signal = _number(fields[col["signal"]], "signal", where, allow_empty=False)
        pressure = (_number(fields[col["pressure_hpa"]], "pressure_hpa", where, True,
                            PRESSURE_RANGE_HPA, "hPa") if "pressure_hpa" in col else math.nan)
        temp = (_number(fields[col["detector_temp_c"]], "detector_temp_c", where, True,
                        DETECTOR_TEMP_RANGE_C, "degC")
                if "detector_temp_c" in col else math.nan)
        out.append(line, t, index[channel], signal, pressure, temp)
    if not out:
        raise RefitError(f"{source}: no readings after the header on line {header_line}; "
                         "add one line per reading")
    _refuse_repeats(out, source)
    return out


def _strip_bom(lines: Iterator[str]) -> Iterator[str]:
    first = next(lines, None)
    if first is None:
        return
    yield first.removeprefix("\ufeff")
    yield from lines


def _refuse_repeats(readings: Readings, source: str) -> None:
    """The same channel twice at the same instant: name the earliest second reading."""
    c = readings.columns()
    order = np.lexsort((c["line"], c["channel"], c["time_us"]))
    t, ch, line = c["time_us"][order], c["channel"][order], c["line"][order]
    same = np.flatnonzero((t[1:] == t[:-1]) & (ch[1:] == ch[:-1]))
    if same.size == 0:
        return
    # Each run of repeats is sorted by line, so the earliest line that follows one of
    # the same key is the file's first repeat, and the line before it in the run is
    # the run's first reading.
    j = int(same[np.argmin(line[same + 1])])
    when = (_EPOCH + int(t[j]) * _US).isoformat()
    raise RefitError(f"{source}: line {int(line[j + 1])}: a second reading of channel "
                     f"{readings.channels[int(ch[j])]} at {when} (the first is on line "
                     f"{int(line[j])}); remove one of them")


def refit_readings(readings: Readings, config: Config) -> dict[str, Any]:
    """Fit every (plan date, session) group of the readings, one local date at a time
    (the solar position and the series of one date are all that is held beside the
    readings' columns).

    Returns
    -------
    dict
        ``results``: rows in the JSON contract (:data:`daemon.store.reader.RESULT_KEYS`),
        ordered by date, session and configuration order; ``details``: per row its
        ``notes``, ``tau_aerosol``, ``tau_rayleigh``, ``tau_ozone``, ``residual_sd``,
        ``e0_1au_w_m2_nm`` and ``astm_ratio``; ``readings``: how many were read.
    """
    c = readings.columns()
    order = np.argsort(c["time_us"], kind="stable")
    t_sorted = c["time_us"][order]
    times_us, first_row = np.unique(t_sorted, return_index=True)
    tz = config.tz
    local_date = np.array([(_EPOCH + int(us) * _US).astimezone(tz).date().toordinal()
                           for us in times_us], dtype=np.int64)
    # The local date of each row of ``order`` (a date need not be one stretch of time:
    # a zone may fall back across midnight).
    row_date = np.repeat(local_date, np.diff(np.append(first_row, t_sorted.size)))
    results: list[dict[str, Any]] = []
    details: list[dict[str, Any]] = []
    for ordinal in np.unique(local_date):
        date = _dt.date.fromordinal(int(ordinal)).isoformat()
        day = _fit_date(c, order[row_date == ordinal], times_us[local_date == ordinal],
                        date, config)
        contract = {session: [result_contract(row) for row in day.get(session, ())]
                    for session in ("am", "pm")}
        apply_day_check(contract["am"], contract["pm"], config.fit)
        for session in ("am", "pm"):
            results += contract[session]
            details += [{k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                         for k, v in row.items() if k in DETAIL_KEYS}
                        for row in day.get(session, ())]
    return {"results": results, "details": details, "readings": len(readings)}


def _fit_date(c: dict[str, np.ndarray], rows: np.ndarray, times_us: np.ndarray, date: str,
              config: Config) -> dict[str, list[dict]]:
    """The session fits of one local date: ``rows`` index the columns ``c`` in time
    order, ``times_us`` are that date's distinct instants, sorted."""
    times = [_EPOCH + int(us) * _US for us in times_us]
    pos = solar.sun_position(times, config.site)
    zenith = np.asarray(pos.apparent_zenith_deg, dtype=float)
    airmass = np.asarray(solar.relative_airmass(zenith), dtype=float)
    ozone_m = np.asarray(solar.ozone_airmass(zenith, config.site.elevation_m), dtype=float)
    esf = np.asarray(solar.earth_sun_factor(times), dtype=float)
    # Local apparent solar time decides morning or afternoon, which stays right where
    # the sun passes north of the zenith (azimuth would not).
    solar_hour = (times_us % 86_400_000_000) / 3.6e9
    solar_hour = (solar_hour + config.site.longitude_deg / 15.0
                  + np.asarray(pos.equation_of_time_min) / 60.0) % 24.0
    at = np.searchsorted(times_us, c["time_us"][rows])  # each row's instant
    afternoon = solar_hour[at] >= 12.0
    fits: dict[str, list[dict]] = {}
    for session, in_session in (("am", ~afternoon), ("pm", afternoon)):
        if not in_session.any():
            continue
        series = {}
        for k, ch in enumerate(config.channels):
            pick = in_session & (c["channel"][rows] == k)
            r, i = rows[pick], at[pick]
            signal = np.array([temperature_corrected(float(v), float(d), ch)
                               for v, d in zip(c["signal_v"][r], c["detector_temp_c"][r],
                                               strict=True)], dtype=float)
            series[ch.name] = ChannelSeries(
                airmass=airmass[i], ozone_airmass=ozone_m[i],
                pressure_hpa=c["pressure_hpa"][r].copy(), signal_v=signal,
                earth_sun_factor=esf[i], n_total=int(r.size), notes=[],
                hours=c["time_us"][r] / 3.6e9)
        fits[session] = fit_series(series, config, date, session)
    return fits


_KINDS = ((stat.S_ISDIR, "a directory"), (stat.S_ISFIFO, "a named pipe (FIFO)"),
          (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
          (stat.S_ISSOCK, "a socket"))


def open_regular(path: Path) -> IO[bytes]:
    """Open ``path`` for reading (binary) if it is a regular file.

    A FIFO is opened without blocking (nobody need be writing to it) and then refused,
    like a device (``/dev/zero``, ``/dev/urandom``), a directory or a socket: a readings
    file has an end.

    Raises
    ------
    FileNotFoundError
        Nothing at ``path``.
    RefitInputError
        Not a regular file, or not readable; the message says which.
    """
    try:
        fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK | os.O_CLOEXEC | os.O_NOCTTY)
    except FileNotFoundError:
        raise
    except PermissionError:
        raise RefitInputError(f"{path}: permission denied; make the readings file readable "
                              "by this user or copy it somewhere that is") from None
    except OSError as exc:
        raise RefitInputError(f"{path}: cannot be opened ({exc.strerror})") from None
    mode = os.fstat(fd).st_mode
    if not stat.S_ISREG(mode):
        os.close(fd)
        kind = next((name for test, name in _KINDS if test(mode)), "not a regular file")
        raise RefitInputError(f"{path}: is {kind}, not a readings file; pass a regular "
                              "CSV file (copy a stream to a file first)")
    os.set_blocking(fd, True)
    return open(fd, "rb")


def refit_file(path: str | Path, config: Config) -> dict[str, Any]:
    """Read a readings CSV file and fit it; see :func:`read_readings` for the format.

    The file is read line by line (a line longer than :data:`MAX_LINE_CHARS` is refused
    before it is held); only the checked readings' columns stay in memory.

    Raises
    ------
    FileNotFoundError
        The file does not exist.
    RefitInputError
        The path is not a regular file that can be read.
    RefitError
        The file is not a well-formed readings file.
    """
    p = Path(path)
    with open_regular(p) as f:
        readings = read_readings(f, config, str(p))
    out = refit_readings(readings, config)
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
    except RefitInputError as exc:
        raise CommandError(str(exc), EX_NOINPUT) from None
    except RefitError as exc:
        raise CommandError(str(exc), EX_DATAERR) from None
    if args.json:
        print(dumps(out))
        return 0
    print(f"{out['readings']} readings from {out['csv']} fitted with {out['config']}")
    print(results_table(out["results"]))
    return 0
