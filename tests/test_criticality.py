"""Tests of the mean-field core through propcalc.meanfield (fixed_points, correlation, core, report,
edge): fixed points, phases, depth scales, the edge of chaos.

References used below
---------------------
* He et al. 2015, "Delving deep into rectifiers", eq. (10): ReLU is critical at sigma_w2 = 2
  with sigma_b2 = 0; a leaky slope a gives 2 / (1 + a^2).
* Poole et al. 2016, "Exponential expressivity ...", fig. 2 / section 3, and Schoenholz et
  al. 2017, "Deep information propagation", section 3: tanh with sigma_b2 = 0 is ordered for
  sigma_w2 < 1, critical at 1 (q* = 0), chaotic above; xi_c = -1 / ln chi_c (eq. 9); at the
  edge 1 - c_l decays like a power of l (second-order expansion of C at c = 1).
* Hayou et al. 2019, "On the impact of the activation function on deep neural networks
  training", ReLU at the edge: 1 - c_l ~ 9 pi^2 / (2 l^2).
* Williams 1997 (erf) and Sheppard 1899 (step) closed forms, solved with scipy.optimize.brentq.
* Price 1958: C''(c) = sigma_w2 q^2 E[phi''(u1) phi''(u2)] / V(q).
"""

from __future__ import annotations

import math
import re
import warnings

import mpmath
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, optimize

import propcalc
from propcalc import Activation
from propcalc.meanfield import core, correlation, maps
from propcalc.numerics.quadrature import DEFAULT_RULE

A = propcalc.activation


# ------------------------------------------------------------------------------------------
# He et al. 2015: rectifiers
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("slope", [0.0, 0.01, 0.2, 0.5])
def test_rectifiers_critical_at_he_value(slope):
    # He et al. 2015, eq. (10): sigma_w2 = 2 / (1 + a^2), sigma_b2 = 0, for every q*
    act = A("leaky_relu", slope=slope)
    expected = 2.0 / (1.0 + slope**2)
    for q in (0.01, 1.0, 100.0):
        cp = propcalc.edge_of_chaos(act, q)
        assert cp.valid
        assert cp.sigma_w2 == pytest.approx(expected, rel=1e-14)
        assert cp.sigma_b2 == pytest.approx(0.0, abs=1e-14 * q)
        assert cp.chi_q == pytest.approx(1.0, rel=1e-13)   # neutral: V(q) = q for all q
    (only,) = propcalc.edge_of_chaos_at_bias(act, 0.0)
    assert only.sigma_w2 == pytest.approx(expected, rel=1e-14)
    # with a positive bias no point is critical: sigma_b2 = q* - sw q* (1 + a^2) / 2 = 0 always
    assert propcalc.edge_of_chaos_at_bias(act, 0.1) == ()


def test_relu_at_he_value_is_the_neutral_edge():
    # He et al. 2015: V(q) = q for every q at sigma_w2 = 2; chi_1 = 1, xi_c infinite
    p = propcalc.propagation(A("relu"), 2.0, 0.0)
    assert p.status == "neutral"
    assert p.phase == "edge of chaos"
    assert p.q_star == pytest.approx(2.0)          # keeps its start value sigma_w2 * 1
    assert p.chi_1 == pytest.approx(1.0, rel=1e-14)
    assert math.isinf(p.xi_c)


# ------------------------------------------------------------------------------------------
# tanh: Poole et al. 2016 / Schoenholz et al. 2017
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("sw", [0.3, 0.8, 0.99])
def test_tanh_without_bias_below_one_is_ordered_and_collapses(sw):
    # Poole et al. 2016: for sigma_b2 = 0 and sigma_w2 < 1, q* = 0 attracts and the phase is
    # ordered; V(q)/q -> sigma_w2 tanh'(0)^2 = sigma_w2 as q -> 0, so chi_1 = sigma_w2 and
    # xi_c = -1 / ln sigma_w2 (Schoenholz et al. 2017, eq. 9)
    p = propcalc.propagation(A("tanh"), sw, 0.0)
    assert p.status == "collapse" and p.q_star == 0.0
    assert p.phase == "ordered"
    assert p.variance_fixed_points.growth_rate == pytest.approx(sw, rel=1e-12)
    assert p.chi_1 == pytest.approx(sw, rel=1e-12)
    assert p.xi_c == pytest.approx(-1.0 / math.log(sw), rel=1e-12)


def test_tanh_without_bias_at_one_is_the_edge_with_collapse():
    # Poole et al. 2016 / Schoenholz et al. 2017: critical at sigma_w2 = 1, sigma_b2 = 0, q* = 0
    tanh = A("tanh")
    p = propcalc.propagation(tanh, 1.0, 0.0)
    assert p.status == "collapse" and p.q_star == 0.0
    assert p.phase == "edge of chaos"
    assert p.chi_1 == pytest.approx(1.0, abs=1e-12)
    assert math.isinf(p.xi_c)
    (cp,) = propcalc.edge_of_chaos_at_bias(tanh, 0.0)
    assert cp.q_star == 0.0 and cp.sigma_w2 == pytest.approx(1.0, rel=1e-12)


@pytest.mark.parametrize("sw", [1.01, 1.5, 3.0])
def test_tanh_without_bias_above_one_is_chaotic(sw):
    # Poole et al. 2016: a positive q* appears for sigma_w2 > 1 and the phase is chaotic;
    # tanh is odd and sigma_b2 = 0, so C(0) = 0 and c* = 0 (C convex on [0, 1])
    p = propcalc.propagation(A("tanh"), sw, 0.0)
    assert p.status == "fixed_point" and p.q_star > 0
    assert p.phase == "chaotic" and p.chi_1 > 1
    assert p.c_star == pytest.approx(0.0, abs=1e-14)
    assert abs(p.chi_c) < 1
    assert p.xi_c == pytest.approx(-1.0 / math.log(p.chi_c), rel=1e-12)


# ------------------------------------------------------------------------------------------
# correlation fixed points
# ------------------------------------------------------------------------------------------
CHAOTIC_POINTS = [("tanh", 2.0, 0.05), ("erf", 2.0, 0.05), ("selu", 1.0, 0.02),
                  ("elu", 1.6, 0.05), ("hard_tanh", 1.6, 0.1), ("gelu", 1.99, 0.3),
                  ("mish", 1.98, 0.3), ("sigmoid", 200.0, 0.0), ("step", 2.0, 0.1)]


