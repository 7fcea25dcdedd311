"""The instrument's filter-function file: a two-column CSV table (standard library only).

The header is ``wavelength_nm,relative_response``; then one row per wavelength [nm],
strictly increasing, with a finite response of at least 0 (any scale: it is
normalised to a peak of 1), at least :data:`MIN_ROWS` rows. Each error names the
file and the line. The daemon's configuration and the simulator's scenarios both
read this format; what they compute from the table is their own.
"""

from __future__ import annotations

import math
from pathlib import Path

MIN_ROWS = 3
HEADER = ("wavelength_nm", "relative_response")
#: Filter files larger than this are refused (a 0.01-nm table of 1000 nm is ~2 MB).
MAX_FILTER_BYTES = 4 * 1024 * 1024


class FilterFileError(ValueError):
    """A filter file is unreadable or malformed; the message names the line."""


def _cells(line: str) -> list[str]:
    return [c.strip() for c in line.split(",")]


def read_filter_table(path: Path) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """Read and check a filter file: wavelengths [nm] ascending, responses (peak 1).

    Raises :class:`FilterFileError` naming the file and the line.
    """
    try:
        if path.stat().st_size > MAX_FILTER_BYTES:
            raise FilterFileError(f"{path}: larger than {MAX_FILTER_BYTES} bytes; a filter "
                                  f"table needs far fewer rows")
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise FilterFileError(f"{path}: no such file; give the path relative to the "
                              f"configuration file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise FilterFileError(f"{path}: cannot read the file ({exc})") from None
    lines = text.splitlines()
    numbered = [(i, ln) for i, ln in enumerate(lines, start=1) if ln.strip()]
    if not numbered or tuple(c.lower() for c in _cells(numbered[0][1])) != HEADER:
        first = numbered[0][0] if numbered else 1
        raise FilterFileError(f"{path}: line {first}: the first line must be the header "
                              f"'{','.join(HEADER)}'")
    wl: list[float] = []
    resp: list[float] = []
    for lineno, line in numbered[1:]:
        cells = _cells(line)
        where = f"{path}: line {lineno}"
        if len(cells) != 2:
            raise FilterFileError(f"{where}: {len(cells)} columns; give wavelength_nm and "
                                  f"relative_response")
        try:
            x, y = float(cells[0]), float(cells[1])
        except ValueError:
            raise FilterFileError(f"{where}: {line.strip()!r} is not two numbers") from None
        if not math.isfinite(x) or not math.isfinite(y):
            raise FilterFileError(f"{where}: not a finite number")
        if y < 0:
            raise FilterFileError(f"{where}: response {y:g} is negative; responses are "
                                  f"relative and at least 0")
        if wl and x <= wl[-1]:
            raise FilterFileError(f"{where}: wavelength {x:g} nm is not above the previous "
                                  f"{wl[-1]:g} nm; wavelengths must increase strictly")
        wl.append(x)
        resp.append(y)
    if len(wl) < MIN_ROWS:
        raise FilterFileError(f"{path}: {len(wl)} rows of data; a filter needs at least "
                              f"{MIN_ROWS}")
    peak = max(resp)
    if peak <= 0:
        raise FilterFileError(f"{path}: every response is 0; the filter passes no light")
    return tuple(wl), tuple(r / peak for r in resp)
