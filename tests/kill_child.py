"""Child process for the kill test: acquires simulated days into a store, printing the
id of every measurement as soon as its transaction has committed, until killed.

    python -m tests.kill_child STORE FIRST_DAY
"""

from __future__ import annotations

import sys
from datetime import date, timedelta
from pathlib import Path

from daemon.config.settings import load_config
from daemon.station.acquisition import Station, local_midnight_utc, run_day
from daemon.station.clock import SimClock
from daemon.store.writer import Store
from tests.fakes import FakeRadiometer, FakeTracker

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"


def main() -> None:
    store_path, first = sys.argv[1], date.fromisoformat(sys.argv[2])
    cfg = load_config(CONFIG)
    store = Store.open(store_path)
    print("ready", flush=True)
    day = first
    while True:
        station = Station(cfg, FakeRadiometer(fail_bursts={5}), FakeTracker(), store,
                          SimClock(local_midnight_utc(cfg, day)))
        run_day(station, day, on_step=lambda o: print(o.measurement_id, flush=True))
        day += timedelta(days=1)


if __name__ == "__main__":
    main()
