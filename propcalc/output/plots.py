"""Figures of the mean-field quantities (the ``plot`` extra: matplotlib).

Every function takes engine objects (an :class:`~propcalc.Activation` and a
point given as a :class:`~propcalc.Propagation`, an
:class:`~propcalc.InitPlan`, a :class:`~propcalc.CriticalPoint` or a
``(sigma_w2, sigma_b2)`` pair) and returns a :class:`matplotlib.figure.Figure`
built directly, without pyplot's global state, so the functions are safe in
a server thread. :func:`save_figure` writes PNG or SVG bytes that are the
same for the same figure (fixed SVG hash salt, no date or software
metadata).

* :func:`plot_phase_diagram`: ordered and chaotic regions over
  (sigma_w2, sigma_b2), the edge-of-chaos line, contours of xi_c and of the
  trainable depth 6 xi_c (an empirical rule of Schoenholz et al. 2017), the
  user's point;
* :func:`plot_variance_map`: V(q) against q with the identity, its fixed
  points and the layer-to-layer iteration (Poole et al. 2016, eq. 3);
* :func:`plot_correlation_map`: C(c) with its fixed points and the slope
  chi_1 at c = 1 (Poole et al. 2016, eq. 5; Schoenholz et al. 2017);
* :func:`plot_depth_scales`: xi_q and xi_c against sigma_w2 at a fixed
  sigma_b2, the edge of chaos marked (Schoenholz et al. 2017, eqs. 6 and 9).
"""

from __future__ import annotations

import io
import math
import os
import threading
from collections.abc import Sequence
from concurrent.futures import Executor
from typing import IO, Any

import numpy as np

try:
    import matplotlib
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
except ImportError as exc:  # pragma: no cover - exercised only without the extra
    raise ImportError("propcalc.plots needs matplotlib: pip install 'propcalc[plot]'") from exc

from ..activations.base import Activation
from ..meanfield.edge import CriticalPoint, edge_of_chaos_at_bias, edge_of_chaos_line_arrays
from ..meanfield.report import Propagation, propagation
from ..errors import InvalidParameterError, check_int, check_nonnegative, check_positive
from ..meanfield.maps import correlation_map, variance_map
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..init.plan import InitPlan
from ..meanfield.sweep import SweepResult, sweep

__all__ = [
    "FORMATS",
    "USER_POINT_GID",
    "plot_phase_diagram",
    "plot_variance_map",
    "plot_correlation_map",
    "plot_depth_scales",
    "save_figure",
]

#: Formats :func:`save_figure` writes.
FORMATS = ("png", "svg")
#: The ``gid`` of the user's marker (it becomes the element id in SVG output).
USER_POINT_GID = "user-point"

PointLike = Propagation | InitPlan | CriticalPoint | Sequence[float] | None

_ORDERED = "#c9dcf0"
_CHAOTIC = "#f6d2c4"
_UNBOUNDED = "#d9d9d9"
_EDGE = "#111111"
_XI = "#3d3d3d"
_DEPTH = "#7b2d8e"
_USER = "#e8a000"
_SIZE = (7.2, 5.2)


# -------------------------------------------------------------------------------------------
# helpers
# -------------------------------------------------------------------------------------------
def _resolve_point(act: Activation, point: PointLike, q_input: float,
                   rule: QuadratureRule) -> Propagation | None:
    """The propagation report at the user's point (None when no point is given)."""
    if point is None:
        return None
    if isinstance(point, InitPlan):
        prop = point.propagation
    elif isinstance(point, Propagation):
        prop = point
    elif isinstance(point, CriticalPoint):
        if not point.valid or point.sigma_w2 is None or point.sigma_b2 is None:
            raise InvalidParameterError("point", "a valid critical point", point.message)
        if point.activation != act.label:
            raise InvalidParameterError("point", f"a result for {act.label}", point.activation)
        return propagation(act, point.sigma_w2, point.sigma_b2, q_input=q_input, rule=rule)
    else:
        try:
            sw, sb = point  # type: ignore[misc]
        except (TypeError, ValueError):
            raise InvalidParameterError(
                "point", "a Propagation, InitPlan, CriticalPoint or (sigma_w2, sigma_b2) pair",
                point) from None
        return propagation(act, check_positive("point.sigma_w2", sw),
                           check_nonnegative("point.sigma_b2", sb), q_input=q_input, rule=rule)
    if prop.activation != act.label:
        raise InvalidParameterError("point", f"a result for {act.label}", prop.activation)
    return prop


