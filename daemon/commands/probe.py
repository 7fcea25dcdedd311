"""``heliotrope probe``: first contact with the instrument, reading only.

The probe identifies the radiometer and the tracker, takes one burst, reads the
radiometer's housekeeping and the tracker's state, and times each round trip. It sends
only ``ID``, ``BURST``, ``HK`` and ``STATUS``: it never moves the tracker, never sets a
clock and never resets a device, so it is safe to run on a station whose mount nobody
is watching.

Every failure becomes one line the technician can act on: no such port, permission
denied (with the serial group), port in use (by the service?), nothing listening (the
simulator), no answer, an answer in some other protocol (line speed), the wrong device
on the port (swapped ports), an error reply.

Other driver families (Modbus, ...) are probed through the Radiometer and Tracker
interfaces alone: identify, one burst, housekeeping, tracker state, each timed, with
the same kinds of advice; still nothing that moves, sets or resets.

Imports pyserial and the drivers, nothing heavy (no numpy, pvlib or sqlite-utils).
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import errno
import grp
import math
import os
import re
import textwrap
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from daemon.commands.tables import dumps, table
from daemon.config.settings import Port
from drivers import protocol as p
from drivers.interfaces import DeviceError, LinkError
from drivers.reference import SerialRadiometer, SerialTracker
from drivers.transport import LinkCounters, PortUnavailable, Transport, is_device_path

EX_OK, EX_UNAVAILABLE = 0, 69
#: Widest line the human output may have [characters]: an 80-column SSH terminal.
MAX_COLUMNS = 79

RADIOMETER, TRACKER = "radiometer", "tracker"

#: Problem kinds, as they appear in the JSON (stable names for scripts).
NO_PORT = "no_port"
PERMISSION = "permission"
PORT_BUSY = "port_busy"
CANNOT_CONNECT = "cannot_connect"
BAD_URL = "bad_url"
NOT_A_PORT = "not_a_port"
PORT_FAILED = "port_failed"
NO_ANSWER = "no_answer"
NOT_PROTOCOL = "not_protocol"
WRONG_DEVICE = "wrong_device"
DEVICE_ERROR = "device_error"
BAD_REPLY = "bad_reply"
NOT_TRIED = "not_tried"

_SHORT = {
    NO_PORT: "no such port",
    PERMISSION: "permission denied",
    PORT_BUSY: "port in use",
    CANNOT_CONNECT: "nothing listening",
    BAD_URL: "not a port name",
    NOT_A_PORT: "not a serial port",
    PORT_FAILED: "port failed",
    NO_ANSWER: "no answer",
    NOT_PROTOCOL: "answers in another protocol",
    WRONG_DEVICE: "wrong device",
    DEVICE_ERROR: "error reply",
    BAD_REPLY: "reply makes no sense",
    NOT_TRIED: "not tried: ID failed",
}


@dataclass
class Check:
    """One request of the probe and what came of it."""

    device: str  # RADIOMETER or TRACKER
    command: str  # as sent, without id and checksum: "ID", "BURST 10", "HK", "STATUS"
    ok: bool
    round_trip_s: float | None  # time.monotonic() around the driver call [s]
    summary: str  # one short line for the table
    reading: dict[str, Any] | None = None  # what the device reported, for --json
    problem: str | None = None  # one of the problem kinds above
    message: str | None = None  # what is wrong and what to do, one line

    def to_dict(self) -> dict[str, Any]:
        out = dataclasses.asdict(self)
        if self.round_trip_s is not None:
            out["round_trip_s"] = round(self.round_trip_s, 6)
        return out


@dataclass
class ProbeReport:
    radiometer_url: str
    tracker_url: str
    checks: list[Check]
    notes: list[str]  # things that answered but deserve a look

    @property
    def ok(self) -> bool:
        return all(c.ok for c in self.checks)

    @property
    def problems(self) -> list[str]:
        return [c.message for c in self.checks if c.message]

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "tracker_moved": False,
            "radiometer": {"url": self.radiometer_url},
            "tracker": {"url": self.tracker_url},
            "checks": [c.to_dict() for c in self.checks],
            "problems": self.problems,
            "notes": self.notes,
        }


# --------------------------------------------------------------------------- failures

def _config_key(device: str) -> str:
    return f"instrument.{device}.port"


def _errno_of(exc: BaseException) -> int | None:
    """The first errno found along the exception's cause chain."""
    seen: BaseException | None = exc
    for _ in range(8):
        if seen is None:
            return None
        code = getattr(seen, "errno", None)
        if isinstance(code, int):
            return code
        seen = seen.__cause__ or seen.__context__
    return None


