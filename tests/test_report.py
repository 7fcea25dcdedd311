"""``heliotrope report``: one self-contained HTML page, checked as text and rendered in
a real browser (headless Chromium from Debian's packages, when installed)."""

from __future__ import annotations

import datetime as dt
import re
import shutil
import struct
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import pytest

from daemon.commands.cli import main
from daemon.commands.report import build_report, nice_ticks
from tests.synthetic_store import CONFIG_PATH, DAY, build_day

D = DAY.isoformat()
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--hide-scrollbars"]


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    return build_day(tmp_path_factory.mktemp("report") / "day.db")


@pytest.fixture(scope="module")
def page(day):
    return build_report(day.path, day.config, D, dt.datetime(2027, 2, 16, 7, tzinfo=dt.UTC))


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def test_page_is_self_contained(page):
    p = _Tags()
    p.feed(page)
    names = [t for t, _ in p.tags]
    assert "script" not in names and "link" not in names and "img" not in names
    assert "iframe" not in names and "object" not in names
    for _, attrs in p.tags:
        assert "src" not in attrs
        assert not any(v and re.match(r"\s*(https?:|//|file:)", v) for k, v in attrs.items()
                       if k in ("href", "xlink:href", "action")), attrs
    assert "@import" not in page and "url(http" not in page
    assert page.startswith("<!DOCTYPE html>")


def test_page_has_every_section(page, day):
    p = _Tags()
    p.feed(page)
    text = " ".join(p.text)
    for heading in ("Summary", "Session results", "Langley plots",
                    "Housekeeping through the day", "Events"):
        assert heading in text
    svgs = [a for t, a in p.tags if t == "svg"]
    assert len(svgs) == len(day.config.channels) + 2  # one Langley plot each + two HK charts
    for ch in day.config.channels:
        assert f"Channel {ch.name} ({ch.wavelength_nm:g} nm)" in text
    assert "Pico Sereno Station" in text and "America/Mexico_City" in text
    assert "pm target m=" in text  # the no_lock event
    assert "late evening event of the day" in text and "event of the next local day" not in text
    assert "33 ok, 1 failed" in text
    assert page.count("<circle") > 30 and 'stroke-width="1.6"' in page  # dots and crosses


def test_langley_plots_use_the_stored_fit_points_or_say_they_re_fit(page, day, tmp_path):
    # A fresh store: exact marks, no note. A store from before the fit points were kept
    # (table dropped): the plots are still drawn, each caption says the marks are
    # recomputed.
    import sqlite3

    note = "fitted before the store kept the fit&#x27;s points"
    assert note not in page
    old = tmp_path / "old.db"
    src, dst = sqlite3.connect(day.path), sqlite3.connect(old)
    try:
        src.backup(dst)
        dst.execute("DROP TABLE fit_points")
        dst.commit()
    finally:
        src.close()
        dst.close()
    fallback = build_report(old, day.config, D, dt.datetime(2027, 2, 16, 7, tzinfo=dt.UTC))
    # Two sessions per channel, each with its note.
    assert fallback.count(note) == 2 * len(day.config.channels)
    assert fallback.count("<svg") == page.count("<svg")


def test_nice_ticks_are_round_and_cover_the_range():
    assert nice_ticks(0.0, 1.0) == [0.0, 0.2, 0.4, 0.6, 0.8, 1.0]
    assert nice_ticks(12.53, 12.67) == [12.55, 12.6, 12.65]
    assert nice_ticks(-1.7, 0.4) == [-1.5, -1.0, -0.5, 0.0]


def test_report_command_writes_a_file_or_standard_output(day, tmp_path, capsys):
    out = tmp_path / "r.html"
    assert main(["report", "--db", str(day.path), "--date", D, "--config", str(CONFIG_PATH),
                 "--out", str(out)]) == 0
    assert "written to" in capsys.readouterr().err
    assert out.read_text(encoding="utf-8").rstrip().endswith("</html>")
    assert main(["report", "--db", str(day.path), "--date", D,
                 "--config", str(CONFIG_PATH)]) == 0
    assert capsys.readouterr().out.startswith("<!DOCTYPE html>")
    assert main(["report", "--db", str(day.path), "--date", D, "--config", str(CONFIG_PATH),
                 "--out", str(day.path)]) == 64


def _png_size(path: Path) -> tuple[int, int]:
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", head[16:24])


@pytest.mark.skipif(CHROMIUM is None, reason="headless Chromium is not installed "
                    "(apt-get install chromium) - the browser rendering is not checked")
def test_report_renders_in_headless_chromium(day, page, tmp_path):
    html_file = tmp_path / "report.html"
    html_file.write_text(page, encoding="utf-8")
    url = html_file.as_uri()
    base = [CHROMIUM, *CHROMIUM_FLAGS]
    dom = subprocess.run(base + [f"--user-data-dir={tmp_path / 'profile1'}", "--dump-dom",
                                 url], capture_output=True, text=True, timeout=120)
    assert dom.returncode == 0, dom.stderr[-2000:]
    rendered = dom.stdout
    for text in ("Pico Sereno Station: 2027-02-15", "Session results", "Langley plots",
                 "Housekeeping through the day", "Events", "Channel 1020 (1020 nm)"):
        assert text in rendered, text
    assert rendered.count("<svg") == len(day.config.channels) + 2
    shot = tmp_path / "report.png"
    r = subprocess.run(base + [f"--user-data-dir={tmp_path / 'profile2'}",
                               "--window-size=1200,2600", f"--screenshot={shot}", url],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr[-2000:]
    assert _png_size(shot) == (1200, 2600)
    assert shot.stat().st_size > 50_000  # a blank page compresses to a few kB
