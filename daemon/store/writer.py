"""The service's SQLite store (writer side, sqlite-utils).

One file, WAL journal, foreign keys on, schema versioned with sqlite-utils
``Migrations``. Every measurement (its row, its raw samples, its saturation flags
and its housekeeping) goes in with one atomic transaction: it is in the store
completely or not at all. Raw samples are kept, so every result can be re-derived.

Durability: ``synchronous=FULL``. In WAL mode NORMAL already protects the file from
corruption, but a power cut can still lose the last commits; FULL syncs the WAL at
each commit. Commits are rare here (a measurement every few minutes, a heartbeat a
minute), the board at the site runs from a solar battery and an SD card, and a lost
measurement near air mass 6 cannot be taken again that day, so the extra fsync is
worth its few milliseconds.

The operator's commands never use this module: see :mod:`daemon.store.reader`.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import math
import sqlite3
import threading
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from sqlite_utils import Database
from sqlite_utils.migrations import Migrations

from daemon.science.points import FIT_POINT_ROLES, ChannelStats, SessionPoint
from daemon.store.reader import (
    FIT_SESSIONS,
    SESSIONS,
    StoreError,
    check_plan_date,
    results_between,
    session_points,
    stored_plan,
    stored_plan_digest,
    stored_sun_table,
)
from drivers.interfaces import Housekeeping

__all__ = ["ChannelStats", "MeasurementRecord", "SessionPoint", "Store", "StoreError",
           "utc_iso"]

STATUSES = ("ok", "failed")
EVENT_LEVELS = ("debug", "info", "warning", "error", "critical")
#: Who recorded a configuration: the station, the simulator bench, an operator's
#: command that writes (calibrate with --config).
CONFIG_ORIGINS = ("service", "bench", "operator")
BUSY_TIMEOUT_S = 5.0
#: What a store write raises when it cannot be done (a full disk, a read-only file
#: system, a store in use): the service survives it and tries the write again later.
STORE_ERRORS = (sqlite3.Error, StoreError)
#: Sun tables kept before the newest plan's date [days] (see Store.save_plan).
SUN_TABLE_KEEP_DAYS = 7
_SQLITE_MAGIC = b"SQLite format 3\x00"

# --------------------------------------------------------------------------- schema

migrations = Migrations("heliotrope")

#: session_results columns of a water-vapour channel (m006), the same keys in a fit row.
WATER_VAPOUR_RESULT_COLUMNS = ("wv_a", "wv_b", "wv_u_a", "wv_u_b", "wv_v0_rel_unc_b",
                               "precipitable_water_cm")


@migrations()
def m001_initial(db: Database) -> None:
    db["measurements"].create({
        "id": int, "time_utc": str, "plan_date": str, "session": str,
        "target_airmass": float, "status": str, "failure": str,
        "apparent_zenith_deg": float, "azimuth_deg": float, "airmass": float,
        "ozone_airmass": float, "earth_sun_factor": float, "pressure_hpa": float,
        "pointing_error_deg": float, "locked": int, "duration_s": float,
        "n_samples": int, "n_dark_samples": int,
    }, pk="id", not_null=["time_utc", "plan_date", "session", "status"])
    db["measurements"].create_index(["plan_date", "session"])
    db["measurements"].create_index(["time_utc"])

    # Channel order and saturation per measurement; samples name their channel.
    db["measurement_channels"].create({
        "measurement_id": int, "channel_index": int, "channel": str, "saturated": int,
    }, pk=("measurement_id", "channel"), not_null=["channel_index", "saturated"],
        foreign_keys=[("measurement_id", "measurements", "id")])

    # Primary key order serves the per-channel aggregates of session_points().
    db["samples"].create({
        "measurement_id": int, "kind": str, "channel": str, "sample_index": int,
        "value_v": float,
    }, pk=("measurement_id", "kind", "channel", "sample_index"),
        foreign_keys=[("measurement_id", "measurements", "id")])

    db["housekeeping"].create({
        "measurement_id": int, "detector_temp_c": float, "case_temp_c": float,
        "ambient_temp_c": float, "supply_v": float, "humidity_pct": float,
        "pressure_hpa": float,
    }, pk="measurement_id", foreign_keys=[("measurement_id", "measurements", "id")])

    db["events"].create({
        "id": int, "time_utc": str, "level": str, "kind": str, "message": str, "detail": str,
    }, pk="id", not_null=["time_utc", "level", "kind", "message"])
    db["events"].create_index(["time_utc"])

    db["plans"].create({"plan_date": str, "created_utc": str, "plan_json": str},
                       pk="plan_date", not_null=["created_utc", "plan_json"])

    db["session_results"].create({
        "plan_date": str, "session": str, "channel": str, "wavelength_nm": float,
        "v0": float, "v0_1au": float, "v0_rel_unc": float, "tau": float,
        "n_used": int, "n_total": int, "airmass_min": float, "airmass_max": float,
        "accepted": int, "reasons": str, "notes": str, "earth_sun_factor": float,
        "residual_sd": float, "fitted_utc": str,
    }, pk=("plan_date", "session", "channel"), not_null=["accepted", "fitted_utc"])

    db["meta"].create({"key": str, "value": str, "updated_utc": str}, pk="key")


@migrations()
def m002_calibrations_aod(db: Database) -> None:
    # A calibration is one campaign (first_date to last_date) combined per channel;
    # its session list is kept as JSON so a flagged session can be traced back.
    db["calibrations"].create({
        "id": int, "created_utc": str, "first_date": str, "last_date": str,
        "site_name": str, "settings": str, "notes": str,
    }, pk="id", not_null=["created_utc", "first_date", "last_date"])
    db["calibration_channels"].create({
        "calibration_id": int, "channel": str, "wavelength_nm": float, "v0_1au": float,
        "v0_1au_unc": float, "repeatability_pct": float, "n_sessions": int,
        "n_flagged": int, "drift_pct_per_year": float, "drift_unc_pct_per_year": float,
        "e0_1au_w_m2_nm": float, "astm_ratio": float, "usable": int, "sessions": str,
        "reasons": str,
    }, pk=("calibration_id", "channel"), not_null=["usable"],
        foreign_keys=[("calibration_id", "calibrations", "id")])
    # One aerosol optical depth per measurement and channel, from the calibration
    # named in the row; a newer calibration replaces it.
    db["aod"].create({
        "measurement_id": int, "channel": str, "calibration_id": int, "wavelength_nm": float,
        "aod": float, "aod_unc": float, "tau_total": float, "tau_rayleigh": float,
        "tau_ozone": float, "airmass": float, "ozone_airmass": float, "pressure_hpa": float,
        "flag": str,
    }, pk=("measurement_id", "channel"),
        foreign_keys=[("measurement_id", "measurements", "id"),
                      ("calibration_id", "calibrations", "id")])
    db["aod"].create_index(["calibration_id"])
    db["aod_angstrom"].create({
        "measurement_id": int, "calibration_id": int, "angstrom_alpha": float,
        "channel_short": str, "channel_long": str,
    }, pk="measurement_id",
        foreign_keys=[("measurement_id", "measurements", "id"),
                      ("calibration_id", "calibrations", "id")])


@migrations()
def m003_fit_points(db: Database) -> None:
    # Per point of a session fit: the (x, y) the fit used and its role, so the
    # read-only plot and report show the fitted points without re-fitting. Replaced
    # together with the session_results row of the same channel.
    db["fit_points"].create({
        "plan_date": str, "session": str, "channel": str, "measurement_id": int,
        "x": float, "y": float, "role": str, "reason": str,
    }, pk=("plan_date", "session", "channel", "measurement_id"), not_null=["role"],
        foreign_keys=[("measurement_id", "measurements", "id")])


@migrations()
def m004_indexes_by_date(db: Database) -> None:
    # Per-session reads pick the 'ok' measurements of one date and session; with the
    # status in the index they never touch another session's rows. It replaces the
    # (plan_date, session) index, its prefix.
    db["measurements"].create_index(["plan_date", "session", "status"], if_not_exists=True)
    db.execute("DROP INDEX IF EXISTS idx_measurements_plan_date_session")
    # Date-range reads (exports, AOD, a day's lines) walk measurements in
    # (plan_date, time_utc) order, which is time order because a plan date is the local
    # date of its measurements: rows stream in index order, with no sort of the range.
    db["measurements"].create_index(["plan_date", "time_utc"], if_not_exists=True)
    # Nothing to add for the other big tables: the primary keys already lead with the
    # column the per-session queries search on. samples (measurement_id, kind, channel,
    # sample_index), fit_points (plan_date, session, channel, measurement_id), aod
    # (measurement_id, channel) and measurement_channels (measurement_id, channel); a
    # second index on samples would nearly double the store's largest table.


@migrations()
def m005_configurations(db: Database) -> None:
    # Provenance: the configuration text each run used, by its SHA-256, with the
    # software version and who ran it ('service', or 'bench' for a simulated store).
    # Results and calibrations point to the configuration that produced them.
    db["configurations"].create({
        "id": int, "sha256": str, "text": str, "source": str, "software_version": str,
        "origin": str, "first_used_utc": str, "last_used_utc": str,
    }, pk="id", not_null=["sha256", "text", "software_version", "origin", "first_used_utc",
                          "last_used_utc"])
    db["configurations"].create_index(["sha256", "software_version", "origin"], unique=True)
    for table in ("session_results", "calibrations"):
        # A plain ALTER keeps the table (no rebuild): old rows point nowhere (NULL).
        db.execute(f"ALTER TABLE {table} ADD COLUMN configuration_id INTEGER "
                   "REFERENCES configurations(id)")


@migrations()
def m006_water_vapour(db: Database) -> None:
    # A water-vapour channel's modified-Langley constants (T = exp(-a (m W)^b), derived
    # from its filter), their standard uncertainties, b's share of V0's relative
    # uncertainty and the session's column [cm], with its result. Per measurement,
    # the precipitable water [cm] from a calibrated water-vapour channel, in the aod
    # table (its aod is NULL on that row). NULL for window channels and older rows.
    for column in WATER_VAPOUR_RESULT_COLUMNS:
        db["session_results"].add_column(column, float)
    db["aod"].add_column("precipitable_water_cm", float)


@migrations()
def m007_sun_tables(db: Database) -> None:
    # The plan's child process stores, beside the plan, the day's sun table (the SPA's
    # unrefracted geometry on a time grid, which the resident service interpolates
    # without pvlib) and, with both, the SHA-256 of the configuration text they were
    # computed from: the service uses neither when the hash is not its own.
    db.execute("ALTER TABLE plans ADD COLUMN config_sha256 TEXT")
    db["sun_tables"].create({
        "plan_date": str, "config_sha256": str, "created_utc": str, "table_json": str,
    }, pk="plan_date", not_null=["config_sha256", "created_utc", "table_json"])


@migrations()
def m008_configuration_data(db: Database) -> None:
    # Beside each recorded configuration text, its parsed data as JSON when JSON holds
    # it exactly (daemon.config.yamltext.json_form), so a read command can validate the
    # store's configuration without loading PyYAML. NULL where it cannot (a date, a
    # text this version refuses): the read commands then parse the text.
    db["configurations"].add_column("data_json", str)
    for cid, text in db.execute("SELECT id, text FROM configurations").fetchall():
        db.execute("UPDATE configurations SET data_json = ? WHERE id = ?",
                   (configuration_json(text), cid))


@migrations()
def m009_shared_uncertainty(db: Database) -> None:
    # The part of a session's V0 uncertainty the sessions of a campaign share (its
    # model terms; for a water-vapour channel also b and the vapour's layer air mass),
    # as the fit computed it, so that the campaign need not recompute it from the
    # air-mass range (which it cannot do for a water-vapour channel). NULL in older
    # rows: the campaign then recomputes a window channel's.
    db["session_results"].add_column("v0_shared_rel_unc", float)


# Every migration is pending on an empty database: that lists the names this version knows.
KNOWN_MIGRATIONS = frozenset(m.name for m in migrations.pending(
    Database(memory=True, execute_plugins=False)))

# --------------------------------------------------------------------------- records


def config_digest(text: str) -> str:
    """The SHA-256 of a configuration text, as recorded with results and plans."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def configuration_json(text: str) -> str | None:
    """The JSON form of a configuration text's data, or None where JSON cannot hold it
    exactly or the text does not parse (the read commands then parse the text)."""
    from daemon.config.errors import ConfigError
    from daemon.config.yamltext import json_form, parse_yaml

    try:
        return json_form(parse_yaml(text))
    except ConfigError:
        return None


