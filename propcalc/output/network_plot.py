"""q, c and the gradient against depth for a described network (the ``plot`` extra: matplotlib).

:func:`plot_network` draws a :class:`~propcalc.NetworkPropagation` in three panels over the
stream positions (0 = the input):

* the per-unit second moment q of the stream (Poole et al. 2016, eq. 3, block by block);
* the correlation c of the two inputs, or ``1 - c`` on a log scale when the inputs come
  within 1e-2 of each other (the distance that matters near c = 1 is invisible on a linear
  axis); with position mixing (pooling, attention) also the correlation of two positions of
  one input (rank collapse, Noci et al. 2022);
* the per-unit mean squared gradient relative to the output's (Schoenholz et al. 2017,
  gradient independence), with the summary's factor.

q and the gradient go on log scales when they change by more than :data:`LOG_RATIO`.
Positions measured by the finite-width simulation (where the Gaussian recursion does not
hold) are drawn as points with their bands (+- 2 standard errors) on a shaded background; the
positions the summary flags (inputs merge or decorrelate, gradients leave the factor, tokens
collapse) are marked by vertical lines named in the legend.

matplotlib is imported inside the function; the figure is built without pyplot's global
state and its layout frozen, so :func:`propcalc.output.plots.save_figure` gives the same
bytes for the same call. Past :data:`SPLIT_POSITIONS` positions the mean-field values are
drawn as one line per block kind (after every dense block, after every activation...), since
alternating kinds would fill a single line's panel with a zigzag.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ..errors import InvalidParameterError, install_hint
from ..networks.propagate import NetworkPropagation

__all__ = ["LOG_RATIO", "NEAR_ONE", "SPLIT_POSITIONS", "plot_network"]

#: A panel goes to a log scale when its positive values span more than this factor.
LOG_RATIO = 20.0
#: Past this many positions with several block kinds, one line per kind (see _groups).
SPLIT_POSITIONS = 100
#: The correlation panel shows ``1 - c`` on a log scale when some 1 - c falls below this.
NEAR_ONE = 1e-2

#: colours of the mean-field lines (one per block kind on long networks)
_GROUPS = ("#1f5fa8", "#8c564b", "#17becf", "#bcbd22", "#e377c2", "#7f7f7f", "#111111")
_SIMULATED = "#c23b22"
_WITHIN = "#2e8b57"
_SHADE = "#ececec"
#: colours and legend texts of the marked positions, by what the summary says there
_MARKS = {
    "merge": ("#7b2d8e", "inputs indistinguishable (1 - c <= {distance:g})"),
    "decorrelate": ("#e8a000", "inputs uncorrelated (|c| <= {decorrelated:g})"),
    "gradient": ("#3d3d3d", "gradient beyond {gradient_factor:g}x from here to the input"),
    "collapse": ("#2e8b57", "tokens of one input identical (rank collapse)"),
}


def _values(seq: Sequence[float | None] | None) -> np.ndarray:
    if seq is None:
        return np.zeros(0)
    return np.array([np.nan if v is None else float(v) for v in seq], dtype=float)


def _log_helps(*series: np.ndarray) -> bool:
    """True when every finite value is > 0 and together they span more than LOG_RATIO."""
    vals = np.concatenate([s[np.isfinite(s)] for s in series])
    if vals.size == 0 or np.any(vals <= 0.0):
        return False
    return float(vals.max()) > LOG_RATIO * float(vals.min())


def _band(result: NetworkPropagation, name: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Positions, lower and upper band edges of the simulated positions for ``name``."""
    sim = result.simulation
    first = result.gaussian_positions + 1
    if sim is None or first >= len(result.q):
        return np.zeros(0, dtype=int), np.zeros(0), np.zeros(0)
    pos = np.arange(first, len(result.q))
    bands = [getattr(sim.positions[i], f"{name}_band") for i in pos]
    return pos, np.array([b[0] for b in bands], float), np.array([b[1] for b in bands], float)


