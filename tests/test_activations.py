"""Tests of the built-in activations (propcalc.activations.base, through the public ``activation``).

References used here, each named beside its check:

* mpmath 1.3 at 40+ significant digits: values of every built-in and their
  derivatives by ``mpmath.diff`` (numerical differentiation in extended
  precision, independent of propcalc's hand-written derivatives);
* closed forms (identities between sigmoid, tanh and softplus; the minimum of
  x sigmoid(x) through the Lambert W function; Gaussian masses via erfc);
* the papers that define the functions: Hendrycks & Gimpel 2016 (GELU and its
  approximations), Klambauer et al. 2017 (SELU constants), Clevert et al. 2016
  (ELU), He et al. 2015 (leaky/parametric ReLU).
"""

from __future__ import annotations

import math
import warnings

import mpmath as mp
import numpy as np
import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc import (
    Activation,
    ActivationProperties,
    InvalidParameterError,
    PropcalcError,
    UnknownActivationError,
    activation,
    builtin_names,
)
from propcalc.activations import SELU_ALPHA, SELU_SCALE

# ---------------------------------------------------------------------------------------------
# mpmath references: the textbook definition of each built-in, written independently
# ---------------------------------------------------------------------------------------------
with mp.workdps(40):  # Klambauer et al. 2017, eq. (14)
    _MP_SELU_ALPHA = mp.mpf("1.6732632423543772848170429916717")
    _MP_SELU_SCALE = mp.mpf("1.0507009873554804934193349852946")


def _mp_sigmoid(x):
    return 1 / (1 + mp.exp(-x))


def _mp_softplus(x):
    # log(1 + e^x), written so that mpmath keeps full relative precision at both ends
    return x + mp.log1p(mp.exp(-x)) if x > 0 else mp.log1p(mp.exp(x))


def _mp_gelu_tanh(x):
    # Hendrycks & Gimpel 2016: 0.5 x (1 + tanh(sqrt(2/pi) (x + 0.044715 x^3)));
    # 0.5 (1 + tanh(u)) = sigmoid(2u) avoids the cancellation 1 + tanh(u) for u << 0
    u = mp.sqrt(2 / mp.pi) * (x + mp.mpf("0.044715") * x**3)
    return x * _mp_sigmoid(2 * u)


MP_VALUE = {
    "linear": lambda x, **p: x,
    "step": lambda x, **p: mp.mpf(1) if x >= 0 else mp.mpf(0),
    "sigmoid": lambda x, **p: _mp_sigmoid(x),
    "tanh": lambda x, **p: mp.tanh(x),
    "relu": lambda x, **p: x if x > 0 else mp.mpf(0),
    "leaky_relu": lambda x, slope=0.01: x if x > 0 else mp.mpf(slope) * x,
    # Clevert et al. 2016, eq. (1)
    "elu": lambda x, alpha=1.0: x if x > 0 else mp.mpf(alpha) * mp.expm1(x),
    # Klambauer et al. 2017, eq. (2)
    "selu": lambda x, **p: _MP_SELU_SCALE * (x if x > 0 else _MP_SELU_ALPHA * mp.expm1(x)),
    "softplus": lambda x, **p: _mp_softplus(x),
    # Hendrycks & Gimpel 2016: GELU(x) = x Phi(x)
    "gelu": lambda x, **p: x * mp.ncdf(x),
    "gelu_tanh": lambda x, **p: _mp_gelu_tanh(x),
    "silu": lambda x, **p: x * _mp_sigmoid(x),
    "swish": lambda x, beta=1.0: x * _mp_sigmoid(mp.mpf(beta) * x),
    # mish(x) = x tanh(softplus(x)) (Misra 2019)
    "mish": lambda x, **p: x * mp.tanh(_mp_softplus(x)),
    "erf": lambda x, **p: mp.erf(x),
    "hard_tanh": lambda x, **p: max(mp.mpf(-1), min(mp.mpf(1), x)),
}

