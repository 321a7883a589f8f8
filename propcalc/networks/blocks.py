"""The blocks of a network description, as validated immutable objects.

A network is a sequence of blocks; each block kind below is a frozen dataclass
built by :func:`propcalc.networks.description.network` from its JSON form and
turned back into that form by :meth:`describe` (defaults that were not given
are left out, so ``network(net.describe()) == net``). The JSON form of every
kind, its fields, types, defaults and limits are documented in
:mod:`propcalc.networks.description`.

Conventions (those of the whole package): ``W_ij ~ N(0, sigma_w2 / fan_in)``,
``b_i ~ N(0, sigma_b2)``; "width" is the number of units per position (the
channels of a convolution, the model width of an attention block).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any, ClassVar, Union

from ..activations.base import Activation

__all__ = [
    "Dense",
    "ActivationBlock",
    "Residual",
    "Norm",
    "Dropout",
    "Repeat",
    "Convolution",
    "Pooling",
    "Attention",
    "Block",
    "Network",
    "PositionInfo",
    "WEIGHT_BLOCKS",
]


def _ints(value: tuple[int, ...]) -> int | list[int]:
    """A tuple of sizes in its JSON form: a bare integer for one dimension."""
    return value[0] if len(value) == 1 else list(value)


@dataclass(frozen=True)
class Dense:
    """A fully connected layer ``h = W x + b`` (fan-in scaling of W)."""

    KIND: ClassVar[str] = "dense"
    sigma_w2: float
    sigma_b2: float
    width: int | None = None
    weights: str = "gaussian"

    def describe(self) -> dict[str, Any]:
        """The block's JSON form."""
        body: dict[str, Any] = {"sigma_w2": self.sigma_w2, "sigma_b2": self.sigma_b2}
        if self.width is not None:
            body["width"] = self.width
        if self.weights != "gaussian":
            body["weights"] = self.weights
        return {self.KIND: body}


@dataclass(frozen=True)
class ActivationBlock:
    """An elementwise activation phi, a built-in name or a typed formula."""

    KIND: ClassVar[str] = "activation"
    formula: str
    params: tuple[tuple[str, float], ...] = ()
    activation: Activation = field(default=None, compare=False, repr=False)  # type: ignore[assignment]

    def describe(self) -> dict[str, Any]:
        """The block's JSON form (the bare string when there are no parameters)."""
        if not self.params:
            return {self.KIND: self.formula}
        return {self.KIND: {"formula": self.formula, "params": dict(self.params)}}


@dataclass(frozen=True)
class Residual:
    """A residual block: the stream becomes ``shortcut * x + weight * branch(x)``."""

    KIND: ClassVar[str] = "residual"
    branch: tuple[Block, ...]
    weight: float = 1.0
    shortcut: float = 1.0

    def describe(self) -> dict[str, Any]:
        """The block's JSON form."""
        body: dict[str, Any] = {"branch": [b.describe() for b in self.branch],
                                "weight": self.weight}
        if self.shortcut != 1.0:
            body["shortcut"] = self.shortcut
        return {self.KIND: body}


@dataclass(frozen=True)
class Norm:
    """Layer, RMS or batch normalisation, with its gain and epsilon at initialisation."""

    KIND: ClassVar[str] = "norm"
    kind: str
    gain: float = 1.0
    eps: float = 0.0

    def describe(self) -> dict[str, Any]:
        """The block's JSON form (the bare kind when gain and eps are the defaults)."""
        if self.gain == 1.0 and self.eps == 0.0:
            return {self.KIND: self.kind}
        body: dict[str, Any] = {"kind": self.kind}
        if self.gain != 1.0:
            body["gain"] = self.gain
        if self.eps != 0.0:
            body["eps"] = self.eps
        return {self.KIND: body}


@dataclass(frozen=True)
class Dropout:
    """Inverted dropout: each unit kept with probability keep_rate and divided by it."""

    KIND: ClassVar[str] = "dropout"
    keep_rate: float

    def describe(self) -> dict[str, Any]:
        """The block's JSON form."""
        return {self.KIND: {"keep_rate": self.keep_rate}}


