"""``heliotrope report``: one self-contained HTML page about one day.

The page needs no other file, script or font: styles are inline in the head and the
charts are inline SVG. It shows a summary, the session results, a Langley plot per
channel (both sessions, as :mod:`daemon.commands.plot` marks the points) with its
residual panel, the store's latest calibration and the day's aerosol optical depth, the
housekeeping temperatures and supply voltage through the day, and the day's events.
Times are UTC with the site's local time beside them.

Colours come from the colour-blind-safe palette of Okabe, M. and Ito, K. (2008), "Color
Universal Design (CUD): how to make figures and presentations that are friendly to
colorblind people" (J*FLY), and every series that colour tells apart also has its own
marker shape, so the page reads in grey too. Tables scroll sideways inside their own
box and the charts shrink to the page, so a 390-px phone never scrolls the page
sideways.

Read-only and free of heavy imports apart from numpy. The Langley plots show the
points exactly as the session fit used them (the stored fit points, see
:mod:`daemon.commands.plot`); numpy is needed only to mark the points of sessions fitted
before those were stored, by fitting them again.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import html
import itertools
import math
import os
import sys
import tempfile
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from daemon.science.points import DAYS_PER_YEAR, SESSION_DAY_FRACTION

_CLIP_IDS = itertools.count(1)
# The Okabe and Ito (2008) palette (see the module docstring), by its own colour names.
OKABE_ITO = {"black": "#000000", "orange": "#E69F00", "sky blue": "#56B4E9",
             "bluish green": "#009E73", "yellow": "#F0E442", "blue": "#0072B2",
             "vermillion": "#D55E00", "reddish purple": "#CC79A7"}
# Morning and afternoon differ in colour and in shape, and the afternoon's triangles are
# open and wide enough to show a morning dot at the same air mass inside them:
# (colour, marker used, hollow, marker rejected).
SESSION_STYLE = {"am": (OKABE_ITO["blue"], "dot", False, "cross"),
                 "pm": (OKABE_ITO["vermillion"], "triangle", True, "plus")}
REFUSED_OPACITY = 0.45  # a refused session's markers are faded
EXCLUDED_COLOUR = "#666666"
REFUSED_DASH = "6 4"  # the fitted line of a refused session is dashed
HK_SERIES = (("detector_temp_c", "detector", OKABE_ITO["vermillion"], "dot"),
             ("case_temp_c", "case", OKABE_ITO["bluish green"], "triangle"),
             ("ambient_temp_c", "ambient", OKABE_ITO["blue"], "square"))
# The campaign's drift chart: (colour, marker, hollow) of its kept morning and afternoon
# sessions (as in the Langley plots) and of the flagged ones; the mean and drift lines.
DRIFT_POINTS = {"am": (OKABE_ITO["blue"], "dot", False),
                "pm": (OKABE_ITO["vermillion"], "triangle", True),
                "flagged": (OKABE_ITO["reddish purple"], "cross", False)}
DRIFT_MEAN_COLOUR = OKABE_ITO["black"]
DRIFT_LINE = (OKABE_ITO["bluish green"], "5 3")  # colour and dash of the drift line
# Channel colours and shapes for the AOD chart, shortest wavelength first.
CHANNEL_STYLES = ((OKABE_ITO["reddish purple"], "dot"), (OKABE_ITO["blue"], "triangle"),
                  (OKABE_ITO["bluish green"], "square"), (OKABE_ITO["orange"], "diamond"),
                  (OKABE_ITO["vermillion"], "dot"), (OKABE_ITO["black"], "triangle"),
                  (OKABE_ITO["sky blue"], "square"))

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",sans-serif;
margin:0 auto;max-width:1120px;padding:16px 24px;color:#1b1b1b;background:#fff}
h1{font-size:1.5em;margin:.2em 0}h2{font-size:1.15em;margin:1.4em 0 .4em;
border-bottom:1px solid #ccc;padding-bottom:.2em}
.meta{color:#555;font-size:.9em}
table{border-collapse:collapse;font-size:.88em;margin:.4em 0}
th,td{padding:3px 8px;border-bottom:1px solid #e4e4e4;text-align:left;vertical-align:top}
th{background:#f3f3f3}td.num{text-align:right;font-variant-numeric:tabular-nums;
white-space:nowrap}td.long{min-width:24em;max-width:40em}
.no{color:#b2182b;font-weight:600}.yes{color:#1a7a3a}
.lvl-warning{color:#9a5b00}.lvl-error,.lvl-critical{color:#b2182b;font-weight:600}
.charts{display:grid;grid-template-columns:repeat(auto-fill,minmax(min(100%,350px),1fr));
gap:12px}
.charts.wide{grid-template-columns:repeat(auto-fill,minmax(min(100%,520px),1fr))}
figure{margin:0;border:1px solid #e4e4e4;padding:6px;min-width:0}
figcaption{font-size:.85em;color:#333;margin-top:2px}
figcaption ul{margin:.2em 0;padding-left:1.2em}
p,figcaption,h1,h2,li{overflow-wrap:anywhere}
svg{display:block;width:100%;height:auto}
.scroll{overflow-x:auto;max-width:100%}
.summary td:first-child{color:#555}
.refused{color:#b2182b}
@media (max-width:600px){body{padding:8px 10px}table{font-size:.8em}}
"""


# --------------------------------------------------------------------------- SVG charts

def nice_ticks(lo: float, hi: float, target: int = 5) -> list[float]:
    """Round tick values (1, 2 or 5 times a power of ten) covering ``[lo, hi]``."""
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo]
    raw = (hi - lo) / max(1, target)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 5, 10) if m * mag >= raw)
    first = math.ceil(lo / step - 1e-9) * step
    ticks = []
    v = first
    while v <= hi + 1e-9 * step:
        ticks.append(round(v, 12))
        v += step
    return ticks


