"""The configuration a read command works with: ``--config`` when given, else the one
the store recorded (the text its last run used), else ``$HELIOTROPE_CONFIG`` or the
service's default file.

The store keeps the recorded text's parsed data as JSON beside it where JSON holds it
exactly; that is validated without PyYAML, so the read path stays light. Otherwise the
text is parsed by the project's strict loader.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from daemon.commands.errors import EX_CONFIG, CommandError

DEFAULT_CONFIG = "/etc/heliotrope/heliotrope.yaml"


@dataclass(frozen=True)
class ChosenConfig:
    config: Any  # daemon.config.settings.Config
    #: The recorded configuration row (without its text) when it came from the store.
    stored: dict | None


def recorded_configuration(db: str | Path | None) -> dict | None:
    """The configuration the store at ``db`` recorded last, or None (no store, a store
    from before provenance, or one that cannot be read: the caller says why later)."""
    if not db or not Path(db).exists():
        return None
    from daemon.store.reader import StoreError, open_readonly, stored_configuration
    try:
        conn = open_readonly(db)
    except StoreError:
        return None
    try:
        return stored_configuration(conn)
    finally:
        conn.close()


def _recorded(stored: dict, source: str):
    """The recorded configuration, validated from its JSON form when the store kept
    one (no YAML parser needed), else parsed from its text."""
    from daemon.config.settings import config_from_data, config_from_text

    if stored.get("data_json"):
        return config_from_data(json.loads(stored["data_json"]), stored["text"], source)
    return config_from_text(stored["text"], source)


def choose_config(path: str | None, db: str | Path | None, needed_for: str) -> ChosenConfig:
    """The configuration for a command on the store ``db`` (CommandError, exit 78, if
    bad). ``needed_for`` says in the message what the command needs it for."""
    from daemon.config.settings import ConfigError, load_config

    if path is None:
        stored = recorded_configuration(db)
        if stored is not None:
            source = f"{db}: configuration {stored['sha256'][:12]} recorded by the store"
            try:
                config = _recorded(stored, source)
            except ConfigError as exc:
                raise CommandError(f"{exc}; this heliotrope cannot use the configuration the "
                                   "store recorded: pass --config FILE", EX_CONFIG) from None
            return ChosenConfig(config, {k: v for k, v in stored.items()
                                         if k not in ("text", "data_json")})
    path = path or os.environ.get("HELIOTROPE_CONFIG") or DEFAULT_CONFIG
    try:
        return ChosenConfig(load_config(path), None)
    except ConfigError as exc:
        raise CommandError(f"{exc}. {needed_for}; the store recorded none, so pass --config "
                           "FILE or set HELIOTROPE_CONFIG", EX_CONFIG) from None
