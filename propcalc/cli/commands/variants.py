"""``propcalc dropout``, ``maxout``, ``selfnorm``, ``isometry`` and ``softmax``: the variants."""

from __future__ import annotations

import argparse
import math
from typing import Any, TextIO

from ... import (
    alpha_dropout,
    dropout_propagation,
    dropout_sweep,
    dynamical_isometry,
    initial_loss,
    jacobian_spectrum,
    max_class_probability,
    maxout_layer,
    maxout_propagation,
    output_layer_scale,
    self_normalization,
)
from ..options import (
    EXIT_OK,
    UsageError,
    activation_of,
    finite_float,
    finite_list,
    number_pair,
    with_act,
    with_json,
)
from ..output import emit_json, format_number, format_pairs, format_table

__all__ = ["register"]


#: draws times classes of the Monte Carlo estimate of E[max p] (the engine's bound in
#: propcalc.output_layer); the default number of draws is 100000 or 5e7 / K if smaller
_MC_MAX_ELEMENTS = 50_000_000
_MC_DEFAULT_SAMPLES = 100_000
#: smallest input mean square of ``propcalc dropout`` (the service's range too)
_DROPOUT_Q_INPUT_MIN = 1e-12
#: ``--margin`` given without a value: the engine's default margin (1% of ln K)
_DEFAULT_MARGIN = object()
#: the empirical rule behind every trainable depth
SIX_XI_C = "trainable depth: about 6 xi_c layers (empirical rule of Schoenholz et al. 2017)"


def _cmd_dropout(args: argparse.Namespace, out: TextIO) -> int:
    act = activation_of(args)
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
            emit_json(r.to_dict(), out)
            return EXIT_OK
        pairs = [
            ("activation", r.activation), ("keep rate", r.keep_rate), ("sigma_w2", r.sigma_w2),
            ("sigma_b2", r.sigma_b2), ("variance", r.status), ("q*", r.q_star),
            ("chi_q", r.chi_q), ("chi_1", r.chi_1), ("c*", r.c_star), ("chi_c", r.chi_c),
            ("xi_c", r.xi_c), ("trainable depth (6 xi_c)", r.trainable_depth),
        ]
        if r.depth is not None:
            pairs += [("depth", r.depth), ("gradient growth chi_1^L", r.gradient_growth)]
        out.write(format_pairs(pairs) + "\n")
        out.write(f"verdict: {r.verdict}\n")
        for note in r.notes:
            out.write(f"note: {note}\n")
        out.write(f"note: {SIX_XI_C}\n")
        return EXIT_OK
    sweep = dropout_sweep(act, args.sigma_w2, args.sigma_b2, rates, depth=args.depth,
                          q_input=args.q_input, scale_with_keep_rate=args.scale_with_keep_rate)
    if args.json:
        emit_json(sweep.to_dict(), out)
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
    out.write(f"note: {SIX_XI_C}\n")
    return EXIT_OK

def _cmd_maxout(args: argparse.Namespace, out: TextIO) -> int:
    if (args.fan_in is None) != (args.fan_out is None):
        raise UsageError("--fan-in and --fan-out go together (the size of one maxout layer)")
    r = maxout_propagation(args.k, args.sigma_w2, args.sigma_b2, depth=args.depth,
                           q_input=args.q_input)
    layer = (maxout_layer(args.k, args.fan_in, args.fan_out, args.sigma_w2)
             if args.fan_in is not None else None)
    if args.json:
        emit_json({**r.to_dict(), "layer": None if layer is None else layer.to_dict()}, out)
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
    out.write(format_pairs(pairs) + "\n")
    out.write(f"verdict: {r.verdict}\n")
    for note in r.notes:
        out.write(f"note: {note}\n")
    return EXIT_OK