@pytest.mark.parametrize("name,sw,sb", CHAOTIC_POINTS)
def test_chaotic_c_star_is_an_attracting_fixed_point(name, sw, sb):
    # Poole et al. 2016 / Schoenholz et al. 2017: in the chaotic phase c* < 1 solves C(c*) = c*
    # and attracts (|C'(c*)| < 1); xi_c = -1 / ln C'(c*) (Schoenholz et al. 2017, eq. 9)
    act = A(name)
    p = propcalc.propagation(act, sw, sb)
    assert p.phase == "chaotic" and p.status == "fixed_point"
    assert 0.0 <= p.c_star < 1.0
    c_val = float(maps.correlation_map(act, p.c_star, sw, sb, p.q_star))
    assert c_val == pytest.approx(p.c_star, abs=2e-14)
    slope = float(maps.correlation_map_slope(act, p.c_star, sw, sb, p.q_star))
    assert slope == pytest.approx(p.chi_c, rel=1e-12)
    assert 0.0 < p.chi_c < 1.0
    assert p.xi_c == pytest.approx(-1.0 / math.log(p.chi_c), rel=1e-14)
    assert p.trainable_depth == pytest.approx(6.0 * p.xi_c, rel=1e-14)  # Schoenholz 2017, sec. 5


@pytest.mark.parametrize("sw,sb", [(2.0, 0.05), (3.0, 0.2), (1.5, 0.01)])
def test_erf_chaotic_fixed_point_against_williams(sw, sb):
    # Williams 1997: C(c) = (sw (2/pi) arcsin(r c) + sb) / q*, r = 2 q* / (1 + 2 q*), and
    # V(q) = sw (2/pi) arcsin(2q / (1 + 2q)) + sb. Both fixed points by brentq on the closed forms.
    erf = A("erf")
    q_star = optimize.brentq(lambda q: sw * 2 / math.pi * math.asin(2 * q / (1 + 2 * q)) + sb - q,
                             1e-6, 1e3, xtol=1e-15, rtol=1e-15)
    r = 2 * q_star / (1 + 2 * q_star)
    cmap = lambda c: (sw * 2 / math.pi * math.asin(r * c) + sb) / q_star  # noqa: E731
    c_star = optimize.brentq(lambda c: cmap(c) - c, 0.0, 1.0 - 1e-9, xtol=1e-16, rtol=1e-15)
    chi_c = sw * 2 / math.pi * r / math.sqrt(1 - (r * c_star) ** 2) / q_star
    p = propcalc.propagation(erf, sw, sb)
    assert p.q_star == pytest.approx(q_star, rel=1e-13)
    assert p.c_star == pytest.approx(c_star, rel=1e-12)
    assert p.chi_c == pytest.approx(chi_c, rel=1e-12)
    assert p.xi_c == pytest.approx(-1.0 / math.log(chi_c), rel=1e-11)


@pytest.mark.parametrize("sw,sb", [(1.0, 0.0), (2.0, 0.1), (0.5, 2.0)])
def test_step_is_always_chaotic_with_sheppard_fixed_point(sw, sb):
    # the step jumps, so chi_1 is infinite and every (sw, sb) is chaotic. q* = sw / 2 + sb
    # (V does not depend on q); C(c) = (sw (1/4 + arcsin(c) / (2 pi)) + sb) / q* (Sheppard 1899)
    # and C'(c) = sw / (2 pi sqrt(1 - c^2)) / q* (see tests/test_maps.py for the derivation).
    q_star = sw / 2 + sb
    cmap = lambda c: (sw * (0.25 + math.asin(c) / (2 * math.pi)) + sb) / q_star  # noqa: E731
    c_star = optimize.brentq(lambda c: cmap(c) - c, 0.0, 1.0 - 1e-12, xtol=1e-16, rtol=1e-15)
    chi_c = sw / (2 * math.pi * math.sqrt(1 - c_star**2)) / q_star
    p = propcalc.propagation(A("step"), sw, sb)
    assert p.phase == "chaotic"
    assert math.isinf(p.chi_1)
    assert p.q_star == pytest.approx(q_star, rel=1e-14)
    assert p.c_star == pytest.approx(c_star, rel=1e-12)
    assert p.chi_c == pytest.approx(chi_c, rel=1e-12)
    assert p.xi_c == pytest.approx(-1.0 / math.log(chi_c), rel=1e-11)
    assert propcalc.edge_of_chaos(A("step"), 1.0).valid is False
    assert propcalc.edge_of_chaos_at_bias(A("step"), sb) == ()


@pytest.mark.parametrize("name,sw,sb", [("tanh", 1.5, 0.3), ("relu", 1.5, 0.1), ("elu", 1.2, 0.1),
                                        ("linear", 0.5, 0.1), ("sigmoid", 4.0, 0.1)])
def test_ordered_phase_has_c_star_one(name, sw, sb):
    # ordered: chi_1 < 1, c* = 1, chi_c = C'(1) = chi_1, xi_c = -1 / ln chi_1 (Schoenholz 2017)
    p = propcalc.propagation(A(name), sw, sb)
    assert p.phase == "ordered" and p.chi_1 < 1
    assert p.c_star == 1.0 and p.chi_c == pytest.approx(p.chi_1, rel=1e-15)
    assert p.xi_c == pytest.approx(-1.0 / math.log(p.chi_1), rel=1e-14)
    # closed forms where there are some: ReLU q* = sb / (1 - sw/2), chi_1 = sw/2 (He et al. 2015);
    # linear q* = sb / (1 - sw), chi_1 = sw
    if name == "relu":
        assert p.q_star == pytest.approx(sb / (1 - sw / 2), rel=1e-13)
        assert p.chi_1 == pytest.approx(sw / 2, rel=1e-14)
    if name == "linear":
        assert p.q_star == pytest.approx(sb / (1 - sw), rel=1e-13)
        assert p.chi_1 == pytest.approx(sw, rel=1e-15)


# ------------------------------------------------------------------------------------------
# several variance fixed points
# ------------------------------------------------------------------------------------------
_B, _X0 = 10.0, 6.0


def _staged_value(x):
    # tanh plus a large, late step: E[phi^2] plateaus near 0.6, then jumps near |x| ~ 6
    return np.tanh(x) + _B * np.tanh((x / _X0) ** 3)


def _staged_derivative(x):
    u = (x / _X0) ** 3
    e_u = np.exp(-2.0 * np.abs(u))
    e_x = np.exp(-2.0 * np.abs(x))
    return 4 * e_x / (1 + e_x) ** 2 + _B * 3 * x**2 / _X0**3 * (4 * e_u / (1 + e_u) ** 2)


STAGED = Activation("staged_tanh", _staged_value, _staged_derivative)


def _scipy_variance_map(q, sw, sb):
    # V(q) by scipy.integrate.quad, an integrator independent of propcalc's rule
    val, _ = integrate.quad(lambda z: float(_staged_value(math.sqrt(q) * z)) ** 2
                            * math.exp(-z * z / 2) / math.sqrt(2 * math.pi), -np.inf, np.inf,
                            epsabs=1e-13, epsrel=1e-13, limit=400)
    return sw * val + sb


