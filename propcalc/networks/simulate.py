"""Finite-width simulation of a described network, compared position by position with bands.

A batch of ``inputs`` inputs, every pair of which has correlation c0 at every
position (an exchangeable batch: what batch norm's mean field assumes), each
input a grid of positions with correlation ``c0_within`` between two positions
of one input and ``c0_between`` between two positions of two inputs, second
moment q0 per unit: the Gram matrix is exact when the width allows (the inputs
are an orthonormal frame times a square root of the Gram matrix). The network
is drawn with fresh weights per block from :class:`numpy.random.SeedSequence`
children (one per repetition, then one per block in order), the batch pushed
through (:mod:`propcalc.networks.sim_blocks`), and a standard normal gradient
(independent across units and positions) back-propagated from the output.

Measured at every position and repetition: ``q`` (mean square per unit),
``c`` (mean cosine similarity of two inputs at one position), the same between
positions (``c_within``, ``c_between``), and the per-unit mean squared gradient
relative to the output's. Over the repetitions: the mean, its standard error and
the band mean +- 2 SE; a prediction counts as matched when it lies within the
band widened by ``tolerance`` (relative for q and the gradient, absolute for c),
the rule of :func:`propcalc.simulate`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..errors import (
    ComputationError,
    InvalidParameterError,
    check_finite,
    check_int,
    check_nonnegative,
    check_positive,
)
from ..results import OMIT, Result
from .blocks import Attention, Block, Convolution, Dense, Network, Pooling, Repeat, Residual
from .description import network as parse_network
from .sim_blocks import Field, forward_block
from .sim_grid import default_grid

__all__ = [
    "MAX_NETWORK_SIMULATION_WORK",
    "SimulatedPosition",
    "NetworkSimulation",
    "measure_network",
    "simulation_work",
]

#: The prediction a simulation is compared with: (network, q0, c0, c0_within, c0_between) to
#: one (q, c, gradient) per position (None where there is none).
Predictor = Callable[[Network, float, float, float, float],
                     Sequence[tuple[float | None, float | None, float | None]]]

#: Bound on multiply-adds of one simulation (all repetitions, forward).
MAX_NETWORK_SIMULATION_WORK = 2e10
#: Bound on the floats kept for the backward pass of one repetition.
_MAX_STORED = 5e7
_DEFAULT_WIDTH = 256


@dataclass(frozen=True)
class SimulatedPosition(Result):
    """Measured (and predicted) numbers at one stream position.

    Attributes
    ----------
    index : int
        Stream position (0 = the input).
    q, q_se : float
        Mean over repetitions of the per-unit mean square, and its standard error.
    q_band : (float, float)
        q +- 2 SE.
    c, c_se, c_band
        The same for the correlation (cosine similarity) of two inputs.
    gradient, gradient_se, gradient_band
        The same for the per-unit mean squared gradient relative to the output's.
    c_within, c_between : float or None
        Mean correlations between two positions of one input, of two inputs.
    q_predicted, c_predicted, gradient_predicted : float or None
        The mean-field values (None where the Gaussian recursion does not hold).
    q_in_band, c_in_band, gradient_in_band : bool or None
        Whether each prediction lies in its band widened by the tolerance.
    """

    index: int
    q: float
    q_se: float
    q_band: tuple[float, float]
    c: float
    c_se: float
    c_band: tuple[float, float]
    gradient: float
    gradient_se: float
    gradient_band: tuple[float, float]
    c_within: float | None = None
    c_between: float | None = None
    q_predicted: float | None = None
    c_predicted: float | None = None
    gradient_predicted: float | None = None
    q_in_band: bool | None = None
    c_in_band: bool | None = None
    gradient_in_band: bool | None = None


@dataclass(frozen=True)
class NetworkSimulation(Result):
    """Seeded finite-width networks of a description, measured at every position.

    Attributes
    ----------
    width : int
        The width used where the description gives none.
    grid : tuple of int
        Positions of the input (a spatial grid or the tokens).
    inputs, repetitions, seed : int
    tolerance : float
    positions : tuple of SimulatedPosition
        Position 0 (the input) to the output.
    mismatches : tuple of int
        Positions where a prediction lies outside its widened band.
    """

    width: int
    grid: tuple[int, ...]
    inputs: int
    repetitions: int
    seed: int
    tolerance: float
    positions: tuple[SimulatedPosition, ...]
    mismatches: tuple[int, ...]
    network: Network = field(repr=False, metadata=OMIT)


def _inputs(rng: np.random.Generator, n_inputs: int, n_pos: int, width: int, q0: float,
            c0: float, cw: float, cb: float) -> np.ndarray:
    """(inputs, positions, width) with the exchangeable Gram matrix (exact when width allows)."""
    eye_s, ones_s = np.eye(n_pos), np.ones((n_pos, n_pos))
    same = (1.0 - cw) * eye_s + cw * ones_s
    other = (c0 - cb) * eye_s + cb * ones_s
    gram = q0 * (np.kron(np.eye(n_inputs), same - other) + np.kron(np.ones((n_inputs,) * 2), other))
    vals, vecs = np.linalg.eigh(gram)
    if vals.min() < -1e-9 * max(1.0, vals.max()):
        raise InvalidParameterError("c0_between", "compatible with c0 and c0_within (a positive "
                                                  "semi-definite input Gram matrix)", cb)
    root = vecs * np.sqrt(np.clip(vals, 0.0, None))
    n = gram.shape[0]
    if width >= n:
        frame, r = np.linalg.qr(rng.standard_normal((width, n)))
        frame = frame * np.sign(np.diag(r))
        x = root @ frame.T * math.sqrt(width)
    else:
        x = root @ rng.standard_normal((n, width))
    return x.reshape(n_inputs, n_pos, width)


def _cos(x: np.ndarray) -> np.ndarray:
    norm = np.sqrt((x * x).sum(axis=-1, keepdims=True))
    return np.where(norm > 0, x / np.where(norm > 0, norm, 1.0), 0.0), norm[..., 0] > 0


def _measure(x: np.ndarray) -> tuple[float, float, float, float]:
    """q, c (same position, two inputs), c_within, c_between of a batch."""
    q = float(np.mean(x * x))
    xn, alive = _cos(x)
    b, s = x.shape[0], x.shape[1]
    gram = np.einsum("atu,bsu->atbs", xn, xn)
    both = alive[:, :, None, None] & alive[None, None, :, :]
    gram = np.where(both, gram, 1.0)  # two zero vectors count as identical (as propcalc.simulate)
    ia, ib = np.triu_indices(b, 1)
    same_pos = gram[ia, :, ib, :][:, np.arange(s), np.arange(s)]
    c = float(same_pos.mean()) if ia.size else 1.0
    if s == 1:
        return q, c, math.nan, math.nan
    off = ~np.eye(s, dtype=bool)
    within = float(np.mean([gram[a, :, a, :][off].mean() for a in range(b)]))
    between = float(np.mean(gram[ia, :, ib, :][:, off])) if ia.size else math.nan
    return q, c, within, between


class _Run:
    """One repetition: forward through the blocks, keeping backward functions per position."""

    def __init__(self, seq: np.random.SeedSequence, width: int) -> None:
        self.seq = seq
        self.width = width
        self.stored = 0.0

    def rng(self) -> np.random.Generator:
        return np.random.default_rng(self.seq.spawn(1)[0])

    def blocks(self, blocks: tuple[Block, ...], f: Field, record: list[Any] | None,
               backs: list[Any]) -> Field:
        for b in blocks:
            if isinstance(b, Repeat):
                for _ in range(b.times):
                    f = self.blocks(b.blocks, f, record, backs)
                continue
            if isinstance(b, Residual):
                inner: list[Any] = []
                out = self.blocks(b.branch, f, None, inner)
                a, w = b.shortcut, b.weight

                def back(g: np.ndarray, inner: list[Any] = inner, a: float = a,
                         w: float = w) -> np.ndarray:
                    h = g
                    for fn in reversed(inner):
                        h = fn(h)
                    return a * g + w * h

                f, bk = Field(a * f.x + w * out.x, f.grid), back
            else:
                f, bk = forward_block(b, f, self.rng(), self.width)
            self.stored += f.x.size
            if self.stored > _MAX_STORED:
                raise InvalidParameterError("width", "small enough to keep the simulated "
                                                     f"activations in memory ({_MAX_STORED:g} "
                                                     "floats per network)", self.width)
            backs.append(bk)
            if record is not None:
                record.append(f.x)
        return f


def simulation_work(net: Network, width: int, n_inputs: int, n_pos: int) -> float:
    """Multiply-adds of one simulated forward pass (dense, convolution and attention dominate).

    ``width`` stands in where the description gives none; ``n_pos`` is the number of input
    positions (the product of the grid). The backward pass costs about as much again.
    """
    total = 0.0

    def walk(blocks: tuple[Block, ...], w: int, p: int) -> tuple[int, int]:
        nonlocal total
        for b in blocks:
            if isinstance(b, Repeat):
                for _ in range(b.times):
                    w, p = walk(b.blocks, w, p)
            elif isinstance(b, Residual):
                walk(b.branch, w, p)
            elif isinstance(b, Convolution):
                out = b.width or width
                total += n_inputs * p * b.taps * w * out
                w = out
            elif isinstance(b, Attention):
                d = b.width or width
                total += n_inputs * p * (4 * w * d + 2 * p * d)
                w = d
            elif isinstance(b, Pooling):
                p = 1 if b.kind == "global_average" else max(1, p // b.step)
            elif isinstance(b, Dense):
                out = b.width or width
                total += n_inputs * p * w * out
                w = out
        return w, p

    walk(net.blocks, net.input_width or width, n_pos)
    return total


def _stats(samples: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    mean = samples.mean(axis=0)
    se = samples.std(axis=0, ddof=1) / math.sqrt(samples.shape[0])
    return mean, se


def measure_network(description: Any, *, q0: float = 1.0, c0: float = 0.5,
                    c0_within: float = 0.0, c0_between: float = 0.0, width: int | None = None,
                    grid: Any = None, inputs: int = 4, repetitions: int = 8, seed: int = 0,
                    tolerance: float = 0.05, predict: Predictor | None = None
                    ) -> NetworkSimulation:
    """Simulate a described network at finite width (and compare with a prediction).

    Parameters
    ----------
    description : mapping or Network
    q0, c0, c0_within, c0_between : float
        The input batch (see the module docstring).
    width : int, optional
        Units per position where the description gives no width (default 256).
    grid : int or sequence of int, optional
        The input's positions: a spatial grid for convolutions and pooling, the
        tokens for attention (default: :func:`propcalc.networks.sim_grid.default_grid`, one
        position for dense networks, the tokens of the first attention block, a grid that fits
        the convolutions, pooling windows and strides).
    inputs : int
        Inputs in the batch (>= 2).
    repetitions : int
        Independent networks (>= 2).
    seed : int
    tolerance : float
        Practical size of a visible deviation (default 5%).
    predict : callable, optional
        The prediction to compare with (see :data:`Predictor`); none by default.

    Returns
    -------
    NetworkSimulation

    Raises
    ------
    InvalidParameterError
        For out-of-range inputs or a simulation beyond MAX_NETWORK_SIMULATION_WORK.
    """
    net = parse_network(description)
    q0 = check_positive("q0", q0)
    c0, cw, cb = (check_finite(n, v) for n, v in (("c0", c0), ("c0_within", c0_within),
                                                  ("c0_between", c0_between)))
    for name, v in (("c0", c0), ("c0_within", cw), ("c0_between", cb)):
        if not -1.0 <= v <= 1.0:
            raise InvalidParameterError(name, "in [-1, 1]", v)
    n = check_int("width", width, 2) if width is not None else _DEFAULT_WIDTH
    n_inputs = check_int("inputs", inputs, 2, 4096)
    reps = check_int("repetitions", repetitions, 2, 1000)
    seed = check_int("seed", seed, 0)
    tol = check_nonnegative("tolerance", tolerance)
    shape = _grid(net, grid)
    n_pos = int(np.prod(shape))
    work = simulation_work(net, n, n_inputs, n_pos) * reps
    if work > MAX_NETWORK_SIMULATION_WORK and grid is None:  # the fewest positions that fit
        shape = default_grid(net, smallest=True)
        n_pos = int(np.prod(shape))
        work = simulation_work(net, n, n_inputs, n_pos) * reps
    if work > MAX_NETWORK_SIMULATION_WORK:
        raise InvalidParameterError("width", f"small enough for at most "
                                             f"{MAX_NETWORK_SIMULATION_WORK:g} multiply-adds "
                                             "(width, inputs, grid and repetitions)",
                                    n, f"this simulation needs {work:.3g}")
    root = np.random.SeedSequence(seed)
    with np.errstate(all="ignore"):
        data = _run_all(net, root, reps, n, n_inputs, n_pos, shape, q0, c0, cw, cb)
    # q, c and the gradient must be finite (c_within and c_between are NaN at one position)
    bad = ~np.all(np.isfinite(data[:, :, [0, 1, 4]]), axis=(0, 2))
    if np.any(bad):
        i = int(np.argmax(bad))
        raise ComputationError(f"the simulated networks overflow or divide by zero at position "
                               f"{i}: no finite measurement there (lower the weight variances "
                               "or the depth)")
    return _assemble(net, data, n, shape, n_inputs, reps, seed, tol, predict, q0, c0, cw, cb)


def _run_all(net: Network, root: np.random.SeedSequence, reps: int, n: int, n_inputs: int,
             n_pos: int, shape: tuple[int, ...], q0: float, c0: float, cw: float,
             cb: float) -> np.ndarray:
    """(repetitions, positions, 5): q, c, c_within, c_between, gradient per position."""
    per_rep = []
    for child in root.spawn(reps):
        run = _Run(child, n)
        x0 = _inputs(np.random.default_rng(child.spawn(1)[0]), n_inputs, n_pos,
                     net.input_width or n, q0, c0, cw, cb)
        record: list[np.ndarray] = [x0]
        backs: list[Any] = []
        try:
            out = run.blocks(net.blocks, Field(x0, shape), record, backs)
        except ValueError as exc:
            raise InvalidParameterError("grid", "positions that fit the network's blocks",
                                        list(shape), str(exc)) from None
        g = np.random.default_rng(child.spawn(1)[0]).standard_normal(out.x.shape)
        grads = [float(np.mean(g * g))]
        for fn in reversed(backs):
            g = fn(g)
            grads.append(float(np.mean(g * g)))
        grads = grads[::-1]
        rows = [_measure(x) + (gr / grads[-1],) for x, gr in zip(record, grads)]
        per_rep.append(rows)
    return np.array(per_rep)


def _grid(net: Network, grid: Any) -> tuple[int, ...]:
    if grid is None:
        return default_grid(net)
    sizes = [grid] if not isinstance(grid, (list, tuple)) else list(grid)
    if not 1 <= len(sizes) <= 3:
        raise InvalidParameterError("grid", "an integer or a list of 1 to 3 integers", grid)
    return tuple(check_int(f"grid[{i}]", s, 1, 4096) for i, s in enumerate(sizes))


def _assemble(net: Network, data: np.ndarray, width: int, shape: tuple[int, ...], n_inputs: int,
              reps: int, seed: int, tol: float, predict: Predictor | None, q0: float, c0: float,
              cw: float,
              cb: float) -> NetworkSimulation:
    mean, se = _stats(data)
    pred: list[tuple[Any, Any, Any]] = [(None, None, None)] * data.shape[1]
    if predict is not None:
        pred = list(predict(net, q0, c0, cw, cb))
    out, bad = [], []
    for i in range(data.shape[1]):
        m, s = mean[i], se[i]
        qp, cp, gp = pred[i]
        q_in = None if qp is None else bool(abs(m[0] - qp) <= 2 * s[0] + tol * abs(qp))
        c_in = None if cp is None else bool(abs(m[1] - cp) <= 2 * s[1] + tol)
        g_in = None if gp is None else bool(abs(m[4] - gp) <= 2 * s[4] + tol * abs(gp))
        if False in (q_in, c_in, g_in):
            bad.append(i)
        fin = [None if math.isnan(v) else float(v) for v in (m[2], m[3])]
        out.append(SimulatedPosition(
            i, float(m[0]), float(s[0]), (float(m[0] - 2 * s[0]), float(m[0] + 2 * s[0])),
            float(m[1]), float(s[1]), (float(m[1] - 2 * s[1]), float(m[1] + 2 * s[1])),
            float(m[4]), float(s[4]), (float(m[4] - 2 * s[4]), float(m[4] + 2 * s[4])),
            fin[0], fin[1], qp, cp, gp, q_in, c_in, g_in))
    return NetworkSimulation(width, shape, n_inputs, reps, seed, tol, tuple(out), tuple(bad), net)
