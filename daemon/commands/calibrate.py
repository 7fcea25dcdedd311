"""``heliotrope calibrate``: combine a campaign's accepted sessions into one calibration.

The statistics are the science's (:func:`daemon.science.campaign.campaign`); this
command reads the session results from the store, saves the calibration record and
computes the aerosol optical depth of the campaign's measurements with it
(:func:`daemon.station.fitting.update_aod`). It is the one operator's command that
writes to the store, and it refuses a file that is not a heliotrope store before the
writer touches it.
"""

from __future__ import annotations

import datetime as _dt
from collections.abc import Mapping
from dataclasses import asdict
from typing import Any

from daemon.commands.tables import fmt, table
from daemon.config.settings import Config
from daemon.science.campaign import CalibrationError, campaign
from daemon.station.fitting import update_aod
from daemon.store.reader import (
    check_plan_date,
    results_between,
    shared_uncertainties,
    stored_calibration,
)
from daemon.store.writer import Store


def calibrate(store: Store, config: Config, first: str | _dt.date, last: str | _dt.date,
              created_utc: _dt.datetime) -> dict[str, Any]:
    """Combine a campaign's accepted sessions, store the calibration, compute its AOD.

    Parameters
    ----------
    store : Store
        The service's store, opened with the writer.
    config : Config
        Channels and campaign settings (``fit.campaign_clip_sigma``,
        ``fit.campaign_min_sessions``).
    first, last : str or date
        Campaign plan dates, inclusive.
    created_utc : datetime
        Aware UTC time of the record.

    Returns
    -------
    dict
        ``id``, ``from``, ``to``, ``created_utc``, ``sessions_found``,
        ``aod_values`` (AOD values stored) and ``channels`` (one dict per channel,
        the fields of :class:`ChannelCalibration`).

    Raises
    ------
    CalibrationError
        No channel has enough accepted sessions; nothing is stored.
    """
    d1, d2 = check_plan_date(first), check_plan_date(last)
    if d2 < d1:
        raise CalibrationError(f"the end date {d2} is before the start date {d1}; swap them")
    shared = shared_uncertainties(store.conn, d1, d2)
    results = [{**r, "v0_shared_rel_unc": shared.get((r["date"], r["session"], r["channel"]))}
               for r in results_between(store.conn, d1, d2)]
    sessions_found = len({(r["date"], r["session"]) for r in results})
    notes: list[str] = []
    channels = campaign(results, config, notes)
    if not any(c.usable for c in channels):
        why = "; ".join(f"{c.channel}: {c.reasons[0]}" for c in channels if c.reasons)
        raise CalibrationError(
            f"no channel has enough accepted sessions from {d1} to {d2} "
            f"({sessions_found} session{'s' if sessions_found != 1 else ''} found; {why}); "
            "widen the dates or lower fit.campaign_min_sessions")
    settings = {"campaign_clip_sigma": config.fit.campaign_clip_sigma,
                "campaign_min_sessions": config.fit.campaign_min_sessions,
                "config": config.source}
    rows = [asdict(c) for c in channels]
    cid = store.save_calibration(created_utc, d1, d2, config.site.name, settings, notes, rows)
    record = stored_calibration(store.conn, cid)
    n_aod = update_aod(store, config, d1, d2, calibration=record)
    return {"id": cid, "from": d1, "to": d2, "created_utc": record["created_utc"],
            "site_name": config.site.name, "sessions_found": sessions_found,
            "aod_values": n_aod, "notes": notes, "channels": rows}


