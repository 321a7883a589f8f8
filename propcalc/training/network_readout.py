"""The readout of a network of blocks: what the output-layer reason of the verdict needs.

When the last elementary block (once repeats are written out) is a dense block, it is the
readout: its output's per-unit second moment is the variance of each logit (or MSE output) at
initialisation, ``sigma_w2 q_in + sigma_b2`` with ``q_in`` the second moment of the stream that
feeds it (Poole et al. 2016, eq. 3, without an activation after it), and ``q_in`` is what
:func:`propcalc.variants.output_layer.output_layer_scale` needs to scale the readout, exactly
as the plain plan uses it. Any other last block is not a readout (the reason says so).
"""

from __future__ import annotations

from dataclasses import dataclass

from ..errors import InvalidParameterError, check_int
from ..networks.blocks import Dense, Repeat
from ..networks.propagate import NetworkPropagation

__all__ = ["LOSS_NAMES", "Readout", "network_readout"]

#: the losses the output-layer reason knows
LOSS_NAMES = ("cross_entropy", "mse")


@dataclass(frozen=True)
class Readout:
    """What the output-layer reason reads from a network (``why`` set when it cannot).

    Attributes
    ----------
    logit_variance : float or None
        The readout's output second moment per unit.
    penultimate : float or None
        The second moment of the stream that feeds the readout.
    n_classes : int or None
    why : str or None
        Why the output-layer reason cannot be computed.
    """

    logit_variance: float | None
    penultimate: float | None
    n_classes: int | None
    why: str | None = None


def network_readout(result: NetworkPropagation, loss: str | None,
                    n_classes: int | None) -> Readout:
    """The readout of ``result``'s network for ``loss`` (None: the reason is not computed).

    Parameters
    ----------
    result : NetworkPropagation
    loss : {"cross_entropy", "mse"} or None
    n_classes : int, optional
        For cross-entropy; by default the readout's width.

    Returns
    -------
    Readout

    Raises
    ------
    InvalidParameterError
        For an unknown loss, a bad ``n_classes``, or one that contradicts the readout's width.
    """
    if loss is None:
        return Readout(None, None, None, "no loss given (network_verdict(..., loss=...))")
    if loss not in LOSS_NAMES:
        raise InvalidParameterError("loss", f"one of {', '.join(LOSS_NAMES)}", loss)
    k = None if n_classes is None else check_int("n_classes", n_classes, 2, 10**6)
    net = result.network
    last = net.blocks[-1] if net is not None and net.blocks else None
    while isinstance(last, Repeat):
        last = last.blocks[-1]
    if not isinstance(last, Dense):
        kind = getattr(last, "KIND", "no block")
        return Readout(None, None, None, f"the last block is {kind}, not a dense readout")
    if loss == "cross_entropy":
        if k is None and last.width is None:
            return Readout(None, None, None, "no n_classes and the readout gives no width")
        if k is not None and last.width is not None and k != last.width:
            raise InvalidParameterError("n_classes", f"the readout's width ({last.width})", k)
        k = k if k is not None else last.width
    q_out, q_in = result.q[-1], result.q[-2]
    if q_out is None or q_in is None:
        return Readout(None, None, k, "the readout's second moment is not known (see the notes)")
    return Readout(float(q_out), float(q_in), k)
