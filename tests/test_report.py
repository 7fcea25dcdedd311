"""``heliotrope report``: one self-contained HTML page, checked as text and as SVG.

The rendering in a real browser (headless Chromium) is in tests/test_report_browser.py.
"""

from __future__ import annotations

import math
import re
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pytest

from daemon.commands.cli import main
from daemon.commands.plot import USED, langley_view
from daemon.commands.report import drift_line, langley_residuals, nice_ticks, session_day
from daemon.store.reader import (
    aod_between,
    open_readonly,
    results_between,
    stored_calibration,
)
from tests.report_stores import (
    DRIFT_DATES,
    DRIFT_PER_DAY,
    OUTLIER,
    REFUSAL,
    REFUSED,
    build_campaign_day,
    build_drift_campaign,
    report_page,
)
from tests.synthetic_store import CONFIG_PATH, DAY, PRESSURE_HPA, TAU, V0, build_day

D = DAY.isoformat()
SVG = "{http://www.w3.org/2000/svg}"
# The eight colours of Okabe, M. and Ito, K. (2008), "Color Universal Design (CUD): how
# to make figures and presentations that are friendly to colorblind people", J*FLY.
OKABE_ITO_2008 = {"#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2",
                  "#D55E00", "#CC79A7"}


@pytest.fixture(scope="module")
def day(tmp_path_factory):
    return build_day(tmp_path_factory.mktemp("report") / "day.db")


@pytest.fixture(scope="module")
def campaign(tmp_path_factory):
    """The synthetic day with one refused result, a calibration and its AOD."""
    return build_campaign_day(tmp_path_factory.mktemp("report-cal") / "cal.db")


@pytest.fixture(scope="module")
def page(day):
    return report_page(day)


@pytest.fixture(scope="module")
def cal_page(campaign):
    return report_page(campaign)


@pytest.fixture(scope="module")
def drifting(tmp_path_factory):
    """The campaign day with a newer five-day calibration whose response drifts, and
    the report of its date."""
    store = build_drift_campaign(tmp_path_factory.mktemp("report-drift") / "drift.db")
    return store, report_page(store)


def svgs(page: str) -> list[ET.Element]:
    """Every inline SVG of the page, parsed as XML (they must be well formed)."""
    return [ET.fromstring(m) for m in re.findall(r"<svg .*?</svg>", page, re.S)]


def langley_svgs(page: str) -> dict[str, ET.Element]:
    out = {}
    for svg in svgs(page):
        title = svg.findtext(f"{SVG}title") or ""
        m = re.match(r"Langley plot, channel (\S+) ", title)
        if m:
            out[m.group(1)] = svg
    return out


def groups(svg: ET.Element, **data: str) -> list[ET.Element]:
    return [g for g in svg.iter(f"{SVG}g")
            if all(g.get(f"data-{k}") == v for k, v in data.items())]


def marker_look(el: ET.Element) -> tuple:
    """What a reader sees of one marker: its shape (position removed) and its colours."""
    nums = [float(v) for v in re.findall(r"-?\d+(?:\.\d+)?", " ".join(
        el.get(k, "") for k in ("d", "cx", "cy", "r", "x", "y", "width", "height")))]
    if el.tag == f"{SVG}path":
        # Path coordinates relative to its first point: the same shape anywhere.
        xs, ys = nums[0::2], nums[1::2]
        shape = tuple(round(x - xs[0], 1) for x in xs) + tuple(round(y - ys[0], 1) for y in ys)
    elif el.tag == f"{SVG}circle":
        shape = (float(el.get("r")),)
    else:
        shape = (el.get("width"), el.get("height"))
    return el.tag, shape, el.get("fill"), el.get("stroke")


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
    svg_tags = [a for t, a in p.tags if t == "svg"]
    # A Langley plot and its residual panel per channel, two housekeeping charts.
    assert len(svg_tags) == 2 * len(day.config.channels) + 2
    for ch in day.config.channels:
        assert f"Channel {ch.name} ({ch.wavelength_nm:g} nm)" in text
    assert "Pico Sereno Station" in text and "America/Mexico_City" in text
    assert "pm target m=" in text  # the no_lock event
    assert "late evening event of the day" in text and "event of the next local day" not in text
    assert "33 ok, 1 failed" in text
    assert page.count("<circle") > 30 and 'stroke-width="1.6"' in page  # dots and crosses
    assert "No calibration in this store yet" in text and "heliotrope calibrate" in text
    assert "No aerosol optical depth for this date" in text


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
    fallback = report_page(day, old)
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


