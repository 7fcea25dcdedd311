"""``heliotrope plot``: the Langley plot of one channel and session, in the terminal.

The session fit (:mod:`daemon.science.sessionfit`) stores, beside its result, every point of
the session as it fitted it (the ``fit_points`` table, read with
:func:`daemon.store.reader.fit_points`): the regressor x (air mass, or ``m^b`` for a
water-vapour channel), y (ln V after the dark, temperature, ozone and pressure
corrections, and for a water-vapour channel the known extinctions) and the point's
role (used, rejected as an outlier, outside the window, screened). The plot draws
exactly those points and the stored line through them: intercept ln V0 (V0 on the
day, not at 1 AU) and slope minus tau. A water-vapour channel stores no tau; its line
is the least-squares line of its own used points, which is the fit's line (the fit
is ordinary least squares on those very points).

A store written before the per-point records existed has no ``fit_points`` for its
sessions. The session fit cannot run here (its corrections import pvlib, which the
read commands never do), so for those the points are screened again and marked
used or rejected by fitting them again with :func:`daemon.science.langley.fit_session` and
the service's fit settings, without the small ozone and pressure corrections; a note
says so, and another when the recomputed number of points used differs from the
stored one. Without a stored result the recomputed line is drawn.

The terminal plot uses Unicode (Braille dots for the line, one glyph per point) and
fits 80 columns: ``●`` a point in the fit, ``×`` a point the fit rejected as an
outlier, ``○`` a point screened out before the fit or outside the air-mass window.
Where standard output cannot encode those characters (an ASCII locale, ``LC_ALL=C``)
the plot is drawn in plain ASCII instead: ``*`` used, ``x`` rejected, ``o`` screened
or outside, the line in ``-``, ``\\`` and ``/``, the axes in ``|``, ``-`` and ``+``.
``--png FILE`` draws the same with matplotlib (the ``plot`` extra). numpy is imported
for the fallback re-fit only; matplotlib only for ``--png``.
"""

from __future__ import annotations

import argparse
import math
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

PLOT_EXTRA_HINT = "install the plot extra: pip install 'heliotrope[plot]'"
USED, REJECTED, EXCLUDED = "used", "rejected", "excluded"
AIRMASS_LABEL = "air mass"
LN_V_LABEL = "ln V"
MARKS_STORED = "stored fit points"
MARKS_RECOMPUTED = "recomputed here"
# Stored roles (daemon.science.points.FIT_POINT_ROLES) as the plot marks them, and why.
_STORED_ROLES = {"used": (USED, None),
                 "rejected": (REJECTED, "rejected by the fit as an outlier"),
                 "outside": (EXCLUDED, "outside the fit's air-mass window, or no finite value"),
                 "unfitted": (EXCLUDED, "no line was fitted to this channel's session")}
_SCREENING_WHY = {"missing": "no samples of this channel",
                  "unlocked": "sun lock not confirmed or pointing error too large",
                  "saturated": "saturated",
                  "cloudy": "cloudy: burst too variable for a clear sky"}
GLYPHS = {USED: "●", REJECTED: "×", EXCLUDED: "○"}
ASCII_GLYPHS = {USED: "*", REJECTED: "x", EXCLUDED: "o"}
# The axis and legend characters: (y tick, y rule, x rule, x tick, corner, line legend).
_UNICODE_AXES = ("┤", "│", "─", "┬", "└", "⠒")
_ASCII_AXES = ("+", "|", "-", "+", "+", "-")
_PRIORITY = {EXCLUDED: 1, USED: 2, REJECTED: 3}  # which glyph wins a shared cell
# Braille dot bits by (column, row) inside one character cell (Unicode U+2800 block).
_BRAILLE = ((0x01, 0x02, 0x04, 0x40), (0x08, 0x10, 0x20, 0x80))


