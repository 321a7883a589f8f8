"""Tests of propcalc.numerics.quadrature: the 1-D and 2-D Gaussian expectation rules.

References used below
---------------------
* DLMF 3.5.v (Gauss quadrature): an n-point Gauss rule is exact for polynomials of degree
  <= 2n - 1 times its weight, and not for degree 2n.
* Moments of N(0, 1): E[z^k] = (k - 1)!! for even k, 0 for odd k (Isserlis 1918).
* Isserlis 1918 / Wick: E[u1^a u2^b] for a centred Gaussian pair is the sum over all pairings
  of the a + b factors of the products of covariances.
* scipy.integrate.quad (QUADPACK) and mpmath.quad (tanh-sinh at 30 digits) as reference
  integrators.
"""

from __future__ import annotations

import math
import warnings
from math import comb, factorial

import mpmath
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate

import propcalc
from propcalc import ComputationError
from propcalc.numerics.quadrature import (
    QuadratureRule,
    bivariate_expectation,
    gaussian_expectation,
    hermite_rule,
    legendre_rule,
    rule_nodes,
)


def double_factorial(n: int) -> int:
    """n!! with (-1)!! = 0!! = 1."""
    return 1 if n <= 0 else n * double_factorial(n - 2)


def normal_moment(k: int) -> float:
    """E[z^k] for z ~ N(0, 1): (k - 1)!! for even k, 0 for odd k (Isserlis 1918)."""
    return 0.0 if k % 2 else float(double_factorial(k - 1))


def abs_normal_moment(k: int) -> float:
    """E|z|^k = 2^(k/2) Gamma((k + 1) / 2) / sqrt(pi): the size of the terms that cancel."""
    return 2 ** (k / 2) * math.gamma((k + 1) / 2) / math.sqrt(math.pi)


def mp_gauss(f, q: float, mean: float = 0.0, cuts=()) -> mpmath.mpf:
    """E[f(mean + sqrt(q) z)] by mpmath.quad (tanh-sinh) at 30 digits, split at 0 and the cuts."""
    with mpmath.workdps(30):
        sq = mpmath.sqrt(mpmath.mpf(q))
        m = mpmath.mpf(mean)
        pts = sorted({mpmath.mpf(0)} | {(mpmath.mpf(c) - m) / sq for c in cuts}
                     | {s * k / sq for s in (-1, 1) for k in (1, 3)})
        dens = lambda z: mpmath.exp(-z * z / 2) / mpmath.sqrt(2 * mpmath.pi)  # noqa: E731
        return +mpmath.quad(lambda z: f(m + sq * z) * dens(z), [-mpmath.inf, *pts, mpmath.inf])


# ------------------------------------------------------------------------------------------
# exactness for polynomials
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("n", [1, 2, 5, 8, 16, 24])
def test_legendre_rule_is_exact_to_degree_2n_minus_1(n):
    # DLMF 3.5.v: n-point Gauss-Legendre integrates x^k on [-1, 1] exactly for k <= 2n - 1;
    # int_{-1}^{1} x^k dx = 2 / (k + 1) for even k, 0 for odd k.
    x, w = legendre_rule(n)
    for k in range(2 * n):
        exact = 2.0 / (k + 1) if k % 2 == 0 else 0.0
        assert abs(np.sum(w * x**k) - exact) <= 1e-14, (n, k)
    # and not for degree 2n: the remainder is exactly 2^(2n+1) (n!)^4 / ((2n+1) ((2n)!)^3)
    # times f^(2n) = (2n)! (Abramowitz & Stegun 1964, 25.4.30)
    remainder = 2.0 / (2 * n + 1) - np.sum(w * x ** (2 * n))
    expected = 2.0 ** (2 * n + 1) * factorial(n) ** 4 / ((2 * n + 1) * factorial(2 * n) ** 2)
    assert_allclose(remainder, expected, rtol=1e-4 if expected > 1e-10 else 0.2)
    assert remainder > 1e-30


@pytest.mark.parametrize("n", [1, 3, 6, 10])
def test_hermite_rule_moments(n):
    # DLMF 3.5.v with the probabilists' Hermite weight: exact for E[z^k], k <= 2n - 1;
    # E[z^k] = (k - 1)!! (Isserlis 1918).
    x, w = hermite_rule(n)
    for k in range(2 * n):
        assert abs(np.sum(w * x**k) - normal_moment(k)) <= 1e-14 * abs_normal_moment(k), (n, k)
    assert abs(np.sum(w * x ** (2 * n)) - normal_moment(2 * n)) > 1e-3 * normal_moment(2 * n)


