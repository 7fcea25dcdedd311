"""The operator's command errors and exit codes (sysexits.h).

Exit codes: 0 done; 1 nothing to show (EX_NOTHING); 64 bad usage; 65 bad input data;
66 a file that should exist does not; 69 the simulator or a device is unavailable;
73 an output file cannot be created; 78 bad configuration.
"""

from __future__ import annotations

EX_NOTHING = 1
EX_USAGE, EX_DATAERR, EX_NOINPUT, EX_UNAVAILABLE, EX_CANTCREAT, EX_CONFIG = (
    64, 65, 66, 69, 73, 78)


class CommandError(Exception):
    """A failure with a message for the operator and an exit code."""

    def __init__(self, message: str, code: int):
        super().__init__(message)
        self.code = code
