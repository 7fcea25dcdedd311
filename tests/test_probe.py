"""``heliotrope probe`` against the simulator as a process and against broken links.

The simulator runs as ``python -m sim_instrument --port tcp:0 --stdin-lifeline``, the
way a technician runs ``heliotrope-sim``. The faulty links (silent, noisy, erring,
held by another program) are small local stand-ins built on the protocol codec.
"""

from __future__ import annotations

import contextlib
import errno
import grp
import json
import os
import socket
import threading
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
import serial
import yaml

from daemon.commands import cli
from daemon.commands.probe import (
    CANNOT_CONNECT,
    DEVICE_ERROR,
    NO_ANSWER,
    NO_PORT,
    NOT_A_PORT,
    NOT_PROTOCOL,
    NOT_TRIED,
    PERMISSION,
    PORT_BUSY,
    WRONG_DEVICE,
    format_report,
    probe_station,
)
from daemon.config.settings import Port, load_config
from daemon.station.bench import simulator
from drivers import protocol as p
from drivers.interfaces import Burst, Housekeeping, Identity

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "config" / "pico-sereno.yaml"
SCENARIO = "pico-sereno-clear"
SCENARIO_FILE = ROOT / "sim_instrument" / "scenarios" / f"{SCENARIO}.yaml"
MISSING = "/dev/does-not-exist"


@pytest.fixture(scope="module")
def sim() -> Iterator[dict[str, str]]:
    with simulator(SCENARIO, seed=3, port="tcp:0") as ends:
        yield {"radiometer": ends.radiometer, "tracker": ends.tracker}


@pytest.fixture(scope="module")
def scenario() -> dict:
    return yaml.safe_load(SCENARIO_FILE.read_text())


@pytest.fixture(scope="module")
def config():
    return load_config(CONFIG)


def _probe_cli(capsys, radiometer: str, tracker: str, json_out: bool = True):
    argv = ["probe", "--config", str(CONFIG), "--radiometer-port", radiometer,
            "--tracker-port", tracker]
    code = cli.main(argv + (["--json"] if json_out else []))
    out = capsys.readouterr().out
    return code, (json.loads(out) if json_out else out)


def _by_command(report: dict, device: str) -> dict[str, dict]:
    return {c["command"].split()[0]: c for c in report["checks"] if c["device"] == device}


def _port(url: str, timeout_s: float = 0.2, retries: int = 1) -> Port:
    return Port(url=url, baudrate=19200, timeout_s=timeout_s, retries=retries)


def _free_tcp_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextlib.contextmanager
def line_device(answer: Callable[[bytes], bytes | None]) -> Iterator[str]:
    """A loopback TCP 'device' that answers each request line with ``answer(line)``."""
    server = socket.create_server(("127.0.0.1", 0))
    server.settimeout(0.1)
    stop = threading.Event()

    def serve() -> None:
        while not stop.is_set():
            try:
                conn, _ = server.accept()
            except OSError:
                continue
            with conn:
                conn.settimeout(0.1)
                buf = b""
                while not stop.is_set():
                    try:
                        data = conn.recv(4096)
                    except TimeoutError:
                        continue
                    except OSError:
                        break
                    if not data:
                        break
                    buf += data
                    while b"\n" in buf:
                        line, buf = buf.split(b"\n", 1)
                        reply = answer(line.rstrip(b"\r"))
                        if reply:
                            conn.sendall(reply)

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    try:
        yield f"socket://127.0.0.1:{server.getsockname()[1]}"
    finally:
        stop.set()
        thread.join(timeout=5)
        server.close()


def codec_device(handlers: dict[str, Callable[[p.Request], list[str]]]) -> Callable:
    """An ``answer`` function speaking the real protocol; a handler may raise BadRequest."""
    def answer(line: bytes) -> bytes:
        req = p.decode_request(line)
        try:
            if req.cmd not in handlers:
                raise p.BadRequest(p.Code.UNKNOWN, f"unknown command {req.cmd}", req.rid)
            return p.encode_reply(req.rid, req.cmd, handlers[req.cmd](req))
        except p.BadRequest as exc:
            return p.encode_error(req.rid, exc.code, exc.text)
    return answer


