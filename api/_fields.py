"""marshmallow fields for strict JSON: numbers, integers, "inf" strings, polymorphic values.

Each custom field knows how to describe itself in OpenAPI 3.1 (method
``openapi_property``), which :func:`openapi_attribute_function` hands to
apispec, so the document says exactly what the field accepts.

Messages name the constraint only ("must be > 0"); the value received is
appended in one place, when marshmallow's errors become problem entries
(:mod:`propcalc_api._problems`).
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from typing import Any

from marshmallow import Schema, ValidationError, fields

from propcalc import canonical_name, nearest_name

__all__ = [
    "Interval",
    "MaxItems",
    "FiniteNumber",
    "JSONInteger",
    "ExtNumber",
    "Choice",
    "StrictString",
    "StrictBoolean",
    "ActivationField",
    "OneOfSchemas",
    "openapi_attribute_function",
    "format_number",
]


def format_number(value: float) -> str:
    """Short text for a limit in a message: 10000.0 -> '10000', 1e-100 -> '1e-100'."""
    if float(value).is_integer() and abs(value) < 1e16:
        return str(int(value))
    return repr(float(value))


# ---------------------------------------------------------------------------------------------
# validators (they also describe themselves to the OpenAPI hook)
# ---------------------------------------------------------------------------------------------
class Interval:
    """A number range, optionally open at either end, optionally "0 or at least x".

    Parameters
    ----------
    low, high : float, optional
        Bounds (inclusive unless ``low_open`` / ``high_open``).
    zero_or_at_least : float, optional
        With ``low=0``: the value must be exactly 0 or >= this.
    """

    def __init__(self, low: float | None = None, high: float | None = None, *,
                 low_open: bool = False, high_open: bool = False,
                 zero_or_at_least: float | None = None) -> None:
        self.low, self.high = low, high
        self.low_open, self.high_open = low_open, high_open
        self.zero_or_at_least = zero_or_at_least

    def describe(self) -> str:
        """The constraint in words, e.g. 'in (0, 10000]'."""
        if self.zero_or_at_least is not None:
            text = f"0 or in [{format_number(self.zero_or_at_least)}, "
            return text + (f"{format_number(self.high)}]" if self.high is not None else "inf)")
        if self.low is not None and self.high is not None:
            return (f"in {'(' if self.low_open else '['}{format_number(self.low)}, "
                    f"{format_number(self.high)}{')' if self.high_open else ']'}")
        if self.low is not None:
            return f"{'>' if self.low_open else '>='} {format_number(self.low)}"
        if self.high is not None:
            return f"{'<' if self.high_open else '<='} {format_number(self.high)}"
        return "a number"

    def __call__(self, value: float) -> float:
        ok = True
        if self.low is not None:
            ok &= value > self.low if self.low_open else value >= self.low
        if self.high is not None:
            ok &= value < self.high if self.high_open else value <= self.high
        if ok and self.zero_or_at_least is not None:
            ok = value == 0 or value >= self.zero_or_at_least
        if not ok:
            raise ValidationError(f"must be {self.describe()}")
        return value

    def openapi(self) -> dict[str, Any]:
        """JSON Schema keywords for this range."""
        out: dict[str, Any] = {}
        if self.low is not None:
            out["exclusiveMinimum" if self.low_open else "minimum"] = self.low
        if self.high is not None:
            out["exclusiveMaximum" if self.high_open else "maximum"] = self.high
        if self.zero_or_at_least is not None:
            out = {"anyOf": [{"const": 0}, {"minimum": self.zero_or_at_least,
                                             **({"maximum": self.high} if self.high else {})}]}
        return out


class MaxItems:
    """At least ``minimum`` and at most ``maximum`` items (``limit`` names the setting)."""

    def __init__(self, maximum: int, minimum: int = 0, limit: str | None = None) -> None:
        self.maximum, self.minimum, self.limit = maximum, minimum, limit

    def __call__(self, value: Any) -> Any:
        n = len(value)
        if n < self.minimum:
            plural = "s" if self.minimum > 1 else ""
            raise ValidationError(f"must have at least {self.minimum} item{plural}")
        if n > self.maximum:
            where = f" (limit {self.limit})" if self.limit else ""
            raise ValidationError(f"must have at most {self.maximum} items{where}")
        return value


def _range_keywords(field: fields.Field) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for v in field.validators:
        if isinstance(v, Interval):
            out.update(v.openapi())
    return out


def _nullable(schema: dict[str, Any], allow_none: bool) -> dict[str, Any]:
    if not allow_none:
        return schema
    if "oneOf" in schema:
        return {**schema, "oneOf": [*schema["oneOf"], {"type": "null"}]}
    if "anyOf" in schema:
        return {"oneOf": [schema, {"type": "null"}]}
    if "type" in schema:
        types = schema["type"] if isinstance(schema["type"], list) else [schema["type"]]
        if "enum" in schema:  # an enum refuses what it does not list: null must be listed too
            schema = {**schema, "enum": [*schema["enum"], None]}
        return {**schema, "type": [*types, "null"]}
    return {"oneOf": [schema, {"type": "null"}]}


# ---------------------------------------------------------------------------------------------
# scalar fields
# ---------------------------------------------------------------------------------------------
class FiniteNumber(fields.Float):
    """A JSON number (int or float literal), finite; strings and booleans are refused."""

    default_error_messages = {
        "invalid": "must be a number",
        "special": "must be a finite number",
        "too_large": "must be a finite number",
        "required": "is required",
        "null": "must be a number, not null",
    }

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.make_error("invalid")
        return super()._deserialize(value, attr, data, **kwargs)

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return _nullable({"type": "number", **_range_keywords(self)}, self.allow_none)


class JSONInteger(fields.Integer):
    """An integer: a JSON int, or a float literal with an integral value (3.0).

    JSON Schema counts 3.0 as an integer, so it is accepted; 3.5, strings and
    booleans are refused.
    """

    default_error_messages = {
        "invalid": "must be an integer",
        "required": "is required",
        "null": "must be an integer, not null",
        "too_large": "must be an integer",
    }

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.make_error("invalid")
        if isinstance(value, float):
            if not math.isfinite(value) or not value.is_integer():
                raise self.make_error("invalid")
            value = int(value)
        return super()._deserialize(value, attr, data, **kwargs)

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return _nullable({"type": "integer", **_range_keywords(self)}, self.allow_none)


class ExtNumber(fields.Field):
    """A number that may be infinite: a JSON number, or the string "inf" / "-inf".

    propcalc's convention (:func:`propcalc.jsonable`): infinities are the
    strings ``"inf"`` and ``"-inf"``; an absent value is ``null`` (only where
    ``allow_none``).
    """

    default_error_messages = {"invalid": 'must be a number or the string "inf" or "-inf"',
                              "required": "is required", "null": "must not be null"}

    def __init__(self, *, positive_infinity_only: bool = False, **kwargs: Any) -> None:
        self.positive_infinity_only = positive_infinity_only
        super().__init__(**kwargs)

    def _strings(self) -> list[str]:
        return ["inf"] if self.positive_infinity_only else ["inf", "-inf"]

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if isinstance(value, str) and value in self._strings():
            return value
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.make_error("invalid")
        if not math.isfinite(value):
            raise self.make_error("invalid")
        return value

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return _nullable({"oneOf": [{"type": "number"},
                                    {"type": "string", "enum": self._strings()}]}, self.allow_none)


class Choice(fields.String):
    """One of a fixed set of strings; an unknown one gets the nearest choice as a hint.

    With ``spellings=True`` (the built-in activation names) case and the separators ``-``,
    ``_`` and spaces do not matter (``"Gelu"``, ``"leaky-relu"``), as in the engine's
    resolver; the loaded value is the choice as spelled in ``choices``.
    """

    default_error_messages = {"invalid": "must be a string", "required": "is required",
                              "null": "must not be null"}

    def __init__(self, choices: list[str] | tuple[str, ...], *, spellings: bool = False,
                 **kwargs: Any) -> None:
        self.choices = list(choices)
        self.spellings = spellings
        super().__init__(**kwargs)

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> str:
        if not isinstance(value, str):
            raise self.make_error("invalid")
        if value in self.choices:
            return value
        named = canonical_name(value, self.choices) if self.spellings else None
        if named is not None:
            return named
        close = nearest_name(value, self.choices)
        hint = f" (did you mean {close}?)" if close is not None else ""
        raise ValidationError(f"must be one of {', '.join(self.choices)}{hint}")

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return _nullable({"type": "string", "enum": list(self.choices)}, self.allow_none)


class StrictString(fields.String):
    """A JSON string (numbers are not turned into strings), optionally length-bounded."""

    default_error_messages = {"invalid": "must be a string", "required": "is required",
                              "null": "must not be null"}

    def __init__(self, *, max_length: int | None = None, min_length: int = 0,
                 pattern: str | None = None, limit: str | None = None, **kwargs: Any) -> None:
        self.max_length, self.min_length, self.pattern = max_length, min_length, pattern
        self.limit = limit
        super().__init__(**kwargs)

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> str:
        if not isinstance(value, str):
            raise self.make_error("invalid")
        if len(value) < self.min_length:
            raise ValidationError(f"must have at least {self.min_length} character"
                                  f"{'s' * (self.min_length > 1)}")
        if self.max_length is not None and len(value) > self.max_length:
            where = f" (limit {self.limit})" if self.limit else ""
            raise ValidationError(f"must have at most {self.max_length} characters{where}")
        if self.pattern is not None and not re.fullmatch(self.pattern, value):
            raise ValidationError(f"must match the pattern {self.pattern}")
        return value

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        out: dict[str, Any] = {"type": "string"}
        if self.min_length:
            out["minLength"] = self.min_length
        if self.max_length is not None:
            out["maxLength"] = self.max_length
        if self.pattern is not None:
            out["pattern"] = f"^{self.pattern}$"
        return _nullable(out, self.allow_none)


class StrictBoolean(fields.Boolean):
    """true or false only (no "yes", 1 or "true" strings)."""

    default_error_messages = {"invalid": "must be true or false", "required": "is required",
                              "null": "must not be null"}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> bool:
        if not isinstance(value, bool):
            raise self.make_error("invalid")
        return value

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return _nullable({"type": "boolean"}, self.allow_none)


# ---------------------------------------------------------------------------------------------
# polymorphic fields
# ---------------------------------------------------------------------------------------------
class ActivationField(fields.Field):
    """An activation: a built-in name, or an object with a name or a formula, and parameters.

    ``"tanh"`` is short for ``{"name": "tanh"}``. The loaded value is always a
    dict, ``{"name": ..., "params": {...}}`` or ``{"formula": ..., "params":
    {...}}``, so equal activations written differently share a cache key.
    """

    default_error_messages = {
        "invalid": 'must be a built-in name or an object with "name" or "formula"',
        "required": "is required",
        "null": "must not be null",
    }

    def __init__(self, names: tuple[str, ...], named: type[Schema], formula: type[Schema],
                 **kwargs: Any) -> None:
        self.names, self.named, self.formula = names, named, formula
        self._loaders: dict[type[Schema], Schema] = {}
        super().__init__(**kwargs)

    def _deserialize(self, value: Any, attr: str | None, data: Any,
                     **kwargs: Any) -> dict[str, Any]:
        shorthand = isinstance(value, str)
        if shorthand:
            value = {"name": value}
        if not isinstance(value, dict):
            raise self.make_error("invalid")
        cls = self.formula if "formula" in value else self.named
        schema = self._loaders.get(cls) or self._loaders.setdefault(cls, cls())
        try:
            out = schema.load(value)
        except ValidationError as err:
            messages: Any = err.messages
            if shorthand and isinstance(messages, dict) and "name" in messages:
                messages = messages["name"]  # "tanhh" is wrong at /activation itself
                if canonical_name(value["name"], self.names) is None and not re.fullmatch(
                        r"[A-Za-z0-9_\- ]*", value["name"]):  # a formula sent as a name
                    messages = [f'{m} (a formula goes in {{"formula": ...}})' for m in messages]
            raise ValidationError(messages) from None
        if "spec" in out.get("params", {}):
            raise ValidationError({"params": {"spec": ["is a reserved name; call it otherwise"]}})
        return out

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return {"oneOf": [
            {"type": "string", "enum": list(self.names),
             "description": "a built-in name, short for {\"name\": ...} (case and the "
                            "separators -, _ and spaces do not matter: \"Leaky-ReLU\")"},
            converter.resolve_nested_schema(self.named),
            converter.resolve_nested_schema(self.formula),
        ]}


class OneOfSchemas(fields.Field):
    """An object loaded by one of several schemas, chosen by its ``kind`` member."""

    default_error_messages = {"invalid": "must be an object", "required": "is required",
                              "null": "must not be null"}

    def __init__(self, by_kind: Mapping[str, type[Schema]], **kwargs: Any) -> None:
        self.by_kind = dict(by_kind)
        self._loaders = {kind: cls() for kind, cls in self.by_kind.items()}
        super().__init__(**kwargs)

    def _deserialize(self, value: Any, attr: str | None, data: Any,
                     **kwargs: Any) -> dict[str, Any]:
        if not isinstance(value, dict):
            raise self.make_error("invalid")
        kind = value.get("kind")
        if not isinstance(kind, str) or kind not in self.by_kind:
            raise ValidationError({"kind": [f"must be one of {', '.join(self.by_kind)}"]})
        try:
            return self._loaders[kind].load(value)
        except ValidationError as err:
            raise ValidationError(err.messages) from None

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return {"oneOf": [converter.resolve_nested_schema(s) for s in self.by_kind.values()]}


# ---------------------------------------------------------------------------------------------
# apispec hook
# ---------------------------------------------------------------------------------------------
_KEEP = ("description", "title", "default", "readOnly", "writeOnly", "example", "examples")


def openapi_attribute_function(self: Any, field: fields.Field, ret: dict[str, Any],
                               **kwargs: Any) -> dict[str, Any]:
    """apispec attribute function: let fields with ``openapi_property`` describe themselves.

    Runs after apispec's own functions; replaces their guesses (type, enum,
    nullable...) and keeps the description and default. Field metadata
    ``openapi_extra`` (a dict) is merged last (for keywords apispec drops,
    such as ``propertyNames``).
    """
    hook: Callable[[Any], dict[str, Any]] | None = getattr(field, "openapi_property", None)
    out: dict[str, Any] = {}
    if hook is not None:
        keep = {k: ret[k] for k in _KEEP if k in ret}
        ret.clear()
        out.update(keep)
        out.update(hook(self))
    out.update(field.metadata.get("openapi_extra", {}))
    return out
