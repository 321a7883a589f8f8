"""Breakpoints of a formula: where a ``where`` condition, the argument of ``abs``,
``max``/``min``, or a kinked built-in's argument changes sign.

Found by bracketing on a fine grid over [-50, 50] and a coarse grid out to 1e4,
and refined with Brent's method (:func:`propcalc.numerics.roots.brent`, to full
precision) for sign changes, or bisection on the
sign (the ends of runs of exact zeros).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from ...errors import FormulaError
from ...numerics.roots import brent
from ..builtins import builtin_activation
from .compiler import compile_node, evaluate_many
from .tree import Builder, Node, postorder
from .limits import LIMITS, FormulaLimits
from .vocabulary import BUILTIN_FUNCTIONS, REACH

__all__ = ["grid_points", "switch_functions", "roots_of", "breakpoints"]

Array = np.ndarray

#: switch functions evaluated together on the grid (bounds the memory of one pass)
_BATCH = 16
#: relative width of a breakpoint's final bracket: 4 ulps (a breakpoint is a place, not a
#: value of a noisy map, so it is located to the last bits)
_FULL_PRECISION = 4 * float(np.finfo(float).eps)

def _core_grid() -> Array:
    # k / 1000 exactly rounded: 0 and the integers are on the grid
    return np.arange(-50000, 50001) / 1000.0


def _search_grid() -> Array:
    core = _core_grid()
    tail = np.geomspace(50.0, REACH, 801)[1:]
    return np.concatenate([-tail[::-1], core, tail])


def _probe_grid() -> Array:
    core = _core_grid()
    mid = np.geomspace(50.0, 1e3, 4001)[1:]
    tail = np.geomspace(1e3, REACH, 1001)[1:]
    return np.concatenate([-tail[::-1], -mid[::-1], core, mid, tail])


_GRIDS: dict[str, Array] = {}


def grid_points(kind: str) -> Array:
    """The shared read-only grid ``"search"`` (breakpoints, poles) or ``"probe"`` (probes)."""
    g = _GRIDS.get(kind)
    if g is None:
        g = _search_grid() if kind == "search" else _probe_grid()
        g.setflags(write=False)
        _GRIDS[kind] = g
    return g


def switch_functions(root: Node, b: Builder) -> list[Node]:
    """Sub-expressions whose sign changes are the breakpoints of the formula.

    ``a - b`` for each comparison of a where condition and for max(a, b) and
    min(a, b); the argument of abs; ``u - p`` for each breakpoint p of a
    built-in called on u (so f(g(x)) breaks where g(x) hits f's breakpoints).
    """
    out: list[Node] = []
    for n in postorder(root):
        if n.op == "cmp" and (n.args[0].has_x or n.args[1].has_x):
            out.append(b.make("sub", n.args))
        elif n.op == "call" and any(a.has_x for a in n.args):
            if n.name == "abs":
                out.append(n.args[0])
            elif n.name in ("max", "min"):
                out.append(b.make("sub", n.args))
            elif n.name in BUILTIN_FUNCTIONS:
                for bp in builtin_activation(n.name).breakpoints:  # type: ignore[arg-type]
                    out.append(n.args[0] if bp == 0.0 else b.make("sub", (n.args[0], b.num(bp))))
    return list({id(n): n for n in out}.values())


def roots_of(fn: Callable[[Array], Array], grid: Array,
             max_roots: int = LIMITS.max_breakpoints, values: Array | None = None) -> list[float]:
    """Points where ``fn`` changes sign, or starts or stops being exactly 0, on the grid.

    Sign changes are refined with Brent's method; the ends of runs of exact
    zeros (``relu(x - a)`` is 0 on a whole half-line) by bisection on the
    sign down to one ulp. An isolated zero counts only if the sign flips
    across it (a tangency such as ``x**2`` at 0 is no breakpoint).
    """
    vals = fn(grid) if values is None else values
    code = np.where(np.isfinite(vals), np.sign(vals), 2.0)
    ends = np.flatnonzero(code[1:] != code[:-1])
    if ends.size == 0:
        return []
    flips = int(np.count_nonzero(np.abs(code[ends] - code[ends + 1]) == 2.0))
    if flips > max_roots:
        _too_many_breakpoints(flips, max_roots)
    starts = np.concatenate([[0], ends + 1])
    stops = np.concatenate([ends, [grid.size - 1]])
    runs = [(float(code[a]), int(a), int(z)) for a, z in zip(starts, stops)]

    def scalar(t: float) -> float:
        return float(fn(np.array([t]))[0])

    def sign_at(t: float) -> float:
        v = scalar(t)
        return 2.0 if not math.isfinite(v) else float(np.sign(v))

    def bisect(lo: float, hi: float) -> tuple[float, float]:
        left = sign_at(lo)
        for _ in range(200):
            mid = 0.5 * (lo + hi)
            if mid <= lo or mid >= hi:
                break
            if sign_at(mid) == left:
                lo = mid
            else:
                hi = mid
        return lo, hi

    roots: list[float] = []
    for k in range(len(runs) - 1):
        c1, _, e1 = runs[k]
        c2, s2, e2 = runs[k + 1]
        a, b = float(grid[e1]), float(grid[s2])
        if c1 == 2.0 or c2 == 2.0:
            continue
        if c1 != 0.0 and c2 != 0.0:
            fa, fb = scalar(a), scalar(b)
            # Brent's method to full precision (same-signed ends: the better end)
            roots.append(brent(scalar, a, b, fa, fb, rtol=_FULL_PRECISION))
        elif c2 == 0.0:
            after = runs[k + 2][0] if k + 2 < len(runs) else 2.0
            if s2 == e2 and after not in (0.0, 2.0):
                if after != c1:
                    roots.append(float(grid[s2]))  # the sign flips through an exact zero
                continue  # (else a tangency)
            roots.append(bisect(a, b)[1])  # first zero of the run
        else:
            before = runs[k - 1][0] if k > 0 else 2.0
            if runs[k][1] == e1 and before not in (0.0, 2.0):
                continue  # an isolated zero, handled on the way in
            roots.append(bisect(a, b)[0])  # last zero of the run
    return roots


def breakpoints(root: Node, b: Builder, limits: FormulaLimits = LIMITS) -> tuple[float, ...]:
    """The sorted breakpoints of the formula under ``root`` on [-1e4, 1e4].

    Parameters
    ----------
    root : Node
        The value of the formula.
    b : Builder
        The builder of ``root`` (the switch functions are made in it).
    limits : FormulaLimits
        ``max_breakpoints`` bounds how many there may be.

    Raises
    ------
    FormulaError
        If there are more than ``limits.max_breakpoints``.
    """
    grid = grid_points("search")
    found: list[float] = []
    switches = switch_functions(root, b)
    for start in range(0, len(switches), _BATCH):  # one pass over the grid per batch
        batch = switches[start:start + _BATCH]
        for node, vals in zip(batch, evaluate_many(batch, grid)):
            found += roots_of(compile_node(node), grid, limits.max_breakpoints, vals)
    found.sort()
    merged: list[float] = []
    for r in found:
        if merged and abs(r - merged[-1]) <= 1e-13 * max(1.0, abs(r)):
            continue
        merged.append(0.0 if r == 0 else r)
    if len(merged) > limits.max_breakpoints:
        _too_many_breakpoints(len(merged), limits.max_breakpoints)
    return tuple(merged)


def _too_many_breakpoints(count: int, limit: int) -> None:
    raise FormulaError(
        f"the formula switches at {count} or more points on [-1e4, 1e4] (where conditions, "
        f"abs, max, min, kinked built-ins); the limit is {limit}: "
        "a periodic condition such as where(sin(x) > 0, ...) is not supported")


