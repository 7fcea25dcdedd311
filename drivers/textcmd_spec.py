"""The command table of a text-command instrument, read from ``instrument.*.options``.

A text-command instrument answers one line of text for each line it is sent: a
voltmeter with a channel scanner speaking SCPI, a small tracker firmware with
one-letter commands. For each action the daemon needs (identify, read the channels,
read the dark signal, ...) the configuration gives the command template, the pattern
of the reply with the named groups it yields, and how those become the interface's
fields. This module turns the raw mapping into a :class:`TextSpec` and refuses
anything that could only fail later: a template with a field the action does not
have, a pattern that does not compile or lacks a group the action must yield, an
unknown key, a timeout out of range. Every error is a
:class:`~drivers.interfaces.DriverConfigError` naming the key inside the block.

Pure: the standard library only (no pyserial), so reading a configuration stays fast.
"""

from __future__ import annotations

import re
import string
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from drivers.interfaces import DriverConfigError

RADIOMETER = "radiometer"
TRACKER = "tracker"

LINE_ENDINGS = {"CRLF": b"\r\n", "LF": b"\n", "CR": b"\r"}
TRACKER_MODES = ("idle", "slewing", "tracking", "parked", "fault")
#: Per-action timeout bounds [s]: a long burst may need more than the port's timeout,
#: but no more than the configuration reader allows one unanswered command in all
#: (daemon.config.settings.MAX_EXCHANGE_S, 20 s).
TIMEOUT_RANGE_S = (0.05, 20.0)
#: SCPI's "not a number" and overload value (SCPI-1999 Vol. 1, sec. 7.2.1.5: 9.91E+37
#: is NaN; 9.9E+37 is what an overloaded measurement reads).
SCPI_NAN = 9.91e37
SCPI_OVERLOAD = 9.9e37

# The values a template may use, and a sample of each to try the template with.
_CLOCK_FIELDS = {"year": 2027, "month": 2, "day": 15, "hour": 13, "minute": 5,
                 "second": 2.125, "iso": "2027-02-15T13:05:02.125Z"}
_BURST_FIELDS = {"n": 10}


@dataclass(frozen=True)
class ActionKind:
    """What one action may put in its command and must (or may) get from its reply."""

    template_fields: Mapping[str, Any]
    required_groups: tuple[str, ...] = ()
    optional_groups: tuple[str, ...] = ()
    burst: bool = False


_ACTIONS: dict[str, dict[str, ActionKind]] = {
    RADIOMETER: {
        "identify": ActionKind({}, ("model", "serial", "firmware"), ("manufacturer",)),
        "read_channels": ActionKind(_BURST_FIELDS, ("values",), ("duration_s",), burst=True),
        "read_dark": ActionKind(_BURST_FIELDS, ("values",), ("duration_s",), burst=True),
        "read_housekeeping": ActionKind(
            {}, ("detector_temp_c", "case_temp_c", "ambient_temp_c", "supply_v",
                 "humidity_pct"), ("pressure_hpa",)),
        "set_clock": ActionKind(_CLOCK_FIELDS),
        "reset": ActionKind({}),
    },
    TRACKER: {
        "identify": ActionKind({}, ("model", "serial", "firmware"), ("manufacturer",)),
        "goto": ActionKind({"az": 123.456, "el": 45.678}),
        "follow": ActionKind({"on": 1}),
        "park": ActionKind({}),
        "state": ActionKind({}, ("mode", "azimuth_deg", "elevation_deg", "locked"),
                            ("error_deg",)),
        "set_clock": ActionKind(_CLOCK_FIELDS),
    },
}
_REQUIRED_ACTIONS = {
    RADIOMETER: ("identify", "read_channels", "read_dark", "read_housekeeping"),
    TRACKER: ("identify", "goto", "follow", "park", "state"),
}
#: Groups whose text is looked up in a ``map`` rather than read as a number.
_MAPPED_GROUPS = {"mode", "locked"}
_TEXT_GROUPS = {"model", "serial", "firmware", "manufacturer"}
_DEFAULT_MAPS: dict[str, dict[str, Any]] = {
    "mode": {m: m for m in TRACKER_MODES},
    "locked": {"0": False, "1": True},
}


