"""The daemon's Langley fit on the simulator's independent sky.

The sky (:mod:`sim_instrument.spectral_sky`, scenario ``pico-sereno-independent``)
shares no formula with the fitter: filters integrated over ASTM G173, Rayleigh with
the site's gravity, SPECTRL2 ozone and water vapour, aerosol and water vapour on
layer air masses. Each case is an ensemble of half-days (25 days x am/pm = 50
sessions by default), fitted by the daemon's pure fit
(:func:`daemon.science.sessionfit.fit_series`, via tests/independent_sky.py) and,
beside it, by a plain ``numpy.polyfit`` line through the same corrected points (for
940 nm: against m^0.6, the fixed exponent used before filters).

Cases: stable; slowly varying (a 6 h sinusoid of 30 % in the aerosol); noon-peaked
haze (+0.03 at 500 nm, 2 h wide); cirrus (a 25 min and a 20 min band, optical depth
0.05 and 0.08, patchy); a pressure ramp (-1 hPa/h); a western site (150 W) whose
afternoon crosses 00 h UTC; the stable sky with its aerosol layer at either end of the
heights the uncertainty budget spans (0.5 and 3 km,
``daemon.science.sessionfit.AEROSOL_SCALE_HEIGHTS_KM``); 940 nm at 0.2, 0.5, 1.0 and
2.0 cm.

Per case and channel it prints, first for each session fitted alone: sessions, the
accepted share, our V0-at-1-AU error (mean and rms over all sessions; percent), the
median stated uncertainty, the rms of error/uncertainty over all sessions and over
the accepted ones and its largest magnitude among those (z_max); then as the service
states it: after the afternoon's same-day
check (:func:`daemon.science.sessionfit.apply_day_check`: a disagreeing pair refused,
both sessions widened for their disagreement), the accepted share, the median stated
uncertainty and rms(error/uncertainty) of the accepted sessions; then the same with
a stored campaign's repeatability as drift allowance (``--prior-days`` earlier days
of the same kind of sky, other seeds, fitted and day-checked as the service does,
combined by :func:`daemon.science.campaign.campaign` as ``heliotrope calibrate``
stores it, and handed to the fit by
:func:`daemon.science.campaign.drift_repeatability` as the service's
``campaign_repeatability`` does); and polyfit's rms error.

With ``--widening`` it prints, per case and channel, how the statistical term's
widening for residuals correlated along the air mass
(:func:`daemon.science.langley.residual_correlation`) acted on the sessions fitted
alone: the share widened, the median and largest factor, rms(error/uncertainty) as
stated and with that one factor taken out, and the 90 % interval of the true rms that
the stated one allows from this many sessions (chi-square with one degree of freedom
per session, for normal errors; common practice, no source); and the same for
white noise (numpy normal deviates) on a line of 17 and of 41 points.

    nice -n 10 .venv/bin/python benchmarks/bench_independent_sky.py [--days 25]
        [--noise 0.001] [--prior-days 10] [--cases stable,sinusoid,...] [--widening]
"""

from __future__ import annotations

import argparse
import copy
import datetime as dt
import math
import sys
import time
from dataclasses import asdict, replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from daemon.science.langley import chi2_quantile, fit_line, residual_correlation  # noqa: E402
from daemon.science.sessionfit import (  # noqa: E402
    AEROSOL_SCALE_HEIGHTS_KM,
    ROLE_USED,
    aerosol_at,
    apply_day_check,
    extinction_corrections,
    fit_series,
)
from sim_instrument.scenario import Cloud, load_scenario  # noqa: E402
from sim_instrument.sessions import session_series  # noqa: E402
from tests.independent_sky import (  # noqa: E402
    channel_series,
    config_for,
    days,
    v0_error,
)

WINDOW = ("380", "440", "500", "675", "870", "1020")