def test_hermite_rule_large_n_is_refused_or_finite():
    # RULES item 4: either a usable rule (finite weights summing to 1) or a clear error
    try:
        _, w = hermite_rule(400)
    except propcalc.InvalidParameterError as err:
        assert "n_nodes" in str(err)
        return
    assert np.all(np.isfinite(w)) and abs(np.sum(w) - 1) < 1e-14


@pytest.mark.parametrize("n_per_panel", [16, 24])
def test_composite_rule_normal_moments(n_per_panel):
    # E[z^k] = (k - 1)!! (Isserlis 1918). Each panel's Gauss-Legendre rule is exact to degree
    # 2n - 1 (DLMF 3.5.v) and the panels resolve the Gaussian weight, so the composite rule
    # reproduces the moments to rounding (measured against E|z|^k = 2^(k/2) Gamma((k+1)/2) /
    # sqrt(pi), the size of the terms that cancel for odd k). k stops at 12: beyond, the
    # mass cut off at |z| = 10 (about 2 * 10^(k-1) phi(10)) exceeds 1e-15 of the moment.
    rule = QuadratureRule(n_per_panel=n_per_panel)
    for k in range(13):
        got = float(gaussian_expectation(lambda x: x**k, 1.0, rule=rule))
        assert abs(got - normal_moment(k)) <= 4e-15 * abs_normal_moment(k), (k, got)


def test_composite_rule_needs_enough_nodes_per_panel():
    # the weight exp(-z^2/2) is not a polynomial: 8 nodes on panels of width 2 resolve it
    # only to about 2.4e-13 (measured), the default 16 to rounding
    coarse = float(gaussian_expectation(np.ones_like, 1.0,
                                        rule=QuadratureRule(n_per_panel=8, panel_width=2.0)))
    assert 1e-15 < abs(coarse - 1.0) < 1e-12


def test_composite_rule_weights_sum_to_gaussian_mass():
    # sum of weights = P(|z| <= 10) = erf(10 / sqrt 2) (DLMF 7.2), i.e. 1 - 1.5e-23
    for q, mean, bps in [(1.0, 0.0, ()), (0.3, 1.2, (0.0,)), (1e4, -3.0, (-1.0, 1.0))]:
        _, w = rule_nodes(mean, q, bps)
        assert np.all(w >= 0)
        assert_allclose(np.sum(w), math.erf(10 / math.sqrt(2)), rtol=1e-15)


@pytest.mark.parametrize("q,mean", [(1.0, 0.0), (0.25, 1.5), (4.0, -0.7), (1e-3, 0.2)])
def test_composite_rule_shifted_polynomials(q, mean):
    # E[(m + s z)^k] = sum_j C(k, j) m^(k-j) s^j E[z^j] (binomial theorem + Isserlis 1918);
    # splitting at breakpoints must not cost anything.
    s = math.sqrt(q)
    for k in range(11):
        exact = sum(comb(k, j) * mean ** (k - j) * s**j * normal_moment(j) for j in range(k + 1))
        # the size of the terms: E|x|^k <= sum_j C(k, j) |m|^(k-j) s^j E|z|^j
        scale = sum(comb(k, j) * abs(mean) ** (k - j) * s**j * abs_normal_moment(j)
                    for j in range(k + 1))
        for bps in [(), (0.0,), (-0.3, 0.4, 2.0)]:
            got = float(gaussian_expectation(lambda x: x**k, q, bps, mean=mean))
            assert abs(got - exact) <= 4e-15 * scale, (k, bps, got, exact)


