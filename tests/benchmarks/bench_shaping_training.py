"""Real training: a deep plain network with a shaped activation against the same network at
the edge of chaos, on scikit-learn's bundled handwritten digits.

Run by hand (not collected by pytest)::

    python tests/benchmarks/bench_shaping_training.py [--depth 100] [--width 128]
        [--steps 600] [--seeds 0 1 2] [--optimizer sgd] [--lrs 0.003 0.001 0.0003]

Data: ``sklearn.datasets.load_digits`` (1797 images of 8 x 8 pixels, 10 classes), split
80/20 with a fixed permutation (seed 0); each pixel standardised on the training part, then
every input vector scaled to squared norm 64 (= fan_in), so the first layer's
pre-activations have mean square 1, as the shaped activations assume.

Networks: ``depth`` hidden Linear layers of ``width`` units without bias, each followed by
the activation, and a Linear readout to 10 classes (std 1 / sqrt(width), no bias). Cases:

* ``relu, edge of chaos``: ReLU with weights of variance 2 / fan_in (He et al. 2015; the edge
  of chaos of ReLU, sigma_b2 = 0), Gaussian or scaled orthogonal;
* ``shaped (tat)``: ``propcalc.shape_activation("relu", depth, target=0.9)``, the leaky
  form, with weights of variance 1 / fan_in (Gaussian), as the result says;
* ``shaped (tat), orthogonal``: the same with scaled orthogonal weights.

Training: plain SGD with momentum 0.9 (or Adam), softmax cross-entropy, batch 128, the
given number of steps, torch with one thread, float32. Printed per case and seed: the
training loss and accuracy on the whole training set and the test accuracy at the end, and
the predicted C_L(0) of each network (propcalc), so the kernel and the outcome sit side by
side. Nothing is asserted: the numbers are the evidence.
"""

from __future__ import annotations

import argparse
import math
import time
from collections.abc import Callable
from typing import Any

import numpy as np

import propcalc


def _data() -> tuple[Any, Any, Any, Any]:
    import torch
    from sklearn.datasets import load_digits

    x, y = load_digits(return_X_y=True)
    perm = np.random.default_rng(0).permutation(len(y))
    x, y = x[perm].astype(np.float64), y[perm]
    n_train = int(0.8 * len(y))
    mean = x[:n_train].mean(axis=0)
    std = x[:n_train].std(axis=0)
    x = (x - mean) / np.where(std > 0, std, 1.0)
    x *= math.sqrt(x.shape[1]) / np.linalg.norm(x, axis=1, keepdims=True)
    tx = torch.tensor(x, dtype=torch.float32)
    ty = torch.tensor(y, dtype=torch.long)
    return tx[:n_train], ty[:n_train], tx[n_train:], ty[n_train:]