def cases(base):
    atm, site, weather = base.atmosphere, base.site, base.weather
    yield "stable", base, WINDOW + ("940",)
    yield "sinusoid", replace(base, atmosphere=replace(atm, aerosol_wave=0.3,
                                                       aerosol_wave_period_h=6.0)), WINDOW
    yield "noon haze", replace(base, atmosphere=replace(atm, aerosol_noon_peak=0.03,
                                                        aerosol_noon_peak_width_h=2.0)), WINDOW
    yield "cirrus", replace(base, atmosphere=replace(atm, clouds=(
        Cloud(from_solar_h=7.9, until_solar_h=8.3, optical_depth=0.05, patchiness=0.4,
              cell_s=900.0),
        Cloud(from_solar_h=16.1, until_solar_h=16.4, optical_depth=0.08, patchiness=0.4,
              cell_s=600.0)))), WINDOW
    yield "pressure ramp", replace(base, weather=replace(weather,
                                                         pressure_trend_hpa_per_h=-1.0)), WINDOW
    yield "west 150W", replace(base, site=replace(site, longitude_deg=-150.0)), WINDOW
    # The stable sky with its aerosol at either end of the heights the budget's
    # aerosol_layer_airmass term spans (the stable sky's 1.5 km is near the middle).
    for h in AEROSOL_SCALE_HEIGHTS_KM:
        yield f"aerosol {h:g} km", replace(base, atmosphere=replace(
            atm, aerosol_scale_height_km=h)), WINDOW
    for w in (0.2, 0.5, 1.0, 2.0):
        yield f"940 {w:.1f} cm", replace(base, atmosphere=replace(
            atm, precipitable_water_cm=w)), ("940",)


def polyfit_v0(by_channel, name, config, rows) -> float:
    """V0 at 1 AU from numpy.polyfit through the same corrected points in the window."""
    s = by_channel[name]
    ch = config.channel(name)
    ext = extinction_corrections(s, ch, config)
    lo, hi = config.fit.airmass_min, config.fit.airmass_max
    inside = (s.airmass >= lo) & (s.airmass <= hi) & (s.signal_v > 0)
    y = np.log(s.signal_v) + ext.ln_correction
    x = s.airmass
    if ch.water_vapour:
        aerosol = {config.channel(n).wavelength_nm: r["tau_aerosol"] for n, r in rows.items()
                   if n != name and r["accepted"] and r["tau_aerosol"] is not None
                   and math.isfinite(r["tau_aerosol"])}
        tau_a = aerosol_at(ch.wavelength_nm, aerosol)
        if tau_a is None:
            return math.nan
        tau_o3 = 0.0 if math.isnan(ext.tau_ozone) else ext.tau_ozone
        y = np.log(s.signal_v) + ext.tau_rayleigh * s.airmass * s.pressure_hpa / \
            ext.reference_pressure_hpa + tau_o3 * s.ozone_airmass + tau_a[0] * s.airmass
        x = s.airmass ** 0.6
    if inside.sum() < 3:
        return math.nan
    return math.exp(np.polyfit(x[inside], y[inside], 1)[1]) / float(
        s.earth_sun_factor[inside].mean())


def day_rows(scen, config, day, seed: int, noise: float, repeatability=None):
    """One day's two sessions as the service fits them: (series, channel series, rows
    alone, rows after the same-day check) per session."""
    out = {}
    for session in ("am", "pm"):
        series = session_series(scen, day, session, seed=seed, burst_noise_relative=noise)
        by_channel = channel_series(series, config)
        rows = fit_series(by_channel, config, series.local_date.isoformat(), session,
                          repeatability)
        out[session] = [series, by_channel, copy.deepcopy(rows), rows]
    apply_day_check(out["am"][3], out["pm"][3], config.fit)
    return out


def stored_repeatability(scen, config, n_days: int, noise: float) -> dict[str, float]:
    """What ``heliotrope calibrate`` would store from a prior campaign on the same kind of
    sky: ``n_days`` other days (other seeds), fitted and day-checked as the service does."""
    from daemon.science.campaign import campaign, drift_repeatability

    rows = []
    for i, d in enumerate(days(n_days, dt.date(2025, 6, 1))):
        for _, _, _, checked in day_rows(scen, config, d, 1000 + i, noise).values():
            rows.extend(checked)
    # What daemon.station.fitting.campaign_repeatability hands the session fit.
    return drift_repeatability([asdict(c) for c in campaign(rows, config)], rows)


def widening(row: dict) -> float:
    """The factor the fit widened ``row``'s statistical term by, recomputed from its used
    points as :func:`daemon.science.langley.fit_session` does (1 when not widened)."""
    pts = [p for p in row.get("fit_points", ()) if p["role"] == ROLE_USED]
    if len(pts) < 3:
        return 1.0
    x = np.array([p["x"] for p in pts])
    y = np.array([p["y"] for p in pts])
    line = fit_line(x, y)
    order = np.argsort(x, kind="stable")
    return residual_correlation(x[order], (y - line.intercept - line.slope * x)[order]).inflation


