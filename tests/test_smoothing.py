"""Closed-form Gaussian smoothings E[phi(m + sqrt(v) z)] and the 1-D correlation-map route.

Sources:
* the reference values are mpmath quadratures at 30 digits, split at the breakpoints
  (mpmath.quad, tanh-sinh);
* truncated normal moments E[1{a <= z < b}] = Phi(b) - Phi(a), E[z 1{a <= z < b}] =
  varphi(a) - varphi(b) (Johnson, Kotz & Balakrishnan 1994, vol. 1, section 10.1) are what
  the code implements; they are not re-derived here, only checked through mpmath;
* the map values: Cho & Saul 2009 (arc-cosine kernels) and Sheppard 1899, evaluated in mpmath;
* scipy.integrate.dblquad for one pair expectation of each piecewise activation.
"""

from __future__ import annotations

import math
import warnings

import mpmath
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate

import propcalc
from propcalc.meanfield import maps
from propcalc.numerics.quadrature import QuadratureRule, bivariate_expectation, conditional_pair_expectation

A = propcalc.activation

SMOOTHED = [("linear", {}), ("step", {}), ("relu", {}), ("leaky_relu", {"slope": 0.2}),
            ("elu", {}), ("elu", {"alpha": 0.5}), ("selu", {}), ("hard_tanh", {}),
            ("gelu", {}), ("erf", {})]
IDS = [n + "".join(f"-{k}{v}" for k, v in p.items()) for n, p in SMOOTHED]

# mpmath versions of value and derivative (regular part), from the definitions
_SELU_A = mpmath.mpf("1.6732632423543772848170429916717")
_SELU_L = mpmath.mpf("1.0507009873554804934193349852946")


def _mp_functions(name: str, params: dict):
    one, zero = mpmath.mpf(1), mpmath.mpf(0)
    if name == "linear":
        return (lambda x: x), (lambda x: one)
    if name == "step":
        return (lambda x: one if x >= 0 else zero), (lambda x: zero)
    if name == "relu":
        return (lambda x: x if x > 0 else zero), (lambda x: one if x > 0 else zero)
    if name == "leaky_relu":
        a = mpmath.mpf(params["slope"])
        return (lambda x: x if x > 0 else a * x), (lambda x: one if x > 0 else a)
    if name in ("elu", "selu"):
        a = _SELU_A if name == "selu" else mpmath.mpf(params.get("alpha", 1.0))
        lam = _SELU_L if name == "selu" else one
        return ((lambda x: lam * (x if x > 0 else a * (mpmath.exp(x) - 1))),
                (lambda x: lam * (one if x > 0 else a * mpmath.exp(x))))
    if name == "hard_tanh":
        return ((lambda x: max(-one, min(one, x))), (lambda x: one if abs(x) < 1 else zero))
    if name == "gelu":
        return ((lambda x: x * mpmath.ncdf(x)), (lambda x: mpmath.ncdf(x) + x * mpmath.npdf(x)))
    if name == "erf":
        return mpmath.erf, (lambda x: 2 / mpmath.sqrt(mpmath.pi) * mpmath.exp(-x * x))
    raise KeyError(name)


def _mp_smooth(fn, m: float, v: float, breakpoints) -> tuple[float, float]:
    """(E[fn(m + s z)], E[|fn(m + s z)|]) by mpmath.quad, split where m + s z crosses a breakpoint."""
    with mpmath.workdps(30):
        m_, s_ = mpmath.mpf(m), mpmath.sqrt(mpmath.mpf(v))
        cuts = sorted({(mpmath.mpf(b) - m_) / s_ for b in breakpoints} | {mpmath.mpf(0)})
        # the mass sits near z = 0 and, for the exponential pieces, near z = s
        cuts = sorted(set(cuts) | {s_, -s_, 2 * s_})
        pts = [-mpmath.inf] + cuts + [mpmath.inf]
        val = mpmath.quad(lambda z: fn(m_ + s_ * z) * mpmath.npdf(z), pts)
        mag = mpmath.quad(lambda z: abs(fn(m_ + s_ * z)) * mpmath.npdf(z), pts)
    return float(val), float(mag)


