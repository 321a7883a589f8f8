"""Training at initialisation: finite-width corrections, the tangent kernel, the learning rate.

:mod:`~propcalc.training.finite_width` (spread and drift at finite widths, first order in 1/n);
:mod:`~propcalc.training.ntk` (the tangent kernel of a plain stack, standard parametrisation) ->
:mod:`~propcalc.training.learning_rate` (the top curvature of the loss and 2 / lambda_max);
:mod:`~propcalc.training.network_finite_width` (the same laws along a chain of dense blocks);
:mod:`~propcalc.training.network_ntk` (the tangent kernel of dense / activation / residual blocks);
:mod:`~propcalc.training.verdict` (every reason that decides trainability, one structure) ->
:mod:`~propcalc.training.network_verdict` (the same verdict for a network of blocks).
Above :mod:`propcalc.meanfield` and :mod:`propcalc.variants`, below :mod:`propcalc.init`.
"""

from .finite_width import FiniteWidth, LayerFluctuations, finite_width, layer_fluctuations
from .learning_rate import LOSSES, LearningRateCeiling, learning_rate_ceiling, output_hessian
from .network_finite_width import FiniteWidthUnsupportedError, network_finite_width
from .network_ntk import NetworkTangentKernel, network_learning_rate_ceiling, network_tangent_kernel
from .ntk import TangentKernel, UnsupportedKernelError, tangent_kernel
from .network_verdict import network_verdict
from .verdict import Reason, Verdict, trainability

__all__ = ["FiniteWidth", "LOSSES", "LayerFluctuations", "LearningRateCeiling", "TangentKernel",
           "UnsupportedKernelError", "finite_width", "layer_fluctuations",
           "learning_rate_ceiling", "output_hessian", "tangent_kernel", "Reason", "Verdict",
           "network_verdict", "trainability", "NetworkTangentKernel", "network_learning_rate_ceiling",
           "network_tangent_kernel", "FiniteWidthUnsupportedError", "network_finite_width"]