#: (name, params) pairs covering every built-in, with non-default parameters too
CASES = [(name, {}) for name in builtin_names()] + [
    ("leaky_relu", {"slope": 0.2}),
    ("leaky_relu", {"slope": -0.5}),
    ("elu", {"alpha": 0.5}),
    ("elu", {"alpha": 2.0}),
    ("swish", {"beta": 1.7}),
    ("swish", {"beta": 0.25}),
]


def _case_id(case):
    name, params = case
    return name + "".join(f"-{k}={v:g}" for k, v in params.items())


def _points_away_from(breakpoints, gap=1e-3):
    xs = np.concatenate([np.linspace(-30.0, 30.0, 121),
                         [-7.31, -2.5, -1.3, -0.37, -1e-2, 1e-2, 0.123, 0.999, 1.01, 3.3, 12.6]])
    keep = [x for x in xs if all(abs(x - b) > gap for b in breakpoints)]
    return np.asarray(keep, dtype=float)


def _mp_dps_for(name, x):
    # Enough digits to resolve phi' where phi = +-1 - tiny: tanh/sigmoid need ~|x| digits,
    # erf ~x^2 / 2.3 digits (erfc(x) ~ exp(-x^2)).
    if name == "erf":
        return 40 + int(0.5 * x * x)
    return 40 + int(abs(x))


def test_cases_cover_every_builtin():
    assert {name for name, _ in CASES} == set(builtin_names())
    assert set(MP_VALUE) == set(builtin_names())


# ---------------------------------------------------------------------------------------------
# finiteness and warnings far out
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("case", CASES, ids=_case_id)
@pytest.mark.parametrize("scale", [1e4, 1e6])
def test_large_arguments_are_finite_without_warnings(case, scale):
    # The module promises finite values and no overflow warnings for |x| up to 1e4 and beyond;
    # pytest turns warnings into errors, and we also raise on any numpy overflow/invalid here.
    name, params = case
    act = activation(name, **params)
    x = np.array([-scale, -scale / 3, -700.0, -40.0, 0.0, 40.0, 700.0, scale / 3, scale])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with np.errstate(over="raise", invalid="raise", divide="raise"):
            v = act.value(x)
            d = act.derivative(x)
    assert v.shape == x.shape and d.shape == x.shape
    assert np.all(np.isfinite(v)), (name, v)
    assert np.all(np.isfinite(d)), (name, d)


@pytest.mark.parametrize("case", CASES, ids=_case_id)
def test_large_arguments_match_mpmath(case):
    # values at +-1e4 and +-1e6 against the mpmath definitions (mpmath has no overflow)
    name, params = case
    act = activation(name, **params)
    x = np.array([-1e6, -1e4, 1e4, 1e6])
    with mp.workdps(40):
        ref = np.array([float(MP_VALUE[name](mp.mpf(t), **params)) for t in x])
    assert_allclose(act.value(x), ref, rtol=1e-15, atol=0)


@pytest.mark.parametrize("name", builtin_names())
def test_any_finite_argument_evaluates_without_warnings(name):
    # "Every built-in evaluates without overflow warnings or NaN for |x| up to 1e4 and beyond"
    # (module docstring of propcalc.activations.base): beyond includes every finite double.
    act = activation(name)
    x = np.array([-1e300, -1e200, -1e155, -1e103, 1e103, 1e155, 1e200, 1e300])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        v = act.value(x)
        d = act.derivative(x)
    assert np.all(np.isfinite(v)) and np.all(np.isfinite(d))


# ---------------------------------------------------------------------------------------------
# values and derivatives against mpmath
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("case", CASES, ids=_case_id)
def test_values_match_mpmath(case):
    # mpmath at >= 40 digits; 2e-13 relative covers scipy.special.ndtr's far-tail accuracy
    # (gelu at x < -10 is x * ndtr(x), good to ~1e-13 relative there).
    name, params = case
    act = activation(name, **params)
    xs = _points_away_from(act.breakpoints)
    ref = []
    for x in xs:
        with mp.workdps(_mp_dps_for(name, x)):
            ref.append(float(MP_VALUE[name](mp.mpf(float(x)), **params)))
    assert_allclose(act.value(xs), np.array(ref), rtol=2e-13, atol=1e-300)