def unwidened(row: dict, factor: float) -> float:
    """``row``'s stated uncertainty with its statistical term not widened."""
    u = row["v0_rel_unc"]
    stat = (row.get("uncertainty_budget") or {}).get("statistical", 0.0)
    return math.sqrt(max(u * u - stat * stat, 0.0) + (stat / factor) ** 2)


def rms_interval(rms: float, n: int, level: float = 0.90) -> tuple[float, float]:
    """Interval of the true rms of normal z that an observed ``rms`` over ``n`` allows."""
    tail = (1.0 - level) / 2.0
    return (rms * math.sqrt(n / chi2_quantile(1.0 - tail, n)),
            rms * math.sqrt(n / chi2_quantile(tail, n)))


def white_noise_widening(n_points: int, n_series: int = 3000, seed: int = 5) -> str:
    """How the widening acts on white noise over a line of ``n_points`` air masses 2 to 6:
    numpy normal deviates, the daemon's line fit and widening; one line of text."""
    rng = np.random.default_rng(seed)
    x = np.linspace(2.0, 6.0, n_points)
    factors, z_stated, z_plain = [], [], []
    for _ in range(n_series):
        y = rng.standard_normal(n_points)
        line = fit_line(x, y)
        f = residual_correlation(x, y - line.intercept - line.slope * x).inflation
        factors.append(f)
        z_plain.append(line.intercept / line.se_intercept)
        z_stated.append(z_plain[-1] / f)
    f = np.asarray(factors)
    # A t distribution with n - 2 degrees of freedom has rms sqrt(nu / (nu - 2))
    # (common practice, no source): what the unwidened error should give.
    nu = n_points - 2
    return (f"white noise, {n_points} points, {n_series} series: widened "
            f"{100 * np.mean(f > 1):.0f} %, "
            f"median {np.median(f[f > 1]):.2f}, 95th percentile {np.percentile(f, 95):.2f}, "
            f"largest {f.max():.2f}; rms(error/uncertainty) {_rms(z_stated):.3f} widened, "
            f"{_rms(z_plain):.3f} unwidened (t with {nu} dof: {math.sqrt(nu / (nu - 2)):.3f})")


def _max_abs(a) -> float:
    a = np.asarray(a, dtype=float)
    return float(np.max(np.abs(a))) if a.size else math.nan


def _rms(a) -> float:
    a = np.asarray(a, dtype=float)
    return float(np.sqrt(np.mean(np.square(a)))) if a.size else math.nan