def utc_iso(when: _dt.datetime) -> str:
    """ISO 8601 text of an aware datetime in UTC (``...+00:00``, microseconds).

    The fixed width keeps text order equal to time order. Naive datetimes raise
    ValueError: their zone is a guess, and a guess in a stored timestamp is a bug.
    """
    if not isinstance(when, _dt.datetime):
        raise ValueError(f"expected a timezone-aware datetime, got {when!r}")
    if when.tzinfo is None or when.utcoffset() is None:
        raise ValueError(f"naive datetime {when.isoformat()} has no time zone; pass an aware "
                         "UTC datetime (datetime.now(timezone.utc) or the injected clock)")
    return when.astimezone(_dt.UTC).isoformat(timespec="microseconds")


def _num(value: Any) -> float | None:
    """A float for the store, or None (NULL) for missing or non-finite values."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def _jsonable(obj: Any) -> Any:
    """Make ``obj`` strict-JSON safe: NaN and infinities become null, times become text."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, _dt.datetime):
        return utc_iso(obj)
    if isinstance(obj, _dt.date):
        return obj.isoformat()
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple | set | frozenset):
        return [_jsonable(v) for v in obj]
    if hasattr(obj, "item") and callable(obj.item):  # numpy scalars
        return _jsonable(obj.item())
    if isinstance(obj, str | int | bool) or obj is None:
        return obj
    raise ValueError(f"cannot store a value of type {type(obj).__name__} as JSON: {obj!r}")


