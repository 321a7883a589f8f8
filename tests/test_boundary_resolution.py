"""Every public function that analyses an activation takes a name, a formula or an Activation.

Sources: issue 13 ("Every public function that analyses an activation accepts a name, a formula
text or an Activation, resolved once at the boundary; a wrong type gets a PropcalcError naming
the parameter") and issue 12 section 2 (names in any case, with ``-`` or ``_``). On main before
this test, ``variance_map("sin", ...)``, ``correlation_map("elu", ...)`` and
``variance_map_slope("sigmoid", ...)`` (and the maps, dropout's neighbours, the spectrum, the
simulations, the output layer and self-normalisation) raised AttributeError on a name.

The checks are properties (a name, a spelling variant and the Activation object give identical
results) and closed forms named beside them.
"""

from __future__ import annotations

import inspect
import math
from collections.abc import Callable
from typing import Any

import numpy as np
import pytest

import propcalc
from propcalc.errors import ActivationTypeError, PropcalcError

_PLAN = propcalc.recommend("tanh", 5)
_REPORT = propcalc.propagation("tanh", 1.5, 0.1)

#: every public function of ``propcalc`` with an activation argument, called cheaply;
#: the argument's name as the error must spell it
CALLS: dict[str, tuple[str, Callable[[Any], Any]]] = {
    "variance_map": ("act", lambda a: propcalc.variance_map(a, [0.5, 2.0], 1.5, 0.1)),
    "variance_map_slope": ("act", lambda a: propcalc.variance_map_slope(a, [0.5, 2.0], 1.5)),
    "correlation_map": ("act", lambda a: propcalc.correlation_map(a, [0.2, 0.9], 1.5, 0.1, 1.0)),
    "correlation_map_slope": ("act", lambda a: propcalc.correlation_map_slope(a, [0.2, 0.9], 1.5,
                                                                              0.1, 1.0)),
    "chi_1": ("act", lambda a: propcalc.chi_1(a, 1.0, 1.5)),
    "propagation": ("act", lambda a: propcalc.propagation(a, 1.5, 0.1)),
    "propagation_arrays": ("act", lambda a: propcalc.propagation_arrays(a, [1.5], [0.1])),
    "variance_fixed_points": ("act", lambda a: propcalc.variance_fixed_points(a, 1.5, 0.1)),
    "edge_of_chaos": ("act", lambda a: propcalc.edge_of_chaos(a)),
    "edge_of_chaos_at_bias": ("act", lambda a: propcalc.edge_of_chaos_at_bias(a, 0.05)),
    "edge_of_chaos_line": ("act", lambda a: propcalc.edge_of_chaos_line(a, [0.5, 1.0])),
    "edge_of_chaos_points": ("act", lambda a: propcalc.edge_of_chaos_points(a, q_star=[1.0])),
    "gains": ("act", lambda a: propcalc.gains(a)),
    "recommend": ("act", lambda a: propcalc.recommend(a, 5)),
    "sweep": ("activations", lambda a: propcalc.sweep(a, [1.5], [0.1]).to_dict()),
    "sweep_edge": ("activations", lambda a: propcalc.sweep_edge(a, [1.0]).to_dict()),
    "dropout_propagation": ("act", lambda a: propcalc.dropout_propagation(a, 1.5, 0.1, 0.9)),
    "dropout_sweep": ("act", lambda a: propcalc.dropout_sweep(a, 1.5, 0.1, [0.9])),
    "mean_variance_map": ("act", lambda a: propcalc.mean_variance_map(a, 0.0, 1.0)),
    "mean_variance_jacobian": ("act", lambda a: propcalc.mean_variance_jacobian(a, 0.0, 1.0)),
    "self_normalization": ("act", lambda a: propcalc.self_normalization(a)),
    "mean_field_trajectory": ("act", lambda a: propcalc.mean_field_trajectory(a, 1.5, 0.1, 5, 1.0,
                                                                              0.5)),
    "simulate": ("act", lambda a: propcalc.simulate(a, 1.5, 0.1, depth=3, width=16,
                                                    repetitions=2)),
    "simulate_plan": ("act", lambda a: propcalc.simulate_plan(_PLAN, a, width=16, repetitions=2)),
    "output_layer_for_plan": ("act", lambda a: propcalc.output_layer_for_plan(_PLAN, a, 10,
                                                                              n_samples=1000)),
    "jacobian_spectrum": ("act", lambda a: propcalc.jacobian_spectrum(a, 5)),
    "dynamical_isometry": ("act", lambda a: propcalc.dynamical_isometry(a, 5)),
    "sample_jacobian_spectrum": ("act", lambda a: propcalc.sample_jacobian_spectrum(
        a, 3, width=20, repetitions=2)),
    "shape_activation": ("act", lambda a: propcalc.shape_activation(a, 10)),
    "finite_width": ("act", lambda a: propcalc.finite_width(a, 1.5, 0.1, [64] * 5)),
    "trainability": ("act", lambda a: propcalc.trainability(a, _REPORT, 5)),
    "layer_fluctuations": ("act", lambda a: propcalc.layer_fluctuations(a, [0.5, 1.0], 1.5)),
    "tangent_kernel": ("act", lambda a: propcalc.tangent_kernel(a, [8, 16, 4], 1.5, 0.1)),
    "learning_rate_ceiling": ("act", lambda a: propcalc.learning_rate_ceiling(
        a, [8, 16, 4], 1.5, 0.1, loss="mse", batch_size=4)),
}