def _serial_group(url: str) -> str:
    """The group that owns the device node (what to join), 'dialout' if unknown."""
    with contextlib.suppress(OSError, KeyError):
        return grp.getgrgid(os.stat(url).st_gid).gr_name
    return "dialout"


def _by_hand(port: Port) -> str:
    speed = f" {port.baudrate}" if is_device_path(port.url) else ""
    return f"python -m serial.tools.miniterm {port.url}{speed} --eol CRLF --echo"


def _no_port(device: str, url: str) -> str:
    return (f"{device}: no such port {url}: is it plugged in and powered? List the ports "
            f"with 'python -m serial.tools.list_ports -v' and set {_config_key(device)} in "
            f"the configuration (or give --{device}-port)")


def _port_problem(device: str, port: Port, exc: PortUnavailable) -> tuple[str, str]:
    code = _errno_of(exc)
    url = port.url
    key = _config_key(device)
    if code in (errno.EACCES, errno.EPERM):
        group = _serial_group(url)
        return PERMISSION, (
            f"{device}: permission denied on {url}: add the user to group '{group}' "
            f"('sudo usermod -aG {group} $USER', then log in again) or fix the device's "
            "udev rule")
    if code in (errno.ENOENT, errno.ENODEV, errno.ENXIO):
        return NO_PORT, _no_port(device, url)
    if code in (errno.EBUSY, errno.EAGAIN, errno.EWOULDBLOCK) or "in use" in str(exc):
        return PORT_BUSY, (
            f"{device}: {url} is in use by another program: stop the service first "
            "('sudo systemctl stop heliotroped') or close the terminal program that holds it")
    if code in (errno.ENOTTY, errno.EISDIR, errno.ENOTDIR) or "ioctl" in str(exc):
        return NOT_A_PORT, (
            f"{device}: {url} is not a serial port: list the ports with "
            f"'python -m serial.tools.list_ports -v' and set {key} in the configuration")
    if exc.permanent:
        return BAD_URL, (
            f"{device}: '{url}' is not a port: give a device path such as "
            f"/dev/serial/by-id/... or a URL such as socket://127.0.0.1:PORT in {key}")
    if not is_device_path(url):
        return CANNOT_CONNECT, (
            f"{device}: nothing answers the connection to {url}: if this is the simulator, "
            "start it ('heliotrope-sim --scenario pico-sereno-clear --port tcp:PORT') and "
            "check the port number")
    return PORT_FAILED, f"{exc}; check the cable and the adapter"


def explain(device: str, port: Port, command: str, exc: BaseException,
            counters: LinkCounters) -> tuple[str, str]:
    """(problem kind, one line saying what is wrong and what to do) for a failed call."""
    url = port.url
    if isinstance(exc, PortUnavailable):
        return _port_problem(device, port, exc)
    if isinstance(exc, p.ErrorReply):
        if exc.code in (p.Code.UNKNOWN, p.Code.ARGUMENT):
            action = ("the firmware does not speak this version of the protocol "
                      "(drivers/PROTOCOL.md)")
        elif exc.code == p.Code.BUSY:
            action = "the device stayed busy; probe again in a minute"
        elif exc.code == p.Code.NOT_READY:
            action = "the device is not ready; wait for it to initialise and probe again"
        else:
            action = "a person should look at the instrument"
        return DEVICE_ERROR, (f"{device}: {command} answered error {exc.code} ({exc.name}): "
                              f"{exc.text}; {action}")
    if isinstance(exc, p.BadPayload):
        return BAD_REPLY, (f"{device}: the reply to {command} makes no sense ({exc}): "
                           "is the firmware for this protocol (drivers/PROTOCOL.md)?")
    if isinstance(exc, DeviceError):
        # The drivers' identify raises a plain DeviceError only for the other kind of
        # device on the port; its message names the kind it found.
        found = re.search(r"\bis an? (\w+)", str(exc))
        other = f"the {found.group(1)}" if found else "another device"
        return WRONG_DEVICE, (
            f"{device}: {url} is {other}, not the {device}: the ports are swapped or "
            f"mislabelled; check {_config_key(device)} (the radiometer answers ID with "
            "RAD, the tracker with TRK)")
    if isinstance(exc, LinkError):
        if counters.garbage or counters.crc_errors:
            unreadable = counters.garbage + counters.crc_errors
            return NOT_PROTOCOL, (
                f"{device}: {url} answers, but not in the heliotrope protocol "
                f"({unreadable} unreadable line(s)): check the line speed ({port.baudrate} "
                f"bit/s configured) and that this is the {device}'s port")
        if isinstance(exc.__cause__, OSError) and not isinstance(exc.__cause__, LinkError):
            return PORT_FAILED, (f"{device}: the port {url} failed during {command} "
                                 f"({exc.__cause__}): check the cable and the adapter")
        tries = port.retries + 1
        return NO_ANSWER, (
            f"{device}: no answer to {command} on {url} ({tries} tries of {port.timeout_s:g} "
            f"s): is the {device} powered and its cable on this port? Try it by hand: "
            f"{_by_hand(port)}")
    if isinstance(exc, ValueError | ArithmeticError):
        return BAD_REPLY, (f"{device}: the reply to {command} makes no sense "
                           f"({type(exc).__name__}: {str(exc)[:120]}): is the firmware for "
                           "this protocol (drivers/PROTOCOL.md)?")
    return BAD_REPLY, f"{device}: {command} failed: {exc}"


