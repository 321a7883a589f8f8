"""Sweeps of the propagation report over grids of parameters.

:func:`sweep` computes, for every activation and every point of the grid
``sigma_w2 x sigma_b2``, the quantities of :func:`propcalc.propagation`
(q*, chi_q, xi_q, chi_1, c*, chi_c, xi_c, phase, trainable depth) and returns
them as arrays (:class:`SweepResult`) or as a tidy table (CSV, JSON lines).
:func:`sweep_edge` walks the edge-of-chaos line over a grid of q*.

How it is computed
------------------
The whole grid goes through the same vectorised core as the single-point
report (:func:`propcalc.meanfield.core.propagate`; ``propagation`` is that core
on one point): the variance fixed points of every point from one shared table
of ``E[phi(sqrt(q) z)^2]`` on a log grid, polished elementwise; the chaotic
``c*`` from the Hermite (Mehler) series of the correlation map for all points
at once where its rigorous tail bound allows, and by exact evaluations from the
series' guess elsewhere. The two therefore agree to rounding (the tests check
it point by point against ``method="pointwise"``, which calls
``propagation`` at every point).

Fanning out
-----------
Pass any :class:`concurrent.futures.Executor` (a ``ProcessPoolExecutor``, or
``distributed.Client(...).get_executor()`` for a Dask cluster): the grid is
cut into chunks of many points (points are dealt to chunks in turn, so
chaotic and ordered points are spread evenly), each chunk is one call of the
module-level, picklable :func:`sweep_chunk`, and activations travel by name.
Set ``OMP_NUM_THREADS=1`` in the environment before the workers start so
that processes do not oversubscribe the cores. A progress bar (tqdm) is
shown on a terminal and written to stderr.

Conventions
-----------
Arrays use NaN only for a quantity that does not exist (every quantity but
chi_1 when the variance grows without bound, where ``propagation`` returns
None); tables and ``to_dict`` turn it into None / an empty CSV field, and
infinities into the strings ``inf`` / ``-inf`` (see :func:`propcalc.jsonable`).
"""

from __future__ import annotations

import pickle
import sys
from collections.abc import Sequence
from concurrent.futures import Executor, ThreadPoolExecutor, as_completed
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .. import domains
from ..activations import Activation, builtin_activation, builtin_names, resolve
from ..activations import activation as make_activation
from ..errors import (ActivationTypeError, InvalidParameterError, check_int, check_nonnegative,
                      install_hint)
from ..numerics.quadrature import DEFAULT_RULE, QuadratureRule
from ..results import ABSENT_AS_NONE, Result
from ..vocabulary import NEUTRAL_TOLERANCE, PHASES, VARIANCE_STATUSES
from .core import (QUANTITIES, TRAINABLE_RULE, check_axis, checked, depth_scales, propagate,
                   propagation_arrays)
from .edge import edge_line
from .maps import variance_map_slope
from .report import propagation
from .tables import Table, frozen

__all__ = [
    "QUANTITIES",
    "PHASES",
    "STATUSES",
    "SweepResult",
    "EdgeSweepResult",
    "sweep",
    "sweep_edge",
    "sweep_chunk",
    "propagation_arrays",
]

#: Variance statuses, as in :class:`propcalc.VarianceFixedPoints`.
STATUSES = VARIANCE_STATUSES

_TEXT = "<U18"

Array = np.ndarray


def _pointwise_flat(act: Activation, sw: Array, sb: Array, qi: float,
                    rule: QuadratureRule) -> dict[str, Array]:
    """The reference: :func:`propcalc.propagation` at every point."""
    n = sw.size
    out: dict[str, Array] = {k: np.full(n, np.nan) for k in QUANTITIES}
    out["status"] = np.empty(n, dtype=_TEXT)
    out["phase"] = np.empty(n, dtype=_TEXT)
    for i in range(n):
        p = propagation(act, float(sw[i]), float(sb[i]), q_input=qi, rule=rule)
        for k in QUANTITIES:
            v = getattr(p, k)
            out[k][i] = np.nan if v is None else v
        out["status"][i] = p.status
        out["phase"][i] = p.phase
    return out