@pytest.mark.parametrize("case", CASES, ids=_case_id)
def test_derivatives_match_mpmath_diff(case):
    # propcalc's exact derivatives against mpmath.diff of the mpmath definition, at 121+ points
    # in [-30, 30] at least 1e-3 away from any breakpoint. atol 1e-15 only matters near zeros
    # of phi' (gelu' vanishes at x = -0.7518), where the relative error is ill-conditioned.
    name, params = case
    act = activation(name, **params)
    xs = _points_away_from(act.breakpoints)
    ref = []
    for x in xs:
        with mp.workdps(_mp_dps_for(name, x)):
            ref.append(float(mp.diff(lambda t: MP_VALUE[name](t, **params), mp.mpf(float(x)))))
    assert_allclose(act.derivative(xs), np.array(ref), rtol=2e-13, atol=1e-15)


@pytest.mark.parametrize("case", CASES, ids=_case_id)
def test_derivatives_match_high_order_finite_differences(case):
    # A second, float-only reference: the 8th-order central difference
    # f' ~ sum_k c_k f(x + k h) / h (Fornberg 1988 weights), h = 1e-3, at points 0.05 away
    # from breakpoints; truncation error ~h^8 f^(9), rounding ~1e-16 / h.
    name, params = case
    act = activation(name, **params)
    xs = np.array([x for x in np.linspace(-6.0, 6.0, 49) + 0.0371
                   if all(abs(x - b) > 0.05 for b in act.breakpoints)])
    h = 1e-3
    coeffs = {1: 4 / 5, 2: -1 / 5, 3: 4 / 105, 4: -1 / 280}
    fd = sum(c * (act.value(xs + k * h) - act.value(xs - k * h)) for k, c in coeffs.items()) / h
    assert_allclose(act.derivative(xs), fd, rtol=1e-9, atol=1e-11)


# ---------------------------------------------------------------------------------------------
# identities and published approximations
# ---------------------------------------------------------------------------------------------
X = np.linspace(-40.0, 40.0, 8001)


def test_softplus_derivative_is_sigmoid():
    # d/dx log(1 + e^x) = 1 / (1 + e^-x) (closed form)
    assert_allclose(activation("softplus").derivative(X), activation("sigmoid").value(X),
                    rtol=1e-15, atol=0)


def test_tanh_is_a_rescaled_sigmoid():
    # tanh(x) = 2 sigmoid(2x) - 1 (closed form); the right side loses absolute accuracy
    # ~1e-16 near 0 by cancellation, hence the atol.
    sig = activation("sigmoid").value(2 * X)
    assert_allclose(activation("tanh").value(X), 2 * sig - 1, rtol=1e-15, atol=4e-16)
    # and tanh' = 4 sigmoid'(2x)
    assert_allclose(activation("tanh").derivative(X), 4 * activation("sigmoid").derivative(2 * X),
                    rtol=1e-14, atol=1e-300)


def test_gelu_is_close_to_the_sigmoid_approximation():
    # Hendrycks & Gimpel 2016, section 2: GELU(x) ~ x sigmoid(1.702 x). The largest deviation,
    # 0.020335 at x = +-2.2704 (the difference is even, since gelu(-x) = gelu(x) - x and the same
    # holds for x sigmoid(1.702 x)), was computed here with mpmath (4001 points on [-10, 10]).
    gelu = activation("gelu").value(X)
    approx = X * activation("sigmoid").value(1.702 * X)
    dev = np.abs(gelu - approx)
    assert dev.max() < 0.021
    assert dev.max() > 0.020  # the bound is tight: the check is not vacuous
    assert abs(abs(X[np.argmax(dev)]) - 2.2704) < 0.02


def test_gelu_tanh_is_close_to_gelu():
    # Hendrycks & Gimpel 2016: 0.5 x (1 + tanh(sqrt(2/pi)(x + 0.044715 x^3))) approximates GELU;
    # max |difference| = 4.732e-4, computed here with mpmath on [-10, 10].
    diff = np.abs(activation("gelu_tanh").value(X) - activation("gelu").value(X))
    assert 4.6e-4 < diff.max() < 4.8e-4
    ddiff = np.abs(activation("gelu_tanh").derivative(X) - activation("gelu").derivative(X))
    assert ddiff.max() < 5e-3


