"""How each block kind moves the per-unit tangent kernel of a stream, at initialisation.

Standard parametrisation (the weights, of std ``sqrt(sigma_w2 / fan_in)``, and the biases are the
trained parameters; Jacot et al. 2018, Theorem 1; Lee et al. 2019, appendix), infinite width,
the stream's moments from :func:`propcalc.networks.walk.trace` (their rules and assumptions are
those of :mod:`propcalc.networks.rules` and :mod:`propcalc.networks.mixing`). The kernel of one
unit of the stream, ``Theta(a, b) = sum_p ds(a)/dp ds(b)/dp``, is carried as four numbers, like
the stream's ``q, k, kw, kb``:

* ``diag`` = Theta(x, x) and ``pair`` = Theta(x, x') at one position;
* when positions are tracked (pooling, attention), ``within`` = Theta between two positions of
  one input and ``between`` = Theta between two positions of the two inputs (positions are
  exchangeable, the assumption of the forward rules).

Rules (derivations written here, "derived here" where no source states them):

* dense, per position with weights shared by the positions, and a trained bias:
  ``Theta' = n_in E[s s'] + 1 + sigma_w2 Theta`` for each entry, ``E[s s']`` the matching moment
  (q, k, kw, kb): the weights' gradient ``s_j``, the bias' 1, and the path through W whose
  cross terms between units average to 0 (Jacot et al. 2018; Lee et al. 2019);
* convolution of K taps (fan-in ``C_in K``, circular padding, the simulation's convention):
  ``y_t = sum_tau W_tau x_{t + tau} + b``. The weights give ``sum_tau sum_c x_c,t+tau(a)
  x_c,t'+tau(b)`` = ``C_in K`` times the moment at the same offset (k at one position, kb / kw at
  two distinct positions); the path gives ``sum_{tau, tau'} W_tau W_tau' Theta(t + tau,
  t' + tau')``, whose terms tau != tau' average to 0 over the independent taps, leaving
  ``sigma_w2`` times the mean over tau of ``Theta(t + tau, t' + tau)``: the same entry. So a
  convolution acts as a dense block with ``n_in = C_in K`` (Arora et al. 2019, the convolutional
  kernel's recursion, restricted to the diagonal of the spatial kernel as Xiao et al. 2018,
  eq. 2.3, for the forward one). Delta-orthogonal kernels train every tap too (only the centre
  is nonzero at initialisation): the weights' term is the same, the path gives sigma_w2;
* activation: ``Theta' = E[phi'(s_a) phi'(s_b)] Theta`` entry by entry, the derivative pair at
  the entry's correlation (Jacot et al. 2018);
* layer / RMS norm without trainable gain or bias (propcalc's norm block: gain and eps are
  constants), ``y = g (x - mu 1) / sigma``, mu, sigma^2 the mean and variance over the n units
  (RMS: mu = 0, sigma^2 the mean square), eps added to sigma^2. The chain rule gives
  ``dy_i/dp = (g / sigma) (dx_i/dp - d mu/dp - yhat_i d sigma/dp)`` with
  ``d mu/dp = (1/n) sum_j dx_j/dp`` and ``d sigma/dp = (1/n) sum_j yhat_j dx_j/dp``. The first
  term gives ``g^2 Theta_x(a, b) / (sigma_a sigma_b)``. The others project on the directions 1
  and yhat: their products with ``dx_i/dp`` are ``(1/n) sum_j Theta_x,ij`` and
  ``(1/n) sum_j yhat_j Theta_x,ij``, where the unit pairs j != i contribute a kernel between
  two units. For the layer that made x (``x = W h + b``) the last weights give 0 for j != i and
  ``n_in E[h h'] / n`` for j = i; the earlier parameters give ``sum_k W_ik wbar_k Theta_h`` with
  ``wbar_k = (1/n) sum_j W_jk`` (or ``(1/n) sum_j yhat_j W_jk``), which is ``sigma_w2 Theta_h /
  n`` on average plus a fluctuation of relative size ``1 / sqrt(n n_in)``. Every projection term
  is O(1/n) of the main one (derived here), so at infinite width
  ``Theta_y(a, b) = g^2 Theta_x(a, b) / sqrt((sigma_a^2 + eps)(sigma_b^2 + eps))``, with
  ``sigma^2 = q - m^2`` (layer) or ``q`` (RMS) the same for both inputs of the pair;
* batch norm of a stream with one position, in the large-batch mean field of the forward rule
  (Yang et al. 2019: the batch is exchangeable with the pair, every pair of it has the pair's
  cross moment k): ``dy(a)/dp = (g / sigma)(dx(a)/dp - mean_c dx(c)/dp) + O(1/B)``, so the
  kernel loses the batch-shared part, ``Theta'(x, x) = g^2 (Theta(x, x) - Theta(x, x')) /
  (q - k + eps)`` and ``Theta'(x, x') = 0``. The yhat projection and the finite batch's own
  centring are O(1/B) per entry (derived here); the top eigenvalue of the B x B batch kernel is
  exact to O(1/B): centring ``(Theta_d - Theta_o) I + Theta_o 1 1^T`` leaves ``Theta_d -
  Theta_o`` on the B - 1 directions orthogonal to 1, the predicted diagonal. With several
  positions the statistics mix positions and the shared part is a mean over them that the
  stream does not carry: refused (measured 7-13% off at 8 positions);
* dropout (inverted, keep rate p, independent masks per input and position), before a dense,
  convolution or attention block: ``m_a m_b Theta / p^2`` averages to ``Theta / p`` for one
  input at one position (one mask) and to ``Theta`` otherwise (independent masks); the next
  weight block averages the masks over its fan-in, so the kernel after it is this mean at
  infinite width (derived here, as the forward rule of Schoenholz et al. 2017). The curvature
  is that of one step, each input with its own mask;
* average pooling over windows of k positions: ``diag' = (diag + (k - 1) within) / k``,
  ``pair' = (pair + (k - 1) between) / k``, ``within`` and ``between`` unchanged (windows that
  do not overlap, the forward rule's assumption); the global average keeps the first two and
  stops tracking positions. Max pooling: the stream's law is unknown (refused);
* attention: in the uniform-attention limit (logit spread 0: ``query_key_scale = 0``, or
  tokens identical within each input) every output token is ``W_O W_V xbar + b`` (Noci et al.
  2022, section 3), ``xbar`` the mean of the T tokens, so with ``X(a, b) = (k + (T - 1) kb) / T``
  and ``Tbar(a, b) = (pair + (T - 1) between) / T``:
  ``Theta' = d sigma_v X + 1 + sigma_o n_in X + sigma_v sigma_o Tbar`` (the output weights, of
  fan-in d, see ``W_V xbar``; the output bias; the value weights, whose gradient is
  ``W_O xbar``; the path), the same at every pair of tokens. With a logit spread the query and
  key weights enter at the same order: the rule and its derivation are in
  :mod:`propcalc.training.network_ntk_attention` (it reduces to this one at spread 0);
* residual ``a x + w F(x)``: ``a^2 Theta + w^2 Theta_F`` entry by entry (the cross terms have a
  fresh centred weight of the branch in them; Yang & Schoenholz 2017 for the forward pass).
"""

