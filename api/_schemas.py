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

from marshmallow import RAISE, Schema, ValidationError, fields, validates_schema

from propcalc import builtin_names

from ._config import (
    BIAS_MIN_POSITIVE,
    MAP_Q_MAX,
    PARAM_ABS_MAX,
    PLAN_Q_INPUT_MIN,
    SIGMA_W2_MIN,
    Q_STAR_MAX,
    Q_STAR_MIN,
    VARIANCE_MAX,
    Limits,
)
from ._fields import (
    ActivationField,
    Choice,
    ExtNumber,
    FiniteNumber,
    Interval,
    JSONInteger,
    MaxItems,
    OneOfSchemas,
    StrictBoolean,
    StrictString,
    format_number,
)

__all__ = ["StrictSchema", "Schemas", "build_schemas", "DISTRIBUTIONS", "TARGETS",
           "DEFAULT_EDGE_Q_STARS", "PARAM_NAME_PATTERN", "MAX_SIZE"]

#: weight distributions of a plan (the engine's names)
DISTRIBUTIONS = ("normal", "uniform", "truncated_normal", "orthogonal")
#: plan targets (the engine's names)
TARGETS = ("auto", "edge", "variance", "bias")
#: q* values of the edge-of-chaos line when none are given (the CLI's defaults)
DEFAULT_EDGE_Q_STARS = (0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0)
#: names of activation parameters
PARAM_NAME_PATTERN = r"[A-Za-z_][A-Za-z0-9_]{0,31}"
#: largest layer width / channel count
MAX_SIZE = 10_000_000
#: largest kernel size per spatial dimension, and most spatial dimensions
MAX_KERNEL = 1024
MAX_KERNEL_DIMS = 3


class StrictSchema(Schema):
    """Base: unknown members are refused with a message listing the allowed ones."""

    class Meta:
        unknown = RAISE

    error_messages = {"type": "must be an object", "unknown": "is not a field here"}

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        allowed = ", ".join(sorted(f.data_key or name for name, f in self.load_fields.items()))
        self.error_messages = {**self.error_messages,
                               "unknown": f"is not a field here (allowed: {allowed})"}


# ---------------------------------------------------------------------------------------------
# field factories (one spelling of each constraint)
# ---------------------------------------------------------------------------------------------
def _d(text: str, **extra: Any) -> dict[str, Any]:
    return {"description": text, **extra}


def sigma_w2_field(description: str = "weight variance times fan-in: W_ij ~ N(0, sigma_w2 / "
                   "fan_in)", **kw: Any) -> FiniteNumber:
    return FiniteNumber(validate=Interval(SIGMA_W2_MIN, VARIANCE_MAX), metadata=_d(description),
                        **kw)


def sigma_b2_field(description: str = "bias variance: b_i ~ N(0, sigma_b2)", **kw: Any
                   ) -> FiniteNumber:
    return FiniteNumber(validate=Interval(0, VARIANCE_MAX, zero_or_at_least=BIAS_MIN_POSITIVE),
                        metadata=_d(f"{description}; 0, or at least "
                                    f"{format_number(BIAS_MIN_POSITIVE)}"), **kw)


def q_input_field(minimum: float = 0.0, description: str = "mean squared input coordinate "
                  "(1 for standardised inputs)", **kw: Any) -> FiniteNumber:
    return FiniteNumber(validate=Interval(minimum, VARIANCE_MAX), metadata=_d(description), **kw)


def q_star_field(description: str = "variance fixed point q* on the edge-of-chaos line",
                 **kw: Any) -> FiniteNumber:
    return FiniteNumber(validate=Interval(Q_STAR_MIN, Q_STAR_MAX), metadata=_d(description), **kw)


def _numbers(item: fields.Field, limits: Limits, text: str) -> fields.List:
    return fields.List(item, validate=MaxItems(limits.max_array_length, 1, "MAX_ARRAY_LENGTH"),
                       metadata=_d(text, minItems=1, maxItems=limits.max_array_length))


