"""Denominators that vanish between grid points, with or without a sign change; literals and
parameters that underflow or overflow.

Issue 11 section 3: even-order poles passed the pole check, which only looked for a denominator
that changes sign (``1/(x - 0.0005)**2`` gave chi_1 = 6.5e22, ``1/(x**2 + 1e-150)`` C(0.999) =
-5594, ``1/(1 + cos(x))`` C(-0.5) = -9e6). Issue 11 section 2: ``1e-400`` in a formula was read
as 0 without a word, and ``beta=10**400`` raised OverflowError.

References: the places are closed forms (the zeros of the denominators, solved by hand: cos x =
-1 at x = +-pi, x^2 = 2 at +-sqrt(2)); the double-precision limits are IEEE 754 binary64
(smallest normal 2^-1022 = 2.2250738585072014e-308, from memory, and Python's sys.float_info);
the growth thresholds are documented in propcalc/activations/formula/poles.py (common practice,
no source).
"""

from __future__ import annotations

import math
import re
import sys

import numpy as np
import pytest

import propcalc
from propcalc.errors import FormulaError, InvalidParameterError


def _place(err: FormulaError) -> float:
    return float(str(err).split("pole at x = ")[1].split(":")[0])


@pytest.mark.parametrize("text, what, place, how", [
    # the three inputs of the issue
    ("1/(x - 0.0005)**2", "value", 0.0005, r"\(x - 0.0005\)\*\*2 is 0 there"),
    ("1/(x**2 + 1e-150)", "value", 0.0, r"x\*\*2 \+ 1e-150 comes within 1e-150 of 0 there \(a "
                                        r"near-pole: the value reaches 1e\+150\)"),
    ("1/(1 + cos(x))", "value", -math.pi, r"1 \+ cos\(x\) is 0 there without changing sign"),
    # more even orders, and zeros that only a minimum of |denominator| shows
    ("(x - 0.0007)**-2", "value", 0.0007, r"x - 0.0007 is 0 there"),
    ("x / (x**2 - 2)**2", "value", -math.sqrt(2.0), r"\(x\*\*2 - 2\)\*\*2 is 0 there"),
    ("1 / (exp(x - 0.0005) - 1 - (x - 0.0005))", "value", 0.0005, r"comes within|is 0 there"),
    ("1 / (x**2 + 1e-10)", "value", 0.0, r"comes within 1e-10 of 0"),
    ("x + 1 / (cos(x - 0.0005) - 1)", "value", 0.0005, r"cos\(x - 0.0005\) - 1 (is 0|comes "
                                                       r"within)"),
    ("(x - 0.0005) / (x - 0.0005)**3", "value", 0.0005, r"\(x - 0.0005\)\*\*3 is 0 there"),
    ("where(x > 0.0005, 1 / (x - 0.0005), 0)", "value", 0.0005, r"x - 0.0005 is 0 there"),
    # singular derivatives of finite values: chi_1 = E[phi'^2] would diverge
    ("sqrt(abs(x - 0.0005))", "derivative", 0.0005, r"2 \* sqrt\(abs\(x - 0.0005\)\) is 0"),
    ("log(abs(x - 0.0005))", "derivative", 0.0005, r"abs\(x - 0.0005\) is 0 there"),
    ("abs(x - 0.0005)**0.25", "derivative", 0.0005, r"is 0 there"),
])
def test_poles_are_refused_with_the_place(text: str, what: str, place: float, how: str) -> None:
    with pytest.raises(FormulaError, match=rf"the {what} has a pole at x = ") as info:
        propcalc.activation(text)
    message = str(info.value)
    assert _place(info.value) == pytest.approx(place, rel=1e-5, abs=1e-9)
    assert re.search(how, message), message
    assert "Gaussian integrals reach |x| up to 10000" in message