def _decimals(ticks: Sequence[float]) -> int:
    if len(ticks) < 2:
        return 2
    step = abs(ticks[1] - ticks[0])
    return max(0, -math.floor(math.log10(step)) if step > 0 else 2)


def svg_chart(series: Sequence[dict[str, Any]], x_range: tuple[float, float],
              y_range: tuple[float, float], x_label: str, y_label: str,
              x_ticks: Sequence[tuple[float, str]] | None = None, title: str = "",
              width: int = 420, height: int = 300) -> str:
    """An inline SVG chart.

    Each series is a dict with ``xy`` (a list of (x, y)), ``kind`` ('line' or
    'points'), ``colour``, ``marker`` (for points: 'dot', 'triangle', 'square',
    'diamond', 'cross', 'plus' or 'ring'), ``label`` (shown in the legend; None hides
    it) and optionally ``hollow`` (outlined markers), ``opacity``, ``dash`` (a
    stroke-dasharray for lines), ``width`` and ``group`` (data attributes of the series'
    ``<g>``, so that tests and scripts can find it).
    """
    legend = [s for s in series if s.get("label")]
    rows = _legend_rows(legend, width - 58 - 22)
    left, right, top, bottom = 58, 22, 16 + 13 * max(1, len(rows)), 44
    height += 13 * max(0, len(rows) - 1)
    pw, ph = width - left - right, height - top - bottom
    x0, x1 = x_range
    y0, y1 = y_range

    def sx(x: float) -> float:
        return left + (x - x0) / (x1 - x0) * pw

    def sy(y: float) -> float:
        return top + (y1 - y) / (y1 - y0) * ph

    e = html.escape
    out = [f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {width} {height}" '
           f'role="img" aria-label="{e(title or y_label)}" font-size="11" '
           f'font-family="system-ui,sans-serif">']
    if title:
        out.append(f"<title>{e(title)}</title>")
    out.append(f'<rect x="{left}" y="{top}" width="{pw}" height="{ph}" fill="#fcfcfc" '
               'stroke="#999"/>')
    yt = nice_ticks(y0, y1)
    dec = _decimals(yt)
    for v in yt:
        y = sy(v)
        out.append(f'<line x1="{left}" x2="{left + pw}" y1="{y:.1f}" y2="{y:.1f}" '
                   'stroke="#e6e6e6"/>')
        out.append(f'<text x="{left - 4}" y="{y + 4:.1f}" text-anchor="end">{v:.{dec}f}</text>')
    ticks = x_ticks if x_ticks is not None else [
        (v, f"{v:.{_decimals(nice_ticks(x0, x1))}f}") for v in nice_ticks(x0, x1)]
    for v, label in ticks:
        x = sx(v)
        out.append(f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{top}" y2="{top + ph}" '
                   'stroke="#e6e6e6"/>')
        out.append(f'<text x="{x:.1f}" y="{top + ph + 14}" text-anchor="middle">'
                   f"{e(label)}</text>")
    out.append(f'<text x="{left + pw / 2:.1f}" y="{height - 6}" text-anchor="middle">'
               f"{e(x_label)}</text>")
    out.append(f'<text transform="translate(13 {top + ph / 2:.1f}) rotate(-90)" '
               f'text-anchor="middle">{e(y_label)}</text>')
    clip = f"plotarea{next(_CLIP_IDS)}"  # ids must be unique within the page
    out.append(f'<clipPath id="{clip}"><rect x="{left}" y="{top}" width="{pw}" '
               f'height="{ph}"/></clipPath><g clip-path="url(#{clip})">')
    for s in series:
        pts = [(sx(x), sy(y)) for x, y in s["xy"]
               if x is not None and y is not None and math.isfinite(x) and math.isfinite(y)]
        c = s["colour"]
        attrs = "".join(f' data-{k}="{e(str(v))}"' for k, v in s.get("group", {}).items())
        if s.get("opacity") is not None:
            attrs += f' opacity="{s["opacity"]}"'
        out.append(f"<g{attrs}>")
        if s["kind"] == "line" and len(pts) >= 2:
            dash = f' stroke-dasharray="{s["dash"]}"' if s.get("dash") else ""
            for seg in _segments(s["xy"], s.get("break_gap")):
                path = " ".join(f"{sx(x):.1f},{sy(y):.1f}" for x, y in seg)
                out.append(f'<polyline points="{path}" fill="none" stroke="{c}" '
                           f'stroke-width="{s.get("width", 1.4)}"{dash}/>')
        elif s["kind"] == "points":
            for x, y in pts:
                out.append(_marker(s.get("marker", "dot"), x, y, c, s.get("hollow", False)))
        out.append("</g>")
    out.append("</g>")
    # The legend runs along the top margin, so it never hides a point.
    for r, row in enumerate(rows):
        x, y = float(left), 14.0 + 13 * r
        for s in row:
            if s["kind"] == "line":
                dash = f' stroke-dasharray="{s["dash"]}"' if s.get("dash") else ""
                out.append(f'<line x1="{x:.1f}" x2="{x + 14:.1f}" y1="{y - 4}" y2="{y - 4}" '
                           f'stroke="{s["colour"]}" stroke-width="2"{dash}/>')
                if s.get("marker"):
                    out.append(_marker(s["marker"], x + 7, y - 4, s["colour"]))
            else:
                mark = _marker(s.get("marker", "dot"), x + 7, y - 4, s["colour"],
                               s.get("hollow", False))
                if s.get("opacity") is not None:  # faded as the series is
                    mark = f'<g opacity="{s["opacity"]}">{mark}</g>'
                out.append(mark)
            out.append(f'<text x="{x + 18:.1f}" y="{y}">{e(s["label"])}</text>')
            x += _legend_width(s)
    out.append("</svg>")
    return "".join(out)


