"""Draw the weight and bias arrays of an initialisation plan.

An :class:`~propcalc.init.plan.InitPlan` gives, for every layer, the
variance ``sigma_w2 / fan_in`` of the weights and ``sigma_b2`` of the biases
together with the number that fixes the chosen distribution. This module
turns it into arrays, from a seeded :class:`numpy.random.Generator`:

* ``"normal"``: ``W_ij ~ N(0, sigma_w2 / fan_in)``;
* ``"uniform"``: ``W_ij ~ U(-a, a)`` with ``a = sqrt(3) std`` (variance
  ``a^2 / 3``);
* ``"truncated_normal"``: a normal of standard deviation ``s`` cut at
  ``+-2 s`` (:data:`propcalc.init.layers.TRUNCATION`), ``s`` chosen so that the
  truncated law has the planned variance (Johnson, Kotz & Balakrishnan 1994,
  eq. 13.134); drawn by rejection, which accepts 95.4% of normal draws;
* ``"orthogonal"``: a Haar-random (semi-)orthogonal matrix of the weight's
  2-D shape ``(rows, cols) = (out, in * k)``, from the QR decomposition of a
  Gaussian matrix with the signs of R's diagonal moved into Q (Mezzadri
  2007, "How to generate random matrices from the classical compact
  groups", section 5), times ``orthogonal_scale = sqrt(sigma_w2 max(1,
  rows / cols))``: every entry then has mean square ``sigma_w2 / cols``
  exactly, the fan-in variance of the plan.

Convolution weights are drawn as the matrix ``(out_channels, in_channels *
prod(kernel))`` and reshaped (row-major) to ``(out, in, *kernel)``, the
layout of ``weight.reshape(out, -1)`` in common frameworks.

Biases are ``N(0, sigma_b2)`` by default: the mean-field theory adds a
Gaussian bias to a Gaussian sum (Poole et al. 2016), so that is the law its
predictions hold for. ``bias_distribution`` can pick a uniform or truncated
normal law of the same variance instead.

Seeds: an int (or ``SeedSequence``) is spawned into one independent stream
per layer and per array, so a layer's draw depends only on the seed, its
index and its own shape; a ``Generator`` is used as given, in layer order.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any, Protocol

import numpy as np

from ..vocabulary import BIAS_DISTRIBUTIONS
from ..errors import InvalidParameterError
from ..results import OMIT, Result
from .layers import DISTRIBUTIONS, TRUNCATION, Layer, LayerInit, truncated_normal_factor

__all__ = [
    "PlanLike",
    "BIAS_DISTRIBUTIONS",
    "LayerArrays",
    "PlanArrays",
    "draw_plan",
    "draw_layer",
    "semi_orthogonal",
    "truncated_normal",
]

#: Laws a bias vector can be drawn from ("plan": the plan's weight law; orthogonal -> normal).

SeedLike = int | np.random.SeedSequence | np.random.Generator | None


@dataclass(frozen=True)
class LayerArrays(Result):
    """The drawn arrays of one layer.

    Attributes
    ----------
    index : int
        1-based layer number, as in the plan.
    layer : Layer
        The shape the arrays were drawn for.
    distribution, bias_distribution : str
        The laws of the weights and of the biases.
    weight : ndarray
        Shape ``layer.weight_shape``, float64.
    bias : ndarray
        Shape ``(layer.out_features,)``, float64.
    weight_shape, bias_shape : tuple of int
        The arrays' shapes (the dict form shows these, not the arrays).
    weight_std, bias_std : float
        Planned standard deviations of one entry: ``sqrt(sigma_w2 / fan_in)``
        and ``sqrt(sigma_b2)``.
    """

    index: int
    layer: Layer
    distribution: str
    bias_distribution: str
    weight: np.ndarray = field(metadata=OMIT)
    bias: np.ndarray = field(metadata=OMIT)
    weight_shape: tuple[int, ...] = field(init=False)
    bias_shape: tuple[int, ...] = field(init=False)
    weight_std: float
    bias_std: float

    dict_properties = ("sample_weight_std", "sample_bias_std")

    def __post_init__(self) -> None:
        object.__setattr__(self, "weight_shape", tuple(self.weight.shape))
        object.__setattr__(self, "bias_shape", tuple(self.bias.shape))

    @cached_property
    def sample_weight_std(self) -> float:
        """Root mean square of the drawn weights (to compare with ``weight_std``)."""
        return float(np.sqrt(np.mean(self.weight ** 2)))

    @cached_property
    def sample_bias_std(self) -> float:
        """Root mean square of the drawn biases (0 for an empty bias)."""
        return float(np.sqrt(np.mean(self.bias ** 2))) if self.bias.size else 0.0


@dataclass(frozen=True)
class PlanArrays(Result):
    """Arrays drawn for every layer of a plan.

    Attributes
    ----------
    activation, distribution, bias_distribution : str
    seed_entropy : int or None
        The entropy of the ``SeedSequence`` used (reproduces the draw with
        ``draw_plan(plan, seed=np.random.SeedSequence(seed_entropy))``), or
        None when a ``Generator`` was passed.
    layers : tuple of LayerArrays
    """

    activation: str
    distribution: str
    bias_distribution: str
    seed_entropy: int | None
    layers: tuple[LayerArrays, ...]


# -------------------------------------------------------------------------------------------
# the laws
# -------------------------------------------------------------------------------------------
def truncated_normal(shape: tuple[int, ...], std: float, rng: np.random.Generator,
                     bound: float = TRUNCATION) -> np.ndarray:
    """Draws of N(0, std^2) conditioned on ``|x| <= bound * std``, by rejection.

    Parameters
    ----------
    shape : tuple of int
    std : float
        Standard deviation of the normal law *before* truncation (>= 0).
    rng : numpy.random.Generator
    bound : float
        Truncation in units of ``std``; the acceptance rate is
        ``2 Phi(bound) - 1`` (0.954 for 2), so a few rounds suffice.

    Returns
    -------
    ndarray
        Variance ``(std * truncated_normal_factor(bound))^2``.
    """
    n = int(np.prod(shape))
    out = rng.standard_normal(n)
    bad = np.flatnonzero(np.abs(out) > bound)
    while bad.size:
        fresh = rng.standard_normal(bad.size)
        out[bad] = fresh
        bad = bad[np.abs(fresh) > bound]
    return (out * std).reshape(shape)


def semi_orthogonal(rows: int, cols: int, rng: np.random.Generator) -> np.ndarray:
    """A Haar-random matrix with orthonormal rows (rows <= cols) or columns (rows > cols).

    QR of a ``max x min`` standard Gaussian matrix, with Q's columns
    multiplied by the signs of R's diagonal so that the law is exactly Haar
    (Mezzadri 2007, section 5); transposed when ``rows < cols``.
    """
    big, small = max(rows, cols), min(rows, cols)
    a = rng.standard_normal((big, small))
    q, r = np.linalg.qr(a)
    d = np.sign(np.diag(r))
    d[d == 0] = 1.0
    q = q * d
    return q if rows >= cols else q.T


def _weight(layer: Layer, init: LayerInit, distribution: str,
            rng: np.random.Generator) -> np.ndarray:
    shape = layer.weight_shape
    rows, cols = layer.out_features, layer.in_features
    std = math.sqrt(init.sigma_w2 / layer.fan_in)
    if distribution == "normal":
        return rng.standard_normal(shape) * std
    if distribution == "uniform":
        a = math.sqrt(3.0) * std
        return rng.uniform(-a, a, size=shape)
    if distribution == "truncated_normal":
        return truncated_normal(shape, std / truncated_normal_factor(), rng)
    # orthogonal: scale so each entry has mean square sigma_w2 / cols (= sigma_w2 / fan_in)
    scale = math.sqrt(init.sigma_w2 * max(1.0, rows / cols))
    return (semi_orthogonal(rows, cols, rng) * scale).reshape(shape)


def _bias(n: int, sigma_b2: float, law: str, rng: np.random.Generator) -> np.ndarray:
    std = math.sqrt(sigma_b2)
    if law == "uniform":
        a = math.sqrt(3.0) * std
        return rng.uniform(-a, a, size=n)
    if law == "truncated_normal":
        return truncated_normal((n,), std / truncated_normal_factor(), rng)
    return rng.standard_normal(n) * std


def _check_layer_matches(index: int, planned: Layer, given: Layer) -> None:
    if planned.weight_shape != given.weight_shape or planned.kind != given.kind:
        raise InvalidParameterError(
            f"layers[{index - 1}]",
            f"the plan's layer {index} ({planned.kind}, weight shape {planned.weight_shape}, "
            f"fan_in {planned.fan_in})",
            f"{given.kind} layer with weight shape {given.weight_shape}, fan_in {given.fan_in}")


class PlanLike(Protocol):
    """What :func:`draw_plan` reads from a plan (an :class:`~propcalc.init.plan.InitPlan`).

    The plan type sits above this module (its ``draw`` method calls :func:`draw_plan`), so the
    plan is described by the fields read, not imported.
    """

    activation: str
    distribution: str
    layers: tuple[LayerInit, ...]


def _is_plan(plan: Any) -> bool:
    layers = getattr(plan, "layers", None)
    return (isinstance(getattr(plan, "activation", None), str)
            and isinstance(getattr(plan, "distribution", None), str)
            and isinstance(layers, tuple) and all(isinstance(x, LayerInit) for x in layers))


_Streams = list[tuple[np.random.Generator, np.random.Generator]]


def _streams(seed: SeedLike, n_layers: int) -> tuple[_Streams, int | None]:
    if isinstance(seed, np.random.Generator):
        return [(seed, seed)] * n_layers, None
    if isinstance(seed, (bool, np.bool_)) or not (
            seed is None or isinstance(seed, (int, np.integer, np.random.SeedSequence))):
        raise InvalidParameterError(
            "seed", "an int >= 0, a numpy SeedSequence or Generator, or None", seed)
    if isinstance(seed, (int, np.integer)) and seed < 0:
        raise InvalidParameterError("seed", "an int >= 0", seed)
    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    out = []
    for child in ss.spawn(n_layers):
        w, b = child.spawn(2)
        out.append((np.random.default_rng(w), np.random.default_rng(b)))
    entropy = ss.entropy if isinstance(ss.entropy, int) else None
    return out, entropy


def draw_layer(init: LayerInit, distribution: str, rng: np.random.Generator, *,
               layer: Layer | None = None, bias_rng: np.random.Generator | None = None,
               bias_distribution: str = "normal") -> LayerArrays:
    """Draw the weight and bias of one planned layer.

    Parameters
    ----------
    init : LayerInit
        One entry of ``InitPlan.layers``.
    distribution : str
        One of :data:`propcalc.init.layers.DISTRIBUTIONS`.
    rng : numpy.random.Generator
        Stream for the weight (and the bias, unless ``bias_rng`` is given).
    layer : Layer, optional
        The shape, required when the plan has none (a depth-only plan);
        must agree with it otherwise.
    bias_rng : numpy.random.Generator, optional
    bias_distribution : str
        One of :data:`BIAS_DISTRIBUTIONS`.

    Returns
    -------
    LayerArrays
    """
    if distribution not in DISTRIBUTIONS:
        raise InvalidParameterError("distribution", f"one of {', '.join(DISTRIBUTIONS)}",
                                    distribution)
    if bias_distribution not in BIAS_DISTRIBUTIONS:
        raise InvalidParameterError("bias_distribution", f"one of {', '.join(BIAS_DISTRIBUTIONS)}",
                                    bias_distribution)
    shape = init.layer if layer is None else layer
    if shape is None:
        raise InvalidParameterError(
            f"layers[{init.index - 1}]", "a known Layer shape",
            None, "the plan was made from a depth alone: pass layers=..., or make the plan with "
            "recommend(..., widths=...) or layers=...")
    if layer is not None and init.layer is not None:
        _check_layer_matches(init.index, init.layer, layer)
    law = bias_distribution
    if law == "plan":
        law = distribution if distribution != "orthogonal" else "normal"
    weight = _weight(shape, init, distribution, rng)
    bias = _bias(shape.out_features, init.sigma_b2, law, rng if bias_rng is None else bias_rng)
    return LayerArrays(init.index, shape, distribution, law, weight, bias,
                       math.sqrt(init.sigma_w2 / shape.fan_in), math.sqrt(init.sigma_b2))


def draw_plan(plan: PlanLike, seed: SeedLike = None, *, bias_distribution: str = "normal",
              layers: Sequence[Layer] | None = None) -> PlanArrays:
    """Draw weight and bias arrays for every layer of an initialisation plan.

    Parameters
    ----------
    plan : InitPlan
        From :func:`propcalc.recommend`.
    seed : int, SeedSequence, Generator or None
        An int or SeedSequence gives a reproducible draw, with one
        independent stream per layer and array (so layer k's arrays depend
        only on the seed, k and its shape); a Generator is consumed in layer
        order; None draws fresh entropy (recorded in ``seed_entropy``).
    bias_distribution : str
        "normal" (default: the Gaussian bias the mean-field predictions
        assume), "uniform", "truncated_normal" (same variance sigma_b2), or
        "plan" (the plan's weight law; normal for orthogonal plans).
    layers : sequence of Layer, optional
        Shapes for a plan made from a depth alone; checked against the plan's
        shapes when it has them.

    Returns
    -------
    PlanArrays

    Raises
    ------
    InvalidParameterError
        For a bad seed or law, a missing shape, or shapes that disagree with
        the plan.

    Examples
    --------
    >>> import propcalc
    >>> from propcalc.init.draw import draw_plan
    >>> plan = propcalc.recommend(propcalc.activation("tanh"), widths=[8, 16, 4])
    >>> arrays = draw_plan(plan, seed=0)
    >>> [la.weight.shape for la in arrays.layers]
    [(16, 8), (4, 16)]
    """
    if not _is_plan(plan):
        raise InvalidParameterError("plan", "an InitPlan (from propcalc.recommend)",
                                    type(plan).__name__)
    if layers is not None:
        layers = list(layers)
        if len(layers) != len(plan.layers):
            raise InvalidParameterError("layers", f"a list of {len(plan.layers)} Layers (one per "
                                        "planned layer)", f"{len(layers)} layers")
        for i, lay in enumerate(layers):
            if not isinstance(lay, Layer):
                raise InvalidParameterError(f"layers[{i}]", "a Layer", lay)
    streams, entropy = _streams(seed, len(plan.layers))
    out = []
    for i, init in enumerate(plan.layers):
        w_rng, b_rng = streams[i]
        out.append(draw_layer(init, plan.distribution, w_rng,
                              layer=None if layers is None else layers[i], bias_rng=b_rng,
                              bias_distribution=bias_distribution))
    law = out[0].bias_distribution if out else bias_distribution
    return PlanArrays(plan.activation, plan.distribution, law, entropy, tuple(out))
