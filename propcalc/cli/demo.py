"""The built-in demo scenario (invented): ``propcalc demo``.

Tarnquill Instruments, a fictional maker of vibration loggers, trains a
plain 64-layer MLP to tell six fault classes apart from 48 made-up spectral
features per sensor window. The team has always initialised without bias
noise (sigma_b2 = 0) and asks propcalc whether that works at 64 layers with
GELU and with tanh, and what to use instead. Everything here uses the public
API only; no data are read.
"""

from __future__ import annotations

import json
import sys
from typing import Any, TextIO

from .. import InitPlan, activation, jsonable, propagation, recommend

__all__ = ["SCENARIO", "WIDTHS", "run", "plans"]

SCENARIO = ("Tarnquill Instruments (fictional) trains a 64-layer MLP on 48 synthetic "
            "spectral features per vibration window, 6 fault classes, hidden width 512.")
WIDTHS = [48] + [512] * 63 + [6]
DEPTH = len(WIDTHS) - 1


def plans() -> dict[str, InitPlan]:
    """The four plans the scenario compares."""
    out: dict[str, InitPlan] = {}
    for name in ("tanh", "gelu"):
        act = activation(name)
        out[f"{name}, sigma_b2 = 0"] = recommend(act, widths=WIDTHS, sigma_b2=0.0)
        out[f"{name}, edge of chaos"] = recommend(act, widths=WIDTHS, target="edge")
    return out


def _summary(plan: InitPlan) -> dict[str, Any]:
    p = plan.propagation
    return {"sigma_w2": plan.sigma_w2, "sigma_b2": plan.sigma_b2, "q_star": plan.q_star,
            "phase": p.phase, "chi_1": p.chi_1, "trainable_depth": plan.trainable_depth,
            "depth_ok": plan.depth_ok, "verdict": plan.verdict,
            "weight_std": [li.weight_std for li in plan.layers[:2]] + [plan.layers[-1].weight_std],
            "bias_std": plan.layers[0].bias_std}


def run(out: TextIO | None = None, as_json: bool = False) -> int:
    """Print the scenario; returns 0."""
    out = sys.stdout if out is None else out
    ps = plans()
    if as_json:
        out.write(json.dumps(jsonable({"scenario": SCENARIO, "widths": WIDTHS,
                                       "plans": {k: v.to_dict() for k, v in ps.items()}}),
                             indent=2, allow_nan=False) + "\n")
        return 0
    w = out.write
    w(SCENARIO + "\n")
    w(f"Question: is sigma_b2 = 0 fine at {DEPTH} layers for tanh and for GELU?\n\n")
    for key, plan in ps.items():
        p = plan.propagation
        w(f"== {key}\n")
        q = "-" if plan.q_star is None else f"{plan.q_star:.4g}"
        w(f"   sigma_w2 = {plan.sigma_w2:.5g}, sigma_b2 = {plan.sigma_b2:.4g}, q* = {q}, "
          f"chi_1 = {p.chi_1:.4g}, phase: {p.phase}\n")
        w(f"   {'OK' if plan.depth_ok else 'PROBLEM'}: {plan.verdict}\n")
        if plan.depth_ok:
            l1, l2, last = plan.layers[0], plan.layers[1], plan.layers[-1]
            w(f"   weight std: layer 1 ({l1.layer.fan_in} inputs) {l1.weight_std:.5f}; "
              f"layers 2-{DEPTH - 1} (512 inputs) {l2.weight_std:.5f}; "
              f"layer {DEPTH} {last.weight_std:.5f}; bias std {l1.bias_std:.5f}\n")
        w("\n")
    gelu0 = ps["gelu, sigma_b2 = 0"].propagation
    gelu_edge = ps["gelu, edge of chaos"]
    w("Why: tanh is critical at sigma_w2 = 1 with no bias (its variance decays only slowly "
      "towards 0, so the network stays near the edge of chaos at any depth). GELU's only "
      "critical point with sigma_b2 = 0 sits at q* -> 0; from unit-variance inputs the "
      f"variance instead grows by about {gelu0.variance_fixed_points.growth_rate:.3g}x per layer. "
      "GELU needs a bias variance: "
      f"sigma_b2 = {gelu_edge.sigma_b2:.3g} puts it on the edge of chaos at an attracting "
      f"q* = {gelu_edge.q_star:.3g}.\n")
    p_check = propagation(activation("gelu"), gelu_edge.sigma_w2, gelu_edge.sigma_b2, depth=DEPTH)
    w(f"Check: propagation at that point gives chi_1 = {p_check.chi_1:.6f}, phase "
      f"'{p_check.phase}'.\n")
    w("\nThese are infinite-width predictions at initialisation; confirm them on the real "
      "model (measure per-layer activation variances at step 0).\n")
    return 0
