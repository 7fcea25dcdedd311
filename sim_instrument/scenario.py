"""Scenarios: the site, sky, instrument and tracker the simulator pretends to be.

A scenario is a YAML file (loaded with ``yaml.safe_load``); every key is checked
for type and range, and unknown keys are rejected so that a typo never silently
falls back to a default. ``load_scenario("pico-sereno-clear")`` finds a bare name
in ``sim_instrument/scenarios/<name>.yaml``; anything with a path separator or a
``.yaml``/``.yml`` suffix is taken as a path.

Layout (units in the key names)::

    description: free text                        # optional
    start_utc: 2025-02-12T12:30:00Z               # instrument clock at start-up
    site: {name, latitude_deg, longitude_deg, elevation_m,
           pressure_hpa (optional: standard atmosphere at elevation_m), temperature_c}
    atmosphere: {ozone_du, aerosol_tau_500, angstrom_alpha}
    instrument:
      model, serial, firmware, full_scale_v, sample_interval_s
      noise: {relative, read_v}
      channels: [{name, wavelength_nm, v0_1au_v, dark_v}, ...]
    tracker: {model, serial, firmware, slew_rate_deg_s, capture_range_deg,
              lock_pointing_error_deg, park_azimuth_deg (0), park_elevation_deg (90)}
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

from sim_instrument import sky

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
class Atmosphere:
    ozone_du: float
    aerosol_tau_500: float  # aerosol optical depth at 500 nm
    angstrom_alpha: float


@dataclass(frozen=True)
class Channel:
    name: str
    wavelength_nm: float
    v0_1au_v: float  # true top-of-atmosphere signal at 1 AU [V]
    dark_v: float  # dark signal [V]


@dataclass(frozen=True)
class Noise:
    relative: float  # standard deviation as a fraction of the signal
    read_v: float  # signal-independent standard deviation [V]


@dataclass(frozen=True)
class Instrument:
    model: str
    serial: str
    firmware: str
    channels: tuple[Channel, ...]
    noise: Noise
    full_scale_v: float  # samples clip here and raise the saturation flag
    sample_interval_s: float  # time between samples of a burst


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


@dataclass(frozen=True)
class Scenario:
    name: str
    description: str
    start_utc: datetime
    site: Site
    atmosphere: Atmosphere
    instrument: Instrument
    tracker: TrackerSpec


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

    def section(self, key: str) -> _Section:
        return _Section(self.raw(key), self._key(key), self.source)

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


def _atmosphere(s: _Section) -> Atmosphere:
    atm = Atmosphere(
        ozone_du=s.number("ozone_du", 0.0, 700.0, "DU"),
        aerosol_tau_500=s.number("aerosol_tau_500", 0.0, 5.0, "(optical depth)"),
        angstrom_alpha=s.number("angstrom_alpha", -1.0, 4.0, "(Angstrom exponent)"),
    )
    s.finish()
    return atm


def _channel(s: _Section) -> Channel:
    ch = Channel(
        name=s.text("name", _CHANNEL_NAME_RE),
        wavelength_nm=s.number("wavelength_nm", 300.0, 1100.0, "nm"),
        v0_1au_v=s.number("v0_1au_v", 0.0, 100.0, "V", lo_open=True),
        dark_v=s.number("dark_v", 0.0, 1.0, "V"),
    )
    s.finish()
    try:
        sky.ozone_cross_section_cm2(ch.wavelength_nm)
    except ValueError as exc:
        raise ScenarioError(f"{s.source}: '{s.path}.wavelength_nm': {exc}") from None
    return ch


def _instrument(s: _Section) -> Instrument:
    model = s.text("model", _IDENT_RE)
    serial = s.text("serial", _IDENT_RE)
    firmware = s.text("firmware", _IDENT_RE)
    full_scale_v = s.number("full_scale_v", 0.0, 100.0, "V", lo_open=True)
    sample_interval_s = s.number("sample_interval_s", 0.0, 60.0, "s", lo_open=True)
    n = s.section("noise")
    noise = Noise(relative=n.number("relative", 0.0, 0.1, "(fraction of the signal)"),
                  read_v=n.number("read_v", 0.0, 0.1, "V"))
    n.finish()
    raw_channels = s.raw("channels")
    if not isinstance(raw_channels, list) or not 1 <= len(raw_channels) <= 32:
        raise s._fail("channels", "must be a list of 1 to 32 channels, each with name, "
                                  "wavelength_nm, v0_1au_v and dark_v")
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
                      sample_interval_s=sample_interval_s)


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
    )
    s.finish()
    return spec


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
