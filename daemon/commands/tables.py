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


def results_table(rows: Sequence[dict], truth: dict | None = None) -> str:
    """The per-channel, per-session table of the demo and of ``today``."""
    headers = ["channel", "sess", "V0 1AU [V]"]
    if truth is not None:
        headers += ["truth [V]", "diff [%]"]
    headers += ["unc [%]", "tau", "used", "ok"]
    body = []
    for r in rows:
        line = [r["channel"], r["session"], fmt(r["v0_1au"], ".5f")]
        if truth is not None:
            true_v0 = truth.get(r["channel"], {}).get("v0_1au")
            diff = (100.0 * (r["v0_1au"] / true_v0 - 1.0)
                    if true_v0 and r["v0_1au"] is not None else None)
            line += [fmt(true_v0, ".5f"), fmt(diff, "+.3f")]
        unc = r["v0_rel_unc"] * 100 if r["v0_rel_unc"] is not None else None
        line += [fmt(unc, ".3f"), fmt(r["tau"], ".4f"), f"{r['n_used']}/{r['n_total']}",
                 fmt(bool(r["accepted"]))]
        body.append(line)
    right = [False, False] + [True] * (len(headers) - 3) + [False]
    text = table(headers, body, right)
    notes = [f"  {r['channel']} {r['session']}: {'; '.join(r['reasons'])}"
             for r in rows if r["reasons"]]
    return text + ("\nnot accepted:\n" + "\n".join(notes) if notes else "")
