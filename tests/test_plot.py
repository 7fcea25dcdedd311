"""``heliotrope plot``: per-point marks are the service's session fit's own (stored fit
points; a re-fit for stores written before them), the terminal plot fits 80 columns,
and the PNG needs the plot extra."""

from __future__ import annotations

import json
import math
import sqlite3
import subprocess
import sys
from datetime import date
from pathlib import Path

import pytest

from daemon.commands import plot
from daemon.commands.cli import main
from daemon.store.reader import open_readonly, results_between, session_points
from tests.synthetic_store import CONFIG_PATH, DAY, EARTH_SUN_FACTOR, TAU, V0, build_day

D = DAY.isoformat()
ROOT = Path(__file__).resolve().parent.parent


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    return build_day(tmp_path_factory.mktemp("plot") / "day.db")


@pytest.fixture
def conn(day):
    c = open_readonly(day.path)
    yield c
    c.close()


def test_readonly_points_equal_the_writers_aggregates(day, conn):
    from daemon.store.writer import Store

    with Store.open(day.path) as store:
        for session in ("am", "pm"):
            want = store.session_points(D, session)
            got = session_points(conn, D, session)
            assert [p.measurement_id for p in got] == [p.measurement_id for p in want]
            for g, w in zip(got, want, strict=True):
                assert g.locked == w.locked and g.airmass == w.airmass
                for name, st in w.channels.items():
                    mine = g.channels[name]
                    assert mine.sun_mean_v == pytest.approx(st.sun_mean_v, rel=1e-15)
                    assert mine.sun_sd_v == pytest.approx(st.sun_sd_v, rel=1e-12)
                    assert mine.dark_mean_v == pytest.approx(st.dark_mean_v, rel=1e-15)


def test_marks_show_the_outlier_rejected_and_the_unlocked_point_screened(day, conn):
    for ch in day.config.channels:
        view = plot.langley_view(conn, day.config, D, "am", ch.name)
        assert view.marks_source == plot.MARKS_STORED
        roles = {p.measurement_id: p.role for p in view.points}
        assert roles[day.outlier_id] == plot.REJECTED, ch.name
        assert roles[day.unlocked_id] == plot.EXCLUDED
        assert sum(r == plot.USED for r in roles.values()) == view.n_used
        # The marks are the service's own: as many points used as the stored result.
        assert view.stored["n_used"] == view.n_used, ch.name
        assert len(view.points) == view.stored["n_total"]
        assert view.notes == []


def _residual_sd(conn, session, channel):
    return conn.execute("SELECT residual_sd FROM session_results WHERE plan_date = ? AND "
                        "session = ? AND channel = ?", (D, session, channel)).fetchone()[0]


def test_the_line_is_the_stored_fit_and_follows_beer_lambert(day, conn):
    for session in ("am", "pm"):
        for ch in day.config.channels:
            view = plot.langley_view(conn, day.config, D, session, ch.name)
            assert view.line_source == "stored session result"
            assert view.ln_v0 == pytest.approx(math.log(view.stored["v0"]), rel=1e-12)
            # The drawn line passes through the plotted used points within the
            # residual spread of the fit: the points are the fit's own (x, y).
            sd = _residual_sd(conn, session, ch.name)
            resid = [p.ln_v - (view.ln_v0 - view.tau * p.pos_x) for p in view.points
                     if p.role == plot.USED]
            assert len(resid) == view.n_used
            assert max(abs(e) for e in resid) < 4 * sd, (session, ch.name)
            assert math.sqrt(sum(e * e for e in resid) / (len(resid) - 2)) == pytest.approx(
                sd, rel=1e-6)
    view = plot.langley_view(conn, day.config, D, "pm", "500")
    # The synthetic signal is V0 f exp(-tau m) (Beer-Lambert-Bouguer law, common
    # practice, no source): the fitted line must give back tau and V0 f.
    assert view.tau == pytest.approx(TAU["500"], abs=2e-4)
    assert view.v0 == pytest.approx(V0["500"] * EARTH_SUN_FACTOR, rel=5e-4)
    used = [p for p in view.points if p.role == plot.USED]
    for p in used:
        assert p.ln_v == pytest.approx(view.ln_v0 - view.tau * p.airmass, abs=2e-3)