def _marks(result: NetworkPropagation) -> list[tuple[str, int]]:
    s = result.summary
    out = []
    if s.indistinguishable_at is not None:
        out.append(("merge", s.indistinguishable_at))
    if s.decorrelated_at is not None:
        out.append(("decorrelate", s.decorrelated_at))
    if s.gradient_beyond_at is not None and s.gradient_input is not None:
        out.append(("gradient", s.gradient_beyond_at))
    for f in s.findings:
        if f.topic == "attention" and f.position is not None:
            out.append(("collapse", f.position))
    return out


def _groups(result: NetworkPropagation, simulated: np.ndarray) -> list[tuple[str, np.ndarray]]:
    """Mean-field positions to draw as one line each: all of them, or, past SPLIT_POSITIONS
    positions with several block kinds, one line per kind (alternating kinds such as dense
    then activation would otherwise fill the panel with a zigzag)."""
    kinds = np.array(["input"] + [b.kind for b in result.blocks])
    mean_field = ~simulated
    order = list(dict.fromkeys(kinds[1:][mean_field[1:]]))
    if kinds.size - 1 <= SPLIT_POSITIONS or len(order) < 2:
        return [("", mean_field)]
    groups = []
    for kind in order:
        mask = (kinds == kind) & mean_field
        groups.append((f"after {kind}", mask))
    groups.append(("input", (kinds == "input") & mean_field))
    return groups


def _series(ax: Any, x: np.ndarray, y: np.ndarray, simulated: np.ndarray, band: Any,
            log: bool, groups: list[tuple[str, np.ndarray]]) -> None:
    """The mean-field line(s) and the simulated points with their band."""
    for k, (name, mask) in enumerate(groups):
        colour = _GROUPS[k % len(_GROUPS)]
        if not name:
            marker = "o" if x.size <= 60 else None
            ax.plot(x, np.where(mask, y, np.nan), color=colour, linewidth=1.8, marker=marker,
                    markersize=3, label="mean field")
        elif np.count_nonzero(mask) > 1:
            ax.plot(x[mask], y[mask], color=colour, linewidth=1.4,
                    label=f"mean field, {name} blocks")
        else:
            ax.plot(x[mask], y[mask], color=colour, linestyle="none", marker="o",
                    markersize=4, label=name if name == "input" else f"mean field, {name} block")
    pos, lo, hi = band
    if pos.size:
        if log:
            tiny = np.finfo(float).tiny
            lo = np.maximum(lo, tiny)
        ax.fill_between(pos, lo, hi, color=_SIMULATED, alpha=0.25, linewidth=0,
                        label="simulation band (+- 2 SE)")
        ax.plot(pos, y[pos], color=_SIMULATED, linestyle="none", marker="o", markersize=3,
                label="finite-width simulation")
    if log:
        ax.set_yscale("log")


