"""marshmallow schemas of the response bodies.

A response body is the engine result's derived ``to_dict()`` passed through
:func:`propcalc.jsonable`, so each schema here states, member for member, the fields of one
result dataclass; ``tests/api/test_api_response_fields.py`` checks that they agree field for
field, so a result that gains or loses a field cannot drift from its documented shape. These
schemas do not depend on the app's limits and are built once, at import.
"""

from __future__ import annotations

from marshmallow import fields

from propcalc import Phase

from ._fields import (
    Choice,
    ExtNumber,
    FiniteNumber,
    JSONInteger,
    StrictBoolean,
    StrictString,
)
from ._response_fields import ext, notes_field, num, pair_field, text
from ._schema_base import (
    DISTRIBUTIONS,
    TARGETS,
    VARIANCE_STATUSES,
    StrictSchema,
    _d,
    _r,
)

# the service's own bodies, listed in RESPONSE_SCHEMAS with the rest
from ._service_schemas import (  # noqa: F401
    HealthSchema,
    LimitRefSchema,
    LimitsInfoSchema,
    ProblemEntrySchema,
    ProblemSchema,
    RangesSchema,
)

# the extensions' bodies, listed in RESPONSE_SCHEMAS with the rest
from ._variant_responses import (  # noqa: F401
    AlphaDropoutSchema,
    DropoutPropagationSchema,
    DropoutSweepSchema,
    InitialLossSchema,
    IsometryAdviceSchema,
    JacobianSpectrumSchema,
    MaxMomentsSchema,
    MaxoutLayerSchema,
    MaxoutSchema,
    MaxProbabilitySchema,
    MeanVarianceFixedPointSchema,
    OutputLayerScaleSchema,
    SelfNormalizationSchema,
    SoftmaxSchema,
)

__all__ = ["RESPONSE_SCHEMAS"]


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
    status = _r(Choice(VARIANCE_STATUSES))
    growth_rate = ext(allow_none=True)
    message = text()

class PropagationSchema(StrictSchema):
    """The mean-field report at one (activation, sigma_w2, sigma_b2)."""

    activation = text()
    sigma_w2 = num()
    sigma_b2 = num()
    q_input = num()
    status = _r(Choice(VARIANCE_STATUSES))
    q_star = num(allow_none=True)
    chi_q = ext(allow_none=True)
    xi_q = ext(allow_none=True)
    chi_1 = ext()
    c_star = num(allow_none=True)
    chi_c = ext(allow_none=True)
    xi_c = ext(allow_none=True)
    phase = _r(Choice([p.value for p in (Phase.ORDERED, Phase.CHAOTIC, Phase.EDGE_OF_CHAOS,
                                         Phase.UNBOUNDED)]))
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

class ReasonSchema(StrictSchema):
    """One reason that decides trainability: its number, pass or fail, and the fix."""

    name = text()
    quantity = text()
    value = ext(allow_none=True)
    limit = ext(allow_none=True)
    passes = _r(StrictBoolean(allow_none=True, metadata=_d("null: not computed (see detail)")))
    depth_limit = ext(allow_none=True)
    fix = text(allow_none=True)
    detail = text()
    decides = _r(StrictBoolean(metadata=_d("false for a warning: beyond its limit it does not "
                                           "make the plan untrainable")))

class VerdictSchema(StrictSchema):
    """The trainability verdict: every reason, the depth limit they set, a summary."""

    trainable = _r(StrictBoolean())
    depth = _r(JSONInteger())
    depth_limit = ext(allow_none=True)
    limited_by = text(allow_none=True)
    failing = _r(fields.List(StrictString()))
    warnings = _r(fields.List(StrictString()))
    not_computed = _r(fields.List(StrictString()))
    summary = text()
    reasons = _r(fields.List(fields.Nested(ReasonSchema)))

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


class LearningRateCeilingSchema(StrictSchema):
    """The top curvature of the loss at initialisation and the learning rates it allows."""

    loss = _r(Choice(["mse", "cross_entropy"]))
    n_classes = _r(JSONInteger())
    batch_size = _r(JSONInteger())
    momentum = num()
    inputs = _r(Choice(["correlation", "correlations", "batch"]))
    kernel_diagonal = num()
    kernel_off_diagonal = num()
    kernel_top_eigenvalue = num()
    output_hessian = num()
    lambda_max = num()
    learning_rate_ceiling = num()
    learning_rate = num()
    learning_rate_rule = text()
    catapult_limit = num()
    optimiser = text()
    notes = notes_field()

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
    verdict = _r(fields.Nested(VerdictSchema))
    layers = _r(fields.List(fields.Nested(LayerInitSchema)))
    propagation = _r(fields.Nested(PropagationSchema))
    notes = notes_field()
    loss = _r(Choice(["mse", "cross_entropy"], allow_none=True))
    n_classes = _r(JSONInteger(allow_none=True))
    batch_size = _r(JSONInteger(allow_none=True))
    learning_rate_ceiling = num(allow_none=True, metadata=_d(
        "2 (1 + momentum) / lambda_max; null without a loss"))
    learning_rate = num(allow_none=True, metadata=_d("recommended; null without a loss"))
    learning_rate_details = _r(fields.Nested(LearningRateCeilingSchema, allow_none=True))
    output_layer = text(allow_none=True)
    output_layer_scale = _r(fields.Nested(OutputLayerScaleSchema, allow_none=True))

class LayerMeasurementSchema(StrictSchema):
    """Predicted and measured q, c and squared gradient norm at one layer."""

    index = _r(JSONInteger())
    q_predicted = ext()
    q_mean = ext()
    q_se = ext()
    q_band = pair_field()
    q_geometric = ext()
    q_geometric_band = pair_field()
    c_predicted = ext()
    c_mean = ext()
    c_se = ext()
    c_band = pair_field()
    gradient_predicted = ext()
    gradient_mean = ext()
    gradient_se = ext()
    gradient_band = pair_field()
    gradient_geometric = ext()
    gradient_geometric_band = pair_field()
    q_in_band = _r(StrictBoolean())
    c_in_band = _r(StrictBoolean())
    gradient_in_band = _r(StrictBoolean())

class SimulationSchema(StrictSchema):
    """Mean-field predictions against seeded finite-width networks, layer by layer."""

    activation = text()
    sigma_w2 = num()
    sigma_b2 = num()
    width = _r(JSONInteger())
    depth = _r(JSONInteger())
    repetitions = _r(JSONInteger())
    n_pairs = _r(JSONInteger())
    seed = _r(JSONInteger())
    q0 = num()
    c0 = num()
    tolerance = num()
    layers = _r(fields.List(fields.Nested(LayerMeasurementSchema),
                            metadata=_d("layers 0 ... depth")))
    max_deviation_q = ext()
    max_deviation_c = ext()
    max_deviation_gradient = ext()
    fraction_in_band = num()
    deviation_visible = _r(StrictBoolean())
    first_visible_layer = _r(JSONInteger(allow_none=True))
    message = text()

#: every response schema by its name in :class:`~propcalc_api._schemas.Schemas`
RESPONSE_SCHEMAS: dict[str, type[StrictSchema]] = {
    name[: -len("Schema")]: value for name, value in dict(globals()).items()
    if name.endswith("Schema") and isinstance(value, type) and issubclass(value, StrictSchema)
    and value is not StrictSchema}
