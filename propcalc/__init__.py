"""propcalc: mean-field signal propagation for deep random networks.

Conventions used everywhere in propcalc
---------------------------------------
* ``z ~ N(0, 1)``; ``q`` is a pre-activation variance and ``c`` the
  correlation between two inputs' pre-activations.
* Fan-in scaling: ``W_ij ~ N(0, sigma_w2 / fan_in)``, ``b_i ~ N(0, sigma_b2)``.
  Variances carry the ``2`` suffix; a "gain" g multiplies the standard
  deviation: ``std = g / sqrt(fan_in)``, ``sigma_w2 = g^2``.
* Variance map ``V(q) = sigma_w2 E[phi(sqrt(q) z)^2] + sigma_b2`` and
  correlation map ``C(c)`` (Poole et al. 2016); ``chi_1 = sigma_w2
  E[phi'(sqrt(q*) z)^2]`` and the depth scales ``xi_q``, ``xi_c``
  (Schoenholz et al. 2017).
* Phases: ordered (chi_1 < 1), chaotic (chi_1 > 1), edge of chaos (chi_1 = 1).
* Trainable depth: about ``6 xi_c`` layers, an empirical rule of
  Schoenholz et al. 2017.

These are infinite-width, random-initialisation predictions: check them on
your own model before relying on them.
"""

from __future__ import annotations

from . import domains
from .activations import (Activation, ActivationProperties, builtin_names, canonical_name,
                          nearest_name, resolve)
from .meanfield.edge import (DEFAULT_EDGE_Q_STARS, CriticalPoint, edge_of_chaos,
                             edge_of_chaos_at_bias, edge_of_chaos_line, edge_of_chaos_points)
from .meanfield.report import (
    FixedPoint,
    Propagation,
    VarianceFixedPoints,
    propagation,
    variance_fixed_points,
)
from .variants.dropout import DropoutPropagation, DropoutSweep, dropout_propagation, dropout_sweep
from .variants.maxout import (
    MaxMoments,
    MaxoutLayer,
    MaxoutPropagation,
    max_moments,
    maxout_layer,
    maxout_propagation,
)
from .variants.output_layer import (
    InitialLoss,
    MaxProbability,
    OutputLayerScale,
    initial_loss,
    max_class_probability,
    output_layer_for_plan,
    output_layer_scale,
)
from .variants.selfnorm import (
    AlphaDropout,
    MeanVarianceFixedPoint,
    SelfNormalization,
    alpha_dropout,
    mean_variance_jacobian,
    mean_variance_map,
    self_normalization,
)
from .meanfield.simulate import LayerMeasurement, Simulation, mean_field_trajectory, simulate_plan
from .variants.spectrum import (
    IsometryAdvice,
    JacobianSpectrum,
    dynamical_isometry,
    jacobian_spectrum,
)
from .variants.spectrum_sampling import SampledSpectrum, sample_jacobian_spectrum
from .init.draw import LayerArrays, PlanArrays, draw_plan
from .meanfield.core import propagation_arrays
from .meanfield.sweep import EdgeSweepResult, SweepResult, sweep, sweep_edge
from .errors import (
    ActivationTypeError,
    ComputationError,
    FormulaError,
    InvalidParameterError,
    PropcalcError,
    UnknownActivationError,
    install_hint,
)
from .activations import LIMITS as FORMULA_LIMITS, FormulaLimits, activation, formula_activation
from .activations import SERVICE_LIMITS as SERVICE_FORMULA_LIMITS, formula_activation_within, formula_limit_rows
from .caches import clear_caches
from .jsonable import jsonable
from .vocabulary import (
    EDGE_TOLERANCE,
    EDGE_BAND,
    NEUTRAL_TOLERANCE,
    BiasDistribution,
    Distribution,
    Phase,
    Target,
    VarianceStatus,
)
from .meanfield.maps import (
    chi_1,
    correlation_map,
    correlation_map_slope,
    variance_map,
    variance_map_slope,
)
from .numerics.quadrature import QuadratureRule, bivariate_expectation, gaussian_expectation
from .init.gains import Gains, gains
from .init.layers import Layer, LayerInit
from .init.plan import InitPlan
from .init.planner import recommend
from .init.network_plan import BlockInit, NetworkPlan, network_plan
from .init.torch_reader import ModuleBlock, ModuleReadError, ModuleReading, read_module
from .init.torch_measure import ModuleMeasurement, ModulePosition, measure_module
from .init.torch_network import AppliedLayer, ModulePlan, apply_network_plan, plan_module
from .networks import (
    BlockRecord,
    BranchWeight,
    branch_weight,
    Network,
    NetworkDescriptionError,
    NetworkPropagation,
    NetworkSimulation,
    NetworkSummary,
    network,
    network_propagation,
    simulate,
    simulate_network,
)
from .shaping import ShapedActivation, ShapingError, UnreachableTargetError, shape_activation
from .training import (FiniteWidth, Reason, Verdict, finite_width, layer_fluctuations,
                       network_verdict, trainability)