def wick_moment(a: int, b: int, q1: float, q2: float, c: float) -> float:
    """E[u1^a u2^b], Var u1 = q1, Var u2 = q2, Cov = c sqrt(q1 q2), by counting pairings.

    Isserlis 1918 / Wick: choose j factors of each kind to pair across (C(a, j) C(b, j) j!
    ways, each contributing Cov^j), pair the remaining a - j and b - j among themselves
    ((a - j - 1)!! (b - j - 1)!! ways, contributing q1^((a-j)/2) q2^((b-j)/2)).
    """
    cov = c * math.sqrt(q1 * q2)
    total = 0.0
    for j in range(min(a, b) + 1):
        if (a - j) % 2 or (b - j) % 2:
            continue
        ways = comb(a, j) * comb(b, j) * factorial(j) * double_factorial(a - j - 1) \
            * double_factorial(b - j - 1)
        total += ways * q1 ** ((a - j) / 2) * q2 ** ((b - j) / 2) * cov**j
    return total


CORRELATIONS = np.array([-1.0, -0.999999, -0.6, -0.3, 0.0, 0.2, 0.5, 0.9, 0.999999, 1.0])


@pytest.mark.parametrize("q1,q2", [(1.0, 1.0), (0.7, 2.3), (5.0, 0.04)])
def test_bivariate_rule_wick_moments(q1, q2):
    # Isserlis 1918 / Wick, see wick_moment. The error is measured against
    # sqrt(E[u1^2a] E[u2^2b]), the Cauchy-Schwarz bound of the moment.
    for a in range(9):
        for b in range(9):
            if a + b > 12:
                continue
            got = bivariate_expectation(lambda x, y, a=a, b=b: x**a * y**b, CORRELATIONS, q1, q2)
            exact = np.array([wick_moment(a, b, q1, q2, c) for c in CORRELATIONS])
            scale = math.sqrt(normal_moment(2 * a) * normal_moment(2 * b) * q1**a * q2**b)
            assert np.max(np.abs(got - exact)) <= 3e-14 * scale, (a, b)


def test_bivariate_rule_wick_moments_with_splits():
    # the same moments when the rule is told about breakpoints (splitting costs nothing)
    q1, q2 = 0.7, 2.3
    for a, b in [(1, 1), (2, 2), (3, 1), (4, 4), (5, 3)]:
        got = bivariate_expectation(lambda x, y: x**a * y**b, CORRELATIONS, q1, q2,
                                    (-0.5, 0.0), (0.3,))
        exact = np.array([wick_moment(a, b, q1, q2, c) for c in CORRELATIONS])
        scale = math.sqrt(normal_moment(2 * a) * normal_moment(2 * b) * q1**a * q2**b)
        assert np.max(np.abs(got - exact)) <= 1e-14 * scale, (a, b)


# ------------------------------------------------------------------------------------------
# agreement with scipy.integrate.quad
# ------------------------------------------------------------------------------------------
def scipy_gauss(f, q: float, breakpoints=()) -> float:
    """E[f(sqrt(q) z)] by scipy.integrate.quad on the pieces between breakpoints (in z)."""
    sq = math.sqrt(q)
    cuts = sorted({0.0, *(b / sq for b in breakpoints)})
    edges = [-np.inf, *cuts, np.inf]
    total = 0.0
    for a, b in zip(edges[:-1], edges[1:]):
        val, _ = integrate.quad(lambda z: float(f(np.array(sq * z))) * math.exp(-z * z / 2)
                                / math.sqrt(2 * math.pi), a, b, epsabs=1e-14, epsrel=1e-13,
                                limit=200)
        total += val
    return total


SCIPY_CASES = ["tanh", "relu", "elu", "gelu", "softplus", "hard_tanh", "step", "erf", "silu",
               "selu", "mish"]


@pytest.mark.parametrize("name", SCIPY_CASES)
@pytest.mark.parametrize("q", [0.05, 1.0, 9.0])
def test_agrees_with_scipy_quad(name, q):
    # reference: scipy.integrate.quad (QUADPACK qagi/qags), split at the breakpoints
    act = propcalc.activation(name)
    for f in (lambda x: act.value(x) ** 2, lambda x: act.derivative(x) ** 2, act.value):
        ours = float(gaussian_expectation(f, q, act.breakpoints))
        ref = scipy_gauss(f, q, act.breakpoints)
        assert abs(ours - ref) <= 1e-12 * max(1.0, abs(ref)), (name, q, ours, ref)


