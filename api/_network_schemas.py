"""Schemas of the network and shaping endpoints (issues 14 and 16).

Requests are validated here as far as a schema can; the network description
itself is validated by the engine (:func:`propcalc.network`), whose errors
name the JSON pointer of the bad block, which the service prefixes with
``/network`` (:mod:`propcalc_api._problems`). The OpenAPI document states the
description format through :func:`network_components`: the engine's own JSON
Schema (:func:`propcalc.networks.description_schema`) with its ``$defs``
moved into the document's components, recursive through residual branches
and repeat blocks.

Responses are derived from the engine's result dataclasses
(:mod:`propcalc_api._result_schemas`).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from marshmallow import Schema, ValidationError, fields, validates_schema

from propcalc import NetworkPlan, NetworkPropagation, ShapedActivation
from propcalc.networks import (
    MAX_DESCRIBED_BLOCKS,
    MAX_EXPANDED_BLOCKS,
    MAX_NESTING,
    MAX_POSITIONS,
    description_schema,
)
from propcalc.shaping.solve import MAX_DEPTH as SHAPING_MAX_DEPTH
from propcalc.shaping.solve import METHODS as SHAPING_METHODS

from ._config import (
    PLAN_Q_INPUT_MIN,
    Q_STAR_MAX,
    Q_STAR_MIN,
    SEED_MAX,
    VARIANCE_MAX,
    Limits,
)
from ._fields import Choice, FiniteNumber, Interval, JSONInteger, StrictBoolean
from ._responses import VerdictSchema
from ._result_schemas import result_schema
from ._schema_base import (
    batch_size_field,
    loss_field,
    momentum_field,
    n_classes_field,
    scale_output_field,
)

__all__ = ["build_network_schemas", "network_components", "NetworkField", "DESCRIPTION_COMPONENT",
           "NETWORK_LIMITS", "SHAPE_PLOT_POINTS"]

#: name of the description's schema among the OpenAPI components
DESCRIPTION_COMPONENT = "NetworkDescription"
#: the engine's limits on a description (propcalc.networks), as /v1/network states them
NETWORK_LIMITS = {"max_described_blocks": MAX_DESCRIBED_BLOCKS, "max_nesting": MAX_NESTING,
                  "max_positions": MAX_POSITIONS, "max_expanded_blocks": MAX_EXPANDED_BLOCKS}
#: samples of c_0 in the shaping image: [low, high] and the default (propcalc.output.shaping_plot)
SHAPE_PLOT_POINTS = (5, 1001, 101)


def _component(kind: str) -> str:
    return DESCRIPTION_COMPONENT + ("Blocks" if kind == "blocks" else "Block" + kind.title())


def network_components() -> dict[str, dict[str, Any]]:
    """The description format as OpenAPI components: {name: JSON Schema}.

    The engine's schema refers to its own ``#/$defs/...``; in the OpenAPI
    document those definitions are components, so every reference is rewritten
    to ``#/components/schemas/...``.
    """
    doc = description_schema()
    defs = doc.pop("$defs")
    doc.pop("$schema", None)

    def rewrite(node: Any) -> Any:
        if isinstance(node, dict):
            out = {k: rewrite(v) for k, v in node.items()}
            ref = out.get("$ref")
            if isinstance(ref, str) and ref.startswith("#/$defs/"):
                out["$ref"] = "#/components/schemas/" + _component(ref[len("#/$defs/"):])
            return out
        if isinstance(node, list):
            return [rewrite(v) for v in node]
        return node

    # the number of blocks is bounded by the body size (MAX_CONTENT_LENGTH, 413) long before
    # MAX_DESCRIBED_BLOCKS: the limit stays in the description text, not in maxItems (a list
    # just over it cannot be sent as a body the service reads)
    defs["blocks"].pop("maxItems", None)
    out = {DESCRIPTION_COMPONENT: rewrite(doc)}
    for kind, body in defs.items():
        out[_component(kind)] = rewrite(body)
    return out


class NetworkField(fields.Field):
    """A network description: a JSON object, validated by the engine (errors name its pointer)."""

    default_error_messages = {"invalid": 'must be an object with a "blocks" list',
                              "required": "is required", "null": "must not be null"}

    def _deserialize(self, value: Any, attr: str | None, data: Any, **kwargs: Any) -> Any:
        if not isinstance(value, dict):
            raise self.make_error("invalid")
        return value

    def openapi_property(self, converter: Any) -> dict[str, Any]:
        return {"$ref": f"#/components/schemas/{DESCRIPTION_COMPONENT}"}


def build_network_schemas(limits: Limits, strict: type[Schema],
                          activation_field: Callable[[], fields.Field],
                          image_options: type[Schema]) -> dict[str, type[Schema]]:
    """The request and response schemas of /v1/network, /v1/shape and their images.

    Parameters
    ----------
    limits : Limits
    strict : type of Schema
        The base refusing unknown members (``StrictSchema``).
    activation_field : callable
        Makes the activation field every endpoint takes.
    image_options : type of Schema
        The base of image requests (format, dpi).

    Returns
    -------
    dict
        ``{"NetworkRequestSchema": ..., ...}``, named as :class:`Schemas` expects.
    """

    def d(text: str, **extra: Any) -> dict[str, Any]:
        return {"description": text, **extra}

    def seed_field() -> JSONInteger:
        return JSONInteger(validate=Interval(0, SEED_MAX), load_default=0, metadata=d(
            "seed of the finite-width simulation that fills non-Gaussian positions"))

    class NetworkPlanOptionsSchema(strict):
        """How to plan the network's initialisation (propcalc.network_plan)."""

        target = FiniteNumber(validate=Interval(-1, 1, low_open=True, high_open=True),
                              load_default=None, allow_none=True, metadata=d(
                                  "output correlation not to exceed for two inputs at c0: sets "
                                  "every residual branch weight (a search: costs many "
                                  "propagations)"))
        max_gradient = FiniteNumber(validate=Interval(1, VARIANCE_MAX, low_open=True),
                                    load_default=10.0, allow_none=True, metadata=d(
                                        "with target: keep the input's gradient within this "
                                        "factor of the output's (null: no bound)"))
        distribution = Choice(["gaussian", "orthogonal"], load_default="gaussian",
                              metadata=d("weights of the dense blocks"))
        convolution = Choice(["gaussian", "delta_orthogonal"], load_default="gaussian",
                             metadata=d("kernels of the convolutions (delta-orthogonal: Xiao "
                                        "et al. 2018)"))
        q_star = FiniteNumber(validate=Interval(Q_STAR_MIN, Q_STAR_MAX), load_default=None,
                              allow_none=True, metadata=d("preferred variance fixed point on "
                                                          "the edge of chaos"))

    plan_defaults = {"target": None, "max_gradient": 10.0, "distribution": "gaussian",
                     "convolution": "gaussian", "q_star": None}

    description = (
        "the network as blocks (see the NetworkDescription schema); at most "
        f"{MAX_DESCRIBED_BLOCKS} block objects, {MAX_NESTING} levels of nesting, "
        f"{MAX_POSITIONS} stream positions and {MAX_EXPANDED_BLOCKS} elementary blocks once "
        "repeats are expanded (propcalc.networks)")

    class NetworkInputsSchema(strict):
        """A network and the input pair propagated through it."""

        network = NetworkField(required=True, metadata=d(description))
        q0 = FiniteNumber(validate=Interval(PLAN_Q_INPUT_MIN, VARIANCE_MAX), load_default=1.0,
                          metadata=d("per-unit second moment of the input"))
        c0 = FiniteNumber(validate=Interval(-1, 1), load_default=0.0,
                          metadata=d("correlation of the two inputs"))
        c0_within = FiniteNumber(validate=Interval(0, 1), load_default=0.0, metadata=d(
            "networks with pooling or attention: correlation of two positions of one input"))
        c0_between = FiniteNumber(validate=Interval(-1, 1), load_default=0.0, metadata=d(
            "networks with pooling or attention: of two positions of the two inputs (at most "
            "c0_within in size)"))
        simulate = StrictBoolean(load_default=True, metadata=d(
            "where the Gaussian recursion does not hold (an activation after a residual sum "
            "of non-Gaussian parts...), fill the positions with a seeded finite-width "
            "simulation (width 256 where the description gives none) and its bands; false: "
            "no number there"))
        seed = seed_field()


    class NetworkRequestSchema(NetworkInputsSchema):
        """Signal propagation through a described network, its summary and its plan."""

        plan = fields.Nested(NetworkPlanOptionsSchema, allow_none=True,
                             load_default=lambda: dict(plan_defaults), metadata=d(
                                 "plan options (default: a plan without a target); null: no "
                                 "plan"))
        # training (issue 15): the verdict's learning-rate ceiling and output-layer reason
        loss = loss_field(
            "cross_entropy (softmax) or mse: the verdict then has the learning-rate ceiling of "
            "the described network (propcalc.training.network_learning_rate_ceiling; needs "
            "batch_size) and its output-layer reason")
        n_classes = n_classes_field("with a loss: K, the outputs (default: the readout's width)")
        batch_size = batch_size_field()
        momentum = momentum_field("with a loss: heavy-ball momentum, the ceiling is "
                                  "2 (1 + momentum) / lambda_max")
        scale_output = scale_output_field(
            "with a loss and a plan: scale the readout (a dense last block) for the loss; "
            "false keeps the hidden scale")

        @validates_schema
        def _training(self, data: dict[str, Any], **kwargs: Any) -> None:
            errors: dict[str, list[str]] = {}
            if data.get("loss") is None:
                for name in ("n_classes", "batch_size"):
                    if data.get(name) is not None:
                        errors[name] = ["is only read with a loss (give loss)"]
                if data.get("momentum"):
                    errors["momentum"] = ["is only read with a loss (give loss)"]
                if data.get("scale_output") is False:
                    errors["scale_output"] = ["is only read with a loss (give loss)"]
            elif data.get("batch_size") is None:
                errors["batch_size"] = [f"is required with loss {data['loss']}"]
            if data.get("scale_output") is False and data.get("plan") is None and (
                    "scale_output" not in errors):
                errors["scale_output"] = ["is only read with a plan (plan is null)"]
            if errors:
                raise ValidationError(errors)

    class NetworkPlotRequestSchema(image_options, NetworkInputsSchema):
        """q, c and the gradient against the stream position of a network, as an image."""

    shape_depth = min(limits.max_depth, SHAPING_MAX_DEPTH)

    class ShapeRequestSchema(strict):
        """An activation shaped for a target depth (propcalc.shape_activation)."""

        activation = activation_field()
        depth = JSONInteger(required=True, validate=Interval(1, shape_depth), metadata=d(
            f"L, the number of layers (at most {shape_depth})"))
        target = FiniteNumber(load_default=None, allow_none=True, metadata=d(
            "tat: eta = C_L(0) in (0, 1), the correlation two orthogonal inputs reach at the "
            "output (default 0.9); dks: zeta = C_L'(1) in (1, 1e6], the whole network's slope "
            "at c = 1 (default 1.5)"))
        method = Choice(list(SHAPING_METHODS), load_default="tat", metadata=d(
            "tat: tailored activation transformation (Zhang et al. 2022); dks: deep kernel "
            "shaping (Martens et al. 2021)"))
        allow_negative_slope = StrictBoolean(load_default=False, metadata=d(
            "leaky form: look for a slope in [-1, 0) when no slope in [0, 1) reaches the "
            "target"))

    low, high, default = SHAPE_PLOT_POINTS

    class ShapePlotRequestSchema(image_options, ShapeRequestSchema):
        """The network correlation map before and after shaping, as an image."""

        n_points = JSONInteger(validate=Interval(low, high), load_default=default, metadata=d(
            f"samples of c_0 in [0, 1] (default {default})"))

    class NetworkAnalysisSchema(strict):
        """The propagation through a network (per position q, c, gradient; summary), its plan, verdict."""

        propagation = fields.Nested(result_schema(NetworkPropagation), required=True)
        plan = fields.Nested(result_schema(NetworkPlan), required=True, allow_none=True,
                             metadata=d("null when the request's plan is null"))
        verdict = fields.Nested(VerdictSchema, required=True, metadata=d(
            "the trainability verdict (propcalc.network_verdict): the reasons that decide it"))

    return {
        "NetworkRequestSchema": NetworkRequestSchema,
        "NetworkPlotRequestSchema": NetworkPlotRequestSchema,
        "ShapeRequestSchema": ShapeRequestSchema,
        "ShapePlotRequestSchema": ShapePlotRequestSchema,
        "NetworkAnalysisSchema": NetworkAnalysisSchema,
        "ShapedActivationSchema": result_schema(ShapedActivation),
    }