MV = [(0.0, 1.0), (0.3, 0.04), (-0.7, 2.5), (1.9, 0.3), (-2.5, 0.5), (0.9, 1e-6),
      (-1.0, 1e-3), (4.0, 9.0), (-6.0, 4.0), (12.0, 30.0), (-30.0, 100.0), (0.0, 400.0)]


@pytest.mark.parametrize("name,params", SMOOTHED, ids=IDS)
def test_smoothing_matches_mpmath(name, params):
    # E[phi(m + s z)] and E[phi'(m + s z)] against mpmath at 30 digits. Required: 1e-13 of
    # E|phi(m + s z)| (what the maps need: the smoothing is multiplied by phi and summed).
    act = A(name, **params)
    f_mp, d_mp = _mp_functions(name, params)
    m = np.array([p[0] for p in MV])
    v = np.array([p[1] for p in MV])
    for fn_mp, smooth in ((f_mp, act.smoothing.value), (d_mp, act.smoothing.derivative)):
        got = smooth(m, v)
        for i, (mi, vi) in enumerate(MV):
            ref, mag = _mp_smooth(fn_mp, mi, vi, act.breakpoints)
            # (+1e-30: below that mpmath's own quadrature of far Gaussian tails loses
            # relative digits; scipy's ndtr there agrees with mpmath.ncdf to 2e-13)
            assert abs(got[i] - ref) <= 1e-13 * mag + 1e-30, (mi, vi, got[i], ref)


@pytest.mark.parametrize("name,params", SMOOTHED, ids=IDS)
def test_smoothing_tails_and_extremes_are_finite_and_small(name, params):
    # |m| up to 1e4 and v up to 1e4: no warning, no overflow, no NaN; far in the tails the
    # result is accurate to rounding in absolute terms (1e-15 (1 + |m|)) against mpmath
    act = A(name, **params)
    f_mp, d_mp = _mp_functions(name, params)
    m = np.array([-1e4, -300.0, -40.0, 40.0, 300.0, 1e4, -20.0, 20.0, 5e3])
    v = np.array([1e4, 1.0, 1.0, 1.0, 1e-2, 1e4, 1.0, 1e-12, 2e3])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        vals = act.smoothing.value(m, v)
        ders = act.smoothing.derivative(m, v)
    assert np.all(np.isfinite(vals)) and np.all(np.isfinite(ders))
    for i in (2, 3, 6, 7):  # moderate points where mpmath is quick
        ref, _ = _mp_smooth(f_mp, m[i], v[i], act.breakpoints)
        assert abs(vals[i] - ref) <= 1e-15 * (1 + abs(m[i])), (m[i], vals[i], ref)
        ref, _ = _mp_smooth(d_mp, m[i], v[i], act.breakpoints)
        assert abs(ders[i] - ref) <= 1e-15 * (1 + abs(m[i])), (m[i], ders[i], ref)


@pytest.mark.parametrize("name,params", SMOOTHED, ids=IDS)
def test_smoothing_at_zero_variance_is_the_function(name, params):
    # E[phi(m + 0 z)] = phi(m), away from breakpoints (definition)
    act = A(name, **params)
    m = np.array([-3.3, -0.4, 0.25, 2.0, 7.5])
    assert_allclose(act.smoothing.value(m, np.zeros_like(m)), act.value(m), rtol=0, atol=1e-15)
    assert_allclose(act.smoothing.derivative(m, np.zeros_like(m)), act.derivative(m), rtol=0,
                    atol=1e-15)


