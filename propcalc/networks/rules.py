"""How each block kind moves the stream's kernel forward and its gradient backward.

The stream at infinite width (per unit, over the random weights) for a pair of
inputs a, b that start with the same second moment q0:

* ``q = E[s_a^2]`` (= E[s_b^2]), ``k = E[s_a s_b]``, ``m = E[s]``; the reported
  correlation is ``c = k / q``, the cosine similarity of the two stream vectors
  (their correlation when the stream is centred);
* when blocks mix positions (pooling, attention), also ``kw = E[s_{a,t} s_{a,t'}]``
  (two positions of one input) and ``kb = E[s_{a,t} s_{b,t'}]`` (two positions
  of the two inputs), positions being exchangeable (as tokens without positional
  structure are; for images an approximation);
* its law: a centred Gaussian (after any block with fresh weights), an
  elementwise function ``fn(u)`` of a centred Gaussian u, a "general" law of which
  only the moments are known (after a residual sum of non-Gaussian parts, dropout
  or pooling of a non-Gaussian stream), or unknown (an activation or max pooling
  applied to a general law: the Gaussian recursion stops being valid there).

Backward, the per-unit mean squared gradient and, with positions, its cross
moment between two positions of one input, ``(G, Gw)``, are mapped by a 2 x 2
matrix per block: ``(G, Gw)_in = M (G, Gw)_out``, under the gradient
independence assumption (Schoenholz et al. 2017, section 4; Yang 2019). M[0, 0]
is the mean squared singular value of the block's Jacobian (per input unit).

Sources per rule are given beside each formula.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from ..activations.base import Activation
from ..domains import Q_MAX, Q_POSITIVE_MIN
from .blocks import Convolution, Dense, Dropout, Norm
from .kernels import (
    Elementwise,
    composed,
    derivative_cross,
    moments,
    outer_derivative_moments,
    piecewise_linear_slopes,
)

__all__ = [
    "ELEMENTWISE",
    "GAUSSIAN",
    "GENERAL",
    "Q_LIMIT",
    "UNKNOWN",
    "Matrix",
    "Step",
    "Stream",
    "activation",
    "convolution",
    "dense",
    "dropout",
    "identity_matrix",
    "norm",
    "passed",
    "product",
    "residual",
    "unknown",
    "width_ratio",
]

GAUSSIAN = "gaussian"
ELEMENTWISE = "elementwise"
GENERAL = "general"
UNKNOWN = "unknown"

#: Beyond this second moment the recursion stops (the signal has exploded).
Q_LIMIT = 1e100

Matrix = tuple[tuple[float, float], tuple[float, float]]


@dataclass(frozen=True)
class Stream:
    """The kernel and law of the stream at one position (see the module docstring)."""

    q: float
    k: float
    m: float = 0.0
    kw: float | None = None
    kb: float | None = None
    form: str = GAUSSIAN
    u: Stream | None = None
    fn: Elementwise | None = None
    width: int | None = None
    reason: str = ""
    degenerate: bool = False

    @property
    def c(self) -> float:
        """k / q (1 for a zero stream)."""
        return 1.0 if self.q == 0.0 else _clip(self.k / self.q)

    @property
    def tracks_positions(self) -> bool:
        return self.kw is not None


@dataclass(frozen=True)
class Step:
    """The result of one block: the stream after it and its backward matrix.

    ``matrix`` is None where the gradient rule is unknown (the stream's law is).
    ``detail`` holds block-specific numbers (E[phi'(s)^2], the logit spread...);
    ``branch`` the steps inside a residual branch.
    """

    stream: Stream
    matrix: Matrix | None
    notes: tuple[str, ...] = ()
    detail: dict[str, float] = field(default_factory=dict)
    branch: tuple[Step, ...] = ()


def _clip(c: float) -> float:
    return min(1.0, max(-1.0, c))


def identity_matrix() -> Matrix:
    return ((1.0, 0.0), (0.0, 1.0))


def _diag(a: float, b: float | None = None) -> Matrix:
    return ((a, 0.0), (0.0, a if b is None else b))


def unknown(stream: Stream, reason: str, degenerate: bool = False) -> Step:
    """The stream becomes unknown from here on.

    ``degenerate``: the signal itself has exploded, vanished or lost all variance (a
    finite-width simulation would overflow or divide by zero too), as opposed to a stream
    that is merely not Gaussian.
    """
    return Step(Stream(math.nan, math.nan, math.nan, form=UNKNOWN, width=stream.width,
                       reason=reason, degenerate=degenerate), None, (reason,))


def passed(stream: Stream) -> Step:
    """An unknown stream through one more block: still unknown, no new note."""
    return Step(stream, None)


def _scaled(stream: Stream, scale: float, shift_moment: float, form: str,
            fn: Elementwise | None, m: float) -> Stream:
    """``s' = scale (s - mu)``: every second moment becomes scale^2 (moment - shift_moment)."""
    s2 = scale * scale

    def tr(x: float | None) -> float | None:
        return None if x is None else s2 * (x - shift_moment)

    return replace(stream, q=s2 * max(stream.q - shift_moment, 0.0), k=tr(stream.k), m=m,
                   kw=tr(stream.kw), kb=tr(stream.kb), form=form, fn=fn,
                   u=stream.u if form == ELEMENTWISE else None)


# ---------------------------------------------------------------- weight blocks
def width_ratio(stream: Stream, width: int | None) -> float:
    """n_out / n_in when both widths are known, else 1 (equal widths assumed)."""
    return 1.0 if (width is None or stream.width is None) else width / stream.width


def _linear(stream: Stream, sw: float, sb: float, width: int | None) -> Stream:
    # Poole et al. 2016, eqs. 3 and 5 with the moments of the input stream (means included):
    # q' = sigma_w2 E[s^2] + sigma_b2, k' = sigma_w2 E[s_a s_b] + sigma_b2; the output is a
    # centred Gaussian whatever the law of s (fresh weights, infinite width)
    def tr(x: float | None) -> float | None:
        return None if x is None else sw * x + sb

    return Stream(sw * stream.q + sb, sw * stream.k + sb, 0.0, tr(stream.kw), tr(stream.kb),
                  GAUSSIAN, width=width if width is not None else stream.width)


def dense(stream: Stream, block: Dense) -> Step:
    """``h = W s + b``; backward factor sigma_w2 * n_out / n_in (fan-in scaling)."""
    if stream.form == UNKNOWN:
        return passed(stream)
    f = block.sigma_w2 * width_ratio(stream, block.width)
    return Step(_linear(stream, block.sigma_w2, block.sigma_b2, block.width), _diag(f))


def convolution(stream: Stream, block: Convolution) -> Step:
    """A convolution: at each position the dense maps (Xiao et al. 2018, eq. 2.3: the
    diagonal of the spatial kernel follows them when the kernel is stationary).

    Backward: sigma_w2 * (channels_out / channels_in) / prod(stride) per unit.
    """
    if stream.form == UNKNOWN:
        return passed(stream)
    stride = 1
    for s in block.stride:
        stride *= s
    f = block.sigma_w2 * width_ratio(stream, block.width) / stride
    return Step(_linear(stream, block.sigma_w2, block.sigma_b2, block.width), _diag(f))


# ---------------------------------------------------------------- activation
def activation(stream: Stream, act: Activation, *, derivative_pair: bool = False) -> Step:
    """``s' = phi(s)``, elementwise.

    Forward: the moments of phi(u) (Poole et al. 2016, eqs. 3 and 5) at the
    Gaussian u the stream is a function of. Backward: ``E[phi'(s)^2]``
    (Schoenholz et al. 2017, eq. 8 without sigma_w2) and, with positions,
    ``E[phi'(s_t) phi'(s_t')]``. With ``derivative_pair`` also
    ``E[phi'(s_a) phi'(s_b)]`` for the pair (``detail["derivative_pair"]``, the
    factor of the neural tangent kernel recursion of Jacot et al. 2018) and, with positions,
    the same at two positions of one input (``derivative_within``) and of the two inputs
    (``derivative_between``).
    """
    if stream.form == UNKNOWN:
        return passed(stream)
    if stream.form == GENERAL:
        return unknown(stream, "an activation applied to a stream that is not a function of one "
                               "Gaussian (after a residual sum of non-Gaussian parts, dropout, "
                               "pooling or batch norm of a non-Gaussian stream): the Gaussian "
                               "recursion does not hold from here on")
    if stream.form == GAUSSIAN:
        u, fn = stream, Elementwise(act)
    else:
        assert stream.u is not None and stream.fn is not None
        u, fn = stream.u, Elementwise(composed(act, stream.fn))
    if (u.q > Q_MAX or 0.0 < u.q < Q_POSITIVE_MIN) and piecewise_linear_slopes(fn.act) is None:
        grown = "exploded" if u.q > Q_MAX else "vanished"
        return unknown(stream, f"the signal has {grown}: the activation {act.label} meets a "
                               f"variance q = {u.q:.3g}, outside the range [1e-200, 1e12] where "
                               "its Gaussian integrals are tested", degenerate=True)
    cu = [u.c]
    if u.kw is not None and u.kb is not None:
        cu += [_corr(u.kw, u.q), _corr(u.kb, u.q)]
    mom, d2 = moments(fn, u.q, cu)
    detail: dict[str, float] = {}
    between = derivative_pair and u.kb is not None
    want = (([_corr(u.kw, u.q)] if u.kw is not None else [])
            + ([_corr(u.kb, u.q)] if between else []) + ([u.c] if derivative_pair else []))
    if stream.form == GAUSSIAN:
        d_sq = d2
        d_cross = derivative_cross(act, u.q, want) if want else np.empty(0)
    else:
        assert stream.fn is not None
        d_sq, d_cross = outer_derivative_moments(act, stream.fn, u.q, want)
    dw = float(d_cross[0]) if u.kw is not None else 0.0
    if derivative_pair:
        detail["derivative_pair"] = float(d_cross[-1])
        if u.kw is not None:
            detail["derivative_within"] = dw
        if between:
            detail["derivative_between"] = float(d_cross[1] if u.kw is not None else d_cross[0])
    detail["derivative_second_moment"] = float(d_sq)
    cross = mom.cross
    out = Stream(mom.second, float(cross[0]), mom.mean,
                 float(cross[1]) if u.kw is not None else None,
                 float(cross[2]) if u.kb is not None else None,
                 ELEMENTWISE, u=u, fn=fn, width=stream.width)
    return Step(out, _diag(float(d_sq), dw), detail=detail)


def _corr(x: float, q: float) -> float:
    return 1.0 if q == 0.0 else _clip(x / q)


# ---------------------------------------------------------------- normalisation
def norm(stream: Stream, block: Norm) -> Step:
    """Layer, RMS or batch normalisation at infinite width, with gain and eps.

    * layer (Ba et al. 2016): ``s' = gain (s - m) / sqrt(q - m^2 + eps)``: the
      mean over units is m and the variance over units q - m^2 at infinite width;
    * rms (Zhang & Sennrich 2019): ``s' = gain s / sqrt(q + eps)``;
    * batch (Ioffe & Szegedy 2015), in the large-batch mean field of Yang et al.
      2019: each unit is centred and scaled over a large batch whose inputs are
      exchangeable with the pair (every pair of the batch has the pair's cross
      moment k; with positions, kb): ``s' = gain (s - w) / sqrt(q - k + eps)``
      where w is the part shared by the batch, so k' = 0 (kw' = kw - kb).

    Backward: ``gain^2 / (variance + eps)`` (the Jacobian
    ``(gain / sigma)(I - 1 1^T / n - s_hat s_hat^T / n)`` loses 2 of n directions,
    nothing at infinite width; derived here).
    """
    if stream.form == UNKNOWN:
        return passed(stream)
    notes: tuple[str, ...] = ()
    if block.kind == "layer":
        shift = stream.m * stream.m
        var, centre = max(stream.q - shift, 0.0), stream.m
    elif block.kind == "rms":
        shift, var, centre = 0.0, stream.q, 0.0
    else:
        shift = stream.kb if stream.kb is not None else stream.k
        var, centre = max(stream.q - shift, 0.0), math.nan
    denom = var + block.eps
    if denom <= 0.0:
        what = ("the two inputs (and the batch) are identical per unit" if block.kind == "batch"
                else "the stream is constant across units")
        return unknown(stream, f"{block.kind} norm of a stream with zero variance ({what}): "
                               "the normalisation divides by zero", degenerate=True)
    scale = block.gain / math.sqrt(denom)
    if block.kind == "batch":
        if stream.form == GAUSSIAN:
            form, fn = GAUSSIAN, None
        else:
            form, fn = GENERAL, None
            notes = ("batch norm of a non-Gaussian stream: each unit is scaled by its own batch "
                     "variance; the moments are exact for eps = 0, the gradient factor uses the "
                     "average variance",)
        out = _scaled(stream, scale, shift, form, fn, 0.0)
        out = replace(out, kb=0.0 if stream.kb is not None else None)
    else:
        form = stream.form
        fn = (stream.fn.affine(scale, -scale * centre)
              if stream.form == ELEMENTWISE and stream.fn is not None else None)
        m_new = 0.0 if block.kind == "layer" else scale * stream.m
        if block.kind == "rms":
            out = _scaled(stream, scale, 0.0, form, fn, m_new)
        else:
            out = _scaled(stream, scale, shift, form, fn, m_new)
    return Step(out, _diag(scale * scale), notes)


def dropout(stream: Stream, block: Dropout) -> Step:
    """Inverted dropout (Srivastava et al. 2014) with independent masks per input and position.

    ``E[s'^2] = E[s^2] / keep_rate``; every cross moment unchanged (Schoenholz
    et al. 2017, section on dropout); backward ``1 / keep_rate`` on G.
    """
    if stream.form == UNKNOWN:
        return passed(stream)
    p = block.keep_rate
    if p == 1.0:
        return Step(stream, identity_matrix())
    out = replace(stream, q=stream.q / p, form=GENERAL, u=None, fn=None)
    return Step(out, _diag(1.0 / p, 1.0))


# ---------------------------------------------------------------- residual
def residual(stream: Stream, branch_out: Stream, branch_matrix: Matrix | None, weight: float,
             shortcut: float) -> tuple[Stream, Matrix | None]:
    """``s' = shortcut * s + weight * F(s)`` with F's fresh weights making F independent of s.

    Forward: every second moment adds, ``q' = a^2 q + w^2 q_F + 2 a w m m_F``
    (Yang & Schoenholz 2017, section 3, for the residual variance recursion;
    the mean term, where F ends in an activation and the stream has a mean, is
    derived here from the independence of F_i and s_i at infinite width).
    Backward: ``M = a^2 I + w^2 M_F`` (the cross term has a fresh zero-mean
    weight in it; Yang & Schoenholz 2017).
    """
    a, w = shortcut, weight
    if stream.form == UNKNOWN:
        return stream, None
    if w != 0.0 and branch_out.form == UNKNOWN:
        return branch_out, None
    if w == 0.0:
        return stream, _diag(a * a)
    mm = 2.0 * a * w * stream.m * branch_out.m

    def add(x: float | None, y: float | None) -> float | None:
        return None if x is None or y is None else a * a * x + w * w * y + mm

    if a == 0.0:
        form = branch_out.form
    elif stream.form == GAUSSIAN and branch_out.form == GAUSSIAN:
        form = GAUSSIAN
    else:
        form = GENERAL
    q = a * a * stream.q + w * w * branch_out.q + mm
    k = a * a * stream.k + w * w * branch_out.k + mm
    out = Stream(q, k, a * stream.m + w * branch_out.m, add(stream.kw, branch_out.kw),
                 add(stream.kb, branch_out.kb), form,
                 u=branch_out.u if form == ELEMENTWISE else None,
                 fn=branch_out.fn if form == ELEMENTWISE else None,
                 width=stream.width if stream.width is not None else branch_out.width)
    if form == ELEMENTWISE:  # a == 0: the stream is w F(s)
        assert branch_out.fn is not None
        out = replace(out, fn=branch_out.fn.affine(w, 0.0))
    if branch_matrix is None:
        return out, None
    (p, r), (s, t) = branch_matrix
    return out, ((a * a + w * w * p, w * w * r), (w * w * s, a * a + w * w * t))


def product(later: Matrix, earlier: Matrix) -> Matrix:
    """The backward matrix of two blocks in sequence: ``earlier @ later`` (applied to the
    output gradient, the later block acts first)."""
    (a, b), (c, d) = earlier
    (e, f), (g, h) = later
    return ((a * e + b * g, a * f + b * h), (c * e + d * g, c * f + d * h))


def step_note(step: Step) -> str:
    """The notes of a step in one string."""
    return "; ".join(step.notes)


def describe_stream(stream: Stream) -> dict[str, Any]:
    """The numbers of a stream (for records)."""
    return {"q": stream.q, "k": stream.k, "m": stream.m, "form": stream.form}