def test_a_date_without_measurements_says_where_to_look_and_writes_nothing(day, tmp_path,
                                                                        capsys):
    # Exit 1 is "nothing to show" (README, "Commands"; common practice, no source).
    out = tmp_path / "empty.html"
    assert main(["report", "--db", str(day.path), "--date", "2027-03-01",
                 "--config", str(CONFIG_PATH), "--out", str(out)]) == 1
    err = capsys.readouterr().err
    assert "no measurements on 2027-03-01" in err and "heliotrope results" in err
    assert not out.exists()


# --------------------------------------------------------------------------- Langley plots

def test_morning_and_afternoon_markers_differ_in_shape_and_colour(page, day):
    # Read from the SVG itself: a reader must tell the sessions apart at the same air
    # mass (common practice, no source), and in grey too (shape, not colour alone).
    plots = langley_svgs(page)
    assert set(plots) == {ch.name for ch in day.config.channels}
    for name, svg in plots.items():
        looks = {}
        for session in ("am", "pm"):
            (g,) = groups(svg, session=session, role=USED)
            marks = list(g)
            assert len(marks) >= 8, (name, session)
            assert len({marker_look(m) for m in marks}) == 1  # one look per series
            looks[session] = marker_look(marks[0])
        am, pm = looks["am"], looks["pm"]
        assert am[:2] != pm[:2], f"channel {name}: the sessions' markers share one shape"
        assert {am[2], am[3]} - {None, "none"} != {pm[2], pm[3]} - {None, "none"}, (
            f"channel {name}: the sessions' markers share one colour")
        # The later series is drawn open, so the earlier one shows through it.
        later = [g.get("data-session") for g in svg.iter(f"{SVG}g")
                 if g.get("data-role") == USED][-1]
        assert looks[later][2] == "none", f"channel {name}: the {later} markers hide the other"


def test_marker_look_tells_shapes_and_colours_apart():
    # The check above must be able to fail: the same shape at two places looks the same.
    a = ET.fromstring(f'<circle xmlns="{SVG[1:-1]}" cx="10" cy="20" r="3" fill="#0072B2"/>')
    b = ET.fromstring(f'<circle xmlns="{SVG[1:-1]}" cx="50" cy="70" r="3" fill="#0072B2"/>')
    c = ET.fromstring(f'<path xmlns="{SVG[1:-1]}" d="M10,14L15.2,23L4.8,23Z" fill="none"/>')
    d = ET.fromstring(f'<path xmlns="{SVG[1:-1]}" d="M40,44L45.2,53L34.8,53Z" fill="none"/>')
    assert marker_look(a) == marker_look(b) and marker_look(c) == marker_look(d)
    assert marker_look(a) != marker_look(c)


def test_charts_use_the_okabe_ito_palette(cal_page):
    # Every series colour is one of Okabe and Ito (2008)'s eight (constant above); grey
    # is allowed for screened points, grid and axes.
    used = set()
    for svg in svgs(cal_page):
        for g in svg.iter(f"{SVG}g"):
            if g.get("data-session") or g.get("data-series"):
                for el in g:
                    used |= {el.get("fill"), el.get("stroke")}
    used -= {None, "none"}
    assert used and used <= OKABE_ITO_2008, used - OKABE_ITO_2008


def test_residual_panel_is_ln_v_minus_the_fitted_line(day, page):
    # The residuals about the stored line equal those of an ordinary least-squares line
    # through the used points (numpy.polyfit as the reference), since the session fit is
    # OLS on them; and the panel has one marker per drawn point.
    conn = open_readonly(day.path)
    try:
        for ch in day.config.channels:
            for session in ("am", "pm"):
                view = langley_view(conn, day.config, D, session, ch.name)
                res = langley_residuals(view)
                used = [(p.pos_x, p.ln_v, r) for p, r in res if p.role == USED]
                x, y, r = (np.array(c) for c in zip(*used, strict=True))
                slope, intercept = np.polyfit(x, y, 1)
                np.testing.assert_allclose(r, y - (intercept + slope * x), atol=1e-9)
                assert abs(r.mean()) < 1e-9  # OLS residuals sum to zero
                assert len(res) == sum(1 for p in view.points if p.ln_v is not None)
    finally:
        conn.close()
    panels = [svg for svg in svgs(page) if (svg.findtext(f"{SVG}title") or "")
              .startswith("Residuals, channel")]
    assert len(panels) == len(day.config.channels)
    for svg in panels:
        marks = [el for g in svg.iter(f"{SVG}g") if g.get("data-role") for el in g]
        assert len(marks) >= 16


