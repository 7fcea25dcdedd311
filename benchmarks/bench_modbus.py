"""Modbus link speed: round trips per second and the time of one 10-sample burst.

The Modbus RTU simulator (``sim_instrument/modbus_server.py``, the register maps of
``config/pico-sereno-modbus.yaml``) serves on a pseudo-terminal in this process; the
Modbus drivers open it at 19200 baud as they would an RS-485 adapter. Prints:

- round trips per second of one housekeeping read (function 04, 6 registers);
- round trips per second of one sample of the six channels (function 04, 12 registers);
- the time of one 10-sample burst (shutter coil and ten channel reads), with the map's
  own sample interval set to 0 and as configured;
- for comparison, what the same frames take on a real line at 19200 baud, 11 bits per
  character (8N2 or 8E1), with the 3.5-character silence between frames (Modbus over
  Serial Line V1.02 sec. 2.5.1.1): a pseudo-terminal does not pace bytes, so the
  measured figure is the software's cost and the line adds the rest.

    .venv/bin/python benchmarks/bench_modbus.py [--repeat N]
"""

from __future__ import annotations

import argparse
import dataclasses
import statistics
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

import yaml

from drivers.modbus import ModbusLink, ModbusRadiometer
from drivers.modbus_map import check_radiometer_options, check_tracker_options
from sim_instrument.modbus_server import emulator_factory
from sim_instrument.model import SimulatedStation
from sim_instrument.scenario import load_scenario
from sim_instrument.server import StationServer

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno-modbus.yaml"
BAUD = 19200
BITS_PER_CHAR = 11


def wire_s(request_bytes: int, reply_bytes: int, baud: int = BAUD) -> float:
    """Time on a real line for one exchange [s]: both frames and a 3.5-character silence
    after each (V1.02 sec. 2.5.1.1)."""
    char_s = BITS_PER_CHAR / baud
    return (request_bytes + reply_bytes + 2 * 3.5) * char_s


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=300, help="round trips per figure")
    args = ap.parse_args(argv)

    data = yaml.safe_load(CONFIG.read_text())
    rad_map = check_radiometer_options(data["instrument"]["radiometer"]["options"])
    trk_map = check_tracker_options(data["instrument"]["tracker"]["options"])
    station = SimulatedStation(load_scenario("pico-sereno-clear"), seed=1, speed=0.0)
    station.set_clock(datetime(2027, 2, 15, 16, 0, tzinfo=UTC))
    server = StationServer(station, "pty", make_emulator=emulator_factory(rad_map, trk_map,
                                                                           "rtu"))
    with server:
        link = ModbusLink(server.urls["radiometer"], BAUD, 1.0, 0, rad_map.link,
                          name="radiometer")
        radiometer = ModbusRadiometer(link, rad_map)
        radiometer.read_housekeeping()  # open the port

        def rate(call) -> float:
            t0 = time.perf_counter()
            for _ in range(args.repeat):
                call()
            return args.repeat / (time.perf_counter() - t0)

        hk_rate = rate(radiometer.read_housekeeping)
        sample_rate = rate(lambda: link.read_values(rad_map.channels))

        def burst_times(m) -> list[float]:
            r = ModbusRadiometer(link, m)
            out = []
            for _ in range(max(5, args.repeat // 30)):
                t0 = time.perf_counter()
                r.read_burst(10)
                out.append(time.perf_counter() - t0)
            return out

        fast = burst_times(dataclasses.replace(rad_map, burst_interval_s=0.0))
        paced = burst_times(rad_map)
        radiometer.close()
    counters = dataclasses.asdict(link.counters)
    # Frames: request 8 bytes; a reply of n registers 5 + 2n; a coil write 8 and 8.
    hk_wire = wire_s(8, 5 + 2 * 6)
    sample_wire = wire_s(8, 5 + 2 * 12)
    burst_wire = wire_s(8, 8) + 10 * sample_wire
    print(f"Modbus RTU over a pseudo-terminal at {BAUD} baud ({args.repeat} round trips each)")
    print(f"{'exchange':34} {'measured':>12} {'on a real line':>16}")
    print(f"{'housekeeping read (6 registers)':34} {hk_rate:9.0f} /s {1 / hk_wire:13.0f} /s")
    print(f"{'channel sample read (12 registers)':34} {sample_rate:9.0f} /s "
          f"{1 / sample_wire:13.0f} /s")
    print(f"{'10-sample burst, interval 0':34} {statistics.median(fast) * 1000:9.1f} ms "
          f"{burst_wire * 1000:13.1f} ms")
    print(f"{'10-sample burst, interval ' + f'{rad_map.burst_interval_s:g} s':34} "
          f"{statistics.median(paced) * 1000:9.1f} ms "
          f"{(burst_wire + 9 * max(0.0, rad_map.burst_interval_s - sample_wire)) * 1000:13.1f}"
          " ms")
    print(f"link counters: {counters}")
    faults = sum(v for k, v in counters.items() if k != "exchanges")
    return 1 if faults else 0


if __name__ == "__main__":
    sys.exit(main())