def test_smooth_activations_without_a_closed_form_have_none():
    # only closed forms are attached; the rest of the built-ins use the series and the 2-D rule
    for name in ("tanh", "sigmoid", "softplus", "silu", "swish", "mish", "gelu_tanh"):
        assert A(name).smoothing is None
    # typed formulas get one only when they are affine between their breakpoints
    for text in ("x * sigmoid(x)", "max(x, 0) + 1e-3 * sin(x)", "where(x > 0, x, exp(x) - 1)",
                 "max(x, 0)**2"):
        assert A(text).smoothing is None, text
    for text in ("max(x, 0)", "where(x > 0, x, 0.2 * x)", "min(max(x, -1), 1)", "abs(x)",
                 "where(x >= 0, 1, 0)", "3 * x - 2", "relu(x) - 0.5"):
        assert A(text).smoothing is not None, text


@pytest.mark.parametrize("name,params", [p for p in SMOOTHED if p[0] != "linear"],
                         ids=[i for i in IDS if i != "linear"])
def test_pair_expectation_agrees_with_dblquad(name, params):
    # E[phi(u1) phi(u2)] at q = 1.3, c = 0.62 against scipy.integrate.dblquad over
    # (z1, z2) in [-9, 9]^2 (mass outside ~2e-19), split at the breakpoints in z1
    act = A(name, **params)
    q, c = 1.3, 0.62
    s = math.sqrt(1 - c * c)
    sq = math.sqrt(q)

    def integrand(z2, z1):
        u1, u2 = sq * z1, sq * (c * z1 + s * z2)
        dens = math.exp(-0.5 * (z1 * z1 + z2 * z2)) / (2 * math.pi)
        return float(act.value(np.array([u1]))[0] * act.value(np.array([u2]))[0]) * dens

    cuts = sorted({-9.0, 9.0} | {b / sq for b in act.breakpoints if abs(b / sq) < 9})
    ref = 0.0
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        # inner breakpoints: z2 = (b / sq - c z1) / s; dblquad splits them poorly, so the
        # inner integral is done with quad and points
        def inner(z1):
            pts = [(b / sq - c * z1) / s for b in act.breakpoints]
            pts = [p for p in pts if -9 < p < 9]
            return integrate.quad(integrand, -9, 9, args=(z1,), points=pts or None,
                                  epsabs=1e-14, epsrel=1e-13, limit=200)[0]
        ref += integrate.quad(inner, lo, hi, epsabs=1e-14, epsrel=1e-13, limit=200)[0]
    got = float(maps.pair_expectation(act, c, q))
    assert got == pytest.approx(ref, rel=1e-10, abs=1e-12)


@pytest.mark.parametrize("name,params", SMOOTHED, ids=IDS)
@pytest.mark.parametrize("q", [0.2, 1.0, 9.0])
def test_one_dimensional_route_agrees_with_the_two_dimensional_rule(name, params, q):
    # internal consistency, two independent quadratures (no outside source): the closed-form
    # route of conditional_pair_expectation against the 2-D rule of bivariate_expectation
    act = A(name, **params)
    c = np.array([-0.999, -0.8, -0.3, 0.0, 0.45, 0.7, 0.95, 0.985])
    one = conditional_pair_expectation([(act.value, act.smoothing.value),
                                        (act.derivative, act.smoothing.derivative)],
                                       c, q, q, act.breakpoints)
    two = bivariate_expectation(lambda a, b: (act.value(a) * act.value(b),
                                              act.derivative(a) * act.derivative(b)),
                                c, q, q, act.breakpoints, n_integrands=2)
    scale = float(maps.second_moment(act, q)) + 1e-300
    assert_allclose(one[0], two[0], rtol=0, atol=2e-14 * scale)
    if not act.has_jumps:  # (a jumping phi' has Dirac masses, handled outside both rules)
        dscale = float(maps.derivative_second_moment(act, q))
        assert_allclose(one[1], two[1], rtol=0, atol=2e-14 * max(dscale, 1e-3))