@dataclass(frozen=True)
class PlotPoint:
    """One measurement of the session as the plot shows it."""

    measurement_id: int
    time_utc: str
    airmass: float | None
    signal_v: float | None  # dark-corrected (and temperature-corrected) signal [V]
    role: str  # USED, REJECTED or EXCLUDED
    why: str | None = None  # why a point is excluded
    # With ``fitted`` the point is drawn at the stored (x, y) of the session fit;
    # otherwise at (air mass, ln signal_v).
    fitted: bool = False
    x: float | None = None
    y: float | None = None

    @property
    def ln_v(self) -> float | None:
        """The plotted ordinate [ln V]; None when there is none."""
        if self.fitted:
            return self.y
        if self.signal_v is None or not (self.signal_v > 0) or not math.isfinite(self.signal_v):
            return None
        return math.log(self.signal_v)

    @property
    def pos_x(self) -> float | None:
        """The plotted abscissa: the fit's regressor, else the air mass."""
        return self.x if self.fitted else self.airmass


@dataclass
class SessionView:
    """Everything one Langley plot shows: points, the fitted line and the stored result."""

    plan_date: str
    session: str
    channel: str
    wavelength_nm: float
    points: list[PlotPoint]
    ln_v0: float | None  # fitted intercept [ln V]; None without a fit
    tau: float | None  # minus the fitted slope
    v0: float | None
    v0_rel_unc: float | None
    n_used: int
    accepted: bool
    reasons: list[str]
    stored: dict[str, Any] | None  # the stored session result, if any
    site_name: str | None = None
    line_source: str | None = None  # where the drawn line comes from
    notes: list[str] = field(default_factory=list)
    marks_source: str = MARKS_RECOMPUTED  # where the points' roles and positions come from
    x_label: str = AIRMASS_LABEL  # the regressor: air mass, or m^b (water vapour)
    y_label: str = LN_V_LABEL

    @property
    def tau_is_optical_depth(self) -> bool:
        """False for a water-vapour channel, whose slope is against ``m^b``."""
        return self.x_label == AIRMASS_LABEL

    def line_text(self, short: bool = False) -> str:
        """The drawn line in words: V0 [V] and tau (or the slope against m^b)."""
        unc = (f" +/- {100 * self.v0_rel_unc:.3f} %"
               if self.v0_rel_unc is not None and not short else "")
        stored_1au = self.stored.get("v0_1au") if self.stored and not short else None
        at_1au = f" ({stored_1au:.5f} V at 1 AU)" if stored_1au is not None else ""
        slope = (f"tau {self.tau:.4f}" if self.tau_is_optical_depth
                 else f"slope {-self.tau:.4f} against {self.x_label}")
        return f"V0 {self.v0:.5f} V{unc}{at_1au}, {slope}"

    def to_dict(self) -> dict[str, Any]:
        return {"date": self.plan_date, "session": self.session, "channel": self.channel,
                "wavelength_nm": self.wavelength_nm,
                "fit": {"v0": self.v0, "ln_v0": self.ln_v0, "tau": self.tau,
                        "v0_rel_unc": self.v0_rel_unc, "n_used": self.n_used,
                        "n_total": len(self.points), "accepted": self.accepted,
                        "reasons": self.reasons},
                "line_source": self.line_source, "marks_source": self.marks_source,
                "x_label": self.x_label, "y_label": self.y_label,
                "stored": self.stored, "notes": self.notes,
                "points": [{"measurement_id": p.measurement_id, "time_utc": p.time_utc,
                            "airmass": p.airmass, "signal_v": p.signal_v, "x": p.pos_x,
                            "ln_v": p.ln_v, "role": p.role, "why": p.why}
                           for p in self.points]}


# --------------------------------------------------------------------------- recompute

def _time_text(p) -> str:
    return p.time_utc.isoformat(timespec="microseconds")


def _screen(points: list, channel, config) -> tuple[list[dict], list[PlotPoint]]:
    """Split the session's points as the session fit screens them
    (:func:`daemon.science.screening.point_signal`): the fit's inputs (dicts with the
    point, its air mass and its corrected signal), and the screened-out points."""
    from daemon.science.screening import point_signal, screened_signal

    kept: list[dict] = []
    screened: list[PlotPoint] = []
    for p in points:
        ps = point_signal(p, channel, config)
        if ps.screened == "missing":
            continue
        if ps.screened is not None:
            why = (f"cloudy: burst coefficient of variation above {config.fit.max_cv:g}"
                   if ps.screened == "cloudy" else _SCREENING_WHY[ps.screened])
            screened.append(PlotPoint(p.measurement_id, _time_text(p), p.airmass,
                                      screened_signal(p, channel), EXCLUDED, why))
            continue
        kept.append({"p": p, "airmass": math.nan if p.airmass is None else p.airmass,
                     "signal": ps.signal_v})
    return kept, screened