def test_captions_give_v0_at_1_au_with_its_uncertainty(day, page):
    # The captions show the table's quantity: V0 at 1 AU, +/- its standard uncertainty.
    # Checked against the synthetic truth (Beer-Lambert-Bouguer signals, V0 at 1 AU in
    # tests/synthetic_store.py) within four standard uncertainties.
    conn = open_readonly(day.path)
    try:
        results = results_between(conn, D, D)
    finally:
        conn.close()
    text = " ".join(_text(page))
    for r in results:
        v0, rel = r["v0_1au"], r["v0_rel_unc"]
        assert f"V0 at 1 AU {v0:.5f} ± {v0 * rel:.5f} V ({100 * rel:.3f} %)" in text
        assert abs(v0 - V0[r["channel"]]) < 4 * v0 * rel, r
    # The day's V0 (at the day's Earth-Sun distance) is not what the captions call V0.
    assert f"V0 {results[0]['v0']:.5f} V" not in text


def _text(page: str) -> list[str]:
    p = _Tags()
    p.feed(page)
    return p.text


def _results_table(page: str) -> list[list[str]]:
    section = page[page.index("<h2>Session results</h2>"):page.index("<h2>Langley plots")]

    class Rows(HTMLParser):
        def __init__(self):
            super().__init__()
            self.rows: list[list[str]] = []

        def handle_starttag(self, tag, attrs):
            if tag == "tr":
                self.rows.append([])
            elif tag in ("td", "th"):
                self.rows[-1].append("")

        def handle_data(self, data):
            if self.rows and self.rows[-1]:
                self.rows[-1][-1] += data

    rows = Rows()
    rows.feed(section)
    return rows.rows


def test_reasons_stand_apart_from_notes(campaign, cal_page):
    table = _results_table(cal_page)
    head = table[0]
    assert head[-2:] == ["why not", "notes"]
    rows = {(r[0], r[1]): dict(zip(head, r, strict=True)) for r in table[1:]}
    refused = rows[REFUSED]
    assert refused["accepted"] == "no"
    assert refused["why not"] == REFUSAL  # the reason alone, no note mixed in
    assert refused["notes"] and REFUSAL not in refused["notes"]
    accepted = rows[("am", "440")]
    assert accepted["why not"] == "" and "burst screened" in accepted["notes"]


def test_a_refused_session_has_its_own_style(cal_page):
    svg = langley_svgs(cal_page)[REFUSED[1]]
    (line,) = [el for g in groups(svg, session=REFUSED[0], role="fit line") for el in g]
    assert line.get("stroke-dasharray")
    (other,) = [el for g in groups(svg, session="am", role="fit line") for el in g]
    assert other.get("stroke-dasharray") is None
    (faded,) = groups(svg, session=REFUSED[0], role=USED)
    assert faded.get("data-accepted") == "no" and float(faded.get("opacity")) < 1
    assert groups(svg, session="am", role=USED)[0].get("opacity") is None
    assert "pm (refused) used" in "".join(svg.itertext())
    assert "pm refused (dashed line, faded markers)" in " ".join(_text(cal_page))


# --------------------------------------------------------------------------- calibration

def test_calibration_section_shows_the_latest_calibration(campaign, cal_page):
    section = cal_page[cal_page.index("<h2>Calibration</h2>"):
                       cal_page.index("<h2>Aerosol optical depth")]
    text = re.sub(r"<[^>]+>", " ", section)
    assert "Latest calibration (number 1), made 2027-02-16 06:00:00 UTC (00:00 local)" in text
    assert "2027-02-15 to 2027-02-15" in text
    assert "(this date is in the campaign)" in text
    for name, v0 in V0.items():
        assert f"{v0:.5f}" in text and f"{v0 * 0.001:.5f}" in text, name
    assert "flagged" in text  # the refused session flagged in the campaign's sessions
    assert "a one-day campaign (test)" in text