def test_silu_is_swish_with_beta_one():
    # Ramachandran et al. 2017: swish(x; beta) = x sigmoid(beta x); beta = 1 is SiLU
    # (Elfwing et al. 2018). Same formula, so equal to the last bit.
    silu, swish = activation("silu"), activation("swish", beta=1.0)
    np.testing.assert_array_equal(silu.value(X), swish.value(X))
    np.testing.assert_array_equal(silu.derivative(X), swish.derivative(X))
    assert activation("swish").params == {"beta": 1.0}


def test_selu_constants_match_klambauer_2017():
    # Klambauer et al. 2017, eq. (14): alpha_01 and lambda_01 in closed form, evaluated with
    # mpmath (the closed forms are quoted from memory; they reproduce the paper's printed digits
    # 1.6733 and 1.0507 and the 32 digits of the reference implementation).
    with mp.workdps(40):
        e, erfc = mp.e, mp.erfc
        r = erfc(1 / mp.sqrt(2))
        alpha = -mp.sqrt(2 / mp.pi) / (r * mp.sqrt(e) - 1)
        lam = (1 - r * mp.sqrt(e)) * mp.sqrt(2 * mp.pi) * (
            2 * erfc(mp.sqrt(2)) * e**2 + mp.pi * r**2 * e - 2 * (2 + mp.pi) * r * mp.sqrt(e)
            + mp.pi + 2) ** (-mp.mpf(1) / 2)
        assert abs(float(alpha) - SELU_ALPHA) <= 1e-16 * SELU_ALPHA
        assert abs(float(lam) - SELU_SCALE) <= 1e-16 * SELU_SCALE


def test_selu_fixes_zero_mean_unit_variance():
    # The defining property (Klambauer et al. 2017, section 3): for z ~ N(0, 1),
    # E[selu(z)] = 0 and E[selu(z)^2] = 1. mpmath quadrature of propcalc's selu on each side of 0.
    act = activation("selu")
    with mp.workdps(30):
        def gauss(f):
            w = lambda z: f(z) * mp.npdf(z)
            return mp.quad(w, [-mp.inf, 0]) + mp.quad(w, [0, mp.inf])
        f = lambda z: mp.mpf(float(act.value(np.array([float(z)]))[0]))
        m1 = gauss(f)
        m2 = gauss(lambda z: f(z) ** 2)
    assert abs(float(m1)) < 1e-14
    assert abs(float(m2) - 1.0) < 1e-14


# ---------------------------------------------------------------------------------------------
# the property profile of each built-in
# ---------------------------------------------------------------------------------------------
def _minimum(name, params, x0):
    """Global minimum of a non-monotone activation by mpmath.findroot on phi'."""
    with mp.workdps(30):
        f = lambda t: MP_VALUE[name](t, **params)
        root = mp.findroot(lambda t: mp.diff(f, t), x0)
        return float(f(root))


INF = math.inf
_W = float(mp.lambertw(1 / mp.e).real)  # min of x sigmoid(x) is -W(1/e) (closed form, Lambert W)
_DEAD_HARD_TANH = math.erfc(1 / math.sqrt(2))  # P(|z| > 1) = 2 Phi(-1) = 0.31731... (closed form)