# -------------------------------------------------------------------------------------------
# tasks for executors
# -------------------------------------------------------------------------------------------
def _portable(act: Activation) -> Any:
    """A picklable stand-in for an activation: its built-in name or formula, else the object."""
    if act.formula is None and act.name in builtin_names():
        try:
            if builtin_activation(act.name, **act.params) is act:
                return ("builtin", act.name, dict(act.params))
        except Exception:  # noqa: BLE001 - not a registry object; fall through
            pass
    if act.formula is not None:
        return ("formula", act.formula, dict(act.params))
    try:
        pickle.dumps(act)
    except Exception:  # noqa: BLE001 - lambdas and closures do not pickle
        raise InvalidParameterError(
            "activations", "built-in or formula activations when an executor is used",
            act.label, "a custom Activation holding Python functions cannot be sent to other "
            "processes; run the sweep without an executor") from None
    return act


def _resolve(spec: Any) -> Activation:
    if isinstance(spec, Activation):
        return spec
    kind, text, params = spec
    if kind == "builtin":
        return builtin_activation(text, **params)
    return make_activation(text, **params)


@dataclass(frozen=True, eq=False)
class _Task:
    act: Any
    sigma_w2: Array
    sigma_b2: Array
    q_input: float
    rule: QuadratureRule
    method: str


def sweep_chunk(task: _Task) -> dict[str, Array]:
    """Compute one chunk of a sweep (module-level so that executors can pickle it).

    Parameters
    ----------
    task : _Task
        The activation (or its portable name), flat sigma_w2 and sigma_b2
        arrays, q_input, the quadrature rule and the method.

    Returns
    -------
    dict of ndarray
        As :func:`propagation_arrays`.
    """
    act = _resolve(task.act)
    if task.method == "pointwise":
        return _pointwise_flat(act, task.sigma_w2, task.sigma_b2, task.q_input, task.rule)
    return propagate(act, task.sigma_w2, task.sigma_b2, task.q_input, task.rule,
                     where="sweep: ").arrays()


