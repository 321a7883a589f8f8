"""Tests of propcalc.numerics.hermite: Hermite coefficients, Mehler sums and their bounds.

References used below
---------------------
* Williams 1997, "Computing with infinite networks", eq. (11): for phi = erf,
  E[erf(u1) erf(u2)] = (2 / pi) arcsin(2 q c / (1 + 2 q)) at equal variances q. By Mehler's
  formula (Daniely, Frostig & Singer 2016, section 6) the squared Hermite coefficients b_k
  of erf(sqrt(q) z) are the Taylor coefficients of that function of c; the Taylor series
  of arcsin is Abramowitz & Stegun 1964, 4.4.40: arcsin x = sum_n (2n)! x^(2n+1) /
  (4^n (n!)^2 (2n + 1)).
* Cho & Saul 2009, eq. (6): the arc-cosine kernel of degree 1, E[relu(u1) relu(u2)] =
  q (sqrt(1 - c^2) + (pi - arccos c) c) / (2 pi); its Taylor coefficients in c computed
  with mpmath.taylor at 30 digits.
* Parseval's identity for the orthonormal Hermite basis: sum_k b_k = E[phi(sqrt(q) z)^2].
* The 2-D Gaussian rule of propcalc.meanfield.maps (itself checked against mpmath and
  scipy in tests/test_maps.py) for Mehler's formula at a smooth activation without a
  closed form (tanh).
"""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from numpy.testing import assert_allclose

import propcalc
from propcalc import caches
from propcalc.errors import ComputationError
from propcalc.meanfield import maps
from propcalc.numerics import hermite
from propcalc.numerics.hermite import (SERIES_PASSES, coefficients_at, hermite_coefficients,
                                       series_curvature, series_sum, series_table,
                                       series_value_and_slope, tail_mass)

A = propcalc.activation
KMAX, RULE = SERIES_PASSES[0]


