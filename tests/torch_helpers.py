"""Torch pieces shared by the torch tests and the benchmarks that measure curvature.

One copy of: the plain stacks (``nn.Linear`` + activation, float64), two inputs at a given
variance and cosine, the empirical tangent kernel of a pair from autograd gradients, and the top
eigenvalue of a loss's Hessian (Hessian-vector products by double backward, Lanczos by
``scipy.sparse.linalg.eigsh``). Used by tests/test_learning_rate_torch.py,
tests/test_network_ntk.py and tests/benchmarks/bench_lr_ceiling.py; import after
``pytest.importorskip("torch")`` in tests.
"""

from __future__ import annotations

import numpy as np
import torch

__all__ = ["ACTS", "stack", "pair_inputs", "kernel_pair", "top_hessian_eigenvalue"]

ACTS = {"tanh": torch.nn.Tanh, "relu": torch.nn.ReLU, "gelu": torch.nn.GELU}


def stack(act: str, widths: list[int]) -> torch.nn.Sequential:
    """A float64 plain stack: Linear(widths[i], widths[i+1]) with ``act`` between them."""
    mods: list[torch.nn.Module] = []
    for i, (a, b) in enumerate(zip(widths[:-1], widths[1:])):
        mods.append(torch.nn.Linear(a, b))
        if i < len(widths) - 2:
            mods.append(ACTS[act]())
    return torch.nn.Sequential(*mods).double()


def pair_inputs(d: int, q0: float, c0: float) -> np.ndarray:
    """Two inputs of dimension d with |x|^2 / d = q0 and cosine c0 exactly (seed 0)."""
    rng = np.random.default_rng(0)
    a, b = rng.standard_normal((2, d))
    a /= np.linalg.norm(a)
    b -= (b @ a) * a
    b /= np.linalg.norm(b)
    r = np.sqrt(q0 * d)
    return np.stack([r * a, r * (c0 * a + np.sqrt(1 - c0 * c0) * b)])


def kernel_pair(net: torch.nn.Module, x: torch.Tensor) -> tuple[float, float]:
    """The empirical tangent kernel of output 0 at the two inputs: (Theta(x0, x0), Theta(x0, x1)).

    ``sum_p df(x)/dp df(x')/dp`` from autograd gradients of ``net(x)[i, 0]``.
    """
    params = list(net.parameters())
    out = net(x)
    g = [torch.cat([t.reshape(-1) for t in torch.autograd.grad(out[i, 0], params,
                                                               retain_graph=True)])
         for i in range(2)]
    return float(g[0] @ g[0]), float(g[0] @ g[1])


def top_hessian_eigenvalue(net: torch.nn.Module, x: torch.Tensor, y: torch.Tensor, loss: str,
                           tol: float = 1e-5) -> float:
    """The largest (algebraic) eigenvalue of the mean loss's Hessian in the parameters.

    Hessian-vector products by double backward, fed to scipy's Lanczos solver
    (``scipy.sparse.linalg.eigsh``, ``which="LA"``): deep networks at initialisation also have
    large negative curvature, which plain power iteration would find instead.
    """
    from scipy.sparse.linalg import LinearOperator, eigsh
    params = list(net.parameters())
    out = net(x)
    if loss == "mse":
        target = torch.nn.functional.one_hot(y, out.shape[1]).to(out.dtype)
        value = torch.nn.functional.mse_loss(out, target)
    else:
        value = torch.nn.functional.cross_entropy(out, y)
    grads = torch.autograd.grad(value, params, create_graph=True)
    flat = torch.cat([g.reshape(-1) for g in grads])
    size = flat.numel()

    def hvp(v: np.ndarray) -> np.ndarray:
        vt = torch.from_numpy(np.ascontiguousarray(v.reshape(-1))).to(flat.dtype)
        hv = torch.autograd.grad(flat, params, grad_outputs=vt, retain_graph=True)
        return torch.cat([h.reshape(-1) for h in hv]).detach().numpy()

    op = LinearOperator((size, size), matvec=hvp, dtype=np.float64)
    v0 = np.random.default_rng(0).standard_normal(size)
    return float(eigsh(op, k=1, which="LA", tol=tol, v0=v0, return_eigenvectors=False)[0])
