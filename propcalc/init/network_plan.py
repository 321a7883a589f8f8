"""An initialisation plan for a described network: every weight block, and the residual weight.

For every dense or convolution block the rule of :func:`propcalc.recommend` for the
activation around it, so a plain stack gets exactly the plain plan:

* its input comes from an activation phi (through dropout only): the hidden-layer
  (sigma_w2, sigma_b2) of ``recommend(phi, ...)``, at the edge of chaos (Schoenholz
  et al. 2017; Poole et al. 2016);
* otherwise (the network input, a normalisation, a residual sum...), if an
  activation phi follows it (through dropout only), recommend's first-layer rule: the
  bias of the plan and ``sigma_w2 = (q* - sigma_b2) / q_in`` with q_in the second
  moment of the stream entering the block, so its output starts at phi's q*;
* otherwise (a normalisation, a residual sum or nothing follows) the block is kept as described.

Convolutions may be given delta-orthogonal kernels (Xiao et al. 2018): the same
sigma_w2 at the centre tap, every spatial mode at the dense rate. Attention blocks are
kept. With ``target`` the residual branch weight comes from
:func:`propcalc.networks.targets.branch_weight`.

A block inside a repeat has one value for all its copies; when the first copy's rule
differs (it follows the network input rather than an activation), the first copy is
written out before the repeat.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any

from .. import domains
from ..activations.base import Activation
from ..errors import InvalidParameterError, PropcalcError
from ..networks.blocks import (
    ActivationBlock,
    Block,
    Convolution,
    Dense,
    Dropout,
    Network,
    Repeat,
    Residual,
)
from ..networks.description import network as parse_network
from ..networks.propagate import check_inputs, network_propagation
from ..networks.rules import Stream
from ..networks.summary import NetworkSummary
from ..networks.targets import (
    BranchWeight,
    branch_weight,
    check_max_gradient,
    with_branch_weight,
)
from ..networks.walk import Trace, trace
from ..results import OMIT, Result
from ..training.learning_rate import LOSSES, LearningRateCeiling
from ..training.network_ntk import network_learning_rate_ceiling
from ..training.ntk import UnsupportedKernelError
from ..variants.output_layer import OutputLayerScale
from .network_readout_plan import plan_readout
from .plan import InitPlan
from .planner import recommend
from .training_plan import refuse_without_loss

__all__ = ["BlockInit", "NetworkPlan", "network_plan"]

Key = tuple[str, tuple[int, ...]]


@dataclass(frozen=True)
class BlockInit(Result):
    """The planned initialisation of one weight block (all its copies, or the first one).

    Attributes
    ----------
    path : str
        JSON pointer of the block in the given description.
    copies : str
        "all", "first" (the first copy of the innermost repeat) or "rest".
    kind : str
    sigma_w2, sigma_b2 : float
    weights : str
        "gaussian", "orthogonal" or "delta_orthogonal".
    fan_in : int or None
        Known fan-in (width of the stream entering times the kernel taps).
    weight_std : float or None
        ``sqrt(sigma_w2 / fan_in)`` for Gaussian weights.
    rule : str
        Which rule set the values.
    """

    path: str
    copies: str
    kind: str
    sigma_w2: float
    sigma_b2: float
    weights: str
    fan_in: int | None
    weight_std: float | None
    rule: str


@dataclass(frozen=True)
class NetworkPlan(Result):
    """A plan for a network: the weight blocks, the residual weight and what they give.

    Attributes
    ----------
    blocks : tuple of BlockInit
    branch_weight : BranchWeight or None
        The residual weight search (when a target was given).
    description : dict
        The planned network's description.
    summary : NetworkSummary
        The summary of the planned network's propagation.
    output_c, input_gradient : float or None
        Correlation at the output and the input's gradient relative to the output's, for
        the planned network.
    notes : tuple of str
    loss : str or None
        The loss the learning rate is planned for (None without one).
    learning_rate_ceiling, learning_rate : float or None
        ``2 (1 + momentum) / lambda_max`` of the planned network and half of it
        (:func:`propcalc.training.network_learning_rate_ceiling`); None without a loss, and
        None where the tangent kernel is not computed (``learning_rate_note`` says why).
    learning_rate_note : str or None
        With a loss and no ceiling: why not, naming the block by its JSON pointer in the
        given description (attention whose logits spread, max pooling, batch norm of a stream
        with several positions, an output with several positions...). The initialisation
        planned stands.
    learning_rate_details : LearningRateCeiling or None
        The curvature behind them (Python only; the notes say the numbers).
    output_layer : str or None
        With a loss: how the readout (the last block, when it is a dense block) is planned, as
        the plain plan's ``output_layer`` says it ("scaled for cross-entropy: ...", "scaled for
        MSE: ...", "as the hidden layers (scale_output=False)"), or "not scaled: " and why
        (the last block is not a dense readout...). None without a loss.
    output_layer_scale : OutputLayerScale or None
        The cross-entropy analysis of the readout (expected initial loss, largest class
        probability, what the hidden scale gives), as in the plain plan.
    """

    blocks: tuple[BlockInit, ...]
    branch_weight: BranchWeight | None
    description: dict[str, Any]
    summary: NetworkSummary
    output_c: float | None
    input_gradient: float | None
    notes: tuple[str, ...] = ()
    loss: str | None = None
    learning_rate_ceiling: float | None = None
    learning_rate: float | None = None
    learning_rate_note: str | None = None
    learning_rate_details: LearningRateCeiling | None = field(default=None, repr=False,
                                                             metadata=OMIT)
    output_layer: str | None = None
    output_layer_scale: OutputLayerScale | None = None


class _Planner:
    def __init__(self, distribution: str, q_star: float | None) -> None:
        self.distribution = distribution
        self.q_star = q_star
        self.plans: dict[int, InitPlan] = {}
        self.values: dict[Key, tuple[float, float, str]] = {}

    def plan(self, act: Activation) -> InitPlan:
        if id(act) not in self.plans:
            self.plans[id(act)] = recommend(act, 2, distribution=self.distribution,
                                            q_star=self.q_star)
        return self.plans[id(act)]

    def walk(self, blocks: tuple[Block, ...], streams: list[Stream], steps: list[Any],
             prefix: str, copies: tuple[int, ...], start: int,
             prev: Activation | None) -> tuple[int, Activation | None]:
        """Visit blocks from position ``start`` of ``streams`` (streams[i] is the input of
        the i-th visited block); returns the next position and the activation in effect."""
        i = start
        for j, b in enumerate(blocks):
            path = f"{prefix}/{j}"
            if isinstance(b, Repeat):
                for r in range(b.times):
                    i, prev = self.walk(b.blocks, streams, steps, f"{path}/repeat/blocks",
                                        copies + (r,), i, prev)
                continue
            if isinstance(b, Residual):
                inner = list(steps[i].branch)
                sub = [streams[i]] + [s.stream for s in inner]
                self.walk(b.branch, sub, inner, f"{path}/residual/branch", copies, 0, None)
                prev = None
            elif isinstance(b, ActivationBlock):
                prev = b.activation
            elif isinstance(b, (Dense, Convolution)):
                self.values[(path, copies)] = self.rule(b, blocks[j + 1:], streams[i], prev,
                                                        path)
                prev = None
            elif not isinstance(b, Dropout):
                prev = None
            i += 1
        return i, prev

    def rule(self, b: Dense | Convolution, after: tuple[Block, ...], stream: Stream,
             prev: Activation | None, path: str) -> tuple[float, float, str]:
        if prev is not None:
            p = self.plan(prev)
            return (p.sigma_w2, p.sigma_b2,
                    f"hidden layer after {prev.label}: {p.target_description}")
        nxt = _next_activation(after)
        if nxt is None:
            return b.sigma_w2, b.sigma_b2, "kept (no activation follows it directly)"
        p = self.plan(nxt)
        q_in = stream.q
        if not math.isfinite(q_in):  # an unknown stream (after max pooling...): q is NaN
            return (b.sigma_w2, b.sigma_b2, ("kept (the second moment of the stream entering "
                    "it is not known: the Gaussian recursion does not hold there)"))
        if p.q_star is None or q_in <= 0.0 or p.q_star <= p.sigma_b2:
            return b.sigma_w2, b.sigma_b2, "kept (no variance fixed point to aim at)"
        sw = domains.check_planned(
            "sigma_w2", (p.q_star - p.sigma_b2) / q_in, path,
            f"the stream entering it has second moment {q_in:.3g} (q0 or a norm's gain) and "
            f"its output should start at q* = {p.q_star:.4g}")
        return (sw, p.sigma_b2,
                (f"first layer before {nxt.label}: its output starts at q* = {p.q_star:.4g} "
                 f"for an input of second moment {q_in:.4g}"))


def _next_activation(after: tuple[Block, ...]) -> Activation | None:
    for b in after:
        if isinstance(b, ActivationBlock):
            return b.activation
        if not isinstance(b, Dropout):
            return None
    return None


def _rewrite(blocks: tuple[Block, ...], prefix: str, copies: tuple[int, ...],
             values: dict[Key, tuple[float, float, str]], conv_weights: str,
             out_inits: list[BlockInit], widths: dict[str, int | None], tag: str) -> list[Block]:
    """The planned blocks; repeats whose first copy differs are split."""
    out: list[Block] = []
    for j, b in enumerate(blocks):
        path = f"{prefix}/{j}"
        if isinstance(b, Repeat):
            inner = f"{path}/repeat/blocks"
            first = _rewrite(b.blocks, inner, copies + (0,), values, conv_weights, [], widths, "")
            if b.times == 1:
                out.append(replace(b, blocks=tuple(_rewrite(
                    b.blocks, inner, copies + (0,), values, conv_weights, out_inits, widths,
                    tag))))
                continue
            rest = _rewrite(b.blocks, inner, copies + (1,), values, conv_weights, [], widths, "")
            if _same(first, rest):
                out.append(replace(b, blocks=tuple(_rewrite(
                    b.blocks, inner, copies + (1,), values, conv_weights, out_inits, widths,
                    tag or "all"))))
            else:
                out.extend(_rewrite(b.blocks, inner, copies + (0,), values, conv_weights,
                                    out_inits, widths, "first"))
                out.append(replace(b, times=b.times - 1, blocks=tuple(_rewrite(
                    b.blocks, inner, copies + (1,), values, conv_weights, out_inits, widths,
                    "rest"))))
        elif isinstance(b, Residual):
            out.append(replace(b, branch=tuple(_rewrite(
                b.branch, f"{path}/residual/branch", copies, values, conv_weights, out_inits,
                widths, tag))))
        elif isinstance(b, (Dense, Convolution)) and (path, copies) in values:
            sw, sb, rule = values[(path, copies)]
            kind = b.weights
            if isinstance(b, Convolution) and conv_weights == "delta_orthogonal":
                kind = "delta_orthogonal"
            new = replace(b, sigma_w2=sw, sigma_b2=sb, weights=kind)
            seen = widths.get(path) or [None]
            fan = seen[0] if tag == "first" else seen[-1]
            if fan is not None and isinstance(b, Convolution) and kind == "gaussian":
                fan *= b.taps
            std = (sw / fan) ** 0.5 if (fan and kind == "gaussian") else None
            out_inits.append(BlockInit(path, tag or "all", b.KIND, sw, sb, kind, fan, std, rule))
            out.append(new)
        else:
            out.append(b)
    return out


def _same(a: list[Block], b: list[Block]) -> bool:
    """Equal blocks, sigma_w2 and sigma_b2 compared to 1e-12 relative (a normalised stream's
    second moment is 1 up to rounding, which must not split a repeat)."""
    if len(a) != len(b):
        return False
    for x, y in zip(a, b):
        if isinstance(x, (Dense, Convolution)) and type(x) is type(y):
            if not all(abs(u - v) <= 1e-12 * max(abs(u), abs(v)) for u, v in
                       ((x.sigma_w2, y.sigma_w2), (x.sigma_b2, y.sigma_b2))):  # type: ignore[union-attr]
                return False
            if replace(x, sigma_w2=1.0, sigma_b2=0.0) != replace(y, sigma_w2=1.0, sigma_b2=0.0):
                return False
        elif isinstance(x, Repeat) and isinstance(y, Repeat):
            if x.times != y.times or not _same(list(x.blocks), list(y.blocks)):
                return False
        elif isinstance(x, Residual) and isinstance(y, Residual):
            if (x.weight, x.shortcut) != (y.weight, y.shortcut) or not _same(list(x.branch),
                                                                             list(y.branch)):
                return False
        elif x != y:
            return False
    return True


def _fan_ins(net: Network) -> dict[str, list[int | None]]:
    """The widths of the stream entering each weight block (by path, in the order of the
    first and second walk through repeats), when known."""
    out: dict[str, list[int | None]] = {}

    def walk(blocks: tuple[Block, ...], prefix: str, width: int | None) -> int | None:
        for j, b in enumerate(blocks):
            path = f"{prefix}/{j}"
            if isinstance(b, Repeat):
                width = walk(b.blocks, f"{path}/repeat/blocks", width)
                width = walk(b.blocks, f"{path}/repeat/blocks", width)
            elif isinstance(b, Residual):
                walk(b.branch, f"{path}/residual/branch", width)
            elif isinstance(b, (Dense, Convolution)):
                out.setdefault(path, []).append(width)
                width = b.width if b.width is not None else width
            elif hasattr(b, "tokens"):
                width = getattr(b, "width", None) or width
        return width

    walk(net.blocks, "/blocks", net.input_width)
    return out


def network_plan(network: Any, *, q0: float = 1.0, c0: float = 0.0, target: float | None = None,
                 max_gradient: float | None = 10.0, distribution: str = "gaussian",
                 convolution: str = "gaussian", q_star: float | None = None,
                 loss: str | None = None, n_classes: int | None = None,
                 batch_size: int | None = None, momentum: float = 0.0,
                 input_correlation: float | None = None, c0_within: float = 0.0,
                 c0_between: float = 0.0, scale_output: bool = True) -> NetworkPlan:
    """Plan the initialisation of every weight block of a network (and its residual weight).

    Parameters
    ----------
    network : Network or mapping
    q0, c0 : float
        The inputs (second moment; the correlation used for the residual target).
    c0_within, c0_between : float
        With pooling or attention: the input's correlation between two positions of one input
        and of the two inputs (as for :func:`propcalc.network_propagation`); they enter the
        planned propagation, the residual target and the learning-rate ceiling.
    target : float, optional
        Output correlation not to exceed for two inputs at c0; sets every residual
        branch weight (:func:`propcalc.networks.targets.branch_weight`).
    max_gradient : float or None
        With ``target``: also keep the input's gradient within this factor of the
        output's (default 10, the summary's factor; None: no bound).
    distribution : str
        "gaussian" or "orthogonal" weights for dense blocks.
    convolution : str
        "gaussian" or "delta_orthogonal" kernels.
    q_star : float, optional
        Preferred variance fixed point on the edge of chaos (as for recommend).
    loss : str, optional
        "cross_entropy" or "mse": the plan then scales the readout for the loss (unless
        ``scale_output`` is False) when the last block is a dense block, with the plain plan's
        rule (:mod:`propcalc.init.network_readout_plan`; ``output_layer`` says how, or why
        not), and carries the learning-rate ceiling of the planned network, readout included
        (:func:`propcalc.training.network_learning_rate_ceiling`), or, where its tangent kernel
        is not computed, ``learning_rate_note`` saying why by path (the plan itself is still
        made). With ``target`` the residual weight is searched with the readout at the hidden
        scale, then the readout is scaled.
    n_classes : int, optional
        Must equal the output width when given (default: the readout's width).
    batch_size : int, optional
        Required with a loss.
    momentum : float
        Heavy-ball momentum in [0, 1).
    input_correlation : float, optional
        The inputs' pairwise correlation for the batch kernel (default c0).
    scale_output : bool
        With a loss, scale the readout for it (default True); False keeps the hidden scale.

    Returns
    -------
    NetworkPlan
    """
    net = parse_network(network)
    if distribution not in ("gaussian", "orthogonal"):
        raise InvalidParameterError("distribution", 'one of "gaussian", "orthogonal"', distribution)
    if convolution not in ("gaussian", "delta_orthogonal"):
        raise InvalidParameterError("convolution", 'one of "gaussian", "delta_orthogonal"',
                                    convolution)
    q0, c0, cw, cb = check_inputs(q0, c0, c0_within, c0_between, net.uses_positions(),
                                  net.has_positions())
    pos = {"c0_within": cw, "c0_between": cb}
    check_max_gradient(max_gradient)  # checked even without a target (where it is unused)
    notes: list[str] = []
    found: BranchWeight | None = None
    if target is not None:
        planned = _planned(net, q0, c0, pos, distribution, convolution, q_star)[0]
        # the layers first (they set the branch's maps), then the weight, then the layers
        # again (a first layer's scale depends on the stream entering it)
        for _ in range(2):
            found = branch_weight(planned, target, max_gradient=max_gradient, q0=q0, c0=c0,
                                  **pos)
            if found.weight is None or found.unbounded:
                break
            net = with_branch_weight(net, found.weight)
            planned = _planned(net, q0, c0, pos, distribution, convolution, q_star)[0]
        assert found is not None
        notes.append(found.message)
        if found.weight is None or found.unbounded:
            notes.append("the residual weights are kept as described")
    planned, inits = _planned(net, q0, c0, pos, distribution, convolution, q_star)
    result = network_propagation(planned, q0, c0, simulate=False, **pos)
    ceiling, why, readout = None, None, None
    if loss is None:
        refuse_without_loss(momentum, n_classes=n_classes, batch_size=batch_size,
                            input_correlation=input_correlation)
        if scale_output is not True:
            raise InvalidParameterError("scale_output", "True when no loss is given (give loss=)",
                                        scale_output)
    else:
        if loss not in LOSSES:  # before batch_size: a misspelt loss is named first
            raise InvalidParameterError("loss", f"one of {', '.join(LOSSES)}", loss)
        if batch_size is None:
            raise InvalidParameterError("batch_size", "given when a loss is given", None)
        if not isinstance(scale_output, bool):
            raise InvalidParameterError("scale_output", "True or False", scale_output)
        # the readout first: the ceiling is that of the network with its planned readout
        readout = plan_readout(net, planned, result, inits, loss, n_classes,
                               scale_output=scale_output)
        notes.append(f"output layer: {readout.description}")
        notes.extend(readout.notes)
        if readout.changed:
            planned, inits = readout.network, list(readout.inits)
            result = network_propagation(planned, q0, c0, simulate=False, **pos)
        options = dict(loss=loss, batch_size=batch_size, n_classes=n_classes, q0=q0,
                       input_correlation=c0 if input_correlation is None else input_correlation,
                       momentum=momentum, **pos)
        try:
            ceiling = network_learning_rate_ceiling(planned, **options)
        except UnsupportedKernelError as err:
            why = "the tangent kernel is not computed for this network: " + (
                _refusal(net, options) or f"{err} (a path in the planned description)")
            notes.append(f"learning rate not computed: {why}")
        else:
            notes.append(f"learning rate: ceiling {ceiling.learning_rate_ceiling:.4g} (2 (1 + "
                         f"momentum) / lambda_max, lambda_max = {ceiling.lambda_max:.4g}); "
                         f"recommended {ceiling.learning_rate:.4g} "
                         f"({ceiling.learning_rate_rule})")
    return NetworkPlan(tuple(inits), found, planned.describe(), result.summary, result.c[-1],
                       result.gradient[0], tuple(notes), loss,
                       None if ceiling is None else ceiling.learning_rate_ceiling,
                       None if ceiling is None else ceiling.learning_rate, why, ceiling,
                       None if readout is None else readout.description,
                       None if readout is None else readout.scale)


def _refusal(net: Network, options: dict[str, Any]) -> str | None:
    """Why the kernel of the given network is refused, with the paths of the given description
    (the planned one may write out the first copy of a repeat before it, moving the paths).

    The refusals depend on the kinds and the layout of the blocks, which planning keeps, so
    the given network is refused as the planned one was; None if it were not."""
    try:
        network_learning_rate_ceiling(net, **options)
    except UnsupportedKernelError as err:
        return str(err)
    except PropcalcError:
        return None
    return None


def _planned(net: Network, q0: float, c0: float, pos: dict[str, float], distribution: str,
             convolution: str, q_star: float | None) -> tuple[Network, list[BlockInit]]:
    """The network with every weight block planned, and the per-block records."""
    tr: Trace = trace(net, q0, c0, **pos)
    planner = _Planner("normal" if distribution == "gaussian" else "orthogonal", q_star)
    planner.walk(net.blocks, tr.streams, [v.step for v in tr.visits], "/blocks", (), 0, None)
    inits: list[BlockInit] = []
    blocks = _rewrite(net.blocks, "/blocks", (), planner.values, convolution, inits,
                      _fan_ins(net), "")
    if distribution == "orthogonal":
        blocks = [_orthogonal(b) for b in blocks]
        inits = [replace(i, weights="orthogonal") if i.kind == "dense" else i for i in inits]
    return replace(net, blocks=tuple(blocks)), inits


def _orthogonal(b: Block) -> Block:
    if isinstance(b, Dense):
        return replace(b, weights="orthogonal")
    if isinstance(b, Repeat):
        return replace(b, blocks=tuple(_orthogonal(x) for x in b.blocks))
    if isinstance(b, Residual):
        return replace(b, branch=tuple(_orthogonal(x) for x in b.branch))
    return b