def _cmd_selfnorm(args: argparse.Namespace, out: TextIO) -> int:
    act = activation_of(args)
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
        emit_json({**r.to_dict(), "alpha_dropout": None if dropout is None
                   else dropout.to_dict()}, out)
        return EXIT_OK
    out.write(format_pairs([
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
        out.write(format_pairs([("keep rate", dropout.keep_rate), ("alpha'", dropout.alpha_prime),
                                ("a", dropout.a), ("b", dropout.b), ("mean kept", dropout.mean),
                                ("variance kept", dropout.variance)]) + "\n")
    return EXIT_OK

def _complex(re: float, im: float) -> str:
    if im == 0.0:
        return format_number(re)
    return f"{format_number(re)}{'+' if im > 0 else '-'}{format_number(abs(im))}i"

def _cmd_isometry(args: argparse.Namespace, out: TextIO) -> int:
    act = activation_of(args)
    spec = jacobian_spectrum(act, args.depth, args.q_star, args.sigma_w2)
    advice = dynamical_isometry(act, args.depth, args.max_variance, args.q_range)
    if args.json:
        emit_json({"spectrum": spec.to_dict(), "advice": advice.to_dict()}, out)
        return EXIT_OK
    out.write(format_pairs([
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
    given = [o for o, v in (("--second-moment", args.second_moment), ("--sigma-b2", args.sigma_b2),
                            ("--fan-in", args.fan_in), ("--current-sigma-w2", args.current_sigma_w2),
                            ("--current-sigma-b2", args.current_sigma_b2)) if v is not None]
    if args.margin is None and given:  # they shape the last layer only: never ignore them
        raise UsageError(f"{', '.join(given)}: options of the last layer's scale, which need "
                         "--margin")
    second_moment = 1.0 if args.second_moment is None else args.second_moment
    sigma_b2 = 0.0 if args.sigma_b2 is None else args.sigma_b2
    n = args.samples
    if n is None:
        n = max(2, min(_MC_DEFAULT_SAMPLES, _MC_MAX_ELEMENTS // max(k, 1)))
    loss = pmax = scale = None
    if args.logit_variance is not None:
        loss = initial_loss(k, args.logit_variance)
        pmax = max_class_probability(k, args.logit_variance, n, args.seed)
    if args.margin is not None:
        margin = None if args.margin is _DEFAULT_MARGIN else args.margin
        scale = output_layer_scale(k, second_moment, margin, sigma_b2, args.fan_in,
                                   args.current_sigma_w2, args.current_sigma_b2, n, args.seed)
    if args.json:
        emit_json({"initial_loss": None if loss is None else loss.to_dict(),
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
    out.write(format_pairs(pairs) + "\n")
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
        out.write(format_pairs(rows) + "\n")
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


def register(sub: Any) -> None:
    """Add the dropout, maxout, selfnorm, isometry and softmax subcommands to ``sub`` (an argparse subparsers object)."""
    p = sub.add_parser("dropout", help="propagation with dropout: one keep rate, or a sweep")
    with_act(p)
    p.add_argument("-w", "--sigma-w2", type=finite_float, required=True, help="weight variance x fan_in")
    p.add_argument("-b", "--sigma-b2", type=finite_float, default=0.0, help="bias variance (default 0)")
    p.add_argument("--keep-rate", type=finite_list, required=True, metavar="RHO[,RHO...]",
                   help="probability of keeping a unit (activations rescaled by 1/rho); a comma "
                        "list gives a sweep")
    p.add_argument("--depth", type=int, help="number of layers, for chi_1^L and the verdict")
    p.add_argument("--q-input", type=finite_float, default=1.0, help="mean square of the inputs (default 1)")
    p.add_argument("--scale-with-keep-rate", action="store_true",
                   help="use sigma_w2 * rho at keep rate rho (holds q* fixed)")
    with_json(p)
    p.set_defaults(func=_cmd_dropout)

    p = sub.add_parser("maxout", help="maxout networks of rank k")
    p.add_argument("k", type=int, help="rank: affine pieces per unit (1 to 1024)")
    p.add_argument("-w", "--sigma-w2", type=finite_float,
                   help="weight variance x fan_in of every piece (default c_k = 1 / E[X_k^2])")
    p.add_argument("-b", "--sigma-b2", type=finite_float, default=0.0, help="bias variance (default 0)")
    p.add_argument("--depth", type=int, help="number of layers, for chi_1^L and the verdict")
    p.add_argument("--q-input", type=finite_float, default=1.0, help="mean square of the inputs (default 1)")
    p.add_argument("--fan-in", type=int, help="with --fan-out: size and weight std of one layer")
    p.add_argument("--fan-out", type=int, help="see --fan-in")
    with_json(p)
    p.set_defaults(func=_cmd_maxout)

    p = sub.add_parser("selfnorm", help="mean-variance fixed points (self-normalisation); "
                                        "alpha-dropout constants")
    with_act(p)
    p.add_argument("--omega", type=finite_float, default=0.0,
                   help="sum of a unit's incoming weights (default 0)")
    p.add_argument("--tau", type=finite_float, default=1.0,
                   help="sum of their squares (default 1)")
    p.add_argument("--start", type=number_pair, default=(0.0, 1.0), metavar="MU,NU",
                   help="where the network starts (default 0,1): the nearest fixed point")
    p.add_argument("--keep-rate", type=finite_float, help="alpha dropout at this keep rate")
    p.add_argument("--alpha-prime", type=finite_float,
                   help="value of dropped units (default SELU's -lambda alpha)")
    p.add_argument("--mean", type=finite_float, default=0.0,
                   help="mean kept by alpha dropout (default 0)")
    p.add_argument("--variance", type=finite_float, default=1.0,
                   help="variance kept by alpha dropout (default 1)")
    with_json(p)
    p.set_defaults(func=_cmd_selfnorm)

    p = sub.add_parser("isometry", help="Jacobian spectrum and dynamical isometry")
    with_act(p)
    p.add_argument("--depth", type=int, required=True, help="number of layers L")
    p.add_argument("--q-star", type=finite_float, default=1.0,
                   help="pre-activation variance of every layer (default 1)")
    p.add_argument("-w", "--sigma-w2", type=finite_float,
                   help="weight variance x fan_in (default: the edge of chaos through q*)")
    p.add_argument("--max-variance", type=finite_float, default=0.25,
                   help="target spectral variance / mean^2 of the advice (default 0.25: common "
                        "practice, no source)")
    p.add_argument("--q-range", type=number_pair, default=(1e-6, 100.0), metavar="LO,HI",
                   help="q* scanned by the advice (default 1e-6,100)")
    with_json(p)
    p.set_defaults(func=_cmd_isometry)

    p = sub.add_parser("softmax", help="softmax output: initial loss vs ln K; last-layer scale")
    p.add_argument("n_classes", type=int, metavar="K", help="number of classes")
    p.add_argument("--logit-variance", type=finite_float, help="variance of each logit at init")
    p.add_argument("--margin", type=finite_float, nargs="?", const=_DEFAULT_MARGIN,
                   help="recommend the last layer's scale for an initial loss within this many "
                        "nats of ln K (alone: 1%% of ln K)")
    p.add_argument("--second-moment", type=finite_float,
                   help="with --margin: E[phi^2] of the penultimate activations (default 1)")
    p.add_argument("-b", "--sigma-b2", type=finite_float,
                   help="with --margin: the last layer's bias variance (default 0)")
    p.add_argument("--fan-in", type=int, help="width of the penultimate layer, for the weight std")
    p.add_argument("--current-sigma-w2", type=finite_float, help="the planned last layer's sigma_w2")
    p.add_argument("--current-sigma-b2", type=finite_float, help="the planned last layer's sigma_b2")
    p.add_argument("--samples", type=int,
                   help="Monte Carlo draws for E[max p] (default 100000, or 5e7 / K if smaller)")
    p.add_argument("--seed", type=int, default=0, help="seed of the Monte Carlo draws")
    with_json(p)
    p.set_defaults(func=_cmd_softmax)
