"""Text-command drivers over a pseudo-terminal: round trips per second, one burst.

    .venv/bin/python benchmarks/bench_textcmd.py [--seconds 3]

The text-command simulator (a SCPI voltmeter and a short-command tracker,
sim_instrument/text_server.py) serves a frozen-clock Pico Sereno station on two
pseudo-terminals, and the drivers of config/pico-sereno-scpi.yaml talk to it at
19200 baud. A pseudo-terminal does not pace bytes at the configured baud rate, so each
figure is printed next to what the same bytes take on a real 19200 baud 8N1 line
(10 bits a byte): on the mountain that, not the software, is the limit.

Prints the figures; record them in DEVELOPERS.md ("Benchmarks").
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from daemon.config.settings import load_config  # noqa: E402
from drivers.textcmd import TextRadiometer, TextTracker  # noqa: E402
from sim_instrument.model import SimulatedStation  # noqa: E402
from sim_instrument.scenario import load_scenario  # noqa: E402
from sim_instrument.server import StationServer  # noqa: E402
from sim_instrument.text_server import text_emulator  # noqa: E402

BAUD = 19200
BITS_PER_BYTE = 10  # start, 8 data, stop
CONFIG = ROOT / "config" / "pico-sereno-scpi.yaml"


def wire_s(n_bytes: int) -> float:
    return n_bytes * BITS_PER_BYTE / BAUD


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=3.0, help="time per round-trip figure")
    args = ap.parse_args()
    cfg = load_config(CONFIG)
    station = SimulatedStation(load_scenario("pico-sereno-clear"), seed=1, speed=0)
    station.set_clock(datetime(2027, 2, 15, 18, 30, tzinfo=UTC))
    with StationServer(station, "pty", make_emulator=text_emulator, record=True) as server:
        urls = server.urls
        r = TextRadiometer(cfg.radiometer.options, urls["radiometer"], BAUD, 2.0, 3)
        t = TextTracker(cfg.tracker.options, urls["tracker"], BAUD, 2.0, 3)
        r.identify()
        t.identify()
        print(f"text-command drivers over a pseudo-terminal at {BAUD} baud "
              f"(python {sys.version.split()[0]})")
        print(f"{'exchange':34}{'per s':>9}{'mean ms':>9}{'bytes':>7}{'19200 8N1 ms':>14}")
        rows = [
            ("radiometer *IDN?", r.identify, "radiometer", "identify"),
            ("radiometer housekeeping", r.read_housekeeping, "radiometer", "read_housekeeping"),
            ("tracker S (state)", t.state, "tracker", "state"),
        ]
        specs = {"radiometer": cfg.radiometer.options, "tracker": cfg.tracker.options}
        for label, call, kind, action in rows:
            before = sum(map(len, server.transcripts()[kind]))
            n, start = 0, time.perf_counter()
            while time.perf_counter() - start < args.seconds:
                call()
                n += 1
            elapsed = time.perf_counter() - start
            replied = sum(map(len, server.transcripts()[kind])) - before
            spec = specs[kind]
            per = replied / n + len(spec.actions[action].format()) + len(spec.line_ending)
            print(f"{label:34}{n / elapsed:9.0f}{1e3 * elapsed / n:9.2f}{per:7.0f}"
                  f"{1e3 * wire_s(int(per)):14.1f}")
        times = []
        for _ in range(20):
            before = sum(map(len, server.transcripts()["radiometer"]))
            start = time.perf_counter()
            burst = r.read_burst(10)
            times.append(time.perf_counter() - start)
            reply_bytes = sum(map(len, server.transcripts()["radiometer"])) - before
        request = len(cfg.radiometer.options.actions["read_channels"].format(n=10)) + 1
        assert len(burst.samples) == 10
        print(f"one 10-sample burst of 6 channels: median {1e3 * statistics.median(times):.2f} "
              f"ms over a pty (answered at once); {request + reply_bytes} bytes, "
              f"{1e3 * wire_s(request + reply_bytes):.0f} ms on a 19200 baud line, plus the "
              f"instrument's own 1.8 s to take 10 samples 0.2 s apart")
        r.close()
        t.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
