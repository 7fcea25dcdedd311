"""Langley fit accuracy and speed over simulated Pico Sereno sessions.

For each scenario (clear, cirrus, hazy drift; see tests/langley_sessions.py) and many
seeds, every half-day is fitted by:

- ours: the daemon's session fit (screening, ozone and pressure corrections, window,
  iterative rejection, acceptance criteria, uncertainty), all sessions and the
  accepted ones apart;
- polyfit: a plain least-squares line (``numpy.polyfit``) through the same screened,
  corrected points in the same window;
- Theil-Sen and Huber: robust lines from scikit-learn (``TheilSenRegressor``,
  ``HuberRegressor``) through the same points (the ``bench`` extra; skipped when
  scikit-learn is not installed).

It prints the V0-at-1-AU error per scenario (rms and median absolute, percent, over
all channels and sessions), the share of accepted sessions whose error lies within
three stated uncertainties, the comparison lines' errors on the sessions our fit
accepted ("(same)"), the repeatability of the clear-day V0 per channel, and
the time for 10,000 single-channel session fits.

    .venv/bin/python benchmarks/bench_fit.py [--seeds 5] [--days 20]
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from daemon.science.langley import WINDOW_EDGE_TOLERANCE, fit_session  # noqa: E402
from daemon.science.sessionfit import (  # noqa: E402
    ChannelSeries,
    apply_day_check,
    extinction_corrections,
    fit_series,
)
from tests.langley_sessions import SCENARIOS, days, pico_config, simulate_session  # noqa: E402

try:
    from sklearn.linear_model import HuberRegressor, TheilSenRegressor
except ImportError:  # the bench extra is optional
    HuberRegressor = TheilSenRegressor = None


def series_of(s, config) -> dict[str, ChannelSeries]:
    """The session as the daemon's screening leaves it (burst CV screen, dark off)."""
    net = s.net_signal()
    cv = s.burst_cv()
    hours = np.array([t.timestamp() / 3600.0 for t in s.times])
    out = {}
    for j, name in enumerate(s.channels):
        keep = cv[:, j] <= config.fit.max_cv
        n_cloudy = int((~keep).sum())
        notes = [f"{n_cloudy} bursts screened as cloudy"] if n_cloudy else []
        out[name] = ChannelSeries(s.airmass[keep], s.ozone_airmass[keep], s.pressure_hpa[keep],
                                  net[keep, j], s.earth_sun_factor[keep], len(s.times),
                                  notes, hours[keep])
    return out


def comparison_v0(series: ChannelSeries, channel, config) -> dict[str, float]:
    """V0 at 1 AU from the comparison lines through the same corrected points."""
    ext = extinction_corrections(series, channel, config)
    lo, hi = config.fit.airmass_min, config.fit.airmass_max
    m = series.airmass
    inside = ((m >= lo * (1 - WINDOW_EDGE_TOLERANCE)) & (m <= hi * (1 + WINDOW_EDGE_TOLERANCE))
              & (series.signal_v > 0))
    out = {}
    if inside.sum() < 3:
        return out
    x = m[inside]
    y = np.log(series.signal_v[inside]) + ext.ln_correction[inside]
    factor = float(series.earth_sun_factor[inside].mean())
    out["polyfit"] = math.exp(np.polyfit(x, y, 1)[1]) / factor
    if TheilSenRegressor is not None:
        ts = TheilSenRegressor(random_state=0).fit(x[:, None], y)
        out["theil-sen"] = math.exp(float(ts.intercept_)) / factor
        hb = HuberRegressor().fit(x[:, None], y)
        out["huber"] = math.exp(float(hb.intercept_)) / factor
    return out


