"""The tangent kernel through self-attention whose query-key logits spread.

The block (Vaswani et al. 2017, multi-head self-attention; propcalc's form in
:class:`propcalc.networks.blocks.Attention`): for tokens ``x_1 .. x_T`` of width n,
``q_t = W_Q x_t``, ``k_s = W_K x_s``, ``v_s = W_V x_s`` (fan-in n, variances sigma_qk, sigma_qk,
sigma_v), per head of width d_h the logits ``l_ts = tau q_t . k_s / sqrt(d_h)``, weights
``A_ts = softmax_s(l_ts)``, ``z_t = sum_s A_ts v_s`` and ``y_t = W_O z_t + b`` (fan-in d, variance
sigma_o). The kernel of one output unit, ``Theta(a t, b t') = sum_p dy_t(a)/dp dy_t'(b)/dp``
(Jacot et al. 2018), standard parametrisation, infinite width (n, d_h -> infinity, T and the
number of heads fixed). The derivation below is ours (derived here); Hron et al. 2020 ("Infinite
attention") study the same limit.

Assumptions, those of the forward rule (:func:`propcalc.networks.mixing.attention`):

1. the logits are Gaussian, per key around a shift common to the keys (which the softmax
   ignores) of variance ``v = (tau sigma_qk)^2 q (q - kw)``; two rows (query t of input a,
   t' of b) are correlated key by key with ``rho = K(a t, b t') K1 / (q (q - kw))``;
2. the stream's kernels between tokens are exchangeable: ``K(a s, b s') = K0 + K1 [s = s']``
   and ``Theta_in(a s, b s') = T0 + T1 [s = s']`` (for one input ``K0 = kw, K1 = q - kw``,
   ``T0 = within, T1 = diag - within``; for two ``K0 = kb, K1 = k - kb``,
   ``T0 = between, T1 = pair - between``); the query entry is ``Kq = K(a t, b t')``,
   ``Tq = Theta_in(a t, b t')``;
3. sums over units concentrate (``k(a) . k(b) / d_h -> sigma_qk K``, ``x(a) . x(b) / n -> K``),
   the values are independent of the logits, and the backward pass uses the weights as if
   drawn afresh (the gradient independence assumption, Yang 2019).

Terms (A, B the weight rows of the two entries, ``P = sum_s A_s B_s``):

* the output bias: 1;
* W_O (gradient z_t): ``d E[z z'] = d sigma_v (K0 + K1 m1)``, ``m1 = E[P]`` (the K0 part sums
  the weights to 1);
* W_V (gradient ``W_O^T`` times ``sum_s A_ts x_s``) and the value path:
  ``sigma_o (n (K0 + K1 m1) + sigma_v (T0 + T1 m1))``;
* the logits: ``dy/dl_ts = g_s = W_O (A_ts (v_s - z_t))``; over W_O and W_V,
  ``E[g_s(a) g_s'(b)] = sigma_o sigma_v A_s B_s' D(s, s')`` with
  ``D = K1 ([s = s'] - B_s - A_s' + P)`` (the K0 part cancels: the softmax's derivative is
  blind to a common shift). W_Q's gradient ``(tau / sqrt(d_h)) sum_s g_s k_s x_t^T`` gives
  ``tau^2 sigma_qk n Kq sum_ss' E[g g'] K(s, s')``; W_K the same; the path through the query
  ``tau^2 sigma_qk^2 Tq sum E[g g'] K(s, s')``, through the keys
  ``tau^2 sigma_qk^2 Kq sum E[g g'] Theta_in(s, s')`` (the cross term of the two paths is
  O(1/n), the cross terms with the value path vanish under ``(W_Q, W_K) -> -(W_Q, W_K)``, which
  keeps the logits). With the structure of 2, ``sum E[g g'] (X0 + X1 [s = s']) =
  sigma_o sigma_v K1 X1 m2`` with ``m2 = E[P + P^2 - sum_s A_s B_s (A_s + B_s)]``. Together:
  ``sigma_o sigma_v tau^2 sigma_qk K1 m2 (2 n Kq K1 + sigma_qk (K1 Tq + Kq T1))``.

So ``Theta' = 1 + d sigma_v (K0 + K1 m1) + sigma_o (n (K0 + K1 m1) + sigma_v (T0 + T1 m1))
+ sigma_o sigma_v tau^2 sigma_qk K1 m2 (2 n Kq K1 + sigma_qk (K1 Tq + Kq T1))`` for each of the
four entries (diag: rho = 1; within: rho = kw / q; pair and between: rho = Kq (k - kb) /
(q (q - kw))). Heads: each head's terms carry 1 / heads of ``E[g g']`` and the sum over heads
gives the same. At v = 0 (tau = 0, or tokens identical) m1 = 1/T and the logit term vanishes:
the uniform rule. m1 and m2 have no closed form: seeded Monte Carlo over the Gaussian logits
(:func:`propcalc.networks.softmax_moments.softmax_pair_moments`, 2^17 / T draws of the T pairs,
between 2^6 and 2^14; relative standard error about 1% or below at 4-16 tokens).

With one head (or a few), the weights ``A`` do not average out over units: the kernel of one
network is a random variable even at infinite width (Hron et al. 2020 take the number of heads
to infinity), and this is its mean. The refusal above :data:`MAX_LOGIT_STD` is measured
(docs/training.md).
"""