# name, params: (range, monotonic, value at 0, parity, smoothness, P(dead), vanishing tails)
# Ranges and P(dead) are closed forms or mpmath minima; P(dead) = P(phi'(z) = 0), z ~ N(0, 1).
EXPECTED = {
    ("linear", ()): ((-INF, INF), True, 0.0, "odd", "smooth", 0.0, ()),
    ("step", ()): ((0.0, 1.0), True, 1.0, "neither", "discontinuous", 1.0, ("left", "right")),
    ("sigmoid", ()): ((0.0, 1.0), True, 0.5, "neither", "smooth", 0.0, ("left", "right")),
    ("tanh", ()): ((-1.0, 1.0), True, 0.0, "odd", "smooth", 0.0, ("left", "right")),
    ("relu", ()): ((0.0, INF), True, 0.0, "neither", "C0", 0.5, ("left",)),
    ("leaky_relu", ()): ((-INF, INF), True, 0.0, "neither", "C0", 0.0, ()),
    ("leaky_relu", (("slope", 0.2),)): ((-INF, INF), True, 0.0, "neither", "C0", 0.0, ()),
    ("leaky_relu", (("slope", -0.5),)): ((0.0, INF), False, 0.0, "neither", "C0", 0.0, ()),
    # ELU with alpha = 1 has a continuous derivative (Clevert et al. 2016)
    ("elu", ()): ((-1.0, INF), True, 0.0, "neither", "C1", 0.0, ("left",)),
    ("elu", (("alpha", 0.5),)): ((-0.5, INF), True, 0.0, "neither", "C0", 0.0, ("left",)),
    ("elu", (("alpha", 0.0),)): ((0.0, INF), True, 0.0, "neither", "C0", 0.5, ("left",)),
    ("selu", ()): ((-SELU_SCALE * SELU_ALPHA, INF), True, 0.0, "neither", "C0", 0.0, ("left",)),
    ("softplus", ()): ((0.0, INF), True, math.log(2.0), "neither", "smooth", 0.0, ("left",)),
    ("gelu", ()): (("min", INF), False, 0.0, "neither", "smooth", 0.0, ("left",)),
    ("gelu_tanh", ()): (("min", INF), False, 0.0, "neither", "smooth", 0.0, ("left",)),
    ("silu", ()): ((-_W, INF), False, 0.0, "neither", "smooth", 0.0, ("left",)),
    ("swish", ()): ((-_W, INF), False, 0.0, "neither", "smooth", 0.0, ("left",)),
    # x sigmoid(beta x) = (1/beta) t sigmoid(t), t = beta x: the minimum scales as 1/beta
    ("swish", (("beta", 2.0),)): ((-_W / 2, INF), False, 0.0, "neither", "smooth", 0.0, ("left",)),
    ("swish", (("beta", 0.001),)): ((-_W / 0.001, INF), False, 0.0, "neither", "smooth", 0.0, ()),
    ("mish", ()): (("min", INF), False, 0.0, "neither", "smooth", 0.0, ("left",)),
    ("erf", ()): ((-1.0, 1.0), True, 0.0, "odd", "smooth", 0.0, ("left", "right")),
    ("hard_tanh", ()): ((-1.0, 1.0), True, 0.0, "odd", "C0", _DEAD_HARD_TANH, ("left", "right")),
}
_MIN_START = {"gelu": -0.75, "gelu_tanh": -0.75, "mish": -1.2}


@pytest.mark.parametrize("key", list(EXPECTED), ids=lambda k: _case_id((k[0], dict(k[1]))))
def test_properties(key):
    name, params = key[0], dict(key[1])
    rng, mono, at0, parity, smooth, dead, tails = EXPECTED[key]
    pr = activation(name, **params).properties
    assert isinstance(pr, ActivationProperties)
    lo = _minimum(name, params, _MIN_START[name]) if rng[0] == "min" else rng[0]
    assert pr.output_range[1] == rng[1]
    if math.isinf(lo):
        assert pr.output_range[0] == lo
    else:
        assert pr.output_range[0] == pytest.approx(lo, rel=1e-12, abs=1e-15)
    assert pr.monotonic is mono
    assert pr.value_at_zero == pytest.approx(at0, rel=1e-15, abs=0)
    assert pr.parity == parity
    assert pr.smoothness == smooth
    assert pr.dead_unit_probability == pytest.approx(dead, rel=1e-12, abs=1e-15)
    assert tuple(pr.vanishing_gradient_tails) == tails


def test_named_minima():
    # values quoted to the digits computed here with mpmath (findroot on phi')
    assert _minimum("gelu", {}, -0.75) == pytest.approx(-0.169971207479904, abs=1e-14)
    assert _minimum("mish", {}, -1.2) == pytest.approx(-0.308843413017250, abs=1e-14)
    assert -_W == pytest.approx(-0.278464542761074, abs=1e-14)  # -W(1/e)