def _dumps(obj: Any) -> str:
    return json.dumps(_jsonable(obj), sort_keys=True, allow_nan=False)


@dataclass(frozen=True)
class MeasurementRecord:
    """Everything about one measurement at one target, as the acquisition took it.

    ``sun[i][c]`` and ``dark[i][c]`` are sample ``i`` of channel ``c`` [V] in the
    order of ``channels``; ``dark`` may be empty. Geometry is computed at the
    burst's mean time. A failed measurement carries ``status='failed'``, a
    ``failure`` text, and whatever was read before the failure.
    """

    time_utc: _dt.datetime
    plan_date: str
    session: str  # 'am', 'pm' or 'routine'
    target_airmass: float | None
    status: str  # 'ok' or 'failed'
    failure: str | None
    apparent_zenith_deg: float | None
    azimuth_deg: float | None
    airmass: float | None
    ozone_airmass: float | None
    earth_sun_factor: float | None  # (r0/r)^2 on the day
    pressure_hpa: float | None
    pointing_error_deg: float | None
    locked: bool
    duration_s: float | None
    channels: tuple[str, ...]
    sun: tuple[tuple[float, ...], ...]
    dark: tuple[tuple[float, ...], ...] = ()
    saturated: tuple[bool, ...] = ()
    housekeeping: Housekeeping | None = None


