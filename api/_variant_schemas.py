"""Request schemas of the extensions: dropout, maxout, the mean-variance maps, spectra, the
softmax layer and the finite-width simulation.

Built per app like the other request schemas (their bounds come from the app's limits), by
:func:`build_variant_schemas`, which :func:`propcalc_api._schemas.build_schemas` calls with the
activation field it uses everywhere.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from marshmallow import Schema, ValidationError, fields, validates_schema

from propcalc import alpha_dropout

from ._config import (
    ALPHA_PRIME_ABS_MAX,
    KEEP_RATE_MIN,
    LOGIT_VARIANCE_MAX,
    MARGIN_MAX,
    MARGIN_MIN,
    MAX_CLASSES,
    MAX_SAMPLES,
    MAXOUT_MAX_RANK,
    MC_MAX_ELEMENTS,
    MEAN_ABS_MAX,
    OMEGA_ABS_MAX,
    PLAN_Q_INPUT_MIN,
    SEED_MAX,
    SIMULATION_MAX_PAIRS,
    SIMULATION_MAX_REPETITIONS,
    SIMULATION_MAX_WIDTH,
    SMALL_VARIANCE_MIN,
    SPECTRAL_VARIANCE_MAX,
    TOLERANCE_MIN,
    VARIANCE_MAX,
    Limits,
)
from ._fields import (
    ActivationField,
    FiniteNumber,
    Interval,
    JSONInteger,
    MaxItems,
    StrictBoolean,
    format_number,
)
from ._schema_base import (
    DROPOUT_MAX_RATES,
    ISOMETRY_DEFAULTS,
    MAX_SIZE,
    StrictSchema,
    _d,
    q_input_field,
    q_star_field,
    sigma_b2_field,
    sigma_w2_field,
)

__all__ = ["build_variant_schemas"]


def build_variant_schemas(limits: Limits, activation_field: Callable[[], ActivationField]
                          ) -> dict[str, type[Schema]]:
    """The extensions' request schemas by class name."""
    # -- dropout, maxout, mean-variance maps, spectra, the softmax layer, simulations -----------
    def keep_rate_field(description: str, **kw: Any) -> FiniteNumber:
        return FiniteNumber(validate=Interval(KEEP_RATE_MIN, 1), metadata=_d(description), **kw)

    def report_depth_field(description: str = "number of layers, for chi_1 ** depth and the "
                           "depth verdict") -> JSONInteger:
        return JSONInteger(validate=Interval(1, limits.max_depth), load_default=None,
                           allow_none=True, metadata=_d(description))

    def seed_field() -> JSONInteger:
        return JSONInteger(validate=Interval(0, SEED_MAX), load_default=0,
                           metadata=_d("seed of numpy.random.default_rng / SeedSequence"))

    def n_samples_field() -> JSONInteger:
        return JSONInteger(validate=Interval(2, MAX_SAMPLES), metadata=_d(
            "Monte Carlo draws of the largest class probability (K > 2); default 100000, or "
            "50000000 // n_classes when that is smaller (n_samples * n_classes <= 5e7)"))

    def check_draws(data: dict[str, Any]) -> None:
        k, n = data.get("n_classes"), data.get("n_samples")
        if k is not None and n is not None and k > 2 and n * k > MC_MAX_ELEMENTS:
            raise ValidationError(f"must be <= {MC_MAX_ELEMENTS // k} for {k} classes "
                                  "(n_samples * n_classes <= 5e7)", field_name="n_samples")

    def classes_field() -> JSONInteger:
        return JSONInteger(required=True, validate=Interval(2, MAX_CLASSES),
                           metadata=_d("number of classes K"))

    keep_rate_text = ("probability rho of keeping a unit (kept activations are rescaled by "
                      "1 / rho); 1 is no dropout")
    scale_text = ("use sigma_w2 * rho at keep rate rho, which holds sigma_w2 / rho and so q* "
                  "fixed")

    class DropoutRequestSchema(StrictSchema):
        """Signal propagation with dropout at one keep rate (Schoenholz et al. 2017)."""

        activation = activation_field()
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        keep_rate = keep_rate_field(keep_rate_text, required=True)
        depth = report_depth_field()
        q_input = q_input_field(PLAN_Q_INPUT_MIN, load_default=1.0)
        scale_with_keep_rate = StrictBoolean(load_default=False, metadata=_d(scale_text))

    max_rates = min(limits.max_array_length, DROPOUT_MAX_RATES)

    class DropoutSweepRequestSchema(StrictSchema):
        """Dropout reports over several keep rates."""

        activation = activation_field()
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        keep_rates = fields.List(
            FiniteNumber(validate=Interval(KEEP_RATE_MIN, 1)), required=True,
            validate=MaxItems(max_rates, 1, "MAX_ARRAY_LENGTH"
                              if max_rates == limits.max_array_length else None),
            metadata=_d("keep rates, one report each", minItems=1, maxItems=max_rates))
        depth = report_depth_field()
        q_input = q_input_field(PLAN_Q_INPUT_MIN, load_default=1.0)
        scale_with_keep_rate = StrictBoolean(load_default=False, metadata=_d(scale_text))

    class MaxoutRequestSchema(StrictSchema):
        """A deep maxout network of rank k (Goodfellow et al. 2013)."""

        OPENAPI_EXTRA = {"dependentRequired": {"fan_in": ["fan_out"], "fan_out": ["fan_in"]}}

        k = JSONInteger(required=True, validate=Interval(1, MAXOUT_MAX_RANK),
                        metadata=_d("rank: affine pieces per unit"))
        sigma_w2 = sigma_w2_field("weight variance times fan-in of every piece; default c_k = "
                                  "1 / E[X_k^2], X_k the largest of k standard normals "
                                  "(Tseran & Montufar 2023)")
        sigma_b2 = sigma_b2_field("bias variance of every piece", load_default=0.0)
        depth = report_depth_field()
        q_input = q_input_field(load_default=1.0)
        fan_in = JSONInteger(validate=Interval(1, MAX_SIZE), metadata=_d(
            "with fan_out: the size and weight std of one dense maxout layer"))
        fan_out = JSONInteger(validate=Interval(1, MAX_SIZE), metadata=_d("see fan_in"))

        @validates_schema
        def _both_sizes(self, data: dict[str, Any], **kwargs: Any) -> None:
            for a, b in (("fan_in", "fan_out"), ("fan_out", "fan_in")):
                if data.get(a) is not None and data.get(b) is None:
                    raise ValidationError(f"is required when {a} is given", field_name=b)

    class MeanVarianceStartSchema(StrictSchema):
        """The mean and variance (mu, nu) of the activations the network starts from."""

        mu = FiniteNumber(required=True, validate=Interval(-MEAN_ABS_MAX, MEAN_ABS_MAX))
        nu = FiniteNumber(required=True, validate=Interval(SMALL_VARIANCE_MIN, VARIANCE_MAX))

    class SelfNormalizationRequestSchema(StrictSchema):
        """Fixed points of the mean-variance map and their Jacobians (Klambauer et al. 2017)."""

        activation = activation_field()
        omega = FiniteNumber(validate=Interval(-OMEGA_ABS_MAX, OMEGA_ABS_MAX), load_default=0.0,
                             metadata=_d("sum of a unit's incoming weights (0 for normalised "
                                         "weights)"))
        tau = FiniteNumber(validate=Interval(SMALL_VARIANCE_MIN, VARIANCE_MAX), load_default=1.0,
                           metadata=_d("sum of their squares (1 for normalised weights)"))
        start = fields.Nested(MeanVarianceStartSchema, load_default=lambda: {"mu": 0.0, "nu": 1.0},
                              metadata=_d("where the network starts; the nearest fixed point is "
                                          "reported as nearest (default mu = 0, nu = 1)"))

    selu_alpha_prime = alpha_dropout(1.0).alpha_prime

    class AlphaDropoutRequestSchema(StrictSchema):
        """The constants of alpha dropout (Klambauer et al. 2017)."""

        keep_rate = keep_rate_field("probability q of keeping a unit", required=True)
        mean = FiniteNumber(validate=Interval(-MEAN_ABS_MAX, MEAN_ABS_MAX), load_default=0.0,
                            metadata=_d("mean of the incoming activations, kept"))
        variance = FiniteNumber(validate=Interval(SMALL_VARIANCE_MIN, VARIANCE_MAX),
                                load_default=1.0,
                                metadata=_d("variance of the incoming activations, kept"))
        alpha_prime = FiniteNumber(
            validate=Interval(-ALPHA_PRIME_ABS_MAX, ALPHA_PRIME_ABS_MAX), metadata=_d(
                "value given to dropped units; default SELU's saturation value -lambda alpha "
                f"= {selu_alpha_prime!r}"))

    class JacobianSpectrumRequestSchema(StrictSchema):
        """Mean and variance of the squared singular values of the input-output Jacobian."""

        activation = activation_field()
        depth = JSONInteger(required=True, validate=Interval(1, limits.max_depth),
                            metadata=_d("number of layers L"))
        q_star = q_star_field("the pre-activation variance every layer sits at",
                              load_default=1.0)
        sigma_w2 = sigma_w2_field("default: the edge of chaos through q_star (chi_1 = 1)")

    class DynamicalIsometryRequestSchema(StrictSchema):
        """Where on the edge of chaos a depth-L network has a near-isometric Jacobian."""

        activation = activation_field()
        depth = JSONInteger(required=True, validate=Interval(1, limits.max_depth),
                            metadata=_d("number of layers L"))
        max_variance = FiniteNumber(
            validate=Interval(0, SPECTRAL_VARIANCE_MAX),
            load_default=ISOMETRY_DEFAULTS["max_variance"], metadata=_d(
                "target normalised spectral variance (default 0.25: common practice, no "
                "source)"))
        q_star_min = q_star_field("smallest q* scanned",
                                  load_default=ISOMETRY_DEFAULTS["q_star_min"])
        q_star_max = q_star_field("largest q* scanned (> q_star_min)",
                                  load_default=ISOMETRY_DEFAULTS["q_star_max"])

        @validates_schema
        def _range(self, data: dict[str, Any], **kwargs: Any) -> None:
            if data["q_star_max"] <= data["q_star_min"]:
                raise ValidationError(f"must be > q_star_min ({format_number(data['q_star_min'])})",
                                      field_name="q_star_max")

    class SoftmaxRequestSchema(StrictSchema):
        """Expected initial loss and largest class probability of a softmax output."""

        n_classes = classes_field()
        logit_variance = FiniteNumber(required=True, validate=Interval(0, LOGIT_VARIANCE_MAX),
                                      metadata=_d("variance s2 of each logit at initialisation"))
        n_samples = n_samples_field()
        seed = seed_field()

        @validates_schema
        def _draws(self, data: dict[str, Any], **kwargs: Any) -> None:
            check_draws(data)

    class OutputScaleRequestSchema(StrictSchema):
        """The last layer's weight scale that keeps the initial loss within a margin of ln K."""

        n_classes = classes_field()
        penultimate_second_moment = FiniteNumber(
            validate=Interval(SMALL_VARIANCE_MIN, VARIANCE_MAX), load_default=1.0,
            metadata=_d("E[phi(h)^2] of the activations feeding the last layer (default 1)"))
        margin = FiniteNumber(validate=Interval(MARGIN_MIN, MARGIN_MAX), metadata=_d(
            "allowed excess over ln K in nats; default 1% of ln K (common practice, no source)"))
        sigma_b2 = sigma_b2_field("the last layer's bias variance", load_default=0.0)
        fan_in = JSONInteger(validate=Interval(1, MAX_SIZE), metadata=_d(
            "width of the penultimate layer, for the weight std"))
        current_sigma_w2 = sigma_w2_field("the last layer's planned sigma_w2, to report its loss")
        current_sigma_b2 = sigma_b2_field("its planned sigma_b2 (default: sigma_b2)")
        n_samples = n_samples_field()
        seed = seed_field()

        @validates_schema
        def _draws(self, data: dict[str, Any], **kwargs: Any) -> None:
            check_draws(data)

    class SimulationRequestSchema(StrictSchema):
        """Seeded finite-width networks measured against the mean-field predictions."""

        activation = activation_field()
        sigma_w2 = sigma_w2_field(required=True)
        sigma_b2 = sigma_b2_field(load_default=0.0)
        width = JSONInteger(required=True, validate=Interval(2, SIMULATION_MAX_WIDTH),
                            metadata=_d("units per layer N (width^2 * depth * repetitions at "
                                        "most MAX_SIMULATION_SIZE)"))
        depth = JSONInteger(required=True, validate=Interval(1, limits.max_layers),
                            metadata=_d("number of layers L (limit MAX_LAYERS)"))
        repetitions = JSONInteger(validate=Interval(2, SIMULATION_MAX_REPETITIONS),
                                  load_default=8, metadata=_d("independent networks"))
        n_pairs = JSONInteger(validate=Interval(1, SIMULATION_MAX_PAIRS), load_default=4,
                              metadata=_d("input pairs per network"))
        seed = seed_field()
        q0 = FiniteNumber(validate=Interval(PLAN_Q_INPUT_MIN, VARIANCE_MAX), load_default=1.0,
                          metadata=_d("mean square of the layer-0 pre-activations"))
        c0 = FiniteNumber(validate=Interval(-1, 1), load_default=0.5,
                          metadata=_d("their correlation"))
        tolerance = FiniteNumber(validate=Interval(TOLERANCE_MIN, 1), load_default=0.05,
                                 metadata=_d("practical size of a visible deviation (relative "
                                             "for q and the gradient, absolute for c)"))

    return {name: value for name, value in locals().items()
            if isinstance(value, type) and issubclass(value, Schema)}
