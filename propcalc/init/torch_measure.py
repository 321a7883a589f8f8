"""A torch module's own forward and backward pass, measured at every stream position and
compared with the mean-field prediction for its description.

:func:`measure_module` reads each module (:func:`propcalc.read_module`), runs a batch
of inputs through its traced graph in training mode (batch-norm running statistics
are restored afterwards), keeps the tensor at every stream position, and sends back a
gradient of independent standard normal entries at the output. At each position it
measures, per unit (every entry of the tensor counts as a unit at a position):

* ``q``, the mean square of the stream;
* ``c``, the mean over pairs of inputs of the mean product of their streams, over ``q``
  (the cosine similarity that :func:`propcalc.network_propagation` reports);
* ``gradient``, the mean square of the gradient over that of the output's gradient.

Inputs have per-unit second moment q0 and correlations: c0 between two inputs at the
same position, ``c0_within`` between two positions of one input, ``c0_between``
between two positions of two inputs, all the same for every pair (exchangeable, as the
batch-norm mean field assumes; Yang et al. 2019). They are built from independent
standard normal parts: one shared by everything (variance ``c0_between``), one per
input, one per position, one per entry (derived here), so the correlations must make
each part's variance non-negative. When there are at least as many units as inputs
times positions, the inputs have exactly these moments (averaged over units: a square
root of the Gram matrix times orthonormal columns); otherwise they are sampled.

With several modules of one architecture (independent draws of the weights) the
comparison is made per module, each with its own description (its measured scales),
as the ratio of measured to predicted ``q`` and gradient and the difference of ``c``;
their mean over modules must lie within two standard errors plus ``tolerance`` of
1 (of 0 for c). With one module there is no standard error: ``tolerance`` alone.
A finite batch makes batch norm's pair correlation -1/(batch - 1) where the
large-batch mean field has 0: use a batch of 64 or more with batch norm.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InvalidParameterError, check_int, check_positive
from ..networks.blocks import Attention, Convolution, Dense, Repeat, Residual
from ..networks.propagate import check_inputs, network_propagation
from ..results import Result
from .torch_reader import ModuleReading, read_module

__all__ = ["ModulePosition", "ModuleMeasurement", "measure_module"]


@dataclass(frozen=True)
class ModulePosition(Result):
    """One stream position: the module's measurements beside the prediction.

    Attributes
    ----------
    index : int
        Stream position (0 = the input).
    node : str
        The graph node measured.
    q, c, gradient : float
        Measured (mean over modules).
    predicted_q, predicted_c, predicted_gradient : float or None
        The mean-field prediction (mean over modules; None where the Gaussian
        recursion gives none).
    q_ratio, gradient_ratio : float or None
        Mean over modules of measured / predicted.
    c_difference : float or None
        Mean over modules of measured - predicted.
    q_band, c_band, gradient_band : float or None
        Two standard errors over modules plus the tolerance: how far q_ratio and
        gradient_ratio may be from 1, c_difference from 0.
    within : bool or None
        Whether every compared quantity is within its band.
    """

    index: int
    node: str
    q: float
    c: float
    gradient: float | None
    predicted_q: float | None
    predicted_c: float | None
    predicted_gradient: float | None
    q_ratio: float | None
    c_difference: float | None
    gradient_ratio: float | None
    q_band: float | None
    c_band: float | None
    gradient_band: float | None
    within: bool | None


@dataclass(frozen=True)
class ModuleMeasurement(Result):
    """Measured and predicted q, c and gradient of torch modules at every position.

    Attributes
    ----------
    q0, c0, c0_within, c0_between : float
    inputs : int
        Inputs per batch.
    modules : int
        Modules measured (independent weight draws of one architecture).
    tolerance : float
    seed : int
    positions : tuple of ModulePosition
        The input and every position with a graph node.
    within_bands : bool
        Whether every compared position is within its bands.
    notes : tuple of str
    """

    q0: float
    c0: float
    c0_within: float
    c0_between: float
    inputs: int
    modules: int
    tolerance: float
    seed: int
    positions: tuple[ModulePosition, ...]
    within_bands: bool
    notes: tuple[str, ...] = ()


def _unit_dim(reading: ModuleReading) -> int:
    """1 when the first weight block is a convolution (channels first), else the last."""
    def first(blocks: tuple[Any, ...]) -> Any:
        for b in blocks:
            if isinstance(b, (Dense, Convolution, Attention)):
                return b
            if isinstance(b, Repeat):
                return first(b.blocks)
            if isinstance(b, Residual):
                found = first(b.branch)
                if found is not None:
                    return found
        return None

    b = first(reading.network.blocks)
    return 1 if isinstance(b, Convolution) else len(reading.input_shape) - 1


def _inputs(shape: tuple[int, ...], unit: int, q0: float, c0: float, cw: float, cb: float,
            gen: Any) -> Any:
    """A batch of inputs with the stated second moment and correlations (module docstring)."""
    import torch

    parts = {"shared": cb, "input": cw - cb, "position": c0 - cb, "entry": 1.0 - cw - c0 + cb}
    for name, v in parts.items():
        if v < -1e-12:
            raise InvalidParameterError("c0_within, c0_between", "correlations with c0_between "
                                        "<= min(c0, c0_within) and c0 + c0_within - c0_between "
                                        "<= 1 (exchangeable inputs built from independent parts)",
                                        (c0, cw, cb))
    b = shape[0]
    units = shape[unit]
    pos_shape = [s for d, s in enumerate(shape) if d not in (0, unit)]
    n_pos = math.prod(pos_shape)
    if units >= b * n_pos and b * n_pos <= 4096:
        # exact: X = S Q^T sqrt(units) with S S^T the Gram matrix and Q orthonormal columns,
        # so the mean over units of X X^T is the Gram matrix itself
        same_in = torch.kron(torch.eye(b, dtype=torch.float64), torch.ones(n_pos, n_pos,
                                                                           dtype=torch.float64))
        same_pos = torch.kron(torch.ones(b, b, dtype=torch.float64),
                              torch.eye(n_pos, dtype=torch.float64))
        eye = torch.eye(b * n_pos, dtype=torch.float64)
        gram = q0 * (cb + (cw - cb) * same_in + (c0 - cb) * same_pos
                     + (1.0 - cw - c0 + cb) * eye)
        vals, vecs = torch.linalg.eigh(gram)
        root = vecs * vals.clamp(min=0.0).sqrt()
        q, _ = torch.linalg.qr(torch.randn(units, b * n_pos, generator=gen,
                                           dtype=torch.float64))
        x = (root @ q.T * math.sqrt(units)).reshape(b, *pos_shape, units)
        return torch.movedim(x, -1, unit)
    # sampled: per unit, (inputs, positions) parts, then moved into the input's layout
    full = (b, *pos_shape, units)
    ones = [1] * len(pos_shape)

    def draw(*size: int) -> Any:
        return torch.randn(size, generator=gen, dtype=torch.float64)

    x = math.sqrt(max(parts["shared"], 0.0)) * draw(1, *ones, units)
    x = x + math.sqrt(max(parts["input"], 0.0)) * draw(b, *ones, units)
    x = x + math.sqrt(max(parts["position"], 0.0)) * draw(1, *pos_shape, units)
    x = x + math.sqrt(max(parts["entry"], 0.0)) * draw(*full)
    x = math.sqrt(q0) * x
    return torch.movedim(x, -1, unit)


def _run(reading: ModuleReading, x: Any, gen: Any) -> dict[str, tuple[float, float, float]]:
    """(q, c, gradient) at the reading's position nodes and the input."""
    import torch
    import torch.fx

    gm = reading.graph_module
    want = {n for n in reading.positions if n} | {reading.input_node}
    kept: dict[str, Any] = {}

    class Keeper(torch.fx.Interpreter):
        def run_node(self, n: Any) -> Any:
            out = super().run_node(n)
            if n.name in want and isinstance(out, torch.Tensor):
                kept[n.name] = out
            return out

    buffers = {k: v.detach().clone() for k, v in gm.named_buffers()}
    flags = {m: m.training for m in gm.modules()}
    try:
        gm.train()
        x = x.detach().requires_grad_(True)
        out = Keeper(gm).run(x)
        kept[reading.input_node] = x
        g_out = torch.randn(out.shape, generator=gen, dtype=torch.float64).to(out.dtype)
        names = list(kept)
        grads = torch.autograd.grad(out, [kept[n] for n in names], grad_outputs=g_out,
                                    allow_unused=True)
    finally:
        for m, flag in flags.items():
            m.training = flag
        with torch.no_grad():
            for k, v in gm.named_buffers():
                v.copy_(buffers[k])
    g2 = float(g_out.double().square().mean())
    result = {}
    for n, g in zip(names, grads):
        y = kept[n].detach().double()
        b = y.shape[0]
        flat = y.reshape(b, -1)
        q = float(flat.square().mean())
        total = flat.sum(0)
        pair = float((total.square() - flat.square().sum(0)).mean()) / (b * (b - 1))
        grad = None if g is None else float(g.double().square().mean()) / g2
        result[n] = (q, pair / q if q > 0 else 1.0, grad)
    return result


