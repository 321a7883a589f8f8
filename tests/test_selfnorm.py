"""Tests of propcalc.variants.selfnorm against Klambauer et al. 2017, mpmath and seeded sampling."""

from __future__ import annotations

import json
import math

import mpmath as mp
import numpy as np
import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc.activations.base import SELU_ALPHA, SELU_SCALE
from propcalc.variants.selfnorm import (
    ALPHA_PRIME_SELU,
    alpha_dropout,
    mean_variance_jacobian,
    mean_variance_map,
    self_normalization,
)


@pytest.fixture(scope="module")
def selu():
    return propcalc.activation("selu")


def _selu_mp(x):
    return SELU_SCALE * (x if x > 0 else SELU_ALPHA * mp.expm1(x))


def test_selu_zero_one_is_a_fixed_point(selu):
    # Klambauer et al. 2017, eq. (14): lambda, alpha make (0, 1) a fixed point for omega = 0,
    # tau = 1 (their constants to 16+ digits)
    mu, nu = mean_variance_map(selu, 0.0, 1.0)
    assert abs(float(mu)) < 1e-14
    assert abs(float(nu) - 1.0) < 1e-13


def test_map_against_mpmath(selu):
    # reference: mpmath.quad of E[selu(z)] and E[selu(z)^2] for z ~ N(mu omega, nu tau)
    mu, nu, om, ta = 0.2, 1.3, 0.4, 0.9
    m, s = mu * om, nu * ta
    def dens(x):
        return mp.npdf(x, m, mp.sqrt(s))

    with mp.workdps(30):
        e1 = mp.quad(lambda x: _selu_mp(x) * dens(x), [-mp.inf, 0, mp.inf])
        e2 = mp.quad(lambda x: _selu_mp(x) ** 2 * dens(x), [-mp.inf, 0, mp.inf])
    got_mu, got_nu = mean_variance_map(selu, mu, nu, om, ta)
    assert_allclose(float(got_mu), float(e1), rtol=1e-12)
    assert_allclose(float(got_nu), float(e2 - e1 * e1), rtol=1e-12)


def test_jacobian_at_zero_one_matches_published_values(selu):
    # Klambauer et al. 2017, section "Stable and attracting fixed point (0, 1) for
    # normalized weights": J(0, 1) = [[0, 0.088834], [0, 0.782648]] and spectral norm
    # 0.7877 < 1 (values from memory, to the digits quoted)
    r = self_normalization(selu)
    p = r.nearest
    assert p is not None and r.self_normalizing
    assert_allclose([p.mu, p.nu], [0.0, 1.0], atol=1e-12)
    jac = np.array(p.jacobian)
    assert_allclose(jac[:, 0], [0.0, 0.0], atol=1e-14)  # omega = 0: no dependence on mu
    assert abs(jac[0, 1] - 0.088834) < 2e-6
    assert abs(jac[1, 1] - 0.782648) < 2e-6
    assert abs(p.spectral_norm - 0.7877) < 1e-4
    assert p.spectral_radius < 1 and p.attracting


@pytest.mark.parametrize("name, mu, nu, om, ta", [
    ("selu", 0.1, 1.2, 0.3, 1.05),
    ("selu", -0.4, 0.6, -0.7, 2.0),
    ("tanh", 0.5, 0.8, 1.1, 0.7),
    ("relu", 0.3, 1.5, 0.9, 1.2),
    ("elu", -0.2, 2.5, 0.5, 0.4),
])
def test_jacobian_against_central_differences(name, mu, nu, om, ta):
    # property: the Stein-identity Jacobian equals central differences of the map
    act = propcalc.activation(name)
    jac = mean_variance_jacobian(act, mu, nu, om, ta)
    h = 1e-5
    fd = np.empty((2, 2))
    for j, (dmu, dnu) in enumerate(((h, 0.0), (0.0, h))):
        up = mean_variance_map(act, mu + dmu, nu + dnu, om, ta)
        dn = mean_variance_map(act, mu - dmu, nu - dnu, om, ta)
        fd[:, j] = [(float(u) - float(d)) / (2 * h) for u, d in zip(up, dn)]
    assert_allclose(jac, fd, rtol=1e-7, atol=1e-9)


@pytest.mark.parametrize("om", [-0.1, 0.1])
@pytest.mark.parametrize("ta", [0.95, 1.1])
def test_theorem_one_region(selu, om, ta):
    # Klambauer et al. 2017, Theorem 1: for omega in [-0.1, 0.1] and tau in [0.95, 1.1] the
    # map has a stable and attracting fixed point with mu in [-0.1, 0.1], nu in [0.8, 1.5]
    r = self_normalization(selu, om, ta)
    p = r.nearest
    assert p is not None and r.self_normalizing
    assert -0.1 <= p.mu <= 0.1 and 0.8 <= p.nu <= 1.5
    # the fixed point is one: the map returns it
    mu, nu = mean_variance_map(selu, p.mu, p.nu, om, ta)
    assert_allclose([float(mu), float(nu)], [p.mu, p.nu], atol=1e-10)


