"""The text-command drivers against (request bytes, reply bytes) pairs.

The pairs are laid out as IEEE 488.2-1992 and SCPI-1999 lay out a message (the section
is named beside each test); the command set itself is config/pico-sereno-scpi.yaml's.
Every pair must be used (drivers.transport.ScriptedPort), so a driver that sends one
byte more or less, or retries where it must not, fails. The section numbers of IEEE
488.2-1992 and SCPI-1999 are from memory of the standards (docs/REFERENCES.md has no
entry for them); the message layout they name is what the bytes below follow.
"""

from __future__ import annotations

import contextlib
from datetime import UTC, datetime
from pathlib import Path

import pytest
import yaml

from drivers.interfaces import LinkError
from drivers.textcmd import TextDeviceError, TextRadiometer, TextTracker
from drivers.textcmd_spec import check_radiometer_options, check_tracker_options
from drivers.transport import ScriptedPort

CONFIG = Path(__file__).resolve().parent.parent / "config" / "pico-sereno-scpi.yaml"
_INSTRUMENT = yaml.safe_load(CONFIG.read_text())["instrument"]
RADIOMETER_OPTIONS = _INSTRUMENT["radiometer"]["options"]
TRACKER_OPTIONS = _INSTRUMENT["tracker"]["options"]


@contextlib.contextmanager
def scripted(kind: str, pairs, *, retries: int = 0, options=None):
    port = ScriptedPort(pairs)
    factory = {"radiometer": (TextRadiometer, check_radiometer_options,
                              RADIOMETER_OPTIONS),
               "tracker": (TextTracker, check_tracker_options, TRACKER_OPTIONS)}
    cls, check, default = factory[kind]
    device = cls(check(options or default), "scripted://", 19200, 0.3, retries,
                 serial_factory=lambda url, **kwargs: port)
    yield device
    port.assert_done()


def nr3(values) -> bytes:
    # IEEE 488.2-1992 sec. 8.7.4: NR3 is a signed mantissa with an explicit exponent.
    return ",".join(f"{v:+.8E}" for v in values).encode()


# ---------------------------------------------------------------------------- radiometer


def test_idn_query_and_its_four_field_response():
    # IEEE 488.2-1992 sec. 10.14: *IDN? answers four fields separated by commas:
    # manufacturer, model, serial number, firmware level. Sec. 7.5: the program message
    # terminator is NL (LF); sec. 8.5: so is the response message terminator.
    with scripted("radiometer", [(b"*IDN?\n", b"HELIOTROPE-SIM,HR6-SIM,PS-0042,1.4.2\n")]) as r:
        ident = r.identify()
    assert (ident.model, ident.serial, ident.firmware) == ("HELIOTROPE-SIM HR6-SIM",
                                                           "PS-0042", "1.4.2")


def test_burst_is_one_compound_message_with_one_response():
    # IEEE 488.2-1992 sec. 7.3: program message units separated by ';' make one
    # message; a leading ':' roots the header (SCPI-1999 Vol. 1 sec. 6.2.4). Only the
    # query answers: a list of NR3 values separated by ',' (sec. 8.4.2, 8.7.4).
    row1 = [1.25, 2.5, 3.0, 2.75, 2.0, 1.5]
    row2 = [1.26, 2.49, 5.0, 2.74, 2.01, 1.49]  # 500 nm at the 5 V full scale
    request = b"SHUT:OPEN;:SAMP:COUN 2;:MEAS:VOLT:DC? (@101:106)\n"
    with scripted("radiometer", [(request, nr3(row1 + row2) + b"\n")]) as r:
        burst = r.read_burst(2)
    assert burst.samples == (tuple(row1), tuple(row2))
    assert burst.saturated == (False, False, True, False, False, False)
    assert burst.duration_s == pytest.approx(0.2)  # (n - 1) x the configured 0.2 s


def test_dark_reading_ends_with_the_opc_response():
    # IEEE 488.2-1992 sec. 10.18: *OPC? answers "1" when the operations before it are
    # done; sec. 8.4.1: the responses of one message are separated by ';'.
    row = [0.0021, 0.0018, 0.0016, 0.0015, 0.0019, 0.0026]
    request = b"SHUT:CLOS;:SAMP:COUN 1;:MEAS:VOLT:DC? (@101:106);:SHUT:OPEN;*OPC?\n"
    with scripted("radiometer", [(request, nr3(row) + b";1\n")]) as r:
        dark = r.read_dark(1)
    assert dark.samples == (tuple(row),) and dark.duration_s == 0.0


