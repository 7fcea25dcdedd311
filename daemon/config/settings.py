"""Strict configuration loader.

The YAML text is parsed by :mod:`daemon.config.yamltext` (a stricter
``yaml.SafeLoader``: no duplicate keys, no anchors or aliases, bounded size, nesting and
whole numbers) and the data walked by typed getters. Each getter knows its key path,
type and bounds, so every error names the key and the allowed range. Keys that nobody
read are rejected at the end: a typo surfaces at start-up, not in the middle of a
session on the mountain.

Only the standard library is imported here; PyYAML is imported when a text is parsed,
so a read command that validates the store's recorded configuration from its stored
JSON form (:func:`config_from_data`) never loads it.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from daemon.config.errors import (  # noqa: F401 - the errors and limits, re-exported
    EX_CONFIG,
    MAX_DEPTH,
    MAX_FILE_BYTES,
    MAX_WHOLE,
    MAX_WHOLE_TEXT,
    ConfigError,
)
from daemon.config.filterfile import FilterFileError, FilterSpec, gaussian_spec, read_filter_spec
from drivers import registry
from drivers.interfaces import DriverConfigError
from drivers.registry import RADIOMETER_DRIVERS, TRACKER_DRIVERS

# The longest one command may go unanswered, all retries included. With the slew and
# lock limits this keeps a whole target well inside the unit's WatchdogSec (600 s).
MAX_EXCHANGE_S = 20.0


@dataclass(frozen=True)
class Site:
    name: str
    latitude_deg: float
    longitude_deg: float  # east positive
    elevation_m: float
    timezone: str
    pressure_hpa: float | None  # nominal station pressure; None = from elevation
    temperature_c: float  # nominal air temperature for refraction
    ozone_du: float  # nominal total ozone column [Dobson units]


@dataclass(frozen=True)
class Channel:
    name: str
    wavelength_nm: float
    bandwidth_nm: float
    temp_coeff_per_k: float = 0.0  # relative responsivity change per kelvin
    reference_temp_c: float = 25.0
    # Band-mean ozone absorption cross-section [cm^2]; None = daemon.science.ozone's table.
    ozone_cross_section_cm2: float | None = None
    # Absolute responsivity [V per W m^-2 nm^-1] from a lamp calibration; None = unknown.
    responsivity_v_per_w_m2_nm: float | None = None
    # Fitted with the modified Langley (ln V against m^b); the loader's default is true
    # for a band inside 925-955 nm.
    water_vapour: bool = False
    # Filter function (``filter:``); None or given=False: a Gaussian at wavelength_nm
    # with FWHM bandwidth_nm (daemon.config.filterfile).
    filter: FilterSpec | None = None
    # Precipitable water the site expects [cm]: the range over which a water-vapour
    # channel's modified-Langley constants are derived (daemon.science.watervapour).
    water_vapour_range_cm: tuple[float, float] = (0.1, 3.0)


@dataclass(frozen=True)
class Port:
    url: str  # anything serial.serial_for_url accepts
    baudrate: int = 19200
    timeout_s: float = 2.0
    retries: int = 3
    driver: str = "reference"  # a name in drivers.registry
    # What the driver family's option check made of the port's ``options`` block (a
    # register map, command templates), or None; see drivers.registry.OPTION_CHECKS.
    options: Any = field(default=None, compare=False, hash=False, repr=False)


@dataclass(frozen=True)
class PlanSettings:
    airmass_min: float = 2.0
    airmass_max: float = 6.0
    airmass_step: float = 0.25
    targets: tuple[float, ...] | None = None  # explicit list overrides min/max/step
    routine_interval_min: float = 0.0  # 0 = no routine cadence between sessions
    park_after_sunset_min: float = 10.0

    def airmass_targets(self) -> tuple[float, ...]:
        """Target air masses in ascending order."""
        if self.targets is not None:
            return self.targets
        n = int(math.floor((self.airmass_max - self.airmass_min) / self.airmass_step + 1e-9))
        return tuple(round(self.airmass_min + i * self.airmass_step, 6) for i in range(n + 1))


@dataclass(frozen=True)
class AcquisitionSettings:
    burst_samples: int = 10
    dark_samples: int = 5
    lock_timeout_s: float = 30.0
    max_pointing_error_deg: float = 0.2


@dataclass(frozen=True)
class FitSettings:
    airmass_min: float = 2.0
    airmass_max: float = 6.0
    clip_sigma: float = 2.5  # points beyond this many residual SDs are rejected
    min_fraction_kept: float = 0.6  # never reject more than 1 - this
    min_points: int = 8
    min_airmass_span: float = 2.0
    # "scaled": residual limits tested at fit.false_refusal_rate against the scatter a
    # stable sky gives (max_residual_sd per point, plus the burst's own scatter), the
    # largest residual against a quantile that grows with the point count; "absolute":
    # the BSRN-style fixed limits max_residual_sd and max_abs_residual in ln V.
    acceptance: str = "scaled"
    false_refusal_rate: float = 0.01  # per criterion, on a stable sky ("scaled")
    # Correct V0 for the band's curvature, the aerosol layer's and the ozone layer's air
    # mass (README, "The calibration engine"); false: state them as uncertainty only.
    correct_model_terms: bool = True
    max_residual_sd: float = 0.003  # in ln V (BSRN Operations Manual, sec. 7.4.2.1)
    max_cv: float = 0.02  # burst coefficient of variation above which a burst is rejected
    max_abs_residual: float = 0.006  # largest residual of a kept point, in ln V (BSRN)
    max_residual_trend: float = 0.005  # largest bend of the residuals across m, in ln V
    min_aerosol_optical_depth: float = -0.01  # fitted tau minus Rayleigh minus ozone
    normalise_pressure: bool = True  # refer ln V to the session's mean pressure
    max_pressure_change_hpa: float = 1.0  # without normalising: reject channels < 500 nm
    water_vapour_exponent: float = 0.6  # b of the modified Langley, ln V against m^b
    angstrom_channels: tuple[str, str] | None = None  # None: nearest to 440 and 870 nm
    campaign_min_sessions: int = 3  # accepted sessions a calibration needs per channel
    campaign_clip_sigma: float = 3.0  # sessions further than this from the mean are flagged
    # Deprecated and ignored (the drift allowance now comes from the data: the same day's
    # other session and the stored campaign's repeatability); kept so old files load.
    tau_drift_per_hour: float | None = None
    # Same-day morning and afternoon V0 at 1 AU may differ by this fraction (or by three
    # combined uncertainties, when larger) before both are refused as drifting.
    max_am_pm_difference: float = 0.01


@dataclass(frozen=True)
class Config:
    site: Site
    channels: tuple[Channel, ...]
    radiometer: Port
    tracker: Port
    plan: PlanSettings = field(default_factory=PlanSettings)
    acquisition: AcquisitionSettings = field(default_factory=AcquisitionSettings)
    fit: FitSettings = field(default_factory=FitSettings)
    store_path: str = "/var/lib/heliotrope/heliotrope.db"
    source: str = "<memory>"
    #: The YAML text it was read from (recorded in the store as provenance); "" when
    #: built from data.
    text: str = field(default="", compare=False, repr=False)

    @property
    def tz(self) -> ZoneInfo:
        return ZoneInfo(self.site.timezone)

    def channel(self, name: str) -> Channel:
        for ch in self.channels:
            if ch.name == name:
                return ch
        raise KeyError(name)


# --------------------------------------------------------------------------- reader

_MISSING = object()


class _Section:
    """A mapping from the file, read through typed getters that track used keys."""

    def __init__(self, data: Any, path: str):
        if not isinstance(data, dict):
            raise ConfigError(f"{path or 'top level'}: expected a mapping of keys, "
                              f"got {_kind(data)}")
        self.data = data
        self.path = path
        self.used: set[str] = set()

    def _key(self, key: str) -> str:
        return f"{self.path}.{key}" if self.path else key

    def _raw(self, key: str, default: Any) -> Any:
        self.used.add(key)
        value = self.data.get(key, _MISSING)
        if value is _MISSING or value is None and default is not _MISSING:
            if default is _MISSING:
                raise ConfigError(f"{self._key(key)}: required key is missing")
            return default
        return value

    def number(self, key: str, lo: float, hi: float, default: Any = _MISSING,
               unit: str = "", optional: bool = False) -> float | None:
        value = self._raw(key, None if optional else default)
        if value is None:
            return None
        rng = f"{lo:g} to {hi:g}{' ' + unit if unit else ''}"
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise ConfigError(f"{self._key(key)}: expected a number from {rng}, got {value!r}")
        if not math.isfinite(value) or not lo <= value <= hi:
            raise ConfigError(f"{self._key(key)}: {value!r} is out of range; allowed {rng}")
        return float(value)

    def integer(self, key: str, lo: int, hi: int, default: Any = _MISSING) -> int:
        value = self._raw(key, default)
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{self._key(key)}: expected a whole number from {lo} to {hi}, "
                              f"got {value!r}")
        if not lo <= value <= hi:
            raise ConfigError(f"{self._key(key)}: {value} is out of range; allowed {lo} to {hi}")
        return value

    def boolean(self, key: str, default: Any = _MISSING) -> bool | None:
        value = self._raw(key, default)
        if value is None and default is None:
            return None
        if not isinstance(value, bool):
            raise ConfigError(f"{self._key(key)}: expected true or false, got {value!r}")
        return value

    def string(self, key: str, default: Any = _MISSING, pattern: str | None = None,
               hint: str = "") -> str:
        value = self._raw(key, default)
        if not isinstance(value, str) or not value.strip():
            raise ConfigError(f"{self._key(key)}: expected a non-empty text value, got {value!r}")
        if pattern and not re.fullmatch(pattern, value):
            raise ConfigError(f"{self._key(key)}: {value!r} is not allowed; {hint}")
        return value

    def section(self, key: str, required: bool = True) -> _Section | None:
        value = self._raw(key, _MISSING if required else None)
        if value is None:
            return None
        return _Section(value, self._key(key))

    def items(self, key: str) -> list[tuple[str, Any]]:
        value = self._raw(key, _MISSING)
        if not isinstance(value, list) or not value:
            raise ConfigError(f"{self._key(key)}: expected a non-empty list, got {_kind(value)}")
        return [(f"{self._key(key)}[{i}]", v) for i, v in enumerate(value)]

    def finish(self) -> None:
        unknown = sorted(set(self.data) - self.used, key=str)
        if unknown:
            known = ", ".join(sorted(self.used))
            raise ConfigError(f"{self._key(str(unknown[0]))}: unknown key; "
                              f"allowed keys here: {known}")


def _kind(value: Any) -> str:
    if value is None:
        return "nothing"
    if value == []:
        return "an empty list"
    return {dict: "a mapping", list: "a list", str: "text"}.get(type(value), repr(value))


# --------------------------------------------------------------------------- sections

def _read_site(s: _Section) -> Site:
    site = Site(
        name=s.string("name"),
        latitude_deg=s.number("latitude_deg", -90, 90, unit="degrees north"),
        longitude_deg=s.number("longitude_deg", -180, 180, unit="degrees east"),
        elevation_m=s.number("elevation_m", -450, 6000, unit="m"),
        timezone=_timezone(s),
        pressure_hpa=s.number("pressure_hpa", 400, 1100, unit="hPa", optional=True),
        temperature_c=s.number("temperature_c", -60, 50, default=10.0, unit="degC"),
        ozone_du=s.number("ozone_du", 100, 600, default=300.0, unit="DU"),
    )
    s.finish()
    return site


def _timezone(s: _Section) -> str:
    name = s.string("timezone", default="UTC")
    try:
        ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ConfigError(f"{s._key('timezone')}: unknown time zone {name!r}; use an IANA name "
                          "such as 'UTC' or 'America/Mexico_City'") from None
    return name


def _read_filter(s: _Section | None, base: Path, wavelength_nm: float,
                 bandwidth_nm: float) -> FilterSpec:
    """``filter: {file: ..}`` or ``{centre_nm, fwhm_nm}``; else the default Gaussian."""
    if s is None:
        return gaussian_spec(wavelength_nm, bandwidth_nm, given=False)
    if "file" in s.data:
        name = s.string("file")
        s.finish()
        try:
            return read_filter_spec(base / name)
        except FilterFileError as exc:
            raise ConfigError(f"{s._key('file')}: {exc}") from None
    spec = gaussian_spec(s.number("centre_nm", 280, 4000, unit="nm"),
                         s.number("fwhm_nm", 0.1, 100, unit="nm"), given=True)
    s.finish()
    return spec


def _read_column_range(s: _Section | None) -> tuple[float, float]:
    """``water_vapour_range_cm: {min: .., max: ..}`` [cm]; default 0.1 to 3 cm."""
    if s is None:
        return Channel.water_vapour_range_cm
    lo = s.number("min", 0.01, 10, unit="cm")
    hi = s.number("max", 0.01, 10, unit="cm")
    if hi < lo:
        raise ConfigError(f"{s._key('max')}: {hi:g} cm is below min {lo:g} cm")
    s.finish()
    return (lo, hi)


def _read_channels(parent: _Section, base: Path = Path(".")) -> tuple[Channel, ...]:
    channels = []
    for path, raw in parent.items("channels"):
        s = _Section(raw, path)
        channels.append(Channel(
            name=s.string("name", pattern=r"[A-Za-z0-9_.-]{1,16}",
                          hint="use 1 to 16 letters, digits, '_', '.' or '-'"),
            wavelength_nm=s.number("wavelength_nm", 300, 2500, unit="nm"),
            bandwidth_nm=s.number("bandwidth_nm", 0.5, 100, default=10.0, unit="nm"),
            temp_coeff_per_k=s.number("temp_coeff_per_k", -0.02, 0.02, default=0.0, unit="per K"),
            reference_temp_c=s.number("reference_temp_c", -40, 60, default=25.0, unit="degC"),
            ozone_cross_section_cm2=s.number("ozone_cross_section_cm2", 0.0, 1e-18,
                                             unit="cm^2", optional=True),
            responsivity_v_per_w_m2_nm=s.number("responsivity_v_per_w_m2_nm", 1e-9, 1e9,
                                                unit="V per W m^-2 nm^-1", optional=True),
            water_vapour=s.boolean("water_vapour", default=None),
        ))
        ch = channels[-1]
        channels[-1] = replace(ch, filter=_read_filter(s.section("filter", required=False),
                                                       base, ch.wavelength_nm, ch.bandwidth_nm),
                               water_vapour_range_cm=_read_column_range(
                                   s.section("water_vapour_range_cm", required=False)))
        if channels[-1].water_vapour is None:
            channels[-1] = replace(channels[-1], water_vapour=_in_water_band(channels[-1]))
        s.finish()
    names = [c.name for c in channels]
    for name in names:
        if names.count(name) > 1:
            raise ConfigError(f"{parent._key('channels')}: channel name {name!r} is used twice; "
                              "give every channel its own name")
    return tuple(channels)


# The water-vapour absorption band a "940 nm" channel sits in (common practice, no source).
WATER_BAND_NM = (925.0, 955.0)


def _in_water_band(channel: Channel) -> bool:
    half = channel.bandwidth_nm / 2.0
    return (channel.wavelength_nm + half > WATER_BAND_NM[0]
            and channel.wavelength_nm - half < WATER_BAND_NM[1])


def _read_port(s: _Section, drivers: dict[str, str], kind: str) -> Port:
    names = sorted(drivers)
    driver = s.string("driver", default="reference", pattern="|".join(map(re.escape, names)),
                      hint=f"known drivers: {', '.join(names)}")
    try:
        options = registry.check_options(kind, driver, s._raw("options", None))
    except DriverConfigError as exc:
        where = s._key("options") + (f".{exc.key}" if exc.key else "")
        raise ConfigError(f"{where}: {exc.message}") from None
    port = Port(
        url=s.string("port"),
        baudrate=s.integer("baudrate", 1200, 921600, default=19200),
        timeout_s=s.number("timeout_s", 0.05, 60, default=2.0, unit="s"),
        retries=s.integer("retries", 0, 10, default=3),
        driver=driver,
        options=options,
    )
    worst = port.timeout_s * (port.retries + 1)
    if worst > MAX_EXCHANGE_S:
        raise ConfigError(
            f"{s._key('timeout_s')}: {port.timeout_s:g} s x (retries {port.retries} + 1) = "
            f"{worst:g} s for one unanswered command; allowed at most {MAX_EXCHANGE_S:g} s, "
            "so a target never outlasts the service's watchdog")
    s.finish()
    return port


def _read_plan(s: _Section | None) -> PlanSettings:
    if s is None:
        return PlanSettings()
    targets = None
    if "targets" in s.data:
        items = s.items("targets")
        values = []
        for path, v in items:
            if isinstance(v, bool) or not isinstance(v, int | float) or not 1.0 <= v <= 40.0:
                raise ConfigError(f"{path}: expected an air mass from 1 to 40, got {v!r}")
            values.append(float(v))
        if any(b <= a for a, b in zip(values, values[1:], strict=False)):
            raise ConfigError(f"{s._key('targets')}: air masses must be in strictly "
                              "ascending order with no repeats")
        targets = tuple(values)
    plan = PlanSettings(
        airmass_min=s.number("airmass_min", 1.0, 40.0, default=2.0),
        airmass_max=s.number("airmass_max", 1.0, 40.0, default=6.0),
        airmass_step=s.number("airmass_step", 0.01, 10.0, default=0.25),
        targets=targets,
        routine_interval_min=s.number("routine_interval_min", 0, 720, default=0.0, unit="min"),
        park_after_sunset_min=s.number("park_after_sunset_min", 0, 240, default=10.0,
                                       unit="min"),
    )
    if plan.airmass_max < plan.airmass_min:
        raise ConfigError(f"{s._key('airmass_max')}: {plan.airmass_max:g} is below "
                          f"airmass_min {plan.airmass_min:g}; allowed airmass_min to 40")
    s.finish()
    return plan


def _read_acquisition(s: _Section | None) -> AcquisitionSettings:
    if s is None:
        return AcquisitionSettings()
    acq = AcquisitionSettings(
        burst_samples=s.integer("burst_samples", 1, 1000, default=10),
        dark_samples=s.integer("dark_samples", 0, 1000, default=5),
        lock_timeout_s=s.number("lock_timeout_s", 1, 120, default=30.0, unit="s"),
        max_pointing_error_deg=s.number("max_pointing_error_deg", 0.01, 5, default=0.2,
                                        unit="degrees"),
    )
    s.finish()
    return acq


def _read_fit(s: _Section | None) -> FitSettings:
    if s is None:
        return FitSettings()
    fit = FitSettings(
        airmass_min=s.number("airmass_min", 1.0, 40.0, default=2.0),
        airmass_max=s.number("airmass_max", 1.0, 40.0, default=6.0),
        clip_sigma=s.number("clip_sigma", 1.0, 10.0, default=2.5),
        min_fraction_kept=s.number("min_fraction_kept", 0.1, 1.0, default=0.6),
        min_points=s.integer("min_points", 3, 10000, default=8),
        min_airmass_span=s.number("min_airmass_span", 0.1, 39.0, default=2.0),
        acceptance=s.string("acceptance", default="scaled", pattern="scaled|absolute",
                            hint="allowed 'scaled' or 'absolute'"),
        false_refusal_rate=s.number("false_refusal_rate", 1e-4, 0.2, default=0.01),
        correct_model_terms=s.boolean("correct_model_terms", default=True),
        max_residual_sd=s.number("max_residual_sd", 1e-5, 1.0, default=0.003, unit="in ln V"),
        max_cv=s.number("max_cv", 1e-5, 1.0, default=0.02),
        max_abs_residual=s.number("max_abs_residual", 1e-4, 1.0, default=0.006, unit="in ln V"),
        max_residual_trend=s.number("max_residual_trend", 1e-5, 1.0, default=0.005,
                                    unit="in ln V"),
        min_aerosol_optical_depth=s.number("min_aerosol_optical_depth", -1.0, 1.0,
                                           default=-0.01),
        normalise_pressure=s.boolean("normalise_pressure", default=True),
        max_pressure_change_hpa=s.number("max_pressure_change_hpa", 0.01, 200.0, default=1.0,
                                         unit="hPa"),
        water_vapour_exponent=s.number("water_vapour_exponent", 0.3, 1.0, default=0.6),
        angstrom_channels=_angstrom_channels(s),
        campaign_min_sessions=s.integer("campaign_min_sessions", 1, 10000, default=3),
        campaign_clip_sigma=s.number("campaign_clip_sigma", 1.0, 10.0, default=3.0),
        tau_drift_per_hour=_deprecated_drift(s),
        max_am_pm_difference=s.number("max_am_pm_difference", 0.001, 0.5, default=0.01),
    )
    if fit.airmass_max <= fit.airmass_min:
        raise ConfigError(f"{s._key('airmass_max')}: {fit.airmass_max:g} must be above "
                          f"airmass_min {fit.airmass_min:g}; allowed airmass_min to 40")
    s.finish()
    return fit


def _deprecated_drift(s: _Section) -> float | None:
    value = s.number("tau_drift_per_hour", 0.0, 0.1, unit="per hour", optional=True)
    if value is not None:
        import logging  # here, not at the top: the read commands parse configurations too

        logging.getLogger(__name__).warning(
            "%s: deprecated and ignored; the V0 uncertainty now takes its drift "
            "allowance from the data (the same day's other session and the stored "
            "campaign's repeatability, see README 'The calibration engine'); remove "
            "the key", s._key("tau_drift_per_hour"))
    return value


def _angstrom_channels(s: _Section) -> tuple[str, str] | None:
    value = s._raw("angstrom_channels", None)
    if value is None:
        return None
    if (not isinstance(value, list) or len(value) != 2
            or not all(isinstance(v, str) and v for v in value) or value[0] == value[1]):
        raise ConfigError(f"{s._key('angstrom_channels')}: expected two different channel "
                          f"names, for example ['440', '870'], got {value!r}")
    return (value[0], value[1])


def _check_fit_channels(fit: FitSettings, channels: tuple[Channel, ...], path: str) -> None:
    if fit.angstrom_channels is None:
        return
    names = [c.name for c in channels]
    for name in fit.angstrom_channels:
        if name not in names:
            raise ConfigError(f"{path}.angstrom_channels: no channel named {name!r}; "
                              f"configured channels: {', '.join(names)}")
    for c in channels:
        if c.name in fit.angstrom_channels and c.water_vapour:
            raise ConfigError(f"{path}.angstrom_channels: channel {c.name!r} is a water-vapour "
                              "channel; name two aerosol (window) channels")
    a, b = (next(c for c in channels if c.name == n) for n in fit.angstrom_channels)
    if a.wavelength_nm == b.wavelength_nm:
        raise ConfigError(f"{path}.angstrom_channels: {a.name!r} and {b.name!r} have the same "
                          "wavelength; an Angstrom exponent needs two wavelengths")


def parse_config(data: Any, source: str = "<memory>") -> Config:
    """Build a :class:`Config` from already-parsed YAML data; raise :class:`ConfigError`."""
    top = _Section(data, "")
    site = _read_site(top.section("site"))
    inst = top.section("instrument")
    base = Path(source).parent if not source.startswith("<") else Path.cwd()
    channels = _read_channels(inst, base)
    radiometer = _read_port(inst.section("radiometer"), RADIOMETER_DRIVERS, "radiometer")
    tracker = _read_port(inst.section("tracker"), TRACKER_DRIVERS, "tracker")
    inst.finish()
    plan = _read_plan(top.section("plan", required=False))
    acquisition = _read_acquisition(top.section("acquisition", required=False))
    fit = _read_fit(top.section("fit", required=False))
    _check_fit_channels(fit, channels, "fit")
    store = top.section("store", required=False)
    store_path = "/var/lib/heliotrope/heliotrope.db"
    if store is not None:
        store_path = store.string("path", default=store_path)
        store.finish()
    top.finish()
    return Config(site=site, channels=channels, radiometer=radiometer, tracker=tracker,
                  plan=plan, acquisition=acquisition, fit=fit, store_path=store_path,
                  source=source)


def load_config(path: str | Path) -> Config:
    """Read and validate a YAML configuration file; raise :class:`ConfigError`."""
    from daemon.config.yamltext import parse_yaml, read_text

    path = Path(path)
    try:
        text = read_text(path)
        data = parse_yaml(text)
    except FileNotFoundError:
        raise ConfigError(f"{path}: no such file; pass the path of a YAML configuration "
                          "(examples in config/)") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{path}: cannot read the file ({exc})") from None
    except ConfigError as exc:
        raise ConfigError(f"{path}: {exc}") from None
    return config_from_data(data, text, str(path))


def config_from_text(text: str, source: str) -> Config:
    """Validate configuration YAML ``text`` (a stored copy) as :func:`load_config` does
    a file; errors name ``source``."""
    from daemon.config.yamltext import parse_yaml

    try:
        data = parse_yaml(text)
    except ConfigError as exc:
        raise ConfigError(f"{source}: {exc}") from None
    return config_from_data(data, text, source)


def config_from_data(data: Any, text: str, source: str) -> Config:
    """Validate the parsed data of the configuration ``text``; errors name ``source``.

    The store keeps, beside a recorded text, its data as JSON when JSON holds it
    exactly (:func:`daemon.config.yamltext.json_form`), so a read command can validate
    the recorded configuration without parsing YAML.
    """
    try:
        return replace(parse_config(data, source=source), text=text)
    except ConfigError as exc:
        raise ConfigError(f"{source}: {exc}") from None
