"""Region boundaries of the phase diagram, located by bisection instead of read off the grid.

The sweep gives the phase at the nodes of the (sigma_w2, sigma_b2) grid. Filling
regions by interpolating between nodes (what ``contourf`` does with a
classification) puts every boundary somewhere inside its cell, draws
staircases where a boundary runs along the grid, and leaves one-cell strips
of the wrong phase beside a boundary that falls close to a column of nodes.
Here each grid edge whose two ends differ is bisected with the phase of the
points on it (the variance fixed point reached and chi_1 there; no
correlation fixed point is needed, so a point costs about as much as a
variance report), and the boundary inside each cell is the segment between
the crossings on its edges. The fields returned are signed distances (in
cell units) to those segments: positive inside the region, so that
``contourf(..., levels=[0, ...])`` fills the region up to the located
boundary (exact for a straight boundary, whatever the cell).

The phase rule is the report's own, :func:`propcalc.meanfield.core.phases` on chi_1 from
:func:`propcalc.meanfield.core.reached_chi_1` (Poole et al. 2016; Schoenholz et al. 2017):
the variance is unbounded when its flow from ``q_input`` has no finite fixed point
(:func:`propcalc.meanfield.fixed_points.solve_variance`), and the edge of chaos counts
as chaotic here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..activations.base import Activation
from ..meanfield import core
from ..meanfield.fixed_points import solve_variance
from ..numerics.quadrature import QuadratureRule
from ..vocabulary import Phase, VarianceStatus

__all__ = ["Regions", "BISECTION_STEPS", "ON_EDGE", "reached_chi_1", "point_classes",
           "on_reached_edge", "locate_regions"]

Array = np.ndarray

#: Halvings of a grid edge: the boundary is placed to 1/64 of a cell (an eighth of a pixel
#: at the default size).
BISECTION_STEPS = 6
#: A point of the edge-of-chaos line is the edge seen from q_input when chi_1 at the fixed
#: point reached is 1 to this (the line's own q* gives 1 to rounding; another gives a
#: different slope).
ON_EDGE = 1e-6
#: Distance (cells) given to nodes with no located boundary nearby.
_FAR = 3.0

ORDERED, CHAOTIC, UNBOUNDED = 0, 1, 2


@dataclass(frozen=True)
class Regions:
    """Signed-distance fields of the ordered and unbounded regions on the sweep's grid.

    Attributes
    ----------
    ordered, unbounded : ndarray (n_w, n_b)
        Signed distance in cells to the located boundary, > 0 inside.
    classes : ndarray of int (n_w, n_b)
        The class at each node (ORDERED, CHAOTIC, UNBOUNDED).
    chaotic_between : bool
        A chaotic strip lies between an ordered and an unbounded node
        (visible although no node is chaotic).
    unbounded_boundary : list of ndarray (k, 2)
        Segments (sigma_w2, sigma_b2) of the located boundary of the unbounded region.
    """

    ordered: Array
    unbounded: Array
    classes: Array
    chaotic_between: bool
    unbounded_boundary: list[Array]


def classes_of_phases(phase: Array) -> Array:
    """ORDERED / CHAOTIC / UNBOUNDED from the sweep's phase strings (the edge counts as chaotic)."""
    out = np.full(phase.shape, CHAOTIC, dtype=int)
    out[phase == Phase.ORDERED.value] = ORDERED
    out[phase == Phase.UNBOUNDED.value] = UNBOUNDED
    return out


def reached_chi_1(act: Activation, sw: Array, sb: Array, q_input: float,
                  rule: QuadratureRule) -> tuple[Array, Array]:
    """(unbounded, chi_1) of each point at the variance fixed point reached from q_input.

    chi_1 from :func:`propcalc.meanfield.core.reached_chi_1` (NaN where the variance is
    unbounded).
    """
    var = solve_variance(act, sw, sb, np.full(sw.shape, float(q_input)), rule)
    return var.status == VarianceStatus.UNBOUNDED.value, core.reached_chi_1(act, sw, var, rule)