def test_several_variance_fixed_points_with_stability_and_flow():
    # a formula-free Activation built from numpy functions whose V(q) = q three times at
    # sigma_w2 = 1.5, sigma_b2 = 0.05: the tanh plateau, an unstable middle one, and the
    # plateau of the late step. The roots are found again with scipy (sign scan + brentq on
    # a quad-based V), the slopes against a finite difference of V, and the one reached from
    # a given input by plain iteration of V (the flow itself, 400 layers).
    sw, sb = 1.5, 0.05
    res = propcalc.variance_fixed_points(STAGED, sw, sb)
    qs = [p.q for p in res.points]
    grid = np.geomspace(0.05, 1e3, 60)
    gaps = np.array([_scipy_variance_map(q, sw, sb) - q for q in grid])
    brackets = [(a, b) for a, b, ga, gb in zip(grid[:-1], grid[1:], gaps[:-1], gaps[1:])
                if ga * gb < 0]
    ref = [optimize.brentq(lambda q: _scipy_variance_map(q, sw, sb) - q, a, b, xtol=1e-14,
                           rtol=1e-13) for a, b in brackets]
    assert len(ref) == 3
    # the default rule assumes structure on the scale |x| ~ 1; this bump sits at |x| ~ 6, and
    # at q* = 108 (sqrt(q*) = 10.4) 16 nodes per panel leave 7e-9 relative in V (measured;
    # mpmath agrees with scipy). 32 nodes per panel restore agreement to rounding.
    assert_allclose(qs, ref, rtol=3e-8)
    rule = propcalc.QuadratureRule(n_per_panel=32)
    fine = propcalc.variance_fixed_points(STAGED, sw, sb, rule=rule)
    assert_allclose([p.q for p in fine.points], ref, rtol=1e-12)
    for p in fine.points:
        h = 1e-5 * p.q
        fd = float(maps.variance_map(STAGED, p.q + h, sw, sb, rule)
                   - maps.variance_map(STAGED, p.q - h, sw, sb, rule)) / (2 * h)
        assert p.chi_q == pytest.approx(fd, rel=1e-7)
        assert p.stable == (abs(fd) < 1)
    assert [p.stable for p in res.points] == [True, False, True]
    assert [p.stable for p in fine.points] == [True, False, True]
    # unit-variance inputs: q_start = sw + sb = 1.55 lies between the first two, where V < q,
    # so the flow goes down to the smallest fixed point
    assert res.q_start == pytest.approx(1.55)
    assert res.reached.q == pytest.approx(ref[0], rel=1e-11)
    for q_input, expected in [(1.0, ref[0]), (20.0, ref[2]), (1.7, ref[0]), (1.9, ref[2])]:
        out = propcalc.variance_fixed_points(STAGED, sw, sb, q_input=q_input)
        q = sw * q_input + sb
        for _ in range(400):
            q = float(maps.variance_map(STAGED, q, sw, sb, rule))
        assert q == pytest.approx(expected, rel=1e-9), q_input
        assert out.reached.q == pytest.approx(expected, rel=3e-8), q_input
    p = propcalc.propagation(STAGED, sw, sb)
    assert p.q_star == pytest.approx(ref[0], rel=1e-10)


# ------------------------------------------------------------------------------------------
# no finite fixed point; collapse
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("sb", [0.0, 0.3])
def test_relu_above_he_value_grows_without_bound(sb):
    # V(q) = sw q / 2 + sb: for sw = 2.5 the variance grows by exactly sw / 2 = 1.25 per layer
    p = propcalc.propagation(A("relu"), 2.5, sb)
    fps = p.variance_fixed_points
    assert p.status == "unbounded" and p.phase == "unbounded variance"
    assert p.q_star is None and p.xi_c is None
    assert fps.growth_rate == pytest.approx(1.25, rel=1e-14)
    assert "1.25" in fps.message
    assert p.chi_1 == pytest.approx(1.25, rel=1e-14)


@pytest.mark.parametrize("name", ["gelu", "silu", "swish", "softplus", "mish", "gelu_tanh"])
@pytest.mark.parametrize("sw", [3.0, 5.0, 10.0])
def test_relu_like_activations_at_large_weight_variance_grow(name, sw):
    # these behave like ReLU for |x| -> inf, so V(q) / q -> sw / 2 > 1: no finite fixed point,
    # growth rate sw / 2 (He et al. 2015's ReLU limit)
    p = propcalc.propagation(A(name), sw, 0.0)
    assert p.status == "unbounded" and p.q_star is None
    assert p.variance_fixed_points.growth_rate == pytest.approx(sw / 2, rel=1e-9)


def test_linear_with_bias_at_one_grows_linearly():
    # V(q) = q + sb: no fixed point, growth factor 1, the variance grows by sb per layer
    p = propcalc.propagation(A("linear"), 1.0, 0.2)
    assert p.status == "unbounded"
    assert p.variance_fixed_points.growth_rate == pytest.approx(1.0, rel=1e-14)
    assert "linearly" in p.variance_fixed_points.message


# ------------------------------------------------------------------------------------------
# exactly at the edge of chaos
# ------------------------------------------------------------------------------------------
def _edge_constant(text: str, power: str) -> float:
    match = re.search(r"1 - c_l ~ ([0-9.eE+-]+) / l" + power, text)
    assert match, text
    return float(match.group(1))


def test_relu_edge_approach_constant():
    # Hayou et al. 2019: at sigma_w2 = 2, 1 - c_l ~ 9 pi^2 / (2 l^2) = 44.4132...
    p = propcalc.propagation(A("relu"), 2.0, 0.0)
    assert p.phase == "edge of chaos" and math.isinf(p.xi_c)
    constant = _edge_constant(p.edge_approach, r"\^2")
    assert constant == pytest.approx(9 * math.pi**2 / 2, rel=1e-5)   # printed to 6 digits
    assert constant == pytest.approx(44.41, abs=0.01)
    # and by iterating the map: the arc-cosine kernel (Cho & Saul 2009) in mpmath, 2000 layers
    # from c_0 = 0. With eps_l = 1 - c_l ~ A / l^2, 1/sqrt(eps_{l+1}) - 1/sqrt(eps_l) -> A^(-1/2);
    # that estimate is within 3 / l of A (measured), so 0.3 % at l = 2000
    with mpmath.workdps(30):
        c = mpmath.mpf(0)
        eps = []
        for _ in range(2001):
            c = (mpmath.sqrt(1 - c * c) + (mpmath.pi - mpmath.acos(c)) * c) / mpmath.pi
            eps.append(1 - c)
        estimate = float(1 / (1 / mpmath.sqrt(eps[-1]) - 1 / mpmath.sqrt(eps[-2])) ** 2)
    assert estimate == pytest.approx(9 * math.pi**2 / 2, rel=3e-3)
    # propcalc's own map follows the same orbit (300 layers)
    relu = A("relu")
    c_engine, c_exact = 0.0, mpmath.mpf(0)
    for _ in range(300):
        c_engine = float(maps.correlation_map(relu, c_engine, 2.0, 0.0, 1.0))
        with mpmath.workdps(30):
            c_exact = (mpmath.sqrt(1 - c_exact**2) + (mpmath.pi - mpmath.acos(c_exact)) * c_exact) \
                / mpmath.pi
    assert abs(c_engine - float(c_exact)) < 1e-12