def _legend_width(s: dict) -> float:
    return 28 + 6.0 * len(s["label"])  # about 6 px a character at font size 11


def _legend_rows(legend: Sequence[dict], room: float) -> list[list[dict]]:
    rows: list[list[dict]] = []
    used = room
    for s in legend:
        w = _legend_width(s)
        if used + w > room:
            rows.append([])
            used = 0.0
        rows[-1].append(s)
        used += w
    return rows


def _segments(xy: Sequence[tuple], gap: float | None) -> list[list[tuple[float, float]]]:
    """Finite points split where x jumps by more than ``gap`` (no line across a pause)."""
    segs: list[list[tuple[float, float]]] = [[]]
    for x, y in xy:
        if x is None or y is None or not (math.isfinite(x) and math.isfinite(y)):
            continue
        if gap is not None and segs[-1] and x - segs[-1][-1][0] > gap:
            segs.append([])
        segs[-1].append((x, y))
    return [s for s in segs if len(s) >= 2]


def _marker(kind: str, x: float, y: float, colour: str, hollow: bool = False) -> str:
    """One marker centred on (x, y); ``hollow`` draws the filled shapes as outlines."""
    fill = f'fill="none" stroke="{colour}" stroke-width="1.3"' if hollow else f'fill="{colour}"'
    if kind in ("cross", "plus"):
        d = 3.5
        if kind == "cross":
            path = (f"M{x - d:.1f},{y - d:.1f}L{x + d:.1f},{y + d:.1f}"
                    f"M{x - d:.1f},{y + d:.1f}L{x + d:.1f},{y - d:.1f}")
        else:
            d = 4.5
            path = (f"M{x - d:.1f},{y:.1f}L{x + d:.1f},{y:.1f}"
                    f"M{x:.1f},{y - d:.1f}L{x:.1f},{y + d:.1f}")
        return f'<path d="{path}" fill="none" stroke="{colour}" stroke-width="1.6"/>'
    if kind == "ring":
        return (f'<circle cx="{x:.1f}" cy="{y:.1f}" r="5" fill="none" stroke="{colour}" '
                'stroke-width="1.5"/>')
    if kind == "triangle":  # circumradius 6, inradius 3: a dot of radius 3 fits inside
        return (f'<path d="M{x:.1f},{y - 6:.1f}L{x + 5.2:.1f},{y + 3:.1f}L{x - 5.2:.1f},'
                f'{y + 3:.1f}Z" {fill}/>')
    if kind == "square":
        return f'<rect x="{x - 3:.1f}" y="{y - 3:.1f}" width="6" height="6" {fill}/>'
    if kind == "diamond":
        return (f'<path d="M{x:.1f},{y - 4:.1f}L{x + 4:.1f},{y:.1f}L{x:.1f},{y + 4:.1f}L'
                f'{x - 4:.1f},{y:.1f}Z" {fill}/>')
    return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="3" {fill}/>'


def langley_residuals(view: Any) -> list[tuple[Any, float]]:
    """Each drawn point of a session with its residual about the fitted line [ln V].

    ``ln V - (ln V0 - tau x)`` at the point's abscissa ``x``; empty without a line.
    """
    if view.ln_v0 is None or view.tau is None:
        return []
    return [(p, p.ln_v - (view.ln_v0 - view.tau * p.pos_x)) for p in view.points
            if p.ln_v is not None and p.pos_x is not None
            and math.isfinite(p.pos_x) and math.isfinite(p.ln_v)]


def _session_refused(v: Any) -> bool:
    return v.stored is not None and not v.accepted