def _arcsin_coefficients(r: float, kmax: int) -> np.ndarray:
    # (2 / pi) arcsin(r c) = sum_k b_k c^k (Abramowitz & Stegun 4.4.40)
    b = np.zeros(kmax + 1)
    for n in range((kmax - 1) // 2 + 1):
        k = 2 * n + 1
        b[k] = (2 / math.pi) * math.exp(math.lgamma(2 * n + 1) - n * math.log(4.0)
                                        - 2 * math.lgamma(n + 1)) / k * r**k
    return b


# measured worst error of a b_k relative to E[phi^2] (the same with both passes' panels, so
# it comes from the rule near z = 0, where erf(sqrt(q) z) is steep): 1e-16, 1.4e-15, 4.4e-14
@pytest.mark.parametrize("q, atol", [(0.3, 1e-15), (1.0, 3e-15), (4.0, 1e-13)])
def test_erf_coefficients_are_the_arcsin_series(q, atol):
    # Williams 1997 with Mehler's formula: b_k are the Taylor coefficients of
    # (2 / pi) arcsin(r c), r = 2q / (1 + 2q); even ones vanish (erf is odd)
    erf = A("erf")
    b, m2 = hermite_coefficients(erf.value, erf.breakpoints, np.array([q]), KMAX, RULE)
    ref = _arcsin_coefficients(2 * q / (1 + 2 * q), KMAX)
    assert_allclose(b[0, :40], ref[:40], rtol=0, atol=atol * m2[0])
    assert np.all(b[0, 0::2] <= 1e-28)
    # E[erf^2] = (2 / pi) arcsin(r) (Williams 1997 at c = 1)
    assert m2[0] == pytest.approx(2 / math.pi * math.asin(2 * q / (1 + 2 * q)), rel=1e-14)


def test_relu_coefficients_are_the_arc_cosine_taylor_series():
    # Cho & Saul 2009: (sqrt(1 - c^2) + (pi - arccos c) c) / (2 pi) at q = 1, expanded in c
    # by mpmath (30 digits); relu has a kink at 0, where the 1-D rule splits
    relu = A("relu")
    b, m2 = hermite_coefficients(relu.value, relu.breakpoints, np.array([1.0]), KMAX, RULE)
    with mpmath.workdps(30):
        taylor = mpmath.taylor(lambda c: (mpmath.sqrt(1 - c * c) + (mpmath.pi - mpmath.acos(c))
                                          * c) / (2 * mpmath.pi), 0, 12)
    ref = np.array([float(t) for t in taylor])
    assert_allclose(b[0, :13], ref, rtol=1e-12, atol=1e-17)
    assert m2[0] == pytest.approx(0.5, rel=1e-15)  # E[relu(z)^2] = 1/2


@pytest.mark.parametrize("name", ["tanh", "gelu", "erf", "selu", "hard_tanh"])
@pytest.mark.parametrize("q", [0.2, 1.0, 9.0])
def test_parseval_bounds_the_tail(name, q):
    # sum_k b_k <= E[phi^2] (Parseval; every b_k >= 0), and the longer pass leaves less
    act = A(name)
    masses = []
    for kmax, rule in SERIES_PASSES:
        b, m2 = hermite_coefficients(act.value, act.breakpoints, np.array([q]), kmax, rule)
        assert np.all(b >= 0)
        assert b.sum() <= m2[0] * (1 + 1e-12)
        masses.append(float(tail_mass(b, m2)[0]))
    assert masses[1] <= masses[0] + 1e-14 * m2[0]  # (equal to rounding once both converged)


@pytest.mark.parametrize("c", [-0.8, -0.3, 0.0, 0.4, 0.7])
def test_mehler_sum_equals_the_2d_rule_for_tanh(c):
    # Mehler's formula E[phi(u1) phi(u2)] = sum_k b_k c^k against the 2-D Gaussian rule
    tanh = A("tanh")
    q = 1.3
    b, m2 = coefficients_at(tanh.value, tanh.breakpoints, q, *SERIES_PASSES[1])
    direct = float(maps.pair_expectation(tanh, c, q))  # tanh has no smoothing: the 2-D rule
    assert float(series_sum(b, np.array([c]))[0]) == pytest.approx(direct, abs=2e-15)


def test_value_slope_table_and_curvature_against_the_arcsin_form():
    # the series and its first two derivatives in c against Williams 1997 (erf), with the
    # curvature bound above the exact C'' a little to the right of c
    erf = A("erf")
    q = 0.8
    r = 2 * q / (1 + 2 * q)
    b, m2 = hermite_coefficients(erf.value, erf.breakpoints, np.array([q, q]), 640,
                                 SERIES_PASSES[1][1])
    c = np.array([0.2, 0.6])
    p, dp = series_value_and_slope(b, c)
    assert_allclose(p, 2 / math.pi * np.arcsin(r * c), rtol=1e-13)
    assert_allclose(dp, 2 / math.pi * r / np.sqrt(1 - (r * c) ** 2), rtol=1e-13)
    curv, bound = series_curvature(b, m2, c)
    exact = 2 / math.pi * r**3 * c / (1 - (r * c) ** 2) ** 1.5
    assert_allclose(curv, exact, rtol=1e-12)
    assert np.all(bound >= 2 / math.pi * r**3 * (c + 1e-6) / (1 - (r * (c + 1e-6)) ** 2) ** 1.5)
    table = series_table(b, np.array([0.1, 0.5, 0.9]))
    assert_allclose(table, 2 / math.pi * np.arcsin(r * np.array([[0.1, 0.5, 0.9]] * 2)),
                    rtol=1e-13)


def test_coefficients_are_cached_read_only_and_cleared():
    # internal consistency (no outside source): one computation per key, read-only arrays,
    # emptied by propcalc.clear_caches()
    tanh = A("tanh")
    propcalc.clear_caches()
    first = coefficients_at(tanh.value, tanh.breakpoints, 0.7, KMAX, RULE)
    again = coefficients_at(tanh.value, tanh.breakpoints, 0.7, KMAX, RULE)
    assert first[0] is again[0] and not first[0].flags.writeable
    assert len(caches.caches()["hermite.coefficients"]) == 1
    assert len(caches.caches()["hermite.tables"]) >= 1  # breakpoints at 0 only: one table
    propcalc.clear_caches()
    assert len(caches.caches()["hermite.coefficients"]) == 0
    assert len(caches.caches()["hermite.tables"]) == 0
    fresh = coefficients_at(tanh.value, tanh.breakpoints, 0.7, KMAX, RULE)
    assert fresh[0] is not first[0]
    np.testing.assert_array_equal(fresh[0], first[0])


def test_hermite_module_does_not_know_activations():
    # numerics sits below activations: hermite takes a function and its breakpoints
    import ast
    import inspect
    tree = ast.parse(inspect.getsource(hermite))
    imported = {node.module for node in ast.walk(tree) if isinstance(node, ast.ImportFrom)}
    assert not any(m and "activations" in m for m in imported), imported


def test_non_finite_function_is_refused():
    with pytest.raises(ComputationError, match="spike"):
        hermite_coefficients(lambda x: np.where(np.abs(x) < 1, np.inf, 0.0), (),
                             np.array([1.0]), 8, RULE, what="spike")
