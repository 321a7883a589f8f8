"""Tidy-table output of array results: rows, CSV and JSON lines, one convention for all.

Absent values (NaN in the arrays) are empty CSV fields and JSON ``null``; infinities
are ``inf`` / ``-inf`` (the convention of :func:`propcalc.jsonable`); floats are written
in Python's shortest round-trip form, so a table read back gives the same numbers.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
from collections.abc import Iterator
from typing import IO, Any

import numpy as np

from ..jsonable import jsonable

__all__ = ["Table", "cell", "frozen"]

Array = np.ndarray


def cell(value: Any) -> Any:
    """A table cell: NaN (absent) -> None, numpy scalars -> Python (inf stays a float)."""
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return None if math.isnan(f) else f
    if isinstance(value, np.str_):
        return str(value)
    return value


def _csv_text(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    return str(value)


class Table:
    """Tidy-table output shared by the sweep results (rows, CSV, JSON lines)."""

    def columns(self) -> dict[str, Array]:  # pragma: no cover - overridden
        raise NotImplementedError

    def rows(self) -> Iterator[dict[str, Any]]:
        """One dict per grid point, in C order of the arrays (None for absent values)."""
        cols = self.columns()
        names = list(cols)
        n = len(next(iter(cols.values()))) if cols else 0
        for i in range(n):
            yield {k: cell(cols[k][i]) for k in names}

    def _write(self, text: str, path_or_buffer: str | os.PathLike[str] | IO[str] | None) -> str:
        if path_or_buffer is None:
            return text
        if hasattr(path_or_buffer, "write"):
            path_or_buffer.write(text)  # type: ignore[union-attr]
        else:
            with open(path_or_buffer, "w", encoding="utf-8", newline="") as fh:
                fh.write(text)
        return text

    def to_csv(self, path_or_buffer: str | os.PathLike[str] | IO[str] | None = None) -> str:
        """The tidy table as CSV text (written to a path or text buffer if given).

        A header row with the column names, then one row per point; absent
        values are empty fields, infinities ``inf`` / ``-inf``, floats in
        Python's shortest round-trip form.
        """
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        cols = list(self.columns())
        writer.writerow(cols)
        for row in self.rows():
            writer.writerow([_csv_text(row[k]) for k in cols])
        return self._write(buf.getvalue(), path_or_buffer)

    def to_json_lines(self, path_or_buffer: str | os.PathLike[str] | IO[str] | None = None) -> str:
        """The tidy table as JSON lines: one object per point, strict JSON.

        Absent values are ``null`` and infinities the strings ``"inf"`` /
        ``"-inf"`` (:func:`propcalc.jsonable`).
        """
        lines = [json.dumps(jsonable(row), allow_nan=False) for row in self.rows()]
        return self._write("".join(line + "\n" for line in lines), path_or_buffer)


def frozen(a: Array) -> Array:
    """A read-only copy of ``a`` (result arrays cannot be changed behind the result's back)."""
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a
