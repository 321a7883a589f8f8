"""The leaky-ReLU form of the tailored activation transformation.

References: the closed-form map C(c) = c + k (sqrt(1 - c^2) - c arccos c),
k = (1 - a)^2 / (pi (1 + a^2)) (Zhang et al. 2022, section 4.2, from the arc-cosine
kernel of Cho & Saul 2009, eq. 6 with n = 1), checked against propcalc's own maps of
the shaped activation; the composed map against seeded finite-width numpy networks.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import propcalc
from propcalc.meanfield.maps import (chi_1, correlation_map, correlation_map_slope, variance_map,
                                     variance_map_slope)
from propcalc.shaping.leaky import (K_ABS, K_RELU, leaky_coefficient, leaky_map, leaky_map_slope,
                                    leaky_trajectory, network_value, slope_from_coefficient)
from propcalc.shaping.transform import leaky_form_activation

SLOPES = [0.0, 0.2, 0.57, 0.9, -0.5, -1.0]
C_GRID = np.concatenate([np.linspace(-1.0, 1.0, 41), [0.999, 0.99999, -0.999]])


def _arccos_relu(c):
    """Normalised arc-cosine kernel of order 1 (Cho & Saul 2009, eq. 6): E[relu relu] / E[relu^2]."""
    c = np.asarray(c, dtype=float)
    return (np.sqrt(1 - c * c) + (math.pi - np.arccos(c)) * c) / math.pi


@pytest.mark.parametrize("slope", SLOPES)
def test_closed_form_map_equals_propcalc_maps(slope):
    # closed form (Zhang et al. 2022 / Cho & Saul 2009) against propcalc's quadrature maps
    act = leaky_form_activation(slope)
    k = leaky_coefficient(slope)
    got = correlation_map(act, C_GRID, 1.0, 0.0, 1.0)
    np.testing.assert_allclose(got, leaky_map(C_GRID, k), rtol=0, atol=2e-14)
    inner = C_GRID[np.abs(C_GRID) < 1]
    np.testing.assert_allclose(correlation_map_slope(act, inner, 1.0, 0.0, 1.0),
                               leaky_map_slope(inner, k), rtol=0, atol=1e-12)


@pytest.mark.parametrize("slope", SLOPES)
def test_variance_map_is_the_identity(slope):
    # positive homogeneity: E[phi_hat(sqrt(q) z)^2] = q (2 / (1 + a^2)) (1 + a^2) / 2 (closed form)
    act = leaky_form_activation(slope)
    qs = np.geomspace(1e-3, 1e3, 13)
    np.testing.assert_allclose(variance_map(act, qs, 1.0, 0.0), qs, rtol=1e-14)
    np.testing.assert_allclose(variance_map_slope(act, qs, 1.0), 1.0, rtol=1e-13)
    assert float(chi_1(act, 1.0, 1.0)) == pytest.approx(1.0, abs=1e-15)


def test_relu_coefficient_is_the_arccos_kernel():
    # a = 0: sqrt(2) relu, whose normalised map is the arc-cosine kernel (Cho & Saul 2009)
    assert leaky_coefficient(0.0) == pytest.approx(K_RELU, rel=1e-15)
    np.testing.assert_allclose(leaky_map(C_GRID, K_RELU), _arccos_relu(C_GRID), atol=1e-15)
    # a = -1: |x|, k = 2 / pi
    assert leaky_coefficient(-1.0) == pytest.approx(K_ABS, rel=1e-15)


@pytest.mark.parametrize("slope", np.linspace(-1.0, 1.0, 21))
def test_slope_from_coefficient_inverts(slope):
    # the quadratic (1 - a)^2 = pi k (1 + a^2), root of modulus <= 1 (closed form)
    assert slope_from_coefficient(leaky_coefficient(slope)) == pytest.approx(slope, abs=1e-12)


@pytest.mark.parametrize("depth,target", [(100, 0.9), (30, 0.5), (400, 0.95), (13, 0.9)])
def test_shaped_relu_reaches_the_target_with_propcalc_maps(depth, target):
    shaped = propcalc.shape_activation("relu", depth, target=target)
    assert shaped.form == "slope" and set(shaped.params) == {"slope"}
    act = shaped.activation
    # propcalc's own map, point by point over the depth (not the closed form)
    c = 0.0
    for _ in range(depth):
        c = float(correlation_map(act, c, 1.0, 0.0, 1.0))
    assert c == pytest.approx(target, abs=1e-12)
    assert shaped.network_map_at_0 == pytest.approx(target, abs=1e-13)
    assert shaped.network_slope_at_1 == pytest.approx(1.0, abs=1e-15 * depth + 1e-14)  # chi_1^L
    np.testing.assert_allclose(shaped.correlations,
                               leaky_trajectory(leaky_coefficient(shaped.params["slope"]), depth),
                               atol=1e-15)
    for cond in shaped.conditions:
        assert cond.deviation <= 1e-12, cond
    # the verdict: exactly critical at q* = 1 (chi_1 = C'(1) = 1)
    assert shaped.depth_verdict.phase == "edge of chaos"
    assert shaped.depth_verdict.within


def test_composed_map_matches_propcalc_composition():
    # the closed-form trajectory against propcalc's composed maps, many starting points
    from propcalc.shaping.network_map import compose_correlation_map

    slope = 0.8
    act = leaky_form_activation(slope)
    k = leaky_coefficient(slope)
    c0 = np.linspace(-1.0, 1.0, 21)
    got = compose_correlation_map(act, c0, 40, 1.0, 0.0, 1.0)
    want = np.array([network_value(k, 40, float(c)) for c in c0])
    np.testing.assert_allclose(got, want, atol=1e-13)


def test_monotone_in_slope_and_depth():
    # C_L(0) decreases as the slope grows towards 1 and increases with depth (module doc)
    vals = [network_value(leaky_coefficient(a), 50) for a in np.linspace(0.0, 0.99, 12)]
    assert all(x > y for x, y in zip(vals, vals[1:]))
    k = leaky_coefficient(0.5)
    depths = [network_value(k, d) for d in (1, 5, 20, 80)]
    assert all(x < y for x, y in zip(depths, depths[1:]))


def test_unreachable_target_is_reported_with_the_bound():
    # at depth 3 the largest C_3(0) with a slope in [0, 1) is ReLU's (k = 1 / pi)
    top = 0.0
    for _ in range(3):
        top = float(_arccos_relu(top))
    with pytest.raises(propcalc.UnreachableTargetError) as info:
        propcalc.shape_activation("relu", 3, target=0.9)
    err = info.value
    assert isinstance(err, propcalc.InvalidParameterError)
    assert err.field == "target" and err.value == 0.9
    assert f"{top:.6g}" in str(err)
    assert "allow_negative_slope" in str(err) or "negative slope" in str(err)


def test_negative_slope_when_allowed():
    # depth 5, eta 0.9: beyond ReLU's reach, within |x|'s (k up to 2 / pi)
    relu_top = network_value(K_RELU, 5)
    assert relu_top < 0.9 < network_value(K_ABS, 5)
    with pytest.raises(propcalc.UnreachableTargetError):
        propcalc.shape_activation("relu", 5, target=0.9)
    shaped = propcalc.shape_activation("relu", 5, target=0.9, allow_negative_slope=True)
    assert -1.0 <= shaped.params["slope"] < 0.0
    c = 0.0
    for _ in range(5):
        c = float(correlation_map(shaped.activation, c, 1.0, 0.0, 1.0))
    assert c == pytest.approx(0.9, abs=1e-12)
    assert shaped.residual_equivalent is None  # no ReLU residual network goes beyond k = 1 / pi
    assert any("negative slope" in n for n in shaped.notes)


def test_leaky_base_uses_the_slope_form_whatever_its_slope():
    for spec in (propcalc.activation("leaky_relu"), propcalc.activation("leaky_relu", slope=0.3)):
        shaped = propcalc.shape_activation(spec, 60, target=0.8)
        assert shaped.form == "slope"
        assert shaped.network_map_at_0 == pytest.approx(0.8, abs=1e-13)


def test_formula_text_rebuilds_the_activation():
    shaped = propcalc.shape_activation("relu", 100)
    again = propcalc.activation(shaped.formula, **shaped.params)
    x = np.linspace(-20, 20, 2001)
    np.testing.assert_allclose(again.value(x), shaped.activation.value(x), rtol=1e-15, atol=0)
    np.testing.assert_allclose(again.derivative(x[x != 0]), shaped.activation.derivative(x[x != 0]),
                               rtol=1e-15)


def _network_correlation(act_fn, width, depth, seed, orthogonal=False, reps=6, pairs=8):
    """c_L of orthogonal input pairs (|x|^2 = width) through seeded plain networks (numpy).

    One value per network: the mean over ``pairs`` pairs pushed through it together.
    """
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(reps):
        x = rng.standard_normal((width, 2 * pairs))
        a, b = x[:, 0::2], x[:, 1::2]
        b -= a * np.sum(a * b, axis=0) / np.sum(a * a, axis=0)  # Gram-Schmidt: c_0 = 0
        x[:, 0::2], x[:, 1::2] = a, b
        x *= np.sqrt(width) / np.linalg.norm(x, axis=0)
        h = x
        for layer in range(depth):
            if orthogonal:
                q, r = np.linalg.qr(rng.standard_normal((width, width)))
                w = q * np.sign(np.diag(r))
            else:
                w = rng.standard_normal((width, width)) / np.sqrt(width)
            h = w @ (h if layer == 0 else act_fn(h))
        a, b = h[:, 0::2], h[:, 1::2]
        out.append(np.mean(np.sum(a * b, axis=0) / np.linalg.norm(a, axis=0)
                           / np.linalg.norm(b, axis=0)))
    return np.array(out)


@pytest.mark.parametrize("orthogonal", [False, True])
def test_composed_map_against_seeded_finite_width_networks(orthogonal):
    # seeded numpy sampling, width 512: the measured C_L(0) against the predicted one.
    # The first layer is linear in the inputs (h_1 = W x), then depth - 1 shaped layers.
    depth, width = (13, 512) if orthogonal else (25, 512)
    shaped = propcalc.shape_activation("relu", depth - 1, target=0.8)
    measured = _network_correlation(shaped.activation.value, width, depth, seed=20260,
                                     orthogonal=orthogonal, reps=4 if orthogonal else 6)
    se = measured.std(ddof=1) / math.sqrt(measured.size)
    # sampling band plus 0.02 for the O(depth / width) finite-width correction (common
    # practice, no source)
    assert abs(measured.mean() - 0.8) <= 3 * se + 0.02, (measured.mean(), se)


def test_builtin_recognised_after_the_activation_caches_are_emptied():
    # the registry's cache is bounded: an activation built earlier is still a built-in
    from propcalc.activations import clear_activation_caches

    act = propcalc.activation("leaky_relu", slope=0.2)
    clear_activation_caches()
    assert propcalc.shape_activation(act, 30).form == "slope"
