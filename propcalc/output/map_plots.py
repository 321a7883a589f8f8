"""The layer-to-layer maps: V(q) with its cobweb, C(c) with its fixed points.

When a map lies so close to the identity that the curve, the identity and
the cobweb merge at the figure's scale, a second panel below shows the
distance ``V(q) - q`` (or ``C(c) - c``) magnified, with the fixed points and
the layers of the iteration on it, and a note says how close the map is.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from ..activations.base import Activation
from ..errors import InvalidParameterError, check_int, check_positive
from ..meanfield.maps import correlation_map, variance_map
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from .figure_tools import (USER, PointLike, finish, fit_title, fmt, mark_user, new_figure,
                           resolve_point, wrap, xi_c_words)

__all__ = ["plot_variance_map", "plot_correlation_map", "NEAR_IDENTITY"]

#: The map is shown magnified when it stays within this fraction of the axis span of the
#: identity (about 5 pixels at the default size; common practice, no source).
NEAR_IDENTITY = 0.03
_MAP = "#1f5fa8"
_COBWEB = "#d9771e"
_SIZE = (6.4, 5.2)


def _panels(fig: Figure, near: bool) -> tuple[Any, Any | None]:
    """The map's axes, and below it the magnified distance to the identity when needed."""
    if not near:
        return fig.add_subplot(), None
    top, bottom = fig.subplots(2, 1, height_ratios=[2.2, 1.0])
    return top, bottom