# -------------------------------------------------------------------------------------------
# results
# -------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class SweepResult(Table, Result):
    """Propagation quantities on a grid ``activations x sigma_w2 x sigma_b2``.

    Attributes
    ----------
    activations : tuple of str
        Labels, the first axis.
    sigma_w2, sigma_b2 : ndarray
        The grid axes (1-D).
    q_input : float
    status, phase : ndarray of str
        Shape ``(n_activations, n_sigma_w2, n_sigma_b2)``.
    q_star, chi_q, xi_q, chi_1, c_star, chi_c, xi_c, trainable_depth : ndarray of float
        The same shape; NaN where the quantity does not exist (unbounded
        variance), inf where ``propagation`` gives inf.
    method : str
        "vectorised" or "pointwise".

    Notes
    -----
    The arrays are read-only. ``trainable_depth`` is 6 xi_c, an empirical
    rule of Schoenholz et al. 2017.
    """

    activations: tuple[str, ...]
    sigma_w2: Array
    sigma_b2: Array
    q_input: float
    status: Array
    phase: Array
    q_star: Array = field(metadata=ABSENT_AS_NONE)
    chi_q: Array = field(metadata=ABSENT_AS_NONE)
    xi_q: Array = field(metadata=ABSENT_AS_NONE)
    chi_1: Array = field(metadata=ABSENT_AS_NONE)
    c_star: Array = field(metadata=ABSENT_AS_NONE)
    chi_c: Array = field(metadata=ABSENT_AS_NONE)
    xi_c: Array = field(metadata=ABSENT_AS_NONE)
    trainable_depth: Array = field(metadata=ABSENT_AS_NONE)
    method: str = "vectorised"
    trainable_depth_rule: str = field(default=TRAINABLE_RULE, init=False)

    dict_properties = ("shape",)

    @property
    def shape(self) -> tuple[int, int, int]:
        """(n_activations, n_sigma_w2, n_sigma_b2)."""
        return (len(self.activations), self.sigma_w2.size, self.sigma_b2.size)

    def grid(self, quantity: str, activation: int | str = 0) -> Array:
        """The 2-D array ``(n_sigma_w2, n_sigma_b2)`` of one quantity for one activation."""
        names = QUANTITIES + ("status", "phase")
        if quantity not in names:
            raise InvalidParameterError("quantity", f"one of {', '.join(names)}", quantity)
        if isinstance(activation, str):
            if activation not in self.activations:
                raise InvalidParameterError("activation", f"one of {', '.join(self.activations)}",
                                            activation)
            activation = self.activations.index(activation)
        return getattr(self, quantity)[activation]

    def columns(self) -> dict[str, Array]:
        """Flat columns of the tidy table (C order: activation, then sigma_w2, then sigma_b2)."""
        na, nw, nb = self.shape
        act = np.repeat(np.asarray(self.activations, dtype=object), nw * nb)
        sw = np.tile(np.repeat(self.sigma_w2, nb), na)
        sb = np.tile(self.sigma_b2, na * nw)
        cols: dict[str, Array] = {"activation": act, "sigma_w2": sw, "sigma_b2": sb,
                                  "q_input": np.full(na * nw * nb, self.q_input),
                                  "status": self.status.ravel(), "phase": self.phase.ravel()}
        for k in QUANTITIES:
            cols[k] = getattr(self, k).ravel()
        return cols


@dataclass(frozen=True, eq=False)
class EdgeSweepResult(Table, Result):
    """The edge-of-chaos line of each activation over a grid of q*.

    Attributes
    ----------
    activations : tuple of str
    q_star : ndarray
        The grid (1-D).
    sigma_w2, sigma_b2, chi_q, xi_q : ndarray of float
        Shape ``(n_activations, n_q_star)``; NaN where the point is not valid.
    stable, valid : ndarray of bool
        As :class:`propcalc.CriticalPoint`.
    """

    activations: tuple[str, ...]
    q_star: Array
    sigma_w2: Array = field(metadata=ABSENT_AS_NONE)
    sigma_b2: Array = field(metadata=ABSENT_AS_NONE)
    chi_q: Array = field(metadata=ABSENT_AS_NONE)
    xi_q: Array = field(metadata=ABSENT_AS_NONE)
    stable: Array
    valid: Array

    def columns(self) -> dict[str, Array]:
        na, nq = self.sigma_w2.shape
        return {"activation": np.repeat(np.asarray(self.activations, dtype=object), nq),
                "q_star": np.tile(self.q_star, na), "sigma_w2": self.sigma_w2.ravel(),
                "sigma_b2": self.sigma_b2.ravel(), "chi_q": self.chi_q.ravel(),
                "xi_q": self.xi_q.ravel(), "stable": self.stable.ravel().tolist(),
                "valid": self.valid.ravel().tolist()}


# -------------------------------------------------------------------------------------------
# the entry points
# -------------------------------------------------------------------------------------------
def _activations(spec: Any) -> list[Activation]:
    if isinstance(spec, (str, Activation)):
        return [resolve(spec, "activations")]
    if isinstance(spec, (list, tuple)):
        if not spec:
            raise InvalidParameterError("activations", "a name, an Activation or a non-empty list",
                                        [])
        return [resolve(a, f"activations[{i}]") for i, a in enumerate(spec)]
    raise ActivationTypeError("activations", "a name or formula string, an Activation, or a list "
                              "of them", spec)