def run(n_days: int, noise: float, prior_days: int, wanted: set[str] | None,
        show_widening: bool = False) -> None:
    base = load_scenario("pico-sereno-independent")
    print(f"Independent sky, {n_days} days x am/pm per case, burst-mean noise "
          f"{100 * noise:.2f} %; V0 at 1 AU errors in percent; 'day' = after the same-day "
          f"check, 'camp' = with the repeatability of a prior {prior_days}-day campaign "
          "and the same-day check")
    print(f"{'case':14} {'ch':>5} {'n':>3} {'acc':>5} {'mean':>7} {'rms':>6} {'u_med':>6} "
          f"{'z_all':>6} {'z_acc':>6} {'z_max':>6} | {'acc':>5} {'u_med':>6} {'z_acc':>6} | "
          f"{'acc':>5} {'u_med':>6} {'z_acc':>6} | {'polyfit':>8}")
    t0 = time.perf_counter()
    n_fits = 0
    for label, scen, names in cases(base):
        if wanted and label not in wanted:
            continue
        config = config_for(scen)
        rep = stored_repeatability(scen, config, prior_days, noise) if prior_days else None
        n_fits += 2 * prior_days
        res = {n: {k: [] for k in ("err", "u", "acc", "u_day", "acc_day", "u_camp",
                                   "acc_camp", "poly", "factor", "u_plain")} for n in names}
        for d in days(n_days):
            first = day_rows(scen, config, d, 11, noise)
            camp = day_rows(scen, config, d, 11, noise, rep) if rep else None
            n_fits += 4 if rep else 2
            for session, (series, by_channel, alone, checked) in first.items():
                alone_by = {r["channel"]: r for r in alone}
                checked_by = {r["channel"]: r for r in checked}
                camp_by = {r["channel"]: r for r in camp[session][3]} if camp else {}
                for n in names:
                    row, r = alone_by[n], res[n]
                    v0 = row["v0_1au"]
                    r["err"].append(v0_error(row, series) if v0 is not None and
                                    math.isfinite(v0) else math.nan)
                    r["u"].append(row["v0_rel_unc"] if row["v0_rel_unc"] is not None
                                  else math.nan)
                    r["acc"].append(bool(row["accepted"]))
                    if show_widening:
                        f = widening(row)
                        r["factor"].append(f)
                        r["u_plain"].append(unwidened(row, f))
                    r["u_day"].append(checked_by[n]["v0_rel_unc"])
                    r["acc_day"].append(bool(checked_by[n]["accepted"]))
                    c = camp_by.get(n, checked_by[n])
                    r["u_camp"].append(c["v0_rel_unc"])
                    r["acc_camp"].append(bool(c["accepted"]))
                    pv = polyfit_v0(by_channel, n, config, alone_by)
                    r["poly"].append(pv / series.truth[n].v0_1au_v - 1.0)
        for n in names:
            r = {k: np.asarray(v, dtype=float) for k, v in res[n].items()}
            ok = np.isfinite(r["err"]) & np.isfinite(r["u"]) & (r["u"] > 0)
            acc = r["acc"].astype(bool)
            cols = []
            for u_key, a_key in (("u_day", "acc_day"), ("u_camp", "acc_camp")):
                a = r[a_key].astype(bool) & ok
                u_med = float(np.median(r[u_key][a])) if a.any() else math.nan
                cols.append(f"{100 * a.mean():4.0f}% {100 * u_med:6.3f} "
                            f"{_rms(r['err'][a] / r[u_key][a]):6.2f}")
            poly = r["poly"][np.isfinite(r["poly"])]
            print(f"{label:14} {n:>5} {len(acc):3d} {100 * acc.mean():4.0f}% "
                  f"{100 * np.nanmean(r['err']):+7.3f} {100 * _rms(r['err'][ok]):6.3f} "
                  f"{100 * np.nanmedian(r['u']):6.3f} {_rms(r['err'][ok] / r['u'][ok]):6.2f} "
                  f"{_rms(r['err'][ok & acc] / r['u'][ok & acc]):6.2f} "
                  f"{_max_abs(r['err'][ok & acc] / r['u'][ok & acc]):6.2f} | {cols[0]} | "
                  f"{cols[1]} | {100 * _rms(poly):8.3f}")
        if show_widening:
            print(f"{'':14} widening of the statistical term, sessions alone: channel, share "
                  "widened, median and largest factor, z_all as stated [90 % interval] and "
                  "unwidened")
            for n in names:
                r = {k: np.asarray(v, dtype=float) for k, v in res[n].items()}
                ok = np.isfinite(r["err"]) & np.isfinite(r["u"]) & (r["u"] > 0)
                f = r["factor"][ok]
                wide = f > 1.0
                z = _rms(r["err"][ok] / r["u"][ok])
                lo, hi = rms_interval(z, int(ok.sum()))
                med = float(np.median(f[wide])) if wide.any() else 1.0
                print(f"{'':14} {n:>5} {100 * wide.mean():4.0f}% {med:5.2f} {f.max():5.2f} "
                      f"{z:6.2f} [{lo:4.2f}-{hi:4.2f}] "
                      f"{_rms(r['err'][ok] / r['u_plain'][ok]):6.2f}")
        if rep:
            print(f"{'':14} stored repeatability [%]: " + ", ".join(
                f"{k} {100 * v:.3f}" for k, v in rep.items()))
    dt_s = time.perf_counter() - t0
    if show_widening:
        for k in (17, 41):  # the demo's planned session, this benchmark's sessions
            print(white_noise_widening(k))
    print(f"{n_fits} simulated and fitted sessions in {dt_s:.1f} s "
          f"({1000 * dt_s / max(n_fits, 1):.0f} ms each, simulation included)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--days", type=int, default=25, help="days per case (x2 sessions)")
    ap.add_argument("--noise", type=float, default=0.001,
                    help="relative noise of a burst mean (0.0005-0.002)")
    ap.add_argument("--prior-days", type=int, default=10,
                    help="days of the prior campaign whose repeatability the service uses "
                         "(0: none)")
    ap.add_argument("--cases", default="",
                    help="comma-separated case labels to run (default all)")
    ap.add_argument("--widening", action="store_true",
                    help="also print how the correlation widening acted on each channel")
    args = ap.parse_args()
    wanted = {c.strip() for c in args.cases.split(",") if c.strip()} or None
    run(args.days, args.noise, args.prior_days, wanted, args.widening)


if __name__ == "__main__":
    main()
