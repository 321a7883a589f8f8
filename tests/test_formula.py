"""Typed formulas: parsing, exact derivatives, breakpoints, probes, and agreement with built-ins.

References used below, each named beside its check:

* mpmath (``mpmath.diff``, ``mpmath.findroot``, ``mpmath.quad``) at 30 digits and
  ``scipy.integrate.quad`` as independent numerical references;
* central finite differences of order 8 (Fornberg 1988, Math. Comp. 51(184),
  table 1, first derivative, 8th-order accuracy; weights from memory);
* closed forms: E[relu(z)^2] = 1/2 and the He gain sqrt(2) (He et al. 2015,
  eq. 10); Gaussian moments E[z^4] = 3, E[z^6] = 15 (Abramowitz & Stegun 1964,
  26.2.1, from memory);
* the built-in activations of propcalc, themselves tested against their papers.
"""

from __future__ import annotations

import math
import threading

import mpmath as mp
import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate

import propcalc
from propcalc.activations import formula as formula_module
from propcalc.activations.formula.differentiator import Differentiator
from propcalc.activations.formula.printer import to_text
from propcalc.activations.formula.reader import Reader, parse
from propcalc.activations.formula.tree import Builder
from propcalc.errors import FormulaError

mp.mp.dps = 30


# ---------------------------------------------------------------------------------------
# the basics of the contract
# ---------------------------------------------------------------------------------------
def test_formula_returns_an_activation_with_texts() -> None:
    act = propcalc.activation("x * tanh(softplus(x))")
    assert isinstance(act, propcalc.Activation)
    assert act.name == "x * tanh(softplus(x))"
    assert act.formula == "x * tanh(softplus(x))"
    assert act.derivative_formula == ("tanh(softplus(x)) + x * ((1 - tanh(softplus(x))**2) "
                                      "* sigmoid(x))")
    assert act.breakpoints == ()
    assert act.params == {}
    assert "derivative by exact symbolic differentiation" in act.description


def test_parameters_are_recorded_and_shown() -> None:
    act = propcalc.activation("x * sigmoid(beta * x)", beta=1.5)
    assert act.params == {"beta": 1.5}
    assert act.formula == "x * sigmoid(beta * x)"
    assert act.derivative_formula == ("sigmoid(beta * x) + x * (sigmoid(beta * x) * "
                                      "sigmoid(-(beta * x)) * beta)")
    assert act.label == "x * sigmoid(beta * x) with beta=1.5"
    assert act.to_dict()["params"] == {"beta": 1.5}


def test_same_input_same_object_and_params_key_the_cache() -> None:
    a = propcalc.activation("x * sigmoid(beta * x)", beta=1.5)
    assert propcalc.activation("x * sigmoid(beta * x)", beta=1.5) is a
    padded = propcalc.activation("  x * sigmoid(beta * x) ", beta=1.5)  # cached by exact text
    assert padded is not a and padded.name == a.name and padded.formula == a.formula
    assert propcalc.activation("x * sigmoid(beta * x)", beta=1.5000001) is not a
    assert propcalc.activation("x*sigmoid(beta*x)", beta=1.5) is not a  # another spelling
    assert propcalc.activation("x*sigmoid(beta*x)", beta=1.5).formula == a.formula


def test_cache_is_bounded(monkeypatch: pytest.MonkeyPatch) -> None:
    # a service taking formulas from anyone must not grow without bound
    monkeypatch.setattr(formula_module.FORMULA_CACHE, "max_entries", 3)
    formula_module.clear_formula_cache()
    first = propcalc.activation("x + 1")
    for k in range(2, 6):
        propcalc.activation(f"x + {k}")
    assert len(formula_module.FORMULA_CACHE) == 3
    assert propcalc.activation("x + 1") is not first  # evicted, rebuilt
    formula_module.clear_formula_cache()


