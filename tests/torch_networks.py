"""Networks of blocks in torch (float64), for the empirical tangent kernel of their descriptions.

One seeded torch network per description (propcalc's blocks format, docs/networks.md), drawn with
the conventions of propcalc/networks/sim_blocks.py: ``W ~ N(0, sigma_w2 / fan_in)``, biases
``N(0, sigma_b2)`` (every bias a parameter, trained), circular padding, positions on one axis,
softmax attention with logits ``query_key_scale q.k / sqrt(d_head)``, norms without trainable
gain, inverted dropout. Inputs have shape (inputs, positions, units); the output unit is unit 0
at position 0. ``empirical_kernel`` sums ``grad_a * grad_b`` over every parameter (autograd), the
tangent kernel of Jacot et al. 2018. Import after ``pytest.importorskip("torch")``.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import torch

__all__ = ["TorchNetwork", "empirical_kernel", "exchangeable_inputs"]

_ACTS = {"tanh": torch.tanh, "relu": torch.relu, "gelu": torch.nn.functional.gelu,
         "erf": torch.erf}


class TorchNetwork:
    """The forward pass of a description with freshly drawn parameters (``self.params``)."""

    def __init__(self, desc: dict[str, Any], seed: int) -> None:
        self.gen = torch.Generator().manual_seed(seed)
        self.params: list[torch.Tensor] = []
        self.blocks = desc["blocks"]
        self.n_in = desc["input_width"]

    def _weight(self, shape: tuple[int, ...], variance: float) -> torch.Tensor:
        w = torch.randn(*shape, generator=self.gen, dtype=torch.float64) * math.sqrt(variance)
        w.requires_grad_(True)
        self.params.append(w)
        return w

    def __call__(self, x: torch.Tensor) -> torch.Tensor:
        return self._run(self.blocks, x)

    def _run(self, blocks: list[Any], x: torch.Tensor) -> torch.Tensor:
        for b in blocks:
            (kind, body), = b.items()
            x = getattr(self, "_" + kind)(body, x)
        return x

    def _repeat(self, body: dict[str, Any], x: torch.Tensor) -> torch.Tensor:
        for _ in range(body["times"]):
            x = self._run(body["blocks"], x)
        return x

    def _residual(self, body: dict[str, Any], x: torch.Tensor) -> torch.Tensor:
        return body.get("shortcut", 1.0) * x + body.get("weight", 1.0) * self._run(
            body["branch"], x)

    def _dense(self, body: dict[str, Any], x: torch.Tensor) -> torch.Tensor:
        n_in, n_out = x.shape[-1], body.get("width", x.shape[-1])
        w = self._weight((n_in, n_out), body["sigma_w2"] / n_in)
        b = self._weight((n_out,), body["sigma_b2"])
        return x @ w + b

    def _convolution(self, body: dict[str, Any], x: torch.Tensor) -> torch.Tensor:
        k = body["kernel"] if isinstance(body["kernel"], int) else body["kernel"][0]
        stride = body.get("stride", 1)
        stride = stride if isinstance(stride, int) else stride[0]
        n_in, n_out = x.shape[-1], body.get("width", x.shape[-1])
        out = self._weight((n_out,), body["sigma_b2"])
        for off in range(-(k // 2), k - k // 2):  # circular padding, as sim_blocks
            w = self._weight((n_in, n_out), body["sigma_w2"] / (n_in * k))
            out = out + torch.roll(x, -off, dims=1)[:, ::stride, :] @ w
        return out

    def _activation(self, body: Any, x: torch.Tensor) -> torch.Tensor:
        return _ACTS[body](x)

    def _norm(self, body: Any, x: torch.Tensor) -> torch.Tensor:
        kind = body if isinstance(body, str) else body["kind"]
        gain = 1.0 if isinstance(body, str) else body.get("gain", 1.0)
        eps = 0.0 if isinstance(body, str) else body.get("eps", 0.0)
        axes = (0, 1) if kind == "batch" else (2,)
        if kind != "rms":
            x = x - x.mean(dim=axes, keepdim=True)
        return gain * x / torch.sqrt((x * x).mean(dim=axes, keepdim=True) + eps)

    def _dropout(self, body: dict[str, Any], x: torch.Tensor) -> torch.Tensor:
        p = body["keep_rate"]
        mask = (torch.rand(x.shape, generator=self.gen, dtype=torch.float64) < p).double() / p
        return x * mask

    def _pooling(self, body: dict[str, Any], x: torch.Tensor) -> torch.Tensor:
        if body["kind"] == "global_average":
            return x.mean(dim=1, keepdim=True)
        w = body["window"] if isinstance(body["window"], int) else body["window"][0]
        n, p, c = x.shape
        return x.reshape(n, p // w, w, c).mean(dim=2)

    def _attention(self, body: dict[str, Any], x: torch.Tensor) -> torch.Tensor:
        n, t, n_in = x.shape
        d, h = body.get("width", n_in), body.get("heads", 1)
        dh = d // h
        wq = self._weight((n_in, d), body.get("query_key_sigma_w2", 1.0) / n_in)
        wk = self._weight((n_in, d), body.get("query_key_sigma_w2", 1.0) / n_in)
        wv = self._weight((n_in, d), body.get("value_sigma_w2", 1.0) / n_in)
        wo = self._weight((d, d), body.get("output_sigma_w2", 1.0) / d)
        b = self._weight((d,), body.get("sigma_b2", 0.0))

        def heads(a: torch.Tensor) -> torch.Tensor:
            return a.reshape(n, t, h, dh).transpose(1, 2)

        q, k, v = heads(x @ wq), heads(x @ wk), heads(x @ wv)
        scale = body.get("query_key_scale", 1.0) / math.sqrt(dh)
        att = torch.softmax(scale * q @ k.transpose(2, 3), dim=-1)
        return (att @ v).transpose(1, 2).reshape(n, t, d) @ wo + b


def exchangeable_inputs(n_inputs: int, positions: int, units: int, q0: float, c0: float,
                        c_within: float = 0.0, c_between: float = 0.0, seed: int = 0
                        ) -> np.ndarray:
    """Inputs (n_inputs, positions, units) with exactly the Gram matrix of exchangeable inputs
    and positions: per-unit second moment q0, correlation c0 between two inputs at one position,
    c_within between two positions of one input, c_between between two positions of two."""
    m = n_inputs * positions
    idx = np.arange(m)
    same_in = (idx[:, None] // positions) == (idx[None, :] // positions)
    same_pos = (idx[:, None] % positions) == (idx[None, :] % positions)
    g = np.where(same_in & same_pos, 1.0, np.where(same_in, c_within,
                                                   np.where(same_pos, c0, c_between)))
    vals, vecs = np.linalg.eigh(g)
    root = vecs * np.sqrt(np.clip(vals, 0.0, None))  # g = root root^T
    if units < m:
        raise ValueError("units must be at least inputs * positions")
    rng = np.random.default_rng(seed)
    basis, _ = np.linalg.qr(rng.standard_normal((units, m)))  # orthonormal columns
    x = root @ basis.T * math.sqrt(q0 * units)
    return x.reshape(n_inputs, positions, units)


def empirical_kernel(desc: dict[str, Any], x: np.ndarray, seed: int) -> tuple[float, float]:
    """(Theta(x_0, x_0), Theta(x_0, x_1)) of output unit 0 at position 0, one seeded network."""
    net = TorchNetwork(desc, seed)
    out = net(torch.tensor(x))
    g = [torch.cat([t.reshape(-1) for t in torch.autograd.grad(
        out[i, 0, 0], net.params, retain_graph=True, allow_unused=True, materialize_grads=True)])
        for i in range(2)]
    return float(g[0] @ g[0]), float(g[0] @ g[1])
