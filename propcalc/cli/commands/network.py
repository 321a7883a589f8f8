"""``propcalc network FILE``: a described network, position by position, its summary and its plan.

The file (or ``-`` for stdin) holds a network description in propcalc's blocks format
(docs/networks.md). The command prints the per-position table of
:func:`propcalc.network_propagation` (q, c and the gradient), the findings of its summary, the
verdict of :func:`propcalc.network_verdict` and the initialisation plan of
:func:`propcalc.network_plan`; ``--json`` writes the results' dict forms; ``--check`` adds
seeded finite-width networks of the description compared with the prediction at every position
(:func:`propcalc.simulate`); ``--plot`` draws q, c and the gradient against depth
(:func:`propcalc.output.network_plot.plot_network`).
"""

from __future__ import annotations

import argparse
import importlib
import json
import sys
from typing import Any, TextIO

from ... import (
    NetworkDescriptionError,
    PropcalcError,
    network,
    network_plan,
    network_propagation,
    network_verdict,
    simulate_network,
)
from ..options import (
    EXIT_OK,
    UsageError,
    finite_float,
    int_list,
    refuse_loss_options,
    with_json,
    with_plot,
)
from ..output import (
    emit_json,
    format_number,
    format_pairs,
    format_table,
    plus_minus,
    verdict_table,
)
from ..pictures import start_plot, write_plot

__all__ = ["DEFAULT_ROWS", "MAX_FILE_BYTES", "read_description", "register"]

#: The largest description file read (a description at the engine's limit of 10,000 block
#: objects is about 2 MB of JSON).
MAX_FILE_BYTES = 16 * 1024 * 1024
#: Defaults of the --check options (given without --check, they are refused).
_CHECK_DEFAULTS = {"grid": None, "repetitions": 8, "inputs": 4, "tolerance": 0.05}
#: Rows of the per-position table unless ``--rows`` says otherwise.
DEFAULT_ROWS = 60


def _no_constants(token: str) -> Any:
    raise ValueError(f"{token} is not a JSON number (write a finite number)")


def read_description(path: str) -> Any:
    """The parsed JSON of ``path`` (``-``: standard input), or a one-line UsageError.

    The file is read up to :data:`MAX_FILE_BYTES`; NaN and infinities are refused (strict
    JSON); a file nested too deeply for the parser is refused.
    """
    name = "standard input" if path == "-" else path
    try:
        if path == "-":
            stream = getattr(sys.stdin, "buffer", sys.stdin)  # bytes when there is a buffer
            raw = stream.read(MAX_FILE_BYTES + 1)
        else:
            with open(path, "rb") as fh:
                raw = fh.read(MAX_FILE_BYTES + 1)
    except FileNotFoundError:
        raise UsageError(f"{name}: no such file") from None
    except IsADirectoryError:
        raise UsageError(f"{name}: is a directory, not a description file") from None
    except OSError as exc:
        raise UsageError(f"{name}: cannot read it: {exc.strerror or exc}") from None
    if len(raw) > MAX_FILE_BYTES:
        raise UsageError(f"{name}: larger than {MAX_FILE_BYTES // (1024 * 1024)} MB; a network "
                         "description is far smaller (use repeat blocks)")
    if isinstance(raw, bytes):
        try:
            raw = raw.decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            raise UsageError(f"{name}: not UTF-8 text (byte {exc.start})") from None
    if not raw.strip():
        raise UsageError(f"{name}: empty; expected a JSON description like "
                         '{"blocks": [{"dense": {"sigma_w2": 2, "sigma_b2": 0}}, '
                         '{"activation": "relu"}]}')
    try:
        return json.loads(raw, parse_constant=_no_constants)
    except json.JSONDecodeError as exc:
        raise UsageError(f"{name}: not valid JSON: {exc.msg} at line {exc.lineno} column "
                         f"{exc.colno}") from None
    except ValueError as exc:
        raise UsageError(f"{name}: not valid JSON: {exc}") from None
    except RecursionError:
        raise UsageError(f"{name}: nested too deeply to read (the description allows 16 "
                         "levels of residual/repeat nesting)") from None


def _flags(result: Any) -> dict[int, list[str]]:
    """Short words for the table's last column, at the positions the summary names."""
    s = result.summary
    out: dict[int, list[str]] = {}

    def add(i: int | None, word: str) -> None:
        if i is not None:
            out.setdefault(i, []).append(word)

    add(s.indistinguishable_at, "inputs merge")
    add(s.decorrelated_at, "inputs uncorrelated")
    if s.gradient_input is not None:
        add(s.gradient_beyond_at, f"gradient beyond {s.gradient_factor:g}x below")
    for f in s.findings:
        if f.topic == "attention":
            add(f.position, "tokens collapse")
    n = len(result.q) - 1
    if result.gaussian_positions < n:
        add(result.gaussian_positions + 1, "not Gaussian from here")
    return out


