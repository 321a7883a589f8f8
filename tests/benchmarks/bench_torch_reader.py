"""Benchmark (run by hand): reading 100-layer torch modules into network descriptions.

    python tests/benchmarks/bench_torch_reader.py            # 5 repeats
    python tests/benchmarks/bench_torch_reader.py --quick    # 1 repeat

Target (issue 14): reading a 100-layer torch module in under a second.

Modules (invented, seeded): a plain MLP of 100 Linear layers of width 512 with tanh between
them; a residual MLP of 100 branches ``x + 0.2 * W relu(LN(x))`` (width 512); a stack of 25
pre-norm transformer-style layers (MultiheadAttention and a two-layer GELU feed-forward,
width 256, 64 tokens: 100 Linear/attention layers). Each is read with
``propcalc.read_module(module, example_shape)`` (measured scales).

Baselines measured in the same run: ``torch.fx.symbolic_trace(module)`` alone (the tracing
every reader needs), and one forward pass of the module on the example. Reading = tracing +
one shape-propagation pass + the walk + the measured scales (a mean square per weight
tensor and an O(n^2) orthogonality probe) + validating the description. Wall-clock and CPU
time of this process are both given; the ratio uses CPU time (other users' load inflates the
wall clock). torch uses one thread. Nothing here asserts on time.
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402

import torch  # noqa: E402
import torch.nn as nn  # noqa: E402

import propcalc  # noqa: E402

torch.set_num_threads(1)


class ResidualMLP(nn.Module):
    def __init__(self, width: int = 512, blocks: int = 100) -> None:
        super().__init__()
        self.stem = nn.Linear(64, width)
        self.norms = nn.ModuleList(nn.LayerNorm(width) for _ in range(blocks))
        self.fcs = nn.ModuleList(nn.Linear(width, width) for _ in range(blocks))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.stem(x)
        for ln, fc in zip(self.norms, self.fcs):
            x = x + 0.2 * fc(torch.relu(ln(x)))
        return x


class PreNorm(nn.Module):
    def __init__(self, d: int = 256, heads: int = 4) -> None:
        super().__init__()
        self.ln1, self.ln2 = nn.LayerNorm(d), nn.LayerNorm(d)
        self.att = nn.MultiheadAttention(d, heads, batch_first=True)
        self.ff = nn.Sequential(nn.Linear(d, 4 * d), nn.GELU(), nn.Linear(4 * d, d))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        y = self.ln1(x)
        x = x + self.att(y, y, y, need_weights=False)[0]
        return x + self.ff(self.ln2(x))


def modules() -> dict[str, tuple[nn.Module, tuple[int, ...]]]:
    torch.manual_seed(0)
    layers: list[nn.Module] = [nn.Linear(64, 512)]
    for _ in range(99):
        layers += [nn.Tanh(), nn.Linear(512, 512)]
    transformer = nn.Sequential(*(PreNorm() for _ in range(25)))
    return {"plain MLP, 100 x 512": (nn.Sequential(*layers), (2, 64)),
            "residual MLP, 100 branches x 512": (ResidualMLP(), (2, 64)),
            "transformer, 25 layers x 256, 64 tokens": (transformer, (2, 64, 256))}


def timed(fn, repeats: int) -> tuple[float, float]:
    """(best wall, best CPU) seconds over the repeats."""
    walls, cpus = [], []
    for _ in range(repeats):
        w, c = time.perf_counter(), time.process_time()
        fn()
        walls.append(time.perf_counter() - w)
        cpus.append(time.process_time() - c)
    return min(walls), min(cpus)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one repeat")
    args = parser.parse_args()
    repeats = 1 if args.quick else 5
    print(f"{'module':44s} {'read wall':>10s} {'read CPU':>9s} {'trace CPU':>10s} "
          f"{'forward CPU':>12s} {'read/trace':>11s} {'< 1 s':>6s}")
    for name, (module, shape) in modules().items():
        x = torch.randn(shape)
        propcalc.read_module(module, shape)  # warm: imports, activation caches
        rw, rc = timed(lambda: propcalc.read_module(module, shape), repeats)
        _, tc = timed(lambda: torch.fx.symbolic_trace(module), repeats)
        with torch.no_grad():
            _, fc = timed(lambda: module(x), repeats)
        print(f"{name:44s} {rw:10.3f} {rc:9.3f} {tc:10.3f} {fc:12.4f} {rc / tc:11.1f} "
              f"{'yes' if rc < 1.0 else 'NO':>6s}")


if __name__ == "__main__":
    main()
