"""The Hermite (Mehler) series of the correlation map, for fast chaotic fixed points.

With a_k the Hermite coefficients of phi(sqrt(q) z), Mehler's formula gives
``E[phi(u1) phi(u2)] = sum_k a_k^2 c^k`` for an equal-variance pair with
correlation c (the dual activation of Daniely, Frostig & Singer 2016,
section 6). Every term is >= 0 and, by Parseval, the terms sum to E[phi^2],
so the truncation error of the series is bounded rigorously by what the
first K terms leave of E[phi^2]. Where that bound is small (c* not too close
to 1, moderate q) the chaotic fixed point c* and C'(c*) follow from a
polynomial at the cost of one set of 1-D integrals; elsewhere callers fall
back to the 2-D quadrature.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from ..activations.base import Activation
from ..errors import ComputationError
from .quadrature import QuadratureRule, rule_nodes

__all__ = ["SERIES_PASSES", "hermite_coefficients", "coefficients_at", "series_sum",
           "series_fixed_points"]

Array = np.ndarray

#: (terms, 1-D rule) of the Hermite series: a first pass, and a longer one for slow decay.
#: Panels of 0.5 (0.25) hold about 1.6 (1.4) oscillations of h_160 (h_640): 16 nodes resolve
#: them (the coefficients agree to rounding with those on panels of 0.1). 640 terms rather
#: than 480 cost about 1.2x and certify c* up to 0.98 at q = 26 (0.966 with 480), enough
#: to spare the 2-D rule its point there (sigmoid at sigma_w2 = 129: about 2 ms).
SERIES_PASSES = ((160, QuadratureRule(n_per_panel=16, panel_width=0.5, z_max=10.0)),
                  (640, QuadratureRule(n_per_panel=16, panel_width=0.25, z_max=10.0)))
SERIES_CHUNK = 128


def hermite_coefficients(act: Activation, q: Array, kmax: int,
                          rule: QuadratureRule) -> tuple[Array, Array]:
    """b_k = a_k^2 with a_k = E[phi(sqrt(q) z) He_k(z)] / sqrt(k!), k = 0..kmax, and E[phi^2].

    The orthonormal Hermite polynomials come from the stable three-term
    recurrence h_{k+1} = (z h_k - sqrt(k) h_{k-1}) / sqrt(k + 1); the 1-D
    integrals use composite Gauss-Legendre panels (16 nodes each, split at
    the breakpoints, graded at large q) fine enough for h_kmax.
    """
    n = q.size
    b = np.empty((n, kmax + 1))
    m2 = np.empty(n)
    order = np.argsort(q, kind="stable")
    roots = np.sqrt(np.arange(kmax + 1, dtype=float))
    for start in range(0, n, SERIES_CHUNK):
        sel = order[start:start + SERIES_CHUNK]
        qs = q[sel]
        x, w = rule_nodes(np.zeros(qs.size), qs, act.breakpoints, rule)
        with np.errstate(over="ignore", invalid="ignore"):
            f = act.value(x)
        if not np.all(np.isfinite(f)):
            raise ComputationError(f"{act.label}(x) is not finite at a quadrature node")
        z = x / np.sqrt(qs)[:, None]
        wf = w * f
        m2[sel] = np.einsum("ij,ij->i", wf, f)
        if all(bp == 0.0 for bp in act.breakpoints):
            # no breakpoints but 0: every row has the same z-nodes (the grading depends on
            # the chunk's largest q only), so the Hermite values are one cached matrix
            table = _hermite_table(kmax, rule, z[0])
            out = wf @ table.T
            b[sel] = out * out
            continue
        h_prev = np.ones_like(z)
        h = z.copy()
        out = np.empty((qs.size, kmax + 1))
        out[:, 0] = wf.sum(axis=1)
        out[:, 1] = np.einsum("ij,ij->i", wf, h)
        for k in range(1, kmax):
            h_prev *= -roots[k]
            h_prev += z * h
            h_prev /= roots[k + 1]
            h, h_prev = h_prev, h
            out[:, k + 1] = np.einsum("ij,ij->i", wf, h)
        b[sel] = out * out
    return b, m2


@lru_cache(maxsize=32)
def coefficients_at(act: Activation, q: float, kmax: int,
                    rule: QuadratureRule) -> tuple[Array, float]:
    """:func:`hermite_coefficients` at one variance, cached per (act, q, kmax, rule).

    A correlation map evaluated point by point at one q (iterating c_l layer by
    layer) then pays for the 1-D integrals once. Activations compare by identity,
    so the key is exact. The coefficients come back read-only.
    """
    b, m2 = hermite_coefficients(act, np.array([float(q)]), kmax, rule)
    row = b[0].copy()
    row.setflags(write=False)
    return row, float(m2[0])


def series_sum(b: Array, c: Array) -> Array:
    """sum_k b_k c^k for every entry of ``c`` (powers by cumulative products)."""
    with np.errstate(under="ignore"):
        return _powers(np.ravel(c), b.size - 1) @ b


def _powers(x: Array, kmax: int) -> Array:
    """x[:, None] ** k for k = 0..kmax by cumulative products (pow is ~50x slower).

    The product of k factors is within k ulps of the power; the terms b_k x^k it
    weights are summed with the same relative precision as the series itself.
    """
    out = np.empty((x.size, kmax + 1))
    out[:, 0] = 1.0
    if kmax:
        out[:, 1:] = x[:, None]
        np.cumprod(out[:, 1:], axis=1, out=out[:, 1:])
    return out


_TABLES: dict[tuple[int, QuadratureRule, int], tuple[Array, Array]] = {}
_TABLES_MAX = 6


def _hermite_table(kmax: int, rule: QuadratureRule, z: Array) -> Array:
    """h_k(z_j), k = 0..kmax, for the z-nodes of ``rule`` at this grading (cached).

    The same stable three-term recurrence as :func:`hermite_coefficients`, run once
    per (kmax, rule, number of grading levels); the nodes are checked against the
    cached ones, so a different node set can never reuse a table.
    """
    key = (kmax, rule, int(z.size))
    hit = _TABLES.get(key)
    if hit is not None and hit[0].shape == z.shape and np.array_equal(hit[0], z):
        return hit[1]
    roots = np.sqrt(np.arange(kmax + 1, dtype=float))
    table = np.empty((kmax + 1, z.size))
    table[0] = 1.0
    if kmax >= 1:
        table[1] = z
    for k in range(1, kmax):
        table[k + 1] = (z * table[k] - roots[k] * table[k - 1]) / roots[k + 1]
    table.setflags(write=False)
    if len(_TABLES) >= _TABLES_MAX:
        _TABLES.pop(next(iter(_TABLES)))
    _TABLES[key] = (z.copy(), table)
    return table


def series_fixed_points(act: Activation, sw: Array, sb: Array, q: Array, kmax: int = 160,
                         rule: QuadratureRule = SERIES_PASSES[0][1], *,
                         curvature: bool = False) -> tuple[Array, ...]:
    """Chaotic (c*, C'(c*)) from the Hermite (Mehler) series of the correlation map.

    With a_k the Hermite coefficients of phi(sqrt(q*) z),
    ``E[phi(u1) phi(u2)] = sum_k a_k^2 c^k`` (Mehler's formula; the dual
    activation of Daniely, Frostig & Singer 2016, section 6), so
    ``C(c) = (sigma_w2 sum_k b_k c^k + sigma_b2) / V(q*)`` and
    ``C'(c) = sigma_w2 sum_k k b_k c^(k-1) / V(q*)`` are polynomials once the
    b_k = a_k^2 are known (1-D integrals). Newton's method from c = 0 on the
    convex C(c) - c then converges monotonically to c*.

    Truncation after K = kmax terms is bounded rigorously because every b_k
    >= 0 and, by Parseval, ``sum_k b_k = E[phi^2]``: the neglected part of C
    is at most ``sigma_w2 c^(K+1) D / V`` and that of C' at most
    ``sigma_w2 (K+1) c^K D / V`` (for c <= 0.99), with D = E[phi^2] - sum_(k<=K)
    b_k. A point is accepted when the first bound is below 1e-15 (1 - C'(c*))
    (so c* moves by less than 1e-15) and the second below 1e-12 C'(c*);
    others (c* close to 1, where the series converges slowly) are returned
    with ``ok = False``.

    With ``curvature=True`` two more arrays come back: the series' C''(c) at the
    returned c, and an upper bound of the true C'' on ``[0, c + 1e-6]``,
    ``sigma_w2 (sum_(k<=K) k (k-1) b_k c_+^(k-2) + D max_(k>K) k (k-1) c_+^(k-2)) / V``
    with ``c_+ = c + 1e-6`` (every term is non-negative and increasing in c, and the
    neglected b_k sum to at most D). A caller that polishes c with one Newton step
    of the exact map uses them to bound that step's error.

    Returns
    -------
    c_star, chi_c, ok : ndarray
        (and curvature, curvature_bound with ``curvature=True``)
    """
    b, m2 = hermite_coefficients(act, q, kmax, rule)
    k = np.arange(kmax + 1, dtype=float)
    v = sw * m2 + sb
    scale = sw / v
    n = q.size

    def value_and_slope(cc: Array, rows: Array) -> tuple[Array, Array]:
        with np.errstate(under="ignore"):
            pw = _powers(cc, kmax)
        br = b[rows]
        p = np.einsum("ij,ij->i", br, pw)
        dp = np.einsum("ij,ij->i", br[:, 1:] * k[1:], pw[:, :-1])
        return (sw[rows] * p + sb[rows]) / v[rows], scale[rows] * dp

    rows = np.arange(n)
    val0, slope0 = value_and_slope(np.zeros(n), rows)
    zero = np.abs(val0) <= 1e-15  # as the engine: C(0) = 0 means c* = 0
    # bracket c* on a grid of c in [0, 1): g > 0 left of c*, g < 0 between c* and 1;
    # the grid continues geometrically towards 1 (1 - 2^-k) for c* close to 1
    grid = np.concatenate([np.arange(64) / 64.0, 1.0 - 2.0 ** -np.arange(7, 17)])
    with np.errstate(under="ignore"):
        powers = _powers(grid, kmax).T
    g_grid = (sw[:, None] * (b @ powers) + sb[:, None]) / v[:, None] - grid
    below = g_grid < 0
    found = below.any(axis=1) & ~zero
    first = np.argmax(below, axis=1)
    c = np.where(found, grid[np.maximum(first - 1, 0)], 0.0)
    slope = slope0.copy()
    done = ~found
    active = rows[found]
    for _ in range(60):  # Newton from the left of the root: monotone for a convex g
        if active.size == 0:
            break
        val, sl = value_and_slope(c[active], active)
        slope[active] = sl
        g, dg = val - c[active], sl - 1.0
        with np.errstate(divide="ignore", invalid="ignore"):
            step = -g / dg
        bad = ~np.isfinite(step) | (dg >= 0)  # cannot happen left of the root of a convex g
        # the engine's stopping rule: |g| at the rounding floor of C, or a step below 1e-15
        at_root = ~bad & (np.abs(g) <= 4e-15)
        new = np.clip(c[active] + np.where(bad | at_root, 0.0, step), 0.0, 1.0)
        small = ~bad & ~at_root & (np.abs(new - c[active]) <= 1e-15)
        c[active] = new
        if np.any(small):  # C'(c*) at the returned c*, as the engine does
            slope[active[small]] = value_and_slope(new[small], active[small])[1]
        done[active[at_root | small]] = True
        active = active[~(bad | at_root | small)]  # a bad step: left to the 2-D solver
    converged = done & found & np.isfinite(c) & np.isfinite(slope)
    defect = np.maximum(m2 - b.sum(axis=1), 0.0) + 1e-13 * m2  # plus coefficient rounding
    with np.errstate(over="ignore", invalid="ignore", under="ignore"):
        tail_c = scale * c ** (kmax + 1) * defect
        tail_slope = scale * (kmax + 1) * c ** kmax * defect
    ok = (converged & (c <= 0.99) & (tail_c <= 1e-12 * np.abs(1.0 - slope))
          & (tail_slope <= 1e-11 * np.abs(slope)) & (m2 - b.sum(axis=1) >= -1e-12 * m2))
    c = np.where(zero, 0.0, c)
    slope = np.where(zero, slope0, slope)
    ok |= zero & np.isfinite(slope0)
    if not curvature:
        return c, slope, ok
    kk = k[2:] * (k[2:] - 1.0)
    c_hi = np.minimum(c + 1e-6, 1.0)
    with np.errstate(under="ignore", over="ignore", invalid="ignore"):
        curv = scale * np.einsum("ij,ij->i", b[:, 2:] * kk, _powers(c, kmax - 2))
        at_hi = np.einsum("ij,ij->i", b[:, 2:] * kk, _powers(c_hi, kmax - 2))
        # max over k > K of k (k - 1) c^(k - 2): at k = K + 1, or at the interior peak
        peak = np.where(c_hi < 1.0, -2.0 / np.log(np.where(c_hi < 1.0, c_hi, 0.5)), np.inf)
        kt = np.maximum(kmax + 1.0, np.floor(peak))
        tail = np.maximum.reduce([kt * (kt - 1.0) * c_hi ** (kt - 2.0),
                                  (kt + 1.0) * kt * c_hi ** (kt - 1.0)])
        bound = scale * (at_hi + defect * np.where(c_hi < 1.0, tail, np.inf))
    return c, slope, ok, curv, bound