@dataclass(frozen=True)
class Repeat:
    """``times`` copies of ``blocks`` in sequence, each copy with fresh weights."""

    KIND: ClassVar[str] = "repeat"
    times: int
    blocks: tuple[Block, ...]

    def describe(self) -> dict[str, Any]:
        """The block's JSON form."""
        return {self.KIND: {"times": self.times, "blocks": [b.describe() for b in self.blocks]}}


@dataclass(frozen=True)
class Convolution:
    """A convolution over 1 to 3 spatial dimensions (fan-in = width_in * kernel taps)."""

    KIND: ClassVar[str] = "convolution"
    sigma_w2: float
    sigma_b2: float
    kernel: tuple[int, ...]
    stride: tuple[int, ...] = (1,)
    width: int | None = None
    weights: str = "gaussian"

    @property
    def taps(self) -> int:
        """Number of kernel taps (the product of the kernel sizes)."""
        n = 1
        for k in self.kernel:
            n *= k
        return n

    def describe(self) -> dict[str, Any]:
        """The block's JSON form."""
        body: dict[str, Any] = {"sigma_w2": self.sigma_w2, "sigma_b2": self.sigma_b2,
                                "kernel": _ints(self.kernel)}
        if any(s != 1 for s in self.stride):
            body["stride"] = _ints(self.stride)
        if self.width is not None:
            body["width"] = self.width
        if self.weights != "gaussian":
            body["weights"] = self.weights
        return {self.KIND: body}


@dataclass(frozen=True)
class Pooling:
    """Average or max pooling over windows, or the average over all positions."""

    KIND: ClassVar[str] = "pooling"
    kind: str
    window: tuple[int, ...] | None = None
    stride: tuple[int, ...] | None = None
    positions: int | None = None

    @property
    def size(self) -> int:
        """Positions averaged into one output position."""
        if self.window is None:
            return int(self.positions or 1)
        n = 1
        for k in self.window:
            n *= k
        return n

    @property
    def step(self) -> int:
        """Input positions per output position (the product of the strides)."""
        if self.stride is None:
            return self.size
        n = 1
        for s in self.stride:
            n *= s
        return n

    def describe(self) -> dict[str, Any]:
        """The block's JSON form."""
        body: dict[str, Any] = {"kind": self.kind}
        if self.window is not None:
            body["window"] = _ints(self.window)
            if self.stride is not None and self.stride != self.window:
                body["stride"] = _ints(self.stride)
        if self.positions is not None:
            body["positions"] = self.positions
        return {self.KIND: body}


@dataclass(frozen=True)
class Attention:
    """Multi-head self-attention over ``tokens`` positions, with value and output projections.

    Logits are ``query_key_scale * (W_Q x_t) . (W_K x_s) / sqrt(d_head)``; every
    projection has fan-in scaling.
    """

    KIND: ClassVar[str] = "attention"
    tokens: int
    heads: int = 1
    width: int | None = None
    value_sigma_w2: float = 1.0
    output_sigma_w2: float = 1.0
    query_key_sigma_w2: float = 1.0
    query_key_scale: float = 1.0
    sigma_b2: float = 0.0

    def describe(self) -> dict[str, Any]:
        """The block's JSON form (defaults left out)."""
        body: dict[str, Any] = {"tokens": self.tokens}
        defaults = Attention(tokens=self.tokens)
        for name in ("heads", "width", "value_sigma_w2", "output_sigma_w2",
                     "query_key_sigma_w2", "query_key_scale", "sigma_b2"):
            value = getattr(self, name)
            if value != getattr(defaults, name):
                body[name] = value
        return {self.KIND: body}


Block = Union[Dense, ActivationBlock, Residual, Norm, Dropout, Repeat, Convolution, Pooling,
              Attention]

#: Blocks with fresh random weights (they decouple a residual branch from the shortcut).
WEIGHT_BLOCKS = (Dense, Convolution, Attention)


@dataclass(frozen=True)
class PositionInfo:
    """Where a stream position comes from.

    Attributes
    ----------
    index : int
        Stream position (1 = after the first elementary block).
    path : str
        JSON pointer of the block in the description.
    repetitions : tuple of int
        The copy index (0-based) within each enclosing repeat, outermost first.
    kind : str
        The block kind ("dense", "residual"...).
    """

    index: int
    path: str
    repetitions: tuple[int, ...]
    kind: str

    @property
    def label(self) -> str:
        """The path, with the copy numbers of enclosing repeats when there are any."""
        if not self.repetitions:
            return self.path
        return f"{self.path} (copy {', '.join(str(r + 1) for r in self.repetitions)})"


