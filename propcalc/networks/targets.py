"""The residual branch weight for a target depth behaviour.

A residual network's output correlation depends on its branch weights: with
weight 0 every block is the identity and two inputs keep their correlation c0;
larger weights let each branch's correlation map act (for ReLU-like branches,
pulling c towards 1: Yang & Schoenholz 2017). :func:`branch_weight` finds the
largest weight w, applied to every residual block, for which two inputs that
start at c0 reach the output with ``c <= target`` (by default 0.9: they stay
distinguishable) and, optionally, the input's gradient stays within
``max_gradient`` times the output's, by a scan over a log grid of w and Brent's
method on ``max(c_L(w) - target, log(G_0(w) / max_gradient))`` in the first
bracket. It also reports ``w sqrt(n)`` for n residual blocks: weights that scale
like ``1 / sqrt(n)`` have a finite limit as n grows (Hayou et al. 2021).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from scipy import optimize

from ..errors import InvalidParameterError, check_finite
from ..results import Result
from .blocks import Block, Network, Repeat, Residual
from .description import network as parse_network
from .propagate import backward, check_inputs
from .rules import UNKNOWN
from .walk import trace

__all__ = ["BranchWeight", "branch_weight", "check_max_gradient", "with_branch_weight",
           "residual_count"]

_GRID = np.geomspace(1e-4, 1e2, 25)


@dataclass(frozen=True)
class BranchWeight(Result):
    """The uniform residual branch weight that meets a target correlation at the output.

    Attributes
    ----------
    target : float
        The output correlation not to exceed.
    max_gradient : float or None
        The bound on the input's gradient relative to the output's, if any.
    c0 : float
    weight : float or None
        The largest weight in [0, 100] with ``c_L <= target`` (None when even a tiny
        weight exceeds it, which happens when c0 is above the target).
    c_at_weight : float or None
        The output correlation there.
    gradient_at_weight : float or None
        The input's gradient relative to the output's there.
    residual_blocks : int
        Residual blocks in the expanded network.
    depth_constant : float or None
        ``weight * sqrt(residual_blocks)`` (Hayou et al. 2021: keep it fixed when
        changing the depth).
    unbounded : bool
        True when every weight up to 100 meets the target.
    message : str
    """

    target: float
    max_gradient: float | None
    c0: float
    weight: float | None
    c_at_weight: float | None
    gradient_at_weight: float | None
    residual_blocks: int
    depth_constant: float | None
    unbounded: bool
    message: str


def residual_count(blocks: tuple[Block, ...]) -> int:
    """Residual blocks after expansion (top level and nested in repeats)."""
    n = 0
    for b in blocks:
        if isinstance(b, Repeat):
            n += b.times * residual_count(b.blocks)
        elif isinstance(b, Residual):
            n += 1
    return n


def with_branch_weight(net: Network, weight: float) -> Network:
    """The network with every residual block's weight set to ``weight``."""
    def walk(blocks: tuple[Block, ...]) -> tuple[Block, ...]:
        out: list[Block] = []
        for b in blocks:
            if isinstance(b, Repeat):
                out.append(replace(b, blocks=walk(b.blocks)))
            elif isinstance(b, Residual):
                out.append(replace(b, branch=walk(b.branch), weight=weight))
            else:
                out.append(b)
        return tuple(out)
    return replace(net, blocks=walk(net.blocks))


def _evaluate(net: Network, weight: float, q0: float, c0: float, cw: float,
              cb: float) -> tuple[float, float]:
    """(output correlation, input gradient relative to the output's) at this branch weight."""
    tr = trace(with_branch_weight(net, weight), q0, c0, c0_within=cw, c0_between=cb)
    s = tr.streams[-1]
    if s.form == UNKNOWN:
        raise InvalidParameterError(
            "network", "a network the Gaussian recursion covers at every weight (no activation "
                       "after a residual sum of non-Gaussian parts, no max pooling)", "",
            "the branch weight search needs the mean-field output correlation")
    g = backward(tr, len(tr.visits))[0]
    return s.c, (math.inf if g is None else g)


def check_max_gradient(max_gradient: Any) -> float | None:
    """The bound on the gradient factor: None (no bound) or a finite number > 1."""
    bound = None if max_gradient is None else check_finite("max_gradient", max_gradient)
    if bound is not None and bound <= 1.0:
        raise InvalidParameterError("max_gradient", "> 1", max_gradient)
    return bound


def branch_weight(network: Any, target: float = 0.9, *, max_gradient: float | None = None,
                  q0: float = 1.0, c0: float = 0.0, c0_within: float = 0.0,
                  c0_between: float = 0.0) -> BranchWeight:
    """The largest uniform residual branch weight keeping the output correlation <= target.

    Parameters
    ----------
    network : Network or mapping
        A network with residual blocks (their weights are replaced).
    target : float
        Output correlation in (-1, 1) not to exceed, for two inputs at c0.
    max_gradient : float, optional
        Also keep the input's gradient within this factor (> 1) of the output's.
    q0, c0, c0_within, c0_between : float
        The input pair, as for :func:`propcalc.network_propagation`.

    Returns
    -------
    BranchWeight

    Raises
    ------
    InvalidParameterError
        For a network without residual blocks, a target outside (-1, 1), or a network
        whose stream leaves the Gaussian recursion.
    """
    net = parse_network(network)
    t = check_finite("target", target)
    if not -1.0 < t < 1.0:
        raise InvalidParameterError("target", "in (-1, 1)", target)
    bound = check_max_gradient(max_gradient)
    q0, c0, cw, cb = check_inputs(q0, c0, c0_within, c0_between, net.uses_positions(),
                                  net.has_positions())
    n = residual_count(net.blocks)
    if n == 0:
        raise InvalidParameterError("network", "a network with residual blocks", "none found")

    def gap(w: float) -> float:
        c, g = _evaluate(net, w, q0, c0, cw, cb)
        over = c - t
        if bound is not None:
            over = max(over, math.log(g / bound) if g > 0 else -math.inf)
        return over

    what = f"c <= {t:g} at the output" + (
        "" if bound is None else f" and the input gradient within {bound:g}x the output's")
    if gap(0.0) > 0.0:
        return BranchWeight(t, bound, c0, None, None, None, n, None, False,
                            f"no branch weight gives {what} (at weight 0 already not)")
    prev_w = 0.0
    for w in _GRID:
        if gap(float(w)) > 0.0:
            root = float(optimize.brentq(gap, prev_w, float(w), xtol=1e-12, rtol=1e-10))
            c_at, g_at = _evaluate(net, root, q0, c0, cw, cb)
            return BranchWeight(t, bound, c0, root, c_at, g_at, n, root * math.sqrt(n), False,
                                f"branch weights up to {root:.4g} give {what} for two inputs at "
                                f"c0 = {c0:g} ({n} residual blocks; weight x sqrt(blocks) = "
                                f"{root * math.sqrt(n):.4g}, the constant to keep when changing "
                                "the depth, Hayou et al. 2021)")
        prev_w = float(w)
    top = float(_GRID[-1])
    c_at, g_at = _evaluate(net, top, q0, c0, cw, cb)
    return BranchWeight(t, bound, c0, top, c_at, g_at, n, top * math.sqrt(n), True,
                        f"every branch weight up to {top:g} gives {what}")