def _positions(n: int, rows: int | None, keep: set[int]) -> list[int]:
    """Positions 0..n, thinned to about ``rows`` evenly spaced ones plus ``keep``."""
    if rows is None or n + 1 <= rows:
        return list(range(n + 1))
    step = max(1, -(-n // max(rows - 1, 1)))
    chosen = set(range(0, n + 1, step)) | {0, n} | {i for i in keep if 0 <= i <= n}
    return sorted(chosen)


def _cell(result: Any, i: int, name: str) -> Any:
    value = getattr(result, name)[i]
    sim = result.simulation
    if value is None or sim is None or i <= result.gaussian_positions:
        return value
    p = sim.positions[i]
    return plus_minus(value, getattr(p, f"{name}_se"))


def _table(result: Any, rows: int | None) -> tuple[str, str]:
    flags = _flags(result)
    n = len(result.q) - 1
    shown = _positions(n, rows, set(flags))
    lines = []
    for i in shown:
        if i == 0:
            kind, where, source = "input", "-", "-"
        else:
            rec = result.blocks[i - 1]
            copy = f" #{'.'.join(str(x) for x in rec.copy)}" if rec.copy else ""
            kind, where, source = rec.kind, f"{rec.path}{copy}", rec.source
            if result.q[i] is None and result.c[i] is None:
                source = "no number"
        lines.append([i, kind, where, _cell(result, i, "q"), _cell(result, i, "c"),
                      _cell(result, i, "gradient"), source, "; ".join(flags.get(i, []))])
    text = format_table(lines, ["position", "block", "path (#copy)", "q", "c", "gradient",
                                "from", "summary"])
    note = ""
    if len(shown) < n + 1:
        note = (f"({len(shown)} of {n + 1} positions shown: evenly spaced, the first, the last "
                "and those the summary names; --rows all prints every one)\n")
    return text, note


def _summary_lines(summary: Any) -> list[str]:
    out = []
    for f in summary.findings:
        out.append(f"- {f.message}")
        if f.advice:
            out.append(f"  change: {f.advice}")
    if not summary.findings:
        out.append(f"- nothing flagged (thresholds: inputs merge at 1 - c <= "
                   f"{summary.distance:g}, lose their correlation at |c| <= "
                   f"{summary.decorrelated:g}; gradients beyond {summary.gradient_factor:g}x, "
                   f"the signal beyond {summary.signal_factor:g}x)")
    return out


def _plan_text(plan: Any, out: TextIO) -> None:
    rows = [[b.path, b.copies, b.kind, b.sigma_w2, b.sigma_b2, b.weights, b.weight_std, b.rule]
            for b in plan.blocks]
    if rows:
        out.write(format_table(rows, ["block", "copies", "kind", "sigma_w2", "sigma_b2",
                                      "weights", "weight std", "rule"]) + "\n")
    else:
        out.write("no dense or convolution blocks to plan\n")
    if plan.branch_weight is not None and plan.branch_weight.weight is not None:
        out.write(f"residual branch weight  {format_number(plan.branch_weight.weight)}\n")
    pairs = [("planned: output c", plan.output_c),
             ("planned: input gradient / output", plan.input_gradient)]
    if plan.loss is not None:
        pairs += [("planned: learning-rate ceiling", plan.learning_rate_ceiling
                   if plan.learning_rate_note is None else "not computed (note below)"),
                  ("planned: learning rate", plan.learning_rate),
                  ("planned: output layer", plan.output_layer)]
    out.write(format_pairs(pairs) + "\n")
    out.writelines(f"  {line}\n" for line in _summary_lines(plan.summary))
    out.writelines(f"note: {note}\n" for note in plan.notes)


def _check_text(sim: Any, rows: int | None, out: TextIO) -> None:
    """The finite-width check: measured (mean +- 2 SE) against predicted at every position."""
    out.write(f"\nfinite-width check ({sim.repetitions} seeded networks, width {sim.width} where "
              f"the description gives none, {sim.inputs} inputs, positions {sim.grid}, seed "
              f"{sim.seed}):\n")
    n = len(sim.positions) - 1
    table = []
    for i in _positions(n, rows, set(sim.mismatches)):
        p = sim.positions[i]
        table.append([i, p.q_predicted, plus_minus(p.q, p.q_se), p.c_predicted,
                      plus_minus(p.c, p.c_se), p.gradient_predicted,
                      plus_minus(p.gradient, p.gradient_se), p.q_in_band, p.c_in_band,
                      p.gradient_in_band])
    out.write(format_table(table, ["position", "q predicted", "q measured", "c predicted",
                                   "c measured", "gradient predicted", "gradient measured",
                                   "q ok", "c ok", "gradient ok"]) + "\n")
    out.write(f"measured: mean +- 2 standard errors; ok: the prediction lies in that band "
              f"widened by the tolerance {sim.tolerance:g}; '-': no prediction there\n")
    if sim.mismatches:
        out.write("outside the band at positions "
                  f"{', '.join(str(i) for i in sim.mismatches)}\n")
    else:
        out.write("every prediction lies in its band\n")


def _rows(text: str) -> int | None:
    if text == "all":
        return None
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 2:
        raise argparse.ArgumentTypeError(f"must be 'all' or an integer >= 2, got {text!r}")
    return value


def _seed(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = -1
    if value < 0:
        raise argparse.ArgumentTypeError(f"must be an integer >= 0, got {text!r}")
    return value


def _cmd_network(args: argparse.Namespace, out: TextIO) -> int:
    if not args.check:
        given = [o for o in ("--grid", "--repetitions", "--inputs", "--tolerance")
                 if getattr(args, o[2:]) != _CHECK_DEFAULTS[o[2:]]]
        if given:
            raise UsageError(f"{', '.join(given)} only shape the finite-width check: give "
                             "--check too")
    if args.width is not None and args.width < 2:
        raise UsageError(f"--width must be an integer >= 2, got {args.width}")
    target = start_plot(args)
    drawer = None
    if target is not None:
        drawer = importlib.import_module("propcalc.output.network_plot")
    raw = read_description(args.file)
    name = "standard input" if args.file == "-" else args.file
    try:
        net = network(raw)
    except NetworkDescriptionError as exc:
        raise UsageError(f"{name}: {exc}") from None
    result = network_propagation(net, args.q0, args.c0, c0_within=args.c0_within,
                                 c0_between=args.c0_between, seed=args.seed,
                                 simulation_width=args.width)
    if args.loss is None:
        refuse_loss_options(args)
    elif args.batch_size is None:
        raise UsageError("--loss needs --batch-size (inputs per step): the learning-rate "
                         "ceiling depends on it")
    if args.no_plan and args.no_scale_output:
        raise UsageError("--no-scale-output only shapes the plan: drop --no-plan")
    verdict = network_verdict(result, loss=args.loss, n_classes=args.n_classes,
                              batch_size=args.batch_size, momentum=args.momentum)
    check = None
    if args.check:
        check = simulate_network(net, q0=args.q0, c0=args.c0, c0_within=args.c0_within,
                                 c0_between=args.c0_between, width=args.width, grid=args.grid,
                                 inputs=args.inputs, repetitions=args.repetitions,
                                 seed=args.seed, tolerance=args.tolerance)
    plan, plan_error = None, None
    if not args.no_plan:
        try:
            plan = network_plan(net, q0=args.q0, c0=args.c0, c0_within=args.c0_within,
                                c0_between=args.c0_between, target=args.target,
                                max_gradient=args.max_gradient, distribution=args.distribution,
                                convolution=args.convolution, loss=args.loss,
                                n_classes=args.n_classes, batch_size=args.batch_size,
                                momentum=args.momentum,
                                scale_output=not args.no_scale_output)
        except PropcalcError as exc:  # the propagation stands without it
            plan_error = str(exc)
    if args.json:
        emit_json({"propagation": result.to_dict(), "verdict": verdict.to_dict(),
                   "plan": None if plan is None else plan.to_dict(),
                   "plan_error": plan_error,
                   "check": None if check is None else check.to_dict()}, out)
    else:
        n = len(result.q) - 1
        out.write(format_pairs([
            ("network", f"{name}: {n} positions"),
            ("inputs", f"q0 = {format_number(result.q0)}, c0 = {format_number(result.c0)}"),
            ("output q", result.q[-1]), ("output c", result.c[-1]),
            ("input gradient / output", result.gradient[0]),
        ]) + "\n\n")
        table, shown = _table(result, args.rows)
        out.write(table + "\n" + shown + "\n")
        out.write("summary (infinite-width predictions at initialisation):\n")
        out.write("\n".join(_summary_lines(result.summary)) + "\n")
        out.write(f"\nverdict: {verdict}\n" + verdict_table(verdict) + "\n")
        if not args.no_plan:
            out.write("\nplan:\n")
            if plan is not None:
                _plan_text(plan, out)
            else:
                out.write(f"not available: {plan_error}\n")
        if check is not None:
            _check_text(check, args.rows, out)
    if target is not None and drawer is not None:
        fig = drawer.plot_network(result)
        write_plot(fig, target, f"q, c and the gradient against depth for {name}", args, out)
    return EXIT_OK


def register(sub: Any) -> None:
    """Add the ``network`` subcommand to ``sub`` (an argparse subparsers object)."""
    p = sub.add_parser(
        "network", help="a described network: q, c, gradient per block, summary, plan",
        description="Read a network description (JSON, propcalc's blocks format: "
                    "docs/networks.md) and print q, c and the gradient at every stream "
                    "position, what they mean, and an initialisation plan.")
    p.add_argument("file", metavar="FILE", help="the description (JSON); - reads stdin")
    p.add_argument("--q0", type=finite_float, default=1.0,
                   help="second moment per unit of the input (default 1)")
    p.add_argument("--c0", type=finite_float, default=0.0,
                   help="correlation of the two inputs (default 0)")
    p.add_argument("--c0-within", type=finite_float, default=0.0,
                   help="with pooling or attention: correlation of two positions of one input")
    p.add_argument("--c0-between", type=finite_float, default=0.0,
                   help="with pooling or attention: correlation of two positions of the two "
                        "inputs")
    p.add_argument("--seed", type=_seed, default=0,
                   help="seed of the simulation that fills positions where the Gaussian "
                        "recursion does not hold (default 0)")
    p.add_argument("--rows", type=_rows, default=DEFAULT_ROWS, metavar="N|all",
                   help=f"rows of the per-position table (default {DEFAULT_ROWS})")
    p.add_argument("--target", type=finite_float,
                   help="plan: the output correlation not to exceed for inputs at c0; sets "
                        "the residual branch weight")
    p.add_argument("--max-gradient", type=finite_float, default=10.0,
                   help="plan with --target: keep the input's gradient within this factor of "
                        "the output's (default 10)")
    p.add_argument("--distribution", default="gaussian", choices=["gaussian", "orthogonal"],
                   help="plan: dense weights (default gaussian)")
    p.add_argument("--convolution", default="gaussian",
                   choices=["gaussian", "delta_orthogonal"],
                   help="plan: convolution kernels (default gaussian)")
    p.add_argument("--loss", choices=["cross_entropy", "mse"],
                   help="verdict: the learning-rate ceiling of the described network for this "
                        "loss (needs --batch-size) and its output-layer reason; plan: the "
                        "readout scaled for the loss (a dense last block) and the planned "
                        "network's ceiling and learning rate (or why not)")
    p.add_argument("--n-classes", type=int,
                   help="with --loss: outputs K (default: the readout's width)")
    p.add_argument("--batch-size", type=int, help="with --loss: inputs per step B")
    p.add_argument("--momentum", type=finite_float, default=0.0,
                   help="with --loss: heavy-ball momentum of the ceiling (default 0)")
    p.add_argument("--no-scale-output", action="store_true",
                   help="plan with --loss: keep the readout (a dense last block) at the hidden "
                        "scale instead of scaling it for the loss")
    p.add_argument("--no-plan", action="store_true", help="skip the initialisation plan")
    p.add_argument("--check", action="store_true",
                   help="also measure seeded finite-width networks of the description and "
                        "compare every position with the prediction (propcalc.simulate)")
    p.add_argument("--width", type=int, default=None,
                   help="units per position where the description gives none, in the "
                        "simulations (default 256)")
    p.add_argument("--grid", type=int_list, metavar="N[,M...]",
                   help="--check: the input's positions (a spatial grid for convolutions and "
                        "pooling, the tokens for attention; default: the first attention "
                        "block's tokens, else 1)")
    p.add_argument("--repetitions", type=int, default=8,
                   help="--check: independent networks (default 8)")
    p.add_argument("--inputs", type=int, default=4, help="--check: inputs per batch (default 4)")
    p.add_argument("--tolerance", type=finite_float, default=0.05,
                   help="--check: practical size of a visible deviation (default 0.05)")
    with_json(p)
    with_plot(p, "q, c and the gradient against depth")
    p.set_defaults(func=_cmd_network)