def _positions(blocks: tuple[Block, ...]) -> int:
    n = 0
    for b in blocks:
        n += b.times * _positions(b.blocks) if isinstance(b, Repeat) else 1
    return n


def _expanded(blocks: tuple[Block, ...]) -> int:
    n = 0
    for b in blocks:
        if isinstance(b, Repeat):
            n += b.times * _expanded(b.blocks)
        elif isinstance(b, Residual):
            n += 1 + _expanded(b.branch)
        else:
            n += 1
    return n


@dataclass(frozen=True)
class Network:
    """A validated network: its blocks and the width of its input.

    Build one with :func:`propcalc.network`; :meth:`describe` gives the JSON
    description back.

    Attributes
    ----------
    blocks : tuple of Block
    input_width : int or None
        Units per position of the input (the first weight block's fan-in), when known.
    """

    blocks: tuple[Block, ...]
    input_width: int | None = None

    @property
    def n_positions(self) -> int:
        """Stream positions after the input (repeats expanded; a residual block is one)."""
        return _positions(self.blocks)

    @property
    def n_expanded_blocks(self) -> int:
        """Elementary blocks after expansion, the contents of residual branches included."""
        return _expanded(self.blocks)

    @property
    def cost(self) -> float:
        """Work estimate of a propagation, in correlation-map evaluations.

        One unit per activation block met once repeats are expanded (three when the
        network mixes positions: three correlations go through each activation), plus
        0.02 per other elementary block (arithmetic only). Copies after a bit-exact fixed
        point cost nothing, and repeated variances reuse cached moments, so this is an
        upper bound; a unit is about 0.05-2 ms (one point of a correlation map). Attention
        whose logits spread adds ``30 + 0.012 tokens``: four Monte Carlo moments of its
        softmax weights (:mod:`propcalc.networks.softmax_moments`, 5-10 ms each up to 2048
        tokens, about 0.003 ms per token beyond).
        """
        per_act = 3.0 if self.uses_positions() else 1.0

        def walk(blocks: tuple[Block, ...]) -> float:
            total = 0.0
            for b in blocks:
                if isinstance(b, Repeat):
                    total += b.times * walk(b.blocks)
                elif isinstance(b, Residual):
                    total += 0.02 + walk(b.branch)
                elif isinstance(b, ActivationBlock):
                    total += per_act
                elif isinstance(b, Attention) and b.query_key_scale * b.query_key_sigma_w2 > 0:
                    total += 30.0 + 0.012 * b.tokens
                else:
                    total += 0.02
            return total

        return walk(self.blocks)

    def describe(self) -> dict[str, Any]:
        """The JSON description (``network(net.describe()) == net``)."""
        out: dict[str, Any] = {"blocks": [b.describe() for b in self.blocks]}
        if self.input_width is not None:
            out["input_width"] = self.input_width
        return out

    def positions(self) -> Iterator[PositionInfo]:
        """Every stream position after the input, in order, with where it comes from."""
        index = 0

        def walk(blocks: tuple[Block, ...], prefix: str,
                 reps: tuple[int, ...]) -> Iterator[PositionInfo]:
            nonlocal index
            for i, b in enumerate(blocks):
                path = f"{prefix}/{i}"
                if isinstance(b, Repeat):
                    for r in range(b.times):
                        yield from walk(b.blocks, f"{path}/repeat/blocks", reps + (r,))
                else:
                    index += 1
                    yield PositionInfo(index, path, reps, b.KIND)

        yield from walk(self.blocks, "/blocks", ())

    def uses_positions(self) -> bool:
        """Whether any block mixes positions (pooling or attention)."""
        return self._holds(Pooling, Attention)

    def has_positions(self) -> bool:
        """Whether the stream has several positions anywhere (convolution, pooling, attention)."""
        return self._holds(Convolution, Pooling, Attention)

    def _holds(self, *kinds: type) -> bool:
        def walk(blocks: tuple[Block, ...]) -> bool:
            for b in blocks:
                if isinstance(b, kinds):
                    return True
                if isinstance(b, Repeat) and walk(b.blocks):
                    return True
                if isinstance(b, Residual) and walk(b.branch):
                    return True
            return False
        return walk(self.blocks)