def _check_record(rec: MeasurementRecord) -> None:
    """Reject a malformed record before anything is written."""
    if rec.session not in SESSIONS:
        raise ValueError(f"session must be one of {', '.join(SESSIONS)}; got {rec.session!r}")
    if rec.status not in STATUSES:
        raise ValueError(f"status must be 'ok' or 'failed'; got {rec.status!r}")
    if rec.status == "failed" and not rec.failure:
        raise ValueError("a failed measurement needs a failure text saying what went wrong")
    check_plan_date(rec.plan_date)
    n_ch = len(rec.channels)
    if len(set(rec.channels)) != n_ch:
        raise ValueError(f"channel names repeat in {rec.channels!r}; give each its own name")
    if rec.status == "ok" and n_ch == 0:
        raise ValueError("an 'ok' measurement needs at least one channel")
    for kind, samples in (("sun", rec.sun), ("dark", rec.dark)):
        for i, row in enumerate(samples):
            if len(row) != n_ch:
                raise ValueError(f"{kind} sample {i} has {len(row)} values for {n_ch} channels "
                                 f"{rec.channels!r}; every sample needs one value per channel")
    if rec.saturated and len(rec.saturated) != n_ch:
        raise ValueError(f"saturated has {len(rec.saturated)} flags for {n_ch} channels")
    if rec.status == "ok" and not rec.sun:
        raise ValueError("an 'ok' measurement needs at least one sun sample")


# --------------------------------------------------------------------------- store


