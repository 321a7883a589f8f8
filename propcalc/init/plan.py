"""The initialisation plan: one :class:`~propcalc.init.layers.LayerInit` per layer and its justification.

:func:`propcalc.recommend` (in :mod:`propcalc.init.planner`) makes an :class:`InitPlan`;
:meth:`InitPlan.draw` draws its arrays through :mod:`propcalc.init.draw`, which sits below this
module and knows only the per-layer types, so the imports run one way.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

from ..meanfield.report import Propagation
from ..results import Result
from ..training.learning_rate import LearningRateCeiling
from ..variants.output_layer import OutputLayerScale
from ..training.verdict import Verdict
from ..vocabulary import TARGETS
from .draw import PlanArrays, SeedLike, draw_plan
from .layers import Layer, LayerInit

__all__ = ["TARGETS", "MAX_DEPTH", "InitPlan"]

#: the deepest network a plan is made for (one LayerInit per layer is kept)
MAX_DEPTH = 100_000


@dataclass(frozen=True)
class InitPlan(Result):
    """A per-layer initialisation plan with its mean-field justification.

    Attributes
    ----------
    activation : str
    target : str
        What was aimed at: "edge" (edge of chaos at an attracting q*),
        "variance" (variance-preserving, sigma_b2 = 0), "bias" (edge of chaos
        at a user-fixed sigma_b2).
    target_description : str
    distribution : str
    sigma_w2, sigma_b2, q_star : float
    depth : int
    layers : tuple of LayerInit
    propagation : Propagation
        The report at the planned (sigma_w2, sigma_b2) for this depth.
    trainable_depth : float or None
    verdict : Verdict
        Every reason that decides trainability (correlation depth or the power law at the edge,
        gradient growth, the learning-rate ceiling, finite-width spread and drift, the output
        layer), each with its number, pass or fail and the fix; ``str(plan.verdict)`` is its
        summary (:mod:`propcalc.training.verdict`).
    depth_ok : bool
        The correlation-depth reason passes (the requested depth against 6 xi_c, an attracting
        fixed point); ``verdict.trainable`` weighs every reason.
    notes : tuple of str
    loss : str or None
        "cross_entropy" or "mse" when the plan was made for a loss, else None.
    n_classes, batch_size : int or None
        The outputs K and the batch size B the learning rate is planned for.
    learning_rate_ceiling : float or None
        ``2 (1 + momentum) / lambda_max``, lambda_max the top curvature of the loss at
        initialisation (:func:`propcalc.training.learning_rate_ceiling`); None without a loss.
    learning_rate : float or None
        The recommended learning rate (its rule in ``learning_rate_details``); None without a loss.
    learning_rate_details : LearningRateCeiling or None
        The curvature, the kernel's numbers, the optimiser the bound is for, and the notes.
    output_layer : str or None
        How the last layer is scaled (for the loss, or as the hidden layers); None without a loss.
    output_layer_scale : OutputLayerScale or None
        The cross-entropy readout analysis when the last layer was scaled for it.
    """

    activation: str
    target: str
    target_description: str
    distribution: str
    sigma_w2: float
    sigma_b2: float
    q_star: float | None
    depth: int
    layers: tuple[LayerInit, ...]
    propagation: Propagation = field(repr=False)
    trainable_depth: float | None
    verdict: Verdict
    depth_ok: bool
    notes: tuple[str, ...] = ()
    loss: str | None = None
    n_classes: int | None = None
    batch_size: int | None = None
    learning_rate_ceiling: float | None = None
    learning_rate: float | None = None
    learning_rate_details: LearningRateCeiling | None = field(default=None, repr=False)
    output_layer: str | None = None
    output_layer_scale: OutputLayerScale | None = field(default=None, repr=False)

    def draw(self, seed: SeedLike = None, *, bias_distribution: str = "normal",
             layers: Sequence[Layer] | None = None) -> PlanArrays:
        """Draw weight and bias arrays for this plan (see :func:`propcalc.init.draw.draw_plan`)."""
        return draw_plan(self, seed, bias_distribution=bias_distribution, layers=layers)
