"""``heliotrope-sim``: the instrument simulator as a process.

Serves one simulated station's radiometer and tracker over two pseudo-terminals or
two loopback TCP ports, prints where to find them as one JSON line, and runs until
SIGTERM/SIGINT (or until its standard input closes, with ``--stdin-lifeline``). On the
way out it writes the station's truth file if asked.

    heliotrope-sim --scenario pico-sereno-clear --port pty
    heliotrope-sim --scenario my-day.yaml --port tcp:7700 --speed 60 --truth truth.json
    heliotrope-sim --scenario pico-sereno-clear --family modbus-rtu \
        --register-map config/pico-sereno-modbus.yaml

``--family`` picks the device family served (FAMILIES below): the reference line
protocol, or Modbus RTU / Modbus TCP behind the register maps of a station's YAML.

The instrument clock starts at the site's local mean solar noon on the scenario's date,
so that a burst typed by hand sees the sun up (``--start-utc scenario`` keeps the
scenario's own ``start_utc``, ``--start-utc 2025-02-12T15:00:00Z`` sets any time; the
daemon sets the clock itself with ``CLK`` in any case).

The scenario's faults (``faults:`` in its YAML: line damage at a rate, scheduled
reboots, vanishing ports, tracker stalls) are played as the instrument clock reaches
them. Everything random is drawn from ``--seed``: the same seed, scenario and sequence
of requests give the same replies and the same truth file.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import logging
import os
import selectors
import signal
import sys
import tempfile
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

from sim_instrument.server import LineFaults, StationServer

EX_USAGE = 2
EX_CONFIG = 78

log = logging.getLogger("heliotrope-sim")

def parse_port_spec(spec: str) -> tuple[str, int]:
    """``"pty"`` -> ("pty", 0); ``"tcp:PORT"`` -> ("tcp", PORT). Raises ValueError."""
    if spec == "pty":
        return "pty", 0
    kind, sep, number = spec.partition(":")
    if kind == "tcp" and sep and number.isdigit() and int(number) <= 65534:
        return "tcp", int(number)
    raise ValueError(f"--port {spec!r}: give 'pty', or 'tcp:PORT' with PORT 1-65534 (the "
                     "tracker takes PORT+1), or 'tcp:0' to let the system pick free ports")


def start_clock(spec: str | None, scenario_start: datetime, longitude_deg: float) -> datetime:
    """The instrument clock at start-up, from ``--start-utc``.

    None (the default): local mean solar noon, at ``longitude_deg`` (east positive), of
    the local mean solar date of ``scenario_start``; the sun's true noon is within the
    equation of time (at most about 16.5 min) of it. ``"scenario"``: ``scenario_start``
    itself. Anything else: an ISO 8601 time with a zone. Raises ValueError.
    """
    if spec is None:
        offset = timedelta(hours=longitude_deg / 15.0)  # mean solar time minus UTC
        local_date = (scenario_start.astimezone(UTC) + offset).date()
        return datetime(local_date.year, local_date.month, local_date.day, 12,
                        tzinfo=UTC) - offset
    if spec == "scenario":
        return scenario_start
    try:
        when = datetime.fromisoformat(spec)
    except ValueError:
        when = None
    if when is None or when.tzinfo is None:
        raise ValueError(f"--start-utc {spec!r}: give an ISO 8601 time with its zone, such "
                         "as 2025-02-12T18:45:00Z, or 'scenario' for the scenario's "
                         "start_utc (default: local mean solar noon of the scenario's date)")
    return when.astimezone(UTC)


@dataclass(frozen=True)
class Family:
    """One device family the simulator serves.

    ``setup(args, seed)`` returns the StationServer keywords of the family (its
    ``make_emulator`` and ``line_faults``) or raises ValueError with the fix;
    ``endpoints`` are the --port kinds it can use; ``url`` turns an endpoint's url into
    what the family's driver takes as its port."""

    setup: Callable[[argparse.Namespace, int], dict[str, Any]]
    endpoints: tuple[str, ...]
    url: Callable[[str], str] = lambda url: url


def _reference_setup(args: argparse.Namespace, seed: int) -> dict[str, Any]:
    if args.register_map is not None:
        raise ValueError("--register-map is for the modbus families")
    faults = LineFaults.parse(args.line_faults) if args.line_faults.strip() else None
    return {"line_faults": faults}


