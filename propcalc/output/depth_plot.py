"""Depth scales against sigma_w2 at a fixed sigma_b2, with the edge of chaos marked.

A critical sigma_w2 (chi_1 = 1 at one of the variance fixed points,
:func:`propcalc.edge_of_chaos_at_bias`) is drawn as a black dashed line only
when its fixed point is the one the variance reaches from ``q_input``: only
there does xi_c diverge. Otherwise its fixed point repels or lies in another
basin, the curves there belong to another fixed point (or to none, where the
variance grows without bound) and the line is grey and dotted, with the
reason in the legend. The band where the variance grows without bound is
bounded by bisection on the points of the sweep, not by the samples.
"""

from __future__ import annotations

import math
from concurrent.futures import Executor

import numpy as np
from matplotlib.figure import Figure

from ..activations.base import Activation
from ..errors import ComputationError, check_int, check_nonnegative, check_positive
from ..meanfield.edge import edge_of_chaos_at_bias
from ..meanfield.fixed_points import solve_variance
from ..meanfield.sweep import sweep
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..vocabulary import VarianceStatus
from .figure_tools import (DEPTH, EDGE, UNBOUNDED, PointLike, axis_points, check_range, finish,
                           fit_title, fmt, legend_below, mark_user, new_figure, resolve_point, wide,
                           wrap, xi_c_words)
from .phase_regions import BISECTION_STEPS, on_reached_edge

__all__ = ["plot_depth_scales"]

def _unbounded(act: Activation, sw: np.ndarray, sb: float, q_input: float,
               rule: QuadratureRule) -> np.ndarray:
    var = solve_variance(act, sw, np.full(sw.shape, sb), np.full(sw.shape, q_input), rule)
    return var.status == VarianceStatus.UNBOUNDED.value


def _bands(act: Activation, grid: np.ndarray, sb: float, q_input: float, rule: QuadratureRule
           ) -> tuple[list[tuple[float, float]], list[float]]:
    """The sigma_w2 intervals where the variance grows without bound, ends bisected.

    Returns the intervals and, for each end, the last point bisection found on
    the bounded side (sampled too, so that the curves run up to the band).
    """
    unbounded = _unbounded(act, grid, sb, q_input, rule)
    change = np.flatnonzero(unbounded[:-1] != unbounded[1:])
    lo, hi = grid[change].copy(), grid[change + 1].copy()
    left_in = unbounded[change]
    for _ in range(BISECTION_STEPS + 4):
        if not change.size:
            break
        mid = 0.5 * (lo + hi)
        got = _unbounded(act, mid, sb, q_input, rule)
        same = got == left_in
        lo, hi = np.where(same, mid, lo), np.where(same, hi, mid)
    inside = np.where(left_in, hi, lo).tolist()
    cuts = [float(grid[0])] + (0.5 * (lo + hi)).tolist() + [float(grid[-1])]
    state = bool(unbounded[0]) if grid.size else False
    out = []
    for a, b in zip(cuts[:-1], cuts[1:]):
        if state:
            out.append((a, b))
        state = not state
    return out, inside