def langley_view(conn, config, plan_date: str, session: str, channel_name: str, *,
                 points: list | None = None, results: list[dict] | None = None) -> SessionView:
    """One channel's session: its points with their roles in the fit, and the fitted line.

    From the stored fit points when the store has them (exact marks, y as fitted);
    else, for sessions fitted before they were stored, by fitting the stored
    measurements again (see the module docstring).

    Parameters
    ----------
    conn : sqlite3.Connection
        A read-only store connection (:func:`daemon.store.reader.open_readonly`).
    config : daemon.config.settings.Config
        The service's configuration: channels, screening limits and fit settings.
    plan_date : str
        Local date of the plan, YYYY-MM-DD.
    session : str
        'am' or 'pm'.
    channel_name : str
        A channel named in the configuration.
    points, results : list, optional
        The session's :func:`daemon.store.reader.session_points` and the date's
        :func:`daemon.store.reader.results_between`, when the caller has read them
        already (a report draws every channel of both sessions from one read of each).
    """
    from daemon.store.reader import fit_points, results_between, session_points

    channel = config.channel(channel_name)
    raw = session_points(conn, plan_date, session) if points is None else points
    if results is None:
        results = results_between(conn, plan_date, plan_date)
    stored = next((r for r in results
                   if r["session"] == session and r["channel"] == channel_name), None)
    records = fit_points(conn, plan_date, session, channel_name)
    if records:
        return _stored_view(raw, records, stored, channel, config, plan_date, session)
    return _recomputed_view(raw, stored, channel, config, plan_date, session)


def _least_squares(xy: list[tuple[float, float]]) -> tuple[float, float] | None:
    """Intercept and slope of the ordinary least-squares line, None without a spread in x."""
    if len(xy) < 2:
        return None
    n = len(xy)
    x_mean = math.fsum(x for x, _ in xy) / n
    y_mean = math.fsum(y for _, y in xy) / n
    sxx = math.fsum((x - x_mean) ** 2 for x, _ in xy)
    if sxx == 0.0:
        return None
    slope = math.fsum((x - x_mean) * (y - y_mean) for x, y in xy) / sxx
    return y_mean - slope * x_mean, slope


def _regressor_label(points: list[PlotPoint]) -> str:
    """'air mass', or 'air mass^b' when the stored x is a power of the air mass."""
    exponents = []
    for p in points:
        if p.x is None or p.airmass is None or not (p.x > 0 and p.airmass > 1.05):
            continue
        if abs(p.x - p.airmass) > 1e-9 * p.airmass:
            exponents.append(math.log(p.x) / math.log(p.airmass))
    if not exponents:
        return AIRMASS_LABEL
    exponents.sort()
    return f"{AIRMASS_LABEL}^{exponents[len(exponents) // 2]:.3g}"


