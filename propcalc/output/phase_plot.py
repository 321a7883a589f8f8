"""The phase diagram: ordered, chaotic and unbounded regions over (sigma_w2, sigma_b2).

Regions are filled up to boundaries located by bisection
(:mod:`propcalc.output.phase_regions`), not interpolated between grid nodes;
the edge-of-chaos line is drawn from its parametrisation by q* (Poole et al.
2016; Schoenholz et al. 2017), in three styles: solid where its fixed point
is the one the variance reaches from ``q_input`` (there it is the border
between ordered and chaotic), dashed where that fixed point attracts but the
flow from ``q_input`` goes elsewhere, dotted where it repels (the variance
never settles there). Contours of xi_c and of the trainable depth 6 xi_c (an
empirical rule of Schoenholz et al. 2017) are labelled where the labels do not
overlap; the legend lists only what is drawn.
"""

from __future__ import annotations

from collections.abc import Sequence
from concurrent.futures import Executor
from typing import Any

import numpy as np
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch

from ..activations.base import Activation
from ..errors import InvalidParameterError, check_int
from ..meanfield.edge import edge_of_chaos_line_arrays
from ..meanfield.maps import variance_map_slope
from ..meanfield.sweep import SweepResult, sweep
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..vocabulary import Phase
from .figure_tools import (CHAOTIC, DEPTH, EDGE, ORDERED, UNBOUNDED, USER, XI, PointLike,
                           axis_points, check_range, finish, fit_title, fmt, grid_shape,
                           legend_below, mark_user, new_figure, place_labels, resolve_point, wide,
                           wrap, xi_c_words)
from .phase_regions import CHAOTIC as CHAOTIC_CLASS
from .phase_regions import locate_regions, on_reached_edge

__all__ = ["plot_phase_diagram", "edge_line_parts"]

#: A piece of the line shorter than this fraction of the axes is not drawn (a speck at a
#: corner, where the line's q* -> 0 and its stability is decided by rounding).
_SPECK = 0.01

