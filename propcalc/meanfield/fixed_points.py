"""Fixed points of the variance map, elementwise over arrays of (sigma_w2, sigma_b2, q_input).

For each point every fixed point ``V(q*) = q*`` on ``(0, Q_MAX]`` is found
(and ``q = 0`` when it is one), with its slope ``chi_q = V'(q*)`` and its
stability, and the one the layer-to-layer flow reaches from the first layer's
variance ``q_start = sigma_w2 q_input + sigma_b2`` (Poole et al. 2016,
eq. 3 iterated). A single point is an array of size 1: the report, the sweeps,
dropout and the network analyses all call :func:`solve_variance`.

Method
------
* ``g(q) = V(q) - q`` is tabulated on one log grid shared by every point
  (``SCAN_STEPS`` steps of 0.15 decades over ``[Q_MIN, Q_MAX]``, off the round numbers,
  extended by whole steps where a point needs a wider range: down to V(0)/10,
  up to ten times its variances). ``E[phi(sqrt(q) z)^2]`` does not depend on
  the point, so one row of 1-D integrals serves all of them (cached per activation,
  rule and grid range: the chunks of a sweep share it).
* Roots come from :mod:`propcalc.numerics.roots`: sign changes between values
  clear of rounding (``|g| > 1e-12 (q + sigma_b2)``), roots on grid points,
  and hidden pairs of close roots; each is polished to 4e-15 relative.
* ``chi_q`` by Stein's identity (:func:`propcalc.meanfield.maps.variance_map_slope`).
  A slope within :data:`~propcalc.vocabulary.NEUTRAL_TOLERANCE` of 1 does not
  decide stability: the next term of the map does, read off the sign of
  ``V(q) - q`` on each side (gelu at sigma_w2 = 4 has ``V(q) = q + 6 q^2 / pi
  + ...`` at q = 0, so q = 0 repels although its slope rounds to 1 - 2e-16).
* The flow: from q_start the variance moves up while ``g > 0`` and down while
  ``g < 0`` (V is non-decreasing for every built-in: E[phi(sqrt(q) z)^2]
  grows with q when |phi| grows away from 0), so it reaches the first root
  above q_start, or the last below it.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

from ..activations.base import Activation
from ..caches import cached
from ..errors import ComputationError
from ..numerics import roots
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..vocabulary import NEUTRAL_TOLERANCE, VarianceStatus
from .maps import largest_variance, second_moment, variance_map_slope

__all__ = ["Q_MIN", "Q_MAX", "SCAN_STEPS", "LARGE_Q", "VarianceSolution", "solve_variance",
           "collapse_rate", "large_variance"]

Array = np.ndarray

#: The variance range scanned for fixed points (widened per point to cover its variances).
Q_MIN = 1e-10
Q_MAX = 1e8
#: Grid steps over [Q_MIN, Q_MAX] (0.15 decades each). The points sit half a step off the
#: powers of ten, so a root at a round number such as q* = 1 falls between grid points.
SCAN_STEPS = 120
#: The variance at which limits q -> infinity are evaluated (growth rate, chi_1 there).
LARGE_Q = 1e12
#: |V(q) - q| at or below this times (q + sigma_b2) is rounding: no sign can be read there.
RESOLVED = 1e-12
#: A start variance with |V(q) - q| at or below this times q is itself a (tangential) root.
TANGENT = 1e-13
#: Relative distance of the probes that decide a marginal fixed point from the next term.
PROBE = 1e-4

_STEP = 18.0 / SCAN_STEPS  # decades per grid step
_ROWS = 4096  # points per scan table (memory: rows x grid floats)
_FEW = 4  # up to this many variances, one scalar integral each (faster than the array path)


@dataclass(frozen=True, eq=False)
class VarianceSolution:
    """Variance fixed points of n points (arrays; the flat ``points_*`` arrays list every root).

    Attributes
    ----------
    status : ndarray of VarianceStatus values (str)
    q_start : ndarray
        First-layer variance ``sigma_w2 q_input + sigma_b2``.
    q_star, chi_q : ndarray
        The fixed point reached and its slope (NaN where the variance is unbounded).
    stable : ndarray of bool
        Whether the fixed point reached attracts.
    growth_rate : ndarray
        lim V(q)/q at large q ("unbounded") or at q -> 0 ("collapse", "neutral": 1); NaN else.
    q_floor : ndarray
        The smallest variance scanned.
    falls_below : ndarray of bool
        The variance falls below ``q_floor`` with no fixed point to stop it.
    owner, points_q, points_chi, points_stable : ndarray
        Every fixed point: the index of its point, q*, chi_q, stability (ascending per point).
    """

    status: Array
    q_start: Array
    q_star: Array
    chi_q: Array
    stable: Array
    growth_rate: Array
    q_floor: Array
    falls_below: Array
    owner: Array
    points_q: Array
    points_chi: Array
    points_stable: Array


def collapse_rate(act: Activation, sigma_w2: Array) -> Array:
    """lim V(q)/q as q -> 0 when phi(0) = 0 and sigma_b2 = 0: ``sigma_w2 (phi'(0-)^2 + phi'(0+)^2) / 2``.

    The one-sided average at a kink (Poole et al. 2016, eq. 3 expanded at q = 0);
    inf when phi(0) != 0.
    """
    if float(act.value(np.array([0.0]))[0]) != 0.0:
        return np.full(np.shape(sigma_w2), math.inf)
    dl, dr = act.derivative(np.array([-1e-12, 1e-12]))
    return np.asarray(sigma_w2, dtype=float) * (dl * dl + dr * dr) / 2.0


def _grid(k: Array) -> Array:
    """The scan grid: Q_MIN 10^((k + 1/2) step)."""
    return Q_MIN * 10.0 ** ((k + 0.5) * _STEP)


def _grid_index(q: Array, up: bool) -> Array:
    """Index k of the grid point at or below (above with ``up``) q."""
    k = np.log10(q / Q_MIN) / _STEP - 0.5
    return (np.ceil(k) if up else np.floor(k)).astype(int)


@cached("fixed_points.scan", maxsize=32)
def _scan_moments(act: Activation, rule: QuadratureRule, k_first: int, k_last: int) -> Array:
    """E[phi(sqrt(q) z)^2] on the scan grid points k_first..k_last (cached, read-only).

    The row does not depend on the point: the chunks of a sweep and repeated reports of
    one activation share it (keyed exactly: the activation by identity, the rule, the
    grid's range, so the values are those of the one vectorised call they replace).
    """
    m2 = np.asarray(second_moment(act, _grid(np.arange(k_first, k_last + 1)), rule), dtype=float)
    m2.setflags(write=False)
    return m2


def _few(fn, act: Activation, q: Array, rule: QuadratureRule, **kw) -> Array:  # type: ignore[no-untyped-def]
    """A moment of :mod:`propcalc.meanfield.maps` at a few q, each by the scalar fast path."""
    qa = np.asarray(q, dtype=float)
    if qa.size > _FEW:
        return np.asarray(fn(act, qa, rule, **kw), dtype=float)
    return np.array([float(fn(act, float(x), rule, **kw)) for x in qa.ravel()]).reshape(qa.shape)


def _gap(act: Activation, rule: QuadratureRule, checked: bool = True):  # type: ignore[no-untyped-def]
    """g(q) = sigma_w2 E[phi(sqrt(q) z)^2] + sigma_b2 - q, elementwise in (q, sw, sb).

    ``checked=False`` skips the quadrature's tail check (same values): for the polish
    inside brackets of the scan grid, whose points were all checked by the scan.
    """
    def gap(q: Array, sw: Array, sb: Array) -> Array:
        return sw * _few(second_moment, act, q, rule, check_tails=checked) + sb - q
    return gap


def _slope_moment(act: Activation, q: Array, rule: QuadratureRule) -> Array:
    """V'(q) / sigma_w2 = E[(z^2 - 1) phi(sqrt(q) z)^2] / (2 q) (Stein's identity), q > 0."""
    return _few(lambda a, x, r: variance_map_slope(a, x, 1.0, r), act, q, rule)


def solve_variance(act: Activation, sigma_w2: Array, sigma_b2: Array, q_input: Array,
                   rule: QuadratureRule = DEFAULT_RULE) -> VarianceSolution:
    """Every variance fixed point of every point, their stability and the one reached.

    Parameters
    ----------
    act : Activation
    sigma_w2, sigma_b2, q_input : ndarray
        1-D arrays of one size (validated by the caller: > 0, >= 0, >= 0, finite).
    rule : QuadratureRule

    Returns
    -------
    VarianceSolution
    """
    sw = np.asarray(sigma_w2, dtype=float).ravel()
    sb = np.asarray(sigma_b2, dtype=float).ravel()
    qi = np.broadcast_to(np.asarray(q_input, dtype=float), sw.shape).ravel()
    if sw.size <= _ROWS:
        return _solve_block(act, sw, sb, qi, rule)
    parts = [_solve_block(act, sw[k:k + _ROWS], sb[k:k + _ROWS], qi[k:k + _ROWS], rule)
             for k in range(0, sw.size, _ROWS)]
    merged = {}
    for f in dataclasses.fields(VarianceSolution):
        arrays = [getattr(p, f.name) for p in parts]
        if f.name == "owner":
            arrays = [a + k for a, k in zip(arrays, range(0, sw.size, _ROWS))]
        merged[f.name] = np.concatenate(arrays)
    return VarianceSolution(**merged)


def _solve_block(act: Activation, sw: Array, sb: Array, q_input: Array,
                 rule: QuadratureRule) -> VarianceSolution:
    """:func:`solve_variance` for one block of points (the scan table is n x grid)."""
    gap = _gap(act, rule)
    phi0 = float(act.value(np.array([0.0]))[0])
    q_start = sw * np.asarray(q_input, dtype=float) + sb
    v0 = sw * phi0 * phi0 + sb  # V(0)
    # V(q) >= about V(0) near 0, so a grid starting below V(0)/10 sees V(q) - q > 0 there
    q_lo = np.maximum(np.where(v0 > 0, np.minimum(Q_MIN, v0 / 10.0), Q_MIN), 1e-300)
    q_hi = np.maximum(Q_MAX, 10.0 * (sb + q_start))
    # an oscillating formula is integrable up to a limit (sin: 3.6e7): the scan stops there
    q_hi = np.minimum(q_hi, 0.5 * largest_variance(act, rule))
    k_lo, k_hi = _grid_index(q_lo, up=False), _grid_index(q_hi, up=True)
    ks = np.arange(int(k_lo.min()), int(k_hi.max()) + 1)
    grid = _grid(ks)
    m2 = _scan_moments(act, rule, int(ks[0]), int(ks[-1]))
    in_range = (ks[None, :] >= k_lo[:, None]) & (ks[None, :] <= k_hi[:, None])
    g = (sw[:, None] * m2[None, :] + sb[:, None]) - grid[None, :]
    g_start = gap(q_start, sw, sb)
    resolved = in_range & (np.abs(g) > RESOLVED * (grid[None, :] + sb[:, None]))
    neutral = np.all(~in_range | (np.abs(g) <= RESOLVED * grid[None, :]), axis=1)

    found: list[tuple[int, float]] = []  # (point, root)
    rows, cols = roots.grid_brackets(g, resolved)
    keep = ~neutral[rows]
    rows, cols = rows[keep], cols[keep]
    # the polish stays inside the scanned grid, whose every point passed the tail check
    inner = _gap(act, rule, checked=False)
    # many brackets: their ends' values are the scan's (the same sum, sw m2 + sb - q); a few
    # go to Brent one by one, which re-evaluates its ends by the scalar path
    many = rows.size > roots.SCALAR_LIMIT
    polished = roots.find_roots(inner, grid[cols], grid[cols + 1], (sw[rows], sb[rows]),
                                fa=g[rows, cols] if many else None,
                                fb=g[rows, cols + 1] if many else None)
    found += zip(rows.tolist(), polished.tolist())
    for i, c in zip(*roots.grid_zeros(g, resolved)):
        if not neutral[i]:
            def scalar(q: float, i: int = int(i)) -> float:
                return float(inner(np.float64(q), sw[i], sb[i]))
            a, b = float(grid[c - 1]), float(grid[c + 1])
            fa, fb = scalar(a), scalar(b)
            found.append((int(i), roots.brent(scalar, a, b, fa, fb) if fa * fb < 0
                          else float(grid[c])))
    for i, c, side in zip(*roots.grid_dips(grid, g, resolved)):
        if not neutral[i]:
            def scalar(q: float, i: int = int(i)) -> float:
                return float(inner(np.float64(q), sw[i], sb[i]))
            found += [(int(i), r) for r in roots.hidden_pair(
                scalar, float(grid[c - 1]), float(grid[c + 1]), float(side), float(g[i, c]))]

    zero_fixed = (sb == 0.0) & (phi0 == 0.0)
    # a spurious root right next to q = 0 when q = 0 itself is the fixed point
    found = [(i, r) for i, r in found if not (zero_fixed[i] and r <= 10.0 * q_lo[i])]
    # a tangential fixed point (chi_q = 1) gives no sign change: catch it at the start value
    near_start = {i for i, r in found if abs(r - q_start[i]) <= 1e-9 * q_start[i]}
    for i in np.flatnonzero((q_start > 0) & (np.abs(g_start) <= TANGENT * q_start) & ~neutral):
        if int(i) not in near_start:
            found.append((int(i), float(q_start[i])))
    owner = np.array([i for i, _ in found], dtype=int)
    pq = np.array([r for _, r in found], dtype=float)
    chi = _slope_moment(act, pq, rule) * sw[owner]
    chi = np.where(np.abs(chi) <= 1e-13, 0.0, chi)  # Stein's form leaves noise where V is flat
    stable = _stability(gap, owner, pq, chi, sw, sb)
    # q = 0 itself
    zeros = np.flatnonzero(zero_fixed & ~neutral)
    if zeros.size:
        chi0 = collapse_rate(act, sw[zeros])
        first, clear = g[zeros, :3], resolved[zeros, :3]
        sign_above = np.array([next((np.sign(v) for v, ok in zip(row, oks) if ok), 0.0)
                               for row, oks in zip(first, clear)])
        stable0 = np.where(np.abs(chi0 - 1.0) <= NEUTRAL_TOLERANCE, sign_above < 0, chi0 < 1.0)
        owner = np.concatenate([zeros, owner])
        pq = np.concatenate([np.zeros(zeros.size), pq])
        chi = np.concatenate([chi0, chi])
        stable = np.concatenate([stable0, stable])
    order = np.lexsort((pq, owner))
    owner, pq, chi, stable = owner[order], pq[order], chi[order], stable[order]
    return _flow(act, sw, sb, q_start, g_start, q_lo, neutral, owner, pq, chi, stable, rule)


def _stability(gap, owner: Array, q: Array, chi: Array, sw: Array,  # type: ignore[no-untyped-def]
               sb: Array) -> Array:
    """|chi_q| < 1, or, for a slope within NEUTRAL_TOLERANCE of 1, the signs of V(q) - q around q."""
    stable = np.abs(chi) < 1.0
    marginal = np.flatnonzero(np.abs(chi - 1.0) <= NEUTRAL_TOLERANCE)
    if marginal.size:
        i = owner[marginal]
        qm = q[marginal]
        below = gap(qm * (1.0 - PROBE), sw[i], sb[i])
        above = gap(qm * (1.0 + PROBE), sw[i], sb[i])
        tol = RESOLVED * (qm + sb[i])
        # attracting: the flow moves up below q* (V > q) and down above it (V < q)
        stable[marginal] = (below > tol) & (above < -tol)
    return stable


def _flow(act: Activation, sw: Array, sb: Array, q_start: Array, g_start: Array, q_lo: Array,
          neutral: Array, owner: Array, pq: Array, chi: Array, stable: Array,
          rule: QuadratureRule) -> VarianceSolution:
    """The fixed point each point's flow reaches from q_start, and the status."""
    n = sw.size
    status = np.full(n, VarianceStatus.FIXED_POINT.value, dtype="<U11")
    q_star = np.full(n, np.nan)
    chi_q = np.full(n, np.nan)
    reached_stable = np.zeros(n, dtype=bool)
    growth = np.full(n, np.nan)
    qs = q_start[owner]
    live = ~neutral[owner]
    near = _first(owner, live & (np.abs(pq - qs) <= 1e-9 * qs), n)
    above = _first(owner, live & (pq >= qs * (1 - 1e-12)), n)
    below = _last(owner, live & (pq <= qs * (1 + 1e-12)), n)
    j = np.where(near >= 0, near, np.where(g_start > 0, above, below))
    none = (j < 0) & ~neutral
    falls = none & (g_start <= 0)
    status[none] = VarianceStatus.UNBOUNDED.value
    hit = np.flatnonzero(j >= 0)
    q_star[hit], chi_q[hit], reached_stable[hit] = pq[j[hit]], chi[j[hit]], stable[j[hit]]
    coll = hit[pq[j[hit]] == 0.0]
    status[coll] = VarianceStatus.COLLAPSE.value
    growth[coll] = chi[j[coll]]
    unbounded = (status == VarianceStatus.UNBOUNDED.value) & ~falls
    if np.any(unbounded):
        # lim V(q)/q at large q, evaluated at LARGE_Q (for ReLU exactly sigma_w2 / 2)
        large = large_variance(act, rule)
        growth[unbounded] = sw[unbounded] * float(second_moment(act, large, rule)) / large
    if neutral.any():
        # neutral: V(q) = q identically (ReLU at sigma_w2 = 2, linear at 1, with sigma_b2 = 0)
        status[neutral] = VarianceStatus.NEUTRAL.value
        q_star[neutral] = q_start[neutral]
        chi_q[neutral] = 1.0
        growth[neutral] = 1.0
        keep = ~neutral[owner]
        nz = np.flatnonzero(neutral)
        order = np.lexsort((np.concatenate([pq[keep], q_start[nz]]),
                            np.concatenate([owner[keep], nz])))
        owner = np.concatenate([owner[keep], nz])[order]
        pq = np.concatenate([pq[keep], q_start[nz]])[order]
        chi = np.concatenate([chi[keep], np.ones(nz.size)])[order]
        stable = np.concatenate([stable[keep], np.zeros(nz.size, dtype=bool)])[order]
    # (else the flat arrays stay as given: sorted by point and root)
    return VarianceSolution(status=status, q_start=q_start, q_star=q_star, chi_q=chi_q,
                            stable=reached_stable, growth_rate=growth, q_floor=q_lo,
                            falls_below=falls, owner=owner, points_q=pq,
                            points_chi=chi, points_stable=stable)