def _mp_expect(f, q):
    sq = mpmath.sqrt(q)
    dens = lambda z: mpmath.exp(-z * z / 2) / mpmath.sqrt(2 * mpmath.pi)  # noqa: E731
    return mpmath.quad(lambda z: f(sq * z) * dens(z), [-mpmath.inf, 0, mpmath.inf])


# phi' and phi'' written again in mpmath, for beta = 2 / C''(1) with
# C''(1) = sigma_w2 q* E[phi''(sqrt(q*) z)^2] (Price 1958 twice, at c = 1 and V(q*) = q*)
SECOND_DERIVATIVES = {
    "tanh": (lambda x: mpmath.sech(x) ** 2, lambda x: -2 * mpmath.tanh(x) * mpmath.sech(x) ** 2),
    "erf": (lambda x: 2 / mpmath.sqrt(mpmath.pi) * mpmath.exp(-x * x),
            lambda x: -4 * x / mpmath.sqrt(mpmath.pi) * mpmath.exp(-x * x)),
    "gelu": (lambda x: mpmath.ncdf(x) + x * mpmath.npdf(x), lambda x: (2 - x * x) * mpmath.npdf(x)),
    "elu": (lambda x: 1 if x > 0 else mpmath.exp(x), lambda x: 0 if x > 0 else mpmath.exp(x)),
}


def _edge_report(name: str, q: float):
    act = A(name)
    cp = propcalc.edge_of_chaos(act, q)
    assert cp.valid
    # start the first layer at q* itself
    p = propcalc.propagation(act, cp.sigma_w2, cp.sigma_b2, q_input=(q - cp.sigma_b2) / cp.sigma_w2)
    assert p.phase == "edge of chaos" and math.isinf(p.xi_c)
    assert p.q_star == pytest.approx(q, rel=1e-12)
    return act, cp, p


@pytest.mark.parametrize("name,q", [("tanh", 1.0), ("tanh", 0.3), ("erf", 1.0), ("gelu", 8.772172),
                                    ("elu", 1.0)])
def test_smooth_edge_approach_constant_is_two_over_c_second_derivative(name, q):
    # Schoenholz et al. 2017 (second-order expansion at c = 1):
    # eps_{l+1} = eps_l - C''(1)/2 eps_l^2, so 1 - c_l ~ beta / l with beta = 2 / C''(1);
    # C''(1) from Price 1958 in mpmath (30 digits).
    # Closed form for erf: C''(1) = 4 q^2 / (1 + 4 q), beta = (1 + 4q) / (2 q^2) = 2.5 at q = 1.
    # propcalc's Richardson-extrapolated difference quotient for C''(1) is good to ~1e-4.
    act, cp, p = _edge_report(name, q)
    d1, d2 = SECOND_DERIVATIVES[name]
    with mpmath.workdps(30):
        qm = mpmath.mpf(q)
        sw = 1 / _mp_expect(lambda x: d1(x) ** 2, qm)
        beta = float(2 / (sw * qm * _mp_expect(lambda x: d2(x) ** 2, qm)))
    if name == "erf":
        assert beta == pytest.approx((1 + 4 * q) / (2 * q * q), rel=1e-14)
    assert _edge_constant(p.edge_approach, "") == pytest.approx(beta, rel=1e-3)


def test_smooth_edge_approach_constant_to_printed_precision():
    act, cp, p = _edge_report("erf", 1.0)
    assert _edge_constant(p.edge_approach, "") == pytest.approx(2.5, rel=1e-5)


@pytest.mark.parametrize("name,q", [("tanh", 1.0), ("erf", 1.0), ("gelu", 8.772172)])
def test_smooth_edge_approach_against_iterating_the_map(name, q):
    # iterate propcalc.meanfield.maps.correlation_map at the edge for 400 layers from c_0 = 0; with
    # eps_l ~ beta / l, 1 / (1/eps_{l+1} - 1/eps_l) -> beta, within ~2.6 / l of it (measured:
    # 0.64 % tanh, 0.45 % erf, 0.85 % gelu at l = 400)
    act, cp, p = _edge_report(name, q)
    beta = _edge_constant(p.edge_approach, "")
    c, eps = 0.0, []
    for _ in range(400):
        c = float(maps.correlation_map(act, c, cp.sigma_w2, cp.sigma_b2, p.q_star))
        eps.append(1.0 - c)
    assert all(0 < e1 < e0 for e0, e1 in zip(eps[:-1], eps[1:]))   # monotone, polynomial
    estimate = 1.0 / (1.0 / eps[-1] - 1.0 / eps[-2])
    assert estimate == pytest.approx(beta, rel=1.5e-2)
    assert 400 * eps[-1] == pytest.approx(beta, rel=5e-2)


# ------------------------------------------------------------------------------------------
# the edge-of-chaos line
# ------------------------------------------------------------------------------------------
ROUND_TRIP = ["tanh", "erf", "elu", "selu", "gelu", "silu", "mish", "hard_tanh"]


@pytest.mark.parametrize("name", ["gelu", "silu"])
@pytest.mark.parametrize("q", [0.02, 0.2, 0.5])
def test_gelu_silu_edge_at_small_bias_does_not_attract(name, q):
    # on the edge-of-chaos line at small q* (small sigma_b2), chi_q = V'(q*) > 1: the variance
    # fixed point repels. chi_q checked against a central difference of V.
    act = A(name)
    cp = propcalc.edge_of_chaos(act, q)
    assert cp.valid and 0 <= cp.sigma_b2 < 0.05
    h = 1e-5 * q
    fd = float(maps.variance_map(act, q + h, cp.sigma_w2, cp.sigma_b2)
               - maps.variance_map(act, q - h, cp.sigma_w2, cp.sigma_b2)) / (2 * h)
    assert cp.chi_q == pytest.approx(fd, rel=1e-7)
    assert cp.chi_q > 1 and not cp.stable
    assert "does not attract" in cp.message
    # the same point found from its bias
    points = propcalc.edge_of_chaos_at_bias(act, cp.sigma_b2)
    match = [p for p in points if abs(p.q_star - q) <= 1e-8 * q]
    assert match and not match[0].stable and match[0].chi_q > 1


@pytest.mark.parametrize("name", ROUND_TRIP)
@pytest.mark.parametrize("sb", [1e-3, 0.05, 0.3])
def test_edge_at_bias_round_trips(name, sb):
    # each point returned for a fixed sigma_b2 lies on the line: edge_of_chaos(q*) gives the
    # same (sigma_w2, sigma_b2), V(q*) = q* and chi_1 = 1 (Poole et al. 2016; Schoenholz 2017)
    act = A(name)
    points = propcalc.edge_of_chaos_at_bias(act, sb)
    assert points
    for cp in points:
        assert cp.sigma_b2 == pytest.approx(sb, rel=1e-12)
        back = propcalc.edge_of_chaos(act, cp.q_star)
        assert back.sigma_w2 == pytest.approx(cp.sigma_w2, rel=1e-12)
        assert back.sigma_b2 == pytest.approx(sb, rel=1e-11)
        v = float(maps.variance_map(act, cp.q_star, cp.sigma_w2, sb))
        assert v == pytest.approx(cp.q_star, rel=1e-12)
        assert float(maps.chi_1(act, cp.q_star, cp.sigma_w2)) == pytest.approx(1.0, rel=1e-12)


