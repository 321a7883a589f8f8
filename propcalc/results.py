"""The one base of propcalc's result types: a frozen dataclass whose dict form is derived.

Every result (a propagation report, a plan, a network analysis...) is a frozen dataclass that
inherits :class:`Result`. Its :meth:`Result.to_dict` is derived from the dataclass fields, in
field order, so the Python API, ``propcalc ... --json`` and the service say the same thing in the
same words without a hand-written dictionary anywhere:

* a nested result becomes its own ``to_dict()``; tuples, lists and numpy arrays become lists;
  enums become their values; numpy scalars become Python numbers;
* a field declared with ``field(metadata=OMIT)`` stays out of the dict (a helper object, or a
  value only the Python API needs);
* floats stay floats, infinities included: :func:`propcalc.jsonable` turns the dict into strict
  JSON (``inf`` as the string ``"inf"``, absent values as ``null``, NaN refused).
"""

from __future__ import annotations

import dataclasses
import enum
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["Result", "OMIT", "plain"]

#: ``field(metadata=OMIT)``: the field is not part of the dict form.
OMIT: Mapping[str, bool] = {"dict": False}


def plain(value: Any) -> Any:
    """``value`` in plain Python: results as dicts, sequences as lists, enums as their values."""
    if isinstance(value, Result):
        return value.to_dict()
    if isinstance(value, enum.Enum):
        return plain(value.value)
    if isinstance(value, Mapping):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return [plain(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        return value.item()
    return value


class Result:
    """Mixin for frozen dataclasses: ``to_dict()`` derived from the fields."""

    __slots__ = ()

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python view of the fields (floats may be inf; see :func:`propcalc.jsonable`)."""
        return {f.name: plain(getattr(self, f.name))
                for f in dataclasses.fields(self)  # type: ignore[arg-type]
                if f.metadata.get("dict", True)}
