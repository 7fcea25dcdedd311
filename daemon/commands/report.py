"""``heliotrope report``: one self-contained HTML page about one day.

The page needs no other file, script or font: styles are inline in the head and the
charts are inline SVG. It shows a summary, the session results, a Langley plot per
channel (both sessions, as :mod:`daemon.commands.plot` marks the points), the housekeeping
temperatures and supply voltage through the day, and the day's events. Times are UTC
with the site's local time beside them.

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

_CLIP_IDS = itertools.count(1)
SESSION_COLOURS = {"am": "#1f5fa6", "pm": "#c2561a"}
EXCLUDED_COLOUR = "#555555"
HK_SERIES = (("detector_temp_c", "detector", "#b2182b"), ("case_temp_c", "case", "#e08214"),
             ("ambient_temp_c", "ambient", "#2166ac"))

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,"DejaVu Sans",sans-serif;
margin:0 auto;max-width:1120px;padding:16px 24px;color:#1b1b1b;background:#fff}
h1{font-size:1.5em;margin:.2em 0}h2{font-size:1.15em;margin:1.4em 0 .4em;
border-bottom:1px solid #ccc;padding-bottom:.2em}
.meta{color:#555;font-size:.9em}
table{border-collapse:collapse;font-size:.88em;margin:.4em 0}
th,td{padding:3px 8px;border-bottom:1px solid #e4e4e4;text-align:left;vertical-align:top}
th{background:#f3f3f3}td.num{text-align:right;font-variant-numeric:tabular-nums}
.no{color:#b2182b;font-weight:600}.yes{color:#1a7a3a}
.lvl-warning{color:#9a5b00}.lvl-error,.lvl-critical{color:#b2182b;font-weight:600}
.charts{display:grid;grid-template-columns:repeat(auto-fill,minmax(350px,1fr));gap:12px}
.charts.wide{grid-template-columns:repeat(auto-fill,minmax(520px,1fr))}
figure{margin:0;border:1px solid #e4e4e4;padding:6px}
figcaption{font-size:.85em;color:#333;margin-top:2px}
svg{display:block;width:100%;height:auto}
.summary td:first-child{color:#555}
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
    'points'), ``colour``, ``marker`` ('dot', 'cross' or 'ring', for points) and
    ``label`` (shown in the legend; None hides it).
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
        if s["kind"] == "line" and len(pts) >= 2:
            for seg in _segments(s["xy"], s.get("break_gap")):
                path = " ".join(f"{sx(x):.1f},{sy(y):.1f}" for x, y in seg)
                out.append(f'<polyline points="{path}" fill="none" stroke="{c}" '
                           f'stroke-width="{s.get("width", 1.4)}"/>')
        elif s["kind"] == "points":
            for x, y in pts:
                out.append(_marker(s.get("marker", "dot"), x, y, c))
    out.append("</g>")
    # The legend runs along the top margin, so it never hides a point.
    for r, row in enumerate(rows):
        x, y = float(left), 14.0 + 13 * r
        for s in row:
            if s["kind"] == "line":
                out.append(f'<line x1="{x:.1f}" x2="{x + 14:.1f}" y1="{y - 4}" y2="{y - 4}" '
                           f'stroke="{s["colour"]}" stroke-width="2"/>')
            else:
                out.append(_marker(s.get("marker", "dot"), x + 7, y - 4, s["colour"]))
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


def _marker(kind: str, x: float, y: float, colour: str) -> str:
    if kind == "cross":
        d = 3.5
        return (f'<path d="M{x - d:.1f},{y - d:.1f}L{x + d:.1f},{y + d:.1f}M{x - d:.1f},'
                f'{y + d:.1f}L{x + d:.1f},{y - d:.1f}" stroke="{colour}" stroke-width="1.6"/>')
    if kind == "ring":
        return (f'<circle cx="{x:.1f}" cy="{y:.1f}" r="5" fill="none" stroke="{colour}" '
                'stroke-width="1.5"/>')
    return f'<circle cx="{x:.1f}" cy="{y:.1f}" r="3" fill="{colour}"/>'


def langley_svg(views: Sequence[Any], channel: str, wavelength_nm: float) -> str:
    """Both sessions of one channel: points by role, the fitted lines back to m = 0."""
    from daemon.commands.plot import EXCLUDED, REJECTED, USED

    series: list[dict[str, Any]] = []
    excluded: list[list[tuple[float, float]]] = []
    xs: list[float] = []
    ys: list[float] = []
    for v in views:
        colour = SESSION_COLOURS.get(v.session, "#333")
        pts = [p for p in v.points if p.ln_v is not None and p.pos_x is not None
               and math.isfinite(p.pos_x) and math.isfinite(p.ln_v)]
        xs += [p.pos_x for p in pts]
        ys += [p.ln_v for p in pts]
        for role, marker, label in ((USED, "dot", f"{v.session} used"),
                                    (REJECTED, "cross", f"{v.session} rejected")):
            sel = [(p.pos_x, p.ln_v) for p in pts if p.role == role]
            if sel:
                series.append({"kind": "points", "xy": sel, "marker": marker, "colour": colour,
                               "label": label})
        # Screened points last: hollow rings on top stay visible over the other session.
        excluded.append([(p.pos_x, p.ln_v) for p in pts if p.role == EXCLUDED])
    if not xs:
        return "<p>No measurement with a positive signal.</p>"
    x_hi = math.ceil(2.0 * max(xs)) / 2.0
    for v in views:
        if v.ln_v0 is not None:
            ys += [v.ln_v0, v.ln_v0 - v.tau * x_hi]
            series.insert(0, {"kind": "line", "colour": SESSION_COLOURS.get(v.session, "#333"),
                              "xy": [(0.0, v.ln_v0), (x_hi, v.ln_v0 - v.tau * x_hi)],
                              "label": None, "width": 1.2})
    rings = [xy for group in excluded for xy in group]
    if rings:
        series.append({"kind": "points", "xy": rings, "marker": "ring",
                       "colour": EXCLUDED_COLOUR, "label": "screened"})
    pad = 0.05 * (max(ys) - min(ys) or 1.0)
    return svg_chart(series, (0.0, x_hi), (min(ys) - pad, max(ys) + pad), views[0].x_label,
                     f"{views[0].y_label} [ln(V / 1 V)]",
                     title=f"Langley plot, channel {channel} ({wavelength_nm:g} nm)")


def housekeeping_svg(rows: Sequence[dict], tz, keys: Sequence[tuple[str, str, str]],
                     y_label: str, title: str) -> str:
    """Housekeeping values against the site's local time of day."""
    from daemon.commands.status import parse_utc

    def hours(iso: str) -> float:
        t = parse_utc(iso).astimezone(tz)
        return t.hour + t.minute / 60 + t.second / 3600

    series = []
    values = []
    times = [hours(r["time_utc"]) for r in rows]
    for key, label, colour in keys:
        xy = [(h, r[key]) for h, r in zip(times, rows, strict=True) if r[key] is not None]
        values += [y for _, y in xy]
        if xy:
            series.append({"kind": "line", "xy": xy, "colour": colour, "label": label,
                           "break_gap": 1.0})
            series.append({"kind": "points", "xy": xy, "colour": colour, "marker": "dot",
                           "label": None})
    if not values:
        return "<p>No housekeeping readings.</p>"
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
                cells.append(f'<td{" class=num" if num else ""}>{e(str(value))}</td>')
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def build_report(db: str | Path, config, plan_date: str, now: _dt.datetime) -> str:
    """The HTML page for one local date, from the store at ``db`` (read-only)."""
    from daemon.commands.plot import langley_view
    from daemon.commands.status import site_zone, software_version, utc_local
    from daemon.commands.tables import fmt
    from daemon.store.reader import (
        day_housekeeping,
        day_measurements,
        events_between,
        open_readonly,
        results_between,
        stored_plan,
    )

    conn = open_readonly(db)
    try:
        plan = stored_plan(conn, plan_date) or {}
        tz = site_zone(plan.get("timezone") or config.site.timezone)
        site = plan.get("site_name") or config.site.name
        results = results_between(conn, plan_date, plan_date)
        measurements = day_measurements(conn, plan_date)
        hk = day_housekeeping(conn, plan_date)
        d = _dt.date.fromisoformat(plan_date)
        start = _dt.datetime(d.year, d.month, d.day, tzinfo=tz)
        nxt = d + _dt.timedelta(days=1)
        end = _dt.datetime(nxt.year, nxt.month, nxt.day, tzinfo=tz)
        events = events_between(conn, start.astimezone(_dt.UTC).isoformat(),
                                end.astimezone(_dt.UTC).isoformat())
        views = {ch.name: [langley_view(conn, config, plan_date, s, ch.name)
                           for s in ("am", "pm")] for ch in config.channels}
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
        _table(["", ""], summary_rows).replace("<thead><tr><th></th><th></th></tr></thead>", ""),
        "</div>",
        "<h2>Session results</h2>",
    ]
    if results:
        rows = []
        for r in results:
            unc = None if r["v0_rel_unc"] is None else 100 * r["v0_rel_unc"]
            rows.append([r["session"], r["channel"], fmt(r["wavelength_nm"], "g"),
                         fmt(r["v0_1au"], ".5f"), fmt(unc, ".3f"), fmt(r["tau"], ".4f"),
                         f"{r['n_used']}/{r['n_total']}",
                         ("yes", "yes") if r["accepted"] else ("no", "no"),
                         "; ".join(r["reasons"])])
        parts.append(_table(["session", "channel", "nm", "V0 at 1 AU [V]", "unc [%]", "tau",
                             "used", "accepted", "why not"], rows,
                            [False, False, True, True, True, True, True]))
    else:
        parts.append("<p>No session results for this date.</p>")
    parts.append("<h2>Langley plots</h2>")
    parts.append('<p class="meta">ln V against air mass, as the session fit used it (dark, '
                 "temperature, ozone and pressure corrected); filled dots are in the fit, "
                 "crosses were rejected by it, grey rings were screened out (no lock, "
                 "saturated, cloudy) or lie outside the fit window. Lines: the stored session "
                 "fits, extrapolated to air mass zero. A session fitted before the store kept "
                 "the fit's points is marked by fitting it again, and says so below its "
                 "plot.</p>")
    parts.append('<div class="charts">')
    for ch in config.channels:
        vs = [v for v in views[ch.name] if v.points]
        notes = [f"{v.session}: {n}" for v in vs for n in v.notes]
        caption = f"Channel {ch.name} ({ch.wavelength_nm:g} nm)"
        for v in vs:
            if v.v0 is not None:
                caption += (f"; {v.session} V0 {v.v0:.5f} V"
                            + (f", tau {v.tau:.4f}" if v.tau is not None
                               and v.tau_is_optical_depth else ""))
        parts.append(f"<figure>{langley_svg(vs, ch.name, ch.wavelength_nm) if vs else ''}"
                     f"<figcaption>{e(caption)}"
                     + "".join(f"<br>{e(n)}" for n in notes) + "</figcaption></figure>")
    parts.append("</div>")
    parts.append("<h2>Housekeeping through the day</h2>")
    parts.append('<div class="charts wide">')
    parts.append("<figure>" + housekeeping_svg(hk, tz, HK_SERIES, "temperature [°C]",
                                               "Housekeeping temperatures")
                 + "<figcaption>Detector, case and ambient temperature at each "
                   "measurement</figcaption></figure>")
    parts.append("<figure>" + housekeeping_svg(hk, tz, (("supply_v", "supply", "#4d4d4d"),),
                                               "supply [V]", "Supply voltage")
                 + "<figcaption>Supply voltage at each measurement</figcaption></figure>")
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


def cmd_report(args: argparse.Namespace) -> int:
    from daemon.commands.errors import EX_CANTCREAT, EX_NOINPUT, EX_USAGE, CommandError
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
