"""``heliotrope refit`` against hostile input: what is not a file, what no reading is.

Every case ends in one line on standard error and exit 65 (bad data) or 66 (no usable
input file), sysexits(3) (FreeBSD's sysexits.h, the codes daemon/commands/errors.py
uses), never in a traceback or a hang.
"""

from __future__ import annotations

import os
import random
import subprocess
import sys
from pathlib import Path

import pytest

from daemon.commands import refit
from daemon.commands.cli import main
from daemon.commands.refit import RefitError, read_readings, refit_readings
from tests.langley_sessions import CONFIG_PATH, pico_config

ROOT = Path(__file__).resolve().parent.parent
HEAD = "time_utc,channel,signal,pressure_hpa\n"
GOOD = "2027-02-15T13:00:00Z,500,1.25,645.0\n"


def _cli(csv: str | Path) -> tuple[int, str]:
    """The command as an operator runs it, in a process of its own: a hang ends the
    test with an error instead of stalling the suite (a guard, not a measurement)."""
    try:
        proc = subprocess.run(
            [sys.executable, "-m", "daemon.commands.cli", "refit", "--config",
             str(CONFIG_PATH), "--csv", str(csv)],
            cwd=ROOT, capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL)
    except subprocess.TimeoutExpired:
        pytest.fail(f"refit on {csv} did not return: it hung")
    assert "Traceback" not in proc.stderr, proc.stderr
    return proc.returncode, proc.stderr.strip()


def _refit_error(text: str) -> str:
    with pytest.raises(RefitError) as err:
        read_readings(text, pico_config(), "r.csv")
    return str(err.value)


# --------------------------------------------------------------- not a regular file

def test_a_fifo_is_refused_without_waiting_for_a_writer(tmp_path):
    fifo = tmp_path / "readings.csv"
    os.mkfifo(fifo)
    code, err = _cli(fifo)  # nobody ever opens the FIFO for writing
    assert code == 66 and "is a named pipe (FIFO), not a readings file" in err


@pytest.mark.parametrize("device", ["/dev/zero", "/dev/urandom"])
def test_endless_devices_are_refused(device):
    if not os.path.exists(device):
        pytest.skip(f"{device} does not exist on this machine")
    code, err = _cli(device)
    assert code == 66 and f"{device}: is a character device, not a readings file" in err


def test_a_directory_is_refused(tmp_path, capsys):
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(tmp_path)]) == 66
    assert "is a directory, not a readings file" in capsys.readouterr().err


def test_an_unreadable_file_is_refused(tmp_path, capsys, monkeypatch):
    path = tmp_path / "r.csv"
    path.write_text(HEAD + GOOD)
    path.chmod(0)
    if os.access(path, os.R_OK):  # root reads a mode-000 file: refuse as the kernel would
        real_open = os.open

        def refused(name, *args, **kwargs):
            if Path(name) == path:
                raise PermissionError(13, "Permission denied", str(path))
            return real_open(name, *args, **kwargs)
        monkeypatch.setattr(os, "open", refused)
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(path)]) == 66
    assert "permission denied" in capsys.readouterr().err


# --------------------------------------------------------------- bounded reading

def test_a_large_file_of_nul_bytes_stops_at_the_first_line(tmp_path):
    path = tmp_path / "zeros.csv"
    with path.open("wb") as f:
        f.truncate(256 * 2**20)  # 256 MiB of NUL bytes (sparse: costs no disk)
    code, err = _cli(path)
    assert code == 65 and f"line 1 is longer than {refit.MAX_LINE_CHARS} characters" in err


def test_random_bytes_are_refused_with_the_line(tmp_path):
    path = tmp_path / "noise.csv"
    path.write_bytes(HEAD.encode() + random.Random(1).randbytes(64 * 1024))
    code, err = _cli(path)
    assert code == 65
    assert "line 2" in err and ("not UTF-8 text" in err or "longer than" in err), err


def test_an_overlong_line_is_named():
    text = HEAD + GOOD + "2027-02-15T13:01:00Z,500," + "1" * 5000 + ",645\n"
    assert "line 3 is longer than 1024 characters" in _refit_error(text)


def test_the_reading_count_is_bounded(monkeypatch):
    monkeypatch.setattr(refit, "MAX_READINGS", 3)
    text = HEAD + "".join(f"2027-02-15T13:0{i}:00Z,500,1.25,645\n" for i in range(5))
    assert "r.csv: line 5: more than 3 readings; split the file" in _refit_error(text)


# --------------------------------------------------------------- what no reading is