@dataclass(frozen=True)
class FieldSpec:
    """How one named group becomes an interface field: ``value * scale + offset``,
    or the group's text looked up in ``map``."""

    scale: float = 1.0
    offset: float = 0.0
    map: Mapping[str, Any] | None = None


@dataclass(frozen=True)
class ActionSpec:
    name: str
    command: str
    pattern: re.Pattern[str]
    fields: Mapping[str, FieldSpec]
    timeout_s: float | None = None
    sample_interval_s: float | None = None  # bursts: time between samples [s]

    def format(self, **values: Any) -> str:
        return self.command.format(**values)

    def field(self, group: str) -> FieldSpec:
        return self.fields.get(group) or FieldSpec(map=_DEFAULT_MAPS.get(group))


@dataclass(frozen=True)
class ErrorQuery:
    """The query that reads the device's error queue (SCPI ``SYSTem:ERRor?``)."""

    command: str
    pattern: re.Pattern[str]  # groups code and message
    no_error_code: int = 0


@dataclass(frozen=True)
class TextSpec:
    kind: str
    line_ending: bytes
    actions: Mapping[str, ActionSpec]
    error_pattern: re.Pattern[str] | None = None
    error_query: ErrorQuery | None = None
    channels: int | None = None  # radiometer: values per sample
    full_scale_v: float | None = None  # radiometer: a sample at or above is saturated
    separator: str = ","  # between the numbers of a burst's ``values`` group


# ---------------------------------------------------------------------------- reading


class _Block:
    """One mapping of the options block, with the key path of each value for errors."""

    def __init__(self, data: Any, path: str) -> None:
        if not isinstance(data, Mapping):
            raise DriverConfigError(path, f"expected a mapping, got {_kind(data)}")
        self.data = dict(data)
        self.path = path
        self.seen: set[str] = set()

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def get(self, name: str, default: Any = None) -> Any:
        self.seen.add(name)
        return self.data.get(name, default)

    def has(self, name: str) -> bool:
        self.seen.add(name)
        return name in self.data

    def number(self, name: str, lo: float, hi: float, default: Any = None,
               unit: str = "") -> float | None:
        value = self.get(name, default)
        if value is None:
            return None
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise DriverConfigError(self.key(name), f"expected a number, got {_kind(value)}")
        if not lo <= value <= hi:
            suffix = f" {unit}" if unit else ""
            raise DriverConfigError(self.key(name), f"{value:g} is out of range; allowed "
                                                    f"{lo:g} to {hi:g}{suffix}")
        return float(value)

    def text(self, name: str, required: bool = True) -> str | None:
        value = self.get(name)
        if value is None:
            if required:
                raise DriverConfigError(self.key(name), "missing; it is required")
            return None
        if not isinstance(value, str) or not value:
            raise DriverConfigError(self.key(name), f"expected a non-empty string, got "
                                                    f"{_kind(value)}")
        return value

    def finish(self) -> None:
        unknown = sorted(str(k) for k in self.data if k not in self.seen)
        if unknown:
            raise DriverConfigError(self.key(unknown[0]),
                                    f"unknown key; known here: {', '.join(sorted(self.seen))}")


def _kind(value: Any) -> str:
    if value is None:
        return "nothing"
    if isinstance(value, bool):
        return f"a boolean ({value})"
    if isinstance(value, str):
        return f"the string {value!r}"
    if isinstance(value, int | float):
        return f"the number {value!r}"
    if isinstance(value, Mapping):
        return "a mapping"
    if isinstance(value, list):
        return "a list"
    return type(value).__name__


def _compile(key: str, pattern: str) -> re.Pattern[str]:
    try:
        return re.compile(pattern)
    except re.error as exc:
        raise DriverConfigError(key, f"the regular expression does not compile: {exc}; "
                                     "check brackets and escapes (in YAML, quote the "
                                     "pattern with single quotes)") from None


