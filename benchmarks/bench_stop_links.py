"""Driver side of a stop with a dead link: how long parking and closing take.

    .venv/bin/python benchmarks/bench_stop_links.py

Two dead links, each through real pyserial: a device path that does not exist (the
adapter was unplugged) and a loopback TCP port that accepts and never answers (a hung
device). For each it times the retrying ``park()`` the service uses today, and the
stop path drivers now offer (``park_once()`` then ``shutdown()``), with the reference
drivers' default timeout (2 s), retries (3) and back-off (0.25 s doubling to 5 s).
Also ``shutdown()`` while another thread is in the middle of a retrying exchange.
Prints the figures; exits 1 if the stop path takes more than 5 s in any case.
"""

from __future__ import annotations

import socket
import sys
import threading
import time
from collections.abc import Callable
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

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
    print(f"worst stop path {worst_stop_s:.2f} s (budget {BUDGET_S:g} s)")
    return 0 if worst_stop_s <= BUDGET_S and not worker.is_alive() else 1


if __name__ == "__main__":
    sys.exit(main())