def accuracy(n_seeds: int, n_days: int) -> None:
    config = pico_config()
    channels = {c.name: c for c in config.channels}
    methods = ["ours (all)", "ours (accepted)", "polyfit", "theil-sen", "huber",
               "polyfit (same)", "theil-sen (same)", "huber (same)"]
    print(f"V0 at 1 AU error, {n_seeds} seeds x {n_days} days x am/pm x 6 channels "
          "[percent]")
    print(f"{'scenario':9} {'method':16} {'n':>5} {'rms':>7} {'median':>7} {'max':>7}")
    clear_v0: dict[str, list[float]] = {name: [] for name in channels}
    for scenario in SCENARIOS:
        err: dict[str, list[float]] = {k: [] for k in methods}
        z: list[float] = []
        n_sessions = 0
        for seed in range(n_seeds):
            for day in days(n_days):
                fitted = []
                for session in ("am", "pm"):
                    s = simulate_session(day, session, scenario, seed)
                    n_sessions += 1
                    series = series_of(s, config)
                    fitted.append((s, series, fit_series(series, config, s.date, session)))
                # the afternoon fit's same-day check, as in the service
                apply_day_check(fitted[0][2], fitted[1][2], config.fit)
                for s, series, rows in fitted:
                    for r in rows:
                        truth = s.v0_1au_true[r["channel"]]
                        others = comparison_v0(series[r["channel"]], channels[r["channel"]],
                                               config)
                        for k, v0 in others.items():
                            err[k].append(math.log(v0 / truth))
                            if r["accepted"]:
                                err[f"{k} (same)"].append(math.log(v0 / truth))
                        if r["v0_1au"] is not None and math.isfinite(r["v0_1au"]):
                            e = math.log(r["v0_1au"] / truth)
                            err["ours (all)"].append(e)
                            if r["accepted"]:
                                err["ours (accepted)"].append(e)
                                z.append(e / r["v0_rel_unc"])
                                if scenario == "clear":
                                    clear_v0[r["channel"]].append(r["v0_1au"] / truth)
        for k in methods:
            e = np.abs(np.array(err[k])) * 100
            if e.size == 0:
                print(f"{scenario:9} {k:16} {0:5d}       -       -       -")
                continue
            print(f"{scenario:9} {k:16} {e.size:5d} {np.sqrt(np.mean(e**2)):7.3f} "
                  f"{np.median(e):7.3f} {e.max():7.3f}")
        zz = np.abs(np.array(z))
        share = float(np.mean(zz <= 3.0)) if zz.size else float("nan")
        print(f"{scenario:9} accepted {len(z)} of {n_sessions * 6} channel-sessions; "
              f"within 3 stated uncertainties: {100 * share:.1f} %; "
              f"rms(error/uncertainty) {float(np.sqrt(np.mean(zz**2))):.2f}")
    print("clear-day repeatability of accepted V0 at 1 AU [percent rms]: "
          + ", ".join(f"{k} {100 * float(np.std(v, ddof=1)):.3f}"
                      for k, v in clear_v0.items() if len(v) > 1))


def speed(n: int = 10_000) -> None:
    config = pico_config()
    s = simulate_session(days(1)[0], "am", "clear", 0)
    series = series_of(s, config)
    ch = config.channels[2]
    ser = series[ch.name]
    ext = extinction_corrections(ser, ch, config)
    fit_session(ser.airmass, ser.signal_v, config.fit, ln_correction=ext.ln_correction,
                hours=ser.hours)
    t0 = time.perf_counter()
    for _ in range(n):
        fit_session(ser.airmass, ser.signal_v, config.fit, ln_correction=ext.ln_correction,
                    tau_floor=ext.tau_rayleigh + ext.tau_ozone, hours=ser.hours)
    core = time.perf_counter() - t0
    t0 = time.perf_counter()
    for _ in range(n // 6):
        fit_series(series, config, s.date, "am")
    full = time.perf_counter() - t0
    print(f"{n} single-channel session fits ({ser.airmass.size} points): {core:.2f} s "
          f"({1e3 * core / n:.3f} ms each)")
    print(f"{n // 6} six-channel session fits with corrections: {full:.2f} s "
          f"({1e3 * full / (n // 6):.2f} ms each)")


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--seeds", type=int, default=5)
    p.add_argument("--days", type=int, default=20)
    args = p.parse_args()
    if TheilSenRegressor is None:
        print("scikit-learn not installed (pip install -e '.[bench]'): robust comparison "
              "lines skipped")
    accuracy(args.seeds, args.days)
    speed()
    return 0


if __name__ == "__main__":
    sys.exit(main())
