"""The base of every schema: the strict object, the vocabularies and the field factories.

One spelling of each constraint (sigma_w2, sigma_b2, q, q*), shared by the request schemas of
:mod:`propcalc_api._schemas` and the response schemas of :mod:`propcalc_api._responses`.
"""

from __future__ import annotations

import inspect
from typing import Any

from marshmallow import RAISE, Schema, ValidationError, fields

from propcalc import DEFAULT_EDGE_Q_STARS as _ENGINE_EDGE_Q_STARS
from propcalc import Distribution, Target, VarianceStatus, output_layer_scale
from propcalc.domains import DOMAINS

from ._config import (
    BIAS_MIN_POSITIVE,
    MC_MAX_ELEMENTS,
    Q_STAR_MAX,
    Q_STAR_MIN,
    SIGMA_W2_MIN,
    VARIANCE_MAX,
    Limits,
)
from ._fields import (
    Choice,
    FiniteNumber,
    Interval,
    JSONInteger,
    MaxItems,
    StrictBoolean,
    format_number,
)

__all__ = ["StrictSchema", "DISTRIBUTIONS", "TARGETS", "DEFAULT_EDGE_Q_STARS",
           "PARAM_NAME_PATTERN", "MAX_SIZE", "MAX_KERNEL", "MAX_KERNEL_DIMS",
           "VARIANCE_STATUSES", "DROPOUT_MAX_RATES", "ISOMETRY_DEFAULTS",
           "PLOT_MAX_ITERATIONS", "sigma_w2_field", "sigma_b2_field", "q_input_field",
           "q_star_field", "PLAN_READOUT_SAMPLES", "PLAN_MAX_CLASSES", "loss_field",
           "n_classes_field", "batch_size_field", "momentum_field", "scale_output_field"]

#: weight distributions of a plan (the engine's names)
DISTRIBUTIONS = tuple(d.value for d in Distribution)
#: plan targets (the engine's names)
TARGETS = tuple(t.value for t in Target)
#: q* values of the edge-of-chaos line when none are given (the engine's, as the CLI's)
DEFAULT_EDGE_Q_STARS = _ENGINE_EDGE_Q_STARS
#: names of activation parameters
PARAM_NAME_PATTERN = r"[A-Za-z_][A-Za-z0-9_]{0,31}"
#: largest layer width / channel count
MAX_SIZE = int(DOMAINS["width"].upper)
#: largest kernel size per spatial dimension, and most spatial dimensions
MAX_KERNEL = 1024
MAX_KERNEL_DIMS = 3
#: status of the variance in the reports (the engine's names)
VARIANCE_STATUSES = tuple(s.value for s in VarianceStatus)
#: most keep rates of one dropout sweep (the engine's own bound, propcalc.dropout_sweep)
DROPOUT_MAX_RATES = 1000
#: most layers of the variance-map iteration an image draws
PLOT_MAX_ITERATIONS = 100
#: defaults of the isometry advice (those of propcalc.dynamical_isometry): the target
#: normalised spectral variance (common practice, no source) and the scanned q* range
ISOMETRY_DEFAULTS = {"max_variance": 0.25, "q_star_min": 1e-6, "q_star_max": 100.0}
#: samples of K logits the readout's check draws (the engine's default), and the most classes
#: that keeps the draw within MC_MAX_ELEMENTS
PLAN_READOUT_SAMPLES = int(inspect.signature(output_layer_scale).parameters["n_samples"].default)
PLAN_MAX_CLASSES = MC_MAX_ELEMENTS // PLAN_READOUT_SAMPLES


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


# the training options of a plan (issue 15): the plain plan's and the network's
def loss_field(description: str) -> Choice:
    return Choice(["cross_entropy", "mse"], load_default=None, allow_none=True,
                  metadata=_d(description))


def n_classes_field(description: str) -> JSONInteger:
    return JSONInteger(validate=Interval(2, PLAN_MAX_CLASSES), load_default=None,
                       allow_none=True, metadata=_d(
                           f"{description}; at most {PLAN_MAX_CLASSES}: the readout's check "
                           f"draws {PLAN_READOUT_SAMPLES} samples of K logits"))


def batch_size_field() -> JSONInteger:
    return JSONInteger(validate=Interval(1, MAX_SIZE), load_default=None, allow_none=True,
                       metadata=_d("B, inputs per step (with a loss)"))


def momentum_field(description: str) -> FiniteNumber:
    return FiniteNumber(validate=Interval(0, 1, high_open=True), load_default=0.0,
                        metadata=_d(description))


def scale_output_field(description: str) -> StrictBoolean:
    return StrictBoolean(load_default=True, metadata=_d(description))


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


