"""The public API timed on this checkout against an earlier commit of propcalc, same run.

Run by hand from the repository root (not collected by pytest)::

    python tests/benchmarks/bench_before_after.py                 # against 8c978ff
    python tests/benchmarks/bench_before_after.py --base REV --repeat 7

The earlier commit is exported with ``git archive`` into a temporary directory; each version
runs the same workload in its own fresh interpreter (``PYTHONPATH`` points at its tree), the two
alternating ``--repeat`` times, and the median CPU time of each case is compared. 8c978ff is the
last commit before the restructuring into one mean-field core (issue 13): the ratio column is
after / before, so a ratio below 1 is a speed-up. Every case clears the engine's caches first
(``clear_caches`` where the version has it), so the ratios compare cold calls.
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import io
import tarfile
import tempfile
from pathlib import Path

#: the workload: name -> a function of the imported ``propcalc`` module
def _propagation_builtins(pc):
    for a in ("tanh", "relu", "gelu", "elu", "hard_tanh", "swish"):
        pc.propagation(a, 1.7, 0.05)


def _edge_tanh(pc):
    for q in (0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0):
        pc.edge_of_chaos("tanh", q)


def _sweep_tanh(pc):
    import numpy as np
    pc.sweep("tanh", np.linspace(0.5, 4, 64), np.linspace(0, 0.5, 64))  # a 64 x 64 grid


CASES = {
    "propagation x 6 built-ins": _propagation_builtins,
    "propagation, typed formula": lambda pc: pc.propagation("x * tanh(softplus(x))", 1.7, 0.05),
    "edge_of_chaos tanh, 9 q*": _edge_tanh,
    "recommend tanh, 20 layers": lambda pc: pc.recommend("tanh", depth=20),
    "sweep tanh 64 x 64": _sweep_tanh,
    "dropout tanh rho 0.9": lambda pc: pc.dropout_propagation(pc.activation("tanh"), 1.7, 0.05,
                                                              0.9),
}

#: one case in a fresh interpreter: CPU seconds of the call, caches emptied first
_RUNNER = """
import json, sys, time
import propcalc as pc
import bench_before_after as bench
clear = getattr(pc, "clear_caches", None)
if clear: clear()
t0 = time.process_time()
bench.CASES[sys.argv[1]](pc)
print(json.dumps(time.process_time() - t0))
"""


def _export(rev: str, root: Path) -> Path:
    """The tree of ``rev`` in a temporary directory, importable as ``propcalc``."""
    data = subprocess.run(["git", "archive", rev, "propcalc"], check=True,
                          capture_output=True).stdout
    dest = root / rev
    dest.mkdir()
    with tarfile.open(fileobj=io.BytesIO(data)) as tar:
        tar.extractall(dest, filter="data")
    return dest


def _time(tree: Path, name: str) -> float:
    here = Path(__file__).resolve().parent
    env = {**os.environ, "PYTHONPATH": f"{tree}{os.pathsep}{here}", "OPENBLAS_NUM_THREADS": "1",
           "OMP_NUM_THREADS": "1"}
    out = subprocess.run([sys.executable, "-c", _RUNNER, name], env=env, check=True,
                         capture_output=True, text=True, cwd=tree)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--base", default="8c978ff", help="the earlier commit (default 8c978ff)")
    ap.add_argument("--repeat", type=int, default=5, help="alternating runs per case")
    ap.add_argument("--only", nargs="*", default=None, help="names of cases to run (default all)")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        before = _export(args.base, Path(tmp))
        after = Path.cwd()
        print(f"{'case':32s} {'before s':>9s} {'after s':>9s} {'ratio':>7s}")
        ratios = []
        for name in args.only or CASES:
            tb, ta = [], []
            for _ in range(args.repeat):
                tb.append(_time(before, name))
                ta.append(_time(after, name))
            b, a = statistics.median(tb), statistics.median(ta)
            ratios.append(a / b)
            print(f"{name:32s} {b:9.3f} {a:9.3f} {a / b:7.2f}")
        print(f"geometric mean ratio (after / before): "
              f"{statistics.geometric_mean(ratios):.2f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
