"""Field factories of the response schemas: every member is required (``_r``) and described.

Shared by :mod:`propcalc_api._responses` and :mod:`propcalc_api._variant_responses`.
"""

from __future__ import annotations

from typing import Any

from marshmallow import fields

from ._fields import ExtNumber, FiniteNumber, StrictString
from ._schema_base import _d, _r

__all__ = ["ext", "notes_field", "num", "pair_field", "pair_meta", "text"]


def num(**kw: Any) -> FiniteNumber:
    return _r(FiniteNumber(**kw))

def ext(**kw: Any) -> ExtNumber:
    return _r(ExtNumber(**kw))

def text(**kw: Any) -> StrictString:
    return _r(StrictString(**kw))

def notes_field() -> fields.List:
    return _r(fields.List(StrictString(), metadata=_d("remarks in words")))

def pair_meta(text: str = "") -> dict[str, Any]:
    """Metadata of a list of exactly two items."""
    return {**({"description": text} if text else {}), "minItems": 2, "maxItems": 2}

def pair_field(text: str = "") -> fields.List:
    return _r(fields.List(ExtNumber(), metadata=pair_meta(text)))
