"""``propcalc plan``: the per-layer initialisation plan."""

from __future__ import annotations

import argparse
from typing import Any, TextIO

from ... import recommend
from ..options import EXIT_OK, activation_of, conv_layer, finite_float, int_list, with_act, with_json
from ..output import compress_rows, emit_json, format_pairs, format_table

__all__ = ["register"]


def _cmd_plan(args: argparse.Namespace, out: TextIO) -> int:
    act = activation_of(args)
    layers = [conv_layer(spec) for spec in args.conv] if args.conv else None
    plan = recommend(act, args.depth, widths=args.widths, layers=layers,
                     distribution=args.distribution, target=args.target,
                     sigma_b2=args.sigma_b2, q_star=args.q_star, q_input=args.q_input)
    if args.json:
        emit_json(plan.to_dict(), out)
        return EXIT_OK
    pr = plan.propagation
    out.write(format_pairs([
        ("activation", plan.activation), ("target", plan.target_description),
        ("distribution", plan.distribution), ("sigma_w2", plan.sigma_w2),
        ("sigma_b2", plan.sigma_b2), ("q*", plan.q_star), ("chi_1", pr.chi_1),
        ("phase", pr.phase), ("depth", plan.depth),
        ("trainable depth (6 xi_c)", plan.trainable_depth),
    ]) + "\n\n")
    rows = []
    for li in plan.layers:
        lay = li.layer
        rows.append([li.index, lay.kind if lay else "-", lay.fan_in if lay else "-",
                     lay.fan_out if lay else "-", li.sigma_w2, li.gain,
                     li.value if lay else f"{li.gain:.6g}/sqrt(fan_in)", li.bias_std])
    label = {"normal": "weight std", "uniform": "uniform bound",
             "truncated_normal": "std before trunc.", "orthogonal": "orthogonal scale"}
    out.write(format_table(compress_rows(rows), ["layer", "kind", "fan_in", "fan_out", "sigma_w2",
                                                 "gain", label[plan.distribution], "bias std"]) + "\n\n")
    out.write(f"verdict: {plan.verdict}\n")
    for note in plan.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK


def register(sub: Any) -> None:
    """Add the plan subcommands to ``sub`` (an argparse subparsers object)."""
    p = sub.add_parser("plan", help="per-layer initialisation plan")
    with_act(p)
    p.add_argument("--depth", type=int, help="number of weight layers")
    p.add_argument("--widths", type=int_list, help="layer widths d0,d1,...,dL (dense network)")
    p.add_argument("--conv", action="append", metavar="IN:OUT:KERNEL",
                   help="a convolution layer, e.g. 64:128:3x3 (2-D) or 16:32:5 (1-D); repeatable")
    p.add_argument("--distribution", default="normal",
                   choices=["normal", "uniform", "truncated_normal", "orthogonal"])
    p.add_argument("--target", default="auto", choices=["auto", "edge", "variance", "bias"])
    p.add_argument("--sigma-b2", type=finite_float, help="fix the bias variance (target 'bias')")
    p.add_argument("--q-star", type=finite_float, help="preferred variance fixed point on the edge")
    p.add_argument("--q-input", type=finite_float, default=1.0, help="mean square of the inputs (default 1)")
    with_json(p)
    p.set_defaults(func=_cmd_plan)
