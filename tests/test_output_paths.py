"""Where the commands may write: an output is moved onto its path whole, so the path
must be a new name or a regular file, never a device, a pipe or the store.

As root, ``os.replace`` onto /dev/null succeeds and leaves a plain file where the
device was (rename(2) replaces any directory entry it is allowed to; POSIX, from
memory), so the check has to come first; these tests never write to /dev."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from daemon.commands import cli
from daemon.commands.output import OutputPathError, check_out_path


@pytest.mark.parametrize("device", ["/dev/null", "/dev/zero"])
def test_a_device_node_is_refused_before_anything_is_written(tmp_path, device):
    if not Path(device).exists():
        pytest.skip(f"{device} is not on this machine")
    with pytest.raises(OutputPathError, match="is not a regular file"):
        check_out_path(Path(device), tmp_path / "store.db")
    assert not Path(device).is_file()  # still the device


def test_a_fifo_is_refused(tmp_path):
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    with pytest.raises(OutputPathError, match="is not a regular file"):
        check_out_path(fifo, tmp_path / "store.db")


def test_a_regular_file_and_a_new_name_are_accepted(tmp_path):
    (tmp_path / "old.csv").write_text("x\n")
    check_out_path(tmp_path / "old.csv", tmp_path / "store.db")
    check_out_path(tmp_path / "new.csv", tmp_path / "store.db")


def test_export_to_dev_null_is_refused_and_leaves_the_device(tmp_path, capsys):
    from tests.synthetic_store import DAY, build_day  # the status tests' synthetic day

    db = tmp_path / "store.db"
    build_day(db)
    code = cli.main(["export", "--db", str(db), "--from", DAY.isoformat(),
                     "--what", "measurements", "--out", "/dev/null"])
    assert code != 0
    assert "is not a regular file" in capsys.readouterr().err
    assert not Path("/dev/null").is_file()
