"""The fit's configuration keys: defaults, bounds with their messages, documentation."""

from __future__ import annotations

import copy
import dataclasses
from pathlib import Path

import pytest
import yaml

from daemon.config.settings import Channel, ConfigError, FitSettings, load_config, parse_config

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"
NEW_FIT_KEYS = ("max_abs_residual", "max_residual_trend", "min_aerosol_optical_depth",
                "normalise_pressure", "max_pressure_change_hpa", "water_vapour_exponent",
                "angstrom_channels", "campaign_min_sessions", "campaign_clip_sigma",
                "tau_drift_per_hour")
NEW_CHANNEL_KEYS = ("ozone_cross_section_cm2", "responsivity_v_per_w_m2_nm", "water_vapour")


def _base() -> dict:
    return yaml.safe_load(CONFIG.read_text())


def test_shipped_example_states_the_fit_defaults():
    cfg = load_config(CONFIG)
    assert cfg.fit == FitSettings()  # the example spells out the defaults
    # BSRN Operations Manual (McArthur 2005, WMO/TD-No. 1274, sec. 7.4.2.1): unbiased
    # sigma below 0.003 and no residual beyond +/-0.006 in ln V.
    assert (cfg.fit.max_residual_sd, cfg.fit.max_abs_residual) == (0.003, 0.006)
    assert cfg.fit.max_pressure_change_hpa == 1.0  # BSRN: a change over 1 hPa
    assert all(not c.water_vapour and c.ozone_cross_section_cm2 is None
               and c.responsivity_v_per_w_m2_nm is None for c in cfg.channels)


@pytest.mark.parametrize("key", NEW_FIT_KEYS + NEW_CHANNEL_KEYS)
def test_every_new_key_is_documented_in_the_example(key):
    assert key in CONFIG.read_text()


def test_every_fit_setting_is_read_from_the_file():
    names = {f.name for f in dataclasses.fields(FitSettings)}
    text = CONFIG.read_text()
    assert all(n in text for n in names)


def _with(path: str, value) -> dict:
    data = copy.deepcopy(_base())
    node = data
    parts = path.split(".")
    for p in parts[:-1]:
        node = node[int(p)] if isinstance(node, list) else node[p]
    node[parts[-1]] = value
    return data


BAD = [
    ("fit.max_abs_residual", 0.0,
     "fit.max_abs_residual: 0.0 is out of range; allowed 0.0001 to 1 in ln V"),
    ("fit.max_residual_trend", "big",
     "fit.max_residual_trend: expected a number from 1e-05 to 1 in ln V, got 'big'"),
    ("fit.min_aerosol_optical_depth", -2,
     "fit.min_aerosol_optical_depth: -2 is out of range; allowed -1 to 1"),
    ("fit.normalise_pressure", "yes", "fit.normalise_pressure: expected true or false, got 'yes'"),
    ("fit.max_pressure_change_hpa", 500,
     "fit.max_pressure_change_hpa: 500 is out of range; allowed 0.01 to 200 hPa"),
    ("fit.water_vapour_exponent", 1.5,
     "fit.water_vapour_exponent: 1.5 is out of range; allowed 0.3 to 1"),
    ("fit.campaign_min_sessions", 0,
     "fit.campaign_min_sessions: 0 is out of range; allowed 1 to 10000"),
    ("fit.campaign_clip_sigma", 0.5,
     "fit.campaign_clip_sigma: 0.5 is out of range; allowed 1 to 10"),
    ("fit.tau_drift_per_hour", -0.001,
     "fit.tau_drift_per_hour: -0.001 is out of range; allowed 0 to 0.1 per hour"),
    ("fit.angstrom_channels", ["440"],
     "fit.angstrom_channels: expected two different channel names, for example "
     "['440', '870'], got ['440']"),
    ("fit.angstrom_channels", ["440", "440"], "expected two different channel names"),
    ("fit.angstrom_channels", ["440", "940"],
     "fit.angstrom_channels: no channel named '940'; configured channels: 380, 440, 500, "
     "675, 870, 1020"),
    ("instrument.channels.2.ozone_cross_section_cm2", 1e-15,
     "instrument.channels[2].ozone_cross_section_cm2: 1e-15 is out of range; allowed 0 to "
     "1e-18 cm^2"),
    ("instrument.channels.2.responsivity_v_per_w_m2_nm", 0,
     "instrument.channels[2].responsivity_v_per_w_m2_nm: 0 is out of range; allowed 1e-09 "
     "to 1e+09 V per W m^-2 nm^-1"),
    ("instrument.channels.2.water_vapour", 1,
     "instrument.channels[2].water_vapour: expected true or false, got 1"),
]


@pytest.mark.parametrize("path, value, message", BAD, ids=[b[0] + str(i) for i, b in
                                                           enumerate(BAD)])
def test_bad_values_name_the_key_and_the_range(path, value, message):
    with pytest.raises(ConfigError) as err:
        parse_config(_with(path, value))
    assert message in str(err.value)


def test_a_940_nm_channel_is_a_water_vapour_channel_unless_told_otherwise():
    data = _base()
    data["instrument"]["channels"].append({"name": "940", "wavelength_nm": 940})
    cfg = parse_config(data)
    assert cfg.channel("940").water_vapour is True
    data["instrument"]["channels"][-1]["water_vapour"] = False
    assert parse_config(data).channel("940").water_vapour is False
    data["fit"]["angstrom_channels"] = ["440", "940"]
    data["instrument"]["channels"][-1]["water_vapour"] = True
    with pytest.raises(ConfigError, match="'940' is a water-vapour channel"):
        parse_config(data)


def test_per_channel_values_are_read():
    data = _base()
    data["instrument"]["channels"][2].update(ozone_cross_section_cm2=1.19e-21,
                                             responsivity_v_per_w_m2_nm=1.62)
    data["fit"]["angstrom_channels"] = ["380", "1020"]
    cfg = parse_config(data)
    ch = cfg.channel("500")
    assert (ch.ozone_cross_section_cm2, ch.responsivity_v_per_w_m2_nm) == (1.19e-21, 1.62)
    assert cfg.fit.angstrom_channels == ("380", "1020")
    assert Channel("x", 500.0, 10.0).water_vapour is False
