"""Signal propagation through a described network: q, c and the gradient at every stream position.

:func:`network_propagation` walks the network (:mod:`propcalc.networks.walk`)
with the block rules of :mod:`propcalc.networks.rules`, runs the backward
matrices from the output to the input, and where the Gaussian recursion stops
holding (an activation after a residual sum of non-Gaussian parts, max pooling,
...) fills the positions from there on with a seeded finite-width simulation
and its bands (:mod:`propcalc.networks.simulate`) instead of a number that
would not be right.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from ..errors import ComputationError, InvalidParameterError, check_finite, check_positive
from ..results import OMIT, Result
from .blocks import Network
from .description import network as parse_network
from .rules import UNKNOWN, Stream
from .simulate import NetworkSimulation, measure_network
from .summary import NetworkSummary, summarise
from .walk import Trace, apply, trace

__all__ = ["BlockRecord", "NetworkPropagation", "network_propagation", "check_inputs", "backward"]

#: Width of the simulated networks where the description gives none.
SIMULATION_WIDTH = 256
#: Repetitions of the simulation that fills non-Gaussian positions.
SIMULATION_REPETITIONS = 6


@dataclass(frozen=True)
class BlockRecord(Result):
    """One stream position: the block that produced it and what it did.

    Attributes
    ----------
    index : int
        Stream position (1 = after the first elementary block).
    path : str
        JSON pointer of the block in the description.
    copy : tuple of int
        The copy number (1-based) within each enclosing repeat, outermost first.
    kind : str
        Block kind.
    law : str
        The stream's law after the block: "gaussian", "elementwise" (a function of
        one Gaussian), "general" (moments only) or "unknown".
    source : str
        "mean field" or "simulation" (the numbers at this position).
    jacobian : float or None
        ``gradient[index - 1] / gradient[index]``: the mean squared singular value of
        the block's Jacobian per input unit (chi_1 for a dense layer and its activation).
    derivative_second_moment : float or None
        ``E[phi'(s)^2]`` at an activation block.
    logit_std : float or None
        Spread of the query-key logits over keys at an attention block.
    notes : tuple of str
    """

    index: int
    path: str
    copy: tuple[int, ...]
    kind: str
    law: str
    source: str
    jacobian: float | None = None
    derivative_second_moment: float | None = None
    logit_std: float | None = None
    notes: tuple[str, ...] = ()


@dataclass(frozen=True)
class NetworkPropagation(Result):
    """Signal propagation through a network at initialisation (infinite width).

    Attributes
    ----------
    q0, c0, c0_within, c0_between : float
        The input pair (second moment, correlation) and, for networks that mix
        positions, the correlations between positions.
    q : tuple of float
        Per-unit second moment of the stream at every position (0 = the input).
    c : tuple of float
        Correlation (cosine similarity) of the two inputs' streams.
    gradient : tuple of float
        Per-unit mean squared gradient relative to the output's (1 at the end).
    mean : tuple of float
        Per-unit mean of the stream.
    c_within, c_between : tuple of float or None
        Correlation of two positions of one input, of the two inputs (networks with
        pooling or attention).
    blocks : tuple of BlockRecord
        Positions 1 to L.
    gaussian_positions : int
        Positions 0 to this one come from the Gaussian recursion; later ones from
        the simulation.
    simulation : NetworkSimulation or None
        The finite-width simulation used beyond ``gaussian_positions``.
    summary : NetworkSummary
        What a user reads: where inputs merge or decorrelate, gradient growth,
        power laws, what to change.
    notes : tuple of str

    Values the recursion cannot give and no simulation measured are None.
    """

    q0: float
    c0: float
    c0_within: float
    c0_between: float
    q: tuple[float | None, ...]
    c: tuple[float | None, ...]
    gradient: tuple[float | None, ...]
    mean: tuple[float | None, ...]
    c_within: tuple[float | None, ...] | None
    c_between: tuple[float | None, ...] | None
    blocks: tuple[BlockRecord, ...]
    gaussian_positions: int
    simulation: NetworkSimulation | None
    summary: NetworkSummary
    notes: tuple[str, ...] = ()
    trace: Trace = field(default=None, repr=False, metadata=OMIT)  # type: ignore[assignment]
    network: Network = field(default=None, repr=False, metadata=OMIT)  # type: ignore[assignment]


def check_inputs(q0: Any, c0: Any, c0_within: Any, c0_between: Any,
                 positions: bool, spatial: bool = True) -> tuple[float, float, float, float]:
    """Validate the input pair and the position correlations (refused where they do not matter)."""
    q = check_positive("q0", q0)
    if q > 1e12:
        raise InvalidParameterError("q0", "<= 1e12", q0)
    c = check_finite("c0", c0)
    if not -1.0 <= c <= 1.0:
        raise InvalidParameterError("c0", "in [-1, 1]", c0)
    cw, cb = check_finite("c0_within", c0_within), check_finite("c0_between", c0_between)
    if positions:
        # many exchangeable positions: the Gram matrix [[A, B], [B, A]] with
        # A = (1 - cw) I + cw J, B = (c - cb) I + cb J is PSD for every size iff these hold
        if not 0.0 <= cw <= 1.0:
            raise InvalidParameterError("c0_within", "in [0, 1]", c0_within)
        if abs(cb) > cw:
            raise InvalidParameterError("c0_between", f"at most c0_within ({cw:g}) in size",
                                        c0_between)
        if abs(c - cb) > 1.0 - cw + 1e-15:
            raise InvalidParameterError("c0_between", "within 1 - c0_within of c0", c0_between)
    elif not spatial:  # one position everywhere: refused rather than ignored
        for name, value, given in (("c0_within", cw, c0_within), ("c0_between", cb, c0_between)):
            if value != 0.0:
                raise InvalidParameterError(
                    name, "0 for a network of one position (it is read only with "
                          "convolution, pooling or attention blocks)", given)
    return q, c, cw, cb


def _none(x: float) -> float | None:
    return None if (x is None or math.isnan(x)) else float(x)


def network_propagation(network: Any, q0: float = 1.0, c0: float = 0.0, *,
                        c0_within: float = 0.0, c0_between: float = 0.0, simulate: bool = True,
                        simulation_width: int | None = None, seed: int = 0) -> NetworkPropagation:
    """Signal propagation through a network: q, c and the gradient at every stream position.

    Parameters
    ----------
    network : Network or mapping
        A Network or its JSON description (validated by :func:`propcalc.network`).
    q0 : float
        Per-unit second moment of the input (the inputs are taken as centred
        Gaussian pre-activations, as in :func:`propcalc.propagation`).
    c0 : float
        Correlation of the two inputs.
    c0_within, c0_between : float
        For networks with pooling or attention: the correlation of two positions
        (tokens) of one input, and of two positions of the two inputs.
    simulate : bool
        Where the Gaussian recursion stops holding, fill the positions with a
        seeded finite-width simulation (``simulation_width`` where the
        description gives no width, default 256; ``seed``).
    simulation_width : int, optional
    seed : int

    Returns
    -------
    NetworkPropagation

    Examples
    --------
    >>> import propcalc
    >>> r = propcalc.network_propagation({"blocks": [{"repeat": {"times": 20, "blocks": [
    ...     {"dense": {"sigma_w2": 2.0, "sigma_b2": 0.0}}, {"activation": "relu"}]}}]})
    >>> round(r.q[-1], 12), len(r.c)
    (1.0, 41)
    """
    net = parse_network(network)
    q0, c0, cw, cb = check_inputs(q0, c0, c0_within, c0_between, net.uses_positions(),
                                  net.has_positions())
    tr = trace(net, q0, c0, c0_within=cw, c0_between=cb)
    streams = tr.streams
    n = len(streams) - 1
    known = next((i for i, s in enumerate(streams) if s.form == UNKNOWN), n + 1) - 1
    positions = streams[0].tracks_positions
    grad: list[float | None] = backward(tr, known) if known == n else [None] * (n + 1)
    notes: list[str] = []
    sim: NetworkSimulation | None = None
    q: list[float | None] = [_none(s.q) for s in streams]
    c: list[float | None] = [None if s.form == UNKNOWN else s.c for s in streams]
    mean: list[float | None] = [_none(s.m) for s in streams]
    cws = [_corr(s.kw, s) for s in streams] if positions else None
    cbs = [_corr(s.kb, s) for s in streams] if positions else None
    source = ["mean field"] * (n + 1)
    if known < n:
        reason = streams[known + 1].reason
        fill = (simulate and not streams[known + 1].degenerate)
        notes.append(f"from position {known + 1} on ({tr.visits[known].path}) {reason}; "
                     + ("those positions are measured by a seeded finite-width simulation, "
                        "with bands" if fill else "no number is given there"))
        if simulate and streams[known + 1].degenerate:
            notes.append("the simulation was not run: a finite-width network overflows or "
                         "divides by zero there too")
        elif simulate:
            sim, why = _simulate(net, q0, c0, cw, cb, simulation_width, seed)
            if sim is None:
                notes.append(f"the simulation was not run: {why}")
        if sim is not None:
            for i in range(known + 1, n + 1):
                p = sim.positions[i]
                q[i], c[i], mean[i], source[i] = p.q, p.c, None, "simulation"
                if cws is not None and cbs is not None:
                    cws[i], cbs[i] = p.c_within, p.c_between
            grad = _fill_gradient(backward(tr, known), sim, known, positions)
        else:
            grad[n] = 1.0
    records = _records(net, tr, grad, source)
    summary = summarise(net, tr, q, c, grad, records, cws, known, notes)
    return NetworkPropagation(q0, c0, cw, cb, tuple(q), tuple(c), tuple(grad), tuple(mean),
                              None if cws is None else tuple(cws),
                              None if cbs is None else tuple(cbs), tuple(records), known, sim,
                              summary, tuple(notes), tr, net)


def _corr(x: float | None, s: Stream) -> float | None:
    if x is None or s.form == UNKNOWN:
        return None
    return 1.0 if s.q == 0.0 else min(1.0, max(-1.0, x / s.q))


def _simulate(net: Network, q0: float, c0: float, cw: float, cb: float, width: int | None,
              seed: int) -> tuple[NetworkSimulation | None, str]:
    try:
        sim = measure_network(net, q0=q0, c0=c0, c0_within=cw, c0_between=cb,
                              width=width or SIMULATION_WIDTH, repetitions=SIMULATION_REPETITIONS,
                              seed=seed)
    except InvalidParameterError as exc:
        return None, f"{exc} (call propcalc.simulate with a smaller width or grid)"
    except ComputationError as exc:
        return None, str(exc)
    return sim, ""


def backward(tr: Trace, top: int) -> list[float | None]:
    """Per-unit mean squared gradients relative to position ``top`` (the output gradient
    uncorrelated across positions), from the backward matrices; None above ``top``."""
    out: list[float | None] = [None] * (len(tr.visits) + 1)
    out[top] = 1.0
    v = (1.0, 0.0)
    for i in range(top, 0, -1):
        m = tr.visits[i - 1].step.matrix
        if m is None:
            break
        v = apply(m, v)
        out[i - 1] = v[0]
    return out


def _fill_gradient(rec: list[float | None], sim: NetworkSimulation, known: int,
                   positions: bool) -> list[float | None]:
    """Gradients relative to the output when the positions after ``known`` are simulated.

    Without position mixing every backward matrix is diagonal, so the gradient at a
    Gaussian position i <= known is the recursion's product from i to ``known``
    (``rec``) times the simulated gradient at ``known``; with position mixing the
    simulated values are used throughout.
    """
    sims = [p.gradient for p in sim.positions]
    if positions:
        return list(sims)
    anchor = sims[known]
    return [(g * anchor if g is not None else None) for g in rec[:known + 1]] + sims[known + 1:]


def _records(net: Network, tr: Trace, grad: list[float | None],
             source: list[str]) -> list[BlockRecord]:
    out = []
    for i, visit in enumerate(tr.visits, start=1):
        g_in, g_out = grad[i - 1], grad[i]
        jac = (g_in / g_out) if (g_in is not None and g_out not in (None, 0.0)) else None
        step = visit.step
        out.append(BlockRecord(
            i, visit.path, tuple(r + 1 for r in visit.repetitions), visit.kind,
            step.stream.form, source[i], None if jac is None or math.isnan(jac) else jac,
            step.detail.get("derivative_second_moment"), step.detail.get("logit_std"),
            step.notes))
    return out