def large_variance(act: Activation, rule: QuadratureRule = DEFAULT_RULE) -> float:
    """Where large-variance limits are evaluated: LARGE_Q, or below the largest variance an
    oscillating activation can be integrated at."""
    return min(LARGE_Q, 0.5 * largest_variance(act, rule))


def _first(owner: Array, mask: Array, n: int) -> Array:
    """Per point, the index (into the flat arrays) of its first entry where ``mask``; -1 if none."""
    return _run_end(owner, np.flatnonzero(mask), n)


def _last(owner: Array, mask: Array, n: int) -> Array:
    """Per point, the index of its last entry where ``mask``; -1 if none."""
    return _run_end(owner, np.flatnonzero(mask)[::-1], n)


def _run_end(owner: Array, idx: Array, n: int) -> Array:
    """Per point, the first of the indices ``idx`` (in their order) that it owns; -1 if none."""
    out = np.full(n, -1)
    o = owner[idx]
    if o.size and (np.all(o[1:] >= o[:-1]) or np.all(o[1:] <= o[:-1])):
        # owners in runs (the flat arrays are sorted by point): each run's first entry
        start = np.ones(o.size, dtype=bool)
        start[1:] = o[1:] != o[:-1]
        out[o[start]] = idx[start]
        return out
    pts, first = np.unique(o, return_index=True)
    out[pts] = idx[first]
    return out


def check_reached(sol: VarianceSolution, sw: Array, sb: Array, where: str = "") -> None:
    """Raise ComputationError for the first point whose variance falls below the scanned range."""
    bad = np.flatnonzero(sol.falls_below)
    if bad.size:
        i = int(bad[0])
        point = f"sigma_w2 = {sw[i]:.3g}, sigma_b2 = {sb[i]:.3g}"
        if sb[i] > 0.0:
            # V(q) >= sigma_b2 > 0, so the variance cannot fall to 0: its fixed point is there,
            # but V(q) - q stays within the rounding of V(q) over the whole scanned range
            raise ComputationError(
                f"{where}the variance fixed point cannot be resolved in double precision at "
                f"{point}: V(q) - q is lost in the rounding of V(q) over the scanned range down "
                f"to q = {sol.q_floor[i]:.3g} (with a bias the variance stays >= sigma_b2, so the "
                "fixed point exists, very close to the map's identity); raise sigma_b2 or "
                "change sigma_w2")
        raise ComputationError(
            f"{where}the pre-activation variance falls below {sol.q_floor[i]:.3g}, the smallest "
            f"value resolved here ({point}); rescale the inputs or sigma_w2")