def _modbus_setup(args: argparse.Namespace, seed: int) -> dict[str, Any]:
    from sim_instrument.modbus_server import ModbusFaults, emulator_factory, load_register_maps

    if args.register_map is None:
        raise ValueError(f"--family {args.family} needs --register-map STATION.yaml (the "
                         "configuration whose instrument options hold the register maps)")
    faults = ModbusFaults.parse(args.line_faults) if args.line_faults.strip() else None
    radiometer, tracker, link = load_register_maps(args.register_map)
    want = args.family.removeprefix("modbus-")
    if link != want:
        raise ValueError(f"--register-map {args.register_map}: its link is {link}; serve it "
                         f"with --family modbus-{link}")
    return {"line_faults": faults.line() if faults else None,
            "make_emulator": emulator_factory(radiometer, tracker, link,
                                              faults.exception if faults else 0.0, seed)}


def _text_setup(args: argparse.Namespace, seed: int) -> dict[str, Any]:
    from sim_instrument.text_server import text_emulator

    return {**_reference_setup(args, seed), "make_emulator": text_emulator}


#: --family name -> Family. A new family adds one line here.
FAMILIES: dict[str, Family] = {
    "reference": Family(_reference_setup, ("pty", "tcp")),
    "modbus-rtu": Family(_modbus_setup, ("pty",)),
    "modbus-tcp": Family(_modbus_setup, ("tcp",), url=lambda u: u.removeprefix("socket://")),
    "text": Family(_text_setup, ("pty", "tcp")),
}


def build_parser() -> argparse.ArgumentParser:
    ap = argparse.ArgumentParser(
        prog="heliotrope-sim",
        description="Simulate a heliotrope station's radiometer and tracker on two serial "
                    "endpoints (pseudo-terminals or loopback TCP). Prints one JSON line "
                    '{"radiometer": URL, "tracker": URL, "pid": N, "site": {...}} once '
                    "listening.",
    )
    ap.add_argument("--scenario", required=True, metavar="FILE_OR_NAME",
                    help="scenario YAML file, or the name of a bundled scenario "
                         "(e.g. pico-sereno-clear)")
    ap.add_argument("--port", default="pty", metavar="pty|tcp:PORT",
                    help="pty: two pseudo-terminals; tcp:PORT: radiometer on 127.0.0.1:PORT, "
                         "tracker on PORT+1 (tcp:0 picks free ports). Default: pty")
    ap.add_argument("--family", default="reference", choices=sorted(FAMILIES),
                    help="device family to serve: the reference line protocol; Modbus "
                         "RTU (on pseudo-terminals) / Modbus TCP (on loopback) behind "
                         "--register-map; or text (a SCPI voltmeter and a short-command "
                         "tracker, sim_instrument/text_server.py). Default: reference")
    ap.add_argument("--register-map", type=Path, metavar="STATION.yaml",
                    help="for the modbus families: the station configuration whose "
                         "instrument.*.options hold the register maps to serve")
    ap.add_argument("--speed", type=float, default=1.0, metavar="X",
                    help="instrument seconds per real second (0 freezes the clock between "
                         "CLK commands). Default: 1")
    ap.add_argument("--start-utc", metavar="TIME|scenario",
                    help="instrument clock at start-up: an ISO 8601 time with its zone, or "
                         "'scenario' for the scenario's start_utc (default: local mean "
                         "solar noon of the scenario's date, the sun up)")
    ap.add_argument("--seed", type=int, default=0, metavar="N",
                    help="seed of every random draw (default 0)")
    ap.add_argument("--truth", type=Path, metavar="FILE",
                    help="on exit, write the station's truth (true V0, optical depths, "
                         "every reading) to FILE as JSON")
    ap.add_argument("--stdin-lifeline", action="store_true",
                    help="exit when standard input closes (so the simulator dies with the "
                         "process that started it)")
    ap.add_argument("--realtime", action="store_true",
                    help="hold each BURST/DARK reply for the burst's duration (divided by "
                         "--speed) as the instrument would; default: answer at once")
    ap.add_argument("--line-faults", default="", metavar="SPEC",
                    help="damage replies at random for reliability tests, e.g. "
                         "'drop=0.05,garble=0.05,truncate=0.02,corrupt=0.02,stale=0.05,"
                         "late=0.01'; replaces the scenario's own line faults (its "
                         "scheduled events still happen). Modbus families: "
                         "'drop=,corrupt=,truncate=,exception='")
    ap.add_argument("-v", "--verbose", action="store_true",
                    help="log every request and reply to standard error")
    return ap