def _mp_one_minus_relu_kernel(gap: float) -> float:
    with mpmath.workdps(50):
        c = 1 - mpmath.mpf(gap)
        return float(1 - (mpmath.sqrt(1 - c * c) + (mpmath.pi - mpmath.acos(c)) * c) / mpmath.pi)


@pytest.mark.parametrize("gap", [9e-3, 1e-5, 1e-9, 1e-13, 2.0**-52, 2.0**-53])
def test_relu_one_minus_c_near_one_to_rounding(gap):
    # Cho & Saul 2009, degree 1, at sigma_w2 = 2, sigma_b2 = 0 (C = J_1(c) / pi): 1 - C(1 - d)
    # to 1e-13 relative plus the two ulps of C itself near 1 (2.2e-16), down to d = 2^-53 (the
    # last float below 1), where 1 - c^2 in floats keeps no digits; the route is
    # E[phi^2] - q int_c^1 E[phi' phi'] (Price 1958)
    c = 1.0 - gap  # a float; its exact gap 1 - c (Sterbenz) is what the references use
    gap = 1.0 - c
    got = 1.0 - float(maps.correlation_map(A("relu"), c, 2.0, 0.0, 1.0))
    exact = _mp_one_minus_relu_kernel(gap)
    assert abs(got - exact) <= 1e-13 * exact + 2.3e-16, (gap, got, exact)
    slope = float(maps.correlation_map_slope(A("relu"), c, 2.0, 0.0, 1.0))
    with mpmath.workdps(50):  # degree 0: C'(c) = (pi - arccos c) / pi
        exact_slope = float(1 - mpmath.acos(1 - mpmath.mpf(gap)) / mpmath.pi)
    assert abs(slope - exact_slope) <= 1e-15, (gap, slope, exact_slope)  # a few ulps


@pytest.mark.parametrize("gap", [5e-3, 1e-7, 1e-12, 2.0**-53])
def test_step_near_one_is_sheppard(gap):
    # Sheppard 1899: P(u1 > 0, u2 > 0) = 1/4 + arcsin(c) / (2 pi); near c = 1,
    # 1/2 - P = arccos(c) / (2 pi), computed in mpmath from the exact gap; to 1e-13 relative
    # plus the ulp of P near 1/2 (1.1e-16)
    step = A("step")
    c = 1.0 - gap  # a float; its exact gap 1 - c (Sterbenz) is what the reference uses
    gap = 1.0 - c
    got = 0.5 - float(maps.pair_expectation(step, c, 1.7))
    with mpmath.workdps(40):
        exact = float(mpmath.acos(1 - mpmath.mpf(gap)) / (2 * mpmath.pi))
    assert abs(got - exact) <= 1e-13 * exact + 1.2e-16, (gap, got, exact)


def test_closed_form_route_is_used_for_long_maps_of_kinked_activations():
    # the reason it exists: a 1000-point ReLU map without any 2-D evaluation away from c = 1
    # (structure check; the speed itself is measured in tests/benchmarks/bench_engine.py)
    relu = A("relu")
    c = np.linspace(-1, 1, 1000)
    got = maps.correlation_map(relu, c, 2.0, 0.0, 1.0)
    with mpmath.workdps(30):
        ref = np.array([float((mpmath.sqrt(1 - mpmath.mpf(x) ** 2)
                               + (mpmath.pi - mpmath.acos(mpmath.mpf(x))) * mpmath.mpf(x))
                              / mpmath.pi) for x in c])
    assert_allclose(got, ref, rtol=0, atol=3e-15)