@pytest.mark.parametrize("value, field", [
    ("1_0.5", "signal"),      # float() reads it as 10.5 (PEP 515 underscores)
    ("1_000", "signal"),
    ("6_45.0", "pressure_hpa"),
])
def test_digit_separators_are_refused(value, field):
    # PEP 515 (Python 3.6) lets float() and int() accept '_' between digits; a
    # reading file is not Python source, so '1_0.5' is a typing slip, not 10.5.
    row = (f"2027-02-15T13:00:00Z,500,{value},645\n" if field == "signal"
           else f"2027-02-15T13:00:00Z,500,1.25,{value}\n")
    msg = _refit_error(HEAD + row)
    assert f"line 2: {field} '{value}' has a digit separator '_'" in msg


@pytest.mark.parametrize("value", ["١٫٥", "１.５", "0x1p-2", "1e", "--1", "½"])
def test_numbers_that_python_or_a_person_might_misread_are_refused(value):
    # float('１.５') is 1.5 (full-width digits; Python's float() accepts any Unicode
    # decimal digit, per its documentation); a readings file holds ASCII numbers.
    assert f"signal {value!r} is not a number" in _refit_error(
        HEAD + f"2027-02-15T13:00:00Z,500,{value},645\n")


@pytest.mark.parametrize("stamp", [
    "0001-01-01T00:00:00+05:00",   # UTC would be year 0: datetime cannot hold it
    "9999-12-31T23:00:00-05:00",   # UTC would be year 10000
    "0001-01-01T00:00:00Z",        # representable, but before any solar ephemeris here
    "9999-12-31T12:00:00Z",
    "1600-06-01T12:00:00Z",        # pandas times (and so pvlib) start in 1677
    "2300-06-01T12:00:00Z",        # and end in 2262
])
def test_every_date_that_cannot_be_represented_names_its_line(stamp, tmp_path):
    # datetime.MINYEAR/MAXYEAR are 1 and 9999 (Python datetime documentation); pandas
    # Timestamps span 1677-09-21 to 2262-04-11 (pandas user guide, "Timestamp
    # limitations"), and pvlib's solar position works on them.
    path = tmp_path / "r.csv"
    path.write_text(HEAD + GOOD + f"{stamp},675,1.1,645\n")
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(path)]) == 65
    msg = _refit_error(HEAD + GOOD + f"{stamp},675,1.1,645\n")
    assert f"line 3: time_utc {stamp!r} is outside the years 1700 to 2200" in msg


@pytest.mark.parametrize("content", [
    b"\xef\xbb\xbf",                  # only a UTF-8 byte-order mark
    b"\xef\xbb\xbf\r\n\r\n",
    b",,,\n",                         # only commas
    b",,\n , ,\n\n,\n",
])
def test_a_file_with_no_text_in_any_field_is_empty(content, tmp_path, capsys):
    path = tmp_path / "r.csv"
    path.write_bytes(content)
    assert main(["refit", "--config", str(CONFIG_PATH), "--csv", str(path)]) == 65
    err = capsys.readouterr().err
    assert "the file is empty" in err and "Traceback" not in err


def test_a_byte_order_mark_before_the_header_is_accepted(tmp_path):
    path = tmp_path / "r.csv"
    path.write_bytes(b"\xef\xbb\xbf" + (HEAD + GOOD).encode())
    out = refit.refit_file(path, pico_config())
    assert out["readings"] == 1


# --------------------------------------------------------------- held in columns

def test_the_first_repeat_in_file_order_is_named():
    rows = [
        "2027-02-15T13:00:00Z,500,1.0,645\n",   # line 2
        "2027-02-15T13:05:00Z,500,1.0,645\n",   # line 3
        "2027-02-15T13:05:00+00:00,500,1.1,645\n",  # line 4: repeats line 3
        "2027-02-15T14:00:00+01:00,500,1.2,645\n",  # line 5: repeats line 2
        "2027-02-15T13:00:00Z,500,1.3,645\n",   # line 6: repeats line 2 again
    ]
    msg = _refit_error(HEAD + "".join(rows))
    assert msg.startswith("r.csv: line 4: a second reading of channel 500 at "
                          "2027-02-15T13:05:00+00:00 (the first is on line 3)")


def test_the_order_of_the_lines_does_not_change_the_fit():
    # The fit groups by local date and session whatever the file order; a shuffled
    # file gives the same numbers (common practice, no source: a CSV has no order).
    from tests.langley_sessions import simulate_session
    from tests.test_refit import DAY, _csv

    text = _csv([simulate_session(DAY, "am", "clear", 3),
                 simulate_session(DAY, "pm", "clear", 3)])
    head, *rows = text.splitlines()
    random.Random(2).shuffle(rows)
    config = pico_config()
    ordered = refit_readings(read_readings(text, config), config)["results"]
    shuffled = refit_readings(read_readings("\n".join([head, *rows]), config),
                              config)["results"]
    assert shuffled == ordered
    assert {(r["date"], r["session"]) for r in ordered} == {("2027-02-15", "am"),
                                                            ("2027-02-15", "pm")}