def test_iterating_the_map_converges_to_the_fixed_point(selu):
    # property: an attracting fixed point is reached by iteration (used only to check)
    mu, nu = 0.5, 2.0
    for _ in range(60):
        mu, nu = (float(v) for v in mean_variance_map(selu, mu, nu))
    assert_allclose([mu, nu], [0.0, 1.0], atol=1e-6)


@pytest.mark.parametrize("ta", [0.5, 1.0, 2.0, 4.0])
def test_relu_has_no_attracting_fixed_point_but_zero(ta):
    relu = propcalc.activation("relu")
    r = self_normalization(relu, 0.0, ta)
    assert not r.self_normalizing
    assert not any(p.attracting for p in r.fixed_points)
    # Var(relu(sqrt(s) z)) = s (1/2 - 1/(2 pi)) (closed form): nu~ / nu = tau (pi - 1) / (2 pi)
    assert_allclose(r.zero_rate, ta * (math.pi - 1) / (2 * math.pi), rtol=1e-12)
    if ta < 2 * math.pi / (math.pi - 1):
        assert "collapses to 0" in r.message


def test_relu_balanced_tau_is_neutral():
    relu = propcalc.activation("relu")
    r = self_normalization(relu, 0.0, 2 * math.pi / (math.pi - 1))
    assert r.neutral and not r.self_normalizing
    assert_allclose(r.nearest.spectral_radius, 1.0, atol=1e-9)


def test_relu_with_nonzero_omega_does_not_attract():
    # positive homogeneity: fixed points come in rays (t mu, t^2 nu), with an eigenvalue 1
    r = self_normalization(propcalc.activation("relu"), 1.0, 1.0)
    assert not r.self_normalizing
    assert all(abs(p.spectral_radius - 1.0) < 1e-6 or not p.attracting for p in r.fixed_points)


def test_result_is_json_ready(selu):
    json.dumps(propcalc.jsonable(self_normalization(selu, 0.05, 1.0).to_dict()), allow_nan=False)


# ------------------------------------------------------------------------------------------
# alpha dropout
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("q", [0.95, 0.9, 0.8, 0.5])
def test_alpha_dropout_matches_the_published_formula(q):
    # Klambauer et al. 2017, section "New dropout technique":
    # a = (q + alpha'^2 q (1 - q))^(-1/2), b = -(q + alpha'^2 q (1 - q))^(-1/2) ((1 - q) alpha')
    ap = -SELU_SCALE * SELU_ALPHA
    d = alpha_dropout(q)
    assert d.alpha_prime == ALPHA_PRIME_SELU == ap
    assert_allclose(d.a, (q + ap * ap * q * (1 - q)) ** -0.5, rtol=1e-15)
    assert_allclose(d.b, -((q + ap * ap * q * (1 - q)) ** -0.5) * ((1 - q) * ap), rtol=1e-14)


@pytest.mark.parametrize("q, mean, var", [(0.9, 0.0, 1.0), (0.8, 0.0, 1.0), (0.7, 0.3, 2.0)])
def test_alpha_dropout_keeps_mean_and_variance_by_sampling(q, mean, var):
    rng = np.random.default_rng(int(100 * q + 10 * var))
    n = 2_000_000
    if mean == 0.0 and var == 1.0:
        # SELU activations of unit normals have mean 0 and variance 1 (Klambauer et al. 2017)
        x = propcalc.activation("selu").value(rng.standard_normal(n))
    else:
        x = mean + math.sqrt(var) * rng.standard_normal(n)
    d = alpha_dropout(q, mean, var)
    y = d.apply(x, rng.random(n) < q)
    # tolerances: 5 standard errors; SE of the mean sd/sqrt(n), SE of the variance
    # sqrt((m4 - s^4) / n) with m4 the sample fourth central moment
    dev = y - y.mean()
    s2 = float(np.mean(dev * dev))
    m4 = float(np.mean(dev**4))
    se_mean = math.sqrt(s2 / n)
    se_var = math.sqrt((m4 - s2 * s2) / n)
    assert abs(y.mean() - mean) < 5 * se_mean + 5 * math.sqrt(var / n)
    assert abs(s2 - var) < 5 * se_var + 5 * var * math.sqrt(2.0 / n)


@pytest.mark.parametrize("call, match", [
    (lambda a: mean_variance_map(a, 0.0, -1.0), r"nu must be finite and >= 0, got -1.0"),
    (lambda a: mean_variance_jacobian(a, 0.0, 0.0), r"nu must be finite and > 0, got 0.0"),
    (lambda a: self_normalization(a, 0.0, 0.0), r"tau must be > 0, got 0.0"),
    (lambda a: self_normalization(a, float("inf")), r"omega must be a finite real number"),
    (lambda a: self_normalization(a, start=(0.0, -1.0)), r"start\[1\] must be > 0"),
    (lambda a: alpha_dropout(0.0), r"keep_rate must be in \(0, 1\], got 0.0"),
    (lambda a: alpha_dropout(0.9, variance=0.0), r"variance must be > 0, got 0.0"),
])
def test_bad_input_names_the_field(selu, call, match):
    with pytest.raises(propcalc.InvalidParameterError, match=match):
        call(selu)
