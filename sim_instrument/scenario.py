"""Scenarios: the site, sky, instrument and tracker the simulator pretends to be.

A scenario is a YAML file (loaded with ``yaml.safe_load``); every key is checked
for type and range, and unknown keys are rejected so that a typo never silently
falls back to a default. ``load_scenario("pico-sereno-clear")`` finds a bare name
in ``sim_instrument/scenarios/<name>.yaml``; anything with a path separator or a
``.yaml``/``.yml`` suffix is taken as a path.

Layout (units in the key names; "(x)" marks an optional key and its default)::

    description: free text                        # (empty)
    start_utc: 2025-02-12T12:30:00Z               # instrument clock at start-up
    site: {name, latitude_deg, longitude_deg, elevation_m,
           pressure_hpa (standard atmosphere at elevation_m), temperature_c}
    weather:                                      # (all defaults)
      ambient_diurnal_range_k (10), humidity_pct (35), humidity_diurnal_range_pct (40),
      wind_m_s (2), wind_diurnal_range_m_s (0), wind_gust_sd_m_s (0),
      pressure_tide_hpa (0), pressure_trend_hpa_per_h (0), supply_v (12.6)
    atmosphere:
      ozone_du, aerosol_tau_500, angstrom_alpha,
      aerosol_drift_per_h (0), aerosol_drift_from_solar_h (6),
      aerosol_drift_until_solar_h (12), aerosol_variability (0),
      aerosol_variability_period_s (900), precipitable_water_cm (1.0),
      aerosol_wave (0), aerosol_wave_period_h (6),     # relative sinusoid, random phase
      aerosol_noon_peak (0), aerosol_noon_peak_width_h (1.5),  # haze peaking at noon
      sky (independent | reference), aerosol_scale_height_km (1.5),
      water_vapour_scale_height_km (2.0)
      clouds: [{from_solar_h, until_solar_h, optical_depth, patchiness (0),
                cell_s (600)}, ...]                # ([])
    instrument:
      model, serial, firmware, full_scale_v, sample_interval_s,
      field_of_view_deg (2.5)
      noise: {relative, read_v, shot_v (0)}
      thermal: {detector_regulated (true), detector_setpoint_c (25),
                regulation_leak (0.02), case_sun_heating_k (6),
                unregulated_offset_k (1), dark_doubling_k (8)}   # (all defaults)
      channels:
        - {name, wavelength_nm, bandwidth_nm (10), v0_1au_v, dark_v,
           temp_coeff_per_k (0), reference_temp_c (25)}            # spectral
        - {name, kind: broadband, responsivity_v_per_w_m2, dark_v,
           temp_coeff_per_k (0), reference_temp_c (25)}            # direct beam, SPECTRL2
    tracker: {model, serial, firmware, slew_rate_deg_s, capture_range_deg,
              lock_pointing_error_deg, park_azimuth_deg (0), park_elevation_deg (90),
              wind_pointing_error_deg_per_m_s (0), min_direct_fraction_for_lock (0.3)}
    faults:                                       # (none)
      late_reply_s (3)
      line: {garble, drop, truncate, corrupt, stale, late}   # probability per reply
      events: [{kind, at_solar_h, device (radiometer), duration_s (0)}, ...]

Times of day are local mean solar time in hours (``*_solar_h``), so a scenario's
morning is a morning on whatever date the host sets the instrument clock to.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pvlib
import yaml

from sim_instrument import filters, sky
from sim_instrument.faults import EVENT_KINDS, FaultEvent, FaultPlan, LineFaults

SCENARIO_DIR = Path(__file__).resolve().parent / "scenarios"

_IDENT_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9 ._+/-]{0,39}$")
_CHANNEL_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,15}$")


class ScenarioError(ValueError):
    """A scenario file is missing, unreadable or wrong; the message says where and why."""


@dataclass(frozen=True)
class Site:
    name: str
    latitude_deg: float
    longitude_deg: float  # east positive
    elevation_m: float
    pressure_hpa: float
    temperature_c: float


@dataclass(frozen=True)
class Weather:
    ambient_diurnal_range_k: float = 10.0  # coldest to warmest of the day [K]
    humidity_pct: float = 35.0  # daily mean relative humidity [%]
    humidity_diurnal_range_pct: float = 40.0  # most to least humid [%]
    wind_m_s: float = 2.0  # daily mean wind speed [m/s]
    wind_diurnal_range_m_s: float = 0.0  # calmest to windiest (windiest mid-afternoon)
    wind_gust_sd_m_s: float = 0.0  # short-term variability [m/s]
    pressure_tide_hpa: float = 0.0  # semidiurnal tide amplitude [hPa]
    pressure_trend_hpa_per_h: float = 0.0  # weather: a steady change through the day
    supply_v: float = 12.6  # station supply [V]


@dataclass(frozen=True)
class Cloud:
    """A cloud layer over the sun from ``from_solar_h`` to ``until_solar_h`` [h]."""

    from_solar_h: float
    until_solar_h: float
    optical_depth: float  # grey vertical optical depth of the layer
    patchiness: float = 0.0  # relative standard deviation of its optical depth
    cell_s: float = 600.0  # time scale of the patches drifting past [s]


@dataclass(frozen=True)
class Atmosphere:
    ozone_du: float
    aerosol_tau_500: float  # aerosol optical depth at 500 nm
    angstrom_alpha: float
    aerosol_drift_per_h: float = 0.0  # change of tau_500 per hour within the window
    aerosol_drift_from_solar_h: float = 6.0
    aerosol_drift_until_solar_h: float = 12.0
    aerosol_variability: float = 0.0  # relative standard deviation of tau_500
    aerosol_variability_period_s: float = 900.0
    aerosol_wave: float = 0.0  # relative amplitude of a slow sinusoid in tau_500
    aerosol_wave_period_h: float = 6.0
    aerosol_noon_peak: float = 0.0  # tau_500 added at local solar noon (Gaussian in time)
    aerosol_noon_peak_width_h: float = 1.5  # its standard deviation [h]
    precipitable_water_cm: float = 1.0
    clouds: tuple[Cloud, ...] = ()
    sky: str = "independent"  # INDEPENDENT_SKY or REFERENCE_SKY
    aerosol_scale_height_km: float = 1.5  # independent sky: aerosol layer above the station
    water_vapour_scale_height_km: float = 2.0  # independent sky: water-vapour layer


SPECTRAL = "spectral"
BROADBAND = "broadband"

#: The sky of :mod:`sim_instrument.spectral_sky` (filters, other published physics).
INDEPENDENT_SKY = "independent"
#: The sky of :mod:`sim_instrument.sky`: Beer-Lambert at the channel centre with the
#: fitter's own simplifications (kept for the tests written against it).
REFERENCE_SKY = "reference"


@dataclass(frozen=True)
class Channel:
    name: str
    wavelength_nm: float  # band centre; for a broadband channel, nan
    v0_1au_v: float  # true top-of-atmosphere signal at 1 AU [V]
    dark_v: float  # dark signal at 25 degrees C [V]
    bandwidth_nm: float = 10.0
    kind: str = SPECTRAL
    responsivity_v_per_w_m2: float = 0.0  # broadband only
    temp_coeff_per_k: float = 0.0  # relative responsivity change per kelvin
    reference_temp_c: float = 25.0
    # Filter function: a CSV file (absolute path), or a Gaussian; neither given means
    # a Gaussian at wavelength_nm with FWHM bandwidth_nm (channel_filter).
    filter_file: str | None = None
    filter_centre_nm: float | None = None
    filter_fwhm_nm: float | None = None


@dataclass(frozen=True)
class Noise:
    relative: float  # standard deviation as a fraction of the signal
    read_v: float  # signal-independent standard deviation [V]
    shot_v: float = 0.0  # shot noise standard deviation at a 1 V signal [V]


@dataclass(frozen=True)
class Thermal:
    detector_regulated: bool = True
    detector_setpoint_c: float = 25.0
    regulation_leak: float = 0.02  # fraction of the case's departure that reaches it
    case_sun_heating_k: float = 6.0  # case above ambient at noon in sun [K]
    unregulated_offset_k: float = 1.0  # unregulated detector above the case [K]
    dark_doubling_k: float = 8.0  # dark signal doubles every this many kelvin


@dataclass(frozen=True)
class Instrument:
    model: str
    serial: str
    firmware: str
    channels: tuple[Channel, ...]
    noise: Noise
    full_scale_v: float  # samples clip here and raise the saturation flag
    sample_interval_s: float  # time between samples of a burst
    thermal: Thermal = Thermal()
    field_of_view_deg: float = 2.5  # full angle


@dataclass(frozen=True)
class TrackerSpec:
    model: str
    serial: str
    firmware: str
    slew_rate_deg_s: float  # per axis, both axes move at once
    capture_range_deg: float  # sun sensor locks when the sun is this close
    lock_pointing_error_deg: float  # rms pointing error while locked
    park_azimuth_deg: float = 0.0
    park_elevation_deg: float = 90.0
    wind_pointing_error_deg_per_m_s: float = 0.0  # rms error added per m/s of wind
    min_direct_fraction_for_lock: float = 0.3  # sun sensor needs this much direct beam


@dataclass(frozen=True)
class Scenario:
    name: str
    description: str
    start_utc: datetime
    site: Site
    atmosphere: Atmosphere
    instrument: Instrument
    tracker: TrackerSpec
    weather: Weather = Weather()
    faults: FaultPlan = FaultPlan()


class _Section:
    """Reads one mapping, checking each key, and knows which keys nobody read."""

    def __init__(self, data: Any, path: str, source: str):
        if not isinstance(data, dict):
            raise ScenarioError(f"{source}: '{path}' must be a mapping of keys to values, "
                                f"got {type(data).__name__}")
        self.data = data
        self.path = path
        self.source = source
        self.read: set[str] = set()

    def _key(self, key: str) -> str:
        return f"{self.path}.{key}" if self.path else key

    def _fail(self, key: str, what: str) -> ScenarioError:
        return ScenarioError(f"{self.source}: '{self._key(key)}' {what}")

    def raw(self, key: str, required: bool = True) -> Any:
        self.read.add(key)
        if key not in self.data:
            if required:
                raise self._fail(key, "is missing; add it (see sim_instrument/scenario.py "
                                      "for the layout)")
            return None
        return self.data[key]

    def number(self, key: str, lo: float, hi: float, unit: str, default: float | None = None,
               lo_open: bool = False) -> float:
        value = self.raw(key, required=default is None)
        if value is None:
            return float(default)
        if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(
                value):
            raise self._fail(key, f"must be a number in [{lo:g}, {hi:g}] {unit}, got {value!r}")
        low_ok = value > lo if lo_open else value >= lo
        if not (low_ok and value <= hi):
            bracket = "(" if lo_open else "["
            raise self._fail(key, f"must lie in {bracket}{lo:g}, {hi:g}] {unit}, got {value!r}")
        return float(value)

    def text(self, key: str, pattern: re.Pattern[str] | None = None,
             default: str | None = None) -> str:
        value = self.raw(key, required=default is None)
        if value is None:
            return default
        if not isinstance(value, str) or not value.strip():
            raise self._fail(key, f"must be a non-empty string, got {value!r}")
        if pattern is not None and not pattern.match(value):
            raise self._fail(key, f"must match {pattern.pattern} (letters, digits and a few "
                                  f"punctuation marks), got {value!r}")
        return value

    def boolean(self, key: str, default: bool) -> bool:
        value = self.raw(key, required=False)
        if value is None:
            return default
        if not isinstance(value, bool):
            raise self._fail(key, f"must be true or false, got {value!r}")
        return value

    def section(self, key: str) -> _Section:
        return _Section(self.raw(key), self._key(key), self.source)

    def optional_section(self, key: str) -> _Section | None:
        value = self.raw(key, required=False)
        return None if value is None else _Section(value, self._key(key), self.source)

    def items(self, key: str) -> list[tuple[str, Any]]:
        """A list of mappings (empty when the key is left out), with their key paths."""
        value = self.raw(key, required=False)
        if value is None:
            return []
        if not isinstance(value, list):
            raise self._fail(key, f"must be a list, got {type(value).__name__}")
        return [(f"{self._key(key)}[{i}]", v) for i, v in enumerate(value)]

    def finish(self) -> None:
        unknown = sorted(set(map(str, self.data)) - self.read)
        if unknown:
            names = ", ".join(f"'{self._key(k)}'" for k in unknown)
            known = ", ".join(sorted(self.read))
            raise ScenarioError(f"{self.source}: unknown key {names}; "
                                f"allowed here: {known}")


def _start_time(top: _Section) -> datetime:
    value = top.raw("start_utc")
    if isinstance(value, str):
        try:
            value = datetime.fromisoformat(value)
        except ValueError:
            raise top._fail("start_utc", f"must be an ISO 8601 UTC time such as "
                                         f"2025-02-12T12:30:00Z, got {value!r}") from None
    if not isinstance(value, datetime):
        raise top._fail("start_utc", f"must be an ISO 8601 UTC time such as "
                                     f"2025-02-12T12:30:00Z, got {value!r}")
    if value.tzinfo is None:
        raise top._fail("start_utc", f"must carry a time zone (end it with Z for UTC), "
                                     f"got {value.isoformat()}")
    return value.astimezone(UTC)


def _site(s: _Section) -> Site:
    elevation_m = s.number("elevation_m", -500.0, 9000.0, "m")
    pressure = s.raw("pressure_hpa", required=False)
    if pressure is None:
        # Standard atmosphere, the barometric formula as pvlib implements it.
        pressure_hpa = float(pvlib.atmosphere.alt2pres(elevation_m)) / 100.0
    else:
        pressure_hpa = s.number("pressure_hpa", 300.0, 1100.0, "hPa")
    site = Site(
        name=s.text("name"),
        latitude_deg=s.number("latitude_deg", -90.0, 90.0, "degrees"),
        longitude_deg=s.number("longitude_deg", -180.0, 180.0, "degrees (east positive)"),
        elevation_m=elevation_m,
        pressure_hpa=pressure_hpa,
        temperature_c=s.number("temperature_c", -60.0, 50.0, "degrees C"),
    )
    s.finish()
    return site


def _weather(s: _Section | None) -> Weather:
    if s is None:
        return Weather()
    d = Weather()
    w = Weather(
        ambient_diurnal_range_k=s.number("ambient_diurnal_range_k", 0.0, 40.0, "K",
                                         default=d.ambient_diurnal_range_k),
        humidity_pct=s.number("humidity_pct", 0.0, 100.0, "%", default=d.humidity_pct),
        humidity_diurnal_range_pct=s.number("humidity_diurnal_range_pct", 0.0, 100.0, "%",
                                            default=d.humidity_diurnal_range_pct),
        wind_m_s=s.number("wind_m_s", 0.0, 60.0, "m/s", default=d.wind_m_s),
        wind_diurnal_range_m_s=s.number("wind_diurnal_range_m_s", 0.0, 60.0, "m/s",
                                        default=d.wind_diurnal_range_m_s),
        wind_gust_sd_m_s=s.number("wind_gust_sd_m_s", 0.0, 20.0, "m/s",
                                  default=d.wind_gust_sd_m_s),
        pressure_tide_hpa=s.number("pressure_tide_hpa", 0.0, 5.0, "hPa",
                                   default=d.pressure_tide_hpa),
        pressure_trend_hpa_per_h=s.number("pressure_trend_hpa_per_h", -5.0, 5.0, "hPa per h",
                                          default=d.pressure_trend_hpa_per_h),
        supply_v=s.number("supply_v", 5.0, 30.0, "V", default=d.supply_v),
    )
    if w.wind_diurnal_range_m_s / 2.0 > w.wind_m_s:
        raise s._fail("wind_diurnal_range_m_s", f"= {w.wind_diurnal_range_m_s:g} m/s would make "
                                                f"the wind negative: at most twice wind_m_s "
                                                f"({w.wind_m_s:g} m/s)")
    s.finish()
    return w


def _cloud(s: _Section) -> Cloud:
    c = Cloud(
        from_solar_h=s.number("from_solar_h", 0.0, 24.0, "h (local mean solar time)"),
        until_solar_h=s.number("until_solar_h", 0.0, 24.0, "h (local mean solar time)"),
        optical_depth=s.number("optical_depth", 0.0, 100.0, "(optical depth)"),
        patchiness=s.number("patchiness", 0.0, 3.0, "(relative standard deviation)",
                            default=0.0),
        cell_s=s.number("cell_s", 1.0, 86400.0, "s", default=600.0),
    )
    if c.until_solar_h <= c.from_solar_h:
        raise s._fail("until_solar_h", f"= {c.until_solar_h:g} h must come after "
                                       f"from_solar_h = {c.from_solar_h:g} h")
    s.finish()
    return c


def _atmosphere(s: _Section) -> Atmosphere:
    d = Atmosphere(0.0, 0.0, 0.0)
    atm = Atmosphere(
        ozone_du=s.number("ozone_du", 0.0, 700.0, "DU"),
        aerosol_tau_500=s.number("aerosol_tau_500", 0.0, 5.0, "(optical depth)"),
        angstrom_alpha=s.number("angstrom_alpha", -1.0, 4.0, "(Angstrom exponent)"),
        aerosol_drift_per_h=s.number("aerosol_drift_per_h", -1.0, 1.0, "per hour",
                                     default=d.aerosol_drift_per_h),
        aerosol_drift_from_solar_h=s.number("aerosol_drift_from_solar_h", 0.0, 24.0, "h",
                                            default=d.aerosol_drift_from_solar_h),
        aerosol_drift_until_solar_h=s.number("aerosol_drift_until_solar_h", 0.0, 24.0, "h",
                                             default=d.aerosol_drift_until_solar_h),
        aerosol_variability=s.number("aerosol_variability", 0.0, 1.0,
                                     "(relative standard deviation)",
                                     default=d.aerosol_variability),
        aerosol_variability_period_s=s.number("aerosol_variability_period_s", 1.0, 86400.0,
                                              "s", default=d.aerosol_variability_period_s),
        aerosol_wave=s.number("aerosol_wave", 0.0, 0.9, "(relative amplitude)",
                              default=d.aerosol_wave),
        aerosol_wave_period_h=s.number("aerosol_wave_period_h", 0.5, 48.0, "h",
                                       default=d.aerosol_wave_period_h),
        aerosol_noon_peak=s.number("aerosol_noon_peak", 0.0, 2.0, "(optical depth)",
                                   default=d.aerosol_noon_peak),
        aerosol_noon_peak_width_h=s.number("aerosol_noon_peak_width_h", 0.1, 12.0, "h",
                                           default=d.aerosol_noon_peak_width_h),
        precipitable_water_cm=s.number("precipitable_water_cm", 0.0, 10.0, "cm",
                                       default=d.precipitable_water_cm),
        clouds=tuple(_cloud(_Section(c, path, s.source)) for path, c in s.items("clouds")),
        sky=s.text("sky", default=d.sky),
        aerosol_scale_height_km=s.number("aerosol_scale_height_km", 0.1, 10.0, "km",
                                         default=d.aerosol_scale_height_km),
        water_vapour_scale_height_km=s.number("water_vapour_scale_height_km", 0.1, 10.0,
                                              "km", default=d.water_vapour_scale_height_km),
    )
    if atm.sky not in (INDEPENDENT_SKY, REFERENCE_SKY):
        raise s._fail("sky", f"must be {INDEPENDENT_SKY} or {REFERENCE_SKY}, got {atm.sky!r}")
    if atm.aerosol_drift_until_solar_h < atm.aerosol_drift_from_solar_h:
        raise s._fail("aerosol_drift_until_solar_h", "must not come before "
                                                     "aerosol_drift_from_solar_h")
    lowest = atm.aerosol_tau_500 + min(0.0, atm.aerosol_drift_per_h * (
        atm.aerosol_drift_until_solar_h - atm.aerosol_drift_from_solar_h))
    if lowest < 0:
        raise s._fail("aerosol_drift_per_h", f"drives aerosol_tau_500 below zero "
                                             f"({lowest:.3f}) by the end of the drift window")
    s.finish()
    return atm


def _channel(s: _Section) -> Channel:
    name = s.text("name", _CHANNEL_NAME_RE)
    kind = s.text("kind", default=SPECTRAL)
    if kind not in (SPECTRAL, BROADBAND):
        raise s._fail("kind", f"must be {SPECTRAL} or {BROADBAND}, got {kind!r}")
    common = dict(
        name=name, kind=kind,
        dark_v=s.number("dark_v", 0.0, 1.0, "V"),
        temp_coeff_per_k=s.number("temp_coeff_per_k", -0.02, 0.02, "per K", default=0.0),
        reference_temp_c=s.number("reference_temp_c", -40.0, 60.0, "degrees C", default=25.0),
    )
    if kind == BROADBAND:
        responsivity = s.number("responsivity_v_per_w_m2", 0.0, 0.1, "V per W m^-2",
                                lo_open=True)
        s.finish()
        # The true V0 is the SPECTRL2 top-of-atmosphere integral times the responsivity.
        from sim_instrument import broadband

        return Channel(wavelength_nm=math.nan, bandwidth_nm=math.nan,
                       v0_1au_v=responsivity * broadband.extraterrestrial_w_m2(),
                       responsivity_v_per_w_m2=responsivity, **common)
    ch = Channel(
        wavelength_nm=s.number("wavelength_nm", 300.0, 1100.0, "nm"),
        bandwidth_nm=s.number("bandwidth_nm", 0.5, 50.0, "nm", default=10.0),
        v0_1au_v=s.number("v0_1au_v", 0.0, 100.0, "V", lo_open=True),
        **common,
        **_filter_keys(s.optional_section("filter")),
    )
    s.finish()
    try:
        channel_filter(ch)
    except filters.FilterError as exc:
        raise ScenarioError(f"{s.source}: '{s.path}.filter': {exc}") from None
    try:
        sky.ozone_cross_section_cm2(ch.wavelength_nm, ch.bandwidth_nm)
    except ValueError as exc:
        raise ScenarioError(f"{s.source}: '{s.path}.wavelength_nm': {exc}") from None
    return ch


def _filter_keys(s: _Section | None) -> dict[str, Any]:
    """``filter: {file: path}`` (relative to the scenario file) or ``{centre_nm, fwhm_nm}``."""
    if s is None:
        return {}
    if "file" in s.data:
        name = s.text("file")
        s.finish()
        base = Path(s.source).parent if s.source and not s.source.startswith("<") \
            else Path.cwd()
        return {"filter_file": str((base / name).resolve())}
    keys = {"filter_centre_nm": s.number("centre_nm", 280.0, 4000.0, "nm"),
            "filter_fwhm_nm": s.number("fwhm_nm", 0.1, 100.0, "nm")}
    s.finish()
    return keys


_FILTER_CACHE: dict[tuple, filters.Filter] = {}


def channel_filter(ch: Channel) -> filters.Filter:
    """The filter function of a spectral channel (cached per file or Gaussian).

    Raises filters.FilterError for a bad file.
    """
    if ch.filter_file is not None:
        key: tuple = ("file", ch.filter_file)
    elif ch.filter_centre_nm is not None:
        key = ("gauss", ch.filter_centre_nm, ch.filter_fwhm_nm)
    else:
        key = ("gauss", ch.wavelength_nm, ch.bandwidth_nm)
    filt = _FILTER_CACHE.get(key)
    if filt is None:
        filt = filters.load_filter_csv(key[1]) if key[0] == "file" else \
            filters.gaussian(key[1], key[2])
        _FILTER_CACHE[key] = filt
    return filt


def _thermal(s: _Section | None) -> Thermal:
    if s is None:
        return Thermal()
    d = Thermal()
    t = Thermal(
        detector_regulated=s.boolean("detector_regulated", d.detector_regulated),
        detector_setpoint_c=s.number("detector_setpoint_c", -40.0, 60.0, "degrees C",
                                     default=d.detector_setpoint_c),
        regulation_leak=s.number("regulation_leak", 0.0, 1.0, "(fraction)",
                                 default=d.regulation_leak),
        case_sun_heating_k=s.number("case_sun_heating_k", 0.0, 40.0, "K",
                                    default=d.case_sun_heating_k),
        unregulated_offset_k=s.number("unregulated_offset_k", -10.0, 20.0, "K",
                                      default=d.unregulated_offset_k),
        dark_doubling_k=s.number("dark_doubling_k", 1.0, 100.0, "K",
                                 default=d.dark_doubling_k),
    )
    s.finish()
    return t


def _instrument(s: _Section) -> Instrument:
    model = s.text("model", _IDENT_RE)
    serial = s.text("serial", _IDENT_RE)
    firmware = s.text("firmware", _IDENT_RE)
    full_scale_v = s.number("full_scale_v", 0.0, 100.0, "V", lo_open=True)
    sample_interval_s = s.number("sample_interval_s", 0.0, 60.0, "s", lo_open=True)
    field_of_view_deg = s.number("field_of_view_deg", 0.6, 10.0, "degrees (full angle)",
                                 default=2.5)
    n = s.section("noise")
    noise = Noise(relative=n.number("relative", 0.0, 0.1, "(fraction of the signal)"),
                  read_v=n.number("read_v", 0.0, 0.1, "V"),
                  shot_v=n.number("shot_v", 0.0, 0.1, "V (at a 1 V signal)", default=0.0))
    n.finish()
    thermal = _thermal(s.optional_section("thermal"))
    raw_channels = s.raw("channels")
    if not isinstance(raw_channels, list) or not 1 <= len(raw_channels) <= 32:
        raise s._fail("channels", "must be a list of 1 to 32 channels, each with name, "
                                  "wavelength_nm, v0_1au_v and dark_v (or kind: broadband, "
                                  "responsivity_v_per_w_m2 and dark_v)")
    channels = tuple(_channel(_Section(c, f"{s.path}.channels[{i}]", s.source))
                     for i, c in enumerate(raw_channels))
    names = [c.name for c in channels]
    duplicates = sorted({x for x in names if names.count(x) > 1})
    if duplicates:
        raise s._fail("channels", f"has duplicate channel names {duplicates}; "
                                  f"give every channel its own name")
    for i, c in enumerate(channels):
        if c.dark_v >= full_scale_v:
            raise ScenarioError(f"{s.source}: '{s.path}.channels[{i}].dark_v' = {c.dark_v:g} V "
                                f"must be below full_scale_v = {full_scale_v:g} V")
    s.finish()
    return Instrument(model=model, serial=serial, firmware=firmware, channels=channels,
                      noise=noise, full_scale_v=full_scale_v,
                      sample_interval_s=sample_interval_s, thermal=thermal,
                      field_of_view_deg=field_of_view_deg)


def _tracker(s: _Section) -> TrackerSpec:
    capture = s.number("capture_range_deg", 0.0, 20.0, "degrees", lo_open=True)
    spec = TrackerSpec(
        model=s.text("model", _IDENT_RE),
        serial=s.text("serial", _IDENT_RE),
        firmware=s.text("firmware", _IDENT_RE),
        slew_rate_deg_s=s.number("slew_rate_deg_s", 0.0, 100.0, "degrees/s", lo_open=True),
        capture_range_deg=capture,
        lock_pointing_error_deg=s.number("lock_pointing_error_deg", 0.0, capture / 4.0,
                                         "degrees (at most a quarter of the capture range)"),
        park_azimuth_deg=s.number("park_azimuth_deg", 0.0, 360.0, "degrees", default=0.0),
        park_elevation_deg=s.number("park_elevation_deg", -5.0, 90.0, "degrees", default=90.0),
        wind_pointing_error_deg_per_m_s=s.number("wind_pointing_error_deg_per_m_s", 0.0, 0.5,
                                                 "degrees per m/s", default=0.0),
        min_direct_fraction_for_lock=s.number("min_direct_fraction_for_lock", 0.0, 1.0,
                                              "(fraction of the clear-sky direct beam)",
                                              default=0.3),
    )
    s.finish()
    return spec


def _faults(s: _Section | None) -> FaultPlan:
    if s is None:
        return FaultPlan()
    late_reply_s = s.number("late_reply_s", 0.0, 600.0, "s", default=3.0, lo_open=True)
    line = LineFaults()
    ls = s.optional_section("line")
    if ls is not None:
        line = LineFaults(**{name: ls.number(name, 0.0, 1.0, "(probability per reply)",
                                             default=0.0)
                             for name in LineFaults.__dataclass_fields__})
        ls.finish()
    events = []
    for path, raw in s.items("events"):
        e = _Section(raw, path, s.source)
        kind = e.text("kind")
        if kind not in EVENT_KINDS:
            raise e._fail("kind", f"must be one of {', '.join(EVENT_KINDS)}, got {kind!r}")
        device = e.text("device", default="tracker" if kind == "tracker_stall" else "radiometer")
        if device not in ("radiometer", "tracker"):
            raise e._fail("device", f"must be radiometer or tracker, got {device!r}")
        needs_duration = kind in ("reboot", "port_vanish", "tracker_stall")
        duration = e.number("duration_s", 0.0, 86400.0, "s",
                            default=None if needs_duration else 0.0)
        at = e.number("at_solar_h", 0.0, 24.0, "h (local mean solar time)")
        e.finish()
        try:
            events.append(FaultEvent(kind=kind, at_solar_h=at % 24.0, device=device,
                                     duration_s=duration))
        except ValueError as exc:
            raise ScenarioError(f"{s.source}: '{path}': {exc}") from None
    s.finish()
    return FaultPlan(line=line, late_reply_s=late_reply_s, events=tuple(events))


def parse_scenario(data: Any, name: str, source: str = "<scenario>") -> Scenario:
    """Build a :class:`Scenario` from already-loaded YAML data.

    Raises
    ------
    ScenarioError
        Naming the key path, what is wrong and what is allowed.
    """
    top = _Section(data, "", source)
    description = top.text("description", default="")
    start = _start_time(top)
    scenario = Scenario(
        name=name,
        description=description,
        start_utc=start,
        site=_site(top.section("site")),
        atmosphere=_atmosphere(top.section("atmosphere")),
        instrument=_instrument(top.section("instrument")),
        tracker=_tracker(top.section("tracker")),
        weather=_weather(top.optional_section("weather")),
        faults=_faults(top.optional_section("faults")),
    )
    top.finish()
    return scenario


def scenario_path(path_or_name: str | Path) -> Path:
    """Where a scenario lives: a path as given, or a bare name in the scenarios folder."""
    text = str(path_or_name)
    if isinstance(path_or_name, Path) or "/" in text or text.endswith((".yaml", ".yml")):
        return Path(path_or_name)
    return SCENARIO_DIR / f"{text}.yaml"


def available_scenarios() -> list[str]:
    """Names of the scenarios shipped in ``sim_instrument/scenarios``."""
    return sorted(p.stem for p in SCENARIO_DIR.glob("*.yaml"))


def load_scenario(path_or_name: str | Path) -> Scenario:
    """Load and validate a scenario from a YAML path or a bare shipped name.

    Raises
    ------
    ScenarioError
        If the file is missing, is not valid YAML, or breaks the layout.
    """
    path = scenario_path(path_or_name)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        shipped = ", ".join(available_scenarios()) or "none"
        raise ScenarioError(f"scenario {str(path_or_name)!r} not found at {path}; give a path "
                            f"to a YAML file or one of the shipped names: {shipped}") from None
    except OSError as exc:
        raise ScenarioError(f"cannot read scenario {path}: {exc.strerror}") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise ScenarioError(f"{path}: not valid YAML: {exc}") from None
    return parse_scenario(data, name=path.stem, source=str(path))
