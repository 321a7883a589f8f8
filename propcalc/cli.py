"""The ``propcalc`` command.

Subcommands::

    propcalc activations              list the built-ins with properties and gains
    propcalc show ACT                 one activation: properties, gains, breakpoints
    propcalc report ACT -w W -b B     propagation report at (sigma_w2, sigma_b2)
    propcalc edge ACT                 the edge-of-chaos line (over q*, or at a fixed sigma_b2)
    propcalc plan ACT --depth L       per-layer initialisation plan
    propcalc demo                     the built-in demo scenario

``ACT`` is a built-in name or a formula in x (quote it); named parameters go
with ``--param name=value``. Human-readable tables by default, ``--json`` for
machines (the fields of the results' ``to_dict()``). Errors are one line on
stderr; exit status 2 for usage errors, 1 for computation failures.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections.abc import Sequence
from typing import Any, NoReturn, TextIO

from . import (
    ComputationError,
    Layer,
    PropcalcError,
    activation,
    builtin_names,
    edge_of_chaos_at_bias,
    edge_of_chaos_line,
    gains,
    jsonable,
    propagation,
    recommend,
)

__all__ = ["main", "build_parser", "format_table", "format_number"]

EXIT_OK, EXIT_COMPUTATION, EXIT_USAGE = 0, 1, 2


class UsageError(Exception):
    """Bad command-line input (exit status 2)."""


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> NoReturn:  # one line, exit 2
        raise UsageError(message)


# ------------------------------------------------------------------------------------------
# formatting
# ------------------------------------------------------------------------------------------
def format_number(value: Any, digits: int = 6) -> str:
    """A number for a human table: ``inf``, ``-``, or ``digits`` significant figures."""
    if value is None:
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return f"{value:.{digits}g}"
    return str(value)


def format_table(rows: Sequence[Sequence[Any]], header: Sequence[str]) -> str:
    """Left-aligned text columns with a rule under the header."""
    cells = [[str(h) for h in header]] + [[format_number(v) for v in row] for row in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(header))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in cells]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def _pairs(pairs: Sequence[tuple[str, Any]]) -> str:
    width = max(len(k) for k, _ in pairs)
    return "\n".join(f"{k.ljust(width)}  {format_number(v)}" for k, v in pairs)


def _emit_json(obj: Any, out: TextIO) -> None:
    out.write(json.dumps(jsonable(obj), indent=2, allow_nan=False) + "\n")


# ------------------------------------------------------------------------------------------
# argument helpers
# ------------------------------------------------------------------------------------------
def _params(items: Sequence[str] | None) -> dict[str, float]:
    out: dict[str, float] = {}
    for item in items or ():
        name, sep, text = item.partition("=")
        if not sep or not name.strip():
            raise UsageError(f"--param must look like name=value, got {item!r}")
        try:
            value = float(text)
        except ValueError:
            raise UsageError(f"--param {name.strip()} must be a number, got {text!r}") from None
        if not math.isfinite(value):
            raise UsageError(f"--param {name.strip()} must be finite, got {text!r}")
        out[name.strip()] = value
    return out


def _float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a number, got {text!r}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"must be finite, got {text!r}")
    return value


def _int_list(text: str) -> list[int]:
    try:
        values = [int(t) for t in text.replace(" ", "").split(",") if t]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"must be comma-separated integers like 784,512,10, got {text!r}") from None
    return values


def _float_list(text: str) -> list[float]:
    try:
        values = [float(t) for t in text.replace(" ", "").split(",") if t]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"must be comma-separated numbers like 0.5,1,2, got {text!r}") from None
    return values


def _conv_layer(spec: str) -> Layer:
    """``IN:OUT:KERNEL`` with KERNEL like ``3x3``, ``5`` (1-D) or ``3x3x3``."""
    parts = spec.split(":")
    try:
        if len(parts) != 3:
            raise ValueError
        cin, cout = int(parts[0]), int(parts[1])
        kernel = tuple(int(k) for k in parts[2].lower().split("x"))
    except ValueError:
        raise UsageError(f"--conv must look like IN:OUT:KERNEL, e.g. 64:128:3x3, got {spec!r}") from None
    return Layer.conv(cin, cout, kernel)


def _act(args: argparse.Namespace) -> Any:
    return activation(args.activation, **_params(args.param))


# ------------------------------------------------------------------------------------------
# subcommands
# ------------------------------------------------------------------------------------------
def _cmd_activations(args: argparse.Namespace, out: TextIO) -> int:
    items = []
    for name in builtin_names():
        act = activation(name)
        items.append({**act.to_dict(), "gains": gains(act).to_dict()})
    if args.json:
        _emit_json(items, out)
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
    act = _act(args)
    g = gains(act)
    data = {**act.to_dict(), "gains": g.to_dict()}
    if args.json:
        _emit_json(data, out)
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
    out.write(_pairs(pairs) + "\n")
    for note in g.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK


def _cmd_report(args: argparse.Namespace, out: TextIO) -> int:
    act = _act(args)
    p = propagation(act, args.sigma_w2, args.sigma_b2, depth=args.depth, q_input=args.q_input)
    if args.json:
        _emit_json(p.to_dict(), out)
        return EXIT_OK
    pairs = [
        ("activation", p.activation), ("sigma_w2", p.sigma_w2), ("sigma_b2", p.sigma_b2),
        ("variance", p.status), ("q*", p.q_star), ("chi_q", p.chi_q), ("xi_q", p.xi_q),
        ("chi_1", p.chi_1), ("c*", p.c_star), ("chi_c", p.chi_c), ("xi_c", p.xi_c),
        ("phase", p.phase), ("trainable depth (6 xi_c)", p.trainable_depth),
    ]
    if p.depth is not None:
        pairs += [("depth", p.depth), ("gradient growth chi_1^L", p.gradient_growth)]
    out.write(_pairs(pairs) + "\n")
    fps = p.variance_fixed_points.points
    if len(fps) > 1:
        out.write("\nfixed points of the variance map:\n")
        out.write(format_table([[fp.q, fp.chi_q, fp.stable] for fp in fps],
                               ["q*", "chi_q", "attracting"]) + "\n")
    for note in p.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK


def _cmd_edge(args: argparse.Namespace, out: TextIO) -> int:
    act = _act(args)
    if args.sigma_b2 is not None:
        points = edge_of_chaos_at_bias(act, args.sigma_b2)
    else:
        qs = args.q_star or [0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0]
        points = edge_of_chaos_line(act, qs)
    if args.json:
        _emit_json([p.to_dict() for p in points], out)
        return EXIT_OK
    if not points:
        out.write(f"no edge-of-chaos point of {act.label} has sigma_b2 = {args.sigma_b2:g}\n")
        return EXIT_OK
    rows = [[p.q_star, p.sigma_w2, p.sigma_b2, p.chi_q,
             ("yes" if p.stable else "no") if p.valid else "-",
             "" if p.valid else p.message] for p in points]
    out.write(format_table(rows, ["q*", "sigma_w2", "sigma_b2", "chi_q", "attracting", "note"]) + "\n")
    return EXIT_OK


def _cmd_plan(args: argparse.Namespace, out: TextIO) -> int:
    act = _act(args)
    layers = [_conv_layer(spec) for spec in args.conv] if args.conv else None
    plan = recommend(act, args.depth, widths=args.widths, layers=layers,
                     distribution=args.distribution, target=args.target,
                     sigma_b2=args.sigma_b2, q_star=args.q_star, q_input=args.q_input)
    if args.json:
        _emit_json(plan.to_dict(), out)
        return EXIT_OK
    pr = plan.propagation
    out.write(_pairs([
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
    out.write(format_table(_compress(rows), ["layer", "kind", "fan_in", "fan_out", "sigma_w2",
                                             "gain", label[plan.distribution], "bias std"]) + "\n\n")
    out.write(f"verdict: {plan.verdict}\n")
    for note in plan.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK


def _compress(rows: list[list[Any]]) -> list[list[Any]]:
    """Merge runs of identical layers into one row 'a-b' (the table stays short)."""
    out: list[list[Any]] = []
    for row in rows:
        if out and out[-1][1:] == row[1:]:
            first = str(out[-1][0]).split("-")[0]
            out[-1][0] = f"{first}-{row[0]}"
        else:
            out.append(list(row))
    return out


def _cmd_demo(args: argparse.Namespace, out: TextIO) -> int:
    from .demo import run

    return run(out=out, as_json=args.json)


def _cmd_serve(args: argparse.Namespace, out: TextIO) -> int:
    """Run the HTTP service on werkzeug's development server (local use; gunicorn in production)."""
    try:
        from propcalc_api import create_app  # lazily: the service extra is optional
    except ImportError as exc:
        missing = exc.name or str(exc)
        raise UsageError(f"the HTTP service needs the 'service' extra ({missing} is not "
                         "installed): pip install 'propcalc[service]'") from None
    if not 0 <= args.port <= 65535:
        raise UsageError(f"--port must be in [0, 65535], got {args.port}")
    try:
        app = create_app()
    except ValueError as exc:  # a bad PROPCALC_* setting
        raise UsageError(str(exc)) from None
    out.write(f"propcalc service on http://{args.host}:{args.port}/ (development server, one "
              "request at a time; for production use gunicorn, see docs/service.md). "
              "Ctrl-C stops it.\n")
    out.flush()
    app.run(host=args.host, port=args.port, threaded=False, use_reloader=False, debug=False)
    return EXIT_OK


