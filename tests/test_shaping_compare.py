"""What a shaped activation is compared with: the edge of chaos of its base, the residual
ReLU network with the same map.

References: the arc-cosine kernel (Cho & Saul 2009, eq. 6, n = 1) for ReLU; the residual
recursion with vanishing cross terms for a fresh zero-mean branch weight (Yang & Schoenholz
2017); seeded numpy sampling of residual networks.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc.shaping.leaky import K_RELU, leaky_coefficient, leaky_map, network_value


def _arccos_relu(c):
    # normalised arc-cosine kernel of order 1 (Cho & Saul 2009)
    return (math.sqrt(1 - c * c) + (math.pi - math.acos(c)) * c) / math.pi


def test_reference_is_relu_at_its_edge_of_chaos():
    shaped = propcalc.shape_activation("relu", 100, target=0.9)
    ref = shaped.reference
    assert ref.sigma_w2 == pytest.approx(2.0, rel=1e-14) and ref.sigma_b2 == 0.0  # He et al. 2015
    c = 0.0
    for _ in range(100):
        c = _arccos_relu(c)
    assert ref.network_map_at_0 == pytest.approx(c, abs=1e-12)
    assert ref.network_slope_at_1 == pytest.approx(1.0, abs=1e-12)
    assert len(ref.correlations) == 101
    # the point of shaping: far from 1 after shaping, close to 1 before
    assert ref.network_map_at_0 > 0.99 > 0.9 == pytest.approx(shaped.network_map_at_0)


def test_reference_for_a_smooth_activation():
    shaped = propcalc.shape_activation("tanh", 50, method="dks")
    ref = shaped.reference
    point = propcalc.edge_of_chaos(propcalc.activation("tanh"), 1.0)
    assert ref.sigma_w2 == pytest.approx(point.sigma_w2, rel=1e-14)
    assert ref.sigma_b2 == pytest.approx(point.sigma_b2, rel=1e-12)
    c = 0.0
    for _ in range(50):
        c = float(propcalc.correlation_map(propcalc.activation("tanh"), c, ref.sigma_w2,
                                           ref.sigma_b2, 1.0))
    assert ref.network_map_at_0 == pytest.approx(c, abs=1e-12)


@pytest.mark.parametrize("slope", [0.1, 0.5, 0.9])
def test_residual_block_map_equals_the_leaky_map(slope):
    # x <- x + w W relu(x), W of variance 2 / fan_in: c' = (c + w^2 C_relu(c)) / (1 + w^2)
    # (cross terms vanish for a fresh zero-mean W: Yang & Schoenholz 2017)
    k = leaky_coefficient(slope)
    w2 = math.pi * k / (1 - math.pi * k)
    for c in np.linspace(-1, 1, 21):
        block = (c + w2 * _arccos_relu(float(c))) / (1 + w2)
        assert block == pytest.approx(float(leaky_map(c, k)), abs=1e-15)


def test_residual_equivalent_of_the_leaky_form():
    depth, eta = 60, 0.85
    shaped = propcalc.shape_activation("relu", depth, target=eta)
    res = shaped.residual_equivalent
    assert res.per_block == "identical"
    assert res.shortcut_weight ** 2 + res.branch_weight ** 2 == pytest.approx(1.0, rel=1e-14)
    assert res.weight == pytest.approx(res.branch_weight / res.shortcut_weight, rel=1e-14)
    # the same per-layer coefficient as the slope: b^2 = pi k
    assert res.branch_weight ** 2 == pytest.approx(
        math.pi * leaky_coefficient(shaped.params["slope"]), rel=1e-10)
    # composed with the closed-form block map
    c = 0.0
    for _ in range(depth):
        c = (c + res.weight ** 2 * _arccos_relu(c)) / (1 + res.weight ** 2)
    assert c == pytest.approx(eta, abs=1e-12)
    assert res.network_map_at_0 == pytest.approx(eta, abs=1e-12)
    block = res.description["blocks"][0]["repeat"]
    assert block["times"] == depth
    assert block["blocks"][0]["residual"]["weight"] == res.weight


def test_residual_equivalent_of_a_smooth_activation_matches_the_network_only():
    shaped = propcalc.shape_activation("gelu", 80, target=0.9)
    res = shaped.residual_equivalent
    assert res.per_block == "network only"
    assert res.network_map_at_0 == pytest.approx(0.9, abs=1e-12)
    assert network_value(res.branch_weight ** 2 / math.pi, 80) == pytest.approx(0.9, abs=1e-12)
    assert propcalc.shape_activation("gelu", 80, method="dks").residual_equivalent is None


def test_residual_equivalent_against_seeded_residual_networks():
    # seeded numpy residual networks of width 512, x <- x + w W relu(x): the measured
    # correlation of orthogonal input pairs against the prediction
    depth, eta, width = 20, 0.8, 512
    res = propcalc.shape_activation("relu", depth, target=eta).residual_equivalent
    rng = np.random.default_rng(16)
    vals = []
    for _ in range(6):
        x = rng.standard_normal((width, 16))
        a, b = x[:, 0::2], x[:, 1::2]
        b -= a * np.sum(a * b, axis=0) / np.sum(a * a, axis=0)
        h = np.empty_like(x)
        h[:, 0::2], h[:, 1::2] = a, b
        for _ in range(depth):
            w = rng.standard_normal((width, width)) * math.sqrt(2.0 / width)
            h = h + res.weight * (w @ np.maximum(h, 0.0))
        a, b = h[:, 0::2], h[:, 1::2]
        vals.append(np.mean(np.sum(a * b, axis=0) / np.linalg.norm(a, axis=0)
                            / np.linalg.norm(b, axis=0)))
    vals = np.array(vals)
    se = vals.std(ddof=1) / math.sqrt(vals.size)
    # sampling band plus 0.02 for finite width (common practice, no source)
    assert abs(vals.mean() - eta) <= 3 * se + 0.02, (vals.mean(), se)


def test_no_residual_equivalent_beyond_relu():
    shaped = propcalc.shape_activation("relu", 5, target=0.9, allow_negative_slope=True)
    assert shaped.residual_equivalent is None
    assert network_value(K_RELU, 5) < 0.9


@pytest.mark.parametrize("spec,method", [("relu", "tat"), ("tanh", "dks"), ("gelu", "tat")])
def test_network_description_through_the_network_analysis(spec, method):
    # the shaped plain network, described block by block, through propcalc.network_propagation
    # (the network analysis of issue 14): the same C_L(0) and, for dks, gradient growth zeta
    shaped = propcalc.shape_activation(spec, 40, method=method)
    result = propcalc.network_propagation(shaped.network_description, q0=1.0, c0=0.0)
    assert len(result.c) == 2 + 2 * 40  # the input, the first dense layer, 40 x (act, dense)
    assert result.c[-1] == pytest.approx(shaped.network_map_at_0, abs=1e-10)
    assert result.q[-1] == pytest.approx(1.0, rel=1e-10)  # Q(1) = 1 every layer
    assert result.gradient[0] == pytest.approx(shaped.network_slope_at_1, rel=1e-10)


def test_residual_equivalent_through_the_network_analysis():
    for spec in ("relu", "gelu"):
        shaped = propcalc.shape_activation(spec, 60, target=0.85)
        result = propcalc.network_propagation(shaped.residual_equivalent.description,
                                              q0=1.0, c0=0.0)
        assert result.c[-1] == pytest.approx(0.85, abs=1e-10)