class Store:
    """The service's read-write handle on the store. Open with :meth:`Store.open`.

    Safe to share between the service's threads: calls are serialised by a lock.
    """

    def __init__(self, db: Database, path: Path):
        self.db = db
        self.path = path
        self._lock = threading.RLock()
        #: The configuration this process runs with (see :meth:`record_configuration`);
        #: session results and calibrations saved from now on point to it.
        self.configuration_id: int | None = None

    @property
    def conn(self) -> sqlite3.Connection:
        """The underlying connection (for :mod:`daemon.store.reader` queries and tests)."""
        return self.db.conn

    # ------------------------------------------------------------------ opening

    @classmethod
    def open(cls, path: str | Path, full_check: bool = True,
             on_migrate: Callable[[list[str]], None] | None = None) -> Store:
        """Open or create the store at ``path`` and bring its schema up to date.

        Creates missing parent directories. An existing file that is not an SQLite
        database, or fails ``PRAGMA quick_check``, raises :class:`StoreError` and is
        left exactly as it was.

        ``full_check=False`` keeps only the checks whose cost does not grow with the
        store (the file header, SQLite's reading of the schema, the migrations): the
        service starts that way and runs :func:`integrity_problems` after READY.
        ``on_migrate`` is called with the names of the schema changes about to be
        applied, when there are any (an index built on a store of years takes a while:
        the service tells systemd to wait).
        """
        p = Path(path).expanduser()
        if p.is_dir():
            raise StoreError(f"{p}: is a directory; store.path must name a file")
        try:
            p.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(f"{p.parent}: cannot create the store's directory ({exc}); "
                             "create it or point store.path somewhere writable") from None
        if p.exists():
            _check_header(p)
        try:
            conn = sqlite3.connect(str(p), timeout=BUSY_TIMEOUT_S, check_same_thread=False)
        except sqlite3.Error as exc:
            raise StoreError(f"{p}: cannot open the store ({exc}); check the path and its "
                             "permissions") from None
        try:
            if full_check:
                _quick_check(conn, p)
            else:
                _schema_check(conn, p)
            db = Database(conn, execute_plugins=False)
            db.enable_wal()
            if db.journal_mode != "wal":
                raise StoreError(f"{p}: the file system does not allow SQLite's WAL mode "
                                 f"(journal mode is {db.journal_mode!r}); put the store on "
                                 "a local disk")
            db.execute("PRAGMA foreign_keys = ON")
            db.execute("PRAGMA synchronous = FULL")
            _apply_migrations(db, p, on_migrate)
        except StoreError:
            conn.close()
            raise
        except sqlite3.Error as exc:
            conn.close()
            raise StoreError(f"{p}: cannot prepare the store ({exc})") from None
        return cls(db, p)

    def close(self) -> None:
        """Close the connection; the last connection out checkpoints the WAL."""
        with self._lock:
            self.db.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ writing

    def record_configuration(self, text: str, source: str, software_version: str,
                             now: _dt.datetime, origin: str = "service") -> int:
        """Record the configuration this run uses (its text, SHA-256 and the software
        version) and make it the one later results and calibrations point to.

        The same text, version and origin reuse their row (its ``last_used_utc`` moves
        to ``now``); ``origin`` is 'service' for the station and 'bench' for a store
        filled by the simulator. Returns the row id.
        """
        if origin not in CONFIG_ORIGINS:
            raise ValueError(f"origin must be one of {', '.join(CONFIG_ORIGINS)}; "
                             f"got {origin!r}")
        if not text.strip():
            raise ValueError("an empty configuration text cannot be recorded; pass the "
                             "text of the YAML file the run loaded")
        digest = config_digest(text)
        when = utc_iso(now)
        with self._lock, self.db.atomic():
            row = self.db.conn.execute(
                "SELECT id FROM configurations WHERE sha256 = ? AND software_version = ? "
                "AND origin = ?", (digest, software_version, origin)).fetchone()
            if row is None:
                cid = int(self.db["configurations"].insert({
                    "sha256": digest, "text": text, "source": source,
                    "software_version": software_version, "origin": origin,
                    "first_used_utc": when, "last_used_utc": when,
                    "data_json": configuration_json(text)}).last_pk)
            else:
                cid = int(row[0])
                self.db.conn.execute("UPDATE configurations SET last_used_utc = ?, "
                                     "source = ? WHERE id = ?", (when, source, cid))
        self.configuration_id = cid
        return cid

    def record_measurement(self, rec: MeasurementRecord) -> int:
        """Write one measurement with its samples and housekeeping atomically.

        Returns
        -------
        int
            The new measurement id.
        """
        _check_record(rec)
        time_text = utc_iso(rec.time_utc)
        hk = rec.housekeeping
        row = {
            "time_utc": time_text,
            "plan_date": rec.plan_date,
            "session": rec.session,
            "target_airmass": _num(rec.target_airmass),
            "status": rec.status,
            "failure": rec.failure,
            "apparent_zenith_deg": _num(rec.apparent_zenith_deg),
            "azimuth_deg": _num(rec.azimuth_deg),
            "airmass": _num(rec.airmass),
            "ozone_airmass": _num(rec.ozone_airmass),
            "earth_sun_factor": _num(rec.earth_sun_factor),
            "pressure_hpa": _num(rec.pressure_hpa),
            "pointing_error_deg": _num(rec.pointing_error_deg),
            "locked": int(bool(rec.locked)),
            "duration_s": _num(rec.duration_s),
            "n_samples": len(rec.sun),
            "n_dark_samples": len(rec.dark),
        }
        saturated = rec.saturated or (False,) * len(rec.channels)
        with self._lock, self.db.atomic():
            table = self.db["measurements"].insert(row)
            mid = int(table.last_pk)
            self.db["measurement_channels"].insert_all(
                {"measurement_id": mid, "channel_index": i, "channel": name,
                 "saturated": int(bool(sat))}
                for i, (name, sat) in enumerate(zip(rec.channels, saturated, strict=True)))
            self.db["samples"].insert_all(_sample_rows(mid, rec))
            if hk is not None:
                self.db["housekeeping"].insert({
                    "measurement_id": mid,
                    "detector_temp_c": _num(hk.detector_temp_c),
                    "case_temp_c": _num(hk.case_temp_c),
                    "ambient_temp_c": _num(hk.ambient_temp_c),
                    "supply_v": _num(hk.supply_v),
                    "humidity_pct": _num(hk.humidity_pct),
                    "pressure_hpa": _num(hk.pressure_hpa),
                })
        return mid

    def record_event(self, time_utc: _dt.datetime, level: str, kind: str, message: str,
                     detail: Mapping[str, Any] | None = None) -> int:
        """Log an event (fault, restart, warning) with optional JSON ``detail``; return its id."""
        if level not in EVENT_LEVELS:
            raise ValueError(f"event level must be one of {', '.join(EVENT_LEVELS)}; "
                             f"got {level!r}")
        if not kind or not message:
            raise ValueError("an event needs a kind and a message")
        row = {"time_utc": utc_iso(time_utc), "level": level, "kind": kind,
               "message": message, "detail": None if detail is None else _dumps(detail)}
        with self._lock, self.db.atomic():
            return int(self.db["events"].insert(row).last_pk)

    def save_plan(self, plan_date: str | _dt.date, plan_dict: Mapping[str, Any],
                  created_utc: _dt.datetime | None = None, config_sha256: str | None = None,
                  sun_table: Mapping[str, Any] | None = None) -> None:
        """Store (or replace) the plan of one local date as JSON, and with it, in the
        same transaction, the day's sun table when one is given.

        ``created_utc`` should come from the injected clock; the system clock is
        used when it is left out. ``config_sha256`` is the SHA-256 of the
        configuration text the plan was computed from (:func:`config_digest`). Sun
        tables are derived data (a pure function of the configuration and the date):
        those more than :data:`SUN_TABLE_KEEP_DAYS` before ``plan_date`` are deleted
        as a new one is stored, so they cost a few days' worth of rows, not years'.
        """
        created = created_utc if created_utc is not None else _dt.datetime.now(_dt.UTC)
        date = check_plan_date(plan_date)
        row = {"plan_date": date, "created_utc": utc_iso(created),
               "plan_json": _dumps(plan_dict), "config_sha256": config_sha256}
        with self._lock, self.db.atomic():
            self.db["plans"].insert(row, replace=True)
            if sun_table is not None:
                if config_sha256 is None:
                    raise ValueError("a sun table is stored with the SHA-256 of its "
                                     "configuration; pass config_sha256")
                oldest = _dt.date.fromisoformat(date) - _dt.timedelta(days=SUN_TABLE_KEEP_DAYS)
                self.db.execute("DELETE FROM sun_tables WHERE plan_date < ?",
                                (oldest.isoformat(),))
                self.db["sun_tables"].insert({
                    "plan_date": date, "config_sha256": config_sha256,
                    "created_utc": utc_iso(created), "table_json": _dumps(sun_table)},
                    replace=True)

    def save_session_results(self, plan_date: str | _dt.date, session: str,
                             rows: Iterable[Mapping[str, Any]],
                             fitted_utc: _dt.datetime | None = None) -> None:
        """Store one session's fit results; a re-fit replaces rows of the same channel.

        Each row needs the contract keys ``channel``, ``wavelength_nm``, ``v0``,
        ``v0_1au``, ``v0_rel_unc``, ``tau``, ``n_used``, ``n_total``,
        ``airmass_min``, ``airmass_max``, ``accepted`` and ``reasons``, and may carry
        ``notes``, ``earth_sun_factor``, ``residual_sd``, ``fitted_utc`` and
        ``fit_points`` (dicts with ``measurement_id``, ``x``, ``y``, ``role`` from
        :data:`daemon.science.points.FIT_POINT_ROLES` and ``reason``, the screening key of
        a 'screened' point). NaN is stored as NULL. ``fitted_utc`` defaults to the
        system clock. In one transaction with the results, the stored fit points of
        every channel saved are replaced by the row's ``fit_points`` (none when the
        row has none), so points of an older fit never outlive it.
        """
        date = check_plan_date(plan_date)
        if session not in FIT_SESSIONS:
            raise ValueError(f"session results are per 'am' or 'pm' session; got {session!r}")
        default_fitted = fitted_utc if fitted_utc is not None else _dt.datetime.now(_dt.UTC)
        records = []
        points = []
        for r in rows:
            for key, want in (("date", date), ("session", session)):
                if key in r and r[key] != want:
                    raise ValueError(f"row for channel {r.get('channel')!r} has {key} "
                                     f"{r[key]!r} but is saved under {want!r}")
            fitted = r.get("fitted_utc", default_fitted)
            records.append({
                "plan_date": date, "session": session, "channel": str(r["channel"]),
                "wavelength_nm": _num(r["wavelength_nm"]),
                "v0": _num(r["v0"]), "v0_1au": _num(r["v0_1au"]),
                "v0_rel_unc": _num(r["v0_rel_unc"]), "tau": _num(r["tau"]),
                "n_used": int(r["n_used"]), "n_total": int(r["n_total"]),
                "airmass_min": _num(r["airmass_min"]), "airmass_max": _num(r["airmass_max"]),
                "accepted": int(bool(r["accepted"])),
                "reasons": _dumps(list(r["reasons"])),
                "notes": _dumps(list(r.get("notes", ()))),
                "earth_sun_factor": _num(r.get("earth_sun_factor")),
                "residual_sd": _num(r.get("residual_sd")),
                "fitted_utc": fitted if isinstance(fitted, str) else utc_iso(fitted),
                "configuration_id": self.configuration_id,
                **{k: _num(r.get(k)) for k in WATER_VAPOUR_RESULT_COLUMNS},
                "v0_shared_rel_unc": _num(r.get("v0_shared_rel_unc")),
            })
            points += _fit_point_rows(date, session, str(r["channel"]), r.get("fit_points", ()))
        with self._lock, self.db.atomic():
            self.db["session_results"].insert_all(records, replace=True)
            self.db.conn.executemany(
                "DELETE FROM fit_points WHERE plan_date = ? AND session = ? AND channel = ?",
                [(date, session, rec["channel"]) for rec in records])
            self.db["fit_points"].insert_all(points)

    def _stored_result(self, columns: str, date: str, session: str,
                       channel: str) -> tuple[Any, ...]:
        row = self.db.conn.execute(
            f"SELECT {columns} FROM session_results WHERE plan_date = ? AND session = ? "
            "AND channel = ?", (date, session, channel)).fetchone()
        if row is None:
            raise ValueError(f"no stored result for {date} {session} channel {channel!r}")
        return tuple(row)

    def refuse_session_result(self, plan_date: str | _dt.date, session: str, channel: str,
                              reason: str) -> None:
        """Mark one stored session result as not accepted, with ``reason`` first among
        its reasons (a later check, such as the same day's other session, refused it)."""
        date = check_plan_date(plan_date)
        with self._lock, self.db.atomic():
            row = self._stored_result("reasons, notes", date, session, channel)
            reasons = [reason] + [r for r in json.loads(row[0] or "[]") if r != reason]
            reasons += [n for n in json.loads(row[1] or "[]") if n not in reasons]
            self.db.conn.execute(
                "UPDATE session_results SET accepted = 0, reasons = ? WHERE plan_date = ? "
                "AND session = ? AND channel = ?", (_dumps(reasons), date, session, channel))

    def widen_session_result(self, plan_date: str | _dt.date, session: str, channel: str,
                             v0_rel_unc: float, note: str) -> None:
        """Raise one stored result's V0 uncertainty to ``v0_rel_unc`` (never lower it) and
        add ``note`` to its notes (a later check, the same day's other session, found
        more scatter than it stated alone)."""
        date = check_plan_date(plan_date)
        with self._lock, self.db.atomic():
            row = self._stored_result("v0_rel_unc, notes", date, session, channel)
            if row[0] is not None and row[0] >= v0_rel_unc:
                return
            notes = [*json.loads(row[1] or "[]"), note]
            self.db.conn.execute(
                "UPDATE session_results SET v0_rel_unc = ?, notes = ? WHERE plan_date = ? "
                "AND session = ? AND channel = ?",
                (_num(v0_rel_unc), _dumps(notes), date, session, channel))

    def save_calibration(self, created_utc: _dt.datetime, first_date: str, last_date: str,
                         site_name: str, settings: Mapping[str, Any], notes: Sequence[str],
                         channels: Iterable[Mapping[str, Any]]) -> int:
        """Store one calibration record with its per-channel rows; return its id.

        Each channel row carries the columns of ``calibration_channels`` (see
        :func:`daemon.store.reader.stored_calibration`); ``sessions`` and ``reasons``
        are stored as JSON, NaN as NULL.
        """
        cal = {"created_utc": utc_iso(created_utc), "first_date": check_plan_date(first_date),
               "last_date": check_plan_date(last_date), "site_name": site_name,
               "settings": _dumps(settings), "notes": _dumps(list(notes)),
               "configuration_id": self.configuration_id}
        text = ("channel", "sessions", "reasons", "usable")
        with self._lock, self.db.atomic():
            cid = int(self.db["calibrations"].insert(cal).last_pk)
            rows = []
            for ch in channels:
                row = {k: _num(v) for k, v in ch.items() if k not in text}
                row.update(calibration_id=cid, channel=str(ch["channel"]),
                           usable=int(bool(ch["usable"])),
                           sessions=_dumps(list(ch.get("sessions", ()))),
                           reasons=_dumps(list(ch.get("reasons", ()))))
                for key in ("n_sessions", "n_flagged"):
                    if row.get(key) is not None:
                        row[key] = int(row[key])
                rows.append(row)
            self.db["calibration_channels"].insert_all(rows)
        return cid

    def save_aod(self, rows: Iterable[Mapping[str, Any]],
                 angstrom: Iterable[Mapping[str, Any]] = ()) -> int:
        """Store aerosol optical depths, replacing those of the same measurement and channel.

        ``rows`` carry the columns of the ``aod`` table, ``angstrom`` those of
        ``aod_angstrom`` (one per measurement); NaN is stored as NULL. A measurement's
        old Angstrom row goes when its AOD rows are replaced. Returns the AOD rows stored.
        """
        text = ("channel", "flag", "channel_short", "channel_long")
        ints = ("measurement_id", "calibration_id")

        def clean(r: Mapping[str, Any]) -> dict[str, Any]:
            return {k: (v if k in text else int(v) if k in ints else _num(v))
                    for k, v in r.items()}

        aod_rows = [clean(r) for r in rows]
        alpha_rows = [clean(r) for r in angstrom]
        ids = sorted({r["measurement_id"] for r in aod_rows})
        with self._lock, self.db.atomic():
            for i in range(0, len(ids), 500):
                chunk = ids[i:i + 500]
                marks = ",".join("?" * len(chunk))
                self.db.execute(f"DELETE FROM aod_angstrom WHERE measurement_id IN ({marks})",
                                chunk)
            self._replace_rows("aod", aod_rows)
            self._replace_rows("aod_angstrom", alpha_rows)
        return len(aod_rows)

    def _replace_rows(self, table: str, rows: Sequence[Mapping[str, Any]]) -> None:
        """INSERT OR REPLACE cleaned ``rows`` by one prepared statement over the table's
        columns (a column a row lacks is NULL). A campaign stores tens of thousands of
        rows: sqlite-utils' insert_all re-inspects each value and costs most of the
        time here; its table metadata still names the columns."""
        if not rows:
            return
        cols = list(self.db[table].columns_dict)
        unknown = {k for r in rows for k in r} - set(cols)
        if unknown:
            raise ValueError(f"{table}: no column {', '.join(sorted(unknown))}")
        sql = (f"INSERT OR REPLACE INTO [{table}] ({', '.join(f'[{c}]' for c in cols)}) "
               f"VALUES ({', '.join('?' * len(cols))})")
        self.db.conn.executemany(sql, ([r.get(c) for c in cols] for r in rows))

    def heartbeat(self, now: _dt.datetime) -> None:
        """Record that the service is alive at ``now`` (aware UTC)."""
        text = utc_iso(now)
        with self._lock, self.db.atomic():
            self.db["meta"].insert({"key": "heartbeat_utc", "value": text, "updated_utc": text},
                                   replace=True)

    # ------------------------------------------------------------------ reading

    def sun_table(self, plan_date: str | _dt.date) -> tuple[str, dict[str, Any]] | None:
        """The stored sun table of a date as (configuration SHA-256, table dict), or
        None (see :func:`daemon.store.reader.stored_sun_table`)."""
        with self._lock:
            return stored_sun_table(self.db.conn, plan_date)

    def stored_plan(self, plan_date: str | _dt.date) -> tuple[str | None, dict[str, Any]] | None:
        """The stored plan of a date as (configuration SHA-256 or None, plan dict), or
        None when there is none."""
        with self._lock:
            plan = stored_plan(self.db.conn, plan_date)
            return None if plan is None else (stored_plan_digest(self.db.conn, plan_date),
                                              plan)

    def session_results(self, plan_date: str | _dt.date, session: str) -> list[dict[str, Any]]:
        """The stored results of one session in the JSON contract."""
        date = check_plan_date(plan_date)
        with self._lock:
            return [r for r in results_between(self.db.conn, date, date)
                    if r["session"] == session]

    def session_points(self, plan_date: str | _dt.date, session: str) -> list[SessionPoint]:
        """The 'ok' measurements of one session with per-channel sample aggregates.

        Means, sample standard deviations and counts come from SQL aggregates over
        the raw samples (two passes: the mean first, then squared deviations from
        it, which avoids the cancellation of the sum-of-squares formula).
        """
        with self._lock:
            return session_points(self.db.conn, plan_date, session)



