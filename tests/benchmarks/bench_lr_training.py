"""Real SGD runs at multiples of the plan's learning-rate ceiling (run by hand).

For plain stacks planned by ``propcalc.recommend(act, widths=..., loss="cross_entropy",
n_classes=10, batch_size=32)`` and initialised by ``apply_plan`` (seed 0), train with plain SGD
(no momentum), 32 random digits per step (scikit-learn's bundled handwritten digits,
standardised; seeded), for 300 steps, at 0.5, 1, 2 and 4 times ``plan.learning_rate_ceiling``.
Prints the mean loss of the first 10 steps, the largest loss, the mean of the last 50, and the
accuracy on all 1797 digits. The baseline of each row is its own 0.5x run. No assertion.

    python tests/benchmarks/bench_lr_training.py     # five networks, about 5 min on one core
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import torch  # noqa: E402
from sklearn.datasets import load_digits  # noqa: E402
from sklearn.preprocessing import StandardScaler  # noqa: E402

import propcalc  # noqa: E402
from propcalc.init.torch_adapter import apply_plan  # noqa: E402

ACTS = {"tanh": torch.nn.Tanh, "relu": torch.nn.ReLU, "gelu": torch.nn.GELU}
NETWORKS = [("tanh", 5, 128), ("tanh", 20, 128), ("tanh", 100, 128), ("relu", 20, 128),
            ("gelu", 20, 128)]
MULTIPLES = (0.5, 1.0, 2.0, 4.0)
STEPS, BATCH = 300, 32


def main() -> None:
    torch.set_num_threads(1)
    x, y = load_digits(return_X_y=True)
    xt = torch.tensor(StandardScaler().fit_transform(x), dtype=torch.float32)
    yt = torch.tensor(y)
    for act, depth, width in NETWORKS:
        widths = [64] + [width] * (depth - 1) + [10]
        plan = propcalc.recommend(act, widths=widths, loss="cross_entropy", n_classes=10,
                                  batch_size=BATCH)
        print(f"{act} depth {depth} width {width}: ceiling {plan.learning_rate_ceiling:.4g}, "
              f"recommended {plan.learning_rate:.4g}")
        for m in MULTIPLES:
            lr = m * plan.learning_rate_ceiling
            mods: list[torch.nn.Module] = []
            for i, (a, b) in enumerate(zip(widths[:-1], widths[1:])):
                mods.append(torch.nn.Linear(a, b))
                if i < len(widths) - 2:
                    mods.append(ACTS[act]())
            net = torch.nn.Sequential(*mods)
            apply_plan(net, plan, seed=0)
            opt = torch.optim.SGD(net.parameters(), lr=lr)
            gen = torch.Generator().manual_seed(0)
            losses = []
            for _ in range(STEPS):
                idx = torch.randint(0, len(xt), (BATCH,), generator=gen)
                loss = torch.nn.functional.cross_entropy(net(xt[idx]), yt[idx])
                opt.zero_grad()
                loss.backward()
                opt.step()
                losses.append(loss.item())
            with torch.no_grad():
                acc = (net(xt).argmax(1) == yt).float().mean().item()
            print(f"  {m:3g}x (lr {lr:.4g}): first 10 steps {np.mean(losses[:10]):.3f}, largest "
                  f"{np.max(losses):.3g}, last 50 {np.mean(losses[-50:]):.3f}, accuracy {acc:.3f}",
                  flush=True)


if __name__ == "__main__":
    main()
