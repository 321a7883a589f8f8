"""Networks as people build them: blocks, their description, and signal propagation through them.

* :mod:`~propcalc.networks.fields`: the description format (every block kind, its fields, types,
  defaults and limits) and its JSON Schema;
* :mod:`~propcalc.networks.blocks`: the validated blocks and :class:`Network`;
* :mod:`~propcalc.networks.description`: :func:`network`, the validator.
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
from .fields import description_fields, description_schema

__all__ = [
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
