"""Sweeps of the propagation report over grids of parameters.

:func:`sweep` computes, for every activation and every point of the grid
``sigma_w2 x sigma_b2``, the quantities of :func:`propcalc.propagation`
(q*, chi_q, xi_q, chi_1, c*, chi_c, xi_c, phase, trainable depth) and returns
them as arrays (:class:`SweepResult`) or as a tidy table (CSV, JSON lines).
:func:`sweep_edge` walks the edge-of-chaos line over a grid of q*.

How it is fast
--------------
``propagation`` works one point at a time. Here the variance fixed point is
found for whole arrays of points at once: ``V(q) - q`` on a shared log grid
(the second moment ``E[phi(sqrt(q) z)^2]`` on that grid serves every point),
then every bracket is polished together by Newton steps safeguarded by
bisection, with ``V'(q)`` from Stein's identity on the same quadrature nodes
(see :mod:`propcalc.maps`). Points whose verdict is delicate (neutral maps,
tangential or rounding-level fixed points) are handed to the engine's
:func:`~propcalc.criticality.variance_fixed_points`. chi_1, chi_q and the
ordered-phase depth scales are then array expressions.

The chaotic correlation fixed point ``c*`` needs the 2-D integral
``E[phi(u1) phi(u2)]`` at every Newton step. Mehler's formula turns it into
the power series ``sum_k a_k^2 c^k`` in the Hermite coefficients a_k of
``phi(sqrt(q*) z)`` (1-D integrals, vectorised over points; Daniely,
Frostig & Singer 2016, section 6), so Newton's method runs on a polynomial.
Because every term is >= 0 and the terms sum to ``E[phi^2]`` (Parseval),
the truncation error has a rigorous bound; points where it is not small
enough (c* close to 1) are solved with the engine's 2-D integrals.

The results agree with ``propagation`` to 1e-9 relative (the tests check it
point by point; a depth scale xi = -1 / ln chi to 1e-9 xi relative, since
xi multiplies the relative error of its slope by xi). On a 200 x 200 tanh
grid the sweep is about 35 times faster than calling ``propagation`` at every
point (``tests/benchmarks/bench_sweep.py``).

Fanning out
-----------
Pass any :class:`concurrent.futures.Executor` (a ``ProcessPoolExecutor``, or
``distributed.Client(...).get_executor()`` for a Dask cluster): the grid is
cut into chunks of many points (points are dealt to chunks in turn, so
chaotic and ordered points are spread evenly), each chunk is one call of the
module-level, picklable :func:`sweep_chunk`, and activations travel by name.
Set ``OMP_NUM_THREADS=1`` in the environment before the workers start so
that processes do not oversubscribe the cores. A progress bar (tqdm) is
shown on a terminal and written to stderr.

Conventions
-----------
Arrays use NaN only for a quantity that does not exist (every quantity but
chi_1 when the variance grows without bound, where ``propagation`` returns
None); tables and ``to_dict`` turn it into None / an empty CSV field, and
infinities into the strings ``inf`` / ``-inf`` (see :func:`propcalc.jsonable`).
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import pickle
import sys
from collections.abc import Iterator, Sequence
from concurrent.futures import Executor, ThreadPoolExecutor, as_completed
from dataclasses import dataclass, field
from typing import IO, Any

import numpy as np
from scipy import optimize

from ..activations import Activation, builtin_activation, builtin_names
from .criticality import (
    Q_MAX,
    Q_MIN,
    EDGE_TOLERANCE,
    TRAINABLE_DEPTH_FACTOR,
    _TRAINABLE_RULE,
    correlation_fixed_point,
    edge_of_chaos_line_arrays,
    propagation,
    variance_fixed_points,
)
from ..errors import ComputationError, InvalidParameterError, check_int, check_nonnegative
from ..activations import activation as make_activation
from ..jsonable import jsonable
from .maps import correlation_map_and_slope, derivative_second_moment, second_moment, variance_map
from ..numerics.hermite import SERIES_PASSES, series_fixed_points
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule, rule_nodes
from ..results import ABSENT_AS_NONE, Result

__all__ = [
    "QUANTITIES",
    "PHASES",
    "STATUSES",
    "SweepResult",
    "EdgeSweepResult",
    "sweep",
    "sweep_edge",
    "sweep_chunk",
    "propagation_arrays",
]

#: Float quantities of a sweep, in table order.
QUANTITIES = ("q_star", "chi_q", "xi_q", "chi_1", "c_star", "chi_c", "xi_c", "trainable_depth")
#: Phase names, as in :class:`propcalc.Propagation`.
PHASES = ("ordered", "edge of chaos", "chaotic", "unbounded variance")
#: Variance statuses, as in :class:`propcalc.VarianceFixedPoints`.
STATUSES = ("fixed_point", "collapse", "unbounded", "neutral")

_SCAN_POINTS = 240  # log grid of the scan: the engine's range, about twice as dense, and
# offset from round numbers (1e-1, 1, 10... fall between its points)
_CLEAR = 1e-9  # |V(q) - q| above _CLEAR (q + sigma_b2): a sign far from rounding
_NODE_CHUNK = 2048  # points per vectorised quadrature call (memory ~ chunk x nodes)
_MAX_NEWTON = 100
_TEXT = "<U18"

Array = np.ndarray


# -------------------------------------------------------------------------------------------
# vectorised pieces
# -------------------------------------------------------------------------------------------
def _moments(act: Activation, q: Array, rule: QuadratureRule, slope: bool = True
             ) -> tuple[Array, Array]:
    """E[phi(sqrt(q) z)^2] and E[(z^2 - 1) phi(sqrt(q) z)^2] for an array of q > 0.

    Both on the same composite nodes (:func:`propcalc.quadrature.rule_nodes`);
    the second gives V'(q) by Stein's identity, V'(q) = sigma_w2 E[(z^2 - 1)
    phi^2] / (2 q) (as :func:`propcalc.maps.variance_map_slope`). Points are
    processed in chunks sorted by q, so each chunk's panel grading fits it.
    """
    m = np.empty(q.shape)
    s = np.empty(q.shape)
    order = np.argsort(q, kind="stable")
    for start in range(0, q.size, _NODE_CHUNK):
        sel = order[start:start + _NODE_CHUNK]
        qs = q[sel]
        x, w = rule_nodes(np.zeros(qs.size), qs, act.breakpoints, rule)
        with np.errstate(over="ignore", invalid="ignore"):
            f = act.value(x) ** 2
        if not np.all(np.isfinite(f)):
            bad = float(x[~np.isfinite(f)][0])
            raise ComputationError(f"{act.label}(x)^2 is not finite at x = {bad:.6g}, a point the "
                                   "Gaussian integral reaches")
        wf = w * f
        m[sel] = wf.sum(axis=-1)
        if slope:
            z2 = x * x
            z2 /= qs[:, None]
            z2 -= 1.0
            s[sel] = np.einsum("ij,ij->i", wf, z2)
    return m, s


def _chunked(fn: Any, act: Activation, q: Array, rule: QuadratureRule) -> Array:
    """Apply a vectorised moment of :mod:`propcalc.maps` in sorted chunks (memory bound)."""
    out = np.empty(q.shape)
    order = np.argsort(q, kind="stable")
    for start in range(0, q.size, _NODE_CHUNK):
        sel = order[start:start + _NODE_CHUNK]
        out[sel] = fn(act, q[sel], rule)
    return out


def _depth_scale(slope: Array) -> Array:
    """Vectorised :func:`propcalc.criticality.depth_scale`: -1 / ln|s|; 0 at 0, inf for |s| >= 1."""
    s = np.abs(slope)
    out = np.full(s.shape, math.inf)
    out[s == 0] = 0.0
    mid = (s > 0) & (s < 1)
    out[mid] = -1.0 / np.log(s[mid])
    return out


def _polish(act: Activation, sw: Array, sb: Array, a: Array, b: Array, ga: Array, gb: Array,
            rule: QuadratureRule) -> Array:
    """Roots of g(q) = sw E[phi^2](q) + sb - q in brackets [a, b] with g(a) g(b) < 0.

    Newton steps with g'(q) = V'(q) - 1 (Stein's identity), replaced by a
    bisection whenever they would leave the current bracket; stops when the
    step falls below 4e-15 relative (the rounding floor of V). Brackets that
    have not converged after 100 steps (a near-double root) are finished by
    Brent's method, as in the engine.
    """
    a, b, ga, gb = a.copy(), b.copy(), ga.copy(), gb.copy()
    x = a - ga * (b - a) / (gb - ga)  # false position start
    x = np.where((x > a) & (x < b), x, 0.5 * (a + b))
    root = np.full(a.shape, np.nan)
    active = np.arange(a.size)
    for _ in range(_MAX_NEWTON):
        if active.size == 0:
            break
        xa = x[active]
        m, s = _moments(act, xa, rule)
        g = (sw[active] * m + sb[active]) - xa
        dg = sw[active] * s / (2.0 * xa) - 1.0
        same = np.sign(g) == np.sign(ga[active])
        a[active] = np.where(same, xa, a[active])
        ga[active] = np.where(same, g, ga[active])
        b[active] = np.where(same, b[active], xa)
        gb[active] = np.where(same, gb[active], g)
        with np.errstate(divide="ignore", invalid="ignore"):
            step = xa - g / dg
        lo, hi = a[active], b[active]
        inside = np.isfinite(step) & (step > lo) & (step < hi)
        step = np.where(inside, step, 0.5 * (lo + hi))
        done = (g == 0.0) | (np.abs(step - xa) <= 4e-15 * xa) | (hi - lo <= 4e-15 * xa)
        root[active[done]] = np.where(g[done] == 0.0, xa[done], step[done])
        x[active] = step
        active = active[~done]
    for i in active:  # near-double roots: finish like the engine (Brent on the bracket)
        def gap(q: float, i: int = int(i)) -> float:
            return float(variance_map(act, q, float(sw[i]), float(sb[i]), rule)) - q

        lo, hi = float(a[i]), float(b[i])
        flo, fhi = gap(lo), gap(hi)
        if flo * fhi < 0:
            root[i] = optimize.brentq(gap, lo, hi, xtol=1e-300, rtol=4e-15, maxiter=200)
        else:
            root[i] = lo if abs(flo) < abs(fhi) else hi
    return root


def _variance_fixed_points(act: Activation, sw: Array, sb: Array, qi: float,
                           rule: QuadratureRule) -> tuple[Array, Array, Array]:
    """Vectorised variance fixed points: (status, q reached, chi_q) for every point.

    The layer-to-layer flow from ``q_start = sigma_w2 q_input + sigma_b2``
    reaches the first root of ``g(q) = V(q) - q`` above q_start when
    g(q_start) > 0, and the last root below it when g(q_start) < 0 (V is
    non-decreasing for every built-in; see
    :func:`propcalc.criticality.variance_fixed_points`). Here g is scanned
    on a log grid of 240 points over the engine's range (``[1e-10, 1e8]``,
    widened to cover V(0) / 10 and 10 (sigma_b2 + q_start)), shared by every
    point, and a point is settled here only when its verdict is clean: g
    clearly signed (|g| > 1e-9 (q + sigma_b2)) at q_start and at every grid
    point up to a clearly signed bracket, which Newton steps then polish; or
    g clearly positive all the way up (unbounded); or, when q = 0 is a fixed
    point, clearly negative all the way down (collapse); and the root's slope
    chi_q not within 1e-6 of 1. Every other point (neutral maps, tangential
    or rounding-level fixed points, roots next to 0) is handed to the
    engine's :func:`~propcalc.criticality.variance_fixed_points` itself.
    """
    n = sw.size
    q_start = sw * qi + sb
    phi0 = float(act.value(np.array([0.0]))[0])
    v0 = sw * phi0 * phi0 + sb  # V(0)
    q_hi = np.maximum(Q_MAX, 10.0 * (sb + q_start))
    q_lo = np.maximum(np.where(v0 > 0, np.minimum(Q_MIN, v0 / 10.0), Q_MIN), 1e-300)
    zero_fixed = (sb == 0.0) & (phi0 == 0.0)
    g_start = (sw * _second_moment_from_zero(act, q_start, rule) + sb) - q_start
    tol_start = _CLEAR * (q_start + sb)
    up = (g_start > tol_start) & (q_start > 0)
    down = (g_start < -tol_start) & (q_start > 0)

    status = np.full(n, "fixed_point", dtype=_TEXT)
    reached = np.full(n, np.nan)
    clean = np.zeros(n, dtype=bool)
    owner: list[Array] = []
    ends: list[tuple[Array, Array, Array, Array]] = []
    keys = np.stack([q_lo, q_hi], axis=1)
    uniq, inverse = np.unique(keys, axis=0, return_inverse=True)
    inverse = inverse.ravel()
    for j, (lo, hi) in enumerate(uniq):
        idx = np.flatnonzero(inverse == j)
        grid = np.geomspace(lo, hi, _SCAN_POINTS)
        g = (sw[idx, None] * second_moment(act, grid, rule) + sb[idx, None]) - grid
        tol = _CLEAR * (grid + sb[idx, None])
        pos, neg = g > tol, g < -tol
        qs = q_start[idx, None]
        above, below = grid > qs, grid < qs
        # upwards: the first clearly negative grid value above q_start, all clear before it
        hit = above & neg
        first_hit = np.where(hit.any(1), np.argmax(hit, axis=1), grid.size)
        blocked = above & ~pos
        first_block = np.where(blocked.any(1), np.argmax(blocked, axis=1), grid.size)
        u = up[idx]
        up_root = u & (first_hit < grid.size) & (first_block == first_hit)
        up_free = u & (first_block == grid.size) & above.any(1)
        # downwards: the last clearly positive grid value below q_start, all clear after it
        hit = below & pos
        last_hit = np.where(hit.any(1), grid.size - 1 - np.argmax(hit[:, ::-1], axis=1), -1)
        blocked = below & ~neg
        last_block = np.where(blocked.any(1), grid.size - 1 - np.argmax(blocked[:, ::-1], axis=1),
                              -1)
        d = down[idx]
        down_root = d & (last_hit >= 0) & (last_block == last_hit)
        down_free = d & (last_block == -1) & zero_fixed[idx]
        status[idx[up_free]] = "unbounded"
        clean[idx[up_free]] = True
        status[idx[down_free]] = "collapse"
        reached[idx[down_free]] = 0.0
        clean[idx[down_free]] = True
        # brackets: [grid[k-1] or q_start, grid[k]] upwards, [grid[k], grid[k+1] or q_start] down
        r = np.flatnonzero(up_root)
        k = first_hit[r]
        left_is_start = (k == 0) | (grid[np.maximum(k - 1, 0)] <= q_start[idx[r]])
        a = np.where(left_is_start, q_start[idx[r]], grid[np.maximum(k - 1, 0)])
        ga = np.where(left_is_start, g_start[idx[r]], g[r, np.maximum(k - 1, 0)])
        owner.append(idx[r])
        ends.append((a, grid[k], ga, g[r, k]))
        r = np.flatnonzero(down_root)
        k = last_hit[r]
        kk = np.minimum(k + 1, grid.size - 1)
        right_is_start = (k + 1 >= grid.size) | (grid[kk] >= q_start[idx[r]])
        b = np.where(right_is_start, q_start[idx[r]], grid[kk])
        gb = np.where(right_is_start, g_start[idx[r]], g[r, kk])
        owner.append(idx[r])
        ends.append((grid[k], b, g[r, k], gb))
    chi_q = np.full(n, np.nan)
    pts = np.concatenate(owner) if owner else np.zeros(0, dtype=int)
    if pts.size:
        a, b, ga, gb = (np.concatenate([e[i] for e in ends]) for i in range(4))
        roots = _polish(act, sw[pts], sb[pts], a, b, ga, gb, rule)
        _, s = _moments(act, roots, rule)
        slope = sw[pts] * s / (2.0 * roots)
        good = (np.abs(slope - 1.0) > 1e-6) & ~(zero_fixed[pts] & (roots <= 10.0 * q_lo[pts]))
        reached[pts[good]] = roots[good]
        chi_q[pts[good]] = slope[good]
        clean[pts[good]] = True
    coll = clean & (status == "collapse")
    dl, dr = act.derivative(np.array([-1e-12, 1e-12]))
    # variance_collapse_rate: sigma_w2 (phi'(0-)^2 + phi'(0+)^2) / 2 (when phi(0) = 0)
    chi_q[coll] = sw[coll] * (dl * dl + dr * dr) / 2.0
    for i in np.flatnonzero(~clean):  # the engine decides the delicate points
        try:
            fps = variance_fixed_points(act, float(sw[i]), float(sb[i]), qi, rule)
        except ComputationError as exc:
            raise ComputationError(f"at sigma_w2 = {sw[i]:.17g}, sigma_b2 = {sb[i]:.17g}: "
                                   f"{exc}") from exc
        status[i] = fps.status
        if fps.reached is not None:
            reached[i] = fps.reached.q
            chi_q[i] = fps.reached.chi_q
    return status, reached, chi_q


def _second_moment_from_zero(act: Activation, q: Array, rule: QuadratureRule) -> Array:
    """E[phi(sqrt(q) z)^2] for q >= 0 (q = 0 gives phi(0)^2)."""
    m = np.empty(q.shape)
    pos = q > 0
    if np.any(pos):
        m[pos], _ = _moments(act, q[pos], rule, slope=False)
    m[~pos] = float(act.value(np.array([0.0]))[0]) ** 2
    return m


def propagation_arrays(act: Activation, sigma_w2: Any, sigma_b2: Any, q_input: float = 1.0,
                       rule: QuadratureRule = DEFAULT_RULE) -> dict[str, Array]:
    """The quantities of :func:`propcalc.propagation` for arrays of (sigma_w2, sigma_b2) pairs.

    Parameters
    ----------
    act : Activation
    sigma_w2, sigma_b2 : array_like
        Broadcast together; sigma_w2 > 0, sigma_b2 >= 0, finite.
    q_input : float
        Mean squared input coordinate.
    rule : QuadratureRule

    Returns
    -------
    dict of ndarray
        ``status`` and ``phase`` (strings) and the float arrays of
        :data:`QUANTITIES`, each of the broadcast shape; NaN where
        ``propagation`` gives None (unbounded variance).

    Notes
    -----
    Agrees with ``propagation`` point by point to 1e-9 relative (depth
    scales to 1e-9 xi relative); see the module docstring for the method
    (array fixed points, the Hermite series for the chaotic c*, the engine
    itself for delicate points).
    """
    sw_b, sb_b = np.broadcast_arrays(np.asarray(sigma_w2, dtype=float),
                                     np.asarray(sigma_b2, dtype=float))
    shape = sw_b.shape
    sw = _check_axis("sigma_w2", sw_b.ravel(), positive=True)
    sb = _check_axis("sigma_b2", sb_b.ravel(), positive=False)
    qi = check_nonnegative("q_input", q_input)
    out = _propagation_flat(act, sw, sb, qi, rule)
    return {k: v.reshape(shape) for k, v in out.items()}


def _propagation_flat(act: Activation, sw: Array, sb: Array, qi: float,
                      rule: QuadratureRule) -> dict[str, Array]:
    n = sw.size
    status, q, chi_q = _variance_fixed_points(act, sw, sb, qi, rule)
    unbounded = status == "unbounded"
    collapse = status == "collapse"
    c1 = np.empty(n)
    if np.any(unbounded):  # large-variance limit, as propagation reports it
        c1[unbounded] = sw[unbounded] * _chunked(derivative_second_moment, act,
                                                 np.full(int(unbounded.sum()), 1e12), rule)
    dl, dr = act.derivative(np.array([-1e-12, 1e-12]))
    c1[collapse] = sw[collapse] * (dl * dl + dr * dr) / 2.0
    rest = ~unbounded & ~collapse
    if np.any(rest):
        c1[rest] = sw[rest] * _chunked(derivative_second_moment, act, q[rest], rule)

    phase = np.full(n, "chaotic", dtype=_TEXT)
    finite = np.isfinite(c1)
    edge = finite & (np.abs(c1 - 1.0) <= EDGE_TOLERANCE)
    phase[finite & ~edge & (c1 < 1.0)] = "ordered"
    phase[edge] = "edge of chaos"
    phase[unbounded] = "unbounded variance"

    c_star = np.ones(n)
    chi_c = np.where(edge, 1.0, c1)
    need = np.flatnonzero((phase == "chaotic") & ~collapse)
    for n_pass, (kmax, series_rule) in enumerate(SERIES_PASSES):
        if need.size == 0:
            break
        # the Hermite series where it provably converges (a longer one for slow decay),
        # else the 2-D integrals point by point
        cs, cc, ok, curv, bound = series_fixed_points(act, sw[need], sb[need], q[need], kmax,
                                                      series_rule, curvature=True)
        c_star[need[ok]] = cs[ok]
        chi_c[need[ok]] = cc[ok]
        retry = ~ok & (cs <= 0.97) & (n_pass + 1 < len(SERIES_PASSES))
        for j in np.flatnonzero(~ok & ~retry):
            i = need[j]
            c_star[i], chi_c[i] = _chaotic_fixed_point(
                act, float(sw[i]), float(sb[i]), float(q[i]), rule, guess=float(cs[j]),
                curvature=(float(curv[j]), float(bound[j])))
        need = need[retry]
    xi_c = np.where(edge, math.inf, _depth_scale(chi_c))
    xi_c = np.where(collapse & ~edge, np.where(c1 < 1, _depth_scale(c1), math.inf), xi_c)
    xi_q = _depth_scale(np.where(unbounded, 0.0, chi_q))
    out = {
        "status": status, "phase": phase, "q_star": q, "chi_q": chi_q, "xi_q": xi_q, "chi_1": c1,
        "c_star": c_star, "chi_c": chi_c, "xi_c": xi_c,
        "trainable_depth": TRAINABLE_DEPTH_FACTOR * xi_c,
    }
    for key in ("q_star", "chi_q", "xi_q", "c_star", "chi_c", "xi_c", "trainable_depth"):
        out[key] = np.where(unbounded, np.nan, out[key])
    return out


#: A cheaper rule, used only to guess c* before the polish with the caller's rule.
_GUESS_RULE = QuadratureRule(n_per_panel=8, panel_width=2.0, z_max=9.0)


def _chaotic_fixed_point(act: Activation, sw: float, sb: float, q: float,
                         rule: QuadratureRule, guess: float | None = None,
                         curvature: tuple[float, float] | None = None) -> tuple[float, float]:
    """(c*, C'(c*)) in the chaotic phase: a cheap guess, then Newton steps with ``rule``.

    With a usable ``guess`` (the Hermite series' c*, in (0, 1)) and its
    ``curvature`` the engine's solver polishes that guess instead (one exact
    evaluation when the guess is within 1e-9; see
    :func:`propcalc.criticality.correlation_fixed_point`).

    The guess is the engine's own solver run with an 8-node rule (about a
    fifth of the 2-D nodes; c* to ~1e-9). From there Newton's method on
    g(c) = C(c) - c with the caller's rule needs one step, so about two full
    2-D evaluations instead of four or five. It stops as the engine does
    (|g| <= 4e-15, or a step below 1e-15, C'(c*) taken at the returned c*)
    and falls back to the engine's solver on anything unusual (a non-finite
    value, a step leaving [0, 1), no convergence in 6 steps).
    """
    if guess is not None and math.isfinite(guess) and 0.0 < guess < 1.0:
        return correlation_fixed_point(act, sw, sb, q, rule, guess=guess, curvature=curvature)
    first, _ = correlation_fixed_point(act, sw, sb, q, _GUESS_RULE)
    c = float(first)
    for _ in range(6):
        val, slope = (float(v) for v in correlation_map_and_slope(act, c, sw, sb, q, rule))
        g = val - c
        if not (math.isfinite(g) and math.isfinite(slope)):
            break
        if abs(g) <= (1e-15 if c == 0.0 else 4e-15):
            return c, slope
        if slope >= 1.0 or c == 0.0:
            break
        step = c - g / (slope - 1.0)
        if not 0.0 <= step < 1.0:
            break
        if abs(step - c) <= 1e-15:
            val, slope = (float(v) for v in correlation_map_and_slope(act, step, sw, sb, q, rule))
            return step, slope
        c = step
    return correlation_fixed_point(act, sw, sb, q, rule)


def _pointwise_flat(act: Activation, sw: Array, sb: Array, qi: float,
                    rule: QuadratureRule) -> dict[str, Array]:
    """The reference: :func:`propcalc.propagation` at every point."""
    n = sw.size
    out: dict[str, Array] = {k: np.full(n, np.nan) for k in QUANTITIES}
    out["status"] = np.empty(n, dtype=_TEXT)
    out["phase"] = np.empty(n, dtype=_TEXT)
    for i in range(n):
        p = propagation(act, float(sw[i]), float(sb[i]), q_input=qi, rule=rule)
        for k in QUANTITIES:
            v = getattr(p, k)
            out[k][i] = np.nan if v is None else v
        out["status"][i] = p.status
        out["phase"][i] = p.phase
    return out


# -------------------------------------------------------------------------------------------
# tasks for executors
# -------------------------------------------------------------------------------------------
def _portable(act: Activation) -> Any:
    """A picklable stand-in for an activation: its built-in name or formula, else the object."""
    if act.formula is None and act.name in builtin_names():
        try:
            if builtin_activation(act.name, **act.params) is act:
                return ("builtin", act.name, dict(act.params))
        except Exception:  # noqa: BLE001 - not a registry object; fall through
            pass
    if act.formula is not None:
        return ("formula", act.formula, dict(act.params))
    try:
        pickle.dumps(act)
    except Exception:  # noqa: BLE001 - lambdas and closures do not pickle
        raise InvalidParameterError(
            "activations", "built-in or formula activations when an executor is used",
            act.label, "a custom Activation holding Python functions cannot be sent to other "
            "processes; run the sweep without an executor") from None
    return act


def _resolve(spec: Any) -> Activation:
    if isinstance(spec, Activation):
        return spec
    kind, text, params = spec
    if kind == "builtin":
        return builtin_activation(text, **params)
    return make_activation(text, **params)


@dataclass(frozen=True, eq=False)
class _Task:
    act: Any
    sigma_w2: Array
    sigma_b2: Array
    q_input: float
    rule: QuadratureRule
    method: str


def sweep_chunk(task: _Task) -> dict[str, Array]:
    """Compute one chunk of a sweep (module-level so that executors can pickle it).

    Parameters
    ----------
    task : _Task
        The activation (or its portable name), flat sigma_w2 and sigma_b2
        arrays, q_input, the quadrature rule and the method.

    Returns
    -------
    dict of ndarray
        As :func:`propagation_arrays`.
    """
    act = _resolve(task.act)
    if task.method == "pointwise":
        return _pointwise_flat(act, task.sigma_w2, task.sigma_b2, task.q_input, task.rule)
    return _propagation_flat(act, task.sigma_w2, task.sigma_b2, task.q_input, task.rule)


# -------------------------------------------------------------------------------------------
# results
# -------------------------------------------------------------------------------------------
def _cell(value: Any) -> Any:
    """A table cell: NaN (absent) -> None, numpy scalars -> Python (inf stays a float)."""
    if isinstance(value, (float, np.floating)):
        f = float(value)
        return None if math.isnan(f) else f
    if isinstance(value, np.str_):
        return str(value)
    return value


def _csv_text(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    return str(value)


class _Table:
    """Tidy-table output shared by the sweep results (rows, CSV, JSON lines)."""

    def columns(self) -> dict[str, Array]:  # pragma: no cover - overridden
        raise NotImplementedError

    def rows(self) -> Iterator[dict[str, Any]]:
        """One dict per grid point, in C order of the arrays (None for absent values)."""
        cols = self.columns()
        names = list(cols)
        n = len(next(iter(cols.values()))) if cols else 0
        for i in range(n):
            yield {k: _cell(cols[k][i]) for k in names}

    def _write(self, text: str, path_or_buffer: str | os.PathLike[str] | IO[str] | None) -> str:
        if path_or_buffer is None:
            return text
        if hasattr(path_or_buffer, "write"):
            path_or_buffer.write(text)  # type: ignore[union-attr]
        else:
            with open(path_or_buffer, "w", encoding="utf-8", newline="") as fh:
                fh.write(text)
        return text

    def to_csv(self, path_or_buffer: str | os.PathLike[str] | IO[str] | None = None) -> str:
        """The tidy table as CSV text (written to a path or text buffer if given).

        A header row with the column names, then one row per point; absent
        values are empty fields, infinities ``inf`` / ``-inf``, floats in
        Python's shortest round-trip form.
        """
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        cols = list(self.columns())
        writer.writerow(cols)
        for row in self.rows():
            writer.writerow([_csv_text(row[k]) for k in cols])
        return self._write(buf.getvalue(), path_or_buffer)

    def to_json_lines(self, path_or_buffer: str | os.PathLike[str] | IO[str] | None = None) -> str:
        """The tidy table as JSON lines: one object per point, strict JSON.

        Absent values are ``null`` and infinities the strings ``"inf"`` /
        ``"-inf"`` (:func:`propcalc.jsonable`).
        """
        lines = [json.dumps(jsonable(row), allow_nan=False) for row in self.rows()]
        return self._write("".join(line + "\n" for line in lines), path_or_buffer)


def _frozen(a: Array) -> Array:
    a = np.array(a, copy=True)
    a.setflags(write=False)
    return a


@dataclass(frozen=True, eq=False)
class SweepResult(_Table, Result):
    """Propagation quantities on a grid ``activations x sigma_w2 x sigma_b2``.

    Attributes
    ----------
    activations : tuple of str
        Labels, the first axis.
    sigma_w2, sigma_b2 : ndarray
        The grid axes (1-D).
    q_input : float
    status, phase : ndarray of str
        Shape ``(n_activations, n_sigma_w2, n_sigma_b2)``.
    q_star, chi_q, xi_q, chi_1, c_star, chi_c, xi_c, trainable_depth : ndarray of float
        The same shape; NaN where the quantity does not exist (unbounded
        variance), inf where ``propagation`` gives inf.
    method : str
        "vectorised" or "pointwise".

    Notes
    -----
    The arrays are read-only. ``trainable_depth`` is 6 xi_c, an empirical
    rule of Schoenholz et al. 2017.
    """

    activations: tuple[str, ...]
    sigma_w2: Array
    sigma_b2: Array
    q_input: float
    status: Array
    phase: Array
    q_star: Array = field(metadata=ABSENT_AS_NONE)
    chi_q: Array = field(metadata=ABSENT_AS_NONE)
    xi_q: Array = field(metadata=ABSENT_AS_NONE)
    chi_1: Array = field(metadata=ABSENT_AS_NONE)
    c_star: Array = field(metadata=ABSENT_AS_NONE)
    chi_c: Array = field(metadata=ABSENT_AS_NONE)
    xi_c: Array = field(metadata=ABSENT_AS_NONE)
    trainable_depth: Array = field(metadata=ABSENT_AS_NONE)
    method: str = "vectorised"
    trainable_depth_rule: str = field(default=_TRAINABLE_RULE, init=False)

    dict_properties = ("shape",)

    @property
    def shape(self) -> tuple[int, int, int]:
        """(n_activations, n_sigma_w2, n_sigma_b2)."""
        return (len(self.activations), self.sigma_w2.size, self.sigma_b2.size)

    def grid(self, quantity: str, activation: int | str = 0) -> Array:
        """The 2-D array ``(n_sigma_w2, n_sigma_b2)`` of one quantity for one activation."""
        names = QUANTITIES + ("status", "phase")
        if quantity not in names:
            raise InvalidParameterError("quantity", f"one of {', '.join(names)}", quantity)
        if isinstance(activation, str):
            if activation not in self.activations:
                raise InvalidParameterError("activation", f"one of {', '.join(self.activations)}",
                                            activation)
            activation = self.activations.index(activation)
        return getattr(self, quantity)[activation]

    def columns(self) -> dict[str, Array]:
        """Flat columns of the tidy table (C order: activation, then sigma_w2, then sigma_b2)."""
        na, nw, nb = self.shape
        act = np.repeat(np.asarray(self.activations, dtype=object), nw * nb)
        sw = np.tile(np.repeat(self.sigma_w2, nb), na)
        sb = np.tile(self.sigma_b2, na * nw)
        cols: dict[str, Array] = {"activation": act, "sigma_w2": sw, "sigma_b2": sb,
                                  "q_input": np.full(na * nw * nb, self.q_input),
                                  "status": self.status.ravel(), "phase": self.phase.ravel()}
        for k in QUANTITIES:
            cols[k] = getattr(self, k).ravel()
        return cols


@dataclass(frozen=True, eq=False)
class EdgeSweepResult(_Table, Result):
    """The edge-of-chaos line of each activation over a grid of q*.

    Attributes
    ----------
    activations : tuple of str
    q_star : ndarray
        The grid (1-D).
    sigma_w2, sigma_b2, chi_q, xi_q : ndarray of float
        Shape ``(n_activations, n_q_star)``; NaN where the point is not valid.
    stable, valid : ndarray of bool
        As :class:`propcalc.CriticalPoint`.
    """

    activations: tuple[str, ...]
    q_star: Array
    sigma_w2: Array = field(metadata=ABSENT_AS_NONE)
    sigma_b2: Array = field(metadata=ABSENT_AS_NONE)
    chi_q: Array = field(metadata=ABSENT_AS_NONE)
    xi_q: Array = field(metadata=ABSENT_AS_NONE)
    stable: Array
    valid: Array

    def columns(self) -> dict[str, Array]:
        na, nq = self.sigma_w2.shape
        return {"activation": np.repeat(np.asarray(self.activations, dtype=object), nq),
                "q_star": np.tile(self.q_star, na), "sigma_w2": self.sigma_w2.ravel(),
                "sigma_b2": self.sigma_b2.ravel(), "chi_q": self.chi_q.ravel(),
                "xi_q": self.xi_q.ravel(), "stable": self.stable.ravel().tolist(),
                "valid": self.valid.ravel().tolist()}


# -------------------------------------------------------------------------------------------
# the entry points
# -------------------------------------------------------------------------------------------
def _check_axis(name: str, values: Any, positive: bool) -> Array:
    try:
        arr = np.atleast_1d(np.asarray(values, dtype=float))
    except (TypeError, ValueError):
        raise InvalidParameterError(name, "a number or a 1-D array of numbers", values) from None
    if arr.ndim != 1 or arr.size == 0:
        raise InvalidParameterError(name, "a number or a non-empty 1-D array", values)
    for i, v in enumerate(arr):
        if not math.isfinite(v) or (v <= 0 if positive else v < 0):
            raise InvalidParameterError(f"{name}[{i}]", "finite and > 0" if positive
                                        else "finite and >= 0", float(v))
    return arr


def _activations(spec: Any) -> list[Activation]:
    items = [spec] if isinstance(spec, (str, Activation)) else list(spec)
    if not items:
        raise InvalidParameterError("activations", "a name, an Activation or a non-empty list", [])
    return [make_activation(a) for a in items]


def _progress_bar(total: int, progress: bool | None, desc: str) -> Any:
    if progress is False:
        return None
    try:
        from tqdm.auto import tqdm
    except ImportError:
        if progress:
            raise ImportError("the progress bar needs tqdm: pip install 'propcalc[sweep]'"
                              ) from None
        return None
    return tqdm(total=total, disable=None if progress is None else not progress, file=sys.stderr,
                unit="point", desc=desc, leave=False)


def sweep(activations: str | Activation | Sequence[str | Activation], sigma_w2: Any,
          sigma_b2: Any, *, q_input: float = 1.0, executor: Executor | None = None,
          chunk_size: int | None = None, progress: bool | None = None,
          method: str = "vectorised", rule: QuadratureRule = DEFAULT_RULE) -> SweepResult:
    """Propagation quantities on the grid ``activations x sigma_w2 x sigma_b2``.

    Parameters
    ----------
    activations : str, Activation or sequence of them
        One or several activations (names are resolved by
        :func:`propcalc.activation`).
    sigma_w2 : float or 1-D array_like
        Weight variances times fan-in, each > 0.
    sigma_b2 : float or 1-D array_like
        Bias variances, each >= 0.
    q_input : float
        Mean squared input coordinate (as in :func:`propcalc.propagation`).
    executor : concurrent.futures.Executor, optional
        Where the chunks run (a ``ProcessPoolExecutor``, a Dask
        ``Client.get_executor()``...). None runs them here, one after the
        other. Workers should run with ``OMP_NUM_THREADS=1``.
    chunk_size : int, optional
        Points per task; by default about a sixteenth of the grid, between
        64 and 10 000 points.
    progress : bool or None
        None shows a progress bar only when stderr is a terminal; True
        always; False never.
    method : str
        "vectorised" (array fixed points, the default) or "pointwise"
        (:func:`propcalc.propagation` at every point: the reference, slow).
    rule : QuadratureRule

    Returns
    -------
    SweepResult

    Raises
    ------
    InvalidParameterError
        For a bad axis value (the message names the index), chunk size or
        method, or a custom activation that cannot be sent to an executor.

    Examples
    --------
    >>> import numpy as np
    >>> from propcalc.sweep import sweep
    >>> res = sweep("tanh", np.linspace(0.5, 3.0, 6), [0.0, 0.05], progress=False)
    >>> str(res.grid("phase")[0, 0]), str(res.grid("phase")[-1, -1])
    ('ordered', 'chaotic')
    """
    acts = _activations(activations)
    sw_axis = _check_axis("sigma_w2", sigma_w2, positive=True)
    sb_axis = _check_axis("sigma_b2", sigma_b2, positive=False)
    qi = check_nonnegative("q_input", q_input)
    if method not in ("vectorised", "pointwise"):
        raise InvalidParameterError("method", "one of vectorised, pointwise", method)
    if executor is not None and not isinstance(executor, Executor):
        raise InvalidParameterError("executor", "a concurrent.futures.Executor or None",
                                    type(executor).__name__)
    sw_grid, sb_grid = np.meshgrid(sw_axis, sb_axis, indexing="ij")
    sw_flat, sb_flat = sw_grid.ravel(), sb_grid.ravel()
    n = sw_flat.size
    size = (max(64, min(10_000, -(-n * len(acts) // 16))) if chunk_size is None
            else check_int("chunk_size", chunk_size, 1))
    n_chunks = max(1, -(-n // size))
    # deal points to chunks in turn: chaotic (expensive) points spread evenly
    chunk_index = [np.arange(k, n, n_chunks) for k in range(n_chunks)]
    ship = executor is not None and not isinstance(executor, ThreadPoolExecutor)
    tasks: list[tuple[int, Array, _Task]] = []
    for a, act in enumerate(acts):
        spec = _portable(act) if ship else act
        for idx in chunk_index:
            tasks.append((a, idx, _Task(spec, sw_flat[idx], sb_flat[idx], qi, rule, method)))

    fields = {k: np.full((len(acts), n), np.nan) for k in QUANTITIES}
    fields["status"] = np.empty((len(acts), n), dtype=_TEXT)
    fields["phase"] = np.empty((len(acts), n), dtype=_TEXT)
    bar = _progress_bar(n * len(acts), progress,
                        "sweep " + ", ".join(a.label for a in acts)[:40])
    try:
        def store(a: int, idx: Array, part: dict[str, Array]) -> None:
            for k, v in part.items():
                fields[k][a, idx] = v
            if bar is not None:
                bar.update(idx.size)

        if executor is None:
            for a, idx, task in tasks:
                store(a, idx, sweep_chunk(task))
        else:
            futures = {executor.submit(sweep_chunk, task): (a, idx) for a, idx, task in tasks}
            for fut in as_completed(futures):
                a, idx = futures[fut]
                store(a, idx, fut.result())
    finally:
        if bar is not None:
            bar.close()
    shape = (len(acts), sw_axis.size, sb_axis.size)
    arrays = {k: _frozen(v.reshape(shape)) for k, v in fields.items()}
    return SweepResult(tuple(a.label for a in acts), _frozen(sw_axis), _frozen(sb_axis), qi,
                       method=method, **arrays)


def sweep_edge(activations: str | Activation | Sequence[str | Activation], q_star: Any, *,
               rule: QuadratureRule = DEFAULT_RULE) -> EdgeSweepResult:
    """The edge-of-chaos line of each activation on a grid of fixed points q*.

    ``sigma_w2 = 1 / E[phi'(sqrt(q*) z)^2]`` and ``sigma_b2 = q* - sigma_w2
    E[phi(sqrt(q*) z)^2]`` (Poole et al. 2016; Schoenholz et al. 2017),
    ``chi_q = V'(q*)`` by Stein's identity, all as arrays; a point is valid
    where sigma_w2 is finite, phi has no jump and sigma_b2 >= -1e-12 q*
    (then clipped to 0), as in :func:`propcalc.edge_of_chaos`.

    Parameters
    ----------
    activations : str, Activation or sequence of them
    q_star : float or 1-D array_like
        Each finite and > 0.

    Returns
    -------
    EdgeSweepResult
    """
    acts = _activations(activations)
    q = _check_axis("q_star", q_star, positive=True)
    shape = (len(acts), q.size)
    sw = np.full(shape, np.nan)
    sb = np.full(shape, np.nan)
    chi_q = np.full(shape, np.nan)
    stable = np.zeros(shape, dtype=bool)
    valid = np.zeros(shape, dtype=bool)
    for a, act in enumerate(acts):
        if act.has_jumps:
            continue
        w, b = edge_of_chaos_line_arrays(act, q, rule)
        ok = np.isfinite(w) & (b >= -1e-12 * q)
        valid[a] = ok
        sw[a, ok] = w[ok]
        sb[a, ok] = np.maximum(b[ok], 0.0)
        if np.any(ok):
            _, s = _moments(act, q[ok], rule)
            chi_q[a, ok] = w[ok] * s / (2.0 * q[ok])
        stable[a] = ok & (np.abs(np.nan_to_num(chi_q[a], nan=2.0)) < 1.0 - 1e-9)
    xi_q = np.where(valid, _depth_scale(np.nan_to_num(chi_q, nan=0.0)), np.nan)
    return EdgeSweepResult(tuple(a.label for a in acts), _frozen(q), _frozen(sw), _frozen(sb),
                           _frozen(chi_q), _frozen(xi_q), _frozen(stable), _frozen(valid))