from __future__ import annotations

from dataclasses import dataclass

from ..networks.blocks import Attention, Convolution, Dense, Dropout, Norm, Pooling
from ..networks.rules import Step, Stream
from .network_ntk_attention import attention_kernel
from .ntk import UnsupportedKernelError

__all__ = [
    "Kernel",
    "activation",
    "attention",
    "dropout",
    "norm",
    "pooling",
    "residual",
    "start",
    "weight_block",
]


@dataclass(frozen=True)
class Kernel:
    """The per-unit tangent kernel of a stream (module docstring): ``within`` and ``between``
    are None unless positions are tracked."""

    diag: float
    pair: float
    within: float | None = None
    between: float | None = None

    def scaled(self, f_diag: float, f_pair: float, f_within: float | None = None,
               f_between: float | None = None) -> Kernel:
        """Each entry times its factor."""
        return Kernel(f_diag * self.diag, f_pair * self.pair,
                      None if self.within is None else _f(f_within) * self.within,
                      None if self.between is None else _f(f_between) * self.between)


def _f(x: float | None) -> float:
    if x is None:
        raise UnsupportedKernelError("a factor between positions is missing (internal)")
    return x


def start(stream: Stream) -> Kernel:
    """The input's kernel: 0 (the input has no parameters), with positions if tracked."""
    pos = 0.0 if stream.kw is not None else None
    return Kernel(0.0, 0.0, pos, pos)


