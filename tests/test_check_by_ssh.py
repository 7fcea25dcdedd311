"""``check_by_ssh`` (Debian's monitoring-plugins) runs ``heliotrope status`` through a
real OpenSSH server on loopback against the store of a live service on the bench
(heliotroped with the simulator): 0 with performance data while the heartbeat is fresh,
1 and 2 once it is stale. The server runs on a free high port with its own host key
and a client key made in the test's directory."""

from __future__ import annotations

import os
import re
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
import yaml

from daemon.store.writer import Store

ROOT = Path(__file__).resolve().parent.parent
CONFIG = ROOT / "config" / "pico-sereno.yaml"
SSHD = "/usr/sbin/sshd"
CHECK_BY_SSH = "/usr/lib/nagios/plugins/check_by_ssh"
START_TIMEOUT_S = 60.0

pytestmark = [
    pytest.mark.slow,
    pytest.mark.skipif(not Path(SSHD).exists(), reason="needs OpenSSH's sshd (Debian "
                       "package openssh-server)"),
    pytest.mark.skipif(not Path(CHECK_BY_SSH).exists(), reason="needs check_by_ssh (Debian "
                       "package monitoring-plugins-standard)"),
    pytest.mark.skipif(shutil.which("ssh-keygen") is None or shutil.which("ssh") is None,
                       reason="needs ssh and ssh-keygen (Debian package openssh-client)"),
    pytest.mark.skipif(os.geteuid() != 0, reason="sshd logs a user in only when it runs "
                       "as root"),
]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait(until, what: str) -> None:
    deadline = time.monotonic() + START_TIMEOUT_S
    while not until():
        if time.monotonic() > deadline:
            pytest.fail(f"{what} did not happen within {START_TIMEOUT_S:g} s")
        time.sleep(0.2)


def _listening(port: int) -> bool:
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=1):
            return True
    except OSError:
        return False


@pytest.fixture
def sshd(tmp_path):
    """A loopback sshd that lets this user in with a key made here."""
    keys = tmp_path / "ssh"
    keys.mkdir(mode=0o700)
    for name in ("host", "client"):
        subprocess.run(["ssh-keygen", "-q", "-t", "ed25519", "-N", "", "-f",
                        str(keys / name)], check=True)
    (keys / "authorized_keys").write_text((keys / "client.pub").read_text())
    port = _free_port()
    cfg = keys / "sshd_config"
    cfg.write_text("\n".join([
        f"Port {port}", "ListenAddress 127.0.0.1", f"HostKey {keys / 'host'}",
        f"AuthorizedKeysFile {keys / 'authorized_keys'}", f"PidFile {keys / 'sshd.pid'}",
        "PasswordAuthentication no", "KbdInteractiveAuthentication no", "UsePAM no",
        "PermitRootLogin prohibit-password", "StrictModes no", "PubkeyAuthentication yes",
        "LogLevel ERROR", ""]))
    Path("/run/sshd").mkdir(exist_ok=True)  # its privilege-separation directory
    proc = subprocess.Popen([SSHD, "-D", "-e", "-f", str(cfg)], stderr=subprocess.PIPE,
                            text=True)
    try:
        _wait(lambda: _listening(port) or proc.poll() is not None, "sshd listening")
        if proc.poll() is not None:
            pytest.skip(f"sshd did not start here: {proc.stderr.read().strip()[-300:]}")
        yield port, keys
    finally:
        proc.terminate()
        proc.wait(timeout=15)


def _check(port: int, keys: Path, db: Path) -> tuple[int, str]:
    """check_by_ssh as a monitoring system would call it."""
    remote = f"{sys.executable} -m daemon.commands.cli status --db {db}"
    known = keys / "known_hosts"
    res = subprocess.run([CHECK_BY_SSH, "-H", "127.0.0.1", "-p", str(port), "-l",
                          os.environ.get("USER") or "root", "-i", str(keys / "client"),
                          "-o", "StrictHostKeyChecking=no", "-o",
                          f"UserKnownHostsFile={known}", "-o", "BatchMode=yes", "-E",
                          "-t", "60", "-C", remote],
                         capture_output=True, text=True, cwd=ROOT, timeout=120)
    return res.returncode, res.stdout + res.stderr


