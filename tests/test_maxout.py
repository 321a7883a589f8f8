"""Tests of propcalc.variants.maxout against closed forms, published values and seeded sampling."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, special, stats

import propcalc
from propcalc.variants.maxout import (
    bivariate_normal_cdf,
    max_moments,
    maxout_correlation_map,
    maxout_correlation_map_slope,
    maxout_layer,
    maxout_pair_moments,
    maxout_propagation,
    maxout_variance_map,
)


def _k2_closed(c):
    # k = 2: max = (a1 + a2)/2 + |a1 - a2|/2 with independent sums and differences;
    # E|z1||z2| = (2/pi)(sqrt(1 - c^2) + c arcsin c) for a standard pair (closed form,
    # derived in the propcalc.variants.maxout docstring)
    c = np.asarray(c, dtype=float)
    return (c + (2.0 / math.pi) * (np.sqrt(1.0 - c * c) + c * np.arcsin(c))) / 2.0


# ------------------------------------------------------------------------------------------
# moments of the largest of k normals
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("k, c_k", [(2, 1.0), (3, 0.7839), (4, 0.6446), (5, 0.5555)])
def test_recommended_scale_matches_published_values(k, c_k):
    # Tseran & Montufar 2023: c = 1 / E[(largest of k standard normals)^2], quoted to 4 digits
    assert abs(max_moments(k).recommended_sigma_w2 - c_k) < 5e-5


@pytest.mark.parametrize("k, m1, m2", [
    (1, 0.0, 1.0),
    (2, 1.0 / math.sqrt(math.pi), 1.0),
    (3, 3.0 / (2.0 * math.sqrt(math.pi)), 1.0 + math.sqrt(3.0) / (2.0 * math.pi)),
    (4, None, 1.0 + math.sqrt(3.0) / math.pi),
])
def test_max_moments_closed_forms(k, m1, m2):
    # closed forms of the moments of normal order statistics (David & Nagaraja 2003,
    # "Order Statistics", section 3.2; from memory)
    mom = max_moments(k)
    if m1 is not None:
        assert_allclose(mom.mean, m1, rtol=0, atol=1e-14)
    assert_allclose(mom.second_moment, m2, rtol=1e-14)


@pytest.mark.parametrize("k", [2, 3, 6, 10, 50])
def test_max_second_moment_against_scipy_quad(k):
    # reference: scipy.integrate.quad of k z^2 phi(z) Phi(z)^(k-1)
    ref, _ = integrate.quad(lambda z: k * z * z * stats.norm.pdf(z) * special.ndtr(z) ** (k - 1),
                            -np.inf, np.inf, epsabs=1e-14, epsrel=1e-13)
    assert_allclose(max_moments(k).second_moment, ref, rtol=1e-11)


@pytest.mark.parametrize("k", [3, 5])
def test_max_second_moment_against_seeded_sampling(k):
    rng = np.random.default_rng(20240501 + k)
    n = 400_000
    m = rng.standard_normal((n, k)).max(axis=1) ** 2
    se = m.std(ddof=1) / math.sqrt(n)
    # 4 standard errors: a false alarm has probability 6e-5
    assert abs(m.mean() - max_moments(k).second_moment) < 4 * se


# ------------------------------------------------------------------------------------------
# bivariate normal CDF and the pair moments
# ------------------------------------------------------------------------------------------
def test_bivariate_normal_cdf_against_scipy():
    rng = np.random.default_rng(7)
    for _ in range(12):
        x, y = rng.uniform(-3, 3, 2)
        c = float(rng.uniform(-0.99, 0.99))
        ref = stats.multivariate_normal(mean=[0, 0], cov=[[1, c], [c, 1]]).cdf([x, y])
        assert_allclose(bivariate_normal_cdf(x, y, c), ref, rtol=0, atol=1e-7)


@pytest.mark.parametrize("x, y, c, expected", [
    # Sheppard 1899: P(Z1 <= 0, Z2 <= 0) = 1/4 + arcsin(c) / (2 pi)
    (0.0, 0.0, 0.3, 0.25 + math.asin(0.3) / (2 * math.pi)),
    # independent: the product of the marginals
    (0.7, -0.4, 0.0, special.ndtr(0.7) * special.ndtr(-0.4)),
    (0.0, 1.2, 0.0, 0.5 * special.ndtr(1.2)),
    (-1.1, 0.0, 0.0, 0.5 * special.ndtr(-1.1)),
    # degenerate limits
    (0.5, 1.0, 1.0, special.ndtr(0.5)),
    (0.5, 1.0, -1.0, special.ndtr(0.5) - special.ndtr(-1.0)),
])
def test_bivariate_normal_cdf_special_values(x, y, c, expected):
    assert_allclose(bivariate_normal_cdf(x, y, c), expected, rtol=0, atol=1e-15)


def test_rank_two_pair_moment_closed_form():
    c = np.array([-1.0, -1 + 1e-10, -0.999, -0.7, -0.2, 0.0, 0.3, 0.8, 0.99, 0.999999,
                  1 - 1e-11, 1.0])
    value, slope = maxout_pair_moments(2, c)
    assert_allclose(value, _k2_closed(c), rtol=0, atol=1e-13)
    # Sheppard 1899: P(the same of the two pieces wins) = 1/2 + arcsin(c) / pi
    assert_allclose(slope, 0.5 + np.arcsin(c) / math.pi, rtol=0, atol=1e-9)


def test_rank_one_is_linear():
    c = np.linspace(-1, 1, 9)
    value, slope = maxout_pair_moments(1, c)
    assert_allclose(value, c, atol=1e-14)
    assert_allclose(slope, 1.0, atol=1e-13)


@pytest.mark.parametrize("k, c", [(3, 0.5), (3, -0.6), (5, 0.9), (4, 0.0)])
def test_pair_moments_against_seeded_sampling(k, c):
    rng = np.random.default_rng(1000 * k + int(10 * (c + 1)))
    n = 300_000
    za = rng.standard_normal((n, k))
    zb = c * za + math.sqrt(1 - c * c) * rng.standard_normal((n, k))
    prod = za.max(axis=1) * zb.max(axis=1)
    same = (za.argmax(axis=1) == zb.argmax(axis=1)).astype(float)
    value, slope = maxout_pair_moments(k, c)
    # 4 standard errors of each sample mean
    assert abs(prod.mean() - value) < 4 * prod.std(ddof=1) / math.sqrt(n)
    assert abs(same.mean() - slope) < 4 * same.std(ddof=1) / math.sqrt(n)


@pytest.mark.parametrize("k", [3, 6])
def test_slope_is_the_derivative_of_the_value(k):
    # property: K'(c) from eq. (2) equals a central difference of K from eq. (1)
    h = 1e-4
    for c in (-0.5, 0.2, 0.7):
        (lo, hi), _ = maxout_pair_moments(k, [c - h, c + h])
        _, slope = maxout_pair_moments(k, c)
        assert_allclose((hi - lo) / (2 * h), slope, rtol=1e-7)


def test_pair_moment_limits():
    m2 = max_moments(4).second_moment
    value, slope = maxout_pair_moments(4, [1.0, 1 - 1e-12])
    assert_allclose(value, m2, rtol=1e-11)
    assert_allclose(slope, 1.0, atol=1e-5)


# ------------------------------------------------------------------------------------------
# maps and the report
# ------------------------------------------------------------------------------------------
def test_variance_map_is_linear():
    m2 = max_moments(3).second_moment
    q = np.array([0.0, 0.5, 2.0])
    assert_allclose(maxout_variance_map(3, q, 0.9, 0.1), 0.9 * m2 * q + 0.1, rtol=1e-15)


def test_correlation_map_at_one_and_without_bias():
    k = 3
    m2 = max_moments(k).second_moment
    assert_allclose(maxout_correlation_map(k, 1.0, 0.8, 0.2, 1.5), 1.0, rtol=1e-13)
    # sigma_b2 = 0: C(c) = K(c) / M2 whatever sigma_w2 and q
    value, _ = maxout_pair_moments(k, 0.3)
    assert_allclose(maxout_correlation_map(k, 0.3, 0.5, 0.0, 7.0), value / m2, rtol=1e-14)
    assert_allclose(maxout_correlation_map_slope(k, 1.0, 0.5, 0.0, 7.0), 1.0 / m2, rtol=1e-12)


def test_recommended_rank_three_is_ordered_with_finite_depth_scale():
    mom = max_moments(3)
    rep = maxout_propagation(3, depth=10)
    assert rep.sigma_w2 == mom.recommended_sigma_w2
    assert rep.status == "neutral"  # V(q) = c_3 M2 q = q
    assert rep.chi_1 == rep.sigma_w2  # chi_1 = sigma_w2 (gradient through the arg-max piece)
    assert rep.phase == "ordered" and rep.c_star == 1.0
    assert_allclose(rep.xi_c, -1.0 / math.log(mom.recommended_sigma_w2), rtol=1e-12)
    assert_allclose(rep.trainable_depth, 6 * rep.xi_c)
    assert rep.depth_ok is True  # 10 <= 6 xi_c = 24.6
    assert rep.parameter_factor == 3
    assert any("no edge of chaos" in n for n in rep.notes)
    json.dumps(propcalc.jsonable(rep.to_dict()), allow_nan=False)


def test_rank_two_at_unit_weights_is_the_edge_and_rank_three_explodes():
    assert maxout_propagation(2, 1.0).phase == "edge of chaos"
    boom = maxout_propagation(3, 1.0, depth=5)
    assert boom.phase == "unbounded variance" and boom.depth_ok is False
    assert_allclose(boom.growth_rate, max_moments(3).second_moment)


def test_bias_gives_finite_fixed_point():
    m2 = max_moments(4).second_moment
    rep = maxout_propagation(4, 0.5, 0.1)
    assert_allclose(rep.q_star, 0.1 / (1 - 0.5 * m2), rtol=1e-14)
    assert rep.phase == "ordered"
    # at a variance fixed point C'(1) = sigma_w2 = chi_1
    assert_allclose(rep.chi_c, 0.5, rtol=1e-12)


def test_parameter_count_is_k_times_plain():
    layer = maxout_layer(4, fan_in=300, fan_out=200)
    assert layer.plain_parameters == 300 * 200 + 200
    assert layer.n_parameters == 4 * layer.plain_parameters
    assert layer.weight_shape == (4, 200, 300)
    assert_allclose(layer.weight_std, math.sqrt(max_moments(4).recommended_sigma_w2 / 300))


def test_finite_width_network_keeps_variance_and_shrinks_gradients_by_sigma_w2():
    """Seeded maxout networks (width 500, rank 3, c_3): q is preserved and the squared
    norm of a back-propagated random unit vector shrinks by chi_1 = sigma_w2 per layer."""
    k, n, depth, reps = 3, 500, 4, 3
    sw = max_moments(k).recommended_sigma_w2
    rng = np.random.default_rng(99)
    q_ratio, g_ratio = [], []
    for _ in range(reps):
        h = rng.standard_normal(n)  # pieces' input: mean square 1
        ws = []
        x = h
        q_prev = float(np.mean(x * x))
        for _layer in range(depth):
            w = rng.standard_normal((k, n, n)) * math.sqrt(sw / n)
            u = np.einsum("kij,j->ki", w, x)
            x = u.max(axis=0)
            ws.append((w, u.argmax(axis=0)))
            q_ratio.append(float(np.mean(x * x)) / q_prev)
            q_prev = float(np.mean(x * x))
        g = rng.standard_normal(n)
        g /= np.linalg.norm(g)
        for w, arg in reversed(ws):
            g_new = np.einsum("ij,i->j", w[arg, np.arange(n), :], g)
            g_ratio.append(float(g_new @ g_new) / float(g @ g))
            g = g_new
    # each ratio has relative sd about sqrt(2 / n) = 6%: 12 ratios, mean within 5%
    assert abs(np.mean(q_ratio) - 1.0) < 0.05
    assert abs(np.mean(g_ratio) / sw - 1.0) < 0.05


@pytest.mark.parametrize("call, match", [
    (lambda: max_moments(0), r"k must be an integer >= 1, got 0"),
    (lambda: max_moments(2.5), r"k must be an integer >= 1"),
    (lambda: maxout_pair_moments(3, 1.5), r"c must be in \[-1, 1\], got 1.5"),
    (lambda: maxout_propagation(3, -1.0), r"sigma_w2 must be > 0, got -1.0"),
    (lambda: maxout_layer(3, 0, 10), r"fan_in must be an integer >= 1, got 0"),
    (lambda: bivariate_normal_cdf(0.0, 0.0, 2.0), r"c must be in \[-1, 1\]"),
])
def test_bad_input_names_the_field(call, match):
    with pytest.raises(propcalc.InvalidParameterError, match=match):
        call()