def edge_line_parts(act: Activation, q_input: float, rule: QuadratureRule
                    ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """The edge-of-chaos line (sigma_b2 >= 0) split by what the variance does at its q*.

    Returns
    -------
    dict
        ``"reached"``: the q* of the line attracts and the flow from q_input
        reaches it; ``"other_basin"``: it attracts, the flow goes elsewhere;
        ``"repelling"``: chi_q = V'(q*) > 1. Each a pair (sigma_w2, sigma_b2)
        with NaN between pieces, ordered by q*.
    """
    empty = {k: (np.zeros(0), np.zeros(0)) for k in ("reached", "other_basin", "repelling")}
    if act.has_jumps:
        return empty
    q = np.geomspace(1e-4, 1e4, 801)
    sw, sb = edge_of_chaos_line_arrays(act, q, rule)
    ok = np.isfinite(sw) & np.isfinite(sb) & (sb >= -1e-12 * q)
    if not ok.any():
        return empty
    q, sw, sb = q[ok], sw[ok], np.maximum(sb[ok], 0.0)
    # chi_q = V'(q*) by Stein's identity (Poole et al. 2016, eq. 3 differentiated)
    chi_q = sw * np.asarray(variance_map_slope(act, q, 1.0, rule))
    reached = on_reached_edge(act, sw, sb, q_input, rule)
    kinds = np.where(reached, "reached", np.where(chi_q < 1.0, "other_basin", "repelling"))
    out = {}
    for name in empty:
        mine = kinds == name
        # keep the neighbours of each piece so that the pieces join up
        show = mine | np.concatenate([[False], mine[:-1]]) | np.concatenate([mine[1:], [False]])
        out[name] = (np.where(show, sw, np.nan), np.where(show, sb, np.nan)) if mine.any() \
            else (np.zeros(0), np.zeros(0))
    return out


def plot_phase_diagram(act: Activation, point: PointLike = None, *,
                       sigma_w2_range: tuple[float, float] | None = None,
                       sigma_b2_range: tuple[float, float] | None = None,
                       n_grid: int | tuple[int, int] = (81, 61), q_input: float = 1.0,
                       xi_c_levels: Sequence[float] = (1.0, 2.0, 5.0, 10.0, 30.0),
                       depth_levels: Sequence[float] = (100.0, 500.0),
                       depth: int | None = None, result: SweepResult | None = None,
                       executor: Executor | None = None, progress: bool | None = False,
                       chunk_size: int | None = None,
                       rule: QuadratureRule = DEFAULT_RULE) -> Figure:
    """Ordered and chaotic phases over (sigma_w2, sigma_b2), with depth-scale contours.

    Parameters
    ----------
    act : Activation
    point : Propagation, InitPlan, CriticalPoint or (sigma_w2, sigma_b2), optional
        The user's point, drawn as a star and named in the legend.
    sigma_w2_range, sigma_b2_range : (float, float), optional
        Axes ranges; by default (0.1, 4) and (0, 0.5), widened to include
        the user's point.
    n_grid : int or (int, int)
        Grid points along sigma_w2 and sigma_b2 (default 81 x 61, about 2 s for
        tanh): about 0.2 ms per point, more for chaotic points whose c* is
        close to 1 (2-D integrals, about 10 ms each); pass ``executor`` for
        big grids. The region boundaries are then located between the
        nodes by bisection (6 halvings of each grid edge a boundary crosses).
    q_input : float
        Mean squared input coordinate.
    xi_c_levels : sequence of float
        Contours of the correlation depth scale xi_c (solid).
    depth_levels : sequence of float
        Contours of the trainable depth 6 xi_c (dashed; Schoenholz et al.
        2017, an empirical rule).
    depth : int, optional
        The user's depth: its trainable-depth contour is drawn in bold.
    result : SweepResult, optional
        A precomputed :func:`propcalc.sweep.sweep` over this activation (its
        axes are used, the ranges ignored).
    executor, progress, chunk_size
        Passed to :func:`propcalc.sweep.sweep`.
    rule : QuadratureRule

    Returns
    -------
    matplotlib.figure.Figure
    """
    prop = resolve_point(act, point, q_input, rule)
    if result is None:
        sw_lo, sw_hi = (0.1, 4.0) if sigma_w2_range is None else check_range(
            "sigma_w2_range", sigma_w2_range, True)
        sb_lo, sb_hi = (0.0, 0.5) if sigma_b2_range is None else check_range(
            "sigma_b2_range", sigma_b2_range, False)
        if prop is not None:
            if sigma_w2_range is None:
                sw_hi = max(sw_hi, 1.15 * prop.sigma_w2)
            if sigma_b2_range is None:
                sb_hi = max(sb_hi, 1.15 * prop.sigma_b2)
        nw, nb = grid_shape(n_grid)
        result = sweep(act, axis_points(sw_lo, sw_hi, nw), np.linspace(sb_lo, sb_hi, nb),
                       q_input=q_input, executor=executor, progress=progress, rule=rule,
                       chunk_size=chunk_size)
    if act.label not in result.activations:
        raise InvalidParameterError("result", f"a sweep over {act.label}", list(result.activations))
    a = result.activations.index(act.label)
    sw, sb = np.asarray(result.sigma_w2), np.asarray(result.sigma_b2)
    if sw.size < 2 or sb.size < 2:
        raise InvalidParameterError("result", "a sweep with at least 2 values on each axis",
                                    list(result.shape))
    xi_c = result.xi_c[a].T  # (n_b, n_w) for contouring over (x = sigma_w2, y = sigma_b2)
    regions = locate_regions(act, sw, sb, result.phase[a], result.q_input, rule)

    fig = new_figure()
    ax = fig.add_subplot()
    if wide(float(sw[0]), float(sw[-1])) and np.allclose(
            sw, np.geomspace(float(sw[0]), float(sw[-1]), sw.size), rtol=1e-9):
        ax.set_xscale("log")  # a geometric axis (a wide window) drawn evenly
    ax.set_xlim(float(sw[0]), float(sw[-1]))
    ax.set_ylim(float(sb[0]), float(sb[-1]))
    handles = _regions(ax, sw, sb, regions, result.phase[a])
    contours = _contours(ax, sw, sb, xi_c, xi_c_levels, depth_levels, depth, handles)
    handles += _edge(ax, act, result.q_input, rule)

    avoid = []
    if prop is not None:
        label = wrap(f"your point ({fmt(prop.sigma_w2)}, {fmt(prop.sigma_b2)}): {prop.phase}, "
                     f"{xi_c_words(prop)}", 48)
        (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
        if x0 <= prop.sigma_w2 <= x1 and y0 <= prop.sigma_b2 <= y1:
            mark_user(ax, prop.sigma_w2, prop.sigma_b2, label)
        else:
            label += "\n(outside this window)"
        handles.append(Line2D([], [], linestyle="none", marker="*", markersize=13,
                              color=USER, markeredgecolor="black", label=label))
        avoid.append((prop.sigma_w2, prop.sigma_b2))
    ax.set_xlabel("sigma_w2  (weight variance x fan-in)")
    ax.set_ylabel("sigma_b2  (bias variance)")
    fit_title(ax, fig, f"Phase diagram of {act.label}",
              f"(mean field, q_input = {fmt(result.q_input)})")
    legend_below(fig, handles)
    fig.draw_without_rendering()  # the axes' final place, for the labels
    place_labels(ax, contours, avoid)
    return finish(fig)


def _regions(ax: Any, sw: np.ndarray, sb: np.ndarray, regions: Any, phase: np.ndarray
             ) -> list[Any]:
    """Fill the regions up to their located boundaries; legend entries of those visible."""
    classes = regions.classes
    has_ordered = bool((regions.ordered > 0).any())
    has_unbounded = bool((regions.unbounded > 0).any())
    has_chaotic = bool(np.any((classes == CHAOTIC_CLASS) & (phase == Phase.CHAOTIC.value))) \
        or regions.chaotic_between
    handles: list[Any] = []
    # the background is the chaotic colour when chaos shows, else the ordered one
    ax.set_facecolor(CHAOTIC if has_chaotic else ORDERED)
    if has_ordered:
        if has_chaotic:
            ax.contourf(sw, sb, regions.ordered.T, levels=[0.0, float(regions.ordered.max()) + 1],
                        colors=[ORDERED], zorder=0)
        handles.append(Patch(facecolor=ORDERED, label="ordered (chi_1 < 1)"))
    if has_chaotic:
        handles.append(Patch(facecolor=CHAOTIC, label="chaotic (chi_1 > 1)"))
    if has_unbounded:
        ax.contourf(sw, sb, regions.unbounded.T,
                    levels=[0.0, float(regions.unbounded.max()) + 1], colors=[UNBOUNDED],
                    hatches=["//"], zorder=1)
        for seg in regions.unbounded_boundary:
            ax.plot(seg[:, 0], seg[:, 1], color="0.35", linewidth=0.7, zorder=2)
        handles.append(Patch(facecolor=UNBOUNDED, hatch="//", edgecolor="0.35",
                             label="variance grows without bound"))
    return handles


def _contours(ax: Any, sw: np.ndarray, sb: np.ndarray, xi_c: np.ndarray,
              xi_c_levels: Sequence[float], depth_levels: Sequence[float], depth: int | None,
              handles: list[Any]) -> list[tuple[Any, Any, float]]:
    """Contours of xi_c and 6 xi_c (labels are placed once the layout is known).

    The lines are drawn as contours of the rate 1 / xi_c = -ln C'(c*) (Schoenholz
    et al. 2017, eq. 9), which goes to 0 smoothly at the edge of chaos, where
    xi_c itself diverges: interpolating xi_c between grid nodes drew diamonds
    around the nodes beside the edge; the rate interpolates like a distance.
    """
    with np.errstate(divide="ignore"):
        rate = np.where(np.isinf(xi_c), 0.0, 1.0 / np.where(xi_c > 0, xi_c, np.nan))
    rate_plot = np.ma.masked_invalid(rate)
    values = rate_plot.filled(np.nan)
    out: list[tuple[Any, Any, float]] = []

    def draw(xi_levels: Sequence[float], factor: float, **kw: Any) -> tuple[Any, list[float]]:
        # xi = v  <=>  rate = factor / v  (factor 6 for the trainable depth 6 xi_c = L)
        shown = [v for v in sorted(set(float(x) for x in xi_levels)) if v > 0
                 and _crosses(factor / v, values)]
        if not shown:
            return None, []
        cs = ax.contour(sw, sb, rate_plot, levels=sorted(factor / v for v in shown), **kw)
        _drop_specks(cs, sw, sb)
        return cs, shown

    if depth is not None:
        d = check_int("depth", depth, 1)
        cs, shown = draw([float(d)], 6.0, colors=DEPTH, linewidths=2.2, zorder=4)
        if shown:
            out.append((cs, lambda u: f"L={6.0 / u:.4g}", 9.0))
            handles.append(Line2D([], [], color=DEPTH, linewidth=2.2,
                                  label=f"6 xi_c = your depth {d}"))
    cs, shown = draw(xi_c_levels, 1.0, colors=XI, linewidths=0.8, zorder=3)
    if shown:
        out.append((cs, lambda u: f"{1.0 / u:.4g}", 8.0))
        handles.append(Line2D([], [], color=XI, linewidth=0.8,
                              label="xi_c = " + ", ".join(f"{v:g}" for v in shown)))
    else:
        finite = xi_c[np.isfinite(xi_c)]
        if finite.size:
            handles.append(Line2D([], [], linestyle="none",
                                  label=f"xi_c from {fmt(float(finite.min()), 2)} to "
                                        f"{fmt(float(finite.max()), 2)} here: no level crossed"))
    cs, shown = draw([v for v in depth_levels if v != depth], 6.0, colors=DEPTH,
                     linewidths=1.1, linestyles="dashed", zorder=3)
    if shown:
        out.append((cs, lambda u: f"L={6.0 / u:.4g}", 8.0))
        handles.append(Line2D([], [], color=DEPTH, linewidth=1.1, linestyle="dashed",
                              label="trainable depth 6 xi_c = " + ", ".join(f"{v:g}" for v in shown)
                              + " (empirical)"))
    return out


def _crosses(level: float, values: np.ndarray) -> bool:
    """Whether the data cross a contour level (matplotlib warns about the others)."""
    finite = values[np.isfinite(values)]
    return bool(finite.size) and float(finite.min()) < level < float(finite.max())


def _drop_specks(cs: Any, sw: np.ndarray, sb: np.ndarray) -> None:
    """Remove closed contour loops within two grid cells (one node's value, not a shape).

    Near the edge of chaos xi_c diverges faster than the grid resolves: a node
    beside the edge holds a large xi_c between nodes with small ones, and the
    contours of every level between draw a diamond around it. A loop that
    small says nothing the grid can back, so it is not drawn.
    """
    from matplotlib.path import Path

    iw, ib = np.arange(sw.size, dtype=float), np.arange(sb.size, dtype=float)
    paths = []
    for path in cs.get_paths():
        keep = []
        verts, codes = path.vertices, path.codes
        if codes is None:
            codes = np.full(len(verts), Path.LINETO, dtype=np.uint8)
            if len(verts):
                codes[0] = Path.MOVETO
        starts = np.flatnonzero(codes == Path.MOVETO)
        # split at each MOVETO, exactly (to_polygons would simplify in data units)
        pieces = zip(np.split(verts, starts[1:]), np.split(codes, starts[1:])) \
            if starts.size else []
        for seg, kinds in pieces:
            if len(seg) < 2:
                continue
            closed = bool(kinds[-1] == Path.CLOSEPOLY)
            if closed:  # the vertex of CLOSEPOLY is ignored by matplotlib: close it explicitly
                seg = seg.copy()
                seg[-1] = seg[0]
            closed = closed or bool(np.allclose(seg[0], seg[-1]))
            gx, gy = np.interp(seg[:, 0], sw, iw), np.interp(seg[:, 1], sb, ib)
            if closed and np.ptp(gx) <= 2.0 and np.ptp(gy) <= 2.0:
                continue
            keep.append(seg)
        if keep:
            verts = np.concatenate(keep)
            codes = np.concatenate([[Path.MOVETO] + [Path.LINETO] * (len(k) - 1) for k in keep])
            paths.append(Path(verts, codes.astype(np.uint8)))
        else:
            paths.append(Path(np.zeros((0, 2))))
    cs.set_paths(paths)


def _edge(ax: Any, act: Activation, q_input: float, rule: QuadratureRule) -> list[Any]:
    """The edge-of-chaos line in its three styles (or its one point); legend entries."""
    parts = edge_line_parts(act, q_input, rule)
    handles: list[Any] = []
    e_sw, e_sb = parts["reached"]
    fin = np.isfinite(e_sw)
    whole = np.concatenate([v[0][np.isfinite(v[0])] for v in parts.values()])
    whole_b = np.concatenate([v[1][np.isfinite(v[1])] for v in parts.values()])
    (x0, x1), (y0, y1) = ax.get_xlim(), ax.get_ylim()
    if whole.size and np.ptp(whole) < 1e-9 * max(1.0, abs(whole[0])) and np.ptp(whole_b) < 1e-9:
        inside = x0 <= whole[0] <= x1 and y0 <= whole_b[0] <= y1
        if inside:
            ax.plot([whole[0]], [whole_b[0]], linestyle="none", marker="o", markersize=8,
                    color=EDGE, zorder=6, clip_on=False)
        handles.append(Line2D([], [], linestyle="none", marker="o" if inside else None,
                              color=EDGE,
                              label=f"edge of chaos: one point ({fmt(whole[0])}, "
                                    f"{fmt(whole_b[0])})" + ("" if inside else ", outside "
                                                             "this window")))
        return handles
    if act.has_jumps:
        handles.append(Line2D([], [], linestyle="none", label="no edge of chaos: chi_1 is "
                              "infinite for an activation with a jump"))
        return handles
    shown = [(x >= x0) & (x <= x1) & (y >= y0) & (y <= y1) for x, y in parts.values()]
    if whole.size and not any(np.any(m) for m in shown):
        # the nearest point of the line, in units of the window
        d = np.hypot((np.clip(whole, x0, x1) - whole) / (x1 - x0),
                     (np.clip(whole_b, y0, y1) - whole_b) / (y1 - y0))
        k = int(np.argmin(d))
        handles.append(Line2D([], [], linestyle="none",
                              label=f"edge of chaos outside this window (nearest: "
                                    f"sigma_w2 = {fmt(whole[k])}, sigma_b2 = {fmt(whole_b[k])})"))
        return handles
    if not whole.size:
        handles.append(Line2D([], [], linestyle="none",
                              label="no edge of chaos with sigma_b2 >= 0"))
        return handles

    def visible(x: np.ndarray, y: np.ndarray) -> bool:
        """Whether the piece spans more than _SPECK of the axes inside the window."""
        ok = np.isfinite(x) & (x >= x0) & (x <= x1) & (y >= y0) & (y <= y1)
        if not ok.any():
            return False
        return bool(max(np.ptp(x[ok]) / (x1 - x0), np.ptp(y[ok]) / (y1 - y0)) > _SPECK)

    if fin.any():
        ax.plot(e_sw, e_sb, color=EDGE, linewidth=2.0, zorder=6)
        if visible(e_sw, e_sb):
            handles.append(Line2D([], [], color=EDGE, linewidth=2.0,
                                  label="edge of chaos (chi_1 = 1 at the q* reached)"))
    x, y = parts["other_basin"]
    if x.size and visible(x, y):
        ax.plot(x, y, color=EDGE, linewidth=1.3, linestyle="--", zorder=6)
        handles.append(Line2D([], [], color=EDGE, linewidth=1.3, linestyle="--",
                              label="chi_1 = 1 at a q* the flow does not reach"))
    x, y = parts["repelling"]
    if x.size and visible(x, y):
        ax.plot(x, y, color="0.25", linewidth=1.3, linestyle=":", zorder=6)
        handles.append(Line2D([], [], color="0.25", linewidth=1.3, linestyle=":",
                              label="chi_1 = 1 at a repelling q* (never reached)"))
    return handles
