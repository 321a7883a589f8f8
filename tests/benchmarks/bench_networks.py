"""Benchmark (run by hand): 1000-block networks against single-point propagation reports.

    python tests/benchmarks/bench_networks.py            # every network, 3 repeats
    python tests/benchmarks/bench_networks.py --quick    # 1 repeat

Target (issue 14): network_propagation of a 1000-block network (1000 elementary blocks once
repeats are expanded, residual branches' contents included) in at most the time of 10
single-point propagation reports, measured in the same run.

Baseline: propcalc.propagation(act, sigma_w2, sigma_b2) at 10 distinct points of the plane
(so no report reuses another's cached per-q numbers), for tanh, relu and gelu; the mean time of
one report, from cold caches (propcalc.clear_caches()). Each network is timed from cold caches
too, with simulate=False (the networks here stay Gaussian). Both wall-clock and CPU time of
this process are given (other users' load inflates the first, not the second); the ratio uses
CPU time. OMP_NUM_THREADS=1 is set before numpy is imported.
Nothing here asserts on time.
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import time  # noqa: E402

import propcalc  # noqa: E402


def dense(sw, sb=0.0):
    return {"dense": {"sigma_w2": sw, "sigma_b2": sb}}


def act(name):
    return {"activation": name}


def repeat(times, *blocks):
    return {"repeat": {"times": times, "blocks": list(blocks)}}


def residual(*branch, weight=1.0):
    return {"residual": {"branch": list(branch), "weight": weight}}


NETWORKS = {
    "plain tanh MLP (500 x dense, tanh)": {"blocks": [repeat(500, dense(1.8, 0.05), act("tanh"))]},
    "plain relu MLP (500 x dense, relu)": {"blocks": [repeat(500, dense(2.0), act("relu"))]},
    "relu residual, no norm (500 x [relu, dense], w = 0.1)": {"blocks": [
        repeat(500, residual(act("relu"), dense(2.0), weight=0.1))]},
    "pre-norm MLP residual (200 x [layer norm, dense, gelu, dense])": {"blocks": [
        repeat(200, residual({"norm": "layer"}, dense(2.0), act("gelu"), dense(1.0),
                             weight=0.2))]},
    "pre-norm transformer (125 x attention + MLP residuals, 16 tokens)": {"blocks": [
        repeat(125, residual({"norm": "layer"}, {"attention": {"tokens": 16, "heads": 4,
                                                               "query_key_scale": 0.3}},
                             weight=0.3),
               residual({"norm": "layer"}, dense(2.0), act("gelu"), dense(1.0), weight=0.3))]},
    "CNN (250 x [convolution, batch norm, relu, dropout])": {"blocks": [
        repeat(250, {"convolution": {"sigma_w2": 2.0, "sigma_b2": 0.0, "kernel": [3, 3]}},
               {"norm": "batch"}, act("relu"), {"dropout": {"keep_rate": 1.0}})]},
    "tanh residual, no norm (500 x [tanh, dense], w = 0.3): q grows, no cache helps": {
        "blocks": [repeat(500, residual(act("tanh"), dense(1.5), weight=0.3))]},
}

POINTS = [(1.0 + 0.1 * i, 0.01 * (i + 1)) for i in range(10)]


def cold() -> None:
    propcalc.clear_caches()


def timed(fn) -> tuple[float, float]:
    w, c = time.perf_counter(), time.process_time()
    fn()
    return time.perf_counter() - w, time.process_time() - c


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="one repeat")
    args = parser.parse_args()
    repeats = 1 if args.quick else 3

    print("baseline: one single-point propagation report (10 distinct points, cold caches)")
    base = {}
    for name in ("tanh", "relu", "gelu"):
        a = propcalc.activation(name)
        propcalc.propagation(a, 1.5, 0.05)  # rules and tables built once
        best = None
        for _ in range(repeats):
            cold()
            wall, cpu = timed(lambda: [propcalc.propagation(a, sw, sb) for sw, sb in POINTS])
            best = (wall / 10, cpu / 10) if best is None or cpu < best[1] * 10 else best
        base[name] = best
        print(f"  {name:5s} {best[0] * 1e3:8.2f} ms wall  {best[1] * 1e3:8.2f} ms cpu")
    report = max(v[1] for v in base.values())
    print(f"  reference report (the slowest of the three, cpu): {report * 1e3:.2f} ms; "
          f"target per network: {10 * report * 1e3:.1f} ms\n")

    print(f"{'network':75s} {'blocks':>6s} {'wall ms':>9s} {'cpu ms':>9s} {'ratio':>6s}  target")
    for label, desc in NETWORKS.items():
        net = propcalc.network(desc)
        best = None
        for _ in range(repeats):
            cold()
            wall, cpu = timed(lambda: propcalc.network_propagation(net, 1.0, 0.2,
                                                                   c0_within=0.1,
                                                                   c0_between=0.05,
                                                                   simulate=False))
            best = (wall, cpu) if best is None or cpu < best[1] else best
        ratio = best[1] / (10 * report)
        print(f"{label:75s} {net.n_expanded_blocks:6d} {best[0] * 1e3:9.1f} {best[1] * 1e3:9.1f} "
              f"{ratio:6.2f}  {'met' if ratio <= 1 else 'NOT met'}")
    print("\nratio = cpu time of the network / cpu time of 10 reports; target: <= 1")


if __name__ == "__main__":
    main()
