"""The network description format: every block kind, its fields, types, defaults and limits.

This table is the one statement of the format. The validator
(:mod:`propcalc.networks.description`) checks descriptions against it, and
:func:`description_schema` turns it into a JSON Schema (draft 2020-12) that the
service's OpenAPI document and other front ends can embed.

The format
----------
A network is ``{"blocks": [block, ...], "input_width": n}`` (``input_width``
optional: the units per position of the input). Every block is an object with
exactly one key, the block kind:

======================  =====================================================================
kind                    fields (``*`` required; default in brackets)
======================  =====================================================================
``dense``               ``sigma_w2*`` [1e-6, 1e4]; ``sigma_b2*`` 0 or [1e-100, 1e4]; ``width``
                        integer [1, 1e7] (absent: unknown); ``weights`` "gaussian" |
                        "orthogonal" ["gaussian"]
``activation``          a built-in name or a formula in x (string), or
                        ``{"formula"*: text, "params": {name: number in [-1e6, 1e6]}}``
``residual``            ``branch*`` blocks (with at least one dense, convolution or attention
                        block); ``weight`` [-1e3, 1e3] [1.0]; ``shortcut`` [-1e3, 1e3] [1.0]:
                        the stream becomes ``shortcut * x + weight * branch(x)``
``norm``                "layer" | "rms" | "batch", or ``{"kind"*: ..., "gain": [-1e3, 1e3]
                        [1.0], "eps": [0, 1] [0.0]}``
``dropout``             ``keep_rate*`` [1e-3, 1]
``repeat``              ``times*`` integer [1, 100000]; ``blocks*`` blocks
``convolution``         ``sigma_w2*``, ``sigma_b2*`` as dense; ``kernel*`` integer or list of
                        1-3 integers in [1, 64]; ``stride`` the same shape [1]; ``width``
                        (channels); ``weights`` "gaussian" | "delta_orthogonal" ["gaussian"]
``pooling``             ``kind*`` "average" | "max" | "global_average"; ``window`` (average,
                        max: required) sizes as kernel; ``stride`` [the window];
                        ``positions`` (global_average: required) integer [1, 1e6]
``attention``           ``tokens*`` integer [1, 1e6]; ``heads`` [1, 4096] [1]; ``width``;
                        ``value_sigma_w2``, ``output_sigma_w2``, ``query_key_sigma_w2``
                        as sigma_w2 [1.0]; ``query_key_scale`` [0, 1e3] [1.0] (logits are
                        ``query_key_scale * q . k / sqrt(d_head)``); ``sigma_b2`` [0.0]
======================  =====================================================================

Numeric fields named like an engine input (sigma_w2, sigma_b2, width, keep_rate,
activation parameters) take their bounds from :mod:`propcalc.domains`.

Limits on the whole description (constants below): at most MAX_DESCRIBED_BLOCKS
block objects, MAX_NESTING levels of residual/repeat nesting, MAX_POSITIONS
stream positions and MAX_EXPANDED_BLOCKS elementary blocks once repeats are
expanded.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from ..domains import DOMAINS, format_bound

__all__ = [
    "MAX_DESCRIBED_BLOCKS",
    "MAX_NESTING",
    "MAX_POSITIONS",
    "MAX_EXPANDED_BLOCKS",
    "MAX_REPEAT_TIMES",
    "MAX_WIDTH",
    "MAX_KERNEL",
    "MAX_TOKENS",
    "MAX_PARAMS",
    "FieldSpec",
    "BlockSpec",
    "BLOCK_SPECS",
    "NETWORK_FIELDS",
    "description_schema",
    "description_fields",
]

#: Block objects in one description (before repeats are expanded).
MAX_DESCRIBED_BLOCKS = 10_000
#: Levels of residual/repeat nesting.
MAX_NESTING = 16
#: Stream positions once repeats are expanded.
MAX_POSITIONS = 100_000
#: Elementary blocks once repeats are expanded, the contents of residual branches included.
MAX_EXPANDED_BLOCKS = 1_000_000
#: Copies in one repeat block.
MAX_REPEAT_TIMES = 100_000
#: Units per position (width, channels): the documented domain "width".
MAX_WIDTH = int(DOMAINS["width"].upper)
#: Kernel, window and stride size per spatial dimension.
MAX_KERNEL = 64
#: Tokens of an attention block, positions of a global average.
MAX_TOKENS = 1_000_000
#: Named parameters of one activation formula.
MAX_PARAMS = 16
_MAX_FACTOR = 1e3


@dataclass(frozen=True)
class FieldSpec:
    """One field of a block's object form.

    Attributes
    ----------
    name : str
    type : str
        "number", "integer", "sizes" (an integer or a list of 1-3 integers),
        "choice", "text", "params" (an object of named numbers) or "blocks".
    required : bool
    default : Any
        The value used when the field is absent (None: absent means unknown).
    lower, upper : float or None
        Bounds; ``lower_open``/``upper_open`` make them strict.
    choices : tuple of str
        For "choice".
    domain : str or None
        The documented domain (:mod:`propcalc.domains`) a number must lie in; its
        bounds replace ``lower`` and ``upper``.
    doc : str
    """

    name: str
    type: str
    required: bool = False
    default: Any = None
    lower: float | None = None
    upper: float | None = None
    lower_open: bool = False
    upper_open: bool = False
    choices: tuple[str, ...] = ()
    doc: str = ""
    domain: str | None = None

    @property
    def constraint(self) -> str:
        """The rule in words, as error messages state it."""
        if self.domain is not None:
            return DOMAINS[self.domain].constraint
        if self.type == "choice":
            return "one of " + ", ".join(f'"{c}"' for c in self.choices)
        if self.type == "blocks":
            return "a non-empty list of blocks"
        if self.type == "text":
            return "a string"
        if self.type == "params":
            return f"an object of at most {MAX_PARAMS} named finite numbers"
        noun = {"number": "a finite number", "integer": "an integer",
                "sizes": "an integer or a list of 1 to 3 integers, each"}[self.type]
        parts = []
        if self.lower is not None:
            parts.append(f"{'>' if self.lower_open else '>='} {_fmt(self.lower)}")
        if self.upper is not None:
            parts.append(f"{'<' if self.upper_open else '<='} {_fmt(self.upper)}")
        return noun + (" " + " and ".join(parts) if parts else "")

    def admits(self, x: float) -> bool:
        """Whether the number x is within the bounds."""
        if not math.isfinite(x):
            return False
        if self.lower is not None and (x <= self.lower if self.lower_open else x < self.lower):
            return False
        if self.upper is not None and (x >= self.upper if self.upper_open else x > self.upper):
            return False
        return True


def _fmt(x: float) -> str:
    return format_bound(x)


@dataclass(frozen=True)
class BlockSpec:
    """One block kind: its fields and its optional string shorthand.

    ``shorthand`` names the field a bare string stands for (``{"norm": "layer"}``
    is ``{"norm": {"kind": "layer"}}``).
    """

    kind: str
    fields: tuple[FieldSpec, ...]
    doc: str
    shorthand: str | None = None

    def field(self, name: str) -> FieldSpec:
        """The field called ``name``."""
        for f in self.fields:
            if f.name == name:
                return f
        raise KeyError(name)


def _sw(required: bool = True, name: str = "sigma_w2", default: Any = None,
        doc: str = "weight variance times fan-in") -> FieldSpec:
    return FieldSpec(name, "number", required, default, doc=doc, domain="sigma_w2")


def _sb(required: bool = True, default: Any = None) -> FieldSpec:
    return FieldSpec("sigma_b2", "number", required, default, doc="bias variance",
                     domain="sigma_b2")


_WIDTH = FieldSpec("width", "integer", False, None, domain="width",
                   doc="units per position (absent: unknown; the infinite-width analysis "
                       "ignores it, per-unit gradients use width ratios when known)")


def _sizes(name: str, required: bool, default: Any, doc: str) -> FieldSpec:
    return FieldSpec(name, "sizes", required, default, lower=1, upper=MAX_KERNEL, doc=doc)


BLOCK_SPECS: dict[str, BlockSpec] = {spec.kind: spec for spec in (
    BlockSpec("dense", (
        _sw(), _sb(), _WIDTH,
        FieldSpec("weights", "choice", False, "gaussian", choices=("gaussian", "orthogonal"),
                  doc="distribution of the weights (the mean-field maps are the same)"),
    ), "a fully connected layer h = W x + b, W_ij ~ N(0, sigma_w2 / fan_in), b_i ~ N(0, sigma_b2)"),
    BlockSpec("activation", (
        FieldSpec("formula", "text", True, doc="a built-in name or a formula in x"),
        FieldSpec("params", "params", False, {}, doc="values of the named parameters"),
    ), "an elementwise activation", shorthand="formula"),
    BlockSpec("residual", (
        FieldSpec("branch", "blocks", True,
                  doc="the branch F; it must contain a dense, convolution or attention block"),
        FieldSpec("weight", "number", False, 1.0, lower=-_MAX_FACTOR, upper=_MAX_FACTOR,
                  doc="multiplier of the branch"),
        FieldSpec("shortcut", "number", False, 1.0, lower=-_MAX_FACTOR, upper=_MAX_FACTOR,
                  doc="multiplier of the shortcut"),
    ), "a residual block: the stream becomes shortcut * x + weight * F(x)"),
    BlockSpec("norm", (
        FieldSpec("kind", "choice", True, choices=("layer", "rms", "batch"),
                  doc="layer (over units), rms (over units, no centring), batch (over a large "
                      "batch, per unit)"),
        FieldSpec("gain", "number", False, 1.0, lower=-_MAX_FACTOR, upper=_MAX_FACTOR,
                  doc="the gain at initialisation"),
        FieldSpec("eps", "number", False, 0.0, lower=0.0, upper=1.0,
                  doc="added to the variance before the square root"),
    ), "a normalisation layer", shorthand="kind"),
    BlockSpec("dropout", (
        FieldSpec("keep_rate", "number", True, domain="keep_rate",
                  doc="probability of keeping a unit (kept units are divided by it)"),
    ), "inverted dropout, independent masks per input, position and unit"),
    BlockSpec("repeat", (
        FieldSpec("times", "integer", True, lower=1, upper=MAX_REPEAT_TIMES,
                  doc="number of copies"),
        FieldSpec("blocks", "blocks", True, doc="the repeated blocks"),
    ), "copies of a sequence of blocks, each copy with fresh weights"),
    BlockSpec("convolution", (
        _sw(), _sb(),
        _sizes("kernel", True, None, "kernel size per spatial dimension (1 to 3 dimensions)"),
        _sizes("stride", False, 1, "stride per spatial dimension"),
        _WIDTH,
        FieldSpec("weights", "choice", False, "gaussian",
                  choices=("gaussian", "delta_orthogonal"),
                  doc="gaussian over all taps (fan-in = width_in * taps), or delta-orthogonal: "
                      "an orthogonal matrix at the centre tap, zero elsewhere"),
    ), "a convolution with fan-in scaling"),
    BlockSpec("pooling", (
        FieldSpec("kind", "choice", True, choices=("average", "max", "global_average"),
                  doc="average or max over windows, or the average over all positions"),
        _sizes("window", False, None, "window size per spatial dimension (average, max)"),
        _sizes("stride", False, None, "stride per spatial dimension (default: the window)"),
        FieldSpec("positions", "integer", False, None, lower=1, upper=MAX_TOKENS,
                  doc="positions averaged (global_average)"),
    ), "pooling over positions"),
    BlockSpec("attention", (
        FieldSpec("tokens", "integer", True, lower=1, upper=MAX_TOKENS,
                  doc="sequence length T"),
        FieldSpec("heads", "integer", False, 1, lower=1, upper=4096, doc="number of heads"),
        _WIDTH,
        _sw(False, "value_sigma_w2", 1.0, "value projection: variance times fan-in"),
        _sw(False, "output_sigma_w2", 1.0, "output projection: variance times fan-in"),
        _sw(False, "query_key_sigma_w2", 1.0, "query and key projections: variance times fan-in"),
        FieldSpec("query_key_scale", "number", False, 1.0, lower=0.0, upper=_MAX_FACTOR,
                  doc="multiplier of the logits q . k / sqrt(d_head) (0: uniform attention)"),
        _sb(False, 0.0),
    ), "multi-head self-attention with value and output projections"),
)}

#: Top-level fields of a description.
NETWORK_FIELDS: tuple[FieldSpec, ...] = (
    FieldSpec("blocks", "blocks", True, doc="the blocks in order"),
    FieldSpec("input_width", "integer", False, None, domain="width",
              doc="units per position of the input"),
)


def _field_schema(f: FieldSpec) -> dict[str, Any]:
    out: dict[str, Any]
    if f.domain is not None:
        d = DOMAINS[f.domain]
        out = {"type": "integer" if d.integer else "number",
               "exclusiveMinimum" if d.lower_open else "minimum": d.lower,
               "exclusiveMaximum" if d.upper_open else "maximum": d.upper}
        if d.zero:
            out = {"anyOf": [{"const": 0}, out]}
    elif f.type in ("number", "integer"):
        out = {"type": f.type}
        if f.lower is not None:
            out["exclusiveMinimum" if f.lower_open else "minimum"] = f.lower
        if f.upper is not None:
            out["exclusiveMaximum" if f.upper_open else "maximum"] = f.upper
    elif f.type == "sizes":
        one = {"type": "integer", "minimum": f.lower, "maximum": f.upper}
        out = {"oneOf": [one, {"type": "array", "items": one, "minItems": 1, "maxItems": 3}]}
    elif f.type == "choice":
        out = {"type": "string", "enum": list(f.choices)}
    elif f.type == "text":
        out = {"type": "string", "minLength": 1}
    elif f.type == "params":
        out = {"type": "object", "maxProperties": MAX_PARAMS,
               "additionalProperties": {"type": "number"}}
    else:
        out = {"$ref": "#/$defs/blocks"}
    if f.default is not None and f.type != "blocks":
        out["default"] = f.default
    if f.doc:
        out["description"] = f.doc
    return out


def description_schema() -> dict[str, Any]:
    """The description format as a JSON Schema (draft 2020-12).

    Cross-field rules (a residual branch needs a weight block, pooling's window
    or positions by kind, width divisible by heads, the limits on the expanded
    network) are stated in the descriptions; :func:`propcalc.network` enforces them.
    """
    defs: dict[str, Any] = {}
    for kind, spec in BLOCK_SPECS.items():
        body = {"type": "object", "description": spec.doc,
                "properties": {f.name: _field_schema(f) for f in spec.fields},
                "required": [f.name for f in spec.fields if f.required],
                "additionalProperties": False}
        value: dict[str, Any] = body
        if spec.shorthand is not None:
            short = _field_schema(spec.field(spec.shorthand))
            value = {"oneOf": [short, body]}
        defs[kind] = {"type": "object", "properties": {kind: value}, "required": [kind],
                      "additionalProperties": False}
    defs["blocks"] = {"type": "array", "minItems": 1, "maxItems": MAX_DESCRIBED_BLOCKS,
                      "items": {"oneOf": [{"$ref": f"#/$defs/{k}"} for k in BLOCK_SPECS]}}
    return {
        "$schema": "https://json-schema.org/draft/2020-12/schema",
        "title": "network description",
        "description": (f"A network as blocks. Limits: {MAX_DESCRIBED_BLOCKS} block objects, "
                        f"{MAX_NESTING} levels of nesting, {MAX_POSITIONS} stream positions and "
                        f"{MAX_EXPANDED_BLOCKS} elementary blocks once repeats are expanded."),
        "type": "object",
        "properties": {f.name: _field_schema(f) for f in NETWORK_FIELDS},
        "required": ["blocks"],
        "additionalProperties": False,
        "$defs": defs,
    }


def description_fields() -> list[dict[str, Any]]:
    """One row per field of every block kind: kind, field, type, required, default, constraint, doc.

    For tables in the CLI and documentation.
    """
    rows = []
    for kind, spec in BLOCK_SPECS.items():
        for f in spec.fields:
            rows.append({"kind": kind, "field": f.name, "type": f.type, "required": f.required,
                         "default": f.default, "constraint": f.constraint, "doc": f.doc})
    return rows