@pytest.mark.parametrize("name", ROUND_TRIP)
@pytest.mark.parametrize("q", [0.02, 0.3, 3.0])
def test_edge_from_q_star_round_trips_through_its_bias(name, q):
    # edge_of_chaos(q*) -> sigma_b2 -> edge_of_chaos_at_bias(sigma_b2) contains q* again
    act = A(name)
    cp = propcalc.edge_of_chaos(act, q)
    assert cp.valid
    if cp.sigma_b2 < 1e-10:
        # hard_tanh at q* = 0.02 is linear up to 1e-12 (P(|z| > 7)): sigma_b2 ~ 0 for every
        # small q*, so the point is not determined by its bias
        pytest.skip("the line is flat at sigma_b2 = 0 here")
    found = [p.q_star for p in propcalc.edge_of_chaos_at_bias(act, cp.sigma_b2)]
    assert any(abs(f - q) <= 1e-10 * q for f in found), found


@pytest.mark.parametrize("name", ["tanh", "gelu", "erf"])
@pytest.mark.parametrize("q", [0.1, 1.0, 10.0])
def test_edge_from_q_star_on_a_scan_grid_point_round_trips(name, q):
    act = A(name)
    cp = propcalc.edge_of_chaos(act, q)
    found = [p.q_star for p in propcalc.edge_of_chaos_at_bias(act, cp.sigma_b2)]
    assert any(abs(f - q) <= 1e-10 * q for f in found), found


@pytest.mark.parametrize("sb", [1e-3, 0.05, 0.3, 2.0])
def test_erf_edge_closed_form(sb):
    # erf (Williams 1997): E[erf'(sqrt(q) z)^2] = (4/pi) / sqrt(1 + 4q), so on the line
    # sigma_w2 = pi sqrt(1 + 4q) / 4, sigma_b2 = q - sigma_w2 (2/pi) arcsin(2q / (1 + 2q)), and
    # (derived: d/dq arcsin(2q/(1+2q)) = 2 / ((1 + 2q) sqrt(1 + 4q))) chi_q = 1 / (1 + 2q)
    def line_bias(q):
        return q - math.pi * math.sqrt(1 + 4 * q) / 4 * 2 / math.pi * math.asin(2 * q / (1 + 2 * q))

    q = optimize.brentq(lambda x: line_bias(x) - sb, 1e-6, 1e3, xtol=1e-15, rtol=1e-15)
    (cp,) = propcalc.edge_of_chaos_at_bias(A("erf"), sb)
    assert cp.q_star == pytest.approx(q, rel=1e-11)
    assert cp.sigma_w2 == pytest.approx(math.pi * math.sqrt(1 + 4 * q) / 4, rel=1e-12)
    assert cp.chi_q == pytest.approx(1 / (1 + 2 * q), rel=1e-11)
    assert cp.stable


def test_edge_of_chaos_invalid_where_bias_would_be_negative():
    # phi(0) != 0 (sigmoid, softplus): sigma_b2 = q* - sw E[phi^2] < 0 on the whole line
    for name in ("sigmoid", "softplus"):
        cp = propcalc.edge_of_chaos(A(name), 1.0)
        assert not cp.valid and cp.sigma_b2 is None and "< 0" in cp.message


# ------------------------------------------------------------------------------------------
# depth scales and NaN-freedom
# ------------------------------------------------------------------------------------------
def test_depth_scale_formula():
    # xi = -1 / ln(slope) (Schoenholz et al. 2017, eqs. 6 and 9), inf at 1, 0 at 0
    for s in (1e-3, 0.3, 0.9, 0.999999):
        assert core.depth_scale(s) == pytest.approx(-1.0 / math.log(s), rel=1e-15)
    assert math.isinf(core.depth_scale(1.0))
    assert core.depth_scale(0.0) == 0.0


def test_gradient_growth_is_chi_1_to_the_depth():
    # Schoenholz et al. 2017: squared gradient norms change by chi_1^L over L layers
    p = propcalc.propagation(A("tanh"), 1.5, 0.3, depth=50)
    assert p.gradient_growth == pytest.approx(p.chi_1**50, rel=1e-12)


@pytest.mark.parametrize("name", propcalc.builtin_names())
def test_propagation_never_returns_nan(name):
    # RULES item 4: no NaN anywhere in the report (jsonable raises on NaN), over the plane
    act = A(name)
    for sw in (0.1, 1.0, 2.0, 4.0, 50.0):
        for sb in (0.0, 1e-6, 0.1, 3.0):
            p = propcalc.propagation(act, sw, sb, depth=10)
            propcalc.jsonable(p.to_dict())
            for value in (p.q_star, p.chi_q, p.chi_1, p.c_star, p.chi_c, p.xi_c):
                assert value is None or not math.isnan(value)
    for q in (1e-3, 1.0, 30.0):
        propcalc.jsonable(propcalc.edge_of_chaos(act, q).to_dict())
    for sb in (0.0, 0.05):
        for cp in propcalc.edge_of_chaos_at_bias(act, sb):
            propcalc.jsonable(cp.to_dict())


# ------------------------------------------------------------------------------------------
# the chaotic fixed point near c = 1 for a smooth activation without a closed form
# ------------------------------------------------------------------------------------------
def _nested_quad_map(act, c, sw, sb, q):
    """C(c) by nested scipy.integrate.quad over (z1, z2) in [-10, 10]^2, split where u1 = 0
    and u2 = 0 (Poole et al. 2016, eq. 5)."""
    s, sq = math.sqrt((1 - c) * (1 + c)), math.sqrt(q)

    def f(z2, z1):
        u = np.array([sq * z1, sq * (c * z1 + s * z2)])
        v = act.value(u)
        return float(v[0] * v[1]) * math.exp(-0.5 * (z1 * z1 + z2 * z2)) / (2 * math.pi)

    def inner(z1):
        cut = -c * z1 / s
        return integrate.quad(f, -10, 10, args=(z1,), points=[cut] if -10 < cut < 10 else None,
                              epsabs=1e-14, epsrel=1e-11, limit=200)[0]

    with warnings.catch_warnings():  # QUADPACK's roundoff notices; its error estimate is checked
        warnings.simplefilter("ignore", integrate.IntegrationWarning)
        pair, err = integrate.quad(inner, -10, 10, points=[0.0], epsabs=1e-13, epsrel=1e-11,
                                   limit=200)
        second = integrate.quad(lambda z: float(act.value(np.array([sq * z]))[0]) ** 2
                                * math.exp(-0.5 * z * z) / math.sqrt(2 * math.pi), -10, 10,
                                points=[0.0], epsabs=1e-15, epsrel=1e-13, limit=200)[0]
    assert err < 2e-12 * abs(pair)  # relative: E[phi^2] is ~13 at q = 26
    return (sw * pair + sb) / (sw * second + sb)


