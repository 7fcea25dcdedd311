"""The records of a day's plan: targets, skipped targets, events, the plan itself.

Plain data with their JSON form, apart from :mod:`daemon.station.planner` (which
computes them with pvlib and numpy) so that the resident service reads a stored plan
back and schedules from it without those libraries.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, date, datetime
from typing import Any

_FORMAT_VERSION = 1


# --------------------------------------------------------------------------- records

def _iso(t: datetime) -> str:
    t = t.astimezone(UTC)
    spec = ("seconds" if t.microsecond == 0 else
            "milliseconds" if t.microsecond % 1000 == 0 else "microseconds")
    return t.isoformat(timespec=spec)


def _parse_time(value: Any, what: str) -> datetime:
    try:
        t = datetime.fromisoformat(value)
    except (TypeError, ValueError):
        raise ValueError(f"plan record: {what} must be an ISO 8601 time such as "
                         f"'2024-03-20T14:05:00+00:00', got {value!r}") from None
    if t.tzinfo is None:
        raise ValueError(f"plan record: {what} {value!r} has no UTC offset; "
                         "stored plan times end in '+00:00'")
    return t.astimezone(UTC)


def _optional_time(value: Any, what: str) -> datetime | None:
    return None if value is None else _parse_time(value, what)


def _field(record: Mapping[str, Any], key: str, what: str) -> Any:
    if not isinstance(record, Mapping):
        raise ValueError(f"plan record: {what} must be a mapping, got {type(record).__name__}")
    try:
        return record[key]
    except KeyError:
        raise ValueError(f"plan record: {what} lacks the key {key!r}; the stored plan is "
                         "damaged or from another version - compute it again") from None


def _float(record: Mapping[str, Any], key: str, what: str) -> float:
    value = _field(record, key, what)
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"plan record: {key} of {what} must be a number, got {value!r}")
    return float(value)


@dataclass(frozen=True)
class PlannedTarget:
    """One moment to measure.

    Attributes
    ----------
    time_utc : datetime
        When to measure (aware, UTC).
    session : str
        ``'am'``, ``'pm'`` or ``'routine'``.
    airmass : float
        The target relative air mass (for ``routine``, the air mass at ``time_utc``).
    apparent_zenith_deg, azimuth_deg : float
        Where the sun is at ``time_utc`` [degrees; azimuth east of north].
    """

    time_utc: datetime
    session: str
    airmass: float
    apparent_zenith_deg: float
    azimuth_deg: float

    def to_dict(self) -> dict[str, Any]:
        return {"time_utc": _iso(self.time_utc), "session": self.session,
                "airmass": self.airmass, "apparent_zenith_deg": self.apparent_zenith_deg,
                "azimuth_deg": self.azimuth_deg}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> PlannedTarget:
        w = "a target"
        return cls(time_utc=_parse_time(_field(d, "time_utc", w), "target time_utc"),
                   session=str(_field(d, "session", w)),
                   airmass=_float(d, "airmass", w),
                   apparent_zenith_deg=_float(d, "apparent_zenith_deg", w),
                   azimuth_deg=_float(d, "azimuth_deg", w))


@dataclass(frozen=True)
class SkippedTarget:
    """A target air mass the sun does not reach in one session of the day."""

    session: str
    airmass: float
    reason: str

    def to_dict(self) -> dict[str, Any]:
        return {"session": self.session, "airmass": self.airmass, "reason": self.reason}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> SkippedTarget:
        w = "a skipped target"
        return cls(session=str(_field(d, "session", w)), airmass=_float(d, "airmass", w),
                   reason=str(_field(d, "reason", w)))


@dataclass(frozen=True)
class PlanEvent:
    """Something other than a measurement: ``fit_am``, ``fit_pm``, ``park``, ``replan``."""

    time_utc: datetime
    kind: str

    def to_dict(self) -> dict[str, Any]:
        return {"time_utc": _iso(self.time_utc), "kind": self.kind}

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> PlanEvent:
        w = "an event"
        return cls(time_utc=_parse_time(_field(d, "time_utc", w), "event time_utc"),
                   kind=str(_field(d, "kind", w)))


@dataclass(frozen=True)
class Plan:
    """The plan of one civil date at one site. Times are aware UTC datetimes."""

    date: date
    site_name: str
    timezone: str
    targets: tuple[PlannedTarget, ...]
    skipped: tuple[SkippedTarget, ...]
    events: tuple[PlanEvent, ...]
    sunrise_utc: datetime | None
    sunset_utc: datetime | None
    solar_noon_utc: datetime | None
    notes: tuple[str, ...]

    def timeline(self) -> tuple[PlannedTarget | PlanEvent, ...]:
        """Targets and events merged in time order (a target first at equal times)."""
        items: list[tuple[datetime, int, PlannedTarget | PlanEvent]] = (
            [(t.time_utc, 0, t) for t in self.targets]
            + [(e.time_utc, 1, e) for e in self.events])
        items.sort(key=lambda x: (x[0], x[1]))
        return tuple(item for _, _, item in items)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form; times are ISO 8601 strings ending in ``+00:00``."""
        return {
            "version": _FORMAT_VERSION,
            "date": self.date.isoformat(),
            "site_name": self.site_name,
            "timezone": self.timezone,
            "targets": [t.to_dict() for t in self.targets],
            "skipped": [s.to_dict() for s in self.skipped],
            "events": [e.to_dict() for e in self.events],
            "sunrise_utc": None if self.sunrise_utc is None else _iso(self.sunrise_utc),
            "sunset_utc": None if self.sunset_utc is None else _iso(self.sunset_utc),
            "solar_noon_utc": None if self.solar_noon_utc is None else _iso(self.solar_noon_utc),
            "notes": list(self.notes),
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Plan:
        """Rebuild a plan from :meth:`to_dict` output; raise ``ValueError`` if damaged."""
        w = "the plan"
        version = _field(d, "version", w)
        if version != _FORMAT_VERSION:
            raise ValueError(f"plan record: format version {version!r} is not supported "
                             f"(this program reads version {_FORMAT_VERSION}); compute "
                             "the plan again")
        raw_date = _field(d, "date", w)
        try:
            day = date.fromisoformat(raw_date)
        except (TypeError, ValueError):
            raise ValueError(f"plan record: date must look like '2024-03-20', got "
                             f"{raw_date!r}") from None
        return cls(
            date=day,
            site_name=str(_field(d, "site_name", w)),
            timezone=str(_field(d, "timezone", w)),
            targets=tuple(PlannedTarget.from_dict(t) for t in _field(d, "targets", w)),
            skipped=tuple(SkippedTarget.from_dict(s) for s in _field(d, "skipped", w)),
            events=tuple(PlanEvent.from_dict(e) for e in _field(d, "events", w)),
            sunrise_utc=_optional_time(_field(d, "sunrise_utc", w), "sunrise_utc"),
            sunset_utc=_optional_time(_field(d, "sunset_utc", w), "sunset_utc"),
            solar_noon_utc=_optional_time(_field(d, "solar_noon_utc", w), "solar_noon_utc"),
            notes=tuple(str(n) for n in _field(d, "notes", w)),
        )