# ------------------------------------------------------------------------------------------
# kinks cost nothing
# ------------------------------------------------------------------------------------------
def test_kinked_integrand_as_accurate_as_smooth_and_plain_hermite_is_not():
    # ELU (alpha = 1): elu'(x)^2 = 1 for x > 0 and e^{2x} for x < 0, a kink at 0.
    # Closed form: E[elu'(z)^2] = 1/2 + int_{-inf}^0 e^{2z} phi(z) dz = 1/2 + e^2 Phi(-2)
    # (complete the square), checked against mpmath.quad split at 0.
    elu = propcalc.activation("elu")
    tanh = propcalc.activation("tanh")
    with mpmath.workdps(30):
        exact_elu = mpmath.mpf(1) / 2 + mpmath.e**2 * mpmath.ncdf(-2)
        by_quad = mp_gauss(lambda x: (1 if x > 0 else mpmath.exp(x)) ** 2, 1.0)
        assert abs(by_quad - exact_elu) < 1e-25
    exact_tanh = float(mp_gauss(lambda x: mpmath.sech(x) ** 4, 1.0))

    ours_elu = float(gaussian_expectation(lambda x: elu.derivative(x) ** 2, 1.0, elu.breakpoints))
    ours_tanh = float(gaussian_expectation(lambda x: tanh.derivative(x) ** 2, 1.0))
    err_elu = abs(ours_elu - float(exact_elu)) / float(exact_elu)
    err_tanh = abs(ours_tanh - exact_tanh) / exact_tanh
    assert err_elu < 1e-13 and err_tanh < 1e-13, (err_elu, err_tanh)

    # plain probabilists' Gauss-Hermite, no splitting: converges only like 1/n on the kink
    # (measured: 3.3e-3 with 201 nodes, 6.5e-3 with 101), while tanh is exact to rounding
    x, w = hermite_rule(201)
    gh_elu = abs(float(np.sum(w * elu.derivative(x) ** 2)) - float(exact_elu))
    gh_tanh = abs(float(np.sum(w * tanh.derivative(x) ** 2)) - exact_tanh)
    assert gh_elu > 1e-4, gh_elu
    assert gh_tanh < 1e-13, gh_tanh


@pytest.mark.parametrize("name", ["relu", "hard_tanh", "selu", "leaky_relu", "step"])
@pytest.mark.parametrize("q", [0.3, 1.0, 30.0])
def test_piecewise_against_mpmath(name, q):
    # mpmath.quad (tanh-sinh, 30 digits) split at the breakpoints; the mpmath functions are
    # written here again from their definitions
    defs = {
        "relu": (lambda x: max(x, 0), lambda x: 1 if x > 0 else 0),
        "hard_tanh": (lambda x: max(-1, min(1, x)), lambda x: 1 if abs(x) < 1 else 0),
        "selu": (lambda x: propcalc.activations.base.SELU_SCALE
                 * (x if x > 0 else propcalc.activations.base.SELU_ALPHA * mpmath.expm1(x)),
                 lambda x: propcalc.activations.base.SELU_SCALE
                 * (1 if x > 0 else propcalc.activations.base.SELU_ALPHA * mpmath.exp(x))),
        "leaky_relu": (lambda x: x if x > 0 else 0.01 * x, lambda x: 1 if x > 0 else 0.01),
        "step": (lambda x: 1 if x >= 0 else 0, lambda x: 0),
    }
    v, d = defs[name]
    act = propcalc.activation(name)
    for mine, ref in [(lambda x: act.value(x) ** 2, lambda x: v(x) ** 2),
                      (lambda x: act.derivative(x) ** 2, lambda x: d(x) ** 2),
                      (act.value, v)]:
        got = float(gaussian_expectation(mine, q, act.breakpoints))
        exact = float(mp_gauss(ref, q, cuts=act.breakpoints))
        assert abs(got - exact) <= 1e-14 * max(1.0, abs(exact)), (name, q, got, exact)


# ------------------------------------------------------------------------------------------
# extreme variances
# ------------------------------------------------------------------------------------------
def test_zero_variance_is_a_point_mass():
    # q = 0: x = mean exactly, E[f(x)] = f(mean)
    assert float(gaussian_expectation(np.cos, 0.0, mean=0.7)) == pytest.approx(math.cos(0.7),
                                                                               rel=1e-15)
    assert float(gaussian_expectation(np.tanh, 0.0)) == 0.0
    # (the weights sum to P(|z| <= 10) rounded, so f(mean) comes back to ~1 ulp)
    step = propcalc.activation("step")
    assert float(gaussian_expectation(step.value, 0.0, step.breakpoints, mean=0.5)) == \
        pytest.approx(1.0, rel=1e-15)
    assert float(gaussian_expectation(step.value, 0.0, step.breakpoints, mean=-0.5)) == 0.0