def test_housekeeping_scales_volts_and_reads_scpi_nan_as_no_barometer():
    # SCPI-1999 Vol. 1 sec. 7.2.1.5: 9.91E+37 is "not a number", what a channel with
    # no sensor reads. The divider, humidity and barometer scales are the example
    # configuration's (volts x scale + offset).
    request = b"MEAS:TEMP? (@201:203);:MEAS:VOLT:DC? (@204:206)\n"
    reply = nr3([24.5, 12.0, 4.5]) + b";" + nr3([3.05, 0.35, 1.48]) + b"\n"
    no_baro = nr3([24.5, 12.0, 4.5]) + b";" + nr3([3.05, 0.35, 9.91e37]) + b"\n"
    with scripted("radiometer", [(request, reply), (request, no_baro)]) as r:
        hk = r.read_housekeeping()
        hk2 = r.read_housekeeping()
    assert (hk.detector_temp_c, hk.case_temp_c, hk.ambient_temp_c) == (24.5, 12.0, 4.5)
    assert hk.supply_v == pytest.approx(12.2)
    assert hk.humidity_pct == pytest.approx(35.0)
    assert hk.pressure_hpa == pytest.approx(425.0 + 150.0 * 1.48)
    assert hk2.pressure_hpa is None


def test_set_clock_is_date_then_time_and_never_sixty_seconds():
    # SCPI-1999 Vol. 2 sec. 21.7/21.20 (SYSTem:DATE <year>,<month>,<day> and
    # SYSTem:TIME <hour>,<minute>,<second>; from memory of the section numbers). A time
    # a hair before the minute is rounded to the millisecond first, so the seconds
    # field reads 0.000 of the next minute, never 60.000.
    pairs = [(b"SYST:DATE 2027,2,15;:SYST:TIME 13,5,2.125;*OPC?\n", b"1\n"),
             (b"SYST:DATE 2027,2,15;:SYST:TIME 13,6,0.000;*OPC?\n", b"1\n")]
    with scripted("radiometer", pairs) as r:
        r.set_clock(datetime(2027, 2, 15, 13, 5, 2, 125000, tzinfo=UTC))
        r.set_clock(datetime(2027, 2, 15, 13, 5, 59, 999800, tzinfo=UTC))


def test_a_refused_command_is_read_from_the_error_queue_and_not_retried():
    # SCPI-1999 Vol. 2 sec. 21.8: a refused command queues an error; SYSTem:ERRor?
    # answers <code>,"<text>" and -113 is "Undefined header" (sec. 21.8.9, from
    # memory); a query the device refuses gets no response (from memory).
    request = b"SHUT:OPEN;:SAMP:COUN 1;:MEAS:VOLT:DC? (@101:106)\n"
    pairs = [(request, b""), (b"SYST:ERR?\n", b'-113,"Undefined header"\n')]
    with scripted("radiometer", pairs, retries=2) as r, \
            pytest.raises(TextDeviceError, match=r"-113.*Undefined header") as info:
        r.read_burst(1)
    assert info.value.code == "-113"
    assert r.link_counters()["device_errors"] == 1 and r.link_counters()["retries"] == 0


def test_a_lost_reply_with_an_empty_error_queue_is_a_counted_timeout_and_retried():
    # SCPI-1999 Vol. 2 sec. 21.8: 0,"No error" when the queue is empty, so the device
    # never saw the command (or its reply was lost): try again.
    idn = b"HELIOTROPE-SIM,HR6-SIM,PS-0042,1.4.2\n"
    pairs = [(b"*IDN?\n", b""), (b"SYST:ERR?\n", b'+0,"No error"\n'), (b"*IDN?\n", idn)]
    with scripted("radiometer", pairs, retries=1) as r:
        assert r.identify().serial == "PS-0042"
    counters = r.link_counters()
    assert (counters["timeouts"], counters["retries"], counters["exchanges"]) == (1, 1, 1)


def test_a_silent_device_is_a_link_error_after_every_attempt():
    pairs = [(b"*IDN?\n", b""), (b"SYST:ERR?\n", b""), (b"*IDN?\n", b""), (b"SYST:ERR?\n", b"")]
    with scripted("radiometer", pairs, retries=1) as r, \
            pytest.raises(LinkError, match="no usable reply to identify after 2 attempts"):
        r.identify()


