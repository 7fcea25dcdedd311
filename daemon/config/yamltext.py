"""The configuration's YAML text: read bounded, parsed with strict rules.

A stricter ``yaml.SafeLoader`` (:class:`_StrictLoader`): no duplicate keys, no anchors
or aliases, bounded size, nesting and whole numbers, every refusal with its line and
column. Imported only where a text is parsed (:func:`daemon.config.settings.load_config`,
:func:`~daemon.config.settings.config_from_text`), so PyYAML stays off the read commands'
path when the store holds the recorded configuration's JSON form (:func:`json_form`).
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import yaml

from daemon.config.errors import MAX_DEPTH, MAX_FILE_BYTES, MAX_WHOLE, MAX_WHOLE_TEXT, ConfigError


class _Refused(yaml.MarkedYAMLError):
    """Valid YAML that this loader will not take (an alias, too deep, too large)."""


class _StrictRules:
    """What a configuration never needs, refused in PyYAML's composer and constructor.

    Anchors and aliases are refused outright rather than counted, which keeps an
    alias-expansion bomb at a few nodes of work. Nesting is bounded in the composer, the
    one recursive stage of PyYAML, so deep brackets never reach a ``RecursionError``.
    Mapping and sequence construction record each value's key path for the messages.
    Mixed into :class:`_StrictLoader` and :class:`_FastStrictLoader`.
    """

    _depth: int
    _paths: dict[yaml.Node, str]

    def compose_node(self, parent: yaml.Node | None, index: Any) -> yaml.Node:
        event = self.peek_event()
        if isinstance(event, yaml.AliasEvent):
            raise _Refused(None, None, f"alias *{event.anchor} is not allowed; write the "
                           "value out in full", event.start_mark)
        if event.anchor is not None:
            raise _Refused(None, None, f"anchor &{event.anchor} is not allowed; write the "
                           "value out in full", event.start_mark)
        if not isinstance(event, yaml.SequenceStartEvent | yaml.MappingStartEvent):
            return super().compose_node(parent, index)
        if self._depth >= MAX_DEPTH:
            raise _Refused(None, None, f"nested more than {MAX_DEPTH} levels deep; allowed "
                           f"at most {MAX_DEPTH}", event.start_mark)
        self._depth += 1
        try:
            return super().compose_node(parent, index)
        finally:
            self._depth -= 1

    def _where(self, node: yaml.Node) -> str:
        return self._paths.get(node) or "top level"

    def construct_mapping(self, node: yaml.Node, deep: bool = False) -> dict[Any, Any]:
        path = self._paths.get(node, "")
        first_seen: dict[Any, yaml.Node] = {}
        for key_node, value_node in node.value:
            if key_node.tag == "tag:yaml.org,2002:merge":
                raise _Refused(None, None, "merge key << is not allowed; write the keys out "
                               "in full", key_node.start_mark)
            key = self.construct_object(key_node, deep=True)
            try:
                first = first_seen.get(key)
            except TypeError:
                continue  # an unhashable key: SafeLoader's own message follows
            key_path = f"{path}.{key}" if path else str(key)
            if first is not None:
                raise _Refused(None, None, f"{key_path}: key given twice, at line "
                               f"{first.start_mark.line + 1} and line "
                               f"{key_node.start_mark.line + 1}; keep one",
                               key_node.start_mark)
            first_seen[key] = key_node
            self._paths[value_node] = key_path
        return super().construct_mapping(node, deep=deep)

    def construct_sequence(self, node: yaml.Node, deep: bool = False) -> list[Any]:
        path = self._paths.get(node, "")
        for i, child in enumerate(node.value):
            self._paths[child] = f"{path}[{i}]"
        return super().construct_sequence(node, deep=deep)

    def construct_yaml_int(self, node: yaml.Node) -> int:
        # Checked on the text first: int() of thousands of digits is slow or refused.
        too_big = f"{self._where(node)}: whole number {_shorten(node.value)} is too large; " \
            f"allowed -{MAX_WHOLE} to {MAX_WHOLE} (and each key's own range)"
        if len(node.value) > MAX_WHOLE_TEXT:
            raise _Refused(None, None, too_big, node.start_mark)
        value = super().construct_yaml_int(node)
        if abs(value) > MAX_WHOLE:
            raise _Refused(None, None, too_big, node.start_mark)
        return value

    def construct_yaml_timestamp(self, node: yaml.Node) -> Any:
        try:
            return super().construct_yaml_timestamp(node)
        except ValueError as exc:  # a date such as 2027-02-30 or year 0000
            raise _Refused(None, None, f"{self._where(node)}: {node.value!r} is not a "
                           f"date ({exc})", node.start_mark) from None


class _StrictLoader(_StrictRules, yaml.SafeLoader):
    """``yaml.SafeLoader`` with :class:`_StrictRules`: the loader of every file."""

    def __init__(self, stream: str):
        super().__init__(stream)
        self._depth = 0
        self._paths = {}


_LOADERS: tuple[type, ...] = (_StrictLoader,)
if yaml.__with_libyaml__:  # PyYAML's wheels ship it; without it, the strict loader only
    class _FastStrictLoader(_StrictRules, yaml.composer.Composer, yaml.cyaml.CParser,
                            yaml.constructor.SafeConstructor, yaml.resolver.Resolver):
        """The same rules over libyaml's scanner and parser (PyYAML's C extension).

        The events come from C, the composing and constructing (and so every check of
        :class:`_StrictRules`) stay PyYAML's Python code: parsing a shipped configuration
        takes about 1.5 ms instead of 15, which every read command that needs the
        configuration pays at its start. On any error the text is parsed again with
        :class:`_StrictLoader`, whose message is the one the operator sees.
        """

        def __init__(self, stream: str):
            yaml.cyaml.CParser.__init__(self, stream)
            yaml.constructor.SafeConstructor.__init__(self)
            yaml.resolver.Resolver.__init__(self)
            yaml.composer.Composer.__init__(self)
            self._depth = 0
            self._paths = {}

    _LOADERS += (_FastStrictLoader,)

for _loader in _LOADERS:
    _loader.add_constructor("tag:yaml.org,2002:int", _StrictRules.construct_yaml_int)
    _loader.add_constructor("tag:yaml.org,2002:timestamp",
                            _StrictRules.construct_yaml_timestamp)


def _shorten(text: str) -> str:
    digits = sum(c.isdigit() for c in text)
    return repr(text) if len(text) <= 24 else f"{text[:12]!r}... ({digits} digits)"


def _load(loader_class: type, text: str) -> Any:
    loader = loader_class(text)
    try:
        return loader.get_single_data()
    finally:
        loader.dispose()


def _refusal(exc: _Refused) -> ConfigError:
    mark = exc.problem_mark
    return ConfigError(f"line {mark.line + 1}, column {mark.column + 1}: {exc.problem}")


def parse_yaml(text: str) -> Any:
    """Parse one YAML document with the strict rules; raise :class:`ConfigError`.

    :class:`_FastStrictLoader` first where PyYAML has libyaml (same rules, same data,
    same marks); a text libyaml itself does not take is parsed again by
    :class:`_StrictLoader`, so every error reads the same with or without libyaml.
    """
    # PyYAML's reader refuses a control character anywhere before parsing anything,
    # libyaml only where it reads it: leave such texts to the former, for its message.
    if yaml.__with_libyaml__ and not yaml.reader.Reader.NON_PRINTABLE.search(text):
        try:
            return _load(_FastStrictLoader, text)
        except _Refused as exc:
            raise _refusal(exc) from None
        except Exception:  # noqa: BLE001 - libyaml's own error: PyYAML's words below
            pass
    try:
        return _load(_StrictLoader, text)  # its reader checks for control characters
    except _Refused as exc:
        raise _refusal(exc) from None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = f" at line {mark.line + 1}, column {mark.column + 1}" if mark else ""
        raise ConfigError(f"not valid YAML{where}: {exc.problem or exc.context}") from None
    except yaml.reader.ReaderError as exc:
        # The reader counts characters, not lines: turn the offset into both.
        line = text.count("\n", 0, exc.position) + 1
        column = exc.position - (text.rfind("\n", 0, exc.position) + 1) + 1
        raise ConfigError(f"not valid YAML at line {line}, column {column}: control "
                          f"character U+{exc.character:04X} is not allowed; remove it") from None
    except yaml.YAMLError as exc:
        raise ConfigError(f"not valid YAML: {exc}") from None


def read_text(path: Path) -> str:
    """The file's text, read no further than :data:`MAX_FILE_BYTES` plus one byte."""
    with path.open("rb") as f:
        size = os.fstat(f.fileno()).st_size
        data = f.read(MAX_FILE_BYTES + 1)
    if len(data) > MAX_FILE_BYTES:
        said = f"{size} bytes" if size > MAX_FILE_BYTES else f"more than {MAX_FILE_BYTES} bytes"
        raise ConfigError(f"the file is {said}; a configuration may be at most "
                          f"{MAX_FILE_BYTES} bytes (1 MiB)")
    return data.decode("utf-8")


def json_form(data: Any) -> str | None:
    """``data`` (a parsed configuration) as JSON text, or None when JSON cannot hold
    it exactly: a date, a non-finite number, a key that is not text. The round trip is
    checked value by value and type by type, so the JSON form, parsed, is ``data``."""
    try:
        text = json.dumps(data, allow_nan=False, ensure_ascii=False, separators=(",", ":"))
    except (TypeError, ValueError):
        return None
    return text if _same(json.loads(text), data) else None


def _same(a: Any, b: Any) -> bool:
    if type(a) is not type(b):
        return False
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    return a == b
