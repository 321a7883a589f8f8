"""The predicted top curvature at initialisation against torch's, on real data (run by hand).

For plain stacks planned by ``propcalc.recommend(act, widths=..., loss=..., n_classes=10,
batch_size=B, inputs=batch)`` and initialised by ``apply_plan`` (three seeds each), the top
eigenvalue of the loss's Hessian at initialisation is measured with torch (Hessian-vector
products by double backward, the largest algebraic eigenvalue by the Lanczos method of scipy.sparse.linalg.eigsh) on a batch of scikit-learn's bundled handwritten
digits (load_digits, standardised; seeded choice of B inputs), and printed beside the prediction
``learning_rate_details.lambda_max`` as the ratio measured / predicted. The baseline is the
prediction itself, computed in the same run (its CPU time is printed too). No assertion.

    python tests/benchmarks/bench_lr_ceiling.py            # the grid below, about 20 min
    python tests/benchmarks/bench_lr_ceiling.py --quick    # four cells

Grid: widths 128-1024 and depths 5-100 (not every pair: a 100-layer network of width 1024 has
10^8 weights, too many for a shared 2-core box), tanh / relu / gelu, cross-entropy with the
planned readout, cross-entropy with the hidden layers' scale (``scale_output=False``) and MSE.
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import torch  # noqa: E402
from sklearn.datasets import load_digits  # noqa: E402
from sklearn.preprocessing import StandardScaler  # noqa: E402

import propcalc  # noqa: E402
from propcalc.init.torch_adapter import apply_plan  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from torch_helpers import stack, top_hessian_eigenvalue  # noqa: E402


GRID = [  # (act, depth, width, loss, scale_output, batch)
    ("tanh", 5, 128, "cross_entropy", True, 32),
    ("tanh", 5, 1024, "cross_entropy", True, 32),
    ("tanh", 20, 256, "cross_entropy", True, 32),
    ("tanh", 100, 128, "cross_entropy", True, 32),
    ("tanh", 100, 128, "cross_entropy", False, 32),
    ("tanh", 5, 256, "cross_entropy", True, 128),
    ("tanh", 100, 128, "mse", True, 32),
    ("relu", 5, 256, "cross_entropy", True, 32),
    ("relu", 50, 512, "cross_entropy", True, 32),
    ("relu", 100, 128, "cross_entropy", True, 32),
    ("gelu", 5, 512, "cross_entropy", True, 32),
    ("gelu", 64, 128, "cross_entropy", True, 32),
]
QUICK = [GRID[0], GRID[3], GRID[7], GRID[10]]


def top_gauss_newton_eigenvalue(net, x, y, loss: str, tol: float = 1e-5) -> float:
    """The largest eigenvalue of the Gauss-Newton part J^T H_out J / B of the same Hessian.

    Products ``J^T (H_out (J v))``: ``J v`` by forward mode (``torch.func.jvp``), the outputs'
    Hessian by double backward in the outputs only, ``J^T u`` by ``torch.func.vjp``; the
    largest eigenvalue by ``scipy.sparse.linalg.eigsh``.
    """
    from scipy.sparse.linalg import LinearOperator, eigsh
    from torch.func import functional_call, jvp, vjp
    names = [k for k, _ in net.named_parameters()]
    params = tuple(p.detach() for _, p in net.named_parameters())
    sizes = [p.numel() for p in params]

    def f(*ps):
        return functional_call(net, dict(zip(names, ps)), (x,))

    def loss_of(out):
        if loss == "mse":
            return torch.nn.functional.mse_loss(
                out, torch.nn.functional.one_hot(y, out.shape[1]).to(out.dtype))
        return torch.nn.functional.cross_entropy(out, y)

    out, back = vjp(f, *params)
    o = out.detach().requires_grad_(True)
    g_out = torch.autograd.grad(loss_of(o), o, create_graph=True)[0]

    def gnvp(v: np.ndarray) -> np.ndarray:
        parts, i = [], 0
        for p, s in zip(params, sizes):
            parts.append(torch.from_numpy(np.ascontiguousarray(v[i:i + s])).reshape(p.shape))
            i += s
        _, jv = jvp(f, params, tuple(parts))
        hjv = torch.autograd.grad(g_out, o, grad_outputs=jv, retain_graph=True)[0]
        return torch.cat([t.reshape(-1) for t in back(hjv)]).numpy()

    size = sum(sizes)
    op = LinearOperator((size, size), matvec=lambda v: gnvp(v.reshape(-1)), dtype=np.float64)
    v0 = np.random.default_rng(0).standard_normal(size)
    return float(eigsh(op, k=1, which="LA", tol=tol, v0=v0, return_eigenvectors=False)[0])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--seeds", type=int, default=3)
    args = parser.parse_args()
    torch.set_num_threads(1)
    x_all, y_all = load_digits(return_X_y=True)
    x_all = StandardScaler().fit_transform(x_all)
    print(f"{'act':5} {'L':>4} {'n':>5} {'loss':13} {'readout':7} {'B':>4} {'predicted':>9} "
          f"{'Gauss-Newton (seeds)':>26} {'ratio':>6} {'Hessian (seeds)':>26} {'ratio':>6} "
          f"{'ceiling':>9} {'plan s':>7}")
    ratios, h_ratios = [], []
    for act, depth, width, loss, scale, b in (QUICK if args.quick else GRID):
        idx = np.random.default_rng(0).choice(len(x_all), b, replace=False)
        x, y = x_all[idx], y_all[idx]
        widths = [64] + [width] * (depth - 1) + [10]
        t0 = time.process_time()
        plan = propcalc.recommend(act, widths=widths, loss=loss, n_classes=10, batch_size=b,
                                  inputs=x, scale_output=scale)
        plan_s = time.process_time() - t0
        pred = plan.learning_rate_details.lambda_max
        gns, hs = [], []
        for seed in range(args.seeds):
            net = stack(act, widths)
            apply_plan(net, plan, seed=seed)
            xt, yt = torch.tensor(x), torch.tensor(y)
            gns.append(top_gauss_newton_eigenvalue(net, xt, yt, loss))
            hs.append(top_hessian_eigenvalue(net, xt, yt, loss))
        ratio, h_ratio = float(np.mean(gns)) / pred, float(np.mean(hs)) / pred
        ratios.append(ratio)
        h_ratios.append(h_ratio)
        print(f"{act:5} {depth:4d} {width:5d} {loss:13} {'loss' if scale else 'hidden':7} {b:4d} "
              f"{pred:9.4g} {', '.join(f'{m:.4g}' for m in gns):>26} {ratio:6.3f} "
              f"{', '.join(f'{m:.4g}' for m in hs):>26} {h_ratio:6.3f} "
              f"{plan.learning_rate_ceiling:9.4g} {plan_s:7.2f}", flush=True)
    for name, r in (("Gauss-Newton", np.array(ratios)), ("Hessian", np.array(h_ratios))):
        print(f"{name} measured / predicted over {r.size} cells: median {np.median(r):.3f}, "
              f"range {r.min():.3f}-{r.max():.3f}, within 20%: {np.mean(np.abs(r - 1) <= 0.2):.0%}")


if __name__ == "__main__":
    main()
