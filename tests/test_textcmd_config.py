"""Wrong text-driver configurations are found by ``heliotrope check-config``: exit 78
(EX_CONFIG, sysexits.h) with one line naming the key inside ``instrument.*.options``.

Each case changes one key of config/pico-sereno-scpi.yaml. That a bad configuration
names its key path and exits 78 is the product's own rule (common practice, no source:
sysexits.h gives 78 for a configuration error).
"""

from __future__ import annotations

import copy
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from daemon.commands.cli import main
from daemon.config.settings import EX_CONFIG, load_config
from drivers.textcmd_spec import TextSpec

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno-scpi.yaml"
R = "instrument.radiometer.options"
T = "instrument.tracker.options"
_DELETE = object()


def _set(data: dict, path: str, value) -> dict:
    data = copy.deepcopy(data)
    *parents, last = path.split(".")
    node = data
    for key in parents:
        node = node[key]
    if value is _DELETE:
        del node[last]
    else:
        node[last] = value
    return data


CASES = [
    # (key path in the YAML, new value, what the message must say after the key)
    (f"{R}.actions.read_channels.command", "SAMP:COUN {count};:MEAS:VOLT:DC? (@101:106)",
     f"{R}.actions.read_channels.command: {{count}} is not a field of this action; "
     "its fields: n"),
    (f"{R}.actions.identify.command", "*IDN? {}",
     f"{R}.actions.identify.command: a positional field {{}} is not a field"),
    (f"{T}.actions.goto.command", "G {az:.2q} {el:.2f}",
     f"{T}.actions.goto.command: the template does not format"),
    (f"{T}.actions.goto.command", "G {az:.2f {el}",
     f"{T}.actions.goto.command: not a valid template"),
    (f"{R}.actions.identify.pattern", "(?P<model>[^,]*,(?P<serial>.*)",
     f"{R}.actions.identify.pattern: the regular expression does not compile"),
    (f"{R}.actions.identify.pattern", "(?P<model>[^,]*),(?P<serial>[^,]*),.*",
     f"{R}.actions.identify.pattern: lacks the named group(s) firmware that identify "
     "must yield"),
    (f"{T}.actions.state.pattern", "S=(?P<mode>.) AZ=(?P<azimuth_deg>\\S+) EL=(?P<el>\\S+)",
     f"{T}.actions.state.pattern: lacks the named group(s) elevation_deg, locked"),
    (f"{R}.actions.read_dark.pattern", "(?P<values>.*);(?P<ok>1)",
     f"{R}.actions.read_dark.pattern: named group 'ok' is not a field of read_dark"),
    (f"{R}.actions.read_dark", _DELETE,
     f"{R}.actions.read_dark: missing; a radiometer needs the actions identify, "
     "read_channels, read_dark, read_housekeeping"),
    (f"{T}.actions.park", _DELETE, f"{T}.actions.park: missing; a tracker needs"),
    (f"{R}.line_ending", "NL",
     f"{R}.line_ending: the string 'NL' is not a line ending; use one of CRLF, LF, CR"),
    (f"{R}.actions.read_channels.timeout_s", 120,
     f"{R}.actions.read_channels.timeout_s: 120 is out of range; allowed 0.05 to 20 s"),
    (f"{R}.actions.read_channels.sample_interval_s", _DELETE,
     f"{R}.actions.read_channels.sample_interval_s: missing: give the time between"),
    (f"{R}.channels", 0, f"{R}.channels: the number 0: give the number of values"),
    (f"{R}.actions.read_housekeeping.fields.supply_volts", {"scale": 4.0},
     f"{R}.actions.read_housekeeping.fields.supply_volts: no such named group"),
    (f"{R}.actions.read_housekeeping.fields.supply_v", {"scale": 0},
     f"{R}.actions.read_housekeeping.fields.supply_v.scale: 0 would read every value"),
    (f"{T}.actions.state.fields.mode.map.X", "spinning",
     f"{T}.actions.state.fields.mode.map.X: the string 'spinning' is not allowed; use idle,"),
    (f"{T}.actions.home", {"command": "H", "pattern": "OK"},
     f"{T}.actions.home: unknown key; known here: follow, goto, identify, park, "
     "set_clock, state"),
    (f"{R}.error_query.pattern", '(?P<code>\\d+),"(?P<msg>.*)"',
     f"{R}.error_query.pattern: lacks the named group 'message'"),
    (f"{T}.error_pattern", "E(?P<code>\\d+) (?P<text>.*)",
     f"{T}.error_pattern: named group 'text' is not allowed; use code and message"),
    (f"{T}.actions.follow.command", "F {on}\r",
     f"{T}.actions.follow.command: the command contains a line break"),
    ("instrument.tracker.options", _DELETE, f"{T}: the text driver needs an options block"),
]


@pytest.mark.parametrize("path,value,message", CASES,
                         ids=[f"{p.split('.options.')[-1]}" for p, _, _ in CASES])
def test_wrong_text_configuration_exits_78_naming_the_key(tmp_path, capsys, path, value,
                                                          message):
    bad = tmp_path / "bad.yaml"
    bad.write_text(yaml.safe_dump(_set(yaml.safe_load(CONFIG.read_text()), path, value)))
    assert main(["check-config", str(bad)]) == EX_CONFIG
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"heliotrope check-config: {bad}: {message}"), err
    assert len(err.splitlines()) == 1


def test_the_scpi_example_loads_into_command_tables():
    cfg = load_config(CONFIG)
    assert cfg.radiometer.driver == cfg.tracker.driver == "text"
    assert isinstance(cfg.radiometer.options, TextSpec)
    assert cfg.radiometer.options.channels == len(cfg.channels) == 6
    assert cfg.tracker.options.line_ending == b"\r"
    assert cfg.radiometer.options.actions["read_channels"].format(n=10) == (
        "SHUT:OPEN;:SAMP:COUN 10;:MEAS:VOLT:DC? (@101:106)")


def test_reading_a_text_configuration_imports_no_serial_library():
    # The registry's rule for option checks (drivers/registry.py): reading a
    # configuration never imports pyserial, so check-config starts fast.
    code = ("import sys; from daemon.config.settings import load_config; "
            f"load_config({str(CONFIG)!r}); "
            "print(sorted(m for m in sys.modules if m == 'serial' or m.startswith('serial.')"
            " or m == 'drivers.textcmd'))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=CONFIG.parent.parent).stdout
    assert out.strip() == "[]"
