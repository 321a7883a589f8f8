"""Finite width along a network of blocks: the spread and drift of q and of gradient norms.

Covered: a network whose blocks, once repeats are written out, form a chain
``dense, activation, dense, activation, ..., dense`` (a trailing activation allowed), every
dense block giving its ``width``; the layers may differ in activation, sigma_w2, sigma_b2 and
width. Each dense output is a layer of :mod:`propcalc.training.finite_width`'s Markov chain
``s_{l+1} = sigma_w2 (1/n_l) sum_j phi_l(h^l_j)^2 + sigma_b2``, whose first-order laws are
taken layer by layer (:func:`~propcalc.training.finite_width.chain_laws`; Hanin & Nica 2019;
Roberts, Yaida & Hanin 2022). The input enters with its exact mean square q0 (as
:func:`propcalc.simulate` draws it), so layer 0 has conditional variance
``sigma_w2 q0 + sigma_b2`` exactly.

Every other network goes to :mod:`propcalc.training.network_laws` (residual blocks, layer and
RMS norms, the positions between them; the derivation is in
:mod:`propcalc.training.block_laws`), which refuses, with the block's JSON pointer and the
reason (:class:`FiniteWidthUnsupportedError`), what it does not cover: batch norm, convolution,
pooling and attention, nested residual blocks, branches that end in an activation, an
activation after a residual sum or a norm, orthogonal weights, dense blocks without a width.
"""

from __future__ import annotations

from typing import Any

from ..errors import check_positive
from ..networks.blocks import ActivationBlock, Block, Dense, Repeat
from ..networks.description import Network
from ..networks.description import network as read_network
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from .finite_width import MAX_LAYERS, FiniteWidth, chain_laws, check_widths
from .network_laws import _WHY, FiniteWidthUnsupportedError, _elementary, network_laws

__all__ = ["FiniteWidthUnsupportedError", "network_finite_width"]


def _plain(blocks: tuple[Block, ...]) -> bool:
    """Only dense and activation blocks (repeats looked into, not expanded)."""
    return all(_plain(b.blocks) if isinstance(b, Repeat) else isinstance(b, (Dense, ActivationBlock))
               for b in blocks)


def network_finite_width(network: Any, q0: float = 1.0, *,
                         rule: QuadratureRule = DEFAULT_RULE) -> FiniteWidth:
    """Spread and drift of q and of gradient norms along a network of blocks of given widths.

    Parameters
    ----------
    network : Network or mapping
        A network of the covered form (module docstring).
    q0 : float
        Mean square of the input per unit (exact, as in :func:`propcalc.network_propagation`).

    Returns
    -------
    FiniteWidth
        For a plain chain, layer l is the l-th dense block's output (layer 0 the first). Otherwise
        the recorded positions are the outputs of the stream's dense blocks, residual blocks and
        norms, in order (the input first when the network does not start with a dense block).

    Raises
    ------
    FiniteWidthUnsupportedError
        For a network outside the covered form, naming the block and the reason.

    Examples
    --------
    >>> d = {"blocks": [{"dense": {"sigma_w2": 1.0, "sigma_b2": 0.0, "width": 100}},
    ...     {"repeat": {"times": 10, "blocks": [{"activation": "relu"},
    ...                 {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0, "width": 100}}]}}]}
    >>> round(network_finite_width(d).gradient_spread ** 2, 6)  # 5 beta (Hanin & Nica 2019)
    0.5
    """
    net = network if isinstance(network, Network) else read_network(network)
    qi = check_positive("q0", q0)
    if _plain(net.blocks):
        return _chain(net, qi, rule)
    return network_laws(net, qi, rule)


def _chain(net: Network, qi: float, rule: QuadratureRule) -> FiniteWidth:
    """The plain chain dense, activation, dense, ... (finite_width.chain_laws)."""
    layers: list[tuple[Any, float, float]] = []
    widths: list[int] = []
    first: Dense | None = None
    pending: ActivationBlock | None = None
    for where, b in _elementary(net.blocks, "/blocks", [2 * MAX_LAYERS + 2]):
        if isinstance(b, Dense):
            if b.width is None:
                raise FiniteWidthUnsupportedError(f"the dense block at {where} gives no width")
            if b.weights != "gaussian":
                raise FiniteWidthUnsupportedError(f"the dense block at {where}: {_WHY['orthogonal']}")
            if first is None:
                first = b
            elif pending is None:
                raise FiniteWidthUnsupportedError(f"two dense blocks in a row at {where}: no "
                                                  "activation between them")
            else:
                layers.append((pending.activation, b.sigma_w2, b.sigma_b2))
            widths.append(b.width)
            pending = None
        elif isinstance(b, ActivationBlock):
            if first is None:
                raise FiniteWidthUnsupportedError(f"the activation at {where} comes before the "
                                                  "first dense block")
            if pending is not None:
                raise FiniteWidthUnsupportedError(f"two activations in a row at {where}")
            pending = b
        else:
            kind = getattr(b, "KIND", type(b).__name__)
            raise FiniteWidthUnsupportedError(f"the {kind} block at {where}: "
                                              f"{_WHY.get(kind, 'not a dense layer')}")
    if first is None or not layers:
        raise FiniteWidthUnsupportedError("fewer than two dense blocks: nothing accumulates over "
                                          "depth")
    ws = check_widths(widths)
    return chain_laws([(a, sw, sb) for a, sw, sb in layers], ws,
                      first.sigma_w2 * qi + first.sigma_b2, rule)
