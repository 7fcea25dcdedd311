"""Output files of the commands: checked before anything is written, published whole.

An export, plot or report is written to a temporary file beside ``--out`` and moved
onto it only when complete, so a reader never sees half a file; the output may never
be the store itself (or its -wal, -shm or -journal file).
"""

from __future__ import annotations

import os
from pathlib import Path


class OutputPathError(Exception):
    """The output cannot be written where asked; the message says why and what to do."""


def publish(tmp: str | Path, out: Path) -> None:
    """Give a finished temporary file the usual permissions and move it onto ``out``."""
    mask = os.umask(0)
    os.umask(mask)  # mkstemp makes 0600 files; an export is as readable as any new file
    os.chmod(tmp, 0o666 & ~mask)
    os.replace(tmp, out)


def check_out_path(out: Path, db: Path) -> None:
    """Refuse an output path that is a directory, a device, pipe or socket, has no
    directory, or is the store.

    An output is moved onto its path whole (:func:`publish`), which would replace a
    device node such as /dev/null with a plain file, so only a regular file (or a new
    name) is accepted."""
    if out.is_dir():
        raise OutputPathError(f"--out {out}: is a directory; name a file")
    if out.exists() and not out.is_file():
        raise OutputPathError(f"--out {out}: is not a regular file (a device, pipe or "
                              "socket), and the finished output is moved onto its path, "
                              "which would replace it; name a regular file, or leave out "
                              "--out where the command can print to standard output")
    if not out.parent.is_dir():
        raise OutputPathError(f"--out {out}: the directory {out.parent} does not exist; "
                              "create it first")
    for suffix in ("", "-wal", "-shm", "-journal"):
        candidate = Path(str(db) + suffix)
        try:
            same = out.exists() and candidate.exists() and out.samefile(candidate)
        except OSError:
            same = False
        if same or out.resolve() == candidate.resolve():
            raise OutputPathError(f"--out {out}: that is the store itself; choose another "
                                  "file")
