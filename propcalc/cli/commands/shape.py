"""``propcalc shape ACT --depth L``: an activation shaped for a depth (kernel shaping).

Prints what :func:`propcalc.shape_activation` returns: the transform's parameters, the
achieved whole-network C_L(0) and C_L'(1), every condition and every root with the chosen
one marked, the base activation at its edge of chaos for comparison, the depth verdict and the
initialisation the shaped activation is made for (sigma_w2 = 1, sigma_b2 = 0); ``--json``
writes the result's dict form; ``--plot`` draws the network correlation map before and after
shaping (:func:`propcalc.output.shaping_plot.plot_shaping`).
"""

from __future__ import annotations

import argparse
import importlib
from typing import Any, TextIO

from ... import shape_activation
from ..options import EXIT_OK, activation_of, finite_float, with_act, with_json, with_plot
from ..output import emit_json, format_number, format_pairs, format_table
from ..pictures import start_plot, write_plot

__all__ = ["register"]

#: The fewest samples of c_0 in the picture (at the deepest networks).
_MIN_PLOT_POINTS = 11
#: The method names of the help.
_METHODS = {"tat": "tailored activation transformation (Zhang et al. 2022): C_L(0) = target",
            "dks": "deep kernel shaping (Martens et al. 2021): C_L'(1) = target"}


def _plot_points(depth: int) -> int:
    """Samples of c_0 in the picture: 101 up to 1000 layers, fewer beyond (each sample costs a
    map evaluation per layer, before and after shaping: a tanh picture at depth 10000 with 101
    samples took over 3 minutes of one core)."""
    return max(_MIN_PLOT_POINTS, min(101, (101 * 1000) // depth))


def _cmd_shape(args: argparse.Namespace, out: TextIO) -> int:
    target = start_plot(args)
    drawer = importlib.import_module("propcalc.output.shaping_plot") if target else None
    act = activation_of(args)
    shaped = shape_activation(act, args.depth, target=args.target, method=args.method,
                              allow_negative_slope=args.allow_negative_slope)
    if args.json:
        emit_json(shaped.to_dict(), out)
    else:
        _text(shaped, out)
    if target is not None and drawer is not None:
        fig = drawer.plot_shaping(shaped, n_points=_plot_points(shaped.depth))
        write_plot(fig, target, f"the network correlation map of {shaped.base} before and "
                                f"after shaping ({shaped.method}, depth {shaped.depth})",
                   args, out)
    return EXIT_OK


def _text(s: Any, out: TextIO) -> None:
    pairs: list[tuple[str, Any]] = [
        ("activation", s.base), ("method", f"{s.method}: {_METHODS[s.method]}"),
        ("form", "sqrt(2 / (1 + slope^2)) * leaky_relu_slope(x)" if s.form == "slope"
         else "gamma * (phi(alpha * x + beta) + delta)"),
        ("depth", s.depth), ("target", f"{s.target_quantity} = {format_number(s.target)}"),
    ]
    pairs += [(name, value) for name, value in s.params.items()]
    pairs += [("shaped formula", s.formula),
              ("achieved C_L(0)", s.network_map_at_0),
              ("achieved C_L'(1)", s.network_slope_at_1)]
    lm = s.layer_map
    if lm is not None:
        pairs += [("per layer: Q(1)", lm.variance), ("per layer: Q'(1)", lm.variance_slope),
                  ("per layer: C(0)", lm.correlation_at_0), ("per layer: C'(1)", lm.slope_at_1),
                  ("per layer: C''(1)", lm.curvature_at_1)]
    ref = s.reference
    if ref is not None:
        pairs += [("before shaping", f"{ref.activation} at its edge of chaos (sigma_w2 = "
                                     f"{format_number(ref.sigma_w2)}, sigma_b2 = "
                                     f"{format_number(ref.sigma_b2)}): C_L(0) = "
                                     f"{format_number(ref.network_map_at_0)}")]
    pairs += [("use with", f"sigma_w2 = {format_number(s.sigma_w2)}, sigma_b2 = "
                           f"{format_number(s.sigma_b2)}")]
    out.write(format_pairs(pairs) + "\n\n")
    out.write("conditions (checked with propcalc's maps on the shaped activation):\n")
    out.write(format_table([[c.name, c.required, c.achieved, c.deviation] for c in s.conditions],
                           ["condition", "required", "achieved", "deviation"]) + "\n")
    if s.roots:
        out.write(f"\nroots ({len(s.roots)}; chosen: {s.choice_rule}):\n")
        out.write(format_table(
            [[k + 1, r.alpha, r.beta, r.gamma, r.delta, r.max_deviation,
              r.variance_map_deviation, "chosen" if r.chosen else ""]
             for k, r in enumerate(s.roots)],
            ["root", "alpha", "beta", "gamma", "delta", "max deviation",
             "max |Q(q) - q|, q in [1/2, 2]", ""]) + "\n")
    if s.depth_verdict is not None:
        out.write(f"\nverdict: {s.depth_verdict.text}\n")
    eq = s.residual_equivalent
    if eq is not None:
        out.write(f"residual equivalent: x <- x + {format_number(eq.weight)} W relu(x) "
                  f"(shortcut {format_number(eq.shortcut_weight)}, branch "
                  f"{format_number(eq.branch_weight)}; {eq.per_block}): C_L(0) = "
                  f"{format_number(eq.network_map_at_0)}\n")
    for note in s.notes:
        out.write(f"note: {note}\n")


def register(sub: Any) -> None:
    """Add the ``shape`` subcommand to ``sub`` (an argparse subparsers object)."""
    p = sub.add_parser(
        "shape", help="shape an activation for a target depth (TAT, DKS)",
        description="Transform an activation so a plain network of the given depth keeps a "
                    "well-conditioned correlation map: the tailored activation transformation "
                    "(Zhang et al. 2022) or deep kernel shaping (Martens et al. 2021). Shaped "
                    "activations are used with sigma_w2 = 1 and sigma_b2 = 0.")
    with_act(p)
    p.add_argument("--depth", type=int, required=True, help="number of layers L")
    p.add_argument("--method", default="tat", choices=sorted(_METHODS),
                   help="tat (default): C_L(0) = target; dks: C_L'(1) = target")
    p.add_argument("--target", type=finite_float,
                   help="tat: C_L(0) in (0, 1) (default 0.9); dks: C_L'(1) > 1 (default 1.5)")
    p.add_argument("--allow-negative-slope", action="store_true",
                   help="leaky form: look for a slope in [-1, 0) when no slope in [0, 1) "
                        "reaches the target")
    with_json(p)
    with_plot(p, "the network correlation map before and after shaping (101 samples of c_0 "
                 "up to 1000 layers, fewer beyond)")
    p.set_defaults(func=_cmd_shape)