@pytest.mark.parametrize("q", [1.0, 100.0, 1e4, 1e6])
def test_erf_near_one_at_large_q_is_williams(q):
    # Williams 1997, eq. (11) with equal variances: E[erf(u1) erf(u2)] =
    # (2 / pi) arcsin(2 c q / (1 + 2 q)), in mpmath from the exact gap. At large q the slope
    # integrand has a singularity ~1 / sqrt(2 q) from u = 0, which the graded u-panels must
    # resolve: required 16 ulps of the value (the rounding of E[erf^2] itself is ~4 ulps)
    erf = A("erf")
    for gap in [5e-3, 1e-4, 1e-7, 1e-10, 1e-14]:
        c = 1.0 - gap
        with mpmath.workdps(40):
            qq, cc = mpmath.mpf(q), 1 - (1 - mpmath.mpf(c))
            ref = float(2 / mpmath.pi * mpmath.asin(2 * cc * qq / (1 + 2 * qq)))
        got = float(maps.pair_expectation(erf, c, q))
        assert abs(got - ref) <= 16 * np.spacing(ref), (q, gap, got, ref)


def _mp_abs_kernel(c):
    """E[|u1| |u2|] / q = (2 / pi) (sqrt(1 - c^2) + c arcsin c): |x| = relu(x) + relu(-x) and the
    degree-1 arc-cosine kernel of Cho & Saul 2009 at c and -c, in mpmath."""
    with mpmath.workdps(30):
        return np.array([float(2 / mpmath.pi * (mpmath.sqrt(1 - mpmath.mpf(x) ** 2)
                                                 + mpmath.mpf(x) * mpmath.asin(mpmath.mpf(x))))
                         for x in np.ravel(c)])


def test_typed_rectifiers_use_the_closed_form_and_match_the_kernels():
    # typed formulas that are affine between breakpoints get the 1-D route; their maps match
    # Cho & Saul 2009 (relu), Sheppard 1899 (a typed step) and the |x| kernel derived from them
    c = np.concatenate([np.linspace(-1, 1, 201), [1 - 1e-9, -1 + 1e-9]])
    with mpmath.workdps(30):
        relu_k = np.array([float((mpmath.sqrt(1 - mpmath.mpf(x) ** 2) + (mpmath.pi
                                  - mpmath.acos(mpmath.mpf(x))) * mpmath.mpf(x)) / mpmath.pi)
                           for x in c])
        orthant = np.array([float(mpmath.mpf(1) / 4 + mpmath.asin(mpmath.mpf(x)) / (2 * mpmath.pi))
                            for x in c])
    assert_allclose(maps.correlation_map(A("max(x, 0)"), c, 2.0, 0.0, 0.7), relu_k, rtol=0,
                    atol=3e-14)
    assert_allclose(maps.pair_expectation(A("where(x >= 0, 1, 0)"), c, 2.5), orthant, rtol=0,
                    atol=3e-14)
    assert_allclose(maps.pair_expectation(A("abs(x)"), c, 1.9) / 1.9, _mp_abs_kernel(c), rtol=0,
                    atol=3e-14)


@pytest.mark.parametrize("q1,q2", [(0.8, 2.5), (20.0, 0.4), (0.05, 3.0)])
def test_conditional_route_with_unequal_variances_is_williams(q1, q2):
    # Williams 1997, eq. (11): E[erf(u1) erf(u2)] = (2/pi) arcsin(2 c sqrt(q1 q2) /
    # sqrt((1 + 2 q1)(1 + 2 q2))), in mpmath; through conditional_pair_expectation directly
    erf = A("erf")
    c = np.linspace(-0.999, 0.999, 37)
    got = conditional_pair_expectation([(erf.value, erf.smoothing.value)], c, q1, q2)[0]
    with mpmath.workdps(30):
        a, b = mpmath.mpf(q1), mpmath.mpf(q2)
        ref = [float(2 / mpmath.pi * mpmath.asin(2 * mpmath.mpf(x) * mpmath.sqrt(a * b)
                                                 / mpmath.sqrt((1 + 2 * a) * (1 + 2 * b))))
               for x in c]
    assert_allclose(got, ref, rtol=0, atol=3e-15)
    # and ReLU with unequal variances: E[relu(u1) relu(u2)] = sqrt(q1 q2) J_1(c) / (2 pi)
    # (Cho & Saul 2009, eq. 6, degree 1)
    relu = A("relu")
    got = conditional_pair_expectation([(relu.value, relu.smoothing.value)], c, q1, q2,
                                       relu.breakpoints)[0]
    with mpmath.workdps(30):
        ref = [float(mpmath.sqrt(mpmath.mpf(q1) * q2) / (2 * mpmath.pi)
                     * (mpmath.sqrt(1 - mpmath.mpf(x) ** 2)
                        + (mpmath.pi - mpmath.acos(mpmath.mpf(x))) * mpmath.mpf(x))) for x in c]
    assert_allclose(got, ref, rtol=0, atol=3e-15 * math.sqrt(q1 * q2))