def test_concurrent_builds_return_one_object() -> None:
    formula_module.clear_formula_cache()
    out: list[propcalc.Activation] = []

    def build() -> None:
        out.append(propcalc.activation("x * tanh(softplus(x)) + 0.25 * x"))

    threads = [threading.Thread(target=build) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(out) == 4 and all(a is out[0] for a in out[1:])
    assert propcalc.activation("x * tanh(softplus(x)) + 0.25 * x") is out[0]


def test_builtin_names_still_resolve_to_builtins() -> None:
    assert propcalc.activation("tanh").formula is None
    assert propcalc.activation(" leaky_relu ", slope=0.2).params == {"slope": 0.2}
    assert propcalc.activation("tanh(x)").formula == "tanh(x)"
    act = propcalc.activation("relu")
    assert propcalc.activation(act) is act


@pytest.mark.parametrize("text, normalised", [
    ("x*tanh(softplus(x))", "x * tanh(softplus(x))"),
    ("(x)", "x"),
    ("+x", "x"),
    ("-x**2", "-x**2"),
    ("(-x)**2", "(-x)**2"),
    ("(1 + x**2)**-1.5 * x", "(1 + x**2)**-1.5 * x"),
    ("x - (1 - x)", "x - (1 - x)"),
    ("x / (2 * x**2 + 1)", "x / (2 * x**2 + 1)"),
    ("1e3 * x + 0.5e-1", "1000 * x + 0.05"),
    ("0x10 * x", "16 * x"),
    ("where(x>0 and not x>3, x, 0)", "where(x > 0 and not x > 3, x, 0)"),
    ("where((x < -1) or (x > 1), x, 0)", "where(x < -1 or x > 1, x, 0)"),
    ("2 * pi * e * x", "2 * pi * e * x"),
    ("x * -2", "x * (-2)"),
])
def test_normalised_text(text: str, normalised: str) -> None:
    act = propcalc.activation(text)
    assert act.formula == normalised
    # the normalised text reads back to the same function (bit for bit)
    again = propcalc.activation(normalised)
    assert again.formula == normalised
    xs = np.linspace(-5, 5, 101) + 0.0123
    assert_allclose(again.value(xs), act.value(xs), rtol=0, atol=0)


def test_x_to_a_fractional_power_is_refused_on_negative_x() -> None:
    with pytest.raises(FormulaError, match=r"at x = 0: x\*\*-1.5 raises 0 to a negative power"):
        propcalc.activation("x**-1.5 * (1 + x**2)")


# ---------------------------------------------------------------------------------------
# derivatives
# ---------------------------------------------------------------------------------------
# Fornberg 1988, table 1: 8th-order central weights for f'(x) (from memory)
_FD8 = np.array([1 / 280, -4 / 105, 1 / 5, -4 / 5, 0.0, 4 / 5, -1 / 5, 4 / 105, -1 / 280])


def _fd8(fn, x: np.ndarray, h: float) -> np.ndarray:
    return sum(w * fn(x + k * h) for k, w in zip(range(-4, 5), _FD8)) / h


DERIVATIVE_FORMULAS: list[tuple[str, dict[str, float]]] = [
    ("x * tanh(softplus(x))", {}),
    ("x * sigmoid(beta * x)", {"beta": 1.5}),
    ("gelu(x) + 0.1 * x", {}),
    ("exp(-x**2 / 2) * sin(3 * x)", {}),
    ("log(1 + x**2) - log1p(x**2 / 4)", {}),
    ("expm1(-x**2) + sqrt(1 + x**2)", {}),
    ("abs(x) * cos(x)", {}),
    ("tanh(x) * sinh(x / 100) - cosh(x / 200)", {}),
    ("arctan(x) + erf(x / 2) - erfc(x)", {}),
    ("softplus(2 * x) / 2 - sigmoid(x)**2", {}),
    ("x**3 / (1 + x**2)", {}),
    ("(1 + x**2)**(sin(x) / 4)", {}),
    ("2**(x / 32) / (1 + 2**(x / 32))", {}),
    ("e**(-x**2) + pi * x", {}),
    ("max(x, 0.5 * x) + min(x**2, 1)", {}),
    ("where(x > 1, x**2, where(x < -1, -x, 1 - x**2 / 2))", {}),
    ("where(x > a and x < b, x, 0.1 * x)", {"a": -0.5, "b": 2.0}),
    ("relu(x - 1) + leaky_relu(x) + elu(2 * x) + selu(x)", {}),
    ("gelu_tanh(x) + silu(x) + swish(x) + mish(x) + erf(x)", {}),
    ("hard_tanh(2 * x) + step(x - 3) + linear(x) + softplus(x) + tanh(sigmoid(x))", {}),
    ("x / (1 + abs(x))", {}),
    ("(x**2 + 1)**0.5 * x**-2 * x**2", {}),  # x**-2 at 0 is refused; see next test
    ("x**2 / 2 - x**4 / 24 + x**6 / 720", {}),
    ("beta * x**beta2", {"beta": 0.7, "beta2": 3.0}),
    ("-(-x)", {}),
]


def _away_from(bps: tuple[float, ...], x: np.ndarray, gap: float) -> np.ndarray:
    keep = np.ones_like(x, dtype=bool)
    for b in bps:
        keep &= np.abs(x - b) > gap
    return x[keep]


@pytest.mark.parametrize("text, params", DERIVATIVE_FORMULAS, ids=[t for t, _ in DERIVATIVE_FORMULAS])
def test_derivative_matches_high_order_finite_differences(text: str, params: dict[str, float]) -> None:
    if "x**-2" in text:
        with pytest.raises(FormulaError, match=r"x\*\*-2 .*raises 0 to a negative power|divides"):
            propcalc.activation(text, **params)
        return
    act = propcalc.activation(text, **params)
    h = 1e-3
    x = _away_from(act.breakpoints, np.concatenate([np.linspace(-8, 8, 641) + 0.00371,
                                                    [-40.3, -20.1, 15.7, 33.3]]), 10 * h)
    fd = _fd8(act.value, x, h)
    d = act.derivative(x)
    # truncation ~ h^8 |f^(9)| / 630 plus rounding ~ eps |f| / h
    tol = 1e-9 * (1.0 + np.abs(d)) + 1e-13 * (1.0 + np.abs(act.value(x))) / h
    assert np.all(np.abs(fd - d) <= tol), float(np.max(np.abs(fd - d) / tol))


MPMATH_REFERENCES = [
    ("x * tanh(softplus(x))", {}, lambda t: t * mp.tanh(mp.log(1 + mp.exp(t)))),
    ("x * sigmoid(beta * x)", {"beta": 1.5}, lambda t: t / (1 + mp.exp(-1.5 * t))),
    ("gelu(x) + 0.1 * x", {}, lambda t: t * mp.ncdf(t) + t / 10),
    ("(1 + x**2)**(sin(x) / 4)", {}, lambda t: (1 + t**2) ** (mp.sin(t) / 4)),
    ("abs(x)**1.5 * erfc(x)", {}, lambda t: abs(t) ** mp.mpf(1.5) * mp.erfc(t)),
    ("log1p(x**2) * arctan(x) - cosh(x / 30)", {},
     lambda t: mp.log(1 + t**2) * mp.atan(t) - mp.cosh(t / 30)),
    ("gelu_tanh(x)", {}, lambda t: t / (1 + mp.exp(-2 * mp.sqrt(2 / mp.pi) * (t + mp.mpf("0.044715") * t**3)))),
    ("selu(x)", {}, lambda t: mp.mpf("1.0507009873554804934193349852946") * (
        t if t > 0 else mp.mpf("1.6732632423543772848170429916717") * (mp.exp(t) - 1))),
]


@pytest.mark.parametrize("text, params, ref", MPMATH_REFERENCES, ids=[m[0] for m in MPMATH_REFERENCES])
def test_derivative_matches_mpmath(text: str, params: dict[str, float], ref) -> None:
    # reference: mpmath.diff of a hand-written 30-digit version of the same function
    act = propcalc.activation(text, **params)
    xs = [-6.5, -2.25, -0.75, -0.1, 0.3, 1.1, 2.9, 7.3]
    got = act.derivative(np.array(xs))
    want = np.array([float(mp.diff(ref, mp.mpf(t))) for t in xs])
    assert_allclose(got, want, rtol=2e-13, atol=1e-15)
    assert_allclose(act.value(np.array(xs)), [float(ref(mp.mpf(t))) for t in xs],
                    rtol=2e-15, atol=1e-16)


@pytest.mark.parametrize("name", propcalc.builtin_names())
def test_builtins_as_functions_match_the_builtins(name: str) -> None:
    # reference: the built-in activation (value_fn, derivative_fn) at its default parameters
    act = propcalc.activation(f"{name}(x)")
    ref = propcalc.activation(name)
    x = _away_from(ref.breakpoints, np.linspace(-30, 30, 6001) + 0.0007, 1e-6)
    assert_allclose(act.value(x), ref.value(x), rtol=1e-12, atol=1e-12)
    assert_allclose(act.derivative(x), ref.derivative(x), rtol=1e-12, atol=1e-12)
    assert act.breakpoints == ref.breakpoints


def test_derivative_formula_is_a_formula_with_the_same_values() -> None:
    for text, params in DERIVATIVE_FORMULAS[:12]:
        act = propcalc.activation(text, **params)
        d = propcalc.activation(act.derivative_formula, **params)
        x = np.linspace(-9, 9, 181) + 0.013
        assert_allclose(d.value(x), act.derivative(x), rtol=1e-13, atol=1e-15)


@pytest.mark.parametrize("text, derivative", [
    ("x**2", "2 * x"),
    ("3 * x + 1", "3"),
    ("x**3 - 2 * x", "3 * x**2 - 2"),
    ("exp(sin(x))", "exp(sin(x)) * cos(x)"),
    ("max(x, 0)", "where(x > 0, 1, 0)"),
    ("min(x, 0)", "where(x < 0, 1, 0)"),
    ("abs(x)", "where(x < 0, -1, 1)"),
    ("relu(2 * x)", "where(2 * x > 0, 2, 0)"),
    ("where(x > 0, x, exp(x) - 1)", "where(x > 0, 1, exp(x))"),
    ("x * beta", "beta"),
    ("sin(x) / x**2", "cos(x) / x**2 - sin(x) * (2 * x) / (x**2)**2"),
    ("2**(x / 20)", "2**(x / 20) * log(2) * 0.05"),
    ("e**(x / 100)", "e**(x / 100) * 0.01"),
    ("x**beta", "beta * x**(beta - 1)"),
    ("-(-x)", "1"),
    ("x - x", "0"),
])
def test_derivative_text_is_simplified(text: str, derivative: str) -> None:
    # closed forms: the power, product, quotient and chain rules (any calculus text)
    params = {"beta": 2.0} if "beta" in text else {}
    if text == "sin(x) / x**2":
        with pytest.raises(FormulaError, match=r"divides by zero"):
            propcalc.activation(text)
        b = Builder()
        root = Reader(text, {}, b).expr(parse(text))
        assert to_text(Differentiator(b)(root)) == derivative
        return
    act = propcalc.activation(text, **params)
    assert act.derivative_formula == derivative


# ---------------------------------------------------------------------------------------
# breakpoints
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("text, expected", [
    ("max(x, 0)", (0.0,)),
    ("relu(x - 0.0013)", (0.0013,)),
    ("hard_tanh(x / 100)", (-100.0, 100.0)),
    ("abs(x**2 - 2)", (-math.sqrt(2.0), math.sqrt(2.0))),
    ("where(exp(x) > 2, x, 0)", (math.log(2.0),)),
    ("max(x, 1 - x)", (0.5,)),
    ("where(x**3 > 8, x, 0)", (2.0,)),
    ("relu(x - 3000)", (3000.0,)),
    ("min(x, 0.5 * x + 7000)", ()),  # crosses at 14000, beyond the reach of |x| <= 1e4
    ("leaky_relu(relu(x) - 1)", (0.0, 1.0)),
    ("where(x > 0 and x < 2, x, 0)", (0.0, 2.0)),
    ("where(x < -1 or not x < 1, 1, 0)", (-1.0, 1.0)),
    ("step(x - pi)", (math.pi,)),
    ("abs(x)**2", (0.0,)),
    ("max(x**2, 0)", ()),  # a tangency at 0 is no breakpoint
    ("where(x > theta, x, 0)", (0.75,)),
])
def test_breakpoints_found_by_bracketing(text: str, expected: tuple[float, ...]) -> None:
    # closed forms: the roots of the switching expressions, solved by hand
    act = propcalc.activation(text, **({"theta": 0.75} if "theta" in text else {}))
    assert len(act.breakpoints) == len(expected)
    assert_allclose(act.breakpoints, expected, rtol=4e-15, atol=1e-300)


def test_jump_detected_through_breakpoints() -> None:
    act = propcalc.activation("where(x > 1, 1, 0) + 0.5 * x")
    assert act.breakpoints == (1.0,)
    assert act.has_jumps and act.jumps == pytest.approx((1.0,), rel=1e-8)
    assert act.properties.smoothness == "discontinuous"
    assert math.isinf(propcalc.propagation(act, 1.0, 0.1).chi_1)


# ---------------------------------------------------------------------------------------
# numerical trouble is reported
# ---------------------------------------------------------------------------------------
@pytest.mark.parametrize("text, pattern", [
    ("log(1 + exp(x))", r"the value is not finite at x = 710\.\d+: exp\(x\) overflows .*"
                        r"write softplus\(x\) instead of log\(1 \+ exp\(x\)\)"),
    ("log1p(exp(2 * x))", r"write softplus\(2 \* x\) instead of log1p\(exp\(2 \* x\)\)"),
    ("1 / (1 + exp(-x))", r"the derivative is not finite at x = -710\.\d+.*write sigmoid\(x\) "
                          r"instead of 1 / \(1 \+ exp\(-x\)\)"),
    ("x / (1 + exp(-x))", r"write x \* sigmoid\(x\) instead of x / \(1 \+ exp\(-x\)\)"),
    ("exp(x) / (1 + exp(x))", r"write sigmoid\(x\) instead of exp\(x\) / \(1 \+ exp\(x\)\)"),
    ("(exp(x) - exp(-x)) / (exp(x) + exp(-x))", r"write tanh\(x\) instead of \(exp\(x\) - "
                                                r"exp\(-x\)\) / \(exp\(x\) \+ exp\(-x\)\)"),
    ("log(sigmoid(x)) + x", r"write -softplus\(-x\) instead of log\(sigmoid\(x\)\)"),
    ("1 / (1 + exp(x))", r"write sigmoid\(-x\) instead of 1 / \(1 \+ exp\(x\)\)"),
    ("log(exp(x))", r"write x instead of log\(exp\(x\)\)"),
    ("log(cosh(x))", r"write abs\(x\) \+ softplus\(-2 \* abs\(x\)\) - log\(2\) instead of "
                     r"log\(cosh\(x\)\)"),
    ("log(exp(x) + 1) - x", r"write softplus\(x\) instead of log\(exp\(x\) \+ 1\)"),
    ("log(x)", r"the value is not finite at x = 0: log\(x\) is -inf \(the log of 0\)"),
    ("log(x - 1)", r"the value is not finite at x = 0: log\(x - 1\) takes the log of a negative "
                   r"number \(-1\)"),
    ("sqrt(x)", r"at x = -0\.001: sqrt\(x\) takes the sqrt of a negative number"),
    ("log1p(x)", r"at x = -1: log1p\(x\) is -inf"),
    ("1 / x", r"at x = 0: 1 / x divides by zero"),
    ("exp(x)", r"at x = 710\.\d+: exp\(x\) overflows"),
    ("cosh(x) / 1e300", r"cosh\(x\) overflows"),
    ("(x**2)**40", r"at x = -7144\.96: \(x\*\*2\)\*\*40 overflows \(5\.1\d+e\+07\*\*40\)"),
    ("sqrt(abs(x))", r"the derivative is not finite at x = 0: 1 / \(2 \* sqrt\(abs\(x\)\)\) "
                     r"divides by zero"),
    ("x / abs(x)", r"the value is not finite at x = 0: x / abs\(x\) divides by zero"),
    ("x**1.5", r"raises a negative number .* to a fractional power"),
    ("where(x >= 0, log(x), 0)", r"the value is not finite at x = 0: log\(x\) is -inf"),
])
def test_non_finite_values_are_reported_with_the_place(text: str, pattern: str) -> None:
    with pytest.raises(FormulaError, match=pattern) as info:
        propcalc.activation(text)
    assert "Gaussian integrals reach |x| up to 10000" in str(info.value)


@pytest.mark.parametrize("text, pole", [
    ("1 / (x - 0.0005)", 0.0005),        # between grid points: found by bracketing
    ("1 / (x**2 - 2.5)", -math.sqrt(2.5)),
    ("(x - 0.0007)**-3", 0.0007),
])
def test_poles_between_grid_points_are_refused(text: str, pole: float) -> None:
    # closed forms: the zeros of the denominators
    with pytest.raises(FormulaError, match=r"the value has a pole at x = ") as info:
        propcalc.activation(text)
    shown = float(str(info.value).split("pole at x = ")[1].split(":")[0])
    assert shown == pytest.approx(pole, rel=1e-5)


@pytest.mark.parametrize("text", [
    "sin(x - 0.0005) / (x - 0.0005)",  # removable 0/0
    "where(x > 1, 1 / x, 0)",           # the pole is in the branch not taken
    "where(x == 0, 1, sin(x) / x)",
    "where(abs(x) > 3, 1 / (x**2 - 2.5), 0)",
])
def test_removable_or_untaken_singularities_pass(text: str) -> None:
    act = propcalc.activation(text)
    # (a 0/0 off the grid is nan only at that exact point, which no quadrature node hits)
    assert np.all(np.isfinite(act.value(np.linspace(-10, 10, 2001) + 0.00013)))


def test_unused_branch_may_be_non_finite() -> None:
    # where() evaluates both branches; only the branch taken has to be finite
    act = propcalc.activation("where(x > 0, log(1 + x), x)")
    assert_allclose(act.value(np.array([-3.0, 0.0, 2.0])), [-3.0, 0.0, math.log(3.0)], rtol=1e-15)
    assert act.breakpoints == (0.0,)


def test_no_warning_escapes_from_evaluation() -> None:
    # pytest runs with warnings as errors: these would raise if a RuntimeWarning escaped
    act = propcalc.activation("where(x > 0, x, exp(x) - 1)")
    act.value(np.array([1e4, -1e4, 800.0]))
    act.derivative(np.array([1e4, -1e4, 800.0]))
    assert act.properties.parity == "neither"


# ---------------------------------------------------------------------------------------
# the property profile comes with the Activation
# ---------------------------------------------------------------------------------------
def test_properties_of_silu_formula() -> None:
    act = propcalc.activation("x * sigmoid(x)")
    pr = act.properties
    # reference: mpmath.findroot of d/dx (x sigmoid(x)) = 0, then the value there
    t0 = mp.findroot(lambda t: mp.diff(lambda s: s / (1 + mp.exp(-s)), t), -1.3)
    assert pr.output_range[0] == pytest.approx(float(t0 / (1 + mp.exp(-t0))), abs=1e-12)
    assert pr.output_range[1] == math.inf
    assert not pr.monotonic
    assert pr.value_at_zero == 0.0
    assert pr.parity == "neither"
    assert pr.smoothness == "smooth"
    assert pr.dead_unit_probability == 0.0
    assert pr.vanishing_gradient_tails == ("left",)


@pytest.mark.parametrize("text, expected", [
    ("abs(x)", dict(output_range=(0.0, math.inf), monotonic=False, parity="even",
                    smoothness="C0", dead_unit_probability=0.0, vanishing_gradient_tails=())),
    ("x**3 - x", dict(output_range=(-math.inf, math.inf), monotonic=False, parity="odd",
                      smoothness="smooth", value_at_zero=0.0)),
    # P(z < 0) = 1/2 for z ~ N(0, 1)
    ("where(x > 0, x, 0)", dict(monotonic=True, smoothness="C0", dead_unit_probability=0.5,
                                vanishing_gradient_tails=("left",))),
    ("step(x - 1)", dict(smoothness="discontinuous", dead_unit_probability=1.0, monotonic=True,
                         output_range=(0.0, 1.0))),
    ("tanh(x) + 0.05 * x", dict(monotonic=True, parity="odd", vanishing_gradient_tails=(),
                                smoothness="smooth")),
    ("exp(-x**2)", dict(parity="even", value_at_zero=1.0, output_range=(0.0, 1.0),
                        vanishing_gradient_tails=("left", "right"), monotonic=False)),
])
def test_property_profile(text: str, expected: dict) -> None:
    pr = propcalc.activation(text).properties
    for key, want in expected.items():
        got = getattr(pr, key)
        if isinstance(want, tuple) and want and isinstance(want[0], float):
            assert got == pytest.approx(want, abs=1e-12), key
        else:
            assert got == want, key


# ---------------------------------------------------------------------------------------
# formula versions of built-ins agree with them in every quantity
# ---------------------------------------------------------------------------------------
EQUIVALENT = [
    ("max(x, 0)", {}, "relu", {}),
    ("where(x > 0, x, exp(x) - 1)", {}, "elu", {}),
    ("x * tanh(softplus(x))", {}, "mish", {}),
    ("x * sigmoid(x)", {}, "silu", {}),
    ("x * sigmoid(beta * x)", {"beta": 1.5}, "swish", {"beta": 1.5}),
    ("where(x > 0, x, slope * x)", {"slope": 0.1}, "leaky_relu", {"slope": 0.1}),
    ("max(-1, min(1, x))", {}, "hard_tanh", {}),
    ("x * erfc(-x / sqrt(2)) / 2", {}, "gelu", {}),
    ("where(x >= 0, 1, 0)", {}, "step", {}),
    ("where(x > 0, x, alpha * expm1(x))", {"alpha": 1.3}, "elu", {"alpha": 1.3}),
]
_TOL = 1e-12


def _same(a, b, label_a: str, label_b: str, path: str = "") -> None:
    """Recursive comparison of to_dict() output: floats to 1e-12, labels swapped in text."""
    if isinstance(a, dict):
        assert set(a) == set(b), path
        for k in a:
            if k != "activation":
                _same(a[k], b[k], label_a, label_b, f"{path}.{k}")
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), path
        for i, (u, v) in enumerate(zip(a, b)):
            _same(u, v, label_a, label_b, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        if math.isnan(a) or math.isnan(b):
            assert math.isnan(a) and math.isnan(b), path
        else:
            assert a == b or math.isclose(a, b, rel_tol=_TOL, abs_tol=1e-13), (path, a, b)
    elif isinstance(a, str):
        assert a.replace(label_a, label_b) == b, (path, a, b)
    else:
        assert a == b, (path, a, b)


@pytest.fixture(params=EQUIVALENT, ids=[f"{e[0]} ~ {e[2]}" for e in EQUIVALENT])
def pair(request) -> tuple[propcalc.Activation, propcalc.Activation]:
    text, params, name, bparams = request.param
    return propcalc.activation(text, **params), propcalc.activation(name, **bparams)


def test_equivalent_values_derivatives_breakpoints(pair) -> None:
    act, ref = pair
    x = _away_from(ref.breakpoints, np.concatenate([np.linspace(-40, 40, 8001) + 1e-4,
                                                    [-1e4, -1e3, 1e3, 1e4]]), 1e-9)
    assert_allclose(act.value(x), ref.value(x), rtol=_TOL, atol=_TOL)
    assert_allclose(act.derivative(x), ref.derivative(x), rtol=_TOL, atol=_TOL)
    assert_allclose(act.breakpoints, ref.breakpoints, rtol=0, atol=1e-15)
    assert act.jumps == pytest.approx(ref.jumps, abs=_TOL)
    _same(act.properties.to_dict(), ref.properties.to_dict(), act.label, ref.label)


def test_equivalent_gains(pair) -> None:
    act, ref = pair
    ga, gr = propcalc.gains(act), propcalc.gains(ref)
    assert ga.forward == pytest.approx(gr.forward, rel=_TOL)
    assert ga.backward == pytest.approx(gr.backward, rel=_TOL, abs=1e-300)
    # the "common practice" gain is keyed on the built-in's name: a formula has none
    assert ga.common_gain is None


@pytest.mark.parametrize("sigma_w2, sigma_b2", [(1.5, 0.1), (2.5, 0.5), (1.0, 0.0), (4.0, 0.05)])
def test_equivalent_propagation(pair, sigma_w2: float, sigma_b2: float) -> None:
    act, ref = pair
    pa = propcalc.propagation(act, sigma_w2, sigma_b2)
    pr = propcalc.propagation(ref, sigma_w2, sigma_b2)
    for key in ("q_star", "chi_1", "chi_q", "c_star", "xi_c"):
        a, r = getattr(pa, key), getattr(pr, key)
        if r is None or (isinstance(r, float) and math.isinf(r)):
            assert a == r, key
        else:
            assert a == pytest.approx(r, rel=_TOL, abs=1e-13), key
    _same(pa.to_dict(), pr.to_dict(), act.label, ref.label)


def test_equivalent_edge_of_chaos_and_plan(pair) -> None:
    act, ref = pair
    for q in (1.0, 0.3):
        _same(propcalc.edge_of_chaos(act, q).to_dict(), propcalc.edge_of_chaos(ref, q).to_dict(),
              act.label, ref.label)

    def plan(a):
        try:
            return propcalc.recommend(a, 20).to_dict()
        except propcalc.PropcalcError as exc:  # same refusal for both (e.g. the step function)
            return str(exc)

    _same(plan(act), plan(ref), act.label, ref.label)


def test_relu_formula_against_closed_forms() -> None:
    act = propcalc.activation("max(x, 0)")
    # He et al. 2015, eq. 10: E[relu(z)^2] = 1/2, so the variance-preserving gain is sqrt(2)
    assert propcalc.gains(act).forward == pytest.approx(math.sqrt(2.0), rel=1e-13)
    # Cho & Saul 2009 / He et al. 2015: the edge of chaos of ReLU is sigma_w2 = 2, sigma_b2 = 0
    cp = propcalc.edge_of_chaos(act, 1.0)
    assert cp.sigma_w2 == pytest.approx(2.0, rel=1e-13)
    assert cp.sigma_b2 == pytest.approx(0.0, abs=1e-13)


@pytest.mark.parametrize("text, moment", [("x**2", 3.0), ("x**3", 15.0)])
def test_polynomial_second_moments(text: str, moment: float) -> None:
    # Abramowitz & Stegun 1964, 26.2.1 (from memory): E[z^4] = 3, E[z^6] = 15
    from propcalc.meanfield.maps import second_moment

    assert float(second_moment(propcalc.activation(text), 1.0)) == pytest.approx(moment, rel=1e-13)


def test_second_moment_against_scipy_quad() -> None:
    # reference: scipy.integrate.quad of phi(z)^2 times the standard normal density
    from propcalc.meanfield.maps import second_moment

    act = propcalc.activation("x * sigmoid(beta * x) + 0.1 * sin(x)", beta=1.7)

    def integrand(z: float) -> float:
        v = z / (1 + math.exp(-1.7 * z)) + 0.1 * math.sin(z)
        return v * v * math.exp(-z * z / 2) / math.sqrt(2 * math.pi)

    ref, _ = integrate.quad(integrand, -40, 40, epsabs=1e-15, epsrel=1e-13, limit=200)
    assert float(second_moment(act, 1.0)) == pytest.approx(ref, rel=1e-12)


# ---------------------------------------------------------------------------------------
# limits and vocabulary
# ---------------------------------------------------------------------------------------
def test_limits_are_exposed() -> None:
    # the seven limits of the first version, unchanged, and the derivative limits of issue 11
    assert formula_module.LIMITS.to_dict() == {
        "max_length": 500, "max_nodes": 200, "max_nesting": 30, "max_tree_depth": 60,
        "max_exponent": 64.0, "max_breakpoints": 64, "max_parameters": 32,
        "max_derivative_nodes": 2000, "max_derivative_length": 20000}
    assert "where" in formula_module.FUNCTIONS and "gelu" in formula_module.FUNCTIONS
    assert set(formula_module.CONSTANTS) == {"pi", "e"}


def test_limits_at_their_edges_are_accepted() -> None:
    assert propcalc.activation("(" * 30 + "x" + ")" * 30).formula == "x"
    assert propcalc.activation("x**64 / 1e256").formula == "x**64 / 1e+256"
    long_ok = "x" + " + 0.5 * x" * 45  # 451 characters, 136 nodes, depth 47
    assert len(long_ok) <= 500
    propcalc.activation(long_ok)


def test_tabs_are_whitespace() -> None:
    assert propcalc.activation("x\t*\tsigmoid(x)").formula == "x * sigmoid(x)"


def test_parametrised_builtins_inside_formulas_use_their_defaults() -> None:
    # leaky_relu(x) in a formula is leaky_relu with its default slope 0.01 (documented choice)
    act = propcalc.activation("leaky_relu(x) + 0 * x")
    assert_allclose(act.value(np.array([-2.0, 3.0])), [-0.02, 3.0], rtol=1e-15)
    with pytest.raises(FormulaError, match=r"parameter 'slope' is given but the formula does not "
                                           r"use it .*leaky_relu\(\.\.\.\) inside a formula uses "
                                           r"its default slope = 0.01: write where\(x > 0, x, "
                                           r"slope \* x\) to set it"):
        propcalc.activation("leaky_relu(x)", slope=0.2)


def test_limit_rows_are_generated_from_the_limits() -> None:
    # one table per interface, generated from the code (issue 12 section 2: the README said 500
    # characters and 32 parameters while the service allowed 200 and 8)
    from propcalc.activations.formula import (LIMITS, SERVICE_LIMITS, FormulaLimits,
                                              formula_limit_rows)

    rows = formula_limit_rows()
    assert [r.name for r in rows] == list(LIMITS.to_dict())
    assert all(r.value == getattr(LIMITS, r.name) and r.meaning for r in rows)
    service = {r.name: r.value for r in formula_limit_rows(SERVICE_LIMITS)}
    assert service["max_length"] == 200 and service["max_parameters"] == 8
    assert {k: v for k, v in service.items() if k not in ("max_length", "max_parameters")} == \
        {k: v for k, v in LIMITS.to_dict().items() if k not in ("max_length", "max_parameters")}
    assert rows[0].to_dict() == {"name": "max_length", "value": 500,
                                 "meaning": "characters in the formula text"}
    assert formula_limit_rows(FormulaLimits(max_nesting=5))[2].value == 5


def test_service_limits_are_enforced_and_rechecked_for_cached_formulas() -> None:
    from propcalc.activations.formula import SERVICE_LIMITS, formula_activation_within

    long_text = "x" + " + 0.5 * x" * 25  # 251 characters: within the Python API, not the service
    act = propcalc.activation(long_text)
    with pytest.raises(FormulaError, match=r"formula is 251 characters long; the limit is 200"):
        formula_activation_within(SERVICE_LIMITS, long_text)
    params = {f"p{k}": 1.0 + k for k in range(9)}
    text = "x * (" + " + ".join(params) + ")"
    with pytest.raises(FormulaError, match=r"9 parameters given; the limit is 8"):
        formula_activation_within(SERVICE_LIMITS, text, **params)
    assert formula_activation_within(SERVICE_LIMITS, "x * sigmoid(x)") is \
        propcalc.activation("x * sigmoid(x)")
    assert act is propcalc.activation(long_text)