def point_classes(act: Activation, sw: Array, sb: Array, q_input: float,
                  rule: QuadratureRule) -> Array:
    """The class of each point: the phase rule of :func:`propcalc.meanfield.core.phases`."""
    unbounded, chi1 = reached_chi_1(act, sw, sb, q_input, rule)
    return classes_of_phases(core.phases(chi1, unbounded))


def on_reached_edge(act: Activation, sw: Array, sb: Array, q_input: float,
                    rule: QuadratureRule) -> Array:
    """Whether chi_1 = 1 (to ON_EDGE) at the fixed point the variance reaches from q_input."""
    _, chi1 = reached_chi_1(act, sw, sb, q_input, rule)
    return np.isfinite(chi1) & (np.abs(chi1 - 1.0) <= ON_EDGE)


def _crossings(act: Activation, sw: Array, sb: Array, classes: Array, q_input: float,
               rule: QuadratureRule, steps: int) -> dict[str, dict[tuple[str, int, int], float]]:
    """Fraction along each grid edge where "ordered" and "unbounded" change (bisection)."""
    nw, nb = classes.shape
    edges = []  # (kind, i, j): "h" joins (i, j)-(i+1, j), "v" joins (i, j)-(i, j+1)
    ends = []
    for kind, a, b in (("h", classes[:-1, :], classes[1:, :]),
                       ("v", classes[:, :-1], classes[:, 1:])):
        ii, jj = np.nonzero(a != b)
        for i, j in zip(ii.tolist(), jj.tolist()):
            edges.append((kind, i, j))
            ends.append((int(a[i, j]), int(b[i, j])))
    out: dict[str, dict[tuple[str, int, int], float]] = {"ordered": {}, "unbounded": {}}
    if not edges:
        return out
    x0 = np.array([sw[i] for _, i, _ in edges])
    y0 = np.array([sb[j] for _, _, j in edges])
    x1 = np.array([sw[i + 1] if k == "h" else sw[i] for k, i, _ in edges])
    y1 = np.array([sb[j] if k == "h" else sb[j + 1] for k, _, j in edges])
    ca = np.array([e[0] for e in ends])
    cb = np.array([e[1] for e in ends])
    # one bisection per (edge, predicate) whose value differs at the two ends
    jobs = []
    for name, cls in (("ordered", ORDERED), ("unbounded", UNBOUNDED)):
        for k in np.flatnonzero((ca == cls) != (cb == cls)):
            jobs.append((name, cls, int(k)))
    lo = np.zeros(len(jobs))
    hi = np.ones(len(jobs))
    idx = np.array([k for _, _, k in jobs])
    target = np.array([cls for _, cls, _ in jobs])
    at_lo = ca[idx] == target  # the predicate's value at t = 0
    for _ in range(steps):
        t = 0.5 * (lo + hi)
        px = x0[idx] + t * (x1[idx] - x0[idx])
        py = y0[idx] + t * (y1[idx] - y0[idx])
        got = point_classes(act, px, py, q_input, rule) == target
        same = got == at_lo
        lo = np.where(same, t, lo)
        hi = np.where(same, hi, t)
    for (name, _, k), t in zip(jobs, 0.5 * (lo + hi)):
        out[name][edges[k]] = float(t)
    return out


