"""The moments behind the network rules, against the engine and scipy quadrature.

References: the engine's maps (propcalc.meanfield.maps, themselves checked against mpmath) for
the closed forms of piecewise-linear activations (Cho & Saul 2009); scipy.integrate.quad and
dblquad for compositions of two activations.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate

import propcalc
from propcalc.meanfield import maps
from propcalc.networks.kernels import (
    Elementwise,
    composed,
    derivative_cross,
    moments,
    outer_derivative_moments,
    piecewise_linear_slopes,
)


@pytest.mark.parametrize(("spec", "params", "slopes"), [
    ("relu", {}, (1.0, 0.0)), ("leaky_relu", {"slope": 0.1}, (1.0, 0.1)), ("linear", {}, (1.0, 1.0)),
    ("max(x, 0.2 * x)", {}, (1.0, 0.2)), ("tanh", {}, None), ("elu", {}, None),
    ("relu(x) + 0.1", {}, None),
])
def test_piecewise_linear_detection(spec, params, slopes):
    assert piecewise_linear_slopes(propcalc.activation(spec, **params)) == slopes


@pytest.mark.parametrize(("spec", "params"), [("relu", {}), ("leaky_relu", {"slope": -0.3}),
                                              ("max(x, 0.2 * x)", {})])
@pytest.mark.parametrize("q", [1e-6, 0.7, 40.0])
def test_arc_cosine_closed_forms_match_the_engine(spec, params, q):
    # Cho & Saul 2009 closed forms (kernels.py) against the engine's quadrature
    act = propcalc.activation(spec, **params)
    cs = np.array([-1.0, -0.999, -0.5, 0.0, 0.3, 0.9, 0.999999, 1.0])
    mom, d2 = moments(Elementwise(act), q, cs)
    scale = float(maps.second_moment(act, q))
    assert mom.mean == pytest.approx(float(maps.first_moment(act, q)), rel=1e-12, abs=1e-14)
    assert mom.second == pytest.approx(scale, rel=1e-12)
    np.testing.assert_allclose(mom.cross, maps.pair_expectation(act, cs, q), rtol=0,
                               atol=1e-12 * scale)
    assert d2 == pytest.approx(float(maps.derivative_second_moment(act, q)), rel=1e-12)
    inner = cs[1:-1]
    np.testing.assert_allclose(derivative_cross(act, q, inner),
                               maps.derivative_pair_expectation(act, inner, q), rtol=0, atol=1e-11)


def test_affine_wrapper_moments():
    # s = a phi(u) + b: E[s] = a E[phi] + b, E[s s'] = a^2 E[phi phi'] + 2 a b E[phi] + b^2
    act = propcalc.activation("tanh")
    q, c, a, b = 1.3, 0.4, -2.0, 0.5
    base, _ = moments(Elementwise(act), q, [c])
    mom, _ = moments(Elementwise(act, a, b), q, [c])
    assert mom.mean == pytest.approx(a * base.mean + b, abs=1e-15)
    assert mom.second == pytest.approx(a * a * base.second + 2 * a * b * base.mean + b * b)
    assert mom.cross[0] == pytest.approx(a * a * base.cross[0] + 2 * a * b * base.mean + b * b)


def _gauss(f, q, points=()):
    s = math.sqrt(q)
    return integrate.quad(lambda z: f(s * z) * math.exp(-z * z / 2) / math.sqrt(2 * math.pi),
                          -12, 12, points=[p / s for p in points] or None, epsabs=1e-13,
                          epsrel=1e-12, limit=400)[0]


def test_composition_of_two_activations():
    # relu(2 tanh(x) - 0.6) has a kink where tanh(x) = 0.3: the breakpoint is found
    outer, inner = propcalc.activation("relu"), Elementwise(propcalc.activation("tanh"), 2.0, -0.6)
    comp = composed(outer, inner)
    assert comp.breakpoints == pytest.approx((math.atanh(0.3),), abs=1e-14)
    x = np.linspace(-3, 3, 13)
    np.testing.assert_allclose(comp.value(x), np.maximum(2 * np.tanh(x) - 0.6, 0.0), rtol=1e-15)
    q, c = 1.7, 0.35
    mom, _ = moments(Elementwise(comp), q, [c])

    def f(x):
        return max(2 * math.tanh(x) - 0.6, 0.0)

    bp = comp.breakpoints
    assert mom.mean == pytest.approx(_gauss(f, q, bp), rel=1e-10)
    assert mom.second == pytest.approx(_gauss(lambda x: f(x) ** 2, q, bp), rel=1e-10)
    s, r = math.sqrt(q), math.sqrt(q * (1 - c * c))

    def given(z1):  # E[f(u2) | u1 = s z1], split where u2 crosses the kink
        m = c * s * z1
        return _gauss(lambda x: f(m + x), r * r, [bp[0] - m])

    cross = integrate.quad(lambda z1: f(s * z1) * given(z1) * math.exp(-z1 * z1 / 2)
                           / math.sqrt(2 * math.pi), -12, 12, points=[bp[0] / s],
                           epsabs=1e-12, epsrel=1e-11, limit=200)[0]
    assert mom.cross[0] == pytest.approx(cross, rel=1e-9)
    # the derivative of the outer activation at the stream: E[relu'(2 tanh(u) - 0.6)^2] is the
    # probability that tanh(u) > 0.3
    d2, _ = outer_derivative_moments(outer, inner, q)
    assert d2 == pytest.approx(0.5 * math.erfc(math.atanh(0.3) / math.sqrt(2 * q)), rel=1e-12)


def test_two_activations_in_a_network():
    # the network composes them: dense -> tanh -> relu equals dense -> composed activation
    net = {"blocks": [{"dense": {"sigma_w2": 1.7, "sigma_b2": 0.0}}, {"activation": "tanh"},
                      {"activation": "relu"}, {"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0}}]}
    r = propcalc.network_propagation(net, 1.0, 0.35)
    comp = composed(propcalc.activation("relu"), Elementwise(propcalc.activation("tanh")))
    mom, _ = moments(Elementwise(comp), 1.7, [0.35])
    assert r.q[3] == pytest.approx(mom.second, rel=1e-14)
    assert r.c[3] == pytest.approx(mom.cross[0] / mom.second, rel=1e-14)
    assert r.blocks[2].law == "elementwise"
