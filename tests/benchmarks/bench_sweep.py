"""Benchmark (run by hand): a phase-diagram grid three ways, as ratios in one run.

    python tests/benchmarks/bench_sweep.py            # 200 x 200 tanh grid (several minutes)
    python tests/benchmarks/bench_sweep.py --grid 60  # a quick look

1. serial:     propcalc.meanfield.sweep.sweep(...) in this process (the vectorised core:
               elementwise fixed points, Hermite-series c*);
2. processes:  the same with a ProcessPoolExecutor of --workers workers (default 2);
3. loop:       the loop a user would write by hand, propcalc.propagation at every
               point. It is timed on a random subsample of --sample points (fixed
               seed) and extrapolated to the whole grid; the script says so.

OMP_NUM_THREADS=1 is set before numpy is imported, for this process and the
workers alike. The machine is shared and noisy: read the ratios, not the seconds; the
serial and loop ratios are also given in CPU time of this process, which other users'
load does not inflate.
Nothing here asserts on time.
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import multiprocessing  # noqa: E402
import time  # noqa: E402
from concurrent.futures import ProcessPoolExecutor  # noqa: E402

import numpy as np  # noqa: E402

import propcalc  # noqa: E402
import importlib  # noqa: E402

# the correlation solver's module, whose exact stage (per-point evaluations) is timed apart
corr_module = importlib.import_module("propcalc.meanfield.correlation")
from propcalc.meanfield.sweep import QUANTITIES, sweep  # noqa: E402


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--grid", type=int, default=200, help="points per axis (default 200)")
    parser.add_argument("--workers", type=int, default=2, help="processes (default 2)")
    parser.add_argument("--sample", type=int, default=150,
                        help="points of the per-point loop actually timed (default 150)")
    parser.add_argument("--activation", default="tanh")
    args = parser.parse_args()

    act = propcalc.activation(args.activation)
    sw = np.linspace(0.1, 4.0, args.grid)
    sb = np.linspace(0.0, 0.5, args.grid)
    n = sw.size * sb.size
    print(f"{args.activation}: {args.grid} x {args.grid} = {n} points, sigma_w2 in [0.1, 4], "
          f"sigma_b2 in [0, 0.5]; OMP_NUM_THREADS={os.environ['OMP_NUM_THREADS']}")
    sweep(act, sw[:3], sb[:3], progress=False)  # warm the caches

    # time spent on chaotic points left to the 2-D solver (c* near 1) vs everything else
    spent = [0.0, 0]
    solver = corr_module._exact_stage

    def timed(*a, **k):  # type: ignore[no-untyped-def]
        t = time.perf_counter()
        try:
            return solver(*a, **k)
        finally:
            spent[0] += time.perf_counter() - t
            spent[1] += len(a[1])  # the points of this call (its sigma_w2 array)

    corr_module._exact_stage = timed
    t0, c0 = time.perf_counter(), time.process_time()
    serial = sweep(act, sw, sb, progress=None)
    t_serial, cpu_serial = time.perf_counter() - t0, time.process_time() - c0
    corr_module._exact_stage = solver
    phases, counts = np.unique(serial.phase, return_counts=True)
    print(f"serial (vectorised):       {t_serial:8.1f} s   (CPU {cpu_serial:.1f} s)   phases: "
          + ", ".join(f"{p} {c}" for p, c in zip(phases, counts)))
    rest = t_serial - spent[0]
    print(f"   of which chaotic c* polished or solved by exact evaluations: {spent[0]:.1f} s for {spent[1]} "
          f"points ({1e3 * spent[0] / max(spent[1], 1):.1f} ms each); everything else "
          f"(fixed points, chi_1, phases, series c*): {rest:.1f} s for {n} points "
          f"({1e3 * rest / n:.2f} ms each)")

    ctx = multiprocessing.get_context("spawn")
    t0 = time.perf_counter()
    with ProcessPoolExecutor(max_workers=args.workers, mp_context=ctx) as ex:
        par = sweep(act, sw, sb, executor=ex, progress=None)
    t_par = time.perf_counter() - t0
    # the same chunks run the same arithmetic (numpy's SIMD sums may differ in the last bit)
    same = all(np.allclose(getattr(serial, k), getattr(par, k), rtol=1e-12, atol=0,
                           equal_nan=True)
               for k in QUANTITIES if k not in ("xi_c", "trainable_depth"))
    print(f"{args.workers} processes (incl. start): {t_par:8.1f} s   same numbers (1e-12): {same}")

    rng = np.random.default_rng(0)
    pick = rng.choice(n, size=min(args.sample, n), replace=False)
    iw, ib = np.unravel_index(pick, (sw.size, sb.size))
    per_phase: dict[str, list[float]] = {}
    t0, c0 = time.perf_counter(), time.process_time()
    for i, j in zip(iw, ib):
        t1 = time.perf_counter()
        p = propcalc.propagation(act, float(sw[i]), float(sb[j]))
        per_phase.setdefault(p.phase, []).append(time.perf_counter() - t1)
    t_sample = time.perf_counter() - t0
    cpu_loop = (time.process_time() - c0) / pick.size * n
    t_loop = t_sample / pick.size * n
    print(f"per-point loop:            {t_loop:8.1f} s   (CPU {cpu_loop:.1f} s)   EXTRAPOLATED "
          f"from {pick.size} random points ({t_sample:.1f} s)")
    print("   loop cost per point by phase: " + ", ".join(
        f"{k} {1e3 * np.mean(v):.1f} ms (n={len(v)})" for k, v in sorted(per_phase.items())))
    print()
    print(f"ratio loop / serial:       {t_loop / t_serial:8.2f}   "
          f"(CPU time: {cpu_loop / cpu_serial:.2f})")
    print(f"ratio serial / {args.workers} processes: {t_serial / t_par:8.2f}")
    print(f"ratio loop / {args.workers} processes:   {t_loop / t_par:8.2f}")
    non_chaotic = [v for k, vals in per_phase.items() if k != "chaotic" for v in vals]
    if non_chaotic and n > spent[1]:
        print(f"ratio loop / serial on the non-chaotic points: "
              f"{np.mean(non_chaotic) / (rest / n):8.1f}   (loop ms per point / vectorised)")


if __name__ == "__main__":
    main()
