"""The words and tolerances propcalc's results are spoken in, defined once.

Every phase, variance status, weight distribution and planning target that a
result carries is a member of one of the string enums below. They are
``StrEnum`` members, so they compare equal to their text (``Phase.ORDERED ==
"ordered"``), format as their text, and a result's dict and JSON form keeps
exactly the strings it always had. The tuples (``PHASES``...) list the texts
in their documented order for front ends that need plain choices.

The tolerances that decide a verdict from a computed slope are named here,
and only here, with the reason for their size.
"""

from __future__ import annotations

import enum

__all__ = [
    "Phase",
    "VarianceStatus",
    "Distribution",
    "BiasDistribution",
    "Target",
    "PHASES",
    "VARIANCE_STATUSES",
    "DISTRIBUTIONS",
    "BIAS_DISTRIBUTIONS",
    "TARGETS",
    "EDGE_TOLERANCE",
    "EDGE_BAND",
    "NEUTRAL_TOLERANCE",
]


class Phase(enum.StrEnum):
    """Phase of a deep random network (Poole et al. 2016; Schoenholz et al. 2017).

    ordered: chi_1 < 1 (c* = 1, gradients vanish); chaotic: chi_1 > 1 (c* < 1,
    gradients explode); edge of chaos: chi_1 = 1 within :data:`EDGE_BAND`;
    unbounded variance: the forward variance has no finite fixed point to
    settle to, so no phase in the sense of those papers applies.
    """

    ORDERED = "ordered"
    EDGE_OF_CHAOS = "edge of chaos"
    CHAOTIC = "chaotic"
    UNBOUNDED = "unbounded variance"


class VarianceStatus(enum.StrEnum):
    """Where the layer-to-layer flow of the pre-activation variance goes.

    fixed_point: it settles to a finite q* > 0; collapse: it flows to q = 0;
    unbounded: it grows without bound; neutral: V(q) = q for every q, so it
    keeps its input value.
    """

    FIXED_POINT = "fixed_point"
    COLLAPSE = "collapse"
    UNBOUNDED = "unbounded"
    NEUTRAL = "neutral"


class Distribution(enum.StrEnum):
    """Distribution of the weights of an initialisation plan."""

    NORMAL = "normal"
    UNIFORM = "uniform"
    TRUNCATED_NORMAL = "truncated_normal"
    ORTHOGONAL = "orthogonal"


class BiasDistribution(enum.StrEnum):
    """Distribution of the biases when a plan is drawn ("plan": the plan's own)."""

    NORMAL = "normal"
    UNIFORM = "uniform"
    TRUNCATED_NORMAL = "truncated_normal"
    PLAN = "plan"


class Target(enum.StrEnum):
    """What an initialisation plan aims at.

    auto: the edge of chaos where it exists, else variance preservation; edge:
    the edge of chaos; variance: preserve the forward variance (sigma_b2 = 0);
    bias: the edge of chaos at a given sigma_b2.
    """

    AUTO = "auto"
    EDGE = "edge"
    VARIANCE = "variance"
    BIAS = "bias"


PHASES: tuple[str, ...] = tuple(p.value for p in Phase)
VARIANCE_STATUSES: tuple[str, ...] = tuple(s.value for s in VarianceStatus)
DISTRIBUTIONS: tuple[str, ...] = tuple(d.value for d in Distribution)
BIAS_DISTRIBUTIONS: tuple[str, ...] = tuple(d.value for d in BiasDistribution)
TARGETS: tuple[str, ...] = tuple(t.value for t in Target)

#: The edge-of-chaos band: a point whose |chi_1 - 1| is at or below this is reported as
#: "edge of chaos" (xi_c infinite). The Gaussian integrals give chi_1 to about 1e-14
#: relative (1e-12 for piecewise activations), so the band is far above their error; and
#: it is narrow enough that the depth scale it hides, xi_c ~ 1 / |chi_1 - 1| layers
#: (Schoenholz et al. 2017, eq. 9 expanded near chi_1 = 1), exceeds 1e8 layers there.
#: A point printed with enough digits to place chi_1 within 1e-10 reproduces the verdict.
EDGE_TOLERANCE = 1e-9
#: The verdict band around the edge of chaos: a point with |chi_1 - 1| <= EDGE_BAND is
#: reported in the phase "edge of chaos". A critical point printed to 6 significant digits
#: and pasted back moves sigma_w2 and sigma_b2 by up to 5e-7 relative, which moves chi_1 by
#: up to a few times that (tanh at q* = 1: 8e-7, erf: 1.3e-6); 1e-5 covers it, so the
#: pasted point gets the same verdict. Inside the band but beyond EDGE_TOLERANCE the depth
#: scale is still computed and reported: xi_c ~ 1 / |chi_1 - 1| (smooth phi; 2 / |chi_1 - 1|
#: kinked) exceeds 1e5 layers there (Schoenholz et al. 2017, eq. 9 near chi_1 = 1), beyond
#: the depth of any network that is trained.
EDGE_BAND = 1e-5
#: A map slope (chi_q = V'(q*), a spectral radius...) within this of 1 is neutral to first
#: order: neither attracting nor repelling by its slope alone. The variance fixed points
#: then decide from the next term of the map (the sign of V(q) - q on each side). The same
#: size as EDGE_TOLERANCE, for the same reason.
NEUTRAL_TOLERANCE = EDGE_TOLERANCE