def _radiometer_handlers(channels: int = 6, saturated_channel: int | None = None):
    ident = Identity("TEST-RAD", "T-1", "0.1")

    def burst(req: p.Request) -> list[str]:
        n = p.parse_samples_arg(req)
        row = tuple(5.0 if c == saturated_channel else 1.0 + c for c in range(channels))
        flags = tuple(c == saturated_channel for c in range(channels))
        return p.burst_fields(Burst(tuple(row for _ in range(n)), 0.2 * (n - 1), flags))

    return {
        p.ID: lambda req: p.identity_fields(p.KIND_RADIOMETER, ident, channels),
        p.BURST: burst,
        p.HK: lambda req: p.housekeeping_fields(
            Housekeeping(25.0, 20.0, 10.0, 12.5, 30.0, None)),
    }


# ---------------------------------------------------------------------- the simulator

def test_probe_identifies_and_reads_both_simulated_devices(capsys, sim, scenario, config):
    code, report = _probe_cli(capsys, sim["radiometer"], sim["tracker"])
    assert code == 0
    assert report["ok"] is True and report["problems"] == []
    assert report["tracker_moved"] is False
    assert [(c["device"], c["command"]) for c in report["checks"]] == [
        ("radiometer", "ID"), ("radiometer", f"BURST {config.acquisition.burst_samples}"),
        ("radiometer", "HK"), ("tracker", "ID"), ("tracker", "STATUS")]
    for check in report["checks"]:
        assert check["ok"] is True and check["problem"] is None
        assert isinstance(check["round_trip_s"], float) and check["round_trip_s"] >= 0.0

    rad, trk = _by_command(report, "radiometer"), _by_command(report, "tracker")
    inst = scenario["instrument"]
    assert rad["ID"]["reading"] == {"model": inst["model"], "serial": inst["serial"],
                                    "firmware": str(inst["firmware"]),
                                    "channels": len(inst["channels"])}
    burst = rad["BURST"]["reading"]
    assert burst["samples"] == config.acquisition.burst_samples
    assert burst["channels"] == len(config.channels)
    # The simulator clips samples to [0, full scale] (sim_instrument/model.py).
    assert 0.0 <= burst["min_v"] <= burst["max_v"] <= inst["full_scale_v"]
    assert len(burst["mean_v"]) == len(config.channels)
    assert rad["HK"]["reading"]["pressure_hpa"] == pytest.approx(
        scenario["site"]["pressure_hpa"], abs=5.0)
    tracker = scenario["tracker"]
    assert trk["ID"]["reading"] == {"model": tracker["model"], "serial": tracker["serial"],
                                    "firmware": str(tracker["firmware"])}
    # The simulated tracker starts parked, and the probe leaves it there.
    assert trk["STATUS"]["reading"]["mode"] == "parked"
    assert trk["STATUS"]["reading"]["azimuth_deg"] == pytest.approx(
        tracker["park_azimuth_deg"], abs=1e-3)
    assert trk["STATUS"]["reading"]["elevation_deg"] == pytest.approx(
        tracker["park_elevation_deg"], abs=1e-3)


def test_probe_sends_only_reading_commands(sim):
    sent: dict[str, list[str]] = {"radiometer": [], "tracker": []}

    class Recording:
        def __init__(self, url: str, **kwargs):
            self._port = serial.serial_for_url(url, **kwargs)
            self._who = "radiometer" if url == sim["radiometer"] else "tracker"

        def write(self, data: bytes) -> int:
            sent[self._who].append(p.decode_request(data).cmd)
            return self._port.write(data)

        def __getattr__(self, name):
            return getattr(self._port, name)

        def __setattr__(self, name, value):
            if name.startswith("_"):
                object.__setattr__(self, name, value)
            else:
                setattr(self._port, name, value)

    report = probe_station(_port(sim["radiometer"], timeout_s=2.0),
                           _port(sim["tracker"], timeout_s=2.0),
                           burst_samples=3, serial_factory=Recording)
    assert report.ok
    assert sent == {"radiometer": ["ID", "BURST", "HK"], "tracker": ["ID", "STATUS"]}
    forbidden = {p.GOTO, p.SUN, p.PARK, p.CLK, p.RST}
    assert not forbidden & set(sent["radiometer"] + sent["tracker"])