def _mp_clip_pair(c, q, lo, hi):
    """E[clip(u1) clip(u2)] for clip to [lo, hi]: a 1-D mpmath quadrature (30 digits) of
    clip(u1) S(c u1, q (1 - c^2)), S(m, v) = E[clip(m + sqrt(v) z)] from the truncated normal
    moments (Johnson, Kotz & Balakrishnan 1994, section 10.1), split at every kink and crossing."""
    with mpmath.workdps(30):
        c, q = mpmath.mpf(c), mpmath.mpf(q)
        lo, hi = mpmath.mpf(lo), mpmath.mpf(hi)
        s = mpmath.sqrt(q * (1 - c) * (1 + c))

        def smooth(m):
            a, b = (lo - m) / s, (hi - m) / s
            mid = m * (mpmath.ncdf(b) - mpmath.ncdf(a)) + s * (mpmath.npdf(a) - mpmath.npdf(b))
            return lo * mpmath.ncdf(a) + mid + hi * (1 - mpmath.ncdf(b))

        def clip(x):
            return min(max(x, lo), hi)

        sq = mpmath.sqrt(q)
        cuts = {lo / sq, hi / sq}
        for b in (lo, hi):
            for k in (-4, -2, -1, 0, 1, 2, 4):
                cuts.add((b + k * s) / (c * sq))
        pts = [-mpmath.inf] + sorted(cuts) + [mpmath.inf]
        return float(mpmath.quad(lambda z: clip(sq * z) * smooth(c * sq * z) * mpmath.npdf(z),
                                 pts))


@pytest.mark.parametrize("text,lo,hi,q", [("hard_tanh", -1, 1, 46.42), ("hard_tanh", -1, 1, 0.3),
                                          ("min(max(x, -0.1), 0.1)", -0.1, 0.1, 42.17),
                                          ("min(max(x, 0), 2)", 0, 2, 1.0)])
def test_two_breakpoints_near_one_and_across_the_route_switch(text, lo, hi, q):
    # activations with two breakpoints: E[phi phi] just below and above c = 0.99 (where the
    # route changes to the slope integral) and closer to 1, against the mpmath quadrature above;
    # also C continuous and non-decreasing across the switch. Required 2e-15 of E[phi^2].
    act = A(text)
    c = np.array([0.985, 0.99, np.nextafter(0.99, 1.0), 0.9905, 0.992, 0.995, 0.999, 0.99999])
    got = maps.pair_expectation(act, c, q)
    scale = float(maps.second_moment(act, q))
    ref = np.array([_mp_clip_pair(x, q, lo, hi) for x in c])
    assert_allclose(got, ref, rtol=0, atol=2e-15 * scale)
    # non-decreasing up to a few ulps (0.99 and the next float differ by less than an ulp of C)
    assert np.all(np.diff(got) >= -1e-15 * scale)