def test_dead_unit_probabilities_named_in_the_brief():
    # relu: P(z < 0) = 1/2; hard_tanh: P(|z| > 1) = 2 Phi(-1) = 0.3173105...; step: phi' = 0 a.e.
    assert activation("relu").properties.dead_unit_probability == 0.5
    assert activation("hard_tanh").properties.dead_unit_probability == pytest.approx(
        0.31731050786291410, rel=1e-13)
    assert activation("step").properties.dead_unit_probability == 1.0


@pytest.mark.parametrize("slope", [1e-4, 1e-3, 1e-6])
def test_small_leaky_slope_is_still_unbounded_below(slope):
    # slope * x -> -inf as x -> -inf for any slope > 0 (closed form)
    assert activation("leaky_relu", slope=slope).properties.output_range == (-INF, INF)


def test_properties_to_dict_is_plain():
    d = activation("relu").properties.to_dict()
    assert d == {"output_range": [0.0, INF], "monotonic": True, "value_at_zero": 0.0,
                 "parity": "neither", "smoothness": "C0", "dead_unit_probability": 0.5,
                 "vanishing_gradient_tails": ["left"]}


# ---------------------------------------------------------------------------------------------
# breakpoints, jumps and kinks
# ---------------------------------------------------------------------------------------------
BREAKPOINTS = {
    "linear": (), "step": (0.0,), "sigmoid": (), "tanh": (), "relu": (0.0,),
    "leaky_relu": (0.0,), "elu": (0.0,), "selu": (0.0,), "softplus": (), "gelu": (),
    "gelu_tanh": (), "silu": (), "swish": (), "mish": (), "erf": (), "hard_tanh": (-1.0, 1.0),
}


@pytest.mark.parametrize("name", builtin_names())
def test_breakpoints(name):
    # the points where phi or phi' is not smooth, read off each definition
    act = activation(name)
    assert act.breakpoints == BREAKPOINTS[name]
    smooth_elsewhere = not act.breakpoints
    assert (act.properties.smoothness == "smooth") == smooth_elsewhere


# phi(b+) - phi(b-) and phi'(b+) - phi'(b-) at each breakpoint, from the definitions
JUMPS_KINKS = [
    ("step", {}, (1.0,), (0.0,)),
    ("relu", {}, (0.0,), (1.0,)),
    ("leaky_relu", {}, (0.0,), (0.99,)),
    ("leaky_relu", {"slope": 0.2}, (0.0,), (0.8,)),
    ("hard_tanh", {}, (0.0, 0.0), (1.0, -1.0)),
    ("elu", {}, (0.0,), (0.0,)),                 # C1 at alpha = 1 (Clevert et al. 2016)
    ("elu", {"alpha": 0.5}, (0.0,), (0.5,)),
    ("selu", {}, (0.0,), (SELU_SCALE * (1.0 - SELU_ALPHA),)),  # lambda (1 - alpha) = -0.7074
]


@pytest.mark.parametrize("name,params,jumps,kinks", JUMPS_KINKS,
                         ids=[_case_id((n, p)) for n, p, _, _ in JUMPS_KINKS])
def test_jumps_and_kinks(name, params, jumps, kinks):
    act = activation(name, **params)
    assert_allclose(act.jumps, jumps, rtol=1e-8, atol=1e-8)
    assert_allclose(act.kinks, kinks, rtol=1e-8, atol=1e-8)
    assert act.has_jumps == any(j != 0.0 for j in jumps)


def test_only_step_jumps():
    assert [n for n in builtin_names() if activation(n).has_jumps] == ["step"]


# ---------------------------------------------------------------------------------------------
# names, parameters and errors
# ---------------------------------------------------------------------------------------------
def test_builtin_names_are_stable_and_complete():
    names = builtin_names()
    assert isinstance(names, tuple) and len(names) == len(set(names)) == 16
    assert names == builtin_names()
    for n in names:
        act = activation(n)
        assert isinstance(act, Activation) and act.name == n and act.description


