"""Finite-width laws against seeded networks: predicted vs measured spread and drift, and the cost.

Run by hand (not collected by pytest; no assertion on time)::

    python tests/benchmarks/bench_finite_width.py            # about a minute on 2 shared cores
    python tests/benchmarks/bench_finite_width.py --quick    # fewer networks

For each case (activation, plan, width n, depth L) it prints, for one input (c0 = 1) pushed
through ``--networks`` seeded networks (:func:`propcalc.simulate`, numpy default_rng):

* ln of the typical q at the top (exp E ln q) and the sd of ln q, predicted by
  :func:`propcalc.finite_width` (first order in 1/n) and measured (mean of logs +- 1 standard
  error; the sd with its sampling error sd / sqrt(2 (R - 1)));
* the same for the squared gradient norm at the bottom (layer 0, the longest path);
* the CPU time of the prediction against the simulation's, measured in the same run (a ratio).
"""

from __future__ import annotations

import argparse
import math
import os
import time

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import propcalc as pc  # noqa: E402
from propcalc.meanfield.simulate import simulate  # noqa: E402

#: activation, plan depth (None: relu at sigma_w2 = 2), width, depth
CASES = [
    ("relu", None, 32, 6),
    ("relu", None, 128, 20),
    ("relu", None, 1024, 20),
    ("tanh", 100, 128, 100),
    ("gelu", 64, 128, 64),
    ("gelu", 64, 512, 64),
]


def _logs(lay, reps: int, which: str) -> tuple[float, float, float]:
    geo = getattr(lay, f"{which}_geometric")
    band = getattr(lay, f"{which}_geometric_band")
    se = math.log(band[1] / geo) / 2
    return math.log(geo), se, se * math.sqrt(reps)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--networks", type=int, default=48)
    parser.add_argument("--quick", action="store_true", help="16 networks per case")
    args = parser.parse_args()
    reps = 16 if args.quick else args.networks
    head = (f"{'case':<26} {'ln q_typ pred':>13} {'meas +- SE':>17} {'sd ln q pred':>12} "
            f"{'meas':>11} {'ln G_typ pred':>13} {'meas +- SE':>17} {'sd ln G pred':>12} "
            f"{'meas':>11} {'cpu ratio':>9}")
    print(head)
    print("-" * len(head))
    for name, plan_depth, width, depth in CASES:
        if plan_depth is None:
            sw, sb, q0 = 2.0, 0.0, 1.0
        else:
            plan = pc.recommend(name, depth=plan_depth)
            sw, sb, q0 = plan.sigma_w2, plan.sigma_b2, plan.q_star
        t0 = time.process_time()
        pred = pc.finite_width(name, sw, sb, [width] * (depth + 1), q0)
        t_pred = time.process_time() - t0
        t0 = time.process_time()
        sim = simulate(pc.activation(name), sw, sb, width=width, depth=depth, q0=q0, c0=1.0,
                       repetitions=reps, n_pairs=1, seed=2026)
        t_sim = time.process_time() - t0
        mq, se_q, sd_q = _logs(sim.layers[-1], reps, "q")
        mg, se_g, sd_g = _logs(sim.layers[0], reps, "gradient")
        rel = 1 / math.sqrt(2 * (reps - 1))
        case = f"{name} n={width} L={depth}"
        print(f"{case:<26} {math.log(pred.q_typical[-1]):>13.3f} {mq:>9.3f} +- {se_q:<5.3f} "
              f"{pred.q_log_sd[-1]:>12.3f} {sd_q:>5.3f}+-{sd_q * rel:<4.2f} "
              f"{math.log(pred.gradient_typical[0]):>13.3f} {mg:>9.3f} +- {se_g:<5.3f} "
              f"{pred.gradient_log_sd[0]:>12.3f} {sd_g:>5.3f}+-{sd_g * rel:<4.2f} "
              f"{t_sim / max(t_pred, 1e-6):>9.0f}")
    print(f"\n{reps} seeded networks per case (seed 2026), one input (c0 = 1); cpu ratio = "
          "simulation / prediction, CPU time in this run.")


if __name__ == "__main__":
    main()
