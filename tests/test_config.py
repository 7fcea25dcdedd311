"""The strict configuration loader: every shipped example loads; every mistake gets one
message that names the key path and the allowed range."""

from __future__ import annotations

import copy
from pathlib import Path

import pytest
import yaml

from daemon.commands.cli import main
from daemon.config.settings import EX_CONFIG, ConfigError, load_config, parse_config

CONFIG_DIR = Path(__file__).resolve().parent.parent / "config"
EXAMPLES = sorted(CONFIG_DIR.glob("*.yaml"))


@pytest.mark.parametrize("path", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_every_shipped_example_loads(path):
    cfg = load_config(path)
    assert cfg.channels and cfg.site.name


def test_pico_sereno_values():
    cfg = load_config(CONFIG_DIR / "pico-sereno.yaml")
    assert (cfg.site.latitude_deg, cfg.site.longitude_deg, cfg.site.elevation_m) == (
        19.95, -101.30, 3650)
    assert cfg.site.ozone_du == 260
    assert [c.wavelength_nm for c in cfg.channels] == [380, 440, 500, 675, 870, 1020]
    assert all(c.bandwidth_nm == 10 for c in cfg.channels)
    targets = cfg.plan.airmass_targets()
    assert targets[0] == 2.0 and targets[-1] == 6.0 and len(targets) == 17


def _base() -> dict:
    return yaml.safe_load((CONFIG_DIR / "pico-sereno.yaml").read_text())


def _set(data: dict, dotted: str, value) -> dict:
    data = copy.deepcopy(data)
    node = data
    parts = dotted.split(".")
    for p in parts[:-1]:
        node = node[int(p)] if isinstance(node, list) else node[p]
    last = parts[-1]
    if value is _DELETE:
        del node[last]
    elif isinstance(node, list):
        node[int(last)] = value
    else:
        node[last] = value
    return data


_DELETE = object()

BAD = [
    ("site.latitude_deg", 95,
     "site.latitude_deg: 95 is out of range; allowed -90 to 90 degrees north"),
    ("site.longitude_deg", "west",
     "site.longitude_deg: expected a number from -180 to 180 degrees east, got 'west'"),
    ("site.elevation_m", 9000, "site.elevation_m: 9000 is out of range; allowed -450 to 6000 m"),
    ("site.timezone", "Mars/Olympus",
     "site.timezone: unknown time zone 'Mars/Olympus'; use an IANA name such as 'UTC' or "
     "'America/Mexico_City'"),
    ("site.ozone_du", 5, "site.ozone_du: 5 is out of range; allowed 100 to 600 DU"),
    ("site.latitude", 19.9, "site.latitude: unknown key; allowed keys here: elevation_m, "
     "latitude_deg, longitude_deg, name, ozone_du, pressure_hpa, temperature_c, timezone"),
    ("site.name", _DELETE, "site.name: required key is missing"),
    ("instrument.radiometer.baudrate", 19200.5,
     "instrument.radiometer.baudrate: expected a whole number from 1200 to 921600, got 19200.5"),
    ("instrument.tracker.timeout_s", 0,
     "instrument.tracker.timeout_s: 0 is out of range; allowed 0.05 to 60 s"),
    ("instrument.channels", [],
     "instrument.channels: expected a non-empty list, got an empty list"),
    ("instrument.channels.1.name", "380",
     "instrument.channels: channel name '380' is used twice; give every channel its own name"),
    ("instrument.channels.2.wavelength_nm", 200,
     "instrument.channels[2].wavelength_nm: 200 is out of range; allowed 300 to 2500 nm"),
    ("plan.targets", [2, 3, 2.5],
     "plan.targets: air masses must be in strictly ascending order with no repeats"),
    ("plan.targets", [0.5, 2],
     "plan.targets[0]: expected an air mass from 1 to 40, got 0.5"),
    ("plan.targets", [], "plan.targets: expected a non-empty list, got an empty list"),
    ("plan.airmass_max", 1.5,
     "plan.airmass_max: 1.5 is below airmass_min 2; allowed airmass_min to 40"),
    ("instrument.radiometer.retries", 10,
     "instrument.radiometer.timeout_s: 2 s x (retries 10 + 1) = 22 s for one unanswered "
     "command; allowed at most 20 s, so a target never outlasts the service's watchdog"),
    ("acquisition.lock_timeout_s", 600,
     "acquisition.lock_timeout_s: 600 is out of range; allowed 1 to 120 s"),
    ("instrument.tracker.driver", "acme",
     "instrument.tracker.driver: 'acme' is not allowed; known drivers: modbus, reference, text"),
    ("acquisition.burst_samples", 0,
     "acquisition.burst_samples: 0 is out of range; allowed 1 to 1000"),
    ("fit.max_residual_sd", True,
     "fit.max_residual_sd: expected a number from 1e-05 to 1 in ln V, got True"),
    ("fit.airmass_min", 7,
     "fit.airmass_max: 6 must be above airmass_min 7; allowed airmass_min to 40"),
    ("store.file", "x.db", "store.file: unknown key; allowed keys here: path"),
]


def _case_id(key: str, value: object) -> str:
    """A stable test id (the same in every process, as pytest-xdist needs)."""
    return f"{key}=deleted" if value is _DELETE else f"{key}={value!r}"


@pytest.mark.parametrize("key,value,message", BAD, ids=[_case_id(b[0], b[1]) for b in BAD])
def test_bad_config_message(key, value, message):
    with pytest.raises(ConfigError) as err:
        parse_config(_set(_base(), key, value))
    assert str(err.value) == message


def test_top_level_not_a_mapping():
    with pytest.raises(ConfigError, match="top level: expected a mapping of keys, got a list"):
        parse_config([1, 2])


def test_unknown_top_level_section():
    data = _base()
    data["sceduler"] = {}
    with pytest.raises(ConfigError, match="^sceduler: unknown key; allowed keys here: "):
        parse_config(data)


def test_check_config_exit_codes(tmp_path, capsys):
    assert main(["check-config", str(CONFIG_DIR / "pico-sereno.yaml")]) == 0
    assert "ok - Pico Sereno Station, 6 channels" in capsys.readouterr().out

    bad = tmp_path / "bad.yaml"
    bad.write_text(yaml.safe_dump(_set(_base(), "site.latitude_deg", -91)))
    assert main(["check-config", str(bad)]) == EX_CONFIG
    err = capsys.readouterr().err
    assert err.strip() == (f"heliotrope check-config: {bad}: site.latitude_deg: -91 is out of "
                           "range; allowed -90 to 90 degrees north")

    broken = tmp_path / "broken.yaml"
    broken.write_text("site: [unclosed\n")
    assert main(["check-config", str(broken)]) == EX_CONFIG
    assert "not valid YAML at line 2" in capsys.readouterr().err

    assert main(["check-config", str(tmp_path / "missing.yaml")]) == EX_CONFIG
    assert "no such file" in capsys.readouterr().err


def test_yaml_is_loaded_safely(tmp_path):
    evil = tmp_path / "evil.yaml"
    evil.write_text("site: !!python/object/apply:os.system ['true']\n")
    with pytest.raises(ConfigError, match="not valid YAML"):
        load_config(evil)
