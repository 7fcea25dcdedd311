"""A dead adapter for a week, and stopping with one: the back-off stays bounded.

No test here waits on the wall clock for a back-off: the sleeps are recorded, or cut
short by :meth:`Transport.shutdown`; nothing asserts how long anything took.
"""

from __future__ import annotations

import errno
import threading

import pytest
import serial

from drivers import protocol as p
from drivers.interfaces import LinkError
from drivers.reference import SerialTracker
from drivers.transport import (
    LinkShutDown,
    LinkTimeout,
    PortUnavailable,
    ScriptedPort,
    Transport,
    scripted_transport,
)


def unplugged(url, **kwargs):
    # What pyserial raises for a USB adapter that is gone: ENOENT on the device node.
    raise serial.SerialException(errno.ENOENT, f"could not open port {url}")


def no_back_off(delay_s: float) -> None:
    raise AssertionError(f"a one-try call waited {delay_s} s of back-off")


def test_a_week_of_failed_opens_stays_a_link_fault_with_the_longest_wait():
    # 5,200 failed opens: the doubling 0.25 s * 2**n overflowed a float at n = 1024
    # (OverflowError after 1,025 failed opens on main, the 257th exchange here).
    sleeps: list[float] = []
    t = Transport("/dev/ttyUSB0", retries=3, backoff_s=(0.25, 5.0),
                  serial_factory=unplugged, sleep=sleeps.append)
    for _ in range(1300):
        with pytest.raises(PortUnavailable, match="no such port"):
            t.exchange("ID")
    assert len(sleeps) == 1300 * 4
    assert sleeps[:6] == [0.25, 0.5, 1.0, 2.0, 4.0, 5.0]
    assert set(sleeps[5:]) == {5.0}


def test_back_off_with_a_tiny_first_wait_still_reaches_the_longest():
    sleeps: list[float] = []
    t = Transport("/dev/ttyUSB0", retries=99, backoff_s=(1e-15, 5.0),
                  serial_factory=unplugged, sleep=sleeps.append)
    with pytest.raises(PortUnavailable):
        t.exchange("ID")
    assert sleeps[-1] == 5.0


@pytest.mark.parametrize("backoff_s", [(-1.0, 5.0), (6.0, 5.0), (0.25, float("inf")),
                                       (float("nan"), 5.0)])
def test_back_off_that_makes_no_sense_is_refused(backoff_s):
    with pytest.raises(ValueError, match="backoff_s"):
        Transport("/dev/ttyUSB0", backoff_s=backoff_s)


def test_exchange_once_with_a_vanished_adapter_fails_at_once_without_back_off():
    t = Transport("/dev/ttyUSB0", retries=3, serial_factory=unplugged, sleep=no_back_off)
    with pytest.raises(PortUnavailable, match="no such port"):
        t.exchange_once(p.PARK)


class DeadWritePort(ScriptedPort):
    """Opened, then the adapter is unplugged: every write fails with EIO."""

    def write(self, data):
        raise serial.SerialException(errno.EIO, "write failed: [Errno 5] Input/output error")


def test_exchange_once_on_a_port_that_fails_is_one_link_fault():
    opened: list[ScriptedPort] = []

    def factory(url, **kwargs):
        opened.append(DeadWritePort([]))
        return opened[-1]

    t = Transport("/dev/ttyUSB0", retries=3, serial_factory=factory, sleep=no_back_off)
    with pytest.raises(LinkError, match="port failed during PARK") as info:
        t.exchange_once(p.PARK)
    assert not isinstance(info.value, PortUnavailable)
    assert len(opened) == 1 and not opened[0].is_open  # one try, port dropped
    assert not t.is_open


def test_exchange_once_on_a_silent_device_times_out_once():
    port = ScriptedPort([(p.encode_request(1, p.PARK), b"")])
    t = Transport("scripted://", timeout_s=5.0, retries=3, first_rid=1,
                  serial_factory=lambda url, **kw: port, sleep=no_back_off)
    # The caller's 0.2 s budget, not the configured 5 s, is what the one attempt waits.
    with pytest.raises(LinkTimeout, match=r"within 0\.[12]\d* s"):
        t.exchange_once(p.PARK, timeout_s=0.2)
    port.assert_done()  # exactly one request went out
    assert t.counters.retries == 0 and t.counters.timeouts == 1


def test_exchange_once_does_not_wait_beyond_its_budget_for_a_busy_link():
    t = Transport("/dev/ttyUSB0", serial_factory=unplugged, sleep=no_back_off)
    # Holding the lock stands for another thread in the middle of an exchange.
    with t._lock, pytest.raises(LinkError, match="busy with another exchange"):
        t.exchange_once(p.PARK, timeout_s=0.05)


def test_park_once_sends_one_park_and_returns():
    pairs = [(p.encode_request(7, p.PARK), p.encode_reply(7, p.PARK))]
    with scripted_transport(pairs, first_rid=7, retries=3) as t:
        SerialTracker(t).park_once()


def test_park_once_with_a_vanished_adapter_is_a_link_fault_without_back_off():
    tracker = SerialTracker(Transport("/dev/ttyUSB1", retries=3, name="tracker",
                                      serial_factory=unplugged, sleep=no_back_off))
    with pytest.raises(PortUnavailable):
        tracker.park_once(timeout_s=1.0)


def test_shutdown_cuts_a_back_off_in_progress_short():
    # The default sleep is the shutdown event's wait, so a 1-hour back-off in the
    # worker thread ends as soon as shutdown() is called.
    t = Transport("/dev/ttyUSB0", retries=3, backoff_s=(3600.0, 3600.0),
                  serial_factory=unplugged)
    raised: list[BaseException] = []
    in_back_off = threading.Event()
    real_wait = t._sleep

    def wait(delay_s: float) -> None:
        in_back_off.set()
        real_wait(delay_s)

    t._sleep = wait

    def worker() -> None:
        try:
            t.exchange("ID")
        except BaseException as exc:  # noqa: BLE001 - recorded for the main thread
            raised.append(exc)

    thread = threading.Thread(target=worker, daemon=True)
    thread.start()
    assert in_back_off.wait(30)
    assert t.shutdown(timeout_s=30)
    thread.join(30)
    assert not thread.is_alive()
    assert len(raised) == 1 and isinstance(raised[0], LinkShutDown)
    with pytest.raises(LinkShutDown):
        t.exchange("ID")
    with pytest.raises(LinkShutDown):
        t.exchange_once(p.PARK)


def test_shutdown_closes_an_idle_port():
    pairs = [(p.encode_request(1, p.HK), p.encode_reply(1, p.HK, ["1"]))]
    port = ScriptedPort(pairs)
    t = Transport("scripted://", first_rid=1, serial_factory=lambda url, **kw: port)
    assert t.exchange(p.HK) == ("1",)
    assert t.shutdown(timeout_s=1.0)
    assert not port.is_open and not t.is_open