def _check_template(key: str, template: str, allowed: Mapping[str, Any]) -> None:
    if any(c in template for c in "\r\n"):
        raise DriverConfigError(key, "the command contains a line break; the driver adds "
                                     "the line ending itself")
    try:
        parsed = list(string.Formatter().parse(template))
    except ValueError as exc:
        raise DriverConfigError(key, f"not a valid template: {exc}; write a literal brace "
                                     "as {{ or }}") from None
    for _, name, _, _ in parsed:
        if name is None:
            continue
        if name not in allowed:
            known = ", ".join(sorted(allowed)) or "none"
            what = "a positional field {}" if name == "" or name.isdigit() else f"{{{name}}}"
            raise DriverConfigError(key, f"{what} is not a field of this action; its "
                                         f"fields: {known}")
    try:
        template.format(**allowed)
    except (ValueError, TypeError, KeyError, IndexError, AttributeError) as exc:
        raise DriverConfigError(key, f"the template does not format: {exc}; use "
                                     "str.format fields such as {az:.2f}") from None


def _read_fields(block: _Block, name: str, groups: set[str]) -> dict[str, FieldSpec]:
    raw = block.get(name)
    if raw is None:
        return {}
    fields_block = _Block(raw, block.key(name))
    out: dict[str, FieldSpec] = {}
    for group in list(fields_block.data):
        key = fields_block.key(str(group))
        if group not in groups:
            raise DriverConfigError(key, "no such named group in the pattern; groups: "
                                         f"{', '.join(sorted(groups)) or 'none'}")
        if group in _TEXT_GROUPS:
            raise DriverConfigError(key, "a text field takes no scale, offset or map")
        spec = _Block(fields_block.get(str(group)), key)
        if group in _MAPPED_GROUPS:
            mapping = spec.get("map")
            if not isinstance(mapping, Mapping) or not mapping:
                raise DriverConfigError(spec.key("map"), "give a mapping from the device's "
                                                         "text to the value")
            for text, value in mapping.items():
                ok = value in TRACKER_MODES if group == "mode" else isinstance(value, bool)
                if not ok:
                    allowed = ", ".join(TRACKER_MODES) if group == "mode" else "true or false"
                    raise DriverConfigError(spec.key(f"map.{text}"),
                                            f"{_kind(value)} is not allowed; use {allowed}")
            out[group] = FieldSpec(map={str(k): v for k, v in mapping.items()})
        else:
            scale = spec.number("scale", -1e12, 1e12, default=1.0)
            if scale == 0:
                raise DriverConfigError(spec.key("scale"), "0 would read every value as the "
                                                           "offset; give the real scale")
            offset = spec.number("offset", -1e12, 1e12, default=0.0)
            out[group] = FieldSpec(scale=scale, offset=offset)
        spec.finish()
    return out


def _read_action(kind: str, name: str, raw: Any, path: str) -> ActionSpec:
    what = _ACTIONS[kind][name]
    block = _Block(raw, path)
    command = block.text("command")
    assert command is not None
    _check_template(block.key("command"), command, what.template_fields)
    pattern_text = block.text("pattern")
    assert pattern_text is not None
    pattern = _compile(block.key("pattern"), pattern_text)
    groups = set(pattern.groupindex)
    missing = [g for g in what.required_groups if g not in groups]
    if missing:
        raise DriverConfigError(block.key("pattern"),
                                f"lacks the named group(s) {', '.join(missing)} that "
                                f"{name} must yield; write (?P<{missing[0]}>...)")
    extra = sorted(groups - set(what.required_groups) - set(what.optional_groups))
    if extra:
        known = ", ".join(what.required_groups + what.optional_groups) or "none"
        raise DriverConfigError(block.key("pattern"),
                                f"named group {extra[0]!r} is not a field of {name}; its "
                                f"fields: {known} (use (?:...) for a group that yields "
                                "nothing)")
    fields = _read_fields(block, "fields", groups)
    timeout_s = block.number("timeout_s", *TIMEOUT_RANGE_S, unit="s")
    interval = None
    if what.burst:
        interval = block.number("sample_interval_s", 0.0, 60.0, unit="s")
        if interval is None and "duration_s" not in groups:
            raise DriverConfigError(block.key("sample_interval_s"),
                                    "missing: give the time between samples [s], or a "
                                    "(?P<duration_s>...) group in the pattern")
    block.finish()
    return ActionSpec(name, command, pattern, fields, timeout_s, interval)


