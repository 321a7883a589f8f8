"""marshmallow schemas of every request and response.

The request schemas depend on the app's :class:`~propcalc_api._config.Limits`
(array lengths, grid sizes, formula limits), so they are built per app by
:func:`build_schemas`; the OpenAPI document is generated from the same
classes and states the same limits. Every object rejects unknown members.

Response schemas document the bodies, which are the engine's ``to_dict()``
passed through :func:`propcalc.jsonable` (infinities as ``"inf"``/``"-inf"``,
absent values as ``null``); with ``VALIDATE_RESPONSES`` the service loads each
body back through its schema before sending it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from marshmallow import Schema, ValidationError, fields, validates_schema

from propcalc import builtin_names

from ._config import (
    MAP_Q_MAX,
    PARAM_ABS_MAX,
    PLAN_Q_INPUT_MIN,
    Q_STAR_MAX,
    Q_STAR_MIN,
    Limits,
)
from ._fields import (
    ActivationField,
    Choice,
    FiniteNumber,
    Interval,
    JSONInteger,
    MaxItems,
    OneOfSchemas,
    StrictBoolean,
    StrictString,
    format_number,
)
from ._network_schemas import build_network_schemas
from ._plot_schemas import build_plot_schemas
from ._responses import RESPONSE_SCHEMAS
from ._schema_base import (
    DEFAULT_EDGE_Q_STARS,
    DISTRIBUTIONS,
    DROPOUT_MAX_RATES,
    ISOMETRY_DEFAULTS,
    MAX_KERNEL,
    MAX_KERNEL_DIMS,
    MAX_SIZE,
    PARAM_NAME_PATTERN,
    PLOT_MAX_ITERATIONS,
    TARGETS,
    VARIANCE_STATUSES,
    StrictSchema,
    _any_of,
    _at_most_one,
    _d,
    _exactly_one,
    _numbers,
    _one_of,
    batch_size_field,
    loss_field,
    momentum_field,
    n_classes_field,
    q_input_field,
    q_star_field,
    scale_output_field,
    sigma_b2_field,
    sigma_w2_field,
)
from ._variant_schemas import build_variant_schemas

__all__ = ["StrictSchema", "Schemas", "build_schemas", "DISTRIBUTIONS", "TARGETS",
           "DEFAULT_EDGE_Q_STARS", "PARAM_NAME_PATTERN", "MAX_SIZE", "VARIANCE_STATUSES",
           "DROPOUT_MAX_RATES", "ISOMETRY_DEFAULTS", "PLOT_MAX_ITERATIONS"]


# ---------------------------------------------------------------------------------------------
# the per-app schema set
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Schemas:
    """Schema classes of one app (requests, then responses)."""

    # requests
    NamedActivation: type[Schema]
    FormulaActivation: type[Schema]
    DescribeRequest: type[Schema]
    PropagationRequest: type[Schema]
    PropagationQuery: type[Schema]
    CriticalPointRequest: type[Schema]
    EdgeOfChaosRequest: type[Schema]
    PlanRequest: type[Schema]
    VarianceMapRequest: type[Schema]
    CorrelationMapRequest: type[Schema]
    DropoutRequest: type[Schema]
    DropoutSweepRequest: type[Schema]
    MaxoutRequest: type[Schema]
    SelfNormalizationRequest: type[Schema]
    AlphaDropoutRequest: type[Schema]
    JacobianSpectrumRequest: type[Schema]
    DynamicalIsometryRequest: type[Schema]
    SoftmaxRequest: type[Schema]
    OutputScaleRequest: type[Schema]
    SimulationRequest: type[Schema]
    PhaseDiagramPlotRequest: type[Schema]
    PhaseDiagramPlotQuery: type[Schema]
    VarianceMapPlotRequest: type[Schema]
    VarianceMapPlotQuery: type[Schema]
    CorrelationMapPlotRequest: type[Schema]
    CorrelationMapPlotQuery: type[Schema]
    DepthScalesPlotRequest: type[Schema]
    DepthScalesPlotQuery: type[Schema]
    NetworkRequest: type[Schema]
    NetworkPlotRequest: type[Schema]
    ShapeRequest: type[Schema]
    ShapePlotRequest: type[Schema]
    # responses
    Activation: type[Schema]
    ActivationList: type[Schema]
    Propagation: type[Schema]
    CriticalPoint: type[Schema]
    EdgeOfChaos: type[Schema]
    InitPlan: type[Schema]
    VarianceMap: type[Schema]
    CorrelationMap: type[Schema]
    DropoutPropagation: type[Schema]
    DropoutSweep: type[Schema]
    Maxout: type[Schema]
    SelfNormalization: type[Schema]
    AlphaDropout: type[Schema]
    JacobianSpectrum: type[Schema]
    IsometryAdvice: type[Schema]
    Softmax: type[Schema]
    OutputLayerScale: type[Schema]
    Simulation: type[Schema]
    NetworkAnalysis: type[Schema]
    ShapedActivation: type[Schema]
    Problem: type[Schema]
    Health: type[Schema]
    LimitsInfo: type[Schema]


def build_schemas(limits: Limits) -> Schemas:
    """Build the schema classes for an app with these limits."""
    names = builtin_names()

    def params_field() -> fields.Dict:
        return fields.Dict(
            keys=StrictString(pattern=PARAM_NAME_PATTERN),
            values=FiniteNumber(validate=Interval(-PARAM_ABS_MAX, PARAM_ABS_MAX)),
            validate=MaxItems(limits.max_formula_params, 0, "MAX_FORMULA_PARAMS"),
            load_default=dict,
            metadata=_d("named parameters, e.g. {\"slope\": 0.1}",
                        openapi_extra={"maxProperties": limits.max_formula_params,
                                       "propertyNames": {"pattern": f"^{PARAM_NAME_PATTERN}$"}}))

    class NamedActivationSchema(StrictSchema):
        """A built-in activation with named parameters."""

        name = Choice(names, spellings=True, required=True, metadata=_d("a built-in activation"))
        params = params_field()

    class FormulaActivationSchema(StrictSchema):
        """An activation typed as a formula in x with named constants."""

        formula = StrictString(required=True, min_length=1, max_length=limits.max_formula_length,
                               limit="MAX_FORMULA_LENGTH",
                               metadata=_d("a formula in x, e.g. \"x * sigmoid(beta * x)\""))
        params = params_field()

    def activation_field() -> ActivationField:
        return ActivationField(names, NamedActivationSchema, FormulaActivationSchema,
                               required=True, metadata=_d(
                                   "a built-in name (\"tanh\"), {\"name\": ..., \"params\": ...} "
                                   "or {\"formula\": ..., \"params\": ...}"))

    class DescribeRequestSchema(StrictSchema):
        """Describe one activation: properties and gains."""

        activation = activation_field()

    class PropagationRequestSchema(StrictSchema):
        """The propagation report at one (sigma_w2, sigma_b2)."""

        activation = activation_field()
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        depth = JSONInteger(validate=Interval(1, limits.max_depth), load_default=None,
                            allow_none=True, metadata=_d("number of layers, for chi_1 ** depth"))
        q_input = q_input_field(load_default=1.0)

    class PropagationQuerySchema(StrictSchema):
        """Query form of the propagation report (built-in names only)."""

        activation = Choice(names, spellings=True, required=True,
                            metadata=_d("a built-in activation"))
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        depth = JSONInteger(validate=Interval(1, limits.max_depth),
                            metadata=_d("number of layers, for chi_1 ** depth"))
        q_input = q_input_field(load_default=1.0)

    class CriticalPointRequestSchema(StrictSchema):
        """The critical point on the edge-of-chaos line through one q*."""

        activation = activation_field()
        q_star = q_star_field(load_default=1.0)

    def grid_schema(label: str, interval: Interval, allow_log: bool, what: str) -> type[Schema]:
        class GridSchema(StrictSchema):
            start = FiniteNumber(required=True, validate=interval, metadata=_d(f"first {what}"))
            stop = FiniteNumber(required=True, validate=interval, metadata=_d(f"last {what}"))
            num = JSONInteger(required=True, validate=Interval(2, limits.max_grid_points),
                              metadata=_d("number of points (limit MAX_GRID_POINTS)"))
            spacing = Choice(["linear", "log"] if allow_log else ["linear"], load_default="linear",
                             metadata=_d("linear, or log (geometric; start must be > 0)"
                                         if allow_log else "linear"))

            @validates_schema
            def _order(self, data: dict[str, Any], **kwargs: Any) -> None:
                if data["stop"] <= data["start"]:
                    raise ValidationError(f"must be > start ({format_number(data['start'])})",
                                          field_name="stop")
                if data.get("spacing") == "log" and data["start"] <= 0:
                    raise ValidationError("must be > 0 for log spacing", field_name="start")

        GridSchema.__name__ = GridSchema.__qualname__ = f"{label}Schema"
        GridSchema.__doc__ = f"Evenly spaced {what} values from start to stop."
        return GridSchema

    QGrid = grid_schema("QGrid", Interval(0, MAP_Q_MAX), True, "q")
    CGrid = grid_schema("CGrid", Interval(-1, 1), False, "c")
    QStarGrid = grid_schema("QStarGrid", Interval(Q_STAR_MIN, Q_STAR_MAX), True, "q*")

    class EdgeOfChaosRequestSchema(StrictSchema):
        """The edge-of-chaos line sampled over q*, or solved at a fixed sigma_b2."""

        OPENAPI_EXTRA = _at_most_one("q_star", "q_star_grid", "sigma_b2")

        activation = activation_field()
        q_star = _numbers(FiniteNumber(validate=Interval(Q_STAR_MIN, Q_STAR_MAX)), limits,
                          "q* values to sample the line at")
        q_star_grid = fields.Nested(QStarGrid, metadata=_d("a grid of q* values"))
        sigma_b2 = sigma_b2_field("solve for every critical point with this bias variance")

        @validates_schema
        def _one_mode(self, data: dict[str, Any], **kwargs: Any) -> None:
            _exactly_one(data, ("q_star", "q_star_grid", "sigma_b2"), required=False)

    class DenseLayerSchema(StrictSchema):
        """A dense layer: fan_in = in_features, fan_out = out_features."""

        kind = Choice(["dense"], required=True)
        in_features = JSONInteger(required=True, validate=Interval(1, MAX_SIZE))
        out_features = JSONInteger(required=True, validate=Interval(1, MAX_SIZE))

    class ConvLayerSchema(StrictSchema):
        """A convolution: fan_in = in_channels * prod(kernel_size)."""

        kind = Choice(["conv"], required=True)
        in_channels = JSONInteger(required=True, validate=Interval(1, MAX_SIZE))
        out_channels = JSONInteger(required=True, validate=Interval(1, MAX_SIZE))
        kernel_size = fields.List(JSONInteger(validate=Interval(1, MAX_KERNEL)), required=True,
                                  validate=MaxItems(MAX_KERNEL_DIMS, 1),
                                  metadata=_d("one size per spatial dimension, e.g. [3, 3]",
                                              minItems=1, maxItems=MAX_KERNEL_DIMS))

    class PlanRequestSchema(StrictSchema):
        """A per-layer initialisation plan for a described network."""

        OPENAPI_EXTRA = {**_any_of("depth", "widths", "layers"), **_at_most_one("widths", "layers")}

        activation = activation_field()
        depth = JSONInteger(validate=Interval(1, limits.max_layers), metadata=_d(
            "number of weight layers (alone: scales per 1/sqrt(fan_in))"))
        widths = fields.List(JSONInteger(validate=Interval(1, MAX_SIZE)),
                             validate=MaxItems(limits.max_layers + 1, 2, "MAX_LAYERS"),
                             metadata=_d("dense network widths [d0, d1, ..., dL]", minItems=2,
                                         maxItems=limits.max_layers + 1))
        layers = fields.List(OneOfSchemas({"dense": DenseLayerSchema, "conv": ConvLayerSchema}),
                             validate=MaxItems(limits.max_layers, 1, "MAX_LAYERS"),
                             metadata=_d("explicit dense and convolutional layers", minItems=1,
                                         maxItems=limits.max_layers))
        distribution = Choice(DISTRIBUTIONS, load_default="normal")
        target = Choice(TARGETS, load_default="auto", metadata=_d(
            "edge (edge of chaos), variance (sigma_b2 = 0, variance preserving), bias (edge of "
            "chaos at the given sigma_b2), auto (bias if sigma_b2 is given, else edge, else "
            "variance)"))
        sigma_b2 = sigma_b2_field(
            "the bias variance to fix (target bias, or auto); refused with target variance or "
            "edge, which set it", load_default=None, allow_none=True)
        q_star = q_star_field(
            "the preferred q* on the edge of chaos (target edge, or auto without sigma_b2); "
            "refused with target variance or bias, which set it", load_default=None,
            allow_none=True)
        q_input = q_input_field(PLAN_Q_INPUT_MIN, load_default=1.0)
        # training (issue 15): the loss sets the readout's scale and the learning-rate ceiling
        loss = loss_field(
            "cross_entropy (softmax) or mse: the plan then scales the last layer for the loss "
            "and carries learning_rate_ceiling and learning_rate (needs widths or dense layers)")
        n_classes = n_classes_field("K, the outputs (cross_entropy: required, the last width)")
        batch_size = batch_size_field()
        momentum = momentum_field("heavy-ball momentum: the ceiling is 2 (1 + momentum) "
                                  "/ lambda_max")
        input_correlation = FiniteNumber(validate=Interval(-1, 1), load_default=None,
                                         allow_none=True, metadata=_d(
                                             "the inputs' pairwise correlation (default 0)"))
        scale_output = scale_output_field(
            "with a loss, scale the last layer for it; false keeps the hidden scale")

        @validates_schema
        def _size(self, data: dict[str, Any], **kwargs: Any) -> None:
            if all(data.get(k) is None for k in ("depth", "widths", "layers")):
                raise ValidationError("one of depth, widths or layers is required",
                                      field_name="depth")
            errors: dict[str, list[str]] = {}
            loss = data.get("loss")
            if loss is None:
                for name in ("n_classes", "batch_size", "input_correlation"):
                    if data.get(name) is not None:
                        errors[name] = ["is only read with a loss (give loss)"]
            else:
                if data.get("batch_size") is None:
                    errors["batch_size"] = [f"is required with loss {loss}"]
                if loss == "cross_entropy" and data.get("n_classes") is None:
                    errors["n_classes"] = ["is required with loss cross_entropy"]
                if data.get("widths") is None and data.get("layers") is None:
                    errors["widths"] = ["is required with a loss (widths or dense layers)"]
            if errors:
                raise ValidationError(errors)

    class VarianceMapRequestSchema(StrictSchema):
        """The variance map V(q), its slope and chi_1 at sampled q."""

        OPENAPI_EXTRA = _one_of("q", "q_grid")

        activation = activation_field()
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        q = _numbers(FiniteNumber(validate=Interval(0, MAP_Q_MAX)), limits,
                     "pre-activation variances")
        q_grid = fields.Nested(QGrid)

        @validates_schema
        def _one_q(self, data: dict[str, Any], **kwargs: Any) -> None:
            _exactly_one(data, ("q", "q_grid"))

    class CorrelationMapRequestSchema(StrictSchema):
        """The correlation map C(c) (and optionally C'(c)) at sampled c."""

        OPENAPI_EXTRA = _one_of("c", "c_grid")

        activation = activation_field()
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        c = _numbers(FiniteNumber(validate=Interval(-1, 1)), limits, "correlations in [-1, 1]")
        c_grid = fields.Nested(CGrid)
        q = FiniteNumber(validate=Interval(0, MAP_Q_MAX), load_default=None, allow_none=True,
                         metadata=_d("variance of both inputs; default: the fixed point q*"))
        q_input = q_input_field(description="mean squared input, to find q* when q is not given",
                                load_default=1.0)
        with_slope = StrictBoolean(load_default=False, metadata=_d("also return C'(c)"))

        @validates_schema
        def _one_c(self, data: dict[str, Any], **kwargs: Any) -> None:
            _exactly_one(data, ("c", "c_grid"))

    # dropout, maxout, mean-variance maps, spectra, the softmax layer, simulations: their own
    # module
    local = dict(locals())
    local.update(build_variant_schemas(limits, activation_field))
    # images of the basic maps: their own module
    local.update(build_plot_schemas(limits, activation_field, names))
    local.update({f"{name}Schema": schema for name, schema in RESPONSE_SCHEMAS.items()})
    # networks and shaping (issues 14 and 16): their own module
    local.update(build_network_schemas(limits, StrictSchema, activation_field,
                                       local["ImageOptionsSchema"]))
    return Schemas(**{name: local[f"{name}Schema"] for name in Schemas.__dataclass_fields__})
