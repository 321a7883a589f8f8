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

Refused, with the reason (:class:`FiniteWidthUnsupportedError` naming the block's JSON
pointer): residual sums (the cross term ``x . F(x) / n`` between the stream and the branch
adds 1/n terms this chain does not carry), normalisation (the norm divides by the measured
second moment: its 1/n law is another one), dropout (the mask's binomial noise), convolution,
pooling and attention (the units of one position are not the whole layer), two activations in
a row, and dense blocks without a width.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from ..errors import PropcalcError, check_positive
from ..networks.blocks import ActivationBlock, Block, Dense, Repeat
from ..networks.description import Network, network as read_network
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from .finite_width import MAX_LAYERS, FiniteWidth, chain_laws, check_widths

__all__ = ["FiniteWidthUnsupportedError", "network_finite_width"]


class FiniteWidthUnsupportedError(PropcalcError, ValueError):
    """The finite-width laws are not available for this network (the message says why)."""


_WHY = {
    "residual": "a residual sum: the cross term x . F(x) / n between the stream and the branch "
                "adds 1/n terms that the chain of dense layers does not carry",
    "norm": "a normalisation divides by the measured second moment, a 1/n law of its own",
    "dropout": "dropout's binomial mask adds noise of its own",
    "convolution": "a convolution: the units of one position are not the whole layer",
    "pooling": "pooling: the units of one position are not the whole layer",
    "attention": "attention mixes positions: the units of one token are not the whole layer",
}


def _elementary(blocks: tuple[Block, ...], path: str, budget: list[int]
                ) -> Iterator[tuple[str, Block]]:
    for i, b in enumerate(blocks):
        where = f"{path}/{i}"
        if isinstance(b, Repeat):
            for _ in range(b.times):
                yield from _elementary(b.blocks, f"{where}/repeat/blocks", budget)
            continue
        budget[0] -= 1
        if budget[0] < 0:
            raise FiniteWidthUnsupportedError(f"more than {2 * MAX_LAYERS} blocks: beyond the "
                                              "deepest chain analysed")
        yield where, b


def network_finite_width(network: Any, q0: float = 1.0, *,
                         rule: QuadratureRule = DEFAULT_RULE) -> FiniteWidth:
    """Spread and drift of q and of gradient norms along a chain of dense layers of given widths.

    Parameters
    ----------
    network : Network or mapping
        A network of the covered form (module docstring).
    q0 : float
        Mean square of the input per unit (exact, as in :func:`propcalc.network_propagation`).

    Returns
    -------
    FiniteWidth
        Layer l is the l-th dense block's output (layer 0 the first).

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
    layers: list[tuple[Any, float, float]] = []
    widths: list[int] = []
    first: Dense | None = None
    pending: ActivationBlock | None = None
    for where, b in _elementary(net.blocks, "/blocks", [2 * MAX_LAYERS + 2]):
        if isinstance(b, Dense):
            if b.width is None:
                raise FiniteWidthUnsupportedError(f"the dense block at {where} gives no width")
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