from .training import (LearningRateCeiling, NetworkTangentKernel, TangentKernel,
                       learning_rate_ceiling, network_tangent_kernel, tangent_kernel)

__version__ = "0.1.0"

__all__ = [
    "domains",
    "LayerArrays",
    "PlanArrays",
    "draw_plan",
    "EdgeSweepResult",
    "SweepResult",
    "propagation_arrays",
    "sweep",
    "sweep_edge",
    "DropoutPropagation",
    "DropoutSweep",
    "dropout_propagation",
    "dropout_sweep",
    "MaxMoments",
    "MaxoutLayer",
    "MaxoutPropagation",
    "max_moments",
    "maxout_layer",
    "maxout_propagation",
    "InitialLoss",
    "MaxProbability",
    "OutputLayerScale",
    "initial_loss",
    "max_class_probability",
    "output_layer_for_plan",
    "output_layer_scale",
    "AlphaDropout",
    "MeanVarianceFixedPoint",
    "SelfNormalization",
    "alpha_dropout",
    "mean_variance_jacobian",
    "mean_variance_map",
    "self_normalization",
    "LayerMeasurement",
    "Simulation",
    "mean_field_trajectory",
    "simulate",
    "simulate_plan",
    "IsometryAdvice",
    "JacobianSpectrum",
    "SampledSpectrum",
    "dynamical_isometry",
    "jacobian_spectrum",
    "sample_jacobian_spectrum",
    "Activation",
    "BiasDistribution",
    "Distribution",
    "EDGE_TOLERANCE",
    "EDGE_BAND",
    "NEUTRAL_TOLERANCE",
    "Phase",
    "Target",
    "VarianceStatus",
    "ActivationProperties",
    "ActivationTypeError",
    "ComputationError",
    "CriticalPoint",
    "FixedPoint",
    "FORMULA_LIMITS",
    "SERVICE_FORMULA_LIMITS",
    "formula_activation_within",
    "formula_limit_rows",
    "FormulaError",
    "FormulaLimits",
    "Gains",
    "InitPlan",
    "InvalidParameterError",
    "Layer",
    "LayerInit",
    "Propagation",
    "PropcalcError",
    "QuadratureRule",
    "UnknownActivationError",
    "VarianceFixedPoints",
    "activation",
    "bivariate_expectation",
    "builtin_names",
    "clear_caches",
    "chi_1",
    "correlation_map",
    "correlation_map_slope",
    "edge_of_chaos",
    "edge_of_chaos_at_bias",
    "edge_of_chaos_line",
    "edge_of_chaos_points",
    "DEFAULT_EDGE_Q_STARS",
    "formula_activation",
    "gains",
    "gaussian_expectation",
    "jsonable",
    "propagation",
    "recommend",
    "resolve",
    "nearest_name",
    "install_hint",
    "canonical_name",
    "ShapedActivation",
    "ShapingError",
    "UnreachableTargetError",
    "shape_activation",
    "LearningRateCeiling",
    "NetworkTangentKernel",
    "TangentKernel",
    "learning_rate_ceiling",
    "network_tangent_kernel",
    "tangent_kernel",
    "variance_fixed_points",
    "variance_map",
    "variance_map_slope",
    "BlockInit",
    "BlockRecord",
    "BranchWeight",
    "NetworkPlan",
    "branch_weight",
    "network_plan",
    "Network",
    "NetworkDescriptionError",
    "NetworkPropagation",
    "NetworkSimulation",
    "NetworkSummary",
    "network",
    "network_propagation",
    "simulate_network",
    "AppliedLayer",
    "ModuleBlock",
    "ModuleMeasurement",
    "ModulePlan",
    "ModulePosition",
    "ModuleReadError",
    "ModuleReading",
    "apply_network_plan",
    "measure_module",
    "plan_module",
    "read_module",
    "FiniteWidth",
    "Reason",
    "Verdict",
    "finite_width",
    "layer_fluctuations",
    "network_verdict",
    "trainability",
    "__version__",
]
