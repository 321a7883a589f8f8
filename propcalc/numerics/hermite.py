"""The Hermite (Mehler) series of the correlation map: coefficients, sums and their bounds.

With a_k the Hermite coefficients of phi(sqrt(q) z), Mehler's formula gives
``E[phi(u1) phi(u2)] = sum_k a_k^2 c^k`` for an equal-variance pair with
correlation c (the dual activation of Daniely, Frostig & Singer 2016,
section 6). Every term is >= 0 and, by Parseval, the terms sum to E[phi^2],
so the truncation error of the series is bounded rigorously by what the
first K terms leave of E[phi^2]. Where that bound is small (c not too close
to 1, moderate q) the correlation map and its slopes are polynomials at the
cost of one set of 1-D integrals; elsewhere callers use the 2-D quadrature.

This module is numerics only: it takes the function phi (a vectorised callable
of x), its breakpoints and a label for messages, not an activation object.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

from ..caches import BoundedCache, cached
from ..errors import ComputationError
from .quadrature import QuadratureRule, rule_nodes

__all__ = ["SERIES_PASSES", "SERIES_CHUNK", "hermite_coefficients", "coefficients_at",
           "series_sum", "series_table", "series_value_and_slope", "series_curvature", "tail_mass"]

Array = np.ndarray
Function = Callable[[Array], Array]

#: (terms, 1-D rule) of the Hermite series: a first pass, and a longer one for slow decay.
#: Panels of 0.5 (0.25) hold about 1.6 (1.4) oscillations of h_160 (h_640): 16 nodes resolve
#: them (the coefficients agree to rounding with those on panels of 0.1). 640 terms rather
#: than 480 cost about 1.2x and certify c* up to 0.98 at q = 26 (0.966 with 480), enough
#: to spare the 2-D rule its point there (sigmoid at sigma_w2 = 129: about 2 ms).
SERIES_PASSES = ((160, QuadratureRule(n_per_panel=16, panel_width=0.5, z_max=10.0)),
                  (640, QuadratureRule(n_per_panel=16, panel_width=0.25, z_max=10.0)))
SERIES_CHUNK = 128
_BLOCK = 32  # degrees per einsum in the per-row recurrence


def hermite_coefficients(fn: Function, breakpoints: Sequence[float], q: Array, kmax: int,
                         rule: QuadratureRule, what: str = "phi") -> tuple[Array, Array]:
    """b_k = a_k^2 with a_k = E[phi(sqrt(q) z) He_k(z)] / sqrt(k!), k = 0..kmax, and E[phi^2].

    Parameters
    ----------
    fn : callable
        phi, vectorised over float arrays.
    breakpoints : sequence of float
        Where phi or phi' is not smooth (the integrals split there).
    q : ndarray
        Variances > 0, 1-D.
    kmax : int
    rule : QuadratureRule
    what : str
        The name of phi in error messages.

    Notes
    -----
    The orthonormal Hermite polynomials come from the stable three-term
    recurrence h_{k+1} = (z h_k - sqrt(k) h_{k-1}) / sqrt(k + 1) (Abramowitz &
    Stegun 1964, 22.7.14, normalised); the 1-D integrals use composite
    Gauss-Legendre panels (16 nodes each, split at the breakpoints, graded at
    large q) fine enough for h_kmax.
    """
    bps = tuple(breakpoints)
    n = q.size
    b = np.empty((n, kmax + 1))
    m2 = np.empty(n)
    order = np.argsort(q, kind="stable")
    roots = np.sqrt(np.arange(kmax + 1, dtype=float))
    for start in range(0, n, SERIES_CHUNK):
        sel = order[start:start + SERIES_CHUNK]
        qs = q[sel]
        x, w = rule_nodes(np.zeros(qs.size), qs, bps, rule)
        with np.errstate(over="ignore", invalid="ignore"):
            f = np.asarray(fn(x), dtype=float)
        if not np.all(np.isfinite(f)):
            raise ComputationError(f"{what}(x) is not finite at a quadrature node")
        sq = np.sqrt(qs)
        wf = w * f
        m2[sel] = np.einsum("ij,ij->i", wf, f)
        if all(bp == 0.0 for bp in bps):
            # no breakpoints but 0: every row has the same z-nodes (the grading depends on
            # the chunk's largest q only), so the Hermite values are one cached matrix
            # (the nodes of the first row, z = x / sqrt(q), are all it needs)
            table = _hermite_table(kmax, rule, x[0] / sq[0])
            out = wf @ table.T
            b[sel] = out * out
            continue
        z = x / sq[:, None]
        out = np.empty((qs.size, kmax + 1))
        out[:, 0] = wf.sum(axis=1)
        _project(wf, z, roots, kmax, out)
        b[sel] = out * out
    return b, m2


def _project(wf: Array, z: Array, roots: Array, kmax: int, out: Array) -> None:
    """out[:, k] = sum_j wf[:, j] h_k(z[:, j]) for k = 1..kmax, h_k by the recurrence.

    h_(k+1) = (z h_k - sqrt(k) h_(k-1)) / sqrt(k + 1) row by row, written into a block of
    _BLOCK degrees that is projected with one einsum per block (each sum over j is the
    same as one einsum per degree; the block bounds the memory).
    """
    block = np.empty((min(_BLOCK, kmax),) + z.shape)
    zh = np.empty_like(z)
    block[0] = z
    first, used = 1, 1  # the degree of block[0]; rows of the block filled
    older, newer = np.ones_like(z), block[0]  # h_(k-1), h_k
    for k in range(1, kmax):
        if used == block.shape[0]:  # (the two rows read next are the block's last two)
            out[:, first:first + used] = np.einsum("ij,kij->ik", wf, block)
            first, used = first + used, 0
        nxt = block[used]
        np.multiply(older, -roots[k], out=nxt)
        nxt += np.multiply(z, newer, out=zh)
        nxt /= roots[k + 1]
        older, newer = newer, nxt
        used += 1
    out[:, first:first + used] = np.einsum("ij,kij->ik", wf, block[:used])


@cached("hermite.coefficients", maxsize=32)
def coefficients_at(fn: Function, breakpoints: tuple[float, ...], q: float, kmax: int,
                    rule: QuadratureRule) -> tuple[Array, float]:
    """:func:`hermite_coefficients` at one variance, cached per (fn, breakpoints, q, kmax, rule).

    A correlation map evaluated point by point at one q (iterating c_l layer by
    layer) then pays for the 1-D integrals once. Functions compare by identity
    (a bound method by its object), so the key is exact. The coefficients come
    back read-only.
    """
    b, m2 = hermite_coefficients(fn, breakpoints, np.array([float(q)]), kmax, rule)
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


#: h_k(z_j) tables per (kmax, rule, number of nodes), each with its nodes.
_TABLES = BoundedCache("hermite.tables", maxsize=6)


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
    tmp = np.empty_like(z)
    for k in range(1, kmax):  # (z h_k - sqrt(k) h_(k-1)) / sqrt(k + 1), in place
        nxt = table[k + 1]
        np.multiply(z, table[k], out=nxt)
        nxt -= np.multiply(roots[k], table[k - 1], out=tmp)
        nxt /= roots[k + 1]
    table.setflags(write=False)
    _TABLES.put(key, (z.copy(), table))
    return table


def series_value_and_slope(b: Array, c: Array, kb: Array | None = None) -> tuple[Array, Array]:
    """Row by row: ``sum_k b_k c^k`` and ``sum_k k b_k c^(k-1)`` (b of shape (n, K+1), c of n).

    ``kb`` is ``b[:, 1:] * k`` (k = 1..K) when the caller keeps it across calls.
    """
    kmax = b.shape[1] - 1
    if kb is None:
        kb = b[:, 1:] * np.arange(1.0, kmax + 1)
    with np.errstate(under="ignore"):
        pw = _powers(c, kmax)
    p = np.einsum("ij,ij->i", b, pw)
    dp = np.einsum("ij,ij->i", kb, pw[:, :-1])
    return p, dp


def series_table(b: Array, c: Array) -> Array:
    """``sum_k b[i, k] c[j]^k`` for every row i of b and every entry j of c: shape (n, len(c))."""
    with np.errstate(under="ignore"):
        return b @ _powers(np.ravel(c), b.shape[1] - 1).T


def tail_mass(b: Array, m2: Array) -> Array:
    """What the first K terms leave of E[phi^2] (Parseval), plus the coefficients' rounding.

    ``E[phi^2] - sum_(k<=K) b_k`` is >= 0 in exact arithmetic; 1e-13 E[phi^2] is added for
    the rounding of the computed b_k.
    """
    return np.maximum(m2 - b.sum(axis=1), 0.0) + 1e-13 * m2


def series_curvature(b: Array, m2: Array, c: Array, reach: float = 1e-6) -> tuple[Array, Array]:
    """Row by row: the series' ``sum_k k (k-1) b_k c^(k-2)`` and an upper bound of the true one.

    The bound holds on ``[0, c + reach]``: ``sum_(k<=K) k (k-1) b_k c_+^(k-2) + D max_(k>K)
    k (k-1) c_+^(k-2)`` with ``c_+ = c + reach`` and D the tail mass (every term is >= 0
    and increasing in c, and the neglected b_k sum to at most D).
    """
    kmax = b.shape[1] - 1
    k = np.arange(kmax + 1, dtype=float)
    kk = k[2:] * (k[2:] - 1.0)
    c_hi = np.minimum(c + reach, 1.0)
    defect = tail_mass(b, m2)
    with np.errstate(under="ignore", over="ignore", invalid="ignore"):
        curv = np.einsum("ij,ij->i", b[:, 2:] * kk, _powers(c, kmax - 2))
        at_hi = np.einsum("ij,ij->i", b[:, 2:] * kk, _powers(c_hi, kmax - 2))
        # max over k > K of k (k - 1) c^(k - 2): at k = K + 1, or at the interior peak
        peak = np.where(c_hi < 1.0, -2.0 / np.log(np.where(c_hi < 1.0, c_hi, 0.5)), np.inf)
        kt = np.maximum(kmax + 1.0, np.floor(peak))
        tail = np.maximum.reduce([kt * (kt - 1.0) * c_hi ** (kt - 2.0),
                                  (kt + 1.0) * kt * c_hi ** (kt - 1.0)])
        bound = at_hi + defect * np.where(c_hi < 1.0, tail, np.inf)
    return curv, bound