@pytest.mark.parametrize("text", [
    "sin(x - 0.0005) / (x - 0.0005)",              # removable 0/0 of odd order
    "sin(x - 0.0005)**2 / (x - 0.0005)**2",        # removable 0/0 of even order
    "where(x > 1, 1 / (x - 0.0005)**2, x)",        # the pole is in a branch not taken
    "1 / (x**2 + 1e-6)",                           # a peak of 1e6, no pole
    "1 / (2 + sin(x))", "1 / (1.0001 + cos(x))",   # bounded away from 0
    "x / (x**2 + 1) / (x**2 + 2)",
    "abs(x - 0.0005)**1.5",                        # its derivative 1.5 |x - a|^0.5 is finite
])
def test_bounded_formulas_pass(text: str) -> None:
    act = propcalc.activation(text)
    x = np.linspace(-10, 10, 20001) + 0.00013
    assert np.all(np.isfinite(act.value(x))) and np.all(np.isfinite(act.derivative(x)))


# ---------------------------------------------------------------------------------------------
# literals and parameters at the ends of double precision
# ---------------------------------------------------------------------------------------------
SMALLEST_NORMAL = 2.2250738585072014e-308  # IEEE 754 binary64: 2^-1022


def test_the_smallest_normal_double() -> None:
    assert sys.float_info.min == SMALLEST_NORMAL == 2.0**-1022


@pytest.mark.parametrize("text, column, what", [
    ("x + 1e-400", 5, "underflows to 0"),
    ("1e-310 * x", 1, r"is subnormal"),
    ("x * 4.9e-324", 5, r"is subnormal"),
    ("x + 0.0000000001e-320", 5, "underflows to 0|is subnormal"),
])
def test_underflowing_literals_are_refused(text: str, column: int, what: str) -> None:
    with pytest.raises(FormulaError, match=rf"the number \S+ at column {column} ({what}) in double "
                                           r"precision( \(fewer than 53 significant bits\))?: "
                                           r"the smallest normal double is "
                                           r"2.2250738585072014e-308; write 0 if you mean 0"):
        propcalc.activation(text)


@pytest.mark.parametrize("text", ["x + 0e-400", "x * 0.0", "x + 2.2250738585072014e-308 * 0",
                                  "x + 1e-300", "x * 1e300"])
def test_zero_and_normal_literals_pass(text: str) -> None:
    propcalc.activation(text)


def test_constant_products_that_underflow_are_refused() -> None:
    with pytest.raises(FormulaError, match=r"the constant 1e-200 \* 1e-200 underflows to 0.0"):
        propcalc.activation("1e-200 * 1e-200 * x")
    with pytest.raises(FormulaError, match=r"the constant exp\(-1000\) underflows"):
        propcalc.activation("x + exp(-1000)")
    with pytest.raises(FormulaError, match=r"the constant eps \* eps underflows"):
        propcalc.activation("x + eps * eps", eps=1e-200)


@pytest.mark.parametrize("call", [
    lambda: propcalc.activation("x * beta", beta=10**400),
    lambda: propcalc.activation("swish", beta=10**400),
    lambda: propcalc.activation("leaky_relu", slope=-(10**309)),
])
def test_parameters_too_large_for_a_double_name_the_parameter(call) -> None:
    with pytest.raises(InvalidParameterError, match=r"params.(beta|slope) must be a finite real "
                                                    r"number, got -?10+\.\.\. \(\d+ characters\)"):
        call()


@pytest.mark.parametrize("value", [1e-320, -5e-324, 1e-310])
def test_subnormal_parameters_are_refused(value: float) -> None:
    with pytest.raises(InvalidParameterError, match=r"params.slope must be 0 or at least "
                                                    r"2.2250738585072014e-308 in magnitude"):
        propcalc.activation("leaky_relu", slope=value)
    with pytest.raises(InvalidParameterError, match=r"params.c must be 0 or at least"):
        propcalc.activation("x + c", c=value)


def test_zero_and_normal_parameters_pass() -> None:
    assert propcalc.activation("leaky_relu", slope=0.0).params == {"slope": 0.0}
    assert propcalc.activation("x * c + 1", c=SMALLEST_NORMAL).params == {"c": SMALLEST_NORMAL}
    assert propcalc.activation("x * c", c=10**300).params == {"c": 1e300}