def test_aod_section_gives_the_day_s_aerosol_optical_depth(campaign, cal_page):
    conn = open_readonly(campaign.path)
    try:
        rows = list(aod_between(conn, D, D))
    finally:
        conn.close()
    section = cal_page[cal_page.index("<h2>Aerosol optical depth</h2>"):
                       cal_page.index("<h2>Housekeeping")]
    text = re.sub(r"<[^>]+>", " ", section)
    table = {}
    for m in re.finditer(r"<tr><td>(\d+)</td>(.*?)</tr>", section):
        table[m.group(1)] = re.findall(r"<td[^>]*>([^<]*)</td>", m.group(2))
    # Mean of the unflagged values, against numpy as the reference.
    for name in V0:
        values = [r["aod"] for r in rows if r["channel"] == name and r["flag"] is None]
        assert table[name][3] == f"{np.mean(values):.4f}", name
    # Physics: at 1020 nm the aerosol part is the total minus Rayleigh, Bodhaine et al.
    # (1999) eq. 30, 0.00798 at 1013.25 hPa (docs/REFERENCES.md, F) scaled by pressure;
    # ozone is below 1e-4 there (from memory). The cloud-dimmed morning point of the
    # synthetic day adds 0.03 / m / 32 points < 3e-4 to the mean.
    expected = TAU["1020"] - 0.00798 * PRESSURE_HPA / 1013.25
    assert float(table["1020"][3]) == pytest.approx(expected, abs=5e-4)
    # Angstrom exponent: -ln(aod_1 / aod_2) / ln(l_1 / l_2) (Angstrom 1929, Geogr. Ann.
    # 11:156-166) of each measurement's pair, then averaged over the day.
    by_id: dict[int, dict[str, float]] = {}
    for r in rows:
        by_id.setdefault(r["measurement_id"], {})[r["channel"]] = r["aod"]
    alphas = [-math.log(a["440"] / a["870"]) / math.log(440 / 870) for a in by_id.values()]
    assert f"Angstrom exponent (440 / 870 nm pair): mean {np.mean(alphas):.3f}" in text
    assert f"standard deviation {np.std(alphas, ddof=1):.3f}" in text
    assert "Aerosol optical depth through the day" in cal_page


def test_aod_without_a_calibration_for_the_date_says_what_to_run(campaign, tmp_path):
    # A calibration exists but the AOD of this date was never computed.
    import shutil
    import sqlite3

    path = tmp_path / "no-aod.db"
    shutil.copy(campaign.path, path)
    conn = sqlite3.connect(path)
    try:
        conn.execute("DELETE FROM aod_angstrom")
        conn.execute("DELETE FROM aod")
        conn.commit()
    finally:
        conn.close()
    page = report_page(campaign, path)
    text = re.sub(r"\s+", " ", " ".join(_text(page)))
    assert "run heliotrope calibrate over a range that includes this date" in text



# --------------------------------------------------------------------------- drift

def _drift_charts(page: str) -> dict[str, ET.Element]:
    out = {}
    for svg in svgs(page):
        m = re.match(r"Campaign V0 at 1 AU, channel (\S+) ", svg.findtext(f"{SVG}title") or "")
        if m:
            out[m.group(1)] = svg
    return out


def _stored(store) -> dict:
    conn = open_readonly(store.path)
    try:
        return stored_calibration(conn)
    finally:
        conn.close()


