"""The configuration's error, its exit code and the bounds on a configuration text.

Apart from :mod:`daemon.config.settings` (which re-exports them) so that
:mod:`daemon.config.yamltext` can use them without importing the settings.
"""

from __future__ import annotations

EX_CONFIG = 78  # sysexits.h: configuration error
# Bounds on the file itself, far above any real configuration (the shipped ones are
# about 3 kB, 4 levels deep), so a damaged or hostile file fails fast and small.
MAX_FILE_BYTES = 1024 * 1024
MAX_DEPTH = 64
# Every number ends up as a float; past 2**53 a whole number no longer survives that.
MAX_WHOLE = 2**53
MAX_WHOLE_TEXT = 64  # characters of one whole number's text, checked before int()


class ConfigError(Exception):
    """A configuration problem, phrased for the person who edits the file."""