def test_human_output_is_a_table_within_80_columns(capsys, sim):
    code, text = _probe_cli(capsys, sim["radiometer"], sim["tracker"], json_out=False)
    assert code == 0
    lines = text.splitlines()
    assert max(len(line) for line in lines) <= 80
    assert "reads only; the tracker is not moved" in lines[0]
    header = next(i for i, line in enumerate(lines) if line.startswith("device"))
    assert lines[header].split() == ["device", "command", "result", "rtt", "[ms]", "reading"]
    # The reading column starts at the same place on every row: the table is aligned.
    column = lines[header].index("reading")
    for line in lines[header + 1:]:
        if not line:
            break
        assert line[column - 2:column] == "  " and line[column] != " "
    assert lines[-1] == "all 5 checks answered"


def test_help_says_the_tracker_is_never_moved(capsys):
    with pytest.raises(SystemExit) as stop:
        cli.main(["probe", "--help"])
    assert stop.value.code == 0
    assert "never moves the tracker" in " ".join(capsys.readouterr().out.split())


# ---------------------------------------------------------------------- broken links

def test_missing_port_is_named_with_what_to_do(capsys, sim):
    code, report = _probe_cli(capsys, MISSING, sim["tracker"])
    assert code == 69
    rad = _by_command(report, "radiometer")
    assert rad["ID"]["problem"] == NO_PORT
    assert rad["ID"]["round_trip_s"] is None
    message = rad["ID"]["message"]
    assert MISSING in message and "list_ports" in message
    assert "instrument.radiometer.port" in message
    assert rad["BURST"]["problem"] == NOT_TRIED and rad["HK"]["problem"] == NOT_TRIED
    # The tracker is probed all the same.
    assert all(c["ok"] for c in _by_command(report, "tracker").values())
    assert report["problems"] == [message]


def test_swapped_ports_are_called_the_wrong_device(capsys, sim):
    code, report = _probe_cli(capsys, sim["tracker"], sim["radiometer"])
    assert code == 69
    rad, trk = _by_command(report, "radiometer"), _by_command(report, "tracker")
    assert rad["ID"]["problem"] == WRONG_DEVICE and trk["ID"]["problem"] == WRONG_DEVICE
    assert "is the tracker, not the radiometer" in rad["ID"]["message"]
    assert "is the radiometer, not the tracker" in trk["ID"]["message"]
    assert "swapped" in rad["ID"]["message"]
    assert rad["BURST"]["problem"] == NOT_TRIED and trk["STATUS"]["problem"] == NOT_TRIED


def test_a_socket_nobody_listens_on_points_at_the_simulator(capsys, sim):
    url = f"socket://127.0.0.1:{_free_tcp_port()}"
    code, report = _probe_cli(capsys, sim["radiometer"], url)
    assert code == 69
    trk = _by_command(report, "tracker")
    assert trk["ID"]["problem"] == CANNOT_CONNECT
    assert url in trk["ID"]["message"] and "heliotrope-sim" in trk["ID"]["message"]
    assert all(c["ok"] for c in _by_command(report, "radiometer").values())


def test_failures_keep_the_table_within_80_columns(capsys):
    long_path = "/dev/serial/by-id/usb-FTDI_FT232R_USB_UART_A10KZ3QX-if00-port0-" + "x" * 30
    code, text = _probe_cli(capsys, long_path, MISSING, json_out=False)
    assert code == 69
    assert max(len(line) for line in text.splitlines()) <= 80
    assert text.splitlines()[-1] == "5 of 5 checks failed"
    assert "what to do:" in text


def test_a_file_that_is_not_a_serial_port_is_named():
    report = probe_station(_port("/dev/null"), _port(MISSING))
    first = report.checks[0]
    assert first.problem == NOT_A_PORT
    assert "/dev/null is not a serial port" in first.message
    assert report.checks[3].problem == NO_PORT