# --------------------------------------------------------------------------- probe

def _transport(device: str, port: Port, factory: Callable[..., Any] | None) -> Transport:
    kwargs: dict[str, Any] = {"name": device}
    if factory is not None:
        kwargs["serial_factory"] = factory
    return Transport(port.url, port.baudrate, port.timeout_s, port.retries, **kwargs)


def explain_family(device: str, port: Port, command: str, exc: BaseException,
                   counters: LinkCounters) -> tuple[str, str]:
    """:func:`explain` for the configured families (Modbus...): what the driver saw."""
    url = port.url
    key = f"instrument.{device}.options"
    if isinstance(exc, DeviceError):
        return DEVICE_ERROR, f"{device}: {command}: {exc}"
    if isinstance(exc, LinkError):
        if counters.exchanges == 0 and is_device_path(url) and not os.path.exists(url):
            return NO_PORT, _no_port(device, url)
        if counters.garbage or counters.crc_errors:
            unreadable = counters.garbage + counters.crc_errors
            return NOT_PROTOCOL, (
                f"{device}: {url} answers, but {unreadable} repl(ies) failed their check: "
                f"check the line speed ({port.baudrate} bit/s configured), parity and stop "
                f"bits ({key}.serial) and the bus wiring")
        if counters.exchanges == 0 and "cannot open" in str(exc):
            return CANNOT_CONNECT, f"{exc}"
        tries = port.retries + 1
        return NO_ANSWER, (
            f"{device}: no answer to {command} on {url} ({tries} tries of "
            f"{port.timeout_s:g} s): is the {device} powered, is {key}.unit_id its "
            "address (or are the radiometer and tracker ports swapped?), and are the "
            "bus wires (A/B) the right way round?")
    if isinstance(exc, ValueError | ArithmeticError):
        return BAD_REPLY, (f"{device}: the reply to {command} makes no sense "
                           f"({type(exc).__name__}: {str(exc)[:120]}): check the data "
                           f"types and scales in {key}")
    return BAD_REPLY, f"{device}: {command} failed: {exc}"


def _call(device: str, port: Port, transport: Any, command: str,
          call: Callable[[], Any], describe: Callable[[Any], tuple[str, dict[str, Any]]],
          checks: list[Check], explain: Callable[..., tuple[str, str]] = explain) -> Any:
    """Run one driver call, time it, and append its Check; the result or None.

    ``transport`` is what the driver talks through: a Transport (opened apart from the
    call) or anything with ``counters``."""
    t0 = time.monotonic()
    try:
        if isinstance(transport, Transport) and not transport.is_open:
            # Open apart from the exchange so a missing port fails at once, not after
            # the retries and their back-off.
            transport.open()
            t0 = time.monotonic()
        result = call()
        rtt = time.monotonic() - t0
        summary, reading = describe(result)
    except (LinkError, DeviceError, ValueError, ArithmeticError) as exc:
        # ValueError and OverflowError: a reply with a valid checksum and a hostile
        # field that the codec let through; still a device that did not answer sanely.
        rtt = time.monotonic() - t0
        kind, message = explain(device, port, command, exc, transport.counters)
        tried = not isinstance(exc, PortUnavailable)
        checks.append(Check(device, command, False, rtt if tried else None, _SHORT[kind],
                            problem=kind, message=message))
        return None
    checks.append(Check(device, command, True, rtt, summary, reading))
    return result


