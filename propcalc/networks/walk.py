"""Walking a network: the stream after every elementary block, and the backward matrices.

Repeats are expanded; a residual block is one position whose branch is walked
on the same input stream (its steps are kept with it). When a copy of a repeat
leaves the stream exactly as it found it (a fixed point reached to the last
bit), the remaining copies are identical and are not recomputed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

from .blocks import (
    ActivationBlock,
    Attention,
    Block,
    Convolution,
    Dense,
    Dropout,
    Network,
    Norm,
    Pooling,
    Repeat,
    Residual,
)
from .mixing import attention, pooling
from .rules import (
    GAUSSIAN,
    Q_LIMIT,
    UNKNOWN,
    Matrix,
    Step,
    Stream,
    activation,
    convolution,
    dense,
    dropout,
    identity_matrix,
    norm,
    residual,
    unknown,
)

__all__ = ["Visit", "Trace", "trace", "input_stream", "chain", "apply"]


@dataclass(frozen=True)
class Visit:
    """One elementary block met on the walk: where it is and what it did."""

    path: str
    repetitions: tuple[int, ...]
    kind: str
    step: Step


@dataclass(frozen=True)
class Trace:
    """The walk of a whole network.

    Attributes
    ----------
    start : Stream
        The input stream.
    visits : tuple of Visit
        One per stream position after the input.
    """

    start: Stream
    visits: tuple[Visit, ...]

    @property
    def streams(self) -> list[Stream]:
        """The stream at every position, the input first."""
        return [self.start] + [v.step.stream for v in self.visits]


def input_stream(q0: float, c0: float, width: int | None, positions: bool,
                 c0_within: float, c0_between: float) -> Stream:
    """The input pair as centred Gaussian pre-activations of second moment q0 (as in
    :func:`propcalc.propagation` and :func:`propcalc.simulate`)."""
    return Stream(q0, q0 * c0, 0.0, q0 * c0_within if positions else None,
                  q0 * c0_between if positions else None, GAUSSIAN, width=width)


def chain(first: Matrix, second: Matrix) -> Matrix:
    """``first @ second``: the backward matrix of a block sequence (first block first)."""
    (a, b), (c, d) = first
    (e, f), (g, h) = second
    return ((_mul(a, e) + _mul(b, g), _mul(a, f) + _mul(b, h)),
            (_mul(c, e) + _mul(d, g), _mul(c, f) + _mul(d, h)))


def _mul(x: float, y: float) -> float:
    return 0.0 if x == 0.0 or y == 0.0 else x * y


def apply(matrix: Matrix, v: tuple[float, float]) -> tuple[float, float]:
    """``matrix @ v`` with 0 * inf = 0 (a zero entry passes nothing)."""
    (a, b), (c, d) = matrix
    return (_mul(a, v[0]) + _mul(b, v[1]), _mul(c, v[0]) + _mul(d, v[1]))


def _checked(step: Step) -> Step:
    s = step.stream
    if s.form == UNKNOWN:
        return step
    values = [s.q, s.k, s.m] + [x for x in (s.kw, s.kb) if x is not None]
    if all(math.isfinite(x) for x in values) and s.q <= Q_LIMIT:
        return step
    gone = unknown(s, f"the signal has exploded (second moment above {Q_LIMIT:g})",
                   degenerate=True)
    return replace(gone, matrix=None)


class _Walker:
    def __init__(self, derivative_pairs: bool) -> None:
        self.derivative_pairs = derivative_pairs

    def block(self, b: Block, stream: Stream) -> Step:
        if isinstance(b, Dense):
            return dense(stream, b)
        if isinstance(b, ActivationBlock):
            return activation(stream, b.activation, derivative_pair=self.derivative_pairs)
        if isinstance(b, Norm):
            return norm(stream, b)
        if isinstance(b, Dropout):
            return dropout(stream, b)
        if isinstance(b, Convolution):
            return convolution(stream, b)
        if isinstance(b, Pooling):
            return pooling(stream, b)
        if isinstance(b, Attention):
            return attention(stream, b)
        assert isinstance(b, Residual)
        inner: list[Visit] = []
        out = self.run(b.branch, stream, "", (), inner)
        m: Matrix | None = identity_matrix()
        for v in inner:
            m = None if (m is None or v.step.matrix is None) else chain(m, v.step.matrix)
        new, matrix = residual(stream, out, m, b.weight, b.shortcut)
        notes = tuple(dict.fromkeys(n for v in inner for n in v.step.notes))
        return Step(new, matrix, notes, {}, tuple(v.step for v in inner))

    def run(self, blocks: tuple[Block, ...], stream: Stream, prefix: str,
            reps: tuple[int, ...], sink: list[Visit]) -> Stream:
        for i, b in enumerate(blocks):
            path = f"{prefix}/{i}"
            if isinstance(b, Repeat):
                stream = self.repeat(b, stream, path, reps, sink)
                continue
            step = _checked(self.block(b, stream))
            sink.append(Visit(path, reps, b.KIND, step))
            stream = step.stream
        return stream

    def repeat(self, b: Repeat, stream: Stream, path: str, reps: tuple[int, ...],
               sink: list[Visit]) -> Stream:
        inner_prefix = f"{path}/repeat/blocks"
        for r in range(b.times):
            before, start = stream, len(sink)
            stream = self.run(b.blocks, stream, inner_prefix, reps + (r,), sink)
            if stream == before and stream.form != UNKNOWN:
                # a fixed point to the last bit: every later copy repeats this one
                copy = sink[start:]
                depth = len(reps)
                for r2 in range(r + 1, b.times):
                    sink.extend(replace(v, repetitions=v.repetitions[:depth] + (r2,)
                                        + v.repetitions[depth + 1:]) for v in copy)
                break
        return stream


def trace(network: Network, q0: float, c0: float, *, c0_within: float = 0.0,
          c0_between: float = 0.0, derivative_pairs: bool = False,
          positions: bool | None = None) -> Trace:
    """Walk ``network`` from an input pair at (q0, c0).

    Parameters
    ----------
    network : Network
    q0, c0 : float
        Second moment and correlation of the input pair.
    c0_within, c0_between : float
        Correlation of two positions of one input, and of two positions of the two
        inputs (used when the network has pooling or attention).
    derivative_pairs : bool
        Also compute ``E[phi'(s_a) phi'(s_b)]`` at every activation.
    positions : bool, optional
        Track cross-position moments (default: when the network has pooling or attention).
    """
    track = network.uses_positions() if positions is None else positions
    start = input_stream(q0, c0, network.input_width, track, c0_within, c0_between)
    sink: list[Visit] = []
    _Walker(derivative_pairs).run(network.blocks, start, "/blocks", (), sink)
    return Trace(start, tuple(sink))


def stream_values(stream: Stream) -> dict[str, Any]:
    """q, c, m (None where unknown) of a stream."""
    if stream.form == UNKNOWN:
        return {"q": None, "c": None, "m": None}
    return {"q": stream.q, "c": stream.c, "m": stream.m}
