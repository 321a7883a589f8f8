"""The ``propcalc`` command.

Subcommands::

    propcalc activations              list the built-ins with properties and gains
    propcalc show ACT                 one activation: properties, gains, breakpoints
    propcalc report ACT -w W -b B     propagation report at (sigma_w2, sigma_b2)
    propcalc edge ACT                 the edge-of-chaos line (over q*, or at a fixed sigma_b2)
    propcalc phase ACT --plot FILE    phase diagram over a sigma_w2 x sigma_b2 grid (an image)
    propcalc depth-scales ACT --plot FILE
                                      xi_q and xi_c against sigma_w2 at a fixed sigma_b2 (an
                                      image)
    propcalc plan ACT --depth L       per-layer initialisation plan
    propcalc dropout ACT -w W --keep-rate R[,R...]
                                      propagation with dropout (one keep rate: report; several:
                                      sweep)
    propcalc maxout K                 maxout networks of rank K (default sigma_w2 = c_K)
    propcalc selfnorm ACT             mean-variance fixed points and their Jacobian; alpha-dropout
                                      constants with --keep-rate
    propcalc isometry ACT --depth L   Jacobian spectrum (Gaussian vs orthogonal weights) and the
                                      isometry advice
    propcalc softmax K                initial loss and largest probability for a logit variance;
                                      the last layer's scale for a margin
    propcalc simulate ACT -w W --width N --depth L
                                      finite-width check on seeded random networks
    propcalc demo                     the built-in demo scenario
    propcalc serve                    the HTTP service on 127.0.0.1 (development server)

``ACT`` is a built-in name or a formula in x (quote it); named parameters go
with ``--param name=value``. Human-readable tables by default, ``--json`` for
machines (the fields of the results' ``to_dict()``; ``maxout`` adds ``layer``
and ``selfnorm`` adds ``alpha_dropout``, null unless asked for; ``isometry``
gives ``{"spectrum", "advice"}`` and ``softmax`` ``{"initial_loss",
"max_probability", "output_layer"}``). Errors are one line on stderr; exit
status 2 for usage errors, 1 for computation failures. ``-h`` writes the
help to the output stream and returns 0.

Pictures (the ``plot`` extra, matplotlib: ``pip install "propcalc[plot]"``):
``--plot FILE`` writes a PNG or SVG image, the format taken from the
extension (``.png`` or ``.svg``), and prints one line saying where it went
(on stderr with ``--json``, so that stdout stays one JSON document). It is
required by ``phase`` and ``depth-scales`` and optional on

* ``report``: the phase diagram around the point, the point marked (and with
  ``--depth`` the contour 6 xi_c = depth in bold); ``--plot-kind`` picks the
  variance map, the correlation map or the depth scales of the point instead;
* ``edge``: the phase diagram with the edge-of-chaos line (with
  ``--sigma-b2``, the first critical point marked), over the window of
  ``--sigma-w2-range`` / ``--sigma-b2-range`` / ``--grid``.

Sweeps of many grid points show a progress bar on stderr when it is a
terminal (tqdm, the ``sweep`` extra).
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import json
import math
import os
import sys
from collections.abc import Sequence
from types import ModuleType
from typing import Any, NoReturn, TextIO

from .. import (
    ComputationError,
    Layer,
    PropcalcError,
    activation,
    alpha_dropout,
    builtin_names,
    dropout_propagation,
    dropout_sweep,
    dynamical_isometry,
    edge_of_chaos_at_bias,
    edge_of_chaos_line,
    gains,
    initial_loss,
    jacobian_spectrum,
    jsonable,
    max_class_probability,
    maxout_layer,
    maxout_propagation,
    output_layer_scale,
    propagation,
    recommend,
    self_normalization,
    simulate,
)

__all__ = ["main", "build_parser", "format_table", "format_number", "SIMULATION_LIMITS",
           "PLOT_EXTENSIONS"]

EXIT_OK, EXIT_COMPUTATION, EXIT_USAGE = 0, 1, 2

#: bounds of ``propcalc simulate`` (checked before anything runs): width, depth, repetitions,
#: input pairs, and width^2 x depth x repetitions (weights drawn; about 10 s of one core at the
#: limit, and a weight matrix of at most 134 MB)
SIMULATION_LIMITS = {"width": 4096, "depth": 1000, "repetitions": 1000, "pairs": 256,
                     "size": 500_000_000}
#: draws times classes of the Monte Carlo estimate of E[max p] (the engine's bound in
#: propcalc.output_layer); the default number of draws is 100000 or 5e7 / K if smaller
_MC_MAX_ELEMENTS = 50_000_000
_MC_DEFAULT_SAMPLES = 100_000
#: smallest input mean square of ``propcalc dropout`` (the service's range too)
_DROPOUT_Q_INPUT_MIN = 1e-12
#: ``--margin`` given without a value: the engine's default margin (1% of ln K)
_DEFAULT_MARGIN = object()
#: the empirical rule behind every trainable depth
_SIX_XI_C = "trainable depth: about 6 xi_c layers (empirical rule of Schoenholz et al. 2017)"
#: image formats of --plot, by file extension
PLOT_EXTENSIONS = {".png": "png", ".svg": "svg"}
#: figures ``report --plot`` can draw
_REPORT_PLOTS = ("phase-diagram", "variance-map", "correlation-map", "depth-scales")
#: bounds of --grid (per axis) and of depth-scales --points (those of propcalc.plots)
_GRID_BOUNDS = (3, 2000)
_POINTS_BOUNDS = (5, 20_000)


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


def _finite_list(text: str) -> list[float]:
    """Comma-separated finite numbers (at least one)."""
    values = []
    for t in text.replace(" ", "").split(","):
        if not t:
            continue
        try:
            v = float(t)
        except ValueError:
            raise argparse.ArgumentTypeError(
                f"must be comma-separated numbers like 0.5,1,2, got {text!r}") from None
        if not math.isfinite(v):
            raise argparse.ArgumentTypeError(f"must be finite numbers, got {t!r}")
        values.append(v)
    if not values:
        raise argparse.ArgumentTypeError(f"must be at least one number like 0.5,1,2, got {text!r}")
    return values


def _pair(text: str) -> tuple[float, float]:
    """Two finite numbers 'A,B'."""
    try:
        values = _finite_list(text)
    except argparse.ArgumentTypeError:
        values = []
    if len(values) != 2:
        raise argparse.ArgumentTypeError(f"must be two numbers A,B, got {text!r}")
    return values[0], values[1]


def _window(low: str) -> Any:
    """An argparse type: 'LO,HI' with LO > 0 (low = '0 <') or LO >= 0 (low = '0 <='), LO < HI."""
    def parse(text: str) -> tuple[float, float]:
        try:
            lo, hi = _pair(text)
        except argparse.ArgumentTypeError:
            lo = hi = math.nan
        if not (lo < hi and (lo > 0 if low == "0 <" else lo >= 0)):
            raise argparse.ArgumentTypeError(f"must be LO,HI with {low} LO < HI, got {text!r}")
        return lo, hi

    return parse


def _grid(text: str) -> tuple[int, int]:
    """'N' (N x N points) or 'NW,NB', each in [3, 2000]."""
    parts = text.replace(" ", "").split(",")
    lo, hi = _GRID_BOUNDS
    try:
        values = [int(t) for t in parts]
    except ValueError:
        values = []
    if len(values) not in (1, 2) or not all(lo <= v <= hi for v in values):
        raise argparse.ArgumentTypeError(
            f"must be N or NW,NB (points along sigma_w2 and sigma_b2), each in [{lo}, {hi}], "
            f"got {text!r}")
    return (values[0], values[-1])


def _point(text: str) -> tuple[float, float]:
    """'W,B': sigma_w2 > 0 and sigma_b2 >= 0."""
    try:
        w, b = _pair(text)
    except argparse.ArgumentTypeError:
        w = b = math.nan
    if not (w > 0 and b >= 0):
        raise argparse.ArgumentTypeError(
            f"must be W,B (sigma_w2, sigma_b2) with W > 0 and B >= 0, got {text!r}")
    return w, b


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
# pictures
# ------------------------------------------------------------------------------------------
def _plot_target(path: str) -> tuple[str, str]:
    """The file and format of ``--plot FILE``, checked before any work is done."""
    fmt = PLOT_EXTENSIONS.get(os.path.splitext(path)[1].lower())
    if fmt is None:
        raise UsageError(f"--plot FILE must end in {' or '.join(PLOT_EXTENSIONS)} (the image "
                         f"format comes from the extension), got {path!r}")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise UsageError(f"--plot {path}: the directory {folder} does not exist")
    return path, fmt


def _plots_module() -> ModuleType:
    """:mod:`propcalc.plots`, or a usage error when matplotlib (the plot extra) is missing."""
    try:
        return importlib.import_module("propcalc.output.plots")
    except ImportError:
        raise UsageError('--plot needs matplotlib, which is not installed: '
                         'pip install "propcalc[plot]"') from None


def _start_plot(args: argparse.Namespace) -> tuple[str, str, ModuleType] | None:
    """(path, format, propcalc.plots) when --plot is given, checked up front; else None."""
    if getattr(args, "plot", None) is None:
        return None
    path, fmt = _plot_target(args.plot)
    return path, fmt, _plots_module()


def _write_plot(fig: Any, target: tuple[str, str, ModuleType], what: str,
                args: argparse.Namespace, out: TextIO) -> None:
    """Render the figure, write the file and say where it went (one line)."""
    path, fmt, plots = target
    data = plots.save_figure(fig, None, fmt)
    try:
        with open(path, "wb") as fh:
            fh.write(data)
    except OSError as exc:
        raise UsageError(f"--plot {path}: cannot write the file: {exc.strerror or exc}") from None
    stream = args.err if getattr(args, "json", False) else out
    stream.write(f"wrote {what} to {path} ({fmt.upper()}, {len(data)} bytes)\n")


def _needs_plot(args: argparse.Namespace, *options: str) -> None:
    """Refuse window options given without --plot."""
    if args.plot is None:
        given = [o for o in options if getattr(args, o.lstrip("-").replace("-", "_")) is not None]
        if given:
            raise UsageError(f"{', '.join(given)} only shape the picture: give --plot FILE too")


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
    _needs_plot(args, "--plot-kind")
    target = _start_plot(args)
    act = _act(args)
    p = propagation(act, args.sigma_w2, args.sigma_b2, depth=args.depth, q_input=args.q_input)
    if args.json:
        _emit_json(p.to_dict(), out)
        if target is not None:
            _report_plot(act, p, args, target, out)
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
    if target is not None:
        _report_plot(act, p, args, target, out)
    return EXIT_OK


def _report_plot(act: Any, p: Any, args: argparse.Namespace,
                 target: tuple[str, str, ModuleType], out: TextIO) -> None:
    plots = target[2]
    kind = args.plot_kind or "phase-diagram"
    at = (f"{act.label} at sigma_w2 = {format_number(p.sigma_w2)}, sigma_b2 = "
          f"{format_number(p.sigma_b2)}")
    if kind == "phase-diagram":
        fig = plots.plot_phase_diagram(act, p, depth=args.depth, q_input=args.q_input,
                                       progress=None)
        what = (f"the phase diagram of {act.label} with the point "
                f"({format_number(p.sigma_w2)}, {format_number(p.sigma_b2)})")
    elif kind == "variance-map":
        fig = plots.plot_variance_map(act, p, q_input=args.q_input)
        what = f"the variance map of {at}"
    elif kind == "correlation-map":
        fig = plots.plot_correlation_map(act, p, q_input=args.q_input)
        what = f"the correlation map of {at}"
    else:
        fig = plots.plot_depth_scales(act, p, depth=args.depth, q_input=args.q_input,
                                      progress=None)
        what = f"the depth scales of {act.label} at sigma_b2 = {format_number(p.sigma_b2)}"
    _write_plot(fig, target, what, args, out)


def _cmd_edge(args: argparse.Namespace, out: TextIO) -> int:
    _needs_plot(args, "--sigma-w2-range", "--sigma-b2-range", "--grid")
    target = _start_plot(args)
    act = _act(args)
    if args.sigma_b2 is not None:
        points = edge_of_chaos_at_bias(act, args.sigma_b2)
    else:
        qs = args.q_star or [0.01, 0.03, 0.1, 0.3, 1.0, 3.0, 10.0, 30.0, 100.0]
        points = edge_of_chaos_line(act, qs)
    if args.json:
        _emit_json([p.to_dict() for p in points], out)
    elif not points:
        out.write(f"no edge-of-chaos point of {act.label} has sigma_b2 = {args.sigma_b2:g}\n")
    else:
        rows = [[p.q_star, p.sigma_w2, p.sigma_b2, p.chi_q,
                 ("yes" if p.stable else "no") if p.valid else "-",
                 "" if p.valid else p.message] for p in points]
        out.write(format_table(rows, ["q*", "sigma_w2", "sigma_b2", "chi_q", "attracting",
                                      "note"]) + "\n")
    if target is not None:
        _edge_plot(act, points, args, target, out)
    return EXIT_OK


def _edge_plot(act: Any, points: Sequence[Any], args: argparse.Namespace,
               target: tuple[str, str, ModuleType], out: TextIO) -> None:
    plots = target[2]
    valid = [p for p in points if p.valid and p.sigma_w2 is not None and p.sigma_b2 is not None]
    marked = valid[0] if args.sigma_b2 is not None and valid else None
    fig = plots.plot_phase_diagram(act, marked, sigma_w2_range=args.sigma_w2_range,
                                   sigma_b2_range=args.sigma_b2_range,
                                   **({} if args.grid is None else {"n_grid": args.grid}),
                                   progress=None)
    (x0, x1), (y0, y1) = fig.axes[0].get_xlim(), fig.axes[0].get_ylim()
    outside = [p for p in valid if not (x0 <= p.sigma_w2 <= x1 and y0 <= p.sigma_b2 <= y1)]
    if outside and not args.json:
        out.write(f"note: {len(outside)} of the {len(valid)} listed points lie outside the "
                  f"picture (sigma_w2 in [{format_number(x0, 4)}, {format_number(x1, 4)}], "
                  f"sigma_b2 in [{format_number(y0, 4)}, {format_number(y1, 4)}]); widen it "
                  "with --sigma-w2-range and --sigma-b2-range\n")
    what = f"the phase diagram of {act.label} with its edge of chaos"
    if marked is not None:
        what += (f" and the critical point ({format_number(marked.sigma_w2)}, "
                 f"{format_number(marked.sigma_b2)})")
    _write_plot(fig, target, what, args, out)


def _check_depth(depth: int | None) -> None:
    if depth is not None and depth < 1:
        raise UsageError(f"--depth must be >= 1, got {depth}")


def _cmd_phase(args: argparse.Namespace, out: TextIO) -> int:
    _check_depth(args.depth)
    target = _start_plot(args)
    assert target is not None  # --plot is required
    act = _act(args)
    plots = target[2]
    fig = plots.plot_phase_diagram(act, args.point, sigma_w2_range=args.sigma_w2_range,
                                   sigma_b2_range=args.sigma_b2_range,
                                   **({} if args.grid is None else {"n_grid": args.grid}),
                                   q_input=args.q_input, depth=args.depth, progress=None)
    what = f"the phase diagram of {act.label}"
    if args.point is not None:
        what += f" with the point ({format_number(args.point[0])}, {format_number(args.point[1])})"
    _write_plot(fig, target, what, args, out)
    return EXIT_OK


def _cmd_depth_scales(args: argparse.Namespace, out: TextIO) -> int:
    lo, hi = _POINTS_BOUNDS
    if not lo <= args.points <= hi:
        raise UsageError(f"--points must be in [{lo}, {hi}], got {args.points}")
    if args.sigma_b2 < 0:
        raise UsageError(f"--sigma-b2 must be >= 0, got {format_number(args.sigma_b2)}")
    if args.sigma_w2 is not None and args.sigma_w2 <= 0:
        raise UsageError(f"--sigma-w2 must be > 0, got {format_number(args.sigma_w2)}")
    _check_depth(args.depth)
    target = _start_plot(args)
    assert target is not None  # --plot is required
    act = _act(args)
    point = None if args.sigma_w2 is None else (args.sigma_w2, args.sigma_b2)
    fig = target[2].plot_depth_scales(act, point, sigma_b2=args.sigma_b2,
                                      sigma_w2_range=args.sigma_w2_range, n_points=args.points,
                                      depth=args.depth, q_input=args.q_input, progress=None)
    what = f"the depth scales of {act.label} at sigma_b2 = {format_number(args.sigma_b2)}"
    if point is not None:
        what += f" with the point sigma_w2 = {format_number(args.sigma_w2)}"
    _write_plot(fig, target, what, args, out)
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


# ------------------------------------------------------------------------------------------
# dropout, maxout, self-normalisation, spectra, the softmax layer, simulation
# ------------------------------------------------------------------------------------------
def _cmd_dropout(args: argparse.Namespace, out: TextIO) -> int:
    act = _act(args)
    rates = args.keep_rate
    if args.q_input < _DROPOUT_Q_INPUT_MIN:
        # zero inputs carry nothing to drop (and the engine divides by q = 0 there); the
        # service refuses the same range
        raise UsageError(f"--q-input must be >= {_DROPOUT_Q_INPUT_MIN:g} with dropout, "
                         f"got {format_number(args.q_input)}")
    if len(rates) == 1:
        rho = rates[0]
        # scale_with_keep_rate as propcalc.dropout_sweep applies it: sigma_w2 * rho
        sw = args.sigma_w2 * rho if args.scale_with_keep_rate else args.sigma_w2
        r = dropout_propagation(act, sw, args.sigma_b2, rho, depth=args.depth,
                                q_input=args.q_input)
        if args.json:
            _emit_json(r.to_dict(), out)
            return EXIT_OK
        pairs = [
            ("activation", r.activation), ("keep rate", r.keep_rate), ("sigma_w2", r.sigma_w2),
            ("sigma_b2", r.sigma_b2), ("variance", r.status), ("q*", r.q_star),
            ("chi_q", r.chi_q), ("chi_1", r.chi_1), ("c*", r.c_star), ("chi_c", r.chi_c),
            ("xi_c", r.xi_c), ("trainable depth (6 xi_c)", r.trainable_depth),
        ]
        if r.depth is not None:
            pairs += [("depth", r.depth), ("gradient growth chi_1^L", r.gradient_growth)]
        out.write(_pairs(pairs) + "\n")
        out.write(f"verdict: {r.verdict}\n")
        for note in r.notes:
            out.write(f"note: {note}\n")
        out.write(f"note: {_SIX_XI_C}\n")
        return EXIT_OK
    sweep = dropout_sweep(act, args.sigma_w2, args.sigma_b2, rates, depth=args.depth,
                          q_input=args.q_input, scale_with_keep_rate=args.scale_with_keep_rate)
    if args.json:
        _emit_json(sweep.to_dict(), out)
        return EXIT_OK
    header = ["keep rate", "sigma_w2", "variance", "q*", "chi_1", "c*", "chi_c", "xi_c",
              "trainable depth"]
    rows = []
    for r in sweep.reports:
        row = [r.keep_rate, r.sigma_w2, r.status, r.q_star, r.chi_1, r.c_star, r.chi_c, r.xi_c,
               r.trainable_depth]
        if args.depth is not None:
            row += [r.gradient_growth, r.depth_ok]
        rows.append(row)
    if args.depth is not None:
        header += ["chi_1^L", f"{args.depth} layers ok"]
    out.write(f"dropout sweep of {sweep.activation} (sigma_b2 = {format_number(args.sigma_b2)}"
              + (", sigma_w2 scaled by the keep rate" if sweep.scale_with_keep_rate else "")
              + ")\n\n")
    out.write(format_table(rows, header) + "\n\n")
    out.write("note: with dropout (keep rate < 1) c = 1 is not a fixed point: xi_c is finite and "
              "there is no edge of chaos (Schoenholz et al. 2017)\n")
    out.write(f"note: {_SIX_XI_C}\n")
    return EXIT_OK


def _cmd_maxout(args: argparse.Namespace, out: TextIO) -> int:
    if (args.fan_in is None) != (args.fan_out is None):
        raise UsageError("--fan-in and --fan-out go together (the size of one maxout layer)")
    r = maxout_propagation(args.k, args.sigma_w2, args.sigma_b2, depth=args.depth,
                           q_input=args.q_input)
    layer = (maxout_layer(args.k, args.fan_in, args.fan_out, args.sigma_w2)
             if args.fan_in is not None else None)
    if args.json:
        _emit_json({**r.to_dict(), "layer": None if layer is None else layer.to_dict()}, out)
        return EXIT_OK
    m = r.moments
    pairs = [
        ("rank k", r.k), ("E[X_k] (largest of k standard normals)", m.mean),
        ("E[X_k^2]", m.second_moment),
        ("c_k = 1 / E[X_k^2] (Tseran & Montufar 2023)", m.recommended_sigma_w2),
        ("sigma_w2", f"{format_number(r.sigma_w2)}"
         + (" (c_k)" if args.sigma_w2 is None else "")),
        ("sigma_b2", r.sigma_b2), ("variance", r.status), ("q*", r.q_star),
        ("chi_q = sigma_w2 E[X_k^2]", r.chi_q), ("growth rate", r.growth_rate),
        ("chi_1 = sigma_w2", r.chi_1), ("c*", r.c_star), ("chi_c", r.chi_c), ("xi_c", r.xi_c),
        ("phase", r.phase), ("trainable depth (6 xi_c)", r.trainable_depth),
    ]
    if r.depth is not None:
        pairs += [("depth", r.depth), ("gradient growth chi_1^L", r.gradient_growth)]
    pairs.append(("parameters per layer", f"{r.parameter_factor} x a plain layer's"))
    if layer is not None:
        pairs += [("layer fan_in x fan_out", f"{layer.fan_in} x {layer.fan_out}"),
                  ("weight std sqrt(sigma_w2 / fan_in)", layer.weight_std),
                  ("weight shape", " x ".join(str(d) for d in layer.weight_shape)),
                  ("parameters (maxout layer)", layer.n_parameters),
                  ("parameters (plain dense layer)", layer.plain_parameters)]
    out.write(_pairs(pairs) + "\n")
    out.write(f"verdict: {r.verdict}\n")
    for note in r.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK


def _cmd_selfnorm(args: argparse.Namespace, out: TextIO) -> int:
    act = _act(args)
    dropout = None
    if args.keep_rate is not None:
        if args.alpha_prime is None and act.name != "selu":
            raise UsageError("--keep-rate: alpha dropout sets dropped units to SELU's saturation "
                             f"value -lambda alpha by default; for {act.label} give --alpha-prime")
        extra = {} if args.alpha_prime is None else {"alpha_prime": args.alpha_prime}
        dropout = alpha_dropout(args.keep_rate, args.mean, args.variance, **extra)
    elif args.alpha_prime is not None or args.mean != 0.0 or args.variance != 1.0:
        raise UsageError("--alpha-prime, --mean and --variance need --keep-rate (alpha dropout)")
    r = self_normalization(act, args.omega, args.tau, args.start)
    if args.json:
        _emit_json({**r.to_dict(), "alpha_dropout": None if dropout is None
                    else dropout.to_dict()}, out)
        return EXIT_OK
    out.write(_pairs([
        ("activation", r.activation), ("omega (sum of weights)", r.omega),
        ("tau (sum of squared weights)", r.tau), ("self-normalising", r.self_normalizing),
        ("every nu a fixed point", r.neutral),
        ("nu~ / nu as nu -> 0", r.zero_rate),
    ]) + "\n\n")
    if r.fixed_points:
        out.write("fixed points (mu, nu) of (mu, nu) -> (E[phi(z)], Var[phi(z)]), "
                  "z ~ N(mu omega, nu tau):\n")
        rows = []
        for p in r.fixed_points:
            ev = ", ".join(_complex(re, im) for re, im in zip(p.eigenvalues_real,
                                                              p.eigenvalues_imag))
            rows.append([p.mu, p.nu, p.spectral_radius, p.spectral_norm, p.attracting, ev])
        out.write(format_table(rows, ["mu", "nu", "spectral radius", "spectral norm",
                                      "attracting", "eigenvalues"]) + "\n\n")
    if r.nearest is not None:
        (a, b), (c, d) = r.nearest.jacobian
        out.write(f"Jacobian at the nearest fixed point to (mu, nu) = ({format_number(args.start[0])}"
                  f", {format_number(args.start[1])}) (rows mu~, nu~; columns mu, nu):\n")
        out.write(format_table([["mu~", a, b], ["nu~", c, d]], ["", "d/d mu", "d/d nu"]) + "\n\n")
    out.write(f"{r.message}\n")
    out.write(f"method: {r.method}\n")
    if dropout is not None:
        out.write("\nalpha dropout: y = a (x d + alpha' (1 - d)) + b, d ~ Bernoulli(keep rate), "
                  "keeps the mean and variance (Klambauer et al. 2017):\n")
        out.write(_pairs([("keep rate", dropout.keep_rate), ("alpha'", dropout.alpha_prime),
                          ("a", dropout.a), ("b", dropout.b), ("mean kept", dropout.mean),
                          ("variance kept", dropout.variance)]) + "\n")
    return EXIT_OK


def _complex(re: float, im: float) -> str:
    if im == 0.0:
        return format_number(re)
    return f"{format_number(re)}{'+' if im > 0 else '-'}{format_number(abs(im))}i"


def _cmd_isometry(args: argparse.Namespace, out: TextIO) -> int:
    act = _act(args)
    spec = jacobian_spectrum(act, args.depth, args.q_star, args.sigma_w2)
    advice = dynamical_isometry(act, args.depth, args.max_variance, args.q_range)
    if args.json:
        _emit_json({"spectrum": spec.to_dict(), "advice": advice.to_dict()}, out)
        return EXIT_OK
    out.write(_pairs([
        ("activation", spec.activation), ("depth", spec.depth), ("q*", spec.q_star),
        ("sigma_w2", f"{format_number(spec.sigma_w2)}"
         + (" (edge of chaos through q*)" if args.sigma_w2 is None else "")),
        ("sigma_b2", spec.sigma_b2), ("mu_1 = E[phi'^2]", spec.mu_1),
        ("mu_2 = E[phi'^4]", spec.mu_2), ("mu_2 / mu_1^2", spec.moment_ratio),
        ("chi_1", spec.chi_1), ("mean of the J J^T spectrum (chi_1^L)", spec.mean),
    ]) + "\n\n")
    out.write("spectrum of J J^T (Pennington, Schoenholz & Ganguli 2017):\n")
    out.write(format_table([
        ["gaussian", spec.normalized_variance_gaussian, spec.variance_gaussian],
        ["orthogonal", spec.normalized_variance_orthogonal, spec.variance_orthogonal],
    ], ["weights", "variance / mean^2", "variance"]) + "\n\n")
    out.write(f"advice (target variance / mean^2 <= {format_number(advice.max_variance)}): "
              f"{advice.message}\n")
    for note in spec.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK


def _cmd_softmax(args: argparse.Namespace, out: TextIO) -> int:
    k = args.n_classes
    if args.logit_variance is None and args.margin is None:
        raise UsageError("give --logit-variance (the initial loss), --margin (the last layer's "
                         "scale), or both")
    if args.margin is None and any(v is not None for v in (
            args.fan_in, args.current_sigma_w2, args.current_sigma_b2)):
        raise UsageError("--fan-in, --current-sigma-w2 and --current-sigma-b2 need --margin")
    n = args.samples
    if n is None:
        n = max(2, min(_MC_DEFAULT_SAMPLES, _MC_MAX_ELEMENTS // max(k, 1)))
    loss = pmax = scale = None
    if args.logit_variance is not None:
        loss = initial_loss(k, args.logit_variance)
        pmax = max_class_probability(k, args.logit_variance, n, args.seed)
    if args.margin is not None:
        margin = None if args.margin is _DEFAULT_MARGIN else args.margin
        scale = output_layer_scale(k, args.second_moment, margin, args.sigma_b2, args.fan_in,
                                   args.current_sigma_w2, args.current_sigma_b2, n, args.seed)
    if args.json:
        _emit_json({"initial_loss": None if loss is None else loss.to_dict(),
                    "max_probability": None if pmax is None else pmax.to_dict(),
                    "output_layer": None if scale is None else scale.to_dict()}, out)
        return EXIT_OK
    pairs: list[tuple[str, Any]] = [("classes K", k), ("ln K", math.log(k))]
    if loss is not None and pmax is not None:
        pairs += [("logit variance s2", loss.logit_variance),
                  ("expected initial loss", loss.expected_loss), ("excess over ln K", loss.excess),
                  ("ln K + s2 (K - 1) / (2K) (small s2)", loss.small_variance_approximation),
                  ("E[max_j p_j]", _estimate(pmax.value, pmax.standard_error, pmax.method,
                                             pmax.n_samples, pmax.seed)),
                  ("1 / K (uniform predictions)", pmax.uniform)]
    out.write(_pairs(pairs) + "\n")
    if scale is not None:
        pm = scale.max_probability_at_scale
        out.write(f"\nlast layer for an initial loss within {format_number(scale.margin)} nats "
                  "of ln K:\n")
        rows: list[tuple[str, Any]] = [
            ("penultimate E[phi^2]", scale.penultimate_second_moment),
            ("sigma_b2", scale.sigma_b2), ("largest logit variance", scale.max_logit_variance),
            ("largest sigma_w2", scale.sigma_w2)]
        if scale.weight_std is not None:
            rows.append((f"weight std sqrt(sigma_w2 / {args.fan_in})", scale.weight_std))
        rows += [("expected loss there", scale.loss_at_scale.expected_loss),
                 ("E[max_j p_j] there", _estimate(pm.value, pm.standard_error, pm.method,
                                                  pm.n_samples, pm.seed))]
        if scale.current is not None:
            rows += [("loss as planned", scale.current.expected_loss),
                     ("excess as planned", scale.current.excess)]
        out.write(_pairs(rows) + "\n")
        for note in scale.notes:
            out.write(f"note: {note}\n")
    elif loss is not None:
        out.write(f"note: {loss.method}; an initial loss near ln K is common practice, "
                  "no source\n")
    return EXIT_OK


def _estimate(value: float, se: float, method: str, n: int | None, seed: int | None) -> str:
    if method == "monte carlo":
        return f"{format_number(value)} +- {format_number(se, 2)} (Monte Carlo, {n} draws, seed {seed})"
    return f"{format_number(value)} ({method})"


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
    act = _act(args)
    r = simulate(act, args.sigma_w2, args.sigma_b2, width=args.width, depth=args.depth,
                 q0=args.q0, c0=args.c0, repetitions=args.repetitions, n_pairs=args.pairs,
                 seed=args.seed, tolerance=args.tolerance)
    if args.json:
        _emit_json(r.to_dict(), out)
        return EXIT_OK
    out.write(_pairs([
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
        rows.append([m.index, m.q_predicted, _pm(m.q_mean, m.q_se), m.c_predicted,
                     _pm(m.c_mean, m.c_se), m.gradient_predicted,
                     _pm(m.gradient_mean, m.gradient_se), m.q_in_band, m.c_in_band,
                     m.gradient_in_band])
    out.write(format_table(rows, ["layer", "q predicted", "q measured", "c predicted",
                                  "c measured", "|g|^2 predicted", "|g|^2 measured", "q ok",
                                  "c ok", "|g|^2 ok"]) + "\n")
    if len(shown) < r.depth + 1:
        out.write(f"({len(shown)} of {r.depth + 1} layers shown; --json has them all)\n")
    out.write("\nmeasured: mean +- 2 standard errors over the networks; ok: the prediction lies "
              "in that band (and in the band of the geometric mean for q and |g|^2)\n")
    out.write(_pairs([("largest relative deviation of q", r.max_deviation_q),
                      ("largest deviation of c", r.max_deviation_c),
                      ("largest relative deviation of |g|^2", r.max_deviation_gradient),
                      ("comparisons in band", f"{100 * r.fraction_in_band:.1f}%")]) + "\n")
    out.write(f"verdict: {r.message}\n")
    return EXIT_OK


def _pm(mean: float, se: float) -> str:
    return f"{format_number(mean)} +- {format_number(2 * se, 2)}"


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
        "edge of chaos, depth limits and initialisation plans; dropout, maxout, "
        "self-normalisation, Jacobian spectra, the softmax output layer, and finite-width "
        "checks on seeded random networks. Infinite-width predictions at initialisation: "
        "check them on your own model."))
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    def with_act(p: argparse.ArgumentParser) -> None:
        p.add_argument("activation", help="built-in name or a formula in x, e.g. 'x * tanh(softplus(x))'")
        p.add_argument("--param", action="append", metavar="NAME=VALUE",
                       help="named parameter of the activation (repeatable), e.g. slope=0.1")

    def with_json(p: argparse.ArgumentParser) -> None:
        p.add_argument("--json", action="store_true", help="machine-readable output")

    def with_plot(p: argparse.ArgumentParser, text: str, required: bool = False) -> None:
        p.add_argument("--plot", metavar="FILE", required=required,
                       help=f"{text}: FILE.png or FILE.svg (needs matplotlib: "
                            "pip install \"propcalc[plot]\")")

    def with_window(p: argparse.ArgumentParser) -> None:
        p.add_argument("--sigma-w2-range", type=_window("0 <"), metavar="LO,HI",
                       help="the picture's sigma_w2 axis (default 0.1,4, widened to a marked "
                            "point)")
        p.add_argument("--sigma-b2-range", type=_window("0 <="), metavar="LO,HI",
                       help="the picture's sigma_b2 axis (default 0,0.5, widened to a marked "
                            "point)")
        p.add_argument("--grid", type=_grid, metavar="N|NW,NB",
                       help="grid points of the picture: N x N, or NW along sigma_w2 and NB "
                            "along sigma_b2 (default 81,61)")

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
    with_plot(p, "also draw the phase diagram with this point marked (or --plot-kind)")
    p.add_argument("--plot-kind", choices=_REPORT_PLOTS,
                   help="the figure --plot draws (default phase-diagram; the others are the "
                        "variance map, the correlation map and the depth scales at this point)")
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("edge", help="the edge-of-chaos line")
    with_act(p)
    p.add_argument("--q-star", type=_finite_list, metavar="Q[,Q...]",
                   help="comma-separated q* values to sample")
    p.add_argument("--sigma-b2", type=_float, help="solve for the critical sigma_w2 at this sigma_b2")
    with_json(p)
    with_plot(p, "also draw the phase diagram with the edge-of-chaos line (with --sigma-b2, the "
                 "first critical point marked)")
    with_window(p)
    p.set_defaults(func=_cmd_edge)

    p = sub.add_parser("phase", help="phase diagram over a sigma_w2 x sigma_b2 grid (an image)")
    with_act(p)
    with_plot(p, "the image to write", required=True)
    with_window(p)
    p.add_argument("--point", type=_point, metavar="W,B",
                   help="your (sigma_w2, sigma_b2): marked with its phase and xi_c, the window "
                        "widened to include it")
    p.add_argument("--depth", type=int,
                   help="your depth L: the contour 6 xi_c = L drawn in bold")
    p.add_argument("--q-input", type=_float, default=1.0, help="mean square of the inputs (default 1)")
    p.set_defaults(func=_cmd_phase)

    p = sub.add_parser("depth-scales", help="xi_q and xi_c against sigma_w2 at a fixed sigma_b2 "
                                            "(an image)")
    with_act(p)
    with_plot(p, "the image to write", required=True)
    p.add_argument("-b", "--sigma-b2", type=_float, default=0.0,
                   help="the bias variance of the curve (default 0)")
    p.add_argument("-w", "--sigma-w2", type=_float,
                   help="your sigma_w2: marked on the xi_c curve")
    p.add_argument("--sigma-w2-range", type=_window("0 <"), metavar="LO,HI",
                   help="the sigma_w2 axis (default 0.1,4, widened to your point and the edge)")
    p.add_argument("--points", type=int, default=121,
                   help="regular samples of sigma_w2 (default 121; more are added around the "
                        "edge of chaos)")
    p.add_argument("--depth", type=int, help="your depth L: the line xi = L / 6")
    p.add_argument("--q-input", type=_float, default=1.0, help="mean square of the inputs (default 1)")
    p.set_defaults(func=_cmd_depth_scales)

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

    p = sub.add_parser("dropout", help="propagation with dropout: one keep rate, or a sweep")
    with_act(p)
    p.add_argument("-w", "--sigma-w2", type=_float, required=True, help="weight variance x fan_in")
    p.add_argument("-b", "--sigma-b2", type=_float, default=0.0, help="bias variance (default 0)")
    p.add_argument("--keep-rate", type=_finite_list, required=True, metavar="RHO[,RHO...]",
                   help="probability of keeping a unit (activations rescaled by 1/rho); a comma "
                        "list gives a sweep")
    p.add_argument("--depth", type=int, help="number of layers, for chi_1^L and the verdict")
    p.add_argument("--q-input", type=_float, default=1.0, help="mean square of the inputs (default 1)")
    p.add_argument("--scale-with-keep-rate", action="store_true",
                   help="use sigma_w2 * rho at keep rate rho (holds q* fixed)")
    with_json(p)
    p.set_defaults(func=_cmd_dropout)

    p = sub.add_parser("maxout", help="maxout networks of rank k")
    p.add_argument("k", type=int, help="rank: affine pieces per unit (1 to 1024)")
    p.add_argument("-w", "--sigma-w2", type=_float,
                   help="weight variance x fan_in of every piece (default c_k = 1 / E[X_k^2])")
    p.add_argument("-b", "--sigma-b2", type=_float, default=0.0, help="bias variance (default 0)")
    p.add_argument("--depth", type=int, help="number of layers, for chi_1^L and the verdict")
    p.add_argument("--q-input", type=_float, default=1.0, help="mean square of the inputs (default 1)")
    p.add_argument("--fan-in", type=int, help="with --fan-out: size and weight std of one layer")
    p.add_argument("--fan-out", type=int, help="see --fan-in")
    with_json(p)
    p.set_defaults(func=_cmd_maxout)

    p = sub.add_parser("selfnorm", help="mean-variance fixed points (self-normalisation); "
                                        "alpha-dropout constants")
    with_act(p)
    p.add_argument("--omega", type=_float, default=0.0,
                   help="sum of a unit's incoming weights (default 0)")
    p.add_argument("--tau", type=_float, default=1.0,
                   help="sum of their squares (default 1)")
    p.add_argument("--start", type=_pair, default=(0.0, 1.0), metavar="MU,NU",
                   help="where the network starts (default 0,1): the nearest fixed point")
    p.add_argument("--keep-rate", type=_float, help="alpha dropout at this keep rate")
    p.add_argument("--alpha-prime", type=_float,
                   help="value of dropped units (default SELU's -lambda alpha)")
    p.add_argument("--mean", type=_float, default=0.0,
                   help="mean kept by alpha dropout (default 0)")
    p.add_argument("--variance", type=_float, default=1.0,
                   help="variance kept by alpha dropout (default 1)")
    with_json(p)
    p.set_defaults(func=_cmd_selfnorm)

    p = sub.add_parser("isometry", help="Jacobian spectrum and dynamical isometry")
    with_act(p)
    p.add_argument("--depth", type=int, required=True, help="number of layers L")
    p.add_argument("--q-star", type=_float, default=1.0,
                   help="pre-activation variance of every layer (default 1)")
    p.add_argument("-w", "--sigma-w2", type=_float,
                   help="weight variance x fan_in (default: the edge of chaos through q*)")
    p.add_argument("--max-variance", type=_float, default=0.25,
                   help="target spectral variance / mean^2 of the advice (default 0.25: common "
                        "practice, no source)")
    p.add_argument("--q-range", type=_pair, default=(1e-6, 100.0), metavar="LO,HI",
                   help="q* scanned by the advice (default 1e-6,100)")
    with_json(p)
    p.set_defaults(func=_cmd_isometry)

    p = sub.add_parser("softmax", help="softmax output: initial loss vs ln K; last-layer scale")
    p.add_argument("n_classes", type=int, metavar="K", help="number of classes")
    p.add_argument("--logit-variance", type=_float, help="variance of each logit at init")
    p.add_argument("--margin", type=_float, nargs="?", const=_DEFAULT_MARGIN,
                   help="recommend the last layer's scale for an initial loss within this many "
                        "nats of ln K (alone: 1%% of ln K)")
    p.add_argument("--second-moment", type=_float, default=1.0,
                   help="E[phi^2] of the penultimate activations (default 1)")
    p.add_argument("-b", "--sigma-b2", type=_float, default=0.0,
                   help="the last layer's bias variance (default 0)")
    p.add_argument("--fan-in", type=int, help="width of the penultimate layer, for the weight std")
    p.add_argument("--current-sigma-w2", type=_float, help="the planned last layer's sigma_w2")
    p.add_argument("--current-sigma-b2", type=_float, help="the planned last layer's sigma_b2")
    p.add_argument("--samples", type=int,
                   help="Monte Carlo draws for E[max p] (default 100000, or 5e7 / K if smaller)")
    p.add_argument("--seed", type=int, default=0, help="seed of the Monte Carlo draws")
    with_json(p)
    p.set_defaults(func=_cmd_softmax)

    lim = SIMULATION_LIMITS
    p = sub.add_parser("simulate", help="finite-width check on seeded random networks")
    with_act(p)
    p.add_argument("-w", "--sigma-w2", type=_float, required=True, help="weight variance x fan_in")
    p.add_argument("-b", "--sigma-b2", type=_float, default=0.0, help="bias variance (default 0)")
    p.add_argument("--width", type=int, required=True, help=f"units per layer (2 to {lim['width']})")
    p.add_argument("--depth", type=int, required=True, help=f"layers (1 to {lim['depth']})")
    p.add_argument("--repetitions", type=int, default=8,
                   help=f"independent networks (2 to {lim['repetitions']}, default 8)")
    p.add_argument("--pairs", type=int, default=4,
                   help=f"input pairs per network (1 to {lim['pairs']}, default 4)")
    p.add_argument("--seed", type=int, default=0, help="root seed (default 0)")
    p.add_argument("--q0", type=_float, default=1.0,
                   help="mean square of the layer-0 pre-activations (default 1)")
    p.add_argument("--c0", type=_float, default=0.5, help="their correlation (default 0.5)")
    p.add_argument("--tolerance", type=_float, default=0.05,
                   help="practical size of a visible deviation (default 0.05)")
    with_json(p)
    p.set_defaults(func=_cmd_simulate)

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
        try:
            with contextlib.redirect_stdout(out):  # -h / --help print to `out` ...
                args = parser.parse_args(argv)
        except SystemExit as exc:  # ... and exit: return the status instead
            code = exc.code
            return code if isinstance(code, int) else (EXIT_OK if code is None else EXIT_USAGE)
        args.err = err  # where a command says what it wrote when stdout carries JSON
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
