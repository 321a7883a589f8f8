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
from .blocks import Attention, Convolution, Dense, Dropout, Norm, Pooling
from .kernels import (
    Elementwise,
    composed,
    derivative_cross,
    moments,
    outer_derivative_moments,
)

__all__ = [
    "GAUSSIAN",
    "ELEMENTWISE",
    "GENERAL",
    "UNKNOWN",
    "Q_LIMIT",
    "Stream",
    "Step",
    "identity_matrix",
    "dense",
    "convolution",
    "activation",
    "norm",
    "dropout",
    "pooling",
    "attention",
    "residual",
    "logit_std",
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


def unknown(stream: Stream, reason: str) -> Step:
    """The stream becomes unknown from here on."""
    return Step(Stream(math.nan, math.nan, math.nan, form=UNKNOWN, width=stream.width,
                       reason=reason), None, (reason,))


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
def _ratio(stream: Stream, width: int | None) -> float:
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
        return unknown(stream, stream.reason)
    f = block.sigma_w2 * _ratio(stream, block.width)
    return Step(_linear(stream, block.sigma_w2, block.sigma_b2, block.width), _diag(f))


def convolution(stream: Stream, block: Convolution) -> Step:
    """A convolution: at each position the dense maps (Xiao et al. 2018, eq. 2.3: the
    diagonal of the spatial kernel follows them when the kernel is stationary).

    Backward: sigma_w2 * (channels_out / channels_in) / prod(stride) per unit.
    """
    if stream.form == UNKNOWN:
        return unknown(stream, stream.reason)
    stride = 1
    for s in block.stride:
        stride *= s
    f = block.sigma_w2 * _ratio(stream, block.width) / stride
    return Step(_linear(stream, block.sigma_w2, block.sigma_b2, block.width), _diag(f))


# ---------------------------------------------------------------- activation
def activation(stream: Stream, act: Activation, *, derivative_pair: bool = False) -> Step:
    """``s' = phi(s)``, elementwise.

    Forward: the moments of phi(u) (Poole et al. 2016, eqs. 3 and 5) at the
    Gaussian u the stream is a function of. Backward: ``E[phi'(s)^2]``
    (Schoenholz et al. 2017, eq. 8 without sigma_w2) and, with positions,
    ``E[phi'(s_t) phi'(s_t')]``. With ``derivative_pair`` also
    ``E[phi'(s_a) phi'(s_b)]`` for the pair (``detail["derivative_pair"]``, the
    factor of the neural tangent kernel recursion of Jacot et al. 2018).
    """
    if stream.form == UNKNOWN:
        return unknown(stream, stream.reason)
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
    cu = [u.c]
    if u.kw is not None and u.kb is not None:
        cu += [_corr(u.kw, u.q), _corr(u.kb, u.q)]
    mom, d2 = moments(fn, u.q, cu)
    detail: dict[str, float] = {}
    want = ([_corr(u.kw, u.q)] if u.kw is not None else []) + ([u.c] if derivative_pair else [])
    if stream.form == GAUSSIAN:
        d_sq = d2
        d_cross = derivative_cross(act, u.q, want) if want else np.empty(0)
    else:
        assert stream.fn is not None
        d_sq, d_cross = outer_derivative_moments(act, stream.fn, u.q, want)
    dw = float(d_cross[0]) if u.kw is not None else 0.0
    if derivative_pair:
        detail["derivative_pair"] = float(d_cross[-1])
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
        return unknown(stream, stream.reason)
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
                               "the normalisation divides by zero")
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
        return unknown(stream, stream.reason)
    p = block.keep_rate
    if p == 1.0:
        return Step(stream, identity_matrix())
    out = replace(stream, q=stream.q / p, form=GENERAL, u=None, fn=None)
    return Step(out, _diag(1.0 / p, 1.0))


# ---------------------------------------------------------------- positions
def _need_positions(stream: Stream, what: str) -> None:
    if stream.kw is None or stream.kb is None:
        from .description import NetworkDescriptionError  # the error type only
        raise NetworkDescriptionError("", f"a network where {what} sees several positions "
                                          "(none after a global average pooling)", what)


def pooling(stream: Stream, block: Pooling) -> Step:
    """Average pooling over windows of k positions (stride: n = k / step windows per input
    position), global average over P positions, or max pooling.

    With exchangeable positions: ``q' = (q + (k - 1) kw) / k``,
    ``k' = (k_ab + (k - 1) kb) / k``, cross-position moments unchanged; backward
    ``G' = (n G + n (n - 1) Gw) / k^2``, ``Gw' = n^2 Gw / k^2`` (derived here).
    Max pooling: the maximum of correlated values is not Gaussian; unknown.
    """
    if stream.form == UNKNOWN:
        return unknown(stream, stream.reason)
    if block.kind == "max":
        return unknown(stream, "max pooling: the maximum of correlated units is not Gaussian")
    _need_positions(stream, "pooling")
    assert stream.kw is not None and stream.kb is not None
    size = block.size
    form = GAUSSIAN if stream.form == GAUSSIAN else GENERAL
    q = (stream.q + (size - 1) * stream.kw) / size
    k = (stream.k + (size - 1) * stream.kb) / size
    if block.kind == "global_average":
        out = Stream(q, k, stream.m, None, None, form, width=stream.width)
        inv = 1.0 / (size * size)
        return Step(out, ((inv, 0.0), (inv, 0.0)))
    n = size / block.step
    out = Stream(q, k, stream.m, stream.kw, stream.kb, form, width=stream.width)
    inv = 1.0 / (size * size)
    return Step(out, ((n * inv, n * (n - 1.0) * inv), (0.0, n * n * inv)))


