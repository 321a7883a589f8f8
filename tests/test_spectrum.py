"""Tests of propcalc.variants.spectrum: closed-form moments, the free-probability variances and
seeded random-matrix products."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import special

import propcalc
from propcalc.variants.spectrum import (
    derivative_moments,
    dynamical_isometry,
    jacobian_spectrum,
    sample_jacobian_spectrum,
)


@pytest.mark.parametrize("q", [1e-3, 0.5, 1.0, 30.0])
def test_relu_moments_do_not_depend_on_q(q):
    # phi'^2 is 1 with probability 1/2 and 0 otherwise: mu_1 = mu_2 = 1/2, ratio 2
    mu1, mu2 = derivative_moments(propcalc.activation("relu"), q)
    assert_allclose([mu1, mu2], [0.5, 0.5], rtol=1e-13)


@pytest.mark.parametrize("q", [0.01, 0.3, 2.0])
def test_erf_and_hard_tanh_moments_closed_forms(q):
    # erf' = (2/sqrt(pi)) exp(-x^2), and E[exp(-a q z^2)] = 1 / sqrt(1 + 2 a q) (Gaussian
    # integral): mu_1 = (4/pi) / sqrt(1 + 4q), mu_2 = (16/pi^2) / sqrt(1 + 8q)
    mu1, mu2 = derivative_moments(propcalc.activation("erf"), q)
    assert_allclose(mu1, (4 / math.pi) / math.sqrt(1 + 4 * q), rtol=1e-13)
    assert_allclose(mu2, (16 / math.pi**2) / math.sqrt(1 + 8 * q), rtol=1e-13)
    # hard tanh: phi'^2 = 1{|x| < 1}, so mu_1 = mu_2 = P(|sqrt(q) z| < 1) = 2 Phi(1/sqrt(q)) - 1
    p = 2 * special.ndtr(1 / math.sqrt(q)) - 1
    mu1, mu2 = derivative_moments(propcalc.activation("hard_tanh"), q)
    assert_allclose([mu1, mu2], [p, p], rtol=1e-12)


def test_variances_on_the_edge_of_chaos():
    # Pennington, Schoenholz & Ganguli 2017: with chi_1 = 1, Gaussian L mu_2/mu_1^2 and
    # orthogonal L (mu_2/mu_1^2 - 1)
    spec = jacobian_spectrum(propcalc.activation("tanh"), 12, q_star=0.5)
    assert_allclose(spec.chi_1, 1.0, rtol=1e-12)
    assert_allclose(spec.mean, 1.0, rtol=1e-10)
    assert_allclose(spec.normalized_variance_gaussian, 12 * spec.moment_ratio, rtol=1e-14)
    assert_allclose(spec.normalized_variance_orthogonal, 12 * (spec.moment_ratio - 1), rtol=1e-13)
    assert_allclose(spec.normalized_variance_gaussian - spec.normalized_variance_orthogonal, 12)
    json.dumps(propcalc.jsonable(spec.to_dict()), allow_nan=False)


def test_off_the_edge_the_mean_scales():
    spec = jacobian_spectrum(propcalc.activation("relu"), 5, q_star=1.0, sigma_w2=1.5)
    assert_allclose(spec.mean, (1.5 * 0.5) ** 5, rtol=1e-13)
    assert_allclose(spec.variance_orthogonal, spec.mean**2 * 5, rtol=1e-13)


@pytest.mark.parametrize("name", ["tanh", "erf", "hard_tanh"])
def test_near_isometry_advised_at_small_q(name):
    adv = dynamical_isometry(propcalc.activation(name), depth=50, max_variance=0.25)
    assert adv.achievable and adv.weights == "orthogonal"
    assert adv.ratio_at_small_q < 1.001  # mu_2/mu_1^2 -> 1 as q* -> 0
    assert adv.spectrum.normalized_variance_orthogonal <= 0.25 * (1 + 1e-9)
    assert adv.spectrum.normalized_variance_gaussian >= 50
    assert adv.q_star < 0.2
    json.dumps(propcalc.jsonable(adv.to_dict()), allow_nan=False)


def test_hard_tanh_isometry_point_closed_form():
    # hard tanh: L (1/p - 1) = target with p = 2 Phi(1/sqrt(q*)) - 1 gives
    # q* = 1 / Phi^{-1}((1 + p)/2)^2, p = L / (L + target)
    depth, target = 50, 0.25
    p = depth / (depth + target)
    q_ref = 1.0 / special.ndtri((1 + p) / 2) ** 2
    adv = dynamical_isometry(propcalc.activation("hard_tanh"), depth, max_variance=target)
    assert_allclose(adv.q_star, q_ref, rtol=1e-8)


def test_relu_has_no_isometry():
    adv = dynamical_isometry(propcalc.activation("relu"), depth=20)
    assert not adv.achievable and adv.ratio_constant
    assert_allclose([adv.ratio_at_small_q, adv.ratio_at_large_q], [2.0, 2.0], rtol=1e-12)
    assert "none possible" in adv.message and "grows like L" in adv.message


def _tol(theory, se, depth, width):
    """3 standard errors of the mean over repetitions, plus the finite-width bias.

    Free probability is exact as width -> infinity; at width N one Gaussian layer has
    E[tr((W W^T)^2)] / N = 2 + 1/N (direct count of index pairings), a relative shift of
    order 1/N per layer; over L layers we allow 2 L / N relative (4% at L = 10, N = 500).
    """
    return 3 * se + 2 * depth / width * max(theory, 1.0)


@pytest.mark.parametrize("weights, depth, reps", [("gaussian", 10, 4), ("orthogonal", 6, 3)])
def test_random_matrix_products_match_free_probability(weights, depth, reps):
    tanh = propcalc.activation("tanh")
    theory = jacobian_spectrum(tanh, depth, q_star=1.0)
    width = 500
    sample = sample_jacobian_spectrum(tanh, depth, width, q_star=1.0, weights=weights,
                                      repetitions=reps, seed=17)
    expected = theory.normalized_variance(weights)
    assert abs(sample.normalized_variance - expected) < _tol(
        expected, sample.normalized_variance_se, depth, width)
    # the mean squared singular value is chi_1^L = 1
    assert abs(sample.mean - 1.0) < 3 * sample.mean_se + 2 * depth / width
    # with each network's own layer moments the prediction is sharper (no forward noise)
    diff = np.array(sample.normalized_variances) - np.array(sample.free_prediction)
    se_diff = diff.std(ddof=1) / math.sqrt(reps)
    assert abs(diff.mean()) < 3 * se_diff + 2 * depth / width * max(expected, 1.0)


def test_relu_orthogonal_variance_grows_like_depth():
    relu = propcalc.activation("relu")
    depth, width = 4, 300
    sample = sample_jacobian_spectrum(relu, depth, width, q_star=1.0, weights="orthogonal",
                                      repetitions=3, seed=3)
    expected = jacobian_spectrum(relu, depth, 1.0).normalized_variance_orthogonal
    assert expected == pytest.approx(depth)
    assert abs(sample.normalized_variance - expected) < _tol(
        expected, sample.normalized_variance_se, depth, width)


def test_orthogonal_weights_are_haar():
    # Haar measure on O(n): E[tr Q] = 0, E[(tr Q)^2] = 1 (n >= 2), E[Q_11^2] = 1/n,
    # E[Q_11^4] = 3 / (n (n + 2)) (Diaconis & Shahshahani 1994; moments of a uniform unit
    # vector), det = +-1 with probability 1/2 each
    from propcalc.variants.spectrum_sampling import _haar_orthogonal
    rng = np.random.default_rng(0)
    n, reps = 6, 10_000
    mats = [_haar_orthogonal(rng, n) for _ in range(reps)]
    assert_allclose(mats[0].T @ mats[0], np.eye(n), atol=1e-14)
    tr = np.array([np.trace(m) for m in mats])
    q11 = np.array([m[0, 0] for m in mats])
    det_pos = np.mean([np.linalg.det(m) > 0 for m in mats])
    # 4 standard errors: sd(tr) = 1, sd(tr^2) ~ sqrt(2), sd(n q11^2) ~ sqrt(2), sd(det>0) = 1/2
    assert abs(tr.mean()) < 4 / math.sqrt(reps)
    assert abs(np.mean(tr**2) - 1) < 4 * math.sqrt(2) / math.sqrt(reps)
    assert abs(n * np.mean(q11**2) - 1) < 4 * math.sqrt(2) / math.sqrt(reps)
    assert abs(np.mean(q11**4) * n * (n + 2) / 3 - 1) < 0.05
    assert abs(det_pos - 0.5) < 4 * 0.5 / math.sqrt(reps)


def test_sampling_is_deterministic():
    tanh = propcalc.activation("tanh")
    a = sample_jacobian_spectrum(tanh, 2, 40, q_star=1.0, weights="gaussian", seed=4)
    b = sample_jacobian_spectrum(tanh, 2, 40, q_star=1.0, weights="gaussian", seed=4)
    assert a.to_dict() == b.to_dict()


@pytest.mark.parametrize("call, exc, match", [
    (lambda: jacobian_spectrum(propcalc.activation("tanh"), 0), propcalc.InvalidParameterError,
     r"depth must be an integer >= 1, got 0"),
    (lambda: jacobian_spectrum(propcalc.activation("step"), 3), propcalc.ComputationError,
     r"jumps"),
    (lambda: jacobian_spectrum(propcalc.activation("tanh"), 3, q_star=-1.0),
     propcalc.InvalidParameterError, r"q_star must be > 0, got -1.0"),
    (lambda: sample_jacobian_spectrum(propcalc.activation("tanh"), 3, weights="cauchy"),
     propcalc.InvalidParameterError, r"weights must be one of gaussian, orthogonal, got 'cauchy'"),
    (lambda: sample_jacobian_spectrum(propcalc.activation("tanh"), 1000, width=5000),
     propcalc.InvalidParameterError, r"width must be such that"),
    (lambda: dynamical_isometry(propcalc.activation("tanh"), 5, q_range=(1.0, 0.1)),
     propcalc.InvalidParameterError, r"q_range must be \(lo, hi\) with lo < hi"),
])
def test_bad_input(call, exc, match):
    with pytest.raises(exc, match=match):
        call()