def test_gelu_tanh_chaotic_fixed_point_near_one_is_a_fixed_point_of_scipys_map():
    # gelu_tanh at (1.99, 0.2): q* ~ 26 and c* ~ 0.9903, where neither Hermite pass certifies
    # c*; the 640-term guess is polished by the 2-D rule. Checked with nested scipy quad:
    # C(c*) - c* vanishes to its tolerance (Poole et al. 2016, eq. 5 defines C)
    act = A("gelu_tanh")
    p = propcalc.propagation(act, 1.99, 0.2)
    assert 0.99 < p.c_star < 0.991
    assert abs(_nested_quad_map(act, p.c_star, 1.99, 0.2, p.q_star) - p.c_star) < 2e-12


def test_gelu_chaotic_fixed_point_near_one_to_rounding():
    # gelu at (1.99, 0.2): q* ~ 26, c* ~ 0.9903, 1 - C'(c*) ~ 0.012, so a point where
    # C(c) - c sits at its rounding floor (4e-15) can still be 3e-13 from c*; the engine takes
    # the Newton step from there. Reference: mpmath at 24 digits (a 1-D mpmath.quad whose inner
    # Gaussian expectation E[X Phi(X)], X normal, is in closed form; Brent's method on
    # C(c) - c), the reference of tests/benchmarks/bench_engine.py section B, printed there to
    # 15 digits
    p = propcalc.propagation(A("gelu"), 1.99, 0.2)
    assert p.c_star == pytest.approx(0.990304334649275, rel=2e-14)
    assert p.chi_c == pytest.approx(0.987646376955238, rel=3e-14)


@pytest.mark.parametrize("guess", [None, 0.0, 0.5, 0.98, 0.990303, 0.9903033, 0.9904, 0.999,
                                   1.0, math.nan])
def test_correlation_fixed_point_warm_start_reaches_the_same_root(guess):
    # internal consistency (no outside source): any guess, left or right of the root or
    # useless, gives the cold-start answer
    act = A("gelu_tanh")
    q = propcalc.propagation(act, 1.99, 0.2).q_star
    rule = DEFAULT_RULE
    cold = correlation.correlation_fixed_point(act, 1.99, 0.2, q, rule)
    warm = correlation.correlation_fixed_point(act, 1.99, 0.2, q, rule, guess=guess)
    # both stop where |C(c) - c| <= 4e-15 (the rounding floor of C), so they may differ by
    # up to 4e-15 / (1 - C'(c*)) in c*
    assert warm[0] == pytest.approx(cold[0], abs=4e-15 / (1 - cold[1]))
    assert warm[1] == pytest.approx(cold[1], rel=1e-12)


def test_two_fixed_points_closer_than_the_grid_step_are_both_found():
    # mish at sigma_b2 = 0.1 near its edge: V(q) - q has two roots (1.7716, attracting, and
    # 2.0899, repelling) inside one step of the log grid, with no sign change on the grid.
    # Reference: Brent's method on V(q) - q with E[mish(sqrt(q) z)^2] by scipy.integrate.quad
    act = A("mish")
    sw, sb = 2.006854569646388, 0.1

    def gap(q):
        m2 = integrate.quad(lambda z: float(act.value(np.array([math.sqrt(q) * z]))[0]) ** 2
                            * math.exp(-0.5 * z * z) / math.sqrt(2 * math.pi), -12, 12,
                            points=[0.0], epsabs=1e-15, epsrel=1e-13, limit=200)[0]
        return sw * m2 + sb - q

    ref = [optimize.brentq(gap, 1.6, 1.95, xtol=1e-14), optimize.brentq(gap, 1.95, 2.2, xtol=1e-14)]
    for q_input in (0.5, 0.9):
        p = propcalc.propagation(act, sw, sb, q_input=q_input)
        qs = [fp.q for fp in p.variance_fixed_points.points]
        assert qs == pytest.approx(ref, rel=1e-12)
        assert [fp.stable for fp in p.variance_fixed_points.points] == [True, False]
        assert p.q_star == pytest.approx(ref[0], rel=1e-12)  # flows up to the attracting one
    # started above the repelling one, the variance grows without bound
    assert propcalc.propagation(act, sw, sb, q_input=1.0).q_star is None


def test_series_curvature_and_its_bound_against_williams():
    # C''(c) for erf from Williams 1997 eq. (11): C(c) = (sw (2/pi) arcsin(r c) + sb) / V with
    # r = 2q / (1 + 2q), so C''(c) = sw (2/pi) r^3 c / (1 - r^2 c^2)^(3/2) / V. The series'
    # curvature (erf without its closed-form smoothing, so the series is what runs) must match
    # it and its bound must not be below the exact value a little to the right of c*.
    from propcalc.numerics.hermite import SERIES_PASSES
    from propcalc.meanfield.correlation import series_fixed_points
    erf = A("erf")
    twin = Activation(name="erf", value_fn=erf.value_fn, derivative_fn=erf.derivative_fn,
                      declared_scale=1.0)
    for sw, sb in [(2.0, 0.1), (4.0, 0.05), (10.0, 0.3)]:
        q = propcalc.propagation(erf, sw, sb).q_star
        for kmax, rule in SERIES_PASSES:
            c, slope, ok, curv, bound = series_fixed_points(
                twin, np.array([sw]), np.array([sb]), np.array([q]), kmax, rule, curvature=True)
            r = 2 * q / (1 + 2 * q)
            v = sw * (2 / np.pi) * math.asin(r) + sb

            def exact(x):
                return sw * (2 / np.pi) * r**3 * x / (1 - (r * x) ** 2) ** 1.5 / v

            assert float(curv[0]) == pytest.approx(exact(float(c[0])), rel=1e-6)
            assert float(bound[0]) >= exact(float(c[0]) + 1e-6) * (1 - 1e-12)


@pytest.mark.parametrize("name,sw,sb", [("gelu_tanh", 1.99, 0.2), ("sigmoid", 129.06, 0.1),
                                        ("tanh", 40.0, 0.5)])
def test_one_step_polish_reaches_the_cold_start_root(name, sw, sb):
    # internal consistency (no outside source): the series guess polished by one Newton step
    # under the curvature bound equals the bracketing solver from c = 0, to the stopping rule
    from propcalc.numerics.hermite import SERIES_PASSES
    from propcalc.meanfield.correlation import series_fixed_points
    act = A(name)
    q = propcalc.propagation(act, sw, sb).q_star
    kmax, rule = SERIES_PASSES[-1]
    c, _, _, curv, bound = series_fixed_points(act, np.array([sw]), np.array([sb]),
                                               np.array([q]), kmax, rule, curvature=True)
    cold = correlation.correlation_fixed_point(act, sw, sb, q, DEFAULT_RULE)
    warm = correlation.correlation_fixed_point(act, sw, sb, q, DEFAULT_RULE, guess=float(c[0]),
                                               curvature=(float(curv[0]), float(bound[0])))
    assert warm[0] == pytest.approx(cold[0], abs=4e-15 / (1 - cold[1]))
    assert warm[1] == pytest.approx(cold[1], rel=1e-12)