def _not_tried(device: str, command: str) -> Check:
    return Check(device, command, False, None, _SHORT[NOT_TRIED], problem=NOT_TRIED)


def _describe_identity(channels: Callable[[], int | None]):
    def describe(identity: Any) -> tuple[str, dict[str, Any]]:
        n = channels()
        reading = {"model": identity.model, "serial": identity.serial,
                   "firmware": identity.firmware}
        text = f"{identity.model} {identity.serial} firmware {identity.firmware}"
        if n is not None:
            reading["channels"] = n
            text += f", {n} ch"
        return text, reading
    return describe


def _describe_burst(burst: Any) -> tuple[str, dict[str, Any]]:
    values = [v for row in burst.samples for v in row]
    n_channels = len(burst.saturated)
    means = [math.fsum(row[c] for row in burst.samples) / len(burst.samples)
             for c in range(n_channels)]
    saturated = [i for i, s in enumerate(burst.saturated) if s]
    text = (f"{len(burst.samples)} x {n_channels} in {burst.duration_s:g} s, "
            f"{min(values):.4g}-{max(values):.4g} V")
    if saturated:
        text += ", saturated ch " + " ".join(str(i + 1) for i in saturated)
    reading = {"samples": len(burst.samples), "channels": n_channels,
               "duration_s": burst.duration_s, "mean_v": means,
               "min_v": min(values), "max_v": max(values),
               "saturated": list(burst.saturated)}
    return text, reading


def _describe_housekeeping(hk: Any) -> tuple[str, dict[str, Any]]:
    pressure = "no barometer" if hk.pressure_hpa is None else f"{hk.pressure_hpa:.1f} hPa"
    text = (f"detector {hk.detector_temp_c:.1f} C, case {hk.case_temp_c:.1f} C, "
            f"air {hk.ambient_temp_c:.1f} C, {hk.supply_v:.2f} V, "
            f"{hk.humidity_pct:.0f} % RH, {pressure}")
    return text, dataclasses.asdict(hk)


def _describe_tracker(state: Any) -> tuple[str, dict[str, Any]]:
    text = f"{state.mode}, az {state.azimuth_deg:.4f} el {state.elevation_deg:.4f}, "
    text += f"locked, error {state.error_deg:.4f} deg" if state.locked else "unlocked"
    return text, dataclasses.asdict(state)


# A burst with every channel below this reads like the dark signal, not the sun (common
# practice, no source: dark signals are a few mV, a sunlit channel hundreds of mV or more).
DARK_LEVEL_V = 0.02


def sun_hints(burst: Any, state: Any) -> list[str]:
    """What a dark-level burst and an unlocked tracker most likely mean (either may be
    None when its device did not answer)."""
    hints = []
    unlocked = state is not None and not state.locked
    if burst is not None and burst.samples and all(
            math.fsum(row[c] for row in burst.samples) / len(burst.samples) < DARK_LEVEL_V
            for c in range(len(burst.saturated))):
        hints.append(f"radiometer: the burst is at dark level (every channel below "
                     f"{DARK_LEVEL_V * 1000:g} mV): the sun is down at the site, or the optics "
                     "are capped" + (", or the tracker is not on the sun (it reports no "
                                    "lock)" if unlocked else ""))
    if unlocked and state.mode == "tracking":
        where = (" It points at the zenith, where following from the park position leaves "
                 "it." if state.elevation_deg > 89.5 else "")
        hints.append("tracker: following the sun but not locked: the sun sensor captures "
                     "the sun only within its capture range, so point the tracker near the "
                     "sun first (GOTO its azimuth and elevation, as the service does before "
                     f"every target), or the sun is down or behind cloud.{where}")
    return hints


