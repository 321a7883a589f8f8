"""Training at initialisation: finite-width corrections and the trainability verdict.

:mod:`~propcalc.training.finite_width` (spread and drift at finite widths, first order in 1/n).
Above :mod:`propcalc.meanfield` and :mod:`propcalc.variants`, below :mod:`propcalc.init`.
"""

from .finite_width import FiniteWidth, LayerFluctuations, finite_width, layer_fluctuations

__all__ = ["FiniteWidth", "LayerFluctuations", "finite_width", "layer_fluctuations"]