def logit_std(stream: Stream, block: Attention) -> float:
    """Spread of one query's logits over the keys at initialisation.

    ``query_key_scale * query_key_sigma_w2 * sqrt(q (q - kw) (1 - 1/T))``: the
    query has per-component variance ``sigma_qk q``, the keys vary around their
    mean with ``sigma_qk (q - kw)(1 - 1/T)``, and a shift common to all keys does
    not change the softmax (derived here).
    """
    assert stream.kw is not None
    t = block.tokens
    spread = max(stream.q * (stream.q - stream.kw) * (1.0 - 1.0 / t), 0.0)
    return block.query_key_scale * block.query_key_sigma_w2 * math.sqrt(spread)


#: Above this logit spread the large-T lognormal approximation of the attention weights is
#: off by more than a few percent (measured against seeded simulations at T = 16): a note.
LOGIT_SPREAD_NOTE = 0.7


def attention(stream: Stream, block: Attention) -> Step:
    """Self-attention at initialisation, to second order in the logit spread.

    With uniform weights (``query_key_scale = 0``) every output token is
    ``W_O W_V xbar + b``, xbar the mean of the T input tokens: the output is rank
    one (Noci et al. 2022, section 3), ``q' = kw' = S (q + (T - 1) kw) / T + sigma_b2``,
    ``k' = kb' = S (k + (T - 1) kb) / T + sigma_b2`` with ``S = sigma_v sigma_o``.

    Logits of spread s (:func:`logit_std`) are Gaussian at infinite width; for
    many tokens the softmax normaliser concentrates, so
    ``E[A_ts A_t's'] ~ exp(cov(l_ts, l_t's')) / T^2`` (a lognormal moment). Then
    ``E[out_t out_t'] = S (kw + (q - kw) sum_s E[A_ts A_t's])`` gives
    ``q' = S (kw + (q - kw) e^{s^2} / T)``, ``kw' = S (kw + (q - kw) e^{r_w s^2} / T)``,
    ``k' = S (kb + (k - kb) e^{r_k s^2} / T)``, ``kb' = S (kb + (k - kb) e^{r_b s^2} / T)``
    (plus sigma_b2), with ``r_w = kw / q``, ``r_k = k (k - kb) / (q (q - kw))``,
    ``r_b = kb (k - kb) / (q (q - kw))`` (derived here; exact at s = 0).

    Backward (output gradient moments G, Gw): the value path passes
    ``S (e^{s^2} G + (T - 1) e^{r_w s^2} Gw) / T``; the query and key paths add
    ``S tau^2 sigma_qk^2 (q - kw) ((2 q - kw) G + (T - 1) kw Gw) / T`` (tau the
    query_key_scale; derived here to order tau^2); the cross-position moment
    is that of uniform attention, ``S (G + (T - 1) Gw) / T``.
    """
    if stream.form == UNKNOWN:
        return unknown(stream, stream.reason)
    _need_positions(stream, "attention")
    assert stream.kw is not None and stream.kb is not None
    t = block.tokens
    q, k, kw, kb = stream.q, stream.k, stream.kw, stream.kb
    big = block.value_sigma_w2 * block.output_sigma_w2
    spread = logit_std(stream, block)
    s2 = spread * spread
    gap = q - kw
    if gap > 0.0 and q > 0.0:
        r_w, r_k, r_b = kw / q, k * (k - kb) / (q * gap), kb * (k - kb) / (q * gap)
    else:
        r_w = r_k = r_b = 0.0
    sb = block.sigma_b2
    q_new = big * (kw + gap * math.exp(s2) / t) + sb
    kw_new = big * (kw + gap * math.exp(r_w * s2) / t) + sb
    k_new = big * (kb + (k - kb) * math.exp(r_k * s2) / t) + sb
    kb_new = big * (kb + (k - kb) * math.exp(r_b * s2) / t) + sb
    width = block.width if block.width is not None else stream.width
    out = Stream(q_new, k_new, 0.0, kw_new, kb_new, GAUSSIAN, width=width)
    notes: tuple[str, ...] = ()
    if spread > LOGIT_SPREAD_NOTE:
        notes = (f"the query-key logits spread by {spread:.3g} (standard deviation over keys) "
                 "at initialisation: the attention weights are far from uniform and the "
                 "second-order prediction here is an approximation; lower query_key_scale or "
                 "query_key_sigma_w2, or check with propcalc.simulate",)
    f = big * _ratio(stream, width) / t
    tau2 = (block.query_key_scale * block.query_key_sigma_w2) ** 2
    g_g = f * (math.exp(s2) + tau2 * gap * (2.0 * q - kw))
    g_w = f * (t - 1) * (math.exp(r_w * s2) + tau2 * gap * kw)
    return Step(out, ((g_g, g_w), (f, f * (t - 1))), notes, {"logit_std": spread})


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
    if stream.form == UNKNOWN or (w != 0.0 and branch_out.form == UNKNOWN):
        reason = stream.reason if stream.form == UNKNOWN else branch_out.reason
        return unknown(stream, reason).stream, None
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
