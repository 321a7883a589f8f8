"""Tests of propcalc.meanfield.maps against closed forms from the literature and exact properties.

References used below
---------------------
* Cho & Saul 2009, "Kernel methods for deep learning", eq. (6)-(7): the arc-cosine kernels.
  Degree 1: E[relu(u1) relu(u2)] = q / (2 pi) (sqrt(1 - c^2) + (pi - arccos c) c);
  degree 0: E[H(u1) H(u2)] = (pi - arccos c) / (2 pi).
* Williams 1997, "Computing with infinite networks", eq. (11):
  E[erf(u1) erf(u2)] = (2/pi) arcsin(2 S12 / sqrt((1 + 2 S11)(1 + 2 S22))).
* Sheppard 1899: P(u1 > 0, u2 > 0) = 1/4 + arcsin(c) / (2 pi).
* Price 1958: d/dS12 E[f(u1) g(u2)] = E[f'(u1) g'(u2)] (for distributional derivatives too).
* Klambauer et al. 2017, "Self-normalizing neural networks", eq. (14): SELU's constants make
  E[selu(z)] = 0 and E[selu(z)^2] = 1.
* He et al. 2015, "Delving deep into rectifiers", eq. (10): ReLU preserves variance at
  sigma_w2 = 2; for a leaky slope a, sigma_w2 = 2 / (1 + a^2).
* Poole et al. 2016 eqs. (3), (5) and Schoenholz et al. 2017 eq. (8) for the maps and chi_1.
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc import Activation
from propcalc.meanfield import maps
from propcalc.activations.builtins import SELU_ALPHA, SELU_SCALE
from propcalc.numerics.quadrature import bivariate_expectation

A = propcalc.activation

# many correlations in [-1, 1], with the ends approached to 1e-10
# absolute tolerance on map values in [-1, 1]: the engine's target is 1e-12 (smooth) and
# 1e-10 (piecewise) relative (DESIGN.md); measured errors are at most 1.3e-14 (near c = 1)
ATOL = 3e-14

C_GRID = np.unique(np.concatenate([
    np.linspace(-1.0, 1.0, 41),
    [-1 + 1e-10, -1 + 1e-6, -0.999, -0.5 - 1e-12, -0.5 + 1e-12, 0.5 - 1e-12, 0.5 + 1e-12,
     0.999, 1 - 1e-6, 1 - 1e-8, 1 - 1e-10],
]))


def _mp_map(fn, c):
    """fn evaluated in mpmath at 30 digits on the exact binary value of each c.

    The closed forms below lose digits in floating point near c = +-1 (sqrt(1 - c^2),
    arccos, arcsin: 1e-13 absolute at c = 1 - 1e-8), so the references are computed in mpmath.
    """
    with mpmath.workdps(30):
        out = [float(fn(mpmath.mpf(float(x)))) for x in np.ravel(np.asarray(c, dtype=float))]
    return np.asarray(out).reshape(np.shape(c))


def arccos_kernel_1(c):
    """Cho & Saul 2009, degree 1, normalised to J(1) = 1: (sqrt(1-c^2) + (pi - arccos c) c) / pi."""
    return _mp_map(lambda m: (mpmath.sqrt(1 - m * m) + (mpmath.pi - mpmath.acos(m)) * m)
                   / mpmath.pi, c)


def arccos_kernel_0(c):
    """Cho & Saul 2009, degree 0: 2 E[H(u1) H(u2)] = (pi - arccos c) / pi."""
    return _mp_map(lambda m: (mpmath.pi - mpmath.acos(m)) / mpmath.pi, c)


def sheppard(c):
    """Sheppard 1899: P(u1 > 0, u2 > 0) = 1/4 + arcsin(c) / (2 pi)."""
    return _mp_map(lambda m: mpmath.mpf(1) / 4 + mpmath.asin(m) / (2 * mpmath.pi), c)


# ------------------------------------------------------------------------------------------
# ReLU: the arc-cosine kernel (Cho & Saul 2009)
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("q", [1e-4, 0.3, 1.0, 7.0, 1e4])
def test_relu_correlation_map_is_the_arc_cosine_kernel(q):
    # Cho & Saul 2009, eq. (6) with n = 1; at sigma_w2 = 2, sigma_b2 = 0 every q is a fixed
    # point and C(c) = J_1(c) / pi exactly. Required 1e-10 (issue); measured ~3e-15.
    got = maps.correlation_map(A("relu"), C_GRID, 2.0, 0.0, q)
    assert_allclose(got, arccos_kernel_1(C_GRID), rtol=0, atol=ATOL)


@pytest.mark.parametrize("sw,sb,q", [(1.3, 0.2, 0.5), (2.0, 1.0, 3.0), (0.7, 0.0, 2.0)])
def test_relu_correlation_map_with_bias_and_off_fixed_point(sw, sb, q):
    # C(c) = (sw q J_1(c) / 2 + sb) / V(q), V(q) = sw q / 2 + sb (Cho & Saul 2009 eq. 6;
    # Poole et al. 2016 eq. 5 with the denominator V(q) for q off the fixed point)
    expected = (sw * q * arccos_kernel_1(C_GRID) / 2 + sb) / (sw * q / 2 + sb)
    got = maps.correlation_map(A("relu"), C_GRID, sw, sb, q)
    assert_allclose(got, expected, rtol=0, atol=ATOL)


def test_relu_correlation_slope_is_the_degree_0_kernel():
    # Price 1958: C'(c) = sw q E[H(u1) H(u2)] / V(q), and E[H(u1) H(u2)] = (pi - arccos c) / (2 pi)
    # (Cho & Saul 2009, degree 0). At sw = 2, sb = 0: C'(c) = (pi - arccos c) / pi.
    got = maps.correlation_map_slope(A("relu"), C_GRID, 2.0, 0.0, 1.0)
    assert_allclose(got, arccos_kernel_0(C_GRID), rtol=0, atol=ATOL)


def test_relu_near_one_resolves_one_minus_c():
    # the difference form keeps 1 - C(c) accurate: with c = 1 - d, 1 - C = d - (2 sqrt 2 / (3 pi))
    # d^(3/2) + ... ; compared with the kernel evaluated in mpmath at 40 digits
    relu = A("relu")
    for d in [1e-2, 1e-4, 1e-6, 1e-8]:
        with mpmath.workdps(40):
            c = mpmath.mpf(1) - mpmath.mpf(d)
            exact = 1 - (mpmath.sqrt(1 - c * c) + (mpmath.pi - mpmath.acos(c)) * c) / mpmath.pi
        got = 1.0 - float(maps.correlation_map(relu, 1.0 - d, 2.0, 0.0, 1.0))
        assert abs(got - float(exact)) <= 1e-16 + 1e-12 * float(exact), d


def test_relu_variance_map_is_half_q():
    # E[relu(sqrt(q) z)^2] = q / 2 (symmetry); V(q) = sw q / 2 + sb (He et al. 2015, eq. 7)
    q = np.geomspace(1e-8, 1e8, 33)
    assert_allclose(maps.second_moment(A("relu"), q), q / 2, rtol=1e-14)
    assert_allclose(maps.variance_map(A("relu"), q, 1.7, 0.3), 1.7 * q / 2 + 0.3, rtol=1e-14)


@pytest.mark.parametrize("slope", [0.0, 0.01, 0.1, 0.3, 0.5])
def test_he_initialisation_preserves_variance_and_gradients(slope):
    # He et al. 2015, eq. (10) and its leaky form: sigma_w2 = 2 / (1 + a^2) gives V(q) = q and
    # chi_1 = 1 at every q (E[phi^2] = E[phi'^2] q-independently = (1 + a^2) / 2 ...)
    act = A("leaky_relu", slope=slope)
    sw = 2.0 / (1.0 + slope**2)
    q = np.array([1e-3, 0.5, 1.0, 40.0])
    assert_allclose(maps.variance_map(act, q, sw, 0.0), q, rtol=1e-14)
    assert_allclose(maps.chi_1(act, q, sw), 1.0, rtol=1e-14)
    assert_allclose(maps.variance_map_slope(act, q, sw), 1.0, rtol=1e-13)


# ------------------------------------------------------------------------------------------
# erf: Williams 1997
# ------------------------------------------------------------------------------------------
def williams(c, q1, q2):
    """Williams 1997, eq. (11): E[erf(u1) erf(u2)] for variances q1, q2 and correlation c."""
    q1, q2 = mpmath.mpf(q1), mpmath.mpf(q2)
    return _mp_map(lambda m: 2 / mpmath.pi * mpmath.asin(
        2 * m * mpmath.sqrt(q1 * q2) / mpmath.sqrt((1 + 2 * q1) * (1 + 2 * q2))), c)


@pytest.mark.parametrize("q1,q2", [(1.0, 1.0), (0.8, 2.5), (0.05, 3.0), (20.0, 0.4)])
def test_erf_pair_expectation_williams(q1, q2):
    # Williams 1997 eq. (11), through the public 2-D rule with unequal variances
    erf = A("erf")
    got = bivariate_expectation(lambda a, b: erf.value(a) * erf.value(b), C_GRID, q1, q2)
    assert_allclose(got, williams(C_GRID, q1, q2), rtol=0, atol=ATOL)


@pytest.mark.parametrize("sw,sb,q", [(1.0, 0.0, 1.0), (2.0, 0.05, 0.9659548), (1.4, 0.3, 4.0)])
def test_erf_correlation_map_and_slope_closed_form(sw, sb, q):
    # C(c) = (sw W(c) + sb) / (sw W(1) + sb), W(c) = (2/pi) arcsin(2 q c / (1 + 2 q)) (Williams
    # 1997); C'(c) = sw (2/pi) (2q / (1+2q)) / sqrt(1 - (2qc / (1+2q))^2) / V(q) (its derivative)
    erf = A("erf")
    v = sw * williams(1.0, q, q) + sb
    r = 2 * q / (1 + 2 * q)
    assert_allclose(maps.correlation_map(erf, C_GRID, sw, sb, q),
                    (sw * williams(C_GRID, q, q) + sb) / v, rtol=0, atol=ATOL)
    assert_allclose(maps.correlation_map_slope(erf, C_GRID, sw, sb, q),
                    sw * (2 / np.pi) * r / np.sqrt(1 - (r * C_GRID) ** 2) / v, rtol=1e-13)
    # E[erf'(sqrt(q) z)^2] = (4/pi) E[exp(-2 q z^2)] = (4/pi) / sqrt(1 + 4q) (Gaussian integral)
    assert_allclose(maps.chi_1(erf, q, sw), sw * 4 / np.pi / math.sqrt(1 + 4 * q), rtol=1e-14)


@pytest.mark.parametrize("q", [1.0, 5.0, 26.0])
def test_series_route_of_a_long_map_is_williams(q):
    # the Hermite-series route of a vectorised map (160 terms, then 640, then the 2-D rule where
    # neither tail bound is small enough), on erf with its closed-form smoothing removed so that
    # it takes that route: Williams 1997 eq. (11), atol as the other map checks
    erf = A("erf")
    twin = Activation(name="erf", value_fn=erf.value_fn, derivative_fn=erf.derivative_fn,
                      declared_scale=1.0)
    c = np.concatenate([np.linspace(-1.0, 1.0, 1000), C_GRID])
    v = float(williams(1.0, q, q))
    got = maps.correlation_map(twin, c, 1.0, 0.0, q)
    assert_allclose(got, williams(c, q, q) / v, rtol=0, atol=ATOL)


@pytest.mark.parametrize("q", [1.0, 5.0, 26.0])
def test_series_route_point_by_point_is_williams(q):
    # one c per call (iterating c_l layer by layer): the same series route, with the
    # coefficients cached per (activation, q); Williams 1997 eq. (11) on the erf twin as above.
    # C(1) = 1 exactly (it is V(q) / V(q) on the same nodes).
    erf = A("erf")
    twin = Activation(name="erf", value_fn=erf.value_fn, derivative_fn=erf.derivative_fn,
                      declared_scale=1.0)
    v = float(williams(1.0, q, q))
    for c in list(C_GRID[::3]) + [1.0, -1.0]:
        got = maps.correlation_map(twin, float(c), 1.0, 0.0, q)
        assert np.ndim(got) == 0
        assert abs(float(got) - float(williams(c, q, q)) / v) <= ATOL, c
    assert float(maps.correlation_map(twin, 1.0, 2.0, 0.3, q)) == 1.0
    # the cache: a second pass at this q reuses the same coefficient arrays
    from propcalc.numerics.hermite import SERIES_PASSES, coefficients_at
    kmax, rule = SERIES_PASSES[0]
    assert (coefficients_at(twin.value, twin.breakpoints, q, kmax, rule)[0]
            is coefficients_at(twin.value, twin.breakpoints, q, kmax, rule)[0])


# ------------------------------------------------------------------------------------------
# step: Sheppard 1899
# ------------------------------------------------------------------------------------------
def test_step_pair_expectation_sheppard():
    # Sheppard 1899: P(u1 > 0, u2 > 0) = 1/4 + arcsin(c) / (2 pi), for any common variance
    step = A("step")
    for q in (0.2, 1.0, 30.0):
        assert_allclose(maps.pair_expectation(step, C_GRID, q),
                        sheppard(C_GRID), rtol=0, atol=ATOL)
    got = bivariate_expectation(lambda a, b: step.value(a) * step.value(b), C_GRID, 0.5, 4.0,
                                step.breakpoints)
    assert_allclose(got, sheppard(C_GRID), rtol=0, atol=ATOL)


@pytest.mark.parametrize("sw,sb,q", [(1.0, 0.0, 1.0), (2.0, 0.3, 0.7), (0.5, 2.0, 5.0)])
def test_step_correlation_map_and_slope_closed_form(sw, sb, q):
    # Map: C(c) = (sw (1/4 + arcsin(c) / (2 pi)) + sb) / V, V = sw / 2 + sb (Sheppard 1899;
    # E[H^2] = P(u >= 0) = 1/2).
    # Slope, derived: H' = delta, so by Price's theorem d/dc E[H(u1) H(u2)] = q E[delta(u1)
    # delta(u2)] = q p(0, 0) with the bivariate normal density p(0, 0) = 1 / (2 pi q sqrt(1 - c^2));
    # the same as differentiating Sheppard's formula. Hence
    # C'(c) = sw / (2 pi sqrt(1 - c^2)) / (sw / 2 + sb) = sw p(0,0) q / (sw P(u > 0) + sb),
    # infinite at c = +-1 (so chi_1 = C'(1) is infinite).
    step = A("step")
    c = C_GRID[np.abs(C_GRID) < 1]
    v = sw / 2 + sb
    assert_allclose(maps.correlation_map(step, C_GRID, sw, sb, q),
                    (sw * (sheppard(C_GRID)) + sb) / v, rtol=0, atol=ATOL)
    # the density in mpmath: 1 - c^2 in floats loses digits near c = +-1
    density = _mp_map(lambda m: 1 / (2 * mpmath.pi * mpmath.sqrt(1 - m * m)), c)
    assert_allclose(maps.correlation_map_slope(step, c, sw, sb, q), sw * density / v, rtol=1e-13)
    ends = maps.correlation_map_slope(step, np.array([-1.0, 1.0]), sw, sb, q)
    assert np.all(np.isposinf(ends))
    assert math.isinf(float(maps.chi_1(step, q, sw)))
    assert math.isinf(float(maps.derivative_second_moment(step, q)))


# ------------------------------------------------------------------------------------------
# SELU: Klambauer et al. 2017
# ------------------------------------------------------------------------------------------
def test_selu_is_self_normalising():
    # Klambauer et al. 2017, eq. (14): E[selu(z)] = 0, E[selu(z)^2] = 1 for z ~ N(0, 1).
    # Required 1e-9 (the constants are published rounded); the 31 digits propcalc stores
    # satisfy both to ~1e-16 (measured), checked as well.
    selu = A("selu")
    m1 = float(maps.first_moment(selu, 1.0))
    m2 = float(maps.second_moment(selu, 1.0))
    assert abs(m1) < 1e-9 and abs(m2 - 1.0) < 1e-9
    assert abs(m1) < 1e-15 and abs(m2 - 1.0) < 1e-15
    # so q = 1 is a fixed point of V at sigma_w2 = 1, sigma_b2 = 0
    assert float(maps.variance_map(selu, 1.0, 1.0, 0.0)) == pytest.approx(1.0, abs=1e-15)


# ------------------------------------------------------------------------------------------
# properties of the maps
# ------------------------------------------------------------------------------------------
ALL = propcalc.builtin_names()


@pytest.mark.parametrize("name", ALL)
def test_correlation_map_is_one_at_one(name):
    # C(1) = (sw E[phi^2] + sb) / V(q) = 1 by definition (Poole et al. 2016, eq. 5)
    act = A(name)
    for q in (0.1, 1.0, 9.0):
        assert float(maps.correlation_map(act, 1.0, 1.3, 0.2, q)) == pytest.approx(1.0, abs=1e-15)


@pytest.mark.parametrize("name", ["tanh", "erf", "hard_tanh", "linear", "step"])
def test_correlation_map_symmetry(name):
    # phi odd (or phi - 1/2 odd for the step) with sb = 0:
    # E[phi(u1) phi(-u2)] = -E[phi(u1) phi(u2)], so C(-c) = -C(c); for the step
    # C(-c) = 1 - C(c) (Sheppard 1899)
    act = A(name)
    c = np.linspace(0.0, 1.0, 21)
    pos = maps.correlation_map(act, c, 1.5, 0.0, 0.8)
    neg = maps.correlation_map(act, -c, 1.5, 0.0, 0.8)
    if name == "step":
        assert_allclose(neg, 1.0 - pos, rtol=0, atol=ATOL)
    else:
        assert_allclose(neg, -pos, rtol=0, atol=ATOL)


@pytest.mark.parametrize("name", ALL)
@pytest.mark.parametrize("q", [0.1, 1.0, 10.0])
def test_variance_slope_stein_against_finite_differences(name, q):
    # V'(q) = sw E[(z^2 - 1) phi(sqrt(q) z)^2] / (2q) (Stein's identity; DESIGN.md) against the
    # five-point central difference of V (Abramowitz & Stegun 25.3.6, error O(h^4))
    act = A(name)
    sw = 1.3
    h = 1e-3 * q
    qs = q + h * np.array([-2.0, -1.0, 1.0, 2.0])
    v = maps.variance_map(act, qs, sw, 0.0)
    fd = (v[0] - 8 * v[1] + 8 * v[2] - v[3]) / (12 * h)
    stein = float(maps.variance_map_slope(act, q, sw))
    assert abs(stein - fd) <= 1e-9 * max(1.0, abs(fd)), (stein, fd)


def test_variance_slope_of_the_step_is_zero():
    # V(q) = sw P(u >= 0) + sb = sw / 2 + sb does not depend on q
    assert_allclose(maps.variance_map_slope(A("step"), np.array([0.1, 1.0, 50.0]), 2.0), 0.0,
                    atol=1e-15)


@pytest.mark.parametrize("name", ["tanh", "erf", "gelu", "softplus", "silu", "mish", "sigmoid"])
def test_chi_1_is_the_slope_of_the_correlation_map_at_one(name):
    # Schoenholz et al. 2017, eq. (8): C'(1) = sw q E[phi'^2] / V(q), which is chi_1 at q = q*.
    # Checked two ways: the slope routine at c = 1, and the one-sided difference quotient
    # (C(1) - C(1 - h)) / h = C'(1) - C''(1) h / 2 + ..., h = 1e-6.
    act = A(name)
    sw, sb = 1.8, 0.1
    fp = propcalc.propagation(act, sw, sb)
    q = fp.q_star
    c1 = float(maps.chi_1(act, q, sw))
    assert c1 == pytest.approx(fp.chi_1, rel=1e-14)
    assert float(maps.correlation_map_slope(act, 1.0, sw, sb, q)) == pytest.approx(c1, rel=1e-12)
    h = 1e-6
    quotient = (1.0 - float(maps.correlation_map(act, 1.0 - h, sw, sb, q))) / h
    assert quotient == pytest.approx(c1, rel=1e-5)


@pytest.mark.parametrize("name,params", [("relu", {}), ("elu", {"alpha": 0.5}),
                                         ("hard_tanh", {}), ("selu", {})])
def test_chi_1_for_kinked_activations(name, params):
    # for a kink (phi' jumps) C'(c) = C'(1) - a sqrt(1 - c) + ... (Hayou et al. 2019): the
    # slope routine at c = 1 still equals chi_1 q / V(q), and slopes just below 1 approach it
    # like sqrt(1 - c). (ELU needs alpha != 1: with alpha = 1 its derivative is continuous.)
    act = A(name, **params)
    sw, sb, q = 1.4, 0.2, 0.9
    c1 = float(maps.chi_1(act, q, sw)) * q / float(maps.variance_map(act, q, sw, sb))
    assert float(maps.correlation_map_slope(act, 1.0, sw, sb, q)) == pytest.approx(c1, rel=1e-12)
    below = maps.correlation_map_slope(act, 1.0 - np.array([1e-6, 1e-8, 1e-10]), sw, sb, q)
    gaps = c1 - below
    assert np.all(gaps > 0)
    assert_allclose(gaps[1:] / gaps[:-1], 0.1, rtol=2e-2)   # sqrt(1e-2) per step


def test_linear_maps():
    # phi(x) = x: V(q) = sw q + sb, C(c) = (sw q c + sb) / (sw q + sb), chi_1 = sw (exact)
    lin = A("linear")
    assert_allclose(maps.variance_map(lin, np.array([0.5, 2.0]), 0.7, 0.1), [0.45, 1.5], rtol=1e-15)
    assert_allclose(maps.correlation_map(lin, C_GRID, 0.7, 0.1, 2.0),
                    (1.4 * C_GRID + 0.1) / 1.5, rtol=0, atol=ATOL)
    assert float(maps.chi_1(lin, 3.0, 0.7)) == pytest.approx(0.7, rel=1e-15)


def test_maps_vectorised_match_scalar_calls():
    act = A("gelu")
    qs = np.array([0.01, 0.5, 2.0, 80.0])
    vec = maps.variance_map(act, qs, 1.5, 0.1)
    for q, v in zip(qs, vec):
        assert float(maps.variance_map(act, q, 1.5, 0.1)) == pytest.approx(v, rel=1e-14)
    cs = np.array([-0.9, -0.2, 0.4, 0.7, 0.999])
    vec_c, vec_s = maps.correlation_map(act, cs, 1.5, 0.1, 0.7), \
        maps.correlation_map_slope(act, cs, 1.5, 0.1, 0.7)
    for c, v, s in zip(cs, vec_c, vec_s):
        assert float(maps.correlation_map(act, c, 1.5, 0.1, 0.7)) == pytest.approx(v, rel=1e-14)
        slope = float(maps.correlation_map_slope(act, c, 1.5, 0.1, 0.7))
        assert slope == pytest.approx(s, rel=1e-13)


@pytest.mark.parametrize("name", ALL)
def test_maps_never_return_nan(name):
    # RULES item 4: nothing returns NaN; infinities only where the mathematics has them
    act = A(name)
    q = np.array([0.0, 1e-10, 0.5, 1.0, 1e4])
    c = np.array([-1.0, -1 + 1e-10, -0.5, 0.0, 0.3, 0.999, 1 - 1e-10, 1.0])
    for sw, sb in [(0.5, 0.0), (3.0, 0.5)]:
        assert np.all(np.isfinite(maps.variance_map(act, q, sw, sb)))
        assert not np.any(np.isnan(maps.variance_map_slope(act, q, sw)))
        assert not np.any(np.isnan(maps.chi_1(act, q, sw)))
        for qq in (0.0, 1e-6, 100.0):
            cm, sl = maps.correlation_map_and_slope(act, c, sw, sb, qq)
            assert np.all(np.isfinite(cm)) and np.all(np.abs(cm) <= 1 + 1e-12)
            assert not np.any(np.isnan(sl))


@pytest.mark.parametrize("bad", [-1.0, math.nan, math.inf])
def test_maps_reject_bad_inputs(bad):
    # RULES item 4: the error names the field, the constraint and the value
    act = A("tanh")
    with pytest.raises(propcalc.InvalidParameterError, match="q must be finite and >= 0"):
        maps.variance_map(act, bad, 1.0, 0.0)
    with pytest.raises(propcalc.InvalidParameterError, match="sigma_w2"):
        maps.variance_map(act, 1.0, bad, 0.0)
    with pytest.raises(propcalc.InvalidParameterError, match="sigma_b2"):
        maps.variance_map(act, 1.0, 1.0, bad)
    with pytest.raises(propcalc.InvalidParameterError, match=r"c must be in \[-1, 1\]"):
        maps.correlation_map(act, 1.0 + 1e-9 if math.isfinite(bad) else bad, 1.0, 0.0, 1.0)


# ------------------------------------------------------------------------------------------
# tiny variances and the slope at q = 0 (issue 11, section 2)
# ------------------------------------------------------------------------------------------
def _elu_pair_mpmath(alpha, lam, c, q):
    """E[phi(u1) phi(u2)] / q for phi = lam * elu(x; alpha), by mpmath at 60 digits: the
    1-D integral E[phi(u1) S(c u1, q (1 - c^2))] with the exact inner smoothing
    S(m, v) = lam (m Phi(m/s) + s varphi(m/s) + alpha (e^(m + v/2) Phi(-(m + v)/s)
    - Phi(-m/s))) (truncated normal moments, Johnson, Kotz & Balakrishnan 1994, 10.1)."""
    with mpmath.workdps(60):
        q, c, alpha, lam = (mpmath.mpf(x) for x in (q, c, alpha, lam))
        v = q * (1 - c * c)
        s = mpmath.sqrt(v)

        def phi(x):
            return lam * (x if x > 0 else alpha * mpmath.expm1(x))

        def smooth(m):
            return lam * (m * mpmath.ncdf(m / s) + s * mpmath.npdf(m / s)
                          + alpha * (mpmath.exp(m + v / 2) * mpmath.ncdf(-(m + v) / s)
                                     - mpmath.ncdf(-m / s)))

        sq = mpmath.sqrt(q)
        if c == 1:  # E[phi(u)^2]
            return mpmath.quad(lambda z: phi(sq * z) ** 2 * mpmath.npdf(z), [-12, 0, 12]) / q
        val = mpmath.quad(lambda z: phi(sq * z) * smooth(c * sq * z) * mpmath.npdf(z),
                          [-12, -4, 0, 4, 12])
        return val / q


@pytest.mark.parametrize("name", ["elu", "selu"])
@pytest.mark.parametrize("q", [1e-2, 1e-4, 1e-6, 1e-10, 1e-20, 1e-40, 1e-100, 1e-200])
def test_correlation_map_at_tiny_variance(name, q):
    # issue 11: correlation_map(elu, [0.5], 1.5, 0, q=1e-40) returned 0.25 (the limit is 0.5:
    # elu is linear near 0); selu was off from q ~ 1e-24. Reference: mpmath at 60 digits;
    # below q = 1e-40 the q -> 0 limit, the arc-cosine kernel of the two-slope linear function
    # (Cho & Saul 2009, eq. 6: E[x+ y+] = q K(c), K(c) = (sqrt(1 - c^2) + (pi - acos c) c) / 2 pi),
    # which the map reaches to O(sqrt q)
    act = A(name)
    alpha, lam = (1.0, 1.0) if name == "elu" else (SELU_ALPHA, SELU_SCALE)
    c = 0.5
    got = float(maps.correlation_map(act, [c], 1.5, 0.0, q=q)[0])
    if q >= 1e-40:
        num = _elu_pair_mpmath(alpha, lam, c, q)
        den = _elu_pair_mpmath(alpha, lam, 1, q)
        ref = float(num / den)
    else:
        def k(x):
            return (math.sqrt(1 - x * x) + (math.pi - math.acos(x)) * x) / (2 * math.pi)
        ref = ((1 + alpha**2) * k(c) - 2 * alpha * k(-c)) / ((1 + alpha**2) / 2)
    assert abs(got - ref) <= 2e-14


@pytest.mark.parametrize("name,phi0,d1,d2", [("sigmoid", 0.5, 0.25, 0.0),
                                             ("softplus", math.log(2.0), 0.5, 0.25),
                                             ("cos(x)", 1.0, 0.0, -1.0)])
def test_variance_map_slope_at_zero_is_the_limit(name, phi0, d1, d2):
    # issue 11: variance_map_slope(sigmoid, [0.0], 1.5) was inf. The limit of
    # V'(q) = sigma_w2 d/dq E[phi(sqrt(q) z)^2] at q = 0 is sigma_w2 (phi'(0)^2 + phi(0) phi''(0))
    # (second-order Taylor expansion, E[z^2] = 1); phi(0), phi'(0), phi''(0) by hand
    # (sigmoid: 1/2, 1/4, 0; softplus: ln 2, 1/2, 1/4; cos: 1, 0, -1)
    sw = 1.5
    got = maps.variance_map_slope(A(name), [0.0, 1e-9], sw)
    ref = sw * (d1 * d1 + phi0 * d2)
    assert got[0] == pytest.approx(ref, rel=1e-11, abs=1e-13)
    assert got[1] == pytest.approx(ref, rel=1e-7, abs=1e-8)  # continuous at 0


@pytest.mark.parametrize("name,fn", [("sigmoid", lambda x: 1 / (1 + mpmath.exp(-x))),
                                     ("tanh(x) + 0.3", lambda x: mpmath.tanh(x) + 0.3)])
@pytest.mark.parametrize("q", [1e-12, 1e-9, 1e-6, 1e-3])
def test_variance_map_slope_at_small_variance(name, fn, q):
    # Stein's form lost ~1e-16 / q relative where phi(0) != 0 (sigmoid at q = 1e-12: 4.5e-4);
    # reference: d/dq E[phi(sqrt(q) z)^2] by mpmath.diff of mpmath.quad at 40 digits
    with mpmath.workdps(40):
        def second(qq):
            return mpmath.quad(lambda z: fn(mpmath.sqrt(qq) * z) ** 2 * mpmath.npdf(z),
                               [-14, 0, 14])
        ref = float(1.5 * mpmath.diff(second, mpmath.mpf(q)))
    got = float(maps.variance_map_slope(A(name), q, 1.5))
    assert got == pytest.approx(ref, rel=2e-11)


# ------------------------------------------------------------------------------------------
# oscillating formulas (issue 12, section 1)
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("q", [1.0, 10.0, 30.0, 100.0, 1e3, 1e5])
def test_sine_second_moment_at_large_variance(q):
    # E[sin(sqrt(q) z)^2] = (1 - e^(-2q)) / 2 (E[cos(a z)] = e^(-a^2 / 2), the Gaussian
    # characteristic function); it was off by 2.6e-10 at q = 10, 9e-6 at 30 and 1% at 100
    act = A("sin(x)")
    assert act.reach == math.inf  # oscillates: panels graded to its scale everywhere
    ref = -math.expm1(-2.0 * q) / 2.0
    assert float(maps.second_moment(act, q)) == pytest.approx(ref, rel=1e-13)


@pytest.mark.parametrize("q", [2.0, 20.0])
def test_sine_correlation_map(q):
    # E[sin(u1) sin(u2)] = (E[cos(u1 - u2)] - E[cos(u1 + u2)]) / 2 = e^(-q) sinh(q c) (the
    # Gaussian characteristic function of u1 -+ u2, variances 2 q (1 -+ c)); the 2-D rule
    cs = np.array([-0.9, -0.3, 0.2, 0.7, 0.99])
    got = maps.correlation_map(A("sin(x)"), cs, 2.0, 0.1, q)
    v = 2.0 * -math.expm1(-2.0 * q) / 2.0 + 0.1
    ref = (2.0 * np.exp(-q) * np.sinh(q * cs) + 0.1) / v
    assert_allclose(got, ref, rtol=0, atol=2e-14)


def test_oscillating_formula_beyond_its_integrable_variance_is_refused():
    # sin(x) at q = 1e9 needs 6e4 panels of width 6 in x over +-10 sqrt(q): refused, with why
    with pytest.raises(propcalc.ComputationError, match="oscillates.*cannot be integrated"):
        maps.second_moment(A("sin(x)"), 1e9)
    # below the limit the scan and the large-variance limits stay inside it
    assert maps.largest_variance(A("sin(x)")) == pytest.approx(3.6e7)
    assert maps.largest_variance(A("tanh")) == math.inf


@pytest.mark.parametrize("gap", [1e-8, 1e-6, 1e-4, 1e-2])
def test_correlation_slope_of_a_jump_near_one(gap):
    # issue 12: C'(1 - 1e-8) of where(x > 0.7, x, 0.2 x) was off by 4e-9 (the jump J = 0.56
    # read as phi(b + h) - phi(b - h), which carries h (phi'(b-) + phi'(b+))). Reference, by
    # Price's theorem with the Dirac mass J delta(x - b) in phi' (Price 1958): E[phi' phi'] =
    # E[r r] + 2 J p(b) E[r(u2) | u1 = b] + J^2 p(b, b), r = 0.2 + 0.8 1{x > b}, with the
    # bivariate orthant P(u1 > b, u2 > b) by mpmath.quad at 40 digits; at the c the double holds
    c = 1.0 - gap
    with mpmath.workdps(40):
        e = 1 - mpmath.mpf(c)
        b, sw, sb = mpmath.mpf("0.7"), mpmath.mpf("1.5"), mpmath.mpf("0.1")
        jump, r = b - b / 5, mpmath.sqrt(e * (2 - e))
        both = mpmath.quad(lambda z: mpmath.npdf(z) * mpmath.ncdf(((1 - e) * z - b) / r),
                           [b, b + 10 * r, b + 1, 40])
        tail = 1 - mpmath.ncdf(b)
        err = mpmath.mpf("0.04") + mpmath.mpf("0.32") * tail + mpmath.mpf("0.64") * both
        cond = mpmath.mpf("0.2") + mpmath.mpf("0.8") * mpmath.ncdf(-e * b / r)
        dens_bb = mpmath.exp(-b * b / (2 - e)) / (2 * mpmath.pi * r)
        edd = err + 2 * jump * mpmath.npdf(b) * cond + jump * jump * dens_bb
        hi = tail + b * mpmath.npdf(b)  # E[x^2; x > b] at q = 1 (truncated normal moments)
        ref = float(sw * edd / (sw * (mpmath.mpf("0.04") * (1 - hi) + hi) + sb))
    act = A("where(x > 0.7, x, 0.2*x)")
    assert act.jumps[0] == pytest.approx(0.56, rel=1e-15)
    got = float(maps.correlation_map_slope(act, c, 1.5, 0.1, 1.0))
    assert got == pytest.approx(ref, rel=3e-15)


def test_correlation_map_never_leaves_the_unit_interval():
    # issue 11: no correlation map may leave [-1, 1] (|E[phi(u1) phi(u2)]| <= E[phi^2], Cauchy-
    # Schwarz); where(x > 0.7, x, 0.2 x) at q = 1e-6 gave C(-1) = -(1 + 2.2e-16) by rounding
    cs = np.concatenate([np.linspace(-1, 1, 201), 1 - np.geomspace(1e-16, 1e-2, 15),
                         -1 + np.geomspace(1e-16, 1e-2, 15)])
    for name in ("where(x > 0.7, x, 0.2*x)", "tanh", "step", "hard_tanh", "x + 1"):
        for q in (1e-6, 1.0, 30.0):
            got = maps.correlation_map(A(name), cs, 1.5, 0.0, q)
            assert np.all(np.abs(got) <= 1.0) and np.all(np.isfinite(got))


@pytest.mark.parametrize("formula", ["where(sin(x/100) > 0, x, 0.5*x)",
                                     "where(x > 1, 1, where(x < -1, -1, 0))", "step(x)"])
def test_slope_at_one_of_a_jumping_phi_is_infinite_never_nan(formula):
    # Price's theorem with phi' holding Dirac masses J_k delta(x - b_k) (Price 1958): at c = 1 the
    # masses meet only on the diagonal b_k = b_l, where the density is infinite; pairs of jumps
    # at different places contribute 0 there. Jumps of opposite signs once gave inf - inf = NaN
    # (issue 11, the 500s of /v1/maps/correlation with_slope).
    act = propcalc.activation(formula)
    slope = maps.correlation_map_slope(act, [1.0, 1.0 - 1e-6, 0.5], 1.5, 0.0, q=1.0)
    assert slope[0] == math.inf
    assert np.all(np.isfinite(slope[1:])) and np.all(slope[1:] > 0)