#: public functions whose activation argument is named otherwise, or that take none
_NOT_AN_ACTIVATION_ARGUMENT = {"activation", "resolve", "formula_activation",
                               "formula_activation_within"}


def _plain(value: Any) -> Any:
    """A comparable form of a result: dicts of Results, lists of arrays, tuples..."""
    if hasattr(value, "to_dict"):
        return _plain(value.to_dict())
    if isinstance(value, dict):
        return {k: _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_plain(v) for v in value.tolist()] if value.dtype == object else (
            np.where(np.isnan(value), -12345.0, value).tolist() if value.dtype.kind == "f"
            else value.tolist())
    if isinstance(value, float) and math.isnan(value):
        return "nan"
    return value


def test_the_table_covers_every_public_function_with_an_activation_argument() -> None:
    # a new public analysis must join CALLS (and so accept names) -- common practice, no source
    found = set()
    for name in propcalc.__all__:
        obj = getattr(propcalc, name)
        if not inspect.isfunction(obj) or name in _NOT_AN_ACTIVATION_ARGUMENT:
            continue
        params = set(inspect.signature(obj).parameters)
        if name == "simulate":  # the dispatcher: a network description or an activation
            params = {"act"}
        if params & {"act", "activations"}:
            found.add(name)
    assert found - set(CALLS) == set()


@pytest.mark.parametrize("name", sorted(CALLS))
def test_a_name_in_any_spelling_gives_what_the_activation_gives(name: str) -> None:
    _, call = CALLS[name]
    by_object = _plain(call(propcalc.activation("tanh")))
    assert _plain(call("tanh")) == by_object
    assert _plain(call("TanH")) == by_object  # issue 12 section 2: case does not matter


@pytest.mark.parametrize("name", sorted(CALLS))
@pytest.mark.parametrize("wrong", [3.0, None, b"tanh"])
def test_a_wrong_type_names_the_parameter(name: str, wrong: object) -> None:
    field, call = CALLS[name]
    with pytest.raises(ActivationTypeError) as info:
        call(wrong)
    assert isinstance(info.value, PropcalcError) and not isinstance(info.value, AttributeError)
    assert info.value.field == field
    assert str(info.value).startswith(f"{field} must be a name or formula string")


def test_an_unknown_name_suggests_the_nearest_at_every_boundary() -> None:
    for name in ("variance_map", "jacobian_spectrum", "simulate", "sweep"):
        with pytest.raises(PropcalcError, match=r"unknown activation 'gleu' \(did you mean gelu\?\)"):
            CALLS[name][1]("gleu")


def test_the_maps_of_the_issue_take_names() -> None:
    # issue 13's three failing inputs, each against a closed form or the Activation object
    q = np.array([0.5, 1.0, 3.0])
    # E[sin(sqrt(q) z)^2] = (1 - exp(-2 q)) / 2 (closed form: E[cos(2 sqrt(q) z)] = exp(-2 q))
    np.testing.assert_allclose(propcalc.variance_map("sin(x)", q, 1.0, 0.0),
                               (1.0 - np.exp(-2.0 * q)) / 2.0, rtol=1e-12)
    # E[relu(sqrt(q) z)^2] = q / 2 (Cho & Saul 2009, arc-cosine kernel of degree 1 at c = 1)
    np.testing.assert_allclose(propcalc.variance_map("ReLU", q, 2.0, 0.0), q, rtol=1e-12)
    elu = propcalc.activation("elu")
    np.testing.assert_array_equal(propcalc.correlation_map("elu", [0.1, 0.5], 1.5, 0.1, 1.0),
                                  propcalc.correlation_map(elu, [0.1, 0.5], 1.5, 0.1, 1.0))
    sigmoid = propcalc.activation("sigmoid")
    np.testing.assert_array_equal(propcalc.variance_map_slope("sigmoid", q, 1.5),
                                  propcalc.variance_map_slope(sigmoid, q, 1.5))


def test_a_sweep_list_names_the_bad_item() -> None:
    with pytest.raises(ActivationTypeError, match=r"^activations\[1\] must be a name"):
        propcalc.sweep(["tanh", 2], [1.5], [0.1])
