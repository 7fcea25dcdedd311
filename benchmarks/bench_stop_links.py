"""Driver side of a stop with a dead link: how long parking and closing take.

    .venv/bin/python benchmarks/bench_stop_links.py

Two dead links, each through real pyserial: a device path that does not exist (the
adapter was unplugged) and a loopback TCP port that accepts and never answers (a hung
device). For each it times the retrying ``park()`` the service uses today, and the
stop path drivers now offer (``park_once()`` then ``shutdown()``), with the reference
drivers' default timeout (2 s), retries (3) and back-off (0.25 s doubling to 5 s).
Also ``shutdown()`` while another thread is in the middle of a retrying exchange,
and SIGTERM to exit of the real ``heliotroped`` with both adapters unplugged (the
service started on a quiet site, timed from SIGTERM after READY=1 to its exit).
Prints the figures; exits 1 if the stop path takes more than 5 s in any case.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from daemon.station.bench import quiet_site  # noqa: E402
from drivers.interfaces import DeviceError, LinkError  # noqa: E402
from drivers.reference import open_tracker  # noqa: E402

BUDGET_S = 5.0


def timed(action: Callable[[], None]) -> tuple[float, str]:
    start = time.monotonic()
    try:
        action()
        outcome = "ok"
    except (LinkError, DeviceError) as exc:
        outcome = type(exc).__name__
    return time.monotonic() - start, outcome


def silent_server() -> tuple[socket.socket, str]:
    server = socket.create_server(("127.0.0.1", 0))
    server.listen()
    accepted: list[socket.socket] = []
    threading.Thread(target=lambda: accepted.append(server.accept()[0]), daemon=True).start()
    return server, f"socket://127.0.0.1:{server.getsockname()[1]}"


def service_sigterm_s(missing: str) -> tuple[float, int]:
    """(seconds from SIGTERM to exit, exit code) of heliotroped with both ports gone."""
    with tempfile.TemporaryDirectory() as tmp:
        data = yaml.safe_load((ROOT / "config" / "pico-sereno.yaml").read_text())
        data = quiet_site(data, datetime.now(UTC))
        data["instrument"]["radiometer"]["port"] = missing
        data["instrument"]["tracker"]["port"] = missing
        data["store"]["path"] = str(Path(tmp) / "stop.db")
        cfg_path = Path(tmp) / "stop.yaml"
        cfg_path.write_text(yaml.safe_dump(data))
        sock_path = Path(tmp) / "notify.sock"
        with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
            sock.bind(str(sock_path))
            sock.settimeout(60)
            proc = subprocess.Popen(
                [sys.executable, "-m", "daemon.station.service", "--config", str(cfg_path)],
                env=dict(os.environ, NOTIFY_SOCKET=str(sock_path)), cwd=ROOT,
                stderr=subprocess.DEVNULL)
            try:
                while "READY=1" not in sock.recv(4096).decode().splitlines():
                    pass
                start = time.monotonic()
                proc.send_signal(signal.SIGTERM)
                code = proc.wait(timeout=60)
                return time.monotonic() - start, code
            finally:
                if proc.poll() is None:
                    proc.kill()
                    proc.wait()


def main() -> int:
    worst_stop_s = 0.0
    missing = "/dev/heliotrope-bench-unplugged"
    for label, make_url in (("unplugged adapter", lambda: (None, missing)),
                            ("silent device (TCP)", silent_server)):
        server, url = make_url()
        old_s, old_out = timed(open_tracker(url).park)
        tracker = open_tracker(url)
        once_s, once_out = timed(lambda t=tracker: t.park_once(timeout_s=2.0))
        close_s, _ = timed(lambda t=tracker: t.shutdown(timeout_s=1.0))
        worst_stop_s = max(worst_stop_s, once_s + close_s)
        print(f"{label}: park() {old_s:.2f} s ({old_out}); park_once(2 s) {once_s:.2f} s "
              f"({once_out}) + shutdown {close_s:.3f} s")
        if server is not None:
            server.close()

    # A worker thread in the middle of a retrying exchange with the adapter gone.
    tracker = open_tracker(missing)
    worker = threading.Thread(target=lambda: timed(tracker.park), daemon=True)
    worker.start()
    time.sleep(0.5)  # let it reach its back-off
    start = time.monotonic()
    tracker.shutdown(timeout_s=1.0)
    worker.join(BUDGET_S)
    cut_s = time.monotonic() - start
    worst_stop_s = max(worst_stop_s, cut_s)
    print(f"shutdown() with a retrying park in another thread: worker done after {cut_s:.3f} s"
          f" (alive: {worker.is_alive()})")
    service_s, code = service_sigterm_s(missing)
    worst_stop_s = max(worst_stop_s, service_s)
    print(f"heliotroped, both adapters unplugged: SIGTERM to exit {service_s:.2f} s "
          f"(exit code {code})")
    print(f"worst stop path {worst_stop_s:.2f} s (budget {BUDGET_S:g} s)")
    return 0 if worst_stop_s <= BUDGET_S and not worker.is_alive() and code == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
