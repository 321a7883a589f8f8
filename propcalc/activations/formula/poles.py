"""Poles between grid points, including the ones whose denominator does not change sign.

The probes (:mod:`.probes`) only see a pole they land on exactly. Every denominator
(and the base of every negative power) of a graph is split into the factors whose zeros
are its zeros (``(x - a)**2`` -> ``x - a``, ``2 * sqrt(u)`` -> ``u``), the factors are
evaluated on the search grid in one pass, and three kinds of candidate are collected:

* exact zeros on the grid;
* sign changes between neighbours, refined with Brent's method
  (:func:`propcalc.numerics.roots.brent`; a simple zero);
* local minima of ``|factor|`` whose parabola through the three grid values comes below
  1e-3 of the neighbours, refined by a bounded minimisation: zeros that touch 0 without a sign change
  (``(x - 0.0005)**2``, ``1 + cos(x)`` at pi) and near-zeros (``x**2 + 1e-150``); a minimum
  counts when it is below 1e-8 of the factor's size within one unit of it.

A candidate is a pole when the whole graph (value or derivative: cancellations and
``where`` branches included) grows by more than 1e3 between the distances 1e-2 and 1e-7
from it (both relative to ``max(1, |x|)``): a simple pole grows by 1e5, an even-order one
by 1e10, while a removable 0/0 (``sin(x - a) / (x - a)``) and a pole in a branch not taken
stay bounded. An order-p singularity passes this test for the value when p <= 0.6, but its
derivative (order p + 1 >= 1) does not: the derivative is checked the same way.
Candidates are tried nearest to 0 first, at most 256 per graph.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from ...errors import FormulaError
from ...numerics.roots import brent
from .breakpoints import grid_points
from .compiler import NodeFn, compile_node, constant_value, evaluate_many, vectorise
from .printer import short_text
from .tree import Node, postorder
from .vocabulary import REACH

__all__ = ["check_poles", "denominators"]

Array = np.ndarray

#: a minimum of |factor| counts as a zero below this fraction of the factor's size nearby
_TOUCH_REL = 1e-8
#: growth of |graph| from distance 1e-2 to 1e-7 that makes a pole
_GROWTH = 1e3
#: candidates tried per graph (nearest to 0 first)
_CANDIDATES_MAX = 256
#: factors evaluated together on the grid (bounds the memory of one pass)
_BATCH = 16


def denominators(root: Node) -> list[tuple[Node, Node]]:
    """Pairs (node, denominator) for each division by, or negative power of, an x-expression."""
    out = []
    for n in postorder(root):
        if n.op == "div" and n.args[1].has_x:
            out.append((n, n.args[1]))
        elif n.op == "pow" and n.args[0].has_x and not n.args[1].has_x \
                and constant_value(n.args[1]) < 0:
            out.append((n, n.args[0]))
    return out


def _factors(den: Node) -> list[Node]:
    """Sub-expressions whose zeros are the zeros of ``den`` (products, powers, roots, abs)."""
    out: list[Node] = []
    stack, seen = [den], set()
    while stack:
        n = stack.pop()
        if id(n) in seen or not n.has_x:
            continue
        seen.add(id(n))
        if n.op == "neg" or (n.op == "call" and n.name in ("abs", "sqrt")):
            stack.append(n.args[0])
        elif n.op == "mul":
            stack.extend(n.args)
        elif n.op == "div":
            stack.append(n.args[0])
        elif n.op == "pow" and not n.args[1].has_x and constant_value(n.args[1]) > 0:
            stack.append(n.args[0])
        else:
            out.append(n)
    return out


@dataclass
class _Candidate:
    """A place where a factor may vanish: an exact grid zero, a sign change or a touch."""

    guess: float
    kind: str  # "zero", "sign" or "touch"
    lo: float
    hi: float
    window: float
    factor: Node
    owner: tuple[Node, Node]

    def locate(self, fn: Callable[[Array], Array]) -> tuple[float, float] | None:
        """(x, |factor(x)|) at the zero, or None when the factor stays clear of 0."""
        def scalar(t: float) -> float:
            return float(fn(np.array([t]))[0])

        if self.kind == "zero":
            return self.guess, 0.0
        if self.kind == "sign":
            r = brent(scalar, self.lo, self.hi, rtol=4 * float(np.finfo(float).eps))
            return r, abs(scalar(r))
        res = optimize.minimize_scalar(lambda t: abs(scalar(t)), bounds=(self.lo, self.hi),
                                       method="bounded",
                                       options={"xatol": 1e-15 * max(1.0, abs(self.guess))})
        r, fmin = float(res.x), abs(scalar(float(res.x)))
        if abs(scalar(self.guess)) < fmin:
            r, fmin = self.guess, abs(scalar(self.guess))
        return (r, fmin) if fmin <= _TOUCH_REL * self.window else None


def _window(grid: Array, mag: Array, i: int) -> float:
    """Largest finite |factor| on the grid within one unit of grid[i]."""
    lo = int(np.searchsorted(grid, grid[i] - 1.0))
    hi = int(np.searchsorted(grid, grid[i] + 1.0, side="right"))
    part = mag[lo:hi]
    return float(np.max(part[np.isfinite(part)], initial=0.0))


def _candidates(factor: Node, owner: tuple[Node, Node], vals: Array,
                grid: Array) -> list[_Candidate]:
    mag = np.abs(vals)
    finite = np.isfinite(vals)
    out: list[_Candidate] = []
    for i in np.flatnonzero(vals == 0.0)[:_CANDIDATES_MAX]:
        g = float(grid[i])
        out.append(_Candidate(g, "zero", g, g, 0.0, factor, owner))
    sign = np.where(finite, np.sign(vals), 0.0)
    for i in np.flatnonzero(sign[:-1] * sign[1:] < 0)[:4 * _CANDIDATES_MAX]:
        a, b = float(grid[i]), float(grid[i + 1])
        out.append(_Candidate(a if mag[i] <= mag[i + 1] else b, "sign", a, b, 0.0, factor, owner))
    # touches: interior local minima of |f| between neighbours of the same sign, whose
    # parabola through the three grid values comes down to about 0
    i = np.arange(1, grid.size - 1)
    ok = (finite[:-2] & finite[1:-1] & finite[2:] & (sign[:-2] == sign[1:-1])
          & (sign[1:-1] == sign[2:]) & (sign[1:-1] != 0.0)
          & (mag[1:-1] <= mag[:-2]) & (mag[1:-1] <= mag[2:]))
    i = i[ok]
    if i.size:
        x0, x1, x2 = grid[i - 1], grid[i], grid[i + 1]
        y0, y1, y2 = mag[i - 1], mag[i], mag[i + 1]
        d01 = (y1 - y0) / (x1 - x0)
        curv = ((y2 - y1) / (x2 - x1) - d01) / (x2 - x0)
        with np.errstate(all="ignore"):
            xv = 0.5 * (x0 + x1) - d01 / (2.0 * curv)
            low = y0 + d01 * (xv - x0) + curv * (xv - x0) * (xv - x1)
        deep = (curv > 0) & (low <= 1e-3 * np.maximum(y0, y2))
        for k in i[deep][:4 * _CANDIDATES_MAX]:
            out.append(_Candidate(float(grid[k]), "touch", float(grid[k - 1]), float(grid[k + 1]),
                                  _window(grid, mag, int(k)), factor, owner))
    return out


def _peak(root_fn: Callable[[Array], Array], r: float) -> float | None:
    """|graph| next to r when it grows like a pole there, else None."""
    s = max(1.0, abs(r))
    pts = r + s * np.array([-1e-7, 1e-7, -1e-9, 1e-9, -1e-2, 1e-2, 0.0])
    v = np.abs(root_fn(pts))
    close, far, at = v[:4], v[4:6], v[6]
    if not np.all(np.isfinite(close)):
        return math.inf
    base = max(float(np.max(far[np.isfinite(far)], initial=0.0)), 1e-300)
    peak = float(np.max(close))
    if math.isfinite(at):  # at r itself (0/0 of a removable singularity is nan: ignored)
        peak = max(peak, float(at))
    return peak if peak > _GROWTH * base else None


def check_poles(root: Node, fns: dict[int, NodeFn], what: str) -> None:
    """Refuse a pole of the graph under ``root`` between grid points (see the module notes).

    Parameters
    ----------
    root : Node
        The value or the derivative of a formula.
    fns : dict
        Its compiled closures (:func:`~.compiler.compile_nodes`).
    what : str
        ``"value"`` or ``"derivative"``, for the message.

    Raises
    ------
    FormulaError
        At the pole nearest 0: where, which denominator vanishes, and how.
    """
    divisions = denominators(root)
    if not divisions:
        return
    owners: dict[int, tuple[Node, tuple[Node, Node]]] = {}
    for n, den in divisions:
        for f in _factors(den):
            owners.setdefault(id(f), (f, (n, den)))
    grid = grid_points("search")
    found: list[_Candidate] = []
    entries = list(owners.values())
    for start in range(0, len(entries), _BATCH):
        batch = entries[start:start + _BATCH]
        for (f, owner), vals in zip(batch, evaluate_many([f for f, _ in batch], grid)):
            found += _candidates(f, owner, vals, grid)
    if not found:
        return
    found.sort(key=lambda c: (abs(c.guess), c.guess))
    root_fn = vectorise(fns[id(root)])
    compiled: dict[int, Callable[[Array], Array]] = {}
    for cand in found[:_CANDIDATES_MAX]:
        fn = compiled.setdefault(id(cand.factor), compile_node(cand.factor))
        located = cand.locate(fn)
        if located is None:
            continue
        r, fmin = located
        peak = _peak(root_fn, r)
        if peak is None:
            continue
        n, den = cand.owner
        if cand.kind == "touch" and fmin > 0.0:
            how = (f"{short_text(den)} comes within {fmin:.3g} of 0 there (a near-pole: the "
                   f"{what} reaches {peak:.3g})")
        elif cand.kind == "touch":
            how = f"{short_text(den)} is 0 there without changing sign (an even-order zero)"
        else:
            how = f"{short_text(den)} is 0 there"
        raise FormulaError(
            f"the {what} has a pole at x = {r:.6g}: {how}, in {short_text(n)}; the Gaussian "
            f"integrals reach |x| up to {REACH:g}, so the formula must be finite there")
