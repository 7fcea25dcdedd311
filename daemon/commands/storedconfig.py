"""The configuration a read command works with: ``--config`` when given, else the one
the store recorded (the text its last run used), else ``$HELIOTROPE_CONFIG`` or the
service's default file.

Parsing the stored text uses the project's strict loader (PyYAML and the standard
library only), so the read path stays light.
"""

from __future__ import annotations

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


def choose_config(path: str | None, db: str | Path | None, needed_for: str) -> ChosenConfig:
    """The configuration for a command on the store ``db`` (CommandError, exit 78, if
    bad). ``needed_for`` says in the message what the command needs it for."""
    from daemon.config.settings import ConfigError, config_from_text, load_config

    if path is None:
        stored = recorded_configuration(db)
        if stored is not None:
            source = f"{db}: configuration {stored['sha256'][:12]} recorded by the store"
            try:
                config = config_from_text(stored["text"], source)
            except ConfigError as exc:
                raise CommandError(f"{exc}; this heliotrope cannot use the configuration the "
                                   "store recorded: pass --config FILE", EX_CONFIG) from None
            return ChosenConfig(config, {k: v for k, v in stored.items() if k != "text"})
    path = path or os.environ.get("HELIOTROPE_CONFIG") or DEFAULT_CONFIG
    try:
        return ChosenConfig(load_config(path), None)
    except ConfigError as exc:
        raise CommandError(f"{exc}. {needed_for}; the store recorded none, so pass --config "
                           "FILE or set HELIOTROPE_CONFIG", EX_CONFIG) from None
