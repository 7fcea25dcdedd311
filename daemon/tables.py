"""Plain aligned tables for an 80-column SSH terminal, and JSON that never lies.

Standard library only: the operator's read commands import this.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterable, Sequence
from typing import Any


def fmt(value: Any, spec: str = "") -> str:
    """Format a cell; missing and non-finite numbers show as '-'."""
    if value is None or isinstance(value, float) and not math.isfinite(value):
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    return format(value, spec) if spec else str(value)


def table(headers: Sequence[str], rows: Iterable[Sequence[Any]],
          right: Sequence[bool] | None = None) -> str:
    """Columns separated by two spaces; numbers (``right``) aligned on the right."""
    cells = [[str(h) for h in headers]] + [[str(c) for c in r] for r in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    right = right or [False] * len(headers)
    lines = []
    for r in cells:
        parts = [c.rjust(w) if rt else c.ljust(w) for c, w, rt in zip(r, widths, right,
                                                                     strict=True)]
        lines.append("  ".join(parts).rstrip())
    return "\n".join(lines)


def _clean(obj: Any) -> Any:
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, dict):
        return {k: _clean(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        return [_clean(v) for v in obj]
    return obj


def dumps(obj: Any) -> str:
    """JSON with NaN and infinities as null (strict JSON parsers reject NaN)."""
    return json.dumps(_clean(obj), indent=2, allow_nan=False)
