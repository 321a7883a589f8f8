"""The blocks that mix positions: pooling and self-attention.

Positions (pixels, tokens) are exchangeable: besides the pair's moments the stream
carries ``kw = E[s_{a,t} s_{a,t'}]`` (two positions of one input) and
``kb = E[s_{a,t} s_{b,t'}]`` (two positions of the two inputs); see
:mod:`propcalc.networks.rules` for the stream and the backward matrices.
"""

from __future__ import annotations

import math

from .blocks import Attention, Pooling
from .rules import (
    GAUSSIAN,
    GENERAL,
    UNKNOWN,
    Step,
    Stream,
    passed,
    unknown,
    width_ratio,
)
from .softmax_moments import softmax_pair_moments

__all__ = ["LOGIT_SPREAD_NOTE", "attention", "logit_std", "logit_variance", "pooling"]


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


def logit_variance(stream: Stream, block: Attention) -> float:
    """Per-key variance of one query's logits around their common shift,
    ``(query_key_scale query_key_sigma_w2)^2 q (q - kw)`` (derived as :func:`logit_std`)."""
    assert stream.kw is not None
    tau = block.query_key_scale * block.query_key_sigma_w2
    return tau * tau * stream.q * max(stream.q - stream.kw, 0.0)


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


#: Above this logit spread the Gaussian law of the output with few heads is an approximation
#: (the forward moments are computed for Gaussian logits at any spread): a note.
LOGIT_SPREAD_NOTE = 0.7


