"""Human-readable output of the ``propcalc`` command: numbers, tables, key-value lists, JSON.

Tables are left-aligned text columns; ``--json`` writes the results' ``to_dict()`` through
:func:`propcalc.jsonable` (infinities as ``"inf"``, absent values as ``null``, NaN refused).
"""

from __future__ import annotations

import json
import math
from collections.abc import Sequence
from typing import Any, TextIO

from .. import jsonable

__all__ = ["format_number", "format_table", "format_pairs", "emit_json", "compress_rows",
           "plus_minus", "verdict_table"]


def format_number(value: Any, digits: int = 6) -> str:
    """A number for a human table: ``inf``, ``-``, or ``digits`` significant figures."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return f"{value:.{digits}g}"
    return str(value)


def format_table(rows: Sequence[Sequence[Any]], header: Sequence[str]) -> str:
    """Left-aligned text columns with a rule under the header."""
    cells = [[str(h) for h in header]] + [[format_number(v) for v in row] for row in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def format_pairs(pairs: Sequence[tuple[str, Any]]) -> str:
    """``key  value`` lines, the keys padded to one width."""
    width = max(len(k) for k, _ in pairs)
    return "\n".join(f"{k.ljust(width)}  {format_number(v)}" for k, v in pairs)


def emit_json(obj: Any, out: TextIO) -> None:
    """Write ``obj`` as one indented, strict JSON document."""
    out.write(json.dumps(jsonable(obj), indent=2, allow_nan=False) + "\n")


def compress_rows(rows: list[list[Any]]) -> list[list[Any]]:
    """Merge runs of identical layers into one row 'a-b' (the table stays short)."""
    out: list[list[Any]] = []
    for row in rows:
        if out and out[-1][1:] == row[1:]:
            first = str(out[-1][0]).split("-")[0]
            out[-1][0] = f"{first}-{row[0]}"
        else:
            out.append(list(row))
    return out


def plus_minus(mean: float, se: float) -> str:
    """``mean +- 2 se`` (a measured band)."""
    return f"{format_number(mean)} +- {format_number(2 * se, 2)}"


def verdict_table(verdict: Any) -> str:
    """The reasons of a :class:`propcalc.Verdict`: name, pass/FAIL ('-': not computed), value,
    limit, and the fix (or, when not computed, why)."""
    return format_table([[r.name, "-" if r.passes is None else ("pass" if r.passes else "FAIL"),
                          "-" if r.value is None else r.value,
                          "-" if r.limit is None else r.limit,
                          r.fix or (r.detail if r.passes is None else "")]
                         for r in verdict.reasons],
                        ["reason", "result", "value", "limit", "fix"])