# ------------------------------------------------------------------------------------------
# values that mean 0, and the bias the user asked for (issue 12, section 2)
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("q_star", [0.01, 1.0, 37.0])
def test_relu_edge_bias_is_exactly_zero(q_star):
    # He et al. 2015, eq. (10): relu is critical at sigma_w2 = 2 with sigma_b2 = 0 exactly, for
    # every q*; the line's difference q* - 2 E[relu^2] rounded to 2.2e-16 before
    cp = propcalc.edge_of_chaos("relu", q_star)
    assert cp.sigma_w2 == pytest.approx(2.0, rel=1e-15)
    assert cp.sigma_b2 == 0.0
    assert "sigma_b2 = 0;" in cp.message


@pytest.mark.parametrize("name,sigma_b2", [("tanh", 0.05), ("tanh", 0.1), ("gelu", 0.3),
                                           ("erf", 0.02)])
def test_edge_at_bias_returns_the_bias_asked_for(name, sigma_b2):
    # the bias is the input: returned exactly (0.04999999999999993 before); the point is on the
    # line to rounding: sigma_b2(q*) from edge_of_chaos at the returned q* (Poole et al. 2016)
    for cp in propcalc.edge_of_chaos_at_bias(name, sigma_b2):
        assert cp.sigma_b2 == sigma_b2
        again = propcalc.edge_of_chaos(name, cp.q_star)
        assert again.sigma_b2 == pytest.approx(sigma_b2, rel=1e-12)
        assert again.sigma_w2 == cp.sigma_w2


# ------------------------------------------------------------------------------------------
# an oscillating formula on the edge of chaos (issue 12, section 1)
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("q_star", [1.5, 6.0])
def test_sine_plus_linear_edge_of_chaos(q_star):
    # phi = sin(2x) + x/2: E[phi'^2] = 2 (1 + e^(-8q)) + 2 e^(-2q) + 1/4,
    # E[phi^2] = (1 - e^(-8q)) / 2 + 2 q e^(-2q) + q / 4 and
    # d/dq E[phi^2] = 4 e^(-8q) + 2 e^(-2q) - 4 q e^(-2q) + 1/4 (Gaussian characteristic
    # function and Stein's identity E[x sin(2x)] = 2 q E[cos 2x]), by mpmath at 30 digits.
    # It missed chi_q by 4e-10 at q* = 1.5 and q* by 4e-7 at 6 (the c* solve then failed)
    with mpmath.workdps(30):
        q = mpmath.mpf(q_star)
        e2, e8 = mpmath.exp(-2 * q), mpmath.exp(-8 * q)
        sw = 1 / (2 * (1 + e8) + 2 * e2 + mpmath.mpf(1) / 4)
        sb = q - sw * ((1 - e8) / 2 + 2 * q * e2 + q / 4)
        chi_q = sw * (4 * e8 + 2 * e2 - 4 * q * e2 + mpmath.mpf(1) / 4)
        sw, sb, chi_q = float(sw), float(sb), float(chi_q)
    cp = propcalc.edge_of_chaos("sin(2*x) + 0.5*x", q_star)
    assert cp.sigma_w2 == pytest.approx(sw, rel=1e-13)
    assert cp.sigma_b2 == pytest.approx(sb, rel=1e-13)
    assert cp.chi_q == pytest.approx(chi_q, rel=1e-12)
    p = propcalc.propagation("sin(2*x) + 0.5*x", sw, sb)
    assert p.q_star == pytest.approx(q_star, rel=1e-13)
    assert p.chi_q == pytest.approx(chi_q, rel=1e-12)
    assert abs(p.chi_1 - 1.0) <= 1e-13


@pytest.mark.parametrize("sw,sb", [(4.0, 0.1), (40.0, 1.0)])
def test_sine_chaotic_fixed_points(sw, sb):
    # sin: V(q) = sigma_w2 (1 - e^(-2q)) / 2 + sigma_b2 and C(c) = (sigma_w2 e^(-q) sinh(q c)
    # + sigma_b2) / q* (characteristic functions, as above); roots by mpmath.findroot
    p = propcalc.propagation("sin(x)", sw, sb)
    with mpmath.workdps(30):
        w, b = mpmath.mpf(sw), mpmath.mpf(sb)
        q = mpmath.findroot(lambda t: w * -mpmath.expm1(-2 * t) / 2 + b - t, p.q_star)
        c = mpmath.findroot(lambda t: (w * mpmath.exp(-q) * mpmath.sinh(q * t) + b) / q - t,
                            p.c_star)
        chi_c = float(w * mpmath.exp(-q) * mpmath.cosh(q * c))
    assert p.q_star == pytest.approx(float(q), rel=1e-13)
    assert p.c_star == pytest.approx(float(c), abs=1e-14)
    assert p.chi_c == pytest.approx(chi_c, rel=1e-12, abs=1e-15)


# ------------------------------------------------------------------------------------------
# the edge-of-chaos band: a printed point pasted back keeps its verdict (issue 12, section 1)
# ------------------------------------------------------------------------------------------
def _rounded(x, digits=6):
    return float(f"{x:.{digits}g}")


@pytest.mark.parametrize("name", ["tanh", "erf", "hard_tanh", "sin(2*x) + 0.5*x",
                                  "tanh(2*x) + 0.1*x"])
def test_rounded_critical_point_keeps_the_verdict(name):
    # a critical point (chi_1 = 1 on the line of Poole et al. 2016 / Schoenholz et al. 2017)
    # printed to 6 significant digits moves chi_1 by up to ~1e-6 (tanh 8e-7, erf 1.3e-6): the
    # documented band vocabulary.EDGE_BAND = 1e-5 keeps "edge of chaos", and the depth scale
    # it hides is still reported (xi_c > 1e5 layers)
    assert propcalc.EDGE_BAND == 1e-5
    cp = propcalc.edge_of_chaos(name, 0.5)
    if not cp.valid:
        pytest.skip("no critical point at q* = 0.5")
    assert cp.stable  # a repelling q* is left by any perturbation, rounding included
    p = propcalc.propagation(name, _rounded(cp.sigma_w2), _rounded(cp.sigma_b2))
    assert p.phase == "edge of chaos"
    assert abs(p.chi_1 - 1.0) <= propcalc.EDGE_BAND
    assert p.xi_c is None or p.xi_c > 1e5