def attention(stream: Stream, block: Attention) -> Step:
    """Self-attention at initialisation, the logits Gaussian (infinite width).

    With uniform weights (``query_key_scale = 0``) every output token is
    ``W_O W_V xbar + b``, xbar the mean of the T input tokens: the output is rank
    one (Noci et al. 2022, section 3), ``q' = kw' = S (q + (T - 1) kw) / T + sigma_b2``,
    ``k' = kb' = S (k + (T - 1) kb) / T + sigma_b2`` with ``S = sigma_v sigma_o``.

    Logits of spread s (:func:`logit_std`) are Gaussian at infinite width: per key, around a
    shift common to the keys (which the softmax ignores), of variance
    ``v = (tau sigma_qk)^2 q (q - kw)``, and two rows (queries t, t' of inputs a, b) are
    correlated key by key with ``rho = K(a t, b t') K1(a, b) / (q (q - kw))``, K1 the keys'
    part that differs between keys (q - kw for one input, k - kb for two). The values are
    independent of the logits, so ``E[out_t out_t'] = S (K0 + K1 m1(rho))`` with K0 the keys'
    common part and ``m1 = E[sum_s A_ts A_t's]``
    (:func:`propcalc.networks.softmax_moments.softmax_pair_moments`, seeded Monte Carlo over the
    logits; exact at s = 0). That gives ``q' = S (kw + (q - kw) m1(1))``,
    ``kw' = S (kw + (q - kw) m1(r_w))``, ``k' = S (kb + (k - kb) m1(r_k))``,
    ``kb' = S (kb + (k - kb) m1(r_b))`` (plus sigma_b2), with ``r_w = kw / q``,
    ``r_k = k (k - kb) / (q (q - kw))``, ``r_b = kb (k - kb) / (q (q - kw))`` (derived here).
    For many tokens ``m1(rho) -> exp(rho v) / T`` (a lognormal moment, the rule's earlier
    form, which overshot by 60% at T = 4, s = 1). The weights are shared by the units of a
    head, so with few heads the output is a Gaussian scale mixture, not a Gaussian (Hron et al.
    2020, "Infinite attention", take the number of heads to infinity for that reason): the
    moments are exact, the law downstream an approximation.

    Backward (output gradient moments G, Gw): the value path passes
    ``S (T m1(1) G + (T - 1) T m1(r_w) Gw) / T``; the query and key paths add
    ``S tau^2 sigma_qk^2 (q - kw) ((2 q - kw) m2(1) G + (T - 1) kw m2(r_w) Gw)`` (tau the
    query_key_scale, m2 the softmax moment of
    :func:`propcalc.networks.softmax_moments.softmax_pair_moments`; derived here: the path
    terms of :mod:`propcalc.training.network_ntk_attention` with the input's kernel replaced by
    the output gradients' moments. At spread 0, m2 = (T - 1) / T^2, which is 0 at T = 1, where
    the softmax is constant; the earlier ``(...) / T`` without m2 doubled the gradient at T = 1
    and overshot seeded torch by 4-19 standard errors at T = 2-4). Against seeded float64 torch
    (width 256, 4 heads, 48 seeds, q 1, kw 0.3): independent output gradients 0.805 / 0.794 +-
    0.022 (T = 2, logit std 0.59), 0.564 / 0.580 +- 0.011 (T = 4, 0.73), 0.359 / 0.371 +-
    0.007 (T = 8, 0.78); one gradient shared by the tokens 1.369 / 1.377 +- 0.036, 1.497 /
    1.495 +- 0.037, 1.530 / 1.543 +- 0.035.

    The cross-position moment (two input tokens u != u' of one input): the value path gives
    ``S ((1 - m1(1)) G / (T - 1) + (1 - m1(r_w)) Gw)`` (``sum_{u != u'} A_u B_u' = 1 - P``);
    the key paths ``-S tau^2 sigma_qk^2 (q - kw) (q m2(1) G / (T - 1) + kw m2(r_w) Gw)``
    (``sum_{u != u'} A_u B_u' (P - B_u - A_u') = -(P + P^2 - sum A B (A + B))``, the pairs of
    keys of one query row or of two), the query paths ``S tau^2 sigma_qk^2 (q - kw)^2 m2(r_w)
    Gw`` (two query rows); the query-key cross terms are O(1/n) (derived here, as above). At
    spread 0 it is uniform attention's ``S (G + (T - 1) Gw) / T``, which it was before
    everywhere: against the same torch networks that was 0.250 / 0.177 +- 0.006 (T = 4, logit
    std 0.73) and 0.500 / 0.269 +- 0.015 (T = 2), now 0.174 and 0.275; with a shared gradient
    0.935 / 0.932 +- 0.019, 0.788 / 0.771 +- 0.023, and 0.101 / 0.103 +- 0.003, 0.983 /
    0.977 +- 0.019 at T = 8, 0.229 / 0.233 +- 0.005, 0.982 / 0.980 +- 0.018 at T = 4 and
    logit std 0.36.
    """
    if stream.form == UNKNOWN:
        return passed(stream)
    _need_positions(stream, "attention")
    assert stream.kw is not None and stream.kb is not None
    t = block.tokens
    q, k, kw, kb = stream.q, stream.k, stream.kw, stream.kb
    big = block.value_sigma_w2 * block.output_sigma_w2
    spread = logit_std(stream, block)
    gap = q - kw
    if gap > 0.0 and q > 0.0:
        r_w, r_k, r_b = kw / q, k * (k - kb) / (q * gap), kb * (k - kb) / (q * gap)
    else:
        r_w = r_k = r_b = 0.0
    v = logit_variance(stream, block)
    mom_q, mom_w, mom_k, mom_b = (softmax_pair_moments(t, v, r) for r in (1.0, r_w, r_k, r_b))
    m_q, m_w, m_k, m_b = mom_q.m1, mom_w.m1, mom_k.m1, mom_b.m1
    sb = block.sigma_b2
    q_new = big * (kw + gap * m_q) + sb
    kw_new = big * (kw + gap * m_w) + sb
    k_new = big * (kb + (k - kb) * m_k) + sb
    kb_new = big * (kb + (k - kb) * m_b) + sb
    width = block.width if block.width is not None else stream.width
    out = Stream(q_new, k_new, 0.0, kw_new, kb_new, GAUSSIAN, width=width)
    notes: tuple[str, ...] = ()
    if spread > LOGIT_SPREAD_NOTE:
        notes = ((f"the query-key logits spread by more than {LOGIT_SPREAD_NOTE:g} "
                  "(standard deviation over keys at initialisation, logit_std): the attention "
                  "weights are far from uniform; the moments are those of Gaussian logits and "
                  "the output of few heads is not Gaussian downstream; lower query_key_scale "
                  "or query_key_sigma_w2, or check with propcalc.simulate"),)
    f = big * width_ratio(stream, width) / t
    tau2 = (block.query_key_scale * block.query_key_sigma_w2) ** 2
    g_g = f * t * (m_q + tau2 * gap * (2.0 * q - kw) * mom_q.m2)
    g_w = f * (t - 1) * t * (m_w + tau2 * gap * kw * mom_w.m2)
    if t > 1:  # the cross-position row (docstring); one token has no other position
        h_g = f * t * ((1.0 - m_q) - tau2 * q * gap * mom_q.m2) / (t - 1)
        h_w = f * t * ((1.0 - m_w) + tau2 * gap * (gap - kw) * mom_w.m2)
    else:
        h_g, h_w = f, 0.0
    return Step(out, ((g_g, g_w), (h_g, h_w)), notes, {"logit_std": spread})