def _r(field: fields.Field, **kw: Any) -> fields.Field:
    """Mark a response field required (responses always carry every member)."""
    field.required = True
    return field


def _exactly_one(data: dict[str, Any], names: tuple[str, ...], required: bool = True) -> None:
    given = [n for n in names if data.get(n) is not None]
    if len(given) > 1:
        raise ValidationError(f"must be absent when {given[0]} is given (give one of "
                              f"{', '.join(names)})", field_name=given[1])
    if required and not given:
        raise ValidationError(f"one of {', '.join(names)} is required", field_name=names[0])


def _one_of(*names: str) -> dict[str, Any]:
    """JSON Schema: exactly one of these members."""
    return {"oneOf": [{"required": [n]} for n in names]}


def _any_of(*names: str) -> dict[str, Any]:
    """JSON Schema: at least one of these members."""
    return {"anyOf": [{"required": [n]} for n in names]}


def _at_most_one(*names: str) -> dict[str, Any]:
    """JSON Schema: no two of these members together."""
    pairs = [[a, b] for i, a in enumerate(names) for b in names[i + 1:]]
    if len(pairs) == 1:
        return {"not": {"required": pairs[0]}}
    return {"not": {"anyOf": [{"required": p} for p in pairs]}}


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
    # responses
    Activation: type[Schema]
    ActivationList: type[Schema]
    Propagation: type[Schema]
    CriticalPoint: type[Schema]
    EdgeOfChaos: type[Schema]
    InitPlan: type[Schema]
    VarianceMap: type[Schema]
    CorrelationMap: type[Schema]
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

        name = Choice(names, required=True, metadata=_d("a built-in activation"))
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

        activation = Choice(names, required=True, metadata=_d("a built-in activation"))
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
        sigma_b2 = sigma_b2_field(load_default=None, allow_none=True)
        q_star = q_star_field(load_default=None, allow_none=True)
        q_input = q_input_field(PLAN_Q_INPUT_MIN, load_default=1.0)

        @validates_schema
        def _size(self, data: dict[str, Any], **kwargs: Any) -> None:
            if all(data.get(k) is None for k in ("depth", "widths", "layers")):
                raise ValidationError("one of depth, widths or layers is required",
                                      field_name="depth")

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

    # -----------------------------------------------------------------------------------------
    # responses
    # -----------------------------------------------------------------------------------------
    def num(**kw: Any) -> FiniteNumber:
        return _r(FiniteNumber(**kw))

    def ext(**kw: Any) -> ExtNumber:
        return _r(ExtNumber(**kw))

    def text(**kw: Any) -> StrictString:
        return _r(StrictString(**kw))

    def notes_field() -> fields.List:
        return _r(fields.List(StrictString(), metadata=_d("remarks in words")))

    class ActivationPropertiesSchema(StrictSchema):
        """The profile of an activation."""

        output_range = _r(fields.List(ExtNumber(), metadata=_d("[inf, sup] of phi", minItems=2,
                                                               maxItems=2)))
        monotonic = _r(StrictBoolean())
        value_at_zero = num()
        parity = _r(Choice(["odd", "even", "neither"]))
        smoothness = _r(Choice(["smooth", "C1", "C0", "discontinuous"]))
        dead_unit_probability = num(metadata=_d("P(phi'(z) = 0), z ~ N(0, 1)"))
        vanishing_gradient_tails = _r(fields.List(Choice(["left", "right"])))

    class GainsSchema(StrictSchema):
        """Forward and backward gains at unit pre-activation variance."""

        activation = text()
        forward = ext(metadata=_d("1 / sqrt(E[phi(z)^2])"))
        backward = ext(metadata=_d("1 / sqrt(E[phi'(z)^2])"))
        common_gain = ext(allow_none=True)
        common_gain_sigma_w2 = ext(allow_none=True)
        common_gain_chi_1 = ext(allow_none=True)
        common_gain_phase = text(allow_none=True)
        notes = notes_field()

    class ActivationSchema(StrictSchema):
        """An activation: its description, breakpoints, properties and gains."""

        name = text()
        label = text()
        params = _r(fields.Dict(keys=StrictString(), values=FiniteNumber()))
        description = text()
        formula = text(allow_none=True)
        derivative_formula = text(allow_none=True)
        breakpoints = _r(fields.List(FiniteNumber()))
        properties = _r(fields.Nested(ActivationPropertiesSchema))
        gains = _r(fields.Nested(GainsSchema))

    class ActivationListSchema(StrictSchema):
        """Every built-in activation."""

        activations = _r(fields.List(fields.Nested(ActivationSchema)))

    class FixedPointSchema(StrictSchema):
        """A fixed point q* of the variance map."""

        q = num()
        chi_q = ext()
        stable = _r(StrictBoolean())

    class VarianceFixedPointsSchema(StrictSchema):
        """All fixed points of V(q) = q and the one the network flows to."""

        points = _r(fields.List(fields.Nested(FixedPointSchema)))
        q_start = num()
        reached = _r(fields.Nested(FixedPointSchema, allow_none=True))
        status = _r(Choice(["fixed_point", "collapse", "unbounded", "neutral"]))
        growth_rate = ext(allow_none=True)
        message = text()

    class PropagationSchema(StrictSchema):
        """The mean-field report at one (activation, sigma_w2, sigma_b2)."""

        activation = text()
        sigma_w2 = num()
        sigma_b2 = num()
        q_input = num()
        status = _r(Choice(["fixed_point", "collapse", "unbounded", "neutral"]))
        q_star = num(allow_none=True)
        chi_q = ext(allow_none=True)
        xi_q = ext(allow_none=True)
        chi_1 = ext()
        c_star = num(allow_none=True)
        chi_c = ext(allow_none=True)
        xi_c = ext(allow_none=True)
        phase = _r(Choice(["ordered", "chaotic", "edge of chaos", "unbounded variance"]))
        trainable_depth = ext(allow_none=True)
        trainable_depth_rule = text()
        depth = _r(JSONInteger(allow_none=True))
        gradient_growth = ext(allow_none=True)
        edge_approach = text(allow_none=True)
        variance_fixed_points = _r(fields.Nested(VarianceFixedPointsSchema))
        notes = notes_field()

    class CriticalPointSchema(StrictSchema):
        """A point on the edge-of-chaos line."""

        activation = text()
        q_star = num()
        sigma_w2 = ext(allow_none=True)
        sigma_b2 = num(allow_none=True)
        chi_q = ext(allow_none=True)
        stable = _r(StrictBoolean())
        valid = _r(StrictBoolean())
        message = text()

    class EdgeOfChaosSchema(StrictSchema):
        """Critical points over q*, or at a fixed sigma_b2 (empty when there is none)."""

        activation = text()
        mode = _r(Choice(["q_star", "sigma_b2"]))
        sigma_b2 = num(allow_none=True)
        points = _r(fields.List(fields.Nested(CriticalPointSchema)))

    class LayerInitSchema(StrictSchema):
        """Initialisation of one layer (shape members only when layers or widths were given)."""

        index = _r(JSONInteger())
        kind = _r(Choice(["dense", "conv"], allow_none=True))
        fan_in = JSONInteger()
        fan_out = JSONInteger()
        weight_shape = fields.List(JSONInteger())
        kernel_size = fields.List(JSONInteger())
        sigma_w2 = num()
        sigma_b2 = num()
        gain = num()
        weight_std = num(allow_none=True)
        uniform_bound = num(allow_none=True)
        truncated_normal_std = num(allow_none=True)
        orthogonal_scale = num(allow_none=True)
        bias_std = num()
        value = num(allow_none=True, metadata=_d("the one number for the chosen distribution"))

    class InitPlanSchema(StrictSchema):
        """A per-layer initialisation plan with its mean-field justification."""

        activation = text()
        target = _r(Choice(TARGETS))
        target_description = text()
        distribution = _r(Choice(DISTRIBUTIONS))
        sigma_w2 = num()
        sigma_b2 = num()
        q_star = num(allow_none=True)
        depth = _r(JSONInteger())
        trainable_depth = ext(allow_none=True)
        depth_ok = _r(StrictBoolean())
        verdict = text()
        layers = _r(fields.List(fields.Nested(LayerInitSchema)))
        propagation = _r(fields.Nested(PropagationSchema))
        notes = notes_field()

    class VarianceMapSchema(StrictSchema):
        """V(q), V'(q) and chi_1(q) at the requested q."""

        activation = text()
        sigma_w2 = num()
        sigma_b2 = num()
        q = _r(fields.List(FiniteNumber()))
        variance = _r(fields.List(ExtNumber(), metadata=_d("V(q)")))
        slope = _r(fields.List(ExtNumber(), metadata=_d("V'(q)")))
        chi_1 = _r(fields.List(ExtNumber(), metadata=_d("sigma_w2 E[phi'(sqrt(q) z)^2]")))

    class CorrelationMapSchema(StrictSchema):
        """C(c) (and C'(c) when asked) at the requested c, for inputs of variance q."""

        activation = text()
        sigma_w2 = num()
        sigma_b2 = num()
        q = num()
        q_source = _r(Choice(["given", "fixed_point"]))
        c = _r(fields.List(FiniteNumber()))
        correlation = _r(fields.List(ExtNumber(), metadata=_d("C(c)")))
        slope = _r(fields.List(ExtNumber(), allow_none=True, metadata=_d("C'(c), or null")))

    class ProblemEntrySchema(StrictSchema):
        """One bad field: where it is and what is wrong with it."""

        pointer = StrictString(metadata=_d("JSON pointer into the request body"))
        parameter = StrictString(metadata=_d("query parameter name"))
        detail = text()

    class LimitRefSchema(StrictSchema):
        """The limit a request ran into."""

        name = text()
        value = num()

    class ProblemSchema(StrictSchema):
        """RFC 9457 problem details."""

        type = text(metadata=_d("problem type URI; about:blank for plain HTTP errors"))
        title = text()
        status = _r(JSONInteger())
        detail = text()
        instance = text(metadata=_d("the request path"))
        errors = fields.List(fields.Nested(ProblemEntrySchema))
        limit = fields.Nested(LimitRefSchema)
        estimated_cost = FiniteNumber(metadata=_d("estimated work units of the request"))
        incident = StrictString(metadata=_d("identifier of a logged internal error"))

    class HealthSchema(StrictSchema):
        """Liveness."""

        status = _r(Choice(["ok"]))
        service = text()
        version = text()

    class RangesSchema(StrictSchema):
        """Fixed parameter ranges."""

        variance_max = num()
        sigma_w2_min = num()
        bias_min_positive = num()
        map_q_max = num()
        q_star_min = num()
        q_star_max = num()
        plan_q_input_min = num()
        param_abs_max = num()

    class LimitsInfoSchema(StrictSchema):
        """The limits this service enforces."""

        max_body_bytes = _r(JSONInteger())
        max_array_length = _r(JSONInteger())
        max_grid_points = _r(JSONInteger())
        max_layers = _r(JSONInteger())
        max_depth = _r(JSONInteger())
        max_formula_length = _r(JSONInteger())
        max_formula_params = _r(JSONInteger())
        work_budget = num()
        wall_clock_limit = num()
        ranges = _r(fields.Nested(RangesSchema))

    local = dict(locals())
    return Schemas(**{name: local[f"{name}Schema"] for name in Schemas.__dataclass_fields__})
