"""Where the plan types, the gains and the planner used to live (kept so old imports still work).

The names moved to :mod:`propcalc.init.layers` (Layer, LayerInit, the laws),
:mod:`propcalc.init.plan` (InitPlan), :mod:`propcalc.init.gains` (Gains, gains) and
:mod:`propcalc.init.planner` (recommend). New code imports from there, or from :mod:`propcalc`.
"""

from __future__ import annotations

from .gains import COMMON_GAINS, Gains, gains
from .layers import DISTRIBUTIONS, TRUNCATION, Layer, LayerInit, truncated_normal_factor
from .plan import MAX_DEPTH, TARGETS, InitPlan
from .planner import ATTRACTION_MARGIN, recommend

__all__ = [
    "COMMON_GAINS",
    "DISTRIBUTIONS",
    "TARGETS",
    "TRUNCATION",
    "ATTRACTION_MARGIN",
    "MAX_DEPTH",
    "Gains",
    "Layer",
    "LayerInit",
    "InitPlan",
    "gains",
    "recommend",
    "truncated_normal_factor",
]