@pytest.mark.parametrize("spec", ["tanhh", "softmax", "leaky_rel", "tanh_x", "relu6"])
def test_unknown_names_raise_with_the_choices(spec):
    with pytest.raises(UnknownActivationError) as info:
        activation(spec)
    msg = str(info.value)
    assert repr(spec) in msg
    for name in ("tanh", "relu", "gelu", "hard_tanh"):  # the message lists the built-ins
        assert name in msg
    assert isinstance(info.value, ValueError) and isinstance(info.value, PropcalcError)


@pytest.mark.parametrize("spec", [3, 1.5, None, ["tanh"], b"tanh"])
def test_non_string_specs_raise(spec):
    with pytest.raises(UnknownActivationError, match="activation must be a name or formula"):
        activation(spec)


def test_surrounding_whitespace_is_ignored():
    assert activation("  tanh ") is activation("tanh")


@pytest.mark.parametrize("name,key,allowed", [
    ("tanh", "slope", "no parameters"),
    ("relu", "alpha", "no parameters"),
    ("leaky_relu", "beta", "slope"),
    ("elu", "slope", "alpha"),
    ("swish", "alpha", "beta"),
])
def test_unknown_parameters_name_the_field_and_the_choices(name, key, allowed):
    with pytest.raises(InvalidParameterError) as info:
        activation(name, **{key: 0.5})
    err = info.value
    assert err.field == f"params.{key}"
    assert name in err.constraint and allowed in err.constraint
    assert err.value == 0.5
    assert str(err) == f"params.{key} must be {err.constraint}, got 0.5"


@pytest.mark.parametrize("bad", [math.nan, math.inf, -math.inf, "abc", None, True, [0.1]])
@pytest.mark.parametrize("name,key", [("leaky_relu", "slope"), ("elu", "alpha"),
                                      ("swish", "beta")])
def test_invalid_parameter_values(name, key, bad):
    with pytest.raises(InvalidParameterError) as info:
        activation(name, **{key: bad})
    err = info.value
    assert err.field == f"params.{key}"
    assert err.constraint == "a finite real number"
    assert str(err) == f"params.{key} must be a finite real number, got {bad!r}"


def test_elu_alpha_must_be_nonnegative():
    # ELU is defined for alpha >= 0 (Clevert et al. 2016); the message names field, rule, value,
    # with the same field spelling as every other parameter error ("params.<name>").
    with pytest.raises(InvalidParameterError) as info:
        activation("elu", alpha=-1.0)
    assert info.value.field == "params.alpha"
    assert str(info.value) == "params.alpha must be >= 0, got -1.0"


def test_integer_parameters_are_accepted_as_floats():
    act = activation("leaky_relu", slope=0)
    assert act.params == {"slope": 0.0}
    assert act is activation("leaky_relu", slope=0.0)
    assert activation("elu", alpha=np.float64(0.5)) is activation("elu", alpha=0.5)


def test_labels_show_the_parameters():
    assert activation("tanh").label == "tanh"
    assert activation("leaky_relu", slope=0.2).label == "leaky_relu(slope=0.2)"
    assert activation("swish", beta=1.7).to_dict()["params"] == {"beta": 1.7}


# ---------------------------------------------------------------------------------------------
# caching
# ---------------------------------------------------------------------------------------------
def test_same_spec_returns_the_same_object():
    assert activation("tanh") is activation("tanh")
    assert activation("leaky_relu", slope=0.1) is activation("leaky_relu", slope=0.1)
    assert activation("leaky_relu", slope=0.1) is not activation("leaky_relu", slope=0.2)
    act = activation("gelu")
    assert activation(act) is act  # an Activation passes through unchanged
    assert act.properties is act.properties  # the profile is computed once


def test_activations_compare_by_identity():
    a = activation("relu")
    assert a == activation("relu") and hash(a) == hash(activation("relu"))
    assert activation("silu") != activation("swish")  # same function, different objects


def test_activation_objects_are_frozen():
    act = activation("tanh")
    with pytest.raises(AttributeError):  # dataclasses.FrozenInstanceError
        act.name = "other"  # type: ignore[misc]


def test_to_dict_is_json_ready():
    import json

    for name in builtin_names():
        d = propcalc.jsonable(activation(name).to_dict())
        text = json.dumps(d, allow_nan=False)
        assert json.loads(text)["name"] == name