def _distance_panel(ax: Any, x: np.ndarray, gap: np.ndarray, what: str, span: float) -> None:
    """gap = map - identity against x, with the zero line and a note on the magnification."""
    ax.axhline(0.0, color="0.55", linestyle="--", linewidth=1.0)
    ax.plot(x, gap, color=_MAP, linewidth=1.6)
    largest = float(np.max(np.abs(gap))) if gap.size else 0.0
    if largest <= 1e-13 * max(span, 1e-300):
        ax.set_ylim(-1.0, 1.0)
        note = f"{what} = 0 within rounding on this range: every point is a fixed point"
    else:
        lo = min(float(np.min(gap)), 0.0)
        hi = max(float(np.max(gap)), 0.0)
        ax.set_ylim(lo - 0.15 * largest, hi + 0.15 * largest)
        ax.ticklabel_format(axis="y", style="sci", scilimits=(-2, 3))
        note = (f"{what} magnified: at most {largest:.2g}, "
                f"{largest / span:.1e} of the axis above")
    ax.set_ylabel(what, fontsize=9)
    ax.set_title(note, fontsize=8, loc="left", color="0.25")


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
    Filled circles attract (|V'(q*)| < 1), open circles repel. When V stays
    within ``NEAR_IDENTITY`` of the axis span from the identity, a second
    panel shows V(q) - q magnified, with the layers of the iteration on it.
    """
    prop = resolve_point(act, point, q_input, rule)
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
    span = max(top, float(np.max(v)))
    near = float(np.max(np.abs(v - q))) <= NEAR_IDENTITY * span

    xs: list[float] = []
    ys: list[float] = []
    layers: list[float] = []
    if n_iter and q1 <= top:
        xs, ys = [q1], [0.0]
        cur = q1
        layers = [q1]
        for _ in range(n_iter):
            nxt = float(variance_map(act, cur, sw, sb, rule))
            xs += [cur, nxt]
            ys += [nxt, nxt]
            layers.append(nxt)
            if nxt > top or abs(nxt - cur) <= 1e-9 * max(cur, 1e-300):
                break
            cur = nxt

    fig = new_figure(_SIZE)
    ax, low = _panels(fig, near)
    ax.plot(q, q, color="0.55", linestyle="--", linewidth=1.0, label="identity V(q) = q")
    ax.plot(q, v, color=_MAP, linewidth=2.0, label="variance map V(q)")
    if xs:
        ax.plot(xs, ys, color=_COBWEB, linewidth=0.9, label="layer-to-layer iteration from q_1")
        ax.plot([q1], [0.0], linestyle="none", marker="|", markersize=14, color=_COBWEB,
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
        if low is not None:
            low.plot([fp.q], [0.0], color="black" if fp.stable else "white", **kw)
    if prop.q_star is not None and prop.q_star <= top:
        mark_user(ax, prop.q_star, prop.q_star,
                  f"q* = {fmt(prop.q_star, 5)} reached (chi_q = {fmt(prop.chi_q)})")
    ax.set_xlim(0.0, top)
    ax.set_ylim(0.0, span * 1.02)
    if low is None:
        ax.set_xlabel("q  (pre-activation variance of layer l)")
    else:
        lq = np.array(layers)
        gap = v - q
        _distance_panel(low, q, gap, "V(q) - q", span)
        if lq.size:
            lv = np.asarray(variance_map(act, lq, sw, sb, rule)) - lq
            low.plot(lq, lv, linestyle="none", marker="o", markersize=3.5, color=_COBWEB,
                     zorder=6, label="layers of the iteration from q_1")
            low.legend(loc="lower right", fontsize=7.5)
        low.set_xlim(0.0, top)
        low.set_xlabel("q  (pre-activation variance of layer l)")
    ax.set_ylabel("V(q)  (variance of layer l + 1)")
    fit_title(ax, fig, f"Variance map of {act.label}:",
              f"sigma_w2 = {fmt(sw)}, sigma_b2 = {fmt(sb)}")
    ax.legend(loc="best", fontsize=8)
    ax.text(0.98, 0.03, wrap(fps.message, 60), transform=ax.transAxes, ha="right", va="bottom",
            fontsize=7.5, color="0.25",
            bbox=dict(boxstyle="round", facecolor="white", edgecolor="0.8"))
    return finish(fig)


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
    c* < 1 attracts (chaotic). A map within ``NEAR_IDENTITY`` of the
    identity gets a second panel with C(c) - c magnified.
    """
    prop = resolve_point(act, point, q_input, rule)
    if prop is None:
        raise InvalidParameterError("point", "given (the map depends on sigma_w2 and sigma_b2)",
                                    None)
    lo = float(c_min)
    if not (math.isfinite(lo) and -1.0 <= lo < 1.0):
        raise InvalidParameterError("c_min", "in [-1, 1)", c_min)
    n = check_int("n_points", n_points, 5, 10_000)
    sw, sb = prop.sigma_w2, prop.sigma_b2
    c = np.linspace(lo, 1.0, n)
    cm = None
    if prop.q_star is not None and prop.q_star > 0.0:
        cm = np.asarray(correlation_map(act, c, sw, sb, prop.q_star, rule))
    span = 1.03 - min(lo, -0.05 if lo >= 0 else lo)
    near = cm is not None and float(np.max(np.abs(cm - c))) <= NEAR_IDENTITY * span

    fig = new_figure(_SIZE)
    ax, low = _panels(fig, near)
    ax.plot(c, c, color="0.55", linestyle="--", linewidth=1.0, label="identity C(c) = c")
    if prop.q_star is None:
        ax.text(0.5, 0.5, "no finite variance fixed point:\nthe correlation map is not defined "
                "at a fixed q*", transform=ax.transAxes, ha="center", va="center", fontsize=10)
    elif cm is None:
        ax.plot(c, c, color=_MAP, linewidth=2.0,
                label="C(c) = c (limit q* -> 0: the network acts linearly)")
    else:
        ax.plot(c, cm, color=_MAP, linewidth=2.0, label=f"C(c) at q* = {fmt(prop.q_star)}")
        c1 = prop.chi_1
        if math.isfinite(c1):
            dc = 0.25 * (1.0 - lo)
            ax.plot([1.0 - dc, 1.0], [1.0 - c1 * dc, 1.0], color="#c23b22", linewidth=1.2,
                    linestyle=":", label=f"slope at c = 1: chi_1 = {fmt(c1)}")
    if prop.q_star is not None:
        one_stable = prop.phase in ("ordered", "edge of chaos")
        how = {"ordered": "(attracting)", "edge of chaos": "(marginal: approached polynomially)"}
        kw: dict[str, Any] = dict(linestyle="none", marker="o", markersize=8,
                                  markeredgecolor="black", zorder=5, clip_on=False,
                                  color="black" if one_stable else "white")
        ax.plot([1.0], [1.0], label="c = 1 " + how.get(prop.phase, "(repelling)"), **kw)
        if prop.c_star is not None and lo <= prop.c_star < 1.0:
            mark_user(ax, prop.c_star, prop.c_star,
                      f"c* = {fmt(prop.c_star, 5)} (C'(c*) = {fmt(prop.chi_c)}, "
                      f"{xi_c_words(prop, 4)})")
    ax.set_xlim(lo, 1.0)
    ax.set_ylim(min(lo, -0.05 if lo >= 0 else lo), 1.03)
    if low is None or cm is None:  # the panel exists only when the map was computed
        ax.set_xlabel("c  (correlation of two inputs at layer l)")
    else:
        _distance_panel(low, c, cm - c, "C(c) - c", span)
        low.plot([1.0], [0.0], **kw)
        if prop.c_star is not None and lo <= prop.c_star < 1.0:
            low.plot([prop.c_star], [0.0], linestyle="none", marker="*", markersize=12,
                     color=USER, markeredgecolor="black", zorder=6, clip_on=False)
        low.set_xlim(lo, 1.0)
        low.set_xlabel("c  (correlation of two inputs at layer l)")
    ax.set_ylabel("C(c)  (correlation at layer l + 1)")
    fit_title(ax, fig, f"Correlation map of {act.label}:",
              f"sigma_w2 = {fmt(sw)}, sigma_b2 = {fmt(sb)}")
    ax.legend(loc="best", fontsize=8)
    ax.text(0.98, 0.03, f"phase: {prop.phase}", transform=ax.transAxes, ha="right", va="bottom",
            fontsize=9, color="0.25",
            bbox=dict(boxstyle="round", facecolor="white", edgecolor="0.8"))
    return finish(fig)
