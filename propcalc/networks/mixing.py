"""The blocks that mix positions: pooling and self-attention.

Positions (pixels, tokens) are exchangeable: besides the pair's moments the stream
carries ``kw = E[s_{a,t} s_{a,t'}]`` (two positions of one input) and
``kb = E[s_{a,t} s_{b,t'}]`` (two positions of the two inputs); see
:mod:`propcalc.networks.rules` for the stream and the backward matrices.
"""

from __future__ import annotations

import math

from .blocks import Attention, Pooling
from .rules import GAUSSIAN, GENERAL, UNKNOWN, Step, Stream, passed, unknown, width_ratio

__all__ = ["pooling", "attention", "logit_std", "LOGIT_SPREAD_NOTE"]


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
        return passed(stream)
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
        return passed(stream)
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
        notes = (f"the query-key logits spread by more than {LOGIT_SPREAD_NOTE:g} (standard "
                 "deviation over keys at initialisation, logit_std): the attention weights are "
                 "far from uniform and the second-order prediction is an approximation; lower "
                 "query_key_scale or query_key_sigma_w2, or check with propcalc.simulate",)
    f = big * width_ratio(stream, width) / t
    tau2 = (block.query_key_scale * block.query_key_sigma_w2) ** 2
    g_g = f * (math.exp(s2) + tau2 * gap * (2.0 * q - kw))
    g_w = f * (t - 1) * (math.exp(r_w * s2) + tau2 * gap * kw)
    return Step(out, ((g_g, g_w), (f, f * (t - 1))), notes, {"logit_std": spread})