def measure_module(modules: Any, example: Any, *, q0: float = 1.0, c0: float = 0.5,
                   c0_within: float = 0.0, c0_between: float = 0.0, inputs: int = 8,
                   seed: int = 0, tolerance: float = 0.05,
                   scales: str = "measured") -> ModuleMeasurement:
    """Measure torch modules' forward and backward passes against the mean-field prediction.

    Parameters
    ----------
    modules : torch.nn.Module or sequence of them
        One module, or several modules of one architecture (independent draws of the
        weights) for bands with standard errors.
    example : torch.Tensor or sequence of int
        The input's shape (its batch dimension, the first, is replaced by ``inputs``).
    q0, c0, c0_within, c0_between : float
        The inputs' per-unit second moment and correlations (module docstring).
    inputs : int
        Inputs per batch (at least 2).
    seed : int
        Seed of the inputs and output gradients (torch generators).
    tolerance : float
        Added to the bands (relative for q and the gradient, absolute for c).
    scales : {"measured", "default"}
        How the descriptions are read (:func:`propcalc.read_module`).

    Returns
    -------
    ModuleMeasurement
    """
    import torch

    mods = [modules] if isinstance(modules, torch.nn.Module) else list(modules)
    if not mods:
        raise InvalidParameterError("modules", "a module or a non-empty sequence of modules",
                                    modules)
    n_in = check_int("inputs", inputs, minimum=2, maximum=4096)
    tol = check_positive("tolerance", tolerance)
    shape_src = tuple(example.shape) if isinstance(example, torch.Tensor) else tuple(example)
    readings = [read_module(m, shape_src, scales=scales) for m in mods]
    positions = readings[0].network.uses_positions()
    q0, c0, cw, cb = check_inputs(q0, c0, c0_within, c0_between, positions,
                                  readings[0].network.has_positions())
    if not positions:
        cw = cb = c0_between = c0_within = 0.0
    if c0 < -1.0 / (n_in - 1):
        raise InvalidParameterError("c0", f">= -1/(inputs - 1) = {-1.0 / (n_in - 1):.4g} for a "
                                          f"batch of {n_in} equally correlated inputs", c0)
    shape = (n_in,) + readings[0].input_shape[1:]
    unit = _unit_dim(readings[0])
    measured, predicted = [], []
    for r, reading in enumerate(readings):
        gen = torch.Generator().manual_seed(int(seed) * 1000 + r)
        dtype = next((p.dtype for p in mods[r].parameters() if p.is_floating_point()),
                     torch.float32)
        x = _inputs(shape, unit, q0, c0, cw, cb, gen).to(dtype)
        measured.append(_run(reading, x, gen))
        predicted.append(network_propagation(reading.network, q0, c0, c0_within=cw,
                                             c0_between=cb, simulate=False))
    nodes = [readings[0].input_node] + list(readings[0].positions)
    out = []
    for index, node in enumerate(nodes):
        if not node:
            continue
        out.append(_compare(index, node, [m[node] for m in measured],
                            [(p.q[index], p.c[index], p.gradient[index]) for p in predicted],
                            tol))
    within = all(p.within is not False for p in out)
    notes = readings[0].notes
    return ModuleMeasurement(q0, c0, cw, cb, n_in, len(mods), tol, int(seed), tuple(out),
                             within, notes)


