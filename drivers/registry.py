"""Driver names for the configuration: ``instrument.radiometer.driver`` and
``instrument.tracker.driver`` pick a factory from these tables.

Each entry is ``"module:function"``; the module is imported only when the driver is
opened, so reading a configuration never imports pyserial or a fieldbus library. A
factory takes ``(url, baudrate, timeout_s, retries, options)`` and returns a
:class:`~drivers.interfaces.Radiometer` or :class:`~drivers.interfaces.Tracker`.

``options`` is what the family's option check (``OPTION_CHECKS``, a pure module with
no I/O imports) made of the port's ``options`` block: a register map, a table of
command templates, or ``None`` for a family that takes none. The check raises
:class:`~drivers.interfaces.DriverConfigError` naming the key inside the block.
A new family adds one module under ``drivers/``, one line in each table here, and
usually no code at all for a new instrument of a known family.
"""

from __future__ import annotations

import importlib
from typing import Any

from drivers.interfaces import DriverConfigError, Radiometer, Tracker

RADIOMETER_DRIVERS: dict[str, str] = {
    "reference": "drivers.reference:open_radiometer",
    "modbus": "drivers.modbus:open_radiometer",
    "text": "drivers.textcmd:open_radiometer",
}
TRACKER_DRIVERS: dict[str, str] = {
    "reference": "drivers.reference:open_tracker",
    "modbus": "drivers.modbus:open_tracker",
    "text": "drivers.textcmd:open_tracker",
}

# (kind, driver) -> "module:function" taking the raw options mapping (or None).
OPTION_CHECKS: dict[tuple[str, str], str] = {
    ("radiometer", "reference"): "drivers.registry:no_options",
    ("tracker", "reference"): "drivers.registry:no_options",
    ("radiometer", "modbus"): "drivers.modbus_map:check_radiometer_options",
    ("tracker", "modbus"): "drivers.modbus_map:check_tracker_options",
    ("radiometer", "text"): "drivers.textcmd_spec:check_radiometer_options",
    ("tracker", "text"): "drivers.textcmd_spec:check_tracker_options",
}


def _resolve(spec: str):
    module, function = spec.split(":")
    return getattr(importlib.import_module(module), function)


def _factory(table: dict[str, str], name: str):
    try:
        spec = table[name]
    except KeyError:
        raise ValueError(f"unknown driver {name!r}; known: {', '.join(sorted(table))}") from None
    return _resolve(spec)


def no_options(options: Any) -> None:
    """The check of a family that is configured by its port alone."""
    if options not in (None, {}):
        raise DriverConfigError("", "this driver takes no options; remove the block")
    return None


def check_options(kind: str, driver: str, options: Any) -> Any:
    """The parsed options for ``driver`` (a ``kind`` of "radiometer" or "tracker")."""
    try:
        spec = OPTION_CHECKS[(kind, driver)]
    except KeyError:
        raise ValueError(f"no option check for the {kind} driver {driver!r}") from None
    return _resolve(spec)(options)


def open_radiometer(driver: str, url: str, baudrate: int, timeout_s: float,
                    retries: int, options: Any = None) -> Radiometer:
    return _factory(RADIOMETER_DRIVERS, driver)(url, baudrate, timeout_s, retries, options)


def open_tracker(driver: str, url: str, baudrate: int, timeout_s: float,
                 retries: int, options: Any = None) -> Tracker:
    return _factory(TRACKER_DRIVERS, driver)(url, baudrate, timeout_s, retries, options)
