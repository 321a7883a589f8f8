"""Figures of the mean-field quantities (the ``plot`` extra: matplotlib).

Every function takes engine objects (an :class:`~propcalc.Activation` and a
point given as a :class:`~propcalc.Propagation`, an
:class:`~propcalc.InitPlan`, a :class:`~propcalc.CriticalPoint` or a
``(sigma_w2, sigma_b2)`` pair) and returns a :class:`matplotlib.figure.Figure`
built directly, without pyplot's global state, so the functions are safe in
a server thread. :func:`save_figure` writes PNG or SVG bytes that are the
same for the same figure (fixed SVG hash salt, no date or software
metadata).

* :func:`plot_phase_diagram` (:mod:`~propcalc.output.phase_plot`): ordered,
  chaotic and unbounded regions over (sigma_w2, sigma_b2) with boundaries
  located by bisection (:mod:`~propcalc.output.phase_regions`), the
  edge-of-chaos line (attracting and reached, attracting elsewhere,
  repelling), contours of xi_c and of the trainable depth 6 xi_c (an
  empirical rule of Schoenholz et al. 2017), the user's point;
* :func:`plot_variance_map` (:mod:`~propcalc.output.map_plots`): V(q) against
  q with the identity, its fixed points and the layer-to-layer iteration
  (Poole et al. 2016, eq. 3), magnified when V lies on the identity;
* :func:`plot_correlation_map` (same module): C(c) with its fixed points and
  the slope chi_1 at c = 1 (Poole et al. 2016, eq. 5; Schoenholz et al. 2017);
* :func:`plot_depth_scales` (:mod:`~propcalc.output.depth_plot`): xi_q and
  xi_c against sigma_w2 at a fixed sigma_b2, the edge of chaos marked
  (Schoenholz et al. 2017, eqs. 6 and 9).

The shared pieces (points, words, titles, labels, bytes) are in
:mod:`~propcalc.output.figure_tools`.
"""

from __future__ import annotations

from .depth_plot import plot_depth_scales
from .figure_tools import FORMATS, USER_POINT_GID, PointLike, save_figure
from .map_plots import plot_correlation_map, plot_variance_map
from .phase_plot import plot_phase_diagram

__all__ = [
    "FORMATS",
    "USER_POINT_GID",
    "PointLike",
    "plot_phase_diagram",
    "plot_variance_map",
    "plot_correlation_map",
    "plot_depth_scales",
    "save_figure",
]
