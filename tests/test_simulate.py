"""Tests of propcalc.meanfield.simulate: mean-field predictions against seeded finite-width networks."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc.meanfield.simulate import mean_field_trajectory, simulate, simulate_plan


@pytest.mark.parametrize("name", ["tanh", "relu", "gelu"])
def test_wide_networks_follow_the_plan(name):
    """Width 1000: at the planned point the prediction holds within its band.

    Sample size: 8 networks of 4 input pairs. Per network the relative sd of q is about
    sqrt(2/N) per layer (4.5% at N = 1000, growing with depth), so the +-2 SE bands are a
    few percent wide; finite-width corrections are O(1/N) = 0.1% per layer, far inside.
    Layers are strongly correlated (for ReLU q is a martingale with no restoring force, so
    one excursion of the 8-network mean persists), which is why the share of in-band
    layers is only required to be >= 60% while no visible deviation is allowed.
    """
    act = propcalc.activation(name)
    plan = propcalc.recommend(act, depth=6)
    sim = simulate_plan(plan, act, width=1000, repetitions=8, seed=2024)
    assert len(sim.layers) == 7
    assert not sim.deviation_visible, sim.message
    assert sim.fraction_in_band >= 0.6
    assert sim.max_deviation_q < 0.15 and sim.max_deviation_c < 0.03
    assert sim.max_deviation_gradient < 0.1
    assert "holds" in sim.message
    json.dumps(propcalc.jsonable(sim.to_dict()), allow_nan=False)


@pytest.mark.parametrize("name", ["tanh", "relu"])
def test_narrow_deep_networks_show_the_deviation(name):
    """Width 30, depth 100: the typical network leaves the mean-field prediction (the log of
    the squared gradient norm drifts by about -L var / 2 with var = O(1/N) per layer), and
    the report says so instead of hiding it."""
    act = propcalc.activation(name)
    plan = propcalc.recommend(act, depth=100)
    sim = simulate_plan(plan, act, width=30, repetitions=20, seed=7)
    assert sim.deviation_visible
    assert sim.first_visible_layer is not None
    assert sim.max_deviation_gradient > sim.tolerance
    assert sim.fraction_in_band < 0.75
    assert "deviation visible" in sim.message
    bottom = sim.layers[0]
    # the typical (geometric-mean) gradient is far outside its band around the prediction
    lo, hi = bottom.gradient_geometric_band
    assert not lo <= bottom.gradient_predicted <= hi


def test_layer_zero_is_exact():
    sim = simulate(propcalc.activation("tanh"), 1.3, 0.1, width=50, depth=2, q0=0.7, c0=-0.3,
                   repetitions=3, seed=1)
    first = sim.layers[0]
    assert_allclose([first.q_mean, first.c_mean], [0.7, -0.3], rtol=0, atol=1e-12)
    assert sim.layers[-1].gradient_mean == pytest.approx(1.0)  # g^L is a unit vector


def test_mean_field_trajectory_relu_closed_form():
    # ReLU at sigma_w2 = 2, sigma_b2 = 0: q stays put and c follows the arc-cosine map
    # c' = (sqrt(1 - c^2) + (pi - arccos c) c) / pi (Cho & Saul 2009, eq. 6)
    q, c, g = mean_field_trajectory(propcalc.activation("relu"), 2.0, 0.0, 5, 1.3, 0.2)
    assert_allclose(q, 1.3, rtol=1e-13)
    ref = [0.2]
    for _ in range(5):
        x = ref[-1]
        ref.append((math.sqrt(1 - x * x) + (math.pi - math.acos(x)) * x) / math.pi)
    assert_allclose(c, ref, atol=1e-10)
    assert_allclose(g, 1.0, rtol=1e-13)  # chi_1 = 2 * 1/2


def test_gradient_prediction_is_the_product_of_chi_1():
    tanh = propcalc.activation("tanh")
    q, _, g = mean_field_trajectory(tanh, 1.7, 0.05, 4, 1.0, 0.5)
    chis = [float(propcalc.chi_1(tanh, qq, 1.7)) for qq in q[:-1]]
    assert_allclose(g[0], np.prod(chis), rtol=1e-13)
    assert_allclose(q[1], float(propcalc.variance_map(tanh, 1.0, 1.7, 0.05)), rtol=1e-14)


def test_seeded_and_repeatable():
    tanh = propcalc.activation("tanh")
    kw = dict(width=40, depth=3, repetitions=3, seed=11)
    a = simulate(tanh, 1.5, 0.1, **kw).to_dict()
    b = simulate(tanh, 1.5, 0.1, **kw).to_dict()
    c = simulate(tanh, 1.5, 0.1, **{**kw, "seed": 12}).to_dict()
    assert a == b
    assert a != c


@pytest.mark.parametrize("kwargs, exc, match", [
    ({"width": 1}, propcalc.InvalidParameterError, r"width must be an integer >= 2, got 1"),
    ({"c0": 1.5}, propcalc.InvalidParameterError, r"c0 must be in \[-1, 1\], got 1.5"),
    ({"q0": 0.0}, propcalc.InvalidParameterError, r"q0 must be > 0, got 0.0"),
    ({"repetitions": 1}, propcalc.InvalidParameterError,
     r"repetitions must be an integer >= 2, got 1"),
    ({"width": 100_000}, propcalc.InvalidParameterError, r"width must be such that"),
    ({"sigma_w2": 50.0, "depth": 40}, propcalc.ComputationError, r"explodes"),
])
def test_bad_input(kwargs, exc, match):
    args = dict(act=propcalc.activation("relu"), sigma_w2=2.0, sigma_b2=0.0, width=20, depth=3,
                repetitions=2)
    args.update(kwargs)
    with pytest.raises(exc, match=match):
        simulate(**args)


def test_jumping_activation_is_refused():
    with pytest.raises(propcalc.ComputationError, match="jumps"):
        simulate(propcalc.activation("step"), 1.0, 0.1, width=10, depth=2, repetitions=2)


def test_regenerating_weights_gives_the_same_networks(monkeypatch):
    # large networks regenerate W_l in the backward pass from the same seed streams
    import sys

    sim_mod = sys.modules["propcalc.meanfield.simulate"]  # the package exports the function under this name
    tanh = propcalc.activation("tanh")
    kw = dict(width=30, depth=4, repetitions=2, seed=5)
    stored = simulate(tanh, 1.4, 0.1, **kw).to_dict()
    monkeypatch.setattr(sim_mod, "_STORE_BYTES", 0)
    assert simulate(tanh, 1.4, 0.1, **kw).to_dict() == stored


@pytest.mark.parametrize("q0,c0,needle", [
    (-1.0, 0.5, "q0 must be finite and >= 0, got -1"),
    (float("nan"), 0.5, "q0 must be finite and >= 0, got nan"),
    (1.0, 2.0, r"c0 must be in \[-1, 1\], got 2.0"),
    (1.0, float("nan"), r"c0 must be in \[-1, 1\], got nan"),
])
def test_trajectory_refuses_bad_inputs_naming_them(q0, c0, needle):
    # the project's error contract (PREAMBLE): the field as the caller spelled it, the
    # constraint and the value (these said 'q' and 'c', the maps' names, before)
    with pytest.raises(propcalc.PropcalcError, match=needle):
        mean_field_trajectory("tanh", 1.5, 0.05, 3, q0, c0)
