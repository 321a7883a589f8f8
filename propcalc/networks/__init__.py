"""Networks as people build them: blocks, their description, and signal propagation through them.

* :mod:`~propcalc.networks.fields`: the description format (every block kind, its fields, types,
  defaults and limits) and its JSON Schema;
* :mod:`~propcalc.networks.blocks`: the validated blocks and :class:`Network`;
* :mod:`~propcalc.networks.description`: :func:`network`, the validator;
* :mod:`~propcalc.networks.kernels`, :mod:`~propcalc.networks.rules`,
  :mod:`~propcalc.networks.walk`: the moments, the rule of every block kind, the walk;
* :mod:`~propcalc.networks.propagate`: :func:`network_propagation` and its result;
* :mod:`~propcalc.networks.summary`, :mod:`~propcalc.networks.spatial`: what it means;
* :mod:`~propcalc.networks.targets`: the residual branch weight for a target;
* :mod:`~propcalc.networks.simulate`, :mod:`~propcalc.networks.sim_blocks`: seeded
  finite-width networks of a description; :mod:`~propcalc.networks.check` compares them
  position by position with the prediction (``propcalc.simulate``).
"""

from __future__ import annotations

from .blocks import (
    ActivationBlock,
    Attention,
    Convolution,
    Dense,
    Dropout,
    Network,
    Norm,
    Pooling,
    PositionInfo,
    Repeat,
    Residual,
)
from .description import NetworkDescriptionError, network
from .fields import (
    MAX_DESCRIBED_BLOCKS,
    MAX_EXPANDED_BLOCKS,
    MAX_NESTING,
    MAX_POSITIONS,
    description_fields,
    description_schema,
)
from .propagate import BlockRecord, NetworkPropagation, network_propagation
from .check import simulate, simulate_network
from .simulate import NetworkSimulation, SimulatedPosition
from .spatial import SpatialDamping
from .summary import DepthLaw, Finding, NetworkSummary
from .targets import BranchWeight, branch_weight

__all__ = [
    "MAX_DESCRIBED_BLOCKS",
    "MAX_EXPANDED_BLOCKS",
    "MAX_NESTING",
    "MAX_POSITIONS",
    "BranchWeight",
    "branch_weight",
    "BlockRecord",
    "DepthLaw",
    "Finding",
    "NetworkPropagation",
    "NetworkSimulation",
    "NetworkSummary",
    "SimulatedPosition",
    "SpatialDamping",
    "network_propagation",
    "simulate",
    "simulate_network",
    "ActivationBlock",
    "Attention",
    "Convolution",
    "Dense",
    "Dropout",
    "Network",
    "NetworkDescriptionError",
    "Norm",
    "Pooling",
    "PositionInfo",
    "Repeat",
    "Residual",
    "description_fields",
    "description_schema",
    "network",
]