def test_permission_denied_names_the_group_to_join(tmp_path):
    node = tmp_path / "ttyUSB9"
    node.write_text("")
    group = grp.getgrgid(os.stat(node).st_gid).gr_name

    def refuse(url: str, **kwargs):
        raise serial.SerialException(errno.EACCES, f"could not open port {url}: denied")

    report = probe_station(_port(str(node)), _port(MISSING), serial_factory=refuse)
    rad = [c for c in report.checks if c.device == "radiometer"]
    assert rad[0].problem == PERMISSION
    assert f"usermod -aG {group}" in rad[0].message and str(node) in rad[0].message
    assert [c.problem for c in rad[1:]] == [NOT_TRIED, NOT_TRIED]
    assert not report.ok


def test_a_port_held_by_another_program_says_stop_the_service():
    master, slave = os.openpty()
    path = os.ttyname(slave)
    try:
        with serial.Serial(path, exclusive=True):
            report = probe_station(_port(path), _port(MISSING))
    finally:
        os.close(master)
        os.close(slave)
    first = report.checks[0]
    assert first.problem == PORT_BUSY
    assert "systemctl stop heliotroped" in first.message


def test_a_silent_device_is_no_answer_with_the_terminal_command():
    with line_device(lambda line: None) as url:
        report = probe_station(_port(url, timeout_s=0.2, retries=1), _port(MISSING))
    first = report.checks[0]
    assert first.problem == NO_ANSWER
    assert first.round_trip_s is not None
    assert "2 tries" in first.message
    assert f"python -m serial.tools.miniterm {url} --eol CRLF --echo" in first.message


def test_a_device_in_another_protocol_points_at_the_line_speed():
    with line_device(lambda line: b"$GPGGA,123519,4807.038,N*47\r\n") as url:
        report = probe_station(_port(url, timeout_s=0.2, retries=0), _port(MISSING))
    first = report.checks[0]
    assert first.problem == NOT_PROTOCOL
    assert "line speed" in first.message and "19200" in first.message


def test_an_error_reply_is_explained_and_the_other_reads_still_run():
    handlers = _radiometer_handlers()

    def stuck(req: p.Request) -> list[str]:
        raise p.BadRequest(p.Code.HARDWARE, "shutter stuck", req.rid)

    handlers[p.BURST] = stuck
    with line_device(codec_device(handlers)) as url:
        report = probe_station(_port(url), _port(MISSING), burst_samples=4)
    rad = {c.command: c for c in report.checks if c.device == "radiometer"}
    assert rad["ID"].ok and rad["HK"].ok
    burst = rad["BURST 4"]
    assert burst.problem == DEVICE_ERROR
    assert "error 30 (HARDWARE): shutter stuck" in burst.message
    assert "a person should look" in burst.message
    assert "no barometer" in rad["HK"].summary


def test_channel_count_and_saturation_are_noted_without_failing():
    handlers = _radiometer_handlers(channels=4, saturated_channel=2)
    with line_device(codec_device(handlers)) as rad_url, \
            line_device(codec_device({
                p.ID: lambda req: p.identity_fields(p.KIND_TRACKER,
                                                    Identity("TEST-TRK", "T-2", "0.1")),
                p.STATUS: lambda req: ["FAULT", "10.0000", "20.0000", "0", "0.0000"],
            })) as trk_url:
        report = probe_station(_port(rad_url), _port(trk_url), burst_samples=2,
                               channel_names=["380", "440", "500", "675", "870", "1020"])
    assert report.ok, report.problems
    burst = next(c for c in report.checks if c.command == "BURST 2")
    assert burst.reading["saturated"] == [False, False, True, False]
    assert "saturated ch 3" in burst.summary
    text = "\n".join(report.notes)
    assert "reports 4 channels, the configuration lists 6" in text
    assert "channel(s) 3 reached full scale" in text
    assert "tracker reports FAULT" in text
    assert "notes:" in format_report(report)


def test_bad_configuration_exits_78(capsys, tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text(CONFIG.read_text().replace("latitude_deg: 19.95", "latitude_deg: 95"))
    assert cli.main(["probe", "--config", str(bad)]) == 78
    assert "site.latitude_deg" in capsys.readouterr().err
