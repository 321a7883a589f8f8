"""``propcalc report``, ``edge``, ``phase`` and ``depth-scales``: one point, the edge of chaos, pictures."""

from __future__ import annotations

import argparse
from collections.abc import Sequence
from types import ModuleType
from typing import Any, TextIO

from ... import edge_of_chaos_points, propagation
from ..options import (
    EXIT_OK,
    UsageError,
    activation_of,
    check_depth,
    finite_float,
    finite_list,
    point,
    window,
    with_act,
    with_json,
    with_plot,
    with_window,
)
from ..output import emit_json, format_number, format_pairs, format_table
from ..pictures import needs_plot, start_plot, write_plot

__all__ = ["register"]


#: figures ``report --plot`` can draw
_REPORT_PLOTS = ("phase-diagram", "variance-map", "correlation-map", "depth-scales")
#: bounds of depth-scales --points (those of propcalc.plots)
_POINTS_BOUNDS = (5, 20_000)


def _cmd_report(args: argparse.Namespace, out: TextIO) -> int:
    needs_plot(args, "--plot-kind")
    target = start_plot(args)
    act = activation_of(args)
    p = propagation(act, args.sigma_w2, args.sigma_b2, depth=args.depth, q_input=args.q_input)
    if args.json:
        emit_json(p.to_dict(), out)
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
    out.write(format_pairs(pairs) + "\n")
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
    write_plot(fig, target, what, args, out)

def _cmd_edge(args: argparse.Namespace, out: TextIO) -> int:
    needs_plot(args, "--sigma-w2-range", "--sigma-b2-range", "--grid")
    target = start_plot(args)
    act = activation_of(args)
    # --q-star and --sigma-b2 exclude each other: the engine refuses both (one validation)
    points = edge_of_chaos_points(act, q_star=args.q_star, sigma_b2=args.sigma_b2)
    if args.json:
        emit_json([p.to_dict() for p in points], out)
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
    write_plot(fig, target, what, args, out)

def _cmd_phase(args: argparse.Namespace, out: TextIO) -> int:
    check_depth(args.depth)
    target = start_plot(args)
    assert target is not None  # --plot is required
    act = activation_of(args)
    plots = target[2]
    fig = plots.plot_phase_diagram(act, args.point, sigma_w2_range=args.sigma_w2_range,
                                   sigma_b2_range=args.sigma_b2_range,
                                   **({} if args.grid is None else {"n_grid": args.grid}),
                                   q_input=args.q_input, depth=args.depth, progress=None)
    what = f"the phase diagram of {act.label}"
    if args.point is not None:
        what += f" with the point ({format_number(args.point[0])}, {format_number(args.point[1])})"
    write_plot(fig, target, what, args, out)
    return EXIT_OK

def _cmd_depth_scales(args: argparse.Namespace, out: TextIO) -> int:
    lo, hi = _POINTS_BOUNDS
    if not lo <= args.points <= hi:
        raise UsageError(f"--points must be in [{lo}, {hi}], got {args.points}")
    if args.sigma_b2 < 0:
        raise UsageError(f"--sigma-b2 must be >= 0, got {format_number(args.sigma_b2)}")
    if args.sigma_w2 is not None and args.sigma_w2 <= 0:
        raise UsageError(f"--sigma-w2 must be > 0, got {format_number(args.sigma_w2)}")
    check_depth(args.depth)
    target = start_plot(args)
    assert target is not None  # --plot is required
    act = activation_of(args)
    point = None if args.sigma_w2 is None else (args.sigma_w2, args.sigma_b2)
    fig = target[2].plot_depth_scales(act, point, sigma_b2=args.sigma_b2,
                                      sigma_w2_range=args.sigma_w2_range, n_points=args.points,
                                      depth=args.depth, q_input=args.q_input, progress=None)
    what = f"the depth scales of {act.label} at sigma_b2 = {format_number(args.sigma_b2)}"
    if point is not None:
        what += f" with the point sigma_w2 = {format_number(args.sigma_w2)}"
    write_plot(fig, target, what, args, out)
    return EXIT_OK


def register(sub: Any) -> None:
    """Add the report, edge, phase and depth-scales subcommands to ``sub`` (an argparse subparsers object)."""
    p = sub.add_parser("report", help="propagation report at one (sigma_w2, sigma_b2)")
    with_act(p)
    p.add_argument("-w", "--sigma-w2", type=finite_float, required=True, help="weight variance x fan_in")
    p.add_argument("-b", "--sigma-b2", type=finite_float, default=0.0, help="bias variance (default 0)")
    p.add_argument("--depth", type=int, help="number of layers, for chi_1^L")
    p.add_argument("--q-input", type=finite_float, default=1.0, help="mean square of the inputs (default 1)")
    with_json(p)
    with_plot(p, "also draw the phase diagram with this point marked (or --plot-kind)")
    p.add_argument("--plot-kind", choices=_REPORT_PLOTS,
                   help="the figure --plot draws (default phase-diagram; the others are the "
                        "variance map, the correlation map and the depth scales at this point)")
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("edge", help="the edge-of-chaos line")
    with_act(p)
    p.add_argument("--q-star", type=finite_list, metavar="Q[,Q...]",
                   help="comma-separated q* values to sample")
    p.add_argument("--sigma-b2", type=finite_float, help="solve for the critical sigma_w2 at this sigma_b2")
    with_json(p)
    with_plot(p, "also draw the phase diagram with the edge-of-chaos line (with --sigma-b2, the "
                 "first critical point marked)")
    with_window(p)
    p.set_defaults(func=_cmd_edge)

    p = sub.add_parser("phase", help="phase diagram over a sigma_w2 x sigma_b2 grid (an image)")
    with_act(p)
    with_plot(p, "the image to write", required=True)
    with_window(p)
    p.add_argument("--point", type=point, metavar="W,B",
                   help="your (sigma_w2, sigma_b2): marked with its phase and xi_c, the window "
                        "widened to include it")
    p.add_argument("--depth", type=int,
                   help="your depth L: the contour 6 xi_c = L drawn in bold")
    p.add_argument("--q-input", type=finite_float, default=1.0, help="mean square of the inputs (default 1)")
    p.set_defaults(func=_cmd_phase)

    p = sub.add_parser("depth-scales", help="xi_q and xi_c against sigma_w2 at a fixed sigma_b2 "
                                            "(an image)")
    with_act(p)
    with_plot(p, "the image to write", required=True)
    p.add_argument("-b", "--sigma-b2", type=finite_float, default=0.0,
                   help="the bias variance of the curve (default 0)")
    p.add_argument("-w", "--sigma-w2", type=finite_float,
                   help="your sigma_w2: marked on the xi_c curve")
    p.add_argument("--sigma-w2-range", type=window("0 <"), metavar="LO,HI",
                   help="the sigma_w2 axis (default 0.1,4, widened to your point and the edge)")
    p.add_argument("--points", type=int, default=121,
                   help="regular samples of sigma_w2 (default 121; more are added around the "
                        "edge of chaos)")
    p.add_argument("--depth", type=int, help="your depth L: the line xi = L / 6")
    p.add_argument("--q-input", type=finite_float, default=1.0, help="mean square of the inputs (default 1)")
    p.set_defaults(func=_cmd_depth_scales)