def langley_svg(views: Sequence[Any], channel: str, wavelength_nm: float) -> str:
    """Both sessions of one channel and, under them, the residuals about each fitted line.

    Morning and afternoon differ in colour and in marker shape (:data:`SESSION_STYLE`);
    a refused session is drawn with faded markers and a dashed line; screened points
    are grey rings. The residual panel shares the air-mass axis: ln V minus the
    session's fitted line, in ln V (a relative signal difference for small values).
    """
    from daemon.commands.plot import EXCLUDED, REJECTED, USED

    series: list[dict[str, Any]] = []
    resid: list[dict[str, Any]] = []
    excluded: list[list[tuple[float, float]]] = []
    excluded_res: list[list[tuple[float, float]]] = []
    xs: list[float] = []
    ys: list[float] = []
    res_fit: list[float] = []
    for v in views:
        colour, used_marker, hollow, rejected_marker = SESSION_STYLE.get(
            v.session, ("#333333", "square", False, "cross"))
        refused = _session_refused(v)
        pts = [p for p in v.points if p.ln_v is not None and p.pos_x is not None
               and math.isfinite(p.pos_x) and math.isfinite(p.ln_v)]
        xs += [p.pos_x for p in pts]
        ys += [p.ln_v for p in pts]
        res = {p.measurement_id: r for p, r in langley_residuals(v)}
        tag = f"{v.session} (refused)" if refused else v.session
        for role, marker, label in ((USED, used_marker, f"{tag} used"),
                                    (REJECTED, rejected_marker, f"{tag} rejected")):
            sel = [p for p in pts if p.role == role]
            if not sel:
                continue
            style = {"kind": "points", "marker": marker, "colour": colour, "hollow": hollow,
                     "opacity": REFUSED_OPACITY if refused else None,
                     "group": {"session": v.session, "role": role,
                               "accepted": "no" if refused else "yes"}}
            series.append({**style, "xy": [(p.pos_x, p.ln_v) for p in sel], "label": label})
            if res:
                r = [(p.pos_x, res[p.measurement_id]) for p in sel]
                res_fit += [y for _, y in r]
                resid.append({**style, "xy": r, "label": None})
        # Screened points last: hollow rings on top stay visible over the other session.
        excluded.append([(p.pos_x, p.ln_v) for p in pts if p.role == EXCLUDED])
        excluded_res.append([(p.pos_x, res[p.measurement_id]) for p in pts
                             if p.role == EXCLUDED and p.measurement_id in res])
    if not xs:
        return "<p>No measurement with a positive signal.</p>"
    x_hi = math.ceil(2.0 * max(xs)) / 2.0
    for v in views:
        if v.ln_v0 is not None and v.tau is not None:
            ys += [v.ln_v0, v.ln_v0 - v.tau * x_hi]
            series.insert(0, {"kind": "line", "colour": SESSION_STYLE.get(v.session,
                                                                          ("#333333",))[0],
                              "xy": [(0.0, v.ln_v0), (x_hi, v.ln_v0 - v.tau * x_hi)],
                              "label": None, "width": 1.2,
                              "dash": REFUSED_DASH if _session_refused(v) else None,
                              "group": {"session": v.session, "role": "fit line"}})
    screened_style = {"kind": "points", "marker": "ring", "colour": EXCLUDED_COLOUR,
                      "group": {"role": EXCLUDED}}
    rings = [xy for group in excluded for xy in group]
    if rings:
        series.append({**screened_style, "xy": rings, "label": "screened"})
    rings_res = [xy for group in excluded_res for xy in group]
    if rings_res:
        resid.append({**screened_style, "xy": rings_res, "label": None})
    pad = 0.05 * (max(ys) - min(ys) or 1.0)
    x_label = views[0].x_label
    title = f"Langley plot, channel {channel} ({wavelength_nm:g} nm)"
    chart = svg_chart(series, (0.0, x_hi), (min(ys) - pad, max(ys) + pad), x_label,
                      f"{views[0].y_label} [ln(V / 1 V)]", title=title)
    if not resid:
        return chart + "<p>No fitted line: no residuals to show.</p>"
    # The residual axis is set by the points the fit saw (used and rejected); screened
    # points far off are clipped at the panel's edge.
    span = max([abs(y) for y in res_fit] + [1e-4]) * 1.15
    resid.insert(0, {"kind": "line", "colour": "#888888", "xy": [(0.0, 0.0), (x_hi, 0.0)],
                     "label": None, "width": 1.0})
    return chart + svg_chart(resid, (0.0, x_hi), (-span, span), x_label,
                             "residual [ln V]", title=f"Residuals, channel {channel}",
                             height=150)


def session_day(first_date: str, date: str, session: str) -> float:
    """A campaign session's time [days from ``first_date``'s midnight]."""
    days = (_dt.date.fromisoformat(date) - _dt.date.fromisoformat(first_date)).days
    return days + SESSION_DAY_FRACTION.get(session, 0.5)


def drift_line(channel: dict, first_date: str) -> tuple[tuple[float, float],
                                                         tuple[float, float]] | None:
    """The calibration's drift line of one channel over its kept sessions, as two
    (days from ``first_date``, V0 at 1 AU [V]) end points; None without a drift.

    The campaign fits V0 against time by least squares (:mod:`daemon.science.campaign`),
    so its line passes through the mean time of the kept sessions at their mean V0,
    the calibration's V0, with the slope ``V0 * drift / 100`` per year.
    """
    mean, drift = channel.get("v0_1au"), channel.get("drift_pct_per_year")
    kept = [session_day(first_date, s["date"], s["session"]) for s in channel["sessions"]
            if not s.get("flagged")]
    if mean is None or drift is None or not kept:
        return None
    t_mean = math.fsum(kept) / len(kept)
    per_day = mean * drift / 100.0 / DAYS_PER_YEAR
    return tuple((t, mean + per_day * (t - t_mean)) for t in (min(kept), max(kept)))


def drift_svg(channel: dict, first_date: str, last_date: str) -> str:
    """One channel's campaign: each session's V0 at 1 AU against its date (kept morning
    and afternoon sessions as in the Langley plots, flagged ones apart), the
    calibration's mean V0 across the campaign and its drift line."""
    sessions = channel["sessions"]
    span = max(1, (_dt.date.fromisoformat(last_date)
                   - _dt.date.fromisoformat(first_date)).days + 1)
    series: list[dict[str, Any]] = []
    ys = [s["v0_1au"] for s in sessions if s.get("v0_1au") is not None]
    for key, (colour, marker, hollow) in DRIFT_POINTS.items():
        xy = [(session_day(first_date, s["date"], s["session"]), s["v0_1au"])
              for s in sessions if s.get("v0_1au") is not None
              and (s.get("flagged") if key == "flagged"
                   else not s.get("flagged") and s["session"] == key)]
        if xy:
            series.append({"xy": xy, "kind": "points", "colour": colour, "marker": marker,
                           "hollow": hollow, "label": key,
                           "group": {"series": key, "channel": channel["channel"]}})
    mean = channel.get("v0_1au")
    if mean is not None:
        ys.append(mean)
        series.append({"xy": [(0.0, mean), (float(span), mean)], "kind": "line",
                       "colour": DRIFT_MEAN_COLOUR, "label": "mean",
                       "group": {"series": "mean", "channel": channel["channel"]}})
    line = drift_line(channel, first_date)
    if line is not None:
        ys += [v for _, v in line]
        colour, dash = DRIFT_LINE
        series.append({"xy": list(line), "kind": "line", "colour": colour, "dash": dash,
                       "width": 1.8,
                       "label": f"drift {channel['drift_pct_per_year']:+.2f} %/year",
                       "group": {"series": "drift", "channel": channel["channel"]}})
    lo, hi = (min(ys), max(ys)) if ys else (0.0, 1.0)
    pad = max((hi - lo) * 0.12, abs(hi) * 2e-4, 1e-9)
    # A tick at the middle of a date, labelled with it: month-day, or year-month when
    # the campaign crosses a new year; at most six, so the labels fit a phone.
    first = _dt.date.fromisoformat(first_date)
    long_form = first.year != _dt.date.fromisoformat(last_date).year
    step = next((m for m in (1, 2, 5, 7, 14, 30, 61, 91, 182) if span / m <= 6), 365)
    ticks = [(d + 0.5, (first + _dt.timedelta(days=d)).isoformat()[:7] if long_form
              else (first + _dt.timedelta(days=d)).isoformat()[5:])
             for d in range(0, span, step)]
    return svg_chart(series, (0.0, float(span)), (lo - pad, hi + pad), "local date",
                     "V0 at 1 AU [V]", x_ticks=ticks,
                     title=f"Campaign V0 at 1 AU, channel {channel['channel']} "
                           f"({channel['wavelength_nm']:g} nm)")