def _band(values: list[float], tol: float) -> float:
    if len(values) < 2:
        return tol
    return 2.0 * float(np.std(values, ddof=1)) / math.sqrt(len(values)) + tol


def _compare(index: int, node: str, got: list[tuple[float, float, float | None]],
             want: list[tuple[float | None, float | None, float | None]],
             tol: float) -> ModulePosition:
    q = float(np.mean([g[0] for g in got]))
    c = float(np.mean([g[1] for g in got]))
    grads = [g[2] for g in got]
    grad = None if any(x is None for x in grads) else float(np.mean(grads))
    checks: list[bool] = []

    def ratio(k: int, values: list[Any]) -> tuple[float | None, float | None, float | None]:
        pred = [w[k] for w in want]
        if any(p is None or v is None for p, v in zip(pred, values)) or \
                any(p == 0.0 for p in pred):
            return None, None, None
        rs = [v / p for v, p in zip(values, pred)]
        mean, band = float(np.mean(rs)), _band(rs, tol)
        checks.append(abs(mean - 1.0) <= band)
        return float(np.mean(pred)), mean, band

    pq, q_ratio, q_band = ratio(0, [g[0] for g in got])
    pg, g_ratio, g_band = ratio(2, grads)
    pc_list = [w[1] for w in want]
    if any(p is None for p in pc_list):
        pc = c_diff = c_band = None
    else:
        diffs = [g[1] - p for g, p in zip(got, pc_list)]  # type: ignore[operator]
        pc, c_diff, c_band = float(np.mean(pc_list)), float(np.mean(diffs)), _band(diffs, tol)
        checks.append(abs(c_diff) <= c_band)
    within = all(checks) if checks else None
    return ModulePosition(index, node, q, c, grad, pq, pc, pg, q_ratio, c_diff, g_ratio,
                          q_band, c_band, g_band, within)