@pytest.mark.parametrize("q", [1e-10, 1e-6, 1e6, 1e8])
@pytest.mark.parametrize("name", ["tanh", "erf", "gelu", "elu", "hard_tanh", "sigmoid"])
def test_tiny_and_huge_variances_against_mpmath(name, q):
    # mpmath.quad at 30 digits, split at 0 and at x = +-1, +-3 (scaled to z), so the narrow
    # features at |x| ~ 1 are resolved even at q = 1e8
    mp_defs = {
        "tanh": (mpmath.tanh, lambda x: mpmath.sech(x) ** 2),
        "erf": (mpmath.erf, lambda x: 2 / mpmath.sqrt(mpmath.pi) * mpmath.exp(-x * x)),
        "gelu": (lambda x: x * mpmath.ncdf(x), lambda x: mpmath.ncdf(x) + x * mpmath.npdf(x)),
        "elu": (lambda x: x if x > 0 else mpmath.expm1(x), lambda x: 1 if x > 0 else mpmath.exp(x)),
        "hard_tanh": (lambda x: max(-1, min(1, x)), lambda x: 1 if abs(x) < 1 else 0),
        "sigmoid": (lambda x: 1 / (1 + mpmath.exp(-x)),
                    lambda x: mpmath.exp(-x) / (1 + mpmath.exp(-x)) ** 2),
    }
    v, d = mp_defs[name]
    act = propcalc.activation(name)
    for mine, ref in [(lambda x: act.value(x) ** 2, lambda x: v(x) ** 2),
                      (lambda x: act.derivative(x) ** 2, lambda x: d(x) ** 2)]:
        got = float(gaussian_expectation(mine, q, act.breakpoints))
        exact = float(mp_gauss(ref, q, cuts=act.breakpoints))
        assert math.isfinite(got)
        assert abs(got - exact) <= 1e-13 * abs(exact) + 1e-300, (name, q, got, exact)


def test_relu_second_moment_is_half_q_at_every_scale():
    # E[relu(sqrt(q) z)^2] = q / 2 (symmetry of N(0, 1)); exact over 20 decades
    relu = propcalc.activation("relu")
    q = np.geomspace(1e-10, 1e10, 41)
    got = gaussian_expectation(lambda x: relu.value(x) ** 2, q, relu.breakpoints)
    assert_allclose(got, q / 2, rtol=1e-14)


# ------------------------------------------------------------------------------------------
# errors
# ------------------------------------------------------------------------------------------
def test_non_finite_integrand_names_the_point():
    # a non-finite value at a node the integral reaches is refused, naming x
    with pytest.raises(ComputationError, match=r"not finite at x = 2\.0\d*"):
        gaussian_expectation(lambda x: np.where(x > 2.0, np.inf, x), 1.0)
    with pytest.raises(ComputationError, match=r"not finite at x = "):
        gaussian_expectation(lambda x: np.where(x < -1.0, np.nan, 1.0), 1.0, mean=0.5)
    with pytest.raises(ComputationError, match=r"not finite at \(u1, u2\) = "):
        bivariate_expectation(lambda a, b: np.where(a * b > 1, np.nan, 1.0), 0.3, 1.0)


def test_integrand_growing_like_the_inverse_density_is_refused():
    # exp(x^2 / 3) phi(x) still matters at |x| = 10: the truncated integral cannot be trusted
    with pytest.raises(ComputationError, match="grows too fast.*x = -?10"):
        gaussian_expectation(lambda x: np.exp(x**2 / 3), 1.0)
    # polynomial growth is accepted (the cut-off mass is what limits it): z^14 has
    # E = 13!! = 135135 and loses about 2 * 10^13 phi(10) / 135135 = 1.1e-14 of it
    assert float(gaussian_expectation(lambda x: x**14, 1.0)) == pytest.approx(135135, rel=3e-14)


