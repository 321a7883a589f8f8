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
    propcalc plan ACT --depth L       per-layer initialisation plan (with --widths and --loss:
                                      the learning-rate ceiling and learning rate)
    propcalc network FILE|-           a network described block by block (JSON): q, c and the
                                      gradient per position, summary, verdict, plan (--check:
                                      seeded finite-width networks; --plot: against depth)
    propcalc shape ACT --depth L      the activation shaped for the depth (--method tat|dks):
                                      parameters, achieved C_L(0) and C_L'(1), roots, verdict
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
    propcalc serve --production       the production server (gunicorn + waitress)

``ACT`` is a built-in name or a formula in x (quote it); named parameters go
with ``--param name=value``. Human-readable tables by default, ``--json`` for
machines (the fields of the results' ``to_dict()``; ``maxout`` adds ``layer``
and ``selfnorm`` adds ``alpha_dropout``, null unless asked for; ``isometry``
gives ``{"spectrum", "advice"}`` and ``softmax`` ``{"initial_loss",
"max_probability", "output_layer"}``). Errors are one line on stderr; exit
status 2 for usage errors, 1 for computation failures. ``-h`` writes the
help to the output stream and returns 0.

Pictures (the ``plot`` extra, matplotlib: ``python3 -m pip install -e ".[plot]"`` in the checkout):
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

Layout: :mod:`~propcalc.cli.program` (the parser and ``main``), :mod:`~propcalc.cli.options` (the
shared option types), :mod:`~propcalc.cli.output` (tables and JSON), :mod:`~propcalc.cli.pictures`
(``--plot``), and one module per family of subcommands in :mod:`propcalc.cli.commands`. A
contributed command (entry-point group ``propcalc.commands``) is a callable
``register(subparsers)`` that adds a subparser whose ``func(args, out) -> int`` runs it; it may
raise :class:`~propcalc.cli.options.UsageError` (exit status 2) or a PropcalcError.
"""

from __future__ import annotations

from .program import build_parser, main
from .options import UsageError
from .output import format_number

__all__ = ["build_parser", "format_number", "main", "UsageError"]
