"""The panels of the composite Gaussian rule: rules, grading and nodes.

:class:`QuadratureRule` and :func:`rule_nodes` (nodes ``x`` and weights ``w`` with
``sum(w * f(x)) ~ E[f(mean + sqrt(q) z)]``): uniform panels in z, the breakpoints
mapped to z, a geometric grading towards the zero crossing, and, for activations with
structure away from 0 (``QuadratureRule.reach``), panels of a few scales in x. The
expectations built on them, and the description of the whole rule, are in
:mod:`propcalc.numerics.quadrature`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import Any

import numpy as np
from numpy.polynomial import hermite_e, legendre

from ..errors import ComputationError, InvalidParameterError

__all__ = [
    "QuadratureRule",
    "DEFAULT_RULE",
    "legendre_rule",
    "hermite_rule",
    "rule_nodes",
    "largest_variance",
    "FEATURE_WIDTH",
    "MAX_FEATURE_PANELS",
]

Array = np.ndarray
_INV_SQRT_2PI = 1.0 / math.sqrt(2.0 * math.pi)


@lru_cache(maxsize=64)
def legendre_rule(n_nodes: int) -> tuple[Array, Array]:
    """Gauss-Legendre nodes and weights on [-1, 1] (cached, read-only).

    Exact for polynomials of degree <= 2 n_nodes - 1.
    """
    x, w = legendre.leggauss(int(n_nodes))
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


@lru_cache(maxsize=64)
def hermite_rule(n_nodes: int) -> tuple[Array, Array]:
    """Probabilists' Gauss-Hermite rule normalised to the N(0, 1) density.

    ``sum(w * f(x))`` approximates ``E[f(z)]``; exact for polynomials of degree
    <= 2 n_nodes - 1. Kept for comparison: it does not split at breakpoints
    and converges slowly for kinked or steep integrands.
    """
    if isinstance(n_nodes, bool) or not 1 <= int(n_nodes) <= 300:
        raise InvalidParameterError("n_nodes", "an integer in [1, 300] (numpy's weights "
                                    "underflow beyond)", n_nodes)
    return _hermite_rule(int(n_nodes))


def _hermite_rule(n_nodes: int) -> tuple[Array, Array]:
    x, w = hermite_e.hermegauss(int(n_nodes))
    w = w / math.sqrt(2.0 * math.pi)
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


@dataclass(frozen=True)
class QuadratureRule:
    """Parameters of the composite Gaussian rule.

    Attributes
    ----------
    n_per_panel : int
        Gauss-Legendre nodes per panel.
    panel_width : float
        Width of the uniform z-panels.
    z_max : float
        Truncation of the z range; the neglected Gaussian mass is
        ``2 Phi(-z_max)`` (1.5e-23 for 10).
    grade_out : bool
        Continue the geometric grading around the zero crossing outwards up to
        half a uniform panel (steep activations at large q need it).
    scale : float
        The x-scale of the integrand's structure (1 for every built-in; smaller
        for steep formulas such as tanh(10 x)). The grading resolves features
        of this width at any q.
    reach : float
        How far from x = 0 that structure extends (0: only near 0, which the grading
        resolves; inf: everywhere, an oscillating formula). Where it is > 0, panels of
        at most FEATURE_WIDTH scales in x cover ``|x| <= reach`` (within the z range).
    """

    n_per_panel: int = 16
    panel_width: float = 4.0
    z_max: float = 10.0
    grade_out: bool = True
    scale: float = 1.0
    reach: float = 0.0

    @property
    def uniform_edges(self) -> Array:
        n = int(round(2 * self.z_max / self.panel_width))
        return np.linspace(-self.z_max, self.z_max, n + 1)


DEFAULT_RULE = QuadratureRule()

#: Width of the panels, in scales, over the region where an activation has structure away
#: from x = 0 (``QuadratureRule.reach``): 16 Gauss-Legendre nodes on a panel of half-width h
#: integrate exp(i w x) with an error of about (w h)^32 (16!)^4 / (33 (32!)^3) (DLMF 3.5.v),
#: 1e-34 at w h = 4; with w up to 1.5 / scale (sin(2x) + x/2 has scale 0.625 / 2) and h = 3
#: scales that is w h <= 4.5.
FEATURE_WIDTH = 6.0
#: The most such panels one expectation may use (16 nodes each); an oscillating activation at
#: a variance that needs more is refused (sin(x): q up to (6 * 20000 / 20)^2 = 3.6e7).
MAX_FEATURE_PANELS = 20000


def _feature_count(sq_max: float, rule: QuadratureRule) -> int:
    """Number of feature panels for rows whose largest standard deviation is ``sq_max``."""
    if not rule.reach > 0.0 or not sq_max > 0.0 or not math.isfinite(sq_max):
        return 0
    span = min(2.0 * rule.reach, 2.0 * rule.z_max * sq_max)
    k = int(math.ceil(span / (FEATURE_WIDTH * rule.scale)))
    if k > MAX_FEATURE_PANELS:
        limit = (MAX_FEATURE_PANELS * FEATURE_WIDTH * rule.scale / (2.0 * rule.z_max)) ** 2
        raise ComputationError(
            f"the activation has structure of width {rule.scale:.3g} in x out to |x| = "
            f"{rule.reach:.3g} (it oscillates): at q = {sq_max * sq_max:.3g} its Gaussian "
            f"integral would need {k} panels, more than the limit {MAX_FEATURE_PANELS} "
            f"(reached at q = {limit:.3g}), so it cannot be integrated to the stated accuracy")
    return k


def largest_variance(rule: QuadratureRule) -> float:
    """The largest q at which the rule integrates an activation with ``rule.reach = inf``
    (an oscillating one) within MAX_FEATURE_PANELS panels; inf otherwise."""
    if not rule.reach > 0.0 or (2.0 * rule.reach <= MAX_FEATURE_PANELS * FEATURE_WIDTH * rule.scale):
        return math.inf
    return (MAX_FEATURE_PANELS * FEATURE_WIDTH * rule.scale / (2.0 * rule.z_max)) ** 2


def _feature_edges(mean: Array, sq: Array, rule: QuadratureRule, k: int) -> Array:
    """k + 1 panel edges in z per row, uniform in x over ``|x| <= reach`` (within the range)."""
    L = rule.z_max
    lo = np.maximum(-rule.reach, mean - L * sq)
    hi = np.minimum(rule.reach, mean + L * sq)
    hi = np.maximum(hi, lo)
    t = np.linspace(0.0, 1.0, k + 1)
    x = lo[..., None] + (hi - lo)[..., None] * t
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (x - mean[..., None]) / sq[..., None]
    return np.where(np.isfinite(z), z, 0.0)


def _grading_levels(sqrt_q_max: float, scale: float = 1.0) -> int:
    ratio = sqrt_q_max / scale
    if not math.isfinite(ratio) or ratio <= 0.5:
        return 0
    return int(math.ceil(math.log2(2.0 * ratio)))


def _levels_array(sqrt_q: Array, scale: float = 1.0) -> Array:
    r = sqrt_q / scale
    with np.errstate(divide="ignore"):
        lv = np.ceil(np.log2(np.where(r > 0.5, 2.0 * r, 1.0)))
    return np.where(np.isfinite(lv), lv, 0).astype(int)


@lru_cache(maxsize=16)
def _plain_nodes(rule: QuadratureRule) -> tuple[Array, Array]:
    """Standard-normal nodes on uniform panels of width <= 2 over [-z_max, z_max] (cached).

    Enough for a smooth integrand f(m + s z) with s <= 1: its features have a
    width >= 1 in z (tanh-like poles at distance >= pi/2), and a 16-node panel
    of width 2 resolves them and the Gaussian weight to rounding.
    """
    width = min(2.0, rule.panel_width)
    n = int(math.ceil(2 * rule.z_max / width))
    edges = np.linspace(-rule.z_max, rule.z_max, n + 1)
    t, wt = legendre_rule(rule.n_per_panel)
    half = 0.5 * np.diff(edges)
    z = (0.5 * (edges[:-1] + edges[1:]))[:, None] + half[:, None] * t
    w = half[:, None] * wt * _INV_SQRT_2PI * np.exp(-0.5 * z * z)
    z, w = z.ravel(), w.ravel()
    z.setflags(write=False)
    w.setflags(write=False)
    return z, w


def _node_count(sqrt_q: float, n_extra: int, rule: QuadratureRule) -> int:
    n_edges = (_uniform_edges(rule).size + 5 + 2 * _grading_levels(sqrt_q, rule.scale) + n_extra
               + _feature_count(sqrt_q, rule))
    return (n_edges - 1) * rule.n_per_panel


@lru_cache(maxsize=64)
def _grading_offsets(rule: QuadratureRule, n_levels: int) -> Array:
    """Panel edges around the zero crossing: 0 and +-2^-k, from half a uniform panel
    (with ``grade_out``) down to 2^-n_levels (cached, read-only)."""
    top = max(0, int(math.floor(math.log2(rule.panel_width / 2.0)))) if rule.grade_out else -1
    offsets = np.asarray([0.0] + [s * 2.0**-k for k in range(-top, n_levels + 1)
                                  if k != 0 or top >= 0 for s in (-1.0, 1.0)])
    offsets.setflags(write=False)
    return offsets


@lru_cache(maxsize=64)
def _uniform_edges(rule: QuadratureRule) -> Array:
    edges = rule.uniform_edges
    edges.setflags(write=False)
    return edges


@lru_cache(maxsize=64)
def _centred_nodes(n_levels: int, break_at_zero: bool,
                   rule: QuadratureRule) -> tuple[Array, Array]:
    """Standard-normal nodes and weights of the rule for a zero mean (cached, read-only).

    With mean 0 and no breakpoint other than 0 the panels in z do not depend on q
    beyond the grading depth ``n_levels``: the nodes in x are ``sqrt(q) z``.
    """
    parts = [_uniform_edges(rule), _grading_offsets(rule, n_levels)]
    if break_at_zero:
        parts.append(np.zeros(1))
    z, w = _panel_nodes(parts, rule)
    z.setflags(write=False)
    w.setflags(write=False)
    return z, w


def _centred(mean: Any, breakpoints: Sequence[float]) -> bool:
    """True when the nodes can come from :func:`_centred_nodes` (zero mean, breaks at 0 only)."""
    return (all(b == 0.0 for b in breakpoints)
            and (mean == 0.0 if np.ndim(mean) == 0 else not np.any(mean)))


@lru_cache(maxsize=256)
def _scalar_nodes(mean: float, q: float, breakpoints: tuple[float, ...],
                  rule: QuadratureRule) -> tuple[Array, Array]:
    if not (q > 0.0 and math.isfinite(q) and math.isfinite(mean)):
        x, w = _rule_nodes(mean, q, breakpoints, rule, None)
    elif _centred(mean, breakpoints) and not rule.reach > 0.0:
        sq = math.sqrt(q)
        z, w = _centred_nodes(_grading_levels(sq, rule.scale), bool(breakpoints), rule)
        x = sq * z
    else:
        x, w = _row_nodes(mean, q, breakpoints, rule)
    x.setflags(write=False)
    w.setflags(write=False)
    return x, w


def _row_nodes(mean: float, q: float, breakpoints: Sequence[float], rule: QuadratureRule,
               extra: Array | None = None) -> tuple[Array, Array]:
    """The panels :func:`_rule_nodes` builds for one row (finite mean, q > 0), without
    its broadcasting; ``extra`` are more edges in z."""
    sq = math.sqrt(q)
    inv = 1.0 / sq
    parts = [_uniform_edges(rule),
             -mean * inv + _grading_offsets(rule, _grading_levels(sq, rule.scale))]
    if len(breakpoints):
        parts.append((np.asarray(breakpoints, dtype=float) - mean) * inv)
    if extra is not None:
        parts.append(extra)
    k = _feature_count(sq, rule)
    if k:
        parts.append(_feature_edges(np.asarray(mean, float), np.asarray(sq), rule, k))
    z, w = _panel_nodes(parts, rule)
    return mean + sq * z, w


def _panel_nodes(parts: list[Array], rule: QuadratureRule) -> tuple[Array, Array]:
    """Standard-normal nodes and weights on the panels between the sorted distinct edges
    in ``parts`` (clipped to +-z_max)."""
    edges = np.unique(np.clip(np.concatenate(parts), -rule.z_max, rule.z_max))
    a, b = edges[:-1], edges[1:]
    t, wt = legendre_rule(rule.n_per_panel)
    half = 0.5 * (b - a)
    z = (half[:, None] * t + (0.5 * (a + b))[:, None]).ravel()
    w = (half[:, None] * wt).ravel() * _INV_SQRT_2PI * np.exp(-0.5 * z * z)
    return z, w


def rule_nodes(mean: Any, q: Any, breakpoints: Sequence[float] = (),
               rule: QuadratureRule = DEFAULT_RULE,
               extra_edges: Array | None = None) -> tuple[Array, Array]:
    """Nodes ``x`` and weights ``w`` with ``sum(w * f(x), -1) ~ E[f(mean + sqrt(q) z)]``.

    Parameters
    ----------
    mean, q : array_like
        Broadcast together to a shape S; ``q >= 0`` (``q = 0`` puts every node
        at ``mean``, so the result is ``f(mean)``).
    breakpoints : sequence of float
        Points in x where f is not smooth; the rule splits there.
    rule : QuadratureRule
    extra_edges : ndarray, optional
        More panel edges in z units, of shape S + (k,).

    Returns
    -------
    x, w : ndarray of shape S + (N,)
        Scalar (mean, q) without extra edges are cached (read-only arrays).
    """
    if extra_edges is None and np.ndim(mean) == 0 and np.ndim(q) == 0:
        return _scalar_nodes(float(mean), float(q), tuple(float(b) for b in breakpoints), rule)
    return _rule_nodes(mean, q, breakpoints, rule, extra_edges)


def _rule_nodes(mean: Any, q: Any, breakpoints: Sequence[float],
                rule: QuadratureRule, extra_edges: Array | None) -> tuple[Array, Array]:
    mean, q = np.broadcast_arrays(np.asarray(mean, dtype=float), np.asarray(q, dtype=float))
    sq = np.sqrt(q)
    if (extra_edges is None and sq.size and _centred(mean, breakpoints)
            and not rule.reach > 0.0 and np.all((sq > 0) & np.isfinite(sq))):
        # every row has the same panels in z: one cached set, scaled (no per-row work)
        z, w = _centred_nodes(_grading_levels(float(np.max(sq)), rule.scale),
                              bool(len(breakpoints)), rule)
        x = sq[..., None] * z
        return x, np.broadcast_to(w, x.shape)
    if sq.size == 1 and math.isfinite(float(mean.flat[0])) and 0 < float(sq.flat[0]) < math.inf:
        # one row (an isolated pair expectation): sorted unique edges, no broadcasting
        extra = None if extra_edges is None else np.ravel(extra_edges)
        x, w = _row_nodes(float(mean.flat[0]), float(q.flat[0]), breakpoints, rule, extra)
        return x.reshape(sq.shape + x.shape), w.reshape(sq.shape + w.shape)
    L = rule.z_max
    with np.errstate(divide="ignore", invalid="ignore"):
        inv = np.where(sq > 0, 1.0 / np.where(sq > 0, sq, 1.0), np.inf)
        center = np.where(sq > 0, -mean * inv, np.where(mean > 0, -np.inf, np.inf))
        center = np.where((sq == 0) & (mean == 0), 0.0, center)
    n_levels = _grading_levels(float(np.max(sq)) if sq.size else 0.0, rule.scale)
    uniform = _uniform_edges(rule)
    pieces = [np.broadcast_to(uniform, sq.shape + uniform.shape)]
    # geometric grading (ratio 2) from 2^-n_levels up to half a uniform panel
    pieces.append(center[..., None] + _grading_offsets(rule, n_levels))
    if len(breakpoints):
        b = np.asarray(breakpoints, dtype=float)
        with np.errstate(invalid="ignore"):
            bz = (b - mean[..., None]) * inv[..., None]
        bz = np.where(np.isnan(bz), 0.0, bz)  # q = 0 and mean == b: irrelevant, any value
        pieces.append(bz)
    if extra_edges is not None:
        pieces.append(np.broadcast_to(extra_edges, sq.shape + extra_edges.shape[-1:]))
    k = _feature_count(float(np.max(sq)) if sq.size else 0.0, rule)
    if k:
        pieces.append(_feature_edges(mean, sq, rule, k))
    edges = np.clip(np.concatenate(pieces, axis=-1), -L, L)
    edges.sort(axis=-1)
    a, bb = edges[..., :-1], edges[..., 1:]
    if a.size:
        # panels of zero width in every row (an edge listed twice, e.g. a breakpoint at the
        # zero crossing, or edges clipped to +-z_max) would only carry weight-0 nodes
        empty = np.all(a == bb, axis=tuple(range(a.ndim - 1)))
        if np.any(empty) and not np.all(empty):
            a, bb = a[..., ~empty], bb[..., ~empty]
    t, wt = legendre_rule(rule.n_per_panel)
    half = 0.5 * (bb - a)
    # few passes over the big arrays, in place: this is the hot loop of the 2-D rule
    z = half[..., None] * t
    z += (0.5 * (a + bb))[..., None]
    w = np.square(z)
    w *= -0.5
    np.exp(w, out=w)
    w *= wt * _INV_SQRT_2PI
    w *= half[..., None]
    shape = sq.shape + (z.shape[-2] * z.shape[-1],)
    z = z.reshape(shape)
    w = w.reshape(shape)
    z *= sq[..., None]
    z += mean[..., None]
    return z, w


# -- checks shared by the 1-D and 2-D expectations --------------------------------------
def _validate(values: Array, field: str, lower: float | None = None, upper: float | None = None,
              strict: bool = False) -> None:
    """Raise InvalidParameterError naming ``field`` for non-finite or out-of-range entries."""
    ok = np.isfinite(values)
    if lower is not None:
        ok &= (values > lower) if strict else (values >= lower)
    if upper is not None:
        ok &= values <= upper
    if not np.all(ok):
        bad = float(np.asarray(values)[~ok].ravel()[0])
        parts = ["finite"]
        if lower is not None:
            parts.append(f"{'>' if strict else '>='} {lower:g}")
        if upper is not None:
            parts.append(f"<= {upper:g}")
        raise InvalidParameterError(field, " and ".join(parts), bad)


def _check_finite(values: Array, x: Array, what: str) -> None:
    ok = np.isfinite(values)
    if not ok.all():
        where = float(np.ravel(x)[np.flatnonzero(~np.ravel(ok))[0]])
        raise ComputationError(
            f"{what} is not finite at x = {where:.6g}, a point the Gaussian integral reaches")
