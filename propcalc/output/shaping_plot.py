"""The network correlation map before and after shaping (the ``plot`` extra: matplotlib).

:func:`plot_shaping` draws, for a :class:`~propcalc.ShapedActivation`:

* left, the whole-network map ``C_L(c_0)`` against the input correlation c_0 for the
  shaped activation and for the base activation at its edge of chaos, with the
  identity and the target (Poole et al. 2016, eq. 5, composed over the depth);
* right, the correlation of two orthogonal inputs layer by layer, c_l against l.

matplotlib is imported inside the function; the figure is built without pyplot's
global state and its layout frozen, so :func:`propcalc.output.plots.save_figure`
gives the same bytes for the same call.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..errors import InvalidParameterError, check_int, install_hint
from ..shaping.results import ShapedActivation

__all__ = ["plot_shaping"]

_AFTER = "#1f5fa8"
_BEFORE = "#c23b22"
_TARGET = "#e8a000"


def plot_shaping(shaped: ShapedActivation, *, n_points: int = 101) -> Any:
    """The network correlation map before and after shaping.

    Parameters
    ----------
    shaped : ShapedActivation
        From :func:`propcalc.shape_activation`.
    n_points : int
        Samples of c_0 in [0, 1] for the left panel (5 to 1001).

    Returns
    -------
    matplotlib.figure.Figure
    """
    try:
        from matplotlib.figure import Figure
    except ImportError:
        raise ImportError(f"plots need matplotlib: {install_hint('plot')}") from None
    if not isinstance(shaped, ShapedActivation):
        raise InvalidParameterError("shaped", "a ShapedActivation", type(shaped).__name__)
    n = check_int("n_points", n_points, 5, 1001)
    depth = shaped.depth
    c0 = np.linspace(0.0, 1.0, n)
    after = shaped.network_map(c0)
    before = shaped.reference_network_map(c0)
    ref = shaped.reference

    fig = Figure(figsize=(10.0, 4.6), dpi=100, layout="constrained")
    left, right = fig.subplots(1, 2)
    left.plot(c0, c0, color="0.6", linestyle="--", linewidth=1.0, label="identity")
    left.plot(c0, after, color=_AFTER, linewidth=2.0,
              label=f"shaped ({shaped.method}), sigma_w2 = 1, sigma_b2 = 0")
    if ref is not None and before is not None:
        left.plot(c0, before, color=_BEFORE, linewidth=2.0,
                  label=f"{ref.activation} at its edge of chaos (sigma_w2 = {ref.sigma_w2:.4g})")
    if shaped.method == "tat":
        left.plot([0.0], [shaped.target], linestyle="none", marker="*", markersize=14,
                  color=_TARGET, markeredgecolor="black", clip_on=False, zorder=5,
                  label=f"target C_L(0) = {shaped.target:g}")
    else:
        left.plot([1.0], [1.0], linestyle="none", marker="*", markersize=14, color=_TARGET,
                  markeredgecolor="black", clip_on=False, zorder=5,
                  label=f"slope at c = 1: C_L'(1) = {shaped.network_slope_at_1:.4g}")
    left.set_xlim(0.0, 1.0)
    left.set_ylim(min(0.0, float(np.min(after))) - 0.02, 1.02)
    left.set_xlabel("c_0  (correlation of two inputs)")
    left.set_ylabel(f"C_L(c_0)  (their correlation after {depth} layers)")
    left.set_title(f"Network correlation map, depth {depth}", fontsize=11)
    left.legend(loc="lower right", fontsize=8)

    layers = np.arange(depth + 1)
    right.plot(layers, shaped.correlations, color=_AFTER, linewidth=2.0, label="shaped")
    if ref is not None:
        right.plot(layers, ref.correlations, color=_BEFORE, linewidth=2.0,
                   label=f"{ref.activation} at its edge of chaos")
    right.axhline(1.0, color="0.6", linestyle="--", linewidth=1.0)
    right.set_xlim(0, depth)
    right.set_ylim(min(0.0, float(np.min(shaped.correlations))) - 0.02, 1.02)
    right.set_xlabel("layer l")
    right.set_ylabel("c_l  (two inputs with c_0 = 0)")
    right.set_title(f"{shaped.base}: correlation through the layers", fontsize=11)
    right.legend(loc="lower right", fontsize=8)
    fig.draw_without_rendering()
    fig.set_layout_engine("none")  # freeze the layout: the same bytes for PNG then SVG
    return fig
