"""``propcalc simulate``: the finite-width check on seeded random networks."""

from __future__ import annotations

import argparse
import math
from typing import Any, TextIO

from ... import simulate
from ..options import EXIT_OK, UsageError, activation_of, finite_float, with_act, with_json
from ..output import emit_json, format_pairs, format_table, plus_minus

__all__ = ["register"]


#: bounds of ``propcalc simulate`` (checked before anything runs): width, depth, repetitions,
#: input pairs, and width^2 x depth x repetitions (weights drawn; about 10 s of one core at the
#: limit, and a weight matrix of at most 134 MB)
SIMULATION_LIMITS = {"width": 4096, "depth": 1000, "repetitions": 1000, "pairs": 256,
                     "size": 500_000_000}


def _cmd_simulate(args: argparse.Namespace, out: TextIO) -> int:
    lim = SIMULATION_LIMITS
    for name, value, low in (("width", args.width, 2), ("depth", args.depth, 1),
                             ("repetitions", args.repetitions, 2), ("pairs", args.pairs, 1)):
        if not low <= value <= lim[name]:
            raise UsageError(f"--{name} must be in [{low}, {lim[name]}], got {value}")
    size = args.width * args.width * args.depth * args.repetitions
    if size > lim["size"]:
        fit = math.isqrt(lim["size"] // (args.depth * args.repetitions))
        raise UsageError(f"width^2 x depth x repetitions must be <= {lim['size']:.0e} (about 10 s "
                         f"of one core), got {size:.3g}; at depth {args.depth} with "
                         f"{args.repetitions} repetitions use --width <= {fit}")
    act = activation_of(args)
    r = simulate(act, args.sigma_w2, args.sigma_b2, width=args.width, depth=args.depth,
                 q0=args.q0, c0=args.c0, repetitions=args.repetitions, n_pairs=args.pairs,
                 seed=args.seed, tolerance=args.tolerance)
    if args.json:
        emit_json(r.to_dict(), out)
        return EXIT_OK
    out.write(format_pairs([
        ("activation", r.activation), ("sigma_w2", r.sigma_w2), ("sigma_b2", r.sigma_b2),
        ("width", r.width), ("depth", r.depth), ("repetitions", r.repetitions),
        ("input pairs per network", r.n_pairs), ("seed", r.seed), ("q0", r.q0), ("c0", r.c0),
        ("tolerance", r.tolerance),
    ]) + "\n\n")
    shown = list(range(r.depth + 1))
    if len(shown) > 41:
        keep = {round(i * r.depth / 20) for i in range(21)}
        if r.first_visible_layer is not None:
            keep.add(r.first_visible_layer)
        shown = sorted(keep)
    rows = []
    for i in shown:
        m = r.layers[i]
        rows.append([m.index, m.q_predicted, plus_minus(m.q_mean, m.q_se), m.c_predicted,
                     plus_minus(m.c_mean, m.c_se), m.gradient_predicted,
                     plus_minus(m.gradient_mean, m.gradient_se), m.q_in_band, m.c_in_band,
                     m.gradient_in_band])
    out.write(format_table(rows, ["layer", "q predicted", "q measured", "c predicted",
                                  "c measured", "|g|^2 predicted", "|g|^2 measured", "q ok",
                                  "c ok", "|g|^2 ok"]) + "\n")
    if len(shown) < r.depth + 1:
        out.write(f"({len(shown)} of {r.depth + 1} layers shown; --json has them all)\n")
    out.write("\nmeasured: mean +- 2 standard errors over the networks; ok: the prediction lies "
              "in that band (and in the band of the geometric mean for q and |g|^2)\n")
    out.write(format_pairs([("largest relative deviation of q", r.max_deviation_q),
                            ("largest deviation of c", r.max_deviation_c),
                            ("largest relative deviation of |g|^2", r.max_deviation_gradient),
                            ("comparisons in band", f"{100 * r.fraction_in_band:.1f}%")]) + "\n")
    out.write(f"verdict: {r.message}\n")
    return EXIT_OK


def register(sub: Any) -> None:
    """Add the simulate subcommands to ``sub`` (an argparse subparsers object)."""
    lim = SIMULATION_LIMITS
    p = sub.add_parser("simulate", help="finite-width check on seeded random networks")
    with_act(p)
    p.add_argument("-w", "--sigma-w2", type=finite_float, required=True, help="weight variance x fan_in")
    p.add_argument("-b", "--sigma-b2", type=finite_float, default=0.0, help="bias variance (default 0)")
    p.add_argument("--width", type=int, required=True, help=f"units per layer (2 to {lim['width']})")
    p.add_argument("--depth", type=int, required=True, help=f"layers (1 to {lim['depth']})")
    p.add_argument("--repetitions", type=int, default=8,
                   help=f"independent networks (2 to {lim['repetitions']}, default 8)")
    p.add_argument("--pairs", type=int, default=4,
                   help=f"input pairs per network (1 to {lim['pairs']}, default 4)")
    p.add_argument("--seed", type=int, default=0, help="root seed (default 0)")
    p.add_argument("--q0", type=finite_float, default=1.0,
                   help="mean square of the layer-0 pre-activations (default 1)")
    p.add_argument("--c0", type=finite_float, default=0.5, help="their correlation (default 0.5)")
    p.add_argument("--tolerance", type=finite_float, default=0.05,
                   help="practical size of a visible deviation (default 0.05)")
    with_json(p)
    p.set_defaults(func=_cmd_simulate)
