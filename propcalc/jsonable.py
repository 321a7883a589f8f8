"""Turn result dictionaries into strict JSON values.

JSON has no infinity and no NaN. propcalc's documented convention: a number
that is infinite (a depth scale exactly at the edge of chaos, an unbounded
output range) is written as the string ``"inf"`` or ``"-inf"``; a quantity
that does not exist (q* when the variance grows without bound) is ``null``.
NaN never leaves propcalc: meeting one here is a bug and raises.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["jsonable", "INFINITY", "MINUS_INFINITY"]

INFINITY = "inf"
MINUS_INFINITY = "-inf"


def jsonable(value: Any) -> Any:
    """Return ``value`` with floats made JSON-safe, numpy scalars and tuples made plain.

    Raises
    ------
    ValueError
        If a NaN is found (it would mean a silent numerical failure).
    """
    if isinstance(value, Mapping):
        return {str(k): jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [jsonable(v) for v in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        f = float(value)
        if math.isnan(f):
            raise ValueError("NaN reached the output: this is a bug in propcalc, please report it")
        if math.isinf(f):
            return INFINITY if f > 0 else MINUS_INFINITY
        return f
    return value