def _copy_store(day, path):
    src = sqlite3.connect(day.path)
    dst = sqlite3.connect(path)
    try:
        src.backup(dst)
    finally:
        src.close()
        dst.close()
    return path


def test_the_marks_follow_the_stored_fit_points_not_a_re_fit(day, tmp_path):
    # Change one stored role in a copy of the store: the plot shows what is stored.
    path = _copy_store(day, tmp_path / "copy.db")
    good = next(mid for (session, _), mid in day.record_ids.items()
                if session == "am" and mid not in (day.outlier_id, day.unlocked_id))
    with sqlite3.connect(path) as c:
        c.execute("UPDATE fit_points SET role = 'rejected' WHERE measurement_id = ? "
                  "AND channel = '500'", (good,))
    conn = open_readonly(path)
    try:
        view = plot.langley_view(conn, day.config, D, "am", "500")
    finally:
        conn.close()
    roles = {p.measurement_id: p.role for p in view.points}
    assert roles[good] == plot.REJECTED and roles[day.outlier_id] == plot.REJECTED
    # ... and says that its count no longer agrees with the stored result.
    assert view.n_used == view.stored["n_used"] - 1
    assert any("inconsistent" in n for n in view.notes)


def test_a_store_from_before_the_fit_points_falls_back_to_a_re_fit(day, tmp_path):
    path = _copy_store(day, tmp_path / "old.db")
    with sqlite3.connect(path) as c:
        c.execute("DROP TABLE fit_points")
    conn = open_readonly(path)
    try:
        for ch in day.config.channels:
            view = plot.langley_view(conn, day.config, D, "am", ch.name)
            assert view.marks_source == plot.MARKS_RECOMPUTED
            roles = {p.measurement_id: p.role for p in view.points}
            assert roles[day.outlier_id] == plot.REJECTED, ch.name
            assert roles[day.unlocked_id] == plot.EXCLUDED
            assert view.stored["n_used"] == view.n_used, ch.name
            assert view.line_source == "stored session result"
            assert any("fitted before the store kept the fit's points" in n
                       for n in view.notes)
        text = plot.render_terminal(view)
        assert "note: this session was fitted before" in text.replace("\n", " ")
        assert max(len(line) for line in text.splitlines()) <= 80
    finally:
        conn.close()


def test_terminal_plot_fits_80_columns_and_marks_points(day, conn):
    view = plot.langley_view(conn, day.config, D, "am", "500")
    text = plot.render_terminal(view)
    lines = text.splitlines()
    assert max(len(line) for line in lines) <= 80
    assert text.count(plot.GLYPHS[plot.REJECTED]) == 2  # the point and the legend
    assert plot.GLYPHS[plot.EXCLUDED] in text.split("\n● in the fit")[0]
    assert any(0x2800 < ord(c) <= 0x28FF for c in text)  # the Braille line
    assert "accepted" in lines[2] and "V0 " in lines[1]
    # Narrow terminals get a narrower plot, never a wrapped one.
    assert max(len(line) for line in plot.render_terminal(view, width=60).splitlines()) <= 60


def test_plot_position_of_points_follows_their_values():
    # Two points: the one with the larger air mass sits further right and lower.
    pts = [plot.PlotPoint(1, "t1", 2.0, math.exp(0.8), plot.USED),
           plot.PlotPoint(2, "t2", 6.0, math.exp(0.2), plot.REJECTED)]
    view = plot.SessionView(D, "am", "x", 500.0, pts, ln_v0=1.1, tau=0.15, v0=math.exp(1.1),
                            v0_rel_unc=0.001, n_used=1, accepted=False, reasons=[],
                            stored=None)
    rows = plot.render_terminal(view).splitlines()
    r_used = next(i for i, r in enumerate(rows) if "●" in r and "in the fit" not in r)
    r_rej = next(i for i, r in enumerate(rows) if "×" in r and "rejected" not in r)
    assert r_rej > r_used
    assert rows[r_rej].index("×") > rows[r_used].index("●")