def probe_station(radiometer: Port, tracker: Port, *, burst_samples: int = 5,
                  channel_names: Sequence[str] = (),
                  serial_factory: Callable[..., Any] | None = None) -> ProbeReport:
    """Ask both devices who they are and read them once; never move anything.

    Sends ``ID``, ``BURST <burst_samples>`` and ``HK`` to the radiometer and ``ID`` and
    ``STATUS`` to the tracker, through the same drivers the service uses.

    Parameters
    ----------
    radiometer, tracker
        The ports as configured (URL, line speed [bit/s], timeout [s], retries).
    burst_samples
        Samples in the one burst, 1 to the protocol's maximum.
    channel_names
        The configured channels, to compare with the count the radiometer reports.
    serial_factory
        Opens a port (``serial.serial_for_url`` unless a test substitutes a fake).
    """
    if not 1 <= burst_samples <= p.MAX_SAMPLES:
        raise ValueError(f"burst of {burst_samples} samples: the protocol allows "
                         f"1-{p.MAX_SAMPLES}")
    if radiometer.driver != "reference" or tracker.driver != "reference":
        return probe_family(radiometer, tracker, burst_samples=burst_samples,
                            channel_names=channel_names)
    checks: list[Check] = []
    notes: list[str] = []

    rad = SerialRadiometer(_transport(RADIOMETER, radiometer, serial_factory))
    trk = SerialTracker(_transport(TRACKER, tracker, serial_factory))
    burst = state = None
    try:
        identity = _call(RADIOMETER, radiometer, rad.transport, p.ID, rad.identify,
                         _describe_identity(rad.channel_count), checks)
        burst_cmd = f"{p.BURST} {burst_samples}"
        if identity is None:
            checks += [_not_tried(RADIOMETER, burst_cmd), _not_tried(RADIOMETER, p.HK)]
        else:
            n = rad.channel_count()
            if channel_names and n != len(channel_names):
                notes.append(f"radiometer reports {n} channels, the configuration lists "
                             f"{len(channel_names)} ({' '.join(channel_names)}): "
                             "fix instrument.channels")
            burst = _call(RADIOMETER, radiometer, rad.transport, burst_cmd,
                          lambda: rad.read_burst(burst_samples), _describe_burst, checks)
            note = _saturation_note(burst, n, channel_names)
            if note:
                notes.append(note)
            _call(RADIOMETER, radiometer, rad.transport, p.HK, rad.read_housekeeping,
                  _describe_housekeeping, checks)

        identity = _call(TRACKER, tracker, trk.transport, p.ID, trk.identify,
                         _describe_identity(lambda: None), checks)
        if identity is None:
            checks.append(_not_tried(TRACKER, p.STATUS))
        else:
            state = _call(TRACKER, tracker, trk.transport, p.STATUS, trk.state,
                          _describe_tracker, checks)
            if state is not None and state.mode == "fault":
                notes.append("tracker reports FAULT: a person should look at the mount "
                             "before the service runs")
        notes += sun_hints(burst, state)
    finally:
        rad.close()
        trk.close()
    return ProbeReport(radiometer.url, tracker.url, checks, notes)


def _saturation_note(burst: Any, n: int, channel_names: Sequence[str]) -> str | None:
    if burst is None or not any(burst.saturated):
        return None
    names = list(channel_names) if len(channel_names) == n else [str(i + 1) for i in range(n)]
    hot = " ".join(nm for nm, s in zip(names, burst.saturated, strict=True) if s)
    return (f"radiometer: channel(s) {hot} reached full scale in the burst: check the gain "
            "and filters before a sunny session")