def test_exact_parity_is_bitwise():
    # The maps compute E[phi(u1) phi(u2)] at -c from c only for an exactly odd or even phi
    # (for odd phi the Hermite expansion has odd terms only: Mehler's formula, Daniely et al.
    # 2016, section 6). Odd by definition: linear, tanh, erf, hard_tanh; the rest are not.
    odd = {"linear", "tanh", "erf", "hard_tanh"}
    for name in propcalc.builtin_names():
        assert propcalc.activation(name).exact_parity == ("odd" if name in odd else None), name
    from propcalc.activations.formula import formula_activation
    assert formula_activation("x / (1 + abs(x))").exact_parity == "odd"
    assert formula_activation("x**2 - 3").exact_parity == "even"
    # odd to 1e-13 but not exactly: the tolerant profile says odd, the maps must not
    near = formula_activation("tanh(x) + 1e-13")
    assert near.exact_parity is None


def test_map_of_an_odd_activation_by_symmetry_matches_direct_points():
    # internal consistency (the closed-form checks of the odd erf over c in [-1, 1] are in
    # test_maps.py, Williams 1997): hard_tanh's vectorised map (half of it by symmetry) against
    # one-point pair expectations at negative c
    from propcalc.meanfield import maps
    act = propcalc.activation("hard_tanh")
    c = np.linspace(-1.0, 1.0, 401)
    got = maps.correlation_map(act, c, 1.3, 0.1, 0.8)
    v = float(maps.variance_map(act, 0.8, 1.3, 0.1))
    for i in range(0, 200, 17):
        one = float(maps.pair_expectation(act, np.array([c[i]]), 0.8)[0])
        assert abs(got[i] - (1.3 * one + 0.1) / v) <= 1e-15


def test_builtin_cache_is_bounded_and_keeps_identity_while_cached():
    # issue 11 section 4: every distinct leaky_relu slope was kept forever (about 7 MB per
    # 1,000 slopes per worker); the cache is now an LRU with a bound (common practice, no source)
    from propcalc.activations.builtins import BUILTIN_CACHE

    BUILTIN_CACHE.clear()
    first = activation("leaky_relu", slope=0.5)
    assert activation("leaky_relu", slope=0.5) is first  # same name and params, same object
    for k in range(3 * BUILTIN_CACHE.max_entries):
        activation("leaky_relu", slope=1e-3 * (k + 1))
        assert len(BUILTIN_CACHE) <= BUILTIN_CACHE.max_entries
    assert len(BUILTIN_CACHE) == BUILTIN_CACHE.max_entries
    again = activation("leaky_relu", slope=0.5)  # evicted long ago: rebuilt, equal in value
    assert again is not first and again.params == first.params
    assert activation("leaky_relu", slope=0.5) is again
    tanh = activation("tanh")
    for k in range(10):
        activation("elu", alpha=1.0 + k)
    assert activation("tanh") is tanh  # recently used entries stay


def test_clear_activation_caches_empties_every_activation_cache():
    from propcalc.activations import activation_caches, clear_activation_caches

    activation("leaky_relu", slope=0.3)
    activation("x * sigmoid(x) + 0.125 * x")
    assert {c.name for c in activation_caches()} >= {"activations.builtins", "activations.formulas"}
    assert sum(len(c) for c in activation_caches()) >= 2
    clear_activation_caches()
    assert all(len(c) == 0 for c in activation_caches())


def test_activation_caches_are_in_the_engine_registry():
    # propcalc.clear_caches() (the one public call) empties the activation caches too
    from propcalc import caches

    registered = caches.caches()
    assert {"activations.builtins", "activations.formulas"} <= set(registered)
    a = activation("leaky_relu", slope=0.37)
    activation("x * sigmoid(x) + 0.375 * x")
    assert len(registered["activations.builtins"]) >= 1
    propcalc.clear_caches()
    assert len(registered["activations.builtins"]) == 0
    assert len(registered["activations.formulas"]) == 0
    b = activation("leaky_relu", slope=0.37)
    assert b is not a and b.params == a.params  # rebuilt after the clear, same values
