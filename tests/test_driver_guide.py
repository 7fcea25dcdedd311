"""The worked driver in DEVELOPERS.md ("Adding a driver") runs as printed.

The guide's module and its example test are taken out of DEVELOPERS.md and executed,
so the how-to cannot drift from the interfaces it teaches.
"""

from __future__ import annotations

import errno
import re
import sys
import types
from datetime import UTC, datetime
from pathlib import Path

import pytest
import serial

from drivers.interfaces import DeviceError, LinkError, Radiometer
from drivers.transport import PortUnavailable, ScriptedPort

GUIDE = Path(__file__).resolve().parents[1] / "DEVELOPERS.md"
OK = b'0,"No error"\n'


def _python_blocks() -> list[str]:
    return re.findall(r"```python\n(.*?)```", GUIDE.read_text(), flags=re.DOTALL)


@pytest.fixture(scope="module")
def quillon():
    blocks = [b for b in _python_blocks() if "class QuillonRadiometer" in b]
    assert len(blocks) == 1, "DEVELOPERS.md should hold the worked driver module once"
    module = types.ModuleType("drivers.quillon")
    module.__file__ = f"{GUIDE}:drivers/quillon.py"
    sys.modules["drivers.quillon"] = module
    try:
        exec(compile(blocks[0], module.__file__, "exec"), module.__dict__)
        yield module
    finally:
        del sys.modules["drivers.quillon"]


def _radiometer(quillon, pairs, **link_kwargs):
    port = ScriptedPort(pairs)
    link = quillon.QuillonLink("scripted://", serial_factory=lambda url, **kw: port,
                               **link_kwargs)
    return quillon.QuillonRadiometer(link), port


def test_the_worked_driver_implements_the_whole_interface(quillon):
    assert issubclass(quillon.QuillonRadiometer, Radiometer)
    assert not quillon.QuillonRadiometer.__abstractmethods__
    rad = quillon.open_quillon("/dev/does-not-exist")
    assert isinstance(rad, Radiometer)


def test_the_guides_example_test_passes(quillon):
    blocks = [b for b in _python_blocks() if "def test_read_dark" in b]
    assert len(blocks) == 1
    namespace: dict = {}
    exec(compile(blocks[0], f"{GUIDE}:example test", "exec"), namespace)
    namespace["test_read_dark_closes_and_reopens_the_shutter"]()


def test_identify_and_housekeeping(quillon):
    rad, port = _radiometer(quillon, [
        (b"*IDN?\n", b"QUILLON,QR-4,Q4-0193,3.2.1\r\n"),
        (b"HK?\n", b"24.9,18.2,6.5,12.41,31.0\n"),
    ])
    identity = rad.identify()
    assert (identity.model, identity.serial, identity.firmware) == ("QR-4", "Q4-0193", "3.2.1")
    hk = rad.read_housekeeping()
    assert (hk.detector_temp_c, hk.supply_v, hk.pressure_hpa) == (24.9, 12.41, None)
    port.assert_done()


def test_another_device_is_refused(quillon):
    rad, _ = _radiometer(quillon, [(b"*IDN?\n", b"OTHERCO,X1,1,1\n")])
    with pytest.raises(DeviceError, match="not a Quillon"):
        rad.identify()


def test_burst_in_volts_with_over_range_as_saturation(quillon):
    rad, port = _radiometer(quillon, [
        (b"READ? 2\n", b"1234.5,2345.6,+9.9E37,100.0,1235.0,2346.0,9876.5,101.0\n"),
    ])
    burst = rad.read_burst(2)
    assert burst.samples[0] == pytest.approx((1.2345, 2.3456, 10.0, 0.1))
    assert burst.samples[1] == pytest.approx((1.235, 2.346, 9.8765, 0.101))
    assert burst.saturated == (False, False, True, False)
    assert burst.duration_s == pytest.approx(0.1)
    port.assert_done()


def test_a_refused_setting_is_a_device_error(quillon):
    rad, _ = _radiometer(quillon, [
        (b"SYST:DATE 2025,2,12\n", b""), (b"SYST:ERR?\n", b'-222,"Data out of range"\n'),
    ])
    with pytest.raises(DeviceError, match="-222 Data out of range"):
        rad.set_clock(datetime(2025, 2, 12, 18, 0, tzinfo=UTC))


def test_the_shutter_reopens_when_the_dark_read_fails(quillon):
    rad, port = _radiometer(quillon, [
        (b"SHUT CLOS\n", b""), (b"SYST:ERR?\n", OK),
        (b"READ? 1\n", b""),  # silent
        (b"SHUT OPEN\n", b""), (b"SYST:ERR?\n", OK),
    ], timeout_s=0.2, retries=0)
    with pytest.raises(LinkError, match="no reply to READ"):
        rad.read_dark(1)
    port.assert_done()


def test_a_missing_port_is_port_unavailable(quillon):
    def missing(url, **kwargs):
        raise serial.SerialException(errno.ENOENT, f"could not open port {url}")

    link = quillon.QuillonLink("/dev/does-not-exist", serial_factory=missing)
    with pytest.raises(PortUnavailable, match="/dev/does-not-exist"):
        quillon.QuillonRadiometer(link).identify()
