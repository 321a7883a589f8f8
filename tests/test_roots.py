"""Tests of propcalc.numerics.roots: bracket scans, Brent polishing, elementwise solves.

Every reference is a closed form: roots of polynomials (the quadratic formula), sqrt,
the principal branch of Lambert's W (scipy.special.lambertw) for x e^x = a.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import special

from propcalc.numerics import roots


def test_brent_finds_sqrt_two_and_handles_the_ends():
    # closed form: the positive root of x^2 - 2 is sqrt(2)
    assert roots.brent(lambda x: x * x - 2.0, 1.0, 2.0) == pytest.approx(math.sqrt(2), rel=1e-15)
    assert roots.brent(lambda x: x - 1.0, 1.0, 2.0) == 1.0  # a root at an end is that end
    assert roots.brent(lambda x: x - 2.0, 1.0, 2.0) == 2.0
    # same signs (a bracket read off rounded values): the end with the smaller |f|
    assert roots.brent(lambda x: x * x + 1e-300, -1e-3, 2.0) == -1e-3


@pytest.mark.parametrize("n", [1, 3, roots.SCALAR_LIMIT, 50])
def test_find_roots_elementwise_matches_lambert_w(n):
    # x e^x = a  <=>  x = W(a) (scipy.special.lambertw, principal branch); both the
    # one-by-one path (n <= SCALAR_LIMIT) and the elementwise Chandrupatla iteration
    a = np.geomspace(0.1, 50.0, n)

    def f(x, a):
        return x * np.exp(x) - a

    got = roots.find_roots(f, np.zeros(n), np.full(n, 5.0), (a,))
    assert_allclose(got, special.lambertw(a).real, rtol=2 * roots.ROOT_RTOL)


def test_elementwise_iteration_is_scipys_find_root():
    # The elementwise path is Chandrupatla's method written as scipy.optimize.elementwise.
    # find_root computes it (scipy >= 1.15, the reference library; numerics/roots.py says why
    # it is not called): the same roots, to the last bit, on 200 seeded brackets of three
    # families (smooth, kinked, flat near the root)
    elementwise = pytest.importorskip("scipy.optimize.elementwise")
    rng = np.random.default_rng(20261205)
    n = 200
    lo = rng.uniform(-3.0, -0.1, n)
    hi = rng.uniform(0.1, 3.0, n)
    shift = rng.uniform(-0.09, 0.09, n)
    kind = rng.integers(0, 3, n).astype(float)

    def f(x, shift, kind):
        return np.where(kind == 0, np.tanh(2 * x) - shift,
                        np.where(kind == 1, np.abs(x) + 2 * x - shift, (x - shift) ** 3))

    got = roots.find_roots(f, lo, hi, (shift, kind))
    ref = elementwise.find_root(f, (lo, hi), args=(shift, kind),
                                tolerances={"xrtol": roots.ROOT_RTOL,
                                            "xatol": 4 * np.finfo(float).tiny,
                                            "fatol": 0.0, "frtol": 0.0})
    assert np.all(ref.success)
    np.testing.assert_array_equal(got, ref.x)


def test_find_roots_returns_ends_for_bad_brackets():
    # internal consistency: no sign change -> the end with the smaller value; an exact zero
    # at an end -> that end
    def f(x, s):
        return x - s

    got = roots.find_roots(f, np.array([0.0, 2.0, 1.0] * 4), np.array([1.0, 3.0, 2.0] * 4),
                           (np.array([0.5, 10.0, 1.0] * 4),))
    assert_allclose(got, [0.5, 3.0, 1.0] * 4, rtol=1e-14)


def test_grid_brackets_zeros_and_dips():
    grid = np.linspace(0.05, 2.95, 30)  # off the roots below
    # (x - 1)(x - 2): two sign changes, each between its neighbouring grid points
    v = (grid - 1.0) * (grid - 2.0)
    rows, cols = roots.grid_brackets(v)
    assert list(rows) == [0, 0]
    assert all(grid[c] < r < grid[c + 1] for c, r in zip(cols, (1.0, 2.0)))
    # a value at rounding level between opposite signs: bracketed by its neighbours
    v0 = grid - grid[10]
    r0, c0 = roots.grid_zeros(v0, np.abs(v0) > 1e-12)
    assert list(c0) == [10]
    # two roots between grid points: a positive dip, no sign change
    w = (grid - 1.5) * (grid - 1.52)
    assert roots.grid_brackets(w)[0].size == 0
    r, c, side = roots.grid_dips(grid, w)
    assert list(side) == [1.0] and grid[c[0] - 1] < 1.5 < 1.52 < grid[c[0] + 1]


def test_roots_on_grid_finds_a_hidden_pair_and_a_double_root():
    # closed forms: (x - 1.01)(x - 1.03) has roots 1.01 and 1.03, closer than the grid step
    # (0.15 decades); (x - 1.3)^2 has the double root 1.3
    grid = np.geomspace(1e-2, 1e2, 27)

    def pair(x):
        return (x - 1.01) * (x - 1.03)

    got = roots.roots_on_grid(pair, grid, np.array([pair(x) for x in grid]))
    assert got == pytest.approx([1.01, 1.03], rel=1e-13)

    def double(x):
        return (x - 1.3) ** 2

    got = roots.roots_on_grid(double, grid, np.array([double(x) for x in grid]))
    assert got == pytest.approx([1.3], rel=1e-6)  # a tangential root: to sqrt of rounding
    # without the hidden-pair search neither is seen (no sign change on the grid)
    assert roots.roots_on_grid(pair, grid, hidden_pairs=False) == []
