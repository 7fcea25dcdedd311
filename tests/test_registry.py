"""Driver selection: the configuration names a driver, the registry opens it, and a
new instrument is one module plus one line in drivers/registry.py."""

from __future__ import annotations

import dataclasses
import sys
import types
from pathlib import Path

import pytest

from daemon.config.settings import ConfigError, load_config
from daemon.station.acquisition import open_devices
from drivers import registry
from drivers.reference import SerialRadiometer, SerialTracker
from tests.fakes import FakeRadiometer, FakeTracker

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno.yaml"


def test_the_reference_drivers_are_the_default():
    radiometer, tracker = open_devices(load_config(CONFIG))
    assert isinstance(radiometer, SerialRadiometer) and isinstance(tracker, SerialTracker)
    radiometer.close()  # never opened: the transport opens on first use
    tracker.close()


def test_a_registered_driver_module_is_opened_by_name(monkeypatch):
    seen = {}

    def open_fake_radiometer(url, baudrate, timeout_s, retries, options):
        seen["radiometer"] = (url, baudrate, timeout_s, retries, options)
        return FakeRadiometer()

    module = types.ModuleType("heliotrope_test_driver")
    module.open_radiometer = open_fake_radiometer
    module.open_tracker = lambda *args: FakeTracker()
    monkeypatch.setitem(sys.modules, "heliotrope_test_driver", module)
    monkeypatch.setitem(registry.RADIOMETER_DRIVERS, "bench-fake",
                        "heliotrope_test_driver:open_radiometer")
    monkeypatch.setitem(registry.TRACKER_DRIVERS, "bench-fake",
                        "heliotrope_test_driver:open_tracker")
    cfg = load_config(CONFIG)
    cfg = dataclasses.replace(
        cfg, radiometer=dataclasses.replace(cfg.radiometer, driver="bench-fake"),
        tracker=dataclasses.replace(cfg.tracker, driver="bench-fake"))
    radiometer, tracker = open_devices(cfg)
    assert isinstance(radiometer, FakeRadiometer) and isinstance(tracker, FakeTracker)
    assert seen["radiometer"] == (cfg.radiometer.url, 19200, 2.0, 3, None)


def test_a_driver_options_block_is_checked_by_its_family_and_named_in_the_error(tmp_path):
    # The reference family takes no options: its check refuses the block, and the
    # message names the key path (common practice, no source: exit 78 names the key).
    text = CONFIG.read_text().replace(
        "  radiometer:\n", "  radiometer:\n    options: {unit: 3}\n", 1)
    bad = tmp_path / "bad.yaml"
    bad.write_text(text)
    with pytest.raises(ConfigError, match=r"instrument\.radiometer\.options: this driver "
                                          r"takes no options"):
        load_config(bad)
