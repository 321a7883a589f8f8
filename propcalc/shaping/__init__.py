"""Kernel shaping: an activation transformed for a target depth (deep kernel shaping,
tailored activation transformation). The entry point is :func:`shape_activation`."""

from .leaky import UnreachableTargetError
from .results import ShapedActivation, ShapingError
from .solve import shape_activation

__all__ = ["shape_activation", "ShapedActivation", "ShapingError", "UnreachableTargetError"]