def test_two_jumps_near_one_keep_their_digits():
    # two jumps (at -1 and 1): the Dirac cross terms of the slope near c = 1 are formed as
    # (b1 - b2)^2 + 2 b1 b2 (1 - c), not b1^2 - 2 c b1 b2 + b2^2. E[phi phi] with
    # phi = H(x - 1) + H(x + 1) from Sheppard-type orthant probabilities: for thresholds h, k
    # P(u1 > h, u2 > k) by scipy's bivariate normal CDF (scipy.stats.multivariate_normal)
    from scipy import stats
    act = A("where(x >= 1, 1, 0) + where(x >= -1, 1, 0)")
    q = 1.0
    for gap in (5e-3, 1e-4, 1e-6, 1e-9):
        c = 1.0 - gap
        cov = [[q, c * q], [c * q, q]]
        total = 0.0
        for h in (1.0, -1.0):
            for k in (1.0, -1.0):
                # P(u1 > h, u2 > k) = P(-u1 < -h, -u2 < -k)
                total += float(stats.multivariate_normal(mean=[0, 0], cov=cov).cdf([-h, -k]))
        got = float(maps.pair_expectation(act, c, q))
        # scipy's CDF is accurate to about 1e-8 (its default abseps): the check is loose, the
        # sharp one against the fine rule follows
        assert got == pytest.approx(total, abs=1e-7)
    fine = QuadratureRule(n_per_panel=32, panel_width=0.5)
    c = 1.0 - np.array([5e-3, 1e-4, 1e-6, 1e-9])
    direct = conditional_pair_expectation([(act.value, act.smoothing.value)], c, q, q,
                                          act.breakpoints, rule=fine)[0]
    # internal consistency at 2e-15 (no outside source): the slope route against the direct
    # 1-D route on a much finer rule
    assert_allclose(maps.pair_expectation(act, c, q), direct, rtol=0,
                    atol=2e-15 * float(maps.second_moment(act, q)))


def test_breakpoint_off_zero_is_graded_where_the_inner_mean_crosses_it():
    # max(x - 2, 0) - max(x, 0) (kinks at 0 and 2) at q = 1 just above c = 0.99: the inner
    # expectation's transition at c u1 = 2 has Gaussian tails over ~8 widths s / c, which the
    # crossing grading must cover (it did not, by 2e-13). Reference: mpmath at 30 digits of
    # E[phi(u1) S(c u1, 1 - c^2)] with S from the truncated normal moments
    act = A("max(x - 2, 0) - max(x, 0)")
    with mpmath.workdps(30):
        def ref(cf):
            c = mpmath.mpf(cf)
            s = mpmath.sqrt((1 - c) * (1 + c))

            def smooth(m):
                a0, a2 = -m / s, (2 - m) / s
                inside = m * (mpmath.ncdf(a2) - mpmath.ncdf(a0)) + s * (mpmath.npdf(a0)
                                                                       - mpmath.npdf(a2))
                return -inside - 2 * (1 - mpmath.ncdf(a2))

            def phi(x):
                return (x - 2 if x > 2 else 0) - (x if x > 0 else 0)

            pts = [-mpmath.inf, 0, 2] + [(2 + k * s) / c for k in (-4, -1, 0, 1, 4)] + [mpmath.inf]
            return float(mpmath.quad(lambda z: phi(z) * smooth(c * z) * mpmath.npdf(z),
                                     sorted(set(pts))))

        c = np.array([0.93, 0.959, 0.969, 0.9905, 0.992])
        expected = np.array([ref(x) for x in c])
    got_1d = conditional_pair_expectation([(act.value, act.smoothing.value)], c, 1.0, 1.0,
                                          act.breakpoints)[0]
    got_2d = bivariate_expectation(lambda a, b: act.value(a) * act.value(b), c, 1.0, 1.0,
                                   act.breakpoints)
    scale = float(maps.second_moment(act, 1.0))
    assert_allclose(got_1d, expected, rtol=0, atol=3e-15 * scale)
    assert_allclose(got_2d, expected, rtol=0, atol=3e-15 * scale)