def predawn_site(data: dict, now: datetime) -> dict:
    """The configuration moved in longitude (and to the matching whole-hour zone) so
    that ``now`` is about 03:00 there: the service starts before its first target of the
    day, so it has missed none (a missed target is rightly a warning), and nothing is
    measured while the test runs."""
    k = round(3 - (now.hour + now.minute / 60)) % 24  # hours east of UTC, 0..23
    k = k - 24 if k > 12 else k  # -11..12
    data["site"]["longitude_deg"] = 15.0 * k
    # IANA's Etc zones count the other way round: Etc/GMT-5 is five hours east.
    data["site"]["timezone"] = "UTC" if k == 0 else f"Etc/GMT{-k:+d}"
    return data


# The plugins' development guidelines: 'label'=value[UOM];[warn];[crit];[min];[max].
PERF = re.compile(r"'([a-z_]+)'=(-?[0-9.]+|U)(s|%|)?;[^ \n]*")


def test_check_by_ssh_ok_then_warning_then_critical(sshd, tmp_path):
    port, keys = sshd
    sim = subprocess.Popen([sys.executable, "-m", "sim_instrument", "--scenario",
                            "pico-sereno-clear", "--port", "tcp:0", "--stdin-lifeline"],
                           stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    svc = None
    db = tmp_path / "svc.db"
    try:
        import json

        ends = json.loads(sim.stdout.readline())
        data = predawn_site(yaml.safe_load(CONFIG.read_text()), datetime.now(UTC))
        data["instrument"]["radiometer"]["port"] = ends["radiometer"]
        data["instrument"]["tracker"]["port"] = ends["tracker"]
        data["store"]["path"] = str(db)
        cfg_path = tmp_path / "svc.yaml"
        cfg_path.write_text(yaml.safe_dump(data))
        svc = subprocess.Popen([sys.executable, "-m", "daemon.station.service", "--config",
                                str(cfg_path)], stderr=subprocess.PIPE, text=True)

        def beating() -> bool:
            if not db.exists():
                return False
            try:
                with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as conn:
                    return conn.execute("SELECT count(*) FROM meta WHERE key = "
                                        "'heartbeat_utc'").fetchone()[0] > 0
            except sqlite3.Error:
                return False

        _wait(beating, "the service's first heartbeat")
        code, out = _check(port, keys, db)
        assert code == 0, out
        assert out.startswith("OK: heartbeat"), out
        perf = {m.group(1): m for m in PERF.finditer(out.split("|", 1)[1])}
        assert set(perf) == {"heartbeat_age", "disk_free", "detector_temp", "targets_today"}
        assert perf["heartbeat_age"].group(3) == "s" and perf["disk_free"].group(3) == "%"
        # The service recorded the configuration it runs with, as the station's.
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True) as conn:
            origins = [r[0] for r in conn.execute("SELECT origin FROM configurations")]
        assert origins == ["service"]

        svc.send_signal(signal.SIGTERM)
        assert svc.wait(timeout=60) == 0, svc.stderr.read()
        now = datetime.now(UTC)
        # The status defaults: warning after 5 min without a heartbeat, critical after 15.
        for age_min, want, head in ((10, 1, "WARNING: heartbeat"), (30, 2, "CRITICAL: stale")):
            with Store.open(db) as store:
                store.heartbeat(now - timedelta(minutes=age_min))
            code, out = _check(port, keys, db)
            assert code == want and out.startswith(head), out
    finally:
        if svc is not None and svc.poll() is None:
            svc.kill()
            svc.wait()
        sim.stdin.close()
        sim.wait(timeout=15)