def _network(act: Callable[[Any], Any], depth: int, width: int, sigma_w2: float,
             orthogonal: bool, seed: int) -> Any:
    import torch

    gen = torch.Generator().manual_seed(seed)
    layers = []
    fan_in = 64
    for _ in range(depth):
        lin = torch.nn.Linear(fan_in, width, bias=False)
        with torch.no_grad():
            if orthogonal:
                a = torch.randn(max(width, fan_in), max(width, fan_in), generator=gen,
                                dtype=torch.float64)
                q, r = torch.linalg.qr(a)
                q = q * torch.sign(torch.diagonal(r))
                w = q[:width, :fan_in] * math.sqrt(sigma_w2 * max(width, fan_in) / fan_in)
                lin.weight.copy_(w.to(torch.float32))
            else:
                lin.weight.copy_(torch.randn(width, fan_in, generator=gen)
                                 * math.sqrt(sigma_w2 / fan_in))
        layers.append(lin)
        fan_in = width
    readout = torch.nn.Linear(width, 10, bias=False)
    with torch.no_grad():
        readout.weight.copy_(torch.randn(10, width, generator=gen) / math.sqrt(width))

    class Plain(torch.nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.hidden = torch.nn.ModuleList(layers)
            self.readout = readout

        def forward(self, x: Any) -> Any:
            for lin in self.hidden:
                x = act(lin(x))
            return self.readout(x)

    return Plain()


def _train(model: Any, data: tuple[Any, ...], steps: int, optimizer: str, lr: float,
           seed: int) -> dict[str, float]:
    import torch

    x_tr, y_tr, x_te, y_te = data
    gen = torch.Generator().manual_seed(1000 + seed)
    if optimizer == "adam":
        opt = torch.optim.Adam(model.parameters(), lr=lr)
    else:
        opt = torch.optim.SGD(model.parameters(), lr=lr, momentum=0.9)
    loss_fn = torch.nn.CrossEntropyLoss()
    for _ in range(steps):
        idx = torch.randint(0, len(y_tr), (128,), generator=gen)
        opt.zero_grad()
        loss = loss_fn(model(x_tr[idx]), y_tr[idx])
        loss.backward()
        opt.step()
    with torch.no_grad():
        out_tr = model(x_tr)
        out_te = model(x_te)
        return {"loss": float(loss_fn(out_tr, y_tr)),
                "train_acc": float((out_tr.argmax(1) == y_tr).float().mean()),
                "test_acc": float((out_te.argmax(1) == y_te).float().mean())}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--depth", type=int, default=100)
    parser.add_argument("--width", type=int, default=128)
    parser.add_argument("--steps", type=int, default=600)
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--optimizer", choices=("sgd", "adam"), default="sgd")
    parser.add_argument("--lrs", type=float, nargs="+", default=[0.001],
                        help="learning rates, each case trained at every one")
    parser.add_argument("--target", type=float, default=0.9)
    parser.add_argument("--cases", type=int, nargs="*", default=None,
                        help="indices of the cases to run (0: relu, 1: relu orthogonal, "
                             "2: shaped, 3: shaped orthogonal); all by default")
    args = parser.parse_args()
    import torch

    torch.set_num_threads(1)
    data = _data()
    # depth Linear layers, each followed by the activation: the activation is applied depth
    # times between the first pre-activations and the readout's input
    shaped = propcalc.shape_activation("relu", args.depth, target=args.target)
    act_shaped = shaped.torch_module()
    relu = torch.relu
    ref = shaped.reference
    cases = [
        ("relu, edge of chaos", relu, 2.0, False, ref.network_map_at_0),
        ("relu, edge of chaos, orthogonal", relu, 2.0, True, ref.network_map_at_0),
        (f"shaped (tat, slope {shaped.params['slope']:.4f})", act_shaped, 1.0, False,
         shaped.network_map_at_0),
        ("shaped (tat), orthogonal", act_shaped, 1.0, True, shaped.network_map_at_0),
    ]
    if args.cases:
        cases = [cases[i] for i in args.cases]
    print(f"digits (sklearn), depth {args.depth}, width {args.width}, {args.steps} steps of "
          f"{args.optimizer}{' (momentum 0.9)' if args.optimizer == 'sgd' else ''}, batch 128, "
          f"seeds {args.seeds}")
    print(f"{'case':34s} {'C_L(0)':>8s} {'lr':>7s} {'seed':>4s} {'loss':>8s} {'train acc':>9s} "
          f"{'test acc':>9s} {'time [s]':>8s}")
    summary = []
    for name, act, sw, orth, c_l in cases:
        for lr in args.lrs:
            accs, tests = [], []
            for seed in args.seeds:
                torch.manual_seed(seed)
                model = _network(act, args.depth, args.width, sw, orth, seed)
                t0 = time.perf_counter()
                res = _train(model, data, args.steps, args.optimizer, lr, seed)
                accs.append(res["train_acc"])
                tests.append(res["test_acc"])
                print(f"{name:34s} {c_l:8.4f} {lr:7.4g} {seed:4d} {res['loss']:8.4f} "
                      f"{res['train_acc']:9.3f} {res['test_acc']:9.3f} "
                      f"{time.perf_counter() - t0:8.1f}", flush=True)
            summary.append((name, lr, float(np.mean(accs)), float(np.mean(tests))))
    print("\nmean over seeds")
    print(f"{'case':34s} {'lr':>7s} {'train acc':>9s} {'test acc':>9s}")
    for name, lr, acc, test in summary:
        print(f"{name:34s} {lr:7.4g} {acc:9.3f} {test:9.3f}")


if __name__ == "__main__":
    main()