def _stored_view(raw: list, records: list[dict], stored: dict | None, channel, config,
                 plan_date: str, session: str) -> SessionView:
    """The view from the stored fit points: exact marks, y as the fit used it."""
    kept, screened = _screen(raw, channel, config)
    signal = {k["p"].measurement_id: k["signal"] for k in kept}
    signal.update({q.measurement_id: q.signal_v for q in screened})
    by_id = {p.measurement_id: p for p in raw}
    points = []
    for r in records:
        mid = r["measurement_id"]
        if r["role"] == "screened":
            role, why = EXCLUDED, _SCREENING_WHY.get(r["reason"], f"screened: {r['reason']}")
        else:
            role, why = _STORED_ROLES.get(r["role"], (EXCLUDED, r["role"]))
        p = by_id.get(mid)
        points.append(PlotPoint(mid, _time_text(p) if p else "", p.airmass if p else None,
                                signal.get(mid), role, why, fitted=True, x=r["x"], y=r["y"]))
    known = {r["measurement_id"] for r in records}
    late = [p for p in raw if p.measurement_id not in known]
    for p in late:
        points.append(PlotPoint(p.measurement_id, _time_text(p), p.airmass,
                                signal.get(p.measurement_id), EXCLUDED,
                                "not in the stored fit", fitted=True))
    points.sort(key=lambda q: (q.time_utc, q.measurement_id))
    n_used = sum(1 for q in points if q.role == USED)
    view = SessionView(
        plan_date=plan_date, session=session, channel=channel.name,
        wavelength_nm=channel.wavelength_nm, points=points, ln_v0=None, tau=None, v0=None,
        v0_rel_unc=None, n_used=n_used, accepted=False, reasons=[], stored=stored,
        marks_source=MARKS_STORED, x_label=_regressor_label(points))
    if view.x_label != AIRMASS_LABEL:
        view.y_label = "ln V + known extinction"
    if late:
        view.notes.append(f"{len(late)} measurement(s) of the session are not in the stored "
                          "fit (recorded after it?): not drawn")
    if stored is None:
        view.notes.append("fit points without a stored session result: no line drawn")
        return view
    view.v0, view.v0_rel_unc = stored["v0"], stored["v0_rel_unc"]
    view.accepted, view.reasons = stored["accepted"], list(stored["reasons"])
    if stored["n_used"] != n_used:
        view.notes.append(f"the stored result used {stored['n_used']} points but "
                          f"{n_used} are stored as used: the store is inconsistent")
    if stored["v0"] is None or not stored["v0"] > 0:
        return view
    if stored["tau"] is not None:
        # V0 is the day's (not 1 AU): the intercept of the fitted ln V.
        view.ln_v0, view.tau = math.log(stored["v0"]), stored["tau"]
        view.line_source = "stored session result"
        return view
    line = _least_squares([(q.x, q.y) for q in points if q.role == USED
                           and q.x is not None and q.y is not None])
    if line is not None:
        view.ln_v0, view.tau = line[0], -line[1]
        view.line_source = "least squares of the stored points used"
    return view


def _recomputed_view(raw: list, stored: dict | None, channel, config, plan_date: str,
                     session: str) -> SessionView:
    """The view of a session fitted before fit points were stored: marks recomputed."""
    import numpy as np

    from daemon.science.langley import WINDOW_EDGE_TOLERANCE, fit_session

    kept, screened = _screen(raw, channel, config)
    fit = fit_session(np.array([k["airmass"] for k in kept], dtype=float),
                      np.array([k["signal"] for k in kept], dtype=float), config.fit)
    lo = config.fit.airmass_min * (1 - WINDOW_EDGE_TOLERANCE)
    hi = config.fit.airmass_max * (1 + WINDOW_EDGE_TOLERANCE)
    points = list(screened)
    for k, used in zip(kept, fit.used, strict=True):
        p, m, v = k["p"], k["airmass"], k["signal"]
        if used:
            role, why = USED, None
        elif not (math.isfinite(m) and lo <= m <= hi):
            role, why = EXCLUDED, "outside the fit's air-mass window"
        elif not (math.isfinite(v) and v > 0):
            role, why = EXCLUDED, "signal zero or negative"
        else:
            role, why = REJECTED, "rejected by the fit as an outlier"
        points.append(PlotPoint(p.measurement_id, _time_text(p), p.airmass, v, role, why))
    points.sort(key=lambda q: (q.time_utc, q.measurement_id))
    view = SessionView(
        plan_date=plan_date, session=session, channel=channel.name,
        wavelength_nm=channel.wavelength_nm, points=points, ln_v0=None, tau=None, v0=None,
        v0_rel_unc=None, n_used=fit.n_used, accepted=fit.accepted, reasons=list(fit.reasons),
        stored=stored)
    if stored is not None:
        view.v0, view.v0_rel_unc = stored["v0"], stored["v0_rel_unc"]
        view.accepted, view.reasons = stored["accepted"], list(stored["reasons"])
        if stored["v0"] is not None and stored["v0"] > 0 and stored["tau"] is not None:
            view.ln_v0, view.tau = math.log(stored["v0"]), stored["tau"]
            view.line_source = "stored session result"
        view.notes.append("this session was fitted before the store kept the fit's points: "
                          "the marks come from fitting the points again here, without the "
                          "ozone and pressure corrections")
        if stored["n_used"] != fit.n_used:
            view.notes.append(f"the stored fit used {stored['n_used']} points, this "
                              f"recomputation {fit.n_used}: the marks may be off (the "
                              "configuration or the fit changed since the session was "
                              "fitted?)")
    elif math.isfinite(fit.ln_v0) and math.isfinite(fit.tau):
        view.ln_v0, view.tau, view.v0 = fit.ln_v0, fit.tau, fit.v0
        view.v0_rel_unc = fit.v0_rel_unc if math.isfinite(fit.v0_rel_unc) else None
        view.line_source = "recomputed here"
        view.notes.append("no stored result for this session yet: the line is fitted here")
    return view