def _segments(cross: dict[tuple[str, int, int], float], nw: int, nb: int) -> list[Array]:
    """The boundary inside each cell, in index coordinates: segments between its crossings."""
    cells: dict[tuple[int, int], list[tuple[float, float]]] = {}
    for (kind, i, j), t in cross.items():
        p = (i + t, float(j)) if kind == "h" else (float(i), j + t)
        if kind == "h":
            owners = [(i, j - 1), (i, j)]
        else:
            owners = [(i - 1, j), (i, j)]
        for c in owners:
            if 0 <= c[0] < nw - 1 and 0 <= c[1] < nb - 1:
                cells.setdefault(c, []).append(p)
    segs = []
    for pts in cells.values():
        if len(pts) == 2:
            segs.append(np.array(pts))
        elif len(pts) == 4:  # a saddle: pair the crossings the short way
            a = np.array(pts)
            pairings = [((0, 1), (2, 3)), ((0, 2), (1, 3)), ((0, 3), (1, 2))]
            best = min(pairings, key=lambda pr: sum(np.hypot(*(a[p] - a[q])) for p, q in pr))
            segs += [a[list(pr)] for pr in best]
        elif len(pts) == 1:  # a boundary leaving through a corner cell of the grid's edge
            segs.append(np.array([pts[0], pts[0]]))
    return segs


def _signed_distance(inside: Array, segs: list[Array]) -> Array:
    """Distance (cells) from each node to the nearest segment, + inside, - outside."""
    nw, nb = inside.shape
    dist = np.full(inside.shape, _FAR)
    gi, gj = np.meshgrid(np.arange(nw), np.arange(nb), indexing="ij")
    for s in segs:
        i0 = max(int(np.floor(s[:, 0].min())) - 2, 0)
        i1 = min(int(np.ceil(s[:, 0].max())) + 3, nw)
        j0 = max(int(np.floor(s[:, 1].min())) - 2, 0)
        j1 = min(int(np.ceil(s[:, 1].max())) + 3, nb)
        px, py = gi[i0:i1, j0:j1], gj[i0:i1, j0:j1]
        a, b = s[0], s[1]
        d = b - a
        L2 = float(d @ d)
        if L2 > 0:
            t = np.clip(((px - a[0]) * d[0] + (py - a[1]) * d[1]) / L2, 0.0, 1.0)
        else:
            t = np.zeros(px.shape)
        dd = np.hypot(px - (a[0] + t * d[0]), py - (a[1] + t * d[1]))
        np.minimum(dist[i0:i1, j0:j1], dd, out=dist[i0:i1, j0:j1])
    return np.where(inside, dist, -dist)


def locate_regions(act: Activation, sw: Array, sb: Array, phase: Array, q_input: float,
                   rule: QuadratureRule, steps: int = BISECTION_STEPS) -> Regions:
    """Signed-distance fields of the ordered and unbounded regions (see the module notes).

    Parameters
    ----------
    act : Activation
    sw, sb : ndarray
        The grid's axes (n_w,), (n_b,).
    phase : ndarray of str (n_w, n_b)
        The sweep's phases at the nodes.
    q_input : float
    rule : QuadratureRule
    steps : int
        Halvings of each grid edge crossed by a boundary.
    """
    classes = classes_of_phases(np.asarray(phase))
    nw, nb = classes.shape
    cross = _crossings(act, np.asarray(sw, dtype=float), np.asarray(sb, dtype=float), classes,
                       q_input, rule, steps)
    ordered = _signed_distance(classes == ORDERED, _segments(cross["ordered"], nw, nb))
    u_segs = _segments(cross["unbounded"], nw, nb)
    unbounded = _signed_distance(classes == UNBOUNDED, u_segs)
    # a chaotic strip between an ordered and an unbounded end of one edge
    between = any(abs(cross["ordered"].get(e, t) - t) > 0.02 for e, t in cross["unbounded"].items()
                  if e in cross["ordered"])
    swa, sba = np.asarray(sw, dtype=float), np.asarray(sb, dtype=float)
    boundary = []
    for s in u_segs:
        x = np.interp(s[:, 0], np.arange(nw), swa)
        y = np.interp(s[:, 1], np.arange(nb), sba)
        boundary.append(np.column_stack([x, y]))
    return Regions(ordered=ordered, unbounded=unbounded, classes=classes,
                   chaotic_between=bool(between), unbounded_boundary=boundary)