def test_rounded_plan_of_issue_12_keeps_the_verdict():
    # issue 12: the plan for x * tanh(softplus(x)) said "edge of chaos" and the same point
    # rounded to 6 digits was "chaotic, xi_c = 1.8e6"
    name = "x * tanh(softplus(x))"
    plan = propcalc.recommend(name, depth=20)
    exact = propcalc.propagation(name, plan.sigma_w2, plan.sigma_b2)
    pasted = propcalc.propagation(name, _rounded(plan.sigma_w2), _rounded(plan.sigma_b2))
    assert exact.phase == pasted.phase == "edge of chaos"
    assert pasted.xi_c > 1e5 and any("edge-of-chaos band" in n for n in pasted.notes)


def test_band_does_not_hide_the_phase_beyond_it():
    # tanh at sigma_b2 = 0.05, 1.001 times its critical sigma_w2: chi_1 - 1 ~ 5e-4, chaotic;
    # 0.999 times: ordered (Poole et al. 2016, fig. 2)
    cp = propcalc.edge_of_chaos_at_bias("tanh", 0.05)[0]
    assert propcalc.propagation("tanh", cp.sigma_w2 * 1.001, 0.05).phase == "chaotic"
    assert propcalc.propagation("tanh", cp.sigma_w2 * 0.999, 0.05).phase == "ordered"


# ------------------------------------------------------------------------------------------
# the chaotic c* at a large q* and the marginal fixed point q = 0 (issue 12, section 1)
# ------------------------------------------------------------------------------------------
def test_gelu_chaotic_fixed_point_at_large_variance():
    # gelu at (1.99, 2): q* = 396; c* was off by 7e-12 and xi_c by 1.5e-7 without the final
    # Newton step. Reference: mpmath at 30 digits, C(c) as the 1-D integral
    # E[gelu(u1) S(c u1, q (1 - c^2))] with S(m, v) = m Phi(m / r) + v varphi(m / r) / r,
    # r = sqrt(1 + v) (E[X Phi(X)] for X ~ N(m, v), by Stein's identity), roots by findroot
    p = propcalc.propagation("gelu", 1.99, 2.0)
    assert p.q_star == pytest.approx(396.262049610320987438403069588, rel=1e-13)
    gap = 1.0 - 0.999905793352040328530373222998  # 9.42066e-5, to 1e-17 in a double
    assert p.gap == pytest.approx(gap, rel=1e-11)
    assert p.chi_c == pytest.approx(0.99944220610710784123698503228, rel=1e-14)
    assert p.xi_c == pytest.approx(1792.27684249989797505183560346, rel=1e-10)


def test_gelu_marginal_zero_fixed_point_repels():
    # gelu at sigma_w2 = 4, sigma_b2 = 0: chi_q(0) = 4 phi'(0)^2 = 1 exactly, so the slope
    # decides nothing; V(q) = q + 6 q^2 / pi + O(q^3) (gelu(x) = x / 2 + x^2 / sqrt(2 pi) + O(x^4),
    # E[z^4] = 3), so q = 0 repels (it was marked attracting with chi_q = 0.9999999999999998)
    fps = propcalc.variance_fixed_points("gelu", 4.0, 0.0)
    zero = [fp for fp in fps.points if fp.q == 0.0]
    assert zero and not zero[0].stable
    assert abs(zero[0].chi_q - 1.0) <= propcalc.NEUTRAL_TOLERANCE
    q = 1e-4
    v = float(propcalc.meanfield.maps.variance_map(A("gelu"), q, 4.0, 0.0))
    assert v - q == pytest.approx(6 * q * q / math.pi, rel=1e-3)


# ------------------------------------------------------------------------------------------
# xi_c near the edge of chaos, on the chaotic side (issue 12, section 1)
# ------------------------------------------------------------------------------------------
#: (activation, sigma_w2, sigma_b2, 1 - c*, xi_c): the critical point at q* = 1 with sigma_w2
#: raised by 1e-5 and 1e-7 (relative); mpmath at 40 digits with the inner expectation in closed
#: form (clip, max(x, -0.5): truncated normal moments, Johnson, Kotz & Balakrishnan 1994,
#: 10.1; erf: E[erf(m + s z)] = erf(m / sqrt(1 + 2 s^2)), Williams 1997), the fixed point of
#: 1 - C(1 - e) = e by findroot and chi_c = d(1 - C)/de by a central difference at 40 digits.
#: Before, xi_c here lost up to all its digits (hard_tanh 22%, max(x, -0.5) 96%).
NEAR_EDGE = [
    ("hard_tanh", 1.464809421439279, 0.2440801317356628, "5.442687038793189432911177e-10", "321523.3910957636895172222"),
    ("hard_tanh", 1.4647949199710215, 0.2440801317356628, "5.442892266973699951976818e-14", "32152270.63007363797637688"),
    ("max(x, -0.5)", 1.4462245689483866, 0.14302769020668737, "8.905434769711041115439099e-10", "349950.9597288487477982327"),
    ("max(x, -0.5)", 1.4462102514683288, 0.14302769020668737, "8.905870820182084151676821e-14", "34994780.88935457848853706"),
    ("erf", 1.7562212447970011, 0.18413967780745688, "0.00001276197340605452886305563", "195895.7585923602197663673"),
    ("erf", 1.7562038583805417, 0.18413967780745688, "0.0000001276209273766237054424562", "19589264.98973769548212845"),
]


@pytest.mark.parametrize("name,sw,sb,gap,xi_c", NEAR_EDGE)
def test_xi_c_near_the_edge_keeps_its_digits(name, sw, sb, gap, xi_c):
    from propcalc.meanfield.core import propagate
    p = propcalc.propagation(name, sw, sb)
    gap, xi_c = float(gap), float(xi_c)
    assert p.gap == pytest.approx(gap, rel=2e-7)
    err = abs(p.xi_c - xi_c) / xi_c
    core = propagate(A(name), np.array([sw]), np.array([sb]))
    # the reported uncertainty covers the error, and is at most 1e-6
    assert err <= float(core.xi_c_error[0]) <= 1e-6
    if float(core.xi_c_error[0]) > propcalc.meanfield.report.XI_C_DIGITS_NOTE:
        assert any("significant digits only" in n for n in p.notes)


def test_a_fixed_point_lost_in_rounding_is_said_so_not_called_a_collapse():
    # tanh(x)^2 = x^2 - 2 x^4 / 3 + ... (Taylor series), so at sigma_w2 = 1 the variance map is
    # V(q) = q - 2 q^2 + O(q^3) + sigma_b2 and q* ~ sqrt(sigma_b2 / 2) = 7e-51 for
    # sigma_b2 = 1e-100: V(q) - q ~ 1e-100 there, far below the rounding of V(q) (~q * 1e-16).
    # The variance cannot fall below sigma_b2, so "falls below 1e-101" was wrong.
    with pytest.raises(propcalc.ComputationError,
                       match="cannot be resolved in double precision") as err:
        propcalc.propagation("tanh", 1.0, 1e-100)
    assert "falls below" not in str(err.value)