@pytest.mark.parametrize("q", [-1.0, math.inf])
def test_gaussian_expectation_rejects_bad_variance(q):
    # RULES item 4: a clear error naming the field, the constraint and the value
    with pytest.raises(propcalc.InvalidParameterError, match=r"q must be finite and >= 0, got"):
        gaussian_expectation(np.tanh, q)


def test_bivariate_expectation_rejects_correlation_outside_unit_interval():
    # (it used to clip c silently to 1)
    with pytest.raises(propcalc.InvalidParameterError, match=r"c must be .*<= 1, got 1\.5"):
        bivariate_expectation(lambda a, b: a * b, 1.5, 1.0)


@pytest.mark.parametrize("q1", [-1.0, 0.0])
def test_bivariate_expectation_rejects_bad_variance(q1):
    with pytest.raises(propcalc.InvalidParameterError, match=r"q1 must be finite and > 0"):
        bivariate_expectation(lambda a, b: a * b, 0.5, q1)


def test_integrable_singularity_at_a_breakpoint():
    # E[ln|z|] = (psi(1/2) + ln 2) / 2 = -(gamma + ln 2) / 2 (log-moment of chi-square with
    # one degree of freedom); the rule splits at 0 and never needs the value there (zero-width
    # panels put weight-0 nodes on the breakpoint; they used to raise ComputationError). The
    # accuracy is only algebraic for a log singularity at a panel end: 3e-3 is asked.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        got = float(gaussian_expectation(lambda x: np.log(np.abs(x)), 1.0, (0.0,)))
    # measured error 9.3e-4
    assert got == pytest.approx(-(float(mpmath.euler) + math.log(2)) / 2, abs=3e-3)


# ------------------------------------------------------------------------------------------
# vectorisation
# ------------------------------------------------------------------------------------------
def test_vectorised_over_q_and_mean_matches_scalar_calls():
    act = propcalc.activation("elu")
    q = np.array([[1e-6], [0.3], [1.0], [50.0], [1e5]])
    mean = np.array([-2.0, -0.1, 0.0, 0.4, 3.0])
    f = lambda x: act.value(x) ** 2  # noqa: E731
    grid = gaussian_expectation(f, q, act.breakpoints, mean=mean)
    assert grid.shape == (5, 5)
    for i in range(q.shape[0]):
        for j in range(mean.size):
            one = float(gaussian_expectation(f, float(q[i, 0]), act.breakpoints,
                                             mean=float(mean[j])))
            assert_allclose(grid[i, j], one, rtol=1e-14, atol=1e-300)


def test_bivariate_vectorised_over_c_matches_scalar_calls():
    act = propcalc.activation("relu")
    cs = np.linspace(-1.0, 1.0, 9).reshape(3, 3)
    g = lambda a, b: act.value(a) * act.value(b)  # noqa: E731
    grid = bivariate_expectation(g, cs, 0.8, 1.7, act.breakpoints)
    assert grid.shape == (3, 3)
    for c, v in zip(cs.ravel(), grid.ravel()):
        assert_allclose(v, float(bivariate_expectation(g, c, 0.8, 1.7, act.breakpoints)),
                        rtol=1e-14, atol=1e-16)


def test_node_shortcuts_match_the_general_builder():
    # The zero-mean shortcut (one cached set in z, breakpoints at 0 only) and the one-row
    # builder (sorted unique edges) must give the same rule as the general broadcasting
    # builder, up to panels of zero width (weight-0 nodes) and rounding: compared through
    # two integrands with a kink at 0 (a consistency check between builders; the accuracy
    # of the rule itself is checked against closed forms and mpmath above).
    from propcalc.numerics import quadrature as quad

    rng = np.random.default_rng(7)
    funcs = [lambda x: np.abs(x) ** 3, lambda x: np.maximum(x, 0.0) * np.exp(np.minimum(x, 5.0))]
    q = np.array([1e-4, 0.7, 3.0, 900.0])
    for bps in [(), (0.0,)]:
        x, w = quad.rule_nodes(np.zeros(q.size), q, bps)
        assert not w.flags.writeable  # the shared weights cannot be modified by a caller
        x_gen, w_gen = quad._rule_nodes(np.zeros(q.size), q, bps, quad.DEFAULT_RULE,
                                        np.zeros((q.size, 0)))
        for f in funcs:
            assert_allclose(np.sum(w * f(x), -1), np.sum(w_gen * f(x_gen), -1), rtol=1e-14)
    # one row with extra edges: as the same row inside a batch of two
    extra = rng.normal(size=(1, 6))
    x1, w1 = quad.rule_nodes(np.array([0.3]), np.array([2.0]), (-1.0, 1.0), extra_edges=extra)
    x2, w2 = quad.rule_nodes(np.array([0.3, 0.3]), np.array([2.0, 2.0]), (-1.0, 1.0),
                             extra_edges=np.vstack([extra, extra]))
    for f in funcs:
        assert_allclose(np.sum(w1 * f(x1), -1), np.sum(w2 * f(x2), -1)[:1], rtol=1e-14)


