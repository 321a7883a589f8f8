"""The response schemas agree, field for field, with the result dataclasses they document.

A response body is a result's derived ``to_dict()`` (see :mod:`propcalc.results`); its schema in
``propcalc_api._responses`` is written by hand to carry descriptions for the OpenAPI document. This
test makes the two one contract: every schema backed by a result names exactly the result's dict
keys, so a field added to (or removed from) a result without its schema fails here. Schemas that
describe bodies the service assembles itself (lists, envelopes, problems, limits) are listed with
the reason; a new schema must join one of the two lists.
"""

from __future__ import annotations

import pytest

from propcalc.activations.base import Activation
from propcalc.activations.profile import ActivationProperties
from propcalc.init.gains import Gains
from propcalc.init.layers import LayerInit
from propcalc.init.plan import InitPlan
from propcalc.meanfield.edge import CriticalPoint
from propcalc.meanfield.report import FixedPoint, Propagation, VarianceFixedPoints
from propcalc.meanfield.simulate import LayerMeasurement, Simulation
from propcalc.results import Result
from propcalc.training.verdict import Reason, Verdict
from propcalc.variants.dropout import DropoutPropagation, DropoutSweep
from propcalc.variants.maxout import MaxMoments, MaxoutLayer, MaxoutPropagation
from propcalc.training.learning_rate import LearningRateCeiling
from propcalc.variants.output_layer import InitialLoss, MaxProbability, OutputLayerScale
from propcalc.variants.selfnorm import AlphaDropout, MeanVarianceFixedPoint, SelfNormalization
from propcalc.variants.spectrum import IsometryAdvice, JacobianSpectrum
from propcalc_api._responses import RESPONSE_SCHEMAS

#: response schema name -> the result whose to_dict() is the body (or a nested part of it)
BACKED: dict[str, type[Result]] = {
    "ActivationProperties": ActivationProperties,
    "Gains": Gains,
    "Activation": Activation,
    "FixedPoint": FixedPoint,
    "VarianceFixedPoints": VarianceFixedPoints,
    "Propagation": Propagation,
    "CriticalPoint": CriticalPoint,
    "LayerInit": LayerInit,
    "InitPlan": InitPlan,
    "DropoutPropagation": DropoutPropagation,
    "DropoutSweep": DropoutSweep,
    "MaxMoments": MaxMoments,
    "MaxoutLayer": MaxoutLayer,
    "Maxout": MaxoutPropagation,
    "MeanVarianceFixedPoint": MeanVarianceFixedPoint,
    "SelfNormalization": SelfNormalization,
    "AlphaDropout": AlphaDropout,
    "JacobianSpectrum": JacobianSpectrum,
    "IsometryAdvice": IsometryAdvice,
    "InitialLoss": InitialLoss,
    "MaxProbability": MaxProbability,
    "OutputLayerScale": OutputLayerScale,
    "LearningRateCeiling": LearningRateCeiling,
    "LayerMeasurement": LayerMeasurement,
    "Simulation": Simulation,
    "Reason": Reason,
    "Verdict": Verdict,
}

#: members the service adds to a result's body, with the reason (checked: nothing else may differ)
ADDED: dict[str, dict[str, str]] = {
    "Activation": {"gains": "the service answers an activation with its gains (propcalc.gains)"},
    "Maxout": {"layer": "one layer's size when the request gives fan_in and fan_out"},
}

#: schemas of bodies the service assembles (no single result behind them), with the reason
ASSEMBLED: dict[str, str] = {
    "ActivationList": "a list of Activation bodies",
    "EdgeOfChaos": "the points of edge_of_chaos with the request's mode",
    "VarianceMap": "arrays of variance_map, variance_map_slope and chi_1 at the request's q",
    "CorrelationMap": "arrays of correlation_map (and its slope) at the request's c",
    "Softmax": "initial_loss and max_probability side by side",
    "ProblemEntry": "RFC 9457 problem details (the service's errors)",
    "LimitRef": "RFC 9457 problem details (the service's errors)",
    "Problem": "RFC 9457 problem details (the service's errors)",
    "Health": "the service's liveness",
    "Ranges": "the service's limits",
    "LimitsInfo": "the service's limits",
}


def test_every_response_schema_is_accounted_for():
    """A new response schema must say which result it documents (or why none)."""
    names = set(RESPONSE_SCHEMAS)
    assert not set(BACKED) & set(ASSEMBLED)
    assert names == set(BACKED) | set(ASSEMBLED), (
        f"unlisted: {sorted(names - set(BACKED) - set(ASSEMBLED))}; "
        f"gone: {sorted(set(BACKED) | set(ASSEMBLED) - names)}")


@pytest.mark.parametrize("name", sorted(BACKED))
def test_schema_fields_equal_the_result_fields(name):
    """Field for field: the schema's members are the result's dict keys."""
    schema_fields = set(RESPONSE_SCHEMAS[name]._declared_fields)
    result_keys = BACKED[name].dict_keys() + tuple(ADDED.get(name, ()))
    assert len(set(result_keys)) == len(result_keys), f"{name}: repeated dict keys"
    missing = set(result_keys) - schema_fields
    extra = schema_fields - set(result_keys)
    assert not missing and not extra, (
        f"{name}: schema lacks {sorted(missing)}, schema has extra {sorted(extra)}")


def test_dict_keys_are_the_keys_of_a_real_body():
    """dict_keys() read from the class equals to_dict() of an instance (tanh, a small plan)."""
    import propcalc

    plan = propcalc.recommend("tanh", widths=[8, 8, 4])
    assert tuple(plan.to_dict()) == InitPlan.dict_keys()
    assert tuple(plan.layers[0].to_dict()) == LayerInit.dict_keys()
    report = propcalc.propagation("tanh", 1.5, 0.05)
    assert tuple(report.to_dict()) == Propagation.dict_keys()
