"""Response schemas derived from the engine's result dataclasses.

The engine's results are frozen dataclasses whose dict form is derived from
their fields (:class:`propcalc.results.Result`); the response schemas of the
newer endpoints (networks, shaping) are derived from the same fields, so the
documented body and the body sent cannot drift apart. One rule per type
annotation:

======================================  ==========================================
annotation                              response field
======================================  ==========================================
``float``                               a number, or "inf" / "-inf"
``int``                                 an integer
``str``                                 a string
``bool``                                true or false
``X | None``                            the field for X, or null
``tuple[X, ...]``, ``list[X]``          an array of X
``Mapping[str, X]``, ``dict[str, X]``   an object of X
a Result subclass                       its derived schema (nested)
anything else                           any JSON value
======================================  ==========================================

Fields declared with ``metadata=OMIT`` stay out, as they do in ``to_dict()``;
field descriptions come from the numpydoc "Attributes" section of the class.
"""

from __future__ import annotations

import dataclasses
import enum
import re
import types
import typing
from collections.abc import Mapping, Sequence
from typing import Any

from marshmallow import Schema, fields

from ._fields import Choice, ExtNumber, JSONInteger, StrictBoolean, StrictString
from ._schema_base import StrictSchema

__all__ = ["result_schema", "use_schema"]

_SCHEMAS: dict[type, type[Schema]] = {}


class _AnyValue(fields.Raw):
    """Any JSON value."""

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return {}


def _attribute_docs(cls: type) -> dict[str, str]:
    """Descriptions of the numpydoc "Attributes" section: {name: first sentence}."""
    doc = cls.__doc__ or ""
    match = re.search(r"Attributes\n\s*-+\n(.*?)(?:\n\s*\n\s*[A-Z][a-z]+\n\s*-+\n|\Z)", doc, re.S)
    if not match:
        return {}
    out: dict[str, str] = {}
    names: list[str] = []
    for line in match.group(1).splitlines():
        if not line.strip():
            continue
        indent = len(line) - len(line.lstrip())
        if indent <= 4:
            names = [n.strip() for n in line.split(":")[0].split(",")]
        elif names:
            for n in names:
                out[n] = (out.get(n, "") + " " + line.strip()).strip()
    return out


def _field(tp: Any, allow_none: bool = False, description: str = "") -> fields.Field:
    meta = {"description": description} if description else {}
    kw: dict[str, Any] = {"required": True, "allow_none": allow_none, "metadata": meta}
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if origin in (typing.Union, types.UnionType):
        rest = [a for a in args if a is not type(None)]
        none = len(rest) < len(args)
        if len(rest) == 1:
            return _field(rest[0], allow_none or none, description)
        return _AnyValue(**{**kw, "allow_none": True})
    if tp is float:
        return ExtNumber(**kw)
    if tp is bool:
        return StrictBoolean(**kw)
    if tp is int:
        return JSONInteger(**kw)
    if tp is str:
        return StrictString(**kw)
    if isinstance(tp, type) and issubclass(tp, enum.Enum):
        return Choice([m.value for m in tp], **kw)
    if origin is typing.Literal:
        return Choice([str(a) for a in args], **kw)
    if isinstance(tp, type) and dataclasses.is_dataclass(tp):
        return fields.Nested(result_schema(tp), **kw)
    if origin in (tuple, list, Sequence) or tp in (tuple, list):
        item = args[0] if args else Any
        if origin is tuple and len(args) == 2 and args[1] is Ellipsis or origin is not tuple:
            inner = _field(item) if item is not Any else _AnyValue()
        else:  # a fixed-length tuple
            inner = _AnyValue()
        inner.required = False
        return fields.List(inner, **kw)
    if origin in (dict, Mapping) or tp in (dict, Mapping):
        value = args[1] if len(args) == 2 and args[1] is not Any else None
        inner = _field(value) if value is not None else _AnyValue()
        inner.required = False
        return fields.Dict(keys=StrictString(), values=inner, **kw)
    return _AnyValue(**{**kw, "allow_none": True})


def use_schema(cls: type, schema: type[Schema]) -> None:
    """Use a hand-written response schema for ``cls`` where a derived schema would nest it
    (one schema per name in the OpenAPI document; the field check covers the hand-written one).
    """
    _SCHEMAS[cls] = schema


def result_schema(cls: type) -> type[Schema]:
    """The marshmallow schema of ``cls().to_dict()`` (cached per class).

    Parameters
    ----------
    cls : type
        A frozen dataclass inheriting :class:`propcalc.results.Result`.

    Returns
    -------
    type of marshmallow.Schema
        Named after the class (``NetworkPropagation`` -> ``NetworkPropagationSchema``),
        refusing unknown members.
    """
    known = _SCHEMAS.get(cls)
    if known is not None:
        return known
    hints = typing.get_type_hints(cls)
    docs = _attribute_docs(cls)
    attrs: dict[str, Any] = {}
    for f in dataclasses.fields(cls):
        meta = f.metadata
        if not meta.get("dict", True):
            continue
        if "inline" in meta:
            raise TypeError(f"{cls.__name__}.{f.name}: inline fields are not derived")
        allow_none = bool(meta.get("absent_as_none"))
        attrs[f.name] = _field(hints.get(f.name, Any), allow_none, docs.get(f.name, ""))
    for name in getattr(cls, "dict_properties", ()):
        prop = getattr(cls, name)
        getter = getattr(prop, "func", None) or getattr(prop, "fget", None)
        ret = typing.get_type_hints(getter).get("return", Any) if getter else Any
        attrs[name] = _field(ret, False, docs.get(name, ""))
    doc = (cls.__doc__ or cls.__name__).strip().split("\n\n")[0]
    schema = type(f"{cls.__name__}Schema", (StrictSchema,), {**attrs, "__doc__": doc})
    _SCHEMAS[cls] = schema
    return schema
