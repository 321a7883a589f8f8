"""The one base of propcalc's result types: a frozen dataclass whose dict form is derived.

Every result (a propagation report, a plan, a network analysis...) is a frozen dataclass that
inherits :class:`Result`. Its :meth:`Result.to_dict` is derived from the dataclass fields, in
field order, so the Python API, ``propcalc ... --json`` and the service say the same thing in the
same words without a hand-written dictionary anywhere:

* a nested result becomes its own ``to_dict()``; tuples, lists and numpy arrays become lists;
  enums become their values; numpy scalars become Python numbers;
* a field declared with ``field(metadata=OMIT)`` stays out of the dict (a helper object, or a
  value only the Python API needs);
* a field declared with ``field(metadata=ABSENT_AS_NONE)`` holds a numeric table in which NaN
  marks an absent entry: NaN becomes None there (and only there);
* a field declared with ``field(metadata=inline(...))`` holds a nested result whose entries are
  written into the parent's dict instead of under the field's name;
* a constant that belongs in the dict is a field with a default and ``init=False``; a value
  computed from the fields that is cheap is a field set in ``__post_init__``; an expensive lazy
  value (a ``cached_property``) is named in the class attribute ``dict_properties`` and comes
  after the fields;
* floats stay floats, infinities included: :func:`propcalc.jsonable` turns the dict into strict
  JSON (``inf`` as the string ``"inf"``, absent values as ``null``, NaN refused).
"""

from __future__ import annotations

import dataclasses
import enum
import math
import typing
from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np

__all__ = ["Result", "OMIT", "ABSENT_AS_NONE", "inline", "plain"]

#: ``field(metadata=OMIT)``: the field is not part of the dict form.
OMIT: Mapping[str, Any] = {"dict": False}

#: ``field(metadata=ABSENT_AS_NONE)``: a numeric table whose NaN entries mean "absent" (None).
ABSENT_AS_NONE: Mapping[str, Any] = {"dict": True, "absent_as_none": True}


def inline(absent: Mapping[str, Any] | None = None) -> Mapping[str, Any]:
    """Metadata of a nested-result field whose entries are merged into the parent's dict.

    Parameters
    ----------
    absent : mapping, optional
        The entries written when the field is None (nothing by default).
    """
    return {"dict": True, "inline": dict(absent or {})}


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


def _absent_as_none(value: Any) -> Any:
    """``plain(value)`` with every NaN float replaced by None (a table's absent entries)."""
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        return [_absent_as_none(v) for v in value]
    value = plain(value)
    if isinstance(value, float) and math.isnan(value):
        return None
    return value


class Result:
    """Mixin for frozen dataclasses: ``to_dict()`` derived from the fields.

    Attributes
    ----------
    dict_properties : tuple of str
        Names of (lazy) properties written after the fields; empty for most results.
    """

    __slots__ = ()

    dict_properties: ClassVar[tuple[str, ...]] = ()

    @classmethod
    def dict_keys(cls) -> tuple[str, ...]:
        """The keys of :meth:`to_dict`, in order, known from the class alone.

        An inlined nested result contributes its own keys (read from the field's annotation).
        The service's response schemas are checked against these, field for field.
        """
        hints = typing.get_type_hints(cls)
        keys: list[str] = []
        for f in dataclasses.fields(cls):  # type: ignore[arg-type]
            meta = f.metadata
            if not meta.get("dict", True):
                continue
            if "inline" in meta:
                nested = [t for t in typing.get_args(hints[f.name]) or (hints[f.name],)
                          if isinstance(t, type) and issubclass(t, Result)]
                keys.extend(nested[0].dict_keys())
                keys.extend(k for k in meta["inline"] if k not in keys)
            else:
                keys.append(f.name)
        keys.extend(cls.dict_properties)
        return tuple(keys)

    def to_dict(self) -> dict[str, Any]:
        """Plain-Python view of the fields (floats may be inf; see :func:`propcalc.jsonable`)."""
        out: dict[str, Any] = {}
        for f in dataclasses.fields(self):  # type: ignore[arg-type]
            meta = f.metadata
            if not meta.get("dict", True):
                continue
            value = getattr(self, f.name)
            if "inline" in meta:
                out.update(meta["inline"] if value is None else plain(value))
            elif meta.get("absent_as_none"):
                out[f.name] = _absent_as_none(value)
            else:
                out[f.name] = plain(value)
        for name in self.dict_properties:
            out[name] = plain(getattr(self, name))
        return out