def plot_network(result: NetworkPropagation, *, title: str | None = None) -> Any:
    """q, c and the gradient against the stream position of a network.

    Parameters
    ----------
    result : NetworkPropagation
        From :func:`propcalc.network_propagation`.
    title : str, optional
        The figure's title (default: the number of positions and the inputs' c0).

    Returns
    -------
    matplotlib.figure.Figure

    Raises
    ------
    InvalidParameterError
        When ``result`` is not a NetworkPropagation.
    """
    try:
        from matplotlib.figure import Figure
        from matplotlib.lines import Line2D
        from matplotlib.patches import Patch
    except ImportError:
        raise ImportError(f"plots need matplotlib: {install_hint('plot')}") from None
    if not isinstance(result, NetworkPropagation):
        raise InvalidParameterError("result", "a NetworkPropagation", type(result).__name__)
    q, c, g = _values(result.q), _values(result.c), _values(result.gradient)
    n = q.size - 1
    x = np.arange(n + 1)
    simulated = np.array([False] + [b.source == "simulation" for b in result.blocks])
    s = result.summary
    groups = _groups(result, simulated)

    fig = Figure(figsize=(8.0, 8.4), dpi=100, layout="constrained")
    ax_q, ax_c, ax_g = fig.subplots(3, 1, sharex=True)

    qband = _band(result, "q")
    _series(ax_q, x, q, simulated, qband, _log_helps(q, qband[1], qband[2]), groups)
    ax_q.set_ylabel("q  (second moment per unit)")

    cband = _band(result, "c")
    gap = 1.0 - c
    near = bool(np.any(np.isfinite(gap) & (gap < NEAR_ONE))) and bool(
        np.all(gap[np.isfinite(gap)] > 0.0))
    if near:
        _series(ax_c, x, gap, simulated, (cband[0], 1.0 - cband[2], 1.0 - cband[1]), True,
                groups)
        ax_c.axhline(s.distance, color=_MARKS["merge"][0], linestyle=":", linewidth=1.0,
                     label=f"1 - c = {s.distance:g}: indistinguishable below")
        ax_c.set_ylabel("1 - c  (distance of two inputs)")
    else:
        _series(ax_c, x, c, simulated, cband, False, groups)
        ax_c.set_ylabel("c  (correlation of two inputs)")
        finite = c[np.isfinite(c)]
        low = min(0.0, float(finite.min())) if finite.size else 0.0
        ax_c.set_ylim(low - 0.03, 1.03)
    if result.c_within is not None:
        cw = _values(result.c_within)
        ax_c.plot(x, 1.0 - cw if near else cw, color=_WITHIN, linestyle="--", linewidth=1.4,
                  label="two positions (tokens) of one input" + (": 1 - c" if near else ""))

    gband = _band(result, "gradient")
    glog = _log_helps(g, gband[1], gband[2])
    _series(ax_g, x, g, simulated, gband, glog, groups)
    if glog:
        for level in (s.gradient_factor, 1.0 / s.gradient_factor):
            ax_g.axhline(level, color="0.6", linestyle=":", linewidth=1.0,
                         label=f"gradient factor {s.gradient_factor:g} either way")
    ax_g.set_ylabel("gradient  (mean square, output = 1)")
    ax_g.set_xlabel("stream position (0 = the input; a residual block is one position)")

    texts = {"distance": s.distance, "decorrelated": s.decorrelated,
             "gradient_factor": s.gradient_factor}
    # one legend for the figure: every labelled element once (the panels share them)
    handles: list[Any] = []
    labels: set[str] = set()
    for ax in (ax_q, ax_c, ax_g):
        for h, text in zip(*ax.get_legend_handles_labels()):
            if text not in labels:
                labels.add(text)
                handles.append(h)
    seen: set[str] = set()
    for kind, pos in _marks(result):
        colour, text = _MARKS[kind]
        for ax in (ax_q, ax_c, ax_g):
            ax.axvline(pos, color=colour, linestyle="--", linewidth=1.2)
        if kind not in seen:  # one legend entry per kind, in the figure's legend only
            seen.add(kind)
            handles.append(Line2D([], [], color=colour, linestyle="--", linewidth=1.2,
                                  label=f"{text.format(**texts)}: position {pos}"))
    if result.gaussian_positions < n:
        first = result.gaussian_positions + 1
        measured = bool(simulated.any())
        for ax in (ax_q, ax_c, ax_g):
            ax.axvspan(first - 0.5, n + 0.5, facecolor=_SHADE, zorder=0, linewidth=0,
                       hatch=None if measured else "//", edgecolor="0.8")
        handles.append(Patch(facecolor=_SHADE, edgecolor="0.8", hatch=None if measured else "//",
                             label=f"not Gaussian from position {first}: " + (
                                 "simulated" if measured else
                                 "no numbers (not simulated: see the notes)")))
    for ax in (ax_q, ax_c, ax_g):
        ax.set_xlim(-0.5, n + 0.5) if n <= 200 else ax.set_xlim(-0.01 * n, 1.01 * n)
        ax.grid(True, color="0.9", linewidth=0.6)
    fig.legend(handles=handles, loc="outside lower center", ncols=2, fontsize=8, frameon=False)
    if title is None:
        title = (f"q, c and the gradient through the network: {n} positions, inputs at "
                 f"q0 = {result.q0:g}, c0 = {result.c0:g}")
    fig.suptitle(title, fontsize=11)
    fig.draw_without_rendering()
    fig.set_layout_engine("none")  # freeze the layout: the same bytes for PNG then SVG
    return fig
