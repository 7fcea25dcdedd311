"""Simulator speed: bursts per second, a full day's compute, round trips over the link.

Prints, per shipped scenario:

- bursts per second: ``SimulatedStation.burst(10)`` at successive instrument times
  (sky, geometry, noise, truth record), clock frozen;
- a Langley day: the 34 targets of air mass 2 to 6 in steps of 0.25, morning and
  afternoon, each as the daemon asks for it (CLK, GOTO, SUN, three STATUS polls,
  BURST 10, DARK 5, HK), through the protocol emulator (codec included, no I/O);
- a dense day: the same requests once a minute from sunrise to sunset;

and the round trips per second of ``HK`` through the reference driver over a
pseudo-terminal and over loopback TCP. Budget (DESIGN.md): a simulated full day in
seconds; exit status 1 when the dense day of any scenario takes over 20 s.

    .venv/bin/python benchmarks/bench_simulator.py [--scenario NAME ...]
"""

from __future__ import annotations

import argparse
import sys
import threading
import time
from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
import pvlib

from drivers import protocol as p
from drivers.reference import open_radiometer
from sim_instrument.model import SimulatedStation
from sim_instrument.scenario import available_scenarios, load_scenario
from sim_instrument.server import DeviceEmulator, StationServer

DAY_BUDGET_S = 20.0
DAY = datetime(2027, 2, 15, tzinfo=UTC)


def _sun_table(scenario, day: datetime) -> pd.DataFrame:
    site = scenario.site
    start = day - timedelta(hours=site.longitude_deg / 15.0)  # local mean solar midnight
    index = pd.date_range(start, periods=24 * 60, freq="1min")
    sp = pvlib.solarposition.spa_python(index, site.latitude_deg, site.longitude_deg,
                                        altitude=site.elevation_m,
                                        pressure=site.pressure_hpa * 100.0,
                                        temperature=site.temperature_c)
    sp["airmass"] = pvlib.atmosphere.get_relative_airmass(sp["apparent_zenith"],
                                                          "kastenyoung1989")
    return sp


def _langley_times(sun: pd.DataFrame) -> list[datetime]:
    m = sun["airmass"].to_numpy()
    noon = int(np.nanargmin(sun["apparent_zenith"].to_numpy()))
    times = []
    for lo, hi in ((0, noon), (noon, len(m))):
        seg = m[lo:hi]
        for target in np.arange(2.0, 6.001, 0.25):
            finite = np.where(np.isfinite(seg), np.abs(seg - target), np.inf)
            times.append(sun.index[lo + int(np.argmin(finite))].to_pydatetime())
    return times


def _target(rad: DeviceEmulator, trk: DeviceEmulator, when: datetime, az: float,
            el: float, rid: list[int]) -> None:
    def ask(device: DeviceEmulator, cmd: str, *args: str) -> None:
        rid[0] = rid[0] % 65535 + 1
        reply, _ = device.handle(p.encode_request(rid[0], cmd, list(args)))
        p.decode_reply(reply, rid[0], cmd)

    stamp = p.format_time(when)
    ask(rad, p.CLK, stamp)
    ask(trk, p.CLK, stamp)
    ask(trk, p.GOTO, p.format_angle_deg(az % 360.0), p.format_angle_deg(max(el, 0.0)))
    ask(trk, p.SUN, "1")
    for k in range(3):
        ask(trk, p.CLK, p.format_time(when + timedelta(seconds=20 * (k + 1))))
        ask(trk, p.STATUS)
    ask(rad, p.CLK, p.format_time(when + timedelta(seconds=60)))
    ask(rad, p.BURST, "10")
    ask(rad, p.DARK, "5")
    ask(rad, p.HK)


def _day(scenario, sun: pd.DataFrame, times: list[datetime]) -> float:
    station = SimulatedStation(scenario, seed=1, speed=0.0)
    lock = threading.Lock()
    rad = DeviceEmulator("radiometer", station, lock)
    trk = DeviceEmulator("tracker", station, lock)
    rid = [0]
    started = time.perf_counter()
    for when in times:
        row = sun.loc[pd.Timestamp(when)]
        _target(rad, trk, when, float(row["azimuth"]), float(row["apparent_elevation"]), rid)
    return time.perf_counter() - started


def _bursts_per_second(scenario, n: int = 200) -> float:
    station = SimulatedStation(scenario, seed=1, speed=0.0)
    t0 = DAY + timedelta(hours=15)
    station.set_clock(t0)
    station.burst(10)  # warm the caches
    started = time.perf_counter()
    for k in range(n):
        station.set_clock(t0 + timedelta(seconds=30 * k))
        station.burst(10)
    return n / (time.perf_counter() - started)


def _round_trips_per_second(endpoint: str, n: int = 200) -> float:
    station = SimulatedStation(load_scenario("pico-sereno-clear"), seed=1, speed=0.0)
    with StationServer(station, endpoint) as server:
        rad = open_radiometer(server.urls["radiometer"], timeout_s=2.0, retries=0)
        rad.read_housekeeping()
        started = time.perf_counter()
        for _ in range(n):
            rad.read_housekeeping()
        elapsed = time.perf_counter() - started
        rad.close()
    return n / elapsed


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", action="append", metavar="NAME",
                        help="scenario to measure (repeatable; default: every shipped one)")
    args = parser.parse_args(argv)
    names = args.scenario or available_scenarios()
    worst = 0.0
    print(f"{'scenario':26}{'bursts/s':>10}{'Langley day':>13}{'dense day':>11}"
          f"{'targets':>9}")
    for name in names:
        scenario = load_scenario(name)
        sun = _sun_table(scenario, DAY)
        langley = _langley_times(sun)
        up = sun.index[sun["apparent_elevation"] > 1.0]
        dense = [t.to_pydatetime() for t in up]
        rate = _bursts_per_second(scenario)
        t_langley = _day(scenario, sun, langley)
        t_dense = _day(scenario, sun, dense)
        worst = max(worst, t_dense)
        print(f"{name:26}{rate:10.0f}{t_langley:12.2f}s{t_dense:10.2f}s{len(dense):9d}")
    for endpoint in ("pty", "tcp"):
        print(f"HK round trips over {endpoint}: {_round_trips_per_second(endpoint):.0f} per second")
    if worst > DAY_BUDGET_S:
        print(f"over budget: a dense day took {worst:.1f} s (budget {DAY_BUDGET_S:g} s)")
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())
