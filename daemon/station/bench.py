"""The bench: run a simulated day through the real protocol.

The simulator is started as its own process (``python -m sim_instrument``), exactly
as a technician would start ``heliotrope-sim``; the daemon never imports it. The day
then runs on a :class:`~daemon.station.clock.SimClock` with the same plan, acquisition, store
and fit code as the service.
"""

from __future__ import annotations

import contextlib
import dataclasses
import json
import os
import subprocess
import sys
import time
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path

from daemon.config.settings import Config

SIM_START_TIMEOUT_S = 30.0

#: Radiometer driver -> the ``heliotrope-sim --family`` that serves its bench twin, by
#: link kind ("" for families with one). Modbus families also get ``--register-map``.
SIM_FAMILIES: dict[str, dict[str, str]] = {
    "reference": {"": "reference"},
    "modbus": {"rtu": "modbus-rtu", "tcp": "modbus-tcp"},
    "text": {"": "text"},
}


class BenchError(Exception):
    """The simulator could not be started or did not answer as documented."""


@dataclass(frozen=True)
class SimEndpoints:
    radiometer: str
    tracker: str
    pid: int
    site: dict | None = None  # the scenario's site, as the simulator reports it


@contextmanager
def simulator(scenario: str, seed: int, port: str = "pty",
              truth_path: Path | None = None,
              sim_args: Sequence[str] = ()) -> Iterator[SimEndpoints]:
    """Start ``heliotrope-sim`` as a child process and yield its endpoints.

    The child is tied to us by its standard input (``--stdin-lifeline``): if this
    process dies, the pipe closes and the simulator exits too. On leaving the block it
    is asked to stop with SIGTERM so it writes its truth file. ``sim_args`` are more
    arguments for it (the device family: :func:`family_args`).
    """
    cmd = [sys.executable, "-m", "sim_instrument", "--scenario", scenario, "--port", port,
           "--seed", str(seed), "--stdin-lifeline"]
    if truth_path is not None:
        cmd += ["--truth", str(truth_path)]
    cmd += list(sim_args)
    proc = subprocess.Popen(cmd, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        endpoints = _read_endpoints(proc)
        yield endpoints
    finally:
        _stop(proc)


def _read_endpoints(proc: subprocess.Popen) -> SimEndpoints:
    import selectors

    sel = selectors.DefaultSelector()
    sel.register(proc.stdout, selectors.EVENT_READ)
    deadline = time.monotonic() + SIM_START_TIMEOUT_S
    while time.monotonic() < deadline:
        if sel.select(timeout=0.2):
            line = proc.stdout.readline()
            if not line:
                break
            try:
                info = json.loads(line)
                return SimEndpoints(info["radiometer"], info["tracker"], int(info["pid"]),
                                    info.get("site"))
            except (ValueError, KeyError) as exc:
                raise BenchError(f"simulator printed {line.strip()!r}, expected its "
                                 f"endpoints as JSON ({exc})") from None
        if proc.poll() is not None:
            break
    err = ""
    with contextlib.suppress(subprocess.TimeoutExpired):
        proc.wait(timeout=5)  # it closed its output: let it exit and say why
    if proc.poll() is not None:
        err = proc.stderr.read().strip()
    raise BenchError("the simulator did not start"
                     + (f": {err.splitlines()[-1]}" if err else
                        f" within {SIM_START_TIMEOUT_S:g} s"))


def _stop(proc: subprocess.Popen) -> None:
    if proc.poll() is None:
        proc.terminate()
        try:
            proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
    for stream in (proc.stdin, proc.stdout, proc.stderr):
        if stream:
            stream.close()


def family_args(config: Config, port: str = "pty") -> tuple[tuple[str, ...], str]:
    """The simulator arguments that serve ``config``'s drivers, and the --port to use.

    Raises BenchError when the drivers have no simulator twin."""
    driver = config.radiometer.driver
    if config.tracker.driver != driver:
        raise BenchError(f"the radiometer driver is {driver!r} and the tracker driver "
                         f"{config.tracker.driver!r}; the bench simulates one family")
    table = SIM_FAMILIES.get(driver)
    if table is None:
        raise BenchError(f"no simulator serves the {driver!r} driver; known: "
                         f"{', '.join(sorted(SIM_FAMILIES))}")
    link = getattr(getattr(config.radiometer.options, "link", None), "kind", "")
    family = table.get(link) or table.get("")
    if family is None:
        raise BenchError(f"no simulator serves the {driver!r} driver on a {link} link")
    if family == "reference":
        return (), port
    if family == "text":
        return ("--family", "text"), port
    if config.source.startswith("<"):
        raise BenchError("the Modbus simulator reads the register maps from the "
                         "configuration file; load the configuration from a file")
    if family == "modbus-tcp" and port == "pty":
        port = "tcp:0"
    elif family == "modbus-rtu":
        port = "pty"
    return ("--family", family, "--register-map", config.source), port


SITE_MATCH_DEG = 0.05  # about 5 km: the same site for the sun's position


def with_ports(config: Config, endpoints: SimEndpoints) -> Config:
    """The same configuration, pointed at the simulator's ports.

    Refuses a simulator whose scenario is at another site: the daemon would aim the
    tracker at a sun that is elsewhere and log nothing but lost locks.
    """
    sim = endpoints.site
    if sim is not None:
        d_lat = abs(sim["latitude_deg"] - config.site.latitude_deg)
        d_lon = abs((sim["longitude_deg"] - config.site.longitude_deg + 180) % 360 - 180)
        if max(d_lat, d_lon) > SITE_MATCH_DEG:
            raise BenchError(
                f"the simulator's scenario is at {sim['name']} ({sim['latitude_deg']:.2f}, "
                f"{sim['longitude_deg']:.2f}) but the configuration is for "
                f"{config.site.name} ({config.site.latitude_deg:.2f}, "
                f"{config.site.longitude_deg:.2f}); pick a scenario and a configuration "
                "of the same site")
    return dataclasses.replace(
        config,
        radiometer=dataclasses.replace(config.radiometer, url=endpoints.radiometer),
        tracker=dataclasses.replace(config.tracker, url=endpoints.tracker),
    )


def quiet_site(data: dict, now: datetime, margin_s: float = 900) -> dict:
    """Configuration data (as parsed YAML) moved half-way round the world if a target
    of the site falls within ``margin_s`` of ``now``: real-time bench runs (service
    life cycle, idle CPU) must not depend on the hour they happen to run at."""
    import copy

    from daemon.config.settings import parse_config
    from daemon.station.planner import plan_day

    cfg = parse_config(data)
    plan = plan_day(cfg, now.astimezone(cfg.tz).date())
    if not any(abs((t.time_utc - now).total_seconds()) < margin_s for t in plan.targets):
        return data
    data = copy.deepcopy(data)
    lon = data["site"]["longitude_deg"]
    data["site"]["longitude_deg"] = lon + 180 if lon < 0 else lon - 180
    data["site"]["timezone"] = "UTC"
    return data


@dataclass
class DayRun:
    day: date
    results: list[dict]
    truth: dict
    targets_planned: int
    targets_ok: int
    wall_s: float
    store_path: str


@contextmanager
def bench_rig(config: Config, store_path: Path, scenario: str, seed: int, port: str = "pty",
              truth_path: Path | None = None, sim_args: Sequence[str] = ()
              ) -> Iterator[tuple[Config, object, object, object]]:
    """The simulator, the configuration pointed at it, an open store and both drivers.

    The simulator serves the family of the configuration's drivers (:func:`family_args`);
    ``sim_args`` are more simulator arguments (e.g. ``--line-faults``). Yields
    ``(config, store, radiometer, tracker)``; everything is closed on leaving.
    """
    from daemon.station.acquisition import open_devices
    from daemon.store.writer import Store

    extra, port = family_args(config, port)
    store = Store.open(store_path)
    try:
        with simulator(scenario, seed, port, truth_path, extra + tuple(sim_args)) as ends:
            cfg = with_ports(config, ends)
            radiometer, tracker = open_devices(cfg)
            try:
                yield cfg, store, radiometer, tracker
            finally:
                radiometer.close()
                tracker.close()
    finally:
        store.close()


def run_simulated_day(config: Config, day: date, store_path: Path, scenario: str,
                      seed: int, port: str = "pty", work_dir: Path | None = None,
                      sim_args: Sequence[str] = ()) -> DayRun:
    """Plan ``day``, start the simulator, acquire the whole day and fit both sessions."""
    from daemon.station.acquisition import Station, local_midnight_utc, run_day
    from daemon.station.clock import SimClock
    from daemon.station.planner import plan_day

    t0 = time.perf_counter()
    work_dir = work_dir or store_path.parent
    truth_path = work_dir / f"truth-{os.getpid()}.json"
    plan = plan_day(config, day)
    outcomes = []
    try:
        with bench_rig(config, store_path, scenario, seed, port, truth_path,
                       sim_args) as rig:
            cfg, store, radiometer, tracker = rig
            clock = SimClock(local_midnight_utc(cfg, day))
            _record_bench_configuration(store, config, clock.now())
            station = Station(cfg, radiometer, tracker, store, clock)
            fits = run_day(station, day, plan, on_step=outcomes.append)
        # The simulator writes its truth file when it stops, on leaving the rig.
        truth = json.loads(truth_path.read_text()) if truth_path.exists() else {}
    finally:
        truth_path.unlink(missing_ok=True)
    results = fits.get("am", []) + fits.get("pm", [])
    return DayRun(day=day, results=results, truth=truth,
                  targets_planned=len([t for t in plan.targets if t.session in ("am", "pm")]),
                  targets_ok=sum(1 for o in outcomes if o.ok),
                  wall_s=time.perf_counter() - t0, store_path=str(store_path))


def _record_bench_configuration(store, config: Config, now: datetime) -> None:
    """Provenance of a simulated store: the configuration as loaded (before it was
    pointed at the simulator's ports), marked as the bench's, on the simulated clock."""
    from daemon.store.reader import software_version

    if config.text:
        store.record_configuration(config.text, config.source, software_version(), now,
                                   origin="bench")


# --------------------------------------------------------------------------- campaigns

def campaign_days(first: date, n_days: int) -> list[date]:
    """``n_days`` consecutive local dates from ``first``."""
    if n_days < 1:
        raise ValueError(f"a campaign needs at least one day; got {n_days}")
    return [date.fromordinal(first.toordinal() + i) for i in range(n_days)]


def next_campaign_day(store_path: Path) -> date | None:
    """The day after the newest date the store at ``store_path`` holds (a plan or a
    measurement), for appending days to a bench store; None for an empty store."""
    import sqlite3

    conn = sqlite3.connect(f"file:{store_path}?mode=ro", uri=True)
    try:
        row = conn.execute("SELECT max(d) FROM (SELECT max(plan_date) AS d FROM plans "
                           "UNION ALL SELECT max(plan_date) FROM measurements)").fetchone()
    except sqlite3.Error as exc:
        raise BenchError(f"{store_path}: cannot read its dates ({exc}); pass a store that "
                         "`heliotrope demo` made") from None
    finally:
        conn.close()
    return None if row[0] is None else date.fromordinal(date.fromisoformat(row[0]).toordinal()
                                                        + 1)


def run_simulated_campaign(config: Config, days: list[date], store_path: Path, scenario: str,
                           seed: int, port: str = "pty", work_dir: Path | None = None,
                           on_day=None) -> list[DayRun]:
    """One simulated day after the other into the same store, each with its own
    simulator run and seed (``seed + i``: the days differ as real days do)."""
    runs = []
    for i, day in enumerate(days):
        run = run_simulated_day(config, day, store_path, scenario, seed + i, port,
                                work_dir=work_dir)
        runs.append(run)
        if on_day is not None:
            on_day(run)
    return runs