def _fmt(v: float | None, digits: int = 4) -> str:
    if v is None:
        return "-"
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    if abs(v) < 1e-12:  # rounding residue of an exact zero (e.g. sigma_b2 on ReLU's edge)
        return "0"
    return f"{v:.{digits}g}"


def _new_figure(size: tuple[float, float] = _SIZE) -> Figure:
    return Figure(figsize=size, dpi=100, layout="constrained")


def _finish(fig: Figure) -> Figure:
    """Run the constrained layout once and freeze it.

    The layout solver starts from the current positions, so a figure drawn
    twice (PNG, then SVG) would shift by a fraction of a pixel; fixing the
    layout when the figure is made keeps the bytes a function of the call.
    Re-enable it with ``fig.set_layout_engine("constrained")`` after editing.
    """
    fig.draw_without_rendering()
    fig.set_layout_engine("none")
    return fig


def _levels_within(levels: Sequence[float], values: np.ndarray) -> list[float]:
    """The contour levels that the data cross (matplotlib warns about the others)."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return []
    lo, hi = float(finite.min()), float(finite.max())
    return [float(v) for v in levels if lo < v < hi]


def _range(name: str, value: Any, positive: bool) -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise InvalidParameterError(name, "a pair (low, high)", value) from None
    lo = check_positive(f"{name}[0]", lo) if positive else check_nonnegative(f"{name}[0]", lo)
    hi = check_positive(f"{name}[1]", hi)
    if hi <= lo:
        raise InvalidParameterError(name, "a pair (low, high) with low < high", value)
    return lo, hi


def _grid_shape(n_grid: Any) -> tuple[int, int]:
    if isinstance(n_grid, (int, np.integer)) and not isinstance(n_grid, bool):
        n = check_int("n_grid", n_grid, 3, 2000)
        return n, n
    try:
        a, b = n_grid
    except (TypeError, ValueError):
        raise InvalidParameterError("n_grid", "an int or a pair of ints", n_grid) from None
    return check_int("n_grid[0]", a, 3, 2000), check_int("n_grid[1]", b, 3, 2000)


def _edge_line(act: Activation, rule: QuadratureRule) -> tuple[np.ndarray, np.ndarray]:
    """Points of the edge-of-chaos line with sigma_b2 >= 0, ordered by q*."""
    if act.has_jumps:
        return np.zeros(0), np.zeros(0)
    q = np.geomspace(1e-4, 1e4, 801)
    sw, sb = edge_of_chaos_line_arrays(act, q, rule)
    ok = np.isfinite(sw) & np.isfinite(sb) & (sb >= -1e-12 * q)
    return sw[ok], np.maximum(sb[ok], 0.0)


def _mark_user(ax: Any, x: float, y: float, label: str) -> None:
    ax.plot([x], [y], linestyle="none", marker="*", markersize=17, color=_USER,
            markeredgecolor="black", markeredgewidth=1.0, zorder=10, label=label,
            gid=USER_POINT_GID, clip_on=False)


# -------------------------------------------------------------------------------------------
# the phase diagram
# -------------------------------------------------------------------------------------------
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
        big grids.
    q_input : float
        Mean squared input coordinate.
    xi_c_levels : sequence of float
        Contours of the correlation depth scale xi_c (solid, labelled).
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
    prop = _resolve_point(act, point, q_input, rule)
    if result is None:
        sw_lo, sw_hi = (0.1, 4.0) if sigma_w2_range is None else _range("sigma_w2_range",
                                                                          sigma_w2_range, True)
        sb_lo, sb_hi = (0.0, 0.5) if sigma_b2_range is None else _range("sigma_b2_range",
                                                                         sigma_b2_range, False)
        if prop is not None:
            if sigma_w2_range is None:
                sw_hi = max(sw_hi, 1.15 * prop.sigma_w2)
            if sigma_b2_range is None:
                sb_hi = max(sb_hi, 1.15 * prop.sigma_b2)
        nw, nb = _grid_shape(n_grid)
        result = sweep(act, np.linspace(sw_lo, sw_hi, nw), np.linspace(sb_lo, sb_hi, nb),
                       q_input=q_input, executor=executor, progress=progress, rule=rule,
                       chunk_size=chunk_size)
    if act.label not in result.activations:
        raise InvalidParameterError("result", f"a sweep over {act.label}", list(result.activations))
    a = result.activations.index(act.label)
    sw, sb = np.asarray(result.sigma_w2), np.asarray(result.sigma_b2)
    if sw.size < 2 or sb.size < 2:
        raise InvalidParameterError("result", "a sweep with at least 2 values on each axis",
                                    list(result.shape))
    chi1 = result.chi_1[a].T  # (n_b, n_w) for contouring over (x = sigma_w2, y = sigma_b2)
    xi_c = result.xi_c[a].T
    unbounded = (result.phase[a].T == "unbounded variance")

    fig = _new_figure()
    ax = fig.add_subplot()
    with np.errstate(divide="ignore"):
        logchi = np.log(np.where(np.isfinite(chi1), chi1, np.nan))
    logchi = np.where(np.isnan(logchi), 50.0, np.clip(logchi, -50.0, 50.0))
    lo, hi = min(float(logchi.min()), -1.0) - 1.0, max(float(logchi.max()), 1.0) + 1.0
    ax.contourf(sw, sb, logchi, levels=[lo, 0.0, hi], colors=[_ORDERED, _CHAOTIC], zorder=0)
    handles: list[Any] = [Patch(facecolor=_ORDERED, label="ordered (chi_1 < 1)"),
                          Patch(facecolor=_CHAOTIC, label="chaotic (chi_1 > 1)")]
    if unbounded.any():
        ax.contourf(sw, sb, unbounded.astype(float), levels=[0.5, 1.5], colors=[_UNBOUNDED],
                    hatches=["//"], zorder=1)
        handles.append(Patch(facecolor=_UNBOUNDED, hatch="//",
                             label="variance grows without bound"))

    # xi_c contours (inf on the edge: drawn as a large number, NaN where undefined)
    xi_plot = np.ma.masked_invalid(np.where(np.isinf(xi_c), 1e12, xi_c))
    levels = _levels_within(sorted(set(xi_c_levels)), np.asarray(xi_plot.filled(np.nan)))
    if levels:
        cs = ax.contour(sw, sb, xi_plot, levels=levels, colors=_XI, linewidths=0.8, zorder=3)
        ax.clabel(cs, fmt=lambda v: f"{v:g}", fontsize=8, inline=True)
        handles.append(Line2D([], [], color=_XI, linewidth=0.8,
                              label="xi_c contours (labelled)"))
    depth_vals = sorted(set(depth_levels))
    td = np.asarray(6.0 * xi_plot.filled(np.nan))
    levels = _levels_within([v for v in depth_vals if v != depth], td)
    if levels:
        cs = ax.contour(sw, sb, 6.0 * xi_plot, levels=levels, colors=_DEPTH, linewidths=1.1,
                        linestyles="dashed", zorder=3)
        ax.clabel(cs, fmt=lambda v: f"L={v:g}", fontsize=8, inline=True)
        handles.append(Line2D([], [], color=_DEPTH, linewidth=1.1, linestyle="dashed",
                              label="trainable depth 6 xi_c (empirical)"))
    if depth is not None:
        d = check_int("depth", depth, 1)
        levels = _levels_within([float(d)], td)
        if levels:
            cs = ax.contour(sw, sb, 6.0 * xi_plot, levels=levels, colors=_DEPTH, linewidths=2.2,
                            zorder=4)
            ax.clabel(cs, fmt=lambda v: f"L={v:g}", fontsize=9, inline=True)
            handles.append(Line2D([], [], color=_DEPTH, linewidth=2.2,
                                  label=f"6 xi_c = your depth {d}"))

    e_sw, e_sb = _edge_line(act, rule)
    if e_sw.size:
        if np.ptp(e_sw) < 1e-9 * max(1.0, abs(e_sw[0])) and np.ptp(e_sb) < 1e-9:
            ax.plot([e_sw[0]], [e_sb[0]], linestyle="none", marker="o", markersize=8,
                    color=_EDGE, zorder=6, clip_on=False)
            handles.append(Line2D([], [], linestyle="none", marker="o", color=_EDGE,
                                  label=f"edge of chaos: one point ({_fmt(e_sw[0])}, "
                                        f"{_fmt(e_sb[0])})"))
        else:
            ax.plot(e_sw, e_sb, color=_EDGE, linewidth=2.0, zorder=6)
            handles.append(Line2D([], [], color=_EDGE, linewidth=2.0,
                                  label="edge of chaos (chi_1 = 1)"))

    if prop is not None:
        label = (f"your point ({_fmt(prop.sigma_w2)}, {_fmt(prop.sigma_b2)}): {prop.phase}, "
                 f"xi_c = {_fmt(prop.xi_c, 3)}")
        _mark_user(ax, prop.sigma_w2, prop.sigma_b2, label)
        handles.append(Line2D([], [], linestyle="none", marker="*", markersize=13, color=_USER,
                              markeredgecolor="black", label=label))
    ax.set_xlim(float(sw[0]), float(sw[-1]))
    ax.set_ylim(float(sb[0]), float(sb[-1]))
    ax.set_xlabel("sigma_w2  (weight variance x fan-in)")
    ax.set_ylabel("sigma_b2  (bias variance)")
    ax.set_title(f"Phase diagram of {act.label} (mean field, q_input = {_fmt(result.q_input)})",
                 fontsize=11)
    fig.legend(handles=handles, loc="outside lower center", ncols=2, fontsize=8, frameon=False)
    return _finish(fig)


# -------------------------------------------------------------------------------------------
# the variance map
# -------------------------------------------------------------------------------------------
def plot_variance_map(act: Activation, point: PointLike, *, q_max: float | None = None,
                      n_points: int = 400, iterations: int = 12, q_input: float = 1.0,
                      rule: QuadratureRule = DEFAULT_RULE) -> Figure:
    """V(q) against q, with the identity, the fixed points and the iteration from q_1.

    Parameters
    ----------
    act : Activation
    point : Propagation, InitPlan, CriticalPoint or (sigma_w2, sigma_b2)
    q_max : float, optional
        Right end of the q axis; by default a little beyond the fixed point
        reached and the first-layer variance.
    n_points : int
        Samples of the curve.
    iterations : int
        Layers of the cobweb drawn from the first-layer variance
        ``q_1 = sigma_w2 q_input + sigma_b2`` (0 for none).
    q_input : float
        Used when ``point`` is a pair.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    V(q) = sigma_w2 E[phi(sqrt(q) z)^2] + sigma_b2 (Poole et al. 2016, eq. 3).
    Filled circles attract (|V'(q*)| < 1), open circles repel.
    """
    prop = _resolve_point(act, point, q_input, rule)
    if prop is None:
        raise InvalidParameterError("point", "given (the map depends on sigma_w2 and sigma_b2)",
                                    None)
    n = check_int("n_points", n_points, 10, 100_000)
    n_iter = check_int("iterations", iterations, 0, 1000)
    sw, sb = prop.sigma_w2, prop.sigma_b2
    fps = prop.variance_fixed_points
    q1 = fps.q_start
    if q_max is None:
        scale = [1.0, 1.3 * q1, 2.0 * sb]
        if prop.q_star is not None:
            scale.append(1.8 * prop.q_star)
        else:
            scale.append(4.0 * q1)
        top = max(scale)
    else:
        top = check_positive("q_max", q_max)
    q = np.linspace(0.0, top, n)
    v = variance_map(act, q, sw, sb, rule)

    fig = _new_figure((6.4, 5.2))
    ax = fig.add_subplot()
    ax.plot(q, q, color="0.55", linestyle="--", linewidth=1.0, label="identity V(q) = q")
    ax.plot(q, v, color="#1f5fa8", linewidth=2.0, label="variance map V(q)")
    if n_iter and q1 <= top:
        xs, ys = [q1], [0.0]
        cur = q1
        for _ in range(n_iter):
            nxt = float(variance_map(act, cur, sw, sb, rule))
            xs += [cur, nxt]
            ys += [nxt, nxt]
            if nxt > top or abs(nxt - cur) <= 1e-9 * max(cur, 1e-300):
                break
            cur = nxt
        ax.plot(xs, ys, color="#d9771e", linewidth=0.9, label="layer-to-layer iteration from q_1")
        ax.plot([q1], [0.0], linestyle="none", marker="|", markersize=14, color="#d9771e",
                clip_on=False)
    shown_stable = shown_unstable = False
    for fp in fps.points:
        if fp.q > top:
            continue
        reached = fps.reached is not None and fp.q == fps.reached.q
        kw: dict[str, Any] = dict(linestyle="none", marker="o", markersize=9 if reached else 7,
                                  markeredgecolor="black", zorder=5, clip_on=False)
        if fp.stable:
            lab = None if shown_stable else "attracting fixed point"
            shown_stable = True
            ax.plot([fp.q], [fp.q], color="black", label=lab, **kw)
        else:
            lab = None if shown_unstable else "repelling fixed point"
            shown_unstable = True
            ax.plot([fp.q], [fp.q], color="white", label=lab, **kw)
    if prop.q_star is not None and prop.q_star <= top:
        _mark_user(ax, prop.q_star, prop.q_star,
                   f"q* = {_fmt(prop.q_star, 5)} reached (chi_q = {_fmt(prop.chi_q)})")
    ax.set_xlim(0.0, top)
    ax.set_ylim(0.0, max(top, float(np.max(v))) * 1.02)
    ax.set_xlabel("q  (pre-activation variance of layer l)")
    ax.set_ylabel("V(q)  (variance of layer l + 1)")
    ax.set_title(f"Variance map of {act.label}: sigma_w2 = {_fmt(sw)}, sigma_b2 = {_fmt(sb)}",
                 fontsize=11)
    ax.legend(loc="upper left", fontsize=8)
    ax.text(0.98, 0.03, _wrap(fps.message, 60), transform=ax.transAxes, ha="right", va="bottom",
            fontsize=7.5, color="0.25",
            bbox=dict(boxstyle="round", facecolor="white", edgecolor="0.8"))
    return _finish(fig)


def _wrap(text: str, width: int) -> str:
    words, lines, cur = text.split(), [], ""
    for w in words:
        if cur and len(cur) + 1 + len(w) > width:
            lines.append(cur)
            cur = w
        else:
            cur = f"{cur} {w}" if cur else w
    if cur:
        lines.append(cur)
    return "\n".join(lines)


# -------------------------------------------------------------------------------------------
# the correlation map
# -------------------------------------------------------------------------------------------
def plot_correlation_map(act: Activation, point: PointLike, *, c_min: float = -1.0,
                         n_points: int = 101, q_input: float = 1.0,
                         rule: QuadratureRule = DEFAULT_RULE) -> Figure:
    """C(c) at the variance fixed point, with the identity, c* and the slope chi_1 at c = 1.

    Parameters
    ----------
    act : Activation
    point : Propagation, InitPlan, CriticalPoint or (sigma_w2, sigma_b2)
    c_min : float
        Left end of the c axis, in [-1, 1).
    n_points : int
        Samples of the curve (each is a 2-D integral).
    q_input : float
        Used when ``point`` is a pair.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    C(c) = (sigma_w2 E[phi(u1) phi(u2)] + sigma_b2) / q* (Poole et al. 2016,
    eq. 5); its slope at c = 1 is chi_1 (Schoenholz et al. 2017, eq. 8): c = 1
    attracts when chi_1 < 1 (ordered), and otherwise a second fixed point
    c* < 1 attracts (chaotic).
    """
    prop = _resolve_point(act, point, q_input, rule)
    if prop is None:
        raise InvalidParameterError("point", "given (the map depends on sigma_w2 and sigma_b2)",
                                    None)
    lo = float(c_min)
    if not (math.isfinite(lo) and -1.0 <= lo < 1.0):
        raise InvalidParameterError("c_min", "in [-1, 1)", c_min)
    n = check_int("n_points", n_points, 5, 10_000)
    sw, sb = prop.sigma_w2, prop.sigma_b2
    fig = _new_figure((6.4, 5.2))
    ax = fig.add_subplot()
    c = np.linspace(lo, 1.0, n)
    ax.plot(c, c, color="0.55", linestyle="--", linewidth=1.0, label="identity C(c) = c")
    title = f"Correlation map of {act.label}: sigma_w2 = {_fmt(sw)}, sigma_b2 = {_fmt(sb)}"
    if prop.q_star is None:
        ax.text(0.5, 0.5, "no finite variance fixed point:\nthe correlation map is not defined "
                "at a fixed q*", transform=ax.transAxes, ha="center", va="center", fontsize=10)
    elif prop.q_star == 0.0:
        ax.plot(c, c, color="#1f5fa8", linewidth=2.0,
                label="C(c) = c (limit q* -> 0: the network acts linearly)")
    else:
        cm = correlation_map(act, c, sw, sb, prop.q_star, rule)
        ax.plot(c, cm, color="#1f5fa8", linewidth=2.0, label=f"C(c) at q* = {_fmt(prop.q_star)}")
        c1 = prop.chi_1
        if math.isfinite(c1):
            dc = 0.25 * (1.0 - lo)
            ax.plot([1.0 - dc, 1.0], [1.0 - c1 * dc, 1.0], color="#c23b22", linewidth=1.2,
                    linestyle=":", label=f"slope at c = 1: chi_1 = {_fmt(c1)}")
    if prop.q_star is not None:
        one_stable = prop.phase in ("ordered", "edge of chaos")
        how = {"ordered": "(attracting)", "edge of chaos": "(marginal: approached polynomially)"}
        ax.plot([1.0], [1.0], linestyle="none", marker="o", markersize=8, markeredgecolor="black",
                color="black" if one_stable else "white", zorder=5, clip_on=False,
                label="c = 1 " + how.get(prop.phase, "(repelling)"))
        if prop.c_star is not None and prop.c_star < 1.0 and prop.c_star >= lo:
            _mark_user(ax, prop.c_star, prop.c_star,
                       f"c* = {_fmt(prop.c_star, 5)} (C'(c*) = {_fmt(prop.chi_c)}, "
                       f"xi_c = {_fmt(prop.xi_c)})")
    ax.set_xlim(lo, 1.0)
    ax.set_ylim(min(lo, -0.05 if lo >= 0 else lo), 1.03)
    ax.set_xlabel("c  (correlation of two inputs at layer l)")
    ax.set_ylabel("C(c)  (correlation at layer l + 1)")
    ax.set_title(title, fontsize=11)
    ax.legend(loc="upper left", fontsize=8)
    ax.text(0.98, 0.03, f"phase: {prop.phase}", transform=ax.transAxes, ha="right", va="bottom",
            fontsize=9, color="0.25",
            bbox=dict(boxstyle="round", facecolor="white", edgecolor="0.8"))
    return _finish(fig)


# -------------------------------------------------------------------------------------------
# depth scales
# -------------------------------------------------------------------------------------------
def plot_depth_scales(act: Activation, point: PointLike = None, *, sigma_b2: float | None = None,
                      sigma_w2_range: tuple[float, float] | None = None, n_points: int = 121,
                      xi_max: float | None = None, depth: int | None = None,
                      q_input: float = 1.0, executor: Executor | None = None,
                      progress: bool | None = False, chunk_size: int | None = None,
                      rule: QuadratureRule = DEFAULT_RULE) -> Figure:
    """xi_q and xi_c against sigma_w2 at a fixed sigma_b2, with the edge of chaos marked.

    Parameters
    ----------
    act : Activation
    point : Propagation, InitPlan, CriticalPoint or (sigma_w2, sigma_b2), optional
        The user's point: fixes sigma_b2 and is marked on the xi_c curve.
    sigma_b2 : float, optional
        The bias variance (default: the point's, else 0).
    sigma_w2_range : (float, float), optional
        Default (0.1, 4), widened to include the point and the edge.
    n_points : int
        Regular samples; 7 more are added on each side of every critical
        sigma_w2 (relative offsets 1e-1 ... 1e-7), where xi_c diverges.
    xi_max : float, optional
        Top of the y axis; xi_c (infinite on the edge) is drawn up to it.
        By default ten times the 90th percentile of the depth scales on the regular
        samples, between 30 and 1e4.
    depth : int, optional
        The user's depth L: the line xi = L / 6 is the trainable-depth rule.
    q_input, executor, progress, chunk_size, rule
        As for :func:`propcalc.sweep.sweep`.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    xi_q = -1 / ln chi_q, xi_c = -1 / ln C'(c*) (Schoenholz et al. 2017,
    eqs. 6 and 9); trainable depth about 6 xi_c (same paper, an empirical
    rule), shown on the right axis.
    """
    prop = _resolve_point(act, point, q_input, rule)
    if sigma_b2 is not None:
        sb = check_nonnegative("sigma_b2", sigma_b2)
    else:
        sb = prop.sigma_b2 if prop is not None else 0.0
    n = check_int("n_points", n_points, 5, 20_000)
    edges = [cp.sigma_w2 for cp in edge_of_chaos_at_bias(act, sb, rule)
             if cp.valid and cp.sigma_w2 is not None]
    if sigma_w2_range is None:
        lo, hi = 0.1, 4.0
        extra = edges + ([prop.sigma_w2] if prop is not None else [])
        if extra:
            hi = max(hi, 1.15 * max(extra))
    else:
        lo, hi = _range("sigma_w2_range", sigma_w2_range, True)
    regular = np.linspace(lo, hi, n)
    offsets = 10.0 ** -np.arange(1.0, 8.0)
    near = [e * (1 + s * offsets) for e in edges for s in (-1.0, 1.0)]
    grid = np.unique(np.concatenate([regular] + near + ([np.array(edges)] if edges else [])))
    grid = grid[(grid >= lo) & (grid <= hi)]
    res = sweep(act, grid, [sb], q_input=q_input, executor=executor, progress=progress, rule=rule,
                chunk_size=chunk_size)
    xi_q, xi_c = res.xi_q[0, :, 0], res.xi_c[0, :, 0]
    unbounded = res.phase[0, :, 0] == "unbounded variance"
    on_regular = np.isin(grid, regular)
    finite = np.concatenate([xi_q[on_regular & np.isfinite(xi_q)],
                             xi_c[on_regular & np.isfinite(xi_c)]])
    if xi_max is None:
        top = float(np.clip(10.0 * np.percentile(finite, 90), 30.0, 1e4)) if finite.size else 100.0
    else:
        top = check_positive("xi_max", xi_max)
    bottom = 0.1
    if finite.size and finite[finite > 0].size:
        bottom = min(bottom, 0.5 * float(finite[finite > 0].min()))
    bottom = max(bottom, 1e-3)

    fig = _new_figure()
    ax = fig.add_subplot()
    clip = 10.0 * top
    ax.plot(grid, np.where(np.isinf(xi_q), clip, xi_q), color="#1f5fa8", linewidth=1.8,
            label="xi_q = -1/ln chi_q  (variance settles)")
    ax.plot(grid, np.where(np.isinf(xi_c), clip, xi_c), color="#c23b22", linewidth=1.8,
            label="xi_c = -1/ln C'(c*)  (correlations settle)")
    if unbounded.any():
        ax.fill_between(grid, bottom, top, where=unbounded, color=_UNBOUNDED, hatch="//",
                        linewidth=0, label="variance grows without bound", step="mid")
    shown = [e for e in edges if lo <= e <= hi]
    for i, e in enumerate(shown):
        where = ", ".join(_fmt(v) for v in shown)
        ax.axvline(e, color=_EDGE, linestyle="--", linewidth=1.0,
                   label=f"edge of chaos at sigma_w2 = {where} (xi_c -> inf)" if i == 0 else None)
    if depth is not None:
        d = check_int("depth", depth, 1)
        ax.axhline(d / 6.0, color=_DEPTH, linestyle=":", linewidth=1.2,
                   label=f"xi_c = L/6 for your depth L = {d}")
    if prop is not None and prop.xi_c is not None and lo <= prop.sigma_w2 <= hi:
        y = min(prop.xi_c, top) if math.isfinite(prop.xi_c) else top
        _mark_user(ax, prop.sigma_w2, y, f"your point: sigma_w2 = {_fmt(prop.sigma_w2)}, "
                   f"xi_c = {_fmt(prop.xi_c)}")
    ax.set_yscale("log")
    ax.set_ylim(bottom, top)
    ax.set_xlim(lo, hi)
    ax.set_xlabel("sigma_w2  (weight variance x fan-in)")
    ax.set_ylabel("depth scale (layers)")
    sec = ax.secondary_yaxis("right", functions=(lambda x: 6.0 * x, lambda x: x / 6.0))
    sec.set_ylabel("trainable depth about 6 xi_c (empirical rule)")
    ax.set_title(f"Depth scales of {act.label} at sigma_b2 = {_fmt(sb)}", fontsize=11)
    ax.grid(True, which="major", color="0.9", linewidth=0.6)
    ax.legend(loc="lower right", fontsize=8)
    return _finish(fig)


# -------------------------------------------------------------------------------------------
# output
# -------------------------------------------------------------------------------------------
_SAVE_LOCK = threading.Lock()


def save_figure(fig: Figure, path_or_buffer: str | os.PathLike[str] | IO[bytes] | None = None,
                format: str = "png", *, dpi: float = 100.0) -> bytes:
    """Render a figure to PNG or SVG bytes that are identical for identical figures.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path_or_buffer : path, binary file object or None
        Where to write the bytes (None: only return them).
    format : str
        "png" or "svg".
    dpi : float
        Resolution of PNG output.

    Returns
    -------
    bytes
        What was written.

    Notes
    -----
    Repeatable bytes: the SVG hash salt is fixed (it seeds the element ids),
    SVG carries no date and PNG no software tag; text is drawn as paths.
    """
    fmt = str(format).lower()
    if fmt not in FORMATS:
        raise InvalidParameterError("format", f"one of {', '.join(FORMATS)}", format)
    if not isinstance(fig, Figure):
        raise InvalidParameterError("fig", "a matplotlib Figure", type(fig).__name__)
    d = check_positive("dpi", dpi)
    metadata = {"Date": None} if fmt == "svg" else {"Software": None}
    buf = io.BytesIO()
    # rc_context changes process-wide settings: one figure at a time (threads in a server)
    with _SAVE_LOCK, matplotlib.rc_context({"svg.hashsalt": "propcalc", "svg.fonttype": "path"}):
        fig.savefig(buf, format=fmt, dpi=d, metadata=metadata)
    data = buf.getvalue()
    if path_or_buffer is not None:
        if hasattr(path_or_buffer, "write"):
            path_or_buffer.write(data)  # type: ignore[union-attr]
        else:
            with open(path_or_buffer, "wb") as fh:
                fh.write(data)
    return data
