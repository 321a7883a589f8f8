"""``propcalc plan``: the per-layer initialisation plan (and, for a loss, the learning rate)."""

from __future__ import annotations

import argparse
from typing import Any, TextIO

from ... import Layer, recommend
from ..options import (
    EXIT_OK,
    UsageError,
    activation_of,
    conv_layer,
    finite_float,
    int_list,
    refuse_loss_options,
    with_act,
    with_json,
)
from ..output import (
    compress_rows,
    emit_json,
    format_number,
    format_pairs,
    format_table,
    verdict_table,
)

__all__ = ["register"]


def _cmd_plan(args: argparse.Namespace, out: TextIO) -> int:
    if args.depth is None and args.widths is None and not args.conv:
        raise UsageError("the network's size is missing: give --depth N, --widths d0,d1,...,dL "
                         "or --conv IN:OUT:KERNEL (repeatable)")
    act = activation_of(args)
    # the --conv layers describe a plain stack: their channels must chain (issue 12 section 2)
    layers = list(Layer.chain([conv_layer(spec) for spec in args.conv], "--conv")) \
        if args.conv else None
    training = {}
    if args.loss is not None:
        training = dict(loss=args.loss, n_classes=args.n_classes, batch_size=args.batch_size,
                        momentum=args.momentum, scale_output=not args.no_scale_output)
        if args.input_correlation is not None:
            training["input_correlation"] = args.input_correlation
    else:
        refuse_loss_options(args, ("--input-correlation", args.input_correlation))
    plan = recommend(act, args.depth, widths=args.widths, layers=layers,
                     distribution=args.distribution, target=args.target,
                     sigma_b2=args.sigma_b2, q_star=args.q_star, q_input=args.q_input,
                     **training)
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
    if plan.loss is not None:
        _training_text(plan, out)
    out.write(f"verdict: {plan.verdict}\n\n")
    out.write(verdict_table(plan.verdict) + "\n\n")
    for note in plan.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK


def _training_text(plan: Any, out: TextIO) -> None:
    """The loss, the output layer and the learning rates of a plan made for a loss."""
    d = plan.learning_rate_details
    pairs = [("loss", plan.loss), ("classes (outputs)", plan.n_classes),
             ("batch size", plan.batch_size), ("output layer", plan.output_layer)]
    if d is not None:
        pairs += [("optimiser", f"{d.optimiser} (momentum {format_number(d.momentum)})"),
                  ("top curvature lambda_max", d.lambda_max),
                  ("learning-rate ceiling", f"{format_number(plan.learning_rate_ceiling)}  "
                                            "(2 (1 + momentum) / lambda_max)"),
                  ("learning rate", f"{format_number(plan.learning_rate)}  "
                                    f"({d.learning_rate_rule})"),
                  ("catapult limit", f"{format_number(d.catapult_limit)}  (about 4 / "
                                     "lambda_max, Lewkowycz et al. 2020)")]
    out.write(format_pairs(pairs) + "\n")
    for note in (d.notes if d is not None else ()):
        out.write(f"note: {note}\n")
    out.write("\n")


def register(sub: Any) -> None:
    """Add the plan subcommands to ``sub`` (an argparse subparsers object)."""
    p = sub.add_parser("plan", help="per-layer initialisation plan")
    with_act(p)
    p.add_argument("--depth", type=int, help="number of weight layers")
    p.add_argument("--widths", type=int_list, help="layer widths d0,d1,...,dL (dense network)")
    p.add_argument("--conv", action="append", metavar="IN:OUT:KERNEL",
                   help="a convolution layer, e.g. 64:128:3x3 (2-D) or 16:32:5 (1-D); repeatable")
    p.add_argument("--distribution", default="normal",
                   choices=["normal", "uniform", "truncated_normal", "orthogonal"],
                   help="the law the weights are drawn from; the plan gives its one scale: the "
                        "std (normal), the bound a of U(-a, a) (uniform), the std before the cut "
                        "at 2 std (truncated_normal) or the multiplier of an orthogonal matrix "
                        "(default normal)")
    p.add_argument("--target", default="auto", choices=["auto", "edge", "variance", "bias"],
                   help="what the plan aims at: edge (edge of chaos at an attracting q*, "
                        "--q-star picks it), variance (sigma_b2 = 0 and q* = 1 kept, the "
                        "forward gain), bias (edge of chaos at the --sigma-b2 given); auto "
                        "(default): bias if --sigma-b2 is given, else edge, falling back to "
                        "variance")
    p.add_argument("--sigma-b2", type=finite_float, help="fix the bias variance (target 'bias')")
    p.add_argument("--q-star", type=finite_float, help="preferred variance fixed point on the edge")
    p.add_argument("--q-input", type=finite_float, default=1.0, help="mean square of the inputs (default 1)")
    p.add_argument("--loss", choices=["cross_entropy", "mse"],
                   help="plan the learning rate for this loss (needs --widths, --batch-size; "
                        "--n-classes for cross_entropy) and scale the last layer for it")
    p.add_argument("--n-classes", type=int, help="outputs K (the last width)")
    p.add_argument("--batch-size", type=int, help="inputs per step B")
    p.add_argument("--momentum", type=finite_float, default=0.0,
                   help="heavy-ball momentum in [0, 1) (default 0)")
    p.add_argument("--input-correlation", type=finite_float,
                   help="the inputs' mean pairwise correlation (default 0)")
    p.add_argument("--no-scale-output", action="store_true",
                   help="with --loss: keep the hidden layers' scale for the last layer")
    with_json(p)
    p.set_defaults(func=_cmd_plan)
