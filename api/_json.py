"""Strict JSON in, canonical JSON out.

Input: standard JSON only. Python's json module also accepts the tokens
``NaN``, ``Infinity`` and ``-Infinity`` and turns number literals such as
``1e400`` into an infinity; both are refused here, as are duplicate keys
(which value would win is not defined by RFC 8259) and nesting deeper than
:data:`MAX_NESTING`.

Output: keys sorted, no spaces, ``allow_nan=False`` (a NaN or infinity can
never leave the service: infinities are first written as the strings
``"inf"``/``"-inf"`` by :func:`propcalc.jsonable`), floats in Python's
shortest round-trip form. The same value always gives the same bytes.
"""

from __future__ import annotations

import json
import math
from typing import Any

from flask.json.provider import JSONProvider

from propcalc.networks import MAX_NESTING as NETWORK_NESTING

__all__ = ["StrictJSONProvider", "JSONBodyError", "MAX_NESTING", "canonical_dumps", "strict_loads",
           "nesting_depth"]

#: deepest nesting of arrays and objects accepted in a request body: never less than a valid
#: request needs. A network description at the engine's deepest residual/repeat nesting takes 3
#: levels per level (the block object, its options, its block list) and 6 around them (the body,
#: its network member, the outer block list; the innermost block, its options, a list or a
#: parameter object in them): 54 for 16 levels (tests/api/test_api_network.py builds it). One
#: network level more is admitted (57), so that the engine's refusal names the block's path.
MAX_NESTING = 3 * (NETWORK_NESTING + 1) + 6


class JSONBodyError(ValueError):
    """The request body is not acceptable JSON (answered with 400)."""


def _refuse_constant(token: str) -> Any:
    raise JSONBodyError(f"{token} is not valid JSON: numbers must be finite")


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise JSONBodyError(f"the number {text[:40]} is too large for a 64-bit float")
    return value


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise JSONBodyError(f"duplicate key {key[:40]!r} in a JSON object")
        out[key] = value
    return out


def strict_loads(text: str | bytes) -> Any:
    """Parse standard JSON; raise :class:`JSONBodyError` with a readable reason.

    Raises
    ------
    JSONBodyError
        For malformed JSON (with line and column), NaN/Infinity tokens,
        numbers that overflow a double, duplicate keys, invalid UTF-8, or
        nesting deeper than :data:`MAX_NESTING`.
    """
    if isinstance(text, bytes):
        try:
            text = text.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise JSONBodyError(f"the body is not valid UTF-8 (byte {exc.start})") from None
    try:
        value = json.loads(text, parse_constant=_refuse_constant, parse_float=_finite_float,
                           object_pairs_hook=_no_duplicates)
    except JSONBodyError:
        raise
    except json.JSONDecodeError as exc:
        raise JSONBodyError(f"malformed JSON: {exc.msg} at line {exc.lineno} column {exc.colno}"
                            ) from None
    except RecursionError:
        raise JSONBodyError(f"JSON nested deeper than {MAX_NESTING} levels") from None
    except ValueError as exc:  # e.g. an integer literal longer than 4300 digits
        raise JSONBodyError(f"malformed JSON: {exc}") from None
    if nesting_depth(value) > MAX_NESTING:
        raise JSONBodyError(f"JSON nested deeper than {MAX_NESTING} levels")
    return value


def nesting_depth(value: Any) -> int:
    """Depth of nested arrays/objects (a scalar is 0), computed without recursion."""
    deepest = 0
    stack = [(value, 1)]
    while stack:
        item, depth = stack.pop()
        if isinstance(item, dict):
            children = item.values()
        elif isinstance(item, list):
            children = item
        else:
            continue
        deepest = max(deepest, depth)
        stack.extend((child, depth + 1) for child in children)
    return deepest


def canonical_dumps(value: Any) -> str:
    """Sorted keys, compact separators, ASCII only, no NaN/Infinity (raises ValueError)."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), allow_nan=False,
                      ensure_ascii=True)


class StrictJSONProvider(JSONProvider):
    """Flask JSON provider: strict parsing and canonical, NaN-free output."""

    mimetype = "application/json"

    def dumps(self, obj: Any, **kwargs: Any) -> str:
        """Canonical JSON (the keyword arguments of json.dumps are not honoured)."""
        return canonical_dumps(obj)

    def loads(self, s: str | bytes, **kwargs: Any) -> Any:
        """Strict JSON; a :class:`JSONBodyError` (a ValueError) on refusal."""
        return strict_loads(s)
