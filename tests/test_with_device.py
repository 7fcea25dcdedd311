"""Hardware tests: a real radiometer on a real port. Skipped unless a port is named.

    .venv/bin/python -m pytest tests/test_with_device.py \\
        --device-port /dev/serial/by-id/usb-heliotrope-radiometer-if00

Stop the service first (it holds the port). Two environment variables describe the
instrument when it differs from the reference one:

- ``HELIOTROPE_DEVICE_BAUDRATE`` line speed [bit/s], default 19200;
- ``HELIOTROPE_DEVICE_FULL_SCALE_V`` the ADC's full scale [V], default 5.0.

These tests only read (ID, BURST, DARK, HK, STATUS): nothing moves, no clock is set.
The last test runs this same file against the simulator, so the hardware tests are
known to work before anyone carries them up the mountain.
"""

from __future__ import annotations

import math
import os
import re
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pytest

from drivers import protocol as p
from drivers.interfaces import Burst
from drivers.reference import SerialRadiometer, open_radiometer

ROOT = Path(__file__).resolve().parents[1]
BAUDRATE = int(os.environ.get("HELIOTROPE_DEVICE_BAUDRATE", "19200"))
FULL_SCALE_V = float(os.environ.get("HELIOTROPE_DEVICE_FULL_SCALE_V", "5.0"))
BURST_SAMPLES = 5
DEVICE_TESTS = 6  # tests marked 'device' below; the self-check counts them


@pytest.fixture(scope="module")
def radiometer(request) -> Iterator[SerialRadiometer]:
    url = request.config.getoption("--device-port")
    rad = open_radiometer(url, baudrate=BAUDRATE, timeout_s=2.0, retries=2)
    try:
        yield rad
    finally:
        rad.close()


def _check_samples(burst: Burst, n: int, channels: int) -> None:
    assert len(burst.samples) == n
    assert all(len(row) == channels for row in burst.samples)
    assert len(burst.saturated) == channels
    for c in range(channels):
        column = [row[c] for row in burst.samples]
        assert all(math.isfinite(v) for v in column), f"channel {c + 1}: {column}"
        assert all(abs(v) <= FULL_SCALE_V for v in column), (
            f"channel {c + 1} beyond full scale {FULL_SCALE_V} V: {column} "
            "(set HELIOTROPE_DEVICE_FULL_SCALE_V if this instrument's differs)")
        # PROTOCOL.md section 5: the flag is 1 when any sample reached full scale.
        if max(column) >= FULL_SCALE_V:
            assert burst.saturated[c], f"channel {c + 1} at full scale but not flagged"
    # PROTOCOL.md section 5: the duration runs from the first to the last sample, at
    # most MAX_SAMPLE_PERIOD_S apart; the device rounds it to whole milliseconds.
    assert 0.0 <= burst.duration_s <= (n - 1) * p.MAX_SAMPLE_PERIOD_S + 0.001


@pytest.mark.device
def test_identify(radiometer):
    identity = radiometer.identify()
    for field in (identity.model, identity.serial, identity.firmware):
        assert field and field.isascii() and field.isprintable() and " " not in field
    channels = radiometer.channel_count()
    assert channels >= 1
    # Asked twice, the same instrument answers the same.
    assert radiometer.identify() == identity
    assert radiometer.channel_count() == channels


@pytest.mark.device
def test_burst_of_five_samples_is_sane(radiometer):
    burst = radiometer.read_burst(BURST_SAMPLES)
    _check_samples(burst, BURST_SAMPLES, radiometer.channel_count())


@pytest.mark.device
def test_dark_is_small_and_never_saturated(radiometer):
    dark = radiometer.read_dark(BURST_SAMPLES)
    _check_samples(dark, BURST_SAMPLES, radiometer.channel_count())
    assert not any(dark.saturated)
    # Common practice, no source: a dark offset is a small fraction of full scale;
    # a tenth of it means the shutter did not close or the offset needs service.
    worst = max(abs(v) for row in dark.samples for v in row)
    assert worst < 0.1 * FULL_SCALE_V, f"dark signal up to {worst} V"


@pytest.mark.device
def test_housekeeping_is_plausible(radiometer):
    hk = radiometer.read_housekeeping()
    # From memory: the WMO archive of weather extremes has air temperatures from
    # -89.2 degC (Vostok, 1983) to 56.7 degC (Death Valley, 1913).
    assert -89.2 <= hk.ambient_temp_c <= 56.7
    # Common practice, no source: electronics in an instrument are rated for the
    # industrial range, -40 to +85 degC.
    assert -40.0 <= hk.detector_temp_c <= 85.0
    assert -40.0 <= hk.case_temp_c <= 85.0
    # Common practice, no source: field instruments run from a 5, 12 or 24 V supply.
    assert 4.0 <= hk.supply_v <= 30.0
    # Relative humidity is a percentage by definition.
    assert 0.0 <= hk.humidity_pct <= 100.0
    if hk.pressure_hpa is not None:
        # From memory: 300 hPa is about 9 km up in the US Standard Atmosphere 1976,
        # above any station; the highest sea-level pressure on record is 1083.8 hPa.
        assert 300.0 <= hk.pressure_hpa <= 1084.0


@pytest.mark.device
def test_status_is_not_a_fault(radiometer):
    status = radiometer.status()
    assert status.state in p.RADIOMETER_STATES
    assert status.state != "FAULT", "the radiometer reports FAULT: a person should look"
    assert status.errors <= status.requests


@pytest.mark.device
def test_link_stayed_clean(radiometer):
    # Run last in this module: every exchange above was answered at the first try.
    counters = radiometer.transport.counters
    assert counters.exchanges >= 1
    assert (counters.crc_errors, counters.garbage, counters.reconnects) == (0, 0, 0)


# ---------------------------------------------------------------------------- self-check


@pytest.mark.slow
def test_device_tests_pass_against_the_simulator(request):
    if request.config.getoption("--device-port"):
        pytest.skip("a device port was given: the device tests above ran against it")
    from daemon.station.bench import simulator

    with simulator("pico-sereno-clear", seed=5, port="tcp:0") as ends:
        run = subprocess.run(
            [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "-m", "device",
             str(Path(__file__)), "--device-port", ends.radiometer],
            cwd=ROOT, capture_output=True, text=True, timeout=120,
            env={**os.environ, "HELIOTROPE_DEVICE_FULL_SCALE_V": "5.0"},
        )
    summary = run.stdout.strip().splitlines()[-1] if run.stdout.strip() else run.stderr
    assert run.returncode == 0, run.stdout + run.stderr
    assert re.search(rf"\b{DEVICE_TESTS} passed\b", summary), summary
    assert "skipped" not in summary and "failed" not in summary