def _on_terminal(stream: Any) -> bool:
    """Whether ``stream`` is a terminal (True when that cannot be told: tqdm decides)."""
    try:
        return bool(stream.isatty())
    except Exception:  # noqa: BLE001 - a replaced or closed stream: let tqdm decide as before
        return True


def _progress_bar(total: int, progress: bool | None, desc: str) -> Any:
    if progress is False or (progress is None and not _on_terminal(sys.stderr)):
        return None  # (tqdm would be disabled there: importing it costs about 20 ms)
    try:
        from tqdm.auto import tqdm
    except ImportError:
        if progress:
            raise ImportError(f"the progress bar needs tqdm: {install_hint('sweep')}"
                              ) from None
        return None
    return tqdm(total=total, disable=None if progress is None else not progress, file=sys.stderr,
                unit="point", desc=desc, leave=False)


def sweep(activations: str | Activation | Sequence[str | Activation], sigma_w2: Any,
          sigma_b2: Any, *, q_input: float = 1.0, executor: Executor | None = None,
          chunk_size: int | None = None, progress: bool | None = None,
          method: str = "vectorised", rule: QuadratureRule = DEFAULT_RULE) -> SweepResult:
    """Propagation quantities on the grid ``activations x sigma_w2 x sigma_b2``.

    Parameters
    ----------
    activations : str, Activation or sequence of them
        One or several activations (names are resolved by
        :func:`propcalc.activation`).
    sigma_w2 : float or 1-D array_like
        Weight variances times fan-in, each > 0.
    sigma_b2 : float or 1-D array_like
        Bias variances, each >= 0.
    q_input : float
        Mean squared input coordinate (as in :func:`propcalc.propagation`).
    executor : concurrent.futures.Executor, optional
        Where the chunks run (a ``ProcessPoolExecutor``, a Dask
        ``Client.get_executor()``...). None runs them here, one after the
        other. Workers should run with ``OMP_NUM_THREADS=1``.
    chunk_size : int, optional
        Points per task; by default about a sixteenth of the grid, between
        64 and 10 000 points.
    progress : bool or None
        None shows a progress bar only when stderr is a terminal; True
        always; False never.
    method : str
        "vectorised" (array fixed points, the default) or "pointwise"
        (:func:`propcalc.propagation` at every point: the reference, slow).
    rule : QuadratureRule

    Returns
    -------
    SweepResult

    Raises
    ------
    InvalidParameterError
        For a bad axis value (the message names the index), chunk size or
        method, or a custom activation that cannot be sent to an executor.

    Examples
    --------
    >>> import numpy as np
    >>> from propcalc import sweep
    >>> res = sweep("tanh", np.linspace(0.5, 3.0, 6), [0.0, 0.05], progress=False)
    >>> str(res.grid("phase")[0, 0]), str(res.grid("phase")[-1, -1])
    ('ordered', 'chaotic')
    """
    acts = _activations(activations)
    sw_axis = check_axis("sigma_w2", sigma_w2, positive=True)
    sb_axis = check_axis("sigma_b2", sigma_b2, positive=False)
    qi = checked("q_input", q_input)
    domains.check_signal(qi, sb_axis)
    if method not in ("vectorised", "pointwise"):
        raise InvalidParameterError("method", "one of vectorised, pointwise", method)
    if executor is not None and not isinstance(executor, Executor):
        raise InvalidParameterError("executor", "a concurrent.futures.Executor or None",
                                    type(executor).__name__)
    sw_grid, sb_grid = np.meshgrid(sw_axis, sb_axis, indexing="ij")
    sw_flat, sb_flat = sw_grid.ravel(), sb_grid.ravel()
    n = sw_flat.size
    size = (max(64, min(10_000, -(-n * len(acts) // 16))) if chunk_size is None
            else check_int("chunk_size", chunk_size, 1))
    n_chunks = max(1, -(-n // size))
    # deal points to chunks in turn: chaotic (expensive) points spread evenly
    chunk_index = [np.arange(k, n, n_chunks) for k in range(n_chunks)]
    ship = executor is not None and not isinstance(executor, ThreadPoolExecutor)
    tasks: list[tuple[int, Array, _Task]] = []
    for a, act in enumerate(acts):
        spec = _portable(act) if ship else act
        for idx in chunk_index:
            tasks.append((a, idx, _Task(spec, sw_flat[idx], sb_flat[idx], qi, rule, method)))

    fields = {k: np.full((len(acts), n), np.nan) for k in QUANTITIES}
    fields["status"] = np.empty((len(acts), n), dtype=_TEXT)
    fields["phase"] = np.empty((len(acts), n), dtype=_TEXT)
    bar = _progress_bar(n * len(acts), progress,
                        "sweep " + ", ".join(a.label for a in acts)[:40])
    try:
        def store(a: int, idx: Array, part: dict[str, Array]) -> None:
            for k, v in part.items():
                fields[k][a, idx] = v
            if bar is not None:
                bar.update(idx.size)

        if executor is None:
            for a, idx, task in tasks:
                store(a, idx, sweep_chunk(task))
        else:
            futures = {executor.submit(sweep_chunk, task): (a, idx) for a, idx, task in tasks}
            for fut in as_completed(futures):
                a, idx = futures[fut]
                store(a, idx, fut.result())
    finally:
        if bar is not None:
            bar.close()
    shape = (len(acts), sw_axis.size, sb_axis.size)
    arrays = {k: frozen(v.reshape(shape)) for k, v in fields.items()}
    return SweepResult(tuple(a.label for a in acts), frozen(sw_axis), frozen(sb_axis), qi,
                       method=method, **arrays)


def sweep_edge(activations: str | Activation | Sequence[str | Activation], q_star: Any, *,
               rule: QuadratureRule = DEFAULT_RULE) -> EdgeSweepResult:
    """The edge-of-chaos line of each activation on a grid of fixed points q*.

    ``sigma_w2 = 1 / E[phi'(sqrt(q*) z)^2]`` and ``sigma_b2 = q* - sigma_w2
    E[phi(sqrt(q*) z)^2]`` (Poole et al. 2016; Schoenholz et al. 2017),
    ``chi_q = V'(q*)`` by Stein's identity, all as arrays; a point is valid
    where sigma_w2 is finite, phi has no jump and sigma_b2 >= -1e-12 q*
    (then clipped to 0), as in :func:`propcalc.edge_of_chaos`.

    Parameters
    ----------
    activations : str, Activation or sequence of them
    q_star : float or 1-D array_like
        Each finite and > 0.

    Returns
    -------
    EdgeSweepResult
    """
    acts = _activations(activations)
    q = check_axis("q_star", q_star, positive=True)
    shape = (len(acts), q.size)
    sw = np.full(shape, np.nan)
    sb = np.full(shape, np.nan)
    chi_q = np.full(shape, np.nan)
    stable = np.zeros(shape, dtype=bool)
    valid = np.zeros(shape, dtype=bool)
    for a, act in enumerate(acts):
        if act.has_jumps:
            continue
        w, b = edge_line(act, q, rule)
        ok = np.isfinite(w) & (b >= -1e-12 * q)
        valid[a] = ok
        sw[a, ok] = w[ok]
        sb[a, ok] = np.maximum(b[ok], 0.0)
        if np.any(ok):
            chi_q[a, ok] = w[ok] * variance_map_slope(act, q[ok], 1.0, rule)
        stable[a] = ok & (np.abs(np.nan_to_num(chi_q[a], nan=2.0)) < 1.0 - NEUTRAL_TOLERANCE)
    xi_q = np.where(valid, depth_scales(np.nan_to_num(chi_q, nan=0.0)), np.nan)
    return EdgeSweepResult(tuple(a.label for a in acts), frozen(q), frozen(sw), frozen(sb),
                           frozen(chi_q), frozen(xi_q), frozen(stable), frozen(valid))
