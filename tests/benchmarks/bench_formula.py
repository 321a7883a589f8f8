"""Speed of compiled formulas against the same expression written by hand in numpy.

Run by hand (not collected by pytest)::

    python tests/benchmarks/bench_formula.py [--points 1000000] [--repeat 5]

For each formula it prints the best-of-``repeat`` time of the hand-written
numpy baseline and of the compiled formula (``Activation.value``, which
includes the np.errstate guard and the float conversion), both measured in
this run on the same points, and their ratio. The target is a ratio below 3
(common practice, no source: a tree of closures should cost little more than
the ufunc calls it makes). Derivatives are timed against the built-ins'
hand-written derivatives where one exists.

The last table times a whole build (parse, derivative, probes, poles, breakpoints,
printing; the formula cache emptied first) in units of one evaluation of the
compiled value and derivative on the 110,000-point probe grid, measured in the same
run: the probes alone cost about 1 such unit, so the ratio shows what the other
stages add. No target (common practice, no source: a build happens once per formula).
"""

from __future__ import annotations

import argparse
import time
from collections.abc import Callable

import numpy as np
from scipy import special

import propcalc


def _best(fn: Callable[[], object], repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


CASES: list[tuple[str, dict[str, float], Callable[[np.ndarray], np.ndarray]]] = [
    ("x * tanh(softplus(x))", {}, lambda x: x * np.tanh(np.logaddexp(0.0, x))),
    ("x * sigmoid(beta * x)", {"beta": 1.5}, lambda x: x * special.expit(1.5 * x)),
    ("where(x > 0, x, exp(x) - 1)", {}, lambda x: np.where(x > 0, x, np.exp(x) - 1.0)),
    ("max(x, 0) + 0.1 * sin(x)**2", {}, lambda x: np.maximum(x, 0.0) + 0.1 * np.sin(x) ** 2),
]

BUILD_CASES: list[str] = [
    "x * tanh(softplus(x))",
    "where(x > 0, x, exp(x) - 1)",
    "x / (1 + x**2) + 0.1 * sin(x)",
    "abs(abs(abs(x - 1) - 2) - 0.5)",
    "abs(" * 30 + "x" + ")" * 30,
    "gelu_tanh(" * 10 + "x" + ")" * 10,
]

DERIVATIVE_CASES: list[tuple[str, str]] = [
    ("x * tanh(softplus(x))", "mish"),
    ("x * sigmoid(x)", "silu"),
    ("where(x > 0, x, exp(x) - 1)", "elu"),
]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--points", type=int, default=1_000_000)
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args()
    rng = np.random.default_rng(20240611)
    x = rng.normal(0.0, 3.0, args.points)

    print(f"{args.points} points, best of {args.repeat}")
    print(f"{'formula':34s} {'numpy [ms]':>11s} {'formula [ms]':>13s} {'ratio':>7s}")
    for text, params, hand in CASES:
        act = propcalc.activation(text, **params)
        np.testing.assert_allclose(act.value(x), hand(x), rtol=1e-14, atol=1e-300)
        with np.errstate(all="ignore"):
            t_hand = _best(lambda: hand(x), args.repeat)
        t_formula = _best(lambda: act.value(x), args.repeat)
        print(f"{text:34s} {1e3 * t_hand:11.2f} {1e3 * t_formula:13.2f} {t_formula / t_hand:7.2f}")

    print("\nderivatives against the built-ins' hand-written derivatives")
    print(f"{'formula':34s} {'built-in [ms]':>13s} {'formula [ms]':>13s} {'ratio':>7s}")
    for text, name in DERIVATIVE_CASES:
        act, ref = propcalc.activation(text), propcalc.activation(name)
        t_ref = _best(lambda: ref.derivative(x), args.repeat)
        t_formula = _best(lambda: act.derivative(x), args.repeat)
        print(f"{text:34s} {1e3 * t_ref:13.2f} {1e3 * t_formula:13.2f} {t_formula / t_ref:7.2f}")

    from propcalc.activations.formula import clear_formula_cache
    from propcalc.activations.formula.breakpoints import grid_points

    probe = grid_points("probe")
    print("\nwhole builds against one value + derivative evaluation on the probe grid")
    print(f"{'formula':34s} {'evaluate [ms]':>13s} {'build [ms]':>13s} {'ratio':>7s}")
    for text in BUILD_CASES:
        act = propcalc.activation(text)
        t_eval = _best(lambda: (act.value(probe), act.derivative(probe)), args.repeat)

        def build() -> None:
            clear_formula_cache()
            propcalc.formula_activation(text)

        t_build = _best(build, args.repeat)
        shown = text if len(text) <= 34 else text[:31] + "..."
        print(f"{shown:34s} {1e3 * t_eval:13.2f} {1e3 * t_build:13.2f} {t_build / t_eval:7.2f}")


if __name__ == "__main__":
    main()
