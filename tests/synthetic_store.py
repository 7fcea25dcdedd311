"""A synthetic clear day at Pico Sereno written through daemon.store.writer.Store, for the
read-command tests (status, export, plot, report, ssh-gate, read path).

Signals follow the Beer-Lambert-Bouguer law V = V0 exp(-tau m) (common practice, no
source) with the plan's real targets and air masses; the session fit is the service's
own (daemon.science.sessionfit). One morning point of every channel is dimmed by 3 % (a thin
cloud with a steady burst: the fit must reject it), one morning point has no sun lock
(screened), one target failed, and there are a few events.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from daemon.config.settings import load_config
from daemon.station.planner import plan_day
from daemon.store.writer import MeasurementRecord, Store
from drivers.interfaces import Housekeeping

CONFIG_PATH = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"
DAY = dt.date(2027, 2, 15)
# V0 at 1 AU [V] and total optical depth per channel: the values the bench simulator
# recovers on its clear day at Pico Sereno (invented demo scenario).
V0 = {"380": 1.35, "440": 2.45, "500": 3.10, "675": 2.80, "870": 2.05, "1020": 1.60}
TAU = {"380": 0.3126, "440": 0.1789, "500": 0.1196, "675": 0.0507, "870": 0.0197,
       "1020": 0.0130}
EARTH_SUN_FACTOR = 1.025
PRESSURE_HPA = 645.0
OUTLIER_INDEX = 5  # the sixth morning target is dimmed by 3 %
UNLOCKED_INDEX = 9  # the tenth morning target has no confirmed lock


@dataclass
class SyntheticDay:
    path: Path
    config: object
    plan: object
    record_ids: dict  # (session, index in session) -> measurement id
    records: dict  # measurement id -> MeasurementRecord
    outlier_id: int
    unlocked_id: int
    failed_id: int


def _record(t, session, airmass, rng, channels, *, factor=1.0, locked=True,
            status="ok") -> MeasurementRecord:
    if status == "failed":
        return MeasurementRecord(
            time_utc=t, plan_date=DAY.isoformat(), session=session, target_airmass=airmass,
            status="failed", failure="no sun lock after 30 s (sun sensor reports no lock)",
            apparent_zenith_deg=None, azimuth_deg=None, airmass=airmass,
            ozone_airmass=airmass, earth_sun_factor=EARTH_SUN_FACTOR,
            pressure_hpa=PRESSURE_HPA, pointing_error_deg=None, locked=False,
            duration_s=0.0, channels=channels, sun=(), dark=(), saturated=(),
            housekeeping=None)
    v = np.array([V0[c] * EARTH_SUN_FACTOR * np.exp(-TAU[c] * airmass) for c in channels])
    sun = v * factor * (1 + rng.normal(0, 2e-4, (10, len(channels)))) + 0.004
    dark = 0.004 + rng.normal(0, 5e-5, (5, len(channels)))
    hour = (t.hour - 6) % 24 + t.minute / 60  # local solar-ish hour at UTC-6
    hk = Housekeeping(detector_temp_c=25.0 + rng.normal(0, 0.02), case_temp_c=8 + hour / 3,
                      ambient_temp_c=2 + hour / 4, supply_v=12.6 + rng.normal(0, 0.02),
                      humidity_pct=20.0, pressure_hpa=PRESSURE_HPA)
    return MeasurementRecord(
        time_utc=t, plan_date=DAY.isoformat(), session=session, target_airmass=airmass,
        status="ok", failure=None, apparent_zenith_deg=60.0, azimuth_deg=120.0,
        airmass=airmass, ozone_airmass=airmass, earth_sun_factor=EARTH_SUN_FACTOR,
        pressure_hpa=PRESSURE_HPA, pointing_error_deg=0.02 if locked else 0.9,
        locked=locked, duration_s=1.8, channels=channels,
        sun=tuple(map(tuple, sun.tolist())), dark=tuple(map(tuple, dark.tolist())),
        saturated=(False,) * len(channels), housekeeping=hk)


def build_day(path: Path, *, fit: bool = True, heartbeat: dt.datetime | None = None,
              events: bool = True) -> SyntheticDay:
    """Write the synthetic day into a new store at ``path`` and fit both sessions."""
    from daemon.station.fitting import fit_stored_session

    config = load_config(CONFIG_PATH)
    # The synthetic bursts follow the fitter's own monochromatic model: the corrections
    # for a real sky's band and layers stay off, so the stored V0 is the drawn line's.
    config = replace(config, fit=replace(config.fit, correct_model_terms=False))
    plan = plan_day(config, DAY)
    channels = tuple(ch.name for ch in config.channels)
    rng = np.random.default_rng(11)
    ids: dict = {}
    records: dict = {}
    outlier = unlocked = failed = -1
    with Store.open(path) as store:
        store.save_plan(DAY.isoformat(), plan.to_dict(),
                        created_utc=dt.datetime(2027, 2, 15, 6, 5, tzinfo=dt.UTC))
        counts = {"am": 0, "pm": 0}
        for target in plan.targets:
            if target.session not in counts:
                continue
            i = counts[target.session]
            counts[target.session] += 1
            kw = {}
            if target.session == "am" and i == OUTLIER_INDEX:
                kw["factor"] = 0.97
            if target.session == "am" and i == UNLOCKED_INDEX:
                kw["locked"] = False
            if target.session == "pm" and i == 3:
                kw["status"] = "failed"
            t = target.time_utc + dt.timedelta(seconds=20)
            rec = _record(t, target.session, target.airmass, rng, channels, **kw)
            mid = store.record_measurement(rec)
            ids[(target.session, i)] = mid
            records[mid] = rec
            if kw.get("factor"):
                outlier = mid
            if kw.get("locked") is False:
                unlocked = mid
            if kw.get("status"):
                failed = mid
                if events:
                    store.record_event(t, "warning", "no_lock",
                                       f"pm target m={target.airmass:g}: no sun lock after 30 s")
        if fit:
            for session in ("am", "pm"):
                fit_stored_session(store, config, DAY.isoformat(), session,
                                   plan.targets[-1].time_utc + dt.timedelta(minutes=3))
        if events:
            # 23:30 local on DAY (UTC-6) is still DAY; 00:30 local the next day is not.
            store.record_event(dt.datetime(2027, 2, 16, 5, 30, tzinfo=dt.UTC), "info",
                               "late", "late evening event of the day")
            store.record_event(dt.datetime(2027, 2, 16, 6, 30, tzinfo=dt.UTC), "info",
                               "next_day", "event of the next local day")
        if heartbeat is not None:
            store.heartbeat(heartbeat)
    return SyntheticDay(path=path, config=config, plan=plan, record_ids=ids, records=records,
                        outlier_id=outlier, unlocked_id=unlocked, failed_id=failed)