def weight_block(before: Stream, block: Dense | Convolution, theta: Kernel, where: str
                 ) -> Kernel:
    """Dense or convolution: ``fan_in E[s s'] + 1 + sigma_w2 Theta`` per entry."""
    n_in = before.width
    if n_in is None:
        raise UnsupportedKernelError(
            f"block {where} ({block.KIND}): the width of its input is not given (set "
            "input_width and every dense, convolution and attention width): the kernel grows "
            "with it")
    fan_in = n_in * (block.taps if isinstance(block, Convolution) else 1)
    sw = block.sigma_w2

    def one(moment: float | None, t: float | None) -> float | None:
        return None if moment is None or t is None else fan_in * moment + 1.0 + sw * t

    return Kernel(fan_in * before.q + 1.0 + sw * theta.diag,
                  fan_in * before.k + 1.0 + sw * theta.pair,
                  one(before.kw, theta.within), one(before.kb, theta.between))


def activation(step: Step, theta: Kernel) -> Kernel:
    """``E[phi'(s_a) phi'(s_b)] Theta`` per entry (the walk's derivative pairs)."""
    d = step.detail
    return theta.scaled(d["derivative_second_moment"], d["derivative_pair"],
                        d.get("derivative_within"), d.get("derivative_between"))


def norm(before: Stream, block: Norm, theta: Kernel, where: str, spatial: bool = False
         ) -> Kernel:
    """Layer / RMS norm: ``g^2 Theta / (sigma^2 + eps)``; batch norm of a stream with one
    position: the batch-shared part removed. ``spatial``: the stream has several positions."""
    g2 = block.gain * block.gain
    if block.kind == "batch":
        if spatial:
            raise UnsupportedKernelError(
                f"block {where} (norm): batch norm of a stream with several positions: its "
                "statistics mix the positions, and the part they share is the mean over "
                "positions of the pair's cross moments, not the between-position one the "
                "large-batch rule removes (an O(1/positions) error: against seeded torch at "
                "8 positions the diagonal came out 7% and the pair entry 10-13% of the "
                "diagonal below it); computed for batch norm after a global average pooling "
                "or in networks without positions")
        denom = before.q - before.k + block.eps
        if not denom > 0.0:
            raise UnsupportedKernelError(f"block {where} (norm): batch norm of a stream with "
                                         "zero batch variance (the inputs are identical)")
        f = g2 / denom
        return Kernel(f * (theta.diag - theta.pair), 0.0)
    var = before.q - before.m * before.m if block.kind == "layer" else before.q
    denom = max(var, 0.0) + block.eps
    if not denom > 0.0:
        raise UnsupportedKernelError(f"block {where} (norm): {block.kind} norm of a stream with "
                                     "zero variance across units")
    f = g2 / denom
    return theta.scaled(f, f, f, f)


def dropout(block: Dropout, theta: Kernel) -> Kernel:
    """``Theta / p`` on the diagonal at one position, unchanged elsewhere."""
    return theta.scaled(1.0 / block.keep_rate, 1.0, 1.0, 1.0)


def pooling(block: Pooling, theta: Kernel, where: str) -> Kernel:
    """Average pooling (module docstring); max pooling never gets here (its law is unknown)."""
    if block.kind == "max" or theta.within is None or theta.between is None:
        raise UnsupportedKernelError(f"block {where} (pooling): max pooling, or pooling of a "
                                     "stream without positions")
    k = block.size
    diag = (theta.diag + (k - 1) * theta.within) / k
    pair = (theta.pair + (k - 1) * theta.between) / k
    if block.kind == "global_average":
        return Kernel(diag, pair)
    return Kernel(diag, pair, theta.within, theta.between)


def attention(before: Stream, block: Attention, step: Step, theta: Kernel, where: str
              ) -> Kernel:
    """Self-attention, uniform or with a logit spread
    (:mod:`propcalc.training.network_ntk_attention`, where the rule is derived)."""
    assert theta.within is not None and theta.between is not None
    diag, pair, within, between = attention_kernel(
        before, block, step, (theta.diag, theta.pair, theta.within, theta.between), where)
    return Kernel(diag, pair, within, between)


def residual(theta: Kernel, branch: Kernel, shortcut: float, weight: float) -> Kernel:
    """``a^2 Theta + w^2 Theta_F`` per entry."""
    a2, w2 = shortcut * shortcut, weight * weight

    def add(x: float | None, y: float | None) -> float | None:
        return None if x is None or y is None else a2 * x + w2 * y

    return Kernel(a2 * theta.diag + w2 * branch.diag, a2 * theta.pair + w2 * branch.pair,
                  add(theta.within, branch.within), add(theta.between, branch.between))