from __future__ import annotations

from ..networks.blocks import Attention
from ..networks.mixing import logit_variance
from ..networks.rules import Step, Stream
from ..networks.softmax_moments import softmax_pair_moments
from .ntk import UnsupportedKernelError

__all__ = ["MAX_LOGIT_STD", "attention_kernel"]

#: the largest logit spread (logit_std of the forward rule) for which the kernel is computed:
#: against seeded torch (docs/training.md, tests/test_network_ntk_attention.py) it held within
#: 1.6 standard errors up to 2 and drifted 10-16% off at 3-4 (width 1024, 32 seeds)
MAX_LOGIT_STD = 2.0


def attention_kernel(before: Stream, block: Attention, step: Step,
                     theta: tuple[float, float, float, float], where: str
                     ) -> tuple[float, float, float, float]:
    """The kernel after the block, ``(diag, pair, within, between)`` from the same of its input
    (module docstring).

    Raises
    ------
    UnsupportedKernelError
        Beyond :data:`MAX_LOGIT_STD`, or without the widths.
    """
    spread = float(step.detail.get("logit_std", 0.0))
    if spread > MAX_LOGIT_STD:
        raise UnsupportedKernelError(
            f"block {where} (attention): the query-key logits spread by {spread:.3g} at "
            f"initialisation, beyond {MAX_LOGIT_STD:g}, the largest spread at which the kernel "
            "agreed with seeded torch networks (within 6% at width 1024, 4 heads, 4-16 "
            "tokens); at spreads 3 and 4 the measured mean was 10-16% off (1.3-2.4 standard "
            "errors) and one network's kernel differs from the mean by 40-60% "
            "(docs/training.md); lower query_key_scale or query_key_sigma_w2")
    n_in = before.width
    d = block.width if block.width is not None else n_in
    if n_in is None or d is None:
        raise UnsupportedKernelError(
            f"block {where} (attention): the width of its input is not given (set "
            "input_width and every dense, convolution and attention width): the kernel grows "
            "with it")
    assert before.kw is not None and before.kb is not None
    t = block.tokens
    q, k, kw, kb = before.q, before.k, before.kw, before.kb
    t_d, t_p, t_w, t_b = theta
    sv, so, sqk = block.value_sigma_w2, block.output_sigma_w2, block.query_key_sigma_w2
    tau2 = block.query_key_scale ** 2
    v = logit_variance(before, block)
    gap = q - kw
    norm = q * gap if q > 0.0 and gap > 0.0 else 0.0

    if norm > 0.0:  # the row correlations, as the forward rule computes them
        r_w, r_k, r_b = kw / q, k * (k - kb) / norm, kb * (k - kb) / norm
    else:
        r_w = r_k = r_b = 0.0

    def entry(rho: float, kq: float, tq: float, k0: float, k1: float, t0: float, t1: float
              ) -> float:
        m = softmax_pair_moments(t, v, rho)
        x = k0 + k1 * m.m1
        out = 1.0 + d * sv * x + so * (n_in * x + sv * (t0 + t1 * m.m1))
        return out + so * sv * tau2 * sqk * k1 * m.m2 * (
            2.0 * n_in * kq * k1 + sqk * (k1 * tq + kq * t1))

    diag = entry(1.0, q, t_d, kw, gap, t_w, t_d - t_w)
    within = entry(r_w, kw, t_w, kw, gap, t_w, t_d - t_w)
    pair = entry(r_k, k, t_p, kb, k - kb, t_b, t_p - t_b)
    between = entry(r_b, kb, t_b, kb, k - kb, t_b, t_p - t_b)
    return diag, pair, within, between