def test_plot_command_text_and_json(day, capsys):
    argv = ["plot", "--db", str(day.path), "--date", D, "--channel", "870",
            "--config", str(CONFIG_PATH)]
    assert main(argv) == 0
    text = capsys.readouterr().out
    assert "Langley plot 2027-02-15 am" in text and "Langley plot 2027-02-15 pm" in text
    assert max(len(line) for line in text.splitlines()) <= 80
    assert main(argv + ["--session", "am", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    (p,) = out["plots"]
    assert p["session"] == "am" and p["channel"] == "870"
    assert p["marks_source"] == "stored fit points" and p["x_label"] == "air mass"
    roles = {q["measurement_id"]: q["role"] for q in p["points"]}
    assert roles[day.outlier_id] == "rejected"
    assert p["fit"]["n_used"] == sum(1 for r in roles.values() if r == "used")


def test_plot_command_errors_are_clear(day, tmp_path, capsys):
    base = ["plot", "--db", str(day.path), "--date", D]
    assert main(base + ["--channel", "999", "--config", str(CONFIG_PATH)]) == 64
    assert "choose one of 380, 440, 500, 675, 870, 1020" in capsys.readouterr().err
    assert main(base + ["--channel", "500", "--config", str(tmp_path / "none.yaml")]) == 78
    assert "pass --config FILE or set HELIOTROPE_CONFIG" in capsys.readouterr().err
    assert main(["plot", "--db", str(day.path), "--date", "2020-01-01", "--channel", "500",
                 "--config", str(CONFIG_PATH)]) == 66
    assert "no measurements of 2020-01-01" in capsys.readouterr().err


_NO_MPL = """
import sys
sys.modules["matplotlib"] = None  # as if the plot extra were not installed
from daemon.commands.cli import main
sys.exit(main(sys.argv[1:]))
"""


def test_png_without_matplotlib_says_how_to_install_it(day, tmp_path):
    png = tmp_path / "p.png"
    r = subprocess.run([sys.executable, "-c", _NO_MPL, "plot", "--db", str(day.path),
                        "--date", D, "--channel", "500", "--config", str(CONFIG_PATH),
                        "--png", str(png)], capture_output=True, text=True, cwd=ROOT,
                       timeout=60)
    assert r.returncode == 69
    assert "install the plot extra: pip install 'heliotrope[plot]'" in r.stderr
    assert not png.exists()


def test_png_with_matplotlib(day, tmp_path):
    pytest.importorskip("matplotlib", reason="the plot extra (matplotlib) is not installed")
    png = tmp_path / "p.png"
    assert main(["plot", "--db", str(day.path), "--date", D, "--channel", "500",
                 "--config", str(CONFIG_PATH), "--png", str(png)]) == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


@pytest.mark.slow
def test_marks_agree_with_the_service_on_a_simulated_day(tmp_path):
    # The real bench day (simulator process, real protocol): for every channel and
    # session the recomputed marks use as many points as the service's fit did.
    from daemon.config.settings import load_config
    from daemon.station.bench import run_simulated_day

    cfg = load_config(CONFIG_PATH)
    run = run_simulated_day(cfg, date(2027, 2, 15), tmp_path / "sim.db",
                            "pico-sereno-clear", seed=5, port="pty", work_dir=tmp_path)
    conn = open_readonly(run.store_path)
    try:
        stored = results_between(conn, D, D)
        for r in stored:
            view = plot.langley_view(conn, cfg, D, r["session"], r["channel"])
            assert view.n_used == r["n_used"], (r["channel"], r["session"])
            text = plot.render_terminal(view)
            assert max(len(line) for line in text.splitlines()) <= 80
    finally:
        conn.close()
