"""``heliotrope ssh-gate``: only the read commands get through; everything else is
refused with a message, and nothing is executed or written."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from daemon.commands import sshgate
from tests.synthetic_store import CONFIG_PATH, DAY, build_day

ROOT = Path(__file__).resolve().parent.parent
D = DAY.isoformat()

REFUSED = [
    # shell metacharacters and chaining
    "today; rm -rf ~", "today && touch pwned", "today || reboot", "today | sh",
    "today > /tmp/pwned", "today < /etc/passwd", "today & sleep 100", "today\nrm -rf ~",
    "today\rrm", "today\ttouch x", "today #comment", "status --json!", "today *", "today ?",
    "today ~", "{today,demo}", "(today)",
    # command substitution and variables
    "today $(touch pwned)", "today `touch pwned`", "today $HOME", "today ${IFS}",
    "plot --date $(date) --channel 500",
    # quoting tricks
    "today '--json'", 'today "--json"', "today \\--json",
    # path traversal and other files
    "plot --date 2027-02-15 --channel ../../etc/passwd", "plot --date 2027-02-15 --channel ..",
    "plot --date 2027-02-15 --channel .hidden..", "export --from 2027-02-15 --what ../samples",
    "/bin/sh", "../bin/heliotrope today", "today --db /etc/shadow", "today --db=x.db",
    "report --date 2027-02-15 --config /etc/heliotrope/other.yaml",
    # writing options and commands
    "export --from 2027-02-15 --what results --out x.csv",
    "export --from 2027-02-15 --what results --out=x.csv",
    "plot --date 2027-02-15 --channel 500 --png p.png", "report --date 2027-02-15 --out r.html",
    "demo", "demo --db new.db", "check-config x", "probe", "ssh-gate", "refit", "calibrate",
    # unknown commands and options
    "rm -rf", "sh", "bash -c id", "python3", "scp -t .", "rsync --server .", "sftp",
    "heliotrope", "heliotrope heliotrope today", "today --verbose", "today --json --json",
    "status --warn-minutes", "status --warn-minutes -5", "status --warn-minutes 1e9",
    "results --from 2027-2-15", "results --from tomorrow", "export --what samples --format xml",
    "plot --date 2027-02-15 --channel 500 --session noon", "today --json=yes",
    "plot --date 2027-02-15 --channel -x", "", "   ",
    # non-ASCII look-alikes and control characters
    "today \u2014json", "tod\u0430y", "today\x00", "today\x1b[2J",
    # over-long input
    "today " + "--json " * 200, "plot --date 2027-02-15 --channel " + "a" * 600,
    "results " + " ".join(["--json"] * 20),
]


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    return build_day(tmp_path_factory.mktemp("gate") / "day.db")


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.parametrize("line", REFUSED, ids=[repr(x)[:40] for x in REFUSED])
def test_refused_and_nothing_runs(line, day, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    calls = []
    before = _sha(day.path)
    rc = sshgate.run_gate(line, str(day.path), str(CONFIG_PATH),
                          main=lambda argv: calls.append(argv) or 0)
    cap = capsys.readouterr()
    assert rc == sshgate.EX_NOPERM
    assert calls == []  # the command was never dispatched
    assert cap.out == ""
    assert cap.err.startswith("heliotrope ssh-gate: refused: ") and cap.err.count("\n") == 1
    assert list(tmp_path.iterdir()) == []  # nothing written here
    assert _sha(day.path) == before


@pytest.mark.parametrize("line,argv", [
    ("today --json", ["today", "--json"]),
    ("heliotrope today --json", ["today", "--json"]),
    ("status", ["status"]),
    ("status --json --warn-minutes 10 --crit-minutes 30.5",
     ["status", "--json", "--warn-minutes", "10", "--crit-minutes", "30.5"]),
    ("results --from=2027-02-01 --to 2027-02-15 --json",
     ["results", "--from", "2027-02-01", "--to", "2027-02-15", "--json"]),
    ("plan --date 2027-02-15", ["plan", "--date", "2027-02-15"]),
    ("export --from 2027-02-15 --what aod --format json",
     ["export", "--from", "2027-02-15", "--what", "aod", "--format", "json"]),
    ("plot --date 2027-02-15 --channel 1020 --session pm",
     ["plot", "--date", "2027-02-15", "--channel", "1020", "--session", "pm"]),
    ("report --date 2027-02-15", ["report", "--date", "2027-02-15"]),
])
def test_read_commands_pass_with_the_gates_own_store(line, argv, capsys):
    calls = []
    rc = sshgate.run_gate(line, "/srv/h.db", "/etc/h.yaml",
                          main=lambda a: calls.append(list(a)) or 0)
    assert rc == 0
    extra = ["--db", "/srv/h.db"] + (["--config", "/etc/h.yaml"]
                                     if argv[0] in ("plot", "report") else [])
    assert calls == [argv + extra]


def test_help_lists_the_read_commands(capsys):
    assert sshgate.run_gate("help", "x.db", None, main=lambda argv: pytest.fail(argv)) == 0
    out = capsys.readouterr().out
    for command in sshgate.ALLOWED:
        assert f"  {command}" in out


def _gate(env_line: str, day, cwd: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "SSH_ORIGINAL_COMMAND": env_line}
    return subprocess.run([sys.executable, "-m", "daemon.commands.cli", "ssh-gate", "--db",
                           str(day.path), "--config", str(CONFIG_PATH)], capture_output=True,
                          text=True, cwd=cwd, env={**env, "PYTHONPATH": str(ROOT)},
                          timeout=60)


def test_the_forced_command_end_to_end(day, tmp_path):
    # The way sshd runs it: a process with SSH_ORIGINAL_COMMAND in its environment.
    marker = tmp_path / "pwned"
    r = _gate(f"today --json; touch {marker}", day, tmp_path)
    assert r.returncode == 77 and r.stdout == "" and "refused" in r.stderr
    r = _gate(f"today $(touch {marker})", day, tmp_path)
    assert r.returncode == 77
    assert not marker.exists()
    r = _gate("today --json", day, tmp_path)
    assert r.returncode == 0, r.stderr
    assert len(json.loads(r.stdout)["results"]) == 12
    r = _gate(f"export --from {D} --what results --format csv", day, tmp_path)
    assert r.returncode == 0 and r.stdout.startswith("date,session,channel")
    r = _gate(f"plot --date {D} --channel 500 --session am", day, tmp_path)
    assert r.returncode == 0 and "×" in r.stdout
    assert list(tmp_path.iterdir()) == []


def test_no_command_means_no_shell(day, tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "SSH_ORIGINAL_COMMAND"}
    r = subprocess.run([sys.executable, "-m", "daemon.commands.cli", "ssh-gate",
                        "--db", str(day.path)],
                       capture_output=True, text=True, cwd=tmp_path,
                       env={**env, "PYTHONPATH": str(ROOT)}, timeout=60)
    assert r.returncode == 77 and "no login shell" in r.stderr
