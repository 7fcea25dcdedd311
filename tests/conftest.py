"""Shared test options. Hardware tests run only when a device port is named:

    .venv/bin/python -m pytest --device-port /dev/serial/by-id/usb-...-if00
"""

from __future__ import annotations

import pytest


def pytest_addoption(parser):
    parser.addoption("--device-port", default=None,
                     help="serial URL of a real radiometer; enables tests marked 'device'")


def pytest_collection_modifyitems(config, items):
    if config.getoption("--device-port"):
        return
    skip = pytest.mark.skip(reason="needs real hardware: pass --device-port URL")
    for item in items:
        if "device" in item.keywords:
            item.add_marker(skip)


@pytest.fixture
def device_port(request):
    return request.config.getoption("--device-port")
