"""Finite width through residual blocks and norms: predicted against seeded networks, per width.

Run by hand (not collected by pytest; no assertion on time)::

    python tests/benchmarks/bench_network_finite_width.py           # a few minutes on 2 cores
    python tests/benchmarks/bench_network_finite_width.py --quick   # widths 32 and 128 only

For each network of tests/test_network_finite_width_blocks.py and each width n it draws R
seeded numpy networks with literal Gaussian weight matrices and the exact backward pass (the
sampler ``_sample`` of that test module) and prints, predicted by
:func:`propcalc.training.network_finite_width` (first order in 1/n) and measured:

* the sd of ln q at the top (the last position) and the largest over positions, with the
  sampling error of an sd, sd / sqrt(2 (R - 1));
* the sd of ln |g|^2 at the first position (the gradient spread the verdict uses);
* n times the measured variance of ln q at the top: constant when the spread shrinks like 1/n;
* the CPU time of the prediction against the sampling's, measured in the same run (a ratio).
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import numpy as np
import test_network_finite_width_blocks as cases

from propcalc.training import network_finite_width

#: (network, blocks, {width: networks})
PLAN = [
    (cases.residual_tanh, 8, {32: 400, 128: 400, 512: 100, 1024: 100}),
    (cases.pre_norm, 8, {32: 400, 128: 400, 512: 60, 1024: 40}),
    (cases.post_norm, 6, {32: 400, 128: 400, 512: 100, 1024: 100}),
    (cases.relu_on_input, 10, {32: 400, 128: 400, 512: 100, 1024: 100}),
    (cases.dropout_mlp, 8, {32: 400, 128: 400, 512: 100, 1024: 100}),
    (cases.dropout_branches, 8, {32: 400, 128: 400, 512: 60}),
    (cases.dropout_outputs, 8, {32: 400, 128: 400, 512: 100}),
]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="widths 32 and 128 only")
    args = parser.parse_args()
    print("network        n     R   sd ln q top: pred / meas   max sd ln q: pred / meas   "
          "sd ln g: pred / meas   n Var ln q top   CPU sampling / prediction")
    for case, (make, times, widths) in enumerate(PLAN):
        for n, reps in widths.items():
            if args.quick and n > 128:
                continue
            desc = make(n, times)
            t0 = time.process_time()
            pred = network_finite_width(desc)
            t1 = time.process_time()
            q, g = cases._sample(desc, reps, seed=1000 * case + n)  # no stream shared by cases
            t2 = time.process_time()
            sd = np.log(q[:, 1:]).std(axis=0, ddof=1)
            err = 1.0 / math.sqrt(2.0 * (reps - 1))
            top, big = float(sd[-1]), float(sd.max())
            gsd = float(g.std(ddof=1))
            print(f"{make.__name__:<14} {n:<5} {reps:<4} "
                  f"{pred.q_log_sd[-1]:.4f} / "
                  f"{top:.4f} +- {top * err:.4f}   "
                  f"{max(pred.q_log_sd[1:]):.4f} / {big:.4f} +- {big * err:.4f}   "
                  f"{pred.gradient_spread:.4f} / {gsd:.4f} +- {gsd * err:.4f}   "
                  f"{n * top * top:8.3f}   {(t2 - t1) / max(t1 - t0, 1e-9):9.0f}")


if __name__ == "__main__":
    main()