# ------------------------------------------------------------------------------------------
# the tail check compares against the function's own scale (issue 12, section 1)
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("b", [0.3, 2.0, 40.0])
@pytest.mark.parametrize("q", [1e-4, 9e-4, 0.0016, 0.01, 1.0, 16.5, 100.0])
def test_step_away_from_zero_is_not_growth(b, q):
    # E[1{x > b}] = Phi(-b / sqrt(q)) (closed form, mpmath.ncdf at 30 digits). A bounded
    # step whose jump sits near the cut |z| = 10 has a tiny expectation; the neglected tail
    # is below 1e-22 of the function's scale, so it is integrated, not refused as "growing".
    got = float(gaussian_expectation(lambda x: np.where(x > b, 1.0, 0.0), q, (b,)))
    with mpmath.workdps(30):
        ref = float(mpmath.ncdf(-b / mpmath.sqrt(q)))
    assert abs(got - ref) <= 1e-14 * ref + 1e-22


@pytest.mark.parametrize("formula,b", [("where(x > 0.3, 1, 0)", 0.3), ("where(x > 2, 1, 0)", 2.0),
                                       ("where(x > 0.3, x, 0)", 0.3),
                                       ("where(x > 40, 1, 0)", 40.0)])
def test_jump_formulas_of_issue_12_propagate(formula, b):
    # issue 12: these raised "grows too fast" at every sigma_w2. Now the report runs, and q*
    # satisfies V(q*) = q* with V from the closed forms E[1{x > b}^2] = Phi(-b / sqrt q) and
    # E[x^2 1{x > b}] = q Phi(-t) + b sqrt(q) varphi(t), t = b / sqrt(q) (truncated normal
    # moments, Johnson, Kotz & Balakrishnan 1994, section 10.1), by mpmath at 30 digits.
    points = ((1.5, 1000.0), (3.0, 2000.0)) if b > 10 else ((1.5, 0.1), (0.5, 1.0), (1.9, 0.5))
    for sw, sb in points:
        p = propcalc.propagation(formula, sw, sb)
        assert p.phase == "chaotic"  # phi jumps: chi_1 is infinite
        with mpmath.workdps(30):
            q = mpmath.mpf(p.q_star)
            t = b / mpmath.sqrt(q)
            if "x, 0" in formula:
                m2 = q * mpmath.ncdf(-t) + b * mpmath.sqrt(q) * mpmath.npdf(t)
            else:
                m2 = mpmath.ncdf(-t)
            v = sw * m2 + sb
        assert abs(float(v) - p.q_star) <= 1e-12 * p.q_star


def test_jump_out_of_reach_gets_a_clear_error():
    # at q* = 0.1 the jump at x = 40 is 126 standard deviations out: 1 - C(c) underflows to 0
    # for every c, so c* cannot be resolved; the error says so (it was "grows too fast")
    with pytest.raises(ComputationError, match="equals 1 to double precision"):
        propcalc.propagation("where(x > 40, 1, 0)", 1.5, 0.1)


def test_exponential_growth_is_still_refused_and_slow_growth_accepted():
    # exp(6 z) (x = 6 z, q = 36): E = e^18, the cut at z = 10 loses e^10 phi(10) / 4 ~ 3e-5 of
    # it (log-normal mean, closed form): refused
    with pytest.raises(ComputationError, match="grows too fast"):
        gaussian_expectation(np.exp, 36.0)
    # exp(2 z): the cut loses e^20 phi(10) ~ 4e-13 of e^2; accepted, to 1e-13 (closed form)
    assert float(gaussian_expectation(np.exp, 4.0)) == pytest.approx(math.exp(2.0), rel=1e-13)
