"""The finite-width check of a described network: simulation and mean-field prediction together.

:func:`simulate_network` measures seeded finite-width networks
(:func:`propcalc.networks.simulate.measure_network`) and compares every position with
:func:`propcalc.network_propagation`; :func:`simulate` is the public ``propcalc.simulate``,
which takes a network description or, as before, one activation for a plain stack.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from ..meanfield.simulate import simulate as simulate_activation
from .blocks import Network
from .propagate import network_propagation
from .simulate import NetworkSimulation, measure_network

__all__ = ["simulate_network", "simulate"]


def _prediction(net: Network, q0: float, c0: float, cw: float,
                cb: float) -> Sequence[tuple[float | None, float | None, float | None]]:
    p = network_propagation(net, q0, c0, c0_within=cw, c0_between=cb, simulate=False)
    return list(zip(p.q, p.c, p.gradient))


def simulate_network(description: Any, *, q0: float = 1.0, c0: float = 0.5,
                     c0_within: float = 0.0, c0_between: float = 0.0, width: int | None = None,
                     grid: Any = None, inputs: int = 4, repetitions: int = 8, seed: int = 0,
                     tolerance: float = 0.05, compare: bool = True) -> NetworkSimulation:
    """Simulate a described network at finite width and compare with its mean-field prediction.

    Parameters are those of :func:`propcalc.networks.simulate.measure_network`; ``compare``
    adds the prediction of :func:`propcalc.network_propagation` and the in-band flags at
    every position where the Gaussian recursion gives one.

    Returns
    -------
    NetworkSimulation
    """
    return measure_network(description, q0=q0, c0=c0, c0_within=c0_within,
                           c0_between=c0_between, width=width, grid=grid, inputs=inputs,
                           repetitions=repetitions, seed=seed, tolerance=tolerance,
                           predict=_prediction if compare else None)


def simulate(first: Any, *args: Any, **kwargs: Any) -> Any:
    """Finite-width check: of a network description (:func:`simulate_network`) or, as before,
    of a plain stack of one activation (:func:`propcalc.meanfield.simulate.simulate`)."""
    if isinstance(first, Network) or (isinstance(first, dict) and "blocks" in first):
        return simulate_network(first, *args, **kwargs)
    return simulate_activation(first, *args, **kwargs)