def calibration_table(record: Mapping[str, Any]) -> str:
    """The per-channel calibration as an aligned table for an 80-column terminal."""
    body = []
    for c in record["channels"]:
        v0, unc = c["v0_1au"], c["v0_1au_unc"]
        body.append([c["channel"], fmt(v0, ".5f"),
                     fmt(100 * unc / v0 if v0 and unc is not None else None, ".3f"),
                     fmt(c["repeatability_pct"], ".3f"), c["n_sessions"], c["n_flagged"],
                     fmt(c["drift_pct_per_year"], "+.2f"), fmt(c["astm_ratio"], ".4f"),
                     fmt(bool(c["usable"]))])
    text = table(["channel", "V0 1AU [V]", "unc [%]", "rms [%]", "n", "flagged",
                  "drift [%/yr]", "lamp", "ok"], body,
                 [False, True, True, True, True, True, True, True, False])
    lines = [text]
    for c in record["channels"]:
        for s in c["sessions"]:
            if s["flagged"]:
                lines.append(f"  {c['channel']} {s['date']} {s['session']} flagged: {s['why']}")
        for r in c["reasons"]:
            lines.append(f"  {c['channel']} not usable: {r}")
    lines += [f"  note: {n}" for n in record.get("notes", [])]
    return "\n".join(lines)


def _require_heliotrope_store(db: str) -> None:
    """Refuse, before the writer migrates anything, a file that is not our store."""
    import sqlite3

    from daemon.commands.errors import CommandError
    from daemon.store.reader import StoreReadError, open_readonly

    try:
        conn = open_readonly(db)
        try:
            found = conn.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND "
                                 "name = 'session_results'").fetchone()
        finally:
            conn.close()
    except StoreReadError as exc:  # says what the file is and what to pass instead
        raise CommandError(str(exc), 66) from None
    except sqlite3.DatabaseError as exc:
        raise CommandError(f"{db}: cannot be read as a store ({exc}); pass --db with the "
                           "path of the heliotrope store", 66) from None
    if not found:
        raise CommandError(f"{db}: not a heliotrope store (no session results table); "
                           "nothing was changed. Pass --db with the store the service "
                           "writes (store.path in its configuration)", 66)


def calibrate_command(args: Any) -> int:
    """``heliotrope calibrate``: combine, store, compute AOD; print the record."""
    import os

    from daemon.commands.errors import EX_DATAERR, CommandError
    from daemon.commands.storedconfig import choose_config
    from daemon.commands.tables import dumps
    from daemon.store.writer import StoreError

    db = args.db or os.environ.get("HELIOTROPE_DB")
    chosen = choose_config(args.config, db, "calibrate needs the channels and the campaign "
                           "settings")
    config = chosen.config
    db = db or config.store_path
    if args.to < args.from_:
        raise CommandError(f"--to {args.to} is before --from {args.from_}; swap them", 64)
    if not os.path.exists(db):
        raise CommandError(f"{db}: no store here; pass --db with the path of the heliotrope "
                           "store (store.path in the service's configuration)", 66)
    _require_heliotrope_store(db)
    try:
        # Header and schema checks only: the full integrity check reads the whole file
        # (seconds on a store of years); the service runs it daily and `status` shows it.
        store = Store.open(db, full_check=False)
    except StoreError as exc:
        raise CommandError(str(exc), 74) from None
    try:
        now = _dt.datetime.now(_dt.UTC)
        # Provenance: the calibration points to the configuration it was made with.
        if chosen.stored is not None:
            store.configuration_id = chosen.stored["id"]
        else:
            from daemon.store.reader import software_version
            store.record_configuration(config.text, config.source, software_version(), now,
                                       origin="operator")
        record = calibrate(store, config, args.from_, args.to, now)
    except CalibrationError as exc:
        raise CommandError(str(exc), 1) from None
    except ValueError as exc:
        raise CommandError(str(exc), EX_DATAERR) from None
    finally:
        store.close()
    if args.json:
        print(dumps(record))
        return 0
    print(f"calibration {record['id']}: {record['from']} to {record['to']}, "
          f"{record['sessions_found']} sessions, V0 at 1 AU")
    print(calibration_table(record))
    print(f"aerosol optical depth computed for {record['aod_values']} values "
          "(heliotrope export --what aod)")
    print(f"stored in {db}")
    return 0
