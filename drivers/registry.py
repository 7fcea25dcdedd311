"""Driver names for the configuration: ``instrument.radiometer.driver`` and
``instrument.tracker.driver`` pick a factory from these tables.

Each entry is ``"module:function"``; the module is imported only when the driver is
opened, so reading a configuration never imports pyserial. A factory takes
``(url, baudrate, timeout_s, retries)`` and returns a :class:`~drivers.interfaces.
Radiometer` or :class:`~drivers.interfaces.Tracker`. A new instrument adds one module
under ``drivers/`` and one line here.
"""

from __future__ import annotations

import importlib

from drivers.interfaces import Radiometer, Tracker

RADIOMETER_DRIVERS: dict[str, str] = {"reference": "drivers.reference:open_radiometer"}
TRACKER_DRIVERS: dict[str, str] = {"reference": "drivers.reference:open_tracker"}


def _factory(table: dict[str, str], name: str):
    try:
        module, function = table[name].split(":")
    except KeyError:
        raise ValueError(f"unknown driver {name!r}; known: {', '.join(sorted(table))}") from None
    return getattr(importlib.import_module(module), function)


def open_radiometer(driver: str, url: str, baudrate: int, timeout_s: float,
                    retries: int) -> Radiometer:
    return _factory(RADIOMETER_DRIVERS, driver)(url, baudrate, timeout_s, retries)


def open_tracker(driver: str, url: str, baudrate: int, timeout_s: float,
                 retries: int) -> Tracker:
    return _factory(TRACKER_DRIVERS, driver)(url, baudrate, timeout_s, retries)
