"""The trainability verdict for a network of blocks (:func:`network_verdict`).

The same :class:`~propcalc.training.verdict.Verdict` and reasons as a plain stack's
(:mod:`propcalc.training.verdict`), read from :func:`propcalc.network_propagation`'s summary,
:func:`propcalc.training.network_finite_width` and :mod:`propcalc.training.network_readout`.
"""

from __future__ import annotations

import math
from typing import Any

from ..errors import InvalidParameterError, PropcalcError
from ..networks.propagate import NetworkPropagation
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from .finite_width import FiniteWidth
from .network_finite_width import FiniteWidthUnsupportedError, network_finite_width
from .network_ntk import network_learning_rate_ceiling
from .ntk import UnsupportedKernelError
from .network_readout import network_readout
# the reasons' builders are shared with the plain-stack verdict (one implementation)
from .verdict import (GROWTH_LIMIT, Reason, Verdict, _assemble, _check_options, _finite_width,
                      _learning_rate, _not_computed, _output)

__all__ = ["network_verdict"]


def network_verdict(result: NetworkPropagation, learning_rate: Any = None, *,
                    loss: str | None = None, n_classes: int | None = None,
                    output_margin: float | None = None, batch_size: int | None = None,
                    momentum: float = 0.0,
                    rule: QuadratureRule = DEFAULT_RULE) -> Verdict:
    """The same verdict for a network of blocks, from its propagation and summary.

    Reasons from :attr:`NetworkPropagation.summary <propcalc.networks.NetworkSummary>`:
    ``correlation depth`` (two inputs that merge, 1 - c <= 1e-3, or lose their correlation, the
    power law along repeated blocks otherwise), ``gradient growth`` (the input's gradient against
    the output's, within GROWTH_LIMIT either way). The finite-width reasons come from
    :func:`propcalc.training.network_finite_width` where the network's dense blocks give their
    widths and its blocks are dense, activation, dropout, residual or layer / RMS norm blocks
    (the forms of :mod:`propcalc.training.network_laws`); for other networks they are "not computed" with
    the block and the reason (``propcalc network --check`` measures a network's finite-width
    deviations in seeded networks). The output layer: with ``loss`` and a dense last block (the
    readout, :mod:`propcalc.training.network_readout`), as for a plain plan.

    Parameters
    ----------
    result : NetworkPropagation
        From :func:`propcalc.network_propagation`.
    learning_rate : LearningRateCeiling, optional
        From :func:`propcalc.training.network_learning_rate_ceiling`: the learning-rate reason
        then has its number.
    loss : {"cross_entropy", "mse"}, optional
    n_classes, output_margin : optional
        Classes (default: the readout's width) and the allowed excess over ln K (1% of ln K).
    batch_size : int, optional
        With ``loss`` and without ``learning_rate``: the ceiling is computed here
        (:func:`propcalc.training.network_learning_rate_ceiling` of ``result.network`` at the
        propagation's q0, c0, c0_within, c0_between); a network it does not cover gets a
        "not computed" learning-rate reason that says why.
    momentum : float
        Heavy-ball momentum of that ceiling.

    Returns
    -------
    Verdict
    """
    if not isinstance(result, NetworkPropagation):
        raise InvalidParameterError("result", "a NetworkPropagation (propcalc."
                                    "network_propagation(...))", type(result).__name__)
    _check_options(learning_rate, output_margin)
    # every option takes effect or is refused: without a loss n_classes is unused, and momentum
    # only shapes the ceiling computed here (with batch_size)
    if loss is None and n_classes is not None:
        raise InvalidParameterError("n_classes", "absent when no loss is given (give loss=)",
                                    n_classes)
    if batch_size is None and momentum != 0.0:
        raise InvalidParameterError("momentum", "0 unless batch_size is given (it only shapes "
                                    "the learning-rate ceiling computed here)", momentum)
    lr_why = None
    if batch_size is not None:
        if loss is None:
            raise InvalidParameterError("batch_size", "absent when no loss is given", batch_size)
        if learning_rate is not None:
            raise InvalidParameterError("batch_size", "absent when learning_rate is given (it "
                                        "was computed with its own batch size)", batch_size)
        if result.network is None:
            lr_why = "the propagation carries no network"
        else:
            try:
                learning_rate = network_learning_rate_ceiling(
                    result.network, loss=loss, batch_size=batch_size, n_classes=n_classes,
                    q0=result.q0, input_correlation=result.c0, momentum=momentum,
                    c0_within=result.c0_within, c0_between=result.c0_between)
            except UnsupportedKernelError as err:
                lr_why = f"the tangent kernel is not computed for this network: {err}"
    s = result.summary
    n = len(result.q) - 1
    corr_findings = [f for f in s.findings if f.topic == "correlation"]
    laws = [law for law in s.depth_laws if law.quantity == "1 - c"]
    law_text = ""
    if laws:
        law = laws[0]
        law_text = (f"; along the copies of {law.path} 1 - c follows a power law "
                    f"(exponent {law.exponent:.3g}): no finite exponential depth scale"
                    if law.law == "power" else
                    f"; along the copies of {law.path} 1 - c changes by a factor "
                    f"{math.exp(law.exponent):.4g} per position")
    if corr_findings:
        first = min(corr_findings, key=lambda f: f.position or 0)
        corr = Reason("correlation depth", "position where two inputs merge or decorrelate",
                      float(first.position or 0), float(n), False, float(first.position or 0),
                      first.advice or None, first.message + law_text)
    else:
        cl = result.c[n]
        corr = Reason("correlation depth", "1 - c at the output", None if cl is None else 1 - cl,
                      s.distance, True, None, None,
                      f"{n} positions: two inputs neither merge (1 - c <= {s.distance:g}) nor "
                      f"lose their correlation (|c| <= {s.decorrelated:g}; both thresholds "
                      f"ours, no source){law_text}")
    g0 = s.gradient_input
    if g0 is None or not math.isfinite(g0):
        grow = _not_computed("gradient growth", "input gradient / output gradient",
                             "the gradient is not known at the input (see the notes)")
    else:
        ok = 1.0 / GROWTH_LIMIT <= g0 <= GROWTH_LIMIT
        advice = next((f.advice for f in s.findings if f.topic == "gradient"), "")
        grow = Reason("gradient growth", "input gradient / output gradient (squared norms)", g0,
                      GROWTH_LIMIT, ok, None,
                      None if ok else (advice or "move towards the edge of chaos"),
                      f"squared gradient norms change by a factor {g0:.3g} from the output to "
                      f"the input over {n} positions; the limit is a factor e^6 = "
                      f"{GROWTH_LIMIT:.0f} either way, what 6 xi_c layers allow in the ordered "
                      "phase of a plain stack (Schoenholz et al. 2017)")
    plain = "computed for plain stacks: recommend(act, widths=..., loss=...)"
    reasons = [corr, grow, _learning_rate(learning_rate) if learning_rate is not None else
               _not_computed("learning rate", "ceiling 2 / lambda_max", lr_why or (
                   plain + ", network_learning_rate_ceiling(network, loss=...) or "
                   "network_verdict(..., loss=..., batch_size=...)"))]
    fw: FiniteWidth | None = None
    why = None
    try:
        if result.network is None:
            raise FiniteWidthUnsupportedError("the propagation carries no network")
        fw = network_finite_width(result.network, result.q0)
    except PropcalcError as err:  # FiniteWidthUnsupportedError names the block and the reason
        why = (f"{err}; the finite-width laws cover dense blocks with widths, activations, "
               "dropout, residual blocks and layer / RMS norms "
               "(propcalc.training.network_laws); "
               "propcalc network --check measures a network's finite-width deviations in "
               "seeded networks")
    reasons += _finite_width(fw, why)
    out = network_readout(result, loss, n_classes)
    reasons.append(_output(loss, out.n_classes, out.logit_variance, out.penultimate,
                           output_margin, rule) if out.why is None else
                   _not_computed("output layer", "expected initial loss above ln K", out.why))
    return _assemble(n, reasons)