def probe_family(radiometer: Port, tracker: Port, *, burst_samples: int = 5,
                 channel_names: Sequence[str] = ()) -> ProbeReport:
    """The probe through the Radiometer and Tracker interfaces of any driver family:
    ``identify``, ``read_burst``, ``read_housekeeping``, ``identify`` and ``state``.
    Never ``goto``, ``follow_sun``, ``park``, ``set_clock`` or ``reset``."""
    from drivers import registry

    checks: list[Check] = []
    notes: list[str] = []
    rad = registry.open_radiometer(radiometer.driver, radiometer.url, radiometer.baudrate,
                                   radiometer.timeout_s, radiometer.retries,
                                   radiometer.options)
    trk = registry.open_tracker(tracker.driver, tracker.url, tracker.baudrate,
                                tracker.timeout_s, tracker.retries, tracker.options)

    class _Counted:  # what _call reads of a link: the driver's own counters
        def __init__(self, device: Any) -> None:
            self.device = device

        @property
        def counters(self) -> LinkCounters:
            known = {f.name for f in dataclasses.fields(LinkCounters)}
            return LinkCounters(**{k: v for k, v in self.device.link_counters().items()
                                   if k in known})

    def call(device: str, port: Port, dev: Any, command: str, fn: Callable[[], Any],
             describe: Callable[[Any], tuple[str, dict[str, Any]]]) -> Any:
        return _call(device, port, _Counted(dev), command, fn, describe, checks,
                     explain=explain_family)

    burst = state = None
    try:
        identity = call(RADIOMETER, radiometer, rad, "identify", rad.identify,
                        _describe_identity(rad.channel_count))
        burst_cmd = f"burst {burst_samples}"
        if identity is None:
            checks += [_not_tried(RADIOMETER, burst_cmd),
                       _not_tried(RADIOMETER, "housekeeping")]
        else:
            n = rad.channel_count()
            if channel_names and n != len(channel_names):
                notes.append(f"radiometer has {n} channels in its map, the configuration "
                             f"lists {len(channel_names)} ({' '.join(channel_names)}): "
                             "fix instrument.channels or the register map")
            burst = call(RADIOMETER, radiometer, rad, burst_cmd,
                         lambda: rad.read_burst(burst_samples), _describe_burst)
            note = _saturation_note(burst, n, channel_names)
            if note:
                notes.append(note)
            call(RADIOMETER, radiometer, rad, "housekeeping", rad.read_housekeeping,
                 _describe_housekeeping)
        identity = call(TRACKER, tracker, trk, "identify", trk.identify,
                        _describe_identity(lambda: None))
        if identity is None:
            checks.append(_not_tried(TRACKER, "state"))
        else:
            state = call(TRACKER, tracker, trk, "state", trk.state, _describe_tracker)
            if state is not None and state.mode == "fault":
                notes.append("tracker reports FAULT: a person should look at the mount "
                             "before the service runs")
        notes += sun_hints(burst, state)
    finally:
        rad.close()
        trk.close()
    return ProbeReport(radiometer.url, tracker.url, checks, notes)


# --------------------------------------------------------------------------- output

def _wrap(text: str, width: int, indent: str = "") -> list[str]:
    return textwrap.wrap(text, width, subsequent_indent=indent, break_on_hyphens=False,
                         break_long_words=True) or [""]


def format_report(report: ProbeReport, width: int = MAX_COLUMNS) -> str:
    """The probe as an aligned table for an 80-column terminal, then what to do."""
    head = [
        "heliotrope probe: reads only; the tracker is not moved",
        *_wrap(f"radiometer  {report.radiometer_url}", width, " " * 12),
        *_wrap(f"tracker     {report.tracker_url}", width, " " * 12),
        "",
    ]
    headers = ["device", "command", "result", "rtt [ms]", "reading"]
    cells = [[c.device, c.command, "ok" if c.ok else "FAIL",
              "-" if c.round_trip_s is None else f"{c.round_trip_s * 1000:.1f}"]
             for c in report.checks]
    fixed = [max(len(h), *(len(r[i]) for r in cells)) for i, h in enumerate(headers[:-1])]
    reading_width = max(20, width - sum(fixed) - 2 * len(fixed))
    rows: list[list[str]] = []
    for check, row in zip(report.checks, cells, strict=True):
        lines = _wrap(check.summary, reading_width)
        rows.append(row + [lines[0]])
        rows += [["", "", "", "", more] for more in lines[1:]]
    out = head + [table(headers, rows, [False, False, False, True, False])]
    failed = [c for c in report.checks if not c.ok]
    if report.problems:
        out += ["", "what to do:"]
        for message in report.problems:
            out += _wrap("- " + message, width, "  ")
    if report.notes:
        out += ["", "notes:"]
        for note in report.notes:
            out += _wrap("- " + note, width, "  ")
    out.append("")
    if failed:
        out.append(f"{len(failed)} of {len(report.checks)} checks failed")
    else:
        out.append(f"all {len(report.checks)} checks answered")
    return "\n".join(out)


# --------------------------------------------------------------------------- command

def run(args: argparse.Namespace, config: Any) -> int:
    """Probe the configured (or overridden) ports, print the report, return the exit code."""
    rad_port, trk_port = config.radiometer, config.tracker
    if args.radiometer_port:
        rad_port = dataclasses.replace(rad_port, url=args.radiometer_port)
    if args.tracker_port:
        trk_port = dataclasses.replace(trk_port, url=args.tracker_port)
    report = probe_station(rad_port, trk_port,
                           burst_samples=config.acquisition.burst_samples,
                           channel_names=[ch.name for ch in config.channels])
    print(dumps(report.to_dict()) if args.json else format_report(report))
    return EX_OK if report.ok else EX_UNAVAILABLE
