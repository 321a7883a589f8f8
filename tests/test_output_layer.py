"""Tests of propcalc.variants.output_layer against 1-D quadrature, mpmath, an expansion and sampling."""

from __future__ import annotations

import json
import math

import mpmath as mp
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, special, stats

import propcalc
from propcalc.variants.output_layer import (
    expected_initial_loss,
    initial_loss,
    max_class_probability,
    output_layer_for_plan,
    output_layer_scale,
)


@pytest.mark.parametrize("s2", [1e-4, 0.1, 1.0, 10.0, 100.0])
def test_two_classes_against_scipy_quad(s2):
    # K = 2: loss = softplus(l_2 - l_1), l_2 - l_1 ~ N(0, 2 s2); reference scipy.integrate.quad
    sd = math.sqrt(2 * s2)
    ref, _ = integrate.quad(lambda z: np.logaddexp(0.0, sd * z) * stats.norm.pdf(z), -np.inf,
                            np.inf, epsabs=1e-14, epsrel=1e-13, points=None)
    assert_allclose(expected_initial_loss(2, s2), ref, rtol=1e-11)


def test_two_classes_against_mpmath():
    # 30-digit reference: mpmath.quad of log(1 + exp(sqrt(2 s2) z)) phi(z), s2 = 3
    with mp.workdps(30):
        sd = mp.sqrt(6)
        ref = mp.quad(lambda z: mp.log1p(mp.exp(sd * z)) * mp.npdf(z), [-mp.inf, -1, 0, 1, mp.inf])
    assert_allclose(expected_initial_loss(2, 3.0), float(ref), rtol=1e-14)


@pytest.mark.parametrize("k", [2, 10, 1000])
def test_small_variance_expansion(k):
    # E[loss] = ln K + s2 (K - 1) / (2K) + O(s2^2) (second-order expansion of log-mean-exp,
    # derived in the module docstring): the residual scales like s2^2
    res = []
    for s2 in (1e-3, 2e-3, 4e-3):
        rep = initial_loss(k, s2)
        assert_allclose(rep.small_variance_approximation, math.log(k) + s2 * (k - 1) / (2 * k))
        res.append(rep.expected_loss - rep.small_variance_approximation)
    assert abs(res[0]) < 1e-5 * (k - 1) / k
    assert_allclose(res[1] / res[0], 4.0, rtol=0.02)
    assert_allclose(res[2] / res[1], 4.0, rtol=0.02)


@pytest.mark.parametrize("k, s2", [(10, 1.0), (100, 4.0), (5, 0.2)])
def test_many_classes_against_seeded_sampling(k, s2):
    rng = np.random.default_rng(k * 1000 + int(10 * s2))
    n = 2_000_000 // k
    logits = math.sqrt(s2) * rng.standard_normal((n, k))
    loss = special.logsumexp(logits, axis=1) - logits[:, 0]
    se = loss.std(ddof=1) / math.sqrt(n)
    # 4 standard errors of the Monte Carlo mean
    assert abs(expected_initial_loss(k, s2) - loss.mean()) < 4 * se


def test_loss_starts_at_log_k_and_increases():
    assert expected_initial_loss(7, 0.0) == math.log(7)
    vals = [expected_initial_loss(7, s2) for s2 in (0.01, 0.1, 1.0, 10.0, 100.0)]
    assert all(a < b for a, b in zip(vals, vals[1:]))
    assert vals[0] > math.log(7)


def test_large_variance_approaches_the_expected_maximum():
    # for large s2 the log-sum-exp is dominated by the largest logit:
    # E[loss] ~ sqrt(s2) E[max of K normals] (property; E[max] from propcalc.variants.maxout)
    from propcalc.variants.maxout import max_moments
    s2 = 1e4
    val = expected_initial_loss(10, s2)
    assert abs(val / (math.sqrt(s2) * max_moments(10).mean) - 1) < 0.01


def test_max_probability_two_classes_quadrature_against_sampling():
    exact = max_class_probability(2, 1.5)
    assert exact.method == "quadrature" and exact.standard_error == 0.0
    rng = np.random.default_rng(8)
    d = math.sqrt(3.0) * rng.standard_normal(500_000)  # l_1 - l_2 ~ N(0, 2 s2)
    p = special.expit(np.abs(d))
    assert abs(exact.value - p.mean()) < 4 * p.std(ddof=1) / math.sqrt(p.size)


def test_max_probability_monte_carlo_reports_its_error():
    r = max_class_probability(10, 1.0, n_samples=50_000, seed=3)
    assert r.method == "monte carlo" and r.n_samples == 50_000 and r.seed == 3
    assert 0 < r.standard_error < 2e-3
    assert r.uniform == 0.1 < r.value < 1.0
    # seeded: the same numbers again
    assert max_class_probability(10, 1.0, n_samples=50_000, seed=3) == r
    assert max_class_probability(10, 0.0).value == 0.1


def test_scale_meets_the_margin():
    k, m2 = 10, 0.4
    out = output_layer_scale(k, m2, margin=0.02, fan_in=256)
    assert_allclose(out.loss_at_scale.expected_loss, math.log(k) + 0.02, rtol=1e-10)
    assert_allclose(out.sigma_w2, out.max_logit_variance / m2, rtol=1e-14)
    assert_allclose(out.weight_std, math.sqrt(out.sigma_w2 / 256))
    # small margins follow the expansion: s2 ~ 2 K margin / (K - 1)
    assert_allclose(out.max_logit_variance, 2 * k * 0.02 / (k - 1), rtol=0.05)
    json.dumps(propcalc.jsonable(out.to_dict()), allow_nan=False)


def test_plan_last_layer_is_too_large_and_gets_a_smaller_scale():
    tanh = propcalc.activation("tanh")
    plan = propcalc.recommend(tanh, widths=[32] + [128] * 5 + [10])
    out = output_layer_for_plan(plan, tanh, n_classes=10, n_samples=20_000)
    assert out.current is not None
    assert out.current.expected_loss > out.loss_at_scale.expected_loss
    assert out.sigma_w2 < plan.layers[-1].sigma_w2
    assert out.sigma_b2 == 0.0
    assert out.weight_std == pytest.approx(math.sqrt(out.sigma_w2 / 128))


@pytest.mark.parametrize("call, exc, match", [
    (lambda: expected_initial_loss(1, 1.0), propcalc.InvalidParameterError,
     r"n_classes must be an integer >= 2, got 1"),
    (lambda: expected_initial_loss(10, -1.0), propcalc.InvalidParameterError,
     r"logit_variance must be >= 0, got -1.0"),
    (lambda: expected_initial_loss(10, 1e9), propcalc.InvalidParameterError,
     r"logit_variance must be <= 10000"),
    (lambda: max_class_probability(10**6, 1.0, n_samples=1000), propcalc.InvalidParameterError,
     r"n_samples must be <= 50"),
    (lambda: output_layer_scale(10, 0.0), propcalc.InvalidParameterError,
     r"penultimate_second_moment must be > 0, got 0.0"),
    (lambda: output_layer_scale(10, 1.0, margin=0.01, sigma_b2=5.0), propcalc.ComputationError,
     r"sigma_b2 = 5 alone gives a logit variance above"),
])
def test_bad_input(call, exc, match):
    with pytest.raises(exc, match=match):
        call()