def _fit_point_rows(date: str, session: str, channel: str,
                    points: Iterable[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Check one channel's fit points and turn them into ``fit_points`` rows."""
    out = []
    for pt in points:
        mid = pt.get("measurement_id")
        if mid is None:
            raise ValueError(f"a fit point of channel {channel!r} has no measurement_id; only "
                             "points of stored measurements can be saved")
        role = pt.get("role")
        if role not in FIT_POINT_ROLES:
            raise ValueError(f"fit point {mid} of channel {channel!r} has role {role!r}; "
                             f"use one of {', '.join(FIT_POINT_ROLES)}")
        reason = pt.get("reason")
        if (role == "screened") != (reason is not None):
            raise ValueError(f"fit point {mid} of channel {channel!r}: a 'screened' point "
                             "needs the screening key as its reason, any other role none")
        out.append({"plan_date": date, "session": session, "channel": channel,
                    "measurement_id": int(mid), "x": _num(pt.get("x")), "y": _num(pt.get("y")),
                    "role": role, "reason": reason})
    return out






def _sample_rows(mid: int, rec: MeasurementRecord) -> Iterable[dict[str, Any]]:
    for kind, samples in (("sun", rec.sun), ("dark", rec.dark)):
        for i, values in enumerate(samples):
            for name, value in zip(rec.channels, values, strict=True):
                yield {"measurement_id": mid, "kind": kind, "channel": name,
                       "sample_index": i, "value_v": _num(value)}


def _check_header(p: Path) -> None:
    """Refuse a non-empty file that does not start with the SQLite magic string.

    Checked before SQLite touches the file, so a wrong path never gets a WAL or
    journal written next to (or into) someone else's file.
    """
    try:
        with p.open("rb") as fh:
            head = fh.read(len(_SQLITE_MAGIC))
    except OSError as exc:
        raise StoreError(f"{p}: cannot read the store ({exc}); check its permissions") from None
    if head and head != _SQLITE_MAGIC:
        raise StoreError(f"{p}: not an SQLite database; the file was left untouched. Check "
                         "store.path, or move the file aside so a new store can be created")


RECOVERY_ADVICE = ("Move it aside (keep it for recovery with the sqlite3 shell's "
                   ".recover) and restart to begin a new store")


def _run_check(conn: sqlite3.Connection, p: Path, sql: str) -> list[str]:
    """Run one of SQLite's checking statements; its complaints (none when all is well)."""
    try:
        rows = conn.execute(sql).fetchall()
    except sqlite3.OperationalError as exc:
        raise StoreError(f"{p}: cannot read the store ({exc}); check its permissions and "
                         "that no other program holds it locked") from None
    except sqlite3.DatabaseError as exc:
        raise StoreError(f"{p}: the store is damaged ({exc}); the file was left untouched. "
                         f"{RECOVERY_ADVICE}") from None
    return [str(r[0]) for r in rows if r[0] != "ok"]


def _quick_check(conn: sqlite3.Connection, p: Path) -> None:
    problems = _run_check(conn, p, "PRAGMA quick_check")
    if problems:
        shown = "; ".join(problems[:3])
        raise StoreError(f"{p}: the store failed its integrity check ({shown}); the file was "
                         f"left untouched. {RECOVERY_ADVICE}")


def _schema_check(conn: sqlite3.Connection, p: Path) -> None:
    """The check bounded by the schema, not the data: SQLite parses every stored table
    and index definition (a damaged schema page or header fails here)."""
    _run_check(conn, p, "SELECT count(*) FROM sqlite_master")


def integrity_problems(path: str | Path, cancel: threading.Event | None = None) -> list[str]:
    """The full ``PRAGMA quick_check`` of the store at ``path`` on a connection of its
    own (read-only, so the service's writes go on beside it in WAL mode); SQLite's
    complaints, at most ten (a page too damaged to walk is one complaint), or an empty
    list when the store is sound.

    Raises :class:`StoreError` when the store cannot be opened or is locked, or when
    ``cancel`` is set during the check (SQLite's progress handler ends it within a few
    thousand steps)."""
    p = Path(path).expanduser()
    try:
        conn = sqlite3.connect(p.resolve().as_uri() + "?mode=ro", uri=True,
                               timeout=BUSY_TIMEOUT_S)
    except sqlite3.Error as exc:
        raise StoreError(f"{p}: cannot open the store to check it ({exc})") from None
    if cancel is not None:
        conn.set_progress_handler(cancel.is_set, 10_000)
    try:
        return [str(r[0]) for r in conn.execute("PRAGMA quick_check(10)") if r[0] != "ok"]
    except sqlite3.OperationalError as exc:  # locked, unreadable: not a verdict
        raise StoreError(f"{p}: cannot read the store to check it ({exc})") from None
    except sqlite3.DatabaseError as exc:  # "database disk image is malformed"
        return [str(exc)]
    finally:
        conn.close()


def _apply_migrations(db: Database, p: Path,
                      on_migrate: Callable[[list[str]], None] | None = None) -> None:
    applied = {m.name for m in migrations.applied(db)}
    unknown = sorted(applied - KNOWN_MIGRATIONS)
    if unknown:
        raise StoreError(f"{p}: the store has schema changes this version does not know "
                         f"({', '.join(unknown)}); it was written by a newer heliotrope. "
                         "Upgrade heliotrope, or point store.path at another file")
    pending = sorted(KNOWN_MIGRATIONS - applied)
    if pending and on_migrate is not None:
        on_migrate(pending)
    migrations.apply(db)


def sample_matrix(values: Sequence[Sequence[float]]) -> tuple[tuple[float, ...], ...]:
    """Freeze a samples-by-channels list of lists into the tuple shape records use."""
    return tuple(tuple(float(v) for v in row) for row in values)