# --------------------------------------------------------------------------- terminal

def _nice_range(lo: float, hi: float) -> tuple[float, float]:
    if hi <= lo:
        pad = abs(lo) * 0.05 or 0.05
        return lo - pad, hi + pad
    pad = 0.04 * (hi - lo)
    return lo - pad, hi + pad


def stream_takes_unicode(stream: Any) -> bool:
    """True when ``stream``'s encoding can write the plot's Unicode characters.

    Tried by encoding every glyph, axis and Braille character the plot uses, because
    an encoding's name alone does not say (``latin-1`` has ``×`` but not ``●``).
    """
    encoding = getattr(stream, "encoding", None) or "ascii"
    sample = ("".join(GLYPHS.values()) + "".join(_UNICODE_AXES)
              + "".join(chr(0x2800 + b) for b in range(256)))
    try:
        sample.encode(encoding)
    except (UnicodeEncodeError, LookupError):
        return False
    return True


def render_terminal(view: SessionView, width: int = 80, height: int = 16,
                    ascii_only: bool = False) -> str:
    """The Langley plot as text: at most ``width`` columns, ``height`` plot rows.

    ln V [ln(V/1 V)] against air mass (or the water-vapour fit's ``m^b``) from 0, so
    the fitted line runs back to its intercept ln V0 at air mass zero. With
    ``ascii_only`` every character is ASCII (see the module docstring).
    """
    glyphs = ASCII_GLYPHS if ascii_only else GLYPHS
    tick_mark, rule, x_rule, x_tick, corner, line_mark = (
        _ASCII_AXES if ascii_only else _UNICODE_AXES)
    label_w = 8
    plot_w = max(20, width - label_w - 2)
    plot_h = max(6, height)
    head = [f"Langley plot {view.plan_date} {view.session}, channel {view.channel} "
            f"({view.wavelength_nm:g} nm)"
            + (f", {view.site_name}" if view.site_name else "")]
    if view.ln_v0 is not None and view.v0 is not None:
        head.append(view.line_text())
    plotted = [p for p in view.points if p.ln_v is not None and p.pos_x is not None
               and math.isfinite(p.pos_x) and math.isfinite(p.ln_v)]
    n_plotted = len(plotted)
    head.append(f"{view.n_used} of {len(view.points)} points in the fit, "
                f"{'accepted' if view.accepted else 'NOT accepted'}"
                + (f"; line: {view.line_source}" if view.line_source else ""))
    if not plotted:
        return "\n".join(head + ["nothing to plot: no point with a value to draw"]
                         + [f"note: {n}" for n in view.notes])
    x_hi = max(p.pos_x for p in plotted)
    x_lo = 0.0 if view.ln_v0 is not None else math.floor(min(p.pos_x for p in plotted))
    x_hi = math.ceil(2.0 * x_hi) / 2.0  # a target measured just past m = 6 keeps the axis at 6.5
    if x_hi <= x_lo:
        x_hi = x_lo + 1.0
    ys = [p.ln_v for p in plotted]
    if view.ln_v0 is not None:
        ys += [view.ln_v0 - view.tau * x_lo, view.ln_v0 - view.tau * x_hi]
    y_lo, y_hi = _nice_range(min(ys), max(ys))

    dots_w, dots_h = 2 * plot_w, 4 * plot_h

    def dot_x(x: float) -> int:
        return min(dots_w - 1, max(0, round((x - x_lo) / (x_hi - x_lo) * (dots_w - 1))))

    def dot_y(y: float) -> int:
        return min(dots_h - 1, max(0, round((y_hi - y) / (y_hi - y_lo) * (dots_h - 1))))

    bits = [[0] * plot_w for _ in range(plot_h)]
    if view.ln_v0 is not None:
        prev = None
        for px in range(dots_w):
            x = x_lo + px / (dots_w - 1) * (x_hi - x_lo)
            py = dot_y(view.ln_v0 - view.tau * x)
            lo_y, hi_y = (py, py) if prev is None else (min(prev, py), max(prev, py))
            for yy in range(lo_y, hi_y + 1):
                bits[yy // 4][px // 2] |= _BRAILLE[px % 2][yy % 4]
            prev = py
    glyph: dict[tuple[int, int], str] = {}
    for p in plotted:
        cell = (dot_y(p.ln_v) // 4, dot_x(p.pos_x) // 2)
        if cell not in glyph or _PRIORITY[p.role] > _PRIORITY[glyph[cell]]:
            glyph[cell] = p.role

    digits = 4 if (y_hi - y_lo) < 0.2 else 3
    label_rows = {0: y_hi, plot_h // 2: y_hi - (plot_h // 2) / (plot_h - 1) * (y_hi - y_lo),
                  plot_h - 1: y_lo}
    lines = head + [" " * max(0, label_w - 4) + view.y_label]
    for row in range(plot_h):
        label = f"{label_rows[row]:.{digits}f}" if row in label_rows else ""
        tick = tick_mark if row in label_rows else rule
        cells = []
        for col in range(plot_w):
            role = glyph.get((row, col))
            if role is not None:
                cells.append(glyphs[role])
            elif bits[row][col] and ascii_only:
                cells.append(_ascii_line(bits[row][col], view.tau or 0.0))
            elif bits[row][col]:
                cells.append(chr(0x2800 + bits[row][col]))
            else:
                cells.append(" ")
        lines.append(f"{label:>{label_w}} {tick}" + "".join(cells).rstrip())
    axis = [x_rule] * plot_w
    tick_labels = [" "] * (plot_w + 4)
    for m in range(int(x_lo), int(math.floor(x_hi)) + 1):
        col = dot_x(float(m)) // 2
        axis[col] = x_tick
        text = str(m)
        start = max(0, col - len(text) // 2)
        tick_labels[start:start + len(text)] = list(text)
    lines.append(" " * label_w + " " + corner + "".join(axis))
    lines.append(" " * (label_w + 2) + "".join(tick_labels).rstrip())
    lines.append(" " * (label_w + 2 + plot_w // 2 - len(view.x_label) // 2) + view.x_label)
    lines.append(f"{glyphs[USED]} in the fit  {glyphs[REJECTED]} rejected by the fit  "
                 f"{glyphs[EXCLUDED]} screened or outside the window  "
                 + (f"{line_mark} fit" if view.ln_v0 is not None else ""))
    if n_plotted < len(view.points):
        lines.append(f"{len(view.points) - n_plotted} point(s) without a positive signal "
                     "or a finite value are not drawn")
    lines += [f"note: {n}" for n in view.notes]
    return "\n".join(_wrap(line, width) for line in lines)


def _ascii_line(cell_bits: int, tau: float) -> str:
    """The ASCII stand-in for one cell of the Braille line: ``-`` where the line stays
    within two dot rows of the cell, else ``\\`` falling (tau > 0) or ``/`` rising."""
    rows = {r for column in _BRAILLE for r, bit in enumerate(column) if cell_bits & bit}
    if max(rows) - min(rows) <= 1:
        return "-"
    return "\\" if tau > 0 else "/"


def _wrap(line: str, width: int) -> str:
    """Break a text line at spaces so that no line is wider than ``width``."""
    if len(line) <= width:
        return line
    out, current = [], ""
    for word in line.split(" "):
        candidate = f"{current} {word}" if current else word
        if len(candidate) > width and current:
            out.append(current)
            current = "  " + word
        else:
            current = candidate
    out.append(current)
    return "\n".join(part[:width] for part in out)


# --------------------------------------------------------------------------- PNG

def render_png(views: list[SessionView], path: Path) -> None:
    """Draw the views side by side into a PNG file (matplotlib, Agg backend)."""
    try:
        import matplotlib
    except ImportError:
        raise ImportError(PLOT_EXTRA_HINT) from None
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, len(views), figsize=(6 * len(views), 4.5), squeeze=False)
    styles = {USED: dict(marker="o", color="tab:blue", label="in the fit"),
              REJECTED: dict(marker="x", color="tab:red", label="rejected by the fit"),
              EXCLUDED: dict(marker="o", mfc="none", color="tab:gray",
                             label="screened or outside the window")}
    for ax, view in zip(axes[0], views, strict=True):
        for role, style in styles.items():
            pts = [p for p in view.points if p.role == role and p.ln_v is not None
                   and p.pos_x is not None]
            if pts:
                ax.plot([p.pos_x for p in pts], [p.ln_v for p in pts], linestyle="none",
                        **style)
        if view.ln_v0 is not None:
            x_hi = max([p.pos_x for p in view.points if p.pos_x is not None] + [1.0])
            label = (f"fit: {view.line_text(short=True)}" if view.v0 is not None else "fit")
            ax.plot([0.0, x_hi], [view.ln_v0, view.ln_v0 - view.tau * x_hi], color="k",
                    linewidth=1, label=label)
        ax.set_xlim(left=0.0)
        ax.set_xlabel(view.x_label)
        ax.set_ylabel(f"{view.y_label} [ln(V / 1 V)]")
        ax.set_title(f"{view.plan_date} {view.session}, channel {view.channel} "
                     f"({view.wavelength_nm:g} nm)")
        ax.grid(alpha=0.3)
        ax.legend(fontsize="small")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


# --------------------------------------------------------------------------- command

def service_config(path: str | None, db: str | Path | None = None):
    """The configuration for the plot and the report: ``--config``, else the one the
    store recorded, else the service's file (CommandError if bad)."""
    from daemon.commands.storedconfig import choose_config

    return choose_config(path, db, "The plot and the report need the service's "
                         "configuration (channels, screening and fit settings)").config


def session_views(db: str | Path, config, plan_date: str, channel: str,
                  sessions: tuple[str, ...]) -> list[SessionView]:
    """The views of one channel for the given sessions that have points, from a store."""
    from daemon.store.reader import open_readonly, stored_plan

    conn = open_readonly(db)
    try:
        plan = stored_plan(conn, plan_date)
        views = []
        for session in sessions:
            view = langley_view(conn, config, plan_date, session, channel)
            view.site_name = (plan or {}).get("site_name") or config.site.name
            if view.points or len(sessions) == 1:
                views.append(view)
        return views
    finally:
        conn.close()


def cmd_plot(args: argparse.Namespace) -> int:
    from daemon.commands.errors import EX_NOINPUT, EX_UNAVAILABLE, EX_USAGE, CommandError
    from daemon.commands.tables import dumps
    from daemon.store.reader import StoreReadError

    config = service_config(args.config, args.db)
    names = [ch.name for ch in config.channels]
    if args.channel not in names:
        raise CommandError(f"--channel {args.channel!r} is not in {config.source}; "
                           f"choose one of {', '.join(names)}", EX_USAGE)
    png = Path(args.png).expanduser() if args.png else None
    if png is not None:
        import importlib.util
        if importlib.util.find_spec("matplotlib") is None:
            raise CommandError(PLOT_EXTRA_HINT, EX_UNAVAILABLE)
        from daemon.commands.output import OutputPathError, check_out_path
        try:
            check_out_path(png, Path(args.db).expanduser())
        except OutputPathError as exc:
            raise CommandError(str(exc).replace("--out", "--png"), EX_USAGE) from None
    sessions = (args.session,) if args.session else ("am", "pm")
    try:
        views = session_views(args.db, config, args.date.isoformat(), args.channel, sessions)
    except StoreReadError as exc:
        raise CommandError(str(exc), EX_NOINPUT) from None
    if not views:
        raise CommandError(f"no measurements of {args.date} in {args.db}; "
                           "`heliotrope results` lists the dates with results", EX_NOINPUT)
    if args.json:
        print(dumps({"plots": [v.to_dict() for v in views]}))
    else:
        ascii_only = not stream_takes_unicode(sys.stdout)
        text = "\n\n".join(render_terminal(v, ascii_only=ascii_only) for v in views)
        if ascii_only:
            # A site name or note outside the stream's encoding must not crash the plot.
            encoding = getattr(sys.stdout, "encoding", None) or "ascii"
            try:
                text = text.encode(encoding, "replace").decode(encoding)
            except LookupError:
                text = text.encode("ascii", "replace").decode("ascii")
        print(text)
    if png is not None:
        try:
            render_png(views, png)
        except ImportError:
            raise CommandError(PLOT_EXTRA_HINT, EX_UNAVAILABLE) from None
        print(f"PNG written to {png}", file=sys.stderr)
    return 0