# ------------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for documentation and tests)."""
    parser = _Parser(prog="propcalc", description=(
        "Mean-field signal propagation for deep random networks: gains, fixed points, "
        "edge of chaos, depth limits and initialisation plans. Infinite-width predictions "
        "at initialisation: check them on your own model."))
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    def with_act(p: argparse.ArgumentParser) -> None:
        p.add_argument("activation", help="built-in name or a formula in x, e.g. 'x * tanh(softplus(x))'")
        p.add_argument("--param", action="append", metavar="NAME=VALUE",
                       help="named parameter of the activation (repeatable), e.g. slope=0.1")

    def with_json(p: argparse.ArgumentParser) -> None:
        p.add_argument("--json", action="store_true", help="machine-readable output")

    p = sub.add_parser("activations", help="list built-in activations with properties and gains")
    with_json(p)
    p.set_defaults(func=_cmd_activations)

    p = sub.add_parser("show", help="one activation: properties, gains, breakpoints")
    with_act(p)
    with_json(p)
    p.set_defaults(func=_cmd_show)

    p = sub.add_parser("report", help="propagation report at one (sigma_w2, sigma_b2)")
    with_act(p)
    p.add_argument("-w", "--sigma-w2", type=_float, required=True, help="weight variance x fan_in")
    p.add_argument("-b", "--sigma-b2", type=_float, default=0.0, help="bias variance (default 0)")
    p.add_argument("--depth", type=int, help="number of layers, for chi_1^L")
    p.add_argument("--q-input", type=_float, default=1.0, help="mean square of the inputs (default 1)")
    with_json(p)
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("edge", help="the edge-of-chaos line")
    with_act(p)
    p.add_argument("--q-star", type=_float_list, help="comma-separated q* values to sample")
    p.add_argument("--sigma-b2", type=_float, help="solve for the critical sigma_w2 at this sigma_b2")
    with_json(p)
    p.set_defaults(func=_cmd_edge)

    p = sub.add_parser("plan", help="per-layer initialisation plan")
    with_act(p)
    p.add_argument("--depth", type=int, help="number of weight layers")
    p.add_argument("--widths", type=_int_list, help="layer widths d0,d1,...,dL (dense network)")
    p.add_argument("--conv", action="append", metavar="IN:OUT:KERNEL",
                   help="a convolution layer, e.g. 64:128:3x3 (2-D) or 16:32:5 (1-D); repeatable")
    p.add_argument("--distribution", default="normal",
                   choices=["normal", "uniform", "truncated_normal", "orthogonal"])
    p.add_argument("--target", default="auto", choices=["auto", "edge", "variance", "bias"])
    p.add_argument("--sigma-b2", type=_float, help="fix the bias variance (target 'bias')")
    p.add_argument("--q-star", type=_float, help="preferred variance fixed point on the edge")
    p.add_argument("--q-input", type=_float, default=1.0, help="mean square of the inputs (default 1)")
    with_json(p)
    p.set_defaults(func=_cmd_plan)

    p = sub.add_parser("demo", help="run the built-in demo scenario")
    with_json(p)
    p.set_defaults(func=_cmd_demo)

    p = sub.add_parser("serve", help="run the HTTP service locally (development server)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8000, help="port (default 8000)")
    p.set_defaults(func=_cmd_serve)
    return parser


def main(argv: Sequence[str] | None = None, out: TextIO | None = None,
         err: TextIO | None = None) -> int:
    """Run the command line; returns the exit status."""
    out = sys.stdout if out is None else out
    err = sys.stderr if err is None else err
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
        return int(args.func(args, out))
    except UsageError as exc:
        err.write(f"propcalc: error: {exc}\n")
        return EXIT_USAGE
    except ComputationError as exc:
        err.write(f"propcalc: computation failed: {exc}\n")
        return EXIT_COMPUTATION
    except PropcalcError as exc:  # bad parameters, unknown activations, refused formulas
        err.write(f"propcalc: error: {exc}\n")
        return EXIT_USAGE


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
