"""Result types of kernel shaping (frozen dataclasses; dict form derived from the fields)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ..activations.base import Activation
from ..errors import PropcalcError
from ..meanfield.report import Propagation
from ..results import OMIT, Result

__all__ = [
    "ShapingError",
    "Condition",
    "LayerMap",
    "ShapingRoot",
    "EdgeReference",
    "ResidualEquivalent",
    "DepthVerdict",
    "ShapedActivation",
]


class ShapingError(PropcalcError, ValueError):
    """No transform of the activation meets the shaping conditions in the searched region."""


@dataclass(frozen=True)
class Condition(Result):
    """One condition of the method, with the value propcalc's maps give on the activation.

    Attributes
    ----------
    name : str
        ``"Q(1)"``, ``"Q'(1)"``, ``"C(0)"``, ``"C'(1)"`` or ``"C_L(0)"``.
    required, achieved : float
    deviation : float
        ``|achieved - required|``.
    """

    name: str
    required: float
    achieved: float
    deviation: float

    @classmethod
    def of(cls, name: str, required: float, achieved: float) -> "Condition":
        """The condition with its deviation filled in."""
        return cls(name, float(required), float(achieved), abs(float(achieved) - float(required)))


@dataclass(frozen=True)
class LayerMap(Result):
    """The per-layer maps of the shaped activation at q = 1, sigma_w2 = 1, sigma_b2 = 0.

    Attributes
    ----------
    variance : float
        Q(1) = E[phi_hat(z)^2] (Poole et al. 2016, eq. 3).
    variance_slope : float
        Q'(1) (Stein's identity).
    correlation_at_0 : float
        C(0) = E[phi_hat(z)]^2.
    slope_at_1 : float
        C'(1) = E[phi_hat'(z)^2] = chi_1 (Schoenholz et al. 2017, eq. 8).
    curvature_at_1 : float or None
        C''(1) = E[phi_hat''(z)^2] (Price's theorem twice); inf when phi_hat has a
        kink (the map then behaves like c + k (1 - c)^(3/2) near 1); None when the
        activation has no formula text to differentiate twice.
    """

    variance: float
    variance_slope: float
    correlation_at_0: float
    slope_at_1: float
    curvature_at_1: float | None


@dataclass(frozen=True)
class ShapingRoot(Result):
    """One solution (alpha, beta, gamma, delta) of the shaping system.

    Attributes
    ----------
    alpha, beta, gamma, delta : float
    branch : int
        For the tailored transformation of a general activation, the sign of
        ``E[phi(alpha z + beta)] + delta`` (+1 or -1); 0 for deep kernel shaping.
    conditions : tuple of Condition
        Every condition, checked with propcalc's maps on this root's activation.
    max_deviation : float
    variance_map_deviation : float
        max |Q(q) - q| over q in [1/2, 2]: how far the variance map strays from
        the identity for inputs whose norm is off (the choice rule).
    chosen : bool
    """

    alpha: float
    beta: float
    gamma: float
    delta: float
    branch: int
    conditions: tuple[Condition, ...]
    max_deviation: float
    variance_map_deviation: float
    chosen: bool


@dataclass(frozen=True)
class EdgeReference(Result):
    """The base activation at its edge of chaos: the network map before shaping.

    Attributes
    ----------
    activation : str
    sigma_w2, sigma_b2, q_star : float
    network_map_at_0 : float
        C_L(0) at the same depth.
    network_slope_at_1 : float
        C_L'(1) (1 on the edge of chaos).
    correlations : tuple of float
        c_0 = 0, c_1, ..., c_L.
    """

    activation: str
    sigma_w2: float
    sigma_b2: float
    q_star: float
    network_map_at_0: float
    network_slope_at_1: float
    correlations: tuple[float, ...]


@dataclass(frozen=True)
class ResidualEquivalent(Result):
    """A residual ReLU network with the same network correlation map.

    Blocks ``x <- shortcut_weight x + branch_weight W relu(x)`` with W of
    variance 2 / fan_in (He initialisation of the branch) and
    ``shortcut_weight^2 + branch_weight^2 = 1`` keep the variance; the
    description's form ``x <- x + weight W relu(x)`` with
    ``weight = branch_weight / shortcut_weight`` has the same correlation map
    (the variance then grows by 1 + weight^2 per block, which a correlation
    does not see).

    Attributes
    ----------
    shortcut_weight, branch_weight, weight : float
    per_block : str
        ``"identical"`` when every block has the shaped activation's per-layer
        map (the leaky form), ``"network only"`` when only C_L(0) agrees.
    network_map_at_0 : float
        The residual network's C_L(0).
    description : mapping
        The network description (the blocks format of the network analysis).
    """

    shortcut_weight: float
    branch_weight: float
    weight: float
    per_block: str
    network_map_at_0: float
    description: Mapping[str, Any]


@dataclass(frozen=True)
class DepthVerdict(Result):
    """The propagation report of the shaped activation at its depth, in brief.

    Attributes
    ----------
    depth : int
    phase : str
    chi_1 : float
    xi_c : float or None
    trainable_depth : float or None
        6 xi_c (Schoenholz et al. 2017, an empirical rule); inf on the edge of chaos.
    gradient_growth : float or None
        chi_1^depth.
    within : bool
        True when the depth is inside the trainable depth.
    text : str
    """

    depth: int
    phase: str
    chi_1: float
    xi_c: float | None
    trainable_depth: float | None
    gradient_growth: float | None
    within: bool
    text: str


@dataclass(frozen=True)
class ShapedActivation(Result):
    """An activation shaped for a depth (:func:`propcalc.shape_activation`).

    Attributes
    ----------
    method : str
        ``"tat"`` (tailored activation transformation, Zhang et al. 2022) or
        ``"dks"`` (deep kernel shaping, Martens et al. 2021).
    form : str
        ``"slope"`` (the leaky-ReLU form) or ``"affine"``
        (``gamma (phi(alpha x + beta) + delta)``).
    base : str
        The activation that was shaped.
    depth : int
    target : float
    target_quantity : str
        ``"C_L(0)"`` for tat, ``"C_L'(1)"`` for dks.
    params : mapping
        ``{"slope": a}`` for the slope form, else alpha, beta, gamma, delta.
    formula : str or None
        The shaped activation in propcalc's formula syntax (with ``params``).
    activation : Activation
        phi_hat, usable by every analysis (not in the dict form).
    sigma_w2, sigma_b2 : float
        1 and 0: the initialisation the shaped activation is made for.
    weights : str
    layer_map : LayerMap
    network_map_at_0 : float
        The achieved C_L(0).
    network_slope_at_1 : float
        The achieved C_L'(1).
    correlations : tuple of float
        c_0 = 0, c_1, ..., c_L through the shaped network.
    conditions : tuple of Condition
    roots : tuple of ShapingRoot
        Every solution found (the affine form), the chosen one marked.
    choice_rule : str
    depth_verdict : DepthVerdict
    reference : EdgeReference or None
        The base activation at its edge of chaos (the map before shaping).
    residual_equivalent : ResidualEquivalent or None
    network_description : mapping or None
        The shaped plain network in the blocks format of the network analysis
        (:func:`propcalc.network_propagation`): a dense input layer, then ``depth``
        times the shaped activation (as its formula) and a dense layer, all with
        sigma_w2 = 1 and sigma_b2 = 0. None when the activation has no formula text.
    notes : tuple of str
    propagation : Propagation
        The full propagation report of the shaped activation (not in the dict form).
    base_activation : Activation
        The activation that was shaped (not in the dict form).
    """

    method: str
    form: str
    base: str
    depth: int
    target: float
    target_quantity: str
    params: Mapping[str, float]
    formula: str | None
    activation: Activation = field(metadata=OMIT, repr=False)
    sigma_w2: float = 1.0
    sigma_b2: float = 0.0
    weights: str = ""
    layer_map: LayerMap | None = None
    network_map_at_0: float = 0.0
    network_slope_at_1: float = 1.0
    correlations: tuple[float, ...] = ()
    conditions: tuple[Condition, ...] = ()
    roots: tuple[ShapingRoot, ...] = ()
    choice_rule: str = ""
    depth_verdict: DepthVerdict | None = None
    reference: EdgeReference | None = None
    residual_equivalent: ResidualEquivalent | None = None
    network_description: Mapping[str, Any] | None = None
    notes: tuple[str, ...] = ()
    propagation: Propagation | None = field(default=None, metadata=OMIT, repr=False)
    base_activation: Activation | None = field(default=None, metadata=OMIT, repr=False)

    def network_map(self, c: Any) -> np.ndarray:
        """C_L(c) of the shaped network, vectorised over c.

        The closed form of :mod:`propcalc.shaping.leaky` for the slope form (equal to
        propcalc's maps to rounding), else propcalc's maps composed over the depth.
        """
        from .leaky import leaky_coefficient, leaky_network_map
        from .network_map import compose_correlation_map

        if self.form == "slope":
            return leaky_network_map(c, leaky_coefficient(float(self.params["slope"])),
                                     self.depth)
        return compose_correlation_map(self.activation, c, self.depth, 1.0, 0.0, 1.0)

    def reference_network_map(self, c: Any) -> np.ndarray | None:
        """C_L(c) of the base activation at its edge of chaos (None without a reference).

        For ReLU and leaky ReLU the normalised map at the edge (sigma_w2 = 2 / (1 + s^2),
        sigma_b2 = 0) is the closed form with k = (1 - s)^2 / (pi (1 + s^2)).
        """
        from .leaky import leaky_coefficient, leaky_network_map
        from .network_map import compose_correlation_map

        ref, base = self.reference, self.base_activation
        if ref is None or base is None:
            return None
        if self.form == "slope":
            slope = float(base.params.get("slope", 0.0)) if base.name == "leaky_relu" else 0.0
            return leaky_network_map(c, leaky_coefficient(slope), self.depth)
        return compose_correlation_map(base, c, self.depth, ref.sigma_w2, ref.sigma_b2,
                                       ref.q_star)

    def torch_module(self) -> Any:
        """A ``torch.nn.Module`` computing phi_hat (torch imported here).

        See :func:`propcalc.shaping.torch_module.shaped_module`.
        """
        from .torch_module import shaped_module

        return shaped_module(self)
