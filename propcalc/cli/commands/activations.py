"""``propcalc activations`` and ``propcalc show``: the built-ins and one activation's profile."""

from __future__ import annotations

import argparse
from typing import Any, TextIO

from ... import activation, builtin_names, gains
from ..options import EXIT_OK, activation_of, with_act, with_json
from ..output import emit_json, format_number, format_pairs, format_table

__all__ = ["register"]


def _cmd_activations(args: argparse.Namespace, out: TextIO) -> int:
    items = []
    for name in builtin_names():
        act = activation(name)
        items.append({**act.to_dict(), "gains": gains(act).to_dict()})
    if args.json:
        emit_json(items, out)
        return EXIT_OK
    rows = []
    for it in items:
        pr, g = it["properties"], it["gains"]
        lo, hi = pr["output_range"]
        rows.append([it["label"], f"[{format_number(lo, 4)}, {format_number(hi, 4)}]",
                     pr["monotonic"], pr["parity"], pr["smoothness"],
                     round(pr["dead_unit_probability"], 4), g["forward"], g["backward"],
                     g["common_gain"]])
    out.write(format_table(rows, ["activation", "range", "monotonic", "parity", "smoothness",
                                  "P(dead)", "forward gain", "backward gain", "common gain"]) + "\n")
    out.write("\nforward gain = 1/sqrt(E[phi(z)^2]), backward gain = 1/sqrt(E[phi'(z)^2]), "
              "z ~ N(0, 1); common gains: common practice, no source.\n")
    return EXIT_OK

def _cmd_show(args: argparse.Namespace, out: TextIO) -> int:
    act = activation_of(args)
    g = gains(act)
    data = {**act.to_dict(), "gains": g.to_dict()}
    if args.json:
        emit_json(data, out)
        return EXIT_OK
    pr = act.properties
    pairs = [("activation", act.label), ("description", act.description or "-")]
    if act.formula:
        pairs += [("formula", act.formula), ("derivative", act.derivative_formula or "-")]
    pairs += [
        ("breakpoints", ", ".join(format_number(b) for b in act.breakpoints) or "none"),
        ("output range", f"[{format_number(pr.output_range[0])}, {format_number(pr.output_range[1])}]"),
        ("monotonic", pr.monotonic), ("value at 0", pr.value_at_zero), ("parity", pr.parity),
        ("smoothness", pr.smoothness), ("P(dead unit) at q = 1", pr.dead_unit_probability),
        ("vanishing-gradient tails", ", ".join(pr.vanishing_gradient_tails) or "none"),
        ("forward gain", g.forward), ("backward gain", g.backward),
        ("common gain", g.common_gain),
    ]
    out.write(format_pairs(pairs) + "\n")
    for note in g.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK


def register(sub: Any) -> None:
    """Add the activations and show subcommands to ``sub`` (an argparse subparsers object)."""
    p = sub.add_parser("activations", help="list built-in activations with properties and gains")
    with_json(p)
    p.set_defaults(func=_cmd_activations)

    p = sub.add_parser("show", help="one activation: properties, gains, breakpoints")
    with_act(p)
    with_json(p)
    p.set_defaults(func=_cmd_show)