def _below(xi: np.ndarray, bottom: float) -> str:
    """Words for a curve that never rises into the axis (xi = 0: settled in one layer)."""
    finite = xi[np.isfinite(xi)]
    if not finite.size or np.any(finite >= bottom):
        return ""
    if np.all(finite == 0.0):
        return "\n= 0 here (settled in one layer), below the axis"
    return f"\nbelow the axis here (at most {fmt(float(finite.max()), 2)})"


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
        sigma_w2 whose fixed point the variance reaches (relative offsets
        1e-1 ... 1e-7), where xi_c diverges.
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
    prop = resolve_point(act, point, q_input, rule)
    if sigma_b2 is not None:
        sb = check_nonnegative("sigma_b2", sigma_b2)
    else:
        sb = prop.sigma_b2 if prop is not None else 0.0
    n = check_int("n_points", n_points, 5, 20_000)
    qi = float(q_input)
    critical = [cp for cp in edge_of_chaos_at_bias(act, sb, rule)
                if cp.valid and cp.sigma_w2 is not None]
    reached, other = [], []
    if critical:
        e_sw = np.array([cp.sigma_w2 for cp in critical], dtype=float)
        hit = on_reached_edge(act, e_sw, np.full(e_sw.shape, sb), qi, rule)
        for cp, ok in zip(critical, hit):
            if ok:
                reached.append(float(cp.sigma_w2))
            else:
                other.append(cp)
    if sigma_w2_range is None:
        lo, hi = 0.1, 4.0
        extra = reached + ([prop.sigma_w2] if prop is not None else [])
        if extra:
            hi = max(hi, 1.15 * max(extra))
    else:
        lo, hi = check_range("sigma_w2_range", sigma_w2_range, True)
    regular = axis_points(lo, hi, n)
    offsets = 10.0 ** -np.arange(1.0, 8.0)
    near = [e * (1 + s * offsets) for e in reached for s in (-1.0, 1.0)]
    bands, inside = _bands(act, regular, sb, qi, rule)
    grid = np.unique(np.concatenate([regular] + near + ([np.array(reached)] if reached else [])))
    grid = grid[(grid >= lo) & (grid <= hi)]
    res = sweep(act, grid, [sb], q_input=qi, executor=executor, progress=progress, rule=rule,
                chunk_size=chunk_size)
    xi_q, xi_c = res.xi_q[0, :, 0], res.xi_c[0, :, 0]
    # the curves up to the band: the last points before it, each kept only when the engine can
    # resolve it (close to a band c* may lie nearer to 1 than a double resolves: refused)
    ends_w, ends_q, ends_c = [], [], []
    for w in inside:
        if not lo <= w <= hi or w in grid:
            continue
        try:
            one = sweep(act, [w], [sb], q_input=qi, progress=False, rule=rule)
        except ComputationError:
            continue
        ends_w.append(w)
        ends_q.append(float(one.xi_q[0, 0, 0]))
        ends_c.append(float(one.xi_c[0, 0, 0]))
    if ends_w:
        order = np.argsort(np.concatenate([grid, ends_w]), kind="stable")
        grid = np.concatenate([grid, ends_w])[order]
        xi_q = np.concatenate([xi_q, ends_q])[order]
        xi_c = np.concatenate([xi_c, ends_c])[order]
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

    fig = new_figure()
    ax = fig.add_subplot()
    clip = 10.0 * top
    ax.plot(grid, np.where(np.isinf(xi_q), clip, xi_q), color="#1f5fa8", linewidth=1.8,
            label="xi_q = -1/ln chi_q  (variance settles)" + _below(xi_q, bottom))
    ax.plot(grid, np.where(np.isinf(xi_c), clip, xi_c), color="#c23b22", linewidth=1.8,
            label="xi_c = -1/ln C'(c*)  (correlations settle)" + _below(xi_c, bottom))
    for k, (a, b) in enumerate(bands):
        ax.axvspan(a, b, facecolor=UNBOUNDED, edgecolor="0.45", hatch="//", linewidth=0.0,
                   zorder=0, label="variance grows without bound" if k == 0 else None)
    shown = [e for e in reached if lo <= e <= hi]
    for i, e in enumerate(shown):
        where = ", ".join(fmt(v) for v in shown)
        ax.axvline(e, color=EDGE, linestyle="--", linewidth=1.0,
                   label=f"edge of chaos at sigma_w2 = {where}\n(xi_c -> inf)" if i == 0 else None)
    hidden = [cp for cp in other if lo <= float(cp.sigma_w2) <= hi]  # type: ignore[arg-type]
    for i, cp in enumerate(hidden):
        where = ", ".join(fmt(c.sigma_w2) for c in hidden)
        why = ("attracts, but the flow from q_input goes elsewhere"
               if all(c.stable for c in hidden) else "is never reached")
        ax.axvline(float(cp.sigma_w2), color="0.4", linestyle=":",  # type: ignore[arg-type]
                   linewidth=1.2,
                   label=(f"chi_1 = 1 at sigma_w2 = {where}:\nits fixed point q* {why}"
                          if i == 0 else None))
    if depth is not None:
        d = check_int("depth", depth, 1)
        ax.axhline(d / 6.0, color=DEPTH, linestyle=":", linewidth=1.2,
                   label=f"xi_c = L/6 for your depth L = {d}")
    if prop is not None and prop.xi_c is not None and lo <= prop.sigma_w2 <= hi:
        y = min(prop.xi_c, top) if math.isfinite(prop.xi_c) else top
        mark_user(ax, prop.sigma_w2, y, wrap(f"your point: sigma_w2 = {fmt(prop.sigma_w2)}, "
                                             f"{xi_c_words(prop, 4)}", 48))
    ax.set_yscale("log")
    ax.set_ylim(bottom, top)
    if wide(lo, hi):
        ax.set_xscale("log")
    ax.set_xlim(lo, hi)
    ax.set_xlabel("sigma_w2  (weight variance x fan-in)")
    ax.set_ylabel("depth scale (layers)")
    sec = ax.secondary_yaxis("right", functions=(lambda x: 6.0 * x, lambda x: x / 6.0))
    sec.set_ylabel("trainable depth about 6 xi_c (empirical rule)")
    fit_title(ax, fig, f"Depth scales of {act.label}", f"at sigma_b2 = {fmt(sb)}", pad=12.0)
    ax.grid(True, which="major", color="0.9", linewidth=0.6)
    legend_below(fig)
    return finish(fig)