def test_the_drift_line_is_the_least_squares_line_of_the_kept_sessions(drifting):
    """numpy.polyfit through the kept sessions (times as the campaign places them:
    mid-morning, mid-afternoon) is the reference for the drawn line; the stored drift
    is its slope relative to the mean, per year of 365.25 days."""
    cal = _stored(drifting[0])
    assert (cal["from"], cal["to"]) == (DRIFT_DATES[0], DRIFT_DATES[-1])
    for c in cal["channels"]:
        kept = [s for s in c["sessions"] if not s["flagged"]]
        assert [(s["date"], s["session"]) for s in c["sessions"] if s["flagged"]] \
            == [OUTLIER[:2]], c["channel"]
        t = np.array([session_day(cal["from"], s["date"], s["session"]) for s in kept])
        v = np.array([s["v0_1au"] for s in kept])
        slope, intercept = np.polyfit(t, v, 1)
        (t0, v0), (t1, v1) = drift_line(c, cal["from"])
        assert (t0, t1) == (t.min(), t.max())
        assert v0 == pytest.approx(intercept + slope * t0, rel=1e-12)
        assert v1 == pytest.approx(intercept + slope * t1, rel=1e-12)
        assert c["v0_1au"] == pytest.approx(v.mean(), rel=1e-12)
        assert c["drift_pct_per_year"] == pytest.approx(100 * slope * 365.25 / v.mean(),
                                                        rel=1e-9)
        # The invented trend is found within three of its standard errors.
        truth = 100 * DRIFT_PER_DAY * 365.25
        assert abs(c["drift_pct_per_year"] - truth) < 3 * c["drift_unc_pct_per_year"]


def _points(svg: ET.Element, series: str) -> list[tuple[float, float]]:
    (g,) = groups(svg, series=series)
    out = []
    for el in g:
        if el.tag == f"{SVG}polyline":
            out += [tuple(map(float, p.split(","))) for p in el.get("points").split()]
        elif el.tag == f"{SVG}circle":
            out.append((float(el.get("cx")), float(el.get("cy"))))
        else:  # a triangle or cross path: its first point's x is the centre's
            nums = [float(n) for n in re.findall(r"-?\d+\.?\d*", el.get("d"))]
            out.append((nums[0], nums[1]))
    return out


def test_each_channel_has_a_drift_chart_with_its_sessions_mean_and_line(drifting):
    store, drift_page = drifting
    cal = _stored(store)
    charts = _drift_charts(drift_page)
    assert sorted(charts, key=float) == [c["channel"] for c in cal["channels"]]
    colours = set()
    for c in cal["channels"]:
        svg = charts[c["channel"]]
        n = {k: sum(1 for s in c["sessions"] if (s["flagged"] if k == "flagged" else
                                                 not s["flagged"] and s["session"] == k))
             for k in ("am", "pm", "flagged")}
        assert n == {"am": 5, "pm": 4, "flagged": 1}
        for key, count in n.items():
            assert len(_points(svg, key)) == count, (c["channel"], key)
        # Pixels back to values: the plot area maps days 0..5 onto its width, and the
        # drift line crosses the mean line at the kept sessions' mean time.
        rect = next(el for el in svg.iter(f"{SVG}rect") if el.get("fill") == "#fcfcfc")
        left, width = float(rect.get("x")), float(rect.get("width"))
        (a, b) = _points(svg, "drift")
        (t0, v0), (t1, v1) = drift_line(c, cal["from"])
        assert a[0] == pytest.approx(left + t0 / 5 * width, abs=0.06)
        assert b[0] == pytest.approx(left + t1 / 5 * width, abs=0.06)
        mean_y = _points(svg, "mean")[0][1]
        # y is linear in V0: the two ends are as far from the mean line as their values.
        assert (a[1] - mean_y) / (b[1] - mean_y) == pytest.approx(
            (v0 - c["v0_1au"]) / (v1 - c["v0_1au"]), rel=0.02)
        assert a[1] < b[1]  # the response falls: the line runs down the page's y
        for g in svg.iter(f"{SVG}g"):
            if g.get("data-series"):
                colours |= {el.get(k) for el in g for k in ("fill", "stroke")}
    assert colours - {None, "none"} <= OKABE_ITO_2008
    text = re.sub(r"\s+", " ", " ".join(_text(drift_page)))
    assert "Channel 500 (500 nm): 9 of 10 sessions kept; drift -18.44 ± 0.80 %/year" in text
    assert "9/10" in text  # the table's sessions kept, of those the campaign had


def test_a_one_day_calibration_charts_its_sessions_and_says_why_there_is_no_drift(cal_page):
    charts = _drift_charts(cal_page)
    assert len(charts) == 6
    for name, svg in charts.items():
        assert groups(svg, series="mean") and not groups(svg, series="drift"), name
    text = re.sub(r"\s+", " ", " ".join(_text(cal_page)))
    assert "no drift: fewer than three kept sessions on two dates" in text
    assert f"Channel {REFUSED[1]} ({REFUSED[1]} nm): 1 of 2 sessions kept" in text
