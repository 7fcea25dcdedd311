"""Frictions between the commands (issue 15): the scheduler library's log lines, the
terminal plot on a terminal that cannot encode UTF-8, ``results`` without a range, and
the AOD export of a store without a calibration."""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest

from daemon.commands import plot
from daemon.commands.cli import main
from daemon.store.reader import open_readonly
from tests.synthetic_store import CONFIG_PATH, DAY, build_day

D = DAY.isoformat()
ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    return build_day(tmp_path_factory.mktemp("frictions") / "day.db")


# --------------------------------------------------------------------------- service log

# A real APScheduler scheduler, started and stopped, after the service's logging set-up:
# APScheduler 3 logs "Scheduler started" and 'Added job ...' at INFO on its
# "apscheduler.scheduler" logger (APScheduler 3.x source, schedulers/base.py).
_LOG_RUN = """
import logging, sys
from apscheduler.schedulers.background import BackgroundScheduler
from daemon.station.service import configure_logging
configure_logging(sys.argv[1])
s = BackgroundScheduler()
s.add_job(print, "interval", hours=1)
s.start()
s.shutdown()
logging.getLogger("heliotroped").info("our own line")
logging.getLogger("apscheduler.scheduler").warning("a scheduler warning")
"""


def _service_log(level: str) -> str:
    r = subprocess.run([sys.executable, "-c", _LOG_RUN, level], capture_output=True,
                       text=True, cwd=ROOT, timeout=60)
    assert r.returncode == 0, r.stderr
    return r.stderr


def test_scheduler_info_lines_are_kept_out_of_the_default_log():
    log = _service_log("INFO")
    assert "INFO heliotroped: our own line" in log
    assert "Scheduler started" not in log and "Added job" not in log
    # Its warnings still come through.
    assert "WARNING apscheduler.scheduler: a scheduler warning" in log


def test_scheduler_info_lines_come_back_at_debug():
    log = _service_log("DEBUG")
    assert "INFO apscheduler.scheduler: Scheduler started" in log
    assert "INFO heliotroped: our own line" in log


def test_the_service_takes_log_level_debug():
    r = subprocess.run([sys.executable, "-m", "daemon.station.service", "--help"],
                       capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert r.returncode == 0 and "DEBUG" in r.stdout
    assert "scheduler library's loggers stay at WARNING" in " ".join(r.stdout.split())


# --------------------------------------------------------------------------- plot in ASCII

def test_plot_in_an_ascii_terminal_draws_plain_ascii(day):
    # PYTHONIOENCODING sets the encoding of sys.stdout (Python documentation, "Command
    # line and environment"); LC_ALL=C is the POSIX locale, whose charset is ASCII.
    env = dict(os.environ, PYTHONIOENCODING="ascii", LC_ALL="C", LANG="C")
    r = subprocess.run([sys.executable, "-m", "daemon.commands.cli", "plot", "--db",
                        str(day.path), "--date", D, "--channel", "500", "--config",
                        str(CONFIG_PATH)], capture_output=True, cwd=ROOT, env=env, timeout=60)
    assert r.returncode == 0, r.stderr.decode("utf-8", "replace")
    assert b"Traceback" not in r.stderr and b"UnicodeEncodeError" not in r.stderr
    text = r.stdout.decode("ascii")  # raises if a single byte is not ASCII
    assert "* in the fit  x rejected by the fit  o screened" in text
    assert "Langley plot 2027-02-15 am" in text and "Langley plot 2027-02-15 pm" in text
    assert "?" not in text  # nothing was replaced: the ASCII plot needs no replacement
    assert max(len(line) for line in text.splitlines()) <= 80


def test_ascii_plot_is_the_unicode_plot_cell_for_cell(day):
    conn = open_readonly(day.path)
    try:
        view = plot.langley_view(conn, day.config, D, "am", "500")
    finally:
        conn.close()
    fancy = plot.render_terminal(view).splitlines()
    plain = plot.render_terminal(view, ascii_only=True).splitlines()
    assert len(fancy) == len(plain)
    glyph = {plot.GLYPHS[r]: plot.ASCII_GLYPHS[r] for r in plot.GLYPHS}
    line_cells = 0
    for f, p in zip(fancy, plain, strict=True):
        assert p.isascii() and len(f) == len(p), (f, p)
        for a, b in zip(f, p, strict=True):
            if a in glyph:
                assert b == glyph[a]
            elif 0x2801 <= ord(a) <= 0x28FF:  # a Braille cell of the fitted line
                assert b in "-\\/"
                line_cells += 1
            elif a.isascii():
                assert a == b
    assert line_cells > 40  # the line runs across the plot, from air mass 0


def test_stream_encoding_is_tried_with_the_glyphs():
    import io

    def stream(encoding):
        return io.TextIOWrapper(io.BytesIO(), encoding=encoding)

    assert plot.stream_takes_unicode(stream("utf-8"))
    # latin-1 has the multiplication sign but neither the dots nor Braille (ISO 8859-1).
    assert not plot.stream_takes_unicode(stream("latin-1"))
    assert not plot.stream_takes_unicode(stream("ascii"))


# --------------------------------------------------------------------------- results, no range

def _by_date(path: Path) -> dict:
    # Counted straight from the store's table, not through the reader the command uses.
    with sqlite3.connect(path) as c:
        rows = c.execute("SELECT plan_date, group_concat(DISTINCT session), sum(accepted), "
                         "count(*) FROM session_results GROUP BY plan_date").fetchall()
    return {d: (sorted(s.split(",")), a, n) for d, s, a, n in rows}


def test_results_without_from_lists_the_stores_dates(day, capsys):
    want = _by_date(day.path)
    assert main(["results", "--db", str(day.path)]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].split()[:2] == ["date", "sessions"]
    sessions, accepted, fitted = want[D]
    row = next(line for line in out if line.startswith(D))
    assert row.split() == [D, *sessions, str(accepted), "of", str(fitted)]
    assert f"heliotrope results --from {D} --to {D}" in out[-1]

    assert main(["results", "--db", str(day.path), "--json"]) == 0
    got = json.loads(capsys.readouterr().out)["dates"]
    assert got == [{"date": D, "sessions": sessions, "accepted": accepted, "fitted": fitted}]


def test_results_of_an_empty_store_say_so(tmp_path, capsys):
    from daemon.store.writer import Store

    Store.open(tmp_path / "empty.db").close()
    assert main(["results", "--db", str(tmp_path / "empty.db")]) == 1
    assert "no plans or session results yet" in capsys.readouterr().out
    assert main(["results", "--db", str(tmp_path / "empty.db"), "--to", D]) == 64
    assert "--to needs --from" in capsys.readouterr().err


# --------------------------------------------------------------------------- aod, no calibration

def test_aod_export_without_a_calibration_says_what_to_run(day, tmp_path, capsys):
    base = ["export", "--db", str(day.path), "--from", D, "--what", "aod"]
    assert main(base) == 1
    captured = capsys.readouterr()
    assert captured.out == ""
    assert "run `heliotrope calibrate --from D1 --to D2" in captured.err
    out = tmp_path / "aod.csv"
    assert main(base + ["--out", str(out)]) == 1
    assert not out.exists()
    # The other kinds are not affected.
    assert main(["export", "--db", str(day.path), "--from", D, "--what", "results"]) == 0
