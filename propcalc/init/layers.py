"""Per-layer plan types: a layer's shape (:class:`Layer`) and its initialisation (:class:`LayerInit`).

The bottom of :mod:`propcalc.init`: the laws a weight can be drawn from and the numbers that fix
each law for one layer. :mod:`propcalc.init.draw` turns a :class:`LayerInit` into arrays,
:mod:`propcalc.init.plan` collects them into an :class:`~propcalc.init.plan.InitPlan`, and
:mod:`propcalc.init.planner` makes the plan. Imports run one way: layers -> draw -> plan ->
gains, planner.

Conventions: ``W_ij ~ N(0, sigma_w2 / fan_in)``, ``b_i ~ N(0, sigma_b2)``;
a gain g means ``std = g / sqrt(fan_in)``, i.e. ``sigma_w2 = g^2``.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from ..vocabulary import DISTRIBUTIONS  # the laws a weight matrix can be drawn from
from ..errors import InvalidParameterError, check_int
from ..results import OMIT, Result, inline

__all__ = [
    "DISTRIBUTIONS",
    "TRUNCATION",
    "Layer",
    "LayerInit",
    "layer_init",
    "truncated_normal_factor",
]

#: truncated normals are cut at +-2 standard deviations (of the untruncated law)
TRUNCATION = 2.0


def truncated_normal_factor(bound: float = TRUNCATION) -> float:
    """std of N(0, 1) truncated to [-bound, bound]: sqrt(1 - 2 b phi(b) / (2 Phi(b) - 1)).

    (Johnson, Kotz & Balakrishnan 1994, Continuous Univariate Distributions
    vol. 1, eq. 13.134, the variance of a doubly truncated normal.)
    """
    b = float(bound)
    dens = math.exp(-0.5 * b * b) / math.sqrt(2.0 * math.pi)
    mass = 2.0 * float(special.ndtr(b)) - 1.0
    return math.sqrt(1.0 - 2.0 * b * dens / mass)


@dataclass(frozen=True)
class Layer(Result):
    """A dense or convolutional layer, described by its shape.

    Attributes
    ----------
    fan_in, fan_out : int
        Inputs and outputs per unit: for a convolution with kernel size k
        (product over spatial dims), ``fan_in = in_channels * k`` and
        ``fan_out = out_channels * k``.
    kind : str
        "dense" or "conv".
    in_features, out_features : int
        Matrix shape: columns and rows of the weight reshaped to 2-D
        (``out_channels`` rows and ``in_channels * k`` columns for a convolution). Not
        shown in the repr, where a Conv2d(3, 16, 3) would read "in_features=27": the fans
        and the weight shape say it in the convolution's own terms.
    in_channels, out_channels : int
        Of a convolution (properties; for a dense layer, its numbers of inputs and
        outputs).
    weight_shape : tuple of int
        (out, in) for dense layers; (out_channels, in_channels, *kernel) for
        convolutions (derived from the other fields).
    kernel_size : tuple of int
        () for dense layers.
    """

    fan_in: int
    fan_out: int
    kind: str = "dense"
    in_features: int = field(default=0, repr=False, metadata=OMIT)
    out_features: int = field(default=0, repr=False, metadata=OMIT)
    weight_shape: tuple[int, ...] = field(init=False)
    kernel_size: tuple[int, ...] = ()

    def __post_init__(self) -> None:
        # (out, in) for dense layers; (out_channels, in_channels, *kernel) for convolutions
        if self.kind == "dense":
            shape: tuple[int, ...] = (self.out_features, self.in_features)
        else:
            k = int(np.prod(self.kernel_size))
            shape = (self.out_features, self.in_features // k, *self.kernel_size)
        object.__setattr__(self, "weight_shape", shape)

    @property
    def in_channels(self) -> int:
        """Input channels of a convolution (inputs of a dense layer)."""
        return self.weight_shape[1]

    @property
    def out_channels(self) -> int:
        """Output channels of a convolution (outputs of a dense layer)."""
        return self.weight_shape[0]

    @staticmethod
    def chain(layers: Sequence["Layer"], field: str = "layers") -> tuple["Layer", ...]:
        """The layers of a plain stack, checked to take each other's outputs.

        Each dense layer after a dense layer must take as many inputs as the previous one
        has outputs; each convolution after a convolution as many input channels as the
        previous one has output channels (issue 12 section 2: ``--conv 3:64:3x3 --conv
        32:64:3x3`` was accepted). A dense layer after a convolution (a flattening) and a
        convolution after a dense layer are not checked.
        The command line's ``--conv`` layers and the service's ``layers`` describe a plain
        stack and pass through here; :func:`propcalc.recommend` takes ``layers`` as given,
        since the layers of a real module (``module_layers``: residual projections, grouped
        convolutions, concatenations) need not chain.

        Raises
        ------
        InvalidParameterError
            Naming ``field[i]`` of the first layer that does not take the previous one's
            outputs.
        """
        out = tuple(layers)
        for i, layer in enumerate(out):
            if not isinstance(layer, Layer):
                raise InvalidParameterError(f"{field}[{i}]", "a Layer", layer)
        for i in range(1, len(out)):
            prev, cur = out[i - 1], out[i]
            if prev.kind != cur.kind:
                continue
            if cur.kind == "dense":
                what, got, want = "inputs", cur.in_features, prev.out_features
            else:
                what, got, want = "input channels", cur.in_channels, prev.out_channels
            if got != want:
                raise InvalidParameterError(
                    f"{field}[{i}]", f"a layer with {want} {what}, the outputs of "
                    f"{field}[{i - 1}], in a plain stack", got)
        return out

    @classmethod
    def dense(cls, in_features: int, out_features: int) -> "Layer":
        """A dense layer with the given numbers of inputs and outputs."""
        i = check_int("in_features", in_features, 1)
        o = check_int("out_features", out_features, 1)
        return cls(i, o, "dense", i, o, ())

    @classmethod
    def conv(cls, in_channels: int, out_channels: int, kernel_size: int | Sequence[int]) -> "Layer":
        """A convolution; ``kernel_size`` an int or one int per spatial dimension."""
        i = check_int("in_channels", in_channels, 1)
        o = check_int("out_channels", out_channels, 1)
        if isinstance(kernel_size, (str, bytes)):
            raise InvalidParameterError("kernel_size", "a positive int or a list of them", kernel_size)
        if isinstance(kernel_size, numbers.Real):
            ks = (kernel_size,)
        else:
            try:
                ks = tuple(kernel_size)
            except TypeError:
                raise InvalidParameterError("kernel_size", "a positive int or a list of them",
                                            kernel_size) from None
        if not ks:
            raise InvalidParameterError("kernel_size", "a positive int or a non-empty list", kernel_size)
        ks = tuple(check_int("kernel_size", k, 1) for k in ks)
        k = int(np.prod(ks))
        return cls(i * k, o * k, "conv", i * k, o, ks)


@dataclass(frozen=True)
class LayerInit(Result):
    """Initialisation of one layer.

    Attributes
    ----------
    index : int
        1-based layer number.
    layer : Layer or None
        None when only the depth was given (the scales then depend on fan_in
        as ``gain / sqrt(fan_in)``).
    sigma_w2, sigma_b2 : float
    weight_std : float or None
        std of a normal law, sqrt(sigma_w2 / fan_in).
    uniform_bound : float or None
        a in U(-a, a) with the same variance: sqrt(3) std.
    truncated_normal_std : float or None
        std before truncation at +-2 std, so that the truncated law has the
        planned variance: std / 0.8796...
    orthogonal_scale : float or None
        Multiplier of a (semi-)orthogonal matrix of the weight's 2-D shape:
        sqrt(sigma_w2 * max(1, rows / cols)) (rows orthonormal when rows <= cols).
    bias_std : float
        sqrt(sigma_b2).
    gain : float
        sqrt(sigma_w2): the std in units of 1 / sqrt(fan_in).
    value : float or None
        The one number for the chosen distribution.
    """

    index: int
    layer: Layer | None = field(metadata=inline(absent={"kind": None}))
    sigma_w2: float
    sigma_b2: float
    weight_std: float | None
    uniform_bound: float | None
    truncated_normal_std: float | None
    orthogonal_scale: float | None
    bias_std: float
    gain: float
    value: float | None


def layer_init(index: int, layer: Layer | None, sw: float, sb: float, distribution: str) -> LayerInit:
    """The initialisation of one layer: every law's scale for weight variance ``sw / fan_in``.

    Normal std ``sqrt(sw / fan_in)``; uniform bound ``sqrt(3)`` std (U(-a, a) has variance
    a^2 / 3); truncated-normal std before the cut, std / :func:`truncated_normal_factor`; the
    multiplier of a (semi-)orthogonal matrix, ``sqrt(sw max(1, rows / cols))`` (every entry then
    has mean square ``sw / cols``). Without a shape (``layer`` None) only the gain and the bias
    std are known.
    """
    bias_std = math.sqrt(sb)
    gain = math.sqrt(sw)
    if layer is None:
        return LayerInit(index, None, sw, sb, None, None, None, None, bias_std, gain, None)
    std = math.sqrt(sw / layer.fan_in)
    rows, cols = layer.out_features, layer.in_features
    values = {
        "normal": std,
        "uniform": math.sqrt(3.0) * std,
        "truncated_normal": std / truncated_normal_factor(),
        "orthogonal": math.sqrt(sw * max(1.0, rows / cols)),
    }
    return LayerInit(index, layer, sw, sb, values["normal"], values["uniform"],
                     values["truncated_normal"], values["orthogonal"], bias_std, gain,
                     values[distribution])