def _check(kind: str, options: Any) -> TextSpec:
    if options is None:
        raise DriverConfigError("", "the text driver needs an options block with its "
                                    "line_ending and actions (see README, 'Supported "
                                    "hardware')")
    top = _Block(options, "")
    ending_name = top.get("line_ending", "LF")
    if ending_name not in LINE_ENDINGS:
        raise DriverConfigError("line_ending", f"{_kind(ending_name)} is not a line ending; "
                                               f"use one of {', '.join(LINE_ENDINGS)}")
    line_ending = LINE_ENDINGS[ending_name]
    channels = full_scale = None
    separator = ","
    if kind == RADIOMETER:
        n = top.get("channels")
        if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= 64:
            raise DriverConfigError("channels", f"{_kind(n)}: give the number of values "
                                                "per sample, a whole number 1 to 64")
        channels = n
        full_scale = top.number("full_scale_v", 1e-6, 1e6, unit="V")
        separator = top.get("separator", ",")
        if not isinstance(separator, str) or len(separator) != 1 or separator in "0123456789.+-eE":
            raise DriverConfigError("separator", f"{_kind(separator)}: give one character "
                                                 "that cannot be part of a number")
    error_pattern = None
    if top.has("error_pattern"):
        text = top.text("error_pattern")
        assert text is not None
        error_pattern = _compile("error_pattern", text)
        extra = sorted(set(error_pattern.groupindex) - {"code", "message"})
        if extra:
            raise DriverConfigError("error_pattern", f"named group {extra[0]!r} is not "
                                                     "allowed; use code and message")
    error_query = None
    if top.has("error_query"):
        eq = _Block(top.get("error_query"), "error_query")
        command = eq.text("command")
        assert command is not None
        _check_template(eq.key("command"), command, {})
        text = eq.text("pattern")
        assert text is not None
        pattern = _compile(eq.key("pattern"), text)
        missing = [g for g in ("code", "message") if g not in pattern.groupindex]
        if missing:
            raise DriverConfigError(eq.key("pattern"), f"lacks the named group "
                                                       f"{missing[0]!r}; an error query "
                                                       "yields code and message")
        no_error = eq.get("no_error_code", 0)
        if isinstance(no_error, bool) or not isinstance(no_error, int):
            raise DriverConfigError(eq.key("no_error_code"), f"{_kind(no_error)}: give a "
                                                             "whole number")
        eq.finish()
        error_query = ErrorQuery(command, pattern, no_error)
    actions_block = _Block(top.get("actions"), "actions") if top.has("actions") else None
    if actions_block is None:
        raise DriverConfigError("actions", "missing; give one entry per action: "
                                           f"{', '.join(_ACTIONS[kind])}")
    actions: dict[str, ActionSpec] = {}
    for name in _REQUIRED_ACTIONS[kind]:
        if not actions_block.has(name):
            raise DriverConfigError(actions_block.key(name),
                                    f"missing; a {kind} needs the actions "
                                    f"{', '.join(_REQUIRED_ACTIONS[kind])}")
    for name in _ACTIONS[kind]:
        if actions_block.has(name):
            actions[name] = _read_action(kind, name, actions_block.get(name),
                                         actions_block.key(name))
    actions_block.finish()
    top.finish()
    return TextSpec(kind, line_ending, actions, error_pattern, error_query, channels,
                    full_scale, separator)


def check_radiometer_options(options: Any) -> TextSpec:
    """The registry's option check for ``instrument.radiometer`` with driver ``text``."""
    return _check(RADIOMETER, options)


def check_tracker_options(options: Any) -> TextSpec:
    """The registry's option check for ``instrument.tracker`` with driver ``text``."""
    return _check(TRACKER, options)


def clock_fields(when: datetime) -> dict[str, Any]:
    """The template fields of ``set_clock`` for ``when`` (UTC), to the millisecond.

    Rounded first, so that a template's ``{second:.3f}`` never reads ``60.000``."""
    when = datetime.fromtimestamp(round(when.timestamp(), 3), when.tzinfo)
    second = when.second + when.microsecond / 1e6
    iso = when.strftime("%Y-%m-%dT%H:%M:%S.") + f"{when.microsecond // 1000:03d}Z"
    return {"year": when.year, "month": when.month, "day": when.day, "hour": when.hour,
            "minute": when.minute, "second": second, "iso": iso}