def write_truth_atomically(path: Path, truth: dict[str, Any]) -> None:
    """Write JSON to ``path`` so a reader sees the old file or the whole new one."""
    path = path.resolve()
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        os.fchmod(fd, 0o644)  # mkstemp makes 0600; the truth is for any reader
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(truth, fh, indent=1)
            fh.write("\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _load_station(scenario: str, seed: int, speed: float) -> Any:
    # Imported here so that --help and argument errors answer without numpy and pvlib.
    from sim_instrument.model import SimulatedStation
    from sim_instrument.scenario import load_scenario

    return SimulatedStation(load_scenario(scenario), seed=seed, speed=speed)


def _wait_for_stop(lifeline: bool) -> str:
    """Block until SIGTERM/SIGINT (or EOF on stdin with ``lifeline``); say which."""
    wake_r, wake_w = os.pipe()
    os.set_blocking(wake_w, False)
    old_wakeup = signal.set_wakeup_fd(wake_w)
    caught: list[str] = []

    def on_signal(signum: int, frame: object) -> None:
        caught.append(signal.Signals(signum).name)

    old_handlers = {sig: signal.signal(sig, on_signal) for sig in (signal.SIGTERM, signal.SIGINT)}
    sel = selectors.DefaultSelector()
    sel.register(wake_r, selectors.EVENT_READ)
    if lifeline:
        sel.register(sys.stdin.fileno(), selectors.EVENT_READ)
    try:
        while not caught:
            for key, _ in sel.select():
                if key.fd == wake_r:
                    os.read(wake_r, 512)
                elif not os.read(key.fd, 4096):
                    return "standard input closed"
        return caught[0]
    finally:
        sel.close()
        signal.set_wakeup_fd(old_wakeup)
        for sig, handler in old_handlers.items():
            signal.signal(sig, handler)
        os.close(wake_r)
        os.close(wake_w)


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.verbose else logging.WARNING,
                        stream=sys.stderr, format="heliotrope-sim: %(levelname)s %(message)s")
    try:
        endpoint, tcp_port = parse_port_spec(args.port)
        family = FAMILIES[args.family]
        if endpoint not in family.endpoints:
            raise ValueError(f"--family {args.family} serves on "
                             f"{' or '.join(family.endpoints)}, not {endpoint}: "
                             + ("use --port pty" if "pty" in family.endpoints
                                else "use --port tcp:PORT (tcp:0 picks free ports)"))
        family_kwargs = family.setup(args, args.seed)
        if args.speed < 0:
            raise ValueError(f"--speed {args.speed:g}: must be 0 or more")
        if args.seed < 0:
            raise ValueError(f"--seed {args.seed}: must be 0 or more")
        if args.truth is not None and not args.truth.resolve().parent.is_dir():
            raise ValueError(f"--truth {args.truth}: directory {args.truth.parent} "
                             "does not exist")
    except ValueError as exc:
        print(f"heliotrope-sim: {exc}", file=sys.stderr)
        return EX_USAGE
    try:
        station = _load_station(args.scenario, args.seed, args.speed)
    except (OSError, ValueError) as exc:
        print(f"heliotrope-sim: {exc}", file=sys.stderr)
        return EX_CONFIG
    try:
        station.set_clock(start_clock(args.start_utc, station.scenario.start_utc,
                                      station.scenario.site.longitude_deg))
    except ValueError as exc:
        print(f"heliotrope-sim: {exc}", file=sys.stderr)
        return EX_USAGE
    delay_scale = 1.0 / args.speed if args.realtime and args.speed > 0 else 0.0
    try:
        scenario = station.scenario
        server = StationServer(station, endpoint, tcp_port, reply_delay_scale=delay_scale,
                               seed=args.seed, fault_plan=scenario.faults,
                               longitude_deg=scenario.site.longitude_deg, **family_kwargs)
    except OSError as exc:
        where = f"127.0.0.1:{tcp_port} or {tcp_port + 1}" if endpoint == "tcp" else "a pty"
        print(f"heliotrope-sim: cannot listen on {where}: {exc.strerror or exc}. Pick "
              "other ports with --port tcp:PORT, or tcp:0 for free ones", file=sys.stderr)
        return EX_CONFIG if endpoint == "tcp" else 1
    with server:
        urls = server.urls
        site = scenario.site
        print(json.dumps({"radiometer": family.url(urls["radiometer"]),
                          "tracker": family.url(urls["tracker"]),
                          "pid": os.getpid(),
                          "site": {"name": site.name, "latitude_deg": site.latitude_deg,
                                   "longitude_deg": site.longitude_deg,
                                   "elevation_m": site.elevation_m}}), flush=True)
        why = _wait_for_stop(args.stdin_lifeline)
        log.info("stopping: %s", why)
    if args.truth is not None:
        try:
            write_truth_atomically(args.truth, station.truth())
        except OSError as exc:
            print(f"heliotrope-sim: cannot write truth file {args.truth}: {exc}",
                  file=sys.stderr)
            return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