@pytest.mark.parametrize("noise", [b"\x95\xfe#@!noise\n", b"#@!noise\n"],
                         ids=["binary", "printable"])
def test_noise_before_the_reply_is_counted_as_garbage_and_skipped(noise):
    # Common practice, no source: line noise on a serial line arrives as a line that
    # matches no reply; the driver drops it and waits on for the reply.
    idn = b"HELIOTROPE-SIM,HR6-SIM,PS-0042,1.4.2\n"
    with scripted("radiometer", [(b"*IDN?\n", noise + idn)]) as r:
        assert r.identify().firmware == "1.4.2"
    counters = r.link_counters()
    assert (counters["garbage"], counters["retries"], counters["timeouts"]) == (1, 0, 0)


def test_a_late_reply_to_an_earlier_command_is_skipped_not_taken():
    # No request ids in a text protocol: a reply to another action does not match
    # this action's pattern, so it is garbage here; the right reply behind it is used.
    idn = b"HELIOTROPE-SIM,HR6-SIM,PS-0042,1.4.2\n"
    with scripted("radiometer", [(b"*IDN?\n", b"1\n" + idn)]) as r:
        assert r.identify().serial == "PS-0042"


def test_a_garbled_burst_with_too_few_values_is_a_link_fault_and_asked_again():
    # A truncated response still matches the list pattern but has 5 of 6 values: it is
    # garbage (a link fault), and the retry gets the whole burst.
    row = [1.25, 2.5, 3.0, 2.75, 2.0, 1.5]
    request = b"SHUT:OPEN;:SAMP:COUN 1;:MEAS:VOLT:DC? (@101:106)\n"
    pairs = [(request, nr3(row[:5]) + b"\n"), (request, nr3(row) + b"\n")]
    with scripted("radiometer", pairs, retries=1) as r:
        assert r.read_burst(1).samples == (tuple(row),)
    assert r.link_counters()["garbage"] == 1 and r.link_counters()["retries"] == 1


def test_crlf_line_ending_is_sent_and_read():
    # IEEE 488.2-1992 sec. 7.5 allows only NL; serial SCPI instruments often send CR LF,
    # which the driver reads up to the LF (common practice, no source).
    options = dict(RADIOMETER_OPTIONS, line_ending="CRLF")
    with scripted("radiometer", [(b"*IDN?\r\n", b"ACME,X,1,2\r\n")], options=options) as r:
        assert r.identify().model == "ACME X"


# ---------------------------------------------------------------------------- tracker


def test_tracker_state_over_cr_terminated_lines():
    # Our own firmware's command set (config/pico-sereno-scpi.yaml); CR ends each line.
    reply = b"S=T AZ=123.400 EL=45.600 L=1 E=0.0120\r"
    with scripted("tracker", [(b"S\r", reply)]) as t:
        s = t.state()
    assert (s.mode, s.azimuth_deg, s.elevation_deg, s.locked, s.error_deg) == (
        "tracking", 123.4, 45.6, True, 0.012)


def test_goto_takes_any_azimuth_and_sends_it_in_0_to_360():
    with scripted("tracker", [(b"G 350.000 12.500\r", b"OK\r"), (b"F 1\r", b"OK\r"),
                              (b"T 2027-02-15T13:05:02.125Z\r", b"OK\r")]) as t:
        t.goto(-10.0, 12.5)
        t.follow_sun(True)
        t.set_clock(datetime(2027, 2, 15, 13, 5, 2, 125000, tzinfo=UTC))


def test_a_device_error_reply_is_a_device_error_and_not_retried():
    with scripted("tracker", [(b"G 10.000 95.000\r", b"E3 elevation out of range\r")],
                  retries=2) as t, pytest.raises(TextDeviceError, match="error 3") as info:
        t.goto(10.0, 95.0)
    assert info.value.device_message == "elevation out of range"


def test_an_unknown_mode_letter_names_the_key_to_add_it_to():
    with scripted("tracker", [(b"S\r", b"S=X AZ=1.000 EL=2.000 L=0 E=0.0000\r")]) as t, \
            pytest.raises(Exception, match=r"actions\.state\.fields\.mode\.map"):
        t.state()


def test_park_once_sends_one_park_and_gives_up_on_silence():
    with scripted("tracker", [(b"P\r", b"")], retries=3) as t, pytest.raises(LinkError):
        t.park_once(timeout_s=0.2)