def housekeeping_svg(rows: Sequence[dict], tz, keys: Sequence[tuple[str, str, str, str]],
                     y_label: str, title: str) -> str:
    """Values against the site's local time of day: one line with its own colour and
    marker per ``(key, label, colour, marker)`` of ``keys``; rows carry ``time_utc``."""
    from daemon.commands.status import parse_utc

    def hours(iso: str) -> float:
        t = parse_utc(iso).astimezone(tz)
        return t.hour + t.minute / 60 + t.second / 3600

    series = []
    values = []
    times = [hours(r["time_utc"]) for r in rows]
    for key, label, colour, marker in keys:
        xy = [(h, r.get(key)) for h, r in zip(times, rows, strict=True)
              if r.get(key) is not None]
        values += [y for _, y in xy]
        if xy:
            series.append({"kind": "line", "xy": xy, "colour": colour, "label": label,
                           "break_gap": 1.0, "marker": marker, "group": {"series": key}})
            series.append({"kind": "points", "xy": xy, "colour": colour, "marker": marker,
                           "label": None, "group": {"series": key}})
    if not values:
        return "<p>No readings to draw.</p>"
    x0 = math.floor(min(times)) if times else 0.0
    x1 = math.ceil(max(times)) if times else 24.0
    if x1 <= x0:
        x1 = x0 + 1
    step = 1 if x1 - x0 <= 6 else 2 if x1 - x0 <= 12 else 3
    ticks = [(float(h), f"{h % 24:02d}:00") for h in range(int(x0), int(x1) + 1)
             if (h - int(x0)) % step == 0]
    lo, hi = min(values), max(values)
    pad = 0.08 * (hi - lo) if hi > lo else 0.5
    return svg_chart(series, (x0, x1), (lo - pad, hi + pad), f"local time ({tz.key})",
                     y_label, x_ticks=ticks, title=title, width=560, height=280)


# --------------------------------------------------------------------------- page

def _table(headers: Sequence[str], rows: Sequence[Sequence[Any]],
           numeric: Sequence[bool] = ()) -> str:
    e = html.escape
    numeric = list(numeric) + [False] * (len(headers) - len(numeric))
    head = "".join(f"<th>{e(h)}</th>" for h in headers)
    body = []
    for r in rows:
        cells = []
        for value, num in zip(r, numeric, strict=False):
            if isinstance(value, tuple):  # (text, css class)
                cells.append(f'<td class="{value[1]}">{e(str(value[0]))}</td>')
            else:
                # Long text keeps a readable column width; the table's box scrolls instead.
                css = " class=num" if num else " class=long" if len(str(value)) > 40 else ""
                cells.append(f"<td{css}>{e(str(value))}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    # Its own scroll box: a wide table scrolls sideways, never the page.
    thead = f"<thead><tr>{head}</tr></thead>" if any(headers) else ""
    return (f'<div class="scroll"><table>{thead}<tbody>{"".join(body)}</tbody></table>'
            "</div>")


def _stored_notes(conn, plan_date: str) -> dict[tuple[str, str], list[str]]:
    """The fit notes of each stored (session, channel) result of the day.

    A refused result's ``reasons`` carry its notes too (what the fit dropped or
    assumed): the report shows them apart, so the reasons say only why it was refused.
    """
    import json
    import sqlite3

    try:
        rows = conn.execute("SELECT session, channel, notes FROM session_results "
                            "WHERE plan_date = ?", (plan_date,)).fetchall()
    except sqlite3.OperationalError:  # a store older than the notes column
        return {}
    out = {}
    for session, channel, notes in rows:
        try:
            out[(session, channel)] = [str(n) for n in json.loads(notes or "[]")]
        except (TypeError, ValueError):
            out[(session, channel)] = []
    return out


def _reasons_only(reasons: Sequence[str], notes: Sequence[str]) -> list[str]:
    return [r for r in reasons if r not in notes]


def _v0_1au_text(stored: dict | None) -> str | None:
    """'V0 at 1 AU 2.45012 +/- 0.00123 V (0.050 %)': the results table's quantity."""
    if not stored or stored.get("v0_1au") is None:
        return None
    v0, rel = stored["v0_1au"], stored.get("v0_rel_unc")
    if rel is None:
        return f"V0 at 1 AU {v0:.5f} V (no uncertainty)"
    return f"V0 at 1 AU {v0:.5f} ± {v0 * rel:.5f} V ({100 * rel:.3f} %)"


def _caption(ch, vs: Sequence[Any], notes: dict) -> str:
    e = html.escape
    lines = []
    for v in vs:
        stored = v.stored
        text = _v0_1au_text(stored) or "no stored V0"
        if v.tau is not None and v.tau_is_optical_depth:
            text += f", tau {v.tau:.4f}"
        text += f", {v.n_used}/{len(v.points)} points used"
        fit_notes = notes.get((v.session, ch.name), [])
        if stored is not None and not v.accepted:
            why = _reasons_only(v.reasons, fit_notes)
            line = (f'<span class="refused">{e(v.session)} refused (dashed line, faded '
                    f"markers)</span>: {e(text)}" + (f"; why: {e('; '.join(why))}" if why else ""))
        else:
            line = f"{e(v.session)}: {e(text)}"
        every = list(fit_notes) + [n for n in v.notes if n not in fit_notes]
        if every:
            line += "<br>notes: " + e("; ".join(every))
        lines.append(f"<li>{line}</li>")
    return (f"Channel {e(ch.name)} ({ch.wavelength_nm:g} nm), residuals below"
            + (f"<ul>{''.join(lines)}</ul>" if lines else ""))


def _calibration_section(cal: dict | None, plan_date: str, db: str | Path, tz) -> list[str]:
    from daemon.commands.status import utc_local
    from daemon.commands.tables import fmt

    e = html.escape
    parts = ["<h2>Calibration</h2>"]
    if cal is None:
        parts.append(f"<p>No calibration in this store yet, so no aerosol optical depth. "
                     f"Run <code>heliotrope calibrate --from D1 --to D2 --db "
                     f"{e(str(db))}</code> over a campaign of clear days (see the README, "
                     f"\"The calibration engine\").</p>")
        return parts
    inside = cal["from"] <= plan_date <= cal["to"]
    parts.append(f'<p class="meta">Latest calibration (number {cal["id"]}), made '
                 f"{e(utc_local(cal['created_utc'], tz))} from the accepted sessions of "
                 f"{e(cal['from'])} to {e(cal['to'])}"
                 f"{' (this date is in the campaign)' if inside else ''}. V0 at 1 AU is the "
                 "mean of the sessions kept, its uncertainty the standard error; drift is "
                 "the trend of the session V0 over the campaign.</p>")
    rows = []
    for c in cal["channels"]:
        # n_sessions counts the sessions kept, n_flagged those left out
        # (daemon.science.campaign.ChannelCalibration).
        kept = c["n_sessions"]
        total = None if kept is None else kept + (c["n_flagged"] or 0)
        drift = ("-" if c["drift_pct_per_year"] is None else
                 f"{c['drift_pct_per_year']:+.2f} ± {fmt(c['drift_unc_pct_per_year'], '.2f')}")
        rows.append([c["channel"], fmt(c["wavelength_nm"], "g"), fmt(c["v0_1au"], ".5f"),
                     fmt(c["v0_1au_unc"], ".5f"), fmt(c["repeatability_pct"], ".3f"),
                     f"{fmt(kept, 'd')}/{fmt(total, 'd')}", drift,
                     ("yes", "yes") if c["usable"] else ("no", "no"),
                     "; ".join(c["reasons"])])
    parts.append(_table(["channel", "nm", "V0 at 1 AU [V]", "unc [V]", "repeatability [%]",
                         "sessions kept", "drift [%/year]", "usable", "why not"], rows,
                        [False, True, True, True, True, True, True]))
    charted = [c for c in cal["channels"] if c["sessions"]]
    if charted:
        parts.append("<p>Drift: each channel's campaign sessions (V0 at 1 AU), the "
                     "calibration's mean across the campaign and, with three kept sessions "
                     "on two dates or more, its drift line (the least-squares trend of the "
                     "kept sessions, through their mean).</p>")
        parts.append('<div class="charts">')
        for c in charted:
            kept = sum(1 for s in c["sessions"] if not s.get("flagged"))
            drift = ("no drift: fewer than three kept sessions on two dates"
                     if c["drift_pct_per_year"] is None else
                     f"drift {c['drift_pct_per_year']:+.2f} ± "
                     f"{fmt(c['drift_unc_pct_per_year'], '.2f')} %/year")
            parts.append(f"<figure>{drift_svg(c, cal['from'], cal['to'])}<figcaption>"
                         f"Channel {e(c['channel'])} ({c['wavelength_nm']:g} nm): {kept} of "
                         f"{len(c['sessions'])} sessions kept; {drift}</figcaption></figure>")
        parts.append("</div>")
    sessions = sorted({(s["date"], s["session"]) for c in cal["channels"]
                       for s in c["sessions"]})
    if sessions:
        names = [c["channel"] for c in cal["channels"]]
        dev = {(c["channel"], s["date"], s["session"]): s for c in cal["channels"]
               for s in c["sessions"]}
        srows = []
        for d, sess in sessions:
            row: list[Any] = [d, sess]
            for n in names:
                entry = dev.get((n, d, sess))
                if entry is None:
                    row.append("")
                elif entry.get("flagged"):
                    row.append((f"{fmt(entry.get('deviation_pct'), '+.2f')} flagged", "no"))
                else:
                    row.append(fmt(entry.get("deviation_pct"), "+.2f"))
            srows.append(row)
        parts.append("<p>Campaign sessions: each session's V0 at 1 AU against the "
                     "calibration's, in percent; flagged sessions were left out.</p>")
        parts.append(_table(["date", "session", *names], srows,
                            [False, False] + [True] * len(names)))
    for n in cal["notes"]:
        parts.append(f"<p>{e(n)}</p>")
    return parts


def _aod_section(rows: list[dict], tz, cal: dict | None) -> list[str]:
    from daemon.commands.tables import fmt

    e = html.escape
    parts = ["<h2>Aerosol optical depth</h2>"]
    if not rows:
        parts.append("<p>No aerosol optical depth for this date: "
                     + ("there is no calibration yet (see above)." if cal is None else
                        "the store has none for it (run <code>heliotrope calibrate</code> "
                        "over a range that includes this date to compute it).") + "</p>")
        return parts
    by_channel: dict[str, list[dict]] = {}
    for r in rows:
        by_channel.setdefault(r["channel"], []).append(r)
    order = sorted(by_channel, key=lambda c: by_channel[c][0]["wavelength_nm"])
    table = []
    for name in order:
        rs = by_channel[name]
        clean = [r["aod"] for r in rs if r["flag"] is None and r["aod"] is not None]
        unc = [r["aod_unc"] for r in rs if r["flag"] is None and r["aod_unc"] is not None]
        table.append([name, fmt(rs[0]["wavelength_nm"], "g"), str(len(clean)),
                      str(len(rs) - len(clean)),
                      fmt(math.fsum(clean) / len(clean) if clean else None, ".4f"),
                      fmt(min(clean) if clean else None, ".4f"),
                      fmt(max(clean) if clean else None, ".4f"),
                      fmt(math.fsum(unc) / len(unc) if unc else None, ".4f")])
    parts.append(f'<p class="meta">From calibration number {rows[0]["calibration_id"]}: '
                 "total optical depth minus Rayleigh and ozone, per measurement. Flagged "
                 "values (doubtful, for example a burst too variable for clear sky) are "
                 "counted but left out of the means and the chart.</p>")
    parts.append(_table(["channel", "nm", "values", "flagged", "mean AOD", "min", "max",
                         "mean unc"], table, [False, True, True, True, True, True, True, True]))
    alphas = {r["measurement_id"]: (r["angstrom_alpha"], r["angstrom_channels"]) for r in rows
              if r["angstrom_alpha"] is not None}
    if alphas:
        values = [a for a, _ in alphas.values()]
        pair = next(iter(alphas.values()))[1]
        mean = math.fsum(values) / len(values)
        sd = (math.sqrt(math.fsum((a - mean) ** 2 for a in values) / (len(values) - 1))
              if len(values) > 1 else None)
        parts.append(f"<p>Angstrom exponent ({e(' / '.join(pair or []))} nm pair): mean "
                     f"{mean:.3f}, standard deviation {fmt(sd, '.3f')}, over {len(values)} "
                     "measurements.</p>")
    else:
        parts.append("<p>No Angstrom exponent: no measurement has both channels of the "
                     "pair unflagged and positive.</p>")
    pivot: dict[int, dict[str, Any]] = {}
    for r in rows:
        if r["flag"] is None and r["aod"] is not None:
            pivot.setdefault(r["measurement_id"], {"time_utc": r["time_utc"]})[r["channel"]] = \
                r["aod"]
    keys = [(name, f"{name} nm", *CHANNEL_STYLES[i % len(CHANNEL_STYLES)])
            for i, name in enumerate(order)]
    parts.append('<div class="charts wide"><figure>'
                 + housekeeping_svg(sorted(pivot.values(), key=lambda r: r["time_utc"]), tz,
                                    keys, "aerosol optical depth [1]",
                                    "Aerosol optical depth through the day")
                 + "<figcaption>Aerosol optical depth of each unflagged measurement, per "
                   "channel</figcaption></figure></div>")
    return parts


def build_report(db: str | Path, config, plan_date: str, now: _dt.datetime) -> str:
    """The HTML page for one local date, from the store at ``db`` (read-only)."""
    from daemon.commands.plot import langley_view
    from daemon.commands.status import site_zone, software_version, utc_local
    from daemon.commands.tables import fmt
    from daemon.store.reader import (
        aod_between,
        day_housekeeping,
        day_measurements,
        events_between,
        open_readonly,
        results_between,
        session_points,
        stored_calibration,
        stored_plan,
    )

    conn = open_readonly(db)
    try:
        plan = stored_plan(conn, plan_date) or {}
        tz = site_zone(plan.get("timezone") or config.site.timezone)
        site = plan.get("site_name") or config.site.name
        results = results_between(conn, plan_date, plan_date)
        notes = _stored_notes(conn, plan_date)
        measurements = day_measurements(conn, plan_date)
        hk = day_housekeeping(conn, plan_date)
        d = _dt.date.fromisoformat(plan_date)
        start = _dt.datetime(d.year, d.month, d.day, tzinfo=tz)
        nxt = d + _dt.timedelta(days=1)
        end = _dt.datetime(nxt.year, nxt.month, nxt.day, tzinfo=tz)
        events = events_between(conn, start.astimezone(_dt.UTC).isoformat(),
                                end.astimezone(_dt.UTC).isoformat())
        points = {s: session_points(conn, plan_date, s) for s in ("am", "pm")}
        views = {ch.name: [langley_view(conn, config, plan_date, s, ch.name, points=points[s],
                                        results=results)
                           for s in ("am", "pm")] for ch in config.channels}
        calibration = stored_calibration(conn)
        aod = list(aod_between(conn, plan_date, plan_date))
    finally:
        conn.close()

    e = html.escape
    ok = sum(1 for m in measurements if m["status"] == "ok")
    failed = len(measurements) - ok
    accepted = sum(1 for r in results if r["accepted"])
    faults = [ev for ev in events if ev["level"] in ("warning", "error", "critical")]
    planned = len([t for t in plan.get("targets", []) if t.get("session") in ("am", "pm")])
    summary_rows = [
        ["site", site],
        ["date", f"{plan_date} (local time zone {tz.key})"],
        ["targets planned", str(planned) if plan else "no stored plan"],
        ["measurements", f"{ok} ok, {failed} failed"],
        ["session fits accepted", f"{accepted} of {len(results)}"],
        ["fault events", str(len(faults))],
        ["calibration", "none yet" if calibration is None else
         f"number {calibration['id']}, {calibration['from']} to {calibration['to']}"],
    ]
    if plan.get("sunrise_utc"):
        summary_rows.append(["sunrise, sunset", f"{utc_local(plan['sunrise_utc'], tz, False)}, "
                                                f"{utc_local(plan.get('sunset_utc'), tz, False)}"])
    parts = [
        "<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>heliotrope report {e(plan_date)}, {e(site)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>{e(site)}: {e(plan_date)}</h1>",
        f'<p class="meta">Daily report made {e(utc_local(now, tz))} by heliotrope '
        f"{e(software_version())} from {e(str(db))}. Times are UTC with the local time "
        f"({e(tz.key)}) beside them. Results are preliminary session fits.</p>",
        "<h2>Summary</h2>", '<div class="summary">',
        _table(["", ""], summary_rows),
        "</div>",
        "<h2>Session results</h2>",
    ]
    if results:
        rows = []
        for r in results:
            unc = None if r["v0_rel_unc"] is None else 100 * r["v0_rel_unc"]
            fit_notes = notes.get((r["session"], r["channel"]), [])
            rows.append([r["session"], r["channel"], fmt(r["wavelength_nm"], "g"),
                         fmt(r["v0_1au"], ".5f"), fmt(unc, ".3f"), fmt(r["tau"], ".4f"),
                         f"{r['n_used']}/{r['n_total']}",
                         ("yes", "yes") if r["accepted"] else ("no", "no"),
                         "; ".join(_reasons_only(r["reasons"], fit_notes)),
                         "; ".join(fit_notes)])
        parts.append(_table(["session", "channel", "nm", "V0 at 1 AU [V]", "unc [%]", "tau",
                             "used", "accepted", "why not", "notes"], rows,
                            [False, False, True, True, True, True, True]))
    else:
        parts.append("<p>No session results for this date.</p>")
    parts.append("<h2>Langley plots</h2>")
    parts.append('<p class="meta">ln V against air mass, as the session fit used it (dark, '
                 "temperature, ozone and pressure corrected). Morning: blue dots, afternoon: "
                 "open vermillion triangles (a morning dot at the same air mass shows inside "
                 "them); both are in the fit. Crosses (morning) and plus signs (afternoon) "
                 "were rejected by it, grey rings were screened out (no lock, saturated, "
                 "cloudy) or lie outside the fit window. A refused session has faded "
                 "markers and a dashed line. Lines: the stored session "
                 "fits, extrapolated to air mass zero (V0 at the day's Earth-Sun distance; "
                 "the captions give V0 at 1 AU, as the table). Under each plot, the "
                 "residuals about its session's line. A session fitted before the store "
                 "kept the fit's points is marked by fitting it again, and says so below "
                 "its plot.</p>")
    parts.append('<div class="charts">')
    for ch in config.channels:
        vs = [v for v in views[ch.name] if v.points]
        parts.append(f"<figure>{langley_svg(vs, ch.name, ch.wavelength_nm) if vs else ''}"
                     f"<figcaption>{_caption(ch, vs, notes)}</figcaption></figure>")
    parts.append("</div>")
    parts += _calibration_section(calibration, plan_date, db, tz)
    parts += _aod_section(aod, tz, calibration)
    parts.append("<h2>Housekeeping through the day</h2>")
    parts.append('<div class="charts wide">')
    parts.append("<figure>" + housekeeping_svg(hk, tz, HK_SERIES, "temperature [°C]",
                                               "Housekeeping temperatures")
                 + "<figcaption>Detector, case and ambient temperature at each "
                   "measurement</figcaption></figure>")
    parts.append("<figure>" + housekeeping_svg(
        hk, tz, (("supply_v", "supply", OKABE_ITO["black"], "dot"),), "supply [V]",
        "Supply voltage") + "<figcaption>Supply voltage at each measurement</figcaption>"
        "</figure>")
    parts.append("</div>")
    parts.append("<h2>Events</h2>")
    if events:
        rows = [[utc_local(ev["time_utc"], tz, False), (ev["level"], f"lvl-{ev['level']}"),
                 ev["kind"], ev["message"]] for ev in events]
        parts.append(_table(["time", "level", "kind", "message"], rows))
    else:
        parts.append("<p>No events on this date.</p>")
    parts.append("</body></html>\n")
    return "\n".join(parts)


def _has_measurements(db: str | Path, plan_date: str) -> bool:
    """Whether the store holds any measurement (ok or failed) of ``plan_date``."""
    from daemon.store.reader import day_measurements, open_readonly

    conn = open_readonly(db)
    try:
        return bool(day_measurements(conn, plan_date))
    finally:
        conn.close()


def cmd_report(args: argparse.Namespace) -> int:
    from daemon.commands.errors import (
        EX_CANTCREAT,
        EX_NOINPUT,
        EX_NOTHING,
        EX_USAGE,
        CommandError,
    )
    from daemon.commands.output import OutputPathError, check_out_path, publish
    from daemon.commands.plot import service_config
    from daemon.store.reader import StoreReadError

    config = service_config(args.config, args.db)
    out = Path(args.out).expanduser() if args.out else None
    if out is not None:
        try:
            check_out_path(out, Path(args.db).expanduser())
        except OutputPathError as exc:
            raise CommandError(str(exc), EX_USAGE) from None
    try:
        if not _has_measurements(args.db, args.date.isoformat()):
            raise CommandError(f"no measurements on {args.date} in {args.db}: nothing to "
                               "report; `heliotrope results` lists the dates the store "
                               "holds", EX_NOTHING)
        page = build_report(args.db, config, args.date.isoformat(), _dt.datetime.now(_dt.UTC))
    except StoreReadError as exc:
        raise CommandError(str(exc), EX_NOINPUT) from None
    if out is None:
        sys.stdout.write(page)
        return 0
    tmp = None
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{out.name}.", dir=out.parent)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(page)
        publish(tmp, out)
    except OSError as exc:
        raise CommandError(f"--out {out}: cannot write ({exc})", EX_CANTCREAT) from None
    finally:
        if tmp is not None:
            Path(tmp).unlink(missing_ok=True)
    print(f"report for {args.date} written to {out}", file=sys.stderr)
    return 0
